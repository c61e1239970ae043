"""Command line: ``triage compare`` (competing forecasts on the same cells).

Reads the portfolio only; ``--output`` is the one file written, atomically, never over an
existing file without ``--force`` (``triage.core.files``). Every problem is a ``TriageError``
(exit 2, no traceback).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import TYPE_CHECKING

from triage.arguments import (
    dask_client,
    dask_reading,
    engine_args,
    force_arg,
    format_arg,
    load_portfolio,
    note,
    portfolio_args,
    refuse_overwriting,
    score_args,
    steps_arg,
    steps_of,
)
from triage.core.settings import ScoreSettings

if TYPE_CHECKING:
    from triage.core.compare import Comparison
    from triage.core.portfolio import Portfolio


def add_compare_command(sub: argparse._SubParsersAction) -> None:
    """Add ``compare`` to the ``triage`` subcommands."""
    compare = sub.add_parser(
        "compare",
        help="compare the file's forecast, its forecast_<name> columns and naive benchmarks",
        description="Compare forecasts on the same window cells: the file's forecast, every "
        "forecast_<name> column, naive (previous period's actual) and, with --season m > 1, "
        "snaive. A cell counts when demand and every forecast are present. See docs/metrics.md.",
    )
    portfolio_args(compare)
    engine_args(compare)
    score_args(compare)
    steps_arg(compare)
    compare.add_argument(
        "--by-series",
        action="store_true",
        help="also one row per series and forecast (CSV: those rows; JSON: a 'series' list)",
    )
    format_arg(compare)
    compare.add_argument(
        "--output", type=Path, metavar="PATH", help="write to PATH instead of standard output"
    )
    force_arg(compare)
    compare.set_defaults(handler=cmd_compare)


def cmd_compare(args: argparse.Namespace) -> int:
    """``triage compare``: measure, then write the table, CSV or JSON."""
    from triage.core.compare import compare
    from triage.render import compare as render

    settings = ScoreSettings.from_args(args)
    if args.output is not None:
        refuse_overwriting([args.output], args.portfolio, force=args.force)
    if args.engine == "dask":
        portfolio, result = _compare_dask(args, settings)
    else:
        # Forecasts are compared over the window only: they are read over it alone.
        portfolio = load_portfolio(
            args, dataset=True, scored_window=settings.window, season=settings.season
        )
        for notice in portfolio.notices:
            note(notice)
        steps = steps_of(args, portfolio, settings.season)
        result = compare(
            portfolio, settings.window, settings.season, steps=steps, by_series=args.by_series
        )
    if args.format == "csv":
        text = render.to_csv(result)
    elif args.format == "json":
        text = render.to_json(portfolio, result, settings.window)
    else:
        text = render.compare_table(portfolio, result, settings.window)
    if args.output is not None:
        from triage.core.files import write_text_atomic

        write_text_atomic(args.output, text, force=args.force)
        return 0
    if sys.stdout.isatty():
        from triage.core.text import visible

        text = visible(text, multiline=True)
    sys.stdout.write(text)
    sys.stdout.flush()
    return 0


def _compare_dask(
    args: argparse.Namespace, settings: ScoreSettings
) -> tuple[Portfolio, Comparison]:
    """``triage compare DATASET --engine dask``: the comparison made on a Dask cluster, and the
    portfolio describing the dataset (its calendar, lag and path) for the output."""
    from triage.core.dask_engine import compare_dataset

    reading = dask_reading(args, settings)
    with dask_client(args) as client:
        compared = compare_dataset(args.portfolio, client, by_series=args.by_series, **reading)
    for notice in compared.plan.notices:
        note(notice)
    return compared.described, compared.comparison
