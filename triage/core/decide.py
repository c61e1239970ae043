"""Decisions from a file: a batch prepared in a spreadsheet, checked whole before any is saved.

``read_batch`` reads a CSV or xlsx file with the columns ``item``, ``location`` (when the
portfolio has one), ``outcome``, ``root_cause``, ``adjustment`` and ``note``; ``check_batch``
validates every row against a review session (the series exists, the outcome and root cause are
known by code or label, the adjustment parses for that series, the note fits) and raises one
``BatchError`` naming every bad row with its reason. Only a batch with no bad row is written,
by ``ReviewSession.commit_batch``: one ledger event per row, all in one transaction.
"""

from __future__ import annotations

import csv
import io
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path

from triage.core import ledger as ledger_mod
from triage.core.adjust import AdjustError
from triage.core.errors import TriageError
from triage.core.review import ReviewSession
from triage.core.text import visible
from triage.core.vocabulary import ADJUSTED, OUTCOMES, Choice

#: Columns a decisions file may have; ``item`` and ``outcome`` are required, ``location`` too
#: when the portfolio has locations.
COLUMNS = ("item", "location", "outcome", "root_cause", "adjustment", "note")
#: Largest decisions file read, in bytes: a batch is typed or pasted by people.
MAX_BYTES = 200 * 1024 * 1024
#: Most rows in one batch.
MAX_ROWS = 1_000_000
#: Bad rows named in the message; the count says how many more there are.
SHOWN_ERRORS = 50


class BatchError(TriageError):
    """The decisions file cannot be used as it is; nothing was written."""


@dataclass(frozen=True)
class BatchRow:
    """One checked row of a decisions file."""

    line: int
    """Row number in the file as a spreadsheet shows it (empty rows counted)."""
    series: int
    """Portfolio index of the series."""
    outcome: str
    """Outcome code."""
    root_cause: str
    """Root-cause code."""
    adjustment: str
    """Adjustment spec in canonical text, ``""`` when none."""
    note: str
    """The note, exactly as in the file."""
    replaces: str
    """Reviewer whose decision in this cycle the row replaces, ``""`` when none."""


def read_batch(path: Path) -> tuple[list[str], list[tuple[int, list[str]]]]:
    """Header and numbered rows of a decisions file (CSV, UTF-8 with or without BOM, or xlsx).

    Rows are numbered as a spreadsheet shows them (the first row is 1): empty rows are skipped
    but counted, so a bad row is named by the number the reviewer sees.

    Raises:
        BatchError: Missing, too large, not text, not a workbook, or empty.
        LoadError: A workbook that is damaged or beyond the sheet limits.
    """
    name = visible(str(path))
    if path.is_dir():
        raise BatchError(f"{name} is a folder; give the decisions file (.csv or .xlsx).")
    try:
        size = path.stat().st_size
    except OSError as exc:
        raise BatchError(f"cannot read {name}: {exc.strerror}.") from exc
    if size > MAX_BYTES:
        raise BatchError(
            f"{name} is {size / 2**20:,.0f} MB; a decisions file may be at most "
            f"{MAX_BYTES // 2**20} MB.",
            hint="Split the batch into several files.",
        )
    xlsx = path.suffix.lower() in (".xlsx", ".xlsm")
    rows: Iterable[list[str]] = _xlsx_rows(path) if xlsx else _csv_rows(path, name)
    numbered: list[tuple[int, list[str]]] = []
    for line, row in enumerate(rows, start=1):
        if any(cell.strip() for cell in row):
            numbered.append((line, row))
            if len(numbered) > MAX_ROWS + 1:
                break
    if not numbered:
        raise BatchError(f"{name} is empty; give a header row and one row per decision.")
    if len(numbered) - 1 > MAX_ROWS:
        raise BatchError(f"{name} has more than {MAX_ROWS:,} rows; at most {MAX_ROWS:,} per batch.")
    return [h.strip().lower() for h in numbered[0][1]], numbered[1:]


def _csv_rows(path: Path, name: str) -> list[list[str]]:
    try:
        text = path.read_bytes().decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise BatchError(
            f"{name} is not UTF-8 text (byte {exc.start}).",
            hint="Save it as CSV UTF-8, or as an .xlsx workbook.",
        ) from exc
    except OSError as exc:
        raise BatchError(f"cannot read {name}: {exc.strerror}.") from exc
    try:
        return list(csv.reader(io.StringIO(text, newline="")))
    except csv.Error as exc:
        raise BatchError(f"{name} is not valid CSV: {exc}.") from exc


def _xlsx_rows(path: Path) -> Iterator[list[str]]:
    """The first visible sheet's rows as text, cut to the header's width as they stream in.

    Read with the portfolio loader's bounded reader (``read.xlsx_rows``), so the loader's
    sheet limits hold here too.
    """
    from triage.core.read import xlsx_rows

    width: int | None = None
    for values in xlsx_rows(path):
        if width is None:
            if values.count(None) == len(values):
                yield []
                continue
            width = len(values)
            while values[width - 1] is None:
                width -= 1
        yield ["" if v is None else _cell_text(v) for v in values[:width]]


