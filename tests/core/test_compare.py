"""``triage.core.compare`` against a plain per-series, per-cell loop, reference libraries and
hand-worked examples.

Each check names its source: scikit-learn ``mean_absolute_error``, ``root_mean_squared_error``
and ``mean_absolute_percentage_error``; statsmodels ``tools.eval_measures`` and its OLS with a
HAC covariance; Hyndman & Koehler (2006), "Another look at measures of forecast accuracy", for
MASE; Diebold & Mariano (1995), "Comparing predictive accuracy", and Harvey, Leybourne & Newbold
(1997), "Testing the equality of prediction mean squared errors", for the paired test. Facts
without a source are marked "common practice".
"""

from __future__ import annotations

import dataclasses
import math
from itertools import pairwise

import numpy as np
import pytest
import statsmodels.api as sm
from helpers import portfolio_from, series_records
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats
from sklearn.metrics import (
    mean_absolute_error,
    mean_absolute_percentage_error,
    root_mean_squared_error,
)
from statsmodels.tools.eval_measures import bias as sm_bias
from statsmodels.tools.eval_measures import meanabs, rmse

from triage.core import compare as cmp
from triage.core import schema
from triage.core.errors import TriageError
from triage.core.portfolio import Portfolio

# --------------------------------------------------------------------------------------------
# Generated portfolios with every edge case
# --------------------------------------------------------------------------------------------


