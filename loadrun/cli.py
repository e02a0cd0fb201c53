"""The command line: parse, call the API, render. No measurement logic lives here."""

from __future__ import annotations

import functools
import re
import signal
import sys
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any, NoReturn

import typer

from loadrun import jsonfast
from loadrun.caution import cap_excess
from loadrun.cli_options import (
    ApiKeyEnvOption,
    BaseUrlOption,
    ConnectTimeoutOption,
    DurationOption,
    ExceedRemoteCapsOption,
    HeaderOption,
    InputTokensOption,
    InsecureOption,
    MockEngineOption,
    ModelOption,
    OutOption,
    OutputTokensOption,
    PriceInputOption,
    PriceOutputOption,
    RequestsOption,
    TimeLimitOption,
    TimeoutOption,
    TransportOption,
    WarmupOption,
    YesOption,
)
from loadrun.errors import LoadrunError, UsageError
from loadrun.interrupt import EXIT_INTERRUPTED
from loadrun.profile import ARRIVALS, Profile, load_profile
from loadrun.report.terminal import console, render_calibration, render_summary, say
from loadrun.runner import DEFAULT_MOCK_ENGINE, MeasureSettings, describe_plan, measure, run_notes
from loadrun.scale import measure_scaled
from loadrun.slo import Slo
from loadrun.target import Target
from loadrun.whole_output import write_whole

if TYPE_CHECKING:
    from loadrun.targets import TargetSpec

app = typer.Typer(
    add_completion=False,
    pretty_exceptions_enable=False,
    help="Benchmark and load-test chat-completions endpoints. With no --base-url, "
    "commands run against the bundled mock server on a free loopback port.",
)


@app.command("measure")
def measure_command(
    profile_path: Annotated[
        Path | None, typer.Argument(metavar="[PROFILE]", help="Profile TOML; default: a short chat.")
    ] = None,
    base_url: BaseUrlOption = None,
    model: ModelOption = None,
    api_key_env: ApiKeyEnvOption = None,
    header: HeaderOption = None,
    concurrency: Annotated[
        int | None, typer.Option("--concurrency", "-c", min=1, help="Closed loop: requests in flight.")
    ] = None,
    rate: Annotated[
        float | None,
        typer.Option(help="Open loop: new conversations per second (Poisson unless --arrival)."),
    ] = None,
    arrival: Annotated[
        str | None, typer.Option(help=f"Arrival process: {', '.join(ARRIVALS)}; default: the profile's.")
    ] = None,
    burst_cv: Annotated[
        float | None,
        typer.Option(help="bursty: coefficient of variation of the gaps."),
    ] = None,
    trace: Annotated[
        Path | None,
        typer.Option(help="replay: JSONL trace (offset_s, input_tokens, output_tokens[, class])."),
    ] = None,
    replay_speed: Annotated[
        float | None, typer.Option(help="replay: speed factor (2 = twice as fast).")
    ] = None,
    in_flight_cap: Annotated[
        int | None,
        typer.Option(min=1, help="Open loop: most requests in flight; more are counted as not sent."),
    ] = None,
    think_time: Annotated[
        float | None, typer.Option(min=0.0, help="Closed loop: each client's pause between conversations, s.")
    ] = None,
    seed: Annotated[
        int | None, typer.Option(help="Seed of the request sequence (overrides the profile's).")
    ] = None,
    requests: RequestsOption = None,
    duration: DurationOption = None,
    warmup: WarmupOption = None,
    input_tokens: InputTokensOption = None,
    output_tokens: OutputTokensOption = None,
    context_window: Annotated[
        int | None, typer.Option(min=1, help="The target's context window: longer requests are not sent.")
    ] = None,
    calibrate_input: Annotated[
        bool | None,
        typer.Option(
            "--calibrate-input/--no-calibrate-input",
            help="Learn the target's tokens per word with a short probe first; default: the profile's.",
        ),
    ] = None,
    slo: Annotated[
        list[str] | None, typer.Option(help="Per-request SLO for goodput, METRIC=MS (ttft, tpot, itl, e2e).")
    ] = None,
    json_output: Annotated[bool, typer.Option("--json", help="Print the summary as JSON on stdout.")] = False,
    out: OutOption = Path("runs"),
    no_save: Annotated[bool, typer.Option("--no-save", help="Write no run folder.")] = False,
    history: Annotated[
        Path | None, typer.Option(help="History database; default: OUT/history.sqlite3 (none if --no-save).")
    ] = None,
    no_history: Annotated[bool, typer.Option("--no-history", help="Store no row in the history.")] = False,
    transport: TransportOption = "fast",
    mock_engine: MockEngineOption = DEFAULT_MOCK_ENGINE,
    timeout: TimeoutOption = 600.0,
    connect_timeout: ConnectTimeoutOption = 10.0,
    time_limit: TimeLimitOption = 3600.0,
    insecure_skip_tls_verify: InsecureOption = False,
    yes: YesOption = False,
    first_token_timeout: Annotated[
        float | None, typer.Option(min=0.001, help="Seconds from the send to the first token (streamed).")
    ] = None,
    idle_timeout: Annotated[
        float | None, typer.Option(min=0.001, help="Seconds without a new chunk once tokens flow (streamed).")
    ] = None,
    retry_rate_limited: Annotated[
        int, typer.Option(min=0, max=100, help="Retries of a 429 per request, recorded apart (0: none).")
    ] = 0,
    retry_wait_cap: Annotated[
        float, typer.Option(min=0.0, help="Longest wait before a retry, whatever Retry-After asks, s.")
    ] = 30.0,
    stop_grace: Annotated[
        float, typer.Option(min=0.0, help="After Ctrl-C or SIGTERM, seconds in-flight requests may finish.")
    ] = 30.0,
    price_input: PriceInputOption = None,
    price_output: PriceOutputOption = None,
    exceed_remote_caps: ExceedRemoteCapsOption = False,
    allow_key_over_http_to: Annotated[
        str | None,
        typer.Option(help="HOST to which the API key may go over plain http (named, never implied)."),
    ] = None,
    workers: Annotated[
        int | None,
        typer.Option(
            min=1, max=256, help="Split the load level across this many worker processes (--cluster: all)."
        ),
    ] = None,
    cluster: Annotated[
        str | None,
        typer.Option(help="Dask scheduler ADDRESS (tcp://host:8786): run the workers' shards there."),
    ] = None,
) -> None:
    """Measure one profile at one load level (a concurrency or an arrival rate) and print the summary."""
    profile = load_profile(profile_path) if profile_path else Profile()
    if input_tokens or output_tokens:
        profile = profile.with_lengths(input_tokens, output_tokens)
    if requests is not None and duration is not None:
        raise UsageError("give --requests or --duration, not both")
    target = _target(
        base_url, model, api_key_env, header or [], insecure_skip_tls_verify, allow_key_over_http_to
    )
    settings = MeasureSettings(
        profile=profile,
        target=target,
        concurrency=concurrency,
        duration_s=duration,
        requests=requests,
        warmup_s=warmup,
        slos=tuple(Slo.parse(text) for text in slo or []),
        out_dir=None if no_save else out,
        transport=transport,
        mock_engine=mock_engine,
        total_timeout_s=timeout,
        connect_timeout_s=connect_timeout,
        time_limit_s=time_limit,
        confirmed=yes,
        history_path=history,
        record_history=not no_history,
        first_token_timeout_s=first_token_timeout,
        idle_timeout_s=idle_timeout,
        retry_rate_limited=retry_rate_limited,
        retry_wait_cap_s=retry_wait_cap,
        stop_grace_s=stop_grace,
        handle_signals=True,
        exceed_remote_caps=exceed_remote_caps,
        arrival=arrival,
        rate_per_s=rate,
        burst_cv=burst_cv,
        trace_path=trace,
        replay_speed=replay_speed,
        in_flight_cap=in_flight_cap,
        think_time_s=think_time,
        seed=seed,
        context_window=context_window,
        calibrate_input=calibrate_input,
    )
    settings.check()
    if cluster is not None:
        from loadrun.cluster import check_address

        check_address(cluster)
    if target is not None and not target.is_loopback and not yes:
        _confirm(target, settings, _token_prices(price_input, price_output))
        settings = _replace_confirmed(settings)
    if target is None:
        say(f"No --base-url given: starting the bundled mock server (engine {mock_engine}) on loopback.")
    scaled = cluster is not None or (workers or 1) > 1
    result = measure_scaled(settings, workers, cluster) if scaled else measure(settings)
    if json_output:
        write_whole(jsonfast.dumps(result.summary).decode() + "\n")
    else:
        render_summary(result.summary)
    for note in run_notes(result.summary):
        say(note)
    _exit_if_interrupted(result.summary)
    if result.summary.get("aborted"):
        raise typer.Exit(1)


