"""The measurement API: one profile, one target, one load level -> a summary and a run folder.

    from loadrun import MeasureSettings, measure
    result = measure(MeasureSettings(concurrency=4, requests=50))
    result.summary["latency"]["ttft"]["p50_ms"]

With no target the bundled mock server is started on a free loopback port (in a child
process, so that its CPU does not disturb the generator's timing) and stopped by its PID.
"""

from __future__ import annotations

import contextlib
import math
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

import anyio

from loadrun._version import __version__
from loadrun.answers import AnswerTap
from loadrun.arrivals import TraceArrivals, make_arrivals
from loadrun.caution import CAUTION, check_remote_caps, plan_text
from loadrun.class_tally import ClassTally
from loadrun.client import ChatClient
from loadrun.cost import TokenPrices
from loadrun.driver import (
    LATE_SEND_US,
    ClosedLoopPlan,
    LevelResult,
    LoadPlan,
    OpenLoopPlan,
    run_closed_loop,
    run_open_loop,
)
from loadrun.errors import TargetUnreachable, UsageError
from loadrun.generator_health import CpuMeter, assess_generator
from loadrun.history import HISTORY_FILE, record_run
from loadrun.interrupt import SignalStop, signals_stop
from loadrun.monitor import LoopLagMonitor
from loadrun.profile import MAX_CONCURRENCY, OPEN_ARRIVALS, Profile
from loadrun.prompts import ONE_TOKEN_PER_WORD, Calibration, calibrate_tokens
from loadrun.record import Outcome, Record
from loadrun.recorder import Recorder
from loadrun.retry import RetryLog, RetryPolicy
from loadrun.slo import Slo
from loadrun.store import CONFIG_FILE, SUMMARY_FILE, RunFolder
from loadrun.target import Target
from loadrun.timeouts import Timeouts
from loadrun.transports import make_transport
from loadrun.wall_start import wait_until_wall
from loadrun.workload import Conversation, Workload

DEFAULT_MOCK_ENGINE = "small-fast"
ABSORB_EVERY = 2000
"""Pending records before the histograms are filled in bulk (kept off the receive path)."""


