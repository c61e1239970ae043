"""Kill ``triage export`` at chosen moments and look at what it left in the target folder.

Shared by ``tests/core/test_export_kill.py`` (a seeded subset, in the suite) and
``tests/benchmarks/bench_export_kill.py`` (the full loop, by hand). Not collected by pytest.

The scene: one portfolio and two ledgers. The *old* ledger holds one adjustment, the *new* one
that adjustment and another, so the old and the new export differ in both data files (the
decisions rows and the forecast's adjusted values). The target folder starts with the complete
old export; the killed run writes the new one with ``--force``. Afterwards the visible files must
be the complete old set or the complete new set: the decisions and forecast bytes of one export,
and the README of the same export (its lines but the export time). Both layouts are read: the
three files beside each other (triage before the set folder) or in the folder ``up/``.
"""

from __future__ import annotations

import csv
import os
import shutil
import signal
import subprocess
import sys
import time
from dataclasses import dataclass
from datetime import date, timedelta
from pathlib import Path

from triage.core.ledger import Ledger
from triage.core.read import read_portfolio

ROOT = Path(__file__).resolve().parents[2]
SET_NAMES = ("up-decisions.csv", "up-forecast.csv", "up-README.txt")
HISTORY, FORWARD = 4, 13
FIRST = date(2026, 10, 5)
CYCLE = (FIRST + timedelta(weeks=HISTORY - 1)).isoformat()


@dataclass(frozen=True)
class Inputs:
    """The portfolio and the two ledgers (kept outside the target folder)."""

    portfolio: Path
    old_ledger: Path
    new_ledger: Path


@dataclass(frozen=True)
class Export:
    """A complete export as the code under test writes it."""

    decisions: bytes
    forecast: bytes
    readme: str


def forecast(s: int, w: int) -> float:
    """The forecast of series ``s`` in week ``w``."""
    return float(11 + (s * 3 + w) % 5)


