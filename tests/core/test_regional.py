"""Regional extracts: semicolons, decimal commas, day-first dates and title blocks (issue 9 §5-6).

Many planning systems export CSV with fields separated by ``;``, numbers such as ``12,5`` and
periods such as ``01.10.2025``, often below a few title lines. triage reads such files only with
explicit options (``core.dialect.FileOptions``) and never guesses: without them the file is
refused as before, and the message names the options that read it. The reference for every
file read with options is the same rows written in triage's default format (comma, point, ISO
dates) and read the default way; pandas' own writer (``DataFrame.to_csv`` with ``sep``,
``decimal`` and ``date_format``) writes the regional copies. Both read paths (the streamed Arrow
reader and the full loader) must give the same portfolio or the same error. Files are invented
(a garden-supply wholesaler).
"""

from __future__ import annotations

import dataclasses
import re
from pathlib import Path

import numpy as np
import openpyxl
import pandas as pd
import pytest

from tests.core.test_load import DEMAND_ROWS, load_error, write_book
from tests.core.test_parquet_streamed import assert_same, garden_rows
from triage.core.dialect import FileOptions, file_options
from triage.core.errors import LoadError, TriageError
from triage.core.portfolio import Portfolio, build_portfolio
from triage.core.read import FastPathDeclined, load_frame, read_portfolio, scan_csv, scan_parquet
from triage.core.read.stream import build_streamed

REGIONAL = FileOptions(sep=";", decimal=",", date_format="%d.%m.%Y")


def plain_csv(rows: pd.DataFrame, path: Path) -> Path:
    rows.to_csv(path, index=False)
    return path


def regional_csv(
    rows: pd.DataFrame, path: Path, *, title: list[str] | None = None, fmt: str = "%d.%m.%Y"
) -> Path:
    frame = rows.assign(period=pd.to_datetime(rows["period"]))
    text = frame.to_csv(index=False, sep=";", decimal=",", date_format=fmt)
    path.write_text("".join(f"{line}\n" for line in title or []) + text, encoding="utf-8")
    return path


def both_ways(path: Path, options: FileOptions | None) -> tuple[Portfolio, Portfolio]:
    streamed = build_streamed(scan_csv(path, options=options), None)
    full = build_portfolio(load_frame(path, options=options))
    return streamed, full


def same_as(reference: Portfolio, got: Portfolio) -> None:
    assert_same(dataclasses.replace(reference, path=got.path), got)


def test_a_regional_file_read_with_options_is_the_plain_file(tmp_path: Path) -> None:
    rows = garden_rows(seed=21)
    reference = read_portfolio(plain_csv(rows, tmp_path / "plain.csv"))
    path = regional_csv(rows, tmp_path / "regional.csv")
    assert ";" in path.read_text().splitlines()[1] and "," in path.read_text()
    streamed, full = both_ways(path, REGIONAL)
    same_as(reference, streamed)
    same_as(reference, full)
    same_as(reference, read_portfolio(path, options=REGIONAL))


def test_title_lines_above_the_header_are_skipped_with_header_row(tmp_path: Path) -> None:
    rows = garden_rows(seed=22, n_items=12)
    reference = read_portfolio(plain_csv(rows, tmp_path / "plain.csv"))
    title = ["Absatzplanung Woche 40;;;", "Stand: 01.10.2025", ""]
    path = regional_csv(rows, tmp_path / "titled.csv", title=title)
    options = dataclasses.replace(REGIONAL, header_row=4)
    streamed, full = both_ways(path, options)
    same_as(reference, streamed)
    same_as(reference, full)
    # Without --header-row: refused, naming the option (and the ones already given).
    error = load_error(path, options=REGIONAL)
    assert "line 1 holds 'Absatzplanung Woche 40', which looks like a title" in error.message
    assert "is on line 4" in error.message
    assert "--sep ';' --decimal , --date-format %d.%m.%Y --header-row 4" in (error.hint or "")


