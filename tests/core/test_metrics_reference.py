"""The scorecard against outside references: reference libraries and published check values.

Each check names its source beside it (the list is docs/sources.md §1 and §2). Check values
marked "(calc)" were computed from the definitions with the library named; textbook tables were
recomputed from the published demand and forecast. Textbook tables use e = A − F; our
error is F − A, so their signed numbers are ours negated.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from helpers import portfolio_from, series_records
from scipy.stats import binomtest
from sklearn.metrics import mean_absolute_error, root_mean_squared_error
from statsmodels.tools.eval_measures import bias as sm_bias

from triage.core import metrics, ranking, schema


def score_one(demand: list[float], forecast: list[float], **kwargs: object) -> dict[str, object]:
    """Scorecard row of a single series (window = its whole length unless given)."""
    kwargs.setdefault("window", len(demand))
    card = ranking.scorecard(portfolio_from(series_records(demand, forecast)), **kwargs)
    assert len(card) == 1
    return card.iloc[0].to_dict()


# --------------------------------------------------------------------------------------------
# Reference libraries on generated per-series window data
# --------------------------------------------------------------------------------------------


def _random_portfolio(seed: int) -> tuple[list[dict[str, object]], int]:
    """Records of 150 series over 30 weeks with missing cells, plus the window length."""
    rng = np.random.default_rng(seed)
    records = []
    for s in range(150):
        level = rng.uniform(1, 80)
        for t in range(30):
            if rng.random() < 0.1:
                continue  # missing row
            demand = float(rng.poisson(level)) if rng.random() > 0.05 else math.nan
            forecast = (
                float(max(rng.normal(level, level / 3), 0)) if rng.random() > 0.05 else math.nan
            )
            records.append(
                {
                    schema.ITEM: f"P{s:03d}",
                    schema.PERIOD: t,
                    schema.DEMAND: demand,
                    schema.FORECAST: forecast,
                }
            )
    return records, 13


def _window_pairs(
    records: list[dict[str, object]], window: int
) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Per series (actual, forecast) arrays over the counted window periods, read from the rows."""
    with_actual = sorted({r[schema.PERIOD] for r in records if not math.isnan(r[schema.DEMAND])})
    win = set(with_actual[-window:])
    out: dict[str, tuple[list[float], list[float]]] = {}
    for r in sorted(records, key=lambda r: r[schema.PERIOD]):
        if (
            r[schema.PERIOD] in win
            and not math.isnan(r[schema.DEMAND])
            and not math.isnan(r[schema.FORECAST])
        ):
            actual, forecast = out.setdefault(r[schema.ITEM], ([], []))
            actual.append(r[schema.DEMAND])
            forecast.append(r[schema.FORECAST])
    return {k: (np.array(a), np.array(f)) for k, (a, f) in out.items()}


@pytest.fixture(scope="module")
def generated() -> tuple[dict[str, dict[str, object]], dict[str, tuple[np.ndarray, np.ndarray]]]:
    records, window = _random_portfolio(4242)
    card = ranking.scorecard(portfolio_from(records), window=window)
    rows = {row["item"]: row for row in card.to_dict("records")}
    return rows, _window_pairs(records, window)


def test_mae_rmse_match_scikit_learn(generated) -> None:
    rows, pairs = generated
    assert len(pairs) > 100
    for item, (actual, forecast) in pairs.items():
        row = rows[item]
        assert row["periods"] == len(actual)
        # scikit-learn sklearn.metrics.mean_absolute_error / root_mean_squared_error
        assert row["mae"] == pytest.approx(mean_absolute_error(actual, forecast), rel=1e-12)
        assert row["rmse"] == pytest.approx(root_mean_squared_error(actual, forecast), rel=1e-12)


def test_bias_matches_statsmodels(generated) -> None:
    rows, pairs = generated
    for item, (actual, forecast) in pairs.items():
        row = rows[item]
        # statsmodels.tools.eval_measures.bias(x1, x2) = mean(x1 − x2): forecast first gives F − A.
        assert row["bias"] / row["periods"] == pytest.approx(
            sm_bias(forecast, actual), rel=1e-12, abs=1e-12
        )


