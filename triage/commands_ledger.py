"""Command line: ``triage history`` (the ledger's events) and ``triage export`` (for upload).

Both open the ledger read-only, so neither can change a decision. Every problem is raised as a
``TriageError``; ``triage.cli.main`` prints it as ``triage: <message>`` on stderr, exit 2.
Text from the ledger reaches the terminal through ``visible`` and Rich ``Text`` objects only,
never as markup (docs/sources.md §7.1, §7.2).
"""

from __future__ import annotations

import argparse
import csv
import io
import re
import shutil
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

from triage.arguments import (
    config_arg,
    format_arg,
    ledger_arg,
    ledger_to_read,
    load_config_of,
    open_ledger_read_only,
    portfolio_args,
    read_args,
    warn,
)
from triage.core.errors import TriageError
from triage.core.text import longest_word

if TYPE_CHECKING:
    from triage.core.ledger import AdjustmentEnd, Event

#: The first bytes of every SQLite 3 database file (sqlite.org/fileformat.html, §1.3.1).
SQLITE_MAGIC = b"SQLite format 3\x00"
#: Longest note shown in a history table cell; the CSV and JSON formats carry the full text.
TABLE_NOTE_MAX = 200

HISTORY_COLUMNS = (
    "id",
    "cycle",
    "item",
    "location",
    "version",
    "kind",
    "undoes",
    "outcome",
    "root_cause",
    "note",
    "adjustment",
    "reviewer",
    "recorded_at",
    "portfolio_name",
    "portfolio_fingerprint",
    "target",
)


def add_ledger_commands(sub: argparse._SubParsersAction) -> None:
    """Add ``history`` and ``export`` to the ``triage`` subcommands."""
    history = sub.add_parser(
        "history",
        help="list the decisions and undos in a ledger, oldest first, with who and when",
        description="List the events of a decision ledger, oldest first: decisions, undos, and "
        "ends of adjustments. Give the ledger file, a portfolio file, or the review folder to "
        "read the folder's ledger.",
    )
    history.add_argument(
        "source",
        type=Path,
        metavar="PORTFOLIO_OR_LEDGER",
        help="a ledger file, a portfolio file, or a review folder whose ledger to read",
    )
    history.add_argument("--ledger", type=Path, metavar="PATH", help="ledger file to read")
    history.add_argument("--cycle", metavar="DATE", help="only this review cycle (YYYY-MM-DD)")
    history.add_argument("--item", help="only this item (exact text)")
    history.add_argument("--location", help="only this location (exact text)")
    format_arg(history)
    config_arg(history)
    history.set_defaults(handler=cmd_history)

    export = sub.add_parser(
        "export",
        help="write the cycle's decisions and adjusted forward forecast (.csv, .xlsx, .json)",
        description="Write the reviewed decisions of a cycle and the complete adjusted forward "
        "forecast, for upload to a planning system. A .csv target writes a folder NAME holding "
        "three files, NAME-decisions.csv, NAME-forecast.csv and NAME-README.txt, replaced as a "
        "whole. An existing file or folder is replaced only with --force.",
    )
    portfolio_args(export)
    ledger_arg(export)
    export.add_argument(
        "--cycle", metavar="DATE", help="review cycle (default: the portfolio's latest actual)"
    )
    export.add_argument(
        "--to",
        type=Path,
        required=True,
        metavar="FILE",
        help="target: NAME.csv (a folder NAME of three files), NAME.xlsx or NAME.json",
    )
    export.add_argument(
        "--force", action="store_true", help="replace the file or set folder if it exists"
    )
    export.add_argument(
        "--layout",
        choices=("long", "wide"),
        help="forecast table: long, one row per series and period (default); wide, one row per "
        "series with the forward periods as columns",
    )
    export.add_argument(
        "--round",
        metavar="PRECISION",
        help="decimals of adjusted values: file, as many as the portfolio's forecast uses "
        "(default); units, whole units; or a number from 0 to 6",
    )
    export.add_argument(
        "--like-input",
        action="store_true",
        help="write a CSV export with the portfolio's own --sep, --decimal and --date-format "
        "(default: comma, decimal point, ISO dates)",
    )
    config_arg(export)
    export.set_defaults(handler=cmd_export)


# --------------------------------------------------------------------------------------------
# Shared


def _like_input(args: argparse.Namespace, reading: dict[str, Any]) -> dict[str, Any]:
    """``style=`` for ``export_review`` when ``--like-input`` asks for the file's conventions."""
    if not getattr(args, "like_input", False):
        return {}
    from triage.render.export import CsvStyle

    opts = reading.get("options")
    if opts is None:
        return {}
    return {"style": CsvStyle(sep=opts.sep, decimal=opts.decimal, date_format=opts.date_format)}


