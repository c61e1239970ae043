"""Screens speak a planner's words: value added against naive, measure meanings, no codes."""

from __future__ import annotations

import re
import shutil
from pathlib import Path

from textual.containers import VerticalScroll

from tests.tui.conftest import wait_for, wait_loaded
from triage.core import words
from triage.core.vocabulary import DEFAULT_ROOT_CAUSES, OUTCOMES, Choice
from triage.tui import format as fmt
from triage.tui.app import Options, TriageApp
from triage.tui.screens.dialogs import HelpScreen

ROOT = Path(__file__).resolve().parents[2]
CODES = [c.code for c in OUTCOMES if "_" in c.code] + [
    c.code for c in DEFAULT_ROOT_CAUSES if "_" in c.code
]


def test_value_added_in_words() -> None:
    # FVA = error removed against naive (Gilliland 2010): positive means the forecast is better.
    assert words.against_naive(23.44, " a week") == "beat naive by 23.4 units a week"
    assert words.against_naive(-5.0) == "5.0 units worse than naive"
    assert words.against_naive(0.01) == "as good as naive"
    assert "units and value disagree" in words.mix_effect(10.0, -3.0)
    assert words.mix_effect(10.0, 3.0) == ""


async def test_detail_pane_and_help_use_words_and_no_codes(tmp_path: Path) -> None:
    portfolio = tmp_path / "week.csv"
    shutil.copy(ROOT / "sample" / "portfolio.csv", portfolio)
    app = TriageApp(Options(portfolio=portfolio, reviewer="ana", ledger=tmp_path / "l.sqlite"))
    async with app.run_test(size=(200, 50)) as pilot:
        await wait_loaded(app, pilot)
        session = app.session
        assert session is not None
        # One decision of each outcome with an underscore code and a cause with one.
        for keys in (["3", "h"], ["j", "4", "l"], ["j", "c"]):
            await pilot.press(*keys)
            await wait_for(pilot, lambda: app.writes_pending == 0, "the save")
        await pilot.press("k")
        await pilot.pause(0.3)
        detail = str(app.query_one("#detail-text").render())
        assert re.search(r"beat naive by [\d,.]+ units a week|worse than naive", detail), detail
        assert "MASE" in detail and words.MEANINGS["MASE"] in detail
        assert words.MEANINGS["sign test p"][:30] in detail
        screen = app.export_screenshot()
        for code in CODES:
            assert code not in screen, code
        await pilot.press("question_mark")
        await wait_for(pilot, lambda: isinstance(app.screen, HelpScreen), "help")
        help_screen = app.screen
        help_screen.query_one(VerticalScroll).scroll_end(animate=False)
        await pilot.pause(0.3)
        help_text = help_screen.app.export_screenshot().replace("&#160;", " ")
        assert "Measures" in help_text and "AvgRelMAE" in help_text


def test_screen_cause_label_is_made_visible() -> None:
    # A configured label is shown through the terminal sanitiser like every other text, so a
    # right-to-left override in it cannot reorder the line it is shown on.
    causes = (Choice("odd", "Odd \u202eelbat"), Choice("plain", "Plain"))
    assert fmt.cause_label("odd", causes) == "Odd \ufffdelbat"
    assert fmt.cause_label("plain", causes) == "Plain"
    assert fmt.cause_label("gone\x1b", causes) == "gone\u241b"
