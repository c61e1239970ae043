"""Tests for triage.core.read: reading CSV, xlsx and Parquet portfolios, and every bad-input case.

Files are invented (a garden-supply wholesaler) and written in each test. Where a test pins a pandas
behaviour the loader has to work around, the comment says what was measured (pandas 3.1.1).
"""

from __future__ import annotations

import datetime as dt
import re
import zipfile
from collections.abc import Callable
from decimal import Decimal
from pathlib import Path

import numpy as np
import openpyxl
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from triage.core import schema
from triage.core.errors import LoadError, TriageError
from triage.core.read import LoadedFrame, load_frame, parse_column_map

CsvRows = Callable[..., Path]
WriteCsv = Callable[..., Path]


def load_error(path: Path, **kwargs: object) -> LoadError:
    """Load ``path`` expecting a LoadError; check it names the file and has a hint."""
    with pytest.raises(LoadError) as caught:
        load_frame(path, **kwargs)  # type: ignore[arg-type]
    error = caught.value
    assert str(path) in error.message
    assert error.hint
    return error


# --- the happy path and the canonical contract ---------------------------------------------------


def test_csv_canonical_types_and_order(csv_rows: CsvRows) -> None:
    path = csv_rows(
        "HOSE-25,2024-01-01,12,10.5,garden,north",
        "HOSE-25,2024-01-08,,11,garden,north",
        "RAKE-07,2024-01-01,-3,4,tools,south",
        header="item,period,demand,forecast,family,region",
    )
    loaded = load_frame(path)
    frame = loaded.frame
    assert isinstance(loaded, LoadedFrame)
    assert list(frame.columns) == ["item", "period", "demand", "forecast", "family", "region"]
    assert isinstance(frame.index, pd.RangeIndex) and list(frame.index) == [0, 1, 2]
    assert frame["demand"].dtype == np.float64 and frame["forecast"].dtype == np.float64
    assert frame["period"].dtype == "datetime64[ns]"
    assert frame["item"].tolist() == ["HOSE-25", "HOSE-25", "RAKE-07"]
    assert frame["period"].tolist() == [
        pd.Timestamp("2024-01-01"),
        pd.Timestamp("2024-01-08"),
        pd.Timestamp("2024-01-01"),
    ]
    assert loaded.attributes == ("family", "region")
    assert frame["family"].astype(str).tolist() == ["garden", "garden", "tools"]
    assert loaded.first_row == 2 and loaded.sheet is None and loaded.path == path
    assert loaded.rows([0, 2]) == [2, 4]
    assert loaded.rows(np.array([False, True, False])) == [3]
    assert loaded.rows(1) == [3]


def test_empty_demand_is_missing_not_zero_and_negative_is_kept(csv_rows: CsvRows) -> None:
    # docs/sources.md §8.1 (measured with pandas 3.1.1): '-' stays text by default and turns the
    # column into str; the loader's explicit tokens (schema.NUMERIC_MISSING) make it missing.
    path = csv_rows(
        "A,2024-01-01,,1",
        "A,2024-01-08,NA,1",
        "A,2024-01-15,-,1",
        "A,2024-01-22,#N/A,1",
        "A,2024-01-29,-4,1",
        "A,2024-02-05,0,1",
    )
    demand = load_frame(path).frame["demand"].to_numpy()
    assert np.isnan(demand[:4]).all()
    assert demand[4] == -4.0 and demand[5] == 0.0


def test_ids_are_text_exactly_as_written(csv_rows: CsvRows) -> None:
    # docs/sources.md §8.1 (measured with pandas 3.1.1): by default 'NA' becomes NaN and '00123'
    # becomes the integer 123; ids must survive as written.
    path = csv_rows(
        "NA,2024-01-01,1,1",
        "00123,2024-01-01,1,1",
        "1e5,2024-01-01,1,1",
        " x,2024-01-01,1,1",
        "null,2024-01-01,1,1",
        header="item,period,demand,forecast",
    )
    frame = load_frame(path).frame
    assert frame["item"].tolist() == ["NA", "00123", "1e5", " x", "null"]


def test_location_and_attributes_are_categories_of_text(csv_rows: CsvRows) -> None:
    path = csv_rows(
        "A,007,2024-01-01,1,1,",
        "B,NA,2024-01-01,1,1,big",
        header="item,location,period,demand,forecast,note",
    )
    frame = load_frame(path).frame
    assert isinstance(frame["location"].dtype, pd.CategoricalDtype)
    assert frame["location"].astype(str).tolist() == ["007", "NA"]
    # A missing attribute is the empty string, not NaN.
    assert frame["note"].astype(str).tolist() == ["", "big"]
    assert not frame["note"].isna().any()


def test_month_periods_are_first_of_month(csv_rows: CsvRows) -> None:
    # ISO 8601 calendar month "YYYY-MM" (reduced precision) is read as its first day.
    path = csv_rows("A,2024-01,1,1", "A,2024-02,1,1", "A,2024-03-01 00:00:00,1,1")
    periods = load_frame(path).frame["period"].tolist()
    assert periods == [
        pd.Timestamp("2024-01-01"),
        pd.Timestamp("2024-02-01"),
        pd.Timestamp("2024-03-01"),
    ]


