"""The Dask engine: score a dataset (a folder of Parquet parts) on a Dask cluster.

The steps are those of the local engine (``triage.core.dataset``), spread over the cluster:

1. every part is read and checked on a worker, exactly as a single file is read; only a small
   summary comes back (columns, periods, lags), from which the client makes the plan: the
   calendar, the latest actual period, the scoring window and the lag;
2. the parts' rows are shuffled by series key (``dask.dataframe`` shuffle), so that each task
   holds whole series — unless the parts' key ranges show that each already does (a dataset
   split by series) — and every task scores its series with the kernel the local engine uses
   (``ranking.series_measures``) on the plan's calendar;
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
import logging
import math
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from triage.core import schema
from triage.core.dataset import (
    Dataset,
    PartSummary,
    Plan,
    build_part,
    measures_of,
    on_grid,
    open_dataset,
    plan_dataset,
    quick_summary,
    read_part,
    score_part,
    score_whole_part,
)
from triage.core.dialect import FileOptions
from triage.core.errors import TriageError
from triage.core.portfolio import Portfolio, UnitPrices
from triage.core.ranking import SeriesMeasures

#: Rows of the long data per scoring task: a task's dense arrays and rows stay well inside a
#: worker's memory (about 60 bytes a row and 8 bytes a cell per array).
ROWS_PER_TASK = 4_000_000


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
    import dask.dataframe as dd

    from triage.core.compare import forecast_names, parse_steps

    dataset = open_dataset(folder)
    parts = range(len(dataset.files))
    summaries: list[PartSummary] = client.gather(
        client.map(_summary, parts, dataset=dataset, columns=columns, options=options)
    )
    plan = plan_dataset(
        dataset, summaries, lag=lag, price_header=(columns or {}).get(schema.PRICE, schema.PRICE)
    )
    cols = plan.window_cols(window)
    # The first series of the first part, on a worker: it describes the whole (calendar, lag,
    # forecasts, prices) for the steps' check and the output, and gives the rows' shapes.
    described, frame_meta = client.submit(
        _described, plan=plan, dataset=dataset, columns=columns, options=options
    ).result()
    chain = (
        None if steps is None else parse_steps(",".join(steps), forecast_names(described, season))
    )
    if check is not None:
        check(described)
    with _workers_lost():
        if plan.whole_series:
            # Each part holds whole series: each is scored where it is read, nothing is mixed.
            frames = client.gather(
                client.map(
                    _score_whole_part, parts, plan=plan, cols=cols, season=season, steps=chain,
                    dataset=dataset, columns=columns, options=options, errors=errors,
                )
            )  # fmt: skip
            frame = pd.concat(frames, ignore_index=True)
            del frames
        else:
            assert frame_meta is not None
            meta = score_part(frame_meta, plan, cols, season, chain, errors)
            # from_map gives a reader that takes ``columns`` the columns it wants (projection):
            # the column map goes by another name.
            reader = functools.partial(
                _part_rows, dataset=dataset, mapping=columns, options=options
            )
            rows = dd.from_map(  # type: ignore[no-untyped-call]
                reader, parts, meta=frame_meta, enforce_metadata=False
            )
            tasks = max(len(dataset.files), math.ceil(plan.rows / ROWS_PER_TASK))
            rows = rows.shuffle(on=list(plan.key_columns), npartitions=tasks)
            scored = rows.map_partitions(
                score_part, plan, cols, season, chain, errors, meta=meta, enforce_metadata=False
            )
            frame = scored.compute()
    return Scored(plan=plan, described=described, measures=measures_of(frame, plan), steps=chain)


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
) -> tuple[Portfolio, pd.DataFrame | None]:
    """A portfolio of one series of the first part, on the dataset's calendar with the folder
    as its path; and, when the rows are to be shuffled, the empty frame of the rows as the
    shuffle carries them."""
    if plan.whole_series and schema.LAG not in plan.columns:
        from triage.core.read import read_portfolio

        alone = read_portfolio(dataset.files[0], columns=columns, options=options)
        return on_grid(first_series(alone), plan, dataset, 0), None
    frame = read_part(dataset, 0, columns=columns, options=options).frame
    first = frame[schema.ITEM] == frame[schema.ITEM].iloc[0]
    described = dataclasses.replace(build_part(frame.loc[first].copy(), plan), path=dataset.folder)
    return described, _as_text(frame.iloc[:0].copy())


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


def _score_whole_part(
    part: int,
    *,
    plan: Plan,
    cols: np.ndarray,
    season: int,
    steps: Sequence[str] | None,
    dataset: Dataset,
    columns: dict[str, str] | None,
    options: FileOptions | None,
    errors: bool,
) -> pd.DataFrame:
    return score_whole_part(
        dataset, part, plan, cols, season, steps, columns=columns, options=options, errors=errors
    )


def _summary(
    part: int, *, dataset: Dataset, columns: dict[str, str] | None, options: FileOptions | None
) -> PartSummary:
    return quick_summary(dataset, part, columns=columns, options=options)


def _part_rows(
    part: int, *, dataset: Dataset, mapping: dict[str, str] | None, options: FileOptions | None
) -> pd.DataFrame:
    return _as_text(read_part(dataset, part, columns=mapping, options=options).frame)


def _as_text(frame: pd.DataFrame) -> pd.DataFrame:
    """Categorical text columns as Arrow strings: parts code their text differently, and the
    shuffle joins pieces of many parts."""
    for name in frame.columns:
        if isinstance(frame[name].dtype, pd.CategoricalDtype):
            categories = frame[name].cat.categories.to_numpy(dtype=object)
            codes = np.asarray(frame[name].array.codes)
            frame[name] = pd.array(
                _take_text(categories, codes), dtype=pd.StringDtype("pyarrow", na_value=np.nan)
            )
    return frame


def _take_text(categories: np.ndarray, codes: np.ndarray) -> Any:
    import pyarrow as pa

    return pa.array(categories, type=pa.large_string()).take(pa.array(codes))
