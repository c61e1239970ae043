"""QA of the competing-forecast commands on small invented files, as a planner runs them.

Every figure checked here is worked out by hand beside the check, from the formula its page in
``docs/`` states (docs/metrics.md, "Comparing forecasts"; docs/history.md, "Realised value of
an override" and "Against the statistical forecast").
"""

from __future__ import annotations

import os
import subprocess
from pathlib import Path

import pytest

from tests.cli.test_cli_report import triage_command

#: Two series, two weeks of history and three forward weeks, a statistical and a customer
#: forecast; prices 2 (A, a third week at 3) and 0 (B). Invented.
WEEK_1 = """item,location,period,demand,forecast,forecast_stat,forecast_alt,price
A,X,2026-01-05,10,12,9,11,2
A,X,2026-01-12,20,18,15,19,2
A,X,2026-01-19,,100,90,95,2
A,X,2026-01-26,,95,,80,3
A,X,2026-02-02,,90,85,88,2
B,X,2026-01-05,5,5,5,5,0
B,X,2026-01-12,6,6,6,6,0
B,X,2026-01-19,,10,8,7,0
B,X,2026-01-26,,10,8,7,0
B,X,2026-02-02,,10,8,7,0
"""
#: The next file: the actuals of 2026-01-19 and 2026-01-26 have arrived.
WEEK_3 = (
    WEEK_1.replace("A,X,2026-01-19,,", "A,X,2026-01-19,92,")
    .replace("A,X,2026-01-26,,", "A,X,2026-01-26,70,")
    .replace("B,X,2026-01-19,,", "B,X,2026-01-19,9,")
    .replace("B,X,2026-01-26,,", "B,X,2026-01-26,7,")
)
#: A: 100, 95 -> 90, 85; B: 10, 10, 10 -> 7, 7, 7 (the alt forecast).
DECISIONS = "item,location,outcome,adjustment\nA,X,adjusted,1-2: -10\nB,X,adjusted,use alt\n"


def run(*args: str, cwd: Path, columns: int = 200) -> subprocess.CompletedProcess[str]:
    env = {
        **os.environ,
        "COLUMNS": str(columns),
        "XDG_CONFIG_HOME": str(cwd),
        "XDG_DATA_HOME": str(cwd),
    }
    return subprocess.run(
        [*triage_command(), *args], capture_output=True, text=True, cwd=cwd, env=env, timeout=180
    )


@pytest.fixture(scope="module")
def overridden(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A folder with the two weekly files and a ledger holding the two decisions of week 1."""
    folder = tmp_path_factory.mktemp("weeks")
    (folder / "w1.csv").write_text(WEEK_1, encoding="utf-8")
    (folder / "w3.csv").write_text(WEEK_3, encoding="utf-8")
    (folder / "batch.csv").write_text(DECISIONS, encoding="utf-8")
    done = run("decide", "w1.csv", "--from", "batch.csv", "--reviewer", "qa", cwd=folder)
    assert done.returncode == 0, done.stderr
    return folder


@pytest.mark.parametrize("columns", [100, 120, 140])
def test_overrides_table_never_cuts_a_figure_or_drops_the_rows_labels(
    overridden: Path, columns: int
) -> None:
    # docs/history.md: error removed = |original - actual| - |adjusted - actual|.
    # A 2026-01-19: |100-92| - |90-92| = 6 (value x2 = 12); 2026-01-26: 25 - 15 = 10 (x3 = 30).
    # B 2026-01-19: |10-9| - |7-9| = -1; 2026-01-26: 3 - 0 = 3 (price 0). Bands (|adj-orig| /
    # |orig|): A 10% -> 10-20%, B 30% -> 20-50%. AvgRelMAE (Davydenko & Fildes 2013, weighted
    # geometric mean of MAE ratios, weights = periods): A 8.5/16.5, B 1/2 ->
    # sqrt(0.51515 x 0.5) = 0.508.
    result = run("overrides", "w3.csv", "--by", "size", cwd=overridden, columns=columns)
    assert result.returncode == 0, result.stderr
    lines = result.stdout.splitlines()
    breakdown, against = result.stdout.split("against the statistical forecast (forecast_stat):")
    labels = ("10-20%", "20-50%", "all")
    for part in (breakdown, against):
        # Each group's row keeps its label, in both tables.
        found = [line.split()[0] for line in part.splitlines() if line.split()[:1] != []]
        assert [label for label in found if label in labels] == list(labels), result.stdout
    rows = {line.split()[0]: line for line in breakdown.splitlines() if line[:1] in ("1", "2", "a")}
    assert "+16.0" in rows["10-20%"] and "+2.0" in rows["20-50%"], result.stdout
    assert "+18.0" in rows["all"] and "+42.00" in rows["all"], result.stdout
    shown = any(line.startswith("size") and "AvgRelMAE" in line for line in lines)
    named = any(line.startswith("not shown at") and "AvgRelMAE" in line for line in lines)
    assert shown != named, result.stdout  # shown whole, or named as not shown
    if shown:
        assert "0.508" in result.stdout, result.stdout
    assert all(len(line) <= columns for line in lines[3:]), result.stdout


@pytest.mark.parametrize("columns", [100, 140])
def test_overrides_detail_keeps_the_series_and_periods_at_any_width(
    overridden: Path, columns: int
) -> None:
    result = run("overrides", "w3.csv", "--detail", cwd=overridden, columns=columns)
    assert result.returncode == 0, result.stderr
    body = [line.split() for line in result.stdout.splitlines()]
    # One row per overridden period with actuals, each naming its series and period.
    keyed = [row for row in body if row[:1] in (["2026-01-12"],)]
    assert len(keyed) == 4, result.stdout
    assert {(r[1], r[2], r[3]) for r in keyed} == {
        ("A", "X", "2026-01-19"),
        ("A", "X", "2026-01-26"),
        ("B", "X", "2026-01-19"),
        ("B", "X", "2026-01-26"),
    }, result.stdout
