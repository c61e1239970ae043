"""The Dask engine gives the local engine's scorecard, whatever the dataset's partitioning.

A local Dask cluster of two worker processes scores about 20,000 series cut three ways (whole
series per file, one file per month, rows dealt at random); the reference is the local engine on
the single file the dataset was cut from (see test_dataset.py for why that is a reference). Every
column must agree to 1e-12 relative; ranks, flags and labels exactly.
"""

from __future__ import annotations

import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from sample import generate
from tests.core.datasets import LAYOUTS, generated, write_layout
from tests.core.test_dataset import same_scorecard
from triage.core.dask_engine import ClusterOptions, cluster_client, score_dataset
from triage.core.errors import LoadError, TriageError
from triage.core.ranking import ranked, scorecard
from triage.core.read import read_portfolio

#: Items of the generated portfolio; each is stocked at generate.SAMPLE_LOCATIONS locations.
ITEMS = 20_000 // generate.SAMPLE_LOCATIONS


@pytest.fixture(scope="module")
def source(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return generated(tmp_path_factory.mktemp("dask-source"), ITEMS)


@pytest.fixture(scope="module")
def datasets(source: Path, tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    rows = pq.read_table(source).to_pandas()
    base = tmp_path_factory.mktemp("dask-datasets")
    return {layout: write_layout(rows, base / layout, layout) for layout in LAYOUTS}


@pytest.fixture(scope="module")
def client() -> Iterator[Any]:
    with cluster_client(ClusterOptions(workers=2, memory_limit="2GB")) as running:
        yield running


@pytest.mark.parametrize("layout", LAYOUTS)
def test_dask_scores_every_partitioning_as_the_single_file(
    source: Path, datasets: dict[str, Path], client: Any, layout: str
) -> None:
    portfolio = read_portfolio(source)
    scored = score_dataset(datasets[layout], client, window=13, season=1)
    for by in ("error", "bias"):
        reference = scorecard(portfolio, by=by)
        assert len(reference) >= 19_000
        same_scorecard(ranked(scored.measures, by), reference)
    assert scored.described.path == datasets[layout]
    # Only the parts cut by key range hold whole series and are scored without a shuffle.
    assert scored.plan.whole_series == (layout == "blocks")


@pytest.mark.parametrize("layout", LAYOUTS)
def test_dask_groups_every_partitioning_as_the_single_file(
    source: Path, datasets: dict[str, Path], client: Any, layout: str
) -> None:
    # rank --group on the Dask engine: the series' errors per window period travel with their
    # measures, and the client sums them per group over the same blocks in the same order as
    # the local engine does (groups.group_scorecard_of against groups.group_scorecard).
    from triage.core import groups, metrics

    portfolio = read_portfolio(source)
    cols = metrics.window_columns(portfolio.demand, portfolio.last_actual, 13)
    card = scorecard(portfolio)
    scored = score_dataset(datasets[layout], client, window=13, season=1, errors=True)
    measures = scored.measures
    assert measures.window_errors is not None
    assert measures.window_errors.shape == (len(measures), len(cols))
    for by_columns in (("family",), ("location", "abc_class")):
        local_groups = groups.grouping(portfolio, by_columns)
        spread_groups = groups.grouping_of(measures.text, len(measures), by_columns)
        np.testing.assert_array_equal(spread_groups.codes, local_groups.codes)
        for by in ("error", "bias"):
            want = groups.group_scorecard(portfolio, card, cols, local_groups, by=by)
            got = groups.group_scorecard_of(measures, ranked(measures), spread_groups, by=by)
            assert len(want) > 1
            same_scorecard(got, want)
            # The group totals' sums per period are the same numbers, not just close ones.
            np.testing.assert_array_equal(
                got["aggregate_abs_error"].to_numpy(), want["aggregate_abs_error"].to_numpy()
            )


def test_dask_checks_the_steps_and_measures_them(
    source: Path, datasets: dict[str, Path], client: Any
) -> None:
    steps = ("naive", "stat", "customer")
    # A window of 8 and steps ending in customer: fva_loss measures customer against stat.
    reference = scorecard(read_portfolio(source), 8, 1, by="fva", steps=steps)
    scored = score_dataset(datasets["period"], client, window=8, season=1, steps=steps)
    same_scorecard(ranked(scored.measures, "fva"), reference)
    assert scored.steps == steps
    with pytest.raises(TriageError, match="nowcast"):
        score_dataset(datasets["period"], client, window=13, season=1, steps=("naive", "nowcast"))


def test_a_bad_part_on_a_worker_is_named_by_part_and_row(
    tmp_path: Path, datasets: dict[str, Path], client: Any
) -> None:
    folder = tmp_path / "bad"
    folder.mkdir()
    parts = sorted(datasets["period"].glob("*.parquet"))[:4]
    for part in parts:
        table = pq.read_table(part)
        if part == parts[2]:
            frame = table.to_pandas()
            frame["forecast"] = frame["forecast"].map(lambda v: "" if pd.isna(v) else f"{v:g}")
            frame.loc[2, "forecast"] = "n/a?"
            table = pa.Table.from_pandas(frame, preserve_index=False)
        pq.write_table(table, folder / part.name)
    with pytest.raises(LoadError) as raised:
        score_dataset(folder, client, window=13, season=1)
    text = str(raised.value)
    assert parts[2].name in text and "n/a?" in text and "row 3" in text


#: The command line, as the installed ``triage`` script runs it.
RUN = "import sys; from triage.cli import main; sys.exit(main(sys.argv[1:]))"


def test_rank_engine_dask_writes_the_single_files_csv(
    tmp_path: Path, source: Path, datasets: dict[str, Path]
) -> None:
    single = _rank(source, "--format", "csv")
    spread = _rank(datasets["random"], "--engine", "dask", "--workers", "2", "--format", "csv")
    assert spread.returncode == 0, spread.stderr.decode()
    assert spread.stdout == single.stdout
    refused = _rank(source, "--engine", "dask")
    assert refused.returncode == 2
    assert b"--engine dask reads a dataset folder" in refused.stderr
    assert b"Traceback" not in refused.stderr


def test_rank_group_engine_dask_writes_the_single_files_csv(
    source: Path, datasets: dict[str, Path], client: Any
) -> None:
    address = client.scheduler.address
    group = ("--group", "family,location")
    single = _rank(source, *group, "--format", "csv")
    spread = _rank(
        datasets["period"], "--engine", "dask", "--scheduler", address, *group, "--format", "csv"
    )
    assert spread.returncode == 0, spread.stderr.decode()
    assert spread.stdout == single.stdout
    # The table: the same but for the header's name (the folder, not the file).
    single = _rank(source, *group, "--by", "bias")
    spread = _rank(
        datasets["period"], "--engine", "dask", "--scheduler", address, *group, "--by", "bias"
    )
    assert spread.returncode == 0, spread.stderr.decode()
    assert spread.stdout.split(b"\n")[1:] == single.stdout.split(b"\n")[1:]
    assert spread.stdout.split(b"\n")[0].startswith(b"period: ")
    # A column the dataset does not have is refused before anything is scored.
    missing = _rank(
        datasets["period"], "--engine", "dask", "--scheduler", address, "--group", "colour"
    )
    assert missing.returncode == 2
    assert b"has no column 'colour' to group by" in missing.stderr
    assert b"Traceback" not in missing.stderr


def test_rank_on_an_existing_cluster_leaves_it_running(
    source: Path, datasets: dict[str, Path], client: Any
) -> None:
    address = client.scheduler.address
    single = _rank(source, "--format", "csv")
    spread = _rank(
        datasets["blocks"], "--engine", "dask", "--scheduler", address, "--format", "csv"
    )
    assert spread.returncode == 0, spread.stderr.decode()
    assert spread.stdout == single.stdout
    # The command closed its own connection, not the cluster.
    assert client.submit(sum, [1, 2]).result() == 3
    unreachable = _rank(datasets["blocks"], "--engine", "dask", "--scheduler", "tcp://127.0.0.1:9")
    assert unreachable.returncode == 2
    assert b"cannot reach the Dask scheduler" in unreachable.stderr


def _rank(*args: str | Path) -> subprocess.CompletedProcess[bytes]:
    return _run("rank", *args)


@pytest.mark.parametrize("cut", ["by series", "by period"])
def test_a_dataset_priced_zero_everywhere_ranks_in_units_on_dask(
    tmp_path: Path, client: Any, cut: str
) -> None:
    # The rule of portfolio.value_or_units, judged over every part as for one file: the Dask
    # engine's scorecard is the single file's, in units, and says why. Scored by hand in
    # tests/core/test_zero_prices.py (ABS_ERROR).
    from tests.core.test_zero_prices import ABS_ERROR, COLUMNS, REASON, ZERO, frame

    data = frame(ZERO)
    data["demand"] = pd.to_numeric(data["demand"])
    data["unit_cost"] = pd.to_numeric(data["unit_cost"])
    single = tmp_path / "week.parquet"
    data.to_parquet(single)
    folder = tmp_path / "lake"
    folder.mkdir()
    halves = (
        data["item"].isin(["A", "B"])
        if cut == "by series"
        else data["week"].isin(["2026-10-05", "2026-10-12"])
    )
    data[halves].to_parquet(folder / "part-0.parquet")
    data[~halves].to_parquet(folder / "part-1.parquet")
    reference = scorecard(read_portfolio(single, columns=COLUMNS), 4, 1)
    assert "abs_error_value" not in reference.columns
    scored = score_dataset(folder, client, window=4, season=1, columns=COLUMNS)
    assert scored.plan.whole_series == (cut == "by series")
    assert scored.plan.units_reason == REASON
    assert any(REASON in notice for notice in scored.plan.notices)
    assert scored.described.units_reason == REASON
    got = ranked(scored.measures, "error")
    same_scorecard(got, reference)
    assert dict(zip(got["item"], got["abs_error"], strict=True)) == ABS_ERROR


@pytest.mark.parametrize(("layout", "season"), [("blocks", 1), ("period", 4), ("random", 1)])
def test_dask_compares_every_partitioning_as_the_single_file(
    source: Path, datasets: dict[str, Path], client: Any, layout: str, season: int
) -> None:
    # compare on the Dask engine: each task sums its whole series' compared cells, the client
    # joins the sums in key order and measures them once (compare.Sums.join, compare.compared).
    from triage.core.compare import compare
    from triage.core.dask_engine import compare_dataset

    want = compare(read_portfolio(source), 13, season, by_series=True)
    got = compare_dataset(datasets[layout], client, window=13, season=season, by_series=True)
    result = got.comparison
    assert want.by_series is not None and result.by_series is not None
    assert len(want.by_series) >= 19_000 * len(want.names)
    # Per series, every sum is the single file's to the bit (each series' cells are added in
    # the same order wherever it is scored), and the series come in the same order.
    pd.testing.assert_frame_equal(result.by_series, want.by_series, check_exact=True)
    # The portfolio's totals: the per-period sums of the test are added in another order.
    pd.testing.assert_frame_equal(result.table, want.table, check_exact=False, rtol=1e-12)
    for field in ("names", "steps", "season", "series", "window_cells", "cells", "missing"):
        assert getattr(result, field) == getattr(want, field), field
    assert (result.periods, result.test_lags) == (want.periods, want.test_lags)
    np.testing.assert_array_equal(result.columns, want.columns)
    assert result.verdict == want.verdict
    assert got.described.path == datasets[layout]


def test_compare_engine_dask_writes_the_single_files_output(
    source: Path, datasets: dict[str, Path], client: Any
) -> None:
    address = client.scheduler.address
    dask = ("--engine", "dask", "--scheduler", address)
    steps = ("--steps", "naive,stat,customer,forecast")
    single = _run("compare", source, *steps, "--by-series", "--format", "csv")
    spread = _run("compare", datasets["period"], *dask, *steps, "--by-series", "--format", "csv")
    assert spread.returncode == 0, spread.stderr.decode()
    assert spread.stdout == single.stdout
    # The table: the same but for the header's name (the folder, not the file).
    single = _run("compare", source, "--season", "4")
    spread = _run("compare", datasets["random"], *dask, "--season", "4")
    assert spread.returncode == 0, spread.stderr.decode()
    assert spread.stdout.split(b"\n")[1:] == single.stdout.split(b"\n")[1:]
    assert spread.stdout.split(b"\n")[0].startswith(b"random: ")
    # An unknown step is refused before anything is compared; a file is not a dataset.
    unknown = _run("compare", datasets["blocks"], *dask, "--steps", "naive,nowcast")
    assert unknown.returncode == 2
    assert b"unknown forecast 'nowcast'" in unknown.stderr
    refused = _run("compare", source, *dask)
    assert refused.returncode == 2
    assert b"--engine dask reads a dataset folder" in refused.stderr
    for run in (unknown, refused):
        assert b"Traceback" not in run.stderr


def _run(*args: str | Path) -> subprocess.CompletedProcess[bytes]:
    return subprocess.run(
        [sys.executable, "-c", RUN, *map(str, args)],
        capture_output=True,
        timeout=600,
        check=False,
    )


@pytest.mark.parametrize("layout", LAYOUTS)
def test_dask_checks_every_partitioning_as_the_single_file(
    source: Path, datasets: dict[str, Path], client: Any, layout: str
) -> None:
    # check on the Dask engine: each task counts its whole series (quality.quality), the
    # client adds the counts up (Quality.total). Whole numbers: the single file's exactly.
    from triage.core.dask_engine import check_dataset
    from triage.core.metrics import window_columns
    from triage.core.quality import quality

    portfolio = read_portfolio(source)
    want = quality(portfolio, window_columns(portfolio.demand, portfolio.last_actual, 13))
    got = check_dataset(datasets[layout], client, window=13)
    assert got.found == want
    assert (got.described.rows, got.described.path) == (portfolio.rows, datasets[layout])
    # The same counts taken straight from the long rows with pandas, not from dense arrays.
    rows = pq.read_table(source).to_pandas()
    periods = np.sort(rows.loc[rows["demand"].notna(), "period"].unique())
    window = rows["period"].isin(periods[-13:])
    both = rows["demand"].notna() & rows["forecast"].notna()
    assert got.found.series == len(rows[["item", "location"]].drop_duplicates()) >= 19_000
    assert got.found.negative == (rows["demand"] < 0).sum()
    assert got.found.zero == (rows["demand"] == 0).sum() > 0
    assert got.found.scorable == (window & both).sum() > 0
    assert (
        got.found.no_forecast == (window & rows["demand"].notna() & rows["forecast"].isna()).sum()
    )
    forward = rows["period"] > periods[-1]
    assert got.found.forward == (forward & rows["forecast"].notna()).sum() > 0
    assert sum(got.found.patterns) == got.found.series


def test_check_engine_dask_prints_the_single_files_report(
    tmp_path: Path, source: Path, client: Any
) -> None:
    # Two forecast lags, one part each: without --lag both engines report the smallest lag and
    # say which to choose; the report is the single file's but for the first line (the name).
    rows = pq.read_table(source).to_pandas()
    rows = rows[rows["item"].isin(rows["item"].unique()[:40])]
    both = pd.concat(
        [rows.assign(lag=1), rows.assign(lag=2, forecast=rows["forecast"] * 1.1)],
        ignore_index=True,
    )
    single = tmp_path / "lags.parquet"
    pq.write_table(pa.Table.from_pandas(both, preserve_index=False), single)
    folder = tmp_path / "lags"
    folder.mkdir()
    for lag, part in both.groupby("lag"):
        pq.write_table(pa.Table.from_pandas(part, preserve_index=False), folder / f"{lag}.parquet")
    dask = ("--engine", "dask", "--scheduler", client.scheduler.address)
    said = {}
    for lag in ((), ("--lag", "2")):
        want = _run("check", single, *lag)
        got = _run("check", folder, *dask, *lag)
        assert got.returncode == want.returncode == 0, got.stderr.decode()
        assert got.stdout.split(b"\n")[1:] == want.stdout.split(b"\n")[1:]
        assert got.stdout.startswith(f"file           {folder}\n".encode())
        said[lag] = got.stdout
    assert b"no --lag given, so this report scores lag 1 (the smallest)" in said[()]
    assert b"lags           1, 2; scoring lag 2\n" in said[("--lag", "2")]
    # No window period with both an actual and a forecast: reported, then refused (exit 2).
    empty = tmp_path / "unscorable"
    empty.mkdir()
    late = rows["period"] >= np.sort(rows.loc[rows["demand"].notna(), "period"].unique())[-13]
    cut = rows.assign(forecast=rows["forecast"].where(~late))
    half = len(cut) // 2
    for n, part in enumerate((cut.iloc[:half], cut.iloc[half:])):
        pq.write_table(pa.Table.from_pandas(part, preserve_index=False), empty / f"{n}.parquet")
    refused = _run("check", empty, *dask)
    assert refused.returncode == 2
    assert b"not ok: no period of the scoring window" in refused.stdout
    assert b"nothing to score" in refused.stderr
    assert b"Traceback" not in refused.stderr


def test_a_parquet_scorecard_folder_describes_its_dataset(
    tmp_path: Path, source: Path, datasets: dict[str, Path], client: Any
) -> None:
    import os

    from triage.core.card_folder import DESCRIPTION, open_card_folder

    folder = datasets["period"]
    out = tmp_path / "card"
    made = _rank(
        folder, "--engine", "dask", "--scheduler", client.scheduler.address,
        "--format", "parquet", "--output", out, "--window", "8",
    )  # fmt: skip
    assert made.returncode == 0, made.stderr.decode()
    assert sorted(p.name for p in out.iterdir()) == [DESCRIPTION, "part-00000.parquet"]
    opened = open_card_folder(out, folder)
    plan = score_dataset(folder, client, window=8, season=1).plan
    for name in ("columns", "attributes", "rows", "notices", "whole_series", "units_reason"):
        assert getattr(opened.plan, name) == getattr(plan, name), name
    assert opened.plan.grid.calendar.periods.equals(plan.grid.calendar.periods)
    grid, want_grid = opened.plan.grid, plan.grid
    assert (grid.calendar.freq, grid.last_actual, grid.lag, grid.lags) == (
        want_grid.calendar.freq,
        want_grid.last_actual,
        want_grid.lag,
        want_grid.lags,
    )
    np.testing.assert_array_equal(opened.plan.window_cols(8), plan.window_cols(8))
    # The single file's scorecard at the same settings: its rows are the stored ones.
    want = scorecard(read_portfolio(source), window=8)
    assert opened.scored.series == opened.scored.rows == len(want)
    assert (opened.scored.window, opened.scored.by) == (8, "error")
    # The folder reads as a Parquet dataset: the description is skipped.
    got = pd.read_parquet(out)
    assert got["item"].tolist() == want["item"].tolist()
    # A part rewritten since is named, and the scorecard refused.
    part = sorted(folder.glob("*.parquet"))[3]
    stat = part.stat()
    os.utime(part, ns=(stat.st_atime_ns, stat.st_mtime_ns + 1_000_000_000))
    try:
        with pytest.raises(LoadError, match=part.name):
            open_card_folder(out, folder)
    finally:
        os.utime(part, ns=(stat.st_atime_ns, stat.st_mtime_ns))
    with pytest.raises(LoadError, match=r"no _scorecard\.json"):
        open_card_folder(datasets["blocks"], folder)
