"""The base of every dialog: it takes keys only once a field has focus (see ``keyorder``)."""

from __future__ import annotations

from typing import TypeVar

from textual import events
from textual.await_complete import AwaitComplete
from textual.screen import ModalScreen

ResultType = TypeVar("ResultType")

#: Refreshes a dialog waits for one of its fields to take focus before it takes keys anyway.
FOCUS_TRIES = 5


class Dialog(ModalScreen[ResultType]):
    """A modal dialog that tells the app when it is ready for the keys typed after opening it."""

    ready_for_keys = False
    """Read by ``KeyOrder``: keys typed while False wait, in order, instead of getting lost."""

    def _on_screen_resume(self, event: events.ScreenResume) -> None:
        # Runs before Textual's own resume handler gives focus to the first field.
        self.call_after_refresh(self._check_ready, FOCUS_TRIES)

    def _check_ready(self, tries: int) -> None:
        if self.ready_for_keys:
            return
        if self.focused is None and tries > 0:
            self.call_after_refresh(self._check_ready, tries - 1)
            return
        self.ready_for_keys = True
        keys = getattr(self.app, "key_order", None)
        if keys is not None:
            self.app.call_later(keys.screen_ready)

    def dismiss(self, result: ResultType | None = None) -> AwaitComplete:
        """Close the dialog; the key that closed it is done, so the next key may go on."""
        done = super().dismiss(result)
        keys = getattr(self.app, "key_order", None)
        if keys is not None:
            keys.settle(keys.token)
        return done
