"""Read a portfolio file (CSV, xlsx or Parquet) into the canonical long frame.

One function, :func:`load_frame`, turns a planner's file into a :class:`LoadedFrame`: the columns
of :mod:`triage.core.schema` with fixed types, rows in file order, plus what the user should know
about the file (notices). Anything that would make the numbers wrong stops the load with a
:class:`~triage.core.errors.LoadError` naming the file, the column, the rows, what is wrong and
what to do. Checks that need the whole portfolio (duplicate rows, calendar, forward periods)
belong to the builder; this module checks cells, columns and lines, vectorised.

Types of the canonical frame:

* ``item``: ``str`` (CSV, xlsx) or ``category`` with ``str`` categories (Parquet), text exactly
  as written: ``NA``, ``00123``, ``1e5`` and leading spaces survive. Never empty.
* ``location`` (optional): ``category`` with ``str`` categories. Never empty.
* ``period``: ``datetime64[ns]`` at midnight, from ISO dates (``YYYY-MM-DD``, ``YYYY-MM``) or
  real date cells. Nothing else is guessed.
* ``demand``, ``forecast``: ``float64``; NaN means missing (empty cell or a token in
  :data:`~triage.core.schema.NUMERIC_MISSING`), never zero. Finite; negative allowed.
* ``price`` (optional): ``float64``, NaN allowed, finite, not negative.
* ``lag`` (optional): ``int64``, whole numbers from 0 up, never missing.
* every other column: a text attribute, ``category`` with ``str`` categories, missing as ``""``.

Control characters are replaced at load, in every text cell and header, so that no byte from the
file can drive the terminal (reliability.md §3.2): C0 ``\\x00``-``\\x1f`` become the Unicode
control pictures ``␀``-``␟`` (tab ``␉``, line feed ``␊``, escape ``␛``), DEL becomes ``␡`` and
the C1 range ``\\x80``-``\\x9f`` becomes ``�``. Ids are one-line, so tabs and line breaks are
replaced too.

File row numbers in messages count the header as row 1, as a spreadsheet does. In a CSV file a
row is a record: it is the line number unless a quoted cell holds a line break.
"""

from __future__ import annotations

import calendar
import codecs
import csv
import datetime as dt
import io
import itertools
import re
import warnings
import zipfile
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, NoReturn

import numpy as np
import pandas as pd

from triage.core import schema
from triage.core.errors import LoadError, TriageError, format_rows

__all__ = ["SUFFIXES", "LoadedFrame", "load_frame", "parse_column_map"]

#: File name endings triage reads, and the reader used for each.
SUFFIXES: dict[str, str] = {
    ".csv": "csv",
    ".xlsx": "xlsx",
    ".xlsm": "xlsx",
    ".parquet": "parquet",
    ".pq": "parquet",
}

# C0, DEL and C1, written with escapes so the pattern itself holds no control bytes.
_CONTROL_PATTERN = r"[\x00-\x1f\x7f-\x9f]"
_CONTROL_RE = re.compile(_CONTROL_PATTERN)
_CONTROL_TABLE: dict[int, str] = {
    **{code: chr(0x2400 + code) for code in range(0x20)},
    0x7F: "\u2421",
    **{code: "\ufffd" for code in range(0x80, 0xA0)},
}
# Trojan Source bidi controls (CVE-2021-42574) are flagged in ids, not replaced.
# Built from code points: pyarrow's RE2 engine has no \u escapes (pandas would fall back to
# Python's re, per cell), and bidi characters must not appear literally in source code.
_BIDI_PATTERN = f"[{chr(0x202A)}-{chr(0x202E)}{chr(0x2066)}-{chr(0x2069)}]"
_SUSPECT_PATTERN = f"{_CONTROL_PATTERN}|{_BIDI_PATTERN}"

# float64 holds every whole number exactly only up to 2**53 (IEEE 754 binary64, 53-bit significand).
_MAX_MAGNITUDE = float(2**53)
_ISO_DATE = re.compile(r"^(\d{4})-(\d{2})(?:-(\d{2}))?(?:[T ]00:00(?::00(?:\.0+)?)?)?$")
_FIRST_YEAR, _LAST_YEAR = 1900, 2199
_NUMBER = r"^[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?$|^[+-]?(?:inf|infinity)$"
_INTEGER = r"^[+-]?\d+(?:\.0*)?$"
_EXCEL_ERRORS = ("#DIV/0!", "#VALUE!", "#REF!", "#NAME?", "#NUM!", "#NULL!", "#N/A", "#SPILL!")
_CHUNK = 1 << 23
_HEADER_BYTES = 1 << 20
_MAX_XLSX_UNPACKED = 2 << 30
_SHOWN = 3
#: Column order of the canonical frame; attributes follow in file order.
_ORDER: tuple[str, ...] = (
    schema.ITEM,
    schema.LOCATION,
    schema.PERIOD,
    schema.LAG,
    schema.DEMAND,
    schema.FORECAST,
    schema.PRICE,
)


@dataclass(frozen=True)
class LoadedFrame:
    """A validated portfolio in canonical long form, and what the user should know about it.

    Attributes:
        frame: Canonical columns (see the module docstring for types), rows in file order,
            ``RangeIndex`` 0..n-1.
        path: The file that was read.
        first_row: File row number of frame row 0 (CSV and xlsx: 2 when the header is row 1;
            Parquet: 1).
        attributes: Names of the extra text columns kept, in file order.
        notices: Things worth telling the user that are not errors.
        sheet: The xlsx sheet read, or None for other formats.
    """

    frame: pd.DataFrame
    path: Path
    first_row: int
    attributes: tuple[str, ...]
    notices: tuple[str, ...]
    sheet: str | None = None
    #: File row number of every frame row, when blank rows were skipped (None: consecutive).
    _file_rows: np.ndarray | None = field(default=None, repr=False, compare=False)

    def rows(self, index: Any) -> list[int]:
        """Map frame positions to file row numbers, for messages.

        Args:
            index: One position, a sequence or array of positions, or a boolean mask as long as
                the frame.

        Returns:
            The file row numbers, in the order given.
        """
        positions = _positions(index, len(self.frame))
        if self._file_rows is not None:
            return self._file_rows[positions].tolist()
        return (positions + self.first_row).tolist()


def parse_column_map(text: str) -> dict[str, str]:
    """Parse the ``--columns`` option: ``'demand=qty_shipped,item=sku'``.

    Each pair names a canonical column, then the file's header for it. Canonical names are matched
    case-insensitively; the header is taken as written (spaces around it are dropped).

    Args:
        text: Comma-separated ``canonical=header`` pairs.

    Returns:
        Canonical name -> file header, e.g. ``{'demand': 'qty_shipped', 'item': 'sku'}``.

    Raises:
        TriageError: On bad syntax, an unknown canonical name or a name given twice.
    """
    hint = (
        "Write pairs canonical=header separated by commas, e.g. "
        f"--columns demand=qty_shipped,item=sku. Canonical names: {', '.join(schema.KNOWN)}."
    )
    mapping: dict[str, str] = {}
    pairs = [part.strip() for part in text.split(",")]
    if not any(pairs):
        raise TriageError("--columns is empty.", hint=hint)
    for pair in pairs:
        if not pair:
            raise TriageError(
                f"--columns {text!r} has an empty pair (two commas in a row).", hint=hint
            )
        name, sep, header = pair.partition("=")
        name, header = name.strip().lower(), header.strip()
        if not sep or not name or not header:
            raise TriageError(
                f"--columns: {pair!r} is not of the form canonical=header.", hint=hint
            )
        if name not in schema.KNOWN:
            raise TriageError(f"--columns: {name!r} is not a column triage knows.", hint=hint)
        if name in mapping:
            raise TriageError(f"--columns: {name!r} is given twice.", hint=hint)
        mapping[name] = header
    return mapping


