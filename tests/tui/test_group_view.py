"""The group view driven as a reviewer would (Pilot): open it, drill into a group's series,
come back, and the keys that act on one series do nothing while groups are shown."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest
from textual.widgets import Input

from tests.tui.conftest import burst, wait_for, wait_loaded
from triage.tui.app import Options, TriageApp
from triage.tui.screens.dialogs import PromptScreen
from triage.tui.widgets.series_list import GroupList, SeriesList

SAMPLE = Path(__file__).resolve().parents[2] / "sample" / "portfolio.csv"


@pytest.fixture
def portfolio(tmp_path: Path) -> Path:
    target = tmp_path / "week.csv"
    shutil.copy(SAMPLE, target)
    return target


async def test_group_view_drill_down_and_back(portfolio: Path) -> None:
    app = TriageApp(Options(portfolio=portfolio, reviewer="ana"))
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        await pilot.press("G")
        await wait_for(pilot, lambda: isinstance(app.screen, PromptScreen), "the prompt")
        field = app.screen.query_one(Input)
        field.value = "family, location"
        await pilot.press("enter")
        await wait_for(pilot, lambda: app.in_groups, "the group view")
        groups = app.groups
        assert groups is not None and groups.by == ("family", "location")
        group_list = app.query_one(GroupList)
        assert group_list.display and not app.query_one(SeriesList).display
        # Ranked by share of the series' error, largest first.
        shares = groups.table["error_share"].to_numpy()[group_list.order]
        assert (np.diff(shares) <= 0).all()
        await pilot.press("j")
        second = group_list.current
        assert "group rank 2 of" in str(app.query_one("#detail-title").render())
        # A key that acts on one series does nothing here: no decision is written.
        await pilot.press("c")
        assert (app.session.outcome == "").all()
        await pilot.press("enter")
        await wait_for(pilot, lambda: not app.in_groups, "the group's series")
        series_list = app.query_one(SeriesList)
        assert sorted(series_list.order.tolist()) == groups.members(second).tolist()
        # In the current (error) order.
        errors = app.session.error[series_list.order]
        assert (np.diff(errors) <= 0).all()
        assert f"group {groups.label(second)}" in str(app.query_one("#summary").render())
        await pilot.press("c")
        await wait_for(pilot, lambda: (app.session.outcome != "").sum() == 1, "the decision")
        await pilot.press("escape")
        await wait_for(pilot, lambda: app.in_groups, "back to the groups")
        assert group_list.current == second  # the cursor where it was
        assert app.groups.decided()[second] == 1
        assert len(series_list.order) == app.session.portfolio.n_series  # filters restored
        await pilot.press("G")
        assert not app.in_groups and series_list.display


async def test_group_option_opens_on_groups_and_bias_order(portfolio: Path) -> None:
    app = TriageApp(Options(portfolio=portfolio, reviewer="ana", group="family"))
    async with app.run_test(size=(80, 24)) as pilot:
        await wait_for(pilot, lambda: app.in_groups, "the group view")
        group_list = app.query_one(GroupList)
        assert len(group_list.order) == 6
        await pilot.press("b")
        table = app.groups.table
        flagged = table["bias_flag"].to_numpy()[group_list.order] != ""
        assert not flagged[flagged.argmin() :].any()  # flagged groups first
        np.testing.assert_array_equal(group_list.order, app.groups.bias_order)


async def test_bad_group_option_says_so_and_keeps_the_series(portfolio: Path) -> None:
    app = TriageApp(Options(portfolio=portfolio, reviewer="ana", group="colour"))
    async with app.run_test(size=(120, 30)) as pilot:
        await wait_loaded(app, pilot)
        assert not app.in_groups
        assert "no column 'colour'" in app.status_text
        assert app.query_one(SeriesList).display


async def test_a_save_landing_after_escape_keeps_the_group_detail(portfolio: Path) -> None:
    """Typed at full speed: into a group, a quick decision, back out. The save lands after the
    group view is back; the detail pane must go on showing the group, not the saved series."""
    app = TriageApp(Options(portfolio=portfolio, reviewer="ana", group="family"))
    async with app.run_test(size=(120, 36)) as pilot:
        await wait_for(pilot, lambda: app.in_groups, "the group view")
        burst(app, ["enter", "c", "escape"])
        await wait_for(pilot, lambda: (app.session.outcome != "").sum() == 1, "the decision")
        await wait_for(pilot, lambda: app.in_groups, "back to the groups")
        await pilot.pause(0.3)
        assert "group rank 1 of" in str(app.query_one("#detail-title").render())


async def test_group_decision_dialog_previews_the_split(portfolio: Path) -> None:
    """`a` in the group view: the adjustment applies to the group's total and the preview lists
    the total's change and the series that change most (the split: docs/adjustments.md)."""
    from triage.tui.screens.group_decision import GroupDecisionScreen

    app = TriageApp(Options(portfolio=portfolio, reviewer="ana", group="family"))
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_for(pilot, lambda: app.in_groups, "the group view")
        group = app.query_one(GroupList).current
        await pilot.press("a")
        await wait_for(pilot, lambda: isinstance(app.screen, GroupDecisionScreen), "the dialog")
        app.screen.query_one("#decision-adjust", Input).value = "1-4: =1000"
        preview = app.screen.query_one("#decision-preview")
        await wait_for(pilot, lambda: "group total:" in str(preview.render()), "the preview")
        shown = str(preview.render())
        expected = app.groups.preview(group, "1-4: =1000")
        assert f"group total: {expected.total.description}" in shown
        assert "split by proportions of the series' forecasts" in shown
        top = int(app.groups.members(group)[expected.largest_changes(1)[0]])
        assert app.session.key(top)[0] in shown
        await pilot.press("ctrl+b")
        assert app.screen.basis == "history"
        shown = str(app.screen.query_one("#decision-preview").render())
        assert "split by proportions of the series' history averages" in shown
        await pilot.press("escape")
        await wait_for(pilot, lambda: not isinstance(app.screen, GroupDecisionScreen), "closed")
        assert (app.session.outcome == "").all()  # cancelled: nothing recorded


