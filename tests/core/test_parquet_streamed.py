"""The streamed Parquet reader of ``read_portfolio`` against the full loader and against pandas.

``read_portfolio`` reads a Parquet file one row group at a time straight into the dense arrays
(``read.scan_parquet`` + ``read.stream.build_streamed``) and falls back to the full loader
(``read.load_frame`` + ``build_portfolio``) whenever it cannot vouch for a file. Both must give the
same portfolio, or the same error. The dense arrays are also checked against
``pandas.DataFrame.pivot`` of the file's rows (a reference library), so that the two paths cannot
agree on a wrong layout. Files are invented (a garden-supply wholesaler).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from sample.generate import write_parquet as write_sample_parquet
from triage.core import schema
from triage.core.errors import LoadError
from triage.core.portfolio import Portfolio, build_portfolio
from triage.core.ranking import scorecard
from triage.core.read import FastPathDeclined, load_frame, read_portfolio, scan_parquet
from triage.core.read.stream import build_streamed

MONDAY = dt.date(2025, 3, 3)


def garden_rows(
    seed: int = 5, *, n_items: int = 40, weeks: int = 20, forward: int = 4
) -> pd.DataFrame:
    """Long rows of items at two depots: gaps, empty demand, forward weeks, a price change."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n_items):
        item = f"GS-{i:03d}" if i % 7 else f"{i:05d}"  # some ids look like numbers
        for depot in ("north", "south"):
            start = int(rng.integers(0, 5))
            price = float(rng.choice([2.5, 4.0, 12.75]))
            for t in range(start, weeks + forward):
                if rng.random() < 0.05:
                    continue  # no row at all for this week
                history = t < weeks
                demand = float(rng.poisson(8)) if history and rng.random() > 0.05 else None
                # Every fifth item has one price increase.
                price_here = price * 1.1 if i % 5 == 0 and t > weeks // 2 else price
                rows.append(
                    {
                        "item": item,
                        "location": depot,
                        "period": MONDAY + dt.timedelta(weeks=t),
                        "demand": demand,
                        "forecast": float(rng.normal(8, 2)) if rng.random() > 0.03 else None,
                        "price": None if rng.random() < 0.1 else price_here,
                        "family": ["seeds", "tools", None][i % 3],
                        "buyer": "Ines" if t < weeks else "Ravi",
                    }
                )
    return pd.DataFrame(rows)


def to_parquet(
    rows: pd.DataFrame, path: Path, *, dictionary: bool, row_group_size: int = 97
) -> Path:
    """Write rows with text columns dictionary-encoded or as plain strings; small row groups."""
    columns = {}
    for name in rows.columns:
        # pandas holds a missing cell as NaN: write it as a Parquet null.
        values = [None if isinstance(v, float) and np.isnan(v) else v for v in rows[name].tolist()]
        if name == "period":
            columns[name] = pa.array(values, pa.date32())
        elif name in ("demand", "forecast", "price") or name.startswith("forecast_"):
            columns[name] = pa.array(values, pa.float64())
        elif name == "lag":
            columns[name] = pa.array(values, pa.int32())
        else:
            array = pa.array(values, pa.string())
            columns[name] = array.dictionary_encode() if dictionary else array
    pq.write_table(pa.table(columns), path, row_group_size=row_group_size)
    return path


def full_way(path: Path, lag: int | None = None) -> Portfolio:
    return build_portfolio(load_frame(path), lag=lag)


def streamed_way(path: Path, lag: int | None = None) -> Portfolio:
    return build_streamed(scan_parquet(path), lag)


def assert_same(a: Portfolio, b: Portfolio) -> None:
    for name in ("demand", "forecast"):
        x, y = getattr(a, name), getattr(b, name)
        assert x.dtype == y.dtype == np.float64
        np.testing.assert_array_equal(x, y)
    assert (a.price is None) == (b.price is None)
    if a.price is not None:
        np.testing.assert_array_equal(np.asarray(a.price), np.asarray(b.price))
    assert list(a.competing) == list(b.competing)
    for name, values in a.competing.items():
        assert values.dtype == b.competing[name].dtype == np.float64
        np.testing.assert_array_equal(values, b.competing[name])
    pd.testing.assert_frame_equal(a.keys, b.keys)
    assert a.calendar.freq == b.calendar.freq
    assert a.calendar.periods.equals(b.calendar.periods)
    for name in (
        "key_columns",
        "attributes",
        "last_actual",
        "lag",
        "lags",
        "rows",
        "notices",
        "path",
    ):
        assert getattr(a, name) == getattr(b, name), name


