"""Recorder: Records in, histograms, counters and per-second windows out.

The receive path only appends a finished Record (and writes its line to disk); the
histograms are filled in bulk by ``absorb()``, called periodically and at the end, so
that recording never competes with reading the next chunk.
"""

from __future__ import annotations

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


@dataclass(slots=True)
class _Window:
    """One second of the run, by completion time."""

    completed: int = 0
    ok: int = 0
    failed: int = 0
    output_tokens: int = 0
    ttft_us: list[int] = field(default_factory=list)
    e2e_us: list[int] = field(default_factory=list)


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
        self._ends: list[tuple[int, int, int, bool, bool]] = []
        """Every completion as (end, output tokens, input tokens, ok, met all SLOs)."""
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
        if not record.in_window:
            # Sent during warm-up: no latency sample, but a completion inside the window
            # is still work the target did in the window and counts for throughput.
            self.warmup_outcomes[record.outcome.value] += 1
            self._ends.append(
                (record.end_ns, record.output_tokens if ok else 0, record.prompt_tokens or 0, ok, met)
            )
            return
        self.outcomes[record.outcome.value] += 1
        for error_us in record.receive_error_us:
            self.receive_error.record_us(max(0, error_us))
        self.send_lag.record_us(record.send_lag_ns // NS_PER_US)
        window = self.windows.setdefault(max(0, (record.end_ns - self.origin_ns) // NS_PER_S), _Window())
        window.completed += 1
        self._ends.append(
            (record.end_ns, record.output_tokens if ok else 0, record.prompt_tokens or 0, ok, met)
        )
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

    # summary --------------------------------------------------------------------------
    def summary(self, window_start_ns: int, window_end_ns: int) -> dict[str, Any]:
        self.absorb()
        seconds = max(1e-9, (window_end_ns - window_start_ns) / NS_PER_S)
        done_in_window = [e for e in self._ends if window_start_ns <= e[0] <= window_end_ns]
        ok_in_window = [e for e in done_in_window if e[3]]
        measured = sum(self.outcomes.values())
        ok_total = self.outcomes.get(Outcome.OK.value, 0)
        output_tokens = sum(e[1] for e in ok_in_window)
        input_tokens = sum(e[2] for e in ok_in_window)
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
                "completed_in_window": len(done_in_window),
                "top_errors": dict(self.errors.most_common(5)),
            },
            "throughput": {
                "requests_per_s": len(ok_in_window) / seconds,
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
            met = sum(1 for e in done_in_window if e[4])
            summary["goodput"] = {
                "slos": [slo.label() for slo in self.slos],
                "requests_per_s": met / seconds,
                "share_of_completed": met / len(done_in_window) if done_in_window else None,
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
