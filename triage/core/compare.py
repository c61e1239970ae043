"""Competing forecasts of one portfolio compared on the same cells (``triage compare``).

The forecasts are the file's ``forecast``, each ``forecast_<name>`` column (``Portfolio.competing``)
and two built-in benchmarks: ``naive`` (the previous calendar period's actual; missing when that
actual is missing) and, with a season m > 1, ``snaive`` (the actual m periods back). The window is
the scorecard's (``metrics.window_columns``). A window cell is *compared* when demand and every
compared forecast are present there, so every forecast is measured on exactly the same cells.

Sign: e = forecast − demand (``triage.core.metrics``). Every measure is a fraction, never a
percentage, NaN where undefined. Formulas, the MAPE variants and the paired test:
docs/metrics.md, "Comparing forecasts".

Steps (forecast value added, Gilliland 2010, *The Business Forecasting Deal*): an ordered list of
forecast names; each step after the first gets ``fva_units`` = Σ|e| of the previous step − Σ|e|
of this step, ``fva_pct`` = that / Σ|e| of the previous step, and the p-value of a
Diebold–Mariano test (Diebold & Mariano 1995, "Comparing predictive accuracy") on the loss
differential of absolute errors, with a Newey–West (1987) Bartlett-weighted variance of h − 1
lags and the small-sample correction of Harvey, Leybourne & Newbold (1997), "Testing the equality
of prediction mean squared errors", against Student's t with T − 1 degrees of freedom.

Everything is computed in blocks of series (numpy over whole blocks; loops run over blocks,
forecasts, steps and period lags only, never over series).
"""

from __future__ import annotations

import itertools
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from triage.core import metrics, schema
from triage.core.errors import TriageError
from triage.core.portfolio import ColumnSpan, Portfolio
from triage.core.settings import SEASON, WINDOW

#: The file's own forecast.
FORECAST = "forecast"
#: The previous period's actual.
NAIVE = "naive"
#: The actual one season back (only with a season above 1).
SNAIVE = "snaive"
#: Names the command reserves: a ``forecast_<name>`` column may not use them.
BUILT_IN = (FORECAST, NAIVE, SNAIVE)

#: What the p-value beside each step comes from (said by the renderers).
TEST_NAME = (
    "Diebold-Mariano test on the per-period loss differential of absolute errors, "
    "Newey-West variance, Harvey-Leybourne-Newbold small-sample correction, Student t"
)

#: Series rows per block.
_ROWS = 1 << 14

#: Column order of the portfolio table (``abs_error_value``/``bias_value`` only when priced).
TABLE_COLUMNS = (
    "forecast_name",
    "step",
    "cells",
    "demand",
    "abs_error",
    "bias",
    "bias_pct",
    "wape",
    "mae",
    "rmse",
    "abs_error_value",
    "bias_value",
    "mase",
    "mase_series",
    "mape",
    "mape_cells_dropped",
    "mape_capped",
    "rank_wape",
    "rank_mape",
    "fva_units",
    "fva_pct",
    "p",
    "dm_stat",
    "series_best",
)


@dataclass(frozen=True)
class Verdict:
    """What the comparison says in plain words, as data.

    Attributes:
        best: The forecast with the lowest WAPE among those whose bias is acceptable
            (|Σe / Σdemand| below ``metrics.BIAS_MATERIAL``); None when none is.
        lowest_wape: The forecast with the lowest WAPE whatever its bias (None: WAPE undefined).
        mape_pick: The forecast with the lowest MAPE (None: MAPE undefined for all).
        mape_warning: MAPE picks another forecast than ``best`` and that forecast is biased low
            by ``metrics.BIAS_MATERIAL`` of demand or more.
    """

    best: str | None
    lowest_wape: str | None
    mape_pick: str | None
    mape_warning: bool


@dataclass(frozen=True)
class Comparison:
    """Every forecast of a portfolio measured on the same window cells.

    Attributes:
        names: The forecasts, in table order: ``forecast``, the competing forecasts in file
            order, ``naive``, ``snaive`` (season > 1).
        steps: The forecast value added chain, in order.
        season: The season m of ``snaive`` and of the MASE scale.
        columns: The window's calendar columns.
        series: Series of the portfolio.
        window_cells: Window cells with actual demand.
        cells: Compared cells (demand and every forecast present).
        missing: Per forecast, window cells with demand where that forecast is missing.
        periods: Window periods holding at least one compared cell (T of the test).
        test_lags: Autocovariance lags of the test's variance (h − 1).
        table: One row per forecast, columns ``TABLE_COLUMNS`` (value columns when priced).
        verdict: The plain-words verdict as data.
        by_series: One row per series x forecast (the key columns first, ``best`` last), or
            None when not asked for.
    """

    names: tuple[str, ...]
    steps: tuple[str, ...]
    season: int
    columns: np.ndarray
    series: int
    window_cells: int
    cells: int
    missing: dict[str, int]
    periods: int
    test_lags: int
    table: pd.DataFrame
    verdict: Verdict
    by_series: pd.DataFrame | None


