"""Command-line options shared by several subcommands, defined once."""

from __future__ import annotations

import argparse
import contextlib
import sys
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

from triage.core.errors import TriageError
from triage.core.settings import LAG, SEASON, WINDOW, ScoreSettings, Setting
from triage.core.text import visible as printable

if TYPE_CHECKING:
    from triage.core.config import Config
    from triage.core.dataset import Plan
    from triage.core.ledger import Ledger
    from triage.core.portfolio import Portfolio


def setting_arg(
    parser: argparse.ArgumentParser | argparse._ArgumentGroup,
    setting: Setting[Any],
    *,
    flag: str | None = None,
    help: str | None = None,
) -> None:
    """The option of a declared setting (``triage.core.settings``): its type, placeholder and
    help (the default written in) from the declaration.

    The parsed value is None unless the option was typed: ``ScoreSettings.from_args`` applies
    the configuration and the declared default.

    Args:
        parser: The parser or group to add the option to.
        setting: The declaration.
        flag: One of the setting's other options (``--target``), instead of its usual one.
        help: Help of a command that uses the setting in its own way; ``{default}`` is
            replaced by the default.
    """
    assert flag is None or flag in setting.flags, flag
    parser.add_argument(
        flag or setting.flag,
        type=setting.convert,
        metavar=setting.metavar,
        help=(help or setting.help).format(default=setting.shown()),
    )


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
    setting_arg(parser, LAG)
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
    setting_arg(parser, WINDOW)
    setting_arg(parser, SEASON)


def steps_arg(parser: argparse.ArgumentParser, what: str = "") -> None:
    """``--steps A,B,C``: the process steps, in order (``triage.core.compare.parse_steps``)."""
    parser.add_argument(
        "--steps",
        metavar="A,B,C",
        help="forecast value added chain, in order (default: naive, the forecast_<name> "
        "columns in file order, forecast; snaive only when listed)" + what,
    )


def steps_of(args: argparse.Namespace, portfolio: Portfolio, season: int) -> tuple[str, ...] | None:
    """The ``--steps`` given, checked against the portfolio's forecasts; None when not given.

    Raises:
        TriageError: An unknown, empty or repeated name (``compare.parse_steps``).
    """
    if args.steps is None:
        return None
    from triage.core.compare import forecast_names, parse_steps

    return parse_steps(args.steps, forecast_names(portfolio, season))


def config_arg(parser: argparse.ArgumentParser) -> None:
    """``--config PATH``: the configuration file (default: the user's, when there is one)."""
    parser.add_argument("--config", type=Path, metavar="PATH", help="configuration file")


def ledger_arg(parser: argparse.ArgumentParser) -> None:
    """``--ledger PATH``: the decision ledger (default: the review folder's ledger)."""
    parser.add_argument(
        "--ledger",
        type=Path,
        metavar="PATH",
        help="decision ledger (default: the review folder's ledger, see docs/ledger.md)",
    )


def reviewer_arg(parser: argparse.ArgumentParser) -> None:
    """``--reviewer NAME``: the name stored with each decision."""
    parser.add_argument(
        "--reviewer", help="name stored with each decision (default: config or login name)"
    )


def format_arg(parser: argparse.ArgumentParser, *, parquet: bool = False) -> None:
    """``--format``: a table for reading, or CSV or JSON for a program; with ``parquet``, also a
    folder of Parquet files (``--output DIR``)."""
    parser.add_argument(
        "--format",
        choices=("table", "csv", "json", *(("parquet",) if parquet else ())),
        default="table",
        help="output format (default table)"
        + ("; parquet writes a folder of Parquet files, --output DIR" if parquet else ""),
    )


def load_config_of(args: argparse.Namespace) -> Config:
    """The configuration named by ``--config``, else the user's (``load_config``).

    Raises:
        ConfigError: The file cannot be used as written.
    """
    from triage.core.config import load_config

    return load_config(getattr(args, "config", None))


def load_portfolio(
    args: argparse.Namespace,
    *,
    smallest_lag: bool = False,
    dataset: bool = False,
    scored_window: int | None = None,
    season: int = SEASON.default,
    on_plan: Callable[[Plan], None] | None = None,
) -> Portfolio:
    """The portfolio named on the command line, read with the options of ``portfolio_args``.

    With ``dataset``, a folder is read as a dataset of Parquet parts by the local engine
    (``triage.core.dataset.read_dataset``, which gives ``on_plan`` the dataset's plan);
    otherwise a folder is refused by the loader.
    ``scored_window``, ``season``: read to be scored over that window only, with a naive
    baseline of that season (``read_portfolio``).

    Raises:
        TriageError: The file cannot be read or scored as it is (the loader's message).
    """
    from triage.core.read import read_portfolio

    options = read_args(args)
    if dataset and args.portfolio.is_dir():
        from triage.core.dataset import read_dataset

        refuse_sheet(args)
        del options["sheet"]
        return read_dataset(args.portfolio, smallest_lag=smallest_lag, on_plan=on_plan, **options)
    return read_portfolio(
        args.portfolio,
        smallest_lag=smallest_lag,
        scored_window=scored_window,
        season=season,
        **options,
    )


def refuse_sheet(args: argparse.Namespace) -> None:
    """Refuse ``--sheet`` with a dataset, whose parts are Parquet files."""
    if args.sheet is not None:
        raise TriageError(
            f"--sheet {args.sheet!r} was given, but {args.portfolio} is a dataset folder of "
            "Parquet files, which have no sheets.",
            hint="Leave out --sheet.",
        )


