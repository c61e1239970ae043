"""``adjusted`` in an export is true only where the exported value differs from the forecast.

A decision's adjustment can leave a period as it was: a percentage of a zero forecast, ``use
NAME`` where the other forecast agrees, ``=N`` with the forecast's own value. The ledger keeps
such lines (they are what was decided), but an upload reading ``adjusted=true`` would take the
period for a change. The rule (docs/export.md, "The forecast table"): compare the values as the
export writes them, the adjusted value at the export's precision against the file's forecast,
exactly. The expected cells below are worked by hand from the file written here and the
adjustment rules of docs/adjustments.md (``+10%`` of 0 is 0, of 5 is 5.5; ``use stat`` takes
stat's value).
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import openpyxl
import pytest

from triage.core.cycle import ReviewCycle
from triage.core.export import review_tables
from triage.core.ledger import Ledger
from triage.core.read import read_portfolio
from triage.core.review import ReviewSession
from triage.render.export import export_review

HISTORY = ["2026-10-05", "2026-10-12", "2026-10-19", "2026-10-26"]
FORWARD = ["2026-11-02", "2026-11-09", "2026-11-16"]

# item -> (forward forecast, forward forecast_stat, adjustment)
SERIES = {
    "PCT": ([0, 5, 0], [1, 1, 1], "+10%"),
    "USE": ([10, 20, 30], [10, 25, 30], "use stat"),
    "SET": ([10, 12.5, 30], [1, 1, 1], "2: =12.5"),
    "TENTH": ([10.4, 20, 30], [1, 1, 1], "1: =10.4"),
}
# (item, period) -> whether the exported value differs from the forecast, by hand.
CHANGED = {
    ("PCT", FORWARD[1]),  # 5 -> 5.5; 0 -> 0 twice
    ("USE", FORWARD[1]),  # 20 -> 25; 10 and 30 agree with stat
}


@pytest.fixture
def cycle(tmp_path: Path) -> ReviewCycle:
    rows = ["item,period,demand,forecast,forecast_stat"]
    for item, (forecast, stat, _) in SERIES.items():
        rows += [f"{item},{p},10,11,11" for p in HISTORY]
        rows += [f"{item},{p},,{f},{s}" for p, f, s in zip(FORWARD, forecast, stat, strict=True)]
    path = tmp_path / "week.csv"
    path.write_text("\n".join(rows) + "\n", encoding="utf-8")
    ledger = Ledger.open(tmp_path / "week.ledger.sqlite")
    session = ReviewSession(ReviewCycle(read_portfolio(path), ledger), reviewer="ana")
    for item, (_, _, spec) in SERIES.items():
        series = session.find(item)
        assert series is not None
        session.commit_decision(series, outcome="adjusted", root_cause="promotion", adjustment=spec)
    return ReviewCycle(read_portfolio(path), ledger)


def _flags(rows: list[dict[str, object]]) -> dict[tuple[str, str], object]:
    return {(str(r["item"]), str(r["period"])[:10]): r["adjusted"] for r in rows}


def test_only_periods_whose_value_changes_are_marked(cycle: ReviewCycle) -> None:
    tables = review_tables(cycle)
    forecast = tables.forecast
    flags = {
        (i, p): bool(a)
        for i, p, a in forecast[["item", "period", "adjusted"]].itertuples(index=False)
    }
    assert {k for k, v in flags.items() if v} == CHANGED
    # Where it is not marked, nothing else names a decision either.
    quiet = forecast.loc[~forecast["adjusted"].to_numpy(dtype=bool)]
    assert set(quiet["adjusted_in_cycle"].astype(str)) == {""}
    assert (quiet["adjusted_forecast"] == quiet["forecast"]).all()
    assert tables.adjusted_periods == len(CHANGED)
    assert any("not marked adjusted" in w for w in tables.warnings)
    # The decisions themselves stay in the export as decided.
    assert set(tables.decisions["adjustment"]) == {"+10%", "use stat", "2: =12.5", "1: =10.4"}


def test_the_comparison_is_on_the_exported_values(cycle: ReviewCycle) -> None:
    # "=10.4" on a forecast of 10.4 exported in whole units writes 10: the upload changes the
    # period, so it is marked (docs/export.md, "Precision").
    tables = review_tables(cycle, rounding=0)
    forecast = tables.forecast.set_index(["item", "period"])
    assert forecast.loc[("TENTH", FORWARD[0]), "adjusted_forecast"] == 10
    assert bool(forecast.loc[("TENTH", FORWARD[0]), "adjusted"])
    # "=12.5" on 12.5 is 13 in whole units, also a change; a percentage of 0 is still 0.
    assert forecast.loc[("SET", FORWARD[1]), "adjusted_forecast"] == 13
    assert bool(forecast.loc[("SET", FORWARD[1]), "adjusted"])
    assert not bool(forecast.loc[("PCT", FORWARD[0]), "adjusted"])
    assert tables.adjusted_periods == len(CHANGED) + 2


def test_csv_xlsx_and_json_agree(cycle: ReviewCycle, tmp_path: Path) -> None:
    export_review(cycle, tmp_path / "up.csv")
    export_review(cycle, tmp_path / "up.xlsx")
    export_review(cycle, tmp_path / "up.json")
    with (tmp_path / "up" / "up-forecast.csv").open(encoding="utf-8", newline="") as handle:
        in_csv = _flags(list(csv.DictReader(handle)))
    assert {k for k, v in in_csv.items() if v == "true"} == CHANGED
    assert set(in_csv.values()) == {"true", "false"}
    sheet = openpyxl.load_workbook(tmp_path / "up.xlsx")["Forecast"]
    head, *body = list(sheet.iter_rows(values_only=True))
    in_xlsx = _flags([dict(zip(head, row, strict=True)) for row in body])
    assert {k for k, v in in_xlsx.items() if v is True} == CHANGED
    doc = json.loads((tmp_path / "up.json").read_text(encoding="utf-8"))
    in_json = _flags(doc["forecast"])
    assert {k for k, v in in_json.items() if v is True} == CHANGED
    assert len(in_csv) == len(in_xlsx) == len(in_json) == len(SERIES) * len(FORWARD)


def test_wide_layout_counts_changed_periods_only(cycle: ReviewCycle, tmp_path: Path) -> None:
    export_review(cycle, tmp_path / "wide.json", layout="wide")
    doc = json.loads((tmp_path / "wide.json").read_text(encoding="utf-8"))
    counts = {r["item"]: r["adjusted_periods"] for r in doc["forecast"]}
    assert counts == {"PCT": 1, "SET": 0, "TENTH": 0, "USE": 1}


def test_a_carried_value_equal_at_the_export_precision_is_not_marked(tmp_path: Path) -> None:
    # tests/core/twoweeks.py: A's forward forecast is 100 in both weeks. Week 1 sets periods
    # 2-3 to 100.4; week 2's file (whole numbers, so --round file is 0 decimals) still says
    # 100 there. 100.4 is 0.4 from 100, beyond the "already in the forecast" tolerance of
    # docs/history.md (0.005), but the export writes round(100.4) = 100: the value the file
    # already has, so it is not marked and the warning says it is already in the forecast.
    from tests.core.twoweeks import write_two_weeks

    weeks = write_two_weeks(tmp_path)
    with Ledger.open(tmp_path / "w.ledger.sqlite") as ledger:
        session = ReviewSession(ReviewCycle(read_portfolio(weeks.week1), ledger), reviewer="ana")
        series = session.find("A", "Lyon")
        assert series is not None
        session.commit_decision(
            series, outcome="adjusted", root_cause="promotion", adjustment="2-3: =100.4"
        )
        tables = review_tables(ReviewCycle(read_portfolio(weeks.week2), ledger))
        one_decimal = review_tables(ReviewCycle(read_portfolio(weeks.week2), ledger), rounding=1)
    rows = tables.forecast[tables.forecast["item"] == "A"]
    assert rows["adjusted_forecast"].tolist() == [100.0] * 4
    assert not rows["adjusted"].to_numpy(dtype=bool).any()
    assert tables.carried_periods == 0
    assert any("already in" in w for w in tables.warnings)
    # At one decimal the export writes 100.4: carried and marked.
    rows = one_decimal.forecast[one_decimal.forecast["item"] == "A"]
    assert rows["adjusted"].tolist() == [True, True, False, False]
    assert rows["adjusted_forecast"].tolist() == [100.4, 100.4, 100.0, 100.0]
