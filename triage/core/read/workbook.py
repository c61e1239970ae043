"""xlsx workbooks: the archive checked before openpyxl opens it, sheets read within bounds.

Every workbook is opened in one place (:func:`_open_book`): its parts are checked against the
size limits first (a small file may unpack to gigabytes), the sheets' XML is scanned for rows,
cells and tags, and openpyxl's own errors are named as a damaged file. Rows are counted as they
stream in, so a sheet past Excel's limits is refused early. Formula cells without a saved result
are refused. :func:`xlsx_rows` gives other readers (a batch of decisions) the same bounds.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import re
import warnings
import zipfile
import zlib
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, NoReturn

import numpy as np
import pandas as pd

from triage.core import schema
from triage.core.dialect import FileOptions
from triage.core.errors import format_rows
from triage.core.read.columns import (
    TITLE_ROWS,
    ColumnPlan,
    RawColumns,
    column_label,
    has_required,
    header_text,
    plan_columns,
    refuse_title_block,
)
from triage.core.read.messages import fail, quote_list, sanitized

#: Bytes a workbook may unpack to, all parts together (the size its zip directory declares).
_MAX_XLSX_UNPACKED = 2 << 30


#: Rows and columns of the largest sheet triage reads: Excel's own limits (Microsoft, "Excel
#: specifications and limits"). Rows are counted as they stream in, empty rows included.
XLSX_MAX_ROWS = 1_048_576


XLSX_MAX_COLUMNS = 16_384


#: Cells read from one sheet, each row counted up to its last cell (empty cells included), and
#: shared strings in one workbook: what bounds the time and memory of an xlsx read.
XLSX_MAX_CELLS = 20_000_000


#: Longest text between two XML tags of a sheet or the shared strings, in bytes. A cell holds at
#: most 32,767 characters in Excel, at most 10 bytes each as a character reference (&#x10FFFF;).
_XLSX_MAX_TEXT_BYTES = 1 << 20


#: Largest part other than worksheets, shared strings and pictures (workbook, styles, content
#: types, relationships, chart sheets): the reader parses those whole.
_XLSX_MAX_PART = 64 << 20


#: Bytes of XML scanned at a time: small, so that the scan's own peak stays low.
_XLSX_CHUNK = 1 << 20


#: What the xlsx reader raises on a damaged or malformed part (ParseError is a SyntaxError; a bad
#: CRC is a BadZipFile; a row or cell it cannot make sense of is a ValueError, KeyError,
#: IndexError, TypeError or AttributeError from inside the reader).
_XLSX_DAMAGED: tuple[type[Exception], ...] = (
    SyntaxError,
    zipfile.BadZipFile,
    zlib.error,
    EOFError,
    ValueError,
    KeyError,
    IndexError,
    TypeError,
    AttributeError,
    OverflowError,
)


_XLSX_TOO_LARGE_HINT = (
    "Save the data as CSV UTF-8 or Parquet, which triage reads in blocks without these limits; "
    "if the data itself is small, delete the empty rows and columns after it in Excel and save "
    "again."
)


_XLSX_DAMAGED_HINT = (
    "Open the file in Excel or LibreOffice and save it again, or export the data again (as CSV "
    "UTF-8 if you can); if the file was downloaded or sent, fetch it again."
)


#: Tags the part scan counts: rows, cells, formulas (sheets) and shared strings, any prefix.
_XML_ELEMENT = re.compile(rb"<(?:[A-Za-z_][\w.\-]*:)?(row|c|f|si)[\s/>]")


_SHEET_DATA = re.compile(rb"<(/?)(?:[A-Za-z_][\w.\-]*:)?sheetData([\s/>])")


_SHEET_DATA_END = re.compile(rb"</(?:[A-Za-z_][\w.\-]*:)?sheetData[\s>]")


_DIMENSION = re.compile(rb"<(?:[A-Za-z_][\w.\-]*:)?dimension[\s/>]")


#: Tags a cell may take inside <sheetData> (opening and closing: <c><f></f><v></v></c> is 6),
#: and tags a sheet may hold besides its rows and cells (column widths, merged ranges, links).
_XLSX_TAGS_PER_CELL = 8


_XLSX_MAX_OTHER_TAGS = 1_000_000


_PICTURE_SUFFIXES = (".bin", ".png", ".jpg", ".jpeg", ".gif", ".bmp", ".tif", ".tiff", ".emf",
                     ".wmf", ".svg", ".wdp")  # fmt: skip


def read_workbook(
    path: Path,
    mapping: dict[str, str],
    sheet: str | None,
    notices: list[str],
    options: FileOptions | None = None,
) -> tuple[RawColumns, str]:
    options = options or FileOptions()

    with _open_book(path) as (book, scans):
        try:
            worksheet = _pick_sheet(path, book, sheet, notices)
            name = worksheet.title
            sheet_path = getattr(worksheet, "_worksheet_path", None)
            scan = None
            if sheet_path:
                scan = scans.get(sheet_path.lstrip("/")) or _scan_sheet(path, sheet_path, name)
            worksheet.reset_dimensions()
            rows = _stream_sheet(path, worksheet, name, options.header_row)
        finally:
            book.close()
    header_at, header_row, body = rows.header_at, rows.header, rows.body
    width = len(header_row)
    filled = [v for v in header_row if v is not None and str(v).strip()]
    if options.header_row is None and not has_required(header_row, mapping):
        # A title block above the header (one cell or several, merged or not): the header is
        # the first row below it that names the required columns.
        found = next((i for i, row in rows.early if has_required(row, mapping)), None)
        if found is not None:
            refuse_title_block(
                path,
                f"sheet '{name}' row {header_at + 1}",
                filled,
                f"row {found + 1}",
                FileOptions(options.sep, options.decimal, options.date_format, found + 1),
                mapping,
            )
    if len(filled) == 1 and rows.wide_start and options.header_row is None:
        fail(
            path,
            f"sheet '{name}' row {header_at + 1} holds only "
            f"'{sanitized(str(filled[0]))[:80]}', which looks like a title, not the "
            "header: the header must be the first non-empty row, with one name per column.",
            "Read the header from its row with --header-row N (the rows above it are skipped), "
            "or delete the title rows (and unmerge the title cells), then save and load the "
            "file again.",
        )
    if rows.beyond is not None:
        row_number, column = rows.beyond
        fail(
            path,
            f"sheet '{name}' row {row_number} has a value in column "
            f"{_column_letter(column)}, right of the last header cell: the header "
            "is shorter than the data.",
            "Give every column a name in the header row, or delete the extra cells.",
        )
    n_rows = len(body)
    columns = list(zip(*body, strict=True)) if body else [() for _ in range(width)]
    body.clear()
    plan = plan_columns(path, [header_text(v) for v in header_row], mapping, notices)
    data = {
        i: pd.Series(np.array(col, dtype=object), dtype=object) for i, col in enumerate(columns)
    }
    del columns
    if scan is None or scan.formulas:
        _check_formulas(path, name, data, plan, header_at, notices)
    file_rows = np.arange(n_rows, dtype=np.int64) + header_at + 2
    return RawColumns(plan, data, first_row=header_at + 2, file_rows=file_rows), name


@dataclass
class _SheetRows:
    """A sheet's rows as streamed in, with what the checks after reading need."""

    header_at: int
    """Row index (0-based) of the header, the first non-empty row (or ``--header-row``)."""
    header: list[Any]
    """Header cells, trailing empty ones dropped."""
    body: list[tuple[Any, ...]]
    """Data rows cut or padded to the header's width; empty rows between data rows are kept as
    rows of None, empty rows after the data are not kept."""
    beyond: tuple[int, int] | None
    """The first (sheet row, column number) holding a value right of the header."""
    wide_start: bool
    """Whether one of the first five rows below the header has more than one value."""
    early: list[tuple[int, tuple[Any, ...]]] = field(default_factory=list)
    """The first rows below the header as they are (row index, cells), to find a header below
    a title block."""


