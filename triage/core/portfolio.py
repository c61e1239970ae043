"""Dense series x period arrays built from a loaded long frame.

Scoring works on matrices: one row per series, one column per calendar period, NaN where the file
has no value. Building them is a scatter of the long rows into NaN-filled arrays, after the checks
that need the whole portfolio at once: a regular calendar, no duplicate (series, period, lag) rows,
one lag, and some actual demand.

Forward periods are the calendar periods after the portfolio's latest actual period; their
forecast is the forward forecast a reviewer may override. A history row with empty demand is a
missing actual, never a zero.

Two ways build the same :class:`Portfolio`. :func:`build_portfolio` scatters a loaded long frame
(any file type). ``triage.core.read.read_portfolio`` first tries the streamed way for Parquet and
CSV (``triage.core.read.stream.build_streamed``, which uses the building blocks below): passes
over blocks of rows fill the arrays directly, and integer codes stand in for the text, so a
million series never exist as 116 million Python objects or as a long frame. Files it cannot vouch
for go the first way, which gives the same result or the same error
(tests/core/test_parquet_streamed.py).

Memory at scale (docs/performance.md): rows are numbered with int32 codes where they fit, row
passes run in blocks, and prices are kept per series (:class:`UnitPrices`) except for the series
whose price changes.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field, replace
from functools import cached_property
from pathlib import Path
from typing import TYPE_CHECKING, Any, NoReturn, Protocol

import numpy as np
import numpy.typing as npt
import pandas as pd

from triage.core import schema
from triage.core.errors import LoadError, format_rows
from triage.core.text import visible

if TYPE_CHECKING:
    from collections.abc import Sequence

    from triage.core.metrics import HistoryMeasures


#: How many example rows an error message shows.
EXAMPLES = 5
#: Nanoseconds in a day.
DAY_NS = 86_400 * 10**9


class LoadedLike(Protocol):
    """What the builder needs from a loaded file (see ``triage.core.read.LoadedFrame``)."""

    @property
    def frame(self) -> pd.DataFrame: ...
    @property
    def path(self) -> Path: ...
    @property
    def first_row(self) -> int: ...
    @property
    def attributes(self) -> tuple[str, ...]: ...
    @property
    def notices(self) -> tuple[str, ...]: ...

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
        stamp: pd.Timestamp = self.periods[index]
        text: str = (
            stamp.strftime("%Y-%m") if self.freq == schema.MONTHLY else stamp.strftime("%Y-%m-%d")
        )
        return text


@dataclass(frozen=True)
class Grid:
    """The calendar and latest actual column of a whole portfolio, to build a part of it on."""

    calendar: Calendar
    last_actual: int
    lag: int | None = None
    """The lag scored (None without a lag column)."""
    lags: tuple[int, ...] = ()
    """Every lag of the whole portfolio's history rows."""

    def codes(self, period: pd.Series) -> np.ndarray:
        """Every row's column on the calendar.

        Raises:
            ValueError: A period is not on the calendar (the whole portfolio's calendar is made
                from every part's periods, so this is a programming error).
        """
        stamps = pd.DatetimeIndex(period.to_numpy(dtype="datetime64[ns]"))
        codes = np.asarray(self.calendar.periods.get_indexer(stamps))
        if (codes < 0).any():
            raise ValueError("a period of the part is not on the portfolio's calendar")
        return codes.astype(_index_dtype(len(self.calendar.periods)), copy=False)


class UnitPrices:
    """Unit value per series and period, stored as one price per series plus the rows that change.

    Most series keep one price over the whole calendar; only the series whose price changes are
    kept in full, so a portfolio of a million series does not carry a third dense matrix. It
    reads like a read-only ``(n_series, n_periods)`` float64 array: integer, slice, integer-array
    and boolean keys on either axis, with numpy's results (copies, never views).
    """

    __slots__ = ("_base", "_rows", "_slot", "_values", "shape")

    dtype = np.dtype(np.float64)
    ndim = 2

    def __init__(self, base: np.ndarray, rows: np.ndarray, values: np.ndarray) -> None:
        """
        Args:
            base: The price of every series (used for the series not in ``rows``).
            rows: Ascending series positions whose price changes.
            values: Their full rows, ``len(rows) x n_periods``.
        """
        self._base = np.asarray(base, dtype=np.float64)
        self._rows = np.asarray(rows, dtype=np.int64)
        self._values = np.asarray(values, dtype=np.float64)
        self.shape = (len(self._base), self._values.shape[1])
        self._slot = np.full(len(self._base), -1, dtype=np.int64)
        self._slot[self._rows] = np.arange(len(self._rows))

    @classmethod
    def from_dense(cls, price: np.ndarray) -> UnitPrices:
        """Compress a dense filled price matrix (every row constant is stored as one number)."""
        changes = np.empty(price.shape[0], dtype=bool)
        for lo in range(0, price.shape[0], _SERIES):
            block = price[lo : lo + _SERIES]
            changes[lo : lo + _SERIES] = ~(block == block[:, :1]).all(axis=1)
        rows = np.flatnonzero(changes)
        return cls(price[:, 0].copy(), rows, price[rows])

    @property
    def changing(self) -> np.ndarray:
        """Series whose price is not the same in every period."""
        return self._rows.copy()

    def any_positive(self) -> bool:
        """Whether some series has a price above 0 in some period."""
        return bool((self._base > 0).any() or (self._values > 0).any())

    def __len__(self) -> int:
        return self.shape[0]

    def __repr__(self) -> str:
        return f"UnitPrices(shape={self.shape}, changing={len(self._rows)})"

    def __array__(self, dtype: npt.DTypeLike | None = None, copy: bool | None = None) -> np.ndarray:
        full = np.repeat(self._base[:, None], self.shape[1], axis=1)
        full[self._rows] = self._values
        return full if dtype is None else full.astype(dtype)

    def __getitem__(self, key: Any) -> Any:
        if not isinstance(key, tuple):
            key = (key,)
        if len(key) == 1:
            key = (key[0], slice(None))
        if len(key) != 2 or any(k is None or k is Ellipsis for k in key):
            return np.asarray(self)[key]
        row_key, col_key = key
        cols = np.arange(self.shape[1])[col_key]
        row_scalar = _is_int(row_key)
        col_scalar = np.ndim(cols) == 0
        paired = not (row_scalar or col_scalar)
        if paired and not isinstance(row_key, slice) and not isinstance(col_key, slice):
            # Two index arrays: numpy pairs them element by element (broadcast).
            try:
                rows, cols = np.broadcast_arrays(self._row_positions(row_key), cols)
            except ValueError as exc:
                raise IndexError(f"shape mismatch: {exc}") from None
            out = self._base[rows]
            slot = self._slot[rows]
            changing = slot >= 0
            out[changing] = self._values[slot[changing], cols[changing]]
            return out
        rows = self._row_positions(row_key)
        cols_1d = np.atleast_1d(cols)
        out = np.repeat(self._base[np.atleast_1d(rows)][:, None], len(cols_1d), axis=1)
        slot = self._slot[np.atleast_1d(rows)]
        changing = np.flatnonzero(slot >= 0)
        if changing.size:
            out[changing] = self._values[slot[changing]][:, cols_1d]
        if row_scalar:
            out = out[0]
        if col_scalar:
            out = out[..., 0]
        return out

    def _row_positions(self, key: object) -> np.ndarray:
        n = self.shape[0]
        if isinstance(key, slice):
            return np.arange(*key.indices(n))
        if _is_int(key):
            index = int(key)  # type: ignore[call-overload]
            if not -n <= index < n:
                raise IndexError(f"index {index} is out of bounds for axis 0 with size {n}")
            return np.asarray(index % n)
        array = np.asarray(key)
        if array.dtype == bool:
            if array.shape != (n,):
                raise IndexError(f"boolean index of length {array.size} for axis 0 with size {n}")
            return np.flatnonzero(array)
        if array.size and (array.min() < -n or array.max() >= n):
            raise IndexError(f"index out of bounds for axis 0 with size {n}")
        return np.where(array < 0, array + n, array).astype(np.int64)


