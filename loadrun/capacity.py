"""Capacity search: how much load one replica holds within its SLOs, and the advice that follows.

    from loadrun.capacity import CapacitySettings, find_capacity, parse_slo
    result = find_capacity(CapacitySettings(slos=(parse_slo("ttft:p99=500"),)))
    result.data["capacity"]["concurrency"], result.data["advice"]["lines"]

One target (or one bundled mock process) serves every step. The search:

1. grow: start at ``start_load`` and multiply by ``growth`` (by its square while every
   latency SLO still has more than half its room) until a step breaks an SLO, throughput
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
import re
import time
from collections import Counter
from collections.abc import AsyncIterator, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Literal

import anyio
import numpy as np
import numpy.typing as npt
from scipy.stats import beta

from loadrun._version import __version__
from loadrun.caution import CAUTION
from loadrun.cost import ReplicaPrice, TokenPrices, serving_cost
from loadrun.errors import TargetError, UsageError
from loadrun.fits import MonotoneCurve, UslFit, fit_usl, interpolate_log
from loadrun.profile import Profile
from loadrun.record import Outcome, Record
from loadrun.runner import (
    DEFAULT_MOCK_ENGINE,
    MeasureSettings,
    embedded_mock,
    event_loop_options,
    measure_async,
)
from loadrun.slo import SLO_METRICS, Slo
from loadrun.store import RunFolder
from loadrun.target import Target

__all__ = [
    "CAPACITY_FILE",
    "AdviceSettings",
    "Budget",
    "CapacityResult",
    "CapacitySettings",
    "ErrorShareSlo",
    "PercentileSlo",
    "StepPolicy",
    "describe_plan",
    "find_capacity",
    "find_capacity_async",
    "parse_slo",
    "slo_decision",
    "steady_state_start",
]

CAPACITY_FILE = "capacity.json"
FORMAT_VERSION = 1
REPORTED_PERCENTILES = (50.0, 90.0, 99.0)
PAST_LIMIT_FACTORS = (1.2, 1.5)
DEFAULT_ERROR_SHARE = 0.01
"""Error share allowed when no ``errors=`` SLO is given (common practice, no source)."""
FAR_BELOW = 0.5
"""A step whose worst sample is below this share of a limit meets that SLO without waiting
for a full confidence bound (common practice, no source): tails do not double within a step."""
WATCH_INTERVAL_S = 0.25
MSER_BATCH = 5
BAND = (5.0, 95.0)
"""The uncertainty band is the 5th to 95th percentile of the bootstrap (a 90 % interval)."""

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]
Verdict = Literal["met", "violated", "undecided"]


# --- SLOs ------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class PercentileSlo:
    """The p-th percentile of a latency metric must stay at or below a limit."""

    metric: str
    percentile: float
    limit_ms: float

    def __post_init__(self) -> None:
        if self.metric not in SLO_METRICS:
            raise UsageError(f"SLO metric {self.metric!r}: use one of {', '.join(SLO_METRICS)}")
        if not 0.0 < self.percentile < 100.0:
            raise UsageError(f"SLO percentile {self.percentile:g}: must lie between 0 and 100")
        if not self.limit_ms > 0 or not math.isfinite(self.limit_ms):
            raise UsageError("an SLO limit must be a positive number of milliseconds")

    @property
    def key(self) -> str:
        return f"{self.metric}_p{self.percentile:g}"

    def label(self) -> str:
        return f"{self.metric} p{self.percentile:g} <= {self.limit_ms:g} ms"


@dataclass(frozen=True, slots=True)
class ErrorShareSlo:
    """The share of requests that fail must stay at or below a limit (0..1)."""

    limit: float

    def __post_init__(self) -> None:
        if not 0.0 <= self.limit < 1.0:
            raise UsageError("an error-share SLO must lie between 0 % and 100 %")

    @property
    def key(self) -> str:
        return "errors"

    def label(self) -> str:
        return f"errors <= {self.limit * 100:g} %"


CapacitySlo = PercentileSlo | ErrorShareSlo
_SLO_PATTERN = re.compile(r"^\s*([a-z0-9]+)\s*(?::\s*p\s*([0-9.]+))?\s*=\s*(.+?)\s*$", re.IGNORECASE)


def parse_slo(text: str) -> CapacitySlo:
    """``METRIC[:pNN]=MS`` (the 99th percentile when pNN is left out) or ``errors=SHARE``.

    Examples: ``ttft=500``, ``tpot:p90=40``, ``e2e:p99.9=8000ms``, ``errors=1%``, ``errors=0.01``.
    """
    match = _SLO_PATTERN.match(text)
    usage = (
        f"SLO {text!r}: write METRIC[:pNN]=MILLISECONDS with METRIC one of "
        f"{', '.join(SLO_METRICS)} (e.g. ttft:p99=500), or errors=PERCENT (e.g. errors=1%)"
    )
    if match is None:
        raise UsageError(usage)
    name, percentile_text, value_text = match.group(1).lower(), match.group(2), match.group(3).lower()
    if name in ("errors", "error"):
        if percentile_text is not None:
            raise UsageError(usage)
        percent = value_text.endswith("%")
        try:
            share = float(value_text.removesuffix("%"))
        except ValueError as exc:
            raise UsageError(usage) from exc
        return ErrorShareSlo(share / 100.0 if percent else share)
    if name not in SLO_METRICS:
        raise UsageError(usage)
    try:
        percentile = float(percentile_text) if percentile_text is not None else 99.0
        limit = float(value_text.removesuffix("ms"))
    except ValueError as exc:
        raise UsageError(usage) from exc
    return PercentileSlo(name, percentile, limit)


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
class Budget:
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
    budget: Budget = field(default_factory=Budget)
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
        if self.axis != "concurrency":
            # Open-loop runs (an arrival-rate axis) are not in the measurement core yet.
            raise UsageError(f"load axis {self.axis!r}: only 'concurrency' is available in this build")
        if not 1 <= self.start_load <= self.max_load:
            raise UsageError("loads must satisfy 1 <= start <= maximum")
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


# --- statistics of one step ------------------------------------------------------------------


def steady_state_start(values: Sequence[float] | FloatArray, batch: int = MSER_BATCH) -> int | None:
    """MSER-5 truncation point (K. P. White, 1997, "An effective truncation heuristic for bias
    reduction in simulation output"): the index of the first value to keep, or None when the
    series is not (yet) steady -- fewer than ten batches, or the best truncation falls in its
    second half.

    Values are averaged in batches of ``batch``; the truncation d minimises the variance of
    the kept batch means over the square of their number, for d up to the last five batches.
    """
    data = np.asarray(values, dtype=np.float64)
    batches = data.size // batch
    if batches < 10:
        return None
    means = data[: batches * batch].reshape(batches, batch).mean(axis=1)
    suffix_sum = np.cumsum(means[::-1])[::-1]
    suffix_squares = np.cumsum((means * means)[::-1])[::-1]
    kept = np.arange(batches, 0, -1, dtype=np.float64)
    spread = np.maximum(suffix_squares - suffix_sum * suffix_sum / kept, 0.0)
    score = spread[: batches - 4] / kept[: batches - 4] ** 2
    best = int(np.argmin(score))
    if best > batches // 2:
        return None
    return best * batch


def slo_decision(exceeding: float, count: float, allowed_share: float, confidence: float) -> Verdict:
    """Whether a percentile SLO is met, from the share of samples above the limit.

    The p-th percentile is at or below the limit exactly when at most (1 - p/100) of the
    samples lie above it. One-sided Clopper-Pearson bounds (C. J. Clopper and E. S. Pearson,
    Biometrika 1934) on that share decide: "met" when the upper bound is below the allowed
    share, "violated" when the lower bound is above it.
    """
    if count <= 0:
        return "undecided"
    upper = 1.0 if exceeding >= count else float(beta.ppf(confidence, exceeding + 1, count - exceeding))
    lower = 0.0 if exceeding <= 0 else float(beta.ppf(1.0 - confidence, exceeding, count - exceeding + 1))
    if upper < allowed_share:
        return "met"
    if lower > allowed_share:
        return "violated"
    return "undecided"


def percentile_of(values: FloatArray, percentile: float) -> float | None:
    """HdrHistogram's rank rule (rank = round(p/100 * n), at least 1), on exact values."""
    if values.size == 0:
        return None
    rank = max(1, int(percentile / 100.0 * values.size + 0.5))
    return float(np.partition(values, rank - 1)[rank - 1])


_COLUMNS = ("intended", "end", "ok", "in_window", "ttft", "e2e", "tpot", "gaps", "output", "input")
_COL = {name: i for i, name in enumerate(_COLUMNS)}


class _StepSamples:
    """What the watcher and the analysis need of each finished request, as integer columns.

    The receive path appends one tuple; ``table()`` converts only the rows added since its
    last call, so the watcher's periodic look stays cheap on the event loop.
    """

    def __init__(self, prices: TokenPrices | None) -> None:
        self.prices = prices
        self._rows: list[tuple[int, ...]] = []
        self._new_gaps: list[int] = []
        self._table = np.zeros((0, len(_COLUMNS)), dtype=np.int64)
        self._gaps = np.zeros(0, dtype=np.int64)
        self.errors: Counter[str] = Counter()
        self.tokens_total = 0
        self.cost_total = 0.0

    def add(self, record: Record) -> None:
        ok = record.outcome is Outcome.OK
        gaps = record.itl_ns() if ok else []
        input_tokens = (
            record.prompt_tokens if record.prompt_tokens is not None else record.requested_input_tokens
        )
        ttft = record.ttft_ns if ok else None
        e2e = record.e2e_ns if ok else None
        tpot = record.tpot_ns if ok else None
        self._rows.append(
            (
                record.intended_ns,
                record.end_ns,
                int(ok),
                int(record.in_window),
                -1 if ttft is None else ttft,
                -1 if e2e is None else e2e,
                -1 if tpot is None else tpot,
                len(gaps),
                record.output_tokens if ok else 0,
                input_tokens,
            )
        )
        self._new_gaps.extend(gaps)
        self.tokens_total += input_tokens + record.output_tokens
        if self.prices is not None:
            self.cost_total += self.prices.request_cost(input_tokens, record.output_tokens)
        if record.in_window and not ok:
            self.errors[f"{record.outcome.value}: {(record.error or '')[:100]}".rstrip(": ")] += 1

    def table(self) -> tuple[IntArray, IntArray]:
        """(one row per request in ``_COLUMNS`` order, every ITL gap in request order)."""
        if self._rows:
            self._table = np.concatenate([self._table, np.array(self._rows, dtype=np.int64)])
            self._rows = []
        if self._new_gaps:
            self._gaps = np.concatenate([self._gaps, np.array(self._new_gaps, dtype=np.int64)])
            self._new_gaps = []
        return self._table, self._gaps

    @property
    def count(self) -> int:
        return len(self._table) + len(self._rows)


@dataclass(slots=True)
class _StepStats:
    measured: int = 0
    ok: int = 0
    failed: int = 0
    seconds: float = 0.0
    first_send_ns: int = 0
    requests_per_s: float = 0.0
    output_tokens_per_s: float = 0.0
    input_tokens_per_s: float = 0.0
    mean_e2e_s: float | None = None
    steady: bool = False
    truncated: int = 0
    values: dict[str, FloatArray] = field(default_factory=dict)
    """Milliseconds per metric: one per OK request (ttft, tpot, e2e), one per gap (itl)."""
    gap_counts: IntArray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    """Gaps per kept OK request, in the order of ``values["itl"]`` (for resampling requests)."""

    @property
    def error_share(self) -> float | None:
        return self.failed / self.measured if self.measured else None


def _step_stats(samples: _StepSamples) -> _StepStats:
    """Figures of the steady part of a step: requests sent after the MSER-5 truncation point."""
    table, gaps = samples.table()
    in_window = table[:, _COL["in_window"]].astype(bool)
    if not in_window.any():
        return _StepStats()
    intended = table[:, _COL["intended"]]
    ok = table[:, _COL["ok"]].astype(bool)
    e2e = table[:, _COL["e2e"]]
    ok_rows = np.flatnonzero(in_window & ok)
    ok_rows = ok_rows[np.argsort(intended[ok_rows], kind="stable")]
    start = steady_state_start(e2e[ok_rows].astype(np.float64))
    first_send = int(intended[in_window].min())
    t0 = int(intended[ok_rows[start]]) if start is not None else first_send
    t1 = int(intended[in_window].max())
    keep = in_window & (intended >= t0)
    kept_ok = keep & ok
    stats = _StepStats(steady=start is not None, first_send_ns=first_send)
    stats.truncated = int(np.count_nonzero(in_window & (intended < t0)))
    stats.measured = int(keep.sum())
    stats.ok = int(kept_ok.sum())
    stats.failed = stats.measured - stats.ok
    seconds = (t1 - t0) / 1e9
    if seconds > 0:
        # Completions while every client was still sending, over that time (the drain after
        # the last send would dilute the rate).
        end = table[:, _COL["end"]]
        done = ok & (end >= t0) & (end <= t1)
        stats.seconds = seconds
        stats.requests_per_s = float(done.sum()) / seconds
        stats.output_tokens_per_s = float(table[done, _COL["output"]].sum()) / seconds
        stats.input_tokens_per_s = float(table[done, _COL["input"]].sum()) / seconds
    for metric in ("ttft", "tpot", "e2e"):
        raw = table[kept_ok, _COL[metric]]
        stats.values[metric] = raw[raw >= 0].astype(np.float64) / 1e6
    counts = table[:, _COL["gaps"]]
    stats.gap_counts = counts[kept_ok]
    stats.values["itl"] = gaps[np.repeat(kept_ok, counts)].astype(np.float64) / 1e6
    if stats.values["e2e"].size:
        stats.mean_e2e_s = float(stats.values["e2e"].mean()) / 1000
    return stats


def _slo_state(stats: _StepStats, slo: CapacitySlo, confidence: float) -> tuple[float | None, Verdict]:
    """The step's value for an SLO and the decision so far."""
    if isinstance(slo, ErrorShareSlo):
        share = stats.error_share
        if share is None:
            return None, "undecided"
        return share, slo_decision(stats.failed, stats.measured, slo.limit, confidence)
    values = stats.values.get(slo.metric, np.zeros(0))
    value = percentile_of(values, slo.percentile)
    if value is None:
        return None, "undecided"
    exceeding = float(np.count_nonzero(values > slo.limit_ms))
    count = float(values.size)
    if slo.metric == "itl" and stats.ok:
        # Gaps of one request move together: count requests, not gaps, as the sample size.
        count = float(stats.ok)
        exceeding = exceeding / values.size * count
    verdict = slo_decision(exceeding, count, 1.0 - slo.percentile / 100.0, confidence)
    if verdict == "undecided" and float(values.max()) <= FAR_BELOW * slo.limit_ms:
        verdict = "met"
    return value, verdict


# --- the search ------------------------------------------------------------------------------


@dataclass(slots=True)
class _Step:
    index: int
    phase: str
    load: float
    warmup_s: float
    cap_s: float
    stats: _StepStats
    stop_reason: str
    summary: dict[str, Any] | None
    run_folder: str | None
    failure: str | None = None
    """Set when the step could not run at all (e.g. the target is unreachable)."""
    slo_values: dict[str, float | None] = field(default_factory=dict)
    slo_verdicts: dict[str, Verdict] = field(default_factory=dict)
    over: list[str] = field(default_factory=list)
    """Labels of the SLOs this step breaks."""
    heavy_errors: bool = False

    @property
    def usable(self) -> bool:
        return self.failure is None and self.stats.ok > 0


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
        self.steps: list[_Step] = []
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
        last_within: _Step | None = None
        bracket: tuple[_Step, _Step] | None = None
        while True:
            if (reason := self._budget_left(load)) is not None:
                self.end_reason = reason
                break
            step = await self._run_step(load, "grow")
            if step.failure is not None:
                self.end_reason = step.failure
                break
            if step.over:
                self.end_reason = f"{', '.join(step.over)} broken at {self._load_text(load)}"
                if last_within is not None:
                    bracket = (last_within, step)
                break
            previous_best = max((s.stats.requests_per_s for s in self.steps[:-1] if s.usable), default=None)
            last_within = step
            if previous_best is not None and step.stats.requests_per_s < previous_best * (
                1 + settings.min_gain
            ):
                self.saturated_at = load
                self.end_reason = f"throughput stopped rising at {self._load_text(load)}"
                break
            if load >= settings.max_load:
                self.end_reason = (
                    f"the highest load allowed ({self._load_text(settings.max_load)}) was reached"
                )
                break
            load = self._next_load(step)
        if bracket is not None:
            await self._refine(*bracket)
        return self._finish()

    async def _refine(self, within: _Step, over: _Step) -> None:
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
        self.end_reason += f"; refined to between {self._load_text(lo.load)} and {self._load_text(hi.load)}"

    def _narrow_enough(self, lo: float, hi: float) -> bool:
        return hi - lo <= 1 or hi / lo - 1 <= self.settings.resolution

    def _probe(self, lo: _Step, hi: _Step) -> float | None:
        """Where the curves of the broken SLOs predict the crossing, kept off the bracket's ends
        by a tenth of its width (log load) so that every probe shrinks it; the geometric
        midpoint when there is no prediction."""
        log_lo, log_hi = math.log(lo.load), math.log(hi.load)
        predictions = []
        for crossing in self._crossings(limit_to=(lo.load, hi.load)).values():
            if crossing is not None:
                predictions.append(math.log(crossing))
        guess = min(predictions) if predictions else (log_lo + log_hi) / 2
        span = log_hi - log_lo
        guess = min(max(guess, log_lo + span / 10), log_hi - span / 10)
        probe = self._as_load(math.exp(guess))
        if not lo.load < probe < hi.load:
            return None
        return probe

    def _crossings(self, limit_to: tuple[float, float]) -> dict[str, float | None]:
        steps = self._usable_by_load()
        loads = [s.load for s in steps]
        out: dict[str, float | None] = {}
        for slo in self.slos:
            values = [s.slo_values.get(slo.key) for s in steps]
            if any(v is None for v in values):
                continue
            crossing = MonotoneCurve(loads, [float(v) for v in values if v is not None]).crossing(
                _limit_of(slo)
            )
            load = crossing.load if crossing.where == "within" else None
            out[slo.key] = load if load is not None and limit_to[0] < load < limit_to[1] else None
        return out

    def _next_load(self, step: _Step) -> float:
        settings = self.settings
        factor = settings.growth
        if self._far_from_every_limit(step):
            factor = settings.growth**2
        grown = max(step.load + 1, self._as_load(step.load * factor))
        return min(self._as_load(settings.max_load), grown)

    def _far_from_every_limit(self, step: _Step) -> bool:
        for slo in self.slos:
            value = step.slo_values.get(slo.key)
            if value is None or value > FAR_BELOW * _limit_of(slo):
                return False
        return True

    def _as_load(self, value: float) -> float:
        return float(max(1, round(value)))

    def _load_text(self, load: float) -> str:
        return f"concurrency {load:g}"

    # budget --------------------------------------------------------------------------------
    def _budget_left(self, load: float) -> str | None:
        budget = self.settings.budget
        spent = self.spent
        if spent.steps >= budget.max_steps:
            return f"the step budget ({budget.max_steps}) is spent"
        if budget.max_requests is not None and spent.requests >= budget.max_requests:
            return f"the request budget ({budget.max_requests}) is spent"
        if budget.max_tokens is not None and spent.tokens >= budget.max_tokens:
            return f"the token budget ({budget.max_tokens}) is spent"
        if budget.max_cost is not None and spent.cost >= budget.max_cost:
            return f"the money budget ({budget.max_cost:g}) is spent"
        if budget.max_seconds is not None:
            needed = self.settings.step.min_seconds + self._warmup_for(load)
            if spent.seconds() + needed > budget.max_seconds:
                return f"the time budget ({budget.max_seconds:g} s) is spent"
        return None

    def _over_budget_now(self, samples: _StepSamples) -> str | None:
        budget = self.settings.budget
        spent = self.spent
        if budget.max_requests is not None and spent.requests + samples.count >= budget.max_requests:
            return "request budget"
        if budget.max_tokens is not None and spent.tokens + samples.tokens_total >= budget.max_tokens:
            return "token budget"
        if budget.max_cost is not None and spent.cost + samples.cost_total >= budget.max_cost:
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

    async def _run_step(self, load: float, phase: str) -> _Step:
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
            concurrency=int(load),
            duration_s=cap,
            warmup_s=warmup,
            slos=tuple(Slo(slo.metric, slo.limit_ms) for slo in self.latency_slos),
            out_dir=self.folder.path / "steps" if self.folder is not None else None,
            transport=settings.transport,
            total_timeout_s=settings.total_timeout_s,
            connect_timeout_s=settings.connect_timeout_s,
            time_limit_s=warmup + cap + 1.0,
            confirmed=True,
        )
        samples = _StepSamples(settings.target_prices)
        stop = anyio.Event()
        reason = ["time cap"]
        summary: dict[str, Any] | None = None
        folder: str | None = None
        failure: str | None = None
        async with anyio.create_task_group() as group:
            group.start_soon(self._watch, samples, stop, reason)
            try:
                result = await measure_async(measure_settings, stop=stop, observe=samples.add)
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
        step = _Step(
            len(self.steps), phase, load, warmup, cap, _step_stats(samples), reason[0], summary, folder
        )
        step.failure = failure
        self._judge(step, samples)
        self.steps.append(step)
        self._save_progress()
        return step

    def _judge(self, step: _Step, samples: _StepSamples) -> None:
        confidence = self.settings.step.confidence
        stats = step.stats
        for slo in self.slos:
            value, verdict = _slo_state(stats, slo, confidence)
            step.slo_values[slo.key] = value
            step.slo_verdicts[slo.key] = verdict
            broken = verdict == "violated" or (
                verdict == "undecided" and value is not None and value > _limit_of(slo)
            )
            if broken:
                step.over.append(slo.label())
        share = stats.error_share
        step.heavy_errors = share is not None and share >= self.settings.heavy_error_share
        if step.heavy_errors:
            top = ", ".join(f"{k} ({v})" for k, v in samples.errors.most_common(2))
            step.over.append(f"heavy errors ({(share or 1.0) * 100:.0f} % failed: {top or 'no answer'})")
        if step.failure is None and not stats.measured:
            step.failure = f"no request finished within the step at {self._load_text(step.load)}"

    async def _watch(self, samples: _StepSamples, stop: anyio.Event, reason: list[str]) -> None:
        """Ends the step as soon as its question is answered or the budget says so."""
        policy = self.settings.step
        heavy = self.settings.heavy_error_share
        while not stop.is_set():
            await anyio.sleep(WATCH_INTERVAL_S)
            if (over := self._over_budget_now(samples)) is not None:
                reason[0] = over
                stop.set()
                return
            stats = _step_stats(samples)
            if not stats.first_send_ns:
                continue
            if policy.max_requests is not None and stats.measured + stats.truncated >= policy.max_requests:
                reason[0] = "step request cap"
                stop.set()
                return
            share = stats.error_share
            if stats.measured >= 20 and share is not None and share >= heavy:
                reason[0] = "heavy errors"
                stop.set()
                return
            measured_s = (time.perf_counter_ns() - stats.first_send_ns) / 1e9
            if measured_s < policy.min_seconds or stats.ok < policy.min_requests:
                continue
            verdicts = {slo.key: _slo_state(stats, slo, policy.confidence)[1] for slo in self.slos}
            if "violated" in verdicts.values():
                reason[0] = "an SLO is decided broken"
                stop.set()
                return
            if stats.steady and all(verdicts[slo.key] == "met" for slo in self.latency_slos):
                reason[0] = "steady, every SLO decided"
                stop.set()
                return

    # results -------------------------------------------------------------------------------
    def _usable_by_load(self) -> list[_Step]:
        """Usable steps sorted by load; a load measured twice keeps its later step."""
        by_load: dict[float, _Step] = {}
        for step in self.steps:
            if step.usable:
                by_load[step.load] = step
        return [by_load[load] for load in sorted(by_load)]

    def _save_progress(self, data: dict[str, Any] | None = None) -> None:
        if self.folder is None:
            return
        payload = data or {
            **self._header(),
            "complete": False,
            "steps": [_step_json(step, self.slos) for step in self.steps],
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
            "slos": [{"key": slo.key, "label": slo.label(), "limit": _limit_of(slo)} for slo in self.slos],
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
        analysis = _Analysis(self)
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
            "steps": [_step_json(step, self.slos) for step in self.steps],
            **analysis.to_json(),
        }
        data["plots"] = []
        if self.folder is not None and self.settings.plots:
            from loadrun.report.capacity_plots import write_capacity_plots

            data["plots"] = [path.name for path in write_capacity_plots(data, self.folder.path)]
        self._save_progress(data)
        return CapacityResult(data, self.folder.path if self.folder is not None else None)


