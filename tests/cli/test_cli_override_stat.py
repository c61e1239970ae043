"""``triage overrides`` and ``triage report`` with a statistical forecast in the weekly files.

The seeded month of weekly reviews (``sample.cycles``) written with its competing forecasts
(``build_cycles(competing=True)``: ``forecast_stat`` and ``forecast_customer``, the statistical
forecast left empty in one adjusted period, ``STAT_BLANK``). Each overridden period is set
against the statistical forecast of the same period as the file holds it, |stat − actual| −
|adjusted − actual| (docs/history.md; Gilliland 2010, docs/sources.md §3.1), worked out here
from the file's own rows and the scenario's hand-made lines, over two cycles' files.
"""

from __future__ import annotations

import csv
import io
import json
import math
from pathlib import Path

import pytest

from sample.cycles import CYCLES_SEED, FIRST_CYCLE_WEEK, STAT_BLANK, CycleScenario, build_cycles
from tests.cli.test_cli_report import run
from triage.core import history

#: The two files whose overrides are valued: the third and the newest week.
FILES = (2, 3)


@pytest.fixture(scope="module")
def scenario(tmp_path_factory: pytest.TempPathFactory) -> CycleScenario:
    return build_cycles(tmp_path_factory.mktemp("cycles"), seed=CYCLES_SEED, competing=True)


def _column(path: Path, name: str) -> dict[tuple[str, str, str], float | None]:
    """(item, location, period) -> the file's cell of ``name`` (None when empty)."""
    with path.open(encoding="utf-8", newline="") as handle:
        return {
            (r["item"], r["location"], r["period"]): (float(r[name]) if r[name] else None)
            for r in csv.DictReader(handle)
        }


def _expected(scenario: CycleScenario, k: int, name: str = "forecast_stat") -> dict:
    """Per realised line of file ``k``: what the override beat the competing forecast by, in
    units and in value (None where the file has no value for the period)."""
    stat = _column(scenario.files[k], name)
    out = {}
    for line in scenario.realised_in(k):
        value = stat[(line.item, line.location, line.period)]
        assert line.actual is not None
        beat = (
            None if value is None else abs(value - line.actual) - abs(line.adjusted - line.actual)
        )
        out[(line.cycle, line.item, line.location, line.period)] = (
            value,
            beat,
            None if beat is None else beat * line.price,
        )
    return out


def _overrides(scenario: CycleScenario, k: int, *extra: str, cwd: Path):
    return run(
        "overrides", str(scenario.files[k]), "--ledger", str(scenario.ledger), *extra, cwd=cwd
    )


def _float(cell: str) -> float | None:
    return None if cell == "" else float(cell)