def load_frame(
    path: str | Path, *, columns: dict[str, str] | None = None, sheet: str | None = None
) -> LoadedFrame:
    """Read and validate a portfolio file.

    Args:
        path: A ``.csv`` (UTF-8, with or without BOM, comma-separated), ``.xlsx``/``.xlsm`` or
            ``.parquet`` file.
        columns: Canonical name -> file header, applied before headers are matched by name
            (see :func:`parse_column_map`).
        sheet: The xlsx sheet to read; default the first visible one.

    Returns:
        The canonical frame with its file row numbers and notices.

    Raises:
        LoadError: The file cannot be read, or a cell, column or line is not usable as it is.
    """
    file = Path(path)
    kind = _file_kind(file)
    if sheet is not None and kind != "xlsx":
        _fail(
            file,
            f"--sheet {sheet!r} was given, but this is a {kind} file, which has no sheets.",
            "Leave out --sheet, or point to the .xlsx file.",
        )
    mapping = _checked_mapping(file, columns)
    notices: list[str] = []
    sheet_used: str | None = None
    try:
        if kind == "csv":
            raw = _read_csv(file, mapping, notices)
        elif kind == "parquet":
            raw = _read_parquet(file, mapping, notices)
        else:
            raw, sheet_used = _read_xlsx(file, mapping, sheet, notices)
    except OSError as exc:
        _fail(
            file,
            f"the file cannot be read ({exc.strerror or exc}).",
            "Check that you may read the file and that no other program has it locked.",
        )
    return _build(file, raw, notices, sheet_used)


# --- shared plumbing -----------------------------------------------------------------------------


@dataclass
class _Plan:
    """What each file column becomes: a canonical name, an attribute name, or nothing."""

    headers: list[str]
    roles: list[str | None]
    attributes: dict[int, str]
    unnamed: list[int]


@dataclass
class _Raw:
    """Columns as read, by file position, before validation."""

    plan: _Plan
    data: dict[int, pd.Series]
    first_row: int
    file_rows: np.ndarray | None = None
    blank_rows_possible: bool = True


def _fail(path: Path, message: str, hint: str | None = None) -> NoReturn:
    raise LoadError(path, message, hint=hint)


def _positions(index: Any, n: int) -> np.ndarray:
    array = np.asarray(index.to_numpy() if hasattr(index, "to_numpy") else index)
    if array.dtype == bool:
        if array.shape != (n,):
            raise ValueError(f"boolean mask of length {array.size}, frame has {n} rows")
        return np.flatnonzero(array)
    return np.atleast_1d(array).astype(np.int64)


def _file_kind(path: Path) -> str:
    suffix = path.suffix.lower()
    if not path.exists():
        _fail(path, "file not found.", f"Check the path (the current folder is {Path.cwd()}).")
    if path.is_dir():
        _fail(path, "this is a folder, not a file.", "Give the path of the portfolio file itself.")
    if suffix == ".xls":
        _fail(
            path,
            "this is the old Excel .xls format, which triage does not read.",
            "Open it in Excel or LibreOffice and save it as .xlsx (or as CSV UTF-8).",
        )
    if suffix not in SUFFIXES:
        shown = f"'{suffix}'" if suffix else "no extension"
        _fail(
            path,
            f"unknown file type ({shown}); triage reads .csv, .xlsx/.xlsm and .parquet.",
            "Save the file in one of these formats, or rename it if it already is one.",
        )
    return SUFFIXES[suffix]


def _checked_mapping(path: Path, columns: dict[str, str] | None) -> dict[str, str]:
    if not columns:
        return {}
    mapping: dict[str, str] = {}
    for name, header in columns.items():
        key = name.strip().lower()
        if key not in schema.KNOWN:
            _fail(
                path,
                f"--columns names {name!r}, which is not a column triage knows.",
                f"Canonical names are {', '.join(schema.KNOWN)}.",
            )
        mapping[key] = _sanitize_str(str(header)).strip()
    return mapping


def _sanitize_str(text: str) -> str:
    return text.translate(_CONTROL_TABLE)


def _plural(count: int, noun: str) -> str:
    return f"{count} {noun}" + ("" if count == 1 else "s")


def _quote_list(names: Sequence[str], limit: int = 30) -> str:
    shown = ", ".join(f"'{n}'" for n in names[:limit])
    return shown + (f" and {len(names) - limit} more" if len(names) > limit else "")


def _label(plan: _Plan, position: int) -> str:
    header, role = plan.headers[position], plan.roles[position]
    if role is None or role not in schema.KNOWN or header == role:
        return f"'{header}'"
    return f"'{header}' ({role})"


def _plan_columns(
    path: Path, raw_headers: Sequence[Any], mapping: dict[str, str], notices: list[str]
) -> _Plan:
    """Match the file's headers to canonical names; apply ``--columns`` first."""
    stripped = ["" if h is None else str(h).strip() for h in raw_headers]
    headers = [_sanitize_str(h) for h in stripped]
    dirty = sum(a != b for a, b in zip(stripped, headers, strict=True))
    if dirty:
        notices.append(
            f"{dirty} column {'name' if dirty == 1 else 'names'} contained control characters; "
            "they are shown as visible symbols (␀-␟, ␡, �)."
        )
    seen: dict[str, int] = {}
    for position, header in enumerate(headers):
        if not header:
            continue
        if header in seen:
            _fail(
                path,
                f"two columns are named '{header}' (columns {seen[header] + 1} and "
                f"{position + 1}).",
                "Rename or delete one of them, so that every column name is used once.",
            )
        seen[header] = position
    found = _quote_list([h for h in headers if h])
    roles: list[str | None] = [None] * len(headers)
    assigned: set[str] = set()
    for name, wanted in mapping.items():
        matches = [i for i, h in enumerate(headers) if h == wanted]
        if not matches:
            matches = [i for i, h in enumerate(headers) if h.lower() == wanted.lower()]
        if len(matches) != 1:
            problem = "no column" if not matches else "more than one column"
            _fail(
                path,
                f"--columns {name}={wanted}: {problem} named '{wanted}'. Columns found: {found}.",
                "Use one of the column names above on the right of '='.",
            )
        if roles[matches[0]] is not None:
            _fail(
                path,
                f"--columns maps both {roles[matches[0]]} and {name} to '{wanted}'.",
                "Map each file column to one canonical name.",
            )
        roles[matches[0]] = name
        assigned.add(name)
    ignored: list[str] = []
    for name in schema.KNOWN:
        matches = [i for i, h in enumerate(headers) if h.lower() == name and roles[i] is None]
        if name in assigned:
            ignored += [headers[i] for i in matches]
            for i in matches:
                roles[i] = ""
            continue
        if len(matches) > 1:
            _fail(
                path,
                f"columns {_quote_list([headers[i] for i in matches])} all match "
                f"'{name}' (names are matched ignoring case).",
                f"Rename or delete all but one, or choose one with --columns {name}=<column>.",
            )
        if matches:
            roles[matches[0]] = name
    if ignored:
        notices.append(
            f"Column {_quote_list(ignored)} was not read: --columns maps that name to another "
            "column."
        )
    missing = [name for name in schema.REQUIRED if name not in roles]
    if missing:
        word = "column" if len(missing) == 1 else "columns"
        _fail(
            path,
            f"required {word} {', '.join(missing)} not found. Columns found: {found}.",
            f"Name the columns {', '.join(schema.REQUIRED)} in the header, or say which column "
            f"is which with --columns {missing[0]}=<your column> "
            "(pairs canonical=header, separated by commas).",
        )
    attributes: dict[int, str] = {}
    unnamed: list[int] = []
    for position, header in enumerate(headers):
        if roles[position] == "":
            roles[position] = None
        elif roles[position] is None and header:
            attributes[position] = header
        elif roles[position] is None:
            unnamed.append(position)
    return _Plan(headers, roles, attributes, unnamed)


# --- CSV -----------------------------------------------------------------------------------------


@dataclass
class _CsvScan:
    """Byte counts from one pass over a CSV file."""

    size: int
    commas: int
    has_quotes: bool
    newline: int
    head: bytes


