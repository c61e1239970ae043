"""The files of an export: CSV, xlsx and JSON writers, the README, written all or nothing.

``export_review`` writes the decisions and the adjusted forward forecast of a cycle
(``triage.core.export.review_tables``, shaped by ``file_tables``) in the format named by the
target's suffix. Every format carries the same caution (``CAUTION``) and the provenance:
portfolio file name and fingerprint, cycle, ledger, when and by whom it was exported.
docs/export.md describes the files.

Safety rules (docs/sources.md §6, OWASP "CSV Injection",
https://owasp.org/www-community/attacks/CSV_Injection):

* Free-text cells (notes, codes, labels, reviewer, adjustment, portfolio name) that begin with a
  formula trigger get a leading apostrophe in CSV and xlsx (``text.neutralise``). Series keys are
  never changed: they must join back in the planning system byte for byte. Numbers stay numbers.
* CSV is written with ``csv.QUOTE_NONNUMERIC`` and notes have CR / CRLF turned into LF: CPython
  before 3.11.9 writes a field holding a bare CR unquoted, which splits the row on reading
  (docs/sources.md §6.3, measured on 3.11.7).
* xlsx text is always a string cell, never a formula, error value or hyperlink; control
  characters xlsx cannot store are replaced by visible symbols (``text.xlsx_cell_text``); the
  row and cell-length limits of a sheet are checked here, never left to the library
  (docs/sources.md §6.4).
* Files are written all or nothing, also under kill -9 (``triage.core.files``): a file through
  a scratch folder and one rename; the three files of a CSV export in one folder that replaces
  the old one in one step. An existing file or folder is kept unless ``force``; a failed export
  leaves no scratch file, and the next export removes what a killed one left.
"""

from __future__ import annotations

import contextlib
import csv
import json
import os
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, replace
from datetime import UTC, date, datetime
from pathlib import Path
from typing import IO, Any

import numpy as np
import pandas as pd

from triage.core.cycle import ReviewCycle
from triage.core.export import (
    CAUTION,
    COUNT,
    DATE,
    FIXED,
    FLAG,
    ITEM,
    KEY,
    LAYOUTS,
    LOCATION,
    LONG,
    NUMBER,
    ExportError,
    FileTable,
    ReviewTables,
    _examples,
    file_tables,
    review_tables,
)
from triage.core.files import (
    clean_leftovers,
    in_scratch,
    refuse_existing,
    sha256_of,
    write_atomic,
    write_set_atomic,
)
from triage.core.rounding import DEFAULT as DEFAULT_ROUNDING
from triage.core.rounding import Rounding
from triage.core.text import (
    FORMULA_START,
    XLSX_ILLEGAL,
    neutralise,
    neutralise_one,
    visible,
    xlsx_cell_text,
)

#: Rows in an Excel sheet, header included (Microsoft, "Excel specifications and limits"; pandas
#: + xlsxwriter silently dropped the last row at exactly this size, docs/sources.md §6.4).
XLSX_MAX_ROWS = 1_048_576
#: Characters in one Excel cell (UTF-16 code units). openpyxl cuts longer text silently.
XLSX_MAX_CELL = 32_767
#: Columns in an Excel sheet (Excel specifications and limits: 16,384, column XFD).
XLSX_MAX_COLUMNS = 16_384

#: Strings openpyxl would store as error values rather than text (``openpyxl.cell.cell``).
_XLSX_ERROR_CODES = frozenset(("#NULL!", "#DIV/0!", "#VALUE!", "#REF!", "#NAME?", "#NUM!", "#N/A"))
SUFFIXES = (".csv", ".xlsx", ".json")

#: Rows converted to Python objects at a time when a table is written.
_CHUNK_ROWS = 50_000
# DEL and C1 (0x80-0x9F, e.g. 0x9B = CSI) pass through json.dumps(ensure_ascii=False) raw and can
# drive a terminal that shows the file; escaping them keeps the JSON identical in meaning.
_JSON_ESCAPES = {code: f"\\u{code:04x}" for code in (0x7F, *range(0x80, 0xA0))}


@dataclass(frozen=True)
class CsvStyle:
    """How a CSV export writes fields: the one place regional options set.

    Text fields are always quoted (``csv.QUOTE_NONNUMERIC``), numbers never, so a decimal comma
    cannot be taken for a separator as long as the two differ.
    """

    sep: str = ","
    """Field separator."""
    decimal: str = "."
    """Decimal mark of numbers."""
    date_format: str | None = None
    """How period dates are written (``strftime``), e.g. ``%d.%m.%Y``; None: ISO."""

    def __post_init__(self) -> None:
        if len(self.sep) != 1 or self.sep in '"\r\n' or self.sep.isalnum():
            raise ExportError(f"{self.sep!r} cannot separate CSV fields.")
        if self.decimal not in (".", ","):
            raise ExportError(f"{self.decimal!r} is not a decimal mark; use . or ,.")
        if self.decimal == self.sep:
            raise ExportError(
                f"the decimal mark and the field separator are both {self.sep!r}.",
                hint="With a decimal comma, separate fields with ; (or a tab).",
            )

    def numbers(self, array: np.ndarray) -> list[Any]:
        """Cells for a column of numbers (see ``_number_cells``), with this decimal mark."""
        cells = _number_cells(array)
        if self.decimal == ".":
            return cells
        return [
            _Bare(repr(c).replace(".", self.decimal)) if isinstance(c, float) else c for c in cells
        ]


