"""Routed mixes: one profile's traffic split across targets, measured as the user sees it.

A profile with a ``[routing]`` table sends each conversation to one target of a targets
file, chosen either by share or by rule:

    [routing]
    targets = "../targets/harbour-desk-candidates.toml"   # relative to the profile

    [[routing.routes]]                 # by share: every route has one (they are normalised)
    target = "gullwing-cloud"
    share = 0.95
    [[routing.routes]]
    target = "tidewater-open"
    share = 0.05

    [[routing.routes]]                 # by rule: the first route that matches wins
    target = "tidewater-open"
    input_tokens_above = 600           # and/or request_class = "long-letter"
    [[routing.routes]]
    target = "gullwing-cloud"          # the last route has no condition: all the rest

The choice is a function of the conversation alone (its number and the profile's seed for
shares; its class and drawn input length for rules), so one seed routes the same way every
time, and every turn of a session goes where its first turn went. The run keeps one set of
histograms for the whole mix (the blended percentiles) and one per target, and a bill per
target; ``routed.json`` holds them, and with two targets the routing frontier
(``loadrun.frontier``) is computed from the per-target histograms and written beside it.
"""

from __future__ import annotations

import random
import time
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import anyio

from loadrun._version import __version__
from loadrun.errors import ProfileError
from loadrun.frontier import (
    FRONTIER_FILE,
    Frontier,
    MeasuredTarget,
    frontier_table,
    routing_frontier,
    write_frontier,
)
from loadrun.interrupt import signals_stop
from loadrun.profile import Profile, profile_from_dict
from loadrun.protocol import ChatRequest
from loadrun.record import Record
from loadrun.recorder import Recorder
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
from loadrun.targets import TargetsFile, TargetSpec, load_targets, started_targets
from loadrun.workload import Workload

__all__ = [
    "ROUTED_FILE",
    "Route",
    "RouteSettings",
    "RoutedProfile",
    "RoutedResult",
    "RoutingPlan",
    "load_routed_profile",
    "read_profile_document",
    "resolve_targets",
    "routed_profile_from_dict",
    "run_routed",
    "run_routed_async",
]

ROUTED_FILE = "routed.json"
BLENDED_PERCENTILES = ("p50_ms", "p95_ms", "p99_ms")


@dataclass(frozen=True, slots=True)
class Route:
    target: str
    share: float | None = None
    input_tokens_above: int | None = None
    request_class: str | None = None

    @property
    def conditional(self) -> bool:
        return self.input_tokens_above is not None or self.request_class is not None

    def matches(self, request_class: str, input_tokens: int) -> bool:
        if self.request_class is not None and request_class != self.request_class:
            return False
        return self.input_tokens_above is None or input_tokens > self.input_tokens_above

    def describe(self) -> dict[str, Any]:
        out: dict[str, Any] = {"target": self.target}
        if self.share is not None:
            out["share"] = self.share
        if self.input_tokens_above is not None:
            out["input_tokens_above"] = self.input_tokens_above
        if self.request_class is not None:
            out["request_class"] = self.request_class
        return out


@dataclass(frozen=True, slots=True)
class RoutingPlan:
    routes: tuple[Route, ...]
    targets: TargetsFile

    @property
    def by_share(self) -> bool:
        return self.routes[0].share is not None

    def target_names(self) -> list[str]:
        """Each routed target once, in the order of the routes."""
        return list(dict.fromkeys(route.target for route in self.routes))

    def specs(self) -> list[TargetSpec]:
        by_name = {spec.name: spec for spec in self.targets.targets}
        return [by_name[name] for name in self.target_names()]

    def choose(self, seed: int, conversation: int, request_class: str, input_tokens: int) -> str:
        """The target of a conversation (a pure function of its arguments)."""
        if self.by_share:
            total = sum(route.share or 0.0 for route in self.routes)
            draw = random.Random(f"{seed}:route:{conversation}").random() * total
            for route in self.routes:
                draw -= route.share or 0.0
                if draw < 0:
                    return route.target
            return self.routes[-1].target
        for route in self.routes:
            if route.matches(request_class, input_tokens):
                return route.target
        return self.routes[-1].target  # unreachable: the last route has no condition

    def shares(self) -> dict[str, float] | None:
        if not self.by_share:
            return None
        total = sum(route.share or 0.0 for route in self.routes)
        out: dict[str, float] = {}
        for route in self.routes:
            out[route.target] = out.get(route.target, 0.0) + (route.share or 0.0) / total
        return out

    def describe(self) -> dict[str, Any]:
        return {
            "by": "share" if self.by_share else "rule",
            "routes": [route.describe() for route in self.routes],
            "targets_file": self.targets.source,
        }