@app.command("calibrate")
def calibrate_command(
    max_streams: Annotated[int, typer.Option(min=10, help="Highest stream count to try.")] = 800,
    seconds: Annotated[float, typer.Option(min=1.0, help="Measured seconds per level.")] = 4.0,
    limit_ms: Annotated[float, typer.Option(min=0.01, help="Receive-error p99 limit, ms.")] = 1.0,
    transport: TransportOption = "fast",
) -> None:
    """Find how many streams this machine times within the limit, against the bundled mock."""
    from loadrun.calibrate import DEFAULT_LEVELS, CalibrationSettings, calibrate

    levels = tuple(level for level in DEFAULT_LEVELS if level <= max_streams) or (max_streams,)
    say("Starting the bundled mock server (engine wide) on a free loopback port.")
    rows, verdict = calibrate(
        CalibrationSettings(levels=levels, seconds_per_level=seconds, limit_ms=limit_ms, transport=transport)
    )
    render_calibration(rows, verdict)


@app.command("mock")
def mock_command(
    host: Annotated[str, typer.Option(help="Address to listen on (loopback by default).")] = "127.0.0.1",
    port: Annotated[int, typer.Option(min=0, max=65535, help="Port; 0 picks a free one.")] = 8000,
    engine: Annotated[str, typer.Option(help="Engine preset name or TOML file.")] = DEFAULT_MOCK_ENGINE,
    faults: Annotated[
        Path | None, typer.Option(help="Fault plan TOML: [faults], [faults.rates] and [quirks] tables.")
    ] = None,
    fault: Annotated[
        list[str] | None, typer.Option(help="A fault's rate KIND=RATE or a setting, stall_s=2 (repeatable).")
    ] = None,
    quirk: Annotated[
        list[str] | None, typer.Option(help="A protocol quirk NAME[=VALUE] (repeatable).")
    ] = None,
) -> None:
    """Run the bundled mock inference server in the foreground until Ctrl-C (faults and quirks on request)."""
    from mock_server.__main__ import main as mock_main
    from mock_server.faults import FaultPlan, FaultsError, load_plan, plan_with_options

    try:  # refused here, in loadrun's words, before the server starts
        plan_with_options(load_plan(faults) if faults else FaultPlan(), fault or [], quirk or [])
    except FaultsError as exc:
        raise UsageError(str(exc)) from exc
    args = ["--host", host, "--port", str(port), "--engine", engine]
    args += ["--faults", str(faults)] if faults else []
    for text in fault or []:
        args += ["--fault", text]
    for text in quirk or []:
        args += ["--quirk", text]
    raise typer.Exit(mock_main(args))


# --- regression gate and history -------------------------------------------------------------

_RULE_HELP = (
    "How far a percentile may rise against the baseline: 'METRIC.pNN 15%', 'METRIC.pNN 50ms' or "
    "both (then both must be exceeded). Repeatable; default: ttft.p95, tpot.p95 and e2e.p95 15%."
)


