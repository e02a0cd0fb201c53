"""Monotone latency curves: isotonic regression and the load at which a limit is crossed."""

from __future__ import annotations

import itertools
import math

import pytest
from hypothesis import given
from hypothesis import strategies as st

from loadrun.fits import MonotoneCurve, interpolate_log, isotonic_increasing


def test_isotonic_pools_adjacent_violators() -> None:
    # Textbook case: 1 3 2 4 -> 1 2.5 2.5 4; weights move the pooled mean.
    assert isotonic_increasing([1, 3, 2, 4]) == [1, 2.5, 2.5, 4]
    assert isotonic_increasing([1, 3, 2, 4], [1, 1, 3, 1]) == [1, 2.25, 2.25, 4]
    assert isotonic_increasing([5, 4, 3]) == [4, 4, 4]


@given(st.lists(st.floats(min_value=-1e6, max_value=1e6), min_size=1, max_size=30))
def test_isotonic_output_is_non_decreasing_and_keeps_the_weighted_sum(values: list[float]) -> None:
    fitted = isotonic_increasing(values)
    assert all(b >= a - 1e-9 * (1 + abs(a)) for a, b in itertools.pairwise(fitted))
    assert sum(fitted) == pytest.approx(sum(values), rel=1e-9, abs=1e-6)


def test_linear_latency_crossing_is_found_exactly() -> None:
    """Latency linear in log load: the crossing of a PCHIP through it is exact."""
    loads = [1.0, 2.0, 4.0, 8.0, 16.0]
    curve = MonotoneCurve(loads, [10 + 5 * math.log2(x) for x in loads])
    crossing = curve.crossing(27.5)  # 10 + 5 log2(x) = 27.5 -> x = 2^3.5
    assert crossing.where == "within"
    assert crossing.load == pytest.approx(2**3.5, rel=1e-9)


def test_noisy_dip_does_not_create_a_second_crossing() -> None:
    curve = MonotoneCurve([1, 2, 4, 8, 16], [10, 30, 22, 40, 60], weights=[1, 1, 1, 1, 1])
    assert curve.values == (10, 26, 26, 40, 60)
    crossing = curve.crossing(25)
    assert crossing.where == "within" and crossing.load is not None and 1 < crossing.load < 2


def test_limits_outside_the_measured_range() -> None:
    curve = MonotoneCurve([2, 4, 8], [10, 20, 30])
    assert curve.crossing(5).where == "below_range"
    at_a_point = curve.crossing(20)  # exactly at the limit is still within it
    assert at_a_point.where == "within" and at_a_point.load == pytest.approx(4)
    assert curve.crossing(10).load == pytest.approx(2)
    above = curve.crossing(31)
    assert above.where == "above_range" and above.load == 8
    assert curve(1) is None and curve(9) is None
    assert curve(4) == pytest.approx(20)


def test_interpolation_in_log_load() -> None:
    assert interpolate_log([1, 4], [10, 30], 2) == pytest.approx(20)
    assert interpolate_log([1, 4], [10, 30], 8) is None
    assert interpolate_log([3], [7], 3) == 7


def test_curve_rejects_repeated_loads() -> None:
    with pytest.raises(ValueError, match="distinct"):
        MonotoneCurve([1, 1], [2, 3])
