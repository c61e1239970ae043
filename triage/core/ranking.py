"""The scorecard: every series' measures, its share of portfolio error, and the review order.

Series are ranked by their contribution to total absolute error, in value (Σ|e|·price) when the
portfolio has prices and in units otherwise; ties break by key, ascending. Percentage errors are
deliberately not a ranking key: undefined at zero demand, explosive on small volumes, and they
reward forecasts that are too low.
"""

from __future__ import annotations

import concurrent.futures
from collections.abc import Callable, Sequence
from dataclasses import dataclass

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
    limit: int | None = None,
) -> pd.DataFrame:
    """Score every series and return one row per series in review order.

    Columns (fractions, not percentages; NaN where undefined): the key columns, ``rank``,
    ``bias_rank``, ``fva_rank``, ``periods``, ``demand``, ``forecast``, ``abs_error``, ``bias``,
    ``bias_pct``, ``wape``, ``mae``, ``rmse``, ``abs_error_value`` and ``bias_value`` (priced
    portfolios only), ``error_share``, ``cum_share``, ``tracking_signal``, ``bias_run``,
    ``bias_pvalue``, ``bias_flag`` (``over``/``under``/empty), ``mase``, ``fva``, ``fva_loss``,
    ``fva_loss_value`` (priced only), ``pattern``, ``adi``, ``cv2``, then the attribute
    columns. The frame's index is the series' position in the portfolio.

    Two steps: :func:`series_measures` scores each series on its own, :func:`ranked` places
    every series among all the others. A partitioned run (``triage.core.engine``) runs the
    first on each part and the second once, on the parts' measures in key order.

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
        limit: Only the first ``limit`` rows in review order (see :func:`ranked`).
    """
    if by not in ORDERS:
        raise ValueError(f"by must be one of {ORDERS}")
    cols = metrics.window_columns(portfolio.demand, portfolio.last_actual, window)
    return ranked(series_measures(portfolio, cols, season, steps), by, limit=limit)


@dataclass(frozen=True)
class SeriesMeasures:
    """Every series' own measures, in position order (key order), before any ranking.

    ``numbers`` holds the numeric scorecard columns that do not depend on other series, in
    scorecard order; ``flag`` and ``pattern`` are codes (``bias_flag`` −1/0/+1, an index into
    ``metrics.PATTERNS``); ``text(name, order)`` gives a key or attribute column of the series
    ``order`` as a ``str`` array.
    """

    numbers: dict[str, np.ndarray]
    flag: np.ndarray
    pattern: np.ndarray
    key_columns: tuple[str, ...]
    attributes: tuple[str, ...]
    text: Callable[[str, np.ndarray], pd.api.extensions.ExtensionArray]
    window_errors: np.ndarray | None = None
    """Series x window periods: e where the cell counts, NaN elsewhere; only when measured
    for groups apart from the portfolio (``groups.group_scorecard_of``)."""

    @property
    def priced(self) -> bool:
        """Whether the measures are in value too (the portfolio has prices)."""
        return "abs_error_value" in self.numbers

    def __len__(self) -> int:
        return len(self.flag)


#: The numeric columns of :class:`SeriesMeasures`, in scorecard order (priced ones included).
MEASURE_COLUMNS: tuple[str, ...] = (
    "periods",
    "demand",
    "forecast",
    "abs_error",
    "bias",
    "bias_pct",
    "wape",
    "mae",
    "rmse",
    "abs_error_value",
    "bias_value",
    "tracking_signal",
    "bias_run",
    "bias_pvalue",
    "mase",
    "fva",
    "fva_loss",
    "fva_loss_value",
    "adi",
    "cv2",
)


