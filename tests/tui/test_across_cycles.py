"""Week after week in the review screens, on the multi-cycle scenario of ``sample/cycles.py``.

The scenario knows by construction which series were handed off or put off earlier and are still
among the worst (carried over) and what every override was worth once its actuals arrived.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from sample.cycles import build_cycles
from tests.tui.conftest import wait_for, wait_loaded
from triage.core import history
from triage.core.cycle import ReviewCycle
from triage.tui.app import Options, TriageApp
from triage.tui.screens.overrides import OverridesScreen
from triage.tui.widgets.series_list import SeriesList


@pytest.fixture(scope="module")
def scenario(tmp_path_factory: pytest.TempPathFactory):
    return build_cycles(tmp_path_factory.mktemp("cycles"))


async def test_newest_week_shows_earlier_cycles(scenario, tmp_path: Path) -> None:
    ledger = tmp_path / "ledger.sqlite"
    shutil.copy(scenario.ledger, ledger)
    app = TriageApp(Options(portfolio=scenario.files[-1], ledger=ledger, reviewer="ana"))
    async with app.run_test(size=(170, 48)) as pilot:
        await wait_loaded(app, pilot)
        session = app.session
        order = app.query_one(SeriesList).order
        carried = [session.find(*scenario.roles[role]) for role in scenario.carried]
        # Carried-over series come first among the unreviewed, before the rest of the list.
        assert sorted(order[: len(carried)].tolist()) == sorted(carried)
        for series in carried:
            assert session.carried[series]
            assert app._format_row(series)["outcome"][0].startswith("↺")
        for role in scenario.not_carried:
            series = session.find(*scenario.roles[role])
            if series is not None:
                assert not session.carried[series]
        for role in scenario.reviewed_now:
            series = session.find(*scenario.roles[role])
            assert session.outcome[series] != ""
        await pilot.press("v")
        await wait_for(
            pilot, lambda: isinstance(app.screen, OverridesScreen), "the override value view"
        )
        shown = app.screen._tables["direction"]
        expected = history.summarise(
            ReviewCycle(session.portfolio, session.ledger).realised, "direction"
        )
        assert shown.equals(expected)
        total = expected.iloc[-1]
        realised = scenario.realised_in(len(scenario.files) - 1)
        assert int(total["adjustments"]) == len(realised)
        assert total["value_added"] == pytest.approx(sum(line.value_added for line in realised))
        # Root causes by their labels; no code reaches the screen.
        from triage.tui.screens.overrides import summary_table

        table = summary_table(
            "root_cause", app.screen._tables["root_cause"], session.priced, app.options.root_causes
        )
        cells = [str(c) for col in table.columns for c in col._cells]
        assert "Promotion or event" in cells and "promotion" not in cells
        assert "model_miss" not in cells
        await pilot.press("escape")


async def test_week_two_marks_and_details_an_earlier_adjustment_still_carried(
    tmp_path: Path,
) -> None:
    # Week 1 adjusts A (+10) and B (=50) over four weeks; week 2's file, dropped in the same
    # folder, finds the folder's ledger. A's adjustment is still ahead and carried; B's is
    # already in week 2's forecast (tests/core/twoweeks.py).
    from tests.core.twoweeks import WEEK1, write_two_weeks
    from triage.core.cycle import ReviewCycle
    from triage.core.ledger import Ledger, locate_ledger
    from triage.core.read import read_portfolio
    from triage.core.review import ReviewSession
    from triage.tui.format import CARRIED_TINY

    weeks = write_two_weeks(tmp_path / "review")
    with Ledger.open(locate_ledger(weeks.week1).path) as ledger:
        week1 = ReviewSession(ReviewCycle(read_portfolio(weeks.week1), ledger), reviewer="ana")
        for item, spec in (("A", "+10"), ("B", "=50")):
            series = week1.find(item, "Lyon")
            assert series is not None
            week1.commit_decision(
                series, outcome="adjusted", root_cause="promotion", adjustment=spec
            )
    app = TriageApp(Options(portfolio=weeks.week2, reviewer="bob"))
    async with app.run_test(size=(170, 48)) as pilot:
        await wait_loaded(app, pilot)
        session = app.session
        a, b = session.find("A", "Lyon"), session.find("B", "Lyon")
        assert app._format_row(a)["outcome"][0] == CARRIED_TINY
        assert app._format_row(b)["outcome"][0] != CARRIED_TINY
        series_list = app.query_one(SeriesList)
        while series_list.current != a:
            await pilot.press("j")
        detail = str(app.query_one("#detail-text").render())
        assert f"active adjustment from {WEEK1} (+10, by ana)" in detail
        assert "carried into this cycle's export for 3 periods" in detail


async def test_end_key_stops_carrying_an_earlier_adjustment_and_the_export_follows(
    tmp_path: Path,
) -> None:
    # Week 1 adjusts A by +10 for four weeks; in week 2 the reviewer ends it with e and y.
    # The ledger holds the end (who, when) and week 2's export no longer applies it.
    from tests.core.twoweeks import write_two_weeks
    from triage.core.cycle import ReviewCycle
    from triage.core.export import review_tables
    from triage.core.ledger import Ledger, locate_ledger
    from triage.core.read import read_portfolio
    from triage.core.review import ReviewSession
    from triage.tui.format import CARRIED_TINY
    from triage.tui.screens.dialogs import ConfirmScreen

    weeks = write_two_weeks(tmp_path / "review")
    ledger_path = locate_ledger(weeks.week1).path
    with Ledger.open(ledger_path) as ledger:
        week1 = ReviewSession(ReviewCycle(read_portfolio(weeks.week1), ledger), reviewer="ana")
        series = week1.find("A", "Lyon")
        assert series is not None
        week1.commit_decision(series, outcome="adjusted", root_cause="promotion", adjustment="+10")
    app = TriageApp(Options(portfolio=weeks.week2, reviewer="bob"))
    async with app.run_test(size=(170, 48)) as pilot:
        await wait_loaded(app, pilot)
        session = app.session
        a = session.find("A", "Lyon")
        series_list = app.query_one(SeriesList)
        while series_list.current != a:
            await pilot.press("j")
        await pilot.press("e")
        await wait_for(pilot, lambda: isinstance(app.screen, ConfirmScreen), "the question")
        assert "from 2026-11-02 (+10, by ana)" in str(
            app.screen.query_one(".dialog-title").render()
        )
        await pilot.press("y")
        await wait_for(pilot, lambda: not session.carries[a], "the end")
        assert app._format_row(a)["outcome"][0] != CARRIED_TINY
        assert "ended by bob" in str(app.query_one("#detail-text").render())
    with Ledger.open(ledger_path, read_only=True) as ledger:
        tables = review_tables(ReviewCycle(read_portfolio(weeks.week2), ledger))
    rows = tables.forecast[tables.forecast["item"] == "A"]
    assert rows["adjusted_in_cycle"].isna().all() or (rows["adjusted_in_cycle"] == "").all()
    assert (rows["adjusted_forecast"] == rows["forecast"]).all()


async def test_override_value_screen_compares_with_the_statistical_forecast(
    tmp_path: Path,
) -> None:
    """With forecast_stat in the files, `v` also says how much the overrides beat the
    statistical forecast: |stat − actual| − |adjusted − actual| over the lines it has a value
    for, the figure `triage overrides` gives (docs/history.md)."""
    scenario = build_cycles(tmp_path / "cycles", competing=True)
    app = TriageApp(Options(portfolio=scenario.files[-1], ledger=scenario.ledger, reviewer="ana"))
    async with app.run_test(size=(170, 48)) as pilot:
        await wait_loaded(app, pilot)
        await pilot.press("v")
        await wait_for(
            pilot, lambda: isinstance(app.screen, OverridesScreen), "the override value view"
        )
        realised = ReviewCycle(app.session.portfolio, app.session.ledger).realised
        compared = realised.dropna(subset=["stat"])
        beat = float(
            (
                (compared["stat"] - compared["actual"]).abs()
                - (compared["adjusted"] - compared["actual"]).abs()
            ).sum()
        )
        text = "\n".join(p.plain for p in app.screen.parts() if hasattr(p, "plain"))
        assert f"over the {len(compared)} periods it has a value for" in text
        assert f"by {abs(beat):,.1f} units" in text
        from triage.tui.screens.overrides import summary_table

        table = summary_table("direction", app.screen._tables["direction"], app.session.priced)
        assert "beat stat by" in [str(c.header) for c in table.columns]
        await pilot.press("escape")
