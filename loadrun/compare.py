"""Compare targets on one workload: interleaved rounds, per-target results, verdicts.

    from loadrun import CompareSettings, compare, load_profile, load_targets
    result = compare(CompareSettings(targets=load_targets("targets.toml").targets, rounds=4))
    result.data["levels"][0]["pairs"][0]["verdict"]

Fairness: at each load level the targets take turns in rounds, A B C A B C ..., each round a
short closed-loop run of one target (``runner.measure_async``). Whatever drifts over the
comparison (the network, a provider's load, this machine) then falls on every target alike.
Each round keeps its own run folder; the comparison folder holds ``compare.json`` and the
HTML report.

Statistics: for every pair of targets, every latency metric and every compared percentile,
the ratio of A's percentile to B's with a bootstrap interval that resamples requests
(``stats``). The intervals of one pair share one error budget (Bonferroni: each is taken at
1 - (1 - confidence) / number of intervals), so that two targets that do not differ are
called different in at most about 1 - confidence of comparisons, however many metrics are
looked at. Verdicts:

- **faster** / **slower**: the whole interval lies on one side of 1 and the estimate is at
  least ``smallest_difference`` away from 1 (a difference that is both clear and big enough
  to matter);
- **no difference**: otherwise. Either the interval lies within +-smallest_difference (the
  two are the same for practical purposes), or this sample cannot tell; then the verdict
  estimates how many more requests per target would tell: the interval's width shrinks as
  1 / sqrt(n), so with the estimate and the spread as measured, n * (h / h_needed)^2
  requests give a half-width (on the log scale) h_needed small enough to decide.
"""

from __future__ import annotations

import enum
import math
import time
from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from itertools import combinations, pairwise
from pathlib import Path
from typing import Any

import anyio
import numpy as np

from loadrun._version import __version__
from loadrun.caution import CAUTION
from loadrun.errors import UsageError
from loadrun.metrics import LATENCY_METRICS, HistogramSet
from loadrun.profile import Profile
from loadrun.runner import MeasureSettings, event_loop_options, measure_async
from loadrun.stats import Interval, Sample, percentile, ratio_of_replicates, replicate_percentiles
from loadrun.store import RECORDS_FILE, RunFolder, read_records
from loadrun.target import Target
from loadrun.targets import TargetSpec, started_targets

__all__ = [
    "COMPARE_FILE",
    "CompareSettings",
    "ComparisonResult",
    "MetricComparison",
    "MetricSamples",
    "PairComparison",
    "RoundDone",
    "Verdict",
    "compare",
    "compare_async",
    "compare_samples",
    "compliance_of",
    "plan_text",
    "target_aggregate",
]

COMPARE_FILE = "compare.json"
US_PER_MS = 1000.0
FLOOR_MS = 0.001
"""Latencies are raised to 1 us before a ratio, as the histograms do: a 0 us gap is real."""
SMALL_SAMPLE = 100


class Verdict(enum.StrEnum):
    FASTER = "faster"
    SLOWER = "slower"
    NO_DIFFERENCE = "no difference"
    MIXED = "mixed"
    """Pairs only: faster on some metrics, slower on others."""