@app.command("gate")
def gate_command(
    profile_path: Annotated[
        Path | None, typer.Argument(metavar="[PROFILE]", help="Profile TOML to run; default: a short chat.")
    ] = None,
    from_run: Annotated[
        Path | None, typer.Option("--from-run", help="Gate this finished run folder instead of running.")
    ] = None,
    rule: Annotated[list[str] | None, typer.Option("--rule", help=_RULE_HELP)] = None,
    target_name: Annotated[
        str | None, typer.Option(help="The target's name in the history (keep one name across deploys).")
    ] = None,
    baseline: Annotated[int | None, typer.Option(help="Compare with this run id of the history.")] = None,
    last: Annotated[int, typer.Option(min=1, help="Baseline: median of the last K passing runs.")] = 5,
    confidence: Annotated[
        float, typer.Option(min=0.5, max=0.999, help="Confidence of the bootstrap interval.")
    ] = 0.95,
    max_error_rate: Annotated[
        float, typer.Option(min=0.0, max=1.0, help="Share of failed requests that makes the run invalid.")
    ] = 0.05,
    min_samples: Annotated[
        int, typer.Option(min=1, help="Fewer samples of a rule's metric make the run invalid.")
    ] = 100,
    history: Annotated[
        Path | None, typer.Option(help="History database; default: OUT/history.sqlite3.")
    ] = None,
    json_output: Annotated[bool, typer.Option("--json", help="Print the verdict as JSON on stdout.")] = False,
    junit: Annotated[Path | None, typer.Option(help="Write a JUnit XML file for CI systems.")] = None,
    prometheus: Annotated[
        Path | None, typer.Option(help="Write a Prometheus text file (a node exporter's textfile collector).")
    ] = None,
    webhook: Annotated[str | None, typer.Option(help="POST the verdict as JSON to this URL.")] = None,
    webhook_env: Annotated[
        str | None, typer.Option(help="NAME of the environment variable holding the webhook URL.")
    ] = None,
    webhook_timeout: Annotated[float, typer.Option(min=0.1, help="Seconds per webhook attempt.")] = 10.0,
    webhook_retries: Annotated[int, typer.Option(min=0, help="Webhook attempts after a failed one.")] = 2,
    base_url: BaseUrlOption = None,
    model: ModelOption = None,
    api_key_env: ApiKeyEnvOption = None,
    header: HeaderOption = None,
    concurrency: Annotated[
        int | None, typer.Option("--concurrency", "-c", min=1, help="Requests in flight.")
    ] = None,
    requests: RequestsOption = None,
    duration: DurationOption = None,
    warmup: WarmupOption = None,
    out: OutOption = Path("runs"),
    no_save: Annotated[bool, typer.Option("--no-save", help="Write no run folder (history still).")] = False,
    transport: TransportOption = "fast",
    mock_engine: MockEngineOption = DEFAULT_MOCK_ENGINE,
    timeout: TimeoutOption = 600.0,
    connect_timeout: ConnectTimeoutOption = 10.0,
    time_limit: TimeLimitOption = 3600.0,
    insecure_skip_tls_verify: InsecureOption = False,
    yes: YesOption = False,
    exceed_remote_caps: ExceedRemoteCapsOption = False,
) -> None:
    """Run a profile (or take a finished run) and compare it with its baseline.

    Exit code 0: pass, or no baseline yet (the run becomes the first); 1: regression;
    2: invalid run (too many errors, generator-limited, too few samples) or bad input.
    """
    from loadrun.alerts import GateOutputs, deliver, webhook_url
    from loadrun.gate import DEFAULT_RULES, GateSettings, Rule, gate_folder, gate_measure
    from loadrun.history import HISTORY_FILE
    from loadrun.report.terminal import render_gate

    settings = GateSettings(
        history_path=history or out / HISTORY_FILE,
        rules=tuple(Rule.parse(text) for text in rule) if rule else DEFAULT_RULES,
        target_name=target_name,
        baseline_id=baseline,
        last=last,
        confidence=confidence,
        max_error_rate=max_error_rate,
        min_samples=min_samples,
    )
    outputs = GateOutputs(
        junit_path=junit,
        prometheus_path=prometheus,
        webhook_url=webhook_url(webhook, webhook_env),
        webhook_timeout_s=webhook_timeout,
        webhook_retries=webhook_retries,
    )
    outputs.check()
    if from_run is not None:
        if profile_path is not None or base_url is not None:
            raise UsageError("--from-run gates a finished run: give no profile and no --base-url")
        report = gate_folder(from_run, settings)
    else:
        if requests is not None and duration is not None:
            raise UsageError("give --requests or --duration, not both")
        target = _target(base_url, model, api_key_env, header or [], insecure_skip_tls_verify)
        measure_settings = MeasureSettings(
            profile=load_profile(profile_path) if profile_path else Profile(),
            target=target,
            concurrency=concurrency,
            duration_s=duration,
            requests=requests,
            warmup_s=warmup,
            out_dir=None if no_save else out,
            transport=transport,
            mock_engine=mock_engine,
            total_timeout_s=timeout,
            connect_timeout_s=connect_timeout,
            time_limit_s=time_limit,
            confirmed=yes,
            exceed_remote_caps=exceed_remote_caps,
        )
        measure_settings.check()
        if target is not None and not target.is_loopback and not yes:
            _confirm(target, measure_settings)
            measure_settings = _replace_confirmed(measure_settings)
        if target is None:
            say(f"No --base-url given: starting the bundled mock server (engine {mock_engine}) on loopback.")
        report = gate_measure(measure_settings, settings)
    if json_output:
        write_whole(jsonfast.dumps(report.to_json()).decode() + "\n")
    else:
        render_gate(report.to_json())
    for warning in deliver(report, outputs):
        say(f"Warning: {warning}")
    if report.interrupted_by:  # outputs are written, but a stopped run exits as `measure` does
        say(f"Interrupted by {report.interrupted_by}: the run was judged invalid.")
        raise typer.Exit(EXIT_INTERRUPTED)
    raise typer.Exit(report.exit_code)


