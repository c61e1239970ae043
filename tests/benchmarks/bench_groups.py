"""Benchmark of ``triage rank --group`` against ``triage rank``, same file, same run.

Run by hand (pytest does not collect ``bench_*.py``)::

    python -m tests.benchmarks.bench_groups --series 100000 --series 1000000 --out bench-out/

The portfolio is the Parquet file of ``bench_rank`` (built with ``sample.generate``, cached under
``--out``; four text attributes, among them ``family``). Alternately and ``--repeat`` times
each, in its own process (wall time and peak resident memory from ``bench_rank.measure``):
``triage rank FILE --format csv --output /dev/null`` and the same with ``--group
family,location``. The medians are reported as ratios to ``rank``'s (the machine is shared:
raw seconds mean little). The issue's target: grouping adds at most 25% to ``rank``'s time.

With ``--view``, in one process instead: the portfolio is read and a review session opened
(``ReviewSession``, what the review screens build before the list appears), then the group
view's model is built as the app builds it on ``G`` (``GroupReview`` and the sparkline totals),
``--repeat`` times; reported: its median seconds and the ratio to opening the session (the
issue's target: the group view opens in under 0.5 s after the series list is ready).
"""

from __future__ import annotations

import argparse
import json
import math
import statistics
import subprocess
import sys
from pathlib import Path

from tests.benchmarks.bench_rank import ROOT, measure, portfolio_file, triage_command


def bench(series: int, args: argparse.Namespace) -> dict[str, object]:
    n_items = math.ceil(series / args.locations)
    path = portfolio_file(args.out, n_items, args.locations, args)
    if not path.exists():
        args.out.mkdir(parents=True, exist_ok=True)
        print(f"generating {path.name} ...", file=sys.stderr, flush=True)
        subprocess.run(
            [
                sys.executable, "-m", "sample.generate", "--out", str(path),
                "--items", str(n_items), "--locations", str(args.locations),
                "--weeks", str(args.weeks), "--forward", str(args.forward),
                "--seed", str(args.seed),
            ],
            check=True,
            cwd=ROOT,
        )  # fmt: skip
    base = [*triage_command(), "rank", str(path), "--format", "csv", "--output", "/dev/null"]
    commands = {"rank": base, "rank_group": [*base, "--group", args.group]}
    runs: dict[str, list[tuple[float, float]]] = {name: [] for name in commands}
    for _ in range(args.repeat):
        for name, cmd in commands.items():
            run = measure(cmd)
            if run.returncode != 0:
                raise SystemExit(f"{name} failed: {run.error}")
            runs[name].append((run.seconds, float(run.peak_bytes or math.nan)))
            print(
                f"{series:,} {name}: {run.seconds:.2f} s, {(run.peak_bytes or 0) / 1e6:,.0f} MB",
                file=sys.stderr,
                flush=True,
            )
    seconds = {n: statistics.median(t for t, _ in r) for n, r in runs.items()}
    peak = {n: statistics.median(m for _, m in r) for n, r in runs.items()}
    return {
        "series": series,
        "group": args.group,
        "repeat": args.repeat,
        "ratio_time_group_to_rank": seconds["rank_group"] / seconds["rank"],
        "ratio_peak_memory_group_to_rank": peak["rank_group"] / peak["rank"],
        "median_seconds": seconds,
        "median_peak_mb": {n: m / 1e6 for n, m in peak.items()},
        "runs": runs,
    }


def view(series: int, args: argparse.Namespace) -> dict[str, object]:
    """Seconds to build the group view's model, against opening the review session."""
    import time

    from triage.core.cycle import ReviewCycle
    from triage.core.group_review import GroupReview
    from triage.core.read import read_portfolio
    from triage.core.review import ReviewSession
    from triage.core.settings import ScoreSettings

    n_items = math.ceil(series / args.locations)
    path = portfolio_file(args.out, n_items, args.locations, args)
    if not path.exists():
        raise SystemExit(f"{path} is missing: run without --view first to generate it")
    portfolio = read_portfolio(path)
    started = time.perf_counter()
    session = ReviewSession(
        ReviewCycle(portfolio, None, ScoreSettings()), reviewer="bench", record_worst_set=False
    )
    opened = time.perf_counter() - started
    by = tuple(args.group.split(","))
    seconds = []
    for _ in range(args.repeat):
        started = time.perf_counter()
        review = GroupReview(session, by)
        review.period_totals(session.window_cols[-6:])
        review.describe(int(review.order("error")[0]))
        seconds.append(time.perf_counter() - started)
    median = statistics.median(seconds)
    return {
        "series": series,
        "group": args.group,
        "groups": review.n_groups,
        "session_open_seconds": opened,
        "group_view_seconds": median,
        "ratio_group_view_to_session_open": median / opened,
        "runs": seconds,
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--series", type=int, action="append", help="repeatable; default 100000")
    parser.add_argument("--out", type=Path, default=ROOT / "bench-out")
    parser.add_argument("--group", default="family,location")
    parser.add_argument("--locations", type=int, default=4)
    parser.add_argument("--weeks", type=int, default=104)
    parser.add_argument("--forward", type=int, default=13)
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument(
        "--view", action="store_true", help="time the group view's model against the session"
    )
    args = parser.parse_args(argv)
    for series in args.series or [100_000]:
        result = view(series, args) if args.view else bench(series, args)
        print(json.dumps(result, indent=1), flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
