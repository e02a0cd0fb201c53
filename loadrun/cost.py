"""What serving costs: per million tokens at an operating point, per year, and the volume at
which running replicas breaks even with a hosted per-token price.

Prices are in one currency unit (dollars in the wording); a year is 8,760 hours (365 days,
common practice). Each "per million" figure charges the whole replica cost to that token
stream alone, which is how per-token prices of hosted APIs read too.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from loadrun.errors import UsageError

__all__ = [
    "HOURS_PER_YEAR",
    "ReplicaPrice",
    "TokenPrices",
    "break_even_tokens_per_year",
    "cost_per_million_tokens",
    "serving_cost",
    "yearly_cost",
]

HOURS_PER_YEAR = 8_760
SECONDS_PER_HOUR = 3_600
MILLION = 1_000_000


@dataclass(frozen=True, slots=True)
class ReplicaPrice:
    """What one replica costs per hour (all its accelerators and hosts together)."""

    per_hour: float

    def __post_init__(self) -> None:
        if not self.per_hour > 0 or not math.isfinite(self.per_hour):
            raise UsageError("a replica's price per hour must be a positive number")

    @classmethod
    def from_accelerators(cls, price_per_accelerator_hour: float, accelerators: int) -> ReplicaPrice:
        if accelerators < 1:
            raise UsageError("a replica needs at least one accelerator")
        return cls(price_per_accelerator_hour * accelerators)


@dataclass(frozen=True, slots=True)
class TokenPrices:
    """Per-token prices (per million tokens) of a hosted API."""

    input_per_million: float
    output_per_million: float

    def __post_init__(self) -> None:
        for value in (self.input_per_million, self.output_per_million):
            if value < 0 or not math.isfinite(value):
                raise UsageError("token prices must be zero or positive numbers")
        if self.input_per_million == 0 and self.output_per_million == 0:
            raise UsageError("at least one token price must be positive")

    def blended_per_million(self, input_tokens: float, output_tokens: float) -> float:
        """The price per million tokens of a request mix (input and output counted together)."""
        total = input_tokens + output_tokens
        if total <= 0:
            raise ValueError("the mix needs tokens")
        return (input_tokens * self.input_per_million + output_tokens * self.output_per_million) / total

    def request_cost(self, input_tokens: float, output_tokens: float) -> float:
        return (input_tokens * self.input_per_million + output_tokens * self.output_per_million) / MILLION


def yearly_cost(price: ReplicaPrice, replicas: int = 1) -> float:
    """Replicas x price per hour x 8,760 hours."""
    return replicas * price.per_hour * HOURS_PER_YEAR


def cost_per_million_tokens(price: ReplicaPrice, tokens_per_s: float) -> float | None:
    """What a million tokens cost when one replica produces ``tokens_per_s`` (None at 0 tokens/s)."""
    if tokens_per_s <= 0:
        return None
    return price.per_hour / (tokens_per_s * SECONDS_PER_HOUR) * MILLION


def break_even_tokens_per_year(yearly: float, hosted_price_per_million: float) -> float:
    """Tokens a year at which a hosted per-token price costs as much as ``yearly``."""
    if hosted_price_per_million <= 0:
        raise ValueError("the hosted price must be positive")
    return yearly / hosted_price_per_million * MILLION


def serving_cost(
    price: ReplicaPrice,
    *,
    output_tokens_per_s: float,
    input_tokens_per_s: float,
    requests_per_s: float,
    replicas: int = 1,
    hosted: TokenPrices | None = None,
) -> dict[str, Any]:
    """Costs at an operating point of one replica (rates per replica), for a fleet of ``replicas``.

    The break-even volume compares the fleet's yearly cost with the hosted price of the same
    token mix; ``break_even_replicas`` says how many replicas that volume itself would need
    at this operating point.
    """
    per_year = yearly_cost(price, replicas)
    tokens_per_s = output_tokens_per_s + input_tokens_per_s
    out: dict[str, Any] = {
        "replica_price_per_hour": price.per_hour,
        "replicas": replicas,
        "yearly_cost": per_year,
        "per_million_output_tokens": cost_per_million_tokens(price, output_tokens_per_s),
        "per_million_input_tokens": cost_per_million_tokens(price, input_tokens_per_s),
        "per_million_tokens": cost_per_million_tokens(price, tokens_per_s),
        "per_request": price.per_hour / (requests_per_s * SECONDS_PER_HOUR) if requests_per_s > 0 else None,
        "tokens_per_year_per_replica": tokens_per_s * SECONDS_PER_HOUR * HOURS_PER_YEAR,
    }
    if hosted is not None and tokens_per_s > 0:
        blended = hosted.blended_per_million(input_tokens_per_s, output_tokens_per_s)
        volume = break_even_tokens_per_year(per_year, blended)
        per_replica_year = out["tokens_per_year_per_replica"]
        out["hosted"] = {
            "input_per_million": hosted.input_per_million,
            "output_per_million": hosted.output_per_million,
            "blended_per_million": blended,
            "break_even_tokens_per_year": volume,
            "break_even_replicas": math.ceil(volume / per_replica_year) if per_replica_year > 0 else None,
        }
    return out
