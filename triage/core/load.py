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

Ids and attribute cells keep their control characters (C0 ``\\x00``-``\\x1f``, DEL, C1
``\\x80``-``\\x9f``) exactly as written, with a notice counting the cells: machine-readable
output (CSV, JSON, exports, the ledger) must join back with the file byte for byte. Whatever
shows them in a terminal replaces them (``triage.core.text.visible``).
Headers are names, not data: their control characters are replaced at load by the Unicode
control pictures ``␀``-``␟`` (tab ``␉``, line feed ``␊``, escape ``␛``), ``␡`` for DEL and
``�`` for C1, as are cells quoted in messages.

File row numbers in messages count the header as row 1, as a spreadsheet does. In a CSV file a
row is a record: it is the line number unless a quoted cell holds a line break.

For Parquet and CSV files :func:`scan_parquet` and :func:`scan_csv` offer a second way in: a
:class:`StreamSource` hands over one block of rows at a time (a Parquet row group, or a batch
Arrow's multi-threaded CSV reader parsed) as numpy arrays (text as integer codes), so that
``portfolio.read_portfolio`` can fill its dense arrays without ever building the long frame.
It applies the same checks, on distinct values where it can; anything this module would refuse,
change or remark on raises :class:`FastPathDeclined` instead, and the caller reads the file with
:func:`load_frame`, which then gives its usual message. See docs/performance.md.
"""

from __future__ import annotations

import calendar
import codecs
import collections
import concurrent.futures
import contextlib
import csv
import datetime as dt
import io
import itertools
import os
import re
import threading
import unicodedata
import warnings
import zipfile
import zlib
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, NoReturn

import numpy as np
import pandas as pd

from triage.core import schema
from triage.core.dialect import (
    SEPARATORS,
    FileOptions,
    date_format_advice,
    date_formats,
    looks_like_decimal_comma,
)
from triage.core.errors import LoadError, TriageError, format_rows
from triage.core.ledger import TEXT_MAX

__all__ = [
    "SUFFIXES",
    "FastPathDeclined",
    "LoadedFrame",
    "StreamSource",
    "load_frame",
    "parse_column_map",
    "parse_periods",
    "scan_csv",
    "scan_parquet",
]

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
# Look-alike ids (issue 10 §7): ids that differ only in what does not show. Characters that do
# not show: format characters (Unicode category Cf: zero-width space and joiners, word joiner,
# byte-order mark, soft hyphen, bidi marks) and the fillers that render blank. Spaces: every
# Unicode space, line and paragraph separator. Written as code points, for both regex engines.
_INVISIBLE = "".join(
    chr(c)
    for c in (
        0x00AD, 0x034F, 0x061C, 0x115F, 0x1160, 0x17B4, 0x17B5, 0x180E,
        *range(0x200B, 0x2010), *range(0x202A, 0x202F), *range(0x2060, 0x2070),
        0x3164, 0xFEFF, 0xFFA0,
    )
)  # fmt: skip
_SPACES = "".join(
    chr(c)
    for c in (0x20, 0x85, 0xA0, 0x1680, *range(0x2000, 0x200B), 0x2028, 0x2029, 0x202F, 0x205F,
              0x3000)
)  # fmt: skip
#: An id that may look like another: not ASCII, or a space at an end or two spaces in a row.
_LOOKALIKE_CANDIDATE = f"[{chr(0x80)}-{chr(0x10FFFF)}]|^ | $|  "

# float64 holds every whole number exactly only up to 2**53 (IEEE 754 binary64, 53-bit significand).
_MAX_MAGNITUDE = float(2**53)
# Digits are [0-9]: \d would also match Arabic-Indic, full-width and other digits, which
# Python's float() and int() read but docs/input-format.md does not accept (plain numbers only).
_ISO_DATE = re.compile(r"^([0-9]{4})-([0-9]{2})(?:-([0-9]{2}))?(?:[T ]00:00(?::00(?:\.0+)?)?)?$")
_FIRST_YEAR, _LAST_YEAR = 1900, 2199
#: Largest forecast lag, in periods (almost two centuries of weeks): a larger number is a typo
#: or another column, and would not fit the integer types lags are held in.
LAG_MAX = 10_000
#: Nanoseconds per day, and the day numbers (since 1970-01-01) of the accepted year range.
_DAY_NS = 86_400 * 10**9
_FIRST_DAY = (dt.date(_FIRST_YEAR, 1, 1) - dt.date(1970, 1, 1)).days
_LAST_DAY = (dt.date(_LAST_YEAR, 12, 31) - dt.date(1970, 1, 1)).days
_UNITS_PER_DAY = {"s": 86_400, "ms": 86_400_000, "us": 86_400 * 10**6, "ns": _DAY_NS}
_NUMBER = r"^[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?$|^[+-]?(?:inf|infinity)$"
_INTEGER = r"^[+-]?[0-9]+(?:\.0*)?$"
_EXCEL_ERRORS = ("#DIV/0!", "#VALUE!", "#REF!", "#NAME?", "#NUM!", "#NULL!", "#N/A", "#SPILL!")
_CHUNK = 1 << 23
_HEADER_BYTES = 1 << 20
#: Bytes a workbook may unpack to, all parts together (the size its zip directory declares).
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
    path: str | Path,
    *,
    columns: dict[str, str] | None = None,
    sheet: str | None = None,
    options: FileOptions | None = None,
) -> LoadedFrame:
    """Read and validate a portfolio file.

    Args:
        path: A ``.csv`` (UTF-8, with or without BOM, comma-separated), ``.xlsx``/``.xlsm`` or
            ``.parquet`` file.
        columns: Canonical name -> file header, applied before headers are matched by name
            (see :func:`parse_column_map`).
        sheet: The xlsx sheet to read; default the first visible one.
        options: How the cells are written, when not triage's default (separator, decimal mark,
            date format, header row; see :class:`~triage.core.dialect.FileOptions`).

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
    dialect = _checked_options(file, kind, options)
    mapping = _checked_mapping(file, columns)
    notices: list[str] = []
    sheet_used: str | None = None
    try:
        if kind == "csv":
            raw = _read_csv(file, mapping, notices, dialect)
        elif kind == "parquet":
            raw = _read_parquet(file, mapping, notices)
        else:
            raw, sheet_used = _read_xlsx(file, mapping, sheet, notices, dialect)
    except OSError as exc:
        _fail(
            file,
            f"the file cannot be read ({exc.strerror or exc}).",
            "Check that you may read the file and that no other program has it locked.",
        )
    return _build(file, raw, notices, sheet_used, dialect)


def _checked_options(path: Path, kind: str, options: FileOptions | None) -> FileOptions:
    """The options, refused where they do not apply to this kind of file (never ignored)."""
    if options is None:
        return FileOptions()
    if kind == "csv" and options.sep == options.decimal:
        _fail(
            path,
            f"--decimal {options.decimal} was given for a file whose fields are separated by "
            f"'{options.sep}' too: 1{options.sep}5 would be two fields.",
            "Files with decimal commas separate their fields with semicolons: add --sep ';' "
            "(or tab, '|') as the file does.",
        )
    if options.sep != "," and kind != "csv":
        _fail(
            path,
            f"--sep was given, but this is a {kind} file, whose cells are not separated by a "
            "character.",
            "Leave out --sep; it is for CSV files.",
        )
    if options.header_row is not None and kind == "parquet":
        _fail(
            path,
            "--header-row was given, but a Parquet file has no header row: its column names "
            "are stored apart from the data.",
            "Leave out --header-row; it is for CSV and xlsx files.",
        )
    return options


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


#: Peak memory per row of each way of reading, in bytes: measured at 116M rows
#: (docs/performance.md: 28, 69, 73 and 130) and rounded up. A Parquet file of a billion
#: identical rows compresses to a few megabytes; the row count, known before any cell is read,
#: says what reading it would take.
BYTES_PER_ROW = {"parquet-streamed": 32, "parquet": 80, "csv-streamed": 80, "csv": 140}


def _check_memory(path: Path, rows: int, way: str) -> None:
    """Refuse a file whose rows would need more memory than this machine (or process) has."""
    total = _memory_limit()
    need = rows * BYTES_PER_ROW[way]
    if total is not None and need > total:
        _fail(
            path,
            f"the file has {rows:,} rows; reading them takes about {_bytes(need)} of memory, "
            f"and this machine allows {_bytes(total)}.",
            "Split the file (for example by location or by range of items) and review each "
            "part, or run triage where more memory is available.",
        )


def _bytes(size: int) -> str:
    return f"{size / 2**30:,.1f} GB" if size >= 2**30 else f"{size / 2**20:,.1f} MB"


