"""The decision dialog: outcome, root cause, adjustment with a live preview, and a note."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

from rich.text import Text
from textual import on
from textual.app import ComposeResult
from textual.binding import Binding, BindingType
from textual.containers import Horizontal, Vertical
from textual.widgets import Input, OptionList, Static, TextArea
from textual.widgets.option_list import Option

from triage.core import ledger as ledger_mod
from triage.core.adjust import AdjustError
from triage.core.config import Choice
from triage.core.review import ReviewSession
from triage.tui.format import clip
from triage.tui.screens.base import Dialog
from triage.tui.widgets.chart import SeriesChart


@dataclass(frozen=True)
class Draft:
    """What the reviewer entered; kept when a save fails so nothing typed is lost."""

    series: int
    outcome: str
    root_cause: str
    note: str
    adjustment: str


class DecisionScreen(Dialog[Draft | None]):
    """Record a decision for one series.

    | Key | Action |
    | --- | --- |
    | ctrl+s | save the decision |
    | escape | cancel (nothing is saved) |
    | tab / shift+tab | next / previous field |
    """

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding(
            "ctrl+s",
            "save",
            "Save",
            priority=True,
            id="decision.save",
            tooltip="Save the decision to the ledger",
        ),
        Binding(
            "escape",
            "cancel",
            "Cancel",
            priority=True,
            id="decision.cancel",
            tooltip="Close without saving",
        ),
    ]

    def __init__(
        self, session: ReviewSession, series: int, draft: Draft, causes: tuple[Choice, ...]
    ) -> None:
        super().__init__()
        self._session = session
        self._series = series
        self._draft = draft
        self._causes = causes
        self._outcomes = ledger_mod.OUTCOMES

    def compose(self) -> ComposeResult:
        key = clip(" @ ".join(k for k in self._session.key(self._series) if k))
        with Vertical(classes="dialog decision"):
            yield Static(
                Text.assemble(("Decision for ", "bold"), (key, "bold reverse")),
                classes="dialog-title",
            )
            yield Static(Text(self._session.describe(self._series)), id="decision-card")
            with Horizontal(id="decision-lists"):
                yield OptionList(
                    *[Option(Text(f"{c.key} {c.label}"), id=c.code) for c in self._outcomes],
                    id="decision-outcome",
                )
                yield OptionList(
                    *[Option(Text(f"{c.key or ' '} {c.label}"), id=c.code) for c in self._causes],
                    id="decision-cause",
                )
            suggestion = self._session.suggest_spec[self._series]
            yield Input(
                value=self._draft.adjustment,
                placeholder="adjustment, e.g. x0.9, +10%, 1-4: =120, mean 8, bias"
                + (f" (suggested: {suggestion})" if suggestion else ""),
                id="decision-adjust",
            )
            yield Static(Text(""), id="decision-preview")
            yield SeriesChart(id="decision-chart")
            yield TextArea(
                self._draft.note, id="decision-note", soft_wrap=True, show_line_numbers=False
            )
            yield Static(
                Text("ctrl+s: save   escape: cancel   tab: next field"), classes="dialog-keys"
            )

    def on_mount(self) -> None:
        outcome_list = self.query_one("#decision-outcome", OptionList)
        cause_list = self.query_one("#decision-cause", OptionList)
        outcome_list.border_title = "outcome"
        cause_list.border_title = "root cause"
        self.query_one(
            "#decision-adjust", Input
        ).border_title = "adjustment of the forward forecast"
        self.query_one("#decision-note", TextArea).border_title = "note (optional, several lines)"
        outcome_list.highlighted = [c.code for c in self._outcomes].index(self._draft.outcome)
        codes = [c.code for c in self._causes]
        cause_list.highlighted = (
            codes.index(self._draft.root_cause)
            if self._draft.root_cause in codes
            else len(codes) - 1
        )
        self._preview(self._draft.adjustment)
        if self._draft.outcome == ledger_mod.ADJUSTED:
            self.query_one("#decision-adjust", Input).focus()
        else:
            outcome_list.focus()

    @on(Input.Changed, "#decision-adjust")
    def _adjust_changed(self, event: Input.Changed) -> None:
        self._preview(event.value)
        if event.value.strip():
            self._select_outcome(ledger_mod.ADJUSTED)

    def _select_outcome(self, code: str) -> None:
        self.query_one("#decision-outcome", OptionList).highlighted = [
            c.code for c in self._outcomes
        ].index(code)

    def _preview(self, spec: str) -> bool:
        """Show what ``spec`` does; True when it is valid (or empty)."""
        preview = self.query_one("#decision-preview", Static)
        chart = self.query_one("#decision-chart", SeriesChart)
        if not spec.strip():
            preview.update(Text("no adjustment: the forward forecast stays as it is"))
            chart.show(self._session.chart(self._series))
            return True
        try:
            result = self._session.preview(self._series, spec)
        except AdjustError as exc:
            preview.update(Text(str(exc), style="bold red"))
            chart.show(self._session.chart(self._series))
            return False
        words = result.description
        if result.clipped:
            words += f"  ({result.message})"
        preview.update(Text(words))
        chart.show(self._session.chart(self._series, result.adjusted))
        return True

    def _current(self) -> Draft:
        outcome_list = self.query_one("#decision-outcome", OptionList)
        cause_list = self.query_one("#decision-cause", OptionList)
        outcome = self._outcomes[outcome_list.highlighted or 0].code
        cause = self._causes[
            cause_list.highlighted if cause_list.highlighted is not None else -1
        ].code
        return Draft(
            series=self._series,
            outcome=outcome,
            root_cause=cause,
            note=self.query_one("#decision-note", TextArea).text,
            adjustment=self.query_one("#decision-adjust", Input).value.strip(),
        )

    def action_save(self) -> None:
        draft = self._current()
        preview = self.query_one("#decision-preview", Static)
        if draft.outcome == ledger_mod.ADJUSTED and not draft.adjustment:
            preview.update(
                Text("outcome 'adjusted' needs an adjustment: type one above", style="bold red")
            )
            self.query_one("#decision-adjust", Input).focus()
            return
        if draft.adjustment and draft.outcome != ledger_mod.ADJUSTED:
            preview.update(
                Text(
                    "an adjustment is typed: choose outcome 'adjusted' or clear it",
                    style="bold red",
                )
            )
            return
        if draft.adjustment and not self._preview(draft.adjustment):
            return
        self.dismiss(draft)

    def action_cancel(self) -> None:
        self.dismiss(None)
