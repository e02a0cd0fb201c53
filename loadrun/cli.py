"""The command line: parse, call the API, render. No measurement logic lives here."""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Annotated, Any, NoReturn

import typer

from loadrun import jsonfast
from loadrun.caution import plan_text
from loadrun.errors import LoadrunError, UsageError
from loadrun.profile import Profile, RequestSpec, load_profile
from loadrun.report.terminal import console, render_calibration, render_summary, say
from loadrun.runner import DEFAULT_MOCK_ENGINE, MeasureSettings, measure
from loadrun.slo import Slo
from loadrun.target import Target
from loadrun.transports import TRANSPORT_NAMES

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
    base_url: Annotated[str | None, typer.Option(help="API base URL, e.g. http://127.0.0.1:8000/v1.")] = None,
    model: Annotated[str | None, typer.Option(help="Model name to request.")] = None,
    api_key_env: Annotated[
        str | None, typer.Option(help="NAME of the environment variable holding the API key.")
    ] = None,
    header: Annotated[
        list[str] | None, typer.Option(help="Extra request header 'Name: value' (repeatable).")
    ] = None,
    concurrency: Annotated[
        int | None, typer.Option("--concurrency", "-c", min=1, help="Requests in flight.")
    ] = None,
    requests: Annotated[
        int | None, typer.Option("--requests", "-n", min=1, help="Measured requests.")
    ] = None,
    duration: Annotated[
        float | None, typer.Option("--duration", "-d", min=0.1, help="Measured seconds.")
    ] = None,
    warmup: Annotated[
        float | None, typer.Option(min=0.0, help="Warm-up seconds, kept out of the measurement.")
    ] = None,
    input_tokens: Annotated[
        int | None, typer.Option(min=1, help="Override the profile's input length.")
    ] = None,
    output_tokens: Annotated[
        int | None, typer.Option(min=1, help="Override the profile's max_tokens.")
    ] = None,
    slo: Annotated[
        list[str] | None, typer.Option(help="Per-request SLO for goodput, METRIC=MS (ttft, tpot, itl, e2e).")
    ] = None,
    json_output: Annotated[bool, typer.Option("--json", help="Print the summary as JSON on stdout.")] = False,
    out: Annotated[Path, typer.Option(help="Folder for run folders.")] = Path("runs"),
    no_save: Annotated[bool, typer.Option("--no-save", help="Write no run folder.")] = False,
    transport: Annotated[str, typer.Option(help=f"Transport: {' or '.join(TRANSPORT_NAMES)}.")] = "fast",
    mock_engine: Annotated[
        str, typer.Option(help="Engine preset or TOML of the bundled mock.")
    ] = DEFAULT_MOCK_ENGINE,
    timeout: Annotated[float, typer.Option(min=0.001, help="Seconds a whole request may take.")] = 600.0,
    connect_timeout: Annotated[float, typer.Option(min=0.001, help="Seconds to open a connection.")] = 10.0,
    time_limit: Annotated[
        float, typer.Option(min=1.0, help="Hard bound on the whole run, seconds.")
    ] = 3600.0,
    insecure_skip_tls_verify: Annotated[
        bool, typer.Option("--insecure-skip-tls-verify", help="Turn TLS certificate checks off.")
    ] = False,
    yes: Annotated[
        bool, typer.Option("--yes", help="Confirm loading a target that is not on this machine.")
    ] = False,
) -> None:
    """Measure one profile at one concurrency and print the summary."""
    profile = load_profile(profile_path) if profile_path else Profile()
    if input_tokens or output_tokens:
        spec = profile.request
        profile = Profile(
            name=profile.name,
            seed=profile.seed,
            request=RequestSpec(
                input_tokens=input_tokens or spec.input_tokens,
                output_tokens=output_tokens or spec.output_tokens,
                stream=spec.stream,
                system_prompt=spec.system_prompt,
                sampling=spec.sampling,
            ),
            load=profile.load,
            source=profile.source,
        )
    if requests is not None and duration is not None:
        raise UsageError("give --requests or --duration, not both")
    target = _target(base_url, model, api_key_env, header or [], insecure_skip_tls_verify)
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
    )
    if target is not None and not target.is_loopback and not yes:
        _confirm(target, settings)
        settings = _replace_confirmed(settings)
    if target is None:
        say(
            f"No --base-url given: starting the bundled mock server (engine {mock_engine}) on a loopback port."
        )
    result = measure(settings)
    if json_output:
        sys.stdout.write(jsonfast.dumps(result.summary).decode() + "\n")
    else:
        render_summary(result.summary)
    if result.summary.get("aborted"):
        raise typer.Exit(1)


