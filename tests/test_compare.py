"""Comparisons: verdict rules, per-target results, and real interleaved rounds against mocks."""

from __future__ import annotations

import json
import math
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from loadrun.compare import (
    CompareSettings,
    MetricSamples,
    Verdict,
    compare,
    compare_samples,
    compliance_of,
    judge,
    plan_text,
    target_aggregate,
)
from loadrun.errors import UsageError
from loadrun.profile import LoadSpec, Profile, RequestSpec
from loadrun.stats import Interval
from loadrun.store import read_records
from loadrun.targets import Prices, TargetSpec

LOCAL = "http://127.0.0.1:9/v1"


def spec(name: str, **changes: Any) -> TargetSpec:
    return TargetSpec(name=name, model="m", base_url=changes.pop("base_url", LOCAL), **changes)


# --- verdicts ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("estimate", "low", "high", "verdict", "decided"),
    [
        (0.80, 0.75, 0.86, Verdict.FASTER, True),
        (1.30, 1.10, 1.50, Verdict.SLOWER, True),
        (1.01, 0.98, 1.04, Verdict.NO_DIFFERENCE, True),  # the same within +-5 %
        (1.03, 1.01, 1.06, Verdict.NO_DIFFERENCE, False),  # real but maybe below 5 %
        (0.80, 0.60, 1.10, Verdict.NO_DIFFERENCE, False),  # cannot tell yet
        (1.02, 0.90, 1.15, Verdict.NO_DIFFERENCE, False),
    ],
)
def test_judge(estimate: float, low: float, high: float, verdict: Verdict, decided: bool) -> None:
    got, reason, more = judge(Interval(estimate, low, high, 0.99), 0.05, 100)
    assert got is verdict, reason
    assert (more == 0) is decided
    if not decided:
        assert more is not None and more >= 1


def test_more_requests_follow_the_square_root_law() -> None:
    """Interval (log scale) twice as wide as the effect toward 1: four times the requests."""
    estimate = 0.8
    effect = abs(math.log(estimate))
    interval = Interval(estimate, estimate * math.exp(-2 * effect), estimate * math.exp(2 * effect), 0.99)
    verdict, _reason, more = judge(interval, 0.05, 100)
    assert verdict is Verdict.NO_DIFFERENCE
    assert more == 300  # 100 * (2 effect / effect)^2 = 400 in all, 300 more


def test_a_large_margin_hides_small_differences() -> None:
    interval = Interval(0.90, 0.88, 0.92, 0.99)
    assert judge(interval, 0.05, 500)[0] is Verdict.FASTER
    assert judge(interval, 0.15, 500)[0] is Verdict.NO_DIFFERENCE


# --- per-target results -------------------------------------------------------------------


def row(ok: bool = True, **fields: Any) -> dict[str, Any]:
    base = {
        "in_window": True,
        "outcome": "ok" if ok else "rate_limited",
        "error": None if ok else "HTTP 429: slow down",
        "intended_us": 0,
        "send_us": 0,
        "first_token_us": 100_000,
        "end_us": 1_100_000,
        "chunk_offsets_us": [100_000 + 10_000 * i for i in range(101)],
        "output_tokens": 101 if ok else 0,
        "prompt_tokens": 2000 if ok else None,
        "requested_input_tokens": 1900,
    }
    return base | fields


