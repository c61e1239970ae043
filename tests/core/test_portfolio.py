"""The portfolio builder: calendar, duplicates, lags, forward periods, prices, attributes, keys.

The builder's rules are the project's input contract (docs/metrics.md: "Window and counted
periods", "Lag"): missing is never zero, rows are never averaged, lags are never mixed (common
practice: never mix lags in one metric, docs/sources.md §3.3).
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from helpers import FakeLoaded, loaded_from, long_frame, portfolio_from, series_records

from triage.core import ranking, schema
from triage.core.errors import LoadError
from triage.core.portfolio import build_portfolio

PATH = "scenario/portfolio.csv"


def rec(
    item: str, period: int, demand: float | None, forecast: float | None, **extra: object
) -> dict[str, object]:
    return {
        schema.ITEM: item,
        schema.PERIOD: period,
        schema.DEMAND: math.nan if demand is None else demand,
        schema.FORECAST: math.nan if forecast is None else forecast,
        **extra,
    }


def frame_with_dates(dates: list[str], item: str = "A") -> pd.DataFrame:
    """A canonical frame with literal dates (for calendars the helpers cannot express)."""
    return pd.DataFrame(
        {
            schema.ITEM: [item] * len(dates),
            schema.PERIOD: pd.to_datetime(dates),
            schema.DEMAND: np.arange(len(dates), dtype=float),
            schema.FORECAST: np.ones(len(dates)),
        }
    )


# ---------------------------------------------------------------------------- calendar


def test_weekly_calendar_with_a_gap() -> None:
    # Weeks 0, 1, 3, 4: week 2 has no row, it stays in the calendar as a missing period.
    records = [rec("A", t, 10.0 + t, 9.0) for t in (0, 1, 3, 4)]
    p = portfolio_from(records)
    assert p.calendar.freq == schema.WEEKLY
    assert list(p.calendar.periods) == list(pd.date_range("2025-01-06", periods=5, freq="7D"))
    assert p.calendar.label(4) == "2025-02-03"
    np.testing.assert_array_equal(p.demand[0], [10, 11, np.nan, 13, 14])
    assert p.last_actual == 4


def test_monthly_calendar_across_a_year_end() -> None:
    dates = ["2025-10-01", "2025-11-01", "2026-01-01", "2026-02-01"]
    p = build_portfolio(FakeLoaded(frame=frame_with_dates(dates)))
    assert p.calendar.freq == schema.MONTHLY
    assert [p.calendar.label(i) for i in range(len(p.calendar.periods))] == [
        "2025-10",
        "2025-11",
        "2025-12",
        "2026-01",
        "2026-02",
    ]
    np.testing.assert_array_equal(p.demand[0], [0, 1, np.nan, 2, 3])


def test_monthly_calendar_of_february_and_march() -> None:
    """BUG (portfolio._infer_freq): two month starts 28 days apart are read as weekly.

    2026-02-01 and 2026-03-01 are 28 days apart, a multiple of 7, so the weekly test wins and the
    calendar gets five weekly columns (three of them empty). Every date is the 1st of a month,
    which is the monthly calendar; the month-start test has to come first.
    """
    p = build_portfolio(FakeLoaded(frame=frame_with_dates(["2026-02-01", "2026-03-01"])))
    assert p.calendar.freq == schema.MONTHLY
    assert len(p.calendar.periods) == 2


@pytest.mark.parametrize(
    ("dates", "bad_row", "bad_date"),
    [
        # Mondays and one Wednesday (frame position 2 -> file row 4).
        (["2025-01-06", "2025-01-13", "2025-01-22", "2025-01-27"], 4, "2025-01-22"),
        # Month starts and one mid-month date (frame position 3 -> file row 5).
        (["2025-01-01", "2025-02-01", "2025-03-01", "2025-03-15", "2025-04-01"], 5, "2025-03-15"),
    ],
)
def test_irregular_calendar_names_rows(dates: list[str], bad_row: int, bad_date: str) -> None:
    with pytest.raises(LoadError, match="irregular calendar") as info:
        build_portfolio(FakeLoaded(frame=frame_with_dates(dates)))
    message = str(info.value)
    assert PATH in message
    assert f"{bad_date} (row {bad_row})" in message
    assert info.value.hint


# ---------------------------------------------------------------------------- duplicates


def test_duplicate_rows_are_refused_with_examples() -> None:
    records = [
        rec("A", 0, 5.0, 4.0),
        rec("A", 1, 6.0, 4.0),
        rec("B", 0, 1.0, 1.0),
        rec("A", 1, 8.0, 4.0),
    ]
    with pytest.raises(LoadError, match="not averaged") as info:
        portfolio_from(records)
    message = str(info.value)
    # Key, period, file rows (positions 1 and 3 -> rows 3 and 5) and both demands.
    assert "A / 2025-01-13" in message
    assert "rows 3, 5" in message
    assert "demand 6, 8" in message
    assert "1 (series, period)" in message


def test_duplicate_rows_with_location_and_lag() -> None:
    records = [
        rec("A", 0, 5.0, 4.0, location="north", lag=1),
        rec("A", 0, 5.0, 4.0, location="south", lag=1),
        rec("A", 0, 5.0, 3.0, location="north", lag=2),
        rec("A", 0, 5.0, 4.5, location="north", lag=1),
    ]
    with pytest.raises(LoadError, match="more than one row") as info:
        portfolio_from(records, lag=1)
    assert "A @ north / 2025-01-06, lag 1" in str(info.value)
    assert "rows 2, 5" in str(info.value)


# ---------------------------------------------------------------------------- lags


def lagged_records() -> list[dict[str, object]]:
    """Two history weeks at lags 1, 2 and 3, then two forward weeks at lags 1 and 2."""
    out = []
    for lag in (1, 2, 3):
        out += [rec("A", t, 10.0 + t, 100.0 * lag + t, lag=lag) for t in (0, 1)]
    for lag in (2, 1):
        out += [rec("A", t, None, 1000.0 * lag + t, lag=lag) for t in (2, 3)]
    return out


def test_several_lags_need_a_choice() -> None:
    with pytest.raises(LoadError, match=re.escape("3 forecast lags (1, 2, 3)")) as info:
        portfolio_from(lagged_records())
    assert "--lag" in str(info.value)


@pytest.mark.parametrize("lag", [1, 2, 3])
def test_chosen_lag_is_scored(lag: int) -> None:
    p = portfolio_from(lagged_records(), lag=lag)
    assert p.lag == lag
    assert p.lags == (1, 2, 3)
    np.testing.assert_array_equal(p.forecast[0, :2], [100.0 * lag, 100.0 * lag + 1])
    np.testing.assert_array_equal(p.demand[0, :2], [10.0, 11.0])
    card = ranking.scorecard(p, window=2)
    assert card.iloc[0]["forecast"] == 200.0 * lag + 1


def test_unknown_lag_is_refused() -> None:
    with pytest.raises(LoadError, match="lag 7 is not in the file"):
        portfolio_from(lagged_records(), lag=7)


@pytest.mark.parametrize("lag", [2, 3])
def test_forward_periods_take_the_smallest_lag(lag: int) -> None:
    p = portfolio_from(lagged_records(), lag=lag)
    assert p.n_forward == 2
    # Lag 1 is the most recent snapshot, whatever lag the history is scored at.
    np.testing.assert_array_equal(p.forecast[0, 2:], [1002.0, 1003.0])
    assert np.isnan(p.demand[0, 2:]).all()


def test_conflicting_demand_across_lags_is_refused() -> None:
    records = lagged_records()
    records[3][schema.DEMAND] = 99.0  # lag 2, week 1: disagrees with lag 1's 11
    with pytest.raises(LoadError, match="different demand") as info:
        portfolio_from(records, lag=1)
    assert "rows 3, 5" in str(info.value)  # both disagreeing rows are named


def test_conflicting_demand_between_unscored_lags_is_refused() -> None:
    """BUG (portfolio._merge_other_lag_demand): a clash between two other lags goes unnoticed.

    Week 0 has no row at the scored lag 1; lags 2 and 3 give demand 10 and 12. Only clashes with
    the scored lag are checked, so the later row silently wins (demand 12). The check must compare
    every history row of a (series, period) with the first non-empty demand of that cell, across
    all lags, not only with the scored lag.
    """
    records = [
        rec("A", 0, 10.0, 9.0, lag=2),
        rec("A", 0, 12.0, 9.0, lag=3),
        rec("A", 1, 10.0, 9.0, lag=1),
        rec("A", 1, 10.0, 9.0, lag=2),
    ]
    with pytest.raises(LoadError, match="different demand"):
        portfolio_from(records, lag=1)


# ---------------------------------------------------------------------------- actuals


def test_no_actual_demand_is_refused() -> None:
    records = [rec("A", t, None, 5.0) for t in range(3)]
    with pytest.raises(LoadError, match="no row has actual demand") as info:
        portfolio_from(records)
    assert PATH in str(info.value)


def test_missing_rows_and_cells_stay_missing() -> None:
    # Week 1 has no row, week 2 an empty demand cell, week 3 an empty forecast cell.
    records = [
        rec("A", 0, 4.0, 5.0),
        rec("A", 2, None, 5.0),
        rec("A", 3, 6.0, None),
        rec("A", 4, 8.0, 6.0),
    ]
    p = portfolio_from(records)
    np.testing.assert_array_equal(p.demand[0], [4.0, np.nan, np.nan, 6.0, 8.0])
    np.testing.assert_array_equal(p.forecast[0], [5.0, np.nan, 5.0, np.nan, 6.0])
    row = ranking.scorecard(p, window=5).iloc[0]
    # Only weeks 0 and 4 count; a zero in place of a missing cell would change every sum.
    assert row["periods"] == 2
    assert row["demand"] == 12.0 and row["forecast"] == 11.0
    assert row["mae"] == 1.5


def test_calendar_periods_without_actuals_are_not_in_the_window() -> None:
    # Week 2 has a forecast but no actual anywhere: the window of 3 is weeks 0, 1, 3.
    records = [rec("A", t, 1.0, 2.0) for t in (0, 1, 3)] + [rec("A", 2, None, 2.0)]
    row = ranking.scorecard(portfolio_from(records), window=3).iloc[0]
    assert row["periods"] == 3


# ---------------------------------------------------------------------------- prices


def test_price_gaps_take_nearest_earlier_else_first_later() -> None:
    records = [
        rec("A", 0, 1.0, 1.0, price=math.nan),
        rec("A", 1, 1.0, 1.0, price=2.0),
        rec("A", 2, 1.0, 1.0, price=math.nan),
        rec("A", 4, 1.0, 1.0, price=3.0),
        rec("A", 5, None, 1.0, price=math.nan),
    ]
    p = portfolio_from(records)
    np.testing.assert_array_equal(p.price[0], [2.0, 2.0, 2.0, 2.0, 3.0, 3.0])
    assert any("no price" in note for note in p.notices)


def test_priced_error_uses_filled_price() -> None:
    records = [rec("A", 0, 10.0, 12.0, price=5.0), rec("A", 1, 10.0, 7.0, price=math.nan)]
    row = ranking.scorecard(portfolio_from(records), window=2).iloc[0]
    assert row["abs_error_value"] == 2 * 5.0 + 3 * 5.0
    assert row["bias_value"] == 2 * 5.0 - 3 * 5.0


def test_series_without_any_price_is_refused() -> None:
    records = [
        rec("A", 0, 1.0, 1.0, price=2.0),
        rec("B", 0, 1.0, 1.0, price=math.nan),
        rec("B", 1, 1.0, 1.0, price=math.nan),
    ]
    with pytest.raises(LoadError, match="1 series have no price") as info:
        portfolio_from(records)
    assert "e.g. B" in str(info.value)


# ---------------------------------------------------------------------------- keys, attributes


def test_attributes_come_from_the_latest_period() -> None:
    records = [
        rec("A", 2, 1.0, 1.0, family="tools", planner="kim"),
        rec("A", 5, None, 1.0, family="garden", planner="lee"),  # forward row, latest period
        rec("A", 0, 1.0, 1.0, family="old", planner="ash"),
        rec("B", 1, 1.0, 1.0, family="seeds", planner="kim"),
        rec("B", 0, 1.0, 1.0, family="old", planner="ash"),
    ]
    p = portfolio_from(records, attributes=("family", "planner"))
    assert p.attributes == ("family", "planner")
    assert p.keys["family"].tolist() == ["garden", "seeds"]
    assert p.keys["planner"].tolist() == ["lee", "kim"]
    card = ranking.scorecard(p)
    assert list(card.columns[-2:]) == ["family", "planner"]


def test_series_are_ordered_by_item_then_location() -> None:
    pairs = [("b", "y"), ("a", "z"), ("b", "x"), ("A", "y"), ("a", "x")]
    records = [
        rec(item, t, float(n * 10 + t), 0.0, location=loc)
        for n, (item, loc) in enumerate(pairs)
        for t in (0, 1)
    ]
    loaded = loaded_from(records)
    loaded.frame = loaded.frame.iloc[::-1].reset_index(drop=True)
    p = build_portfolio(loaded)
    assert p.key_columns == ("item", "location")
    got = list(zip(p.keys["item"], p.keys["location"], strict=True))
    assert got == [("A", "y"), ("a", "x"), ("a", "z"), ("b", "x"), ("b", "y")]
    # Each array row belongs to its key.
    for row, key in enumerate(got):
        n = pairs.index(key)
        np.testing.assert_array_equal(p.demand[row], [n * 10, n * 10 + 1])
    assert p.key_text(1) == "a @ x"


def test_single_key_portfolio() -> None:
    p = portfolio_from(
        series_records([1, 2], [1, 2], item="Z") + series_records([3, 4], [3, 4], item="M")
    )
    assert p.key_columns == ("item",)
    assert p.keys["item"].tolist() == ["M", "Z"]
    assert p.n_series == 2 and p.rows == 4 and p.lag is None and p.lags == ()


def test_empty_frame_is_refused() -> None:
    frame = long_frame([rec("A", 0, 1.0, 1.0)]).iloc[:0]
    with pytest.raises(LoadError, match="no data rows"):
        build_portfolio(FakeLoaded(frame=frame))


def test_a_wide_file_of_attributes_is_built_without_a_copy_per_column(tmp_path: Path) -> None:
    # 400 attribute columns: building the series table column by column, or dropping columns one
    # at a time, copies the frame per column (pandas block manager), quadratic in the columns.
    # The check is by counts, not a stopwatch: the keys table holds every attribute, and the
    # work done per attribute is one column take (pandas DataFrame.__setitem__ is not called).
    from triage.core.read import load_frame

    header = ["item", "period", "demand", "forecast", *[f"a{i}" for i in range(400)]]
    rows = [
        [f"S{s}", f"2024-01-{1 + 7 * k:02d}", k % 5, 3, *["x"] * 400]
        for s in range(5)
        for k in range(4)
    ]
    path = tmp_path / "wide.csv"
    path.write_text(
        "\n".join(",".join(map(str, r)) for r in [header, *rows]) + "\n", encoding="utf-8"
    )
    calls = 0
    real = pd.DataFrame.__setitem__

    def counting(self, key, value):  # type: ignore[no-untyped-def]
        nonlocal calls
        calls += 1
        return real(self, key, value)

    pd.DataFrame.__setitem__ = counting  # type: ignore[method-assign]
    try:
        portfolio = build_portfolio(load_frame(path), consume=True)
    finally:
        pd.DataFrame.__setitem__ = real  # type: ignore[method-assign]
    assert portfolio.keys.shape == (5, 401)
    assert calls < 20
