"""Arrival processes and the open-loop driver.

Distribution checks use scipy.stats (kstest against the exponential and gamma laws); the
driver is exercised with a stand-in ``execute`` (no network) on the real clock.
"""

from __future__ import annotations

import itertools
import json
import random
import statistics
from collections.abc import Iterator
from pathlib import Path
from time import perf_counter_ns

import anyio
import pytest
from scipy import stats

from loadrun.arrivals import (
    BurstyArrivals,
    ConstantArrivals,
    PoissonArrivals,
    TraceArrivals,
    load_trace,
    make_arrivals,
)
from loadrun.distributions import Distribution
from loadrun.driver import ClosedLoopPlan, Execute, OpenLoopPlan, run_closed_loop, run_open_loop
from loadrun.errors import UsageError
from loadrun.profile import LoadSpec, Profile, RequestSpec, Session
from loadrun.protocol import ChatRequest
from loadrun.record import Outcome, Record
from loadrun.workload import Conversation, Workload


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


def gaps(offsets: Iterator[float], count: int) -> list[float]:
    points = [0.0, *itertools.islice(offsets, count)]
    return [b - a for a, b in itertools.pairwise(points)]


def test_poisson_gaps_pass_kolmogorov_smirnov_against_the_exponential() -> None:
    """Inter-arrival times of a Poisson process are exponential with mean 1/rate
    (scipy.stats.kstest, one-sample, against scipy.stats.expon)."""
    rate = 25.0
    sample = gaps(PoissonArrivals(rate).offsets_s(random.Random(3)), 5000)
    result = stats.kstest(sample, "expon", args=(0, 1 / rate))
    assert result.pvalue > 0.01, result
    assert statistics.fmean(sample) == pytest.approx(1 / rate, rel=0.05)
    # The same test has the power to reject what is not exponential: constant gaps.
    constant = gaps(ConstantArrivals(rate).offsets_s(random.Random(3)), 5000)
    assert stats.kstest(constant, "expon", args=(0, 1 / rate)).pvalue < 1e-6


def test_constant_rate_does_not_drift_over_ten_thousand_arrivals() -> None:
    rate = 7.3  # a rate whose gap has no exact binary form, where summing gaps would drift
    offsets = list(itertools.islice(ConstantArrivals(rate).offsets_s(random.Random(0)), 10_000))
    for index, offset in enumerate(offsets):
        assert offset == pytest.approx(index / rate, abs=1e-12)
    assert offsets[-1] == pytest.approx(9_999 / rate, abs=1e-12)
    summed = 0.0
    for _ in range(9_999):
        summed += 1 / rate
    assert summed != offsets[-1]  # what accumulating the gaps would have given instead


def test_bursty_gaps_are_gamma_with_the_asked_variation() -> None:
    """Gamma inter-arrivals with shape 1/cv^2 and mean 1/rate (scipy.stats.gamma)."""
    rate, cv = 10.0, 2.5
    sample = gaps(BurstyArrivals(rate, cv).offsets_s(random.Random(5)), 20_000)
    shape = 1 / cv**2
    result = stats.kstest(sample, "gamma", args=(shape, 0, 1 / (rate * shape)))
    assert result.pvalue > 0.01, result
    assert statistics.fmean(sample) == pytest.approx(1 / rate, rel=0.05)
    assert statistics.stdev(sample) / statistics.fmean(sample) == pytest.approx(cv, rel=0.05)


def test_arrivals_are_deterministic_per_seed() -> None:
    first = list(itertools.islice(PoissonArrivals(3.0).offsets_s(random.Random("9:arrivals")), 50))
    again = list(itertools.islice(PoissonArrivals(3.0).offsets_s(random.Random("9:arrivals")), 50))
    other = list(itertools.islice(PoissonArrivals(3.0).offsets_s(random.Random("10:arrivals")), 50))
    assert first == again and first != other


def write_trace(path: Path, rows: list[dict[str, object]]) -> Path:
    path.write_text("".join(json.dumps(row) + "\n" for row in rows))
    return path


def test_trace_loads_and_plays_at_a_scaled_speed(tmp_path: Path) -> None:
    trace = write_trace(
        tmp_path / "t.jsonl",
        [
            {"offset_s": 0, "input_tokens": 10, "output_tokens": 5},
            {"offset_s": 1.5, "input_tokens": 20, "output_tokens": 6, "class": "b"},
            {"offset_s": 3.0, "input_tokens": 30, "output_tokens": 7},
        ],
    )
    entries = load_trace(trace)
    assert [entry.request_class for entry in entries] == [None, "b", None]
    arrivals = make_arrivals("replay", None, trace=trace, speed=2.0)
    assert isinstance(arrivals, TraceArrivals)
    assert list(arrivals.offsets_s(random.Random(0))) == [0.0, 0.75, 1.5]
    assert arrivals.describe()["span_s"] == 1.5


