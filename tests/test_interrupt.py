"""SIGINT and SIGTERM during a run: stop sending, finish or cancel in-flight requests, keep
every record line whole; a second signal exits at once without corrupting files.

Real processes against the embedded mock, so the signal reaches loadrun exactly as a
Ctrl-C or a service manager would deliver it. Exit status 130 is the shell's convention
for a process ended by SIGINT (128 + signal number 2; from memory, no published check).
"""

from __future__ import annotations

import json
import os
import selectors
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import anyio
import pytest

from loadrun.interrupt import EXIT_INTERRUPTED, SignalStop

pytestmark = pytest.mark.slow


def start_run(tmp_path: Path, *args: str) -> subprocess.Popen[str]:
    return subprocess.Popen(
        [sys.executable, "-m", "loadrun", "measure", "--warmup", "0", "--out", "out", "--no-history", *args],
        cwd=tmp_path,
        stdin=subprocess.DEVNULL,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        start_new_session=True,  # its own process group, as a terminal's foreground job has
    )


def run_folder_once_started(tmp_path: Path, process: subprocess.Popen[str], timeout_s: float = 30) -> Path:
    """The run folder, once config.json is written (signal handlers are in place by then)."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        found = list((tmp_path / "out").glob("*/config.json"))
        if found:
            return found[0].parent
        assert process.poll() is None, process.communicate()
        time.sleep(0.05)
    process.kill()
    raise AssertionError("the run did not start")


def finish(process: subprocess.Popen[str], timeout_s: float) -> tuple[int, str, str, float]:
    started = time.monotonic()
    try:
        stdout, stderr = process.communicate(timeout=timeout_s)
    except subprocess.TimeoutExpired:
        process.kill()
        stdout, stderr = process.communicate()
        raise AssertionError(f"did not exit within {timeout_s} s; stderr: {stderr}") from None
    return process.returncode, stdout, stderr, time.monotonic() - started


def wait_for_stderr_line(process: subprocess.Popen[str], needle: str, timeout_s: float) -> str:
    """Read stderr until a line holds ``needle``; return what was read.

    Reads the pipe's descriptor directly: a buffered readline may pull the awaited line into
    its buffer while select() then waits on an empty pipe until the process writes again.
    """
    assert process.stderr is not None
    fd = process.stderr.fileno()
    seen = b""
    deadline = time.monotonic() + timeout_s
    with selectors.DefaultSelector() as selector:
        selector.register(fd, selectors.EVENT_READ)
        while time.monotonic() < deadline:
            if not selector.select(max(0.0, deadline - time.monotonic())):
                break
            chunk = os.read(fd, 65536)
            if not chunk:
                break
            seen += chunk
            if any(needle in line for line in seen.decode(errors="replace").splitlines()):
                return seen.decode(errors="replace")
    process.kill()
    raise AssertionError(f"no stderr line with {needle!r} within {timeout_s} s; got: {seen!r}")


def first_record_written(folder: Path, process: subprocess.Popen[str], timeout_s: float) -> None:
    deadline = time.monotonic() + timeout_s
    records = folder / "records.jsonl"
    while time.monotonic() < deadline:
        if records.exists() and records.stat().st_size > 0:
            return
        assert process.poll() is None, process.communicate()
        time.sleep(0.02)
    process.kill()
    raise AssertionError("no record was written")


def complete_lines(path: Path) -> list[dict[str, Any]]:
    """Every line of a records file, each required to be whole JSON ending in a newline."""
    data = path.read_bytes()
    assert not data or data.endswith(b"\n"), "the last record line is torn"
    return [json.loads(line) for line in data.splitlines()]


def assert_gone(pid: int) -> None:
    deadline = time.monotonic() + 5
    while time.monotonic() < deadline:
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return
        time.sleep(0.05)
    raise AssertionError(f"process {pid} still runs")


def mock_pid(folder: Path) -> int:
    return int(json.loads((folder / "config.json").read_text())["embedded_mock"]["pid"])


def test_first_signal_lets_in_flight_requests_finish_and_writes_the_summary(tmp_path: Path) -> None:
    process = start_run(tmp_path, "-c", "4", "-d", "60", "--output-tokens", "20", "--stop-grace", "20")
    folder = run_folder_once_started(tmp_path, process)
    time.sleep(1.5)
    # A Ctrl-C at a terminal goes to the whole foreground group; the embedded mock is in a
    # group of its own, so it keeps serving the requests in flight.
    os.killpg(process.pid, signal.SIGINT)
    code, _stdout, stderr, waited = finish(process, 20)
    assert code == EXIT_INTERRUPTED, stderr
    assert "Traceback" not in stderr and "Interrupted by SIGINT" in stderr
    assert waited < 5  # in-flight requests of 20 tokens end in well under a second
    summary = json.loads((folder / "summary.json").read_text())
    assert summary["interrupted"] is True and summary["interrupt"]["signal"] == "SIGINT"
    assert summary["cancelled_in_flight"] == 0
    rows = complete_lines(folder / "records.jsonl")
    assert len(rows) == summary["sent"] > 4  # every request sent was finished and written
    assert summary["requests"]["measured"] == len(rows)
    assert all(row["outcome"] == "ok" for row in rows)
    assert_gone(mock_pid(folder))


def test_grace_runs_out_then_in_flight_requests_are_cancelled(tmp_path: Path) -> None:
    """Requests of 400 tokens take 4 s; a 0.5 s grace cancels them, and SIGTERM acts as SIGINT."""
    process = start_run(tmp_path, "-c", "3", "-d", "60", "--output-tokens", "400", "--stop-grace", "0.5")
    folder = run_folder_once_started(tmp_path, process)
    time.sleep(1.0)
    process.send_signal(signal.SIGTERM)
    code, _stdout, stderr, waited = finish(process, 20)
    assert code == EXIT_INTERRUPTED, stderr
    assert "Traceback" not in stderr
    assert waited < 4
    summary = json.loads((folder / "summary.json").read_text())
    assert summary["interrupt"] == {"signal": "SIGTERM", "grace_s": 0.5}
    assert summary["cancelled_in_flight"] == 3 == summary["sent"]
    assert complete_lines(folder / "records.jsonl") == []
    assert summary["requests"]["measured"] == 0
    assert_gone(mock_pid(folder))


def test_second_signal_exits_at_once_and_leaves_whole_files(tmp_path: Path) -> None:
    # Requests of 400 tokens last about 4.3 s and the 3 clients start 1 s apart (the
    # warm-up spreads them), so when the first request is written the other two still have
    # about 1 and 2 s to go: the second signal surely lands while they are in flight.
    process = start_run(
        tmp_path, "-c", "3", "--warmup", "3", "-d", "60", "--output-tokens", "400", "--stop-grace", "60"
    )
    folder = run_folder_once_started(tmp_path, process)
    first_record_written(folder, process, timeout_s=30)
    process.send_signal(signal.SIGINT)
    # Two signals that reach a busy process before it handles the first merge into one
    # (POSIX does not queue standard signals): send the second once the first is handled.
    first = wait_for_stderr_line(process, "no new requests", timeout_s=10)
    process.send_signal(signal.SIGINT)
    code, _stdout, stderr, waited = finish(process, 10)
    stderr = first + stderr
    assert code == EXIT_INTERRUPTED, stderr
    assert "again: exiting at once" in stderr and "Traceback" not in stderr
    assert waited < 0.9  # well before the next in-flight request would have ended
    assert not (folder / "summary.json").exists()  # the run never got to its summary
    json.loads((folder / "config.json").read_text())
    rows = complete_lines(folder / "records.jsonl")
    assert rows and all(row["outcome"] == "ok" for row in rows)
    assert_gone(mock_pid(folder))


@pytest.mark.anyio
async def test_the_first_signal_only_sets_the_stop() -> None:
    stop = anyio.Event()
    guard = SignalStop(stop, grace_s=3.0)
    guard._on_signal(signal.SIGTERM)
    assert stop.is_set() and guard.signal_name == "SIGTERM"


def test_an_open_loop_run_stops_the_same_way(tmp_path: Path) -> None:
    process = start_run(tmp_path, "--rate", "20", "-d", "60", "--output-tokens", "20", "--stop-grace", "20")
    folder = run_folder_once_started(tmp_path, process)
    time.sleep(1.5)
    process.send_signal(signal.SIGINT)
    code, _stdout, stderr, waited = finish(process, 20)
    assert code == EXIT_INTERRUPTED, stderr
    assert "Traceback" not in stderr and waited < 5
    summary = json.loads((folder / "summary.json").read_text())
    assert summary["interrupt"]["signal"] == "SIGINT" and summary["cancelled_in_flight"] == 0
    rows = complete_lines(folder / "records.jsonl")
    assert rows and all(row["outcome"] == "ok" for row in rows)
    assert_gone(mock_pid(folder))


LATE_SIGNAL_SCRIPT = """
import os, signal, subprocess, sys, time
import anyio
from loadrun.interrupt import signals_stop

child = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
print(child.pid, flush=True)

async def run() -> None:
    stop = anyio.Event()
    with signals_stop(stop, 1.0, (child.pid,)):
        os.kill(os.getpid(), signal.SIGINT)
        await stop.wait()

anyio.run(run)
# The loop is gone (as while a summary is written): a second signal still exits at once.
os.kill(os.getpid(), signal.SIGINT)
time.sleep(10)
print("not stopped", flush=True)
"""


def test_a_second_signal_after_the_run_loop_ended_still_exits_at_once() -> None:
    process = subprocess.run(
        [sys.executable, "-c", LATE_SIGNAL_SCRIPT], capture_output=True, text=True, timeout=20
    )
    assert process.returncode == EXIT_INTERRUPTED, process.stderr
    assert "SIGINT again: exiting at once" in process.stderr and "not stopped" not in process.stdout
    assert_gone(int(process.stdout.split()[0]))  # the child was killed by its PID


@pytest.mark.parametrize(
    ("command", "profile", "written"),
    [
        ("pipeline", "passenger-letter-pipeline.toml", "pipeline.json"),
        ("route", "harbour-desk-routed.toml", "routed.json"),
    ],
)
def test_multi_target_runs_stop_the_same_way(
    tmp_path: Path, command: str, profile: str, written: str
) -> None:
    shipped = Path(__file__).resolve().parent.parent / "profiles" / "multi-target" / profile
    level = ["-c", "2", "-d", "60", "--warmup", "0", "--out", "out"]
    process = subprocess.Popen(
        [sys.executable, "-m", "loadrun", command, str(shipped), *level],
        cwd=tmp_path,
        stdin=subprocess.DEVNULL,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        start_new_session=True,
    )
    folder = run_folder_once_started(tmp_path, process)
    first_record_written(folder, process, timeout_s=30)
    process.send_signal(signal.SIGINT)
    code, _stdout, stderr, _waited = finish(process, 30)
    assert code == EXIT_INTERRUPTED, stderr
    assert "Traceback" not in stderr and "Interrupted by SIGINT" in stderr
    data = json.loads((folder / written).read_text())
    assert data["interrupted"] is True and data["interrupt"]["signal"] == "SIGINT"
    assert data["cancelled_in_flight"] == 0
    rows = complete_lines(folder / "records.jsonl")
    assert rows and all(row["outcome"] == "ok" for row in rows)


def interrupt_split_run(tmp_path: Path, *args: str) -> tuple[dict[str, Any], list[dict[str, Any]]]:
    """Start a split run, Ctrl-C it once its shards have written records, check that it
    ended like a lone run does; (merged summary, every shard's records)."""
    process = start_run(tmp_path, *args, "-c", "4", "-d", "60", "--output-tokens", "20", "--stop-grace", "20")
    deadline = time.monotonic() + 60
    while not any(path.stat().st_size for path in (tmp_path / "out").glob("*/workers/*/*/records.jsonl")):
        assert process.poll() is None, process.communicate()
        assert time.monotonic() < deadline, "the shards did not start"
        time.sleep(0.05)
    time.sleep(1.0)
    os.killpg(process.pid, signal.SIGINT)
    code, _stdout, stderr, waited = finish(process, 40)
    assert code == EXIT_INTERRUPTED, stderr
    assert "Traceback" not in stderr and "Interrupted by SIGINT" in stderr
    assert waited < 10
    folder = next((tmp_path / "out").glob("*/summary.json")).parent
    summary = json.loads((folder / "summary.json").read_text())
    assert summary["interrupted"] is True and summary["interrupt"]["signal"] == "SIGINT"
    assert summary["cancelled_in_flight"] == 0 and summary["workers"]["count"] == 2
    assert not summary["workers"]["problems"]
    rows = [row for path in folder.glob("workers/*/*/records.jsonl") for row in complete_lines(path)]
    assert len(rows) == summary["sent"] and all(row["outcome"] == "ok" for row in rows)
    assert_gone(mock_pid(folder))
    return summary, rows


def test_a_run_split_across_workers_stops_the_same_way(tmp_path: Path) -> None:
    """Ctrl-C reaches the coordinator (the terminal's process group); it passes the stop on
    to its worker processes, each finishes what is in flight, and the merged summary is
    written marked interrupted."""
    summary, _rows = interrupt_split_run(tmp_path, "--workers", "2")
    assert summary["workers"]["mode"] == "processes"


def test_a_run_on_a_dask_cluster_stops_the_same_way(tmp_path: Path) -> None:
    """Dask tasks run in worker threads that no signal reaches: the coordinator sets a Dask
    Event, each shard stops sending and finishes what is in flight, and the merged summary
    is written marked interrupted. The Dask workers run in another working directory."""
    import distributed

    with distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address=None
    ) as cluster:
        summary, _rows = interrupt_split_run(tmp_path, "--cluster", cluster.scheduler_address)
    assert summary["workers"]["mode"] == "dask"