def _limit_of(slo: CapacitySlo) -> float:
    return slo.limit if isinstance(slo, ErrorShareSlo) else slo.limit_ms


def _step_json(step: _Step, slos: Sequence[CapacitySlo]) -> dict[str, Any]:
    stats = step.stats
    latency: dict[str, Any] = {}
    for metric in SLO_METRICS:
        values = stats.values.get(metric, np.zeros(0))
        row: dict[str, Any] = {"count": int(values.size)}
        wanted = {*REPORTED_PERCENTILES}
        wanted |= {s.percentile for s in slos if isinstance(s, PercentileSlo) and s.metric == metric}
        for percentile in sorted(wanted):
            row[f"p{percentile:g}_ms"] = percentile_of(values, percentile)
        row["mean_ms"] = float(values.mean()) if values.size else None
        latency[metric] = row
    summary = step.summary or {}
    return {
        "index": step.index,
        "phase": step.phase,
        "load": step.load,
        "concurrency": int(step.load),
        "warmup_s": round(step.warmup_s, 3),
        "time_cap_s": round(step.cap_s, 3),
        "measured_s": round(stats.seconds, 3),
        "steady": stats.steady,
        "truncated_requests": stats.truncated,
        "stop_reason": step.stop_reason,
        "failure": step.failure,
        "requests": {
            "measured": stats.measured,
            "ok": stats.ok,
            "failed": stats.failed,
            "sent": summary.get("sent"),
            "by_outcome": summary.get("requests", {}).get("by_outcome", {}),
        },
        "error_share": stats.error_share,
        "throughput": {
            "requests_per_s": stats.requests_per_s,
            "output_tokens_per_s": stats.output_tokens_per_s,
            "input_tokens_per_s": stats.input_tokens_per_s,
        },
        "latency": latency,
        "slos": {
            slo.key: {
                "value": step.slo_values.get(slo.key),
                "limit": _limit_of(slo),
                "decision": step.slo_verdicts.get(slo.key),
            }
            for slo in slos
        },
        "over": list(step.over),
        "verdict": "failed" if step.failure else ("over" if step.over else "within"),
        "generator_limited": bool(summary.get("generator", {}).get("limited", False)),
        "loop_lag_p99_ms": summary.get("generator", {}).get("loop_lag_p99_ms"),
        "run_folder": step.run_folder,
    }