@dataclass(frozen=True, slots=True)
class MeasureSettings:
    profile: Profile = field(default_factory=Profile)
    target: Target | None = None
    """None: start the bundled mock server and measure it."""
    concurrency: int | None = None
    duration_s: float | None = None
    requests: int | None = None
    warmup_s: float | None = None
    slos: tuple[Slo, ...] = ()
    out_dir: Path | None = Path("runs")
    """Where run folders go; None writes nothing to disk."""
    transport: str = "fast"
    mock_engine: str = DEFAULT_MOCK_ENGINE
    total_timeout_s: float = 600.0
    connect_timeout_s: float = 10.0
    time_limit_s: float = 3600.0
    confirmed: bool = False
    """Set once the user has agreed to load a target that is not on this machine."""
    history_path: Path | None = None
    """The history database; None: history.sqlite3 in out_dir (none when out_dir is None too)."""
    record_history: bool = True
    """Store the run in the history database (the gate turns this off and stores it itself)."""
    first_token_timeout_s: float | None = None
    """Streamed requests: seconds from the send to the first token; None: no limit."""
    idle_timeout_s: float | None = None
    """Streamed requests: seconds without a new chunk once tokens flow; None: no limit."""
    retry_rate_limited: int = 0
    """Retries of a 429 per request (0: none); retries are recorded apart (retries.jsonl)."""
    retry_wait_cap_s: float = 30.0
    """The longest wait before a retry, whatever Retry-After asks."""
    stop_grace_s: float = 30.0
    """After a stop (an interrupt, the time limit), how long in-flight requests may finish."""
    handle_signals: bool = False
    """Turn SIGINT/SIGTERM into a graceful stop (see interrupt.py); the command line sets it."""
    exceed_remote_caps: bool = False
    """Allow concurrency above the cap for a target that is not on this machine (caution.py)."""
    arrival: str | None = None
    """closed, poisson, constant, bursty or replay; None: what the profile says (or what
    ``rate_per_s``/``concurrency`` imply: a rate alone means Poisson, a concurrency closed)."""
    rate_per_s: float | None = None
    """Open loop: new conversations per second (overrides the profile)."""
    burst_cv: float | None = None
    trace_path: Path | None = None
    replay_speed: float | None = None
    in_flight_cap: int | None = None
    think_time_s: float | None = None
    """Closed loop: each client's pause between conversations."""
    seed: int | None = None
    """Overrides the profile's seed."""
    context_window: int | None = None
    """The target's context window in tokens: a request that would exceed it is not sent."""
    calibrate_input: bool | None = None
    """Learn the target's tokens per word before the run; None: as the profile says."""
    start_at_wall: float | None = None
    """Begin the load at this wall-clock instant (time.time()), once everything else is
    ready: how the shards of one level on several processes start together."""

    def effective_profile(self) -> Profile:
        if self.seed is None or self.seed == self.profile.seed:
            return self.profile
        from dataclasses import replace

        return replace(self.profile, seed=self.seed)

    def timeouts(self) -> Timeouts:
        return Timeouts(
            connect_s=self.connect_timeout_s,
            first_token_s=self.first_token_timeout_s,
            idle_s=self.idle_timeout_s,
            total_s=self.total_timeout_s,
        )

    def retry_policy(self) -> RetryPolicy:
        return RetryPolicy(max_retries=self.retry_rate_limited, max_wait_s=self.retry_wait_cap_s)

    def check(self) -> LoadPlan:
        """Validate everything that needs no network; returns the plan (UsageError if bad)."""
        self.timeouts()
        self.retry_policy()
        for item in fields(self):  # nan passes every "at least" check: refuse it (and inf) first
            value = getattr(self, item.name)
            if isinstance(value, float) and not math.isfinite(value):
                raise UsageError(f"{item.name} must be a finite number, got {value}")
        for name in ("stop_grace_s", "time_limit_s"):
            if getattr(self, name) < 0:
                raise UsageError(f"{name} must not be negative")
        if self.concurrency is not None and self.concurrency > MAX_CONCURRENCY:
            raise UsageError(f"concurrency {self.concurrency} is above the most allowed, {MAX_CONCURRENCY}")
        plan = self.plan()
        if self.target is not None:  # (the embedded mock is on loopback: no caps)
            if isinstance(plan, ClosedLoopPlan):
                check_remote_caps(self.target, concurrency=plan.concurrency, override=self.exceed_remote_caps)
            else:
                check_remote_caps(self.target, rate_per_s=plan.rate_per_s, override=self.exceed_remote_caps)
        return plan

    def history_file(self) -> Path | None:
        if not self.record_history:
            return None
        if self.history_path is not None:
            return self.history_path
        return self.out_dir / HISTORY_FILE if self.out_dir is not None else None

    def arrival_kind(self) -> str:
        """The arrival process after the overrides (see ``arrival``)."""
        if self.concurrency is not None and self.rate_per_s is not None:
            raise UsageError("give a concurrency (closed loop) or an arrival rate (open loop), not both")
        kind = self.arrival
        if kind is None:
            if self.trace_path is not None and self.concurrency is None and self.rate_per_s is None:
                kind = "replay"  # a trace given on its own is meant to be replayed
            elif self.rate_per_s is not None:
                kind = self.profile.load.arrival if self.profile.load.arrival in OPEN_ARRIVALS else "poisson"
            elif self.concurrency is not None:
                kind = "closed"
            else:
                kind = self.profile.load.arrival
        if kind not in ("closed", *OPEN_ARRIVALS):
            raise UsageError(f"unknown arrival process {kind!r}: closed, {', '.join(OPEN_ARRIVALS)}")
        if kind == "closed" and self.rate_per_s is not None:
            raise UsageError("an arrival rate needs an open-loop arrival process (poisson, constant, bursty)")
        if kind != "closed" and self.concurrency is not None:
            raise UsageError(f"arrival {kind!r} is open loop: give a rate, not a concurrency")
        if kind == "replay" and self.rate_per_s is not None:
            raise UsageError("a replayed trace sets its own times: give --replay-speed, not a rate")
        return kind

    def plan(self) -> LoadPlan:
        load = self.profile.load
        kind = self.arrival_kind()
        requests = self.requests
        duration = self.duration_s
        if requests is None and duration is None:
            requests, duration = load.requests, load.duration_s
            if kind == "replay" and load.arrival != "replay":
                requests = duration = None  # replay the whole trace
        warmup = self.warmup_s if self.warmup_s is not None else load.warmup_s
        if kind == "closed":
            return ClosedLoopPlan(
                concurrency=self.concurrency or load.concurrency,
                duration_s=duration if requests is None else None,
                requests=requests,
                warmup_s=warmup,
                time_limit_s=self.time_limit_s,
                drain_grace_s=self.stop_grace_s,
                think_time_s=self.think_time_s if self.think_time_s is not None else load.think_time_s,
            )
        trace = self.trace_path if self.trace_path is not None else load.trace
        arrivals = make_arrivals(
            kind,
            self.rate_per_s if self.rate_per_s is not None else load.rate_per_s,
            self.burst_cv if self.burst_cv is not None else load.burst_cv,
            trace,
            self.replay_speed if self.replay_speed is not None else load.replay_speed,
        )
        return OpenLoopPlan(
            arrivals=arrivals,
            duration_s=duration if requests is None else None,
            requests=requests,
            warmup_s=warmup,
            in_flight_cap=self.in_flight_cap if self.in_flight_cap is not None else load.in_flight_cap,
            time_limit_s=self.time_limit_s,
            drain_grace_s=self.stop_grace_s,
        )

    def wants_calibration(self) -> bool:
        return self.calibrate_input if self.calibrate_input is not None else self.profile.calibrate_input


