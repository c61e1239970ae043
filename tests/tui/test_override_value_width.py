"""The override value screen (``v``) is readable at 80 x 24 and still whole at 200 x 50.

QA finding: at 80 columns the screen's table headers were cut ("peri…", "remo…", "(uni…").
Each table now shows its full headers where every word and figure fits, else a compact table
with short headers (docs/history.md, "triage overrides"). The check reads what the compositor
draws inside the dialog, scrolled from top to bottom: no "…" (Rich's mark of a cut cell) and
every header word whole. 80 x 24 is the classic terminal size (VT100; common practice as the
smallest size a terminal tool supports).
"""

from __future__ import annotations

import pytest
from textual.containers import VerticalScroll

from sample.cycles import build_cycles
from tests.tui.conftest import wait_for, wait_loaded
from triage.tui.app import Options, TriageApp
from triage.tui.screens.overrides import OverridesScreen

#: Header words of the compact table, and of the full one (priced file, with forecast_stat).
COMPACT = ["periods", "share", "helped", "removed", "(units)", "(value)", "orig.", "error", "beat"]
FULL = ["periods", "decisions", "helped", "share", "removed", "(units)", "original", "stat"]


@pytest.fixture(scope="module")
def scenario(tmp_path_factory: pytest.TempPathFactory):
    return build_cycles(tmp_path_factory.mktemp("cycles"), competing=True)


async def _dialog_lines(size: tuple[int, int], scenario) -> list[str]:
    """Every line drawn in the dialog's scrolled body, from top to bottom."""
    app = TriageApp(Options(portfolio=scenario.files[-1], ledger=scenario.ledger, reviewer="ana"))
    lines: list[str] = []
    async with app.run_test(size=size) as pilot:
        await wait_loaded(app, pilot)
        await pilot.press("v")
        await wait_for(pilot, lambda: isinstance(app.screen, OverridesScreen), "the screen")
        await pilot.pause()
        body = app.screen.query_one(VerticalScroll)
        y = 0
        while True:
            body.scroll_to(y=y, animate=False)
            await pilot.pause()
            region = body.content_region
            strips = app.screen._compositor.render_strips()
            for row in range(region.y, region.bottom):
                strip = strips[row].crop(region.x, region.right)
                lines.append("".join(segment.text for segment in strip))
            if body.scroll_y >= body.max_scroll_y:
                break
            y = int(body.scroll_y) + region.height
    return lines


def _words(lines: list[str]) -> set[str]:
    return {word for line in lines for word in line.split()}


async def test_headers_are_whole_at_80_by_24(scenario) -> None:
    lines = await _dialog_lines((80, 24), scenario)
    assert not [line for line in lines if "…" in line]
    assert set(COMPACT) <= _words(lines), set(COMPACT) - _words(lines)
    # Every grouping has its table, the figures of the overall row included.
    assert sum("by direction" in line for line in lines) == 1


async def test_full_headers_stay_at_200_by_50(scenario) -> None:
    lines = await _dialog_lines((200, 50), scenario)
    assert not [line for line in lines if "…" in line]
    assert set(FULL) <= _words(lines), set(FULL) - _words(lines)


async def test_one_override_is_counted_in_the_singular(tmp_path) -> None:
    # Found in a terminal run: "1 overridden periods from 1 decisions now have actuals".
    import shutil

    from triage.core.cycle import ReviewCycle
    from triage.core.ledger import FOLDER_LEDGER, Ledger
    from triage.core.read import read_portfolio
    from triage.core.review import ReviewSession

    weeks = build_cycles(tmp_path / "cycles").files
    folder = tmp_path / "week"
    folder.mkdir()
    shutil.copy(weeks[-2], folder)
    ledger = Ledger.open(folder / FOLDER_LEDGER)
    cycle = ReviewCycle(read_portfolio(folder / weeks[-2].name), ledger)
    session = ReviewSession(cycle, reviewer="ana")
    session.commit_decision(
        int(session.error_order[0]), outcome="adjusted", root_cause="unknown", adjustment="1: x0.5"
    )
    ledger.close()
    shutil.copy(weeks[-1], folder)
    app = TriageApp(
        Options(portfolio=folder / weeks[-1].name, ledger=folder / FOLDER_LEDGER, reviewer="ana")
    )
    async with app.run_test(size=(200, 50)) as pilot:
        await wait_loaded(app, pilot)
        await pilot.press("v")
        await wait_for(pilot, lambda: isinstance(app.screen, OverridesScreen), "the screen")
        await pilot.pause()
        strips = app.screen._compositor.render_strips()
        drawn = " ".join("".join(segment.text for segment in strip) for strip in strips)
        text = " ".join(drawn.replace("█", " ").split())
        assert "1 overridden period from 1 decision now has actuals" in text
    # The report says it in the same number.
    from triage.cli import main

    report = tmp_path / "report.html"
    week = str(folder / weeks[-1].name)
    assert main(["report", week, "--ledger", str(folder / FOLDER_LEDGER), "--to", str(report)]) == 0
    assert "1 overridden period with actuals, from 1 decision;" in report.read_text()