def build_inputs(folder: Path, n_series: int) -> Inputs:
    """A weekly portfolio of ``n_series`` series and the old and new ledgers."""
    folder.mkdir(parents=True, exist_ok=True)
    weeks = [(FIRST + timedelta(weeks=w)).isoformat() for w in range(HISTORY + FORWARD)]
    path = folder / "week.csv"
    with path.open("w", encoding="utf-8", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(["item", "location", "period", "demand", "forecast"])
        for s in range(n_series):
            for w, week in enumerate(weeks):
                demand = 10 + (s + w) % 7 if w < HISTORY else ""
                writer.writerow([f"I{s:06d}", "L1", week, demand, forecast(s, w)])
    portfolio = read_portfolio(path)
    assert portfolio.cycle == CYCLE
    base = {"portfolio_name": path.name, "portfolio_fingerprint": portfolio.fingerprint}
    old, new = folder / "old.ledger.sqlite", folder / "new.ledger.sqlite"
    for ledger_path, count in ((old, 1), (new, 2)):
        with Ledger.open(ledger_path) as ledger:
            for s in range(count):
                ledger.record(
                    CYCLE,
                    f"I{s:06d}",
                    "L1",
                    outcome="adjusted",
                    root_cause="promotion",
                    note=f"decision {s}",
                    reviewer="kill-test",
                    adjustment=f"={50 + s}",
                    lines=[(weeks[w], forecast(s, w), 50.0 + s) for w in (HISTORY, HISTORY + 1)],
                    expected_version=0,
                    **base,
                )
    return Inputs(path, old, new)


def command(code: Path, inputs: Inputs, ledger: Path, target: Path) -> list[str]:
    """``triage export ... --force`` run from the source tree ``code``."""
    start = f"import sys; sys.path.insert(0, {str(code)!r}); from triage.cli import main; "
    return [
        sys.executable,
        "-c",
        start + "sys.exit(main())",
        "export",
        str(inputs.portfolio),
        "--ledger",
        str(ledger),
        "--to",
        str(target),
        "--force",
    ]


def environment(home: Path) -> dict[str, str]:
    """No configuration file of the machine (the reviewer name comes from the login)."""
    return {**os.environ, "XDG_CONFIG_HOME": str(home)}


def visible_set(work: Path) -> dict[str, Path]:
    """The set's files a reader sees: by name, anywhere under ``work`` but in hidden folders."""
    found: dict[str, Path] = {}
    for path in work.rglob("*"):
        parts = path.relative_to(work).parts
        if path.name in SET_NAMES and not any(p.startswith(".") for p in parts):
            found[path.name] = path
    return found


def leftovers(work: Path) -> list[str]:
    """Hidden entries under ``work``: temporary, backup or scratch files and folders."""
    return sorted(
        str(p.relative_to(work))
        for p in work.rglob("*")
        if any(part.startswith(".") for part in p.relative_to(work).parts)
    )


def readme_key(text: str) -> str:
    """The README but its export-time line (the only line two runs of one export differ in)."""
    return "\n".join(line for line in text.splitlines() if not line.startswith("Exported at"))


def read_export(work: Path) -> Export | None:
    """The visible set, or None when a file is missing."""
    files = visible_set(work)
    if set(files) != set(SET_NAMES):
        return None
    return Export(
        files[SET_NAMES[0]].read_bytes(),
        files[SET_NAMES[1]].read_bytes(),
        readme_key(files[SET_NAMES[2]].read_text(encoding="utf-8", errors="replace")),
    )


def classify(work: Path, old: Export, new: Export) -> str:
    """``"old"`` or ``"new"`` (one complete export is visible), else ``"mixed"``."""
    seen = read_export(work)
    if seen == old:
        return "old"
    if seen == new:
        return "new"
    return "mixed"


def reference(code: Path, inputs: Inputs, ledger: Path, folder: Path, home: Path) -> Export:
    """Run the export once, to completion, into a fresh ``folder``; the set it wrote."""
    shutil.rmtree(folder, ignore_errors=True)
    folder.mkdir(parents=True)
    done = subprocess.run(
        command(code, inputs, ledger, folder / "up.csv"),
        capture_output=True,
        text=True,
        env=environment(home),
        timeout=600,
    )
    assert done.returncode == 0, done.stderr
    export = read_export(folder)
    assert export is not None, sorted(os.listdir(folder))
    return export


@dataclass(frozen=True)
class Kill:
    """One killed run."""

    delay: float
    """Seconds after the first new entry appeared in the folder (the write began)."""
    killed: bool
    """False when the run had finished before the kill."""
    state: str
    """``old``, ``new`` or ``mixed`` right after the kill."""
    left: tuple[str, ...]
    """Hidden leftovers right after the kill."""


def kill_after_write_starts(
    cmd: list[str], work: Path, delay: float, env: dict[str, str], old: Export, new: Export
) -> Kill:
    """Start ``cmd``, wait until it creates its first entry in ``work``, sleep, SIGKILL."""
    before = set(os.listdir(work))
    process = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env)
    try:
        deadline = time.monotonic() + 600
        while process.poll() is None and set(os.listdir(work)) == before:
            if time.monotonic() > deadline:
                raise TimeoutError("the export never started writing")
            time.sleep(0.0005)
        if delay > 0:
            time.sleep(delay)
        killed = process.poll() is None
        if killed:
            process.send_signal(signal.SIGKILL)
        process.wait(timeout=600)
    finally:
        if process.poll() is None:
            process.kill()
            process.wait()
    return Kill(delay, killed, classify(work, old, new), tuple(leftovers(work)))


def write_window(cmd: list[str], work: Path, template: Path, env: dict[str, str]) -> float:
    """Seconds from the first new entry in ``work`` to the end of an unkilled run."""
    reset(work, template)
    before = set(os.listdir(work))
    process = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env)
    while process.poll() is None and set(os.listdir(work)) == before:
        time.sleep(0.0005)
    started = time.monotonic()
    process.wait(timeout=600)
    return max(time.monotonic() - started, 0.001)


def reset(work: Path, template: Path) -> None:
    """``work`` becomes a copy of ``template`` (the complete old export)."""
    shutil.rmtree(work, ignore_errors=True)
    shutil.copytree(template, work, symlinks=True)
