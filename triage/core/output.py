"""What the scorecard's renderers share: the scoring window and the portfolio's totals.

The scorecard itself is ``triage.core.ranking.scorecard``; ``triage.render.scorecard`` writes it
as CSV, JSON and a readable table, and the review screens show the same totals.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from triage.core import metrics
from triage.core.portfolio import Portfolio


def window_info(
    portfolio: Portfolio, window: int, cols: np.ndarray | None = None
) -> dict[str, object]:
    """First and last period of the scoring window and how many periods it holds.

    ``cols``: the window's columns when ``portfolio`` describes a larger whole (a dataset scored
    in parts, ``triage.core.dask_engine``); by default those of ``portfolio`` itself.
    """
    if cols is None:
        cols = metrics.window_columns(portfolio.demand, portfolio.last_actual, window)
    cal = portfolio.calendar
    return {
        "first": cal.label(int(cols[0])),
        "last": cal.label(int(cols[-1])),
        "periods": len(cols),
    }


def totals(card: pd.DataFrame) -> dict[str, float]:
    """Portfolio totals over the window: absolute error, bias %, WAPE, and value where priced."""
    demand = float(card["demand"].sum())
    abs_error = float(card["abs_error"].sum())
    bias = float(card["bias"].sum())
    out = {
        "series": float(len(card)),
        "abs_error": abs_error,
        "bias": bias,
        "bias_pct": bias / demand if demand > 0 else math.nan,
        "wape": abs_error / demand if demand > 0 else math.nan,
    }
    if "abs_error_value" in card:
        out["abs_error_value"] = float(card["abs_error_value"].sum())
        out["bias_value"] = float(card["bias_value"].sum())
    return out
