"""Capacity search: how much load one replica holds within its SLOs, and the advice that follows.

    from loadrun.capacity import CapacitySettings, find_capacity, parse_slo
    result = find_capacity(CapacitySettings(slos=(parse_slo("ttft:p99=500"),)))
    result.data["capacity"]["concurrency"], result.data["advice"]["lines"]

One target (or one bundled mock process) serves every step. The search:

1. grow: start at ``start_load`` and multiply by ``growth`` (by its square while every SLO
   has more than half its room left, by its square root once one has less than a quarter
   left) until a step breaks an SLO, throughput
   stops rising (less than ``min_gain`` more over a whole growth step), errors are heavy,
   or the budget or ``max_load`` is reached;
2. refine: between the last load within the SLOs and the first one past them, probe where
   the measured latency curve predicts the crossing, kept inside the middle half of the
   bracket in log load so that a poor prediction still shrinks it (a safeguarded bisection),
   until the bracket is narrower than ``resolution`` or the budget ends.

Each step is one closed-loop run (``runner.measure_async``) with a warm-up scaled to the
latency seen so far. A watcher reads the finished requests as they arrive and ends the step
once it is in steady state (MSER-5 truncation, White 1997) and every latency SLO is decided
(one-sided Clopper-Pearson bounds on the share of requests above the limit), once an SLO is
decided broken, on heavy errors, at the step's time cap, or when the budget runs out. The
step's figures come from the requests sent after the truncation point only.

Then the analysis (``loadrun.fits``): the Universal Scalability Law fitted to throughput
against concurrency (sigma, kappa, lambda, peak N*, and the load at which throughput is
within ``min_gain`` of its peak), and each SLO's percentile against load made monotone,
giving the load at which it is crossed. The capacity per replica is the lowest of these
limits; its band comes from a bootstrap over the requests within steps (SLO crossings) and
from the fit's covariance (saturation).
"""

from __future__ import annotations

import contextlib
import math
import time
from collections.abc import AsyncIterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import anyio

from loadrun._version import __version__
from loadrun.capacity_advice import Analysis
from loadrun.capacity_steps import (
    FAR_BELOW,
    CapacitySlo,
    ErrorShareSlo,
    PercentileSlo,
    Step,
    StepSamples,
    StepStats,
    limit_of,
    load_text,
    parse_slo,
    slo_state,
    step_json,
    step_stats,
    usable_by_load,
)
from loadrun.caution import CAUTION
from loadrun.cost import ReplicaPrice, TokenPrices
from loadrun.errors import TargetError, UsageError
from loadrun.fits import MonotoneCurve
from loadrun.profile import Profile
from loadrun.record import Record
from loadrun.runner import (
    DEFAULT_MOCK_ENGINE,
    MeasureSettings,
    embedded_mock,
    event_loop_options,
    measure_async,
)
from loadrun.slo import Slo
from loadrun.store import RunFolder
from loadrun.target import Target

__all__ = [
    "CAPACITY_FILE",
    "AdviceSettings",
    "CapacityResult",
    "CapacitySettings",
    "ErrorShareSlo",
    "PercentileSlo",
    "SearchBudget",
    "StepPolicy",
    "describe_plan",
    "find_capacity",
    "find_capacity_async",
    "parse_slo",
]

CAPACITY_FILE = "capacity.json"
FORMAT_VERSION = 1
DEFAULT_ERROR_SHARE = 0.01
"""Error share allowed when no ``errors=`` SLO is given (common practice, no source)."""
NEAR_LIMIT = 0.75
"""Above this share of a limit the search grows by the square root of its growth factor."""
WATCH_INTERVAL_S = 0.25
LOAD_AXES = ("concurrency", "rate")
"""Requests in flight (closed loop), or requests per second offered (open loop, Poisson)."""
SCREEN_REQUESTS = 20
HEAVY_ERRORS_AFTER = 20
"""Requests a step needs before heavy errors end it."""
"""Requests a growing step needs before it may end as clearly within every SLO."""