def series_measures(
    portfolio: Portfolio,
    cols: np.ndarray,
    season: int = SEASON.default,
    steps: Sequence[str] | None = None,
) -> SeriesMeasures:
    """Score every series of ``portfolio`` on its own over the calendar columns ``cols``.

    ``cols`` is the scoring window (``metrics.window_columns`` of the whole portfolio); a part of
    a portfolio is scored over the whole portfolio's window, on the whole portfolio's calendar.
    """
    if season < 1:
        raise ValueError("season must be at least 1")
    # The window is nearly always a run of adjacent columns: slice it (views, no copies).
    picked = as_slice(cols)
    # The history scans (unless the read took them) run on a worker thread while this one
    # does the window measures (numpy releases the GIL in its loops).
    with concurrent.futures.ThreadPoolExecutor(max_workers=2) as pool:
        history_job = pool.submit(portfolio.history_measures, season)
        fva_job = pool.submit(
            metrics.naive_value_added, portfolio.demand, portfolio.forecast, cols, season
        )
        step_job = pool.submit(compare.last_step_loss, portfolio, cols, season, steps)
        price_w = portfolio.price[:, picked] if portfolio.price is not None else None
        wm = metrics.window_measures(
            portfolio.demand[:, picked], portfolio.forecast[:, picked], price_w
        )
        del price_w
        mae = wm.mae
        numbers: dict[str, np.ndarray] = {
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
        if wm.abs_error_value is not None and wm.bias_value is not None:
            numbers.update(abs_error_value=wm.abs_error_value, bias_value=wm.bias_value)
        numbers.update(
            tracking_signal=wm.tracking_signal,
            bias_run=wm.bias_run,
            bias_pvalue=wm.bias_pvalue,
        )
        flag = wm.bias_flag
        step = step_job.result()
        history, fva = history_job.result(), fva_job.result()
    pattern = history.pattern
    numbers.update(mase=metrics._ratio(mae, history.scale), fva=fva, fva_loss=step.loss)
    if step.loss_value is not None:
        numbers["fva_loss_value"] = step.loss_value
    numbers.update(adi=pattern.adi, cv2=pattern.cv2)
    return SeriesMeasures(
        numbers=numbers,
        flag=flag,
        pattern=pattern.pattern,
        key_columns=portfolio.key_columns,
        attributes=portfolio.attributes,
        text=portfolio.key_columns_text.column,
    )


def ranked(
    measures: SeriesMeasures, by: str = BY_ERROR, *, limit: int | None = None
) -> pd.DataFrame:
    """The scorecard of :func:`scorecard`: ranks, shares and every column, in review order.

    Ties in every order break by position, so ``measures`` must be in key order. ``limit``: only
    the first ``limit`` rows are built (``rank --top K``); ranks and shares are still those among
    every series.
    """
    if by not in ORDERS:
        raise ValueError(f"by must be one of {ORDERS}")
    numbers = measures.numbers
    priced = measures.priced
    error = numbers["abs_error_value"] if priced else numbers["abs_error"]
    bias_size = np.abs(numbers["bias_value"] if priced else numbers["bias"])
    flag = measures.flag

    n = len(error)
    error_order = descending_order(error)
    rank = np.empty(n, dtype=np.int64)
    rank[error_order] = np.arange(1, n + 1)
    bias_order = bias_ordering(flag, bias_size)
    bias_rank = np.empty(n, dtype=np.int64)
    bias_rank[bias_order] = np.arange(1, n + 1)
    share, cum = error_shares(error, error_order)
    # Largest loss first; NaN (no comparable cell) sorts last; ties by key.
    step_loss = numbers["fva_loss_value"] if priced else numbers["fva_loss"]
    fva_order = descending_order(step_loss)
    fva_rank = np.empty(n, dtype=np.int64)
    fva_rank[fva_order] = np.arange(1, n + 1)
    order = {BY_ERROR: error_order, BY_BIAS: bias_order, BY_FVA: fva_order}[by]
    if limit is not None:
        order = order[:limit]

    # Every column is built once, already in review order (no frame-wide reordering copy).
    data: dict[str, object] = {c: measures.text(c, order) for c in measures.key_columns}
    data.update(rank=rank[order], bias_rank=bias_rank[order], fva_rank=fva_rank[order])
    for name in MEASURE_COLUMNS[: MEASURE_COLUMNS.index("tracking_signal")]:
        if name in numbers:
            data[name] = numbers[name][order]
    data.update(error_share=share[order], cum_share=cum[order])
    for name in ("tracking_signal", "bias_run", "bias_pvalue"):
        data[name] = numbers[name][order]
    data["bias_flag"] = _labels(("under", "", "over"), (flag + 1)[order])
    for name in ("mase", "fva", "fva_loss", "fva_loss_value"):
        if name in numbers:
            data[name] = numbers[name][order]
    data["pattern"] = _labels(metrics.PATTERNS, measures.pattern[order])
    data.update(adi=numbers["adi"][order], cv2=numbers["cv2"][order])
    data.update({name: measures.text(name, order) for name in measures.attributes})
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
    return NOTHING_TO_SCORE.format(periods=len(cols))


#: Why a portfolio cannot be scored (:func:`unscorable`), and what to do.
NOTHING_TO_SCORE = (
    "no period of the scoring window ({periods} latest periods with actual demand) has both an "
    "actual and a forecast, so there is nothing to score."
)
SCORABLE_HINT = "Include the forecasts that were made for the latest periods with actuals."


def require_scorable(portfolio: Portfolio, window: int) -> None:
    """Refuse a portfolio in whose window nothing can be scored (see :func:`unscorable`).

    Raises:
        TriageError: No window period has both an actual and a forecast.
    """
    if unscorable(portfolio, window) is not None:
        cols = metrics.window_columns(portfolio.demand, portfolio.last_actual, window)
        raise nothing_to_score(portfolio.path, len(cols))


def nothing_to_score(path: object, periods: int) -> TriageError:
    """The refusal of a portfolio (or dataset) ``path`` in whose window of ``periods`` periods
    no period has both an actual and a forecast."""
    return TriageError(f"{path}: {NOTHING_TO_SCORE.format(periods=periods)}", hint=SCORABLE_HINT)
