"""The history database under two writers at once and under a writer killed mid-write.

Real processes, stopped by PID; every loop is bounded in count and time.
"""

from __future__ import annotations

import json
import os
import selectors
import signal
import sqlite3
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
from _gate_samples import synthetic_run

from loadrun.history import History, RunFilter

# Writes COUNT runs, each in its own transaction, once the file GO exists.
WRITER = r"""
import json, os, sys, time
from loadrun.history import History, RunFilter
summary, config = json.load(open(sys.argv[1]))
path, count, tag, go = sys.argv[2], int(sys.argv[3]), sys.argv[4], sys.argv[5]
deadline = time.monotonic() + 20
while not os.path.exists(go) and time.monotonic() < deadline:
    time.sleep(0.005)
with History(path) as history:
    for i in range(count):
        config["target"]["name"] = tag
        history.record(summary, config)
        print(i, flush=True)
        time.sleep(0.01)  # let the other writer in between runs: 60 runs overlap for ~0.6 s
"""

# Stops inside the transaction, after the run's row and before its histograms.
STOPS_MID_WRITE = r"""
import json, sys, time
from loadrun.history import History, RunFilter
summary, config = json.load(open(sys.argv[1]))
history = History(sys.argv[2])
def trace(statement):
    if statement.startswith("INSERT INTO histograms"):
        print("inside the transaction", flush=True)
        time.sleep(60)
history._db.set_trace_callback(trace)
config["target"]["name"] = "killed"
history.record(summary, config)
"""


@pytest.fixture(scope="module")
def run_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("sample") / "run.json"
    path.write_text(json.dumps(synthetic_run(1, requests=120)))
    return path


@pytest.fixture
def processes() -> Iterator[list[subprocess.Popen[str]]]:
    started: list[subprocess.Popen[str]] = []
    yield started
    for process in started:
        if process.poll() is None:
            os.kill(process.pid, signal.SIGKILL)
        process.wait(timeout=10)
        for stream in (process.stdout, process.stderr):
            if stream is not None:
                stream.close()


def start(processes: list[subprocess.Popen[str]], script: str, *args: str) -> subprocess.Popen[str]:
    process = subprocess.Popen(
        [sys.executable, "-c", script, *args],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        stdin=subprocess.DEVNULL,
        text=True,
    )
    processes.append(process)
    return process


def read_line(process: subprocess.Popen[str], timeout_s: float) -> str:
    assert process.stdout is not None
    with selectors.DefaultSelector() as selector:
        selector.register(process.stdout, selectors.EVENT_READ)
        if not selector.select(timeout_s):
            raise AssertionError(f"no line from PID {process.pid} within {timeout_s} s")
    return process.stdout.readline()


def sound(path: Path) -> History:
    history = History(path)
    assert history.integrity() == "ok"
    # No run without its histograms: a torn run would show up here.
    rows = history._db.execute(
        "SELECT runs.id, COUNT(histograms.metric) FROM runs"
        " LEFT JOIN histograms ON runs.id = histograms.run_id GROUP BY runs.id"
    ).fetchall()
    assert all(count == 4 for _, count in rows), rows
    return history


def test_two_writers_at_once_lose_nothing(
    tmp_path: Path, run_file: Path, processes: list[subprocess.Popen[str]]
) -> None:
    """Both start on a file that does not exist yet, so they also race to create the schema."""
    path, go = tmp_path / "h.sqlite3", tmp_path / "go"
    writers = [start(processes, WRITER, str(run_file), str(path), "60", tag, str(go)) for tag in ("a", "b")]
    time.sleep(0.5)  # both have imported loadrun and are waiting
    go.touch()
    for writer in writers:
        _, errors = writer.communicate(timeout=60)
        assert writer.returncode == 0, errors
    with sound(path) as history:
        runs = history.find()
        assert len(history.find(RunFilter(limit=1000))) == 120
        by_target = {
            name: sum(1 for run in history.find(RunFilter(limit=1000)) if run.target_name == name)
            for name in "ab"
        }
        assert by_target == {"a": 60, "b": 60}
        assert len({run.id for run in runs}) == len(runs)
        # They really wrote at the same time: the runs of one do not all follow the other's.
        order = "".join(run.target_name for run in history.find(RunFilter(limit=1000)))
        assert order not in ("a" * 60 + "b" * 60, "b" * 60 + "a" * 60), order


def test_a_writer_killed_inside_its_transaction_leaves_nothing_half_written(
    tmp_path: Path, run_file: Path, processes: list[subprocess.Popen[str]]
) -> None:
    path = tmp_path / "h.sqlite3"
    summary, config = json.loads(run_file.read_text())
    with History(path) as history:
        before = history.record(summary, config)
    victim = start(processes, STOPS_MID_WRITE, str(run_file), str(path))
    assert read_line(victim, 30).strip() == "inside the transaction"
    os.kill(victim.pid, signal.SIGKILL)
    victim.wait(timeout=10)
    with sound(path) as history:
        assert [run.id for run in history.find()] == [before]
        assert all(run.target_name != "killed" for run in history.find())
        # The dead writer's lock is gone: the next run is written at once.
        started = time.monotonic()
        after = history.record(summary, config)
        assert time.monotonic() - started < 5
        assert [run.id for run in history.find()] == [before, after]


@pytest.mark.parametrize("delay_s", [0.05, 0.2, 0.45])
def test_a_writer_killed_at_any_moment_leaves_a_sound_file(
    tmp_path: Path, run_file: Path, processes: list[subprocess.Popen[str]], delay_s: float
) -> None:
    path, go = tmp_path / "h.sqlite3", tmp_path / "go"
    go.touch()
    writer = start(processes, WRITER, str(run_file), str(path), "5000", "busy", str(go))
    read_line(writer, 30)  # the first run is in
    time.sleep(delay_s)
    os.kill(writer.pid, signal.SIGKILL)
    writer.wait(timeout=10)
    with sound(path) as history:
        stored = history.find(RunFilter(limit=10_000))
        assert 1 <= len(stored) < 5000
        last = stored[-1]
        assert history.histograms(last.id).get("ttft").count == 120
    # The plain sqlite3 module, with no loadrun code, also reads the file.
    with sqlite3.connect(path) as db:
        assert db.execute("SELECT COUNT(*) FROM runs").fetchone()[0] == len(stored)
