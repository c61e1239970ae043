"""Across review cycles: what past overrides were worth, and which series keep coming back.

A planner reviews a new portfolio file every week with the same ledger. This module closes the
loop with the newer file's actuals:

* ``realised_value``: every effective adjustment line whose period now has actual demand, with
  the error of the original and of the adjusted forecast, and the value the override added;
* ``summarise``: those lines by reviewer, root cause, direction, size band or cycle;
* ``repeat_offenders``: series in the worst-offender set in at least N of the last M cycles,
  as the ledger stored each cycle's set when it was opened for review (re-scored from the
  current file for cycles without one);
* ``active_adjustments``: adjustments with forward periods still ahead;
* ``carried_over``: handed-off and put-off series still among the worst;
* ``portfolio_fva``: forecast value added over the naive forecast for the cycle.

Sign convention (stated once, here): the **value added** of an override in a period is

    value_added = |original − actual| − |adjusted − actual|

in units, positive when the override brought the forecast closer to the actual (it *helped*),
negative when it moved it away. This is Gilliland's forecast value added (FVA_step = Err(previous
step) − Err(step)) with the forecast the reviewer changed as the previous step and absolute error
as the metric (docs/sources.md §3.1). In value it is multiplied by the price of the period.

When the file also holds a statistical forecast (the competing forecast ``forecast_<name>``
named by ``settings.STAT_NAME``, ``forecast_stat`` by default; ``stat_forecast``), each realised
line is also set against the statistical forecast S of the same period, as the file holds it:

    value_added_vs_stat = |S − actual| − |adjusted − actual|

positive when the override beat the statistical forecast; lines whose S is missing are left out
of the comparison (``stat_adjustments`` counts those compared).

Direction and size of an override follow the split that Fildes, Goodwin, Lawrence & Nikolopoulos
(2009, IJF 25(1):3–23) used to show that small and upward adjustments are the ones most likely to
hurt: direction is the sign of adjusted − original, size is |adjusted − original| / |original| in
the bands of ``SIZE_BANDS``. This module reports what the ledger's own overrides did; it asserts
nothing about them.

Decisions count as the ledger defines them: in each cycle, each series' latest decision that has
not been undone (``Ledger.current``). Nothing here writes to the ledger.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from triage.core import adjust, metrics, ranking, schema
from triage.core.errors import TriageError
from triage.core.ledger import AdjustmentEnd, Decision, Ledger
from triage.core.portfolio import Portfolio
from triage.core.settings import REPEAT, SEASON, TARGET_SHARE, WINDOW
from triage.core.vocabulary import (
    ADJUSTED,
    DEFAULT_ROOT_CAUSES,
    DEFERRED,
    HANDED_OFF,
    OPEN_OUTCOMES,
    OUTCOMES,
    SETTLED,
    Choice,
)

UP = "up"
DOWN = "down"
#: Size bands of |adjusted − original| / |original|, smallest first; each band includes its
#: lower edge. An override of a zero forecast has no relative size: it has its own band.
SIZE_BANDS: tuple[str, ...] = ("<5%", "5-10%", "10-20%", "20-50%", ">=50%", "from zero")
#: Upper edges of the first four bands.
SIZE_EDGES: tuple[float, ...] = (0.05, 0.10, 0.20, 0.50)
FROM_ZERO = SIZE_BANDS[-1]

#: Groupings ``summarise`` accepts, and the realised-value column each one reads.
GROUPINGS: dict[str, str] = {
    "reviewer": "reviewer",
    "root_cause": "root_cause",
    "direction": "direction",
    "size": "size",
    "cycle": "cycle",
    "group": "group",
}
#: The ``group`` of a line that is a series decision's own, not a group decision's part.
SERIES_DECISIONS = "series decisions"
#: Label of the row that sums every line in ``summarise``.
ALL = "all"

#: What became of each adjustment line when set against a portfolio (``line_status``).
REALISED = "realised"
AHEAD = "ahead"
NO_ACTUAL = "no_actual"
NOT_IN_PORTFOLIO = "not_in_portfolio"
OFF_CALENDAR = "off_calendar"
UNCHANGED = "unchanged"
NO_FORECAST = "no_forecast"
ENDED = "ended"
LINE_STATUSES: tuple[str, ...] = (
    REALISED,
    AHEAD,
    NO_ACTUAL,
    NOT_IN_PORTFOLIO,
    OFF_CALENDAR,
    UNCHANGED,
    NO_FORECAST,
    ENDED,
)
STATUS_TEXT = {
    REALISED: "actual demand is in: value realised",
    AHEAD: "period still ahead (after the latest actual)",
    NO_ACTUAL: "period passed but the portfolio has no actual for it",
    NOT_IN_PORTFOLIO: "series is not in this portfolio",
    OFF_CALENDAR: "period is not on this portfolio's calendar",
    UNCHANGED: "the adjustment left this period unchanged",
    NO_FORECAST: "original or adjusted forecast missing",
    ENDED: "a reviewer ended the adjustment before this period",
}

REALISED_COLUMNS: tuple[str, ...] = (
    "cycle",
    schema.ITEM,
    schema.LOCATION,
    "period",
    "horizon",
    "original",
    "adjusted",
    "actual",
    "abs_error_original",
    "abs_error_adjusted",
    "value_added",
    "price",
    "value_added_value",
    "stat",
    "abs_error_stat",
    "value_added_vs_stat",
    "value_added_vs_stat_value",
    "reviewer",
    "root_cause",
    "direction",
    "size",
    "helped",
    "event_id",
    "series",
    "group",
)

SUMMARY_COLUMNS: tuple[str, ...] = (
    "adjustments",
    "decisions",
    "helped",
    "hurt",
    "share_helped",
    "abs_error_original",
    "abs_error_adjusted",
    "value_added",
    "value_added_value",
    "relative_value_added",
    "avg_rel_mae",
    "stat_adjustments",
    "abs_error_stat",
    "value_added_vs_stat",
    "value_added_vs_stat_value",
)
#: The columns of ``REALISED_COLUMNS`` and of ``SUMMARY_COLUMNS`` that value the overrides
#: against the statistical forecast (``stat_forecast``); outputs leave them out without one.
REALISED_STAT_COLUMNS: tuple[str, ...] = (
    "stat",
    "abs_error_stat",
    "value_added_vs_stat",
    "value_added_vs_stat_value",
)
SUMMARY_STAT_COLUMNS: tuple[str, ...] = (
    "stat_adjustments",
    "abs_error_stat",
    "value_added_vs_stat",
    "value_added_vs_stat_value",
)
STAT_COLUMNS: tuple[str, ...] = tuple(dict.fromkeys(REALISED_STAT_COLUMNS + SUMMARY_STAT_COLUMNS))


class HistoryError(TriageError):
    """A cross-cycle question was asked with settings that cannot be answered."""


# --------------------------------------------------------------------------------------------
# Joining ledger text to the portfolio


def series_positions(
    portfolio: Portfolio, items: Sequence[str] | np.ndarray, locations: Sequence[str] | np.ndarray
) -> np.ndarray:
    """Portfolio position of each (item, location), -1 where absent (``Portfolio.series_index``).

    Nothing to look up builds no index (it takes a second on a million series).
    """
    if len(items) == 0:
        return np.empty(0, dtype=np.int64)
    return portfolio.series_index.positions(items, locations)


def period_dates(portfolio: Portfolio) -> pd.Index:
    """ISO start date of every calendar period (the form ledger lines store)."""
    return pd.Index(portfolio.calendar.periods.strftime("%Y-%m-%d"), dtype=object)


@dataclass(frozen=True)
class DecisionLog:
    """A ledger's decisions read once: every cycle's effective decisions and the ends in force.

    Decisions count as the ledger defines them: in each cycle, each series' latest decision that
    has not been undone (``Ledger.current``).
    """

    decisions: tuple[Decision, ...]
    """Every cycle's effective decisions, oldest cycle first (each cycle by item, location)."""
    ends: Mapping[int, AdjustmentEnd]
    """Ends of adjustments in force as of ``as_of`` (``Ledger.standing_ends``), by event id."""
    as_of: str
    """The review cycle the ends were read for."""
    root_causes: tuple[Choice, ...]
    """The ledger's root-cause vocabulary (the default one without a ledger)."""
    group_keys: Mapping[int, tuple[tuple[str, ...], tuple[str, ...]]] = field(default_factory=dict)
    """Each group decision's grouping columns and key values, by id (``Ledger.group_keys``)."""

    def group_label(self, group_id: int) -> str:
        """``family=lighting, location=STH (#12)``; ``SERIES_DECISIONS`` for 0 (no group)."""
        if not group_id:
            return SERIES_DECISIONS
        columns, values = self.group_keys.get(group_id, ((), ()))
        keys = ", ".join(f"{c}={v}" for c, v in zip(columns, values, strict=False))
        return f"{keys} (#{group_id})" if keys else f"group #{group_id}"

    @classmethod
    def read(cls, ledger: Ledger | None, as_of: str) -> DecisionLog:
        """Read the log of ``ledger`` (an empty one for None) as of review cycle ``as_of``."""
        if ledger is None:
            return cls((), {}, as_of, DEFAULT_ROOT_CAUSES)
        decisions: list[Decision] = []
        for cycle in ledger.cycles():
            decisions.extend(ledger.current(cycle))
        return cls(
            tuple(decisions),
            ledger.standing_ends(as_of),
            as_of,
            ledger.root_causes,
            ledger.group_keys(),
        )

    def current(self, cycle: str) -> list[Decision]:
        """The effective decisions of one cycle (``Ledger.current``)."""
        return [d for d in self.decisions if d.cycle == cycle]

    def before(self, cycle: str) -> list[Decision]:
        """Every earlier cycle's effective decisions, oldest cycle first."""
        return [d for d in self.decisions if d.cycle < cycle]


