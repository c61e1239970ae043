"""Histories fetched on demand from a dataset equal those of one file holding every row.

``dataset.fetch_series`` reads a few series from a dataset's parts, only the row groups whose
item statistics may hold them (``read.parquet._groups_holding``). The reference is the single
file the dataset was cut from, read whole (``read_portfolio``): each fetched series' demand,
forecasts, prices and attributes must be the same, whatever the partitioning. The pruning is
checked against pyarrow reading every row group (``pyarrow.parquet.ParquetFile.read_row_group``):
no row group holding a picked item may be left out.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tests.core.datasets import LAYOUTS, generated, write_layout
from triage.core.dataset import Plan, fetch_series, open_dataset, plan_dataset, quick_summary
from triage.core.errors import LoadError
from triage.core.portfolio import Portfolio
from triage.core.read import read_portfolio
from triage.core.read.parquet import _groups_holding

ITEMS = 120


@pytest.fixture(scope="module")
def source(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return generated(tmp_path_factory.mktemp("source"), ITEMS)


@pytest.fixture(scope="module")
def rows(source: Path) -> pd.DataFrame:
    return pq.read_table(source).to_pandas()


@pytest.fixture(scope="module")
def whole(source: Path) -> Portfolio:
    return read_portfolio(source)


def planned(folder: Path) -> Plan:
    dataset = open_dataset(folder)
    return plan_dataset(dataset, [quick_summary(dataset, i) for i in range(len(dataset.files))])


def same_series(got: Portfolio, whole: Portfolio) -> None:
    """Every fetched series equals the whole file's series of the same key."""
    assert got.calendar.periods.equals(whole.calendar.periods)
    assert got.last_actual == whole.last_actual
    for j in range(got.n_series):
        i = whole.series_index.find(*got.key(j))
        assert i is not None
        np.testing.assert_array_equal(got.demand[j], whole.demand[i])
        np.testing.assert_array_equal(got.forecast[j], whole.forecast[i])
        assert got.price is not None and whole.price is not None
        np.testing.assert_array_equal(got.price[j], whole.price[i])
        assert list(got.competing) == list(whole.competing)
        for name, values in got.competing.items():
            np.testing.assert_array_equal(values[j], whole.competing[name][i])
        for column in whole.attributes:
            assert got.keys[column].iat[j] == whole.keys[column].iat[i], column


