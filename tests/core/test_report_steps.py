"""The weekly report's process-step section and its overrides against the statistical forecast.

The seeded month of weekly reviews written with its competing forecasts
(``build_cycles(competing=True)``). The section's table must be ``compare.compare``'s portfolio
table for the cycle's window and season, cell by cell (one owner: the report formats, it does
not compute), its verdict the words of ``triage compare``, and every text escaped. The
comparison measures themselves are tested in ``tests/core/test_compare.py`` against their
references; the override figures against a plain loop in ``tests/core/test_override_stat.py``.
"""

from __future__ import annotations

import dataclasses
import html
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from sample.cycles import CYCLES_SEED, N_FILES, CycleScenario, build_cycles
from tests.core.test_report import close, parse
from triage.core import history, report
from triage.core.compare import compare
from triage.core.cycle import ReviewCycle
from triage.core.ledger import Ledger
from triage.core.read import read_portfolio
from triage.core.settings import ScoreSettings
from triage.render import report as page
from triage.render.compare import verdict_lines

NEWEST = N_FILES - 1
STAMP = datetime(2027, 3, 2, 8, 30, tzinfo=UTC)


@pytest.fixture(scope="module")
def scenario(tmp_path_factory: pytest.TempPathFactory) -> CycleScenario:
    return build_cycles(tmp_path_factory.mktemp("cycles"), seed=CYCLES_SEED, competing=True)


def _data(scenario: CycleScenario, settings: ScoreSettings | None = None) -> report.ReportData:
    portfolio = read_portfolio(scenario.files[NEWEST])
    with Ledger.open(scenario.ledger, read_only=True) as ledger:
        return report.build_report(ReviewCycle(portfolio, ledger, settings), generated_at=STAMP)


@pytest.fixture(scope="module")
def data(scenario: CycleScenario) -> report.ReportData:
    return _data(scenario)


def test_steps_table_is_compares_table_in_step_order(
    scenario: CycleScenario, data: report.ReportData
) -> None:
    portfolio = read_portfolio(scenario.files[NEWEST])
    expected = compare(portfolio).table.set_index("forecast_name")
    assert data.comparison is not None
    assert data.comparison.steps == ("naive", "stat", "customer", "forecast")
    tables = parse(page.render_html(data))
    rows = tables.tables["steps-table"]
    assert rows[0][:4] == ["step", "forecast", "WAPE", "bias %"]
    assert [r[1] for r in rows[1:]] == list(data.comparison.steps)
    priced = rows[0][5] == "abs error (value)"
    assert priced
    for row in rows[1:]:

        def value(column: str, name: str = row[1]) -> float:
            return float(
                expected[column].to_numpy(dtype=np.float64, na_value=np.nan)[
                    list(expected.index).index(name)
                ]
            )

        assert int(row[0]) == value("step")
        assert close(row[2], value("wape"), 1)
        assert close(row[3], value("bias_pct"), 1)
        assert close(row[4], value("abs_error"), 1)
        assert close(row[5], value("abs_error_value"), 2)
        assert close(row[6], value("fva_units"), 1)
        assert close(row[7], value("fva_pct"), 1)
        assert close(row[8], value("p"), 3)
        assert close(row[9], value("mape"), 1)


def test_verdict_and_mape_warning_are_compares_words(data: report.ReportData) -> None:
    assert data.comparison is not None
    document = page.render_html(data)
    # The scenario's customer forecast is biased low and MAPE picks it: the warning is shown
    # as a caution (common practice: MAPE favours low forecasts; docs/metrics.md).
    assert data.comparison.verdict.mape_warning
    assert data.comparison.verdict.mape_pick == "customer"
    for line in verdict_lines(data.comparison):
        assert html.escape(line, quote=True) in document
    warning = next(x for x in verdict_lines(data.comparison) if x.startswith("Warning:"))
    assert f'<p class="caution">{html.escape(warning, quote=True)}</p>' in document
    summary = page.summary_text(data)
    assert "Process steps (naive -> stat -> customer -> forecast, on " in summary
    for line in verdict_lines(data.comparison):
        assert f"  {line}" in summary


def test_the_cycles_window_and_season_are_the_comparisons(scenario: CycleScenario) -> None:
    settings = ScoreSettings(window=6, season=4)
    data = _data(scenario, settings)
    assert data.comparison is not None
    portfolio = read_portfolio(scenario.files[NEWEST])
    expected = compare(portfolio, 6, 4)
    pd.testing.assert_frame_equal(data.comparison.table, expected.table)
    assert data.comparison.cells == expected.cells
    # snaive is compared but is no step of the default chain: listed last, without a step.
    rows = parse(page.render_html(data)).tables["steps-table"][1:]
    assert rows[-1][:2] == ["", "snaive"]


