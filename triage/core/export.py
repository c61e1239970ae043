"""What an export of a review cycle holds: the decisions and the adjusted forward forecast.

``review_tables`` builds two tables with triage's column names:

* **decisions**: one row per reviewed series (its effective decision in the cycle);
* **forecast**: one row per series and forward period, for *every* series of the portfolio, so the
  file is a complete forward forecast: the ledger's adjusted value where the series' decision
  adjusted that period, or where an earlier cycle's adjustment still reaches it (carried, marked
  in ``adjusted_in_cycle``; docs/history.md), the portfolio's forecast everywhere else.

Adjusted values are rounded there, by ``triage.core.rounding`` (the one rule; the ledger keeps
what was decided). ``file_tables`` then shapes them for the files: the portfolio's own headers
where ``--columns`` mapped them, and the forecast long or wide. The writers
(``triage.render.export``: CSV, xlsx, JSON, the README) read those same ``FileTable`` objects, so
every format holds the same columns and numbers, the same caution (``CAUTION``) and the same
provenance. docs/export.md describes the files and their safety rules.
"""

from __future__ import annotations

import re
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime
from typing import Any

import numpy as np
import pandas as pd

from triage import __version__
from triage.core import adjust, schema
from triage.core.config import default_reviewer
from triage.core.cycle import ReviewCycle
from triage.core.errors import TriageError
from triage.core.ledger import Decision, describe_series
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
from triage.core.vocabulary import OUTCOMES, labels

#: Shown in every export, in every format, and by the command line after writing one.
CAUTION = (
    "These decisions are advisory: they record a reviewer's judgement in triage, not an approved "
    "plan. Check each one in the planning system before it is allowed to move stock or money."
)

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
#: A ledger id, written as a whole number in every format (a number cell in xlsx, unquoted in
#: CSV, a JSON number), empty (null in JSON) where there is none: as text, a CSV reader and a
#: spreadsheet opening the CSV would read it back as a number while the workbook kept a text
#: cell, so the two files of one export would disagree on its type (docs/export.md).
_IDS = frozenset(("group_decision",))

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
    **dict.fromkeys(_NUMBERS | _IDS, NUMBER),
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


class ExportError(TriageError):
    """An export cannot be written as asked; nothing was written or changed."""


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


def _floats(values: Iterable[float | None]) -> np.ndarray:
    return np.array([np.nan if v is None else v for v in values], dtype=np.float64)