@dataclass(frozen=True, slots=True)
class CompareSettings:
    targets: tuple[TargetSpec, ...]
    profile: Profile = field(default_factory=Profile)
    levels: tuple[int, ...] = ()
    """Concurrencies to compare at; empty: the profile's own."""
    rounds: int = 3
    requests_per_round: int | None = None
    seconds_per_round: float | None = None
    """Neither given: the profile's request count or duration, split over the rounds."""
    warmup_s: float | None = None
    """Warm-up of every round (each round starts its clients anew); None: the profile's."""
    confidence: float = 0.95
    smallest_difference: float = 0.05
    """Relative difference below which targets count as the same (0.05: 5 %)."""
    percentiles: tuple[float, ...] = (50.0, 90.0)
    resamples: int = 4000
    seed: int = 0
    out_dir: Path = Path("runs")
    time_limit_s: float = 3600.0
    """Hard bound on the whole comparison; rounds not started by then are skipped."""
    confirmed: bool = False
    """Set once the user has agreed to load the targets that are not on this machine."""
    description: str = ""
    write_report: bool = True

    def __post_init__(self) -> None:
        names = [spec.name for spec in self.targets]
        if len(names) < 2:
            raise UsageError("a comparison needs at least two targets")
        if len(set(names)) != len(names):
            raise UsageError(f"target names repeat: {names}")
        if self.rounds < 1:
            raise UsageError("rounds must be at least 1")
        if self.requests_per_round is not None and self.seconds_per_round is not None:
            raise UsageError("give requests per round or seconds per round, not both")
        if self.requests_per_round is not None and self.requests_per_round < 1:
            raise UsageError("requests per round must be at least 1")
        if self.seconds_per_round is not None and self.seconds_per_round <= 0:
            raise UsageError("seconds per round must be positive")
        if any(level < 1 for level in self.levels):
            raise UsageError("every concurrency must be at least 1")
        if not 0.5 <= self.confidence < 1.0:
            raise UsageError(f"confidence must be within 0.5..1 (e.g. 0.95), got {self.confidence}")
        if not 0.0 <= self.smallest_difference < 1.0:
            raise UsageError(
                f"the smallest difference is a share (e.g. 0.05), got {self.smallest_difference}"
            )
        if not self.percentiles or any(not 0.0 < q < 100.0 for q in self.percentiles):
            raise UsageError(f"percentiles to compare must be within 0..100, got {self.percentiles}")
        if self.resamples < 200:
            raise UsageError("use at least 200 bootstrap resamples")

    def concurrencies(self) -> tuple[int, ...]:
        return self.levels or (self.profile.load.concurrency,)

    def round_shape(self) -> tuple[int | None, float | None]:
        """(requests, seconds) of one round."""
        if self.requests_per_round is not None or self.seconds_per_round is not None:
            return self.requests_per_round, self.seconds_per_round
        load = self.profile.load
        if load.requests is not None:
            return max(1, math.ceil(load.requests / self.rounds)), None
        return None, max(0.5, (load.duration_s or 10.0) / self.rounds)

    def round_warmup_s(self) -> float:
        return self.warmup_s if self.warmup_s is not None else self.profile.load.warmup_s

    def describe(self) -> dict[str, Any]:
        requests, seconds = self.round_shape()
        return {
            "levels": list(self.concurrencies()),
            "rounds": self.rounds,
            "requests_per_round": requests,
            "seconds_per_round": seconds,
            "warmup_s": self.round_warmup_s(),
            "confidence": self.confidence,
            "smallest_difference": self.smallest_difference,
            "percentiles": list(self.percentiles),
            "resamples": self.resamples,
            "seed": self.seed,
            "time_limit_s": self.time_limit_s,
        }


@dataclass(slots=True)
class ComparisonResult:
    data: dict[str, Any]
    """What compare.json holds."""
    folder: Path
    report: Path | None = None


@dataclass(frozen=True, slots=True)
class RoundDone:
    """Passed to the progress callback after every round."""

    level: int
    round: int
    rounds: int
    target: str
    summary: dict[str, Any]


# --- running --------------------------------------------------------------------------


def compare(
    settings: CompareSettings, on_round: Callable[[RoundDone], None] | None = None
) -> ComparisonResult:
    """Run the comparison (blocking; starts its own event loop)."""
    return anyio.run(
        compare_async, settings, on_round, backend="asyncio", backend_options=event_loop_options()
    )