def _stream_sheet(
    path: Path, worksheet: Any, name: str, header_row: int | None = None
) -> _SheetRows:
    """Read the rows of a sheet as they stream in, keeping no empty row after the data.

    The header is the first non-empty row, or row ``header_row`` (from 1) when given: the rows
    above it are skipped as they are.
    """
    header_at: int | None = None
    header_row_cells: list[Any] = []
    width = 0
    body: list[tuple[Any, ...]] = []
    blank = 0
    beyond: tuple[int, int] | None = None
    wide_start = False
    early: list[tuple[int, tuple[Any, ...]]] = []
    for index, row in enumerate(_sheet_rows(path, worksheet, name)):
        if header_at is None:
            if header_row is not None and index < header_row - 1:
                continue
            if any(v is not None for v in row):
                header_at = index
                header_row_cells = list(row)
                while header_row_cells and header_row_cells[-1] is None:
                    header_row_cells.pop()
                width = len(header_row_cells)
            elif header_row is not None:
                fail(
                    path,
                    f"sheet '{name}' row {header_row} is empty, but --header-row {header_row} "
                    "says the header is there.",
                    "Give the row number of the header as the spreadsheet shows it.",
                )
            continue
        if index - header_at <= TITLE_ROWS:
            early.append((index, row))
        if index - header_at <= 5 and sum(v is not None for v in row) > 1:
            wide_start = True
        if len(row) > width:
            extra = next((i for i, v in enumerate(row[width:]) if v is not None), None)
            if extra is not None and beyond is None:
                beyond = (index + 1, width + extra + 1)
            row = row[:width]
        if all(v is None for v in row):
            blank += 1
            continue
        if blank:
            body.extend([(None,) * width] * blank)
            blank = 0
        body.append(row if len(row) == width else row + (None,) * (width - len(row)))
    if header_at is None:
        if header_row is not None:
            fail(
                path,
                f"sheet '{name}' has no row {header_row}, which --header-row names as the header.",
                "Give the row number of the header as the spreadsheet shows it.",
            )
        fail(path, f"sheet '{name}' is empty.", "Choose the sheet with the data via --sheet.")
    return _SheetRows(header_at, header_row_cells, body, beyond, wide_start, early)