def _check_cycle(value: str | None) -> str | None:
    if value is not None and not re.fullmatch(r"\d{4}-\d{2}-\d{2}", value):
        raise TriageError(
            f"--cycle must be an ISO date (YYYY-MM-DD), not {value!r}.",
            hint="Use the date of the portfolio's latest actual period, e.g. --cycle 2026-11-23.",
        )
    return value


def _is_ledger_file(path: Path) -> bool:
    from triage.core.ledger import LEDGER_SUFFIX

    if path.name.endswith(LEDGER_SUFFIX):
        return True
    try:
        with path.open("rb") as handle:
            return handle.read(len(SQLITE_MAGIC)) == SQLITE_MAGIC
    except OSError:
        return False


# --------------------------------------------------------------------------------------------
# history


def cmd_history(args: argparse.Namespace) -> int:
    """``triage history``: the ledger's events, oldest first."""
    cycle = _check_cycle(args.cycle)
    config = load_config_of(args)
    source: Path = args.source
    if args.ledger is not None:
        ledger_path = args.ledger
    elif not source.exists():
        raise TriageError(
            f"{source}: no such file.", hint="Give a ledger file or a portfolio file that exists."
        )
    elif source.is_file() and _is_ledger_file(source):
        ledger_path = source
    else:
        # A portfolio file, or the review folder itself: the folder's ledger.
        found = ledger_to_read(source, config, None)
        assert found is not None
        ledger_path = found

    with open_ledger_read_only(ledger_path, config) as ledger:
        events: list[Event | AdjustmentEnd] = [
            *ledger.history(cycle=cycle, item=args.item, location=args.location),
            *(
                e
                for e in ledger.ends(item=args.item, location=args.location)
                if cycle is None or e.cycle == cycle
            ),
        ]
        # One journal: decisions, undos, ends and restores share the positions (docs/ledger.md).
        events.sort(key=lambda e: e.id)
        causes = {c.code: c.label for c in ledger.root_causes}
        if args.format == "json":
            text = _history_json(ledger.path, events, args)
        elif args.format == "csv":
            text = _history_csv(events)
        else:
            text = _history_table(ledger.path, events, causes, args)
    sys.stdout.write(text)
    sys.stdout.flush()
    return 0


def _event_record(event: Event | AdjustmentEnd) -> dict[str, Any]:
    """One history row. An end or restore of an adjustment names the adjustment in ``target``;
    a restore's ``undoes`` is the end it reverts; it has no version, outcome or lines."""
    from triage.core.ledger import AdjustmentEnd

    if isinstance(event, AdjustmentEnd):
        values: dict[str, Any] = {
            **{name: None for name in HISTORY_COLUMNS},
            **{
                name: getattr(event, name)
                for name in HISTORY_COLUMNS
                if name in AdjustmentEnd.__dataclass_fields__
            },
            "undoes": event.reverts,
        }
        return values
    return {name: getattr(event, name, None) for name in HISTORY_COLUMNS}


def _lines(event: Event | AdjustmentEnd) -> list[dict[str, Any]]:
    return [
        {"period": ln.period, "original": ln.original, "adjusted": ln.adjusted}
        for ln in getattr(event, "lines", ())
    ]


def _history_json(path: Path, events: list[Event | AdjustmentEnd], args: argparse.Namespace) -> str:
    from triage.render.export import dumps_json

    doc = {
        "ledger": str(path),
        "filters": {"cycle": args.cycle, "item": args.item, "location": args.location},
        "events": [{**_event_record(e), "lines": _lines(e)} for e in events],
    }
    # Control characters are escaped, so printing the document cannot drive the terminal,
    # while it still decodes to the exact text.
    return dumps_json(doc, indent=1) + "\n"


def _history_csv(events: list[Event | AdjustmentEnd]) -> str:
    from triage.core.text import neutralise_one, visible

    buffer = io.StringIO()
    writer = csv.writer(buffer, quoting=csv.QUOTE_NONNUMERIC, lineterminator="\n")
    writer.writerow(HISTORY_COLUMNS)
    numbers = {"id", "version", "undoes", "target"}
    for event in events:
        row = []
        for name, value in _event_record(event).items():
            if name in numbers:
                row.append(value)
            elif name in ("item", "location"):
                # Keys exactly as stored, but never raw control bytes on a terminal.
                row.append(visible(value))
            else:
                # Same text rules as the CSV export (OWASP CSV Injection; docs/sources.md §6.1).
                row.append(visible(neutralise_one(value or ""), multiline=True))
        writer.writerow(row)
    return buffer.getvalue()


