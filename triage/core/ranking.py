"""The scorecard: every series' measures, its share of portfolio error, and the review order.

Series are ranked by their contribution to total absolute error, in value (Σ|e|·price) when the
portfolio has prices and in units otherwise; ties break by key, ascending. Percentage errors are
deliberately not a ranking key: undefined at zero demand, explosive on small volumes, and they
reward forecasts that are too low.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from triage.core import metrics
from triage.core.portfolio import Portfolio

BY_ERROR = "error"
BY_BIAS = "bias"
ORDERS = (BY_ERROR, BY_BIAS)

FLAG_TEXT = {1: "over", -1: "under", 0: ""}


@dataclass(frozen=True)
class ScoreSettings:
    """How a portfolio is scored."""

    window: int = 13
    """Latest calendar periods with any actual demand that make up the scoring window."""
    season: int = 1
    """Seasonal period m of the naive baseline (1 = last period's actual)."""


def scorecard(
    portfolio: Portfolio,
    window: int = 13,
    season: int = 1,
    *,
    by: str = BY_ERROR,
) -> pd.DataFrame:
    """Score every series and return one row per series in review order.

    Columns (fractions, not percentages; NaN where undefined): the key columns, ``rank``,
    ``bias_rank``, ``periods``, ``demand``, ``forecast``, ``abs_error``, ``bias``, ``bias_pct``,
    ``wape``, ``mae``, ``rmse``, ``abs_error_value`` and ``bias_value`` (priced portfolios only),
    ``error_share``, ``cum_share``, ``tracking_signal``, ``bias_run``, ``bias_pvalue``,
    ``bias_flag`` (``over``/``under``/empty), ``mase``, ``fva``, ``pattern``, ``adi``, ``cv2``,
    then the attribute columns. The frame's index is the series' position in the portfolio.

    Args:
        portfolio: The portfolio to score.
        window: Latest calendar periods holding any actual demand to score over.
        season: Seasonal period of the naive baseline for MASE and FVA.
        by: ``"error"`` (largest share of error first) or ``"bias"`` (persistently biased
            series first, then by absolute bias, in value where priced).
    """
    if by not in ORDERS:
        raise ValueError(f"by must be one of {ORDERS}")
    if season < 1:
        raise ValueError("season must be at least 1")
    cols = metrics.window_columns(portfolio.demand, portfolio.last_actual, window)
    history = portfolio.demand[:, : portfolio.last_actual + 1]
    price_w = portfolio.price[:, cols] if portfolio.price is not None else None
    wm = metrics.window_measures(portfolio.demand[:, cols], portfolio.forecast[:, cols], price_w)

    priced = wm.abs_error_value is not None
    error = wm.abs_error_value if priced else wm.abs_error
    bias_size = np.abs(wm.bias_value if priced else wm.bias)
    flag = wm.bias_flag

    error_order = np.argsort(-error, kind="stable")
    rank = np.empty(len(error), dtype=np.int64)
    rank[error_order] = np.arange(1, len(error) + 1)
    bias_order = np.lexsort((np.arange(len(error)), -bias_size, flag == 0))
    bias_rank = np.empty(len(error), dtype=np.int64)
    bias_rank[bias_order] = np.arange(1, len(error) + 1)

    total = float(error.sum())
    share = error / total if total > 0 else np.full(len(error), np.nan)
    cum = np.empty(len(error))
    cum[error_order] = np.cumsum(share[error_order])

    scale = metrics.naive_scale(history, season)
    mae = wm.mae
    pattern = metrics.demand_pattern(history)

    data: dict[str, object] = {c: portfolio.keys[c].to_numpy() for c in portfolio.key_columns}
    data.update(
        rank=rank,
        bias_rank=bias_rank,
        periods=wm.periods,
        demand=wm.demand,
        forecast=wm.forecast,
        abs_error=wm.abs_error,
        bias=wm.bias,
        bias_pct=wm.bias_pct,
        wape=wm.wape,
        mae=mae,
        rmse=wm.rmse,
    )
    if priced:
        data.update(abs_error_value=wm.abs_error_value, bias_value=wm.bias_value)
    data.update(
        error_share=share,
        cum_share=cum,
        tracking_signal=wm.tracking_signal,
        bias_run=wm.bias_run,
        bias_pvalue=wm.bias_pvalue,
        bias_flag=np.array(["under", "", "over"], dtype=object)[flag + 1],
        mase=metrics._ratio(mae, scale),
        fva=metrics.naive_value_added(portfolio.demand, portfolio.forecast, cols, season),
        pattern=np.array(metrics.PATTERNS, dtype=object)[pattern.pattern],
        adi=pattern.adi,
        cv2=pattern.cv2,
    )
    for name in portfolio.attributes:
        data[name] = portfolio.keys[name].to_numpy()
    card = pd.DataFrame(data)
    order = error_order if by == BY_ERROR else bias_order
    return card.iloc[order]


def leading_cover(card: pd.DataFrame, cover: float) -> pd.DataFrame:
    """The smallest set of series, in error rank order, whose cumulative share reaches ``cover``."""
    if not 0 < cover <= 1:
        raise ValueError("cover must be in (0, 1]")
    by_rank = card.sort_values("rank", kind="stable")
    reached = np.flatnonzero(by_rank["cum_share"].to_numpy() >= cover - 1e-12)
    count = int(reached[0]) + 1 if len(reached) else len(by_rank)
    keep = by_rank.index[:count]
    return card.loc[card.index.isin(keep)]