def forecast_names(portfolio: Portfolio, season: int = SEASON.default) -> tuple[str, ...]:
    """The forecasts compared, in table order.

    Raises:
        TriageError: A competing forecast is named like a built-in one (``forecast_naive``).
    """
    clash = [name for name in portfolio.competing if name in BUILT_IN]
    if clash:
        raise TriageError(
            f"{portfolio.path}: the column forecast_{clash[0]} is named like the built-in "
            f"forecast '{clash[0]}', so the two cannot be told apart.",
            hint="Rename the column (e.g. forecast_" + clash[0] + "_file) and run again.",
        )
    return (
        FORECAST,
        *portfolio.competing,
        NAIVE,
        *((SNAIVE,) if season > 1 else ()),
    )


def default_steps(names: Sequence[str]) -> tuple[str, ...]:
    """``naive``, then the competing forecasts in file order, then ``forecast``."""
    competing = [n for n in names if n not in BUILT_IN]
    return (NAIVE, *competing, FORECAST)


def parse_steps(text: str, names: Sequence[str], option: str = "--steps") -> tuple[str, ...]:
    """``"naive,stat,forecast"`` -> the ordered step names, each one of ``names``.

    Raises:
        TriageError: An empty, unknown or repeated name, naming it and the available ones.
    """
    steps = tuple(part.strip() for part in text.split(","))
    available = ", ".join(names)
    for step in steps:
        if not step:
            raise TriageError(
                f"{option} {text!r}: an empty name.",
                hint=f"List forecast names separated by commas, from: {available}.",
            )
        if step not in names:
            hint = f"Available: {available}."
            bare = step.removeprefix(schema.COMPETING_PREFIX)
            if bare != step and bare in names and bare not in BUILT_IN:
                hint = f"Write {bare} for the column {step}: steps are named without its prefix."
            if step == SNAIVE:
                hint += " snaive needs --season m with m > 1."
            raise TriageError(f"{option}: unknown forecast {step!r}.", hint=hint)
    repeated = [s for i, s in enumerate(steps) if s in steps[:i]]
    if repeated:
        raise TriageError(
            f"{option}: {repeated[0]!r} is listed twice.",
            hint="Each forecast may be one step of the chain once.",
        )
    return steps


def test_lags(portfolio: Portfolio) -> int:
    """h − 1, with h the forecast horizon: the portfolio's lag (at least 1 period)."""
    return max(int(portfolio.lag or 1), 1) - 1


def compare(
    portfolio: Portfolio,
    window: int = WINDOW.default,
    season: int = SEASON.default,
    *,
    steps: Sequence[str] | None = None,
    by_series: bool = False,
) -> Comparison:
    """Measure every forecast on the window cells where demand and all forecasts are present.

    Args:
        portfolio: The portfolio (``competing`` holds the ``forecast_<name>`` forecasts).
        window: Latest calendar periods holding any actual demand.
        season: Season m of ``snaive`` (only when m > 1) and of the MASE scale.
        steps: The value-added chain (default :func:`default_steps`); names checked by
            :func:`parse_steps`.
        by_series: Also build one row per series x forecast.

    Raises:
        TriageError: A competing forecast is named like a built-in one, a step is unknown, or
            no window cell has demand and every forecast.
    """
    if season < 1:
        raise ValueError("season must be at least 1")
    names = forecast_names(portfolio, season)
    chain = default_steps(names) if steps is None else parse_steps(",".join(steps), names)
    cols = metrics.window_columns(portfolio.demand, portfolio.last_actual, window)
    lags = test_lags(portfolio)
    sums = block_sums(portfolio, names, cols, season, chain, lags, by_series=by_series)
    return compared(
        sums,
        names,
        chain,
        season=season,
        cols=cols,
        lags=lags,
        path=portfolio.path,
        key_columns=portfolio.key_columns,
        text=portfolio.text_column,
        by_series=by_series,
        hint=lambda name: _no_history_hint(portfolio, name, int(cols[0])),
    )


