"""One shard in one worker: run the level from the agreed start instant, hand back results.

The coordinator picks a wall-clock start instant a little in the future; each worker
prepares (connection check, calibration, run folder), waits until that instant plus its
shard's phase (``MeasureSettings.start_at_wall``) and then runs with its own monotonic
clock, so the shards' measurement windows line up second by second. The worker writes an ordinary
run folder of its own (config, records flushed line by line, summary), so a worker that
dies leaves its finished requests on disk. What comes back is picklable: the summary with
its encoded histograms and windows, where the folder is, and, for a coordinator on
another machine, the records themselves.
"""

from __future__ import annotations

import os
import socket
import tempfile
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import anyio

from loadrun.errors import LoadrunError
from loadrun.runner import MeasureSettings, RunResult, event_loop_options, measure_async
from loadrun.shards import ShardSpec
from loadrun.store import RECORDS_FILE

__all__ = ["ShardResult", "run_shard"]


@dataclass(slots=True)
class ShardResult:
    index: int
    host: str
    pid: int
    summary: dict[str, Any] | None = None
    """None: the shard did not finish (see ``error``)."""
    folder: str | None = None
    """This shard's run folder, on ``host``."""
    error: str | None = None
    records: bytes | None = None
    """The shard's records.jsonl, when the coordinator is on another host."""

    @property
    def finished(self) -> bool:
        return self.summary is not None


def run_shard(
    spec: ShardSpec, start_at_wall: float, coordinator_host: str, stop_event: str | None = None
) -> ShardResult:
    """Run ``spec`` from ``start_at_wall`` on (blocking; starts its own event loop).
    ``stop_event``: the name of a Dask Event that, once set, stops the shard the way a signal
    stops a lone run (a Dask task runs in a worker thread, which no signal reaches)."""
    stop_flag = None
    if stop_event is not None:
        from distributed import Event

        untyped: Any = Event  # distributed's Event is not typed
        stop_flag = untyped(stop_event)  # made in the task's thread, where the worker's client is known
    return anyio.run(
        _run_shard,
        spec,
        start_at_wall,
        coordinator_host,
        stop_flag,
        backend="asyncio",
        backend_options=event_loop_options(),
    )


async def _run_shard(
    spec: ShardSpec, start_at_wall: float, coordinator_host: str, stop_flag: Any = None
) -> ShardResult:
    host = socket.gethostname()
    result = ShardResult(index=spec.index, host=host, pid=os.getpid())
    due = start_at_wall + spec.phase_s
    settings = replace(spec.settings, start_at_wall=due)
    if spec.out_dir is not None:
        settings = replace(settings, out_dir=_writable(spec.out_dir, spec.index))
    stop = anyio.Event()
    async with anyio.create_task_group() as group:
        if stop_flag is not None:
            group.start_soon(_watch, stop_flag, stop)
        run = await _measure_or_error(settings, stop)
        group.cancel_scope.cancel()
    if isinstance(run, str):
        result.error = run
        return result
    result.summary = run.summary
    result.folder = str(run.folder) if run.folder is not None else None
    if run.folder is not None and host != coordinator_host:
        result.records = (run.folder / RECORDS_FILE).read_bytes()
    return result


async def _measure_or_error(settings: MeasureSettings, stop: anyio.Event) -> RunResult | str:
    """The run, or why it failed (one line)."""
    try:
        return await measure_async(settings, stop=stop)
    except LoadrunError as exc:
        return f"{type(exc).__name__}: {exc}"


_WATCH_S = 0.25
"""How long each look at the coordinator's stop flag waits (a stop takes up to this long)."""


async def _watch(stop_flag: Any, stop: anyio.Event) -> None:
    """Set ``stop`` once the coordinator sets its Dask Event."""
    while not await anyio.to_thread.run_sync(stop_flag.wait, _WATCH_S, abandon_on_cancel=True):
        pass
    stop.set()


def _writable(folder: str, index: int) -> Path:
    """The folder asked for, or (on a machine where it cannot be made) a temporary one."""
    path = Path(folder)
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError:
        return Path(tempfile.mkdtemp(prefix=f"loadrun-shard-w{index}-"))
    return path
