"""Child process for the ledger fault tests (run as a script, not collected by pytest).

Usage: ``python ledger_worker.py COMMAND LEDGER [ARGS...]``. Every line it prints is a protocol
message the parent parses: ``READY``, ``ACK <item>`` after a record() returned (so the decision
is committed), ``ERR <Class> <message>``, ``DONE ...``.
"""

from __future__ import annotations

import json
import os
import random
import resource
import sqlite3
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

# The path above makes triage importable when the child starts outside the repository.
from triage.core.ledger import (
    Ledger,
    LedgerError,
    StaleDecisionError,
    default_ledger_path,
)

CYCLE = "2026-11-23"
PERIODS = [f"2026-{m:02d}-01" for m in range(1, 13)] + ["2027-01-01"]


def say(*parts: object) -> None:
    print(*parts, flush=True)


def record(ledger: Ledger, item: str, *, note: str = "", version: int = 0, lines: bool = False):
    """One decision; with ``lines`` an adjustment over 13 forward periods."""
    extra: dict[str, Any] = {}
    if lines:
        extra = {
            "adjustment": "x1.1",
            "lines": [(p, 100.0 + i, 110.0 + i) for i, p in enumerate(PERIODS)],
        }
    return ledger.record(
        CYCLE,
        item,
        "",
        outcome="adjusted" if lines else "no_change",
        root_cause="promotion",
        note=note,
        reviewer=f"worker-{os.getpid()}",
        portfolio_name="week47.csv",
        portfolio_fingerprint="f" * 64,
        expected_version=version,
        **extra,
    )


def cmd_loop(path: str, prefix: str, seed: str) -> None:
    """Record decisions until killed, acknowledging each after it returns."""
    rng = random.Random(int(seed))
    with Ledger.open(path) as ledger:
        say("READY")
        i = 0
        while True:
            item = f"{prefix}-{i}"
            record(ledger, item, note="n" * rng.randrange(0, 3000), lines=rng.random() < 0.5)
            say("ACK", item)
            i += 1


def cmd_fsize(path: str, *margins: str) -> None:
    """Under a shrinking file-size limit, record until writing fails; then lift the limit."""
    soft, hard = resource.getrlimit(resource.RLIMIT_FSIZE)
    files = [Path(path), Path(path + "-wal")]
    with Ledger.open(path) as ledger:
        say("READY")
        n = 0
        for margin in margins:
            size = max(f.stat().st_size for f in files if f.exists())
            # CPython ignores SIGXFSZ, so a write past the limit fails with EFBIG instead of
            # killing the process (docs/sources.md §4.5, measured).
            resource.setrlimit(resource.RLIMIT_FSIZE, (size + int(margin), hard))
            for _ in range(5000):
                item = f"fs-{margin}-{n}"
                n += 1
                try:
                    record(ledger, item, note="z" * 9000, lines=True)
                except LedgerError as exc:
                    say("ERR", type(exc).__name__, item, json.dumps(str(exc)))
                    break
                say("ACK", item)
            resource.setrlimit(resource.RLIMIT_FSIZE, (soft, hard))
            # Space is back: the same connection saves again.
            item = f"fs-{margin}-after"
            record(ledger, item)
            say("ACK", item)
    say("DONE")


def cmd_writer(path: str, prefix: str, count: str, shared: str) -> None:
    """Write ``count`` decisions, on own series or on a few shared ones (retrying when stale)."""
    total = int(count)
    stale = 0
    with Ledger.open(path, timeout=10.0) as ledger:
        say("READY")
        sys.stdin.readline()  # start together with the other writer
        for i in range(total):
            item = f"shared-{i % 3}" if shared == "1" else f"{prefix}-{i}"
            while True:
                seen = ledger.version(CYCLE, item, "")
                try:
                    record(ledger, item, note=f"{prefix} {i}", version=seen)
                    break
                except StaleDecisionError:
                    stale += 1
            say("ACK", item)
    say("DONE", stale)


def cmd_hold(path: str) -> None:
    """Hold the write lock (BEGIN IMMEDIATE) until a line arrives on stdin."""
    con = sqlite3.connect(path, isolation_level=None)
    con.execute("BEGIN IMMEDIATE")
    say("LOCKED")
    action = sys.stdin.readline().strip()
    con.execute("ROLLBACK" if action == "rollback" else "COMMIT")
    say("RELEASED")
    con.close()


def cmd_readonly(*paths: str) -> None:
    """As an unprivileged user: open each ledger, report, and try to save a decision."""
    for path in paths:
        report: dict[str, object] = {"path": path, "uid": os.getuid()}
        try:
            with Ledger.open(path) as ledger:
                report.update(
                    read_only=ledger.read_only,
                    notice=ledger.notice,
                    items=sorted(d.item for d in ledger.current(CYCLE)),
                )
                try:
                    record(ledger, "from-readonly", version=ledger.version(CYCLE, "x", ""))
                    report["saved"] = True
                except LedgerError as exc:
                    report.update(saved=False, error=type(exc).__name__, message=str(exc))
        except LedgerError as exc:
            report.update(open_error=type(exc).__name__, message=str(exc))
        say(json.dumps(report))


def cmd_defaultpath(portfolio: str) -> None:
    """Where the ledger of a portfolio goes for this user, and the notice."""
    where, notice = default_ledger_path(portfolio)
    say(json.dumps({"path": str(where), "notice": notice}))


def record_group(ledger: Ledger, prefix: str, size: int) -> Any:
    """A group decision on ``size`` new series ``<prefix>-0`` ... with 13 lines each."""
    items = [f"{prefix}-{k}" for k in range(size)]
    return ledger.record_group(
        CYCLE,
        columns=("family",),
        key_values=(prefix,),
        items=items,
        locations=[""] * size,
        expected_versions=[0] * size,
        outcome="adjusted",
        root_cause="promotion",
        note="group",
        reviewer=f"worker-{os.getpid()}",
        portfolio_name="week47.csv",
        portfolio_fingerprint="f" * 64,
        adjustment="x1.1",
        basis="forecasts",
        periods=PERIODS,
        original=[[100.0 + i for i in range(len(PERIODS))]] * size,
        adjusted=[[110.0 + i for i in range(len(PERIODS))]] * size,
    )


def cmd_grouploop(path: str, prefix: str, size: str) -> None:
    """Record group decisions until killed, acknowledging each after it returns."""
    with Ledger.open(path) as ledger:
        say("READY")
        i = 0
        while True:
            record_group(ledger, f"{prefix}.{i}", int(size))
            say("ACK", f"{prefix}.{i}")
            i += 1


def cmd_groupstall(path: str, prefix: str, size: str) -> None:
    """Write a group decision and stop inside its transaction, after every row is written and
    before COMMIT, until killed."""
    from contextlib import contextmanager
    from time import sleep

    class Stalling(Ledger):
        @contextmanager
        def _writing(self, what: str) -> Any:
            with super()._writing(what) as con:
                yield con
                rows = con.execute("SELECT count(*) FROM event").fetchone()[0]
                say("INSIDE", rows)
                sleep(60)

    with Stalling.open(path) as ledger:
        record_group(ledger, prefix, int(size))
        say("COMMITTED")


COMMANDS: dict[str, Callable[..., None]] = {
    "grouploop": cmd_grouploop,
    "groupstall": cmd_groupstall,
    "defaultpath": cmd_defaultpath,
    "loop": cmd_loop,
    "fsize": cmd_fsize,
    "writer": cmd_writer,
    "hold": cmd_hold,
    "readonly": cmd_readonly,
}

if __name__ == "__main__":
    COMMANDS[sys.argv[1]](*sys.argv[2:])
