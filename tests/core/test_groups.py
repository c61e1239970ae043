"""The group scorecard (``triage.core.groups``) against a plain pandas ``groupby`` on generated
data with every edge case: a group of one series, a group priced at zero, series with missing
periods, and a group whose series cancel exactly.

Sources named beside the checks: the exact sign test against scipy's ``stats.binomtest``; the
triangle inequality |Σe| ≤ Σ|e| (any analysis text); WAPE Σ|e| / Σdemand (Kolassa & Schütz 2007,
docs/sources.md §1.2). The persistent-bias rule itself is the project's (docs/metrics.md,
"Persistent bias"), re-derived here plainly from its definition.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from helpers import portfolio_from
from scipy import stats

from triage.core import groups, metrics, ranking, schema
from triage.core.errors import TriageError
from triage.core.portfolio import Portfolio

WINDOW = 8


def generated(seed: int, *, priced: bool = True) -> Portfolio:
    """Series in families x locations; ``solo`` has one series, ``free`` is priced at zero,
    ``twin`` holds two series whose errors cancel exactly in every period."""
    rng = np.random.default_rng(seed)
    records = []
    plan = [(f"fam{f}", loc) for f in range(3) for loc in ("N", "S")]
    s = 0
    for family, location in plan:
        for _ in range(int(rng.integers(2, 6))):
            records += _series(rng, f"S{s:03d}", location, family, priced, price=rng.uniform(1, 9))
            s += 1
    records += _series(rng, "SOLO", "N", "solo", priced, price=3.0)
    records += _series(rng, "FREE1", "S", "free", priced, price=0.0)
    records += _series(rng, "FREE2", "N", "free", priced, price=0.0)
    # Two series erring by +k and -k in the same periods: the group's total is exact.
    for name, sign in (("TWIN1", 1.0), ("TWIN2", -1.0)):
        for t in range(14):
            row = {
                schema.ITEM: name,
                schema.LOCATION: "S",
                schema.PERIOD: t,
                schema.DEMAND: 50.0,
                schema.FORECAST: 50.0 + sign * (3 + t % 4),
                "family": "twin",
            }
            if priced:
                row[schema.PRICE] = 2.0
            records.append(row)
    return portfolio_from(records, attributes=("family",))


def _series(rng, item, location, family, priced, *, price) -> list[dict[str, object]]:
    level = rng.uniform(1, 40)
    tilt = rng.choice([0.7, 1.0, 1.3])
    rows = []
    for t in range(14):
        u = rng.random()
        demand = (
            math.nan
            if u < 0.08
            else 0.0
            if u < 0.15
            else -2.0
            if u < 0.17
            else float(rng.poisson(level))
        )
        forecast = math.nan if rng.random() < 0.06 else float(rng.gamma(4, level * tilt / 4))
        row = {
            schema.ITEM: item,
            schema.LOCATION: location,
            schema.PERIOD: t,
            schema.DEMAND: demand,
            schema.FORECAST: forecast,
            "family": family,
        }
        if priced:
            row[schema.PRICE] = float(price)
        rows.append(row)
    return rows


def plain(portfolio: Portfolio, by: list[str], window: int) -> pd.DataFrame:
    """Every group measure by pandas groupby over the window cells, plus plain loops."""
    cols = metrics.window_columns(portfolio.demand, portfolio.last_actual, window)
    keys = portfolio.keys.reset_index(drop=True)
    cells = []
    for i in range(portfolio.n_series):
        for c in cols:
            d, f = portfolio.demand[i, c], portfolio.forecast[i, c]
            price = float(portfolio.price[i, c]) if portfolio.price is not None else math.nan
            cells.append({"series": i, "period": int(c), "d": d, "f": f, "price": price})
    frame = pd.DataFrame(cells)
    for name in by:
        frame[name] = keys[name].to_numpy(dtype=object)[frame["series"]]
    frame["item"] = keys[schema.ITEM].to_numpy(dtype=object)[frame["series"]]
    counted = frame[frame["d"].notna() & frame["f"].notna()].copy()
    counted["e"] = counted["f"] - counted["d"]
    counted["abs"] = counted["e"].abs()
    counted["abs_value"] = counted["abs"] * counted["price"]
    counted["bias_value"] = counted["e"] * counted["price"]
    grouped = counted.groupby(by, sort=True)
    out = grouped.agg(
        demand=("d", "sum"),
        forecast=("f", "sum"),
        abs_error=("abs", "sum"),
        bias=("e", "sum"),
        abs_error_value=("abs_value", "sum"),
        bias_value=("bias_value", "sum"),
    )
    members = frame.groupby(by, sort=True)["series"].nunique().rename("series")
    out = (
        members.to_frame()
        .join(out)
        .fillna({c: 0.0 for c in ("demand", "forecast", "abs_error", "bias")})
    )
    per_period = counted.groupby([*by, "period"], sort=True)["e"].sum()
    out["aggregate_abs_error"] = per_period.abs().groupby(level=by).sum()
    out["aggregate_abs_error"] = out["aggregate_abs_error"].fillna(0.0)
    # The persistent-bias rule applied to each group's total, from its definition.
    flags = {}

    def one(key: tuple[str, ...]) -> object:
        return key if len(by) > 1 else key[0]

    for key, totals in per_period.groupby(level=by):
        key = one(key)
        e = totals.to_numpy()
        nonzero = int((e != 0).sum())
        positive = int((e > 0).sum())
        p = stats.binomtest(positive, nonzero, 0.5).pvalue if nonzero else 1.0
        direction = 0
        if p <= metrics.BIAS_ALPHA and 2 * positive != nonzero:
            direction = 1 if 2 * positive > nonzero else -1
        else:
            run, sign = 0, 0
            for value in e[::-1]:
                now = int(np.sign(value))
                if run == 0 and sign == 0:
                    sign = now
                    if now == 0:
                        break
                    run = 1
                elif now == sign:
                    run += 1
                else:
                    break
            if run >= metrics.BIAS_RUN:
                direction = sign
        row = out.loc[key]
        total_bias, total_demand = float(row["bias"]), float(row["demand"])
        material = total_demand <= 0 or abs(total_bias) >= metrics.BIAS_MATERIAL * total_demand
        flags[key] = {1: "over", -1: "under", 0: ""}[
            direction if (np.sign(total_bias) == direction and material) else 0
        ]
    out["bias_flag"] = pd.Series(flags)
    out["bias_flag"] = out["bias_flag"].fillna("")
    error_col = "abs_error_value" if portfolio.price is not None else "abs_error"
    series_error = counted.groupby("series")["abs_value" if portfolio.price else "abs"].sum()
    total = float(out[error_col].sum())
    out["error_share"] = out[error_col] / total
    # Top series: the largest series-level error in the group, first in portfolio order on ties.
    top = {}
    for key, part in frame.groupby(by, sort=True):
        key = one(key)
        best = max(sorted(part["series"].unique()), key=lambda i: (series_error.get(i, 0.0), -i))
        top[key] = f"{keys[schema.ITEM].iat[best]} @ {keys[schema.LOCATION].iat[best]}"
    out["top_series"] = pd.Series(top)
    return out


@pytest.mark.parametrize("priced", [True, False])
@pytest.mark.parametrize("by", [["family"], ["family", "location"], ["location"]])
def test_group_scorecard_matches_a_plain_groupby(priced: bool, by: list[str]) -> None:
    portfolio = generated(3, priced=priced)
    card = ranking.scorecard(portfolio, WINDOW)
    cols = metrics.window_columns(portfolio.demand, portfolio.last_actual, WINDOW)
    grouping = groups.grouping(portfolio, by)
    table = groups.group_scorecard(portfolio, card, cols, grouping)
    expected = plain(portfolio, by, WINDOW)
    got = table.set_index(by).sort_index()
    assert list(got.index) == list(expected.index)
    for column in ("demand", "forecast", "abs_error", "bias", "aggregate_abs_error"):
        np.testing.assert_allclose(got[column], expected[column], rtol=1e-12, atol=1e-9)
    if priced:
        for column in ("abs_error_value", "bias_value"):
            np.testing.assert_allclose(got[column], expected[column], rtol=1e-12, atol=1e-9)
    else:
        assert "abs_error_value" not in table
    np.testing.assert_array_equal(got["series"], expected["series"])
    np.testing.assert_allclose(got["error_share"], expected["error_share"], rtol=1e-12)
    # WAPE Σ|e| / Σdemand (Kolassa & Schütz 2007), undefined when Σdemand <= 0.
    wape = np.where(expected["demand"] > 0, expected["abs_error"] / expected["demand"], np.nan)
    np.testing.assert_allclose(got["wape"], wape, rtol=1e-12)
    assert list(got["bias_flag"]) == list(expected["bias_flag"])
    assert list(got["top_series"]) == list(expected["top_series"])
    # Triangle inequality: the total's error never exceeds the series' summed error.
    assert (got["aggregate_abs_error"] <= got["abs_error"] + 1e-9).all()
    # Ranked by share, ties by key; cum_share runs to 1 in rank order.
    ranked = table.sort_values("rank")
    assert list(ranked.index) == list(table.index)
    shares = ranked["error_share"].to_numpy()
    assert (np.diff(shares) <= 1e-15).all()
    assert ranked["cum_share"].iloc[-1] == 1.0
    np.testing.assert_allclose(ranked["cum_share"], np.cumsum(shares), rtol=1e-12)
    flagged = card.assign(flag=card["bias_flag"] != "")  # the card carries every key column
    counts = flagged.groupby(by, sort=True)["flag"].sum()
    np.testing.assert_array_equal(got["flagged_series"], counts.to_numpy())


def test_edge_groups() -> None:
    portfolio = generated(5)
    card = ranking.scorecard(portfolio, WINDOW)
    cols = metrics.window_columns(portfolio.demand, portfolio.last_actual, WINDOW)
    table = groups.group_scorecard(
        portfolio, card, cols, groups.grouping(portfolio, ["family"])
    ).set_index("family")
    assert table.loc["solo", "series"] == 1
    solo = card.set_index(schema.ITEM).loc["SOLO"]
    assert table.loc["solo", "abs_error"] == pytest.approx(solo["abs_error"])
    assert table.loc["free", "abs_error_value"] == 0.0 and table.loc["free", "error_share"] == 0.0
    twin = table.loc["twin"]
    assert twin["aggregate_abs_error"] == 0.0 and twin["bias"] == 0.0
    assert twin["abs_error"] > 0 and twin["bias_flag"] == ""
    # Each twin is flagged on its own (every error one way), the total is not: a mix problem.
    assert twin["flagged_series"] == 2


def test_bias_order_puts_flagged_groups_first() -> None:
    portfolio = generated(9)
    card = ranking.scorecard(portfolio, WINDOW)
    cols = metrics.window_columns(portfolio.demand, portfolio.last_actual, WINDOW)
    grouping = groups.grouping(portfolio, ["family", "location"])
    table = groups.group_scorecard(portfolio, card, cols, grouping, by="bias")
    flagged = (table["bias_flag"] != "").to_numpy()
    assert flagged.any() and not flagged[np.argmin(flagged) :].any()
    size = table["bias_value"].abs().to_numpy()
    for part in (size[flagged], size[~flagged]):
        assert (np.diff(part) <= 1e-12).all()
    assert list(table["bias_rank"]) == list(range(1, len(table) + 1))


def test_group_columns_are_checked() -> None:
    portfolio = generated(1)
    assert groups.parse_group_columns(portfolio, "family, location") == ("family", "location")
    for text, words in (
        ("item", "one series per group"),
        ("colour", "no column 'colour'"),
        ("family,,location", "empty column name"),
        ("family,family", "named twice"),
    ):
        with pytest.raises(TriageError, match=words):
            groups.parse_group_columns(portfolio, text)
