"""A scorecard folder: a dataset's scorecard as Parquet files, with what it was made from.

``triage rank DATASET --format parquet --output DIR`` (either engine) writes the scorecard as
``part-NNNNN.parquet`` files in review order (``render.scorecard.parquet_parts``) and, in the
same all-or-nothing set, :data:`DESCRIPTION`: a JSON file saying what the scorecard is of, so
that the review screens can open it without scoring or planning the dataset again:

* the dataset's plan (``dataset.Plan``): its columns, calendar, latest actual period, scoring
  window columns, lag, and whether its parts hold whole series;
* how it was read and scored: ``--columns``, ``--lag``, window, season, the ranking order;
* each part's path below the dataset folder, size and modification time (nanoseconds): a
  dataset changed since (a part rewritten, added or removed) is refused, never shown beside a
  scorecard made of other data.

The file is written last of the set, so a folder with it is complete. Its name starts with
``_``, which Parquet readers (pyarrow, pandas, Spark) skip: the folder still reads as a Parquet
dataset of the scorecard's rows.
"""

from __future__ import annotations

import dataclasses
import json
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from triage.core import schema
from triage.core.dataset import Dataset, Plan, open_dataset
from triage.core.errors import LoadError
from triage.core.portfolio import Calendar, Grid
from triage.core.text import visible
from triage.core.vocabulary import ORDERS

#: The description's file name in a scorecard folder.
DESCRIPTION = "_scorecard.json"
#: What kind of file the description is, and its version (raised when its meaning changes).
KIND, VERSION = "triage scorecard folder", 1


@dataclass(frozen=True)
class Scored:
    """How a stored scorecard was read and scored."""

    window: int
    season: int
    by: str
    lag: int | None
    columns: dict[str, str] | None
    series: int
    """Series in the dataset (every one was scored)."""
    rows: int
    """Rows of the stored scorecard: every series, or the leading ones (``--top``, ``--cover``)."""


@dataclass(frozen=True)
class CardFolder:
    """A scorecard folder opened with its dataset."""

    folder: Path
    plan: Plan
    scored: Scored
    files: tuple[Path, ...]
    """The scorecard's Parquet files, in review order."""
    parts: tuple[tuple[str, int, int], ...] = ()
    """The dataset's parts it was made from: (path below the folder, size, mtime in ns)."""


def _parts(dataset: Dataset) -> list[dict[str, Any]]:
    """Each part's path below the folder, size and modification time."""
    found = []
    for k, path in enumerate(dataset.files):
        stat = path.stat()
        found.append({"name": dataset.name(k), "size": stat.st_size, "mtime_ns": stat.st_mtime_ns})
    return found


def description(plan: Plan, scored: Scored) -> dict[str, Any]:
    """The JSON description of a scorecard of ``plan``'s dataset."""
    grid = plan.grid
    return {
        "kind": KIND,
        "version": VERSION,
        "dataset": str(plan.dataset.folder.resolve()),
        "parts": _parts(plan.dataset),
        "scored": dataclasses.asdict(scored),
        "plan": {
            "freq": grid.calendar.freq,
            "periods": [stamp.strftime("%Y-%m-%d") for stamp in grid.calendar.periods],
            "last_actual": grid.last_actual,
            "lag": grid.lag,
            "lags": list(grid.lags),
            "actual_cols": [int(c) for c in plan.actual_cols],
            "columns": list(plan.columns),
            "attributes": list(plan.attributes),
            "rows": plan.rows,
            "notices": list(plan.notices),
            "whole_series": plan.whole_series,
            "units_reason": plan.units_reason,
        },
    }


def description_writer(plan: Plan, scored: Scored) -> tuple[str, Callable[[Path], None]]:
    """(file name, writer) of the description, for ``files.write_set_atomic``."""
    text = json.dumps(description(plan, scored), indent=1, ensure_ascii=False) + "\n"

    def write(path: Path) -> None:
        path.write_text(text, encoding="utf-8")

    return DESCRIPTION, write


