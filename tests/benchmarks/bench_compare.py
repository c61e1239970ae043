"""Benchmark of ``triage.core.compare.compare`` against ``ranking.scorecard``, same portfolio,
same run.

Run by hand (pytest does not collect ``bench_*.py``)::

    python -m tests.benchmarks.bench_compare --series 100000 --out bench-out/

The portfolio is the Parquet file of ``bench_rank`` (built with ``sample.generate`` and cached
under ``--out``), read once; ``--forecasts`` competing forecasts (default 1: with ``forecast``
and ``naive``, 3 forecasts compared) are derived from the demand with seeded noise and put in
``Portfolio.competing``. Then, alternately and
``--repeat`` times each: ``scorecard(portfolio, window)`` and ``compare(portfolio, window)``
(and ``compare(..., by_series=True)``). The medians are reported as ratios to the scorecard's:
the machine is shared, so raw seconds mean little.

End to end (``--cli``)::

    python -m tests.benchmarks.bench_compare --cli --series 100000 --series 1000000 --out bench-out/

builds the Parquet file with the generator's two competing forecasts (``--competing``: the file
holds ``forecast``, ``forecast_stat`` and ``forecast_customer``; ``naive`` is the fourth compared)
and runs, alternately and ``--repeat`` times each, ``triage rank FILE --format csv --output
/dev/null`` and ``triage compare FILE --format csv --output /dev/null``, each in its own process
(wall time and peak resident memory from ``bench_rank.measure``). It reports the medians as
ratios to ``rank``'s: the issue's targets are ≤ 2× the time and ≤ 1.5× the peak memory.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import statistics
import time
from pathlib import Path

import numpy as np

from tests.benchmarks.bench_rank import ROOT, alternate, built_portfolio, triage_command


def end_to_end(series: int, args: argparse.Namespace) -> dict[str, object]:
    """``triage compare`` against ``triage rank`` on the same file, alternating, in processes."""
    path = built_portfolio(series, args, competing=True)
    window = ["--window", str(args.window)]
    out = ["--format", "csv", "--output", "/dev/null"]
    seconds, peak, runs = alternate(
        {
            "rank": [*triage_command(), "rank", str(path), *window, *out],
            "compare": [*triage_command(), "compare", str(path), *window, *out],
        },
        args.repeat,
        f"{series:,}",
    )
    return {
        "series": series,
        "file": path.name,
        "forecasts_in_file": 3,
        "repeat": args.repeat,
        "ratio_time_compare_to_rank": seconds["compare"] / seconds["rank"],
        "ratio_peak_memory_compare_to_rank": peak["compare"] / peak["rank"],
        "median_seconds": seconds,
        "median_peak_mb": {n: m / 1e6 for n, m in peak.items()},
        "runs": runs,
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument(
        "--series", type=int, action="append", help="series (repeatable; default 100000)"
    )
    parser.add_argument(
        "--cli", action="store_true", help="time triage compare against triage rank end to end"
    )
    parser.add_argument("--out", type=Path, default=ROOT / "bench-out")
    parser.add_argument("--locations", type=int, default=4)
    parser.add_argument("--weeks", type=int, default=104)
    parser.add_argument("--forward", type=int, default=13)
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--window", type=int, default=13)
    parser.add_argument("--forecasts", type=int, default=1, help="competing forecasts added")
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args(argv)
    sizes = args.series or [100_000]
    if args.cli:
        for series in sizes:
            print(json.dumps(end_to_end(series, args), indent=1), flush=True)
        return 0
    args.series = sizes[0]

    path = built_portfolio(args.series, args)

    from triage.core.compare import compare
    from triage.core.ranking import scorecard
    from triage.core.read import read_portfolio

    portfolio = read_portfolio(path)
    rng = np.random.default_rng(args.seed)
    competing = {
        f"alt{i}": np.where(
            np.isnan(portfolio.forecast),
            np.nan,
            np.nan_to_num(portfolio.demand, nan=0.0)
            * rng.uniform(0.7, 1.3, portfolio.demand.shape),
        )
        for i in range(args.forecasts)
    }
    portfolio = dataclasses.replace(portfolio, competing=competing)
    n_forecasts = args.forecasts + 2

    timings: dict[str, list[float]] = {"scorecard": [], "compare": [], "compare_by_series": []}
    for _ in range(args.repeat):
        for name, run in (
            ("scorecard", lambda: scorecard(portfolio, args.window)),
            ("compare", lambda: compare(portfolio, args.window)),
            ("compare_by_series", lambda: compare(portfolio, args.window, by_series=True)),
        ):
            start = time.perf_counter()
            run()
            timings[name].append(time.perf_counter() - start)
    median = {name: statistics.median(values) for name, values in timings.items()}
    result = {
        "series": portfolio.n_series,
        "forecasts": n_forecasts,
        "window": args.window,
        "repeat": args.repeat,
        "ratio_compare_to_scorecard": median["compare"] / median["scorecard"],
        "ratio_compare_by_series_to_scorecard": median["compare_by_series"] / median["scorecard"],
        "median_seconds": median,
    }
    print(json.dumps(result, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
