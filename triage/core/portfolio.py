"""Dense series x period arrays built from a loaded long frame.

Scoring works on matrices: one row per series, one column per calendar period, NaN where the file
has no value. Building them is a scatter of the long rows into NaN-filled arrays, after the checks
that need the whole portfolio at once: a regular calendar, no duplicate (series, period, lag) rows,
one lag, and some actual demand.

Forward periods are the calendar periods after the portfolio's latest actual period; their
forecast is the forward forecast a reviewer may override. A history row with empty demand is a
missing actual, never a zero.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import TYPE_CHECKING, Protocol

import numpy as np
import pandas as pd

from triage.core import schema
from triage.core.errors import LoadError, format_rows

if TYPE_CHECKING:
    from collections.abc import Sequence

#: How many example rows an error message shows.
EXAMPLES = 5


class LoadedLike(Protocol):
    """What the builder needs from a loaded file (see ``triage.core.load.LoadedFrame``)."""

    frame: pd.DataFrame
    path: Path
    first_row: int
    attributes: tuple[str, ...]
    notices: tuple[str, ...]

    def rows(self, index: Sequence[int] | np.ndarray) -> list[int]: ...


@dataclass(frozen=True)
class Calendar:
    """A regular calendar of weekly or monthly periods."""

    freq: str
    """``schema.WEEKLY`` or ``schema.MONTHLY``."""
    periods: pd.DatetimeIndex
    """Every period from the first to the last in the file, gaps included."""

    def label(self, index: int) -> str:
        """ISO text of period ``index``: ``2026-11-23`` (weekly) or ``2026-11`` (monthly)."""
        stamp = self.periods[index]
        return stamp.strftime("%Y-%m") if self.freq == schema.MONTHLY else stamp.strftime("%Y-%m-%d")


@dataclass(frozen=True)
class Portfolio:
    """A scored-ready portfolio: keys, attributes and dense arrays aligned on series and periods.

    Series are ordered by key (item, then location), ascending, so index order is the tie-break
    order of every ranking.
    """

    path: Path
    """The portfolio file."""
    keys: pd.DataFrame
    """One row per series: the key columns, then the attribute columns (text)."""
    key_columns: tuple[str, ...]
    """``("item",)`` or ``("item", "location")``."""
    attributes: tuple[str, ...]
    """Attribute column names, in file order."""
    calendar: Calendar
    """The periods the columns of the arrays stand for."""
    demand: np.ndarray
    """Actual demand, series x periods, float64, NaN where missing (and in forward periods)."""
    forecast: np.ndarray
    """Forecast at the chosen lag for history periods, the forward forecast after them; NaN where missing."""
    price: np.ndarray | None
    """Unit value, series x periods, float64, filled along each series; None without a price column."""
    last_actual: int
    """Column of the portfolio's latest period with any actual demand."""
    lag: int | None
    """The forecast lag scored, None when the file has no lag column."""
    lags: tuple[int, ...]
    """Every lag found in the history rows."""
    rows: int
    """Rows read from the file."""
    notices: tuple[str, ...] = field(default=())
    """Things the user should know that did not stop the load."""

    @property
    def n_series(self) -> int:
        """Number of series."""
        return len(self.keys)

    @property
    def n_forward(self) -> int:
        """Number of forward periods (after the latest actual period)."""
        return len(self.calendar.periods) - self.last_actual - 1

    @property
    def cycle(self) -> str:
        """The review cycle: the ISO date of the latest actual period."""
        return self.calendar.periods[self.last_actual].strftime("%Y-%m-%d")

    @cached_property
    def fingerprint(self) -> str:
        """SHA-256 of the portfolio file, so a decision can be traced to the data it was made on."""
        digest = hashlib.sha256()
        with self.path.open("rb") as handle:
            for chunk in iter(lambda: handle.read(1 << 20), b""):
                digest.update(chunk)
        return digest.hexdigest()

    def key_text(self, index: int) -> str:
        """``item`` or ``item @ location`` of series ``index``, for messages."""
        return " @ ".join(str(self.keys.iloc[index][c]) for c in self.key_columns)