def _memory_limit() -> int | None:
    """Bytes of memory this process may use: physical memory, or a lower container or
    address-space limit; None when the system does not say."""
    limits: list[int] = []
    with contextlib.suppress(AttributeError, ValueError, OSError):
        limits.append(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES"))
    try:
        text = Path("/sys/fs/cgroup/memory.max").read_text().strip()
        if text.isdigit():
            limits.append(int(text))
    except OSError:
        pass
    try:
        import resource

        soft = resource.getrlimit(resource.RLIMIT_AS)[0]
        if soft != resource.RLIM_INFINITY and soft > 0:
            limits.append(soft)
    except (ImportError, AttributeError, ValueError, OSError):
        pass
    return min(limits) if limits else None


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
    taken = {h.lower() for h in headers}
    renamed: list[str] = []
    for position, header in enumerate(headers):
        if roles[position] == "":
            roles[position] = None
        elif roles[position] is None and header:
            name = header
            if header.lower() in schema.SCORE_COLUMNS:
                # A column triage computes (rank, pattern, ...) keeps its values under a name of
                # its own, never in place of triage's.
                name = f"{header}_file"
                while name.lower() in taken:
                    name += "_"
                taken.add(name.lower())
                renamed.append(f"'{header}' (now '{name}')")
            attributes[position] = name
        elif roles[position] is None:
            unnamed.append(position)
    if renamed:
        notices.append(
            f"{'Column' if len(renamed) == 1 else 'Columns'} {', '.join(renamed)} kept as "
            f"{'an attribute' if len(renamed) == 1 else 'attributes'} under a new name: triage "
            "computes a column of that name itself."
        )
    return _Plan(headers, roles, attributes, unnamed)


# --- CSV -----------------------------------------------------------------------------------------


@dataclass
class _CsvScan:
    """Byte counts from one pass over a CSV file (from the header line on)."""

    size: int
    commas: int
    """Separator bytes (commas, or the ``--sep`` character)."""
    has_quotes: bool
    newline: int
    head: bytes
    lines: int = 0
    """Records if no quoted cell holds a line break: line ends, plus a last unended line."""
    sep: str = ","
    start: int = 0
    """Byte offset of the header line (``--header-row``): the lines above it are skipped."""
    skipped: int = 0
    """Lines above the header; a line or record number in a message adds them."""


def _prescan_csv(path: Path, options: FileOptions | None = None) -> _CsvScan:
    """Check the encoding and count delimiters in one streaming pass (C-speed bytes methods).

    The whole file is checked for its encoding; separators, line ends and quotes are counted
    from the header line on (``--header-row``).
    """
    options = options or FileOptions()
    sep = options.sep.encode()
    start = skipped = 0
    if options.header_row is not None and options.header_row > 1:
        skipped = options.header_row - 1
        start = _line_start(path, options.header_row)
    decoder = codecs.getincrementaldecoder("utf-8")("strict")
    commas = line_feeds = returns = 0
    last = b""
    has_quotes = False
    size = 0
    head = b""
    with path.open("rb") as handle:
        while chunk := handle.read(_CHUNK):
            if not size:
                _refuse_binary(path, chunk)
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
            counted = chunk if size >= start else chunk[start - size :]
            size += len(chunk)
            if not counted:
                continue
            if len(head) < _HEADER_BYTES:
                head += counted[: _HEADER_BYTES - len(head)]
            commas += counted.count(sep)
            line_feeds += counted.count(b"\n")
            returns += counted.count(b"\r")
            last = counted[-1:]
            has_quotes = has_quotes or b'"' in counted
    try:
        decoder.decode(b"", final=True)
    except UnicodeDecodeError:
        _not_utf8(path)
    newline = 13 if returns and not line_feeds else 10
    lines = (returns if newline == 13 else line_feeds) + (last not in (b"", b"\n", b"\r"))
    return _CsvScan(size, commas, has_quotes, newline, head, lines, options.sep, start, skipped)


def _line_start(path: Path, line: int) -> int:
    """Byte offset where line ``line`` (counted from 1) begins; refused past the last line.

    Lines end with LF or CRLF, or with CR alone in a file without any LF (old Mac exports).
    """
    lines = 0
    for newline in (b"\n", b"\r"):
        seen = 0
        last = b""
        with path.open("rb") as handle:
            offset = 0
            while chunk := handle.read(_CHUNK):
                count = chunk.count(newline)
                if seen + count >= line - 1:
                    at = -1
                    for _ in range(line - 1 - seen):
                        at = chunk.index(newline, at + 1)
                    return offset + at + 1
                seen += count
                offset += len(chunk)
                last = chunk[-1:]
        # Lines: line ends, plus a last line without one.
        lines = seen + (last not in (b"", newline))
        if seen:
            break
    _fail(
        path,
        f"--header-row {line} was given, but the file has only {_plural(lines, 'line')}.",
        "Give the line number of the header as a text editor shows it, or leave out "
        "--header-row when the header is on the first line.",
    )


def _open_at(path: Path, scan: _CsvScan) -> Any:
    """The file as UTF-8 text from the header line on (for the csv module)."""
    handle = path.open("rb")
    handle.seek(scan.start)
    return io.TextIOWrapper(handle, encoding="utf-8-sig", newline="")


#: File signatures of formats that are not CSV text: (leading bytes, what it is, what to do).
_SIGNATURES: tuple[tuple[bytes, str, str], ...] = (
    (b"PK\x03\x04", "a zip archive, which is what an Excel workbook (.xlsx) is",
     "If it is a workbook, rename it to .xlsx; if it is a zip file, unpack it first."),
    (b"PAR1", "a Parquet file", "Rename it to .parquet."),
    (b"\x1f\x8b", "gzip-compressed", "Unpack it first (gunzip), then load the .csv inside."),
    (b"\xd0\xcf\x11\xe0", "an old Excel .xls workbook",
     "Open it in Excel or LibreOffice and save it as .xlsx or as CSV UTF-8."),
)  # fmt: skip


def _refuse_binary(path: Path, head: bytes) -> None:
    """Name the format of a binary file that carries a .csv name (instead of "not UTF-8")."""
    for signature, what, hint in _SIGNATURES:
        if head.startswith(signature):
            _fail(path, f"this is not CSV text: the file is {what}.", hint)


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


def _csv_header(
    path: Path,
    scan: _CsvScan,
    options: FileOptions | None = None,
    mapping: dict[str, str] | None = None,
) -> list[str]:
    head = scan.head[3:] if scan.head.startswith(codecs.BOM_UTF8) else scan.head
    if not head.strip():
        if scan.skipped:
            _fail(
                path,
                f"--header-row {scan.skipped + 1} was given, but nothing follows line "
                f"{scan.skipped}.",
                "Give the line number of the header as a text editor shows it.",
            )
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
        return _parse_csv_header(
            path, text, options or FileOptions(), mapping or {}, scan.skipped, len(head)
        )
    finally:
        csv.field_size_limit(limit)


#: Rows (lines, records) searched for the header below a title block.
_TITLE_ROWS = 50


def _parse_csv_header(
    path: Path,
    text: str,
    options: FileOptions,
    mapping: dict[str, str],
    skipped: int,
    sample_bytes: int,
) -> list[str]:
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=options.sep)
    header = next(reader, [])
    first = skipped + 1
    if not header:
        if skipped:
            _fail(
                path,
                f"line {first} is empty, but --header-row {first} says the header is there.",
                "Give the line number of the header as a text editor shows it.",
            )
        _fail(
            path,
            "the first line is empty; the header must be on line 1.",
            "Delete the empty lines above the header, or give its line with --header-row N.",
        )
    if not _has_required(header, mapping):
        # Whole records of the sample only: the last one may be cut off at its end.
        cut = sample_bytes >= _HEADER_BYTES
        _find_header(path, text, options, mapping, skipped, cut)
        if len(header) == 1:
            other = next((c for c in SEPARATORS if c != options.sep and c in header[0]), None)
            if other is not None:
                _wrong_separator(path, text, other, 0, options, mapping, skipped, cut)
    # Checked before the columns are matched: a missing header name would otherwise show up as
    # a missing required column. The last record of the sample may be cut off, so it is left out.
    sample = [len(row) for row in itertools.islice(reader, 6)][:5]
    if sample and sample[0] > len(header):
        short = len(set(sample)) == 1
        bad = [(line, k) for line, k in enumerate(sample, start=first + 1) if k != len(header)]
        _raise_ragged(path, bad, len(header), header_short=short, first_line=first)
    return header


def _records(text: str, sep: str, limit: int, cut: bool) -> list[tuple[int, list[str]]]:
    """The first ``limit`` records of the sample, each with the line it starts on (from 0)."""
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=sep)
    out = []
    line = 0
    try:
        for row in itertools.islice(reader, limit + cut):
            out.append((line, row))
            line = reader.line_num
    except csv.Error:
        pass
    return out[:-1] if cut and len(out) > limit else out


def _find_header(
    path: Path,
    text: str,
    options: FileOptions,
    mapping: dict[str, str],
    skipped: int,
    cut: bool,
) -> None:
    """When the first line is not the header: refuse, naming the options that read the file.

    The header is looked for in the first lines: below a title block (``--header-row``), or
    split by another separator (``--sep``, with the decimal mark and date format its cells
    show). Nothing is read that way: the user runs the command again with the options.
    """
    rows = _records(text, options.sep, _TITLE_ROWS, cut)
    found = next((line for line, row in rows[1:] if _has_required(row, mapping)), None)
    if found is not None:
        title = [c for c in rows[0][1] if c.strip()]
        _title_block(
            path,
            f"line {skipped + 1}",
            title,
            f"line {skipped + 1 + found}",
            FileOptions(options.sep, options.decimal, options.date_format, skipped + 1 + found),
            mapping,
        )
    for sep in SEPARATORS:
        if sep == options.sep:
            continue
        rows = _records(text, sep, _TITLE_ROWS, cut)
        found = next((line for line, row in rows if _has_required(row, mapping)), None)
        if found is not None:
            _wrong_separator(path, text, sep, found, options, mapping, skipped, cut)


def _has_required(cells: Sequence[Any], mapping: dict[str, str]) -> bool:
    """Whether a row names every required column (as ``--columns`` maps them)."""
    names = {_header_text(c).strip().lower() for c in cells}
    return all(mapping.get(name, name).lower() in names for name in schema.REQUIRED)


def _title_block(
    path: Path,
    where: str,
    cells: list[Any],
    header_at: str,
    options: FileOptions,
    mapping: dict[str, str],
) -> NoReturn:
    """Refuse rows above the header (a title block), naming the option that skips them."""
    shown = ", ".join(f"'{_sanitize_str(_header_text(c))[:80]}'" for c in cells[:3])
    names = ", ".join(_sanitize_str(mapping.get(n, n)) for n in schema.REQUIRED)
    _fail(
        path,
        f"{where} holds {shown or 'nothing'}, which looks like a title, not the header: the "
        f"header ({names}) is on {header_at}.",
        f"Read the file with {options.command_line()} (the rows above it are skipped), or "
        "delete the title rows (and unmerge the title cells), save and load it again.",
    )


