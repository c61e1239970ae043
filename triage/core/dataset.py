"""A portfolio kept as a folder of Parquet files: a dataset.

A data lake keeps a large portfolio as many Parquet files under one folder, split by period (one
file per month, every series in every file), by region or by load batch, often in folders named
``field=value`` (hive-style partitions). This module reads such a folder as one portfolio, in
steps that run the same in this process and on a cluster (``triage.core.dask_engine``):

* :func:`open_dataset` finds the parts: every ``.parquet``/``.pq`` file below the folder, in
  path order. Hidden files and names starting with ``_`` (``_SUCCESS``, ``_metadata``) are not
  parts. A ``field=value`` folder adds the attribute ``field`` to the rows below it, unless the
  files hold that column themselves.
* :func:`read_part` reads and checks one part exactly as a single file is read
  (``triage.core.read.load_frame``): a bad cell is named by its part and row.
* :func:`summarise` keeps what the whole portfolio's checks need of a part (its columns, periods,
  periods with actual demand, lags); :func:`plan_dataset` combines the summaries: the columns
  (the same in every part), the calendar, the latest actual period, the scoring window and the
  forecast lag.
* :func:`score_part` scores whole series on the dataset's calendar
  (``ranking.series_measures``), after refusing duplicate rows by part and row;
  :func:`measures_of` puts the scored parts back in key order for ``ranking.ranked``.

:func:`read_dataset` is the local engine: every part read in this process into one portfolio,
which every command can use.
"""

from __future__ import annotations

import dataclasses
import itertools
import urllib.parse
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from triage.core import schema
from triage.core.dialect import FileOptions
from triage.core.errors import LoadError
from triage.core.portfolio import (
    EXAMPLES,
    Grid,
    Portfolio,
    UnitPrices,
    _choose_lag,
    build_portfolio,
    calendar_from_uniques,
    calendar_problem,
    units_notice,
    units_reason,
)
from triage.core.ranking import MEASURE_COLUMNS, SeriesMeasures, series_measures
from triage.core.read.columns import SeriesPick, checked_mapping
from triage.core.read.frame import LoadedFrame, load_frame, load_picked
from triage.core.read.parquet import groups_holding, item_ranges
from triage.core.text import visible

#: File name endings of a dataset's parts.
PART_SUFFIXES = (".parquet", ".pq")
#: Columns :func:`read_part` adds: the part's number and each row's row number in its file.
PART, ROW = "_part", "_row"
#: Columns of a scored part that are codes, not scorecard columns.
FLAG_CODE, PATTERN_CODE = "_flag", "_pattern"
#: Columns of each series' error in window period j (``errors=True``: for groups).
WINDOW_ERROR = "_e{}"


@dataclass(frozen=True)
class Dataset:
    """The parts of a dataset folder."""

    folder: Path
    files: tuple[Path, ...]
    """Every part, in path order."""
    fields: tuple[tuple[tuple[str, str], ...], ...]
    """Each part's ``field=value`` folders below ``folder``, outermost first."""

    def name(self, part: int) -> str:
        """The part's path below the folder, for messages (``month=2026-01/part-0.parquet``)."""
        return self.files[part].relative_to(self.folder).as_posix()


def open_dataset(folder: Path) -> Dataset:
    """The parts of the dataset ``folder``.

    Raises:
        LoadError: The folder holds no Parquet file.
    """
    files = sorted(
        p
        for p in folder.rglob("*")
        if p.is_file()
        and p.suffix.lower() in PART_SUFFIXES
        and not any(part.startswith((".", "_")) for part in p.relative_to(folder).parts)
    )
    if not files:
        raise LoadError(
            folder,
            "this folder holds no Parquet file (.parquet or .pq), so it is not a dataset.",
            hint="Point to a folder of Parquet files, or to one portfolio file.",
        )
    fields = tuple(_hive_fields(p.relative_to(folder)) for p in files)
    return Dataset(folder=folder, files=tuple(files), fields=fields)


def _hive_fields(relative: Path) -> tuple[tuple[str, str], ...]:
    """The ``field=value`` folders of a part's path (values URI-decoded, as they are written)."""
    found = []
    for segment in relative.parts[:-1]:
        name, sep, value = segment.partition("=")
        if sep and name:
            found.append((urllib.parse.unquote(name), urllib.parse.unquote(value)))
    return tuple(found)