history_app = typer.Typer(help="Stored runs: list them, draw a trend, pin a baseline, show one.")
app.add_typer(history_app, name="history")


@history_app.callback(invoke_without_command=True)
def history_group(context: typer.Context) -> None:
    if context.invoked_subcommand is None:  # plain `loadrun history`: its help, exit 0
        write_whole(context.get_help() + "\n")


_HistoryOption = Annotated[Path, typer.Option("--history", help="The history database.")]
_DEFAULT_HISTORY = Path("runs") / "history.sqlite3"


@history_app.command("list")
def history_list_command(
    history: _HistoryOption = _DEFAULT_HISTORY,
    target: Annotated[str | None, typer.Option(help="Only this target name.")] = None,
    profile: Annotated[str | None, typer.Option(help="Only this profile name or hash prefix.")] = None,
    verdict: Annotated[
        str | None, typer.Option(help="Only this verdict: pass, regression, invalid, no_baseline, none.")
    ] = None,
    since: Annotated[str | None, typer.Option(help="Only runs since a date or an age (7d, 36h).")] = None,
    limit: Annotated[int, typer.Option(min=1, help="The most recent N runs.")] = 30,
    json_output: Annotated[bool, typer.Option("--json", help="Print the runs as JSON lines.")] = False,
) -> None:
    """List stored runs, oldest first."""
    from loadrun.history import History, parse_since
    from loadrun.report.terminal import render_history

    with History(history, create=False) as db:
        runs = db.find(_run_filter(target, profile, verdict, parse_since(since) if since else None, limit))
    if json_output:
        write_whole("".join(jsonfast.dumps(run.brief()).decode() + "\n" for run in runs))
    else:
        render_history([run.brief() for run in runs])


@history_app.command("trend")
def history_trend_command(
    series: Annotated[
        list[str] | None, typer.Option("--series", "-s", help="METRIC.pNN to follow (repeatable).")
    ] = None,
    svg: Annotated[Path | None, typer.Option(help="Also draw the trend into this SVG file.")] = None,
    history: _HistoryOption = _DEFAULT_HISTORY,
    target: Annotated[str | None, typer.Option(help="Only this target name.")] = None,
    profile: Annotated[str | None, typer.Option(help="Only this profile name or hash prefix.")] = None,
    since: Annotated[str | None, typer.Option(help="Only runs since a date or an age (7d, 36h).")] = None,
    limit: Annotated[int, typer.Option(min=1, help="The most recent N runs.")] = 100,
    json_output: Annotated[bool, typer.Option("--json", help="Print the points as JSON lines.")] = False,
) -> None:
    """Chosen percentiles of stored runs over time: in the terminal and as SVG."""
    from loadrun.alerts import write_atomically
    from loadrun.history import History, MetricPercentile, parse_since, trend
    from loadrun.report.terminal import render_trend
    from loadrun.report.trend_svg import trend_svg

    chosen = [MetricPercentile.parse(text) for text in series or ["ttft.p50", "ttft.p95", "e2e.p95"]]
    labels = [item.label for item in chosen]
    with History(history, create=False) as db:
        runs = db.find(_run_filter(target, profile, None, parse_since(since) if since else None, limit))
        rows = trend(db, runs, chosen)
    points = [
        {
            "id": row.run.id,
            "started_at": row.run.started_at,
            "verdict": row.run.verdict,
            "values_ms": row.values_ms,
        }
        for row in rows
    ]
    if json_output:
        write_whole("".join(jsonfast.dumps(point).decode() + "\n" for point in points))
    else:
        render_trend(labels, points)
    if svg is not None:
        title = f"{target or 'all targets'} / {profile or 'all profiles'}: {', '.join(labels)}"
        try:
            write_atomically(svg, trend_svg(rows, labels, title))
        except OSError as exc:
            raise UsageError(f"cannot write {svg}: {exc.strerror or exc}") from exc
        say(f"trend drawn into {svg}")


@history_app.command("pin")
def history_pin_command(
    run_id: Annotated[int, typer.Argument(help="The run to make the baseline of its target and profile.")],
    remove: Annotated[bool, typer.Option("--remove", help="Unpin it instead.")] = False,
    history: _HistoryOption = _DEFAULT_HISTORY,
) -> None:
    """Pin a run as the baseline of its target and profile (the gate compares with it)."""
    from loadrun.history import History

    with History(history, create=False) as db:
        run = db.pin(run_id, pinned=not remove)
    state = "pinned as the baseline of" if run.pinned else "no longer pinned for"
    say(f"run {run.id} {state} target {run.target_name!r}, profile {run.profile_name!r} ({run.profile_hash})")


@history_app.command("show")
def history_show_command(
    run_id: Annotated[int, typer.Argument(help="The run to show.")],
    history: _HistoryOption = _DEFAULT_HISTORY,
) -> None:
    """Print one stored run as JSON: configuration, summary, environment, verdict."""
    from loadrun.history import History

    with History(history, create=False) as db:
        run = db.get(run_id)
    data = {
        **run.brief(),
        "target_url": run.target_url,
        "loadrun_version": run.loadrun_version,
        "config": run.config,
        "summary": run.summary,
        "environment": run.environment,
        "gate": run.gate,
    }
    write_whole(jsonfast.dumps(data).decode() + "\n")


def _run_filter(
    target: str | None, profile: str | None, verdict: str | None, since_unix: float | None, limit: int
) -> Any:
    from loadrun.history import RunFilter

    verdicts = ("pass", "regression", "invalid", "no_baseline", "none")
    if verdict is not None and verdict not in verdicts:
        raise UsageError(f"--verdict {verdict!r}: one of {', '.join(verdicts)}")
    return RunFilter(target=target, profile=profile, verdict=verdict, since_unix=since_unix, limit=limit)