def xlsx_rows(path: Path) -> Iterator[tuple[Any, ...]]:
    """The rows (values) of a workbook's first visible sheet, under the loader's xlsx limits.

    For small workbooks read whole elsewhere (a batch of decisions): the archive is checked and
    the rows are counted as they stream in, exactly as for a portfolio, so a small file of wide
    empty rows is refused before it takes memory. Rows come as the reader gives them (padded to
    their last cell); the caller keeps only the cells it needs.

    Raises:
        LoadError: Not a workbook, damaged, or beyond the sheet limits.
    """

    with _open_book(path) as (book, scans):
        try:
            worksheet = _pick_sheet(path, book, None, [])
            name = worksheet.title
            sheet_path = getattr(worksheet, "_worksheet_path", None)
            if sheet_path and sheet_path.lstrip("/") not in scans:
                _scan_sheet(path, sheet_path, name)
            worksheet.reset_dimensions()
            yield from _sheet_rows(path, worksheet, name)
        finally:
            book.close()


@contextlib.contextmanager
def _open_book(path: Path) -> Iterator[tuple[Any, dict[str, Any]]]:
    """The workbook opened read-only after its archive is checked (``_check_archive``), and the
    sheet scans made; openpyxl's warnings are silenced while the caller reads it. The caller
    closes the book."""
    import openpyxl
    from openpyxl.utils.exceptions import InvalidFileException

    scans = _check_archive(path)
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", category=UserWarning, module="openpyxl")
        try:
            book = openpyxl.load_workbook(path, read_only=True, data_only=True, keep_links=False)
        except (zipfile.BadZipFile, OSError, KeyError, ValueError, InvalidFileException) as exc:
            fail(
                path,
                f"cannot open this as an Excel workbook ({exc}).",
                "Check that it is an .xlsx file saved by Excel or LibreOffice, not damaged.",
            )
        except _XLSX_DAMAGED as exc:
            _unopenable(path, exc)
        yield book, scans


