"""Fault injection in the mock, and loadrun counting every fault exactly as injected.

The mock decides at most one fault per request with a seeded generator and counts what it
injected (GET /mock/faults); loadrun's outcome counts must equal those counts, and no
failed request may enter the latency histograms. HTTP semantics of the faults: 429 and
Retry-After per RFC 9110 (sections 15.5.20 of RFC 6585 for 429, 10.2.3 for Retry-After);
error bodies and the mid-stream error event per the public chat-completions description
(SOURCES.md section 5).
"""

from __future__ import annotations

import subprocess
import sys
from collections import Counter
from pathlib import Path
from time import perf_counter_ns
from typing import Any

import anyio
import httpx
import pytest

from loadrun.client import ChatClient
from loadrun.profile import LoadSpec, Profile, RequestSpec
from loadrun.protocol import ChatRequest
from loadrun.record import Outcome, Record
from loadrun.runner import MeasureSettings, measure
from loadrun.store import read_records
from loadrun.target import Target
from loadrun.timeouts import Timeouts
from loadrun.transports import FastTransport, HttpxTransport, Transport
from mock_server import EngineConfig, serve, start_subprocess
from mock_server.faults import (
    EXPECTED_OUTCOME,
    FAULT_KINDS,
    STREAM_ONLY,
    FaultInjector,
    FaultPlan,
    FaultsError,
    FaultSettings,
    load_plan,
    plan_from_mapping,
    plan_with_options,
)

QUICK = EngineConfig(model="mock-quick", step_base_ms=4.0, decode_per_seq_ms=0.0, prefill_per_token_ms=0.0)
REQUEST = ChatRequest(messages=({"role": "user", "content": "which pier for the noon ferry"},), max_tokens=5)
STALL_S = 0.6
LIMIT_S = 0.2
"""First-token and idle limits of the client, well below the mock's stalls."""


def make_transport(name: str) -> Transport:
    if name == "fast":
        return FastTransport()
    if name == "fast-protocol":  # the asyncio Protocol path (the one TLS uses), on plain TCP
        return FastTransport(kernel_stamps=False)
    return HttpxTransport()


async def send_all(base_url: str, transport_name: str, count: int, concurrency: int = 4) -> list[Record]:
    transport = make_transport(transport_name)
    timeouts = Timeouts(first_token_s=LIMIT_S, idle_s=LIMIT_S, total_s=10.0)
    client = ChatClient(Target(base_url=base_url, model="m"), transport, timeouts=timeouts)
    records: list[Record] = []

    async def worker(ids: range) -> None:
        for request_id in ids:
            record = Record(request_id=request_id, intended_ns=perf_counter_ns())
            await client.execute(REQUEST, record)
            records.append(record)

    try:
        with anyio.fail_after(60):
            async with anyio.create_task_group() as group:
                for index in range(concurrency):
                    group.start_soon(worker, range(index, count, concurrency))
    finally:
        await transport.aclose()
    return records


# --- the injector ------------------------------------------------------------------------


def test_one_seed_gives_one_sequence_and_at_most_one_fault_per_request() -> None:
    rates = {kind: 0.05 for kind in FAULT_KINDS}
    first = FaultInjector(FaultSettings(rates=rates, seed=11))
    second = FaultInjector(FaultSettings(rates=rates, seed=11))
    drawn = [first.decide(streaming=True) for _ in range(2000)]
    assert drawn == [second.decide(streaming=True) for _ in range(2000)]
    counts = Counter(kind for kind in drawn if kind is not None)
    assert counts == first.injected
    assert first.document()["injected_total"] == sum(counts.values()) <= first.decided == 2000
    # 2000 draws at 5 % each: every kind appears, and the count of each is within 5 sigma
    # of 100 (binomial, sd = sqrt(2000 * 0.05 * 0.95) = 9.7; common practice, no source).
    for kind in FAULT_KINDS:
        assert abs(counts[kind] - 100) < 5 * 9.75, kind


def test_stream_only_faults_spare_non_streamed_requests() -> None:
    injector = FaultInjector(FaultSettings(rates={"malformed_event": 0.5, "server_error": 0.5}, seed=2))
    kinds = [injector.decide(streaming=False) for _ in range(400)]
    assert "malformed_event" not in kinds and "malformed_event" in STREAM_ONLY
    assert injector.injected["server_error"] == kinds.count("server_error") > 100
    assert kinds.count(None) == 400 - kinds.count("server_error")


