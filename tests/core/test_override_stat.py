"""Overrides valued against the statistical forecast (``forecast_stat``), on constructed data.

Two weekly files of one review folder, numbers chosen by hand: week 1 adjusts three series,
week 2 has the actuals of the first two forward weeks. Each realised line is set against the
statistical forecast of its period as week 2's file holds it:

    value_added_vs_stat = |stat − actual| − |adjusted − actual|   (docs/history.md)

the forecast value added of the override over the statistical step (Gilliland 2010, The
Business Forecasting Deal; docs/sources.md §3.1). Every figure is checked against a plain loop
over the file's rows and the adjusted values below (``_plain``), not against the code's own
arrays.

===  =========  =========  ======  ======  ==============================================
key  forecast   adjusted   actual  stat    case
===  =========  =========  ======  ======  ==============================================
A    100        130        110     120     over-forecast override, stat closer: −10 each
B    100        70         90      50      under-forecast override, beat stat by 20 each
C    40         45         50      –/44    stat missing in the first week, 44 in the second
D    60         –          –       60      not adjusted
===  =========  =========  ======  ======  ==============================================
"""

from __future__ import annotations

import csv
import math
from datetime import date, timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from triage.core import history
from triage.core.cycle import ReviewCycle
from triage.core.errors import TriageError
from triage.core.ledger import FOLDER_LEDGER, Ledger
from triage.core.read import read_portfolio
from triage.core.review import ReviewSession
from triage.core.settings import ScoreSettings

WEEK1 = date(2026, 11, 2)
HISTORY = 6
FORWARD = 3
FORECAST = {"A": 100.0, "B": 100.0, "C": 40.0, "D": 60.0}
#: Week 1's adjustment per series: the adjusted value of every forward week.
ADJUSTED = {"A": 130.0, "B": 70.0, "C": 45.0}
#: Actual demand of the first two forward weeks (in week 2's file).
ACTUAL = {"A": 110.0, "B": 90.0, "C": 50.0, "D": 61.0}
#: The statistical forecast of the forward weeks; None = an empty cell.
STAT: dict[str, list[float | None]] = {
    "A": [120.0, 120.0, 120.0],
    "B": [50.0, 50.0, 50.0],
    "C": [None, 44.0, 44.0],
    "D": [60.0, 60.0, 60.0],
}
#: Unit price per series (the forward weeks' price is the week's number added, so value is
#: weighted by the period's own price).
PRICE = {"A": 2.0, "B": 3.0, "C": 10.0, "D": 1.0}


def _weeks() -> list[date]:
    first = WEEK1 - timedelta(weeks=HISTORY - 1)
    return [first + timedelta(weeks=k) for k in range(HISTORY + FORWARD + 1)]


def _price(item: str, k: int) -> float:
    return PRICE[item] + k


