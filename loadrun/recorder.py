"""Recorder: Records in, histograms, counters and per-second windows out.

The receive path only appends a finished Record (and writes its line to disk); the
histograms are filled in bulk by ``absorb()``, called periodically and at the end, so
that recording never competes with reading the next chunk. What is kept per request for
the window's figures lives in typed arrays (about 60 bytes a request, 0.8 kB a second of
token slots), so a long run's memory stays nearly flat.
"""

from __future__ import annotations

from array import array
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from statistics import median
from typing import Any

from loadrun.metrics import LATENCY_METRICS, HistogramSet, LatencyHistogram
from loadrun.record import Outcome, Record
from loadrun.slo import Slo

NS_PER_US = 1000
NS_PER_S = 1_000_000_000
TOKEN_BUCKET_NS = 10_000_000
"""Output tokens are placed in 10 ms slots by arrival time for the window's token rate."""


@dataclass(slots=True)
class _Window:
    """One second of the run, by completion time."""

    completed: int = 0
    ok: int = 0
    failed: int = 0
    output_tokens: int = 0
    ttft_us: array[int] = field(default_factory=lambda: array("q"))
    e2e_us: array[int] = field(default_factory=lambda: array("q"))


class Recorder:
    def __init__(
        self,
        origin_ns: int,
        *,
        slos: Sequence[Slo] = (),
        sink: Callable[[Record], None] | None = None,
    ) -> None:
        self.origin_ns = origin_ns
        self.slos = tuple(slos)
        self._sink = sink
        self._pending: list[Record] = []
        self.histograms = HistogramSet()
        self.receive_error = LatencyHistogram()
        self.send_lag = LatencyHistogram()
        self.outcomes: Counter[str] = Counter()
        self.warmup_outcomes: Counter[str] = Counter()
        self.token_sources: Counter[str] = Counter()
        self.errors: Counter[str] = Counter()
        self.windows: dict[int, _Window] = {}
        self._span_starts = array("q")
        self._span_ends = array("q")
        self._span_flags = array("b")
        self._span_prompts = array("q")
        """Every request: start, end, flags (ok, and 2 if within every SLO), input tokens."""
        self._first_slot = origin_ns // TOKEN_BUCKET_NS
        self._token_slots = array("d")
        """Output tokens of successful requests by arrival time, in TOKEN_BUCKET_NS slots
        counted from the origin's (tokens before the origin are never in a window)."""
        self.output_tokens_measured = 0
        self.input_tokens_total = 0
        self.input_tokens_reported = 0

    # receive path -------------------------------------------------------------------
    def add(self, record: Record) -> None:
        self._pending.append(record)
        if self._sink is not None:
            self._sink(record)

    # bulk path ------------------------------------------------------------------------
    def absorb(self) -> None:
        pending, self._pending = self._pending, []
        for record in pending:
            self._absorb_one(record)

    def _absorb_one(self, record: Record) -> None:
        ok = record.outcome is Outcome.OK
        met = ok and all(slo.met_by(record) for slo in self.slos)
        # Every request, warm-up ones too, counts for throughput by the share of it that
        # falls inside the window (work the target did in the window).
        self._span_starts.append(record.intended_ns)
        self._span_ends.append(record.end_ns)
        self._span_flags.append(int(ok) | (2 if met else 0))
        self._span_prompts.append(record.prompt_tokens or 0)
        if ok:
            self._add_token_times(record)
        if not record.in_window:
            self.warmup_outcomes[record.outcome.value] += 1
            return
        self.outcomes[record.outcome.value] += 1
        for error_us in record.receive_error_us:
            self.receive_error.record_us(max(0, error_us))
        self.send_lag.record_us(record.send_lag_ns // NS_PER_US)
        window = self.windows.setdefault(max(0, (record.end_ns - self.origin_ns) // NS_PER_S), _Window())
        window.completed += 1
        if not ok:
            window.failed += 1
            if record.error:
                self.errors[_first_words(record.error)] += 1
            return
        window.ok += 1
        window.output_tokens += record.output_tokens
        self.output_tokens_measured += record.output_tokens
        self.token_sources[record.token_source.value] += 1
        if record.prompt_tokens is not None:
            self.input_tokens_total += record.prompt_tokens
            self.input_tokens_reported += 1
        hist = self.histograms
        ttft = record.ttft_ns
        if ttft is not None:
            hist.record_us("ttft", ttft // NS_PER_US)
            window.ttft_us.append(ttft // NS_PER_US)
        e2e = record.e2e_ns
        if e2e is not None:
            hist.record_us("e2e", e2e // NS_PER_US)
            window.e2e_us.append(e2e // NS_PER_US)
        tpot = record.tpot_ns
        if tpot is not None:
            hist.record_us("tpot", tpot // NS_PER_US)
        for gap in record.itl_ns():
            hist.record_us("itl", gap // NS_PER_US)

    def _add_token_times(self, record: Record) -> None:
        slots = self._token_slots
        times = record.chunk_ns or [record.end_ns]
        weight = record.output_tokens / len(times)
        first = self._first_slot
        for ts in times:
            index = ts // TOKEN_BUCKET_NS - first
            if index < 0:
                continue
            if index >= len(slots):
                slots.frombytes(bytes(8 * (index + 1 - len(slots))))
            slots[index] += weight

    def _in_window(self, start_ns: int, end_ns: int) -> tuple[float, float, float, int]:
        """(ok requests, requests within every SLO, input tokens, completions) in the window.

        A request counts by the share of its duration inside the window, so a short window
        is not quantised to whole requests; in a steady state this equals completions per
        second, with less noise.
        """
        ok = met = input_tokens = 0.0
        completions = 0
        spans = zip(self._span_starts, self._span_ends, self._span_flags, self._span_prompts, strict=True)
        for start, end, flags, prompt in spans:
            if start_ns <= end <= end_ns:
                completions += 1
            if not flags & 1:
                continue
            overlap = min(end, end_ns) - max(start, start_ns)
            if overlap <= 0:
                continue
            share = overlap / max(1, end - start)
            ok += share
            input_tokens += share * prompt
            if flags & 2:
                met += share
        return ok, met, input_tokens, completions

    def _tokens_in_window(self, start_ns: int, end_ns: int) -> float:
        first = max(0, start_ns // TOKEN_BUCKET_NS - self._first_slot)
        last = max(first, end_ns // TOKEN_BUCKET_NS - self._first_slot)
        return sum(self._token_slots[first:last])

    # summary --------------------------------------------------------------------------
    def summary(self, window_start_ns: int, window_end_ns: int) -> dict[str, Any]:
        self.absorb()
        seconds = max(1e-9, (window_end_ns - window_start_ns) / NS_PER_S)
        ok_requests, met_requests, input_tokens, completions = self._in_window(window_start_ns, window_end_ns)
        output_tokens = self._tokens_in_window(window_start_ns, window_end_ns)
        measured = sum(self.outcomes.values())
        ok_total = self.outcomes.get(Outcome.OK.value, 0)
        summary: dict[str, Any] = {
            "window": {
                "start_s": round((window_start_ns - self.origin_ns) / NS_PER_S, 6),
                "end_s": round((window_end_ns - self.origin_ns) / NS_PER_S, 6),
                "seconds": round(seconds, 6),
            },
            "requests": {
                "measured": measured,
                "ok": ok_total,
                "failed": measured - ok_total,
                "by_outcome": dict(sorted(self.outcomes.items())),
                "warmup": sum(self.warmup_outcomes.values()),
                "completed_in_window": completions,
                "top_errors": dict(self.errors.most_common(5)),
            },
            "throughput": {
                "requests_per_s": ok_requests / seconds,
                "output_tokens_per_s": output_tokens / seconds,
                "input_tokens_per_s": input_tokens / seconds,
            },
            "latency": self.histograms.summary(),
            "tokens": {
                "output_mean": self.output_tokens_measured / ok_total if ok_total else None,
                "sources": dict(sorted(self.token_sources.items())),
                "input_mean_reported": (
                    self.input_tokens_total / self.input_tokens_reported
                    if self.input_tokens_reported
                    else None
                ),
            },
            "windows": self._windows_json(),
            "histograms": self.histograms.encode(),
        }
        if self.slos:
            summary["goodput"] = {
                "slos": [slo.label() for slo in self.slos],
                "requests_per_s": met_requests / seconds,
                "share_of_ok": met_requests / ok_requests if ok_requests else None,
            }
        return summary

    def _windows_json(self) -> list[dict[str, Any]]:
        rows = []
        for second in sorted(self.windows):
            window = self.windows[second]
            rows.append(
                {
                    "second": second,
                    "completed": window.completed,
                    "ok": window.ok,
                    "failed": window.failed,
                    "output_tokens": window.output_tokens,
                    "ttft_p50_ms": _ms(median(window.ttft_us)) if window.ttft_us else None,
                    "e2e_p50_ms": _ms(median(window.e2e_us)) if window.e2e_us else None,
                }
            )
        return rows


def _ms(us: float) -> float:
    return round(us / 1000, 3)


def _first_words(message: str) -> str:
    return message if len(message) <= 120 else message[:117] + "..."


__all__ = ["LATENCY_METRICS", "Recorder"]
