"""A price column with no price above 0 ranks in units, and says so; a mix keeps its prices.

QA finding: a file whose prices are all 0 ranked "in value": every error was worth 0, every
share 0 / 0, and the table still said "in value". The rule (``portfolio.value_or_units``,
docs/metrics.md "Ranking error"): errors are valued only when some series has a price above 0;
otherwise the portfolio is read without prices and every output says why it ranks in units.

The file below is small enough to score by hand (error = forecast - demand, docs/metrics.md):
four weeks of history per series, constant demand and forecast, so |e| per week is the gap.
A: |12 - 10| x 4 = 8, B: |25 - 20| x 4 = 20, C: |31 - 30| x 4 = 4, D: |40 - 40| x 4 = 0;
total 32, shares 20/32, 8/32, 4/32, 0 in the order B, A, C, D.
"""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
import pytest

from tests.cli.test_cli_report import run
from triage.core.errors import LoadError
from triage.core.ranking import scorecard
from triage.core.read import read_portfolio

HISTORY = ["2026-10-05", "2026-10-12", "2026-10-19", "2026-10-26"]
# item -> (demand, forecast) every history week
SERIES = {"A": (10, 12), "B": (20, 25), "C": (30, 31), "D": (40, 40)}
ABS_ERROR = {"A": 8.0, "B": 20.0, "C": 4.0, "D": 0.0}
REASON = "column 'unit_cost' has no price above 0"


def frame(prices: dict[str, str]) -> pd.DataFrame:
    rows = []
    for item, (demand, forecast) in SERIES.items():
        rows += [[item, p, demand, forecast, prices[item]] for p in HISTORY]
        rows.append([item, "2026-11-02", "", forecast, prices[item]])
    return pd.DataFrame(rows, columns=["item", "week", "demand", "forecast", "unit_cost"])


def write(folder: Path, prices: dict[str, str], suffix: str = ".csv") -> Path:
    path = folder / f"week{suffix}"
    data = frame(prices)
    if suffix == ".csv":
        data.to_csv(path, index=False)
    elif suffix == ".xlsx":
        data.to_excel(path, index=False)
    else:
        data["demand"] = pd.to_numeric(data["demand"])
        data["unit_cost"] = pd.to_numeric(data["unit_cost"])
        data.to_parquet(path)
    return path


COLUMNS = {"period": "week", "price": "unit_cost"}
ZERO = dict.fromkeys(SERIES, "0")


@pytest.mark.parametrize("suffix", [".csv", ".xlsx", ".parquet"])
def test_all_zero_prices_rank_in_units_and_say_why(tmp_path: Path, suffix: str) -> None:
    # CSV and Parquet take the streamed way, xlsx the full one: both apply the rule.
    portfolio = read_portfolio(write(tmp_path, ZERO, suffix), columns=COLUMNS)
    assert portfolio.price is None
    assert portfolio.units_reason == REASON
    assert any(n.startswith(REASON) and "ranked in units" in n for n in portfolio.notices)
    card = scorecard(portfolio, 4, 1)
    assert "abs_error_value" not in card
    assert card["item"].tolist() == ["B", "A", "C", "D"]
    assert dict(zip(card["item"], card["abs_error"], strict=True)) == ABS_ERROR
    assert card["error_share"].tolist() == pytest.approx([20 / 32, 8 / 32, 4 / 32, 0.0])


def test_a_mix_of_priced_and_zero_keeps_prices(tmp_path: Path) -> None:
    # Documented behaviour for a mix (docs/metrics.md): value = |e| x price, so the series
    # priced 0 are worth 0 and rank last; A 8 x 2 = 16, B 20 x 0 = 0, C 4 x 3 = 12, D 0.
    prices = {"A": "2", "B": "0", "C": "3", "D": "0"}
    portfolio = read_portfolio(write(tmp_path, prices), columns=COLUMNS)
    assert portfolio.price is not None and portfolio.units_reason == ""
    card = scorecard(portfolio, 4, 1)
    values = dict(zip(card["item"], card["abs_error_value"], strict=True))
    assert values == {"A": 16.0, "B": 0.0, "C": 12.0, "D": 0.0}
    assert card["item"].tolist()[:2] == ["A", "C"]
    assert card["error_share"].tolist()[:2] == pytest.approx([16 / 28, 12 / 28])


def test_a_price_column_with_no_price_at_all_is_still_refused(tmp_path: Path) -> None:
    # Not a silent "in value" either: refused, naming the series and what to do.
    with pytest.raises(LoadError, match="no price on any row") as caught:
        read_portfolio(write(tmp_path, dict.fromkeys(SERIES, "")), columns=COLUMNS)
    assert "leave out the price column" in str(caught.value.hint)