def pivot_reference(rows: pd.DataFrame, p: Portfolio, column: str) -> np.ndarray:
    """The series x period matrix of one column by ``DataFrame.pivot`` (pandas as reference)."""
    frame = rows.assign(period=pd.to_datetime(rows["period"]))
    wide = frame.pivot(index=["item", "location"], columns="period", values=column)
    wide = wide.reindex(columns=p.calendar.periods)
    order = pd.MultiIndex.from_frame(p.keys[["item", "location"]].astype(object))
    return wide.reindex(order).to_numpy(dtype=np.float64)


@pytest.mark.parametrize("dictionary", [True, False])
def test_dictionary_and_plain_ids_give_the_same_portfolio(tmp_path: Path, dictionary: bool) -> None:
    rows = garden_rows()
    path = to_parquet(rows, tmp_path / "garden.parquet", dictionary=dictionary)
    streamed, full = streamed_way(path), full_way(path)
    assert_same(streamed, full)
    assert_same(streamed, read_portfolio(path))
    # The whole scorecard too: keys taken through the codes the streamed build keeps, prices
    # through UnitPrices, both orders.
    for by in ("error", "bias"):
        pd.testing.assert_frame_equal(scorecard(streamed, by=by), scorecard(full, by=by))
    # Rows of a series and period land in that cell (pandas.DataFrame.pivot as the reference);
    # forward rows carry no demand.
    np.testing.assert_array_equal(streamed.demand, pivot_reference(rows, streamed, "demand"))
    np.testing.assert_array_equal(streamed.forecast, pivot_reference(rows, streamed, "forecast"))
    assert streamed.n_forward == 4
    # Series are in key order: item, then location (Python string order).
    keys = list(zip(streamed.keys["item"], streamed.keys["location"], strict=True))
    assert keys == sorted(keys)
    # Latest period's attribute; a missing attribute is the empty string.
    assert set(streamed.keys["buyer"]) == {"Ravi"}
    assert "" in set(streamed.keys["family"])


def test_key_codes_follow_replaced_keys(tmp_path: Path) -> None:
    p = read_portfolio(to_parquet(garden_rows(), tmp_path / "k.parquet", dictionary=True))
    renamed = dataclasses.replace(p, keys=p.keys.assign(family=p.keys["family"] + "!"))
    order = np.arange(p.n_series)[::-1]
    assert list(renamed.text_column("family", order)) == [
        v + "!" for v in p.text_column("family", order)
    ]
    assert list(p.text_column("item", order)) == p.keys["item"].tolist()[::-1]


def test_both_encodings_agree_with_each_other(tmp_path: Path) -> None:
    rows = garden_rows(seed=11)
    plain = read_portfolio(to_parquet(rows, tmp_path / "plain.parquet", dictionary=False))
    coded = read_portfolio(to_parquet(rows, tmp_path / "coded.parquet", dictionary=True))
    for name in ("demand", "forecast"):
        np.testing.assert_array_equal(getattr(plain, name), getattr(coded, name))
    np.testing.assert_array_equal(np.asarray(plain.price), np.asarray(coded.price))
    pd.testing.assert_frame_equal(plain.keys, coded.keys)
    assert plain.notices == coded.notices