@app.command("compare")
def compare_command(
    targets_path: Annotated[
        Path, typer.Argument(metavar="TARGETS", help="Targets TOML (names, URLs, prices).")
    ],
    profile_path: Annotated[
        Path | None, typer.Argument(metavar="[PROFILE]", help="Profile TOML; default: a short chat.")
    ] = None,
    concurrency: Annotated[
        list[int] | None, typer.Option("--concurrency", "-c", min=1, help="Load level (repeatable).")
    ] = None,
    rounds: Annotated[int, typer.Option(min=1, help="Turns per target and level (A B C A B C ...).")] = 3,
    requests_per_round: Annotated[
        int | None, typer.Option("--requests-per-round", "-n", min=1, help="Measured requests per turn.")
    ] = None,
    seconds_per_round: Annotated[
        float | None, typer.Option("--seconds-per-round", "-d", min=0.1, help="Measured seconds per turn.")
    ] = None,
    warmup: Annotated[float | None, typer.Option(min=0.0, help="Warm-up seconds of every turn.")] = None,
    confidence: Annotated[
        float, typer.Option(min=0.5, max=0.999, help="Confidence for all intervals of a pair together.")
    ] = 0.95,
    smallest_difference: Annotated[
        float, typer.Option(min=0.0, max=0.9, help="Relative difference below which targets are alike.")
    ] = 0.05,
    percentile: Annotated[
        list[float] | None, typer.Option(help="Percentile to compare (repeatable); default 50 and 90.")
    ] = None,
    resamples: Annotated[int, typer.Option(min=200, help="Bootstrap resamples.")] = 4000,
    seed: Annotated[int, typer.Option(help="Seed of the bootstrap.")] = 0,
    out: OutOption = Path("runs"),
    json_output: Annotated[bool, typer.Option("--json", help="Print compare.json on stdout.")] = False,
    time_limit: Annotated[float, typer.Option(min=1.0, help="Hard bound on the comparison, s.")] = 3600.0,
    yes: Annotated[
        bool, typer.Option("--yes", help="Confirm loading targets that are not on this machine.")
    ] = False,
) -> None:
    """Compare targets on one workload in interleaved rounds; writes compare.json and report.html."""
    import dataclasses

    from loadrun.compare import CompareSettings, RoundDone, compare, plan_text
    from loadrun.report.terminal import render_comparison
    from loadrun.targets import load_targets

    targets = load_targets(targets_path)
    settings = CompareSettings(
        targets=targets.targets,
        profile=load_profile(profile_path) if profile_path else Profile(),
        levels=tuple(concurrency or ()),
        rounds=rounds,
        requests_per_round=requests_per_round,
        seconds_per_round=seconds_per_round,
        warmup_s=warmup,
        confidence=confidence,
        smallest_difference=smallest_difference,
        percentiles=tuple(percentile or (50.0, 90.0)),
        resamples=resamples,
        seed=seed,
        out_dir=out,
        time_limit_s=time_limit,
        confirmed=yes,
        description=targets.description,
    )
    for spec in settings.targets:
        problem = None if spec.is_loopback else cap_excess(concurrency=max(settings.concurrencies()))
        if problem is not None:
            raise UsageError(f"{problem} for target {spec.name}, which is not on this machine")
    if not yes and not all(spec.is_loopback for spec in settings.targets):
        say(plan_text(settings))
        if not sys.stdin.isatty():
            raise UsageError("not confirmed: pass --yes to load targets that are not on this machine")
        if not typer.confirm("Send this load?", default=False, err=True):
            raise UsageError("not confirmed; nothing was sent")
        settings = dataclasses.replace(settings, confirmed=True)
    _say_mocks(settings.targets)

    def progress(done: RoundDone) -> None:
        requests = done.summary["requests"]
        ttft = done.summary["latency"]["ttft"].get("p50_ms")
        ttft_text = f", TTFT p50 {ttft:.1f} ms" if ttft is not None else ""
        say(
            f"concurrency {done.level}, round {done.round}/{done.rounds}, {done.target}: "
            f"{requests['ok']} ok, {requests['failed']} failed{ttft_text}"
        )

    result = compare(settings, on_round=progress)
    if json_output:
        write_whole(jsonfast.dumps(result.data).decode() + "\n")
    else:
        render_comparison(result.data)
    say(f"comparison folder {result.folder}")
    if result.report is not None:
        say(f"report            {result.report}")


def _level_overrides(
    concurrency: int | None,
    rate: float | None,
    requests: int | None,
    duration: float | None,
    warmup: float | None,
    time_limit: float,
) -> Any:
    from loadrun.target_pool import LevelOverrides

    return LevelOverrides(concurrency, rate, requests, duration, warmup, time_limit)


_ConcurrencyOption = Annotated[
    int | None, typer.Option("--concurrency", "-c", min=1, help="Closed loop: runs in flight.")
]
_RateOption = Annotated[float | None, typer.Option(help="Open loop: arrivals per second (Poisson).")]
_RequestsOption = Annotated[int | None, typer.Option("--requests", "-n", min=1, help="Measured arrivals.")]
_DurationOption = Annotated[float | None, typer.Option("--duration", "-d", min=0.1, help="Measured seconds.")]
_WarmupOption = Annotated[float | None, typer.Option(min=0.0, help="Warm-up seconds.")]
_TargetsOption = Annotated[
    Path | None, typer.Option("--targets", help="Targets TOML instead of the one the profile names.")
]