def test_rows_in_messages_count_the_title_lines(tmp_path: Path) -> None:
    # A bad cell on line 7 of the file is reported as row 7 by both ways (spreadsheet rows).
    path = tmp_path / "bad.csv"
    path.write_text(
        "Report\n\nitem;period;demand;forecast\n"
        "A;06.10.2025;1,5;2\nA;13.10.2025;2;2\nA;20.10.2025;3;2\nA;27.10.2025;1.500;2\n",
        encoding="utf-8",
    )
    options = dataclasses.replace(REGIONAL, header_row=3)
    with pytest.raises(FastPathDeclined):
        build_streamed(scan_csv(path, options=options), None)
    error = load_error(path, options=options)
    assert "column 'demand' has values that are not numbers in 1 row (row 7): e.g. '1.500'" in (
        error.message
    )
    # A point is never read as a thousands separator or a decimal point with --decimal ,.
    assert "1500, not 1.500" in (error.hint or "")
    with pytest.raises(LoadError) as caught:
        read_portfolio(path, options=options)
    assert str(caught.value) == str(error)
    # A line with a missing field: the line number counts the lines above the header.
    path.write_text("Report\nitem;period;demand;forecast\nA;06.10.2025;1\n", encoding="utf-8")
    error = load_error(path, options=dataclasses.replace(REGIONAL, header_row=2))
    assert "line 3 has 3 fields, expected 4" in error.message


def test_a_tab_separated_file(tmp_path: Path) -> None:
    rows = garden_rows(seed=23, n_items=6)
    reference = read_portfolio(plain_csv(rows, tmp_path / "plain.csv"))
    path = tmp_path / "tabs.csv"
    rows.to_csv(path, index=False, sep="\t")
    error = load_error(path)
    assert "tab-separated" in error.message and "--sep tab" in (error.hint or "")
    options = file_options(sep="tab")
    assert options == FileOptions(sep="\t")
    for got in both_ways(path, options):
        same_as(reference, got)


def suggested(hint: str) -> FileOptions | None:
    """The options a message tells the user to run with (parsed as the command line would)."""
    found = re.search(r"(?:Read it|Read the file) with ((?:--[a-z-]+ \S+ ?)+)", hint)
    assert found, hint
    words = found.group(1).strip().split()
    words[-1] = words[-1].removesuffix(".")  # the sentence's full stop
    given = dict(zip(words[::2], words[1::2], strict=True))
    return file_options(
        sep=given.get("--sep", "").strip("'") or None,
        decimal=given.get("--decimal"),
        date_format=given.get("--date-format"),
        header_row=int(given["--header-row"]) if "--header-row" in given else None,
    )


@pytest.mark.parametrize(
    ("title", "fmt", "expected"),
    [
        (None, "%d.%m.%Y", "--sep ';' --decimal , --date-format %d.%m.%Y"),
        (["Forecast export;;", ";;"], "%d.%m.%Y", "--date-format %d.%m.%Y --header-row 3"),
        (None, "%Y-%m-%d", "--sep ';' --decimal ,."),
        (None, "%d/%m/%Y", "--date-format %d/%m/%Y"),
    ],
    ids=["dotted", "title", "iso-dates", "slashes"],
)
def test_the_refusal_names_the_options_that_read_the_file(
    tmp_path: Path, title: list[str] | None, fmt: str, expected: str
) -> None:
    # Weeks from 2025-03-03 on: days above 12 appear, so day-first is the only reading.
    rows = garden_rows(seed=24, n_items=8)
    reference = read_portfolio(plain_csv(rows, tmp_path / "plain.csv"))
    path = regional_csv(rows, tmp_path / "export.csv", title=title, fmt=fmt)
    error = load_error(path)
    assert "semicolon-separated file with decimal commas" in error.message
    assert expected in (error.hint or "")
    options = suggested(error.hint or "")
    with pytest.raises(LoadError) as fast:
        scan_csv(path)
    assert str(fast.value) == str(error)
    # The options printed read the file: the same portfolio as the plain file.
    for got in both_ways(path, options):
        same_as(reference, got)


def test_ambiguous_day_month_dates_name_both_options(tmp_path: Path) -> None:
    # Every day is 12 or less: 03.04.2025 is 3 April or 4 March. Both options are named; the
    # file is not read either way until one is given.
    lines = ["item;period;demand;forecast"]
    lines += [f"A;{d:02d}.{m:02d}.2025;1,5;2" for m in (1, 2, 3) for d in (6,)]
    path = tmp_path / "ambiguous.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    error = load_error(path)
    assert "'06.01.2025' could be day-first or month-first" in error.message
    assert "--date-format %d.%m.%Y if the day comes first" in error.message
    assert "--date-format %m.%d.%Y if the month does" in error.message


