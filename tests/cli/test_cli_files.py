"""What ``triage`` writes, where, and what it shows of names it did not choose.

Reliability rules (docs/sources.md §5 and §7; common practice for
command-line tools): an output option never destroys the input it reads, a folder given as an
output file is refused with a message, and text from the file system (a file name) reaches the
terminal without its control characters. A file column named like a computed column keeps its
values under its own name.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path

import pytest

from tests.cli.test_cli import run

ROWS = (
    "item,period,demand,forecast,rank,Pattern,cum_share\n"
    "A,2025-01-06,1,2,A-class,fast,z\n"
    "A,2025-01-13,3,2,A-class,fast,z\n"
    "B,2025-01-06,1,9,B-class,slow,z\n"
    "B,2025-01-13,3,2,B-class,slow,z\n"
)


def test_file_columns_named_like_computed_ones_are_kept_apart(tmp_path: Path) -> None:
    path = tmp_path / "clash.csv"
    path.write_text(ROWS, encoding="utf-8")
    result = run("rank", str(path), "--format", "csv")
    assert result.returncode == 0, result.stderr
    rows = list(csv.DictReader(io.StringIO(result.stdout)))
    # The computed rank and cumulative share (B: |9-1| + |2-3| = 9 of 11 units of error).
    assert [(r["item"], r["rank"]) for r in rows] == [("B", "1"), ("A", "2")]
    assert rows[-1]["cum_share"] == "1.0"
    assert rows[0]["pattern"] in ("smooth", "erratic", "intermittent", "lumpy")
    # The file's own columns, under new names.
    assert [r["rank_file"] for r in rows] == ["B-class", "A-class"]
    assert [r["Pattern_file"] for r in rows] == ["slow", "fast"]
    assert rows[0]["cum_share_file"] == "z"
    # The table and --cover work on the computed columns (they crashed on the file's text).
    table = run("rank", str(path), "--cover", "0.5")
    assert table.returncode == 0, table.stderr
    check = run("check", str(path))
    assert "rank_file" in check.stdout and "'rank' (now 'rank_file')" in check.stdout


def test_output_over_the_portfolio_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "portfolio.csv"
    path.write_text(ROWS, encoding="utf-8")
    result = run("rank", str(path), "--format", "csv", "--output", str(path))
    assert result.returncode == 2
    assert "is the file being read" in result.stderr and "Traceback" not in result.stderr
    assert path.read_text(encoding="utf-8") == ROWS


def test_output_to_a_folder_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "portfolio.csv"
    path.write_text(ROWS, encoding="utf-8")
    (tmp_path / "out").mkdir()
    result = run("rank", str(path), "--output", str(tmp_path / "out"))
    assert result.returncode == 2
    assert "is a folder" in result.stderr and "Traceback" not in result.stderr


def test_control_characters_in_a_file_name_never_reach_the_terminal(tmp_path: Path) -> None:
    # ESC ] 0 ; ... BEL would set the terminal's title (ECMA-48 OSC, xterm control sequences).
    name = "week\x1b]0;owned\x07.csv"
    path = tmp_path / name
    path.write_text(ROWS, encoding="utf-8")
    for args in (("rank", str(path)), ("check", str(path)), ("rank", str(tmp_path / ("x" + name)))):
        result = run(*args)
        shown = result.stdout + result.stderr
        assert "\x1b" not in shown and "\x07" not in shown, args
        assert "week\u241b]0;owned\u2407.csv" in shown, args


def test_rank_says_what_the_loader_changed_on_standard_error(tmp_path: Path) -> None:
    path = tmp_path / "clash.csv"
    path.write_text(ROWS, encoding="utf-8")
    result = run("rank", str(path), "--format", "csv")
    assert result.returncode == 0
    assert "triage: note:" in result.stderr and "rank_file" in result.stderr
    assert result.stdout.startswith("item,rank,")  # standard output stays pure CSV


# ---- no silent overwrite (reliability rule: never replace a file without --force) ------------


def listing(folder: Path) -> dict[str, bytes]:
    """Every entry under ``folder``, hidden ones too, with the bytes of each file."""
    return {
        str(p.relative_to(folder)): p.read_bytes() if p.is_file() else b"<folder>"
        for p in sorted(folder.rglob("*"))
    }


def test_rank_output_replaces_an_existing_file_only_with_force(tmp_path: Path) -> None:
    path = tmp_path / "portfolio.csv"
    path.write_text(ROWS, encoding="utf-8")
    for fmt, name in (("csv", "ranked.csv"), ("table", "ranked.txt"), ("json", "ranked.json")):
        target = tmp_path / name
        target.write_text("keep me\n", encoding="utf-8")
        before = listing(tmp_path)
        refused = run("rank", str(path), "--format", fmt, "--output", str(target))
        assert refused.returncode == 2, (fmt, refused.stderr)
        assert refused.stderr.startswith(f"triage: {target} already exists; nothing was written")
        assert "pass --force to replace" in refused.stderr and "Traceback" not in refused.stderr
        assert listing(tmp_path) == before
        forced = run("rank", str(path), "--format", fmt, "--output", str(target), "--force")
        assert forced.returncode == 0, forced.stderr
        assert target.read_text(encoding="utf-8") == run("rank", str(path), "--format", fmt).stdout
        assert set(listing(tmp_path)) == set(before)  # no scratch folder left behind


def test_report_replaces_an_existing_file_only_with_force(tmp_path: Path) -> None:
    path = tmp_path / "portfolio.csv"
    path.write_text(ROWS, encoding="utf-8")
    target = tmp_path / "weekly.html"
    target.write_text("<p>last week's report</p>\n", encoding="utf-8")
    refused = run("report", str(path), "--to", str(target))
    assert refused.returncode == 2, refused.stderr
    assert f"{target} already exists; nothing was written" in refused.stderr
    assert "--force" in refused.stderr and "Traceback" not in refused.stderr
    assert target.read_text(encoding="utf-8") == "<p>last week's report</p>\n"
    forced = run("report", str(path), "--to", str(target), "--force")
    assert forced.returncode == 0, forced.stderr
    assert "<title>" in target.read_text(encoding="utf-8")
    # The default file beside the portfolio follows the same rule.
    first = run("report", str(path), cwd=tmp_path)
    assert first.returncode == 0, first.stderr
    written = next(tmp_path.glob("portfolio-report-*.html"))
    again = run("report", str(path), cwd=tmp_path)
    assert again.returncode == 2 and f"{written} already exists" in again.stderr
    assert run("report", str(path), "--force", cwd=tmp_path).returncode == 0


def test_output_to_a_full_device_exits_2_with_a_message(tmp_path: Path) -> None:
    # A target that is a link to /dev/full (every write: ENOSPC) is written in place, as a
    # device must be; the failure is a message naming the file, never a traceback.
    if not Path("/dev/full").is_char_device():
        pytest.skip("no /dev/full")
    path = tmp_path / "portfolio.csv"
    path.write_text(ROWS, encoding="utf-8")
    for args, name in (
        (("rank", str(path), "--format", "csv", "--output"), "ranked.csv"),
        (("rank", str(path), "--output"), "ranked.txt"),
        (("report", str(path), "--to"), "report.html"),
    ):
        target = tmp_path / name
        target.symlink_to("/dev/full")
        result = run(*args, str(target))
        assert result.returncode == 2, (args, result.stderr)
        assert f"\ntriage: could not write to {target}," in result.stderr, result.stderr
        assert "No space left on device" in result.stderr
        assert "Traceback" not in result.stderr and "Exception ignored" not in result.stderr
        assert target.is_symlink()  # the device was not replaced by a file
