"""The review screens' model of groups (``triage.core.group_review``) on the sample portfolio,
against pandas ``groupby`` sums of the file itself."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from triage.core.cycle import ReviewCycle
from triage.core.group_review import GroupReview, outcome_words
from triage.core.read import read_portfolio
from triage.core.review import ReviewSession
from triage.core.settings import ScoreSettings

SAMPLE = Path(__file__).resolve().parents[2] / "sample" / "portfolio.csv"


@pytest.fixture(scope="module")
def session() -> ReviewSession:
    portfolio = read_portfolio(SAMPLE)
    return ReviewSession(ReviewCycle(portfolio, None, ScoreSettings()), reviewer="ana")


def test_group_chart_is_the_sum_of_the_file(session: ReviewSession) -> None:
    review = GroupReview(session, ("family",))
    frame = pd.read_csv(SAMPLE)
    # pandas' groupby sum over the file's rows, per family and period (missing cells skipped;
    # min_count=1 leaves a period with no value missing, as the chart does).
    sums = frame.groupby(["family", "period"])[["demand", "forecast_stat"]].sum(min_count=1)
    labels = list(session.portfolio.calendar.label(i) for i in range(117))
    for group in range(review.n_groups):
        family = review.label(group)
        chart = review.chart(group)
        expected = sums.loc[family].reindex(labels)
        np.testing.assert_allclose(chart.demand, expected["demand"].to_numpy(), rtol=1e-12)
        others = dict(chart.others)
        np.testing.assert_allclose(others["stat"], expected["forecast_stat"], rtol=1e-12)


def test_members_filters_and_review_state(session: ReviewSession) -> None:
    review = GroupReview(session, ("family", "location"))
    group = int(review.order("error")[0])
    members = review.members(group)
    shown = session.order("error", filters=review.filters(group))
    assert sorted(shown.tolist()) == members.tolist()
    assert len(members) == review.size[group]
    assert review.decided()[group] == 0 and outcome_words(0, 5) == ""
    saved = session.outcome.copy()
    try:
        session._set_outcome(members[:2], "no_change")
        assert review.decided()[group] == 0  # counted once, until told
        review.forget()
        assert review.decided()[group] == 2
        assert outcome_words(2, int(review.size[group])) == f"2/{review.size[group]}"
    finally:
        session._set_outcome(slice(None), saved)
        review.forget()


def test_contributors_flagged_and_words(session: ReviewSession) -> None:
    review = GroupReview(session, ("family",))
    for group in range(review.n_groups):
        top = review.contributors(group, 3)
        errors = [session.error[c.series] for c in top]
        assert errors == sorted(errors, reverse=True)
        members = review.members(group)
        assert errors[0] == session.error[members].max()
        assert sum(c.share for c in review.contributors(group, len(members))) == pytest.approx(1)
        flagged = review.flagged(group)
        assert set(flagged) == {s for s in members if session.flag[s] != 0}
        words = review.describe(group)
        assert words[0].startswith(f"{len(members)} series")
        assert any("cancels" in line for line in words)
    # The group ranked first by error holds the largest share.
    first = int(review.order("error")[0])
    assert review.table["error_share"].iat[first] == review.table["error_share"].max()


def test_preview_splits_the_total_exactly(session: ReviewSession) -> None:
    """A group's previewed adjustment: the members' adjusted values sum to the adjusted total
    at the export's precision (largest remainder; docs/adjustments.md), and nothing outside the
    range moves."""
    review = GroupReview(session, ("family",))
    group = int(review.order("error")[0])
    result = review.preview(group, "2-5: =500")
    scale = 10**review.decimals
    steps = np.rint(np.nan_to_num(result.adjusted[:, 1:5]) * scale).sum(axis=0)
    np.testing.assert_array_equal(steps, np.full(4, 500 * scale))
    np.testing.assert_array_equal(result.adjusted[:, 5:], result.original[:, 5:])
    members = review.members(group)
    p = session.portfolio
    np.testing.assert_array_equal(result.original, p.forecast[members, p.last_actual + 1 :])
    assert result.total.description.startswith("periods 2-5: =500")
    relative = review.preview(group, "x1.1")
    # A relative change scales each series alike: within one step of 1.1 x its forecast.
    gap = np.abs(relative.adjusted - 1.1 * relative.original)
    assert np.nanmax(gap) <= 1 / scale + 1e-9