@app.command("route")
def route_command(
    profile_path: Annotated[
        Path, typer.Argument(metavar="PROFILE", help="Profile TOML with a [routing] table.")
    ],
    targets: _TargetsOption = None,
    concurrency: _ConcurrencyOption = None,
    rate: _RateOption = None,
    requests: _RequestsOption = None,
    duration: _DurationOption = None,
    warmup: _WarmupOption = None,
    metric: Annotated[
        str, typer.Option(help="Latency metric of the frontier: ttft, itl, tpot, e2e.")
    ] = "e2e",
    out: OutOption = Path("runs"),
    json_output: Annotated[bool, typer.Option("--json", help="Print routed.json on stdout.")] = False,
    time_limit: Annotated[float, typer.Option(min=1.0, help="Hard bound on the run, s.")] = 3600.0,
    yes: Annotated[
        bool, typer.Option("--yes", help="Confirm loading targets that are not on this machine.")
    ] = False,
) -> None:
    """Split a profile's traffic across targets (by share or rule): blended latency and cost,
    and with two targets the routing frontier (frontier.json, frontier.svg, frontier.png)."""
    from loadrun.report.terminal import render_routed
    from loadrun.routing import RouteSettings, load_routed_profile, run_routed

    routed = load_routed_profile(profile_path, targets)
    _say_mocks(routed.routing.specs())
    overrides = _level_overrides(concurrency, rate, requests, duration, warmup, time_limit)
    result = run_routed(
        RouteSettings(
            routed, overrides, out_dir=out, confirmed=yes, handle_signals=True, frontier_metric=metric
        )
    )
    _show_run(result.data, result.folder, json_output, render_routed)


@app.command("pipeline")
def pipeline_command(
    profile_path: Annotated[Path, typer.Argument(metavar="PROFILE", help="Profile TOML with a [pipeline].")],
    targets: _TargetsOption = None,
    concurrency: _ConcurrencyOption = None,
    rate: _RateOption = None,
    requests: _RequestsOption = None,
    duration: _DurationOption = None,
    warmup: _WarmupOption = None,
    out: OutOption = Path("runs"),
    json_output: Annotated[bool, typer.Option("--json", help="Print pipeline.json on stdout.")] = False,
    time_limit: Annotated[float, typer.Option(min=1.0, help="Hard bound on the run, s.")] = 3600.0,
    yes: Annotated[
        bool, typer.Option("--yes", help="Confirm loading targets that are not on this machine.")
    ] = False,
) -> None:
    """Run a multi-call pipeline (one arrival = one run of all its stages): per stage and end
    to end latency, failures by stage, tokens and cost per run."""
    from loadrun.pipeline import PipelineSettings, load_pipeline_profile, run_pipeline
    from loadrun.report.terminal import render_pipeline

    pipeline = load_pipeline_profile(profile_path, targets)
    _say_mocks(pipeline.specs())
    overrides = _level_overrides(concurrency, rate, requests, duration, warmup, time_limit)
    settings = PipelineSettings(pipeline, overrides, out_dir=out, confirmed=yes, handle_signals=True)
    result = run_pipeline(settings)
    _show_run(result.data, result.folder, json_output, render_pipeline)


@app.command("frontier")
def frontier_command(
    first: Annotated[Path, typer.Argument(metavar="FOLDER", help="A comparison folder, or a run folder.")],
    second: Annotated[
        Path | None, typer.Argument(metavar="[SECOND_RUN]", help="The second run folder (two runs).")
    ] = None,
    names: Annotated[
        list[str] | None, typer.Option("--target", help="Comparison: the two targets, in order (give twice).")
    ] = None,
    level: Annotated[
        int | None, typer.Option(help="Comparison: the concurrency (default the first).")
    ] = None,
    cost: Annotated[
        list[float] | None, typer.Option(min=0.0, help="Two runs: cost per request of each (give twice).")
    ] = None,
    metric: Annotated[str, typer.Option(help="Latency metric: ttft, itl, tpot, e2e.")] = "e2e",
    out: Annotated[Path | None, typer.Option(help="Where to write; default the (first) folder.")] = None,
) -> None:
    """What-if routing between two measured targets: latency percentiles and blended cost for
    every split from 0 to 100 %, with the frontier plot."""
    from loadrun.frontier import (
        frontier_table,
        measured_from_compare,
        measured_from_run,
        routing_frontier,
        write_frontier,
    )
    from loadrun.report.terminal import render_frontier_table

    if second is None:
        if not names or len(names) != 2:
            raise UsageError("a comparison folder needs the two targets: --target A --target B")
        measured = measured_from_compare(first, names[0], names[1], metric=metric, level=level)
        source = f"comparison {first}"
    else:
        costs: list[float | None] = [*cost] if cost else [None, None]
        if len(costs) != 2:
            raise UsageError("give --cost twice (one per run) or not at all")
        measured = (
            measured_from_run(first, costs[0], metric=metric),
            measured_from_run(second, costs[1], metric=metric),
        )
        source = f"runs {first} and {second}"
    frontier = routing_frontier(*measured, metric=metric, source=source)
    data = {"first": frontier.first, "second": frontier.second, "table": frontier_table(frontier)}
    render_frontier_table(data, frontier.currency)
    for path in write_frontier(out or first, frontier):
        say(f"wrote {path}")


@app.command("report")
def report_command(
    folder: Annotated[Path, typer.Argument(metavar="RUN_FOLDER", help="A run, comparison or capacity run.")],
    output: Annotated[
        Path | None, typer.Option(help="Where to write the HTML; default RUN_FOLDER/report.html.")
    ] = None,
) -> None:
    """Write the self-contained HTML report of a run folder."""
    from loadrun.report.html import write_report

    say(f"report {write_report(folder, output)}")


@app.command("export")
def export_command(
    folder: Annotated[Path, typer.Argument(metavar="RUN_FOLDER", help="A run or comparison folder.")],
    fmt: Annotated[str, typer.Option("--format", help="csv or parquet (needs pyarrow).")] = "csv",
    out: Annotated[Path | None, typer.Option(help="Folder for the files; default RUN_FOLDER.")] = None,
) -> None:
    """Write a run folder's records and summaries as CSV or Parquet tables."""
    from loadrun.export import export_folder

    for path in export_folder(folder, fmt, out):
        say(f"wrote {path}")