@dataclass(frozen=True, slots=True)
class RoutedProfile:
    profile: Profile
    routing: RoutingPlan


def read_profile_document(path: str | Path) -> dict[str, Any]:
    """A profile file's TOML, with the same one-line errors as ``load_profile``."""
    file = Path(path)
    try:
        return tomllib.loads(file.read_text(encoding="utf-8"))
    except FileNotFoundError as exc:
        raise ProfileError(f"{file}: no such profile file") from exc
    except (OSError, UnicodeDecodeError) as exc:
        raise ProfileError(f"{file}: cannot read: {exc}") from exc
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(f"{file}: not valid TOML: {exc}") from exc


def resolve_targets(
    section: Mapping[str, Any], where: str, base_dir: Path, override: Path | None
) -> TargetsFile:
    """The targets file a section names (relative to the profile), or the one given instead."""
    if override is not None:
        return load_targets(override)
    name = section.get("targets")
    if not isinstance(name, str) or not name.strip():
        raise ProfileError(f"{where}.targets: required: the targets file (relative to the profile)")
    return load_targets(base_dir / name)


def load_routed_profile(path: str | Path, targets_path: Path | None = None) -> RoutedProfile:
    """A profile with a ``[routing]`` table; ``targets_path`` replaces the file it names."""
    file = Path(path)
    raw = read_profile_document(file)
    return routed_profile_from_dict(raw, source=str(file), base_dir=file.parent, targets_path=targets_path)


def routed_profile_from_dict(
    raw: Mapping[str, Any], *, source: str, base_dir: Path, targets_path: Path | None = None
) -> RoutedProfile:
    section = raw.get("routing")
    if not isinstance(section, dict):
        raise ProfileError(f"{source}: routing: required: a [routing] table (targets and routes)")
    rest = {key: value for key, value in raw.items() if key != "routing"}
    profile = profile_from_dict(rest, source=source, base_dir=base_dir)
    where = f"{source}: routing"
    for key in section:
        if key not in ("targets", "routes"):
            raise ProfileError(f"{where}.{key}: unknown key (allowed: routes, targets)")
    targets = resolve_targets(section, where, base_dir, targets_path)
    entries = section.get("routes")
    if not isinstance(entries, list) or not entries:
        raise ProfileError(f"{where}.routes: must be a non-empty array of tables ([[routing.routes]])")
    known = set(targets.names())
    classes = {spec.name for spec in profile.mix()}
    routes = [
        _route(entry, f"{where}.routes[{index}]", known, classes) for index, entry in enumerate(entries)
    ]
    with_share = [route.share is not None for route in routes]
    if any(with_share) and not all(with_share):
        raise ProfileError(f"{where}.routes: give every route a share, or none (routing by rule)")
    if all(with_share):
        if any(route.conditional for route in routes):
            raise ProfileError(f"{where}.routes: a route by share takes no condition")
    else:
        for index, route in enumerate(routes[:-1]):
            if not route.conditional:
                raise ProfileError(
                    f"{where}.routes[{index}]: only the last route may go without a condition "
                    "(input_tokens_above, request_class)"
                )
        if routes[-1].conditional:
            raise ProfileError(
                f"{where}.routes[{len(routes) - 1}]: the last route takes the rest: no condition"
            )
    return RoutedProfile(profile, RoutingPlan(tuple(routes), targets))


