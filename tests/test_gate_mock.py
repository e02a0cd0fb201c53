"""The gate against the bundled mock over loopback: every verdict on demand, and no false alarms.

Mock settings produce each verdict: an empty history (no baseline), the same engine again
(pass), an engine 25 % slower per step (regression), a context window too small for the
profile's requests (invalid: every request fails with HTTP 400), too few requests
(invalid: too few samples). Runs are short (tens of requests at concurrency 16, eight
output tokens each) so that 40 repetitions stay cheap.
"""

from __future__ import annotations

import collections
import json
import os
import re
import shlex
import shutil
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import replace
from pathlib import Path

import pytest
from _reruns import ATTEMPTS, RERUN_PAUSE_S, mock_stall, mock_url_of, pause_before_rerun, reset_mock_timing

from loadrun.gate import GateReport, GateSettings, Verdict, gate_measure, gate_summary, validity_problems
from loadrun.history import History, RunFilter
from loadrun.profile import LoadSpec, Profile, RequestSpec
from loadrun.runner import MeasureSettings, embedded_mock, measure
from loadrun.target import Target
from mock_server.config import load_config

pytestmark = pytest.mark.slow

REPO = Path(__file__).resolve().parent.parent
PROFILE = Profile(name="ferry-smoke", request=RequestSpec(input_tokens=16, output_tokens=8), load=LoadSpec())
TARGET_NAME = "larkspit-desk-mock"
REPETITIONS = 40


def engine_toml(folder: Path, name: str, **changes: float | int) -> Path:
    """The small-fast preset with some of its values changed."""
    values = {**load_config("small-fast").as_dict(), **changes}
    lines = [
        f"{key} = {value!r}" if not isinstance(value, str) else f'{key} = "{value}"'
        for key, value in values.items()
    ]
    path = folder / f"{name}.toml"
    path.write_text("\n".join(lines) + "\n")
    return path


@pytest.fixture(scope="module")
def normal() -> Iterator[Target]:
    with embedded_mock("small-fast") as (target, _info):
        yield target


def measuring(target: Target, requests: int = 64) -> MeasureSettings:
    return MeasureSettings(
        profile=PROFILE, target=target, concurrency=16, requests=requests, warmup_s=0.1, out_dir=None
    )


def gating(history: Path, **changes: object) -> GateSettings:
    return replace(GateSettings(history_path=history, target_name=TARGET_NAME, min_samples=50), **changes)  # type: ignore[arg-type]


class Nights:
    """Gated runs as a nightly job makes them, re-running a night that says nothing about
    the engine under test:

    - the mock did not keep its engine's pace: its own step timer (``/mock/stats``) ran
      more than _reruns.MOCK_LATE_LIMIT_MS late. The machine is a shared virtual one that loses
      CPU to its host now and then; one 18 ms stall of the mock during a slow night moved
      its TPOT p95 ratio from x1.25 to x1.45 in a full-suite run. Such a night is measured
      again before it is gated, so it never enters the history: stored, it would have
      become the baseline of the nights after it (a full-suite run under load did that).
    - the gate could not judge it because the load generator itself stalled
      ("generator-limited"; on a run this short one 5 ms scheduling stall decides the
      loop-lag p99). The gate stores it as invalid, which is never a baseline.

    Each night is tried at most three times (the last try is gated whatever happened) and
    every re-run is counted and printed; ``gated`` counts the runs stored in the history."""

    def __init__(self, settings: GateSettings, requests: int = 64) -> None:
        self.settings = settings
        self.requests = requests
        self.reruns = 0
        self.gated = 0

    def run(self, target: Target, tries: int = ATTEMPTS) -> GateReport:
        mock = mock_url_of(target)
        for attempt in range(1, tries + 1):
            reset_mock_timing(mock)
            result = measure(replace(measuring(target, self.requests), record_history=False))
            stall = mock_stall(mock)
            if stall and attempt < tries:
                self.rerun(stall)
                continue
            report = gate_summary(result.summary, result.config, self.settings)
            self.gated += 1
            if attempt < tries and only_generator_limited(report.reasons):  # stored as invalid
                self.rerun(" ".join(report.reasons))
                continue
            return report
        raise AssertionError("unreachable: the last try returns")

    def rerun(self, why: str) -> None:
        self.reruns += 1
        pause_before_rerun(why, self.reruns)


