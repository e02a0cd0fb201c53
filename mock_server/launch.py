"""Start the mock server: in this event loop (``serve``) or as a child process
(``start_subprocess``), and stop it again.

The child is ``python -m mock_server --host H --port P ...``; once bound it prints exactly one
first line, ``mock_server listening on http://H:PORT``, which the parent waits for.
"""

from __future__ import annotations

import contextlib
import dataclasses
import os
import selectors
import signal
import subprocess
import sys
import tempfile
import time
from collections.abc import AsyncIterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from types import TracebackType
from typing import IO

from mock_server.app import MockApp
from mock_server.config import load_config
from mock_server.engine import Engine, EngineConfig
from mock_server.faults import FaultPlan
from mock_server.http import HttpServer
from mock_server.queueing import QueueingEngine, make_engine

READY_PREFIX = "mock_server listening on "


class MockStartError(RuntimeError):
    """The child process did not come up (it died, or never said it was listening)."""


def url_for(host: str, port: int) -> str:
    """``http://host:port``, with brackets around an IPv6 literal."""
    shown = f"[{host}]" if ":" in host else host
    return f"http://{shown}:{port}"


@dataclass(frozen=True, slots=True)
class ServingMock:
    """A mock server running in the current event loop."""

    url: str
    host: str
    port: int
    engine: Engine | QueueingEngine
    app: MockApp

    @property
    def base_url(self) -> str:
        return self.url + "/v1"


@contextlib.asynccontextmanager
async def serve(
    config: EngineConfig | str | Path | None = None,
    host: str = "127.0.0.1",
    port: int = 0,
    plan: FaultPlan | None = None,
) -> AsyncIterator[ServingMock]:
    """Serve the mock in this event loop until the block exits (port 0 picks a free port).

    ``plan``: faults to inject and quirks to play (see ``faults.py``); none by default.
    """
    engine_config = config if isinstance(config, EngineConfig) else load_config(config)
    if plan is not None and plan.quirks.one_at_a_time:
        engine_config = dataclasses.replace(engine_config, max_running=1)
    engine = make_engine(engine_config)
    app = MockApp(engine, plan)
    server = HttpServer(app)
    await server.start(host, port)
    try:
        yield ServingMock(url_for(host, server.port), host, server.port, engine, app)
    finally:
        engine.close()
        await server.close()


class RunningMock:
    """A mock server child process; ``stop()`` (or leaving the ``with`` block) ends it."""

    def __init__(self, process: subprocess.Popen[bytes], url: str, stderr_file: IO[bytes]) -> None:
        self._process = process
        self._stderr_file = stderr_file
        self.url = url

    @property
    def pid(self) -> int:
        return self._process.pid

    @property
    def base_url(self) -> str:
        return self.url + "/v1"

    @property
    def returncode(self) -> int | None:
        return self._process.poll()

    def stop(self, timeout_s: float = 5.0) -> int:
        """SIGTERM by PID, wait up to ``timeout_s``, then SIGKILL; returns the exit code."""
        process = self._process
        if process.poll() is None:
            with contextlib.suppress(ProcessLookupError):
                os.kill(process.pid, signal.SIGTERM)
            try:
                process.wait(timeout=timeout_s)
            except subprocess.TimeoutExpired:
                with contextlib.suppress(ProcessLookupError):
                    os.kill(process.pid, signal.SIGKILL)
                process.wait()
        if process.stdout is not None:
            process.stdout.close()
        self._stderr_file.close()
        return process.returncode

    def __enter__(self) -> RunningMock:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        traceback: TracebackType | None,
    ) -> None:
        self.stop()


def start_subprocess(
    config_name_or_path: str | Path | None = None,
    host: str = "127.0.0.1",
    port: int = 0,
    extra_args: Sequence[str] = (),
    *,
    ready_timeout_s: float = 20.0,
) -> RunningMock:
    """Start ``python -m mock_server`` and return once it listens (or raise MockStartError)."""
    command = [sys.executable, "-m", "mock_server", "--host", host, "--port", str(port)]
    if config_name_or_path is not None:
        command += ["--engine", str(config_name_or_path)]
    command += list(extra_args)
    env = dict(os.environ)
    # Make the package importable in the child whether or not it is installed.
    package_root = str(Path(__file__).resolve().parent.parent)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (package_root, env.get("PYTHONPATH")) if p)
    # Not a with-block: the file outlives this call, RunningMock.stop() closes it.
    stderr_file = tempfile.TemporaryFile()  # noqa: SIM115
    # A process group of its own: a Ctrl-C at the terminal reaches the parent alone, which
    # lets its in-flight requests finish and then stops this child by PID.
    process = subprocess.Popen(
        command,
        stdout=subprocess.PIPE,
        stderr=stderr_file,
        stdin=subprocess.DEVNULL,
        env=env,
        process_group=0,
    )
    try:
        line = _read_first_line(process, ready_timeout_s)
    except MockStartError as exc:
        if process.poll() is None:
            os.kill(process.pid, signal.SIGKILL)
        process.wait()
        stderr_file.seek(0)
        tail = stderr_file.read()[-2000:].decode("utf-8", "replace").strip()
        if process.stdout is not None:
            process.stdout.close()
        stderr_file.close()
        raise MockStartError(f"{exc}; exit code {process.returncode}; stderr: {tail or '(empty)'}") from None
    except BaseException:  # e.g. Ctrl-C while waiting: the child is in its own group, stop it here
        RunningMock(process, "", stderr_file).stop()
        raise
    if not line.startswith(READY_PREFIX):
        RunningMock(process, "", stderr_file).stop()
        raise MockStartError(f"unexpected first line from mock_server: {line!r}")
    return RunningMock(process, line[len(READY_PREFIX) :].strip(), stderr_file)


def _read_first_line(process: subprocess.Popen[bytes], timeout_s: float) -> str:
    assert process.stdout is not None
    fd = process.stdout.fileno()
    buffer = b""
    deadline = time.monotonic() + timeout_s
    with selectors.DefaultSelector() as selector:
        selector.register(fd, selectors.EVENT_READ)
        while b"\n" not in buffer:
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                raise MockStartError(f"mock_server did not report listening within {timeout_s} s")
            if not selector.select(remaining):
                continue
            data = os.read(fd, 4096)
            if not data:
                raise MockStartError("mock_server exited before it was listening")
            buffer += data
    return buffer.split(b"\n", 1)[0].decode("utf-8", "replace")
