"""A review on a stored scorecard shows what a review of the whole portfolio shows.

``on_demand.open_review`` opens a dataset's stored scorecard (the folder ``rank --engine dask
--format parquet`` writes) with the series' histories fetched from the dataset when asked for.
The reference is a review session on the single file the dataset was cut from, read whole
(``read_portfolio``): the measures, words, charts, forecast comparisons and adjustment previews
of each series must be the same. ``FetchedRows`` must index as numpy indexes the whole matrix
(the numpy indexing rules: ``numpy.ndarray.__getitem__``).
"""

from __future__ import annotations

import threading
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from tests.core.datasets import generated, stored_scorecard, write_layout
from triage.core import card_folder, history, on_demand
from triage.core.cycle import ReviewCycle
from triage.core.errors import LoadError
from triage.core.ledger import Ledger
from triage.core.read import read_portfolio
from triage.core.review import ReviewSession
from triage.core.settings import ScoreSettings

ITEMS = 80


@pytest.fixture(scope="module")
def source(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return generated(tmp_path_factory.mktemp("source"), ITEMS)


@pytest.fixture(scope="module")
def lake(source: Path, tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    """The single file cut into monthly parts, and its stored scorecard."""
    base = tmp_path_factory.mktemp("lake")
    folder = write_layout(pq.read_table(source).to_pandas(), base / "by-month", "period")
    return folder, stored_scorecard(folder, base / "card")


def stored_session(lake: tuple[Path, Path], ledger: Ledger | None = None) -> ReviewSession:
    review = on_demand.open_review(*lake, ScoreSettings())
    cycle = ReviewCycle(
        review.portfolio,
        ledger,
        review.settings,
        card=review.card,
        actual_cols=review.histories.plan.actual_cols,
    )
    session = ReviewSession(cycle, reviewer="ana", defer=True)
    session.finish(session.background())
    return session


def fetch(session: ReviewSession, series: list[int]) -> None:
    histories = session.portfolio.demand._histories  # type: ignore[attr-defined]
    histories.fetch(series)


def test_the_stored_review_shows_what_the_whole_file_shows(
    source: Path, lake: tuple[Path, Path]
) -> None:
    whole = ReviewSession(ReviewCycle(read_portfolio(source), None, ScoreSettings()), reviewer="a")
    stored = stored_session(lake)
    assert stored.portfolio.n_series == whole.portfolio.n_series
    np.testing.assert_array_equal(stored.window_cols, whole.window_cols)
    # The same list: keys in review order, and the same totals.
    keys = [stored.key(int(s)) for s in stored.order("error")]
    assert keys == [whole.key(int(s)) for s in whole.order("error")]
    assert stored.totals() == pytest.approx(whole.totals(), rel=1e-12)
    assert int(stored.worst.sum()) == int(whole.worst.sum())
    picked = [int(s) for s in stored.order("error")[[0, 3, 17, -1]]]
    for series in picked:
        # Before its history is fetched, a key on the screens' thread does not wait for it.
        with pytest.raises(on_demand.NotFetched):
            stored.chart(series)
    fetch(stored, picked)
    for series in picked:
        other = whole.find(*stored.key(series))
        assert other is not None
        assert stored.describe(series) == whole.describe(other)
        assert stored.forecasts_line(series) == whole.forecasts_line(other)
        assert stored.suggest_spec[series] == whole.suggest_spec[other]
        a, b = stored.chart(series), whole.chart(other)
        np.testing.assert_array_equal(a.demand, b.demand)
        np.testing.assert_array_equal(a.forecast, b.forecast)
        assert [name for name, _ in a.others] == [name for name, _ in b.others]
        for spec in ("x0.9", "+10%", "1-4: =120"):
            np.testing.assert_array_equal(
                stored.preview(series, spec).adjusted, whole.preview(other, spec).adjusted
            )


def test_fetched_rows_index_as_numpy_does(lake: tuple[Path, Path], source: Path) -> None:
    stored = stored_session(lake)
    whole = read_portfolio(source)
    # Stored positions are the scorecard's rows; the whole file's are in key order.
    to_whole = np.array(
        [whole.series_index.find(*stored.key(s)) for s in range(stored.portfolio.n_series)]
    )
    fetch(stored, list(range(12)))
    matrix = stored.portfolio.demand
    reference = whole.demand[to_whole]
    rows, cols = np.array([3, 0, 3, 7]), np.array([5, 9, 2, 40])
    for key in (
        4,
        (4, slice(10, 20)),
        (4, cols),
        (rows, cols),
        (rows, slice(None)),
        np.ix_(rows, cols),
        (slice(2, 6), cols),
        (rows[:, None], cols[None, :]),
        (np.int64(5), 12),
    ):
        np.testing.assert_array_equal(matrix[key], reference[key], err_msg=repr(key))
    with pytest.raises(on_demand.EveryHistoryNeeded):
        matrix[:, cols]
    with pytest.raises(on_demand.EveryHistoryNeeded):
        np.asarray(matrix)
    with pytest.raises(on_demand.NotFetched):
        matrix[50]


def test_off_the_screens_thread_a_history_is_fetched_when_read(lake: tuple[Path, Path]) -> None:
    stored = stored_session(lake)
    got: list[np.ndarray] = []
    worker = threading.Thread(target=lambda: got.append(stored.portfolio.forecast[[20, 21]]))
    worker.start()
    worker.join(60)
    assert got and got[0].shape == (2, stored.portfolio.forecast.shape[1])
    np.testing.assert_array_equal(stored.portfolio.forecast[20], got[0][0])


def test_decisions_are_saved_with_the_datasets_fingerprint(
    tmp_path: Path, lake: tuple[Path, Path]
) -> None:
    ledger = Ledger.open(tmp_path / "ledger.sqlite")
    stored = stored_session(lake, ledger)
    series = int(stored.order("error")[0])
    fetch(stored, [series])
    event = stored.commit_decision(
        series, outcome="adjusted", root_cause="unknown", adjustment="x0.8"
    )
    stored.apply_event(event)
    assert event.portfolio_fingerprint == on_demand.fingerprint(
        card_folder.open_card_folder(lake[1], lake[0])
    )
    assert (event.item, event.location) == stored.key(series)
    # Reopened (the load runs off the screens' thread), the adjustment's lines are located.
    again: list[ReviewSession] = []
    worker = threading.Thread(target=lambda: again.append(stored_session(lake, ledger)))
    worker.start()
    worker.join(60)
    assert again and again[0].outcome[series] == "adjusted"
    lines = again[0].review_cycle.lines
    assert (lines["series"] == series).any()


def test_repeat_offenders_count_the_stored_worst_sets_only(
    tmp_path: Path, lake: tuple[Path, Path]
) -> None:
    stored = stored_session(lake)
    offenders = stored.review_cycle.repeat_offenders()
    sources = offenders.attrs["sources"]
    assert list(sources.values()) == [history.NOT_STORED] * 3 + [history.SNAPSHOT]
    np.testing.assert_array_equal(offenders["in_worst_now"].to_numpy(), stored.worst)
    assert "cannot re-score them" in (history.repeat_notice(offenders) or "")


def test_a_partial_or_outdated_scorecard_is_refused(
    tmp_path: Path, lake: tuple[Path, Path]
) -> None:
    import json

    folder, card = lake
    partial = tmp_path / "partial"
    partial.mkdir()
    for path in card.iterdir():
        partial.joinpath(path.name).write_bytes(path.read_bytes())
    described = json.loads((partial / card_folder.DESCRIPTION).read_text())
    described["scored"]["rows"] = 10
    (partial / card_folder.DESCRIPTION).write_text(json.dumps(described))
    with pytest.raises(LoadError, match="leading 10 of"):
        on_demand.open_review(folder, partial, ScoreSettings())
    described["version"] = 99
    (partial / card_folder.DESCRIPTION).write_text(json.dumps(described))
    with pytest.raises(LoadError, match="version 99"):
        on_demand.open_review(folder, partial, ScoreSettings())
    with pytest.raises(LoadError, match="no such scorecard folder"):
        on_demand.open_review(folder, tmp_path / "missing", ScoreSettings())


def test_other_settings_take_the_scorecards_window(lake: tuple[Path, Path]) -> None:
    review = on_demand.open_review(*lake, ScoreSettings(window=8, season=4))
    assert (review.settings.window, review.settings.season) == (13, 1)
    assert any("window of 13 periods" in note for note in review.notices)
    assert isinstance(review.card, pd.DataFrame)


def test_a_scorecard_stored_in_bias_order_gives_the_same_review(
    tmp_path: Path, lake: tuple[Path, Path]
) -> None:
    by_error = stored_session(lake)
    by_bias = stored_session((lake[0], stored_scorecard(lake[0], tmp_path / "bias", by="bias")))
    for order in ("error", "bias"):
        want = [by_error.key(int(s)) for s in by_error.order(order)]
        assert [by_bias.key(int(s)) for s in by_bias.order(order)] == want