def test_rank_table_json_csv_check_and_report_say_units(tmp_path: Path) -> None:
    path = write(tmp_path, ZERO)
    mapping = ["--columns", "period=week,price=unit_cost"]
    table = run("rank", str(path), *mapping, cwd=tmp_path)
    assert table.returncode == 0, table.stderr
    assert f"ranked by share of absolute error in units ({REASON})" in table.stdout
    assert "in value" not in table.stdout
    doc = json.loads(run("rank", str(path), *mapping, "--format", "json", cwd=tmp_path).stdout)
    assert (doc["ranked_by"], doc["units_reason"]) == ("abs_error", REASON)
    as_csv = run("rank", str(path), *mapping, "--format", "csv", cwd=tmp_path)
    assert "abs_error_value" not in as_csv.stdout.splitlines()[0]
    assert f"triage: note: {REASON}, so errors are ranked in units" in as_csv.stderr
    check = run("check", str(path), *mapping, cwd=tmp_path)
    assert f"price          not used: {REASON}; errors are ranked in units" in check.stdout
    report = run("report", str(path), *mapping, "--to", str(tmp_path / "r.html"), cwd=tmp_path)
    assert report.returncode == 0, report.stderr
    html = (tmp_path / "r.html").read_text(encoding="utf-8")
    # The report's footer, HTML-escaped (the apostrophe as &#x27;).
    escaped = REASON.replace("'", "&#x27;")
    assert f"Ranking by absolute error in units ({escaped})" in html


def test_a_priced_file_says_nothing_new(tmp_path: Path) -> None:
    path = write(tmp_path, dict.fromkeys(SERIES, "1.5"))
    doc = json.loads(
        run(
            "rank",
            str(path),
            "--columns",
            "period=week,price=unit_cost",
            "--format",
            "json",
            cwd=tmp_path,
        ).stdout
    )
    assert doc["ranked_by"] == "abs_error_value" and "units_reason" not in doc


def test_a_dataset_part_priced_zero_keeps_its_zeros(tmp_path: Path) -> None:
    # A dataset is valued when its price column is (the parts are judged together): a part
    # whose prices are all 0 is read alone without them and gets its zeros back.
    from triage.core.dataset import read_dataset

    folder = tmp_path / "lake"
    folder.mkdir()
    data = frame({"A": "2", "B": "2", "C": "0", "D": "0"})
    data["demand"] = pd.to_numeric(data["demand"])
    data["unit_cost"] = pd.to_numeric(data["unit_cost"])
    data[data["item"].isin(["A", "B"])].to_parquet(folder / "part-0.parquet")
    data[data["item"].isin(["C", "D"])].to_parquet(folder / "part-1.parquet")
    portfolio = read_dataset(folder, columns=COLUMNS)
    assert portfolio.price is not None
    card = scorecard(portfolio, 4, 1)
    values = dict(zip(card["item"], card["abs_error_value"], strict=True))
    assert values == {"A": 16.0, "B": 40.0, "C": 0.0, "D": 0.0}


def test_a_whole_series_part_priced_zero_keeps_its_zeros(tmp_path: Path) -> None:
    # The Dask engine scores a part of whole series as a file of its own (read_portfolio, then
    # dataset.on_grid): the part priced 0 must be valued at 0 like the others, not dropped.
    from triage.core.dataset import open_dataset, plan_dataset, quick_summary, score_whole_part

    folder = tmp_path / "lake"
    folder.mkdir()
    data = frame({"A": "2", "B": "2", "C": "0", "D": "0"}).rename(
        columns={"week": "period", "unit_cost": "price"}
    )
    data["demand"] = pd.to_numeric(data["demand"])
    data["price"] = pd.to_numeric(data["price"])
    data[data["item"].isin(["A", "B"])].to_parquet(folder / "part-0.parquet")
    data[data["item"].isin(["C", "D"])].to_parquet(folder / "part-1.parquet")
    dataset = open_dataset(folder)
    plan = plan_dataset(dataset, [quick_summary(dataset, i) for i in range(2)])
    assert plan.whole_series and plan.priced
    cols = plan.window_cols(4)
    scored = pd.concat([score_whole_part(dataset, i, plan, cols, 1, None) for i in range(2)])
    values = dict(zip(scored["item"], scored["abs_error_value"], strict=True))
    assert values == {"A": 16.0, "B": 40.0, "C": 0.0, "D": 0.0}


def test_a_dataset_priced_zero_everywhere_ranks_in_units(tmp_path: Path) -> None:
    # The local engine gives the portfolio one file of every part's rows would give.
    from triage.core.dataset import read_dataset

    folder = tmp_path / "lake"
    folder.mkdir()
    data = frame(ZERO)
    data["demand"] = pd.to_numeric(data["demand"])
    data["unit_cost"] = pd.to_numeric(data["unit_cost"])
    data[data["item"].isin(["A", "B"])].to_parquet(folder / "part-0.parquet")
    data[data["item"].isin(["C", "D"])].to_parquet(folder / "part-1.parquet")
    portfolio = read_dataset(folder, columns=COLUMNS)
    assert portfolio.price is None and portfolio.units_reason == REASON
    card = scorecard(portfolio, 4, 1)
    assert dict(zip(card["item"], card["abs_error"], strict=True)) == ABS_ERROR