@pytest.mark.parametrize(
    ("line", "problem"),
    [
        ('{"offset_s": 0, "input_tokens": 10}', "output_tokens"),
        ('{"offset_s": -1, "input_tokens": 10, "output_tokens": 5}', "offset_s"),
        ('{"offset_s": 0, "input_tokens": 1.5, "output_tokens": 5}', "input_tokens"),
        ('{"offset_s": 0, "input_tokens": 10, "output_tokens": 5, "colour": 1}', "unknown key"),
        ("[1, 2]", "JSON object"),
        ("{not json", "not JSON"),
    ],
)
def test_bad_trace_lines_are_named(tmp_path: Path, line: str, problem: str) -> None:
    path = tmp_path / "bad.jsonl"
    path.write_text('{"offset_s": 0, "input_tokens": 3, "output_tokens": 2}\n' + line + "\n")
    with pytest.raises(UsageError, match=problem) as info:
        load_trace(path)
    assert f"{path}:2" in str(info.value)


def test_trace_offsets_must_not_go_back(tmp_path: Path) -> None:
    path = write_trace(
        tmp_path / "t.jsonl",
        [
            {"offset_s": 2, "input_tokens": 1, "output_tokens": 1},
            {"offset_s": 1, "input_tokens": 1, "output_tokens": 1},
        ],
    )
    with pytest.raises(UsageError, match="earlier"):
        load_trace(path)


def test_open_plans_need_a_rate() -> None:
    with pytest.raises(UsageError, match="positive rate"):
        make_arrivals("poisson", None)
    with pytest.raises(UsageError, match="positive rate"):
        make_arrivals("constant", 0.0)


# --- the open-loop driver -------------------------------------------------------------------


def stand_in(service_s: float, tokens: int = 4) -> tuple[list[Record], Execute]:
    """An ``execute`` that answers after ``service_s`` without any network."""
    seen: list[Record] = []

    async def execute(request: ChatRequest, record: Record) -> Record:
        record.send_ns = perf_counter_ns()
        await anyio.sleep(service_s)
        record.first_token_ns = record.end_ns = perf_counter_ns()
        record.output_tokens = tokens
        seen.append(record)
        return record

    return seen, execute


def conversations(profile: Profile) -> Iterator[Conversation]:
    return Workload(profile).conversations()


@pytest.mark.anyio
async def test_in_flight_cap_counts_every_request_it_could_not_send() -> None:
    """50 requests due within 0.25 s, each taking 1 s, at most 5 in flight: 5 are sent, and
    the 45 others are recorded as not sent, none silently dropped."""
    _, execute = stand_in(1.0)
    plan = OpenLoopPlan(ConstantArrivals(200.0), duration_s=0.25, warmup_s=0.0, in_flight_cap=5)
    profile = Profile(request=RequestSpec(input_tokens=3, output_tokens=2), load=LoadSpec())
    arrivals = zip(ConstantArrivals(200.0).offsets_s(random.Random(0)), conversations(profile), strict=False)
    records: list[Record] = []
    level = await run_open_loop(plan, execute, arrivals, records.append)
    outcomes = [record.outcome for record in records]
    assert len(records) == level.due == 50
    assert outcomes.count(Outcome.OK) == 5
    assert outcomes.count(Outcome.NOT_SENT) == level.not_sent == 45
    assert all("in-flight cap" in (record.error or "") for record in records if not record.ok)


@pytest.mark.anyio
async def test_latency_counts_from_the_due_time_when_sends_are_late() -> None:
    """A generator that falls behind cannot hide the wait (coordinated omission, SOURCES.md
    section 4): a request sent late is measured from when it was due."""
    blocked = False

    async def execute(request: ChatRequest, record: Record) -> Record:
        nonlocal blocked
        if not blocked:  # the first request stalls the whole event loop for 80 ms
            blocked = True
            import time

            time.sleep(0.08)
        record.send_ns = perf_counter_ns()
        await anyio.sleep(0.005)
        record.first_token_ns = record.end_ns = perf_counter_ns()
        return record

    plan = OpenLoopPlan(ConstantArrivals(100.0), requests=10, warmup_s=0.0)
    profile = Profile(request=RequestSpec(input_tokens=3, output_tokens=2), load=LoadSpec())
    arrivals = zip(ConstantArrivals(100.0).offsets_s(random.Random(0)), conversations(profile), strict=False)
    records: list[Record] = []
    level = await run_open_loop(plan, execute, arrivals, records.append)
    late = [record for record in records if record.send_lag_ns > 20_000_000]
    assert len(late) >= 3  # the requests due during the stall went out late...
    for record in late:
        assert record.e2e_ns is not None
        assert record.e2e_ns >= record.send_lag_ns + 5_000_000  # ...and their latency shows it
    assert level.late_sends >= 3
    assert level.send_lag.max_us >= 20_000


