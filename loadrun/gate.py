"""The regression gate: one run against its baseline, decided by rules and a bootstrap test.

    from loadrun.gate import GateSettings, Rule, gate_measure
    report = gate_measure(measure_settings, GateSettings(history_path=Path("runs/history.sqlite3")))
    raise SystemExit(report.exit_code)

Steps, in order:

1. **Validity.** A run with too many failed requests, a generator-limited or interrupted
   run, or a rule metric with too few samples proves nothing: verdict ``invalid`` (exit 2).
2. **Baseline.** A run named by id; else the pinned run of the same target and profile;
   else the median of the last K runs of the same target and profile that passed. None:
   verdict ``no_baseline`` (exit 0 with a notice) and this run becomes the first baseline.
3. **Rules.** Each rule names a percentile of a metric and how far it may rise, as a
   ratio, in milliseconds, or both (then both must be exceeded). A rule fails only when
   the whole bootstrap interval lies beyond its limits (see ``loadrun.bootstrap``), so a
   run that is merely noisy does not page anyone. Any failed rule: ``regression`` (exit 1).

The run is then stored in the history database with its verdict, so that passing runs
become the baselines of later ones.
"""

from __future__ import annotations

import enum
import re
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

from loadrun._version import __version__
from loadrun.errors import TargetError, UsageError
from loadrun.generator_health import generator_note
from loadrun.history import History, HistoryRun, MetricPercentile, profile_hash, strip_credentials
from loadrun.metrics import HistogramSet
from loadrun.runner import MeasureSettings, measure
from loadrun.store import CONFIG_FILE, SUMMARY_FILE, RunFolder

if TYPE_CHECKING:  # numpy is imported only when a rule is compared
    from loadrun.bootstrap import Change

__all__ = [
    "DEFAULT_RULES",
    "GateReport",
    "GateSettings",
    "Rule",
    "RuleResult",
    "Verdict",
    "evaluate",
    "gate_folder",
    "gate_measure",
    "gate_summary",
]


class Verdict(enum.StrEnum):
    PASS = "pass"
    REGRESSION = "regression"
    INVALID = "invalid"
    NO_BASELINE = "no_baseline"

    @property
    def exit_code(self) -> int:
        return _EXIT_CODES[self]


_EXIT_CODES = {Verdict.PASS: 0, Verdict.REGRESSION: 1, Verdict.INVALID: 2, Verdict.NO_BASELINE: 0}

_LIMIT = re.compile(r"^\+?(?P<number>\d+(?:\.\d+)?)(?P<unit>%|ms)$")


@dataclass(frozen=True, slots=True)
class Rule:
    """How far one percentile may rise against the baseline: ``ttft.p95 15% 50ms``."""

    target: MetricPercentile
    max_rise_pct: float | None = None
    max_rise_ms: float | None = None

    def __post_init__(self) -> None:
        if self.max_rise_pct is None and self.max_rise_ms is None:
            raise UsageError(f"rule {self.target.label}: give a limit in % or ms (or both)")

    @classmethod
    def parse(cls, text: str) -> Rule:
        """``METRIC.pNN`` then one or two limits, ``15%`` and/or ``50ms``; both must be exceeded."""
        words = text.replace(",", " ").split()
        if len(words) not in (2, 3):
            raise UsageError(
                f"rule {text!r}: write e.g. 'ttft.p95 15%', 'e2e.p99 200ms' or 'ttft.p95 15% 50ms'"
            )
        target = MetricPercentile.parse(words[0])
        pct: float | None = None
        ms: float | None = None
        for word in words[1:]:
            match = _LIMIT.match(word.lower())
            if match is None:
                raise UsageError(f"rule {text!r}: {word!r} is not a limit like 15% or 50ms")
            number = float(match["number"])
            if match["unit"] == "%":
                if pct is not None:
                    raise UsageError(f"rule {text!r}: two limits in %")
                pct = number
            else:
                if ms is not None:
                    raise UsageError(f"rule {text!r}: two limits in ms")
                ms = number
        return cls(target, pct, ms)

    @property
    def label(self) -> str:
        limits = [
            f"{self.max_rise_pct:g}%" if self.max_rise_pct is not None else "",
            f"{self.max_rise_ms:g}ms" if self.max_rise_ms is not None else "",
        ]
        return " ".join([self.target.label, *(limit for limit in limits if limit)])

    def is_exceeded_by(self, change: Change) -> bool:
        """True when the whole interval lies beyond every limit this rule sets."""
        beyond = True
        if self.max_rise_pct is not None:
            beyond = beyond and change.ratio_low > 1.0 + self.max_rise_pct / 100.0
        if self.max_rise_ms is not None:
            beyond = beyond and change.rise_low_us > self.max_rise_ms * 1000.0
        return beyond


