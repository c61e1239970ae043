"""QA regression tests (outside tester): defects found probing ``triage decide``.

Each test is the smallest reproduction of one defect and fails on the code it was found on.
"""

from __future__ import annotations

import csv
import json
import os
import shutil
import subprocess
import tempfile
from pathlib import Path

import pytest

from tests.cli.test_cli import run, triage_command
from triage.core.ledger import FOLDER_LEDGER, Ledger

WEEKS = ["2026-10-05", "2026-10-12", "2026-10-19", "2026-10-26", "2026-11-02", "2026-11-09"]


def portfolio(folder: Path, items: list[str]) -> Path:
    """A tiny weekly portfolio without locations; the last week is forward."""
    path = folder / "week.csv"
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["item", "period", "demand", "forecast"])
        for n, item in enumerate(items):
            for w, week in enumerate(WEEKS):
                writer.writerow([item, week, "" if w == len(WEEKS) - 1 else 10 + n + w, 13 + n])
    return path


def batch(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8", newline="")
    return path


def events(ledger: Path) -> list:
    with Ledger.open(ledger, read_only=True) as opened:
        return opened.history()


def test_qa_a_row_for_an_id_with_a_trailing_space_is_not_recorded_for_another_series(
    tmp_path: Path,
) -> None:
    """QA defect: ids are exact ('A' and 'A ' are two series, docs/input-format.md), but
    decide strips the item cell, so a row for 'A ' is recorded for the series 'A'."""
    path = portfolio(tmp_path, ["A", "A "])
    rows = batch(tmp_path / "b.csv", 'item,outcome,note\n"A ",no_change,for A-space\n')
    result = run("decide", str(path), "--from", str(rows), "--reviewer", "ana", cwd=tmp_path)
    saved = events(tmp_path / FOLDER_LEDGER) if (tmp_path / FOLDER_LEDGER).exists() else []
    assert [e.item for e in saved if e.note == "for A-space"] in ([], ["A "]), (
        result.stdout,
        [(e.item, e.note) for e in saved],
    )


def test_qa_bad_row_numbers_count_blank_rows_as_the_spreadsheet_does(tmp_path: Path) -> None:
    """QA defect: blank rows are dropped before rows are numbered, so the bad row on line 3
    (after a blank line 2) is reported as 'row 2', which is the blank row in a spreadsheet.
    The portfolio loader's rule is that skipped empty rows do not shift the numbers."""
    path = portfolio(tmp_path, ["A"])
    rows = batch(tmp_path / "b.csv", "item,outcome\n\nZZZ,no_change\n")
    result = run("decide", str(path), "--from", str(rows), "--reviewer", "ana", cwd=tmp_path)
    assert result.returncode == 2
    assert "row 3:" in result.stderr, result.stderr


NOBODY = 65534


def test_qa_decide_in_a_read_only_folder_does_not_fork_the_ledger() -> None:
    """QA defect: in a review folder that is not writable and already has its ledger, decide
    records the batch in a new stand-in ledger in the user data folder (exit 0, 'recorded'),
    skipping the other-reviewer check against the folder's ledger; export and history keep
    reading the folder's ledger, so the recorded decisions never reach an export."""
    if os.geteuid() != 0 or shutil.which("setpriv") is None:
        pytest.skip("needs root and setpriv to run the child as an unprivileged user")
    prefix = ["setpriv", f"--reuid={NOBODY}", f"--regid={NOBODY}", "--clear-groups"]
    base = Path(tempfile.mkdtemp(prefix="triage-qa-ro-"))
    try:
        base.chmod(0o755)
        folder = base / "shared"
        folder.mkdir()
        path = portfolio(folder, ["A", "B"])
        first = batch(base / "bob.csv", "item,outcome\nA,deferred\n")
        assert run("decide", str(path), "--from", str(first), "--reviewer", "bob").returncode == 0
        second = batch(base / "ann.csv", "item,outcome\nB,no_change\n")
        folder.chmod(0o555)
        home = base / "home"
        home.mkdir(mode=0o777)
        home.chmod(0o777)
        env = {**os.environ, "HOME": str(home), "XDG_DATA_HOME": str(home / "data")}

        def as_nobody(*args: str) -> subprocess.CompletedProcess[str]:
            return subprocess.run(
                [*prefix, *triage_command(), *args],
                capture_output=True,
                text=True,
                env=env,
                cwd=base,
                timeout=120,
            )

        probe = as_nobody("--version")
        if probe.returncode != 0:
            pytest.skip(f"uid {NOBODY} cannot run this checkout: {probe.stderr[-200:]}")
        decided = as_nobody("decide", str(path), "--from", str(second), "--reviewer", "ann")
        if decided.returncode == 0:
            out = home / "e.json"
            exported = as_nobody("export", str(path), "--to", str(out))
            assert exported.returncode == 0, exported.stderr
            shown = {(d["item"], d["reviewer"]) for d in json.loads(out.read_text())["decisions"]}
            assert ("B", "ann") in shown, (decided.stdout, decided.stderr, shown)
        else:
            assert decided.returncode == 2, decided.stderr
    finally:
        for root, dirs, _ in os.walk(base):
            for name in dirs:
                os.chmod(os.path.join(root, name), 0o755)
        shutil.rmtree(base, ignore_errors=True)


def test_qa_a_small_decisions_workbook_of_wide_empty_rows_is_refused_with_little_memory(
    tmp_path: Path,
) -> None:
    """QA defect: decide reads a workbook batch with openpyxl's row iterator, which pads every
    row to the sheet's widest column. 6,000 rows holding one empty cell in column XFD (a 30 kB
    file, far under the 200 MB cap) made about 100 million cells: peak memory near 1 GB (10,000
    rows: 1.45 GB, 15 s). Memory grows with rows x widest column, so a file of a megabyte or
    two is an out-of-memory kill. The loader bounds rows and cells as they stream; decide
    must too."""
    import sys

    from tests.core.hostile_xlsx import write_workbook

    path = portfolio(tmp_path, ["A"])
    wide = (f'<row r="{r}"><c r="XFD{r}"/></row>'.encode() for r in range(3, 6003))
    book = write_workbook(
        tmp_path / "batch.xlsx", wide, data=[["item", "outcome"], ["A", "no_change"]]
    )
    assert book.stat().st_size < 100_000
    measure = (
        "import resource, subprocess, sys; "
        "r = subprocess.run(sys.argv[1:], capture_output=True, text=True); "
        "print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss, r.returncode); "
        "print(r.stderr)"
    )
    command = [*triage_command(), "decide", str(path), "--from", str(book), "--reviewer", "ana"]
    done = subprocess.run(
        [sys.executable, "-c", measure, *command], capture_output=True, text=True, timeout=300
    )
    peak_kb, code = (int(v) for v in done.stdout.split("\n", 1)[0].split())
    assert peak_kb < 400_000, (peak_kb, code, done.stdout[-500:])
