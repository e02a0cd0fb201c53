"""Tests of the server-sent-events parser.

Reference: WHATWG HTML Living Standard, section "Server-sent events", subsections "Parsing
an event stream" and "Interpreting an event stream". The vectors come from the spec's own
examples and from the web-platform-tests ``eventsource/`` suite, as listed in
/work/shared/SOURCES.md section 3. Every vector must give the same events whole, byte by
byte and split in two at every offset (a CRLF split between chunks is the classic bug).
"""

from __future__ import annotations

import dataclasses
import itertools
import re
from collections.abc import Iterable, Sequence

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from loadrun.sse import EventStreamParser, ServerSentEvent


def _event(data: str, type_: str = "message", last_event_id: str = "") -> ServerSentEvent:
    return ServerSentEvent(type=type_, data=data, last_event_id=last_event_id, retry_ms=None)


def _parse(chunks: Iterable[bytes]) -> list[ServerSentEvent]:
    parser = EventStreamParser()
    events: list[ServerSentEvent] = []
    for chunk in chunks:
        events.extend(parser.feed(chunk))
    events.extend(parser.finish())
    return events


# (name, input bytes, dispatched events). Source of every row: WHATWG HTML Living Standard
# "Server-sent events" examples and web-platform-tests eventsource/ (SOURCES.md section 3).
SPEC_VECTORS: list[tuple[str, bytes, list[ServerSentEvent]]] = [
    # Spec example: data lines are joined with LF.
    ("multi_line_data", b"data: YHOO\ndata: +2\ndata: 10\n\n", [_event("YHOO\n+2\n10")]),
    # Spec example: comment, id set then reset by a bare "id", one leading space removed.
    (
        "comment_id_and_space",
        b": test stream\n\ndata: first event\nid: 1\n\n"
        b"data:second event\nid\n\ndata:  third event\n\n",
        [
            _event("first event", last_event_id="1"),
            _event("second event", last_event_id=""),
            _event(" third event", last_event_id=""),
        ],
    ),
    # Spec example: "data" without colon appends an empty line; the last block is discarded.
    ("bare_data_fields", b"data\n\ndata\ndata\n\ndata:", [_event(""), _event("\n")]),
    # Spec example: the space after the colon is optional.
    ("optional_space", b"data:test\n\ndata: test\n\n", [_event("test"), _event("test")]),
    # Spec example: named event types.
    (
        "event_types",
        b"event: add\ndata: 73857293\n\nevent: remove\ndata: 2153\n\n",
        [_event("73857293", type_="add"), _event("2153", type_="remove")],
    ),
    # web-platform-tests eventsource/format-newlines (mixed CR, LF, CRLF; long comments).
    (
        "mixed_line_ends",
        b"data:1\r:\x00\n:\r\ndata:2\n:"
        + b"x" * 2048
        + b"\rdata:3\n:data:fail\r:"
        + b"x" * 2048
        + b"\ndata:4\n\n",
        [_event("1\n2\n3\n4")],
    ),
    # web-platform-tests eventsource/format-bom-2: only the first BOM is stripped.
    (
        "second_bom_kept",
        b"\xef\xbb\xbfdata:1\n\n\xef\xbb\xbfdata:2\n\ndata:3\n\n",
        [_event("1"), _event("3")],
    ),
    # web-platform-tests eventsource/format-bom: BOM at the start (split below as well).
    ("leading_bom", b"\xef\xbb\xbfdata:1\n\n", [_event("1")]),
    # web-platform-tests eventsource/format-field-event-empty: empty type means "message".
    ("empty_event_type", b"event: \ndata:data\n\n", [_event("data")]),
    # web-platform-tests eventsource/format-field-retry: no final blank line -> not dispatched.
    (
        "retry_then_cut",
        b"retry:1000\ndata:test1\n\nid:test\ndata:test2",
        [ServerSentEvent("message", "test1", "", 1000)],
    ),
    # web-platform-tests eventsource/format-null-character: NUL is kept in data.
    ("nul_in_data", b"data:\x00\n\n", [_event("\x00")]),
]