# --- analysis and advice ---------------------------------------------------------------------


@dataclass(slots=True)
class _Limit:
    kind: str
    """"slo", "saturation" or "errors"."""
    label: str
    load: float
    where: str
    low: float | None = None
    high: float | None = None
    detail: str = ""

    def to_json(self) -> dict[str, Any]:
        return {
            "kind": self.kind,
            "label": self.label,
            "load": self.load,
            "where": self.where,
            "low": self.low,
            "high": self.high,
            "detail": self.detail,
        }


class _Analysis:
    """Fits, limits, capacity, predictions past the limit, advice and cost of a finished search."""

    def __init__(self, search: _Search) -> None:
        self.search = search
        self.settings = search.settings
        self.steps = search._usable_by_load()
        self.loads = [s.load for s in self.steps]
        self.rng = np.random.default_rng(self.settings.seed)
        self.usl = self._fit_usl()
        self.curves: dict[str, MonotoneCurve] = {}
        self.limits = self._limits()
        self.capacity = self._capacity()
        self.past_limit = self._past_limit()

    # fits ----------------------------------------------------------------------------------
    def _fit_usl(self) -> UslFit | None:
        points = [(s.load, s.stats.requests_per_s) for s in self.steps if s.stats.requests_per_s > 0]
        points = [p for p in points if not self._step_at(p[0]).heavy_errors]
        if len({p[0] for p in points}) < 3:
            return None
        try:
            return fit_usl([p[0] for p in points], [p[1] for p in points])
        except ValueError:
            return None

    def _step_at(self, load: float) -> _Step:
        return next(s for s in self.steps if s.load == load)

    def _limits(self) -> list[_Limit]:
        limits: list[_Limit] = []
        if not self.steps:
            return limits
        for slo in self.search.slos:
            values = [s.slo_values.get(slo.key) for s in self.steps]
            pairs = [(s, v) for s, v in zip(self.steps, values, strict=True) if v is not None]
            if not pairs:
                continue
            weights = [max(1, s.stats.ok) for s, _ in pairs]
            curve = MonotoneCurve([s.load for s, _ in pairs], [float(v) for _, v in pairs], weights)
            self.curves[slo.key] = curve
            crossing = curve.crossing(_limit_of(slo))
            assert crossing.load is not None
            limit = _Limit(
                "errors" if isinstance(slo, ErrorShareSlo) else "slo",
                slo.label(),
                crossing.load,
                crossing.where,
            )
            if crossing.where == "within" and isinstance(slo, PercentileSlo):
                limit.low, limit.high = self._crossing_band(slo, [s for s, _ in pairs])
            limits.append(limit)
        saturation = self._saturation_limit()
        if saturation is not None:
            limits.append(saturation)
        return limits

    def _crossing_band(self, slo: PercentileSlo, steps: list[_Step]) -> tuple[float | None, float | None]:
        """Bootstrap over the requests within each step (requests, not gaps, for ITL)."""
        replicates = self.settings.bootstrap_replicates
        if replicates < 10:
            return None, None
        per_step = [self._resampled_percentiles(step.stats, slo, replicates) for step in steps]
        loads = [s.load for s in steps]
        weights = [max(1, s.stats.ok) for s in steps]
        crossings = []
        for r in range(replicates):
            curve = MonotoneCurve(loads, [float(values[r]) for values in per_step], weights)
            crossing = curve.crossing(slo.limit_ms)
            assert crossing.load is not None
            crossings.append(crossing.load)
        low, high = np.percentile(crossings, BAND)
        return float(low), float(high)

    def _resampled_percentiles(self, stats: _StepStats, slo: PercentileSlo, replicates: int) -> FloatArray:
        values = stats.values.get(slo.metric, np.zeros(0))
        out = np.empty(replicates)
        if values.size == 0:
            out.fill(np.nan)
            return out
        if slo.metric != "itl":
            picks = self.rng.integers(0, values.size, size=(replicates, values.size))
            resampled = values[picks]
            rank = max(1, int(slo.percentile / 100.0 * values.size + 0.5))
            return np.asarray(np.partition(resampled, rank - 1, axis=1)[:, rank - 1], dtype=np.float64)
        counts = stats.gap_counts
        starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
        for r in range(replicates):
            chosen = self.rng.integers(0, counts.size, size=counts.size)
            lengths = counts[chosen]
            total = int(lengths.sum())
            if total == 0:
                out[r] = np.nan
                continue
            shift = np.repeat(starts[chosen] - (np.cumsum(lengths) - lengths), lengths)
            out[r] = percentile_of(values[np.arange(total) + shift], slo.percentile)
        return out

    def _saturation_limit(self) -> _Limit | None:
        """Where throughput comes within ``min_gain`` of its peak, if the search saw it flatten."""
        share = 1.0 - self.settings.min_gain
        max_load = max(self.loads)
        best = max(s.stats.requests_per_s for s in self.steps)
        if self.usl is not None:
            load = self.usl.saturation_load(share)
            if load is None or load > max_load:
                return None
            low, high = self._saturation_band(share, max_load)
            peak = self.usl.peak_concurrency
            detail = (
                f"the USL fit's throughput reaches {share:.0%} of its peak "
                f"({self.usl.peak_throughput:.1f} requests/s"
                + (f" at N* = {peak:.1f}" if math.isfinite(peak) else ", approached as load grows")
                + ")"
            )
            return _Limit("saturation", "throughput saturation", load, "within", low, high, detail)
        if self.search.saturated_at is None:
            return None
        knee = min(s.load for s in self.steps if s.stats.requests_per_s >= share * best)
        detail = (
            f"measured throughput within {self.settings.min_gain:.0%} of its best ({best:.1f} requests/s)"
        )
        return _Limit("saturation", "throughput saturation", knee, "within", knee, knee, detail)

    def _saturation_band(self, share: float, max_load: float) -> tuple[float | None, float | None]:
        usl = self.usl
        assert usl is not None
        if usl.covariance is None:
            return None, None
        mean = np.array([usl.lambda_, usl.sigma, usl.kappa])
        draws = self.rng.multivariate_normal(mean, np.array(usl.covariance), size=400, method="svd")
        loads = []
        for lambda_, sigma, kappa in draws:
            if lambda_ <= 0:
                continue
            fit = replace(usl, lambda_=float(lambda_), sigma=min(max(float(sigma), 0.0), 1.0),
                          kappa=min(max(float(kappa), 0.0), 1.0))  # fmt: skip
            load = fit.saturation_load(share)
            loads.append(min(load, max_load) if load is not None else max_load)
        if len(loads) < 10:
            return None, None
        low, high = np.percentile(loads, BAND)
        return float(low), float(high)

    # capacity ------------------------------------------------------------------------------
    def _capacity(self) -> dict[str, Any]:
        search = self.search
        base: dict[str, Any] = {"axis": self.settings.axis, "found": False}
        if not self.steps:
            reason = search.end_reason or "no step finished"
            return base | {"concurrency": None, "load": None, "limited_by": "failure", "reason": reason}
        below = [limit for limit in self.limits if limit.where == "below_range"]
        if below:
            first = min(self.loads)
            labels = ", ".join(limit.label for limit in below)
            reason = f"{labels} is broken even at the lowest load tried ({self._load_text(first)})"
            if any(s.heavy_errors for s in self.steps if s.load == first):
                reason += f"; {self._step_at(first).over[-1]}"
            return base | {
                "concurrency": 0,
                "load": 0.0,
                "limited_by": below[0].label,
                "limit_kind": below[0].kind,
                "reason": reason,
                **self._rates_at(None),
            }
        within = [limit for limit in self.limits if limit.where == "within"]
        if within:
            binding = min(within, key=lambda limit: limit.load)
            # The band of a minimum: the minimum of the lower ends and of the upper ends (a
            # limit without a band counts with its own load at both ends).
            band_low: float | None = None
            band_high: float | None = None
            if any(limit.low is not None and limit.high is not None for limit in within):
                band_low = min(limit.load if limit.low is None else limit.low for limit in within)
                band_high = min(limit.load if limit.high is None else limit.high for limit in within)
            reason = f"{binding.label} is reached at {self._load_text(binding.load)}"
            if binding.detail:
                reason += f" ({binding.detail})"
            return base | {
                "found": True,
                "load": binding.load,
                "concurrency": binding.load,
                "low": band_low,
                "high": band_high,
                "limited_by": binding.label,
                "limit_kind": binding.kind,
                "reason": reason,
                **self._rates_at(binding.load),
            }
        highest = max(self.loads)
        return base | {
            "load": highest,
            "concurrency": highest,
            "lower_bound": True,
            "limited_by": "search range",
            "limit_kind": "none reached",
            "reason": f"no limit was reached up to {self._load_text(highest)}: {search.end_reason}",
            **self._rates_at(highest),
        }

    def _rates_at(self, load: float | None) -> dict[str, float | None]:
        keys = ("requests_per_s", "output_tokens_per_s", "input_tokens_per_s")
        if load is None:
            return dict.fromkeys(keys, 0.0)
        return {key: self._throughput_at(load, key) for key in keys}

    def _throughput_at(self, load: float, key: str) -> float | None:
        values = [getattr(s.stats, key) for s in self.steps]
        measured = interpolate_log(self.loads, values, load)
        if measured is not None:
            return measured
        if key == "requests_per_s" and self.usl is not None:
            return float(self.usl.predict(load))
        return None

    def _load_text(self, load: float) -> str:
        return self.search._load_text(round(load, 1))

    # past the limit ------------------------------------------------------------------------
    def _past_limit(self) -> list[dict[str, Any]]:
        capacity = self.capacity.get("load")
        if not self.capacity.get("found") or not capacity:
            return []
        out = []
        for factor in PAST_LIMIT_FACTORS:
            load = capacity * factor
            row: dict[str, Any] = {"factor": factor, "load": load, "latency": {}}
            measured_x = interpolate_log(self.loads, [s.stats.requests_per_s for s in self.steps], load)
            row["requests_per_s"] = measured_x
            row["requests_per_s_usl"] = float(self.usl.predict(load)) if self.usl is not None else None
            if self.usl is not None:
                # Little's law in a closed loop: mean response time = N / X(N).
                row["e2e_mean_ms_usl"] = load / float(self.usl.predict(load)) * 1000
            for key, curve in self.curves.items():
                value = curve(load)
                source = "measured"
                slo = next(s for s in self.search.slos if s.key == key)
                if value is None and self.usl is not None and isinstance(slo, PercentileSlo):
                    value = self._scaled_by_usl(curve, slo, load)
                    source = "usl" if value is not None else "none"
                row["latency"][key] = {"value": value, "source": source, "limit": _limit_of(slo)}
            out.append(row)
        return out

    def _scaled_by_usl(self, curve: MonotoneCurve, slo: PercentileSlo, load: float) -> float | None:
        """Queueing metrics (TTFT, E2E) past the measured range, scaled with the response time
        N / X(N) the USL fit implies; per-token gaps are not extrapolated."""
        if slo.metric not in ("ttft", "e2e") or self.usl is None:
            return None
        last = curve.loads[-1]
        response = load / float(self.usl.predict(load))
        response_last = last / float(self.usl.predict(last))
        return curve.values[-1] * response / response_last

    # advice --------------------------------------------------------------------------------
    def _advice(self) -> dict[str, Any]:
        advice = self.settings.advice
        capacity = self.capacity
        lines: list[str] = []
        out: dict[str, Any] = {"headroom": advice.headroom, "lines": lines}
        load = capacity.get("load")
        if not load:
            lines.append(f"No capacity could be established: {capacity.get('reason')}.")
            lines.append(
                "Fix what limited it first (the target's errors, reachability or an SLO that "
                "one request alone cannot meet), then search again."
            )
            return out
        operating = max(1.0, math.floor(load * (1.0 - advice.headroom)))
        x_op = self._throughput_at(operating, "requests_per_s")
        out_tokens_op = self._throughput_at(operating, "output_tokens_per_s")
        in_tokens_op = self._throughput_at(operating, "input_tokens_per_s")
        out.update(
            {
                "operating_concurrency": operating,
                "operating_requests_per_s": x_op,
                "operating_output_tokens_per_s": out_tokens_op,
                "operating_input_tokens_per_s": in_tokens_op,
                "scale_out_signal": "in-flight requests per replica",
                "scale_out_at": operating,
            }
        )
        band = ""
        if capacity.get("low") is not None and capacity.get("high") is not None:
            band = f" (90 % band {capacity['low']:.1f} to {capacity['high']:.1f})"
        rate = capacity.get("requests_per_s")
        tokens = capacity.get("output_tokens_per_s")
        if capacity.get("found"):
            lines.append(
                f"Capacity per replica: {load:.1f} requests in flight{band}, about "
                f"{_num(rate)} requests/s and {_num(tokens)} output tokens/s. "
                f"Limited by {capacity['limited_by']}."
            )
        else:
            lines.append(
                f"Capacity per replica is at least {load:g} requests in flight ({_num(rate)} requests/s): "
                f"{capacity.get('reason')}. Search a wider range or with a larger budget for the real limit."
            )
        lines.append(
            f"Operate at up to {operating:g} in-flight requests per replica ({advice.headroom:.0%} headroom): "
            f"about {_num(x_op)} requests/s and {_num(out_tokens_op)} output tokens/s per replica."
        )
        lines.append(
            f"Scale out when in-flight requests per replica stay above {operating:g} "
            f"(or requests/s per replica above {_num(x_op)}); add the next replica before that, not at "
            f"the limit of {load:.1f}."
        )
        if advice.peak_requests_per_s is not None and x_op:
            needed = math.ceil(advice.peak_requests_per_s / x_op)
            total = needed + advice.spare_replicas
            out.update(
                {
                    "peak_requests_per_s": advice.peak_requests_per_s,
                    "replicas_for_peak": needed,
                    "spare_replicas": advice.spare_replicas,
                    "replicas_total": total,
                }
            )
            spare = f" + {advice.spare_replicas} spare = {total}" if advice.spare_replicas else ""
            lines.append(
                f"For a peak of {advice.peak_requests_per_s:g} requests/s: {needed} replicas{spare} "
                f"at the operating point."
            )
        for row in self.past_limit:
            parts = []
            for key, item in row["latency"].items():
                if item["value"] is None or key == "errors":
                    continue
                note = "" if item["source"] == "measured" else " (USL extrapolation)"
                parts.append(f"{key.replace('_', ' ')} {item['value']:.1f} ms{note}")
            throughput = row["requests_per_s"] or row["requests_per_s_usl"]
            if parts or throughput:
                lines.append(
                    f"Past the limit, at {row['factor']:g}x ({row['load']:.0f} in flight): "
                    + (", ".join(parts) + "; " if parts else "")
                    + f"throughput {_num(throughput)} requests/s."
                )
        if self.usl is not None:
            peak = self.usl.peak_concurrency
            lines.append(
                f"Scalability (USL): sigma {self.usl.sigma:.4g} (contention), kappa {self.usl.kappa:.3g} "
                f"(coherency), lambda {self.usl.lambda_:.3g} requests/s per client"
                + (f"; throughput peaks at N* = {peak:.1f}." if math.isfinite(peak) and peak < 1e6 else ".")
            )
        warnings = self._warnings()
        out["warnings"] = warnings
        lines.extend(f"Note: {w}" for w in warnings)
        return out

    def _warnings(self) -> list[str]:
        notes = []
        limited = [s for s in self.search.steps if (s.summary or {}).get("generator", {}).get("limited")]
        if limited:
            loads = ", ".join(f"{s.load:g}" for s in limited)
            notes.append(
                f"the load generator fell behind at concurrency {loads}: latencies there are not trustworthy"
            )
        unsteady = [s for s in self.search.steps if s.failure is None and not s.stats.steady]
        if unsteady:
            loads = ", ".join(f"{s.load:g}" for s in unsteady)
            notes.append(
                f"no steady state was detected at concurrency {loads} (step too short or load unstable)"
            )
        failed = sum(s.stats.failed for s in self.search.steps)
        if failed:
            notes.append(f"{failed} measured requests failed during the search")
        return notes

    def _cost(self, advice: dict[str, Any]) -> dict[str, Any] | None:
        price = self.settings.advice.replica_price
        if price is None or not advice.get("operating_requests_per_s"):
            return None
        replicas = advice.get("replicas_total", 1)
        cost = serving_cost(
            price,
            output_tokens_per_s=advice.get("operating_output_tokens_per_s") or 0.0,
            input_tokens_per_s=advice.get("operating_input_tokens_per_s") or 0.0,
            requests_per_s=advice["operating_requests_per_s"],
            replicas=replicas,
            hosted=self.settings.advice.hosted_prices,
        )
        lines = advice["lines"]
        per_out = cost["per_million_output_tokens"]
        per_all = cost["per_million_tokens"]
        lines.append(
            f"Cost at the operating point (${price.per_hour:g} per replica-hour): "
            + (f"${per_out:.2f} per million output tokens" if per_out is not None else "no output tokens")
            + (f", ${per_all:.2f} per million tokens in and out" if per_all is not None else "")
            + f"; {replicas} replica{'s' if replicas != 1 else ''} cost ${cost['yearly_cost']:,.0f} a year."
        )
        hosted = cost.get("hosted")
        if hosted is not None:
            lines.append(
                f"Break-even with a hosted price of ${hosted['blended_per_million']:.2f} per million tokens "
                f"(this workload's mix): {hosted['break_even_tokens_per_year'] / 1e9:,.1f} billion tokens a "
                f"year; below that volume the hosted API is cheaper."
            )
        return cost

    def to_json(self) -> dict[str, Any]:
        usl = self.usl.as_dict() if self.usl is not None else None
        if usl is not None and self.loads:
            assert self.usl is not None
            top = max(self.loads) * 1.6
            grid = np.exp(np.linspace(0.0, math.log(top), 48))
            usl["curve"] = {
                "loads": [float(v) for v in grid],
                "requests_per_s": [float(v) for v in np.asarray(self.usl.predict(grid))],
            }
        curves = {}
        for key, curve in self.curves.items():
            loads, values = curve.sample()
            curves[key] = {"loads": loads, "values": values}
        advice = self._advice()
        cost = self._cost(advice)
        return {
            "capacity": self.capacity,
            "sigma": self.usl.sigma if self.usl else None,
            "kappa": self.usl.kappa if self.usl else None,
            "lambda": self.usl.lambda_ if self.usl else None,
            "peak_concurrency": usl["peak_concurrency"] if usl else None,
            "fits": {"usl": usl, "latency_curves": curves},
            "limits": [limit.to_json() for limit in self.limits],
            "past_limit": self.past_limit,
            "advice": advice,
            "cost": cost,
        }


def _num(value: float | None) -> str:
    if value is None:
        return "?"
    return f"{value:,.1f}" if value < 1000 else f"{value:,.0f}"


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
