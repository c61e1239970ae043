"""``triage overrides`` values a group decision's lines like any other override.

Week 1 of ``tests/core/twoweeks.py`` (forward forecast A 100, B 40, C 30, D 200 at Lyon) gets
one group decision ``1-2: =740`` over the four series, split in proportion to their forecasts
(docs/adjustments.md): A 200, B 80, C 60, D 400, i.e. each series doubled. Week 2's file has the
actual of week 1's first forward week: level − 20 − 3 (twoweeks.py), so for a series of level L
the override's value added is |L − (L − 23)| − |2L − (L − 23)| = 23 − (L + 23) = −L, and in all
−(100 + 40 + 30 + 200) = −370; |original − actual| sums to 4 × 23 = 92 and |adjusted − actual|
to 370 + 92 = 462 (worked by hand; value added as docs/history.md defines it). The same values
recorded as four series decisions must give the same output for every breakdown.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from tests.cli.test_cli_report import run
from tests.core.twoweeks import write_two_weeks
from triage.core.cycle import ReviewCycle
from triage.core.ledger import Ledger
from triage.core.read import read_portfolio
from triage.core.review import ReviewSession

LEVELS = {"A": 100, "B": 40, "C": 30, "D": 200}


@pytest.fixture(scope="module")
def folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("groups")
    weeks = write_two_weeks(root)
    with Ledger.open(root / "grouped.sqlite") as ledger:
        session = ReviewSession(ReviewCycle(read_portfolio(weeks.week1), ledger), reviewer="ana")
        members = [session.find(item, "Lyon") for item in LEVELS]
        record = session.commit_group_decision(
            [m for m in members if m is not None],
            by=("location",),
            key_values=("Lyon",),
            outcome="adjusted",
            root_cause="promotion",
            spec="1-2: =740",
        )
        assert len(record.items) == 4
    with Ledger.open(root / "alone.sqlite") as ledger:
        session = ReviewSession(ReviewCycle(read_portfolio(weeks.week1), ledger), reviewer="ana")
        for item, level in LEVELS.items():
            series = session.find(item, "Lyon")
            assert series is not None
            session.commit_decision(
                series, outcome="adjusted", root_cause="promotion", adjustment=f"1-2: ={2 * level}"
            )
    return root


def _overrides(folder: Path, ledger: str, by: str) -> dict:
    done = run(
        "overrides",
        str(folder / "erp_2026-w2.csv"),
        "--ledger",
        str(folder / ledger),
        "--by",
        by,
        "--format",
        "json",
        cwd=folder,
    )
    assert done.returncode == 0, done.stderr
    found: dict = json.loads(done.stdout)
    found.pop("ledger")
    return found


def test_group_decision_is_valued_by_hand(folder: Path) -> None:
    rows = {r["direction"]: r for r in _overrides(folder, "grouped.sqlite", "direction")["rows"]}
    every = rows["all"]
    assert (every["adjustments"], every["helped"], every["hurt"]) == (4, 0, 4)
    assert every["value_added"] == -370.0
    assert (every["abs_error_original"], every["abs_error_adjusted"]) == (92.0, 462.0)


@pytest.mark.parametrize("by", ["direction", "reviewer", "root_cause", "size", "cycle"])
def test_group_decision_is_valued_as_the_same_series_decisions(folder: Path, by: str) -> None:
    assert _overrides(folder, "grouped.sqlite", by) == _overrides(folder, "alone.sqlite", by)


def test_history_shows_each_series_part_of_the_group(folder: Path) -> None:
    done = run("history", str(folder / "grouped.sqlite"), "--item", "B", cwd=folder)
    assert done.returncode == 0, done.stderr
    # Event 1 is the group decision; B's part of it is event 3 (A 2, B 3, C 4, D 5).
    (row,) = [line for line in done.stdout.splitlines() if line.lstrip().startswith("3 ")]
    assert "Forward forecast adjusted (group #1)" in row and "1-2: =740" in row
    alone = run("history", str(folder / "alone.sqlite"), "--item", "B", cwd=folder)
    assert "group #" not in alone.stdout


def test_overrides_break_down_by_group(folder: Path) -> None:
    """`--by group`: the group decision's lines under its name (worked by hand above: 4 lines,
    value added −370), and the same values decided series by series under "series decisions"."""
    grouped = _overrides(folder, "grouped.sqlite", "group")["rows"]
    assert [r["group"] for r in grouped] == ["location=Lyon (#1)", "all"]
    assert grouped[0]["adjustments"] == 4 and grouped[0]["value_added"] == -370.0
    alone = _overrides(folder, "alone.sqlite", "group")["rows"]
    assert [r["group"] for r in alone] == ["series decisions", "all"]
    assert alone[0]["value_added"] == -370.0


def test_overrides_offers_every_grouping_the_history_knows() -> None:
    from triage.commands_report import OVERRIDE_GROUPS
    from triage.core.history import GROUPINGS

    assert set(OVERRIDE_GROUPS) == set(GROUPINGS)


def test_report_breaks_the_overrides_down_by_group(folder: Path) -> None:
    out = folder / "report-grouped.html"
    done = run(
        "report",
        str(folder / "erp_2026-w2.csv"),
        "--ledger",
        str(folder / "grouped.sqlite"),
        "--to",
        str(out),
        cwd=folder,
    )
    assert done.returncode == 0, done.stderr
    page = out.read_text(encoding="utf-8")
    assert "<h3>By group decision</h3>" in page and "location=Lyon (#1)" in page
    alone = folder / "report-alone.html"
    run(
        "report",
        str(folder / "erp_2026-w2.csv"),
        "--ledger",
        str(folder / "alone.sqlite"),
        "--to",
        str(alone),
        cwd=folder,
    )
    assert "By group decision" not in alone.read_text(encoding="utf-8")