def _is_int(key: object) -> bool:
    return isinstance(key, int | np.integer) and not isinstance(key, bool)


class ColumnSpan:
    """A ``(n_series, n_periods)`` float64 matrix of which only the columns ``start`` to
    ``stop - 1`` were loaded: what a scoring run keeps of the forecasts.

    ``triage rank`` scores the forecasts on the window's columns only; reading the file for it
    (``read_portfolio(..., scored_window=W)``) keeps those columns, a ninth of the matrix on two
    years of weekly history, instead of every period's. It indexes like the full matrix within
    the span: ``m[rows]`` (a ``ColumnSpan`` of those rows) and ``m[rows, cols]`` (numpy's
    result: a view for slices). A column outside the span raises ``IndexError`` rather than
    give a value that was never read, and it never turns into a full array.
    """

    __slots__ = ("_values", "shape", "start", "values_after", "values_before")

    dtype = np.dtype(np.float64)
    ndim = 2

    def __init__(
        self,
        values: np.ndarray,
        start: int,
        n_periods: int,
        *,
        values_before: bool = False,
        values_after: bool = False,
    ) -> None:
        """
        Args:
            values: The loaded columns, ``n_series x width``.
            start: The calendar column of ``values[:, 0]``.
            n_periods: Columns of the whole matrix.
            values_before: Whether the file had any value (not missing) before ``start``, in
                any series (of the whole matrix, also on a choice of its rows).
            values_after: Whether it had any at or after :attr:`stop`.
        """
        if start < 0 or start + values.shape[1] > n_periods:
            raise ValueError("the span must lie inside the calendar")
        self._values = values
        self.start = start
        self.values_before = values_before
        self.values_after = values_after
        self.shape: tuple[int, int] = (int(values.shape[0]), n_periods)

    @property
    def stop(self) -> int:
        """One past the last loaded column."""
        return self.start + int(self._values.shape[1])

    def __len__(self) -> int:
        return self.shape[0]

    def __repr__(self) -> str:
        return f"ColumnSpan(shape={self.shape}, columns={self.start}..{self.stop - 1})"

    def __array__(self, dtype: npt.DTypeLike | None = None, copy: bool | None = None) -> NoReturn:
        raise TypeError(f"only columns {self.start}..{self.stop - 1} of this matrix were loaded")

    def __getitem__(self, key: Any) -> Any:
        if not isinstance(key, tuple):
            if _is_int(key):
                raise IndexError("a ColumnSpan row is only read with its columns: m[row, cols]")
            # The two flags describe the whole matrix: a choice of its rows keeps them, as
            # "may have had values there" (:func:`metrics.window_columns` relies on it).
            return ColumnSpan(
                self._values[key],
                self.start,
                self.shape[1],
                values_before=self.values_before,
                values_after=self.values_after,
            )
        if len(key) != 2:
            raise IndexError(f"a ColumnSpan takes [rows] or [rows, cols], not {len(key)} keys")
        rows, cols = key
        return self._values[rows, self._local(cols)]

    def _local(self, cols: Any) -> Any:
        """The key of the loaded columns standing for calendar columns ``cols``."""
        n = self.shape[1]
        if isinstance(cols, slice):
            # A slice stays a slice (basic indexing: a view, and rows index apart from it).
            taken = range(*cols.indices(n))
            if not taken:
                return slice(0, 0)
            self._check(min(taken), max(taken))
            stop = taken[-1] - self.start + (1 if taken.step > 0 else -1)
            return slice(taken[0] - self.start, stop if stop >= 0 else None, taken.step)
        picked = np.arange(n)[cols]
        if np.size(picked):
            self._check(int(np.min(picked)), int(np.max(picked)))
        return picked - self.start

    def _check(self, low: int, high: int) -> None:
        if low < self.start or high >= self.stop:
            raise IndexError(
                f"columns outside {self.start}..{self.stop - 1} were not loaded "
                "(the file was read for scoring only)"
            )


