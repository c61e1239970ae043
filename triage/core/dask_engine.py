"""The Dask engine: score a dataset (a folder of Parquet parts) on a Dask cluster.

The steps are those of the local engine (``triage.core.dataset``), spread over the cluster:

1. every part is read and checked on a worker, exactly as a single file is read; only a small
   summary comes back (columns, periods, lags), from which the client makes the plan: the
   calendar, the latest actual period, the scoring window and the lag;
2. the parts' rows are shuffled by series key, so that each task holds whole series — unless
   the parts' key ranges show that each already does (a dataset split by series) — and every
   task scores its series with the kernel the local engine uses (``ranking.series_measures``)
   on the plan's calendar. The shuffle is two rounds of Dask tasks: one per part deals its rows
   into buckets by a hash of the key text, carrying each text column as codes into the text
   the piece uses; one per bucket joins its pieces (:func:`_deal`, :func:`_gathered`). Text
   repeated on every row (keys, attributes) then crosses as 4-byte codes, not as strings;
3. the measures, one row per series, come back to the client, which ranks them once
   (``ranking.ranked``): ranks, shares and cumulative shares are those of a single file.

Parts are read twice (once for the plan, once for the scoring): the plan needs every part's
periods before anything can be placed on the calendar, and holding the rows between the two
would take the cluster's memory.
"""

from __future__ import annotations

import contextlib
import dataclasses
import functools
import itertools
import logging
import math
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeVar

import numpy as np
import pandas as pd

from triage.core import schema
from triage.core.compare import Comparison, Sums
from triage.core.dataset import (
    Dataset,
    PartSummary,
    Plan,
    arrow_text,
    build_part,
    key_order,
    measures_frame,
    measures_of,
    on_grid,
    open_dataset,
    plan_dataset,
    quick_summary,
    read_part,
    whole_part,
)
from triage.core.dialect import FileOptions
from triage.core.errors import TriageError
from triage.core.portfolio import Portfolio, UnitPrices
from triage.core.quality import Quality, quality
from triage.core.ranking import SeriesMeasures, series_measures

#: Rows of the long data per scoring task: a task's dense arrays and rows stay well inside a
#: worker's memory (about 60 bytes a row and 8 bytes a cell per array).
ROWS_PER_TASK = 4_000_000

_T = TypeVar("_T")


@dataclass(frozen=True)
class ClusterOptions:
    """Where to run: a local cluster of ``workers`` processes, or the scheduler ``address``."""

    workers: int | None = None
    """Worker processes of the local cluster (None: one per core)."""
    memory_limit: str | None = None
    """Memory limit per worker of the local cluster (``"6GB"``; None: Dask's default, the
    machine's memory shared between the workers)."""
    address: str | None = None
    """An existing cluster's scheduler (``tcp://host:8786``); the options above then do not
    apply."""


@dataclass(frozen=True)
class Scored:
    """A dataset scored on the cluster: its plan, a small portfolio describing it, the measures."""

    plan: Plan
    described: Portfolio
    """The first part's portfolio on the plan, with the folder as its path: what the renderers
    need of the whole (calendar, lag, forecasts, prices), not its series."""
    measures: SeriesMeasures
    steps: tuple[str, ...] | None
    """The process steps ``fva_loss`` measures, as checked (None: the default chain)."""


@contextlib.contextmanager
def cluster_client(options: ClusterOptions) -> Iterator[Any]:
    """A ``distributed.Client`` of the asked cluster, closed (with its local cluster) on exit.

    Raises:
        TriageError: Dask is not installed, or the scheduler cannot be reached.
    """
    try:
        from distributed import Client, LocalCluster
    except ImportError as exc:
        raise TriageError(
            "--engine dask needs Dask's distributed scheduler, which is not installed.",
            hint="Install it with: pip install 'dask[dataframe]' distributed",
        ) from exc
    if options.address is not None:
        try:
            client = Client(options.address, timeout="20s")  # type: ignore[no-untyped-call]
        except (OSError, TimeoutError) as exc:
            raise TriageError(
                f"cannot reach the Dask scheduler at {options.address} ({exc}).",
                hint="Check the address (tcp://host:8786) and that the scheduler is running.",
            ) from exc
        with client:
            yield client
        return
    cluster = LocalCluster(  # type: ignore[no-untyped-call]
        n_workers=options.workers,
        threads_per_worker=1,
        processes=True,
        memory_limit=options.memory_limit or "auto",
        dashboard_address=":0",
        # A part refused for its data is said once, by the command; not logged by the worker.
        silence_logs=logging.CRITICAL,
    )
    with cluster, Client(cluster) as client:  # type: ignore[no-untyped-call]
        yield client


