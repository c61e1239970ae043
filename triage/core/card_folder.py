"""A scorecard folder: a dataset's scorecard as Parquet files, with what it was made from.

``triage rank DATASET --engine dask --format parquet --output DIR`` writes the scorecard as
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

from triage.core.dataset import Dataset, Plan, open_dataset
from triage.core.errors import LoadError
from triage.core.portfolio import Calendar, Grid
from triage.core.text import visible

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
    dataset = open_dataset(dataset_folder)
    _same_parts(folder, dataset, data["parts"], how)
    files = tuple(sorted(folder.glob("part-*.parquet")))
    if not files:
        raise LoadError(folder, "this scorecard folder holds no part-*.parquet file.", hint=how)
    raw = data["plan"]
    periods = pd.DatetimeIndex(pd.to_datetime(raw["periods"], format="%Y-%m-%d"))
    grid = Grid(
        calendar=Calendar(freq=raw["freq"], periods=periods),
        last_actual=int(raw["last_actual"]),
        lag=raw["lag"],
        lags=tuple(raw["lags"]),
    )
    plan = Plan(
        dataset=dataset,
        grid=grid,
        actual_cols=np.asarray(raw["actual_cols"], dtype=np.int64),
        columns=tuple(raw["columns"]),
        attributes=tuple(raw["attributes"]),
        rows=int(raw["rows"]),
        notices=tuple(raw["notices"]),
        whole_series=bool(raw["whole_series"]),
        units_reason=str(raw["units_reason"]),
    )
    return CardFolder(folder=folder, plan=plan, scored=Scored(**data["scored"]), files=files)


def _same_parts(folder: Path, dataset: Dataset, stored: list[dict[str, Any]], how: str) -> None:
    """Refuse a dataset whose parts are not those the scorecard was made from."""
    now = {p["name"]: p for p in _parts(dataset)}
    then = {p["name"]: p for p in stored}
    changed = sorted(
        name
        for name in now.keys() | then.keys()
        if name not in now
        or name not in then
        or (now[name]["size"], now[name]["mtime_ns"])
        != (then[name]["size"], then[name]["mtime_ns"])
    )
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
