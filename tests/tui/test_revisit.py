"""A decision is safe to revisit: the dialog opens on what the ledger holds, whoever wrote it.

Reopening the app, a second reviewer, an unchanged save and two quick decisions on one series
typed at full speed; every check reads the ledger file back.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from textual.widgets import Input, OptionList, TextArea

from tests.tui.conftest import burst, wait_for, wait_loaded
from triage.core.ledger import Ledger
from triage.tui.app import Options, TriageApp
from triage.tui.screens.decision import DecisionScreen
from triage.tui.screens.dialogs import ConfirmScreen
from triage.tui.widgets.series_list import SeriesList

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample" / "portfolio.csv"
NOTE = "Promo at the [b]chain[/b]\nsecond line"


@pytest.fixture
def portfolio(tmp_path: Path) -> Path:
    target = tmp_path / "week.csv"
    shutil.copy(SAMPLE, target)
    return target


def history(path: Path) -> list:
    with Ledger.open(path, read_only=True) as ledger:
        return ledger.history()


def app_for(portfolio: Path, reviewer: str) -> TriageApp:
    return TriageApp(
        Options(portfolio=portfolio, reviewer=reviewer, ledger=portfolio.with_name("l.sqlite"))
    )


async def decide_first(portfolio: Path, reviewer: str = "ana") -> tuple[str, str]:
    """Session 1: adjust the worst offender with a cause and a note, then quit."""
    app = app_for(portfolio, reviewer)
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        session = app.session
        assert session is not None
        series = app.query_one(SeriesList).current
        burst(app, ["3", "a", *"x0.9", "tab", *NOTE.replace("\n", " "), "ctrl+s"])
        await wait_for(pilot, lambda: session.outcome[series] == "adjusted", "the first save")
        return session.key(series)


def dialog_fields(dialog: DecisionScreen) -> tuple[str, str, str, str]:
    outcome = dialog.query_one("#decision-outcome", OptionList)
    cause = dialog.query_one("#decision-cause", OptionList)
    return (
        str(outcome.get_option_at_index(outcome.highlighted or 0).id),
        str(cause.get_option_at_index(cause.highlighted or 0).id),
        dialog.query_one("#decision-adjust", Input).value,
        dialog.query_one("#decision-note", TextArea).text,
    )


async def test_dialog_reopens_on_the_recorded_decision_and_unchanged_save_records_nothing(
    portfolio: Path,
) -> None:
    await decide_first(portfolio)
    (first,) = history(portfolio.with_name("l.sqlite"))
    app = app_for(portfolio, "ana")
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        await pilot.press("enter")
        await wait_for(pilot, lambda: isinstance(app.screen, DecisionScreen), "the dialog")
        dialog = app.screen
        assert isinstance(dialog, DecisionScreen)
        assert dialog_fields(dialog) == (
            "adjusted",
            "stock_out",
            first.adjustment,
            NOTE.replace("\n", " "),
        )
        said = str(dialog.query_one("#decision-current").render())
        assert "current decision: Forward forecast adjusted" in said
        assert "by ana at" in said and "UTC" in said
        await pilot.press("ctrl+s")
        await wait_for(pilot, lambda: not isinstance(app.screen, DecisionScreen), "close")
        assert app.status_text == "nothing changed: nothing recorded"
    assert len(history(portfolio.with_name("l.sqlite"))) == 1


async def test_replacing_another_reviewers_decision_asks_and_names_them(
    portfolio: Path,
) -> None:
    key = await decide_first(portfolio, reviewer="[b]ana[/b]")
    ledger = portfolio.with_name("l.sqlite")
    app = app_for(portfolio, "bob")
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        session = app.session
        assert session is not None
        await pilot.press("enter")
        await wait_for(pilot, lambda: isinstance(app.screen, DecisionScreen), "the dialog")
        # It opens on the adjustment (the recorded outcome is "adjusted"); tab reaches the note.
        burst(app, ["tab", *" and more", "ctrl+s"])
        await wait_for(pilot, lambda: isinstance(app.screen, ConfirmScreen), "the question")
        question = str(app.screen.query_one(".dialog-title").render())
        assert "Replace the decision recorded by [b]ana[/b]" in question
        await pilot.press("n")
        await wait_for(pilot, lambda: isinstance(app.screen, DecisionScreen), "back")
        assert len(history(ledger)) == 1  # "no" saves nothing; the entry stays on screen
        await pilot.press("ctrl+s")
        await wait_for(pilot, lambda: isinstance(app.screen, ConfirmScreen), "the question")
        await pilot.press("y")
        series = session.find(*key)
        assert series is not None
        await wait_for(pilot, lambda: session.decided_by[series] == "bob", "bob's save")
        # A quick decision over bob's own decision asks nothing; over ana's it would.
        await pilot.press("c")
        await wait_for(pilot, lambda: session.outcome[series] == "no_change", "quick save")
    events = history(ledger)
    assert [e.reviewer for e in events] == ["[b]ana[/b]", "bob", "bob"]
    assert events[1].note == NOTE.replace("\n", " ") + " and more"
    assert events[1].adjustment == events[0].adjustment


async def test_two_quick_decisions_on_one_series_at_full_speed_both_land(
    portfolio: Path,
) -> None:
    app = app_for(portfolio, "ana")
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        session = app.session
        assert session is not None
        series = app.query_one(SeriesList).current
        burst(app, ["c", "h", "u", "l"])
        await wait_for(pilot, lambda: app.writes_pending == 0, "the saves")
        await wait_for(pilot, lambda: session.outcome[series] == "deferred", "the last one")
    events = history(portfolio.with_name("l.sqlite"))
    assert [(e.kind, e.outcome, e.version) for e in events] == [
        ("decision", "no_change", 1),
        ("decision", "handed_off", 2),
        ("undo", None, 3),
        ("decision", "deferred", 4),
    ]


async def test_every_field_of_the_dialog_is_reachable_at_80x24(portfolio: Path) -> None:
    app = app_for(portfolio, "ana")
    async with app.run_test(size=(80, 24)) as pilot:
        await wait_loaded(app, pilot)
        await pilot.press("enter")
        await wait_for(pilot, lambda: isinstance(app.screen, DecisionScreen), "the dialog")
        dialog = app.screen
        screen_region = dialog.region
        seen = []
        for _ in range(4):
            await pilot.pause(0.1)
            focused = dialog.focused
            assert focused is not None
            region = focused.region
            # Visible: inside the 80x24 screen, at least three rows (border and one line).
            assert region.height >= 3 and region.width >= 20, (focused.id, region)
            assert screen_region.contains_region(region), (focused.id, region)
            seen.append(focused.id)
            await pilot.press("tab")
        assert seen == ["decision-outcome", "decision-cause", "decision-adjust", "decision-note"]
        # The keys line (save hint) can be scrolled to and read.
        hint = dialog.query_one(".dialog-keys")
        hint.scroll_visible(animate=False)
        await pilot.pause(0.1)
        assert screen_region.contains_region(hint.region)
        assert "ctrl+s: save" in str(hint.render())