@dataclass(frozen=True)
class KeyText:
    """A portfolio's key and attribute columns without its arrays
    (``Portfolio.key_columns_text``)."""

    keys: pd.DataFrame
    _text_codes: dict[str, tuple[pd.DataFrame, np.ndarray, Any]]
    """Shared with the portfolio: codes computed here are kept for it too."""

    def column(self, name: str, order: np.ndarray) -> pd.api.extensions.ExtensionArray:
        """Key or attribute column ``name`` of the series ``order``, as a ``str`` array.

        Taken through integer codes into the column's distinct values (kept from the build, or
        computed once): cheaper than moving a million strings.
        """
        import pyarrow as pa

        codes, labels = self.codes(name)
        taken = labels.take(pa.array(codes[order]))
        return pd.array(taken, dtype=pd.StringDtype("pyarrow", na_value=np.nan))

    def codes(self, name: str) -> tuple[np.ndarray, Any]:
        """Key or attribute column ``name`` as (int32 code per series, Arrow ``large_string``
        distinct values): kept from the build, or computed once."""
        import pyarrow as pa

        coded = self._text_codes.get(name)
        if coded is None or coded[0] is not self.keys:
            # Not coded yet, or coded for another keys frame (``dataclasses.replace``).
            codes, uniques = pd.factorize(self.keys[name], use_na_sentinel=False)
            labels = pa.array(
                np.asarray(uniques, dtype=object), type=pa.large_string(), from_pandas=True
            )
            coded = self._text_codes[name] = (self.keys, codes.astype(np.int32), labels)
        return coded[1], coded[2]


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
    """Actual demand, series x periods, float64, NaN where missing (and in forward periods).

    Read for scoring only with a season (``read_portfolio(..., scored_window=W, season=m)``),
    it is a :class:`ColumnSpan` from ``m`` columns before the window to the latest actual, and
    the measures of the whole history are in :attr:`history`."""
    forecast: np.ndarray
    """Forecast at the chosen lag for history periods, the forward forecast after them.

    NaN where missing. Read for scoring only (``read_portfolio(..., scored_window=W)``), it is a
    :class:`ColumnSpan` of the scoring window's columns, as are the ``competing`` forecasts."""
    price: UnitPrices | None
    """Unit value, series x periods, float64, filled along each series; None without a price column.

    Indexes like a read-only float64 array (``price[:, cols]``, ``price[series, col]``, ``price[i]``
    return numpy arrays); ``np.asarray(price)`` gives the full matrix."""
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
    units_reason: str = ""
    """Why errors are ranked in units although the file has a price column (``value_or_units``),
    e.g. ``column 'price' has no price above 0``; empty otherwise."""
    competing: dict[str, np.ndarray] = field(default_factory=dict, repr=False, compare=False)
    """Other forecasts of the same periods (``forecast_<name>`` columns), by ``<name>`` in file
    order: series x periods, float64, NaN where missing, at the same lag as ``forecast``."""
    _text_codes: dict[str, tuple[pd.DataFrame, np.ndarray, Any]] = field(
        default_factory=dict, repr=False, compare=False
    )
    """Key and attribute columns as (the keys frame they code, int32 codes, Arrow labels)."""
    history: HistoryMeasures | None = field(default=None, repr=False, compare=False)
    """The whole history's measures, taken while reading, when the demand was kept over the
    scored columns only (:attr:`demand`); None otherwise. A copy with other demand must set it
    to None (``dataclasses.replace``)."""

    def history_measures(self, season: int) -> HistoryMeasures:
        """Naive scale (season ``season``) and demand pattern of every series' whole history:
        those taken while reading when they are of that season, else computed from
        :attr:`demand` (which raises ``IndexError`` on a demand read for scoring only)."""
        from triage.core import metrics

        if self._history_of(season):
            assert self.history is not None
            return self.history
        return metrics.history_measures(self.demand[:, : self.last_actual + 1], season)

    def naive_scale(self, season: int) -> np.ndarray:
        """The naive scale of :meth:`history_measures` alone (MASE's denominator)."""
        from triage.core import metrics

        if self._history_of(season):
            assert self.history is not None
            return self.history.scale
        return metrics.naive_scale(self.demand[:, : self.last_actual + 1], season)

    def _history_of(self, season: int) -> bool:
        """Whether :attr:`history` holds the measures of this season, for these series."""
        kept = self.history
        return kept is not None and kept.season == season and len(kept.scale) == self.n_series

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
        text: str = self.calendar.periods[self.last_actual].strftime("%Y-%m-%d")
        return text

    @cached_property
    def fingerprint(self) -> str:
        """SHA-256 of the portfolio file, so a decision can be traced to the data it was made on."""
        digest = hashlib.sha256()
        with self.path.open("rb") as handle:
            for chunk in iter(lambda: handle.read(1 << 20), b""):
                digest.update(chunk)
        return digest.hexdigest()

    @cached_property
    def series_index(self) -> SeriesIndex:
        """The one lookup from a ledger key (item, location) to the series' position."""
        return SeriesIndex(self.keys, self.key_columns)

    def key(self, series: int) -> tuple[str, str]:
        """``(item, location)`` of a series as the ledger stores it (location ``""`` if none)."""
        location = (
            self.keys[schema.LOCATION].iat[series] if schema.LOCATION in self.key_columns else ""
        )
        return str(self.keys[schema.ITEM].iat[series]), str(location)

    def key_text(self, index: int) -> str:
        """``item`` or ``item @ location`` of series ``index``, for messages (control
        characters shown as visible symbols)."""
        return " @ ".join(visible(str(self.keys.iloc[index][c])) for c in self.key_columns)

    @property
    def key_columns_text(self) -> KeyText:
        """The key and attribute columns alone (sharing this portfolio's codes), for what
        outlives the dense arrays: a scorecard's text columns."""
        return KeyText(self.keys, self._text_codes)

    def text_column(self, name: str, order: np.ndarray) -> pd.api.extensions.ExtensionArray:
        """Key or attribute column ``name`` of the series ``order`` (:meth:`KeyText.column`)."""
        return self.key_columns_text.column(name, order)

    def text_codes(self, name: str) -> tuple[np.ndarray, Any]:
        """Key or attribute column ``name`` as codes and labels (:meth:`KeyText.codes`)."""
        return self.key_columns_text.codes(name)


class SeriesIndex:
    """Positions of series keys in a portfolio, as the ledger names a series: (item, location).

    Without a location column a ledger key matches only with an empty location, as the review
    screens store it; keys are matched exactly (no trimming, no case folding).
    """

    def __init__(self, keys: pd.DataFrame, key_columns: tuple[str, ...]) -> None:
        items = keys[schema.ITEM].to_numpy(dtype=object)
        self._located = schema.LOCATION in key_columns
        self._index: pd.Index = (
            pd.MultiIndex.from_arrays([items, keys[schema.LOCATION].to_numpy(dtype=object)])
            if self._located
            else pd.Index(items)
        )

    def positions(
        self,
        items: Sequence[str] | npt.NDArray[Any] | pd.Series,
        locations: Sequence[str] | npt.NDArray[Any] | pd.Series,
    ) -> npt.NDArray[np.int64]:
        """Portfolio position of each (item, location), -1 where the series is not in it."""
        items = np.asarray(items, dtype=object)
        locations = np.asarray(locations, dtype=object)
        if len(items) == 0:
            return np.empty(0, dtype=np.int64)
        if self._located:
            probe = pd.MultiIndex.from_arrays([items, locations])
            return np.asarray(self._index.get_indexer(probe), dtype=np.int64)
        found = np.asarray(self._index.get_indexer(items), dtype=np.int64)
        found[locations != ""] = -1
        return found

    def find(self, item: str, location: str = "") -> int | None:
        """Position of one series, None when it is not in the portfolio."""
        found = int(self.positions([item], [location])[0])
        return None if found < 0 else found


