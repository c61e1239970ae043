"""The review screens' fva order: the series whose last process step added the most error first.

The loss is checked against a plain loop over the sample file's rows: forecast value added of
the last step (Gilliland 2010, *The Business Forecasting Deal*, docs/sources.md §3.1), negated,
in value (each cell's difference × its price, docs/sources.md §1.4).
"""

from __future__ import annotations

import csv
import math
import shutil
from collections import defaultdict
from pathlib import Path

import pytest

from tests.tui.conftest import wait_for, wait_loaded
from triage.tui.app import Options, TriageApp
from triage.tui.widgets.series_list import SeriesList

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample" / "portfolio.csv"


@pytest.fixture
def portfolio(tmp_path: Path) -> Path:
    target = tmp_path / "week.csv"
    shutil.copy(SAMPLE, target)
    return target


def losses_by_loop(path: Path, window: int = 13) -> dict[tuple[str, str], float]:
    """Per (item, location): Σ over the window of (|forecast − d| − |customer − d|) × price.

    The sample's last forecast_<name> column is forecast_customer, the step before forecast.
    The window is the 13 latest periods holding any actual demand.
    """
    with path.open(newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    with_actual = sorted({r["period"] for r in rows if r["demand"] != ""})[-window:]
    chosen = set(with_actual)
    loss: dict[tuple[str, str], float] = defaultdict(float)
    for r in rows:
        key = (r["item"], r["location"])
        if r["period"] not in chosen or "" in (r["demand"], r["forecast"], r["forecast_customer"]):
            continue
        d = float(r["demand"])
        step = abs(float(r["forecast"]) - d) - abs(float(r["forecast_customer"]) - d)
        loss[key] += step * float(r["price"])
    return dict(loss)


async def test_b_switches_to_fva_order_with_the_largest_loss_first(portfolio: Path) -> None:
    expected = losses_by_loop(portfolio)
    worst = max(expected, key=lambda k: expected[k])
    app = TriageApp(Options(portfolio=portfolio, reviewer="ana"))
    async with app.run_test(size=(80, 24)) as pilot:
        await wait_loaded(app, pilot)
        series_list = app.query_one(SeriesList)
        await pilot.press("b")
        await wait_for(pilot, lambda: app.by == "bias", "bias order")
        await pilot.press("b")
        await wait_for(pilot, lambda: app.by == "fva", "fva order")
        await pilot.pause(0.2)
        session = app.session
        assert session is not None
        first = int(series_list.order[0])
        assert session.key(first) == worst
        assert math.isclose(session.fva_loss[first], expected[worst], rel_tol=1e-9)
        # The list shows the loss at 80 x 24, and the summary names the step.
        screen = app.export_screenshot().replace("&#160;", " ")
        assert "fva loss" in screen
        assert "fva order (customer → forecast)" in str(app.query_one("#summary").render())
        # The third press goes back to error order.
        await pilot.press("b")
        await wait_for(pilot, lambda: app.by == "error", "error order")
        assert "fva loss" not in app.export_screenshot().replace("&#160;", " ")