def _write(path: Path, last: int, *, stat: bool, priced: bool) -> None:
    """One weekly file: actuals up to week index ``last``."""
    weeks = _weeks()
    header = ["item", "location", "period", "demand", "forecast"]
    header += ["forecast_stat"] if stat else []
    header += ["price"] if priced else []
    with path.open("w", encoding="utf-8", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(header)
        for item, level in FORECAST.items():
            for k, week in enumerate(weeks[: last + 1 + FORWARD]):
                forward = k - HISTORY  # 0 = the first forward week of week 1
                if k < HISTORY:
                    demand: object = level - 5 + k
                elif k <= last:
                    demand = ACTUAL[item]
                else:
                    demand = ""
                row: list[object] = [item, "Lyon", week.isoformat(), demand, level]
                if stat:
                    value = STAT[item][forward] if 0 <= forward < FORWARD else level + 1
                    row.append("" if value is None else value)
                if priced:
                    row.append(_price(item, k))
                writer.writerow(row)


def _folder(tmp_path: Path, *, stat: bool, priced: bool) -> Path:
    """Week 1 reviewed (three adjustments over all forward weeks); week 2's file path."""
    folder = tmp_path / "review"
    folder.mkdir(parents=True)
    week1, week2 = folder / "week1.csv", folder / "week2.csv"
    _write(week1, HISTORY - 1, stat=stat, priced=priced)
    _write(week2, HISTORY + 1, stat=stat, priced=priced)
    with Ledger.open(folder / FOLDER_LEDGER) as ledger:
        session = ReviewSession(ReviewCycle(read_portfolio(week1), ledger), reviewer="ana")
        for item, value in ADJUSTED.items():
            series = session.find(item, "Lyon")
            assert series is not None
            event = session.commit_decision(
                series, outcome="adjusted", root_cause="promotion", adjustment=f"={value:g}"
            )
            session.apply_event(event)
    return week2


def _plain(path: Path) -> list[dict[str, object]]:
    """Per realised line, by a plain loop over the file's rows: the stat value, its error, and
    what the override beat it by (None where the stat cell is empty)."""
    out = []
    with path.open(encoding="utf-8", newline="") as handle:
        for row in csv.DictReader(handle):
            item = row["item"]
            if item not in ADJUSTED or row["demand"] == "" or row["period"] <= WEEK1.isoformat():
                continue
            actual = float(row["demand"])
            adjusted = ADJUSTED[item]
            stat = None if row.get("forecast_stat", "") == "" else float(row["forecast_stat"])
            beat = None if stat is None else abs(stat - actual) - abs(adjusted - actual)
            price = float(row["price"]) if "price" in row else None
            out.append(
                {
                    "item": item,
                    "period": row["period"],
                    "stat": stat,
                    "abs_error_stat": None if stat is None else abs(stat - actual),
                    "beat": beat,
                    "beat_value": None if beat is None or price is None else beat * price,
                    "direction": "up" if adjusted > FORECAST[item] else "down",
                }
            )
    return out


def _realised(week2: Path) -> pd.DataFrame:
    with Ledger.open(week2.parent / FOLDER_LEDGER, read_only=True) as ledger:
        return ReviewCycle(read_portfolio(week2), ledger).realised


def _same(got: float, want: float | None) -> bool:
    if want is None:
        return math.isnan(got)
    return math.isclose(got, want, rel_tol=1e-12, abs_tol=1e-9)


@pytest.mark.parametrize("priced", [False, True], ids=["units", "priced"])
def test_each_line_against_the_stat_forecast_equals_a_plain_loop(
    tmp_path: Path, priced: bool
) -> None:
    week2 = _folder(tmp_path, stat=True, priced=priced)
    realised = _realised(week2)
    expected = _plain(week2)
    assert len(realised) == len(expected) == 6
    got = {(r["item"], r["period"]): r for r in realised.to_dict("records")}
    for line in expected:
        row = got[(line["item"], line["period"])]
        assert _same(row["stat"], line["stat"])  # type: ignore[arg-type]
        assert _same(row["abs_error_stat"], line["abs_error_stat"])  # type: ignore[arg-type]
        assert _same(row["value_added_vs_stat"], line["beat"])  # type: ignore[arg-type]
        assert _same(row["value_added_vs_stat_value"], line["beat_value"])  # type: ignore[arg-type]
    # The hand-worked table of the module docstring: A over-forecast (stat closer by 10),
    # B under-forecast (beat stat by 20), C's first week without a stat value.
    beat = realised.set_index(["item", "period"])["value_added_vs_stat"]
    assert beat.loc["A"].tolist() == [-10.0, -10.0]
    assert beat.loc["B"].tolist() == [20.0, 20.0]
    assert math.isnan(beat.loc["C"].iloc[0]) and beat.loc["C"].iloc[1] == 6.0 - 5.0


@pytest.mark.parametrize("priced", [False, True], ids=["units", "priced"])
@pytest.mark.parametrize("by", ["direction", "cycle", "reviewer"])
def test_summaries_sum_the_lines_that_have_a_stat_value(
    tmp_path: Path, priced: bool, by: str
) -> None:
    week2 = _folder(tmp_path, stat=True, priced=priced)
    summary = history.summarise(_realised(week2), by).set_index(by)
    expected = _plain(week2)
    groups = {
        "direction": lambda line: line["direction"],
        "cycle": lambda line: WEEK1.isoformat(),
        "reviewer": lambda line: "ana",
    }[by]
    for group in [*{groups(line) for line in expected}, history.ALL]:
        lines = [ln for ln in expected if group == history.ALL or groups(ln) == group]
        compared = [ln for ln in lines if ln["stat"] is not None]
        row = summary.loc[group]
        assert row["stat_adjustments"] == len(compared)
        assert row["adjustments"] == len(lines)  # every line still counts where it did
        assert _same(row["abs_error_stat"], sum(ln["abs_error_stat"] for ln in compared))  # type: ignore[misc]
        assert _same(row["value_added_vs_stat"], sum(ln["beat"] for ln in compared))  # type: ignore[misc]
        value = sum(ln["beat_value"] for ln in compared) if priced else None  # type: ignore[misc]
        assert _same(row["value_added_vs_stat_value"], value)
    # Over every line: A 2 × −10, B 2 × +20, C's second week +1 (its first has no stat).
    assert summary.loc[history.ALL, "value_added_vs_stat"] == 21.0
    assert summary.loc[history.ALL, "stat_adjustments"] == 5


def test_without_a_stat_column_the_lines_and_summaries_are_as_before(tmp_path: Path) -> None:
    week2 = _folder(tmp_path, stat=False, priced=True)
    realised = _realised(week2)
    assert realised[["stat", "abs_error_stat", "value_added_vs_stat"]].isna().all().all()
    summary = history.summarise(realised, "direction")
    assert (summary["stat_adjustments"] == 0).all()
    assert (
        summary[["abs_error_stat", "value_added_vs_stat", "value_added_vs_stat_value"]]
        .isna()
        .all()
        .all()
    )
    # The figures that existed before do not depend on a stat column.
    with_stat = history.summarise(
        _realised(_folder(tmp_path / "b", stat=True, priced=True)), "direction"
    )
    before = [c for c in history.SUMMARY_COLUMNS if c not in history.STAT_COLUMNS]
    pd.testing.assert_frame_equal(summary[before], with_stat[before])


def test_the_stat_name_setting_picks_another_competing_forecast(tmp_path: Path) -> None:
    week2 = _folder(tmp_path, stat=True, priced=False)
    # The same numbers under another name: forecast_engine.
    renamed = week2.with_name("renamed.csv")
    renamed.write_text(week2.read_text().replace("forecast_stat", "forecast_engine"))
    portfolio = read_portfolio(renamed)
    with Ledger.open(week2.parent / FOLDER_LEDGER, read_only=True) as ledger:
        default = ReviewCycle(portfolio, ledger)
        assert default.stat is None and default.realised["stat"].isna().all()
        named = ReviewCycle(portfolio, ledger, ScoreSettings(stat_name="engine"))
        assert named.stat is not None
        original = ReviewCycle(read_portfolio(week2), ledger).realised
        np.testing.assert_array_equal(
            named.realised["value_added_vs_stat"].to_numpy(),
            original["value_added_vs_stat"].to_numpy(),
        )
    with pytest.raises(TriageError, match="forecast_stat") as caught:
        history.stat_forecast(portfolio, "stat", required=True)
    assert "forecast_engine" in (caught.value.hint or "")


def test_stat_name_written_as_the_column_gets_the_name_to_write() -> None:
    """`--stat-name forecast_stat` names the column, not the forecast: the hint says what to
    write (docs/history.md, "Against the statistical forecast")."""
    from triage.core.read import read_portfolio

    sample = read_portfolio(Path(__file__).resolve().parents[2] / "sample" / "portfolio.csv")
    with pytest.raises(TriageError, match="Write --stat-name stat for the column forecast_stat"):
        history.stat_forecast(sample, "forecast_stat", required=True)
