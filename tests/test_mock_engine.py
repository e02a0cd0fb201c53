"""The mock engine: its analytic ground truth, the shared step rules, the asyncio loop,
the tokenizer and text, and config loading.

The ground-truth formulas are this project's own performance model (see
mock_server/engine.py); the numbers below are computed by hand from them. The queueing
identity used for the saturated regime is Little's law (Little 1961; Kleinrock,
*Queueing Systems* vol. 1, 1975; SOURCES.md section 2).
"""

from __future__ import annotations

import dataclasses
import random
import time
from collections.abc import Callable
from pathlib import Path

import anyio
import pytest

from mock_server import (
    AdmissionRejected,
    ConfigError,
    Engine,
    EngineConfig,
    count_tokens,
    ground_truth,
    load_config,
    preset_names,
    simulate_closed_loop,
)
from mock_server.scheduler import Sequence, StepScheduler
from mock_server.text import VOCABULARY, choose_word_indices, generate_text

HAND = EngineConfig(
    model="hand-check",
    step_base_ms=10.0,
    decode_per_seq_ms=1.0,
    prefill_per_token_ms=0.1,
    max_running=8,
    max_batch_tokens=100_000,
    context_window=10_000,
)


# ---------------------------------------------------------------- ground truth by hand


def test_ground_truth_single_client_idles_between_requests() -> None:
    # P=100, O=11: TTFT = 10 + 1 + 0.1*100 = 21 ms; ITL = 11 ms; E2E = 21 + 10*11 = 131 ms.
    truth = ground_truth(HAND, 1, 100, 11)
    assert truth.regime == "idle-between"
    assert truth.mean_ttft_s == pytest.approx(0.021)
    assert truth.mean_itl_s == pytest.approx(0.011)
    assert truth.mean_e2e_s == pytest.approx(0.131)
    assert truth.requests_per_s == pytest.approx(1 / 0.131)
    assert truth.output_tokens_per_s == pytest.approx(11 / 0.131)
    assert truth.step_s == pytest.approx(0.131 / 11)
    assert truth.mean_batch == 1.0


def test_ground_truth_unsaturated() -> None:
    # N=4, P=100, O=9: B = 4*9/10 = 3.6, A = 0.4, T = 10 + 3.6 + 0.1*100*0.4 = 17.6 ms;
    # X = 4 / (10 * 0.0176) = 22.727/s; E2E = 0.176 s; TTFT = 2T = 0.0352 s.
    truth = ground_truth(HAND, 4, 100, 9)
    assert truth.regime == "unsaturated"
    assert truth.mean_batch == pytest.approx(3.6)
    assert truth.step_s == pytest.approx(0.0176)
    assert truth.requests_per_s == pytest.approx(22.72727, rel=1e-5)
    assert truth.output_tokens_per_s == pytest.approx(9 * 22.72727, rel=1e-5)
    assert truth.mean_e2e_s == pytest.approx(0.176)
    assert truth.mean_ttft_s == pytest.approx(0.0352)
    assert truth.mean_itl_s == pytest.approx(0.0176)
    # Little's law: clients = throughput * cycle time.
    assert truth.requests_per_s * truth.mean_e2e_s == pytest.approx(4)


def test_ground_truth_saturated_by_max_running() -> None:
    # N=20, O=9: 20*9/10 = 18 >= cap 8. T = 10 + 8 + 0.1*100*8/9 = 26.888.. ms;
    # X = 8 / (9 * T) = 33.058/s; E2E = 20 / X = 0.605 s; TTFT = E2E - 8*T = 0.38989 s.
    truth = ground_truth(HAND, 20, 100, 9)
    step = 0.010 + 0.008 + 0.0001 * 100 * 8 / 9
    assert truth.regime == "saturated"
    assert truth.step_s == pytest.approx(step)
    assert truth.step_s == pytest.approx(0.0268889, rel=1e-5)
    assert truth.requests_per_s == pytest.approx(33.05785, rel=1e-5)
    assert truth.mean_e2e_s == pytest.approx(0.605, rel=1e-5)
    assert truth.mean_ttft_s == pytest.approx(0.605 - 8 * step, rel=1e-5)
    assert truth.mean_itl_s == pytest.approx(step)
    assert truth.mean_batch == 8


def test_ground_truth_cap_from_batch_token_budget() -> None:
    # P+O = 109 tokens; a budget of 550 holds 550 // 109 = 5 sequences (< max_running 8).
    config = dataclasses.replace(HAND, max_batch_tokens=550)
    assert ground_truth(config, 5, 100, 9).regime == "unsaturated"  # 4.5 < 5
    truth = ground_truth(config, 6, 100, 9)  # 5.4 >= 5
    assert truth.regime == "saturated"
    assert truth.mean_batch == 5
    assert truth.step_s == pytest.approx(0.010 + 0.005 + 0.0001 * 100 * 5 / 9)


