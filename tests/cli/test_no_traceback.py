"""Issue 10 §4: no input ever gives a traceback. Each case found by the outside tester exits 2 with
its own message; anything unexpected exits 1 with one line naming a log file.

Every case runs the installed command in a subprocess, as a user would.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
import zipfile
from pathlib import Path

import openpyxl
import pytest
from openpyxl.chart import BarChart, Reference

from tests.cli.test_cli import ROOT, SAMPLE, run
from tests.core.hostile_xlsx import DATA, empty_rows, row_xml, write_workbook
from triage.core.ledger import Ledger


def refused(result: subprocess.CompletedProcess[str], *fragments: str) -> None:
    """Exit 2, each fragment in the message, a hint, and no traceback."""
    assert result.returncode == 2, (result.returncode, result.stderr)
    assert "Traceback" not in result.stderr and "Error:" not in result.stderr.split("\n")[0][:9]
    for fragment in fragments:
        assert fragment in result.stderr, (fragment, result.stderr)
    assert "What to do:" in result.stderr


# --- the cases the tester found ------------------------------------------------------------------


@pytest.mark.parametrize("lag", ["99999999999999999999", "1e20", "10001", "-99999999999999999999"])
def test_a_lag_too_large_for_any_integer_is_a_message(tmp_path: Path, lag: str) -> None:
    path = tmp_path / "p.csv"
    path.write_text(
        f"item,period,lag,demand,forecast\nA,2026-10-05,{lag},5,4\nA,2026-10-12,1,5,6\n"
    )
    result = run("rank", str(path))
    if lag.startswith("-"):
        refused(result, "negative lags", "row 2")
    else:
        refused(result, "lags larger than 10,000 periods", "row 2")


def test_a_lag_too_large_in_a_workbook_is_a_message(tmp_path: Path) -> None:
    data = [["item", "period", "lag", "demand", "forecast"], ["A", "2026-10-05", 1e20, 5, 4]]
    path = write_workbook(tmp_path / "p.xlsx", data=data)
    refused(run("rank", str(path)), "lags larger than 10,000 periods", "row 2")


def test_malformed_sheet_xml_is_a_message(tmp_path: Path) -> None:
    # A cell element closed by </row>: the XML parser stops with a ParseError.
    broken = b'<row r="6"><c r="A6"><v>1</v></row>'
    for dimension in (False, True):
        path = write_workbook(tmp_path / f"x{dimension}.xlsx", [broken], dimension=dimension)
        refused(run("rank", str(path)), "cannot be read: its XML is malformed", "mismatched tag")


def test_a_bad_crc_in_the_sheet_is_a_message(tmp_path: Path) -> None:
    # Stored, not deflated, so that one byte of a cell value can be changed in place; the zip
    # reader checks the CRC-32 when it reaches the end of the sheet (PKWARE APPNOTE.TXT 4.4.7).
    rows = [row_xml(n, ["A", "2026-10-05", n, 1]) for n in range(6, 3000)]
    path = write_workbook(
        tmp_path / "crc.xlsx", rows, compression=zipfile.ZIP_STORED, dimension=True
    )
    raw = bytearray(path.read_bytes())
    at = raw.index(b"<v>2999</v>")
    raw[at + 3] = ord("8")
    path.write_bytes(bytes(raw))
    refused(run("rank", str(path)), "sheet 'data' cannot be read", "damaged", "Bad CRC-32")


def test_a_chart_sheet_first_is_a_message(tmp_path: Path) -> None:
    # A chart sheet without its relationships part: the xlsx reader fails on it with an
    # AttributeError while opening the workbook, before any data sheet.
    book = openpyxl.Workbook()
    sheet = book.active
    sheet.title = "data"
    for row in DATA:
        sheet.append(row)
    chart_sheet = book.create_chartsheet("chart", 0)
    chart = BarChart()
    chart.add_data(Reference(sheet, min_col=3, min_row=1, max_row=5), titles_from_data=True)
    chart_sheet.add_chart(chart)
    whole = tmp_path / "whole.xlsx"
    book.save(whole)
    assert run("rank", str(whole)).returncode == 0
    path = tmp_path / "chart.xlsx"
    with zipfile.ZipFile(whole) as old, zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as new:
        for info in old.infolist():
            if not info.filename.startswith("xl/chartsheets/_rels/"):
                new.writestr(info.filename, old.read(info))
    refused(run("rank", str(path)), "chart sheet", "or delete the chart sheet")


def test_a_configuration_nested_100000_deep_is_a_message(tmp_path: Path) -> None:
    config = tmp_path / "deep.toml"
    config.write_text("a = " + "[" * 100_000 + "]" * 100_000 + "\n")
    refused(
        run("review", str(SAMPLE), "--config", str(config)), "nests arrays or tables too deeply"
    )


def test_a_configuration_that_is_a_folder_says_so(tmp_path: Path) -> None:
    refused(run("review", str(SAMPLE), "--config", str(tmp_path)), "is a folder", "config.toml")


def test_a_ledger_that_is_a_dangling_link_is_a_message(tmp_path: Path) -> None:
    link = tmp_path / "p.ledger.sqlite"
    link.symlink_to(tmp_path / "gone" / "p.ledger.sqlite")
    refused(
        run("history", str(SAMPLE), "--ledger", str(link)),
        "is a symbolic link to",
        "which does not exist",
    )
    # The review screens open the ledger through Ledger.open and show a TriageError's text.
    with pytest.raises(Exception) as caught:
        Ledger.open(link)
    assert "which does not exist" in str(caught.value)
    assert type(caught.value).__name__ == "LedgerError"
    assert not (tmp_path / "gone").exists()


# --- the guard for everything else ----------------------------------------------------------------

_FAIL_INSIDE = (
    "import sys\n"
    "import triage.core.read as read\n"
    "def fail(*args, **kwargs):\n"
    "    raise {error}\n"
    "read.read_portfolio = fail\n"
    "from triage.cli import main\n"
    "sys.exit(main(sys.argv[1:]))\n"
)


def run_failing(error: str, tmp_path: Path) -> subprocess.CompletedProcess[str]:
    """``triage rank SAMPLE`` with the portfolio reader replaced by one that raises ``error``."""
    env = {**os.environ, "XDG_STATE_HOME": str(tmp_path / "state"), "HOME": str(tmp_path)}
    return subprocess.run(
        [sys.executable, "-c", _FAIL_INSIDE.format(error=error), "rank", str(SAMPLE)],
        capture_output=True,
        text=True,
        cwd=ROOT,
        env=env,
        timeout=120,
    )


def test_an_unexpected_error_is_one_line_and_a_log_file(tmp_path: Path) -> None:
    result = run_failing("ZeroDivisionError('boom \\x1b]0;title\\x07')", tmp_path)
    assert result.returncode == 1
    assert "Traceback" not in result.stderr
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, result.stderr
    assert "unexpected error (ZeroDivisionError: boom" in lines[0]
    assert "\x1b" not in lines[0]  # the exception text is shown with visible symbols
    match = re.search(r"The details are in (\S+\.log);", lines[0])
    assert match, lines[0]
    log = Path(match.group(1))
    if sys.platform.startswith("linux"):
        assert log.is_relative_to(tmp_path / "state")
    text = log.read_text()
    assert "Traceback (most recent call last)" in text and "ZeroDivisionError" in text
    assert "rank" in text and str(SAMPLE) in text
    assert not list(log.parent.glob("*.tmp"))
    # The guard leaves the other exits as they were: Ctrl+C is 130 and quiet, a problem the
    # user can fix is 2 with its message.
    interrupted = run_failing("KeyboardInterrupt()", tmp_path)
    assert (interrupted.returncode, interrupted.stderr) == (130, "")
    refused(run("rank", str(tmp_path / "missing.csv")), "file not found")


def test_an_unexpected_error_is_reported_even_when_no_log_can_be_written(tmp_path: Path) -> None:
    (tmp_path / "state").write_text("a file where the log folder should be")
    result = run_failing("RuntimeError('boom')", tmp_path)
    assert result.returncode == 1
    assert "Traceback" not in result.stderr
    assert "unexpected error (RuntimeError: boom)" in result.stderr
    assert "could not be saved" in result.stderr


def test_the_empty_rows_workbook_of_the_issue_is_refused(tmp_path: Path) -> None:
    path = write_workbook(tmp_path / "bomb.xlsx", empty_rows(1_100_000))
    refused(run("check", str(path)), "rows (empty rows count too)", "CSV UTF-8 or Parquet")


def test_a_reviewer_name_the_ledger_cannot_store_is_refused_before_the_screens_open() -> None:
    # Issue 10 §6: a 200,000-character name was accepted and every save then failed.
    from triage.cli import _review_options, build_parser
    from triage.core.errors import TriageError

    args = build_parser().parse_args(["review", str(SAMPLE), "--reviewer", "a" * 200_000])
    with pytest.raises(TriageError) as caught:
        _review_options(args, args.portfolio, None)
    assert "--reviewer is 200,000 characters long" in str(caught.value)
    args = build_parser().parse_args(["review", str(SAMPLE), "--reviewer", "Ana\x1b[2J"])
    with pytest.raises(TriageError) as caught:
        _review_options(args, args.portfolio, None)
    assert "U+001B" in str(caught.value)


def test_damaged_parquet_pages_are_a_message(tmp_path: Path) -> None:
    # The footer is intact (the streamed reader opens the file), the first data page is not:
    # the error comes while row groups are read.
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.table(
        {
            "item": [f"I{n % 50}" for n in range(5000)],
            "period": pa.array([20_000 + 7 * (n // 50) for n in range(5000)], pa.int32()).cast(
                pa.date32()
            ),
            "demand": [float(n) for n in range(5000)],
            "forecast": [float(n) for n in range(5000)],
        }
    )
    path = tmp_path / "p.parquet"
    pq.write_table(table, path, compression="snappy")
    assert run("rank", str(path), "--format", "csv").returncode == 0
    raw = path.read_bytes()
    path.write_bytes(raw[:100] + bytes(200) + raw[300:])
    refused(run("rank", str(path)), "cannot read the Parquet data")


@pytest.mark.parametrize("option", ["--season", "--window"])
def test_a_window_or_season_beyond_any_integer_is_a_message(option: str) -> None:
    result = run("rank", str(SAMPLE), option, "99999999999999999999")
    assert result.returncode == 2 and "Traceback" not in result.stderr
    assert f"{option} counts periods: at most 10,000" in result.stderr