def _float(value: float | None) -> float:
    return math.nan if value is None else float(value)


def adjustment_lines(portfolio: Portfolio, log: DecisionLog) -> pd.DataFrame:
    """Every line of every effective adjustment, located in the portfolio, with its status.

    One row per (decision, period): ``event_id``, ``cycle``, ``item``, ``location``,
    ``reviewer``, ``root_cause``, ``adjustment``, ``period``, ``original``, ``adjusted``,
    ``group_decision`` (the group decision the line is part of, 0 when none),
    ``series`` (portfolio position, -1 if absent), ``column`` (calendar column, -1 if off the
    calendar), ``actual`` (NaN unless realised) and ``status`` (one of ``LINE_STATUSES``).
    The join to the portfolio is one vectorised lookup for the keys and one for the periods.

    A line is ``ended`` when a reviewer ended its adjustment (``Ledger.end_adjustment``) in a
    cycle before the line's period, and that end is in force as of the log's cycle
    (``DecisionLog.as_of``): the override no longer stood for that period.
    """
    decisions = [d for d in log.decisions if d.outcome == ADJUSTED and d.lines]
    counts = [len(d.lines) for d in decisions]

    def repeat(values: list[object]) -> np.ndarray:
        return (
            np.repeat(np.array(values, dtype=object), counts) if decisions else np.empty(0, object)
        )

    frame = pd.DataFrame(
        {
            "event_id": np.repeat(
                np.array([d.event_id for d in decisions], dtype=np.int64), counts
            ),
            "cycle": repeat([d.cycle for d in decisions]),
            schema.ITEM: repeat([d.item for d in decisions]),
            schema.LOCATION: repeat([d.location for d in decisions]),
            "reviewer": repeat([d.reviewer for d in decisions]),
            "root_cause": repeat([d.root_cause for d in decisions]),
            "adjustment": repeat([d.adjustment or "" for d in decisions]),
            "period": np.array([ln.period for d in decisions for ln in d.lines], dtype=object),
            "original": np.array([_float(ln.original) for d in decisions for ln in d.lines]),
            "adjusted": np.array([_float(ln.adjusted) for d in decisions for ln in d.lines]),
            # The group decision a line is a series' part of (its ledger id), 0 for a series
            # decision's own line (docs/ledger.md, "Group decisions").
            "group_decision": np.repeat(
                np.array([d.group_id or 0 for d in decisions], dtype=np.int64), counts
            ),
            # The group in words, for the overrides' breakdown by group.
            "group": repeat([log.group_label(d.group_id or 0) for d in decisions]),
        }
    )
    series = series_positions(portfolio, frame[schema.ITEM], frame[schema.LOCATION])
    dates = period_dates(portfolio)
    column = np.asarray(dates.get_indexer(frame["period"].to_numpy(dtype=object)), dtype=np.int64)
    period = frame["period"].to_numpy(dtype=object).astype(str)
    latest = portfolio.cycle
    original = frame["original"].to_numpy()
    adjusted = frame["adjusted"].to_numpy()

    actual = np.full(len(frame), np.nan)
    inside = (series >= 0) & (column >= 0) & (column <= portfolio.last_actual)
    actual[inside] = portfolio.demand[series[inside], column[inside]]

    # The cycle each line's adjustment was ended in ("" when it stands), as of the log's cycle.
    ends = log.ends
    ended_in = np.full(len(frame), "", dtype=object)
    if ends:
        end_cycles = pd.Series({k: e.cycle for k, e in ends.items()}, dtype=object)
        ended_in = (
            end_cycles.reindex(frame["event_id"].to_numpy()).fillna("").to_numpy(dtype=object)
        )
    ended = (ended_in != "") & (period > ended_in.astype(str))

    # Precedence: a missing series or forecast first, then an unchanged period, then an end,
    # then time.
    status = np.select(
        [
            series < 0,
            np.isnan(original) | np.isnan(adjusted),
            adjusted == original,
            ended,
            period > latest,
            column < 0,
            np.isnan(actual),
        ],
        [NOT_IN_PORTFOLIO, NO_FORECAST, UNCHANGED, ENDED, AHEAD, OFF_CALENDAR, NO_ACTUAL],
        default=REALISED,
    )
    frame["series"] = series
    frame["column"] = column
    frame["actual"] = np.where(status == REALISED, actual, np.nan)
    frame["status"] = status.astype(object)
    return frame


