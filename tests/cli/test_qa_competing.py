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


#: Two series, four weeks with actuals and a forward week; the customer forecast is missing in
#: week 2 ('n/a', '-'), A's demand is 0 in week 3 and B's is -2 (a return) in week 2; B has
#: price 0. Invented.
PRICED = """item,location,period,demand,forecast,forecast_stat,forecast_cust,price
A,X,2026-01-05,10,12,9,10,2
A,X,2026-01-12,20,18,15,n/a,2
A,X,2026-01-19,0,3,1,2,2
A,X,2026-01-26,30,25,20,28,2
A,X,2026-02-02,,22,21,27,2
B,X,2026-01-05,5,5,5,5,0
B,X,2026-01-12,-2,1,0,-,0
B,X,2026-01-19,8,10,6,7,0
B,X,2026-01-26,4,4,4,5,0
B,X,2026-02-02,,5,5,5,0
"""
#: The compared cells (demand, naive and both competing forecasts present): weeks 3 and 4 of
#: each series (week 1 has no previous actual, week 2 no customer forecast), as
#: (demand, forecast, stat, cust, naive, price).
CELLS = [
    (0, 3, 1, 2, 20, 2),
    (30, 25, 20, 28, 0, 2),
    (8, 10, 6, 7, -2, 0),
    (4, 4, 4, 5, 8, 0),
]


def _csv_rows(text: str) -> dict[str, dict[str, str]]:
    import csv
    import io

    return {row["forecast_name"]: row for row in csv.DictReader(io.StringIO(text))}