async def compare_async(
    settings: CompareSettings, on_round: Callable[[RoundDone], None] | None = None
) -> ComparisonResult:
    _check_context_windows(settings)
    foreign = [spec.name for spec in settings.targets if not spec.is_loopback]
    if foreign and not settings.confirmed:
        raise UsageError(f"{', '.join(foreign)} not on this machine: confirm that you may load them (--yes)")
    folder = RunFolder.create(settings.out_dir, f"compare-{settings.profile.name}")
    started_at = time.strftime("%Y-%m-%dT%H:%M:%S%z")
    deadline = time.monotonic() + settings.time_limit_s
    rounds: list[dict[str, Any]] = []
    stopped_early: str | None = None
    with started_targets(settings.targets) as targets:
        for target in targets:
            target.api_key()  # fail now, not mid-comparison, when a named variable is unset
        for level in settings.concurrencies():
            for number in range(1, settings.rounds + 1):
                for spec, target in zip(settings.targets, targets, strict=True):
                    remaining = deadline - time.monotonic()
                    if remaining < 1.0:
                        stopped_early = f"the time limit of {settings.time_limit_s:g} s was reached"
                        break
                    entry = await _run_round(settings, folder.path, spec, target, level, number, remaining)
                    summary = entry.pop("_summary")
                    rounds.append(entry)
                    if on_round is not None:
                        on_round(RoundDone(level, number, settings.rounds, spec.name, summary))
    data = build_comparison(settings, folder.path, rounds, started_at=started_at, stopped_early=stopped_early)
    folder.write_json(COMPARE_FILE, data)
    report = None
    if settings.write_report:
        from loadrun.report.html import write_report

        report = write_report(folder.path)
    return ComparisonResult(data, folder.path, report)


async def _run_round(
    settings: CompareSettings,
    root: Path,
    spec: TargetSpec,
    target: Target,
    level: int,
    number: int,
    remaining_s: float,
) -> dict[str, Any]:
    requests, seconds = settings.round_shape()
    measure_settings = MeasureSettings(
        profile=settings.profile,
        target=target,
        concurrency=level,
        requests=requests,
        duration_s=seconds,
        warmup_s=settings.round_warmup_s(),
        out_dir=root / "rounds" / f"c{level}-round{number}-{spec.name}",
        transport=spec.transport.name,
        total_timeout_s=spec.transport.total_timeout_s,
        connect_timeout_s=spec.transport.connect_timeout_s,
        time_limit_s=max(1.0, remaining_s),
        confirmed=True,
        arrival="closed",  # the load levels are concurrencies, whatever the profile says
        record_history=False,  # a turn is a part of the comparison, not a run of its own
    )
    result = await measure_async(measure_settings)
    summary = result.summary
    assert result.folder is not None
    return {
        "level": level,
        "round": number,
        "target": spec.name,
        "folder": str(result.folder.relative_to(root)),
        "wall_started": _first_wall_start(result.folder),
        "measured": summary["requests"]["measured"],
        "ok": summary["requests"]["ok"],
        "generator_limited": bool(summary.get("generator", {}).get("limited")),
        "interrupted": bool(summary.get("interrupted")),
        "aborted": summary.get("aborted"),
        "_summary": summary,
    }


def _first_wall_start(folder: Path) -> float | None:
    rows = read_records(folder / RECORDS_FILE)
    starts = [row["wall_start"] for row in rows if row.get("wall_start")]
    return min(starts) if starts else None


def _check_context_windows(settings: CompareSettings) -> None:
    """A profile must not exceed a target's declared context window (refused before sending)."""
    needed = _tokens_needed(settings.profile)
    for spec in settings.targets:
        if spec.context_window is not None and needed > spec.context_window:
            raise UsageError(
                f"target {spec.name}: the profile needs about {needed} tokens (input, system prompt "
                f"and max_tokens) but the target's context window is {spec.context_window}"
            )


def _tokens_needed(profile: Profile) -> int:
    """Typical input (with the system prompt) plus max_tokens of the profile's largest class."""
    return max(
        spec.input_tokens + spec.output_tokens + len(spec.system_prompt.split()) for spec in profile.mix()
    )


