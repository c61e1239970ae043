"""The review session the screens rely on, tested headless."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest

from triage.core.cycle import ReviewCycle
from triage.core.ledger import Ledger
from triage.core.ranking import leading_cover, scorecard
from triage.core.read import read_portfolio
from triage.core.review import ReviewSession

SAMPLE = Path(__file__).resolve().parents[2] / "sample" / "portfolio.csv"


@pytest.fixture
def session(tmp_path: Path):
    path = tmp_path / "week.csv"
    shutil.copy(SAMPLE, path)
    ledger = Ledger.open(tmp_path / "week.ledger.sqlite")
    yield ReviewSession(ReviewCycle(read_portfolio(path), ledger), reviewer="ana")
    ledger.close()


def decide(session: ReviewSession, series: int, outcome: str = "no_change", **kw: object) -> None:
    session.apply_event(
        session.commit_decision(series, outcome=outcome, root_cause="unknown", **kw)
    )


def test_order_is_the_scorecards(session: ReviewSession) -> None:
    card = scorecard(session.portfolio)
    np.testing.assert_array_equal(session.order(), card.index.to_numpy())
    by_bias = scorecard(session.portfolio, by="bias")
    np.testing.assert_array_equal(session.order("bias"), by_bias.index.to_numpy())


def test_filters_combine_and_keep_the_order(session: ReviewSession) -> None:
    shown = session.order(text="gf-102", filters={"planner": "Lena", "pattern": "smooth"})
    keys = session.portfolio.keys
    assert len(shown) > 0
    assert all("gf-102" in keys["item"].iat[i].casefold() for i in shown)
    assert set(keys["planner"].to_numpy()[shown]) == {"Lena"}
    assert set(session.card["pattern"].to_numpy()[shown]) == {"smooth"}
    ranks = session.card["rank"].to_numpy()[shown]
    assert (np.diff(ranks) > 0).all()


@pytest.mark.parametrize("needle", ["gf-10", "LENA", "nth", "quill el", "a", "no such text"])
def test_text_filter_is_a_substring_of_a_key_or_attribute(
    session: ReviewSession, needle: str
) -> None:
    # Oracle: Python's ``in`` on each series' casefolded key and attribute values, one by one.
    session.finish(session.background())
    keys = session.portfolio.keys
    fields = [*session.portfolio.key_columns, *session.portfolio.attributes]
    expected = {
        i
        for i in range(len(keys))
        if any(needle.casefold() in str(keys[f].iat[i]).casefold() for f in fields)
    }
    assert set(session.order(text=needle).tolist()) == expected


def test_text_filter_folds_case_as_python_does(tmp_path: Path) -> None:
    # str.casefold (Unicode default case folding): "Straße" folds to "strasse".
    rows = ["item,location,period,demand,forecast,planner"]
    for item, planner in (("Straße-1", "Ana"), ("STRASSE-2", "Bo"), ("other", "STRAẞE")):
        rows += [f"{item},N,2025-01-{d:02d},{d},{d + 1},{planner}" for d in (6, 13, 20)]
    path = tmp_path / "week.csv"
    path.write_text("\n".join(rows) + "\n")
    session = ReviewSession(ReviewCycle(read_portfolio(path), None), reviewer="ana")
    session.finish(session.background())
    items = session.portfolio.keys["item"].to_numpy()
    assert sorted(items[session.order(text="strasse")]) == ["STRASSE-2", "Straße-1", "other"]
    assert sorted(items[session.order(text="ẞE-1")]) == ["Straße-1"]


def test_progress_against_the_target_matches_leading_cover(session: ReviewSession) -> None:
    # The series needed to reach 80% from nothing reviewed is the leading cover set (common
    # practice: the smallest worst-first set holding the target share).
    need = len(leading_cover(scorecard(session.portfolio), 0.8))
    assert session.progress().to_target == need
    for series in session.error_order[:3]:
        decide(session, int(series))
    progress = session.progress()
    assert progress.reviewed == 3
    covered = session.card["error_share"].to_numpy()[session.error_order[:3]].sum()
    assert progress.covered == pytest.approx(covered)
    assert progress.to_target == need - 3


def test_progress_counts_follow_every_way_an_outcome_changes(session: ReviewSession) -> None:
    # Oracle: the counts taken from the outcome codes one by one, after decisions, an undo and
    # a reload from the ledger.
    order = [int(s) for s in session.error_order[:6]]
    for series, outcome in zip(
        order, ["no_change", "adjusted", "handed_off", "deferred"], strict=False
    ):
        kw = {"adjustment": "x0.9"} if outcome == "adjusted" else {}
        decide(session, series, outcome, **kw)
    session.apply_event(session.commit_undo(order[0]))

    def counts() -> tuple[int, int, int]:
        codes = session.outcome.tolist()
        return (
            sum(c in ("no_change", "adjusted") for c in codes),
            codes.count("handed_off"),
            codes.count("deferred"),
        )

    for _ in range(2):
        progress = session.progress()
        assert (progress.reviewed, progress.handed_off, progress.deferred) == counts() == (1, 1, 1)
        assert session.reviewed().sum() == 3
        session.reload()
    with pytest.raises(ValueError):
        session.outcome[order[5]] = "no_change"  # read-only: the session owns outcomes


def test_undo_twice_walks_back_through_decisions(session: ReviewSession) -> None:
    series = int(session.error_order[0])
    decide(session, series, "no_change")
    decide(session, series, "deferred")
    assert session.outcome[series] == "deferred"
    session.apply_event(session.commit_undo(series))
    assert session.outcome[series] == "no_change"
    session.apply_event(session.commit_undo(series))
    assert session.outcome[series] == ""
    # The in-memory state agrees with the ledger's own set-based view.
    assert session.ledger.current(session.cycle) == []


def test_next_unreviewed_skips_decided_and_wraps(session: ReviewSession) -> None:
    order = session.order()
    decide(session, int(order[1]))
    assert session.next_unreviewed(order, 0) == 2
    for series in order[2:]:
        session._set_outcome(int(series), "no_change")  # the rest decided (state only)
    assert session.next_unreviewed(order, 5) == 0


def test_preview_and_commit_store_the_same_lines(session: ReviewSession) -> None:
    series = int(session.error_order[0])
    preview = session.preview(series, "1-3: x1.5")
    event = session.commit_decision(
        series, outcome="adjusted", root_cause="promotion", adjustment="1-3: x1.5"
    )
    assert [line.adjusted for line in event.lines] == pytest.approx(list(preview.adjusted[:3]))
    assert [line.period for line in event.lines] == list(session.forward_dates[:3])


def test_bias_order_shares_are_what_the_order_sorts_by(session: ReviewSession) -> None:
    # Independent of the session: pandas over the scorecard in --by bias order (docs/metrics.md:
    # flagged first, then |bias| in value). The shares are of the portfolio's total |bias|.
    card = scorecard(session.portfolio, by="bias")
    size = card["bias_value"].abs()
    np.testing.assert_allclose(session.bias_size[card.index], size.to_numpy())
    np.testing.assert_allclose(
        session.bias_share[card.index], (size / size.sum()).to_numpy(), rtol=1e-12
    )
    np.testing.assert_allclose(
        session.bias_cum[card.index], (size.cumsum() / size.sum()).to_numpy(), rtol=1e-12
    )
    assert session.bias_cum[card.index[-1]] == 1.0


def test_current_decision_is_read_from_the_file(session: ReviewSession, tmp_path: Path) -> None:
    series = int(session.error_order[0])
    assert session.current_decision(series) == (None, 0)
    decide(session, series, "no_change", note="first")
    # Another session (another reviewer) writes the same series.
    other = ReviewSession(ReviewCycle(session.portfolio, session.ledger), reviewer="bob")
    other.apply_event(
        other.commit_decision(series, outcome="deferred", root_cause="promotion", note="b")
    )
    event, version = session.current_decision(series)
    assert event is not None and (event.outcome, event.reviewer, event.note) == (
        "deferred",
        "bob",
        "b",
    )
    assert version == 2
    session.apply_event(session.commit_undo(series, expected_version=version))
    event, version = session.current_decision(series)
    assert event is not None and event.reviewer == "ana" and version == 3
    assert session.decided_by[series] == "ana"


def test_progress_counts_settled_decisions_and_open_ones_apart(session: ReviewSession) -> None:
    first, second, third = (int(s) for s in session.error_order[:3])
    decide(session, first, "no_change")
    decide(session, second, "handed_off")
    decide(session, third, "deferred")
    progress = session.progress()
    # Settled = no change needed or adjusted (common practice: a hand-off is still open work).
    assert (progress.reviewed, progress.handed_off, progress.deferred) == (1, 1, 1)
    share = session.card["error_share"].to_numpy()
    assert progress.covered == pytest.approx(share[first])