def test_bias_pvalue_matches_scipy_on_series(generated) -> None:
    rows, pairs = generated
    for item, (actual, forecast) in pairs.items():
        error = forecast - actual
        nonzero = int((error != 0).sum())
        expected = binomtest(int((error > 0).sum()), nonzero, 0.5).pvalue if nonzero else 1.0
        # scipy.stats.binomtest(k, n, p=0.5, alternative='two-sided')
        assert rows[item]["bias_pvalue"] == pytest.approx(expected, rel=1e-9)


def test_sign_test_table_matches_scipy() -> None:
    k, n = np.array([(k, n) for n in range(0, 53) for k in range(n + 1)]).T
    ours = metrics.sign_test_pvalue(k, n)
    # scipy.stats.binomtest(k, n, p=0.5, alternative='two-sided'); n = 0 is 1.0 by our contract.
    expected = np.array(
        [binomtest(int(a), int(b), 0.5).pvalue if b else 1.0 for a, b in zip(k, n, strict=True)]
    )
    np.testing.assert_allclose(ours, expected, rtol=1e-9, atol=0)
    # docs/sources.md §2.2 (arithmetic): six one-sided errors are the fewest reaching 5 %.
    assert metrics.sign_test_pvalue(np.array([6]), np.array([6]))[0] == pytest.approx(0.03125)
    assert metrics.sign_test_pvalue(np.array([0]), np.array([5]))[0] == pytest.approx(0.0625)


def test_scikit_learn_docs_example() -> None:
    # scikit-learn docs for mean_absolute_error / root_mean_squared_error:
    # y_true = [3, -0.5, 2, 7], y_pred = [2.5, 0.0, 2, 8] -> MAE 0.5, RMSE 0.612...
    row = score_one([3, -0.5, 2, 7], [2.5, 0.0, 2, 8])
    assert row["mae"] == pytest.approx(0.5, rel=1e-12)
    assert row["rmse"] == pytest.approx(0.6123724356957945, rel=1e-12)


# --------------------------------------------------------------------------------------------
# Textbook tracking-signal tables (docs/sources.md §1.7), e = A − F on the page
# --------------------------------------------------------------------------------------------

TS_TABLES = {
    # (a) Monthly May–Dec table, study-help page; TS recomputed (calc).
    "a": (
        [105, 80, 110, 118, 102, 110, 120, 125],
        [102, 100, 101, 98, 100, 104, 108, 109],
        [1.0000, -1.4783, -0.7500, 0.9231, 1.2963, 2.0000, 3.1111, 4.3636],
        5e-5,
    ),
    # (b) Years 1–6 table, study-help page; TS to 2 dp as recomputed.
    "b": (
        [71, 80, 101, 84, 60, 73],
        [78, 75, 83, 84, 88, 85],
        [-1.0, -0.33, 1.6, 2.13, -1.03, -2.06],
        5e-3,
    ),
    # (c) A = [8, 11, 12, 14], F = 10 each, textbook problem.
    "c": ([8, 11, 12, 14], [10, 10, 10, 10], [-1.0, -0.67, 0.6, 2.22], 5e-3),
}


@pytest.mark.parametrize("table", sorted(TS_TABLES))
def test_running_tracking_signal_matches_textbook(table: str) -> None:
    actual, forecast, textbook_ts, tol = TS_TABLES[table]
    ours = []
    for t in range(1, len(actual) + 1):
        # The running signal at t is the window signal of the first t periods (window = t).
        row = score_one(actual[:t], forecast[:t], window=t)
        ours.append(row["tracking_signal"])
    # Page convention e = A − F: the page's TS is ours negated.
    np.testing.assert_allclose(-np.array(ours), textbook_ts, rtol=0, atol=tol)


