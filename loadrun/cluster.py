"""Shards on a Dask distributed cluster (``--cluster ADDRESS``).

Dask is the distributed engine users already run; loadrun only submits one task per
shard, each pinned to a different Dask worker (two shards in one worker process would
share its interpreter lock and time each other badly). Before the clock starts, every
Dask worker imports loadrun, so the start instant, picked a little in the future, only
has to cover the submission. A shard whose Dask worker leaves the cluster, or whose task
fails, is reported; its run folder on that worker's machine keeps the records it flushed.
"""

from __future__ import annotations

import socket
import time
import uuid
from collections.abc import Sequence
from typing import Any

from loadrun.errors import UsageError
from loadrun.interrupt import ForwardedStop
from loadrun.shard_worker import ShardResult, run_shard
from loadrun.shards import ShardSpec

__all__ = ["check_address", "cluster_size", "run_on_dask"]

_POLL_S = 0.05
"""How often the coordinator looks at its futures (it has nothing else to do)."""
_CHECK_WORKERS_S = 0.5
"""How often it asks the scheduler which workers are still there."""


def _warm() -> str:
    """Run on every Dask worker before the start: import what a shard needs."""
    import loadrun.shard_worker  # noqa: F401

    return socket.gethostname()


_SOCKET_SCHEMES = ("tcp", "tls", "ws", "wss")
_DEFAULT_SCHEDULER_PORT = 8786


def check_address(address: str) -> tuple[str, int] | None:
    """Refuse, in one line, an address Dask's client cannot use; (host, port) for the schemes
    that run over a socket, None for the others (ucx)."""
    from distributed.comm.addressing import parse_address, parse_host_port
    from distributed.comm.registry import get_backend

    refusal = f"{address!r} is not a Dask scheduler address (tcp://host:8786)"
    try:
        scheme, location = parse_address(address, strict=False)
        get_backend(scheme)
    except ValueError as exc:
        raise UsageError(f"{refusal}: {exc}") from exc
    if scheme == "inproc":
        raise UsageError(f"{address!r} names a scheduler inside another process: give tcp://host:port")
    if scheme not in _SOCKET_SCHEMES:
        return None
    try:
        host, port = parse_host_port(location, _DEFAULT_SCHEDULER_PORT)
    except ValueError as exc:
        raise UsageError(f"{refusal}: {exc}") from exc
    if not host or not 0 < int(port) < 65536:
        raise UsageError(f"{refusal}: no host or a bad port")
    return host, int(port)


def _probe(address: str, connect_timeout_s: float) -> None:
    """A plain socket connection first: a Client that fails to connect leaves a background loop
    that stalls the process for 20 s on exit and breaks the next Client in it."""
    endpoint = check_address(address)
    if endpoint is None:
        return
    try:
        socket.create_connection(endpoint, timeout=connect_timeout_s).close()
    except (OSError, UnicodeError) as exc:
        raise UsageError(f"cannot reach a Dask scheduler at {address}: {exc}") from exc