def read_part(
    dataset: Dataset,
    part: int,
    *,
    columns: dict[str, str] | None = None,
    options: FileOptions | None = None,
) -> LoadedFrame:
    """Read and check part ``part`` as a single file is read, plus its folders' fields.

    The frame gains :data:`PART` (the part's number) and :data:`ROW` (each row's row number in
    its file), so that the checks that need whole series can name the rows after the parts have
    been mixed.

    Raises:
        LoadError: As ``load_frame`` for the file; a folder field that names a key, period or
            number column the files do not hold.
    """
    loaded = load_frame(dataset.files[part], columns=columns, options=options)
    return _as_part(dataset, part, loaded)


def read_picked(
    dataset: Dataset,
    part: int,
    pick: SeriesPick,
    *,
    columns: dict[str, str] | None = None,
    options: FileOptions | None = None,
) -> LoadedFrame | None:
    """:func:`read_part` of the rows of the series ``pick`` alone (``read.load_picked``: only
    the row groups that may hold them are read); None when the part holds none of them."""
    loaded = load_picked(dataset.files[part], pick, columns=columns, options=options)
    return None if loaded is None else _as_part(dataset, part, loaded)


def _as_part(dataset: Dataset, part: int, loaded: LoadedFrame) -> LoadedFrame:
    """A part's checked rows with its folders' fields, :data:`PART` and :data:`ROW`."""
    frame = loaded.frame
    attributes = list(loaded.attributes)
    for name, value in added_fields(dataset, part, frame.columns):
        frame[name] = pd.Categorical.from_codes(
            np.zeros(len(frame), dtype=np.int8), categories=pd.Index([value], dtype=object)
        )
        attributes.append(name)
    frame[PART] = np.full(len(frame), part, dtype=np.int32)
    rows = loaded.rows(np.arange(len(frame)))
    frame[ROW] = np.asarray(rows, dtype=np.int64)
    return LoadedFrame(
        frame=frame,
        path=loaded.path,
        first_row=loaded.first_row,
        attributes=tuple(attributes),
        notices=loaded.notices,
    )


def added_fields(dataset: Dataset, part: int, present: Sequence[str]) -> list[tuple[str, str]]:
    """The part's ``field=value`` folders that add an attribute (the files lack the column).

    Raises:
        LoadError: A folder names a key, period or number column the files lack.
    """
    added = []
    for name, value in dataset.fields[part]:
        if name in present:
            continue
        if schema.is_canonical(name):
            raise LoadError(
                dataset.files[part],
                f"the folder {visible(name)}={visible(value)} gives '{visible(name)}' to the rows "
                "below it, but triage reads that column from the files only.",
                hint=f"Write the '{visible(name)}' column into the files of the dataset.",
            )
        added.append((name, value))
    return added


@dataclass(frozen=True)
class PartSummary:
    """What the whole portfolio's checks need of one part."""

    columns: tuple[str, ...]
    """The canonical and attribute columns, in frame order."""
    attributes: tuple[str, ...]
    stamps: np.ndarray
    """Distinct periods (int64 nanoseconds), sorted."""
    actual: np.ndarray
    """Distinct periods of the rows with actual demand."""
    lag_stamps: np.ndarray
    """Distinct (period, lag) pairs, n x 2 int64; empty without a lag column."""
    rows: int
    notices: tuple[str, ...]
    keys: tuple[tuple[str, ...], tuple[str, ...]] | None = None
    """The part's smallest and largest series key (item, then location), None without rows."""
    price_above_zero: bool = False
    """Some row of the part has a price above 0 (``portfolio.value_or_units``)."""


def summarise(loaded: LoadedFrame) -> PartSummary:
    """The :class:`PartSummary` of a part read by :func:`read_part`."""
    frame = loaded.frame
    stamps = frame[schema.PERIOD].to_numpy(dtype="datetime64[ns]").view(np.int64)
    has_demand = ~np.isnan(frame[schema.DEMAND].to_numpy(dtype=np.float64))
    if schema.LAG in frame.columns:
        pairs = np.column_stack([stamps, frame[schema.LAG].to_numpy(dtype=np.int64)])
        lag_stamps = np.unique(pairs, axis=0)
    else:
        lag_stamps = np.empty((0, 2), dtype=np.int64)
    return PartSummary(
        columns=tuple(c for c in frame.columns if c not in (PART, ROW)),
        attributes=loaded.attributes,
        stamps=np.unique(stamps),
        actual=np.unique(stamps[has_demand]),
        lag_stamps=lag_stamps,
        rows=len(frame),
        notices=loaded.notices,
        keys=_key_range(frame),
        price_above_zero=schema.PRICE in frame.columns
        and bool((frame[schema.PRICE].to_numpy(dtype=np.float64) > 0).any()),
    )