async def test_group_decision_saved_whole_and_undone_whole(portfolio: Path) -> None:
    """`a` on a group, `1-2: x0.9`, ctrl+s: one group decision in the ledger with every member's
    part; the list counts the group decided; `u` on the group undoes it whole."""
    from triage.core.ledger import Ledger
    from triage.tui.screens.dialogs import ConfirmScreen
    from triage.tui.screens.group_decision import GroupDecisionScreen

    app = TriageApp(Options(portfolio=portfolio, reviewer="ana", group="family,location"))
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_for(pilot, lambda: app.in_groups, "the group view")
        await pilot.press("j")
        group = app.query_one(GroupList).current
        members = app.groups.members(group)
        await pilot.press("a")
        await wait_for(pilot, lambda: isinstance(app.screen, GroupDecisionScreen), "the dialog")
        app.screen.query_one("#decision-adjust", Input).value = "1-2: x0.9"
        await pilot.press("ctrl+s")
        await wait_for(
            pilot, lambda: (app.session.outcome[members] == "adjusted").all(), "the group saved"
        )
        assert app.groups.decided()[group] == len(members)
        assert "saved: the group" in app.status_text
        # Each member's history in the detail pane names the group decision it is a part of.
        assert "(group #" in app._history_text(int(members[0])).plain
        ledger = Ledger.open(app.session.ledger.path)
        try:
            (decision,) = ledger.group_decisions()
            assert decision.adjustment == "1-2: x0.9"
            assert decision.key_values == tuple(app.groups.filters(group).values())
            assert len(ledger.current(app.session.cycle)) == len(members)
        finally:
            ledger.close()
        await pilot.press("u")
        await wait_for(pilot, lambda: isinstance(app.screen, ConfirmScreen), "the question")
        await pilot.press("y")
        await wait_for(pilot, lambda: (app.session.outcome == "").all(), "the group undone")
        assert app.groups.decided()[group] == 0