def test_bom_is_removed_from_first_header(write_csv: WriteCsv) -> None:
    # docs/sources.md §8.2: Excel "CSV UTF-8" writes a BOM; decoding with utf-8-sig drops it.
    path = write_csv(b"\xef\xbb\xbfitem,period,demand,forecast\r\nA,2024-01-01,1,2\r\n")
    frame = load_frame(path).frame
    assert list(frame.columns) == ["item", "period", "demand", "forecast"]
    assert frame["demand"].tolist() == [1.0]


def test_headers_are_stripped_and_matched_ignoring_case(csv_rows: CsvRows) -> None:
    # docs/sources.md §8.1: pandas keeps 'item ' and ' qty' with their spaces.
    path = csv_rows("A,2024-01-01,1,2,x", header=" Item ,PERIOD,Demand , forecast,  Family ")
    loaded = load_frame(path)
    assert list(loaded.frame.columns) == ["item", "period", "demand", "forecast", "Family"]
    assert loaded.attributes == ("Family",)


def test_lag_and_price(csv_rows: CsvRows) -> None:
    path = csv_rows(
        "A,2024-01-01,0,5,4,2.5",
        "A,2024-01-01,1,5,4,",
        "A,2024-01-08,2.0,5,4,0",
        header="item,period,lag,demand,forecast,price",
    )
    frame = load_frame(path).frame
    assert frame["lag"].dtype == np.int64 and frame["lag"].tolist() == [0, 1, 2]
    assert frame["price"].dtype == np.float64
    assert frame["price"].tolist()[0] == 2.5 and np.isnan(frame["price"].tolist()[1])


def test_column_order_puts_known_columns_first(csv_rows: CsvRows) -> None:
    path = csv_rows(
        "x,5,4,2024-01-01,A,D1,1,2.0", header="note,demand,forecast,period,item,location,lag,price"
    )
    loaded = load_frame(path)
    assert list(loaded.frame.columns) == [
        "item",
        "location",
        "period",
        "lag",
        "demand",
        "forecast",
        "price",
        "note",
    ]


# --- column mapping ------------------------------------------------------------------------------


def test_parse_column_map() -> None:
    assert parse_column_map("demand=qty_shipped,item=sku") == {
        "demand": "qty_shipped",
        "item": "sku",
    }
    assert parse_column_map(" Demand = Qty shipped , period=Week=No") == {
        "demand": "Qty shipped",
        "period": "Week=No",
    }


@pytest.mark.parametrize(
    ("text", "fragment"),
    [
        ("demand", "not of the form canonical=header"),
        ("demand=", "not of the form canonical=header"),
        ("=qty", "not of the form canonical=header"),
        ("quantity=qty", "not a column triage knows"),
        ("demand=a,demand=b", "given twice"),
        ("demand=a,,item=b", "empty pair"),
        ("", "empty"),
    ],
)
def test_parse_column_map_rejects(text: str, fragment: str) -> None:
    with pytest.raises(TriageError, match=fragment) as caught:
        parse_column_map(text)
    assert "canonical=header" in (caught.value.hint or "")


def test_mapping_renames_columns(csv_rows: CsvRows) -> None:
    path = csv_rows("A,2024-01-01,3,4", header="sku,week,qty_shipped,fc")
    columns = parse_column_map("item=sku,period=week,demand=qty_shipped,forecast=fc")
    frame = load_frame(path, columns=columns).frame
    assert list(frame.columns) == ["item", "period", "demand", "forecast"]
    assert frame["demand"].tolist() == [3.0]


def test_mapping_wins_over_a_column_with_the_canonical_name(csv_rows: CsvRows) -> None:
    path = csv_rows("A,2024-01-01,3,4,9", header="item,period,demand,forecast,qty_new")
    loaded = load_frame(path, columns={"demand": "qty_new"})
    assert loaded.frame["demand"].tolist() == [9.0]
    assert "demand" not in loaded.attributes
    assert any("'demand' was not read" in notice for notice in loaded.notices)


def test_mapping_to_a_missing_column(csv_rows: CsvRows) -> None:
    path = csv_rows("A,2024-01-01,3,4", header="item,period,qty,forecast")
    error = load_error(path, columns={"demand": "quantity"})
    assert "--columns demand=quantity: no column named 'quantity'" in error.message
    assert "Columns found: 'item', 'period', 'qty', 'forecast'" in error.message


def test_missing_required_column(csv_rows: CsvRows) -> None:
    path = csv_rows("A,2024-01-01,3,4", header="item,period,qty_shipped,forecast")
    error = load_error(path)
    assert "required column demand not found" in error.message
    assert "'item', 'period', 'qty_shipped', 'forecast'" in error.message
    assert "--columns demand=<your column>" in (error.hint or "")


def test_duplicate_column_names(csv_rows: CsvRows) -> None:
    # docs/sources.md §8.1 (pandas 3.1.1): a duplicate 'qty' silently becomes 'qty.1'.
    path = csv_rows("A,2024-01-01,3,4,5", header="item,period,demand,forecast,demand ")
    error = load_error(path)
    assert "two columns are named 'demand' (columns 3 and 5)" in error.message


def test_two_columns_matching_one_name_ignoring_case(csv_rows: CsvRows) -> None:
    path = csv_rows("A,2024-01-01,3,4,5", header="item,period,demand,forecast,Demand")
    error = load_error(path)
    assert "all match 'demand'" in error.message