def score_dataset(
    folder: Path,
    client: Any,
    *,
    window: int,
    season: int,
    steps: Sequence[str] | None = None,
    columns: dict[str, str] | None = None,
    options: FileOptions | None = None,
    lag: int | None = None,
    errors: bool = False,
    check: Callable[[Portfolio], object] | None = None,
) -> Scored:
    """Read, check and score the dataset ``folder`` on the cluster of ``client``.

    ``steps`` are checked against the dataset's forecasts here, before the scoring starts.
    ``errors``: the measures keep each series' error per window period (``rank --group``:
    ``groups.group_scorecard_of``), 8 bytes per series and period on the client. ``check`` is
    called with the portfolio describing the dataset before the scoring starts (an option's
    check that raises ``TriageError``).

    Raises:
        LoadError: A part cannot be read (named with its row), or the parts do not make one
            portfolio (named as the local engine names it).
        TriageError: ``steps`` that the dataset's forecasts do not allow.
    """
    from triage.core.compare import forecast_names, parse_steps

    planned = _planned(folder, client, columns=columns, options=options, lag=lag)
    plan, described = planned.plan, planned.described
    cols = plan.window_cols(window)
    chain = (
        None if steps is None else parse_steps(",".join(steps), forecast_names(described, season))
    )
    if check is not None:
        check(described)
    scored = functools.partial(
        _measures_frame, cols=cols, season=season, steps=chain, errors=errors
    )
    frames = _each_task(planned, client, scored, columns=columns, options=options)
    if not frames:
        raise TriageError(f"{plan.dataset.folder}: the dataset's parts hold no series to score.")
    frame = pd.concat(frames, ignore_index=True)
    del frames
    return Scored(plan=plan, described=described, measures=measures_of(frame, plan), steps=chain)


@dataclass(frozen=True)
class _Planned:
    """A dataset's plan, made from its parts' summaries on the cluster."""

    dataset: Dataset
    plan: Plan
    described: Portfolio
    """The first series of the first part, on the plan (:func:`_described`)."""


def _planned(
    folder: Path,
    client: Any,
    *,
    columns: dict[str, str] | None,
    options: FileOptions | None,
    lag: int | None,
    smallest_lag: bool = False,
) -> _Planned:
    """Every part read and checked on a worker for its summary; the plan made from them
    (``smallest_lag``: as ``dataset.plan_dataset``)."""
    dataset = open_dataset(folder)
    summaries: list[PartSummary] = client.gather(
        client.map(
            _summary, range(len(dataset.files)), dataset=dataset, columns=columns,
            options=options,
        )
    )  # fmt: skip
    plan = plan_dataset(
        dataset,
        summaries,
        lag=lag,
        smallest_lag=smallest_lag,
        price_header=(columns or {}).get(schema.PRICE, schema.PRICE),
    )
    # The first series of the first part, on a worker: it describes the whole (calendar, lag,
    # forecasts, prices) for the options' checks and the output.
    described = client.submit(
        _described, plan=plan, dataset=dataset, columns=columns, options=options
    ).result()
    return _Planned(dataset, plan, described)


@dataclass(frozen=True)
class Compared:
    """A dataset's forecasts compared on the cluster (``triage compare --engine dask``)."""

    plan: Plan
    described: Portfolio
    """What the renderers need of the whole (see :attr:`Scored.described`)."""
    comparison: Comparison