def compared(
    sums: Sums,
    names: tuple[str, ...],
    chain: tuple[str, ...],
    *,
    season: int,
    cols: np.ndarray,
    lags: int,
    path: Path,
    key_columns: tuple[str, ...],
    text: Callable[[str, np.ndarray], pd.api.extensions.ExtensionArray],
    by_series: bool,
    hint: Callable[[str], str | None] | None = None,
) -> Comparison:
    """The comparison of every series' sums (:func:`block_sums`, or those of a dataset's
    parts joined by :meth:`Sums.join`).

    Args:
        sums: The series' sums, in portfolio order.
        names: The forecasts (:func:`forecast_names`); chain: the value-added steps.
        season: Season m of ``snaive`` and of the MASE scale; cols: the window's columns.
        lags: The test's autocovariance lags (:func:`test_lags`).
        path: The portfolio's file or folder (named by the refusal).
        key_columns: The key columns; text: a key column of the series at given rows
            (``Portfolio.text_column``), for ``by_series``.
        by_series: Also build one row per series x forecast (``sums`` made with it).
        hint: What to do about a competing forecast missing in every window cell with
            demand, when a longer window cannot help (None: the general hint).

    Raises:
        TriageError: No window cell has demand and every forecast.
    """
    if sums.cells.sum() == 0:
        worst = names[int(np.argmax(sums.missing))]
        advice = (
            "Each forecast must be present in the same periods; naive needs the previous "
            "period's actual"
            + (f", snaive the actual {season} periods back" if season > 1 else "")
            + ". Try a longer --window"
            + (" or a smaller --season." if season > 1 else ".")
        )
        if hint is not None and worst not in BUILT_IN and sums.missing.max() == sums.window_cells:
            advice = hint(worst) or advice
        raise TriageError(
            f"{path}: no cell of the scoring window ({len(cols)} latest periods with "
            f"actual demand) has demand and every compared forecast ({', '.join(names)}); "
            f"{worst} is missing in {int(sums.missing.max()):,} of the "
            f"{sums.window_cells:,} cells with demand.",
            hint=advice,
        )
    series = _series_measures(sums, names, sums.scale, chain)
    table = _portfolio_table(sums, series, names, chain, lags)
    return Comparison(
        names=names,
        steps=chain,
        season=season,
        columns=cols,
        series=len(sums.cells),
        window_cells=int(sums.window_cells),
        cells=int(sums.cells.sum()),
        missing={n: int(m) for n, m in zip(names, sums.missing, strict=True)},
        periods=int((sums.period_cells > 0).sum()),
        test_lags=lags,
        table=table,
        verdict=verdict(table),
        by_series=(
            _series_table(key_columns, text, sums, series, names, chain) if by_series else None
        ),
    )


def _no_history_hint(portfolio: Portfolio, name: str, first: int) -> str | None:
    """What to do about a competing forecast missing in every window cell with demand, when a
    longer window cannot help (it has no value before the window either); None when it can."""
    values = portfolio.competing[name]
    if isinstance(values, ColumnSpan) and values.start == first:
        # Read over the window only (``compare`` at scale): the reader noted what lay outside.
        earlier, forward = values.values_before, values.values_after
    else:
        earlier = bool((~np.isnan(values[:, :first])).any())
        forward = bool((~np.isnan(values[:, portfolio.last_actual + 1 :])).any())
    if earlier:
        return None
    column = f"{schema.COMPETING_PREFIX}{name}"
    said = "has values only in the forward periods" if forward else "is empty"
    return (
        f"The column {column} {said}: fill in its values for the periods with actual demand, "
        "or remove the column from the file to compare the other forecasts."
    )


@dataclass(frozen=True)
class LastStep:
    """Value destroyed by the last process step, per series (``triage rank --by fva``).

    Attributes:
        previous: The step before the last (default: the last ``forecast_<name>`` column in
            file order, ``naive`` when the file has none).
        final: The last step (default ``forecast``).
        loss: Σ|e_final| − Σ|e_previous| over the series' window cells where demand and both
            forecasts are present, in units (positive = the last step added error); NaN for a
            series without such a cell.
        loss_value: The same sum with each cell's difference times its price (priced
            portfolios; None otherwise).
        cells: The cells each sum is over.
    """

    previous: str
    final: str
    loss: np.ndarray
    loss_value: np.ndarray | None
    cells: np.ndarray


def last_step(
    portfolio: Portfolio, season: int = SEASON.default, steps: Sequence[str] | None = None
) -> tuple[str, str]:
    """(previous, final): the last two of ``steps``, by default of :func:`default_steps`.

    Without ``steps`` the file's columns are taken as they are (``forecast`` last, the last
    ``forecast_<name>`` column before it, else ``naive``), so a file ``triage compare`` refuses
    for a column named like a built-in forecast still ranks.

    Raises:
        TriageError: ``steps`` holds fewer than two forecasts, or a name :func:`parse_steps`
            refuses.
    """
    if steps is None:
        return (list(portfolio.competing)[-1] if portfolio.competing else NAIVE), FORECAST
    chain = parse_steps(",".join(steps), forecast_names(portfolio, season))
    if len(chain) < 2:
        raise TriageError(
            f"--steps {','.join(chain)}: one forecast is not a process step to rank by.",
            hint="List at least two forecasts; the last step's value added is measured "
            "against the one before it (e.g. --steps naive,stat,forecast).",
        )
    return chain[-2], chain[-1]