def plan_text(settings: CompareSettings) -> str:
    """What a comparison will send to the targets not on this machine, for the confirmation."""
    requests, seconds = settings.round_shape()
    request = settings.profile.request  # one class, or the mean of a mix
    input_tokens = request.input_tokens + len(request.system_prompt.split())
    runs = settings.rounds * len(settings.concurrencies())
    volume = (
        f"{runs * requests} requests" if requests is not None else f"requests for {runs * (seconds or 0):g} s"
    )
    lines = [
        f"loadrun will compare {len(settings.targets)} targets in {settings.rounds} rounds at concurrency "
        f"{', '.join(map(str, settings.concurrencies()))}; each target gets {volume} (plus warm-up) of "
        f"about {input_tokens} input and up to {request.output_tokens} output tokens."
    ]
    for spec in settings.targets:
        if spec.is_loopback:
            continue
        prices = spec.prices
        if prices.per_token:
            each = prices.request_cost(input_tokens, request.output_tokens)
            total = f", about {each * requests * runs:.4f} {prices.currency} in all" if requests else ""
            cost = f"at most {each:.6f} {prices.currency} per request{total}"
        elif prices.per_hour is not None:
            cost = f"{prices.per_hour:g} {prices.currency} per hour of the server"
        else:
            cost = "no prices given"
        lines.append(f"  {spec.name}: {spec.base_url} (model {spec.model}), {cost}")
    lines.append(CAUTION)
    return "\n".join(lines)


# --- analysis -------------------------------------------------------------------------


def build_comparison(
    settings: CompareSettings,
    root: Path,
    rounds: Sequence[Mapping[str, Any]],
    *,
    started_at: str = "",
    stopped_early: str | None = None,
) -> dict[str, Any]:
    """Everything compare.json holds, from the round folders under ``root``."""
    rng = np.random.default_rng(settings.seed)
    levels = []
    for level in settings.concurrencies():
        rows: dict[str, list[dict[str, Any]]] = {spec.name: [] for spec in settings.targets}
        summaries: dict[str, list[dict[str, Any]]] = {spec.name: [] for spec in settings.targets}
        for entry in rounds:
            if entry["level"] != level:
                continue
            folder = root / entry["folder"]
            rows[entry["target"]].extend(read_records(folder / RECORDS_FILE))
            summaries[entry["target"]].append(RunFolder(folder).read_json("summary.json"))
        aggregates = {
            spec.name: target_aggregate(rows[spec.name], summaries[spec.name], spec)
            for spec in settings.targets
        }
        samples = {name: MetricSamples.from_rows(rows[name]) for name in rows}
        pairs = compare_samples(samples, settings, rng)
        levels.append(
            {
                "concurrency": level,
                "targets": aggregates,
                "pairs": [pair.to_json() for pair in pairs],
            }
        )
    data: dict[str, Any] = {
        "kind": "comparison",
        "loadrun_version": __version__,
        "started_at": started_at,
        "finished_at": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "description": settings.description,
        "profile": settings.profile.describe(),
        "settings": settings.describe(),
        "targets": [spec.describe() for spec in settings.targets],
        "rounds": [dict(entry) for entry in rounds],
        "levels": levels,
        "stopped_early": stopped_early,
    }
    data["cautions"] = comparison_cautions(data)
    return data


