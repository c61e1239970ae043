"""``triage report`` and ``triage overrides`` as a user runs them: in a subprocess.

When ``triage.cli`` has the commands wired in, the installed ``triage`` script is run; until
then a small bootstrap runs the same handlers behind the same error handling as
``triage.cli.main`` (``TriageError`` -> ``triage: <message>`` on stderr, exit 2).
"""

from __future__ import annotations

import argparse
import csv
import io
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from sample.cycles import CYCLES_SEED, N_FILES, CycleScenario, build_cycles
from triage.core import history, report
from triage.core.cycle import ReviewCycle
from triage.core.ledger import Ledger
from triage.core.read import read_portfolio
from triage.core.review import ReviewSession
from triage.render import report as page

NEWEST = N_FILES - 1

BOOTSTRAP = """
import argparse, sys
from triage.commands_report import add_report_commands
from triage.core.errors import TriageError
parser = argparse.ArgumentParser(prog="triage")
sub = parser.add_subparsers(dest="command", required=True)
add_report_commands(sub)
args = parser.parse_args(sys.argv[1:])
try:
    sys.exit(int(args.handler(args) or 0))
except TriageError as exc:
    print(f"triage: {exc}", file=sys.stderr)
    sys.exit(exc.exit_code)
"""


def _wired() -> bool:
    from triage.cli import build_parser

    parser = build_parser()
    commands = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return {"report", "overrides"} <= set(commands.choices)


def triage_command() -> list[str]:
    """The installed console script when it has the commands, else the bootstrap."""
    script = Path(sys.executable).with_name("triage")
    if _wired():
        return [str(script)] if script.exists() else [sys.executable, "-m", "triage.cli"]
    return [sys.executable, "-c", BOOTSTRAP]


def run(*args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    # No user config from the machine running the tests; a wide terminal for the tables.
    env = {**os.environ, "COLUMNS": "200", "XDG_CONFIG_HOME": str(cwd), "XDG_DATA_HOME": str(cwd)}
    return subprocess.run(
        [*triage_command(), *args], capture_output=True, text=True, cwd=cwd, env=env, timeout=180
    )


@pytest.fixture(scope="module")
def scenario(tmp_path_factory: pytest.TempPathFactory) -> CycleScenario:
    return build_cycles(tmp_path_factory.mktemp("cycles"), seed=CYCLES_SEED)


def _core(scenario: CycleScenario) -> report.ReportData:
    portfolio = read_portfolio(scenario.files[NEWEST])
    with Ledger.open(scenario.ledger, read_only=True) as ledger:
        return report.build_report(ReviewCycle(portfolio, ledger))


def test_report_writes_the_default_file_and_prints_the_summary(scenario: CycleScenario) -> None:
    newest = scenario.files[NEWEST]
    result = run("report", str(newest), "--ledger", str(scenario.ledger), cwd=newest.parent)
    assert result.returncode == 0, result.stderr
    target = newest.with_name(f"{newest.stem}-report-{scenario.cycles[NEWEST]}.html")
    assert target.exists()
    assert f"Report: {target}" in result.stdout
    data = _core(scenario)
    cov = data.coverage
    assert (
        f"Coverage: {cov.reviewed} of {cov.series} series reviewed, {page.fmt_pct(cov.covered)}"
        in result.stdout
    )
    assert page.overall_sentence(data) in result.stdout
    assert "Caution: " in result.stdout
    assert "<title>" in target.read_text(encoding="utf-8")


def test_report_options(scenario: CycleScenario, tmp_path: Path) -> None:
    target = tmp_path / "to.html"
    result = run(
        "report",
        str(scenario.files[NEWEST]),
        "--ledger",
        str(scenario.ledger),
        "--to",
        str(target),
        "--top",
        "3",
        "--repeat",
        "2/3",
        "--cover",
        "0.6",
        "--window",
        "8",
        cwd=tmp_path,
    )
    assert result.returncode == 0, result.stderr
    text = target.read_text(encoding="utf-8")
    assert text.count("<figure><figcaption>#") == 3
    assert "in at least 2 of the last 3 cycles" in result.stdout
    assert "(target 60.0%)" in result.stdout


def test_report_without_a_ledger_warns_and_writes(scenario: CycleScenario, tmp_path: Path) -> None:
    lone = tmp_path / "lone.csv"
    lone.write_bytes(scenario.files[NEWEST].read_bytes())
    result = run("report", str(lone), cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert "No decisions have been recorded" in result.stderr
    assert (tmp_path / f"lone-report-{scenario.cycles[NEWEST]}.html").exists()
    assert "Coverage: 0 of" in result.stdout


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        (["--to", "out.txt"], "HTML file"),
        (["--repeat", "5/4"], "N must be between 1 and M"),
        (["--repeat", "three"], "--repeat must be N/M"),
        (["--window", "0"], "--window must be at least 1"),
        (["--cover", "1.5"], "--cover must be a fraction"),
        (["--top", "0"], "--top must be at least 1"),
        (["--ledger", "nowhere.ledger.sqlite"], "no decision ledger"),
    ],
)
def test_report_errors_exit_2(
    scenario: CycleScenario, tmp_path: Path, extra: list[str], message: str
) -> None:
    result = run("report", str(scenario.files[NEWEST]), *extra, cwd=tmp_path)
    assert result.returncode == 2, result.stdout
    assert result.stderr.startswith("triage: ")
    assert message.lower() in result.stderr.lower()
    assert "Traceback" not in result.stderr


