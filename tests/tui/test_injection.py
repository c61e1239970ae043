"""Hostile text in ids, attributes and notes is shown literally and never acts.

Rich markup in data can crash a widget (``[/]``) or plant an action (``[@click=app.quit]``);
escape sequences can restyle the terminal or set its title (docs/sources.md §7.1-§7.2, measured
with Rich 15 / Textual 8.2.8).
"""

from __future__ import annotations

import csv
from pathlib import Path

from tests.tui.conftest import wait_loaded
from triage.core.ledger import Ledger
from triage.tui.app import Options, TriageApp
from triage.tui.widgets.series_list import SeriesList

HOSTILE_IDS = [
    "[bold]BOLD",
    "[/]",
    "[@click=app.quit]CLICK[/]",
    "red\x1b[31mRED",
    "title\x1b]2;PWNED\x07x",
    "日本語-😀-e\u0301",
    ":warning:",
]


def hostile_portfolio(tmp_path: Path) -> Path:
    path = tmp_path / "hostile.csv"
    weeks = ["2026-10-05", "2026-10-12", "2026-10-19", "2026-10-26", "2026-11-02"]
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["item", "period", "demand", "forecast", "family"])
        for n, item in enumerate(HOSTILE_IDS):
            for w, week in enumerate(weeks):
                demand = "" if w == len(weeks) - 1 else 10 + n
                family = "x" * 1_000_000 if n == 0 else "[red]fam[/red]\x1b]52;c;Zm9v\x07"
                writer.writerow([item, week, demand, 12 + n + w, family])
    return path


async def test_hostile_ids_attributes_and_notes(tmp_path: Path) -> None:
    app = TriageApp(Options(portfolio=hostile_portfolio(tmp_path), reviewer="[bold]rev\x1b[31m"))
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        series_list = app.query_one(SeriesList)
        assert len(series_list.order) == len(HOSTILE_IDS)
        # Walk every row (each renders its detail pane), then record a hostile note.
        for _ in HOSTILE_IDS:
            await pilot.press("j")
        await pilot.press("home")
        series = series_list.current
        await pilot.press("enter")
        await pilot.pause(0.2)
        app.screen.query_one(
            "#decision-note"
        ).text = "note [/] [@click=app.quit]x[/] \x1b]2;T\x07 =1+2"
        await pilot.press("ctrl+s")
        for _ in range(100):
            await pilot.pause(0.05)
            if app.session.outcome[series]:
                break
        assert app.session.outcome[series] == "no_change"
        await pilot.pause(0.2)
        screen = app.export_screenshot()
        assert app.is_running  # no planted quit ran
    # Shown literally: markup text appears as typed; no escape byte reaches the terminal.
    assert "[bold]BOLD" in screen or "[bold]BOLD".replace(" ", "&#160;") in screen
    assert "\x1b" not in screen
    assert "title\u241b]2;" in screen  # the OSC text is visible, ESC as a visible symbol


async def test_keys_with_control_characters_show_symbols_and_save_exactly(tmp_path: Path) -> None:
    # Issue 9 §5: the portfolio keeps ids exactly (a tab, an escape, NUL); the list, the detail
    # pane and the decision dialog show visible symbols, and the ledger stores the exact id.
    path = tmp_path / "tabs.csv"
    ids = ["TAB\tID", "ESC\x1b[31mID", "NUL\x00ID"]
    weeks = ["2026-10-05", "2026-10-12", "2026-10-19", "2026-10-26", "2026-11-02"]
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle, quoting=csv.QUOTE_ALL)
        writer.writerow(["item", "location", "period", "demand", "forecast", "family"])
        for n, item in enumerate(ids):
            for w, week in enumerate(weeks):
                demand = "" if w == len(weeks) - 1 else 10 + 5 * n
                writer.writerow([item, "DC\t1", week, demand, 12 + 9 * n + w, "hose\x1bs"])
    ledger_path = tmp_path / "tabs.sqlite"
    app = TriageApp(Options(portfolio=path, reviewer="ana", ledger=ledger_path))
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        assert app.session is not None
        assert set(app.session.portfolio.keys["item"]) == set(ids)
        series_list = app.query_one(SeriesList)
        series = series_list.current
        item = str(app.session.portfolio.keys["item"].iat[series])
        main = app.export_screenshot()
        await pilot.press("enter")
        await pilot.pause(0.2)
        dialog = app.export_screenshot()
        await pilot.press("ctrl+s")
        for _ in range(100):
            await pilot.pause(0.05)
            if app.session.outcome[series]:
                break
        assert app.session.outcome[series] == "no_change"
    for screen in (main, dialog):
        assert "\x1b" not in screen and "\x00" not in screen and "\t" not in screen
        assert "DC\u24091" in screen
    assert "TAB\u2409ID" in main and "ESC\u241b[31mID" in main and "NUL\u2400ID" in main
    assert "hose\u241bs" in main  # the attribute in the detail pane
    shown = item.replace("\t", "\u2409").replace("\x1b", "\u241b").replace("\x00", "\u2400")
    assert shown in dialog
    with Ledger.open(ledger_path, read_only=True) as ledger:
        [event] = ledger.history()
    assert (event.item, event.location) == (item, "DC\t1")
