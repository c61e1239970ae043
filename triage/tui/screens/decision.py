"""The decision dialog: outcome, root cause, adjustment with a live preview, and a note.

It opens on the series' current decision in this cycle (whoever recorded it, in whatever
session), says who recorded it and when, and saves exactly what is on screen: an unchanged
dialog records nothing, and replacing another reviewer's decision asks first.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import ClassVar, Literal

from rich.text import Text
from textual import events, on
from textual.app import ComposeResult
from textual.binding import Binding, BindingType
from textual.containers import Horizontal, Vertical, VerticalScroll
from textual.widgets import Input, OptionList, Static, TextArea
from textual.widgets.option_list import Option

from triage.core.adjust import AdjustError
from triage.core.ledger import Event
from triage.core.review import ReviewSession
from triage.core.text import visible
from triage.core.vocabulary import ADJUSTED, OUTCOMES, Choice
from triage.tui import format as fmt
from triage.tui.screens.base import Dialog
from triage.tui.screens.dialogs import ConfirmScreen
from triage.tui.widgets.chart import SeriesChart

#: What the dialog answers when saved without a change: nothing is recorded.
UNCHANGED: Literal["unchanged"] = "unchanged"
#: Below this many rows the dialog drops its chart so every field fits with little scrolling.
CHART_MIN_ROWS = 36


@dataclass(frozen=True)
class Draft:
    """What the reviewer entered; kept when a save fails so nothing typed is lost."""

    series: int
    outcome: str
    root_cause: str
    note: str
    adjustment: str
    expected_version: int | None = None
    """The series' version the reviewer decided on; None: the latest this session knows."""

    def same_decision(self, other: Draft) -> bool:
        """Whether both record the same outcome, cause, note and adjustment text."""
        return (self.outcome, self.root_cause, self.note, self.adjustment) == (
            other.outcome,
            other.root_cause,
            other.note,
            other.adjustment,
        )


class NoteArea(TextArea):
    """The note editor: pasted text shows control characters as symbols, never raw."""

    async def _on_paste(self, event: events.Paste) -> None:
        # Textual calls this before TextArea's own handler (which inserts the text).
        event.text = visible(event.text, multiline=True)


def draft_of(event: Event, series: int, version: int) -> Draft:
    """The dialog's fields for a recorded decision."""
    return Draft(
        series=series,
        outcome=event.outcome or OUTCOMES[0].code,
        root_cause=event.root_cause or "unknown",
        note=event.note,
        adjustment=event.adjustment or "",
        expected_version=version,
    )