def line_status(lines: pd.DataFrame) -> pd.DataFrame:
    """How many adjustment lines (``adjustment_lines``) and decisions are in each state
    (``LINE_STATUSES`` order)."""
    grouped = lines.groupby("status")
    out = pd.DataFrame(
        {
            "status": list(LINE_STATUSES),
            "lines": [int(grouped.size().get(s, 0)) for s in LINE_STATUSES],
            "decisions": [
                int(grouped["event_id"].nunique().get(s, 0)) if len(lines) else 0
                for s in LINE_STATUSES
            ],
            "meaning": [STATUS_TEXT[s] for s in LINE_STATUSES],
        }
    )
    return out


# --------------------------------------------------------------------------------------------
# Realised value


def size_band(original: np.ndarray, adjusted: np.ndarray) -> np.ndarray:
    """Size band (``SIZE_BANDS``) of each override: |adjusted − original| / |original|.

    Each band holds its lower edge (exactly 5 % is in ``5-10%``); an original of 0 is
    ``from zero``.
    """
    original = np.asarray(original, dtype=np.float64)
    adjusted = np.asarray(adjusted, dtype=np.float64)
    base = np.abs(original)
    relative = np.full(original.shape, np.inf)
    np.divide(np.abs(adjusted - original), base, out=relative, where=base > 0)
    band = np.searchsorted(np.asarray(SIZE_EDGES), relative, side="right")
    band = np.where(base > 0, band, len(SIZE_BANDS) - 1)
    return np.asarray(SIZE_BANDS, dtype=object)[band]


def stat_forecast(portfolio: Portfolio, name: str, *, required: bool = False) -> np.ndarray | None:
    """The statistical forecast overrides are also valued against: ``forecast_<name>``.

    Args:
        portfolio: The portfolio.
        name: The competing forecast's name (``ScoreSettings.stat_name``).
        required: The name was asked for explicitly: a file without it is an error.

    Returns:
        Its series x periods matrix, or None when the file has no such column (and it is not
        required).

    Raises:
        TriageError: ``required`` and the file has no ``forecast_<name>`` column.
    """
    found = portfolio.competing.get(name)
    if found is None and required:
        have = ", ".join(f"{schema.COMPETING_PREFIX}{n}" for n in portfolio.competing)
        hint = (
            f"Competing forecasts in the file: {have}."
            if have
            else f"The file has no {schema.COMPETING_PREFIX}<name> column; leave out --stat-name."
        )
        bare = name[len(schema.COMPETING_PREFIX) :]
        if name.startswith(schema.COMPETING_PREFIX) and bare in portfolio.competing:
            hint = f"Write --stat-name {bare} for the column {name}."
        raise TriageError(
            f"{portfolio.path}: no column {schema.COMPETING_PREFIX}{name} to value the overrides "
            "against.",
            hint=hint,
        )
    return found


def realised_value(
    portfolio: Portfolio, lines: pd.DataFrame, stat: np.ndarray | None = None
) -> pd.DataFrame:
    """One row per effective adjustment line whose period now has actual demand.

    Columns (``REALISED_COLUMNS``): ``cycle`` of the decision, the key, ``period`` (ISO),
    ``horizon`` (periods after the cycle, 1 = the next period; -1 when the cycle is not on the
    calendar), ``original`` and ``adjusted`` forecast as stored at decision time, ``actual``,
    ``abs_error_original`` = |original − actual|, ``abs_error_adjusted`` = |adjusted − actual|,
    ``value_added`` = their difference (positive = the override helped), ``price`` and
    ``value_added_value`` (NaN without prices), ``stat`` (the statistical forecast of the
    period, NaN without one), ``abs_error_stat`` = |stat − actual|, ``value_added_vs_stat`` =
    abs_error_stat − abs_error_adjusted (positive = the override beat the statistical forecast)
    and ``value_added_vs_stat_value`` (× price), ``reviewer``, ``root_cause``, ``direction``
    (``up``/``down``), ``size`` (``SIZE_BANDS``), ``helped`` (value_added > 0), ``event_id`` and
    ``series`` (portfolio position).

    Left out: undone and replaced decisions (only each series' effective decision per cycle
    counts), periods the adjustment did not change (no override there), periods without an
    original or adjusted value, and lines whose series or actual is not in ``portfolio``
    (``line_status`` counts them). Rows are sorted by cycle, key and period.

    Args:
        portfolio: The portfolio whose actuals judge the overrides.
        lines: Its ``adjustment_lines``.
        stat: The statistical forecast (``stat_forecast``), series x periods of ``portfolio``,
            or None: the ``stat`` columns are then NaN.
    """
    done = lines.loc[lines["status"] == REALISED].reset_index(drop=True)
    original = done["original"].to_numpy()
    adjusted = done["adjusted"].to_numpy()
    actual = done["actual"].to_numpy()
    series = done["series"].to_numpy(dtype=np.int64)
    column = done["column"].to_numpy(dtype=np.int64)
    err_o = np.abs(original - actual)
    err_a = np.abs(adjusted - actual)
    added = err_o - err_a
    if portfolio.price is not None:
        price = portfolio.price[series, column]
    else:
        price = np.full(len(done), np.nan)
    stat_value = stat[series, column] if stat is not None else np.full(len(done), np.nan)
    err_s = np.abs(stat_value - actual)
    beat = err_s - err_a
    cycle_col = period_dates(portfolio).get_indexer(done["cycle"].to_numpy(dtype=object))
    horizon = np.where(cycle_col >= 0, column - cycle_col, -1).astype(np.int64)

    out = pd.DataFrame(
        {
            "cycle": done["cycle"].to_numpy(dtype=object),
            schema.ITEM: done[schema.ITEM].to_numpy(dtype=object),
            schema.LOCATION: done[schema.LOCATION].to_numpy(dtype=object),
            "period": done["period"].to_numpy(dtype=object),
            "horizon": horizon,
            "original": original,
            "adjusted": adjusted,
            "actual": actual,
            "abs_error_original": err_o,
            "abs_error_adjusted": err_a,
            "value_added": added,
            "price": price,
            "value_added_value": added * price,
            "stat": stat_value,
            "abs_error_stat": err_s,
            "value_added_vs_stat": beat,
            "value_added_vs_stat_value": beat * price,
            "reviewer": done["reviewer"].to_numpy(dtype=object),
            "root_cause": done["root_cause"].to_numpy(dtype=object),
            "direction": np.where(adjusted > original, UP, DOWN).astype(object),
            "size": size_band(original, adjusted),
            "helped": added > 0,
            "event_id": done["event_id"].to_numpy(dtype=np.int64),
            "series": series,
            "group": done["group"].to_numpy(dtype=object),
        },
        columns=list(REALISED_COLUMNS),
    )
    return out.sort_values(
        ["cycle", schema.ITEM, schema.LOCATION, "period"], kind="stable"
    ).reset_index(drop=True)