def test_row_order_and_row_groups_change_nothing(tmp_path: Path) -> None:
    rows = garden_rows(seed=3)
    shuffled = rows.sample(frac=1.0, random_state=2).reset_index(drop=True)
    a = read_portfolio(
        to_parquet(rows, tmp_path / "a.parquet", dictionary=True, row_group_size=1000)
    )
    b = read_portfolio(
        to_parquet(shuffled, tmp_path / "b.parquet", dictionary=True, row_group_size=31)
    )
    for name in ("demand", "forecast"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
    np.testing.assert_array_equal(np.asarray(a.price), np.asarray(b.price))
    pd.testing.assert_frame_equal(a.keys, b.keys)


def test_prices_fill_gaps_and_keep_changes(tmp_path: Path) -> None:
    rows = garden_rows(seed=8)
    path = to_parquet(rows, tmp_path / "p.parquet", dictionary=True)
    streamed, full = streamed_way(path), full_way(path)
    assert_same(streamed, full)
    dense = np.asarray(streamed.price)
    # Gaps take the series' nearest earlier price, else the first later one (common practice):
    # checked with pandas' ffill/bfill along each series.
    given = pivot_reference(rows, streamed, "price")
    expected = pd.DataFrame(given).ffill(axis=1).bfill(axis=1).to_numpy()
    np.testing.assert_array_equal(dense, expected)
    assert len(streamed.price.changing) > 0
    assert any("no price" in note for note in streamed.notices)


def test_single_lag_column_takes_the_streamed_way(tmp_path: Path) -> None:
    rows = garden_rows(seed=4).assign(lag=1)
    path = to_parquet(rows, tmp_path / "lag.parquet", dictionary=True)
    streamed = streamed_way(path)
    assert streamed.lag == 1 and streamed.lags == (1,)
    assert_same(streamed, full_way(path))
    assert_same(streamed_way(path, lag=1), full_way(path, lag=1))


def test_generated_sample_file_is_identical_both_ways(tmp_path: Path) -> None:
    path = tmp_path / "sample.parquet"
    write_sample_parquet(path, n_items=60, n_locations=3, n_weeks=30, n_forward=5)
    assert_same(streamed_way(path), full_way(path))


def test_monthly_timestamps(tmp_path: Path) -> None:
    months = [dt.datetime(2024, m, 1) for m in range(1, 13)]
    table = pa.table(
        {
            "item": pa.array(["A"] * 12 + ["B"] * 12),
            "period": pa.array(months * 2, pa.timestamp("us")),
            "demand": pa.array([float(m) for m in range(12)] * 2),
            "forecast": pa.array([float(m) + 0.5 for m in range(12)] * 2),
        }
    )
    path = tmp_path / "m.parquet"
    pq.write_table(table, path, row_group_size=5)
    streamed = streamed_way(path)
    assert streamed.calendar.freq == schema.MONTHLY
    assert_same(streamed, full_way(path))


# --- files the streamed reader leaves to the full loader -----------------------------------------


def declined(path: Path, lag: int | None = None) -> None:
    with pytest.raises(FastPathDeclined):
        streamed_way(path, lag)


def same_error(path: Path, lag: int | None = None) -> str:
    """read_portfolio's error is the full loader's, word for word."""
    with pytest.raises(LoadError) as full:
        full_way(path, lag)
    with pytest.raises(LoadError) as fast:
        read_portfolio(path, lag=lag)
    assert str(fast.value) == str(full.value)
    return str(full.value)


def test_duplicate_rows_give_the_full_loaders_error(tmp_path: Path) -> None:
    rows = garden_rows(seed=1)
    rows = pd.concat([rows, rows.iloc[[3]]], ignore_index=True)
    path = to_parquet(rows, tmp_path / "dup.parquet", dictionary=True)
    declined(path)
    assert "more than one row" in same_error(path)


def test_bad_cells_give_the_full_loaders_error(tmp_path: Path) -> None:
    rows = garden_rows(seed=2)
    cases = {
        "blank": rows.assign(item=rows["item"].where(rows.index != 5, "  ")),
        "null": rows.assign(item=rows["item"].where(rows.index != 5, None)),
        "control": rows.assign(item=rows["item"].where(rows.index != 5, "GS\x1b[31m")),
        "negative": rows.assign(price=rows["price"].where(rows.index != 9, -1.0)),
        "infinite": rows.assign(demand=rows["demand"].where(rows.index != 9, np.inf)),
    }
    for name, frame in cases.items():
        path = to_parquet(frame, tmp_path / f"{name}.parquet", dictionary=name != "null")
        declined(path)
        if name == "control":
            # Not an error: the full loader replaces control characters and says so.
            assert_same(read_portfolio(path), full_way(path))
            assert any("control characters" in n for n in read_portfolio(path).notices)
        else:
            same_error(path)


def test_several_lags_and_unpriced_series_are_left_to_the_full_loader(tmp_path: Path) -> None:
    rows = garden_rows(seed=6)
    lagged = pd.concat([rows.assign(lag=1), rows.assign(lag=2)], ignore_index=True)
    path = to_parquet(lagged, tmp_path / "lags.parquet", dictionary=True)
    declined(path)
    assert "forecast lags" in same_error(path)
    assert_same(read_portfolio(path, lag=2), full_way(path, lag=2))
    unpriced = rows.assign(price=rows["price"].where(rows["item"] != rows["item"].iloc[0], None))
    path = to_parquet(unpriced, tmp_path / "unpriced.parquet", dictionary=True)
    declined(path)
    assert "have no price on any row" in same_error(path)


def test_irregular_calendar_gives_the_full_loaders_error(tmp_path: Path) -> None:
    rows = garden_rows(seed=7)
    rows.loc[4, "period"] = rows.loc[4, "period"] + dt.timedelta(days=2)
    path = to_parquet(rows, tmp_path / "odd.parquet", dictionary=True)
    declined(path)
    assert "irregular calendar" in same_error(path)