def only_generator_limited(reasons: list[str]) -> bool:
    """True when there are reasons and every one is the generator's."""
    return bool(reasons) and all(reason.startswith("generator-limited") for reason in reasons)


def test_an_engine_25_percent_slower_per_step_is_a_regression(normal: Target, tmp_path: Path) -> None:
    """Every default rule flags the slower engine, not only one of them.

    Nights of 192 requests: with 64, a p95 rests on its top three samples, and on a busy
    machine (measured with a busy loop on the other core) 1 night in 10 had a TTFT p95
    interval reaching down to x1.146, under the 15 % limit, although its ratio was x1.24.
    With 192, the lowest of 10 such nights was x1.226.
    """
    settings = gating(tmp_path / "history.sqlite3")
    nights = Nights(settings, requests=192)
    assert nights.run(normal).verdict is Verdict.NO_BASELINE
    assert nights.run(normal).verdict is Verdict.PASS
    base = load_config("small-fast")
    slow_engine = engine_toml(
        tmp_path,
        "slow",
        step_base_ms=base.step_base_ms * 1.25,
        decode_per_seq_ms=base.decode_per_seq_ms * 1.25,
    )
    with embedded_mock(str(slow_engine)) as (slow, _info):
        report = nights.run(slow)
    assert report.verdict is Verdict.REGRESSION and report.exit_code == 1, report.reasons
    for result in report.rules:
        assert result.regressed and result.change is not None
        # Every latency here is a whole number of engine steps, so all scale by 1.25.
        assert result.change.ratio == pytest.approx(1.25, abs=0.08), result.rule.label
    # The slow run is stored as a regression and is no baseline for the next one.
    assert nights.run(normal).verdict is Verdict.PASS
    assert nights.reruns <= 4  # one per night on average; a CI run on a busy host needed 3


def test_a_context_window_too_small_makes_the_run_invalid(tmp_path: Path) -> None:
    narrow = engine_toml(tmp_path, "narrow", context_window=16)  # 16 prompt + 8 output tokens do not fit
    with embedded_mock(str(narrow)) as (target, _info):
        report = gate_measure(measuring(target, requests=20), gating(tmp_path / "history.sqlite3"))
    assert report.verdict is Verdict.INVALID and report.exit_code == 2
    assert any("too many errors: 20 of 20" in reason for reason in report.reasons), report.reasons


def test_too_few_requests_make_the_run_invalid(normal: Target, tmp_path: Path) -> None:
    report = gate_measure(measuring(normal, requests=10), gating(tmp_path / "history.sqlite3"))
    assert report.verdict is Verdict.INVALID and report.exit_code == 2
    assert any("too few samples" in reason for reason in report.reasons), report.reasons


def test_no_change_passes_in_at_least_95_percent_of_40_runs(normal: Target, tmp_path: Path) -> None:
    """The false-alarm rate of the default rules (ttft, tpot and e2e p95, 15 %) on an unchanged
    mock: the first run becomes the baseline, then 40 nights are each gated against the
    median of the last 5 that passed, as a nightly job would do. Nights the generator could
    not judge are re-run (see Nights) and reported; at most one re-run per night on average."""
    settings = gating(tmp_path / "history.sqlite3")
    nights = Nights(settings)
    started = time.monotonic()
    verdicts: collections.Counter[str] = collections.Counter()
    worst_low: dict[str, float] = {}
    assert nights.run(normal).verdict is Verdict.NO_BASELINE
    for _ in range(REPETITIONS):
        report = nights.run(normal)
        verdicts[report.verdict.value] += 1
        for result in report.rules:
            if result.change is not None:
                worst_low[result.rule.label] = max(
                    worst_low.get(result.rule.label, 0.0), result.change.ratio_low
                )
    seconds = time.monotonic() - started
    print(f"\n{REPETITIONS} unchanged nights in {seconds:.1f} s: {dict(verdicts)}, {nights.reruns} re-run")
    print(f"highest lower ends of the ratio intervals: {worst_low}")
    assert verdicts["regression"] / REPETITIONS <= 0.05
    assert verdicts["pass"] / REPETITIONS >= 0.95, dict(verdicts)
    assert nights.reruns <= REPETITIONS  # one per night on average, as for the slower engine
    with History(settings.history_path) as history:
        assert len(history.find(RunFilter(limit=200))) == nights.gated


