"""``group_decision`` has one type in every file of an export: the ledger's id as a number.

The ledger's ``group_decision.id`` is an INTEGER (docs/ledger.md, "Group decisions"). Written
as text, the workbook kept a text cell while a CSV reader (and a spreadsheet opening the CSV)
read the quoted digits back as a number, so the two tables of one export disagreed once read.
The rule (docs/export.md): a number everywhere, empty where there is none. Each check below
reads the files back the way a planner's tools do: Python's ``csv`` with ``QUOTE_NONNUMERIC``
(only unquoted fields become numbers; Python docs, ``csv.QUOTE_NONNUMERIC``), openpyxl's cell
values, pandas ``read_csv`` / ``read_excel``, and ``json``.

Week 1 of ``tests/core/twoweeks.py``: a group decision over A, B, C at Lyon (``1-2: =340``,
split in proportion to their forecasts), and D decided alone.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import openpyxl
import pandas as pd
import pytest

from tests.core.twoweeks import write_two_weeks
from triage.core.cycle import ReviewCycle
from triage.core.ledger import Ledger
from triage.core.read import read_portfolio
from triage.core.review import ReviewSession
from triage.render.export import export_review

GROUPED = ("A", "B", "C")


@pytest.fixture
def exported(tmp_path: Path) -> tuple[Path, int]:
    weeks = write_two_weeks(tmp_path)
    with Ledger.open(tmp_path / "g.ledger.sqlite") as ledger:
        session = ReviewSession(ReviewCycle(read_portfolio(weeks.week1), ledger), reviewer="ana")
        members = [session.find(item, "Lyon") for item in GROUPED]
        record = session.commit_group_decision(
            [m for m in members if m is not None],
            by=("location",),
            key_values=("Lyon",),
            outcome="adjusted",
            root_cause="promotion",
            spec="1-2: =340",
        )
        alone = session.find("D", "Lyon")
        assert alone is not None
        session.commit_decision(
            alone, outcome="adjusted", root_cause="promotion", adjustment="1: =5"
        )
        cycle = ReviewCycle(read_portfolio(weeks.week1), ledger)
        for name in ("up.csv", "up.xlsx", "up.json"):
            export_review(cycle, tmp_path / name)
    return tmp_path, record.id


def _expected(rows: list[dict[str, object]], gid: object, none: object) -> list[object]:
    """What each row's group_decision must be: the id on the group's adjusted rows."""
    out = []
    for row in rows:
        grouped = row["item"] in GROUPED
        if "period" in row:  # a forecast row: only the periods the group adjusted
            grouped = grouped and row["adjusted"] in (True, "true")
        out.append(gid if grouped else none)
    return out


def test_csv_writes_the_id_as_a_number_and_nothing_where_none(exported: tuple[Path, int]) -> None:
    folder, gid = exported
    for table in ("decisions", "forecast"):
        with (folder / "up" / f"up-{table}.csv").open(encoding="utf-8", newline="") as handle:
            rows = list(csv.DictReader(handle, quoting=csv.QUOTE_NONNUMERIC))
        got = [r["group_decision"] for r in rows]
        # Unquoted -> float; the empty quoted field stays "" (a missing number, as value_change).
        assert got == _expected(rows, float(gid), ""), table
        read = pd.read_csv(folder / "up" / f"up-{table}.csv")["group_decision"]
        assert read.dtype.kind == "f", table
        assert read.fillna(0).tolist() == _expected(rows, gid, 0), table


def test_xlsx_cells_are_numbers_or_empty(exported: tuple[Path, int]) -> None:
    folder, gid = exported
    book = openpyxl.load_workbook(folder / "up.xlsx")
    for title in ("Decisions", "Forecast"):
        head, *body = list(book[title].iter_rows(values_only=True))
        rows = [dict(zip(head, row, strict=False)) for row in body]
        got = [r.get("group_decision") for r in rows]
        assert got == _expected(rows, gid, None), title
        assert all(isinstance(v, int) for v in got if v is not None), title
        read = pd.read_excel(folder / "up.xlsx", sheet_name=title)["group_decision"]
        assert read.dtype.kind == "f", title


def test_json_writes_a_number_or_null(exported: tuple[Path, int]) -> None:
    folder, gid = exported
    doc = json.loads((folder / "up.json").read_text(encoding="utf-8"))
    for table in ("decisions", "forecast"):
        rows = doc[table]
        got = [r["group_decision"] for r in rows]
        assert got == _expected(rows, gid, None), table
        assert all(type(v) is int for v in got if v is not None), table
