"""The review screens driven as a reviewer would, with Textual's Pilot.

Every flow asserts on what the app holds and on what the ledger file holds afterwards.
"""

from __future__ import annotations

import shutil
import sqlite3
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from textual.widgets import Input, TextArea

from tests.tui.conftest import burst, wait_for, wait_loaded
from triage.core.ledger import FOLDER_LEDGER, Ledger
from triage.tui.app import Options, TriageApp
from triage.tui.screens.decision import DecisionScreen
from triage.tui.screens.dialogs import HelpScreen, PromptScreen
from triage.tui.widgets.chart import SeriesChart
from triage.tui.widgets.series_list import SeriesList

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample" / "portfolio.csv"


@pytest.fixture
def portfolio(tmp_path: Path) -> Path:
    target = tmp_path / "week.csv"
    shutil.copy(SAMPLE, target)
    return target


def make_app(portfolio: Path, **kw: object) -> TriageApp:
    return TriageApp(Options(portfolio=portfolio, reviewer="ana", **kw))


def ledger_rows(path: Path) -> list[tuple]:
    con = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        return con.execute(
            "SELECT kind, item, location, outcome, root_cause, note, adjustment, reviewer "
            "FROM event ORDER BY id"
        ).fetchall()
    finally:
        con.close()


async def test_open_move_and_quick_decision_is_in_the_ledger(portfolio: Path) -> None:
    app = make_app(portfolio)
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        series_list = app.query_one(SeriesList)
        session = app.session
        assert session is not None
        # Worst offender first: the list order is the core's error order.
        np.testing.assert_array_equal(series_list.order, session.error_order)
        await pilot.press("j", "j", "down")
        assert series_list.cursor == 3
        series = series_list.current
        await pilot.press("3", "c")  # root cause 3 (stock-out), then "no change"
        await wait_for(pilot, lambda: session.outcome[series] != "", "the decision to be saved")
        assert "saved" in app.status_text
        item, location = session.key(series)
    rows = ledger_rows(portfolio.with_name(FOLDER_LEDGER))
    assert rows == [("decision", item, location, "no_change", "stock_out", "", None, "ana")]


async def test_the_detail_pane_follows_a_burst_of_cursor_keys(portfolio: Path) -> None:
    # The title goes with the key's own frame, the measures with the next: after any burst
    # both name the series the cursor rests on, never one it passed.
    app = make_app(portfolio)
    async with app.run_test(size=(120, 40)) as pilot:
        await wait_loaded(app, pilot)
        series_list = app.query_one(SeriesList)
        session = app.session
        for keys, rests in ((["down"] * 7, 7), (["up"] * 3, 4), (["down", "up"] * 4, 4)):
            burst(app, keys)
            await wait_for(pilot, lambda rests=rests: series_list.cursor == rests, "the cursor")
            series = series_list.current
            await wait_for(
                pilot,
                lambda series=series: (
                    session.describe(series) in str(app.query_one("#detail-text").render())
                ),
                "the measures of the series under the cursor",
            )
            title = str(app.query_one("#detail-title").render())
            assert title.startswith(" @ ".join(session.key(series)).rstrip(" @"))


async def test_decide_with_note_and_adjustment_preview(portfolio: Path) -> None:
    app = make_app(portfolio)
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        session = app.session
        series = app.query_one(SeriesList).current
        await pilot.press("a")
        await wait_for(pilot, lambda: isinstance(app.screen, DecisionScreen), "the decision dialog")
        dialog = app.screen
        adjust = dialog.query_one("#decision-adjust", Input)
        assert adjust.has_focus
        await pilot.press(*"1-4: +10%")
        preview = str(dialog.query_one("#decision-preview").render())
        expected = session.preview(series, "1-4: +10%")
        assert expected.description in preview  # the preview shows the core's impact text
        note = dialog.query_one("#decision-note", TextArea)
        note.text = "Promo in week 49 not in the model\nsecond line [/] =1+2"
        await pilot.press("ctrl+s")
        await wait_for(
            pilot, lambda: session.outcome[series] == "adjusted", "the adjusted decision"
        )
    with Ledger.open(portfolio.with_name(FOLDER_LEDGER), read_only=True) as ledger:
        events = ledger.history()
    assert len(events) == 1
    event = events[0]
    assert event.outcome == "adjusted" and event.adjustment == str(expected.adjustment)
    assert event.note == "Promo in week 49 not in the model\nsecond line [/] =1+2"
    assert [line.adjusted for line in event.lines] == pytest.approx(list(expected.adjusted[:4]))
    assert event.reviewer == "ana"