def _wrong_separator(
    path: Path,
    text: str,
    sep: str,
    at: int,
    options: FileOptions,
    mapping: dict[str, str],
    skipped: int,
    cut: bool,
) -> NoReturn:
    """Fields split by another separator: refuse, naming the options that read the file.

    Args:
        path: The file.
        text: The sample, from the header line given (or the first line) on.
        sep: The separator the header is split by.
        at: The sample's line (from 0) that holds the header.
        options: The options given.
        mapping: ``--columns``.
        skipped: Lines above the sample.
        cut: Whether the sample's last record may be cut off.

    The options are worked out from the first records (the header, number and period cells)
    and printed, never applied: the user runs the command again with them.
    """
    records = _records(text, sep, 200 + at, cut)
    header_index = next(i for i, (line, _) in enumerate(records) if line == at)
    rows = [row for _, row in records[header_index:]]
    names = [_header_text(c).strip().lower() for c in rows[0]]

    def cells(name: str) -> list[str]:
        wanted = mapping.get(name, name).lower()
        if wanted not in names:
            return []
        column = names.index(wanted)
        return [row[column] for row in rows[1:] if column < len(row)]

    decimal = options.decimal
    numbers = [v for name in schema.NUMERIC for v in cells(name)]
    if decimal == "." and sep != "," and looks_like_decimal_comma(numbers):
        decimal = ","
    periods = [v for v in cells(schema.PERIOD) if v.strip()]
    date_format = options.date_format
    advice = ""
    if date_format is None and periods and not all(_ISO_DATE.match(v.strip()) for v in periods):
        fits = date_formats(periods)
        if fits:
            date_format = fits[0]
        if len(fits) > 1:
            advice = " " + date_format_advice(periods)
    header_row = skipped + 1 + at if at else options.header_row
    suggested = FileOptions(sep, decimal, date_format, header_row)
    details = []
    if decimal == "," and options.decimal != ",":
        example = next(v.strip() for v in numbers if "," in v)
        details.append(f"decimal commas (e.g. '{_sanitize_str(example)}')")
    if date_format is not None and options.date_format is None:
        details.append(f"dates such as '{_sanitize_str(periods[0].strip())}'")
    detail = f" with {' and '.join(details)}" if details else ""
    where = f" below a title block (line {header_row})" if at else ""
    command = suggested.command_line()
    if sep == "," and command:
        todo = f"Leave out --sep '{_sanitize_str(options.sep)}' and read it with {command}."
    elif sep == ",":
        todo = f"Leave out --sep '{_sanitize_str(options.sep)}'."
    else:
        todo = f"Read it with {command}."
    shown = _sanitize_str(text[: text.find("\n")] if "\n" in text else text)[:80]
    _fail(
        path,
        f"the header is not split by '{_sanitize_str(options.sep)}' (line {skipped + 1} reads "
        f"'{shown}'): this looks like a {SEPARATORS[sep]}-separated file{detail}{where}."
        f"{advice}",
        f"{todo} (Or save it from the spreadsheet as 'CSV UTF-8 (Comma delimited)' with '.' as "
        "the decimal mark, or as .xlsx.)",
    )


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


def _read_csv(
    path: Path, mapping: dict[str, str], notices: list[str], options: FileOptions
) -> _Raw:
    scan = _prescan_csv(path, options)
    header = _csv_header(path, scan, options, mapping)
    _check_memory(path, max(scan.lines - 1, 0), "csv")
    plan = _plan_columns(path, header, mapping, notices)
    width = len(header)
    names = [f"c{i}" for i in range(width)]
    dtypes, na_values = _csv_dtypes(plan)

    def read(dtype: dict[str, Any], na: dict[str, list[str]]) -> pd.DataFrame:
        with contextlib.ExitStack() as stack:
            source: Any = path
            if scan.start:
                source = stack.enter_context(path.open("rb"))
                source.seek(scan.start)
            caught = stack.enter_context(warnings.catch_warnings(record=True))
            warnings.simplefilter("always", pd.errors.ParserWarning)
            try:
                frame = pd.read_csv(
                    source,
                    sep=scan.sep,
                    decimal=options.decimal,
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
    return _Raw(plan, data, first_row=scan.skipped + 2)


def _ragged(path: Path, scan: _CsvScan, width: int, parser_message: str) -> NoReturn:
    if scan.has_quotes:
        _refuse_open_quote(path, scan)
    bad = _csv_module_counts(path, scan, width)
    if bad is None:
        bad = _numpy_counts(path, scan, width)[0]
    if not bad:
        match = re.search(r"Expected (\d+) fields in line (\d+), saw (\d+)", parser_message)
        if match:
            bad = [(int(match.group(2)) + scan.skipped, int(match.group(3)))]
        elif "EOF inside string" in parser_message:
            start = re.search(r"row (\d+)", parser_message)
            # pandas counts records from 0 at the header; file rows count it as 1.
            where = (
                f" (the cell starts in row {int(start.group(1)) + 1 + scan.skipped})"
                if start
                else ""
            )
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
    path: Path,
    bad: list[tuple[int, int]],
    width: int,
    *,
    header_short: bool = False,
    first_line: int = 1,
) -> NoReturn:
    line, fields = bad[0]
    if header_short:
        _fail(
            path,
            f"line {first_line + 1} has {fields} fields, expected {width}: the header has fewer "
            "names than the data rows have cells, so a column name is probably missing.",
            f"Give every column a name in the header (line {first_line}), or remove the extra "
            f"cells; if line {first_line} is a title above the header, read the file with "
            "--header-row N (N: the line of the header).",
        )
    listed = "; ".join(f"line {n} has {k}" for n, k in bad[1 : _SHOWN + 1])
    more = f" and {len(bad) - _SHOWN - 1} more lines" if len(bad) > _SHOWN + 1 else ""
    others = f" Also: {listed}{more}." if listed else ""
    _fail(
        path,
        f"line {line} has {_plural(fields, 'field')}, expected {width} (one per header "
        f"column).{others}",
        "Put cells that contain the separator in double quotes, and give every line one cell "
        "per header column (empty cells are fine: write nothing between the separators).",
    )


def _check_field_counts(path: Path, scan: _CsvScan, width: int, records: int) -> None:
    """Find lines with too few fields, which pandas pads silently with empty cells."""
    bad, total, balanced = _numpy_counts(path, scan, width)
    if scan.has_quotes and (bad or not balanced or total != records):
        # A quote inside an unquoted cell (12" pipe) is plain text to the parser but flips the
        # quote parity of the byte scan: confirm with the csv module, which parses like pandas.
        confirmed = _csv_module_counts(path, scan, width)
        bad = bad if confirmed is None else confirmed
    if bad and scan.has_quotes and not balanced:
        _refuse_open_quote(path, scan)
    if bad:
        _raise_ragged(path, bad, width)


def _refuse_open_quote(path: Path, scan: _CsvScan) -> None:
    """A quoted cell that runs to the end of the file, named as such (error path only).

    pandas and the csv module (non-strict) read such a cell as one long last field and report a
    short line; the strict csv reader stops at the end of the data inside the quotes.
    """
    with _open_at(path, scan) as handle:
        source = handle if scan.newline == 10 else io.StringIO(handle.read().replace("\r", "\n"))
        reader = csv.reader(source, strict=True, delimiter=scan.sep)
        limit = csv.field_size_limit()
        csv.field_size_limit(max(limit, scan.size + 1))
        started = 1
        try:
            for _ in reader:
                started = reader.line_num + 1
        except csv.Error as exc:
            if "unexpected end of data" not in str(exc):
                return
        else:
            return
        finally:
            csv.field_size_limit(limit)
    _fail(
        path,
        f"a quoted cell is never closed (the cell starts in row {started + scan.skipped}): a "
        "'\"' is missing, so everything after it, to the end of the file, would be one cell.",
        "Close the quote, or remove the stray '\"' character.",
    )


def _numpy_counts(
    path: Path, scan: _CsvScan, width: int
) -> tuple[list[tuple[int, int]], int, bool]:
    """Fields per record from byte positions of separators, line ends and quotes, by chunk.

    Returns the records (numbered from 1 at the file's first line) whose field count is not
    ``width``, up to 100 per chunk, the number of records from the header on, and whether the
    quotes balance. Empty lines are skipped.
    """
    bad: list[tuple[int, int]] = []
    records = 0
    carry = 0
    parity = 0
    last_newline = -1
    last_byte = 0
    offset = 0
    newline = scan.newline
    separator = ord(scan.sep)
    with path.open("rb") as handle:
        handle.seek(scan.start)
        while chunk := handle.read(_CHUNK):
            array = np.frombuffer(chunk, dtype=np.uint8)
            is_end = array == newline
            is_comma = array == separator
            if scan.has_quotes:
                # Inside quotes after an odd number of quote bytes: a running XOR of the quote
                # bytes is that parity at every byte, in one pass (a position lookup per comma
                # was 2.5x slower). Quote bytes themselves are never commas or line ends.
                inside = np.bitwise_xor.accumulate(array == 34)
                if parity:
                    np.logical_not(inside, out=inside)
                np.logical_and(is_end, ~inside, out=is_end)
                np.logical_and(is_comma, ~inside, out=is_comma)
                parity = int(inside[-1])
            ends = np.flatnonzero(is_end)
            commas = np.flatnonzero(is_comma)
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
                bad += [(records + int(i) + 1 + scan.skipped, int(fields[i])) for i in wrong[:100]]
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
            bad.append((records + scan.skipped, carry + 1))
    return bad, records, parity == 0


def _csv_module_counts(path: Path, scan: _CsvScan, width: int) -> list[tuple[int, int]] | None:
    limit = csv.field_size_limit()
    csv.field_size_limit(max(limit, scan.size + 1))
    try:
        with _open_at(path, scan) as handle:
            source = (
                handle if scan.newline == 10 else io.StringIO(handle.read().replace("\r", "\n"))
            )
            counts = np.fromiter(map(len, csv.reader(source, delimiter=scan.sep)), dtype=np.int64)
    except csv.Error:
        return None
    finally:
        csv.field_size_limit(limit)
    wrong = np.flatnonzero((counts != width) & (counts != 0))
    return [(int(i) + 1 + scan.skipped, int(counts[i])) for i in wrong[:100]]


