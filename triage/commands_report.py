"""Command line: ``triage report`` (the weekly HTML report) and ``triage overrides``.

Both open the ledger read-only and only read the portfolio; the report is the one file written,
atomically. Every problem is raised as a ``TriageError``; ``triage.cli.main`` prints it as
``triage: <message>`` on stderr, exit 2. Ledger text reaches the terminal only through
``visible`` and Rich ``Text`` objects (docs/sources.md §7), and CSV text cells are neutralised
against formula injection like every other export (docs/sources.md §6.1).
"""

from __future__ import annotations

import argparse
import contextlib
import csv
import io
import shutil
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

from triage.arguments import (
    config_arg,
    force_arg,
    format_arg,
    ledger_arg,
    ledger_to_read,
    load_config_of,
    load_portfolio,
    open_ledger_read_only,
    portfolio_args,
    refuse_overwriting,
    score_args,
    setting_arg,
    warn,
)
from triage.core import schema
from triage.core.errors import TriageError
from triage.core.settings import REPEAT, STAT_NAME, TARGET_SHARE, ScoreSettings

if TYPE_CHECKING:
    from collections.abc import Callable

    import pandas as pd

    from triage.core.config import Config
    from triage.core.portfolio import Portfolio

#: ``--by`` choices of ``triage overrides`` and the grouping each one asks ``summarise`` for.
OVERRIDE_GROUPS = ("direction", "size", "reviewer", "root_cause", "cycle", "group")


def add_report_commands(sub: argparse._SubParsersAction) -> None:
    """Add ``report`` and ``overrides`` to the ``triage`` subcommands."""
    report = sub.add_parser(
        "report",
        help="write the review report (one self-contained HTML file) and print a summary",
        description="Write the review report of a portfolio (weekly or monthly): review "
        "coverage, decisions, bias distribution, top and repeat offenders, active adjustments "
        "and the realised value of earlier overrides. The HTML file embeds its charts and "
        "needs no network to be read.",
    )
    _portfolio_args(report)
    report.add_argument(
        "--to",
        type=Path,
        metavar="FILE",
        help="HTML file to write (default: <portfolio>-report-<cycle>.html beside the portfolio)",
    )
    force_arg(report)
    report.add_argument(
        "--top",
        type=int,
        default=10,
        metavar="K",
        help="top offenders shown with a chart (default 10)",
    )
    score_args(report)
    setting_arg(report, TARGET_SHARE)
    setting_arg(report, REPEAT)
    setting_arg(report, STAT_NAME)
    config_arg(report)
    report.set_defaults(handler=cmd_report)

    overrides = sub.add_parser(
        "overrides",
        help="realised value of earlier overrides: did adjusting the forecast help?",
        description="Set every recorded adjustment whose periods now have actual demand against "
        "those actuals: error removed = |original - actual| - |adjusted - actual| (positive = "
        "the override helped), summed by the chosen grouping. When the file has a statistical "
        "forecast (forecast_stat, or --stat-name), also against it: |stat - actual| - "
        "|adjusted - actual| (positive = the override beat it).",
    )
    _portfolio_args(overrides)
    overrides.add_argument(
        "--by",
        choices=OVERRIDE_GROUPS,
        default="direction",
        help="grouping of the breakdown (default direction)",
    )
    overrides.add_argument(
        "--detail",
        action="store_true",
        help="one row per overridden period instead of the breakdown",
    )
    setting_arg(overrides, STAT_NAME)
    format_arg(overrides)
    config_arg(overrides)
    overrides.set_defaults(handler=cmd_overrides)


def _portfolio_args(parser: argparse.ArgumentParser) -> None:
    portfolio_args(parser)
    ledger_arg(parser)


def _ledger_path(args: argparse.Namespace, config: Config, *, required: bool) -> Path | None:
    """The ledger to read: ``--ledger``, else the review folder's (``ledger_to_read``).

    Without ``required`` a portfolio that has no ledger yet gives None (a report without
    decisions); ``--ledger`` must always name an existing file.
    """
    if args.ledger is None and not args.portfolio.exists():
        raise TriageError(f"{args.portfolio}: no such file.")
    return ledger_to_read(args.portfolio, config, args.ledger, required=required)


