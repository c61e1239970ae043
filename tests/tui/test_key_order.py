"""Keys typed at full speed land where they were typed, and a save reads every field's final text.

The keys go in as one burst (``conftest.burst``), the way a terminal delivers a fast typist or a
paste; the ledger file is read back afterwards and every field must be exactly as typed.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from tests.tui.conftest import PASTE, burst, wait_for, wait_loaded
from triage.core.ledger import Ledger
from triage.tui.app import Options, TriageApp
from triage.tui.screens.decision import DecisionScreen
from triage.tui.widgets.series_list import SeriesList

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample" / "portfolio.csv"


@pytest.fixture
def portfolio(tmp_path: Path) -> Path:
    target = tmp_path / "week.csv"
    shutil.copy(SAMPLE, target)
    return target


def events_in(path: Path) -> list:
    with Ledger.open(path, read_only=True) as ledger:
        return ledger.history()


async def test_ten_adjustments_with_notes_typed_in_one_burst(portfolio: Path) -> None:
    ledger = portfolio.with_name("burst.sqlite")
    app = TriageApp(Options(portfolio=portfolio, reviewer="ana", ledger=ledger))
    typed = []
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        session = app.session
        assert session is not None
        order = app.query_one(SeriesList).order[:10]
        keys: list[str] = []
        for i, series in enumerate(order):
            spec, note = f"+{i + 1}%", f"fast note number {i} with [/] several words in it"
            typed.append((session.key(series), str(session.preview(series, spec).adjustment), note))
            keys += ["a", *spec, "tab", *note, "ctrl+s", "j"]
        burst(app, keys)
        await wait_for(
            pilot, lambda: all(session.outcome[s] for s in order), "ten saves", tries=600
        )
        assert not isinstance(app.screen, DecisionScreen)
    saved = [((e.item, e.location), e.adjustment, e.note) for e in events_in(ledger)]
    assert saved == typed
    assert {e.outcome for e in events_in(ledger)} == {"adjusted"}


async def test_pasted_long_note_then_save_with_no_pause(portfolio: Path) -> None:
    ledger = portfolio.with_name("paste.sqlite")
    app = TriageApp(Options(portfolio=portfolio, reviewer="ana", ledger=ledger))
    note = ("Promo at the garden centre chain, ünïcödé 😀 [b]not bold[/b]\n" * 40)[:2000]
    assert len(note) == 2000
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        session = app.session
        assert session is not None
        series = app.query_one(SeriesList).current
        # enter opens on the outcome list; three tabs reach the note.
        burst(app, ["enter", "tab", "tab", "tab", PASTE + note, "ctrl+s"])
        await wait_for(pilot, lambda: session.outcome[series] != "", "the save")
    (event,) = events_in(ledger)
    assert event.note == note
    assert event.outcome == "no_change"


async def test_keys_after_a_prompt_go_to_the_list(portfolio: Path) -> None:
    """The filter prompt closes on enter; the keys after it move the list, not the prompt."""
    app = TriageApp(Options(portfolio=portfolio, reviewer="ana", ledger=portfolio.with_name("l")))
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        burst(app, ["slash", *"STH", "enter", "j", "j"])
        await wait_for(pilot, lambda: app.query_one(SeriesList).cursor == 2, "two moves")
        assert app.text_filter == "STH"