# --- Parquet -------------------------------------------------------------------------------------


def _read_parquet(path: Path, mapping: dict[str, str], notices: list[str]) -> _Raw:
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        metadata = pq.read_metadata(path)
        arrow_schema = metadata.schema.to_arrow_schema()
    except (pa.ArrowException, OSError) as exc:
        _fail(
            path,
            f"cannot read this as a Parquet file ({exc}).",
            "Check that the file is Parquet and not damaged; export it again if needed.",
        )
    _check_memory(path, metadata.num_rows, "parquet")
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
    data: dict[int, pd.Series] = {}
    for position in range(len(fields)):
        # Column by column, releasing each Arrow column once converted: the peak holds one
        # column twice, not the whole table.
        data[position] = _arrow_to_series(table.column(0))
        table = table.remove_column(0)
    return _Raw(plan, data, first_row=1, blank_rows_possible=False)


def _arrow_to_series(column: Any) -> pd.Series:
    """One Arrow column as the Series ``Table.to_pandas`` gives, without its detours.

    Dictionary columns become categoricals straight from the unified dictionary's indices (no
    per-row strings); dates in the accepted years become ``datetime64[ns]`` by one integer
    multiplication. Everything else, and every case the checks must see as read (dates outside
    the accepted years, null dictionary values), goes through ``to_pandas``.
    """
    import pyarrow as pa

    kind = column.type
    if (
        pa.types.is_dictionary(kind)
        and (pa.types.is_string(kind.value_type) or pa.types.is_large_string(kind.value_type))
        and column.num_chunks
    ):
        column = column.unify_dictionaries()
        dictionary = column.chunk(0).dictionary
        categories = pd.Index(dictionary.to_pylist(), dtype=str)
        if not dictionary.null_count and categories.is_unique:
            codes = np.empty(len(column), dtype=_code_dtype(len(categories)))
            start = 0
            for chunk in column.chunks:
                stop = start + len(chunk)
                codes[start:stop] = chunk.indices.fill_null(-1).to_numpy(zero_copy_only=False)
                start = stop
            dtype = pd.CategoricalDtype(categories)
            return pd.Series(pd.Categorical.from_codes(codes, dtype=dtype, validate=False))
    if pa.types.is_date32(kind) and column.null_count == 0 and len(column):
        stamps = np.empty(len(column), dtype=np.int64)
        start = 0
        for chunk in column.chunks:
            stop = start + len(chunk)
            stamps[start:stop] = chunk.view(pa.int32()).to_numpy()
            start = stop
        # Outside the accepted years the product could overflow: let the checks see the dates.
        if stamps.min() >= _FIRST_DAY and stamps.max() <= _LAST_DAY:
            stamps *= _DAY_NS
            return pd.Series(stamps.view("datetime64[ns]"), copy=False)
    if pa.types.is_float64(kind) and column.null_count:
        values = np.empty(len(column), dtype=np.float64)
        start = 0
        for chunk in column.chunks:
            stop = start + len(chunk)
            values[start:stop] = _float_values(chunk)
            start = stop
        return pd.Series(values, copy=False)
    return column.to_pandas(date_as_object=False, ignore_metadata=True)


def _float_values(array: Any) -> np.ndarray:
    """An Arrow number array as float64 with NaN for nulls (``to_numpy`` is slow with nulls).

    Integers become float64 as ``Table.to_pandas`` converts them: rounded to nearest.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    if not pa.types.is_float64(array.type):
        array = pc.cast(array, pa.float64(), safe=False)
    if array.null_count:
        array = pc.fill_null(array, np.nan)
    return array.to_numpy(zero_copy_only=False)


def _code_dtype(size: int) -> type[np.signedinteger[Any]]:
    """The smallest signed integer type that holds codes 0..size-1 and -1 for missing."""
    for dtype in (np.int8, np.int16, np.int32):
        if size <= np.iinfo(dtype).max:
            return dtype
    return np.int64


# --- Parquet and CSV, streamed: the fast path of read_portfolio ----------------------------------


class FastPathDeclined(Exception):
    """The streamed reader cannot vouch for a file; the full loader must read it.

    Raised for anything the full loader would refuse, change or remark on (empty or bad cells,
    control characters, ids stored as numbers, types it converts specially), so that the full
    loader gives its own message or result and both paths always agree.
    """


@dataclass
class _Dictionary:
    """A text column's distinct values across row groups, one global code each."""

    is_id: bool
    """Ids may not be blank and may not hold bidi controls; attributes may."""
    index: dict[str, int] = field(default_factory=dict)
    values: list[str] = field(default_factory=list)
    blank: list[bool] = field(default_factory=list)
    has_blank: bool = False
    lookalikes: dict[str, str] = field(default_factory=dict)
    """How ids that may look like others look (see :func:`lookalike_keys`) -> the first such id."""

    def codes(
        self, chunk: Any, positions: np.ndarray | None = None, out: np.ndarray | None = None
    ) -> np.ndarray:
        """Global codes of one chunk (dictionary-encoded or plain text).

        Args:
            chunk: An Arrow array of text, dictionary-encoded or not.
            positions: Only these rows (all rows when None).
            out: Where to write the codes (its integer type must hold them); int32 otherwise.
        """
        import pyarrow as pa

        if not pa.types.is_dictionary(chunk.type):
            chunk = chunk.dictionary_encode()
        if chunk.dictionary.null_count:
            raise FastPathDeclined("null dictionary value")
        local = chunk.dictionary.to_pylist()
        indices = chunk.indices
        if positions is not None:
            indices = indices.take(pa.array(positions))
        if indices.null_count:
            if self.is_id:
                raise FastPathDeclined("missing id")
            # A missing attribute is the empty string, as the full loader fills it.
            local.append("")
            indices = indices.fill_null(len(local) - 1)
        fresh = list(dict.fromkeys(v for v in local if v not in self.index))
        if fresh:
            self._add(fresh)
        dtype = np.int32 if out is None else out.dtype
        if len(self.values) > np.iinfo(dtype).max:
            raise FastPathDeclined("too many distinct values")
        lut = np.fromiter((self.index[v] for v in local), dtype=dtype, count=len(local))
        codes = np.take(lut, indices.to_numpy(zero_copy_only=False), out=out)
        if self.is_id and self.has_blank and np.asarray(self.blank)[codes].any():
            raise FastPathDeclined("blank id")
        return codes

    def _add(self, fresh: list[str]) -> None:
        import pyarrow as pa
        import pyarrow.compute as pc

        array = pa.array(fresh, type=pa.string())
        # Checked once per distinct value, as the full loader checks categories.
        pattern = _SUSPECT_PATTERN if self.is_id else _CONTROL_PATTERN
        if pc.any(pc.match_substring_regex(array, pattern)).as_py():
            raise FastPathDeclined("control characters")
        blank = [False] * len(fresh)
        if self.is_id and pc.max(pc.utf8_length(array)).as_py() > TEXT_MAX:
            raise FastPathDeclined("id too long")
        if self.is_id:
            self._check_lookalikes(array, fresh)
        if self.is_id:
            # Both notions of white space (Python's and Arrow's): whichever the full loader
            # applies, an id this path keeps is one it keeps too.
            trimmed = pc.utf8_trim_whitespace(array).to_pylist()
            blank = [not v.strip() or not t for v, t in zip(fresh, trimmed, strict=True)]
            self.has_blank = self.has_blank or any(blank)
        for value in fresh:
            self.index[value] = len(self.values)
            self.values.append(value)
        self.blank.extend(blank)

    def _check_lookalikes(self, array: Any, fresh: list[str]) -> None:
        """Decline when an id looks like another one (the full loader words the notice)."""
        import pyarrow as pa
        import pyarrow.compute as pc

        candidate = pc.match_substring_regex(array, _LOOKALIKE_CANDIDATE)
        plain = array
        if pc.any(candidate).as_py():
            originals = pc.filter(array, candidate).to_pylist()
            keys = lookalike_keys(pd.Series(originals, dtype=str)).tolist()
            others = set(fresh)
            for original, key in zip(originals, keys, strict=True):
                seen = self.lookalikes.setdefault(key, original)
                if seen != original or (key != original and (key in self.index or key in others)):
                    raise FastPathDeclined("look-alike ids")
            plain = pc.filter(array, pc.invert(candidate))
        if self.lookalikes and len(plain):
            known = pa.array(list(self.lookalikes), type=pa.string())
            if pc.any(pc.is_in(plain, value_set=known)).as_py():
                raise FastPathDeclined("look-alike ids")


@dataclass
class _Chunk:
    """One row group of a :class:`StreamSource`, converted."""

    start: int
    """File position (0-based) of its first row."""
    size: int
    columns: dict[str, np.ndarray] = field(default_factory=dict)
    selected: np.ndarray | None = None
    """Positions (inside the row group) at which the sparse columns were converted."""


