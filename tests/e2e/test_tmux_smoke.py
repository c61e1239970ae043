"""End to end in a real terminal: tmux runs ``triage review``, keys are typed, the screen is read.

Skipped only when tmux is missing (``.ci/run`` installs it).
"""

from __future__ import annotations

import shutil
import sqlite3
import subprocess
import sys
import time
import uuid
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample" / "portfolio.csv"

pytestmark = pytest.mark.skipif(shutil.which("tmux") is None, reason="tmux is not installed")


class Tmux:
    """One private tmux server with one session."""

    def __init__(self, command: list[str], cwd: Path) -> None:
        self.socket = f"triage-test-{uuid.uuid4().hex[:8]}"
        self.name = "review"
        subprocess.run(
            [
                "tmux",
                "-L",
                self.socket,
                "new-session",
                "-d",
                "-s",
                self.name,
                "-x",
                "120",
                "-y",
                "40",
                "-c",
                str(cwd),
                *command,
            ],
            check=True,
            env={
                "TERM": "xterm-256color",
                "PATH": "/usr/bin:/bin",
                "HOME": str(cwd),
                "LANG": "C.UTF-8",
            },
        )

    def keys(self, *keys: str) -> None:
        subprocess.run(["tmux", "-L", self.socket, "send-keys", "-t", self.name, *keys], check=True)

    def screen(self) -> str:
        done = subprocess.run(
            ["tmux", "-L", self.socket, "capture-pane", "-p", "-t", self.name],
            capture_output=True,
            text=True,
            check=False,
        )
        return done.stdout

    def title(self) -> str:
        done = subprocess.run(
            ["tmux", "-L", self.socket, "display-message", "-p", "-t", self.name, "#{pane_title}"],
            capture_output=True,
            text=True,
            check=False,
        )
        return done.stdout.strip()

    def wait_for(self, text: str, timeout: float = 30.0) -> str:
        deadline = time.monotonic() + timeout
        screen = ""
        while time.monotonic() < deadline:
            screen = self.screen()
            if text in screen:
                return screen
            time.sleep(0.2)
        raise AssertionError(f"{text!r} never appeared; screen was:\n{screen}")

    def alive(self) -> bool:
        done = subprocess.run(
            ["tmux", "-L", self.socket, "has-session", "-t", self.name],
            check=False,
            capture_output=True,
        )
        return done.returncode == 0

    def kill(self) -> None:
        subprocess.run(["tmux", "-L", self.socket, "kill-server"], check=False, capture_output=True)


def test_review_in_a_real_terminal(tmp_path: Path) -> None:
    portfolio = tmp_path / "week.csv"
    shutil.copy(SAMPLE, portfolio)
    ledger = tmp_path / "week.ledger.sqlite"
    triage = str(Path(sys.executable).with_name("triage"))
    term = Tmux(
        [triage, "review", str(portfolio), "--ledger", str(ledger), "--reviewer", "smoke"], tmp_path
    )
    try:
        screen = term.wait_for("reviewed 0")
        assert "GF-10213" in screen  # the worst offender of the sample is listed
        term.keys("j")
        term.keys("4")  # root cause 4 (new item ramp-up) for the quick decision
        term.keys("c")
        screen = term.wait_for("saved:")
        assert "reviewed 1" in term.wait_for("reviewed 1")
        term.keys("q")
        deadline = time.monotonic() + 15
        while term.alive() and time.monotonic() < deadline:
            time.sleep(0.2)
        assert not term.alive(), "the app did not quit on q"
    finally:
        term.kill()
    con = sqlite3.connect(f"file:{ledger}?mode=ro", uri=True)
    try:
        rows = con.execute("SELECT kind, outcome, root_cause, reviewer FROM event").fetchall()
    finally:
        con.close()
    assert rows == [("decision", "no_change", "new_item", "smoke")]