def stat_name_given(
    args: argparse.Namespace, portfolio: Portfolio, settings: ScoreSettings
) -> None:
    """Refuse a ``--stat-name`` the file has no column for (the default may be absent).

    Raises:
        TriageError: ``--stat-name NAME`` was typed and the file has no ``forecast_NAME``.
    """
    from triage.core import history

    if STAT_NAME.given(args) is not None:
        history.stat_forecast(portfolio, settings.stat_name, required=True)


# --------------------------------------------------------------------------------------------
# report


def cmd_report(args: argparse.Namespace) -> int:
    """``triage report``: write the HTML report and print its short summary."""
    from triage.core.cycle import ReviewCycle
    from triage.core.text import visible
    from triage.render.report import summary_text, write_report

    config = load_config_of(args)
    settings = ScoreSettings.from_args(args, config)
    if args.top < 1:
        raise TriageError(f"--top must be at least 1, not {args.top}.")
    if args.to is not None and args.to.suffix.lower() not in (".html", ".htm"):
        raise TriageError(
            f"--to {args.to}: the report is an HTML file; use a name ending in .html.",
            hint="For example --to weekly-report.html.",
        )
    ledger_path = _ledger_path(args, config, required=False)
    if args.to is not None:
        refuse_overwriting([args.to], args.portfolio, ledger_path, force=args.force)
    portfolio = load_portfolio(args)
    stat_name_given(args, portfolio, settings)
    if ledger_path is None:
        warn(
            f"No decisions have been recorded for {visible(portfolio.path.name)}; "
            "the report has no "
            "decisions or overrides. Pass --ledger PATH if they are kept elsewhere."
        )
    opened = (
        contextlib.nullcontext(None)
        if ledger_path is None
        else open_ledger_read_only(ledger_path, config)
    )
    with opened as ledger:
        if ledger is not None and ledger.notice:
            warn(ledger.notice)
        result = write_report(
            ReviewCycle(portfolio, ledger, settings),
            args.to,
            top=args.top,
            force=args.force,
        )
    sys.stdout.write(visible(summary_text(result.data, result.path), multiline=True))
    sys.stdout.flush()
    return 0


# --------------------------------------------------------------------------------------------
# overrides

#: Columns of the breakdown, with their headings in the table format.
SUMMARY_HEADINGS = {
    "adjustments": "periods",
    "decisions": "decisions",
    "helped": "helped",
    "hurt": "hurt",
    "share_helped": "share helped",
    "abs_error_original": "error before",
    "abs_error_adjusted": "error after",
    "value_added": "error removed",
    "value_added_value": "removed (value)",
    "relative_value_added": "share removed",
    "avg_rel_mae": "AvgRelMAE",
    "stat_adjustments": "periods with stat",
    "abs_error_stat": "error of stat",
    "value_added_vs_stat": "beat stat by",
    "value_added_vs_stat_value": "beat stat (value)",
}
DETAIL_COLUMNS = (
    "cycle",
    "item",
    "location",
    "period",
    "horizon",
    "original",
    "adjusted",
    "actual",
    "abs_error_original",
    "abs_error_adjusted",
    "value_added",
    "price",
    "value_added_value",
    "direction",
    "size",
    "helped",
    "reviewer",
    "root_cause",
    "event_id",
)


def cmd_overrides(args: argparse.Namespace) -> int:
    """``triage overrides``: the realised value of earlier overrides."""
    from triage.core import history
    from triage.core.cycle import ReviewCycle

    config = load_config_of(args)
    ledger_path = _ledger_path(args, config, required=True)
    assert ledger_path is not None
    settings = ScoreSettings.from_args(args, config)
    portfolio = load_portfolio(args)
    stat_name_given(args, portfolio, settings)
    with open_ledger_read_only(ledger_path, config) as ledger:
        review = ReviewCycle(portfolio, ledger, settings)
        realised = review.realised
        status = review.line_status
        causes = {c.code: c.label for c in ledger.root_causes}
    priced = portfolio.price is not None
    # Valued against the statistical forecast only when the file has one: else as before.
    stat = settings.stat_name if review.stat is not None else None
    if args.detail:
        columns = list(DETAIL_COLUMNS)
        if stat is not None:
            at = columns.index("value_added_value") + 1
            columns[at:at] = history.REALISED_STAT_COLUMNS
        frame = realised[columns]
        if not priced:
            frame = frame.drop(
                columns=["price", "value_added_value", "value_added_vs_stat_value"], errors="ignore"
            )
    else:
        frame = history.summarise(realised, args.by)
        if stat is None:
            frame = frame.drop(columns=list(history.SUMMARY_STAT_COLUMNS))
        if not priced:
            frame = frame.drop(
                columns=["value_added_value", "value_added_vs_stat_value"], errors="ignore"
            )
    if args.format == "csv":
        text = _csv(frame)
    elif args.format == "json":
        text = _json(portfolio, ledger_path, args, frame, status, stat)
    else:
        text = _table(portfolio, args, frame, status, causes, stat)
    sys.stdout.write(text)
    sys.stdout.flush()
    return 0


