"""Command line: ``python -m mock_server [--host H] [--port P] [--engine NAME_OR_TOML] ...``.

Faults and quirks (see ``faults.py`` and ``quirks.py``): ``--faults PLAN.toml``, then
``--fault KIND=RATE`` or ``--fault SETTING=VALUE`` and ``--quirk NAME[=VALUE]`` on top.

Runs until SIGINT or SIGTERM, then exits 0. Its first stdout line, once bound, is
``mock_server listening on http://H:PORT``.
"""

from __future__ import annotations

import argparse
import asyncio
import dataclasses
import gc
import signal
import sys
from collections.abc import Callable, Sequence

from mock_server.config import ConfigError, load_config, preset_names
from mock_server.engine import EngineConfig
from mock_server.faults import FAULT_KINDS, FaultPlan, load_plan, plan_with_options
from mock_server.launch import READY_PREFIX, serve


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="python -m mock_server",
        description="CPU-only mock of a continuous-batching LLM inference server.",
    )
    parser.add_argument("--host", default="127.0.0.1", help="address to bind (default 127.0.0.1)")
    parser.add_argument("--port", type=int, default=8000, help="port to bind; 0 picks a free one")
    parser.add_argument(
        "--engine",
        default=None,
        metavar="NAME_OR_TOML",
        help=f"engine preset ({', '.join(preset_names())}) or a TOML file (default small-fast)",
    )
    parser.add_argument("--model", default=None, help="model name to report (overrides the engine's)")
    parser.add_argument("--seed", type=int, default=None, help="seed of the generated text")
    parser.add_argument("--faults", default=None, metavar="TOML", help="fault plan: [faults] and [quirks]")
    parser.add_argument(
        "--fault",
        action="append",
        default=[],
        metavar="KEY=VALUE",
        help=f"a fault rate (KIND=RATE; kinds: {', '.join(FAULT_KINDS)}) or setting (stall_s=1.5)",
    )
    parser.add_argument(
        "--quirk", action="append", default=[], metavar="NAME[=VALUE]", help="a protocol quirk to play"
    )
    parser.add_argument(
        "--event-loop",
        choices=("auto", "asyncio", "uvloop"),
        default="auto",
        help="event loop implementation (auto: uvloop when installed)",
    )
    return parser


def _loop_factory(choice: str) -> Callable[[], asyncio.AbstractEventLoop] | None:
    if choice == "asyncio":
        return None
    try:
        import uvloop
    except ImportError:
        if choice == "uvloop":
            raise
        return None
    factory: Callable[[], asyncio.AbstractEventLoop] = uvloop.new_event_loop
    return factory


async def _serve_until_signal(config: EngineConfig, host: str, port: int, plan: FaultPlan) -> int:
    loop = asyncio.get_running_loop()
    stop = asyncio.Event()
    for signum in (signal.SIGINT, signal.SIGTERM):
        loop.add_signal_handler(signum, stop.set)
    async with serve(config, host, port, plan) as server:
        # Long-lived startup objects need no more collection passes (fewer GC pauses).
        gc.collect()
        gc.freeze()
        sys.stdout.write(f"{READY_PREFIX}{server.url}\n")
        sys.stdout.flush()
        await stop.wait()
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        config = load_config(args.engine)
        overrides = {
            key: value for key, value in (("model", args.model), ("seed", args.seed)) if value is not None
        }
        config = dataclasses.replace(config, **overrides)
        plan = load_plan(args.faults) if args.faults else FaultPlan()
        plan = plan_with_options(plan, args.fault, args.quirk)
    except (ConfigError, ValueError) as exc:
        print(f"mock_server: error: {exc}", file=sys.stderr)
        return 2
    try:
        with asyncio.Runner(loop_factory=_loop_factory(args.event_loop)) as runner:
            return runner.run(_serve_until_signal(config, args.host, args.port, plan))
    except OSError as exc:
        print(f"mock_server: error: cannot listen on {args.host}:{args.port}: {exc}", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