@pytest.mark.anyio
async def test_constant_rate_sends_stay_on_schedule() -> None:
    """2,000 sends at 1,000/s: the last ones are as punctual as the first (no drift)."""
    _, execute = stand_in(0.0005)
    plan = OpenLoopPlan(ConstantArrivals(1000.0), requests=2000, warmup_s=0.0)
    profile = Profile(request=RequestSpec(input_tokens=2, output_tokens=1), load=LoadSpec())
    arrivals = zip(ConstantArrivals(1000.0).offsets_s(random.Random(0)), conversations(profile), strict=False)
    records: list[Record] = []
    level = await run_open_loop(plan, execute, arrivals, records.append)
    records.sort(key=lambda record: record.request_id)
    first = statistics.median(record.send_lag_ns for record in records[:200])
    last = statistics.median(record.send_lag_ns for record in records[-200:])
    due_span = records[-1].intended_ns - records[0].intended_ns
    print(f"\nsend lag median: first 200 {first / 1000:.0f} us, last 200 {last / 1000:.0f} us")
    assert due_span == pytest.approx(1.999e9, abs=2_000)
    assert abs(last - first) < 1_000_000
    assert level.due == 2000


@pytest.mark.anyio
async def test_session_turns_follow_their_think_time_after_each_answer() -> None:
    seen, execute = stand_in(0.01)
    spec = RequestSpec(
        input_tokens=5,
        output_tokens=3,
        session=Session(turns=3, think_time=Distribution.fixed(0.05), history=True),
    )
    profile = Profile(request=spec, load=LoadSpec())
    plan = OpenLoopPlan(ConstantArrivals(1.0), duration_s=0.5, warmup_s=0.0)
    arrivals = zip(ConstantArrivals(1.0).offsets_s(random.Random(0)), conversations(profile), strict=False)
    records: list[Record] = []
    await run_open_loop(plan, execute, arrivals, records.append)
    assert [record.turn for record in records] == [0, 1, 2]
    for before, after in itertools.pairwise(records):
        assert after.intended_ns - before.end_ns == pytest.approx(50_000_000, abs=2_000_000)
    # The history is carried: the last turn holds the two earlier questions and answers.
    assert len(records) == len(seen) == 3


@pytest.mark.anyio
async def test_closed_loop_runs_sessions_and_think_time() -> None:
    _, execute = stand_in(0.002)
    spec = RequestSpec(
        input_tokens=5,
        output_tokens=3,
        session=Session(turns=2, think_time=Distribution.fixed(0.02)),
    )
    profile = Profile(request=spec, load=LoadSpec())
    plan = ClosedLoopPlan(concurrency=2, requests=8, warmup_s=0.0, think_time_s=0.01)
    records: list[Record] = []
    await run_closed_loop(plan, execute, conversations(profile), records.append)
    assert len(records) >= 8
    by_conversation: dict[int, list[int]] = {}
    for record in records:
        by_conversation.setdefault(record.conversation, []).append(record.turn)
    assert all(turns in ([0, 1], [0]) for turns in by_conversation.values())


@pytest.mark.anyio
async def test_a_long_think_time_is_not_waited_out_after_the_last_request() -> None:
    """Once the request count is used (or the window is over), no client sits out a think
    time that no request can follow: the level ends when the last answer is in."""
    _, execute = stand_in(0.01)
    spec = RequestSpec(
        input_tokens=5, output_tokens=3, session=Session(turns=2, think_time=Distribution.fixed(30.0))
    )
    profile = Profile(request=spec, load=LoadSpec())
    started = perf_counter_ns()
    closed = ClosedLoopPlan(concurrency=2, requests=2, warmup_s=0.0, think_time_s=30.0)
    records: list[Record] = []
    await run_closed_loop(closed, execute, conversations(profile), records.append)
    assert len(records) == 2  # the count is used by the first turns; their second turns never come
    opened = OpenLoopPlan(ConstantArrivals(20.0), duration_s=0.3, warmup_s=0.0)
    arrivals = zip(ConstantArrivals(20.0).offsets_s(random.Random(0)), conversations(profile), strict=False)
    await run_open_loop(opened, execute, arrivals, records.append)
    assert (perf_counter_ns() - started) / 1e9 < 2.0
