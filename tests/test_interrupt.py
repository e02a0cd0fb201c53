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
    """Read stderr line by line until one holds ``needle``; return what was read."""
    assert process.stderr is not None
    seen = ""
    deadline = time.monotonic() + timeout_s
    with selectors.DefaultSelector() as selector:
        selector.register(process.stderr, selectors.EVENT_READ)
        while time.monotonic() < deadline:
            if not selector.select(max(0.0, deadline - time.monotonic())):
                break
            line = process.stderr.readline()
            if not line:
                break
            seen += line
            if needle in line:
                return seen
    process.kill()
    raise AssertionError(f"no stderr line with {needle!r} within {timeout_s} s; got: {seen}")


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


@pytest.mark.xfail(
    reason="open (faults/interrupts issue): a second SIGINT sent after the first was handled "
    "is not always acted on; the run then ends gracefully instead of at once",
    strict=False,
)
def test_second_signal_exits_at_once_and_leaves_whole_files(tmp_path: Path) -> None:
    # Requests of 120 tokens last about 1.3 s: some end before the first signal, and some
    # are still in flight when the second one comes.
    process = start_run(tmp_path, "-c", "4", "-d", "60", "--output-tokens", "120", "--stop-grace", "60")
    folder = run_folder_once_started(tmp_path, process)
    time.sleep(2.5)  # some requests finish and are written
    process.send_signal(signal.SIGINT)
    # Two signals that reach a busy process before it handles the first merge into one
    # (POSIX does not queue standard signals): send the second once the first is handled.
    first = wait_for_stderr_line(process, "no new requests", timeout_s=10)
    process.send_signal(signal.SIGINT)
    code, _stdout, stderr, waited = finish(process, 10)
    stderr = first + stderr
    assert code == EXIT_INTERRUPTED, stderr
    assert "again: exiting at once" in stderr and "Traceback" not in stderr
    assert waited < 2
    json.loads((folder / "config.json").read_text())
    rows = complete_lines(folder / "records.jsonl")
    assert rows and all(row["outcome"] == "ok" for row in rows)
    if (folder / "summary.json").exists():  # only if the run had already ended: then whole
        json.loads((folder / "summary.json").read_text())
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
