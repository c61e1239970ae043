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

from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy import stats

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

#: Rows per block when a measure scans the full history: keeps temporaries small and cache-warm.
BLOCK = 1 << 15


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
        return np.sqrt(_ratio(self.sq_error, self.periods.astype(np.float64)))

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
    """The ``window`` latest calendar columns, up to ``last_actual``, that hold any actual demand."""
    if window < 1:
        raise ValueError("window must be at least 1")
    has_actual = ~np.isnan(demand[:, : last_actual + 1]).all(axis=0)
    return np.flatnonzero(has_actual)[-window:]


def window_measures(
    demand: np.ndarray, forecast: np.ndarray, price: np.ndarray | None = None
) -> WindowMeasures:
    """Sums, counts and the bias run over window columns (already sliced, chronological).

    Args:
        demand: Actual demand, series x window periods, NaN where missing.
        forecast: Forecast for the same cells, NaN where missing.
        price: Unit value for the same cells, or None.
    """
    both = ~np.isnan(demand) & ~np.isnan(forecast)
    error = np.where(both, forecast - demand, 0.0)
    abs_error = np.abs(error)
    value_abs = value_bias = None
    if price is not None:
        safe_price = np.where(both, price, 0.0)
        value_abs = (abs_error * safe_price).sum(axis=1)
        value_bias = (error * safe_price).sum(axis=1)
    return WindowMeasures(
        periods=both.sum(axis=1),
        demand=np.where(both, demand, 0.0).sum(axis=1),
        forecast=np.where(both, forecast, 0.0).sum(axis=1),
        abs_error=abs_error.sum(axis=1),
        bias=error.sum(axis=1),
        sq_error=(error * error).sum(axis=1),
        positive=(error > 0).sum(axis=1),
        nonzero=(error != 0).sum(axis=1),
        bias_run=latest_run(error, both),
        abs_error_value=value_abs,
        bias_value=value_bias,
    )


def latest_run(error: np.ndarray, counted: np.ndarray) -> np.ndarray:
    """Signed count of consecutive latest counted errors sharing the strict sign of the latest.

    Missing periods are skipped, not run-breaking: they are not errors. The result is 0 when the
    latest counted error is exactly 0 or nothing is counted.
    """
    n_rows = error.shape[0]
    latest = np.zeros(n_rows, dtype=np.int8)
    seen = np.zeros(n_rows, dtype=bool)
    open_run = np.zeros(n_rows, dtype=bool)
    length = np.zeros(n_rows, dtype=np.int64)
    sign = np.sign(error).astype(np.int8)
    for col in range(error.shape[1] - 1, -1, -1):
        here = counted[:, col]
        start = here & ~seen
        latest[start] = sign[start, col]
        open_run[start] = sign[start, col] != 0
        length[start] = open_run[start]
        seen |= here
        go_on = here & ~start & open_run
        same = go_on & (sign[:, col] == latest)
        length[same] += 1
        open_run[go_on & ~same] = False
    return length * latest


@lru_cache(maxsize=8)
def _sign_table(n_max: int) -> np.ndarray:
    """p[k, n] of the two-sided exact binomial test with p = 0.5, for 0 <= k <= n <= n_max.

    For a symmetric null the two-sided p-value is twice the smaller tail, capped at 1; scipy's
    ``binomtest`` agrees (checked in tests).
    """
    k = np.arange(n_max + 1)[:, None]
    n = np.arange(n_max + 1)[None, :]
    lower = stats.binom.cdf(k, n, 0.5)
    upper = stats.binom.sf(k - 1, n, 0.5)
    table = np.minimum(1.0, 2.0 * np.minimum(lower, upper))
    table[:, 0] = 1.0
    return table


def sign_test_pvalue(positive: np.ndarray, nonzero: np.ndarray) -> np.ndarray:
    """Two-sided exact sign test p-values; 1.0 when there is no non-zero error."""
    n_max = int(nonzero.max()) if nonzero.size else 0
    table = _sign_table(max(n_max, 1))
    return table[positive, nonzero]


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
    material = (demand <= 0) | (np.abs(bias) >= BIAS_MATERIAL * demand)
    return np.where(agrees & material, direction, 0).astype(np.int8)