def review_tables(
    review: ReviewCycle,
    *,
    exported_by: str | None = None,
    exported_at: datetime | None = None,
    rounding: Rounding = DEFAULT_ROUNDING,
) -> ReviewTables:
    """The decisions and forecast tables of a cycle, before any file format is applied.

    Args:
        review: The review cycle to export (``ReviewCycle.name``; an earlier cycle than the
            portfolio's is allowed) on the portfolio whose forward forecast is exported, with
            its ledger (read-only is enough).
        exported_by: Name recorded as the exporter; default the configured reviewer or login.
        exported_at: Export time (UTC); default now.
        rounding: Precision of the values triage computes: the adjusted periods and the units
            and value changes (``triage.core.rounding``; the file's forecast is not changed).

    Raises:
        ExportError: ``cycle`` is not an ISO date.
    """
    portfolio, ledger = review.portfolio, review.ledger
    if ledger is None:
        raise ExportError("no ledger is open, so there are no decisions to export.")
    cycle = _check_cycle(review.name)
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
    decided = review.decisions()
    items = keys[ITEM].to_numpy(dtype=object)
    locations = keys[LOCATION].to_numpy(dtype=object) if has_location else None
    series = portfolio.series_index.positions(
        [d.item for d in decided], [d.location for d in decided]
    )
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
    line_group = np.array([d.group_id or 0 for d in kept for _ in d.lines], dtype=np.int64)
    # ---- precision (triage.core.rounding): the ledger keeps what was decided, files get this
    decimals = decimals_for(rounding, portfolio.forecast[:, first_fwd:])
    line_adj = round_half_away(line_adj, decimals)
    line_series = kept_series[line_dec] if len(line_dec) else np.empty(0, dtype=np.int64)
    delta = adjust.units_change(line_orig, line_adj)
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
    # The group decision each adjusted cell comes from, 0 for a series' own decision or none.
    group_in = np.zeros(forward.shape, dtype=np.int64)
    group_in[rows, cols] = line_group[applies]
    carried_lines = review.carried_lines
    carried_lines = carried_lines.loc[carried_lines["standing"].to_numpy(dtype=bool)]
    c_rows = carried_lines["series"].to_numpy(dtype=np.int64)
    c_cols = carried_lines["column"].to_numpy(dtype=np.int64) - first_fwd
    replaced_now = flag[c_rows, c_cols]
    already = carried_lines["in_forecast"].to_numpy(dtype=bool) & ~replaced_now
    # Every adjusted value at the export's precision, whichever cycle's decision it comes from;
    # a carried value that then equals the file's forecast is already in it (nothing applied).
    carried_values = round_half_away(carried_lines["adjusted"].to_numpy(dtype=np.float64), decimals)
    already = already | (~replaced_now & unchanged(forward[c_rows, c_cols], carried_values))
    applied_mask = ~replaced_now & ~already
    applied = carried_lines.loc[applied_mask].reset_index(drop=True)
    made_cycles = [cycle, *sorted(set(applied["cycle"].astype(str)))]
    if len(applied):
        a_rows, a_cols = c_rows[applied_mask], c_cols[applied_mask]
        adjusted_fc[a_rows, a_cols] = carried_values[applied_mask]
        flag[a_rows, a_cols] = True
        code = {c: i + 1 for i, c in enumerate(made_cycles)}
        made_in[a_rows, a_cols] = applied["cycle"].astype(str).map(code).to_numpy(np.int16)
        group_in[a_rows, a_cols] = applied["group_decision"].to_numpy(dtype=np.int64)
    warnings.extend(_carried_warnings(portfolio, carried_lines, applied, already, replaced_now))
    # A period is adjusted only where the exported value differs from the file's forecast: a
    # percentage of 0, "use NAME" where NAME agrees, or "=N" with the forecast's own value
    # leave it as it was, and an upload must not take it for a change (docs/export.md).
    same = np.zeros(forward.shape, dtype=bool)
    same[rows, cols] = True
    same &= unchanged(forward, adjusted_fc)
    if same.any():
        named = np.flatnonzero(same.any(axis=1))
        first = [describe_series(*portfolio.key(int(s))) for s in named[:_EXAMPLES]]
        warnings.append(
            f"{int(same.sum())} adjusted period(s) of this cycle's decisions give the "
            "forecast's own value at the export's precision, so they are not marked adjusted: "
            + _examples(first, len(named))
            + "."
        )
        flag &= ~same
        made_in[same] = 0
        group_in[same] = 0

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
    # One small code per cell, as adjusted_in_cycle (code -1: no group decision, a missing
    # number in every writer); no sort when no group decision is in.
    groups_used, group_codes = np.zeros(1, np.int64), np.zeros(group_in.size, np.int64)
    if group_in.any():
        groups_used, group_codes = np.unique(group_in.ravel(), return_inverse=True)
    ids = groups_used[groups_used > 0]
    forecast_cols["group_decision"] = pd.Categorical.from_codes(
        (group_codes.ravel() - (len(groups_used) - len(ids))).astype(np.int32),
        categories=pd.Index(ids, dtype=np.int64),
    )
    # copy=False: the columns are fresh arrays already; at a million series each copy is ~100 MB.
    forecast = pd.DataFrame(
        {k: pd.Series(v, copy=False) for k, v in forecast_cols.items()},
        copy=False,
    )

    # ---- decisions table
    outcome_labels = labels(OUTCOMES)
    cause_labels = labels(ledger.root_causes)
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
            "group_decision": _floats(d.group_id or None for d in kept),
        }
    )
    decisions = pd.DataFrame(
        {
            k: pd.Series(v, dtype=np.float64 if k in _NUMBERS | _IDS else object)
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


def unchanged(forecast: np.ndarray, adjusted: np.ndarray) -> np.ndarray:
    """Where an exported adjusted value is the forecast's own: equal floats, or both missing.

    The comparison is exact, on the values as the export writes them (the adjusted value
    rounded by ``triage.core.rounding``, the forecast as in the file), so ``adjusted`` is true
    exactly where a reader sees two different numbers.
    """
    forecast = np.asarray(forecast, dtype=np.float64)
    adjusted = np.asarray(adjusted, dtype=np.float64)
    same: np.ndarray = (forecast == adjusted) | (np.isnan(forecast) & np.isnan(adjusted))
    return same


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