# --- settings --------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class StepPolicy:
    """How long one load step runs."""

    min_seconds: float = 2.0
    max_seconds: float = 12.0
    """The step's time cap (measured seconds, warm-up not counted)."""
    min_requests: int = 50
    max_requests: int | None = None
    warmup_cycles: float = 1.0
    """Warm-up as a multiple of the end-to-end latency expected at this load."""
    min_warmup_s: float = 0.5
    max_warmup_s: float = 10.0
    confidence: float = 0.95
    """Of the one-sided bound that decides an SLO early."""

    def __post_init__(self) -> None:
        if not 0 < self.min_seconds <= self.max_seconds:
            raise UsageError("a step needs 0 < minimum seconds <= maximum seconds")
        if self.min_requests < 1 or (self.max_requests is not None and self.max_requests < self.min_requests):
            raise UsageError("a step needs at least one request, and its cap no fewer than the minimum")
        if not 0 <= self.min_warmup_s <= self.max_warmup_s:
            raise UsageError("warm-up bounds must satisfy 0 <= minimum <= maximum")
        if not 0.5 < self.confidence < 1:
            raise UsageError("the decision confidence must lie between 0.5 and 1")


@dataclass(frozen=True, slots=True)
class SearchBudget:
    """What the whole search may spend; it never exceeds any of these."""

    max_steps: int = 8
    max_seconds: float | None = 170.0
    max_requests: int | None = None
    max_tokens: int | None = None
    """Input plus output tokens."""
    max_cost: float | None = None
    """Money, from the target's per-token prices (``CapacitySettings.target_prices``)."""

    def __post_init__(self) -> None:
        if self.max_steps < 1:
            raise UsageError("the budget must allow at least one step")
        for name in ("max_seconds", "max_requests", "max_tokens", "max_cost"):
            value = getattr(self, name)
            if value is not None and not value > 0:
                raise UsageError(f"budget {name.removeprefix('max_')} must be positive")


@dataclass(frozen=True, slots=True)
class AdviceSettings:
    headroom: float = 0.2
    """Share of the capacity kept free at the recommended operating point."""
    peak_requests_per_s: float | None = None
    spare_replicas: int = 0
    replica_price: ReplicaPrice | None = None
    hosted_prices: TokenPrices | None = None
    """A hosted per-token price to compare against (break-even volume)."""

    def __post_init__(self) -> None:
        if not 0.0 <= self.headroom < 1.0:
            raise UsageError("headroom must lie between 0 and 1 (e.g. 0.2 for 20 %)")
        if self.peak_requests_per_s is not None and not self.peak_requests_per_s > 0:
            raise UsageError("the peak must be a positive number of requests per second")
        if self.spare_replicas < 0:
            raise UsageError("spare replicas cannot be negative")


@dataclass(frozen=True, slots=True)
class CapacitySettings:
    profile: Profile = field(default_factory=Profile)
    target: Target | None = None
    """None: start the bundled mock server once and search it."""
    slos: tuple[CapacitySlo, ...] = ()
    axis: str = "concurrency"
    """"concurrency" (closed loop, requests in flight) or "rate" (open loop, Poisson arrivals)."""
    start_load: float = 1.0
    max_load: float = 512.0
    growth: float = 2.0
    resolution: float = 0.15
    """Refining stops when the bracket's upper end is within this share of its lower end (the
    limit itself is then read off the curve between the two, well inside that share)."""
    min_gain: float = 0.05
    """Throughput that rises by less than this share over a growth step has stopped rising."""
    heavy_error_share: float = 0.5
    step: StepPolicy = field(default_factory=StepPolicy)
    budget: SearchBudget = field(default_factory=SearchBudget)
    advice: AdviceSettings = field(default_factory=AdviceSettings)
    target_prices: TokenPrices | None = None
    """Per-token prices of the target under test (for a money budget)."""
    out_dir: Path | None = Path("runs")
    transport: str = "fast"
    mock_engine: str = DEFAULT_MOCK_ENGINE
    total_timeout_s: float = 120.0
    connect_timeout_s: float = 10.0
    confirmed: bool = False
    bootstrap_replicates: int = 200
    seed: int = 1
    plots: bool = True

    def __post_init__(self) -> None:
        if self.axis not in LOAD_AXES:
            raise UsageError(f"load axis {self.axis!r}: use {' or '.join(LOAD_AXES)}")
        lowest = 1 if self.axis == "concurrency" else 0.001
        if not lowest <= self.start_load <= self.max_load:
            raise UsageError(f"loads must satisfy {lowest:g} <= start <= maximum")
        if not self.growth > 1:
            raise UsageError("growth must be above 1")
        if not 0 < self.resolution < 1:
            raise UsageError("resolution must lie between 0 and 1")
        if not 0 < self.heavy_error_share <= 1:
            raise UsageError("the heavy-error share must lie between 0 and 1")
        if self.budget.max_cost is not None and self.target_prices is None:
            raise UsageError("a money budget needs the target's token prices")
        keys = [slo.key for slo in self.slos]
        if len(set(keys)) != len(keys):
            raise UsageError("give each SLO metric and percentile once")

    def effective_slos(self) -> tuple[CapacitySlo, ...]:
        """The SLOs given, plus the default error-share limit when none is."""
        if any(isinstance(slo, ErrorShareSlo) for slo in self.slos):
            return self.slos
        return (*self.slos, ErrorShareSlo(DEFAULT_ERROR_SHARE))


