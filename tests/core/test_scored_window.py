"""Reading a file for scoring only: ``read_portfolio(..., scored_window=W)``.

``triage rank`` reads the forecasts over the scoring window's columns alone
(``portfolio.ColumnSpan``). Two things are checked here: the span indexes exactly as the whole
matrix does inside its columns (numpy's own indexing of the full array is the reference) and
refuses the others; and the scorecard of a file read that way is identical, every column, to
the scorecard of the file read whole, on sorted, shuffled and unevenly grouped files, with and
without prices and competing forecasts, ranked by error, bias and FVA. Files are invented (a
garden-supply wholesaler).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from tests.core.test_parquet_streamed import garden_rows, to_parquet
from triage.core.portfolio import ColumnSpan, Portfolio
from triage.core.ranking import scorecard
from triage.core.read import read_portfolio

N_SERIES, N_PERIODS, START, STOP = 7, 12, 4, 10


@pytest.fixture
def whole() -> np.ndarray:
    values = np.random.default_rng(1).normal(size=(N_SERIES, N_PERIODS))
    values[2, 5] = np.nan
    return values


@pytest.fixture
def span(whole: np.ndarray) -> ColumnSpan:
    return ColumnSpan(whole[:, START:STOP].copy(), START, N_PERIODS)


ROWS = [slice(None), slice(1, 5), np.array([6, 0, 3]), np.arange(N_SERIES) % 2 == 0]
INSIDE = [
    slice(START, STOP),
    slice(STOP - 3, STOP),
    slice(-4, -2),  # counted from the end of the whole calendar, as numpy does
    slice(START, STOP, 2),
    slice(STOP - 1, START - 1, -1),
    np.array([9, 4, 4, 7]),
    np.array([-3]),
    5,
    slice(6, 6),  # empty
]


@pytest.mark.parametrize("cols", INSIDE, ids=repr)
@pytest.mark.parametrize("rows", ROWS, ids=repr)
def test_span_indexes_as_the_whole_matrix_inside_its_columns(
    whole: np.ndarray, span: ColumnSpan, rows: Any, cols: Any
) -> None:
    # Reference: numpy's indexing of the full array, including its refusals (a row array and
    # a column array of other lengths do not broadcast).
    try:
        expected = whole[rows, cols]
    except IndexError:
        with pytest.raises(IndexError):
            span[rows, cols]
    else:
        np.testing.assert_array_equal(span[rows, cols], expected)
    np.testing.assert_array_equal(span[rows][:, cols], whole[rows][:, cols])
    assert span[rows].shape == whole[rows].shape


@pytest.mark.parametrize(
    "cols",
    [slice(None), slice(0, STOP), slice(START, STOP + 1), np.array([START - 1]), 11, -1],
    ids=repr,
)
def test_columns_never_read_are_refused(span: ColumnSpan, cols: Any) -> None:
    with pytest.raises(IndexError, match="not loaded"):
        span[:, cols]


def test_span_never_turns_into_a_whole_array(span: ColumnSpan) -> None:
    assert span.shape == (N_SERIES, N_PERIODS) and len(span) == N_SERIES
    assert (span.start, span.stop) == (START, STOP)
    with pytest.raises(TypeError, match=r"only columns 4\.\.9"):
        np.asarray(span)
    with pytest.raises(IndexError):
        span[0]
    with pytest.raises(ValueError, match="inside the calendar"):
        ColumnSpan(np.zeros((2, 5)), 8, N_PERIODS)


def with_competing(rows: pd.DataFrame, seed: int = 0) -> pd.DataFrame:
    """Two competing forecasts with gaps: a statistical one and a customer's."""
    rng = np.random.default_rng(seed)
    stat = rows["forecast"] + rng.normal(0, 1.5, len(rows))
    customer = rows["forecast"] * rng.uniform(0.6, 1.4, len(rows))
    customer[rng.random(len(rows)) < 0.3] = np.nan
    return rows.assign(forecast_stat=stat, forecast_customer=customer)


LAYOUTS = {
    "sorted": dict(shuffle=False, row_group_size=1000),
    "groups across series": dict(shuffle=False, row_group_size=97),
    "shuffled": dict(shuffle=True, row_group_size=31),
}