def _cell_text(value: object) -> str:
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


def _lookup(choices: tuple[Choice, ...]) -> dict[str, str]:
    """Code or label (any case) -> code."""
    table = {}
    for c in choices:
        table[c.label.casefold()] = c.code
        table[c.code.casefold()] = c.code
    return table


def check_batch(
    session: ReviewSession,
    header: list[str],
    rows: list[tuple[int, list[str]]],
    root_causes: tuple[Choice, ...],
    *,
    replace: bool = False,
) -> list[BatchRow]:
    """Validate every row; return them checked, or raise naming every bad row.

    Args:
        session: The review session of the portfolio the decisions are for.
        header: Column names, lower case.
        rows: The data rows with their row numbers in the file (``read_batch``).
        root_causes: The configured root causes (codes or labels are accepted).
        replace: Allow rows that replace another reviewer's decision in this cycle.

    Raises:
        BatchError: Unknown or missing columns, or any bad row (all are listed).
    """
    has_location = "location" in session.portfolio.key_columns
    required = ["item", "outcome"] + (["location"] if has_location else [])
    missing = [c for c in required if c not in header]
    if missing:
        raise BatchError(
            f"the decisions file has no {', '.join(missing)} column "
            f"(it has: {visible(', '.join(header))}).",
            hint="Name the columns "
            + ", ".join(c for c in COLUMNS if has_location or c != "location")
            + ".",
        )
    if len(set(header)) != len(header):
        dupes = sorted({h for h in header if header.count(h) > 1})
        raise BatchError(f"the decisions file names a column twice: {visible(', '.join(dupes))}.")
    at = {name: header.index(name) for name in COLUMNS if name in header}
    outcomes = _lookup(OUTCOMES)
    causes = _lookup(root_causes)
    default_cause = "unknown" if "unknown" in {c.code for c in root_causes} else None
    errors: list[str] = []
    checked: list[BatchRow] = []
    seen: dict[int, int] = {}

    def cell(row: list[str], name: str) -> str:
        i = at.get(name)
        return row[i] if i is not None and i < len(row) else ""

    for n, row in rows:
        # Ids are exact, as in the portfolio: 'A' and 'A ' are two series.
        item, location = cell(row, "item"), cell(row, "location")
        where = f"row {n}"
        found = session.find(item, location if has_location else "")
        if found is None and not item.strip():
            errors.append(f"{where}: no item")
            continue
        if found is None:
            key = f"{item!r} @ {location!r}" if has_location else repr(item)
            errors.append(f"{where}: series {visible(key)} is not in the portfolio")
            continue
        if found in seen:
            errors.append(f"{where}: the same series as row {seen[found]} (one decision a series)")
            continue
        seen[found] = n
        outcome_text = cell(row, "outcome").strip()
        outcome = outcomes.get(outcome_text.casefold())
        if outcome is None:
            errors.append(
                f"{where}: outcome {visible(outcome_text)!r} is not one of "
                + ", ".join(c.code for c in OUTCOMES)
            )
            continue
        cause_text = cell(row, "root_cause").strip()
        cause = causes.get(cause_text.casefold()) if cause_text else default_cause
        if cause is None:
            errors.append(
                f"{where}: root cause {visible(cause_text)!r} is not in the list "
                "(codes or labels of the configuration)"
                if cause_text
                else f"{where}: no root cause (the list has no 'unknown')"
            )
            continue
        spec = cell(row, "adjustment").strip()
        if outcome == ADJUSTED and not spec:
            errors.append(f"{where}: outcome 'adjusted' needs an adjustment")
            continue
        if spec and outcome != ADJUSTED:
            errors.append(f"{where}: an adjustment goes with outcome 'adjusted' only")
            continue
        try:
            canonical = session.canonical_adjustment(found, spec) if spec else ""
        except AdjustError as exc:
            errors.append(f"{where}: adjustment {visible(spec)!r}: {exc}")
            continue
        note = cell(row, "note")
        if len(note) > ledger_mod.NOTE_MAX:
            errors.append(
                f"{where}: note of {len(note):,} characters (at most {ledger_mod.NOTE_MAX:,})"
            )
            continue
        other = str(session.decided_by[found])
        if other and other != session.reviewer and not replace:
            errors.append(
                f"{where}: would replace the decision {visible(other)!r} recorded in this cycle "
                "(pass --replace to allow it)"
            )
            continue
        checked.append(
            BatchRow(
                line=n,
                series=found,
                outcome=outcome,
                root_cause=cause,
                adjustment=canonical,
                note=note,
                replaces=other if other != session.reviewer else "",
            )
        )
    if errors:
        shown = errors[:SHOWN_ERRORS]
        more = len(errors) - len(shown)
        raise BatchError(
            f"{len(errors):,} of {len(rows):,} rows cannot be recorded; nothing was written:\n  "
            + "\n  ".join(shown)
            + (f"\n  … and {more:,} more" if more else ""),
            hint="Correct the rows named above and run the command again.",
        )
    return checked
