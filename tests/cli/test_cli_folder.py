"""The weekly loop from the command line: one ledger per review folder, work carried forward.

Week 1's decisions are recorded through the review session (the core path the screens use);
everything after that runs ``triage`` as a user would, in a child process, with no ``--ledger``.
Files: ``tests/core/twoweeks.py`` (numbers chosen by hand, expected values worked out there).
"""

from __future__ import annotations

import csv
import json
import os
from pathlib import Path

import pytest

from tests.cli.test_cli import run
from tests.core.twoweeks import WEEK1, WEEK2, TwoWeeks, write_two_weeks
from triage import cli
from triage.core.cycle import ReviewCycle
from triage.core.folder import newest_portfolio
from triage.core.ledger import FOLDER_LEDGER, Ledger, locate_ledger
from triage.core.read import read_portfolio
from triage.core.review import ReviewSession

V1_FIXTURE = Path(__file__).resolve().parents[1] / "core" / "data" / "ledger-v1.sqlite"


def _adjust(session: ReviewSession, item: str, spec: str) -> None:
    series = session.find(item, "Lyon")
    assert series is not None
    session.apply_event(
        session.commit_decision(series, outcome="adjusted", root_cause="promotion", adjustment=spec)
    )


@pytest.fixture
def weeks(tmp_path: Path) -> TwoWeeks:
    weeks = write_two_weeks(tmp_path / "review")
    with Ledger.open(locate_ledger(weeks.week1).path) as ledger:
        session = ReviewSession(ReviewCycle(read_portfolio(weeks.week1), ledger), reviewer="ana")
        for item, spec in {"A": "+10", "B": "=50", "C": "+5"}.items():
            _adjust(session, item, spec)
    return weeks


def _forecast_rows(path: Path) -> dict[tuple[str, str], dict[str, str]]:
    with path.open(encoding="utf-8", newline="") as handle:
        return {(r["item"], r["period"]): r for r in csv.DictReader(handle)}


def _folder_files(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir())


def test_two_week_flow_carries_week_one_adjustments_into_week_two_export(
    weeks: TwoWeeks, tmp_path: Path
) -> None:
    folder = weeks.week1.parent
    ledger = folder / FOLDER_LEDGER
    before = ledger.read_bytes()
    out = tmp_path / "out"
    out.mkdir()
    result = run("export", str(weeks.week2), "--to", str(out / "w2.csv"))
    assert result.returncode == 0, result.stderr
    assert "0 reviewed series, 16 forecast rows (6 adjusted)" in result.stdout
    rows = _forecast_rows(out / "w2" / "w2-forecast.csv")
    for period in weeks.forward2[:3]:
        assert rows[("A", period)]["adjusted_forecast"] == "110"
        assert rows[("A", period)]["adjusted_in_cycle"] == WEEK1
        assert rows[("C", period)]["adjusted_forecast"] == "35"
        # B's "=50" is already in week 2's forecast: nothing applied, and it is said.
        assert rows[("B", period)]["adjusted"] == "false"
    assert rows[("A", weeks.forward2[3])]["adjusted"] == "false"
    assert "already in erp_2026-w2.csv's forecast" in result.stderr
    readme = (out / "w2" / "w2-README.txt").read_text(encoding="utf-8")
    assert "carry adjustments made in earlier cycles" in readme and "adjusted_in_cycle" in readme
    # Reading did not change the ledger nor leave -wal/-shm files beside it.
    assert ledger.read_bytes() == before
    assert _folder_files(folder) == ["erp_2026-w1.csv", "erp_2026-w2.csv", FOLDER_LEDGER]

    # Week 2: the reviewer ends C's adjustment; the next export no longer carries it.
    with Ledger.open(ledger) as opened:
        session = ReviewSession(ReviewCycle(read_portfolio(weeks.week2), opened), reviewer="bob")
        c = session.find("C", "Lyon")
        assert c is not None
        (active,) = session.active_adjustments(c)
        session.apply_end(session.commit_end_adjustment(c, active.event_id, note="cancelled"))
    again = run("export", str(weeks.week2), "--to", str(out / "again.json"))
    assert again.returncode == 0, again.stderr
    doc = json.loads((out / "again.json").read_text(encoding="utf-8"))
    carried = {(r["item"], r["period"]) for r in doc["forecast"] if r["adjusted"]}
    assert carried == {("A", p) for p in weeks.forward2[:3]}
    assert {r["adjusted_in_cycle"] for r in doc["forecast"] if r["adjusted"]} == {WEEK1}

    # history of the folder lists the end with who and when, in journal order.
    history = run("history", str(folder), "--format", "json")
    assert history.returncode == 0, history.stderr
    events = json.loads(history.stdout)["events"]
    assert [e["kind"] for e in events] == ["decision", "decision", "decision", "end"]
    end = events[-1]
    assert (end["reviewer"], end["cycle"], end["note"]) == ("bob", WEEK2, "cancelled")
    assert end["target"] == active.event_id and end["item"] == "C"
    table = run("history", str(weeks.week2))
    assert f"end of adjustment #{active.event_id}" in table.stdout


