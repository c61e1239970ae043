"""Keys are handled one at a time, in the order they were typed.

Textual hands a key (or a paste) to the focused widget's queue and goes straight on to the
next key. A key that moves focus or opens a dialog is acted on only when it has travelled
through that queue (and bubbled up to the app for its binding), so the keys typed right after
it are already queued for the old widget: at full typing speed text lands in the wrong field,
a dialog opens on the series before the cursor moved, and a save reads fields whose keys are
still queued.

``KeyOrder`` holds every new key until the previous one has been handled all the way: its
probe follows the key through the queue of the widget it was given to and of each ancestor up
to the app, so it runs only after the key (and any binding it triggered) is done. A freshly
opened dialog takes keys only once it says it is ready (its fields exist and one has focus).
A timeout releases the next key if a probe is lost (its widget was removed), so typing can
never stall.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Awaitable, Callable
from typing import TYPE_CHECKING

from textual import events

if TYPE_CHECKING:
    from textual.app import App
    from textual.dom import DOMNode
    from textual.timer import Timer

#: Seconds after which a key whose probe never came back stops holding the next one.
PROBE_TIMEOUT = 2.0
#: Rounds a probe makes along the key's path before it lets the next key go.
MAX_PASSES = 5
#: Times a probe waits at one widget for messages the key caused there (bounded: a widget's
#: timers keep posting).
MAX_WAITS = 50


class KeyOrder:
    """Serialises key events for one app (see the module docstring).

    Args:
        app: The app whose keys are ordered.
        dispatch: The app's own handling of one key (``App.on_event``).
    """

    def __init__(
        self, app: App, dispatch: Callable[[events.Key | events.Paste], Awaitable[None]]
    ) -> None:
        self._app = app
        self._dispatch = dispatch
        self._held: deque[events.Key | events.Paste] = deque()
        self._busy = False
        self._token = 0
        self._timer: Timer | None = None
        self._passes: dict[int, int] = {}

    @property
    def pending(self) -> int:
        """Keys typed but not yet handed on."""
        return len(self._held) + int(self._busy)

    async def key(self, event: events.Key | events.Paste) -> None:
        """Take a key (or a paste) from the terminal: hand it on now, or hold it in line."""
        self._held.append(event)
        await self._drain()

    async def screen_ready(self) -> None:
        """A dialog that was not ready for keys now is: hand on the keys it held back."""
        await self._drain()

    async def _drain(self) -> None:
        while self._held and not self._busy and _ready(self._app):
            event = self._held.popleft()
            self._busy = True
            self._token += 1
            token = self._token
            target: DOMNode = self._app.focused or self._app.screen
            await self._dispatch(event)
            if not event.is_forwarded:
                # Handled by a priority binding right here: done.
                self._busy = False
                continue
            self._start_timer(token)
            self._probe([*target.ancestors_with_self], token)

    @property
    def token(self) -> int:
        """Which key is in flight (increases with every key handed on)."""
        return self._token

    def settle(self, token: int) -> None:
        """Key ``token`` closed a dialog: release it once the screen now on top is done with it.

        The dialog's own queue is closing, so the key's probe may never come back; instead a
        probe goes through the uncovered screen and the app, behind the dialog's result callback
        (which may open the next dialog or change the list).
        """
        if token == self._token and self._busy:
            self._probe([*self._app.screen.ancestors_with_self], token)

    def _probe(
        self, path: list[DOMNode], token: int, *, at: int = 0, waits: int = 0, seen: bool = False
    ) -> None:
        """Follow the key up through each queue of ``path``; the app's hop releases the next.

        At each widget the probe also waits for the messages the key caused there (an
        ``Input.Changed`` bubbling to the dialog, say). A binding runs in the app, after the key
        has bubbled up, and may post to a widget the probe already passed (``Input.Submitted``),
        so the probe goes round at least twice, and again until a pass finds every queue empty.
        """
        node = path[at]

        def hop() -> None:
            if token != self._token:
                return
            # Textual 8.2.8 (pinned) keeps a widget's pending messages in ``_message_queue``.
            queue = getattr(node, "_message_queue", None)
            if queue is not None and queue.qsize() and waits < MAX_WAITS:
                self._probe(path, token, at=at, waits=waits + 1, seen=True)
            else:
                self._next_hop(path, token, at, seen)

        if not node.call_later(hop):
            # The widget is closing: skip it.
            self._next_hop(path, token, at, seen)

    def _next_hop(self, path: list[DOMNode], token: int, at: int, seen: bool) -> None:
        if at + 1 < len(path):
            self._probe(path, token, at=at + 1, seen=seen)
        elif (seen or token not in self._passes) and self._passes.get(token, 0) < MAX_PASSES:
            # Always a second pass (for what the binding posted), more while queues were busy.
            self._passes[token] = self._passes.get(token, 0) + 1
            self._probe(path, token)
        else:
            self._release(token)

    def _start_timer(self, token: int) -> None:
        if self._timer is not None:
            self._timer.stop()
        self._timer = self._app.set_timer(PROBE_TIMEOUT, lambda: self._release(token))

    def _release(self, token: int) -> None:
        self._passes.pop(token, None)
        if token != self._token or not self._busy:
            return
        self._busy = False
        if self._timer is not None:
            self._timer.stop()
            self._timer = None
        self._app.call_later(self._drain)


def _ready(app: App) -> bool:
    """Whether the top screen takes keys (dialogs say so once a field has focus)."""
    return bool(getattr(app.screen, "ready_for_keys", True))
