"""``triage compare``: the command as a user runs it (subprocess on the sample) and, for
competing forecasts, in process with the portfolio given ``forecast_<name>`` forecasts."""

from __future__ import annotations

import csv
import dataclasses
import io
import json
from pathlib import Path

import numpy as np
import pytest
from test_cli import SAMPLE, run

from triage import cli, commands_compare
from triage.core.read import read_portfolio

#: The portfolio table's columns, fixed by the contract (value columns: priced portfolios).
TABLE = [
    "forecast_name",
    "step",
    "cells",
    "demand",
    "abs_error",
    "bias",
    "bias_pct",
    "wape",
    "mae",
    "rmse",
    "abs_error_value",
    "bias_value",
    "mase",
    "mase_series",
    "mape",
    "mape_cells_dropped",
    "mape_capped",
    "rank_wape",
    "rank_mape",
    "fva_units",
    "fva_pct",
    "p",
    "dm_stat",
    "series_best",
]


def _without_competing(folder: Path) -> Path:
    """The sample with its ``forecast_<name>`` columns left out, every other cell as written."""
    import pandas as pd

    frame = pd.read_csv(SAMPLE, dtype=str, keep_default_na=False)
    plain = folder / "plain.csv"
    frame.drop(columns=[c for c in frame.columns if c.startswith("forecast_")]).to_csv(
        plain, index=False
    )
    return plain


def test_sample_without_competing_forecasts_meets_naive(tmp_path: Path) -> None:
    plain = _without_competing(tmp_path)
    result = run("compare", str(plain), "--format", "csv")
    assert result.returncode == 0, result.stderr
    rows = list(csv.DictReader(io.StringIO(result.stdout)))
    assert list(rows[0]) == TABLE
    assert [r["forecast_name"] for r in rows] == ["forecast", "naive"]
    naive, forecast = rows[1], rows[0]
    # Fractions, not percentages; empty where undefined (the first step has no FVA or p).
    assert 0 < float(forecast["wape"]) < 1
    assert naive["fva_units"] == "" and naive["p"] == ""
    assert float(forecast["fva_units"]) == pytest.approx(
        float(naive["abs_error"]) - float(forecast["abs_error"])
    )
    table = run("compare", str(plain))
    assert table.returncode == 0, table.stderr
    assert "compared on 3,900 of 3,900 window cells" in table.stdout
    assert "Best: forecast" in table.stdout
    assert "Step naive -> forecast: removes" in table.stdout


def test_the_samples_competing_forecasts_read_from_the_file() -> None:
    # sample/README.md: forecast_customer is biased low and MAPE's choice; forecast_stat is
    # unbiased but noisy. Read from the CSV itself (no patched loader).
    result = run("compare", str(SAMPLE), "--format", "csv")
    assert result.returncode == 0, result.stderr
    rows = {r["forecast_name"]: r for r in csv.DictReader(io.StringIO(result.stdout))}
    assert list(rows) == ["forecast", "stat", "customer", "naive"]
    customer, stat = rows["customer"], rows["stat"]
    assert float(customer["mape"]) < float(stat["mape"])
    assert float(customer["wape"]) > float(stat["wape"])
    assert float(customer["bias_pct"]) <= -0.05
    assert customer["rank_mape"] == "1"
    table = run("compare", str(SAMPLE))
    assert "Warning: MAPE would pick customer" in table.stdout


def test_season_adds_snaive_and_steps_order_the_chain() -> None:
    result = run(
        "compare", str(SAMPLE), "--season", "52", "--steps", "naive,snaive,forecast", "--format",
        "json",
    )  # fmt: skip
    assert result.returncode == 0, result.stderr
    doc = json.loads(result.stdout)
    assert doc["steps"] == ["naive", "snaive", "forecast"]
    rows = {r["forecast_name"]: r for r in doc["forecasts"]}
    assert rows["snaive"]["step"] == 2 and rows["naive"]["fva_units"] is None
    # Fewer cells: snaive needs the actual 52 weeks back (said, not hidden).
    assert doc["cells"] < doc["window_cells"] and doc["missing"]["snaive"] > 0
    assert rows["forecast"]["fva_units"] == pytest.approx(
        rows["snaive"]["abs_error"] - rows["forecast"]["abs_error"]
    )


