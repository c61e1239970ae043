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
Textual's display hook; the Pilot's own pauses between keys are not counted. Targets (issue):
first frame <= 3 s at 100k series; cursor p95 <= 50 ms; filter and sort <= 300 ms.
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
    app = TriageApp(Options(portfolio=path, ledger=ledger, reviewer="bench"))
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


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--series", type=int, default=100_000)
    parser.add_argument("--moves", type=int, default=200)
    parser.add_argument("--repeats", type=int, default=7)
    parser.add_argument("--out", type=Path, default=ROOT / "bench-out")
    parser.add_argument(
        "--no-baseline", action="store_true", help="skip the DataTable baseline (slow at 100k)"
    )
    args = parser.parse_args(argv)
    path = portfolio_file(args.series, args.out)
    result = asyncio.run(measure(path, args.moves, args.repeats))
    if not args.no_baseline:
        result["datatable_first_frame_s"] = asyncio.run(datatable_baseline(path))
    result["python"] = sys.version.split()[0]
    targets = {
        "first_frame_s": 3.0,
        "cursor_ms.p95": 50.0,
        "filter_ms.p95": 300.0,
        "order_ms.p95": 300.0,
    }
    print(f"{result['series']:,} series")
    print(
        f"first frame      {result['first_frame_s']:.2f} s   "
        f"(target <= {targets['first_frame_s']} s)"
    )
    if "datatable_first_frame_s" in result:
        base = result["datatable_first_frame_s"]
        print(
            f"baseline         DataTable with the same rows: {base:.2f} s to its first frame "
            "(list widget only); the whole review start is "
            f"{base / result['first_frame_s']:.1f}x faster"
        )
    for name in ("cursor_ms", "filter_ms", "clear_ms", "order_ms"):
        stats = result[name]
        print(f"{name:<16} p50 {stats['p50']:7.1f} ms   p95 {stats['p95']:7.1f} ms")
    (args.out / f"tui-results-{result['series']}.json").write_text(json.dumps(result, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