def generated(seed: int, *, n: int = 40, periods: int = 24, priced: bool = True) -> Portfolio:
    """A portfolio with zero and negative demand, missing actuals, and three competing
    forecasts: ``stat`` (missing where the others are present), ``copy`` (equal to
    ``forecast``) and ``low`` (biased low)."""
    rng = np.random.default_rng(seed)
    records = []
    for s in range(n):
        level = rng.uniform(0.5, 60)
        price = float(rng.uniform(1, 20))
        for t in range(periods):
            u = rng.random()
            demand = (
                math.nan
                if u < 0.05
                else 0.0
                if u < 0.15
                else -float(rng.integers(1, 5))
                if u < 0.18
                else float(rng.poisson(level))
            )
            forecast = math.nan if rng.random() < 0.04 else float(rng.gamma(2, level / 2))
            row = {
                schema.ITEM: f"S{s:03d}",
                schema.PERIOD: t,
                schema.DEMAND: demand,
                schema.FORECAST: forecast,
            }
            if priced:
                # One series changes price mid-way: the value columns use each cell's price.
                row[schema.PRICE] = price * (2 if s == 3 and t > periods // 2 else 1)
            records.append(row)
    portfolio = portfolio_from(records)
    shape = portfolio.demand.shape
    stat = np.where(rng.random(shape) < 0.06, np.nan, rng.gamma(3, 10, shape))
    low = np.nan_to_num(portfolio.demand, nan=5.0) * 0.7
    return dataclasses.replace(
        portfolio,
        competing={"stat": stat, "copy": portfolio.forecast.copy(), "low": low},
    )


def window_cols(portfolio: Portfolio, window: int) -> list[int]:
    """The latest ``window`` columns with any actual, found by a plain loop."""
    found = [
        c
        for c in range(portfolio.last_actual + 1)
        if any(not math.isnan(portfolio.demand[i, c]) for i in range(portfolio.n_series))
    ]
    return found[-window:]


def value_of(portfolio: Portfolio, name: str, i: int, c: int, season: int) -> float:
    """Forecast ``name`` of series i at column c, as the brief defines it."""
    if name == cmp.FORECAST:
        return float(portfolio.forecast[i, c])
    if name in (cmp.NAIVE, cmp.SNAIVE):
        back = 1 if name == cmp.NAIVE else season
        return float(portfolio.demand[i, c - back]) if c - back >= 0 else math.nan
    return float(portfolio.competing[name][i, c])


def oracle(
    portfolio: Portfolio,
    window: int,
    season: int,
    chain: tuple[str, ...],
) -> dict[str, object]:
    """Every measure by a plain loop over series and cells."""
    names = [cmp.FORECAST, *portfolio.competing, cmp.NAIVE] + ([cmp.SNAIVE] if season > 1 else [])
    cols = window_cols(portfolio, window)
    price = np.asarray(portfolio.price) if portfolio.price is not None else None
    cells: dict[int, list[int]] = {}
    for i in range(portfolio.n_series):
        for c in cols:
            d = portfolio.demand[i, c]
            if math.isnan(d):
                continue
            if all(not math.isnan(value_of(portfolio, k, i, c, season)) for k in names):
                cells.setdefault(i, []).append(c)
    # MASE scale (Hyndman & Koehler 2006): mean |D_t - D_{t-m}| over the series' history.
    scale = {}
    for i in range(portfolio.n_series):
        diffs = [
            abs(portfolio.demand[i, t] - portfolio.demand[i, t - season])
            for t in range(season, portfolio.last_actual + 1)
            if not math.isnan(portfolio.demand[i, t])
            and not math.isnan(portfolio.demand[i, t - season])
        ]
        scale[i] = sum(diffs) / len(diffs) if diffs else math.nan
    out: dict[str, object] = {"names": names, "cells": sum(len(v) for v in cells.values())}
    rows = {}
    per_series = {}
    for k in names:
        errs, dems, vals = [], [], []
        series_mase = []
        left_out = 0
        for i, cs in cells.items():
            e_i = [value_of(portfolio, k, i, c, season) - portfolio.demand[i, c] for c in cs]
            d_i = [portfolio.demand[i, c] for c in cs]
            errs += e_i
            dems += d_i
            if price is not None:
                vals += [price[i, c] for c in cs]
            sc = scale[i]
            if math.isnan(sc) or sc == 0:
                left_out += 1
            else:
                series_mase.append(sum(abs(e) for e in e_i) / len(e_i) / sc)
            per_series[(i, k)] = (e_i, d_i)
        total_d = sum(dems)
        abs_e = sum(abs(e) for e in errs)
        positive = [(e, d) for e, d in zip(errs, dems, strict=True) if d > 0]
        capped = [min(abs(e) / d, 1.0) if d > 0 else 1.0 for e, d in zip(errs, dems, strict=True)]
        rows[k] = {
            "demand": total_d,
            "abs_error": abs_e,
            "bias": sum(errs),
            "bias_pct": sum(errs) / total_d if total_d > 0 else math.nan,
            "wape": abs_e / total_d if total_d > 0 else math.nan,
            "mae": abs_e / len(errs),
            "rmse": math.sqrt(sum(e * e for e in errs) / len(errs)),
            "mase": sum(series_mase) / len(series_mase) if series_mase else math.nan,
            "mase_series": left_out,
            "mape": sum(abs(e) / d for e, d in positive) / len(positive) if positive else math.nan,
            "mape_cells_dropped": len(errs) - len(positive),
            "mape_capped": sum(capped) / len(capped),
            "errors": errs,
            "demands": dems,
        }
        if price is not None:
            rows[k]["abs_error_value"] = sum(abs(e) * p for e, p in zip(errs, vals, strict=True))
            rows[k]["bias_value"] = sum(e * p for e, p in zip(errs, vals, strict=True))
    for before, after in pairwise(chain):
        a, b = rows[before]["abs_error"], rows[after]["abs_error"]
        rows[after]["fva_units"] = a - b
        rows[after]["fva_pct"] = (a - b) / a if a > 0 else math.nan
    out["rows"] = rows
    out["per_series"] = per_series
    out["series_cells"] = cells
    out["scale"] = scale
    return out


def check_close(actual: object, expected: object, what: str) -> None:
    a, e = float(actual), float(expected)  # type: ignore[arg-type]
    if math.isnan(e):
        assert math.isnan(a), what
    else:
        assert a == pytest.approx(e, rel=1e-9, abs=1e-9), what


@pytest.mark.parametrize(("seed", "season"), [(1, 1), (2, 4), (3, 1)])
def test_portfolio_table_matches_a_plain_loop(seed: int, season: int) -> None:
    portfolio = generated(seed)
    chain = ("naive", "low", "stat", "copy", "forecast") + (("snaive",) if season > 1 else ())
    result = cmp.compare(portfolio, 13, season, steps=chain)
    expected = oracle(portfolio, 13, season, chain)
    assert list(result.names) == expected["names"]
    assert result.cells == expected["cells"]
    table = result.table.set_index("forecast_name")
    for name, row in expected["rows"].items():  # type: ignore[attr-defined]
        for column in (
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
            "fva_units",
            "fva_pct",
        ):
            check_close(table.loc[name, column], row.get(column, math.nan), f"{name} {column}")
        assert table.loc[name, "cells"] == expected["cells"]
    # Ranks: 1 = lowest, ties share the lowest rank (plain count of strictly lower values).
    for column, measure in (("rank_wape", "wape"), ("rank_mape", "mape")):
        values = {k: r[measure] for k, r in expected["rows"].items()}  # type: ignore[attr-defined]
        for k, v in values.items():
            assert table.loc[k, column] == 1 + sum(w < v for w in values.values())
    # A copy of a forecast: the same errors, so no value added between them.
    assert table.loc["forecast", "fva_units"] == 0
    assert table.loc["forecast", "p"] == 1.0
    # The missing cells of one forecast remove those cells for every forecast.
    assert result.missing["stat"] > 0
    assert result.cells < result.window_cells


def test_reference_libraries_on_the_compared_cells() -> None:
    portfolio = generated(5, priced=False)
    result = cmp.compare(portfolio, 13, 1)
    expected = oracle(portfolio, 13, 1, result.steps)
    table = result.table.set_index("forecast_name")
    for name, row in expected["rows"].items():  # type: ignore[attr-defined]
        e = np.array(row["errors"])
        d = np.array(row["demands"])
        f = d + e
        # scikit-learn mean_absolute_error and root_mean_squared_error (pooled cells).
        assert table.loc[name, "mae"] == pytest.approx(mean_absolute_error(d, f), rel=1e-12)
        assert table.loc[name, "rmse"] == pytest.approx(root_mean_squared_error(d, f), rel=1e-12)
        # statsmodels tools.eval_measures: meanabs, rmse, bias (mean of x1 - x2; forecast first
        # gives our sign).
        assert table.loc[name, "mae"] == pytest.approx(meanabs(f, d), rel=1e-12)
        assert table.loc[name, "rmse"] == pytest.approx(rmse(f, d), rel=1e-12)
        assert table.loc[name, "bias"] == pytest.approx(sm_bias(f, d) * len(d), rel=1e-9)
        # scikit-learn mean_absolute_percentage_error on the cells with demand > 0: sklearn
        # divides by max(|y|, eps) instead of leaving zero-demand cells out (and uses |y| for
        # negative demand), so only the zero-free, positive cells can be compared.
        keep = d > 0
        assert table.loc[name, "mape"] == pytest.approx(
            mean_absolute_percentage_error(d[keep], f[keep]), rel=1e-12
        )


@pytest.mark.parametrize("season", [1, 4])
def test_one_series_scores_match_the_plain_loop(season: int) -> None:
    """The review screens' metrics card (``series_scores``) counts what the plain loop counts,
    series by series: Σ|e|, Σe and WAPE over the cells where demand and every forecast exist
    (WAPE: Kolassa & Schütz 2007, docs/sources.md §1.2)."""
    portfolio = generated(11)
    cols = np.asarray(window_cols(portfolio, 10))
    names = cmp.forecast_names(portfolio, season)
    expected = oracle(portfolio, 10, season, cmp.default_steps(names))
    per_series = expected["per_series"]
    for i in range(portfolio.n_series):
        scores = cmp.series_scores(portfolio, i, cols, season)
        assert tuple(s.name for s in scores) == names
        for s in scores:
            if i not in expected["series_cells"]:  # type: ignore[operator]
                assert s.cells == 0 and s.abs_error == 0 and math.isnan(s.wape)
                continue
            e, d = per_series[(i, s.name)]  # type: ignore[index]
            assert s.cells == len(e)
            check_close(s.abs_error, sum(abs(x) for x in e), f"{i} {s.name} abs")
            check_close(s.bias, sum(e), f"{i} {s.name} bias")
            total = sum(d)
            check_close(s.wape, s.abs_error / total if total > 0 else math.nan, "wape")
            check_close(s.bias_pct, sum(e) / total if total > 0 else math.nan, "bias_pct")


def test_by_series_rows_match_a_plain_loop() -> None:
    portfolio = generated(7)
    result = cmp.compare(portfolio, 10, 1, by_series=True)
    expected = oracle(portfolio, 10, 1, result.steps)
    rows = result.by_series
    assert rows is not None
    k = len(result.names)
    assert len(rows) == portfolio.n_series * k
    per_series = expected["per_series"]
    best_count = dict.fromkeys(result.names, 0)
    for i in range(portfolio.n_series):
        block = rows.iloc[i * k : (i + 1) * k].set_index("forecast_name")
        assert block[schema.ITEM].iloc[0] == portfolio.key(i)[0]
        if i not in expected["series_cells"]:  # type: ignore[operator]
            assert (block["cells"] == 0).all() and not block["best"].any()
            continue
        sums = {}
        for name in result.names:
            e, d = per_series[(i, name)]  # type: ignore[index]
            sums[name] = sum(abs(x) for x in e)
            total = sum(d)
            check_close(block.loc[name, "abs_error"], sums[name], f"{i} {name} abs")
            check_close(block.loc[name, "bias"], sum(e), f"{i} {name} bias")
            check_close(
                block.loc[name, "wape"], sums[name] / total if total > 0 else math.nan, "wape"
            )
            pos = [(x, y) for x, y in zip(e, d, strict=True) if y > 0]
            check_close(
                block.loc[name, "mape"],
                sum(abs(x) / y for x, y in pos) / len(pos) if pos else math.nan,
                "mape",
            )
            sc = expected["scale"][i]  # type: ignore[index]
            mase = sums[name] / len(e) / sc if sc == sc and sc > 0 else math.nan
            check_close(block.loc[name, "mase"], mase, f"{i} {name} mase")
        low = min(sums.values())
        for name in result.names:
            # best: the lowest abs error over the series' compared cells; ties all true.
            assert bool(block.loc[name, "best"]) == (sums[name] == low)
            best_count[name] += sums[name] == low
        for before, after in pairwise(result.steps):
            check_close(block.loc[after, "fva_units"], sums[before] - sums[after], "fva")
            # The series' own test: its per-cell differential, statsmodels OLS on a constant
            # with a HAC covariance of 0 lags, times the Harvey-Leybourne-Newbold factor.
            e_b, _ = per_series[(i, before)]  # type: ignore[index]
            e_a, _ = per_series[(i, after)]  # type: ignore[index]
            diff = np.abs(e_b) - np.abs(e_a)
            t = len(diff)
            if t >= 2 and np.var(diff) > 1e-9:
                fit = sm.OLS(diff, np.ones(t)).fit(
                    cov_type="HAC", cov_kwds={"maxlags": 0, "use_correction": False}
                )
                stat = float(fit.params[0] / fit.bse[0]) * math.sqrt((t - 1) / t)
                check_close(block.loc[after, "dm_stat"], stat, f"{i} {after} dm")
                check_close(
                    block.loc[after, "p"], 2 * stats.t.sf(abs(stat), t - 1), f"{i} {after} p"
                )
    table = result.table.set_index("forecast_name")
    for name, n_best in best_count.items():
        assert table.loc[name, "series_best"] == n_best
    # ``copy`` equals ``forecast``: both are best together wherever one is (ties all true).
    assert (
        rows.loc[rows["forecast_name"] == "copy", "best"].to_numpy()
        == rows.loc[rows["forecast_name"] == "forecast", "best"].to_numpy()
    ).all()


# --------------------------------------------------------------------------------------------
# The paired test
# --------------------------------------------------------------------------------------------


def test_diebold_mariano_worked_by_hand() -> None:
    # Diebold & Mariano (1995) with h = 1: d = 1, 2, 3, 4. d̄ = 2.5; γ0 = (2.25 + 0.25 + 0.25 +
    # 2.25) / 4 = 1.25; DM = 2.5 / √(1.25 / 4) = 4.4721; Harvey, Leybourne & Newbold (1997):
    # × √((4 + 1 − 2) / 4) = 3.8730, against t with 3 degrees of freedom.
    stat, p = cmp.diebold_mariano(np.array([[1.0, 2.0, 3.0, 4.0]]), np.ones((1, 4), bool))
    assert stat[0] == pytest.approx(2.5 / math.sqrt(1.25 / 4) * math.sqrt(3 / 4), rel=1e-12)
    assert stat[0] == pytest.approx(3.872983, rel=1e-6)
    assert p[0] == pytest.approx(2 * stats.t.sf(3.872983346, 3), rel=1e-6)


@pytest.mark.parametrize("lags", [0, 1, 2])
def test_diebold_mariano_against_statsmodels_hac(lags: int) -> None:
    # The variance of d̄ is that of statsmodels OLS of d on a constant with a HAC (Bartlett)
    # covariance of the same lags, without its small-sample correction.
    rng = np.random.default_rng(lags)
    d = rng.normal(0.3, 1, 20).cumsum() * 0.1 + rng.normal(0, 1, 20)
    fit = sm.OLS(d, np.ones(20)).fit(
        cov_type="HAC", cov_kwds={"maxlags": lags, "use_correction": False}
    )
    raw = float(fit.params[0] / fit.bse[0])
    h = lags + 1
    hln = math.sqrt((20 + 1 - 2 * h + h * (h - 1) / 20) / 20)
    stat, p = cmp.diebold_mariano(d[None, :], np.ones((1, 20), bool), lags)
    assert stat[0] == pytest.approx(raw * hln, rel=1e-9)
    assert p[0] == pytest.approx(2 * stats.t.sf(abs(raw * hln), 19), rel=1e-9)


def test_diebold_mariano_edges() -> None:
    counted = np.array([[True, False, False], [True, True, True], [True, True, True]])
    d = np.array([[5.0, 0, 0], [0.0, 0.0, 0.0], [2.0, 2.0, 2.0]])
    stat, p = cmp.diebold_mariano(d, counted)
    # One period: no test. Identical losses: no difference (p = 1). A constant non-zero
    # difference has no variance: p undefined, never a made-up 0.
    assert math.isnan(p[0]) and math.isnan(stat[0])
    assert p[1] == 1.0 and stat[1] == 0.0
    assert math.isnan(p[2])


def test_portfolio_test_uses_the_per_period_differential() -> None:
    portfolio = generated(11, priced=False)
    result = cmp.compare(portfolio, 13, 1, steps=("naive", "forecast"))
    cols = window_cols(portfolio, 13)
    expected = oracle(portfolio, 13, 1, ("naive", "forecast"))
    cells = expected["series_cells"]
    diff = []
    for c in cols:
        total = 0.0
        for i, cs in cells.items():  # type: ignore[attr-defined]
            if c in cs:
                d = portfolio.demand[i, c]
                total += abs(value_of(portfolio, "naive", i, c, 1) - d) - abs(
                    portfolio.forecast[i, c] - d
                )
        diff.append(total)
    fit = sm.OLS(np.array(diff), np.ones(len(diff))).fit(
        cov_type="HAC", cov_kwds={"maxlags": 0, "use_correction": False}
    )
    t = len(diff)
    stat = float(fit.params[0] / fit.bse[0]) * math.sqrt((t - 1) / t)
    table = result.table.set_index("forecast_name")
    row = {column: table.loc["forecast", column] for column in table.columns}
    assert row["dm_stat"] == pytest.approx(stat, rel=1e-9)
    assert row["p"] == pytest.approx(2 * stats.t.sf(abs(stat), t - 1), rel=1e-9)
    assert sum(diff) == pytest.approx(row["fva_units"], rel=1e-9)


# --------------------------------------------------------------------------------------------
# Common practice: how MAPE misleads
# --------------------------------------------------------------------------------------------


def _one_series(
    demand: list[float], forecast: list[float], competing: dict[str, list[float]]
) -> Portfolio:
    portfolio = portfolio_from(series_records(demand, forecast))
    return dataclasses.replace(
        portfolio, competing={k: np.array([v], dtype=np.float64) for k, v in competing.items()}
    )


def test_mape_is_undefined_at_zero_demand() -> None:
    # Common practice: |e| / demand has no value where demand is 0; such cells are left out
    # and counted, and with nothing else left MAPE is undefined.
    portfolio = _one_series([4.0, 0.0, 0.0, 0.0], [1.0, 2.0, 0.0, 1.0], {})
    result = cmp.compare(portfolio, 3, 1)
    table = result.table.set_index("forecast_name")
    row = {column: table.loc["forecast", column] for column in table.columns}
    assert math.isnan(row["mape"])
    assert row["mape_cells_dropped"] == 3
    assert row["mape_capped"] == 1.0  # every cell counted as 100%
    assert math.isnan(row["wape"])  # Σdemand = 0 too: undefined, never a number
    assert row["abs_error"] == 3.0


def test_the_capped_repair_rewards_a_zero_forecast() -> None:
    # Common practice (the spreadsheet repair): cap each ratio at 100% and count demand <= 0
    # as 100%. A zero forecast then scores exactly 100% whatever it misses, and a perfect
    # forecast of intermittent demand scores 80%: the repair says they differ by a quarter
    # while WAPE says one is perfect and the other misses everything.
    demand = [0.0, 0.0, 0.0, 0.0, 10.0]
    portfolio = _one_series([5.0, *demand], [0.0, *demand], {"zero": [0.0] * 6})
    result = cmp.compare(portfolio, 5, 1)
    table = result.table.set_index("forecast_name")
    assert table.loc["forecast", "mape_capped"] == pytest.approx(0.8)
    assert table.loc["zero", "mape_capped"] == 1.0
    assert table.loc["forecast", "wape"] == 0.0
    assert table.loc["zero", "wape"] == 1.0
    # And on small volumes a zero forecast comes within 25% of a forecast 25 times better.
    portfolio = _one_series([1.0, 1, 1, 1, 1, 96], [0.0, 2, 2, 2, 2, 96], {"zero": [0.0] * 6})
    table = cmp.compare(portfolio, 5, 1).table.set_index("forecast_name")
    assert table.loc["zero", "mape_capped"] / table.loc["forecast", "mape_capped"] == 1.25
    assert table.loc["zero", "wape"] / table.loc["forecast", "wape"] == pytest.approx(25.0)


def test_mape_favours_a_low_forecast_and_the_verdict_warns() -> None:
    # Common practice: MAPE divides by demand, so missing low costs less than missing high.
    # forecast: 18, 22 against 10, 30 (WAPE 40%, no bias); low: 10, 10 (WAPE 50%, 50% under).
    portfolio = _one_series([20.0, 10.0, 30.0], [0.0, 18.0, 22.0], {"low": [0.0, 10.0, 10.0]})
    result = cmp.compare(portfolio, 2, 1)
    table = result.table.set_index("forecast_name")
    assert table.loc["forecast", "wape"] == pytest.approx(0.4)
    assert table.loc["low", "mape"] < table.loc["forecast", "mape"]
    assert table.loc["low", "rank_mape"] == 1 and table.loc["forecast", "rank_wape"] == 1
    assert result.verdict == cmp.Verdict(
        best="forecast", lowest_wape="forecast", mape_pick="low", mape_warning=True
    )


def test_verdict_skips_a_biased_forecast_and_warns_only_for_under() -> None:
    # high has the lowest WAPE but is 10% over: the best is the unbiased one; MAPE's pick is
    # high (over, not under), so no warning.
    portfolio = _one_series([50.0, 100.0, 100.0], [0.0, 90.0, 112.0], {"high": [0.0, 110.0, 110.0]})
    v = cmp.compare(portfolio, 2, 1).verdict
    assert v.lowest_wape == "high" and v.best == "forecast"
    assert v.mape_pick == "high" and not v.mape_warning


def test_one_compared_cell() -> None:
    portfolio = _one_series([3.0, 5.0], [0.0, 4.0], {"b": [math.nan, 6.0]})
    result = cmp.compare(portfolio, 1, 1, steps=("naive", "b", "forecast"))
    table = result.table.set_index("forecast_name")
    assert result.cells == 1
    assert table.loc["b", "rmse"] == 1.0 and table.loc["naive", "abs_error"] == 2.0
    assert table.loc["b", "fva_units"] == 1.0
    assert table.loc["forecast", "fva_units"] == 0.0
    # One period: too few for the test, whatever the difference.
    assert table["p"].isna().all()


# --------------------------------------------------------------------------------------------
# Steps, names and refusals
# --------------------------------------------------------------------------------------------


def test_default_steps_and_snaive_only_when_listed() -> None:
    portfolio = generated(2, n=5)
    assert cmp.compare(portfolio, 13, 4).steps == ("naive", "stat", "copy", "low", "forecast")
    names = cmp.forecast_names(portfolio, 4)
    assert names == ("forecast", "stat", "copy", "low", "naive", "snaive")
    assert cmp.parse_steps("snaive, forecast", names) == ("snaive", "forecast")


def test_bad_steps_name_the_unknown_and_the_available() -> None:
    names = ("forecast", "stat", "naive")
    with pytest.raises(TriageError, match="'bogus'") as info:
        cmp.parse_steps("naive,bogus", names)
    assert "forecast, stat, naive" in str(info.value)
    with pytest.raises(TriageError, match="--season"):
        cmp.parse_steps("snaive", names)
    with pytest.raises(TriageError, match="twice"):
        cmp.parse_steps("naive,stat,naive", names)
    with pytest.raises(TriageError, match="empty"):
        cmp.parse_steps("naive,,stat", names)


def test_a_competing_forecast_named_like_a_benchmark_is_refused() -> None:
    portfolio = _one_series([1.0, 2.0], [1.0, 2.0], {"naive": [1.0, 1.0]})
    with pytest.raises(TriageError, match="forecast_naive"):
        cmp.compare(portfolio, 1, 1)


def test_no_compared_cell_is_refused() -> None:
    portfolio = _one_series([1.0, 2.0, 3.0], [1.0, 2.0, 3.0], {"b": [1.0, math.nan, math.nan]})
    with pytest.raises(TriageError, match="no cell of the scoring window") as info:
        cmp.compare(portfolio, 2, 1)
    assert "b is missing in 2 of the 2 cells with demand" in str(info.value)


def test_without_competing_forecasts_forecast_meets_naive() -> None:
    portfolio = portfolio_from(series_records([1.0, 2.0, 4.0, 3.0], [1.0, 1.5, 3.0, 3.5]))
    result = cmp.compare(portfolio, 3, 2)
    assert result.names == ("forecast", "naive", "snaive")
    assert result.steps == ("naive", "forecast")


# --------------------------------------------------------------------------------------------
# Properties
# --------------------------------------------------------------------------------------------

PROPERTY = settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@PROPERTY
@given(st.integers(0, 10_000), st.sampled_from(["stat", "low", "naive"]))
def test_a_copy_adds_no_value(seed: int, source: str) -> None:
    # FVA between a forecast and its exact copy is 0 and the test finds no difference.
    portfolio = generated(seed, n=12, periods=16, priced=False)
    names = cmp.forecast_names(portfolio)
    values = (
        portfolio.competing[source]
        if source in portfolio.competing
        else np.concatenate(
            [np.full((portfolio.n_series, 1), np.nan), portfolio.demand[:, :-1]], axis=1
        )
    )
    twin = dataclasses.replace(portfolio, competing={**portfolio.competing, "twin": values.copy()})
    assert "twin" not in names
    result = cmp.compare(twin, 13, 1, steps=(source, "twin"), by_series=True)
    table = result.table.set_index("forecast_name")
    row = {column: table.loc["twin", column] for column in table.columns}
    assert row["fva_units"] == 0 and row["fva_pct"] == 0 and row["p"] == 1.0
    assert result.by_series is not None
    fva = result.by_series.loc[result.by_series["forecast_name"] == "twin", "fva_units"]
    assert (fva.dropna() == 0).all()


@PROPERTY
@given(st.integers(0, 10_000), st.sampled_from([0.001, 0.37, 3.0, 1e4, 0.125, 2.0, 1024.0]))
def test_scaling_leaves_fractions_unchanged(seed: int, c: float) -> None:
    portfolio = generated(seed, n=12, periods=16, priced=False)
    scaled = dataclasses.replace(
        portfolio,
        demand=portfolio.demand * c,
        forecast=portfolio.forecast * c,
        competing={k: v * c for k, v in portfolio.competing.items()},
    )
    a = cmp.compare(portfolio, 13, 2).table
    b = cmp.compare(scaled, 13, 2).table
    for column in ("bias_pct", "wape", "mase", "mape", "mape_capped", "fva_pct", "p"):
        np.testing.assert_allclose(b[column], a[column], rtol=1e-9, atol=1e-12, err_msg=column)
    for column in ("cells", "mape_cells_dropped"):
        assert (a[column] == b[column]).all(), column
    if math.frexp(c)[0] == 0.5:
        # A power of two scales every sum exactly, so ties (who is best, ranks) stay ties; any
        # other factor rounds, and two forecasts a rounding apart may swap.
        for column in ("rank_wape", "rank_mape", "series_best"):
            assert (a[column] == b[column]).all(), column
