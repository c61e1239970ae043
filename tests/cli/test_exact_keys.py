"""Keys stay exactly as written in machine-readable output; only a terminal shows symbols.

Issue 9 §5: ``rank --format csv`` wrote ``TAB␉ID`` for the key ``TAB<tab>ID``, so the ranked list
no longer joined with the file it came from. Ids (and attribute cells) now keep their control
characters in the portfolio; CSV and JSON carry them exactly (a CSV field holding a carriage
return is quoted, RFC 4180 §2.6), and every terminal path (the rank table, ``check``, error
messages, CSV or JSON written to a terminal) shows them as visible symbols. Files are invented.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import json
import os
import pty
import subprocess
from pathlib import Path

import pandas as pd
import pytest

from tests.cli.test_cli import triage_command

#: Ids with a tab, an escape sequence, NUL, a bidi override, a carriage return and a line feed.
IDS = ["TAB\tID", "ESC\x1b[31mID", "NUL\x00ID", "BIDI\u202eDI", "CR\rID", "LF\nID", "PLAIN"]
LOCATION = "DC\t1"
FAMILY = "hoses\x1b]0;x\x07"


def rows() -> pd.DataFrame:
    monday = dt.date(2025, 1, 6)
    out = []
    for n, item in enumerate(IDS):
        for week in range(6):
            period = (monday + dt.timedelta(weeks=week)).isoformat()
            out.append([item, LOCATION, period, 10 + n + week, 12 + n, FAMILY])
    return pd.DataFrame(out, columns=["item", "location", "period", "demand", "forecast", "family"])


def write_csv(path: Path) -> Path:
    # Every field quoted: CPython's csv writer before 3.11.9 leaves a bare CR unquoted.
    rows().to_csv(path, index=False, quoting=csv.QUOTE_ALL)
    return path


def write_parquet(path: Path) -> Path:
    rows().to_parquet(path, index=False)
    return path


def run(*args: str) -> subprocess.CompletedProcess[bytes]:
    env = {**os.environ, "COLUMNS": "160"}
    return subprocess.run(
        [*triage_command(), *args], capture_output=True, env=env, timeout=120, check=False
    )


def raw_controls(text: str, allowed: str = "\n") -> list[str]:
    return [c for c in text if (ord(c) < 32 and c not in allowed) or 0x7F <= ord(c) <= 0x9F]


@pytest.fixture(params=["csv", "parquet"])
def source(request: pytest.FixtureRequest, tmp_path: Path) -> Path:
    if request.param == "csv":
        return write_csv(tmp_path / "hoses.csv")
    return write_parquet(tmp_path / "hoses.parquet")


def test_rank_csv_keeps_keys_exactly_and_joins_with_the_source(source: Path) -> None:
    result = run("rank", str(source), "--format", "csv")
    assert result.returncode == 0, result.stderr
    ranked = pd.read_csv(io.BytesIO(result.stdout), dtype=str, keep_default_na=False)
    assert sorted(ranked["item"]) == sorted(IDS)
    assert set(ranked["location"]) == {LOCATION} and set(ranked["family"]) == {FAMILY}
    # The join a planner makes: every source row finds its series in the ranked list.
    original = rows().astype({"demand": str, "forecast": str})
    joined = original.merge(ranked, on=["item", "location"], how="left", indicator=True)
    assert (joined["_merge"] == "both").all() and len(joined) == len(original)
    # The notice still counts the cells, on standard error, without raw control characters.
    notes = result.stderr.decode("utf-8")
    assert "contain control characters" in notes and "kept exactly" in notes
    assert not raw_controls(notes)


def test_rank_json_keeps_keys_exactly(source: Path) -> None:
    result = run("rank", str(source), "--format", "json")
    assert result.returncode == 0, result.stderr
    text = result.stdout.decode("utf-8")
    # json escapes C0 itself; DEL and C1 are escaped too, so no raw control byte is printed.
    assert not raw_controls(text)
    series = json.loads(text)["series"]
    assert sorted(s["item"] for s in series) == sorted(IDS)
    assert {s["location"] for s in series} == {LOCATION}


def test_rank_table_and_check_show_visible_symbols(tmp_path: Path) -> None:
    path = write_csv(tmp_path / "hoses.csv")
    table = run("rank", str(path))
    assert table.returncode == 0, table.stderr
    text = table.stdout.decode("utf-8")
    assert not raw_controls(text + table.stderr.decode("utf-8"))
    for shown in ("TAB\u2409ID", "ESC\u241b[31mID", "NUL\u2400ID", "BIDI\ufffdDI", "CR\u240dID"):
        assert shown in text
    assert "LF\u240aID" in text and "DC\u24091" in text
    check = run("check", str(path))
    assert check.returncode == 0, check.stderr
    assert not raw_controls(check.stdout.decode("utf-8") + check.stderr.decode("utf-8"))


def test_messages_quoting_ids_show_symbols(tmp_path: Path) -> None:
    # Two rows for one series and period: the message names the series, on one line each.
    frame = rows()
    frame = pd.concat([frame, frame[frame["item"] == "LF\nID"].iloc[:1]])
    path = tmp_path / "twice.csv"
    frame.to_csv(path, index=False, quoting=csv.QUOTE_ALL)
    result = run("rank", str(path))
    assert result.returncode == 2
    message = result.stderr.decode("utf-8")
    assert "LF\u240aID @ DC\u24091 / 2025-01-06" in message
    assert not raw_controls(message) and "Traceback" not in message


def test_csv_and_json_on_a_terminal_show_symbols(tmp_path: Path) -> None:
    # Standard output that is a terminal is "shown": the same CSV, with visible symbols.
    path = write_csv(tmp_path / "hoses.csv")
    for fmt in ("csv", "json"):
        leader, follower = pty.openpty()
        env = {**os.environ, "COLUMNS": "160"}
        process = subprocess.Popen(
            [*triage_command(), "rank", str(path), "--format", fmt],
            stdout=follower,
            stderr=subprocess.PIPE,
            env=env,
        )
        os.close(follower)
        chunks = []
        while True:
            try:
                chunk = os.read(leader, 1 << 16)
            except OSError:  # the terminal closes when the process exits
                break
            if not chunk:
                break
            chunks.append(chunk)
        os.close(leader)
        assert process.wait(timeout=120) == 0
        assert process.stderr is not None
        process.stderr.close()
        shown = b"".join(chunks).decode("utf-8")
        # The terminal turns each line feed into CR LF (onlcr); nothing else is raw.
        assert not raw_controls(shown, allowed="\n\r"), fmt
        if fmt == "csv":
            assert "TAB\u2409ID" in shown and "ESC\u241b[31mID" in shown
            assert "NUL\u2400ID" in shown and "BIDI\ufffdDI" in shown
        else:
            assert "BIDI\ufffdDI" in shown
