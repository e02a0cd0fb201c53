"""The terminal view. Every rich import of the project lives here."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from rich.console import Console
from rich.table import Table

from loadrun.metrics import LATENCY_METRICS

_PERCENTILE_KEYS = ("p50_ms", "p90_ms", "p95_ms", "p99_ms", "p99.9_ms", "mean_ms")
_METRIC_TITLES = {
    "ttft": "time to first token",
    "itl": "inter-token latency",
    "tpot": "time per output token",
    "e2e": "end-to-end",
}


def console(stderr: bool = False) -> Console:
    out = Console(stderr=stderr, highlight=False, soft_wrap=True)
    if not out.is_terminal:  # piped or captured: do not squeeze tables into 80 columns
        out = Console(stderr=stderr, highlight=False, soft_wrap=True, width=120)
    return out


def say(message: str, *, stderr: bool = True) -> None:
    console(stderr).print(message, markup=False)


def render_summary(summary: dict[str, Any], out: Console | None = None) -> None:
    out = out or console()
    target = summary.get("target", {})
    load = summary.get("load", {})
    window = summary.get("window", {})
    out.print(
        f"[bold]{summary.get('profile', {}).get('name', 'run')}[/] against "
        f"[bold]{target.get('name')}[/] ({target.get('model')}) - closed loop, "
        f"concurrency {load.get('concurrency')}, measured {window.get('seconds', 0):.1f} s"
    )
    table = Table(title="latency, milliseconds", title_justify="left", show_edge=False, pad_edge=False)
    table.add_column("metric", no_wrap=True)
    for key in _PERCENTILE_KEYS:
        table.add_column(key.removesuffix("_ms"), justify="right")
    table.add_column("samples", justify="right")
    latency = summary.get("latency", {})
    for metric in LATENCY_METRICS:
        row = latency.get(metric, {})
        table.add_row(
            f"{metric}  [dim]{_METRIC_TITLES[metric]}[/]",
            *(_fmt(row.get(key)) for key in _PERCENTILE_KEYS),
            str(row.get("count", 0)),
        )
    out.print(table)
    requests = summary.get("requests", {})
    throughput = summary.get("throughput", {})
    out.print(
        f"throughput  {throughput.get('requests_per_s', 0):.2f} requests/s, "
        f"{throughput.get('output_tokens_per_s', 0):.1f} output tokens/s"
    )
    if "goodput" in summary:
        goodput = summary["goodput"]
        share = goodput.get("share_of_completed")
        share_text = f" ({share:.0%} of completed)" if share is not None else ""
        slos = ", ".join(goodput["slos"])
        out.print(f"goodput     {goodput['requests_per_s']:.2f} requests/s{share_text} within {slos}")
    outcomes = (
        ", ".join(f"{name} {count}" for name, count in requests.get("by_outcome", {}).items()) or "none"
    )
    measured, warmup = requests.get("measured", 0), requests.get("warmup", 0)
    out.print(f"requests    {measured} measured ({outcomes}); {warmup} in warm-up")
    for error, count in requests.get("top_errors", {}).items():
        out.print(f"  [red]{count} x[/] {error}", markup=True)
    tokens = summary.get("tokens", {})
    sources = ", ".join(f"{k} {v}" for k, v in tokens.get("sources", {}).items())
    if tokens.get("output_mean") is not None:
        out.print(f"tokens      {tokens['output_mean']:.1f} output per answer (counted from: {sources})")
    generator = summary.get("generator", {})
    health = "[red]GENERATOR-LIMITED: timings are not trustworthy[/]" if generator.get("limited") else "ok"
    receive = generator.get("receive_error_p99_ms")
    receive_text = f", receive error p99 {receive:.2f} ms" if receive is not None else ""
    out.print(
        f"generator   {health} (loop lag p99 {generator.get('loop_lag_p99_ms', 0):.2f} ms{receive_text})"
    )
    if summary.get("interrupted"):
        out.print("[yellow]interrupted: the summary covers what was measured until then[/]")
    if summary.get("aborted"):
        out.print(f"[red]stopped early:[/] {summary['aborted']}")
    if summary.get("run_folder"):
        out.print(f"run folder  {summary['run_folder']}")


def render_calibration(rows: Sequence[dict[str, Any]], verdict: str, out: Console | None = None) -> None:
    out = out or console()
    table = Table(title="receive timing of this machine against the bundled mock", title_justify="left")
    for column in (
        "streams",
        "events/s",
        "receive p50 ms",
        "receive p99 ms",
        "loop lag p99 ms",
        "within 1 ms",
    ):
        table.add_column(column, justify="right")
    for row in rows:
        table.add_row(
            str(row["streams"]),
            f"{row['events_per_s']:.0f}",
            _fmt(row["receive_p50_ms"]),
            _fmt(row["receive_p99_ms"]),
            _fmt(row["loop_lag_p99_ms"]),
            "yes" if row["within_limit"] else "no",
        )
    out.print(table)
    out.print(verdict)


def _fmt(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return f"{value:.3f}" if value < 10 else f"{value:.1f}"
    return str(value)
