"""Pipelines: an application that makes several calls per user request, measured end to end.

A pipeline profile names a targets file and an ordered list of stages; each stage is a
request class (the keys of ``[[classes]]``, but no session) sent to one target:

    [pipeline]
    targets = "../targets/harbour-desk-candidates.toml"   # relative to the profile

    [[pipeline.stages]]
    name = "summarize"
    target = "gullwing-cloud"
    system_prompt = "Summarize the passenger's letter in one sentence."
    input_tokens = 300
    output_tokens = 40

    [[pipeline.stages]]
    name = "classify"
    target = "gullwing-cloud"
    input_from = "summarize"          # the user message is that stage's answer
    output_tokens = 1
    routes = { refund = "answer-refund" }   # an exact label (as a choice check reads it)
    otherwise = "answer-general"      # every other answer

    [[pipeline.stages]]
    name = "answer-refund"
    target = "tidewater-open"
    input_from = "summarize"
    next = "end"                      # default: the following stage
    ...

Stages run in order: after a stage comes its route (a routing stage), its ``next``, or
the following stage; ``next = "end"`` ends the run. Every step goes forward in the list, so
the stages form a graph without cycles. A stage may take its input from a stage that ran
before it on every path (checked when the profile loads).

One arrival is one pipeline run, in a closed loop or open loop as the profile's ``[load]``
says. Clocks: the run's clock starts at its intended time (open loop: the due time, so a
late generator cannot hide waiting); each stage's clock starts where the previous stage
ended, so the stage latencies of a run add up to its end-to-end latency. The run's TTFT is
to the first token of its last stage (the answer the user reads). A failed stage fails the
run, with the stage's outcome, counted by stage. ``records.jsonl`` holds the runs,
``stage_records.jsonl`` the stage requests, ``pipeline.json`` the summary.
"""

from __future__ import annotations

import itertools
import time
from collections import Counter
from collections.abc import Awaitable, Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import anyio

from loadrun._version import __version__
from loadrun.answers import Answer, collecting_answer
from loadrun.errors import ProfileError
from loadrun.interrupt import signals_stop
from loadrun.profile import CLASS_KEYS, Profile, RequestSpec, profile_from_dict
from loadrun.protocol import ChatRequest
from loadrun.record import Record
from loadrun.recorder import Recorder
from loadrun.routing import read_profile_document, resolve_targets
from loadrun.runner import ABSORB_EVERY, event_loop_options
from loadrun.store import CONFIG_FILE, RecordLines, RunFolder
from loadrun.target_pool import (
    LevelOverrides,
    TargetBill,
    blended_bill,
    check_targets,
    level_plan,
    open_clients,
    run_level,
)
from loadrun.targets import TargetsFile, TargetSpec, started_targets
from loadrun.workload import Conversation, Workload

__all__ = [
    "END",
    "PIPELINE_FILE",
    "STAGE_RECORDS_FILE",
    "PipelineDefinition",
    "PipelineProfile",
    "PipelineResult",
    "PipelineRunner",
    "PipelineSettings",
    "Stage",
    "load_pipeline_profile",
    "pipeline_profile_from_dict",
    "run_pipeline",
    "run_pipeline_async",
]

END = "end"
PIPELINE_FILE = "pipeline.json"
STAGE_RECORDS_FILE = "stage_records.jsonl"
OTHERWISE = "otherwise"
MAX_STAGES = 32
_STAGE_KEYS = {"name", "target", "input_from", "routes", "otherwise", "next"}
_CLASS_KEYS = CLASS_KEYS - {"session"}
"""A stage's request class: a profile's class keys, without sessions (a stage is one call)."""


def route_label(text: str) -> str:
    """An answer as a label: surrounding space and one trailing full stop dropped, case folded
    (how a choice check reads a label)."""
    label = text.strip()
    if label.endswith("."):
        label = label[:-1].rstrip()
    return label.casefold()