# --- numbers -------------------------------------------------------------------------------------


def test_non_numeric_demand(csv_rows: CsvRows) -> None:
    # docs/sources.md §8.1 (pandas 3.1.1): '(5)' and '"1,234"' stay text and to_numeric(coerce)
    # would make them NaN silently; the loader must stop and name the cells.
    path = csv_rows(
        "A,2024-01-01,4,1", "A,2024-01-08,(5),1", 'A,2024-01-15,"1,234",1', "A,2024-01-22,abc,1"
    )
    error = load_error(path)
    assert "column 'demand' has values that are not numbers in 3 rows (rows 3, 4, 5)" in (
        error.message
    )
    assert "'(5)' (row 3)" in error.message and "'1,234' (row 4)" in error.message
    assert "-5, not (5)" in (error.hint or "")
    assert "1,234" in (error.hint or "")


def test_non_numeric_forecast_names_the_mapped_column(csv_rows: CsvRows) -> None:
    path = csv_rows("A,2024-01-01,4,n.a.", header="item,period,demand,fc")
    error = load_error(path, columns={"forecast": "fc"})
    assert "column 'fc' (forecast) has values that are not numbers in 1 row (row 2)" in (
        error.message
    )
    assert "'n.a.' (row 2)" in error.message


@pytest.mark.parametrize(
    "value", ["inf", "-Infinity", "1e400", "99999999999999999999", "9007199254740993", "1e17"]
)
def test_non_finite_or_huge_demand(csv_rows: CsvRows, value: str) -> None:
    # docs/sources.md §8.1 (pandas 3.1.1): '1e400' parses to inf, 'inf' is accepted, a 20-digit
    # integer overflows int64. Beyond 2**53 a float64 no longer holds every whole number
    # (IEEE 754 binary64 has a 53-bit significand): 2**53 + 1 = 9007199254740993 reads as 2**53,
    # so 2**53 itself is refused.
    path = csv_rows("A,2024-01-01,1,1", f"A,2024-01-08,{value},1")
    error = load_error(path)
    assert "column 'demand' has values that are not finite or are too large" in error.message
    assert "(row 3)" in error.message


def test_decimal_commas_in_a_quoted_comma_file(csv_rows: CsvRows) -> None:
    path = csv_rows('A,2024-01-01,"1,5","2,25"')
    error = load_error(path)
    assert "'1,5' (row 2)" in error.message
    assert "decimal commas" in (error.hint or "")


def test_negative_price_and_bad_lag(csv_rows: CsvRows) -> None:
    path = csv_rows("A,2024-01-01,1,1,-2", header="item,period,demand,forecast,price")
    assert "column 'price' has negative prices in 1 row (row 2)" in load_error(path).message
    path = csv_rows("A,2024-01-01,1.5,1,1", header="item,period,lag,demand,forecast")
    assert "'lag' has values that are not whole numbers in 1 row (row 2): e.g. '1.5'" in (
        load_error(path).message
    )
    path = csv_rows("A,2024-01-01,,1,1", header="item,period,lag,demand,forecast")
    assert "column 'lag' is empty in 1 row (row 2)" in load_error(path).message
    path = csv_rows("A,2024-01-01,-1,1,1", header="item,period,lag,demand,forecast")
    assert "negative lags" in load_error(path).message


# --- dates ---------------------------------------------------------------------------------------


def test_ambiguous_dates(csv_rows: CsvRows) -> None:
    # docs/sources.md §8.1 (pandas 3.1.1): with a first value '13/02/2024' pandas switches to
    # day-first with only a warning, so the meaning of '01/02/2024' depends on row order.
    path = csv_rows("A,01/02/2024,1,1", "B,13/02/2024,1,1", "C,2024-03-01,1,1")
    error = load_error(path)
    assert "column 'period' has dates that are ambiguous or not ISO in 2 rows (rows 2, 3)" in (
        error.message
    )
    assert "'01/02/2024' (row 2)" in error.message and "'13/02/2024' (row 3)" in error.message
    assert "could be 1 February or 2 January" in error.message
    assert "YYYY-MM-DD" in (error.hint or "")


@pytest.mark.parametrize(
    ("value", "note"),
    [
        ("45292", "Excel day numbers"),
        ("2024-02-30", "not a date in the calendar"),
        ("2024-01-01 10:30", "without a time of day"),
        ("Jan 2024", ""),
        ("2024/01/01", ""),
    ],
)
def test_dates_that_are_not_iso(csv_rows: CsvRows, value: str, note: str) -> None:
    path = csv_rows("A,2024-01-01,1,1", f"A,{value},1,1")
    error = load_error(path)
    assert "ambiguous or not ISO in 1 row (row 3)" in error.message
    assert f"'{value}' (row 3)" in error.message
    assert note in error.message


def test_empty_period(csv_rows: CsvRows) -> None:
    path = csv_rows("A,2024-01-01,1,1", "A,,1,1")
    assert "column 'period' is empty in 1 row (row 3)" in load_error(path).message


def test_out_of_range_year(csv_rows: CsvRows) -> None:
    path = csv_rows("A,0224-01-01,1,1")
    assert "outside the years 1900-2199" in load_error(path).message


