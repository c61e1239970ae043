"""Group decisions in a review session: the split recorded, each member's state, undo whole,
precedence of a later series decision, and what history, carrying, the export and the realised
value make of the lines.

The two weekly files are ``tests/core/twoweeks.py`` (numbers chosen by hand): week 1's forward
forecast is A 100, B 40, C 30, D 200 per week (total 370), whole units, all at ``Lyon``. The
expected splits are worked out by hand with the rule of docs/adjustments.md ("Splitting a
group's adjustment"; Gross & Sohl 1990, proportions of forecasts, and the largest-remainder
rounding):

* ``1-2: =740`` doubles the total: A 200, B 80, C 60, D 400 (exact shares).
* ``1-2: =100``: exact shares 27.03, 10.81, 8.11, 54.05; whole units below them 27, 10, 8, 54
  (99); the one unit left goes to the largest remainder, B: 27, 11, 8, 54.
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
from triage.core.ledger import FOLDER_LEDGER, Ledger
from triage.core.read import read_portfolio
from triage.core.review import ReviewSession
from triage.core.split import HISTORY

ITEMS = ["A", "B", "C", "D"]


@pytest.fixture
def weeks(tmp_path: Path) -> TwoWeeks:
    return write_two_weeks(tmp_path / "review")


def _session(path: Path, ledger: Ledger, reviewer: str = "ana") -> ReviewSession:
    return ReviewSession(ReviewCycle(read_portfolio(path), ledger), reviewer=reviewer)


def _members(session: ReviewSession) -> np.ndarray:
    found = [session.find(item, "Lyon") for item in ITEMS]
    assert None not in found
    return np.array(found, dtype=np.int64)


def _group(session: ReviewSession, spec: str | None = "1-2: =740", **fields):
    values = {
        "by": ("location",),
        "key_values": ("Lyon",),
        "outcome": "adjusted" if spec else "deferred",
        "root_cause": "promotion",
        "note": "whole store",
        "spec": spec,
    }
    values.update(fields)
    record = session.commit_group_decision(_members(session), **values)
    session.apply_group(record)
    return record


def _cells(tables, column: str) -> dict[str, list]:
    frame = tables.forecast
    return {
        item: frame.loc[frame["item"] == item, column].astype(object).tolist() for item in ITEMS
    }


def _ids(tables) -> dict[str, list]:
    """The forecast table's ``group_decision`` per item: the ledger id, None where there is none."""
    return {
        item: [None if pd.isna(v) else int(v) for v in values]
        for item, values in _cells(tables, "group_decision").items()
    }


def test_preview_writes_nothing_and_matches_what_is_recorded(weeks: TwoWeeks) -> None:
    with Ledger.open(weeks.week1.parent / FOLDER_LEDGER) as ledger:
        session = _session(weeks.week1, ledger)
        preview = session.preview_group(_members(session), "1-2: =100")
        assert ledger.history() == []
        assert preview.adjusted[:, :2].tolist() == [[27, 27], [11, 11], [8, 8], [54, 54]]
        assert preview.adjusted[:, 2:].tolist() == [[100, 100], [40, 40], [30, 30], [200, 200]]
        record = _group(session, "1-2: =100")
        by_item = {d.item: d for d in ledger.current(WEEK1)}
        for row, item in enumerate(ITEMS):
            assert [ln.adjusted for ln in by_item[item].lines] == preview.adjusted[row, :2].tolist()
            assert [ln.period for ln in by_item[item].lines] == list(weeks.forward1[:2])
        assert (record.adjustment, record.basis) == ("1-2: =100", "forecasts")


def test_members_show_the_group_decision_as_their_decision(weeks: TwoWeeks) -> None:
    with Ledger.open(weeks.week1.parent / FOLDER_LEDGER) as ledger:
        session = _session(weeks.week1, ledger)
        members = _members(session)
        own = session.commit_decision(int(members[1]), outcome="handed_off", root_cause="unknown")
        session.apply_event(own)
        record = _group(session)
        assert session.outcome[members].tolist() == ["adjusted"] * 4
        assert session.group_of[members].tolist() == [record.id] * 4
        assert session.version[members].tolist() == [1, 2, 1, 1]
        assert session.decided_by[members].tolist() == ["ana"] * 4
        # A new session reads the same state from the file.
        again = _session(weeks.week1, ledger, reviewer="bob")
        assert again.group_of[members].tolist() == [record.id] * 4
        assert again.outcome[members].tolist() == ["adjusted"] * 4
        # Every member's history shows it.
        assert [e.group_id for e in again.history(int(members[0]))] == [record.id]
        assert again.current_decision(int(members[1]))[0].group_id == record.id  # type: ignore[union-attr]


def test_group_undo_reverts_each_member(weeks: TwoWeeks) -> None:
    with Ledger.open(weeks.week1.parent / FOLDER_LEDGER) as ledger:
        session = _session(weeks.week1, ledger)
        members = _members(session)
        own = session.commit_decision(int(members[1]), outcome="handed_off", root_cause="unknown")
        session.apply_event(own)
        record = _group(session)
        undo = session.commit_group_undo(record.id, note="wrong store")
        rows = session.apply_group(undo)
        assert sorted(rows.tolist()) == sorted(members.tolist())
        assert session.outcome[members].tolist() == ["", "handed_off", "", ""]
        assert session.group_of[members].tolist() == [0, 0, 0, 0]
        assert session.version[members].tolist() == [2, 3, 2, 2]
        assert review_tables(ReviewCycle(session.portfolio, ledger)).adjusted_periods == 0