def compare_dataset(
    folder: Path,
    client: Any,
    *,
    window: int,
    season: int,
    steps: Sequence[str] | None = None,
    by_series: bool = False,
    columns: dict[str, str] | None = None,
    options: FileOptions | None = None,
    lag: int | None = None,
) -> Compared:
    """Read and check the dataset ``folder`` on the cluster of ``client`` and compare its
    forecasts as ``compare.compare`` compares a single file's.

    Each task (a part holding whole series, or the shuffled rows of whole series) sums its
    series' compared cells (``compare.block_sums``); the client joins the sums in key order
    (``compare.Sums.join``) and measures them once (``compare.compared``). Every per-series
    sum, and so every portfolio total but the test's, is the single file's to the bit; the
    test's per-period sums are added in another order (the last bits may differ).

    Raises:
        LoadError: A part cannot be read, or the parts do not make one portfolio.
        TriageError: ``steps`` the forecasts do not allow, or no cell to compare.
    """
    from triage.core import compare as comparing

    planned = _planned(folder, client, columns=columns, options=options, lag=lag)
    plan, described = planned.plan, planned.described
    names = comparing.forecast_names(described, season)
    chain = (
        comparing.default_steps(names)
        if steps is None
        else comparing.parse_steps(",".join(steps), names)
    )
    cols = plan.window_cols(window)
    lags = comparing.test_lags(described)
    summed = functools.partial(
        _part_sums, key_columns=plan.key_columns, names=names, cols=cols, season=season,
        chain=chain, lags=lags, by_series=by_series,
    )  # fmt: skip
    pieces = _each_task(planned, client, summed, columns=columns, options=options)
    if not pieces:
        raise TriageError(f"{plan.dataset.folder}: the dataset's parts hold no series to compare.")
    texts = {c: _concat_text([piece.keys[c] for piece in pieces]) for c in plan.key_columns}
    order = np.asarray(key_order(texts, plan.key_columns))
    sums = comparing.Sums.join([piece.sums for piece in pieces], order)
    del pieces
    comparison = comparing.compared(
        sums,
        names,
        chain,
        season=season,
        cols=cols,
        lags=lags,
        path=plan.dataset.folder,
        key_columns=plan.key_columns,
        text=_text_of({c: values.take(order) for c, values in texts.items()}),
        by_series=by_series,
    )
    return Compared(plan=plan, described=described, comparison=comparison)


@dataclass(frozen=True)
class Checked:
    """A dataset's data quality counted on the cluster (``triage check --engine dask``)."""

    plan: Plan
    described: Portfolio
    """What the report needs of the whole (see :attr:`Scored.described`), with the dataset's
    rows."""
    found: Quality
    """The counts of every series."""


def check_dataset(
    folder: Path,
    client: Any,
    *,
    window: int,
    columns: dict[str, str] | None = None,
    options: FileOptions | None = None,
    lag: int | None = None,
) -> Checked:
    """Read and check the dataset ``folder`` on the cluster of ``client`` and count what its
    series hold and lack, as ``triage check`` counts a single file's.

    With several forecast lags and no ``lag``, the smallest is counted (as the local engine's
    ``read_dataset(..., smallest_lag=True)``). Each task counts its whole series
    (``quality.quality``); the client adds the counts up (``Quality.total``): whole numbers,
    the single file's exactly.

    Raises:
        LoadError: A part cannot be read, or the parts do not make one portfolio.
    """
    planned = _planned(folder, client, columns=columns, options=options, lag=lag, smallest_lag=True)
    plan = planned.plan
    cols = plan.window_cols(window)
    counted = functools.partial(quality, cols=cols)
    found = Quality.total(_each_task(planned, client, counted, columns=columns, options=options))
    described = dataclasses.replace(planned.described, rows=plan.rows, notices=plan.notices)
    return Checked(plan=plan, described=described, found=found)


@dataclass(frozen=True)
class _PartSums:
    """What a task gives the comparison: its series' keys (Arrow text) and sums."""

    keys: dict[str, Any]
    sums: Sums


def _part_sums(
    portfolio: Portfolio,
    *,
    key_columns: tuple[str, ...],
    names: tuple[str, ...],
    cols: np.ndarray,
    season: int,
    chain: tuple[str, ...],
    lags: int,
    by_series: bool,
) -> _PartSums:
    from triage.core.compare import block_sums

    order = np.arange(portfolio.n_series)
    keys = {c: arrow_text(pd.Series(portfolio.text_column(c, order))) for c in key_columns}
    sums = block_sums(portfolio, names, cols, season, chain, lags, by_series=by_series)
    return _PartSums(keys, sums)


def _each_task(
    planned: _Planned,
    client: Any,
    measured: Callable[[Portfolio], _T],
    *,
    columns: dict[str, str] | None,
    options: FileOptions | None,
) -> list[_T]:
    """``measured`` of every task's portfolio of whole series, on the cluster: a part that holds
    whole series is measured where it is read, other rows are shuffled by key first. Tasks
    without a series give nothing."""
    plan = planned.plan
    with _workers_lost():
        if plan.whole_series:
            pieces = client.gather(
                client.map(
                    _whole_part_measured, range(len(planned.dataset.files)), plan=plan,
                    dataset=planned.dataset, columns=columns, options=options, measured=measured,
                )
            )  # fmt: skip
        else:
            pieces = client.gather(client.compute(_dealt(planned, measured, columns, options)))
    return [piece for piece in pieces if piece is not None]