def _cell(value: Any) -> Any:
    import math

    import numpy as np

    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return None if math.isnan(value) else float(value)
    return value


def _csv(frame: pd.DataFrame) -> str:
    from triage.core.text import neutralise_one, visible

    buffer = io.StringIO()
    writer = csv.writer(buffer, quoting=csv.QUOTE_NONNUMERIC, lineterminator="\n")
    writer.writerow(list(frame.columns))
    keys = {"item", "location"}
    for row in frame.itertuples(index=False):
        out = []
        for name, value in zip(frame.columns, row, strict=True):
            value = _cell(value)
            if isinstance(value, str):
                # Keys exactly as stored; other text as every CSV export writes it.
                value = visible(value) if name in keys else visible(neutralise_one(value))
            out.append("" if value is None else value)
        writer.writerow(out)
    return buffer.getvalue()


def _json(
    portfolio: Portfolio,
    ledger_path: Path,
    args: argparse.Namespace,
    frame: pd.DataFrame,
    status: pd.DataFrame,
    stat: str | None = None,
) -> str:
    from triage.render.export import dumps_json

    doc: dict[str, Any] = {
        "portfolio": str(portfolio.path),
        "cycle": portfolio.cycle,
        "ledger": str(ledger_path),
        "value_added": "|original - actual| - |adjusted - actual| (positive = the override helped)",
    }
    if stat is not None:
        doc["stat_forecast"] = f"{schema.COMPETING_PREFIX}{stat}"
        doc["value_added_vs_stat"] = (
            "|stat - actual| - |adjusted - actual| (positive = the override beat the statistical "
            "forecast; periods without a stat value left out)"
        )
    doc |= {
        "grouping": None if args.detail else args.by,
        "rows": [
            {c: _cell(v) for c, v in zip(frame.columns, row, strict=True)}
            for row in frame.itertuples(index=False)
        ],
        "line_status": [
            {"status": r.status, "lines": int(r.lines), "decisions": int(r.decisions)}
            for r in status.itertuples(index=False)
        ],
    }
    return dumps_json(doc, indent=1) + "\n"