def open_card_folder(folder: Path, dataset_folder: Path) -> CardFolder:
    """The scorecard folder ``folder`` of the dataset ``dataset_folder``, checked.

    Raises:
        LoadError: The folder is not a complete scorecard folder, is of another version, or its
            dataset is not ``dataset_folder`` as it was when the scorecard was made.
    """
    path = folder / DESCRIPTION
    how = (
        f"Make it again: triage rank {visible(str(dataset_folder))} --engine dask --format "
        f"parquet --output {visible(str(folder))} --force"
    )
    if not folder.is_dir():
        raise LoadError(folder, "no such scorecard folder.", hint=how)
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise LoadError(
            folder,
            f"this folder has no {DESCRIPTION}, so it is not a scorecard folder made by triage "
            "rank --format parquet.",
            hint=how,
        ) from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise LoadError(
            path, f"cannot read the scorecard's description ({exc}).", hint=how
        ) from None
    if not isinstance(data, dict) or data.get("kind") != KIND:
        raise LoadError(path, "this is not a triage scorecard description.", hint=how)
    if data.get("version") != VERSION:
        raise LoadError(
            path,
            f"this scorecard folder is of version {data.get('version')!r}; this triage reads "
            f"version {VERSION}.",
            hint=how,
        )
    try:
        parts, plan_fields, scored = _described(data)
    except (KeyError, TypeError, ValueError, AttributeError, IndexError) as exc:
        what = f"{type(exc).__name__}: {exc}" if not isinstance(exc, _Damaged) else str(exc)
        raise LoadError(
            path, f"the scorecard's description is damaged ({visible(what)}).", hint=how
        ) from None
    dataset = open_dataset(dataset_folder)
    stored = CardFolder(
        folder=folder,
        plan=Plan(dataset=dataset, **plan_fields),
        scored=scored,
        files=tuple(sorted(folder.glob("part-*.parquet"))),
        parts=parts,
    )
    check_unchanged(stored)
    _check_files(stored, how)
    return stored


class _Damaged(ValueError):
    """What is wrong with a description's content."""


def _need(ok: bool, what: str) -> None:
    if not ok:
        raise _Damaged(what)


def _described(
    data: dict[str, Any],
) -> tuple[tuple[tuple[str, int, int], ...], dict[str, Any], Scored]:
    """The parts, the plan's fields (without its dataset) and how it was scored, each value
    checked for its type and range.

    Raises:
        KeyError, TypeError, ValueError, AttributeError, IndexError: The content is damaged.
    """
    parts = tuple((str(p["name"]), int(p["size"]), int(p["mtime_ns"])) for p in data["parts"])
    raw = data["plan"]
    freq = raw["freq"]
    _need(freq in (schema.WEEKLY, schema.MONTHLY), f"frequency {freq!r}")
    periods = pd.DatetimeIndex(pd.to_datetime(list(raw["periods"]), format="%Y-%m-%d"))
    _need(len(periods) > 0 and periods.is_monotonic_increasing, "the calendar")
    last_actual = raw["last_actual"]
    _need(isinstance(last_actual, int) and 0 <= last_actual < len(periods), "the latest actual")
    actual_cols = np.asarray(raw["actual_cols"], dtype=np.int64)
    _need(
        actual_cols.ndim == 1
        and len(actual_cols) > 0
        and bool((np.diff(actual_cols) > 0).all())
        and actual_cols[0] >= 0
        and actual_cols[-1] == last_actual,
        "the periods with actual demand",
    )
    lag = raw["lag"]
    _need(lag is None or isinstance(lag, int), "the lag")
    columns = tuple(str(c) for c in raw["columns"])
    required = (schema.ITEM, schema.PERIOD, schema.DEMAND, schema.FORECAST)
    _need(all(c in columns for c in required), "the columns")
    attributes = tuple(str(c) for c in raw["attributes"])
    _need(all(a in columns for a in attributes), "the attributes")
    fields = {
        "grid": Grid(
            calendar=Calendar(freq=freq, periods=periods),
            last_actual=last_actual,
            lag=lag,
            lags=tuple(int(v) for v in raw["lags"]),
        ),
        "actual_cols": actual_cols,
        "columns": columns,
        "attributes": attributes,
        "rows": int(raw["rows"]),
        "notices": tuple(str(n) for n in raw["notices"]),
        "whole_series": bool(raw["whole_series"]),
        "units_reason": str(raw["units_reason"]),
    }
    how = data["scored"]
    _need(set(how) == {f.name for f in dataclasses.fields(Scored)}, "how it was scored")
    mapping = how["columns"]
    _need(
        mapping is None
        or (isinstance(mapping, dict) and all(isinstance(v, str) for v in mapping.values())),
        "the --columns it was read with",
    )
    scored = Scored(
        window=how["window"],
        season=how["season"],
        by=how["by"],
        lag=how["lag"],
        columns=mapping,
        series=how["series"],
        rows=how["rows"],
    )
    for name in ("window", "season", "series", "rows"):
        value = getattr(scored, name)
        _need(isinstance(value, int) and value >= (1 if name in ("window", "season") else 0), name)
    _need(scored.by in ORDERS and scored.rows <= scored.series, "the order or the rows")
    return parts, fields, scored