@dataclass(slots=True)
class RunResult:
    summary: dict[str, Any]
    folder: Path | None
    history_id: int | None = None
    """The run's row in the history database, when it was stored there."""
    config: dict[str, Any] = field(default_factory=dict)
    """The resolved configuration (what config.json holds)."""


def measure(settings: MeasureSettings) -> RunResult:
    """Run one load level and return its summary (blocking; starts its own event loop)."""
    return anyio.run(measure_async, settings, backend="asyncio", backend_options=event_loop_options())


async def measure_async(
    settings: MeasureSettings,
    stop: anyio.Event | None = None,
    observe: Callable[[Record], None] | None = None,
) -> RunResult:
    """Run one load level; ``observe`` sees every finished Record as it arrives (keep it cheap)."""
    plan = settings.check()
    stop = stop or anyio.Event()
    with target_for(settings) as (target, mock_info):
        if not target.is_loopback and not settings.confirmed:
            raise UsageError(
                f"{target.base_url} is not on this machine: confirm that you may load it (--yes)"
            )
        children = (int(mock_info["pid"]),) if mock_info else ()
        with signals_stop(stop, settings.stop_grace_s, children, enabled=settings.handle_signals) as signals:
            await _check_reachable(target, settings.connect_timeout_s)
            return await _run_level(settings, plan, target, mock_info, stop, observe, signals)


