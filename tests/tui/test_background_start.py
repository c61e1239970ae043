"""The review start shows the list before the background pieces (suggestions, repeat offenders,
the search index) are in; keys typed meanwhile act correctly or say what they wait for. A
reopen comes from the reopen cache, unless ``--no-cache``.

The background step is held back by a gate in these tests, so the list is certainly shown
before it ends (on a million series it takes seconds: docs/performance.md).
"""

from __future__ import annotations

import shutil
import threading
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from textual.widgets import Input

from sample.cycles import build_cycles
from tests.tui.conftest import burst, wait_for, wait_listed, wait_loaded
from triage.core import cache, files, history, vocabulary
from triage.core.review import ReviewSession
from triage.tui.app import Options, TriageApp
from triage.tui.messages import BackgroundDone, BackgroundNote, BackgroundStep
from triage.tui.screens.decision import DecisionScreen
from triage.tui.widgets.series_list import SeriesList

#: ``ReviewSession.background`` itself, for the expected result while the gate holds it.
UNGATED_BACKGROUND = ReviewSession.background


@pytest.fixture(scope="module")
def scenario(tmp_path_factory: pytest.TempPathFactory):
    return build_cycles(tmp_path_factory.mktemp("cycles"))


@pytest.fixture
def gate(monkeypatch: pytest.MonkeyPatch) -> threading.Event:
    """Holds ``ReviewSession.background`` until set (set at the end in any case)."""
    opened = threading.Event()
    original = ReviewSession.background

    def held(self, step=None):
        opened.wait(timeout=60)
        return original(self, step)

    monkeypatch.setattr(ReviewSession, "background", held)
    yield opened
    opened.set()


def latest_week(scenario, tmp_path: Path) -> TriageApp:
    """The review screens on the scenario's last weekly file, with a copy of its ledger."""
    ledger = tmp_path / "ledger.sqlite"
    shutil.copy(scenario.ledger, ledger)
    return TriageApp(Options(portfolio=scenario.files[-1], ledger=ledger, reviewer="ana"))


def summary(app: TriageApp) -> str:
    return str(app.query_one("#summary").render())


async def test_list_first_then_columns_fill_in(scenario, gate, tmp_path: Path) -> None:
    app = latest_week(scenario, tmp_path)
    async with app.run_test(size=(170, 48)) as pilot:
        await wait_listed(app, pilot)
        session = app.session
        series_list = app.query_one(SeriesList)
        await wait_for(pilot, lambda: "computing" in summary(app), "the summary's progress")
        # The whole ranked list is shown while the background step is held.
        assert not session.ready
        assert len(series_list.order) == session.portfolio.n_series
        top = int(series_list.order[0])
        assert app._format_row(top)["worst"][0] == "…"
        assert "still computing" in str(app.query_one("#detail-text").render())

        gate.set()
        await wait_for(pilot, lambda: session.ready, "the background pieces")
        await wait_for(pilot, lambda: "computing" not in summary(app), "the summary to settle")
        # The repeat-offender column now holds what history.repeat_offenders says of the
        # ledger (the worst set stored by this start included).
        n, m = session.repeat_nm
        expected = history.repeat_offenders(
            session.portfolio,
            n=n,
            m=m,
            target_share=session.target_share,
            window=session.window,
            ledger=session.ledger,
        )
        assert expected["repeat"].any()  # the scenario has repeat offenders
        np.testing.assert_array_equal(session.repeat, expected["repeat"].to_numpy())
        cycles = sum(c.startswith("worst_") for c in expected.columns)
        for series in np.flatnonzero(expected["repeat"].to_numpy())[:5]:
            times = int(expected["times_in_worst"].iat[series])
            assert app._format_row(int(series))["worst"][0] == f"R {times}/{cycles}"
        assert session.ledger.worst_sets([session.cycle])  # stored in the background


async def test_keys_during_the_background_step(scenario, gate, tmp_path: Path) -> None:
    app = latest_week(scenario, tmp_path)
    async with app.run_test(size=(170, 48)) as pilot:
        await wait_listed(app, pilot)
        session = app.session
        series_list = app.query_one(SeriesList)
        # Cursor moves and a quick decision do not wait for the background step.
        burst(app, ["down", "down", "up"])
        await wait_for(pilot, lambda: series_list.cursor == 1, "the cursor moves")
        series = int(series_list.order[1])
        burst(app, ["h"])
        await wait_for(
            pilot, lambda: session.outcome[series] == vocabulary.HANDED_OFF, "the decision"
        )
        # Taking the suggestion says it is not ready rather than acting on an empty one.
        burst(app, ["s"])
        await wait_for(pilot, lambda: "still being computed" in app.status_text, "the refusal")
        # A text filter waits for the search index: an empty list meanwhile, never the
        # unfiltered one.
        needle = str(session.portfolio.keys["item"].iat[0])[:4].upper()
        burst(app, ["slash", *needle, "enter"])
        await wait_for(pilot, lambda: "(waiting)" in summary(app), "the waiting filter")
        assert len(series_list.order) == 0
        assert not session.ready

        gate.set()
        await wait_for(pilot, lambda: len(series_list.order) > 0, "the filter to apply")
        keys = session.portfolio.keys.astype(str)
        text = keys["item"]
        for name in keys.columns[1:]:
            text = text + "\x1f" + keys[name]
        matching = np.flatnonzero(text.str.casefold().str.contains(needle.casefold()).to_numpy())
        assert sorted(series_list.order.tolist()) == matching.tolist()
        assert "(waiting)" not in summary(app)


