"""Targets file: the candidates of a comparison, each with its prices, in one TOML file.

    # One table per target, keyed by its name (letters, digits, '-', '_', '.').
    [targets.gullwing]
    base_url = "https://api.gullwing.example/v1"   # or: mock_engine = "small-fast"
    model = "gw-chat-2"
    api_key_env = "GULLWING_KEY"         # the NAME of the variable; the key is never stored
    context_window = 16384               # tokens; a profile that needs more is refused
    headers = { "X-Team" = "ferry-desk" }
    [targets.gullwing.prices]            # per million tokens ...
    input_per_million = 0.40
    output_per_million = 1.60
    # ... or, for a server you run yourself: per_hour = 3.20
    [targets.gullwing.transport]
    name = "fast"                        # or "httpx"
    connect_timeout_s = 10.0
    total_timeout_s = 600.0
    verify_tls = true

A top-level ``currency = "USD"`` labels every price. ``mock_engine`` (a preset name or an
engine TOML, relative to the targets file) means "start the bundled mock with this engine
on a free loopback port"; its model and context window then default to the engine's own.
Unknown keys are errors; every error names the file and the key path.
"""

from __future__ import annotations

import contextlib
import re
import tomllib
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from loadrun.cost import MILLION, SECONDS_PER_HOUR
from loadrun.errors import TargetUnreachable, UsageError
from loadrun.target import Target, is_loopback_host
from loadrun.transports import TRANSPORT_NAMES
from loadrun.transports.base import Endpoint

__all__ = ["Prices", "TargetSpec", "TargetsFile", "TransportOptions", "load_targets", "started_targets"]

_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")


@dataclass(frozen=True, slots=True)
class Prices:
    """What a target costs: per million tokens (hosted) or per hour (a server you run)."""

    input_per_million: float | None = None
    output_per_million: float | None = None
    per_hour: float | None = None
    currency: str = "USD"

    @property
    def per_token(self) -> bool:
        return self.input_per_million is not None or self.output_per_million is not None

    @property
    def known(self) -> bool:
        return self.per_token or self.per_hour is not None

    def request_cost(self, input_tokens: float, output_tokens: float) -> float:
        """Cost of one request from its token usage (per-token prices only)."""
        if not self.per_token:
            raise ValueError("these prices are not per token")
        return (
            input_tokens * (self.input_per_million or 0.0) + output_tokens * (self.output_per_million or 0.0)
        ) / MILLION

    def hourly_request_cost(self, requests_per_s: float) -> float:
        """Cost of one request when a server billed by the hour completes ``requests_per_s``."""
        if self.per_hour is None:
            raise ValueError("these prices are not per hour")
        if requests_per_s <= 0:
            raise ValueError("no request completed: the cost per request is unbounded")
        return self.per_hour / SECONDS_PER_HOUR / requests_per_s

    def describe(self) -> dict[str, Any]:
        return {
            "currency": self.currency,
            "input_per_million": self.input_per_million,
            "output_per_million": self.output_per_million,
            "per_hour": self.per_hour,
        }


@dataclass(frozen=True, slots=True)
class TransportOptions:
    name: str = "fast"
    connect_timeout_s: float = 10.0
    total_timeout_s: float = 600.0
    verify_tls: bool = True


