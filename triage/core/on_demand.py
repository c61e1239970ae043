"""A review on a stored scorecard: the list from the scorecard, histories from the dataset.

A dataset too large for one machine is scored on a cluster
(``triage rank DATASET --engine dask --format parquet --output DIR``, ``core.card_folder``).
``triage review DATASET --scorecard DIR`` then opens the review screens on that scorecard
without reading the dataset's histories: :func:`open_review` gives a :class:`Portfolio` whose
keys, attributes and calendar are known at once and whose demand, forecasts and prices are
:class:`FetchedRows`: matrices whose rows come from :class:`Histories`, which reads a few
series at a time from the dataset (``dataset.fetch_series``: only the row groups that may hold
them) and keeps the latest ones fetched.

A row that has not been fetched raises :class:`NotFetched`; the screens fetch it on a worker
first (``Histories.fetch``), so no keystroke waits on the dataset. Whatever needs every series'
history (the adjusted forecast's export, groups, re-scoring earlier cycles) raises
:class:`EveryHistoryNeeded`, a ``TriageError`` the screens show as a message.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import threading
from collections import OrderedDict
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, NoReturn

import numpy as np
import pandas as pd

from triage.core import schema
from triage.core.card_folder import CardFolder, check_unchanged, open_card_folder
from triage.core.dataset import Plan, fetch_series, part_ranges
from triage.core.errors import LoadError, TriageError
from triage.core.portfolio import Portfolio
from triage.core.settings import CACHE_LIMIT_MB, ScoreSettings
from triage.core.text import visible

#: Series whose histories are kept once fetched (about 4 KB each at 117 weekly periods).
KEPT = 4096
#: The most series' histories read for one request (the series with earlier adjustments, when
#: a review opens); more needs every history (:class:`EveryHistoryNeeded`).
AT_ONCE = 200_000


class EveryHistoryNeeded(TriageError):
    """What was asked needs every series' history, which a scorecard review does not hold."""

    def __init__(self, what: str = "this") -> None:
        super().__init__(
            f"{what} needs every series' history, which a review on a stored scorecard does "
            "not hold (histories are fetched from the dataset a few series at a time).",
            hint="Run it on the dataset with triage rank/compare/check --engine dask, or review "
            "a portfolio file that fits in memory.",
        )


class NotFetched(TriageError):
    """A series' history has not been fetched from the dataset yet (``Histories.fetch``)."""

    def __init__(self, series: int) -> None:
        self.series = series
        super().__init__(f"the history of series {series} is still being fetched.")