def _whole_part_measured(
    part: int,
    *,
    plan: Plan,
    dataset: Dataset,
    columns: dict[str, str] | None,
    options: FileOptions | None,
    measured: Callable[[Portfolio], _T],
) -> _T | None:
    portfolio = whole_part(dataset, part, plan, columns=columns, options=options)
    return None if portfolio is None else measured(portfolio)


def _dealt(
    planned: _Planned,
    measured: Callable[[Portfolio], _T],
    columns: dict[str, str] | None,
    options: FileOptions | None,
) -> list[Any]:
    """The Dask tasks of the shuffle by series key: one per part deals its rows into buckets
    (:func:`_deal`), one per bucket gathers its pieces into whole series and measures them
    (:func:`_gathered`). About :data:`ROWS_PER_TASK` rows a bucket, at least one per part."""
    import dask

    dataset, plan = planned.dataset, planned.plan
    buckets = max(len(dataset.files), math.ceil(plan.rows / ROWS_PER_TASK))
    deal = dask.delayed(_deal, nout=buckets, pure=True)
    dealt = [
        deal(part, dataset=dataset, key_columns=plan.key_columns, buckets=buckets,
             columns=columns, options=options)
        for part in range(len(dataset.files))
    ]  # fmt: skip
    gather = dask.delayed(_gathered, pure=True)
    return [
        gather([pieces[bucket] for pieces in dealt], plan=plan, measured=measured)
        for bucket in range(buckets)
    ]


@dataclass(frozen=True)
class _Piece:
    """The rows of one part that fall in one bucket, as they cross between workers: numbers as
    they are, each text column as codes into the text the piece uses (not a string a row)."""

    numbers: pd.DataFrame
    text: dict[str, tuple[np.ndarray, np.ndarray]]
    """Per text column: the rows' codes (-1: empty) and the values they code."""
    columns: tuple[str, ...]
    """Every column, in the part's order."""


def _deal(
    part: int,
    *,
    dataset: Dataset,
    key_columns: tuple[str, ...],
    buckets: int,
    columns: dict[str, str] | None,
    options: FileOptions | None,
) -> tuple[_Piece, ...]:
    """Part ``part`` read and checked, its rows dealt into ``buckets`` pieces by a hash of their
    series key: every row of a series, in whatever part, lands in the same bucket."""
    frame = read_part(dataset, part, columns=columns, options=options).frame
    coded = {name: _coded(frame[name]) for name in frame.columns if _is_text(frame[name])}
    bucket = np.zeros(len(frame), dtype=np.uint64)
    for name in key_columns:
        codes, values = coded[name]
        # The hash of the text, not of a part's codes: the same key hashes alike in every part.
        hashed = pd.util.hash_array(values).take(np.maximum(codes, 0))
        bucket = bucket * np.uint64(0x9E3779B97F4A7C15) + np.where(codes < 0, 0, hashed)
    bucket %= np.uint64(buckets)
    order = np.argsort(bucket, kind="stable")
    bounds = np.searchsorted(bucket[order], np.arange(buckets + 1))
    numbers = frame.drop(columns=list(coded))
    pieces = []
    for lo, hi in itertools.pairwise(bounds):
        rows = order[lo:hi]
        text = {name: _used(codes.take(rows), values) for name, (codes, values) in coded.items()}
        pieces.append(_Piece(numbers.take(rows).reset_index(drop=True), text, tuple(frame.columns)))
    return tuple(pieces)


def _gathered(
    pieces: list[_Piece], *, plan: Plan, measured: Callable[[Portfolio], _T]
) -> _T | None:
    """The pieces of one bucket (whole series) as a portfolio on the plan, measured; None for
    a bucket without rows."""
    pieces = [piece for piece in pieces if len(piece.numbers)]
    if not pieces:
        return None
    frame = pd.concat([piece.numbers for piece in pieces], ignore_index=True)
    for name in pieces[0].text:
        inverse, values = pd.factorize(np.concatenate([piece.text[name][1] for piece in pieces]))
        codes, start = [], 0
        for piece in pieces:
            piece_codes, piece_values = piece.text[name]
            remap = inverse[start : start + len(piece_values)]
            start += len(piece_values)
            codes.append(np.where(piece_codes < 0, -1, remap.take(np.maximum(piece_codes, 0))))
        frame[name] = pd.Categorical.from_codes(
            np.concatenate(codes), categories=pd.Index(values, dtype=object)
        )
    frame = frame[list(pieces[0].columns)]
    return measured(build_part(frame, plan, some=True))