DEFAULT_RULES: tuple[Rule, ...] = (
    Rule.parse("ttft.p95 15%"),
    Rule.parse("tpot.p95 15%"),
    Rule.parse("e2e.p95 15%"),
)
"""Used when no rule is given. 15 % is common practice for latency gates, no single source."""


@dataclass(frozen=True, slots=True)
class GateSettings:
    history_path: Path
    rules: tuple[Rule, ...] = DEFAULT_RULES
    target_name: str | None = None
    """Stored and matched instead of the target's own name (e.g. one name across deploys)."""
    baseline_id: int | None = None
    """Compare with this run of the history database, whatever else is there."""
    last: int = 5
    """Baseline: the median of the last this-many passing runs of the same target and profile."""
    confidence: float = 0.95
    resamples: int = 2000
    seed: int = 1
    max_error_rate: float = 0.05
    """Above this share of failed requests the run is invalid (common practice, no source)."""
    min_samples: int = 100
    """Fewer samples of a rule's metric make the run invalid (common practice, no source)."""

    def __post_init__(self) -> None:
        if not self.rules:
            raise UsageError("the gate needs at least one rule")
        if self.last < 1:
            raise UsageError("the baseline needs at least one run (--last)")
        if not 0.5 <= self.confidence < 1.0:
            raise UsageError("confidence must lie in [0.5, 1)")
        if not 0.0 <= self.max_error_rate <= 1.0:
            raise UsageError("the error-rate limit must lie in [0, 1]")
        if self.min_samples < 1:
            raise UsageError("min samples must be at least 1")
        if self.resamples < 100:
            raise UsageError("at least 100 resamples are needed")


@dataclass(frozen=True, slots=True)
class RuleResult:
    rule: Rule
    regressed: bool
    change: Change | None
    note: str | None = None
    """Why the rule was not decided (e.g. the baseline has no samples of its metric)."""

    def to_json(self) -> dict[str, Any]:
        data: dict[str, Any] = {
            "rule": self.rule.label,
            "metric": self.rule.target.metric,
            "percentile": self.rule.target.percentile,
            "max_rise_pct": self.rule.max_rise_pct,
            "max_rise_ms": self.rule.max_rise_ms,
            "regressed": self.regressed,
            "note": self.note,
        }
        change = self.change
        if change is not None:
            data |= {
                "current_ms": change.current_us / 1000.0,
                "baseline_ms": change.baseline_us / 1000.0,
                "ratio": change.ratio,
                "ratio_interval": [change.ratio_low, change.ratio_high],
                "rise_ms": change.rise_us / 1000.0,
                "rise_interval_ms": [change.rise_low_us / 1000.0, change.rise_high_us / 1000.0],
            }
        return data


@dataclass(slots=True)
class GateReport:
    verdict: Verdict
    reasons: list[str]
    rules: list[RuleResult]
    target_name: str
    target_url: str
    profile_name: str
    profile_hash: str
    started_at: str
    run_folder: str | None
    baseline_ids: list[int] = field(default_factory=list)
    baseline_kind: str | None = None
    run_id: int | None = None
    confidence: float = 0.95
    measured: dict[str, Any] = field(default_factory=dict)
    """A few figures of the run: requests, failures, window, generator health."""
    history_path: str | None = None

    interrupted_by: str | None = None
    """The signal that stopped the run (SIGINT, SIGTERM), if one did."""

    @property
    def exit_code(self) -> int:
        return self.verdict.exit_code

    def to_json(self) -> dict[str, Any]:
        return {
            "verdict": self.verdict.value,
            "exit_code": self.exit_code,
            "reasons": list(self.reasons),
            "target": self.target_name,
            "target_url": self.target_url,
            "profile": self.profile_name,
            "profile_hash": self.profile_hash,
            "started_at": self.started_at,
            "run_id": self.run_id,
            "run_folder": self.run_folder,
            "baseline": {"kind": self.baseline_kind, "run_ids": list(self.baseline_ids)},
            "confidence": self.confidence,
            "rules": [result.to_json() for result in self.rules],
            "measured": dict(self.measured),
            "interrupted_by": self.interrupted_by,
            "history": self.history_path,
            "pages": _pages(self.run_folder),
            "loadrun_version": __version__,
        }