def _prescan_csv(path: Path) -> _CsvScan:
    """Check the encoding and count delimiters in one streaming pass (C-speed bytes methods)."""
    decoder = codecs.getincrementaldecoder("utf-8")("strict")
    commas = 0
    has_quotes = has_lf = has_cr = False
    size = 0
    head = b""
    with path.open("rb") as handle:
        while chunk := handle.read(_CHUNK):
            if len(head) < _HEADER_BYTES:
                head += chunk[: _HEADER_BYTES - len(head)]
            if not size and chunk.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
                _fail(
                    path,
                    "the file is UTF-16 (Excel 'Unicode Text'), not UTF-8.",
                    "Save it from Excel as 'CSV UTF-8 (Comma delimited)'.",
                )
            # An ASCII chunk needs no decoding unless a multi-byte character straddles into it.
            if not chunk.isascii() or decoder.getstate()[0]:
                try:
                    decoder.decode(chunk)
                except UnicodeDecodeError:
                    _not_utf8(path)
            commas += chunk.count(b",")
            has_quotes = has_quotes or b'"' in chunk
            has_lf = has_lf or b"\n" in chunk
            has_cr = has_cr or b"\r" in chunk
            size += len(chunk)
    try:
        decoder.decode(b"", final=True)
    except UnicodeDecodeError:
        _not_utf8(path)
    newline = 13 if has_cr and not has_lf else 10
    return _CsvScan(size, commas, has_quotes, newline, head)


def _not_utf8(path: Path) -> NoReturn:
    """Locate the first undecodable byte exactly (error path: the whole file is read)."""
    data = path.read_bytes()
    try:
        data.decode("utf-8")
    except UnicodeDecodeError as exc:
        offset = exc.start
    else:  # pragma: no cover - the streaming check and this one agree
        offset = 0
    line = data.count(b"\n", 0, offset) + 1
    start = data.rfind(b"\n", 0, offset) + 1
    end = data.find(b"\n", offset)
    raw_line = data[start : end if end != -1 else len(data)][:200].rstrip(b"\r")
    try:
        preview = _sanitize_str(raw_line.decode("cp1252"))
        guess = (
            " It looks like Windows-1252 (what Excel's 'CSV (Comma delimited)' writes); "
            f"read that way, line {line} is: '{preview}'."
        )
    except UnicodeDecodeError:
        guess = " The encoding could not be recognised."
    _fail(
        path,
        f"the file is not UTF-8: byte 0x{data[offset]:02X} at byte offset {offset} "
        f"(line {line}) is not valid UTF-8.{guess}",
        "Re-save the file as UTF-8: in Excel choose 'CSV UTF-8 (Comma delimited)'; in a text "
        "editor choose the encoding UTF-8.",
    )


def _csv_header(path: Path, scan: _CsvScan) -> list[str]:
    head = scan.head[3:] if scan.head.startswith(codecs.BOM_UTF8) else scan.head
    if not head.strip():
        _fail(
            path,
            "the file is empty.",
            "Export the portfolio again; the file has no header and no rows.",
        )
    text = codecs.getincrementaldecoder("utf-8")().decode(head)
    if scan.newline == 13:
        text = text.replace("\r", "\n")
    # The sample holds at most the first MiB; a long cell in it must not stop the read.
    limit = csv.field_size_limit()
    csv.field_size_limit(max(limit, len(text) + 1))
    try:
        return _parse_csv_header(path, text)
    finally:
        csv.field_size_limit(limit)


def _parse_csv_header(path: Path, text: str) -> list[str]:
    reader = csv.reader(io.StringIO(text, newline=""))
    header = next(reader, [])
    if not header:
        _fail(
            path,
            "the first line is empty; the header must be on line 1.",
            "Delete the empty lines above the header.",
        )
    if len(header) == 1 and (";" in header[0] or "\t" in header[0]):
        sep, name = (";", "semicolon") if ";" in header[0] else ("\t", "tab")
        body = text[len(header[0]) :]
        decimal = re.search(r"\d,\d", body) if sep == ";" else None
        detail = f" with decimal commas (e.g. '{decimal.group(0)}')" if decimal else ""
        _fail(
            path,
            f"only 1 column was found and its header '{_sanitize_str(header[0][:80])}' "
            f"contains '{_sanitize_str(sep)}': this looks like a {name}-separated "
            f"file{detail}. triage reads comma-separated CSV with '.' as decimal point.",
            "Save it from Excel as 'CSV UTF-8 (Comma delimited)' with '.' as the decimal "
            "separator (Windows region settings), or save it as .xlsx and load that.",
        )
    # Checked before the columns are matched: a missing header name would otherwise show up as
    # a missing required column. The last record of the sample may be cut off, so it is left out.
    sample = [len(row) for row in itertools.islice(reader, 6)][:5]
    if sample and sample[0] > len(header):
        short = len(set(sample)) == 1
        bad = [(line, k) for line, k in enumerate(sample, start=2) if k != len(header)]
        _raise_ragged(path, bad, len(header), header_short=short)
    return header


def _csv_dtypes(plan: _Plan) -> tuple[dict[str, Any], dict[str, list[str]]]:
    dtypes: dict[str, Any] = {}
    na_values: dict[str, list[str]] = {}
    for position, role in enumerate(plan.roles):
        name = f"c{position}"
        if role in schema.NUMERIC:
            dtypes[name] = "float64"
            na_values[name] = list(schema.NUMERIC_MISSING)
        elif role == schema.ITEM:
            dtypes[name] = str
        else:
            # Few distinct values (period, lag, location, attributes): the parser builds the
            # categories itself, which is faster than str and makes checks per distinct value.
            dtypes[name] = "category"
    return dtypes, na_values


def _read_csv(path: Path, mapping: dict[str, str], notices: list[str]) -> _Raw:
    scan = _prescan_csv(path)
    header = _csv_header(path, scan)
    plan = _plan_columns(path, header, mapping, notices)
    width = len(header)
    names = [f"c{i}" for i in range(width)]
    dtypes, na_values = _csv_dtypes(plan)

    def read(dtype: dict[str, Any], na: dict[str, list[str]]) -> pd.DataFrame:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", pd.errors.ParserWarning)
            try:
                frame = pd.read_csv(
                    path,
                    sep=",",
                    header=0,
                    names=names,
                    index_col=False,
                    dtype=dtype,
                    na_values=na,
                    keep_default_na=False,
                    skip_blank_lines=False,
                    encoding="utf-8-sig",
                    encoding_errors="strict",
                    engine="c",
                )
            except pd.errors.ParserError as exc:
                _ragged(path, scan, width, str(exc))
        if any(issubclass(w.category, pd.errors.ParserWarning) for w in caught):
            # index_col=False drops surplus fields of a first data row with only a warning.
            _ragged(path, scan, width, "")
        return frame

    try:
        frame = read(dtypes, na_values)
    except ValueError:
        # A numeric column holds text: read those columns as text and report the cells.
        for position, role in enumerate(plan.roles):
            if role in schema.NUMERIC:
                dtypes[f"c{position}"] = str
        try:
            frame = read(dtypes, {})
        except ValueError as exc:
            _fail(
                path,
                f"the file cannot be parsed as CSV ({exc}).",
                "Check that the file is comma-separated with one header line.",
            )
    expected = (width - 1) * (len(frame) + 1)
    if scan.has_quotes or scan.commas != expected:
        _check_field_counts(path, scan, width, len(frame) + 1)
    data = {position: frame[f"c{position}"] for position in range(width)}
    return _Raw(plan, data, first_row=2)


def _ragged(path: Path, scan: _CsvScan, width: int, parser_message: str) -> NoReturn:
    bad = _csv_module_counts(path, scan, width)
    if bad is None:
        bad = _numpy_counts(path, scan, width)[0]
    if not bad:
        match = re.search(r"Expected (\d+) fields in line (\d+), saw (\d+)", parser_message)
        if match:
            bad = [(int(match.group(2)), int(match.group(3)))]
        elif "EOF inside string" in parser_message:
            start = re.search(r"row (\d+)", parser_message)
            # pandas counts records from 0 at the header; file rows count it as 1.
            where = f" (the cell starts in row {int(start.group(1)) + 1})" if start else ""
            _fail(
                path,
                f"a quoted cell is never closed{where}: a '\"' is missing.",
                "Close the quote, or remove the stray '\"' character.",
            )
        else:
            _fail(
                path,
                f"the file cannot be parsed as CSV ({parser_message.strip()}).",
                "Check that the file is comma-separated with one header line.",
            )
    _raise_ragged(path, bad, width)


