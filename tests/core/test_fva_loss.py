"""The error the last process step added (``fva_loss``, ``triage rank --by fva``) against a plain
per-series loop.

The definition checked is forecast value added (Gilliland 2010, *The Business Forecasting Deal*,
docs/sources.md §3.1): FVA of a step = error of the previous step − error of this step, with
absolute error as the measure; ``fva_loss`` is its negation for the last step, summed over the
series' window cells where demand, the final forecast and the previous step are all present.
The value weighting (each cell's difference × its price) is the ranking-by-value rule of
docs/sources.md §1.4.
"""

from __future__ import annotations

import csv
import dataclasses
import io
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from helpers import portfolio_from
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from triage.core import compare as cmp
from triage.core import metrics, ranking, schema
from triage.core.errors import TriageError
from triage.core.portfolio import Portfolio

WINDOW = 8


def generated(seed: int, *, n: int = 30, periods: int = 18, priced: bool = True) -> Portfolio:
    """Series with zero, negative and missing demand, missing forecasts, and two competing
    forecasts in file order ``stat``, ``plan`` (each missing where the other is present).

    Series 0: ``plan`` equals ``forecast`` (loss 0). Series 1: ``plan`` missing throughout
    (no comparable cell). Series 2: demand 0 in the window. Series 3 changes price mid-way.
    """
    rng = np.random.default_rng(seed)
    records = []
    for s in range(n):
        level = rng.uniform(0.5, 40)
        price = float(rng.uniform(1, 30))
        for t in range(periods):
            u = rng.random()
            demand = (
                math.nan
                if u < 0.06
                else 0.0
                if u < 0.16 or s == 2
                else -float(rng.integers(1, 6))
                if u < 0.2
                else float(rng.poisson(level))
            )
            row = {
                schema.ITEM: f"S{s:03d}",
                schema.PERIOD: t,
                schema.DEMAND: demand,
                schema.FORECAST: math.nan
                if rng.random() < 0.05
                else float(rng.gamma(2, level / 2)),
            }
            if priced:
                row[schema.PRICE] = price * (3 if s == 3 and t > periods // 2 else 1)
            records.append(row)
    portfolio = portfolio_from(records)
    shape = portfolio.demand.shape
    stat = np.where(rng.random(shape) < 0.1, np.nan, rng.gamma(3, 8, shape))
    plan = np.where(rng.random(shape) < 0.1, np.nan, rng.gamma(2, 12, shape))
    plan[0] = portfolio.forecast[0]
    plan[1] = np.nan
    return dataclasses.replace(portfolio, competing={"stat": stat, "plan": plan})


def window_cols(portfolio: Portfolio, window: int) -> list[int]:
    """The latest ``window`` columns holding any actual, by a plain loop."""
    found = [
        c
        for c in range(portfolio.last_actual + 1)
        if any(not math.isnan(portfolio.demand[i, c]) for i in range(portfolio.n_series))
    ]
    return found[-window:]


def value_of(portfolio: Portfolio, name: str, i: int, c: int) -> float:
    """Forecast ``name`` of series i at column c (naive: the previous period's actual)."""
    if name == "forecast":
        return float(portfolio.forecast[i, c])
    if name == "naive":
        return float(portfolio.demand[i, c - 1]) if c >= 1 else math.nan
    return float(portfolio.competing[name][i, c])


def oracle(
    portfolio: Portfolio, window: int, previous: str, final: str
) -> tuple[list[float], list[float], list[int]]:
    """Per series: Σ|e_final| − Σ|e_previous| in units and in value, and the cells, by loops."""
    price = np.asarray(portfolio.price) if portfolio.price is not None else None
    units, value, cells = [], [], []
    cols = window_cols(portfolio, window)
    for i in range(portfolio.n_series):
        final_abs = previous_abs = final_value = previous_value = 0.0
        count = 0
        for c in cols:
            d = float(portfolio.demand[i, c])
            f = value_of(portfolio, final, i, c)
            p = value_of(portfolio, previous, i, c)
            if math.isnan(d) or math.isnan(f) or math.isnan(p):
                continue
            count += 1
            final_abs += abs(f - d)
            previous_abs += abs(p - d)
            if price is not None:
                final_value += abs(f - d) * price[i, c]
                previous_value += abs(p - d) * price[i, c]
        cells.append(count)
        units.append(final_abs - previous_abs if count else math.nan)
        value.append(final_value - previous_value if count and price is not None else math.nan)
    return units, value, cells


def largest_first(loss: list[float]) -> list[int]:
    """Series by descending loss, those without one last, ties by position (key order)."""

    def key(i: int) -> tuple[bool, float, int]:
        missing = math.isnan(loss[i])
        return missing, 0.0 if missing else -loss[i], i

    return sorted(range(len(loss)), key=key)


def loss_of(portfolio: Portfolio, steps: tuple[str, ...] | None = None) -> cmp.LastStep:
    cols = metrics.window_columns(portfolio.demand, portfolio.last_actual, WINDOW)
    return cmp.last_step_loss(portfolio, cols, steps=steps)


@pytest.mark.parametrize("priced", [True, False])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_loss_matches_a_plain_loop(seed: int, priced: bool) -> None:
    # Gilliland (2010) FVA of the last step, negated (docs/sources.md §3.1); the default
    # previous step is the last forecast_<name> column in file order ("plan", not "stat").
    portfolio = generated(seed, priced=priced)
    step = loss_of(portfolio)
    assert (step.previous, step.final) == ("plan", "forecast")
    units, value, cells = oracle(portfolio, WINDOW, "plan", "forecast")
    np.testing.assert_allclose(step.loss, units, rtol=1e-12, atol=1e-9)
    assert step.cells.tolist() == cells
    if priced:
        assert step.loss_value is not None
        np.testing.assert_allclose(step.loss_value, value, rtol=1e-12, atol=1e-7)
    else:
        assert step.loss_value is None
    # The edge cases are there: a forecast equal to the previous step adds exactly nothing; a
    # previous step missing throughout leaves nothing to compare.
    assert step.loss[0] == 0.0
    assert math.isnan(step.loss[1]) and step.cells[1] == 0
    # Missing cells in one forecast only drop the cell: fewer cells than the window has
    # demand and forecast.
    present = ~np.isnan(portfolio.demand) & ~np.isnan(portfolio.forecast)
    cols = window_cols(portfolio, WINDOW)
    assert (step.cells <= present[:, cols].sum(axis=1)).all()
    assert (step.cells < present[:, cols].sum(axis=1)).any()


def test_zero_and_negative_demand_are_cells_like_any_other() -> None:
    # |e| is defined at zero and negative demand (returns): FVA in units has no ratio to break
    # (docs/metrics.md "Sign convention"; common practice for returns as demand).
    records = [
        {schema.ITEM: "A", schema.PERIOD: t, schema.DEMAND: d, schema.FORECAST: f}
        for t, (d, f) in enumerate([(5, 5), (0, 2), (-3, 1), (0, 0), (4, 9)])
    ]
    portfolio = portfolio_from(records)
    portfolio = dataclasses.replace(
        portfolio, competing={"stat": np.array([[5.0, 1.0, -3.0, 2.0, 4.0]])}
    )
    step = loss_of(portfolio)
    # |2-0| + |1+3| + |0-0| + |9-4| + 0 = 11 against |1-0| + 0 + |2-0| + 0 + 0 = 3.
    assert step.loss.tolist() == [11.0 - 3.0]
    assert step.cells.tolist() == [5]


@pytest.mark.parametrize("priced", [True, False])
def test_without_competing_forecasts_the_previous_step_is_naive(priced: bool) -> None:
    # Gilliland (2010): the first step of the stairstep is the naive forecast (§3.1).
    portfolio = dataclasses.replace(generated(4, priced=priced), competing={})
    step = loss_of(portfolio)
    assert (step.previous, step.final) == ("naive", "forecast")
    units, value, cells = oracle(portfolio, WINDOW, "naive", "forecast")
    np.testing.assert_allclose(step.loss, units, rtol=1e-12, atol=1e-9)
    assert step.cells.tolist() == cells
    if priced:
        np.testing.assert_allclose(step.loss_value, value, rtol=1e-12, atol=1e-7)  # type: ignore[arg-type]


def test_steps_choose_the_last_pair() -> None:
    # The chain's last step against the one before it, as `triage compare --steps` orders them.
    portfolio = generated(5)
    step = loss_of(portfolio, ("forecast", "naive", "stat"))
    assert (step.previous, step.final) == ("naive", "stat")
    units, value, _ = oracle(portfolio, WINDOW, "naive", "stat")
    np.testing.assert_allclose(step.loss, units, rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(step.loss_value, value, rtol=1e-12, atol=1e-7)  # type: ignore[arg-type]
    with pytest.raises(TriageError, match="at least two"):
        loss_of(portfolio, ("stat",))
    with pytest.raises(TriageError, match="unknown forecast 'nope'"):
        loss_of(portfolio, ("stat", "nope"))


def test_the_sum_is_the_negated_value_added_of_compare() -> None:
    # Where every forecast is present in every window cell, `triage compare`'s fva_units of the
    # last step (Gilliland 2010, previous − this) is minus the sum of the series' losses.
    portfolio = generated(6, priced=False)
    demand = np.nan_to_num(portfolio.demand, nan=3.0)
    full = dataclasses.replace(
        portfolio,
        demand=demand,
        forecast=np.nan_to_num(portfolio.forecast, nan=4.0),
        competing={k: np.nan_to_num(v, nan=2.0) for k, v in portfolio.competing.items()},
    )
    step = loss_of(full)
    table = cmp.compare(full, WINDOW).table.set_index("forecast_name")
    assert step.cells.min() == WINDOW
    assert math.isclose(float(step.loss.sum()), -float(table.loc["forecast", "fva_units"]))


def test_the_scorecard_orders_by_the_loss() -> None:
    # Largest loss (in value where priced) first, no comparable cell last, ties by key.
    portfolio = generated(7)
    portfolio.competing["plan"][5] = portfolio.forecast[5]  # a second zero: a tie with S000
    card = ranking.scorecard(portfolio, WINDOW, by=ranking.BY_FVA)
    units, value, _ = oracle(portfolio, WINDOW, "plan", "forecast")
    np.testing.assert_allclose(card.sort_index()["fva_loss"], units, rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(card.sort_index()["fva_loss_value"], value, rtol=1e-12, atol=1e-7)
    expected = largest_first(value)
    assert card.index.tolist() == expected
    assert card["fva_rank"].tolist() == list(range(1, portfolio.n_series + 1))
    assert card.index[-1] == 1  # no comparable cell
    zeros = [i for i in card.index if value[i] == 0]
    assert zeros == [0, 5]
    # The other orders carry the same fva_rank.
    by_error = ranking.scorecard(portfolio, WINDOW)
    assert (by_error.sort_index()["fva_rank"] == card.sort_index()["fva_rank"]).all()
    # Unpriced, the units rank.
    unpriced = dataclasses.replace(portfolio, price=None)
    card = ranking.scorecard(unpriced, WINDOW, by=ranking.BY_FVA)
    assert "fva_loss_value" not in card
    order = largest_first(units)
    assert card.index.tolist() == order


PROPERTY = settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@PROPERTY
@given(st.integers(0, 10_000), st.booleans())
def test_a_copy_of_the_forecast_as_the_last_competing_column_adds_nothing(
    seed: int, priced: bool
) -> None:
    # FVA between a forecast and its exact copy is 0 (Gilliland 2010, §3.1): with the copy as
    # the last forecast_<name> column, the default previous step, every loss is 0.
    base = generated(seed, n=12, periods=14, priced=priced)
    portfolio = dataclasses.replace(
        base, competing={**base.competing, "copy": base.forecast.copy()}
    )
    step = loss_of(portfolio)
    assert step.previous == "copy"
    present = ~np.isnan(step.loss)
    assert (step.loss[present] == 0).all()
    cols = window_cols(portfolio, WINDOW)
    both = ~np.isnan(portfolio.demand[:, cols]) & ~np.isnan(portfolio.forecast[:, cols])
    assert step.cells.tolist() == both.sum(axis=1).tolist()
    if priced:
        assert step.loss_value is not None
        assert (step.loss_value[present] == 0).all()


# --------------------------------------------------------------------------------------------
# triage rank --by fva
# --------------------------------------------------------------------------------------------


def write_csv(portfolio: Portfolio, path: Path) -> None:
    """The portfolio as a long CSV file with its competing columns."""
    n, periods = portfolio.demand.shape
    frame = pd.DataFrame(
        {
            schema.ITEM: np.repeat(portfolio.keys[schema.ITEM].to_numpy(), periods),
            schema.PERIOD: np.tile(portfolio.calendar.periods.strftime("%Y-%m-%d"), n),
            schema.DEMAND: portfolio.demand.reshape(-1),
            schema.FORECAST: portfolio.forecast.reshape(-1),
            **{f"forecast_{k}": v.reshape(-1) for k, v in portfolio.competing.items()},
            schema.PRICE: np.asarray(portfolio.price).reshape(-1),
        }
    )
    frame.to_csv(path, index=False)


def run(*args: str, columns: int = 80) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "COLUMNS": str(columns)}
    return subprocess.run(
        [sys.executable, "-m", "triage.cli", *args],
        capture_output=True,
        text=True,
        env=env,
        check=False,
    )


def test_rank_by_fva_orders_by_the_loss(tmp_path: Path) -> None:
    portfolio = generated(8)
    path = tmp_path / "week.csv"
    write_csv(portfolio, path)
    done = run("rank", str(path), "--by", "fva", "--window", str(WINDOW), "--format", "csv")
    assert done.returncode == 0, done.stderr
    rows = list(csv.DictReader(io.StringIO(done.stdout)))
    _, value, _ = oracle(portfolio, WINDOW, "plan", "forecast")
    expected = largest_first(value)
    assert [r["item"] for r in rows] == [f"S{i:03d}" for i in expected]
    assert [int(r["fva_rank"]) for r in rows] == list(range(1, portfolio.n_series + 1))
    for row, i in zip(rows, expected, strict=True):
        if math.isnan(value[i]):
            assert row["fva_loss_value"] == "" and row["fva_loss"] == ""
        else:
            assert math.isclose(float(row["fva_loss_value"]), value[i], abs_tol=1e-7)

    table = run("rank", str(path), "--by", "fva", "--window", str(WINDOW), "--top", "10")
    assert table.returncode == 0, table.stderr
    lines = table.stdout.splitlines()
    assert max(len(line) for line in lines[1:]) <= 80  # the first line names the file
    assert "ranked by error added by the last step, plan -> forecast in value" in lines
    header = next(line for line in lines if line.startswith("fva rank"))
    assert "step loss value" in header
    first = lines[lines.index(header) + 1].split()
    assert first[:2] == ["1", f"S{expected[0]:03d}"]

    doc = run("rank", str(path), "--by", "fva", "--steps", "naive,stat", "--format", "json")
    assert doc.returncode == 0, doc.stderr
    assert '"fva_steps": {\n  "previous": "naive",\n  "final": "stat"\n }' in doc.stdout
    assert '"ranked_by": "fva_loss_value"' in doc.stdout

    bad = run("rank", str(path), "--by", "fva", "--steps", "stat")
    assert bad.returncode == 2
    assert "at least two forecasts" in bad.stderr and "Traceback" not in bad.stderr
