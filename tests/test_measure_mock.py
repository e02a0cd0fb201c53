"""loadrun against the bundled mock over real loopback sockets.

The mock's engine has a closed-form ground truth (mock_server.engine.ground_truth), so the
measurements can be held against numbers that do not come from loadrun.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import replace
from pathlib import Path
from typing import Any

import pytest
from _reruns import first_faithful, mock_url_of

from loadrun.profile import LoadSpec, Profile, RequestSpec
from loadrun.runner import MeasureSettings, embedded_mock, measure
from loadrun.store import read_records
from loadrun.target import Target
from mock_server.config import load_config
from mock_server.engine import ground_truth

pytestmark = pytest.mark.slow

ENGINE = str(Path(__file__).with_name("itest-engine.toml"))
PROMPT_TOKENS = 32
OUTPUT_TOKENS = 24


@pytest.fixture(scope="module")
def mock_target() -> Iterator[Target]:
    with embedded_mock(ENGINE) as (target, _info):
        yield target


def settings_for(target: Target, concurrency: int, **changes: Any) -> MeasureSettings:
    profile = Profile(
        name="itest",
        request=RequestSpec(input_tokens=PROMPT_TOKENS, output_tokens=OUTPUT_TOKENS),
        load=LoadSpec(),
    )
    base = MeasureSettings(
        profile=profile, target=target, concurrency=concurrency, duration_s=3.0, warmup_s=1.0, out_dir=None
    )
    return replace(base, **changes)


def test_itl_median_equals_the_engine_step_at_concurrency_one(mock_target: Target) -> None:
    """At concurrency 1 every step holds one sequence: ITL = step_base + decode_per_seq."""
    config = load_config(ENGINE)
    step_ms = config.step_base_ms + config.decode_per_seq_ms
    summary = first_faithful(
        lambda _attempt: measure(settings_for(mock_target, 1, duration_s=2.0)), [mock_url_of(mock_target)]
    ).summary
    itl_p50 = summary["latency"]["itl"]["p50_ms"]
    assert itl_p50 == pytest.approx(step_ms, rel=0.02)


@pytest.mark.parametrize(("concurrency", "seconds"), [(1, 10.0), (4, 3.0), (16, 3.0)])
def test_throughput_and_latency_match_the_engine_ground_truth(
    mock_target: Target, concurrency: int, seconds: float
) -> None:
    """Within 10 % of the closed form; Little's law (L = lambda W, Little 1961) within 5 %.

    At least some 17 requests a run: at concurrency 1 a 3 s run held 5, and one stall of
    16 ms that neither the generator's loop-lag p99 nor the mock's step timer saw (a CI run)
    moved their mean TTFT by 13 %."""
    truth = ground_truth(load_config(ENGINE), concurrency, PROMPT_TOKENS, OUTPUT_TOKENS)
    # The generator and the mock must have kept their pace, or the comparison says nothing
    # about the engine. On a shared machine a stall of either can spoil a run (a CI run was
    # flagged at 6.258 requests/s against 6.253), so such a run is measured again, at most
    # twice, before the check.
    settings = settings_for(mock_target, concurrency, duration_s=seconds)
    summary = first_faithful(lambda _attempt: measure(settings), [mock_url_of(mock_target)]).summary
    # Shown on failure: a miss on a busy machine should say whether the generator lagged.
    seen = {"truth": truth, "generator": summary["generator"], "throughput": summary["throughput"]}
    assert summary["requests"]["failed"] == 0
    assert not summary["generator"]["limited"], seen
    throughput = summary["throughput"]["requests_per_s"]
    assert throughput == pytest.approx(truth.requests_per_s, rel=0.10), seen
    assert summary["throughput"]["output_tokens_per_s"] == pytest.approx(truth.output_tokens_per_s, rel=0.10)
    assert summary["latency"]["ttft"]["mean_ms"] == pytest.approx(truth.mean_ttft_s * 1000, rel=0.10), seen
    assert summary["latency"]["itl"]["mean_ms"] == pytest.approx(truth.mean_itl_s * 1000, rel=0.10), seen
    mean_e2e_s = summary["latency"]["e2e"]["mean_ms"] / 1000
    assert throughput * mean_e2e_s == pytest.approx(concurrency, rel=0.05), seen


def test_token_counts_equal_usage_on_every_request(mock_target: Target, tmp_path: Path) -> None:
    result = measure(settings_for(mock_target, 4, duration_s=None, requests=30, out_dir=tmp_path))
    assert result.folder is not None
    rows = read_records(result.folder / "records.jsonl")
    assert len(rows) == result.summary["sent"]
    measured = [row for row in rows if row["in_window"]]
    assert len(measured) == 30
    for row in rows:
        assert row["outcome"] == "ok"
        assert row["token_source"] == "usage"
        assert row["output_tokens"] == OUTPUT_TOKENS
        assert len(row["chunk_offsets_us"]) == row["output_tokens"]
        assert row["prompt_tokens"] == PROMPT_TOKENS


def test_the_two_transports_agree(mock_target: Target) -> None:
    fast = measure(settings_for(mock_target, 4)).summary
    general = measure(settings_for(mock_target, 4, transport="httpx")).summary
    for metric in ("ttft", "itl", "e2e"):
        assert general["latency"][metric]["mean_ms"] == pytest.approx(
            fast["latency"][metric]["mean_ms"], rel=0.05
        ), metric
    assert general["throughput"]["requests_per_s"] == pytest.approx(
        fast["throughput"]["requests_per_s"], rel=0.05
    )


def test_receive_error_against_the_server_stamps_is_small(mock_target: Target) -> None:
    summary = measure(settings_for(mock_target, 8)).summary
    generator = summary["generator"]
    assert generator["receive_error_samples"] > 0
    assert generator["receive_error_p99_ms"] < 5.0