def _route(entry: Any, where: str, known: set[str], classes: set[str]) -> Route:
    if not isinstance(entry, dict):
        raise ProfileError(f"{where}: must be a table")
    allowed = {"target", "share", "input_tokens_above", "request_class"}
    for key in entry:
        if key not in allowed:
            raise ProfileError(f"{where}.{key}: unknown key (allowed: {', '.join(sorted(allowed))})")
    target = entry.get("target")
    if not isinstance(target, str) or target not in known:
        raise ProfileError(
            f"{where}.target: must name a target of the targets file ({', '.join(sorted(known))})"
        )
    share = entry.get("share")
    if share is not None and (
        isinstance(share, bool) or not isinstance(share, (int, float)) or not 0 < share <= 1e6
    ):
        raise ProfileError(f"{where}.share: must be a positive number, got {share!r}")
    above = entry.get("input_tokens_above")
    if above is not None and (isinstance(above, bool) or not isinstance(above, int) or above < 0):
        raise ProfileError(f"{where}.input_tokens_above: must be a whole number of tokens, got {above!r}")
    request_class = entry.get("request_class")
    if request_class is not None and request_class not in classes:
        raise ProfileError(f"{where}.request_class: no request class {request_class!r} in the profile")
    return Route(
        target,
        float(share) if share is not None else None,
        above,
        request_class,
    )


# --- the run ------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class RouteSettings:
    routed: RoutedProfile
    overrides: LevelOverrides = field(default_factory=LevelOverrides)
    out_dir: Path | None = Path("runs")
    confirmed: bool = False
    """Set once the user agreed to load targets that are not on this machine."""
    handle_signals: bool = False
    """Ctrl-C / SIGTERM: stop sending, let in-flight requests finish (the command line sets it)."""
    frontier_metric: str = "e2e"
    frontier_steps: int = 100


@dataclass(slots=True)
class RoutedResult:
    data: dict[str, Any]
    folder: Path | None


def run_routed(settings: RouteSettings) -> RoutedResult:
    """Run a routed mix (blocking; starts its own event loop)."""
    return anyio.run(run_routed_async, settings, backend="asyncio", backend_options=event_loop_options())


async def run_routed_async(settings: RouteSettings, stop: anyio.Event | None = None) -> RoutedResult:
    profile = settings.routed.profile
    routing = settings.routed.routing
    plan = level_plan(profile, settings.overrides)
    specs = routing.specs()
    check_targets(specs, plan, confirmed=settings.confirmed)
    stop = stop or anyio.Event()
    folder = RunFolder.create(settings.out_dir, f"{profile.name}-routed") if settings.out_dir else None
    started_at = time.strftime("%Y-%m-%dT%H:%M:%S%z")
    names = routing.target_names()
    chosen: dict[int, str] = {}

    def target_of(record: Record) -> str:
        # The first turn decides; later turns of the conversation follow it.
        name = chosen.get(record.conversation)
        if name is None:
            name = routing.choose(
                profile.seed, record.conversation, record.request_class, record.requested_input_tokens
            )
            chosen[record.conversation] = name
        return name

    with started_targets(specs) as targets:
        for target in targets:
            target.api_key()  # fail now, not mid-run, when a named variable is unset
        config = {
            "kind": "routed_mix",
            "loadrun_version": __version__,
            "started_at": started_at,
            "profile": profile.describe(),
            "routing": routing.describe(),
            "targets": [spec.describe() for spec in specs],
            "mock_urls": {
                spec.name: t.base_url for spec, t in zip(specs, targets, strict=True) if spec.is_mock
            },
        }
        if folder is not None:
            folder.write_json(CONFIG_FILE, config)
        grace_s = settings.overrides.stop_grace_s
        guard = signals_stop(stop, grace_s, targets.child_pids, enabled=settings.handle_signals)
        with guard as signals:
            async with open_clients(specs, targets, stop) as clients:
                client_of = dict(zip(names, clients, strict=True))

                async def execute(request: ChatRequest, record: Record) -> Record:
                    return await client_of[target_of(record)].execute(request, record)

                origin = time.perf_counter_ns()
                records = RecordLines(folder.path if folder else None, origin)
                blended = Recorder(origin)
                per_target = {name: Recorder(origin) for name in names}
                bills = {name: TargetBill() for name in names}

                def on_record(record: Record) -> None:
                    name = target_of(record)
                    blended.add(record)
                    per_target[name].add(record)
                    bills[name].add(record)
                    records.write(record, target=name)
                    if record.request_id % ABSORB_EVERY == 0:  # fill the histograms in bulk
                        for recorder in (blended, *per_target.values()):
                            recorder.absorb()

                try:
                    level = await run_level(
                        plan, execute, Workload(profile).conversations(), profile.seed, on_record, stop
                    )
                finally:
                    records.close()
    start, end = level.window_start_ns, level.window_end_ns
    data = _routed_summary(config, settings, specs, blended, per_target, bills, start, end)
    data["interrupted"] = level.interrupted
    data["cancelled_in_flight"] = level.cancelled
    if signals.signal_name is not None:
        data["interrupt"] = {"signal": signals.signal_name, "grace_s": grace_s}
    if data["frontier"]["available"]:
        frontier = _frontier(settings, specs, per_target, bills, end - start)
        data["frontier"].update(first=frontier.first, second=frontier.second, table=frontier_table(frontier))
        if folder is not None:
            write_frontier(folder.path, frontier)
            data["frontier"].update(file=FRONTIER_FILE, plots=["frontier.svg", "frontier.png"])
    if folder is not None:
        data["run_folder"] = str(folder.path)
        folder.write_json(ROUTED_FILE, data)
    return RoutedResult(data, folder.path if folder else None)


