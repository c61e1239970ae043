"""Two weekly portfolio files in one review folder, with numbers chosen by hand.

Week 1's file has actual demand up to ``WEEK1`` and four forward weeks; week 2's file has one
more week of actuals (up to ``WEEK2``) and the forward weeks rolled on by one. Forecasts are
whole numbers so every adjusted value is exact:

=====  ============================================  ==============================================
key    week 1 forward forecast (11-09 .. 11-30)      week 2 forward forecast (11-16 .. 12-07)
=====  ============================================  ==============================================
A      100 each week                                 100 each week (the statistical forecast again)
B      40 each week                                  50, 50, 50, 40 (week 1's ``=50`` was uploaded)
C      30 each week                                  30 each week
D      200 each week                                 200 each week
=====  ============================================  ==============================================

Every series has eight weeks of history with demand 20 below its forecast's level, so all four
are scored; the location column is ``Lyon`` for all.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from datetime import date, timedelta
from pathlib import Path

#: Latest actual week of each file (its review cycle), Mondays.
WEEK1 = "2026-11-02"
WEEK2 = "2026-11-09"
HISTORY_WEEKS = 8
FORWARD_WEEKS = 4
LEVEL = {"A": 100.0, "B": 40.0, "C": 30.0, "D": 200.0}
#: Week 2's forward forecast where it differs from the level.
WEEK2_FORWARD = {"B": [50.0, 50.0, 50.0, 40.0]}


@dataclass(frozen=True)
class TwoWeeks:
    """The two files and the dates their forward periods start on."""

    week1: Path
    week2: Path
    forward1: tuple[str, ...]
    forward2: tuple[str, ...]


def _mondays(last_actual: str, history: int, forward: int) -> list[str]:
    end = date.fromisoformat(last_actual)
    assert end.weekday() == 0
    first = end - timedelta(weeks=history - 1)
    return [(first + timedelta(weeks=k)).isoformat() for k in range(history + forward)]


def _write(path: Path, last_actual: str, history: int, forward_values: dict[str, list]) -> None:
    weeks = _mondays(last_actual, history, FORWARD_WEEKS)
    with path.open("w", encoding="utf-8", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(["item", "location", "period", "demand", "forecast"])
        for item, level in LEVEL.items():
            for k, week in enumerate(weeks):
                if k < history:
                    # Over-forecast by 20 units, alternating +/-3 so the series are not flat.
                    demand = level - 20 + (3 if k % 2 else -3)
                    writer.writerow([item, "Lyon", week, f"{demand:g}", f"{level:g}"])
                else:
                    value = forward_values.get(item, [level] * FORWARD_WEEKS)[k - history]
                    writer.writerow([item, "Lyon", week, "", f"{value:g}"])


def write_two_weeks(folder: Path) -> TwoWeeks:
    """Write ``erp_2026-w1.csv`` and ``erp_2026-w2.csv`` into ``folder``."""
    folder.mkdir(parents=True, exist_ok=True)
    week1 = folder / "erp_2026-w1.csv"
    week2 = folder / "erp_2026-w2.csv"
    _write(week1, WEEK1, HISTORY_WEEKS, {})
    _write(week2, WEEK2, HISTORY_WEEKS + 1, WEEK2_FORWARD)
    forward1 = tuple(_mondays(WEEK1, HISTORY_WEEKS, FORWARD_WEEKS)[HISTORY_WEEKS:])
    forward2 = tuple(_mondays(WEEK2, HISTORY_WEEKS + 1, FORWARD_WEEKS)[HISTORY_WEEKS + 1 :])
    return TwoWeeks(week1, week2, forward1, forward2)