def test_day_first_dates_in_a_comma_file_name_the_date_format(csv_rows) -> None:
    path = csv_rows("A,13.10.2025,1,2", "A,20.10.2025,1,2")
    error = load_error(path)
    assert "ambiguous or not ISO" in error.message
    assert "Read them with --date-format %d.%m.%Y." in error.message
    loaded = load_frame(path, options=FileOptions(date_format="%d.%m.%Y"))
    assert loaded.frame["period"].dt.strftime("%Y-%m-%d").tolist() == ["2025-10-13", "2025-10-20"]


def test_a_wrong_date_format_is_named(csv_rows) -> None:
    path = csv_rows("A,13.10.2025,1,2", "A,20.10.2025,1,2")
    error = load_error(path, options=FileOptions(date_format="%m.%d.%Y"))
    assert "dates that do not match --date-format %m.%d.%Y in 2 rows (rows 2, 3)" in (error.message)
    assert "Read them with --date-format %d.%m.%Y." in error.message
    # A date that does not exist is named as such, not as another format.
    path = csv_rows("A,30.02.2025,1,2", name="feb.csv")
    error = load_error(path, options=FileOptions(date_format="%d.%m.%Y"))
    assert "do not exist in the calendar" in error.message


def test_digits_of_other_scripts_remain_refused(tmp_path: Path) -> None:
    # Arabic-Indic digits (U+0660..U+0669): Python's float() and strptime read some of them,
    # docs/input-format.md does not (digits are 0-9, with or without options).
    path = tmp_path / "digits.csv"
    path.write_text(
        "item;period;demand;forecast\nA;06.10.2025;\u0663,\u0665;2\nA;13.10.2025;1;2\n",
        encoding="utf-8",
    )
    error = load_error(path, options=REGIONAL)
    assert "not numbers in 1 row (row 2)" in error.message
    assert "write digits as 0-9 ('\u0663', '\u0665' are digits of another script)" in (
        error.hint or ""
    )
    path.write_text(
        "item;period;demand;forecast\nA;\u0660\u0666.10.2025;1;2\nA;13.10.2025;1;2\n",
        encoding="utf-8",
    )
    error = load_error(path, options=REGIONAL)
    assert "do not match --date-format %d.%m.%Y in 1 row (row 2)" in error.message
    assert (
        "Dates are written with the digits 0-9 ('\u0660', '\u0666' are digits of another "
        "script)." in error.message
    )
    assert "could be" not in error.message
    with pytest.raises(FastPathDeclined):
        build_streamed(scan_csv(path, options=REGIONAL), None)


@pytest.mark.parametrize(
    ("given", "needle"),
    [
        ({"sep": ":"}, "--sep ':' is not a separator"),
        ({"decimal": "'"}, '--decimal "\'" is not a decimal mark'),
        ({"sep": ",", "decimal": ","}, "--sep and --decimal are both ','"),
        ({"date_format": "%d.%m"}, "must name the year and the month"),
        ({"date_format": "%d %B %Y"}, "'%B' is not a directive"),
        ({"date_format": "%d%m%Y"}, "nothing between them"),
        ({"date_format": "%Y-%m-%d %H:%M"}, "'%H' is not a directive"),
        ({"header_row": 0}, "--header-row counts rows from 1"),
    ],
)
def test_options_are_checked_before_any_file_is_read(given: dict, needle: str) -> None:
    with pytest.raises(TriageError) as caught:
        file_options(**given)
    assert needle in str(caught.value) and caught.value.hint


def test_options_that_do_not_apply_to_the_file_type_are_refused(tmp_path: Path) -> None:
    book = write_book(tmp_path / "p.xlsx", {"S": DEMAND_ROWS})
    assert (
        "--sep was given, but this is a xlsx file"
        in load_error(book, options=FileOptions(sep=";")).message
    )
    # A decimal comma in a comma-separated file: refused for CSV (1,5 would be two fields).
    csv_path = tmp_path / "p.csv"
    csv_path.write_text("item,period,demand,forecast\nA,2025-10-06,1,2\n", encoding="utf-8")
    error = load_error(csv_path, options=file_options(decimal=","))
    assert "separated by ',' too" in error.message and "--sep ';'" in (error.hint or "")
    with pytest.raises(LoadError) as fast:
        scan_csv(csv_path, options=file_options(decimal=","))
    assert str(fast.value) == str(error)
    # --header-row past the end of the file.
    error = load_error(csv_path, options=FileOptions(header_row=9))
    assert "--header-row 9 was given, but the file has only 2 lines" in error.message
    parquet = tmp_path / "p.parquet"
    garden_rows(seed=25, n_items=2).to_parquet(parquet)
    error = load_error(parquet, options=FileOptions(header_row=2))
    assert "a Parquet file has no header row" in error.message
    with pytest.raises(LoadError) as fast:
        scan_parquet(parquet, options=FileOptions(header_row=2))
    assert str(fast.value) == str(error)