@dataclass
class StreamSource:
    """A portfolio read one block of rows at a time and checked as the full loader checks it.

    A block is a Parquet row group (read from the file on demand) or, for CSV, a record batch
    Arrow has already parsed (``tables``). :meth:`chunks` yields canonical columns as numpy
    arrays: text as int32 codes into :meth:`values`, periods as int32 day numbers since
    1970-01-01, numbers as float64 with NaN for missing, lags as int64. A cell the full loader
    would refuse, change or remark on raises :class:`FastPathDeclined`; the caller then loads
    the file the full way.
    """

    path: Path
    file: Any
    """The open ``pyarrow.parquet.ParquetFile``, or None when the blocks are ``tables``."""
    columns: dict[str, str]
    """Canonical name (or attribute name) -> column name in the file."""
    attributes: tuple[str, ...]
    notices: tuple[str, ...]
    n_rows: int
    _plain_text: list[str] = field(default_factory=list)
    """File columns of plain text, read dictionary-encoded."""
    tables: list[Any] | None = None
    """The blocks, already in memory (CSV), one ``pyarrow.Table`` each."""
    date_format: str | None = None
    """``--date-format``: periods arrive as text and are parsed per distinct text."""
    _dictionaries: dict[str, _Dictionary] = field(default_factory=dict)
    _period_days: dict[str, int] = field(default_factory=dict)
    """Day number of each distinct period text parsed so far (with ``date_format``)."""

    def values(self, name: str) -> list[str]:
        """The distinct values of text column ``name`` read so far, in code order."""
        return self._dictionaries[name].values

    def chunks(
        self,
        names: Sequence[str],
        *,
        sparse: Sequence[str] = (),
        select: Callable[[int, int], np.ndarray] | None = None,
        into: dict[str, np.ndarray] | None = None,
        last: bool = False,
    ) -> Iterator[_Chunk]:
        """Every non-empty row group's columns, in file order.

        Row groups are read ahead on worker threads (decoding releases the GIL, and two row
        groups decode side by side); converting them stays on the calling thread, in order.

        Args:
            names: Columns converted on every row.
            sparse: Text columns converted only on the rows ``select(first_row, n_rows)``
                returns (positions inside the row group), e.g. one row per series.
            select: Required with ``sparse``.
            into: For text columns among ``names``: whole-file arrays to write the codes into
                (``columns[name]`` is then a view of it).
            last: These columns are not read again: blocks held in memory (CSV) let go of
                them once converted.
        """
        import pyarrow as pa
        import pyarrow.parquet as pq

        wanted = [self.columns[n] for n in (*names, *sparse)]
        local = threading.local()

        def read(group: int) -> Any:
            if self.tables is not None:
                return self.tables[group].select(wanted)
            if not hasattr(local, "file"):
                # One reader per thread; the parsed footer is shared.
                local.file = pq.ParquetFile(
                    self.path, read_dictionary=self._plain_text, metadata=self.file.metadata
                )
            try:
                return local.file.read_row_group(group, columns=wanted, use_threads=False)
            except (pa.ArrowException, OSError) as exc:
                # Damaged pages: the full loader reads the file and words the error.
                raise FastPathDeclined("unreadable row group") from exc

        groups = range(len(self.tables) if self.tables is not None else self.file.num_row_groups)
        workers = max(1, min(2, os.cpu_count() or 1))
        offset = 0
        with concurrent.futures.ThreadPoolExecutor(max_workers=workers) as pool:
            ahead: collections.deque[concurrent.futures.Future[Any]] = collections.deque()
            upcoming = iter(groups)
            for group in itertools.islice(upcoming, workers + 1):
                ahead.append(pool.submit(read, group))
            done = 0
            while ahead:
                table = ahead.popleft().result()
                for group in itertools.islice(upcoming, 1):
                    ahead.append(pool.submit(read, group))
                size = table.num_rows
                if size:
                    yield self._chunk(table, offset, names, sparse, select, into)
                if last and self.tables is not None:
                    self.tables[done] = self.tables[done].drop_columns(wanted)
                done += 1
                offset += size
                del table
        if offset != self.n_rows:  # pragma: no cover - footer and data disagree
            raise FastPathDeclined("row count")

    def _chunk(
        self,
        table: Any,
        offset: int,
        names: Sequence[str],
        sparse: Sequence[str],
        select: Callable[[int, int], np.ndarray] | None,
        into: dict[str, np.ndarray] | None,
    ) -> _Chunk:
        size = table.num_rows
        out = _Chunk(offset, size)
        for name, column in zip(names, table.columns, strict=False):
            target = into.get(name) if into else None
            if target is not None:
                start = offset
                for piece in column.chunks:
                    view = target[start : start + len(piece)]
                    values = self._convert(name, piece, view)
                    if values is not view:
                        view[:] = values
                    start += len(piece)
                out.columns[name] = target[offset : offset + size]
                continue
            parts = [self._convert(name, piece) for piece in column.chunks]
            out.columns[name] = parts[0] if len(parts) == 1 else np.concatenate(parts)
        if sparse and select is not None:
            out.selected = select(offset, size)
            for name in sparse:
                # Whole row group as one array: positions count from its first row.
                whole = table.column(self.columns[name]).combine_chunks()
                out.columns[name] = self._dictionary(name).codes(whole, out.selected)
        return out

    def _dictionary(self, name: str) -> _Dictionary:
        return self._dictionaries.setdefault(
            name, _Dictionary(is_id=name in (schema.ITEM, schema.LOCATION))
        )

    def _convert(self, name: str, chunk: Any, out: np.ndarray | None = None) -> np.ndarray:
        import pyarrow as pa

        kind = chunk.type
        if name in (schema.ITEM, schema.LOCATION) or name in self.attributes:
            return self._dictionary(name).codes(chunk, out=out)
        if chunk.null_count and name in (schema.PERIOD, schema.LAG):
            raise FastPathDeclined(f"missing {name}")
        if name == schema.PERIOD:
            if pa.types.is_dictionary(kind):
                days = _text_days(self, chunk)
            elif pa.types.is_date32(kind):
                days = chunk.view(pa.int32()).to_numpy()
            else:
                per_day = _UNITS_PER_DAY["ms" if pa.types.is_date64(kind) else kind.unit]
                whole, rest = np.divmod(chunk.view(pa.int64()).to_numpy(), per_day)
                if rest.any():
                    raise FastPathDeclined("time of day")
                if whole.min() < _FIRST_DAY or whole.max() > _LAST_DAY:
                    raise FastPathDeclined("year range")
                days = whole.astype(np.int32)
            if days.min() < _FIRST_DAY or days.max() > _LAST_DAY:
                raise FastPathDeclined("year range")
            return days
        if name == schema.LAG:
            lags = chunk.to_numpy()
            if lags.min() < 0 or lags.max() > LAG_MAX:
                raise FastPathDeclined("lag range")
            return lags.astype(np.int64)
        numbers = _float_values(chunk)
        low, high = np.fmin.reduce(numbers), np.fmax.reduce(numbers)
        if not np.isnan(low) and not (low > -_MAX_MAGNITUDE and high < _MAX_MAGNITUDE):
            raise FastPathDeclined("not finite")
        if name == schema.PRICE and low < 0:
            raise FastPathDeclined("negative price")
        return numbers


def _text_days(source: StreamSource, chunk: Any) -> np.ndarray:
    """Day numbers (since 1970-01-01) of a block of period texts, parsed once per distinct text
    by :func:`parse_periods` with the source's date format; anything else declines."""
    local = chunk.dictionary.to_pylist()
    fresh = [v for v in dict.fromkeys(local) if v not in source._period_days]
    if fresh:
        parsed = parse_periods(pd.Series(fresh, dtype=str), source.date_format)
        stamps = parsed.to_numpy()
        if np.isnat(stamps).any():
            raise FastPathDeclined("period not in the date format")
        days = stamps.astype("datetime64[D]").astype(np.int64)
        if days.min() < _FIRST_DAY or days.max() > _LAST_DAY:
            raise FastPathDeclined("year range")
        source._period_days.update(zip(fresh, days.tolist(), strict=True))
    lut = np.fromiter((source._period_days[v] for v in local), dtype=np.int32, count=len(local))
    return np.take(lut, chunk.indices.to_numpy(zero_copy_only=False))


