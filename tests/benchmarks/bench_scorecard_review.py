"""Benchmark: the review screens opening on a dataset's stored scorecard (``--scorecard``).

    python -m tests.benchmarks.bench_scorecard_review \
        --dataset bench-out/dataset-10000000s-100000p-seed7 --scorecard bench-out/card-10000000s

Make the dataset with ``bench_scale`` and its scorecard with ``triage rank DATASET --engine dask
--format parquet --output DIR``. In one run, alternately, each in its own process from the
interpreter's start:

* the baseline: a bare ``pyarrow.parquet.read_table(DIR).to_pandas()`` of the scorecard, the
  least any list of every series needs;
* ``review DATASET --scorecard DIR`` to its first frame with the list, and to the moment the
  first series' history is in (detail pane and chart), with the reopen cache empty; then the
  same review reopened, the scorecard mapped from the reopen cache.

Then, in this process, the time to fetch one series' history and a screen of 40 random series
(``on_demand.Histories.fetch``), against reading one whole part of the dataset. Target (issue
14): the 10M scorecard opens to an interactive frame in at most 5 s.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import statistics
import sys
import tempfile
import time
from pathlib import Path

from tests.benchmarks.bench_rank import measure as run
from tests.benchmarks.bench_tui import first_list_frame

BARE_READ = (
    "import sys, pyarrow.parquet as pq; frame = pq.read_table(sys.argv[1]).to_pandas(); "
    "print(len(frame))"
)


async def first_frame_child(dataset: Path, scorecard: Path, cache: Path) -> None:
    """Child process: open the review on the scorecard; print when the list was first drawn
    and when the first series' history was in (``time.time()``, as JSON), and whether the
    reopen cache held the scorecard; then wait until the cache holds it."""
    from triage.tui.app import Options, TriageApp
    from triage.tui.widgets.series_list import SeriesList

    ledger = Path(tempfile.mkdtemp()) / "bench.ledger.sqlite"
    warm = any(cache.glob("*/meta.json"))
    app = TriageApp(
        Options(
            portfolio=dataset,
            scorecard=scorecard,
            ledger=ledger,
            reviewer="bench",
            cache_folder=cache,
        )
    )
    drawn = first_list_frame(app)
    async with app.run_test(size=(160, 48)):
        while not drawn:
            await asyncio.sleep(0.005)
        top = int(app.query_one(SeriesList).order[0])
        assert app.histories is not None
        while not app.histories.has(top):
            await asyncio.sleep(0.005)
        history_at = time.time()
        series = app.session.portfolio.n_series
        while not any(cache.glob("*/meta.json")):
            await asyncio.sleep(0.1)
    found = {"first_frame_at": drawn[0], "history_at": history_at, "series": series}
    print(json.dumps({**found, "warm": warm}))


def fetch_figures(dataset: Path, scorecard: Path, repeats: int) -> dict[str, float]:
    """Median seconds to fetch 1 and 40 random series, and to read one whole part."""
    import numpy as np
    import pyarrow.parquet as pq

    from triage.core.on_demand import open_review
    from triage.core.settings import ScoreSettings

    review = open_review(dataset, scorecard, ScoreSettings())
    histories, n = review.histories, review.portfolio.n_series
    rng = np.random.default_rng(20261205)
    one, screen, part = [], [], []
    for _ in range(repeats):
        started = time.perf_counter()
        histories.fetch([int(rng.integers(n))])
        one.append(time.perf_counter() - started)
        started = time.perf_counter()
        histories.fetch(rng.choice(n, 40, replace=False).tolist())
        screen.append(time.perf_counter() - started)
        started = time.perf_counter()
        pq.read_table(
            histories.plan.dataset.files[int(rng.integers(len(histories.plan.dataset.files)))]
        )
        part.append(time.perf_counter() - started)
    return {
        "fetch_1_s": statistics.median(one),
        "fetch_40_s": statistics.median(screen),
        "read_part_s": statistics.median(part),
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--dataset", type=Path, required=True)
    parser.add_argument("--scorecard", type=Path, required=True)
    parser.add_argument("--repeats", type=int, default=2)
    parser.add_argument(
        "--also-read",
        type=Path,
        metavar="DIR",
        help="another scorecard folder of the same dataset (e.g. written by an older revision): "
        "its bare read is timed in the same rounds, for the ratio of the two encodings",
    )
    parser.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--cache-folder", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        asyncio.run(first_frame_child(args.dataset, args.scorecard, args.cache_folder))
        return 0
    import shutil

    cache = Path(tempfile.mkdtemp(prefix="bench-cache-"))
    child = [
        sys.executable, str(Path(__file__).resolve()), "--child",
        "--dataset", str(args.dataset), "--scorecard", str(args.scorecard),
        "--cache-folder", str(cache),
    ]  # fmt: skip
    runs: dict[str, list[float]] = {"read": [], "frame": [], "history": [], "warm": []}
    if args.also_read is not None:
        runs["also_read"] = []
    peaks: dict[str, int] = {}
    series = 0
    for _ in range(args.repeats):
        done = run([sys.executable, "-c", BARE_READ, str(args.scorecard)])
        if done.returncode != 0:
            raise SystemExit(f"bare read: {done.error}")
        runs["read"].append(done.seconds)
        peaks["read"] = max(peaks.get("read", 0), done.peak_bytes or 0)
        if args.also_read is not None:
            done = run([sys.executable, "-c", BARE_READ, str(args.also_read)])
            if done.returncode != 0:
                raise SystemExit(f"bare read of {args.also_read}: {done.error}")
            runs["also_read"].append(done.seconds)
        shutil.rmtree(cache, ignore_errors=True)
        launched = time.time()
        done = run(child)
        if done.returncode != 0 or done.report["warm"]:
            raise SystemExit(f"review: {done.error or 'not a cold start'}")
        runs["frame"].append(done.report["first_frame_at"] - launched)
        runs["history"].append(done.report["history_at"] - launched)
        peaks["review"] = max(peaks.get("review", 0), done.peak_bytes or 0)
        series = done.report["series"]
        launched = time.time()
        done = run(child)
        if done.returncode != 0 or not done.report["warm"]:
            raise SystemExit(f"reopen: {done.error or 'not from the cache'}")
        runs["warm"].append(done.report["first_frame_at"] - launched)
        peaks["reopen"] = max(peaks.get("reopen", 0), done.peak_bytes or 0)
    shutil.rmtree(cache, ignore_errors=True)
    med = {k: statistics.median(v) for k, v in runs.items()}
    fetched = fetch_figures(args.dataset, args.scorecard, max(3, args.repeats))
    result = {"series": series, "runs_s": runs, "median_s": med, "peak_bytes": peaks, **fetched}
    print(
        f"{series:,} series, median of {args.repeats} alternating rounds, each its own process:\n"
        f"  bare read of the scorecard   {med['read']:6.2f} s   1.00x   "
        f"peak {peaks['read'] / 2**20:,.0f} MB\n"
        f"  review: first frame          {med['frame']:6.2f} s   "
        f"{med['frame'] / med['read']:.2f}x   peak {peaks['review'] / 2**20:,.0f} MB "
        "(target <= 5 s at 10M)\n"
        f"  review: first history in     {med['history']:6.2f} s   "
        f"{med['history'] / med['read']:.2f}x\n"
        f"  reopen (cache): first frame  {med['warm']:6.2f} s   "
        f"{med['warm'] / med['read']:.2f}x   peak {peaks['reopen'] / 2**20:,.0f} MB "
        "(target <= 5 s at 10M)\n"
        f"in process (median of {max(3, args.repeats)}): fetch 1 series "
        f"{fetched['fetch_1_s']:.3f} s, 40 series {fetched['fetch_40_s']:.3f} s, "
        f"one whole part read {fetched['read_part_s']:.3f} s "
        f"({fetched['fetch_1_s'] / fetched['read_part_s']:.2f}x of it for one series)"
    )
    if args.also_read is not None:
        print(
            f"  bare read of {args.also_read.name}: {med['also_read']:6.2f} s; this scorecard's "
            f"read is {med['read'] / med['also_read']:.2f}x of it, the review's first frame "
            f"{med['frame'] / med['also_read']:.2f}x"
        )
    out = args.scorecard.parent / f"scorecard-review-{series}s.json"
    out.write_text(json.dumps(result, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
