"""A sentinel API key must never leave the process: not in any output stream, nor in any file.

Every command runs with the key in an environment variable named by the target: those that
send load as real processes (all they print is captured), those that only read and write
files in this process. The mock answers some requests with errors that quote the request's Authorization
header back (a careless server), so the key reaches loadrun from outside too and must be
scrubbed before it lands in a record. Then every byte written under the test's folder and
every stdout and stderr is searched for the key, plain and base64-encoded.
"""

from __future__ import annotations

import base64
import contextlib
import io
import secrets
import shlex
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest
import typer

from loadrun.cli import app, main
from mock_server import RunningMock, start_subprocess

pytestmark = pytest.mark.slow

KEY_VARIABLE = "LOADRUN_SENTINEL_KEY"
KEY = "sk-sentinel-" + secrets.token_hex(16)
KEY_FREE_COMMANDS = {"mock", "calibrate"}
"""Commands that never take a target's key (they run the bundled mock alone)."""


@pytest.fixture(scope="module")
def careless_mock() -> Iterator[RunningMock]:
    extra = ["--quirk", "echo_key_in_errors", "--fault", "server_error=0.15", "--fault", "rate_limit=0.15"]
    extra += ["--fault", "retry_after_s=0", "--fault", "seed=5"]
    with start_subprocess("small-fast", extra_args=extra) as mock:
        yield mock


def every_command() -> set[str]:
    """All commands of the command line, sub-commands as 'group sub'."""
    root = typer.main.get_command(app)
    names = set()
    for name, command in getattr(root, "commands", {}).items():
        subcommands = getattr(command, "commands", None)
        if subcommands:
            names.update(f"{name} {sub}" for sub in subcommands)
        else:
            names.add(name)
    assert "measure" in names
    return names


def run_in_process(args: list[str]) -> tuple[int, str, str]:
    """The command line in this process (for commands that only read and write files)."""
    out, err = io.StringIO(), io.StringIO()
    code = 0
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            main(args)
        except SystemExit as exc:
            code = exc.code if isinstance(exc.code, int) else 1
    return code, out.getvalue(), err.getvalue()


def test_every_command_with_a_sentinel_key_leaks_nothing(
    careless_mock: RunningMock, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv(KEY_VARIABLE, KEY)
    monkeypatch.chdir(tmp_path)
    url = careless_mock.base_url
    target = f"--base-url {url} --model mock-small-fast --api-key-env {KEY_VARIABLE}"
    targets_file = "".join(
        f'[targets.harbour-{name}]\nbase_url = "{url}"\nmodel = "mock-small-fast"\n'
        f'api_key_env = "{KEY_VARIABLE}"\n'
        for name in "ab"
    )
    (tmp_path / "targets.toml").write_text(targets_file)
    (tmp_path / "short.toml").write_text(
        'name = "pier-short"\n[request]\ninput_tokens = 16\noutput_tokens = 6\n'
    )
    (tmp_path / "routed.toml").write_text(
        'name = "wharf-routed"\n[request]\ninput_tokens = 16\noutput_tokens = 6\n[routing]\n'
        'targets = "targets.toml"\n[[routing.routes]]\ntarget = "harbour-a"\nshare = 1\n'
        '[[routing.routes]]\ntarget = "harbour-b"\nshare = 1\n'
    )
    (tmp_path / "steps.toml").write_text(
        'name = "wharf-steps"\n[pipeline]\ntargets = "targets.toml"\n[[pipeline.stages]]\nname = "gist"\n'
        'target = "harbour-a"\ninput_tokens = 16\noutput_tokens = 6\n[[pipeline.stages]]\nname = "reply"\n'
        'target = "harbour-b"\ninput_from = "gist"\noutput_tokens = 6\n'
    )
    loads = [
        ("measure", f"measure short.toml {target} -n 30 -c 3 --warmup 0 --out out --json"),
        ("measure", f"measure short.toml {target} -n 20 -c 2 --warmup 0 --out out --retry-rate-limited 1"),
        (
            "gate",
            f"gate short.toml {target} -n 20 -c 2 --warmup 0 --out out --junit g.xml --prometheus g.prom",
        ),
        (
            "capacity",
            f"capacity short.toml {target} --out out --budget-steps 2 --max-load 2 --step-max-seconds 1",
        ),
        (
            "compare",
            "compare targets.toml short.toml -c 2 --rounds 1 -n 8 --warmup 0 --out out --resamples 200",
        ),
        ("route", "route routed.toml -c 2 -n 12 --warmup 0 --out out"),
        ("pipeline", "pipeline steps.toml -c 2 -n 6 --warmup 0 --out out"),
    ]
    streams: list[str] = []
    covered = set()
    for name, text in loads:  # real processes: everything they print is captured
        done = subprocess.run(
            [sys.executable, "-m", "loadrun", *shlex.split(text)],
            cwd=tmp_path,
            capture_output=True,
            text=True,
            timeout=120,
            stdin=subprocess.DEVNULL,
        )
        assert "Traceback" not in done.stderr, (text, done.stderr)
        streams += [done.stdout, done.stderr]
        covered.add(name)
    run_folder = sorted(path.parent for path in (tmp_path / "out").glob("*/records.jsonl"))[0]
    history = "--history out/history.sqlite3"
    readers = [
        ("history list", f"history list {history}", 0),
        ("history show", f"history show 1 {history}", 0),
        ("history trend", f"history trend {history} --svg out/trend.svg", 0),
        ("history pin", f"history pin 1 {history}", 0),
        ("report", f"report {run_folder}", 0),
        ("export", f"export {run_folder} --format csv", 0),
        ("frontier", f"frontier {run_folder} {run_folder} --cost 0.001 --cost 0.002", 0),
        # Refusals and failures carry messages: they must not quote the key either.
        (
            "measure",
            f"measure --model m --api-key-env {KEY_VARIABLE} --base-url http://192.0.2.7/v1 --yes",
            2,
        ),
        ("measure", f"measure --model m --api-key-env {KEY_VARIABLE} --base-url http://127.0.0.1:1/v1", 1),
    ]
    for name, text, expected in readers:
        code, stdout, stderr = run_in_process(shlex.split(text))
        assert code == expected, (text, stderr)
        streams += [stdout, stderr]
        covered.add(name)
    assert every_command() - KEY_FREE_COMMANDS <= covered, "a command is not run with the sentinel key"

    needles = [KEY.encode(), base64.b64encode(KEY.encode()), base64.b64encode(f"Bearer {KEY}".encode())]
    leaks = [
        f"output stream {index}"
        for index, text in enumerate(streams)
        if any(n.decode() in text for n in needles)
    ]
    written = [path for path in tmp_path.rglob("*") if path.is_file()]
    leaks += [str(path) for path in written if any(needle in path.read_bytes() for needle in needles)]
    assert leaks == []
    # The scan looked where the key would be: records that quote the server's errors.
    assert len(written) > 20
    assert any(b"[redacted]" in path.read_bytes() for path in written if path.name == "records.jsonl")
