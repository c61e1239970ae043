"""``triage history`` and ``triage export`` as a user runs them: the installed command."""

from __future__ import annotations

import csv
import io
import json
import os
import subprocess
import sys
import zipfile
from pathlib import Path

import openpyxl
import pytest

from triage.core.ledger import Ledger
from triage.core.read import read_portfolio

WEEKS = ["2026-10-05", "2026-10-12", "2026-10-19", "2026-10-26", "2026-11-02", "2026-11-09"]
CYCLE = "2026-10-26"  # latest week with actual demand
ESC = "\x1b"


def without_notes(stderr: str) -> str:
    """Standard error without the ``triage: note:`` lines (e.g. the per-file ledger's note)."""
    return "\n".join(line for line in stderr.splitlines() if not line.startswith("triage: note:"))


def triage_command() -> list[str]:
    """The console script installed beside this interpreter, else the module."""
    script = Path(sys.executable).with_name("triage")
    return [str(script)] if script.exists() else [sys.executable, "-m", "triage.cli"]


def run(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess[str]:
    # No user config from the machine running the tests; a wide terminal for the table.
    env = {**os.environ, "COLUMNS": "200", "XDG_CONFIG_HOME": str(cwd or Path.cwd())}
    return subprocess.run(
        [*triage_command(), *args], capture_output=True, text=True, cwd=cwd, env=env, timeout=120
    )


@pytest.fixture
def folder(tmp_path: Path) -> Path:
    """A portfolio CSV (A over-forecast, 00123 at two locations) and its ledger beside it."""
    rows = []
    for item, location in (("A", "Lyon"), ("00123", "Lyon"), ("00123", "Oslo")):
        for i, week in enumerate(WEEKS):
            demand = "" if i >= 4 else 10 + i
            rows.append([item, location, week, demand, 12 + i * 0.5])
    path = tmp_path / "week43.csv"
    with path.open("w", encoding="utf-8", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(["item", "location", "period", "demand", "forecast"])
        writer.writerows(rows)
    portfolio = read_portfolio(path)
    assert portfolio.cycle == CYCLE
    base = {"portfolio_name": path.name, "portfolio_fingerprint": portfolio.fingerprint}
    cause = {"root_cause": "promotion"}
    with Ledger.open(tmp_path / "week43.ledger.sqlite") as ledger:
        ledger.record(
            CYCLE,
            "A",
            "Lyon",
            outcome="adjusted",
            note="[bold]not bold[/] " + ESC + "]2;pwn\x07",
            reviewer="ana",
            adjustment="=13",
            lines=[(WEEKS[4], 14.0, 13.0), (WEEKS[5], 14.5, 13.0)],
            expected_version=0,
            **base,
            **cause,
        )
        ledger.record(
            CYCLE,
            "00123",
            "Oslo",
            outcome="no_change",
            note="=1+2",
            reviewer="bo",
            expected_version=0,
            **base,
            **cause,
        )
        ledger.undo(CYCLE, "00123", "Oslo", reviewer="bo", expected_version=1, **base)
        ledger.record(
            "2026-10-19",
            "00123",
            "Lyon",
            outcome="deferred",
            note="older cycle",
            reviewer="ana",
            expected_version=0,
            **base,
            **cause,
        )
    return tmp_path


# ---- history --------------------------------------------------------------------------------


def test_history_of_a_portfolio_reads_the_ledger_beside_it(folder: Path) -> None:
    result = run("history", str(folder / "week43.csv"))
    assert result.returncode == 0, result.stderr
    out = result.stdout
    assert "week43.ledger.sqlite: 4 events" in out
    # Oldest first, with who; markup shown literally, no raw escape byte reaches the terminal.
    assert out.index("not bold") < out.index("=1+2") < out.index("undo of #2")
    assert "[bold]not bold[/]" in out and "ana" in out and "bo" in out
    assert ESC not in out and "\x07" not in out and "␛]2;pwn␇" in out


def test_history_json_is_exact_and_filters(folder: Path) -> None:
    ledger = folder / "week43.ledger.sqlite"
    result = run("history", str(ledger), "--format", "json", "--cycle", CYCLE)
    assert result.returncode == 0, result.stderr
    assert ESC not in result.stdout
    doc = json.loads(result.stdout)
    events = doc["events"]
    assert [e["id"] for e in events] == sorted(e["id"] for e in events)
    assert [e["kind"] for e in events] == ["decision", "decision", "undo"]
    assert events[0]["note"] == "[bold]not bold[/] " + ESC + "]2;pwn\x07"  # exact after decoding
    assert events[0]["lines"] == [
        {"period": WEEKS[4], "original": 14.0, "adjusted": 13.0},
        {"period": WEEKS[5], "original": 14.5, "adjusted": 13.0},
    ]
    assert events[2]["undoes"] == events[1]["id"]
    only = json.loads(
        run(
            "history", str(ledger), "--format", "json", "--item", "00123", "--location", "Lyon"
        ).stdout
    )
    assert [e["note"] for e in only["events"]] == ["older cycle"]


def test_history_csv_uses_the_export_text_rules(folder: Path) -> None:
    result = run("history", str(folder / "week43.csv"), "--format", "csv")
    assert result.returncode == 0, result.stderr
    rows = list(csv.DictReader(io.StringIO(result.stdout)))
    assert len(rows) == 4
    by_id = {r["id"]: r for r in rows}
    # OWASP CSV Injection: a note starting with "=" gets a leading apostrophe.
    assert by_id["2"]["note"] == "'=1+2"
    assert by_id["1"]["adjustment"] == "'=13"
    assert by_id["3"]["kind"] == "undo" and by_id["3"]["undoes"] == "2"


def test_history_errors_exit_2(folder: Path, tmp_path: Path) -> None:
    # In a folder of its own: every file of a folder shares the folder's ledger.
    other = tmp_path / "elsewhere" / "other.csv"
    other.parent.mkdir()
    other.write_text("item,period,demand,forecast\nA,2026-10-05,1,1\n", encoding="utf-8")
    for args, needle in [
        ((str(other),), "No decisions have been recorded for other.csv"),
        ((str(folder / "nope.csv"),), "nope.csv: no such file"),
        ((str(folder / "week43.csv"), "--cycle", "last week"), "--cycle must be an ISO date"),
        (
            (str(other), "--ledger", str(folder / "missing.ledger.sqlite")),
            "There is no decision ledger",
        ),
    ]:
        result = run("history", *args)
        assert result.returncode == 2, (args, result.stdout)
        assert result.stderr.startswith("triage: ") and needle in result.stderr, result.stderr
        assert "Traceback" not in result.stderr


# ---- export ---------------------------------------------------------------------------------


def test_export_csv_writes_three_files_and_the_caution(folder: Path) -> None:
    result = run("export", str(folder / "week43.csv"), "--to", str(folder / "up.csv"))
    assert result.returncode == 0, result.stderr
    for name in ("up-decisions.csv", "up-forecast.csv", "up-README.txt"):
        assert f"wrote {folder / 'up' / name}" in result.stdout
    assert "Caution: These decisions are advisory" in result.stdout
    assert "1 reviewed series, 6 forecast rows (2 adjusted)" in result.stdout
    with (folder / "up" / "up-forecast.csv").open(encoding="utf-8", newline="") as handle:
        rows = list(csv.DictReader(handle))
    adjusted = {(r["item"], r["location"], r["period"]): r for r in rows if r["adjusted"] == "true"}
    assert set(adjusted) == {("A", "Lyon", WEEKS[4]), ("A", "Lyon", WEEKS[5])}
    assert all(float(r["adjusted_forecast"]) == 13.0 for r in adjusted.values())
    # Keys byte-exact: the leading zeros of 00123 survive the whole trip.
    assert {r["item"] for r in rows} == {"A", "00123"}


def test_export_xlsx_with_cycle_and_explicit_ledger(folder: Path, tmp_path: Path) -> None:
    moved = tmp_path / "elsewhere.ledger.sqlite"
    (folder / "week43.ledger.sqlite").rename(moved)
    target = folder / "older.xlsx"
    result = run(
        "export",
        str(folder / "week43.csv"),
        "--ledger",
        str(moved),
        "--cycle",
        "2026-10-19",
        "--to",
        str(target),
    )
    assert result.returncode == 0, result.stderr
    assert "Cycle 2026-10-19 is not the cycle of week43.csv" in result.stderr
    book = openpyxl.load_workbook(target)
    decisions = [[c.value for c in row] for row in book["Decisions"].iter_rows()]
    assert [r[:4] for r in decisions[1:]] == [["00123", "Lyon", "2026-10-19", "deferred"]]


def test_export_errors_exit_2(folder: Path) -> None:
    portfolio = str(folder / "week43.csv")
    (folder / "up.json").write_text("keep me", encoding="utf-8")
    cases = [
        (("--to", str(folder / "up.json")), "up.json already exists"),
        (("--to", str(folder / "up.txt")), "unknown file type '.txt'"),
        (
            ("--to", str(folder / "x.json"), "--ledger", str(folder / "no.ledger.sqlite")),
            "There is no decision ledger",
        ),
        (("--to", str(folder / "x.json"), "--cycle", "2026/10/26"), "--cycle must be an ISO date"),
    ]
    for args, needle in cases:
        result = run("export", portfolio, *args)
        assert result.returncode == 2, (args, result.stdout)
        assert result.stderr.startswith("triage: ") and needle in result.stderr, result.stderr
        assert "Traceback" not in result.stderr
    assert (folder / "up.json").read_text(encoding="utf-8") == "keep me"
    assert not (folder / "x.json").exists()
    forced = run("export", portfolio, "--to", str(folder / "up.json"), "--force")
    assert forced.returncode == 0, forced.stderr
    assert json.loads((folder / "up.json").read_text(encoding="utf-8"))["cycle"] == CYCLE


def run_limited(limit: int, *args: str) -> subprocess.CompletedProcess[str]:
    """``run`` under a file-size limit (``ulimit -f``, RLIMIT_FSIZE) of ``limit`` bytes."""
    import resource

    def limit_size() -> None:
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))

    env = {**os.environ, "COLUMNS": "200", "XDG_CONFIG_HOME": str(Path.cwd())}
    return subprocess.run(
        [*triage_command(), *args],
        capture_output=True,
        text=True,
        env=env,
        timeout=120,
        preexec_fn=limit_size,
    )


