"""Splitting one load level into shards, one per worker process.

A closed loop of concurrency C over N workers gives each C // N clients (the first C % N
one more); an open loop of rate R gives each R / N, which keeps the sum of independent
Poisson processes a Poisson process of rate R. A request count is split like the
concurrency; a duration is the same for all. Each shard's profile seed is derived from
the run's seed and the shard's number, so shards send different but reproducible requests.
Constant arrivals are interleaved: shard i starts i / R seconds after the others. A
replayed trace is one sequence of arrivals and is not split.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, replace

from loadrun.driver import ClosedLoopPlan
from loadrun.errors import UsageError
from loadrun.runner import MeasureSettings

__all__ = ["MAX_WORKERS", "ShardSpec", "derive_seed", "split_settings"]

MAX_WORKERS = 256


@dataclass(frozen=True, slots=True)
class ShardSpec:
    """What one worker runs: its share of the level, written under ``out_dir``."""

    index: int
    count: int
    settings: MeasureSettings
    out_dir: str | None
    """This shard's folder for its own run folder (records, config, summary); None: none."""
    phase_s: float = 0.0
    """Seconds after the agreed start at which this shard begins (constant arrivals are
    interleaved, not sent N at a time)."""

    @property
    def name(self) -> str:
        return f"w{self.index}"


def derive_seed(seed: int, index: int) -> int:
    """A seed for shard ``index``, reproducible and unrelated to its neighbours'."""
    digest = hashlib.sha256(f"{seed}:shard:{index}".encode()).digest()
    return int.from_bytes(digest[:6], "big")


def _share(total: int, count: int, index: int) -> int:
    return total // count + (1 if index < total % count else 0)


def split_settings(settings: MeasureSettings, count: int, out_dir: str | None) -> list[ShardSpec]:
    """``count`` shards of ``settings`` (which must name its target: the coordinator's mock or
    the user's); each writes its run folder under ``out_dir``/w<index>, stores no history and
    handles no signals (the coordinator does)."""
    if not 1 <= count <= MAX_WORKERS:
        raise UsageError(f"workers must be within 1..{MAX_WORKERS}, got {count}")
    if settings.target is None:
        raise UsageError("a sharded run needs its target resolved first (the coordinator starts the mock)")
    plan = settings.check()
    if settings.arrival_kind() == "replay":
        raise UsageError("a replayed trace is one sequence of arrivals: run it with one worker")
    requests = plan.requests
    if requests is not None and requests < count:
        raise UsageError(f"{requests} requests cannot be split across {count} workers")
    seed = settings.effective_profile().seed
    shards: list[ShardSpec] = []
    for index in range(count):
        changes: dict[str, object] = {
            "seed": derive_seed(seed, index),
            "record_history": False,
            "handle_signals": False,
            "out_dir": None,
            "confirmed": True,  # the coordinator asked, or the target is on this machine
        }
        if isinstance(plan, ClosedLoopPlan):
            if plan.concurrency < count:
                raise UsageError(f"concurrency {plan.concurrency} cannot be split across {count} workers")
            changes["concurrency"] = _share(plan.concurrency, count, index)
            changes["arrival"] = "closed"
        else:
            rate = plan.rate_per_s
            assert rate is not None  # every open process but replay has a rate
            changes["rate_per_s"] = rate / count
            changes["arrival"] = plan.arrivals.kind
            changes["in_flight_cap"] = max(1, -(-plan.in_flight_cap // count))
        if requests is not None:
            changes["requests"] = _share(requests, count, index)
            changes["duration_s"] = None
        else:
            changes["duration_s"] = plan.duration_s
            changes["requests"] = None
        shard_settings = replace(settings, **changes)  # type: ignore[arg-type]
        shard_settings.check()
        folder = f"{out_dir}/w{index}" if out_dir is not None else None
        phase = 0.0
        if not isinstance(plan, ClosedLoopPlan) and plan.arrivals.kind == "constant" and plan.rate_per_s:
            phase = index / plan.rate_per_s
        shards.append(ShardSpec(index, count, shard_settings, folder, phase))
    return shards