# --- CSV structure -------------------------------------------------------------------------------


def test_semicolon_separated_file(write_csv: WriteCsv) -> None:
    # docs/sources.md §8.1 (pandas 3.1.1): with sep=',' a ';' file reads as one column 'item;qty'.
    path = write_csv("item;period;demand;forecast\nA;2024-01-01;1,5;2\n")
    error = load_error(path)
    assert "the header is not split by ','" in error.message
    assert "semicolon-separated file with decimal commas (e.g. '1,5')" in error.message
    # Issue 9 §5: refused as before, with the exact options that read it.
    assert "Read it with --sep ';' --decimal ,." in (error.hint or "")
    assert "CSV UTF-8 (Comma delimited)" in (error.hint or "")


def test_windows_1252_file(write_csv: WriteCsv) -> None:
    # docs/sources.md §8.2: Excel "CSV (Comma delimited)" writes the ANSI code page; é is 0xE9.
    path = write_csv("item,period,demand,forecast\nCafé-Tisch,2024-01-01,1,2\n".encode("cp1252"))
    error = load_error(path)
    offset = len(b"item,period,demand,forecast\nCaf")
    assert f"byte 0xE9 at byte offset {offset} (line 2)" in error.message
    assert "Windows-1252" in error.message and "'Café-Tisch,2024-01-01,1,2'" in error.message
    assert "UTF-8" in (error.hint or "")


def test_utf16_file(write_csv: WriteCsv) -> None:
    path = write_csv("item,period,demand,forecast\n".encode("utf-16"))
    assert "UTF-16" in load_error(path).message


@pytest.mark.parametrize("content", [b"", b"\xef\xbb\xbf", b"\n\n  \n"])
def test_empty_file(write_csv: WriteCsv, content: bytes) -> None:
    # docs/sources.md §8.1 (pandas 3.1.1): pandas raises EmptyDataError "No columns to parse".
    assert "the file is empty" in load_error(write_csv(content)).message


def test_header_only(csv_rows: CsvRows) -> None:
    # docs/sources.md §8.1 (pandas 3.1.1): a header-only file gives 0 rows without an error.
    assert "has a header but no data rows" in load_error(csv_rows()).message


def test_blank_lines_only_after_header(write_csv: WriteCsv) -> None:
    path = write_csv("item,period,demand,forecast\n\n,,,\n")
    assert "has a header but no data rows" in load_error(path).message


def test_ragged_row_longer(csv_rows: CsvRows) -> None:
    # docs/sources.md §8.1 (pandas 3.1.1): ParserError "Expected 2 fields in line 3, saw 4".
    path = csv_rows("A,2024-01-01,1,2", "Hose, green,2024-01-01,1,2", "B,2024-01-01,1,2,3")
    error = load_error(path)
    assert "line 3 has 5 fields, expected 4 (one per header column)" in error.message
    assert "line 4 has 5" in error.message
    assert "double quotes" in (error.hint or "")


def test_ragged_row_shorter(csv_rows: CsvRows) -> None:
    # The C parser pads a short row with empty cells and says nothing (pandas 3.1.1, measured
    # while writing this loader), which would turn a lost forecast into a "missing" one.
    path = csv_rows("A,2024-01-01,1,2", "A,2024-01-08,1", "A,2024-01-15,1,2")
    error = load_error(path)
    assert "line 3 has 3 fields, expected 4" in error.message


def test_ragged_row_shorter_in_a_quoted_file(csv_rows: CsvRows) -> None:
    path = csv_rows('"A","2024-01-01","1","2"', '"A, big","2024-01-08","1"')
    assert "line 3 has 3 fields, expected 4" in load_error(path).message


def test_header_shorter_than_data_rows(write_csv: WriteCsv) -> None:
    # docs/sources.md §8.1 (pandas 3.1.1): the first column silently becomes the index and every
    # column shifts, unless index_col=False (which then drops the extra cells with a warning).
    path = write_csv("item,period,demand,forecast\nA,2024-01-01,1,2,3\nB,2024-01-01,1,2,3\n")
    error = load_error(path)
    assert "line 2 has 5 fields, expected 4" in error.message
    assert "column name is probably missing" in error.message


def test_unclosed_quote(csv_rows: CsvRows) -> None:
    path = csv_rows('A,2024-01-01,1,"2', "B,2024-01-01,1,2")
    assert "a quoted cell is never closed" in load_error(path).message


def test_quoted_commas_newlines_and_inch_marks_are_fine(csv_rows: CsvRows) -> None:
    # RFC 4180 §2: fields with commas, quotes or line breaks are enclosed in double quotes; a
    # quote inside an unquoted field is plain text to the pandas C parser and to Python's csv.
    path = csv_rows(
        'A,2024-01-01,1,2,"claw, hammer"',
        'B,2024-01-01,1,2,"two\nlines"',
        'C,2024-01-01,1,2,12" hose',
        'D,2024-01-01,1,2,"say ""hi"""',
        header="item,period,demand,forecast,description",
    )
    loaded = load_frame(path)
    assert loaded.frame["description"].astype(str).tolist() == [
        "claw, hammer",
        "two\nlines",
        '12" hose',
        'say "hi"',
    ]
    # The quoted line break makes record 3 span two lines: rows count records.
    assert loaded.rows([3]) == [5]