def _group_order(name: str, values: pd.Series) -> list[str]:
    present = list(dict.fromkeys(values.tolist()))
    if name == "size":
        return [b for b in SIZE_BANDS if b in present]
    if name == "direction":
        return [d for d in (UP, DOWN) if d in present]
    if name == "group":
        # Group decisions first, by label; the series decisions' own lines last.
        return sorted(p for p in present if p != SERIES_DECISIONS) + (
            [SERIES_DECISIONS] if SERIES_DECISIONS in present else []
        )
    return sorted(present)


def _avg_rel_mae(frame: pd.DataFrame) -> float:
    """Davydenko & Fildes (2013) AvgRelMAE of the overrides against their original forecasts.

    Per decision (one series in one cycle) r_i = MAE_adjusted / MAE_original over its lines in
    the group, weight n_i = its line count; AvgRelMAE = exp(Σ n_i ln r_i / Σ n_i). Below 1 the
    overrides improved accuracy. A ratio of 0 or infinity has no logarithm; those decisions are
    left out (common practice); NaN when none is left.
    """
    if frame.empty:
        return math.nan
    per = frame.groupby("event_id").agg(
        adj=("abs_error_adjusted", "sum"),
        orig=("abs_error_original", "sum"),
        n=("value_added", "size"),
    )
    ok = (per["adj"] > 0) & (per["orig"] > 0)
    if not ok.any():
        return math.nan
    ratio = per.loc[ok, "adj"].to_numpy() / per.loc[ok, "orig"].to_numpy()
    weight = per.loc[ok, "n"].to_numpy(dtype=np.float64)
    return float(np.exp(np.sum(weight * np.log(ratio)) / np.sum(weight)))


def _summary_row(frame: pd.DataFrame) -> dict[str, float]:
    n = len(frame)
    added = float(frame["value_added"].sum())
    orig = float(frame["abs_error_original"].sum())
    priced = frame["value_added_value"].notna().any()
    return {
        "adjustments": n,
        "decisions": int(frame["event_id"].nunique()),
        "helped": int(frame["helped"].sum()),
        "hurt": int((frame["value_added"] < 0).sum()),
        "share_helped": float(frame["helped"].mean()) if n else math.nan,
        "abs_error_original": orig,
        "abs_error_adjusted": float(frame["abs_error_adjusted"].sum()),
        "value_added": added,
        "value_added_value": float(frame["value_added_value"].sum()) if priced else math.nan,
        "relative_value_added": added / orig if orig > 0 else math.nan,
        "avg_rel_mae": _avg_rel_mae(frame),
        **_stat_row(frame),
    }


def _stat_row(frame: pd.DataFrame) -> dict[str, float]:
    """The lines with a statistical forecast: how many, its error, what the overrides beat it by
    (NaN when no line of the group has one; value NaN without prices)."""
    compared = frame.loc[frame["stat"].notna()]
    n = len(compared)
    priced = compared["value_added_vs_stat_value"].notna().any()
    return {
        "stat_adjustments": n,
        "abs_error_stat": float(compared["abs_error_stat"].sum()) if n else math.nan,
        "value_added_vs_stat": float(compared["value_added_vs_stat"].sum()) if n else math.nan,
        "value_added_vs_stat_value": (
            float(compared["value_added_vs_stat_value"].sum()) if priced else math.nan
        ),
    }


def summarise(
    realised: pd.DataFrame, by: str | Sequence[str], *, overall: bool = True
) -> pd.DataFrame:
    """Realised override value per group, with an ``all`` row for every line.

    Columns: the group column(s), then ``adjustments`` (lines, i.e. overridden periods),
    ``decisions`` (distinct decisions), ``helped`` and ``hurt`` (lines with value added > 0 and
    < 0), ``share_helped`` (helped / adjustments), Σ ``abs_error_original``, Σ
    ``abs_error_adjusted``, Σ ``value_added`` in units (error removed; negative = error added),
    Σ ``value_added_value`` (NaN without prices), ``relative_value_added`` = Σ value added /
    Σ original error (the share of the original forecasts' error the overrides removed; the
    relative FVA form 1 − MAE_adjusted / MAE_original) and ``avg_rel_mae`` (Davydenko & Fildes
    2013, see ``_avg_rel_mae``); then against the statistical forecast: ``stat_adjustments``
    (lines with one), Σ ``abs_error_stat``, Σ ``value_added_vs_stat`` (positive = the overrides
    beat it) and Σ ``value_added_vs_stat_value``, over those lines (NaN when there are none).

    Args:
        realised: Output of ``realised_value``.
        by: One of ``GROUPINGS`` or a sequence of them (e.g. ``("direction", "size")``).
        overall: Append the ``all`` row (group columns set to ``"all"``).
    """
    names = [by] if isinstance(by, str) else list(by)
    for name in names:
        if name not in GROUPINGS:
            raise HistoryError(
                f"cannot group realised values by {name!r}.",
                hint=f"Use one of: {', '.join(GROUPINGS)}.",
            )
    columns = [GROUPINGS[n] for n in names]
    rows: list[dict[str, object]] = []
    if not realised.empty:
        orders = [_group_order(n, realised[c]) for n, c in zip(names, columns, strict=True)]
        # Keys as tuples whatever the pandas version does for a one-column grouping.
        grouped = {
            (key if isinstance(key, tuple) else (key,)): part
            for key, part in realised.groupby(columns, sort=False)
        }
        for combo in itertools.product(*orders):
            part = grouped.get(combo)
            if part is not None:
                rows.append({**dict(zip(names, combo, strict=True)), **_summary_row(part)})
    if overall:
        rows.append({**{n: ALL for n in names}, **_summary_row(realised)})
    return pd.DataFrame(rows, columns=[*names, *SUMMARY_COLUMNS])


# --------------------------------------------------------------------------------------------
# Repeat offenders


def worst_set(
    error: np.ndarray, target_share: float, order: np.ndarray | None = None
) -> np.ndarray:
    """Boolean mask of the worst-offender set: the leading set covering ``target_share``.

    Ranks and cumulative shares are formed exactly as ``ranking.scorecard`` forms them, and the
    cut is ``ranking.leading_cover``'s, so a set equals the one the review list showed. Empty
    when the total error is 0.

    Args:
        error: Absolute error per series (value where priced), by position.
        target_share: The share of total error the set covers.
        order: ``ranking.descending_order(error)`` when the caller has it (the scorecard's
            index), to skip sorting again.
    """
    error = np.asarray(error, dtype=np.float64)
    mask = np.zeros(len(error), dtype=bool)
    if not len(error) or float(error.sum()) <= 0:
        return mask
    if order is None:
        order = ranking.descending_order(error)
    _, cum = ranking.error_shares(error, order)
    mask[order[: ranking.cover_count(cum[order], target_share)]] = True
    return mask


