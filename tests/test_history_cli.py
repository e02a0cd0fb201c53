"""`loadrun history` and the history options of `loadrun measure`, as a user runs them."""

from __future__ import annotations

import json
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest
from _gate_samples import synthetic_run

from loadrun.gate import GateSettings, Verdict, gate_summary
from loadrun.history import History

SVG = "{http://www.w3.org/2000/svg}"


def loadrun(*args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "loadrun", *args],
        cwd=cwd,
        capture_output=True,
        text=True,
        timeout=90,
        stdin=subprocess.DEVNULL,
    )


@pytest.fixture(scope="module")
def nights(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Five nights in runs/history.sqlite3: the first, three passes, one regression."""
    folder = tmp_path_factory.mktemp("nights")
    settings = GateSettings(history_path=folder / "runs" / "history.sqlite3")
    for night, scale in enumerate((1.0, 1.0, 1.02, 1.3, 0.99), start=1):
        gate_summary(
            *synthetic_run(night, scale=scale, started_at=f"2026-03-0{night}T02:15:00+0000"), settings
        )
    return folder


def test_list_as_json_and_as_a_table(nights: Path) -> None:
    result = loadrun("history", "list", "--json", cwd=nights)
    assert result.returncode == 0, result.stderr
    rows = [json.loads(line) for line in result.stdout.splitlines()]
    assert [row["verdict"] for row in rows] == ["no_baseline", "pass", "pass", "regression", "pass"]
    assert rows[0]["target"] == "larkspit-desk" and rows[0]["measured"] == 300
    table = loadrun("history", "list", "--verdict", "regression", cwd=nights)
    assert table.returncode == 0 and "regression" in table.stdout and "2026-03-04 02:15" in table.stdout
    assert "2026-03-01" not in table.stdout
    since = loadrun("history", "list", "--json", "--since", "2026-03-04", cwd=nights)
    assert len(since.stdout.splitlines()) == 2


def test_trend_in_the_terminal_and_as_svg(nights: Path) -> None:
    result = loadrun(
        "history", "trend", "-s", "ttft.p95", "-s", "tpot.p50", "--svg", "trend.svg", "--json", cwd=nights
    )
    assert result.returncode == 0, result.stderr
    points = [json.loads(line) for line in result.stdout.splitlines()]
    with History(nights / "runs" / "history.sqlite3") as history:
        expected = [history.histograms(point["id"]).get("ttft").percentile_us(95) / 1000 for point in points]
    assert [point["values_ms"]["ttft.p95"] for point in points] == expected
    svg = ET.parse(nights / "trend.svg").getroot()
    panels = svg.findall(f"{SVG}g")
    assert [panel.get("data-label") for panel in panels] == ["ttft.p95", "tpot.p50"]
    for panel in panels:
        line = panel.find(f"{SVG}polyline")
        assert line is not None
        xs = [float(pair.split(",")[0]) for pair in (line.get("points") or "").split()]
        assert len(xs) == 5 and xs == sorted(xs)  # oldest left
        assert len(panel.findall(f"{SVG}circle[@class='regression']")) == 1
    terminal = loadrun("history", "trend", "-s", "e2e.p95", cwd=nights)
    assert terminal.returncode == 0 and "e2e.p95" in terminal.stdout and "regression" in terminal.stdout


def test_pin_and_show(nights: Path, tmp_path: Path) -> None:
    history = tmp_path / "copy.sqlite3"
    with History(nights / "runs" / "history.sqlite3") as source, History(history) as copy:
        for run in source.find():
            copy.record({**run.summary, "histograms": source.histograms(run.id).encode()}, run.config)
    pinned = loadrun("history", "pin", "2", "--history", str(history), cwd=tmp_path)
    assert pinned.returncode == 0 and "run 2 pinned" in pinned.stderr
    shown = json.loads(loadrun("history", "show", "2", "--history", str(history), cwd=tmp_path).stdout)
    assert shown["pinned"] is True and shown["config"]["profile"]["name"] == "nightly-desk-chat"
    assert shown["environment"]["python"] and shown["target_url"] == "http://127.0.0.1:9/v1"
    report = gate_summary(*synthetic_run(9), GateSettings(history_path=history))
    assert report.verdict is Verdict.PASS and report.baseline_ids == [2]
    unpinned = loadrun("history", "pin", "2", "--remove", "--history", str(history), cwd=tmp_path)
    assert unpinned.returncode == 0 and "no longer pinned" in unpinned.stderr


@pytest.mark.parametrize(
    "args",
    [
        ("history", "list", "--history", "missing.sqlite3"),
        ("history", "trend", "-s", "ttft.95"),
        ("history", "list", "--verdict", "fine"),
        ("history", "list", "--since", "last tuesday"),
        ("history", "show", "99"),
        ("gate", "--rule", "ttft.p95 lots"),
        ("gate", "--from-run", "runs"),
    ],
)
def test_mistakes_are_one_line_and_exit_2(nights: Path, args: tuple[str, ...]) -> None:
    result = loadrun(*args, cwd=nights)
    assert result.returncode == 2, result.stderr
    assert "Traceback" not in result.stderr
    assert result.stderr.strip().splitlines()[-1].startswith("UsageError:")


def test_history_alone_shows_its_commands(tmp_path: Path) -> None:
    result = loadrun("history", cwd=tmp_path)
    assert result.returncode == 0
    for command in ("list", "trend", "pin", "show"):
        assert command in result.stdout


@pytest.mark.slow
def test_measure_writes_the_history_unless_told_not_to(tmp_path: Path) -> None:
    common = ("measure", "-n", "4", "-c", "2", "--warmup", "0", "--json")
    first = loadrun(*common, "--out", "out", cwd=tmp_path)
    assert first.returncode == 0, first.stderr
    with History(tmp_path / "out" / "history.sqlite3") as history:
        (run,) = history.find()
        assert run.summary["requests"]["measured"] == 4 and run.verdict is None
    assert loadrun(*common, "--out", "off", "--no-history", cwd=tmp_path).returncode == 0
    assert not (tmp_path / "off" / "history.sqlite3").exists()
    assert loadrun(*common, "--no-save", "--history", "kept.sqlite3", cwd=tmp_path).returncode == 0
    with History(tmp_path / "kept.sqlite3") as history:
        assert len(history.find()) == 1