class _Bare(str):
    """Text the CSV writer leaves unquoted: a number in another notation (``3,5``).

    ``csv.QUOTE_NONNUMERIC`` quotes a field unless it is a number object (CPython
    ``Modules/_csv.c``: ``PyNumber_Check``), and a ``str`` subclass with ``__float__`` is one;
    its text is written as it is.
    """

    __slots__ = ()

    def __float__(self) -> float:
        return float(self.replace(",", "."))


#: The CSV export's default style: comma, decimal point, ISO dates (``--like-input`` follows
#: the portfolio file's own instead).
CSV_STYLE = CsvStyle()


@dataclass(frozen=True)
class ExportResult:
    """What ``export_review`` wrote."""

    paths: tuple[Path, ...]
    """Files written, in the order they were written."""
    format: str
    """``"csv"``, ``"xlsx"`` or ``"json"``."""
    cycle: str
    """The review cycle exported."""
    decisions: int
    """Rows of the decisions table (reviewed series)."""
    forecast_rows: int
    """Rows of the forecast table (series x forward periods)."""
    adjusted_periods: int
    """Forecast rows whose value comes from an adjustment."""
    layout: str
    """``LONG`` or ``WIDE``: whether ``forecast_rows`` counts series x periods or series."""
    precision: str
    """The precision of the values triage computed, in words (``triage.core.rounding``)."""
    warnings: tuple[str, ...]
    """Everything the user should know: content and format warnings."""
    caution: str = CAUTION
    """The caution every export carries."""


# --------------------------------------------------------------------------------------------
# Text rules


def _utf16_len(text: str) -> int:
    return len(text.encode("utf-16-le")) // 2