async def test_use_another_forecast_is_previewed_and_saved(portfolio: Path) -> None:
    # The sample carries forecast_stat: "1-2: use stat" takes its first two forward values.
    app = make_app(portfolio)
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        session = app.session
        assert session is not None
        series = app.query_one(SeriesList).current
        await pilot.press("a")
        await wait_for(pilot, lambda: isinstance(app.screen, DecisionScreen), "the decision dialog")
        dialog = app.screen
        adjust = dialog.query_one("#decision-adjust", Input)
        assert "use stat" in str(adjust.placeholder)  # the field offers the file's forecast
        await pilot.press(*"1-2: use stat")
        preview = str(dialog.query_one("#decision-preview").render())
        p = session.portfolio
        stat = p.competing["stat"][series, p.last_actual + 1 : p.last_actual + 3]
        original = p.forecast[series, p.last_actual + 1 : p.last_actual + 3]
        expected = session.preview(series, "1-2: use stat")
        assert preview.startswith("periods 1-2: use stat → ")
        assert expected.description in preview  # the preview shows the core's impact text
        # ... whose change is the file's own: Σ stat − Σ forecast over periods 1-2.
        assert expected.delta_units == pytest.approx(float((stat - original).sum()))
        await pilot.press("ctrl+s")
        await wait_for(
            pilot, lambda: session.outcome[series] == "adjusted", "the adjusted decision"
        )
    with Ledger.open(portfolio.with_name(FOLDER_LEDGER), read_only=True) as ledger:
        events = ledger.history()
    assert [e.adjustment for e in events] == ["1-2: use stat"]
    assert [line.adjusted for line in events[0].lines] == pytest.approx(list(stat))
    assert [line.original for line in events[0].lines] == pytest.approx(list(original))


async def test_bad_adjustment_is_refused_in_the_dialog(portfolio: Path) -> None:
    app = make_app(portfolio)
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        await pilot.press("a")
        await wait_for(pilot, lambda: isinstance(app.screen, DecisionScreen), "the decision dialog")
        await pilot.press(*"+ten")
        await pilot.press("ctrl+s")
        await pilot.pause(0.1)
        assert isinstance(app.screen, DecisionScreen)  # still open: nothing saved
        assert "expected" in str(app.screen.query_one("#decision-preview").render())
        await pilot.press("escape")
        await pilot.pause(0.1)
        assert not isinstance(app.screen, DecisionScreen)
    assert ledger_rows(portfolio.with_name(FOLDER_LEDGER)) == []


async def test_undo_and_next_unreviewed(portfolio: Path) -> None:
    app = make_app(portfolio)
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        session = app.session
        series_list = app.query_one(SeriesList)
        first = series_list.current
        await pilot.press("c")
        await wait_for(pilot, lambda: session.outcome[first] != "", "first decision")
        await pilot.press("n")  # next unreviewed: the second-worst series
        assert series_list.cursor == 1
        await pilot.press("k")
        await pilot.press("u")
        await wait_for(pilot, lambda: session.outcome[first] == "", "the undo")
        assert session.progress().reviewed == 0
    kinds = [row[0] for row in ledger_rows(portfolio.with_name(FOLDER_LEDGER))]
    assert kinds == ["decision", "undo"]  # append-only: the decision is still in the journal


