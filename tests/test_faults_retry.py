"""Retrying rate-limited requests: Retry-After honoured up to a cap, retries kept apart.

Retry-After is "HTTP-date / delay-seconds" (RFC 9110, section 10.2.3; its example date
"Fri, 31 Dec 1999 23:59:59 GMT" is used below). A 429 stays counted as rate limited
whatever the retry brings, so first-attempt latency is not flattered by retries.
"""

from __future__ import annotations

import email.utils
import json
from collections import Counter
from pathlib import Path
from time import perf_counter_ns

import anyio
import httpx
import pytest

from loadrun.client import ChatClient
from loadrun.errors import UsageError
from loadrun.profile import LoadSpec, Profile, RequestSpec
from loadrun.protocol import ChatRequest
from loadrun.record import Outcome, Record
from loadrun.retry import RETRIES_FILE, RetryPolicy, parse_retry_after
from loadrun.runner import MeasureSettings, measure
from loadrun.store import read_records
from loadrun.target import Target
from loadrun.transports import FastTransport
from mock_server import EngineConfig, serve, start_subprocess
from mock_server.faults import FaultPlan, FaultSettings

QUICK = EngineConfig(model="mock-quick", step_base_ms=4.0, decode_per_seq_ms=0.0, prefill_per_token_ms=0.0)
REQUEST = ChatRequest(messages=({"role": "user", "content": "is the harbour open"},), max_tokens=4)
RFC_EXAMPLE_DATE = "Fri, 31 Dec 1999 23:59:59 GMT"


@pytest.mark.parametrize(
    ("value", "seconds"),
    [
        ("120", 120.0),
        (b" 7 ", 7.0),
        ("0", 0.0),
        ("1.5", None),  # delay-seconds is 1*DIGIT: no fractions
        ("-3", None),
        ("soon", None),
        ("", None),
        (None, None),
    ],
)
def test_retry_after_delay_seconds(value: str | bytes | None, seconds: float | None) -> None:
    assert parse_retry_after(value) == seconds


def test_retry_after_http_date() -> None:
    example = email.utils.parsedate_to_datetime(RFC_EXAMPLE_DATE).timestamp()
    assert parse_retry_after(RFC_EXAMPLE_DATE, now=example - 90) == pytest.approx(90.0)
    assert parse_retry_after(RFC_EXAMPLE_DATE, now=example + 90) == 0.0  # a date past is "now"


def test_policy_caps_the_wait() -> None:
    policy = RetryPolicy(max_retries=2, max_wait_s=5.0, default_wait_s=1.5)
    assert policy.wait_s(3.0) == 3.0 and policy.wait_s(3600.0) == 5.0 and policy.wait_s(None) == 1.5
    with pytest.raises(UsageError):
        RetryPolicy(max_retries=-1)
    with pytest.raises(UsageError):
        RetryPolicy(max_wait_s=float("nan"))


async def first_and_retries(
    plan: FaultPlan, policy: RetryPolicy, stop: anyio.Event | None = None
) -> tuple[Record, list[tuple[Record, int, float]], dict[str, object]]:
    retries: list[tuple[Record, int, float]] = []
    async with serve(QUICK, plan=plan) as mock:
        transport = FastTransport()
        client = ChatClient(
            Target(base_url=mock.base_url, model="m"),
            transport,
            retry=policy,
            on_retry=lambda record, attempt, waited: retries.append((record, attempt, waited)),
            stop=stop,
        )
        first = Record(request_id=7, intended_ns=perf_counter_ns())
        with anyio.fail_after(20):
            await client.execute(REQUEST, first)
        await transport.aclose()
        truth = mock.app.faults.document()
    return first, retries, truth


@pytest.mark.anyio
async def test_retry_waits_as_long_as_retry_after_asks() -> None:
    plan = FaultPlan(FaultSettings(rates={"rate_limit": 1.0}, retry_after_s=1))
    first, retries, truth = await first_and_retries(plan, RetryPolicy(max_retries=1, max_wait_s=5.0))
    assert first.outcome is Outcome.RATE_LIMITED and first.status == 429
    assert len(retries) == 1
    retry, attempt, waited = retries[0]
    assert attempt == 2 and waited == 1.0 and retry.request_id == 7
    assert retry.outcome is Outcome.RATE_LIMITED  # every request is limited in this plan
    assert 1.0 <= (retry.send_ns - first.end_ns) / 1e9 < 1.2
    assert truth["injected"] == {"rate_limit": 2}