def _sheet_rows(path: Path, worksheet: Any, name: str) -> Iterator[tuple[Any, ...]]:
    """The rows of a sheet (values), counted as they come: refused past the sheet limits.

    A row the reader cannot parse (malformed XML, a bad CRC, a cell it cannot convert) is
    reported as a damaged sheet; only the reader's own calls are guarded.
    """
    rows = iter(worksheet.iter_rows(values_only=True))
    count = cells = 0
    while True:
        try:
            row = next(rows)
        except StopIteration:
            return
        except _XLSX_DAMAGED as exc:
            _damaged_workbook(path, f"sheet '{name}'", exc)
        count += 1
        cells += len(row)
        if count > XLSX_MAX_ROWS:
            _too_many_rows(path, name)
        if len(row) > XLSX_MAX_COLUMNS:
            fail(
                path,
                f"sheet '{name}' row {count} has cells beyond column {XLSX_MAX_COLUMNS:,} "
                f"({_column_letter(XLSX_MAX_COLUMNS)}), the last column of an Excel sheet.",
                _XLSX_TOO_LARGE_HINT,
            )
        if cells > XLSX_MAX_CELLS:
            _too_many_cells(path, name)
        yield row


def _too_many_rows(path: Path, name: str) -> NoReturn:
    fail(
        path,
        f"sheet '{name}' has more than {XLSX_MAX_ROWS:,} rows (empty rows count too), the most "
        "an Excel sheet holds and the most triage reads from one.",
        _XLSX_TOO_LARGE_HINT,
    )


def _too_many_cells(path: Path, name: str) -> NoReturn:
    fail(
        path,
        f"sheet '{name}' has more than {XLSX_MAX_CELLS:,} cells (each row counted up to its "
        "last cell, empty cells too), more than triage reads from an xlsx sheet.",
        _XLSX_TOO_LARGE_HINT,
    )


def _damaged_workbook(path: Path, where: str, exc: BaseException) -> NoReturn:
    if isinstance(exc, SyntaxError):
        what = f"its XML is malformed ({exc})"
    elif isinstance(exc, zipfile.BadZipFile | zlib.error | EOFError):
        what = f"the file is damaged or cut short ({exc})"
    else:
        what = (
            f"it holds an entry the xlsx reader cannot make sense of ({type(exc).__name__}: {exc})"
        )
    fail(path, f"{where} cannot be read: {what}.", _XLSX_DAMAGED_HINT)


def _unopenable(path: Path, exc: BaseException) -> NoReturn:
    """A workbook the reader fails on while opening it (before any sheet is read)."""
    try:
        with zipfile.ZipFile(path) as archive:
            charts = [n for n in archive.namelist() if n.lower().startswith("xl/chartsheets/")]
    except (zipfile.BadZipFile, OSError):
        charts = []
    if isinstance(exc, AttributeError) and charts:
        fail(
            path,
            "cannot open this workbook: it has a chart sheet whose parts are incomplete, and the "
            "xlsx reader stops at it before reaching any data sheet.",
            "Open the file in Excel or LibreOffice and save it again, or delete the chart sheet, "
            "or save the data sheet as CSV UTF-8.",
        )
    _damaged_workbook(path, "the workbook", exc)


@dataclass
class _PartScan:
    """What one XML part of a workbook holds, counted from its bytes as it inflates."""

    rows: int = 0
    cells: int = 0
    widest: int = 0
    """Most cells in one row."""
    strings: int = 0
    formulas: bool = False
    tags: int = 0
    """Tags (``<`` bytes) inside ``<sheetData>``."""
    outside: int = 0
    """Tags before and after ``<sheetData>`` (columns, merged ranges, formatting, links)."""
    complete: bool = True
    """False when the scan stopped at ``<sheetData>`` (see :func:`_scan_part`)."""


