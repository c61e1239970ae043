"""The scorecard: every series' measures, its share of portfolio error, and the review order.

Series are ranked by their contribution to total absolute error, in value (Σ|e|·price) when the
portfolio has prices and in units otherwise; ties break by key, ascending. Percentage errors are
deliberately not a ranking key: undefined at zero demand, explosive on small volumes, and they
reward forecasts that are too low.
"""

from __future__ import annotations

import concurrent.futures
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd

from triage.core import compare, metrics
from triage.core.errors import TriageError
from triage.core.portfolio import Portfolio
from triage.core.settings import SEASON, WINDOW

# The orders are the vocabulary's (one list), re-exported for the callers that sort by them.
from triage.core.vocabulary import BY_BIAS as BY_BIAS
from triage.core.vocabulary import BY_ERROR as BY_ERROR
from triage.core.vocabulary import BY_FVA as BY_FVA
from triage.core.vocabulary import ORDERS as ORDERS

FLAG_TEXT = {1: "over", -1: "under", 0: ""}


def scorecard(
    portfolio: Portfolio,
    window: int = WINDOW.default,
    season: int = SEASON.default,
    *,
    by: str = BY_ERROR,
    steps: Sequence[str] | None = None,
) -> pd.DataFrame:
    """Score every series and return one row per series in review order.

    Columns (fractions, not percentages; NaN where undefined): the key columns, ``rank``,
    ``bias_rank``, ``fva_rank``, ``periods``, ``demand``, ``forecast``, ``abs_error``, ``bias``,
    ``bias_pct``, ``wape``, ``mae``, ``rmse``, ``abs_error_value`` and ``bias_value`` (priced
    portfolios only), ``error_share``, ``cum_share``, ``tracking_signal``, ``bias_run``,
    ``bias_pvalue``, ``bias_flag`` (``over``/``under``/empty), ``mase``, ``fva``, ``fva_loss``,
    ``fva_loss_value`` (priced only), ``pattern``, ``adi``, ``cv2``, then the attribute
    columns. The frame's index is the series' position in the portfolio.

    Args:
        portfolio: The portfolio to score.
        window: Latest calendar periods holding any actual demand to score over.
        season: Seasonal period of the naive baseline for MASE and FVA.
        by: ``"error"`` (largest share of error first), ``"bias"`` (persistently biased
            series first, then by absolute bias, in value where priced) or ``"fva"`` (most
            value destroyed by the last process step first, ``fva_loss_value`` where priced,
            else ``fva_loss``; series without a comparable cell last).
        steps: The process steps whose last step ``fva_loss`` measures
            (``compare.last_step``); None for the default chain.
    """
    if by not in ORDERS:
        raise ValueError(f"by must be one of {ORDERS}")
    if season < 1:
        raise ValueError("season must be at least 1")
    cols = metrics.window_columns(portfolio.demand, portfolio.last_actual, window)
    # The window is nearly always a run of adjacent columns: slice it (views, no copies).
    picked = as_slice(cols)
    history = portfolio.demand[:, : portfolio.last_actual + 1]
    # The history scans run on a worker thread while this one does the window measures, the
    # ranking and the gathering of every other column (numpy releases the GIL in its loops).
    with concurrent.futures.ThreadPoolExecutor(max_workers=2) as pool:
        history_job = pool.submit(metrics.history_measures, history, season)
        fva_job = pool.submit(
            metrics.naive_value_added, portfolio.demand, portfolio.forecast, cols, season
        )
        step_job = pool.submit(compare.last_step_loss, portfolio, cols, season, steps)
        price_w = portfolio.price[:, picked] if portfolio.price is not None else None
        wm = metrics.window_measures(
            portfolio.demand[:, picked], portfolio.forecast[:, picked], price_w
        )
        del price_w

        priced = wm.abs_error_value is not None
        error: np.ndarray = wm.abs_error_value if priced else wm.abs_error  # type: ignore[assignment]
        bias_size = np.abs(wm.bias_value if wm.bias_value is not None else wm.bias)
        flag = wm.bias_flag

        n = len(error)
        error_order = descending_order(error)
        rank = np.empty(n, dtype=np.int64)
        rank[error_order] = np.arange(1, n + 1)
        bias_order = bias_ordering(flag, bias_size)
        bias_rank = np.empty(n, dtype=np.int64)
        bias_rank[bias_order] = np.arange(1, n + 1)

        share, cum = error_shares(error, error_order)
        mae = wm.mae
        step = step_job.result()
        step_loss = step.loss_value if step.loss_value is not None else step.loss
        # Largest loss first; NaN (no comparable cell) sorts last; ties by key.
        fva_order = descending_order(step_loss)
        fva_rank = np.empty(n, dtype=np.int64)
        fva_rank[fva_order] = np.arange(1, n + 1)
        order = {BY_ERROR: error_order, BY_BIAS: bias_order, BY_FVA: fva_order}[by]

        # Every column is built once, already in review order (no frame-wide reordering copy).
        data: dict[str, object] = {
            c: portfolio.text_column(c, order) for c in portfolio.key_columns
        }
        columns: dict[str, Any] = {
            "rank": rank,
            "bias_rank": bias_rank,
            "fva_rank": fva_rank,
            "periods": wm.periods,
            "demand": wm.demand,
            "forecast": wm.forecast,
            "abs_error": wm.abs_error,
            "bias": wm.bias,
            "bias_pct": wm.bias_pct,
            "wape": wm.wape,
            "mae": mae,
            "rmse": wm.rmse,
        }
        if priced:
            columns.update(abs_error_value=wm.abs_error_value, bias_value=wm.bias_value)
        columns.update(
            error_share=share,
            cum_share=cum,
            tracking_signal=wm.tracking_signal,
            bias_run=wm.bias_run,
            bias_pvalue=wm.bias_pvalue,
        )
        for name, values in columns.items():
            data[name] = values[order]
        data["bias_flag"] = _labels(("under", "", "over"), (flag + 1)[order])
        later = {name: portfolio.text_column(name, order) for name in portfolio.attributes}
        (scale, pattern), fva = history_job.result(), fva_job.result()

    data["mase"] = metrics._ratio(mae, scale)[order]
    data["fva"] = fva[order]
    data["fva_loss"] = step.loss[order]
    if step.loss_value is not None:
        data["fva_loss_value"] = step.loss_value[order]
    data["pattern"] = _labels(metrics.PATTERNS, pattern.pattern[order])
    data["adi"] = pattern.adi[order]
    data["cv2"] = pattern.cv2[order]
    data.update(later)
    return pd.DataFrame(data, index=pd.Index(order), copy=False)


