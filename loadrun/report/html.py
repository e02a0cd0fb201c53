"""The HTML report: one self-contained file (inline CSS and SVG, no script, no external asset).

``write_report(folder)`` reads what a run folder holds and writes ``report.html`` beside it:

- a comparison folder (``compare.json`` and its round folders, from ``loadrun compare``);
- a single run folder (``summary.json`` and ``records.jsonl``, from ``loadrun measure``);
- a capacity folder (``capacity.json``: steps and fits, from ``loadrun capacity``), alone or
  beside either of the others.

Every report has the same sections, in this order, with these ids: summary, latency-cdf,
percentiles-over-time, errors, comparison, capacity, cautions. A section with nothing to
show says so instead of disappearing, so that a reader always finds the same page.
"""

from __future__ import annotations

import math
import time
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any, TypeGuard

import numpy as np

from loadrun._version import __version__
from loadrun.caution import CAUTION
from loadrun.compare import COMPARE_FILE, MetricSamples, target_aggregate
from loadrun.errors import StoreError, UsageError
from loadrun.generator_health import generator_note
from loadrun.metrics import LATENCY_METRICS
from loadrun.store import RECORDS_FILE, SUMMARY_FILE, RunFolder, read_records
from loadrun.targets import TargetSpec

__all__ = ["CAPACITY_FILE", "REPORT_FILE", "SECTIONS", "render_report", "write_report"]

REPORT_FILE = "report.html"
CAPACITY_FILE = "capacity.json"
SECTIONS: tuple[tuple[str, str], ...] = (
    ("summary", "Summary"),
    ("latency-cdf", "Latency distributions"),
    ("percentiles-over-time", "Percentiles over time"),
    ("errors", "Errors and outcomes"),
    ("comparison", "Comparison"),
    ("capacity", "Capacity"),
    ("cautions", "Cautions"),
)
_TEMPLATES = Path(__file__).parent / "templates"
_TIME_METRICS = ("ttft", "e2e")
_MIN_BIN_SAMPLES = 3
_TIME_BINS = 60


def write_report(folder: str | Path, output: str | Path | None = None) -> Path:
    """Render the report of ``folder`` and write it (default ``folder/report.html``)."""
    root = Path(folder)
    html = render_report(root)
    target = Path(output) if output is not None else root / REPORT_FILE
    temporary = target.with_name(f".{target.name}.tmp")
    try:
        temporary.write_text(html, encoding="utf-8")
        temporary.replace(target)
    except OSError as exc:
        raise StoreError(f"cannot write {target}: {exc.strerror or exc}") from exc
    return target