def _table(
    portfolio: Portfolio,
    args: argparse.Namespace,
    frame: pd.DataFrame,
    status: pd.DataFrame,
    causes: dict[str, str],
    stat: str | None = None,
) -> str:
    from triage.core import history
    from triage.core.text import visible
    from triage.render.report import fmt_money, fmt_pct, fmt_ratio, fmt_units

    realised = int(status.loc[status["status"] == history.REALISED, "lines"].sum())
    ahead = int(status.loc[status["status"] == history.AHEAD, "lines"].sum())
    header = [
        f"{visible(portfolio.path.name)}, cycle {portfolio.cycle}: {realised:,} overridden "
        f"periods with actuals, {ahead:,} still ahead",
        "error removed = |original - actual| - |adjusted - actual|; positive = the override helped",
    ]
    if stat is not None:
        header.append(
            f"beat stat by = |stat - actual| - |adjusted - actual|, stat = column "
            f"{schema.COMPETING_PREFIX}{stat}; positive = the override beat the statistical "
            "forecast (periods without a stat value left out)"
        )
    missing = status.loc[
        ~status["status"].isin([history.REALISED, history.AHEAD]) & (status["lines"] > 0)
    ]
    for row in missing.itertuples(index=False):
        header.append(f"{int(row.lines):,} periods not counted: {row.meaning}")
    formats: dict[str, Callable[[Any], str]] = {
        "share_helped": fmt_pct,
        "relative_value_added": lambda v: fmt_pct(v, signed=True),
        "avg_rel_mae": fmt_ratio,
        "value_added": lambda v: fmt_units(v, signed=True),
        "value_added_value": lambda v: fmt_money(v, signed=True),
        "abs_error_original": fmt_units,
        "abs_error_adjusted": fmt_units,
        "abs_error_stat": fmt_units,
        "value_added_vs_stat": lambda v: fmt_units(v, signed=True),
        "value_added_vs_stat_value": lambda v: fmt_money(v, signed=True),
        "stat": fmt_units,
        "original": fmt_units,
        "adjusted": fmt_units,
        "actual": fmt_units,
        "price": fmt_money,
    }
    counts = {
        "adjustments",
        "decisions",
        "helped",
        "hurt",
        "horizon",
        "event_id",
        "stat_adjustments",
    }
    # A breakdown against the statistical forecast is a second table with the same groups,
    # so the first reads as without one.
    tables = [frame]
    # A breakdown's grouping columns name its rows: they are never dropped.
    groups = () if args.detail else tuple(c for c in frame if c not in history.SUMMARY_COLUMNS)
    if stat is not None and not args.detail:
        extra = [c for c in frame.columns if c in history.SUMMARY_STAT_COLUMNS]
        tables = [frame.drop(columns=extra), frame[[*groups, *extra]]]
    width = max(100, shutil.get_terminal_size((140, 24)).columns)
    lines: list[str] = []
    for i, part in enumerate(tables):
        if i:
            lines += [
                "",
                f"against the statistical forecast ({schema.COMPETING_PREFIX}{stat}):",
                "",
            ]
        lines += _fitted_part(part, formats, counts, causes, width, groups)
    return "\n".join(header) + "\n\n" + "\n".join(lines) + "\n"


#: Which columns of ``overrides`` a narrow terminal gives up first (the highest number goes
#: first); 0: never (what names a row, and the value added itself).
COLUMN_PRIORITY = {
    "event_id": 9,
    "horizon": 8,
    "reviewer": 7,
    "root_cause": 7,
    "direction": 6,
    "size": 6,
    "decisions": 5,
    "price": 5,
    "avg_rel_mae": 4,
    "abs_error_original": 3,
    "abs_error_adjusted": 3,
    "abs_error_stat": 3,
    "relative_value_added": 2,
    "helped": 2,
    "stat": 1,
    "value_added_value": 1,
    "value_added_vs_stat_value": 1,
}


def _fitted_part(
    frame: pd.DataFrame,
    formats: dict[str, Callable[[Any], str]],
    counts: set[str],
    causes: dict[str, str],
    width: int,
    groups: tuple[str, ...],
) -> list[str]:
    """One frame of ``overrides`` as the lines of a table fitted to ``width``: columns are
    dropped (lowest priority first, and named) rather than a figure cut short; data as ``Text``,
    never markup. ``groups``: a breakdown's grouping columns, which name its rows and stay."""
    from rich.text import Text

    from triage.core import history
    from triage.core.text import visible
    from triage.render.report import fmt_int
    from triage.render.scorecard import Column, fitted_table

    columns: list[Column] = []
    for name in frame.columns:
        numeric = name in formats or name in counts
        cells: list[Any] = []
        for value in frame[name]:
            if name in formats:
                shown = formats[name](_cell(value))
            elif name in counts:
                shown = fmt_int(value)
            elif name == "root_cause" and value != history.ALL:
                shown = causes.get(str(value), str(value))
            elif name == "helped":
                shown = "yes" if value else "no"
            else:
                shown = str(value)
            cells.append(Text(visible(shown)))
        priority = 0 if name in groups else COLUMN_PRIORITY.get(name, 0)
        heading = SUMMARY_HEADINGS.get(name, name.replace("_", " "))
        columns.append((heading, "right" if numeric else "left", cells, priority))
    # Ids and reviewers' names (up to 1,000 characters) end in an ellipsis, as in rank.
    keys = tuple(
        SUMMARY_HEADINGS.get(c, c.replace("_", " "))
        for c in frame.columns
        if c in (schema.ITEM, schema.LOCATION, "reviewer")
    )
    return fitted_table(columns, key_columns=keys, width=width)