def worst_set_of_card(card: pd.DataFrame, error: np.ndarray, target_share: float) -> np.ndarray:
    """:func:`worst_set` of a scorecard in error order (index = position), cut on the
    scorecard's own ``cum_share``: the running shares ``ranking.error_shares`` gave it, so the
    set is the same without forming them again (a second of ten million scatters)."""
    mask = np.zeros(len(card), dtype=bool)
    if not len(card) or float(np.asarray(error, dtype=np.float64).sum()) <= 0:
        return mask
    cum = card["cum_share"].to_numpy(dtype=np.float64)
    order = card.index.to_numpy(dtype=np.int64)
    mask[order[: ranking.cover_count(cum, target_share)]] = True
    return mask


#: Where a cycle's worst-offender set came from in ``repeat_offenders`` (``attrs["sources"]``).
SNAPSHOT = "snapshot"
RESCORED = "rescored"
#: A cycle whose worst set is not stored and cannot be re-scored (``stored_repeat_offenders``).
NOT_STORED = "not stored"


def repeat_offenders(
    portfolio: Portfolio,
    *,
    n: int = REPEAT.default[0],
    m: int = REPEAT.default[1],
    target_share: float = TARGET_SHARE.default,
    window: int = WINDOW.default,
    ledger: Ledger | None = None,
    current: np.ndarray | None = None,
) -> pd.DataFrame:
    """Series in the worst-offender set in at least ``n`` of the last ``m`` cycles.

    ``current``, when given, is the current cycle's worst set as just stored by the caller
    (``ReviewSession`` on first opening a cycle): used as the stored set without reading it
    back.

    The last ``m`` cycles are the ``m`` latest periods with any actual demand in this portfolio
    (cycle k = 0 is the current one): distinct weekly (or monthly) cycles, each counted once.
    A cycle's worst set is, in this order:

    * the set the review list showed when the cycle was first opened for review, as the ledger
      stored it (``Ledger.worst_sets``; schema 2 onwards): what the reviewers actually saw;
    * else re-scored from this portfolio alone: the scoring window of ``window`` periods with
      actuals ending at that period, ranked by absolute error (in value where priced) as
      ``scorecard`` ranks, cut at ``target_share``. That reproduces what the list showed as long
      as the history's actuals and forecasts were not restated and no series left the file
      since; ``attrs["sources"]`` says which cycles were re-scored (``repeat_notice`` words it).

    A series counts in a cycle only where it has at least one scored period in that cycle's
    window, or was in its stored set: a series that appeared later is not counted before it
    appeared (``windows_seen`` says in how many it was). A series missing from this portfolio
    is not reported at all.

    Returns:
        One row per series of the portfolio (index = position): the key columns,
        ``times_in_worst``, ``windows_seen``, ``repeat`` (times_in_worst >= n), ``in_worst_now``
        and one boolean column per cycle, ``worst_<YYYY-MM-DD>``, oldest first. Fewer than ``m``
        cycle columns when the history holds fewer periods with actuals. ``attrs["sources"]``
        maps each cycle to ``SNAPSHOT`` or ``RESCORED``.

    Raises:
        HistoryError: ``n`` or ``m`` below 1, ``n`` above ``m``, or a target share outside (0, 1].
    """
    if m < 1 or n < 1 or n > m:
        raise HistoryError(
            f"repeat offenders need 1 <= N <= M, not N = {n}, M = {m}.",
            hint="For example 3 of the last 4 cycles.",
        )
    if not 0 < target_share <= 1:
        raise HistoryError(f"the target share must be in (0, 1], not {target_share}.")
    if window < 1:
        raise HistoryError(f"the window must be at least 1 period, not {window}.")
    demand, forecast, price = portfolio.demand, portfolio.forecast, portfolio.price
    # The m latest periods with any actual demand, oldest first.
    ends = metrics.window_columns(demand, portfolio.last_actual, m)
    dates = [portfolio.calendar.periods[int(end)].strftime("%Y-%m-%d") for end in ends]
    stored = (
        ledger.worst_sets(dates[:-1] if current is not None else dates)
        if ledger is not None
        else {}
    )
    n_series = portfolio.n_series
    member = np.zeros((n_series, len(ends)), dtype=bool)
    seen = np.zeros((n_series, len(ends)), dtype=bool)
    sources: dict[str, str] = {}
    for j, end in enumerate(ends):
        # Adjacent columns (the usual case) as a slice: views, not copies of the matrices.
        cols = ranking.as_slice(metrics.window_columns(demand, int(end), window))
        wm = metrics.window_measures(
            demand[:, cols], forecast[:, cols], price[:, cols] if price is not None else None
        )
        seen[:, j] = wm.periods > 0
        if current is not None and j == len(ends) - 1:
            member[:, j] = current
            seen[:, j] |= current
            sources[dates[j]] = SNAPSHOT
            continue
        snapshot = stored.get(dates[j])
        if snapshot is not None:
            found = series_positions(portfolio, snapshot.items, snapshot.locations)
            member[found[found >= 0], j] = True
            seen[:, j] |= member[:, j]
            sources[dates[j]] = SNAPSHOT
            continue
        error = wm.abs_error_value if wm.abs_error_value is not None else wm.abs_error
        member[:, j] = worst_set(error, target_share) & seen[:, j]
        sources[dates[j]] = RESCORED
    return _offenders(portfolio, member, seen, dates, sources, n)


def stored_repeat_offenders(
    portfolio: Portfolio,
    actual_cols: np.ndarray,
    worst_now: np.ndarray,
    scored_now: np.ndarray,
    *,
    n: int = REPEAT.default[0],
    m: int = REPEAT.default[1],
    ledger: Ledger | None = None,
) -> pd.DataFrame:
    """:func:`repeat_offenders` when the histories are not in memory (a review on a stored
    scorecard, ``triage.core.on_demand``): earlier cycles count only where the ledger stored
    their worst set, since they cannot be re-scored (``attrs["sources"]`` says
    :data:`NOT_STORED` for the others, and :func:`repeat_notice` words it).

    Args:
        actual_cols: The calendar columns with any actual demand (the dataset's plan).
        worst_now: This cycle's worst set by position (the scorecard's).
        scored_now: Series with a scored period in this cycle's window.

    Returns:
        As :func:`repeat_offenders`.
    """
    if m < 1 or n < 1 or n > m:
        raise HistoryError(
            f"repeat offenders need 1 <= N <= M, not N = {n}, M = {m}.",
            hint="For example 3 of the last 4 cycles.",
        )
    ends = np.asarray(actual_cols)[-m:]
    dates = [portfolio.calendar.periods[int(end)].strftime("%Y-%m-%d") for end in ends]
    stored = ledger.worst_sets(dates) if ledger is not None else {}
    member = np.zeros((portfolio.n_series, len(ends)), dtype=bool)
    seen = np.zeros_like(member)
    sources: dict[str, str] = {}
    for j, date in enumerate(dates):
        snapshot = stored.get(date)
        if snapshot is not None:
            found = series_positions(portfolio, snapshot.items, snapshot.locations)
            member[found[found >= 0], j] = True
            sources[date] = SNAPSHOT
        elif j == len(dates) - 1:
            # This cycle: the set the scorecard gives, as the list shows it.
            member[:, j] = worst_now
            seen[:, j] = scored_now
            sources[date] = SNAPSHOT
        else:
            sources[date] = NOT_STORED
        seen[:, j] |= member[:, j]
    return _offenders(portfolio, member, seen, dates, sources, n)