@dataclass(frozen=True, slots=True)
class Stage:
    name: str
    target: str
    spec: RequestSpec
    input_from: str | None = None
    routes: tuple[tuple[str, str], ...] = ()
    """(label as ``route_label`` reads it, next stage) of a routing stage."""
    otherwise: str | None = None
    next: str | None = None
    """The stage after this one (or END); None for a routing stage."""

    @property
    def routing(self) -> bool:
        return bool(self.routes)

    def successors(self) -> list[str]:
        if self.routing:
            assert self.otherwise is not None
            return [*dict.fromkeys([stage for _, stage in self.routes] + [self.otherwise])]
        return [self.next or END]

    def after(self, answer_text: str) -> tuple[str, str | None]:
        """(next stage, the label that chose it, or None for ``otherwise``/a plain stage)."""
        if not self.routing:
            return self.next or END, None
        label = route_label(answer_text)
        for wanted, stage in self.routes:
            if label == wanted:
                return stage, wanted
        assert self.otherwise is not None
        return self.otherwise, None

    def describe(self) -> dict[str, Any]:
        out: dict[str, Any] = {"name": self.name, "target": self.target, "request": self.spec.describe()}
        if self.input_from:
            out["input_from"] = self.input_from
        if self.routing:
            out["routes"] = dict(self.routes)
            out["otherwise"] = self.otherwise
        else:
            out["next"] = self.next or END
        return out


@dataclass(frozen=True, slots=True)
class PipelineDefinition:
    stages: tuple[Stage, ...]

    def stage(self, name: str) -> Stage:
        return next(stage for stage in self.stages if stage.name == name)

    @property
    def keeps_answers(self) -> frozenset[str]:
        """Stages whose answer text is needed (a later input, a route, a check)."""
        needed = {stage.input_from for stage in self.stages if stage.input_from}
        needed |= {stage.name for stage in self.stages if stage.routing or stage.spec.check is not None}
        return frozenset(name for name in needed if name)

    def describe(self) -> list[dict[str, Any]]:
        return [stage.describe() for stage in self.stages]


@dataclass(frozen=True, slots=True)
class PipelineProfile:
    profile: Profile
    """Name, seed and load of the pipeline (its request classes are the stages')."""
    definition: PipelineDefinition
    targets: TargetsFile

    def specs(self) -> list[TargetSpec]:
        used = list(dict.fromkeys(stage.target for stage in self.definition.stages))
        by_name = {spec.name: spec for spec in self.targets.targets}
        return [by_name[name] for name in used]


def load_pipeline_profile(path: str | Path, targets_path: Path | None = None) -> PipelineProfile:
    file = Path(path)
    raw = read_profile_document(file)
    return pipeline_profile_from_dict(raw, source=str(file), base_dir=file.parent, targets_path=targets_path)


def pipeline_profile_from_dict(
    raw: Mapping[str, Any], *, source: str, base_dir: Path, targets_path: Path | None = None
) -> PipelineProfile:
    section = raw.get("pipeline")
    if not isinstance(section, dict):
        raise ProfileError(f"{source}: pipeline: required: a [pipeline] table (targets and stages)")
    for key in ("request", "classes"):
        if key in raw:
            raise ProfileError(f"{source}: {key}: a pipeline's request classes are its stages; drop [{key}]")
    rest = {key: value for key, value in raw.items() if key != "pipeline"}
    profile = profile_from_dict(rest, source=source, base_dir=base_dir)
    where = f"{source}: pipeline"
    for key in section:
        if key not in ("targets", "stages"):
            raise ProfileError(f"{where}.{key}: unknown key (allowed: stages, targets)")
    targets = resolve_targets(section, where, base_dir, targets_path)
    entries = section.get("stages")
    if not isinstance(entries, list) or not entries:
        raise ProfileError(f"{where}.stages: must be a non-empty array of tables ([[pipeline.stages]])")
    if len(entries) > MAX_STAGES:
        raise ProfileError(f"{where}.stages: at most {MAX_STAGES} stages")
    names: list[str] = []
    for index, entry in enumerate(entries):
        if not isinstance(entry, dict):
            raise ProfileError(f"{where}.stages[{index}]: must be a table")
        name = entry.get("name")
        if not isinstance(name, str) or not name.strip() or name == END:
            raise ProfileError(f"{where}.stages[{index}].name: required: a name other than {END!r}")
        if name in names:
            raise ProfileError(f"{where}.stages[{index}].name: {name!r} is used by an earlier stage")
        names.append(name)
    stages = tuple(
        _stage(entry, index, names, f"{where}.stages[{index}]", profile, targets, base_dir, source)
        for index, entry in enumerate(entries)
    )
    _check_graph(stages, where)
    return PipelineProfile(profile, PipelineDefinition(stages), targets)


