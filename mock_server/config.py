"""Load an EngineConfig from a TOML file or from a preset bundled in ``presets/``.

A config file holds top-level keys named like the EngineConfig fields; missing keys keep
their defaults, unknown keys are an error that names the key.
"""

from __future__ import annotations

import dataclasses
import tomllib
from pathlib import Path
from typing import Any

from mock_server.engine import EngineConfig

PRESETS_DIR = Path(__file__).parent / "presets"
DEFAULT_PRESET = "small-fast"


class ConfigError(ValueError):
    """An engine config that cannot be found, parsed or validated."""


def preset_names() -> list[str]:
    """Names of the bundled presets, sorted."""
    return sorted(path.stem for path in PRESETS_DIR.glob("*.toml"))


def load_config(name_or_path: str | Path | None = None) -> EngineConfig:
    """Load a preset by name, or a TOML file by path (None -> the default preset).

    A value naming an existing file, or ending in ``.toml``, is a path; anything else is a
    preset name.
    """
    if name_or_path is None:
        name_or_path = DEFAULT_PRESET
    path = Path(name_or_path)
    if isinstance(name_or_path, Path) or path.suffix == ".toml" or path.is_file():
        return config_from_file(path)
    preset = PRESETS_DIR / f"{name_or_path}.toml"
    if not preset.is_file():
        raise ConfigError(
            f"unknown engine preset {str(name_or_path)!r}; presets: {', '.join(preset_names())}"
        )
    return config_from_file(preset)


def config_from_file(path: Path) -> EngineConfig:
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise ConfigError(f"cannot read engine config {str(path)!r}: {exc}") from exc
    try:
        table = tomllib.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise ConfigError(f"engine config {str(path)!r} is not valid TOML: {exc}") from exc
    return config_from_mapping(table, source=str(path))


def config_from_mapping(table: dict[str, Any], *, source: str = "<mapping>") -> EngineConfig:
    """Validate keys and value types, then build the EngineConfig.

    A ``[queueing]`` table (``servers``, ``mean_service_ms``) turns on the M/M/c mode
    (``queueing.py``) and gives a QueueingConfig.
    """
    if "queueing" in table:
        return _queueing_config(table, source)
    fields = {field.name: field for field in dataclasses.fields(EngineConfig)}
    for key in table:
        if key not in fields:
            raise ConfigError(
                f"unknown key {key!r} in engine config {source!r}; known keys: {', '.join(sorted(fields))}"
            )
    values: dict[str, Any] = {}
    for key, value in table.items():
        default = fields[key].default
        values[key] = _checked_value(key, value, type(default), source)
    try:
        return EngineConfig(**values)
    except ValueError as exc:
        raise ConfigError(f"engine config {source!r}: {exc}") from exc


def _queueing_config(table: dict[str, Any], source: str) -> EngineConfig:
    from mock_server.queueing import QueueingConfig

    queueing = table["queueing"]
    if not isinstance(queueing, dict):
        raise ConfigError(f"'queueing' in engine config {source!r} must be a table")
    allowed = {"servers": int, "mean_service_ms": float}
    values: dict[str, Any] = {}
    for key, value in queueing.items():
        if key not in allowed:
            raise ConfigError(
                f"unknown key 'queueing.{key}' in engine config {source!r}; "
                "known keys: servers, mean_service_ms"
            )
        values[key] = _checked_value(f"queueing.{key}", value, allowed[key], source)
    rest = {key: value for key, value in table.items() if key != "queueing"}
    base = config_from_mapping(rest, source=source)
    try:
        return QueueingConfig(**dataclasses.asdict(base), **values)
    except ValueError as exc:
        raise ConfigError(f"engine config {source!r}: {exc}") from exc


def _checked_value(key: str, value: Any, expected: type, source: str) -> Any:
    # bool is an int subclass in Python; a TOML true is never a valid number here.
    if isinstance(value, bool) or not isinstance(value, expected):
        if expected is float and isinstance(value, int) and not isinstance(value, bool):
            return float(value)
        raise ConfigError(
            f"key {key!r} in engine config {source!r} must be {expected.__name__}, not {type(value).__name__}"
        )
    return value