def render_report(folder: str | Path) -> str:
    root = Path(folder)
    if not root.is_dir():
        raise UsageError(f"{root}: no such run folder")
    import jinja2  # with matplotlib (plots), imported only when a report is written

    view = _view(root)
    environment = jinja2.Environment(
        loader=jinja2.FileSystemLoader(_TEMPLATES),
        autoescape=jinja2.select_autoescape(["html", "j2"]),
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    environment.filters.update(ms=_fmt_ms, share=_fmt_share, money=_fmt_money, number=_fmt_number)
    return environment.get_template("report.html.j2").render(**view)


# --- the view model ---------------------------------------------------------------------


def _view(root: Path) -> dict[str, Any]:
    capacity = _read_optional(root / CAPACITY_FILE)
    if (root / COMPARE_FILE).is_file():
        view = _comparison_view(root, RunFolder(root).read_json(COMPARE_FILE))
    elif (root / SUMMARY_FILE).is_file():
        view = _run_view(root, RunFolder(root).read_json(SUMMARY_FILE))
    elif isinstance(capacity, Mapping):
        view = _capacity_only_view(capacity)
    else:
        raise UsageError(
            f"{root}: not a run folder (it holds none of {COMPARE_FILE}, {SUMMARY_FILE}, {CAPACITY_FILE})"
        )
    view["capacity"] = _capacity_view(capacity) if isinstance(capacity, Mapping) else None
    if view["capacity"] is not None:
        view["cautions"] = [*view["cautions"], *view["capacity"]["cautions"]]
    view.update(
        sections=SECTIONS,
        folder=str(root),
        generated_at=time.strftime("%Y-%m-%d %H:%M:%S %z"),
        loadrun_version=__version__,
    )
    return view


def _comparison_view(root: Path, data: Mapping[str, Any]) -> dict[str, Any]:
    names = [target["name"] for target in data.get("targets", [])]
    levels = []
    time_rows: dict[str, list[Mapping[str, Any]]] = {name: [] for name in names}
    for level in data.get("levels", []):
        rows: dict[str, list[Mapping[str, Any]]] = {name: [] for name in names}
        for entry in data.get("rounds", []):
            if entry.get("level") == level["concurrency"] and entry.get("target") in rows:
                loaded = _records(root / entry["folder"])
                rows[entry["target"]].extend(loaded)
                time_rows[entry["target"]].extend(loaded)
        levels.append(_level_view(level, rows, names))
    settings = data.get("settings", {})
    profile = data.get("profile", {})
    facts = [
        ("profile", profile.get("name", "?")),
        ("load levels", ", ".join(f"concurrency {c}" for c in settings.get("levels", []))),
        ("rounds", f"{settings.get('rounds')} per level, targets in turn ({' '.join(names)})"),
        ("round length", _round_length(settings)),
        ("statistics", _statistics_text(settings)),
        ("started", data.get("started_at", "")),
        ("finished", data.get("finished_at", "")),
    ]
    return {
        "title": f"Comparison: {profile.get('name', 'workload')} on {len(names)} targets",
        "kind": "comparison",
        "description": data.get("description", ""),
        "facts": facts,
        "targets": data.get("targets", []),
        "levels": levels,
        "headline": _headline(levels),
        "time_plot": _time_plot(time_rows),
        "cautions": list(data.get("cautions", [])),
        "is_comparison": True,
    }


def _run_view(root: Path, summary: Mapping[str, Any]) -> dict[str, Any]:
    target = summary.get("target", {})
    name = str(target.get("name") or "target")
    spec = TargetSpec(name=name, model=str(target.get("model") or "?"), base_url=target.get("base_url"))
    rows = _records(root)
    aggregate = target_aggregate(rows, [summary], spec)
    concurrency = summary.get("load", {}).get("concurrency")
    level = {"concurrency": concurrency, "targets": {name: aggregate}, "pairs": []}
    profile = summary.get("profile", {})
    cautions = [CAUTION]
    generator_verdict = generator_note(summary)
    if generator_verdict is not None:
        cautions.append(f"The load generator: {generator_verdict}")
    workers = summary.get("workers") or {}
    for problem in workers.get("problems", []):
        cautions.append(f"Workers: {problem}")
    if summary.get("interrupted"):
        cautions.append("The run was interrupted: the summary covers what was measured until then.")
    if summary.get("aborted"):
        cautions.append(f"The run stopped early: {summary['aborted']}")
    if target.get("embedded_mock"):
        cautions.append(f"{name} is the bundled mock server (a simulated engine), not a real provider.")
    facts = [
        ("profile", profile.get("name", "?")),
        ("target", f"{name} ({target.get('model')}) at {target.get('base_url')}"),
        ("load", f"closed loop, concurrency {concurrency}"),
        ("measured", f"{summary.get('window', {}).get('seconds', 0):.1f} s"),
        ("started", summary.get("started_at", "")),
    ]
    return {
        "title": f"Run: {profile.get('name', 'workload')} against {name}",
        "kind": "run",
        "description": "",
        "facts": facts,
        "targets": [spec.describe()],
        "levels": [_level_view(level, {name: rows}, [name])],
        "headline": [],
        "time_plot": _time_plot({name: rows}),
        "cautions": cautions,
        "is_comparison": False,
    }


def _capacity_only_view(capacity: Mapping[str, Any]) -> dict[str, Any]:
    profile = capacity.get("profile", {}) if isinstance(capacity.get("profile"), Mapping) else {}
    target = capacity.get("target", {}) if isinstance(capacity.get("target"), Mapping) else {}
    facts = [
        ("profile", str(profile.get("name", "?"))),
        ("target", f"{target.get('name', '?')} ({target.get('model', '?')})"),
        ("started", str(capacity.get("started_at", ""))),
    ]
    return {
        "title": f"Capacity: {profile.get('name', 'workload')} against {target.get('name', 'a target')}",
        "kind": "capacity",
        "description": "",
        "facts": facts,
        "targets": [],
        "levels": [],
        "headline": _advice_lines(capacity.get("advice"))[:3],
        "time_plot": None,
        "cautions": [CAUTION],
        "is_comparison": False,
    }


def _level_view(
    level: Mapping[str, Any], rows: Mapping[str, Sequence[Mapping[str, Any]]], names: Sequence[str]
) -> dict[str, Any]:
    from loadrun.report import plots

    aggregates = level.get("targets", {})
    samples = {name: MetricSamples.from_rows(rows.get(name, [])) for name in names}
    cdf_input = {
        name: {metric: sample.samples[metric].values for metric in LATENCY_METRICS}
        for name, sample in samples.items()
    }
    has_samples = any(len(s.samples[m]) for s in samples.values() for m in LATENCY_METRICS)
    outcomes = {name: aggregates.get(name, {}).get("requests", {}).get("by_outcome", {}) for name in names}
    pairs = []
    for pair in level.get("pairs", []):
        pairs.append(
            {
                **pair,
                "plot": plots.ratio_intervals(pair["metrics"], f"{pair['a']} / {pair['b']}")
                if pair.get("metrics")
                else None,
            }
        )
    return {
        "concurrency": level.get("concurrency"),
        "names": list(names),
        "colors": {name: plots.color_for(index) for index, name in enumerate(names)},
        "aggregates": aggregates,
        "cdf_plot": plots.latency_cdfs(cdf_input) if has_samples else None,
        "outcome_plot": plots.outcome_shares(outcomes) if any(outcomes.values()) else None,
        "pairs": pairs,
        "any_compliance": any(aggregates.get(name, {}).get("compliance") for name in names),
        "any_classes": any(aggregates.get(name, {}).get("by_class") for name in names),
        "any_cost": any(aggregates.get(name, {}).get("cost") for name in names),
        "metrics": LATENCY_METRICS,
    }


def _headline(levels: Sequence[Mapping[str, Any]]) -> list[str]:
    """One plain sentence per pair and level, then who leads on median TTFT and E2E."""
    lines = []
    for level in levels:
        prefix = f"At concurrency {level['concurrency']}: " if len(levels) > 1 else ""
        for pair in level["pairs"]:
            lines.append(prefix + str(pair.get("sentence", "")))
        for metric in ("ttft", "e2e"):
            values = {
                name: level["aggregates"].get(name, {}).get("latency", {}).get(metric, {}).get("p50_ms")
                for name in level["names"]
            }
            known = {name: value for name, value in values.items() if value is not None}
            if len(known) >= 2:
                best = min(known, key=lambda name: known[name])
                lines.append(f"{prefix}lowest median {metric.upper()}: {best} ({_fmt_ms(known[best])} ms).")
    return lines


def _time_plot(rows_by_target: Mapping[str, Sequence[Mapping[str, Any]]]) -> str | None:
    """p50 and p95 per time bin of TTFT and E2E, by completion (wall clock) time."""
    from loadrun.report import plots

    points: dict[str, list[tuple[float, float, float]]] = {}
    starts = []
    for name, rows in rows_by_target.items():
        points[name] = []
        for row in rows:
            if not row.get("in_window", True) or row.get("outcome") != "ok":
                continue
            start, intended, end = row.get("wall_start"), row.get("intended_us"), row.get("end_us")
            send = row.get("send_us") if row.get("send_us") is not None else intended
            if not start or intended is None or end is None or send is None:
                continue
            starts.append(float(start))
            done = float(start) + (end - send) / 1e6
            first = row.get("first_token_us")
            ttft = (first - intended) / 1000 if first is not None else math.nan
            points[name].append((done, ttft, (end - intended) / 1000))
    if not starts:
        return None
    origin = min(starts)
    span = max(t for target_points in points.values() for t, _, _ in target_points) - origin
    width = max(0.5, span / _TIME_BINS)
    series: dict[str, dict[str, list[tuple[float, float, float]]]] = {}
    for name, target_points in points.items():
        by_bin: dict[int, list[tuple[float, float]]] = {}
        for done, ttft, e2e in target_points:
            by_bin.setdefault(int((done - origin) // width), []).append((ttft, e2e))
        series[name] = {metric: [] for metric in _TIME_METRICS}
        for index in sorted(by_bin):
            values = by_bin[index]
            if len(values) < _MIN_BIN_SAMPLES:
                continue
            middle = (index + 0.5) * width
            for column, metric in enumerate(_TIME_METRICS):
                column_values = np.array([v[column] for v in values], dtype=np.float64)
                column_values = column_values[~np.isnan(column_values)]
                if column_values.size:
                    p50, p95 = np.percentile(column_values, [50, 95], method="inverted_cdf")
                    series[name][metric].append((middle, float(p50), float(p95)))
    if not any(series[name][metric] for name in series for metric in _TIME_METRICS):
        return None
    return plots.percentiles_over_time(series, _TIME_METRICS)


def _capacity_view(data: Mapping[str, Any]) -> dict[str, Any] | None:
    """Steps and fits from capacity.json, read defensively: its layout is the capacity search's."""
    from loadrun.report import plots

    loads: list[float] = []
    throughput: list[float | None] = []
    latency: dict[str, list[float | None]] = {}
    verdicts: list[str] = []
    load_label = str(data["axis"]) if isinstance(data.get("axis"), str) else "load level"
    for step in data.get("steps", []) or []:
        if not isinstance(step, Mapping):
            continue
        load, label = _step_load(step)
        if load is None:
            continue
        load_label = load_label if isinstance(data.get("axis"), str) else label
        loads.append(load)
        throughput.append(_first_number(step, _THROUGHPUT_PATHS))
        verdict = step.get("verdict")
        verdicts.append(str(verdict) if verdict is not None else "")
        for metric in ("ttft", "e2e"):
            for p in ("p50", "p99"):
                latency.setdefault(f"{metric.upper()} {p}", []).append(
                    _first_number(
                        step,
                        [
                            ("latency", metric, f"{p}_ms"),
                            (f"{metric}_{p}_ms",),
                            ("summary", "latency", metric, f"{p}_ms"),
                        ],
                    )
                )
    latency = {name: values for name, values in latency.items() if any(v is not None for v in values)}
    fits = data.get("fits")
    fits = fits if isinstance(fits, Mapping) else {}
    usl = fits.get("usl")
    usl = usl if isinstance(usl, Mapping) else fits
    # The Universal Scalability Law is a law of concurrency: its curve means nothing on a rate axis.
    fitted = _usl_curve(usl, loads) if loads and load_label == "concurrency" else None
    plot = (
        plots.capacity_curves(loads, throughput, latency, fitted, load_label, _capacity_markers(data))
        if loads
        else None
    )
    capacity = data.get("capacity")
    facts: dict[str, str] = {}
    for source in (data, capacity if isinstance(capacity, Mapping) else {}):
        for key, value in source.items():
            if (
                _is_scalar(value)
                and value is not None
                and key not in ("kind", "format_version", "run_folder")
            ):
                facts.setdefault(str(key), _fmt_number(value))
    columns = [load_label, "requests/s", *latency, "verdict"]
    table = [
        [
            _fmt_number(load),
            _fmt_number(rate),
            *(_fmt_number(values[i]) for values in latency.values()),
            verdict,
        ]
        for i, (load, rate, verdict) in enumerate(zip(loads, throughput, verdicts, strict=True))
    ]
    cautions = []
    if not loads:
        cautions.append(
            "capacity.json holds no steps this report can read; only its top-level values are shown."
        )
    return {
        "plot": plot,
        "facts": list(facts.items())[:20],
        "advice": _advice_lines(data.get("advice")),
        "table_keys": columns,
        "table": table,
        "cautions": cautions,
    }


def _advice_lines(advice: Any) -> list[str]:
    if isinstance(advice, str):
        return [advice]
    if isinstance(advice, Mapping):
        lines = advice.get("lines")
        if isinstance(lines, list):
            return [str(line) for line in lines]
        return [f"{key}: {_fmt_number(value)}" for key, value in advice.items() if _is_scalar(value)]
    if isinstance(advice, list):
        return [str(line) for line in advice]
    return []


_LOAD_PATHS: tuple[tuple[tuple[str, ...], str], ...] = (
    (("concurrency",), "concurrency"),
    (("load", "concurrency"), "concurrency"),
    (("rate_per_s",), "arrival rate, requests per second"),
    (("arrival_rate",), "arrival rate, requests per second"),
    (("rate",), "arrival rate, requests per second"),
    (("load", "rate_per_s"), "arrival rate, requests per second"),
    (("level",), "load level"),
    (("load",), "load level"),
)
_THROUGHPUT_PATHS: tuple[tuple[str, ...], ...] = (
    ("requests_per_s",),
    ("throughput_rps",),
    ("throughput", "requests_per_s"),
    ("summary", "throughput", "requests_per_s"),
    ("throughput",),
)


def _step_load(step: Mapping[str, Any]) -> tuple[float | None, str]:
    for path, label in _LOAD_PATHS:
        value = _dig(step, path)
        if _is_number(value):
            return float(value), label
    return None, ""


def _first_number(step: Mapping[str, Any], paths: Sequence[Sequence[str]]) -> float | None:
    for path in paths:
        value = _dig(step, path)
        if _is_number(value):
            return float(value)
    return None


def _dig(data: Any, path: Sequence[str]) -> Any:
    for key in path:
        if not isinstance(data, Mapping):
            return None
        data = data.get(key)
    return data


def _usl_curve(usl: Mapping[str, Any], loads: Sequence[float]) -> tuple[list[float], list[float]] | None:
    """The fitted throughput curve: as the capacity search sampled it, or from the parameters
    of the Universal Scalability Law (Gunther 2007, eq. 4.31)."""
    curve = usl.get("curve")
    if isinstance(curve, Mapping):
        xs, ys = curve.get("loads"), curve.get("requests_per_s")
        if _numbers(xs) and _numbers(ys) and len(xs) == len(ys) > 0:
            return [float(x) for x in xs], [float(y) for y in ys]
    sigma, kappa = usl.get("sigma"), usl.get("kappa")
    lam = next((usl[k] for k in ("lambda", "lambda_", "lam") if _is_number(usl.get(k))), None)
    if not (_is_number(sigma) and _is_number(kappa) and lam is not None):
        return None
    xs = [float(x) for x in np.linspace(max(1.0, min(loads)), max(loads), 100)]
    ys = [float(lam * n / (1 + sigma * (n - 1) + kappa * n * (n - 1))) for n in xs]
    return xs, ys


def _numbers(values: Any) -> TypeGuard[list[float]]:
    return isinstance(values, list) and all(_is_number(v) for v in values)


def _capacity_markers(data: Mapping[str, Any]) -> dict[str, float]:
    markers = {}
    capacity = data.get("capacity")
    if isinstance(capacity, Mapping) and _is_number(capacity.get("load")):
        markers["capacity"] = float(capacity["load"])
    elif isinstance(capacity, (int, float)) and _is_number(capacity):
        markers["capacity"] = float(capacity)
    if _is_number(data.get("peak_concurrency")):
        markers["USL peak"] = float(data["peak_concurrency"])
    return markers


# --- helpers ----------------------------------------------------------------------------


def _records(folder: Path) -> list[dict[str, Any]]:
    path = folder / RECORDS_FILE
    if not path.is_file():
        from loadrun.scale import worker_records  # a run split across workers keeps theirs

        return worker_records(folder)
    try:
        return read_records(path)
    except (OSError, ValueError) as exc:
        raise StoreError(f"cannot read {path}: {exc}") from exc


def _read_optional(path: Path) -> Any:
    if not path.is_file():
        return None
    return RunFolder(path.parent).read_json(path.name)


def _round_length(settings: Mapping[str, Any]) -> str:
    warmup = settings.get("warmup_s")
    warm = f", after {warmup:g} s of warm-up" if isinstance(warmup, (int, float)) else ""
    if settings.get("requests_per_round"):
        return f"{settings['requests_per_round']} measured requests per target{warm}"
    return f"{settings.get('seconds_per_round')} s per target{warm}"


def _statistics_text(settings: Mapping[str, Any]) -> str:
    percentiles = ", ".join(f"p{q:g}" for q in settings.get("percentiles", []))
    return (
        f"{percentiles} of each latency metric; bootstrap over requests, {settings.get('resamples')} "
        f"resamples; {settings.get('confidence', 0.95):.0%} confidence for all intervals of a pair together; "
        f"differences under {settings.get('smallest_difference', 0):.0%} are not called"
    )


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def _is_scalar(value: Any) -> bool:
    return isinstance(value, (int, float, str, bool)) or value is None


def _fmt_ms(value: Any) -> str:
    if not _is_number(value):
        return "-"
    return f"{value:.2f}" if value < 10 else f"{value:.1f}" if value < 1000 else f"{value:,.0f}"


def _fmt_share(value: Any) -> str:
    if not _is_number(value):
        return "-"
    return f"{value:.1%}" if value else "0 %"


def _fmt_money(value: Any, currency: str = "USD") -> str:
    if not _is_number(value):
        return "-"
    digits = 2 if value >= 0.1 else 4 if value >= 0.001 else 6
    return f"{value:,.{digits}f} {currency}"


def _fmt_number(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        if not math.isfinite(value):
            return "-"
        return f"{value:.4g}" if abs(value) < 1000 else f"{value:,.0f}"
    return str(value)
