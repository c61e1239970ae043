"""Forward-forecast adjustments: the spec syntax, applying it, and the bias suggestion.

Expected values are worked by hand next to each check (arithmetic on the numbers shown). The
bias correction is checked against statsmodels' ``bias`` (mean of x1 − x2): after it, the
window bias in the project's sign convention (forecast − demand, docs/sources.md §1.1) is 0.
``use NAME`` is checked against a plain per-period rule written here and, through the ledger,
the export and a later cycle's realised value, against numbers worked by hand.
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from statsmodels.tools.eval_measures import bias as sm_bias

from triage.core.adjust import (
    EXPECTED,
    AdjustError,
    Adjustment,
    AdjustSyntaxError,
    apply,
    parse,
    suggest,
)
from triage.core.cycle import ReviewCycle
from triage.core.errors import TriageError
from triage.core.export import review_tables
from triage.core.ledger import Ledger
from triage.core.read import read_portfolio
from triage.core.review import ReviewSession
from triage.core.text import visible

NAN = np.nan
FORWARD = np.array([100.0, 95.0, NAN, 90.0, 80.0])
HISTORY = np.array([70.0, NAN, 80.0, 90.0, 100.0])


def run(spec: str, forward=FORWARD, **kw):
    args = {
        "recent_actuals": HISTORY,
        "window_demand": 400.0,
        "window_forecast": 500.0,
        **kw,
    }
    return apply(parse(spec), forward, **args)


def same(a: np.ndarray, b) -> bool:
    return np.array_equal(a, np.asarray(b, dtype=float), equal_nan=True)


# ---- parsing ----------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("spec", "expected"),
    [
        ("=120", Adjustment("set", value=120.0)),
        ("= 12.5", Adjustment("set", value=12.5)),
        ("+15%", Adjustment("percent", value=15.0)),
        ("-10 %", Adjustment("percent", value=-10.0)),
        ("x1.2", Adjustment("multiply", value=1.2)),
        ("X 0.5", Adjustment("multiply", value=0.5)),
        ("*2", Adjustment("multiply", value=2.0)),
        ("+40", Adjustment("add", value=40.0)),
        ("- 25", Adjustment("add", value=-25.0)),
        ("mean 8", Adjustment("mean", count=8)),
        ("MEAN8", Adjustment("mean", count=8)),
        ("Bias", Adjustment("bias")),
        ("100 120 130", Adjustment("values", values=(100.0, 120.0, 130.0))),
        ("100, 120, 130", Adjustment("values", values=(100.0, 120.0, 130.0))),
        ("3: 120", Adjustment("values", values=(120.0,), start=3, end=3)),
        ("2-5: +10%", Adjustment("percent", value=10.0, start=2, end=5)),
        (" 2 - 5 :x1.1 ", Adjustment("multiply", value=1.1, start=2, end=5)),
        ("4-: -25", Adjustment("add", value=-25.0, start=4)),
        ("1-: =5", Adjustment("set", value=5.0)),
        ("1-3: 1 2 3", Adjustment("values", values=(1.0, 2.0, 3.0), start=1, end=3)),
    ],
)
def test_parse_every_form(spec: str, expected: Adjustment) -> None:
    assert parse(spec) == expected


@pytest.mark.parametrize(
    ("spec", "canonical"),
    [
        ("=120", "=120"),
        ("= 12.50", "=12.5"),
        ("+15%", "+15%"),
        ("-0", "+0"),
        ("x1.20", "x1.2"),
        ("*2", "x2"),
        ("MEAN   8", "mean 8"),
        ("BIAS", "bias"),
        ("100 ,120 ,130", "100 120 130"),
        (" 2 - 5 :x1.1 ", "2-5: x1.1"),
        ("1-: +5", "+5"),
        ("3-3: 7", "3: 7"),
        ("4-: +.5%", "4-: +0.5%"),
        ("=0.000001", "=0.000001"),
    ],
)
def test_canonical_text(spec: str, canonical: str) -> None:
    assert str(parse(spec)) == canonical
    assert parse(canonical) == parse(spec)


NUMBER = st.one_of(
    st.integers(0, 10**6).map(str),
    st.decimals(min_value=0, max_value=10**6, places=4, allow_nan=False).map(
        lambda d: format(d, "f")
    ),
)
RANGE = st.one_of(
    st.just(""),
    st.integers(1, 50).map(lambda a: f"{a}:"),
    st.tuples(st.integers(1, 20), st.integers(0, 20)).map(lambda t: f"{t[0]}-{t[0] + t[1]}:"),
    st.integers(1, 50).map(lambda a: f"{a}-:"),
)
OP = st.one_of(
    NUMBER.map(lambda n: f"={n}"),
    st.tuples(st.sampled_from("+-"), NUMBER).map(lambda t: f"{t[0]}{t[1]}%"),
    NUMBER.map(lambda n: f"x{n}"),
    st.tuples(st.sampled_from("+-"), NUMBER).map(lambda t: f"{t[0]}{t[1]}"),
    st.integers(1, 60).map(lambda k: f"mean {k}"),
    st.just("bias"),
)


@settings(max_examples=300)
@given(range_=RANGE, op=OP, gap=st.sampled_from(["", " ", "  "]))
def test_canonical_text_round_trips(range_: str, op: str, gap: str) -> None:
    spec = f"{range_}{gap}{op}"
    try:
        adj = parse(spec)
    except AdjustSyntaxError as exc:
        # The grammar above also yields percentages below -100%, which are refused on purpose.
        assert "-100%" in str(exc)
        return
    assert parse(str(adj)) == adj
    assert str(parse(str(adj))) == str(adj)


@settings(max_examples=100)
# A bare comma between digits is refused as ambiguous (see the test below), so lists are
# separated by spaces or by a comma and a space.
@given(values=st.lists(NUMBER, min_size=1, max_size=12), sep=st.sampled_from([" ", ", ", " , "]))
def test_value_lists_round_trip(values: list[str], sep: str) -> None:
    adj = parse(sep.join(values))
    assert adj.values == tuple(float(v) for v in values)
    assert parse(str(adj)) == adj


@pytest.mark.parametrize(
    ("spec", "pointer", "words"),
    [
        ("", 0, "it is empty"),
        ("3:", 2, "operation after ':' is missing"),
        ("+1O%", 2, "'+1O%' is not an operation or a number"),
        ("2-5", 0, "looks like a range"),
        ("5-2: +1", 0, "ends before it starts; write 2-5"),
        ("0: +1", 0, "numbered from 1"),
        ("mean", 4, "mean needs the number of actuals"),
        ("mean 0", 0, "at least 1"),
        ("2-4: 1 2", 5, "2 value(s) given for 3 period(s)"),
        ("1:2:3", 3, "only one ':'"),
        ("abc: +1", 0, "'abc' is not a range"),
        ("100 -20", 4, "plain numbers without signs"),
        ("-150%", 0, "lowest is -100%"),
        ("+5%%", 3, "not an operation"),
        ("15%", 0, "needs a sign: +15% raises"),
        ("1e3", 1, "not an operation"),
    ],
)
def test_bad_syntax_quotes_points_and_lists(spec: str, pointer: int, words: str) -> None:
    with pytest.raises(AdjustSyntaxError, match=re.escape(words)) as caught:
        parse(spec)
    error = caught.value
    assert isinstance(error, TriageError)
    lines = str(error).splitlines()
    assert lines[0].startswith(f'Cannot read the adjustment "{spec}"')
    assert lines[1] == f"  {spec}"
    assert lines[2] == " " * (2 + pointer) + "^" and error.position == pointer
    assert lines[3] == EXPECTED + "."
    assert "=N, +N%, -N%, xF, +N, -N, mean K, bias, or values" in EXPECTED


def test_control_characters_do_not_reach_the_message() -> None:
    with pytest.raises(AdjustSyntaxError) as caught:
        parse("\x1b]2;x\x07")
    assert "\x1b" not in str(caught.value) and "\x07" not in str(caught.value)


def test_spec_is_shown_with_the_terminal_sanitiser_and_the_pointer_aligned() -> None:
    # One sanitiser for the terminal (text.visible): ESC and a zero-width space are shown as the
    # same symbols every other screen and message shows, one per character, so the caret under
    # the bad character still points at it.
    spec = "+1\x1b\u200b0x"
    with pytest.raises(AdjustSyntaxError) as caught:
        parse(spec)
    lines = str(caught.value).splitlines()
    assert lines[1] == f"  {visible(spec)}" == "  +1\u241b\ufffd0x"
    assert lines[2].index("^") - 2 == caught.value.position


# ---- applying ---------------------------------------------------------------------------------


def test_set_level_fills_missing_periods_too() -> None:
    result = run("=120")
    assert same(result.adjusted, [120, 120, 120, 120, 120])
    # Δ = 5·120 − (100+95+90+80) = 600 − 365 = 235 (missing counts as 0)
    assert result.delta_units == 235.0 and (result.first, result.last) == (1, 5)


def test_percent_and_multiply_scale_and_keep_missing() -> None:
    up = run("1-4: +10%")
    assert np.allclose(up.adjusted[[0, 1, 3]], [110.0, 104.5, 99.0])
    assert math.isnan(up.adjusted[2]) and up.adjusted[4] == 80.0
    assert up.delta_units == pytest.approx(28.5)  # 0.1 · (100 + 95 + 90)
    down = run("-10%")
    assert np.allclose(down.adjusted, [90.0, 85.5, NAN, 81.0, 72.0], equal_nan=True)
    times = run("2-: x1.2")
    assert np.allclose(times.adjusted, [100.0, 114.0, NAN, 108.0, 96.0], equal_nan=True)
    assert times.delta_units == pytest.approx(53.0)  # 0.2 · (95 + 90 + 80)


def test_add_and_remove_units_per_period() -> None:
    plus = run("3-5: +40")
    assert same(plus.adjusted, [100, 95, NAN, 130, 120])
    assert plus.delta_units == 80.0  # the missing period stays missing
    minus = run("1: -25")
    assert same(minus.adjusted, [75, 95, NAN, 90, 80]) and minus.delta_units == -25.0


def test_mean_of_recent_actuals_skips_missing() -> None:
    # Last 3 present actuals of [70, NaN, 80, 90, 100] are 80, 90, 100 → mean 90.
    result = run("mean 3")
    assert same(result.adjusted, [90] * 5) and result.notes == ()
    # Asking for 8 uses the 4 that exist: (70+80+90+100)/4 = 85, and says so.
    short = run("mean 8")
    assert same(short.adjusted, [85] * 5)
    assert short.notes == ("only 4 of the 8 actuals asked for exist",)
    assert "only 4 of the 8" in short.description
    with pytest.raises(AdjustError, match="no actual demand"):
        run("mean 4", recent_actuals=[NAN, NAN])


def test_bias_removes_the_window_bias() -> None:
    # Σdemand / Σforecast = 400 / 500 = 0.8
    result = run("bias")
    assert np.allclose(result.adjusted, np.array([80.0, 76.0, NAN, 72.0, 64.0]), equal_nan=True)
    # Per-period window arrays: only periods with both values count.
    demand = np.array([40.0, 50.0, NAN, 30.0])
    forecast = np.array([50.0, 50.0, 60.0, 20.0])
    paired = run("bias", window_demand=demand, window_forecast=forecast)
    factor = 120.0 / 120.0
    assert np.allclose(paired.adjusted, FORWARD * factor, equal_nan=True)
    # Check against statsmodels: after scaling the window forecast by the factor the mean
    # error forecast − demand is zero (statsmodels.tools.eval_measures.bias(x1, x2)).
    d = np.array([40.0, 55.0, 38.0, 61.0])
    f = np.array([50.0, 60.0, 52.0, 58.0])
    scaled = run("bias", forward=f, window_demand=d.sum(), window_forecast=f.sum()).adjusted
    assert sm_bias(f, d) > 0 and sm_bias(scaled, d) == pytest.approx(0.0, abs=1e-12)


@pytest.mark.parametrize(
    ("demand", "forecast", "words"),
    [(10.0, 0.0, "sums to 0"), (10.0, -5.0, "sums to -5"), (-3.0, 10.0, "returns exceed sales")],
)
def test_bias_without_a_usable_window_is_an_error(demand, forecast, words) -> None:
    with pytest.raises(AdjustError, match=words):
        run("bias", window_demand=demand, window_forecast=forecast)


def test_values_per_period() -> None:
    result = run("2-4: 10, 20 30")
    assert same(result.adjusted, [100, 10, 20, 30, 80])
    assert result.delta_units == pytest.approx(60 - 185)  # (10+20+30) − (95+0+90)
    with pytest.raises(AdjustError, match=r"3 value\(s\) for 4 forward period\(s\)"):
        run("2-: 1 2 3")
    with pytest.raises(AdjustError, match=r"2 value\(s\) for 5 forward period\(s\)"):
        run("1 2")
    assert same(run("1 2 3 4 5").adjusted, [1, 2, 3, 4, 5])


@pytest.mark.parametrize("spec", ["6: +1", "4-6: +1", "6-: +1", "9: =1"])
def test_range_beyond_the_forward_horizon(spec: str) -> None:
    with pytest.raises(AdjustError, match="this series has 5 forward period"):
        run(spec)


def test_ranges_single_span_open() -> None:
    assert (run("3: =1").first, run("3: =1").last) == (3, 3)
    assert same(run("3: =1").adjusted, [100, 95, 1, 90, 80])
    assert same(run("2-3: =1").adjusted, [100, 1, 1, 90, 80])
    assert same(run("4-: =1").adjusted, [100, 95, NAN, 1, 1])
    assert same(run("5-5: =1").adjusted, [100, 95, NAN, 90, 1])


def test_never_negative_clip_and_say_so() -> None:
    result = run("1-2: -98")
    assert same(result.adjusted, [2, 0, NAN, 90, 80])
    assert (
        result.clipped and result.message == "1 period(s) would fall below zero and were set to 0"
    )
    assert result.delta_units == -98 - 95
    assert "set to 0" in result.description
    assert run("=-5").clipped and same(run("=-5").adjusted, [0] * 5)
    floor = run("-100%")
    assert not floor.clipped and same(floor.adjusted, [0, 0, NAN, 0, 0])


def test_value_impact_scalar_and_per_period_price() -> None:
    result = run("1-4: +10%", price=12.5)
    assert result.delta_value == pytest.approx(28.5 * 12.5)
    per = run("1-4: +10%", price=[2.0, 4.0, 9.0, NAN, 1.0])
    # 10·2 + 9.5·4 (+ missing period: no change) ; period 4 has no price → left out, noted
    assert per.delta_value == pytest.approx(10 * 2 + 9.5 * 4)
    assert per.notes == ("value leaves out 1 period(s) without a price",)
    assert run("+10%").delta_value is None
    with pytest.raises(AdjustError, match="one per forward period"):
        run("+10%", price=[1.0, 2.0])


def test_description_line() -> None:
    forward = np.array([95.0, 95.0, 95.0, 95.0, 60.0])
    result = run("1-4: +10%", forward=forward, price=32.5)
    # +10% of 4·95 = +38 units; 38 · 32.5 = 1,235
    assert result.description == "periods 1-4: +10% → +38 units (value +1,235)"
    assert run("3: =1").description.startswith("period 3: =1 → +1 units")
    assert run("bias").description.startswith("periods 1-5: bias x0.8 → -73 units")
    assert run("x1").description == "periods 1-5: x1 → +0 units"
    assert run("1: -0.25", forward=np.array([1.0])).description == "period 1: -0.25 → -0.2 units"


def test_result_is_read_only_and_gives_ledger_lines() -> None:
    result = run("2-3: +10")
    with pytest.raises(ValueError):
        result.adjusted[0] = 1.0
    periods = ["2026-11-30", "2026-12-07", "2026-12-14", "2026-12-21", "2026-12-28"]
    assert result.lines(periods) == [("2026-12-07", 95.0, 105.0), ("2026-12-14", None, None)]
    with pytest.raises(AdjustError, match="period dates"):
        result.lines(periods[:2])
    assert same(FORWARD, [100, 95, NAN, 90, 80])  # the input is not modified


def test_bad_forward_input() -> None:
    with pytest.raises(AdjustError, match="no forward forecast"):
        run("+1", forward=np.array([]))
    with pytest.raises(AdjustError, match="infinite"):
        run("+1", forward=np.array([1.0, np.inf]))
    with pytest.raises(AdjustError, match="one row"):
        run("+1", forward=np.ones((2, 2)))


FORWARDS = hnp.arrays(
    np.float64,
    st.integers(1, 30),
    elements=st.one_of(st.floats(0, 1e9, allow_subnormal=False), st.just(np.nan)),
)


@settings(max_examples=200)
@given(
    forward=FORWARDS,
    identity=st.sampled_from(["x1", "+0%", "+0", "-0", "x1.0", "-0%"]),
    data=st.data(),
)
def test_identity_adjustments_leave_any_forward_unchanged(forward, identity, data) -> None:
    # Forecasts are non-negative quantities; NaN marks a missing period.
    start = data.draw(st.integers(1, len(forward)))
    spec = data.draw(st.sampled_from([identity, f"{start}-: {identity}", f"{start}: {identity}"]))
    result = apply(
        parse(spec), forward, recent_actuals=[], window_demand=None, window_forecast=None
    )
    assert np.array_equal(result.adjusted, forward, equal_nan=True)
    assert result.delta_units == 0.0 and not result.clipped


# ---- suggestions ------------------------------------------------------------------------------


def naive_suggest(bias, demand, forecast, flag, run_, periods):
    """Per-series reference for the vectorised rule (docs/adjustments.md)."""
    specs, reasons = [], []
    for b, d, f, g, r, n in zip(bias, demand, forecast, flag, run_, periods, strict=True):
        if g == 0 or not f > 0 or not d >= 0:
            specs.append("")
            reasons.append("")
            continue
        factor = d / f
        if (g > 0 and not factor < 1) or (g < 0 and not factor > 1) or round(factor, 2) == 1:
            specs.append("")
            reasons.append("")
            continue
        word = "over-forecast" if g > 0 else "under-forecast"
        size = f"{word} by {abs(b) / d * 100:.0f}%" if d > 0 else f"{word} with no demand"
        tail = f" ({abs(r)} running)" if r else ""
        specs.append(str(parse(f"x{round(factor, 2)}")))
        reasons.append(f"{size} over {n} periods{tail}; scale forward by {round(factor, 2):.2f}")
    return specs, reasons


def test_suggest_examples() -> None:
    demand = np.array([100.0, 100.0, 100.0, 0.0, 100.0, 100.0, 100.0])
    forecast = np.array([123.0, 90.0, 105.0, 10.0, 80.0, 0.0, 100.4])
    bias = forecast - demand
    flag = np.array([1, -1, 0, 1, 1, 1, 1])
    run_ = np.array([9, -4, 3, 2, 5, 1, 6])
    periods = np.array([13, 13, 13, 13, 13, 13, 13])
    specs, reasons = suggest(bias, demand, forecast, flag, run_, periods)
    # 100/123 = 0.813 → x0.81; Bias % = Σ(F−A)/ΣA = 23/100 (docs/sources.md §1.2)
    assert specs[0] == "x0.81"
    assert reasons[0] == "over-forecast by 23% over 13 periods (9 running); scale forward by 0.81"
    assert specs[1] == "x1.11"  # 100/90 = 1.111
    assert reasons[1] == "under-forecast by 10% over 13 periods (4 running); scale forward by 1.11"
    assert specs[2] == reasons[2] == ""  # not flagged
    assert specs[3] == "x0"  # forecast with no demand at all
    assert reasons[3].startswith("over-forecast with no demand over 13 periods")
    assert specs[4] == ""  # flagged over, but the window says under: no suggestion
    assert specs[5] == ""  # no forecast to scale
    assert specs[6] == ""  # 100/100.4 rounds to 1.00: nothing to change
    assert specs.dtype == object and reasons.dtype == object


def test_suggest_accepts_the_scorecard_text_flags() -> None:
    specs, _ = suggest(
        np.array([20.0, -20.0, 20.0]),
        np.array([100.0, 100.0, 100.0]),
        np.array([120.0, 80.0, 120.0]),
        np.array(["over", "under", ""], dtype=object),
        np.array([6, -6, 6]),
        np.array([8, 8, 8]),
    )
    assert list(specs) == ["x0.83", "x1.25", ""]


def test_suggest_matches_a_per_series_reference() -> None:
    rng = np.random.default_rng(11)
    n = 5000
    demand = rng.gamma(2.0, 50.0, n).round(0)
    demand[rng.random(n) < 0.05] = 0.0
    demand[rng.random(n) < 0.01] = -5.0  # returns exceed sales
    forecast = demand * rng.lognormal(0.0, 0.3, n)
    forecast[rng.random(n) < 0.03] = 0.0
    bias = forecast - demand
    flag = rng.choice([-1, 0, 0, 1], n)
    run_ = rng.integers(-12, 13, n)
    periods = rng.integers(1, 27, n)
    specs, reasons = suggest(bias, demand, forecast, flag, run_, periods)
    ref_specs, ref_reasons = naive_suggest(bias, demand, forecast, flag, run_, periods)
    assert list(specs) == ref_specs and list(reasons) == ref_reasons
    assert sum(1 for s in ref_specs if s) > 500
    # Every suggestion is a valid spec that scales by the stated factor.
    for spec in {s for s in specs if s}:
        assert parse(spec).op == "multiply" and str(parse(spec)) == spec


def test_suggest_shape_mismatch() -> None:
    with pytest.raises(ValueError, match="shape"):
        suggest(np.ones(3), np.ones(3), np.ones(2), np.ones(3), np.ones(3), np.ones(3))


@pytest.mark.parametrize("spec", ["1,200", "=1,5", "x1,1", "1-2: 100,200", "+1,000"])
def test_a_comma_between_digits_is_refused_as_ambiguous(spec: str) -> None:
    # 1,200 is a thousand two hundred in English, 1.2 in much of Europe, and a list of two values
    # in our syntax: refused rather than guessed (common practice for locale-neutral input).
    with pytest.raises(AdjustSyntaxError, match="ambiguous") as caught:
        parse(spec)
    assert "separate values with spaces" in str(caught.value)


def test_values_may_be_separated_by_a_comma_and_a_space() -> None:
    assert parse("100, 120,  130").values == (100.0, 120.0, 130.0)
    assert parse("1-2: 1200 1300").values == (1200.0, 1300.0)


# ---- use NAME: another forecast's forward values ----------------------------------------------
#
# The expected values come from a plain per-period rule written here (docs/adjustments.md,
# "use NAME"): in the range, a period takes the other forecast's value where it has one (below
# zero becomes 0, as for every operation) and keeps the original where it has none.

STAT = np.array([90.0, NAN, 60.0, 85.0, -5.0])
OTHERS = {"stat": STAT, "customer": np.array([1.0, 2.0, 3.0, 4.0, 5.0])}


def plain_use(forward, other, start: int, end: int | None) -> list[float]:
    """The rule period by period, in plain Python."""
    out = [float(v) for v in forward]
    last = len(out) if end is None else end
    for h in range(start, last + 1):
        value = float(other[h - 1])
        if not math.isnan(value):
            out[h - 1] = max(value, 0.0)
    return out


def plain_change(before, after, start: int, end: int | None, price=None) -> tuple[float, float]:
    """Σ after − Σ before over the range, missing counted as 0, and the same times price."""
    last = len(before) if end is None else end
    units = value = 0.0
    for h in range(start, last + 1):
        a = 0.0 if math.isnan(after[h - 1]) else after[h - 1]
        b = 0.0 if math.isnan(before[h - 1]) else before[h - 1]
        units += a - b
        if price is not None:
            value += (a - b) * price
    return units, value


@pytest.mark.parametrize(
    ("spec", "canonical", "start", "end"),
    [
        ("use stat", "use stat", 1, None),
        ("USE  Stat", "use stat", 1, None),
        (" 1 - 4 : use stat ", "1-4: use stat", 1, 4),
        ("3-: use customer", "3-: use customer", 3, None),
        ("1-: use sales_2", "use sales_2", 1, None),
        ("2: use x9", "2: use x9", 2, 2),
    ],
)
def test_use_parses_to_its_canonical_text(spec, canonical, start, end) -> None:
    adj = parse(spec)
    assert (adj.op, adj.start, adj.end) == ("use", start, end)
    assert adj.source == canonical.split("use ")[1]
    assert str(adj) == canonical and parse(canonical) == adj


@settings(max_examples=200)
@given(
    range_=RANGE,
    name=st.from_regex(r"[a-z0-9_]{1,12}", fullmatch=True).filter(
        lambda n: n not in ("naive", "snaive", "forecast")
    ),
    gap=st.sampled_from([" ", "  ", "\t"]),
)
def test_use_round_trips_for_every_valid_name(range_: str, name: str, gap: str) -> None:
    # The name rule is the input's (docs/input-format.md, Competing forecasts).
    adj = parse(f"{range_} use{gap}{name.upper()}")
    assert adj.source == name and parse(str(adj)) == adj


@pytest.mark.parametrize(
    ("spec", "pointer", "words"),
    [
        ("use", 3, "use needs the name of another forecast"),
        ("1-2: use ", 8, "use needs the name of another forecast"),
        ("use st-at", 6, "'st-at' is not a forecast name"),
        ("use my stat", 6, "'my stat' is not a forecast name"),
        ("2: use stat!", 11, "'stat!' is not a forecast name"),
        ("usestat", 3, "put a space between use and the forecast's name"),
        ("use naive", 4, "to carry the latest actual forward write mean 1"),
        ("1-3: use SNAIVE", 9, "not a forecast of the forward periods"),
        ("use forecast", 4, "the forecast under review itself"),
        ("use stat: 1", 0, "the range comes first"),
    ],
)
def test_use_with_a_bad_name_points_at_it(spec: str, pointer: int, words: str) -> None:
    with pytest.raises(AdjustSyntaxError, match=re.escape(words)) as caught:
        parse(spec)
    lines = str(caught.value).splitlines()
    assert lines[2] == " " * (2 + pointer) + "^" and caught.value.position == pointer
    assert lines[3] == EXPECTED + "." and "use NAME" in EXPECTED


def test_use_takes_the_other_forecast_over_the_range() -> None:
    # Forward 100, 95, –, 90, 80; stat 90, –, 60, 85, -5.
    result = run("1-4: use stat", alternatives=OTHERS)
    assert same(result.adjusted, [90, 95, 60, 85, 80])
    assert same(result.adjusted, plain_use(FORWARD, STAT, 1, 4))
    # Δ = (90 − 100) + 0 (stat missing: original kept) + (60 − 0) + (85 − 90) = +45
    assert result.delta_units == 45.0 == plain_change(FORWARD, result.adjusted, 1, 4)[0]
    assert result.notes == ("stat has no value in period 2; the original forecast is kept there",)
    assert result.description == (
        "periods 1-4: use stat → +45 units; stat has no value in period 2; the original "
        "forecast is kept there"
    )
    assert not result.clipped
    three = run("3-: use customer", alternatives=OTHERS)
    assert same(three.adjusted, [100, 95, 3, 4, 5]) and three.notes == ()
    assert three.delta_units == (3 - 0) + (4 - 90) + (5 - 80)


def test_use_clips_a_negative_other_forecast_to_zero_and_says_so() -> None:
    whole = run("use stat", alternatives=OTHERS)
    # Period 5: stat -5 would be negative, so 0 (the rule every operation follows).
    assert same(whole.adjusted, [90, 95, 60, 85, 0])
    assert same(whole.adjusted, plain_use(FORWARD, STAT, 1, None))
    assert whole.clipped and whole.message == "1 period(s) would fall below zero and were set to 0"
    assert whole.delta_units == 45.0 - 80.0
    assert "set to 0" in whole.description


def test_use_values_the_change_with_the_price() -> None:
    forward = np.array([95.0, 95.0, 95.0, 95.0, 60.0])
    other = {"stat": np.array([85.5, 85.5, 85.5, 85.5, 10.0])}
    result = run("1-4: use stat", forward=forward, alternatives=other, price=32.5)
    # 4 · (85.5 − 95) = −38 units; −38 · 32.5 = −1,235
    assert result.delta_units == pytest.approx(-38.0)
    assert result.delta_value == pytest.approx(-38.0 * 32.5)
    assert result.description == "periods 1-4: use stat → -38 units (value -1,235)"
    per = run("1-4: use stat", alternatives=OTHERS, price=[2.0, 4.0, 9.0, NAN, 1.0])
    # (90 − 100)·2 + 0·4 + 60·9; period 4 changed (−5) but has no price: left out, said
    assert per.delta_value == pytest.approx(-20.0 + 540.0)
    assert "value leaves out 1 period(s) without a price" in per.notes


def test_use_where_the_other_forecast_has_no_value_at_all_is_refused() -> None:
    with pytest.raises(AdjustError, match="the forecast stat has no value in period 2") as caught:
        run("2: use stat", alternatives=OTHERS)
    assert "nothing to use" in str(caught.value)
    gaps = {"stat": np.array([1.0, NAN, NAN, NAN, 2.0])}
    with pytest.raises(AdjustError, match="no value in periods 2-4"):
        run("2-4: use stat", alternatives=gaps)
    many = {"stat": np.array([7.0] + [NAN] * 8)}
    notes = run("use stat", forward=np.ones(9), alternatives=many).notes
    assert notes == (
        "stat has no value in periods 2, 3, 4, 5, 6 and 3 more; the original forecast is kept "
        "there",
    )


def test_use_of_a_forecast_the_file_does_not_have() -> None:
    with pytest.raises(AdjustError) as caught:
        run("use sales", alternatives=OTHERS)
    text = str(caught.value)
    assert "this file has no forecast 'sales' (no column forecast_sales)" in text
    assert "its other forecasts are: stat, customer" in text
    with pytest.raises(AdjustError, match="Write use stat: the name comes without 'forecast_'"):
        run("use forecast_stat", alternatives=OTHERS)
    for none in (None, {}):
        with pytest.raises(AdjustError) as caught:
            run("use stat", alternatives=none)
        text = str(caught.value)
        assert "this file has no other forecast to use" in text
        assert "forecast_<name>" in text and "docs/input-format.md" in text


def test_use_checks_the_other_forecast_like_the_forward_one() -> None:
    with pytest.raises(AdjustError, match="has 3 forward value"):
        run("use stat", alternatives={"stat": np.ones(3)})
    with pytest.raises(AdjustError, match="infinite"):
        run("use stat", alternatives={"stat": np.array([1.0, np.inf, 1, 1, 1])})
    assert same(STAT, [90, NAN, 60, 85, -5])  # the input is not modified


# Forecasts under review are non-negative quantities; the other forecast may dip below zero.
FORWARD_OR_GAP = st.one_of(st.floats(0, 1e6, allow_subnormal=False), st.just(np.nan))
OTHER_OR_GAP = st.one_of(st.floats(-50, 1e6, allow_subnormal=False), st.just(np.nan))


@settings(max_examples=300)
@given(data=st.data(), horizon=st.integers(1, 12))
def test_use_matches_the_plain_rule(data, horizon: int) -> None:
    forward = np.array(data.draw(st.lists(FORWARD_OR_GAP, min_size=horizon, max_size=horizon)))
    other = np.array(data.draw(st.lists(OTHER_OR_GAP, min_size=horizon, max_size=horizon)))
    start = data.draw(st.integers(1, horizon))
    end = data.draw(st.one_of(st.none(), st.integers(start, horizon)))
    price = data.draw(st.floats(0.01, 100))
    spec = f"{start}-{'' if end is None else end}: use stat"
    last = horizon if end is None else end
    if np.isnan(other[start - 1 : last]).all():
        with pytest.raises(AdjustError, match="nothing to use"):
            run(spec, forward=forward, alternatives={"stat": other}, price=price)
        return
    result = run(spec, forward=forward, alternatives={"stat": other}, price=price)
    expected = plain_use(forward, other, start, end)
    assert same(result.adjusted[start - 1 : last], expected[start - 1 : last])
    outside = np.r_[0 : start - 1, last:horizon]
    assert same(result.adjusted[outside], forward[outside])  # nothing moves outside the range
    negative = other[start - 1 : last] < 0
    assert result.clipped == bool(negative.any())
    units, value = plain_change(forward, result.adjusted, start, end, price)
    assert result.delta_units == pytest.approx(units, rel=1e-9, abs=1e-6)
    assert result.delta_value == pytest.approx(value, rel=1e-9, abs=1e-6)
    gaps = int(np.isnan(other[start - 1 : last]).sum())
    assert any("original forecast is kept" in n for n in result.notes) == (gaps > 0)
    # Never a missing value written as a change: every NaN in the range was NaN before.
    now_missing = np.isnan(result.adjusted[start - 1 : last])
    assert not (now_missing & ~np.isnan(forward[start - 1 : last])).any()


# ---- use NAME across the ledger: recorded, exported, valued in a later cycle -------------------

WEEKS = [f"2026-{m:02d}-{d:02d}" for m, d in ((9, 21), (9, 28), (10, 5), (10, 12), (10, 19))]
WEEKS += [f"2026-{m:02d}-{d:02d}" for m, d in ((10, 26), (11, 2), (11, 9), (11, 16), (11, 23))]
PRICE = 3.0


def write_week(path: Path, actuals: int) -> None:
    """Series A and B at Lyon: forecast 80 a week, stat 52, 47, 60, ... forward, price 3.

    The first ``actuals`` weeks have demand (50, then 45 in week 8); the rest are forward.
    """
    stat = {7: "52", 8: "47", 9: "60"}
    demand = {k: "50" for k in range(10)} | {8: "45"}
    lines = ["item,location,period,demand,forecast,forecast_stat,price"]
    for item in ("A", "B"):
        for k, week in enumerate(WEEKS):
            shown = demand[k] if k < actuals else ""
            lines.append(f"{item},Lyon,{week},{shown},80,{stat.get(k, '70')},{PRICE:g}")
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")


def test_use_is_recorded_exported_and_valued_like_any_adjustment(tmp_path: Path) -> None:
    week1, week2 = tmp_path / "w1.csv", tmp_path / "w2.csv"
    write_week(week1, actuals=7)  # latest actual 11-02; forward 11-09, 11-16, 11-23
    write_week(week2, actuals=9)  # two weeks later: 11-09 and 11-16 now have demand
    with Ledger.open(tmp_path / "ledger.sqlite") as ledger:
        first = read_portfolio(week1)
        session = ReviewSession(ReviewCycle(first, ledger), reviewer="ana")
        series = session.find("A", "Lyon")
        assert series is not None
        session.commit_decision(
            series, outcome="adjusted", root_cause="model_miss", adjustment="1-2: USE Stat"
        )
        event = ledger.history()[-1]
        # Stored as the canonical spec with one original/adjusted line per period it touched.
        assert event.adjustment == "1-2: use stat"
        assert [(ln.period, ln.original, ln.adjusted) for ln in event.lines] == [
            ("2026-11-09", 80.0, 52.0),
            ("2026-11-16", 80.0, 47.0),
        ]
        # The export of the cycle carries the adjusted forward forecast.
        tables = review_tables(ReviewCycle(first, ledger))
        rows = tables.forecast
        a = rows.loc[rows["item"] == "A"].set_index("period")
        assert a["adjusted_forecast"].tolist() == [52.0, 47.0, 80.0]
        assert a["adjusted"].tolist() == [True, True, False]
        assert (rows.loc[rows["item"] == "B", "adjusted_forecast"] == 80.0).all()
        decisions = tables.decisions
        assert decisions.loc[decisions["item"] == "A", "adjustment"].tolist() == ["1-2: use stat"]
        # Two weeks on, both periods have demand (50 and 45): the value the override added is
        # |80 − 50| − |52 − 50| = 28 and |80 − 45| − |47 − 45| = 33, 61 units, 183 at price 3.
        realised = ReviewCycle(read_portfolio(week2), ledger).realised
    assert realised["adjusted"].tolist() == [52.0, 47.0]
    assert realised["actual"].tolist() == [50.0, 45.0]
    assert realised["value_added"].tolist() == [28.0, 33.0]
    assert realised["value_added_value"].sum() == pytest.approx(61.0 * PRICE)