def _pages(run_folder: str | None) -> list[str]:
    """HTML reports that another step left in the run folder, to link to (none is needed)."""
    if not run_folder or not Path(run_folder).is_dir():
        return []
    return [str(path) for path in sorted(Path(run_folder).glob("*.html"))]


# ------------------------------------------------------------------------------------------
def gate_measure(measure_settings: MeasureSettings, settings: GateSettings) -> GateReport:
    """Measure the profile, then gate the run. A target that cannot be reached is ``invalid``."""
    try:
        result = measure(replace(measure_settings, record_history=False))
    except TargetError as exc:
        target = measure_settings.target
        config = {
            "target": target.describe() if target is not None else {"name": "embedded mock"},
            "profile": measure_settings.profile.describe(),
            "started_at": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        }
        report = _report_for(config, {}, settings)
        report.reasons.append(f"the target could not be measured: {type(exc).__name__}: {exc}")
        return _undecided(report, Verdict.INVALID, settings, "not compared: the run is invalid")
    return gate_summary(result.summary, result.config, settings)


def gate_folder(folder: str | Path, settings: GateSettings) -> GateReport:
    """Gate a finished run folder (its ``summary.json`` and ``config.json``)."""
    path = Path(folder)
    if not (path / SUMMARY_FILE).is_file():
        raise UsageError(f"{path} is not a finished run folder (no {SUMMARY_FILE})")
    run_folder = RunFolder(path)
    summary = dict(run_folder.read_json(SUMMARY_FILE))
    config = run_folder.read_json(CONFIG_FILE) if (path / CONFIG_FILE).is_file() else summary
    # The folder as given now, not as it was named from the directory the run started in.
    summary["run_folder"] = str(path)
    return gate_summary(summary, config, settings)


def gate_summary(summary: Mapping[str, Any], config: Mapping[str, Any], settings: GateSettings) -> GateReport:
    """Decide the verdict of one run and store the run in the history database with it."""
    with History(settings.history_path) as history:
        folder = summary.get("run_folder")
        stored = history.id_for_folder(folder) if folder else None
        report = evaluate(summary, config, settings, history, exclude_id=stored)
        report.run_id = history.record(
            summary,
            config,
            target_name=report.target_name,
            verdict=report.verdict.value,
            gate=report.to_json(),
        )
    return report


def evaluate(
    summary: Mapping[str, Any],
    config: Mapping[str, Any],
    settings: GateSettings,
    history: History,
    *,
    exclude_id: int | None = None,
) -> GateReport:
    """The verdict of one run against the history, without writing anything."""
    report = _report_for(config, summary, settings)
    report.history_path = str(settings.history_path)
    problems = validity_problems(summary, settings)
    if problems:
        report.reasons += problems
        return _undecided(report, Verdict.INVALID, settings, "not compared: the run is invalid")
    baselines, kind = _baselines(history, report, settings, exclude_id)
    if not baselines:
        report.reasons.append(
            f"no baseline yet for target {report.target_name!r} and profile {report.profile_name!r} "
            f"({report.profile_hash}): this run becomes the first"
        )
        return _undecided(report, Verdict.NO_BASELINE, settings, "not compared: no baseline yet")
    report.baseline_ids = [run.id for run in baselines]
    report.baseline_kind = kind
    current = HistogramSet.decode(summary.get("histograms") or {})
    baseline_sets = [history.histograms(run.id) for run in baselines]
    report.rules = [_apply(rule, current, baseline_sets, settings) for rule in settings.rules]
    regressed = [result for result in report.rules if result.regressed]
    report.verdict = Verdict.REGRESSION if regressed else Verdict.PASS
    for result in regressed:
        assert result.change is not None
        change = result.change
        report.reasons.append(
            f"{result.rule.label}: {change.current_us / 1000:.1f} ms against "
            f"{change.baseline_us / 1000:.1f} ms "
            f"(x{change.ratio:.2f}; {settings.confidence:.0%} interval x{change.ratio_low:.2f}"
            f"..x{change.ratio_high:.2f})"
        )
    return report