@dataclass(frozen=True, slots=True)
class TargetSpec:
    """One candidate as the targets file describes it (no key, only the variable's name)."""

    name: str
    model: str
    base_url: str | None = None
    mock_engine: str | None = None
    """Start the bundled mock with this engine (preset name or absolute TOML path)."""
    api_key_env: str | None = None
    headers: tuple[tuple[str, str], ...] = ()
    prices: Prices = field(default_factory=Prices)
    context_window: int | None = None
    transport: TransportOptions = field(default_factory=TransportOptions)

    @property
    def is_mock(self) -> bool:
        return self.mock_engine is not None

    @property
    def is_loopback(self) -> bool:
        return self.is_mock or (
            self.base_url is not None and is_loopback_host(Endpoint.parse(self.base_url).host)
        )

    def target(self, base_url: str | None = None) -> Target:
        """The Target to measure; a mock target needs the URL its server got."""
        url = base_url or self.base_url
        if url is None:
            raise UsageError(f"target {self.name}: the bundled mock is not started yet")
        return Target(
            base_url=url,
            model=self.model,
            api_key_env=self.api_key_env,
            name=self.name,
            headers=self.headers,
            verify_tls=self.transport.verify_tls,
            embedded=self.is_mock,
        )

    def describe(self) -> dict[str, Any]:
        """What may be written to results and reports: never a key, never header values."""
        return {
            "name": self.name,
            "model": self.model,
            "base_url": self.base_url,
            "mock_engine": self.mock_engine,
            "api_key_env": self.api_key_env,
            "header_names": [name for name, _ in self.headers],
            "prices": self.prices.describe(),
            "context_window": self.context_window,
            "transport": {
                "name": self.transport.name,
                "connect_timeout_s": self.transport.connect_timeout_s,
                "total_timeout_s": self.transport.total_timeout_s,
                "verify_tls": self.transport.verify_tls,
            },
        }


@dataclass(frozen=True, slots=True)
class TargetsFile:
    targets: tuple[TargetSpec, ...]
    source: str
    description: str = ""

    def names(self) -> list[str]:
        return [spec.name for spec in self.targets]


def load_targets(path: str | Path) -> TargetsFile:
    file = Path(path)
    try:
        raw = tomllib.loads(file.read_text(encoding="utf-8"))
    except FileNotFoundError as exc:
        raise UsageError(f"{file}: no such targets file") from exc
    except (OSError, UnicodeDecodeError) as exc:
        raise UsageError(f"{file}: cannot read: {exc}") from exc
    except tomllib.TOMLDecodeError as exc:
        raise UsageError(f"{file}: not valid TOML: {exc}") from exc
    return targets_from_dict(raw, source=str(file), base_dir=file.resolve().parent)


def targets_from_dict(
    raw: Mapping[str, Any], *, source: str = "<targets>", base_dir: Path | None = None
) -> TargetsFile:
    check = _Checker(source)
    check.only(raw, "", {"targets", "currency", "description"})
    currency = check.string(raw, "currency", "USD")
    description = check.string(raw, "description", "")
    table = check.table(raw, "targets")
    if len(table) < 1:
        check.fail("targets", "name at least one target, e.g. [targets.my-server]")
    specs = [
        _target_from_dict(name, entry, check, currency, base_dir or Path.cwd())
        for name, entry in table.items()
    ]
    return TargetsFile(tuple(specs), source, description)


