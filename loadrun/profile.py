"""Profile: what to send, and (as a default the command line may override) when.

Loaded from TOML and validated strictly: unknown keys are errors, and every error is one
line naming the file and the key path. Two forms load:

    # simple: one request class
    [request]
    input_tokens = 128
    output_tokens = 64

    # a mix: weighted request classes
    [[classes]]
    name = "question"
    weight = 3
    input_tokens = { distribution = "lognormal", median = 90, sigma = 0.5 }
    ...

A class may set: ``system_prompt``; ``input_tokens`` and ``output_tokens`` (a number or a
distribution, see ``loadrun.distributions``; the output length is sent as max_tokens);
``stream``; ``[sampling]`` fields passed through as they are; ``prompts_file`` (JSONL, one
message list a line) instead of synthesized input; ``[shared_prefix]`` (``tokens`` of the
input that are the same for a ``share`` of the requests, to exercise prefix caching);
``[session]`` (``turns``, ``think_time_s``, ``history``); ``[check]`` (an answer check, see
``loadrun.checks``). ``[load]`` holds the arrival process and the load level. The README
has a complete example.
"""

from __future__ import annotations

import json
import math
import re
import tomllib
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, NoReturn

from loadrun.checks import AnswerCheck, ChoiceCheck, JsonSchemaCheck, RegexCheck, schema_problem
from loadrun.distributions import KINDS, Distribution
from loadrun.errors import ProfileError
from loadrun.protocol import ChatRequest

ARRIVALS = ("closed", "poisson", "constant", "bursty", "replay")
"""closed: a fixed number of requests in flight; poisson, constant, bursty: open loop at a
rate; replay: open loop at the offsets of a trace file."""
OPEN_ARRIVALS = ARRIVALS[1:]
MAX_TOKENS = 2_000_000
"""Largest input or output length a profile may ask for (a sanity bound, not a model's)."""
MAX_TURNS = 1000
MAX_CONCURRENCY = 100_000
MAX_IN_FLIGHT_CAP = 1_000_000
MAX_PROMPT_FILE_LINES = 1_000_000


@dataclass(frozen=True, slots=True)
class SharedPrefix:
    """``tokens`` of a request's input are a prefix shared by a ``share`` of its class."""

    tokens: int
    share: float


@dataclass(frozen=True, slots=True)
class Session:
    """A conversation of ``turns`` requests, ``think_time`` seconds apart (after each answer)."""

    turns: int = 1
    think_time: Distribution = field(default_factory=lambda: Distribution.fixed(0.0))
    history: bool = True
    """Carry the earlier turns (questions and the target's answers) into each next request."""


@dataclass(frozen=True, slots=True)
class PromptSet:
    """Message lists from a JSONL file, sent in file order (cycling)."""

    path: str
    conversations: tuple[tuple[tuple[tuple[str, str], ...], ...], ...]
    """Each line: its messages as ((key, value) pairs), kept hashable."""

    def messages(self, index: int) -> list[dict[str, Any]]:
        return [dict(pairs) for pairs in self.conversations[index % len(self.conversations)]]