def test_blank_lines_are_skipped_and_rows_still_match_the_file(write_csv: WriteCsv) -> None:
    path = write_csv("item,period,demand,forecast\nA,2024-01-01,1,2\n\n,,,\nB,2024-01-01,x,2\n")
    error = load_error(path)
    assert "(row 5)" in error.message
    path = write_csv("item,period,demand,forecast\nA,2024-01-01,1,2\n\nB,2024-01-01,3,2\n\n")
    loaded = load_frame(path)
    assert loaded.frame["item"].tolist() == ["A", "B"]
    assert loaded.rows([0, 1]) == [2, 4]
    assert loaded.notices == ("1 empty row between data rows skipped.",)


def test_trailing_delimiter_column_is_dropped(write_csv: WriteCsv) -> None:
    # docs/sources.md §8.1 (pandas 3.1.1): a trailing delimiter gives a column 'Unnamed: 4'.
    path = write_csv("item,period,demand,forecast,\nA,2024-01-01,1,2,\n")
    loaded = load_frame(path)
    assert list(loaded.frame.columns) == ["item", "period", "demand", "forecast"]


def test_unnamed_column_with_values(write_csv: WriteCsv) -> None:
    path = write_csv("item,period,demand,forecast,\nA,2024-01-01,1,2,x\n")
    assert "column 5 has no name in the header but holds values (row 2)" in (
        load_error(path).message
    )


def test_empty_item(csv_rows: CsvRows) -> None:
    path = csv_rows("A,2024-01-01,1,2", ",2024-01-01,1,2", "  ,2024-01-08,1,2")
    error = load_error(path)
    assert "column 'item' is empty in 2 rows (rows 3, 4)" in error.message
    assert "item id" in (error.hint or "")


def test_control_characters_in_cells_are_kept_and_counted(write_csv: WriteCsv) -> None:
    # Issue 9 §5: ids and attribute cells keep their control characters, so that CSV, JSON and
    # exports join back with the file; only a terminal shows them as symbols. Headers are names
    # and are shown with the Unicode "Control Pictures" block (U+2400 + code).
    path = write_csv(
        "item,period,demand,forecast,no\x07te\n"
        "A\x1b]2;x\x07,2024-01-01,1,2,tab\there\n"
        "B\x00,2024-01-01,1,2,ok\n"
        "C,2024-01-01,1,2,del\x7f c1\u009b\n"
        "D,2024-01-01,1,2,ok\n"
    )
    loaded = load_frame(path)
    frame = loaded.frame
    assert frame["item"].tolist() == ["A\x1b]2;x\x07", "B\x00", "C", "D"]
    assert loaded.attributes == ("no\u2407te",)
    assert frame["no\u2407te"].astype(str).tolist() == ["tab\there", "ok", "del\x7f c1\x9b", "ok"]
    assert "4 cells contain control characters" in " ".join(loaded.notices)
    assert "kept exactly" in " ".join(loaded.notices)
    assert "1 column name contained control characters" in " ".join(loaded.notices)


def test_bidi_controls_in_ids_are_flagged(csv_rows: CsvRows) -> None:
    # Boucher and Anderson 2021, "Trojan Source" (CVE-2021-42574): bidi overrides reorder text.
    path = csv_rows("A\u202eB,2024-01-01,1,2")
    loaded = load_frame(path)
    assert loaded.frame["item"].tolist() == ["A\u202eB"]
    assert any("bidirectional" in notice for notice in loaded.notices)


# --- files ---------------------------------------------------------------------------------------


def test_file_not_found(tmp_path: Path) -> None:
    assert "file not found" in load_error(tmp_path / "nope.csv").message


def test_unknown_extension(tmp_path: Path) -> None:
    path = tmp_path / "portfolio.txt"
    path.write_text("item,period,demand,forecast\n")
    error = load_error(path)
    assert "unknown file type ('.txt')" in error.message
    assert ".csv, .xlsx/.xlsm and .parquet" in error.message


def test_old_xls_and_folder(tmp_path: Path) -> None:
    path = tmp_path / "old.xls"
    path.write_bytes(b"\xd0\xcf\x11\xe0")
    assert "old Excel .xls format" in load_error(path).message
    assert "folder" in load_error(tmp_path).message


def test_sheet_option_on_csv(csv_rows: CsvRows) -> None:
    path = csv_rows("A,2024-01-01,1,2")
    assert "--sheet 'Demand' was given" in load_error(path, sheet="Demand").message


# --- xlsx ----------------------------------------------------------------------------------------


def write_book(
    path: Path, sheets: dict[str, list[list[object]]], hidden: tuple[str, ...] = ()
) -> Path:
    book = openpyxl.Workbook()
    book.remove(book.active)
    for name, rows in sheets.items():
        sheet = book.create_sheet(name)
        for row in rows:
            sheet.append(row)
        if name in hidden:
            sheet.sheet_state = "hidden"
    book.save(path)
    return path


DEMAND_ROWS: list[list[object]] = [
    ["item", "period", "demand", "forecast"],
    ["NA", dt.datetime(2024, 1, 1), 5, 4.5],
    ["00123", "2024-01-08", None, 3],
]