def _history_table(
    path: Path,
    events: list[Event | AdjustmentEnd],
    causes: dict[str, str],
    args: argparse.Namespace,
) -> str:
    from rich.console import Console
    from rich.table import Table
    from rich.text import Text

    from triage.core.ledger import END, UNDO, AdjustmentEnd
    from triage.core.text import visible
    from triage.core.vocabulary import OUTCOMES, labels

    outcomes = labels(OUTCOMES)
    filters = [
        f"{name} {visible(value)!r}"
        for name, value in (("cycle", args.cycle), ("item", args.item), ("location", args.location))
        if value is not None
    ]
    header = f"{visible(str(path))}: {len(events):,} event{'s' if len(events) != 1 else ''}"
    header += f" ({', '.join(filters)})" if filters else ""
    if not events:
        return header + "\n"
    with_location = any(e.location for e in events)
    table = Table(box=None, pad_edge=False, show_edge=False, header_style="bold")
    one_line = {"#", "recorded (UTC)", "cycle", "v"}
    for name, justify in [
        ("#", "right"),
        ("recorded (UTC)", "left"),
        ("who", "left"),
        ("cycle", "left"),
        ("item", "left"),
        *([("location", "left")] if with_location else []),
        ("v", "right"),
        ("what", "left"),
        ("root cause", "left"),
        ("adjustment", "left"),
        ("note", "left"),
    ]:
        table.add_column(
            name,
            justify=justify,  # type: ignore[arg-type]
            no_wrap=name in one_line,
            overflow="fold",
            min_width=longest_word(name),
        )
    for e in events:
        version, adjustment = "", ""
        if isinstance(e, AdjustmentEnd):
            what = (
                f"end of adjustment #{e.target}"
                if e.kind == END
                else f"restore of adjustment #{e.target} (reverts #{e.reverts})"
            )
            cause = ""
        elif e.kind == UNDO:
            what = f"undo of #{e.undoes}"
            cause = ""
            version = str(e.version)
        else:
            what = outcomes.get(e.outcome or "", e.outcome or "")
            cause = causes.get(e.root_cause or "", e.root_cause or "")
            version, adjustment = str(e.version), e.adjustment or ""
        if not isinstance(e, AdjustmentEnd) and e.group_id:
            # The series' part of a group decision or group undo (docs/ledger.md).
            what += f" (group #{e.group_id})"
        note = visible(e.note)
        if len(note) > TABLE_NOTE_MAX:
            note = note[:TABLE_NOTE_MAX] + "…"
        cells = [
            Text(str(e.id)),
            Text(e.recorded_at.replace("T", " ")[:19]),
            Text(visible(e.reviewer)),
            Text(e.cycle),
            Text(visible(e.item)),
            *([Text(visible(e.location))] if with_location else []),
            Text(version),
            Text(visible(what)),
            Text(visible(cause)),
            Text(visible(adjustment)),
            Text(note),
        ]
        table.add_row(*cells)
    width = max(100, shutil.get_terminal_size((120, 24)).columns)
    buffer = io.StringIO()
    Console(
        file=buffer, width=width, color_system=None, markup=False, emoji=False, highlight=False
    ).print(table)
    return header + "\n\n" + buffer.getvalue()


# --------------------------------------------------------------------------------------------
# export


def cmd_export(args: argparse.Namespace) -> int:
    """``triage export``: decisions and adjusted forward forecast of a cycle, for upload."""
    from triage.core.config import default_reviewer
    from triage.core.cycle import ReviewCycle
    from triage.core.export import CAUTION
    from triage.core.read import read_portfolio
    from triage.core.rounding import parse_rounding
    from triage.core.text import visible
    from triage.render.export import export_paths, export_review

    cycle = _check_cycle(args.cycle)
    # Defaults are core's (export_review): only what was given is passed on.
    options: dict[str, Any] = {}
    if args.layout is not None:
        options["layout"] = args.layout
    if args.round is not None:
        options["rounding"] = parse_rounding(args.round)
    config = load_config_of(args)
    # Check the target before the (possibly long) load of the portfolio.
    export_paths(args.to)
    if args.ledger is None and not args.portfolio.exists():
        raise TriageError(f"{args.portfolio}: no such file.")
    ledger_path = ledger_to_read(args.portfolio, config, args.ledger)
    assert ledger_path is not None
    reading = read_args(args)
    columns = reading.get("columns")
    portfolio = read_portfolio(args.portfolio, **reading)
    with open_ledger_read_only(ledger_path, config) as ledger:
        result = export_review(
            ReviewCycle(portfolio, ledger, name=cycle),
            args.to,
            force=args.force,
            exported_by=default_reviewer(config),
            headers=columns,
            **options,
            **_like_input(args, reading),
        )
    rows = (
        f"{result.forecast_rows:,} forecast rows ({result.adjusted_periods:,} adjusted)"
        if result.layout == "long"
        else f"{result.forecast_rows:,} forecast rows, one per series "
        f"({result.adjusted_periods:,} adjusted periods)"
    )
    print(
        f"Exported cycle {result.cycle} of {visible(portfolio.path.name)}: "
        f"{result.decisions:,} reviewed series, {rows}."
    )
    print(f"Adjusted values rounded to {result.precision}.")
    for path in result.paths:
        print(f"  wrote {visible(str(path))}")
    for warning in result.warnings:
        warn(warning)
    print(f"Caution: {CAUTION}")
    return 0
