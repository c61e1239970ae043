"""The review screens' export: the portfolio's own headers, the long layout, a workbook a
planner can filter (issue 9 §5; docs/export.md, "Column names")."""

from __future__ import annotations

from datetime import datetime
from pathlib import Path

import openpyxl

from tests.tui.conftest import wait_for, wait_loaded
from triage.tui.app import Options, TriageApp
from triage.tui.widgets.series_list import SeriesList

SAMPLE = Path(__file__).resolve().parents[2] / "sample" / "portfolio.csv"


async def test_export_from_the_screens_uses_the_files_headers(tmp_path: Path) -> None:
    path = tmp_path / "erp.csv"
    head, _, body = SAMPLE.read_text(encoding="utf-8").partition("\n")
    assert head.startswith("item,location,period,")
    path.write_text(head.replace("item,location,period,", "sku,plant,week,", 1) + "\n" + body)
    columns = {"item": "sku", "location": "plant", "period": "week"}
    app = TriageApp(Options(portfolio=path, reviewer="ana", columns=columns))
    target = tmp_path / "up.xlsx"
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        series = app.query_one(SeriesList).current
        item, location = app.session.key(series)
        await pilot.press("2", "c")  # root cause 2, no change
        await wait_for(pilot, lambda: app.session.outcome[series] != "", "the decision")
        app.export(target)
        await wait_for(pilot, lambda: app.status_text.startswith("exported"), "the export")
    book = openpyxl.load_workbook(target)
    decisions = [[c.value for c in row] for row in book["Decisions"].iter_rows()]
    assert decisions[0][:3] == ["sku", "plant", "cycle"]
    assert decisions[1][:2] == [item, location]
    forecast = book["Forecast"]
    # Long layout: one row per series and period, the period column under the file's header.
    assert [c.value for c in forecast[1]][:5] == [
        "sku",
        "plant",
        "week",
        "forecast",
        "adjusted_forecast",
    ]
    assert (
        isinstance(forecast["C2"].value, datetime) and forecast["C2"].number_format == "yyyy-mm-dd"
    )
    assert forecast.freeze_panes == "A2" and forecast.auto_filter.ref