class Histories:
    """The histories of a dataset's series, fetched on demand and kept for the latest
    :data:`KEPT` series used.

    ``fetch`` does the I/O (a worker thread); on the main thread ``rows`` only looks up what is
    kept, so the screens' keys never read the dataset. Before and after each read the dataset's
    parts are compared with those the scorecard was made from (``unchanged``): a history read
    from a dataset changed since is never shown beside the scorecard.
    """

    def __init__(
        self,
        plan: Plan,
        key_of: Callable[[int], tuple[str, str]],
        *,
        columns: dict[str, str] | None = None,
        unchanged: Callable[[], None] | None = None,
        kept: int = KEPT,
    ) -> None:
        self.plan = plan
        self._key_of = key_of
        self._columns = columns
        self._unchanged = unchanged or (lambda: None)
        self._kept = kept
        self._rows: OrderedDict[int, dict[str, np.ndarray]] = OrderedDict()
        self._lock = threading.Lock()
        self._ranges: list[tuple[tuple[str, str] | None, ...]] | None = None
        """Each part's row groups' item (min, max), read from the footers on the first fetch:
        a fetch opens only the parts that may hold its series."""
        self.n_periods = len(plan.grid.calendar.periods)
        self.fetches = 0
        """Reads of the dataset so far (each for one or more series)."""

    def has(self, series: int) -> bool:
        """Whether the series' history is at hand."""
        return series in self._rows

    def fetch(self, series: Iterable[int]) -> dict[int, dict[str, np.ndarray]]:
        """Read the histories of ``series`` that are not at hand from the dataset (I/O), a
        chunk of at most :data:`KEPT` series at a time, and keep the latest ones.

        A series the dataset no longer holds reads as empty (every period missing): the
        scorecard still shows its row.

        Returns:
            Each series' rows by matrix name (those read now and those already kept).

        Raises:
            LoadError: A part cannot be read, or the dataset changed since the scorecard was
                made.
        """
        asked = list(dict.fromkeys(int(s) for s in series))
        got: dict[int, dict[str, np.ndarray]] = {}
        with self._lock:
            for s in asked:
                kept = self._rows.get(s)
                if kept is not None:
                    self._rows.move_to_end(s)
                    got[s] = kept
        wanted = [s for s in asked if s not in got]
        for start in range(0, len(wanted), self._kept):
            chunk = wanted[start : start + self._kept]
            keys = [self._key_of(s) for s in chunk]
            self._unchanged()
            if self._ranges is None:
                self._ranges = part_ranges(self.plan.dataset, self._columns)
            read = fetch_series(self.plan, keys, columns=self._columns, ranges=self._ranges)
            self._unchanged()
            self.fetches += 1
            found: dict[tuple[str, str], int] = {}
            if read is not None:
                found = {read.key(j): j for j in range(read.n_series)}
            with self._lock:
                for s, key in zip(chunk, keys, strict=True):
                    got[s] = self._rows[s] = _rows_of(read, found.get(key), self.n_periods)
                    self._rows.move_to_end(s)
                while len(self._rows) > self._kept:
                    self._rows.popitem(last=False)
        return got

    def rows(self, series: np.ndarray) -> list[dict[str, np.ndarray]]:
        """The rows of each of ``series`` (distinct positions), by matrix name.

        Off the main thread (a worker: the screens' load, a command) the histories not at
        hand are fetched; on it (the screens' keys) they raise :class:`NotFetched`, so a
        keystroke never waits on the dataset.

        Raises:
            NotFetched: On the main thread, a series whose history is not at hand.
            EveryHistoryNeeded: More than :data:`AT_ONCE` series asked for at once.
        """
        if len(series) > AT_ONCE:
            raise EveryHistoryNeeded(f"reading {len(series):,} series' histories at once")
        positions = [int(s) for s in series]
        with self._lock:
            kept = [self._rows.get(s) for s in positions]
            missing = [s for s, k in zip(positions, kept, strict=True) if k is None]
            for s in positions:
                if s in self._rows:
                    self._rows.move_to_end(s)
        if not missing:
            return kept  # type: ignore[return-value]
        if threading.current_thread() is threading.main_thread():
            raise NotFetched(missing[0])
        got = self.fetch(positions)
        return [got[s] for s in positions]


def _rows_of(got: Portfolio | None, j: int | None, n_periods: int) -> dict[str, np.ndarray]:
    """One series' rows of a fetched portfolio by matrix name (NaN rows when not found)."""
    empty = np.full(n_periods, np.nan)
    empty.flags.writeable = False
    if got is None or j is None:
        return _EmptyRows(empty)
    rows = {
        schema.DEMAND: np.array(got.demand[j], dtype=np.float64),
        schema.FORECAST: np.array(got.forecast[j], dtype=np.float64),
    }
    if got.price is not None:
        rows[schema.PRICE] = np.array(got.price[j], dtype=np.float64)
    for name, values in got.competing.items():
        rows[name] = np.array(values[j], dtype=np.float64)
    for values in rows.values():
        values.flags.writeable = False
    return _EmptyRows(empty, rows)


class _EmptyRows(dict[str, np.ndarray]):
    """A series' rows by name; a matrix the series has no row in reads as every period missing."""

    def __init__(self, empty: np.ndarray, rows: dict[str, np.ndarray] | None = None) -> None:
        super().__init__(rows or {})
        self._empty = empty

    def __missing__(self, key: str) -> np.ndarray:
        return self._empty