VECTOR_IDS = [name for name, _, _ in SPEC_VECTORS]


@pytest.mark.parametrize(("name", "stream", "expected"), SPEC_VECTORS, ids=VECTOR_IDS)
def test_spec_vector_fed_whole(name: str, stream: bytes, expected: list[ServerSentEvent]) -> None:
    assert _parse([stream]) == expected


@pytest.mark.parametrize(("name", "stream", "expected"), SPEC_VECTORS, ids=VECTOR_IDS)
def test_spec_vector_fed_byte_by_byte(
    name: str, stream: bytes, expected: list[ServerSentEvent]
) -> None:
    assert _parse(stream[i : i + 1] for i in range(len(stream))) == expected


@pytest.mark.parametrize(("name", "stream", "expected"), SPEC_VECTORS, ids=VECTOR_IDS)
def test_spec_vector_split_in_two_at_every_offset(
    name: str, stream: bytes, expected: list[ServerSentEvent]
) -> None:
    for offset in range(len(stream) + 1):
        got = _parse([stream[:offset], stream[offset:]])
        assert got == expected, f"split at byte {offset}"


def test_bom_split_across_chunks() -> None:
    # web-platform-tests eventsource/format-bom, bytes split as listed in SOURCES.md section 3.
    assert _parse([b"\xef", b"\xbb\xbfdata:1\n\n"]) == [_event("1")]


def test_cr_at_chunk_end_and_lf_at_next_start_are_one_line_end() -> None:
    # Spec "Parsing an event stream": CRLF is one end of line. Splitting it must not
    # create an empty line, which would dispatch "a" on its own.
    parser = EventStreamParser()
    assert parser.feed(b"data:a\r") == []
    assert parser.feed(b"\ndata:b\r") == []
    assert parser.feed(b"\n\r") == [_event("a\nb")]
    assert parser.feed(b"\n") == []


def test_lone_cr_line_ends() -> None:
    # Spec "Parsing an event stream": CR alone ends a line.
    assert _parse([b"data:a\r\rdata:b\r\r"]) == [_event("a"), _event("b")]


def test_event_is_dispatched_as_soon_as_its_blank_line_arrives() -> None:
    # Timing matters for TTFT: the CR of a CRLF already completes the line.
    parser = EventStreamParser()
    assert parser.feed(b"data: token\r\n\r") == [_event("token")]


def test_other_ascii_separators_are_not_line_ends() -> None:
    # Spec: only CR, LF and CRLF end lines; VT, FF, FS and NEL stay in the data.
    stream = "data:a\x0bb\x0cc\x1cd\x85e\u2028f\n\n".encode()
    assert _parse([stream]) == [_event("a\x0bb\x0cc\x1cd\x85e\u2028f")]


def test_invalid_utf8_becomes_replacement_characters() -> None:
    # Spec: UTF-8 decode with replacement (one U+FFFD per maximal invalid subpart).
    assert _parse([b"data:\xff\xe2\x82\n\n"]) == [_event("\ufffd\ufffd")]


def test_multibyte_character_split_across_chunks() -> None:
    raw = "data: é€𝄞\n\n".encode()
    for offset in range(len(raw) + 1):
        assert _parse([raw[:offset], raw[offset:]]) == [_event("é€𝄞")]


def test_bom_is_stripped_once_only_at_stream_start() -> None:
    # Spec: the UTF-8 decode algorithm strips one leading BOM; later ones are text.
    assert _parse([b"data:\xef\xbb\xbfx\n\n"]) == [_event("\ufeffx")]
    # A second BOM at the start makes the field name "\ufeffdata", an unknown field.
    assert _parse([b"\xef\xbb\xbf\xef\xbb\xbfdata:1\n\n"]) == []
    # A truncated BOM is not a BOM: it decodes to U+FFFD and spoils the field name.
    assert _parse([b"\xef\xbbdata:1\n\ndata:2\n\n"]) == [_event("2")]


