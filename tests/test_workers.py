"""Splitting a load level across workers and merging their results.

The unit tests hold a merge of shards against one Recorder that saw every record (the
single-process result for the same requests); the integration tests run 2 worker
processes against the bundled mock on 127.0.0.1.
"""

from __future__ import annotations

import math
import os
import random
import signal
import threading
import time
from collections import Counter
from dataclasses import replace
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import pytest
from _reruns import first_faithful

from loadrun.class_tally import ClassTally, merge_class_summaries
from loadrun.driver import ClosedLoopPlan, OpenLoopPlan
from loadrun.errors import UsageError
from loadrun.gate import GateSettings, validity_problems
from loadrun.metrics import HistogramSet
from loadrun.profile import LoadSpec, Profile, RequestSpec
from loadrun.record import Outcome, Record
from loadrun.recorder import Recorder
from loadrun.runner import MeasureSettings, measure
from loadrun.scale import measure_scaled
from loadrun.shard_merge import merge_summaries
from loadrun.shards import derive_seed, split_settings
from loadrun.store import SUMMARY_FILE, read_records
from loadrun.target import Target
from mock_server.config import load_config
from mock_server.engine import ground_truth

ENGINE = str(Path(__file__).with_name("itest-engine.toml"))
PROMPT_TOKENS = 32
OUTPUT_TOKENS = 24
LOOPBACK = Target(base_url="http://127.0.0.1:9/v1", model="m")


# --- splitting ------------------------------------------------------------------------


def test_a_closed_loop_is_split_by_clients_and_requests() -> None:
    settings = MeasureSettings(target=LOOPBACK, concurrency=5, requests=7, seed=11)
    shards = split_settings(settings, 2, "out")
    assert [shard.settings.concurrency for shard in shards] == [3, 2]
    assert [shard.settings.requests for shard in shards] == [4, 3]
    assert [shard.out_dir for shard in shards] == ["out/w0", "out/w1"]
    seeds = [shard.settings.effective_profile().seed for shard in shards]
    assert len(set(seeds)) == 2 and 11 not in seeds
    assert seeds == [derive_seed(11, 0), derive_seed(11, 1)]  # reproducible
    for shard in shards:
        assert isinstance(shard.settings.plan(), ClosedLoopPlan)
        assert not shard.settings.record_history and not shard.settings.handle_signals


def test_an_open_loop_is_split_by_rate_and_constant_arrivals_are_interleaved() -> None:
    poisson = split_settings(MeasureSettings(target=LOOPBACK, rate_per_s=10.0, duration_s=2.0), 4, None)
    assert [shard.settings.rate_per_s for shard in poisson] == [2.5] * 4
    assert all(shard.settings.duration_s == 2.0 and shard.phase_s == 0.0 for shard in poisson)
    plan = poisson[0].settings.plan()
    assert isinstance(plan, OpenLoopPlan) and plan.arrivals.kind == "poisson"
    constant = split_settings(
        MeasureSettings(target=LOOPBACK, rate_per_s=10.0, arrival="constant", duration_s=2.0), 2, None
    )
    assert [shard.phase_s for shard in constant] == [0.0, 0.1]  # one gap of the whole rate apart


@pytest.mark.parametrize(
    ("changes", "workers", "words"),
    [
        ({"concurrency": 1, "requests": 10}, 2, "concurrency 1 cannot be split"),
        ({"concurrency": 4, "requests": 1}, 2, "1 requests cannot be split"),
        ({"concurrency": 2, "requests": 10}, 0, "workers must be within"),
    ],
)
def test_a_level_too_small_to_split_is_refused(changes: dict[str, Any], workers: int, words: str) -> None:
    with pytest.raises(UsageError, match=words):
        split_settings(MeasureSettings(target=LOOPBACK, **changes), workers, None)


def test_a_replayed_trace_is_not_split(tmp_path: Path) -> None:
    trace = tmp_path / "trace.jsonl"
    trace.write_text('{"offset_s": 0.0, "input_tokens": 8, "output_tokens": 4}\n')
    with pytest.raises(UsageError, match="replayed trace"):
        split_settings(MeasureSettings(target=LOOPBACK, trace_path=trace), 2, None)


# --- merging --------------------------------------------------------------------------

MS = 1_000_000