def test_reading_under_a_small_file_size_limit_exits_2(folder: Path) -> None:
    # Opening a WAL database, even read-only, creates its 32 KiB -shm index beside it
    # (sqlite.org/walformat.html); under a 16 KiB limit that write fails with EFBIG. The
    # failure is said as such, not hidden behind "cannot commit - no transaction is active".
    portfolio = str(folder / "week43.csv")
    for args in (
        ("history", portfolio),
        ("export", portfolio, "--to", str(folder / "up.json")),
    ):
        result = run_limited(16_384, *args)
        assert result.returncode == 2, (args, result.stdout, result.stderr)
        assert without_notes(result.stderr).startswith("triage: The ledger "), result.stderr
        assert "could not be opened" in result.stderr and "ulimit -f" in result.stderr
        assert "cannot commit" not in result.stderr and "Traceback" not in result.stderr
    assert not (folder / "up.json").exists()


def test_export_to_a_full_device_exits_2_with_a_message(folder: Path) -> None:
    if not Path("/dev/full").is_char_device():
        pytest.skip("no /dev/full")
    for name in ("full.json", "full.xlsx"):
        target = folder / name
        target.symlink_to("/dev/full")
        result = run("export", str(folder / "week43.csv"), "--to", str(target), "--force")
        assert result.returncode == 2, (name, result.stderr)
        assert without_notes(result.stderr).startswith(f"triage: could not write to {target},"), (
            result.stderr
        )
        assert "No space left on device" in result.stderr
        assert "Traceback" not in result.stderr and "Exception ignored" not in result.stderr