@pytest.mark.anyio
async def test_the_cap_shortens_the_wait_and_bounds_the_attempts() -> None:
    plan = FaultPlan(FaultSettings(rates={"rate_limit": 1.0}, retry_after_s=30))
    first, retries, truth = await first_and_retries(plan, RetryPolicy(max_retries=3, max_wait_s=0.1))
    assert [attempt for _, attempt, _ in retries] == [2, 3, 4]
    assert all(waited == 0.1 for _, _, waited in retries)
    assert truth["injected"] == {"rate_limit": 4}
    assert first.outcome is Outcome.RATE_LIMITED


@pytest.mark.anyio
async def test_no_retry_starts_after_a_stop() -> None:
    stop = anyio.Event()
    plan = FaultPlan(FaultSettings(rates={"rate_limit": 1.0}, retry_after_s=30))

    async def stop_soon() -> None:
        await anyio.sleep(0.2)
        stop.set()

    async with anyio.create_task_group() as group:
        group.start_soon(stop_soon)
        started = perf_counter_ns()
        first, retries, truth = await first_and_retries(plan, RetryPolicy(max_retries=3, max_wait_s=30), stop)
    assert first.outcome is Outcome.RATE_LIMITED
    assert retries == [] and truth["injected"] == {"rate_limit": 1}
    assert (perf_counter_ns() - started) / 1e9 < 2.0


@pytest.mark.slow
def test_retries_are_recorded_apart_and_counts_still_match(tmp_path: Path) -> None:
    extra = ["--fault", "rate_limit=0.4", "--fault", "retry_after_s=1", "--fault", "seed=3"]
    with start_subprocess("small-fast", extra_args=extra) as mock:
        settings = MeasureSettings(
            profile=Profile(
                name="retry", request=RequestSpec(input_tokens=8, output_tokens=5), load=LoadSpec()
            ),
            target=Target(base_url=mock.base_url, model="mock-small-fast"),
            concurrency=4,
            requests=40,
            warmup_s=0.0,
            out_dir=tmp_path,
            record_history=False,
            retry_rate_limited=2,
            retry_wait_cap_s=0.1,
        )
        result = measure(settings)
        truth = httpx.get(mock.url + "/mock/faults", timeout=5).json()
    summary = result.summary
    requests = summary["requests"]
    retries = summary["retries"]
    # Every first attempt is a request: 40 of them, the 429s among them counted as such.
    assert requests["measured"] == 40
    assert requests["by_outcome"].get("ok", 0) + requests["by_outcome"].get("rate_limited", 0) == 40
    limited_first = requests["by_outcome"]["rate_limited"]
    assert limited_first > 0 and retries["sent"] >= limited_first
    # The mock injected exactly the 429s loadrun saw, first attempts and retries together.
    assert truth["requests_decided"] == 40 + retries["sent"]
    assert truth["injected"]["rate_limit"] == limited_first + retries["by_outcome"].get("rate_limited", 0)
    assert retries["recovered"] == retries["by_outcome"].get("ok", 0) > 0
    # Histograms hold first attempts only: a recovered request is not an ok request.
    assert summary["latency"]["e2e"]["count"] == requests["ok"]
    assert result.folder is not None
    lines = read_records(result.folder / RETRIES_FILE)
    assert len(lines) == retries["sent"]
    assert all(line["attempt"] >= 2 and line["waited_s"] == 0.1 for line in lines)
    assert Counter(line["outcome"] for line in lines) == Counter(retries["by_outcome"])
    first_ids = {
        row["id"] for row in read_records(result.folder / "records.jsonl") if row["outcome"] == "rate_limited"
    }
    assert {line["id"] for line in lines} <= first_ids
    assert json.loads((result.folder / "config.json").read_text())["retry_rate_limited"]["retries"] == 2