def build_portfolio(loaded: LoadedLike, *, lag: int | None = None) -> Portfolio:
    """Check the whole-portfolio rules and scatter the long rows into dense arrays.

    Args:
        loaded: A validated long frame (canonical columns) and where it came from.
        lag: The forecast lag to score; required when the history holds more than one lag.

    Raises:
        LoadError: Irregular calendar, duplicate rows, several lags without ``lag``, an unknown
            lag, no actual demand at all, or a series without any price in a priced file.
    """
    frame = loaded.frame
    path = loaded.path
    if frame.empty:
        raise LoadError(path, "the file has no data rows.", hint="Add rows with item, period, demand and forecast.")
    key_columns = tuple(c for c in schema.KEY_ORDER if c in frame.columns)

    series, keys_unique = _series_codes(frame, key_columns)
    calendar, period = _calendar_codes(loaded)
    n_series, n_periods = len(keys_unique), len(calendar.periods)

    demand_col = frame[schema.DEMAND].to_numpy(dtype=np.float64)
    forecast_col = frame[schema.FORECAST].to_numpy(dtype=np.float64)
    actual = ~np.isnan(demand_col)
    if not actual.any():
        raise LoadError(
            path,
            "no row has actual demand: every demand cell is empty, so nothing can be scored.",
            hint="Include the demand history, not only the forward forecast.",
        )
    last_actual = int(period[actual].max())
    forward = period > last_actual

    has_lag = schema.LAG in frame.columns
    lag_col = frame[schema.LAG].to_numpy(dtype=np.int64) if has_lag else np.zeros(len(frame), np.int64)
    _check_duplicates(loaded, series, period, lag_col, key_columns, n_series, n_periods)

    lags = tuple(int(v) for v in np.unique(lag_col[~forward])) if has_lag else ()
    chosen = _choose_lag(path, lags, lag) if has_lag else None

    cell = series.astype(np.int64) * n_periods + period
    demand = np.full(n_series * n_periods, np.nan)
    forecast = np.full(n_series * n_periods, np.nan)

    history = ~forward
    scored = history & (lag_col == chosen) if has_lag else history
    demand[cell[scored]] = demand_col[scored]
    forecast[cell[scored]] = forecast_col[scored]
    if has_lag and len(lags) > 1:
        _merge_other_lag_demand(loaded, demand, cell, demand_col, history)

    if forward.any():
        # Forward periods keep the most recent snapshot: the smallest lag per (series, period).
        fwd = np.flatnonzero(forward)
        fwd = fwd[np.lexsort((lag_col[fwd], cell[fwd]))]
        first = np.ones(len(fwd), dtype=bool)
        first[1:] = cell[fwd][1:] != cell[fwd][:-1]
        fwd = fwd[first]
        forecast[cell[fwd]] = forecast_col[fwd]

    price = None
    notices = list(loaded.notices)
    if schema.PRICE in frame.columns:
        price, note = _price_matrix(loaded, series, cell, keys_unique, key_columns, n_series, n_periods)
        if note:
            notices.append(note)

    keys = _series_table(frame, keys_unique, key_columns, loaded.attributes, series, period)
    return Portfolio(
        path=path,
        keys=keys,
        key_columns=key_columns,
        attributes=tuple(loaded.attributes),
        calendar=calendar,
        demand=demand.reshape(n_series, n_periods),
        forecast=forecast.reshape(n_series, n_periods),
        price=price,
        last_actual=last_actual,
        lag=chosen,
        lags=lags,
        rows=len(frame),
        notices=tuple(notices),
    )


def read_portfolio(
    path: str | Path,
    *,
    columns: dict[str, str] | None = None,
    sheet: str | None = None,
    lag: int | None = None,
) -> Portfolio:
    """Load a portfolio file and build its arrays (see ``load.load_frame`` and ``build_portfolio``)."""
    from triage.core.load import load_frame

    return build_portfolio(load_frame(path, columns=columns, sheet=sheet), lag=lag)


