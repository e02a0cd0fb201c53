"""Arrival processes for open-loop load: when each new conversation is due.

- ``PoissonArrivals``: exponential inter-arrival times at a rate (memoryless traffic);
- ``ConstantArrivals``: exactly 1/rate apart; offset k is k/rate, computed by one
  multiplication, never by summing gaps, so it cannot drift;
- ``BurstyArrivals``: gamma inter-arrival times with the given mean (1/rate) and
  coefficient of variation (CV); CV 1 is Poisson, larger CVs bunch arrivals into bursts;
- ``TraceArrivals``: the offsets of a recorded trace (JSONL), at 1x or a scaled speed,
  each with its own input and output length and optionally its request class.

An open-loop generator sends each request at its due time whatever the target does; the
closed loop (a fixed number of requests in flight) is in ``loadrun.driver``.
"""

from __future__ import annotations

import json
import math
import random
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from loadrun.errors import UsageError
from loadrun.profile import MAX_TOKENS


@dataclass(frozen=True, slots=True)
class TraceEntry:
    offset_s: float
    input_tokens: int
    output_tokens: int
    request_class: str | None = None


@dataclass(frozen=True, slots=True)
class PoissonArrivals:
    rate_per_s: float
    kind: str = "poisson"

    def offsets_s(self, rng: random.Random) -> Iterator[float]:
        elapsed = 0.0
        while True:
            elapsed += rng.expovariate(self.rate_per_s)
            yield elapsed

    def describe(self) -> dict[str, Any]:
        return {"arrival": self.kind, "rate_per_s": self.rate_per_s}


@dataclass(frozen=True, slots=True)
class ConstantArrivals:
    rate_per_s: float
    kind: str = "constant"

    def offsets_s(self, rng: random.Random) -> Iterator[float]:
        index = 0
        while True:
            yield index / self.rate_per_s
            index += 1

    def describe(self) -> dict[str, Any]:
        return {"arrival": self.kind, "rate_per_s": self.rate_per_s}


@dataclass(frozen=True, slots=True)
class BurstyArrivals:
    rate_per_s: float
    cv: float = 2.0
    kind: str = "bursty"

    def offsets_s(self, rng: random.Random) -> Iterator[float]:
        # Gamma with shape k and scale theta: mean k*theta = 1/rate, CV = 1/sqrt(k).
        shape = 1.0 / (self.cv * self.cv)
        scale = 1.0 / (self.rate_per_s * shape)
        elapsed = 0.0
        while True:
            elapsed += rng.gammavariate(shape, scale)
            yield elapsed

    def describe(self) -> dict[str, Any]:
        return {"arrival": self.kind, "rate_per_s": self.rate_per_s, "burst_cv": self.cv}


@dataclass(frozen=True, slots=True)
class TraceArrivals:
    entries: tuple[TraceEntry, ...]
    speed: float = 1.0
    source: str = ""
    kind: str = "replay"

    def offsets_s(self, rng: random.Random) -> Iterator[float]:
        for entry in self.entries:
            yield entry.offset_s / self.speed

    @property
    def span_s(self) -> float:
        """Seconds from the start to the last arrival, at this speed."""
        return self.entries[-1].offset_s / self.speed if self.entries else 0.0

    def describe(self) -> dict[str, Any]:
        return {
            "arrival": self.kind,
            "trace": self.source,
            "entries": len(self.entries),
            "replay_speed": self.speed,
            "span_s": round(self.span_s, 6),
            "rate_per_s": len(self.entries) / self.span_s if self.span_s > 0 else None,
        }


OpenArrivals = PoissonArrivals | ConstantArrivals | BurstyArrivals | TraceArrivals

TRACE_KEYS = {"offset_s", "input_tokens", "output_tokens", "class"}
MAX_TRACE_LINES = 10_000_000


