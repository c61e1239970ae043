"""The detail chart: recent periods by default, the whole history on request, spikes clipped."""

from __future__ import annotations

import numpy as np

from triage.core.review import ChartSeries
from triage.tui.widgets.chart import RECENT_PERIODS, clip_level, first_shown, render_chart


def series(n: int = 117, last_actual: int = 103, spike_at: int | None = 30) -> ChartSeries:
    demand = np.full(n, 40.0)
    demand[last_actual + 1 :] = np.nan
    if spike_at is not None:
        demand[spike_at] = 1531.0  # one spike against ~40 a week
    forecast = np.full(n, 42.0)
    labels = tuple(f"p{i:03d}" for i in range(n))
    return ChartSeries(labels, demand, forecast, None, last_actual - 12, last_actual)


def test_default_view_is_the_recent_periods_and_the_forward_horizon() -> None:
    data = series()
    assert first_shown(data, whole=False) == data.last_actual + 1 - RECENT_PERIODS
    assert first_shown(data, whole=True) == 0
    text = render_chart(data, 100, 20).plain
    assert "p078" in text and "p000" not in text  # starts 26 periods before the forward part
    assert "1531" not in text  # the old spike is out of view, so the scale is the window's
    whole = render_chart(data, 100, 20, whole=True).plain
    assert "p000" in whole and "1531" in whole


def test_clipping_cuts_a_spike_and_says_so() -> None:
    data = series()
    shown = [data.demand.copy(), data.forecast.copy()]
    level = clip_level(shown)
    # Twice the 90th percentile of the shown values (common practice for a readable scale).
    assert level == 2 * np.quantile(np.abs(np.concatenate([v[np.isfinite(v)] for v in shown])), 0.9)
    text = render_chart(data, 100, 20, whole=True, clip=True).plain
    assert f"clipped at {level:,.0f}" in text
    assert "1531" not in text
    # Nothing to clip: no mark, the chart is as drawn without clipping.
    flat = series(spike_at=None)
    assert clip_level([flat.demand, flat.forecast]) is None


def test_other_forecasts_are_overlaid_with_a_legend_and_can_be_hidden() -> None:
    """Each competing forecast is drawn in its own marker and named in the legend; the
    forecast under review is drawn over them (common practice: the line being judged on top)."""
    base = series(spike_at=None)
    stat = np.full(len(base.labels), 10.0)
    customer = np.full(len(base.labels), 70.0)
    customer[:50] = np.nan  # a gap stays a gap
    data = ChartSeries(
        base.labels,
        base.demand,
        base.forecast,
        None,
        base.window_start,
        base.last_actual,
        others=(("stat", stat), ("customer", customer)),
    )
    text = render_chart(data, 100, 20).plain
    legend = [line for line in text.splitlines() if "stat" in line or "customer" in line]
    assert any("xx stat" in line for line in legend)  # marker of OTHER_STYLES[0]
    assert any("** customer" in line for line in legend)  # marker of OTHER_STYLES[1]
    # The scale reaches the customer's 70, above demand (40) and forecast (42).
    assert "70" in text
    hidden = render_chart(data, 100, 20, others=False).plain
    assert "stat" not in hidden and "customer" not in hidden
    assert "70" not in hidden
    assert render_chart(base, 100, 20).plain == render_chart(base, 100, 20, others=False).plain
