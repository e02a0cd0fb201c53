"""Generator health: a run whose generator was saturated is flagged, with by how much."""

from __future__ import annotations

import io
import time
from pathlib import Path

import anyio
import pytest
from rich.console import Console

from loadrun.gate import GateSettings, validity_problems
from loadrun.generator_health import (
    CPU_BUSY_SHARE,
    LOOP_LAG_LIMIT_MS,
    CpuMeter,
    assess_generator,
    generator_note,
)
from loadrun.profile import LoadSpec, Profile, RequestSpec
from loadrun.report.terminal import render_summary
from loadrun.runner import MeasureSettings, measure_async

ENGINE = str(Path(__file__).with_name("itest-engine.toml"))


def test_a_calm_generator_is_not_flagged() -> None:
    judged = assess_generator(
        {"loop_lag_p99_ms": 1.0, "receive_error_p99_ms": 0.1, "send_lag_p99_ms": None},
        {"cpu_s": 0.5, "wall_s": 5.0, "cpu_share": 0.1},
    )
    assert judged["limited"] is False
    assert judged["health"]["note"] is None and judged["health"]["over_by"] is None
    signs = [check["sign"] for check in judged["health"]["checks"]]
    assert signs == ["loop_lag_p99_ms", "receive_error_p99_ms", "cpu_share"]  # send lag unmeasured: skipped
    assert judged["cpu_share"] == 0.1


@pytest.mark.parametrize(
    ("key", "value", "words"),
    [
        ("loop_lag_p99_ms", 12.0, "event-loop lag p99 12.0 ms is 2.4x its limit of 5 ms"),
        ("receive_error_p99_ms", 7.5, "receive backlog p99 7.5 ms is 1.5x its limit of 5 ms"),
        ("send_lag_p99_ms", 50.0, "send lateness p99 50.0 ms is 10.0x its limit of 5 ms"),
    ],
)
def test_each_timing_sign_over_its_limit_flags_the_run_and_says_by_how_much(
    key: str, value: float, words: str
) -> None:
    generator = {"loop_lag_p99_ms": 1.0, "receive_error_p99_ms": 0.1, "send_lag_p99_ms": 0.2, key: value}
    judged = assess_generator(generator)
    assert judged["limited"] is True
    assert words in judged["health"]["note"]
    assert judged["health"]["over_by"] == pytest.approx(value / 5.0)
    assert generator_note({"generator": judged}) == judged["health"]["note"]


def test_a_busy_cpu_warns_without_flagging() -> None:
    judged = assess_generator({"loop_lag_p99_ms": 1.0}, {"cpu_share": CPU_BUSY_SHARE + 0.05})
    assert judged["limited"] is False
    assert "95 % of one core" in judged["health"]["note"]


def test_an_older_summary_still_gets_a_verdict_from_its_loop_lag() -> None:
    note = generator_note({"generator": {"limited": True, "loop_lag_p99_ms": 9.0}})
    assert note == f"generator-limited: event-loop lag p99 9.0 ms (limit {LOOP_LAG_LIMIT_MS:g} ms)"
    assert generator_note({"generator": {"limited": False}}) is None


def test_cpu_meter_measures_the_share_of_one_core() -> None:
    cpu = iter([1.0, 1.6])
    wall = iter([10.0, 12.0])
    meter = CpuMeter(cpu_clock=lambda: next(cpu), wall_clock=lambda: next(wall))
    meter.start()
    assert meter.stop() == {"cpu_s": 0.6, "wall_s": 2.0, "cpu_share": 0.3}


@pytest.mark.slow
@pytest.mark.anyio
async def test_a_starved_generator_is_flagged_as_generator_limited(tmp_path: Path) -> None:
    """A busy loop in the same process holds the event loop 30 ms at a time: the run must
    come out generator-limited, in the summary, the terminal view and the gate."""
    profile = Profile(name="itest", request=RequestSpec(input_tokens=32, output_tokens=24), load=LoadSpec())
    settings = MeasureSettings(
        profile=profile,
        concurrency=2,
        duration_s=1.5,
        warmup_s=0.2,
        out_dir=None,
        mock_engine=ENGINE,
        record_history=False,
    )
    done = anyio.Event()

    async def hog() -> None:
        while not done.is_set():
            until = time.perf_counter() + 0.03
            while time.perf_counter() < until:
                pass  # competes with the generator for its own event loop
            await anyio.sleep(0.005)

    async with anyio.create_task_group() as group:
        group.start_soon(hog)
        summary = (await measure_async(settings)).summary
        done.set()
    generator = summary["generator"]
    assert generator["limited"] is True
    assert generator["loop_lag_p99_ms"] > 20.0
    note = generator["health"]["note"]
    assert note.startswith("generator-limited: event-loop lag p99") and "x its limit of 5 ms" in note
    assert generator["health"]["over_by"] > 4.0
    problems = validity_problems(summary, GateSettings(history_path=tmp_path / "h.sqlite3", min_samples=1))
    assert any(problem.startswith("generator-limited") and "x its limit" in problem for problem in problems)
    screen = io.StringIO()
    render_summary(summary, Console(file=screen, width=200, color_system=None))
    assert "GENERATOR-LIMITED" in screen.getvalue() and "x its limit of 5 ms" in screen.getvalue()