def _records(rng: random.Random, count: int, origin: int) -> list[Record]:
    records = []
    for number in range(count):
        intended = origin + rng.randrange(0, 3000) * MS
        first = intended + rng.randrange(5, 80) * MS + rng.randrange(1000)
        chunks = [first]
        for _ in range(5):
            chunks.append(chunks[-1] + rng.randrange(8, 12) * MS + rng.randrange(1000))
        outcome = Outcome.OK if rng.random() > 0.1 else Outcome.HTTP_ERROR
        record = Record(request_id=number, intended_ns=intended, in_window=rng.random() > 0.05)
        record.send_ns = intended + rng.randrange(50_000)
        record.outcome = outcome
        if outcome is Outcome.OK:
            record.first_token_ns = first
            record.chunk_ns = chunks
            record.output_tokens = len(chunks)
            record.prompt_tokens = 32
        else:
            record.error = "HTTP 500"
        record.end_ns = chunks[-1] + rng.randrange(1000)
        records.append(record)
    return records


def _shard_summary(records: list[Record], origin: int, end: int) -> dict[str, Any]:
    recorder = Recorder(origin)
    for record in records:
        recorder.add(record)
    summary = recorder.summary(origin, end)
    summary.update(sent=len(records), little={"implied_concurrency": 1.0}, cancelled_in_flight=0)
    summary["generator"] = {"loop_lag_p99_ms": 1.0, "limited": False}
    return summary


def test_merged_shards_equal_one_recorder_that_saw_every_record() -> None:
    """HdrHistogram add is exact (HdrHistogram, G. Tene: ``add`` merges counts bucket by
    bucket), so the merge must equal the single-process histogram, count for count."""
    rng = random.Random(5)
    origin, end = 10**12, 10**12 + 4000 * MS
    shards = [_records(rng, 300, origin), _records(rng, 200, origin), _records(rng, 100, origin)]
    merged = merge_summaries([_shard_summary(records, origin, end) for records in shards])
    whole = _shard_summary([record for records in shards for record in records], origin, end)
    assert merged["requests"] == whole["requests"]
    assert merged["latency"] == whole["latency"]
    assert HistogramSet.decode(merged["histograms"]).summary() == whole["latency"]
    for key, value in whole["throughput"].items():
        assert merged["throughput"][key] == pytest.approx(value, rel=1e-9)
    assert merged["tokens"]["output_mean"] == pytest.approx(whole["tokens"]["output_mean"])
    assert merged["sent"] == 600
    counted = ("second", "completed", "ok", "failed", "output_tokens")
    assert [{k: w[k] for k in counted} for w in merged["windows"]] == [
        {k: w[k] for k in counted} for w in whole["windows"]
    ]


def test_one_limited_shard_flags_the_merged_run() -> None:
    rng = random.Random(6)
    origin, end = 10**12, 10**12 + 4000 * MS
    calm = _shard_summary(_records(rng, 50, origin), origin, end)
    starved = _shard_summary(_records(rng, 50, origin), origin, end)
    starved["generator"] = {"loop_lag_p99_ms": 20.0, "limited": True}
    generator = merge_summaries([calm, starved])["generator"]
    assert generator["limited"] and generator["limited_workers"] == [1]
    assert "4.0x" in generator["health"]["note"]


# --- against the bundled mock ----------------------------------------------------------


def _settings(tmp_path: Path, concurrency: int, **changes: Any) -> MeasureSettings:
    profile = Profile(
        name="itest",
        request=RequestSpec(input_tokens=PROMPT_TOKENS, output_tokens=OUTPUT_TOKENS),
        load=LoadSpec(),
    )
    base = MeasureSettings(
        profile=profile,
        concurrency=concurrency,
        duration_s=2.0,
        warmup_s=0.5,
        out_dir=tmp_path,
        mock_engine=ENGINE,
        record_history=False,
    )
    return replace(base, **changes)


def _shard_summaries(summary: dict[str, Any]) -> list[dict[str, Any]]:
    import orjson

    return [
        orjson.loads((Path(summary["run_folder"]) / shard["folder"] / SUMMARY_FILE).read_bytes())
        for shard in summary["workers"]["shards"]
    ]


