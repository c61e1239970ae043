"""The review screens read a regional extract with the options given (issue 9 §5)."""

from __future__ import annotations

from pathlib import Path

from tests.tui.conftest import wait_loaded
from triage.core.dialect import FileOptions
from triage.tui.app import Options, TriageApp
from triage.tui.widgets.series_list import SeriesList


async def test_review_reads_the_file_with_its_options(tmp_path: Path) -> None:
    path = tmp_path / "extract.csv"
    lines = ["Absatzplanung;;;", "", "item;period;demand;forecast"]
    for n, item in enumerate(("SCHLAUCH-25", "GIESSKANNE")):
        for week, day in enumerate(("06.10.2025", "13.10.2025", "20.10.2025", "27.10.2025")):
            demand = "" if week == 3 else f"{10 + n},5"
            lines.append(f"{item};{day};{demand};{12 + n + week},25")
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    options = FileOptions(sep=";", decimal=",", date_format="%d.%m.%Y", header_row=3)
    app = TriageApp(
        Options(portfolio=path, reviewer="ana", ledger=tmp_path / "l.sqlite", file_options=options)
    )
    async with app.run_test(size=(160, 48)) as pilot:
        await wait_loaded(app, pilot)
        assert app.session is not None
        portfolio = app.session.portfolio
        assert len(app.query_one(SeriesList).order) == 2
        assert portfolio.calendar.label(0) == "2025-10-06"
        # Series in key order: GIESSKANNE (11,5), then SCHLAUCH-25 (10,5).
        assert portfolio.demand[:, 0].tolist() == [11.5, 10.5]
