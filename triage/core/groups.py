"""Groups of series: the portfolio rolled up by attribute and/or location (``rank --group``).

A group is every series sharing the values of the grouping columns (an attribute column, the
``location`` key, or several of them). Its measures are of two kinds (docs/metrics.md, "Groups"):

* **series-level sums**: ``abs_error`` = Σ over the group's series of each series' Σ|e| over the
  window, what a series-by-series review would have to fix; ``demand``, ``forecast``, ``bias``
  and the value columns likewise. ``error_share`` is the group's share of the portfolio's
  series-level error (in value where priced), so group shares add up to the series' shares.
* **the group's total**: ``aggregate_abs_error`` = Σ over window periods of |Σ over the group's
  series of e|, the error of the group's total, where the series' over- and under-forecasts
  cancel. ``abs_error`` ≥ ``aggregate_abs_error`` (triangle inequality); a large gap means the
  series err in opposite directions (a mix problem), a small one that they err together (a level
  problem). ``bias_flag`` applies the series' persistent-bias rule (``metrics.persistent_bias``)
  to the total's errors per window period; a period counts when at least one series counts in it.

Sign: e = forecast − demand (``triage.core.metrics``); a cell counts when demand and forecast
are both present, as for series. Everything is vectorised over the whole portfolio: series are
mapped to integer group codes once and every sum is a ``np.bincount``.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from triage.core import metrics, schema
from triage.core.errors import TriageError
from triage.core.portfolio import Portfolio
from triage.core.ranking import (
    BY_BIAS,
    BY_ERROR,
    FLAG_TEXT,
    SeriesMeasures,
    as_slice,
    bias_ordering,
    descending_order,
)
from triage.core.ranking import error_shares as shares_of

#: Columns of the group scorecard after the grouping columns (value columns only when priced).
GROUP_COLUMNS = (
    "series",
    "demand",
    "forecast",
    "abs_error",
    "aggregate_abs_error",
    "bias",
    "bias_pct",
    "wape",
    "abs_error_value",
    "bias_value",
    "error_share",
    "cum_share",
    "rank",
    "bias_rank",
    "bias_flag",
    "flagged_series",
    "top_series",
)

#: Rows of series per block of the per-period sums.
_ROWS = 1 << 15


@dataclass(frozen=True)
class Grouping:
    """Which group each series belongs to.

    Attributes:
        by: The grouping columns, as given.
        codes: Group of each series (int64, portfolio order), 0 .. n_groups − 1.
        keys: One row per group, the grouping columns' values (text), ascending by key: group
            g is row g.
    """

    by: tuple[str, ...]
    codes: np.ndarray
    keys: pd.DataFrame

    @property
    def n_groups(self) -> int:
        """How many groups there are."""
        return len(self.keys)

    def members(self, group: int) -> np.ndarray:
        """Portfolio positions of the group's series, in portfolio order."""
        return np.flatnonzero(self.codes == group)


def parse_group_columns(
    portfolio: Portfolio, text: str, option: str = "--group"
) -> tuple[str, ...]:
    """``"family,location"`` -> the grouping columns, each one the portfolio has.

    Raises:
        TriageError: A name is empty, repeated, the item key, or not a column of the portfolio.
    """
    names = tuple(part.strip() for part in text.split(","))
    allowed = [c for c in portfolio.key_columns if c != schema.ITEM] + list(portfolio.attributes)
    listing = ", ".join(allowed) if allowed else "none: the file has no location or attributes"
    if any(not name for name in names):
        raise TriageError(
            f"{option} {text!r}: an empty column name.",
            hint=f"Give column names separated by commas, e.g. {option} family,location.",
        )
    for name in names:
        if name == schema.ITEM:
            raise TriageError(
                f"{option}: grouping by {schema.ITEM} gives one series per group.",
                hint=f"Group by an attribute or by location ({listing}), or rank without {option}.",
            )
        if name not in allowed:
            raise TriageError(
                f"{option}: {portfolio.path} has no column {name!r} to group by.",
                hint=f"Columns to group by: {listing}.",
            )
    if len(set(names)) != len(names):
        raise TriageError(f"{option} {text!r}: a column is named twice.")
    return names