def last_step_loss(
    portfolio: Portfolio,
    cols: np.ndarray,
    season: int = SEASON.default,
    steps: Sequence[str] | None = None,
) -> LastStep:
    """Per series, the value the last process step destroyed over the window columns ``cols``.

    Forecast value added (Gilliland 2010, docs/sources.md §3.1) of the last step, negated:
    loss = Σ (|e_final| − |e_previous|) over the cells where demand, the final forecast and the
    previous step are all present; × price per cell in value. Vectorised over blocks of series.

    Args:
        portfolio: The portfolio.
        cols: The scoring window's calendar columns (``metrics.window_columns``).
        season: Season m of ``snaive`` when ``steps`` names it.
        steps: The process steps (:func:`last_step`); None for the default chain.
    """
    previous, final = last_step(portfolio, season, steps)
    if steps is None:
        before: tuple[np.ndarray, int] = (
            (portfolio.competing[previous], 0) if portfolio.competing else (portfolio.demand, 1)
        )
        after: tuple[np.ndarray, int] = (portfolio.forecast, 0)
    else:
        before, after = _source(portfolio, previous, season), _source(portfolio, final, season)
    n = portfolio.n_series
    cols = np.asarray(cols)
    loss = np.zeros(n)
    cells = np.zeros(n, dtype=np.int64)
    loss_value = np.zeros(n) if portfolio.price is not None else None
    for rows in metrics._row_blocks(n, len(cols)):
        # Periods x series, as in the window measures: the sums add whole rows.
        d = _window(portfolio.demand, rows, cols)
        f = _window(after[0], rows, cols, after[1])
        p = _window(before[0], rows, cols, before[1])
        diff = np.abs(f - d)
        diff -= np.abs(p - d)
        ok = ~np.isnan(diff)
        diff[~ok] = 0.0
        cells[rows] = ok.sum(axis=0)
        loss[rows] = diff.sum(axis=0)
        if loss_value is not None and portfolio.price is not None:
            # Prices are filled along each series (never missing): 0 × price where no cell.
            loss_value[rows] = (diff * portfolio.price[rows, cols].T).sum(axis=0)
    none = cells == 0
    loss[none] = np.nan
    if loss_value is not None:
        loss_value[none] = np.nan
    return LastStep(previous, final, loss, loss_value, cells)


@dataclass
class Sums:
    """Per series (columns: one per forecast) and per period sums over the compared cells.

    The sums of a portfolio's parts that each hold whole series join into the whole's
    (:meth:`join`): the per-series rows are the parts' rows, the per-period sums and counts
    their totals.
    """

    cells: np.ndarray  # n
    demand: np.ndarray  # n
    ape_cells: np.ndarray  # n: compared cells with demand > 0
    abs_error: np.ndarray  # n x K
    bias: np.ndarray  # n x K
    sq_error: np.ndarray  # n x K
    ape: np.ndarray  # n x K: Σ |e| / demand over cells with demand > 0
    capped: np.ndarray  # n x K: Σ min(|e| / demand, 1), 1 where demand <= 0
    abs_value: np.ndarray | None  # n x K
    bias_value: np.ndarray | None  # n x K
    period_abs: np.ndarray  # K x W: Σ over series of |e| per period
    period_cells: np.ndarray  # W
    series_p: np.ndarray | None  # n x S: per-series test p of each step (NaN for the first)
    series_stat: np.ndarray | None  # n x S
    window_cells: int
    missing: np.ndarray  # K
    scale: np.ndarray  # n: the MASE scale (``Portfolio.naive_scale``)

    @classmethod
    def join(cls, parts: Sequence[Sums], order: np.ndarray) -> Sums:
        """The sums of several parts' series as one portfolio's.

        Args:
            parts: Each part's sums (made with the same forecasts, window and options).
            order: Positions in the parts' series, one after the other, in portfolio order.

        The per-period sums are added part by part: they may differ from a single portfolio's
        in the last bits (the order of the additions); the per-series ones are the same.
        """
        first = parts[0]

        def rows(field: str) -> np.ndarray | None:
            if getattr(first, field) is None:
                return None
            joined: np.ndarray = np.concatenate([getattr(p, field) for p in parts])[order]
            return joined

        def total(field: str) -> np.ndarray:
            added: np.ndarray = np.sum([getattr(p, field) for p in parts], axis=0)
            return added

        per_series = (
            "cells", "demand", "ape_cells", "abs_error", "bias", "sq_error", "ape", "capped",
            "abs_value", "bias_value", "series_p", "series_stat", "scale",
        )  # fmt: skip
        return cls(
            **{field: rows(field) for field in per_series},  # type: ignore[arg-type]
            period_abs=total("period_abs"),
            period_cells=total("period_cells"),
            missing=total("missing"),
            window_cells=sum(p.window_cells for p in parts),
        )


def _source(portfolio: Portfolio, name: str, season: int) -> tuple[np.ndarray, int]:
    """Where a forecast's values are: (matrix, shift), the value of column c at ``c - shift``."""
    if name == FORECAST:
        return portfolio.forecast, 0
    if name == NAIVE:
        return portfolio.demand, 1
    if name == SNAIVE:
        return portfolio.demand, season
    return portfolio.competing[name], 0


def _window(matrix: np.ndarray, rows: slice, cols: np.ndarray, shift: int = 0) -> np.ndarray:
    """``matrix[rows, cols - shift]`` transposed (periods x series, contiguous), NaN where
    ``cols - shift`` falls before the calendar."""
    block = matrix[rows]
    source = cols - shift
    if len(source) and source[0] >= 0 and source[-1] - source[0] == len(source) - 1:
        # Adjacent columns (nearly always): one copy of a slice.
        adjacent: np.ndarray = np.ascontiguousarray(block[:, source[0] : source[-1] + 1].T)
        return adjacent
    out = np.full((len(cols), block.shape[0]), np.nan)
    inside = source >= 0
    out[inside] = block[:, source[inside]].T
    return out