def test_report_of_a_missing_portfolio_exits_2(tmp_path: Path) -> None:
    result = run("report", str(tmp_path / "none.csv"), cwd=tmp_path)
    assert result.returncode == 2
    assert "no such file" in result.stderr


def _overrides(scenario: CycleScenario, *extra: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    return run(
        "overrides", str(scenario.files[NEWEST]), "--ledger", str(scenario.ledger), *extra, cwd=cwd
    )


@pytest.mark.parametrize("by", ["direction", "size", "reviewer", "root_cause", "cycle"])
def test_overrides_csv_is_the_core_breakdown(
    scenario: CycleScenario, tmp_path: Path, by: str
) -> None:
    result = _overrides(scenario, "--by", by, "--format", "csv", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    rows = list(csv.DictReader(io.StringIO(result.stdout)))
    data = _core(scenario)
    expected = history.summarise(data.realised, by)
    assert [r[by] for r in rows] == expected[by].tolist()
    for row, source in zip(rows, expected.to_dict("records"), strict=True):
        assert float(row["value_added"]) == pytest.approx(source["value_added"], rel=1e-12)
        assert int(float(row["adjustments"])) == source["adjustments"]
        assert float(row["share_helped"]) == pytest.approx(source["share_helped"], rel=1e-12)


def test_overrides_json_and_detail(scenario: CycleScenario, tmp_path: Path) -> None:
    result = _overrides(scenario, "--format", "json", "--by", "size", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    doc = json.loads(result.stdout)
    assert doc["cycle"] == scenario.cycles[NEWEST]
    assert doc["grouping"] == "size"
    assert [r["size"] for r in doc["rows"]][-1] == history.ALL
    status = {s["status"]: s["lines"] for s in doc["line_status"]}
    assert status[history.REALISED] == len(scenario.realised_in(NEWEST))
    detail = _overrides(scenario, "--detail", "--format", "csv", cwd=tmp_path)
    rows = list(csv.DictReader(io.StringIO(detail.stdout)))
    assert len(rows) == len(scenario.realised_in(NEWEST))
    expected = {
        (e.cycle, e.item, e.location, e.period): e.value_added for e in scenario.realised_in(NEWEST)
    }
    for row in rows:
        key = (row["cycle"], row["item"], row["location"], row["period"])
        assert float(row["value_added"]) == expected[key]


def test_overrides_table_is_readable(scenario: CycleScenario, tmp_path: Path) -> None:
    result = _overrides(scenario, "--by", "root_cause", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert "error removed" in result.stdout
    assert "Promotion or event" in result.stdout
    assert "periods not counted: series is not in this portfolio" in result.stdout


def test_overrides_headings_never_break_inside_a_word(
    scenario: CycleScenario, tmp_path: Path
) -> None:
    # The narrowest table the command prints (100 columns), the widest breakdown (every row of
    # the detail): headings may wrap between words, never inside one.
    env_run = subprocess.run(
        [
            *triage_command(),
            "overrides",
            str(scenario.files[NEWEST]),
            "--ledger",
            str(scenario.ledger),
            "--by",
            "direction",
            "--detail",
        ],
        capture_output=True,
        text=True,
        cwd=tmp_path,
        timeout=180,
        env={**os.environ, "COLUMNS": "60", "XDG_CONFIG_HOME": str(tmp_path)},
    )
    assert env_run.returncode == 0, env_run.stderr
    for word in ("direction", "reviewer", "adjusted", "original", "actual", "horizon"):
        broken = [word[:k] for k in range(3, len(word))]
        lines = env_run.stdout.splitlines()
        for line in lines:
            cells = line.split()
            assert not any(cell in broken for cell in cells), (word, line)


def test_overrides_need_a_ledger(scenario: CycleScenario, tmp_path: Path) -> None:
    lone = tmp_path / "lone.csv"
    lone.write_bytes(scenario.files[NEWEST].read_bytes())
    result = run("overrides", str(lone), cwd=tmp_path)
    assert result.returncode == 2
    assert "No decisions have been recorded" in result.stderr


def test_overrides_csv_neutralises_formula_text(tmp_path: Path) -> None:
    weeks = [f"2027-01-{d:02d}" for d in (4, 11, 18, 25)] + ["2027-02-01", "2027-02-08"]
    path = tmp_path / "w.csv"

    def write(last: int) -> None:
        with path.open("w", encoding="utf-8", newline="") as handle:
            out = csv.writer(handle)
            out.writerow(["item", "period", "demand", "forecast"])
            for i, week in enumerate(weeks):
                out.writerow(["=SUM(A1)", week, 10 + i if i <= last else "", 12])

    write(3)
    with Ledger.open(tmp_path / "w.ledger.sqlite") as ledger:
        session = ReviewSession(ReviewCycle(read_portfolio(path), ledger), reviewer="@evil\x1b[31m")
        session.commit_decision(0, outcome="adjusted", root_cause="promotion", adjustment="1: -1")
    write(4)
    result = run("overrides", str(path), "--by", "reviewer", "--format", "csv", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert "\x1b" not in result.stdout
    rows = list(csv.DictReader(io.StringIO(result.stdout)))
    # OWASP "CSV Injection": a leading formula trigger gets an apostrophe (docs/sources.md §6.1).
    assert rows[0]["reviewer"].startswith("'@evil")
    detail = run("overrides", str(path), "--detail", "--format", "csv", cwd=tmp_path)
    row = next(csv.DictReader(io.StringIO(detail.stdout)))
    # Keys stay byte-exact, so they join back in the planning system.
    assert row["item"] == "=SUM(A1)"
    # |12 - 14| - |11 - 14| = -1, by hand.
    assert float(row["value_added"]) == -1.0


def test_report_title_follows_the_calendar(tmp_path: Path) -> None:
    months = ["2026-01-01", "2026-02-01", "2026-03-01", "2026-04-01", "2026-05-01"]
    lines = ["item,period,demand,forecast"] + [
        f"M-{i},{m},{'' if k == 4 else 10 + i + k},{12 + i}"
        for i in range(3)
        for k, m in enumerate(months)
    ]
    path = tmp_path / "monthly.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    result = run("report", str(path), "--to", str(tmp_path / "r.html"), cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    html = (tmp_path / "r.html").read_text(encoding="utf-8")
    assert "<h1>Monthly forecast review</h1>" in html and "Weekly" not in html
    assert "Monthly forecast review" in result.stdout