# Sets a file-size limit once the workbook is being written (the ledger's -shm is made by then),
# then runs the command line: what a disk that fills up during the export looks like.
LIMITED_XLSX = """
import resource, sys
from triage.render import export
real = export._write_xlsx
def limited(*args, **kwargs):
    resource.setrlimit(resource.RLIMIT_FSIZE, (BYTES, BYTES))
    return real(*args, **kwargs)
export._write_xlsx = limited
from triage.cli import main
sys.exit(main(sys.argv[1:]))
"""


def test_disk_full_during_an_xlsx_export_is_one_message(folder: Path, tmp_path: Path) -> None:
    # openpyxl leaves its ZipFile open when a write fails; collected later it flushed again and
    # printed "Exception ignored in ZipFile.__del__" and a traceback after the message
    # (measured on a full disk). The limit lies between the largest sheet spooled on the way
    # (each fits) and the workbook (which does not), so the failure comes from the zip itself.
    portfolio = str(folder / "week43.csv")
    probe = tmp_path / "probe.xlsx"
    assert run("export", portfolio, "--to", str(probe)).returncode == 0
    with zipfile.ZipFile(probe) as book:
        largest_sheet = max(i.file_size for i in book.infolist() if "worksheets/" in i.filename)
    workbook = probe.stat().st_size
    assert largest_sheet < workbook - 512
    limit = (largest_sheet + workbook) // 2
    target = folder / "up.xlsx"
    target.write_bytes(b"last week's workbook")
    env = {**os.environ, "XDG_CONFIG_HOME": str(folder)}
    result = subprocess.run(
        [
            sys.executable,
            "-c",
            LIMITED_XLSX.replace("BYTES", str(limit)),
            *("export", portfolio, "--to", str(target), "--force"),
        ],
        capture_output=True,
        text=True,
        env=env,
        timeout=120,
    )
    assert result.returncode == 2, result.stderr
    assert without_notes(result.stderr).startswith(
        f"triage: could not write {target}: File too large;"
    )
    assert "nothing was changed" in result.stderr
    assert "Traceback" not in result.stderr and "Exception ignored" not in result.stderr
    assert target.read_bytes() == b"last week's workbook"
    assert sorted(p.name for p in folder.iterdir() if p.name.startswith(".")) == []
