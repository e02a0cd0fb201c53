"""The cautions shown before loading an endpoint that is not on this machine."""

from __future__ import annotations

from loadrun.target import Target

CAUTION = (
    "A load test can take a service down, run up a bill and break a provider's terms. "
    "Load only endpoints you own or have written permission to test, respect the "
    "provider's rate limits and terms of use, and tell the service's owners first."
)


def plan_text(
    target: Target,
    *,
    requests: int | None,
    duration_s: float | None,
    concurrency: int,
    input_tokens: int,
    output_tokens: int,
) -> str:
    """What is about to be sent, in words, for the confirmation prompt."""
    if requests is not None:
        volume = f"{requests} requests"
        tokens = (
            f"about {requests * input_tokens:,} input and up to {requests * output_tokens:,} output tokens"
        )
    else:
        volume = f"requests for {duration_s:g} s"
        tokens = f"{input_tokens} input and up to {output_tokens} output tokens per request"
    return (
        f"loadrun will send {volume} at concurrency {concurrency} to {target.base_url} "
        f"(model {target.model}): {tokens}.\n{CAUTION}"
    )