def _codes(column: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """Sorted integer codes of a text column and the sorted unique values."""
    if isinstance(column.dtype, pd.CategoricalDtype):
        categories = column.cat.categories.to_numpy(dtype=object)
        order = np.argsort(categories.astype(str), kind="stable")
        remap = np.empty(len(order), dtype=np.int64)
        remap[order] = np.arange(len(order))
        raw = column.cat.codes.to_numpy()
        codes = remap[raw]
        used = np.zeros(len(order), dtype=bool)
        used[codes] = True
        if not used.all():
            # Drop categories no row uses so the series count is honest.
            renumber = np.cumsum(used) - 1
            return renumber[codes], categories[order][used]
        return codes, categories[order]
    codes, uniques = pd.factorize(column, sort=True)
    return codes.astype(np.int64), np.asarray(uniques, dtype=object)


def _series_codes(frame: pd.DataFrame, key_columns: tuple[str, ...]) -> tuple[np.ndarray, pd.DataFrame]:
    """One integer per series, numbered in key order, and the table of unique keys."""
    item_codes, item_values = _codes(frame[schema.ITEM])
    if len(key_columns) == 1:
        return item_codes, pd.DataFrame({schema.ITEM: item_values})
    loc_codes, loc_values = _codes(frame[schema.LOCATION])
    combined = item_codes * len(loc_values) + loc_codes
    # Both codes are dense and sorted, so the pairs in use number themselves in key order.
    used = np.zeros(len(item_values) * len(loc_values), dtype=bool)
    used[combined] = True
    pairs = np.flatnonzero(used)
    renumber = np.cumsum(used, dtype=np.int64) - 1
    series = renumber[combined]
    keys = pd.DataFrame(
        {
            schema.ITEM: item_values[pairs // len(loc_values)],
            schema.LOCATION: loc_values[pairs % len(loc_values)],
        }
    )
    return series.astype(np.int64), keys


def _calendar_codes(loaded: LoadedLike) -> tuple[Calendar, np.ndarray]:
    """Infer a weekly or monthly calendar and number every row's period on it."""
    stamps = pd.DatetimeIndex(loaded.frame[schema.PERIOD])
    uniques = stamps.unique().sort_values()
    first = uniques[0]
    if len(uniques) == 1:
        freq = schema.MONTHLY if first.day == 1 else schema.WEEKLY
    else:
        freq = _infer_freq(loaded, stamps, uniques)
    if freq == schema.WEEKLY:
        days = (stamps - first).days.to_numpy()
        codes = days // 7
        periods = pd.date_range(first, periods=int(codes.max()) + 1, freq="7D")
    else:
        months = (stamps.year.to_numpy() - first.year) * 12 + (stamps.month.to_numpy() - first.month)
        codes = months
        periods = pd.date_range(first, periods=int(codes.max()) + 1, freq="MS")
    return Calendar(freq=freq, periods=periods), codes.astype(np.int64)


def _infer_freq(loaded: LoadedLike, stamps: pd.DatetimeIndex, uniques: pd.DatetimeIndex) -> str:
    """Weekly when every period is the same weekday, monthly when every period is a month start."""
    path = loaded.path
    day_gaps = np.diff(uniques.to_numpy().astype("datetime64[D]").astype(np.int64))
    # Month starts first: February to March is 28 days, a multiple of 7.
    if (uniques.day == 1).all():
        return schema.MONTHLY
    if (day_gaps % 7 == 0).all():
        return schema.WEEKLY
    # Neither: report the periods that break the most common pattern.
    weekday = pd.Series(uniques.day_of_week).mode().iloc[0]
    if (uniques.day == 1).mean() > 0.5:
        bad = stamps.day != 1
        expected = "the first day of a month (monthly periods)"
    else:
        bad = stamps.day_of_week != weekday
        name = pd.Timestamp(uniques[uniques.day_of_week == weekday][0]).day_name()
        expected = f"a {name} (weekly periods, 7 days apart)"
    positions = np.flatnonzero(np.asarray(bad))
    examples = ", ".join(
        f"{stamps[i].strftime('%Y-%m-%d')} (row {loaded.rows([i])[0]})" for i in positions[:EXAMPLES]
    )
    raise LoadError(
        path,
        f"irregular calendar in column '{schema.PERIOD}': {len(positions)} rows are not on {expected}, "
        f"e.g. {examples}.",
        hint="Use one period per week (all the same weekday) or per month (the 1st, or YYYY-MM).",
    )


def _check_duplicates(
    loaded: LoadedLike,
    series: np.ndarray,
    period: np.ndarray,
    lag: np.ndarray,
    key_columns: tuple[str, ...],
    n_series: int,
    n_periods: int,
) -> None:
    """Refuse two rows for one (series, period, lag): they are never averaged or summed silently."""
    lag_values, lag_index = np.unique(lag, return_inverse=True)
    cell = (series.astype(np.int64) * n_periods + period) * len(lag_values) + lag_index
    seen = np.zeros(n_series * n_periods * len(lag_values), dtype=bool)
    seen[cell] = True
    if int(seen.sum()) == len(cell):
        return
    # Error path only: find the duplicated cells and show a few with their rows.
    order = np.argsort(cell, kind="stable")
    sorted_cells = cell[order]
    same = np.flatnonzero(sorted_cells[1:] == sorted_cells[:-1])
    dup_cells = np.unique(sorted_cells[same])
    frame = loaded.frame
    examples = []
    for value in dup_cells[:EXAMPLES]:
        positions = order[sorted_cells == value]
        row = frame.iloc[positions[0]]
        key = " @ ".join(str(row[c]) for c in key_columns)
        stamp = pd.Timestamp(row[schema.PERIOD]).strftime("%Y-%m-%d")
        lag_note = f", lag {int(row[schema.LAG])}" if schema.LAG in frame.columns else ""
        demands = ", ".join(_fmt(v) for v in frame[schema.DEMAND].to_numpy()[positions])
        examples.append(f"{key} / {stamp}{lag_note} at {format_rows(loaded.rows(positions))} (demand {demands})")
    what = "(series, period, lag)" if schema.LAG in frame.columns else "(series, period)"
    raise LoadError(
        loaded.path,
        f"{len(dup_cells)} {what} combinations appear on more than one row; "
        "they are not averaged or summed. For example:\n    " + "\n    ".join(examples),
        hint="Remove the duplicate rows, or add the column that tells them apart (location, lag).",
    )


def _choose_lag(path: Path, lags: tuple[int, ...], lag: int | None) -> int | None:
    """The lag to score; metrics never mix lags."""
    if lag is not None:
        if lag not in lags:
            raise LoadError(
                path,
                f"lag {lag} is not in the file; the history has lags {', '.join(map(str, lags))}.",
                hint="Choose one of those with --lag.",
            )
        return lag
    if len(lags) > 1:
        raise LoadError(
            path,
            f"the history holds {len(lags)} forecast lags ({', '.join(map(str, lags))}); "
            "metrics never mix lags.",
            hint=f"Choose one with --lag, e.g. --lag {lags[0]}.",
        )
    return lags[0] if lags else None


def _merge_other_lag_demand(
    loaded: LoadedLike,
    demand: np.ndarray,
    cell: np.ndarray,
    demand_col: np.ndarray,
    history: np.ndarray,
) -> None:
    """Refuse history rows whose actuals disagree across lags; fill actuals only other lags carry."""
    positions = np.flatnonzero(history & ~np.isnan(demand_col))
    order = positions[np.argsort(cell[positions], kind="stable")]
    cells = cell[order]
    first = np.ones(len(order), dtype=bool)
    first[1:] = cells[1:] != cells[:-1]
    ref = order[np.maximum.accumulate(np.where(first, np.arange(len(order)), 0))]
    clash = demand_col[order] != demand_col[ref]
    if clash.any():
        bad = np.sort(np.concatenate([order[clash], ref[clash]]))
        raise LoadError(
            loaded.path,
            f"{int(clash.sum())} rows give a different demand for the same series and period "
            f"at another lag, at {format_rows(loaded.rows(np.unique(bad)))}.",
            hint="Demand is the actual; it must be the same on every lag row of a period.",
        )
    heads = order[first]
    missing = np.isnan(demand[cell[heads]])
    demand[cell[heads[missing]]] = demand_col[heads[missing]]


def _price_matrix(
    loaded: LoadedLike,
    series: np.ndarray,
    cell: np.ndarray,
    keys_unique: pd.DataFrame,
    key_columns: tuple[str, ...],
    n_series: int,
    n_periods: int,
) -> tuple[np.ndarray, str | None]:
    """Unit value per series and period; gaps take the series' nearest earlier (else later) price."""
    price_col = loaded.frame[schema.PRICE].to_numpy(dtype=np.float64)
    given = ~np.isnan(price_col)
    has_any = np.zeros(n_series, dtype=bool)
    has_any[series[given]] = True
    if not has_any.all():
        missing = np.flatnonzero(~has_any)
        names = ", ".join(
            " @ ".join(str(keys_unique.iloc[i][c]) for c in key_columns) for i in missing[:EXAMPLES]
        )
        raise LoadError(
            loaded.path,
            f"{len(missing)} series have no price on any row (e.g. {names}), "
            "so their error cannot be valued.",
            hint="Give every series a price, or leave out the price column to rank in units.",
        )
    price = np.full(n_series * n_periods, np.nan)
    price[cell[given]] = price_col[given]
    price = price.reshape(n_series, n_periods)
    _fill_along_rows(price)
    note = None
    filled_rows = int((~given).sum())
    if filled_rows:
        note = (
            f"{filled_rows} rows have no price; each takes its series' nearest earlier price "
            "(or the first later one)."
        )
    return price, note


def _fill_along_rows(values: np.ndarray) -> None:
    """Forward-fill NaN along each row in place, then back-fill what is left at the start."""
    n_rows, n_cols = values.shape
    idx = np.where(np.isnan(values), 0, np.arange(n_cols))
    np.maximum.accumulate(idx, axis=1, out=idx)
    values[:] = values[np.arange(n_rows)[:, None], idx]
    first_valid = np.argmax(~np.isnan(values), axis=1)
    lead = np.isnan(values)
    if lead.any():
        fill = values[np.arange(n_rows), first_valid]
        values[lead] = np.broadcast_to(fill[:, None], values.shape)[lead]


def _series_table(
    frame: pd.DataFrame,
    keys_unique: pd.DataFrame,
    key_columns: tuple[str, ...],
    attributes: tuple[str, ...],
    series: np.ndarray,
    period: np.ndarray,
) -> pd.DataFrame:
    """Keys plus each series' attributes, taken from its row with the latest period."""
    keys = keys_unique.copy()
    if attributes:
        # Latest period wins; among equal periods the later file row.
        score = period.astype(np.int64) * len(frame) + np.arange(len(frame))
        best = np.full(len(keys), -1, dtype=np.int64)
        np.maximum.at(best, series, score)
        rows = best % len(frame)
        for name in attributes:
            column = frame[name]
            if isinstance(column.dtype, pd.CategoricalDtype):
                # Take codes, not values: never materialise the whole column as objects.
                codes = column.cat.codes.to_numpy()[rows]
                values = column.cat.categories.to_numpy(dtype=object)[codes]
            else:
                values = column.take(rows).to_numpy(dtype=object)
            keys[name] = np.asarray(values).astype(str)
    for name in key_columns:
        keys[name] = keys[name].astype(str)
    return keys


def _fmt(value: float) -> str:
    return "empty" if np.isnan(value) else f"{value:g}"
