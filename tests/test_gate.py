"""The gate's rules, verdicts and baselines, on synthetic runs (no load is sent)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from _gate_samples import TARGET, synthetic_run, write_run_folder

from loadrun.bootstrap import Change
from loadrun.errors import UsageError
from loadrun.gate import (
    DEFAULT_RULES,
    GateSettings,
    Rule,
    Verdict,
    gate_folder,
    gate_measure,
    gate_summary,
    validity_problems,
)
from loadrun.history import History, RunFilter
from loadrun.profile import LoadSpec, Profile
from loadrun.runner import MeasureSettings
from loadrun.target import Target


@pytest.fixture
def settings(tmp_path: Path) -> GateSettings:
    return GateSettings(history_path=tmp_path / "history.sqlite3")


def run(seed: int, **changes: object) -> tuple[dict[str, object], dict[str, object]]:
    return synthetic_run(seed, started_at=f"2026-03-{seed % 28 + 1:02d}T03:00:00+0000", **changes)  # type: ignore[arg-type]


# rules ----------------------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("text", "label", "pct", "ms"),
    [
        ("ttft.p95 15%", "ttft.p95 15%", 15.0, None),
        ("ttft.p95 15% 50ms", "ttft.p95 15% 50ms", 15.0, 50.0),
        ("e2e.p99.9 +200ms", "e2e.p99.9 200ms", None, 200.0),
        ("TPOT.P50, 10%", "tpot.p50 10%", 10.0, None),
        ("itl.p90 50ms 2.5%", "itl.p90 2.5% 50ms", 2.5, 50.0),
    ],
)
def test_rules_parse(text: str, label: str, pct: float | None, ms: float | None) -> None:
    rule = Rule.parse(text)
    assert (rule.label, rule.max_rise_pct, rule.max_rise_ms) == (label, pct, ms)
    assert Rule.parse(rule.label) == rule


@pytest.mark.parametrize(
    "text",
    ["ttft.p95", "ttft.p95 15", "ttft.p95 15% 20%", "ttft.p95 5ms 6ms", "ttft.p95 fast", "ttfb.p95 15%"],
)
def test_bad_rules_are_usage_errors(text: str) -> None:
    with pytest.raises(UsageError):
        Rule.parse(text)


def change(ratio_low: float, rise_low_ms: float) -> Change:
    return Change(95.0, 1.0, 1.0, 1.0, ratio_low, 2.0, 0.0, rise_low_ms * 1000, 1e9, 0.95, 100)


def test_both_limits_must_be_exceeded_by_the_whole_interval() -> None:
    rule = Rule.parse("ttft.p95 15% 50ms")
    assert rule.is_exceeded_by(change(1.16, 51))
    assert not rule.is_exceeded_by(change(1.14, 500))  # slower by 500 ms, but not by 15 %
    assert not rule.is_exceeded_by(change(1.5, 49))  # 50 % slower, but not by 50 ms
    assert Rule.parse("ttft.p95 15%").is_exceeded_by(change(1.16, 0))
    assert not Rule.parse("ttft.p95 15%").is_exceeded_by(change(1.15, 0))


def test_settings_are_checked(tmp_path: Path) -> None:
    for bad in ({"rules": ()}, {"last": 0}, {"confidence": 1.0}, {"max_error_rate": 2.0}, {"min_samples": 0}):
        with pytest.raises(UsageError):
            GateSettings(history_path=tmp_path / "h", **bad)  # type: ignore[arg-type]


# verdicts ---------------------------------------------------------------------------------------
def test_first_run_has_no_baseline_and_becomes_it(settings: GateSettings) -> None:
    report = gate_summary(*run(1), settings)
    assert report.verdict is Verdict.NO_BASELINE and report.exit_code == 0
    assert "becomes the first" in report.reasons[0]
    assert all(rule.note and "no baseline" in rule.note for rule in report.rules)
    with History(settings.history_path) as history:
        assert history.get(report.run_id or 0).verdict == "no_baseline"
    second = gate_summary(*run(2), settings)
    assert second.verdict is Verdict.PASS and second.exit_code == 0
    assert second.baseline_ids == [report.run_id]


def test_a_quarter_slower_is_a_regression(settings: GateSettings) -> None:
    for seed in range(1, 4):
        gate_summary(*run(seed), settings)
    report = gate_summary(*run(4, scale=1.25), settings)
    assert report.verdict is Verdict.REGRESSION and report.exit_code == 1
    assert {result.rule.label for result in report.rules if result.regressed} == {
        r.label for r in DEFAULT_RULES
    }
    for result in report.rules:
        assert result.change is not None
        assert result.change.ratio == pytest.approx(1.25, abs=0.06)
        assert result.change.ratio_low > 1.15
    assert report.baseline_kind == "median of the last 3 passing runs"
    assert len(report.reasons) == 3 and "x1.2" in report.reasons[0]


def test_same_service_again_passes(settings: GateSettings) -> None:
    verdicts = [gate_summary(*run(seed), settings).verdict for seed in range(1, 9)]
    assert verdicts == [Verdict.NO_BASELINE] + [Verdict.PASS] * 7


def test_a_regressed_run_never_becomes_a_baseline(settings: GateSettings) -> None:
    first = gate_summary(*run(1), settings)
    slow = gate_summary(*run(2, scale=1.4), settings)
    assert slow.verdict is Verdict.REGRESSION
    # Still slow the next night: compared with the good run, so still a regression.
    again = gate_summary(*run(3, scale=1.4), settings)
    assert again.verdict is Verdict.REGRESSION and again.baseline_ids == [first.run_id]
    back = gate_summary(*run(4), settings)
    assert back.verdict is Verdict.PASS and back.baseline_ids == [first.run_id]


def test_last_k_limits_the_baseline(tmp_path: Path) -> None:
    settings = GateSettings(history_path=tmp_path / "h.sqlite3", last=2)
    ids = [gate_summary(*run(seed), settings).run_id for seed in range(1, 5)]
    report = gate_summary(*run(5), settings)
    assert report.baseline_ids == [ids[3], ids[2]]
    assert report.baseline_kind == "median of the last 2 passing runs"


def test_a_rise_below_the_absolute_limit_passes(tmp_path: Path) -> None:
    """25 % of a 20 ms TPOT is 5 ms: under a 15 % AND 10 ms rule that is no regression."""
    settings = GateSettings(history_path=tmp_path / "h.sqlite3", rules=(Rule.parse("tpot.p95 15% 10ms"),))
    gate_summary(*run(1), settings)
    report = gate_summary(*run(2, scale=1.25), settings)
    assert report.verdict is Verdict.PASS
    assert report.rules[0].change is not None and report.rules[0].change.ratio_low > 1.15


@pytest.mark.parametrize(
    ("changes", "words"),
    [
        ({"failed": 40}, "too many errors"),
        ({"limited": True}, "generator-limited"),
        ({"requests": 40}, "too few samples"),
    ],
)
def test_invalid_runs(settings: GateSettings, changes: dict[str, object], words: str) -> None:
    gate_summary(*run(1), settings)
    report = gate_summary(*run(2, **changes), settings)
    assert report.verdict is Verdict.INVALID and report.exit_code == 2
    assert any(words in reason for reason in report.reasons), report.reasons
    assert all(rule.change is None for rule in report.rules)


def test_an_invalid_first_run_is_not_a_baseline(settings: GateSettings) -> None:
    assert gate_summary(*run(1, failed=100), settings).verdict is Verdict.INVALID
    assert gate_summary(*run(2), settings).verdict is Verdict.NO_BASELINE


def test_validity_problems_name_every_problem(settings: GateSettings) -> None:
    summary, _ = run(1, failed=100, limited=True, requests=30)
    summary["interrupted"] = True
    summary["aborted"] = "20 requests in a row could not connect"
    problems = " | ".join(validity_problems(summary, settings))
    for words in ("too many errors", "generator-limited", "interrupted", "stopped early", "too few samples"):
        assert words in problems
    summary["requests"] = {"measured": 0, "failed": 0}
    assert validity_problems(summary, settings)[0] == "no request was measured"


def test_a_pinned_run_is_the_baseline(settings: GateSettings) -> None:
    ids = [gate_summary(*run(seed), settings).run_id for seed in range(1, 4)]
    with History(settings.history_path) as history:
        history.pin(ids[0] or 0)
    report = gate_summary(*run(4), settings)
    assert report.baseline_ids == [ids[0]] and report.baseline_kind == f"run {ids[0]}, pinned"


def test_a_chosen_run_is_the_baseline_even_of_another_profile(settings: GateSettings, tmp_path: Path) -> None:
    other = gate_summary(*run(1, concurrency=32), settings)
    chosen = GateSettings(history_path=settings.history_path, baseline_id=other.run_id)
    report = gate_summary(*run(2), chosen)
    assert report.verdict in (Verdict.PASS, Verdict.REGRESSION)
    assert report.baseline_ids == [other.run_id]
    assert any("another profile" in reason for reason in report.reasons)
    with pytest.raises(UsageError):
        gate_summary(*run(3), GateSettings(history_path=settings.history_path, baseline_id=999))


def test_baselines_are_per_target_and_profile(settings: GateSettings) -> None:
    gate_summary(*run(1), settings)
    assert gate_summary(*run(2, target_name="other-desk"), settings).verdict is Verdict.NO_BASELINE
    assert gate_summary(*run(3, concurrency=16), settings).verdict is Verdict.NO_BASELINE
    renamed = GateSettings(history_path=settings.history_path, target_name=TARGET)
    report = gate_summary(*run(4, target_name="other-desk"), renamed)
    assert report.verdict is Verdict.PASS and report.target_name == TARGET


def test_gating_a_run_folder_twice_keeps_one_row(settings: GateSettings, tmp_path: Path) -> None:
    gate_summary(*run(1), settings)
    folder = write_run_folder(tmp_path / "runs", *run(2))
    first = gate_folder(folder, settings)
    again = gate_folder(folder, settings)
    assert first.verdict is again.verdict is Verdict.PASS
    assert first.run_id == again.run_id
    assert again.baseline_ids != [again.run_id]  # never its own baseline
    with History(settings.history_path) as history:
        assert len(history.find(RunFilter())) == 2
    with pytest.raises(UsageError):
        gate_folder(tmp_path, settings)


def test_report_json_is_complete_and_serialisable(settings: GateSettings) -> None:
    gate_summary(*run(1), settings)
    data = json.loads(json.dumps(gate_summary(*run(2), settings).to_json()))
    assert data["verdict"] == "pass" and data["exit_code"] == 0
    assert data["target"] == TARGET and data["target_url"] == "http://127.0.0.1:9/v1"
    assert data["baseline"]["run_ids"] == [1]
    rule = data["rules"][0]
    assert rule["rule"] == "ttft.p95 15%" and rule["regressed"] is False
    low, high = rule["ratio_interval"]
    assert low <= rule["ratio"] <= high
    assert rule["current_ms"] > 0 and rule["baseline_ms"] > 0


def test_an_unreachable_target_is_an_invalid_run(settings: GateSettings) -> None:
    # Port 1 on loopback: nothing listens there, the connection is refused at once.
    target = Target(base_url="http://127.0.0.1:1/v1", model="m", name="down-desk")
    measure = MeasureSettings(
        profile=Profile(load=LoadSpec()), target=target, requests=3, out_dir=None, connect_timeout_s=2.0
    )
    report = gate_measure(measure, settings)
    assert report.verdict is Verdict.INVALID and report.exit_code == 2
    assert "TargetUnreachable" in report.reasons[0]
    assert report.target_name == "down-desk" and report.run_id is None


def test_a_run_stopped_by_a_signal_is_invalid_and_says_which(settings: GateSettings) -> None:
    gate_summary(*run(1), settings)
    summary, config = run(2)
    summary["interrupted"] = True
    summary["interrupt"] = {"signal": "SIGTERM", "grace_s": 5.0}
    report = gate_summary(summary, config, settings)
    assert report.verdict is Verdict.INVALID and report.interrupted_by == "SIGTERM"
    assert "interrupted by SIGTERM" in report.reasons[0]
    assert report.to_json()["interrupted_by"] == "SIGTERM"