def scan_parquet(
    path: str | Path,
    *,
    columns: dict[str, str] | None = None,
    options: FileOptions | None = None,
) -> StreamSource:
    """Open a Parquet portfolio for the streamed reader (reads the footer and schema only).

    ``options`` matter for text cells only (a decimal mark, a date format), and columns of
    text where numbers or dates belong decline this path: the full loader reads them.

    Raises:
        LoadError: The errors :func:`load_frame` raises before it reads any cell (file type,
            ``--columns``, column names), with the same messages.
        FastPathDeclined: The file needs the full loader.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    file_path = Path(path)
    kind = _file_kind(file_path)
    _checked_options(file_path, kind, options)
    if kind != "parquet":
        raise FastPathDeclined("not parquet")
    mapping = _checked_mapping(file_path, columns)
    try:
        arrow_schema = pq.read_schema(file_path)
    except (pa.ArrowException, OSError) as exc:
        raise FastPathDeclined("unreadable") from exc
    fields = [f for f in arrow_schema if not re.fullmatch(r"__index_level_\d+__", f.name)]
    for fld in fields:
        kind = fld.type
        if pa.types.is_nested(kind) or pa.types.is_binary(kind) or pa.types.is_large_binary(kind):
            raise FastPathDeclined("nested or binary column")
    notices: list[str] = []
    plan = _plan_columns(file_path, [f.name for f in fields], mapping, notices)
    if plan.unnamed:
        raise FastPathDeclined("unnamed column")
    names: dict[str, str] = {}
    plain_text: list[str] = []
    for position, fld in enumerate(fields):
        role = plan.roles[position]
        name = role if role is not None else plan.attributes.get(position)
        if name is None:
            continue
        # Column selection treats dots as paths into nested columns.
        if "." in fld.name or not _streamable(role, fld.type):
            raise FastPathDeclined(f"column {fld.name!r} of type {fld.type}")
        names[name] = fld.name
        if role in (schema.ITEM, schema.LOCATION, None) and not pa.types.is_dictionary(fld.type):
            plain_text.append(fld.name)
    try:
        # Plain text columns come back dictionary-encoded: no Python string per row.
        file = pq.ParquetFile(file_path, read_dictionary=plain_text)
    except (pa.ArrowException, OSError) as exc:
        raise FastPathDeclined("unreadable") from exc
    if file.metadata.num_rows == 0:
        raise FastPathDeclined("no rows")
    _check_memory(file_path, file.metadata.num_rows, "parquet-streamed")
    return StreamSource(
        path=file_path,
        file=file,
        columns=names,
        attributes=tuple(plan.attributes.values()),
        notices=tuple(notices),
        n_rows=file.metadata.num_rows,
        _plain_text=plain_text,
    )


def _streamable(role: str | None, kind: Any) -> bool:
    """Column types the streamed reader converts exactly as the full loader would."""
    import pyarrow as pa

    def text(t: Any) -> bool:
        return pa.types.is_string(t) or pa.types.is_large_string(t)

    if role in (schema.ITEM, schema.LOCATION, None):
        return text(kind) or (pa.types.is_dictionary(kind) and text(kind.value_type))
    if role == schema.PERIOD:
        return (
            pa.types.is_date32(kind)
            or pa.types.is_date64(kind)
            or (pa.types.is_timestamp(kind) and kind.tz is None)
        )
    if role == schema.LAG:
        return pa.types.is_integer(kind)
    return pa.types.is_floating(kind) or pa.types.is_integer(kind)


def scan_csv(
    path: str | Path,
    *,
    columns: dict[str, str] | None = None,
    options: FileOptions | None = None,
) -> StreamSource:
    """Parse a CSV portfolio with Arrow's multi-threaded reader, for the streamed build.

    ``options`` (separator, decimal mark, header row) are Arrow's own parse options; with a
    date format the periods are read as text and each distinct text is parsed by the full
    loader's :func:`parse_periods`, so both ways read the same dates.

    The checks that come before any cell is read (encoding, separator, header, ``--columns``)
    are the full loader's own, with its messages. Then the used columns are parsed with fixed
    types: text dictionary-encoded and never missing (``NA`` is an id), periods as ISO dates,
    numbers as float64 with the full loader's missing-value words, lags as integers. Anything
    Arrow refuses (a line with too many or too few fields, a cell that is not of its type, a
    period that is not ``YYYY-MM-DD``) declines the fast path, and the full loader then reads
    the file and reports it in its own words. Blank lines arrive as rows without a period,
    which also decline.

    Raises:
        LoadError: What :func:`load_frame` raises before it reads any cell.
        FastPathDeclined: The file needs the full loader.
    """
    import pyarrow as pa
    import pyarrow.csv as pa_csv

    file_path = Path(path)
    kind = _file_kind(file_path)
    dialect = _checked_options(file_path, kind, options)
    if kind != "csv":
        raise FastPathDeclined("not csv")
    mapping = _checked_mapping(file_path, columns)
    scan = _prescan_csv(file_path, dialect)
    header = _csv_header(file_path, scan, dialect, mapping)
    _check_memory(file_path, max(scan.lines - 1, 0), "csv-streamed")
    notices: list[str] = []
    plan = _plan_columns(file_path, header, mapping, notices)
    if plan.unnamed:
        raise FastPathDeclined("unnamed column")
    positions = [f"c{i}" for i in range(len(header))]
    text = pa.dictionary(pa.int32(), pa.string())
    kinds = {
        schema.PERIOD: pa.date32() if dialect.date_format is None else text,
        schema.LAG: pa.int64(),
    }
    names: dict[str, str] = {}
    types: dict[str, Any] = {}
    for position, role in enumerate(plan.roles):
        name = role if role is not None else plan.attributes.get(position)
        if name is None:
            # Not used (another column is mapped to this name), but parsed: the check below
            # must see every cell.
            types[positions[position]] = text
            continue
        names[name] = positions[position]
        types[positions[position]] = (
            text if role in (schema.ITEM, schema.LOCATION, None) else kinds.get(role, pa.float64())
        )

    def parse(newlines_in_values: bool) -> Any:
        try:
            source: Any = file_path
            if scan.start:
                # From the header line on (--header-row): the lines above it are not CSV.
                source = pa.OSFile(str(file_path))
                source.seek(scan.start)
            return pa_csv.read_csv(
                source,
                read_options=pa_csv.ReadOptions(
                    skip_rows=1, column_names=positions, block_size=_CSV_BLOCK_BYTES
                ),
                parse_options=pa_csv.ParseOptions(
                    delimiter=scan.sep,
                    quote_char='"',
                    double_quote=True,
                    newlines_in_values=newlines_in_values,
                    ignore_empty_lines=False,
                ),
                convert_options=pa_csv.ConvertOptions(
                    column_types=types,
                    include_columns=list(types),
                    null_values=list(schema.NUMERIC_MISSING),
                    strings_can_be_null=False,
                    quoted_strings_can_be_null=True,  # pandas reads "" and "NA" as it reads NA
                    decimal_point=dialect.decimal,
                ),
            )
        except (pa.ArrowException, OSError) as exc:
            raise FastPathDeclined("arrow csv") from exc

    # Arrow splits the file into blocks at line breaks; with quotes in the file, a line break
    # inside a quoted cell could split a record, unless Arrow is told to look for them, which
    # costs about 40 % more time. So the faster parse is tried first and kept only when it
    # provably split no quoted cell: one row per line of the file, and no quote character in
    # any parsed value (a split cell leaves its closing quote as text in a later row, or a
    # number or date that does not parse). Otherwise the file is parsed again the careful way.
    table = None
    if scan.has_quotes:
        try:
            table = parse(newlines_in_values=False)
        except FastPathDeclined:
            table = None
        if table is not None and (table.num_rows != scan.lines - 1 or _any_quote_in_text(table)):
            table = None
    if table is None:
        table = parse(newlines_in_values=scan.has_quotes)
    table = table.select([c for c in positions if c in names.values()])
    if table.num_rows == 0:
        raise FastPathDeclined("no rows")
    return StreamSource(
        path=file_path,
        file=None,
        columns=names,
        attributes=tuple(plan.attributes.values()),
        notices=tuple(notices),
        n_rows=table.num_rows,
        tables=[pa.Table.from_batches([batch]) for batch in table.to_batches()],
        date_format=dialect.date_format,
    )


def _any_quote_in_text(table: Any) -> bool:
    """Whether any text value of the table holds a double quote (checked per dictionary)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    for column in table.columns:
        if not pa.types.is_dictionary(column.type):
            continue
        for chunk in column.chunks:
            if pc.any(pc.match_substring(chunk.dictionary, '"')).as_py():
                return True
    return False


#: Bytes of CSV text per block Arrow parses (and per block the streamed build converts).
_CSV_BLOCK_BYTES = 1 << 24


# --- xlsx ----------------------------------------------------------------------------------------

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


