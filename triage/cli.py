"""Command line: ``triage rank``, ``triage check`` and friends.

Every user-facing problem is a ``TriageError``: printed on stderr without a traceback, exit 2.
Heavy modules (pandas, the review screens) are imported inside the commands that need them.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Iterable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING

from triage import __version__
from triage.arguments import (
    config_arg,
    dask_client,
    dask_reading,
    engine_args,
    force_arg,
    format_arg,
    group_arg,
    ledger_arg,
    load_config_of,
    load_portfolio,
    portfolio_args,
    read_args,
    refuse_output_folder,
    refuse_overwriting,
    review_target,
    reviewer_arg,
    score_args,
    setting_arg,
    steps_arg,
    steps_of,
)
from triage.commands_compare import add_compare_command
from triage.commands_decide import add_decide_command
from triage.commands_ledger import add_ledger_commands
from triage.commands_report import add_report_commands
from triage.core.errors import TriageError
from triage.core.settings import CACHE_LIMIT_MB, TARGET_SHARE, ScoreSettings
from triage.core.vocabulary import BY_BIAS, BY_ERROR, ORDERS

if TYPE_CHECKING:
    import numpy as np
    import pandas as pd

    from triage.core.config import Config
    from triage.core.dataset import Plan
    from triage.core.portfolio import Portfolio
    from triage.tui.app import TriageApp


def build_parser() -> argparse.ArgumentParser:
    """The argument parser for every subcommand."""
    parser = argparse.ArgumentParser(
        prog="triage",
        description=(
            "Weekly forecast review: rank series by error contribution and persistent bias."
        ),
    )
    parser.add_argument("--version", action="version", version=f"triage {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    rank = sub.add_parser("rank", help="score every series and list the worst offenders first")
    portfolio_args(rank)
    score_args(rank)
    rank.add_argument(
        "--by",
        choices=ORDERS,
        default=BY_ERROR,
        help="order: share of absolute error, persistent bias, or value destroyed by the last "
        "process step (fva_loss) (default error)",
    )
    group_arg(rank)
    steps_arg(rank, "; fva_loss compares the last step with the one before it")
    format_arg(rank, parquet=True)
    engine_args(rank)
    limit = rank.add_mutually_exclusive_group()
    limit.add_argument("--top", type=int, metavar="K", help="only the first K series (or groups)")
    setting_arg(
        limit,
        TARGET_SHARE,
        help="only the smallest leading set whose cumulative error share reaches F "
        "(e.g. {default})",
    )
    rank.add_argument(
        "--output", type=Path, metavar="PATH", help="write to PATH instead of standard output"
    )
    force_arg(rank)
    rank.set_defaults(handler=_cmd_rank)

    check = sub.add_parser("check", help="report on the data quality of a portfolio file")
    portfolio_args(check)
    score_args(check)
    engine_args(check)
    check.set_defaults(handler=_cmd_check)

    review = sub.add_parser(
        "review",
        help="open the review screens on a portfolio (or on the newest one in a folder)",
        description="Open the review screens. Give a portfolio file, or the review folder the "
        "weekly files are dropped into: its newest file (latest review cycle) is opened. Every "
        "file in a folder shares the folder's ledger.",
    )
    portfolio_args(review)
    score_args(review)
    _review_args(review)
    review.add_argument(
        "--scorecard",
        type=Path,
        metavar="DIR",
        help="review a dataset folder on its stored scorecard (made by rank DATASET --engine "
        "dask --format parquet --output DIR): the list opens from the scorecard and each "
        "series' history is fetched from the dataset when it is shown (docs/scale.md)",
    )
    review.set_defaults(handler=_cmd_review)

    demo = sub.add_parser("demo", help="open the review screens on the bundled sample portfolio")
    _review_args(demo, ledger=False)
    demo.set_defaults(handler=_cmd_demo)
    add_ledger_commands(sub)
    add_report_commands(sub)
    add_decide_command(sub)
    add_compare_command(sub)
    return parser


def _review_args(parser: argparse.ArgumentParser, *, ledger: bool = True) -> None:
    if ledger:
        ledger_arg(parser)
    reviewer_arg(parser)
    config_arg(parser)
    setting_arg(parser, TARGET_SHARE, flag="--target")
    group_arg(parser)
    parser.add_argument(
        "--no-cache",
        action="store_true",
        help="read the file afresh and keep nothing in the reopen cache (docs/performance.md)",
    )
    setting_arg(parser, CACHE_LIMIT_MB)


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``triage`` console script.

    Exit codes: 0 done, 2 a problem the user can fix (the message says what to do), 1 an
    unexpected error (a bug: one line on standard error naming the log file that holds the
    traceback), 130 interrupted with Ctrl+C.
    """
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
        return int(args.handler(args) or 0)
    except TriageError as exc:
        print(f"triage: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        # Output piped into `head` and closed early: not an error for the user.
        sys.stderr.close()
        return 0
    except Exception as exc:  # the last guard: no traceback reaches the user
        return _unexpected(exc, sys.argv[1:] if argv is None else list(argv))


#: Crash logs kept in the log folder; older ones are removed when a new one is written.
CRASH_LOGS_KEPT = 20


def _unexpected(exc: BaseException, argv: list[str], extra: str = "") -> int:
    """Report an error triage did not expect: one line, and the traceback in a log file.

    Args:
        exc: The error.
        argv: The command line.
        extra: More for the log (the review screens' unsaved entries), if any.
    """
    from triage.core.text import visible

    what = visible(f"{type(exc).__name__}: {exc}")[:300]
    try:
        log = _write_crash_log(exc, argv, extra)
    except Exception as failure:  # the report must get out whatever happens
        saved = f"The details could not be saved ({visible(str(failure))[:200]})."
    else:
        saved = f"The details are in {visible(str(log))}; please send that file with a report."
    print(
        f"triage: unexpected error ({what}); this is a fault in triage, not in your data. {saved}",
        file=sys.stderr,
    )
    return 1


def _write_crash_log(exc: BaseException, argv: list[str], extra: str = "") -> Path:
    """Write the traceback, the command line and versions to a new file in the log folder."""
    import datetime as dt
    import os
    import platform
    import traceback

    from platformdirs import user_log_dir

    from triage.core.files import write_text_atomic

    folder = Path(user_log_dir("triage"))
    folder.mkdir(parents=True, exist_ok=True)
    stamp = dt.datetime.now(dt.UTC).strftime("%Y%m%dT%H%M%S.%fZ")
    path = folder / f"crash-{stamp}-{os.getpid()}.log"
    text = (
        f"triage {__version__}, Python {platform.python_version()}, {platform.platform()}\n"
        f"command: triage {argv!r}\n\n"
        + "".join(traceback.format_exception(exc))
        + (f"\n{extra}\n" if extra else "")
    )
    write_text_atomic(path, text, force=False)
    old = sorted(folder.glob("crash-*.log"))[:-CRASH_LOGS_KEPT]
    for stale in old:
        stale.unlink(missing_ok=True)
    return path


def _cmd_rank(args: argparse.Namespace) -> int:
    from triage.core.metrics import window_columns
    from triage.core.ranking import ranked, require_scorable, scorecard, series_measures

    # --cover is checked here; the configuration's target share does not apply to rank.
    settings = ScoreSettings.from_args(args)
    if args.output is not None and args.format == "parquet":
        refuse_output_folder(args.output, args.portfolio, force=args.force)
    elif args.output is not None:
        refuse_overwriting([args.output], args.portfolio, force=args.force)
    if args.top is not None and args.top < 1:
        raise TriageError(f"--top must be at least 1, not {args.top}.")
    if args.format == "parquet" and args.output is None:
        raise TriageError(
            "--format parquet writes a folder of Parquet files and needs --output DIR.",
            hint="Add --output DIR, or choose --format csv for standard output.",
        )
    if args.group is not None:
        _check_group_options(args)
    if args.engine == "dask":
        return _rank_dask(args, settings)
    # Only the window is scored (series and groups alike): the forecasts are read over it alone.
    planned: list[Plan] = []
    portfolio = load_portfolio(
        args,
        dataset=True,
        scored_window=settings.window,
        season=settings.season,
        on_plan=planned.append,
    )
    _notices(portfolio.notices)
    require_scorable(portfolio, settings.window)
    steps = steps_of(args, portfolio, settings.season)
    if args.group is not None:
        return _rank_groups(args, settings, portfolio)
    if args.format in FILE_FORMATS:
        # Written from the scorecard alone: the dense arrays (most of the run's memory) are
        # freed once every series is scored, before the ranked scorecard is built.
        cols = window_columns(portfolio.demand, portfolio.last_actual, settings.window)
        measures = series_measures(portfolio, cols, settings.season, steps)
        del portfolio
        card = ranked(measures, args.by, limit=_built(args))
        describe = _describer(args, settings, planned[0] if planned else None, len(measures))
        del measures
        return _show_rank(args, settings, None, card, steps, describe=describe)
    card = scorecard(
        portfolio, settings.window, settings.season, by=args.by, steps=steps, limit=_built(args)
    )
    return _show_rank(args, settings, portfolio, card, steps)


#: rank's formats written from the scorecard alone (no header about the portfolio).
FILE_FORMATS = ("csv", "parquet")


def _built(args: argparse.Namespace) -> int | None:
    """Scorecard rows ``rank`` needs: with ``--top K``, K, unless the table's header adds up
    every series (the other formats write the rows they show and nothing else)."""
    return args.top if args.top is not None and args.format != "table" else None


def _notices(notices: Sequence[str]) -> None:
    """What the loader changed or skipped (ids kept as text, replaced control characters, a
    hidden sheet, renamed columns), said on standard error whatever the format."""
    from triage.core.text import visible

    for notice in notices:
        print(f"triage: note: {visible(notice, multiline=True)}", file=sys.stderr)


def _rank_dask(args: argparse.Namespace, settings: ScoreSettings) -> int:
    """``triage rank DATASET --engine dask``: the scorecard made on a Dask cluster."""
    from triage.core.dask_engine import score_dataset
    from triage.core.ranking import nothing_to_score, ranked

    reading = dask_reading(args, settings)
    with dask_client(args) as client:
        scored = score_dataset(
            args.portfolio,
            client,
            **reading,
            errors=args.group is not None,
            check=None if args.group is None else _group_columns_of(args),
        )
    _notices(scored.plan.notices)
    cols = scored.plan.window_cols(settings.window)
    if not (scored.measures.numbers["periods"] > 0).any():
        raise nothing_to_score(args.portfolio, len(cols))
    described, steps = scored.described, scored.steps
    if args.group is not None:
        from triage.core import groups

        by_columns = groups.parse_group_columns(described, args.group)
        measures = scored.measures
        del scored
        grouping = groups.grouping_of(measures.text, len(measures), by_columns)
        table = groups.group_scorecard_of(measures, ranked(measures), grouping, by=args.by)
        del measures
        return _show_groups(args, settings, described, table, by_columns, cols)
    card = ranked(scored.measures, args.by, limit=_built(args))
    describe = _describer(args, settings, scored.plan, len(scored.measures))
    # The measures go before the text is made (the scorecard holds its own copies).
    del scored
    shown = None if args.format in FILE_FORMATS else described
    return _show_rank(args, settings, shown, card, steps, cols=cols, describe=describe)


def _describer(
    args: argparse.Namespace, settings: ScoreSettings, plan: Plan | None, series: int
) -> Callable[[int], tuple[str, Callable[[Path], None]]] | None:
    """The description a scorecard folder of a dataset gets (``core.card_folder``), given the
    rows written, so that the review can open it (``review DATASET --scorecard DIR``); None
    for a file's scorecard."""
    if plan is None:
        return None

    def describe(rows: int) -> tuple[str, Callable[[Path], None]]:
        from triage.core import card_folder

        reading = read_args(args)
        how = card_folder.Scored(
            window=settings.window,
            season=settings.season,
            by=args.by,
            lag=reading["lag"],
            columns=reading["columns"],
            series=series,
            rows=rows,
        )
        return card_folder.description_writer(plan, how)

    return describe


def _show_rank(
    args: argparse.Namespace,
    settings: ScoreSettings,
    portfolio: Portfolio | None,
    card: pd.DataFrame,
    steps: Sequence[str] | None,
    *,
    cols: np.ndarray | None = None,
    describe: Callable[[int], tuple[str, Callable[[Path], None]]] | None = None,
) -> int:
    """Write the scorecard ``card`` of ``portfolio`` as ``rank``'s options ask.

    CSV and Parquet need only the scorecard: callers pass no portfolio for them, so that its
    dense arrays are gone before the text is made. ``describe``: the Parquet folder's
    description (``core.card_folder``) given the rows written, written last of the set."""
    from triage.core.ranking import leading_cover
    from triage.render import scorecard as report

    shown = card
    if args.cover is not None:
        shown = leading_cover(card, settings.target_share)
    elif args.top is not None:
        shown = card.iloc[: args.top]
    elif args.format == "table":
        shown = card.iloc[: report.TABLE_DEFAULT_ROWS]

    if args.format == "parquet":
        from triage.core.files import write_set_atomic

        parts = report.parquet_parts(shown)
        if describe is not None:
            parts.append(describe(len(shown)))
        write_set_atomic(args.output, parts, force=args.force, owned=report.parquet_owned)
        return 0
    if args.format == "csv":
        del card
        _emit_blocks(report.csv_blocks(shown), args.output, force=args.force)
        return 0
    assert portfolio is not None, "the table and JSON describe the portfolio"
    if args.format == "json":
        text = report.to_json(
            portfolio, shown, settings.window, settings.season, by=args.by, steps=steps, cols=cols
        )
    else:
        text = report.rank_table(
            portfolio,
            card,
            shown,
            settings.window,
            settings.season,
            by=args.by,
            steps=steps,
            cols=cols,
        )
    _emit(text, args.output, force=args.force)
    return 0


def _check_group_options(args: argparse.Namespace) -> None:
    """Refuse the options ``rank --group`` does not take with it."""
    if args.by not in (BY_ERROR, BY_BIAS):
        raise TriageError(
            f"--by {args.by} ranks series; groups rank by error or bias.",
            hint="Use --by error or --by bias with --group, or rank series with --by fva.",
        )
    if args.steps is not None:
        raise TriageError(
            "--steps chooses the process steps of each series' fva_loss; groups have no step loss.",
            hint="Leave out --steps with --group, or rank series with --steps (and --by fva).",
        )
    if args.format == "parquet":
        raise TriageError(
            "--format parquet writes the series' scorecard; the groups' is a CSV, JSON or table.",
            hint="Choose --format csv with --group (or leave out --group for Parquet).",
        )


def _group_columns_of(args: argparse.Namespace) -> Callable[[Portfolio], object]:
    """``--group``'s columns, checked against a portfolio (before a dataset is scored)."""
    from triage.core.groups import parse_group_columns

    return lambda portfolio: parse_group_columns(portfolio, args.group)


def _rank_groups(args: argparse.Namespace, settings: ScoreSettings, portfolio: Portfolio) -> int:
    """``triage rank --group``: the group scorecard in the asked format."""
    from triage.core import groups, metrics
    from triage.core.ranking import scorecard

    by_columns = groups.parse_group_columns(portfolio, args.group)
    card = scorecard(portfolio, settings.window, settings.season)
    cols = metrics.window_columns(portfolio.demand, portfolio.last_actual, settings.window)
    grouping = groups.grouping(portfolio, by_columns)
    table = groups.group_scorecard(portfolio, card, cols, grouping, by=args.by)
    del card
    return _show_groups(args, settings, portfolio, table, by_columns, cols)


def _show_groups(
    args: argparse.Namespace,
    settings: ScoreSettings,
    portfolio: Portfolio,
    table: pd.DataFrame,
    by_columns: tuple[str, ...],
    cols: np.ndarray,
) -> int:
    """Write the group scorecard ``table`` as ``rank --group``'s options ask. ``portfolio``
    describes what was scored (a dataset's first series on the Dask engine); ``cols`` are the
    window's columns."""
    from triage.core.ranking import leading_cover
    from triage.render import scorecard as report

    shown = table
    if args.cover is not None:
        shown = leading_cover(table, settings.target_share)
    elif args.top is not None:
        shown = table.iloc[: args.top]
    elif args.format == "table":
        shown = table.iloc[: report.TABLE_DEFAULT_ROWS]
    if args.format == "csv":
        _emit_blocks(report.csv_blocks(shown), args.output, force=args.force)
        return 0
    if args.format == "json":
        text = report.groups_json(
            portfolio, shown, settings.window, settings.season, by_columns, cols=cols
        )
    else:
        text = report.group_table(
            portfolio, table, shown, settings.window, by_columns, by=args.by, cols=cols
        )
    _emit(text, args.output, force=args.force)
    return 0


def _cmd_check(args: argparse.Namespace) -> int:
    from triage.core.metrics import window_columns
    from triage.core.quality import quality
    from triage.core.ranking import nothing_to_score
    from triage.render import scorecard as report

    settings = ScoreSettings.from_args(args)
    if args.engine == "dask":
        from triage.core.dask_engine import check_dataset

        reading = dask_reading(args, settings)
        with dask_client(args) as client:
            checked = check_dataset(
                args.portfolio,
                client,
                window=settings.window,
                columns=reading["columns"],
                options=reading["options"],
                lag=reading["lag"],
            )
        portfolio, found = checked.described, checked.found
        cols = checked.plan.window_cols(settings.window)
    else:
        # Several lags are reported (with the --lag choice), not refused.
        portfolio = load_portfolio(args, smallest_lag=True, dataset=True)
        cols = window_columns(portfolio.demand, portfolio.last_actual, settings.window)
        found = quality(portfolio, cols)
    print(
        report.check_text(
            portfolio,
            settings.window,
            settings.season,
            found,
            cols,
            lag_given=settings.lag is not None,
        )
    )
    if not found.scorable:
        raise nothing_to_score(portfolio.path, len(cols))
    return 0


def _review_options(
    args: argparse.Namespace,
    portfolio: Path,
    ledger: Path | None,
    *,
    config: Config | None = None,
    settings: ScoreSettings | None = None,
    notices: Sequence[str] = (),
):
    from triage.core.config import default_reviewer, reviewer_problem
    from triage.tui.app import Options

    config = config if config is not None else load_config_of(args)
    settings = settings if settings is not None else ScoreSettings.from_args(args, config)
    # `triage demo` reads the bundled sample: no portfolio options.
    reading = read_args(args) if hasattr(args, "portfolio") else {}
    reviewer = args.reviewer or default_reviewer(config)
    problem = reviewer_problem(reviewer)
    if problem:
        where = "--reviewer" if args.reviewer else "the login name used as reviewer"
        raise TriageError(f"{where} {problem}.", hint="Pass a plain name with --reviewer NAME.")
    return Options(
        portfolio=portfolio,
        ledger=ledger,
        reviewer=reviewer,
        settings=settings,
        columns=reading.get("columns"),
        sheet=reading.get("sheet"),
        file_options=reading.get("options"),
        root_causes=config.root_causes,
        auto_advance=config.auto_advance,
        notices=list(notices),
        group=getattr(args, "group", None),
        cache=not args.no_cache,
        scorecard=getattr(args, "scorecard", None),
        cache_limit_mb=CACHE_LIMIT_MB.check(
            CACHE_LIMIT_MB.default if args.cache_limit is None else args.cache_limit,
            CACHE_LIMIT_MB.flag,
        ),
    )


def _cmd_review(args: argparse.Namespace) -> int:
    from triage.arguments import note

    config = load_config_of(args)
    settings = ScoreSettings.from_args(args, config)
    if not args.portfolio.exists():
        raise TriageError(
            f"{args.portfolio}: no such file.", hint="Check the path of the portfolio file."
        )
    if getattr(args, "scorecard", None) is not None:
        portfolio, ledger, notices = _scorecard_target(args, config)
    else:
        portfolio, ledger, notices = review_target(args, config)
    for text in notices:
        # Also on the terminal, where it stays after the review screens close.
        note(text)
    from triage.tui.app import TriageApp

    options = _review_options(
        args, portfolio, ledger, config=config, settings=settings, notices=notices
    )
    return _run_app(TriageApp(options))


def _scorecard_target(
    args: argparse.Namespace, config: Config
) -> tuple[Path, Path | None, list[str]]:
    """The dataset folder a review on a stored scorecard opens, its ledger and what to say.

    The ledger is the dataset folder's (``locate_ledger`` of the folder, as of a review
    folder), or ``--ledger``; the scorecard folder is replaced by each week's ``rank``, so it
    holds none."""
    from triage.core.ledger import locate_ledger
    from triage.core.on_demand import reviewable
    from triage.core.text import visible

    if not args.portfolio.is_dir():
        raise TriageError(
            f"--scorecard reviews a dataset folder; {visible(str(args.portfolio))} is not a "
            "folder.",
            hint="Give the dataset folder the scorecard was made from, then --scorecard DIR.",
        )
    if args.group is not None:
        raise TriageError(
            "--group opens the group view, which adds up every series' history; a review on a "
            "stored scorecard fetches only the histories it shows.",
            hint="Leave out --group, or rank the dataset's groups with triage rank DATASET "
            "--engine dask --group COLUMNS.",
        )
    # Refused here, before the screens open: a folder that is not a reviewable scorecard of
    # this dataset as it is.
    reviewable(args.portfolio, args.scorecard, columns=read_args(args)["columns"])
    if args.ledger is not None:
        return args.portfolio, args.ledger, []
    try:
        where = locate_ledger(args.portfolio, name=config.ledger, for_writing=True)
    except TriageError:
        return args.portfolio, None, []
    return args.portfolio, where.path, list(where.notices)


def _run_app(app: TriageApp) -> int:
    """Run the review screens; a fault inside them is reported like any other (one line, log)."""
    app.run()
    if app.crashed is not None:
        return _unexpected(app.crashed, sys.argv[1:], app.unsaved_entries())
    return 0


def sample_portfolio() -> Path:
    """The bundled sample portfolio of a source checkout."""
    path = Path(__file__).resolve().parents[1] / "sample" / "portfolio.csv"
    if not path.exists():
        raise TriageError(
            f"the sample portfolio is not at {path}.",
            hint=(
                "Run the demo from a source checkout (pip install -e .), or use triage review FILE."
            ),
        )
    return path


#: The demo's ledger, in the user data folder (the sample ships read-only with the code).
DEMO_LEDGER = "sample.ledger.sqlite"


def demo_paths() -> tuple[Path, Path]:
    """The demo's ledger, and the folder its exports are offered in (the sample's)."""
    from platformdirs import user_data_dir

    return Path(user_data_dir("triage")) / "demo" / DEMO_LEDGER, sample_portfolio().parent


def _cmd_demo(args: argparse.Namespace) -> int:
    from triage.arguments import note
    from triage.tui.app import TriageApp

    sample = sample_portfolio()
    ledger, exports = demo_paths()
    ledger.parent.mkdir(parents=True, exist_ok=True)
    said = (
        f"Demo on {sample}: decisions are kept in {ledger}"
        + (" (new)" if not ledger.exists() else "")
        + f"; exports (x in the review screens) are offered in {exports}, named "
        f"{sample.stem}-review-<cycle>.xlsx, and you can type another path."
    )
    note(said)
    options = _review_options(args, sample, ledger, notices=[said])
    return _run_app(TriageApp(options))


def _emit(text: str, output: Path | None, *, force: bool) -> None:
    if output is None:
        sys.stdout.write(_on_terminal(text))
        sys.stdout.flush()
        return
    from triage.core.files import write_text_atomic

    write_text_atomic(output, text, force=force)


def _emit_blocks(blocks: Iterable[bytes], output: Path | None, *, force: bool) -> None:
    """Write UTF-8 blocks as they come: to standard output, or atomically to ``output``."""
    if output is not None:
        from triage.core.files import write_blocks_atomic

        write_blocks_atomic(output, blocks, force=force)
        return
    sys.stdout.flush()
    raw = getattr(sys.stdout, "buffer", None)
    if sys.stdout.isatty():
        blocks = (_on_terminal(block.decode("utf-8")).encode("utf-8") for block in blocks)
    for block in blocks:
        if raw is None:
            sys.stdout.write(block.decode("utf-8"))
        else:
            raw.write(block)
    (raw or sys.stdout).flush()


def _on_terminal(text: str) -> str:
    """Output for standard output: exact when it goes to a file or a pipe; on a terminal, the
    control characters that ids keep (CSV and JSON are exact) are shown as visible symbols."""
    if not sys.stdout.isatty():
        return text
    from triage.core.text import visible

    return visible(text, multiline=True)


if __name__ == "__main__":
    raise SystemExit(main())
