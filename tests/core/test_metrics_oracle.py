"""The scorecard against a plain per-series implementation of the scoring contract.

The oracle below reads the long rows directly (no dense arrays, no numpy reductions) and follows
the contract word by word, one series at a time. Generated data use integer demand and forecast
and dyadic prices, so every sum is exact and ties in error are real ties.

Sources of the definitions the oracle follows (also named beside each column below):
Hyndman & Koehler (2006) "Another look at measures of forecast accuracy" for MAE, RMSE and MASE;
Kolassa & Schütz (2007) for WAPE (MAD/mean ratio); Brown's tracking signal as described by
Trigg (1964); the exact two-sided binomial sign test; Gilliland (2010) for forecast value added
over the naive forecast; Syntetos, Boylan & Croston (2005) for ADI, CV² and the 1.32 / 0.49
cut-offs (inclusive non-smooth side as in the R ``m5`` package).
"""

from __future__ import annotations

import math
from collections import defaultdict
from fractions import Fraction
from functools import lru_cache

import numpy as np
import pandas as pd
import pytest
from helpers import long_frame, portfolio_from

from triage.core import metrics, ranking, schema

#: History periods, forward periods, and two calendar holes inside the history.
HISTORY = {schema.WEEKLY: 44, schema.MONTHLY: 30}
FORWARD = 6
#: Rows exist (forecast only) but no series has an actual: a closed period, skipped by the window.
CLOSED_BACK = 4
#: No row at all for any series.
EMPTY_BACK = 9

PRICES = (0.25, 0.5, 1.5, 2.75, 4.0, 12.5)
LOCATIONS = ("north", "south", "east")

KINDS = (
    "regular",
    "regular",
    "regular",
    "regular",
    "short",
    "intermittent",
    "erratic",
    "negative",
    "net_returns",
    "perfect",
    "zero_window",
    "single",
    "no_window_actuals",
    "no_forecast",
    "flat",
    "over",
    "under",
    "late_run",
    "zero_demand",
    "forward_only",
    "tie",
    "adi_boundary",
    "cv2_boundary",
)


# --------------------------------------------------------------------------------------------
# Data
# --------------------------------------------------------------------------------------------


