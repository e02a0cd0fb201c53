"""Injected faults: what the mock does wrong on purpose, decided per request and counted.

Each chat-completions request gets at most one fault, drawn from the configured rates by
one seeded generator, and the mock counts what it injected by kind. The counts are served
at ``GET /mock/faults``: the ground truth that a client's outcome counts must equal.

Kinds, and what an honest client reports for each:

    rate_limit            429 with Retry-After and an error body          rate limited
    server_error          500 with an error body                          HTTP error
    unavailable           503 with an error body                          HTTP error
    reset_before_headers  TCP reset before any response byte             connection error
    reset_mid_stream      TCP reset after the first ``after_tokens``      stream cut
    stall_first_token     headers and role chunk, then nothing for ``stall_s``
                                                                          first-token timeout
    stall_between_tokens  nothing for ``stall_s`` after ``after_tokens``  idle timeout
    slow_headers          no response byte for ``slow_headers_s``         first-token timeout
                                                                          (or ok, but late)
    malformed_event       an event whose data is not JSON, mid-stream     protocol error
    error_event           an ``{"error": ...}`` event mid-stream, then the end
                                                                          server error event
    wrong_content_type    the stream labelled ``text/plain``              protocol error

Non-streamed requests can only get the status faults and ``reset_before_headers``; a draw
of a stream-only kind leaves them unharmed (and uncounted).

A TOML file holds the rates and settings under ``[faults]`` and the protocol quirks (see
``quirks.py``) under ``[quirks]``::

    [faults]
    seed = 7
    stall_s = 1.5
    [faults.rates]
    rate_limit = 0.05
    reset_mid_stream = 0.02
    [quirks]
    no_done_marker = true
"""

from __future__ import annotations

import math
import random
import tomllib
from collections import Counter
from collections.abc import Mapping
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

from mock_server.quirks import Quirks, QuirksError, quirks_from_mapping

FAULT_KINDS: tuple[str, ...] = (
    "rate_limit",
    "server_error",
    "unavailable",
    "reset_before_headers",
    "reset_mid_stream",
    "stall_first_token",
    "stall_between_tokens",
    "slow_headers",
    "malformed_event",
    "error_event",
    "wrong_content_type",
)
STATUS_FAULTS: dict[str, int] = {"rate_limit": 429, "server_error": 500, "unavailable": 503}
STREAM_ONLY: frozenset[str] = frozenset(FAULT_KINDS) - set(STATUS_FAULTS) - {"reset_before_headers"}

EXPECTED_OUTCOME: dict[str, str] = {
    "rate_limit": "rate_limited",
    "server_error": "http_error",
    "unavailable": "http_error",
    "reset_before_headers": "connection_error",
    "reset_mid_stream": "stream_cut",
    "stall_first_token": "timeout_first_token",
    "stall_between_tokens": "timeout_idle",
    "slow_headers": "timeout_first_token",
    "malformed_event": "protocol_error",
    "error_event": "server_error_event",
    "wrong_content_type": "protocol_error",
}
"""The outcome a client names (loadrun's Outcome values) when its first-token timeout is
shorter than ``slow_headers_s`` and ``stall_s``, and its idle timeout shorter than ``stall_s``."""


class FaultsError(ValueError):
    """A fault plan that cannot be used (unknown kind, bad rate, rates above 1 in sum)."""


@dataclass(frozen=True, slots=True)
class FaultSettings:
    """How often each fault strikes, and how long the slow ones last."""

    rates: Mapping[str, float] = field(default_factory=dict)
    seed: int = 0
    stall_s: float = 2.0
    slow_headers_s: float = 2.0
    retry_after_s: int = 1
    """Sent as Retry-After (delay-seconds, RFC 9110 section 10.2.3) with every 429."""
    after_tokens: int = 1
    """Mid-stream faults strike right after this many tokens (or the last, if fewer)."""

    def __post_init__(self) -> None:
        total = 0.0
        for kind, rate in self.rates.items():
            if kind not in FAULT_KINDS:
                raise FaultsError(f"unknown fault {kind!r}; faults: {', '.join(FAULT_KINDS)}")
            if isinstance(rate, bool) or not isinstance(rate, (int, float)) or not 0.0 <= rate <= 1.0:
                raise FaultsError(f"fault rate {kind} must be a number from 0 to 1, got {rate!r}")
            total += rate
        if total > 1.0 + 1e-9:
            raise FaultsError(f"fault rates add up to {total:g}; a request gets at most one fault (<= 1)")
        for name in ("stall_s", "slow_headers_s"):
            value = getattr(self, name)
            if not math.isfinite(value) or value < 0:
                raise FaultsError(f"{name} must be a finite number >= 0, got {value!r}")
        if self.retry_after_s < 0:
            raise FaultsError("retry_after_s must be >= 0")
        if self.after_tokens < 1:
            raise FaultsError("after_tokens must be >= 1")

    @property
    def enabled(self) -> bool:
        return any(rate > 0 for rate in self.rates.values())

    def as_dict(self) -> dict[str, Any]:
        return {
            "rates": {kind: self.rates[kind] for kind in FAULT_KINDS if kind in self.rates},
            "seed": self.seed,
            "stall_s": self.stall_s,
            "slow_headers_s": self.slow_headers_s,
            "retry_after_s": self.retry_after_s,
            "after_tokens": self.after_tokens,
        }


@dataclass(frozen=True, slots=True)
class FaultPlan:
    """Everything the mock does differently from a well-behaved server."""

    faults: FaultSettings = field(default_factory=FaultSettings)
    quirks: Quirks = field(default_factory=Quirks)

    def as_dict(self) -> dict[str, Any]:
        return {"faults": self.faults.as_dict(), "quirks": self.quirks.as_dict()}


