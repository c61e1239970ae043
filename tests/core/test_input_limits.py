"""Issue 10 §3: hostile or huge inputs are refused early, with bounded memory; §4: damaged
workbooks get a message, never a traceback.

The limits are Excel's own (Microsoft, "Excel specifications and limits": 1,048,576 rows by
16,384 columns) plus a cell count (docs/input-format.md, Limits). A workbook of a few megabytes
can inflate to gigabytes of empty rows, and the xlsx reader keeps an object per row it has
parsed: the rows are counted from the sheet's bytes before the reader starts, and again as they
stream in (row numbers can skip ahead without any bytes). Parquet files can hold a billion
identical rows in a few megabytes: their row count is checked against the memory the process
may use before a cell is read (and CSV files the same way).
"""

from __future__ import annotations

import os
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

from tests.cli.test_cli import ROOT
from tests.core.hostile_xlsx import empty_rows, row_xml, write_workbook
from tests.core.test_load import load_error
from triage.core.read import XLSX_MAX_COLUMNS, XLSX_MAX_ROWS, load_frame, memory, workbook

_PEAK = (
    "import resource, sys\n"
    "from triage.cli import main\n"
    "code = main(sys.argv[1:])\n"
    "sys.stderr.write(f'\\nPEAK_KB {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss}\\n')\n"
    "sys.exit(code)\n"
)


def run_measured(*args: str) -> tuple[subprocess.CompletedProcess[str], int]:
    """``triage ARGS`` in a fresh interpreter; its result and its peak resident memory in KB."""
    done = subprocess.run(
        [sys.executable, "-c", _PEAK, *args],
        capture_output=True,
        text=True,
        cwd=ROOT,
        env={**os.environ, "COLUMNS": "160"},
        timeout=600,
    )
    peak = next(int(s.split()[-1]) for s in done.stderr.splitlines() if s.startswith("PEAK_KB"))
    return done, peak


def test_millions_of_empty_rows_are_refused_early_with_little_memory(tmp_path: Path) -> None:
    # 2.1M empty rows: 13 MB of XML in a file of about 13 kB. Before the fix the reader kept an
    # object per row and read to the end (the 1.5 GB case reached 7.6 GB); now the byte
    # scan stops in the first megabytes. Peak memory is compared with reading the same data
    # without the empty rows, in the same run.
    bomb = write_workbook(tmp_path / "bomb.xlsx", empty_rows(2 * XLSX_MAX_ROWS))
    plain = write_workbook(tmp_path / "plain.xlsx")
    assert bomb.stat().st_size < 100_000
    refused, bomb_peak = run_measured("rank", str(bomb))
    read, plain_peak = run_measured("rank", str(plain))
    assert read.returncode == 0, read.stderr
    assert refused.returncode == 2, refused.stderr
    assert "Traceback" not in refused.stderr
    assert f"sheet 'data' has more than {XLSX_MAX_ROWS:,} rows" in refused.stderr
    assert "CSV UTF-8 or Parquet" in refused.stderr
    assert bomb_peak < 1.5 * plain_peak, (bomb_peak, plain_peak)


def test_row_numbers_that_skip_ahead_are_counted_as_they_stream(tmp_path: Path) -> None:
    # One row element numbered past the limit: few bytes, but the reader yields every empty
    # row before it. The streamed count refuses it.
    far = row_xml(XLSX_MAX_ROWS + 5, ["C", "2026-10-05", 1, 1])
    error = load_error(write_workbook(tmp_path / "far.xlsx", [far]))
    assert f"more than {XLSX_MAX_ROWS:,} rows" in error.message
    assert "Parquet" in (error.hint or "")


def test_a_row_of_too_many_cells_is_refused_before_it_is_parsed(tmp_path: Path) -> None:
    wide = b'<row r="6">' + b"<c><v>1</v></c>" * (XLSX_MAX_COLUMNS + 1) + b"</row>"
    error = load_error(write_workbook(tmp_path / "wide.xlsx", [wide]))
    assert f"has more than {XLSX_MAX_COLUMNS:,} cells" in error.message


def test_a_cell_beyond_the_last_column_is_refused_as_it_streams(tmp_path: Path) -> None:
    # One cell at column ZZZ (18,278): the reader pads the row to it.
    far = b'<row r="6"><c r="ZZZ6"><v>1</v></c></row>'
    error = load_error(write_workbook(tmp_path / "far.xlsx", [far]))
    assert f"cells beyond column {XLSX_MAX_COLUMNS:,} (XFD)" in error.message


