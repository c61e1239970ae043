"""A group adjustment split to its series (``triage.core.split``), against a plain per-period
implementation in exact integer arithmetic and hand-worked cases.

Sources: proportions of forecasts and of history averages, Gross & Sohl (1990),
"Disaggregation methods to expedite product line forecasting" (from memory); the largest
remainder rule, Hamilton's method as described in Balinski & Young (1982), *Fair
Representation* (from memory); rounding half away from zero as a spreadsheet's ROUND
(docs/export.md, "Precision").
"""

from __future__ import annotations

import math
from decimal import ROUND_HALF_UP, Decimal
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from triage.core import adjust, split
from triage.core.errors import TriageError


def plain_split(total: float, weights: list[float], decimals: int) -> list[int]:
    """Hamilton's method in integers: whole steps of 10^-decimals per row, by a plain loop."""
    steps = int(
        Decimal(repr(total)).quantize(Decimal(1).scaleb(-decimals), ROUND_HALF_UP) * (10**decimals)
    )
    weight_sum = sum(Fraction(w) for w in weights)
    exact = [Fraction(w) / weight_sum * steps for w in weights]
    whole = [math.floor(x) for x in exact]
    left = steps - sum(whole)
    # Largest remainder first; ties to the earlier row.
    order = sorted(range(len(weights)), key=lambda i: (-(exact[i] - whole[i]), i))
    for i in order[:left]:
        whole[i] += 1
    return whole


def test_hand_worked_apportionment() -> None:
    # 10 split 45/35/20 in whole units: 4.5, 3.5, 2 -> floors 4, 3, 2 leave 1 step, which goes
    # to the first of the two equal remainders (0.5): 5, 3, 2.
    shares = np.array([[0.45], [0.35], [0.20]])
    np.testing.assert_array_equal(split.apportion(np.array([10.0]), shares, 0), [[5], [3], [2]])
    # 100 in thirds at one decimal: 33.3 each leaves 0.1 for the first: 33.4, 33.3, 33.3.
    thirds = np.full((3, 1), 1 / 3)
    np.testing.assert_allclose(
        split.apportion(np.array([100.0]), thirds, 1), [[33.4], [33.3], [33.3]]
    )


def test_relative_operation_scales_every_series_alike() -> None:
    forward = np.array([[100.0, 40.0], [50.0, 0.0], [10.0, 60.0]])
    result = split.split(
        adjust.parse("x0.9"),
        forward,
        recent_actuals=np.ones((3, 4)),
        window_demand=np.ones((3, 2)),
        window_forecast=np.ones((3, 2)),
        decimals=0,
    )
    # 0.9 x each forecast is whole here: exactly.
    np.testing.assert_array_equal(result.adjusted, forward * 0.9)
    assert result.total.description.startswith("periods 1-2: x0.9")


def test_absolute_operation_is_split_by_forecast_proportions() -> None:
    forward = np.array([[30.0, 10.0], [60.0, 10.0], [10.0, 0.0]])
    result = split.split(
        adjust.parse("=200"),
        forward,
        recent_actuals=np.ones((3, 4)),
        window_demand=np.ones((3, 2)),
        window_forecast=np.ones((3, 2)),
        decimals=0,
    )
    # Period 1: 200 by 30:60:10 = 60, 120, 20. Period 2: 200 by 10:10:0 = 100, 100, 0.
    np.testing.assert_array_equal(result.adjusted, [[60, 100], [120, 100], [20, 0]])
    assert not result.fallback.any()


def test_zero_forecast_falls_back_to_history_then_equal_parts() -> None:
    forward = np.array([[0.0, 5.0], [0.0, 5.0]])
    history = np.array([[1.0, 3.0, np.nan], [6.0, 6.0, 6.0]])  # averages 2 and 6
    result = split.split(
        adjust.parse("1: =80"),
        forward,
        recent_actuals=history,
        window_demand=history,
        window_forecast=history,
        decimals=0,
    )
    np.testing.assert_array_equal(result.adjusted[:, 0], [20, 60])  # 80 by 2:6
    np.testing.assert_array_equal(result.adjusted[:, 1], [5, 5])  # outside the range
    assert result.fallback.tolist() == [True, False]
    none = split.split(
        adjust.parse("1: =9"),
        forward,
        recent_actuals=np.full((2, 3), np.nan),
        window_demand=np.ones((2, 1)),
        window_forecast=np.ones((2, 1)),
        decimals=0,
    )
    np.testing.assert_array_equal(none.adjusted[:, 0], [5, 4])  # equal parts, 4.5 each