def as_slice(cols: np.ndarray) -> slice | np.ndarray:
    """``cols`` as a slice when its columns are adjacent and ascending, else unchanged."""
    if len(cols) and int(cols[-1]) - int(cols[0]) == len(cols) - 1:
        return slice(int(cols[0]), int(cols[-1]) + 1)
    return cols


def _labels(names: tuple[str, ...], codes: np.ndarray) -> pd.api.extensions.ExtensionArray:
    """Text labels by code, as the ``str`` column pandas would make of them (no per-row objects)."""
    import pyarrow as pa

    labels = pa.array(list(names), type=pa.large_string()).take(pa.array(codes))
    return pd.array(labels, dtype=pd.StringDtype("pyarrow", na_value=np.nan))


def descending_order(error: np.ndarray) -> np.ndarray:
    """Positions by descending error; ties keep position order (the key order of a portfolio)."""
    return np.argsort(-np.asarray(error, dtype=np.float64), kind="stable")


def bias_ordering(flag: np.ndarray, bias_size: np.ndarray) -> np.ndarray:
    """Bias order: flagged first, then by descending |bias|, ties by position (key order).

    One stable sort and a stable split (np.lexsort on three keys sorts three times).
    """
    by_size = np.argsort(-bias_size, kind="stable")
    flagged = flag[by_size] != 0
    return np.concatenate([by_size[flagged], by_size[~flagged]])


def error_shares(error: np.ndarray, order: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``error_share`` and ``cum_share`` of every series (NaN when the total error is 0).

    The total is the last value of the running sum in ``order``, so that ``cum_share`` ends at
    exactly 1.0 (a sum of rounded shares, or a pairwise sum, can end at 0.9999999999999999).
    """
    n = len(error)
    running = np.cumsum(error[order])
    total = float(running[-1]) if n else 0.0
    if total <= 0:
        return np.full(n, np.nan), np.full(n, np.nan)
    cum = np.empty(n)
    cum[order] = running / total
    return error / total, cum


def cover_count(cum_in_order: np.ndarray, cover: float) -> int:
    """Leading series (in rank order) it takes for the cumulative share to reach ``cover``."""
    reached = np.flatnonzero(cum_in_order >= cover - 1e-12)
    return int(reached[0]) + 1 if len(reached) else len(cum_in_order)


def leading_cover(card: pd.DataFrame, cover: float) -> pd.DataFrame:
    """The smallest set of series, in error rank order, whose cumulative share reaches ``cover``."""
    if not 0 < cover <= 1:
        raise ValueError("cover must be in (0, 1]")
    by_rank = card.sort_values("rank", kind="stable")
    keep = by_rank.index[: cover_count(by_rank["cum_share"].to_numpy(), cover)]
    return card.loc[card.index.isin(keep)]


def unscorable(portfolio: Portfolio, window: int) -> str | None:
    """Why nothing in the window can be scored (no period has both an actual and a forecast)."""
    cols = metrics.window_columns(portfolio.demand, portfolio.last_actual, window)
    for rows in range(0, portfolio.n_series, 1 << 15):
        block = slice(rows, rows + (1 << 15))
        both = ~np.isnan(portfolio.demand[block][:, cols]) & ~np.isnan(
            portfolio.forecast[block][:, cols]
        )
        if both.any():
            return None
    return (
        f"no period of the scoring window ({len(cols)} latest periods with actual demand) has "
        "both an actual and a forecast, so there is nothing to score."
    )


def require_scorable(portfolio: Portfolio, window: int) -> None:
    """Refuse a portfolio in whose window nothing can be scored (see :func:`unscorable`).

    Raises:
        TriageError: No window period has both an actual and a forecast.
    """
    problem = unscorable(portfolio, window)
    if problem is not None:
        raise TriageError(
            f"{portfolio.path}: {problem}",
            hint="Include the forecasts that were made for the latest periods with actuals.",
        )