def _target_from_dict(name: str, entry: Any, check: _Checker, currency: str, base_dir: Path) -> TargetSpec:
    path = f"targets.{name}"
    if not _NAME.match(name):
        check.fail(
            path, "a target name is 1-64 letters, digits, '.', '_' or '-', starting with a letter or digit"
        )
    if not isinstance(entry, dict):
        check.fail(path, "must be a table")
    check.only(
        entry,
        path + ".",
        {
            "base_url",
            "mock_engine",
            "model",
            "api_key_env",
            "headers",
            "prices",
            "context_window",
            "transport",
            "description",
        },
    )
    base_url = check.optional_string(entry, path + ".base_url")
    mock_engine = check.optional_string(entry, path + ".mock_engine")
    if (base_url is None) == (mock_engine is None):
        check.fail(path, "give either base_url or mock_engine (the bundled mock), not both or neither")
    model = check.optional_string(entry, path + ".model")
    context_window = check.optional_int(entry, path + ".context_window", minimum=1)
    if mock_engine is not None:
        mock_engine, engine_model, engine_window = _resolve_engine(mock_engine, base_dir, check, path)
        model = model or engine_model
        context_window = context_window or engine_window
    if not model:
        check.fail(path + ".model", "a target needs a model name")
    assert model is not None
    api_key_env = check.optional_string(entry, path + ".api_key_env")
    if api_key_env is not None and not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", api_key_env):
        check.fail(path + ".api_key_env", "the NAME of an environment variable (not the key itself)")
    headers = _headers(entry, check, path)
    transport = _transport(entry, check, path)
    if base_url is not None:
        try:
            endpoint = Endpoint.parse(base_url)
        except UsageError as exc:
            check.fail(path + ".base_url", str(exc))
            raise  # pragma: no cover - fail() raised
        if endpoint.scheme == "http" and api_key_env and not is_loopback_host(endpoint.host):
            check.fail(path, "refusing to send an API key over plain http to a host that is not this machine")
    return TargetSpec(
        name=name,
        model=model,
        base_url=base_url,
        mock_engine=mock_engine,
        api_key_env=api_key_env,
        headers=headers,
        prices=_prices(entry, check, path, currency),
        context_window=context_window,
        transport=transport,
    )


def _resolve_engine(engine: str, base_dir: Path, check: _Checker, path: str) -> tuple[str, str, int]:
    # The mock is a separate package: loadrun reads its engine config only to name the
    # model and the context window, and starts it as a child process.
    from mock_server.config import ConfigError, load_config

    candidate = base_dir / engine
    if engine.endswith(".toml") or candidate.is_file():
        engine = str(candidate.resolve())
    try:
        config = load_config(engine)
    except (ConfigError, OSError) as exc:
        check.fail(path + ".mock_engine", str(exc))
        raise  # pragma: no cover - fail() raised
    return engine, config.model, config.context_window


def _headers(entry: Mapping[str, Any], check: _Checker, path: str) -> tuple[tuple[str, str], ...]:
    headers = check.table(entry, "headers", path + ".")
    pairs = []
    for header, value in headers.items():
        if not re.fullmatch(r"[A-Za-z0-9!#$%&'*+.^_`|~-]+", header):
            check.fail(f"{path}.headers.{header}", "not a valid header name")
        if not isinstance(value, str) or "\n" in value or "\r" in value:
            check.fail(f"{path}.headers.{header}", "must be a one-line string")
        if header.lower() == "authorization":
            check.fail(
                f"{path}.headers.{header}", "keys go in api_key_env (a variable's name), not in the file"
            )
        pairs.append((header, value))
    return tuple(pairs)


def _prices(entry: Mapping[str, Any], check: _Checker, path: str, currency: str) -> Prices:
    prices = check.table(entry, "prices", path + ".")
    prefix = path + ".prices"
    check.only(prices, prefix + ".", {"input_per_million", "output_per_million", "per_hour"})
    result = Prices(
        input_per_million=check.optional_number(prices, prefix + ".input_per_million", minimum=0.0),
        output_per_million=check.optional_number(prices, prefix + ".output_per_million", minimum=0.0),
        per_hour=check.optional_number(prices, prefix + ".per_hour", minimum=0.0),
        currency=currency,
    )
    if result.per_token and result.per_hour is not None:
        check.fail(prefix, "give per-million-token prices or per_hour, not both")
    return result


def _transport(entry: Mapping[str, Any], check: _Checker, path: str) -> TransportOptions:
    table = check.table(entry, "transport", path + ".")
    prefix = path + ".transport"
    check.only(table, prefix + ".", {"name", "connect_timeout_s", "total_timeout_s", "verify_tls"})
    defaults = TransportOptions()
    name = check.string(table, "name", defaults.name, prefix + ".name")
    if name not in TRANSPORT_NAMES:
        check.fail(prefix + ".name", f"choose one of {', '.join(TRANSPORT_NAMES)}, got {name!r}")
    return TransportOptions(
        name=name,
        connect_timeout_s=check.optional_number(table, prefix + ".connect_timeout_s", minimum=0.001)
        or defaults.connect_timeout_s,
        total_timeout_s=check.optional_number(table, prefix + ".total_timeout_s", minimum=0.001)
        or defaults.total_timeout_s,
        verify_tls=check.boolean(table, prefix + ".verify_tls", defaults.verify_tls),
    )