def _stage(
    entry: Mapping[str, Any],
    index: int,
    names: list[str],
    where: str,
    profile: Profile,
    targets: TargetsFile,
    base_dir: Path,
    source: str,
) -> Stage:
    for key in entry:
        if key not in _STAGE_KEYS | _CLASS_KEYS:
            allowed = ", ".join(sorted(_STAGE_KEYS | _CLASS_KEYS))
            raise ProfileError(f"{where}.{key}: unknown key (allowed: {allowed})")
    name = entry["name"]
    target = entry.get("target")
    if not isinstance(target, str) or target not in targets.names():
        raise ProfileError(
            f"{where}.target: must name a target of the targets file ({', '.join(targets.names())})"
        )
    later = names[index + 1 :]

    def forward(key: str, value: Any) -> str:
        if value == END and key != "otherwise":
            return END
        if not isinstance(value, str) or value not in later:
            raise ProfileError(
                f"{where}.{key}: must name a later stage ({', '.join(later) or 'none'})"
                + (f" or {END!r}" if key == "next" else "")
            )
        return value

    input_from = entry.get("input_from")
    if input_from is not None and (not isinstance(input_from, str) or input_from not in names[:index]):
        raise ProfileError(
            f"{where}.input_from: must name an earlier stage ({', '.join(names[:index]) or 'none'})"
        )
    routes_table = entry.get("routes")
    routes: list[tuple[str, str]] = []
    otherwise = None
    next_stage = None
    if routes_table is not None:
        if not isinstance(routes_table, dict) or not routes_table:
            raise ProfileError(f"{where}.routes: must be a table of label = stage")
        if "next" in entry:
            raise ProfileError(f"{where}.next: a routing stage goes where its routes say; drop next")
        if "otherwise" not in entry:
            raise ProfileError(f"{where}.otherwise: required: the stage for answers that match no label")
        for label, stage in routes_table.items():
            folded = route_label(label)
            if not folded or folded in (wanted for wanted, _ in routes):
                raise ProfileError(f"{where}.routes.{label}: an empty label, or the same as another")
            routes.append((folded, forward(f"routes.{label}", stage)))
        otherwise = forward("otherwise", entry["otherwise"])
    elif "otherwise" in entry:
        raise ProfileError(f"{where}.otherwise: only a routing stage (with routes) takes otherwise")
    elif "next" in entry:
        next_stage = forward("next", entry["next"])
    else:
        next_stage = later[0] if later else END
    class_table = {key: value for key, value in entry.items() if key in _CLASS_KEYS}
    if input_from is not None:
        for key in ("input_tokens", "prompts_file", "shared_prefix"):
            if key in class_table:
                raise ProfileError(f"{where}.{key}: the input comes from {input_from!r}; drop {key}")
    stage_profile = profile_from_dict(
        {"name": f"{profile.name}.{name}", "seed": profile.seed * 1000 + index, "request": class_table},
        source=f"{source}: pipeline.stages[{index}]",
        base_dir=base_dir,
    )
    spec = replace(stage_profile.request, name=name)
    return Stage(name, target, spec, input_from, tuple(routes), otherwise, next_stage)


