"""Keyboard flow: go to a series by item alone, auto-advance, a sticky root cause, ctrl+c."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from tests.tui.conftest import burst, wait_for, wait_loaded
from triage.core.ledger import Ledger
from triage.tui.app import Options, TriageApp
from triage.tui.screens.dialogs import ChooseScreen, ConfirmScreen
from triage.tui.widgets.series_list import SeriesList

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture
def portfolio(tmp_path: Path) -> Path:
    target = tmp_path / "week.csv"
    shutil.copy(ROOT / "sample" / "portfolio.csv", target)
    return target


def make(portfolio: Path, **kw: object) -> TriageApp:
    return TriageApp(
        Options(portfolio=portfolio, reviewer="ana", ledger=portfolio.with_name("l.sqlite"), **kw)
    )


async def test_go_to_an_item_ignores_case_and_offers_its_locations(portfolio: Path) -> None:
    app = make(portfolio)
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        session = app.session
        assert session is not None
        series_list = app.query_one(SeriesList)
        burst(app, ["g", *"no-such-item", "enter"])
        await wait_for(pilot, lambda: "no series" in app.status_text, "the miss")
        # The sample's GF-10213 is stocked in three warehouses (sample/README.md).
        burst(app, ["g", *"gf-10213", "enter"])
        await wait_for(pilot, lambda: isinstance(app.screen, ChooseScreen), "the picker")
        assert app.status_text == ""  # the earlier miss is cleared once something is found
        burst(app, ["down", "enter"])
        await wait_for(pilot, lambda: not isinstance(app.screen, ChooseScreen), "the pick")
        await pilot.pause(0.1)
        found = session.find_all("GF-10213")
        assert len(found) == 3 and series_list.current == found[1]
        # item @ location, any case, goes straight there.
        item, location = session.key(int(found[2]))
        burst(app, ["g", *f"{item.lower()} @ {location.lower()}", "enter"])
        await wait_for(pilot, lambda: series_list.current == found[2], "the jump")


async def test_auto_advance_and_a_sticky_root_cause(portfolio: Path) -> None:
    app = make(portfolio, auto_advance=True)
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        series_list = app.query_one(SeriesList)
        first_three = [int(s) for s in series_list.order[:3]]
        burst(app, ["4", "c", "h", "l"])  # cause 4 once, then three quick decisions
        await wait_for(pilot, lambda: series_list.cursor == 3, "three advances")
        await wait_for(pilot, lambda: app.writes_pending == 0, "the saves")
        summary = str(app.query_one("#summary").render())
        assert "cause New item ramp-up" in summary and "auto-advance" in summary
        burst(app, ["N"])
        await pilot.pause(0.2)
        assert not app.auto_advance
    session = app.session
    assert session is not None
    with Ledger.open(portfolio.with_name("l.sqlite"), read_only=True) as ledger:
        events = ledger.history()
    assert [session.find(e.item, e.location) for e in events] == first_three
    assert [(e.outcome, e.root_cause) for e in events] == [
        ("no_change", "new_item"),
        ("handed_off", "new_item"),
        ("deferred", "new_item"),
    ]


async def test_ctrl_c_quits_and_asks_inside_the_dialog(portfolio: Path) -> None:
    app = make(portfolio)
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        burst(app, ["a", *"+5%", "ctrl+c"])
        await wait_for(pilot, lambda: isinstance(app.screen, ConfirmScreen), "the question")
        await pilot.press("n")
        await pilot.pause(0.2)
        assert app.is_running
        await pilot.press("escape", "ctrl+c")
        await wait_for(pilot, lambda: not app.is_running, "the quit", tries=100)
