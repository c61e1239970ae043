"""Command-line options shared by several subcommands, defined once."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

from triage.core.errors import TriageError
from triage.core.text import visible as printable

if TYPE_CHECKING:
    from triage.core.config import Config
    from triage.core.ledger import Ledger


def portfolio_args(parser: argparse.ArgumentParser) -> None:
    """The portfolio file and how to read it: ``PORTFOLIO --columns --sheet --lag`` and the
    file's own conventions ``--sep --decimal --date-format --header-row`` (``read_args``)."""
    parser.add_argument("portfolio", type=Path, help="portfolio file: .csv, .parquet or .xlsx")
    parser.add_argument(
        "--columns",
        metavar="MAP",
        help="map our column names to the file's headers, e.g. demand=qty_shipped,item=sku",
    )
    parser.add_argument("--sheet", help="xlsx sheet to read (default: the first visible sheet)")
    parser.add_argument(
        "--lag", type=int, help="forecast lag to score, when the file holds several"
    )
    parser.add_argument(
        "--sep", metavar="CHAR", help="CSV field separator: ';', '|' or tab (default ',')"
    )
    parser.add_argument(
        "--decimal", metavar="CHAR", help="decimal mark of numbers: ',' for 1,5 (default '.')"
    )
    parser.add_argument(
        "--date-format",
        metavar="FORMAT",
        help="how periods are written, e.g. %%d.%%m.%%Y for 01.10.2025 (default YYYY-MM-DD)",
    )
    parser.add_argument(
        "--header-row",
        type=int,
        metavar="N",
        help="row (CSV: line) of the header, below a title block (default: the first row)",
    )


def read_args(args: argparse.Namespace) -> dict[str, Any]:
    """Keyword arguments of ``read_portfolio`` from the options of ``portfolio_args``.

    Raises:
        TriageError: A bad ``--columns`` map or file option, with what to write instead.
    """
    from triage.core.dialect import file_options
    from triage.core.read import parse_column_map

    return {
        "columns": parse_column_map(args.columns) if args.columns else None,
        "sheet": args.sheet,
        "lag": args.lag,
        "options": file_options(
            sep=args.sep,
            decimal=args.decimal,
            date_format=args.date_format,
            header_row=args.header_row,
        ),
    }


def score_args(parser: argparse.ArgumentParser) -> None:
    """How series are scored: ``--window --season``."""
    parser.add_argument(
        "--window",
        type=int,
        default=13,
        help="latest periods with actual demand to score (default 13)",
    )
    parser.add_argument(
        "--season", type=int, default=1, help="seasonal period of the naive baseline (default 1)"
    )


def refuse_overwriting(
    targets: list[Path] | tuple[Path, ...], *protected: Path | None, force: bool
) -> None:
    """Refuse to write any of ``targets`` over the portfolio, the ledger, a folder, or (without
    ``--force``) any existing file.

    Checked before the portfolio is loaded, so a refusal comes at once; the write itself
    checks again (``triage.core.files``).

    Raises:
        TriageError: A target is an existing folder, the same file as a protected one (even
            with ``force``), or an existing file and ``force`` is false.
    """
    from triage.core.files import refuse_existing

    kept = [p for p in protected if p is not None and p.exists()]
    for target in targets:
        if target.is_dir():
            raise TriageError(
                f"{printable(str(target))} is a folder; give a file name to write to.",
                hint=f"For example {printable(str(target / 'ranked.csv'))}.",
            )
        if not target.exists():
            continue
        for original in kept:
            if target.samefile(original):
                raise TriageError(
                    f"{printable(str(target))} is the file being read; writing there would "
                    "destroy it. Nothing was written.",
                    hint="Choose another output file name.",
                )
    refuse_existing(targets, force=force)


#: Most periods --window and --season may count (almost two centuries of weeks); a larger
#: number is a typo, and would not fit the integer types of the measures.
PERIODS_MAX = 10_000


def check_score_args(args: argparse.Namespace) -> None:
    """Refuse a window or season below 1 or above ``PERIODS_MAX`` with the option's name."""
    for option, value in (("--window", args.window), ("--season", args.season)):
        if value < 1:
            raise TriageError(f"{option} must be at least 1, not {value}.")
        if value > PERIODS_MAX:
            raise TriageError(f"{option} counts periods: at most {PERIODS_MAX:,}, not {value}.")


def open_ledger_read_only(path: Path, config: Config) -> Ledger:
    """Open a ledger for reading, with the configured root causes."""
    from triage.core.ledger import Ledger

    return Ledger.open(path, read_only=True, root_causes=config.root_causes)


def warn(message: str) -> None:
    """A warning on standard error, control characters shown as visible symbols."""
    print(f"triage: warning: {printable(message, multiline=True)}", file=sys.stderr)


def force_arg(parser: argparse.ArgumentParser) -> None:
    """``--force``: replace an output file that exists (without it, an existing file stops)."""
    parser.add_argument("--force", action="store_true", help="replace the output file if it exists")


def note(message: str) -> None:
    """Something the user should know (not a problem), on standard error, made printable."""
    print(f"triage: note: {printable(message, multiline=True)}", file=sys.stderr)


def ledger_to_read(
    portfolio: Path, config: Config, explicit: Path | None, *, required: bool = True
) -> Path | None:
    """The ledger a read-only command reads: ``--ledger``, else the review folder's ledger.

    ``triage.core.ledger.locate_ledger`` finds it (the folder's ledger, the configured
    ``ledger``, or a per-file ledger of the older layout); what it says is printed as notes.

    Args:
        portfolio: A portfolio file (or a review folder) that exists.
        config: The configuration (its ``ledger`` setting).
        explicit: ``--ledger``; it must exist.
        required: Raise when there is no ledger; otherwise return None.

    Raises:
        TriageError: ``--ledger`` names no file, or (``required``) no ledger was found.
    """
    from triage.core.ledger import locate_ledger

    if explicit is not None:
        if not explicit.exists():
            raise TriageError(
                f"There is no decision ledger at {printable(str(explicit))}.",
                hint="Check the --ledger path.",
            )
        return explicit
    where = locate_ledger(portfolio, name=config.ledger, for_writing=False)
    if not where.exists:
        if required:
            raise TriageError(
                f"No decisions have been recorded for {printable(portfolio.name)}: there is no "
                f"ledger at {printable(str(where.path))}.",
                hint="Pass --ledger PATH if the decisions are kept in another file.",
            )
        return None
    for text in where.notices:
        note(text)
    return where.path