#: A key or attribute column of the series ``order`` as a ``str`` array
#: (``Portfolio.text_column``, ``SeriesMeasures.text``).
TextColumn = Callable[[str, np.ndarray], pd.api.extensions.ExtensionArray]


def grouping(portfolio: Portfolio, by: Sequence[str]) -> Grouping:
    """Map every series to its group; groups ordered by their key values, ascending.

    Args:
        portfolio: The portfolio.
        by: Grouping columns (``parse_group_columns``).
    """
    return grouping_of(portfolio.text_column, portfolio.n_series, by)


def grouping_of(text: TextColumn, n_series: int, by: Sequence[str]) -> Grouping:
    """:func:`grouping` of ``n_series`` series whose columns ``text`` gives (a dataset scored
    on the Dask engine: ``SeriesMeasures.text``)."""
    if not by:
        raise ValueError("group by at least one column")
    codes = np.zeros(n_series, dtype=np.int64)
    count = 1
    every = np.arange(n_series)
    for name in by:
        column_codes, values = pd.factorize(text(name, every), sort=True)
        # Renumbered after each column, so codes stay below n_series (no overflow) and stay
        # ascending by the key values so far (each column sorted, the first most significant).
        codes, count = _renumber(codes * len(values) + column_codes, count * len(values))
    first = _first_of_each(codes, count)
    frame = pd.DataFrame({name: text(name, first) for name in by}, index=pd.RangeIndex(len(first)))
    return Grouping(by=tuple(by), codes=codes, keys=frame)


def _renumber(codes: np.ndarray, bound: int) -> tuple[np.ndarray, int]:
    """Codes 0 .. k − 1 for the distinct values of ``codes`` (all below ``bound``), in their
    order; a table lookup (no sort) while ``bound`` is not far above the number of rows."""
    if bound <= 4 * max(len(codes), 1):
        present = np.bincount(codes, minlength=bound) > 0
        relabel = np.cumsum(present) - 1
        return relabel[codes].astype(np.int64), int(present.sum())
    values, inverse = np.unique(codes, return_inverse=True)
    return inverse.astype(np.int64).reshape(-1), len(values)


def _first_of_each(codes: np.ndarray, count: int) -> np.ndarray:
    """Position of the first row of each code 0 .. count − 1."""
    first = np.full(count, len(codes), dtype=np.int64)
    np.minimum.at(first, codes, np.arange(len(codes), dtype=np.int64))
    return first


def group_scorecard(
    portfolio: Portfolio,
    card: pd.DataFrame,
    cols: np.ndarray,
    groups: Grouping,
    *,
    by: str = BY_ERROR,
) -> pd.DataFrame:
    """One row per group, in review order (largest share of error first, or bias order).

    Args:
        portfolio: The scored portfolio.
        card: Its scorecard (``ranking.scorecard``; any row order: aligned by its index).
        cols: The window's calendar columns (``metrics.window_columns``).
        groups: The grouping (``grouping``).
        by: ``"error"`` or ``"bias"`` (persistently biased groups first, then by |bias|, in
            value where priced; ties by key).

    Returns:
        The grouping columns, then ``GROUP_COLUMNS`` (``abs_error_value``/``bias_value`` only
        when priced); fractions, NaN where undefined. The index is the group number.
    """
    period_error, period_counted = _period_totals(
        _cell_errors(portfolio, cols), len(cols), groups.codes, groups.n_groups
    )
    return _group_table(
        card, period_error, period_counted, groups, portfolio.key_columns, portfolio.text_column, by
    )