@dataclass(frozen=True, slots=True)
class RequestSpec:
    """One request class. ``input_tokens``/``output_tokens`` are the typical (mean) lengths;
    ``input_length``/``output_length``, when set, are the distributions they are drawn from."""

    input_tokens: int = 128
    output_tokens: int = 64
    stream: bool = True
    system_prompt: str = ""
    sampling: tuple[tuple[str, Any], ...] = ()
    name: str = "default"
    weight: float = 1.0
    input_length: Distribution | None = None
    output_length: Distribution | None = None
    shared_prefix: SharedPrefix | None = None
    session: Session | None = None
    check: AnswerCheck | None = None
    prompts: PromptSet | None = None

    def input_distribution(self) -> Distribution:
        return self.input_length or Distribution.fixed(self.input_tokens)

    def output_distribution(self) -> Distribution:
        return self.output_length or Distribution.fixed(self.output_tokens)

    @property
    def turns(self) -> int:
        return self.session.turns if self.session else 1

    def describe(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "name": self.name,
            "weight": self.weight,
            "input_tokens": self.input_tokens,
            "output_tokens": self.output_tokens,
            "stream": self.stream,
            "system_prompt_words": len(self.system_prompt.split()),
            "sampling": dict(self.sampling),
        }
        if self.input_length is not None:
            out["input_length"] = self.input_length.describe()
        if self.output_length is not None:
            out["output_length"] = self.output_length.describe()
        if self.shared_prefix is not None:
            out["shared_prefix"] = {"tokens": self.shared_prefix.tokens, "share": self.shared_prefix.share}
        if self.session is not None:
            out["session"] = {
                "turns": self.session.turns,
                "think_time_s": self.session.think_time.describe(),
                "history": self.session.history,
            }
        if self.check is not None:
            out["check"] = self.check.describe()
        if self.prompts is not None:
            out["prompts_file"] = {"path": self.prompts.path, "lines": len(self.prompts.conversations)}
        return out


@dataclass(frozen=True, slots=True)
class LoadSpec:
    concurrency: int = 8
    duration_s: float | None = 10.0
    requests: int | None = None
    warmup_s: float = 1.0
    arrival: str = "closed"
    """One of ARRIVALS."""
    rate_per_s: float | None = None
    """Open loop: arrivals (new conversations) per second."""
    burst_cv: float = 2.0
    """bursty: coefficient of variation of the gamma inter-arrival times (1 is Poisson)."""
    think_time_s: float = 0.0
    """Closed loop: pause of each client between two conversations."""
    in_flight_cap: int = 512
    """Open loop: requests in flight at most; one due beyond it is not sent, and counted."""
    trace: str | None = None
    """replay: the JSONL trace file."""
    replay_speed: float = 1.0
    """replay: 2.0 plays the trace twice as fast."""

    def describe(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "arrival": self.arrival,
            "concurrency": self.concurrency,
            "duration_s": self.duration_s,
            "requests": self.requests,
            "warmup_s": self.warmup_s,
        }
        if self.arrival == "closed":
            out["think_time_s"] = self.think_time_s
        else:
            out["in_flight_cap"] = self.in_flight_cap
        if self.arrival in ("poisson", "constant", "bursty"):
            out["rate_per_s"] = self.rate_per_s
        if self.arrival == "bursty":
            out["burst_cv"] = self.burst_cv
        if self.arrival == "replay":
            out.update(trace=self.trace, replay_speed=self.replay_speed)
        return out


@dataclass(frozen=True, slots=True)
class Profile:
    name: str = "default-chat"
    seed: int = 1
    request: RequestSpec = field(default_factory=RequestSpec)
    """The single class of a simple profile; for a mix, a summary (weighted mean lengths)."""
    load: LoadSpec = field(default_factory=LoadSpec)
    source: str | None = None
    classes: tuple[RequestSpec, ...] = ()
    """The weighted mix; empty means the one class ``request``."""
    description: str = ""
    calibrate_input: bool = False
    """Learn the target's tokens per word with a short probe before the run (TOML default: on)."""

    def __post_init__(self) -> None:
        if self.classes:
            object.__setattr__(self, "request", _mix_summary(self.classes))

    def mix(self) -> tuple[RequestSpec, ...]:
        return self.classes or (self.request,)

    def requests(self) -> Iterator[ChatRequest]:
        """The first request of every conversation, in order; one seed, one sequence."""
        from loadrun.workload import Workload

        for conversation in Workload(self).conversations():
            yield conversation.request(0)

    def with_lengths(self, input_tokens: int | None, output_tokens: int | None) -> Profile:
        """The same profile with fixed input and/or output lengths in every class."""

        def fixed(spec: RequestSpec) -> RequestSpec:
            changes: dict[str, Any] = {}
            if input_tokens is not None:
                changes.update(input_tokens=input_tokens, input_length=None)
            if output_tokens is not None:
                changes.update(output_tokens=output_tokens, output_length=None)
            return replace(spec, **changes)

        if self.classes:
            return replace(self, classes=tuple(fixed(spec) for spec in self.classes))
        return replace(self, request=fixed(self.request))

    def describe(self) -> dict[str, Any]:
        out: dict[str, Any] = {
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
            "load": self.load.describe(),
            "calibrate_input": self.calibrate_input,
            "classes": [spec.describe() for spec in self.mix()],
        }
        if self.description:
            out["description"] = self.description
        return out