def test_xlsx_skips_a_hidden_first_sheet(tmp_path: Path) -> None:
    # docs/sources.md §8.3 (pandas 3.1.1): read_excel() defaults to the first sheet even if hidden.
    path = write_book(
        tmp_path / "p.xlsx",
        {"Scratch": [["junk"], [1]], "Demand": DEMAND_ROWS, "Notes": [["x"]]},
        hidden=("Scratch",),
    )
    loaded = load_frame(path)
    assert loaded.sheet == "Demand" and loaded.first_row == 2
    frame = loaded.frame
    assert frame["item"].tolist() == ["NA", "00123"]
    assert frame["period"].tolist() == [pd.Timestamp("2024-01-01"), pd.Timestamp("2024-01-08")]
    assert frame["demand"].tolist()[0] == 5.0 and np.isnan(frame["demand"].tolist()[1])
    assert frame["period"].dtype == "datetime64[ns]" and frame["demand"].dtype == np.float64
    notices = " ".join(loaded.notices)
    assert "'Scratch' is hidden and was skipped" in notices and "--sheet" in notices


def test_xlsx_chosen_and_unknown_sheet(tmp_path: Path) -> None:
    path = write_book(
        tmp_path / "p.xlsx", {"Demand": DEMAND_ROWS, "Old": [["a"], [1]]}, hidden=("Old",)
    )
    assert load_frame(path, sheet="demand").sheet == "Demand"
    error = load_error(path, sheet="Forecasts")
    assert "no sheet named 'Forecasts'. Sheets: 'Demand', 'Old' (hidden)" in error.message


def test_xlsx_numeric_ids_are_reported(tmp_path: Path) -> None:
    # docs/sources.md §8.3: xlsx cells already stored as numbers cannot get their zeros back.
    rows: list[list[object]] = [
        ["item", "period", "demand", "forecast"],
        [123, "2024-01-01", 1, 1],
        [4.0, "2024-01-01", 1, 1],
    ]
    loaded = load_frame(write_book(tmp_path / "p.xlsx", {"S": rows}))
    assert loaded.frame["item"].tolist() == ["123", "4"]
    assert any("2 ids stored as numbers" in notice for notice in loaded.notices)


def test_xlsx_rows_follow_the_sheet(tmp_path: Path) -> None:
    rows: list[list[object]] = [
        [],
        ["item", "period", "demand", "forecast"],
        ["A", "2024-01-01", 1, 1],
        [None, None, None, None],
        ["B", "2024-01-01", "#DIV/0!", 1],
    ]
    error = load_error(write_book(tmp_path / "p.xlsx", {"S": rows}))
    # Header on sheet row 2, blank row 4 skipped: the bad cell is on sheet row 5.
    assert "column 'demand' has values that are not numbers in 1 row (row 5)" in error.message
    assert "#DIV/0!" in (error.hint or "")


def test_xlsx_serial_numbers_and_times_in_period(tmp_path: Path) -> None:
    rows: list[list[object]] = [["item", "period", "demand", "forecast"], ["A", 45292, 1, 1]]
    error = load_error(write_book(tmp_path / "p.xlsx", {"S": rows}))
    assert "ambiguous or not ISO in 1 row (row 2)" in error.message
    assert "Excel day numbers" in error.message
    rows = [["item", "period", "demand", "forecast"], ["A", dt.datetime(2024, 1, 1, 9, 30), 1, 1]]
    error = load_error(write_book(tmp_path / "q.xlsx", {"S": rows}))
    assert "has a time of day" in error.message


def test_xlsx_period_errors_of_both_kinds_in_one_message(tmp_path: Path) -> None:
    # A slashed text date and an Excel day number (a date cell without its format) in the same
    # column: one message names both rows, so the user fixes them in one pass (common practice).
    rows: list[list[object]] = [
        ["item", "period", "demand", "forecast"],
        ["A", "01/02/2024", 1, 1],
        ["A", 45292, 1, 1],
        ["A", dt.date(2024, 1, 15), 1, 1],
    ]
    error = load_error(write_book(tmp_path / "p.xlsx", {"S": rows}))
    assert "in 2 rows (rows 2, 3)" in error.message
    assert "'01/02/2024' (row 2)" in error.message and "'45292' (row 3)" in error.message


def test_xlsx_title_row_above_the_header_is_named_as_such(tmp_path: Path) -> None:
    # A report title in the first row above the header (common practice in planners' workbooks):
    # the message says it looks like a title, not that the data is wider than the header.
    rows: list[list[object]] = [
        ["Forecast review week 47"],
        ["item", "period", "demand", "forecast"],
        ["A", "2024-01-01", 1, 1],
    ]
    error = load_error(write_book(tmp_path / "p.xlsx", {"S": rows}))
    assert "row 1 holds 'Forecast review week 47', which looks like a title" in error.message
    assert "the header (item, period, demand, forecast) is on row 2" in error.message
    assert "--header-row 2" in (error.hint or "") and "delete the title rows" in (error.hint or "")


def test_xlsx_header_shorter_than_data(tmp_path: Path) -> None:
    rows: list[list[object]] = [
        ["item", "period", "demand", "forecast"],
        ["A", "2024-01-01", 1, 1, "extra"],
    ]
    error = load_error(write_book(tmp_path / "p.xlsx", {"S": rows}))
    assert "row 2 has a value in column E, right of the last header cell" in error.message


