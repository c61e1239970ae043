"""The column plan: which file column becomes which canonical column, attribute, or nothing.

Before any cell is read: the file type and the options that apply to it, ``--columns``
(canonical name -> the file's header), and matching the headers to canonical names (ignoring
case, ``--columns`` first; a computed name such as ``rank`` kept under a name of its own). A
header row is also recognised below a title block, for CSV and xlsx alike. Headers are names,
not data: their control characters become visible symbols here.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, NoReturn

import numpy as np
import pandas as pd

from triage.core import schema
from triage.core.dialect import FileOptions
from triage.core.errors import TriageError
from triage.core.read.messages import fail, quote_list, sanitized

#: File name endings triage reads, and the reader used for each.
SUFFIXES: dict[str, str] = {
    ".csv": "csv",
    ".xlsx": "xlsx",
    ".xlsm": "xlsx",
    ".parquet": "parquet",
    ".pq": "parquet",
}


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
        f"--columns demand=qty_shipped,item=sku. Canonical names: {', '.join(schema.KNOWN)}, "
        "and forecast_<name> for a competing forecast (<name>: lower-case letters, digits, _)."
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
        if not schema.is_canonical(name):
            raise TriageError(f"--columns: {name!r} is not a column triage knows.", hint=hint)
        if name in mapping:
            raise TriageError(f"--columns: {name!r} is given twice.", hint=hint)
        mapping[name] = header
    return mapping


def checked_options(path: Path, kind: str, options: FileOptions | None) -> FileOptions:
    """The options, refused where they do not apply to this kind of file (never ignored)."""
    if options is None:
        return FileOptions()
    if kind == "csv" and options.sep == options.decimal:
        fail(
            path,
            f"--decimal {options.decimal} was given for a file whose fields are separated by "
            f"'{options.sep}' too: 1{options.sep}5 would be two fields.",
            "Files with decimal commas separate their fields with semicolons: add --sep ';' "
            "(or tab, '|') as the file does.",
        )
    if options.sep != "," and kind != "csv":
        fail(
            path,
            f"--sep was given, but this is a {kind} file, whose cells are not separated by a "
            "character.",
            "Leave out --sep; it is for CSV files.",
        )
    if options.header_row is not None and kind == "parquet":
        fail(
            path,
            "--header-row was given, but a Parquet file has no header row: its column names "
            "are stored apart from the data.",
            "Leave out --header-row; it is for CSV and xlsx files.",
        )
    return options


@dataclass
class ColumnPlan:
    """What each file column becomes: a canonical name, an attribute name, or nothing."""

    headers: list[str]
    roles: list[str | None]
    attributes: dict[int, str]
    unnamed: list[int]


@dataclass(frozen=True)
class SeriesPick:
    """Some series of a file, by key: only their rows are kept (a dataset's histories fetched
    on demand). A Parquet file reads only the row groups whose item statistics may hold them."""

    keys: tuple[tuple[str, str], ...]
    """(item, location) of each series; location ``""`` when the file has no location column
    (the ledger's form of a key)."""

    @property
    def items(self) -> list[str]:
        """The distinct items, sorted."""
        return sorted({item for item, _ in self.keys})


@dataclass
class RawColumns:
    """Columns as read, by file position, before validation."""

    plan: ColumnPlan
    data: dict[int, pd.Series]
    first_row: int
    file_rows: np.ndarray | None = None
    blank_rows_possible: bool = True


def file_kind(path: Path) -> str:
    """The reader for the file (``csv``, ``xlsx``, ``parquet``); refuses a missing file, a folder
    and an unknown type."""
    suffix = path.suffix.lower()
    if not path.exists():
        fail(path, "file not found.", f"Check the path (the current folder is {Path.cwd()}).")
    if path.is_dir():
        fail(path, "this is a folder, not a file.", "Give the path of the portfolio file itself.")
    if suffix == ".xls":
        fail(
            path,
            "this is the old Excel .xls format, which triage does not read.",
            "Open it in Excel or LibreOffice and save it as .xlsx (or as CSV UTF-8).",
        )
    if suffix not in SUFFIXES:
        shown = f"'{suffix}'" if suffix else "no extension"
        fail(
            path,
            f"unknown file type ({shown}); triage reads .csv, .xlsx/.xlsm and .parquet.",
            "Save the file in one of these formats, or rename it if it already is one.",
        )
    return SUFFIXES[suffix]


def checked_mapping(path: Path, columns: dict[str, str] | None) -> dict[str, str]:
    """``--columns`` with canonical names in lower case (refused when unknown) and headers as the
    column plan compares them."""
    if not columns:
        return {}
    mapping: dict[str, str] = {}
    for name, header in columns.items():
        key = name.strip().lower()
        if not schema.is_canonical(key):
            fail(
                path,
                f"--columns names {name!r}, which is not a column triage knows.",
                f"Canonical names are {', '.join(schema.KNOWN)}, and forecast_<name> for a "
                "competing forecast (<name>: lower-case letters, digits, _).",
            )
        mapping[key] = sanitized(str(header)).strip()
    return mapping


def column_label(plan: ColumnPlan, position: int) -> str:
    """A column as a message names it: its header, and the canonical name it was mapped to."""
    header, role = plan.headers[position], plan.roles[position]
    if role is None or not schema.is_canonical(role) or header == role:
        return f"'{header}'"
    return f"'{header}' ({role})"


def plan_columns(
    path: Path, raw_headers: Sequence[Any], mapping: dict[str, str], notices: list[str]
) -> ColumnPlan:
    """Match the file's headers to canonical names; apply ``--columns`` first."""
    stripped = ["" if h is None else str(h).strip() for h in raw_headers]
    headers = [sanitized(h) for h in stripped]
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
            fail(
                path,
                f"two columns are named '{header}' (columns {seen[header] + 1} and "
                f"{position + 1}).",
                "Rename or delete one of them, so that every column name is used once.",
            )
        seen[header] = position
    found = quote_list([h for h in headers if h])
    roles: list[str | None] = [None] * len(headers)
    assigned: set[str] = set()
    for name, wanted in mapping.items():
        matches = [i for i, h in enumerate(headers) if h == wanted]
        if not matches:
            matches = [i for i, h in enumerate(headers) if h.lower() == wanted.lower()]
        if len(matches) != 1:
            problem = "no column" if not matches else "more than one column"
            fail(
                path,
                f"--columns {name}={wanted}: {problem} named '{wanted}'. Columns found: {found}.",
                "Use one of the column names above on the right of '='.",
            )
        if roles[matches[0]] is not None:
            fail(
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
            fail(
                path,
                f"columns {quote_list([headers[i] for i in matches])} all match "
                f"'{name}' (names are matched ignoring case).",
                f"Rename or delete all but one, or choose one with --columns {name}=<column>.",
            )
        if matches:
            roles[matches[0]] = name
    for position, header in enumerate(headers):
        if roles[position] is not None or not schema.looks_competing(header):
            continue
        if schema.competing_name(header) is None:
            _refuse_competing_header(path, header)
        if header in assigned:
            ignored.append(header)
            roles[position] = ""
        else:
            roles[position] = header
    if ignored:
        notices.append(
            f"Column {quote_list(ignored)} was not read: --columns maps that name to another "
            "column."
        )
    missing = [name for name in schema.REQUIRED if name not in roles]
    if missing:
        word = "column" if len(missing) == 1 else "columns"
        fail(
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
    return ColumnPlan(headers, roles, attributes, unnamed)


def _refuse_competing_header(path: Path, header: str) -> NoReturn:
    """A header written like a competing forecast that is not ``forecast_<name>`` exactly."""
    rest = header[len(schema.FORECAST) + 1 :]
    name = re.sub(r"[^a-z0-9_]+", "_", rest.lower()).strip("_")
    suggested = f"{schema.COMPETING_PREFIX}{name or 'stat'}"
    fail(
        path,
        f"column '{header}' is named like a competing forecast, but a competing forecast is "
        "named forecast_<name>, with <name> one or more lower-case letters, digits and '_' "
        f"(e.g. '{suggested}').",
        f"Rename the column to '{suggested}', or name it with --columns "
        f"{suggested}={header}; if it is not a forecast, give it a name that does not start "
        "with 'forecast'.",
    )


#: Rows (lines, records) searched for the header below a title block.
TITLE_ROWS = 50


def has_required(cells: Sequence[Any], mapping: dict[str, str]) -> bool:
    """Whether a row names every required column (as ``--columns`` maps them)."""
    names = {header_text(c).strip().lower() for c in cells}
    return all(mapping.get(name, name).lower() in names for name in schema.REQUIRED)


def refuse_title_block(
    path: Path,
    where: str,
    cells: list[Any],
    header_at: str,
    options: FileOptions,
    mapping: dict[str, str],
) -> NoReturn:
    """Refuse rows above the header (a title block), naming the option that skips them."""
    shown = ", ".join(f"'{sanitized(header_text(c))[:80]}'" for c in cells[:3])
    names = ", ".join(sanitized(mapping.get(n, n)) for n in schema.REQUIRED)
    fail(
        path,
        f"{where} holds {shown or 'nothing'}, which looks like a title, not the header: the "
        f"header ({names}) is on {header_at}.",
        f"Read the file with {options.command_line()} (the rows above it are skipped), or "
        "delete the title rows (and unmerge the title cells), save and load it again.",
    )


def header_text(value: Any) -> str:
    """A header cell as text (an xlsx number header 2024.0 as ``2024``)."""
    if value is None:
        return ""
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)