def test_the_cell_limit_is_checked_by_the_scan_and_by_the_stream(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = write_workbook(tmp_path / "cells.xlsx")
    monkeypatch.setattr(workbook, "XLSX_MAX_CELLS", 12)
    assert "more than 12 cells" in load_error(path).message
    # Without the byte scan (a sheet part it cannot find), the streamed count still refuses.
    monkeypatch.setattr(workbook, "_scan_sheet", lambda *args: None)
    assert "more than 12 cells" in load_error(path).message


def test_too_many_shared_strings_are_refused_before_the_reader_loads_them(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    texts = [b"<si><t>%d</t></si>" % i for i in range(30)]
    path = write_workbook(tmp_path / "strings.xlsx", strings=texts)
    assert load_frame(path).frame["item"].tolist() == ["A", "A", "B", "B"]
    monkeypatch.setattr(workbook, "XLSX_MAX_CELLS", 25)
    assert "more than 25 different texts (shared strings)" in load_error(path).message


def test_an_oversized_part_other_than_a_sheet_is_refused(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    source = write_workbook(tmp_path / "src.xlsx")
    path = tmp_path / "styles.xlsx"
    with zipfile.ZipFile(source) as old, zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as new:
        for info in old.infolist():
            new.writestr(info.filename, old.read(info))
        new.writestr("xl/styles.xml", b"<styleSheet>" + b" " * 4096 + b"</styleSheet>")
    monkeypatch.setattr(workbook, "_XLSX_MAX_PART", 4000)
    error = load_error(path)
    assert "the part 'xl/styles.xml' of the workbook unpacks to" in error.message


def test_a_text_of_megabytes_in_one_cell_is_refused(tmp_path: Path) -> None:
    long = b'<row r="6"><c r="A6" t="inlineStr"><is><t>' + b"x" * (2 << 20) + b"</t></is></c></row>"
    error = load_error(write_workbook(tmp_path / "long.xlsx", [long]))
    assert "holds a text of more than 1 MB in one piece" in error.message


def test_elements_that_are_neither_rows_nor_cells_are_bounded(tmp_path: Path) -> None:
    # The reader keeps an object per element it parses inside the sheet's data; elements that
    # are not rows or cells cost memory as rows do.
    junk = write_workbook(tmp_path / "junk.xlsx", [b"<x/>" * 1_100_000])
    assert "far more XML elements than its" in load_error(junk).message


def test_a_dimension_element_does_not_skip_the_scan_of_the_sheet_read(tmp_path: Path) -> None:
    # With <dimension> before the cells the reader opens the workbook without parsing the
    # sheet; the sheet that is then read is still scanned before its rows stream in.
    source = write_workbook(tmp_path / "src.xlsx", empty_rows(XLSX_MAX_ROWS))
    path = tmp_path / "dim.xlsx"
    with zipfile.ZipFile(source) as old, zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as new:
        for info in old.infolist():
            data = old.read(info)
            if info.filename == "xl/worksheets/sheet1.xml":
                data = data.replace(b"<sheetData>", b'<dimension ref="A1:D5"/><sheetData>')
            new.writestr(info.filename, data)
    assert f"more than {XLSX_MAX_ROWS:,} rows" in load_error(path).message


def test_the_streamed_read_turns_a_damaged_sheet_into_a_message(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The byte scans read a sheet before the reader does and usually meet a bad CRC first;
    # without them, the reader meets it while the rows stream in, and that is guarded too.
    rows = [row_xml(n, ["A", "2026-10-05", n, 1]) for n in range(6, 3000)]
    path = write_workbook(
        tmp_path / "crc.xlsx", rows, compression=zipfile.ZIP_STORED, dimension=True
    )
    raw = bytearray(path.read_bytes())
    raw[raw.index(b"<v>2999</v>") + 3] = ord("8")
    path.write_bytes(bytes(raw))
    monkeypatch.setattr(workbook, "_check_archive", lambda path: {})
    monkeypatch.setattr(workbook, "_scan_sheet", lambda *args: None)
    error = load_error(path)
    assert "sheet 'data' cannot be read: the file is damaged or cut short" in error.message
    assert "Bad CRC-32" in error.message


# --- Parquet and CSV: rows that would not fit in memory ------------------------------------------


def write_parquet_bomb(path: Path, rows: int, block: int = 10_000_000) -> Path:
    """``rows`` identical rows: run-length encoding makes a few megabytes of them."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    size = min(rows, block)
    table = pa.table(
        {
            "item": pa.DictionaryArray.from_arrays(
                pa.array(np.zeros(size, dtype=np.int32)), pa.array(["A"])
            ),
            "period": pa.array(np.full(size, 20_000, dtype=np.int32)).cast(pa.date32()),
            "demand": pa.array(np.ones(size)),
            "forecast": pa.array(np.ones(size)),
        }
    )
    with pq.ParquetWriter(path, table.schema, compression="zstd") as writer:
        for start in range(0, rows, size):
            writer.write_table(table.slice(0, min(size, rows - start)), row_group_size=size)
    return path


def test_a_parquet_file_of_more_rows_than_memory_holds_is_refused_before_reading(
    tmp_path: Path,
) -> None:
    # 100M identical rows in about 2 MB; the process may use 2 GB (an address-space limit, as
    # `ulimit -v` sets). Reading them would take over 3 GB: refused from the row count.
    path = write_parquet_bomb(tmp_path / "rows.parquet", 100_000_000)
    assert path.stat().st_size < 20_000_000
    code = (
        "import resource, sys\n"
        "resource.setrlimit(resource.RLIMIT_AS, (2 << 30, resource.RLIM_INFINITY))\n"
        "from triage.cli import main\n"
        "sys.exit(main(sys.argv[1:]))\n"
    )
    done = subprocess.run(
        [sys.executable, "-c", code, "rank", str(path)],
        capture_output=True,
        text=True,
        cwd=ROOT,
        timeout=300,
    )
    assert done.returncode == 2, done.stderr
    assert "Traceback" not in done.stderr
    assert "the file has 100,000,000 rows; reading them takes about" in done.stderr
    assert "Split the file" in done.stderr


def _thousand_weeks(folder: Path, kind: str, **more: float) -> Path:
    """One series of 1,000 weekly rows as ``p.csv`` or ``p.parquet``, with ``more`` columns."""
    import pandas as pd

    frame = pd.DataFrame(
        {
            "item": ["A"] * 1000,
            "period": pd.date_range("2020-01-06", periods=1000, freq="W-MON"),
            "demand": 1.0,
            "forecast": 2.0,
            **more,
        }
    )
    path = folder / f"p.{kind}"
    if kind == "csv":
        frame.to_csv(path, index=False, date_format="%Y-%m-%d")
    else:
        frame.to_parquet(path, index=False)
    return path


@pytest.mark.parametrize("kind", ["csv", "parquet"])
def test_both_ways_of_reading_check_the_rows_against_memory(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, kind: str
) -> None:
    from triage.core.errors import LoadError
    from triage.core.read import read_portfolio

    path = _thousand_weeks(tmp_path, kind)
    assert read_portfolio(path).rows == 1000
    # Enough for the streamed way, not for the full loader.
    monkeypatch.setattr(memory, "_memory_limit", lambda: 1000 * memory.BYTES_PER_ROW[kind] - 1)
    assert read_portfolio(path).rows == 1000
    with pytest.raises(LoadError) as caught:
        load_frame(path)
    assert "the file has 1,000 rows" in str(caught.value)
    monkeypatch.setattr(memory, "_memory_limit", lambda: 1000)
    with pytest.raises(LoadError):
        read_portfolio(path)


@pytest.mark.parametrize("kind", ["csv", "parquet"])
def test_competing_forecasts_count_in_the_memory_a_file_needs(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, kind: str
) -> None:
    # Each forecast_<name> column adds a dense matrix: a limit that fits the rows alone but not
    # their competing forecasts refuses the file, both ways, before any cell is read.
    from triage.core.errors import LoadError
    from triage.core.read import read_portfolio

    path = _thousand_weeks(tmp_path, kind, forecast_stat=1.5, forecast_customer=1.0)
    columns = ["item", "period", "demand", "forecast", "forecast_stat", "forecast_customer"]
    assert memory.competing_columns(columns, {}) == 2
    assert sorted(read_portfolio(path).competing) == ["customer", "stat"]
    # The rows alone would fit the streamed way; with two competing forecasts they do not.
    streamed = f"{kind}-streamed"
    monkeypatch.setattr(memory, "_memory_limit", lambda: 1000 * memory.BYTES_PER_ROW[streamed])
    with pytest.raises(LoadError) as caught:
        read_portfolio(path)
    assert "the file has 1,000 rows" in str(caught.value)
    # A column mapped onto a competing name counts too.
    assert memory.competing_columns(["item", "engine_fc"], {"forecast_stat": "engine_fc"}) == 1