def _check_archive(path: Path) -> dict[str, _PartScan]:
    """Refuse a workbook whose parts would take too much memory, before the reader opens it.

    Every part but the worksheets, the shared strings and pictures must unpack to at most
    ``_XLSX_MAX_PART``; the shared strings are counted; every worksheet the reader will open is
    scanned (the reader parses a sheet whole when it opens the workbook unless a ``<dimension>``
    element comes before the cells).

    Returns:
        The complete scans, by part name.
    """
    scans: dict[str, _PartScan] = {}
    try:
        with zipfile.ZipFile(path) as archive:
            infos = archive.infolist()
            unpacked = sum(info.file_size for info in infos)
            if unpacked > _MAX_XLSX_UNPACKED:
                fail(
                    path,
                    f"the workbook unpacks to {unpacked / 2**30:.1f} GB, more than triage reads "
                    f"from xlsx ({_MAX_XLSX_UNPACKED / 2**30:.0f} GB).",
                    "Save the data as CSV UTF-8 or Parquet instead.",
                )
            names = set(archive.namelist())
            content_types = next((i for i in infos if i.filename == "[Content_Types].xml"), None)
            if content_types is not None and content_types.file_size > _XLSX_MAX_PART:
                _oversized_part(path, content_types)
            strings, workbook = _package_parts(archive) if content_types else (None, None)
            for info in infos:
                lower = info.filename.lower()
                if (
                    info.file_size > _XLSX_MAX_PART
                    and info.filename != strings
                    and not lower.startswith(("xl/worksheets/", "xl/media/", "xl/embeddings/"))
                    and not lower.endswith(_PICTURE_SUFFIXES)
                ):
                    _oversized_part(path, info)
            if strings is not None and strings in names:
                scan = _scan_guarded(path, archive, strings, "the shared strings of the workbook")
                if scan.strings > XLSX_MAX_CELLS:
                    fail(
                        path,
                        f"the workbook holds more than {XLSX_MAX_CELLS:,} different texts "
                        "(shared strings), more than triage reads from an xlsx file.",
                        _XLSX_TOO_LARGE_HINT,
                    )
            for title, member in _sheet_parts(archive, workbook) if workbook else []:
                if member in names and member not in scans:
                    scan = _scan_guarded(
                        path, archive, member, f"sheet '{title}'", sheet=title, at_open=True
                    )
                    if scan.complete:
                        scans[member] = scan
    except (zipfile.BadZipFile, zlib.error, EOFError, OSError) as exc:
        fail(
            path,
            f"cannot open this as an Excel workbook ({exc}).",
            "Check that it is an .xlsx file saved by Excel or LibreOffice, not damaged.",
        )
    return scans


def _oversized_part(path: Path, info: zipfile.ZipInfo) -> NoReturn:
    fail(
        path,
        f"the part '{sanitized(info.filename)}' of the workbook unpacks to "
        f"{info.file_size / 2**20:,.0f} MB; triage reads at most {_XLSX_MAX_PART >> 20} MB for a "
        "part other than a sheet.",
        _XLSX_DAMAGED_HINT,
    )


def _package_parts(archive: zipfile.ZipFile) -> tuple[str | None, str | None]:
    """The shared-strings part and the workbook part, as the xlsx reader finds them.

    None for both when ``[Content_Types].xml`` cannot be read: the reader then refuses the file
    with its own message.
    """
    from openpyxl.packaging.manifest import Manifest
    from openpyxl.xml.constants import ARC_WORKBOOK, SHARED_STRINGS, XLSM, XLSX, XLTM, XLTX
    from openpyxl.xml.functions import fromstring

    try:
        package = Manifest.from_tree(fromstring(archive.read("[Content_Types].xml")))
    except _XLSX_DAMAGED:
        return None, None
    found = package.find(SHARED_STRINGS)
    strings = str(found.PartName)[1:] if found is not None else None
    part = next((p for kind in (XLTM, XLTX, XLSM, XLSX) if (p := package.find(kind))), None)
    return strings, str(part.PartName)[1:] if part is not None else ARC_WORKBOOK