def test_hostile_ids_do_not_reach_the_terminal(tmp_path: Path) -> None:
    """An id carrying an OSC title sequence must not retitle the pane (docs/sources.md §7.2)."""
    portfolio = tmp_path / "hostile.csv"
    weeks = ["2026-10-05", "2026-10-12", "2026-10-19", "2026-10-26"]
    lines = ["item,period,demand,forecast"]
    for item in ("title\x1b]2;PWNED-BY-DATA\x07x", "[@click=app.quit]Q[/]", "red\x1b[31mRED"):
        lines += [f"{item},{week},5,7" for week in weeks]
    portfolio.write_text("\n".join(lines) + "\n", encoding="utf-8")
    triage = str(Path(sys.executable).with_name("triage"))
    term = Tmux([triage, "review", str(portfolio), "--reviewer", "smoke"], tmp_path)
    try:
        term.wait_for("reviewed 0")
        screen = term.wait_for("rank 1 of 3")  # the detail pane names the highlighted series
        assert "PWNED-BY-DATA" not in term.title()
        assert "[@click=app.quit]Q[" in screen  # shown as text
        term.keys("j", "j", "k")
        time.sleep(0.5)
        assert term.alive() and "PWNED-BY-DATA" not in term.title()
        term.keys("q")
    finally:
        term.kill()


def test_ten_fast_saves_in_one_send_keys(tmp_path: Path) -> None:
    """Adjustment, Tab, note and ctrl+s for ten series, all in one ``send-keys``: every field
    lands in the ledger exactly as typed (keys are handled in the order they were typed)."""
    portfolio = tmp_path / "week.csv"
    shutil.copy(SAMPLE, portfolio)
    ledger = tmp_path / "fast.sqlite"
    triage = str(Path(sys.executable).with_name("triage"))
    term = Tmux(
        [triage, "review", str(portfolio), "--ledger", str(ledger), "--reviewer", "fast"], tmp_path
    )
    keys: list[str] = []
    typed = []
    for i in range(10):
        spec, note = f"+{i + 1}%", f"fast note number {i} with several words in it"
        typed.append((spec, note))
        keys += ["a", spec, "Tab", note, "C-s", "j"]
    try:
        term.wait_for("reviewed 0")
        term.keys(*keys)
        term.wait_for("reviewed 10", timeout=60)
        term.keys("q")
        deadline = time.monotonic() + 15
        while term.alive() and time.monotonic() < deadline:
            time.sleep(0.2)
        assert not term.alive(), "the app did not quit on q"
    finally:
        term.kill()
    con = sqlite3.connect(f"file:{ledger}?mode=ro", uri=True)
    try:
        rows = con.execute("SELECT outcome, adjustment, note FROM event ORDER BY id").fetchall()
    finally:
        con.close()
    assert [r[0] for r in rows] == ["adjusted"] * 10
    assert [r[2] for r in rows] == [note for _, note in typed]
    # The ledger keeps the canonical spec; each is the typed percentage.
    assert [r[1] for r in rows] == [f"+{i + 1}%" for i in range(10)]


CRASHING_REVIEW = """
import sys
from triage import cli
from triage.tui.app import TriageApp
from triage.tui.screens.decision import DecisionScreen

def fault(self):  # a fault inside the running app, after the reviewer typed a note
    raise RuntimeError("injected fault for the test")

DecisionScreen.action_pick_cause = lambda self, index: fault(self)
sys.exit(cli.main(sys.argv[1:]))
"""


