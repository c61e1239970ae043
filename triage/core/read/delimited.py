"""CSV files: the byte scan, the header, the full read with pandas and the streamed scan.

The scan (:class:`CsvScan`) checks the encoding and counts separators, line ends and quotes in
one streaming pass. The header is found on the first line or on ``--header-row``; a header below
a title block or split by another separator is refused with the options that would read the
file (``triage.core.dialect``). :func:`read_delimited` parses the file with pandas and checks
the field count of every line; :func:`scan_csv` parses it with Arrow's multi-threaded reader for
the streamed build (``triage.core.read.stream``) and declines whatever the full read would
refuse or remark on.
"""

from __future__ import annotations

import codecs
import contextlib
import csv
import io
import itertools
import re
import warnings
from dataclasses import dataclass
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
from triage.core.read.cells import ISO_DATE
from triage.core.read.columns import (
    TITLE_ROWS,
    ColumnPlan,
    RawColumns,
    checked_mapping,
    checked_options,
    file_kind,
    has_required,
    header_text,
    plan_columns,
    refuse_title_block,
)
from triage.core.read.memory import check_memory, competing_columns
from triage.core.read.messages import EXAMPLES_SHOWN, fail, plural, sanitized
from triage.core.read.stream import FastPathDeclined, StreamSource

_CHUNK = 1 << 23


_HEADER_BYTES = 1 << 20


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
                fail(
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
    fail(
        path,
        f"--header-row {line} was given, but the file has only {plural(lines, 'line')}.",
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
            fail(path, f"this is not CSV text: the file is {what}.", hint)


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
        preview = sanitized(raw_line.decode("cp1252"))
        guess = (
            " It looks like Windows-1252 (what Excel's 'CSV (Comma delimited)' writes); "
            f"read that way, line {line} is: '{preview}'."
        )
    except UnicodeDecodeError:
        guess = " The encoding could not be recognised."
    fail(
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
            fail(
                path,
                f"--header-row {scan.skipped + 1} was given, but nothing follows line "
                f"{scan.skipped}.",
                "Give the line number of the header as a text editor shows it.",
            )
        fail(
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
            fail(
                path,
                f"line {first} is empty, but --header-row {first} says the header is there.",
                "Give the line number of the header as a text editor shows it.",
            )
        fail(
            path,
            "the first line is empty; the header must be on line 1.",
            "Delete the empty lines above the header, or give its line with --header-row N.",
        )
    if not has_required(header, mapping):
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
    rows = _records(text, options.sep, TITLE_ROWS, cut)
    found = next((line for line, row in rows[1:] if has_required(row, mapping)), None)
    if found is not None:
        title = [c for c in rows[0][1] if c.strip()]
        refuse_title_block(
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
        rows = _records(text, sep, TITLE_ROWS, cut)
        found = next((line for line, row in rows if has_required(row, mapping)), None)
        if found is not None:
            _wrong_separator(path, text, sep, found, options, mapping, skipped, cut)


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
    names = [header_text(c).strip().lower() for c in rows[0]]

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
    if date_format is None and periods and not all(ISO_DATE.match(v.strip()) for v in periods):
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
        details.append(f"decimal commas (e.g. '{sanitized(example)}')")
    if date_format is not None and options.date_format is None:
        details.append(f"dates such as '{sanitized(periods[0].strip())}'")
    detail = f" with {' and '.join(details)}" if details else ""
    where = f" below a title block (line {header_row})" if at else ""
    command = suggested.command_line()
    if sep == "," and command:
        todo = f"Leave out --sep '{sanitized(options.sep)}' and read it with {command}."
    elif sep == ",":
        todo = f"Leave out --sep '{sanitized(options.sep)}'."
    else:
        todo = f"Read it with {command}."
    shown = sanitized(text[: text.find("\n")] if "\n" in text else text)[:80]
    fail(
        path,
        f"the header is not split by '{sanitized(options.sep)}' (line {skipped + 1} reads "
        f"'{shown}'): this looks like a {SEPARATORS[sep]}-separated file{detail}{where}."
        f"{advice}",
        f"{todo} (Or save it from the spreadsheet as 'CSV UTF-8 (Comma delimited)' with '.' as "
        "the decimal mark, or as .xlsx.)",
    )


def _csv_dtypes(plan: ColumnPlan) -> tuple[dict[str, Any], dict[str, list[str]]]:
    dtypes: dict[str, Any] = {}
    na_values: dict[str, list[str]] = {}
    for position, role in enumerate(plan.roles):
        name = f"c{position}"
        if schema.is_number_column(role):
            dtypes[name] = "float64"
            na_values[name] = list(schema.NUMERIC_MISSING)
        elif role == schema.ITEM:
            dtypes[name] = str
        else:
            # Few distinct values (period, lag, location, attributes): the parser builds the
            # categories itself, which is faster than str and makes checks per distinct value.
            dtypes[name] = "category"
    return dtypes, na_values


def read_delimited(
    path: Path, mapping: dict[str, str], notices: list[str], options: FileOptions
) -> RawColumns:
    scan = _prescan_csv(path, options)
    header = _csv_header(path, scan, options, mapping)
    check_memory(path, max(scan.lines - 1, 0), "csv", competing_columns(header, mapping))
    plan = plan_columns(path, header, mapping, notices)
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
            if schema.is_number_column(role):
                dtypes[f"c{position}"] = str
        try:
            frame = read(dtypes, {})
        except ValueError as exc:
            fail(
                path,
                f"the file cannot be parsed as CSV ({exc}).",
                "Check that the file is comma-separated with one header line.",
            )
    expected = (width - 1) * (len(frame) + 1)
    if scan.has_quotes or scan.commas != expected:
        _check_field_counts(path, scan, width, len(frame) + 1)
    data = {position: frame[f"c{position}"] for position in range(width)}
    return RawColumns(plan, data, first_row=scan.skipped + 2)


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
            fail(
                path,
                f"a quoted cell is never closed{where}: a '\"' is missing.",
                "Close the quote, or remove the stray '\"' character.",
            )
        else:
            fail(
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
        fail(
            path,
            f"line {first_line + 1} has {fields} fields, expected {width}: the header has fewer "
            "names than the data rows have cells, so a column name is probably missing.",
            f"Give every column a name in the header (line {first_line}), or remove the extra "
            f"cells; if line {first_line} is a title above the header, read the file with "
            "--header-row N (N: the line of the header).",
        )
    listed = "; ".join(f"line {n} has {k}" for n, k in bad[1 : EXAMPLES_SHOWN + 1])
    more = (
        f" and {len(bad) - EXAMPLES_SHOWN - 1} more lines" if len(bad) > EXAMPLES_SHOWN + 1 else ""
    )
    others = f" Also: {listed}{more}." if listed else ""
    fail(
        path,
        f"line {line} has {plural(fields, 'field')}, expected {width} (one per header "
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
    fail(
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
    kind = file_kind(file_path)
    dialect = checked_options(file_path, kind, options)
    if kind != "csv":
        raise FastPathDeclined("not csv")
    mapping = checked_mapping(file_path, columns)
    scan = _prescan_csv(file_path, dialect)
    header = _csv_header(file_path, scan, dialect, mapping)
    check_memory(
        file_path,
        max(scan.lines - 1, 0),
        "csv-streamed",
        competing_columns(header, mapping),
    )
    notices: list[str] = []
    plan = plan_columns(file_path, header, mapping, notices)
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
