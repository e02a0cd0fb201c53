"""Prompt synthesis and input-length calibration."""

from __future__ import annotations

import math
import random
from pathlib import Path
from typing import Any

import anyio
import pytest

from loadrun.profile import load_profile
from loadrun.prompts import ONE_TOKEN_PER_WORD, TokenFit, _solve, calibrate_tokens, count_words, synthesize
from loadrun.protocol import ChatRequest
from loadrun.record import Outcome, Record
from loadrun.runner import MeasureSettings, measure


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


def test_synthesis_is_deterministic_and_of_the_asked_length() -> None:
    first = synthesize(300, random.Random(4))
    assert first == synthesize(300, random.Random(4))
    assert first != synthesize(300, random.Random(5))
    assert len(first.split()) == 300
    assert len(synthesize(0, random.Random(1)).split()) == 1


def test_token_fit_turns_tokens_into_words_and_back() -> None:
    fit = TokenFit(per_word=1.25, per_message=4.0, per_request=3.0)
    words = fit.words_for(1000, messages=2, other_words=40)
    assert words == round((1000 - 3 - 8 - 1.25 * 40) / 1.25)
    messages = [
        {"role": "system", "content": " ".join(["a"] * 40)},
        {"role": "user", "content": " ".join(["b"] * words)},
    ]
    assert count_words(messages) == 40 + words
    assert fit.predict(messages) == pytest.approx(1000, abs=1)


def test_least_squares_recovers_a_linear_tokenizer() -> None:
    truth = TokenFit(per_word=1.3, per_message=4.0, per_request=2.0)
    rows = [(m, w, round(truth.tokens(w, m))) for m, w in [(1, 32), (1, 256), (2, 32), (1, 2000)]]
    fit = _solve(rows, "test")
    assert fit.per_word == pytest.approx(1.3, rel=1e-3)
    assert fit.per_message == pytest.approx(4.0, abs=0.2)


def tokenizer_execute(per_word: float, per_message: int, per_request: int, report_usage: bool = True) -> Any:
    """A stand-in target whose tokenizer is known exactly."""

    async def execute(request: ChatRequest, record: Record) -> Record:
        words = count_words(request.messages)
        if report_usage:
            record.prompt_tokens = (
                per_request + per_message * len(request.messages) + math.ceil(per_word * words)
            )
        record.output_tokens = 1
        return record

    return execute


@pytest.mark.anyio
async def test_calibration_learns_the_targets_counts() -> None:
    calibration = await calibrate_tokens(tokenizer_execute(0.8, 5, 3), typical_tokens=3000, seed=1)
    fit = calibration.fit
    assert fit.per_word == pytest.approx(0.8, rel=0.01)
    assert fit.per_message == pytest.approx(5, abs=1)
    assert len(calibration.probes) == 4  # three shapes and the check at the typical length
    # The fit turns a requested length into a prompt that comes out at that length.
    for target in (150, 2000, 6000):
        words = fit.words_for(target, 2, 10)
        reported = 3 + 5 * 2 + math.ceil(0.8 * (words + 10))
        assert reported == pytest.approx(target, rel=0.01)


@pytest.mark.anyio
async def test_calibration_without_usage_falls_back_and_says_so() -> None:
    calibration = await calibrate_tokens(tokenizer_execute(1.3, 0, 0, report_usage=False), 500, seed=1)
    assert calibration.fit == ONE_TOKEN_PER_WORD
    assert "no usage.prompt_tokens" in calibration.note


@pytest.mark.anyio
async def test_a_failed_probe_falls_back_and_says_so() -> None:
    async def refuse(request: ChatRequest, record: Record) -> Record:
        record.outcome = Outcome.HTTP_ERROR
        record.error = "HTTP 401: no key"
        return record

    calibration = await calibrate_tokens(refuse, 500, seed=1)
    assert calibration.fit == ONE_TOKEN_PER_WORD
    assert "http_error" in calibration.note


MIX = """
name = "calibration-mix"
seed = 5
[load]
concurrency = 4
[[classes]]
name = "short"
system_prompt = "You answer in the invented language of the harbour."
input_tokens = { distribution = "uniform", min = 40, max = 200 }
output_tokens = 4
[[classes]]
name = "long"
input_tokens = { distribution = "lognormal", median = 1500, sigma = 0.3, max = 3000 }
output_tokens = 4
[classes.shared_prefix]
tokens = 300
share = 0.5
[[classes]]
name = "chat"
input_tokens = { distribution = "normal", mean = 120, sd = 30, min = 40 }
output_tokens = 6
[classes.session]
turns = 3
"""


@pytest.mark.slow
@pytest.mark.parametrize("tokens_per_word", [1.0, 1.37, 0.75])
def test_calibration_reaches_requested_input_lengths_on_the_mock(
    tmp_path: Path, tokens_per_word: float
) -> None:
    """Within 5 % per request (first turns, whose length was drawn), and 1 % on average,
    whatever tokens-per-word ratio the mock is configured with; without calibration the
    error is the ratio itself, so this check can fail."""
    engine = tmp_path / "engine.toml"
    engine.write_text(f'model = "mock-ratio"\nstep_base_ms = 2.0\ntokens_per_word = {tokens_per_word}\n')
    (tmp_path / "mix.toml").write_text(MIX)
    profile = load_profile(tmp_path / "mix.toml")
    assert profile.calibrate_input
    rows: list[Record] = []
    settings = MeasureSettings(
        profile=profile,
        requests=60,
        warmup_s=0.0,
        out_dir=None,
        mock_engine=str(engine),
        record_history=False,
    )
    summary = anyio.run(_measure_collecting, settings, rows)
    assert summary["requests"]["failed"] == 0
    fit = summary["input_calibration"]["fit"]
    assert fit["per_word"] == pytest.approx(tokens_per_word, rel=0.01)
    first_turns = [record for record in rows if record.turn == 0]
    assert len(first_turns) >= 30
    for record in first_turns:
        assert record.prompt_tokens is not None
        assert record.prompt_tokens == pytest.approx(record.requested_input_tokens, rel=0.05), record
    lengths = summary["input_lengths"]
    print(f"\ntokens/word {tokens_per_word}: {lengths}")
    assert abs(lengths["mean_relative_error"]) < 0.01
    assert lengths["max_relative_error"] < 0.05
    assert set(summary["classes"]) == {"short", "long", "chat"}
    if tokens_per_word != 1.0:
        uncalibrated = anyio.run(_measure_collecting, _replace(settings, calibrate_input=False), [])
        error = uncalibrated["input_lengths"]["mean_relative_error"]
        assert error == pytest.approx(tokens_per_word - 1, abs=0.03)


def _replace(settings: MeasureSettings, **changes: Any) -> MeasureSettings:
    from dataclasses import replace

    return replace(settings, **changes)


async def _measure_collecting(settings: MeasureSettings, rows: list[Record]) -> dict[str, Any]:
    from loadrun.runner import measure_async

    return (await measure_async(settings, observe=rows.append)).summary


def test_measure_reports_the_calibration_in_the_summary() -> None:
    summary = measure(
        MeasureSettings(requests=3, concurrency=1, warmup_s=0.0, out_dir=None, calibrate_input=True)
    ).summary
    assert summary["input_calibration"]["fit"]["per_word"] == pytest.approx(1.0, rel=0.01)
    assert [probe["outcome"] for probe in summary["input_calibration"]["probes"]] == ["ok"] * 3