def _connect(address: str, connect_timeout_s: float) -> Any:
    try:
        from distributed import Client
    except ImportError as exc:  # pragma: no cover - a dependency of loadrun
        raise UsageError(f"--cluster needs Dask's distributed package: {exc}") from exc
    _probe(address, connect_timeout_s)
    try:
        # Through Any: whether Client's signature is typed differs between Dask releases.
        connect: Any = Client
        return connect(address, timeout=connect_timeout_s, set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        raise UsageError(f"cannot reach a Dask scheduler at {address}: {exc}") from exc


def cluster_size(address: str, connect_timeout_s: float = 10.0) -> int:
    """How many Dask workers the cluster at ``address`` has now."""
    with _connect(address, connect_timeout_s) as client:
        return len(client.scheduler_info(n_workers=-1)["workers"])


def run_on_dask(
    address: str,
    specs: Sequence[ShardSpec],
    deadline_s: float,
    lead_s: float,
    connect_timeout_s: float = 10.0,
    stop: ForwardedStop | None = None,
) -> tuple[list[ShardResult], float]:
    """Run each shard on its own Dask worker; returns the results and the agreed start instant
    (``lead_s`` after the submission: the scheduler must hand every task to its worker).
    Once ``stop`` has seen a signal, a Dask Event tells every shard to stop sending."""
    from distributed import Event

    with _connect(address, connect_timeout_s) as client:
        workers = sorted(client.scheduler_info(n_workers=-1)["workers"])
        if len(workers) < len(specs):
            raise UsageError(
                f"{len(specs)} shards need as many Dask workers; the cluster at {address} has {len(workers)}"
            )
        client.run(_warm, workers=workers[: len(specs)])
        start_at = time.time() + lead_s
        host = socket.gethostname()
        run_id = uuid.uuid4().hex[:8]
        stop_name = f"loadrun-{run_id}-stop"
        futures = {
            spec.index: client.submit(
                run_shard,
                spec,
                start_at,
                host,
                stop_name,
                key=f"loadrun-{run_id}-{spec.name}",
                workers=[worker],
                allow_other_workers=False,
                pure=False,
                retries=0,
            )
            for spec, worker in zip(specs, workers, strict=False)
        }
        assigned = dict(zip((spec.index for spec in specs), workers, strict=False))
        untyped: Any = Event  # distributed's Event is not typed
        stop_flag = untyped(stop_name, client=client)
        results = _collect(client, specs, futures, assigned, start_at + deadline_s, _Relay(stop, stop_flag))
        return [results[spec.index] for spec in specs], start_at


class _Relay:
    """Passes a signal the coordinator caught on to the shards, once. The signal handler only
    notes it; the Dask call is made here, from the polling loop, never inside the handler."""

    def __init__(self, stop: ForwardedStop | None, stop_flag: Any) -> None:
        self.stop = stop
        self.stop_flag = stop_flag
        self.relayed = False

    def __call__(self) -> None:
        if self.relayed or self.stop is None or self.stop.signal_name is None:
            return
        self.stop_flag.set()
        self.relayed = True


def _collect(
    client: Any,
    specs: Sequence[ShardSpec],
    futures: dict[int, Any],
    assigned: dict[int, str],
    give_up_wall: float,
    relay: _Relay,
) -> dict[int, ShardResult]:
    results: dict[int, ShardResult] = {}
    names = {spec.index: spec.name for spec in specs}
    while len(results) < len(futures):
        pending = [future for index, future in futures.items() if index not in results]
        polls = 0
        while polls * _POLL_S < _CHECK_WORKERS_S and all(not future.done() for future in pending):
            relay()
            time.sleep(_POLL_S)
            polls += 1
        alive = set(client.scheduler_info(n_workers=-1)["workers"])
        over = time.time() > give_up_wall
        for index, future in futures.items():
            if index in results:
                continue
            worker = assigned[index]
            if future.status == "finished":
                results[index] = future.result()
            elif future.status in ("error", "cancelled"):
                results[index] = _lost(index, worker, f"its task failed: {_exception_text(future)}")
            elif worker not in alive:
                future.cancel()
                results[index] = _lost(index, worker, f"Dask worker {worker} left the cluster during the run")
            elif over:
                future.cancel()
                results[index] = _lost(index, worker, "still running at the run's time limit: cancelled")
            if index in results and results[index].error and not results[index].finished:
                results[index].error = f"worker {names[index]}: {results[index].error}"
    return results


def _lost(index: int, worker: str, why: str) -> ShardResult:
    return ShardResult(index=index, host=worker, pid=0, error=why)


def _exception_text(future: Any) -> str:
    try:
        exc = future.exception(timeout=1.0)
    except Exception as error:  # the reason itself could not be fetched: say so
        return f"(unknown: {type(error).__name__})"
    return f"{type(exc).__name__}: {exc}"
