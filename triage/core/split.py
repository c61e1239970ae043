"""A group's adjustment split to its series (top-down, in the group's forward periods).

An adjustment on a group is written in the series syntax (``triage.core.adjust``) and applied to
the group's *total* forward forecast, Σ over its series per period (a missing value counted as
0). The adjusted total is then split to the series, period by period:

* **Proportions of forecasts** (the default; Gross & Sohl 1990, "Disaggregation methods to
  expedite product line forecasting", *Journal of Forecasting* 9(3), journal details from
  memory): each series gets the share its own forward forecast has of the total in that period.
  A relative operation (``x0.9``, ``+10%``, ``bias``) therefore changes every series alike: the
  adjusted total is the total times the factor, and each series' share of it is its forecast
  times the factor. An absolute one (``=1200``, ``+40``, ``mean 8``, values) is split in the
  proportions of the forecasts.
* **Fallback**: in a period where the series' forward forecasts sum to zero (all zero or
  missing), nothing says how to split, so the series share by their history average (mean
  actual demand over the history, missing actuals left out); where those are all zero too, in
  equal parts.
* **Proportions of history** (``basis=HISTORY``, the alternative of the same paper): absolute
  operations are split by history averages in every period (a relative one still scales every
  series alike: it is a change *of* the forecasts).
* ``use NAME`` is not split: each series takes its own forward values of the other forecast
  (where that is missing, its original stays), and the group's adjusted total is their sum.

The split is exact at the export's precision (``triage.core.rounding``, ``decimals``): the
adjusted total is rounded first (half away from zero), then each series gets the whole steps
(units of 10^-decimals) below its exact share, and the steps left over go one each to the series
with the largest remainders (Hamilton's largest-remainder method; ties to the earlier series in
the group's order), so the series' values sum to the rounded total exactly. Values are never
negative (the adjusted total is not: ``adjust.apply`` clips at 0). A series whose forward
forecast is missing in a period and whose share there is zero keeps the missing value.

Everything runs on whole (series x periods) arrays; no loop over series.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from triage.core import adjust
from triage.core.errors import TriageError
from triage.core.groups import column_total as _total
from triage.core.rounding import round_half_away

#: Absolute operations split by proportions of the series' forward forecasts (the default).
FORECASTS = "forecasts"
#: Absolute operations split by proportions of the series' history averages.
HISTORY = "history"
BASES = (FORECASTS, HISTORY)

#: Operations that change every series alike: the same factor on each series' forecast.
RELATIVE = (adjust.PERCENT, adjust.MULTIPLY, adjust.BIAS)


@dataclass(frozen=True, eq=False)
class GroupSplit:
    """What a group adjustment does, to the total and to each series.

    Attributes:
        total: The adjustment applied to the group's total forward forecast (its description
            is the preview's first line).
        original: Series x forward periods before (NaN where missing; read-only).
        adjusted: Series x forward periods after; equal to ``original`` outside the range,
            the split inside it (read-only).
        shares: Series x forward periods: each series' share of the adjusted total in the range
            (0 outside it).
        fallback: Forward periods (in the range) split by history averages or equally because
            the forecasts summed to zero.
        decimals: Precision of the split values (the export's).
    """

    total: adjust.AdjustResult
    original: np.ndarray
    adjusted: np.ndarray
    shares: np.ndarray
    fallback: np.ndarray
    decimals: int

    @property
    def delta_units(self) -> np.ndarray:
        """Per series: Σ adjusted − Σ original over the range (missing counted as 0)."""
        change = adjust.units_change(self.original, self.adjusted)
        total: np.ndarray = change.sum(axis=1)
        return total

    def largest_changes(self, count: int = 5) -> np.ndarray:
        """Positions (rows) of the ``count`` series changed most in units, largest first."""
        size = np.abs(self.delta_units)
        return np.argsort(-size, kind="stable")[:count]


def history_average(actuals: ArrayLike) -> np.ndarray:
    """Mean actual demand of each series (rows) over the given periods, missing left out; 0
    when a series has no actual (it then takes no share unless all are 0)."""
    values = np.asarray(actuals, dtype=np.float64)
    present = ~np.isnan(values)
    count = present.sum(axis=1)
    total = np.where(present, values, 0.0).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(count > 0, total / np.maximum(count, 1), 0.0)
    return np.maximum(mean, 0.0)


def split_shares(
    forward: np.ndarray, history: np.ndarray, *, basis: str = FORECASTS
) -> tuple[np.ndarray, np.ndarray]:
    """Each series' share of the total in each forward period, and the periods that fell back.

    Args:
        forward: Series x periods forward forecast (NaN missing; negatives count as 0).
        history: Per series history average (``history_average``).
        basis: ``FORECASTS`` (fall back to history where the forecasts sum to 0) or
            ``HISTORY``.

    Returns:
        Shares (series x periods, each column sums to 1) and a per-period flag of the columns
        not split by forecasts.
    """
    if basis not in BASES:
        raise ValueError(f"basis must be one of {BASES}")
    k, h = forward.shape
    base = np.maximum(np.nan_to_num(forward, nan=0.0), 0.0)
    weights = np.maximum(np.nan_to_num(history, nan=0.0), 0.0)
    past = weights / weights.sum() if weights.sum() > 0 else np.full(k, 1.0 / max(k, 1))
    column = base.sum(axis=0)
    use_forecast = column > 0 if basis == FORECASTS else np.zeros(h, dtype=bool)
    with np.errstate(invalid="ignore", divide="ignore"):
        by_forecast = base / np.where(column > 0, column, 1.0)
    shares = np.where(use_forecast, by_forecast, past[:, None])
    return shares, ~use_forecast


def apportion(total: np.ndarray, shares: np.ndarray, decimals: int) -> np.ndarray:
    """Split each period's total by ``shares`` into values at ``decimals`` that sum exactly to
    the total rounded to ``decimals`` (largest remainder; ties to the earlier row).

    Args:
        total: Per-period totals, >= 0 (NaN: nothing to split, the column stays NaN).
        shares: Rows x periods, each column summing to 1.
        decimals: Precision of the values.
    """
    scale = 10.0**decimals
    rounded = round_half_away(total, decimals)
    known = np.isfinite(rounded)
    steps = np.rint(np.where(known, rounded, 0.0) * scale)
    exact = shares * steps
    whole = np.floor(exact)
    remainder = exact - whole
    # Σ whole <= Σ exact = steps (shares sum to 1), and Σ remainder < rows: 0 <= left <= rows.
    left = np.rint(steps - whole.sum(axis=0)).astype(np.int64)
    # Rank the rows of each column by remainder, largest first (stable: earlier rows win ties).
    order = np.argsort(-remainder, axis=0, kind="stable")
    position = np.empty_like(order)
    np.put_along_axis(position, order, np.arange(shares.shape[0])[:, None], axis=0)
    whole += position < left[None, :]
    out: np.ndarray = whole / scale
    out[:, ~known] = np.nan
    return out


def split(
    adj: adjust.Adjustment,
    forward: ArrayLike,
    *,
    recent_actuals: ArrayLike,
    window_demand: ArrayLike,
    window_forecast: ArrayLike,
    decimals: int,
    basis: str = FORECASTS,
    price: ArrayLike | None = None,
    alternatives: Mapping[str, ArrayLike] | None = None,
) -> GroupSplit:
    """Apply ``adj`` to the group's total forward forecast and split it to the series.

    Args:
        adj: The adjustment (``adjust.parse``).
        forward: Series x forward periods, NaN where missing.
        recent_actuals: Series x history periods of actual demand (``mean K`` averages the
            group's total; the history averages of the fallback come from it too).
        window_demand: Series x window periods of demand (``bias`` uses the group's sums).
        window_forecast: Series x window periods of forecast.
        decimals: Precision of the split values (the export's: ``rounding.decimals_for``).
        basis: How absolute operations are split (``FORECASTS`` or ``HISTORY``).
        price: Series x forward periods of unit value, for the value of the change.
        alternatives: The series' other forecasts of the forward periods by name (series x
            forward periods each), for ``use NAME``.

    Raises:
        AdjustError: As ``adjust.apply`` for the total (a range beyond the horizon, ...).
        TriageError: An operation that has no group meaning.
    """
    original = np.array(forward, dtype=np.float64, ndmin=2)
    if original.shape[0] == 0:
        raise TriageError("the group has no series")
    actuals = np.array(recent_actuals, dtype=np.float64, ndmin=2)
    total_forward = _total(original)
    demand = np.asarray(window_demand, dtype=np.float64)
    forecast = np.asarray(window_forecast, dtype=np.float64)
    both = ~(np.isnan(demand) | np.isnan(forecast))
    prices = None if price is None else np.array(price, dtype=np.float64, ndmin=2)
    others = {
        name: np.array(values, dtype=np.float64, ndmin=2)
        for name, values in (alternatives or {}).items()
    }

    def on_total(totals: Mapping[str, np.ndarray]) -> adjust.AdjustResult:
        return adjust.apply(
            adj,
            total_forward,
            recent_actuals=_total(actuals),
            window_demand=float(np.where(both, demand, 0.0).sum()),
            window_forecast=float(np.where(both, forecast, 0.0).sum()),
            price=None if prices is None else _group_price(original, prices),
            alternatives=totals,
        )

    # Applied to the total first: the range, the name and the operation are checked there.
    total = on_total({name: _total(values) for name, values in others.items()})
    lo, hi = total.first - 1, total.last
    if adj.op == adjust.USE:
        return _use(adj, original, others[adj.source], (lo, hi), on_total, decimals)
    history = history_average(actuals)
    how = FORECASTS if adj.op in RELATIVE else basis
    shares, fallback = split_shares(original[:, lo:hi], history, basis=how)
    adjusted = original.copy()
    parts = apportion(np.asarray(total.adjusted[lo:hi]), shares, decimals)
    keep_missing = np.isnan(original[:, lo:hi]) & (shares == 0)
    adjusted[:, lo:hi] = np.where(keep_missing, np.nan, parts)
    all_shares = np.zeros_like(original)
    all_shares[:, lo:hi] = shares
    flags = np.zeros(original.shape[1], dtype=bool)
    flags[lo:hi] = fallback
    adjusted.setflags(write=False)
    original.setflags(write=False)
    return GroupSplit(
        total=total,
        original=original,
        adjusted=adjusted,
        shares=all_shares,
        fallback=flags,
        decimals=decimals,
    )


def _use(
    adj: adjust.Adjustment,
    original: np.ndarray,
    other: np.ndarray,
    span: tuple[int, int],
    on_total: Callable[[Mapping[str, np.ndarray]], adjust.AdjustResult],
    decimals: int,
) -> GroupSplit:
    """``use NAME`` on a group: each series takes its own values of the other forecast (its
    original where that is missing, 0 for a negative value); the total is their sum."""
    lo, hi = span
    adjusted = original.copy()
    part = other[:, lo:hi]
    adjusted[:, lo:hi] = np.where(np.isnan(part), original[:, lo:hi], np.maximum(part, 0.0))
    whole = np.where(np.isnan(other), original, other)
    whole[:, lo:hi] = adjusted[:, lo:hi]
    total = on_total({adj.source: _total(whole)})
    column = np.nan_to_num(adjusted[:, lo:hi], nan=0.0)
    sums = column.sum(axis=0)
    shares = np.zeros_like(original)
    with np.errstate(invalid="ignore", divide="ignore"):
        shares[:, lo:hi] = np.where(sums > 0, column / np.where(sums > 0, sums, 1.0), 0.0)
    adjusted.setflags(write=False)
    original.setflags(write=False)
    return GroupSplit(
        total=total,
        original=original,
        adjusted=adjusted,
        shares=shares,
        fallback=np.zeros(original.shape[1], dtype=bool),
        decimals=decimals,
    )


def _group_price(forward: np.ndarray, price: np.ndarray) -> np.ndarray:
    """The group's unit value per period: the forecast-weighted mean of its series' prices (a
    change of the total valued at the mix of the forecast), their plain mean where the
    forecasts sum to zero."""
    base = np.maximum(np.nan_to_num(forward, nan=0.0), 0.0)
    priced = np.isfinite(price)
    weight = np.where(priced, base, 0.0)
    total = weight.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        weighted = np.where(priced, price * base, 0.0).sum(axis=0) / total
        plain = np.where(priced, price, 0.0).sum(axis=0) / priced.sum(axis=0)
    mixed: np.ndarray = np.where(total > 0, weighted, plain)
    return mixed
