"""Incremental parser for server-sent events.

Follows the WHATWG HTML Living Standard, section "Server-sent events", subsections
"Parsing an event stream" and "Interpreting an event stream":

- the stream is UTF-8, decoded with replacement characters; one byte order mark is
  stripped at the very start of the stream (a later one is ordinary text);
- lines end in CRLF, LF or CR; an empty line dispatches the pending event;
- a line starting with ``:`` is a comment; otherwise the field name is the text before the
  first ``:`` and the value the text after it, less ONE leading space (no colon: the whole
  line is the name and the value is empty);
- ``event`` sets the type, ``data`` appends the value and a LF, ``id`` sets the last event
  ID unless the value holds a NUL, ``retry`` sets the reconnection time if the value is
  ASCII digits only; other fields are ignored;
- at dispatch an empty data buffer dispatches nothing, one trailing LF is removed and the
  type is "message" unless set; data still pending at the end of the stream is discarded.

The parser works on bytes as they arrive, split anywhere. Lines are cut on the raw bytes
and decoded one by one: CR and LF never occur inside a multi-byte UTF-8 sequence, so this
gives the same text as decoding the whole stream first, without holding it.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["EventStreamParser", "ServerSentEvent"]

_BYTE_ORDER_MARK = b"\xef\xbb\xbf"
_CR = 0x0D
_LF = 0x0A
_COLON = 0x3A


@dataclass(slots=True, frozen=True)
class ServerSentEvent:
    """One dispatched event.

    ``last_event_id`` and ``retry_ms`` are the stream's state when the event was
    dispatched (the last valid ``id`` and ``retry`` seen so far, not only in this event).
    """

    type: str
    data: str
    last_event_id: str
    retry_ms: int | None


class EventStreamParser:
    """Turns the bytes of one event stream, fed in pieces of any size, into events.

    After :meth:`finish` the same parser can take the next stream (after a reconnection);
    the last event ID and the reconnection time carry over, as they do for a browser.
    """

    __slots__ = (
        "_at_stream_start",
        "_data_lines",
        "_event_type",
        "_id_buffer",
        "_last_event_id",
        "_partial_line",
        "_retry_ms",
        "_skip_leading_lf",
    )

    def __init__(self) -> None:
        self._at_stream_start = True
        # Bytes of a line whose end has not arrived yet (or of a possible BOM at the start).
        self._partial_line = bytearray()
        # The previous chunk ended in CR: a LF opening the next chunk belongs to that CR.
        self._skip_leading_lf = False
        self._data_lines: list[str] = []
        self._event_type = ""
        self._id_buffer = ""
        self._last_event_id = ""
        self._retry_ms: int | None = None

    @property
    def last_event_id(self) -> str:
        """The last event ID as of the latest dispatch ("" until an ``id`` field is seen)."""
        return self._last_event_id

    @property
    def retry_ms(self) -> int | None:
        """The last valid reconnection time the server sent, in milliseconds."""
        return self._retry_ms

    def feed(self, chunk: bytes) -> list[ServerSentEvent]:
        """Take the next bytes of the stream; return the events they complete, in order."""
        if not chunk:
            return []
        if self._skip_leading_lf:
            self._skip_leading_lf = False
            if chunk[0] == _LF:
                chunk = chunk[1:]
        if self._at_stream_start:
            chunk = self._strip_byte_order_mark(chunk)
        if not chunk:
            return []
        if b"\n" not in chunk and b"\r" not in chunk:
            # No line ends here: keep the bytes (appending avoids re-copying long lines).
            self._partial_line += chunk
            return []
        if self._partial_line:
            self._partial_line += chunk
            chunk = bytes(self._partial_line)
            self._partial_line.clear()

        # bytes.splitlines breaks at LF, CR and CRLF only, exactly the stream's line ends.
        lines = chunk.splitlines()
        last_byte = chunk[-1]
        if last_byte == _CR:
            self._skip_leading_lf = True
        elif last_byte != _LF:
            self._partial_line += lines.pop()
        return self._interpret(lines)

    def finish(self) -> list[ServerSentEvent]:
        """End the stream: an event without its closing empty line is discarded.

        The spec never dispatches at end of stream, so this returns an empty list; it
        returns a list so that callers treat the end like any other feed. The parser is
        then ready for a new stream.
        """
        self._at_stream_start = True
        self._partial_line.clear()
        self._skip_leading_lf = False
        self._data_lines = []
        self._event_type = ""
        # An id in the discarded block never took effect; the next stream starts from the
        # last dispatched one.
        self._id_buffer = self._last_event_id
        return []

    def _strip_byte_order_mark(self, chunk: bytes) -> bytes:
        """Drop one BOM at the very start of the stream, even if it arrives split."""
        head = bytes(self._partial_line) + chunk
        if len(head) < len(_BYTE_ORDER_MARK) and _BYTE_ORDER_MARK.startswith(head):
            self._partial_line[:] = head
            return b""
        self._at_stream_start = False
        self._partial_line.clear()
        if head.startswith(_BYTE_ORDER_MARK):
            return head[len(_BYTE_ORDER_MARK) :]
        return head

    def _interpret(self, lines: list[bytes]) -> list[ServerSentEvent]:
        events: list[ServerSentEvent] = []
        data_lines = self._data_lines
        for line in lines:
            # Field names are ASCII, so comparing raw bytes matches comparing decoded text.
            if line.startswith(b"data:"):
                value = line[6:] if line[5:6] == b" " else line[5:]
                data_lines.append(value.decode("utf-8", "replace"))
            elif not line:
                self._last_event_id = self._id_buffer
                if data_lines:
                    events.append(
                        ServerSentEvent(
                            self._event_type or "message",
                            "\n".join(data_lines),
                            self._id_buffer,
                            self._retry_ms,
                        )
                    )
                    data_lines = self._data_lines = []
                self._event_type = ""
            elif line[0] != _COLON:
                self._interpret_field(line)
        return events

    def _interpret_field(self, line: bytes) -> None:
        """Handle any field but ``data`` (the common case is inlined in the loop)."""
        colon = line.find(b":")
        if colon < 0:
            name, value = line, b""
        else:
            name, value = line[:colon], line[colon + 1 :]
            if value[:1] == b" ":
                value = value[1:]
        if name == b"data":
            # Only reached without a colon: the value is empty, the LF still counts.
            self._data_lines.append(value.decode("utf-8", "replace"))
        elif name == b"event":
            self._event_type = value.decode("utf-8", "replace")
        elif name == b"id":
            if b"\x00" not in value:
                self._id_buffer = value.decode("utf-8", "replace")
        elif name == b"retry" and value.isdigit():
            # bytes.isdigit() is true for ASCII digits only, as the spec requires.
            self._retry_ms = int(value)
