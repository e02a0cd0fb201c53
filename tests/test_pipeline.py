"""Pipelines: loading and checking the stage graph, one run's clocks and failures, and runs
against two mock targets (closed and open loop, and routing by an exact label)."""

from __future__ import annotations

import itertools
import json
from collections import Counter, defaultdict
from pathlib import Path
from typing import Any

import anyio
import pytest

from loadrun.errors import ProfileError
from loadrun.pipeline import (
    STAGE_RECORDS_FILE,
    PipelineRunner,
    PipelineSettings,
    Stage,
    load_pipeline_profile,
    route_label,
    run_pipeline,
)
from loadrun.protocol import ChatRequest
from loadrun.record import Outcome, Record
from loadrun.store import RECORDS_FILE, read_records
from loadrun.target_pool import LevelOverrides
from mock_server.config import load_config
from mock_server.text import generate_text

TARGETS = """
[targets.skiff]
mock_engine = "small-fast"
[targets.skiff.prices]
input_per_million = 1.0
output_per_million = 4.0
[targets.barge]
mock_engine = "small-fast"
model = "barge-l"
[targets.barge.prices]
input_per_million = 3.0
output_per_million = 12.0
"""

TWO_STAGES = """
name = "dock-log"
seed = 9
[load]
concurrency = 3
requests = 12
warmup_s = 0.0
[pipeline]
targets = "targets.toml"
[[pipeline.stages]]
name = "gist"
target = "skiff"
system_prompt = "Give the gist of the dock log entry."
input_tokens = 60
output_tokens = 8
[[pipeline.stages]]
name = "reply"
target = "barge"
input_from = "gist"
system_prompt = "Answer the harbour master."
output_tokens = 6
"""


def _write(tmp_path: Path, text: str) -> Path:
    (tmp_path / "targets.toml").write_text(TARGETS)
    path = tmp_path / "dock-log.toml"
    path.write_text(text)
    return path


# --- the stage graph ----------------------------------------------------------------------


def test_defaults_and_routes_load(tmp_path: Path) -> None:
    pipeline = load_pipeline_profile(_write(tmp_path, TWO_STAGES))
    gist, reply = pipeline.definition.stages
    assert (gist.next, reply.next, reply.input_from) == ("reply", "end", "gist")
    assert [spec.name for spec in pipeline.specs()] == ["skiff", "barge"]
    assert pipeline.definition.keeps_answers == {"gist"}
    routed = Stage("sort", "skiff", gist.spec, routes=(("refund", "a"),), otherwise="b")
    assert routed.after(" Refund.\n") == ("a", "refund")  # as a choice check reads a label
    assert routed.after("refunds") == ("b", None)
    assert route_label("  Other. ") == "other"


BROKEN = [
    ('next = "gist"', "reply", "must name a later stage", "next"),
    ('input_from = "reply"', "gist", "must name an earlier stage", "input"),
    ('routes = { yes = "reply" }', "gist", "otherwise: required", "routes"),
    ('next = "end"', "gist", "no stage leads to 'reply'", "unreachable"),
    ('target = "tug"', "gist", "must name a target", "target"),
    ("session = { turns = 2 }", "gist", "session: unknown key", "session"),
]


@pytest.mark.parametrize(("line", "stage", "problem", "case"), BROKEN, ids=[case[3] for case in BROKEN])
def test_a_bad_graph_is_one_line_naming_the_key(
    tmp_path: Path, line: str, stage: str, problem: str, case: str
) -> None:
    text = TWO_STAGES.replace(f'name = "{stage}"\n', f'name = "{stage}"\n{line}\n')
    if case == "target":
        text = TWO_STAGES.replace('name = "gist"\ntarget = "skiff"', 'name = "gist"\ntarget = "tug"')
    with pytest.raises(ProfileError, match=problem):
        load_pipeline_profile(_write(tmp_path, text))


def test_input_must_come_from_a_stage_on_every_path(tmp_path: Path) -> None:
    text = (
        TWO_STAGES.replace(
            "output_tokens = 8\n", 'output_tokens = 8\nroutes = { long = "reply" }\notherwise = "short"\n', 1
        )
        + '[[pipeline.stages]]\nname = "short"\ntarget = "skiff"\ninput_from = "reply"\noutput_tokens = 2\n'
    )
    # "reply" ends the run, so "short" is reached only from "gist", where "reply" has not run.
    text = text.replace("output_tokens = 6\n", 'output_tokens = 6\nnext = "end"\n')
    with pytest.raises(ProfileError, match="'reply' does not run before 'short' on every path"):
        load_pipeline_profile(_write(tmp_path, text))