def test_decimal_comma_and_date_format_in_text_cells_of_a_workbook(tmp_path: Path) -> None:
    # Numbers stored as text ("12,5") and periods as text in a sheet read with the options;
    # date cells stay dates.
    rows: list[list[object]] = [
        ["item", "period", "demand", "forecast"],
        ["A", "06.10.2025", "12,5", 11],
        ["A", "13.10.2025", 3, "2,25"],
    ]
    path = write_book(tmp_path / "p.xlsx", {"S": rows})
    frame = load_frame(path, options=FileOptions(decimal=",", date_format="%d.%m.%Y")).frame
    assert frame["demand"].tolist() == [12.5, 3.0] and frame["forecast"].tolist() == [11.0, 2.25]
    assert frame["period"].dt.strftime("%Y-%m-%d").tolist() == ["2025-10-06", "2025-10-13"]


def test_monthly_periods_without_a_day(tmp_path: Path) -> None:
    path = tmp_path / "months.csv"
    path.write_text(
        "item;period;demand;forecast\n"
        + "".join(f"A;{m:02d}.2025;{m},5;{m}\n" for m in range(1, 8)),
        encoding="utf-8",
    )
    options = FileOptions(sep=";", decimal=",", date_format="%m.%Y")
    streamed, full = both_ways(path, options)
    assert_same(streamed, full)
    assert full.calendar.freq == "monthly" and full.calendar.label(0) == "2025-01"
    np.testing.assert_array_equal(full.demand[0, :3], [1.5, 2.5, 3.5])


def test_the_export_hook_writes_what_the_loader_reads_back(tmp_path: Path) -> None:
    # FileOptions.format_number / format_period are what an export in the file's own format
    # will use: written with them, every value reads back exactly (shortest round-trip floats).
    rng = np.random.default_rng(7)
    values = np.concatenate([rng.normal(0, 1, 50) * 10.0 ** rng.integers(-6, 9, 50), [0.1, 2.0]])
    days = pd.date_range("2025-01-06", periods=len(values), freq="7D")
    path = tmp_path / "written.csv"
    lines = ["item;period;demand;forecast"]
    for day, value in zip(days, values, strict=True):
        lines.append(f"A;{REGIONAL.format_period(day.date())};{REGIONAL.format_number(value)};1")
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    for got in both_ways(path, REGIONAL):
        np.testing.assert_array_equal(got.demand[0], values)
        assert got.calendar.periods.equals(pd.DatetimeIndex(days))


def test_header_row_in_a_workbook(tmp_path: Path) -> None:
    rows: list[list[object]] = [["Forecast review"], ["Week 40"], [], *DEMAND_ROWS]
    path = write_book(tmp_path / "titled.xlsx", {"S": rows})
    plain = load_frame(write_book(tmp_path / "plain.xlsx", {"S": DEMAND_ROWS}))
    loaded = load_frame(path, options=FileOptions(header_row=4))
    pd.testing.assert_frame_equal(loaded.frame, plain.frame)
    assert loaded.first_row == 5 and loaded.rows([0, 1]) == [5, 6]
    error = load_error(path, options=FileOptions(header_row=3))
    assert "sheet 'S' row 3 is empty, but --header-row 3" in error.message
    error = load_error(path, options=FileOptions(header_row=40))
    assert "sheet 'S' has no row 40" in error.message


