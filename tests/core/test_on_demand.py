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
    session = ReviewSession(ReviewCycle.on_scorecard(review, ledger), reviewer="ana", defer=True)
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
    worst = sorted(stored.key(int(s)) for s in np.flatnonzero(stored.worst))
    assert worst == sorted(whole.key(int(s)) for s in np.flatnonzero(whole.worst))
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
    # Slices and negative positions as numpy takes them, once those rows are at hand.
    last = stored.portfolio.n_series - 1
    fetch(stored, [last])
    for key in ((slice(None, 3), cols), slice(2, 5), -1, (np.array([-1, 0]), 7)):
        np.testing.assert_array_equal(matrix[key], reference[key], err_msg=repr(key))
    assert matrix[np.array([], dtype=np.int64)].shape == (0, matrix.shape[1])
    with pytest.raises(IndexError):
        matrix[last + 1]
    # On the screens' thread a row not at hand is never read there.
    with pytest.raises(on_demand.NotFetched):
        matrix[:, cols]
    with pytest.raises(on_demand.NotFetched):
        matrix[50]
    with pytest.raises(on_demand.EveryHistoryNeeded):
        np.asarray(matrix)


def test_asking_for_every_history_is_refused(
    lake: tuple[Path, Path], monkeypatch: pytest.MonkeyPatch
) -> None:
    stored = stored_session(lake)
    monkeypatch.setattr(on_demand, "AT_ONCE", 10)
    failed: list[BaseException] = []

    def whole() -> None:
        try:
            stored.portfolio.demand[:, 5]
        except on_demand.EveryHistoryNeeded as exc:
            failed.append(exc)

    worker = threading.Thread(target=whole)
    worker.start()
    worker.join(60)
    assert failed and "needs every series' history" in str(failed[0])


def test_more_histories_than_are_kept_are_read_in_chunks(lake: tuple[Path, Path]) -> None:
    review = on_demand.open_review(*lake, ScoreSettings())
    histories = on_demand.Histories(review.histories.plan, review.portfolio.key, kept=3)
    got = histories.fetch(range(8))
    assert sorted(got) == list(range(8)) and histories.fetches == 3
    # Those kept are the latest used; one read again moves to the end.
    assert [histories.has(s) for s in range(8)] == [False] * 5 + [True] * 3
    histories.fetch([5])
    histories.fetch([0])
    assert histories.has(5) and histories.has(0) and not histories.has(6)


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
    # The leading ten rows, as --top 10 writes them.
    first = partial / "part-00000.parquet"
    pq.write_table(pq.read_table(first).slice(0, 10), first)
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
    # Stored in error order, the rows are the positions and nothing is scattered; stored in
    # bias order they are scattered: the same values by series either way.
    assert by_error.review_cycle.in_position_order
    assert not by_bias.review_cycle.in_position_order
    to_bias = np.array([by_bias.find(*by_error.key(s)) for s in range(len(by_error.flag))])
    for name in ("flag", "bias_size", "bias_share", "fva_loss", "error"):
        np.testing.assert_array_equal(
            getattr(by_error, name), getattr(by_bias, name)[to_bias], err_msg=name
        )
    np.testing.assert_array_equal(
        by_error.ranked.iloc[by_error.position]["item"].to_numpy(),
        by_error.portfolio.keys["item"].to_numpy(),
    )
    # Not copied, so read-only: a write would change the scorecard itself.
    with pytest.raises(ValueError):
        by_error.fva_loss[0] = 0.0


def test_a_reload_gives_the_state_a_fresh_session_reads(
    tmp_path: Path, lake: tuple[Path, Path]
) -> None:
    ledger = Ledger.open(tmp_path / "ledger.sqlite")
    first = stored_session(lake, ledger)
    picked = [int(s) for s in first.order("error")[:3]]
    fetch(first, picked)
    for series, outcome in zip(picked, ("adjusted", "no_change", "handed_off"), strict=True):
        event = first.commit_decision(
            series,
            outcome=outcome,
            root_cause="unknown",
            adjustment="x0.8" if outcome == "adjusted" else None,
        )
        first.apply_event(event)
    fresh = stored_session(lake, ledger)
    # What the ledger no longer says (as after another reviewer's undo) goes on a reload.
    spare = int(first.order("error")[-1])
    first.decided_by[spare], first.past_outcome[spare], first.carried[spare] = "x", "x", True
    first.reload()
    for name in ("outcome", "version", "decided_by", "group_of", "past_outcome", "carried"):
        np.testing.assert_array_equal(getattr(first, name), getattr(fresh, name), err_msg=name)
    assert first.progress() == fresh.progress()