@pytest.mark.slow
def test_two_worker_processes_add_up_and_match_one_process_at_the_same_load(tmp_path: Path) -> None:
    """Two processes of 2 clients each against the one embedded mock, against one process of 4.

    Checks: totals are the sums of the workers'; merged percentiles equal those of the raw
    records within the histogram's precision (HdrHistogram with 3 significant figures:
    0.1 %, hdrh docs); throughput within 10 % of the mock engine's closed form (its
    ground_truth, as in test_measure_mock); median latencies within 3 % of a
    single-process run at the same total load (common practice, no source).
    """
    # The generator must have kept up in both runs, or neither says anything about the merge.
    # On a shared machine a stall of its own can flag a run (a CI run: loop lag p99 6.3 ms against
    # 5 ms), so a flagged run is measured again, at most twice: a precondition, not the subject.
    summary = first_faithful(
        lambda attempt: measure_scaled(_settings(tmp_path / f"scaled{attempt}", 4), 2)
    ).summary
    workers = summary["workers"]
    assert workers["complete"] and workers["problems"] == []
    assert (
        workers["start_skew_ms"] is not None and workers["start_skew_ms"] < workers["start_skew_tolerance_ms"]
    )
    shards = _shard_summaries(summary)
    mock_urls = {shard["target"]["base_url"] for shard in shards}
    assert mock_urls == {summary["target"]["base_url"]}  # every worker loaded the same mock
    assert [shard["load"]["concurrency"] for shard in shards] == [2, 2]

    for key in ("measured", "ok", "failed", "warmup", "completed_in_window"):
        assert summary["requests"][key] == sum(shard["requests"][key] for shard in shards)
    assert summary["sent"] == sum(shard["sent"] for shard in shards)
    for metric in ("ttft", "e2e", "itl"):
        assert summary["latency"][metric]["count"] == sum(
            shard["latency"][metric]["count"] for shard in shards
        )
    assert summary["throughput"]["requests_per_s"] == pytest.approx(
        sum(shard["throughput"]["requests_per_s"] for shard in shards)
    )
    completed = Counter[int]()
    for shard in shards:
        for window in shard["windows"]:
            completed[window["second"]] += window["completed"]
    assert {w["second"]: w["completed"] for w in summary["windows"]} == dict(completed)

    rows = [
        row
        for shard in workers["shards"]
        for row in read_records(Path(summary["run_folder"]) / shard["records"])
        if row["in_window"] and row["outcome"] == "ok"
    ]
    assert len(rows) == summary["requests"]["ok"]
    e2e_us = sorted(row["end_us"] - row["intended_us"] for row in rows)
    for percentile in (50.0, 90.0, 99.0):
        rank = max(1, int(percentile / 100 * len(e2e_us) + 0.5))  # HdrHistogram's rank rule
        exact = e2e_us[rank - 1]
        merged_us = summary["latency"]["e2e"][f"p{percentile:g}_ms"] * 1000
        assert exact - 2 <= merged_us <= exact * 1.001 + 2  # +-1 us: records round each stamp

    truth = ground_truth(load_config(ENGINE), 4, PROMPT_TOKENS, OUTPUT_TOKENS)
    assert summary["throughput"]["requests_per_s"] == pytest.approx(truth.requests_per_s, rel=0.10)
    single = first_faithful(lambda attempt: measure(_settings(tmp_path / f"single{attempt}", 4))).summary
    for metric in ("ttft", "e2e"):
        assert summary["latency"][metric]["p50_ms"] == pytest.approx(
            single["latency"][metric]["p50_ms"], rel=0.03
        )
    assert summary["generator"]["limited"] is False, summary["generator"]["health"]["note"]
    assert single["generator"]["limited"] is False, single["generator"]["health"]["note"]
    assert validity_problems(summary, GateSettings(history_path=tmp_path / "h.sqlite3", min_samples=1)) == []


@pytest.mark.slow
def test_a_worker_that_dies_is_reported_and_its_records_are_kept(tmp_path: Path) -> None:
    killed: list[int] = []

    def kill_second(pids: list[int]) -> None:
        def kill() -> None:
            killed.append(pids[1])
            os.kill(pids[1], signal.SIGKILL)

        timer = threading.Timer(2.0, kill)
        timer.daemon = True
        timer.start()

    settings = _settings(tmp_path, 2, duration_s=3.0, warmup_s=0.2)
    summary = measure_scaled(settings, 2, on_started=kill_second).summary
    assert killed
    workers = summary["workers"]
    assert workers["complete"] is False
    dead = workers["shards"][1]
    assert not dead["finished"] and f"PID {killed[0]}" in dead["error"] and "signal 9" in dead["error"]
    assert dead["records"] is not None and dead["records_kept"] >= 1
    assert len(read_records(Path(summary["run_folder"]) / dead["records"])) == dead["records_kept"]
    survivor = _shard_summaries({**summary, "workers": {"shards": workers["shards"][:1]}})[0]
    assert summary["requests"] == survivor["requests"]  # the merge holds the finished worker only
    assert any(
        "incomplete" in problem
        for problem in validity_problems(
            summary, GateSettings(history_path=tmp_path / "h.sqlite3", min_samples=1)
        )
    )
    on_disk = Path(summary["run_folder"]) / SUMMARY_FILE
    assert on_disk.is_file()
    assert math.isfinite(summary["throughput"]["requests_per_s"])