async def _run_level(
    settings: MeasureSettings,
    plan: LoadPlan,
    target: Target,
    mock_info: dict[str, Any] | None,
    stop: anyio.Event,
    observe: Callable[[Record], None] | None = None,
    signals: SignalStop | None = None,
) -> RunResult:
    profile = settings.effective_profile()
    label = f"{profile.name}-{level_label(plan)}"
    folder = RunFolder.create(settings.out_dir, label) if settings.out_dir is not None else None
    started_at = time.strftime("%Y-%m-%dT%H:%M:%S%z")
    transport = make_transport(
        settings.transport, connect_timeout_s=settings.connect_timeout_s, verify_tls=target.verify_tls
    )
    config = {
        "loadrun_version": __version__,
        "started_at": started_at,
        "target": target.describe(),
        "embedded_mock": mock_info,
        "profile": profile.describe(),
        "load": plan_json(plan),
        "context_window": settings.context_window,
        "transport": settings.transport,
        "receive_clock": transport.receive_clock(target.endpoint),
        "slos": [slo.label() for slo in settings.slos],
        "timeouts": settings.timeouts().describe(),
        "retry_rate_limited": {
            "retries": settings.retry_rate_limited,
            "wait_cap_s": settings.retry_wait_cap_s,
        },
        "stop_grace_s": settings.stop_grace_s,
    }
    retries = RetryLog(folder.path if folder is not None and settings.retry_rate_limited else None, 0)
    client = ChatClient(
        target,
        AnswerTap(transport),
        timeouts=settings.timeouts(),
        retry=settings.retry_policy(),
        on_retry=retries.add,
        stop=stop,
    )
    monitor = LoopLagMonitor()
    cpu = CpuMeter()
    breaker = _UnreachableBreaker(limit=max(20, 2 * _width(plan)), stop=stop)
    tally = ClassTally()
    monitor_stop = anyio.Event()
    recorder: Recorder | None = None
    level: LevelResult | None = None

    def on_record(record: Record) -> None:
        assert recorder is not None
        recorder.add(record)
        tally.add(record)
        breaker.see(record)
        if observe is not None:
            observe(record)
        if len(recorder._pending) >= ABSORB_EVERY:
            recorder.absorb()

    try:
        calibration = await _calibration(settings, profile, client)
        config["input_calibration"] = calibration.describe()
        trace = plan.arrivals if isinstance(plan, OpenLoopPlan) else None
        speed = trace.speed if isinstance(trace, TraceArrivals) else 1.0
        workload = Workload(profile, calibration.fit, settings.context_window, think_scale=1 / speed)
        _refuse_impossible(workload, settings.context_window)
        if folder is not None:
            folder.write_json(CONFIG_FILE, config)
        if settings.start_at_wall is not None:
            await wait_until_wall(settings.start_at_wall)
        async with anyio.create_task_group() as group:
            group.start_soon(monitor.run, monitor_stop)
            origin = time.perf_counter_ns()
            origin_wall = time.time()
            cpu.start()
            retries.origin_ns = origin
            if folder is not None:
                folder.open_records(origin)
            recorder = Recorder(origin, slos=settings.slos, sink=folder.write_record if folder else None)
            if isinstance(plan, ClosedLoopPlan):
                level = await run_closed_loop(
                    plan, client.execute, workload.conversations(), on_record, stop=stop
                )
            else:
                arrivals = _arrivals(plan, workload, profile.seed)
                level = await run_open_loop(plan, client.execute, arrivals, on_record, stop=stop)
            monitor_stop.set()
            cpu_used = cpu.stop()
    finally:
        await transport.aclose()
        retries.close()
        if folder is not None:
            folder.close()
    assert recorder is not None and level is not None
    summary = _summary(config, recorder, level, monitor, breaker, folder)
    summary.update(tally.summary())
    if isinstance(plan, OpenLoopPlan):
        summary["arrivals"] = _arrivals_summary(plan, level)
        summary["generator"]["send_lag_p99_ms"] = summary["arrivals"]["send_lag_p99_ms"]
        summary["generator"]["behind"] = summary["arrivals"]["behind"]
    if settings.retry_rate_limited:
        summary["retries"] = retries.summary()
    summary["cancelled_in_flight"] = level.cancelled
    # Judged last, once the open loop's send lateness is in: a saturated generator is flagged.
    summary["generator"] = assess_generator(summary["generator"], cpu_used)
    summary["origin_wall"] = round(origin_wall, 6)
    if signals is not None and signals.signal_name is not None:
        summary["interrupt"] = {"signal": signals.signal_name, "grace_s": settings.stop_grace_s}
    if folder is not None:
        folder.write_json(SUMMARY_FILE, summary)
    history = settings.history_file()
    history_id = None
    if history is not None:
        # After the run, off the event loop: a busy database must not stall anything timed.
        history_id = await anyio.to_thread.run_sync(record_run, history, summary, config)
    return RunResult(summary, folder.path if folder else None, history_id, config)


