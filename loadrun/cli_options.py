"""Command-line options that several commands share, declared once.

Each alias carries an option's flags, checks and help; the commands keep their own
defaults in their signatures (``timeout: TimeoutOption = 600.0``). Typer copies the
option's description per command, so one alias may serve many commands.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from loadrun.transports import TRANSPORT_NAMES

# --- the target ----------------------------------------------------------------------------
BaseUrlOption = Annotated[str | None, typer.Option(help="API base URL, e.g. http://127.0.0.1:8000/v1.")]
ModelOption = Annotated[str | None, typer.Option(help="Model name to request.")]
ApiKeyEnvOption = Annotated[
    str | None, typer.Option(help="NAME of the environment variable holding the API key.")
]
HeaderOption = Annotated[
    list[str] | None, typer.Option(help="Extra request header 'Name: value' (repeatable).")
]
InsecureOption = Annotated[
    bool, typer.Option("--insecure-skip-tls-verify", help="Turn TLS certificate checks off.")
]
YesOption = Annotated[
    bool, typer.Option("--yes", help="Confirm loading a target that is not on this machine.")
]
ExceedRemoteCapsOption = Annotated[
    bool, typer.Option("--exceed-remote-caps", help="Lift the load caps for a remote target.")
]
MockEngineOption = Annotated[str, typer.Option(help="Engine preset or TOML of the bundled mock.")]
TransportOption = Annotated[str, typer.Option(help=f"Transport: {' or '.join(TRANSPORT_NAMES)}.")]

# --- the load level --------------------------------------------------------------------------
RequestsOption = Annotated[int | None, typer.Option("--requests", "-n", min=1, help="Measured requests.")]
DurationOption = Annotated[float | None, typer.Option("--duration", "-d", min=0.1, help="Measured seconds.")]
WarmupOption = Annotated[
    float | None, typer.Option(min=0.0, help="Warm-up seconds, kept out of the measurement.")
]
InputTokensOption = Annotated[
    int | None, typer.Option(min=1, help="Fixed input length for every request class.")
]
OutputTokensOption = Annotated[
    int | None, typer.Option(min=1, help="Fixed max_tokens for every request class.")
]

# --- limits ------------------------------------------------------------------------------------
TimeoutOption = Annotated[float, typer.Option(min=0.001, help="Seconds a whole request may take.")]
ConnectTimeoutOption = Annotated[float, typer.Option(min=0.001, help="Seconds to open a connection.")]
TimeLimitOption = Annotated[float, typer.Option(min=1.0, help="Hard bound on the whole run, seconds.")]

# --- where results go ----------------------------------------------------------------------------
OutOption = Annotated[Path, typer.Option(help="Folder for run folders.")]
PriceInputOption = Annotated[
    float | None, typer.Option(min=0.0, help="The target's price per million input tokens.")
]
PriceOutputOption = Annotated[
    float | None, typer.Option(min=0.0, help="The target's price per million output tokens.")
]