@pytest.mark.parametrize(
    ("rates", "words"),
    [
        ({"gremlins": 0.1}, "unknown fault"),
        ({"rate_limit": 1.5}, "from 0 to 1"),
        ({"rate_limit": -0.1}, "from 0 to 1"),
        ({"rate_limit": 0.6, "server_error": 0.6}, "add up to"),
        ({"rate_limit": True}, "from 0 to 1"),
    ],
)
def test_bad_rates_are_refused(rates: dict[str, Any], words: str) -> None:
    with pytest.raises(FaultsError, match=words):
        FaultSettings(rates=rates)


def test_plan_from_toml_and_command_line(tmp_path: Path) -> None:
    path = tmp_path / "plan.toml"
    path.write_text(
        "[faults]\nseed = 4\nstall_s = 1.5\n[faults.rates]\nrate_limit = 0.1\n"
        "[quirks]\nno_done_marker = true\ntokens_per_chunk = 3\n"
    )
    plan = load_plan(path)
    assert plan.faults.seed == 4 and plan.faults.stall_s == 1.5 and plan.faults.rates == {"rate_limit": 0.1}
    assert plan.quirks.no_done_marker and plan.quirks.tokens_per_chunk == 3
    changed = plan_with_options(
        plan, ["server_error=0.2", "seed=9"], ["usage_in_last_chunk", "model_echo=other"]
    )
    assert changed.faults.rates == {"rate_limit": 0.1, "server_error": 0.2} and changed.faults.seed == 9
    assert changed.quirks.usage_in_last_chunk and changed.quirks.model_echo == "other"
    assert changed.quirks.no_done_marker  # the file's quirks stay
    for document, words in (
        ({"fault": {}}, "unknown table"),
        ({"faults": {"rates": {"rate_limit": "often"}}}, "from 0 to 1"),
        ({"faults": {"seed": 1.5}}, "whole number"),
        ({"quirks": {"tokens_per_chunk": 0}}, ">= 1"),
        ({"quirks": {"no_usage": "yes"}}, "must be bool"),
        ({"quirks": {"sparkles": True}}, "unknown quirk"),
    ):
        with pytest.raises(FaultsError, match=words):
            plan_from_mapping(document)


@pytest.mark.parametrize(
    "args",
    [
        ["--fault", "gremlins=0.1"],
        ["--fault", "rate_limit"],
        ["--quirk", "sparkles"],
        ["--faults", "nope.toml"],
    ],
)
def test_mock_command_line_refuses_a_bad_plan_in_one_line(args: list[str]) -> None:
    done = subprocess.run(
        [sys.executable, "-m", "mock_server", "--port", "0", *args],
        capture_output=True,
        text=True,
        timeout=30,
        stdin=subprocess.DEVNULL,
    )
    assert done.returncode == 2
    assert "Traceback" not in done.stderr
    assert (
        done.stderr.strip().startswith("mock_server: error:") and len(done.stderr.strip().splitlines()) == 1
    )


# --- each kind against each transport ----------------------------------------------------


@pytest.mark.anyio
@pytest.mark.parametrize("transport_name", ["fast", "fast-protocol", "httpx"])
@pytest.mark.parametrize("kind", FAULT_KINDS)
async def test_each_fault_is_classified_and_counted_exactly(kind: str, transport_name: str) -> None:
    settings = FaultSettings(rates={kind: 0.5}, seed=5, stall_s=STALL_S, slow_headers_s=STALL_S)
    async with serve(QUICK, plan=FaultPlan(settings)) as mock:
        records = await send_all(mock.base_url, transport_name, count=12)
        truth = mock.app.faults.document()
    injected = truth["injected"].get(kind, 0)
    assert 0 < injected < 12 and truth["requests_decided"] == 12
    outcomes = Counter(record.outcome.value for record in records)
    assert outcomes == {EXPECTED_OUTCOME[kind]: injected, "ok": 12 - injected}
    for record in records:
        if record.ok:
            assert record.output_tokens == 5 and record.first_token_ns > 0
        else:
            assert record.error
            if record.outcome in (Outcome.TIMEOUT_FIRST_TOKEN, Outcome.TIMEOUT_IDLE):
                # The limit ended the request, not the end of the stall.
                assert record.end_ns - record.send_ns < (LIMIT_S + 0.15) * 1e9


@pytest.mark.anyio
async def test_rate_limit_carries_retry_after_and_an_error_body() -> None:
    settings = FaultSettings(rates={"rate_limit": 1.0}, retry_after_s=7)
    async with serve(QUICK, plan=FaultPlan(settings)) as mock, httpx.AsyncClient() as http:
        response = await http.post(
            mock.base_url + "/chat/completions",
            json={"model": "m", "messages": [{"role": "user", "content": "hi"}], "stream": True},
        )
    assert response.status_code == 429 and response.headers["retry-after"] == "7"
    assert response.json()["error"]["code"] == "rate_limit_exceeded"


