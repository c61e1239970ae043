"""Small modal dialogs: a one-line prompt, a list to choose from, and the key help."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import ClassVar

from rich.table import Table
from rich.text import Text
from textual import events, on
from textual.app import ComposeResult
from textual.binding import Binding, BindingType
from textual.containers import Vertical, VerticalScroll
from textual.widgets import Input, OptionList, Static
from textual.widgets.option_list import Option

from triage.tui.screens.base import Dialog


class PromptScreen(Dialog[str | None]):
    """Ask for one line of text; ``enter`` answers, ``escape`` cancels (None)."""

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("escape", "cancel", "Cancel", id="prompt.cancel")
    ]

    def __init__(
        self, title: str, *, value: str = "", placeholder: str = "", note: str = ""
    ) -> None:
        super().__init__()
        self._title = title
        self._value = value
        self._placeholder = placeholder
        self._note = note

    def compose(self) -> ComposeResult:
        with Vertical(classes="dialog"):
            yield Static(Text(self._title, style="bold"), classes="dialog-title")
            yield Input(value=self._value, placeholder=self._placeholder, id="prompt-input")
            if self._note:
                yield Static(Text(self._note), classes="dialog-note")
            yield Static(Text("enter: ok   escape: cancel"), classes="dialog-keys")

    @on(Input.Submitted)
    def _submit(self, event: Input.Submitted) -> None:
        self.dismiss(event.value)

    def action_cancel(self) -> None:
        self.dismiss(None)


class ChooseScreen(Dialog[str | None]):
    """Pick one entry of a list; answers the entry's id, or None on ``escape``."""

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("escape", "cancel", "Cancel", id="choose.cancel")
    ]

    def __init__(self, title: str, choices: Sequence[tuple[str, str]]) -> None:
        super().__init__()
        self._title = title
        self._choices = list(choices)

    def compose(self) -> ComposeResult:
        with Vertical(classes="dialog"):
            yield Static(Text(self._title, style="bold"), classes="dialog-title")
            yield OptionList(
                *[Option(Text(label), id=str(i)) for i, (_, label) in enumerate(self._choices)],
                id="choose-list",
            )
            yield Static(Text("enter: choose   escape: cancel"), classes="dialog-keys")

    @on(OptionList.OptionSelected)
    def _chosen(self, event: OptionList.OptionSelected) -> None:
        self.dismiss(self._choices[int(event.option.id or 0)][0])

    def action_cancel(self) -> None:
        self.dismiss(None)


class HelpScreen(Dialog[None]):
    """Every key binding of the review screens, with what it does."""

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("escape,q,question_mark", "close", "Close", id="help.close")
    ]

    def __init__(
        self, rows: Sequence[tuple[str, str, str]], meanings: Mapping[str, str] | None = None
    ) -> None:
        super().__init__()
        self._rows = list(rows)
        self._meanings = dict(meanings or {})

    def compose(self) -> ComposeResult:
        table = Table(box=None, show_header=True, header_style="bold", expand=True)
        table.add_column("key", no_wrap=True)
        table.add_column("action")
        table.add_column("what it does")
        for key, description, tooltip in self._rows:
            table.add_row(Text(key), Text(description), Text(tooltip))
        words = Table(box=None, show_header=True, header_style="bold", expand=True)
        words.add_column("measure", no_wrap=True)
        words.add_column("what it means")
        for name, meaning in self._meanings.items():
            words.add_row(Text(name), Text(meaning))
        with Vertical(classes="dialog help"):
            yield Static(Text("Keys", style="bold"), classes="dialog-title")
            with VerticalScroll():
                yield Static(table)
                if self._meanings:
                    yield Static(Text("\nMeasures", style="bold"))
                    yield Static(words)
            yield Static(Text("escape, q or ?: close"), classes="dialog-keys")

    def action_close(self) -> None:
        self.dismiss(None)


class ConfirmScreen(Dialog[bool]):
    """Ask a yes/no question; ``y`` or ``enter`` answers yes, ``n`` or ``escape`` no."""

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("y,enter", "answer(True)", "Yes", id="confirm.yes"),
        Binding("n,escape", "answer(False)", "No", id="confirm.no"),
    ]

    def __init__(self, question: Text) -> None:
        super().__init__()
        self._question: Text = question

    def compose(self) -> ComposeResult:
        with Vertical(classes="dialog confirm"):
            yield Static(self._question, classes="dialog-title")
            yield Static(Text("y or enter: yes   n or escape: no"), classes="dialog-keys")

    def on_mount(self) -> None:
        self.query_one(Vertical).can_focus = True
        self.query_one(Vertical).focus()

    def action_answer(self, yes: bool) -> None:
        self.dismiss(yes)


class WaitScreen(Dialog[bool]):
    """Shown while what the next dialog needs is fetched: the keys typed meanwhile are kept for
    that dialog (``typed``), so none of them acts on the screen below. Dismissed with True when
    the dialog can open (``ready``), False on ``escape`` or when the fetch failed."""

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("escape", "cancel", "Cancel", id="wait.cancel")
    ]

    def __init__(self, text: str) -> None:
        super().__init__()
        self._text = text
        self.typed: list[events.Event] = []
        """Keys and pastes typed while waiting, in order."""

    def compose(self) -> ComposeResult:
        with Vertical(classes="dialog"):
            yield Static(Text(self._text, style="bold"), classes="dialog-title")
            yield Static(
                Text("what you type now goes to the dialog   escape: cancel"),
                classes="dialog-keys",
            )

    def on_key(self, event: events.Key) -> None:
        if event.key == "escape":
            return
        self.typed.append(events.Key(event.key, event.character))
        event.stop()
        event.prevent_default()

    def on_paste(self, event: events.Paste) -> None:
        self.typed.append(events.Paste(event.text))
        event.stop()
        event.prevent_default()

    def ready(self) -> None:
        self.dismiss(True)

    def action_cancel(self) -> None:
        self.dismiss(False)