def _sheet_parts(archive: zipfile.ZipFile, workbook: str) -> list[tuple[str, str]]:
    """(title, part) of every worksheet the xlsx reader opens, in workbook order."""
    from openpyxl.reader.workbook import WorkbookParser

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            parser = WorkbookParser(archive, workbook, keep_links=False)
            parser.parse()
            return [
                (str(sheet.name), str(rel.target))
                for sheet, rel in parser.find_sheets()
                if "chartsheet" not in str(rel.Type)
            ]
    except _XLSX_DAMAGED:
        return []  # the reader refuses the file with its own message


def _scan_guarded(
    path: Path,
    archive: zipfile.ZipFile,
    member: str,
    where: str,
    *,
    sheet: str | None = None,
    at_open: bool = False,
) -> _PartScan:
    """:func:`_scan_part`, with a damaged part (bad CRC, bad deflate data) named as such."""
    try:
        return _scan_part(path, archive, member, where, sheet=sheet, at_open=at_open)
    except (zipfile.BadZipFile, zlib.error, EOFError) as exc:
        _damaged_workbook(path, where, exc)


def _scan_sheet(path: Path, member: str, name: str) -> _PartScan | None:
    """Count a sheet's rows and cells from its XML before the reader parses it; refuse early.

    The reader builds each row whole and keeps an object per row it has parsed, so a sheet of
    millions of empty rows, or one row of millions of cells, compresses to a small file and
    would take gigabytes: this byte scan refuses it within the first megabytes. It also tells
    whether the sheet has formulas at all.
    """
    where = f"sheet '{name}'"
    try:
        with zipfile.ZipFile(path) as archive:
            return _scan_guarded(path, archive, member.lstrip("/"), where, sheet=name)
    except KeyError:
        return None  # the reader reports the missing part
    except (zipfile.BadZipFile, zlib.error, EOFError) as exc:  # the archive itself
        _damaged_workbook(path, where, exc)


def _scan_part(
    path: Path,
    archive: zipfile.ZipFile,
    member: str,
    where: str,
    *,
    sheet: str | None = None,
    at_open: bool = False,
) -> _PartScan:
    """Count rows, cells, formulas, shared strings and tags of one XML part, chunk by chunk.

    Counting is by tag bytes (regular expressions, numpy and bytes methods, at C speed), and a
    limit passed is refused at once: the rest of the part is never inflated.

    Args:
        path: The workbook, for messages.
        archive: The open workbook.
        member: The part to scan.
        where: The part, for messages ("sheet 'Demand'").
        sheet: The sheet's title when the part is a worksheet: its limits are checked.
        at_open: Stop at ``<sheetData>`` when a ``<dimension>`` element came before it (the
            reader then reads no further when it opens the workbook); the scan is then not
            complete.
    """
    scan = _PartScan()
    in_row = 0
    text_run = 0
    carry = b""
    state = 0  # 0: before <sheetData>, 1: inside, 2: after
    dimension = False
    with archive.open(member) as handle:
        while True:
            chunk = handle.read(_XLSX_CHUNK)
            data = carry + chunk
            carry = b""
            if chunk:
                # A tag cut at the chunk's end is counted with the next chunk.
                cut = data.rfind(b"<", max(0, len(data) - 256))
                if cut > 0:
                    data, carry = data[:cut], data[cut:]
            opens = np.flatnonzero(np.frombuffer(data, dtype=np.uint8) == 60)
            if opens.size:
                longest = max(text_run + int(opens[0]), int(np.diff(opens).max(initial=0)))
                text_run = len(data) - int(opens[-1])
            else:
                longest = text_run = text_run + len(data)
            if longest > _XLSX_MAX_TEXT_BYTES:
                fail(
                    path,
                    f"{where} holds a text of more than {_XLSX_MAX_TEXT_BYTES >> 20} MB in one "
                    "piece; an Excel cell holds at most 32,767 characters.",
                    _XLSX_DAMAGED_HINT,
                )
            found = b"".join(_XML_ELEMENT.findall(data))
            if found:
                scan.formulas = scan.formulas or b"f" in found
                scan.strings += found.count(b"si")
                cells = found.replace(b"f", b"").replace(b"si", b"")
                parts = cells.split(b"row")
                in_row += len(parts[0])
                if len(parts) > 1:
                    widest = max(map(len, parts[1:-1]), default=0)
                    scan.widest = max(scan.widest, in_row, widest)
                    in_row = len(parts[-1])
                scan.rows += len(parts) - 1
                scan.cells += len(cells) - 3 * (len(parts) - 1)
            # Tags outside and inside <sheetData>, by position.
            position = 0
            while True:
                if state == 0:
                    match = _SHEET_DATA.search(data, position)
                    end = match.start() if match else len(data)
                    dimension = dimension or bool(_DIMENSION.search(data, position, end))
                    scan.outside += _between(opens, position, end)
                    if match is None:
                        break
                    state = 2 if match.group(1) or match.group(2) == b"/" else 1
                    position = match.end()
                    if at_open and dimension:
                        scan.complete = False
                        return scan
                elif state == 1:
                    match = _SHEET_DATA_END.search(data, position)
                    end = match.start() if match else len(data)
                    scan.tags += _between(opens, position, end)
                    if match is None:
                        break
                    state, position = 2, match.start()
                else:
                    scan.outside += _between(opens, position, len(data))
                    break
            if sheet is not None:
                _check_sheet_scan(path, scan, max(scan.widest, in_row), sheet)
            elif scan.strings > XLSX_MAX_CELLS:
                return scan
            if not chunk:
                break
    scan.widest = max(scan.widest, in_row)
    return scan