def _raise_ragged(
    path: Path, bad: list[tuple[int, int]], width: int, *, header_short: bool = False
) -> NoReturn:
    line, fields = bad[0]
    if header_short:
        _fail(
            path,
            f"line 2 has {fields} fields, expected {width}: the header has fewer names "
            "than the data rows have cells, so a column name is probably missing.",
            "Give every column a name in the header (line 1), or remove the extra cells.",
        )
    listed = "; ".join(f"line {n} has {k}" for n, k in bad[1 : _SHOWN + 1])
    more = f" and {len(bad) - _SHOWN - 1} more lines" if len(bad) > _SHOWN + 1 else ""
    others = f" Also: {listed}{more}." if listed else ""
    _fail(
        path,
        f"line {line} has {_plural(fields, 'field')}, expected {width} (one per header "
        f"column).{others}",
        "Put cells that contain commas in double quotes, and give every line one cell per "
        "header column (empty cells are fine: write nothing between the commas).",
    )


def _check_field_counts(path: Path, scan: _CsvScan, width: int, records: int) -> None:
    """Find lines with too few fields, which pandas pads silently with empty cells."""
    bad, total, balanced = _numpy_counts(path, scan, width)
    if scan.has_quotes and (bad or not balanced or total != records):
        # A quote inside an unquoted cell (12" pipe) is plain text to the parser but flips the
        # quote parity of the byte scan: confirm with the csv module, which parses like pandas.
        confirmed = _csv_module_counts(path, scan, width)
        bad = bad if confirmed is None else confirmed
    if bad:
        _raise_ragged(path, bad, width)


def _numpy_counts(
    path: Path, scan: _CsvScan, width: int
) -> tuple[list[tuple[int, int]], int, bool]:
    """Fields per record from byte positions of commas, line ends and quotes, chunk by chunk.

    Returns the records (numbered from 1 at the header) whose field count is not ``width``, up to
    100 per chunk, the number of records, and whether the quotes balance. Empty lines are skipped.
    """
    bad: list[tuple[int, int]] = []
    records = 0
    carry = 0
    parity = 0
    last_newline = -1
    last_byte = 0
    offset = 0
    newline = scan.newline
    with path.open("rb") as handle:
        while chunk := handle.read(_CHUNK):
            array = np.frombuffer(chunk, dtype=np.uint8)
            ends = np.flatnonzero(array == newline)
            commas = np.flatnonzero(array == 44)
            if scan.has_quotes:
                quotes = np.flatnonzero(array == 34)
                if quotes.size:
                    ends = ends[((np.searchsorted(quotes, ends) + parity) & 1) == 0]
                    commas = commas[((np.searchsorted(quotes, commas) + parity) & 1) == 0]
                    parity = (parity + quotes.size) & 1
            if ends.size:
                before = np.searchsorted(commas, ends)
                fields = np.diff(before, prepend=0) + 1
                fields[0] += carry
                carry = commas.size - int(before[-1])
                starts = np.concatenate(([last_newline], ends[:-1] + offset))
                length = ends + offset - starts - 1
                previous = np.where(ends > 0, array[np.maximum(ends - 1, 0)], last_byte)
                blank = (length == 0) | ((length == 1) & (previous == 13))
                wrong = np.flatnonzero((fields != width) & ~blank)
                bad += [(records + int(i) + 1, int(fields[i])) for i in wrong[:100]]
                records += ends.size
                last_newline = int(ends[-1]) + offset
            else:
                carry += commas.size
            last_byte = int(array[-1])
            offset += len(chunk)
    tail = offset - last_newline - 1
    if tail > 1 or (tail == 1 and last_byte != 13):
        records += 1
        if carry + 1 != width:
            bad.append((records, carry + 1))
    return bad, records, parity == 0


def _csv_module_counts(path: Path, scan: _CsvScan, width: int) -> list[tuple[int, int]] | None:
    limit = csv.field_size_limit()
    csv.field_size_limit(max(limit, scan.size + 1))
    try:
        with path.open(encoding="utf-8-sig", newline="") as handle:
            source = (
                handle if scan.newline == 10 else io.StringIO(handle.read().replace("\r", "\n"))
            )
            counts = np.fromiter(map(len, csv.reader(source)), dtype=np.int64)
    except csv.Error:
        return None
    finally:
        csv.field_size_limit(limit)
    wrong = np.flatnonzero((counts != width) & (counts != 0))
    return [(int(i) + 1, int(counts[i])) for i in wrong[:100]]


# --- Parquet -------------------------------------------------------------------------------------


def _read_parquet(path: Path, mapping: dict[str, str], notices: list[str]) -> _Raw:
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        arrow_schema = pq.read_schema(path)
    except (pa.ArrowException, OSError) as exc:
        _fail(
            path,
            f"cannot read this as a Parquet file ({exc}).",
            "Check that the file is Parquet and not damaged; export it again if needed.",
        )
    # pandas stores an unnamed index as '__index_level_N__'; it is not data.
    keep = [
        i for i, f in enumerate(arrow_schema) if not re.fullmatch(r"__index_level_\d+__", f.name)
    ]
    fields = [arrow_schema.field(i) for i in keep]
    plan = _plan_columns(path, [f.name for f in fields], mapping, notices)
    for position, fld in enumerate(fields):
        kind = fld.type
        if pa.types.is_nested(kind) or pa.types.is_binary(kind) or pa.types.is_large_binary(kind):
            _fail(
                path,
                f"column {_label(plan, position)} holds {kind} values, not text, numbers or dates.",
                "Write the column as text, numbers or dates.",
            )
    text_roles = {schema.ITEM, schema.LOCATION, schema.PERIOD, schema.LAG, None}
    dictionary = [
        fld.name
        for position, fld in enumerate(fields)
        if plan.roles[position] in text_roles
        and (pa.types.is_string(fld.type) or pa.types.is_large_string(fld.type))
    ]
    try:
        table = pq.read_table(path, columns=[f.name for f in fields], read_dictionary=dictionary)
    except (pa.ArrowException, OSError) as exc:
        _fail(
            path,
            f"cannot read the Parquet data ({exc}).",
            "Check that the file is not damaged; export it again if needed.",
        )
    for position, fld in enumerate(table.schema):
        if pa.types.is_decimal(fld.type):
            table = table.set_column(position, fld.name, table.column(position).cast(pa.float64()))
    table = table.rename_columns([f"c{i}" for i in range(len(fields))])
    # One to_pandas call for the table converts the columns in parallel; split_blocks avoids
    # copying same-typed columns into one 2-D block.
    frame = table.to_pandas(date_as_object=False, ignore_metadata=True, split_blocks=True)
    data = {position: frame[f"c{position}"] for position in range(len(fields))}
    return _Raw(plan, data, first_row=1, blank_rows_possible=False)


# --- xlsx ----------------------------------------------------------------------------------------


def _read_xlsx(
    path: Path, mapping: dict[str, str], sheet: str | None, notices: list[str]
) -> tuple[_Raw, str]:
    import openpyxl
    from openpyxl.utils.exceptions import InvalidFileException

    _check_unpacked_size(path)
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", category=UserWarning, module="openpyxl")
        try:
            book = openpyxl.load_workbook(path, read_only=True, data_only=True, keep_links=False)
        except (zipfile.BadZipFile, OSError, KeyError, ValueError, InvalidFileException) as exc:
            _fail(
                path,
                f"cannot open this as an Excel workbook ({exc}).",
                "Check that it is an .xlsx file saved by Excel or LibreOffice, not damaged.",
            )
        try:
            worksheet = _pick_sheet(path, book, sheet, notices)
            worksheet.reset_dimensions()
            values = list(worksheet.iter_rows(values_only=True))
            sheet_path = getattr(worksheet, "_worksheet_path", None)
        finally:
            book.close()
    name = worksheet.title
    header_at = next((i for i, row in enumerate(values) if any(v is not None for v in row)), None)
    if header_at is None:
        _fail(path, f"sheet '{name}' is empty.", "Choose the sheet with the data via --sheet.")
    header_row = list(values[header_at])
    while header_row and header_row[-1] is None:
        header_row.pop()
    width = len(header_row)
    body = values[header_at + 1 :]
    for offset, row in enumerate(body):
        if len(row) > width and any(v is not None for v in row[width:]):
            column = width + next(i for i, v in enumerate(row[width:]) if v is not None) + 1
            _fail(
                path,
                f"sheet '{name}' row {header_at + offset + 2} has a value in column "
                f"{_column_letter(column)}, right of the last header cell: the header "
                "is shorter than the data.",
                "Give every column a name in the header row, or delete the extra cells.",
            )
    padded = [tuple(row[:width]) + (None,) * (width - len(row)) for row in body]
    columns = list(zip(*padded, strict=True)) if padded else [() for _ in range(width)]
    plan = _plan_columns(path, [_header_text(v) for v in header_row], mapping, notices)
    data = {
        i: pd.Series(np.array(col, dtype=object), dtype=object) for i, col in enumerate(columns)
    }
    if sheet_path is None or _sheet_has_formulas(path, sheet_path):
        _check_formulas(path, name, data, plan, header_at, notices)
    file_rows = np.arange(len(body), dtype=np.int64) + header_at + 2
    return _Raw(plan, data, first_row=header_at + 2, file_rows=file_rows), name