def readme_nightly_command() -> list[str]:
    """The cron line of the README's nightly example, as arguments after ``loadrun``."""
    text = (REPO / "README.md").read_text()
    match = re.search(
        r"^\s*\S+ \S+ \* \* \* cd \S+ && \S*loadrun (gate .*?) >> \S+ 2>&1$", text, re.MULTILINE
    )
    assert match, "the README has no nightly cron line"
    return shlex.split(match[1])


def test_the_readme_nightly_example_works_against_the_embedded_mock(tmp_path: Path) -> None:
    """Two nights of the README's cron line: the first becomes the baseline, the second passes.

    Shortened for the suite with options appended after the README's own (the last one wins):
    fewer requests and a shorter warm-up. Paths the example writes outside its folder are
    redirected into the test's folder, and the webhook option is dropped (test_alerts.py
    covers it). Each night still lasts about 15 s: the profile's multi-turn conversations
    pause between turns, and a client in a pause finishes it before the run ends.

    A night the gate calls invalid only because the generator was limited is a verdict on
    the test machine, not on the example: it is re-run (at most twice in all), as Nights does.
    """
    args = readme_nightly_command()
    shutil.copytree(REPO / "profiles", tmp_path / "profiles")
    prometheus = args.index("--prometheus") + 1
    args[prometheus] = str(tmp_path / "loadrun.prom")
    if "--webhook-env" in args:
        at = args.index("--webhook-env")
        del args[at : at + 2]
    args += ["-n", "32", "-c", "16", "--warmup", "0.2", "--min-samples", "30"]
    (tmp_path / "out").mkdir(exist_ok=True)
    env = {key: value for key, value in os.environ.items() if not key.startswith("LOADRUN")}
    reruns = 0
    for night, verdict in ((1, "NO BASELINE YET"), (2, "PASS")):
        for _ in range(3):
            result = subprocess.run(
                [sys.executable, "-m", "loadrun", *args],
                cwd=tmp_path,
                capture_output=True,
                text=True,
                timeout=110,
                stdin=subprocess.DEVNULL,
                env=env,
            )
            if result.returncode != 2 or not generator_limited_folder(newest_run_folder(tmp_path / "runs")):
                break
            reruns += 1
            print(f"\nnight {night} re-run: {result.stdout}")
            time.sleep(RERUN_PAUSE_S)
        assert result.returncode == 0, (night, result.stdout, result.stderr)
        assert verdict in result.stdout, result.stdout
    assert reruns <= 2
    assert (tmp_path / "loadrun.prom").is_file()
    assert list((tmp_path / "out").glob("*.xml"))
    listing = subprocess.run(
        [sys.executable, "-m", "loadrun", "history", "list", "--json"],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert listing.returncode == 0, listing.stderr
    verdicts = [json.loads(line)["verdict"] for line in listing.stdout.splitlines()]
    assert sorted(verdicts) == sorted(["no_baseline", "pass"] + ["invalid"] * reruns)


def newest_run_folder(runs: Path) -> Path:
    """The latest run folder under ``runs`` (which also holds the history database)."""
    return max((entry for entry in runs.iterdir() if entry.is_dir()), key=lambda folder: folder.name)


def generator_limited_folder(folder: Path) -> bool:
    """True when the gate's only objection to the run in ``folder`` is a limited generator."""
    summary = json.loads((folder / "summary.json").read_text())
    return only_generator_limited(
        validity_problems(summary, GateSettings(history_path=folder / "unused", min_samples=30))
    )