@dataclass(frozen=True, slots=True)
class MetricSamples:
    """One target's per-request latency samples (milliseconds), ready to resample."""

    samples: dict[str, Sample]
    requests: int

    @classmethod
    def from_rows(cls, rows: Sequence[Mapping[str, Any]]) -> MetricSamples:
        """From records.jsonl rows: measured (in-window) successful requests only."""
        ttft: list[float] = []
        tpot: list[float] = []
        e2e: list[float] = []
        itl: list[list[float]] = []
        ok_rows = [row for row in rows if row.get("in_window", True) and row.get("outcome") == "ok"]
        for row in ok_rows:
            intended, first, end = row.get("intended_us"), row.get("first_token_us"), row.get("end_us")
            tokens = int(row.get("output_tokens") or 0)
            if intended is not None and first is not None:
                ttft.append((first - intended) / US_PER_MS)
            if intended is not None and end is not None:
                e2e.append((end - intended) / US_PER_MS)
            if first is not None and end is not None and tokens >= 2:
                tpot.append((end - first) / (tokens - 1) / US_PER_MS)
            offsets = row.get("chunk_offsets_us") or []
            itl.append([(b - a) / US_PER_MS for a, b in pairwise(offsets)])
        return cls(
            {
                "ttft": Sample.of_values(ttft),
                "itl": Sample.of_groups(itl),
                "tpot": Sample.of_values(tpot),
                "e2e": Sample.of_values(e2e),
            },
            len(ok_rows),
        )


@dataclass(frozen=True, slots=True)
class MetricComparison:
    metric: str
    percentile: float
    a_ms: float
    b_ms: float
    ratio: Interval
    verdict: Verdict
    reason: str
    more_requests: int | None
    """More requests per target that would probably tell; 0 when decided; None: no estimate."""
    requests: int

    def to_json(self) -> dict[str, Any]:
        return {
            "metric": self.metric,
            "percentile": self.percentile,
            "a_ms": self.a_ms,
            "b_ms": self.b_ms,
            "ratio": self.ratio.estimate,
            "ratio_low": self.ratio.low,
            "ratio_high": self.ratio.high,
            "confidence": self.ratio.confidence,
            "verdict": self.verdict.value,
            "reason": self.reason,
            "more_requests": self.more_requests,
            "requests": self.requests,
        }


@dataclass(frozen=True, slots=True)
class PairComparison:
    a: str
    b: str
    metrics: tuple[MetricComparison, ...]
    confidence: float

    @property
    def verdict(self) -> Verdict:
        verdicts = {metric.verdict for metric in self.metrics}
        if Verdict.FASTER in verdicts and Verdict.SLOWER in verdicts:
            return Verdict.MIXED
        if Verdict.FASTER in verdicts:
            return Verdict.FASTER
        if Verdict.SLOWER in verdicts:
            return Verdict.SLOWER
        return Verdict.NO_DIFFERENCE

    def sentence(self) -> str:
        verdict = self.verdict
        if verdict is Verdict.NO_DIFFERENCE:
            return f"{self.a} and {self.b}: no difference that this sample can tell"
        if verdict is Verdict.MIXED:
            return (
                f"{self.a} is faster than {self.b} on {self._which(Verdict.FASTER)} "
                f"and slower on {self._which(Verdict.SLOWER)}"
            )
        return f"{self.a} is {verdict.value} than {self.b} ({self._which(verdict)})"

    def _which(self, verdict: Verdict) -> str:
        return ", ".join(f"{m.metric} p{m.percentile:g}" for m in self.metrics if m.verdict is verdict)

    def to_json(self) -> dict[str, Any]:
        return {
            "a": self.a,
            "b": self.b,
            "verdict": self.verdict.value,
            "sentence": self.sentence(),
            "family_confidence": self.confidence,
            "intervals": len(self.metrics),
            "metrics": [metric.to_json() for metric in self.metrics],
        }


