"""``triage export`` files shaped for the planning system (issue 9 §5, docs/export.md).

The portfolio's own headers (``--columns``), the wide layout, the precision of adjusted values,
and the workbook's date cells, frozen header and filters, checked as a user runs the command.
Outside references: ``pandas.DataFrame.pivot`` for the wide layout, the ``decimal`` module
(ROUND_HALF_UP: ties away from zero) for rounding, openpyxl for reading the workbook.
"""

from __future__ import annotations

import csv
import json
from datetime import datetime
from decimal import ROUND_HALF_UP, Decimal
from pathlib import Path

import openpyxl
import pandas as pd
import pytest

from tests.cli.test_cli_ledger import run
from triage.core.adjust import apply, parse
from triage.core.ledger import Ledger
from triage.core.read import read_portfolio

WEEKS = ["2026-10-05", "2026-10-12", "2026-10-19", "2026-10-26", "2026-11-02", "2026-11-09"]
FORWARD = WEEKS[4:]
HEADERS = ["SKU Code", "plant", "week", "qty", "fc_qty"]
COLUMNS = "item=SKU Code,location=plant,period=week,demand=qty,forecast=fc_qty"
#: series -> forecast text per week, one decimal as the planning system wrote it
FORECAST = {
    ("00123", "P1"): ["12.3", "12.4", "12.5", "12.6", "16.7", "17.8"],
    ("00123", "P2"): ["8.0", "8.1", "8.2", "8.3", "9.5", "0.5"],
    ("=X", "P1"): ["5.5", "5.5", "5.5", "5.5", "5.5", "5.5"],
}
ADJUST = {("00123", "P1"): "+7%", ("00123", "P2"): "x1.1"}


