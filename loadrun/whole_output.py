"""Write a command's output to stdout whole, even when stdout is an unbuffered pipe.

With stdout unbuffered (``python -u`` or PYTHONUNBUFFERED=1, common in containers) the text
layer writes straight to the file descriptor and drops whatever a short write leaves over;
after an event loop has run, the first write to a full pipe can come back short. A large
``--json`` summary piped to a slow reader then lost everything past the pipe's 64 KiB with
exit status 0. Here the bytes go out in a loop until every one is written.
"""

from __future__ import annotations

import io
import os
import select
import sys
from typing import TextIO


def write_whole(text: str, stream: TextIO | None = None) -> None:
    """Write ``text`` to ``stream`` (default: sys.stdout), looping over short writes."""
    stream = stream if stream is not None else sys.stdout
    try:
        fd = stream.fileno()
    except (io.UnsupportedOperation, AttributeError, ValueError):  # an in-memory stream
        stream.write(text)
        return
    stream.flush()
    data = memoryview(text.encode(stream.encoding or "utf-8", errors="replace"))
    while data:
        try:
            written = os.write(fd, data)
        except BlockingIOError:  # a non-blocking descriptor: wait until the reader makes room
            select.select([], [fd], [])
            continue
        data = data[written:]