def test_aggregate_counts_shares_tokens_compliance_and_cost() -> None:
    rows = [row(), row(compliant=True), row(compliant=False), row(ok=False), row(in_window=False)]
    rows.append(row(prompt_tokens=None))  # no usage reported: cost uses the requested length
    summaries = [
        {"window": {"seconds": 10.0}, "throughput": {"requests_per_s": 0.4, "output_tokens_per_s": 40}}
    ]
    target = spec("t", prices=Prices(input_per_million=30.0, output_per_million=0.0))
    result = target_aggregate(rows, summaries, target)
    assert result["requests"]["measured"] == 5
    assert result["requests"]["by_outcome"] == {"ok": 4, "rate_limited": 1}
    assert result["requests"]["error_share"] == pytest.approx(0.2)
    assert result["requests"]["rate_limited_share"] == pytest.approx(0.2)
    assert result["requests"]["top_errors"] == {"HTTP 429: slow down": 1}
    assert result["tokens"]["output_mean"] == 101
    assert result["compliance"] == {"checked": 2, "compliant": 1, "rate": 0.5}
    # $30 per million input tokens is $0.03 per 1,000: 2,000 tokens cost $0.06 (common
    # practice, no source); the request without usage is costed at 1,900 tokens: $0.057.
    cost = result["cost"]
    assert cost["per_request"] == pytest.approx((3 * 0.06 + 0.057) / 4, abs=1e-12)
    assert cost["per_1000_requests"] == pytest.approx(cost["per_request"] * 1000)
    assert cost["requests_with_estimated_input"] == 1
    assert result["throughput"]["requests_per_s"] == pytest.approx(0.4)


def test_hourly_cost_spreads_the_hour_over_completed_requests() -> None:
    summaries = [
        {"window": {"seconds": 5.0}, "throughput": {"requests_per_s": 2.0}},
        {"window": {"seconds": 5.0}, "throughput": {"requests_per_s": 4.0}},
    ]
    result = target_aggregate([row()], summaries, spec("box", prices=Prices(per_hour=3.6)))
    # 30 requests in 10 s: 3 requests/s; $3.60 an hour is $0.001 a second.
    assert result["throughput"]["requests_per_s"] == pytest.approx(3.0)
    assert result["cost"]["per_request"] == pytest.approx(0.001 / 3)
    assert target_aggregate([row()], summaries, spec("free"))["cost"] is None


def test_compliance_is_read_when_records_carry_it() -> None:
    assert compliance_of({"compliant": True}) is True
    assert compliance_of({"compliance": {"passed": False, "check": "regex"}}) is False
    assert compliance_of({"outcome": "ok"}) is None


def test_samples_come_from_successful_measured_requests_only() -> None:
    samples = MetricSamples.from_rows([row(), row(ok=False), row(in_window=False)])
    assert samples.requests == 1
    assert samples.samples["ttft"].values.tolist() == [100.0]
    assert samples.samples["e2e"].values.tolist() == [1100.0]
    assert samples.samples["tpot"].values.tolist() == [10.0]
    assert len(samples.samples["itl"]) == 100


# --- settings and safety -----------------------------------------------------------------


def test_settings_are_validated() -> None:
    with pytest.raises(UsageError, match="at least two targets"):
        CompareSettings(targets=(spec("a"),))
    with pytest.raises(UsageError, match="repeat"):
        CompareSettings(targets=(spec("a"), spec("a")))
    with pytest.raises(UsageError, match="not both"):
        CompareSettings(targets=(spec("a"), spec("b")), requests_per_round=5, seconds_per_round=1.0)
    rounds = CompareSettings(
        targets=(spec("a"), spec("b")), profile=Profile(load=LoadSpec(requests=100)), rounds=3
    )
    assert rounds.round_shape() == (34, None)


def test_remote_targets_need_confirmation_and_a_window_that_fits(tmp_path: Path) -> None:
    remote = spec("far", base_url="https://api.gullwing.invalid/v1", prices=Prices(1.0, 2.0))
    settings = CompareSettings(targets=(spec("near"), remote), out_dir=tmp_path, requests_per_round=10)
    with pytest.raises(UsageError, match="far not on this machine"):
        compare(settings)
    text = plan_text(settings)
    assert "far: https://api.gullwing.invalid/v1" in text and "near" not in text.split("\n", 1)[1]
    assert "permission" in text
    tiny = CompareSettings(targets=(spec("a"), spec("b", context_window=100)), out_dir=tmp_path)
    with pytest.raises(UsageError, match="context window is 100"):
        compare(tiny)
    assert not list(tmp_path.iterdir())  # refused before anything was sent or written