def _check_graph(stages: Sequence[Stage], where: str) -> None:
    """Every stage reachable; every input taken from a stage that ran on every path before."""
    before: dict[str, frozenset[str] | None] = {stage.name: None for stage in stages}
    before[stages[0].name] = frozenset()
    for index, stage in enumerate(stages):
        ran = before[stage.name]
        if ran is None:
            raise ProfileError(f"{where}.stages[{index}]: no stage leads to {stage.name!r}")
        if stage.input_from is not None and stage.input_from not in ran:
            raise ProfileError(
                f"{where}.stages[{index}].input_from: {stage.input_from!r} does not run before "
                f"{stage.name!r} on every path"
            )
        for successor in stage.successors():
            if successor == END:
                continue
            reached = ran | {stage.name}
            known = before[successor]
            before[successor] = reached if known is None else known & reached


# --- running one pipeline run -------------------------------------------------------------


StageSink = Callable[[Stage, Record, str | None], None]
"""Sees every finished stage request, with the route label it chose (if any)."""


class PipelineRunner:
    """Runs pipeline runs: an ``Execute`` for the driver, whose record is the whole run."""

    def __init__(
        self,
        definition: PipelineDefinition,
        profile: Profile,
        executes: Mapping[str, Callable[[ChatRequest, Record], Awaitable[Record]]],
        on_stage: StageSink,
    ) -> None:
        self.definition = definition
        self.executes = executes
        self.on_stage = on_stage
        self._workloads = {
            stage.name: Workload(
                replace(profile, seed=profile.seed * 1000 + index, classes=(), request=stage.spec)
            )
            for index, stage in enumerate(definition.stages)
        }
        self._ids = itertools.count(1)
        self._keep = definition.keeps_answers

    def conversations(self) -> Iterator[Conversation]:
        """The first stage's conversations (one per run), with no check: the runner judges."""
        first = self._workloads[self.definition.stages[0].name]
        while True:
            conversation = first.next_conversation()
            conversation.spec = replace(conversation.spec, check=None, session=None)
            yield conversation

    async def execute(self, request: ChatRequest, run: Record) -> Record:
        """One pipeline run into ``run`` (stamped by the driver); never raises for a failure."""
        answers: dict[str, str] = {}
        stage = self.definition.stages[0]
        start_ns = run.intended_ns
        last: Record | None = None
        first: Record | None = None
        for _ in range(len(self.definition.stages)):
            if stage is not self.definition.stages[0]:
                request = self._request(stage, answers)
            elif stage.spec.check is not None:  # (the driver's conversation carries no check)
                request = replace(request, extra=request.extra + stage.spec.check.request_fields())
            record = Record(request_id=next(self._ids), intended_ns=start_ns, in_window=run.in_window)
            record.wall_start = time.time()
            record.request_class = stage.name
            record.conversation = run.conversation
            record.turn = self.definition.stages.index(stage)
            record.requested_output_tokens = request.max_tokens
            record.requested_input_tokens = run.requested_input_tokens if first is None else 0
            answer: Answer | None = None
            execute = self.executes[stage.target]
            if stage.name in self._keep:
                with collecting_answer() as answer:
                    await execute(request, record)
            else:
                await execute(request, record)
            text = answer.text if answer is not None else ""
            if record.ok and answer is not None and answer.received and stage.spec.check is not None:
                record.compliant, record.check_note = stage.spec.check.judge(answer)
            following, label = stage.after(text) if record.ok else (END, None)
            self.on_stage(stage, record, label if record.ok else None)
            first = first or record
            last = record
            if not record.ok:
                run.outcome = record.outcome
                run.status = record.status
                run.error = f"stage {stage.name}: {record.error or record.outcome.value}"
                break
            answers[stage.name] = text
            if following == END:
                break
            stage = self.definition.stage(following)
            start_ns = record.end_ns  # the next stage's clock starts where this one ended
        assert first is not None and last is not None
        run.request_class = "pipeline"
        run.send_ns = first.send_ns
        run.headers_ns = first.headers_ns
        run.end_ns = last.end_ns or time.perf_counter_ns()
        if run.ok:
            run.first_token_ns = last.first_token_ns
            run.chunk_ns = last.chunk_ns
            run.output_tokens = last.output_tokens
            run.token_source = last.token_source
            run.finish_reason = last.finish_reason
            run.status = last.status
        run.prompt_tokens = first.prompt_tokens
        return run

    def _request(self, stage: Stage, answers: Mapping[str, str]) -> ChatRequest:
        conversation = self._workloads[stage.name].next_conversation()
        if stage.input_from is None:
            return conversation.request(0)
        messages = [
            *conversation.base,
            {"role": "user", "content": answers[stage.input_from] or "(no answer)"},
        ]
        extra = stage.spec.sampling + (stage.spec.check.request_fields() if stage.spec.check else ())
        return ChatRequest(
            messages=tuple(messages),
            max_tokens=conversation.turns[0].max_tokens,
            stream=stage.spec.stream,
            extra=extra,
        )