@dataclass(frozen=True)
class SeriesScore:
    """One forecast of one series over the series' compared window cells.

    Attributes:
        name: The forecast (``forecast``, a competing name, ``naive``, ``snaive``).
        cells: Window cells where demand and every compared forecast are present.
        demand: Σ demand over those cells.
        abs_error: Σ|e| over those cells.
        bias: Σe over those cells (e = forecast − demand).
    """

    name: str
    cells: int
    demand: float
    abs_error: float
    bias: float

    @property
    def wape(self) -> float:
        """Σ|e| / Σdemand, NaN unless Σdemand > 0."""
        return self.abs_error / self.demand if self.demand > 0 else float("nan")

    @property
    def bias_pct(self) -> float:
        """Σe / Σdemand, NaN unless Σdemand > 0."""
        return self.bias / self.demand if self.demand > 0 else float("nan")


def series_scores(
    portfolio: Portfolio, series: int, cols: np.ndarray, season: int = SEASON.default
) -> tuple[SeriesScore, ...]:
    """Every forecast of one series on the same window cells, as ``compare --by-series`` counts
    them (the review screens' metrics card; one row of numpy, cheap on every cursor move).

    Args:
        portfolio: The portfolio.
        series: Row of the series.
        cols: The window's calendar columns (``metrics.window_columns``).
        season: Season m of ``snaive`` (listed only when m > 1).

    Raises:
        TriageError: A competing forecast is named like a built-in one.
    """
    names = forecast_names(portfolio, season)
    rows = slice(series, series + 1)
    d = _window(portfolio.demand, rows, cols)[:, 0]
    f = [
        _window(matrix, rows, cols, shift)[:, 0]
        for matrix, shift in (_source(portfolio, name, season) for name in names)
    ]
    both = ~np.isnan(d)
    for values in f:
        both &= ~np.isnan(values)
    cells = int(both.sum())
    demand = float(d[both].sum())
    return tuple(
        SeriesScore(
            name=name,
            cells=cells,
            demand=demand,
            abs_error=float(np.abs(values[both] - d[both]).sum()),
            bias=float((values[both] - d[both]).sum()),
        )
        for name, values in zip(names, f, strict=True)
    )


def block_sums(
    portfolio: Portfolio,
    names: tuple[str, ...],
    cols: np.ndarray,
    season: int,
    chain: tuple[str, ...],
    lags: int,
    *,
    by_series: bool,
) -> Sums:
    """Every series' sums over its compared window cells, and their per-period totals.

    Args:
        portfolio: The portfolio (or a part of a dataset holding whole series, on its calendar).
        names: The forecasts (:func:`forecast_names`); cols: the window's columns.
        season: Season m of ``snaive`` and of the MASE scale.
        chain: The value-added steps; lags: the test's autocovariance lags.
        by_series: Also each series' test of each step.
    """
    n, k, w = portfolio.n_series, len(names), len(cols)
    sources = [_source(portfolio, name, season) for name in names]
    priced = portfolio.price is not None
    per_k = ("abs_error", "bias", "sq_error", "ape", "capped")
    out = {field: np.zeros((n, k)) for field in per_k}
    value = {field: np.zeros((n, k)) for field in ("abs_value", "bias_value")} if priced else {}
    cells = np.zeros(n, dtype=np.int64)
    demand_sum = np.zeros(n)
    ape_cells = np.zeros(n, dtype=np.int64)
    period_abs = np.zeros((k, w))
    period_cells = np.zeros(w, dtype=np.int64)
    missing = np.zeros(k, dtype=np.int64)
    window_cells = 0
    index = {name: i for i, name in enumerate(names)}
    pairs = list(itertools.pairwise(chain))
    series_p = np.full((n, len(chain)), np.nan) if by_series else None
    series_stat = np.full((n, len(chain)), np.nan) if by_series else None
    for lo in range(0, n, _ROWS):
        rows = slice(lo, min(lo + _ROWS, n))
        # Periods x series (one contiguous row per period): the sums over each series' few
        # cells become additions of whole rows, several times faster than short reductions.
        d = _window(portfolio.demand, rows, cols)
        f = [_window(matrix, rows, cols, shift) for matrix, shift in sources]
        has_demand = ~np.isnan(d)
        window_cells += int(has_demand.sum())
        both = has_demand.copy()
        for i, values in enumerate(f):
            present = ~np.isnan(values)
            missing[i] += int((has_demand & ~present).sum())
            both &= present
        safe_d = np.where(both, d, 0.0)
        positive = both & (d > 0)
        cells[rows] = both.sum(axis=0)
        demand_sum[rows] = safe_d.sum(axis=0)
        ape_cells[rows] = positive.sum(axis=0)
        period_cells += both.sum(axis=1)
        price = portfolio.price[rows, cols].T if portfolio.price is not None else None
        safe_price = np.where(both, price, 0.0) if price is not None else None
        safe_den = np.where(positive, d, 1.0)
        abs_cells: list[np.ndarray] = []
        for i, values in enumerate(f):
            error = np.where(both, values - d, 0.0)
            size = np.abs(error)
            abs_cells.append(size)
            out["abs_error"][rows, i] = size.sum(axis=0)
            out["bias"][rows, i] = error.sum(axis=0)
            out["sq_error"][rows, i] = (error * error).sum(axis=0)
            ape = np.where(positive, size / safe_den, 0.0)
            out["ape"][rows, i] = ape.sum(axis=0)
            # The spreadsheet repair: each ratio capped at 1, demand <= 0 counted as 1.
            capped = np.where(positive, np.minimum(ape, 1.0), np.where(both, 1.0, 0.0))
            out["capped"][rows, i] = capped.sum(axis=0)
            period_abs[i] += size.sum(axis=1)
            if safe_price is not None:
                value["abs_value"][rows, i] = (size * safe_price).sum(axis=0)
                value["bias_value"][rows, i] = (error * safe_price).sum(axis=0)
        if series_p is not None and series_stat is not None:
            for s, (before, after) in enumerate(pairs, start=1):
                diff = abs_cells[index[before]] - abs_cells[index[after]]
                stat, p = diebold_mariano(diff.T, both.T, lags)
                series_stat[rows, s] = stat
                series_p[rows, s] = p
    return Sums(
        cells=cells,
        demand=demand_sum,
        ape_cells=ape_cells,
        abs_error=out["abs_error"],
        bias=out["bias"],
        sq_error=out["sq_error"],
        ape=out["ape"],
        capped=out["capped"],
        abs_value=value.get("abs_value"),
        bias_value=value.get("bias_value"),
        period_abs=period_abs,
        period_cells=period_cells,
        series_p=series_p,
        series_stat=series_stat,
        window_cells=window_cells,
        missing=missing,
        scale=np.asarray(portfolio.naive_scale(season), dtype=np.float64),
    )


