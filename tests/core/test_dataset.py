"""A dataset folder of Parquet parts scores exactly as one file holding every row.

The reference is ``triage rank`` of the single file the dataset was cut from (the local engine,
whose measures are checked against published formulas and reference libraries in
test_metrics_reference.py and test_metrics_oracle.py). Each partitioning (whole series per file,
one file per month, rows dealt at random) must give the same scorecard: every column to 1e-12
relative, ranks, flags and labels exactly — on the local engine here, on a Dask cluster in
test_dask_engine.py.
"""

from __future__ import annotations

import pickle
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tests.core.datasets import LAYOUTS, generated, write_layout
from triage.core import schema
from triage.core.dataset import (
    measures_of,
    open_dataset,
    plan_dataset,
    quick_summary,
    read_dataset,
    read_part,
    score_whole_part,
    summarise,
)
from triage.core.errors import LoadError, TriageError
from triage.core.ranking import ranked, scorecard, series_measures
from triage.core.read import read_portfolio

ITEMS = 300


@pytest.fixture(scope="module")
def source(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The generator's portfolio (prices, attributes, two competing forecasts) as one file."""
    return generated(tmp_path_factory.mktemp("source"), ITEMS)


@pytest.fixture(scope="module")
def rows(source: Path) -> pd.DataFrame:
    return pq.read_table(source).to_pandas()


@pytest.fixture(scope="module")
def reference(source: Path) -> pd.DataFrame:
    return scorecard(read_portfolio(source))


def same_scorecard(got: pd.DataFrame, want: pd.DataFrame) -> None:
    """Every column of ``want`` equal in ``got``: numbers to 1e-12 relative, the rest exactly."""
    got = got.reset_index(drop=True)
    want = want.reset_index(drop=True)
    assert list(got.columns[: len(want.columns)]) == list(want.columns)
    for name in want.columns:
        if want[name].dtype.kind == "f":
            np.testing.assert_allclose(
                got[name].to_numpy(), want[name].to_numpy(), rtol=1e-12, atol=0, err_msg=name
            )
        else:
            assert got[name].tolist() == want[name].tolist(), name


@pytest.mark.parametrize("layout", LAYOUTS)
def test_every_partitioning_scores_as_the_single_file(
    tmp_path: Path, rows: pd.DataFrame, reference: pd.DataFrame, layout: str
) -> None:
    folder = write_layout(rows, tmp_path / layout, layout)
    assert len(open_dataset(folder).files) > 1
    same_scorecard(scorecard(read_dataset(folder)), reference)


@pytest.mark.parametrize("by", ["error", "bias", "fva"])
def test_ranking_in_two_steps_is_the_scorecard(source: Path, by: str) -> None:
    # The split the Dask engine relies on: measures per series, then one ranking.
    portfolio = read_portfolio(source)
    cols = np.flatnonzero(~np.isnan(portfolio.demand).all(axis=0))[-13:]
    pd.testing.assert_frame_equal(
        ranked(series_measures(portfolio, cols), by), scorecard(portfolio, by=by)
    )


def test_a_hive_folder_the_files_lack_becomes_an_attribute(
    tmp_path: Path, rows: pd.DataFrame, reference: pd.DataFrame
) -> None:
    folder = tmp_path / "lake"
    for region, locations in {"north": ["NTH"], "rest": ["STH", "WST", "EST"]}.items():
        below = folder / f"region={region}" / "load=2026-12-01"
        below.mkdir(parents=True)
        part = rows[rows["location"].astype(str).isin(locations)]
        pq.write_table(pa.Table.from_pandas(part, preserve_index=False), below / "part.parquet")
    (folder / "_SUCCESS").write_text("")
    card = scorecard(read_dataset(folder))
    same_scorecard(card, reference)
    assert list(card.columns[-2:]) == ["region", "load"]
    north = card["location"] == "NTH"
    assert set(card.loc[north, "region"]) == {"north"}
    assert set(card.loc[~north, "region"]) == {"rest"}


def test_a_hive_folder_naming_a_key_the_files_lack_is_refused(
    tmp_path: Path, rows: pd.DataFrame
) -> None:
    below = tmp_path / "lake" / "location=NTH"
    below.mkdir(parents=True)
    part = rows[rows["location"].astype(str) == "NTH"].drop(columns=["location"])
    pq.write_table(pa.Table.from_pandas(part, preserve_index=False), below / "part.parquet")
    with pytest.raises(LoadError, match=r"(?s)folder location=NTH .*Write the 'location' column"):
        read_dataset(tmp_path / "lake")


def test_a_bad_cell_is_named_by_its_part_and_row(tmp_path: Path, rows: pd.DataFrame) -> None:
    folder = write_layout(rows, tmp_path / "period", "period")
    part = folder / "2026-03.parquet"
    table = pq.read_table(part).to_pandas()
    table["demand"] = table["demand"].map(lambda v: "" if pd.isna(v) else f"{v:g}")
    table.loc[6, "demand"] = "12 kg"
    pq.write_table(pa.Table.from_pandas(table, preserve_index=False), part)
    with pytest.raises(LoadError) as raised:
        read_dataset(folder)
    text = str(raised.value)
    # Parquet rows count from 1 (no header row): frame row 6 is row 7.
    assert str(part) in text and "12 kg" in text and "row 7" in text


def test_parts_with_other_columns_are_refused(tmp_path: Path, rows: pd.DataFrame) -> None:
    folder = write_layout(rows, tmp_path / "period", "period")
    part = folder / "2026-03.parquet"
    pq.write_table(pq.read_table(part).drop(["planner"]), part)
    with pytest.raises(LoadError, match=r"2026-03\.parquet: its columns .* are not those of"):
        read_dataset(folder)


def test_a_row_in_two_parts_is_named_in_both(tmp_path: Path, rows: pd.DataFrame) -> None:
    folder = write_layout(rows, tmp_path / "period", "period")
    pq.write_table(pq.read_table(folder / "2026-03.parquet").slice(0, 2), folder / "again.parquet")
    with pytest.raises(LoadError) as raised:
        read_dataset(folder)
    text = str(raised.value)
    assert "2 (series, period) combinations" in text
    assert "2026-03.parquet row 1; again.parquet row 1" in text


def test_parts_off_one_calendar_are_refused(tmp_path: Path, rows: pd.DataFrame) -> None:
    folder = write_layout(rows, tmp_path / "period", "period")
    part = folder / "2026-03.parquet"
    table = pq.read_table(part).to_pandas()
    # Every row of this part moved by 3 days: each file alone is a weekly calendar.
    table["period"] = pd.to_datetime(table["period"]) + pd.Timedelta(days=3)
    pq.write_table(pa.Table.from_pandas(table, preserve_index=False), part)
    with pytest.raises(LoadError, match="not one weekly or monthly calendar"):
        read_dataset(folder)


def test_a_folder_without_parquet_is_not_a_dataset(tmp_path: Path) -> None:
    (tmp_path / "notes.csv").write_text("item,period,demand,forecast\n")
    with pytest.raises(LoadError, match="holds no Parquet file"):
        open_dataset(tmp_path)


def test_lags_are_chosen_over_the_whole_dataset(tmp_path: Path, rows: pd.DataFrame) -> None:
    # Two lags, each part holding one: the single file needs --lag, and so does the dataset.
    both = pd.concat(
        [rows.assign(lag=1), rows.assign(lag=2, forecast=rows["forecast"] * 1.1)],
        ignore_index=True,
    )
    single = tmp_path / "lags.parquet"
    pq.write_table(pa.Table.from_pandas(both, preserve_index=False), single)
    folder = tmp_path / "lags"
    folder.mkdir()
    for lag, part in both.groupby(schema.LAG):
        pq.write_table(
            pa.Table.from_pandas(part, preserve_index=False), folder / f"lag-{lag}.parquet"
        )
    with pytest.raises(LoadError, match="2 forecast lags"):
        read_dataset(folder)
    same_scorecard(scorecard(read_dataset(folder, lag=2)), scorecard(read_portfolio(single, lag=2)))


def test_errors_cross_processes_whole() -> None:
    # A worker raises them and the command line prints them (message, hint and path kept).
    error = LoadError(Path("lake/part.parquet"), "bad cell", hint="fix it")
    again = pickle.loads(pickle.dumps(error))
    assert type(again) is LoadError
    assert (str(again), again.path, again.hint) == (str(error), error.path, "fix it")
    plain = pickle.loads(pickle.dumps(TriageError("no", hint="yes")))
    assert str(plain) == "no\n  What to do: yes"


@pytest.mark.parametrize("layout", LAYOUTS)
def test_the_quick_summary_is_the_summary_of_the_whole_part(
    tmp_path: Path, rows: pd.DataFrame, layout: str
) -> None:
    # The Dask engine plans from summaries that read four columns; the local engine from parts
    # read whole. Both must describe a part alike.
    folder = write_layout(rows, tmp_path / layout, layout)
    dataset = open_dataset(folder)
    for part in range(len(dataset.files)):
        quick = quick_summary(dataset, part)
        whole = summarise(read_part(dataset, part))
        assert (quick.columns, quick.attributes, quick.rows, quick.keys) == (
            whole.columns,
            whole.attributes,
            whole.rows,
            whole.keys,
        )
        for name in ("stamps", "actual", "lag_stamps"):
            np.testing.assert_array_equal(getattr(quick, name), getattr(whole, name))


def test_parts_of_whole_series_on_their_own_calendars_score_as_the_single_file(
    tmp_path: Path, rows: pd.DataFrame
) -> None:
    # The Dask engine reads a part of whole series as a file on its own calendar and places it
    # on the dataset's (dataset.on_grid). Here the first block's series start 30 weeks late and
    # the last block's end 5 weeks early (its forward weeks), so both are padded.
    folder = write_layout(rows, tmp_path / "blocks", "blocks")
    files = sorted(folder.glob("*.parquet"))
    stamps = pd.to_datetime(rows["period"])
    late = stamps.min() + pd.Timedelta(weeks=30)
    early = stamps.max() - pd.Timedelta(weeks=5)
    for path, keep in ((files[0], lambda p: p >= late), (files[-1], lambda p: p <= early)):
        part = pq.read_table(path).to_pandas()
        part = part[keep(pd.to_datetime(part["period"]))]
        pq.write_table(pa.Table.from_pandas(part, preserve_index=False), path)
    single = tmp_path / "single.parquet"
    pq.write_table(
        pa.concat_tables([pq.read_table(p) for p in files], promote_options="permissive"), single
    )
    dataset = open_dataset(folder)
    plan = plan_dataset(dataset, [quick_summary(dataset, i) for i in range(len(files))])
    assert plan.whole_series
    cols = plan.window_cols(13)
    scored = pd.concat(
        [score_whole_part(dataset, i, plan, cols, 1, None) for i in range(len(files))],
        ignore_index=True,
    )
    same_scorecard(ranked(measures_of(scored, plan)), scorecard(read_portfolio(single)))
