"""Competing forecasts in a portfolio file: ``forecast_<name>`` columns (issue 12, input part).

A file may carry, besides ``forecast``, any number of other forecasts of the same periods, one
column each, named ``forecast_<name>`` (``<name>``: lower-case letters, digits, ``_``). The reader
checks their cells as it checks ``forecast`` and fills ``Portfolio.competing`` (``<name>`` ->
series x periods, NaN where missing, at the lag ``forecast`` is read at), the full way and the
streamed way alike. A header written like one but not valid is refused, naming the column and
what to do. The reference for where each value lands is pandas' own ``DataFrame.pivot`` of the
rows; the files are invented (a garden-supply wholesaler).
"""

from __future__ import annotations

import datetime as dt
import io
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from tests.cli.test_cli import run
from tests.core.test_parquet_streamed import assert_same, garden_rows, pivot_reference, to_parquet
from triage.core.errors import LoadError, TriageError
from triage.core.portfolio import Portfolio, build_portfolio
from triage.core.ranking import scorecard
from triage.core.read import (
    FastPathDeclined,
    load_frame,
    parse_column_map,
    read_portfolio,
    scan_csv,
    scan_parquet,
)
from triage.core.read.stream import build_streamed

MONDAY = dt.date(2025, 3, 3)
#: The scorecard columns of the last process step, which competing forecasts change by design.
STEP_COLUMNS = ["fva_rank", "fva_loss", "fva_loss_value"]


def rival_rows(seed: int = 5) -> pd.DataFrame:
    """Garden rows with two competing forecasts (gaps in both) placed among the other columns."""
    rows = garden_rows(seed)
    rng = np.random.default_rng(seed + 100)
    stat = np.round(rng.normal(8, 3, len(rows)), 1)
    stat[rng.random(len(rows)) < 0.08] = np.nan
    customer = np.round(rng.normal(6, 2, len(rows)), 2)
    customer[rng.random(len(rows)) < 0.2] = np.nan
    rows.insert(3, "forecast_stat", stat)
    rows["forecast_customer_2"] = customer
    return rows


def write_csv(rows: pd.DataFrame, path: Path) -> Path:
    rows.to_csv(path, index=False)
    return path


def full(path: Path, lag: int | None = None, **kwargs: object) -> Portfolio:
    return build_portfolio(load_frame(path, **kwargs), lag=lag)  # type: ignore[arg-type]


def streamed(path: Path, lag: int | None = None) -> Portfolio:
    scan = scan_parquet if path.suffix == ".parquet" else scan_csv
    return build_streamed(scan(path), lag)


def assert_competing(a: Portfolio, b: Portfolio) -> None:
    assert list(a.competing) == list(b.competing)
    for name in a.competing:
        assert a.competing[name].dtype == b.competing[name].dtype == np.float64
        np.testing.assert_array_equal(a.competing[name], b.competing[name])


# --- accepted ------------------------------------------------------------------------------------


@pytest.mark.parametrize("kind", ["csv", "parquet"])
def test_competing_columns_fill_their_cells_the_same_both_ways(tmp_path: Path, kind: str) -> None:
    rows = rival_rows()
    path = (
        write_csv(rows, tmp_path / "garden.csv")
        if kind == "csv"
        else to_parquet(rows, tmp_path / "garden.parquet", dictionary=True)
    )
    fast, slow = streamed(path), full(path)
    assert_same(fast, slow)
    assert_competing(fast, slow)
    assert_competing(read_portfolio(path), slow)
    # File order, the prefix dropped; never attributes.
    assert list(slow.competing) == ["stat", "customer_2"]
    assert slow.attributes == ("family", "buyer")
    # Reference: pandas.DataFrame.pivot puts each row's value in its (series, period) cell;
    # missing stays NaN, never zero.
    for name, column in (("stat", "forecast_stat"), ("customer_2", "forecast_customer_2")):
        np.testing.assert_array_equal(slow.competing[name], pivot_reference(rows, slow, column))
    assert np.isnan(slow.competing["customer_2"]).any()