def test_field_without_colon_and_unknown_fields() -> None:
    stream = b"event\nfoo: bar\ndata: x\nDATA: y\n data: z\n\n"
    assert _parse([stream]) == [_event("x")]


def test_only_one_leading_space_is_removed_from_values() -> None:
    assert _parse([b"event:  two\ndata:\t tab\n\n"]) == [_event("\t tab", type_=" two")]


def test_empty_data_buffer_dispatches_nothing_but_still_sets_last_event_id() -> None:
    # Spec "dispatch the event": the last event ID string is set before the empty-data check.
    parser = EventStreamParser()
    assert parser.feed(b"id: 7\nevent: ping\n\n") == []
    assert parser.last_event_id == "7"
    # The event type buffer was reset by that dispatch.
    assert parser.feed(b"data: x\n\n") == [_event("x", last_event_id="7")]


def test_id_containing_nul_is_ignored() -> None:
    # Spec "Interpreting an event stream": an id value with U+0000 NULL is ignored.
    stream = b"id: 1\n\nid: a\x00b\ndata: x\n\n"
    assert _parse([stream]) == [_event("x", last_event_id="1")]


@pytest.mark.parametrize(
    ("retry_line", "expected"),
    [
        (b"retry: 2500", 2500),  # one leading space removed, then digits only
        (b"retry:0", 0),
        (b"retry:10a", 300),
        (b"retry:", 300),
        (b"retry: -5", 300),
        (b"retry:  25", 300),  # the second space is part of the value
        (b"retry: 1.5", 300),
        ("retry: ١٢".encode(), 300),  # non-ASCII digits do not count
    ],
)
def test_retry_accepts_ascii_digits_only(retry_line: bytes, expected: int) -> None:
    # Spec "Interpreting an event stream", field "retry".
    parser = EventStreamParser()
    assert parser.retry_ms is None
    parser.feed(b"retry: 300\n")
    assert parser.feed(retry_line + b"\ndata: x\n\n") == [
        ServerSentEvent("message", "x", "", expected)
    ]
    assert parser.retry_ms == expected


def test_pending_event_is_discarded_at_end_of_stream() -> None:
    parser = EventStreamParser()
    assert parser.feed(b"data: done\n\nid: 9\ndata: cut") == [_event("done")]
    assert parser.finish() == []
    # The id of the discarded block never took effect.
    assert parser.last_event_id == ""


def test_parser_takes_a_new_stream_after_finish() -> None:
    parser = EventStreamParser()
    assert parser.feed(b"retry: 50\nid: 3\ndata: a\n\ndata: partial") == [
        ServerSentEvent("message", "a", "3", 50)
    ]
    assert parser.finish() == []
    # A reconnected stream may start with a BOM again; id and retry carry over.
    assert parser.feed(b"\xef\xbb\xbf\ndata: b\n\n") == [ServerSentEvent("message", "b", "3", 50)]


def test_empty_chunks_change_nothing() -> None:
    assert _parse([b"", b"data:a\r", b"", b"\n", b"", b"\n", b""]) == [_event("a")]


def test_long_line_in_small_chunks() -> None:
    payload = "x" * 100_000
    raw = f"data: {payload}\n\n".encode()
    chunks = [raw[i : i + 7] for i in range(0, len(raw), 7)]
    assert _parse(chunks) == [_event(payload)]


def test_server_sent_event_is_immutable() -> None:
    event = _event("x")
    with pytest.raises(dataclasses.FrozenInstanceError):
        event.data = "y"  # type: ignore[misc]


# --- property tests ---------------------------------------------------------------------