def compare_samples(
    samples: Mapping[str, MetricSamples],
    settings: CompareSettings,
    rng: np.random.Generator,
    metrics: Sequence[str] = LATENCY_METRICS,
) -> list[PairComparison]:
    """Every pair of targets (in the given order), every metric and compared percentile."""
    quantiles = list(settings.percentiles)
    replicates: dict[tuple[str, str], np.ndarray[Any, Any]] = {}
    for name, target_samples in samples.items():
        for metric in metrics:
            sample = target_samples.samples[metric]
            if len(sample):
                replicates[name, metric] = replicate_percentiles(sample, quantiles, settings.resamples, rng)
    pairs = []
    for a, b in combinations(samples, 2):
        usable = [m for m in metrics if (a, m) in replicates and (b, m) in replicates]
        family = len(usable) * len(quantiles)
        per_interval = 1.0 - (1.0 - settings.confidence) / max(1, family)
        rows = []
        for metric in usable:
            sample_a, sample_b = samples[a].samples[metric], samples[b].samples[metric]
            for column, q in enumerate(quantiles):
                a_ms = max(percentile(sample_a, q), FLOOR_MS)
                b_ms = max(percentile(sample_b, q), FLOOR_MS)
                interval = ratio_of_replicates(
                    a_ms / b_ms,
                    np.maximum(replicates[a, metric][:, column], FLOOR_MS),
                    np.maximum(replicates[b, metric][:, column], FLOOR_MS),
                    per_interval,
                )
                requests = min(sample_a.clusters, sample_b.clusters)
                verdict, reason, more = judge(interval, settings.smallest_difference, requests)
                rows.append(
                    MetricComparison(metric, q, a_ms, b_ms, interval, verdict, reason, more, requests)
                )
        pairs.append(PairComparison(a, b, tuple(rows), settings.confidence))
    return pairs


def _scale_to_decide(effect: float, low: float, high: float, margin: float) -> float | None:
    """By how much the interval (log scale, around the estimate) must shrink to decide.

    Beyond the margin the side of the interval toward 1 must stop short of 1; inside the
    margin both sides must fit within it. None when no shrinking would do (the estimate
    sits on a boundary, or the interval has no width).
    """
    above, below = high - effect, effect - low
    if abs(effect) >= margin:
        toward_one = below if effect > 0 else above
        limits = [abs(effect) / toward_one] if toward_one > 0 else []
    else:
        limits = [(margin - effect) / above if above > 0 else math.inf]
        limits.append((margin + effect) / below if below > 0 else math.inf)
    scale = min(limits, default=math.inf)
    return scale if 0.0 < scale < math.inf else None


def judge(interval: Interval, smallest: float, requests: int) -> tuple[Verdict, str, int | None]:
    """Verdict on a ratio A/B of latencies, why, and how many more requests would tell."""
    estimate, low, high = interval.estimate, interval.low, interval.high
    margin = math.log1p(smallest)
    effect = math.log(estimate)
    if high < 1.0 and effect <= -margin:
        return Verdict.FASTER, f"{1 - estimate:.0%} lower; the interval lies below 1", 0
    if low > 1.0 and effect >= margin:
        return Verdict.SLOWER, f"{estimate - 1:.0%} higher; the interval lies above 1", 0
    if smallest > 0 and math.log(low) >= -margin and math.log(high) <= margin:
        return Verdict.NO_DIFFERENCE, f"the same within +-{smallest:.0%}", 0
    scale = _scale_to_decide(effect, math.log(low), math.log(high), margin)
    if scale is None:
        return Verdict.NO_DIFFERENCE, "this sample cannot tell", None
    more = max(1, math.ceil(round(requests / scale**2, 6)) - requests)
    if abs(effect) >= margin or low <= 1.0 <= high:
        reason = "this sample cannot tell"
    else:
        reason = f"a real but small difference; this sample cannot tell whether it exceeds {smallest:.0%}"
    return Verdict.NO_DIFFERENCE, reason, more


# --- per-target results ---------------------------------------------------------------


def compliance_of(row: Mapping[str, Any]) -> bool | None:
    """Whether a record's answer passed its checks, when the record carries that at all."""
    for key in ("compliant", "complied", "compliance", "check"):
        value = row.get(key)
        if isinstance(value, bool):
            return value
        if isinstance(value, Mapping):
            for inner in ("passed", "compliant", "complied", "ok"):
                if isinstance(value.get(inner), bool):
                    return bool(value[inner])
    return None