def engine_args(parser: argparse.ArgumentParser) -> None:
    """Where a dataset folder is scored: ``--engine --workers --memory-limit --scheduler``."""
    parser.add_argument(
        "--engine",
        choices=ENGINES,
        default=ENGINES[0],
        help="local: read a dataset folder in this process (default); dask: score it on a "
        "Dask cluster (docs/scale.md)",
    )
    parser.add_argument(
        "--workers",
        type=int,
        metavar="N",
        help="--engine dask: worker processes of the local cluster (default: one per core)",
    )
    parser.add_argument(
        "--memory-limit",
        metavar="SIZE",
        help="--engine dask: memory limit per worker of the local cluster, e.g. 6GB",
    )
    parser.add_argument(
        "--scheduler",
        metavar="ADDRESS",
        help="--engine dask: run on an existing cluster, e.g. tcp://host:8786",
    )


#: The engines ``--engine`` chooses from; the first is the default.
ENGINES = ("local", "dask")


def dask_reading(args: argparse.Namespace, settings: ScoreSettings) -> dict[str, Any]:
    """What a command on the Dask engine passes on about the dataset and its scoring: window,
    season, steps (``--steps`` as given; checked against the dataset's forecasts there) and
    the read options (``read_args``, without ``--sheet``)."""
    read = read_args(args)
    steps = getattr(args, "steps", None)
    return {
        "window": settings.window,
        "season": settings.season,
        "steps": None if steps is None else (steps,),
        "columns": read["columns"],
        "options": read["options"],
        "lag": read["lag"],
    }


@contextlib.contextmanager
def dask_client(args: argparse.Namespace) -> Iterator[Any]:
    """The Dask client ``--engine dask`` runs on (``engine_args``), once the portfolio is
    known to be a dataset folder; closed, with its local cluster, on exit.

    Raises:
        TriageError: The portfolio is not a folder, ``--sheet`` was given, Dask is missing or
            the scheduler cannot be reached.
    """
    from triage.core.dask_engine import ClusterOptions, cluster_client

    if not args.portfolio.is_dir():
        raise TriageError(
            f"--engine dask reads a dataset folder of Parquet files; "
            f"{printable(str(args.portfolio))} is not a folder.",
            hint="Leave out --engine dask to read one file, or give the dataset's folder.",
        )
    refuse_sheet(args)
    cluster = ClusterOptions(
        workers=args.workers, memory_limit=args.memory_limit, address=args.scheduler
    )
    with cluster_client(cluster) as client:
        yield client


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


def refuse_output_folder(target: Path, source: Path, *, force: bool) -> None:
    """Refuse a folder output (``--format parquet``) over, inside or around the portfolio
    read, even with ``--force``, and an existing one without it.

    Raises:
        TriageError: The folder would hold or replace what is being read, or exists and
            ``force`` is false.
    """
    from triage.core.files import refuse_existing

    out, read = target.resolve(), source.resolve()
    if out == read or out in read.parents or read in out.parents:
        raise TriageError(
            f"{printable(str(target))} would hold or replace {printable(str(source))}, which is "
            "being read. Nothing was written.",
            hint="Choose an output folder outside the portfolio's folder.",
        )
    refuse_existing([target], force=force)


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


def group_arg(parser: argparse.ArgumentParser) -> None:
    """``--group COL[,COL...]``: roll series up by attribute columns and/or ``location``."""
    parser.add_argument(
        "--group",
        metavar="COL[,COL...]",
        help="one row per group of series sharing these columns' values (attribute columns "
        "and/or location), ranked by their share of the series' error",
    )


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


def review_target(
    args: argparse.Namespace, config: Config, *, stand_in: bool = True
) -> tuple[Path, Path | None, list[str]]:
    """The portfolio a review opens (the newest in a folder), its ledger, and what to say.

    Without ``--ledger`` the ledger is the review folder's (``locate_ledger``). When no ledger
    can be had (neither the folder nor the user data folder is writable) it is left to the
    review screens, which open without saving and say why.

    Args:
        args: The parsed command line.
        config: The configuration.
        stand_in: Accept a ledger in the user data folder standing in for the ledger of a folder
            that cannot be written; when False that is refused naming the folder's ledger (a
            batch recorded there would never reach the folder's exports).

    Raises:
        TriageError: ``stand_in`` is False and the folder's ledger cannot be written.
    """
    from triage.core.ledger import locate_ledger

    notices: list[str] = []
    portfolio: Path = args.portfolio
    if portfolio.is_dir():
        from triage.core.folder import newest_portfolio

        reading = read_args(args)
        newest = newest_portfolio(
            portfolio,
            columns=reading["columns"],
            sheet=reading["sheet"],
            lag=reading["lag"],
            options=reading["options"],
        )
        portfolio = newest.path
        notices.extend(newest.notices)
    ledger: Path | None = args.ledger
    if ledger is None:
        try:
            where = locate_ledger(portfolio, name=config.ledger, for_writing=True)
        except TriageError:
            return portfolio, None, notices
        if where.stand_in_for is not None and not stand_in:
            raise TriageError(
                f"the decision ledger of this folder, {where.stand_in_for}, cannot "
                f"be written: the folder {where.stand_in_for.parent} is not "
                "writable; nothing was recorded.",
                hint="Ask for write access to the folder, or pass --ledger PATH to record the "
                "decisions in another ledger on purpose.",
            )
        ledger = where.path
        notices.extend(where.notices)
    return portfolio, ledger, notices