def _reference_parse(stream: bytes) -> list[ServerSentEvent]:
    """A direct transcription of the spec, on the whole stream at once (slow, plain).

    WHATWG HTML "Parsing an event stream" and "Interpreting an event stream".
    """
    text = stream.decode("utf-8", "replace")
    if text.startswith("\ufeff"):
        text = text[1:]
    lines = re.split(r"\r\n|\r|\n", text)
    lines.pop()  # text after the last line end is not a line: discarded at end of stream
    events: list[ServerSentEvent] = []
    data_buffer = ""
    event_type = ""
    id_buffer = ""
    retry: int | None = None
    for line in lines:
        if line == "":
            if data_buffer == "":
                event_type = ""
                continue
            if data_buffer.endswith("\n"):
                data_buffer = data_buffer[:-1]
            events.append(ServerSentEvent(event_type or "message", data_buffer, id_buffer, retry))
            data_buffer = ""
            event_type = ""
            continue
        if line.startswith(":"):
            continue
        if ":" in line:
            field, value = line.split(":", 1)
            if value.startswith(" "):
                value = value[1:]
        else:
            field, value = line, ""
        if field == "event":
            event_type = value
        elif field == "data":
            data_buffer += value + "\n"
        elif field == "id":
            if "\x00" not in value:
                id_buffer = value
        elif field == "retry" and value and all(c in "0123456789" for c in value):
            retry = int(value)
    return events


_FIELD_NAMES = ["data", "event", "id", "retry", "", "dat", "Data", "x", "data "]
_line_ends = st.sampled_from([b"\n", b"\r", b"\r\n"])
_values = st.one_of(
    st.text(max_size=12),
    st.sampled_from(["", " ", "  x", "42", "\x00", "\ufeff", "é€", "[DONE]", '{"a": 1}']),
    st.from_regex(r"[0-9]{1,6}", fullmatch=True),
)


@st.composite
def _lines(draw: st.DrawFn) -> bytes:
    kind = draw(st.sampled_from(["field", "field", "field", "blank", "comment", "raw"]))
    if kind == "blank":
        body = b""
    elif kind == "comment":
        body = b":" + draw(_values).encode()
    elif kind == "raw":
        body = draw(st.binary(max_size=8))
    else:
        name = draw(st.sampled_from(_FIELD_NAMES))
        separator = draw(st.sampled_from(["", ":", ": ", ":  "]))
        value = draw(_values) if separator else ""
        body = (name + separator + value).encode()
    return body + draw(_line_ends)


@st.composite
def _streams(draw: st.DrawFn) -> bytes:
    bom = draw(st.sampled_from([b"", b"", b"\xef\xbb\xbf", b"\xef\xbb"]))
    body = b"".join(draw(st.lists(_lines(), max_size=25)))
    tail = draw(st.sampled_from([b"", b"\n", b"data: cut", b"\r"]))
    return bom + body + tail


def _split(stream: bytes, offsets: Sequence[int]) -> list[bytes]:
    cuts = sorted({min(offset, len(stream)) for offset in offsets})
    bounds = [0, *cuts, len(stream)]
    return [stream[start:end] for start, end in itertools.pairwise(bounds)]


@settings(max_examples=300, deadline=None)
@given(stream=_streams(), offsets=st.lists(st.integers(min_value=0, max_value=400), max_size=12))
def test_any_chunking_gives_the_whole_feed_result(stream: bytes, offsets: list[int]) -> None:
    assert _parse(_split(stream, offsets)) == _parse([stream])


@settings(max_examples=300, deadline=None)
@given(stream=_streams())
def test_whole_feed_matches_a_plain_transcription_of_the_spec(stream: bytes) -> None:
    assert _parse([stream]) == _reference_parse(stream)


@settings(max_examples=200, deadline=None)
@given(stream=st.binary(max_size=200), offsets=st.lists(st.integers(0, 200), max_size=8))
def test_arbitrary_bytes_chunked_match_the_transcription(stream: bytes, offsets: list[int]) -> None:
    assert _parse(_split(stream, offsets)) == _reference_parse(stream)