def diebold_mariano(
    differential: np.ndarray, counted: np.ndarray, lags: int = 0
) -> tuple[np.ndarray, np.ndarray]:
    """Diebold–Mariano statistic and two-sided p-value of each row's mean loss differential.

    Each row is one test over its counted periods (T of them): d̄ = mean of the counted
    differentials; the long-run variance is γ0 + 2 Σ_{j=1..L} (1 − j/(L+1)) γj, γj =
    (1/T) Σ_t u_t u_{t−j} over counted pairs (u = d − d̄; Newey & West 1987, "A simple, positive
    semi-definite, heteroskedasticity and autocorrelation consistent covariance matrix");
    DM = d̄ / √(variance / T), multiplied by √((T + 1 − 2h + h(h − 1)/T) / T) with h = L + 1
    (Harvey, Leybourne & Newbold 1997) and compared with Student's t, T − 1 degrees of freedom.

    Args:
        differential: rows x periods, loss of the first forecast minus loss of the second.
        counted: Which cells count (same shape).
        lags: L, the autocovariance lags (h − 1 for forecasts h periods ahead).

    Returns:
        (statistic, p) per row: NaN with fewer than 2 counted periods or a non-positive
        correction; a row whose differential is the same nonzero value throughout (variance 0)
        has no p either; a row of zero differentials has statistic 0 and p 1.
    """
    counted = np.asarray(counted, dtype=bool)
    t = counted.sum(axis=1).astype(np.float64)
    d = np.where(counted, differential, 0.0)
    mean = metrics._ratio(d.sum(axis=1), t)
    u = np.where(counted, d - np.nan_to_num(mean)[:, None], 0.0)
    variance = (u * u).sum(axis=1)
    for j in range(1, lags + 1):
        if j >= u.shape[1]:
            break
        weight = 1.0 - j / (lags + 1)
        variance = variance + 2.0 * weight * (u[:, j:] * u[:, :-j]).sum(axis=1)
    variance = metrics._ratio(variance, t)
    h = lags + 1
    correction = metrics._ratio(t + 1 - 2 * h + h * (h - 1) / np.where(t > 0, t, 1.0), t)
    ok = (t >= 2) & (correction > 0) & (variance > 0)
    stat = np.full(len(t), np.nan)
    np.divide(mean, np.sqrt(np.where(ok, variance, 1.0) / np.where(ok, t, 1.0)), out=stat, where=ok)
    stat = np.where(ok, stat * np.sqrt(np.where(ok, correction, 0.0)), np.nan)
    p = np.full(len(t), np.nan)
    # Imported here: scipy.stats costs 0.7 s of start-up, and `triage rank` (which reads this
    # module for fva_loss) never runs the test (docs/performance.md, "Scoring").
    from scipy import stats

    p[ok] = 2.0 * stats.t.sf(np.abs(stat[ok]), t[ok] - 1)
    # Identical losses throughout: no difference to test.
    same = (t >= 2) & (variance == 0) & (mean == 0)
    stat[same] = 0.0
    p[same] = 1.0
    return stat, p


@dataclass(frozen=True)
class _SeriesMeasures:
    """Per series x forecast measures (n x K)."""

    mase: np.ndarray
    scale_undefined: np.ndarray  # n, bool: compared cells but no usable MASE scale
    best: np.ndarray  # n x K bool
    fva_units: np.ndarray  # n x K
    fva_pct: np.ndarray  # n x K


