"""Several targets in one run (routed mixes, pipelines): their clients, their load plan, and
what the requests each one served cost.

A run that spreads its requests over targets of a targets file starts the bundled mock for
every mock target (``targets.started_targets``), opens one client per target, and keeps a
bill per target: requests, tokens (the usage the target reported, else what was asked),
and the cost from the target's prices. A target billed per hour costs its hours in the
measurement window, whatever share of the traffic it took.
"""

from __future__ import annotations

import contextlib
import random
from collections.abc import AsyncIterator, Callable, Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import anyio

from loadrun.answers import AnswerTap
from loadrun.arrivals import TraceArrivals
from loadrun.caution import check_remote_caps
from loadrun.client import ChatClient
from loadrun.cost import MILLION, SECONDS_PER_HOUR
from loadrun.driver import ClosedLoopPlan, Execute, LevelResult, LoadPlan, run_closed_loop, run_open_loop
from loadrun.errors import UsageError
from loadrun.profile import Profile
from loadrun.record import Record
from loadrun.runner import MeasureSettings
from loadrun.target import Target
from loadrun.targets import Prices, TargetSpec
from loadrun.timeouts import Timeouts
from loadrun.transports import make_transport
from loadrun.workload import Conversation

__all__ = [
    "LevelOverrides",
    "TargetBill",
    "blended_bill",
    "check_targets",
    "level_plan",
    "open_clients",
    "run_level",
]


@dataclass(frozen=True, slots=True)
class LevelOverrides:
    """The command line's say over the profile's ``[load]`` (None: the profile's)."""

    concurrency: int | None = None
    rate_per_s: float | None = None
    requests: int | None = None
    duration_s: float | None = None
    warmup_s: float | None = None
    time_limit_s: float = 3600.0
    stop_grace_s: float = 30.0


def level_plan(profile: Profile, overrides: LevelOverrides) -> LoadPlan:
    """The load level, validated as a single-target run validates it."""
    settings = MeasureSettings(
        profile=profile,
        concurrency=overrides.concurrency,
        rate_per_s=overrides.rate_per_s,
        requests=overrides.requests,
        duration_s=overrides.duration_s,
        warmup_s=overrides.warmup_s,
        time_limit_s=overrides.time_limit_s,
        stop_grace_s=overrides.stop_grace_s,
        out_dir=None,
    )
    return settings.check()


def check_targets(specs: Sequence[TargetSpec], plan: LoadPlan, *, confirmed: bool) -> None:
    """Targets not on this machine: a confirmation, and the remote caps (no override here)."""
    foreign = [spec for spec in specs if not spec.is_loopback]
    if foreign and not confirmed:
        names = ", ".join(spec.name for spec in foreign)
        raise UsageError(f"{names} not on this machine: confirm that you may load them (--yes)")
    for spec in foreign:
        target = spec.target()
        if isinstance(plan, ClosedLoopPlan):
            check_remote_caps(target, concurrency=plan.concurrency)
        else:
            check_remote_caps(target, rate_per_s=plan.rate_per_s)


@contextlib.asynccontextmanager
async def open_clients(
    specs: Sequence[TargetSpec], targets: Sequence[Target], stop: anyio.Event
) -> AsyncIterator[list[ChatClient]]:
    """One client per target (answers kept on request, for checks and later stages)."""
    clients = []
    try:
        for spec, target in zip(specs, targets, strict=True):
            transport = make_transport(
                spec.transport.name,
                connect_timeout_s=spec.transport.connect_timeout_s,
                verify_tls=spec.transport.verify_tls,
            )
            clients.append(
                ChatClient(
                    target,
                    AnswerTap(transport),
                    timeouts=Timeouts(
                        connect_s=spec.transport.connect_timeout_s, total_s=spec.transport.total_timeout_s
                    ),
                    stop=stop,
                )
            )
        yield clients
    finally:
        for client in clients:
            await client.transport.aclose()


@dataclass(slots=True)
class TargetBill:
    """Tokens and requests one target served in the measurement window."""

    requests: int = 0
    ok: int = 0
    input_tokens: int = 0
    output_tokens: int = 0
    estimated_input: int = 0
    """Requests whose input was not reported by the target (counted as asked)."""

    def add(self, record: Record) -> None:
        if not record.in_window or not record.send_ns:
            return  # warm-up, or never sent: nothing billed
        self.requests += 1
        self.ok += int(record.ok)
        if record.prompt_tokens is not None:
            self.input_tokens += record.prompt_tokens
        else:
            self.input_tokens += record.requested_input_tokens
            self.estimated_input += 1
        self.output_tokens += record.output_tokens

    @property
    def tokens(self) -> int:
        return self.input_tokens + self.output_tokens

    def cost(self, prices: Prices, seconds: float) -> float | None:
        """What these requests cost: by their tokens, or the window's hours of a server."""
        if prices.per_token:
            return prices.request_cost(self.input_tokens, self.output_tokens)
        if prices.per_hour is not None:
            return prices.per_hour * seconds / SECONDS_PER_HOUR
        return None

    def describe(self, prices: Prices, seconds: float) -> dict[str, Any]:
        cost = self.cost(prices, seconds)
        return {
            "requests": self.requests,
            "ok": self.ok,
            "input_tokens": self.input_tokens,
            "output_tokens": self.output_tokens,
            "requests_with_estimated_input": self.estimated_input,
            "currency": prices.currency,
            "basis": "tokens" if prices.per_token else ("hour" if prices.per_hour is not None else None),
            "cost": cost,
            "cost_per_request": cost / self.requests if cost is not None and self.requests else None,
            "cost_per_million_tokens": cost / self.tokens * MILLION
            if cost is not None and self.tokens
            else None,
        }


def blended_bill(entries: Sequence[dict[str, Any]], requests: int) -> dict[str, Any]:
    """Several targets' bills (``TargetBill.describe``) as one: per request and per million
    tokens over all of them; None when a target's price is unknown."""
    currencies = {entry["currency"] for entry in entries if entry["requests"]}
    tokens = sum(entry["input_tokens"] + entry["output_tokens"] for entry in entries)
    known = all(entry["cost"] is not None for entry in entries if entry["requests"]) and len(currencies) <= 1
    total = sum(entry["cost"] or 0.0 for entry in entries) if known else None
    return {
        "currency": next(iter(currencies), None),
        "requests": requests,
        "tokens": tokens,
        "cost": total,
        "cost_per_request": total / requests if total is not None and requests else None,
        "cost_per_million_tokens": total / tokens * MILLION if total is not None and tokens else None,
    }


async def run_level(
    plan: LoadPlan,
    execute: Execute,
    conversations: Iterator[Conversation],
    seed: int,
    on_record: Callable[[Record], None],
    stop: anyio.Event,
) -> LevelResult:
    """One load level of ``conversations``, closed or open loop (not a replayed trace)."""
    if isinstance(plan, ClosedLoopPlan):
        return await run_closed_loop(plan, execute, conversations, on_record, stop=stop)
    if isinstance(plan.arrivals, TraceArrivals):
        raise UsageError("a replayed trace is not supported here: give a rate (poisson, constant or bursty)")
    # Arrival times have their own generator, as in a single-target run.
    offsets = plan.arrivals.offsets_s(random.Random(f"{seed}:arrivals"))
    arrivals = zip(offsets, conversations, strict=False)
    return await run_open_loop(plan, execute, arrivals, on_record, stop=stop)