def _offenders(
    portfolio: Portfolio,
    member: np.ndarray,
    seen: np.ndarray,
    dates: list[str],
    sources: dict[str, str],
    n: int,
) -> pd.DataFrame:
    """The repeat offenders' frame of :func:`repeat_offenders` from the cycles' worst sets."""
    data: dict[str, object] = {c: portfolio.keys[c].to_numpy() for c in portfolio.key_columns}
    times = member.sum(axis=1)
    data.update(
        times_in_worst=times,
        windows_seen=seen.sum(axis=1),
        repeat=times >= n,
        in_worst_now=member[:, -1] if dates else np.zeros(portfolio.n_series, dtype=bool),
    )
    for j, date in enumerate(dates):
        data[f"worst_{date}"] = member[:, j]
    out = pd.DataFrame(data)
    out.attrs["sources"] = sources
    return out


def repeat_notice(offenders: pd.DataFrame) -> str | None:
    """What to tell the reviewer when some cycles' worst sets had to be re-scored, else None."""
    sources: dict[str, str] = offenders.attrs.get("sources", {})
    missing = [c for c, how in sources.items() if how == NOT_STORED]
    if missing:
        return (
            f"{len(missing)} of the last {len(sources)} cycles ({', '.join(missing)}) have no "
            "worst-offender set stored in the ledger, and a review on a stored scorecard cannot "
            "re-score them, so repeat offenders count only the cycles stored."
        )
    rescored = [c for c, how in sources.items() if how == RESCORED]
    if not rescored:
        return None
    which = ", ".join(rescored)
    return (
        f"{len(rescored)} of the last {len(sources)} cycles ({which}) have no worst-offender set "
        "stored in the ledger (reviewed before triage kept them, or never opened for review), "
        "so repeat offenders count them as re-scored from this file."
    )


# --------------------------------------------------------------------------------------------
# Active adjustments and carried-over series


ACTIVE_COLUMNS: tuple[str, ...] = (
    "cycle",
    schema.ITEM,
    schema.LOCATION,
    "series",
    "reviewer",
    "root_cause",
    "adjustment",
    "periods",
    "remaining",
    "superseded",
    "first_remaining",
    "last_remaining",
    "remaining_periods",
    "units_change",
    "event_id",
)


def active_adjustments(portfolio: Portfolio, lines: pd.DataFrame) -> pd.DataFrame:
    """Effective adjustments with forward periods still ahead of the portfolio's latest actual.

    A period counts as remaining while it is after the portfolio's cycle, unless a decision of a
    later cycle adjusted the same series and period again: the newer override then stands for
    that period (``superseded`` counts those). An adjustment a reviewer ended
    (``Ledger.end_adjustment``) has nothing remaining after the cycle it was ended in; one with
    nothing remaining is not listed. Series missing from the portfolio are listed with
    ``series`` = -1: their override may still stand in the planning system.

    Returns:
        One row per decision (``ACTIVE_COLUMNS``): its cycle, key, ``series`` position,
        reviewer, root cause, adjustment spec, ``periods`` (lines in all), ``remaining``,
        ``superseded``, first and last remaining period, ``remaining_periods`` (tuple of ISO
        dates), ``units_change`` (Σ adjusted − original over the remaining periods, missing
        counted as 0) and ``event_id``. Sorted by cycle and key.
    """
    lines = lines.loc[~lines["status"].isin((UNCHANGED, ENDED))]
    ahead = _ahead(lines, portfolio.cycle)
    ahead["delta"] = adjust.units_change(ahead["original"].to_numpy(), ahead["adjusted"].to_numpy())
    total = lines.groupby("event_id").size()
    rows = []
    for event_id, part in ahead.groupby("event_id", sort=False):
        keep = part.loc[part["standing"]].sort_values("period")
        if keep.empty:
            continue
        first = part.iloc[0]
        periods = tuple(keep["period"].astype(str))
        rows.append(
            {
                "cycle": first["cycle"],
                schema.ITEM: first[schema.ITEM],
                schema.LOCATION: first[schema.LOCATION],
                "series": int(first["series"]),
                "reviewer": first["reviewer"],
                "root_cause": first["root_cause"],
                "adjustment": first["adjustment"],
                "periods": int(total.get(event_id, 0)),
                "remaining": len(periods),
                "superseded": int((~part["standing"]).sum()),
                "first_remaining": periods[0],
                "last_remaining": periods[-1],
                "remaining_periods": periods,
                "units_change": float(keep["delta"].sum()),
                "event_id": int(event_id),
            }
        )
    out = pd.DataFrame(rows, columns=list(ACTIVE_COLUMNS))
    return out.sort_values(["cycle", schema.ITEM, schema.LOCATION], kind="stable").reset_index(
        drop=True
    )


def _ahead(lines: pd.DataFrame, cycle: str) -> pd.DataFrame:
    """Lines after ``cycle``, newest decision first, with ``standing`` = the override in force.

    For each series and period the newest cycle's line stands (then the latest event).
    """
    ahead = lines.loc[lines["period"].to_numpy(dtype=object).astype(str) > cycle].copy()
    ahead = ahead.sort_values(["cycle", "event_id"], ascending=False, kind="stable")
    standing = ~ahead.duplicated([schema.ITEM, schema.LOCATION, "period"], keep="first")
    ahead["standing"] = standing.to_numpy()
    return ahead


def forward_overrides(portfolio: Portfolio, lines: pd.DataFrame) -> pd.DataFrame:
    """The override in force for each adjusted forward period of the portfolio's series.

    Same rule as ``active_adjustments`` (a later cycle's line replaces an earlier one for the
    same period). Columns: ``series``, ``column`` (calendar column), ``period``, ``original``,
    ``adjusted``, ``cycle``, ``event_id``; only series and periods in the portfolio. ``lines``
    are the portfolio's ``adjustment_lines``.
    """
    ahead = _ahead(lines.loc[lines["status"] == AHEAD], portfolio.cycle)
    ahead = ahead.loc[ahead["standing"] & (ahead["column"] >= 0)]
    cols = ["series", "column", "period", "original", "adjusted", "cycle", "event_id"]
    return ahead[cols].sort_values(["series", "column"], kind="stable").reset_index(drop=True)


#: A carried adjustment is already in the forecast where the file's forecast is within this
#: many units of the adjusted value (planning systems commonly keep two decimals), or within a
#: billionth of it.
IN_FORECAST_UNITS = 0.005
IN_FORECAST_RELATIVE = 1e-9