class _Checker:
    """Typed reads from the TOML tables; every failure names the file and the key path."""

    def __init__(self, source: str) -> None:
        self.source = source

    def fail(self, key: str, problem: str) -> None:
        raise UsageError(f"{self.source}: {key}: {problem}")

    def only(self, table: Mapping[str, Any], prefix: str, allowed: set[str]) -> None:
        for key in table:
            if key not in allowed:
                self.fail(prefix + key, f"unknown key (allowed: {', '.join(sorted(allowed))})")

    def table(self, parent: Mapping[str, Any], key: str, prefix: str = "") -> Mapping[str, Any]:
        value = parent.get(key, {})
        if not isinstance(value, dict):
            self.fail(prefix + key, "must be a table")
        return value  # type: ignore[no-any-return]

    @staticmethod
    def _leaf(path: str) -> str:
        return path.rsplit(".", 1)[-1]

    def string(self, table: Mapping[str, Any], key: str, default: str, path: str | None = None) -> str:
        value = table.get(key)
        if value is None:
            return default
        if not isinstance(value, str):
            self.fail(path or key, f"must be a string, got {value!r}")
        return str(value)

    def optional_string(self, table: Mapping[str, Any], path: str) -> str | None:
        value = table.get(self._leaf(path))
        if value is None:
            return None
        if not isinstance(value, str) or not value.strip():
            self.fail(path, f"must be a non-empty string, got {value!r}")
        return str(value).strip()

    def optional_int(self, table: Mapping[str, Any], path: str, minimum: int) -> int | None:
        value = table.get(self._leaf(path))
        if value is None:
            return None
        if isinstance(value, bool) or not isinstance(value, int):
            self.fail(path, f"must be a whole number, got {value!r}")
        if value < minimum:
            self.fail(path, f"must be at least {minimum}, got {value}")
        return int(value)

    def optional_number(self, table: Mapping[str, Any], path: str, minimum: float) -> float | None:
        value = table.get(self._leaf(path))
        if value is None:
            return None
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.fail(path, f"must be a number, got {value!r}")
        if value < minimum or value != value:  # NaN compares unequal to itself
            self.fail(path, f"must be at least {minimum:g}, got {value}")
        return float(value)

    def boolean(self, table: Mapping[str, Any], path: str, default: bool) -> bool:
        value = table.get(self._leaf(path))
        if value is None:
            return default
        if not isinstance(value, bool):
            self.fail(path, f"must be true or false, got {value!r}")
        return bool(value)


class StartedTargets(list[Target]):
    """The targets of a run, with the PIDs of the mock processes started for them."""

    child_pids: tuple[int, ...] = ()


@contextlib.contextmanager
def started_targets(specs: Sequence[TargetSpec]) -> Iterator[StartedTargets]:
    """Targets ready to load: mock targets get their own mock process, stopped by PID on exit."""
    from loadrun.runner import embedded_mock
    from mock_server.launch import MockStartError

    with contextlib.ExitStack() as stack:
        targets = StartedTargets()
        for spec in specs:
            if spec.mock_engine is not None:
                try:
                    mock_target, info = stack.enter_context(embedded_mock(spec.mock_engine))
                except MockStartError as exc:
                    raise TargetUnreachable(
                        f"target {spec.name}: the bundled mock did not start: {exc}"
                    ) from exc
                targets.append(spec.target(mock_target.base_url))
                targets.child_pids += (int(info["pid"]),)
            else:
                targets.append(spec.target())
        yield targets