@pytest.fixture
def erp(tmp_path: Path) -> Path:
    """A portfolio with its own headers, and a ledger whose lines come from ``adjust.apply``,
    as the review screens record them."""
    path = tmp_path / "erp.csv"
    with path.open("w", encoding="utf-8", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(HEADERS)
        for (item, location), values in FORECAST.items():
            for i, (week, value) in enumerate(zip(WEEKS, values, strict=True)):
                writer.writerow([item, location, week, "" if week in FORWARD else 10 + i, value])
    mapping = dict(pair.split("=") for pair in COLUMNS.split(","))
    portfolio = read_portfolio(path, columns=mapping)
    keys = list(zip(portfolio.keys["item"], portfolio.keys["location"], strict=True))
    first = portfolio.last_actual + 1
    with Ledger.open(tmp_path / "erp.ledger.sqlite") as ledger:
        for key, spec in ADJUST.items():
            s = keys.index(key)
            result = apply(
                parse(spec),
                portfolio.forecast[s, first:],
                recent_actuals=portfolio.demand[s, :first],
                window_demand=None,
                window_forecast=None,
            )
            ledger.record(
                portfolio.cycle,
                *key,
                outcome="adjusted",
                root_cause="unknown",
                note="",
                reviewer="ana",
                adjustment=str(result.adjustment),
                lines=result.lines(FORWARD),
                portfolio_name=path.name,
                portfolio_fingerprint=portfolio.fingerprint,
                expected_version=0,
            )
    return tmp_path


def export(folder: Path, target: str, *options: str) -> Path:
    done = run(
        "export", str(folder / "erp.csv"), "--columns", COLUMNS, "--to", str(folder / target),
        *options,
    )  # fmt: skip
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr
    return folder / target


def rows_of(path: Path) -> list[list[str]]:
    with path.open(encoding="utf-8", newline="") as handle:
        return list(csv.reader(handle))


def expected_text(forecast: str, spec: str, decimals: int) -> str:
    """The adjusted value as the CSV must write it: the exact decimal result of the adjustment
    rounded half away from zero, a whole number without a decimal point."""
    factor = {"+7%": Decimal("1.07"), "x1.1": Decimal("1.1")}[spec]
    value = (Decimal(forecast) * factor).quantize(Decimal(1).scaleb(-decimals), ROUND_HALF_UP)
    return str(int(value)) if value == value.to_integral_value() else str(value)


def test_export_names_columns_with_the_portfolios_headers(erp: Path) -> None:
    folder = export(erp, "up.csv").with_suffix("")
    decisions = rows_of(folder / "up-decisions.csv")
    assert decisions[0][:3] == ["SKU Code", "plant", "cycle"]
    forecast = rows_of(folder / "up-forecast.csv")
    assert forecast[0] == [
        "SKU Code",
        "plant",
        "week",
        "fc_qty",
        "adjusted_fc_qty",
        "adjusted",
        "adjusted_in_cycle",
        "outcome",
        "group_decision",
    ]
    assert {(r[0], r[1]) for r in forecast[1:]} == set(FORECAST)  # keys byte-exact
    readme = (folder / "up-README.txt").read_text(encoding="utf-8")
    assert "SKU Code: the series' item" in readme and "adjusted_fc_qty: " in readme
    doc = json.loads(export(erp, "up.json").read_text(encoding="utf-8"))
    assert list(doc["forecast"][0])[:5] == [
        "SKU Code",
        "plant",
        "week",
        "fc_qty",
        "adjusted_fc_qty",
    ]
    book = openpyxl.load_workbook(export(erp, "up.xlsx"))
    assert [c.value for c in book["Decisions"][1]][:2] == ["SKU Code", "plant"]


def test_a_header_that_repeats_another_column_keeps_triages_name(erp: Path) -> None:
    text = (erp / "erp.csv").read_text(encoding="utf-8").replace("SKU Code", "note", 1)
    (erp / "clash.csv").write_text(text, encoding="utf-8")
    done = run(
        "export",
        str(erp / "clash.csv"),
        "--columns",
        COLUMNS.replace("SKU Code", "note"),
        "--ledger",
        str(erp / "erp.ledger.sqlite"),
        "--to",
        str(erp / "c.csv"),
    )
    assert done.returncode == 0, done.stderr
    assert "header 'note' for item is also the name of another column" in done.stderr
    decisions = rows_of(erp / "c" / "c-decisions.csv")[0]
    assert decisions[:2] == ["item", "plant"] and decisions.count("note") == 1
    assert rows_of(erp / "c" / "c-forecast.csv")[0][:3] == ["item", "plant", "week"]


def test_wide_layout_is_the_long_one_pivoted(erp: Path) -> None:
    long = export(erp, "long.csv").with_suffix("") / "long-forecast.csv"
    wide = export(erp, "wide.csv", "--layout", "wide").with_suffix("") / "wide-forecast.csv"
    keys = ["SKU Code", "plant"]
    text = dict.fromkeys([*keys, "week", "outcome"], str)
    long_frame = pd.read_csv(long, dtype=text, keep_default_na=False, na_values=[""])
    wide_frame = pd.read_csv(wide, dtype=text, keep_default_na=False, na_values=[""])
    assert list(wide_frame.columns) == [
        *keys,
        "outcome",
        "adjusted_periods",
        *FORWARD,
        *[f"fc_qty {week}" for week in FORWARD],
    ]
    wide_frame = wide_frame.set_index(keys)
    for values, columns in (
        ("adjusted_fc_qty", FORWARD),
        ("fc_qty", [f"fc_qty {week}" for week in FORWARD]),
    ):
        pivoted = long_frame.pivot(index=keys, columns="week", values=values)
        got = wide_frame[columns].set_axis(FORWARD, axis=1)
        pd.testing.assert_frame_equal(
            got.sort_index(), pivoted[FORWARD].sort_index(), check_names=False
        )
    flags = long_frame.assign(flag=long_frame["adjusted"]).pivot(
        index=keys, columns="week", values="flag"
    )
    assert (wide_frame["adjusted_periods"] == flags.sum(axis=1).reindex(wide_frame.index)).all()
    outcome = long_frame.groupby(keys)["outcome"].first().fillna("")
    assert (wide_frame["outcome"].fillna("") == outcome.reindex(wide_frame.index)).all()


@pytest.mark.parametrize(
    ("options", "decimals"), [((), 1), (("--round", "units"), 0), (("--round", "2"), 2)]
)
def test_adjusted_values_carry_the_files_decimals(
    erp: Path, options: tuple[str, ...], decimals: int
) -> None:
    folder = export(erp, "up.csv", *options).with_suffix("")
    raw = (folder / "up-forecast.csv").read_text(encoding="utf-8")
    rows = {(r[0], r[1], r[2]): r for r in rows_of(folder / "up-forecast.csv")[1:]}
    for key, spec in ADJUST.items():
        for week in FORWARD:
            row = rows[(*key, week)]
            original = FORECAST[key][WEEKS.index(week)]
            want = expected_text(original, spec, decimals)
            assert row[4] == want, (key, week, row[4], want)
            assert f'"{week}",{row[3]},{want},"true"' in raw  # numbers unquoted
    # Values triage did not compute are the file's, exactly.
    assert rows[("=X", "P1", FORWARD[0])][3:5] == ["5.5", "5.5"]
    # The change is computed from the values exported: Σ adjusted − Σ original, exact.
    decisions = {(r[0], r[1]): r for r in rows_of(folder / "up-decisions.csv")[1:]}
    for key, spec in ADJUST.items():
        after = sum(
            Decimal(expected_text(FORECAST[key][WEEKS.index(w)], spec, decimals)) for w in FORWARD
        )
        before = sum(Decimal(FORECAST[key][WEEKS.index(w)]) for w in FORWARD)
        assert Decimal(decisions[key][11]) == after - before
    # JSON and xlsx hold the same numbers.
    doc = json.loads(export(erp, "up.json", *options).read_text(encoding="utf-8"))
    book = openpyxl.load_workbook(export(erp, "up.xlsx", *options))
    sheet = [[c.value for c in row] for row in book["Forecast"].iter_rows(min_row=2)]
    for record, cells in zip(doc["forecast"], sheet, strict=True):
        key = (record["SKU Code"], record["plant"])
        if key in ADJUST:
            week = record["week"]
            want = float(expected_text(FORECAST[key][WEEKS.index(week)], ADJUST[key], decimals))
            assert record["adjusted_fc_qty"] == want and cells[4] == want
            assert repr(float(record["adjusted_fc_qty"])) == repr(want)


def test_invalid_round_and_layout_exit_2(erp: Path) -> None:
    for options, needle in (
        (("--round", "9"), "--round 9: at most 6 decimals"),
        (("--round", "cents"), "is not file, units or a number"),
        (("--layout", "tall"), "invalid choice: 'tall'"),
    ):
        done = run(
            "export", str(erp / "erp.csv"), "--columns", COLUMNS, "--to", str(erp / "x.json"),
            *options,
        )  # fmt: skip
        assert done.returncode == 2 and needle in done.stderr, done.stderr
        assert "Traceback" not in done.stderr
    assert not (erp / "x.json").exists()


@pytest.mark.parametrize("layout", ["long", "wide"])
def test_workbook_has_date_cells_a_frozen_header_and_filters(erp: Path, layout: str) -> None:
    book = openpyxl.load_workbook(export(erp, f"{layout}.xlsx", "--layout", layout))
    for title in ("Decisions", "Forecast"):
        sheet = book[title]
        last = sheet.cell(1, sheet.max_column).column_letter
        assert sheet.freeze_panes == "A2", title
        assert sheet.auto_filter.ref == f"A1:{last}{sheet.max_row}", title
    forecast = book["Forecast"]
    if layout == "long":
        cells = [row[2] for row in forecast.iter_rows(min_row=2)]
    else:
        cells = [c for c in forecast[1] if isinstance(c.value, datetime)]
        assert len(cells) == len(FORWARD)
    assert cells
    for cell in cells:
        assert isinstance(cell.value, datetime) and cell.number_format == "yyyy-mm-dd"
        assert cell.value.date().isoformat() in FORWARD
