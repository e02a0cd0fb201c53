"""Opt-in benchmark: events per second through the server-sent-events parser.

Typical streamed chat-completions chunks (about 200 bytes each, ``data: {json}`` and a
blank line), fed one event per chunk, several per chunk, split mid-event, and with CRLF
line ends. Each case runs a fixed number of events, three times, and prints the best.
Run with: pytest -m bench -s tests/bench/test_sse_speed.py. No timed asserts.
"""

from __future__ import annotations

import json
import time

import pytest

from loadrun.sse import EventStreamParser

EVENTS_PER_CASE = 200_000
REPEATS = 3


def _chunk_event(index: int, line_end: bytes = b"\n") -> bytes:
    chunk = {
        "id": "chatcmpl-orchard-0042",
        "object": "chat.completion.chunk",
        "created": 1_760_000_000,
        "model": "quillfinch-7b-chat",
        "choices": [
            {"index": 0, "delta": {"content": f" word{index % 97}"}, "finish_reason": None}
        ],
    }
    body = json.dumps(chunk, separators=(",", ":")).encode()
    return b"data: " + body + line_end + line_end


def _feeds(events_per_feed: int, split: bool, line_end: bytes) -> list[bytes]:
    """Chunks that together carry EVENTS_PER_CASE events, cycling 97 distinct bodies."""
    events = [_chunk_event(index, line_end) for index in range(97)]
    feeds: list[bytes] = []
    for start in range(0, EVENTS_PER_CASE, events_per_feed):
        count = min(events_per_feed, EVENTS_PER_CASE - start)
        joined = b"".join(events[(start + i) % 97] for i in range(count))
        if split:
            middle = len(joined) // 2
            feeds += [joined[:middle], joined[middle:]]
        else:
            feeds.append(joined)
    return feeds


def _run_once(feeds: list[bytes]) -> tuple[int, float]:
    parser = EventStreamParser()
    dispatched = 0
    started = time.perf_counter_ns()
    for chunk in feeds:
        dispatched += len(parser.feed(chunk))
    elapsed_s = (time.perf_counter_ns() - started) / 1e9
    return dispatched, elapsed_s


@pytest.mark.bench
def test_sse_parser_events_per_second() -> None:
    cases = [
        ("1 event per feed, LF", 1, False, b"\n"),
        ("8 events per feed, LF", 8, False, b"\n"),
        ("1 event split in 2 feeds", 1, True, b"\n"),
        ("1 event per feed, CRLF", 1, False, b"\r\n"),
    ]
    print()
    print(f"{'case':<26} {'bytes/event':>11} {'events/s':>10} {'us/event':>9} {'MB/s':>7}")
    for name, per_feed, split, line_end in cases:
        feeds = _feeds(per_feed, split, line_end)
        total_bytes = sum(len(chunk) for chunk in feeds)
        best_s = float("inf")
        for _ in range(REPEATS):
            dispatched, elapsed_s = _run_once(feeds)
            assert dispatched == EVENTS_PER_CASE  # correctness, not timing
            best_s = min(best_s, elapsed_s)
        print(
            f"{name:<26} {total_bytes / EVENTS_PER_CASE:>11.0f} "
            f"{EVENTS_PER_CASE / best_s:>10.0f} {best_s / EVENTS_PER_CASE * 1e6:>9.2f} "
            f"{total_bytes / best_s / 1e6:>7.1f}"
        )
