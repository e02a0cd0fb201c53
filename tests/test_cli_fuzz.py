"""Bad input never shows a traceback: one line ``Type: message`` and exit code 2.

Property-based (hypothesis): random command lines for every command, built from the
command line's own option list with hostile values (nan, inf, huge and negative numbers,
odd unicode, broken URLs and specs), random profile files and random targets files. The
command line runs in this process through ``loadrun.cli.main``; the functions that would
start load are replaced by stubs that validate what reached them (``MeasureSettings.check``)
and stop there, so an accepted input costs nothing: 1,500 cases in all. A few inputs run
as real processes too.
"""

from __future__ import annotations

import contextlib
import importlib
import io
import json
import math
import os
import re
import subprocess
import sys
import tempfile
from collections import Counter
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from loadrun.cli import _command_tree, main
from loadrun.runner import MeasureSettings
from loadrun.transports import make_transport

ERROR_LINE = re.compile(r"^(UsageError|ProfileError): .+")
FUZZ = settings(
    deadline=None,
    database=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much],
)


class Accepted(Exception):
    """The input passed the command line and reached the (stubbed) API."""


def accept_measure(measure_settings: MeasureSettings, *args: Any, **kwargs: Any) -> Any:
    measure_settings.check()
    make_transport(measure_settings.transport)
    raise Accepted


def accept_scaled(measure_settings: MeasureSettings, workers: int | None, cluster: str | None) -> Any:
    """Split runs start processes or reach a cluster: validate, then stop (the address itself
    was checked before this; tests/test_workers_dask.py connects for real)."""
    accept_measure(measure_settings)


def accept(*args: Any, **kwargs: Any) -> Any:
    raise Accepted


@pytest.fixture(scope="module")
def fuzz_dir() -> Iterator[Path]:
    """A scratch working directory, with every load-starting entry point stubbed out."""
    patch = pytest.MonkeyPatch()
    with tempfile.TemporaryDirectory() as folder:
        patch.chdir(folder)
        stubs = [
            ("loadrun.cli", "measure", accept_measure),
            ("loadrun.cli", "measure_scaled", accept_scaled),
            ("loadrun.gate", "gate_measure", accept_measure),
            ("loadrun.gate", "gate_folder", accept),
            ("loadrun.compare", "compare", accept),
            ("loadrun.capacity", "find_capacity", accept),
            ("loadrun.calibrate", "calibrate", accept),
            ("mock_server.__main__", "main", accept),
        ]
        for module, name, stub in stubs:
            # The module object itself: loadrun re-exports some functions under their module's name.
            patch.setattr(importlib.import_module(module), name, stub)
        patch.setenv("LOADRUN_FUZZ_KEY", "sk-fuzz")
        try:
            yield Path(folder)
        finally:
            patch.undo()


