"""The data-quality counts of ``triage check``: what a portfolio's series hold and lack.

Every count is a sum over series, so the counts of any split of the series add up to the
whole's (:meth:`Quality.total`): the local engine counts in row blocks, the Dask engine one task
of whole series at a time, and the report (``render.scorecard.check_text``) is the same.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np

from triage.core import metrics
from triage.core.portfolio import Portfolio

#: Series counted at a time: the block's boolean arrays stay small beside the dense ones.
BLOCK_SERIES = 1 << 15


@dataclass(frozen=True)
class Quality:
    """What a portfolio's series hold and lack, over the history and the scoring window."""

    series: int
    """Series counted."""
    missing: int
    """Series-periods without an actual after the series' first actual (missing is never read
    as zero; a period before the first actual is not missing: the series had not started)."""
    window_missing: int
    """Of :attr:`missing`, those in the scoring window."""
    no_forecast: int
    """Window periods with an actual but no forecast (not scored)."""
    scorable: int
    """Window periods with both an actual and a forecast: none means nothing can be scored."""
    forward: int
    """Forecast values after the latest actual period."""
    negative: int
    """Periods of negative demand (returns)."""
    zero: int
    """Periods of zero demand."""
    no_actual: int
    """Series without any actual demand."""
    zero_only: int
    """Series with actuals, every one zero or negative."""
    patterns: tuple[int, ...]
    """Series per demand pattern, in the order of ``metrics.PATTERNS``."""

    @classmethod
    def total(cls, parts: Iterable[Quality]) -> Quality:
        """The counts of the series of every part (parts share no series)."""
        fields = [f.name for f in dataclasses.fields(cls) if f.name != "patterns"]
        sums = dict.fromkeys(fields, 0)
        patterns = np.zeros(len(metrics.PATTERNS), dtype=np.int64)
        for part in parts:
            for name in fields:
                sums[name] += getattr(part, name)
            patterns += part.patterns
        return cls(**sums, patterns=tuple(int(c) for c in patterns))


def quality(portfolio: Portfolio, cols: np.ndarray) -> Quality:
    """The counts of every series of ``portfolio``, whose scoring window is ``cols``
    (``metrics.window_columns``, or a dataset plan's window when ``portfolio`` is a part)."""
    return Quality.total(
        _block(portfolio, slice(lo, lo + BLOCK_SERIES), cols)
        for lo in range(0, max(portfolio.n_series, 1), BLOCK_SERIES)
    )


def _block(portfolio: Portfolio, rows: slice, cols: np.ndarray) -> Quality:
    last = portfolio.last_actual
    hist = np.asarray(portfolio.demand[rows, : last + 1], dtype=np.float64)
    actual = ~np.isnan(hist)
    has_actual = actual.any(axis=1)
    first_actual = np.where(has_actual, actual.argmax(axis=1), hist.shape[1])
    started = np.arange(hist.shape[1])[None, :] >= first_actual[:, None]
    forecast_w = portfolio.forecast[rows][:, cols]
    actual_w = actual[:, cols]
    counts = np.bincount(metrics.demand_pattern(hist).pattern, minlength=len(metrics.PATTERNS))
    return Quality(
        series=len(hist),
        missing=int((started & ~actual).sum()),
        window_missing=int((started[:, cols] & ~actual_w).sum()),
        no_forecast=int((actual_w & np.isnan(forecast_w)).sum()),
        scorable=int((actual_w & ~np.isnan(forecast_w)).sum()),
        forward=int((~np.isnan(portfolio.forecast[rows, last + 1 :])).sum()),
        negative=int((hist < 0).sum()),
        zero=int((hist == 0).sum()),
        no_actual=int((~has_actual).sum()),
        zero_only=int((has_actual & ~(np.nan_to_num(hist) > 0).any(axis=1)).sum()),
        patterns=tuple(int(c) for c in counts),
    )