def _mix_summary(classes: tuple[RequestSpec, ...]) -> RequestSpec:
    total = sum(spec.weight for spec in classes)
    heaviest = max(classes, key=lambda spec: spec.weight)
    return RequestSpec(
        input_tokens=round(sum(spec.weight * spec.input_tokens for spec in classes) / total),
        output_tokens=round(sum(spec.weight * spec.output_tokens for spec in classes) / total),
        stream=heaviest.stream,
        name="mix",
    )


# --- loading ------------------------------------------------------------------------------


def load_profile(path: str | Path) -> Profile:
    file = Path(path)
    try:
        raw = tomllib.loads(file.read_text(encoding="utf-8"))
    except FileNotFoundError as exc:
        raise ProfileError(f"{file}: no such profile file") from exc
    except IsADirectoryError as exc:
        raise ProfileError(f"{file}: is a folder, not a profile file") from exc
    except (OSError, UnicodeDecodeError) as exc:
        raise ProfileError(f"{file}: cannot read: {exc}") from exc
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(f"{file}: not valid TOML: {exc}") from exc
    return profile_from_dict(raw, source=str(file), base_dir=file.parent)


_TOP_KEYS = {"name", "description", "seed", "calibrate_input", "request", "classes", "load"}
CLASS_KEYS = {
    "system_prompt",
    "input_tokens",
    "output_tokens",
    "stream",
    "sampling",
    "prompts_file",
    "shared_prefix",
    "session",
    "check",
}
"""The keys of a request class (``[request]`` or one of ``[[classes]]``)."""
_LOAD_KEYS = {
    "arrival",
    "concurrency",
    "duration_s",
    "requests",
    "warmup_s",
    "rate_per_s",
    "burst_cv",
    "think_time_s",
    "in_flight_cap",
    "trace",
    "replay_speed",
}


def profile_from_dict(
    raw: Mapping[str, Any], source: str = "<profile>", base_dir: Path | None = None
) -> Profile:
    """Validate a parsed TOML document; relative file names resolve against ``base_dir``."""
    reader = _Reader(source, base_dir or Path.cwd())
    for section, command in (("pipeline", "loadrun pipeline"), ("routing", "loadrun route")):
        if section in raw:  # several targets: their own loaders (pipeline.py, routing.py)
            reader.fail(section, f"a profile with [{section}] runs with `{command}`")
    reader.only(raw, "", _TOP_KEYS)
    if "request" in raw and "classes" in raw:
        reader.fail("classes", "give either [request] (one class) or [[classes]] (a mix), not both")
    if "classes" in raw:
        entries = raw["classes"]
        if not isinstance(entries, list) or not entries:
            reader.fail("classes", "must be a non-empty array of tables ([[classes]])")
        classes = tuple(
            reader.request_class(entry, f"classes[{index}]", index) for index, entry in enumerate(entries)
        )
        names = [spec.name for spec in classes]
        for index, name in enumerate(names):
            if name in names[:index]:
                reader.fail(f"classes[{index}].name", f"{name!r} is used by an earlier class")
        single = classes[0]
    else:
        single = reader.request_class(reader.table(raw, "request", ""), "request", None)
        classes = ()
    default_name = Path(source).stem if source != "<profile>" else "profile"
    return Profile(
        name=reader.string(raw, "name", "", default_name) or default_name,
        seed=reader.integer(raw, "seed", "", 1),
        request=single,
        load=reader.load(reader.table(raw, "load", "")),
        source=source,
        classes=classes,
        description=reader.string(raw, "description", "", ""),
        calibrate_input=reader.boolean(raw, "calibrate_input", "", True),
    )