# --- against the bundled mock ---------------------------------------------------------------


def engine_file(folder: Path, name: str, step_ms: float) -> str:
    """A mock engine whose every decode step takes ``step_ms``, whatever the batch."""
    path = folder / f"{name}.toml"
    path.write_text(
        f'model = "{name}"\nstep_base_ms = {step_ms}\ndecode_per_seq_ms = 0.0\nprefill_per_token_ms = 0.0\n'
        "max_running = 64\ncontext_window = 8192\ntokens_per_word = 1.0\n",
        encoding="utf-8",
    )
    return str(path)


def short_profile(output_tokens: int) -> Profile:
    return Profile(name="short", request=RequestSpec(input_tokens=16, output_tokens=output_tokens))


@pytest.mark.slow
def test_a_target_with_twenty_percent_shorter_steps_is_called_faster(tmp_path: Path) -> None:
    """Two mocks differing only in decode step time, 10 ms vs 12 ms (ground truth: the engine)."""
    fast = TargetSpec(name="fast", model="fast", mock_engine=engine_file(tmp_path, "fast", 10.0))
    slow = TargetSpec(name="slow", model="slow", mock_engine=engine_file(tmp_path, "slow", 12.0))
    settings = CompareSettings(
        targets=(fast, slow),
        profile=short_profile(16),
        levels=(4,),
        rounds=2,
        requests_per_round=16,
        warmup_s=0.2,
        resamples=2000,
        out_dir=tmp_path / "runs",
        write_report=False,
    )
    result = compare(settings)
    (level,) = result.data["levels"]
    (pair,) = level["pairs"]
    assert pair["verdict"] == "faster", pair["sentence"]
    metrics = {(m["metric"], m["percentile"]): m for m in pair["metrics"]}
    for key in (("itl", 50.0), ("tpot", 50.0), ("e2e", 50.0)):
        assert metrics[key]["verdict"] == "faster", metrics[key]
    assert all(m["verdict"] != "slower" for m in pair["metrics"])
    # Each token takes one step: the ITL ratio is the step ratio, 10 / 12.
    assert metrics["itl", 50.0]["ratio"] == pytest.approx(10 / 12, rel=0.05)
    assert [(r["target"], r["round"]) for r in result.data["rounds"]] == [
        ("fast", 1),
        ("slow", 1),
        ("fast", 2),
        ("slow", 2),
    ]


IDENTICAL_TRIALS = 40
TRIAL_REQUESTS = 40


@pytest.mark.slow
def test_identical_targets_show_no_difference_in_95_percent_of_small_comparisons(tmp_path: Path) -> None:
    """Two mocks with the same engine, measured in interleaved rounds; then 40 small
    comparisons (40 requests per target each, drawn from the recorded requests) must say
    "no difference" in at least 38. The recorded pool keeps the test's wall time short.

    The pools hold 300 requests a target. The mock's latencies are nearly constant, so a
    stall of the machine shows: with 150 a target, one stall in one round (some 8 requests
    in flight, about 5 % of a pool) reached the p95 of many of the small comparisons drawn
    from it, and a CI run said "no difference" in 35 of 40 (8 idle runs here: one 35,
    seven 40). With 300: 8 idle runs gave 40 each; under tests/host_stalls.py (a 2-15 ms
    freeze once a second), 5 runs side by side gave 38, 40, 40, 40, 40 with 150 a target
    and 40 in all five with 300."""
    engine = engine_file(tmp_path, "same", 10.0)
    twins = (
        TargetSpec(name="left", model="same", mock_engine=engine),
        TargetSpec(name="right", model="same", mock_engine=engine),
    )
    settings = CompareSettings(
        targets=twins,
        profile=short_profile(8),
        levels=(8,),
        rounds=3,
        requests_per_round=100,
        warmup_s=0.2,
        resamples=2000,
        out_dir=tmp_path / "runs",
        write_report=False,
    )
    result = compare(settings)
    pools: dict[str, list[dict[str, Any]]] = {"left": [], "right": []}
    for entry in result.data["rounds"]:
        rows = read_records(result.folder / entry["folder"] / "records.jsonl")
        pools[entry["target"]].extend(r for r in rows if r["in_window"] and r["outcome"] == "ok")
    assert min(len(pool) for pool in pools.values()) >= 240
    started = time.perf_counter()
    rng = np.random.default_rng(17)
    same = 0
    for _ in range(IDENTICAL_TRIALS):
        samples = {
            name: MetricSamples.from_rows(
                [pool[i] for i in rng.choice(len(pool), TRIAL_REQUESTS, replace=False)]
            )
            for name, pool in pools.items()
        }
        (pair,) = compare_samples(samples, settings, rng)
        same += pair.verdict is Verdict.NO_DIFFERENCE
    print(
        f"identical mocks: 'no difference' in {same}/{IDENTICAL_TRIALS} comparisons "
        f"(statistics took {time.perf_counter() - started:.1f} s)"
    )
    assert same >= 0.95 * IDENTICAL_TRIALS