def test_table_a_extra_check_values() -> None:
    """Table (a) extra values (calc with scikit-learn, statsmodels, scipy; docs/sources.md §1.7)."""
    actual, forecast, _, _ = TS_TABLES["a"]
    row = score_one(actual, forecast)
    assert row["mae"] == pytest.approx(11.0)
    assert row["rmse"] == pytest.approx(12.893796958227627, rel=1e-12)
    assert row["wape"] == pytest.approx(0.10114942528735632, rel=1e-12)
    assert row["bias"] / row["periods"] == pytest.approx(-6.0)  # statsmodels bias(F, A) = −6.0
    assert row["bias_pct"] == pytest.approx(-0.05517, abs=5e-6)
    assert row["bias_pvalue"] == pytest.approx(0.0703125, rel=1e-12)  # binomtest(1, 8)
    # Page TS +4.36: demand above forecast. The sign test alone does not trip (p 0.07), the
    # latest six errors are all under-forecasts, so the run rule flags "under".
    assert row["bias_run"] == -6
    assert row["bias_flag"] == "under"


# --------------------------------------------------------------------------------------------
# Demand pattern check values (docs/sources.md §1.6, T/k ADI and population CV²)
# --------------------------------------------------------------------------------------------

PATTERN_CHECKS = [
    ([0, 3, 0, 0, 5, 0, 4, 0, 0, 0, 6, 0], 3.00, 0.0617, "intermittent"),
    ([0, 0, 10, 0, 1, 0, 0, 25, 0, 2, 0, 0], 3.00, 1.0222, "lumpy"),
    ([10, 12, 9, 11, 10, 13, 8, 12], 1.00, 0.0220, "smooth"),
    ([1, 20, 2, 30, 1, 25, 3, 18], 1.00, 0.8112, "erratic"),
    ([4, 0, 5, 0, 0, 0, 0, 0], 4.00, 0.0123, "intermittent"),
]


def test_demand_pattern_check_values() -> None:
    # Syntetos, Boylan & Croston (2005) classes; values (calc) from those definitions.
    records = []
    for i, (demand, *_rest) in enumerate(PATTERN_CHECKS):
        # Shorter series end at the same latest period as the longer ones.
        records += series_records(demand, demand, item=f"S{i}", start=12 - len(demand))
    card = ranking.scorecard(portfolio_from(records)).sort_values("item")
    for (_, adi, cv2, pattern), row in zip(PATTERN_CHECKS, card.to_dict("records"), strict=True):
        assert row["adi"] == pytest.approx(adi, abs=5e-5)
        assert row["cv2"] == pytest.approx(cv2, abs=5e-5)
        assert row["pattern"] == pattern


# --------------------------------------------------------------------------------------------
# MAE vs MSE on intermittent demand (docs/sources.md §1.5)
# --------------------------------------------------------------------------------------------


def test_zero_forecast_wins_on_mae_loses_on_rmse() -> None:
    # Gneiting (2011): absolute error is consistent for the median, squared error for the mean;
    # Svetunkov (2025) / Kolassa (2016): the median of an intermittent series is often zero.
    y = [0, 0, 0, 5, 0, 0, 3, 0, 0, 0, 8, 0]
    mean = sum(y) / len(y)
    records = series_records(y, [0] * 12, item="zero") + series_records(y, [mean] * 12, item="mean")
    card = ranking.scorecard(portfolio_from(records), window=12).set_index("item")
    zero, avg = card.loc["zero"], card.loc["mean"]
    assert zero["mae"] < avg["mae"] and zero["rmse"] > avg["rmse"]
    # Check values (calc), docs/sources.md §1.5.
    assert zero["mae"] == pytest.approx(1.3333, abs=5e-5)
    assert zero["rmse"] ** 2 == pytest.approx(8.1667, abs=5e-5)
    assert avg["mae"] == pytest.approx(2.0, abs=5e-5)
    assert avg["rmse"] ** 2 == pytest.approx(6.3889, abs=5e-5)
    assert zero["pattern"] in ("intermittent", "lumpy")


# --------------------------------------------------------------------------------------------
# MASE (docs/sources.md §1.3, §1.7)
# --------------------------------------------------------------------------------------------