def _series_measures(
    sums: Sums, names: tuple[str, ...], scale: np.ndarray, chain: tuple[str, ...]
) -> _SeriesMeasures:
    cells = sums.cells.astype(np.float64)[:, None]
    mae = metrics._ratio(sums.abs_error, cells)
    usable = np.isfinite(scale) & (scale > 0)
    mase = metrics._ratio(mae, np.where(usable, scale, 0.0)[:, None])
    compared = sums.cells > 0
    lowest = sums.abs_error.min(axis=1, keepdims=True)
    best = compared[:, None] & (sums.abs_error == lowest)
    fva_units, fva_pct = _fva(sums.abs_error, names, chain)
    fva_units[~compared] = np.nan
    fva_pct[~compared] = np.nan
    return _SeriesMeasures(
        mase=mase,
        scale_undefined=compared & ~usable,
        best=best,
        fva_units=fva_units,
        fva_pct=fva_pct,
    )


def _fva(
    abs_error: np.ndarray, names: tuple[str, ...], chain: tuple[str, ...]
) -> tuple[np.ndarray, np.ndarray]:
    """``fva_units`` and ``fva_pct`` (rows x K) of every step after the first; NaN elsewhere."""
    units = np.full(abs_error.shape, np.nan)
    pct = np.full(abs_error.shape, np.nan)
    for before, after in itertools.pairwise(chain):
        i, j = names.index(before), names.index(after)
        units[:, j] = abs_error[:, i] - abs_error[:, j]
        pct[:, j] = metrics._ratio(units[:, j], abs_error[:, i])
    return units, pct


def min_rank(values: np.ndarray) -> np.ndarray:
    """Rank along the last axis, 1 = lowest, ties share the lowest rank; NaN stays NaN."""
    values = np.asarray(values, dtype=np.float64)
    defined = ~np.isnan(values)
    below = (values[..., None, :] < values[..., :, None]) & defined[..., None, :]
    rank = 1.0 + below.sum(axis=-1)
    return np.where(defined, rank, np.nan)


def _portfolio_table(
    sums: Sums,
    series: _SeriesMeasures,
    names: tuple[str, ...],
    chain: tuple[str, ...],
    lags: int,
) -> pd.DataFrame:
    k = len(names)
    cells = float(sums.cells.sum())
    demand = float(sums.demand.sum())
    abs_error = sums.abs_error.sum(axis=0)
    bias = sums.bias.sum(axis=0)
    wape = metrics._ratio(abs_error, np.full(k, demand))
    ape_cells = float(sums.ape_cells.sum())
    mape = metrics._ratio(sums.ape.sum(axis=0), np.full(k, ape_cells))
    defined = ~np.isnan(series.mase)
    mase_count = defined.sum(axis=0)
    mase = metrics._ratio(np.where(defined, series.mase, 0.0).sum(axis=0), mase_count)
    fva_units, fva_pct = _fva(abs_error[None, :], names, chain)
    # The test on the portfolio's loss differential per period (Σ over series of the cells).
    p = np.full(k, np.nan)
    stat = np.full(k, np.nan)
    counted = (sums.period_cells > 0)[None, :]
    for before, after in itertools.pairwise(chain):
        i, j = names.index(before), names.index(after)
        diff = (sums.period_abs[i] - sums.period_abs[j])[None, :]
        s, pv = diebold_mariano(diff, counted, lags)
        stat[j], p[j] = s[0], pv[0]
    step = _whole(np.array([chain.index(n) + 1 if n in chain else np.nan for n in names]))
    data: dict[str, object] = {
        "forecast_name": list(names),
        "step": step,
        "cells": np.full(k, int(cells), dtype=np.int64),
        "demand": np.full(k, demand),
        "abs_error": abs_error,
        "bias": bias,
        "bias_pct": metrics._ratio(bias, np.full(k, demand)),
        "wape": wape,
        "mae": metrics._ratio(abs_error, np.full(k, cells)),
        "rmse": np.sqrt(metrics._ratio(sums.sq_error.sum(axis=0), np.full(k, cells))),
    }
    if sums.abs_value is not None and sums.bias_value is not None:
        data["abs_error_value"] = sums.abs_value.sum(axis=0)
        data["bias_value"] = sums.bias_value.sum(axis=0)
    data.update(
        mase=mase,
        mase_series=np.full(k, int(series.scale_undefined.sum()), dtype=np.int64),
        mape=mape,
        mape_cells_dropped=np.full(k, int(cells - ape_cells), dtype=np.int64),
        mape_capped=metrics._ratio(sums.capped.sum(axis=0), np.full(k, cells)),
        rank_wape=_ranks(wape),
        rank_mape=_ranks(mape),
        fva_units=fva_units[0],
        fva_pct=fva_pct[0],
        p=p,
        dm_stat=stat,
        series_best=series.best.sum(axis=0).astype(np.int64),
    )
    return pd.DataFrame(data)


def _ranks(values: np.ndarray) -> pd.api.extensions.ExtensionArray:
    return _whole(min_rank(values))