def test_a_later_series_decision_overrides_the_group_for_that_series(weeks: TwoWeeks) -> None:
    with Ledger.open(weeks.week1.parent / FOLDER_LEDGER) as ledger:
        session = _session(weeks.week1, ledger)
        members = _members(session)
        record = _group(session)  # 1-2: =740 -> A 200, B 80, C 60, D 400
        event = session.commit_decision(
            int(members[1]), outcome="adjusted", root_cause="price_change", adjustment="2-3: =5"
        )
        session.apply_event(event)
        assert session.group_of[members].tolist() == [record.id, 0, record.id, record.id]
        tables = review_tables(ReviewCycle(session.portfolio, ledger))
        adjusted = _cells(tables, "adjusted_forecast")
        # B follows its own decision in every period; the group's line for B is gone, also in
        # period 1, which B's own decision does not adjust.
        assert adjusted == {
            "A": [200, 200, 100, 100],
            "B": [40, 5, 5, 40],
            "C": [60, 60, 30, 30],
            "D": [400, 400, 200, 200],
        }
        # The ledger's id as a number, none where the value is the series' own (docs/export.md).
        g = record.id
        assert _ids(tables) == {
            "A": [g, g, None, None],
            "B": [None, None, None, None],
            "C": [g, g, None, None],
            "D": [g, g, None, None],
        }
        decisions = tables.decisions.set_index("item")
        assert decisions["group_decision"].fillna(0).to_dict() == {"A": g, "B": 0, "C": g, "D": g}
        assert list(tables.decisions.columns)[-1] == "group_decision"
        assert list(tables.forecast.columns)[-1] == "group_decision"
        # adjustment_lines: the group's lines are ordinary lines naming their group.
        lines = history.adjustment_lines(session.portfolio, history.DecisionLog.read(ledger, WEEK1))
        assert lines.groupby("item")["group_decision"].first().to_dict() == {
            "A": record.id,
            "B": 0,
            "C": record.id,
            "D": record.id,
        }
        # Undoing the group leaves B's own decision standing.
        session.apply_group(session.commit_group_undo(record.id))
        assert _cells(review_tables(ReviewCycle(session.portfolio, ledger)), "adjusted")["B"] == [
            False,
            True,
            True,
            False,
        ]


def test_history_basis_and_no_adjustment(weeks: TwoWeeks) -> None:
    with Ledger.open(weeks.week1.parent / FOLDER_LEDGER) as ledger:
        session = _session(weeks.week1, ledger)
        # History averages: demand alternates level-23 / level-17, mean level - 20:
        # A 80, B 20, C 10, D 180 (sum 290); =290 splits back to exactly those.
        record = _group(session, "1: =290", basis=HISTORY)
        assert record.basis == "history"
        tables = review_tables(ReviewCycle(session.portfolio, ledger))
        firsts = {k: v[0] for k, v in _cells(tables, "adjusted_forecast").items()}
        assert firsts == {"A": 80, "B": 20, "C": 10, "D": 180}
        deferred = _group(session, None, expected_versions=[1, 1, 1, 1])
        assert deferred.adjustment is None and deferred.outcome == "deferred"
        assert all(not d.lines for d in ledger.current(WEEK1))


def test_group_lines_are_carried_and_valued_like_series_lines(weeks: TwoWeeks, tmp_path) -> None:
    # The same adjusted values recorded once as a group decision and once as four series
    # decisions ("=200" each on periods 1-2, the split of =740 worked out above) must carry and
    # value alike: the lines are ordinary lines (docs/ledger.md, "Group decisions").
    grouped = weeks.week1.parent / FOLDER_LEDGER
    alone = tmp_path / "alone.sqlite"
    with Ledger.open(grouped) as ledger:
        record = _group(_session(weeks.week1, ledger))
    with Ledger.open(alone) as ledger:
        session = _session(weeks.week1, ledger)
        for item, value in zip(ITEMS, [200, 80, 60, 400], strict=True):
            series = session.find(item, "Lyon")
            assert series is not None
            session.commit_decision(
                series, outcome="adjusted", root_cause="promotion", adjustment=f"1-2: ={value}"
            )
    week2 = read_portfolio(weeks.week2)
    results = {}
    for path in (grouped, alone):
        with Ledger.open(path, read_only=True) as ledger:
            cycle = ReviewCycle(week2, ledger)
            results[path] = (review_tables(cycle), cycle.realised)
    (t_group, r_group), (t_alone, r_alone) = results[grouped], results[alone]
    # Week 2: period 11-09 has an actual (realised); 11-16 is still ahead and carried.
    keep = [c for c in r_alone.columns if c not in ("event_id", "group")]
    pd.testing.assert_frame_equal(r_group[keep], r_alone[keep])
    # The breakdown by group names the group decision; the same lines alone are series lines.
    assert set(r_group["group"]) == {f"location=Lyon (#{record.id})"}
    assert set(r_alone["group"]) == {"series decisions"}
    assert len(r_group) == 4 and (r_group["period"] == WEEK2).all()
    # A: actual 80 +- 3 in week 11-09 (twoweeks: level - 20 - 3 at an even week), original 100,
    # adjusted 200: the override hurt by |200 - actual| - |100 - actual| = 100.
    a = r_group.set_index("item").loc["A"]
    assert a["value_added"] == -100.0
    for column in ("adjusted_forecast", "adjusted", "adjusted_in_cycle"):
        assert _cells(t_group, column) == _cells(t_alone, column), column
    assert _cells(t_group, "adjusted_forecast")["D"] == [400, 200, 200, 200]
    assert _ids(t_group)["D"] == [record.id, None, None, None]
    assert _ids(t_alone)["D"] == [None, None, None, None]