def _summary(
    config: dict[str, Any],
    recorder: Recorder,
    level: LevelResult,
    monitor: LoopLagMonitor,
    breaker: _UnreachableBreaker,
    folder: RunFolder | None,
) -> dict[str, Any]:
    measured = recorder.summary(level.window_start_ns, level.window_end_ns)
    e2e_mean = measured["latency"]["e2e"]["mean_ms"]
    throughput = measured["throughput"]["requests_per_s"]
    lag = monitor.report()
    receive = recorder.receive_error
    generator = {
        **lag,
        "receive_error_samples": receive.count,
        "receive_error_p50_ms": receive.percentile_us(50.0) / 1000 if receive.count else None,
        "receive_error_p99_ms": receive.percentile_us(99.0) / 1000 if receive.count else None,
        "send_lag_p99_ms": recorder.send_lag.percentile_us(99.0) / 1000 if recorder.send_lag.count else None,
    }
    return {
        **config,
        "run_folder": str(folder.path) if folder else None,
        "interrupted": level.interrupted,
        "aborted": breaker.reason,
        "sent": level.sent,
        **measured,
        "little": {
            # Little's law: in a closed loop, throughput x mean latency should equal the
            # concurrency; a shortfall is time the generator spent between requests.
            "implied_concurrency": throughput * e2e_mean / 1000 if e2e_mean is not None else None,
        },
        "generator": generator,
    }


class _UnreachableBreaker:
    """Stops a run whose every request in a row fails to connect (nothing to measure)."""

    def __init__(self, limit: int, stop: anyio.Event) -> None:
        self.limit = limit
        self.stop = stop
        self.streak = 0
        self.reason: str | None = None

    def see(self, record: Record) -> None:
        if record.outcome in (Outcome.CONNECTION_ERROR, Outcome.TIMEOUT_CONNECT):
            self.streak += 1
            if self.streak >= self.limit and self.reason is None:
                self.reason = f"{self.streak} requests in a row could not connect: {record.error}"
                self.stop.set()
        else:
            self.streak = 0


@contextlib.contextmanager
def target_for(settings: MeasureSettings) -> Iterator[tuple[Target, dict[str, Any] | None]]:
    """The run's target, or (none given) the bundled mock started for it, with its info."""
    if settings.target is not None:
        yield settings.target, None
        return
    with embedded_mock(settings.mock_engine) as (target, info):
        yield target, info


@contextlib.contextmanager
def embedded_mock(engine: str) -> Iterator[tuple[Target, dict[str, Any]]]:
    """Start the bundled mock server in a child process; stop it by PID on the way out."""
    # The only place loadrun touches the mock: it is started, never imported for logic.
    from mock_server.config import ConfigError, load_config
    from mock_server.launch import start_subprocess

    try:
        model = load_config(engine).model
    except (ConfigError, OSError) as exc:
        raise UsageError(f"mock engine {engine!r}: {exc}") from exc
    with start_subprocess(engine) as mock:
        target = Target(base_url=mock.base_url, model=model, name=f"mock:{engine}", embedded=True)
        yield target, {"engine": engine, "url": mock.url, "pid": mock.pid}


async def _check_reachable(target: Target, timeout_s: float) -> None:
    endpoint = target.endpoint
    try:
        with anyio.fail_after(timeout_s):
            stream = await anyio.connect_tcp(endpoint.host, endpoint.port)
            await stream.aclose()
    except TimeoutError as exc:
        raise TargetUnreachable(
            f"{endpoint.host}:{endpoint.port} did not accept a connection within {timeout_s:g} s"
        ) from exc
    except OSError as exc:
        raise TargetUnreachable(
            f"cannot connect to {endpoint.host}:{endpoint.port}: {exc.strerror or exc}"
        ) from exc


def plan_json(plan: LoadPlan) -> dict[str, Any]:
    """The load level as config.json and the summary state it."""
    if isinstance(plan, ClosedLoopPlan):
        return {
            "mode": "closed_loop",
            "concurrency": plan.concurrency,
            "duration_s": plan.duration_s,
            "requests": plan.requests,
            "warmup_s": plan.warmup_s,
            "time_limit_s": plan.time_limit_s,
            "think_time_s": plan.think_time_s,
        }
    return {
        "mode": "open_loop",
        "concurrency": None,
        **plan.arrivals.describe(),
        "in_flight_cap": plan.in_flight_cap,
        "duration_s": plan.duration_s,
        "requests": plan.requests,
        "warmup_s": plan.warmup_s,
        "time_limit_s": plan.time_limit_s,
    }