# --- one run, with fake stages ------------------------------------------------------------


def test_a_failed_stage_fails_the_run_and_is_counted_by_stage(tmp_path: Path) -> None:
    pipeline = load_pipeline_profile(_write(tmp_path, TWO_STAGES))
    clock = itertools.count(1_000_000, 250_000)  # a manual clock: each reading 0.25 ms later
    failing_runs = {2, 4}

    async def answer(request: ChatRequest, record: Record) -> Record:
        record.send_ns = next(clock)
        record.first_token_ns = next(clock)
        record.end_ns = next(clock)
        record.output_tokens = request.max_tokens
        if record.request_class == "reply" and record.conversation in failing_runs:
            record.outcome = Outcome.HTTP_ERROR
            record.status = 503
            record.error = "HTTP 503"
        return record

    seen: list[tuple[str, int, bool]] = []
    runner = PipelineRunner(
        pipeline.definition,
        pipeline.profile,
        {"skiff": answer, "barge": answer},
        lambda stage, record, _label: seen.append((stage.name, record.conversation, record.ok)),
    )
    runs = []
    conversations = runner.conversations()
    for number in range(1, 6):
        conversation = next(conversations)
        run = Record(request_id=number, intended_ns=next(clock))
        run.conversation = number
        runs.append(anyio.run(runner.execute, conversation.request(0), run))
    failed = [run for run in runs if not run.ok]
    assert [run.conversation for run in failed] == [2, 4]
    assert all(run.outcome is Outcome.HTTP_ERROR and run.error == "stage reply: HTTP 503" for run in failed)
    assert Counter(name for name, _, ok in seen if not ok) == {"reply": 2}
    assert Counter(name for name, _, _ in seen) == {"gist": 5, "reply": 5}
    for run in runs:  # the run's clock: from its intended time to the last stage's end
        assert run.e2e_ns is not None and run.e2e_ns > 0


# --- against two mock targets -------------------------------------------------------------


def _stage_rows(folder: Path) -> dict[int, list[dict[str, Any]]]:
    by_run: dict[int, list[dict[str, Any]]] = defaultdict(list)
    for row in read_records(folder / STAGE_RECORDS_FILE):
        by_run[row["conversation"]].append(row)
    return by_run


@pytest.mark.parametrize("arrival", ["closed", "open"])
def test_two_stage_pipeline_against_two_mocks(tmp_path: Path, arrival: str) -> None:
    """End-to-end latency is the sum of the stage latencies of each run (within the
    microsecond rounding of the records), and the per-stage counts add up."""
    text = TWO_STAGES
    overrides = LevelOverrides(time_limit_s=60.0)
    if arrival == "open":
        overrides = LevelOverrides(rate_per_s=25.0, time_limit_s=60.0)
        text = text.replace("concurrency = 3\n", "")
    pipeline = load_pipeline_profile(_write(tmp_path, text))
    result = run_pipeline(PipelineSettings(pipeline, overrides, out_dir=tmp_path / "runs"))
    assert result.folder is not None
    data = result.data
    runs = read_records(result.folder / RECORDS_FILE)
    stages = _stage_rows(result.folder)
    measured = [row for row in runs if row["in_window"]]
    assert len(measured) == data["end_to_end"]["runs"]["measured"] == 12
    for run in runs:
        assert run["outcome"] == "ok", run["error"]
        rows = sorted(stages[run["conversation"]], key=lambda row: row["turn"])
        assert [row["stage"] for row in rows] == ["gist", "reply"]
        assert [row["target"] for row in rows] == ["skiff", "barge"]
        assert rows[0]["intended_us"] == run["intended_us"]
        assert rows[1]["intended_us"] == rows[0]["end_us"]  # the second clock starts there
        stage_sum = sum(row["end_us"] - row["intended_us"] for row in rows)
        assert stage_sum == run["end_us"] - run["intended_us"]
    gist, reply = data["stages"]["gist"], data["stages"]["reply"]
    assert gist["requests"]["measured"] == 12 == reply["requests"]["measured"] == gist["requests"]["ok"]
    assert data["failed_runs_by_stage"]["reply"]["failed"] == 0
    e2e = data["end_to_end"]["latency"]["e2e"]
    # Stage and run histograms hold the same requests; the mean of sums is the sum of means.
    assert e2e["mean_ms"] == pytest.approx(
        gist["latency"]["e2e"]["mean_ms"] + reply["latency"]["e2e"]["mean_ms"], rel=0.002
    )
    tokens = sum(row["prompt_tokens"] + row["output_tokens"] for rows in stages.values() for row in rows)
    assert data["per_run"]["tokens"] == pytest.approx(tokens / 12)
    cost = sum(
        (row["prompt_tokens"] * price_in + row["output_tokens"] * price_out) / 1e6
        for rows in stages.values()
        for row in rows
        for price_in, price_out in [(1.0, 4.0) if row["target"] == "skiff" else (3.0, 12.0)]
    )
    assert data["per_run"]["cost"] == pytest.approx(cost / 12)