# --- the command line ------------------------------------------------------------------------

REPO = Path(__file__).resolve().parent.parent
DEMO = REPO / "targets" / "harbour-desk-candidates.toml"


def loadrun_cli(*args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "loadrun", *args],
        cwd=cwd,
        capture_output=True,
        text=True,
        timeout=120,
        stdin=subprocess.DEVNULL,
    )


def small_profile_file(folder: Path, input_tokens: int = 16) -> Path:
    path = folder / "small.toml"
    path.write_text(
        f'name = "small"\n[request]\ninput_tokens = {input_tokens}\noutput_tokens = 8\n', encoding="utf-8"
    )
    return path


@pytest.mark.slow
def test_the_demo_comparison_runs_with_one_command(tmp_path: Path) -> None:
    result = loadrun_cli(
        "compare", str(DEMO), str(small_profile_file(tmp_path)), "--rounds", "1", "-n", "6", "-c", "2",
        "--warmup", "0.1", "--resamples", "500", "--out", "out", "--json",
        cwd=tmp_path,
    )  # fmt: skip
    assert result.returncode == 0, result.stderr
    assert "Starting the bundled mock server for gullwing-cloud, tidewater-open, quay-box" in result.stderr
    assert "round 1/1, quay-box: 6 ok, 0 failed" in result.stderr
    data = json.loads(result.stdout)
    assert [t["name"] for t in data["targets"]] == ["gullwing-cloud", "tidewater-open", "quay-box"]
    (level,) = data["levels"]
    assert len(level["pairs"]) == 3
    report = Path(result.stderr.split("report ")[-1].strip())
    report = report if report.is_absolute() else tmp_path / report
    assert report.name == "report.html" and report.is_file()
    assert (report.parent / "compare.json").is_file()


def test_a_profile_larger_than_a_context_window_is_refused_before_sending(tmp_path: Path) -> None:
    result = loadrun_cli("compare", str(DEMO), str(small_profile_file(tmp_path, 5000)), cwd=tmp_path)
    assert result.returncode == 2, result.stderr
    last = result.stderr.strip().splitlines()[-1]
    assert last.startswith("UsageError: target quay-box") and "context window is 4096" in last
    assert not (tmp_path / "runs").exists()


def test_a_mix_of_request_classes_is_broken_down() -> None:
    rows = [row(**{"class": "question", "compliant": True}), row(**{"class": "question", "compliant": False})]
    rows.append(row(**{"class": "summary", "output_tokens": 51}))
    result = target_aggregate(rows, [], spec("t"))
    assert result["by_class"]["question"] == {
        "ok": 2,
        "output_mean": 101.0,
        "checked": 2,
        "compliance_rate": 0.5,
    }
    assert result["by_class"]["summary"]["compliance_rate"] is None
    assert result["by_class"]["summary"]["output_mean"] == 51.0
    assert target_aggregate([row(**{"class": "only"})], [], spec("t"))["by_class"] == {}
