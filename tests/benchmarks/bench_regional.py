"""Reading a regional extract (semicolons, decimal commas, day-first dates) against a plain CSV.

Run by hand (pytest does not collect ``bench_*.py``)::

    python -m tests.benchmarks.bench_regional --series 100000 --weeks 30 --out bench-out/

The same invented rows are written twice with pandas' writer: ``plain.csv`` (comma, point, ISO
dates) and ``regional.csv`` (``;``, ``,``, ``%d.%m.%Y``, three title lines). Timed, each in its
own process, best of ``--repeat``:

* ``triage rank FILE --format csv --output /dev/null`` on each file (end to end, peak memory
  from ``bench_rank.measure``), the plain file being the baseline;
* ``read_portfolio`` of the regional file (the streamed Arrow reader, which takes the options)
  against ``load_frame`` + ``build_portfolio`` (the full loader) of the same file.

Prints a table of ratios and writes ``OUT/regional.json``.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import numpy as np
import pandas as pd

from tests.benchmarks.bench_rank import measure

OPTIONS = ["--sep", ";", "--decimal", ",", "--date-format", "%d.%m.%Y", "--header-row", "4"]
TITLE = "Absatzplanung;;;;\nStand 01.10.2025;;;;\n\n"


def write_files(folder: Path, series: int, weeks: int) -> tuple[Path, Path]:
    plain, regional = (
        folder / f"plain-{series}x{weeks}.csv",
        folder / f"regional-{series}x{weeks}.csv",
    )
    if plain.exists() and regional.exists():
        return plain, regional
    rng = np.random.default_rng(40)
    n = series * weeks
    periods = pd.date_range("2025-01-06", periods=weeks, freq="7D")
    rows = pd.DataFrame(
        {
            "item": np.repeat([f"GS-{i:07d}" for i in range(series)], weeks),
            "location": np.repeat(np.where(np.arange(series) % 2, "NORD", "SUED"), weeks),
            "period": np.tile(periods, series),
            "demand": np.round(rng.gamma(2.0, 6.0, n), 1),
            "forecast": np.round(rng.gamma(2.0, 6.0, n), 2),
        }
    )
    rows.loc[rows["period"] > periods[-4], "demand"] = np.nan
    folder.mkdir(parents=True, exist_ok=True)
    rows.to_csv(plain, index=False, date_format="%Y-%m-%d")
    text = rows.to_csv(index=False, sep=";", decimal=",", date_format="%d.%m.%Y")
    regional.write_text(TITLE + text, encoding="utf-8")
    return plain, regional


_STAGE = """
import json, sys, time
from triage.core.dialect import file_options
from triage.core.read import load_frame
from triage.core.portfolio import build_portfolio
from triage.core.read import read_portfolio
path, way = sys.argv[1], sys.argv[2]
options = file_options(sep=";", decimal=",", date_format="%d.%m.%Y", header_row=4)
started = time.perf_counter()
if way == "streamed":
    portfolio = read_portfolio(path, options=options)
else:
    portfolio = build_portfolio(load_frame(path, options=options), consume=True)
print(json.dumps({"seconds": time.perf_counter() - started, "series": portfolio.n_series}))
"""


def best(cmd: list[str], repeat: int) -> dict[str, float]:
    runs = [measure(cmd) for _ in range(repeat)]
    for run in runs:
        if run.error:
            raise SystemExit(f"{' '.join(cmd)}: {run.error}")
    seconds = min((r.report or {}).get("seconds", r.seconds) for r in runs)
    peak = min(r.peak_bytes or 0 for r in runs)
    return {"seconds": seconds, "peak_mb": peak / 2**20}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--series", type=int, default=100_000)
    parser.add_argument("--weeks", type=int, default=30)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--out", type=Path, default=Path("bench-out"))
    args = parser.parse_args()
    plain, regional = write_files(args.out, args.series, args.weeks)
    triage = [sys.executable, "-m", "triage.cli", "rank"]
    sink = ["--format", "csv", "--output", "/dev/null", "--force"]
    results = {
        "rows": args.series * args.weeks,
        "rank plain": best([*triage, str(plain), *sink], args.repeat),
        "rank regional": best([*triage, str(regional), *OPTIONS, *sink], args.repeat),
        "read regional streamed": best(
            [sys.executable, "-c", _STAGE, str(regional), "streamed"], args.repeat
        ),
        "read regional full loader": best(
            [sys.executable, "-c", _STAGE, str(regional), "full"], args.repeat
        ),
    }
    base = results["rank plain"]["seconds"]
    full = results["read regional full loader"]["seconds"]
    print(f"{results['rows']:,} rows")
    for name, value in results.items():
        if name == "rows":
            continue
        print(
            f"  {name:28s} {value['seconds']:7.2f} s  {value['peak_mb']:8.0f} MB  "
            f"x{value['seconds'] / base:.2f} of rank plain"
            + (f", x{value['seconds'] / full:.2f} of the full loader" if "read" in name else "")
        )
    (args.out / "regional.json").write_text(json.dumps(results, indent=1) + "\n")


if __name__ == "__main__":
    main()
