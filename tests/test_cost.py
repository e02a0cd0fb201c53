"""Cost arithmetic.

Check values (common practice, no source; SOURCES.md section 6): four accelerators at $2 an
hour cost 4 x 2 x 8,760 = $70,080 a year, which breaks even with a hosted price of $1 per
million tokens at about 70 billion tokens a year.
"""

from __future__ import annotations

import pytest

from loadrun.cost import (
    HOURS_PER_YEAR,
    ReplicaPrice,
    TokenPrices,
    break_even_tokens_per_year,
    cost_per_million_tokens,
    serving_cost,
    yearly_cost,
)
from loadrun.errors import UsageError


def test_four_accelerators_at_two_dollars_cost_70080_a_year() -> None:
    price = ReplicaPrice.from_accelerators(2.0, 4)
    assert price.per_hour == 8.0
    assert HOURS_PER_YEAR == 8_760
    assert yearly_cost(price) == pytest.approx(70_080.0)


def test_break_even_with_one_dollar_per_million_is_about_70_billion_tokens() -> None:
    yearly = yearly_cost(ReplicaPrice.from_accelerators(2.0, 4))
    volume = break_even_tokens_per_year(yearly, 1.0)
    assert volume == pytest.approx(70.08e9)
    assert round(volume / 1e9) == 70


def test_cost_per_million_tokens_at_an_operating_point() -> None:
    # $8 an hour for 1,000 output tokens/s: 3.6 million tokens an hour -> $2.22 a million.
    price = ReplicaPrice(8.0)
    assert cost_per_million_tokens(price, 1000.0) == pytest.approx(8.0 / 3.6)
    assert cost_per_million_tokens(price, 0.0) is None


def test_serving_cost_of_a_fleet_and_its_break_even() -> None:
    price = ReplicaPrice.from_accelerators(2.0, 4)
    hosted = TokenPrices(input_per_million=1.0, output_per_million=1.0)
    cost = serving_cost(
        price, output_tokens_per_s=500.0, input_tokens_per_s=1500.0, requests_per_s=5.0, hosted=hosted
    )
    assert cost["yearly_cost"] == pytest.approx(70_080.0)
    assert cost["per_million_tokens"] == pytest.approx(8.0 / (2000 * 3600) * 1e6)
    assert cost["per_million_output_tokens"] == pytest.approx(8.0 / (500 * 3600) * 1e6)
    assert cost["per_request"] == pytest.approx(8.0 / (5 * 3600))
    assert cost["hosted"]["break_even_tokens_per_year"] == pytest.approx(70.08e9)
    # One replica makes 2,000 tokens/s x 31.536 million s = 63.072 billion tokens a year.
    assert cost["tokens_per_year_per_replica"] == pytest.approx(63.072e9)
    assert cost["hosted"]["break_even_replicas"] == 2
    two = serving_cost(
        price, output_tokens_per_s=500.0, input_tokens_per_s=0.0, requests_per_s=5.0, replicas=2
    )
    assert two["yearly_cost"] == pytest.approx(140_160.0)
    assert "hosted" not in two


def test_blended_price_weights_the_token_mix() -> None:
    # 2,000 input tokens at $0.03 per thousand = $0.06 (SOURCES.md section 6, common practice).
    prices = TokenPrices(input_per_million=30.0, output_per_million=60.0)
    assert prices.request_cost(2000, 0) == pytest.approx(0.06)
    assert prices.blended_per_million(3, 1) == pytest.approx((3 * 30 + 60) / 4)


@pytest.mark.parametrize("per_hour", [0.0, -1.0, float("nan"), float("inf")])
def test_prices_must_be_positive_numbers(per_hour: float) -> None:
    with pytest.raises(UsageError):
        ReplicaPrice(per_hour)


def test_token_prices_need_one_positive_price() -> None:
    with pytest.raises(UsageError):
        TokenPrices(0.0, 0.0)
    with pytest.raises(UsageError):
        TokenPrices(-1.0, 2.0)
    with pytest.raises(UsageError):
        ReplicaPrice.from_accelerators(2.0, 0)