def _read_xlsx(
    path: Path,
    mapping: dict[str, str],
    sheet: str | None,
    notices: list[str],
    options: FileOptions | None = None,
) -> tuple[_Raw, str]:
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
    if options.header_row is None and not _has_required(header_row, mapping):
        # A title block above the header (one cell or several, merged or not): the header is
        # the first row below it that names the required columns.
        found = next((i for i, row in rows.early if _has_required(row, mapping)), None)
        if found is not None:
            _title_block(
                path,
                f"sheet '{name}' row {header_at + 1}",
                filled,
                f"row {found + 1}",
                FileOptions(options.sep, options.decimal, options.date_format, found + 1),
                mapping,
            )
    if len(filled) == 1 and rows.wide_start and options.header_row is None:
        _fail(
            path,
            f"sheet '{name}' row {header_at + 1} holds only "
            f"'{_sanitize_str(str(filled[0]))[:80]}', which looks like a title, not the "
            "header: the header must be the first non-empty row, with one name per column.",
            "Read the header from its row with --header-row N (the rows above it are skipped), "
            "or delete the title rows (and unmerge the title cells), then save and load the "
            "file again.",
        )
    if rows.beyond is not None:
        row_number, column = rows.beyond
        _fail(
            path,
            f"sheet '{name}' row {row_number} has a value in column "
            f"{_column_letter(column)}, right of the last header cell: the header "
            "is shorter than the data.",
            "Give every column a name in the header row, or delete the extra cells.",
        )
    n_rows = len(body)
    columns = list(zip(*body, strict=True)) if body else [() for _ in range(width)]
    body.clear()
    plan = _plan_columns(path, [_header_text(v) for v in header_row], mapping, notices)
    data = {
        i: pd.Series(np.array(col, dtype=object), dtype=object) for i, col in enumerate(columns)
    }
    del columns
    if scan is None or scan.formulas:
        _check_formulas(path, name, data, plan, header_at, notices)
    file_rows = np.arange(n_rows, dtype=np.int64) + header_at + 2
    return _Raw(plan, data, first_row=header_at + 2, file_rows=file_rows), name


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
                _fail(
                    path,
                    f"sheet '{name}' row {header_row} is empty, but --header-row {header_row} "
                    "says the header is there.",
                    "Give the row number of the header as the spreadsheet shows it.",
                )
            continue
        if index - header_at <= _TITLE_ROWS:
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
            _fail(
                path,
                f"sheet '{name}' has no row {header_row}, which --header-row names as the header.",
                "Give the row number of the header as the spreadsheet shows it.",
            )
        _fail(path, f"sheet '{name}' is empty.", "Choose the sheet with the data via --sheet.")
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
            _fail(
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
            _fail(
                path,
                f"sheet '{name}' row {count} has cells beyond column {XLSX_MAX_COLUMNS:,} "
                f"({_column_letter(XLSX_MAX_COLUMNS)}), the last column of an Excel sheet.",
                _XLSX_TOO_LARGE_HINT,
            )
        if cells > XLSX_MAX_CELLS:
            _too_many_cells(path, name)
        yield row


def _too_many_rows(path: Path, name: str) -> NoReturn:
    _fail(
        path,
        f"sheet '{name}' has more than {XLSX_MAX_ROWS:,} rows (empty rows count too), the most "
        "an Excel sheet holds and the most triage reads from one.",
        _XLSX_TOO_LARGE_HINT,
    )


def _too_many_cells(path: Path, name: str) -> NoReturn:
    _fail(
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
    _fail(path, f"{where} cannot be read: {what}.", _XLSX_DAMAGED_HINT)


def _unopenable(path: Path, exc: BaseException) -> NoReturn:
    """A workbook the reader fails on while opening it (before any sheet is read)."""
    try:
        with zipfile.ZipFile(path) as archive:
            charts = [n for n in archive.namelist() if n.lower().startswith("xl/chartsheets/")]
    except (zipfile.BadZipFile, OSError):
        charts = []
    if isinstance(exc, AttributeError) and charts:
        _fail(
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
                _fail(
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
                    _fail(
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
        _fail(
            path,
            f"cannot open this as an Excel workbook ({exc}).",
            "Check that it is an .xlsx file saved by Excel or LibreOffice, not damaged.",
        )
    return scans


def _oversized_part(path: Path, info: zipfile.ZipInfo) -> NoReturn:
    _fail(
        path,
        f"the part '{_sanitize_str(info.filename)}' of the workbook unpacks to "
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
    try:
        with zipfile.ZipFile(path) as archive:
            return _scan_part(path, archive, member.lstrip("/"), f"sheet '{name}'", sheet=name)
    except KeyError:
        return None  # the reader reports the missing part
    except (zipfile.BadZipFile, zlib.error, EOFError) as exc:
        _damaged_workbook(path, f"sheet '{name}'", exc)


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
                _fail(
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
        _fail(
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
        _fail(
            path,
            f"sheet '{sheet}' holds far more XML elements than its {scan.rows:,} rows and "
            f"{scan.cells:,} cells need.",
            _XLSX_DAMAGED_HINT,
        )
    if scan.outside > _XLSX_MAX_OTHER_TAGS:
        _fail(
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
            unset.append(f"column {_label(plan, position)} {format_rows(rows.tolist())}")
        if plan.roles[position] in schema.NUMERIC:
            values = column.tolist()
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
    options: FileOptions = field(default_factory=FileOptions)

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


def _build(
    path: Path,
    raw: _Raw,
    notices: list[str],
    sheet: str | None,
    options: FileOptions | None = None,
) -> LoadedFrame:
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

    ctx = _Context(path, plan, rows, notices, options=options or FileOptions())
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
            f"{total} {'cell' if total == 1 else 'cells'} contain control characters (column "
            f"{where}). They are kept exactly in CSV, JSON, exports and the ledger, and shown "
            "as visible symbols on screen: ␀-␟ for C0 (tab ␉, line feed ␊, escape ␛), ␡ for "
            "DEL, � for C1."
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


def _clean_controls(
    ctx: _Context, position: int, values: pd.Series, *, replace: bool = False
) -> pd.Series:
    """Count the cells holding control characters (checked vectorised first), for the notice.

    Ids and attributes keep them: the text stays exactly as written, so that machine-readable
    output joins back with the file; whatever shows it in a terminal makes them visible
    (``triage.core.text.visible``). With ``replace`` (periods, which are parsed, never written
    back) they are replaced by visible symbols, so that a message quoting the cell is safe.
    """
    name = ctx.plan.headers[position]
    if isinstance(values.dtype, pd.CategoricalDtype):
        cats = values.cat.categories
        dirty = np.asarray(cats.str.contains(_CONTROL_PATTERN, regex=True))
        if not dirty.any():
            return values
        count = int(np.isin(_codes(values), np.flatnonzero(dirty)).sum())
        cleaned = (
            _recode(values, pd.Index(cats.str.translate(_CONTROL_TABLE), dtype=str))
            if replace
            else values
        )
    else:
        mask = values.str.contains(_CONTROL_PATTERN, regex=True, na=False).to_numpy(dtype=bool)
        if not mask.any():
            return values
        count = int(mask.sum())
        cleaned = values
        if replace:
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
    distinct = _distinct_ids(text)
    _check_id_length(ctx, position, text, distinct, role)
    _note_lookalikes(ctx, position, distinct)
    if suspect and bool(strings.str.contains(_BIDI_PATTERN, regex=True, na=False).any()):
        ctx.notices.append(
            f"Column {_label(ctx.plan, position)} has ids containing bidirectional text controls "
            "(U+202A-U+202E, U+2066-U+2069), which can make an id look different from what it is."
        )
    if role == schema.LOCATION and not isinstance(text.dtype, pd.CategoricalDtype):
        text = text.astype("category")
    return text


def _distinct_ids(text: pd.Series) -> pd.Series:
    """The distinct ids a column holds (categories no row uses are left out)."""
    if isinstance(text.dtype, pd.CategoricalDtype):
        codes = _codes(text)
        used = np.bincount(codes[codes >= 0], minlength=len(text.cat.categories)) > 0
        return pd.Series(text.cat.categories[used], dtype=str)
    return pd.Series(pd.unique(text.dropna()), dtype=str)


def _check_id_length(
    ctx: _Context, position: int, text: pd.Series, distinct: pd.Series, role: str
) -> None:
    """Refuse ids the decision ledger could not store, here rather than at every save."""
    lengths = distinct.str.len().to_numpy()
    if not len(lengths) or lengths.max() <= TEXT_MAX:
        return
    long_rows = text.isin(distinct[lengths > TEXT_MAX]).to_numpy(dtype=bool)
    what = "item ids" if role == schema.ITEM else "locations"
    ctx.fail(
        position,
        f"has {what} longer than {TEXT_MAX:,} characters (the most the decision ledger stores)",
        np.flatnonzero(long_rows),
        None,
        "Shorten those ids, or check that --columns maps the right column to "
        f"{role} (an id is a code or a short name).",
        f"The longest is {int(lengths.max()):,} characters.",
    )


def lookalike_keys(ids: pd.Series) -> pd.Series:
    """How each id looks: NFKC form, invisible characters removed, spaces made one plain space,
    none at the ends. Ids with the same key look alike on screen (or nearly).

    Args:
        ids: Distinct ids, as ``str``.
    """
    return (
        ids.str.normalize("NFKC")
        .str.replace(f"[{_INVISIBLE}]", "", regex=True)
        .str.replace(f"[{_SPACES}]+", " ", regex=True)
        .str.strip(" ")
    )


def _lookalike_candidates(ids: pd.Series) -> np.ndarray:
    """Which ids could look like another (everything else looks like itself only)."""
    # One pass over all ids joined (C speed) settles the usual case: plain ASCII, single spaces.
    joined = "\n" + "\n".join(ids.tolist()) + "\n"
    if joined.isascii() and not any(odd in joined for odd in ("  ", " \n", "\n ")):
        return np.zeros(len(ids), dtype=bool)
    return ids.str.contains(_LOOKALIKE_CANDIDATE, regex=True).to_numpy(dtype=bool)


def _note_lookalikes(ctx: _Context, position: int, ids: pd.Series) -> None:
    """Notice ids that look alike but differ: kept apart, but the reviewer should know."""
    candidate = _lookalike_candidates(ids)
    if not candidate.any():
        return
    originals = ids[candidate]
    keys = lookalike_keys(originals)
    plain = ids[~candidate]
    hits = plain[plain.isin(keys).to_numpy(dtype=bool)]
    pairs = pd.DataFrame(
        {"key": pd.concat([keys, hits]).to_numpy(), "id": pd.concat([originals, hits]).to_numpy()}
    )
    shared = pairs[pairs["key"].duplicated(keep=False).to_numpy()]
    if shared.empty:
        return
    groups = shared.groupby("key", sort=False)["id"].agg(list)
    examples = "; ".join(
        " and ".join(_shown_id(v) for v in sorted(group)[:3]) for group in groups.iloc[:_SHOWN]
    )
    ctx.notices.append(
        f"Column {_label(ctx.plan, position)}: {len(shared)} ids look like another id but "
        "differ in spaces, Unicode form or invisible characters; each is kept as its own "
        f"series: {examples}"
        + (f" and {len(groups) - _SHOWN} more groups" if len(groups) > _SHOWN else "")
        + ". If they are the same, write them the same way in the file."
    )


def _shown_id(text: str) -> str:
    """An id quoted, with what does not show (and control characters) written as a code
    (``\\u200D``, ``\\u001B``)."""
    out = []
    for ch in text:
        kind = unicodedata.category(ch)
        if (
            kind in ("Cc", "Mn", "Me", "Cf", "Zl", "Zp")
            or (kind == "Zs" and ch != " ")
            or ch in _INVISIBLE
        ):
            out.append(f"\\u{ord(ch):04X}" if ord(ch) <= 0xFFFF else f"\\U{ord(ch):08X}")
        else:
            out.append(ch)
    return "'" + "".join(out) + "'"


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
    text = _clean_controls(ctx, position, text, replace=True)
    if not isinstance(text.dtype, pd.CategoricalDtype):
        text = text.astype("category")
    cats = pd.Series(text.cat.categories, dtype=str)
    parsed = parse_periods(cats, ctx.options.date_format)
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


def parse_periods(texts: pd.Series, date_format: str | None = None) -> pd.Series:
    """Period texts -> ``datetime64[us]``, NaT where a text is not a period.

    Without ``date_format``: ISO ``YYYY-MM-DD`` / ``YYYY-MM`` only. With it (``--date-format``,
    e.g. ``%d.%m.%Y``): exactly that pattern, as ``datetime.strptime`` reads it, digits 0-9
    only; a format without a day reads the first of the month. Spaces around a text are
    ignored. Both read paths parse periods here, once per distinct text.
    """
    if date_format is None:
        return _parse_iso(texts)
    stripped = texts.str.strip()
    # \d is any script's digit in Python's re: a digit that is not 0-9 is refused.
    foreign = stripped.str.contains(r"(?![0-9])\d", regex=True, na=False).to_numpy(dtype=bool)
    out = pd.to_datetime(stripped.where(~foreign), format=date_format, errors="coerce")
    return pd.Series(np.asarray(out, dtype="datetime64[us]"), copy=False)


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
    # Cells that are neither dates nor text (numbers) and text that is not an ISO date are
    # reported together, in row order, so that one message lists every kind of bad cell.
    wrong = ~(is_date | is_text | missing)
    result = np.empty(len(cells), dtype="datetime64[us]")
    if is_date.any():
        dates = pd.to_datetime(pd.Series([cells[i] for i in np.flatnonzero(is_date)], dtype=object))
        result[is_date] = dates.to_numpy(dtype="datetime64[us]")
    if is_text.any():
        text = pd.Series([_sanitize_str(cells[i]) for i in np.flatnonzero(is_text)], dtype=str)
        parsed = parse_periods(text, ctx.options.date_format)
        wrong[np.flatnonzero(is_text)[parsed.isna().to_numpy()]] = True
        result[is_text] = parsed.to_numpy()
    if wrong.any():
        _date_error(ctx, position, np.flatnonzero(wrong), values)
    series = pd.Series(result, copy=False)
    _check_stamps(ctx, position, series)
    return series.astype("datetime64[ns]")


def _date_error(ctx: _Context, position: int, bad: np.ndarray, values: pd.Series) -> NoReturn:
    sample = [str(v).strip() for v in values.iloc[bad[:200]].tolist()]
    notes = []
    slash = next(
        (s for s in sample if re.fullmatch(r"[0-9]{1,2}[/.][0-9]{1,2}[/.][0-9]{2,4}", s)), None
    )
    if slash and ctx.options.date_format is None:
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
    digits = _foreign_digits(sample)
    if digits:
        notes.append(f"Dates are written with the digits 0-9 ({digits}).")
    date_format = ctx.options.date_format
    invalid = next((s for s in sample if _ISO_DATE.fullmatch(s)), None)
    if invalid and date_format is None:
        notes.append(f"'{invalid}' is not a date in the calendar.")
    # Which --date-format would read them (advice only: several may fit, none is applied).
    advice = date_format_advice(sample) if not digits else ""
    if date_format is not None:
        if advice and f"--date-format {date_format} " in f"{advice} ":
            advice = ""  # the format given fits the pattern: the dates themselves are wrong
        if not advice and not digits:
            notes.append("They do not exist in the calendar or are written another way.")
        ctx.fail(
            position,
            f"has dates that do not match --date-format {date_format}",
            bad,
            values,
            "Give --date-format the pattern of the file's periods (%d day, %m month, %Y year: "
            "%d.%m.%Y reads 01.10.2025), or correct those cells.",
            " ".join([*notes, advice]).strip(),
        )
    ctx.fail(
        position,
        "has dates that are ambiguous or not ISO",
        bad,
        values,
        "Write dates as YYYY-MM-DD (e.g. 2024-03-04), or YYYY-MM for months (read as the first "
        "of the month); in Excel, format the column as yyyy-mm-dd before saving"
        + ("; or read them as they are with --date-format (see above)." if advice else "."),
        " ".join([*notes, advice]).strip(),
    )


def _foreign_digits(sample: list[str]) -> str:
    """Digits other than 0-9 in the sample, named for a message ('' when there are none)."""
    found = list(
        dict.fromkeys(ch for text in sample for ch in text if ch.isdigit() and not ch.isascii())
    )
    if not found:
        return ""
    shown = ", ".join(f"'{ch}'" for ch in found[:3])
    return f"{shown} {'is a digit' if len(found) == 1 else 'are digits'} of another script"


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
        numbers, bad = _numbers_from_text(values, ctx.options.decimal)
        if bad.any():
            _number_error(ctx, position, np.flatnonzero(bad), values)
        raw = values
    # fmin/fmax skip NaN without allocating: one pass each settles the usual all-good case.
    low, high = np.fmin.reduce(numbers), np.fmax.reduce(numbers)
    if not (low > -_MAX_MAGNITUDE and high < _MAX_MAGNITUDE) and not np.isnan(low):
        finite = np.isfinite(numbers) | np.isnan(numbers)
        # 2**53 itself is refused: 9007199254740993 reads as 9007199254740992.0 = 2**53.
        too_big = np.abs(np.where(finite, numbers, 0.0)) >= _MAX_MAGNITUDE
        shown = raw if raw is not None else pd.Series(numbers, copy=False)
        ctx.fail(
            position,
            "has values that are not finite or are too large",
            np.flatnonzero(~finite | too_big),
            shown,
            "Replace them with real quantities; leave the cell empty for a missing value.",
            f"Numbers must be finite and smaller than {_MAX_MAGNITUDE:,.0f} in size, the limit "
            "below which every whole number is held exactly.",
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


def _numbers_from_text(values: pd.Series, decimal: str = ".") -> tuple[np.ndarray, np.ndarray]:
    """Parse text (or mixed xlsx cells) as numbers: returns float64 values and a bad-cell mask.

    With ``decimal`` ``","`` a number is written ``1,5`` (``1.5`` is refused: a point could be
    a thousands separator), as pandas reads ``decimal=","``.
    """
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
            parsed, wrong = _numbers_from_text(
                pd.Series([cells[i] for i in texts], dtype=str), decimal
            )
            numbers[texts] = parsed
            bad[texts] = wrong
        return numbers, bad
    text = values.astype(str) if not isinstance(values.dtype, pd.StringDtype) else values
    stripped = text.str.strip()
    missing = (stripped.isin(schema.NUMERIC_MISSING) | text.isna()).to_numpy(dtype=bool)
    pattern = _NUMBER if decimal == "." else _NUMBER.replace("\\.", ",")
    valid = stripped.str.fullmatch(pattern, case=False).to_numpy(dtype=bool, na_value=False)
    bad = ~missing & ~valid
    numbers = np.full(len(text), np.nan)
    good = valid & ~missing
    written = stripped[good] if decimal == "." else stripped[good].str.replace(",", ".")
    # float() per cell: accepts 1e400 (-> inf, reported as not finite) like the CSV parser does.
    numbers[good] = np.asarray(written.to_numpy(dtype=object), dtype=np.float64)
    return numbers, bad


def _number_error(ctx: _Context, position: int, bad: np.ndarray, values: pd.Series) -> NoReturn:
    sample = [str(v).strip() for v in values.iloc[bad[:200]].tolist()]
    hints = []
    comma = ctx.options.decimal == ","
    if comma and any(re.fullmatch(r"[+-]?[0-9]*[.][0-9]+(?:,[0-9]*)?", s) for s in sample):
        hints.append(
            "with --decimal , a number is written 1,5 and without thousands separators "
            "(1500, not 1.500: a point could be either, so it is not read)"
        )
    elif not comma and any(re.fullmatch(r"[+-]?[0-9]*,[0-9]+", s) for s in sample):
        hints.append(
            "write decimals with a point and no thousands separator (1.5 and 1234, not "
            "1,5 or 1,234); or, if the file writes decimal commas, read it with --decimal , "
            "(such files usually separate their fields with semicolons: --sep ';')"
        )
    if any(re.fullmatch(r"\(\s*[\d.,]+\s*\)", s) for s in sample):
        hints.append("write negative numbers (returns) with a minus sign: -5, not (5)")
    if any(s in _EXCEL_ERRORS for s in sample):
        hints.append(
            "fix the Excel formulas that give errors (#DIV/0!, #VALUE!), or clear those cells"
        )
    digits = _foreign_digits(sample)
    if digits:
        hints.append(f"write digits as 0-9 ({digits})")
    hints.append("leave a cell empty (or write NA) for a missing value")
    hint = "Use plain numbers such as 12 or -3.5: " + "; ".join(hints) + "."
    ctx.fail(position, "has values that are not numbers", bad, values, hint)


def _lags(ctx: _Context, position: int, values: pd.Series) -> pd.Series:
    dtype = values.dtype
    if isinstance(dtype, np.dtype) and dtype.kind in "iu":
        if dtype.kind == "u" and len(values) and values.max() > LAG_MAX:
            _lag_range_error(ctx, position, np.flatnonzero(values.to_numpy() > LAG_MAX), values)
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
        # Checked before the cast: a float past the int64 range would wrap around to negative.
        large = np.flatnonzero(~missing & (numbers > LAG_MAX))
        if large.size:
            _lag_range_error(ctx, position, large, values)
        lags = np.where(missing | (numbers < -LAG_MAX), -1, numbers).astype(np.int64)
        shown = values
    else:
        text, missing_text = _text(values)
        if not isinstance(text.dtype, pd.CategoricalDtype):
            text = text.astype("category")
        cats = pd.Series(text.cat.categories, dtype=str).str.strip()
        codes = _codes(text)
        empty_cats = np.flatnonzero(cats.isin(schema.NUMERIC_MISSING).to_numpy())
        missing = missing_text | np.isin(codes, empty_cats)
        integer = _INTEGER if ctx.options.decimal == "." else _INTEGER.replace("\\.", ",")
        whole = cats.str.fullmatch(integer).to_numpy(dtype=bool, na_value=False)
        bad_cats = np.flatnonzero(~whole & ~cats.isin(schema.NUMERIC_MISSING).to_numpy())
        wrong = np.isin(codes, bad_cats) & ~missing
        if wrong.any():
            _lag_error(ctx, position, np.flatnonzero(wrong), text)
        # As float64 first: a whole number of any length converts, where int64 would overflow.
        numbers = pd.to_numeric(cats.where(whole, "0").str.replace(",", ".")).to_numpy(
            dtype=np.float64
        )
        too_large = np.isin(codes, np.flatnonzero(whole & (numbers > LAG_MAX)))
        if too_large.any():
            _lag_range_error(ctx, position, np.flatnonzero(too_large), text)
        cat_values = np.where(whole & (numbers >= -LAG_MAX), numbers, -1).astype(np.int64)
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
    if lags.max() > LAG_MAX:
        _lag_range_error(ctx, position, np.flatnonzero(lags > LAG_MAX), shown)
    return pd.Series(lags, dtype=np.int64, copy=False)


def _lag_range_error(ctx: _Context, position: int, bad: np.ndarray, values: pd.Series) -> NoReturn:
    ctx.fail(
        position,
        f"has lags larger than {LAG_MAX:,} periods",
        bad,
        values,
        "A lag counts periods from making the forecast to the period it is for (0, 1, 2, ...); "
        "check that this is the lag column (or map another with --columns lag=<column>).",
    )


def _lag_error(ctx: _Context, position: int, bad: np.ndarray, values: pd.Series) -> NoReturn:
    ctx.fail(
        position,
        "has values that are not whole numbers",
        bad,
        values,
        "Write the lag as a whole number of periods (0, 1, 2, ...).",
    )
