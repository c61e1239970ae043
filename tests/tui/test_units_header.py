"""The review screens' header says when a price column is not used (all prices 0).

docs/metrics.md, "Ranking error": with no price above 0 errors rank in units; the review
screens say so in the summary line at 80 x 24 (the classic terminal size, common practice),
and the load notice names the column.
"""

from __future__ import annotations

from pathlib import Path

from tests.core.test_zero_prices import SERIES, write
from tests.tui.conftest import wait_loaded
from triage.tui.app import Options, TriageApp


async def test_header_says_units_when_no_price_is_above_zero(tmp_path: Path) -> None:
    path = write(tmp_path, dict.fromkeys(SERIES, "0"))
    app = TriageApp(
        Options(
            portfolio=path,
            columns={"period": "week", "price": "unit_cost"},
            ledger=tmp_path / "l.sqlite",
            reviewer="ana",
        )
    )
    async with app.run_test(size=(80, 24)) as pilot:
        await wait_loaded(app, pilot)
        await pilot.pause()
        lines = ["".join(s.text for s in strip) for strip in app.screen._compositor.render_strips()]
        assert "week.csv · in units: no price above 0 ·" in lines[0]
        assert app.session is not None and not app.session.priced
        assert "column 'unit_cost' has no price above 0" in app.status_text