class FaultInjector:
    """Decides each request's fault (at most one) and counts what it injected."""

    def __init__(self, settings: FaultSettings) -> None:
        self.settings = settings
        self._rng = random.Random(settings.seed)
        self._cumulative: list[tuple[float, str]] = []
        upper = 0.0
        for kind in FAULT_KINDS:
            rate = settings.rates.get(kind, 0.0)
            if rate > 0:
                upper += rate
                self._cumulative.append((upper, kind))
        self.decided = 0
        self.injected: Counter[str] = Counter()

    def decide(self, streaming: bool) -> str | None:
        """The fault for the next request, or None; every request draws once, in order."""
        self.decided += 1
        if not self._cumulative:
            return None
        draw = self._rng.random()
        for upper, kind in self._cumulative:
            if draw < upper:
                if kind in STREAM_ONLY and not streaming:
                    return None
                self.injected[kind] += 1
                return kind
        return None

    def withdraw(self, kind: str) -> None:
        """Un-count a decided fault that never happened (the request was refused first)."""
        self.injected[kind] -= 1

    def document(self) -> dict[str, Any]:
        """The JSON served at GET /mock/faults."""
        return {
            "requests_decided": self.decided,
            "injected": {kind: self.injected[kind] for kind in FAULT_KINDS if self.injected[kind]},
            "injected_total": sum(self.injected.values()),
        }


def fault_settings_from_mapping(table: Mapping[str, Any], source: str = "<faults>") -> FaultSettings:
    """A ``[faults]`` table: ``seed``, ``stall_s``, ... and a ``rates`` sub-table."""
    known = {item.name for item in fields(FaultSettings)}
    values: dict[str, Any] = {}
    for key, value in table.items():
        if key not in known:
            raise FaultsError(f"{source}: unknown key faults.{key}; known: {', '.join(sorted(known))}")
        if key == "rates":
            if not isinstance(value, Mapping):
                raise FaultsError(f"{source}: faults.rates must be a table of fault = rate")
            values[key] = dict(value)
        elif key in ("seed", "retry_after_s", "after_tokens"):
            if isinstance(value, bool) or not isinstance(value, int):
                raise FaultsError(f"{source}: faults.{key} must be a whole number, got {value!r}")
            values[key] = value
        else:
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise FaultsError(f"{source}: faults.{key} must be a number, got {value!r}")
            values[key] = float(value)
    try:
        return FaultSettings(**values)
    except FaultsError as exc:
        raise FaultsError(f"{source}: {exc}") from None


def plan_from_mapping(document: Mapping[str, Any], source: str = "<fault plan>") -> FaultPlan:
    """A fault plan from ``{"faults": {...}, "quirks": {...}}`` (TOML tables or JSON)."""
    for key in document:
        if key not in ("faults", "quirks"):
            raise FaultsError(f"{source}: unknown table {key!r}; use [faults] and [quirks]")
    faults_table = document.get("faults", {})
    quirks_table = document.get("quirks", {})
    if not isinstance(faults_table, Mapping) or not isinstance(quirks_table, Mapping):
        raise FaultsError(f"{source}: [faults] and [quirks] must be tables")
    try:
        quirks = quirks_from_mapping(quirks_table, source)
    except QuirksError as exc:
        raise FaultsError(str(exc)) from None
    return FaultPlan(fault_settings_from_mapping(faults_table, source), quirks)


def load_plan(path: str | Path) -> FaultPlan:
    file = Path(path)
    try:
        document = tomllib.loads(file.read_text(encoding="utf-8"))
    except OSError as exc:
        raise FaultsError(f"cannot read fault plan {str(file)!r}: {exc.strerror or exc}") from exc
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise FaultsError(f"fault plan {str(file)!r} is not valid TOML: {exc}") from exc
    return plan_from_mapping(document, str(file))


def plan_with_options(plan: FaultPlan, fault_options: list[str], quirk_options: list[str]) -> FaultPlan:
    """Apply command-line ``--fault KEY=VALUE`` and ``--quirk NAME[=VALUE]`` on top of a plan.

    A fault kind as KEY sets its rate; any other KEY sets that field of [faults].
    """
    faults_table: dict[str, Any] = plan.faults.as_dict()
    rates = dict(faults_table["rates"])
    for text in fault_options:
        key, sep, raw = text.partition("=")
        if not sep:
            raise FaultsError(f"--fault {text!r}: write KIND=RATE or SETTING=VALUE")
        value = _number(raw, f"--fault {key}")
        if key in FAULT_KINDS:
            rates[key] = value
        elif key in faults_table and key != "rates":
            faults_table[key] = value
        else:
            settings = ", ".join(name for name in faults_table if name != "rates")
            raise FaultsError(
                f"--fault {key}: no such fault or setting; faults: {', '.join(FAULT_KINDS)}; "
                f"settings: {settings}"
            )
    faults_table["rates"] = rates
    quirks_table: dict[str, Any] = plan.quirks.as_dict()
    for text in quirk_options:
        key, sep, raw = text.partition("=")
        quirks_table[key] = _quirk_value(raw) if sep else True
    return plan_from_mapping({"faults": faults_table, "quirks": quirks_table}, "command line")


def _number(text: str, what: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise FaultsError(f"{what}: {text!r} is not a number") from None
    return int(value) if value.is_integer() and "." not in text else value


def _quirk_value(text: str) -> Any:
    if text.lower() in ("true", "false"):
        return text.lower() == "true"
    try:
        return int(text)
    except ValueError:
        return text