def test_mase_sktime_docstring_example() -> None:
    # sktime mean_absolute_scaled_error docstring: y_train = [5, 0.5, 4, 6, 3, 5, 2],
    # y_true = [3, -0.5, 2, 7, 2], y_pred = [2.5, 0.0, 2, 8, 1.25] -> 0.18333333333333335.
    # sktime is not installed; the formula there is MAE(test) / MAE(naive on y_train).
    train = [5, 0.5, 4, 6, 3, 5, 2]
    actual, predicted = [3, -0.5, 2, 7, 2], [2.5, 0.0, 2, 8, 1.25]
    row = score_one(train + actual, [None] * len(train) + predicted, window=len(actual))
    assert row["periods"] == 5
    train_scale = metrics.naive_scale(np.array([train], dtype=float))[0]
    assert row["mae"] / train_scale == pytest.approx(0.18333333333333335, rel=1e-12)
    # Our contract's scale runs over the whole history up to the window end, test periods too
    # (Hyndman & Koehler 2006 in-sample naive MAE): 35 over 11 pairs.
    assert row["mase"] == pytest.approx(0.55 / (35 / 11), rel=1e-12)


def test_utilsforecast_toy() -> None:
    # docs/sources.md §1.7 (calc, agrees with utilsforecast 0.2.17):
    # train y = [10, 12, 9, 11, 0, 8]; test A = [10, 0, 12, 6], F = [9, 2, 10, 8].
    train = [10, 12, 9, 11, 0, 8]
    actual, predicted = [10, 0, 12, 6], [9, 2, 10, 8]
    row = score_one(train + actual, [None] * len(train) + predicted, window=4)
    assert row["mae"] == pytest.approx(1.75, rel=1e-12)
    assert row["rmse"] == pytest.approx(1.8027756377319946, rel=1e-12)
    assert row["wape"] == pytest.approx(0.25, rel=1e-12)
    assert row["bias"] / row["periods"] == pytest.approx(0.25)  # utilsforecast bias (F − A)
    assert row["bias"] == pytest.approx(1.0)  # utilsforecast cfe = Σ(F − A)
    assert row["abs_error"] == pytest.approx(7.0)  # utilsforecast pis
    # utilsforecast mase takes its scale from train_df only: 1.75 / 5.2.
    train_scale = metrics.naive_scale(np.array([train], dtype=float))[0]
    assert train_scale == pytest.approx(5.2)
    assert row["mae"] / train_scale == pytest.approx(0.3365384615384615, rel=1e-12)
    # Ours scales by the history up to the window end: (26 + 2 + 10 + 12 + 6) / 9 pairs.
    assert row["mase"] == pytest.approx(1.75 / (56 / 9), rel=1e-12)


def test_mase_seasonal_scale() -> None:
    # Hyndman & Koehler (2006): seasonal naive scale, mean |y_t − y_{t−m}|.
    y = np.array([[4.0, 8, 6, 2, 5, 9, 6, 3]])
    assert metrics.naive_scale(y, 4)[0] == pytest.approx((1 + 1 + 0 + 1) / 4)
    # Flat history: the scale is 0 and MASE undefined (Hyndman & Koehler 2006).
    row = score_one([7, 7, 7, 7], [6, 8, 7, 7])
    assert math.isnan(row["mase"])


# --------------------------------------------------------------------------------------------
# Percentage errors as a ranking key (common practice)
# --------------------------------------------------------------------------------------------