#: The scorecard columns the review reads, besides the keys and attributes.
REVIEWED = (
    "rank", "bias_rank", "fva_rank", "periods", "demand", "forecast", "abs_error", "bias",
    "bias_pct", "error_share", "cum_share", "tracking_signal", "bias_run", "bias_flag",
    "pattern", "fva_loss",
)  # fmt: skip


def _check_files(stored: CardFolder, how: str) -> None:
    """Refuse scorecard files that cannot be read, lack a column the review reads, or hold
    another number of rows than the description says."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    if not stored.files:
        raise LoadError(
            stored.folder, "this scorecard folder holds no part-*.parquet file.", hint=how
        )
    plan = stored.plan
    needed = [*plan.key_columns, *plan.attributes, *REVIEWED]
    rows = 0
    for path in stored.files:
        try:
            metadata = pq.read_metadata(path)
        except (pa.ArrowException, OSError) as exc:
            raise LoadError(
                path, f"cannot read this scorecard file ({visible(str(exc))}).", hint=how
            ) from None
        missing = [c for c in needed if c not in metadata.schema.names]
        if missing:
            raise LoadError(
                path,
                f"this scorecard file lacks the column(s) {visible(', '.join(missing))}.",
                hint=how,
            )
        rows += metadata.num_rows
    if rows != stored.scored.rows:
        raise LoadError(
            stored.folder,
            f"its files hold {rows:,} rows, but its description says {stored.scored.rows:,}: "
            "files were added to or removed from the folder.",
            hint=how,
        )


def check_unchanged(stored: CardFolder) -> None:
    """Refuse a dataset whose parts are not those the scorecard was made from (paths, sizes,
    modification times): before the scorecard is opened, and before and after each history
    is read from the dataset.

    Raises:
        LoadError: A part was added, removed or rewritten since.
    """
    dataset = stored.plan.dataset
    how = (
        f"Make it again: triage rank {visible(str(dataset.folder))} --engine dask --format "
        f"parquet --output {visible(str(stored.folder))} --force"
    )
    _same_parts(stored.folder, open_dataset(dataset.folder), stored.parts, how)


def _same_parts(
    folder: Path, dataset: Dataset, stored: tuple[tuple[str, int, int], ...], how: str
) -> None:
    """Refuse a dataset whose parts are not those the scorecard was made from."""
    now = {p["name"]: (p["size"], p["mtime_ns"]) for p in _parts(dataset)}
    then = {name: (size, mtime) for name, size, mtime in stored}
    changed = sorted(name for name in now.keys() | then.keys() if now.get(name) != then.get(name))
    if changed:
        shown = ", ".join(visible(name) for name in changed[:5])
        more = f" and {len(changed) - 5} more" if len(changed) > 5 else ""
        raise LoadError(
            folder,
            f"the dataset {visible(str(dataset.folder))} has changed since this scorecard was "
            f"made ({len(changed)} parts added, removed or rewritten: {shown}{more}); the "
            "scorecard would not match the histories shown beside it.",
            hint=how,
        )
