"""Every message the review screens show quotes data as plain text (no markup, no escapes).

Each path that produces a message is driven with hostile text: the load error (a cell and a
header), the notices after loading, a save refused because another reviewer changed the series
(their name and the id quoted), and the export summary (a path). With markup on, ``[/]`` raises
``MarkupError`` while the toast renders (the app dies and an unsaved entry with it) and
``[@click=app.quit]`` becomes a clickable action. Toasts are switched on for these tests.
"""

from __future__ import annotations

import csv
from pathlib import Path

from tests.tui.conftest import wait_for, wait_loaded
from triage.core.ledger import Ledger
from triage.tui.app import Options, TriageApp
from triage.tui.screens.decision import DecisionScreen
from triage.tui.widgets.series_list import SeriesList

HOSTILE = "[@click=app.quit]click[/] [/] [b]"
WEEKS = ["2026-10-05", "2026-10-12", "2026-10-19", "2026-10-26", "2026-11-02"]


def write(path: Path, header: list[str], rows: list[list[object]]) -> Path:
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(header)
        writer.writerows(rows)
    return path


def portfolio(tmp_path: Path, item: str = HOSTILE) -> Path:
    rows: list[list[object]] = []
    for n, name in enumerate([item, "plain-1", "plain-2"]):
        for w, week in enumerate(WEEKS):
            rows.append([name, week, "" if w == len(WEEKS) - 1 else 10 + n * 7 + w, 12 + n])
    return write(tmp_path / "hostile.csv", ["item", "period", "demand", "forecast"], rows)


def toasts(app: TriageApp) -> list[str]:
    return [n.message for n in app._notifications]


async def test_load_error_quotes_a_hostile_cell_as_text(tmp_path: Path) -> None:
    path = write(
        tmp_path / "bad.csv",
        ["item", "period", "demand", "forecast"],
        [["A", "2026-10-05", HOSTILE, 3], ["A", "2026-10-12", 4, 3]],
    )
    app = TriageApp(Options(portfolio=path, reviewer="ana", ledger=tmp_path / "l.sqlite"))
    async with app.run_test(size=(160, 48), notifications=True) as pilot:
        await wait_for(pilot, lambda: bool(toasts(app)), "the load error")
        await pilot.pause(0.3)  # the toast renders
        assert app.is_running
        assert any(HOSTILE in t for t in toasts(app)), toasts(app)
        label = str(app.query_one("#loading-label").render())
        assert HOSTILE in label


async def test_load_error_quotes_a_header_with_brackets(tmp_path: Path) -> None:
    path = write(
        tmp_path / "bad.csv",
        ["item", "period", "qty [pcs]", "forecast"],
        [["A", "2026-10-05", 1, 3]],
    )
    app = TriageApp(Options(portfolio=path, reviewer="ana", ledger=tmp_path / "l.sqlite"))
    async with app.run_test(size=(160, 48), notifications=True) as pilot:
        await wait_for(pilot, lambda: bool(toasts(app)), "the load error")
        await pilot.pause(0.3)
        assert app.is_running
        assert any("qty [pcs]" in t for t in toasts(app)), toasts(app)


async def test_stale_save_names_the_other_reviewer_and_keeps_the_entry(tmp_path: Path) -> None:
    path = portfolio(tmp_path)
    ledger_path = tmp_path / "l.sqlite"
    app = TriageApp(Options(portfolio=path, reviewer="ana", ledger=ledger_path))
    async with app.run_test(size=(160, 48), notifications=True) as pilot:
        await wait_loaded(app, pilot)
        session = app.session
        assert session is not None
        series_list = app.query_one(SeriesList)
        while session.key(series_list.current)[0] != HOSTILE:
            await pilot.press("j")
        series = series_list.current
        await pilot.press("enter")
        await wait_for(pilot, lambda: isinstance(app.screen, DecisionScreen), "the dialog")
        # Meanwhile another reviewer decides the same series in another session.
        with Ledger.open(ledger_path) as other:
            other.record(
                session.cycle,
                HOSTILE,
                "",
                outcome="deferred",
                root_cause="unknown",
                note="",
                reviewer=HOSTILE,
                expected_version=0,
                portfolio_name=path.name,
                portfolio_fingerprint=session.portfolio.fingerprint,
            )
        app.screen.query_one("#decision-note").text = "my note [/]"
        await pilot.press("ctrl+s")
        await wait_for(pilot, lambda: "NOT saved" in app.status_text, "the refusal")
        await pilot.pause(0.3)
        assert app.is_running
        assert any(f"changed by {HOSTILE!r}" in t for t in toasts(app)), toasts(app)
        assert app.drafts[series].note == "my note [/]"  # the entry is kept
        # Reopened, the dialog shows the entry, says it was not saved, and names the other.
        await pilot.press("enter")
        await wait_for(pilot, lambda: isinstance(app.screen, DecisionScreen), "the dialog")
        assert app.screen.query_one("#decision-note").text == "my note [/]"
        said = str(app.screen.query_one("#decision-current").render())
        assert f"by {HOSTILE} at" in said and "NOT saved" in said


async def test_export_summary_quotes_a_hostile_path(tmp_path: Path) -> None:
    path = portfolio(tmp_path, item="A")
    app = TriageApp(Options(portfolio=path, reviewer="ana", ledger=tmp_path / "l.sqlite"))
    target = tmp_path / "[b]out[i] [@click=app.quit]x.json"
    async with app.run_test(size=(160, 48), notifications=True) as pilot:
        await wait_loaded(app, pilot)
        app.export(target)
        await wait_for(
            pilot, lambda: any("export" in t for t in toasts(app)), f"the export {toasts(app)}"
        )
        await pilot.pause(0.3)
        assert app.is_running
        assert any(str(target) in t for t in toasts(app)), toasts(app)