def target_aggregate(
    rows: Sequence[Mapping[str, Any]], summaries: Sequence[Mapping[str, Any]], spec: TargetSpec
) -> dict[str, Any]:
    """One target's results over all its rounds at one load level."""
    measured = [row for row in rows if row.get("in_window", True)]
    outcomes = Counter(str(row.get("outcome")) for row in measured)
    ok_rows = [row for row in measured if row.get("outcome") == "ok"]
    failed = len(measured) - len(ok_rows)
    errors = Counter(_short(str(row["error"])) for row in measured if row.get("error"))
    histograms = _merged_histograms(summaries)
    seconds = sum(float(s.get("window", {}).get("seconds") or 0.0) for s in summaries)
    completed = sum(
        float(s.get("throughput", {}).get("requests_per_s") or 0.0)
        * float(s.get("window", {}).get("seconds") or 0)
        for s in summaries
    )
    tokens_out = sum(
        float(s.get("throughput", {}).get("output_tokens_per_s") or 0.0)
        * float(s.get("window", {}).get("seconds") or 0)
        for s in summaries
    )
    requests_per_s = completed / seconds if seconds else 0.0
    output_tokens = [int(row.get("output_tokens") or 0) for row in ok_rows]
    input_reported = [row["prompt_tokens"] for row in ok_rows if isinstance(row.get("prompt_tokens"), int)]
    checked = [flag for flag in (compliance_of(row) for row in ok_rows) if flag is not None]
    return {
        "rounds": len(summaries),
        "requests": {
            "measured": len(measured),
            "ok": len(ok_rows),
            "failed": failed,
            "by_outcome": dict(sorted(outcomes.items())),
            "error_share": failed / len(measured) if measured else None,
            "rate_limited_share": outcomes.get("rate_limited", 0) / len(measured) if measured else None,
            "top_errors": dict(errors.most_common(5)),
        },
        "latency": histograms.summary() if histograms is not None else {},
        "throughput": {
            "requests_per_s": requests_per_s,
            "output_tokens_per_s": tokens_out / seconds if seconds else 0.0,
            "measured_seconds": seconds,
        },
        "tokens": {
            "output_mean": float(np.mean(output_tokens)) if output_tokens else None,
            "output_p50": float(np.median(output_tokens)) if output_tokens else None,
            "input_mean": float(np.mean(input_reported)) if input_reported else None,
            "input_from_usage": len(input_reported) == len(ok_rows) and bool(ok_rows),
        },
        "compliance": (
            {"checked": len(checked), "compliant": sum(checked), "rate": sum(checked) / len(checked)}
            if checked
            else None
        ),
        "by_class": _by_class(ok_rows),
        "cost": _cost(spec, ok_rows, requests_per_s),
        "generator_limited_rounds": sum(1 for s in summaries if s.get("generator", {}).get("limited")),
        "stopped_rounds": sum(1 for s in summaries if s.get("interrupted") or s.get("aborted")),
    }


def _by_class(ok_rows: Sequence[Mapping[str, Any]]) -> dict[str, Any]:
    """Verbosity and compliance per request class, when the profile mixes classes."""
    names = sorted({str(row["class"]) for row in ok_rows if row.get("class")})
    if len(names) < 2:
        return {}
    out = {}
    for name in names:
        rows = [row for row in ok_rows if row.get("class") == name]
        checked = [flag for flag in (compliance_of(row) for row in rows) if flag is not None]
        out[name] = {
            "ok": len(rows),
            "output_mean": float(np.mean([int(row.get("output_tokens") or 0) for row in rows])),
            "checked": len(checked),
            "compliance_rate": sum(checked) / len(checked) if checked else None,
        }
    return out


def _merged_histograms(summaries: Sequence[Mapping[str, Any]]) -> HistogramSet | None:
    merged: HistogramSet | None = None
    for summary in summaries:
        encoded = summary.get("histograms")
        if not encoded:
            continue
        histograms = HistogramSet.decode(encoded)
        if merged is None:
            merged = histograms
        else:
            merged.merge(histograms)
    return merged


