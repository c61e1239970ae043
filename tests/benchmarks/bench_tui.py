"""Benchmark of the review screens on a large portfolio (headless Textual).

Run by hand (pytest does not collect ``bench_*.py``)::

    python -m tests.benchmarks.bench_tui --series 100000 --out bench-out/

Measures, in one process:

* ``first frame``: from constructing the app to the first frame drawn with the loaded list
  (reading, scoring and the ledger included: the whole start of a review);
* ``cursor``: key press to the next frame for 200 cursor moves (p50/p95);
* ``filter`` and ``order``: applying a text filter, clearing it, and switching error/bias order,
  each to the next frame (p50/p95 over repeats).

Latency is the time from posting the key to the first frame written after it, taken from
Textual's display hook; the Pilot's own pauses between keys are not counted. Cursor, filter and
order are measured once the background pieces (suggestions, repeat offenders, search index) are
in. Targets (issue): first frame <= 3 s at 100k series; cursor p95 <= 30 ms; filter and sort
<= 300 ms.

``--start`` (default on) also times the review start the way a planner sees it, each in its own
process from the interpreter's start (so imports count, as they do for ``triage rank``), in
alternation, ``--start-repeats`` times:

* ``rank``: ``triage rank FILE --format csv > /dev/null``, the baseline;
* ``cold``: the review screens' first frame with the ranked list, the reopen cache empty;
* ``warm``: the same with the file in the reopen cache (filled by an untimed run before).

Printed as seconds and as ratios to ``rank`` (medians). Targets (issue 14): cold <= 1.0x rank,
warm <= 3 s at 1M series.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def portfolio_file(series: int, out: Path) -> Path:
    """A cached Parquet portfolio of about ``series`` series (3 locations per item)."""
    from sample import generate

    items = max(1, series // generate.SAMPLE_LOCATIONS)
    path = out / f"tui-{items * generate.SAMPLE_LOCATIONS}s.parquet"
    if not path.exists():
        out.mkdir(parents=True, exist_ok=True)
        generate.write_parquet(path, items)
    return path


def percentile(values: list[float], q: float) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, round(q * (len(ordered) - 1)))]


async def measure(path: Path, moves: int, repeats: int) -> dict[str, object]:
    from triage.tui.app import Options, TriageApp
    from triage.tui.widgets.series_list import SeriesList

    frames: list[float] = []
    ledger = Path(tempfile.mkdtemp()) / "bench.ledger.sqlite"
    start = time.perf_counter()
    app = TriageApp(Options(portfolio=path, ledger=ledger, reviewer="bench", cache=False))
    original = app._display

    def display(screen, renderable):
        frames.append(time.perf_counter())
        return original(screen, renderable)

    app._display = display  # type: ignore[method-assign]

    async def next_frame_after(t0: float, timeout: float = 10.0) -> float:
        deadline = time.perf_counter() + timeout
        while time.perf_counter() < deadline:
            later = [f for f in frames if f > t0]
            if later:
                return later[0] - t0
            await asyncio.sleep(0.001)
        raise TimeoutError("no frame")

    result: dict[str, object] = {}
    async with app.run_test(size=(160, 48)) as pilot:
        while app.session is None or not len(app.query_one(SeriesList).order):
            await asyncio.sleep(0.01)
        loaded = time.perf_counter()
        await next_frame_after(loaded)
        result["first_frame_s"] = next(f for f in frames if f > loaded) - start
        result["series"] = app.session.portfolio.n_series
        while not app.session.ready:
            await asyncio.sleep(0.05)
        result["background_done_s"] = time.perf_counter() - start

        async def timed(action) -> float:
            await pilot.pause(0.12)  # let the debounced chart settle first
            t0 = time.perf_counter()
            action()
            return await next_frame_after(t0)

        series_list = app.query_one(SeriesList)
        cursor = []
        for i in range(moves):
            step = 1 if (i // 50) % 2 == 0 else -1
            t0 = time.perf_counter()
            series_list.action_cursor(step)
            cursor.append(await next_frame_after(t0))
            await asyncio.sleep(0.005)
        result["cursor_ms"] = {
            "p50": percentile(cursor, 0.5) * 1e3,
            "p95": percentile(cursor, 0.95) * 1e3,
        }

        filters, clears, orders = [], [], []
        for _ in range(repeats):

            def apply_filter() -> None:
                app.text_filter = "gf-1000"
                app._apply_order()

            def clear() -> None:
                app.action_clear_filter()

            filters.append(await timed(apply_filter))
            clears.append(await timed(clear))
            orders.append(await timed(app.action_toggle_order))
        result["filter_ms"] = {
            "p50": percentile(filters, 0.5) * 1e3,
            "p95": percentile(filters, 0.95) * 1e3,
        }
        result["clear_ms"] = {
            "p50": percentile(clears, 0.5) * 1e3,
            "p95": percentile(clears, 0.95) * 1e3,
        }
        result["order_ms"] = {
            "p50": percentile(orders, 0.5) * 1e3,
            "p95": percentile(orders, 0.95) * 1e3,
        }
    return result


async def datatable_baseline(path: Path) -> float:
    """Seconds to the first frame of a plain DataTable holding the same ranked rows.

    The same portfolio is loaded and scored first (not timed); only building and showing the
    table is timed, so the ratio compares the list widgets alone.
    """
    from rich.text import Text
    from textual.app import App, ComposeResult
    from textual.widgets import DataTable

    from triage.core.ranking import scorecard
    from triage.core.read import read_portfolio

    card = scorecard(read_portfolio(path))
    columns = [
        card["rank"],
        card["item"],
        card["location"],
        (card["error_share"] * 100).round(1),
        card["abs_error_value"].round(0),
        (card["bias_pct"] * 100).round(1),
    ]
    rows = list(zip(*(c.map(str).tolist() for c in columns), strict=True))
    frames: list[float] = []

    class Baseline(App[None]):
        def compose(self) -> ComposeResult:
            yield DataTable(cursor_type="row")

    app = Baseline()
    original = app._display

    def display(screen, renderable):
        frames.append(time.perf_counter())
        return original(screen, renderable)

    app._display = display  # type: ignore[method-assign]
    async with app.run_test(size=(160, 48)) as pilot:
        table = app.query_one(DataTable)
        start = time.perf_counter()
        table.add_columns("rank", "item", "location", "share", "abs err", "bias")
        for i, row in enumerate(rows):
            table.add_row(*(Text(c) for c in row), key=str(i))
        while not [f for f in frames if f > start]:
            await pilot.pause(0.01)
        return next(f for f in frames if f > start) - start


def first_list_frame(app) -> list[float]:
    """Watch ``app``'s frames: the list returned gets the ``time.time()`` of the first frame
    written with the ranked list on screen."""
    from triage.tui.widgets.series_list import SeriesList

    drawn: list[float] = []
    original = app._display

    def display(screen, renderable):
        if app.session is not None and not drawn:
            try:
                shown = len(app.query_one(SeriesList).order)
            except Exception:  # no screen yet, or closing
                shown = 0
            if shown:
                drawn.append(time.time())
        return original(screen, renderable)

    app._display = display
    return drawn


async def first_frame_child(path: Path, folder: Path, *, cache: bool, fill: bool) -> None:
    """Child process: open the review screens and print when the first frame with the list was
    drawn (``time.time()``, as JSON); with ``fill``, wait until the reopen cache holds the file."""
    import dataclasses

    from triage.tui.app import Options, TriageApp

    ledger = Path(tempfile.mkdtemp()) / "bench.ledger.sqlite"
    extra: dict[str, object] = {"cache": cache, "cache_folder": folder}
    # An older tree (--baseline-ref) has no reopen cache.
    known = {f.name for f in dataclasses.fields(Options)}
    kept = {k: v for k, v in extra.items() if k in known}
    app = TriageApp(Options(portfolio=path, ledger=ledger, reviewer="bench", **kept))  # type: ignore[arg-type]
    drawn = first_list_frame(app)
    async with app.run_test(size=(160, 48)):
        while not drawn:
            await asyncio.sleep(0.005)
        cached = isinstance(app.session.portfolio.demand, __import__("numpy").memmap)
        if fill:
            while not any((p / "meta.json").is_file() for p in folder.glob("*")):
                await asyncio.sleep(0.1)
    print(json.dumps({"first_frame_at": drawn[0], "cached": cached}))


def start_figures(path: Path, repeats: int, baseline_ref: str | None = None) -> dict[str, object]:
    """rank, cold and warm review starts of one file, alternately, each in its own process;
    with ``baseline_ref``, also the cold start of that revision (its tree first on the path)."""
    import shutil
    import statistics

    from tests.benchmarks.bench_rank import checkout, triage_command
    from tests.benchmarks.bench_rank import measure as run

    # Run as a script: its own folder first on the path, then PYTHONPATH (the tree to time).
    child = [sys.executable, str(Path(__file__).resolve()), "--child", str(path)]
    folder = Path(tempfile.mkdtemp(prefix="bench-cache-"))
    before_tree = (
        checkout(baseline_ref, Path(tempfile.mkdtemp(prefix="bench-before-")))
        if baseline_ref
        else None
    )
    runs: dict[str, list[float]] = {"rank": [], "cold": [], "warm": []}
    if before_tree is not None:
        runs["before"] = []
    peaks: dict[str, int] = {}

    def start(extra: list[str], name: str, code: Path | None = None) -> float:
        launched = time.time()
        done = run([*child, "--cache-folder", str(folder), *extra], code=code)
        if done.returncode != 0:
            raise RuntimeError(f"{name}: {done.error}")
        peaks[name] = max(peaks.get(name, 0), done.peak_bytes or 0)
        if name == "warm" and not done.report["cached"]:
            raise RuntimeError("warm: the file did not come from the cache")
        return float(done.report["first_frame_at"]) - launched

    for _ in range(repeats):
        done = run(
            [*triage_command(), "rank", str(path), "--format", "csv", "--output", "/dev/null"]
        )
        if done.returncode != 0:
            raise RuntimeError(f"rank: {done.error}")
        runs["rank"].append(done.seconds)
        peaks["rank"] = max(peaks.get("rank", 0), done.peak_bytes or 0)
        if before_tree is not None:
            runs["before"].append(start([], "before", code=before_tree))
        shutil.rmtree(folder, ignore_errors=True)
        runs["cold"].append(start([], "cold"))
        start(["--fill"], "fill")
        runs["warm"].append(start([], "warm"))
    shutil.rmtree(folder, ignore_errors=True)
    if before_tree is not None:
        shutil.rmtree(before_tree, ignore_errors=True)
    med = {k: statistics.median(v) for k, v in runs.items()}
    return {
        "runs_s": runs,
        "baseline_ref": baseline_ref,
        "median_s": med,
        "cold_over_rank": med["cold"] / med["rank"],
        "warm_over_rank": med["warm"] / med["rank"],
        "per_round_cold_over_rank": [
            c / r for c, r in zip(runs["cold"], runs["rank"], strict=True)
        ],
        "peak_bytes": peaks,
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--series", type=int, default=100_000)
    parser.add_argument("--moves", type=int, default=200)
    parser.add_argument("--repeats", type=int, default=7)
    parser.add_argument("--out", type=Path, default=ROOT / "bench-out")
    parser.add_argument(
        "--no-baseline", action="store_true", help="skip the DataTable baseline (slow at 100k)"
    )
    parser.add_argument("--no-start", action="store_true", help="skip rank / cold / warm")
    parser.add_argument("--start-repeats", type=int, default=2)
    parser.add_argument(
        "--baseline-ref",
        help="also time the cold start of this git revision, alternately (git archive)",
    )
    parser.add_argument("--no-keys", action="store_true", help="skip cursor, filter and order")
    parser.add_argument("--child", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--cache-folder", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--fill", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child is not None:
        asyncio.run(first_frame_child(args.child, args.cache_folder, cache=True, fill=args.fill))
        return 0
    path = portfolio_file(args.series, args.out)
    result: dict[str, object] = {}
    if not args.no_start:
        result["start"] = start_figures(path, args.start_repeats, args.baseline_ref)
    if not args.no_keys:
        result.update(asyncio.run(measure(path, args.moves, args.repeats)))
    if not args.no_baseline:
        result["datatable_first_frame_s"] = asyncio.run(datatable_baseline(path))
    result["python"] = sys.version.split()[0]
    print(f"{args.series:,} series requested: {path.name}")
    if "start" in result:
        start = result["start"]
        med = start["median_s"]
        print(
            f"review start (median of {args.start_repeats}, each its own process, in one run):\n"
            f"  triage rank --format csv  {med['rank']:6.2f} s   (baseline, 1.00x)\n"
            f"  cold first frame          {med['cold']:6.2f} s   "
            f"{start['cold_over_rank']:.2f}x rank (target <= 1.0x)\n"
            f"  warm first frame          {med['warm']:6.2f} s   "
            f"{start['warm_over_rank']:.2f}x rank (target <= 3 s)"
        )
        rounds = ", ".join(f"{r:.2f}x" for r in start["per_round_cold_over_rank"])
        print(f"  cold / rank, each round   {rounds}")
        if "before" in med:
            print(
                f"  cold first frame at {args.baseline_ref}: {med['before']:.2f} s, "
                f"{med['before'] / med['rank']:.2f}x rank; this tree "
                f"{med['cold'] / med['before']:.2f}x of it"
            )
        peaks = start["peak_bytes"]
        print(
            "  peak memory MB            "
            + "  ".join(f"{k} {v / 2**20:,.0f}" for k, v in peaks.items() if v)
        )
    if "first_frame_s" in result:
        print(
            f"in-process first frame {result['first_frame_s']:.2f} s, background pieces in at "
            f"{result['background_done_s']:.2f} s"
        )
    if "datatable_first_frame_s" in result and "first_frame_s" in result:
        base = result["datatable_first_frame_s"]
        print(
            f"baseline         DataTable with the same rows: {base:.2f} s to its first frame "
            "(list widget only); the whole review start is "
            f"{base / result['first_frame_s']:.1f}x faster"
        )
    for name in ("cursor_ms", "filter_ms", "clear_ms", "order_ms"):
        if name in result:
            stats = result[name]
            print(f"{name:<16} p50 {stats['p50']:7.1f} ms   p95 {stats['p95']:7.1f} ms")
    args.out.mkdir(parents=True, exist_ok=True)
    (args.out / f"tui-results-{args.series}.json").write_text(json.dumps(result, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