def test_a_fault_inside_the_review_screens_is_one_line_and_a_log(tmp_path: Path) -> None:
    """No Textual traceback over the terminal: exit 1, one line naming the crash log, and the
    log holds the traceback and the entry the reviewer had typed."""
    portfolio = tmp_path / "week.csv"
    shutil.copy(SAMPLE, portfolio)
    script = tmp_path / "crash.py"
    script.write_text(CRASHING_REVIEW, encoding="utf-8")
    # Textual draws on standard error, so it stays the terminal; the pane is kept after the exit.
    shell = (
        f"{sys.executable} {script} review {portfolio} --ledger {tmp_path / 'l.sqlite'} "
        f"--reviewer smoke; echo $? > {tmp_path / 'rc.txt'}; sleep 60"
    )
    term = Tmux(["sh", "-c", shell], tmp_path)
    try:
        term.wait_for("reviewed 0")
        term.keys("enter")
        term.wait_for("Decision for")
        term.keys("Tab", "Tab", "Tab", "typed before the fault", "BTab", "BTab", "BTab", "3")
        deadline = time.monotonic() + 20
        while not (tmp_path / "rc.txt").exists() and time.monotonic() < deadline:
            time.sleep(0.2)
        screen = term.wait_for("unexpected error")
    finally:
        term.kill()
    assert (tmp_path / "rc.txt").read_text().strip() == "1"
    assert "Traceback" not in screen, screen
    # The pane is 120 columns wide: a full line continues on the next one.
    message = "".join(
        line if len(line) == 120 else line.rstrip() + " " for line in screen.splitlines()
    )
    assert "unexpected error (RuntimeError: injected fault for the test)" in message
    log = Path(message.split("The details are in ")[1].split("; please")[0])
    text = log.read_text(encoding="utf-8")
    assert "Traceback" in text and "injected fault" in text
    assert "typed before the fault" in text  # the unsaved entry is not lost


def _quit(term: Tmux) -> None:
    term.keys("q")
    deadline = time.monotonic() + 15
    while term.alive() and time.monotonic() < deadline:
        time.sleep(0.2)
    assert not term.alive(), f"the app did not quit on q:\n{term.screen()}"


def test_two_weeks_in_one_review_folder(tmp_path: Path) -> None:
    """Week 1: adjust with a note, quit, reopen and revisit the decision. Week 2's file dropped
    in the same folder finds the ledger with no flag, shows the carried adjustment, and its
    export carries it (tests/core/twoweeks.py: A's forward forecast is 100 a week)."""
    import csv

    from tests.core.twoweeks import WEEK1, write_two_weeks

    weeks = write_two_weeks(tmp_path / "review")
    folder = weeks.week1.parent
    triage = str(Path(sys.executable).with_name("triage"))

    def review(target: Path) -> Tmux:
        return Tmux([triage, "review", str(target), "--reviewer", "smoke"], tmp_path)

    term = review(weeks.week1)
    try:
        term.wait_for("reviewed 0")
        term.keys("g", "A", "Enter")
        term.wait_for("A @ Lyon")
        term.keys("a", "+10", "Tab", "promo in week 46", "C-s")
        term.wait_for("saved:")
        _quit(term)
    finally:
        term.kill()
    term = review(weeks.week1)
    try:
        term.wait_for("reviewed 1")
        term.keys("g", "A", "Enter", "Enter")
        screen = term.wait_for("current decision")
        assert "Forward forecast adjusted" in screen and "by smoke" in screen
        assert "+10" in screen and "promo in week 46" in screen
        term.keys("Escape")
        # A terminal cannot tell ESC then q from alt+q when they arrive together: a pause.
        term.wait_for("c No change")
        time.sleep(0.3)
        _quit(term)
    finally:
        term.kill()
    term = review(folder)  # the folder: its newest file, week 2
    try:
        screen = term.wait_for("reviewed 0")
        assert weeks.week2.name in screen
        term.keys("g", "A", "Enter")
        screen = term.wait_for(f"adjustment from {WEEK1}")
        assert "⇢ adj" in screen  # the list marks the carried adjustment
        term.keys("x")
        term.wait_for("Export decisions")
        term.keys("C-a", "C-k", str(tmp_path / "w2.csv"), "Enter")
        term.wait_for("exported")
        _quit(term)
    finally:
        term.kill()
    with (tmp_path / "w2" / "w2-forecast.csv").open(encoding="utf-8", newline="") as handle:
        rows = [r for r in csv.DictReader(handle) if r["item"] == "A"]
    carried = [r for r in rows if r["adjusted_in_cycle"] == WEEK1]
    assert len(carried) == 3  # four weeks adjusted in week 1, three still ahead in week 2
    assert {r["adjusted_forecast"] for r in carried} == {"110"}
    assert (folder / "triage-ledger.sqlite").exists()