def _cells(rng: np.random.Generator, kind: str, hist: int) -> list[tuple[int, float, float]]:
    """(period, demand, forecast) of one series' history rows; NaN is an empty cell."""
    nan = math.nan
    open_periods = [t for t in range(hist) if t not in (hist - CLOSED_BACK, hist - EMPTY_BACK)]
    if kind == "adi_boundary" and len(open_periods) >= 33:
        # ADI exactly 33/25 = 1.32 with equal sizes: intermittent on the inclusive rule.
        demand_list = [10.0] * 25 + [0.0] * 8
        rng.shuffle(demand_list)
        return [(t, d, 9.0) for t, d in zip(open_periods[-33:], demand_list, strict=True)]
    if kind in ("adi_boundary", "cv2_boundary"):
        # Sizes 17 and 3 in equal numbers: mean 10, variance 49, CV² exactly 0.49 (erratic).
        demand_list = [17.0, 3.0] * 10
        rng.shuffle(demand_list)
        return [(t, d, 10.0) for t, d in zip(open_periods[-20:], demand_list, strict=True)]
    periods = np.arange(hist)
    level = int(rng.integers(3, 150))
    demand = rng.poisson(level, hist).astype(float)
    noise = rng.integers(-(level // 2) - 1, level // 2 + 2, hist).astype(float)
    forecast = np.maximum(demand + noise, 0.0)
    drop = rng.random(hist) < 0.1
    if kind == "short":
        # Starts late: fewer periods than the window.
        periods = periods[hist - int(rng.integers(2, 9)) :]
    elif kind == "intermittent":
        demand = np.where(rng.random(hist) < 0.3, rng.integers(1, 40, hist), 0).astype(float)
        forecast = rng.integers(0, 10, hist).astype(float)
    elif kind == "erratic":
        demand = np.where(
            rng.random(hist) < 0.5, rng.integers(1, 6, hist), rng.integers(60, 150, hist)
        )
        demand = demand.astype(float)
    elif kind == "negative":
        demand = rng.integers(-30, 40, hist).astype(float)
        forecast = rng.integers(-10, 40, hist).astype(float)
    elif kind == "net_returns":
        demand = rng.integers(-25, 3, hist).astype(float)
        forecast = rng.integers(-5, 5, hist).astype(float)
    elif kind == "perfect":
        forecast = demand.copy()
    elif kind == "zero_window":
        demand[-16:] = 0.0
        forecast[-16:] = 0.0
        drop[-16:] = False
    elif kind == "single":
        periods = np.array([int(rng.integers(0, hist))])
    elif kind == "no_window_actuals":
        demand[12:] = nan
    elif kind == "no_forecast":
        forecast[:] = nan
    elif kind == "flat":
        demand[:] = float(level)
    elif kind == "over":
        forecast = demand + rng.integers(1, 12, hist)
    elif kind == "under":
        forecast = demand - rng.integers(1, 12, hist)
    elif kind == "late_run":
        # Balanced signs, then the latest seven all over-forecast: caught by the run rule.
        signs = np.where(np.arange(hist) % 2 == 0, 1.0, -1.0)
        signs[-7:] = 1.0
        forecast = demand + signs * rng.integers(1, 6, hist)
        drop[:] = False
    elif kind == "zero_demand":
        demand[:] = 0.0
        forecast = rng.integers(0, 4, hist).astype(float)
    elif kind == "forward_only":
        return []
    if kind not in ("single", "zero_window", "late_run"):
        periods = periods[~drop[periods]]
    out = []
    for t in periods:
        d = demand[t] if rng.random() > 0.05 else nan
        f = forecast[t] if rng.random() > 0.05 else nan
        out.append((int(t), float(d), float(f)))
    return out


@lru_cache(maxsize=16)
def generate(seed: int, freq: str, priced: bool, located: bool) -> tuple[dict[str, object], ...]:
    """Long records (integer period numbers) of a few hundred series of every kind."""
    rng = np.random.default_rng(seed)
    hist = HISTORY[freq]
    closed, empty = hist - CLOSED_BACK, hist - EMPTY_BACK
    n_items = 90 if located else 240
    # Lexicographic and numeric order differ ("SKU-1000" < "SKU-99"), so key order is exercised.
    numbers = rng.choice(np.arange(5, 3000), size=n_items, replace=False)
    items = [f"SKU-{n}" for n in numbers]
    keys = [(i, loc) for i in items for loc in LOCATIONS if not located or rng.random() < 0.9]
    if not located:
        keys = [(i, None) for i in items]
    # An anchor series with an actual in every open period fixes the calendar and the window.
    series: list[tuple[tuple[str, str | None], list[tuple[int, float, float]]]] = [
        (
            ("SKU-0", LOCATIONS[0] if located else None),
            [(t, 50.0 + t % 7, 48.0) for t in range(hist)],
        )
    ]
    for key in keys:
        kind = KINDS[int(rng.integers(len(KINDS)))]
        if kind == "tie" and len(series) > 1:
            # The same cells as an earlier series under another key: an exact tie in error.
            cells = list(series[int(rng.integers(1, len(series)))][1])
        else:
            cells = _cells(rng, kind, hist)
        series.append((key, cells))

    records: list[dict[str, object]] = []
    for (item, location), cells in series:
        cells = [c for c in cells if c[0] != empty]
        cells = [(t, math.nan if t == closed else d, f) for t, d, f in cells]
        forward = [
            (t, math.nan, float(rng.integers(0, 60)))
            for t in range(hist, hist + FORWARD)
            if rng.random() < 0.7
        ]
        rows = cells + forward
        if not rows:
            rows = [(hist, math.nan, 5.0)]
        base = float(rng.choice(PRICES))
        change = int(rng.integers(0, hist + FORWARD))
        prices = [
            (base * (2.0 if t >= change else 1.0)) if rng.random() > 0.2 else math.nan
            for t, _, _ in rows
        ]
        if all(math.isnan(p) for p in prices):
            prices[int(rng.integers(len(prices)))] = base
        for (t, d, f), p in zip(rows, prices, strict=True):
            rec: dict[str, object] = {schema.ITEM: item}
            if located:
                rec[schema.LOCATION] = location
            rec.update({schema.PERIOD: t, schema.DEMAND: d, schema.FORECAST: f})
            if priced:
                rec[schema.PRICE] = p
            rec["family"] = f"fam-{int(rng.integers(3))}"
            records.append(rec)
    order = rng.permutation(len(records))
    return tuple(records[i] for i in order)


# --------------------------------------------------------------------------------------------
# Oracle
# --------------------------------------------------------------------------------------------


def _isnan(value: object) -> bool:
    return isinstance(value, float) and math.isnan(value)


def sign_test_p(k: int, n: int) -> float:
    """Exact two-sided binomial test, p = 0.5: total probability of outcomes no likelier than k."""
    if n == 0:
        return 1.0
    ck = math.comb(n, k)
    tail = sum(math.comb(n, j) for j in range(n + 1) if math.comb(n, j) <= ck)
    return min(1.0, tail / 2**n)


def _price_at(given: dict[int, float], t: int) -> float:
    """The price at t, else the nearest earlier given price, else the first later one."""
    if t in given:
        return given[t]
    earlier = [p for p in given if p < t]
    if earlier:
        return given[max(earlier)]
    return given[min(p for p in given if p > t)]


def oracle(
    records: tuple[dict[str, object], ...], window: int, season: int, priced: bool, located: bool
) -> pd.DataFrame:
    """The scorecard, computed series by series from the contract text."""
    actual_periods = sorted({r[schema.PERIOD] for r in records if not _isnan(r[schema.DEMAND])})
    latest = actual_periods[-1]
    win = actual_periods[-window:]

    by_key: dict[tuple[str, ...], list[dict[str, object]]] = defaultdict(list)
    for r in records:
        key = (r[schema.ITEM], r[schema.LOCATION]) if located else (r[schema.ITEM],)
        by_key[key].append(r)

    rows = []
    for key, recs in by_key.items():
        demand_at = {
            r[schema.PERIOD]: r[schema.DEMAND]
            for r in recs
            if not _isnan(r[schema.DEMAND]) and r[schema.PERIOD] <= latest
        }
        forecast_at = {
            r[schema.PERIOD]: r[schema.FORECAST] for r in recs if not _isnan(r[schema.FORECAST])
        }
        counted = [t for t in win if t in demand_at and t in forecast_at]
        errors = [forecast_at[t] - demand_at[t] for t in counted]
        n = len(errors)
        sum_d = sum(demand_at[t] for t in counted)
        sum_f = sum(forecast_at[t] for t in counted)
        abs_err = sum(abs(e) for e in errors)
        bias = sum(errors)
        mae = abs_err / n if n else math.nan
        row: dict[str, object] = dict(
            zip(("item", "location") if located else ("item",), key, strict=True)
        )
        row.update(
            periods=n,
            demand=sum_d,
            forecast=sum_f,
            abs_error=abs_err,
            bias=bias,
            bias_pct=bias / sum_d if sum_d > 0 else math.nan,
            wape=abs_err / sum_d if sum_d > 0 else math.nan,
            mae=mae,
            rmse=math.sqrt(sum(e * e for e in errors) / n) if n else math.nan,
        )
        if priced:
            given = {r[schema.PERIOD]: r[schema.PRICE] for r in recs if not _isnan(r[schema.PRICE])}
            prices = [_price_at(given, t) for t in counted]
            row["abs_error_value"] = sum(abs(e) * p for e, p in zip(errors, prices, strict=True))
            row["bias_value"] = sum(e * p for e, p in zip(errors, prices, strict=True))

        # Brown's tracking signal (Trigg 1964): running error sum over MAD, window form.
        row["tracking_signal"] = bias / mae if n and mae > 0 else math.nan

        # Latest run of same-sign errors; missing periods are simply not in ``errors``.
        run = 0
        if errors and errors[-1] != 0:
            sign = 1 if errors[-1] > 0 else -1
            for e in reversed(errors):
                if (e > 0 and sign > 0) or (e < 0 and sign < 0):
                    run += 1
                else:
                    break
            run *= sign
        row["bias_run"] = run

        positive = sum(1 for e in errors if e > 0)
        nonzero = sum(1 for e in errors if e != 0)
        pvalue = sign_test_p(positive, nonzero)
        row["bias_pvalue"] = pvalue
        if pvalue <= 0.05 and 2 * positive != nonzero:
            flag = "over" if 2 * positive > nonzero else "under"
        elif abs(run) >= 6:
            flag = "over" if run > 0 else "under"
        else:
            flag = ""
        # The flag stands only when the window bias agrees in sign and is material (>= 5% of
        # demand, or any non-zero bias when demand <= 0).
        bias_sign = (bias > 0) - (bias < 0)
        if flag and bias_sign != (1 if flag == "over" else -1):
            flag = ""
        if flag and sum_d > 0 and abs(bias) < 0.05 * sum_d:
            flag = ""
        row["bias_flag"] = flag

        # MASE (Hyndman & Koehler 2006): scale from all (t, t-m) actual pairs up to the window end.
        diffs = [
            abs(demand_at[t] - demand_at[t - season]) for t in demand_at if t - season in demand_at
        ]
        scale = sum(diffs) / len(diffs) if diffs else math.nan
        row["mase"] = mae / scale if diffs and scale > 0 and n else math.nan

        # FVA over the naive forecast (Gilliland 2010), units per period.
        gains = [
            abs(demand_at[t] - demand_at[t - season]) - abs(forecast_at[t] - demand_at[t])
            for t in counted
            if t - season in demand_at
        ]
        row["fva"] = sum(gains) / len(gains) if gains else math.nan

        # Syntetos, Boylan & Croston (2005), exact arithmetic for the cut-off comparisons.
        history = list(demand_at.values())
        sizes = [Fraction(d) for d in history if d > 0]
        if sizes:
            adi = Fraction(len(history), len(sizes))
            mean = sum(sizes) / len(sizes)
            cv2 = (sum((s - mean) ** 2 for s in sizes) / len(sizes)) / mean**2
            rough_adi, rough_cv2 = adi >= Fraction(132, 100), cv2 >= Fraction(49, 100)
            pattern = {
                (False, False): "smooth",
                (False, True): "erratic",
                (True, False): "intermittent",
                (True, True): "lumpy",
            }[(rough_adi, rough_cv2)]
            row.update(adi=float(adi), cv2=float(cv2), pattern=pattern)
        else:
            row.update(adi=math.nan, cv2=math.nan, pattern="none")

        latest_row = max(recs, key=lambda r: r[schema.PERIOD])
        row["family"] = latest_row["family"]
        row["_key"] = key
        row["_error"] = row["abs_error_value"] if priced else abs_err
        rows.append(row)

    # Rank: largest error first, ties by key ascending (item, then location).
    rows.sort(key=lambda r: (-r["_error"], r["_key"]))
    total = sum(r["_error"] for r in rows)
    running = 0.0
    for rank, r in enumerate(rows, start=1):
        r["rank"] = rank
        r["error_share"] = r["_error"] / total
        running += r["error_share"]
        r["cum_share"] = running
    return pd.DataFrame(rows).drop(columns=["_key", "_error"])


# --------------------------------------------------------------------------------------------
# Comparison
# --------------------------------------------------------------------------------------------

FLOAT_COLUMNS = (
    "demand",
    "forecast",
    "abs_error",
    "bias",
    "bias_pct",
    "wape",
    "mae",
    "rmse",
    "error_share",
    "cum_share",
    "tracking_signal",
    "bias_pvalue",
    "mase",
    "fva",
    "adi",
    "cv2",
)
VALUE_COLUMNS = ("abs_error_value", "bias_value")
EXACT_COLUMNS = ("rank", "periods", "bias_run")
TEXT_COLUMNS = ("bias_flag", "pattern", "family")


def assert_matches(card: pd.DataFrame, expected: pd.DataFrame, priced: bool, located: bool) -> None:
    keys = ["item", "location"] if located else ["item"]
    assert list(card.columns[: len(keys)]) == keys
    assert ("location" in card.columns) == located
    for name in VALUE_COLUMNS:
        assert (name in card.columns) == priced, name
    assert len(card) == len(expected)
    # Review order: the card comes sorted by rank, the oracle rows too.
    assert card["rank"].tolist() == list(range(1, len(card) + 1))
    for name in keys:
        assert card[name].tolist() == expected[name].tolist(), f"key order differs in {name}"
    for name in EXACT_COLUMNS:
        np.testing.assert_array_equal(
            card[name].to_numpy(np.int64), expected[name].to_numpy(np.int64), err_msg=name
        )
    for name in FLOAT_COLUMNS + (VALUE_COLUMNS if priced else ()):
        np.testing.assert_allclose(
            card[name].to_numpy(np.float64),
            expected[name].to_numpy(np.float64),
            rtol=1e-9,
            atol=0,
            equal_nan=True,
            err_msg=name,
        )
    for name in TEXT_COLUMNS:
        assert card[name].astype(str).tolist() == expected[name].astype(str).tolist(), name


CASES = [
    pytest.param(
        freq,
        priced,
        located,
        id=f"{freq}-{'priced' if priced else 'units'}-{'loc' if located else 'item'}",
    )
    for freq in (schema.WEEKLY, schema.MONTHLY)
    for priced in (True, False)
    for located in (True, False)
]
SETTINGS = [(13, 1), (13, 4), (5, 4), (200, 1)]


@pytest.mark.parametrize(("freq", "priced", "located"), CASES)
def test_scorecard_matches_oracle(freq: str, priced: bool, located: bool) -> None:
    seed = 20250 + 10 * (freq == schema.MONTHLY) + 2 * priced + located
    records = generate(seed, freq, priced, located)
    portfolio = portfolio_from(long_frame(records, freq=freq), attributes=("family",))
    assert portfolio.calendar.freq == freq
    assert portfolio.n_forward == FORWARD
    for window, season in SETTINGS:
        card = ranking.scorecard(portfolio, window=window, season=season)
        expected = oracle(records, window, season, priced, located)
        assert_matches(card, expected, priced, located)


def test_generated_data_reach_every_edge_case() -> None:
    """Guard against a generator change that silently stops covering an edge case."""
    records = generate(20252, schema.WEEKLY, True, False)
    card = oracle(records, 13, 1, priced=True, located=False)
    assert (card["periods"] == 0).any()  # no actuals or no forecasts in the window
    assert (card["periods"] == 1).any()  # a single counted period
    assert ((card["abs_error"] == 0) & (card["periods"] > 0)).any()  # perfect / all-zero window
    assert ((card["demand"] == 0) & (card["periods"] > 0)).any()  # all-zero demand window
    assert (card["demand"] < 0).any()  # net returns
    assert card["mase"].isna().any() and card["mase"].notna().any()
    assert card["wape"].isna().any() and card["tracking_signal"].isna().any()
    assert set(card["pattern"]) == {"smooth", "erratic", "intermittent", "lumpy", "none"}
    assert (card["adi"] == 1.32).any() and (card["cv2"] == 0.49).any()  # cut-offs hit exactly
    assert {"over", "under", ""} <= set(card["bias_flag"])
    assert (card["bias_run"].abs() >= 6).any() and (card["bias_run"] == 0).any()
    assert (card["bias_pvalue"] <= 0.05).any()
    errors = card["abs_error_value"].to_numpy()
    assert (np.diff(errors) == 0).any(), "no tie in error: the key tie-break is not exercised"
    # A tie between two series with positive error, so the tie-break is not only among zeros.
    assert ((np.diff(errors) == 0) & (errors[1:] > 0)).any()


def test_tie_break_by_item_then_location() -> None:
    """Equal errors are ordered by item, then location, ascending, by code point."""
    cells = [(0, 10.0, 12.0), (1, 10.0, 7.0)]
    records = [
        {
            schema.ITEM: item,
            schema.LOCATION: loc,
            schema.PERIOD: t,
            schema.DEMAND: d,
            schema.FORECAST: f,
        }
        for item, loc in [("b", "x"), ("B", "z"), ("a", "y"), ("a", "x"), ("A10", "x"), ("A9", "x")]
        for t, d, f in cells
    ]
    card = ranking.scorecard(portfolio_from(records), window=2)
    assert list(zip(card["item"], card["location"], strict=True)) == [
        ("A10", "x"),
        ("A9", "x"),
        ("B", "z"),
        ("a", "x"),
        ("a", "y"),
        ("b", "x"),
    ]
    assert card["rank"].tolist() == [1, 2, 3, 4, 5, 6]


def test_a_bias_of_exactly_five_percent_is_material_whatever_the_summation_order() -> None:
    # The flag's materiality rule (docs/metrics.md): |Σe| >= 5% of Σdemand. Errors 0.7 and -0.5
    # sum to 0.19999999999999996 in binary floating point, not 0.2 (Goldberg 1991, "What every
    # computer scientist should know about floating-point arithmetic"): against a window demand
    # of 4.0 that is still exactly 5%, so a run of six over-forecasts is flagged "over".
    bias = np.array([0.7 + -0.5, 0.19])
    flag = metrics.persistent_bias(
        positive=np.array([7, 7]),
        nonzero=np.array([13, 13]),
        run=np.array([6, 6]),
        bias=bias,
        demand=np.array([4.0, 4.0]),
    )
    assert bias[0] < 0.05 * 4.0  # the premise: the float sum falls just short
    assert flag.tolist() == [1, 0]