def test_xlsx_empty_sheet_and_header_only(tmp_path: Path) -> None:
    error = load_error(write_book(tmp_path / "p.xlsx", {"S": []}))
    assert "sheet 'S' is empty" in error.message
    error = load_error(write_book(tmp_path / "q.xlsx", {"S": [DEMAND_ROWS[0]]}))
    assert "of sheet 'S' has a header but no data rows" in error.message


def test_xlsx_formula_without_saved_result(tmp_path: Path) -> None:
    # docs/sources.md §8.3: pandas reads xlsx with data_only=True (cached values); a formula
    # written by openpyxl has no cached value and would read as a blank demand.
    rows: list[list[object]] = [
        ["item", "period", "demand", "forecast"],
        ["A", "2024-01-01", "=2+3", 1],
        ["A", "2024-01-08", 4, 1],
    ]
    error = load_error(write_book(tmp_path / "p.xlsx", {"S": rows}))
    assert "formula cells with no saved result" in error.message
    assert "column 'demand' row 2" in error.message
    assert "save it" in (error.hint or "")


def test_xlsx_formula_with_saved_zero_is_reported(tmp_path: Path) -> None:
    # docs/sources.md §8.3: xlsxwriter stores 0 as the result of formulas it cannot calculate.
    # Simulated by writing the cached <v>0</v> into the sheet XML of an openpyxl workbook.
    rows: list[list[object]] = [
        ["item", "period", "demand", "forecast"],
        ["A", "2024-01-01", "=2+3", 1],
    ]
    source = write_book(tmp_path / "src.xlsx", {"S": rows})
    target = tmp_path / "p.xlsx"
    with zipfile.ZipFile(source) as old, zipfile.ZipFile(target, "w") as new:
        for info in old.infolist():
            data = old.read(info)
            if info.filename.startswith("xl/worksheets/"):
                data = re.sub(rb"<f>2\+3</f>(<v\s*/>|<v></v>)?", b"<f>2+3</f><v>0</v>", data)
            new.writestr(info, data)
    loaded = load_frame(target)
    assert loaded.frame["demand"].tolist() == [0.0]
    assert any("saved result is 0: column 'demand' row 2" in n for n in loaded.notices)


def test_xlsx_not_a_workbook(tmp_path: Path) -> None:
    path = tmp_path / "p.xlsx"
    path.write_text("item,period\n")
    assert "cannot open this as an Excel workbook" in load_error(path).message


# --- Parquet -------------------------------------------------------------------------------------


def write_parquet(path: Path, columns: dict[str, pa.Array]) -> Path:
    pq.write_table(pa.table(columns), path)
    return path


def test_parquet_category_ids_and_types(tmp_path: Path) -> None:
    path = write_parquet(
        tmp_path / "p.parquet",
        {
            "item": pa.array(["NA", "00123", "NA"]).dictionary_encode(),
            "location": pa.array(["D1", "D1", "D2"]),
            "period": pa.array([dt.date(2024, 1, 1), dt.date(2024, 1, 8), dt.date(2024, 1, 1)]),
            "demand": pa.array([1, None, -2], pa.int64()),
            "forecast": pa.array([Decimal("1.50"), Decimal("2.00"), None], pa.decimal128(6, 2)),
            "lag": pa.array([1, 1, 2], pa.int32()),
            "family": pa.array(["garden", None, "tools"]),
        },
    )
    loaded = load_frame(path)
    frame = loaded.frame
    assert loaded.first_row == 1 and loaded.rows([0, 2]) == [1, 3]
    assert isinstance(frame["item"].dtype, pd.CategoricalDtype)
    assert frame["item"].astype(str).tolist() == ["NA", "00123", "NA"]
    assert frame["location"].astype(str).tolist() == ["D1", "D1", "D2"]
    assert frame["period"].dtype == "datetime64[ns]"
    assert frame["period"].tolist()[1] == pd.Timestamp("2024-01-08")
    assert frame["demand"].dtype == np.float64 and np.isnan(frame["demand"][1])
    assert frame["forecast"].tolist()[:2] == [1.5, 2.0]
    assert frame["lag"].dtype == np.int64 and frame["lag"].tolist() == [1, 1, 2]
    assert frame["family"].astype(str).tolist() == ["garden", "", "tools"]


def test_parquet_string_periods_and_timestamps(tmp_path: Path) -> None:
    path = write_parquet(
        tmp_path / "p.parquet",
        {
            "item": pa.array(["A", "A"]),
            "period": pa.array(["2024-01", "2024-02"]),
            "demand": pa.array([1.0, 2.0]),
            "forecast": pa.array([1.0, 2.0]),
        },
    )
    assert load_frame(path).frame["period"].tolist() == [
        pd.Timestamp("2024-01-01"),
        pd.Timestamp("2024-02-01"),
    ]
    path = write_parquet(
        tmp_path / "q.parquet",
        {
            "item": pa.array(["A", "A"]),
            "period": pa.array(
                [dt.datetime(2024, 1, 1), dt.datetime(2024, 1, 1, 6)], pa.timestamp("us")
            ),
            "demand": pa.array([1.0, 2.0]),
            "forecast": pa.array([1.0, 2.0]),
        },
    )
    error = load_error(path)
    assert "column 'period' has a time of day, not just a date in 1 row (row 2)" in error.message