def test_hostile_text_in_the_section_is_escaped(data: report.ReportData) -> None:
    assert data.comparison is not None
    hostile = '<img src=x onerror="alert(1)">&'
    old = data.comparison
    rename = {"customer": hostile}
    table = old.table.assign(forecast_name=[rename.get(n, n) for n in old.table["forecast_name"]])
    result = dataclasses.replace(
        old,
        names=tuple(rename.get(n, n) for n in old.names),
        steps=tuple(rename.get(n, n) for n in old.steps),
        table=table,
        verdict=dataclasses.replace(old.verdict, mape_pick=hostile),
    )
    document = page.render_html(dataclasses.replace(data, comparison=result))
    assert "<img" not in document and 'onerror="' not in document
    escaped = html.escape(hostile, quote=True)
    section = document[document.index('<section id="steps">') :]
    section = section[: section.index("</section>")]
    assert section.count(escaped) >= 4  # the steps line, the table, the warning, two steps
    assert parse(document).tables["steps-table"][3][1] == hostile


def test_a_file_whose_forecasts_share_no_cell_says_why(
    scenario: CycleScenario, tmp_path: Path
) -> None:
    frame = pd.read_csv(scenario.files[NEWEST], dtype=str, keep_default_na=False)
    frame["forecast_customer"] = ""
    path = tmp_path / scenario.files[NEWEST].name
    frame.to_csv(path, index=False)
    data = report.build_report(ReviewCycle(read_portfolio(path)), generated_at=STAMP)
    assert data.comparison is None and data.comparison_note is not None
    assert "customer" in data.comparison_note
    document = page.render_html(data)
    assert '<section id="steps">' in document and "No comparison: " in document
    assert "Process steps: no comparison: " in page.summary_text(data)


def test_overrides_against_stat_in_the_report(data: report.ReportData) -> None:
    assert data.stat_name == "stat"
    tables = parse(page.render_html(data))
    total = data.summaries["direction"].iloc[-1]
    fva = {r[0]: r[1] for r in tables.tables["fva-table"][1:]}
    label = (
        f"Overrides against the statistical forecast forecast_stat, "
        f"{int(total['stat_adjustments'])} realised periods"
    )
    assert close(fva[f"{label} (units)"], total["value_added_vs_stat"], 1)
    assert close(fva[f"{label} (value)"], total["value_added_vs_stat_value"], 2)
    for name in report.SUMMARY_BY:
        if f"realised-{name.replace('_', '-')}" not in tables.tables:
            # The breakdown by group decision is shown only with a group decision.
            assert name == "group" and set(data.realised["group"]) == {"series decisions"}
            continue
        rows = tables.tables[f"realised-{name.replace('_', '-')}"]
        header = rows[0]
        frame = data.summaries[name]
        at = header.index("periods with stat")
        assert header[at:] == [
            "periods with stat",
            "error of stat (units)",
            "override beat stat by (units)",
            "override beat stat by (value)",
        ]
        for row, (_, source) in zip(rows[1:], frame.iterrows(), strict=True):
            assert int(row[at].replace(",", "")) == source["stat_adjustments"]
            assert close(row[at + 1], source["abs_error_stat"], 1)
            assert close(row[at + 2], source["value_added_vs_stat"], 1)
            assert close(row[at + 3], source["value_added_vs_stat_value"], 2)
    lines = tables.tables["realised-lines"]
    beat = [r[-1] for r in lines[1:]]
    assert all(
        close(c, v, 1) for c, v in zip(beat, data.realised["value_added_vs_stat"], strict=True)
    )
    assert np.isnan(data.realised["stat"]).sum() == 1  # the scenario's empty stat cell
    assert "Against the statistical forecast forecast_stat" in page.summary_text(data)


def test_without_competing_forecasts_the_report_has_no_new_part(tmp_path: Path) -> None:
    # The golden report (tests/cli/golden/report__html.txt) holds the page byte for byte; here
    # the reason: no comparison, no stat figures, no section.
    scenario = build_cycles(tmp_path / "plain", seed=CYCLES_SEED)
    data = _data(scenario)
    assert data.comparison is None and data.comparison_note is None and data.stat_name is None
    document = page.render_html(data)
    assert 'id="steps"' not in document and "statistical forecast" not in document
    assert "Process steps" not in page.summary_text(data)
    assert data.realised["stat"].isna().all()
    assert (history.summarise(data.realised, "direction")["stat_adjustments"] == 0).all()
