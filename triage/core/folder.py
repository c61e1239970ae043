"""The review folder: a planner drops each week's portfolio file into one folder.

Every file there shares the folder's ledger (``triage.core.ledger.locate_ledger``), and
``triage review FOLDER`` opens the newest file: ``newest_portfolio``.

"Newest" is the file whose **review cycle** (the date of its latest actual period) is latest,
not the most recently modified one: a file copied, re-saved or restored from a backup gets a
new modification time, while its cycle says which week it holds. Finding the cycle means
reading each file once, as ``triage check`` would. Among files of the same latest cycle the most
recently modified one is opened, and the notice says which others share the cycle.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from triage.core.errors import TriageError
from triage.core.read import SUFFIXES

if TYPE_CHECKING:
    from triage.core.dialect import FileOptions


@dataclass(frozen=True)
class NewestPortfolio:
    """The portfolio file a review of a folder opens, and what was looked at."""

    path: Path
    """The file with the latest review cycle."""
    cycle: str
    """Its review cycle (ISO date)."""
    candidates: int
    """Portfolio files read in the folder (the chosen one included)."""
    notices: tuple[str, ...]
    """What to tell the reviewer: which file was opened and why, files skipped, ties."""


#: The name the review screens offer for an export (``<stem>-review-<cycle>.xlsx``).
_REVIEW_EXPORT = re.compile(r".+-review-\d{4}-\d{2}-\d{2}\.xlsx", re.IGNORECASE)


def portfolio_files(folder: Path) -> list[Path]:
    """Files in ``folder`` (not below it) that triage could read as a portfolio, by name.

    Hidden files, spreadsheet lock files (``~$week.xlsx``) and triage's own exports are left
    out: a CSV export set (``X-decisions.csv`` and ``X-forecast.csv`` beside ``X-README.txt``)
    and the review screens' default export name (``<stem>-review-<YYYY-MM-DD>.xlsx``), so a
    large export is never read in search of the newest week.
    """
    return sorted(
        p
        for p in folder.iterdir()
        if p.is_file()
        and p.suffix.lower() in SUFFIXES
        and not p.name.startswith((".", "~$"))
        and not _is_export(p)
    )


def _is_export(path: Path) -> bool:
    if _REVIEW_EXPORT.fullmatch(path.name):
        return True
    for tail in ("-decisions.csv", "-forecast.csv"):
        if path.name.endswith(tail):
            stem = path.name[: -len(tail)]
            return path.with_name(f"{stem}-README.txt").is_file()
    return False


def newest_portfolio(
    folder: str | Path,
    *,
    columns: dict[str, str] | None = None,
    sheet: str | None = None,
    lag: int | None = None,
    options: FileOptions | None = None,
) -> NewestPortfolio:
    """The portfolio file of ``folder`` with the latest review cycle.

    Each candidate (``portfolio_files``) is read with the same options as the review would read
    it; a file that is not a portfolio (an export, a report, a file with other columns) is
    skipped and named in a notice.

    Raises:
        TriageError: The folder holds no file that reads as a portfolio (each skipped file is
            named with its reason).
    """
    from triage.core.read import read_portfolio

    root = Path(folder)
    files = portfolio_files(root)
    if not files:
        raise TriageError(
            f"{root} holds no portfolio file (.csv, .xlsx, .xlsm or .parquet).",
            hint="Put the weekly file in the folder, or give the file itself.",
        )
    cycles: dict[Path, str] = {}
    skipped: list[str] = []
    for path in files:
        try:
            cycles[path] = read_portfolio(
                path, columns=columns, sheet=sheet, lag=lag, options=options
            ).cycle
        except TriageError as exc:
            skipped.append(f"{path.name} ({_first_line(str(exc))})")
    if not cycles:
        raise TriageError(
            f"{root} holds no file that reads as a portfolio: " + "; ".join(skipped) + ".",
            hint="Give the portfolio file itself to see the whole message.",
        )
    latest = max(cycles.values())
    tied = sorted(
        (p for p, c in cycles.items() if c == latest),
        key=lambda p: (p.stat().st_mtime_ns, p.name),
    )
    chosen = tied[-1]
    notices = [
        f"Opening {chosen.name}, the newest of {len(cycles)} portfolio file"
        f"{'s' if len(cycles) != 1 else ''} in {root} (review cycle {latest})."
    ]
    if len(tied) > 1:
        notices.append(
            f"{len(tied)} files hold cycle {latest} ("
            + ", ".join(p.name for p in tied)
            + f"); {chosen.name} is the most recently modified."
        )
    if skipped:
        notices.append("Not portfolio files, skipped: " + "; ".join(skipped) + ".")
    return NewestPortfolio(chosen, latest, len(cycles), tuple(notices))


def _first_line(text: str) -> str:
    line = text.strip().splitlines()[0] if text.strip() else text
    return line if len(line) <= 160 else line[:159] + "…"
