"""Commit latency of ``Ledger.record`` against a bare INSERT + COMMIT, in the same run.

Run by hand (pytest does not collect ``bench_*.py``)::

    python -m tests.benchmarks.bench_ledger --calls 500

Both sides use the same durability settings (WAL, ``synchronous=FULL``, one ``BEGIN IMMEDIATE
... COMMIT`` per call), so the ratio shows what the ledger adds per decision (the event row, its
child rows, the triggers). A per-record integrity check, an extra fsync or a reopen would cost
multiples. Earlier figures: docs/performance.md, "Ledger".
"""

from __future__ import annotations

import argparse
import sqlite3
import statistics
import tempfile
import time
from pathlib import Path

from triage.core.ledger import Ledger


def percentile(values: list[float], q: float) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(q * len(ordered)))]


def measure(folder: Path, calls: int) -> tuple[list[float], list[float]]:
    """Seconds per call: bare INSERT + COMMIT, and ``Ledger.record`` of one decision."""
    base = sqlite3.connect(folder / "bare.sqlite", isolation_level=None)
    base.execute("PRAGMA journal_mode = WAL")
    base.execute("PRAGMA synchronous = FULL")
    base.execute("CREATE TABLE t (item TEXT NOT NULL, note TEXT NOT NULL) STRICT")
    bare: list[float] = []
    ours: list[float] = []
    with Ledger.open(folder / "timed.ledger.sqlite") as ledger:
        for i in range(calls):
            t0 = time.perf_counter()
            base.execute("BEGIN IMMEDIATE")
            base.execute("INSERT INTO t VALUES (?, ?)", (f"S{i}", "checked"))
            base.execute("COMMIT")
            t1 = time.perf_counter()
            ledger.record(
                "2026-11-23",
                f"S{i}",
                "",
                outcome="no_change",
                root_cause="unknown",
                note="checked",
                reviewer="bench",
                portfolio_name="bench.csv",
                portfolio_fingerprint="0" * 64,
                expected_version=0,
            )
            t2 = time.perf_counter()
            bare.append(t1 - t0)
            ours.append(t2 - t1)
    base.close()
    return bare, ours


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m tests.benchmarks.bench_ledger")
    parser.add_argument("--calls", type=int, default=500)
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        bare, ours = measure(Path(tmp), args.calls)
    for q, name in ((0.5, "p50"), (0.99, "p99")):
        b, o = percentile(bare, q), percentile(ours, q)
        print(f"{name}: bare {b * 1e3:.3f} ms, record() {o * 1e3:.3f} ms, ratio {o / b:.2f}")
    print(f"mean ratio {statistics.mean(ours) / statistics.mean(bare):.2f} over {args.calls} calls")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