def validity_problems(summary: Mapping[str, Any], settings: GateSettings) -> list[str]:
    """Why this run cannot be judged; empty when it can."""
    problems = []
    requests = summary.get("requests") or {}
    measured = int(requests.get("measured") or 0)
    failed = int(requests.get("failed") or 0)
    if not measured:
        problems.append("no request was measured")
    elif failed / measured > settings.max_error_rate:
        problems.append(
            f"too many errors: {failed} of {measured} requests failed "
            f"({failed / measured:.1%} > {settings.max_error_rate:.1%})"
        )
    if (summary.get("generator") or {}).get("limited"):
        problems.append(
            "generator-limited: the load generator fell behind, its timings are not trustworthy"
            f" ({generator_note(summary)})"
        )
    workers = summary.get("workers") or {}
    if workers and not workers.get("complete", True):
        problems.append("incomplete: " + "; ".join(workers.get("problems") or ["a worker did not finish"]))
    interrupt = summary.get("interrupt") or {}
    if interrupt.get("signal"):
        problems.append(f"interrupted by {interrupt['signal']}: the run did not finish")
    elif summary.get("interrupted"):
        problems.append("interrupted: the run did not finish")
    if summary.get("aborted"):
        problems.append(f"stopped early: {summary['aborted']}")
    latency = summary.get("latency") or {}
    for metric in sorted({rule.target.metric for rule in settings.rules}):
        count = int((latency.get(metric) or {}).get("count") or 0)
        if measured and count < settings.min_samples:
            problems.append(f"too few samples: {metric} has {count} (at least {settings.min_samples} needed)")
    return problems


# ------------------------------------------------------------------------------------------
def _report_for(config: Mapping[str, Any], summary: Mapping[str, Any], settings: GateSettings) -> GateReport:
    target = dict(config.get("target") or {})
    profile = dict(config.get("profile") or {})
    requests = summary.get("requests") or {}
    generator = summary.get("generator") or {}
    return GateReport(
        interrupted_by=(summary.get("interrupt") or {}).get("signal"),
        verdict=Verdict.INVALID,
        reasons=[],
        rules=[],
        target_name=settings.target_name or str(target.get("name") or "target"),
        target_url=strip_credentials(str(target.get("base_url") or "")),
        profile_name=str(profile.get("name") or "profile"),
        profile_hash=profile_hash(config),
        started_at=str(config.get("started_at") or ""),
        run_folder=summary.get("run_folder"),
        confidence=settings.confidence,
        measured={
            "requests": requests.get("measured"),
            "failed": requests.get("failed"),
            "window_s": (summary.get("window") or {}).get("seconds"),
            "generator_limited": generator.get("limited"),
            "requests_per_s": (summary.get("throughput") or {}).get("requests_per_s"),
        },
    )


def _undecided(report: GateReport, verdict: Verdict, settings: GateSettings, note: str) -> GateReport:
    report.verdict = verdict
    report.rules = [RuleResult(rule, False, None, note) for rule in settings.rules]
    return report


def _baselines(
    history: History, report: GateReport, settings: GateSettings, exclude_id: int | None
) -> tuple[list[HistoryRun], str | None]:
    if settings.baseline_id is not None:
        run = history.get(settings.baseline_id)
        if run.profile_hash != report.profile_hash:
            report.reasons.append(
                f"note: baseline run {run.id} used another profile or load ({run.profile_hash})"
            )
        return [run], f"run {run.id}, chosen"
    pinned = history.pinned_run(report.target_name, report.profile_hash)
    if pinned is not None and pinned.id != exclude_id:
        return [pinned], f"run {pinned.id}, pinned"
    runs = history.passing_runs(report.target_name, report.profile_hash, settings.last, exclude_id)
    if not runs:
        return [], None
    if len(runs) == 1:
        return runs, "the last passing run"
    return runs, f"median of the last {len(runs)} passing runs"


def _apply(
    rule: Rule, current: HistogramSet, baselines: Sequence[HistogramSet], settings: GateSettings
) -> RuleResult:
    from loadrun.bootstrap import Distribution, bootstrap_change

    metric = rule.target.metric
    try:
        current_samples = Distribution.from_histogram(current.get(metric))
        baseline_samples = [Distribution.from_histogram(base.get(metric)) for base in baselines]
    except KeyError:
        return RuleResult(rule, False, None, f"{metric} is missing from a histogram set")
    baseline_samples = [base for base in baseline_samples if base.count]
    if not current_samples.count or not baseline_samples:
        return RuleResult(rule, False, None, f"no {metric} samples to compare")
    change = bootstrap_change(
        current_samples,
        baseline_samples,
        rule.target.percentile,
        confidence=settings.confidence,
        resamples=settings.resamples,
        seed=settings.seed,
    )
    return RuleResult(rule, rule.is_exceeded_by(change), change)
