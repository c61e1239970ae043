"""Shared waits for the Pilot tests: the app loads and saves in worker threads."""

from __future__ import annotations

import unicodedata
from collections.abc import Callable

from textual import events
from textual.app import App, _get_unicode_name_from_key
from textual.keys import REPLACED_KEYS, _character_to_key

from triage.tui.app import TriageApp


async def wait_for(pilot, predicate: Callable[[], bool], what: str, tries: int = 300) -> None:
    """Let the app run until ``predicate`` holds; fail naming ``what`` after ~15 s."""
    for _ in range(tries):
        await pilot.pause(0.05)
        if predicate():
            return
    raise AssertionError(f"timed out waiting for {what}")


async def wait_listed(app: TriageApp, pilot) -> None:
    """Until the portfolio is scored and its list shown (background pieces may still run)."""
    await wait_for(pilot, lambda: app.session is not None, f"the app to load ({app.status_text})")


async def wait_loaded(app: TriageApp, pilot) -> None:
    """Until the portfolio is scored and shown, and the background pieces are in."""
    await wait_listed(app, pilot)
    await wait_for(
        pilot,
        lambda: app.session is not None and app.session.ready,
        f"the background pieces ({app.status_text})",
    )
    await pilot.pause(0.1)


def _key_event(key: str) -> events.Key:
    """A key event as Textual's driver makes it (the same mapping ``Pilot.press`` uses)."""
    if len(key) == 1 and not key.isalnum():
        key = _character_to_key(key)
    original = REPLACED_KEYS.get(key, key)
    try:
        char: str | None = unicodedata.lookup(_get_unicode_name_from_key(original))
    except KeyError:
        char = key if len(key) == 1 else None
    return events.Key(key, char)


PASTE = "paste:"


def burst(app: App, keys: list[str]) -> None:
    """Deliver keys as one burst from the terminal; ``"paste:TEXT"`` is a bracketed paste.

    ``Pilot.press`` waits for the app to go idle after every key; a reviewer typing at full
    speed (or tmux sending a string) does not, so this posts every event at once, the way the
    driver's input thread does.
    """
    driver = app._driver
    assert driver is not None
    for key in keys:
        event: events.Event = (
            events.Paste(key[len(PASTE) :]) if key.startswith(PASTE) else _key_event(key)
        )
        event.set_sender(app)
        driver.send_message(event)