class FetchedRows:
    """A series x periods matrix whose rows are fetched on demand (:class:`Histories`).

    Indexes like a read-only float64 array for some rows: ``m[i]``, ``m[i, cols]``,
    ``m[rows, cols]``, ``m[np.ix_(rows, cols)]``. Taking every row (``m[:, cols]``,
    ``np.asarray(m)``) raises :class:`EveryHistoryNeeded`; a row not fetched yet raises
    :class:`NotFetched`.
    """

    def __init__(self, histories: Histories, name: str, n_series: int) -> None:
        self._histories = histories
        self._name = name
        self.shape = (n_series, histories.n_periods)
        self.ndim = 2
        self.dtype = np.dtype(np.float64)

    def __len__(self) -> int:
        return self.shape[0]

    def __repr__(self) -> str:
        return f"FetchedRows({self._name!r}, shape={self.shape})"

    def __array__(self, dtype: Any = None, copy: bool | None = None) -> NoReturn:
        raise EveryHistoryNeeded()

    def __getitem__(self, key: Any) -> Any:
        rows, cols = (key[0], key[1:]) if isinstance(key, tuple) else (key, ())
        n = self.shape[0]
        if isinstance(rows, slice):
            # A slice of rows stays a slice: the rows in order, then the columns as given.
            taken = np.arange(*rows.indices(n))
            block = _stacked(self._histories.rows(taken), self._name, self.shape[1])
            return block[(slice(None), *cols)]
        picked = np.asarray(rows)
        if picked.dtype == bool or (picked.size and picked.dtype.kind not in "iu"):
            raise EveryHistoryNeeded()
        picked = picked.astype(np.int64)
        if picked.size and (picked.min() < -n or picked.max() >= n):
            raise IndexError(f"series index out of range for {n} series")
        picked = np.where(picked < 0, picked + n, picked)
        distinct, local = np.unique(picked, return_inverse=True)
        block = _stacked(self._histories.rows(distinct), self._name, self.shape[1])
        # The same indexing on the block of distinct rows: numpy's rules for ``m[rows, cols]``
        # (pointwise, np.ix_, a row and a slice) hold as they would on the whole matrix.
        return block[(local.reshape(picked.shape), *cols)]


def _stacked(kept: list[dict[str, np.ndarray]], name: str, width: int) -> np.ndarray:
    """Rows ``name`` of the kept series, one under the other."""
    return np.stack([k[name] for k in kept]) if kept else np.empty((0, width))


@dataclass(frozen=True)
class ScorecardReview:
    """What :func:`open_review` opens: the portfolio (histories on demand), its scorecard in
    review order, and the settings it was scored at."""

    portfolio: Portfolio
    card: pd.DataFrame
    """The scorecard in error order; index = position (the series' row in the stored files)."""
    settings: ScoreSettings
    histories: Histories
    notices: tuple[str, ...]
    cached: bool = False
    """The scorecard came from the reopen cache (``triage.core.cache``)."""
    keep: Callable[[Callable[[], bool]], None] | None = None
    """Store the scorecard in the reopen cache (given a "stop now" check), when it was read
    from its files and a cache folder was given; None otherwise."""


def fingerprint(folder: CardFolder) -> str:
    """SHA-256 of the dataset's parts as the scorecard describes them (names, sizes, times):
    what decisions store as the data they were made on (a file's is its content's hash)."""
    parts = [list(part) for part in folder.parts]
    return hashlib.sha256(json.dumps(parts).encode("utf-8")).hexdigest()


def reviewable(
    dataset: Path, scorecard: Path, *, columns: dict[str, str] | None = None
) -> CardFolder:
    """The scorecard folder ``scorecard`` of ``dataset``, checked for a review: complete, of
    the dataset as it is (``card_folder.open_card_folder``), of every series, and read with
    the ``--columns`` given, if any.

    Raises:
        LoadError: The folder cannot be reviewed; the message says why and what to do.
    """
    stored = open_card_folder(scorecard, dataset)
    scored = stored.scored
    if scored.rows != scored.series:
        raise LoadError(
            scorecard,
            f"this scorecard holds the leading {scored.rows:,} of {scored.series:,} series "
            "(--top or --cover); the review needs every series' row for its totals and shares.",
            hint="Write the whole scorecard: triage rank DATASET --engine dask --format parquet "
            "--output DIR (without --top or --cover).",
        )
    if columns is not None and columns != (scored.columns or {}):
        raise LoadError(
            scorecard,
            "--columns differs from the mapping the scorecard was made with "
            f"({_mapping(scored.columns)}); the histories must be read as the scores were.",
            hint="Leave out --columns: the review reads the dataset with the scorecard's.",
        )
    return stored


def _mapping(columns: dict[str, str] | None) -> str:
    if not columns:
        return "none"
    return visible(", ".join(f"{k}={v}" for k, v in columns.items()))