def test_ground_truth_boundary_counts_as_saturated() -> None:
    # N*O/(O+1) == cap exactly: 10*9/10 = 9 == max_running 9.
    config = dataclasses.replace(HAND, max_running=9)
    assert ground_truth(config, 10, 0, 9).regime == "saturated"
    assert ground_truth(config, 9, 0, 9).regime == "unsaturated"


@pytest.mark.parametrize(
    ("concurrency", "prompt", "output"),
    [(0, 10, 10), (1, -1, 10), (1, 10, 0), (1, 9_995, 10)],
)
def test_ground_truth_refuses_impossible_workloads(concurrency: int, prompt: int, output: int) -> None:
    with pytest.raises(ValueError):
        ground_truth(HAND, concurrency, prompt, output)


# ------------------------------------------------------- ground truth against simulation

SIM = EngineConfig(
    model="sim-check",
    step_base_ms=10.0,
    decode_per_seq_ms=0.5,
    prefill_per_token_ms=0.01,
    max_running=16,
    max_batch_tokens=100_000,
)


@pytest.mark.parametrize(
    ("concurrency", "regime"),
    [(1, "idle-between"), (4, "unsaturated"), (16, "unsaturated"), (48, "saturated")],
)
def test_ground_truth_agrees_with_virtual_time_simulation(concurrency: int, regime: str) -> None:
    truth = ground_truth(SIM, concurrency, 100, 20)
    simulated = simulate_closed_loop(SIM, concurrency, 100, 20, think_s=1e-4)
    assert truth.regime == regime
    assert simulated.requests_measured > 50
    # Throughput, E2E and batch are exact in steady state (think time 0.1 ms aside).
    assert simulated.requests_per_s == pytest.approx(truth.requests_per_s, rel=0.005)
    assert simulated.output_tokens_per_s == pytest.approx(truth.output_tokens_per_s, rel=0.005)
    assert simulated.mean_e2e_s == pytest.approx(truth.mean_e2e_s, rel=0.005)
    assert simulated.mean_batch == pytest.approx(truth.mean_batch, rel=0.005)
    # TTFT and ITL split E2E by the mean step; small prefill keeps the bias small.
    assert simulated.mean_ttft_s == pytest.approx(truth.mean_ttft_s, rel=0.02)
    assert simulated.mean_itl_s == pytest.approx(truth.mean_itl_s, rel=0.02)
    assert simulated.max_running_seen <= SIM.max_running


def test_throughput_stays_exact_with_heavy_prefill_and_batch_budget_cap() -> None:
    config = dataclasses.replace(SIM, prefill_per_token_ms=0.05, max_batch_tokens=5 * 120)
    for concurrency in (3, 12):
        truth = ground_truth(config, concurrency, 100, 20)
        simulated = simulate_closed_loop(config, concurrency, 100, 20)
        assert simulated.requests_per_s == pytest.approx(truth.requests_per_s, rel=0.005)
        assert simulated.mean_e2e_s == pytest.approx(truth.mean_e2e_s, rel=0.005)
        assert simulated.max_reserved_tokens_seen <= config.max_batch_tokens
    assert ground_truth(config, 12, 100, 20).regime == "saturated"


# ------------------------------------------------------------------------ step rules


class _Recorder:
    """Collects (step number, sequence id, token number) for every delivered token."""

    def __init__(self) -> None:
        self.step = 0
        self.tokens: list[tuple[int, int, int]] = []

    def sink(self, ident: int) -> Callable[[Sequence], None]:
        def on_token(sequence: Sequence) -> None:
            self.tokens.append((self.step, ident, sequence.emitted))

        return on_token


def test_step_duration_follows_the_formula() -> None:
    scheduler = StepScheduler(HAND)
    scheduler.submit(100, 5, lambda s: None)
    scheduler.submit(40, 5, lambda s: None)
    # Both admitted: 0.1*140 + 10 + 1*2 = 26 ms.
    assert scheduler.start_step() == pytest.approx(0.026)
    scheduler.finish_step()
    scheduler.submit(10, 5, lambda s: None)
    # One admitted with 10 prompt tokens, three running: 1 + 10 + 3 = 14 ms.
    assert scheduler.start_step() == pytest.approx(0.014)


