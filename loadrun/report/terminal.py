"""The terminal view. Every rich import of the project lives here."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from rich import box
from rich.console import Console
from rich.table import Table

from loadrun.generator_health import generator_note
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
        share = goodput.get("share_of_ok")
        share_text = f" ({share:.0%} of ok requests)" if share is not None else ""
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
    cpu_share = generator.get("cpu_share")
    cpu_text = f", CPU {100 * cpu_share:.0f} % of one core" if cpu_share is not None else ""
    lag = generator.get("loop_lag_p99_ms", 0)
    out.print(f"generator   {health} (loop lag p99 {lag:.2f} ms{receive_text}{cpu_text})")
    note = generator_note(summary)
    if note is not None:
        out.print(f"            [{'red' if generator.get('limited') else 'yellow'}]{note}[/]")
    workers = summary.get("workers")
    if workers:
        state = "complete" if workers.get("complete") else "[red]INCOMPLETE[/]"
        out.print(
            f"workers     {workers['count']} ({workers['mode']}), {state}, start skew "
            f"{_ms_text(workers.get('start_skew_ms'))} (tolerance {workers['start_skew_tolerance_ms']:g} ms)"
        )
        for problem in workers.get("problems", []):
            out.print(f"            [red]{problem}[/]")
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
        "within limits",
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


_VERDICT_STYLES = {
    "pass": ("PASS", "bold green"),
    "regression": ("REGRESSION", "bold red"),
    "invalid": ("INVALID RUN", "bold yellow"),
    "no_baseline": ("NO BASELINE YET", "bold cyan"),
}


def render_gate(report: dict[str, Any], out: Console | None = None) -> None:
    """A gate's verdict: one headline, the rules against the baseline, the reasons."""
    out = out or console()
    word, style = _VERDICT_STYLES.get(report["verdict"], (report["verdict"], "bold"))
    out.print(
        f"[{style}]{word}[/]  {report['target']} / {report['profile']} ({report['profile_hash']}), "
        f"exit code {report['exit_code']}"
    )
    baseline = report.get("baseline") or {}
    if baseline.get("kind"):
        ids = ", ".join(str(i) for i in baseline.get("run_ids", []))
        out.print(f"baseline    {baseline['kind']} (runs {ids})", markup=False)
    compared = [rule for rule in report.get("rules", []) if "ratio" in rule]
    if compared:
        confidence = f"{report.get('confidence', 0.95):.0%}"
        table = Table(show_edge=False, pad_edge=False)
        columns = ("rule", "now ms", "baseline ms", "ratio", f"{confidence} interval", "rise ms", "result")
        for column in columns:
            table.add_column(column, justify="left" if column == "rule" else "right", no_wrap=True)
        for rule in compared:
            low, high = rule["ratio_interval"]
            table.add_row(
                rule["rule"],
                _fmt(rule["current_ms"]),
                _fmt(rule["baseline_ms"]),
                f"x{rule['ratio']:.3f}",
                f"x{low:.3f}..x{high:.3f}",
                f"{rule['rise_ms']:+.2f}",
                "[red]regressed[/]" if rule["regressed"] else "ok",
            )
        out.print(table)
    for rule in report.get("rules", []):
        if "ratio" not in rule and rule.get("note") and report["verdict"] in ("pass", "regression"):
            out.print(f"{rule['rule']}: {rule['note']}", markup=False)
    for reason in report.get("reasons", []):
        out.print(f"  {reason}", markup=False)
    measured = report.get("measured") or {}
    if measured.get("requests") is not None:
        out.print(
            f"requests    {measured['requests']} measured, {measured.get('failed') or 0} failed, "
            f"window {measured.get('window_s') or 0:.1f} s",
            markup=False,
        )
    if report.get("run_id") is not None:
        out.print(f"history     run {report['run_id']} in {report.get('history')}", markup=False)
    if report.get("run_folder"):
        out.print(f"run folder  {report['run_folder']}", markup=False)
    for page in report.get("pages", []):
        out.print(f"report      {page}", markup=False)


