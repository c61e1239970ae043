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
import statistics
from pathlib import Path

from tests.benchmarks.bench_rank import ROOT, alternate, built_portfolio, triage_command


def bench(series: int, args: argparse.Namespace) -> dict[str, object]:
    path = built_portfolio(series, args)
    base = [*triage_command(), "rank", str(path), "--format", "csv", "--output", "/dev/null"]
    seconds, peak, runs = alternate(
        {"rank": base, "rank_group": [*base, "--group", args.group]}, args.repeat, f"{series:,}"
    )
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

    path = built_portfolio(series, args)
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
