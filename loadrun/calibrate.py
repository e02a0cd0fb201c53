"""How many streams this machine can time honestly.

The bundled mock stamps every chunk with its own monotonic send time; the same host's
clock read at receive gives loadrun's own receive error (network stack + event loop +
parsing). Concurrency rises until that error's p99 passes the limit.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import anyio

from loadrun.profile import LoadSpec, Profile, RequestSpec
from loadrun.runner import MeasureSettings, embedded_mock, event_loop_options, measure_async

CALIBRATION_ENGINE = "wide"
"""Mock preset whose step time does not grow with the batch: every stream gets 50 tokens/s."""
DEFAULT_LEVELS = (10, 25, 50, 100, 200, 400, 800)


@dataclass(frozen=True, slots=True)
class CalibrationSettings:
    levels: tuple[int, ...] = DEFAULT_LEVELS
    seconds_per_level: float = 4.0
    limit_ms: float = 1.0
    transport: str = "fast"


def calibrate(settings: CalibrationSettings) -> tuple[list[dict[str, Any]], str]:
    return anyio.run(calibrate_async, settings, backend="asyncio", backend_options=event_loop_options())


async def calibrate_async(settings: CalibrationSettings) -> tuple[list[dict[str, Any]], str]:
    rows: list[dict[str, Any]] = []
    profile = Profile(
        name="calibration",
        request=RequestSpec(input_tokens=8, output_tokens=100, stream=True),
        load=LoadSpec(),
    )
    with embedded_mock(CALIBRATION_ENGINE) as (target, _):
        for streams in settings.levels:
            result = await measure_async(
                MeasureSettings(
                    profile=profile,
                    target=target,
                    concurrency=streams,
                    duration_s=settings.seconds_per_level,
                    warmup_s=1.0,
                    out_dir=None,
                    transport=settings.transport,
                )
            )
            generator = result.summary["generator"]
            p99 = generator["receive_error_p99_ms"]
            row = {
                "streams": streams,
                "events_per_s": result.summary["throughput"]["output_tokens_per_s"],
                "receive_p50_ms": generator["receive_error_p50_ms"],
                "receive_p99_ms": p99,
                "loop_lag_p99_ms": generator["loop_lag_p99_ms"],
                # Kernel receive stamps stay exact while the loop is late, but a late loop also
                # sends late and falls behind: both must hold.
                "within_limit": p99 is not None and p99 < settings.limit_ms and not generator["limited"],
            }
            rows.append(row)
            if not row["within_limit"]:
                break
    good = [row for row in rows if row["within_limit"]]
    if good:
        best = good[-1]
        verdict = (
            f"up to {best['streams']} streams ({best['events_per_s']:.0f} events/s) loadrun's own receive "
            f"error stays under {settings.limit_ms:g} ms p99 and its event loop keeps up, on this machine"
        )
    else:
        verdict = (
            f"even at {rows[0]['streams']} streams the receive error passes {settings.limit_ms:g} ms p99 "
            "or the event loop falls behind on this machine (is something else busy?)"
        )
    return rows, verdict