@pytest.mark.parametrize("priced", [True, False], ids=["priced", "units"])
@pytest.mark.parametrize("layout", list(LAYOUTS))
def test_scorecard_is_identical_to_the_whole_read(
    tmp_path: Path, layout: str, priced: bool
) -> None:
    rows = with_competing(garden_rows(seed=9, weeks=30))
    if not priced:
        rows = rows.drop(columns="price")
    if LAYOUTS[layout]["shuffle"]:
        rows = rows.sample(frac=1.0, random_state=4).reset_index(drop=True)
    path = to_parquet(
        rows,
        tmp_path / "g.parquet",
        dictionary=True,
        row_group_size=LAYOUTS[layout]["row_group_size"],
    )
    whole = read_portfolio(path)
    for window in (4, 13, 52):  # 52: longer than the history, so every column is kept
        scored = read_portfolio(path, scored_window=window)
        assert isinstance(scored.forecast, ColumnSpan)
        assert scored.forecast.stop == whole.last_actual + 1
        assert all(isinstance(values, ColumnSpan) for values in scored.competing.values())
        assert_demand_span(scored, whole, season=1)
        for by, steps in (
            ("error", None),
            ("bias", None),
            ("fva", ("naive", "stat", "forecast")),
            ("fva", ("customer", "forecast")),
        ):
            pd.testing.assert_frame_equal(
                scorecard(scored, window, by=by, steps=steps),
                scorecard(whole, window, by=by, steps=steps),
            )


def assert_demand_span(scored: Portfolio, whole: Portfolio, season: int) -> None:
    """The scoring read's demand is the whole read's from ``season`` columns before the
    window on, and its history measures are those of the whole history."""
    demand = scored.demand
    assert isinstance(demand, ColumnSpan)
    start = max(int(scored.forecast.start) - season, 0)
    assert (demand.start, demand.stop) == (start, whole.last_actual + 1)
    np.testing.assert_array_equal(
        demand[:, start : demand.stop], whole.demand[:, start : whole.last_actual + 1]
    )
    assert demand.values_before == bool(np.isfinite(whole.demand[:, :start]).any())
    kept, reference = scored.history, whole.history_measures(season)
    assert kept is not None and kept.season == season
    np.testing.assert_array_equal(kept.scale, reference.scale)
    for name in ("adi", "cv2", "pattern"):
        np.testing.assert_array_equal(getattr(kept.pattern, name), getattr(reference.pattern, name))


