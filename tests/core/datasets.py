"""Write one portfolio file as a dataset folder, partitioned three ways (tests and benchmarks).

* ``series``: whole series per file, under hive-style folders named after a column the files
  also hold (``location=NTH/part-0.parquet``), which triage then ignores;
* ``period``: one file per month, every series spread over every file (the common data-lake
  layout);
* ``random``: rows dealt at random into files and shuffled inside each (a load-batch layout);
* ``blocks``: runs of whole series in key order, one run per file (an export by item range),
  which the Dask engine scores without mixing the parts' rows.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

LAYOUTS = ("series", "period", "random", "blocks")


def generated(folder: Path, items: int) -> Path:
    """The generator's portfolio of ``items`` items (prices, attributes, two competing
    forecasts) as one Parquet file in ``folder``: the single file datasets are cut from."""
    from sample import generate

    path = folder / "portfolio.parquet"
    generate.write_parquet(path, items, competing=True)
    return path


def write_layout(frame: pd.DataFrame, folder: Path, layout: str, *, parts: int = 5) -> Path:
    """``frame`` (a portfolio's rows) written as the dataset ``folder`` in ``layout``."""
    folder.mkdir(parents=True)
    if layout == "series":
        for location, rows in frame.groupby("location", observed=True, sort=True):
            below = folder / f"location={location}"
            below.mkdir()
            items = rows["item"].astype(str)
            for k, piece in rows.groupby(items.str[-1] < "5", sort=True):
                _write(piece, below / f"part-{int(k)}.parquet")
    elif layout == "period":
        months = pd.to_datetime(frame["period"]).dt.strftime("%Y-%m")
        for month, rows in frame.groupby(months, sort=True):
            _write(rows, folder / f"{month}.parquet")
    elif layout == "random":
        rng = np.random.default_rng(20261203)
        dealt = rng.integers(0, parts, len(frame))
        for k in range(parts):
            rows = frame[dealt == k]
            _write(rows.iloc[rng.permutation(len(rows))], folder / f"load-{k:03d}.parquet")
    elif layout == "blocks":
        keys = pd.DataFrame(
            {"item": frame["item"].astype(str), "loc": frame["location"].astype(str)}
        )
        series = keys.groupby(["item", "loc"], sort=True).ngroup().to_numpy()
        block = series * parts // (series.max() + 1)
        for k in range(parts):
            _write(frame[block == k], folder / f"items-{k:03d}.parquet")
    else:
        raise ValueError(layout)
    return folder


def _write(rows: pd.DataFrame, path: Path) -> None:
    pq.write_table(pa.Table.from_pandas(rows, preserve_index=False), path)


def stored_scorecard(
    folder: Path, out: Path, *, window: int = 13, season: int = 1, by: str = "error"
) -> Path:
    """The scorecard folder of the dataset ``folder`` (parts and description,
    ``triage.core.card_folder``), as ``triage rank DATASET --format parquet --output out``
    writes it with the local engine (the Dask engine writes the same: test_dask_engine.py)."""
    from triage import cli

    done = cli.main(
        [
            "rank", str(folder), "--format", "parquet", "--output", str(out),
            "--window", str(window), "--season", str(season), "--by", by,
        ]
    )  # fmt: skip
    if done != 0:
        raise RuntimeError(f"rank of {folder} exited {done}")
    return out
