"""Messages that workers post back to the review screens."""

from __future__ import annotations

from collections.abc import Callable

from textual.message import Message

from triage.core.group_review import GroupReview
from triage.core.ledger import AdjustmentEnd, Event
from triage.core.review import Background, ReviewSession


class LoadStep(Message):
    """The loading worker reached another step."""

    def __init__(self, step: int, total: int, label: str) -> None:
        super().__init__()
        self.step = step
        """Steps done so far."""
        self.total = total
        """Steps in all."""
        self.label = label
        """What is being done now."""


class Loaded(Message):
    """The portfolio is loaded, scored and the ledger read."""

    def __init__(
        self,
        session: ReviewSession,
        notices: tuple[str, ...],
        keep: Callable[[], None] | None = None,
    ) -> None:
        super().__init__()
        self.session = session
        """The review session to show."""
        self.notices = notices
        """Things the reviewer should know (ledger opened read-only, prices filled...)."""
        self.keep = keep
        """Writes the load to the reopen cache (run by the background worker), or None."""


class BackgroundStep(Message):
    """The background worker (suggestions, repeat offenders, search index) reached a step."""

    def __init__(self, session: ReviewSession, step: int, total: int, label: str) -> None:
        super().__init__()
        self.session = session
        """The session the work is for."""
        self.step = step
        """Steps done so far."""
        self.total = total
        """Steps in all."""
        self.label = label
        """What is being computed now."""


class BackgroundDone(Message):
    """The background pieces of a session are computed (``ReviewSession.background``)."""

    def __init__(self, session: ReviewSession, done: Background) -> None:
        super().__init__()
        self.session = session
        """The session the work is for."""
        self.done = done
        """What to hand to ``session.finish``."""


class BackgroundNote(Message):
    """Something the background worker wants on the status line."""

    def __init__(self, text: str) -> None:
        super().__init__()
        self.text = text


class Saved(Message):
    """A decision (or undo) is durably in the ledger."""

    def __init__(self, event: Event, what: str) -> None:
        super().__init__()
        self.event = event
        """The committed event."""
        self.what = what
        """Short description for the status line."""


class SaveFailed(Message):
    """A decision could not be saved; nothing was written."""

    def __init__(self, series: int, error: str, *, stale: bool = False) -> None:
        super().__init__()
        self.series = series
        """Portfolio index of the series."""
        self.error = error
        """Why, in words for the reviewer."""
        self.stale = stale
        """Another session changed the series: its state is read again from the ledger."""


class Exported(Message):
    """An export finished."""

    def __init__(self, summary: str) -> None:
        super().__init__()
        self.summary = summary
        """What was written."""


class Ended(Message):
    """An earlier adjustment's end (or its restore) is durably in the ledger."""

    def __init__(self, record: AdjustmentEnd) -> None:
        super().__init__()
        self.record = record
        """The committed end or restore."""


class GroupsReady(Message):
    """The groups of the session are ranked (``GroupReview``), or could not be made."""

    def __init__(self, review: GroupReview | None, error: str = "") -> None:
        super().__init__()
        self.review = review
        """The ranked groups; None when ``error`` says why there are none."""
        self.error = error


class Fetched(Message):
    """Histories fetched from the dataset (a review on a stored scorecard)."""

    def __init__(self, series: tuple[int, ...], error: str | None = None) -> None:
        super().__init__()
        self.series = series
        """The series asked for (their histories are at hand unless ``error``)."""
        self.error = error
        """Why the fetch failed, or None."""