@pytest.mark.slow
def test_the_command_line_runs_two_workers_and_the_merged_folder_reads_like_any_run(tmp_path: Path) -> None:
    """``loadrun measure --workers 2``, then report, export and gate on its run folder."""
    import subprocess
    import sys

    import orjson

    def loadrun(*args: str) -> subprocess.CompletedProcess[str]:
        return subprocess.run(
            [sys.executable, "-m", "loadrun", *args], capture_output=True, text=True, timeout=90, cwd=tmp_path
        )

    def measure_with_two_workers(_attempt: int) -> SimpleNamespace:
        measured = loadrun(
            "measure", "-c", "2", "-d", "1", "--warmup", "0.2", "--workers", "2", "--mock-engine", ENGINE,
            "--output-tokens", "8", "--out", "runs", "--json",
        )  # fmt: skip
        assert measured.returncode == 0, measured.stderr
        return SimpleNamespace(summary=orjson.loads(measured.stdout))

    # The gate at the end refuses a generator-limited run (exit 2), and a shared machine's
    # stall can flag one (a run with simulated stalls did): such a run is measured again.
    summary = first_faithful(measure_with_two_workers).summary
    folder = tmp_path / summary["run_folder"]  # relative to the command's working folder
    assert summary["workers"]["count"] == 2 and summary["workers"]["complete"]
    assert summary["requests"]["measured"] == sum(s["measured"] for s in summary["workers"]["shards"])
    assert orjson.loads((folder / SUMMARY_FILE).read_bytes())["requests"] == summary["requests"]
    assert all((folder / shard["records"]).is_file() for shard in summary["workers"]["shards"])
    report = loadrun("report", str(folder))
    assert report.returncode == 0, report.stderr
    assert (folder / "report.html").is_file()
    exported = loadrun("export", str(folder))
    assert exported.returncode == 0, exported.stderr
    assert (folder / "summaries.csv").is_file()
    exported_rows = (folder / "records.csv").read_text().splitlines()
    assert "worker" in exported_rows[0].split(",")  # every worker's records, each labelled
    assert len(exported_rows) - 1 == sum(s["records_kept"] for s in summary["workers"]["shards"])
    gate = loadrun(
        "gate", "--from-run", str(folder), "--min-samples", "1", "--history", "runs/history.sqlite3"
    )
    assert gate.returncode == 0, gate.stdout + gate.stderr


def test_records_sent_back_by_a_worker_on_another_host_are_written_into_the_run_folder(
    tmp_path: Path,
) -> None:
    from loadrun.scale import _record_files
    from loadrun.shard_worker import ShardResult

    settings = MeasureSettings(target=LOOPBACK, concurrency=2, requests=4)
    specs = split_settings(settings, 2, str(tmp_path / "workers"))
    line = b'{"id": 1, "in_window": true, "outcome": "ok"}\n'
    remote = ShardResult(index=0, host="elsewhere", pid=7, summary={}, folder="/far/away", records=line)
    lost = ShardResult(index=1, host="elsewhere", pid=8, error="gone")
    files = _record_files(specs, [remote, lost])
    assert files[0] is not None and files[0].read_bytes() == line
    assert files[0].is_relative_to(tmp_path / "workers" / "w0")
    assert files[1] is None  # nothing of it on this machine


@pytest.mark.anyio
async def test_the_wait_for_the_agreed_instant_ends_at_it_not_before() -> None:
    from loadrun.wall_start import wait_until_wall

    instant = time.time() + 0.05
    await wait_until_wall(instant)
    assert 0 <= time.time() - instant < 0.05  # generous: only "not before" is exact
    await wait_until_wall(instant - 10)  # passed already: returns at once


def test_merged_class_counts_equal_one_tally_that_saw_every_record() -> None:
    """Per-class compliance, verbosity and input lengths, merged from shards' summaries,
    equal one tally over all the records (sums rebuilt from means: equal to rounding)."""
    rng = random.Random(7)
    origin = 10**12
    shards = [_records(rng, count, origin) for count in (120, 80, 40)]
    for records in shards:
        for record in records:
            record.request_class = rng.choice(["triage", "summary", "extract"])
            record.requested_input_tokens = rng.choice([30, 32, 40])
            record.compliant = rng.choice([True, False, None])
            record.check_note = "not one of the labels" if record.compliant is False else None

    def classes_of(records: list[Record]) -> dict[str, Any]:
        tally = ClassTally()
        for record in records:
            tally.add(record)
        return tally.summary()

    merged = merge_class_summaries([classes_of(records)["classes"] for records in shards])
    whole = classes_of([record for records in shards for record in records])
    assert set(merged["classes"]) == {"triage", "summary", "extract"}
    assert_close(merged, whole)


def assert_close(left: Any, right: Any) -> None:
    """Equal, floats to 1e-9 relative, all the way down."""
    if isinstance(left, dict):
        assert left.keys() == right.keys()
        for key in left:
            assert_close(left[key], right[key])
    elif isinstance(left, float):
        assert left == pytest.approx(right, rel=1e-9), (left, right)
    else:
        assert left == right