def test_compare_figures_by_hand_on_a_small_priced_file(tmp_path: Path) -> None:
    import numpy as np
    from sklearn.metrics import mean_absolute_error, root_mean_squared_error

    (tmp_path / "p.csv").write_text(PRICED, encoding="utf-8")
    result = run("compare", "p.csv", "--format", "csv", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    rows = _csv_rows(result.stdout)
    cells = np.array(CELLS, dtype=float)
    demand, price = cells[:, 0], cells[:, 5]
    for at, name in enumerate(("forecast", "stat", "cust", "naive"), start=1):
        row, f = rows[name], cells[:, at]
        e = f - demand
        assert int(row["cells"]) == 4 and float(row["demand"]) == 42.0
        # docs/metrics.md, "Comparing forecasts": sums and means pool every compared cell.
        assert float(row["abs_error"]) == pytest.approx(np.abs(e).sum())
        assert float(row["bias"]) == pytest.approx(e.sum())
        assert float(row["wape"]) == pytest.approx(np.abs(e).sum() / 42.0)
        assert float(row["abs_error_value"]) == pytest.approx((np.abs(e) * price).sum())
        # scikit-learn: mean_absolute_error, root_mean_squared_error on the same cells.
        assert float(row["mae"]) == pytest.approx(mean_absolute_error(demand, f))
        assert float(row["rmse"]) == pytest.approx(root_mean_squared_error(demand, f))
        # mape: demand > 0 only (3 cells); mape_capped: min(ratio, 1), demand <= 0 counts 1.
        positive = demand > 0
        ratio = np.abs(e[positive]) / demand[positive]
        assert float(row["mape"]) == pytest.approx(ratio.mean())
        assert int(row["mape_cells_dropped"]) == 1
        assert float(row["mape_capped"]) == pytest.approx((np.minimum(ratio, 1).sum() + 1) / 4)
    # By hand: Σ|e| forecast 3+5+2+0 = 10, stat 1+10+2+0 = 13, cust 2+2+1+1 = 6, naive
    # 20+30+10+4 = 64. Steps naive -> stat -> cust -> forecast (Gilliland 2010):
    # fva = 64 - 13 = 51 (51/64), 13 - 6 = 7 (7/13), 6 - 10 = -4 (-4/6).
    assert float(rows["stat"]["fva_units"]) == 51.0
    assert float(rows["stat"]["fva_pct"]) == pytest.approx(51 / 64)
    assert float(rows["cust"]["fva_pct"]) == pytest.approx(7 / 13)
    assert float(rows["forecast"]["fva_units"]) == -4.0
    assert rows["naive"]["fva_units"] == ""
    # MASE (Hyndman & Koehler 2006): scale = mean |D_t - D_t-1| over each series' history:
    # A (10, 20, 0, 30) -> 20, B (5, -2, 8, 4) -> 7; forecast's MAE A (3+5)/2, B (2+0)/2.
    assert float(rows["forecast"]["mase"]) == pytest.approx((4 / 20 + 1 / 7) / 2)
    # series_best: A's lowest Σ|e| is cust (4); B ties forecast, stat and cust (2 each).
    assert [rows[n]["series_best"] for n in ("forecast", "stat", "cust", "naive")] == [
        "1",
        "1",
        "2",
        "0",
    ]


#: One series with no demand in the window: the naive forecast (0 after 0) has no error, so
#: the step after it has no percentage. Invented.
ZERO_DEMAND = """item,period,demand,forecast,forecast_stat
A,2026-01-05,0,1,0
A,2026-01-12,0,2,0
A,2026-01-19,0,0,1
A,2026-01-26,,1,1
"""


def test_compare_verdict_words_a_step_whose_previous_error_is_zero(tmp_path: Path) -> None:
    # docs/metrics.md: fva_pct is undefined when the previous step's Σ|e| is 0. By hand, cells
    # weeks 2 and 3: naive 0, 0 (no error); stat 0, 1 -> adds 1 unit; forecast 2, 0 -> 2.
    (tmp_path / "z.csv").write_text(ZERO_DEMAND, encoding="utf-8")
    result = run("compare", "z.csv", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert "()" not in result.stdout, result.stdout
    assert "Step naive -> stat: adds 1 unit of error;" in result.stdout, result.stdout
    assert "Step stat -> forecast: adds 1 unit of error (100.0%);" in result.stdout
    assert "MAPE leaves out 2 cells with demand <= 0" in result.stdout


def test_compare_table_never_cuts_a_figure_for_a_long_forecast_name(tmp_path: Path) -> None:
    # A valid forecast_<name> may be long; the table's figures stay whole (checked against the
    # CSV of the same run, docs/metrics.md).
    name = "customer_" + "x" * 141
    (tmp_path / "p.csv").write_text(PRICED.replace("forecast_cust", f"forecast_{name}"), "utf-8")
    table = run("compare", "p.csv", cwd=tmp_path)
    assert table.returncode == 0, table.stderr
    assert "…" not in table.stdout, table.stdout
    line = next(x for x in table.stdout.splitlines() if x.startswith(name))
    # By hand (CELLS): Σ|e| of the customer forecast 6 of demand 42 (14.3%), fva +7 (53.8%).
    assert line.split()[1:3] == ["14.3%", "0.0%"], line
    assert "+7" in line.split() and "+53.8%" in line.split(), line


@pytest.mark.parametrize(
    ("forward", "said"),
    [("", "is empty"), ("7", "has values only in the forward periods")],
)
def test_compare_names_a_competing_column_without_history_and_what_to_do(
    tmp_path: Path, forward: str, said: str
) -> None:
    # A forecast_stat column left empty (or filled in the forward periods only): no window
    # cell can be compared (docs/metrics.md, "Compared cells"). A longer window cannot help.
    lines = PRICED.replace(",forecast_cust", "").splitlines()
    rows = [lines[0]]
    for line in lines[1:]:
        cells = line.split(",")
        del cells[6]  # forecast_cust
        cells[5] = forward if cells[3] == "" else ""
        rows.append(",".join(cells))
    (tmp_path / "p.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    result = run("compare", "p.csv", cwd=tmp_path)
    assert result.returncode == 2, result.stdout + result.stderr
    assert "Traceback" not in result.stderr
    assert f"column forecast_stat {said}" in result.stderr, result.stderr
    assert "--window" not in result.stderr, result.stderr
    assert "remove the column" in result.stderr, result.stderr


def test_rank_by_fva_says_when_series_have_no_step_loss(tmp_path: Path) -> None:
    # docs/metrics.md, "The last process step": a series without a window cell holding demand,
    # the final forecast and the previous step has no loss and sorts last. With --steps
    # stat,cust: A has such cells (weeks 1, 3, 4), B only weeks 1, 3, 4 as well; with the
    # customer forecast emptied for B, B has none.
    text = PRICED.replace("B,X,2026-01-05,5,5,5,5,0", "B,X,2026-01-05,5,5,5,,0")
    text = text.replace("B,X,2026-01-19,8,10,6,7,0", "B,X,2026-01-19,8,10,6,,0")
    text = text.replace("B,X,2026-01-26,4,4,4,5,0", "B,X,2026-01-26,4,4,4,,0")
    (tmp_path / "p.csv").write_text(text, encoding="utf-8")
    result = run("rank", "p.csv", "--by", "fva", "--steps", "stat,cust", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert (
        "1 of 2 series have no window cell with both steps: no loss, listed last" in result.stdout
    ), result.stdout
    # None at all: the whole list is in key order, and the table says so.
    text = text.replace("A,X,2026-01-05,10,12,9,10,2", "A,X,2026-01-05,10,12,9,,2")
    text = text.replace("A,X,2026-01-19,0,3,1,2,2", "A,X,2026-01-19,0,3,1,,2")
    text = text.replace("A,X,2026-01-26,30,25,20,28,2", "A,X,2026-01-26,30,25,20,,2")
    (tmp_path / "p.csv").write_text(text, encoding="utf-8")
    result = run("rank", "p.csv", "--by", "fva", "--steps", "stat,cust", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert (
        "no series has a window cell with both steps: no loss, the list is in key order"
        in result.stdout
    ), result.stdout


def test_steps_named_as_columns_get_the_name_to_write(tmp_path: Path) -> None:
    # docs/metrics.md: --steps lists forecast names (stat for the column forecast_stat).
    (tmp_path / "p.csv").write_text(PRICED, encoding="utf-8")
    for command in ("compare", "rank"):
        result = run(command, "p.csv", "--steps", "forecast_stat,forecast", cwd=tmp_path)
        assert result.returncode == 2, result.stdout
        assert "Write stat for the column forecast_stat" in result.stderr, result.stderr


def test_report_says_nothing_against_stat_without_overrides_to_value(tmp_path: Path) -> None:
    # docs/history.md, "Against the statistical forecast": the sentence values realised
    # overrides; with none (no decisions yet) a sentence of '0 periods' and '–' says nothing.
    (tmp_path / "w1.csv").write_text(WEEK_1, encoding="utf-8")
    result = run("report", "w1.csv", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert "Realised override value: 0 overridden periods" in result.stdout, result.stdout
    assert "on the 0 periods" not in result.stdout, result.stdout
    assert "beat it by –" not in result.stdout, result.stdout


def test_overrides_against_another_stat_forecast_by_hand(overridden: Path) -> None:
    import csv
    import io

    # docs/history.md: beat stat by = |S - actual| - |adjusted - actual|, S = forecast_alt.
    # A 2026-01-19: |95-92| - |90-92| = 1 (x2 = 2); 2026-01-26: |80-70| - |85-70| = -5 (x3 =
    # -15). B (adjusted to alt itself, price 0): 0 and 0.
    result = run(
        "overrides", "w3.csv", "--detail", "--stat-name", "alt", "--format", "csv", cwd=overridden
    )
    assert result.returncode == 0, result.stderr
    rows = {(r["item"], r["period"]): r for r in csv.DictReader(io.StringIO(result.stdout))}
    expected = {
        ("A", "2026-01-19"): (95.0, 1.0, 2.0),
        ("A", "2026-01-26"): (80.0, -5.0, -15.0),
        ("B", "2026-01-19"): (7.0, 0.0, 0.0),
        ("B", "2026-01-26"): (7.0, 0.0, 0.0),
    }
    for key, (stat, beat, value) in expected.items():
        row = rows[key]
        assert float(row["stat"]) == stat
        assert float(row["value_added_vs_stat"]) == beat
        assert float(row["value_added_vs_stat_value"]) == value


def test_rank_group_refuses_steps_it_would_ignore(tmp_path: Path) -> None:
    # docs/metrics.md, "Groups": groups rank by error or bias; --steps chooses the process
    # steps of a series' fva_loss, which groups do not have, so it is refused like --by fva.
    (tmp_path / "p.csv").write_text(PRICED, encoding="utf-8")
    result = run("rank", "p.csv", "--group", "location", "--steps", "naive,forecast", cwd=tmp_path)
    assert result.returncode == 2, result.stdout
    assert "--steps" in result.stderr and "Traceback" not in result.stderr, result.stderr
    assert result.stdout == ""