# --- the run ------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class PipelineSettings:
    pipeline: PipelineProfile
    overrides: LevelOverrides = field(default_factory=LevelOverrides)
    out_dir: Path | None = Path("runs")
    confirmed: bool = False
    handle_signals: bool = False
    """Ctrl-C / SIGTERM: stop sending, let in-flight requests finish (the command line sets it)."""


@dataclass(slots=True)
class PipelineResult:
    data: dict[str, Any]
    folder: Path | None


def run_pipeline(settings: PipelineSettings) -> PipelineResult:
    """Run a pipeline profile (blocking; starts its own event loop)."""
    return anyio.run(run_pipeline_async, settings, backend="asyncio", backend_options=event_loop_options())


class _Tally:
    """What the stages did, for the summary."""

    def __init__(self, definition: PipelineDefinition, origin_ns: int, specs: Sequence[TargetSpec]) -> None:
        self.recorders = {stage.name: Recorder(origin_ns) for stage in definition.stages}
        self.stage_bills = {stage.name: TargetBill() for stage in definition.stages}
        self.target_bills = {spec.name: TargetBill() for spec in specs}
        self.routes: dict[str, Counter[str]] = {
            stage.name: Counter() for stage in definition.stages if stage.routing
        }
        self.checked: dict[str, Counter[str]] = {stage.name: Counter() for stage in definition.stages}

    def add(self, stage: Stage, record: Record, label: str | None) -> None:
        self.recorders[stage.name].add(record)
        self.stage_bills[stage.name].add(record)
        self.target_bills[stage.target].add(record)
        if not record.in_window:
            return
        if stage.routing and record.ok:
            self.routes[stage.name][label if label is not None else OTHERWISE] += 1
        if record.compliant is not None:
            self.checked[stage.name]["compliant" if record.compliant else "not_compliant"] += 1


