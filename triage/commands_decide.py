"""Command line: ``triage decide PORTFOLIO --from FILE`` records a batch of decisions.

The batch is checked whole first (``triage.core.decide``); nothing is written when any row is
wrong (exit 2, every bad row named with its reason). Otherwise every row becomes one ledger
event, all in one transaction, through the review screens' own path
(``ReviewSession.commit_batch``).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from triage.arguments import (
    config_arg,
    ledger_arg,
    load_config_of,
    load_portfolio,
    note,
    portfolio_args,
    review_target,
    reviewer_arg,
    score_args,
)
from triage.core.errors import TriageError
from triage.core.settings import ScoreSettings
from triage.core.text import visible

ADVISORY = (
    "Decisions are advisory: check every adjustment in the planning system before it moves "
    "stock or money."
)


def add_decide_command(sub: argparse._SubParsersAction) -> None:
    """Add ``decide`` to the ``triage`` subcommands."""
    decide = sub.add_parser(
        "decide",
        help="record a batch of decisions from a CSV or xlsx file (all rows or none)",
        description="Record decisions prepared in a spreadsheet. Columns: item, location (when "
        "the portfolio has one), outcome (no_change, adjusted, handed_off, deferred, or their "
        "labels), root_cause (code or label; default unknown), adjustment (the ledger syntax, "
        "e.g. +10%% or 1-4: =120), note. Every row is checked first; if any is wrong nothing is "
        "written and each bad row is named.",
    )
    portfolio_args(decide)
    score_args(decide)
    decide.add_argument(
        "--from",
        dest="source",
        type=Path,
        required=True,
        metavar="FILE",
        help="the decisions file (.csv UTF-8 or .xlsx, first sheet)",
    )
    ledger_arg(decide)
    reviewer_arg(decide)
    decide.add_argument(
        "--replace",
        action="store_true",
        help="allow rows that replace another reviewer's decision in this cycle",
    )
    config_arg(decide)
    decide.set_defaults(handler=cmd_decide)


def cmd_decide(args: argparse.Namespace) -> int:
    """Check the whole batch, then record it in one transaction."""
    from triage.core.config import default_reviewer, reviewer_problem
    from triage.core.decide import check_batch, read_batch
    from triage.core.ledger import Ledger
    from triage.core.ranking import require_scorable

    config = load_config_of(args)
    settings = ScoreSettings.from_args(args, config)
    if not args.portfolio.is_file():
        raise TriageError(
            f"{visible(str(args.portfolio))}: no such portfolio file.",
            hint="Give the portfolio file the decisions are for.",
        )
    reviewer = args.reviewer or default_reviewer(config)
    problem = reviewer_problem(reviewer)
    if problem:
        raise TriageError(f"--reviewer {problem}.", hint="Pass a plain name with --reviewer NAME.")
    header, rows = read_batch(args.source)
    _, ledger_path, notices = review_target(args, config, stand_in=False)
    if ledger_path is None:
        raise TriageError(
            "no writable decision ledger could be found for this portfolio.",
            hint="Pass --ledger PATH in a folder you can write to.",
        )
    portfolio = load_portfolio(args)
    require_scorable(portfolio, settings.window)
    for text in notices:
        note(text)
    # Checked first without writing anything: against the ledger read-only when it exists.
    if ledger_path.exists():
        with Ledger.open(ledger_path, read_only=True, root_causes=config.root_causes) as ledger:
            _check(args, portfolio, ledger, reviewer, config, settings, header, rows)
    else:
        _check(args, portfolio, None, reviewer, config, settings, header, rows)
    with Ledger.open(ledger_path, root_causes=config.root_causes) as ledger:
        session = _session(portfolio, ledger, reviewer, settings)
        # Checked again inside the writing session: another reviewer may have decided since.
        checked = check_batch(session, header, rows, config.root_causes, replace=args.replace)
        events = session.commit_batch(checked)
    counts: dict[str, int] = {}
    for event in events:
        counts[event.outcome or ""] = counts.get(event.outcome or "", 0) + 1
    from triage.core.vocabulary import outcome_label

    said = ", ".join(f"{n:,} {outcome_label(code).lower()}" for code, n in counts.items())
    replaced = sum(1 for row in checked if row.replaces)
    print(
        f"recorded {len(events):,} decisions for cycle {portfolio.cycle} in "
        f"{visible(str(ledger_path))} as {visible(reviewer)}"
        + (f": {said}" if said else "")
        + (f"; {replaced:,} replaced another reviewer's decision" if replaced else "")
        + (f" (ledger events {events[0].id}..{events[-1].id})" if events else "")
        + "."
    )
    print(ADVISORY)
    sys.stdout.flush()
    return 0


def _session(portfolio, ledger, reviewer, settings: ScoreSettings):
    from triage.core.cycle import ReviewCycle
    from triage.core.review import ReviewSession

    return ReviewSession(
        ReviewCycle(portfolio, ledger, settings),
        reviewer=reviewer,
        record_worst_set=ledger is not None and not ledger.read_only,
    )


def _check(args, portfolio, ledger, reviewer, config, settings, header, rows) -> None:
    from triage.core.decide import check_batch

    session = _session(portfolio, ledger, reviewer, settings)
    check_batch(session, header, rows, config.root_causes, replace=args.replace)