@app.command("capacity")
def capacity_command(
    profile_path: Annotated[
        Path | None, typer.Argument(metavar="[PROFILE]", help="Profile TOML; default: a short chat.")
    ] = None,
    slo: Annotated[
        list[str] | None,
        typer.Option(
            help="SLO, repeatable: METRIC[:pNN]=MS (ttft, itl, tpot, e2e; p99 if no pNN) or errors=PERCENT."
        ),
    ] = None,
    base_url: BaseUrlOption = None,
    model: ModelOption = None,
    api_key_env: ApiKeyEnvOption = None,
    header: HeaderOption = None,
    axis: Annotated[
        str, typer.Option(help="Load axis: concurrency (requests in flight) or rate (Poisson arrivals/s).")
    ] = "concurrency",
    start: Annotated[float, typer.Option(min=1, help="First load to try.")] = 1,
    max_load: Annotated[float, typer.Option(min=1, help="Highest load the search may try.")] = 512,
    growth: Annotated[float, typer.Option(min=1.1, help="Load factor between growing steps.")] = 2.0,
    step_min_seconds: Annotated[float, typer.Option(min=0.1, help="Shortest measured step, s.")] = 2.0,
    step_max_seconds: Annotated[float, typer.Option(min=0.1, help="Longest measured step, s.")] = 12.0,
    budget_steps: Annotated[int, typer.Option(min=1, help="Most load steps.")] = 8,
    budget_seconds: Annotated[float, typer.Option(min=1, help="Most seconds for the whole search.")] = 170,
    budget_requests: Annotated[int | None, typer.Option(min=1, help="Most requests in all.")] = None,
    budget_tokens: Annotated[int | None, typer.Option(min=1, help="Most input + output tokens.")] = None,
    budget_money: Annotated[
        float | None, typer.Option(min=0.0, help="Most money at the target's token prices (--price-*).")
    ] = None,
    price_input: PriceInputOption = None,
    price_output: PriceOutputOption = None,
    headroom: Annotated[
        float, typer.Option(min=0.0, max=0.95, help="Share of capacity kept free at the operating point.")
    ] = 0.2,
    peak: Annotated[
        float | None, typer.Option(min=0.0, help="Expected peak, requests/s, for the replica count.")
    ] = None,
    spare: Annotated[int, typer.Option(min=0, help="Spare replicas on top of the peak's.")] = 0,
    replica_price_per_hour: Annotated[
        float | None, typer.Option(min=0.0, help="What one replica costs per hour.")
    ] = None,
    accelerator_price_per_hour: Annotated[
        float | None, typer.Option(min=0.0, help="What one accelerator costs per hour (with --accelerators).")
    ] = None,
    accelerators: Annotated[int, typer.Option(min=1, help="Accelerators per replica.")] = 1,
    hosted_input_price: Annotated[
        float | None, typer.Option(min=0.0, help="A hosted API's price per million input tokens.")
    ] = None,
    hosted_output_price: Annotated[
        float | None, typer.Option(min=0.0, help="A hosted API's price per million output tokens.")
    ] = None,
    input_tokens: InputTokensOption = None,
    output_tokens: OutputTokensOption = None,
    json_output: Annotated[bool, typer.Option("--json", help="Print the result as JSON on stdout.")] = False,
    out: OutOption = Path("runs"),
    no_save: Annotated[bool, typer.Option("--no-save", help="Write no run folder (and no plots).")] = False,
    transport: TransportOption = "fast",
    mock_engine: MockEngineOption = DEFAULT_MOCK_ENGINE,
    timeout: TimeoutOption = 120.0,
    connect_timeout: ConnectTimeoutOption = 10.0,
    insecure_skip_tls_verify: InsecureOption = False,
    yes: YesOption = False,
) -> None:
    """Find how much load one replica holds within its SLOs; advise on scale-out and cost."""
    from dataclasses import replace

    from loadrun.capacity import (
        AdviceSettings,
        CapacitySettings,
        SearchBudget,
        StepPolicy,
        describe_plan,
        find_capacity,
        parse_slo,
    )
    from loadrun.cost import ReplicaPrice, TokenPrices
    from loadrun.report.terminal import render_capacity

    profile = load_profile(profile_path) if profile_path else Profile()
    if input_tokens or output_tokens:
        request = replace(
            profile.request,
            input_tokens=input_tokens or profile.request.input_tokens,
            output_tokens=output_tokens or profile.request.output_tokens,
        )
        profile = replace(profile, request=request)
    if replica_price_per_hour is not None and accelerator_price_per_hour is not None:
        raise UsageError("give --replica-price-per-hour or --accelerator-price-per-hour, not both")
    replica_price = None
    if replica_price_per_hour is not None:
        replica_price = ReplicaPrice(replica_price_per_hour)
    elif accelerator_price_per_hour is not None:
        replica_price = ReplicaPrice.from_accelerators(accelerator_price_per_hour, accelerators)
    hosted = None
    if hosted_input_price is not None or hosted_output_price is not None:
        hosted = TokenPrices(hosted_input_price or 0.0, hosted_output_price or 0.0)
    target_prices = None
    if price_input is not None or price_output is not None:
        target_prices = TokenPrices(price_input or 0.0, price_output or 0.0)
    target = _target(base_url, model, api_key_env, header or [], insecure_skip_tls_verify)
    settings = CapacitySettings(
        profile=profile,
        target=target,
        slos=tuple(parse_slo(text) for text in slo or []),
        axis=axis,
        start_load=start,
        max_load=max_load,
        growth=growth,
        step=StepPolicy(min_seconds=step_min_seconds, max_seconds=step_max_seconds),
        budget=SearchBudget(
            max_steps=budget_steps,
            max_seconds=budget_seconds,
            max_requests=budget_requests,
            max_tokens=budget_tokens,
            max_cost=budget_money,
        ),
        advice=AdviceSettings(
            headroom=headroom,
            peak_requests_per_s=peak,
            spare_replicas=spare,
            replica_price=replica_price,
            hosted_prices=hosted,
        ),
        target_prices=target_prices,
        out_dir=None if no_save else out,
        transport=transport,
        mock_engine=mock_engine,
        total_timeout_s=timeout,
        connect_timeout_s=connect_timeout,
        confirmed=yes,
    )
    if target is not None and not target.is_loopback:
        load = {"concurrency": max_load} if axis == "concurrency" else {"rate_per_s": max_load}
        problem = cap_excess(**load)
        if problem is not None:
            raise UsageError(f"--max-load: {problem} for a target that is not on this machine")
    if target is not None and not target.is_loopback and not yes:
        _ask_to_send(describe_plan(settings, target))
        settings = replace(settings, confirmed=True)
    if target is None:
        say(f"No --base-url given: searching the bundled mock server (engine {mock_engine}) on loopback.")
    result = find_capacity(settings)
    if json_output:
        write_whole(jsonfast.dumps(result.data).decode() + "\n")
    else:
        render_capacity(result.data)
    if result.folder is not None:
        from loadrun.report.html import write_report

        say(f"report {write_report(result.folder)}")
    if not result.data["capacity"].get("load"):
        raise typer.Exit(1)


