"""The measurement API: one profile, one target, one load level -> a summary and a run folder.

    from loadrun import MeasureSettings, measure
    result = measure(MeasureSettings(concurrency=4, requests=50))
    result.summary["latency"]["ttft"]["p50_ms"]

With no target the bundled mock server is started on a free loopback port (in a child
process, so that its CPU does not disturb the generator's timing) and stopped by its PID.
"""

from __future__ import annotations

import contextlib
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import anyio

from loadrun._version import __version__
from loadrun.client import ChatClient
from loadrun.driver import ClosedLoopPlan, LevelResult, run_closed_loop
from loadrun.errors import TargetUnreachable, UsageError
from loadrun.history import HISTORY_FILE, record_run
from loadrun.monitor import LoopLagMonitor
from loadrun.profile import Profile
from loadrun.record import Outcome, Record
from loadrun.recorder import Recorder
from loadrun.slo import Slo
from loadrun.store import CONFIG_FILE, SUMMARY_FILE, RunFolder
from loadrun.target import Target
from loadrun.transports import make_transport

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

    def history_file(self) -> Path | None:
        if not self.record_history:
            return None
        if self.history_path is not None:
            return self.history_path
        return self.out_dir / HISTORY_FILE if self.out_dir is not None else None

    def plan(self) -> ClosedLoopPlan:
        load = self.profile.load
        requests = self.requests
        duration = self.duration_s
        if requests is None and duration is None:
            requests, duration = load.requests, load.duration_s
        return ClosedLoopPlan(
            concurrency=self.concurrency or load.concurrency,
            duration_s=duration if requests is None else None,
            requests=requests,
            warmup_s=self.warmup_s if self.warmup_s is not None else load.warmup_s,
            time_limit_s=self.time_limit_s,
        )


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
    plan = settings.plan()
    with _target_for(settings) as (target, mock_info):
        if not target.is_loopback and not settings.confirmed:
            raise UsageError(
                f"{target.base_url} is not on this machine: confirm that you may load it (--yes)"
            )
        await _check_reachable(target, settings.connect_timeout_s)
        return await _run_level(settings, plan, target, mock_info, stop or anyio.Event(), observe)


async def _run_level(
    settings: MeasureSettings,
    plan: ClosedLoopPlan,
    target: Target,
    mock_info: dict[str, Any] | None,
    stop: anyio.Event,
    observe: Callable[[Record], None] | None = None,
) -> RunResult:
    label = f"{settings.profile.name}-c{plan.concurrency}"
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
        "profile": settings.profile.describe(),
        "load": _plan_json(plan),
        "transport": settings.transport,
        "receive_clock": transport.receive_clock(target.endpoint),
        "slos": [slo.label() for slo in settings.slos],
        "timeouts": {"connect_s": settings.connect_timeout_s, "total_s": settings.total_timeout_s},
    }
    if folder is not None:
        folder.write_json(CONFIG_FILE, config)
    client = ChatClient(target, transport, total_timeout_s=settings.total_timeout_s)
    monitor = LoopLagMonitor()
    breaker = _UnreachableBreaker(limit=max(20, 2 * plan.concurrency), stop=stop)
    monitor_stop = anyio.Event()
    recorder: Recorder | None = None
    level: LevelResult | None = None

    def on_record(record: Record) -> None:
        assert recorder is not None
        recorder.add(record)
        breaker.see(record)
        if observe is not None:
            observe(record)
        if len(recorder._pending) >= ABSORB_EVERY:
            recorder.absorb()

    try:
        async with anyio.create_task_group() as group:
            group.start_soon(monitor.run, monitor_stop)
            origin = time.perf_counter_ns()
            if folder is not None:
                folder.open_records(origin)
            recorder = Recorder(origin, slos=settings.slos, sink=folder.write_record if folder else None)
            level = await run_closed_loop(
                plan, client.execute, settings.profile.requests(), on_record, stop=stop
            )
            monitor_stop.set()
    finally:
        await transport.aclose()
        if folder is not None:
            folder.close()
    assert recorder is not None and level is not None
    summary = _summary(config, recorder, level, monitor, breaker, folder)
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
def _target_for(settings: MeasureSettings) -> Iterator[tuple[Target, dict[str, Any] | None]]:
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


def _plan_json(plan: ClosedLoopPlan) -> dict[str, Any]:
    return {
        "mode": "closed_loop",
        "concurrency": plan.concurrency,
        "duration_s": plan.duration_s,
        "requests": plan.requests,
        "warmup_s": plan.warmup_s,
        "time_limit_s": plan.time_limit_s,
    }


def event_loop_options() -> dict[str, Any]:
    try:
        import uvloop  # noqa: F401
    except ImportError:
        return {}
    return {"use_uvloop": True}
