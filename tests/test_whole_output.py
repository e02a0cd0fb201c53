"""A command's output reaches a slow reader whole, even with stdout unbuffered.

Found by the soak run: a 30-minute run's ``--json`` summary (about 300 kB, mostly
per-second windows) arrived cut at 65,536 bytes, exit status 0, with PYTHONUNBUFFERED=1
(as many container images set) and the reader starting only after the run ended.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time

import pytest

CHILD = """
import os, sys, asyncio
import uvloop
from loadrun.whole_output import write_whole
loop = uvloop.new_event_loop()  # as a run leaves it: an event loop ran and was closed
loop.run_until_complete(asyncio.sleep(0))
loop.close()
if sys.argv[1] == "nonblocking":
    os.set_blocking(1, False)
write_whole("x" * 300_000 + "\\n")
"""


@pytest.mark.parametrize("mode", ["blocking", "nonblocking"])
def test_a_large_output_reaches_a_late_reader_whole(mode: str) -> None:
    child = subprocess.Popen(
        [sys.executable, "-c", CHILD, mode],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        env={**os.environ, "PYTHONUNBUFFERED": "1"},
    )
    time.sleep(1.0)  # the reader is late: the pipe (64 KiB) fills long before it reads
    stdout, stderr = child.communicate(timeout=30)
    assert child.returncode == 0, stderr
    assert stdout == b"x" * 300_000 + b"\n"


def test_in_memory_streams_are_written_as_usual() -> None:
    import io

    from loadrun.whole_output import write_whole

    buffer = io.StringIO()
    write_whole("harbour ferry timetable\n", buffer)
    assert buffer.getvalue() == "harbour ferry timetable\n"
