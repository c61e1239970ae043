"""Shared waits for the Pilot tests: the app loads and saves in worker threads."""

from __future__ import annotations

from collections.abc import Callable

from triage.tui.app import TriageApp


async def wait_for(pilot, predicate: Callable[[], bool], what: str, tries: int = 300) -> None:
    """Let the app run until ``predicate`` holds; fail naming ``what`` after ~15 s."""
    for _ in range(tries):
        await pilot.pause(0.05)
        if predicate():
            return
    raise AssertionError(f"timed out waiting for {what}")


async def wait_loaded(app: TriageApp, pilot) -> None:
    """Until the portfolio is scored and shown."""
    await wait_for(pilot, lambda: app.session is not None, f"the app to load ({app.status_text})")
    await pilot.pause(0.1)