def build_portfolio(
    loaded: LoadedLike,
    *,
    lag: int | None = None,
    consume: bool = False,
    smallest_lag: bool = False,
    grid: Grid | None = None,
) -> Portfolio:
    """Check the whole-portfolio rules and scatter the long rows into dense arrays.

    Args:
        loaded: A validated long frame (canonical columns) and where it came from.
        lag: The forecast lag to score; required when the history holds more than one lag.
        consume: Drop the key, period and number columns from ``loaded.frame`` once they have
            been scattered, so that the long rows and the dense arrays are not both held in
            full. The frame is left with its attribute columns only; pass True only when nothing
            reads it afterwards.
        smallest_lag: With several lags in the history and no ``lag``, score the smallest one
            instead of refusing (``triage check`` reports the lags and the choice); ``lags``
            lists them all.
        grid: Build a part of a larger portfolio on the whole portfolio's calendar and latest
            actual period (``triage.core.dataset``), which checked them; the part's own rows
            need not cover either.

    Competing forecasts (frame columns ``forecast_<name>``) become ``Portfolio.competing``:
    each value is taken from the row ``forecast`` is taken from (the chosen lag in the history,
    the smallest lag forward), NaN where that row leaves it empty.

    Raises:
        LoadError: Irregular calendar, duplicate rows, several lags without ``lag``, an unknown
            lag, no actual demand at all, or a series without any price in a priced file.
    """
    frame = loaded.frame
    path = loaded.path
    if frame.empty:
        raise LoadError(
            path,
            "the file has no data rows.",
            hint="Add rows with item, period, demand and forecast.",
        )
    key_columns = tuple(c for c in schema.KEY_ORDER if c in frame.columns)
    n_rows = len(frame)
    has_lag = schema.LAG in frame.columns
    has_price = schema.PRICE in frame.columns

    series, keys_unique = _series_codes(frame, key_columns)
    if grid is None:
        calendar, period = _calendar_codes(loaded, len(keys_unique))
    else:
        calendar, period = grid.calendar, grid.codes(frame[schema.PERIOD])
    n_series, n_periods = len(keys_unique), len(calendar.periods)

    demand_col = frame[schema.DEMAND].to_numpy(dtype=np.float64)
    last_actual = _last_actual(period, demand_col) if grid is None else grid.last_actual
    if last_actual < 0:
        raise LoadError(
            path,
            "no row has actual demand: every demand cell is empty, so nothing can be scored.",
            hint="Include the demand history, not only the forward forecast.",
        )

    lag_col = frame[schema.LAG].to_numpy(dtype=np.int64) if has_lag else None
    _check_duplicates(loaded, series, period, lag_col, key_columns, n_series, n_periods)
    if grid is not None:
        lags, lag = grid.lags, grid.lag
    else:
        lags = _history_lags(lag_col, period, last_actual) if lag_col is not None else ()
    if lag is not None and not has_lag:
        raise LoadError(
            path,
            f"--lag {lag} was given, but the file has no '{schema.LAG}' column: every forecast "
            "in it is of one (unnamed) lag.",
            hint="Leave out --lag, or load the file that holds the forecast lags.",
        )
    if grid is not None:
        chosen = grid.lag
    else:
        chosen = _choose_lag(path, lags, lag, smallest=smallest_lag) if has_lag else None

    # The later steps need the keys' codes only; the rows' key columns can go.
    attribute_rows = (
        _latest_rows(series, period, n_series, n_periods, unique_cells=not has_lag)
        if loaded.attributes
        else None
    )
    cell = _cells(series, period, n_periods)
    del series
    if consume:
        for name in (*key_columns, schema.PERIOD):
            del frame[name]

    demand = np.full(n_series * n_periods, np.nan)
    forecast = np.full(n_series * n_periods, np.nan)
    forecast_col = frame[schema.FORECAST].to_numpy(dtype=np.float64)
    # Competing forecasts (forecast_<name>) are taken from the rows ``forecast`` is taken from.
    rivals = [c for c in frame.columns if schema.competing_name(c) is not None]
    taken: list[np.ndarray] | None = None
    if lag_col is None:
        # One row per cell (duplicates were refused), and forward rows carry no demand by
        # definition of the latest actual period: every row scatters as it is.
        demand[cell] = demand_col
        forecast[cell] = forecast_col
    else:
        forward = period > last_actual
        scored = ~forward & (lag_col == chosen)
        demand[cell[scored]] = demand_col[scored]
        forecast[cell[scored]] = forecast_col[scored]
        taken = [np.flatnonzero(scored)] if rivals else None
        del scored
        if len(lags) > 1:
            _merge_other_lag_demand(loaded, demand, cell, demand_col, ~forward)
        if forward.any():
            # Forward periods keep the most recent snapshot: the smallest lag per (series, period).
            fwd = np.flatnonzero(forward)
            fwd = fwd[np.lexsort((lag_col[fwd], cell[fwd]))]
            first = np.ones(len(fwd), dtype=bool)
            first[1:] = cell[fwd][1:] != cell[fwd][:-1]
            fwd = fwd[first]
            forecast[cell[fwd]] = forecast_col[fwd]
            if taken is not None:
                taken.append(fwd)
        del forward
    del demand_col, forecast_col, period, lag_col
    competing: dict[str, np.ndarray] = {}
    rows_taken = None if taken is None else np.concatenate(taken)
    for column in rivals:
        values = frame[column].to_numpy(dtype=np.float64)
        flat = np.full(n_series * n_periods, np.nan)
        if rows_taken is None:
            flat[cell] = values
        else:
            flat[cell[rows_taken]] = values[rows_taken]
        competing[column[len(schema.COMPETING_PREFIX) :]] = flat.reshape(n_series, n_periods)
        del values
        if consume:
            del frame[column]
    del rows_taken, taken
    if consume:
        for name in (schema.DEMAND, schema.FORECAST, schema.LAG):
            if name in frame.columns:
                del frame[name]

    price = None
    notices = list(loaded.notices)
    if has_price:
        price_col = frame[schema.PRICE].to_numpy(dtype=np.float64)
        if consume:
            del frame[schema.PRICE]
        flat = np.full(n_series * n_periods, np.nan)
        missing_rows = _scatter_prices(flat, cell, price_col)
        del price_col
        dense = flat.reshape(n_series, n_periods)
        _refuse_unpriced(path, fill_prices(dense), keys_unique, key_columns)
        price = UnitPrices.from_dense(dense)
        del dense, flat
        if missing_rows:
            notices.append(price_note(missing_rows))
    del cell

    keys = _series_table(frame, keys_unique, key_columns, loaded.attributes, attribute_rows)
    # The attribute columns are left in the frame: dropping them one by one would rebuild its
    # blocks each time (quadratic in their number), and the caller lets the frame go next.
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
        rows=n_rows,
        notices=tuple(notices),
        competing=competing,
    )


# --- building blocks shared by both ways of building ---------------------------------------------