def test_competing_columns_change_nothing_else(tmp_path: Path) -> None:
    rows = rival_rows(seed=6)
    plain = rows.drop(columns=["forecast_stat", "forecast_customer_2"])
    with_rivals = read_portfolio(write_csv(rows, tmp_path / "rivals.csv"))
    without = read_portfolio(write_csv(plain, tmp_path / "plain.csv"))
    assert without.competing == {}
    for name in ("demand", "forecast"):
        np.testing.assert_array_equal(getattr(with_rivals, name), getattr(without, name))
    pd.testing.assert_frame_equal(with_rivals.keys, without.keys)
    # The last process step's loss depends on them by design (its previous step is the last
    # forecast_<name> column, naive without one: docs/metrics.md "The last process step");
    # every other column is the same.
    a, b = scorecard(with_rivals), scorecard(without)
    pd.testing.assert_frame_equal(a.drop(columns=STEP_COLUMNS), b.drop(columns=STEP_COLUMNS))
    assert not a["fva_loss"].equals(b["fva_loss"])


def test_cli_rank_output_is_the_same_with_competing_columns(tmp_path: Path) -> None:
    rows = rival_rows(seed=4)
    rivals = write_csv(rows, tmp_path / "rivals.csv")
    plain = write_csv(
        rows.drop(columns=["forecast_stat", "forecast_customer_2"]), tmp_path / "p.csv"
    )
    a, b = run("rank", str(rivals), "--format", "csv"), run("rank", str(plain), "--format", "csv")
    assert a.returncode == b.returncode == 0, a.stderr

    def text_of(csv_text: str) -> pd.DataFrame:
        frame = pd.read_csv(io.StringIO(csv_text), dtype=str, keep_default_na=False)
        return frame.drop(columns=STEP_COLUMNS)

    # Every column but the last step's loss (see above) is the same text.
    pd.testing.assert_frame_equal(text_of(a.stdout), text_of(b.stdout))


def test_mapping_names_a_competing_forecast(tmp_path: Path) -> None:
    rows = rival_rows(seed=7).rename(columns={"forecast_stat": "engine_fc"})
    path = write_csv(rows, tmp_path / "mapped.csv")
    assert parse_column_map("forecast_stat=engine_fc") == {"forecast_stat": "engine_fc"}
    mapped = read_portfolio(path, columns={"forecast_stat": "engine_fc"})
    assert list(mapped.competing) == ["stat", "customer_2"]
    assert "engine_fc" not in mapped.attributes
    reference = rows.rename(columns={"engine_fc": "forecast_stat"})
    np.testing.assert_array_equal(
        mapped.competing["stat"], pivot_reference(reference, mapped, "forecast_stat")
    )
    # Unmapped, the same column is an ordinary attribute, as before.
    assert "engine_fc" in read_portfolio(path).attributes


def test_mapping_wins_over_a_column_of_the_competing_name(tmp_path: Path) -> None:
    rows = rival_rows(seed=8)
    rows["engine_fc"] = rows["forecast_stat"] * 2
    path = write_csv(rows, tmp_path / "both.csv")
    p = read_portfolio(path, columns={"forecast_stat": "engine_fc"})
    np.testing.assert_array_equal(p.competing["stat"], pivot_reference(rows, p, "engine_fc"))
    assert any("'forecast_stat' was not read" in n for n in p.notices)


def test_lags_apply_to_competing_forecasts_as_to_forecast(tmp_path: Path) -> None:
    # Lags 1 and 2 of every history week; forward weeks at lags 0 and 1 (the smaller is taken).
    records = []
    for t in range(6):
        forward = t >= 4
        for lag in (0, 1) if forward else (1, 2):
            records.append(
                {
                    "item": "rake",
                    "period": MONDAY + dt.timedelta(weeks=t),
                    "lag": lag,
                    "demand": None if forward else 10.0 + t,
                    "forecast": 100.0 * lag + t,
                    # Missing at lag 2 of week 1 and at lag 0 of week 5: stays missing.
                    "forecast_stat": None if (t, lag) in {(1, 2), (5, 0)} else 1000.0 * lag + t,
                }
            )
    rows = pd.DataFrame(records).sample(frac=1.0, random_state=1)
    path = write_csv(rows, tmp_path / "lags.csv")
    for lag in (1, 2):
        p = read_portfolio(path, lag=lag)
        history = [1000.0 * lag + t for t in range(4)]
        if lag == 2:
            history[1] = np.nan
        np.testing.assert_array_equal(p.competing["stat"][0], [*history, 4.0, np.nan])
        # The same rows as forecast: at the chosen lag, and the smallest lag forward.
        np.testing.assert_array_equal(p.forecast[0], [100.0 * lag + t for t in range(4)] + [4, 5])
    assert_competing(read_portfolio(path, lag=1), full(path, lag=1))