def test_group_view_and_other_forecasts_in_a_real_terminal(tmp_path: Path) -> None:
    """At 120x40, typed in one burst: open the groups by family, go into the second, record
    ``1-2: use stat`` on its first series with a note, back to the groups, back to the series,
    hide the other forecasts. The ledger holds the spec; the screen shows where the reviewer is."""
    portfolio = tmp_path / "week.csv"
    shutil.copy(SAMPLE, portfolio)
    ledger = tmp_path / "groups.sqlite"
    triage = str(Path(sys.executable).with_name("triage"))
    term = Tmux(
        [triage, "review", str(portfolio), "--ledger", str(ledger), "--reviewer", "grp"], tmp_path
    )
    try:
        term.wait_for("reviewed 0")
        term.keys("G")
        term.wait_for("Group by")
        term.keys("C-u", "family", "Enter")
        screen = term.wait_for("groups by family")
        assert "group rank 1 of 6" in term.wait_for("group rank 1 of 6")
        term.keys("j", "Enter", "a", "1-2: use stat", "Tab", "stat saw the promotion", "C-s")
        screen = term.wait_for("saved:")
        assert "(escape: back to groups)" in screen
        term.keys("Escape")
        screen = term.wait_for("group rank 2 of 6")
        assert "1/" in screen  # the group's review state counts the decision
        term.keys("G", "o")
        screen = term.wait_for("other forecasts hidden")
        term.keys("q")
        deadline = time.monotonic() + 15
        while term.alive() and time.monotonic() < deadline:
            time.sleep(0.2)
        assert not term.alive(), "the app did not quit on q"
    finally:
        term.kill()
    con = sqlite3.connect(f"file:{ledger}?mode=ro", uri=True)
    try:
        rows = con.execute("SELECT outcome, adjustment, note FROM event").fetchall()
    finally:
        con.close()
    assert rows == [("adjusted", "1-2: use stat", "stat saw the promotion")]


def test_group_decision_in_a_real_terminal(tmp_path: Path) -> None:
    """At 80x24, typed fast: open on the groups (--group), decide the first group with x0.9 and
    a note, see it counted, undo it whole; the ledger holds the group decision and its undo."""
    portfolio = tmp_path / "week.csv"
    shutil.copy(SAMPLE, portfolio)
    ledger = tmp_path / "groups.sqlite"
    triage = str(Path(sys.executable).with_name("triage"))
    term = Tmux(
        [
            triage,
            "review",
            str(portfolio),
            "--ledger",
            str(ledger),
            "--reviewer",
            "grp",
            "--group",
            "family",
        ],
        tmp_path,
    )
    subprocess.run(
        ["tmux", "-L", term.socket, "resize-window", "-t", term.name, "-x", "80", "-y", "24"],
        check=False,
    )
    try:
        term.wait_for("groups by family")
        term.keys("a")
        term.wait_for("Decision for the group")
        term.keys("x0.9", "Tab", "family runs high", "C-s")
        term.wait_for("saved: the group")
        term.keys("u")
        term.wait_for("Undo the group decision")
        term.keys("y")
        term.wait_for("undone: group decision")
        term.keys("q")
        deadline = time.monotonic() + 15
        while term.alive() and time.monotonic() < deadline:
            time.sleep(0.2)
    finally:
        term.kill()
    con = sqlite3.connect(f"file:{ledger}?mode=ro", uri=True)
    try:
        groups = con.execute(
            "SELECT kind, adjustment, note, key_values FROM group_decision ORDER BY id"
        ).fetchall()
    finally:
        con.close()
    assert [g[0] for g in groups] == ["decision", "undo"]
    assert groups[0][1:] == ("x0.9", "family runs high", '["lighting"]')