ROUTED = """
name = "dock-sort"
seed = 4
[load]
concurrency = 2
requests = 10
warmup_s = 0.0
[pipeline]
targets = "targets.toml"
[[pipeline.stages]]
name = "sort"
target = "skiff"
system_prompt = "Sort the dock log entry: one word."
input_tokens = 30
output_tokens = 1
stream = false
routes = {{ {routes} }}
otherwise = "rest"
[[pipeline.stages]]
name = "left"
target = "barge"
input_tokens = 10
output_tokens = 2
next = "end"
[[pipeline.stages]]
name = "right"
target = "barge"
input_tokens = 10
output_tokens = 2
next = "end"
[[pipeline.stages]]
name = "rest"
target = "skiff"
input_tokens = 10
output_tokens = 2
"""


def test_a_routing_stage_follows_the_exact_label(tmp_path: Path) -> None:
    """The mock answers a one-token request with a word fixed by (engine seed, prompt,
    max_tokens) (mock_server.text); the labels are two words it will answer, so the route
    of every run is known in advance."""
    placeholder = load_pipeline_profile(_write(tmp_path, ROUTED.format(routes='x = "left", y = "right"')))
    runner = PipelineRunner(placeholder.definition, placeholder.profile, {}, lambda *_: None)
    seed = load_config("small-fast").seed
    conversations = runner.conversations()
    words = {}
    for number in range(1, 11):
        messages = next(conversations).request(0).messages
        prompt = " ".join(message["content"] for message in messages)
        words[number] = generate_text(seed, prompt, 1, 1).strip()
    first = words[1]
    second = next(word for word in words.values() if word != first)
    text = ROUTED.format(routes=f'{first} = "left", {second} = "right"')
    pipeline = load_pipeline_profile(_write(tmp_path, text))
    result = run_pipeline(
        PipelineSettings(pipeline, LevelOverrides(time_limit_s=60.0), out_dir=tmp_path / "runs")
    )
    assert result.folder is not None
    expected = {first: "left", second: "right"}
    stages = _stage_rows(result.folder)
    for number, rows in stages.items():
        rows.sort(key=lambda row: row["turn"])
        assert rows[1]["stage"] == expected.get(words[number], "rest")
        assert rows[0]["route"] == (words[number] if words[number] in expected else None)
    routes = result.data["stages"]["sort"]["routes"]
    counted = Counter(expected.get(words[number], "otherwise") for number in stages)
    assert sum(routes.values()) == 10
    assert routes.get(first, 0) == counted["left"] and routes.get(second, 0) == counted["right"]
    branch_counts = sum(
        result.data["stages"][name]["requests"]["measured"] for name in ("left", "right", "rest")
    )
    assert branch_counts == result.data["stages"]["sort"]["requests"]["ok"] == 10


def test_pipeline_command_on_the_shipped_profile(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """The README's command, shortened: per stage and end-to-end figures printed."""
    from loadrun.cli import main

    shipped = (
        Path(__file__).resolve().parent.parent
        / "profiles"
        / "multi-target"
        / "passenger-letter-pipeline.toml"
    )
    main(["pipeline", str(shipped), "-n", "6", "--warmup", "0", "--out", str(tmp_path)])
    printed = capsys.readouterr().out
    assert "end to end" in printed and "Per pipeline run" in printed
    (folder,) = tmp_path.glob("*-passenger-letter-pipeline-pipeline")
    data = json.loads((folder / "pipeline.json").read_text())
    assert data["end_to_end"]["runs"]["measured"] == 6
    assert data["stages"]["summarize"]["requests"]["measured"] == 6
    assert data["stages"]["classify"]["routes"] == {"otherwise": 6}  # the mock's words are no label