@app.command("calibrate")
def calibrate_command(
    max_streams: Annotated[int, typer.Option(min=10, help="Highest stream count to try.")] = 800,
    seconds: Annotated[float, typer.Option(min=1.0, help="Measured seconds per level.")] = 4.0,
    limit_ms: Annotated[float, typer.Option(min=0.01, help="Receive-error p99 limit, ms.")] = 1.0,
    transport: Annotated[str, typer.Option(help=f"Transport: {' or '.join(TRANSPORT_NAMES)}.")] = "fast",
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
) -> None:
    """Run the bundled mock inference server in the foreground until Ctrl-C."""
    from mock_server.__main__ import main as mock_main

    raise typer.Exit(mock_main(["--host", host, "--port", str(port), "--engine", engine]))


def _target(
    base_url: str | None, model: str | None, api_key_env: str | None, headers: list[str], insecure: bool
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
        if not sep or not name.strip():
            raise UsageError(f"header {text!r}: write 'Name: value'")
        pairs.append((name.strip(), value.strip()))
    target = Target(
        base_url=base_url,
        model=model,
        api_key_env=api_key_env,
        name=model,
        headers=tuple(pairs),
        verify_tls=not insecure,
    )
    if target.endpoint.scheme == "http" and api_key_env and not target.is_loopback:
        raise UsageError("refusing to send an API key over plain http to a host that is not this machine")
    target.api_key()  # fail now, not mid-run, when the named variable is unset
    return target


def _confirm(target: Target, settings: MeasureSettings) -> None:
    plan = settings.plan()
    text = plan_text(
        target,
        requests=plan.requests,
        duration_s=plan.duration_s,
        concurrency=plan.concurrency,
        input_tokens=settings.profile.request.input_tokens,
        output_tokens=settings.profile.request.output_tokens,
    )
    say(text)
    if not sys.stdin.isatty():
        raise UsageError("not confirmed: pass --yes to load a target that is not on this machine")
    if not typer.confirm("Send this load?", default=False, err=True):
        raise UsageError("not confirmed; nothing was sent")


def _replace_confirmed(settings: MeasureSettings) -> MeasureSettings:
    from dataclasses import replace

    return replace(settings, confirmed=True)


def _fail(kind: str, message: str, code: int) -> NoReturn:
    console(stderr=True).print(f"{kind}: {message}", markup=False, highlight=False)
    raise SystemExit(code)


def main(argv: list[str] | None = None) -> Any:
    """Entry point: errors are handled once, here; a user's mistake never shows a traceback."""
    args = sys.argv[1:] if argv is None else argv
    try:
        return app(args=args or ["--help"], standalone_mode=False)
    except LoadrunError as exc:
        _fail(type(exc).__name__, str(exc), exc.exit_code)
    except (typer.Abort, KeyboardInterrupt):
        _fail("Interrupted", "stopped by the user", 130)
    except typer.TyperException as exc:  # the command line itself was wrong
        _fail("UsageError", " ".join(exc.format_message().split()), 2)
    except typer.Exit as exc:
        raise SystemExit(exc.exit_code) from None


if __name__ == "__main__":  # pragma: no cover
    main()