@dataclass(slots=True)
class CapacityResult:
    data: dict[str, Any]
    """What ``capacity.json`` holds: steps, fits, capacity, advice, cost, plots."""
    folder: Path | None


# --- the search ------------------------------------------------------------------------------


@dataclass(slots=True)
class _Spent:
    steps: int = 0
    requests: int = 0
    tokens: int = 0
    cost: float = 0.0
    started: float = field(default_factory=time.monotonic)

    def seconds(self) -> float:
        return time.monotonic() - self.started


class _Search:
    def __init__(self, settings: CapacitySettings, target: Target, mock_info: dict[str, Any] | None) -> None:
        self.settings = settings
        self.target = target
        self.mock_info = mock_info
        self.slos = settings.effective_slos()
        self.latency_slos = [slo for slo in self.slos if isinstance(slo, PercentileSlo)]
        self.steps: list[Step] = []
        self.spent = _Spent()
        self.end_reason = ""
        self.saturated_at: float | None = None
        self.folder = (
            RunFolder.create(settings.out_dir, f"capacity-{settings.profile.name}")
            if settings.out_dir is not None
            else None
        )

    # the two phases ------------------------------------------------------------------------
    async def run(self) -> CapacityResult:
        settings = self.settings
        load = self._as_load(settings.start_load)
        last_within: Step | None = None
        bracket: tuple[Step, Step] | None = None
        while True:
            if (reason := self._budget_left(load)) is not None:
                self.end_reason = reason
                break
            step = await self._run_step(load, "grow")
            if step.failure is not None:
                self.end_reason = step.failure
                break
            if step.over:
                self.end_reason = f"{', '.join(step.over)} broken at {self._text(load)}"
                if last_within is not None:
                    bracket = (last_within, step)
                break
            previous_best = max((s.stats.requests_per_s for s in self.steps[:-1] if s.usable), default=None)
            last_within = step
            if previous_best is not None and step.stats.requests_per_s < previous_best * (
                1 + settings.min_gain
            ):
                self.saturated_at = load
                self.end_reason = f"throughput stopped rising at {self._text(load)}"
                break
            if load >= settings.max_load:
                self.end_reason = f"the highest load allowed ({self._text(settings.max_load)}) was reached"
                break
            load = self._next_load(step)
        if bracket is not None:
            await self._refine(*bracket)
        return self._finish()

    async def _refine(self, within: Step, over: Step) -> None:
        lo, hi = within, over
        while not self._narrow_enough(lo.load, hi.load):
            probe = self._probe(lo, hi)
            if probe is None:
                return
            if (reason := self._budget_left(probe)) is not None:
                self.end_reason += f"; refining stopped: {reason}"
                return
            step = await self._run_step(probe, "refine")
            if step.failure is not None:
                self.end_reason += f"; refining stopped: {step.failure}"
                return
            if step.over:
                hi = step
            else:
                lo = step
        self.end_reason += f"; refined to between {self._text(lo.load)} and {self._text(hi.load)}"

    def _narrow_enough(self, lo: float, hi: float) -> bool:
        whole_steps = self.settings.axis == "concurrency" and hi - lo <= 1
        return whole_steps or hi / lo - 1 <= self.settings.resolution

    def _probe(self, lo: Step, hi: Step) -> float | None:
        """Just below where the curves predict the crossing, kept off the bracket's ends by a
        tenth of its width (log load) so that every probe shrinks it; the geometric midpoint
        when there is no prediction."""
        log_lo, log_hi = math.log(lo.load), math.log(hi.load)
        predictions = []
        for crossing in self._crossings(limit_to=(lo.load, hi.load)).values():
            if crossing is not None:
                predictions.append(math.log(crossing))
        # Aim a third of the resolution below the predicted crossing: the probe then most
        # likely lands within the limit and, with the step above it, closes the bracket.
        margin = math.log1p(-self.settings.resolution / 3)
        guess = min(predictions) + margin if predictions else (log_lo + log_hi) / 2
        span = log_hi - log_lo
        guess = min(max(guess, log_lo + span / 10), log_hi - span / 10)
        for target in (guess, (log_lo + log_hi) / 2):
            if self.settings.axis == "concurrency":
                probe = max(lo.load + 1, float(math.floor(math.exp(target))))
            else:
                probe = self._as_load(math.exp(target))
            if lo.load < probe < hi.load:
                return probe
        return None

    def _crossings(self, limit_to: tuple[float, float]) -> dict[str, float | None]:
        steps = usable_by_load(self.steps)
        loads = [s.load for s in steps]
        out: dict[str, float | None] = {}
        for slo in self.slos:
            values = [s.slo_values.get(slo.key) for s in steps]
            if any(v is None for v in values):
                continue
            crossing = MonotoneCurve(loads, [float(v) for v in values if v is not None]).crossing(
                limit_of(slo)
            )
            load = crossing.load if crossing.where == "within" else None
            out[slo.key] = load if load is not None and limit_to[0] < load < limit_to[1] else None
        return out

    def _next_load(self, step: Step) -> float:
        """Grow fast while far from every limit and cautiously close to one: by growth squared
        below half of every limit, by growth below three quarters, by its square root above."""
        settings = self.settings
        used = self._share_of_limit_used(step)
        if used <= FAR_BELOW:
            factor = settings.growth**2
        elif used <= NEAR_LIMIT:
            factor = settings.growth
        else:
            factor = math.sqrt(settings.growth)
        grown = self._as_load(step.load * factor)
        if self.settings.axis == "concurrency":
            grown = max(step.load + 1, grown)
        return min(self._as_load(settings.max_load), grown)

    def _share_of_limit_used(self, step: Step) -> float:
        """The largest value / limit over the SLOs (1 when a value is missing)."""
        used = 0.0
        for slo in self.slos:
            value, limit = step.slo_values.get(slo.key), limit_of(slo)
            if value is None:
                return 1.0
            used = max(used, value / limit if limit > 0 else (0.0 if value <= 0 else math.inf))
        return used

    def _as_load(self, value: float) -> float:
        """Whole requests in flight; a rate to three significant figures."""
        if self.settings.axis == "concurrency":
            return float(max(1, round(value)))
        return float(f"{max(value, 0.001):.3g}")

    def _text(self, load: float) -> str:
        return load_text(load, self.settings.axis)

    # budget --------------------------------------------------------------------------------
    def _in_flight_reserve(self, load: float) -> float:
        """Requests that may still finish after a step is told to stop (they drain)."""
        if self.settings.axis == "concurrency":
            return load
        return max(1.0, 2.0 * load * (self._expected_e2e_s(load) or 1.0))

    def _budget_left(self, load: float) -> str | None:
        """Why no further step fits in the budget, or None. A step must be able to finish its
        requests in flight and still get a few measured ones in."""
        budget = self.settings.budget
        spent = self.spent
        needed = self._in_flight_reserve(load) + SCREEN_REQUESTS
        request = self.settings.profile.request
        if spent.steps >= budget.max_steps:
            return f"the step budget ({budget.max_steps}) is spent"
        if budget.max_requests is not None and spent.requests + needed > budget.max_requests:
            return f"the request budget ({budget.max_requests}) is spent"
        tokens = needed * (request.input_tokens + request.output_tokens)
        if budget.max_tokens is not None and spent.tokens + tokens > budget.max_tokens:
            return f"the token budget ({budget.max_tokens}) is spent"
        prices = self.settings.target_prices
        if budget.max_cost is not None and prices is not None:
            cost = needed * prices.request_cost(request.input_tokens, request.output_tokens)
            if spent.cost + cost > budget.max_cost:
                return f"the money budget ({budget.max_cost:g}) is spent"
        if budget.max_seconds is not None:
            seconds = self.settings.step.min_seconds + self._warmup_for(load)
            if spent.seconds() + seconds > budget.max_seconds:
                return f"the time budget ({budget.max_seconds:g} s) is spent"
        return None

    def _over_budget_now(self, samples: StepSamples, reserve: float) -> str | None:
        """Whether the step must stop now so that what is still in flight stays in the budget."""
        budget = self.settings.budget
        spent = self.spent
        request = self.settings.profile.request
        if (
            budget.max_requests is not None
            and spent.requests + samples.count + reserve >= budget.max_requests
        ):
            return "request budget"
        tokens = reserve * (request.input_tokens + request.output_tokens)
        if (
            budget.max_tokens is not None
            and spent.tokens + samples.tokens_total + tokens >= budget.max_tokens
        ):
            return "token budget"
        prices = self.settings.target_prices
        if budget.max_cost is not None and prices is not None:
            cost = reserve * prices.request_cost(request.input_tokens, request.output_tokens)
            if spent.cost + samples.cost_total + cost >= budget.max_cost:
                return "money budget"
        if budget.max_seconds is not None and spent.seconds() >= budget.max_seconds:
            return "time budget"
        return None

    # one step ------------------------------------------------------------------------------
    def _expected_e2e_s(self, load: float) -> float | None:
        known = [s for s in self.steps if s.usable and s.stats.mean_e2e_s is not None]
        if not known:
            return None
        nearest = min(known, key=lambda s: abs(math.log(s.load / load)))
        assert nearest.stats.mean_e2e_s is not None
        # In a closed loop the latency grows at most in proportion to the load (Little's law
        # with throughput that does not fall).
        return nearest.stats.mean_e2e_s * max(1.0, load / nearest.load)

    def _warmup_for(self, load: float) -> float:
        policy = self.settings.step
        expected = self._expected_e2e_s(load)
        wanted = policy.min_warmup_s if expected is None else policy.warmup_cycles * expected
        return min(policy.max_warmup_s, max(policy.min_warmup_s, wanted))

    async def _run_step(self, load: float, phase: str) -> Step:
        settings = self.settings
        policy = settings.step
        warmup = self._warmup_for(load)
        cap = policy.max_seconds
        if settings.budget.max_seconds is not None:
            left = settings.budget.max_seconds - self.spent.seconds() - warmup
            left -= self._expected_e2e_s(load) or 0.0  # the drain after the window
            cap = max(policy.min_seconds, min(cap, left))
        measure_settings = MeasureSettings(
            profile=settings.profile,
            target=self.target,
            concurrency=int(load) if settings.axis == "concurrency" else None,
            arrival=None if settings.axis == "concurrency" else "poisson",
            rate_per_s=load if settings.axis == "rate" else None,
            # A seed of its own per step: the same arrival sequence, scaled to every rate,
            # would repeat one chance fluctuation in every step.
            seed=settings.profile.seed + len(self.steps),
            duration_s=cap,
            warmup_s=warmup,
            slos=tuple(Slo(slo.metric, slo.limit_ms) for slo in self.latency_slos),
            out_dir=self.folder.path / "steps" if self.folder is not None else None,
            transport=settings.transport,
            total_timeout_s=settings.total_timeout_s,
            connect_timeout_s=settings.connect_timeout_s,
            time_limit_s=warmup + cap + 1.0,
            confirmed=True,
            # Steps are parts of one search, not runs to compare a later run against.
            record_history=False,
        )
        samples = StepSamples(settings.target_prices)
        stop = anyio.Event()
        reason = ["time cap"]
        summary: dict[str, Any] | None = None
        folder: str | None = None
        failure: str | None = None
        heavy = self.settings.heavy_error_share

        reserve = self._in_flight_reserve(load)

        def observe(record: Record) -> None:
            samples.add(record)
            if stop.is_set():
                return
            # Checked per request, not per watch: failures can arrive thousands a second, and
            # a budget must hold to the request.
            count = samples.count
            if count >= HEAVY_ERRORS_AFTER and samples.failed_total >= heavy * count:
                reason[0] = "heavy errors"
                stop.set()
            elif (over := self._over_budget_now(samples, reserve)) is not None:
                reason[0] = over
                stop.set()

        async with anyio.create_task_group() as group:
            group.start_soon(self._watch, samples, stop, reason, phase)
            try:
                result = await measure_async(measure_settings, stop=stop, observe=observe)
                summary, folder = result.summary, str(result.folder) if result.folder else None
            except TargetError as exc:
                failure = f"{type(exc).__name__}: {exc}"
            finally:
                group.cancel_scope.cancel()
        self.spent.steps += 1
        self.spent.requests += samples.count
        self.spent.tokens += samples.tokens_total
        self.spent.cost += samples.cost_total
        if summary is not None and summary.get("aborted"):
            failure = f"the target stopped answering: {summary['aborted']}"
        step = Step(
            len(self.steps), phase, load, warmup, cap, step_stats(samples), reason[0], summary, folder
        )
        step.failure = failure
        self._judge(step, samples)
        self.steps.append(step)
        self._save_progress()
        return step

    def _judge(self, step: Step, samples: StepSamples) -> None:
        confidence = self.settings.step.confidence
        stats = step.stats
        for slo in self.slos:
            value, verdict = slo_state(stats, slo, confidence)
            step.slo_values[slo.key] = value
            step.slo_verdicts[slo.key] = verdict
            broken = verdict == "violated" or (
                verdict == "undecided" and value is not None and value > limit_of(slo)
            )
            if broken:
                step.over.append(slo.label())
        share = stats.error_share
        if share is None and samples.count:  # stopped in its warm-up: judge what did finish
            share = samples.failed_total / samples.count
            if share >= self.settings.heavy_error_share:
                step.slo_values.update({s.key: share for s in self.slos if isinstance(s, ErrorShareSlo)})
        step.heavy_errors = share is not None and share >= self.settings.heavy_error_share
        if step.heavy_errors:
            top = ", ".join(f"{v} x {k}" for k, v in samples.errors.most_common(2))
            step.over.append(f"heavy errors ({(share or 1.0) * 100:.0f} % failed: {top or 'no answer'})")
        elif step.failure is None and not stats.measured:
            step.failure = f"no request finished within the step at {self._text(step.load)}"

    async def _watch(self, samples: StepSamples, stop: anyio.Event, reason: list[str], phase: str) -> None:
        """Ends the step as soon as its question is answered or the budget says so.

        A step near a limit needs a precise percentile, so it runs until every SLO is decided
        (or its time cap). A growing step only has to show that it is clearly within every
        limit: once steady with every value below ``NEAR_LIMIT`` of its limit, it ends.
        """
        policy = self.settings.step
        while not stop.is_set():
            await anyio.sleep(WATCH_INTERVAL_S)
            if (over := self._over_budget_now(samples, 0.0)) is not None:
                reason[0] = over
                stop.set()
                return
            stats = step_stats(samples)
            if not stats.first_send_ns:
                continue
            if policy.max_requests is not None and stats.measured + stats.truncated >= policy.max_requests:
                reason[0] = "step request cap"
                stop.set()
                return
            measured_s = (time.perf_counter_ns() - stats.first_send_ns) / 1e9
            if measured_s < policy.min_seconds:
                continue
            enough = stats.ok >= policy.min_requests
            verdicts = {slo.key: slo_state(stats, slo, policy.confidence)[1] for slo in self.slos}
            if enough and "violated" in verdicts.values():
                reason[0] = "an SLO is decided broken"
                stop.set()
                return
            if not stats.steady:
                continue
            if enough and all(verdicts[slo.key] == "met" for slo in self.latency_slos):
                reason[0] = "steady, every SLO decided"
                stop.set()
                return
            if phase == "grow" and stats.ok >= SCREEN_REQUESTS and self._clearly_within(stats):
                reason[0] = "steady, clearly within every SLO"
                stop.set()
                return

    def _clearly_within(self, stats: StepStats) -> bool:
        confidence = self.settings.step.confidence
        for slo in self.slos:
            value, _ = slo_state(stats, slo, confidence)
            limit = limit_of(slo)
            if value is None or (value > NEAR_LIMIT * limit and not (limit == 0 and value == 0)):
                return False
        return True

    # results -------------------------------------------------------------------------------
    def _save_progress(self, data: dict[str, Any] | None = None) -> None:
        if self.folder is None:
            return
        payload = data or {
            **self._header(),
            "complete": False,
            "steps": [step_json(step, self.slos, self.settings.axis) for step in self.steps],
        }
        self.folder.write_json(CAPACITY_FILE, payload)

    def _header(self) -> dict[str, Any]:
        settings = self.settings
        return {
            "kind": "loadrun.capacity",
            "format_version": FORMAT_VERSION,
            "loadrun_version": __version__,
            "started_at": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
            "target": self.target.describe(),
            "embedded_mock": self.mock_info,
            "profile": settings.profile.describe(),
            "axis": settings.axis,
            "slos": [{"key": slo.key, "label": slo.label(), "limit": limit_of(slo)} for slo in self.slos],
            "search": {
                "start_load": settings.start_load,
                "max_load": settings.max_load,
                "growth": settings.growth,
                "resolution": settings.resolution,
                "min_gain": settings.min_gain,
                "step": {
                    "min_seconds": settings.step.min_seconds,
                    "max_seconds": settings.step.max_seconds,
                    "min_requests": settings.step.min_requests,
                    "confidence": settings.step.confidence,
                },
            },
            "budget": {
                "max_steps": settings.budget.max_steps,
                "max_seconds": settings.budget.max_seconds,
                "max_requests": settings.budget.max_requests,
                "max_tokens": settings.budget.max_tokens,
                "max_cost": settings.budget.max_cost,
            },
            "run_folder": str(self.folder.path) if self.folder is not None else None,
        }

    def _finish(self) -> CapacityResult:
        analysis = Analysis(
            settings=self.settings,
            slos=self.slos,
            steps=self.steps,
            end_reason=self.end_reason,
            saturated_at=self.saturated_at,
        )
        data = {
            **self._header(),
            "complete": True,
            "spent": {
                "steps": self.spent.steps,
                "requests": self.spent.requests,
                "tokens": self.spent.tokens,
                "cost": self.spent.cost if self.settings.target_prices is not None else None,
                "seconds": round(self.spent.seconds(), 3),
            },
            "search_ended": self.end_reason,
            "steps": [step_json(step, self.slos, self.settings.axis) for step in self.steps],
            **analysis.to_json(),
        }
        data["plots"] = []
        if self.folder is not None and self.settings.plots:
            from loadrun.report.capacity_plots import write_capacity_plots

            data["plots"] = [path.name for path in write_capacity_plots(data, self.folder.path)]
        self._save_progress(data)
        return CapacityResult(data, self.folder.path if self.folder is not None else None)