def render_history(rows: Sequence[dict[str, Any]], out: Console | None = None) -> None:
    """A listing of stored runs, oldest first (``HistoryRun.brief()`` rows)."""
    out = out or console()
    if not rows:
        out.print("no runs match")
        return
    table = Table(box=box.SIMPLE_HEAD, show_edge=False, pad_edge=False)
    columns = ("id", "started", "target", "profile", "hash", "c", "req", "fail")
    for column in (*columns, "ttft p95", "e2e p95", "verdict"):
        left = column in ("started", "target", "profile", "verdict")
        table.add_column(column, justify="left" if left else "right", no_wrap=column != "target")
    for row in rows:
        verdict = row.get("verdict") or "-"
        if row.get("pinned"):
            verdict += " (pinned)"
        table.add_row(
            str(row["id"]),
            row["started_at"][:16].replace("T", " "),
            row["target"],
            row["profile"],
            row["profile_hash"][:6],
            _fmt(row.get("concurrency")),
            _fmt(row.get("measured")),
            _fmt(row.get("failed")),
            _fmt(row.get("ttft_p95_ms")),
            _fmt(row.get("e2e_p95_ms")),
            f"[red]{verdict}[/]" if verdict.startswith("regression") else verdict,
        )
    out.print(table)
    out.print("latency percentiles in ms; hash: the profile and load, as the gate matches them", style="dim")


_SPARKS = "▁▂▃▄▅▆▇█"


def render_trend(labels: Sequence[str], rows: Sequence[dict[str, Any]], out: Console | None = None) -> None:
    """Chosen percentiles per run, oldest first, with one sparkline per percentile."""
    out = out or console()
    if not rows:
        out.print("no runs match")
        return
    for label in labels:
        values = [row["values_ms"].get(label) for row in rows]
        known = [value for value in values if value is not None]
        low, high = (min(known), max(known)) if known else (0.0, 0.0)
        out.print(f"{label:<12} {_spark(values, low, high)}  {_fmt(low)}..{_fmt(high)} ms", markup=False)
    table = Table(show_edge=False, pad_edge=False)
    for column in ("id", "started", *labels, "verdict"):
        table.add_column(column, justify="left" if column == "started" else "right")
    for row in rows:
        table.add_row(
            str(row["id"]),
            row["started_at"],
            *(_fmt(row["values_ms"].get(label)) for label in labels),
            row.get("verdict") or "-",
        )
    out.print(table)


def _spark(values: Sequence[float | None], low: float, high: float) -> str:
    marks = []
    for value in values:
        if value is None:
            marks.append(" ")
        elif high <= low:
            marks.append(_SPARKS[0])
        else:
            marks.append(_SPARKS[min(len(_SPARKS) - 1, int((value - low) / (high - low) * len(_SPARKS)))])
    return "".join(marks)