async def test_filter_by_text_and_clear(portfolio: Path) -> None:
    app = make_app(portfolio)
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        series_list = app.query_one(SeriesList)
        await pilot.press("slash")
        await wait_for(pilot, lambda: isinstance(app.screen, PromptScreen), "the filter prompt")
        await pilot.press(*"lena", "enter")
        await pilot.pause(0.1)
        session = app.session
        planners = session.portfolio.keys["planner"].to_numpy()[series_list.order]
        assert len(series_list.order) > 0 and set(planners) == {"Lena"}
        # Still in error order within the filter.
        ranks = session.card["rank"].to_numpy()[series_list.order]
        assert (np.diff(ranks) > 0).all()
        await pilot.press("escape")
        await pilot.pause(0.1)
        assert len(series_list.order) == session.portfolio.n_series


async def test_switch_to_bias_order(portfolio: Path) -> None:
    app = make_app(portfolio)
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        await pilot.press("b")
        series_list = app.query_one(SeriesList)
        np.testing.assert_array_equal(series_list.order, app.session.bias_order)
        assert app.session.flag[series_list.order[0]] != 0  # persistent bias first


async def test_other_forecasts_in_the_card_and_the_chart(portfolio: Path) -> None:
    """The sample carries forecast_stat and forecast_customer: the metrics card lists each
    forecast's WAPE and bias on the same cells, and o hides and shows them on the chart."""
    app = make_app(portfolio)
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        series = app.query_one(SeriesList).current
        body = str(app.query_one("#detail-text").render())
        scores = {s.name: s for s in app.session.forecast_scores(series)}
        assert list(scores) == ["forecast", "stat", "customer", "naive"]
        stat = scores["stat"]
        # WAPE = Σ|e| / Σdemand over the shared cells (Kolassa & Schütz 2007, docs/sources.md
        # §1.2), shown as a whole percentage.
        assert f"stat {stat.abs_error / stat.demand * 100:.0f}%" in body
        assert f"forecasts on the same {stat.cells} weeks" in body
        chart = app.query_one("#chart", SeriesChart)
        await wait_for(pilot, lambda: "customer" in str(chart.render()), "the chart's legend")
        await pilot.press("o")
        assert not chart.others and app.status_text == "chart: other forecasts hidden"
        await wait_for(pilot, lambda: "customer" not in str(chart.render()), "the overlay gone")
        await pilot.press("a")
        await wait_for(pilot, lambda: isinstance(app.screen, DecisionScreen), "the dialog")
        assert not app.screen.query_one("#decision-chart", SeriesChart).others
        assert "stat " in str(app.screen.query_one("#decision-card").render())
        await pilot.press("escape")
        await pilot.press("o")
        assert chart.others and app.status_text == "chart: other forecasts shown"


async def test_without_other_forecasts_the_card_and_key_say_so(tmp_path: Path) -> None:
    frame = pd.read_csv(SAMPLE)
    plain = tmp_path / "plain.csv"
    frame.drop(columns=["forecast_stat", "forecast_customer"]).to_csv(plain, index=False)
    app = make_app(plain)
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        assert "forecasts on the same" not in str(app.query_one("#detail-text").render())
        await pilot.press("o")
        assert app.status_text.startswith("chart: the file has no other forecasts")


async def test_reopen_resumes_where_the_reviewer_stopped(portfolio: Path) -> None:
    app = make_app(portfolio)
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        series = app.query_one(SeriesList).current
        await pilot.press("l")  # put off to a later cycle
        await wait_for(pilot, lambda: app.session.outcome[series] == "deferred", "deferral")
    again = make_app(portfolio)
    async with again.run_test(size=(160, 48)) as pilot:
        await wait_loaded(again, pilot)
        assert again.session.outcome[series] == "deferred"
        # Put off is decided but not settled (issue: reviewed counts no change and adjusted).
        progress = again.session.progress()
        assert (progress.reviewed, progress.deferred) == (0, 1)