def test_caps_are_never_exceeded_and_admission_is_fifo() -> None:
    config = dataclasses.replace(HAND, max_running=5, max_batch_tokens=400)
    scheduler = StepScheduler(config)
    recorder = _Recorder()
    rng = random.Random(7)
    sizes = [(rng.randint(1, 150), rng.randint(1, 40)) for _ in range(120)]
    for ident, (prompt, output) in enumerate(sizes):
        scheduler.submit(prompt, output, recorder.sink(ident))
    while scheduler.has_work() and recorder.step < 10_000:
        recorder.step += 1
        scheduler.start_step()
        assert scheduler.running_count <= config.max_running
        assert scheduler.reserved_tokens <= config.max_batch_tokens
        scheduler.finish_step()
    first_token_step = {}
    for step, ident, number in recorder.tokens:
        if number == 1:
            first_token_step[ident] = step
    admission_steps = [first_token_step[ident] for ident in range(len(sizes))]
    assert admission_steps == sorted(admission_steps), "a later request overtook an earlier one"
    assert scheduler.counters.max_running_seen == config.max_running
    assert scheduler.counters.completed == len(sizes)


def test_head_of_queue_blocks_smaller_requests_behind_it() -> None:
    config = dataclasses.replace(HAND, max_running=10, max_batch_tokens=100)
    scheduler = StepScheduler(config)
    scheduler.submit(50, 10, lambda s: None)  # 60 reserved
    scheduler.submit(50, 10, lambda s: None)  # would make 120 > 100: waits
    scheduler.submit(1, 1, lambda s: None)  # would fit, but must not overtake
    scheduler.start_step()
    assert scheduler.running_count == 1
    assert scheduler.queue_length == 2


def test_every_sequence_gets_exactly_its_tokens() -> None:
    scheduler = StepScheduler(HAND)
    recorder = _Recorder()
    outputs = [1, 2, 7, 30]
    for ident, output in enumerate(outputs):
        scheduler.submit(5, output, recorder.sink(ident))
    while scheduler.has_work():
        recorder.step += 1
        scheduler.start_step()
        scheduler.finish_step()
    for ident, output in enumerate(outputs):
        numbers = [number for _, who, number in recorder.tokens if who == ident]
        assert numbers == list(range(1, output + 1))
    # All admitted in step 1, so the first token of each comes at the end of step 1.
    assert {step for step, _, number in recorder.tokens if number == 1} == {1}
    assert recorder.step == max(outputs)
    assert scheduler.counters.tokens_emitted == sum(outputs)


def test_oversized_requests_are_rejected_at_submission() -> None:
    config = dataclasses.replace(HAND, context_window=1000, max_batch_tokens=500)
    scheduler = StepScheduler(config)
    with pytest.raises(AdmissionRejected) as context_error:
        scheduler.submit(990, 11, lambda s: None)
    assert context_error.value.code == "context_length_exceeded"
    assert "1000" in context_error.value.message
    with pytest.raises(AdmissionRejected) as budget_error:
        scheduler.submit(490, 11, lambda s: None)
    assert budget_error.value.code == "exceeds_batch_budget"
    scheduler.submit(489, 11, lambda s: None)  # exactly the budget: accepted
    assert scheduler.counters.rejected == 2
    assert scheduler.queue_length == 1


def test_cancelled_sequences_stop_and_leave_at_the_next_step() -> None:
    scheduler = StepScheduler(HAND)
    recorder = _Recorder()
    running = scheduler.submit(10, 10, recorder.sink(1))
    scheduler.start_step()
    scheduler.finish_step()
    queued_config = dataclasses.replace(HAND, max_running=1)
    queued_scheduler = StepScheduler(queued_config)
    queued_scheduler.submit(1, 5, lambda s: None)
    queued = queued_scheduler.submit(1, 5, lambda s: None)
    queued_scheduler.cancel(queued)

    scheduler.cancel(running)
    assert scheduler.running_count == 1  # still there until the next step starts
    scheduler.finish_step()  # a token due in the step of the cancel is not delivered
    scheduler.start_step()
    assert scheduler.running_count == 0
    assert scheduler.counters.cancelled == 1
    assert [number for _, _, number in recorder.tokens] == [1]

    queued_scheduler.start_step()
    assert queued_scheduler.queue_length == 0
    assert queued_scheduler.counters.cancelled == 1
    assert queued_scheduler.counters.admitted == 1


def test_a_failing_token_callback_cancels_only_its_own_sequence() -> None:
    scheduler = StepScheduler(HAND)
    recorder = _Recorder()

    def broken(sequence: Sequence) -> None:
        raise ConnectionResetError("peer went away")

    scheduler.submit(10, 3, broken)
    scheduler.submit(10, 3, recorder.sink(2))
    scheduler.start_step()
    failures = scheduler.finish_step()
    assert [type(exc) for exc in failures] == [ConnectionResetError]
    while scheduler.has_work():
        scheduler.start_step()
        assert scheduler.finish_step() == []
    assert [number for _, _, number in recorder.tokens] == [1, 2, 3]
    assert scheduler.counters.cancelled == 1 and scheduler.counters.completed == 1
    assert scheduler.reserved_tokens == 0