def test_error_share_has_no_mape_flaws() -> None:
    """Common practice: MAPE is undefined at zero demand, a 100 % cap rewards a zero forecast,
    and MAPE penalises over-forecasts more, so it favours low forecasts (also Hyndman & Koehler
    2006). The ranking key (share of absolute error) has none of these flaws."""
    n = 4
    records = (
        # Zero forecast on a large series: APE exactly 100 % whatever the miss.
        series_records([50] * n, [0] * n, item="zero_fc")
        # Small series over-forecast: APE 200 %, capped 100 %; 2 units off per period.
        + series_records([1] * n, [3] * n, item="small_over")
        # Zero-demand periods: APE undefined there.
        + series_records([0, 0, 6, 0], [2, 1, 5, 2], item="zero_demand")
        # Same absolute miss of 50, once over (APE 100 %) and once under (APE 50 %).
        + series_records([50] * n, [100] * n, item="over")
        + series_records([100] * n, [50] * n, item="under")
    )
    card = ranking.scorecard(portfolio_from(records), window=n).set_index("item")
    # Every series gets a finite share, zero-demand periods included, and the shares add up.
    assert card["error_share"].notna().all()
    assert card["error_share"].sum() == pytest.approx(1.0)
    assert card.loc["zero_demand", "abs_error"] == pytest.approx(6.0)
    # A zero forecast does not get the smallest error share: it is at the top with the 50-unit
    # misses, far above the small series that an uncapped MAPE would rank worst.
    assert card.loc["zero_fc", "error_share"] > card.loc["small_over", "error_share"]
    assert card["error_share"].idxmin() != "zero_fc"
    assert card.loc["zero_fc", "rank"] <= 3
    # Over- and under-forecast by the same units weigh the same.
    assert card.loc["over", "error_share"] == card.loc["under", "error_share"]
    assert card.loc["over", "rank"] < card.loc["under", "rank"]  # tie: key order


# --------------------------------------------------------------------------------------------
# False alarms of the persistent-bias flag (docs/sources.md §2.1-§2.3)
# --------------------------------------------------------------------------------------------


def _latest_run(signs: tuple[int, ...]) -> int:
    length = 1
    while length < len(signs) and signs[-1 - length] == signs[-1]:
        length += 1
    return length * signs[-1]


def test_flag_false_alarm_rate_exact() -> None:
    n = 13
    sequences = list(itertools.product((1, -1), repeat=n))  # equally likely under H0
    positive = np.array([sum(s > 0 for s in seq) for seq in sequences])
    run = np.array([_latest_run(seq) for seq in sequences])
    nonzero = np.full(len(sequences), n)
    bias = 2 * positive - n  # Σe of ±1 errors
    # Demand 100 per period: a material bias is at least 5% of 1,300, i.e. |Σe| >= 65, which ±1
    # errors never reach; so use demand 0 (materiality does not apply) for the sign logic alone.
    ours = metrics.persistent_bias(positive, nonzero, run, bias, np.zeros(len(bias))) != 0

    # Independently: scipy.stats.binomtest p <= 0.05 (two-sided sign test) or a run of 6 or more
    # (2·0.5⁶ = 3.1 % on its own, docs/sources.md §2.3), and the window bias agrees in sign.
    test_p = {k: binomtest(k, n, 0.5).pvalue for k in range(n + 1)}
    expected = 0
    for k, r, b in zip(positive, run, bias, strict=True):
        if test_p[int(k)] <= 0.05:
            direction = 1 if 2 * k > n else -1
        elif abs(r) >= 6:
            direction = 1 if r > 0 else -1
        else:
            continue
        expected += int(np.sign(b)) == direction
    assert int(ours.sum()) == expected
    assert ours.mean() < 0.08
    # The same rate through the vectorised window measures on ±1 errors.
    errors = np.array(sequences, dtype=float)
    wm = metrics.window_measures(np.zeros_like(errors), errors)
    assert int((wm.bias_flag != 0).sum()) == expected
    np.testing.assert_array_equal(wm.bias_run, run)


def test_flag_versus_plain_tracking_signal_limit() -> None:
    # docs/sources.md §2.1 (simulated, iid N(0,1) errors): P(|TS| > 4) = 0.369 at n = 12, rising
    # with n; a ±4 limit is the textbook rule.
    rng = np.random.default_rng(13)
    errors = rng.standard_normal((20_000, 13))
    demand = np.full_like(errors, 100.0)
    wm = metrics.window_measures(demand, demand + errors)
    ts_alarm = np.mean(np.abs(wm.tracking_signal) > 4)
    flag_alarm = np.mean(wm.bias_flag != 0)
    assert 0.3 < ts_alarm < 0.45
    assert flag_alarm < 0.08
