"""How the reader words a refusal: the error itself, counts, lists and quoted file text.

Text from the file that a message quotes (headers, cells) has its control characters replaced by
visible symbols (``triage.core.text.STORED_TABLE``), so a message never carries a terminal
escape.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import NoReturn

from triage.core.errors import LoadError
from triage.core.text import STORED_TABLE

EXAMPLES_SHOWN = 3


def fail(path: Path, message: str, hint: str | None = None) -> NoReturn:
    """Refuse the file: a :class:`~triage.core.errors.LoadError` naming it, and what to do."""
    raise LoadError(path, message, hint=hint)


def sanitized(text: str) -> str:
    """``text`` with its C0, DEL and C1 control characters shown as visible symbols."""
    return text.translate(STORED_TABLE)


def plural(count: int, noun: str) -> str:
    """``1 row``, ``2 rows``."""
    return f"{count} {noun}" + ("" if count == 1 else "s")


def quote_list(names: Sequence[str], limit: int = 30) -> str:
    """Names quoted and joined by commas, the first ``limit`` of them and how many more."""
    shown = ", ".join(f"'{n}'" for n in names[:limit])
    return shown + (f" and {len(names) - limit} more" if len(names) > limit else "")
