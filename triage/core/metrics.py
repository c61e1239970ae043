"""Vectorised accuracy and bias measures over a whole portfolio at once.

Sign convention, stated once for the whole project::

    e_t = forecast_t - demand_t      (positive = over-forecast, negative = under-forecast)

Planners read a positive error as "too much stock". Libraries that use actual minus forecast
(Hyndman & Koehler 2006; statsmodels ``bias(x1, x2)`` with the actual first) give the opposite
sign; negate at that boundary, never here. Absolute and squared measures do not depend on it.

Every function takes dense ``series x periods`` float64 arrays with NaN for a missing value. A
period counts for a series only where both demand and forecast are present; missing is never
zero. Nothing here loops over series in Python: loops, where any, run over period columns.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from triage.core.portfolio import ColumnSpan
from triage.core.settings import SEASON

#: Sign-test significance below which a series' bias counts as persistent.
BIAS_ALPHA = 0.05
#: Consecutive same-sign latest errors that count as persistent bias on their own.
#: Under unbiased independent errors the chance is 2 * 0.5**6 = 3.1% (docs/metrics.md).
BIAS_RUN = 6
#: Smallest |Σe| / Σdemand a persistent bias must reach: below it the bias is immaterial, and
#: on intermittent series many small over-forecasts against zero demand would trip the sign test.
BIAS_MATERIAL = 0.05
#: ADI and CV² cut-offs of Syntetos, Boylan & Croston (2005), non-smooth side inclusive.
ADI_CUTOFF = 1.32
CV2_CUTOFF = 0.49

PATTERNS = ("smooth", "erratic", "intermittent", "lumpy", "none")

#: Cells per block when a measure scans the whole history: temporaries of a few MB, reused from
#: block to block and warm in cache, instead of full-size arrays.
HISTORY_CELLS = 1 << 18
#: Cells per block for the window measures (rows = this / window length): a few hundred KB per
#: temporary, reused from block to block instead of one full-size array each.
WINDOW_CELLS = 1 << 16


def _row_blocks(n_rows: int, n_cols: int, cells: int = WINDOW_CELLS) -> Iterator[slice]:
    """Consecutive row slices of about ``cells`` cells each (at least 256 rows)."""
    step = max(256, cells // max(n_cols, 1))
    for lo in range(0, n_rows, step):
        yield slice(lo, lo + step)


@dataclass(frozen=True)
class WindowMeasures:
    """Per-series measures over the scoring window (arrays of length n_series).

    Undefined values are NaN: every ratio whose denominator is zero or negative, and every mean
    over no counted period.
    """

    periods: np.ndarray
    """Window periods where both demand and forecast are present (int64)."""
    demand: np.ndarray
    """Σ demand over the counted periods."""
    forecast: np.ndarray
    """Σ forecast over the counted periods."""
    abs_error: np.ndarray
    """Σ |e|."""
    bias: np.ndarray
    """Σ e (positive = over-forecast)."""
    sq_error: np.ndarray
    """Σ e²."""
    positive: np.ndarray
    """Counted periods with e > 0 (int64)."""
    nonzero: np.ndarray
    """Counted periods with e != 0 (int64)."""
    bias_run: np.ndarray
    """Signed length of the latest run of same-sign errors (int64): + over, − under, 0 if e = 0."""
    abs_error_value: np.ndarray | None
    """Σ |e|·price, None without prices."""
    bias_value: np.ndarray | None
    """Σ e·price, None without prices."""

    @property
    def mae(self) -> np.ndarray:
        """Mean absolute error, Σ|e| / n (MAD in operations texts)."""
        return _ratio(self.abs_error, self.periods.astype(np.float64))

    @property
    def rmse(self) -> np.ndarray:
        """Root mean squared error, √(Σe² / n)."""
        root: np.ndarray = np.sqrt(_ratio(self.sq_error, self.periods.astype(np.float64)))
        return root

    @property
    def bias_pct(self) -> np.ndarray:
        """Σe / Σdemand: bias as a fraction of demand; NaN when Σdemand <= 0."""
        return _ratio(self.bias, self.demand)

    @property
    def wape(self) -> np.ndarray:
        """Σ|e| / Σdemand (the MAD/mean ratio); NaN when Σdemand <= 0."""
        return _ratio(self.abs_error, self.demand)

    @property
    def tracking_signal(self) -> np.ndarray:
        """Brown's tracking signal over the window, Σe / MAE; NaN when MAE = 0.

        Bounded by ±n (|Σe| <= Σ|e|). With the opposite sign convention the textbook tables
        read the same numbers negated.
        """
        return _ratio(self.bias, self.mae)

    @property
    def bias_pvalue(self) -> np.ndarray:
        """Two-sided exact sign test (binomial, p = 0.5) of positive among non-zero errors."""
        return sign_test_pvalue(self.positive, self.nonzero)

    @property
    def bias_flag(self) -> np.ndarray:
        """Persistent bias: +1 over, −1 under, 0 none (int8).

        Flagged when the sign test gives p <= ``BIAS_ALPHA`` (direction: the majority sign) or
        the latest ``BIAS_RUN`` or more errors share one sign (direction: that sign), and the
        window bias Σe points the same way and is material (see ``persistent_bias``).
        """
        return persistent_bias(self.positive, self.nonzero, self.bias_run, self.bias, self.demand)


def window_columns(demand: np.ndarray, last_actual: int, window: int) -> np.ndarray:
    """The ``window`` latest calendar columns up to ``last_actual`` that hold any actual demand.

    A demand read for scoring only (a :class:`~triage.core.portfolio.ColumnSpan` ending at the
    latest actual) is searched over its columns: the latest columns with actuals of the whole
    matrix are those of any span that ends at ``last_actual`` and holds enough of them.

    Raises:
        IndexError: The span holds fewer than ``window`` such columns and the file had actual
            demand before it: the window reaches into columns that were not read.
    """
    if window < 1:
        raise ValueError("window must be at least 1")
    start = demand.start if isinstance(demand, ColumnSpan) else 0
    history = demand[:, start : last_actual + 1]
    has_actual = np.zeros(history.shape[1], dtype=bool)
    for rows in _row_blocks(*history.shape):
        has_actual |= ~np.isnan(history[rows]).all(axis=0)
        if has_actual.all():
            break
    found = np.flatnonzero(has_actual)[-window:] + start
    if len(found) < window and isinstance(demand, ColumnSpan) and demand.values_before:
        raise IndexError(
            f"a window of {window} periods reaches before column {start}, the first one read "
            "(the file was read for scoring a shorter window)"
        )
    return found


def window_measures(
    demand: np.ndarray, forecast: np.ndarray, price: np.ndarray | None = None
) -> WindowMeasures:
    """Sums, counts and the bias run over window columns (already sliced, chronological).

    Args:
        demand: Actual demand, series x window periods, NaN where missing.
        forecast: Forecast for the same cells, NaN where missing.
        price: Unit value for the same cells, or None.
    """
    n, width = demand.shape
    out = {
        name: np.empty(n, dtype=np.int64 if name in _COUNTS else np.float64)
        for name in _FIELDS
        if price is not None or name not in ("abs_error_value", "bias_value")
    }
    # Row blocks, transposed to periods x series: every temporary is a few hundred KB and the
    # sums over periods become additions of whole contiguous rows (a short reduction along
    # each series' 13 cells is many times slower).
    for rows in _row_blocks(n, width):
        d = np.ascontiguousarray(demand[rows].T)
        f = np.ascontiguousarray(forecast[rows].T)
        both = ~(np.isnan(d) | np.isnan(f))
        error = np.where(both, f - d, 0.0)
        abs_error = np.abs(error)
        if price is not None:
            safe_price = np.where(both, price[rows].T, 0.0)
            out["abs_error_value"][rows] = (abs_error * safe_price).sum(axis=0)
            out["bias_value"][rows] = (error * safe_price).sum(axis=0)
        out["periods"][rows] = both.sum(axis=0)
        out["demand"][rows] = np.where(both, d, 0.0).sum(axis=0)
        out["forecast"][rows] = np.where(both, f, 0.0).sum(axis=0)
        out["abs_error"][rows] = abs_error.sum(axis=0)
        out["bias"][rows] = error.sum(axis=0)
        out["sq_error"][rows] = (error * error).sum(axis=0)
        out["positive"][rows] = (error > 0).sum(axis=0)
        out["nonzero"][rows] = (error != 0).sum(axis=0)
        out["bias_run"][rows] = _latest_run_by_period(error, both)
    return WindowMeasures(
        periods=out["periods"],
        demand=out["demand"],
        forecast=out["forecast"],
        abs_error=out["abs_error"],
        bias=out["bias"],
        sq_error=out["sq_error"],
        positive=out["positive"],
        nonzero=out["nonzero"],
        bias_run=out["bias_run"],
        abs_error_value=out.get("abs_error_value"),
        bias_value=out.get("bias_value"),
    )


_COUNTS = ("periods", "positive", "nonzero", "bias_run")
_FIELDS = (
    "periods",
    "demand",
    "forecast",
    "abs_error",
    "bias",
    "sq_error",
    "positive",
    "nonzero",
    "bias_run",
    "abs_error_value",
    "bias_value",
)


def latest_run(error: np.ndarray, counted: np.ndarray) -> np.ndarray:
    """Signed count of consecutive latest counted errors sharing the strict sign of the latest.

    Missing periods are skipped, not run-breaking: they are not errors. The result is 0 when the
    latest counted error is exactly 0 or nothing is counted.
    """
    return _latest_run_by_period(
        np.ascontiguousarray(error.T), np.ascontiguousarray(np.asarray(counted, dtype=bool).T)
    )


def _latest_run_by_period(error: np.ndarray, counted: np.ndarray) -> np.ndarray:
    """:func:`latest_run` of periods x series arrays (one contiguous row per period).

    Plain boolean and integer arithmetic on whole rows, no masked assignment: before a series'
    latest counted error is met, its sign, run and length are all zero, so adding the values at
    the start is the same as setting them.
    """
    n_series = error.shape[1]
    latest = np.zeros(n_series, dtype=np.int64)
    seen = np.zeros(n_series, dtype=bool)
    open_run = np.zeros(n_series, dtype=bool)
    length = np.zeros(n_series, dtype=np.int64)
    sign = np.sign(error).astype(np.int64)
    for period in range(error.shape[0] - 1, -1, -1):
        here = counted[period]
        now = sign[period]
        start = here & ~seen
        latest += start * now
        begins = start & (now != 0)
        open_run |= begins
        length += begins
        seen |= here
        go_on = here & ~start & open_run
        same = go_on & (now == latest)
        length += same
        open_run &= ~(go_on & ~same)
    return length * latest


@lru_cache(maxsize=8)
def _sign_table(n_max: int) -> np.ndarray:
    """p[k, n] of the two-sided exact binomial test with p = 0.5, for 0 <= k <= n <= n_max.

    For a symmetric null the two-sided p-value is twice the smaller tail, capped at 1. The tails
    are sums of binomial coefficients in exact integer arithmetic, divided by 2**n once (a
    correctly rounded division); scipy's ``binomtest`` agrees (checked in tests).
    """
    table = np.ones((n_max + 1, n_max + 1))
    for n in range(1, n_max + 1):
        total = 1 << n
        coefficient, lower = 1, 0
        for k in range(n + 1):
            # lower = Σ_{i<=k} C(n, i); upper = Σ_{i>=k} C(n, i) = 2**n - lower + C(n, k).
            lower += coefficient
            upper = total - lower + coefficient
            table[k, n] = min(1.0, 2 * min(lower, upper) / total)
            coefficient = coefficient * (n - k) // (k + 1)
    return table


def sign_test_pvalue(positive: np.ndarray, nonzero: np.ndarray) -> np.ndarray:
    """Two-sided exact sign test p-values; 1.0 when there is no non-zero error."""
    n_max = int(nonzero.max()) if nonzero.size else 0
    table = _sign_table(max(n_max, 1))
    pvalues: np.ndarray = table[positive, nonzero]
    return pvalues


def persistent_bias(
    positive: np.ndarray,
    nonzero: np.ndarray,
    run: np.ndarray,
    bias: np.ndarray,
    demand: np.ndarray,
) -> np.ndarray:
    """+1 / −1 / 0 persistent-bias flag.

    Direction: the majority sign when the two-sided sign test gives p <= ``BIAS_ALPHA``, else the
    run's sign when the latest ``BIAS_RUN`` or more errors share one sign. The flag stands only
    when the window bias Σe has that same sign and is material: |Σe| >= ``BIAS_MATERIAL`` · Σdemand
    (any non-zero Σe when Σdemand <= 0). A run of small over-forecasts inside a large
    under-forecast is therefore not called "over".
    """
    pvalue = sign_test_pvalue(positive, nonzero)
    majority = np.sign(2 * positive - nonzero)
    by_test = (pvalue <= BIAS_ALPHA) & (majority != 0)
    by_run = np.abs(run) >= BIAS_RUN
    direction = np.where(by_test, majority, np.where(by_run, np.sign(run), 0))
    agrees = np.sign(bias) == direction
    # A relative slack of 1e-12 keeps a bias of exactly 5% material whatever the summation
    # order (0.2 of 4.0 may sum to 0.19999999999999998).
    material = (demand <= 0) | (np.abs(bias) >= BIAS_MATERIAL * demand * (1 - 1e-12))
    return np.where(agrees & material, direction, 0).astype(np.int8)


def naive_scale(demand: np.ndarray, season: int = SEASON.default) -> np.ndarray:
    """MASE scale: mean |D_t − D_{t−m}| over all pairs of actual periods in the given history.

    Hyndman & Koehler (2006): the in-sample mean absolute error of the (seasonal) naive forecast.
    NaN when no pair exists; 0 for a flat history (MASE is then undefined).
    """
    scale = _scan_history(demand, season, scale=True, pattern=False)[0]
    assert scale is not None
    return scale


def naive_value_added(
    demand: np.ndarray, forecast: np.ndarray, columns: np.ndarray, season: int = SEASON.default
) -> np.ndarray:
    """Forecast value added over the (seasonal) naive forecast, in units per period.

    mean over window periods t where D_{t−m} exists of (|D_t − D_{t−m}| − |e_t|); positive means
    the forecast beat naive (Gilliland's FVA with the naive forecast as the baseline step).
    """
    columns = np.asarray(columns)
    lagged_cols = columns - season
    valid_cols = lagged_cols >= 0
    n = demand.shape[0]
    total = np.empty(n)
    count = np.empty(n)
    for rows in _row_blocks(n, len(columns)):
        # Periods x series, as in window_measures: the sums add whole rows.
        demand_w = np.ascontiguousarray(demand[rows][:, columns].T)
        forecast_w = np.ascontiguousarray(forecast[rows][:, columns].T)
        lagged = np.full(demand_w.shape, np.nan)
        lagged[valid_cols] = demand[rows][:, lagged_cols[valid_cols]].T
        gain = np.abs(demand_w - lagged) - np.abs(forecast_w - demand_w)
        ok = ~np.isnan(gain)
        total[rows] = np.where(ok, gain, 0.0).sum(axis=0)
        count[rows] = ok.sum(axis=0)
    return _ratio(total, count, strict=False)


@dataclass(frozen=True)
class DemandPattern:
    """Syntetos–Boylan–Croston (2005) demand classification over the actual history."""

    adi: np.ndarray
    """Average demand interval: actual periods / periods with demand > 0 (NaN when none > 0)."""
    cv2: np.ndarray
    """Squared coefficient of variation of the positive demands (population variance / mean²)."""
    pattern: np.ndarray
    """Index into ``PATTERNS`` (int8)."""


def demand_pattern(demand: np.ndarray) -> DemandPattern:
    """Classify every series as smooth, erratic, intermittent, lumpy or none.

    Non-smooth side when ADI >= 1.32 or CV² >= 0.49; ``none`` when no period has positive demand.
    Negative demand (returns) counts as an actual period but not as a demand occurrence.
    """
    pattern = _scan_history(demand, 1, scale=False, pattern=True)[1]
    assert pattern is not None
    return pattern


@dataclass(frozen=True)
class HistoryMeasures:
    """The measures of every series' whole actual history, for one season of the naive scale."""

    season: int
    """Season m of the naive scale."""
    scale: np.ndarray
    """:func:`naive_scale`: MASE's denominator."""
    pattern: DemandPattern
    """:func:`demand_pattern`."""


def history_measures(demand: np.ndarray, season: int = SEASON.default) -> HistoryMeasures:
    """:func:`naive_scale` and :func:`demand_pattern` of the same history, in one pass over it.

    ``demand`` is the history (columns up to the latest actual); float32 is read as float64.
    """
    scale, pattern = _scan_history(demand, season, scale=True, pattern=True)
    assert scale is not None and pattern is not None
    return HistoryMeasures(season, scale, pattern)


def _scan_history(
    demand: np.ndarray, season: int, *, scale: bool, pattern: bool
) -> tuple[np.ndarray | None, DemandPattern | None]:
    """The history measures, block by block: each block is read once for all of them.

    Masked numpy operations (``where=``, boolean assignment) are several times slower than
    plain ones, so missing cells are neutralised arithmetically: ``fmax(x, 0)`` keeps positive
    demands and turns zero, negative and missing (NaN) cells into 0 in one plain pass.
    """
    n, width = demand.shape
    span = max(width - season, 0)
    out_scale = np.empty(n) if scale else None
    adi = np.empty(n) if pattern else None
    cv2 = np.empty(n) if pattern else None
    for rows in _row_blocks(n, width, HISTORY_CELLS):
        # One contiguous copy: elementwise passes over a strided view (the history columns of
        # the full calendar) run two to three times slower. A float32 demand (a scoring read
        # holds it so while every value fits exactly) is measured in float64 all the same.
        block = np.ascontiguousarray(demand[rows], dtype=np.float64)
        if out_scale is not None:
            # Hyndman & Koehler (2006): in-sample MAE of the (seasonal) naive forecast.
            diff = np.subtract(block[:, season:], block[:, :-season])
            np.abs(diff, out=diff)
            pairs = span - np.isnan(diff).view(np.uint8).sum(axis=1, dtype=np.int32)
            np.fmax(diff, 0.0, out=diff)
            out_scale[rows] = _ratio(diff.sum(axis=1), pairs, strict=False)
        if adi is not None and cv2 is not None:
            actual = width - np.isnan(block).view(np.uint8).sum(axis=1, dtype=np.int32)
            positive = block > 0
            count = positive.view(np.uint8).sum(axis=1, dtype=np.int32)
            sizes = np.fmax(block, 0.0)
            mean = _ratio(sizes.sum(axis=1), count, strict=False)
            # The same buffer, now the deviations of the positive demands (zero elsewhere).
            np.subtract(sizes, mean[:, None], out=sizes)
            np.multiply(sizes, positive, out=sizes)
            np.multiply(sizes, sizes, out=sizes)
            var = _ratio(sizes.sum(axis=1), count, strict=False)
            adi[rows] = _ratio(actual, count, strict=False)
            cv2[rows] = _ratio(var, mean * mean, strict=False)
    if adi is None or cv2 is None:
        return out_scale, None
    lumpy_side_adi = adi >= ADI_CUTOFF
    lumpy_side_cv2 = cv2 >= CV2_CUTOFF
    classes = np.select(
        [np.isnan(adi), lumpy_side_adi & lumpy_side_cv2, lumpy_side_adi, lumpy_side_cv2],
        [
            PATTERNS.index("none"),
            PATTERNS.index("lumpy"),
            PATTERNS.index("intermittent"),
            PATTERNS.index("erratic"),
        ],
        default=PATTERNS.index("smooth"),
    ).astype(np.int8)
    return out_scale, DemandPattern(adi=adi, cv2=cv2, pattern=classes)


def _ratio(num: np.ndarray, den: np.ndarray, *, strict: bool = True) -> np.ndarray:
    """num / den, NaN where den <= 0 (``strict``) or den == 0, without warnings."""
    num = np.asarray(num, dtype=np.float64)
    den = np.asarray(den, dtype=np.float64)
    ok = den > 0 if strict else den != 0
    out = np.full(np.broadcast(num, den).shape, np.nan)
    np.divide(num, den, out=out, where=ok)
    return out