async def run_pipeline_async(settings: PipelineSettings, stop: anyio.Event | None = None) -> PipelineResult:
    pipeline = settings.pipeline
    profile = pipeline.profile
    plan = level_plan(profile, settings.overrides)
    specs = pipeline.specs()
    check_targets(specs, plan, confirmed=settings.confirmed)
    stop = stop or anyio.Event()
    folder = RunFolder.create(settings.out_dir, f"{profile.name}-pipeline") if settings.out_dir else None
    with started_targets(specs) as targets:
        for target in targets:
            target.api_key()  # fail now, not mid-run, when a named variable is unset
        config = {
            "kind": "pipeline",
            "loadrun_version": __version__,
            "started_at": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
            # The profile's own request class is a placeholder: the stages are the classes.
            "profile": {
                key: value for key, value in profile.describe().items() if key not in ("request", "classes")
            },
            "stages": pipeline.definition.describe(),
            "targets": [spec.describe() for spec in specs],
            "targets_file": pipeline.targets.source,
        }
        if folder is not None:
            folder.write_json(CONFIG_FILE, config)
        grace_s = settings.overrides.stop_grace_s
        guard = signals_stop(stop, grace_s, targets.child_pids, enabled=settings.handle_signals)
        with guard as signals:
            async with open_clients(specs, targets, stop) as clients:
                origin = time.perf_counter_ns()
                path = folder.path if folder else None
                run_records = RecordLines(path, origin)
                stage_records = RecordLines(path, origin, STAGE_RECORDS_FILE)
                runs = Recorder(origin)
                tally = _Tally(pipeline.definition, origin, specs)
                failed_at: Counter[str] = Counter()

                def on_stage(stage: Stage, record: Record, label: str | None) -> None:
                    tally.add(stage, record, label)
                    stage_records.write(record, stage=stage.name, target=stage.target, route=label)
                    if record.in_window and not record.ok:
                        failed_at[stage.name] += 1

                def on_run(record: Record) -> None:
                    runs.add(record)
                    run_records.write(record)
                    if record.request_id % ABSORB_EVERY == 0:  # fill the histograms in bulk
                        for recorder in (runs, *tally.recorders.values()):
                            recorder.absorb()

                executes = {spec.name: client.execute for spec, client in zip(specs, clients, strict=True)}
                runner = PipelineRunner(pipeline.definition, profile, executes, on_stage)
                try:
                    level = await run_level(
                        plan, runner.execute, runner.conversations(), profile.seed, on_run, stop
                    )
                finally:
                    run_records.close()
                    stage_records.close()
    data = _pipeline_summary(
        config, pipeline, runs, tally, failed_at, level.window_start_ns, level.window_end_ns
    )
    data["interrupted"] = level.interrupted
    data["cancelled_in_flight"] = level.cancelled
    if signals.signal_name is not None:
        data["interrupt"] = {"signal": signals.signal_name, "grace_s": grace_s}
    if folder is not None:
        data["run_folder"] = str(folder.path)
        folder.write_json(PIPELINE_FILE, data)
    return PipelineResult(data, folder.path if folder else None)


def _pipeline_summary(
    config: dict[str, Any],
    pipeline: PipelineProfile,
    runs: Recorder,
    tally: _Tally,
    failed_at: Counter[str],
    start: int,
    end: int,
) -> dict[str, Any]:
    seconds = max(1e-9, (end - start) / 1e9)
    whole = runs.summary(start, end)
    measured = whole["requests"]["measured"]
    prices = {spec.name: spec.prices for spec in pipeline.specs()}
    stages: dict[str, Any] = {}
    for stage in pipeline.definition.stages:
        summary = tally.recorders[stage.name].summary(start, end)
        requests = summary["requests"]
        bill = tally.stage_bills[stage.name].describe(prices[stage.target], seconds)
        checked = tally.checked[stage.name]
        stages[stage.name] = {
            "target": stage.target,
            "requests": requests,
            "error_share": requests["failed"] / requests["measured"] if requests["measured"] else None,
            "latency": summary["latency"],
            "tokens_per_request": bill["input_tokens"] / bill["requests"]
            + bill["output_tokens"] / bill["requests"]
            if bill["requests"]
            else None,
            "bill": bill,
            "routes": dict(sorted(tally.routes[stage.name].items())) if stage.routing else None,
            "compliance": dict(checked) if checked else None,
            "histograms": summary["histograms"],
        }
    target_rows = [bill.describe(prices[name], seconds) for name, bill in tally.target_bills.items()]
    cost = blended_bill(target_rows, measured)
    tokens = sum(row["input_tokens"] + row["output_tokens"] for row in target_rows)
    return {
        **config,
        "finished_at": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "window": whole["window"],
        "end_to_end": {
            "runs": whole["requests"],
            "latency": whole["latency"],
            "throughput": whole["throughput"],
            "histograms": whole["histograms"],
        },
        "failed_runs_by_stage": {
            stage.name: {
                "failed": failed_at.get(stage.name, 0),
                "share_of_runs": failed_at.get(stage.name, 0) / measured if measured else None,
            }
            for stage in pipeline.definition.stages
        },
        "per_run": {
            "tokens": tokens / measured if measured else None,
            "cost": cost["cost_per_request"],
            "currency": cost["currency"],
            "cost_per_million_tokens": cost["cost_per_million_tokens"],
        },
        "stages": stages,
    }
