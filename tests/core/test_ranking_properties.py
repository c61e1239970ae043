"""Properties of the scorecard that hold for any portfolio (hypothesis).

Row order in the file carries no meaning; measures in units scale with the data while fractions,
ranks and flags do not (the scale-free property of relative measures, Hyndman & Koehler 2006);
shares add up and the cover set is the smallest leading set (Pareto reading, common practice).
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np
import pandas as pd
import pytest
from helpers import long_frame, portfolio_from
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from triage.core import ranking, schema

PROPERTY_SETTINGS = settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow]
)

UNIT_COLUMNS = ("demand", "forecast", "abs_error", "bias", "mae", "rmse", "fva")
VALUE_UNIT_COLUMNS = ("abs_error_value", "bias_value")
FRACTION_COLUMNS = (
    "bias_pct",
    "wape",
    "error_share",
    "cum_share",
    "tracking_signal",
    "mase",
    "bias_pvalue",
    "adi",
    "cv2",
)
SAME_COLUMNS = ("rank", "periods", "bias_run", "bias_flag", "pattern")

PRICES = (0.25, 0.5, 1.0, 3.0, 7.5)


@st.composite
def portfolios(draw: st.DrawFn) -> tuple[list[dict[str, object]], bool]:
    """Long records of a small portfolio: missing rows and cells, zeros, returns, ties."""
    n_items = draw(st.integers(1, 5))
    locations = draw(st.sampled_from([(None,), ("x",), ("x", "y")]))
    n_periods = draw(st.integers(1, 12))
    priced = draw(st.booleans())
    value = st.one_of(st.integers(-5, 40), st.just(0), st.none())
    records = []
    for i in range(n_items):
        for loc in locations:
            series = []
            for t in range(n_periods):
                if not draw(st.booleans()) and t != n_periods - 1:
                    continue  # missing row
                d, f = draw(value), draw(value)
                rec: dict[str, object] = {schema.ITEM: f"i{i}"}
                if loc is not None:
                    rec[schema.LOCATION] = loc
                rec.update(
                    {
                        schema.PERIOD: t,
                        schema.DEMAND: np.nan if d is None else float(d),
                        schema.FORECAST: np.nan if f is None else float(f),
                    }
                )
                if priced:
                    price = draw(st.one_of(st.none(), st.sampled_from(PRICES)))
                    rec[schema.PRICE] = np.nan if price is None else price
                series.append(rec)
            if priced and all(np.isnan(r[schema.PRICE]) for r in series):
                series[0][schema.PRICE] = draw(st.sampled_from(PRICES))
            records += series
    # The portfolio must hold some actual demand (a file without any is refused).
    if all(np.isnan(r[schema.DEMAND]) for r in records):
        records[-1][schema.DEMAND] = float(draw(st.integers(0, 9)))
    return records, priced


settings_strategy = st.tuples(st.integers(1, 14), st.integers(1, 4))


@PROPERTY_SETTINGS
@given(portfolios(), settings_strategy, st.randoms(use_true_random=False))
def test_row_order_changes_nothing(data, ws, random) -> None:
    records, _ = data
    window, season = ws
    frame = long_frame(records)
    shuffled = frame.iloc[random.sample(range(len(frame)), len(frame))]
    card = ranking.scorecard(portfolio_from(frame), window, season)
    again = ranking.scorecard(portfolio_from(shuffled), window, season)
    pd.testing.assert_frame_equal(card, again)


@PROPERTY_SETTINGS
@given(portfolios(), settings_strategy, st.sampled_from([2.0**k for k in (-3, -1, 1, 2, 5, 10)]))
def test_scaling_units(data, ws, c) -> None:
    records, priced = data
    window, season = ws
    frame = long_frame(records)
    scaled = frame.copy()
    scaled[schema.DEMAND] *= c
    scaled[schema.FORECAST] *= c
    card = ranking.scorecard(portfolio_from(frame), window, season)
    big = ranking.scorecard(portfolio_from(scaled), window, season)
    # Powers of two scale floats exactly, so the comparison can be tight.
    units = UNIT_COLUMNS + (VALUE_UNIT_COLUMNS if priced else ())
    for name in units:
        np.testing.assert_allclose(
            big[name], card[name] * c, rtol=1e-12, equal_nan=True, err_msg=name
        )
    for name in FRACTION_COLUMNS:
        np.testing.assert_allclose(big[name], card[name], rtol=1e-12, equal_nan=True, err_msg=name)
    for name in (*SAME_COLUMNS, "item"):
        assert big[name].tolist() == card[name].tolist(), name


@PROPERTY_SETTINGS
@given(portfolios(), settings_strategy)
def test_shares_add_up(data, ws) -> None:
    records, priced = data
    card = ranking.scorecard(portfolio_from(records), *ws)
    error = card["abs_error_value" if priced else "abs_error"].to_numpy()
    by_rank = card.sort_values("rank")
    cum = by_rank["cum_share"].to_numpy()
    assert sorted(card["rank"]) == list(range(1, len(card) + 1))
    # Rank 1 is the largest error.
    assert (np.diff(by_rank["abs_error_value" if priced else "abs_error"].to_numpy()) <= 0).all()
    if error.sum() > 0:
        assert card["error_share"].sum() == pytest.approx(1.0, rel=1e-12)
        # Issue 2, section 5: cum_share ends at 1, exactly (not 0.9999999999999999).
        assert cum[-1] == 1.0
        assert (np.diff(cum) >= 0).all()
        np.testing.assert_allclose(cum, np.cumsum(by_rank["error_share"].to_numpy()), rtol=1e-12)
    else:
        assert card["error_share"].isna().all()


@PROPERTY_SETTINGS
@given(portfolios(), settings_strategy, st.integers(1, 1_000_000))
def test_leading_cover_is_smallest_leading_set(data, ws, micro) -> None:
    records, priced = data
    card = ranking.scorecard(portfolio_from(records), *ws)
    error_col = "abs_error_value" if priced else "abs_error"
    by_rank = card.sort_values("rank")
    errors = [Fraction(v) for v in by_rank[error_col]]
    total = sum(errors)
    if total == 0:
        return
    # The cover on a 1e-6 grid, compared in exact arithmetic: first k with Σ_{≤k} error ≥ F·total.
    cover = Fraction(micro, 1_000_000)
    running, k = Fraction(0), 0
    while running < cover * total:
        running += errors[k]
        k += 1
    kept = ranking.leading_cover(card, micro / 1_000_000)
    assert kept.index.tolist() == by_rank.index[:k].tolist()
    assert set(kept["rank"]) == set(range(1, k + 1))


def test_leading_cover_rejects_bad_cover() -> None:
    card = ranking.scorecard(
        portfolio_from(
            [{schema.ITEM: "a", schema.PERIOD: 0, schema.DEMAND: 1.0, schema.FORECAST: 2.0}]
        )
    )
    for bad in (0.0, -0.1, 1.5):
        with pytest.raises(ValueError, match="cover"):
            ranking.leading_cover(card, bad)