@pytest.mark.parametrize("k", FILES)
def test_detail_values_each_line_against_the_stat_forecast(
    scenario: CycleScenario, tmp_path: Path, k: int
) -> None:
    result = _overrides(scenario, k, "--detail", "--format", "csv", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    rows = list(csv.DictReader(io.StringIO(result.stdout)))
    expected = _expected(scenario, k)
    assert len(rows) == len(expected) > 0
    blanks = 0
    for row in rows:
        stat, beat, value = expected[(row["cycle"], row["item"], row["location"], row["period"])]
        assert _float(row["stat"]) == stat
        if beat is None:
            blanks += 1
            assert row["value_added_vs_stat"] == row["value_added_vs_stat_value"] == ""
        else:
            assert float(row["value_added_vs_stat"]) == pytest.approx(beat, abs=1e-9)
            assert float(row["value_added_vs_stat_value"]) == pytest.approx(value, rel=1e-9)
    # The scenario's empty statistical cell is a realised line in both files.
    assert STAT_BLANK[1] <= FIRST_CYCLE_WEEK + k and blanks == 1
    # The columns that existed keep their place; the stat ones follow the value added.
    header = list(rows[0])
    at = header.index("value_added_value")
    assert header[at + 1 : at + 5] == [
        "stat",
        "abs_error_stat",
        "value_added_vs_stat",
        "value_added_vs_stat_value",
    ]


@pytest.mark.parametrize("k", FILES)
def test_breakdown_by_cycle_sums_the_lines_with_a_stat_value(
    scenario: CycleScenario, tmp_path: Path, k: int
) -> None:
    result = _overrides(scenario, k, "--by", "cycle", "--format", "json", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    doc = json.loads(result.stdout)
    assert doc["stat_forecast"] == "forecast_stat"
    expected = _expected(scenario, k)
    cycles = sorted({key[0] for key in expected})
    assert [r["cycle"] for r in doc["rows"]] == [*cycles, history.ALL]
    assert len(cycles) >= 2  # overrides of two cycles realised in each file
    for row in doc["rows"]:
        lines = [v for key, v in expected.items() if row["cycle"] in (key[0], history.ALL)]
        compared = [v for v in lines if v[1] is not None]
        assert row["adjustments"] == len(lines)
        assert row["stat_adjustments"] == len(compared)
        assert row["value_added_vs_stat"] == pytest.approx(sum(v[1] for v in compared), abs=1e-9)
        assert row["value_added_vs_stat_value"] == pytest.approx(
            sum(v[2] for v in compared), rel=1e-9
        )


def test_table_adds_a_second_breakdown_against_the_stat_forecast(
    scenario: CycleScenario, tmp_path: Path
) -> None:
    result = _overrides(scenario, 3, "--by", "direction", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    first, _, second = result.stdout.partition("against the statistical forecast (forecast_stat):")
    assert "error removed" in first and "beat stat by" not in first.split("\n\n", 1)[1]
    assert "periods with stat" in second and "beat stat by" in second
    total = _expected(scenario, 3)
    beat = sum(v[1] for v in total.values() if v[1] is not None)
    last = next(line for line in second.splitlines() if line.startswith("all"))
    assert f"{beat:+,.1f}" in last.split()


def test_stat_name_picks_another_forecast_and_refuses_an_absent_one(
    scenario: CycleScenario, tmp_path: Path
) -> None:
    result = _overrides(
        scenario, 3, "--detail", "--format", "csv", "--stat-name", "customer", cwd=tmp_path
    )
    assert result.returncode == 0, result.stderr
    rows = list(csv.DictReader(io.StringIO(result.stdout)))
    expected = _expected(scenario, 3, "forecast_customer")
    for row in rows:
        _, beat, _ = expected[(row["cycle"], row["item"], row["location"], row["period"])]
        got = _float(row["value_added_vs_stat"])
        assert (got is None and beat is None) or math.isclose(got, beat, abs_tol=1e-9)  # type: ignore[arg-type]
    missing = _overrides(scenario, 3, "--stat-name", "engine", cwd=tmp_path)
    assert missing.returncode == 2 and "Traceback" not in missing.stderr
    assert (
        "forecast_engine" in missing.stderr and "forecast_stat, forecast_customer" in missing.stderr
    )
    bad = _overrides(scenario, 3, "--stat-name", "Stat-1", cwd=tmp_path)
    assert bad.returncode == 2 and "--stat-name" in bad.stderr and "Traceback" not in bad.stderr


def test_report_prints_the_verdict_and_the_overrides_against_stat(
    scenario: CycleScenario, tmp_path: Path
) -> None:
    target = tmp_path / "weekly.html"
    result = run(
        "report",
        str(scenario.files[3]),
        "--ledger",
        str(scenario.ledger),
        "--to",
        str(target),
        cwd=tmp_path,
    )
    assert result.returncode == 0, result.stderr
    assert "Process steps (naive -> stat -> customer -> forecast" in result.stdout
    assert "Best: " in result.stdout
    assert "Against the statistical forecast forecast_stat" in result.stdout
    document = target.read_text(encoding="utf-8")
    assert '<section id="steps">' in document and 'id="steps-table"' in document


def test_report_refuses_an_absent_stat_name_before_writing(
    scenario: CycleScenario, tmp_path: Path
) -> None:
    target = tmp_path / "weekly.html"
    result = run(
        "report",
        str(scenario.files[3]),
        "--ledger",
        str(scenario.ledger),
        "--to",
        str(target),
        "--stat-name",
        "engine",
        cwd=tmp_path,
    )
    assert result.returncode == 2 and "Traceback" not in result.stderr
    assert "no column forecast_engine" in result.stderr
    assert not target.exists()