def naive_scale(demand: np.ndarray, season: int = 1) -> np.ndarray:
    """MASE scale: mean |D_t − D_{t−m}| over all pairs of actual periods in the given history.

    Hyndman & Koehler (2006): the in-sample mean absolute error of the (seasonal) naive forecast.
    NaN when no pair exists; 0 for a flat history (MASE is then undefined).
    """
    out = np.empty(demand.shape[0])
    for lo in range(0, demand.shape[0], BLOCK):
        block = demand[lo : lo + BLOCK]
        diff = np.abs(block[:, season:] - block[:, :-season])
        pairs = ~np.isnan(diff)
        count = pairs.sum(axis=1)
        total = np.where(pairs, diff, 0.0).sum(axis=1)
        out[lo : lo + BLOCK] = _ratio(total, count.astype(np.float64), strict=False)
    return out


def naive_value_added(
    demand: np.ndarray, forecast: np.ndarray, columns: np.ndarray, season: int = 1
) -> np.ndarray:
    """Forecast value added over the (seasonal) naive forecast, in units per period.

    mean over window periods t where D_{t−m} exists of (|D_t − D_{t−m}| − |e_t|); positive means
    the forecast beat naive (Gilliland's FVA with the naive forecast as the baseline step).
    """
    lagged_cols = columns - season
    valid_cols = lagged_cols >= 0
    demand_w = demand[:, columns]
    forecast_w = forecast[:, columns]
    lagged = np.full(demand_w.shape, np.nan)
    lagged[:, valid_cols] = demand[:, lagged_cols[valid_cols]]
    gain = np.abs(demand_w - lagged) - np.abs(forecast_w - demand_w)
    ok = ~np.isnan(gain)
    return _ratio(np.where(ok, gain, 0.0).sum(axis=1), ok.sum(axis=1).astype(np.float64), strict=False)


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
    n = demand.shape[0]
    adi = np.empty(n)
    cv2 = np.empty(n)
    for lo in range(0, n, BLOCK):
        block = demand[lo : lo + BLOCK]
        actual = (~np.isnan(block)).sum(axis=1).astype(np.float64)
        positive = block > 0
        count = positive.sum(axis=1).astype(np.float64)
        sizes = np.where(positive, block, 0.0)
        mean = _ratio(sizes.sum(axis=1), count, strict=False)
        dev = np.where(positive, block - mean[:, None], 0.0)
        var = _ratio((dev * dev).sum(axis=1), count, strict=False)
        adi[lo : lo + BLOCK] = _ratio(actual, count, strict=False)
        cv2[lo : lo + BLOCK] = _ratio(var, mean * mean, strict=False)
    lumpy_side_adi = adi >= ADI_CUTOFF
    lumpy_side_cv2 = cv2 >= CV2_CUTOFF
    pattern = np.select(
        [np.isnan(adi), lumpy_side_adi & lumpy_side_cv2, lumpy_side_adi, lumpy_side_cv2],
        [PATTERNS.index("none"), PATTERNS.index("lumpy"), PATTERNS.index("intermittent"), PATTERNS.index("erratic")],
        default=PATTERNS.index("smooth"),
    ).astype(np.int8)
    return DemandPattern(adi=adi, cv2=cv2, pattern=pattern)


def _ratio(num: np.ndarray, den: np.ndarray, *, strict: bool = True) -> np.ndarray:
    """num / den, NaN where den <= 0 (``strict``) or den == 0, without warnings."""
    num = np.asarray(num, dtype=np.float64)
    den = np.asarray(den, dtype=np.float64)
    ok = den > 0 if strict else den != 0
    out = np.full(np.broadcast(num, den).shape, np.nan)
    np.divide(num, den, out=out, where=ok)
    return out
