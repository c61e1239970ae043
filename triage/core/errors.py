"""Errors the core raises for the user to act on (never for programming mistakes)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from triage.core.text import visible


class TriageError(Exception):
    """A problem the user can fix; the command line prints it without a traceback."""

    exit_code = 2

    def __init__(self, message: str, *, hint: str | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.hint = hint

    def __str__(self) -> str:
        # File names and cell text in a message reach the terminal: their control characters
        # (an ESC in a file name could retitle the window) are shown as visible symbols.
        text = f"{self.message}\n  What to do: {self.hint}" if self.hint else self.message
        return visible(text, multiline=True)

    def __reduce__(self) -> tuple[Any, ...]:
        # A worker process of a partitioned run raises it and the command line prints it: it
        # must cross processes whole, and the subclasses' constructors take other arguments.
        return (_restored, (type(self), self.args, dict(self.__dict__)))


def _restored(cls: type[TriageError], args: tuple[Any, ...], state: dict[str, Any]) -> TriageError:
    """A pickled :class:`TriageError` (any subclass) as it was raised."""
    error = cls.__new__(cls)
    Exception.__init__(error, *args)
    error.__dict__.update(state)
    return error


class LoadError(TriageError):
    """The portfolio file cannot be read or scored as it is.

    Attributes:
        path: The file that was being read.
    """

    def __init__(self, path: str | Path, message: str, *, hint: str | None = None) -> None:
        self.path = Path(path)
        super().__init__(f"{self.path}: {message}", hint=hint)


def format_rows(rows: list[int] | tuple[int, ...], *, limit: int = 5) -> str:
    """Render file line numbers for a message: ``rows 3, 9, 12 and 4 more``."""
    shown = ", ".join(str(r) for r in rows[:limit])
    more = len(rows) - limit
    word = "row" if len(rows) == 1 else "rows"
    return f"{word} {shown}" + (f" and {more} more" if more > 0 else "")