def _fmt(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return f"{value:.3f}" if value < 10 else f"{value:.1f}"
    return str(value)


_COMPARISON_COLUMNS = (
    "requests",
    "TTFT p50",
    "TTFT p90",
    "ITL p50",
    "E2E p50",
    "E2E p90",
    "req/s",
    "failed",
    "tokens per answer",
)
_VERDICT_COLORS = {"faster": "green", "slower": "red", "no difference": "dim", "mixed": "yellow"}


def render_comparison(data: dict[str, Any], out: Console | None = None) -> None:
    """A comparison: per load level the targets side by side, then one verdict per pair."""
    out = out or console()
    profile = data.get("profile", {}).get("name", "workload")
    currency = next((t["prices"]["currency"] for t in data.get("targets", []) if t.get("prices")), "USD")
    out.print(
        f"[bold]{profile}[/] on {len(data.get('targets', []))} targets, {data['settings']['rounds']} rounds"
    )
    for level in data.get("levels", []):
        table = Table(
            title=f"concurrency {level['concurrency']} (latency in ms)", title_justify="left", show_edge=False
        )
        table.add_column("target", no_wrap=True)
        for column in _COMPARISON_COLUMNS:
            table.add_column(column, justify="right")
        table.add_column(f"{currency} per 1,000 requests", justify="right")
        for name, agg in level["targets"].items():
            latency = agg.get("latency", {})
            cost = agg.get("cost")
            share = agg["requests"].get("error_share")
            table.add_row(
                name,
                str(agg["requests"]["measured"]),
                _fmt(latency.get("ttft", {}).get("p50_ms")),
                _fmt(latency.get("ttft", {}).get("p90_ms")),
                _fmt(latency.get("itl", {}).get("p50_ms")),
                _fmt(latency.get("e2e", {}).get("p50_ms")),
                _fmt(latency.get("e2e", {}).get("p90_ms")),
                _fmt(agg["throughput"]["requests_per_s"]),
                f"{share:.1%}" if share is not None else "-",
                _fmt(agg["tokens"].get("output_mean")),
                f"{cost['per_1000_requests']:.4f}"
                if cost and cost.get("per_1000_requests") is not None
                else "-",
            )
        out.print(table)
        for pair in level.get("pairs", []):
            color = _VERDICT_COLORS.get(pair["verdict"], "bold")
            out.print(f"  [{color}]{pair['verdict']:>13}[/]  {pair['sentence']}", highlight=False)
            undecided = [m for m in pair["metrics"] if m["verdict"] == "no difference" and m["more_requests"]]
            if undecided and pair["verdict"] != "no difference":
                continue
            for metric in undecided[:3]:
                ratio = f"{metric['ratio']:.3f} ({metric['ratio_low']:.3f}-{metric['ratio_high']:.3f})"
                out.print(
                    f"{'':17}{metric['metric']} p{metric['percentile']:g}: ratio {ratio}; about "
                    f"{metric['more_requests']:,} more requests per target would tell",
                    markup=False,
                )
    for caution in data.get("cautions", [])[1:]:
        out.print(f"[yellow]caution[/] {caution}", highlight=False)


def render_capacity(data: dict[str, Any], out: Console | None = None) -> None:
    """A capacity search: one row per load step, then the capacity and the advice in words."""
    out = out or console()
    target = data.get("target", {})
    slos = ", ".join(slo["label"] for slo in data.get("slos", [])) or "none"
    out.print(
        f"[bold]capacity of {target.get('name')}[/] ({target.get('model')}) - "
        f"profile {data.get('profile', {}).get('name')}, SLOs: {slos}"
    )
    slo_keys = [slo["key"] for slo in data.get("slos", [])]
    table = Table(title="load steps", title_justify="left", show_edge=False, pad_edge=False, box=box.SIMPLE)
    load_column = "in flight" if data.get("axis", "concurrency") == "concurrency" else "offered/s"
    for column in ("#", "phase", load_column, "seconds", "requests", "req/s", "out tok/s"):
        table.add_column(column, justify="right")
    for key in slo_keys:
        table.add_column(key.replace("_", " "), justify="right")
    table.add_column("verdict")
    for step in data.get("steps", []):
        values = []
        for key in slo_keys:
            item = step["slos"].get(key, {})
            value = item.get("value")
            if key == "errors":
                values.append("-" if value is None else f"{value * 100:.1f}%")
            else:
                values.append(_fmt(value))
        verdict = step["verdict"]
        style = {"over": "red", "failed": "red"}.get(verdict, "green")
        table.add_row(
            str(step["index"] + 1),
            step["phase"],
            f"{step['load']:g}",
            f"{step['measured_s']:.1f}",
            str(step["requests"]["measured"]),
            f"{step['throughput']['requests_per_s']:.1f}",
            f"{step['throughput']['output_tokens_per_s']:.0f}",
            *values,
            f"[{style}]{verdict}[/]" + (" *" if step.get("generator_limited") else ""),
        )
    out.print(table)
    capacity = data.get("capacity", {})
    if capacity.get("found"):
        band = ""
        if capacity.get("low") is not None and capacity.get("high") is not None:
            band = f" (90 % band {capacity['low']:.1f}-{capacity['high']:.1f})"
        out.print(
            f"[bold]capacity per replica: {capacity['load']:.3g} "
            f"{'in flight' if data.get('axis', 'concurrency') == 'concurrency' else 'requests/s offered'}"
            f"{band}[/], limited by "
            f"{capacity['limited_by']}"
        )
    else:
        out.print(f"[bold yellow]no capacity limit established:[/] {capacity.get('reason')}", markup=True)
    for line in data.get("advice", {}).get("lines", []):
        out.print(f"- {line}", markup=False, highlight=False)
    spent = data.get("spent", {})
    out.print(
        f"[dim]search: {spent.get('steps')} steps, {spent.get('requests')} requests, "
        f"{spent.get('seconds', 0):.0f} s; {data.get('search_ended')}[/]"
    )
    if any(step.get("generator_limited") for step in data.get("steps", [])):
        out.print("[dim]* the load generator fell behind during this step[/]")
    if data.get("run_folder"):
        plots = ", ".join(data.get("plots", [])) or "none"
        out.print(f"run folder  {data['run_folder']} (plots: {plots})", markup=False)


def _ms_text(value: float | None) -> str:
    return f"{value:.1f} ms" if value is not None else "unknown"


# --- routed mixes, pipelines, routing frontier -------------------------------------------

_MIX_KEYS = ("p50_ms", "p95_ms", "p99_ms")


def _money(value: float | None, digits: int = 6) -> str:
    return f"{value:.{digits}f}" if value is not None else "-"


def _latency_row(latency: dict[str, Any]) -> list[str]:
    return [_fmt(latency.get(metric, {}).get(key)) for metric in ("ttft", "e2e") for key in _MIX_KEYS]


def _latency_columns(table: Table) -> None:
    for metric in ("TTFT", "E2E"):
        for key in _MIX_KEYS:
            table.add_column(f"{metric} {key.removesuffix('_ms')}", justify="right")


def render_routed(data: dict[str, Any], out: Console | None = None) -> None:
    """A routed mix: the blended figures first, then each target, then the frontier table."""
    out = out or console()
    blended = data["blended"]
    cost = blended["cost"]
    currency = cost.get("currency") or ""
    routing = data.get("routing", {})
    out.print(
        f"[bold]{data['profile']['name']}[/] routed by {routing.get('by')} over "
        f"{len(data['targets'])} targets, measured {data['window']['seconds']:.1f} s"
    )
    table = Table(title="latency in ms; cost per request", title_justify="left", show_edge=False)
    table.add_column("", no_wrap=True)
    table.add_column("share", justify="right")
    table.add_column("n", justify="right")
    table.add_column("failed", justify="right")
    _latency_columns(table)
    table.add_column(f"{currency} per request", justify="right")
    table.add_column(f"{currency} per M tokens", justify="right")
    table.add_row(
        "[bold]blended mix[/]",
        "100 %",
        str(blended["requests"]["measured"]),
        str(blended["requests"]["failed"]),
        *_latency_row(blended["latency"]),
        _money(cost.get("cost_per_request")),
        _money(cost.get("cost_per_million_tokens"), 4),
    )
    for name, entry in data["targets"].items():
        share = entry.get("share_of_requests")
        bill = entry["bill"]
        table.add_row(
            name,
            f"{share:.1%}" if share is not None else "-",
            str(entry["requests"]["measured"]),
            str(entry["requests"]["failed"]),
            *_latency_row(entry["latency"]),
            _money(bill.get("cost_per_request")),
            _money(bill.get("cost_per_million_tokens"), 4),
        )
    out.print(table)
    frontier = data.get("frontier", {})
    if frontier.get("available"):
        render_frontier_table(frontier, currency, out)
        if frontier.get("caution"):
            out.print(f"[yellow]Caution:[/] {frontier['caution']}.")
    elif frontier.get("why_not"):
        out.print(f"[dim]no routing frontier: {frontier['why_not']}[/]")


def render_frontier_table(frontier: dict[str, Any], currency: str, out: Console | None = None) -> None:
    """A few splits of a routing frontier (``table`` rows of frontier.json points)."""
    out = out or console()
    table = Table(
        title=f"what-if: share of requests to {frontier['second']}, the rest to {frontier['first']} (ms)",
        title_justify="left",
        show_edge=False,
    )
    table.add_column("share", justify="right")
    for key in _MIX_KEYS:
        table.add_column(key.removesuffix("_ms"), justify="right")
    table.add_column(f"{currency} per request", justify="right")
    table.add_column(f"{currency} per M tokens", justify="right")
    table.add_column("not beaten on both", justify="center")
    for row in frontier["table"]:
        table.add_row(
            f"{row['share_second']:.0%}",
            *(_fmt(row.get(key)) for key in _MIX_KEYS),
            _money(row.get("cost_per_request")),
            _money(row.get("cost_per_million_tokens"), 4),
            "yes" if row.get("on_frontier") else "",
        )
    out.print(table)


def render_pipeline(data: dict[str, Any], out: Console | None = None) -> None:
    """A pipeline run: per stage and end to end, failures by stage, tokens and cost per run."""
    out = out or console()
    per_run = data["per_run"]
    currency = per_run.get("currency") or ""
    runs = data["end_to_end"]["runs"]
    out.print(
        f"[bold]{data['profile']['name']}[/]: {len(data['stages'])} stages, {runs['measured']} pipeline runs "
        f"measured in {data['window']['seconds']:.1f} s ({runs['failed']} failed)"
    )
    table = Table(title="latency in ms", title_justify="left", show_edge=False)
    table.add_column("stage", no_wrap=True)
    table.add_column("target", no_wrap=True)
    table.add_column("n", justify="right")
    table.add_column("error share", justify="right")
    _latency_columns(table)
    table.add_column("tokens per request", justify="right")
    for name, stage in data["stages"].items():
        share = stage.get("error_share")
        table.add_row(
            name,
            stage["target"],
            str(stage["requests"]["measured"]),
            f"{share:.1%}" if share is not None else "-",
            *_latency_row(stage["latency"]),
            _fmt(stage.get("tokens_per_request")),
        )
    failed = runs["failed"] / runs["measured"] if runs["measured"] else None
    table.add_row(
        "[bold]end to end[/]",
        "",
        str(runs["measured"]),
        f"{failed:.1%}" if failed is not None else "-",
        *_latency_row(data["end_to_end"]["latency"]),
        _fmt(per_run.get("tokens")),
    )
    out.print(table)
    failures = [
        f"{name} {entry['failed']}" for name, entry in data["failed_runs_by_stage"].items() if entry["failed"]
    ]
    out.print(f"Failed runs by stage: {', '.join(failures) if failures else 'none'}.")
    for name, stage in data["stages"].items():
        if stage.get("routes"):
            taken = ", ".join(f"{label} {count}" for label, count in stage["routes"].items())
            out.print(f"Routes from {name}: {taken}.", markup=False)
        compliance = stage.get("compliance")
        if compliance:
            checked = sum(compliance.values())
            out.print(f"Answers of {name}: {compliance.get('compliant', 0)} of {checked} passed the check.")
    out.print(
        f"Per pipeline run: {_fmt(per_run.get('tokens'))} tokens, {_money(per_run.get('cost'))} {currency} "
        f"({_money(per_run.get('cost_per_million_tokens'), 4)} {currency} per million tokens)."
    )