def _target(
    base_url: str | None,
    model: str | None,
    api_key_env: str | None,
    headers: list[str],
    insecure: bool,
    allow_key_over_http_to: str | None = None,
) -> Target | None:
    if base_url is None:
        if model or api_key_env or headers:
            raise UsageError("--model, --api-key-env and --header need --base-url")
        return None
    if not model:
        raise UsageError("--base-url needs --model")
    pairs = []
    for text in headers:
        name, sep, value = text.partition(":")
        name, value = name.strip(), value.strip()
        if not sep or not _HEADER_NAME.fullmatch(name):
            raise UsageError(f"header {name!r}: write 'Name: value' with a valid header name")
        if name.lower() == "authorization":  # never echo its value: it is a credential
            raise UsageError("header Authorization: keys go in --api-key-env (a variable's name), not here")
        if any(char in value for char in "\r\n\0"):
            raise UsageError(f"header {name}: the value must be one line")
        pairs.append((name, value))
    target = Target(
        base_url=base_url,
        model=model,
        api_key_env=api_key_env,
        name=model,
        headers=tuple(pairs),
        verify_tls=not insecure,
    )
    host = target.endpoint.host
    named = (allow_key_over_http_to or "").strip("[]").lower()
    allowed = bool(named) and named == host.lower()
    if target.endpoint.scheme == "http" and api_key_env and not target.is_loopback and not allowed:
        raise UsageError(
            "refusing to send an API key over plain http to a host that is not this machine; "
            f"use https, or name the host with --allow-key-over-http-to {host} if you accept the risk"
        )
    target.api_key()  # fail now, not mid-run, when the named variable is unset
    return target


def _token_prices(price_input: float | None, price_output: float | None) -> Any:
    if price_input is None and price_output is None:
        return None
    from loadrun.cost import TokenPrices

    return TokenPrices(price_input or 0.0, price_output or 0.0)


def _confirm(target: Target, settings: MeasureSettings, prices: Any = None) -> None:
    _ask_to_send(describe_plan(settings, target, prices))


def _ask_to_send(text: str) -> None:
    """Show what will be sent and ask; refuse when nobody can answer (no terminal)."""
    say(text)
    if not sys.stdin.isatty():
        raise UsageError("not confirmed: pass --yes to load a target that is not on this machine")
    if not typer.confirm("Send this load?", default=False, err=True):
        raise UsageError("not confirmed; nothing was sent")


def _replace_confirmed(settings: MeasureSettings) -> MeasureSettings:
    from dataclasses import replace

    return replace(settings, confirmed=True)


def _fail(kind: str, message: str, code: int) -> NoReturn:
    console(stderr=True).print(f"{kind}: {_one_line(message)}", markup=False, highlight=False)
    raise SystemExit(code)


def _say_mocks(specs: Iterable[TargetSpec]) -> None:
    mocks = [spec.name for spec in specs if spec.is_mock]
    if mocks:
        say(f"Starting the bundled mock server for {', '.join(mocks)} on loopback ports.")


def _show_run(
    data: dict[str, Any], folder: Path | None, json_output: bool, render: Callable[[dict[str, Any]], None]
) -> None:
    """A multi-target run's result: JSON or the terminal view, its folder, exit 130 if stopped."""
    if json_output:
        write_whole(jsonfast.dumps(data).decode() + "\n")
    else:
        render(data)
    say(f"run folder {folder}")
    _exit_if_interrupted(data)


def _exit_if_interrupted(summary: dict[str, Any]) -> None:
    interrupt = summary.get("interrupt")
    if interrupt:
        say(f"Interrupted by {interrupt['signal']}: the summary covers the requests that finished.")
        raise typer.Exit(EXIT_INTERRUPTED)


def _one_line(text: str) -> str:
    """Errors quote the user's input, which may hold line breaks and control characters."""
    if text.isprintable():
        return text
    return "".join(char if char.isprintable() else char.encode("unicode_escape").decode() for char in text)


_HEADER_NAME = re.compile(r"[A-Za-z0-9!#$%&'*+.^_`|~-]+")
"""A header name is an RFC 9110 token."""


@functools.cache
def _command_tree() -> Any:
    # Built once per process: typer rebuilds it on every call otherwise (tens of ms each).
    return typer.main.get_command(app)


def main(argv: list[str] | None = None) -> Any:
    """Entry point: errors are handled once, here; a user's mistake never shows a traceback."""
    args = sys.argv[1:] if argv is None else argv
    try:
        return _command_tree().main(args=args or ["--help"], standalone_mode=False)
    except LoadrunError as exc:
        _fail(type(exc).__name__, str(exc), exc.exit_code)
    except (typer.Abort, KeyboardInterrupt):
        _fail("Interrupted", "stopped by the user", 130)
    except typer.TyperException as exc:  # the command line itself was wrong
        _fail("UsageError", " ".join(exc.format_message().split()), 2)
    except typer.Exit as exc:
        raise SystemExit(exc.exit_code) from None
    finally:
        # A Ctrl-C that lands while the interpreter shuts down (after the run's own handlers
        # are gone) ends the process quietly instead of printing a traceback from threading.
        signal.signal(signal.SIGINT, signal.SIG_DFL)


if __name__ == "__main__":  # pragma: no cover
    main()
