"""Profile: what to send. Loaded from TOML, validated strictly (unknown keys are errors).

name = "harbour-desk-chat"
seed = 1
[request]
system_prompt = "..."
input_tokens = 128      # words of synthesized user text (one word ~ one token)
output_tokens = 64      # max_tokens
stream = true
[request.sampling]      # passed through as they are
temperature = 0.2
[load]
concurrency = 8
duration_s = 10.0       # or: requests = 200
warmup_s = 1.0
"""

from __future__ import annotations

import random
import tomllib
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from loadrun.errors import ProfileError
from loadrun.prompts import synthesize
from loadrun.protocol import ChatRequest


@dataclass(frozen=True, slots=True)
class RequestSpec:
    input_tokens: int = 128
    output_tokens: int = 64
    stream: bool = True
    system_prompt: str = ""
    sampling: tuple[tuple[str, Any], ...] = ()


@dataclass(frozen=True, slots=True)
class LoadSpec:
    concurrency: int = 8
    duration_s: float | None = 10.0
    requests: int | None = None
    warmup_s: float = 1.0


@dataclass(frozen=True, slots=True)
class Profile:
    name: str = "default-chat"
    seed: int = 1
    request: RequestSpec = field(default_factory=RequestSpec)
    load: LoadSpec = field(default_factory=LoadSpec)
    source: str | None = None

    def requests(self) -> Iterator[ChatRequest]:
        """The request sequence; one seed always gives the same sequence."""
        rng = random.Random(self.seed)
        spec = self.request
        while True:
            messages: list[dict[str, Any]] = []
            if spec.system_prompt:
                messages.append({"role": "system", "content": spec.system_prompt})
            messages.append({"role": "user", "content": synthesize(spec.input_tokens, rng)})
            yield ChatRequest(
                messages=tuple(messages),
                max_tokens=spec.output_tokens,
                stream=spec.stream,
                extra=spec.sampling,
            )

    def describe(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "seed": self.seed,
            "source": self.source,
            "request": {
                "input_tokens": self.request.input_tokens,
                "output_tokens": self.request.output_tokens,
                "stream": self.request.stream,
                "system_prompt_words": len(self.request.system_prompt.split()),
                "sampling": dict(self.request.sampling),
            },
            "load": {
                "concurrency": self.load.concurrency,
                "duration_s": self.load.duration_s,
                "requests": self.load.requests,
                "warmup_s": self.load.warmup_s,
            },
        }


def load_profile(path: str | Path) -> Profile:
    file = Path(path)
    try:
        raw = tomllib.loads(file.read_text(encoding="utf-8"))
    except FileNotFoundError as exc:
        raise ProfileError(f"{file}: no such profile file") from exc
    except (OSError, UnicodeDecodeError) as exc:
        raise ProfileError(f"{file}: cannot read: {exc}") from exc
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(f"{file}: not valid TOML: {exc}") from exc
    return profile_from_dict(raw, source=str(file))


def profile_from_dict(raw: Mapping[str, Any], source: str = "<profile>") -> Profile:
    reader = _Reader(source)
    reader.only(raw, "", {"name", "seed", "request", "load", "description"})
    request_raw = reader.table(raw, "request")
    load_raw = reader.table(raw, "load")
    reader.only(
        request_raw, "request.", {"input_tokens", "output_tokens", "stream", "system_prompt", "sampling"}
    )
    reader.only(load_raw, "load.", {"concurrency", "duration_s", "requests", "warmup_s"})
    sampling = reader.table(request_raw, "sampling", "request.")
    for key, value in sampling.items():
        if not isinstance(value, (int, float, str, bool, list)):
            reader.fail(f"request.sampling.{key}", "must be a number, string, boolean or list")
    defaults = LoadSpec()
    requests = reader.integer(load_raw, "load.requests", None, minimum=1)
    duration = reader.number(
        load_raw, "load.duration_s", None if requests else defaults.duration_s, minimum=0.1
    )
    return Profile(
        name=reader.string(raw, "name", Path(source).stem if source != "<profile>" else "profile"),
        seed=reader.integer(raw, "seed", 1) or 1,
        request=RequestSpec(
            input_tokens=reader.integer(request_raw, "request.input_tokens", 128, minimum=1) or 128,
            output_tokens=reader.integer(request_raw, "request.output_tokens", 64, minimum=1) or 64,
            stream=reader.boolean(request_raw, "request.stream", True),
            system_prompt=reader.string(request_raw, "request.system_prompt", ""),
            sampling=tuple(sorted(sampling.items())),
        ),
        load=LoadSpec(
            concurrency=reader.integer(load_raw, "load.concurrency", defaults.concurrency, minimum=1) or 1,
            duration_s=duration,
            requests=requests,
            warmup_s=reader.number(load_raw, "load.warmup_s", defaults.warmup_s, minimum=0.0) or 0.0,
        ),
        source=source,
    )


class _Reader:
    """Typed reads from a TOML table; every failure names the file and the key path."""

    def __init__(self, source: str) -> None:
        self.source = source

    def fail(self, key: str, problem: str) -> None:
        raise ProfileError(f"{self.source}: {key}: {problem}")

    def only(self, table: Mapping[str, Any], prefix: str, allowed: set[str]) -> None:
        for key in table:
            if key not in allowed:
                self.fail(prefix + key, f"unknown key (allowed: {', '.join(sorted(allowed))})")

    def table(self, parent: Mapping[str, Any], key: str, prefix: str = "") -> Mapping[str, Any]:
        value = parent.get(key, {})
        if not isinstance(value, dict):
            self.fail(prefix + key, "must be a table")
        return value  # type: ignore[no-any-return]

    def _get(self, table: Mapping[str, Any], path: str) -> Any:
        return table.get(path.rsplit(".", 1)[-1])

    def integer(
        self, table: Mapping[str, Any], path: str, default: int | None, minimum: int | None = None
    ) -> int | None:
        value = self._get(table, path)
        if value is None:
            return default
        if isinstance(value, bool) or not isinstance(value, int):
            self.fail(path, f"must be a whole number, got {value!r}")
        if minimum is not None and value < minimum:
            self.fail(path, f"must be at least {minimum}, got {value}")
        return int(value)

    def number(
        self, table: Mapping[str, Any], path: str, default: float | None, minimum: float | None = None
    ) -> float | None:
        value = self._get(table, path)
        if value is None:
            return default
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.fail(path, f"must be a number, got {value!r}")
        if minimum is not None and value < minimum:
            self.fail(path, f"must be at least {minimum:g}, got {value}")
        return float(value)

    def boolean(self, table: Mapping[str, Any], path: str, default: bool) -> bool:
        value = self._get(table, path)
        if value is None:
            return default
        if not isinstance(value, bool):
            self.fail(path, f"must be true or false, got {value!r}")
        return bool(value)

    def string(self, table: Mapping[str, Any], path: str, default: str) -> str:
        value = self._get(table, path)
        if value is None:
            return default
        if not isinstance(value, str):
            self.fail(path, f"must be a string, got {value!r}")
        return str(value)