async def test_help_lists_every_binding(portfolio: Path) -> None:
    app = make_app(portfolio)
    async with app.run_test(size=(120, 40)) as pilot:
        await wait_loaded(app, pilot)
        await pilot.press("question_mark")
        await wait_for(pilot, lambda: isinstance(app.screen, HelpScreen), "help")
        keys = {row[0] for row in app.help_rows()}
        for binding in app.BINDINGS:
            assert binding.key in keys
        await pilot.press("escape")


async def test_small_terminal_80x24_shows_list_and_detail(portfolio: Path) -> None:
    app = make_app(portfolio)
    async with app.run_test(size=(80, 24)) as pilot:
        await wait_loaded(app, pilot)
        assert app.has_class("-narrow")
        series_list = app.query_one(SeriesList)
        assert series_list.size.height >= 5
        assert app.query_one("#detail").size.height >= 5
        await pilot.press("j")
        assert series_list.cursor == 1


async def test_load_error_is_shown_not_swallowed(tmp_path: Path) -> None:
    bad = tmp_path / "bad.csv"
    bad.write_text("item,period,demand\nA,2026-01-05,3\n", encoding="utf-8")
    app = make_app(bad)
    async with app.run_test(size=(100, 30)) as pilot:
        await wait_for(pilot, lambda: "error" in app.status_text, "the load error")
        assert "forecast" in app.status_text  # names the missing column
        assert app.session is None


async def test_export_from_the_app_writes_the_workbook(portfolio: Path) -> None:
    import itertools

    import openpyxl

    app = make_app(portfolio)
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        series = app.query_one(SeriesList).current
        item, location = app.session.key(series)
        await pilot.press("2", "c")  # root cause 2, no change
        await wait_for(pilot, lambda: app.session.outcome[series] != "", "the decision")
        await pilot.press("x")
        await wait_for(pilot, lambda: isinstance(app.screen, PromptScreen), "the export prompt")
        target = app.screen.query_one(Input).value
        assert target.endswith(".xlsx") and "advisory" in str(
            app.screen.query_one(".dialog-note").render()
        )
        await pilot.press("enter")
        await wait_for(pilot, lambda: app.status_text.startswith("exported"), "the export")
        assert "advisory" in app.status_text
    book = openpyxl.load_workbook(target, read_only=True)
    assert {"Decisions", "Forecast", "Read me"} <= set(book.sheetnames)
    rows = list(book["Decisions"].iter_rows(values_only=True))
    header = rows[0]
    # A row ends at its last cell with a value: an empty group_decision (a missing number, not
    # an empty text since it became the ledger's integer id) is not written, so pad the row.
    first = dict(itertools.zip_longest(header, rows[1]))
    assert (first["item"], first["location"], first["outcome"]) == (item, location, "no_change")


async def test_a_file_with_nothing_to_score_says_so_and_opens_no_ledger(tmp_path: Path) -> None:
    # Issue 2, section 3: only window periods with both an actual and a forecast are scored; a
    # file with none cannot be reviewed. The screen says why (the CLI refuses it too).
    path = tmp_path / "week47.csv"
    path.write_text(
        "item,period,demand,forecast\nA,2026-10-05,1,\nA,2026-10-12,2,\nA,2026-10-19,,5\n",
        encoding="utf-8",
    )
    app = TriageApp(Options(portfolio=path, reviewer="ana"))
    async with app.run_test(size=(120, 30)) as pilot:
        label = app.screen.query_one("#loading-label")
        await wait_for(pilot, lambda: "Cannot open" in str(label.render()), "the load error")
        assert "nothing to score" in str(label.render())
        assert app.session is None
    assert not (tmp_path / FOLDER_LEDGER).exists()