@pytest.mark.parametrize("layout", LAYOUTS)
def test_fetched_histories_are_the_single_files(
    tmp_path: Path, rows: pd.DataFrame, whole: Portfolio, layout: str
) -> None:
    folder = write_layout(rows, tmp_path / layout, layout)
    plan = planned(folder)
    positions = [0, 5, 17, whole.n_series // 2, whole.n_series - 1]
    keys = [whole.key(i) for i in positions]
    got = fetch_series(plan, keys)
    assert got is not None
    assert sorted(got.key(j) for j in range(got.n_series)) == sorted(keys)
    same_series(got, whole)


def test_a_key_no_part_holds_fetches_nothing(
    tmp_path: Path, rows: pd.DataFrame, whole: Portfolio
) -> None:
    plan = planned(write_layout(rows, tmp_path / "period", "period"))
    assert fetch_series(plan, [("no such item", "NTH")]) is None
    # A known item at a location it is not sold at is not a series either.
    item, _ = whole.key(0)
    assert fetch_series(plan, [(item, "no such location")]) is None


def _sorted_file(rows: pd.DataFrame, path: Path, group_rows: int) -> pd.DataFrame:
    ordered = rows.sort_values(["item", "location", "period"], kind="stable")
    ordered = ordered.reset_index(drop=True)
    table = pa.Table.from_pandas(ordered, preserve_index=False)
    pq.write_table(table, path, row_group_size=group_rows)
    return ordered


def test_only_the_row_groups_that_may_hold_an_item_are_read(
    tmp_path: Path, rows: pd.DataFrame
) -> None:
    folder = tmp_path / "sorted"
    folder.mkdir()
    path = folder / "part.parquet"
    _sorted_file(rows, path, group_rows=200)
    metadata = pq.read_metadata(path)
    assert metadata.num_row_groups > 20
    handle = pq.ParquetFile(path)
    items = sorted(rows["item"].astype(str).unique())
    for picked in ([items[0]], [items[len(items) // 2]], [items[-1]], items[3:6]):
        kept = _groups_holding(metadata, "item", picked)
        holding = [
            g
            for g in range(metadata.num_row_groups)
            if set(handle.read_row_group(g, columns=["item"]).column(0).to_pylist()) & set(picked)
        ]
        # No row group holding an item is left out; in a sorted file little else is read.
        assert set(holding) <= set(kept)
        assert len(kept) <= len(holding) + 2
    assert _groups_holding(metadata, "item", ["~ after every item"]) == []


def test_ids_stored_as_numbers_are_fetched_without_pruning(tmp_path: Path) -> None:
    periods = pd.date_range("2026-01-05", periods=30, freq="W-MON")
    frame = pd.DataFrame(
        {
            "item": np.repeat([101, 202, 303], 30),
            "period": np.tile(periods, 3),
            "demand": np.arange(90, dtype=float),
            "forecast": np.arange(90, dtype=float) + 1.5,
        }
    )
    folder = tmp_path / "numbers"
    folder.mkdir()
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), folder / "a.parquet")
    metadata = pq.read_metadata(folder / "a.parquet")
    assert _groups_holding(metadata, "item", ["202"]) == list(range(metadata.num_row_groups))
    got = fetch_series(planned(folder), [("202", "")])
    assert got is not None and got.key(0) == ("202", "")
    np.testing.assert_array_equal(got.demand[0], np.arange(30, 60, dtype=float))


def test_a_bad_cell_in_a_fetched_row_group_is_named_by_its_row_in_the_file(
    tmp_path: Path, rows: pd.DataFrame
) -> None:
    folder = tmp_path / "bad"
    folder.mkdir()
    ordered = rows.sort_values(["item", "location", "period"], kind="stable")
    ordered = ordered.reset_index(drop=True)
    ordered["demand"] = ordered["demand"].map(lambda v: "" if pd.isna(v) else f"{v:g}")
    at = 1234
    ordered.loc[at, "demand"] = "12 kg"
    pq.write_table(
        pa.Table.from_pandas(ordered, preserve_index=False),
        folder / "p.parquet",
        row_group_size=200,
    )
    # The plan is made before the cell went bad, as a scorecard's is.
    good = tmp_path / "good"
    good.mkdir()
    _sorted_file(rows, good / "p.parquet", group_rows=200)
    plan = planned(good)
    bad_plan = dataclasses.replace(plan, dataset=open_dataset(folder))
    key = (str(ordered.at[at, "item"]), str(ordered.at[at, "location"]))
    with pytest.raises(LoadError) as raised:
        fetch_series(bad_plan, [key])
    text = str(raised.value)
    # Parquet rows count from 1: frame row 1234 is row 1235 of the file.
    assert "12 kg" in text and f"row {at + 1}" in text and "p.parquet" in text


def test_with_the_parts_item_ranges_only_the_parts_that_may_hold_the_series_are_read(
    tmp_path: Path, rows: pd.DataFrame, whole: Portfolio, monkeypatch: pytest.MonkeyPatch
) -> None:
    from triage.core import dataset as dataset_mod

    folder = write_layout(rows, tmp_path / "blocks", "blocks")
    plan = planned(folder)
    ranges = dataset_mod.part_ranges(plan.dataset)
    assert len(ranges) == len(plan.dataset.files)
    opened: list[int] = []
    original = dataset_mod.read_picked

    def counted(dataset, part, pick, **kwargs):
        opened.append(part)
        return original(dataset, part, pick, **kwargs)

    monkeypatch.setattr(dataset_mod, "read_picked", counted)
    keys = [whole.key(0), whole.key(whole.n_series - 1)]
    got = fetch_series(plan, keys, ranges=ranges)
    assert got is not None and sorted(got.key(j) for j in range(got.n_series)) == sorted(keys)
    same_series(got, whole)
    # The blocks layout cuts by item range: the first and the last series are in two parts.
    assert sorted(opened) == [0, len(plan.dataset.files) - 1]
