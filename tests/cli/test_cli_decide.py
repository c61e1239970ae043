"""``triage decide PORTFOLIO --from FILE``: a batch of decisions from a spreadsheet, all or none.

Run as a user would, in a child process. The two weekly files of ``tests/core/twoweeks.py``
(four series A-D at Lyon, whole-number forecasts) give hand-checked adjusted values.
"""

from __future__ import annotations

import csv
from pathlib import Path

import pytest

from tests.cli.test_cli import run
from tests.core.twoweeks import TwoWeeks, write_two_weeks
from triage.core.cycle import ReviewCycle
from triage.core.ledger import FOLDER_LEDGER, Ledger
from triage.core.read import read_portfolio
from triage.core.review import ReviewSession


@pytest.fixture
def weeks(tmp_path: Path) -> TwoWeeks:
    return write_two_weeks(tmp_path / "review")


def write_batch(path: Path, rows: list[list[str]], header: list[str] | None = None) -> Path:
    with path.open("w", encoding="utf-8", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(
            header or ["item", "location", "outcome", "root_cause", "adjustment", "note"]
        )
        writer.writerows(rows)
    return path


def events(ledger: Path) -> list:
    with Ledger.open(ledger, read_only=True) as opened:
        return opened.history()


def test_a_good_batch_is_recorded_through_the_screens_path(weeks: TwoWeeks, tmp_path: Path) -> None:
    batch = write_batch(
        tmp_path / "batch.csv",
        [
            ["A", "Lyon", "adjusted", "Promotion or event", "+10%", "promo\nwith two lines"],
            ["B", "Lyon", "No change needed", "", "", ""],
            ["C", "Lyon", "handed_off", "stock_out", "", "to supply"],
        ],
    )
    result = run(
        "decide", str(weeks.week1), "--from", str(batch), "--reviewer", "ana", cwd=tmp_path
    )
    assert result.returncode == 0, result.stderr
    assert "recorded 3 decisions" in result.stdout and "advisory" in result.stdout
    saved = events(weeks.week1.parent / FOLDER_LEDGER)
    assert [(e.item, e.outcome, e.root_cause, e.note, e.reviewer) for e in saved] == [
        ("A", "adjusted", "promotion", "promo\nwith two lines", "ana"),
        ("B", "no_change", "unknown", "", "ana"),
        ("C", "handed_off", "stock_out", "to supply", "ana"),
    ]
    # A's forward forecast is 100 a week (by hand, tests/core/twoweeks.py): +10% is 110 in each
    # of the four weeks.
    assert [line.adjusted for line in saved[0].lines] == pytest.approx([110.0] * 4)
    assert saved[0].adjustment == "+10%"


def test_a_batch_with_bad_rows_writes_nothing_and_names_every_row(
    weeks: TwoWeeks, tmp_path: Path
) -> None:
    batch = write_batch(
        tmp_path / "batch.csv",
        [
            ["A", "Lyon", "adjusted", "promotion", "+10%", ""],  # fine
            ["Z", "Lyon", "no_change", "", "", ""],  # no such series
            ["B", "Lyon", "maybe", "", "", ""],  # unknown outcome
            ["C", "Lyon", "adjusted", "", "", ""],  # adjusted without an adjustment
            ["D", "Lyon", "adjusted", "", "1,200", ""],  # ambiguous number
            ["A", "Lyon", "no_change", "", "", ""],  # A twice
        ],
    )
    result = run("decide", str(weeks.week1), "--from", str(batch), cwd=tmp_path)
    assert result.returncode == 2
    assert "Traceback" not in result.stderr
    err = result.stderr
    assert "5 of 6 rows cannot be recorded; nothing was written" in err
    for row, words in [
        (3, "is not in the portfolio"),
        (4, "outcome 'maybe'"),
        (5, "needs an adjustment"),
        (6, "ambiguous"),
        (7, "the same series as row 2"),
    ]:
        assert f"row {row}: " in err and words in err, (row, words, err)
    assert not (weeks.week1.parent / FOLDER_LEDGER).exists()  # not even an empty ledger
    cause = write_batch(tmp_path / "cause.csv", [["D", "Lyon", "no_change", "recall", "", ""]])
    result = run("decide", str(weeks.week1), "--from", str(cause), cwd=tmp_path)
    assert (
        result.returncode == 2 and "row 2: root cause 'recall' is not in the list" in result.stderr
    )


def test_replacing_another_reviewers_decision_needs_replace(
    weeks: TwoWeeks, tmp_path: Path
) -> None:
    ledger = weeks.week1.parent / FOLDER_LEDGER
    with Ledger.open(ledger) as opened:
        session = ReviewSession(ReviewCycle(read_portfolio(weeks.week1), opened), reviewer="bob")
        series = session.find("A", "Lyon")
        assert series is not None
        session.commit_decision(series, outcome="deferred", root_cause="unknown")
    batch = write_batch(tmp_path / "batch.csv", [["A", "Lyon", "no_change", "", "", ""]])
    refused = run(
        "decide", str(weeks.week1), "--from", str(batch), "--reviewer", "ana", cwd=tmp_path
    )
    assert refused.returncode == 2 and "would replace the decision 'bob'" in refused.stderr
    assert len(events(ledger)) == 1
    done = run(
        "decide",
        str(weeks.week1),
        "--from",
        str(batch),
        "--reviewer",
        "ana",
        "--replace",
        cwd=tmp_path,
    )
    assert done.returncode == 0, done.stderr
    assert "1 replaced another reviewer's decision" in done.stdout
    assert [e.reviewer for e in events(ledger)] == ["bob", "ana"]


def test_a_workbook_batch(weeks: TwoWeeks, tmp_path: Path) -> None:
    from openpyxl import Workbook

    book = Workbook()
    sheet = book.active
    sheet.append(["Item", "Location", "Outcome", "Adjustment", "Note"])
    sheet.append(["D", "Lyon", "adjusted", "1-2: =250", "from the sheet"])
    path = tmp_path / "batch.xlsx"
    book.save(path)
    result = run("decide", str(weeks.week1), "--from", str(path), "--reviewer", "ana", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    (event,) = events(weeks.week1.parent / FOLDER_LEDGER)
    assert (event.item, event.adjustment, event.note) == ("D", "1-2: =250", "from the sheet")
    assert [line.adjusted for line in event.lines] == [250.0, 250.0]


def test_a_batch_may_take_another_forecast_with_use(tmp_path: Path) -> None:
    # The committed sample has forecast_stat and forecast_customer. Expected lines are read from
    # the file's own rows here (the forward rows are the ones without demand), not by triage.
    sample = Path(__file__).resolve().parents[2] / "sample" / "portfolio.csv"
    folder = tmp_path / "review"
    folder.mkdir()
    week = folder / "week.csv"
    week.write_bytes(sample.read_bytes())
    with sample.open(encoding="utf-8", newline="") as handle:
        forward = [
            row
            for row in csv.DictReader(handle)
            if (row["item"], row["location"]) == ("GF-10010", "NTH") and row["demand"] == ""
        ]
    assert len(forward) == 13 and forward[9]["forecast_customer"] == ""  # a gap at period 10

    bad = write_batch(
        tmp_path / "bad.csv",
        [
            ["GF-10010", "NTH", "adjusted", "model_miss", "use sales", ""],
            ["00412", "NTH", "adjusted", "model_miss", "1-2: use naive", ""],
        ],
    )
    refused = run("decide", str(week), "--from", str(bad), "--reviewer", "ana", cwd=tmp_path)
    assert refused.returncode == 2 and "Traceback" not in refused.stderr
    err = refused.stderr
    assert "row 2: adjustment 'use sales': this file has no forecast 'sales'" in err
    assert "its other forecasts are: stat, customer" in err
    assert "row 3: adjustment '1-2: use naive'" in err and "write mean 1" in err
    assert not (folder / FOLDER_LEDGER).exists()

    good = write_batch(
        tmp_path / "good.csv",
        [
            ["GF-10010", "NTH", "adjusted", "model_miss", "8-: USE customer", "their plan"],
            ["00412", "NTH", "adjusted", "model_miss", "1-2: use stat", ""],
        ],
    )
    done = run("decide", str(week), "--from", str(good), "--reviewer", "ana", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    saved = events(folder / FOLDER_LEDGER)
    assert [(e.item, e.location, e.adjustment) for e in saved] == [
        ("GF-10010", "NTH", "8-: use customer"),
        ("00412", "NTH", "1-2: use stat"),
    ]
    # Periods 8-13 take the customer's forecast; period 10 has none, so it keeps the original.
    expected = [float(row["forecast_customer"] or row["forecast"]) for row in forward[7:]]
    assert [line.adjusted for line in saved[0].lines] == pytest.approx(expected)
    assert [line.original for line in saved[0].lines] == pytest.approx(
        [float(row["forecast"]) for row in forward[7:]]
    )
    assert [line.period for line in saved[0].lines] == [row["period"] for row in forward[7:]]
    assert len(saved[1].lines) == 2