class DecisionScreen(Dialog[Draft | Literal["unchanged"] | None]):
    """Record a decision for one series.

    | Key | Action |
    | --- | --- |
    | ctrl+s | save the decision |
    | escape | cancel (nothing is saved) |
    | tab / shift+tab | next / previous field |
    | 1-9, 0 | pick a root cause (outside the text fields) |
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
        *fmt.digit_bindings(
            "pick_cause",
            "decision",
            "Pick a root cause (when the adjustment and note fields are not focused)",
        ),
    ]

    def __init__(
        self,
        session: ReviewSession,
        draft: Draft,
        causes: tuple[Choice, ...],
        *,
        base: Event | None,
        kept: bool = False,
    ) -> None:
        """Open the dialog.

        Args:
            session: The review session.
            draft: The fields to start from (the current decision, a kept entry, or defaults).
            causes: Root causes offered.
            base: The series' current decision in this cycle as read from the ledger, or None.
            kept: ``draft`` is an entry that was not saved (a save failed); say so.
        """
        super().__init__()
        self._session = session
        self._series = draft.series
        self._draft = draft
        self._causes = causes
        self._outcomes = OUTCOMES
        self._base = base
        self._kept = kept
        # The note as the editor shows it: control characters (an ESC from a file) as symbols.
        self._shown_note = visible(draft.note, multiline=True)

    def compose(self) -> ComposeResult:
        key = fmt.key_text(self._session.key(self._series))
        with Vertical(classes="dialog decision"):
            yield Static(
                Text.assemble(("Decision for ", "bold"), (key, "bold reverse")),
                classes="dialog-title",
            )
            with VerticalScroll(id="decision-body"):
                yield from self._fields()
            yield Static(
                Text(
                    "ctrl+s: save   escape: cancel   tab: next field   1-0: root cause\n"
                    "Advisory: check every adjustment in the planning system."
                ),
                classes="dialog-keys",
            )

    def _fields(self) -> ComposeResult:
        """The scrolling part: current decision, card, lists, adjustment, chart, note."""
        yield Static(self._current_text(), id="decision-current")
        card = [self._session.describe(self._series), self._session.forecasts_line(self._series)]
        yield Static(Text("\n".join(filter(None, card))), id="decision-card")
        with Horizontal(id="decision-lists"):
            yield OptionList(
                *[Option(Text(f"{c.key} {c.label}"), id=c.code) for c in self._outcomes],
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
            value=self._draft.adjustment, placeholder=self._placeholder(), id="decision-adjust"
        )
        yield Static(Text(""), id="decision-preview")
        yield SeriesChart(id="decision-chart")
        yield NoteArea(
            self._shown_note, id="decision-note", soft_wrap=True, show_line_numbers=False
        )

    def _placeholder(self) -> str:
        """The adjustment field's hint: examples, and the suggestion once it is computed."""
        suggestion = self._session.suggest_spec[self._series]
        # ``use NAME`` takes another forecast of the file: offered by the first one's name.
        other = next(iter(self._session.portfolio.competing), "")
        return (
            "adjustment, e.g. x0.9, +10%, 1-4: =120, mean 8, bias"
            + (f", use {visible(other)}" if other else "")
            + (f" (suggested: {suggestion})" if suggestion else "")
            + ("" if self._session.ready else " (suggestion still computing)")
        )

    def suggestion_ready(self) -> None:
        """The background pieces are in: show the suggestion in place of "still computing"."""
        self.query_one("#decision-adjust", Input).placeholder = self._placeholder()

    def _current_text(self) -> Text:
        base = self._base
        cycle = self._session.cycle
        if base is None:
            text = Text(f"no decision yet in cycle {cycle}", style="dim")
        else:
            text = Text.assemble(
                "current decision: ",
                (fmt.outcome_label(base.outcome), "bold"),
                f" ({fmt.cause_label(base.root_cause, self._causes)})",
                " by ",
                (fmt.plain(base.reviewer), "bold"),
                f" at {fmt.when(base.recorded_at)}",
            )
        if self._kept:
            text.append("\nyour entry below was NOT saved; ctrl+s saves it", style="bold red")
        return text

    def on_mount(self) -> None:
        outcome_list = self.query_one("#decision-outcome", OptionList)
        cause_list = self.query_one("#decision-cause", OptionList)
        outcome_list.border_title = "outcome"
        cause_list.border_title = "root cause"
        self.query_one(
            "#decision-adjust", Input
        ).border_title = "adjustment of the forward forecast"
        note = self.query_one("#decision-note", TextArea)
        note.border_title = "note (optional, several lines)"
        note.move_cursor(note.document.end)  # typing adds to a recorded note
        outcome_list.highlighted = [c.code for c in self._outcomes].index(self._draft.outcome)
        cause_list.highlighted = self._cause_index(self._draft.root_cause)
        self._fit(self.app.size.height)
        main_chart = self.app.screen_stack[0].query("#chart").first(SeriesChart)
        self.query_one("#decision-chart", SeriesChart).set_view(
            whole=main_chart.whole, clip=main_chart.clip, others=main_chart.others
        )
        self._preview(self._draft.adjustment)
        if self._draft.outcome == ADJUSTED:
            self.query_one("#decision-adjust", Input).focus()
        else:
            outcome_list.focus()

    def on_resize(self, event: events.Resize) -> None:
        self._fit(event.size.height)

    def _fit(self, rows: int) -> None:
        """On a short terminal the chart goes, so the fields need little scrolling."""
        self.set_class(rows < CHART_MIN_ROWS, "-short")
        self.query_one("#decision-chart", SeriesChart).display = rows >= CHART_MIN_ROWS

    def _cause_index(self, code: str) -> int:
        codes = [c.code for c in self._causes]
        return codes.index(code) if code in codes else len(codes) - 1

    @on(Input.Changed, "#decision-adjust")
    def _adjust_changed(self, event: Input.Changed) -> None:
        self._preview(event.value)
        if event.value.strip():
            self._select_outcome(ADJUSTED)

    def _select_outcome(self, code: str) -> None:
        self.query_one("#decision-outcome", OptionList).highlighted = [
            c.code for c in self._outcomes
        ].index(code)

    def action_pick_cause(self, index: int) -> None:
        if index < len(self._causes):
            self.query_one("#decision-cause", OptionList).highlighted = index

    def _preview(self, spec: str) -> bool:
        """Show what ``spec`` does; True when it is valid (or empty)."""
        preview = self.query_one("#decision-preview", Static)
        chart = self.query_one("#decision-chart", SeriesChart)
        show_chart = chart.display
        if not spec.strip():
            preview.update(Text("no adjustment: the forward forecast stays as it is"))
            if show_chart:
                chart.show(self._session.chart(self._series))
            return True
        try:
            result = self._session.preview(self._series, spec)
        except AdjustError as exc:
            preview.update(Text(str(exc), style="bold red"))
            if show_chart:
                chart.show(self._session.chart(self._series))
            return False
        words = result.description
        if result.clipped:
            words += f"  ({result.message})"
        preview.update(Text(words))
        if show_chart:
            chart.show(self._session.chart(self._series, result.adjusted))
        return True

    def current_draft(self) -> Draft:
        """The fields as they are on screen now."""
        return self._current()

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
            note=self._note_text(),
            adjustment=self.query_one("#decision-adjust", Input).value.strip(),
            expected_version=self._draft.expected_version,
        )

    def _note_text(self) -> str:
        """The note to save: the recorded text itself while the editor still shows it."""
        shown = self.query_one("#decision-note", TextArea).text
        return self._draft.note if shown == self._shown_note else shown

    def _refuse(self, words: str) -> None:
        self.query_one("#decision-preview", Static).update(Text(words, style="bold red"))

    def action_save(self) -> None:
        draft = self._current()
        if draft.outcome == ADJUSTED and not draft.adjustment:
            self._refuse("outcome 'adjusted' needs an adjustment: type one above")
            self.query_one("#decision-adjust", Input).focus()
            return
        if draft.adjustment and draft.outcome != ADJUSTED:
            self._refuse("an adjustment is typed: choose outcome 'adjusted' or clear it")
            return
        if draft.adjustment:
            if not self._preview(draft.adjustment):
                return
            draft = replace(
                draft,
                adjustment=self._session.canonical_adjustment(self._series, draft.adjustment),
            )
        base = self._base
        if base is not None:
            recorded = draft_of(base, self._series, draft.expected_version or 0)
            if draft.same_decision(recorded):
                self.dismiss(UNCHANGED)
                return
            if base.reviewer != self._session.reviewer:
                question = Text.assemble(
                    "Replace the decision recorded by ",
                    (fmt.plain(base.reviewer), "bold"),
                    f" at {fmt.when(base.recorded_at)} ",
                    f"({fmt.outcome_label(base.outcome)})?",
                )

                def answered(yes: bool | None) -> None:
                    if yes:
                        self.dismiss(draft)

                self.app.push_screen(ConfirmScreen(question), answered)
                return
        self.dismiss(draft)

    def action_cancel(self) -> None:
        self.dismiss(None)