def _between(positions: np.ndarray, start: int, end: int) -> int:
    """How many of the sorted ``positions`` are in ``[start, end)``."""
    return int(np.searchsorted(positions, end) - np.searchsorted(positions, start))


def _check_sheet_scan(path: Path, scan: _PartScan, widest: int, sheet: str) -> None:
    """Refuse a sheet whose counts so far pass a limit."""
    if scan.rows > XLSX_MAX_ROWS:
        _too_many_rows(path, sheet)
    if widest > XLSX_MAX_COLUMNS:
        fail(
            path,
            f"a row of sheet '{sheet}' has more than {XLSX_MAX_COLUMNS:,} cells, the most an "
            "Excel sheet row holds.",
            _XLSX_TOO_LARGE_HINT,
        )
    if scan.cells > XLSX_MAX_CELLS:
        _too_many_cells(path, sheet)
    # A cell is at most a few tags (<c><f/><v></v></c>, <c><is><t></t></is></c>); tags beyond
    # that are elements the reader keeps one object each for.
    if scan.tags > _XLSX_TAGS_PER_CELL * scan.cells + 2 * scan.rows + _XLSX_MAX_OTHER_TAGS:
        fail(
            path,
            f"sheet '{sheet}' holds far more XML elements than its {scan.rows:,} rows and "
            f"{scan.cells:,} cells need.",
            _XLSX_DAMAGED_HINT,
        )
    if scan.outside > _XLSX_MAX_OTHER_TAGS:
        fail(
            path,
            f"sheet '{sheet}' holds more than {_XLSX_MAX_OTHER_TAGS:,} XML tags around its cells "
            "(column widths, merged ranges, formatting, links), more than triage reads.",
            _XLSX_TOO_LARGE_HINT,
        )


