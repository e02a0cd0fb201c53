"""Ctrl-C (SIGINT) and SIGTERM during a run: stop sending, let in-flight requests finish.

First signal: the run's stop event is set, so no new request and no retry starts; the
requests in flight get the grace period to finish (``MeasureSettings.stop_grace_s``) and
are then cancelled; the summary is written marked interrupted, and the command exits 130.

Second signal: exit at once, status 130, after killing the child processes the run
started (the embedded mock) by PID. Once interrupted, that holds until the process ends:
when the run's event loop no longer listens (the summary is being written, the report
printed), a plain signal handler takes over the "exit at once". Nothing on disk is left
half-written: the handler runs as an event-loop callback, never inside a write, and record
lines are written whole and flushed one by one from the loop; summaries go to a temporary
file that is then renamed; the history database is SQLite, whose journal makes an
interrupted transaction vanish.
"""

from __future__ import annotations

import asyncio
import contextlib
import os
import signal
import sys
from collections.abc import Iterator
from typing import Any, NoReturn

import anyio

EXIT_INTERRUPTED = 130
"""The shell's status for a process ended by SIGINT (128 + 2)."""
SIGNALS = (signal.SIGINT, signal.SIGTERM)


class SignalStop:
    """Turns the first SIGINT/SIGTERM into a stop and the second into an immediate exit."""

    def __init__(self, stop: anyio.Event, grace_s: float, child_pids: tuple[int, ...] = ()) -> None:
        self.stop = stop
        self.grace_s = grace_s
        self.child_pids = child_pids
        self.signal_name: str | None = None
        """The first signal received, e.g. "SIGINT"; None while none came."""
        self._installed: list[signal.Signals] = []

    def install(self) -> None:
        loop = asyncio.get_running_loop()
        for signum in SIGNALS:
            try:
                loop.add_signal_handler(signum, self._on_signal, signum)
            except (NotImplementedError, RuntimeError, ValueError):  # not the main thread, or no signals
                continue
            self._installed.append(signum)

    def remove(self) -> None:
        loop = asyncio.get_running_loop()
        for signum in self._installed:
            loop.remove_signal_handler(signum)
            if self.signal_name is not None:  # interrupted: a further signal still means "now"
                signal.signal(signum, self._on_late_signal)
        self._installed.clear()

    def _on_signal(self, signum: signal.Signals) -> None:
        if self.signal_name is None:
            self.signal_name = signal.Signals(signum).name
            _tell(
                f"{self.signal_name}: no new requests; those in flight have {self.grace_s:g} s to finish. "
                "Send it again to exit at once."
            )
            self.stop.set()
            return
        _exit_at_once(signal.Signals(signum).name, self.child_pids)

    def _on_late_signal(self, signum: int, _frame: object) -> None:
        self._on_signal(signal.Signals(signum))


class ForwardedStop:
    """For a coordinator of worker processes (plain code, no event loop): the first
    SIGINT/SIGTERM is passed on to the workers as SIGTERM, so each stops the way a lone run
    does and sends back its summary marked interrupted; the second kills the workers and
    ``child_pids`` by PID and exits at once."""

    def __init__(self, child_pids: tuple[int, ...] = ()) -> None:
        self.child_pids = child_pids
        self.worker_pids: tuple[int, ...] = ()
        self.signal_name: str | None = None

    def _on_signal(self, signum: int, _frame: object) -> None:
        name = signal.Signals(signum).name
        if self.signal_name is None:
            self.signal_name = name
            _tell(
                f"{name}: the workers send no new requests; those in flight may finish. "
                "Send it again to exit at once."
            )
            for pid in self.worker_pids:
                with contextlib.suppress(ProcessLookupError, PermissionError):
                    os.kill(pid, signal.SIGTERM)
            return
        _exit_at_once(name, (*self.worker_pids, *self.child_pids))


@contextlib.contextmanager
def forwarded_stop(child_pids: tuple[int, ...] = (), *, enabled: bool = True) -> Iterator[ForwardedStop]:
    """Install a ForwardedStop for the block (main thread only); the old handlers come back after."""
    guard = ForwardedStop(child_pids)
    saved: dict[signal.Signals, Any] = {}
    if enabled:
        for signum in SIGNALS:
            try:
                saved[signum] = signal.signal(signum, guard._on_signal)
            except ValueError:  # not the main thread
                break
    try:
        yield guard
    finally:
        for signum, handler in saved.items():
            signal.signal(signum, handler)


@contextlib.contextmanager
def signals_stop(
    stop: anyio.Event, grace_s: float, child_pids: tuple[int, ...] = (), *, enabled: bool = True
) -> Iterator[SignalStop]:
    """Install a SignalStop for the block (when ``enabled``); the old handlers come back after."""
    guard = SignalStop(stop, grace_s, child_pids)
    if enabled:
        guard.install()
    try:
        yield guard
    finally:
        guard.remove()


def _exit_at_once(signal_name: str, child_pids: tuple[int, ...]) -> NoReturn:
    _tell(f"{signal_name} again: exiting at once.")
    for pid in child_pids:
        _kill_if_our_child(pid)
    os._exit(EXIT_INTERRUPTED)


def _kill_if_our_child(pid: int) -> None:
    """SIGKILL ``pid`` only while it is still our unreaped child: a PID freed by a reaped
    child may already belong to some other process."""
    try:
        reaped, _status = os.waitpid(pid, os.WNOHANG)
    except ChildProcessError:  # not (or no longer) ours
        return
    if reaped == 0:  # alive
        with contextlib.suppress(ProcessLookupError, PermissionError):
            os.kill(pid, signal.SIGKILL)


def _tell(message: str) -> None:
    # Plain text on stderr: the terminal view may be mid-render, and this must never fail.
    with contextlib.suppress(OSError, ValueError):
        sys.stderr.write(f"\n{message}\n")
        sys.stderr.flush()