def group_scorecard_of(
    measures: SeriesMeasures, card: pd.DataFrame, groups: Grouping, *, by: str = BY_ERROR
) -> pd.DataFrame:
    """:func:`group_scorecard` of series measured apart from their portfolio (a dataset scored
    on the Dask engine), from each series' errors per window period
    (``SeriesMeasures.window_errors``). The sums per period are taken over the same blocks of
    series in the same order as from a portfolio, so they are the same numbers."""
    errors = measures.window_errors
    if errors is None:
        raise ValueError("the measures were taken without their window errors")

    def cells(rows: slice) -> tuple[np.ndarray, np.ndarray]:
        block = np.ascontiguousarray(errors[rows].T)
        both = ~np.isnan(block)
        return np.where(both, block, 0.0), both

    period_error, period_counted = _period_totals(
        cells, errors.shape[1], groups.codes, groups.n_groups
    )
    return _group_table(
        card, period_error, period_counted, groups, measures.key_columns, measures.text, by
    )


def _group_table(
    card: pd.DataFrame,
    period_error: np.ndarray,
    period_counted: np.ndarray,
    groups: Grouping,
    key_columns: tuple[str, ...],
    text: TextColumn,
    by: str,
) -> pd.DataFrame:
    if by not in (BY_ERROR, BY_BIAS):
        raise ValueError(f"by must be {BY_ERROR!r} or {BY_BIAS!r}")
    n_groups = groups.n_groups
    codes = groups.codes
    aligned = card if card.index.is_monotonic_increasing else card.sort_index()
    priced = "abs_error_value" in aligned

    def total(column: str | np.ndarray) -> np.ndarray:
        values = aligned[column].to_numpy(dtype=np.float64) if isinstance(column, str) else column
        summed: np.ndarray = np.bincount(codes, weights=values, minlength=n_groups)
        return summed

    series = np.bincount(codes, minlength=n_groups).astype(np.int64)
    demand = total("demand")
    abs_error = total("abs_error")
    bias = total("bias")
    data: dict[str, object] = {name: groups.keys[name].array for name in groups.by}
    data.update(
        series=series,
        demand=demand,
        forecast=total("forecast"),
        abs_error=abs_error,
    )
    data["aggregate_abs_error"] = np.abs(period_error).sum(axis=1)
    data["bias"] = bias
    data["bias_pct"] = metrics._ratio(bias, demand)
    data["wape"] = metrics._ratio(abs_error, demand)
    if priced:
        error = total("abs_error_value")
        bias_value = total("bias_value")
        data.update(abs_error_value=error, bias_value=bias_value)
        bias_size = np.abs(bias_value)
    else:
        error = abs_error
        bias_size = np.abs(bias)
    error_order = descending_order(error)
    rank = np.empty(n_groups, dtype=np.int64)
    rank[error_order] = np.arange(1, n_groups + 1)
    share, cum = shares_of(error, error_order)
    flag = metrics.persistent_bias(
        ((period_error > 0) & period_counted).sum(axis=1),
        ((period_error != 0) & period_counted).sum(axis=1),
        metrics.latest_run(period_error, period_counted),
        bias,
        demand,
    )
    bias_order = bias_ordering(flag, bias_size)
    bias_rank = np.empty(n_groups, dtype=np.int64)
    bias_rank[bias_order] = np.arange(1, n_groups + 1)
    series_flagged = (aligned["bias_flag"] != "").to_numpy(dtype=bool)
    data.update(
        error_share=share,
        cum_share=cum,
        rank=rank,
        bias_rank=bias_rank,
        bias_flag=np.array([FLAG_TEXT[int(f)] for f in (-1, 0, 1)], dtype=object)[flag + 1],
        flagged_series=np.bincount(codes, weights=series_flagged, minlength=n_groups).astype(
            np.int64
        ),
        top_series=_top_series(key_columns, text, codes, n_groups, aligned, priced),
    )
    frame = pd.DataFrame(data)
    for name in ("bias_flag", "top_series"):
        frame[name] = frame[name].astype(pd.StringDtype("pyarrow", na_value=np.nan))
    order = error_order if by == BY_ERROR else bias_order
    return frame.iloc[order]