@pytest.mark.parametrize("merged", [False, True], ids=["cells", "merged"])
def test_a_title_block_of_several_cells_is_named_with_the_header_row(
    tmp_path: Path, merged: bool
) -> None:
    # Issue 9 §6: title in A1 (merged across the table or not), a date in D1, a subtitle in A2,
    # a blank row, then the header in row 4: the same clear message as a one-cell title.
    book = openpyxl.Workbook()
    sheet = book.active
    sheet.title = "Plan"
    sheet["A1"] = "Forecast review, garden tools"
    sheet["D1"] = "as of 2025-10-01"
    sheet["A2"] = "Region north"
    for index, row in enumerate(DEMAND_ROWS, start=4):
        for column, value in enumerate(row, start=1):
            sheet.cell(index, column, value)
    if merged:
        sheet.merge_cells("A1:C1")
        sheet.merge_cells("A2:D2")
    path = tmp_path / "titled.xlsx"
    book.save(path)
    error = load_error(path)
    assert (
        "sheet 'Plan' row 1 holds 'Forecast review, garden tools', 'as of 2025-10-01', which "
        "looks like a title, not the header: the header (item, period, demand, forecast) is "
        "on row 4." in error.message
    )
    assert "Read the file with --header-row 4" in (error.hint or "")
    plain = load_frame(write_book(tmp_path / "plain.xlsx", {"S": DEMAND_ROWS}))
    loaded = load_frame(path, options=FileOptions(header_row=4))
    pd.testing.assert_frame_equal(loaded.frame, plain.frame)


HEADER = "item;period;demand;forecast\n"


@pytest.mark.parametrize(
    ("text", "why"),
    [
        (HEADER + "A;06.10.2025;1,5;2\nA;13.10.2025;+2,5;,5\nA;20.10.2025;5,;1e1\n", "forms"),
        (HEADER + "A;06.10.2025;NA;2\nA;13.10.2025;;-\nA;20.10.2025;3;n/a\n", "missing words"),
        (HEADER + '"A;1";06.10.2025;1;2\n"A;1";13.10.2025;1;2\n', "quoted separator"),
        (HEADER + "A;6.10.2025;1;2\nA;13.10.2025;1;2\n", "one-digit day"),
        (HEADER + "A; 06.10.2025 ;1;2\nA;13.10.2025;1;2\n", "spaces around a date"),
        (HEADER + "A;06.10.2025;1.500;2\nA;13.10.2025;1;2\n", "point with decimal comma"),
        (HEADER + "A;2025-10-06;1;2\nA;13.10.2025;1;2\n", "ISO date with a format"),
        (HEADER + "A;31.02.2025;1;2\nA;13.10.2025;1;2\n", "no such day"),
        (HEADER + "A;;1;2\nA;13.10.2025;1;2\n", "empty period"),
        (HEADER + "A;06.10.2025;1;2\n\nA;13.10.2025;1;2\n", "blank line"),
        (HEADER + "A;06.10.1825;1;2\nA;13.10.2025;1;2\n", "year out of range"),
        (HEADER + "A;06.10.2025;1,5;2;9\nA;13.10.2025;1;2\n", "long line"),
        (HEADER + "A;06.10.2025;1;2\nA;06.10.2025;1;2\n", "duplicate"),
    ],
)
def test_both_ways_give_the_same_answer_with_options(tmp_path: Path, text: str, why: str) -> None:
    path = tmp_path / "odd.csv"
    path.write_text(text, encoding="utf-8")
    try:
        expected: Portfolio | str = build_portfolio(load_frame(path, options=REGIONAL))
    except LoadError as exc:
        expected = str(exc)
    try:
        got: Portfolio | str = read_portfolio(path, options=REGIONAL)
    except LoadError as exc:
        got = str(exc)
    if isinstance(expected, str):
        assert got == expected, why
        with pytest.raises((FastPathDeclined, LoadError)):
            build_streamed(scan_csv(path, options=REGIONAL), None)
    else:
        assert isinstance(got, Portfolio), why
        assert_same(got, expected)


def test_a_title_above_a_mapped_header(tmp_path: Path) -> None:
    # With --columns the header is found by the file's own names, and named so.
    path = tmp_path / "mapped.csv"
    path.write_text(
        "Weekly extract\nsku,week,qty,fc\nA,2025-10-06,1,2\nA,2025-10-13,1,2\n", encoding="utf-8"
    )
    columns = {"item": "sku", "period": "week", "demand": "qty", "forecast": "fc"}
    error = load_error(path, columns=columns)
    assert "the header (sku, week, qty, fc) is on line 2" in error.message
    assert "--header-row 2" in (error.hint or "")
    loaded = load_frame(path, columns=columns, options=FileOptions(header_row=2))
    assert loaded.frame["demand"].tolist() == [1.0, 1.0] and loaded.first_row == 3