#: Rows per block where a whole-column pass would otherwise allocate full-length temporaries.
BLOCK_ROWS = 1 << 20
#: Series per block when a pass runs over the dense arrays.
_SERIES = 1 << 15


def _index_dtype(size: int) -> type[np.signedinteger]:
    """int32 when every index below ``size`` fits, else int64."""
    return np.int32 if size < np.iinfo(np.int32).max else np.int64


def _codes(column: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """Sorted integer codes of a text column and the sorted unique values."""
    if isinstance(column.dtype, pd.CategoricalDtype):
        raw = np.asarray(column.array.codes)
        rank, values = _sorted_codes(raw, column.cat.categories.to_numpy(dtype=object))
        return rank[raw], values
    codes, uniques = pd.factorize(column, sort=True)
    return codes.astype(_index_dtype(len(uniques)), copy=False), np.asarray(uniques, dtype=object)


def _sorted_codes(raw: np.ndarray, values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """How to renumber codes into ``values`` so that code order is sorted text order.

    Args:
        raw: Codes into ``values``, all >= 0.
        values: Distinct values (object array), in any order; some may be unused.

    Returns:
        ``rank``, the new code of each old code (``rank[raw]`` renumbers), and the used values in
        sorted order. Unused values are dropped, so that the series count is honest.
    """
    order = np.argsort(values.astype(str), kind="stable")
    used = np.zeros(len(values), dtype=bool)
    for lo in range(0, len(raw), BLOCK_ROWS):
        used[raw[lo : lo + BLOCK_ROWS]] = True
    rank = np.empty(len(values), dtype=_index_dtype(len(values)))
    rank[order] = np.cumsum(used[order]) - 1
    return rank, values[order][used[order]]


def _series_codes(
    frame: pd.DataFrame, key_columns: tuple[str, ...]
) -> tuple[np.ndarray, pd.DataFrame]:
    """One integer per series, numbered in key order, and the table of unique keys."""
    item_codes, item_values = _codes(frame[schema.ITEM])
    if len(key_columns) == 1:
        return item_codes, pd.DataFrame({schema.ITEM: item_values})
    loc_codes, loc_values = _codes(frame[schema.LOCATION])
    return _pair_codes(item_codes, item_values, loc_codes, loc_values)


def _pair_codes(
    item_codes: np.ndarray,
    item_values: np.ndarray,
    loc_codes: np.ndarray,
    loc_values: np.ndarray,
    out: np.ndarray | None = None,
) -> tuple[np.ndarray, pd.DataFrame]:
    """Series numbers of (item, location) pairs from sorted dense codes, in key order.

    ``out`` (may be ``item_codes`` itself) receives the numbers when its type can hold every pair.
    """
    n_loc = len(loc_values)
    size = len(item_values) * n_loc
    dtype = _index_dtype(size)
    # Both codes are dense and sorted, so the pairs in use number themselves in key order.
    used = np.zeros(size, dtype=bool)
    series = (
        out if out is not None and out.dtype == dtype else np.empty(len(item_codes), dtype=dtype)
    )
    for lo in range(0, len(item_codes), BLOCK_ROWS):
        block = item_codes[lo : lo + BLOCK_ROWS].astype(dtype) * n_loc
        block += loc_codes[lo : lo + BLOCK_ROWS]
        used[block] = True
        series[lo : lo + BLOCK_ROWS] = block
    pairs = np.flatnonzero(used)
    renumber = np.cumsum(used, dtype=_index_dtype(len(pairs))) - 1
    del used
    for lo in range(0, len(series), BLOCK_ROWS):
        series[lo : lo + BLOCK_ROWS] = renumber[series[lo : lo + BLOCK_ROWS]]
    keys = pd.DataFrame(
        {schema.ITEM: item_values[pairs // n_loc], schema.LOCATION: loc_values[pairs % n_loc]}
    )
    return series.astype(_index_dtype(len(pairs)), copy=False), keys


def _calendar_codes(loaded: LoadedLike, n_series: int) -> tuple[Calendar, np.ndarray]:
    """Infer a weekly or monthly calendar and number every row's period on it."""
    column = loaded.frame[schema.PERIOD]
    stamps = column.to_numpy(dtype="datetime64[ns]").view(np.int64)
    inverse, uniques = _unique_stamps(stamps)
    found = calendar_from_uniques(uniques)
    if found is None:
        _irregular_calendar(loaded, pd.DatetimeIndex(column), uniques)
    calendar, unique_codes = found
    problem = calendar_problem(calendar, unique_codes, len(stamps), n_series)
    if problem is not None:
        message, hint, suspects = problem
        rows = np.flatnonzero(np.isin(inverse, np.flatnonzero(np.isin(unique_codes, suspects))))
        shown = ", ".join(
            f"{calendar.label(int(unique_codes[inverse[i]]))} (row {loaded.rows([i])[0]})"
            for i in rows[:EXAMPLES]
        )
        raise LoadError(
            loaded.path, f"{message}{f' Rows to check: {shown}.' if shown else ''}", hint=hint
        )
    codes = np.empty(len(inverse), dtype=_index_dtype(len(calendar.periods)))
    for lo in range(0, len(inverse), BLOCK_ROWS):
        codes[lo : lo + BLOCK_ROWS] = unique_codes[inverse[lo : lo + BLOCK_ROWS]]
    return calendar, codes


#: Distinct periods from which a calendar whose periods are all k > 1 steps apart is refused.
MIN_PERIODS_FOR_SPACING = 6
#: Longest run of calendar periods that no row uses, inside the calendar, by frequency.
MAX_EMPTY_STRETCH = {schema.WEEKLY: 53, schema.MONTHLY: 24}
#: A calendar this many cells long per row (series x periods / rows) is refused as too sparse.
MAX_CELLS_PER_ROW = 50
#: ... once the dense arrays would hold at least this many cells.
SPARSE_FLOOR = 100_000_000


def calendar_problem(
    calendar: Calendar, codes: np.ndarray, n_rows: int, n_series: int
) -> tuple[str, str, np.ndarray] | None:
    """Why a weekly or monthly calendar cannot be right, or None.

    Periods further apart than one step throughout (fortnightly, quarterly, yearly files), a
    long stretch that no row uses (a mistyped year makes a calendar of decades), and a calendar
    far too long for the rows it holds. Returns the message, the hint, and the calendar columns
    whose rows to show as examples.
    """
    unit = "weeks" if calendar.freq == schema.WEEKLY else "months"
    gaps = np.diff(codes)
    # Six or more distinct periods, all a multiple of k steps apart, are k-weekly (or k-monthly)
    # buckets; with fewer, a weekly file with gaps is as likely.
    if len(gaps) >= MIN_PERIODS_FOR_SPACING - 1 and (step := int(np.gcd.reduce(gaps))) > 1:
        return (
            f"every period is a multiple of {step} {unit} after the first "
            f"({calendar.label(int(codes[0]))}, {calendar.label(int(codes[1]))}, ...): "
            "triage scores weekly or monthly periods, and this calendar is neither.",
            "Export one row per series and week (or per month); fortnightly, quarterly or "
            "yearly buckets cannot be scored against a weekly or monthly naive forecast.",
            codes[:0],
        )
    widest = int(np.argmax(gaps)) if len(gaps) else 0
    if len(gaps) and gaps[widest] - 1 > MAX_EMPTY_STRETCH[calendar.freq]:
        before, after = codes[: widest + 1], codes[widest + 1 :]
        smaller = before if len(before) <= len(after) else after
        return (
            f"no row has a period from {calendar.label(int(codes[widest]) + 1)} to "
            f"{calendar.label(int(codes[widest + 1]) - 1)} ({int(gaps[widest]) - 1:,} {unit}), "
            f"inside a calendar that runs from {calendar.label(0)} to "
            f"{calendar.label(len(calendar.periods) - 1)}: a year is probably mistyped.",
            "Correct the periods of the rows shown (or remove them), then load the file again.",
            smaller[:EXAMPLES],
        )
    cells = n_series * len(calendar.periods)
    if cells >= SPARSE_FLOOR and cells > MAX_CELLS_PER_ROW * n_rows:
        return (
            f"the calendar runs from {calendar.label(0)} to "
            f"{calendar.label(len(calendar.periods) - 1)} ({len(calendar.periods):,} {unit}) for "
            f"{n_series:,} series, but the file has only {n_rows:,} rows: the series x period "
            f"arrays would hold {cells / max(n_rows, 1):,.0f} cells for every row of the file.",
            "Check the periods for mistyped years, or load only the years you want scored.",
            codes[:1],
        )
    return None


def _unique_stamps(stamps: np.ndarray) -> tuple[np.ndarray, pd.DatetimeIndex]:
    """Index of each row's stamp among the sorted distinct stamps, and those stamps.

    Periods are whole days a few years apart at most, so the distinct ones come from counting
    day offsets (no sort, no hash over the rows); anything else goes through ``pd.factorize``.
    """
    low, high = int(stamps.min()), int(stamps.max())
    span = (high - low) // DAY_NS
    if span < 1 << 20:
        offsets = np.empty(len(stamps), dtype=np.int32)
        exact = True
        for lo in range(0, len(stamps), BLOCK_ROWS):
            whole, rest = np.divmod(stamps[lo : lo + BLOCK_ROWS] - low, DAY_NS)
            exact = exact and not rest.any()
            offsets[lo : lo + BLOCK_ROWS] = whole
        if exact:
            present = np.flatnonzero(np.bincount(offsets, minlength=span + 1))
            lookup = np.zeros(span + 1, dtype=np.int32)
            lookup[present] = np.arange(len(present), dtype=np.int32)
            for lo in range(0, len(offsets), BLOCK_ROWS):
                offsets[lo : lo + BLOCK_ROWS] = lookup[offsets[lo : lo + BLOCK_ROWS]]
            days = low + present.astype(np.int64) * DAY_NS
            return offsets, pd.DatetimeIndex(days.view("datetime64[ns]"))
    inverse, uniques = pd.factorize(stamps, sort=True)
    return inverse, pd.DatetimeIndex(uniques.astype("datetime64[ns]"))


def calendar_from_uniques(uniques: pd.DatetimeIndex) -> tuple[Calendar, np.ndarray] | None:
    """The calendar of the sorted distinct periods and each one's column; None when irregular."""
    first = uniques[0]
    if len(uniques) == 1:
        freq = schema.MONTHLY if first.day == 1 else schema.WEEKLY
    elif (uniques.day == 1).all():
        # Month starts first: February to March is 28 days, a multiple of 7.
        freq = schema.MONTHLY
    elif (np.diff(uniques.to_numpy().astype("datetime64[D]").astype(np.int64)) % 7 == 0).all():
        freq = schema.WEEKLY
    else:
        return None
    if freq == schema.WEEKLY:
        codes = (uniques.asi8 - first.value) // (7 * DAY_NS)
        periods = pd.date_range(first, periods=int(codes[-1]) + 1, freq="7D")
    else:
        codes = (uniques.year.to_numpy() - first.year) * 12 + (
            uniques.month.to_numpy() - first.month
        )
        periods = pd.date_range(first, periods=int(codes[-1]) + 1, freq="MS")
    return Calendar(freq=freq, periods=periods), codes.astype(np.int64)


def _irregular_calendar(
    loaded: LoadedLike, stamps: pd.DatetimeIndex, uniques: pd.DatetimeIndex
) -> NoReturn:
    """Report the periods that break the most common pattern (irregular calendars only)."""
    path = loaded.path
    weekday = pd.Series(uniques.day_of_week).mode().iloc[0]
    days = pd.Series(uniques.day)
    month_apart = (np.diff(uniques.to_numpy()) > np.timedelta64(27, "D")).all()
    if days.nunique() == 1 and len(uniques) > 1 and month_apart:
        day = int(days.iloc[0])
        raise LoadError(
            path,
            f"every period in column '{schema.PERIOD}' is day {day} of its month (e.g. "
            f"{uniques[0].strftime('%Y-%m-%d')}): monthly periods must be the 1st of the month.",
            hint="Write monthly periods as the month's first day (2025-01-01) or as YYYY-MM "
            "(2025-01).",
        )
    if (uniques.day == 1).mean() > 0.5:
        bad = stamps.day != 1
        expected = "the first day of a month (monthly periods)"
    else:
        bad = stamps.day_of_week != weekday
        name = pd.Timestamp(uniques[uniques.day_of_week == weekday][0]).day_name()
        expected = f"a {name} (weekly periods, 7 days apart)"
    positions = np.flatnonzero(np.asarray(bad))
    examples = ", ".join(
        f"{stamps[i].strftime('%Y-%m-%d')} (row {loaded.rows([i])[0]})"
        for i in positions[:EXAMPLES]
    )
    raise LoadError(
        path,
        f"irregular calendar in column '{schema.PERIOD}': {len(positions)} "
        f"{'row is' if len(positions) == 1 else 'rows are'} not on "
        f"{expected}, e.g. {examples}.",
        hint="Use one period per week (all the same weekday) or per month (the 1st, or YYYY-MM).",
    )


def _last_actual(period: np.ndarray, demand: np.ndarray) -> int:
    """Largest period code of a row with actual demand, -1 when there is none."""
    best = -1
    for lo in range(0, len(period), BLOCK_ROWS):
        codes = period[lo : lo + BLOCK_ROWS][~np.isnan(demand[lo : lo + BLOCK_ROWS])]
        if codes.size:
            best = max(best, int(codes.max()))
    return best


def _history_lags(lag: np.ndarray, period: np.ndarray, last_actual: int) -> tuple[int, ...]:
    """Every lag found on a history row (period up to the latest actual one)."""
    found: set[int] = set()
    for lo in range(0, len(lag), BLOCK_ROWS):
        found.update(
            _small_unique(lag[lo : lo + BLOCK_ROWS][period[lo : lo + BLOCK_ROWS] <= last_actual])[
                0
            ].tolist()
        )
    return tuple(sorted(int(v) for v in found))


def _small_unique(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sorted distinct integers and each value's index among them (``np.unique`` semantics).

    Lags are small whole numbers: counting them is one pass, where sorting the rows is many.
    """
    if values.size and values.min() >= 0 and values.max() < 1 << 16:
        present = np.flatnonzero(np.bincount(values))
        lookup = np.zeros(int(present[-1]) + 1, dtype=np.int32)
        lookup[present] = np.arange(len(present), dtype=np.int32)
        return present.astype(values.dtype), lookup[values]
    uniques, inverse = np.unique(values, return_inverse=True)
    return uniques, inverse


def _cells(series: np.ndarray, period: np.ndarray, n_periods: int) -> np.ndarray:
    """Flat index of each row's (series, period) cell in a series x periods array."""
    size = (int(series.max()) + 1) * n_periods if len(series) else 0
    cell = series.astype(_index_dtype(size))  # a copy: the series codes stay as they are
    cell *= n_periods
    cell += period
    return cell


def _check_duplicates(
    loaded: LoadedLike,
    series: np.ndarray,
    period: np.ndarray,
    lag: np.ndarray | None,
    key_columns: tuple[str, ...],
    n_series: int,
    n_periods: int,
) -> None:
    """Refuse two rows for one (series, period, lag): they are never averaged or summed silently."""
    if lag is None:
        n_lags, lag_index = 1, None
    else:
        lag_values, lag_index = _small_unique(lag)
        n_lags = len(lag_values)
    size = n_series * n_periods * n_lags
    dtype = _index_dtype(size)
    seen = np.zeros(size, dtype=bool)
    for lo in range(0, len(series), BLOCK_ROWS):
        block = series[lo : lo + BLOCK_ROWS].astype(dtype) * n_periods
        block += period[lo : lo + BLOCK_ROWS]
        if lag_index is not None:
            block *= n_lags
            block += lag_index[lo : lo + BLOCK_ROWS]
        seen[block] = True
    if np.count_nonzero(seen) == len(series):
        return
    del seen
    # Error path only: find the duplicated cells and show a few with their rows.
    cell = (series.astype(np.int64) * n_periods + period) * n_lags + (
        0 if lag_index is None else lag_index
    )
    order = np.argsort(cell, kind="stable")
    sorted_cells = cell[order]
    same = np.flatnonzero(sorted_cells[1:] == sorted_cells[:-1])
    dup_cells = np.unique(sorted_cells[same])
    frame = loaded.frame
    examples = []
    for value in dup_cells[:EXAMPLES]:
        positions = order[sorted_cells == value]
        row = frame.iloc[positions[0]]
        # Ids keep their control characters; a message shows them as visible symbols.
        key = " @ ".join(visible(str(row[c])) for c in key_columns)
        stamp = pd.Timestamp(row[schema.PERIOD]).strftime("%Y-%m-%d")
        lag_note = f", lag {int(row[schema.LAG])}" if schema.LAG in frame.columns else ""
        demands = ", ".join(_fmt(v) for v in frame[schema.DEMAND].to_numpy()[positions])
        examples.append(
            f"{key} / {stamp}{lag_note} at {format_rows(loaded.rows(positions))} (demand {demands})"
        )
    what = "(series, period, lag)" if schema.LAG in frame.columns else "(series, period)"
    raise LoadError(
        loaded.path,
        f"{len(dup_cells)} {what} combinations appear on more than one row; "
        "they are not averaged or summed. For example:\n    " + "\n    ".join(examples),
        hint="Remove the duplicate rows, or add the column that tells them apart (location, lag).",
    )


def _choose_lag(
    path: Path, lags: tuple[int, ...], lag: int | None, *, smallest: bool = False
) -> int | None:
    """The lag to score; metrics never mix lags. Several lags need ``lag`` (or ``smallest``)."""
    if lag is not None:
        if lag not in lags:
            raise LoadError(
                path,
                f"lag {lag} is not in the file; the history has lags {', '.join(map(str, lags))}.",
                hint="Choose one of those with --lag.",
            )
        return lag
    if len(lags) > 1 and not smallest:
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
    """Refuse history rows whose actuals disagree across lags; fill in actuals only others carry."""
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
            f"{int(clash.sum())} {'row gives' if int(clash.sum()) == 1 else 'rows give'} "
            "a different demand for the same series and period "
            f"at another lag, at {format_rows(loaded.rows(np.unique(bad)))}.",
            hint="Demand is the actual; it must be the same on every lag row of a period.",
        )
    heads = order[first]
    missing = np.isnan(demand[cell[heads]])
    demand[cell[heads[missing]]] = demand_col[heads[missing]]


def _scatter_prices(price: np.ndarray, cell: np.ndarray, price_col: np.ndarray) -> int:
    """Write the given prices into their flat cells; return how many rows have none.

    Where several rows share a cell (one per lag), the last given price is kept.
    """
    missing = 0
    for lo in range(0, len(cell), BLOCK_ROWS):
        values = price_col[lo : lo + BLOCK_ROWS]
        given = ~np.isnan(values)
        if given.all():
            price[cell[lo : lo + BLOCK_ROWS]] = values
        else:
            missing += len(values) - int(np.count_nonzero(given))
            price[cell[lo : lo + BLOCK_ROWS][given]] = values[given]
    return missing


def _refuse_unpriced(
    path: Path, missing: np.ndarray, keys_unique: pd.DataFrame, key_columns: tuple[str, ...]
) -> None:
    """A priced file must price every series somewhere: its error cannot be valued otherwise."""
    if not missing.size:
        return
    names = ", ".join(
        " @ ".join(visible(str(keys_unique.iloc[i][c])) for c in key_columns)
        for i in missing[:EXAMPLES]
    )
    raise LoadError(
        path,
        f"{len(missing)} series have no price on any row (e.g. {names}), "
        "so their error cannot be valued.",
        hint="Give every series a price, or leave out the price column to rank in units.",
    )


def value_or_units(portfolio: Portfolio, header: str = schema.PRICE) -> Portfolio:
    """The one rule of ranking in value or in units, applied to a whole portfolio as read.

    Errors are valued (|e| x price) when the file has a price column and some series has a price
    above 0 there. A column of zeros values every error at 0: shares of 0 / 0, every series tied,
    "in value" said of nothing. Such a portfolio is given no prices, so every measure, rank,
    share, report and export works in units, and ``units_reason`` and a notice name the column
    (``header``: its name in the file). A mix of priced series and series priced 0 keeps its
    prices: those series' errors are worth 0 in value and they rank last (docs/metrics.md).
    """
    price = portfolio.price
    if price is None or price.any_positive():
        return portfolio
    reason = units_reason(header)
    notices = (*portfolio.notices, units_notice(reason))
    return replace(portfolio, price=None, units_reason=reason, notices=notices)


def units_reason(header: str) -> str:
    """Why a portfolio with a price column ranks in units (``header``: the column's name)."""
    return f"column '{header}' has no price above 0"


def units_notice(reason: str) -> str:
    """The notice that says a price column is not used, and why (see :func:`value_or_units`)."""
    return (
        f"{reason}, so errors are ranked in units, not in value (a price of 0 would value "
        "every error at 0)."
    )


def price_note(missing_rows: int) -> str:
    return (
        f"{missing_rows} rows have no price; each takes its series' nearest earlier price "
        "(or the first later one)."
    )


def fill_prices(price: np.ndarray) -> np.ndarray:
    """Fill each series' price gaps in place; return the series that have no price at all.

    A gap takes the series' nearest earlier price, else its first later one. Only the rows with
    gaps are touched (most series are priced in every period).
    """
    n_cols = price.shape[1]
    columns = np.arange(n_cols)
    unpriced = []
    for lo in range(0, price.shape[0], _SERIES):
        block = price[lo : lo + _SERIES]
        gaps = np.isnan(block)
        rows = np.flatnonzero(gaps.any(axis=1))
        if not rows.size:
            continue
        none = gaps[rows].all(axis=1)
        unpriced.append(rows[none] + lo)
        rows = rows[~none]
        sub, holes = block[rows], gaps[rows]
        idx = np.where(holes, 0, columns)
        np.maximum.accumulate(idx, axis=1, out=idx)
        sub = sub[np.arange(len(rows))[:, None], idx]
        lead = np.isnan(sub)
        if lead.any():
            first = sub[np.arange(len(rows)), np.argmax(~lead, axis=1)]
            sub[lead] = np.broadcast_to(first[:, None], sub.shape)[lead]
        block[rows] = sub
    return np.concatenate(unpriced) if unpriced else np.empty(0, dtype=np.int64)


def _latest_rows(
    series: np.ndarray, period: np.ndarray, n_series: int, n_periods: int, *, unique_cells: bool
) -> np.ndarray:
    """Each series' row with the latest period; among equal periods the later file row."""
    if unique_cells:
        # One row per cell: the latest period is the last filled cell of each series' row.
        filled = np.zeros(n_series * n_periods, dtype=bool)
        for lo in range(0, len(series), BLOCK_ROWS):
            filled[
                _cells(series[lo : lo + BLOCK_ROWS], period[lo : lo + BLOCK_ROWS], n_periods)
            ] = True
        latest = last_filled(filled.reshape(n_series, n_periods)).astype(period.dtype)
        del filled
    else:
        latest = np.full(n_series, -1, dtype=period.dtype)
        np.maximum.at(latest, series, period)
    rows = np.full(n_series, -1, dtype=np.int64)
    for lo in range(0, len(series), BLOCK_ROWS):
        block = series[lo : lo + BLOCK_ROWS]
        hit = np.flatnonzero(period[lo : lo + BLOCK_ROWS] == latest[block])
        # The maximum is taken explicitly rather than left to the order in which numpy applies
        # repeated indices.
        np.maximum.at(rows, block[hit], hit + lo)
    return rows


def str_array(values: np.ndarray, codes: np.ndarray) -> pd.api.extensions.ExtensionArray:
    """``values[codes]`` as pandas' ``str`` column, taken in Arrow (no Python string per row)."""
    import pyarrow as pa

    taken = large_text(values).take(pa.array(codes))
    return pd.array(taken, dtype=pd.StringDtype("pyarrow", na_value=np.nan))


def large_text(values: np.ndarray) -> Any:
    import pyarrow as pa

    return pa.array(values, type=pa.large_string())


def text_rank(values: np.ndarray) -> np.ndarray:
    """Position of each value in sorted text order (ties keep their order)."""
    rank = np.empty(len(values), dtype=np.int64)
    rank[np.argsort(values.astype(str), kind="stable")] = np.arange(len(values))
    return rank


def last_actual_column(demand: np.ndarray) -> int:
    """Latest column of a series x periods array holding any actual demand, -1 if none."""
    any_actual = np.zeros(demand.shape[1], dtype=bool)
    for lo in range(0, demand.shape[0], _SERIES):
        any_actual |= ~np.isnan(demand[lo : lo + _SERIES]).all(axis=0)
    found = np.flatnonzero(any_actual)
    return int(found[-1]) if found.size else -1


def last_filled(grid: np.ndarray) -> np.ndarray:
    """Column of the last True in every row of a boolean matrix (every row has one)."""
    out = np.empty(grid.shape[0], dtype=np.int64)
    for lo in range(0, grid.shape[0], _SERIES):
        out[lo : lo + _SERIES] = (
            grid.shape[1] - 1 - np.argmax(grid[lo : lo + _SERIES, ::-1], axis=1)
        )
    return out


def _series_table(
    frame: pd.DataFrame,
    keys_unique: pd.DataFrame,
    key_columns: tuple[str, ...],
    attributes: tuple[str, ...],
    rows: np.ndarray | None,
) -> pd.DataFrame:
    """Keys plus each series' attributes, taken from the rows ``rows`` (one per series)."""
    columns: dict[str, object] = {
        name: keys_unique[name].astype(str).reset_index(drop=True) for name in key_columns
    }
    for name in attributes:
        column = frame[name]
        if isinstance(column.dtype, pd.CategoricalDtype):
            # Take codes, not values: never materialise the whole column as objects.
            codes = np.asarray(column.array.codes)[rows]
            values = column.cat.categories.to_numpy(dtype=object)[codes]
        else:
            values = column.take(rows).to_numpy(dtype=object)
        columns[name] = pd.Series(np.asarray(values).astype(str), dtype=str)
    # One frame from all columns at once: adding them one by one costs a copy each (quadratic
    # in the number of attributes).
    return pd.DataFrame(columns, copy=False)


def _fmt(value: float) -> str:
    return "empty" if np.isnan(value) else f"{value:g}"