def column_total(values: np.ndarray) -> np.ndarray:
    """Σ over rows per column, a missing value counted as 0; NaN where every row is missing
    (a group's total of one period: the series it has values for)."""
    present = ~np.isnan(values)
    summed = np.where(present, values, 0.0).sum(axis=0)
    total: np.ndarray = np.where(present.any(axis=0), summed, np.nan)
    return total


def _cell_errors(
    portfolio: Portfolio, cols: np.ndarray
) -> Callable[[slice], tuple[np.ndarray, np.ndarray]]:
    """For a block of series: e per window period and series (periods x series, 0 where the
    cell does not count), and whether it counts (demand and forecast both present)."""
    picked = as_slice(cols)  # adjacent columns: views, no copies

    def cells(rows: slice) -> tuple[np.ndarray, np.ndarray]:
        # Periods x series, one contiguous row per period: one bincount per period.
        d = np.ascontiguousarray(portfolio.demand[rows, picked].T)
        f = np.ascontiguousarray(portfolio.forecast[rows, picked].T)
        both = ~(np.isnan(d) | np.isnan(f))
        return np.where(both, f - d, 0.0), both

    return cells


def window_errors(portfolio: Portfolio, cols: np.ndarray) -> np.ndarray:
    """Each series' e per window period (series x periods), NaN where the cell does not count:
    what :func:`group_scorecard_of` sums, taken where the series are scored."""
    cells = _cell_errors(portfolio, cols)(slice(None))
    e, both = cells
    return np.where(both, e, np.nan).T.copy()


def _period_totals(
    cells: Callable[[slice], tuple[np.ndarray, np.ndarray]],
    width: int,
    codes: np.ndarray,
    n_groups: int,
) -> tuple[np.ndarray, np.ndarray]:
    """Σ over each group's series of e per window period (groups x ``width`` periods), and
    whether at least one series counts in that period; ``cells`` gives the errors of a block of
    series (``codes``: each series' group)."""
    error = np.zeros((n_groups, width))
    counted = np.zeros((n_groups, width))
    for lo in range(0, len(codes), _ROWS):
        rows = slice(lo, lo + _ROWS)
        block = codes[rows]
        e, both = cells(rows)
        for j in range(width):
            error[:, j] += np.bincount(block, weights=e[j], minlength=n_groups)
            counted[:, j] += np.bincount(block, weights=both[j], minlength=n_groups)
    return error, counted > 0


def _top_series(
    key_columns: tuple[str, ...],
    text: TextColumn,
    codes: np.ndarray,
    n_groups: int,
    aligned: pd.DataFrame,
    priced: bool,
) -> np.ndarray:
    """Key of each group's largest contributor (``item`` or ``item @ location``); ties go to
    the first series in portfolio order."""
    error = np.nan_to_num(
        aligned["abs_error_value" if priced else "abs_error"].to_numpy(dtype=np.float64),
        nan=-np.inf,
    )
    # Each group's largest error, then the first series (in portfolio order) that has it.
    largest = np.full(n_groups, -np.inf)
    np.maximum.at(largest, codes, error)
    first = _first_of_each(codes, n_groups)
    hit = np.flatnonzero(error == largest[codes])
    at = np.full(n_groups, len(codes), dtype=np.int64)
    np.minimum.at(at, codes[hit], hit)
    first = np.where(at < len(codes), at, first)
    items = np.asarray(text(schema.ITEM, first), dtype=object)
    if schema.LOCATION in key_columns:
        locations = np.asarray(text(schema.LOCATION, first), dtype=object)
        labels = [f"{i} @ {loc}" for i, loc in zip(items, locations, strict=True)]
    else:
        labels = [str(i) for i in items]
    out = np.empty(n_groups, dtype=object)
    out[codes[first]] = labels
    return out