def _damaged(card: Path, tmp_path: Path, change) -> Path:
    """A copy of the scorecard folder with its description changed by ``change``."""
    import json
    import shutil

    copy = tmp_path / f"damaged-{len(list(tmp_path.iterdir()))}"
    shutil.copytree(card, copy)
    path = copy / card_folder.DESCRIPTION
    described = json.loads(path.read_text())
    change(described)
    path.write_text(json.dumps(described))
    return copy


@pytest.mark.parametrize(
    "change",
    [
        lambda d: d.pop("parts"),
        lambda d: d["scored"].update(extra=1),
        lambda d: d["scored"].update(window="13"),
        lambda d: d["plan"].update(actual_cols=[]),
        lambda d: d["plan"].update(actual_cols=[10**6]),
        lambda d: d["plan"].update(columns=["nope"]),
        lambda d: d["plan"].update(periods=["2026-13-45"]),
        lambda d: d["plan"].update(lags=None),
        lambda d: d.update(parts="x"),
    ],
)
def test_a_damaged_description_is_refused_by_name(
    tmp_path: Path, lake: tuple[Path, Path], change
) -> None:
    damaged = _damaged(lake[1], tmp_path, change)
    with pytest.raises(LoadError, match="description is damaged"):
        on_demand.open_review(lake[0], damaged, ScoreSettings())


def test_scorecard_files_are_checked_against_the_description(
    tmp_path: Path, lake: tuple[Path, Path]
) -> None:
    import shutil

    copy = tmp_path / "card"
    shutil.copytree(lake[1], copy)
    shutil.copy(copy / "part-00000.parquet", copy / "part-00001.parquet")
    with pytest.raises(LoadError, match="files hold"):
        on_demand.open_review(lake[0], copy, ScoreSettings())
    (copy / "part-00001.parquet").write_bytes(b"not parquet")
    with pytest.raises(LoadError, match="cannot read this scorecard file"):
        on_demand.open_review(lake[0], copy, ScoreSettings())


def test_another_columns_mapping_is_refused(lake: tuple[Path, Path]) -> None:
    with pytest.raises(LoadError, match="--columns differs"):
        on_demand.open_review(*lake, ScoreSettings(), columns={"demand": "other"})


def test_a_dataset_changed_after_opening_is_not_read(
    tmp_path: Path, lake: tuple[Path, Path]
) -> None:
    import os
    import shutil

    folder = tmp_path / "lake"
    shutil.copytree(lake[0], folder)
    card = stored_scorecard(folder, tmp_path / "card")
    review = on_demand.open_review(folder, card, ScoreSettings())
    part = sorted(folder.glob("*.parquet"))[1]
    stat = part.stat()
    os.utime(part, ns=(stat.st_atime_ns, stat.st_mtime_ns + 10**9))
    with pytest.raises(LoadError, match="has changed since"):
        review.histories.fetch([0])
    assert not review.histories.has(0)


def test_the_reopen_cache_keeps_the_scorecard_and_gives_it_back(
    tmp_path: Path, lake: tuple[Path, Path]
) -> None:
    import os
    import shutil

    folder = tmp_path / "cache"
    card = tmp_path / "card"
    shutil.copytree(lake[1], card)
    first = on_demand.open_review(lake[0], card, ScoreSettings(), cache_folder=folder)
    assert not first.cached and first.keep is not None
    first.keep(lambda: False)
    again = on_demand.open_review(lake[0], card, ScoreSettings(), cache_folder=folder)
    assert again.cached and again.keep is None
    pd.testing.assert_frame_equal(again.card, first.card)
    assert again.portfolio.keys.equals(first.portfolio.keys)
    # A scorecard made again (a file of it rewritten) is read from its files, and its older
    # entry goes when the new one is kept.
    part = card / "part-00000.parquet"
    stat = part.stat()
    os.utime(part, ns=(stat.st_atime_ns, stat.st_mtime_ns + 10**9))
    third = on_demand.open_review(lake[0], card, ScoreSettings(), cache_folder=folder)
    assert not third.cached and third.keep is not None
    third.keep(lambda: False)
    assert len([p for p in folder.iterdir() if not p.name.startswith(".")]) == 1
    # A limit smaller than the table keeps nothing.
    small = on_demand.open_review(lake[0], card, ScoreSettings(), cache_folder=tmp_path / "s")
    assert small.keep is not None
    small.keep(lambda: False)
    tiny = on_demand.open_review(
        lake[0], card, ScoreSettings(), cache_folder=tmp_path / "t", cache_limit=10
    )
    assert tiny.keep is not None
    tiny.keep(lambda: False)
    assert not on_demand.open_review(
        lake[0], card, ScoreSettings(), cache_folder=tmp_path / "t", cache_limit=10
    ).cached