def _cost(
    spec: TargetSpec, ok_rows: Sequence[Mapping[str, Any]], requests_per_s: float
) -> dict[str, Any] | None:
    prices = spec.prices
    if not prices.known:
        return None
    if prices.per_token:
        estimated = 0
        costs = []
        for row in ok_rows:
            prompt = row.get("prompt_tokens")
            if not isinstance(prompt, int):
                prompt = int(row.get("requested_input_tokens") or 0)
                estimated += 1
            costs.append(prices.request_cost(prompt, int(row.get("output_tokens") or 0)))
        per_request = float(np.mean(costs)) if costs else None
        basis = "tokens"
    else:
        per_request = prices.hourly_request_cost(requests_per_s) if requests_per_s > 0 else None
        estimated = 0
        basis = "hour"
    return {
        "currency": prices.currency,
        "basis": basis,
        "per_request": per_request,
        "per_1000_requests": per_request * 1000 if per_request is not None else None,
        "requests_with_estimated_input": estimated,
    }


def _short(message: str) -> str:
    return message if len(message) <= 120 else message[:117] + "..."


# --- cautions -------------------------------------------------------------------------


def comparison_cautions(data: Mapping[str, Any]) -> list[str]:
    """What a reader must keep in mind, in plain sentences."""
    cautions = [CAUTION]
    settings = data.get("settings", {})
    names = [target["name"] for target in data.get("targets", [])]
    mocks = [target["name"] for target in data.get("targets", []) if target.get("mock_engine")]
    if mocks:
        cautions.append(
            f"{', '.join(mocks)} {'is' if len(mocks) == 1 else 'are'} the bundled mock server "
            "(a simulated engine on this machine), not a real provider."
        )
    if data.get("stopped_early"):
        cautions.append(f"The comparison stopped early: {data['stopped_early']}; later rounds are missing.")
    for level in data.get("levels", []):
        small: list[str] = []
        for name, aggregate in level.get("targets", {}).items():
            where = f"{name} at concurrency {level['concurrency']}"
            ok = aggregate["requests"]["ok"]
            if aggregate.get("generator_limited_rounds"):
                cautions.append(
                    f"{where}: {aggregate['generator_limited_rounds']} round(s) were generator-limited "
                    "(loadrun's own event loop lagged): those timings are not trustworthy."
                )
            if aggregate.get("stopped_rounds"):
                cautions.append(f"{where}: {aggregate['stopped_rounds']} round(s) stopped early.")
            if ok < SMALL_SAMPLE:
                small.append(f"{name} {ok}")
            share = aggregate["requests"].get("error_share")
            if share:
                cautions.append(
                    f"{where}: {share:.1%} of requests failed. Failed requests are left out of the "
                    "latency percentiles, so a target that fails fast can look fast."
                )
            cost = aggregate.get("cost")
            if cost and cost.get("requests_with_estimated_input"):
                cautions.append(
                    f"{where}: the server reported no input token count for "
                    f"{cost['requests_with_estimated_input']} request(s); "
                    "their cost uses the requested length."
                )
            if cost and cost.get("basis") == "hour":
                cautions.append(
                    f"{where}: the per-hour price is spread over the requests the server completed at this "
                    "load; an idle or busier server costs more or less per request."
                )
        if small:
            cautions.append(
                f"Few successful requests at concurrency {level['concurrency']} ({', '.join(small)}): "
                "high percentiles (p90 and up) rest on a handful of requests, so their intervals are wide."
            )
    cautions.append(
        f"Targets ran one at a time, in rounds ({' '.join(names)}, repeated {settings.get('rounds')} times "
        "per load level), so that drift over time hits every target alike; nothing else ran on purpose "
        "beside them, but this machine and the network are shared."
    )
    return cautions
