"""Distributions of request sizes and think times, drawn with a caller's seeded generator.

A profile gives a length either as a number (fixed) or as a table naming a distribution:

    input_tokens = 512                                   # fixed
    input_tokens = { distribution = "uniform", min = 200, max = 800 }
    input_tokens = { distribution = "normal", mean = 400, sd = 80, min = 50 }
    input_tokens = { distribution = "lognormal", median = 1800, sigma = 0.5, max = 7000 }
    input_tokens = { distribution = "exponential", mean = 2.0 }   # think times, mostly
    input_tokens = { distribution = "empirical", values = [90, 120, 400] }
    input_tokens = { distribution = "empirical", file = "lengths.txt" }  # one number a line

``min`` and ``max`` clamp a draw (they do not redraw), so the mean of a clamped
distribution is the mean of the clamped values; ``mean()`` reports the unclamped mean,
which is what the parameters say.
"""

from __future__ import annotations

import math
import random
from dataclasses import dataclass
from typing import Any

KINDS = ("fixed", "uniform", "normal", "lognormal", "exponential", "empirical")


@dataclass(frozen=True, slots=True)
class Distribution:
    """One named distribution with its parameters (only those its kind uses are set)."""

    kind: str
    value: float = 0.0
    """fixed: the value."""
    low: float | None = None
    high: float | None = None
    """Clamp bounds (uniform: the range)."""
    mean_value: float = 0.0
    """normal and exponential: the mean."""
    sd: float = 0.0
    """normal: the standard deviation."""
    median: float = 0.0
    sigma: float = 0.0
    """lognormal: the median (exp of the log-mean) and the standard deviation of the log."""
    values: tuple[float, ...] = ()
    """empirical: the observed values, each drawn with equal chance."""
    source: str | None = None
    """empirical: the file the values came from, if any."""

    @classmethod
    def fixed(cls, value: float) -> Distribution:
        return cls("fixed", value=value)

    def draw(self, rng: random.Random) -> float:
        """One draw, clamped to [low, high] where those are set."""
        kind = self.kind
        if kind == "fixed":
            return self.value
        if kind == "uniform":
            assert self.low is not None and self.high is not None
            return rng.uniform(self.low, self.high)
        if kind == "normal":
            sample = rng.gauss(self.mean_value, self.sd)
        elif kind == "lognormal":
            sample = rng.lognormvariate(math.log(self.median), self.sigma)
        elif kind == "exponential":
            sample = rng.expovariate(1.0 / self.mean_value) if self.mean_value > 0 else 0.0
        elif kind == "empirical":
            sample = rng.choice(self.values)
        else:  # pragma: no cover - the loader admits only KINDS
            raise ValueError(f"unknown distribution {kind!r}")
        return self.clamp(sample)

    def draw_int(self, rng: random.Random, minimum: int = 1) -> int:
        """A draw rounded to a whole number, at least ``minimum``."""
        return max(minimum, round(self.draw(rng)))

    def clamp(self, sample: float) -> float:
        if self.low is not None and sample < self.low:
            return self.low
        if self.high is not None and sample > self.high:
            return self.high
        return sample

    def mean(self) -> float:
        """The distribution's mean as its parameters give it (before clamping)."""
        kind = self.kind
        if kind == "fixed":
            return self.value
        if kind == "uniform":
            assert self.low is not None and self.high is not None
            return (self.low + self.high) / 2
        if kind in ("normal", "exponential"):
            return self.mean_value
        if kind == "lognormal":
            return self.median * math.exp(self.sigma**2 / 2)
        return sum(self.values) / len(self.values)

    def smallest(self) -> float:
        """The smallest value a draw can take (0 or the lower clamp for unbounded kinds)."""
        if self.kind == "fixed":
            return self.value
        if self.kind == "empirical":
            return self.clamp(min(self.values))
        if self.low is not None:
            return self.low
        return -math.inf if self.kind == "normal" else 0.0

    def describe(self) -> dict[str, Any]:
        """The parameters, for config.json."""
        kind = self.kind
        out: dict[str, Any] = {"distribution": kind}
        if kind == "fixed":
            out["value"] = self.value
        elif kind in ("normal", "exponential"):
            out["mean"] = self.mean_value
            if kind == "normal":
                out["sd"] = self.sd
        elif kind == "lognormal":
            out.update(median=self.median, sigma=self.sigma)
        elif kind == "empirical":
            out.update(count=len(self.values), mean=self.mean(), source=self.source)
        if kind != "fixed":
            out.update(min=self.low, max=self.high)
        return out