# ------------------------------------------------------------------ the asyncio engine


@pytest.mark.anyio
async def test_engine_paces_steps_on_the_event_loop() -> None:
    config = dataclasses.replace(HAND, step_base_ms=15.0, decode_per_seq_ms=0.0)
    engine = Engine(config)
    times: dict[int, list[float]] = {1: [], 2: []}
    done = anyio.Event()

    def sink(ident: int) -> Callable[[Sequence], None]:
        def on_token(sequence: Sequence) -> None:
            times[ident].append(time.perf_counter())
            if all(len(t) == n for t, n in zip(times.values(), (4, 6), strict=True)):
                done.set()

        return on_token

    started = time.perf_counter()
    engine.submit(0, 4, sink(1))
    engine.submit(0, 6, sink(2))
    with anyio.fail_after(5):
        await done.wait()
    await anyio.sleep(0.05)
    engine.close()
    assert [len(times[1]), len(times[2])] == [4, 6]
    # Both admitted in the first step: their tokens go out in the same delivery passes.
    assert all(abs(a - b) < 0.002 for a, b in zip(times[1], times[2], strict=False))
    # Six steps of 15 ms on absolute deadlines (timer wake-ups are a little late, never
    # cumulative): the last token comes about 90 ms after the start.
    assert 0.089 <= times[2][-1] - started < 0.089 + 0.015
    assert engine.counters.steps == 6
    assert engine.idle
    assert engine.pacing_error_us.count == 6


# ------------------------------------------------------------------- tokenizer and text


@pytest.mark.parametrize(
    ("text", "tokens_per_word", "expected"),
    [("", 1.0, 0), ("lanterns", 1.0, 1), ("a b  c\nd", 1.0, 4), ("a b c", 1.3, 4), ("   ", 1.0, 1)],
)
def test_count_tokens(text: str, tokens_per_word: float, expected: int) -> None:
    assert count_tokens(text, tokens_per_word) == expected


def test_generated_text_is_deterministic_and_invented() -> None:
    first = generate_text(3, "where do the ferries go", 12, 12)
    assert first == generate_text(3, "where do the ferries go", 12, 12)
    assert first != generate_text(4, "where do the ferries go", 12, 12)
    assert first != generate_text(3, "where do the ferries go?", 12, 12)
    assert len(first.split()) == 12 and first.endswith(" ")
    assert len(set(VOCABULARY)) == len(VOCABULARY) >= 1000
    assert all(word.isascii() and word.isalpha() and word.islower() for word in VOCABULARY)
    assert len(choose_word_indices(0, "", None, 0)) == 0


# ----------------------------------------------------------------------------- configs


def test_presets_load_and_wide_fits_the_capacity_check() -> None:
    assert {"small-fast", "large-slow", "wide"} <= set(preset_names())
    wide = load_config("wide")
    assert wide.step_base_ms == 20.0
    assert wide.decode_per_seq_ms == 0.0 and wide.prefill_per_token_ms == 0.0
    assert wide.max_running >= 1000
    assert load_config(None) == load_config("small-fast")
    slow, fast = load_config("large-slow"), load_config("small-fast")
    assert slow.step_base_ms + slow.decode_per_seq_ms > fast.step_base_ms + fast.decode_per_seq_ms


def test_config_file_with_unknown_key_names_the_key(tmp_path: Path) -> None:
    path = tmp_path / "engine.toml"
    path.write_text('model = "harbour-7"\nstep_base_ms = 12\nmax_runing = 4\n')
    with pytest.raises(ConfigError, match="max_runing"):
        load_config(path)


def test_config_file_types_are_checked(tmp_path: Path) -> None:
    path = tmp_path / "engine.toml"
    path.write_text('model = "harbour-7"\nstep_base_ms = 12\nmax_running = 4\n')
    config = load_config(str(path))
    assert (config.model, config.step_base_ms, config.max_running) == ("harbour-7", 12.0, 4)
    assert isinstance(config.step_base_ms, float)
    path.write_text("max_running = true\n")
    with pytest.raises(ConfigError, match="max_running"):
        load_config(path)
    path.write_text("max_running = 2.5\n")
    with pytest.raises(ConfigError, match="max_running"):
        load_config(path)
    path.write_text("step_base_ms = 0\n")
    with pytest.raises(ConfigError, match="step_base_ms"):
        load_config(path)
    path.write_text("step_base_ms = [\n")
    with pytest.raises(ConfigError, match="TOML"):
        load_config(path)


def test_unknown_preset_lists_the_presets() -> None:
    with pytest.raises(ConfigError, match="small-fast"):
        load_config("no-such-preset")
    with pytest.raises(ConfigError, match="cannot read"):
        load_config("/nonexistent/engine.toml")
