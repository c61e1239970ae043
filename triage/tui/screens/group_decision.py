"""The group decision dialog: one decision for every series of a group, its adjustment split.

Outcome, root cause, note and an adjustment in the series syntax, applied to the group's total
forward forecast and split to its series (``triage.core.split``); the preview shows the total's
change and the series that change most before anything is saved.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

from rich.text import Text
from textual import events, on
from textual.app import ComposeResult
from textual.binding import Binding, BindingType
from textual.containers import Horizontal, Vertical, VerticalScroll
from textual.widgets import Input, OptionList, Static, TextArea
from textual.widgets.option_list import Option

from triage.core import split
from triage.core.adjust import USE, AdjustError
from triage.core.group_review import GroupReview
from triage.core.review import ChartSeries
from triage.core.text import number, visible
from triage.core.vocabulary import ADJUSTED, OUTCOMES, Choice
from triage.tui import format as fmt
from triage.tui.screens.base import Dialog
from triage.tui.screens.decision import CHART_MIN_ROWS, NoteArea
from triage.tui.widgets.chart import SeriesChart

#: Series changes the preview lists.
PREVIEW_SERIES = 5


@dataclass(frozen=True)
class GroupDraft:
    """What the reviewer entered for a group."""

    group: int
    outcome: str
    root_cause: str
    note: str
    adjustment: str
    """The canonical spec (``""`` without an adjustment)."""
    basis: str = split.FORECASTS


class GroupDecisionScreen(Dialog[GroupDraft | None]):
    """Record one decision for every series of a group.

    | Key | Action |
    | --- | --- |
    | ctrl+s | save the decision for the whole group |
    | ctrl+b | split by proportions of history instead of forecasts (and back) |
    | escape | cancel (nothing is saved) |
    """

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding(
            "ctrl+s",
            "save",
            "Save",
            priority=True,
            id="group_decision.save",
            tooltip="Save one decision for every series of the group",
        ),
        Binding(
            "ctrl+b",
            "basis",
            "Split basis",
            priority=True,
            id="group_decision.basis",
            tooltip="Split absolute changes by the series' forecasts or by their history averages",
        ),
        Binding(
            "escape",
            "cancel",
            "Cancel",
            priority=True,
            id="group_decision.cancel",
            tooltip="Close without saving",
        ),
    ]

    def __init__(
        self, review: GroupReview, group: int, causes: tuple[Choice, ...], *, adjustment: str = ""
    ) -> None:
        super().__init__()
        self._review = review
        self._group = group
        self._causes = causes
        self._adjustment = adjustment
        self.basis = split.FORECASTS
        """How absolute changes are split (``split.BASES``)."""

    def compose(self) -> ComposeResult:
        review, group = self._review, self._group
        size = int(review.size[group])
        with Vertical(classes="dialog decision"):
            yield Static(
                Text.assemble(
                    ("Decision for the group ", "bold"),
                    (fmt.plain(review.label(group), 80), "bold reverse"),
                    f"  ({size:,} series)",
                ),
                classes="dialog-title",
            )
            with VerticalScroll(id="decision-body"):
                yield Static(Text("\n".join(review.describe(group))), id="decision-card")
                with Horizontal(id="decision-lists"):
                    yield OptionList(
                        *[Option(Text(f"{c.key} {c.label}"), id=c.code) for c in OUTCOMES],
                        id="decision-outcome",
                    )
                    yield OptionList(
                        *[
                            Option(Text(f"{c.key or ' '} {fmt.plain(c.label)}"), id=c.code)
                            for c in self._causes
                        ],
                        id="decision-cause",
                    )
                yield Input(
                    value=self._adjustment,
                    placeholder="adjustment of the group's total, e.g. x0.9, +10%, 1-4: =1200",
                    id="decision-adjust",
                )
                yield Static(Text(""), id="decision-preview")
                yield SeriesChart(id="decision-chart")
                yield NoteArea("", id="decision-note", soft_wrap=True, show_line_numbers=False)
            yield Static(
                Text(
                    "ctrl+s: save for every series   ctrl+b: split basis   escape: cancel\n"
                    "Advisory: check every adjustment in the planning system."
                ),
                classes="dialog-keys",
            )

    def on_mount(self) -> None:
        outcome_list = self.query_one("#decision-outcome", OptionList)
        cause_list = self.query_one("#decision-cause", OptionList)
        outcome_list.border_title = "outcome for every series"
        cause_list.border_title = "root cause"
        self.query_one("#decision-adjust", Input).border_title = "adjustment of the group's total"
        self.query_one("#decision-note", TextArea).border_title = "note (optional)"
        outcome_list.highlighted = [c.code for c in OUTCOMES].index(ADJUSTED)
        cause_list.highlighted = len(self._causes) - 1
        self._fit(self.app.size.height)
        self._preview(self._adjustment)
        self.query_one("#decision-adjust", Input).focus()

    def on_resize(self, event: events.Resize) -> None:
        self._fit(event.size.height)

    def _fit(self, rows: int) -> None:
        """On a short terminal the whole screen, and neither chart nor the group's words (the
        main screen shows them), so the preview sits under the adjustment field."""
        self.set_class(rows < CHART_MIN_ROWS, "-short")
        self.query_one("#decision-chart", SeriesChart).display = rows >= CHART_MIN_ROWS
        self.query_one("#decision-card", Static).display = rows >= CHART_MIN_ROWS

    @on(Input.Changed, "#decision-adjust")
    def _adjust_changed(self, event: Input.Changed) -> None:
        self._preview(event.value)

    def _preview(self, spec: str) -> bool:
        """Show what ``spec`` does to the total and to the series; True when it is valid."""
        preview = self.query_one("#decision-preview", Static)
        if not spec.strip():
            preview.update(Text("no adjustment: every series' forward forecast stays as it is"))
            self._draw(self._review.chart(self._group))
            return True
        try:
            result = self._review.preview(self._group, spec, basis=self.basis)
        except AdjustError as exc:
            preview.update(Text(str(exc), style="bold red"))
            self._draw(self._review.chart(self._group))
            return False
        session = self._review.session
        members = self._review.members(self._group)
        lines = [f"group total: {result.total.description}"]
        if result.fallback.any():
            lines.append(
                f"{int(result.fallback.sum())} period(s) where the series' forecasts sum to 0 "
                "are split by their history averages"
            )
        op = result.total.adjustment.op
        if op == USE:
            lines.append(
                f"each series takes its own {visible(result.total.adjustment.source)}; "
                "largest changes:"
            )
        else:
            by_history = self.basis == split.HISTORY and op not in split.RELATIVE
            basis = "history averages" if by_history else "forecasts"
            lines.append(f"split by proportions of the series' {basis}; largest changes:")
        deltas = result.delta_units
        for row in result.largest_changes(PREVIEW_SERIES):
            if deltas[row] == 0:
                break
            key = fmt.key_text(session.key(int(members[row])))
            lines.append(f"  {key}  {number(float(deltas[row]), 1, signed=True)} units")
        preview.update(Text("\n".join(visible(line) for line in lines)))
        self._draw(self._review.chart(self._group, result.total.adjusted))
        return True

    def _draw(self, data: ChartSeries) -> None:
        chart = self.query_one("#decision-chart", SeriesChart)
        if chart.display:
            chart.show(data)

    def action_basis(self) -> None:
        self.basis = split.HISTORY if self.basis == split.FORECASTS else split.FORECASTS
        self._preview(self.query_one("#decision-adjust", Input).value)

    def current_draft(self) -> GroupDraft:
        """The fields as they are on screen now."""
        outcome_list = self.query_one("#decision-outcome", OptionList)
        cause_list = self.query_one("#decision-cause", OptionList)
        cause = cause_list.highlighted if cause_list.highlighted is not None else -1
        return GroupDraft(
            group=self._group,
            outcome=OUTCOMES[outcome_list.highlighted or 0].code,
            root_cause=self._causes[cause].code,
            note=self.query_one("#decision-note", TextArea).text,
            adjustment=self.query_one("#decision-adjust", Input).value.strip(),
            basis=self.basis,
        )

    def action_save(self) -> None:
        draft = self.current_draft()
        preview = self.query_one("#decision-preview", Static)
        if draft.outcome == ADJUSTED and not draft.adjustment:
            preview.update(Text("outcome 'adjusted' needs an adjustment", style="bold red"))
            return
        if draft.adjustment and draft.outcome != ADJUSTED:
            preview.update(
                Text("an adjustment is typed: choose outcome 'adjusted' or clear it", "bold red")
            )
            return
        if draft.adjustment:
            if not self._preview(draft.adjustment):
                return
            canonical = str(self._review.preview(self._group, draft.adjustment).total.adjustment)
            draft = GroupDraft(
                draft.group, draft.outcome, draft.root_cause, draft.note, canonical, draft.basis
            )
        self.dismiss(draft)

    def action_cancel(self) -> None:
        self.dismiss(None)
