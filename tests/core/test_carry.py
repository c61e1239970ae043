"""Week to week: one ledger per review folder, adjustments carried into the next cycle, ends.

The two weekly files are ``tests/core/twoweeks.py`` (numbers chosen by hand). Week 1 adjusts
four series over all four forward weeks; week 2 finds the folder's ledger and carries what is
still ahead. The rule is the one docs/history.md states ("Carrying adjustments into a new
cycle"); the expected values below are worked out by hand from the tables in twoweeks.py.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from tests.core.twoweeks import WEEK1, WEEK2, TwoWeeks, write_two_weeks
from triage.core import history
from triage.core.cycle import ReviewCycle
from triage.core.export import review_tables
from triage.core.ledger import FOLDER_LEDGER, DecisionError, Ledger, locate_ledger
from triage.core.read import read_portfolio
from triage.core.review import ReviewSession

#: Week 1's decisions: spec per item (every one covers the four forward weeks).
WEEK1_SPECS = {"A": "+10", "B": "=50", "C": "+5", "D": "+20"}


def _session(path: Path, ledger: Ledger, reviewer: str = "ana") -> ReviewSession:
    return ReviewSession(ReviewCycle(read_portfolio(path), ledger), reviewer=reviewer)


def _adjust(session: ReviewSession, item: str, spec: str) -> None:
    series = session.find(item, "Lyon")
    assert series is not None
    event = session.commit_decision(
        series, outcome="adjusted", root_cause="promotion", adjustment=spec
    )
    session.apply_event(event)


@pytest.fixture
def weeks(tmp_path: Path) -> TwoWeeks:
    weeks = write_two_weeks(tmp_path / "review")
    where = locate_ledger(weeks.week1)
    assert where.path == weeks.week1.parent / FOLDER_LEDGER
    with Ledger.open(where.path) as ledger:
        week1 = _session(weeks.week1, ledger)
        assert week1.cycle == WEEK1
        for item, spec in WEEK1_SPECS.items():
            _adjust(week1, item, spec)
    return weeks


def _forecast(tables, item: str) -> pd.DataFrame:
    rows = tables.forecast.loc[tables.forecast["item"] == item]
    return rows.set_index("period")


def test_week_two_finds_the_folder_ledger_and_carries_what_is_still_ahead(
    weeks: TwoWeeks,
) -> None:
    where = locate_ledger(weeks.week2, for_writing=False)
    assert where.path == weeks.week1.parent / FOLDER_LEDGER and where.exists
    with Ledger.open(where.path, read_only=True) as ledger:
        tables = review_tables(ReviewCycle(read_portfolio(weeks.week2), ledger))
    ahead = list(weeks.forward2[:3])  # 11-16 .. 11-30: week 1's last three forward weeks
    last = weeks.forward2[3]  # 12-07: beyond week 1's horizon
    a = _forecast(tables, "A")
    assert a.loc[ahead, "adjusted_forecast"].tolist() == [110.0] * 3
    assert a.loc[ahead, "adjusted"].all()
    assert a.loc[ahead, "adjusted_in_cycle"].astype(str).tolist() == [WEEK1] * 3
    assert (a.loc[last, "adjusted_forecast"], a.loc[last, "adjusted"]) == (100.0, False)
    assert str(a.loc[last, "adjusted_in_cycle"]) == ""
    # B's "=50" is already in week 2's forecast: nothing is applied, and the export says so.
    b = _forecast(tables, "B")
    assert b["adjusted_forecast"].tolist() == [50.0, 50.0, 50.0, 40.0]
    assert not b["adjusted"].any()
    said = [w for w in tables.warnings if "already in" in w]
    assert len(said) == 1 and "3 period(s)" in said[0] and "'B' @ 'Lyon'" in said[0]
    assert any("carry adjustments made in earlier cycles" in w for w in tables.warnings)
    # A, C and D carry three periods each.
    assert tables.carried_periods == 9 and tables.adjusted_periods == 9
    assert sorted(set(tables.carried["item"])) == ["A", "C", "D"]


def test_a_decision_of_the_new_cycle_takes_precedence_period_by_period(weeks: TwoWeeks) -> None:
    with Ledger.open(weeks.week1.parent / FOLDER_LEDGER) as ledger:
        week2 = _session(weeks.week2, ledger, "bob")
        _adjust(week2, "D", "1-2: +50")
        d = week2.find("D", "Lyon")
        assert d is not None
        (active,) = week2.active_adjustments(d)
        assert active.replaced_now == weeks.forward2[:2]
        assert active.applied == (weeks.forward2[2],)
        carried = week2.carried_forward(d)
        assert carried is not None
        np.testing.assert_array_equal(carried, [np.nan, np.nan, 220.0, np.nan])
        tables = review_tables(ReviewCycle(week2.portfolio, ledger))
    rows = _forecast(tables, "D")
    assert rows["adjusted_forecast"].tolist() == [250.0, 250.0, 220.0, 200.0]
    assert rows["adjusted_in_cycle"].astype(str).tolist() == [WEEK2, WEEK2, WEEK1, ""]
    assert any("replaced by this cycle's own adjustments" in w for w in tables.warnings)


def test_the_series_shows_its_active_adjustments(weeks: TwoWeeks) -> None:
    with Ledger.open(weeks.week1.parent / FOLDER_LEDGER) as ledger:
        week2 = _session(weeks.week2, ledger)
        a, b = week2.find("A", "Lyon"), week2.find("B", "Lyon")
        assert a is not None and b is not None
        # The list marker: A carries; B's adjustment is already in the forecast.
        assert week2.carries[a] and not week2.carries[b]
        (active_a,) = week2.active_adjustments(a)
        assert active_a.active and active_a.cycle == WEEK1 and active_a.adjustment == "+10"
        assert active_a.applied == weeks.forward2[:3]
        (active_b,) = week2.active_adjustments(b)
        assert not active_b.active and active_b.in_forecast == weeks.forward2[:3]
        text_a = "\n".join(week2.across_cycles(a))
        assert f"active adjustment from {WEEK1} (+10, by ana)" in text_a
        assert "carried into this cycle's export for 3 periods" in text_a
        assert "already in this file's forecast for 3 periods" in "\n".join(week2.across_cycles(b))
        # The chart shows the carried values ahead.
        chart = week2.chart(a)
        assert chart.adjusted is not None
        np.testing.assert_array_equal(chart.adjusted[-4:], [110.0, 110.0, 110.0, np.nan])


def test_ending_an_adjustment_removes_it_from_the_export_and_restoring_brings_it_back(
    weeks: TwoWeeks,
) -> None:
    with Ledger.open(weeks.week1.parent / FOLDER_LEDGER) as ledger:
        week2 = _session(weeks.week2, ledger, "bob")
        c = week2.find("C", "Lyon")
        assert c is not None
        (active,) = week2.active_adjustments(c)
        end = week2.commit_end_adjustment(c, active.event_id, note="promotion cancelled")
        assert (end.reviewer, end.cycle, end.target) == ("bob", WEEK2, active.event_id)
        assert week2.apply_end(end) == c
        assert not week2.carries[c] and week2.carried_forward(c) is None
        (ended,) = week2.active_adjustments(c)
        assert ended.ended == end and not ended.active
        assert f"ended by bob at {end.recorded_at}" in "\n".join(week2.across_cycles(c))
        rows = _forecast(review_tables(ReviewCycle(week2.portfolio, ledger)), "C")
        assert rows["adjusted_forecast"].tolist() == [30.0] * 4 and not rows["adjusted"].any()
        # A fresh session reads the same from the ledger.
        again = _session(weeks.week2, ledger)
        assert not again.carries[c]
        with pytest.raises(DecisionError, match="already ended by 'bob'"):
            week2.commit_end_adjustment(c, active.event_id)
        back = week2.commit_restore_adjustment(c, end.id)
        week2.apply_end(back)
        assert week2.carries[c]
        rows = _forecast(review_tables(ReviewCycle(week2.portfolio, ledger)), "C")
        assert rows["adjusted_forecast"].tolist() == [35.0, 35.0, 35.0, 30.0]


def test_an_ended_adjustment_counts_no_value_after_its_end(weeks: TwoWeeks) -> None:
    with Ledger.open(weeks.week1.parent / FOLDER_LEDGER) as ledger:
        week2 = _session(weeks.week2, ledger)
        c = week2.find("C", "Lyon")
        assert c is not None
        (active,) = week2.active_adjustments(c)
        week2.apply_end(week2.commit_end_adjustment(c, active.event_id))
        lines = ReviewCycle(week2.portfolio, ledger).lines
    mine = lines.loc[lines["item"] == "C"].set_index("period")["status"]
    # 11-09 had its actual before the end (cycle 11-09): realised; the rest is ended.
    assert mine.loc[weeks.forward1[0]] == history.REALISED
    assert mine.loc[list(weeks.forward1[1:])].tolist() == [history.ENDED] * 3
    with Ledger.open(weeks.week1.parent / FOLDER_LEDGER, read_only=True) as ledger:
        active = ReviewCycle(read_portfolio(weeks.week2), ledger).active
    assert "C" not in set(active["item"])


def test_each_cycle_keeps_the_worst_set_its_list_showed(weeks: TwoWeeks) -> None:
    folder = weeks.week1.parent
    with Ledger.open(folder / FOLDER_LEDGER) as ledger:
        week2 = _session(weeks.week2, ledger)
        stored = ledger.worst_sets()
        assert list(stored) == [WEEK1, WEEK2]
        shown = week2.error_order[week2.worst[week2.error_order]]
        assert stored[WEEK2].items == tuple(week2.portfolio.keys["item"].to_numpy()[shown])
        # A second opening of the cycle keeps the first set.
        _session(weeks.week2, ledger)
        assert ledger.worst_sets()[WEEK2] == stored[WEEK2]
        assert week2.repeat_sources == {
            **{c: history.RESCORED for c in list(week2.repeat_sources)[:-2]},
            WEEK1: history.SNAPSHOT,
            WEEK2: history.SNAPSHOT,
        }
        assert any("re-scored" in n for n in week2.notices)
        rescored = sum(how == history.RESCORED for how in week2.repeat_sources.values())
        repeat_line = next(line for line in week2.across_cycles(0) if "worst-offender set" in line)
        assert f"{rescored} re-scored, no stored set)" in repeat_line


def test_the_set_just_stored_counts_as_the_set_read_back(weeks: TwoWeeks) -> None:
    # First opening stores the cycle's set and counts it without reading it back; a second
    # opening reads it from the ledger. Both must count the same (the stored set is the shown one).
    folder = weeks.week1.parent
    with Ledger.open(folder / FOLDER_LEDGER) as ledger:
        first = _session(weeks.week2, ledger)
        second = _session(weeks.week2, ledger)
        assert first.repeat_sources == second.repeat_sources
        np.testing.assert_array_equal(first.times_in_worst, second.times_in_worst)
        np.testing.assert_array_equal(first.repeat, second.repeat)
        # Only the cycles asked for are read.
        assert list(ledger.worst_sets([WEEK2])) == [WEEK2]
        assert ledger.worst_sets([]) == {}
        assert set(ledger.worst_sets()) >= {WEEK1, WEEK2}