def open_review(
    dataset: Path,
    scorecard: Path,
    settings: ScoreSettings,
    *,
    columns: dict[str, str] | None = None,
    cache_folder: Path | None = None,
    cache_limit: int | None = None,
) -> ScorecardReview:
    """The review of ``dataset`` on its stored scorecard folder ``scorecard``.

    The settings' window and season become the scorecard's (a notice says so when they
    differ); the lag is the one it was scored at. With ``cache_folder``, the scorecard is
    opened memory-mapped from the reopen cache when it is there (``cache.load_scorecard``),
    else read from its files, and ``keep`` stores it there (the folder kept under
    ``cache_limit`` bytes; default ``--cache-limit``'s, ``settings.CACHE_LIMIT_MB``).

    Raises:
        LoadError: The folder is not a complete scorecard of this dataset as it is now
            (``card_folder.open_card_folder``), or holds only the leading series.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    stored = reviewable(dataset, scorecard, columns=columns)
    scored, plan = stored.scored, stored.plan
    notices = list(plan.notices)
    if (settings.window, settings.season) != (scored.window, scored.season):
        notices.append(
            f"The scorecard was scored over a window of {scored.window} periods with season "
            f"{scored.season}; the review uses those (not {settings.window} and "
            f"{settings.season})."
        )
    settings = dataclasses.replace(
        settings, window=scored.window, season=scored.season, lag=plan.grid.lag
    )
    key = table = None
    if cache_folder is not None:
        from triage.core import cache
        from triage.core.card_folder import DESCRIPTION

        described = (scorecard / DESCRIPTION).read_bytes()
        key = cache.scorecard_key(scorecard, stored.files, described)
        table = cache.load_scorecard(key, cache_folder)
    cached = table is not None
    if table is None:
        table = pa.concat_tables([pq.read_table(f) for f in stored.files])
    # One block per column: no copy of the numbers into one 2-D block (a third of the open
    # at ten million series).
    stored_card = table.to_pandas(split_blocks=True, self_destruct=not cached)
    del table
    # Positions are the stored rows; the review's card is in error order (rank 1 first): as
    # stored, unless the scorecard was written in another order (--by bias, --by fva).
    rank = stored_card["rank"].to_numpy()
    card = stored_card
    if len(rank) > 1 and not bool((rank[1:] > rank[:-1]).all()):
        card = stored_card.iloc[np.argsort(rank, kind="stable")]
    keys = stored_card[[*plan.key_columns, *plan.attributes]].reset_index(drop=True)
    n = len(stored_card)
    held: list[Portfolio] = []
    histories = Histories(
        plan,
        lambda series: held[0].key(series),
        columns=scored.columns,
        unchanged=lambda: check_unchanged(stored),
    )
    competing = {
        name: FetchedRows(histories, name, n)
        for name in (schema.competing_name(c) for c in plan.columns)
        if name is not None
    }
    portfolio = Portfolio(
        path=dataset,
        keys=keys,
        key_columns=plan.key_columns,
        attributes=plan.attributes,
        calendar=plan.grid.calendar,
        demand=FetchedRows(histories, schema.DEMAND, n),  # type: ignore[arg-type]
        forecast=FetchedRows(histories, schema.FORECAST, n),  # type: ignore[arg-type]
        price=FetchedRows(histories, schema.PRICE, n) if plan.priced else None,  # type: ignore[arg-type]
        last_actual=plan.grid.last_actual,
        lag=plan.grid.lag,
        lags=plan.grid.lags,
        rows=plan.rows,
        notices=tuple(notices),
        units_reason=plan.units_reason,
        competing=competing,  # type: ignore[arg-type]
    )
    portfolio.__dict__["fingerprint"] = fingerprint(stored)
    held.append(portfolio)
    keep = None
    if cache_folder is not None and key is not None and not cached:
        found_key, folder = key, cache_folder
        limit = CACHE_LIMIT_MB.default << 20 if cache_limit is None else cache_limit

        def keep(cancelled: Callable[[], bool]) -> None:
            from triage.core import cache

            cache.store_scorecard(
                found_key, stored_card, scorecard, folder, limit, cancelled=cancelled
            )

    return ScorecardReview(
        portfolio=portfolio,
        card=card,
        settings=settings,
        histories=histories,
        notices=tuple(notices),
        cached=cached,
        keep=keep,
    )
