"""Merging the summaries of a level's shards into one ordinary summary.

Latency histograms merge with HdrHistogram ``add`` (exact: percentiles of the merge are
those of one histogram that saw every sample). Counts and rates add up, since the
shards' windows are aligned by the agreed start; per-second windows add up by second,
their medians are taken again over every shard's records. The generator section keeps
the worst shard's figures, so one saturated worker flags the whole run. Per-shard
figures stay in the summary under ``workers``.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from statistics import median
from typing import Any

from loadrun.class_tally import merge_class_summaries
from loadrun.generator_health import assess_generator
from loadrun.metrics import HistogramSet
from loadrun.store import read_records

__all__ = ["merge_summaries", "window_medians"]


def merge_summaries(summaries: Sequence[Mapping[str, Any]]) -> dict[str, Any]:
    """One summary of the measured part of several shards (at least one)."""
    if not summaries:
        raise ValueError("nothing to merge")
    first = summaries[0]
    histograms = HistogramSet.decode(first["histograms"])
    for summary in summaries[1:]:
        histograms.merge(HistogramSet.decode(summary["histograms"]))
    ok = [int(s["requests"]["ok"]) for s in summaries]
    merged: dict[str, Any] = {
        "interrupted": any(s.get("interrupted") for s in summaries),
        "aborted": "; ".join(str(s["aborted"]) for s in summaries if s.get("aborted")) or None,
        "sent": sum(int(s.get("sent") or 0) for s in summaries),
        "window": {
            "start_s": min(s["window"]["start_s"] for s in summaries),
            "end_s": max(s["window"]["end_s"] for s in summaries),
            "seconds": max(s["window"]["seconds"] for s in summaries),
        },
        "requests": _merge_requests([s["requests"] for s in summaries]),
        "throughput": _sum_numbers([s["throughput"] for s in summaries]),
        "latency": histograms.summary(),
        "tokens": {
            "output_mean": _weighted([s["tokens"]["output_mean"] for s in summaries], ok),
            "sources": dict(sorted(_add_counts(s["tokens"]["sources"] for s in summaries).items())),
            "input_mean_reported": _weighted([s["tokens"]["input_mean_reported"] for s in summaries], ok),
        },
        "windows": _merge_windows([s["windows"] for s in summaries]),
        "histograms": histograms.encode(),
        "little": {
            "implied_concurrency": _sum_or_none(s["little"]["implied_concurrency"] for s in summaries),
        },
        "generator": _merge_generator([s["generator"] for s in summaries]),
        "cancelled_in_flight": sum(int(s.get("cancelled_in_flight") or 0) for s in summaries),
    }
    if all("goodput" in s for s in summaries):
        goodput = sum(float(s["goodput"]["requests_per_s"]) for s in summaries)
        throughput = float(merged["throughput"]["requests_per_s"])
        merged["goodput"] = {
            "slos": first["goodput"]["slos"],
            "requests_per_s": goodput,
            "share_of_ok": goodput / throughput if throughput else None,
        }
    if all("arrivals" in s for s in summaries):
        merged["arrivals"] = _merge_arrivals([s["arrivals"] for s in summaries])
    if all("retries" in s for s in summaries):
        retries = [s["retries"] for s in summaries]
        merged["retries"] = {
            "sent": sum(int(r["sent"]) for r in retries),
            "recovered": sum(int(r["recovered"]) for r in retries),
            "by_outcome": dict(sorted(_add_counts(r["by_outcome"] for r in retries).items())),
            "waited_s": round(sum(float(r["waited_s"]) for r in retries), 6),
        }
    merged.update(merge_class_summaries([s.get("classes") or {} for s in summaries]))
    return merged


def window_medians(records_files: Iterable[Path]) -> dict[int, tuple[float | None, float | None]]:
    """Per second of the window: the median TTFT and E2E (ms) over the measured successful
    requests of every shard's records (the same rule as the recorder's windows)."""
    ttft: dict[int, list[int]] = {}
    e2e: dict[int, list[int]] = {}
    for path in records_files:
        for row in read_records(path):
            if not row.get("in_window") or row.get("outcome") != "ok" or row.get("end_us") is None:
                continue
            second = max(0, int(row["end_us"]) // 1_000_000)
            intended = int(row["intended_us"])
            if row.get("first_token_us") is not None:
                ttft.setdefault(second, []).append(int(row["first_token_us"]) - intended)
            e2e.setdefault(second, []).append(int(row["end_us"]) - intended)
    seconds = set(ttft) | set(e2e)
    return {
        second: (
            round(median(ttft[second]) / 1000, 3) if second in ttft else None,
            round(median(e2e[second]) / 1000, 3) if second in e2e else None,
        )
        for second in seconds
    }


def _add_counts(counts: Iterable[Mapping[str, int]]) -> Counter[str]:
    total: Counter[str] = Counter()
    for each in counts:
        total.update({key: int(value) for key, value in each.items()})
    return total


def _sum_numbers(parts: Sequence[Mapping[str, Any]]) -> dict[str, Any]:
    return {key: sum(float(part[key]) for part in parts) for key in parts[0]}


def _sum_or_none(values: Iterable[float | None]) -> float | None:
    numbers = list(values)
    return (
        None if any(value is None for value in numbers) else sum(float(v) for v in numbers if v is not None)
    )


def _weighted(values: Sequence[float | None], weights: Sequence[int]) -> float | None:
    pairs = [
        (float(value), weight) for value, weight in zip(values, weights, strict=True) if value is not None
    ]
    total = sum(weight for _, weight in pairs)
    return sum(value * weight for value, weight in pairs) / total if total else None


def _merge_requests(parts: Sequence[Mapping[str, Any]]) -> dict[str, Any]:
    measured = sum(int(p["measured"]) for p in parts)
    ok = sum(int(p["ok"]) for p in parts)
    return {
        "measured": measured,
        "ok": ok,
        "failed": measured - ok,
        "by_outcome": dict(sorted(_add_counts(p["by_outcome"] for p in parts).items())),
        "warmup": sum(int(p["warmup"]) for p in parts),
        "completed_in_window": sum(int(p["completed_in_window"]) for p in parts),
        "top_errors": dict(_add_counts(p["top_errors"] for p in parts).most_common(5)),
    }


def _merge_windows(parts: Sequence[Sequence[Mapping[str, Any]]]) -> list[dict[str, Any]]:
    by_second: dict[int, dict[str, Any]] = {}
    for windows in parts:
        for window in windows:
            row = by_second.setdefault(
                int(window["second"]),
                {"second": int(window["second"]), "completed": 0, "ok": 0, "failed": 0, "output_tokens": 0},
            )
            for key in ("completed", "ok", "failed", "output_tokens"):
                row[key] += int(window[key])
    # Medians do not add: they are filled in from the records (window_medians) when at hand.
    return [{**by_second[second], "ttft_p50_ms": None, "e2e_p50_ms": None} for second in sorted(by_second)]


def _merge_generator(parts: Sequence[Mapping[str, Any]]) -> dict[str, Any]:
    """The worst shard's figure for each sign, judged again; the samples add up."""
    worst: dict[str, Any] = {}
    for key in (
        "loop_lag_p50_ms",
        "loop_lag_p99_ms",
        "loop_lag_max_ms",
        "receive_error_p50_ms",
        "receive_error_p99_ms",
        "send_lag_p99_ms",
        "cpu_share",
        "cpu_s",
        "wall_s",
    ):
        values = [float(p[key]) for p in parts if p.get(key) is not None]
        worst[key] = max(values) if values else None
    worst["receive_error_samples"] = sum(int(p.get("receive_error_samples") or 0) for p in parts)
    worst["behind"] = any(p.get("behind") for p in parts) if any("behind" in p for p in parts) else None
    if worst["behind"] is None:
        del worst["behind"]
    judged = assess_generator(worst)
    judged["limited"] = judged["limited"] or any(p.get("limited") for p in parts)
    judged["limited_workers"] = [index for index, p in enumerate(parts) if p.get("limited")]
    return judged


def _merge_arrivals(parts: Sequence[Mapping[str, Any]]) -> dict[str, Any]:
    first = parts[0]
    merged: dict[str, Any] = {key: first[key] for key in ("arrival",) if key in first}
    if first.get("rate_per_s") is not None:
        merged["rate_per_s"] = sum(float(p["rate_per_s"]) for p in parts)
    if "burst_cv" in first:
        merged["burst_cv"] = first["burst_cv"]
    for key in ("in_flight_cap", "due", "sent", "not_sent", "refused", "late_sends"):
        merged[key] = sum(int(p[key]) for p in parts)
    merged["due_per_s"] = sum(float(p["due_per_s"]) for p in parts)
    for key in ("send_lag_p50_ms", "send_lag_p99_ms", "send_lag_max_ms"):
        values = [float(p[key]) for p in parts if p.get(key) is not None]
        merged[key] = max(values) if values else None  # the worst shard's: percentiles do not add
    merged["behind"] = any(p.get("behind") for p in parts)
    notes = [f"worker w{index}: {p['note']}" for index, p in enumerate(parts) if p.get("note")]
    merged["note"] = "; ".join(notes) or None
    return merged
