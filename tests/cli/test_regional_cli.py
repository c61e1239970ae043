"""Regional extracts on the command line (issue 9 §5): refused with the options that read them.

A planner runs ``triage rank`` on a semicolon file with decimal commas and day-first dates: the
run stops (exit 2, no traceback) and names the options; run again with exactly those options,
it ranks what the same rows in triage's default format rank. Every command that reads a
portfolio takes the options (``arguments.portfolio_args``). Files are invented.
"""

from __future__ import annotations

import argparse
import csv
import io
import re
import shlex
from pathlib import Path

import pandas as pd

from tests.cli.test_cli import run
from tests.core.test_parquet_streamed import garden_rows
from triage.cli import _review_options, build_parser
from triage.core.dialect import FileOptions

TITLE = "Absatzplanung KW 40;;;;\nStand 01.10.2025;;;;\n\n"


def write_pair(folder: Path) -> tuple[Path, Path]:
    """The same rows as a plain CSV and as a regional extract below a title block."""
    rows = garden_rows(seed=31, n_items=10)
    plain = folder / "plain.csv"
    rows.to_csv(plain, index=False)
    regional = folder / "regional.csv"
    text = rows.assign(period=pd.to_datetime(rows["period"])).to_csv(
        index=False, sep=";", decimal=",", date_format="%d.%m.%Y"
    )
    regional.write_text(TITLE + text, encoding="utf-8")
    return plain, regional


def printed_options(stderr: str) -> list[str]:
    found = re.search(r"Read (?:it|the file) with ((?:--[a-z-]+ \S+ ?)+)", stderr)
    assert found, stderr
    return shlex.split(found.group(1).strip().removesuffix("."))


def test_refused_with_the_options_then_read_with_them(tmp_path: Path) -> None:
    plain, regional = write_pair(tmp_path)
    refused = run("rank", str(regional), "--format", "csv")
    assert refused.returncode == 2 and refused.stdout == ""
    assert "Traceback" not in refused.stderr
    options = printed_options(refused.stderr)
    assert options == [
        "--sep",
        ";",
        "--decimal",
        ",",
        "--date-format",
        "%d.%m.%Y",
        "--header-row",
        "4",
    ]
    ranked = run("rank", str(regional), "--format", "csv", *options)
    assert ranked.returncode == 0, ranked.stderr
    reference = run("rank", str(plain), "--format", "csv")
    assert reference.returncode == 0, reference.stderr
    assert ranked.stdout == reference.stdout
    assert len(list(csv.DictReader(io.StringIO(ranked.stdout)))) == 20


def test_every_command_that_reads_a_portfolio_takes_the_options(tmp_path: Path) -> None:
    plain, regional = write_pair(tmp_path)
    options = ["--sep", ";", "--decimal", ",", "--date-format", "%d.%m.%Y", "--header-row", "4"]
    check = run("check", str(regional), *options)
    assert check.returncode == 0, check.stderr
    assert check.stdout.replace(str(regional), "F") == (
        run("check", str(plain)).stdout.replace(str(plain), "F")
    )
    report = run("report", str(regional), *options, "--to", str(tmp_path / "r.html"))
    assert report.returncode == 0, report.stderr
    for command in ("overrides", "export"):
        extra = ["--to", str(tmp_path / "x.csv")] if command == "export" else []
        result = run(command, str(regional), *options, *extra)
        # No ledger yet: the options were accepted and the file read; the message says so.
        assert "No decisions have been recorded for regional.csv" in result.stderr, command
        assert "unrecognized arguments" not in result.stderr
    # The review screens get the same options (the app reads the file with them).
    args = build_parser().parse_args(["review", str(regional), *options])
    assert isinstance(args, argparse.Namespace)
    opened = _review_options(args, regional, None)
    assert opened.file_options == FileOptions(";", ",", "%d.%m.%Y", 4)


def test_bad_options_exit_2_before_reading(tmp_path: Path) -> None:
    _, regional = write_pair(tmp_path)
    result = run("rank", str(regional), "--sep", ",", "--decimal", ",")
    assert result.returncode == 2
    assert "--sep and --decimal are both ','" in result.stderr
    result = run("check", str(regional), "--date-format", "%d.%B.%Y")
    assert result.returncode == 2 and "'%B' is not a directive" in result.stderr
    assert "Traceback" not in result.stderr


def test_export_like_input_writes_the_files_own_conventions(tmp_path: Path) -> None:
    # The same portfolio exported plainly and --like-input: read back with pandas in each
    # file's own convention (pandas.read_csv sep/decimal, the outside reference), the tables
    # are equal, and the periods are written day first as in the file.
    from triage.core.cycle import ReviewCycle
    from triage.core.ledger import Ledger
    from triage.core.read import read_portfolio
    from triage.core.review import ReviewSession

    plain, regional = write_pair(tmp_path)
    opts = ["--sep", ";", "--decimal", ",", "--date-format", "%d.%m.%Y", "--header-row", "4"]
    ledger = tmp_path / "l.sqlite"
    with Ledger.open(ledger) as opened:
        session = ReviewSession(ReviewCycle(read_portfolio(plain), opened), reviewer="ana")
        series = int(session.error_order[0])
        session.commit_decision(
            series, outcome="adjusted", root_cause="promotion", adjustment="+7%"
        )
    out_plain = run(
        "export", str(plain), "--ledger", str(ledger), "--to", str(tmp_path / "a.csv"), cwd=tmp_path
    )
    assert out_plain.returncode == 0, out_plain.stderr
    out_local = run(
        "export",
        str(regional),
        *opts,
        "--like-input",
        "--ledger",
        str(ledger),
        "--to",
        str(tmp_path / "b.csv"),
        cwd=tmp_path,
    )
    assert out_local.returncode == 0, out_local.stderr
    a = pd.read_csv(tmp_path / "a" / "a-forecast.csv", dtype={"item": str, "location": str})
    b = pd.read_csv(
        tmp_path / "b" / "b-forecast.csv",
        sep=";",
        decimal=",",
        dtype={"item": str, "location": str},
    )
    assert b["period"].str.fullmatch(r"\d\d\.\d\d\.\d{4}").all()
    b["period"] = pd.to_datetime(b["period"], format="%d.%m.%Y").dt.strftime("%Y-%m-%d")
    pd.testing.assert_frame_equal(a.drop(columns="outcome"), b.drop(columns="outcome"))
    assert (a["adjusted"]).any()
    raw = (tmp_path / "b" / "b-forecast.csv").read_text(encoding="utf-8")
    assert raw.splitlines()[0].count(";") >= 5 and "," not in raw.splitlines()[0]