class _Reader:
    """Typed reads from TOML tables; every failure names the file and the key path."""

    def __init__(self, source: str, base_dir: Path) -> None:
        self.source = source
        self.base_dir = base_dir

    def fail(self, key: str, problem: str) -> NoReturn:
        raise ProfileError(f"{self.source}: {key}: {problem}")

    def only(self, table: Mapping[str, Any], prefix: str, allowed: set[str]) -> None:
        for key in table:
            if key not in allowed:
                self.fail(prefix + key, f"unknown key (allowed: {', '.join(sorted(allowed))})")

    def table(self, parent: Mapping[str, Any], key: str, prefix: str) -> Mapping[str, Any]:
        value = parent.get(key, {})
        if not isinstance(value, dict):
            self.fail(prefix + key, "must be a table")
        return value

    # scalars ---------------------------------------------------------------------------
    def integer(
        self,
        table: Mapping[str, Any],
        key: str,
        prefix: str,
        default: int,
        minimum: int | None = None,
        maximum: int | None = None,
    ) -> int:
        value = self.optional_integer(table, key, prefix, minimum, maximum)
        return default if value is None else value

    def optional_integer(
        self,
        table: Mapping[str, Any],
        key: str,
        prefix: str,
        minimum: int | None = None,
        maximum: int | None = None,
    ) -> int | None:
        value = table.get(key)
        if value is None:
            return None
        if isinstance(value, bool) or not isinstance(value, int):
            self.fail(prefix + key, f"must be a whole number, got {value!r}")
        if minimum is not None and value < minimum:
            self.fail(prefix + key, f"must be at least {minimum}, got {value}")
        if maximum is not None and value > maximum:
            self.fail(prefix + key, f"must be at most {maximum}, got {value}")
        return int(value)

    def number(
        self,
        table: Mapping[str, Any],
        key: str,
        prefix: str,
        default: float,
        minimum: float | None = None,
        maximum: float | None = None,
        above: float | None = None,
    ) -> float:
        value = self.optional_number(table, key, prefix, minimum, maximum, above)
        return default if value is None else value

    def optional_number(
        self,
        table: Mapping[str, Any],
        key: str,
        prefix: str,
        minimum: float | None = None,
        maximum: float | None = None,
        above: float | None = None,
    ) -> float | None:
        value = table.get(key)
        if value is None:
            return None
        return self.checked_number(value, prefix + key, minimum, maximum, above)

    def checked_number(
        self,
        value: Any,
        path: str,
        minimum: float | None = None,
        maximum: float | None = None,
        above: float | None = None,
    ) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.fail(path, f"must be a number, got {value!r}")
        if not math.isfinite(value):
            self.fail(path, f"must be a finite number, got {value!r}")
        if minimum is not None and value < minimum:
            self.fail(path, f"must be at least {minimum:g}, got {value}")
        if above is not None and value <= above:
            self.fail(path, f"must be more than {above:g}, got {value}")
        if maximum is not None and value > maximum:
            self.fail(path, f"must be at most {maximum:g}, got {value}")
        return float(value)

    def boolean(self, table: Mapping[str, Any], key: str, prefix: str, default: bool) -> bool:
        value = table.get(key)
        if value is None:
            return default
        if not isinstance(value, bool):
            self.fail(prefix + key, f"must be true or false, got {value!r}")
        return bool(value)

    def string(self, table: Mapping[str, Any], key: str, prefix: str, default: str) -> str:
        value = table.get(key)
        if value is None:
            return default
        if not isinstance(value, str):
            self.fail(prefix + key, f"must be a string, got {value!r}")
        return str(value)

    def choice(
        self, table: Mapping[str, Any], key: str, prefix: str, default: str, allowed: tuple[str, ...]
    ) -> str:
        value = self.string(table, key, prefix, default)
        if value not in allowed:
            self.fail(prefix + key, f"must be one of {', '.join(allowed)}, got {value!r}")
        return value

    def path(self, table: Mapping[str, Any], key: str, prefix: str) -> Path | None:
        text = self.string(table, key, prefix, "")
        if not text:
            if key in table:
                self.fail(prefix + key, "must name a file")
            return None
        path = Path(text)
        return path if path.is_absolute() else self.base_dir / path

    def read_text(self, path: Path, key: str) -> str:
        try:
            return path.read_text(encoding="utf-8")
        except FileNotFoundError:
            return self.fail(key, f"no such file: {path}")
        except (OSError, UnicodeDecodeError) as exc:
            return self.fail(key, f"cannot read {path}: {exc}")

    # distributions ---------------------------------------------------------------------
    def distribution(
        self, value: Any, path: str, *, whole: bool, minimum: float, maximum: float
    ) -> Distribution:
        """A number (fixed) or a table naming a distribution (see loadrun.distributions)."""
        if not isinstance(value, dict):
            number = self.checked_number(value, path, minimum=minimum, maximum=maximum)
            if whole and number != int(number):
                self.fail(path, f"must be a whole number, got {value!r}")
            return Distribution.fixed(number)
        kind = self.choice(value, "distribution", path + ".", "", KINDS) if "distribution" in value else None
        if kind is None:
            return self.fail(path + ".distribution", f"missing (one of {', '.join(KINDS)})")
        allowed = {
            "fixed": {"value"},
            "uniform": {"min", "max"},
            "normal": {"mean", "sd", "min", "max"},
            "lognormal": {"median", "sigma", "min", "max"},
            "exponential": {"mean", "min", "max"},
            "empirical": {"values", "file", "min", "max"},
        }[kind] | {"distribution"}
        prefix = path + "."
        self.only(value, prefix, allowed)

        def required(key: str, **bounds: float) -> float:
            if key not in value:
                self.fail(prefix + key, f"required for the {kind} distribution")
            return self.checked_number(value[key], prefix + key, **bounds)

        low = self.optional_number(value, "min", prefix, minimum=minimum, maximum=maximum)
        high = self.optional_number(value, "max", prefix, minimum=minimum, maximum=maximum)
        if low is not None and high is not None and high < low:
            self.fail(prefix + "max", f"must not be below min ({low:g}), got {high:g}")
        if kind == "fixed":
            return Distribution.fixed(required("value", minimum=minimum, maximum=maximum))
        if kind == "uniform":
            if low is None or high is None:
                self.fail(prefix + ("min" if low is None else "max"), "required for the uniform distribution")
            return Distribution("uniform", low=low, high=high)
        if kind == "normal":
            return Distribution(
                "normal",
                mean_value=required("mean", minimum=minimum, maximum=maximum),
                sd=required("sd", minimum=0.0, maximum=maximum),
                low=minimum if low is None else low,
                high=high,
            )
        if kind == "lognormal":
            return Distribution(
                "lognormal",
                median=required("median", above=0.0, maximum=maximum),
                sigma=required("sigma", minimum=0.0, maximum=5.0),
                low=low,
                high=high,
            )
        if kind == "exponential":
            return Distribution(
                "exponential", mean_value=required("mean", minimum=0.0, maximum=maximum), low=low, high=high
            )
        return self.empirical(value, prefix, low, high, minimum, maximum)

    def empirical(
        self,
        table: Mapping[str, Any],
        prefix: str,
        low: float | None,
        high: float | None,
        minimum: float,
        maximum: float,
    ) -> Distribution:
        if ("values" in table) == ("file" in table):
            self.fail(prefix + "values", 'give either values = [...] or file = "..."')
        source = None
        if "values" in table:
            items = table["values"]
            if not isinstance(items, list) or not items:
                self.fail(prefix + "values", "must be a non-empty list of numbers")
            values = [
                self.checked_number(item, f"{prefix}values[{i}]", minimum, maximum)
                for i, item in enumerate(items)
            ]
        else:
            file = self.path(table, "file", prefix)
            assert file is not None
            source = str(file)
            values = []
            for number, line in enumerate(self.read_text(file, prefix + "file").splitlines(), start=1):
                text = line.split("#", 1)[0].strip()
                if not text:
                    continue
                try:
                    item = float(text)
                except ValueError:
                    self.fail(prefix + "file", f"{file}:{number}: not a number: {_short(text)!r}")
                self.checked_number(item, f"{prefix}file ({file}:{number})", minimum, maximum)
                values.append(item)
                if len(values) > MAX_PROMPT_FILE_LINES:
                    self.fail(prefix + "file", f"{file}: more than {MAX_PROMPT_FILE_LINES} values")
            if not values:
                self.fail(prefix + "file", f"{file}: holds no numbers")
        return Distribution("empirical", values=tuple(values), low=low, high=high, source=source)

    # request classes -------------------------------------------------------------------
    def request_class(self, raw: Any, path: str, index: int | None) -> RequestSpec:
        if not isinstance(raw, dict):
            self.fail(path, "must be a table")
        prefix = path + "."
        allowed = CLASS_KEYS | ({"name", "weight"} if index is not None else set())
        self.only(raw, prefix, allowed)
        name = self.string(raw, "name", prefix, f"class-{index + 1}" if index is not None else "default")
        if not name.strip():
            self.fail(prefix + "name", "must not be empty")
        weight = self.number(raw, "weight", prefix, 1.0, above=0.0, maximum=1e9)
        input_length = self.distribution(
            raw.get("input_tokens", 128), prefix + "input_tokens", whole=True, minimum=1, maximum=MAX_TOKENS
        )
        output_length = self.distribution(
            raw.get("output_tokens", 64), prefix + "output_tokens", whole=True, minimum=1, maximum=MAX_TOKENS
        )
        sampling = self.table(raw, "sampling", prefix)
        for key, value in sampling.items():
            if not isinstance(value, (int, float, str, bool, list, dict)):
                self.fail(f"{prefix}sampling.{key}", "must be a number, string, boolean, list or table")
            if key in ("messages", "model", "stream", "max_tokens", "stream_options"):
                self.fail(f"{prefix}sampling.{key}", "is set by loadrun itself, not passed through")
        prompts = self.prompt_set(raw, prefix)
        session = self.session(raw, prefix)
        if prompts is not None and "input_tokens" in raw:
            self.fail(prefix + "input_tokens", "a prompts file gives the input; drop input_tokens")
        if prompts is not None and session is not None:
            self.fail(prefix + "session", "a prompts file gives whole conversations; drop [session]")
        shared = self.shared_prefix(raw, prefix)
        if prompts is not None and shared is not None:
            self.fail(prefix + "shared_prefix", "a prompts file gives the input; drop [shared_prefix]")
        check = self.check(raw, prefix)
        for key, _ in check.request_fields() if check is not None else ():
            if key in sampling:
                self.fail(f"{prefix}sampling.{key}", "is set by the JSON Schema check; drop it here")
        typical_input = input_length.mean()
        if prompts is not None:  # as many tokens as words, until a calibration says otherwise
            system_words = len(self.string(raw, "system_prompt", prefix, "").split())
            typical_input = system_words + sum(
                len(content.split())
                for line in prompts.conversations
                for pairs in line
                for key, content in pairs
                if key == "content"
            ) / len(prompts.conversations)
        return RequestSpec(
            input_tokens=max(1, round(typical_input)),
            output_tokens=max(1, round(output_length.mean())),
            stream=self.boolean(raw, "stream", prefix, True),
            system_prompt=self.string(raw, "system_prompt", prefix, ""),
            sampling=tuple(sorted(sampling.items())),
            name=name,
            weight=weight,
            input_length=None if input_length.kind == "fixed" else input_length,
            output_length=None if output_length.kind == "fixed" else output_length,
            shared_prefix=shared,
            session=session,
            check=check,
            prompts=prompts,
        )

    def shared_prefix(self, raw: Mapping[str, Any], prefix: str) -> SharedPrefix | None:
        if "shared_prefix" not in raw:
            return None
        table = self.table(raw, "shared_prefix", prefix)
        path = prefix + "shared_prefix."
        self.only(table, path, {"tokens", "share"})
        if "tokens" not in table:
            self.fail(path + "tokens", "required: the length of the shared prefix")
        return SharedPrefix(
            tokens=self.integer(table, "tokens", path, 0, minimum=1, maximum=MAX_TOKENS),
            share=self.number(table, "share", path, 1.0, minimum=0.0, maximum=1.0),
        )

    def session(self, raw: Mapping[str, Any], prefix: str) -> Session | None:
        if "session" not in raw:
            return None
        table = self.table(raw, "session", prefix)
        path = prefix + "session."
        self.only(table, path, {"turns", "think_time_s", "history"})
        think = self.distribution(
            table.get("think_time_s", 0.0), path + "think_time_s", whole=False, minimum=0.0, maximum=86_400.0
        )
        return Session(
            turns=self.integer(table, "turns", path, 2, minimum=1, maximum=MAX_TURNS),
            think_time=think,
            history=self.boolean(table, "history", path, True),
        )

    def prompt_set(self, raw: Mapping[str, Any], prefix: str) -> PromptSet | None:
        file = self.path(raw, "prompts_file", prefix)
        if file is None:
            return None
        key = prefix + "prompts_file"
        conversations = []
        for number, line in enumerate(self.read_text(file, key).splitlines(), start=1):
            if not line.strip():
                continue
            where = f"{file}:{number}"
            try:
                messages = json.loads(line)
            except ValueError as exc:
                self.fail(key, f"{where}: not JSON: {exc}")
            if not isinstance(messages, list) or not messages:
                self.fail(key, f"{where}: must be a non-empty JSON list of messages")
            pairs = []
            for position, message in enumerate(messages):
                if (
                    not isinstance(message, dict)
                    or set(message) != {"role", "content"}
                    or not isinstance(message["role"], str)
                    or not isinstance(message["content"], str)
                ):
                    self.fail(key, f'{where}: message {position} must be {{"role": text, "content": text}}')
                pairs.append((("role", message["role"]), ("content", message["content"])))
            conversations.append(tuple(pairs))
            if len(conversations) > MAX_PROMPT_FILE_LINES:
                self.fail(key, f"{file}: more than {MAX_PROMPT_FILE_LINES} lines")
        if not conversations:
            self.fail(key, f"{file}: holds no message lists")
        return PromptSet(path=str(file), conversations=tuple(conversations))

    def check(self, raw: Mapping[str, Any], prefix: str) -> AnswerCheck | None:
        if "check" not in raw:
            return None
        table = self.table(raw, "check", prefix)
        path = prefix + "check."
        kind = self.choice(table, "kind", path, "", ("choice", "regex", "json_schema"))
        if kind == "choice":
            self.only(table, path, {"kind", "labels", "ignore_case"})
            labels = table.get("labels")
            if (
                not isinstance(labels, list)
                or not labels
                or not all(isinstance(label, str) and label.strip() for label in labels)
            ):
                self.fail(path + "labels", "must be a non-empty list of non-empty strings")
            ignore_case = self.boolean(table, "ignore_case", path, True)
            folded = [label.strip().casefold() if ignore_case else label.strip() for label in labels]
            if len(set(folded)) != len(folded):
                self.fail(path + "labels", "must all differ")
            return ChoiceCheck(labels=tuple(label.strip() for label in labels), ignore_case=ignore_case)
        if kind == "regex":
            self.only(table, path, {"kind", "pattern", "whole"})
            pattern = self.string(table, "pattern", path, "")
            if not pattern:
                self.fail(path + "pattern", "required: a regular expression")
            try:
                re.compile(pattern)
            except (re.error, RecursionError, OverflowError) as exc:
                self.fail(path + "pattern", f"not a valid regular expression: {exc}")
            return RegexCheck(pattern=pattern, whole=self.boolean(table, "whole", path, False))
        self.only(table, path, {"kind", "schema", "schema_file", "via", "name"})
        if ("schema" in table) == ("schema_file" in table):
            self.fail(path + "schema", 'give either schema = {...} or schema_file = "..."')
        if "schema" in table:
            schema = table["schema"]
            where = path + "schema"
        else:
            file = self.path(table, "schema_file", path)
            assert file is not None
            where = path + "schema_file"
            try:
                schema = json.loads(self.read_text(file, where))
            except ValueError as exc:
                self.fail(where, f"{file}: not JSON: {exc}")
        problem = schema_problem(schema)
        if problem is not None:
            self.fail(where, problem)
        name = self.string(table, "name", path, "answer")
        if not re.fullmatch(r"[A-Za-z0-9_-]{1,64}", name):
            self.fail(path + "name", "must be 1-64 letters, digits, '_' or '-'")
        via = self.choice(table, "via", path, "response_format", ("response_format", "tools"))
        return JsonSchemaCheck(
            schema_json=json.dumps(schema, sort_keys=True),
            via="tools" if via == "tools" else "response_format",
            name=name,
        )

    # load --------------------------------------------------------------------------------
    def load(self, raw: Mapping[str, Any]) -> LoadSpec:
        prefix = "load."
        self.only(raw, prefix, _LOAD_KEYS)
        defaults = LoadSpec()
        arrival = self.choice(raw, "arrival", prefix, defaults.arrival, ARRIVALS)
        requests = self.optional_integer(raw, "requests", prefix, minimum=1, maximum=100_000_000)
        duration = self.optional_number(raw, "duration_s", prefix, minimum=0.1, maximum=30 * 86_400.0)
        if requests is not None and duration is not None:
            self.fail(prefix + "requests", "give requests or duration_s, not both")
        rate = self.optional_number(raw, "rate_per_s", prefix, above=0.0, maximum=1e6)
        if arrival in ("poisson", "constant", "bursty") and rate is None:
            self.fail(prefix + "rate_per_s", f"required for arrival = {arrival!r}")
        trace_path = self.path(raw, "trace", prefix)
        if arrival == "replay" and trace_path is None:
            self.fail(prefix + "trace", "required for arrival = 'replay': a JSONL trace file")
        if trace_path is not None and not trace_path.is_file():
            self.fail(prefix + "trace", f"no such file: {trace_path}")
        return LoadSpec(
            concurrency=self.integer(raw, "concurrency", prefix, defaults.concurrency, 1, MAX_CONCURRENCY),
            duration_s=None
            if requests is not None
            else (defaults.duration_s if duration is None else duration),
            requests=requests,
            warmup_s=self.number(raw, "warmup_s", prefix, defaults.warmup_s, minimum=0.0, maximum=86_400.0),
            arrival=arrival,
            rate_per_s=rate,
            burst_cv=self.number(raw, "burst_cv", prefix, defaults.burst_cv, above=0.0, maximum=100.0),
            think_time_s=self.number(raw, "think_time_s", prefix, 0.0, minimum=0.0, maximum=86_400.0),
            in_flight_cap=self.integer(
                raw, "in_flight_cap", prefix, defaults.in_flight_cap, 1, MAX_IN_FLIGHT_CAP
            ),
            trace=str(trace_path) if trace_path is not None else None,
            replay_speed=self.number(raw, "replay_speed", prefix, 1.0, above=0.0, maximum=1e6),
        )


def _short(text: str, limit: int = 40) -> str:
    return text if len(text) <= limit else text[: limit - 3] + "..."