def _is_text(column: pd.Series) -> bool:
    return isinstance(column.dtype, pd.CategoricalDtype) or not (
        pd.api.types.is_numeric_dtype(column.dtype)
        or pd.api.types.is_datetime64_any_dtype(column.dtype)
    )


def _coded(column: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """A text column as codes (-1: empty) and the values they code (object array)."""
    if isinstance(column.dtype, pd.CategoricalDtype):
        codes = np.asarray(column.array.codes)
        values = column.cat.categories.to_numpy(dtype=object)
    else:
        codes, uniques = pd.factorize(column, use_na_sentinel=True)
        values = np.asarray(uniques, dtype=object)
    return codes.astype(np.int64), values


def _used(codes: np.ndarray, values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``codes`` into only the ``values`` they use: a piece carries its own rows' text."""
    present = codes >= 0
    used, inverse = np.unique(codes[present], return_inverse=True)
    out = np.full(len(codes), -1, dtype=np.int32)
    out[present] = inverse
    return out, values.take(used)


def _concat_text(pieces: list[Any]) -> Any:
    import pyarrow as pa

    return pa.concat_arrays(pieces) if pieces else pa.array([], type=pa.large_string())


def _text_of(texts: dict[str, Any]) -> Callable[[str, np.ndarray], Any]:
    """Key text of series at given rows, from their Arrow text in portfolio order."""
    import pyarrow as pa

    def text(name: str, taken: np.ndarray) -> Any:
        return pd.array(
            texts[name].take(pa.array(taken)), dtype=pd.StringDtype("pyarrow", na_value=np.nan)
        )

    return text


@contextlib.contextmanager
def _workers_lost() -> Iterator[None]:
    """A task whose workers kept dying (out of memory, most often) as a message, not a crash."""
    from distributed import KilledWorker

    try:
        yield
    except KilledWorker as exc:
        raise TriageError(
            f"the Dask workers died while scoring ({exc.task}): most often a part of the "
            "dataset needs more memory than a worker may use.",
            hint="Give the workers more memory (--memory-limit), use fewer workers on this "
            "machine (--workers), or split the dataset into smaller files.",
        ) from exc


def _described(
    *, plan: Plan, dataset: Dataset, columns: dict[str, str] | None, options: FileOptions | None
) -> Portfolio:
    """A portfolio of one series of the first part, on the dataset's calendar with the folder
    as its path."""
    if plan.whole_series and schema.LAG not in plan.columns:
        from triage.core.read import read_portfolio

        alone = read_portfolio(dataset.files[0], columns=columns, options=options)
        return on_grid(first_series(alone), plan, dataset, 0)
    frame = read_part(dataset, 0, columns=columns, options=options).frame
    first = frame[schema.ITEM] == frame[schema.ITEM].iloc[0]
    return dataclasses.replace(build_part(frame.loc[first].copy(), plan), path=dataset.folder)


def first_series(portfolio: Portfolio) -> Portfolio:
    """``portfolio`` cut to its first series (the rest of what describes it kept)."""
    one = slice(0, 1)
    price = portfolio.price
    return dataclasses.replace(
        portfolio,
        keys=portfolio.keys.iloc[one].reset_index(drop=True),
        demand=portfolio.demand[one].copy(),
        forecast=portfolio.forecast[one].copy(),
        price=None if price is None else UnitPrices.from_dense(price[one]),
        competing={name: values[one].copy() for name, values in portfolio.competing.items()},
        _text_codes={},
        history=None,
    )


def _measures_frame(
    portfolio: Portfolio,
    *,
    cols: np.ndarray,
    season: int,
    steps: Sequence[str] | None,
    errors: bool,
) -> pd.DataFrame:
    """The measures of a task's whole series as ``dataset.score_part`` gives them."""
    measures = series_measures(portfolio, cols, season, steps)
    return measures_frame(portfolio, measures, cols if errors else None)


def _summary(
    part: int, *, dataset: Dataset, columns: dict[str, str] | None, options: FileOptions | None
) -> PartSummary:
    return quick_summary(dataset, part, columns=columns, options=options)