def outcome_of(argv: list[str]) -> str:
    """ "accepted", "help" (exit 0) or "refused" (exit 2, one error line); anything else fails."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            main(argv)
        except Accepted:
            return "accepted"
        except SystemExit as exc:
            code = exc.code
        else:
            code = 0
    stderr = err.getvalue()
    assert "Traceback" not in stderr, (argv, stderr)
    if code == 0:
        return "help"
    assert code == 2, (argv, code, stderr)
    lines = [line for line in stderr.splitlines() if line.strip()]
    assert lines and ERROR_LINE.match(lines[-1]), (argv, stderr)
    assert sum(1 for line in lines if ERROR_LINE.match(line)) == 1, (argv, stderr)
    return "refused"


# --- command lines --------------------------------------------------------------------------

TEXT = st.text(st.characters(exclude_categories=("Cs",), exclude_characters="\x00"), max_size=24)
NUMBERS = st.one_of(
    st.integers(-(10**20), 10**20).map(str),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.sampled_from(
        ["nan", "inf", "-inf", "1e309", "0", "-0", "-1", "0.0001", "1_000", "0x10", " 5", "٣", "1e-320"]
    ),
)
SHAPED = st.sampled_from(
    [
        "http://127.0.0.1:9/v1",
        "https://[::1]:8443/v1",
        "http://[::1/v1",
        "http://127.0.0.1:99999/v1",
        "http://user:pw@127.0.0.1/v1",
        "ftp://127.0.0.1/v1",
        "http://",
        "http://192.0.2.5/v1",
        "http://localhost/v1",
        "ttft=500",
        "ttft:p95=100",
        "errors=5",
        "ttft=nan",
        "itl=-1",
        "e2e.p99 15%",
        "ttft.p95 50ms",
        "tpot.p200 1%",
        "X-Team: ferry-desk",
        ":",
        "a=b=c",
        "LOADRUN_FUZZ_KEY",
        "LOADRUN_SURELY_UNSET",
        "closed",
        "poisson",
        "replay",
        "fast",
        "httpx",
        "small-fast",
        "csv",
        "parquet",
        "7d",
        "36h",
        "",
        "-",
        "--",
    ]
)
VALUES = st.one_of(NUMBERS, TEXT, SHAPED)


def options_of(words: tuple[str, ...]) -> tuple[list[str], list[str]]:
    """(options taking a value, flags) of a command, read from the command line itself."""
    command: Any = _command_tree()
    for word in words:
        command = command.commands[word]
    valued, flags = [], []
    for param in command.params:
        if param.param_type_name != "option" or "--help" in param.opts:
            continue
        names = [*param.opts, *param.secondary_opts]
        (flags if param.is_flag else valued).extend(names)
    return valued, flags


COMMANDS: list[tuple[str, ...]] = [
    ("measure",),
    ("gate",),
    ("capacity",),
    ("compare",),
    ("calibrate",),
    ("mock",),
    ("report",),
    ("export",),
    ("history", "list"),
    ("history", "trend"),
    ("history", "pin"),
    ("history", "show"),
]


@st.composite
def command_lines(draw: st.DrawFn, words: tuple[str, ...] | None = None) -> list[str]:
    chosen = words or draw(st.sampled_from(COMMANDS))
    valued, flags = options_of(chosen)
    argv = list(chosen)
    for _ in range(draw(st.integers(0, 6))):
        kind = draw(st.integers(0, 9))
        if kind <= 5 and valued:
            argv += [draw(st.sampled_from(valued)), draw(VALUES)]
        elif kind <= 7 and flags:
            argv.append(draw(st.sampled_from(flags)))
        elif kind == 8:
            argv.append(draw(VALUES))  # a stray positional
        else:
            argv.append("--" + draw(st.text("abcdefghij-", min_size=1, max_size=10)))
    return argv


def fuzz(strategy: st.SearchStrategy[list[str]], examples: int) -> Counter[str]:
    seen: Counter[str] = Counter()

    @settings(FUZZ, max_examples=examples)
    @given(strategy)
    def check(argv: list[str]) -> None:
        seen[outcome_of(argv)] += 1

    check()
    return seen


def test_random_measure_command_lines(fuzz_dir: Path) -> None:
    seen = fuzz(command_lines(("measure",)), 600)
    assert sum(seen.values()) >= 600 and seen["refused"] > 300, seen


def test_random_command_lines_of_every_command(fuzz_dir: Path) -> None:
    seen = fuzz(command_lines(), 400)
    assert sum(seen.values()) >= 400 and seen["refused"] > 200, seen


# --- profiles and targets files ---------------------------------------------------------------

SCALARS = st.one_of(
    st.integers(-(2**63), 2**63 - 1),
    st.sampled_from([0, 1, -1, 2, 5, 128, 2_000_001, 10**12]),
    st.floats(allow_nan=True, allow_infinity=True),
    st.booleans(),
    TEXT,
    st.sampled_from(
        [
            "closed",
            "poisson",
            "bursty",
            "replay",
            "fixed",
            "uniform",
            "lognormal",
            "empirical",
            "regex",
            "x.jsonl",
        ]
    ),
)
PROFILE_KEYS = [
    "name", "description", "seed", "calibrate_input", "request", "classes", "load", "weight",
    "input_tokens", "output_tokens", "stream", "system_prompt", "sampling", "prompts_file", "shared_prefix",
    "session", "check", "arrival", "concurrency", "duration_s", "requests", "warmup_s", "rate_per_s",
    "burst_cv", "think_time_s", "in_flight_cap", "trace", "replay_speed", "distribution", "value", "min",
    "max", "mean", "sd", "median", "sigma", "values", "file", "tokens", "share", "turns", "history", "kind",
    "pattern", "labels", "schema", "temperature",
]  # fmt: skip
TARGET_KEYS = [
    "targets", "currency", "description", "base_url", "mock_engine", "model", "api_key_env", "headers",
    "prices", "context_window", "transport", "input_per_million", "output_per_million", "per_hour", "name",
    "connect_timeout_s", "total_timeout_s", "verify_tls", "harbour-a", "harbour b",
]  # fmt: skip


def documents(keys: list[str]) -> st.SearchStrategy[dict[str, Any]]:
    key = st.one_of(st.sampled_from(keys), TEXT.filter(bool))
    value = st.recursive(
        st.one_of(SCALARS, SHAPED),
        lambda inner: st.lists(inner, max_size=3) | st.dictionaries(key, inner, max_size=4),
        max_leaves=10,
    )
    return st.dictionaries(key, value, max_size=5)


def toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return (
            "nan"
            if math.isnan(value)
            else ("inf" if value > 0 else "-inf")
            if math.isinf(value)
            else repr(value)
        )
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)
    if isinstance(value, list):
        return "[" + ", ".join(toml_value(item) for item in value) + "]"
    return (
        "{"
        + ", ".join(f"{json.dumps(k, ensure_ascii=False)} = {toml_value(v)}" for k, v in value.items())
        + "}"
    )


def toml_document(document: dict[str, Any]) -> str:
    return "".join(
        f"{json.dumps(key, ensure_ascii=False)} = {toml_value(value)}\n" for key, value in document.items()
    )


FILE_BODIES = st.one_of(
    documents(PROFILE_KEYS).map(toml_document),
    st.just("[request]\ninput_tokens = nan\n"),
    st.just("[[classes]]\nweight = 0\n"),
    TEXT,
    st.binary(max_size=40).map(lambda data: data.decode("latin-1")),
)


@st.composite
def profile_runs(draw: st.DrawFn) -> list[str]:
    body = draw(st.one_of(documents(PROFILE_KEYS).map(toml_document), FILE_BODIES))
    Path("profile.toml").write_bytes(body.encode("utf-8", "surrogateescape"))
    command = draw(st.sampled_from([("measure",), ("gate",), ("capacity",)]))
    extra = draw(
        st.sampled_from([[], ["-n", "5"], ["--rate", "3"], ["--yes", "--base-url", "http://192.0.2.5/v1"]])
    )
    if command != ("measure",) and "--rate" in extra:
        extra = []
    if "--base-url" in extra:
        extra += ["--model", "m"]
    return [*command, "profile.toml", *extra]


@st.composite
def targets_runs(draw: st.DrawFn) -> list[str]:
    shape = draw(st.integers(0, 2))
    if shape == 0:  # anything at all
        document = draw(documents(TARGET_KEYS))
    elif shape == 1:  # shaped like a targets file, with hostile entries
        names = st.sampled_from(TARGET_KEYS) | TEXT
        document = {"targets": draw(st.dictionaries(names, documents(TARGET_KEYS)))}
    else:  # nearly right: a good skeleton with some hostile values
        entry = {"base_url": draw(SHAPED), "model": "m", **draw(documents(TARGET_KEYS))}
        document = {"targets": {draw(st.sampled_from(["harbour-a", "quay_2", "x" * 65, ""])): entry}}
    Path("targets.toml").write_text(toml_document(document), encoding="utf-8")
    return ["compare", "targets.toml", *draw(st.sampled_from([[], ["--yes"], ["-c", "2", "-n", "3"]]))]


def test_random_profiles(fuzz_dir: Path) -> None:
    seen = fuzz(profile_runs(), 300)
    assert sum(seen.values()) >= 300 and seen["refused"] > 150, seen


def test_random_targets_files(fuzz_dir: Path) -> None:
    seen = fuzz(targets_runs(), 200)
    assert sum(seen.values()) >= 200 and seen["refused"] > 100, seen


# --- a few as real processes -------------------------------------------------------------------

REAL_RUNS = [
    ["measure", "--base-url", "http://[::1/v1", "--model", "m"],
    ["measure", "--duration", "nan"],
    ["measure", "profile.toml"],
    ["gate", "--rule", "ttft.p200 5%"],
]


def test_bad_input_in_real_processes(tmp_path: Path) -> None:
    (tmp_path / "profile.toml").write_bytes(b'[request]\ninput_tokens = "many"\n\xff\xfe')
    (tmp_path / "targets.toml").write_text('[targets."harbour b"]\nbase_url = "http://127.0.0.1:9/v1"\n')
    env = {key: value for key, value in os.environ.items() if not key.startswith("LOADRUN_")}
    for argv in REAL_RUNS:
        done = subprocess.run(
            [sys.executable, "-m", "loadrun", *argv],
            cwd=tmp_path,
            capture_output=True,
            text=True,
            timeout=60,
            stdin=subprocess.DEVNULL,
            env=env,
        )
        lines = [line for line in done.stderr.splitlines() if line.strip()]
        assert done.returncode == 2, (argv, done.stderr)
        assert "Traceback" not in done.stderr, argv
        assert len(lines) == 1 and ERROR_LINE.match(lines[0]), (argv, done.stderr)