def _check_unpacked_size(path: Path) -> None:
    try:
        with zipfile.ZipFile(path) as archive:
            unpacked = sum(info.file_size for info in archive.infolist())
    except (zipfile.BadZipFile, OSError) as exc:
        _fail(
            path,
            f"cannot open this as an Excel workbook ({exc}).",
            "Check that it is an .xlsx file saved by Excel or LibreOffice, not damaged.",
        )
    if unpacked > _MAX_XLSX_UNPACKED:
        _fail(
            path,
            f"the workbook unpacks to {unpacked / 2**30:.1f} GB, more than triage reads "
            f"from xlsx ({_MAX_XLSX_UNPACKED / 2**30:.0f} GB).",
            "Save the data as CSV UTF-8 or Parquet instead.",
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
            _fail(
                path,
                f"there is no sheet named '{sheet}'. Sheets: {listing}.",
                "Pass one of these names with --sheet.",
            )
        return chosen[0]
    visible = [ws for ws in sheets if ws.sheet_state == "visible"]
    if not visible:
        _fail(
            path,
            f"the workbook has no visible sheet. Sheets: {listing}.",
            "Choose a sheet with --sheet.",
        )
    chosen = visible[0]
    if chosen is not sheets[0]:
        skipped = [ws.title for ws in sheets[: sheets.index(chosen)]]
        notices.append(
            f"Sheet {_quote_list(skipped)} is hidden and was skipped; reading the first "
            f"visible sheet '{chosen.title}'."
        )
    if len(visible) > 1:
        notices.append(
            f"The workbook has {len(visible)} visible sheets; reading '{chosen.title}'. "
            "Choose another with --sheet."
        )
    return chosen


def _header_text(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


def _column_letter(number: int) -> str:
    letters = ""
    while number:
        number, rest = divmod(number - 1, 26)
        letters = chr(65 + rest) + letters
    return letters


def _sheet_has_formulas(path: Path, member: str) -> bool:
    """Look for a formula element in the sheet XML without parsing it."""
    pattern = re.compile(rb"<(?:\w+:)?f[\s>/]")
    tail = b""
    try:
        with zipfile.ZipFile(path) as archive, archive.open(member.lstrip("/")) as handle:
            while chunk := handle.read(_CHUNK):
                if pattern.search(tail + chunk):
                    return True
                tail = chunk[-16:]
    except (KeyError, zipfile.BadZipFile, OSError):
        return True
    return False


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
    plan: _Plan,
    header_at: int,
    notices: list[str],
) -> None:
    """Formula cells: with no stored result they are an error; a stored 0 in a number column is
    reported, since a program that writes formulas without calculating them stores 0."""
    import openpyxl

    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", category=UserWarning, module="openpyxl")
        book = openpyxl.load_workbook(path, read_only=True, data_only=False, keep_links=False)
        try:
            worksheet = book[sheet]
            worksheet.reset_dimensions()
            formulas = list(worksheet.iter_rows(values_only=True))[header_at + 1 :]
        finally:
            book.close()
    unset: list[str] = []
    zeros: list[str] = []
    for position, column in data.items():
        values = column.tolist()
        is_formula = np.zeros(len(values), dtype=bool)
        for k, row in enumerate(formulas[: len(values)]):
            is_formula[k] = position < len(row) and _is_formula(row[position])
        if not is_formula.any():
            continue
        rows = np.flatnonzero(is_formula & pd.isna(column).to_numpy()) + header_at + 2
        if rows.size:
            unset.append(f"column {_label(plan, position)} {format_rows(rows.tolist())}")
        if plan.roles[position] in schema.NUMERIC:
            is_zero = np.array([v == 0 and not isinstance(v, bool) for v in values], dtype=bool)
            zero = np.flatnonzero(is_formula & is_zero) + header_at + 2
            if zero.size:
                zeros.append(f"column {_label(plan, position)} {format_rows(zero.tolist())}")
    if unset:
        _fail(
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


# --- building the canonical frame ----------------------------------------------------------------


@dataclass
class _Context:
    """What a column check needs to word its message."""

    path: Path
    plan: _Plan
    rows: Callable[[np.ndarray], list[int]]
    notices: list[str]
    control_cells: dict[str, int] = field(default_factory=dict)

    def fail(
        self,
        position: int,
        problem: str,
        bad: np.ndarray,
        values: pd.Series | None,
        hint: str,
        detail: str = "",
    ) -> NoReturn:
        """Raise for the cells ``bad`` (positions) of column ``position``."""
        rows = self.rows(bad)
        examples = f": {_examples(values, bad, rows)}" if values is not None else ""
        _fail(
            self.path,
            f"column {_label(self.plan, position)} {problem} in {len(rows)} "
            f"{'row' if len(rows) == 1 else 'rows'} ({format_rows(rows)}){examples}."
            + (f" {detail}" if detail else ""),
            hint,
        )


def _examples(values: pd.Series, bad: np.ndarray, rows: list[int]) -> str:
    shown: dict[str, int] = {}
    sample = values.iloc[bad[:500]]
    for text, row in zip(sample.astype(object).tolist(), rows[:500], strict=False):
        key = _sanitize_str(f"{text:.15g}" if isinstance(text, float) else str(text))
        if key not in shown:
            shown[key] = row
            if len(shown) == _SHOWN:
                break
    return "e.g. " + ", ".join(f"'{text}' (row {row})" for text, row in shown.items())


def _build(path: Path, raw: _Raw, notices: list[str], sheet: str | None) -> LoadedFrame:
    plan, data = raw.plan, raw.data
    n = len(next(iter(data.values()))) if data else 0
    keep: np.ndarray | None = None
    if raw.blank_rows_possible and n:
        blank = _blank_rows(data, plan)
        if blank.any():
            keep = np.flatnonzero(~blank)
            # Empty rows after the data (a final blank line, formatted but empty sheet rows)
            # are not worth a notice; gaps between data rows are.
            inner = int(blank[: keep[-1]].sum()) if keep.size else 0
            if inner:
                notices.append(f"{_plural(inner, 'empty row')} between data rows skipped.")
            data = {i: s.iloc[keep].reset_index(drop=True) for i, s in data.items()}
            n = len(keep)
    if n == 0:
        where = f" of sheet '{sheet}'" if sheet else ""
        _fail(
            path,
            f"the file{where} has a header but no data rows.",
            "Export the portfolio again with its rows, or check that you chose the right "
            "file" + (" and sheet (--sheet)." if sheet else "."),
        )
    if raw.file_rows is not None:
        file_rows = raw.file_rows if keep is None else raw.file_rows[keep]
    elif keep is not None:
        file_rows = keep.astype(np.int64) + raw.first_row
    else:
        file_rows = None
    first_row = int(file_rows[0]) if file_rows is not None else raw.first_row
    consecutive = file_rows is None or bool(file_rows[-1] - file_rows[0] == len(file_rows) - 1)
    if consecutive:
        file_rows = None

    def rows(positions: np.ndarray) -> list[int]:
        positions = np.asarray(positions, dtype=np.int64)
        return (file_rows[positions] if file_rows is not None else positions + first_row).tolist()

    ctx = _Context(path, plan, rows, notices)
    for position in plan.unnamed:
        text, missing = _text(data[position])
        if not (missing | _is_blank(text)).all():
            filled = np.flatnonzero(~(missing | _is_blank(text)))
            _fail(
                path,
                f"column {position + 1} has no name in the header but holds values "
                f"({format_rows(rows(filled))}).",
                "Give the column a name in the header, or delete it.",
            )
    columns: dict[str, pd.Series] = {}
    for position, role in enumerate(plan.roles):
        if role in (schema.ITEM, schema.LOCATION):
            columns[role] = _ids(ctx, position, data[position], role)
        elif role == schema.PERIOD:
            columns[role] = _periods(ctx, position, data[position])
        elif role == schema.LAG:
            columns[role] = _lags(ctx, position, data[position])
        elif role in schema.NUMERIC:
            columns[role] = _numbers(ctx, position, data[position], role)
    attributes: list[str] = []
    for position, name in plan.attributes.items():
        columns[name] = _attribute(ctx, position, data[position])
        attributes.append(name)
    if ctx.control_cells:
        total = sum(ctx.control_cells.values())
        where = _quote_list(list(ctx.control_cells))
        notices.append(
            f"{total} {'cell' if total == 1 else 'cells'} contained control characters (column "
            f"{where}); they are shown as visible symbols: ␀-␟ for C0 (tab ␉, line feed ␊, "
            "escape ␛), ␡ for DEL, � for C1."
        )
    order = [name for name in _ORDER if name in columns] + attributes
    # copy=False keeps each column as its own block instead of copying into 2-D blocks.
    frame = pd.DataFrame({name: columns[name] for name in order}, copy=False)
    frame.index = pd.RangeIndex(len(frame))
    return LoadedFrame(
        frame=frame,
        path=path,
        first_row=first_row,
        attributes=tuple(attributes),
        notices=tuple(notices),
        sheet=sheet,
        _file_rows=file_rows,
    )


def _is_blank(values: pd.Series) -> np.ndarray:
    if isinstance(values.dtype, pd.CategoricalDtype):
        codes = _codes(values)
        blank_codes = np.flatnonzero(np.asarray(values.cat.categories.str.strip() == ""))
        if not blank_codes.size:
            return codes < 0
        return (codes < 0) | np.isin(codes, blank_codes)
    return (values.str.strip() == "").to_numpy(dtype=bool, na_value=True)


def _blank_rows(data: dict[int, pd.Series], plan: _Plan) -> np.ndarray:
    """Rows with no value in any column (blank lines, Excel's trailing ',,,')."""
    item = data[plan.roles.index(schema.ITEM)]
    candidate = _empty_cells(item)
    if not candidate.any():
        return candidate
    rows = np.flatnonzero(candidate)
    for series in data.values():
        rows = rows[_empty_cells(series.iloc[rows])]
        if not rows.size:
            break
    blank = np.zeros(len(item), dtype=bool)
    blank[rows] = True
    return blank


def _empty_cells(values: pd.Series) -> np.ndarray:
    if isinstance(values.dtype, pd.CategoricalDtype):
        codes = _codes(values)
        empty_codes = np.flatnonzero(np.asarray(values.cat.categories == ""))
        return (codes < 0) | np.isin(codes, empty_codes)
    if values.dtype == object:
        return np.array(
            [
                v is None or v == "" or (isinstance(v, float) and np.isnan(v))
                for v in values.to_numpy()
            ],
            dtype=bool,
        )
    if isinstance(values.dtype, pd.StringDtype):
        return (values == "").to_numpy(dtype=bool, na_value=True)
    return values.isna().to_numpy()


def _text(values: pd.Series) -> tuple[pd.Series, np.ndarray]:
    """Any column as text (``str``, or ``category`` of ``str``) plus its missing-cell mask.

    Numbers and dates from typed formats (Parquet, xlsx) become their plain written form; a whole
    number stored as float loses its '.0' (123.0 -> '123').
    """
    if isinstance(values.dtype, pd.CategoricalDtype):
        cats = values.cat.categories
        if not isinstance(cats.dtype, pd.StringDtype):
            values = _recode(values, pd.Index(_format_cells(pd.Series(cats, dtype=object))))
        return values, _codes(values) < 0
    if isinstance(values.dtype, pd.StringDtype):
        return values, values.isna().to_numpy()
    if values.dtype == object:
        missing = pd.isna(values).to_numpy()
        return pd.Series(_format_cells(values), dtype=str), missing
    codes, uniques = pd.factorize(values, use_na_sentinel=True)
    labels = _format_cells(pd.Series(np.asarray(uniques, dtype=object), dtype=object))
    return _from_codes(codes, labels), codes < 0


def _format_cells(values: pd.Series) -> list[str]:
    """Written form of typed cells (per cell: only for xlsx cells and distinct Parquet values)."""
    out: list[str] = []
    for value in values.tolist():
        if value is None or (isinstance(value, float) and np.isnan(value)):
            out.append("")
        elif isinstance(value, bool):
            out.append("TRUE" if value else "FALSE")
        elif isinstance(value, float) and value.is_integer():
            out.append(str(int(value)))
        elif (
            isinstance(value, dt.datetime | pd.Timestamp)
            and value == pd.Timestamp(value).normalize()
        ):
            out.append(value.strftime("%Y-%m-%d"))
        else:
            out.append(str(value))
    return out


def _codes(values: pd.Series) -> np.ndarray:
    """Category codes without a copy (``Series.cat.codes`` builds a new Series)."""
    return np.asarray(values.array.codes)


def _recode(values: pd.Series, categories: pd.Index) -> pd.Series:
    """Give a categorical new category labels, merging labels that became equal."""
    return _from_codes(_codes(values), categories)


def _from_codes(codes: np.ndarray, labels: Sequence[str] | pd.Index) -> pd.Series:
    """Categorical text from codes (-1: missing) into ``labels``, which may repeat."""
    label_codes, uniques = pd.factorize(pd.Index(labels, dtype=str))
    if not len(label_codes):
        return pd.Series(pd.Categorical.from_codes(codes, categories=pd.Index([], dtype=str)))
    mapped = np.where(codes < 0, -1, label_codes[np.maximum(codes, 0)])
    return pd.Series(pd.Categorical.from_codes(mapped, categories=pd.Index(uniques, dtype=str)))


def _clean_controls(ctx: _Context, position: int, values: pd.Series) -> pd.Series:
    """Replace control characters, counting the cells changed (checked vectorised first)."""
    name = ctx.plan.headers[position]
    if isinstance(values.dtype, pd.CategoricalDtype):
        cats = values.cat.categories
        dirty = np.asarray(cats.str.contains(_CONTROL_PATTERN, regex=True))
        if not dirty.any():
            return values
        count = int(np.isin(_codes(values), np.flatnonzero(dirty)).sum())
        cleaned = _recode(values, pd.Index(cats.str.translate(_CONTROL_TABLE), dtype=str))
    else:
        mask = values.str.contains(_CONTROL_PATTERN, regex=True, na=False).to_numpy(dtype=bool)
        if not mask.any():
            return values
        count = int(mask.sum())
        cleaned = values.copy()
        cleaned.loc[mask] = values.loc[mask].str.translate(_CONTROL_TABLE)
    if count:
        ctx.control_cells[name] = ctx.control_cells.get(name, 0) + count
    return cleaned


def _ids(ctx: _Context, position: int, values: pd.Series, role: str) -> pd.Series:
    numeric = _typed_numbers(values)
    if numeric:
        ctx.notices.append(
            f"Column {_label(ctx.plan, position)}: {_plural(numeric, 'id')} stored as numbers in "
            "the file, so leading zeros (00123) may have been lost before triage read it. Store "
            "ids as text (in Excel: format the column as Text before typing or pasting)."
        )
    text, missing = _text(values)
    strings = text.cat.categories if isinstance(text.dtype, pd.CategoricalDtype) else text
    # One scan for both kinds of suspicious characters; most files have neither.
    suspect = bool(strings.str.contains(_SUSPECT_PATTERN, regex=True, na=False).any())
    if suspect:
        text = _clean_controls(ctx, position, text)
    empty = missing | _is_blank(text)
    if empty.any():
        ctx.fail(
            position,
            "is empty",
            np.flatnonzero(empty),
            None,
            f"Every row needs {'an item id' if role == schema.ITEM else 'a location'}: "
            "fill it in, or delete the rows.",
        )
    if suspect and bool(strings.str.contains(_BIDI_PATTERN, regex=True, na=False).any()):
        ctx.notices.append(
            f"Column {_label(ctx.plan, position)} has ids containing bidirectional text controls "
            "(U+202A-U+202E, U+2066-U+2069), which can make an id look different from what it is."
        )
    if role == schema.LOCATION and not isinstance(text.dtype, pd.CategoricalDtype):
        text = text.astype("category")
    return text


def _typed_numbers(values: pd.Series) -> int:
    """How many id cells the file stores as numbers (xlsx cells, numeric Parquet columns)."""
    if pd.api.types.is_numeric_dtype(values.dtype) and not pd.api.types.is_bool_dtype(values.dtype):
        return int(values.notna().sum())
    if values.dtype == object:
        return sum(isinstance(v, int | float) and not isinstance(v, bool) for v in values.tolist())
    return 0


def _attribute(ctx: _Context, position: int, values: pd.Series) -> pd.Series:
    text, missing = _text(values)
    if isinstance(text.dtype, pd.CategoricalDtype):
        if missing.any():
            if "" not in text.cat.categories:
                text = text.cat.add_categories([""])
            text = text.fillna("")
    else:
        text = text.fillna("").astype("category")
    return _clean_controls(ctx, position, text)


def _periods(ctx: _Context, position: int, values: pd.Series) -> pd.Series:
    if pd.api.types.is_datetime64_any_dtype(values.dtype):
        stamps = values.reset_index(drop=True)
        if stamps.dt.tz is not None:
            # Keep the wall-clock date the file shows, whatever its time zone.
            stamps = stamps.dt.tz_localize(None)
        _check_stamps(ctx, position, stamps)
        return stamps.astype("datetime64[ns]")
    if values.dtype == object:
        return _periods_from_cells(ctx, position, values)
    if pd.api.types.is_numeric_dtype(values.dtype):
        _date_error(ctx, position, np.arange(len(values)), values)
    text, missing = _text(values)
    text = _clean_controls(ctx, position, text)
    if not isinstance(text.dtype, pd.CategoricalDtype):
        text = text.astype("category")
    cats = pd.Series(text.cat.categories, dtype=str)
    parsed = _parse_iso(cats)
    codes = _codes(text)
    empty = missing | np.isin(codes, np.flatnonzero((cats.str.strip() == "").to_numpy()))
    if empty.any():
        ctx.fail(
            position,
            "is empty",
            np.flatnonzero(empty),
            None,
            "Every row needs a period; write dates as YYYY-MM-DD (e.g. 2024-03-04).",
        )
    bad_codes = np.flatnonzero(parsed.isna().to_numpy())
    if bad_codes.size:
        # Categories no row uses any more (left by skipped blank rows) must not count.
        wrong = np.isin(codes, bad_codes)
        if wrong.any():
            _date_error(ctx, position, np.flatnonzero(wrong), text)
    result = pd.Series(parsed.to_numpy()[codes], copy=False)
    _check_stamps(ctx, position, result)
    return result.astype("datetime64[ns]")


def _parse_iso(texts: pd.Series) -> pd.Series:
    """ISO ``YYYY-MM-DD`` / ``YYYY-MM`` (optionally ``00:00:00``) -> datetime64[us], else NaT.

    Microseconds hold any four-digit year; the range check comes before the cast to ns, which
    would wrap around silently.
    """
    parts = texts.str.strip().str.extract(_ISO_DATE.pattern)
    day = parts[2].fillna("01")
    joined = (parts[0] + "-" + parts[1] + "-" + day).where(parts[0].notna())
    out = pd.to_datetime(joined, format="%Y-%m-%d", errors="coerce")
    return pd.Series(out.to_numpy(dtype="datetime64[us]"), copy=False)


def _periods_from_cells(ctx: _Context, position: int, values: pd.Series) -> pd.Series:
    cells = values.tolist()
    is_date = np.array([isinstance(v, dt.date) for v in cells], dtype=bool)
    missing = np.array(
        [v is None or (isinstance(v, str) and not v.strip()) for v in cells], dtype=bool
    )
    is_text = np.array([isinstance(v, str) for v in cells], dtype=bool) & ~missing
    if missing.any():
        ctx.fail(
            position,
            "is empty",
            np.flatnonzero(missing),
            None,
            "Every row needs a period; write dates as YYYY-MM-DD or use date cells.",
        )
    other = ~(is_date | is_text | missing)
    if other.any():
        _date_error(ctx, position, np.flatnonzero(other), values)
    result = np.empty(len(cells), dtype="datetime64[us]")
    if is_date.any():
        dates = pd.to_datetime(pd.Series([cells[i] for i in np.flatnonzero(is_date)], dtype=object))
        result[is_date] = dates.to_numpy(dtype="datetime64[us]")
    if is_text.any():
        text = pd.Series([_sanitize_str(cells[i]) for i in np.flatnonzero(is_text)], dtype=str)
        parsed = _parse_iso(text)
        bad = parsed.isna().to_numpy()
        if bad.any():
            _date_error(ctx, position, np.flatnonzero(is_text)[bad], values)
        result[is_text] = parsed.to_numpy()
    series = pd.Series(result, copy=False)
    _check_stamps(ctx, position, series)
    return series.astype("datetime64[ns]")


def _date_error(ctx: _Context, position: int, bad: np.ndarray, values: pd.Series) -> NoReturn:
    sample = [str(v).strip() for v in values.iloc[bad[:200]].tolist()]
    notes = []
    slash = next((s for s in sample if re.fullmatch(r"\d{1,2}[/.]\d{1,2}[/.]\d{2,4}", s)), None)
    if slash:
        first, second = (int(x) for x in re.split(r"[/.]", slash)[:2])
        if 1 <= first <= 12 and 1 <= second <= 12:
            notes.append(
                f"'{slash}' could be {first} {calendar.month_name[second]} or "
                f"{second} {calendar.month_name[first]}."
            )
        else:
            notes.append(f"'{slash}' is read day-first or month-first depending on the region.")
    if any(re.fullmatch(r"\d{5}(\.\d+)?", s) for s in sample):
        notes.append("5-digit numbers look like Excel day numbers (dates without a date format).")
    if any(re.fullmatch(r"\d{4}-\d{2}-\d{2}[T ]\d{1,2}:\d{2}.*", s) for s in sample):
        notes.append("Periods are dates, without a time of day.")
    invalid = next((s for s in sample if _ISO_DATE.fullmatch(s)), None)
    if invalid:
        notes.append(f"'{invalid}' is not a date in the calendar.")
    ctx.fail(
        position,
        "has dates that are ambiguous or not ISO",
        bad,
        values,
        "Write dates as YYYY-MM-DD (e.g. 2024-03-04), or YYYY-MM for months (read as the first "
        "of the month); in Excel, format the column as yyyy-mm-dd before saving.",
        " ".join(notes),
    )


def _check_stamps(ctx: _Context, position: int, stamps: pd.Series) -> None:
    """Periods are present, at midnight, and in years a calendar of demand can hold."""
    missing = stamps.isna().to_numpy()
    if missing.any():
        ctx.fail(
            position,
            "is empty",
            np.flatnonzero(missing),
            None,
            "Every row needs a period; write dates as YYYY-MM-DD (e.g. 2024-03-04).",
        )
    # Checked on the distinct periods (about a hundred), not on every row.
    distinct = pd.Series(pd.unique(stamps), copy=False)
    off = distinct[(distinct != distinct.dt.normalize()).to_numpy(dtype=bool)]
    if len(off):
        ctx.fail(
            position,
            "has a time of day, not just a date",
            np.flatnonzero(stamps.isin(off).to_numpy()),
            stamps,
            "Periods are dates: write them as YYYY-MM-DD with no time.",
        )
    years = distinct.dt.year
    # Also keeps every period inside the datetime64[ns] range (years 1677-2262).
    outside = distinct[((years < _FIRST_YEAR) | (years > _LAST_YEAR)).to_numpy(dtype=bool)]
    if len(outside):
        ctx.fail(
            position,
            f"has dates outside the years {_FIRST_YEAR}-{_LAST_YEAR}",
            np.flatnonzero(stamps.isin(outside).to_numpy()),
            stamps,
            "Check the year (a typo such as 0224 or 20244?); write dates as YYYY-MM-DD.",
        )


def _numbers(ctx: _Context, position: int, values: pd.Series, role: str) -> pd.Series:
    if values.dtype == np.float64:
        numbers = values.to_numpy()
        raw = None
    elif pd.api.types.is_bool_dtype(values.dtype) or pd.api.types.is_datetime64_any_dtype(
        values.dtype
    ):
        ctx.fail(
            position,
            f"holds {values.dtype} values, not numbers",
            np.arange(len(values)),
            values,
            "Write the column as numbers.",
        )
    elif pd.api.types.is_numeric_dtype(values.dtype):
        numbers = values.to_numpy(dtype=np.float64, na_value=np.nan)
        raw = None
    else:
        numbers, bad = _numbers_from_text(values)
        if bad.any():
            _number_error(ctx, position, np.flatnonzero(bad), values)
        raw = values
    # fmin/fmax skip NaN without allocating: one pass each settles the usual all-good case.
    low, high = np.fmin.reduce(numbers), np.fmax.reduce(numbers)
    if not (low >= -_MAX_MAGNITUDE and high <= _MAX_MAGNITUDE) and not np.isnan(low):
        finite = np.isfinite(numbers) | np.isnan(numbers)
        too_big = np.abs(np.where(finite, numbers, 0.0)) > _MAX_MAGNITUDE
        shown = raw if raw is not None else pd.Series(numbers, copy=False)
        ctx.fail(
            position,
            "has values that are not finite numbers",
            np.flatnonzero(~finite | too_big),
            shown,
            "Replace them with real quantities; leave the cell empty for a missing value.",
            f"Numbers must be finite and no larger than {_MAX_MAGNITUDE:,.0f} in size, the limit "
            "up to which every whole number is held exactly.",
        )
    if role == schema.PRICE and low < 0:
        ctx.fail(
            position,
            "has negative prices",
            np.flatnonzero(numbers < 0),
            pd.Series(numbers, copy=False),
            "Prices weight errors by value and must be 0 or more; leave the cell empty if unknown.",
        )
    return pd.Series(numbers, dtype=np.float64, copy=False)


def _numbers_from_text(values: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """Parse text (or mixed xlsx cells) as numbers: returns float64 values and a bad-cell mask."""
    if values.dtype == object:
        cells = values.tolist()
        kind = np.array(
            [
                0
                if v is None
                else 1
                if isinstance(v, int | float) and not isinstance(v, bool)
                else 2
                if isinstance(v, str)
                else 3
                for v in cells
            ],
            dtype=np.int8,
        )
        numbers = np.full(len(cells), np.nan)
        direct = np.flatnonzero(kind == 1)
        numbers[direct] = np.array([cells[i] for i in direct], dtype=np.float64)
        texts = np.flatnonzero(kind == 2)
        bad = kind == 3
        if texts.size:
            parsed, wrong = _numbers_from_text(pd.Series([cells[i] for i in texts], dtype=str))
            numbers[texts] = parsed
            bad[texts] = wrong
        return numbers, bad
    text = values.astype(str) if not isinstance(values.dtype, pd.StringDtype) else values
    stripped = text.str.strip()
    missing = (stripped.isin(schema.NUMERIC_MISSING) | text.isna()).to_numpy(dtype=bool)
    valid = stripped.str.fullmatch(_NUMBER, case=False).to_numpy(dtype=bool, na_value=False)
    bad = ~missing & ~valid
    numbers = np.full(len(text), np.nan)
    good = valid & ~missing
    # float() per cell: accepts 1e400 (-> inf, reported as not finite) like the CSV parser does.
    numbers[good] = np.asarray(stripped[good].to_numpy(dtype=object), dtype=np.float64)
    return numbers, bad


def _number_error(ctx: _Context, position: int, bad: np.ndarray, values: pd.Series) -> NoReturn:
    sample = [str(v).strip() for v in values.iloc[bad[:200]].tolist()]
    hints = []
    if any(re.fullmatch(r"[+-]?\d+,\d+", s) for s in sample):
        hints.append(
            "write decimals with a point and no thousands separator (1.5 and 1234, not "
            "1,5 or 1,234); a file from a European Excel uses decimal commas"
        )
    if any(re.fullmatch(r"\(\s*[\d.,]+\s*\)", s) for s in sample):
        hints.append("write negative numbers (returns) with a minus sign: -5, not (5)")
    if any(s in _EXCEL_ERRORS for s in sample):
        hints.append(
            "fix the Excel formulas that give errors (#DIV/0!, #VALUE!), or clear those cells"
        )
    hints.append("leave a cell empty (or write NA) for a missing value")
    hint = "Use plain numbers such as 12 or -3.5: " + "; ".join(hints) + "."
    ctx.fail(position, "has values that are not numbers", bad, values, hint)


def _lags(ctx: _Context, position: int, values: pd.Series) -> pd.Series:
    dtype = values.dtype
    if isinstance(dtype, np.dtype) and dtype.kind in "iu":
        lags = values.to_numpy().astype(np.int64, copy=False)
        missing = np.zeros(1, dtype=bool)
        shown: pd.Series = values
    elif pd.api.types.is_integer_dtype(dtype):
        lags = values.to_numpy(dtype=np.int64, na_value=-1)
        missing = values.isna().to_numpy()
        shown = values
    elif pd.api.types.is_float_dtype(dtype):
        numbers = values.to_numpy(dtype=np.float64)
        missing = np.isnan(numbers)
        wrong = ~missing & ~(np.isfinite(numbers) & (numbers == np.round(numbers)))
        if wrong.any():
            _lag_error(ctx, position, np.flatnonzero(wrong), values)
        lags = np.where(missing, -1, numbers).astype(np.int64)
        shown = values
    else:
        text, missing_text = _text(values)
        if not isinstance(text.dtype, pd.CategoricalDtype):
            text = text.astype("category")
        cats = pd.Series(text.cat.categories, dtype=str).str.strip()
        codes = _codes(text)
        empty_cats = np.flatnonzero(cats.isin(schema.NUMERIC_MISSING).to_numpy())
        missing = missing_text | np.isin(codes, empty_cats)
        whole = cats.str.fullmatch(_INTEGER).to_numpy(dtype=bool, na_value=False)
        bad_cats = np.flatnonzero(~whole & ~cats.isin(schema.NUMERIC_MISSING).to_numpy())
        wrong = np.isin(codes, bad_cats) & ~missing
        if wrong.any():
            _lag_error(ctx, position, np.flatnonzero(wrong), text)
        cat_values = np.where(whole, pd.to_numeric(cats.where(whole, "0")).to_numpy(), -1)
        lags = np.where(codes < 0, -1, cat_values[np.maximum(codes, 0)]).astype(np.int64)
        shown = text
    if missing.any():
        ctx.fail(
            position,
            "is empty",
            np.flatnonzero(missing),
            None,
            "Every row of a file with a lag column needs its lag: the number of periods "
            "between making the forecast and the period it is for (0, 1, 2, ...).",
        )
    if lags.min() < 0:
        negative = lags < 0
        ctx.fail(
            position,
            "has negative lags",
            np.flatnonzero(negative),
            shown,
            "A lag counts periods from making the forecast to the period it is for: 0 or more.",
        )
    return pd.Series(lags, dtype=np.int64, copy=False)


def _lag_error(ctx: _Context, position: int, bad: np.ndarray, values: pd.Series) -> NoReturn:
    ctx.fail(
        position,
        "has values that are not whole numbers",
        bad,
        values,
        "Write the lag as a whole number of periods (0, 1, 2, ...).",
    )