def test_parquet_numeric_item_and_bad_numbers(tmp_path: Path) -> None:
    path = write_parquet(
        tmp_path / "p.parquet",
        {
            "item": pa.array([100, 200]),
            "period": pa.array(["2024-01-01", "2024-01-01"]),
            "demand": pa.array([1.0, 2.0]),
            "forecast": pa.array([1.0, float("inf")]),
        },
    )
    error = load_error(path)
    assert "column 'forecast' has values that are not finite or are too large in 1 row (row 2)" in (
        error.message
    )
    path = write_parquet(
        tmp_path / "q.parquet",
        {
            "item": pa.array([100, 200]),
            "period": pa.array(["2024-01-01", "2024-01-01"]),
            "demand": pa.array(["1", "x"]),
            "forecast": pa.array([1.0, 2.0]),
        },
    )
    assert "'x' (row 2)" in load_error(path).message
    path = write_parquet(
        tmp_path / "r.parquet",
        {
            "item": pa.array([100, 200]),
            "period": pa.array(["2024-01-01", "2024-01-01"]),
            "demand": pa.array([1.0, 2.0]),
            "forecast": pa.array([1.0, 2.0]),
        },
    )
    loaded = load_frame(path)
    assert loaded.frame["item"].astype(str).tolist() == ["100", "200"]
    assert any("ids stored as numbers" in notice for notice in loaded.notices)


def test_parquet_null_item_and_damaged_file(tmp_path: Path) -> None:
    path = write_parquet(
        tmp_path / "p.parquet",
        {
            "item": pa.array(["A", None]),
            "period": pa.array(["2024-01-01", "2024-01-01"]),
            "demand": pa.array([1.0, 2.0]),
            "forecast": pa.array([1.0, 2.0]),
        },
    )
    assert "column 'item' is empty in 1 row (row 2)" in load_error(path).message
    bad = tmp_path / "bad.parquet"
    bad.write_bytes(b"not parquet at all")
    assert "cannot read this as a Parquet file" in load_error(bad).message


def test_parquet_pandas_index_is_not_an_attribute(tmp_path: Path) -> None:
    frame = pd.DataFrame(
        {"item": ["A"], "period": ["2024-01-01"], "demand": [1.0], "forecast": [1.0]}, index=[7]
    )
    path = tmp_path / "p.parquet"
    frame.to_parquet(path)
    loaded = load_frame(path)
    assert loaded.attributes == ()


def test_parquet_missing_column_lists_columns(tmp_path: Path) -> None:
    path = write_parquet(
        tmp_path / "p.parquet",
        {
            "sku": pa.array(["A"]),
            "period": pa.array(["2024-01-01"]),
            "demand": pa.array([1.0]),
            "forecast": pa.array([1.0]),
        },
    )
    error = load_error(path)
    assert "required column item not found. Columns found: 'sku'" in error.message
    assert load_frame(path, columns={"item": "sku"}).frame["item"].astype(str).tolist() == ["A"]


def test_schema_names_are_the_frame_names(csv_rows: CsvRows) -> None:
    path = csv_rows(
        "A,L,2024-01-01,1,2,3,1", header="item,location,period,demand,forecast,price,lag"
    )
    assert set(load_frame(path).frame.columns) == set(schema.KNOWN)


@pytest.mark.parametrize("chunk", [3, 7, 64])
def test_streaming_checks_do_not_depend_on_chunk_size(
    csv_rows: CsvRows, monkeypatch: pytest.MonkeyPatch, chunk: int
) -> None:
    # The encoding check and the field counts stream the file in chunks; a multi-byte UTF-8
    # character, a quoted line break or a CRLF may straddle a chunk boundary.
    from triage.core.read import delimited

    monkeypatch.setattr(delimited, "_CHUNK", chunk)
    good = csv_rows(
        'Gießkanne,2024-01-01,1,2,"a,\r\nb"',
        "Schäler,2024-01-01,1,2,ö",
        "",
        header="item,period,demand,forecast,note",
    )
    loaded = load_frame(good)
    assert loaded.frame["item"].tolist() == ["Gießkanne", "Schäler"]
    assert loaded.frame["note"].astype(str).tolist() == ["a,\r\nb", "ö"]
    short = csv_rows(
        '"Gießkanne","2024-01-01","1","2"', '"Schäler","2024-01-08","1"', name="short.csv"
    )
    assert "line 3 has 3 fields, expected 4" in load_error(short).message
    unquoted = csv_rows("Rake,2024-01-01,1,2", "", "Hoe,2024-01-08,1", name="unquoted.csv")
    assert "line 4 has 3 fields, expected 4" in load_error(unquoted).message


def test_old_mac_line_endings(write_csv: WriteCsv) -> None:
    path = write_csv("item,period,demand,forecast\rA,2024-01-01,1,2\rB,2024-01-01,1,2\r")
    assert load_frame(path).frame["item"].tolist() == ["A", "B"]
    path = write_csv(
        "item,period,demand,forecast\rA,2024-01-01,1,2\rB,2024-01-01,1\r", name="short.csv"
    )
    assert "line 3 has 3 fields, expected 4" in load_error(path).message
