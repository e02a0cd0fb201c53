"""Shards on local worker processes (``--workers N`` with no cluster address).

Each shard gets a fresh process (spawned, not forked: no event loop or thread of the
coordinator is copied). A worker imports everything, says it is ready, and waits for the
start instant, which the coordinator picks only once every worker is ready, so slow
imports do not skew the start. A process that exits without a result has died: it is
reported with its exit code, and its run folder keeps the records it had flushed.
Every process is stopped by its PID on the way out.
"""

from __future__ import annotations

import contextlib
import dataclasses
import multiprocessing
import multiprocessing.connection
import os
import signal
import socket
import threading
import time
from collections.abc import Callable, Sequence
from multiprocessing.connection import Connection
from multiprocessing.process import BaseProcess

from loadrun.errors import LoadrunError
from loadrun.interrupt import ForwardedStop
from loadrun.shard_worker import ShardResult, run_shard
from loadrun.shards import ShardSpec

__all__ = ["READY_TIMEOUT_S", "run_on_processes"]

READY_TIMEOUT_S = 60.0
"""How long a spawned worker may take to import and say it is ready."""
_READY = "ready"


def _worker_main(spec: ShardSpec, channel: Connection, coordinator_host: str) -> None:
    # A session of its own: a terminal's Ctrl-C reaches the coordinator alone, which passes
    # it on as SIGTERM (by PID); the shard then stops as a lone run does, with its grace.
    os.setsid()
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    spec = dataclasses.replace(spec, settings=dataclasses.replace(spec.settings, handle_signals=True))
    channel.send(_READY)
    start_at = channel.recv()
    threading.Thread(target=_stop_with_coordinator, args=(channel,), daemon=True).start()
    channel.send(run_shard(spec, float(start_at), coordinator_host))
    channel.close()


def _stop_with_coordinator(channel: Connection) -> None:
    """The coordinator sends nothing after the start: the channel turns readable only when
    its end closes, and then no one will collect this shard, so it stops loading."""
    try:
        channel.poll(None)
    except (OSError, ValueError):  # this end was closed: the shard finished
        return
    os.kill(os.getpid(), signal.SIGTERM)


def run_on_processes(
    specs: Sequence[ShardSpec],
    deadline_s: float,
    lead_s: float,
    *,
    on_started: Callable[[list[int]], None] | None = None,
    stop: ForwardedStop | None = None,
) -> tuple[list[ShardResult], float]:
    """Run each shard in its own process; returns the results and the agreed start instant.

    The start is ``lead_s`` after the last worker is ready (time for the instant to reach
    them all and for their set-up). ``deadline_s`` bounds the run after the start; a worker
    still running then is stopped and reported. ``on_started`` sees the worker PIDs once all are ready;
    ``stop`` (when given) learns them too, to pass a Ctrl-C on.
    """
    context = multiprocessing.get_context("spawn")
    host = socket.gethostname()
    processes: list[BaseProcess] = []
    channels: list[Connection] = []
    try:
        for spec in specs:
            ours, theirs = context.Pipe()
            worker = context.Process(
                target=_worker_main, args=(spec, theirs, host), name=f"loadrun-{spec.name}", daemon=True
            )
            worker.start()
            theirs.close()
            processes.append(worker)
            channels.append(ours)
        results: dict[int, ShardResult] = {}
        _await_ready(specs, processes, channels, results)
        start_at = time.time() + lead_s
        for spec, channel in zip(specs, channels, strict=True):
            if spec.index not in results:
                channel.send(start_at)
        if stop is not None:
            stop.worker_pids = tuple(process.pid for process in processes if process.pid)
        if on_started is not None:
            on_started([process.pid or 0 for process in processes])
        _collect(specs, processes, channels, results, start_at + deadline_s)
        return [results[spec.index] for spec in specs], start_at
    finally:
        for process in processes:
            _stop(process)
        for channel in channels:
            channel.close()


def _await_ready(
    specs: Sequence[ShardSpec],
    processes: Sequence[BaseProcess],
    channels: Sequence[Connection],
    results: dict[int, ShardResult],
) -> None:
    waiting = {
        channel: (spec, process) for spec, process, channel in zip(specs, processes, channels, strict=True)
    }
    give_up = time.monotonic() + READY_TIMEOUT_S
    while waiting:
        left = give_up - time.monotonic()
        if left <= 0:
            raise LoadrunError(
                f"{len(waiting)} worker process(es) were not ready within {READY_TIMEOUT_S:g} s"
            )
        sentinels = {process.sentinel: channel for channel, (_, process) in waiting.items()}
        for ready in multiprocessing.connection.wait([*waiting, *sentinels], timeout=left):
            channel = sentinels[ready] if isinstance(ready, int) else ready
            if channel not in waiting:
                continue
            spec, process = waiting.pop(channel)
            try:
                if channel.poll() and channel.recv() == _READY:
                    continue
            except (EOFError, OSError):
                pass
            results[spec.index] = _died(spec, process, "before the start")


def _collect(
    specs: Sequence[ShardSpec],
    processes: Sequence[BaseProcess],
    channels: Sequence[Connection],
    results: dict[int, ShardResult],
    give_up_wall: float,
) -> None:
    waiting = {
        channel: (spec, process)
        for spec, process, channel in zip(specs, processes, channels, strict=True)
        if spec.index not in results
    }
    while waiting:
        left = give_up_wall - time.time()
        if left <= 0:
            for spec, process in waiting.values():
                _stop(process)
                results[spec.index] = _died(spec, process, "still running at the run's time limit: stopped")
            return
        sentinels = {process.sentinel: channel for channel, (_, process) in waiting.items()}
        for ready in multiprocessing.connection.wait([*waiting, *sentinels], timeout=min(left, 1.0)):
            channel = sentinels[ready] if isinstance(ready, int) else ready
            if channel not in waiting:
                continue
            spec, process = waiting[channel]
            try:
                answer = channel.recv() if channel.poll() else None
            except (EOFError, OSError):
                answer = None
            if isinstance(answer, ShardResult):
                results[spec.index] = answer
                waiting.pop(channel)
            elif not process.is_alive():
                results[spec.index] = _died(spec, process, "during the run")
                waiting.pop(channel)


def _died(spec: ShardSpec, process: BaseProcess, when: str) -> ShardResult:
    process.join(timeout=1.0)
    code = process.exitcode
    how = f"exit code {code}" if code is not None and code >= 0 else f"signal {-code}" if code else "no exit"
    return ShardResult(
        index=spec.index,
        host=socket.gethostname(),
        pid=process.pid or 0,
        error=f"worker {spec.name} (PID {process.pid}) died {when} ({how})",
    )


def _stop(process: BaseProcess) -> None:
    """Stop one worker by its PID: ask, then insist."""
    if process.is_alive():
        process.terminate()
        process.join(timeout=5.0)
    if process.is_alive():
        process.kill()
    with contextlib.suppress(AssertionError):  # a process that never started has nothing to join
        process.join(timeout=5.0)