def level_label(plan: LoadPlan) -> str:
    """The level in a run folder's name, e.g. c8 or poisson-r20."""
    if isinstance(plan, ClosedLoopPlan):
        return f"c{plan.concurrency}"
    if isinstance(plan.arrivals, TraceArrivals):
        return f"replay-x{plan.arrivals.speed:g}"
    return f"{plan.arrivals.kind}-r{plan.arrivals.rate_per_s:g}"


def _width(plan: LoadPlan) -> int:
    """How many requests may be in flight at once (for the unreachable breaker)."""
    return plan.concurrency if isinstance(plan, ClosedLoopPlan) else min(plan.in_flight_cap, 1000)


async def _calibration(settings: MeasureSettings, profile: Profile, client: ChatClient) -> Calibration:
    """The TokenFit for this target: learned by a short probe, or one token per word."""
    if not settings.wants_calibration() or all(spec.prompts is not None for spec in profile.mix()):
        return Calibration(ONE_TOKEN_PER_WORD)  # not asked for: the fit's source says so
    mix = profile.mix()
    typical = sum(spec.weight * spec.input_tokens for spec in mix) / sum(spec.weight for spec in mix)
    return await calibrate_tokens(client.execute, typical, profile.seed, settings.context_window)


def _refuse_impossible(workload: Workload, context_window: int | None) -> None:
    """A class whose every request would exceed the context window: refuse the run up front."""
    if context_window is None:
        return
    for spec in workload.mix:
        smallest_input = spec.input_distribution().smallest()
        smallest_output = spec.output_distribution().smallest()
        if spec.prompts is None and smallest_input + max(1.0, smallest_output) > context_window:
            raise UsageError(
                f"request class {spec.name!r} needs at least {smallest_input:g} input and "
                f"{max(1.0, smallest_output):g} output tokens, more than the target's context window "
                f"of {context_window}: no request of it could be sent"
            )


def _arrivals(plan: OpenLoopPlan, workload: Workload, seed: int) -> Iterator[tuple[float, Conversation]]:
    """(due offset, conversation) pairs: from the trace, or the process with the workload's mix."""
    import random

    if isinstance(plan.arrivals, TraceArrivals):
        for entry in plan.arrivals.entries:
            spec = workload.class_named(entry.request_class) if entry.request_class else None
            if entry.request_class and spec is None:
                raise UsageError(
                    f"the trace names request class {entry.request_class!r}, which the profile does not have"
                )
            conversation = workload.next_conversation(spec, entry.input_tokens, entry.output_tokens)
            yield entry.offset_s / plan.arrivals.speed, conversation
        return
    # Arrival times have their own generator: a new rate never changes what is sent.
    offsets = plan.arrivals.offsets_s(random.Random(f"{seed}:arrivals"))
    for offset in offsets:
        yield offset, workload.next_conversation()


def _arrivals_summary(plan: OpenLoopPlan, level: LevelResult) -> dict[str, Any]:
    lag = level.send_lag
    p99_ms = lag.percentile_us(99.0) / 1000 if lag.count else None
    behind = p99_ms is not None and p99_ms * 1000 > LATE_SEND_US
    seconds = max(1e-9, (level.window_end_ns - level.origin_ns) / 1e9)
    note = None
    if behind:
        note = (
            f"the generator fell behind: p99 of the send lag {p99_ms:.1f} ms "
            f"(limit {LATE_SEND_US / 1000:g} ms); {level.late_sends} sends were late. "
            "Latencies still count from the due time."
        )
    elif level.not_sent:
        note = f"{level.not_sent} requests were due while {plan.in_flight_cap} were in flight, and not sent"
    return {
        **plan.arrivals.describe(),
        "in_flight_cap": plan.in_flight_cap,
        "due": level.due,
        "sent": level.due - level.not_sent - level.refused,
        "not_sent": level.not_sent,
        "refused": level.refused,
        "due_per_s": level.due / seconds,
        "late_sends": level.late_sends,
        "send_lag_p50_ms": lag.percentile_us(50.0) / 1000 if lag.count else None,
        "send_lag_p99_ms": p99_ms,
        "send_lag_max_ms": lag.max_us / 1000 if lag.count else None,
        "behind": behind,
        "note": note,
    }