def load_trace(path: str | Path) -> tuple[TraceEntry, ...]:
    """Read a JSONL trace: one ``{"offset_s", "input_tokens", "output_tokens"[, "class"]}`` a line.

    Offsets are seconds from the start of the trace and must not decrease.
    """
    file = Path(path)
    try:
        lines = file.read_text(encoding="utf-8").splitlines()
    except FileNotFoundError as exc:
        raise UsageError(f"{file}: no such trace file") from exc
    except (OSError, UnicodeDecodeError) as exc:
        raise UsageError(f"{file}: cannot read the trace: {exc}") from exc
    entries: list[TraceEntry] = []
    last = 0.0
    for number, line in enumerate(lines, start=1):
        if not line.strip():
            continue
        where = f"{file}:{number}"
        try:
            row = json.loads(line)
        except ValueError as exc:
            raise UsageError(f"{where}: not JSON: {exc}") from exc
        if not isinstance(row, dict):
            raise UsageError(f"{where}: must be a JSON object")
        unknown = set(row) - TRACE_KEYS
        if unknown:
            raise UsageError(
                f"{where}: unknown key {sorted(unknown)[0]!r} (allowed: {', '.join(sorted(TRACE_KEYS))})"
            )
        offset = _number(row, "offset_s", where)
        if offset < last:
            raise UsageError(f"{where}: offset_s {offset:g} is earlier than the line before ({last:g})")
        last = offset
        request_class = row.get("class")
        if request_class is not None and not isinstance(request_class, str):
            raise UsageError(f"{where}: class must be a string")
        entries.append(
            TraceEntry(
                offset,
                _tokens(row, "input_tokens", where),
                _tokens(row, "output_tokens", where),
                request_class,
            )
        )
        if len(entries) > MAX_TRACE_LINES:
            raise UsageError(f"{file}: more than {MAX_TRACE_LINES} lines")
    if not entries:
        raise UsageError(f"{file}: the trace holds no requests")
    return tuple(entries)


def _number(row: dict[str, Any], key: str, where: str) -> float:
    value = row.get(key)
    if (
        isinstance(value, bool)
        or not isinstance(value, (int, float))
        or not math.isfinite(value)
        or value < 0
    ):
        raise UsageError(f"{where}: {key} must be a number >= 0, got {value!r}")
    return float(value)


def _tokens(row: dict[str, Any], key: str, where: str) -> int:
    value = row.get(key)
    if isinstance(value, bool) or not isinstance(value, int) or not 1 <= value <= MAX_TOKENS:
        raise UsageError(f"{where}: {key} must be a whole number from 1 to {MAX_TOKENS}, got {value!r}")
    return value


def make_arrivals(
    kind: str,
    rate_per_s: float | None,
    burst_cv: float = 2.0,
    trace: str | Path | None = None,
    speed: float = 1.0,
) -> OpenArrivals:
    """The arrival process named ``kind`` (one of the open-loop ARRIVALS of loadrun.profile)."""
    if kind == "replay":
        if trace is None:
            raise UsageError("replay needs a trace file (--trace, or load.trace in the profile)")
        if not speed > 0:
            raise UsageError(f"the replay speed must be positive, got {speed}")
        return TraceArrivals(load_trace(trace), speed, str(trace))
    if rate_per_s is None or not rate_per_s > 0 or not math.isfinite(rate_per_s):
        raise UsageError(
            f"arrival {kind!r} needs a positive rate (--rate, or load.rate_per_s in the profile)"
        )
    if kind == "poisson":
        return PoissonArrivals(rate_per_s)
    if kind == "constant":
        return ConstantArrivals(rate_per_s)
    if kind == "bursty":
        if not burst_cv > 0:
            raise UsageError(f"the burst coefficient of variation must be positive, got {burst_cv}")
        return BurstyArrivals(rate_per_s, burst_cv)
    raise UsageError(f"unknown arrival process {kind!r} (poisson, constant, bursty, replay or closed)")