def _whole(values: np.ndarray) -> pd.api.extensions.ExtensionArray:
    """Whole numbers held as floats -> a nullable integer column (NaN -> missing)."""
    missing = np.isnan(values)
    return pd.arrays.IntegerArray(np.where(missing, 0, values).astype(np.int64), missing)


def verdict(table: pd.DataFrame) -> Verdict:
    """The plain-words verdict of a portfolio table (see :class:`Verdict`)."""
    names = list(table["forecast_name"])
    wape = table["wape"].to_numpy(dtype=np.float64)
    bias_pct = table["bias_pct"].to_numpy(dtype=np.float64)
    mape = table["mape"].to_numpy(dtype=np.float64)
    # The same materiality as the persistent-bias flag (metrics.BIAS_MATERIAL), same slack.
    limit = metrics.BIAS_MATERIAL * (1 - 1e-12)
    acceptable = np.abs(bias_pct) < limit
    best = _lowest(wape, acceptable)
    lowest_wape = _lowest(wape, np.ones(len(wape), dtype=bool))
    mape_pick = _lowest(mape, np.ones(len(mape), dtype=bool))
    reference = best if best is not None else lowest_wape
    warning = (
        mape_pick is not None and mape_pick != reference and bool(bias_pct[mape_pick] <= -limit)
    )
    return Verdict(
        best=None if best is None else names[best],
        lowest_wape=None if lowest_wape is None else names[lowest_wape],
        mape_pick=None if mape_pick is None else names[mape_pick],
        mape_warning=warning,
    )


def _lowest(values: np.ndarray, allowed: np.ndarray) -> int | None:
    """Position of the lowest defined allowed value (the first on ties), or None."""
    ok = allowed & ~np.isnan(values)
    if not ok.any():
        return None
    return int(np.flatnonzero(ok)[np.argmin(values[ok])])


def _series_table(
    key_columns: tuple[str, ...],
    text: Callable[[str, np.ndarray], pd.api.extensions.ExtensionArray],
    sums: Sums,
    series: _SeriesMeasures,
    names: tuple[str, ...],
    chain: tuple[str, ...],
) -> pd.DataFrame:
    """One row per series x forecast: series in portfolio order, forecasts in table order."""
    n, k = sums.abs_error.shape
    order = np.repeat(np.arange(n), k)
    data: dict[str, object] = {c: text(c, order) for c in key_columns}

    def flat(values: np.ndarray) -> np.ndarray:
        flattened: np.ndarray = np.ascontiguousarray(values).reshape(-1)
        return flattened

    cells = np.repeat(sums.cells, k)
    cells_f = cells.astype(np.float64)
    demand = np.repeat(sums.demand, k)
    step_of = np.array([chain.index(nm) + 1 if nm in chain else np.nan for nm in names])
    data["forecast_name"] = pd.array(np.tile(np.array(names, dtype=object), n), dtype="string")
    data["step"] = _whole(np.tile(step_of, n))
    data["cells"] = cells
    data["demand"] = np.where(cells > 0, demand, np.nan)
    abs_error = np.where(cells > 0, flat(sums.abs_error), np.nan)
    bias = np.where(cells > 0, flat(sums.bias), np.nan)
    data["abs_error"] = abs_error
    data["bias"] = bias
    data["bias_pct"] = metrics._ratio(bias, demand)
    wape = metrics._ratio(sums.abs_error, sums.demand[:, None])
    data["wape"] = flat(wape)
    data["mae"] = metrics._ratio(abs_error, cells_f)
    data["rmse"] = np.sqrt(metrics._ratio(flat(sums.sq_error), cells_f))
    if sums.abs_value is not None and sums.bias_value is not None:
        data["abs_error_value"] = np.where(cells > 0, flat(sums.abs_value), np.nan)
        data["bias_value"] = np.where(cells > 0, flat(sums.bias_value), np.nan)
    data["mase"] = flat(series.mase)
    data["mase_series"] = np.repeat(series.scale_undefined.astype(np.int64), k)
    mape = metrics._ratio(sums.ape, sums.ape_cells.astype(np.float64)[:, None])
    data["mape"] = flat(mape)
    data["mape_cells_dropped"] = np.repeat(sums.cells - sums.ape_cells, k)
    data["mape_capped"] = flat(metrics._ratio(sums.capped, sums.cells.astype(np.float64)[:, None]))
    for column, values in (("rank_wape", wape), ("rank_mape", mape)):
        data[column] = _whole(flat(min_rank(values)))
    data["fva_units"] = flat(series.fva_units)
    data["fva_pct"] = flat(series.fva_pct)
    p = np.full((n, k), np.nan)
    stat = np.full((n, k), np.nan)
    if sums.series_p is not None and sums.series_stat is not None:
        for s, name in enumerate(chain):
            if s:
                p[:, names.index(name)] = sums.series_p[:, s]
                stat[:, names.index(name)] = sums.series_stat[:, s]
    data["p"] = flat(p)
    data["dm_stat"] = flat(stat)
    data["best"] = flat(series.best)
    return pd.DataFrame(data, copy=False)