def test_one_lag_file_takes_the_streamed_way_with_competing_columns(tmp_path: Path) -> None:
    rows = rival_rows(seed=9).assign(lag=1)
    path = to_parquet(rows, tmp_path / "lag1.parquet", dictionary=False)
    assert_competing(streamed(path), full(path))
    assert streamed(path).lag == 1


# --- checked as forecast is checked --------------------------------------------------------------

HEADER = "item,period,demand,forecast,forecast_stat\n"


def refused(tmp_path: Path, text: str, **kwargs: object) -> str:
    path = tmp_path / "bad.csv"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(LoadError) as caught:
        full(path, **kwargs)
    with pytest.raises(LoadError) as fast:
        read_portfolio(path, **kwargs)  # type: ignore[arg-type]
    assert str(fast.value) == str(caught.value)
    return str(caught.value)


@pytest.mark.parametrize(
    ("cell", "expected"),
    [
        (
            "(5)",
            "column 'forecast_stat' has values that are not numbers in 1 row (row 3): e.g. '(5)'",
        ),
        ("1,234", "column 'forecast_stat' has values that are not numbers in 1 row (row 3)"),
        ("inf", "column 'forecast_stat' has values that are not finite or are too large in 1 row"),
        ("٣", "column 'forecast_stat' has values that are not numbers in 1 row (row 3): e.g. '٣'"),
    ],
)
def test_bad_cells_are_refused_as_in_forecast(tmp_path: Path, cell: str, expected: str) -> None:
    body = f'A,2026-10-05,1,2,3\nA,2026-10-12,1,2,"{cell}"\n'
    message = refused(tmp_path, HEADER + body)
    assert expected in message


def test_forecast_and_competing_cells_share_their_message(tmp_path: Path) -> None:
    body = "A,2026-10-05,1,2,3\nA,2026-10-12,1,{f},{s}\n"
    competing = refused(tmp_path, HEADER + body.format(f="2", s="(5)"))
    forecast = refused(tmp_path, HEADER + body.format(f="(5)", s="2"))
    assert competing.replace("'forecast_stat'", "'forecast'") == forecast


def test_mapped_column_is_named_with_its_role(tmp_path: Path) -> None:
    text = "item,period,demand,forecast,engine\nA,2026-10-05,1,2,x1\nA,2026-10-12,1,2,3\n"
    message = refused(tmp_path, text, columns={"forecast_stat": "engine"})
    assert "column 'engine' (forecast_stat) has values that are not numbers" in message
    assert "row 2" in message


def test_empty_and_missing_tokens_are_missing(tmp_path: Path) -> None:
    path = tmp_path / "gaps.csv"
    path.write_text(
        HEADER + "A,2026-10-05,1,2,\nA,2026-10-12,1,2,NA\nA,2026-10-19,1,2,0\n", encoding="utf-8"
    )
    p = read_portfolio(path)
    np.testing.assert_array_equal(p.competing["stat"][0], [np.nan, np.nan, 0.0])


# --- refused headers -----------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("header", "suggested"),
    [
        ("forecast_Stat", "forecast_stat"),
        ("Forecast_stat", "forecast_stat"),
        ("forecast_", "forecast_stat"),
        ("forecast-x", "forecast_x"),
        ("forecast customer", "forecast_customer"),
        ("forecast_é", "forecast_stat"),
    ],
)
def test_headers_written_like_a_competing_forecast_must_be_valid(
    tmp_path: Path, header: str, suggested: str
) -> None:
    text = f"item,period,demand,forecast,{header}\nA,2026-10-05,1,2,3\n"
    message = refused(tmp_path, text)
    assert f"column '{header}' is named like a competing forecast" in message
    assert "lower-case letters, digits and '_'" in message
    assert f"Rename the column to '{suggested}'" in message
    assert f"--columns {suggested}={header}" in message


