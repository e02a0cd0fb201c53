"""One load step of a capacity search: its SLOs, its samples, its steady state, its verdict.

- SLOs: a percentile of TTFT, ITL, TPOT or E2E at or below a limit, or a share of failed
  requests at or below a limit.
- Steady state: MSER-5 truncation (K. P. White, 1997) on the end-to-end latencies in send
  order; the step's figures come from the requests sent after the truncation point.
- Verdicts: one-sided Clopper-Pearson bounds on the share of requests above a limit decide
  an SLO early, "met" or "violated"; otherwise the point estimate judges the step.
"""

from __future__ import annotations

import math
import re
from collections import Counter
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
import numpy.typing as npt
from scipy.stats import beta

from loadrun.cost import TokenPrices
from loadrun.errors import UsageError
from loadrun.record import Outcome, Record
from loadrun.slo import SLO_METRICS

__all__ = [
    "CapacitySlo",
    "ErrorShareSlo",
    "PercentileSlo",
    "Step",
    "StepSamples",
    "StepStats",
    "limit_of",
    "parse_slo",
    "percentile_of",
    "slo_decision",
    "slo_state",
    "steady_state_start",
    "step_json",
    "step_stats",
    "usable_by_load",
]

REPORTED_PERCENTILES = (50.0, 90.0, 99.0)
FAR_BELOW = 0.5
"""A step whose worst sample is below this share of a limit meets that SLO without waiting
for a full confidence bound. A heuristic of ours (no source): it assumes the tail does not
reach twice the worst of the samples seen."""
MSER_BATCH = 5

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]
Verdict = Literal["met", "violated", "undecided"]


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


def steady_state_start(values: Sequence[float] | FloatArray, batch: int | None = None) -> int | None:
    """MSER-5 truncation point (K. P. White, 1997, "An effective truncation heuristic for bias
    reduction in simulation output"): the index of the first value to keep, or None when the
    series is not (yet) steady -- fewer than ten batches, or the best truncation falls in its
    second half.

    Values are averaged in batches of ``batch`` (5; smaller for a short series, down to 1, so
    that ten batches exist); the truncation d minimises the variance of the kept batch means
    over the square of their number, for d up to the last five batches.
    """
    data = np.asarray(values, dtype=np.float64)
    if batch is None:
        batch = min(MSER_BATCH, max(1, data.size // 10))
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


class StepSamples:
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
        self.failed_total = 0
        """Failed requests, warm-up included (a target that fails at once fails fast)."""
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
        self.failed_total += not ok
        self.tokens_total += input_tokens + record.output_tokens
        if self.prices is not None:
            self.cost_total += self.prices.request_cost(input_tokens, record.output_tokens)
        if not ok:
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
class StepStats:
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


def step_stats(samples: StepSamples) -> StepStats:
    """Figures of the steady part of a step: requests sent after the MSER-5 truncation point."""
    table, gaps = samples.table()
    in_window = table[:, _COL["in_window"]].astype(bool)
    if not in_window.any():
        return StepStats()
    intended = table[:, _COL["intended"]]
    ok = table[:, _COL["ok"]].astype(bool)
    e2e = table[:, _COL["e2e"]]
    ok_rows = np.flatnonzero(in_window & ok)
    ok_rows = ok_rows[np.argsort(intended[ok_rows], kind="stable")]
    start = steady_state_start(e2e[ok_rows].astype(np.float64))
    first_send = int(intended[in_window].min())
    t0 = int(intended[ok_rows[start]]) if start else first_send  # nothing cut: from the first send
    t1 = int(intended[in_window].max())
    keep = in_window & (intended >= t0)
    kept_ok = keep & ok
    stats = StepStats(steady=start is not None, first_send_ns=first_send)
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


def slo_state(stats: StepStats, slo: CapacitySlo, confidence: float) -> tuple[float | None, Verdict]:
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


@dataclass(slots=True)
class Step:
    index: int
    phase: str
    load: float
    warmup_s: float
    cap_s: float
    stats: StepStats
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


def limit_of(slo: CapacitySlo) -> float:
    return slo.limit if isinstance(slo, ErrorShareSlo) else slo.limit_ms


def step_json(step: Step, slos: Sequence[CapacitySlo], axis: str = "concurrency") -> dict[str, Any]:
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
        "concurrency": int(step.load) if axis == "concurrency" else None,
        "rate_per_s": step.load if axis == "rate" else None,
        # Little's law: requests in flight on average = throughput x mean latency.
        "in_flight_mean": (stats.requests_per_s * stats.mean_e2e_s if stats.mean_e2e_s is not None else None),
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
                "limit": limit_of(slo),
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


def usable_by_load(steps: Iterable[Step]) -> list[Step]:
    """Usable steps sorted by load; a load measured twice keeps its later step."""
    by_load: dict[float, Step] = {}
    for step in steps:
        if step.usable:
            by_load[step.load] = step
    return [by_load[load] for load in sorted(by_load)]


def load_text(load: float, axis: str = "concurrency") -> str:
    if axis == "rate":
        return f"{load:.3g} requests/s offered"
    return f"concurrency {round(load, 1):g}"