def test_history_basis_and_missing_forecasts() -> None:
    forward = np.array([[10.0, np.nan], [30.0, 20.0]])
    history = np.array([[3.0, 3.0], [1.0, 1.0]])
    by_history = split.split(
        adjust.parse("+40"),
        forward,
        recent_actuals=history,
        window_demand=history,
        window_forecast=history,
        decimals=0,
        basis=split.HISTORY,
    )
    # Totals 40 and 20 plus 40 each: 80 and 60, split 3:1 in both periods.
    np.testing.assert_array_equal(by_history.adjusted, [[60, 45], [20, 15]])
    by_forecast = split.split(
        adjust.parse("+40"),
        forward,
        recent_actuals=history,
        window_demand=history,
        window_forecast=history,
        decimals=0,
    )
    # Period 2: only the second series has a forecast; the first keeps its missing value.
    assert np.isnan(by_forecast.adjusted[0, 1]) and by_forecast.adjusted[1, 1] == 60


@pytest.mark.parametrize(
    "spec",
    ["=120", "+15%", "-10%", "x1.2", "+40", "-25", "mean 3", "bias", "2-3: 100 90", "3-: =0"],
)
def test_every_syntax_sums_to_the_adjusted_total(spec: str) -> None:
    rng = np.random.default_rng(4)
    forward = rng.gamma(2, 20, (6, 4)).round(1)
    forward[2, 1] = np.nan
    actuals = rng.poisson(30, (6, 10)).astype(float)
    window = rng.gamma(2, 15, (6, 5))
    result = split.split(
        adjust.parse(spec),
        forward,
        recent_actuals=actuals,
        window_demand=actuals[:, -5:],
        window_forecast=window,
        decimals=1,
    )
    lo, hi = result.total.first - 1, result.total.last
    for t in range(lo, hi):
        column = result.adjusted[:, t]
        total = float(result.total.adjusted[t])
        steps = np.rint(np.nan_to_num(column) * 10).astype(int)
        weights = result.shares[:, t].tolist()
        assert steps.tolist() == plain_split(total, weights, 1)
    # Outside the range nothing moves.
    outside = np.r_[0:lo, hi : forward.shape[1]]
    np.testing.assert_array_equal(result.adjusted[:, outside], forward[:, outside])


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    forward=st.lists(
        st.lists(
            st.floats(0, 1e5, allow_nan=False).map(lambda v: round(v, 2)), min_size=3, max_size=3
        ),
        min_size=1,
        max_size=8,
    ),
    level=st.floats(0, 1e6, allow_nan=False).map(lambda v: round(v, 3)),
    decimals=st.integers(0, 3),
)
def test_split_then_sum_gives_the_adjusted_total(
    forward: list[list[float]], level: float, decimals: int
) -> None:
    """Property: Σ over series of the split equals the group's adjusted total at the export's
    precision, in whole steps, for any forecasts (zeros included)."""
    values = np.array(forward)
    result = split.split(
        adjust.parse(f"={level}"),
        values,
        recent_actuals=np.ones((len(forward), 2)),
        window_demand=np.ones((len(forward), 1)),
        window_forecast=np.ones((len(forward), 1)),
        decimals=decimals,
    )
    scale = 10**decimals
    rounded = Decimal(repr(level)).quantize(Decimal(1).scaleb(-decimals), ROUND_HALF_UP)
    steps = np.rint(result.adjusted * scale).astype(np.int64).sum(axis=0)
    assert (steps == int(rounded * scale)).all()
    assert (result.adjusted >= 0).all()


def test_empty_group_is_refused() -> None:
    with pytest.raises(TriageError, match="no series"):
        split.split(
            adjust.parse("=1"),
            np.empty((0, 3)),
            recent_actuals=np.empty((0, 2)),
            window_demand=np.empty((0, 1)),
            window_forecast=np.empty((0, 1)),
            decimals=0,
        )


def test_use_takes_each_series_own_other_forecast() -> None:
    """``use NAME`` on a group is not split: each series takes its own values of the other
    forecast, keeping its original where that is missing (the series rule, docs/adjustments.md)."""
    forward = np.array([[10.0, 10.0, 10.0], [20.0, 20.0, 20.0]])
    stat = np.array([[12.0, np.nan, 14.0], [18.0, 19.0, -3.0]])
    result = split.split(
        adjust.parse("1-3: use stat"),
        forward,
        recent_actuals=np.ones((2, 4)),
        window_demand=np.ones((2, 2)),
        window_forecast=np.ones((2, 2)),
        decimals=0,
        alternatives={"stat": stat},
    )
    np.testing.assert_array_equal(result.adjusted, [[12, 10, 14], [18, 19, 0]])
    np.testing.assert_array_equal(result.total.adjusted, [30, 29, 14])
    assert result.delta_units.tolist() == [6.0, -23.0]
    with pytest.raises(adjust.AdjustError, match="customer"):
        split.split(
            adjust.parse("use customer"),
            forward,
            recent_actuals=np.ones((2, 4)),
            window_demand=np.ones((2, 2)),
            window_forecast=np.ones((2, 2)),
            decimals=0,
            alternatives={"stat": stat},
        )