@pytest.mark.parametrize("season", [1, 4, 52])
@pytest.mark.parametrize("exact", [True, False], ids=["float32-exact", "decimal"])
@pytest.mark.parametrize("layout", list(LAYOUTS))
def test_demand_is_kept_from_the_naive_baseline_on(
    tmp_path: Path, layout: str, exact: bool, season: int
) -> None:
    # The demand is held as float32 while reading when every value fits exactly, and in
    # float64 as soon as one does not: here a tenth of a unit turns up in a late row group.
    rows = with_competing(garden_rows(seed=19, weeks=30))
    if not exact:
        late = rows.index[-len(rows) // 5 :]
        rows.loc[late, "demand"] = rows.loc[late, "demand"] + 0.1
    if LAYOUTS[layout]["shuffle"]:
        rows = rows.sample(frac=1.0, random_state=6).reset_index(drop=True)
    size = LAYOUTS[layout]["row_group_size"]
    path = to_parquet(rows, tmp_path / "d.parquet", dictionary=True, row_group_size=size)
    whole = read_portfolio(path)
    scored = read_portfolio(path, scored_window=8, season=season)
    assert_demand_span(scored, whole, season)
    for by in ("error", "bias", "fva"):
        pd.testing.assert_frame_equal(
            scorecard(scored, 8, season, by=by), scorecard(whole, 8, season, by=by)
        )
    # Another season than the one read for needs demand that was not kept (unless the span
    # holds the whole history, as with a season longer than it).
    if scored.demand.start > 0:
        with pytest.raises(IndexError, match="not loaded"):
            scorecard(scored, 8, season + 1)
    else:
        pd.testing.assert_frame_equal(scorecard(scored, 8, 53), scorecard(whole, 8, 53))


def test_window_columns_of_a_demand_span(tmp_path: Path) -> None:
    from triage.core import metrics

    rows = garden_rows(seed=23, weeks=30)
    path = to_parquet(rows, tmp_path / "s.parquet", dictionary=False)
    whole, scored = read_portfolio(path), read_portfolio(path, scored_window=10, season=3)
    last = whole.last_actual
    # Any window the span holds (the 10 read for, and the 3 columns of the baseline before
    # them) is the whole matrix's; a longer one reaches into columns never read.
    for window in (1, 10, 13):
        np.testing.assert_array_equal(
            metrics.window_columns(scored.demand, last, window),
            metrics.window_columns(whole.demand, last, window),
        )
        np.testing.assert_array_equal(
            metrics.window_columns(scored.demand[np.arange(5)], last, window),
            metrics.window_columns(whole.demand[np.arange(5)], last, window),
        )
    with pytest.raises(IndexError, match="reaches before column"):
        metrics.window_columns(scored.demand, last, 14)


@pytest.mark.parametrize(
    ("values", "fits"),
    [
        ([0.0, -0.0, 3.0, -7.0, 0.5, 2.0**24, np.nan, 1e30 * 0.0], True),
        ([1.0, 0.1], False),  # 0.1 has no exact float32
        ([2.0**24 + 1], False),  # past float32's 24-bit significand
        ([1e39], False),  # past float32's range
        ([np.inf, -np.inf, 2.0**-149], True),  # infinities and float32's least subnormal
    ],
)
def test_float32_only_when_every_value_comes_back_the_same(values: list[float], fits: bool) -> None:
    # Reference: IEEE 754 binary32 (24-bit significand, largest finite about 3.4e38).
    from triage.core.read.stream import _float32_if_exact

    array = np.array(values, dtype=np.float64)
    narrowed = _float32_if_exact(array)
    assert (narrowed is not None) == fits
    if narrowed is not None:
        assert narrowed.dtype == np.float32
        np.testing.assert_array_equal(narrowed.astype(np.float64), array)


def test_span_is_the_window_and_no_more(tmp_path: Path) -> None:
    rows = garden_rows(seed=2, weeks=30, forward=6)
    path = to_parquet(rows, tmp_path / "w.parquet", dictionary=False)
    whole = read_portfolio(path)
    scored = read_portfolio(path, scored_window=8)
    # The window's columns are the latest 8 with any actual demand (every week has some here),
    # up to the latest actual; the forward weeks are not read.
    kept = scored.forecast
    assert isinstance(kept, ColumnSpan)
    assert (kept.start, kept.stop) == (whole.last_actual - 7, whole.last_actual + 1)
    np.testing.assert_array_equal(
        kept[:, kept.start : kept.stop],
        whole.forecast[:, whole.last_actual - 7 : whole.last_actual + 1],
    )
    with pytest.raises(IndexError):
        scored.forecast[:, whole.last_actual + 1]


def test_a_file_the_streamed_way_declines_is_read_whole(tmp_path: Path) -> None:
    # Several rows for one series and period go to the full loader, which ignores the window
    # and gives its usual error; a file with several lags gives a whole matrix.
    rows = garden_rows(seed=6, weeks=12)
    two_lags = pd.concat([rows.assign(lag=1), rows.assign(lag=2)], ignore_index=True)
    path = to_parquet(two_lags, tmp_path / "lags.parquet", dictionary=True)
    scored = read_portfolio(path, scored_window=4, lag=1)
    assert isinstance(scored.forecast, np.ndarray)
    pd.testing.assert_frame_equal(scorecard(scored, 4), scorecard(read_portfolio(path, lag=1), 4))


def test_row_cells_of_every_kind_place_values_as_fancy_indexing_does() -> None:
    # Four kinds of row groups: adjacent cells (sorted, nothing missing), cells in order with
    # gaps (sorted, periods missing), each series' periods in order but the series not in key
    # order, any order (shuffled). Reference: numpy's own assignment ``flat[cells] = values``
    # of the whole cell array, then the kept columns sliced out.
    from triage.core.read.stream import _RowCells

    n_series, n_periods, span_start, width = 70, 12, 5, 4
    rng = np.random.default_rng(3)
    adjacent = np.arange(0, 240, dtype=np.int32)  # series 0-19, whole
    gaps = np.sort(rng.choice(np.arange(240, 480), 150, replace=False)).astype(np.int32)
    series_order = (rng.permutation(20) + 40) * n_periods  # series 40-59, 3 periods missing
    runs = np.concatenate(
        [first + np.sort(rng.choice(12, 9, replace=False)) for first in series_order]
    )
    shuffled = rng.permutation(np.arange(720, 840)).astype(np.int32)
    cell = np.concatenate([adjacent, gaps, runs.astype(np.int32), shuffled])
    blocks = [(0, 240), (240, 150), (390, 180), (570, 120)]
    placed = _RowCells.of(cell, blocks)
    assert list(placed.first) == [0] and list(placed.steps) == [240, 390]
    assert list(placed.cells) == [570]
    # Steps backwards or past 255 cells (where a series starts) are kept in full.
    jumps = np.diff(runs)
    assert len(placed.steps[390][2]) == np.count_nonzero((jumps < 1) | (jumps > 255)) > 0
    values = rng.normal(size=len(cell))

    whole = np.full(n_series * n_periods, np.nan)
    narrow = np.full(n_series * width, np.nan)
    for start, size in blocks:
        placed.scatter(whole, start, values[start : start + size])
        placed.scatter(narrow, start, values[start : start + size], n_periods, span_start, width)
    expected = np.full(n_series * n_periods, np.nan)
    expected[cell] = values
    np.testing.assert_array_equal(whole, expected)
    grid = expected.reshape(n_series, n_periods)[:, span_start : span_start + width]
    np.testing.assert_array_equal(narrow.reshape(n_series, width), grid)

    # Each series' latest cell, found in every kind of block.
    latest = np.full(n_series, -1, dtype=np.int32)
    np.maximum.at(latest, cell // n_periods, cell)
    present = latest >= 0
    select = placed.rows_at(np.where(present, latest, 0).astype(np.int32), n_periods)
    found = np.concatenate([start + select(start, size) for start, size in blocks])
    np.testing.assert_array_equal(np.sort(cell[found]), np.sort(latest[present]))


@pytest.mark.parametrize("by", ["error", "bias"])
def test_group_scorecard_is_identical_to_the_whole_read(tmp_path: Path, by: str) -> None:
    # ``triage rank --group`` reads the file for scoring only too.
    from triage.core import groups, metrics

    rows = garden_rows(seed=12, weeks=26).sample(frac=1.0, random_state=1)
    path = to_parquet(rows, tmp_path / "grp.parquet", dictionary=True, row_group_size=53)
    tables = []
    for portfolio in (read_portfolio(path), read_portfolio(path, scored_window=13)):
        card = scorecard(portfolio, 13)
        cols = metrics.window_columns(portfolio.demand, portfolio.last_actual, 13)
        grouping = groups.grouping(portfolio, groups.parse_group_columns(portfolio, "family"))
        tables.append(groups.group_scorecard(portfolio, card, cols, grouping, by=by))
    assert len(tables[0]) > 1
    pd.testing.assert_frame_equal(tables[1], tables[0])


@pytest.mark.parametrize(
    ("suffix", "forward", "n_items"),
    [(".csv", 4, 30), (".parquet", 0, 30), (".csv", 0, 1), (".parquet", 3, 1)],
    ids=["csv", "no forward weeks", "csv one item", "one item"],
)
def test_csv_single_series_and_no_forward_weeks(
    tmp_path: Path, suffix: str, forward: int, n_items: int
) -> None:
    rows = with_competing(garden_rows(seed=21, n_items=n_items, weeks=18, forward=forward))
    path = tmp_path / f"edge{suffix}"
    if suffix == ".csv":
        rows.to_csv(path, index=False)
    else:
        to_parquet(rows, path, dictionary=False, row_group_size=40)
    whole = read_portfolio(path)
    scored = read_portfolio(path, scored_window=6)
    assert isinstance(scored.forecast, ColumnSpan)
    assert scored.forecast.stop == whole.last_actual + 1
    for by, steps in (("error", None), ("fva", ("naive", "stat", "forecast"))):
        pd.testing.assert_frame_equal(
            scorecard(scored, 6, by=by, steps=steps), scorecard(whole, 6, by=by, steps=steps)
        )


@pytest.mark.parametrize("layout", list(LAYOUTS))
def test_compare_is_identical_to_the_whole_read(tmp_path: Path, layout: str) -> None:
    # ``triage compare`` reads the forecasts over its window only.
    from triage.core.compare import compare
    from triage.render import compare as render

    rows = with_competing(garden_rows(seed=14, weeks=30))
    if LAYOUTS[layout]["shuffle"]:
        rows = rows.sample(frac=1.0, random_state=3).reset_index(drop=True)
    size = LAYOUTS[layout]["row_group_size"]
    path = to_parquet(rows, tmp_path / "c.parquet", dictionary=True, row_group_size=size)
    whole, scored = read_portfolio(path), read_portfolio(path, scored_window=13, season=4)
    for by_series in (False, True):
        a = compare(whole, 13, 4, by_series=by_series)
        b = compare(scored, 13, 4, by_series=by_series)
        assert render.to_csv(b) == render.to_csv(a)
        assert render.to_json(scored, b, 13) == render.to_json(whole, a, 13)
        assert render.compare_table(scored, b, 13) == render.compare_table(whole, a, 13)


@pytest.mark.parametrize(
    ("where", "expected"),
    [
        ("forward", "has values only in the forward periods"),
        ("nowhere", "is empty"),
        ("before", "Try a longer --window"),
    ],
)
@pytest.mark.parametrize("shuffle", [False, True], ids=["sorted", "shuffled"])
def test_compare_hint_for_a_forecast_missing_in_the_window(
    tmp_path: Path, where: str, expected: str, shuffle: bool
) -> None:
    # A competing forecast with no value in the window: the hint says whether it has values
    # elsewhere, from the values the scoring-only read left out.
    from triage.core.compare import compare
    from triage.core.errors import TriageError

    rows = garden_rows(seed=15, weeks=30, forward=4)
    weeks = pd.to_datetime(rows["period"])
    last_actual = weeks[rows["demand"].notna()].max()
    window_start = last_actual - pd.Timedelta(weeks=12)
    keep = {
        "forward": weeks > last_actual,
        "nowhere": pd.Series(False, index=rows.index),
        "before": weeks < window_start,
    }[where]
    rows = rows.assign(forecast_late=rows["forecast"].where(keep))
    if shuffle:
        rows = rows.sample(frac=1.0, random_state=5).reset_index(drop=True)
    path = to_parquet(rows, tmp_path / "h.parquet", dictionary=False, row_group_size=29)
    messages = []
    for portfolio in (read_portfolio(path), read_portfolio(path, scored_window=13)):
        with pytest.raises(TriageError) as raised:
            compare(portfolio, 13, 1)
        messages.append((str(raised.value), raised.value.hint))
    assert messages[1] == messages[0]
    assert expected in (messages[0][1] or "")


def test_kept_history_of_other_series_is_never_used(tmp_path: Path) -> None:
    # A copy of a scoring read with fewer series (dataclasses.replace) must not take the
    # history measures of the whole: it recomputes them, which needs demand never kept.
    import dataclasses

    path = to_parquet(garden_rows(seed=29, weeks=24), tmp_path / "k.parquet", dictionary=True)
    scored = read_portfolio(path, scored_window=6, season=1)
    assert scored.history_measures(1) is scored.history
    fewer = dataclasses.replace(scored, keys=scored.keys.iloc[:5].reset_index(drop=True))
    with pytest.raises(IndexError, match="not loaded"):
        fewer.history_measures(1)
    with pytest.raises(IndexError, match="not loaded"):
        fewer.naive_scale(1)