@pytest.mark.anyio
async def test_slow_headers_within_the_limits_are_ok_and_late() -> None:
    """Slow headers are no failure when the limits allow them, but TTFT includes the wait."""
    settings = FaultSettings(rates={"slow_headers": 1.0}, slow_headers_s=0.3)
    async with serve(QUICK, plan=FaultPlan(settings)) as mock:
        transport = FastTransport()
        client = ChatClient(
            Target(base_url=mock.base_url, model="m"), transport, timeouts=Timeouts(total_s=5)
        )
        record = Record(request_id=1, intended_ns=perf_counter_ns())
        await client.execute(REQUEST, record)
        await transport.aclose()
    assert record.ok and record.output_tokens == 5
    assert record.headers_ns - record.send_ns >= 0.3e9
    assert record.ttft_ns is not None and record.ttft_ns >= 0.3e9


@pytest.mark.anyio
async def test_faults_can_be_changed_while_the_mock_runs() -> None:
    async with serve(QUICK) as mock, httpx.AsyncClient() as http:
        url = mock.url + "/mock/faults"
        assert (await http.get(url)).json()["injected_total"] == 0
        answer = await http.post(url, json={"faults": {"rates": {"server_error": 1.0}}})
        assert answer.status_code == 200 and answer.json()["plan"]["faults"]["rates"] == {"server_error": 1.0}
        chat = await http.post(
            mock.base_url + "/chat/completions",
            json={"model": "m", "messages": [{"role": "user", "content": "x"}]},
        )
        assert chat.status_code == 500
        assert (await http.get(url)).json()["injected"] == {"server_error": 1}
        refused = await http.post(url, json={"faults": {"rates": {"server_error": 2}}})
        assert refused.status_code == 400 and "from 0 to 1" in refused.json()["error"]["message"]


# --- a whole run: the summary's counts equal the mock's -----------------------------------

PLAN_TOML = """
[faults]
seed = 21
stall_s = 1.2
slow_headers_s = 1.2
retry_after_s = 1
[faults.rates]
""" + "".join(f"{kind} = 0.06\n" for kind in FAULT_KINDS)


@pytest.mark.slow
@pytest.mark.parametrize("transport", ["fast", "httpx"])
def test_a_run_counts_every_fault_exactly_as_injected(tmp_path: Path, transport: str) -> None:
    plan_file = tmp_path / "plan.toml"
    plan_file.write_text(PLAN_TOML)
    total = 160
    with start_subprocess("small-fast", extra_args=["--faults", str(plan_file)]) as mock:
        settings = MeasureSettings(
            profile=Profile(
                name="faults", request=RequestSpec(input_tokens=8, output_tokens=6), load=LoadSpec()
            ),
            target=Target(base_url=mock.base_url, model="mock-small-fast"),
            concurrency=8,
            requests=total,
            warmup_s=0.0,
            out_dir=tmp_path / "runs",
            record_history=False,
            transport=transport,
            first_token_timeout_s=0.4,
            idle_timeout_s=0.4,
            total_timeout_s=10.0,
        )
        result = measure(settings)
        truth = httpx.get(mock.url + "/mock/faults", timeout=5).json()
    summary = result.summary
    assert set(truth["injected"]) == set(FAULT_KINDS)  # every kind struck at least once
    assert truth["requests_decided"] == summary["requests"]["measured"] == summary["sent"] == total
    expected: Counter[str] = Counter()
    for kind, count in truth["injected"].items():
        expected[EXPECTED_OUTCOME[kind]] += count
    expected["ok"] = total - truth["injected_total"]
    print(f"\n{transport}: injected {truth['injected']} -> by outcome {summary['requests']['by_outcome']}")
    assert summary["requests"]["by_outcome"] == dict(expected)
    assert summary["requests"]["ok"] == expected["ok"]
    assert summary["requests"]["failed"] == truth["injected_total"]
    # No failed request reached a latency histogram.
    for metric in ("ttft", "e2e", "tpot"):
        assert summary["latency"][metric]["count"] == expected["ok"], metric
    assert summary["latency"]["itl"]["count"] == expected["ok"] * 5
    # The record lines on disk say the same, one per request.
    assert result.folder is not None
    rows = read_records(result.folder / "records.jsonl")
    assert Counter(row["outcome"] for row in rows) == expected
    assert all(row["error"] for row in rows if row["outcome"] != "ok")