def _routed_summary(
    config: dict[str, Any],
    settings: RouteSettings,
    specs: list[TargetSpec],
    blended: Recorder,
    per_target: dict[str, Recorder],
    bills: dict[str, TargetBill],
    start: int,
    end: int,
) -> dict[str, Any]:
    seconds = max(1e-9, (end - start) / 1e9)
    whole = blended.summary(start, end)
    prices = {spec.name: spec.prices for spec in specs}
    bill_rows = {name: bill.describe(prices[name], seconds) for name, bill in bills.items()}
    measured = whole["requests"]["measured"]
    targets: dict[str, Any] = {}
    for name, recorder in per_target.items():
        summary = recorder.summary(start, end)
        targets[name] = {
            "share_of_requests": summary["requests"]["measured"] / measured if measured else None,
            "requests": summary["requests"],
            "latency": summary["latency"],
            "throughput": summary["throughput"],
            "histograms": summary["histograms"],
            "bill": bill_rows[name],
        }
    routing = settings.routed.routing
    frontier: dict[str, Any] = {"available": False}
    if len(per_target) != 2:
        frontier["why_not"] = "the frontier compares two targets; this mix routes to " + str(len(per_target))
    elif not all(recorder.histograms.get(settings.frontier_metric).count for recorder in per_target.values()):
        frontier["why_not"] = "a target served no successful request in the window"
    else:
        frontier["available"] = True
        cautions = []
        if not routing.by_share:
            cautions.append(
                "routed by rule: the two targets served different requests, so the what-if mixes "
                "latencies measured on different kinds of request"
            )
        hourly = [spec.name for spec in specs if spec.prices.per_hour is not None]
        if hourly:
            cautions.append(
                f"{', '.join(hourly)} is billed per hour: its cost per request holds at the share it "
                "had in this run, and the blended cost of other splits is an approximation"
            )
        if cautions:
            frontier["caution"] = "; ".join(cautions)
    return {
        **config,
        "finished_at": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "window": whole["window"],
        "planned_shares": routing.shares(),
        "blended": {
            "requests": whole["requests"],
            "latency": whole["latency"],
            "throughput": whole["throughput"],
            "cost": blended_bill(list(bill_rows.values()), measured),
        },
        "targets": targets,
        "frontier": frontier,
    }


def _frontier(
    settings: RouteSettings,
    specs: list[TargetSpec],
    per_target: dict[str, Recorder],
    bills: dict[str, TargetBill],
    window_ns: int,
) -> Frontier:
    seconds = max(1e-9, window_ns / 1e9)
    measured = []
    for spec in specs:
        bill = bills[spec.name].describe(spec.prices, seconds)
        tokens = bill["input_tokens"] + bill["output_tokens"]
        measured.append(
            MeasuredTarget(
                spec.name,
                per_target[spec.name].histograms.get(settings.frontier_metric),
                bill["cost_per_request"],
                spec.prices.currency,
                tokens / bill["requests"] if bill["requests"] else None,
            )
        )
    return routing_frontier(
        measured[0],
        measured[1],
        metric=settings.frontier_metric,
        steps=settings.frontier_steps,
        source="routed mix run",
    )