def test_refused_header_is_read_once_mapped(tmp_path: Path) -> None:
    path = tmp_path / "mixed.csv"
    path.write_text("item,period,demand,forecast,forecast_Stat\nA,2026-10-05,1,2,3\n")
    p = read_portfolio(path, columns={"forecast_stat": "forecast_Stat"})
    assert p.competing["stat"][0, 0] == 3.0


def test_a_competing_name_given_twice_is_refused(tmp_path: Path) -> None:
    message = refused(tmp_path, HEADER.rstrip("\n") + ",forecast_stat\nA,2026-10-05,1,2,3,4\n")
    assert "two columns are named 'forecast_stat' (columns 5 and 6)" in message
    with pytest.raises(TriageError, match="'forecast_stat' is given twice"):
        parse_column_map("forecast_stat=a,forecast_stat=b")


@pytest.mark.parametrize("name", ["forecast-x", "forecast_", "forecastx"])
def test_mapping_refuses_names_that_are_not_competing_forecasts(name: str) -> None:
    with pytest.raises(TriageError, match="is not a column triage knows") as caught:
        parse_column_map(f"{name}=engine")
    assert "forecast_<name>" in (caught.value.hint or "")


def test_other_attributes_are_unchanged(tmp_path: Path) -> None:
    path = tmp_path / "attrs.csv"
    path.write_text(
        "item,period,demand,forecast,forecaster,forecast2,family\nA,2026-10-05,1,2,Ines,x,seeds\n"
    )
    p = read_portfolio(path)
    assert p.attributes == ("forecaster", "forecast2", "family")
    assert p.competing == {}


def test_cli_refuses_a_bad_competing_header_with_exit_2(tmp_path: Path) -> None:
    path = tmp_path / "bad.csv"
    path.write_text("item,period,demand,forecast,forecast-x\nA,2026-10-05,1,2,3\n")
    for command in ("rank", "check"):
        result = run(command, str(path))
        assert result.returncode == 2, result.stderr
        assert "column 'forecast-x' is named like a competing forecast" in result.stderr
        assert "Traceback" not in result.stderr


def test_streamed_way_does_not_decline_for_competing_columns(tmp_path: Path) -> None:
    rows = rival_rows(seed=11)
    for path in (
        write_csv(rows, tmp_path / "g.csv"),
        to_parquet(rows, tmp_path / "g.parquet", dictionary=True),
    ):
        try:
            streamed(path)
        except FastPathDeclined as exc:  # pragma: no cover - the failure this test looks for
            pytest.fail(f"{path.name}: streamed way declined ({exc})")


def test_xlsx_competing_columns_are_read_and_checked(tmp_path: Path) -> None:
    from openpyxl import Workbook

    book = Workbook()
    sheet = book.active
    sheet.append(["item", "period", "demand", "forecast", "forecast_stat", "family"])
    sheet.append(["A", dt.datetime(2026, 10, 5), 4, 5, 6.5, "seeds"])
    sheet.append(["A", dt.datetime(2026, 10, 12), 3, 5, None, "seeds"])
    sheet.append(["A", dt.datetime(2026, 10, 19), None, 5, 7, "seeds"])
    good = tmp_path / "good.xlsx"
    book.save(good)
    p = read_portfolio(good)
    np.testing.assert_array_equal(p.competing["stat"][0], [6.5, np.nan, 7.0])
    assert p.attributes == ("family",)
    sheet["E3"] = "(5)"
    bad = tmp_path / "bad.xlsx"
    book.save(bad)
    with pytest.raises(LoadError, match=r"column 'forecast_stat' has values that are not numbers"):
        read_portfolio(bad)


def test_the_sample_reads_its_two_competing_forecasts_both_ways(tmp_path: Path) -> None:
    from sample.generate import write_parquet

    sample = Path(__file__).resolve().parents[2] / "sample" / "portfolio.csv"
    assert list(read_portfolio(sample).competing) == ["stat", "customer"]
    assert_competing(streamed(sample), full(sample))
    path = tmp_path / "g.parquet"
    write_parquet(path, n_items=30, n_locations=3, n_weeks=20, n_forward=4, competing=True)
    fast, slow = streamed(path), full(path)
    assert list(fast.competing) == ["stat", "customer"]
    assert_same(fast, slow)