CARRIED_LINE_COLUMNS: tuple[str, ...] = (
    "series",
    schema.ITEM,
    schema.LOCATION,
    "column",
    "period",
    "original",
    "adjusted",
    "forecast",
    "cycle",
    "event_id",
    "adjustment",
    "reviewer",
    "root_cause",
    "ended",
    "standing",
    "in_forecast",
    "forecast_changed",
    "group_decision",
)


def in_forecast(forecast: np.ndarray, adjusted: np.ndarray) -> np.ndarray:
    """Where the file's forecast already equals the adjusted value (``IN_FORECAST_*``)."""
    forecast = np.asarray(forecast, dtype=np.float64)
    adjusted = np.asarray(adjusted, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        close: np.ndarray = np.isclose(
            forecast, adjusted, rtol=IN_FORECAST_RELATIVE, atol=IN_FORECAST_UNITS, equal_nan=False
        )
    return close


def carried_adjustments(
    portfolio: Portfolio,
    lines: pd.DataFrame,
    cycle: str,
    *,
    keep_ended: bool = False,
) -> pd.DataFrame:
    """Adjustments of cycles before ``cycle`` that still reach into the portfolio's forward periods.

    The rule a new cycle's export and review screens follow (docs/history.md, "Carrying
    adjustments into a new cycle"):

    * a line is carried when its adjustment is the effective decision of an earlier cycle, it
      changed the forecast (adjusted != original, both present), its period is a forward period
      of this portfolio, its series is in the portfolio, and no end is in force for it as of
      ``cycle`` (``Ledger.end_adjustment``; an end recorded in cycle E stops the periods after E);
    * for each series and period the newest earlier cycle's line stands (``standing``), then the
      newest event; a decision of ``cycle`` itself that adjusts the period takes precedence over
      all of them (the caller applies that, it is not in this table);
    * ``in_forecast``: the file's forward forecast already equals the adjusted value (within
      ``IN_FORECAST_UNITS``), so there is nothing left to apply there;
    * ``forecast_changed``: the file's forecast differs from both the original the adjustment
      started from and the adjusted value: the stored adjusted value is still the one carried.

    Args:
        portfolio: The new cycle's portfolio.
        lines: Its ``adjustment_lines`` from a log read as of ``cycle``.
        cycle: The review cycle carried into.
        keep_ended: Keep the lines of ended adjustments too, with ``ended`` True (never
            ``standing``), so a caller can end or restore one without reading the ledger again.

    Returns:
        ``CARRIED_LINE_COLUMNS``, one row per carried line, sorted by series and period, newest
        cycle first within a period. ``column`` is the calendar column.
    """
    status = lines["status"].to_numpy(dtype=object)
    keep = (
        (lines["cycle"].to_numpy(dtype=object).astype(str) < cycle)
        & ((status == AHEAD) | ((status == ENDED) & keep_ended))
        & (lines["column"].to_numpy() > portfolio.last_actual)
    )
    carried = lines.loc[keep].sort_values(
        ["series", "column", "cycle", "event_id"],
        ascending=[True, True, False, False],
        kind="stable",
    )
    series = carried["series"].to_numpy(dtype=np.int64)
    column = carried["column"].to_numpy(dtype=np.int64)
    forecast = portfolio.forecast[series, column] if len(carried) else np.empty(0)
    adjusted = carried["adjusted"].to_numpy(dtype=np.float64)
    original = carried["original"].to_numpy(dtype=np.float64)
    already = in_forecast(forecast, adjusted)
    out = carried.assign(
        forecast=forecast,
        ended=carried["status"].to_numpy(dtype=object) == ENDED,
        standing=False,
        in_forecast=already,
        forecast_changed=~already & ~in_forecast(forecast, original),
    ).reset_index(drop=True)
    out["standing"] = standing_lines(out)
    return out[list(CARRIED_LINE_COLUMNS)]


def standing_lines(lines: pd.DataFrame) -> np.ndarray:
    """Which carried lines stand: per series and period the first one not ended.

    ``lines`` is sorted as ``carried_adjustments`` sorts it (newest cycle, then event, first).
    """
    standing = np.zeros(len(lines), dtype=bool)
    alive = ~lines["ended"].to_numpy(dtype=bool)
    first = ~lines.loc[alive].duplicated(["series", "column"], keep="first").to_numpy(dtype=bool)
    standing[np.flatnonzero(alive)[first]] = True
    return standing


CARRIED_COLUMNS: tuple[str, ...] = (
    "series",
    schema.ITEM,
    schema.LOCATION,
    "cycle",
    "outcome",
    "root_cause",
    "reviewer",
    "note",
    "recorded_at",
    "reviewed_now",
)


def carried_over(
    portfolio: Portfolio,
    log: DecisionLog,
    worst: pd.DataFrame | Sequence[int] | np.ndarray,
) -> pd.DataFrame:
    """Handed-off and put-off series from earlier cycles that are still in the worst set.

    A series is carried over when its latest effective decision *before* the portfolio's cycle
    left it open (``OPEN_OUTCOMES``): a later ``no_change`` or adjustment closes it. The review
    list shows the ones not yet reviewed this cycle first among the unreviewed (see
    ``carried_first``).

    Args:
        portfolio: The current portfolio.
        log: The ledger's decisions (empty without a ledger: nothing is carried).
        worst: The worst-offender set, as a scorecard slice (its index = portfolio positions,
            e.g. ``leading_cover(card, 0.8)``) or as positions; its order is kept.

    Returns:
        ``CARRIED_COLUMNS``, one row per carried series in the order of ``worst``;
        ``reviewed_now`` tells whether it already has a decision in this cycle.
    """
    positions = np.asarray(
        worst.index if isinstance(worst, pd.DataFrame) else worst, dtype=np.int64
    )
    earlier = log.before(portfolio.cycle)
    if not earlier or not len(positions):
        return pd.DataFrame(columns=list(CARRIED_COLUMNS))
    frame = pd.DataFrame(
        {
            "cycle": [d.cycle for d in earlier],
            schema.ITEM: [d.item for d in earlier],
            schema.LOCATION: [d.location for d in earlier],
            "outcome": [d.outcome for d in earlier],
            "root_cause": [d.root_cause for d in earlier],
            "reviewer": [d.reviewer for d in earlier],
            "note": [d.note for d in earlier],
            "recorded_at": [d.recorded_at for d in earlier],
        }
    )
    latest = frame.sort_values("cycle", kind="stable").drop_duplicates(
        [schema.ITEM, schema.LOCATION], keep="last"
    )
    latest = latest.loc[latest["outcome"].isin(OPEN_OUTCOMES)]
    latest = latest.assign(
        series=series_positions(portfolio, latest[schema.ITEM], latest[schema.LOCATION])
    )
    rank = pd.Series(np.arange(len(positions)), index=positions)
    latest = latest.loc[latest["series"].isin(positions)]
    latest = latest.assign(order=rank.reindex(latest["series"]).to_numpy()).sort_values("order")
    now = {(d.item, d.location) for d in log.current(portfolio.cycle)}
    latest["reviewed_now"] = [
        (i, loc) in now for i, loc in zip(latest[schema.ITEM], latest[schema.LOCATION], strict=True)
    ]
    return latest[list(CARRIED_COLUMNS)].reset_index(drop=True)


def carried_first(order: np.ndarray, carried: np.ndarray | Sequence[int]) -> np.ndarray:
    """``order`` with the carried-over series moved to the front, both parts in their order."""
    order = np.asarray(order, dtype=np.int64)
    front = np.isin(order, np.asarray(carried, dtype=np.int64))
    return np.concatenate([order[front], order[~front]])


# --------------------------------------------------------------------------------------------
# Context for the cycle


def portfolio_fva(
    portfolio: Portfolio, *, window: int = WINDOW.default, season: int = SEASON.default
) -> dict[str, float]:
    """Portfolio forecast value added over the (seasonal) naive forecast in the scoring window.

    Over every window cell where demand D_t, forecast F_t and the naive forecast D_{t−m} exist
    (the cells ``metrics.naive_value_added`` averages per series; the scorecard's ``fva``):

    * ``naive_abs_error`` = Σ|D_t − D_{t−m}|, ``forecast_abs_error`` = Σ|F_t − D_t|;
    * ``value_added`` = their difference in units (positive = the forecast beat naive), which
      equals Σ over series of the scorecard's ``fva`` × that series' counted cells;
    * ``relative_error`` = forecast / naive absolute error (the relative absolute error that
      Morlidge calls the avoidability ratio; below 1 the forecast beats naive);
      ``value_added_share`` = value added / naive error = 1 − relative_error;
    * ``value_added_value`` the same difference weighted by price (NaN without prices);
    * ``cells``, ``series`` (series with a counted cell) and ``series_worse_than_naive``
      (series whose fva < 0).

    Ratios are NaN when the naive error is 0 (Gilliland 2010; docs/sources.md §3.1).
    """
    if season < 1:
        raise HistoryError(f"the season must be at least 1, not {season}.")
    cols = metrics.window_columns(portfolio.demand, portfolio.last_actual, window)
    lagged_cols = cols - season
    valid = lagged_cols >= 0
    d = portfolio.demand[:, cols]
    f = portfolio.forecast[:, cols]
    lagged = np.full(d.shape, np.nan)
    lagged[:, valid] = portfolio.demand[:, lagged_cols[valid]]
    naive_err = np.abs(d - lagged)
    fc_err = np.abs(f - d)
    ok = ~np.isnan(naive_err) & ~np.isnan(fc_err)
    naive_total = float(np.where(ok, naive_err, 0.0).sum())
    fc_total = float(np.where(ok, fc_err, 0.0).sum())
    gain = np.where(ok, naive_err - fc_err, 0.0)
    per_series = gain.sum(axis=1)
    counted = ok.sum(axis=1)
    value = math.nan
    if portfolio.price is not None:
        value = float((gain * np.where(ok, portfolio.price[:, cols], 0.0)).sum())
    ratio = fc_total / naive_total if naive_total > 0 else math.nan
    return {
        "value_added": naive_total - fc_total,
        "value_added_value": value,
        "naive_abs_error": naive_total,
        "forecast_abs_error": fc_total,
        "relative_error": ratio,
        "value_added_share": 1.0 - ratio if naive_total > 0 else math.nan,
        "cells": float(ok.sum()),
        "series": float((counted > 0).sum()),
        "series_worse_than_naive": float(((counted > 0) & (per_series < 0)).sum()),
        "season": float(season),
    }


@dataclass(frozen=True)
class Coverage:
    """How much of the cycle's error the reviewed series hold."""

    reviewed: int
    """Series of the portfolio settled in the cycle (no change needed, or adjusted)."""
    series: int
    """Series in the portfolio."""
    covered: float
    """Share of total ranking error (value where priced) held by the reviewed series."""
    target: float
    """Share the reviewer aims to cover."""
    worst: int
    """Series in the worst-offender set (leading set covering ``target``)."""
    worst_reviewed: int
    """Of those, how many are reviewed."""
    not_in_portfolio: int
    """Decisions of the cycle whose series is not in the portfolio."""
    handed_off: int = 0
    """Series handed to someone else this cycle (decided, not settled)."""
    deferred: int = 0
    """Series put off to a later cycle (decided, not settled)."""


def coverage(
    portfolio: Portfolio, log: DecisionLog, card: pd.DataFrame, target_share: float
) -> Coverage:
    """Review coverage of the portfolio's cycle (the review screens' progress figure).

    Args:
        portfolio: The portfolio.
        log: The ledger's decisions (empty without a ledger: nothing reviewed).
        card: Its scorecard (any order; index = portfolio positions).
        target_share: Share of total error the review aims to cover.
    """
    decided = log.current(portfolio.cycle)
    settled = [d for d in decided if d.outcome in SETTLED]
    pos = series_positions(portfolio, [d.item for d in settled], [d.location for d in settled])
    done = np.zeros(portfolio.n_series, dtype=bool)
    done[pos[pos >= 0]] = True
    everyone = series_positions(portfolio, [d.item for d in decided], [d.location for d in decided])
    aligned = card.sort_index()
    error = aligned["abs_error_value" if "abs_error_value" in aligned else "abs_error"].to_numpy()
    total = float(error.sum())
    worst_mask = worst_set(error, target_share)
    return Coverage(
        reviewed=int(done.sum()),
        series=portfolio.n_series,
        covered=float(error[done].sum()) / total if total > 0 else math.nan,
        target=target_share,
        worst=int(worst_mask.sum()),
        worst_reviewed=int((worst_mask & done).sum()),
        not_in_portfolio=int((everyone < 0).sum()),
        handed_off=sum(d.outcome == HANDED_OFF for d in decided),
        deferred=sum(d.outcome == DEFERRED for d in decided),
    )


def decision_counts(log: DecisionLog, cycle: str) -> pd.DataFrame:
    """Effective decisions of a cycle: outcomes (rows, ``OUTCOMES`` order) by root cause.

    Columns are the root-cause codes used, in the ledger's vocabulary order (codes no longer in
    it last, sorted), then ``total``; a last row ``total`` sums the columns.
    """
    decided = log.current(cycle)
    outcomes = [c.code for c in OUTCOMES]
    vocabulary = [c.code for c in log.root_causes]
    used = {d.root_cause for d in decided}
    causes = [c for c in vocabulary if c in used] + sorted(used - set(vocabulary))
    counts = pd.crosstab(
        pd.Series([d.outcome for d in decided], dtype=object, name="outcome"),
        pd.Series([d.root_cause for d in decided], dtype=object, name="root_cause"),
    )
    table = counts.reindex(index=outcomes, columns=causes, fill_value=0).astype(np.int64)
    table.index.name = "outcome"
    table.columns.name = None
    table["total"] = table.sum(axis=1)
    table.loc["total"] = table.sum(axis=0)
    return table.astype(np.int64)