async def test_a_decision_dialog_opened_early_shows_the_suggestion_when_ready(
    scenario, gate, tmp_path: Path
) -> None:
    app = latest_week(scenario, tmp_path)
    async with app.run_test(size=(170, 48)) as pilot:
        await wait_listed(app, pilot)
        session = app.session
        series_list = app.query_one(SeriesList)
        # The worst series with a suggestion once computed (adjust.suggest on its measures).
        expected = UNGATED_BACKGROUND(session)
        with_one = [int(s) for s in series_list.order if expected.suggest_spec[int(s)]]
        assert with_one  # the scenario has biased series
        series_list.cursor = int(np.flatnonzero(series_list.order == with_one[0])[0])
        await pilot.pause()
        burst(app, ["enter"])
        await wait_for(pilot, lambda: isinstance(app.screen, DecisionScreen), "the decision dialog")
        field = app.screen.query_one("#decision-adjust", Input)
        assert "still computing" in field.placeholder

        gate.set()
        await wait_for(pilot, lambda: session.ready, "the background pieces")
        spec = expected.suggest_spec[with_one[0]]
        await wait_for(pilot, lambda: f"(suggested: {spec})" in field.placeholder, "the suggestion")
        assert "still computing" not in field.placeholder


async def open_and_close(options: Options, *, until=lambda app: True) -> tuple:
    app = TriageApp(options)
    async with app.run_test(size=(170, 48)) as pilot:
        await wait_loaded(app, pilot)
        await wait_for(pilot, lambda: until(app), "the condition")
        session = app.session
        return session, app.query_one(SeriesList).order.copy(), app


def entries(folder: Path) -> list[Path]:
    if not folder.exists():
        return []
    return [p for p in folder.iterdir() if (p / cache.META).is_file()]


async def test_reopen_comes_from_the_cache(scenario, tmp_path: Path) -> None:
    folder = tmp_path / "cache"
    ledger = tmp_path / "ledger.sqlite"
    shutil.copy(scenario.ledger, ledger)
    options = Options(
        portfolio=scenario.files[-1], ledger=ledger, reviewer="ana", cache_folder=folder
    )
    first, order, _ = await open_and_close(options, until=lambda app: bool(entries(folder)))
    assert not isinstance(first.portfolio.demand, np.memmap)
    again, order_again, _ = await open_and_close(options)
    assert isinstance(again.portfolio.demand, np.memmap)  # from the cache, memory-mapped
    np.testing.assert_array_equal(order_again, order)
    pd.testing.assert_frame_equal(again.review_cycle.card, first.review_cycle.card)
    np.testing.assert_array_equal(again.repeat, first.repeat)
    assert again.portfolio.fingerprint == files.sha256_of(scenario.files[-1])


async def test_no_cache_reads_the_file_and_keeps_nothing(scenario, tmp_path: Path) -> None:
    folder = tmp_path / "cache"
    options = Options(
        portfolio=scenario.files[-1], reviewer="ana", cache_folder=folder, cache=False
    )
    _, _, app = await open_and_close(
        options, until=lambda app: not [w for w in app.workers if w.name == "background"]
    )
    assert not isinstance(app.session.portfolio.demand, np.memmap)
    assert entries(folder) == []


async def test_background_messages_after_the_app_closed_are_ignored(scenario, gate) -> None:
    """Quitting while the background step runs: its progress and result may still arrive while
    the screens are gone; they must not raise (a crash at quit)."""
    app = TriageApp(Options(portfolio=scenario.files[-1], reviewer="ana", cache=False))
    async with app.run_test(size=(170, 48)) as pilot:
        await wait_listed(app, pilot)
        session = app.session
    assert not app.screen_stack
    gate.set()
    done = session.background()
    app._background_step(BackgroundStep(session, 1, 3, "suggestions"))
    app._background_done(BackgroundDone(session, done))
    app._background_note(BackgroundNote("The reopen cache was not written: test"))
    assert app.crashed is None


async def test_the_complete_session_is_kept_out_of_full_collections(
    scenario, tmp_path: Path
) -> None:
    # gc.freeze / gc.get_freeze_count (Python documentation, module gc): once the background
    # pieces are in, the session's objects are frozen; they go back when the app closes.
    import gc

    ledger = tmp_path / "ledger.sqlite"
    shutil.copy(scenario.ledger, ledger)
    gc.unfreeze()
    app = TriageApp(Options(portfolio=scenario.files[-1], ledger=ledger, reviewer="ana"))
    async with app.run_test(size=(170, 48)) as pilot:
        await wait_loaded(app, pilot)
        await wait_for(pilot, lambda: gc.get_freeze_count() > 0, "the heap frozen")
    assert gc.get_freeze_count() == 0


async def test_background_messages_after_the_screens_are_gone_are_ignored(
    scenario, gate, tmp_path: Path
) -> None:
    # Closing the app removes the main screen's widgets while the background worker may still
    # post its steps, its result or a note about the reopen cache; they used to crash the app
    # on its way out (NoMatches for the series list). The removal is done by hand here, so the
    # messages certainly come after it.
    app = latest_week(scenario, tmp_path)
    async with app.run_test(size=(120, 40)) as pilot:
        await wait_listed(app, pilot)
        session = app.session
        await app.query_one(SeriesList).remove()
        app.post_message(BackgroundStep(session, 1, 3, "repeat offenders"))
        app.post_message(BackgroundNote("The reopen cache was not written: disk full"))
        gate.set()
        done = UNGATED_BACKGROUND(session)
        app.post_message(BackgroundDone(session, done))
        app._show_detail(0)
        await pilot.pause(0.2)
        assert app.is_running
        assert not session.ready  # the result was not applied to a closing screen
    assert app.return_code in (None, 0)