def _cut(text: str, limit: int) -> str:
    """``text`` cut to ``limit`` UTF-16 units, ending with a marker that says how much is gone."""
    marker = f" [… cut: {len(text):,} characters in all; CSV and JSON keep the full text]"
    room = limit - _utf16_len(marker)
    if room <= 0:
        return marker[:limit]
    head = text[:room]
    # Characters outside the BMP take two UTF-16 units: trim until the head fits.
    while (excess := _utf16_len(head) - room) > 0:
        head = head[: len(head) - max(1, excess // 2)]
    return head + marker


# --------------------------------------------------------------------------------------------
# Exporting


def export_paths(target: str | Path) -> tuple[str, tuple[Path, ...]]:
    """The format of a target and the files it stands for.

    ``x.xlsx`` and ``x.json`` are one file each. ``x.csv`` stands for a folder ``x`` holding
    three files, ``x/x-decisions.csv``, ``x/x-forecast.csv`` and ``x/x-README.txt``: the folder
    is what is replaced in one step, so it always holds one complete export (``x.csv`` itself
    is not written).

    Raises:
        ExportError: The suffix is not one of ``SUFFIXES``.
    """
    path = Path(target)
    suffix = path.suffix.lower()
    if suffix not in SUFFIXES:
        raise ExportError(
            f"cannot export to {path}: unknown file type {suffix or '(no suffix)'!r}.",
            hint="End the file name with .csv, .xlsx or .json.",
        )
    fmt = suffix[1:]
    if fmt != "csv":
        return fmt, (path,)
    folder = path.with_suffix("")
    return fmt, tuple(folder / f"{folder.name}{tail}" for tail in _SET_TAILS)


#: The files of a CSV export, after ``NAME``.
_SET_TAILS = ("-decisions.csv", "-forecast.csv", "-README.txt")


def export_review(
    review: ReviewCycle,
    target: str | Path,
    *,
    force: bool = False,
    exported_by: str | None = None,
    headers: Mapping[str, str] | None = None,
    layout: str = LONG,
    rounding: Rounding = DEFAULT_ROUNDING,
    style: CsvStyle = CSV_STYLE,
) -> ExportResult:
    """Write the decisions and the adjusted forward forecast of a cycle for upload.

    ``style`` sets a CSV export's separator, decimal mark and date format (``CsvStyle``;
    ``--like-input`` takes the portfolio's own); xlsx and JSON have no such conventions.

    Args:
        review: The review cycle to export, on its portfolio and ledger (``review_tables``).
        target: ``.csv`` (a folder of three files, see ``export_paths``), ``.xlsx`` or
            ``.json``.
        force: Replace what exists; otherwise an existing file or set folder stops the export.
        exported_by: Name recorded as the exporter; default the configured reviewer or login.
        headers: The ``--columns`` mapping the portfolio was read with: the files name the key,
            period and forecast columns with the portfolio's own headers (``file_headers``).
        layout: ``LONG`` or ``WIDE`` forecast table (``file_tables``).
        rounding: Precision of the values triage computes (``triage.core.rounding``).

    Raises:
        ExportError: Unknown suffix or layout, a file exists (without ``force``), the tables do
            not fit in an xlsx sheet, or the files cannot be written; nothing was left
            half-written, also when the process is killed (``triage.core.files``).
    """
    if layout not in LAYOUTS:
        raise ExportError(
            f"unknown layout {layout!r}.", hint=f"Choose one of {', '.join(LAYOUTS)}."
        )
    portfolio, ledger = review.portfolio, review.ledger
    if ledger is None:
        raise ExportError("no ledger is open, so there are no decisions to export.")
    fmt, paths = export_paths(target)
    written = paths[0].parent if fmt == "csv" else paths[0]
    if fmt != "csv" and written.is_dir():
        raise ExportError(f"{written} is a folder; give the name of a file to write.")
    for path in (written, *paths) if fmt == "csv" else paths:
        # Even with force: the portfolio being reviewed and the ledger are never replaced.
        for kept in (portfolio.path, ledger.path):
            if path.exists() and Path(kept).exists() and path.samefile(kept):
                raise ExportError(
                    f"{path} is the {'portfolio' if kept == portfolio.path else 'ledger'} "
                    "itself; nothing was written.",
                    hint="Choose another file name for the export.",
                )
    refuse_existing([written], force=force)
    tables = review_tables(review, exported_by=exported_by, rounding=rounding)
    decisions, forecast, header_warnings = file_tables(tables, headers=headers, layout=layout)
    tables = replace(tables, warnings=(*tables.warnings, *header_warnings))
    sheets = (decisions, forecast)
    warnings = list(tables.warnings)
    if fmt == "xlsx":
        _check_sheet_size(sheets, paths[0])
        book_warnings: list[str] = []

        def write_book(tmp: Path) -> None:
            book_warnings.clear()  # one attempt's findings only
            _write_xlsx(tmp, tables, sheets, book_warnings)

        _write_one(paths[0], write_book, force)
        warnings.extend(book_warnings)
    elif fmt == "json":
        _write_one(paths[0], lambda tmp: _write_json(tmp, tables, sheets), force)
    else:
        warnings.extend(_csv_key_warnings(sheets))
        warnings.extend(_flat_set_warnings(written))

        def write_readme(tmp: Path) -> None:
            data = [tmp.with_name(p.name) for p in paths[:2]]
            _write_text(tmp, _readme_text(tables, sheets, data, warnings))

        write_set_atomic(
            written,
            [
                (paths[0].name, lambda tmp: _write_csv(tmp, decisions, style)),
                (paths[1].name, lambda tmp: _write_csv(tmp, forecast, style)),
                (paths[2].name, write_readme),
            ],
            force=force,
        )
    return ExportResult(
        paths=paths,
        format=fmt,
        cycle=tables.provenance["cycle"],
        decisions=len(decisions),
        forecast_rows=len(forecast),
        layout=layout,
        precision=tables.precision,
        adjusted_periods=tables.adjusted_periods,
        warnings=tuple(warnings),
    )


def _write_one(path: Path, write: Callable[[Path], None], force: bool) -> None:
    # write_atomic turns OSError into a TriageError and removes its scratch folder on any
    # exception; anything else escaping here is a bug and keeps its traceback.
    write_atomic(path, write, force=force)


def _flat_set_warnings(folder: Path) -> list[str]:
    """Earlier versions wrote a CSV export's three files beside each other, not in a folder.

    Those files are the user's now (never removed), but an upload must not pick them up in
    place of the new set; the leftovers of a crashed write of them are removed.
    """
    flat = [folder.with_name(folder.name + tail) for tail in _SET_TAILS]
    for path in flat:
        clean_leftovers(path.parent, path.name)
    found = [p.name for p in flat if p.exists()]
    if not found:
        return []
    return [
        f"{', '.join(found)} beside the folder {folder.name} come from an earlier export (triage "
        f"now writes a CSV export as one folder, so that it is replaced as a whole); they are "
        "not part of this export and were left unchanged. Delete them so that no upload reads "
        "them."
    ]


# ---- CSV ------------------------------------------------------------------------------------


def _chunks(frame: pd.DataFrame) -> Iterator[pd.DataFrame]:
    """Consecutive row slices, so a large table is never held as Python objects all at once."""
    for start in range(0, len(frame), _CHUNK_ROWS):
        yield frame.iloc[start : start + _CHUNK_ROWS]


def _number_cells(array: np.ndarray) -> list[float | int | None]:
    """Numbers as Python objects for a CSV or JSON writer: None where missing, an int where the
    value is whole (``110``, not ``110.0``), else the float (written with its ``repr``)."""
    array = np.asarray(array, dtype=np.float64)
    cells = array.astype(object)
    cells[np.isnan(array)] = None
    whole = np.isfinite(array) & (np.abs(array) < 2.0**53)
    whole[whole] = array[whole] == np.trunc(array[whole])
    if whole.any():
        cells[whole] = array[whole].astype(np.int64).astype(object)
    out: list[float | int | None] = cells.tolist()
    return out


def _csv_columns(frame: pd.DataFrame, kinds: Sequence[str], style: CsvStyle) -> list[list[Any]]:
    columns: list[list[Any]] = []
    for name, kind in zip(frame.columns, kinds, strict=True):
        values = frame[name]
        if kind == NUMBER:
            columns.append(style.numbers(values.to_numpy(dtype=np.float64)))
        elif kind == COUNT:
            columns.append(values.to_numpy(dtype=np.int64).tolist())
        elif kind == FLAG:
            columns.append(np.where(values.to_numpy(dtype=bool), "true", "false").tolist())
        elif kind == DATE and style.date_format:
            formatted = {
                d: date.fromisoformat(str(d)).strftime(style.date_format) if d else d
                for d in pd.unique(values)
            }
            columns.append([formatted[d] for d in values.tolist()])
        elif kind in (KEY, FIXED, DATE):
            columns.append(values.tolist())
        else:
            columns.append(neutralise(values).tolist())
    return columns


def _write_csv(path: Path, table: FileTable, style: CsvStyle = CSV_STYLE) -> None:
    """One table as RFC 4180 CSV, UTF-8 without BOM, CRLF between records.

    QUOTE_NONNUMERIC quotes every text field (so a bare CR or a separator inside one can never
    split a row, docs/sources.md §6.3) and leaves numbers unquoted: a whole number as an integer,
    any other with ``repr`` (the shortest text that reads back as the same float); a missing
    number is ``""``. ``style`` sets the separator and decimal mark (``CsvStyle``).
    """
    with path.open("w", encoding="utf-8", newline="") as handle:
        writer = csv.writer(
            handle, delimiter=style.sep, quoting=csv.QUOTE_NONNUMERIC, lineterminator="\r\n"
        )
        writer.writerow(list(table.headers))
        for chunk in _chunks(table.frame):
            writer.writerows(zip(*_csv_columns(chunk, table.kinds, style), strict=True))


def _write_text(path: Path, text: str) -> None:
    with path.open("w", encoding="utf-8", newline="\n") as handle:
        handle.write(text)


def _csv_key_warnings(sheets: Sequence[FileTable]) -> list[str]:
    """Keys are written unchanged; say so when one would look like a formula to a spreadsheet."""
    out = []
    decisions, forecast = sheets
    keys = forecast if len(forecast) else decisions
    for column, name in zip(keys.frame.columns, keys.headers, strict=True):
        if column not in (ITEM, LOCATION):
            continue
        values = pd.Series(keys.frame[column].unique(), dtype=object)
        risky = values[values.str.match(FORMULA_START).to_numpy(dtype=bool)]
        if len(risky):
            out.append(
                f"{len(risky)} {name} value(s) start with = + - @ or a control character "
                f"(e.g. {_examples([repr(v) for v in risky.tolist()], len(risky))}). They are "
                "written unchanged so they join back in the planning system; import the CSV as "
                "text rather than opening it in a spreadsheet by double-click."
            )
    return out


def _readme_text(
    tables: ReviewTables,
    sheets: Sequence[FileTable],
    data: Sequence[Path],
    warnings: Sequence[str],
) -> str:
    """The README of a CSV export; ``data`` are the decisions and forecast files, written."""
    prov = tables.provenance
    lines = [
        "Forecast review export (triage)",
        "",
        "CAUTION: " + CAUTION,
        "",
        *_provenance_lines(prov),
        "",
        "Files",
        "  The three files of this folder were written together and are replaced together; an",
        "  upload can check that it read this export's files by their size and SHA-256.",
        f"  {data[0].name}: {sheets[0].describe}",
        *_manifest_line(data[0]),
        f"  {data[1].name}: {sheets[1].describe}",
        *_manifest_line(data[1]),
        "",
        "Numbers",
        f"  {_precision_line(tables)}",
        "",
        "Text safety",
        *[f"  {line}" for line in _SAFETY_LINES],
    ]
    if warnings:
        lines += ["", "Warnings", *[f"  - {w}" for w in warnings]]
    lines += ["", "Columns", *[f"  {name}: {text}" for name, text in column_notes(sheets)]]
    return "\n".join(visible(line) for line in lines) + "\n"


def _manifest_line(path: Path) -> list[str]:
    return [f"    {path.stat().st_size:,} bytes, SHA-256 {sha256_of(path)}"]


# ---- xlsx -----------------------------------------------------------------------------------


def _check_sheet_size(sheets: Sequence[FileTable], path: Path) -> None:
    for title, table in zip(_SHEET_TITLES, sheets, strict=True):
        rows = len(table) + 1
        if rows > XLSX_MAX_ROWS:
            raise ExportError(
                f"cannot write {path}: the {title} sheet would need {rows:,} rows (header "
                f"included) and a sheet holds at most {XLSX_MAX_ROWS:,}; nothing was written.",
                hint=f"Export to CSV instead (e.g. {path.with_suffix('.csv').name}), which has "
                "no row limit.",
            )
        if len(table.headers) > XLSX_MAX_COLUMNS:
            raise ExportError(
                f"cannot write {path}: the {title} sheet would need {len(table.headers):,} "
                f"columns and a sheet holds at most {XLSX_MAX_COLUMNS:,}; nothing was written.",
                hint="Use --layout long, or export to CSV.",
            )


#: The data sheets of a workbook, in the order of the tables.
_SHEET_TITLES = ("Decisions", "Forecast")
#: Number format of period cells in a workbook.
XLSX_DATE_FORMAT = "yyyy-mm-dd"


@dataclass
class _XlsxIssues:
    """Per-sheet counts of cells the xlsx rules had to change."""

    illegal: dict[str, int]
    cut: dict[str, int]


def _xlsx_text(values: Sequence[str], column: str, issues: _XlsxIssues) -> list[str]:
    """Text cell values: illegal characters replaced, over-long text cut with a marker."""
    out = list(values)
    for i, value in enumerate(out):
        # Most cells are short, plain text: the two checks below are skipped for them.
        if XLSX_ILLEGAL.search(value):
            value = xlsx_cell_text(value)
            issues.illegal[column] = issues.illegal.get(column, 0) + 1
        if 2 * len(value) > XLSX_MAX_CELL and _utf16_len(value) > XLSX_MAX_CELL:
            value = _cut(value, XLSX_MAX_CELL)
            issues.cut[column] = issues.cut.get(column, 0) + 1
        out[i] = value
    return out


def _xlsx_columns(
    sheet: Any, frame: pd.DataFrame, kinds: Sequence[str], issues: _XlsxIssues
) -> list[list[Any]]:
    columns: list[list[Any]] = []
    for name, kind in zip(frame.columns, kinds, strict=True):
        values = frame[name]
        if kind in (NUMBER, COUNT):
            columns.append(_xlsx_numbers(sheet, values.to_numpy(dtype=np.float64)))
        elif kind == FLAG:
            columns.append(values.to_numpy(dtype=bool).tolist())
        elif kind == DATE:
            columns.append(_xlsx_dates(sheet, values))
        else:
            text = values.tolist() if kind in (KEY, FIXED) else neutralise(values)
            columns.append(
                [_as_string_cell(sheet, v) for v in _xlsx_text(list(text), name, issues)]
            )
    return columns


def _xlsx_dates(sheet: Any, values: pd.Series) -> list[Any]:
    """ISO dates as date cells: number cells with the format ``yyyy-mm-dd``.

    openpyxl gives a ``datetime.date`` that format (3.1.5 ``cell.TIME_FORMATS``), but a plain
    value with a style makes the write-only sheet build a new cell for it, row after row. One
    styled cell per distinct date is built here instead and handed over for each of its rows:
    openpyxl writes a handed-over cell at once (``WriteOnlyWorksheet._values_to_row``), so the
    same cell can stand in every row.
    """
    from openpyxl.cell import WriteOnlyCell

    codes, uniques = pd.factorize(values)
    cells = [WriteOnlyCell(sheet, value=date.fromisoformat(str(v))) for v in uniques]
    for cell in cells:
        cell.number_format = XLSX_DATE_FORMAT
    out: list[Any] = np.array([*cells, None], dtype=object)[codes].tolist()
    return out


def _xlsx_header(sheet: Any, table: FileTable, issues: _XlsxIssues) -> list[Any]:
    """The header row: text cells, and date cells for headers that are period dates."""
    cells: list[Any] = []
    for header in table.headers:
        if header in table.dated_headers:
            cells.append(date.fromisoformat(header))
        else:
            (text,) = _xlsx_text([header], "header", issues)
            cells.append(_as_string_cell(sheet, text))
    return cells


def _xlsx_numbers(sheet: Any, array: np.ndarray) -> list[Any]:
    """Numeric cells that read back as the same float.

    openpyxl 3.1.5 writes numbers with ``"%.16g"`` (``openpyxl.compat.strings.safe_string``), so
    a float that needs 17 significant digits (0.1 + 0.2) would be stored rounded (measured).
    Those cells are given their ``repr`` text with data type ``"n"``, which openpyxl writes as
    it is, still a number cell.
    """
    from openpyxl.cell import WriteOnlyCell

    cells = array.astype(object)
    missing = np.isnan(array)
    cells[missing] = None
    finite = np.flatnonzero(~missing)
    if len(finite):
        short = np.char.mod("%.16g", array[finite]).astype(np.float64)
        for i in finite[short != array[finite]]:
            cell = WriteOnlyCell(sheet, value=repr(float(array[i])))
            cell.data_type = "n"
            cells[i] = cell
    out: list[Any] = cells.tolist()
    return out


def _write_xlsx(
    path: Path, tables: ReviewTables, sheets: Sequence[FileTable], warnings: list[str]
) -> None:
    """The workbook: a data sheet per table (header row frozen, auto-filter over the table,
    periods as date cells), then the "Read me" sheet."""
    from openpyxl import Workbook
    from openpyxl.utils import get_column_letter

    issues = _XlsxIssues({}, {})
    book = Workbook(write_only=True)
    try:
        for title, table in zip(_SHEET_TITLES, sheets, strict=True):
            sheet = book.create_sheet(title)
            # Part of the sheet's head, which is written before the first row.
            sheet.freeze_panes = "A2"
            _spool_beside(sheet, path)
            sheet.append(_xlsx_header(sheet, table, issues))
            for chunk in _chunks(table.frame):
                for values in zip(*_xlsx_columns(sheet, chunk, table.kinds, issues), strict=True):
                    sheet.append(values)
            # Written after the rows (openpyxl 3.1.5 WorksheetWriter.write_tail).
            last = get_column_letter(len(table.headers))
            sheet.auto_filter.ref = f"A1:{last}{len(table) + 1}"
        warnings.extend(_xlsx_warnings(issues))
        # Written last, so it can list what the data sheets needed; its text is made printable
        # first, so it has nothing left for the xlsx rules to replace.
        sheet = book.create_sheet("Read me")
        _spool_beside(sheet, path)
        for row in _readme_rows(tables, sheets, [*tables.warnings, *warnings]):
            texts = _xlsx_text([neutralise_one(visible(v)) for v in row], "Read me", issues)
            sheet.append([_as_string_cell(sheet, v) for v in texts])
        _save_book(book, path)
    except BaseException:
        _discard_spools(book)
        raise


def _spool_beside(sheet: Any, path: Path) -> None:
    """Spool a new write-only sheet in the scratch folder of ``path``, when it has one.

    openpyxl spools each sheet to a file in the system temp folder, which a killed export
    would leave there; in the scratch folder of ``files.write_atomic`` it goes with the rest
    (and the next export removes it). Set before the first row, as
    ``WriteOnlyWorksheet._get_writer`` does (openpyxl 3.1.5).
    """
    if not in_scratch(path):
        return
    from openpyxl.worksheet import _writer as sheet_writer

    spool = str(path.with_name(f"{path.name}.sheet{len(sheet.parent.worksheets)}.xml"))
    sheet._writer = sheet_writer.WorksheetWriter(sheet, out=spool)
    # Listed where openpyxl lists its own spools: its clean-up after saving removes it there.
    sheet_writer.ALL_TEMP_FILES.append(spool)
    sheet._writer.write_top()


def _save_book(book: Any, path: Path) -> None:
    """``Workbook.save`` (openpyxl 3.1.5 ``save_workbook``), with the archive closed on failure.

    When a write fails (disk full), openpyxl leaves its ``ZipFile`` open; collected later, it
    tries to flush again and prints "Exception ignored in ZipFile.__del__" with a traceback
    after triage's own message (measured). Closing it here, quietly, leaves nothing to flush.
    """
    from zipfile import ZIP_DEFLATED, ZipFile

    from openpyxl.writer import excel

    archive = ZipFile(path, "w", ZIP_DEFLATED, allowZip64=True)
    try:
        book.properties.modified = datetime.now(UTC).replace(tzinfo=None)
        excel.ExcelWriter(book, archive).save()
    except BaseException:
        with contextlib.suppress(Exception):
            archive.close()
        raise


def _discard_spools(book: Any) -> None:
    """Remove the temporary files of an unsaved write-only workbook.

    A write-only sheet spools its rows to an ``openpyxl.*`` file in the system temp folder,
    which openpyxl removes after a successful save, and otherwise only when the interpreter
    exits (openpyxl 3.1.5 ``worksheet/_writer.py``). A long session must not collect them.
    """
    from openpyxl.worksheet import _writer as sheet_writer

    for sheet in book.worksheets:
        rows = getattr(sheet, "_rows", None)
        writer = getattr(sheet, "_writer", None)
        spool = getattr(writer, "out", None)
        with contextlib.suppress(Exception):
            if rows is not None:
                rows.close()
        with contextlib.suppress(Exception):
            writer.close()  # type: ignore[union-attr]
        if isinstance(spool, str):
            with contextlib.suppress(OSError):
                os.remove(spool)
            with contextlib.suppress(ValueError, AttributeError):
                sheet_writer.ALL_TEMP_FILES.remove(spool)


def _xlsx_warnings(issues: _XlsxIssues) -> list[str]:
    out = []
    for column, count in sorted(issues.illegal.items()):
        out.append(
            f"{count} xlsx cell(s) in column {column!r} held control characters a spreadsheet "
            "cannot store; they are shown as the symbols ␀-␟ (U+FFFD for U+FFFE/U+FFFF). The CSV "
            "and JSON exports keep the original characters."
        )
    for column, count in sorted(issues.cut.items()):
        out.append(
            f"{count} xlsx cell(s) in column {column!r} were longer than a spreadsheet cell "
            f"holds ({XLSX_MAX_CELL:,} characters) and were cut, ending with a '[… cut: ...]' "
            "marker. The CSV and JSON exports keep the full text."
        )
    return out


def _as_string_cell(sheet: Any, value: str) -> Any:
    """The value, or a string cell where openpyxl would otherwise not store it as text.

    openpyxl stores ``"=..."`` as a formula and ``"#N/A"`` as an error value; setting data type
    ``"s"`` writes the text as an inline string (docs/sources.md §6.2, measured).
    """
    from openpyxl.cell import WriteOnlyCell

    if (len(value) > 1 and value[0] == "=") or value in _XLSX_ERROR_CODES:
        cell = WriteOnlyCell(sheet, value=value)
        cell.data_type = "s"
        return cell
    return value


def _readme_rows(
    tables: ReviewTables, sheets: Sequence[FileTable], warnings: Sequence[str]
) -> list[list[str]]:
    prov = tables.provenance
    rows = [
        ["Caution", CAUTION],
        [],
        *[[label, prov[key]] for key, label in _PROVENANCE_LABELS.items()],
        ["Decisions sheet", sheets[0].describe],
        ["Forecast sheet", sheets[1].describe],
        ["Numbers", _precision_line(tables)],
        [],
        ["Text safety", " ".join(_SAFETY_LINES)],
    ]
    if warnings:
        rows += [[], *[["Warning", w] for w in warnings]]
    rows += [[], ["Column", "Meaning"], *[[k, v] for k, v in column_notes(sheets)]]
    return rows


# ---- JSON -----------------------------------------------------------------------------------


def _json_columns(frame: pd.DataFrame, kinds: Sequence[str]) -> list[list[Any]]:
    columns: list[list[Any]] = []
    for name, kind in zip(frame.columns, kinds, strict=True):
        values = frame[name]
        if kind == NUMBER:
            columns.append(_number_cells(values.to_numpy(dtype=np.float64)))
        elif kind == COUNT:
            columns.append(values.to_numpy(dtype=np.int64).tolist())
        elif kind == FLAG:
            columns.append(values.to_numpy(dtype=bool).tolist())
        else:
            columns.append([str(v) for v in values.tolist()])
    return columns


def dumps_json(value: Any, *, indent: int | None = None) -> str:
    """JSON text that decodes to exactly ``value`` and is safe to print on a terminal.

    ``allow_nan=False``: NaN and Infinity are not JSON (RFC 8259; docs/sources.md §6.5), so a NaN
    that was not turned into None is a bug and raises. C0 controls are escaped by ``json``
    itself; DEL and C1 are escaped here (see ``_JSON_ESCAPES``).
    """
    text = json.dumps(value, ensure_ascii=False, allow_nan=False, indent=indent)
    return text.translate(_JSON_ESCAPES)


_dumps = dumps_json


def _write_records(handle: IO[str], table: FileTable) -> None:
    names = list(table.headers)
    for number, chunk in enumerate(_chunks(table.frame)):
        rows = zip(*_json_columns(chunk, table.kinds), strict=True)
        lines = (_dumps(dict(zip(names, row, strict=True))) for row in rows)
        handle.write(("," if number else "") + "\n  " + ",\n  ".join(lines))
    if len(table):
        handle.write("\n ")


def _write_json(path: Path, tables: ReviewTables, sheets: Sequence[FileTable]) -> None:
    """One JSON document, streamed so that a large forecast table is never held as text."""
    prov = tables.provenance
    head = {
        "caution": CAUTION,
        "portfolio": {"name": prov["portfolio"], "fingerprint": prov["portfolio_fingerprint"]},
        "cycle": prov["cycle"],
        "ledger": prov["ledger"],
        "exported_at": prov["exported_at"],
        "exported_by": prov["exported_by"],
        "triage_version": prov["triage_version"],
        "warnings": list(tables.warnings),
    }
    with path.open("w", encoding="utf-8", newline="\n") as handle:
        handle.write("{\n")
        for key, value in head.items():
            handle.write(f" {_dumps(key)}: {_dumps(value)},\n")
        handle.write(' "decisions": [')
        _write_records(handle, sheets[0])
        handle.write('],\n "forecast": [')
        _write_records(handle, sheets[1])
        handle.write("]\n}\n")


# ---- shared wording -------------------------------------------------------------------------

_PROVENANCE_LABELS = {
    "portfolio": "Portfolio file",
    "portfolio_fingerprint": "Portfolio fingerprint (SHA-256)",
    "cycle": "Review cycle",
    "ledger": "Decision ledger",
    "exported_at": "Exported at (UTC)",
    "exported_by": "Exported by",
    "triage_version": "triage version",
}


def _provenance_lines(prov: dict[str, str]) -> list[str]:
    width = max(len(label) for label in _PROVENANCE_LABELS.values())
    return [f"{label:<{width}}  {prov[key]}" for key, label in _PROVENANCE_LABELS.items()]


_SAFETY_LINES = (
    "Text in note, reviewer, codes, labels, adjustment and portfolio name that starts with",
    "= + - @, a tab or a line break starts with an apostrophe ('), so no spreadsheet reads it as",
    "a formula. item and location are never changed, so they join back in the planning system.",
    "Line breaks inside notes are LF.",
    "The CSV files hold every text exactly, control characters included (an ESC or NUL typed",
    "in a note stays): read them with a spreadsheet or a program; never print them raw to a",
    "terminal, where such characters act as commands.",
)

#: What each column means, for the README and the "Read me" sheet (docs/export.md has the
#: same); ``outcome`` of the forecast table has its own entry, ``outcome (forecast)``.
COLUMN_NOTES: dict[str, str] = {
    "item": "the series' item, exactly as in the portfolio file",
    "location": "the series' location, exactly as in the portfolio file",
    "cycle": "review cycle: ISO date of the portfolio's latest actual period",
    "outcome": "what the reviewer concluded (code)",
    "outcome_label": "what the reviewer concluded (words)",
    "root_cause": "why the forecast missed (code)",
    "root_cause_label": "why the forecast missed (words)",
    "note": "the reviewer's note",
    "reviewer": "who decided",
    "recorded_at": "when it was decided (UTC)",
    "adjustment": "the change to the forward forecast as written in triage, empty when none",
    "units_change": "sum of (adjusted - original) forecast over the adjusted periods, units",
    "value_change": "the same in value: each period's change times its price; empty without price",
    "portfolio_name": "the portfolio file the decision was made on",
    "portfolio_fingerprint": "SHA-256 of that portfolio file",
    "period": "forward period start date (ISO)",
    "forecast": "the portfolio's forward forecast; empty where it has none",
    "adjusted_forecast": "the adjusted value where a decision (this cycle's, or an earlier one "
    "carried) changed that period, else forecast",
    "adjusted": "true where a decision (this cycle's or carried) changed the period: "
    "adjusted_forecast comes from it and differs from forecast",
    "adjusted_in_cycle": "the review cycle whose decision gave adjusted_forecast: this cycle, "
    "or an earlier cycle whose adjustment is carried; empty where not adjusted",
    "outcome (forecast)": "the series' decision outcome this cycle, empty when not reviewed",
    "group_decision": "the ledger id of the group decision the series' decision (or the "
    "adjusted value) is its part of, empty for a decision of the series alone",
    "adjusted_periods": "how many of the series' forward periods the decision changed",
    "adjusted per period": "one column per forward period, headed by its start date: the "
    "adjusted value where the decision changed that period, else the portfolio's forecast",
    "forecast per period": "one column per forward period: the portfolio's forward forecast; "
    "empty where it has none",
}


def column_notes(sheets: Sequence[FileTable]) -> list[tuple[str, str]]:
    """(header, meaning) of every column of the decisions and forecast tables, in file order.

    The period columns of a wide table are one entry per block (``2026-11-02 ... 2027-01-25``).
    """
    notes: list[tuple[str, str]] = []
    listed: set[str] = set()
    for number, table in enumerate(sheets):
        blocks: dict[str, list[str]] = {}
        for column, header in zip(table.frame.columns, table.headers, strict=True):
            name, _, period = str(column).partition(" ")
            if period:  # a period column of a wide table
                key = (
                    "adjusted per period" if name == "adjusted_forecast" else "forecast per period"
                )
                blocks.setdefault(key, []).append(header)
                continue
            if number and name == "outcome":
                notes.append((f"{header} (forecast)", COLUMN_NOTES["outcome (forecast)"]))
            elif header not in listed:  # the keys are in both tables
                notes.append((header, COLUMN_NOTES.get(name, "")))
            listed.add(header)
        for key, headers in blocks.items():
            shown = headers[0] if len(headers) == 1 else f"{headers[0]} ... {headers[-1]}"
            notes.append((shown, COLUMN_NOTES[key]))
    return notes


def _precision_line(tables: ReviewTables) -> str:
    if tables.decimals is None:
        return "Numbers are written as computed."
    return (
        f"Adjusted values are rounded to {tables.precision}, half away from zero; "
        "units_change and value_change are computed from them, without float noise; the "
        "portfolio's own forecast is written as in the file."
    )
