"""The cautions shown before loading an endpoint that is not on this machine, and the caps.

A target that is not on this machine gets, before anything is sent: a plain account of
what will be sent (requests, tokens, and the cost when prices are known), the caution
below, a confirmation (``--yes`` when nobody can answer), and hard caps on concurrency and
arrival rate that only an explicit ``--exceed-remote-caps`` lifts.
"""

from __future__ import annotations

from loadrun.cost import TokenPrices
from loadrun.errors import UsageError
from loadrun.target import Target

CAUTION = (
    "A load test can take a service down, run up a bill and break a provider's terms. "
    "Load only endpoints you own or have written permission to test, respect the "
    "provider's rate limits and terms of use, and tell the service's owners first."
)
REMOTE_MAX_CONCURRENCY = 32
REMOTE_MAX_RATE_PER_S = 10.0
"""Caps for targets not on this machine (common practice, no source): enough to compare
providers and to test a modest deployment, too little for a typo to flood a service."""
EXCEED_CAPS_OPTION = "--exceed-remote-caps"


def cap_excess(*, concurrency: float | None = None, rate_per_s: float | None = None) -> str | None:
    """What goes above the remote caps, in words; None when nothing does."""
    if concurrency is not None and concurrency > REMOTE_MAX_CONCURRENCY:
        return f"concurrency {concurrency:g} is above the cap of {REMOTE_MAX_CONCURRENCY}"
    if rate_per_s is not None and rate_per_s > REMOTE_MAX_RATE_PER_S:
        return f"arrival rate {rate_per_s:g}/s is above the cap of {REMOTE_MAX_RATE_PER_S:g}/s"
    return None


def check_remote_caps(
    target: Target, *, concurrency: int | None = None, rate_per_s: float | None = None, override: bool = False
) -> None:
    """Refuse a load above the caps on a target that is not on this machine, unless overridden."""
    if override or target.is_loopback:
        return
    problem = cap_excess(concurrency=concurrency, rate_per_s=rate_per_s)
    if problem is not None:
        raise UsageError(
            f"{problem} for a target that is not on this machine; "
            f"pass {EXCEED_CAPS_OPTION} if you may load {target.endpoint.host} that hard"
        )


def plan_text(
    target: Target,
    *,
    requests: int | None,
    duration_s: float | None,
    concurrency: int,
    input_tokens: int,
    output_tokens: int,
    prices: TokenPrices | None = None,
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
    if prices is None:
        cost = "Estimated cost: unknown (give --price-input and --price-output per million tokens)."
    else:
        each = prices.request_cost(input_tokens, output_tokens)
        total = f", about {each * requests:.4f} in all" if requests is not None else ""
        cost = f"Estimated cost: at most {each:.6f} per request{total}, at the prices given."
    return (
        f"loadrun will send {volume} at concurrency {concurrency} to {target.base_url} "
        f"(model {target.model}): {tokens}.\n{cost}\n{CAUTION}"
    )