def run_notes(summary: dict[str, Any]) -> list[str]:
    """Short lines on what the latency table does not show: arrivals, refusals, answers, lengths."""
    notes: list[str] = []
    arrivals = summary.get("arrivals")
    if arrivals:
        notes.append(
            f"Arrivals ({arrivals['arrival']}): {arrivals['due']} due, {arrivals['sent']} sent, "
            f"{arrivals['not_sent']} not sent (in-flight cap {arrivals['in_flight_cap']}); send lag p99 "
            f"{arrivals['send_lag_p99_ms'] if arrivals['send_lag_p99_ms'] is not None else '-'} ms."
        )
        if arrivals.get("note"):
            notes.append(f"Warning: {arrivals['note']}")
    refused = summary.get("requests", {}).get("by_outcome", {}).get(Outcome.OVER_CONTEXT.value)
    if refused:
        notes.append(f"Warning: {refused} requests were not sent: they would exceed the context window.")
    for name, entry in summary.get("classes", {}).items():
        compliance = entry["compliance"]
        if compliance["checked"]:
            notes.append(
                f"Answers of {name}: {compliance['compliant']} of {compliance['checked']} passed the check "
                f"({100 * compliance['share']:.0f} %), {entry['output_tokens_mean']:.1f} output tokens each."
            )
    lengths = summary.get("input_lengths") or {}
    if lengths.get("samples"):
        notes.append(
            f"Input length: {lengths['requested_mean']:.0f} tokens asked, {lengths['achieved_mean']:.0f} "
            f"reported by the target on average ({100 * lengths['mean_relative_error']:+.1f} %)."
        )
    calibration = summary.get("input_calibration") or {}
    if calibration.get("note"):
        notes.append(f"Input calibration: {calibration['note']}.")
    return notes


def describe_plan(settings: MeasureSettings, target: Target, prices: TokenPrices | None = None) -> str:
    """What one run will send, in words, for the confirmation before loading a remote target."""
    plan = settings.plan()
    request = settings.profile.request
    probe = (
        "\nFirst, up to 4 requests of one output token each learn how the target counts input tokens."
        if settings.wants_calibration()
        else ""
    )
    if isinstance(plan, ClosedLoopPlan):
        text = plan_text(
            target,
            requests=plan.requests,
            duration_s=plan.duration_s,
            concurrency=plan.concurrency,
            input_tokens=request.input_tokens,
            output_tokens=request.output_tokens,
            prices=prices,
        )
        return text + probe
    arrivals = plan.arrivals
    expected: float | None = plan.requests
    if isinstance(arrivals, TraceArrivals):
        how = f"replaying {len(arrivals.entries)} arrivals of {arrivals.source} at {arrivals.speed:g}x speed"
        if expected is None and plan.duration_s is None:
            expected = len(arrivals.entries)
    else:
        how = f"{arrivals.kind} arrivals at {arrivals.rate_per_s:g} conversations/s"
        if expected is None and plan.duration_s is not None:
            expected = arrivals.rate_per_s * (plan.duration_s + plan.warmup_s)
    turns = max(spec.turns for spec in settings.profile.mix())
    volume = f"about {expected:,.0f} conversations" if expected is not None else f"for {plan.duration_s:g} s"
    lines = [
        f"loadrun will send {volume} ({how}; up to {turns} requests each, at most {plan.in_flight_cap} "
        f"in flight) to {target.base_url} (model {target.model}): about {request.input_tokens} input and "
        f"up to {request.output_tokens} output tokens per request."
    ]
    if prices is not None:
        each = prices.request_cost(request.input_tokens, request.output_tokens)
        total = f", about {each * expected * turns:.4f} in all" if expected is not None else ""
        lines.append(f"Estimated cost: about {each:.6f} per request{total}, at the prices given.")
    else:
        lines.append("Estimated cost: unknown (give --price-input and --price-output per million tokens).")
    lines.append(CAUTION)
    return "\n".join(lines) + probe


def event_loop_options() -> dict[str, Any]:
    try:
        import uvloop  # noqa: F401
    except ImportError:
        return {}
    return {"use_uvloop": True}