def quick_summary(
    dataset: Dataset,
    part: int,
    *,
    columns: dict[str, str] | None = None,
    options: FileOptions | None = None,
) -> PartSummary:
    """:func:`summarise` of part ``part`` reading only its key, period, demand and lag columns.

    The streamed reader (``triage.core.read.stream``) converts and checks those columns as the
    full loader does; where it cannot vouch for a cell, the part is read and checked whole
    (:func:`read_part`), which gives the same summary or the loader's error.
    """
    from triage.core.portfolio import DAY_NS
    from triage.core.read import FastPathDeclined, scan_parquet

    try:
        source = scan_parquet(dataset.files[part], columns=columns, options=options)
        keys = [c for c in schema.KEY_ORDER if c in source.columns]
        has_lag = schema.LAG in source.columns
        has_price = schema.PRICE in source.columns
        names = [*keys, schema.PERIOD, schema.DEMAND, *([schema.LAG] if has_lag else [])]
        names += [schema.PRICE] if has_price else []
        days, actual, lags, pairs = [], [], [], []
        price_above_zero = False
        for chunk in source.chunks(names):
            got = chunk.columns
            if has_price and not price_above_zero:
                price_above_zero = bool((got[schema.PRICE] > 0).any())
            period = got[schema.PERIOD].astype(np.int64)
            days.append(_distinct(period))
            actual.append(_distinct(period[~np.isnan(got[schema.DEMAND])]))
            if has_lag:
                lags.append(np.unique(np.column_stack([period, got[schema.LAG]]), axis=0))
            # Distinct (item, location) codes: numbered densely first, so they are counted,
            # not sorted.
            item = got[schema.ITEM].astype(np.int64)
            if schema.LOCATION in got:
                location = got[schema.LOCATION].astype(np.int64)
                width = int(location.max()) + 1 if len(location) else 1
                dense = _distinct(item * width + location)
                pairs.append((dense // width) << 32 | (dense % width))
            else:
                pairs.append(_distinct(item) << 32)
        present = list(source.columns)
        extra = [name for name, _ in added_fields(dataset, part, present)]
        key_range = None
        if pairs:
            pair = _distinct(np.concatenate(pairs))
            texts = [np.asarray(source.values(schema.ITEM), dtype=str)[pair >> 32]]
            if schema.LOCATION in keys:
                texts.append(
                    np.asarray(source.values(schema.LOCATION), dtype=str)[pair & 0xFFFFFFFF]
                )
            order = np.lexsort(texts[::-1])
            ends = [tuple(str(t[order[i]]) for t in texts) for i in (0, -1)]
            key_range = (ends[0], ends[1])
    except FastPathDeclined:
        return summarise(read_part(dataset, part, columns=columns, options=options))

    def stamps(found: list[np.ndarray]) -> np.ndarray:
        joined = _distinct(np.concatenate(found)) if found else np.empty(0, dtype=np.int64)
        return joined * DAY_NS

    lag_stamps = np.empty((0, 2), dtype=np.int64)
    if lags:
        lag_stamps = np.unique(np.concatenate(lags), axis=0)
        lag_stamps[:, 0] *= DAY_NS
    return PartSummary(
        columns=(*present, *extra),
        attributes=(*source.attributes, *extra),
        stamps=stamps(days),
        actual=stamps(actual),
        lag_stamps=lag_stamps,
        rows=source.n_rows,
        notices=source.notices,
        keys=key_range,
        price_above_zero=price_above_zero,
    )


def _distinct(values: np.ndarray) -> np.ndarray:
    """Sorted distinct int64 values: by counting when they span little (day numbers), else by
    sorting (numpy's hashed ``unique`` is several times slower on these)."""
    if not len(values):
        return values.astype(np.int64)
    low, high = int(values.min()), int(values.max())
    if high - low < 1 << 22:
        return np.flatnonzero(np.bincount(values - low)) + low
    ordered = np.sort(values)
    keep = np.empty(len(ordered), dtype=bool)
    keep[0] = True
    np.not_equal(ordered[1:], ordered[:-1], out=keep[1:])
    return ordered[keep]


def _key_range(frame: pd.DataFrame) -> tuple[tuple[str, ...], tuple[str, ...]] | None:
    """The smallest and largest (item[, location]) of ``frame``'s rows, in the builder's order."""
    if frame.empty:
        return None
    items = _distinct_text(frame[schema.ITEM])
    ends: list[tuple[str, ...]] = []
    for item in (items[0], items[-1]):
        if schema.LOCATION not in frame.columns:
            ends.append((item,))
            continue
        same = (frame[schema.ITEM] == item).to_numpy()
        locations = _distinct_text(frame[schema.LOCATION][same])
        ends.append((item, locations[0] if item == items[0] else locations[-1]))
    return ends[0], ends[1]


def _distinct_text(column: pd.Series) -> np.ndarray:
    """The distinct values of a text column, sorted as the builder sorts keys (code points)."""
    if isinstance(column.dtype, pd.CategoricalDtype):
        used = np.unique(np.asarray(column.array.codes))
        values = column.cat.categories.to_numpy(dtype=object)[used]
    else:
        values = pd.unique(column.to_numpy(dtype=object))
    return np.sort(np.asarray(values).astype(str))


@dataclass(frozen=True)
class Plan:
    """What every part is scored on: the whole dataset's columns, calendar, window and lag."""

    dataset: Dataset
    grid: Grid
    actual_cols: np.ndarray
    """The calendar columns up to the latest actual one that hold any actual demand."""
    columns: tuple[str, ...]
    attributes: tuple[str, ...]
    rows: int
    notices: tuple[str, ...]
    whole_series: bool = False
    """Every series' rows are in one part (the parts' key ranges do not overlap): the parts can
    be scored as they are, without mixing their rows."""
    units_reason: str = ""
    """Why the dataset's price column is not used (no part has a price above 0: the rule of
    ``portfolio.value_or_units``, judged over every part); ``""`` otherwise."""

    @property
    def key_columns(self) -> tuple[str, ...]:
        return tuple(c for c in schema.KEY_ORDER if c in self.columns)

    @property
    def priced(self) -> bool:
        """Errors are valued: a price column with some price above 0."""
        return schema.PRICE in self.columns and not self.units_reason

    def window_cols(self, window: int) -> np.ndarray:
        """The scoring window's columns: ``metrics.window_columns`` of the whole portfolio."""
        if window < 1:
            raise ValueError("window must be at least 1")
        return self.actual_cols[-window:]


def plan_dataset(
    dataset: Dataset,
    summaries: Sequence[PartSummary],
    *,
    lag: int | None = None,
    smallest_lag: bool = False,
    price_header: str = schema.PRICE,
) -> Plan:
    """Combine the parts' summaries into the whole dataset's :class:`Plan`.

    Raises:
        LoadError: Parts with other columns than the first, periods that are not one weekly or
            monthly calendar, no actual demand anywhere, or a lag the history does not have (or
            several without ``lag``).
    """
    first = summaries[0]
    for part, summary in enumerate(summaries):
        if summary.columns != first.columns:
            raise LoadError(
                dataset.files[part],
                f"its columns ({_names(summary.columns)}) are not those of "
                f"{visible(dataset.name(0))} ({_names(first.columns)}); every part of a dataset "
                "holds the same columns.",
                hint="Write every file of the dataset with the same columns, in the same order.",
            )
    uniques = pd.DatetimeIndex(
        np.unique(np.concatenate([s.stamps for s in summaries])).view("datetime64[ns]")
    )
    found = calendar_from_uniques(uniques)
    if found is None:
        shown = ", ".join(stamp.strftime("%Y-%m-%d") for stamp in uniques[:EXAMPLES])
        raise LoadError(
            dataset.folder,
            f"the periods of the dataset's parts ({shown}, ...) are not one weekly or monthly "
            "calendar.",
            hint="Check each part with `triage check PART`: every period is a week start (7 "
            "days apart) or the first day of a month.",
        )
    calendar, codes = found
    rows = sum(s.rows for s in summaries)
    # The series count is not known before the parts are mixed; 1 leaves out the check that the
    # dense arrays are not far larger than the rows (each part's arrays hold its own series).
    problem = calendar_problem(calendar, codes, rows, 1)
    if problem is not None:
        raise LoadError(dataset.folder, problem[0], hint=problem[1])
    position = pd.Series(np.arange(len(uniques)), index=uniques.asi8)
    actual = np.unique(np.concatenate([s.actual for s in summaries]))
    if not len(actual):
        raise LoadError(
            dataset.folder,
            "no row of any part has actual demand: every demand cell is empty, so nothing can "
            "be scored.",
            hint="Include the demand history, not only the forward forecast.",
        )
    actual_cols = np.unique(codes[position.loc[actual].to_numpy()])
    last_actual = int(actual_cols[-1])
    chosen: int | None = None
    lags: tuple[int, ...] = ()
    if schema.LAG in first.columns:
        pairs = np.concatenate([s.lag_stamps for s in summaries])
        history = codes[position.loc[pairs[:, 0]].to_numpy()] <= last_actual
        lags = tuple(int(v) for v in np.unique(pairs[history, 1]))
        chosen = _choose_lag(dataset.folder, lags, lag, smallest=smallest_lag)
    elif lag is not None:
        raise LoadError(
            dataset.folder,
            f"--lag {lag} was given, but the dataset has no '{schema.LAG}' column: every forecast "
            "in it is of one (unnamed) lag.",
            hint="Leave out --lag, or load the dataset that holds the forecast lags.",
        )
    notices = tuple(dict.fromkeys(n for s in summaries for n in s.notices))
    reason = ""
    if schema.PRICE in first.columns and not any(s.price_above_zero for s in summaries):
        # As one file of every part's rows would be read (portfolio.value_or_units).
        reason = units_reason(price_header)
        notices = (*notices, units_notice(reason))
    ranges = sorted(s.keys for s in summaries if s.keys is not None)
    whole = all(before[1] < after[0] for before, after in itertools.pairwise(ranges))
    return Plan(
        dataset=dataset,
        grid=Grid(calendar=calendar, last_actual=last_actual, lag=chosen, lags=lags),
        actual_cols=actual_cols,
        columns=first.columns,
        attributes=first.attributes,
        rows=rows,
        notices=notices,
        whole_series=whole,
        units_reason=reason,
    )


def _names(columns: Sequence[str]) -> str:
    return ", ".join(visible(c) for c in columns)


def check_duplicates(frame: pd.DataFrame, plan: Plan, *, some: bool = False) -> None:
    """Refuse two rows for one (series, period, lag), naming each row's part and row.

    ``some``: ``frame`` holds only some of the dataset's series, so the count is a lower bound.

    Raises:
        LoadError: Some (series, period[, lag]) is on more than one row.
    """
    on = [*plan.key_columns, schema.PERIOD, *([schema.LAG] if schema.LAG in frame.columns else [])]
    # One integer per (series, period, lag) from each column's codes: a sort finds repeats
    # (hashing the rows' text would take several times longer).
    cell = np.zeros(len(frame), dtype=np.int64)
    for name in on:
        codes, uniques = pd.factorize(frame[name])
        cell = cell * len(uniques) + codes
    cell.sort()
    if not (cell[1:] == cell[:-1]).any():
        return
    twice = frame.duplicated(on, keep=False).to_numpy()
    rows = frame.loc[twice].sort_values([*on, PART, ROW], kind="stable")
    examples = []
    for _, same in list(rows.groupby(on, sort=False, observed=True))[:EXAMPLES]:
        head = same.iloc[0]
        key = " @ ".join(visible(str(head[c])) for c in plan.key_columns)
        stamp = pd.Timestamp(head[schema.PERIOD]).strftime("%Y-%m-%d")
        lag_note = f", lag {int(head[schema.LAG])}" if schema.LAG in frame.columns else ""
        where = "; ".join(
            f"{visible(plan.dataset.name(int(p)))} row {int(r)}"
            for p, r in zip(same[PART], same[ROW], strict=True)
        )
        examples.append(f"{key} / {stamp}{lag_note} at {where}")
    what = "(series, period, lag)" if schema.LAG in frame.columns else "(series, period)"
    count = len(rows.drop_duplicates(on))
    raise LoadError(
        plan.dataset.folder,
        f"{'at least ' if some else ''}{count} {what} combinations appear on more than one row "
        "of the dataset; they are not averaged or summed. For example:\n    "
        + "\n    ".join(examples),
        hint="Remove the duplicate rows, or add the column that tells them apart (location, lag).",
    )


def build_part(frame: pd.DataFrame, plan: Plan, *, some: bool = False) -> Portfolio:
    """The portfolio of the whole series in ``frame`` (rows of :func:`read_part`), on the plan.

    ``some``: ``frame`` holds only some of the dataset's series (:func:`check_duplicates`).

    Raises:
        LoadError: Duplicate rows, or a series without any price in a priced dataset.
    """
    check_duplicates(frame, plan, some=some)
    loaded = LoadedFrame(
        frame=frame.drop(columns=[PART, ROW]),
        path=plan.dataset.folder,
        first_row=1,
        attributes=plan.attributes,
        notices=plan.notices,
    )
    portfolio = build_portfolio(loaded, consume=True, grid=plan.grid)
    if plan.units_reason:
        portfolio = dataclasses.replace(portfolio, price=None, units_reason=plan.units_reason)
    return portfolio


def score_part(
    frame: pd.DataFrame,
    plan: Plan,
    cols: np.ndarray,
    season: int,
    steps: Sequence[str] | None,
    errors: bool = False,
) -> pd.DataFrame:
    """The measures of the whole series in ``frame`` over the window ``cols``: one row per
    series, in key order.

    Columns: the key columns, the numeric measures (``ranking.MEASURE_COLUMNS``, the value
    ones where priced), the codes :data:`FLAG_CODE` and :data:`PATTERN_CODE`, then the
    attributes; with ``errors``, then each series' error per window period
    (:data:`WINDOW_ERROR`, ``groups.window_errors``). No rows give no rows, with those columns.
    """
    if frame.empty:
        return _no_measures(plan, len(cols) if errors else 0)
    portfolio = build_part(frame, plan, some=True)
    measures = series_measures(portfolio, cols, season, steps)
    return measures_frame(portfolio, measures, cols if errors else None)


#: Measures that are whole numbers; every other one is float64.
_WHOLE = ("periods", "bias_run")
#: Measures only a priced portfolio has.
_VALUED = ("abs_error_value", "bias_value", "fva_loss_value")


def _no_measures(plan: Plan, width: int = 0) -> pd.DataFrame:
    """The columns of :func:`score_part` without a row (``width`` window errors)."""
    text = pd.StringDtype("pyarrow", na_value=np.nan)
    data: dict[str, Any] = {c: pd.array([], dtype=text) for c in plan.key_columns}
    for name in MEASURE_COLUMNS:
        if name in _VALUED and not plan.priced:
            continue
        data[name] = np.empty(0, dtype=np.int64 if name in _WHOLE else np.float64)
    data[FLAG_CODE] = np.empty(0, dtype=np.int8)
    data[PATTERN_CODE] = np.empty(0, dtype=np.int8)
    data.update({c: pd.array([], dtype=text) for c in plan.attributes})
    data.update({WINDOW_ERROR.format(j): np.empty(0) for j in range(width)})
    return pd.DataFrame(data)


def score_whole_part(
    dataset: Dataset,
    part: int,
    plan: Plan,
    cols: np.ndarray,
    season: int,
    steps: Sequence[str] | None,
    *,
    columns: dict[str, str] | None = None,
    options: FileOptions | None = None,
    errors: bool = False,
) -> pd.DataFrame:
    """:func:`score_part` of a part that holds whole series (``plan.whole_series``), read by
    :func:`whole_part`."""
    portfolio = whole_part(dataset, part, plan, columns=columns, options=options)
    if portfolio is None:
        return _no_measures(plan, len(cols) if errors else 0)
    measures = series_measures(portfolio, cols, season, steps)
    return measures_frame(portfolio, measures, cols if errors else None)


def whole_part(
    dataset: Dataset,
    part: int,
    plan: Plan,
    *,
    columns: dict[str, str] | None = None,
    options: FileOptions | None = None,
) -> Portfolio | None:
    """The portfolio of a part that holds whole series (``plan.whole_series``), on the plan.

    The part is read as a single file is (``read_portfolio``: streamed when it can be), then
    placed on the dataset's calendar (:func:`on_grid`). A dataset with forecast lags reads the
    part the full way (:func:`read_part`, :func:`build_part`): its lag is the dataset's, which
    the part's own history may not show. None: a part without rows (read the full way).
    """
    from triage.core.read import read_portfolio

    if schema.LAG in plan.columns:
        frame = read_part(dataset, part, columns=columns, options=options).frame
        return None if frame.empty else build_part(frame, plan, some=True)
    return on_grid(
        read_portfolio(dataset.files[part], columns=columns, options=options), plan, dataset, part
    )


def on_grid(portfolio: Portfolio, plan: Plan, dataset: Dataset, part: int) -> Portfolio:
    """``portfolio`` (one part, read on its own calendar) on the dataset's calendar and latest
    actual period, with the attributes its folders add.

    The part's calendar is a run of the dataset's (the plan's calendar is made of every part's
    periods); columns outside it are empty, and prices, filled along each series, extend from
    the part's first and last columns (``fill_prices``: the nearest earlier price, else the
    first later one).
    """
    calendar = plan.grid.calendar
    offset = int(calendar.periods.get_loc(portfolio.calendar.periods[0]))
    width = len(calendar.periods)
    span = slice(offset, offset + len(portfolio.calendar.periods))

    def placed(values: np.ndarray) -> np.ndarray:
        out = np.full((values.shape[0], width), np.nan)
        out[:, span] = values
        return out

    price = None
    if portfolio.price is not None and plan.priced:
        dense = placed(np.asarray(portfolio.price))
        dense[:, : span.start] = dense[:, span.start : span.start + 1]
        dense[:, span.stop :] = dense[:, span.stop - 1 : span.stop]
        price = UnitPrices.from_dense(dense)
    elif plan.priced:
        # A part read on its own whose prices are all 0 comes without them
        # (``portfolio.value_or_units`` judges a whole portfolio): in a priced dataset its
        # series are priced 0, as the file says.
        n = portfolio.n_series
        price = UnitPrices(np.zeros(n), np.empty(0, np.int64), np.empty((0, width)))
    keys = portfolio.keys
    fields = added_fields(dataset, part, keys.columns)
    if fields:
        keys = keys.assign(**{name: value for name, value in fields})
    return dataclasses.replace(
        portfolio,
        path=plan.dataset.folder,
        keys=keys,
        attributes=(*portfolio.attributes, *(name for name, _ in fields)),
        calendar=calendar,
        demand=placed(portfolio.demand),
        forecast=placed(portfolio.forecast),
        price=price,
        last_actual=plan.grid.last_actual,
        competing={name: placed(values) for name, values in portfolio.competing.items()},
        units_reason=plan.units_reason,
        _text_codes={},
    )


def measures_frame(
    portfolio: Portfolio, measures: SeriesMeasures, cols: np.ndarray | None = None
) -> pd.DataFrame:
    """``measures`` of ``portfolio`` as one frame (see :func:`score_part`); with ``cols``, each
    series' errors in those window columns too."""
    from triage.core.groups import window_errors

    order = np.arange(portfolio.n_series)
    data: dict[str, Any] = {c: measures.text(c, order) for c in measures.key_columns}
    data.update(measures.numbers)
    data[FLAG_CODE] = measures.flag
    data[PATTERN_CODE] = measures.pattern
    data.update({c: measures.text(c, order) for c in measures.attributes})
    if cols is not None:
        errors = window_errors(portfolio, cols)
        data.update({WINDOW_ERROR.format(j): errors[:, j] for j in range(len(cols))})
    return pd.DataFrame(data, copy=False)


def measures_of(frame: pd.DataFrame, plan: Plan) -> SeriesMeasures:
    """The scored parts' rows (:func:`score_part`, in any order) as one portfolio's measures.

    The rows are put in key order (item, then location, as the builder orders series: by code
    point, which is the byte order of UTF-8 that Arrow sorts by), so that every ranking breaks
    ties as a single file's would (:func:`key_order`). The frame's columns are taken out as
    they are converted.
    """
    import pyarrow as pa

    keys = plan.key_columns
    texts = {c: arrow_text(frame.pop(c)) for c in (*keys, *plan.attributes) if c in frame}
    order = key_order(texts, keys)
    texts = {c: values.take(order) for c, values in texts.items()}
    at = np.asarray(order)
    numbers = {c: frame.pop(c).to_numpy()[at] for c in list(frame.columns) if c in _NUMERIC}
    flag = frame.pop(FLAG_CODE).to_numpy(dtype=np.int8)[at]
    pattern = frame.pop(PATTERN_CODE).to_numpy(dtype=np.int8)[at]
    width = 0
    while WINDOW_ERROR.format(width) in frame:
        width += 1
    errors = None
    if width:
        errors = np.empty((len(at), width))
        for j in range(width):
            errors[:, j] = frame.pop(WINDOW_ERROR.format(j)).to_numpy(dtype=np.float64)[at]

    def text(name: str, taken: np.ndarray) -> pd.api.extensions.ExtensionArray:
        return pd.array(
            texts[name].take(pa.array(taken)), dtype=pd.StringDtype("pyarrow", na_value=np.nan)
        )

    return SeriesMeasures(
        numbers=numbers,
        flag=flag,
        pattern=pattern,
        key_columns=keys,
        attributes=plan.attributes,
        text=text,
        window_errors=errors,
    )


def key_order(texts: dict[str, Any], keys: Sequence[str]) -> Any:
    """The positions of series, given their key columns' text (Arrow arrays), in key order:
    item, then location, by code point as the builder orders series (the byte order of UTF-8,
    which Arrow sorts by)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    table = pa.table({c: texts[c] for c in keys})
    return pc.sort_indices(table, sort_keys=[(c, "ascending") for c in keys])


def arrow_text(column: pd.Series) -> Any:
    """A text column (Arrow-backed, categorical or object) as one Arrow large_string array."""
    import pyarrow as pa

    values = pa.array(column.array) if hasattr(column.array, "__arrow_array__") else None
    if values is None:
        values = pa.array(column.to_numpy(dtype=object), type=pa.large_string())
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    # A dictionary (categorical) array casts to its values.
    return values.cast(pa.large_string())


_NUMERIC = frozenset(MEASURE_COLUMNS)


def read_dataset(
    folder: Path,
    *,
    columns: dict[str, str] | None = None,
    options: FileOptions | None = None,
    lag: int | None = None,
    smallest_lag: bool = False,
    on_plan: Callable[[Plan], None] | None = None,
) -> Portfolio:
    """The local engine: every part of the dataset ``folder`` read here into one portfolio.

    The portfolio is the one a single file holding every part's rows would give (same series,
    calendar, arrays and measures); its ``path`` is the folder. ``on_plan`` is given the
    dataset's plan (a stored scorecard's description, ``triage.core.card_folder``).

    Raises:
        LoadError: A part cannot be read (named with its row), or the parts do not make one
            portfolio (see :func:`plan_dataset` and :func:`check_duplicates`).
    """
    dataset = open_dataset(folder)
    parts = [
        read_part(dataset, i, columns=columns, options=options) for i in range(len(dataset.files))
    ]
    plan = plan_dataset(
        dataset,
        [summarise(p) for p in parts],
        lag=lag,
        smallest_lag=smallest_lag,
        price_header=(columns or {}).get(schema.PRICE, schema.PRICE),
    )
    if on_plan is not None:
        on_plan(plan)
    frame = concat_parts([p.frame for p in parts])
    del parts
    return build_part(frame, plan)


def fetch_series(
    plan: Plan,
    keys: Sequence[tuple[str, str]],
    *,
    columns: dict[str, str] | None = None,
    options: FileOptions | None = None,
    ranges: Sequence[Sequence[tuple[str, str] | None]] | None = None,
) -> Portfolio | None:
    """The whole histories of the series ``keys`` ((item, location), location ``""`` without a
    location column), read from the dataset of ``plan`` on demand, on its calendar.

    ``ranges``: each part's row groups' item (min, max) (:func:`part_ranges`), when the caller
    keeps them: the parts none of whose row groups may hold the series are then not opened.

    Each part reads only the row groups whose item statistics may hold one of the series
    (predicate pushdown on the Parquet statistics): a dataset whose parts keep each series'
    rows together (sorted or split by series) reads a row group or so per part; one whose rows
    are in no key order reads every row group. The rows are checked as a whole read checks
    them; the portfolio's series are in key order, like every portfolio's.

    Returns:
        The portfolio of the series found, or None when no part holds any of them.

    Raises:
        LoadError: As :func:`read_part` for the rows read, or duplicate rows of a series.
    """
    pick = SeriesPick(tuple((str(i), str(loc)) for i, loc in keys))
    found = []
    for part in range(len(plan.dataset.files)):
        if ranges is not None and not groups_holding(ranges[part], pick.items):
            continue
        loaded = read_picked(plan.dataset, part, pick, columns=columns, options=options)
        if loaded is not None:
            found.append(loaded.frame)
    if not found:
        return None
    return build_part(concat_parts(found), plan, some=True)


def part_ranges(
    dataset: Dataset, columns: dict[str, str] | None = None
) -> list[tuple[tuple[str, str] | None, ...]]:
    """Each part's row groups' item (min, max), from the footers alone
    (``read.parquet.item_ranges``), for :func:`fetch_series`.

    Raises:
        LoadError: A part is not Parquet, or its columns are not a portfolio's.
    """
    mapping = checked_mapping(dataset.folder, columns)
    return [item_ranges(path, mapping) for path in dataset.files]


def concat_parts(frames: Sequence[pd.DataFrame]) -> pd.DataFrame:
    """Rows of several parts as one frame; text columns stay categorical (their union)."""
    from pandas.api.types import union_categoricals

    if len(frames) == 1:
        return frames[0]
    data: dict[str, Any] = {}
    for name in frames[0].columns:
        pieces = [f[name] for f in frames]
        if all(isinstance(p.dtype, pd.CategoricalDtype) for p in pieces):
            data[name] = union_categoricals(pieces, ignore_order=True)
        else:
            data[name] = np.concatenate([p.to_numpy() for p in pieces])
    return pd.DataFrame(data, copy=False)