# --- entry points ----------------------------------------------------------------------------


@contextlib.asynccontextmanager
async def _target_for(settings: CapacitySettings) -> AsyncIterator[tuple[Target, dict[str, Any] | None]]:
    if settings.target is not None:
        yield settings.target, None
        return
    with embedded_mock(settings.mock_engine) as (target, info):
        yield target, info


async def find_capacity_async(settings: CapacitySettings) -> CapacityResult:
    """Search the capacity of one target (or of the bundled mock) and advise on it."""
    async with _target_for(settings) as (target, mock_info):
        if not target.is_loopback and not settings.confirmed:
            raise UsageError(
                f"{target.base_url} is not on this machine: confirm that you may load it (--yes)"
            )
        search = _Search(settings, target, mock_info)
        return await search.run()


def find_capacity(settings: CapacitySettings) -> CapacityResult:
    """Blocking form of :func:`find_capacity_async` (starts its own event loop)."""
    return anyio.run(find_capacity_async, settings, backend="asyncio", backend_options=event_loop_options())


def describe_plan(settings: CapacitySettings, target: Target) -> str:
    """What a capacity search may send, in words, for the confirmation prompt."""
    budget = settings.budget
    request = settings.profile.request
    bounds = [f"at most {budget.max_steps} load steps"]
    if budget.max_seconds is not None:
        bounds.append(f"{budget.max_seconds:g} s")
    if budget.max_requests is not None:
        bounds.append(f"{budget.max_requests:,} requests")
    if budget.max_tokens is not None:
        bounds.append(f"{budget.max_tokens:,} tokens")
    if budget.max_cost is not None:
        bounds.append(f"{budget.max_cost:g} in token prices")
    return (
        f"loadrun will search the capacity of {target.base_url} (model {target.model}) with up to "
        f"{settings.max_load:g} requests in flight, {request.input_tokens} input and up to "
        f"{request.output_tokens} output tokens per request, within {', '.join(bounds)}. It raises the load "
        f"until an SLO breaks, so expect the service to slow down or fail while it runs.\n{CAUTION}"
    )