def _pick_sheet(path: Path, book: Any, sheet: str | None, notices: list[str]) -> Any:
    sheets = list(book.worksheets)
    listing = ", ".join(
        f"'{ws.title}'" + ("" if ws.sheet_state == "visible" else f" ({ws.sheet_state})")
        for ws in sheets
    )
    if sheet is not None:
        chosen = [ws for ws in sheets if ws.title == sheet] or [
            ws for ws in sheets if ws.title.lower() == sheet.strip().lower()
        ]
        if not chosen:
            fail(
                path,
                f"there is no sheet named '{sheet}'. Sheets: {listing}.",
                "Pass one of these names with --sheet.",
            )
        return chosen[0]
    visible = [ws for ws in sheets if ws.sheet_state == "visible"]
    if not visible:
        fail(
            path,
            f"the workbook has no visible sheet. Sheets: {listing}.",
            "Choose a sheet with --sheet.",
        )
    chosen = visible[0]
    if chosen is not sheets[0]:
        skipped = [ws.title for ws in sheets[: sheets.index(chosen)]]
        notices.append(
            f"Sheet {quote_list(skipped)} is hidden and was skipped; reading the first "
            f"visible sheet '{chosen.title}'."
        )
    if len(visible) > 1:
        notices.append(
            f"The workbook has {len(visible)} visible sheets; reading '{chosen.title}'. "
            "Choose another with --sheet."
        )
    return chosen


def _column_letter(number: int) -> str:
    letters = ""
    while number:
        number, rest = divmod(number - 1, 26)
        letters = chr(65 + rest) + letters
    return letters


_PLAIN_CELLS = (int, float, bool, dt.datetime, dt.date, dt.time, dt.timedelta, type(None))


def _is_formula(value: Any) -> bool:
    """A cell value read with ``data_only=False``: formulas are '=...' text or formula objects."""
    if isinstance(value, str):
        return value.startswith("=")
    return not isinstance(value, _PLAIN_CELLS)


def _check_formulas(
    path: Path,
    sheet: str,
    data: dict[int, pd.Series],
    plan: ColumnPlan,
    header_at: int,
    notices: list[str],
) -> None:
    """Formula cells: with no stored result they are an error; a stored 0 in a number column is
    reported, since a program that writes formulas without calculating them stores 0."""
    import openpyxl

    n_rows = len(next(iter(data.values()))) if data else 0
    width = len(data)
    marked: dict[int, list[int]] = {}
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", category=UserWarning, module="openpyxl")
        try:
            book = openpyxl.load_workbook(path, read_only=True, data_only=False, keep_links=False)
        except _XLSX_DAMAGED as exc:
            _unopenable(path, exc)
        try:
            worksheet = book[sheet]
            worksheet.reset_dimensions()
            # Streamed like the values: only the positions of formula cells are kept.
            for index, row in enumerate(_sheet_rows(path, worksheet, sheet)):
                offset = index - header_at - 1
                if offset >= n_rows:
                    break
                if offset < 0:
                    continue
                for position, value in enumerate(row[:width]):
                    if value is not None and _is_formula(value):
                        marked.setdefault(position, []).append(offset)
        finally:
            book.close()
    unset: list[str] = []
    zeros: list[str] = []
    for position, offsets in marked.items():
        column = data[position]
        is_formula = np.zeros(len(column), dtype=bool)
        is_formula[offsets] = True
        rows = np.flatnonzero(is_formula & pd.isna(column).to_numpy()) + header_at + 2
        if rows.size:
            unset.append(f"column {column_label(plan, position)} {format_rows(rows.tolist())}")
        if schema.is_number_column(plan.roles[position]):
            values = column.tolist()
            is_zero = np.array([v == 0 and not isinstance(v, bool) for v in values], dtype=bool)
            zero = np.flatnonzero(is_formula & is_zero) + header_at + 2
            if zero.size:
                zeros.append(f"column {column_label(plan, position)} {format_rows(zero.tolist())}")
    if unset:
        fail(
            path,
            f"sheet '{sheet}' has formula cells with no saved result (the workbook was "
            f"written by a program and never calculated): {'; '.join(unset)}.",
            "Open the file in Excel or LibreOffice and save it, so that the results are "
            "stored; or write values instead of formulas.",
        )
    if zeros:
        notices.append(
            f"Formula cells whose saved result is 0: {'; '.join(zeros)}. If the workbook was "
            "written by a program and never opened in a spreadsheet, these zeros may not be real "
            "results: open and save it in Excel or LibreOffice."
        )