def test_bad_steps_exit_2_naming_the_unknown_and_the_available() -> None:
    result = run("compare", str(SAMPLE), "--steps", "naive,stats")
    assert result.returncode == 2
    assert "'stats'" in result.stderr
    # The sample's own forecasts, in file order, then the built-in benchmark.
    assert "Available: forecast, stat, customer, naive." in result.stderr
    assert "Traceback" not in result.stderr
    snaive = run("compare", str(SAMPLE), "--steps", "naive,snaive")
    assert snaive.returncode == 2 and "--season" in snaive.stderr


def test_output_refuses_an_existing_file_without_force(tmp_path: Path) -> None:
    target = tmp_path / "compare.csv"
    target.write_text("keep me")
    refused = run("compare", str(SAMPLE), "--format", "csv", "--output", str(target))
    assert refused.returncode == 2 and "--force" in refused.stderr
    assert target.read_text() == "keep me"
    forced = run("compare", str(SAMPLE), "--format", "csv", "--output", str(target), "--force")
    assert forced.returncode == 0, forced.stderr
    assert target.read_text() == run("compare", str(SAMPLE), "--format", "csv").stdout


# ---- competing forecasts (Portfolio.competing), in process -----------------------------------


@pytest.fixture
def competing(monkeypatch: pytest.MonkeyPatch) -> dict[str, np.ndarray]:
    """The sample with two competing forecasts: ``stat`` (closer) and ``low`` (20% under)."""
    portfolio = read_portfolio(SAMPLE)
    rng = np.random.default_rng(4)
    forecasts = {
        "stat": portfolio.demand * rng.uniform(0.9, 1.1, portfolio.demand.shape),
        "low\x1b[31m": np.where(portfolio.demand > 0, portfolio.demand * 0.8, 1.0),
    }
    given = dataclasses.replace(portfolio, competing=forecasts)
    monkeypatch.setattr(commands_compare, "load_portfolio", lambda args, **_: given)
    return forecasts


def test_by_series_csv_has_one_row_per_series_and_forecast(
    competing: dict[str, np.ndarray], capsys: pytest.CaptureFixture[str]
) -> None:
    assert cli.main(["compare", str(SAMPLE), "--by-series", "--format", "csv"]) == 0
    rows = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    names = ["forecast", "stat", "low\x1b[31m", "naive"]
    assert len(rows) == 300 * len(names)
    assert [r["forecast_name"] for r in rows[:4]] == names  # text kept exactly in CSV
    assert list(rows[0])[:3] == ["item", "location", "forecast_name"]
    assert list(rows[0])[-1] == "best"
    assert {r["best"] for r in rows} == {"true", "false"}
    for lo in range(0, len(rows), 4):
        block = rows[lo : lo + 4]
        errors = [float(r["abs_error"]) for r in block]
        assert [r["best"] == "true" for r in block] == [e == min(errors) for e in errors]


def test_table_shows_names_visibly_and_counts_series_best(
    competing: dict[str, np.ndarray], capsys: pytest.CaptureFixture[str]
) -> None:
    assert cli.main(["compare", str(SAMPLE), "--steps", "naive,stat,forecast"]) == 0
    out = capsys.readouterr().out
    assert "\x1b" not in out  # a forecast name from a header reaches the terminal visibly
    assert "low\u241b[31m" in out
    assert "Best: stat" in out and "Step naive -> stat: removes" in out
    assert cli.main(["compare", str(SAMPLE), "--format", "json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["verdict"]["best"] == "stat"
    rows = {r["forecast_name"]: r for r in doc["forecasts"]}
    assert rows["low\x1b[31m"]["bias_pct"] < -0.05
    # Every series with a compared cell has a best forecast; ties may count one twice.
    assert sum(r["series_best"] for r in doc["forecasts"]) >= 300
    assert rows["stat"]["series_best"] > rows["forecast"]["series_best"]


def test_mape_warning_in_words(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    # Common practice: on demand that swings, a forecast 30% low can have the lowest MAPE.
    portfolio = read_portfolio(SAMPLE)
    low = np.where(portfolio.demand > 0, portfolio.demand * 0.7, 0.0)
    given = dataclasses.replace(portfolio, competing={"low": low}, forecast=portfolio.forecast)
    monkeypatch.setattr(commands_compare, "load_portfolio", lambda args, **_: given)
    assert cli.main(["compare", str(SAMPLE), "--format", "json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["verdict"]["mape_pick"] == "low" and doc["verdict"]["mape_warning"]
    assert cli.main(["compare", str(SAMPLE)]) == 0
    assert "Warning: MAPE would pick low" in capsys.readouterr().out