def test_report_and_overrides_find_the_folder_ledger(weeks: TwoWeeks, tmp_path: Path) -> None:
    folder = weeks.week1.parent
    report = run("report", str(weeks.week2), "--to", str(tmp_path / "r.html"))
    assert report.returncode == 0, report.stderr
    assert "No decisions have been recorded" not in report.stderr
    overrides = run("overrides", str(weeks.week2), "--format", "json")
    assert overrides.returncode == 0, overrides.stderr
    assert json.loads(overrides.stdout)["line_status"]
    assert _folder_files(folder) == ["erp_2026-w1.csv", "erp_2026-w2.csv", FOLDER_LEDGER]


def test_a_v1_per_file_ledger_keeps_working_and_is_not_migrated_by_reading(
    tmp_path: Path,
) -> None:
    folder = tmp_path / "old"
    weeks = write_two_weeks(folder)
    legacy = folder / "erp_2026-w1.ledger.sqlite"
    legacy.write_bytes(V1_FIXTURE.read_bytes())
    before = legacy.read_bytes()
    # Week 2's file in the same folder finds the one older ledger there, with a note.
    result = run("history", str(weeks.week2), "--format", "csv")
    assert result.returncode == 0, result.stderr
    assert "triage: note: Using" in result.stderr and FOLDER_LEDGER in result.stderr
    assert len(list(csv.DictReader(result.stdout.splitlines()))) == 4
    # Not migrated: byte for byte the same, still schema 1 (the header's user_version, at
    # offset 60, sqlite.org/fileformat.html §1.3), and no -wal/-shm left.
    assert legacy.read_bytes() == before
    assert int.from_bytes(before[60:64], "big") == 1
    assert sorted(p.name for p in folder.iterdir()) == [
        "erp_2026-w1.csv",
        "erp_2026-w1.ledger.sqlite",
        "erp_2026-w2.csv",
    ]


def test_review_of_a_folder_opens_the_newest_cycle_with_the_folder_ledger(
    weeks: TwoWeeks, monkeypatch: pytest.MonkeyPatch
) -> None:
    folder = weeks.week1.parent
    # The newest by cycle, even when the older week's file was modified last.
    os.utime(weeks.week1, (4_000_000_000, 4_000_000_000))
    (folder / "notes.csv").write_text("item,period,x\nA,2026-11-16,1\n", encoding="utf-8")
    # triage's own exports are not read at all (an xlsx export can be large).
    for name in ("w2-decisions.csv", "w2-forecast.csv", "w2-README.txt"):
        (folder / name).write_text("x", encoding="utf-8")
    (folder / "erp_2026-w2-review-2026-11-09.xlsx").write_bytes(b"not read")
    newest = newest_portfolio(folder)
    assert (newest.path, newest.cycle, newest.candidates) == (weeks.week2, WEEK2, 2)
    assert any("notes.csv" in n and "skipped" in n for n in newest.notices)
    assert not any("w2-" in n or "review-2026" in n for n in newest.notices)
    opened = []
    monkeypatch.setattr(
        "triage.tui.app.TriageApp.run", lambda app: opened.append(app.options), raising=True
    )
    assert cli.main(["review", str(folder), "--reviewer", "cy"]) == 0
    (options,) = opened
    assert options.portfolio == weeks.week2
    assert options.ledger == folder / FOLDER_LEDGER
    assert any("Opening erp_2026-w2.csv, the newest" in n for n in options.notices)


def test_first_review_in_a_folder_says_where_the_ledger_is(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    weeks = write_two_weeks(tmp_path / "fresh")
    opened = []
    monkeypatch.setattr("triage.tui.app.TriageApp.run", lambda app: opened.append(app.options))
    monkeypatch.setenv("XDG_CONFIG_HOME", str(tmp_path))
    assert cli.main(["review", str(weeks.week1)]) == 0
    said = capsys.readouterr().err
    assert f"Decisions are kept in {weeks.week1.parent / FOLDER_LEDGER}" in said
    assert any("Decisions are kept in" in n for n in opened[0].notices)
    # A configured ledger name is used instead.
    config = tmp_path / "c.toml"
    config.write_text('ledger = "team.sqlite"\n', encoding="utf-8")
    assert cli.main(["review", str(weeks.week2), "--config", str(config)]) == 0
    assert opened[1].ledger == weeks.week2.parent / "team.sqlite"


def test_demo_says_where_its_ledger_and_exports_go(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.setenv("XDG_DATA_HOME", str(tmp_path / "data"))
    monkeypatch.setenv("XDG_CONFIG_HOME", str(tmp_path))
    opened = []
    monkeypatch.setattr("triage.tui.app.TriageApp.run", lambda app: opened.append(app.options))
    assert cli.main(["demo"]) == 0
    said = capsys.readouterr().err
    ledger = tmp_path / "data" / "triage" / "demo" / "sample.ledger.sqlite"
    assert f"decisions are kept in {ledger}" in said
    assert (
        f"exports (x in the review screens) are offered in {cli.sample_portfolio().parent}" in said
    )
    assert opened[0].ledger == ledger and said.strip().endswith(opened[0].notices[0])
