"""Exports of a review cycle for upload: the decisions and the adjusted forward forecast.

``export_review`` writes two tables, in the format named by the target's suffix:

* **decisions**: one row per reviewed series (its effective decision in the cycle);
* **forecast**: one row per series and forward period, for *every* series of the portfolio, so the
  file is a complete forward forecast: the ledger's adjusted value where the series' decision
  adjusted that period, or where an earlier cycle's adjustment still reaches it (carried, marked
  in ``adjusted_in_cycle``; docs/history.md), the portfolio's forecast everywhere else.

Every format carries the same caution (``CAUTION``) and the provenance: portfolio file name and
fingerprint, cycle, ledger, when and by whom it was exported. docs/export.md describes the files.

``review_tables`` builds both tables with triage's column names; adjusted values are rounded
there, by ``triage.core.rounding`` (the one rule; the ledger keeps what was decided).
``file_tables`` then shapes them for the files: the portfolio's own headers where ``--columns``
mapped them, and the forecast long or wide. Every writer reads those same ``FileTable`` objects,
so CSV, xlsx and JSON hold the same columns and numbers.

Safety rules (OWASP "CSV Injection", https://owasp.org/www-community/attacks/CSV_Injection;
docs/sources.md §6):

* Free-text cells (notes, codes, labels, reviewer, adjustment, portfolio name) that begin with a
  formula trigger get a leading apostrophe in CSV and xlsx. Series keys are never changed: they
  must join back in the planning system byte for byte. Numbers stay numbers.
* CSV is written with ``csv.QUOTE_NONNUMERIC`` and notes have CR / CRLF turned into LF: CPython
  before 3.11.9 writes a field holding a bare CR unquoted, which splits the row on reading
  (CPython gh-67044, measured on 3.11.7; docs/sources.md §6.3).
* xlsx text is always a string cell, never a formula, error value or hyperlink; control
  characters xlsx cannot store are replaced by visible symbols; the row and cell-length limits of
  a sheet are checked here, never left to the library (docs/sources.md §6.4).
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
import re
from collections import Counter
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import UTC, date, datetime
from pathlib import Path
from typing import IO, Any

import numpy as np
import pandas as pd

from triage import __version__
from triage.core import history, schema
from triage.core.config import Choice, default_reviewer
from triage.core.errors import TriageError
from triage.core.files import (
    clean_leftovers,
    in_scratch,
    refuse_existing,
    sha256_of,
    write_atomic,
    write_set_atomic,
)
from triage.core.ledger import OUTCOMES, Decision, Ledger, describe_series
from triage.core.portfolio import Portfolio
from triage.core.rounding import (
    DEFAULT as DEFAULT_ROUNDING,
)
from triage.core.rounding import (
    MAX_DECIMALS,
    Rounding,
    decimals_for,
    decimals_used,
    describe,
    round_half_away,
)
from triage.core.text import visible

#: Shown in every export, in every format, and by the command line after writing one.
CAUTION = (
    "These decisions are advisory: they record a reviewer's judgement in triage, not an approved "
    "plan. Check each one in the planning system before it is allowed to move stock or money."
)

#: First characters that make a spreadsheet read a cell as a formula. OWASP "CSV Injection"
#: lists = + - @ Tab and CR, and Line Feed since August 2025 (OWASP/www-community PR #1116);
#: OWASP ASVS 5.0 V1.2.10 adds NUL (docs/sources.md §6.1).
FORMULA_TRIGGERS = "=+-@\t\r\n\0"
_TRIGGER_START = re.compile(r"[=+\-@\t\r\n\x00]")

#: Rows in an Excel sheet, header included (Microsoft, "Excel specifications and limits"; pandas
#: + xlsxwriter silently dropped the last row at exactly this size, docs/sources.md §6.4).
XLSX_MAX_ROWS = 1_048_576
#: Characters in one Excel cell (UTF-16 code units). openpyxl cuts longer text silently.
XLSX_MAX_CELL = 32_767
#: Columns in an Excel sheet (Excel specifications and limits: 16,384, column XFD).
XLSX_MAX_COLUMNS = 16_384

#: Strings openpyxl would store as error values rather than text (``openpyxl.cell.cell``).
_XLSX_ERROR_CODES = frozenset(("#NULL!", "#DIV/0!", "#VALUE!", "#REF!", "#NAME?", "#NUM!", "#N/A"))
#: Characters an xlsx file cannot hold: openpyxl's ``ILLEGAL_CHARACTERS_RE`` (C0 controls but
#: tab, LF and CR), plus U+FFFE and U+FFFF, which XML 1.0 does not allow either.
_XLSX_ILLEGAL = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\ufffe\uffff]")

SUFFIXES = (".csv", ".xlsx", ".json")

ITEM = schema.ITEM
LOCATION = schema.LOCATION

#: Columns of the decisions table (``location`` only when the portfolio has locations).
DECISION_COLUMNS: tuple[str, ...] = (
    ITEM,
    LOCATION,
    "cycle",
    "outcome",
    "outcome_label",
    "root_cause",
    "root_cause_label",
    "note",
    "reviewer",
    "recorded_at",
    "adjustment",
    "units_change",
    "value_change",
    "portfolio_name",
    "portfolio_fingerprint",
)
#: Columns of the forecast table (``location`` only when the portfolio has locations).
FORECAST_COLUMNS: tuple[str, ...] = (
    ITEM,
    LOCATION,
    "period",
    "forecast",
    "adjusted_forecast",
    "adjusted",
    "adjusted_in_cycle",
    "outcome",
)
_NUMBERS = frozenset(("units_change", "value_change", "forecast", "adjusted_forecast"))

#: How a column is written (``FileTable.kinds``). KEY: text exactly as in the portfolio;
#: TEXT: free text, neutralised in CSV and xlsx; FIXED: text triage writes in a fixed format
#: (an ISO date) that never starts with a trigger; DATE: a period start date, ISO text in CSV
#: and JSON, a date cell in xlsx; NUMBER: a float, empty where missing; COUNT: a whole number;
#: FLAG: true/false.
KEY, TEXT, FIXED, DATE, NUMBER, COUNT, FLAG = (
    "key",
    "text",
    "fixed",
    "date",
    "number",
    "count",
    "flag",
)
_KIND_OF: dict[str, str] = {
    ITEM: KEY,
    LOCATION: KEY,
    "cycle": FIXED,
    "adjusted_in_cycle": FIXED,
    "period": DATE,
    **dict.fromkeys(_NUMBERS, NUMBER),
    "adjusted": FLAG,
    "adjusted_periods": COUNT,
}

#: Forecast table layouts: one row per series and period, or one row per series.
LONG = "long"
WIDE = "wide"
LAYOUTS = (LONG, WIDE)
#: Canonical columns whose header in a file follows the portfolio's own (``--columns``).
_FILE_NAMED = (ITEM, LOCATION, schema.PERIOD, schema.FORECAST)

_EXAMPLES = 5
#: Rows converted to Python objects at a time when a table is written.
_CHUNK_ROWS = 50_000
# DEL and C1 (0x80-0x9F, e.g. 0x9B = CSI) pass through json.dumps(ensure_ascii=False) raw and can
# drive a terminal that shows the file; escaping them keeps the JSON identical in meaning.
_JSON_ESCAPES = {code: f"\\u{code:04x}" for code in (0x7F, *range(0x80, 0xA0))}


class ExportError(TriageError):
    """An export cannot be written as asked; nothing was written or changed."""


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
class FileTable:
    """A table as a file holds it: its columns, their headers, and how each is written."""

    frame: pd.DataFrame
    """The values, one column per header; column labels are internal (unique) names."""
    headers: tuple[str, ...]
    """The header written for each column."""
    kinds: tuple[str, ...]
    """How each column is written: ``KEY``, ``TEXT``, ``FIXED``, ``DATE``, ``NUMBER``..."""
    dated_headers: frozenset[str] = frozenset()
    """Headers that are period start dates (xlsx writes them as date cells)."""
    describe: str = ""
    """What the rows are, for the README: ``60 rows, every series x forward period``."""

    def __len__(self) -> int:
        return len(self.frame)

    def __contains__(self, name: object) -> bool:
        return name in self.frame.columns


@dataclass(frozen=True)
class ReviewTables:
    """What an export holds before any file format is applied."""

    decisions: pd.DataFrame
    """One row per reviewed series, ``DECISION_COLUMNS``; text exactly as in the ledger."""
    forecast: pd.DataFrame
    """One row per series and forward period, ``FORECAST_COLUMNS``; NaN where no forecast."""
    provenance: dict[str, str]
    """Where the export comes from: portfolio, fingerprint, cycle, ledger, when, who, version."""
    warnings: tuple[str, ...]
    """Things the user must know about the content (skipped decisions, stale lines...)."""
    adjusted_periods: int
    """Forecast rows whose value comes from a ledger adjustment (this cycle's or carried)."""
    carried_periods: int = 0
    """Of those, rows whose value an earlier cycle's adjustment gives (``adjusted_in_cycle``)."""
    carried: pd.DataFrame = field(default_factory=pd.DataFrame)
    """The carried lines applied: ``history.CARRIED_LINE_COLUMNS`` (one row per forecast row
    an earlier cycle's adjustment gives)."""
    periods: tuple[str, ...] = ()
    """The forward periods' start dates (ISO), in order: the forecast table's periods."""
    decimals: int | None = None
    """Decimals of the values triage computed (``triage.core.rounding``); None: not rounded."""
    precision: str = ""
    """The rounding rule in words, for the README."""


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


def neutralise(values: pd.Series | Sequence[str]) -> pd.Series:
    """Free text made safe to open in a spreadsheet, as object Series of str.

    CR LF and bare CR become LF (one line-break convention, and no bare CR for the CSV writer
    of CPython < 3.11.9 to leave unquoted, docs/sources.md §6.3). Text starting with a formula
    trigger (``FORMULA_TRIGGERS``) gets a leading apostrophe, the neutralisation OWASP "CSV
    Injection" gives and Symfony uses since CVE-2021-41270; a tab or space prefix would not do.
    Quotes and separators inside the text are left to the CSV writer's quoting.
    """
    series = pd.Series(values, dtype=object)
    if series.empty:
        return series
    # Work on the distinct values: long columns (the forecast table's outcome) repeat a few.
    codes, uniques = pd.factorize(series, use_na_sentinel=False)
    text = pd.Series(uniques, dtype=object).map(str)
    text = text.str.replace("\r\n", "\n", regex=False).str.replace("\r", "\n", regex=False)
    lead = text.str.match(_TRIGGER_START).to_numpy(dtype=bool)
    if lead.any():
        text = text.where(~lead, "'" + text)
    return pd.Series(text.to_numpy(dtype=object)[codes], index=series.index, dtype=object)


def neutralise_one(value: str) -> str:
    """``neutralise`` for a single text."""
    return str(neutralise([value]).iat[0])


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
# Building the tables


def _check_cycle(cycle: str) -> str:
    if not isinstance(cycle, str) or not re.fullmatch(r"\d{4}-\d{2}-\d{2}", cycle):
        raise ExportError(
            f"the cycle {cycle!r} is not an ISO date.",
            hint="Give the cycle as YYYY-MM-DD, the date of the latest actual period.",
        )
    return cycle


def _examples(names: Sequence[str], total: int) -> str:
    shown = ", ".join(names[:_EXAMPLES])
    return f"{shown} and {total - _EXAMPLES} more" if total > _EXAMPLES else shown


def _labels(choices: Iterable[Choice]) -> dict[str, str]:
    return {c.code: c.label for c in choices}


def _floats(values: Iterable[float | None]) -> np.ndarray:
    return np.array([np.nan if v is None else v for v in values], dtype=np.float64)


def review_tables(
    portfolio: Portfolio,
    ledger: Ledger,
    *,
    cycle: str | None = None,
    exported_by: str | None = None,
    exported_at: datetime | None = None,
    rounding: Rounding = DEFAULT_ROUNDING,
) -> ReviewTables:
    """The decisions and forecast tables of a cycle, before any file format is applied.

    Args:
        portfolio: The portfolio whose forward forecast is exported.
        ledger: The decision ledger (read-only is enough).
        cycle: Review cycle; default the portfolio's cycle.
        exported_by: Name recorded as the exporter; default the configured reviewer or login.
        exported_at: Export time (UTC); default now.
        rounding: Precision of the values triage computes: the adjusted periods and the units
            and value changes (``triage.core.rounding``; the file's forecast is not changed).

    Raises:
        ExportError: ``cycle`` is not an ISO date.
    """
    cycle = _check_cycle(portfolio.cycle if cycle is None else cycle)
    warnings: list[str] = []
    has_location = LOCATION in portfolio.key_columns
    keys = portfolio.keys
    n_series = portfolio.n_series
    first_fwd = portfolio.last_actual + 1
    all_dates = pd.Index(portfolio.calendar.periods.strftime("%Y-%m-%d"))
    fwd_dates = all_dates[first_fwd:]
    n_fwd = len(fwd_dates)

    if cycle != portfolio.cycle:
        warnings.append(
            f"Cycle {cycle} is not the cycle of {portfolio.path.name} ({portfolio.cycle}): the "
            "forecast table is this portfolio's forward forecast, and only adjusted periods that "
            "fall in it are applied."
        )
    if n_fwd == 0:
        warnings.append(
            f"{portfolio.path.name} has no forward periods after {portfolio.cycle}, so the "
            "forecast table is empty."
        )

    # ---- decisions matched to the portfolio's series (vectorised lookup over the decisions)
    decided = ledger.current(cycle)
    items = keys[ITEM].to_numpy(dtype=object)
    locations = keys[LOCATION].to_numpy(dtype=object) if has_location else None
    decided_items = [d.item for d in decided]
    decided_locations = [d.location for d in decided]
    if not decided:
        series = np.empty(0, dtype=np.int64)
    elif has_location:
        index = pd.MultiIndex.from_arrays([items, locations])
        probe = pd.MultiIndex.from_arrays([decided_items, decided_locations])
        series = np.asarray(index.get_indexer(probe), dtype=np.int64)
    else:
        series = np.asarray(pd.Index(items).get_indexer(decided_items), dtype=np.int64)
        # Without a location column a series is found only by a decision without location.
        series[np.array(decided_locations, dtype=object) != ""] = -1
    unmatched = [d for d, s in zip(decided, series, strict=True) if s < 0]
    if unmatched:
        warnings.append(
            f"{len(unmatched)} decision(s) of cycle {cycle} are for series that are not in "
            f"{portfolio.path.name} and were left out: "
            + _examples([describe_series(d.item, d.location) for d in unmatched], len(unmatched))
            + "."
        )
    order = np.argsort(np.where(series < 0, n_series, series), kind="stable")
    order = order[series[order] >= 0]
    kept: list[Decision] = [decided[i] for i in order]
    kept_series = series[order]
    n_dec = len(kept)
    if not decided:
        cycles = ledger.cycles()
        known = f"; the ledger has decisions for {', '.join(cycles[-5:])}" if cycles else ""
        warnings.append(f"The ledger {ledger.path.name} has no decisions in cycle {cycle}{known}.")

    stale = [d for d in kept if d.portfolio_fingerprint != portfolio.fingerprint]
    if stale:
        warnings.append(
            f"{len(stale)} decision(s) were made on another version of the portfolio (its "
            "fingerprint differs): "
            + _examples([describe_series(d.item, d.location) for d in stale], len(stale))
            + "."
        )

    # ---- adjustment lines, flattened so the rest is array work
    line_dec = np.array([k for k, d in enumerate(kept) for _ in d.lines], dtype=np.int64)
    line_period = pd.Index([ln.period for d in kept for ln in d.lines], dtype=object)
    line_orig = _floats(ln.original for d in kept for ln in d.lines)
    line_adj = _floats(ln.adjusted for d in kept for ln in d.lines)
    # ---- precision (triage.core.rounding): the ledger keeps what was decided, files get this
    decimals = decimals_for(rounding, portfolio.forecast[:, first_fwd:])
    line_adj = round_half_away(line_adj, decimals)
    line_series = kept_series[line_dec] if len(line_dec) else np.empty(0, dtype=np.int64)
    # Missing counted as 0, as triage.core.adjust counts Σ adjusted − Σ original.
    delta = np.nan_to_num(line_adj) - np.nan_to_num(line_orig)
    units_change = np.bincount(line_dec, weights=delta, minlength=n_dec).astype(np.float64)
    # Exact sums without float noise: originals may have more decimals than the export keeps.
    change_decimals = max(decimals, decimals_used(line_orig))
    units_change = round_half_away(units_change, change_decimals)

    cal_col = all_dates.get_indexer(line_period) if len(line_dec) else np.empty(0, np.int64)
    if portfolio.price is not None:
        price = np.full(len(line_dec), np.nan)
        inside = cal_col >= 0
        price[inside] = portfolio.price[line_series[inside], cal_col[inside]]
        value_change = np.bincount(line_dec, weights=delta * price, minlength=n_dec)
        # Units with d decimals times prices with p decimals have d + p (capped).
        value_decimals = min(change_decimals + decimals_used(price), MAX_DECIMALS)
        value_change = round_half_away(value_change.astype(np.float64), value_decimals)
        if not inside.all():
            warnings.append(
                f"{int((~inside).sum())} adjusted period(s) are outside the calendar of "
                f"{portfolio.path.name}, so the value change of their decisions is left empty."
            )
    else:
        value_change = np.full(n_dec, np.nan)

    fwd_col = fwd_dates.get_indexer(line_period) if len(line_dec) else np.empty(0, np.int64)
    applies = fwd_col >= 0
    if not applies.all():
        outside = sorted({d_i for d_i in line_dec[~applies].tolist()})
        names = [describe_series(kept[i].item, kept[i].location) for i in outside]
        warnings.append(
            f"{int((~applies).sum())} adjusted period(s) of {len(outside)} decision(s) are not "
            f"forward periods of {portfolio.path.name} and are not in the forecast table: "
            + _examples(names, len(names))
            + "."
        )

    # ---- forecast table: the whole forward matrix, then the adjusted cells overwritten
    forward = portfolio.forecast[:, first_fwd:]
    adjusted_fc = forward.copy()
    flag = np.zeros(forward.shape, dtype=bool)
    rows, cols = line_series[applies], fwd_col[applies]
    adjusted_fc[rows, cols] = line_adj[applies]
    flag[rows, cols] = True
    now = forward[rows, cols]
    differs = ~(np.isnan(now) & np.isnan(line_orig[applies])) & (now != line_orig[applies])
    if differs.any():
        warnings.append(
            f"{int(differs.sum())} adjusted period(s) started from a forecast that differs from "
            f"the one in {portfolio.path.name}; the adjusted value decided in the ledger is "
            "exported."
        )

    # ---- earlier cycles' adjustments still ahead (docs/history.md, "Carrying adjustments into
    # a new cycle"): applied where this cycle's own decisions did not adjust the period.
    made_in = np.zeros(forward.shape, dtype=np.int16)  # 0: not adjusted, 1: this cycle
    made_in[rows, cols] = 1
    carried_lines = history.carried_adjustments(portfolio, ledger, cycle=cycle)
    carried_lines = carried_lines.loc[carried_lines["standing"].to_numpy(dtype=bool)]
    c_rows = carried_lines["series"].to_numpy(dtype=np.int64)
    c_cols = carried_lines["column"].to_numpy(dtype=np.int64) - first_fwd
    replaced_now = flag[c_rows, c_cols]
    already = carried_lines["in_forecast"].to_numpy(dtype=bool) & ~replaced_now
    applied_mask = ~replaced_now & ~already
    applied = carried_lines.loc[applied_mask].reset_index(drop=True)
    made_cycles = [cycle, *sorted(set(applied["cycle"].astype(str)))]
    if len(applied):
        a_rows, a_cols = c_rows[applied_mask], c_cols[applied_mask]
        adjusted_fc[a_rows, a_cols] = applied["adjusted"].to_numpy(dtype=np.float64)
        flag[a_rows, a_cols] = True
        code = {c: i + 1 for i, c in enumerate(made_cycles)}
        made_in[a_rows, a_cols] = applied["cycle"].astype(str).map(code).to_numpy(np.int16)
    warnings.extend(_carried_warnings(portfolio, carried_lines, applied, already, replaced_now))
    # Every adjusted cell at the export's precision, whichever cycle's decision it comes from.
    adjusted_fc[flag] = round_half_away(adjusted_fc[flag], decimals)

    outcome_of = np.full(n_series, "", dtype=object)
    if n_dec:
        outcome_of[kept_series] = np.array([d.outcome for d in kept], dtype=object)

    forecast_cols: dict[str, Any] = {ITEM: np.repeat(items, n_fwd)}
    if locations is not None:
        forecast_cols[LOCATION] = np.repeat(locations, n_fwd)
    forecast_cols["period"] = np.tile(fwd_dates.to_numpy(dtype=object), n_series)
    forecast_cols["forecast"] = forward.ravel()
    forecast_cols["adjusted_forecast"] = adjusted_fc.ravel()
    forecast_cols["adjusted"] = flag.ravel()
    # One small code per cell (not a text object per row): at a million series x 13 periods
    # an object column would take ~100 MB.
    forecast_cols["adjusted_in_cycle"] = pd.Categorical.from_codes(
        made_in.ravel(), categories=["", *made_cycles]
    )
    forecast_cols["outcome"] = np.repeat(outcome_of, n_fwd)
    # copy=False: the columns are fresh arrays already; at a million series each copy is ~100 MB.
    forecast = pd.DataFrame(
        {k: pd.Series(v, copy=False) for k, v in forecast_cols.items()},
        copy=False,
    )

    # ---- decisions table
    outcome_labels = _labels(OUTCOMES)
    cause_labels = _labels(ledger.root_causes)
    unknown_causes = sorted({d.root_cause for d in kept} - set(cause_labels))
    if unknown_causes:
        warnings.append(
            "Root cause code(s) not in the current list, exported without a label: "
            + ", ".join(repr(c) for c in unknown_causes)
            + "."
        )
    decision_cols: dict[str, Any] = {ITEM: [d.item for d in kept]}
    if has_location:
        decision_cols[LOCATION] = [d.location for d in kept]
    decision_cols.update(
        {
            "cycle": [d.cycle for d in kept],
            "outcome": [d.outcome for d in kept],
            "outcome_label": [outcome_labels.get(d.outcome, "") for d in kept],
            "root_cause": [d.root_cause for d in kept],
            "root_cause_label": [cause_labels.get(d.root_cause, "") for d in kept],
            "note": [d.note for d in kept],
            "reviewer": [d.reviewer for d in kept],
            "recorded_at": [d.recorded_at for d in kept],
            "adjustment": [d.adjustment or "" for d in kept],
            "units_change": units_change,
            "value_change": value_change,
            "portfolio_name": [d.portfolio_name for d in kept],
            "portfolio_fingerprint": [d.portfolio_fingerprint for d in kept],
        }
    )
    decisions = pd.DataFrame(
        {
            k: pd.Series(v, dtype=np.float64 if k in _NUMBERS else object)
            for k, v in decision_cols.items()
        }
    )

    stamp = (exported_at or datetime.now(UTC)).astimezone(UTC)
    provenance = {
        "portfolio": portfolio.path.name,
        "portfolio_fingerprint": portfolio.fingerprint,
        "cycle": cycle,
        "ledger": ledger.path.name,
        "exported_at": stamp.isoformat(timespec="seconds").replace("+00:00", "Z"),
        "exported_by": exported_by or default_reviewer(),
        "triage_version": __version__,
    }
    return ReviewTables(
        decisions=decisions,
        forecast=forecast,
        provenance=provenance,
        warnings=tuple(warnings),
        adjusted_periods=int(flag.sum()),
        carried_periods=len(applied),
        carried=applied,
        periods=tuple(fwd_dates),
        decimals=decimals,
        precision=describe(rounding, decimals),
    )


def _carried_warnings(
    portfolio: Portfolio,
    lines: pd.DataFrame,
    applied: pd.DataFrame,
    already: np.ndarray,
    replaced_now: np.ndarray,
) -> list[str]:
    """What the export says about earlier cycles' adjustments (none when there are none)."""
    out: list[str] = []
    name = portfolio.path.name

    def who(frame: pd.DataFrame) -> str:
        pairs = frame[[ITEM, LOCATION, "cycle"]].drop_duplicates()
        names = [
            f"{describe_series(i, loc)} from {c}"
            for i, loc, c in pairs.itertuples(index=False, name=None)
        ]
        return _examples(names, len(names))

    if len(applied):
        cycles = ", ".join(sorted(set(applied["cycle"].astype(str))))
        out.append(
            f"{len(applied)} forward period(s) carry adjustments made in earlier cycles "
            f"({cycles}), applied as decided then and marked in adjusted_in_cycle: "
            + who(applied)
            + ". A reviewer ends one in the review screens; a decision of this cycle that "
            "adjusts the same period takes precedence."
        )
        changed = applied.loc[applied["forecast_changed"].to_numpy(dtype=bool)]
        if len(changed):
            out.append(
                f"{len(changed)} carried period(s) started from a forecast that differs from the "
                f"one in {name} (the forecast changed since the adjustment was made); the "
                "adjusted value decided then is exported: " + who(changed) + "."
            )
    if already.any():
        out.append(
            f"{int(already.sum())} period(s) of earlier adjustments are already in {name}'s "
            "forecast (it equals the adjusted value), so nothing is applied there: "
            + who(lines.loc[already])
            + "."
        )
    if replaced_now.any():
        out.append(
            f"{int(replaced_now.sum())} period(s) of earlier adjustments are replaced by this "
            "cycle's own adjustments: " + who(lines.loc[replaced_now]) + "."
        )
    return out


# --------------------------------------------------------------------------------------------
# The tables as files hold them: the portfolio's own headers, long or wide


def file_headers(headers: Mapping[str, str] | None) -> dict[str, str]:
    """Canonical column -> header in the files, from the ``--columns`` mapping.

    The key columns, the period and the forecast take the portfolio file's headers where
    ``--columns`` named them; the adjusted forecast is ``adjusted_<forecast header>``. Every
    other column keeps triage's name.
    """
    names = {name: name for name in (*_FILE_NAMED, "adjusted_forecast")}
    for name, header in (headers or {}).items():
        if name in _FILE_NAMED:
            names[name] = header
    if names[schema.FORECAST] != schema.FORECAST:
        names["adjusted_forecast"] = f"adjusted_{names[schema.FORECAST]}"
    return names


def file_tables(
    tables: ReviewTables,
    *,
    headers: Mapping[str, str] | None = None,
    layout: str = LONG,
) -> tuple[FileTable, FileTable, list[str]]:
    """The decisions and forecast tables as the files hold them, and what to warn about.

    Args:
        tables: The review tables.
        headers: The ``--columns`` mapping (canonical -> the portfolio file's header).
        layout: ``LONG`` (one forecast row per series and period) or ``WIDE`` (one row per
            series, one column per forward period).

    A file header that would repeat another column's header (case-insensitively) is not used:
    that column keeps triage's name, with a warning.

    Raises:
        ExportError: ``layout`` is not one of ``LAYOUTS``.
    """
    if layout not in LAYOUTS:
        raise ExportError(
            f"unknown layout {layout!r}.", hint=f"Choose one of {', '.join(LAYOUTS)}."
        )
    mapped = dict(headers or {})
    warnings: list[str] = []
    while True:
        names = file_headers(mapped)
        decisions = _long_table(tables.decisions, names)
        if layout == LONG:
            forecast = _long_table(tables.forecast, names)
        else:
            forecast = _wide_table(tables, names)
        clash = _clashing(mapped, names, (decisions.headers, forecast.headers))
        if clash is None:
            break
        warnings.append(
            f"The portfolio's header {names[clash]!r} for {clash} is also the name of another "
            f"column of the export, so the export calls that column {clash!r}."
        )
        del mapped[clash]
    n_dec, n_fc = len(decisions), len(forecast)
    decisions = replace(decisions, describe=f"{n_dec:,} reviewed series, one row each")
    if layout == LONG:
        what = (
            f"{n_fc:,} rows, every series x forward period ({tables.adjusted_periods:,} adjusted)"
        )
    else:
        what = (
            f"{n_fc:,} rows, one per series, the forward periods as columns "
            f"({len(tables.periods)}; {tables.adjusted_periods:,} adjusted periods)"
        )
    return decisions, replace(forecast, describe=what), warnings


def _clashing(
    mapped: Mapping[str, str], names: Mapping[str, str], tables: Iterable[Sequence[str]]
) -> str | None:
    """The first mapped column one of whose headers repeats another header of a table."""
    for table in tables:
        count = Counter(h.casefold() for h in table)
        for owner in _FILE_NAMED:
            if owner not in mapped:
                continue
            own = [names[owner]]
            if owner == schema.FORECAST:
                own += [names["adjusted_forecast"]]
                own += [h for h in table if h.startswith(f"{names[owner]} ")]
            if any(count[h.casefold()] > 1 for h in own):
                return owner
    return None


def _long_table(frame: pd.DataFrame, names: Mapping[str, str]) -> FileTable:
    columns = [str(c) for c in frame.columns]
    return FileTable(
        frame=frame,
        headers=tuple(names.get(c, c) for c in columns),
        kinds=tuple(_KIND_OF.get(c, TEXT) for c in columns),
    )


def _wide_table(tables: ReviewTables, names: Mapping[str, str]) -> FileTable:
    """One row per series: its key, outcome and number of adjusted periods, then the adjusted
    forecast of each forward period (headed by the period's start date), then the portfolio's
    forecast of each (headed ``<forecast header> <date>``)."""
    long = tables.forecast
    periods = list(tables.periods)
    width = len(periods)
    n_series = len(long) // width if width else 0
    grid = long["period"].to_numpy(dtype=object).reshape(n_series, width)
    if n_series and not (grid == np.array(periods, dtype=object)).all():
        raise RuntimeError("the forecast table is not every series x forward period in order")
    firsts = long.iloc[::width] if width else long.iloc[:0]
    columns: dict[str, Any] = {}
    headers: list[str] = []
    kinds: list[str] = []

    def add(name: str, header: str, kind: str, values: Any) -> None:
        columns[name] = values
        headers.append(header)
        kinds.append(kind)

    for name in (ITEM, LOCATION, "outcome"):
        if name in long:
            add(name, names.get(name, name), _KIND_OF.get(name, TEXT), firsts[name].to_numpy())
    flags = long["adjusted"].to_numpy(dtype=bool).reshape(n_series, width)
    add("adjusted_periods", "adjusted_periods", COUNT, flags.sum(axis=1).astype(np.int64))
    adjusted = long["adjusted_forecast"].to_numpy(dtype=np.float64).reshape(n_series, width)
    original = long["forecast"].to_numpy(dtype=np.float64).reshape(n_series, width)
    for j, period in enumerate(periods):
        add(f"adjusted_forecast {period}", period, NUMBER, adjusted[:, j])
    for j, period in enumerate(periods):
        add(f"forecast {period}", f"{names[schema.FORECAST]} {period}", NUMBER, original[:, j])
    frame = pd.DataFrame(
        {k: pd.Series(v, dtype=getattr(v, "dtype", None), copy=False) for k, v in columns.items()},
        copy=False,
    )
    return FileTable(frame, tuple(headers), tuple(kinds), dated_headers=frozenset(periods))


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
    portfolio: Portfolio,
    ledger: Ledger,
    target: str | Path,
    *,
    cycle: str | None = None,
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
        portfolio: The portfolio whose forward forecast is exported.
        ledger: The decision ledger.
        target: ``.csv`` (a folder of three files, see ``export_paths``), ``.xlsx`` or
            ``.json``.
        cycle: Review cycle; default the portfolio's cycle.
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
    tables = review_tables(
        portfolio, ledger, cycle=cycle, exported_by=exported_by, rounding=rounding
    )
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
    numbers: list[float | int | None] = cells.tolist()
    return numbers


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
        risky = values[values.str.match(_TRIGGER_START).to_numpy(dtype=bool)]
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
        if _XLSX_ILLEGAL.search(value):
            value = _XLSX_ILLEGAL.sub(
                lambda m: chr(0x2400 + ord(m.group())) if m.group() < " " else "\ufffd", value
            )
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
    by_row: list[Any] = np.array([*cells, None], dtype=object)[codes].tolist()
    return by_row


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
    by_row: list[Any] = cells.tolist()
    return by_row


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
    ``"s"`` writes the text as an inline string (measured, docs/sources.md §6.2).
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

    ``allow_nan=False``: NaN and Infinity are not JSON (RFC 8259 §6; docs/sources.md §6.5), so a NaN
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
    "adjusted": "true where adjusted_forecast comes from a decision (this cycle's or carried)",
    "adjusted_in_cycle": "the review cycle whose decision gave adjusted_forecast: this cycle, "
    "or an earlier cycle whose adjustment is carried; empty where not adjusted",
    "outcome (forecast)": "the series' decision outcome this cycle, empty when not reviewed",
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
