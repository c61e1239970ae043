"""The weekly HTML report: every number in it is what the core functions return.

The report is parsed back with the standard library's ``html.parser`` and each table is compared
cell by cell with the frame or figure it was made from (``history.*``, ``ranking.scorecard``,
``report.bias_distribution``). The bias histogram is checked against ``numpy.histogram``. A real
browser (Debian's Chromium, when installed) renders the file headless to a PNG.
"""

from __future__ import annotations

import csv
import math
import os
import re
import shutil
import subprocess
from datetime import UTC, datetime
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from sample.cycles import CYCLES_SEED, N_FILES, CycleScenario, build_cycles
from triage.core import history, report
from triage.core.cycle import ReviewCycle
from triage.core.errors import TriageError
from triage.core.export import CAUTION
from triage.core.ledger import Ledger
from triage.core.ranking import scorecard
from triage.core.read import read_portfolio
from triage.core.review import ReviewSession
from triage.core.vocabulary import OUTCOMES
from triage.render import report as page

NEWEST = N_FILES - 1
STAMP = datetime(2027, 3, 2, 8, 30, tzinfo=UTC)


class Tables(HTMLParser):
    """Cell texts of every ``<table id=...>``, the page title and the text of ``#ids``."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tables: dict[str, list[list[str]]] = {}
        self.title = ""
        self.by_id: dict[str, str] = {}
        self._table: str | None = None
        self._cell: list[str] | None = None
        self._row: list[str] | None = None
        self._in_title = False
        self._open_ids: list[tuple[str, str, int]] = []
        self._depth = 0
        self.tags: list[tuple[str, dict[str, str | None]]] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self._depth += 1
        attributes = dict(attrs)
        self.tags.append((tag, attributes))
        if tag == "table":
            self._table = attributes.get("id") or ""
            self.tables[self._table] = []
        elif tag == "tr" and self._table is not None:
            self._row = []
        elif tag in ("td", "th") and self._row is not None:
            self._cell = []
        elif tag == "title":
            self._in_title = True
        if attributes.get("id") and tag in ("p", "ul"):
            self._open_ids.append((attributes["id"] or "", tag, self._depth))
            self.by_id[attributes["id"] or ""] = ""

    def handle_endtag(self, tag: str) -> None:
        if tag in ("td", "th") and self._cell is not None and self._row is not None:
            self._row.append(" ".join("".join(self._cell).split()))
            self._cell = None
        elif tag == "tr" and self._row is not None and self._table is not None:
            self.tables[self._table].append(self._row)
            self._row = None
        elif tag == "table":
            self._table = None
        elif tag == "title":
            self._in_title = False
        if self._open_ids and self._open_ids[-1][1] == tag:
            self._open_ids.pop()
        self._depth -= 1

    def handle_data(self, data: str) -> None:
        if self._cell is not None:
            self._cell.append(data)
        if self._in_title:
            self.title += data
        for name, _, _ in self._open_ids:
            self.by_id[name] += data


def parse(document: str) -> Tables:
    parser = Tables()
    parser.feed(document)
    parser.close()
    return parser


def number(cell: str) -> float:
    """A formatted cell back to a number: ``+1,234.5`` -> 1234.5, ``41.7%`` -> 0.417."""
    cell = cell.strip()
    if cell == page.DASH:
        return math.nan
    scale = 0.01 if cell.endswith("%") else 1.0
    return float(cell.rstrip("%").replace(",", "")) * scale


def close(cell: str, value: float, decimals: int) -> bool:
    """The cell shows ``value`` rounded to ``decimals`` (of the shown unit)."""
    shown = number(cell)
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return math.isnan(shown)
    pct = cell.strip().endswith("%")
    tolerance = 0.5 * 10.0 ** (-decimals) * (0.01 if pct else 1.0) + 1e-12
    return abs(shown - float(value)) <= tolerance


@pytest.fixture(scope="module")
def scenario(tmp_path_factory: pytest.TempPathFactory) -> CycleScenario:
    return build_cycles(tmp_path_factory.mktemp("cycles"), seed=CYCLES_SEED)


@pytest.fixture(scope="module")
def written(scenario: CycleScenario) -> tuple[page.ReportResult, Tables, str]:
    portfolio = read_portfolio(scenario.files[NEWEST])
    with Ledger.open(scenario.ledger, read_only=True) as ledger:
        result = page.write_report(
            ReviewCycle(portfolio, ledger),
            scenario.ledger.parent / "weekly.html",
            generated_at=STAMP,
        )
    document = result.path.read_text(encoding="utf-8")
    return result, parse(document), document


def test_report_file_is_written_with_title_and_caution(
    written: tuple[page.ReportResult, Tables, str],
) -> None:
    result, tables, document = written
    assert result.bytes == len(document.encode("utf-8"))
    assert tables.title == f"Weekly forecast review: {result.data.portfolio_name}, cycle 2027-03-01"
    assert "2027-03-02T08:30:00Z" in document
    # The advisory caution is the export's, word for word.
    assert CAUTION in " ".join(document.replace("&#x27;", "'").split())
    assert result.data.caution == CAUTION


def test_report_is_self_contained(written: tuple[page.ReportResult, Tables, str]) -> None:
    _, tables, document = written
    assert not any(
        tag in ("script", "link", "iframe", "object", "embed", "img") for tag, _ in tables.tags
    )
    for _, attributes in tables.tags:
        for name in ("src", "href"):
            value = attributes.get(name)
            assert value is None or value.startswith(("#", "data:")), (name, value)
    assert "@import" not in document and "url(http" not in document
    assert sum(1 for tag, _ in tables.tags if tag == "svg") >= 10 + 3
    csp = [
        a
        for t, a in tables.tags
        if t == "meta" and a.get("http-equiv") == "Content-Security-Policy"
    ]
    assert csp and "default-src 'none'" in (csp[0]["content"] or "")


def test_coverage_decisions_and_fva_tables(
    written: tuple[page.ReportResult, Tables, str], scenario: CycleScenario
) -> None:
    result, tables, _ = written
    data = result.data
    portfolio = read_portfolio(scenario.files[NEWEST])
    with Ledger.open(scenario.ledger, read_only=True) as ledger:
        cov = history.coverage(
            portfolio, ReviewCycle(portfolio, ledger).log, scorecard(portfolio), 0.8
        )
        counts = history.decision_counts(
            history.DecisionLog.read(ledger, portfolio.cycle), portfolio.cycle
        )
    fva = history.portfolio_fva(portfolio)
    rows = {r[0]: r[1] for r in tables.tables["coverage-table"][1:]}
    assert number(rows["Series in the portfolio"]) == cov.series
    assert number(rows["Series reviewed this cycle"]) == cov.reviewed == 2
    assert close(rows["Share of error covered by the reviewed series"], cov.covered, 1)
    assert close(rows["Target share"], 0.8, 1)
    assert number(rows["Worst-offender set (series covering the target share)"]) == cov.worst
    assert number(rows["Worst offenders reviewed"]) == cov.worst_reviewed

    decisions = tables.tables["decisions-table"]
    labels = {c.code: c.label for c in OUTCOMES}
    header = decisions[0]
    for row in decisions[1:]:
        code = "total" if row[0] == "Total" else next(k for k, v in labels.items() if v == row[0])
        for column, cell in zip(header[1:], row[1:], strict=True):
            cause = (
                "total"
                if column == "total"
                else next(c for c in counts.columns if data.cause_labels.get(c, c) == column)
            )
            assert number(cell) == counts.loc[code, cause]

    fva_rows = {r[0]: r[1] for r in tables.tables["fva-table"][1:]}
    assert close(fva_rows["Absolute error of the forecast (units)"], fva["forecast_abs_error"], 1)
    assert close(
        fva_rows["Absolute error of the naive forecast (units)"], fva["naive_abs_error"], 1
    )
    assert close(fva_rows["Forecast value added over naive (units)"], fva["value_added"], 1)
    assert close(fva_rows["Forecast value added over naive (value)"], fva["value_added_value"], 2)
    assert close(fva_rows["Relative absolute error (forecast / naive)"], fva["relative_error"], 3)
    assert (
        number(fva_rows["Series whose forecast is worse than naive"])
        == fva["series_worse_than_naive"]
    )


def test_bias_histogram_table_and_numpy(written: tuple[page.ReportResult, Tables, str]) -> None:
    result, tables, _ = written
    bins = result.data.bias
    rows = tables.tables["bias-table"][1:]
    assert [r[0] for r in rows[:-1]] == list(bins.labels)
    assert [number(r[1]) for r in rows[:-1]] == bins.counts.tolist()
    assert number(rows[-1][1]) == bins.undefined
    values = result.data.card["bias_pct"].to_numpy()
    finite = values[np.isfinite(values)]
    assert int(bins.counts.sum()) + bins.undefined == len(values)
    # Reference: numpy.histogram on the inner range (its last bin is closed; 1.0 excluded).
    inner = finite[(finite >= -1.0) & (finite < 1.0)]
    reference, _ = np.histogram(inner, bins=np.round(np.arange(-10, 11) * 0.1, 12))
    assert bins.counts[1:-1].tolist() == reference.tolist()
    assert bins.counts[0] == int((finite < -1.0).sum())
    assert bins.counts[-1] == int((finite >= 1.0).sum())


def test_top_offenders_table_and_charts(written: tuple[page.ReportResult, Tables, str]) -> None:
    result, tables, document = written
    data = result.data
    rows = tables.tables["top-table"][1:]
    assert len(rows) == len(data.top) == report.TOP_DEFAULT == len(data.charts)
    for row, (pos, card_row) in zip(rows, data.top.iterrows(), strict=True):
        assert number(row[0]) == card_row["rank"]
        assert (row[1], row[2]) == (card_row["item"], card_row["location"])
        assert close(row[3], card_row["error_share"], 1)
        assert close(row[4], card_row["cum_share"], 1)
        assert close(row[5], card_row["abs_error_value"], 2)
        assert close(row[6], card_row["bias_pct"], 1)
        rep = data.repeat.loc[pos]
        assert row[8] == f"{rep['times_in_worst']} of {rep['windows_seen']}"
    for chart in data.charts:
        # One scale: demand and forecast sit on one axes; no NaN is drawn as a value.
        assert len(chart.demand) == len(chart.forecast) == len(chart.labels)
    assert document.count("<figure><figcaption>#") == len(data.charts)


def test_repeat_carried_and_active_tables(written: tuple[page.ReportResult, Tables, str]) -> None:
    result, tables, _ = written
    data = result.data
    flagged = data.repeat.loc[data.repeat["repeat"]]
    rows = tables.tables["repeat-table"][1:]
    assert sorted((r[0], r[1], number(r[2]), number(r[3])) for r in rows) == sorted(
        zip(
            flagged["item"],
            flagged["location"],
            flagged["times_in_worst"],
            flagged["windows_seen"],
            strict=True,
        )
    )
    marks = [c for c in data.repeat.columns if c.startswith("worst_")]
    for r in rows:
        source = flagged.loc[(flagged["item"] == r[0]) & (flagged["location"] == r[1])].iloc[0]
        assert [m == "●" for m in r[5:]] == [bool(source[c]) for c in marks]

    carried = tables.tables["carried-table"][1:]
    assert [(r[0], r[1], r[2]) for r in carried] == list(
        zip(data.carried["item"], data.carried["location"], data.carried["cycle"], strict=True)
    )
    active = tables.tables["active-table"][1:]
    assert len(active) == len(data.active) == 3
    for r, a in zip(active, data.active.itertuples(index=False), strict=True):
        assert (r[0], r[1], r[2], r[5]) == (a.cycle, a.item, a.location, a.adjustment)
        assert number(r[6]) == a.remaining and number(r[7]) == a.periods
        assert number(r[8]) == a.superseded
        assert (r[9], r[10]) == (a.first_remaining, a.last_remaining)
        assert close(r[11], a.units_change, 1)


@pytest.mark.parametrize("name", list(report.SUMMARY_BY))
def test_realised_breakdowns_equal_summarise(
    written: tuple[page.ReportResult, Tables, str], name: str
) -> None:
    result, tables, _ = written
    data = result.data
    frame = history.summarise(data.realised, report.SUMMARY_BY[name])
    pd.testing.assert_frame_equal(frame, data.summaries[name])
    groups = 2 if name == "direction_size" else 1
    key = f"realised-{name.replace('_', '-')}"
    if name == "group" and (data.realised["group"] == history.SERIES_DECISIONS).all():
        # The breakdown by group decision is shown only when there is a group decision.
        assert key not in tables.tables
        return
    rows = tables.tables[key][1:]
    assert len(rows) == len(frame)
    for row, source in zip(rows, frame.to_dict("records"), strict=True):
        cells = row[groups:]
        assert number(cells[0]) == source["adjustments"]
        assert number(cells[1]) == source["decisions"]
        assert number(cells[2]) == source["helped"]
        assert number(cells[3]) == source["hurt"]
        assert close(cells[4], source["share_helped"], 1)
        assert close(cells[5], source["abs_error_original"], 1)
        assert close(cells[6], source["abs_error_adjusted"], 1)
        assert close(cells[7], source["value_added"], 1)
        assert close(cells[8], source["value_added_value"], 2)
        assert close(cells[9], source["relative_value_added"], 1)
        assert close(cells[10], source["avg_rel_mae"], 3)


def test_realised_lines_status_and_sentences(
    written: tuple[page.ReportResult, Tables, str], scenario: CycleScenario
) -> None:
    result, tables, _ = written
    data = result.data
    rows = tables.tables["realised-lines"][1:]
    assert len(rows) == len(data.realised) == len(scenario.realised_in(NEWEST))
    for row, line in zip(rows, data.realised.itertuples(index=False), strict=True):
        assert (row[0], row[1], row[2], row[3]) == (
            line.cycle,
            line.item,
            line.location,
            line.period,
        )
        assert close(row[4], line.original, 1) and close(row[5], line.adjusted, 1)
        assert close(row[6], line.actual, 1) and close(row[7], line.value_added, 1)
        assert close(row[8], line.value_added_value, 2)
        assert (row[9], row[10]) == (line.direction, line.size)
    status = tables.tables["status-table"][1:]
    assert [number(r[1]) for r in status] == data.status["lines"].tolist()
    assert [number(r[2]) for r in status] == data.status["decisions"].tolist()
    overall = data.summaries["direction"].iloc[-1]
    sentence = tables.by_id["realised-overall"]
    found = [number(x) for x in re.findall(r"[+-]?\d[\d,]*(?:\.\d+)?%?", sentence)]
    assert found[:6] == pytest.approx(
        [
            overall["adjustments"],
            overall["decisions"],
            overall["helped"],
            overall["adjustments"],
            round(overall["share_helped"], 3),
            round(overall["value_added"], 1),
        ],
        abs=1e-9,
    )
    highlights = tables.by_id["realised-highlights"]
    up = data.summaries["direction"].set_index("direction").loc["up"]
    assert f"Upward overrides: {int(up['helped'])} of {int(up['adjustments'])} helped" in highlights


def test_summary_text_uses_the_same_figures(
    written: tuple[page.ReportResult, Tables, str],
) -> None:
    result, _, _ = written
    data = result.data
    text = page.summary_text(data, result.path)
    cov = data.coverage
    assert (
        f"Coverage: {cov.reviewed} of {cov.series} series reviewed, {page.fmt_pct(cov.covered)}"
        in text
    )
    assert f"Repeat offenders: {int(data.repeat['repeat'].sum())} series" in text
    assert (
        f"Active adjustments: {len(data.active)} with {int(data.active['remaining'].sum())}" in text
    )
    assert page.overall_sentence(data) in text
    assert text.rstrip().endswith(CAUTION)


# --------------------------------------------------------------------------------------------
# Hostile text and bad targets

HOSTILE_ITEM = "<script>alert(1)</script>"
HOSTILE_LOCATION = "[/]"
HOSTILE_NOTE = 'fine"><img src=x onerror=alert(2)>\x1b]0;owned\x07 [bold]x[/]'
HOSTILE_REVIEWER = "</td><script>alert(3)</script>"


def hostile_files(folder: Path) -> tuple[Path, Path, Path]:
    """Two weekly files (cycle week 5, then week 7) and a ledger with a hostile decision."""
    weeks = pd.date_range("2027-01-04", periods=10, freq="7D").strftime("%Y-%m-%d").tolist()

    def write(name: str, last: int) -> Path:
        path = folder / name
        with path.open("w", encoding="utf-8", newline="") as handle:
            out = csv.writer(handle)
            out.writerow(["item", "location", "period", "demand", "forecast", "price"])
            for item, location, level in (
                (HOSTILE_ITEM, HOSTILE_LOCATION, 40),
                ("B-2", "=cmd|x", 10),
            ):
                for i, week in enumerate(weeks):
                    out.writerow(
                        [item, location, week, level + i % 3 if i <= last else "", level + 2, 3.5]
                    )
        return path

    first, second = write("w5.csv", 5), write("w7.csv", 7)
    portfolio = read_portfolio(first)
    ledger_path = folder / "w.ledger.sqlite"
    with Ledger.open(ledger_path) as ledger:
        session = ReviewSession(ReviewCycle(portfolio, ledger), reviewer=HOSTILE_REVIEWER)
        index = session.find(HOSTILE_ITEM, HOSTILE_LOCATION)
        session.commit_decision(
            index,
            outcome="adjusted",
            root_cause="promotion",
            note=HOSTILE_NOTE,
            adjustment="1-2: +5",
        )
        other = session.find("B-2", "=cmd|x")
        session.commit_decision(other, outcome="deferred", root_cause="unknown", note=HOSTILE_NOTE)
    return first, second, ledger_path


def test_data_text_is_escaped(tmp_path: Path) -> None:
    _, second, ledger_path = hostile_files(tmp_path)
    portfolio = read_portfolio(second)
    with Ledger.open(ledger_path, read_only=True) as ledger:
        result = page.write_report(ReviewCycle(portfolio, ledger), tmp_path / "r.html")
    document = result.path.read_text(encoding="utf-8")
    assert "<script" not in document.lower()
    assert "<img" not in document.lower()
    assert "\x1b" not in document and "\x07" not in document
    assert html_escaped(HOSTILE_ITEM) in document
    assert "[/]" in document and "[bold]x[/]" in document
    tables = parse(document)
    lines = tables.tables["realised-lines"][1:]
    assert lines and lines[0][1] == HOSTILE_ITEM and lines[0][2] == HOSTILE_LOCATION
    assert lines[0][11] == HOSTILE_REVIEWER
    carried = tables.tables.get("carried-table", [])
    notes = [r[6] for r in carried[1:]]
    # Control characters shown as control pictures (ESC -> U+241B, BEL -> U+2407).
    assert notes and all("\u241b]0;owned\u2407" in n for n in notes)


def html_escaped(value: str) -> str:
    import html

    return html.escape(value, quote=True)


def test_bad_targets_leave_everything_unchanged(scenario: CycleScenario, tmp_path: Path) -> None:
    portfolio = read_portfolio(scenario.files[NEWEST])
    before = scenario.files[NEWEST].read_bytes()
    with Ledger.open(scenario.ledger, read_only=True) as ledger:
        with pytest.raises(report.ReportError, match=r"does not end in \.html"):
            page.write_report(ReviewCycle(portfolio, ledger), tmp_path / "r.txt")
        # The portfolio itself is never a target: it is not an .html file.
        with pytest.raises(report.ReportError, match=r"does not end in \.html"):
            page.write_report(ReviewCycle(portfolio, ledger), scenario.files[NEWEST])
        with pytest.raises(TriageError, match="cannot write"):
            page.write_report(ReviewCycle(portfolio, ledger), tmp_path / "missing" / "r.html")
        with pytest.raises(report.ReportError, match="top offenders"):
            report.build_report(ReviewCycle(portfolio, ledger), top=0)
    assert scenario.files[NEWEST].read_bytes() == before
    assert not (tmp_path / "r.txt").exists()
    assert not list((tmp_path).glob(".r.html.*"))


def test_long_tables_are_cut_with_a_note(
    scenario: CycleScenario, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(page, "TABLE_MAX", 2)
    portfolio = read_portfolio(scenario.files[NEWEST])
    with Ledger.open(scenario.ledger, read_only=True) as ledger:
        result = page.write_report(ReviewCycle(portfolio, ledger), tmp_path / "cut.html")
    document = result.path.read_text(encoding="utf-8")
    tables = parse(document)
    flagged = int(result.data.repeat["repeat"].sum())
    assert flagged > 2
    assert len(tables.tables["repeat-table"]) - 1 == 2
    assert f"Showing 2 of {flagged}, highest ranked now." in document
    # The count above the table stays complete.
    assert f"<p>{flagged} series were in the worst-offender set" in document


def test_default_target_is_beside_the_portfolio(scenario: CycleScenario) -> None:
    portfolio = read_portfolio(scenario.files[NEWEST])
    assert report.default_report_path(portfolio) == scenario.files[NEWEST].with_name(
        f"{scenario.files[NEWEST].stem}-report-{portfolio.cycle}.html"
    )


def test_report_without_a_ledger(scenario: CycleScenario, tmp_path: Path) -> None:
    portfolio = read_portfolio(scenario.files[NEWEST])
    result = page.write_report(ReviewCycle(portfolio, None), tmp_path / "plain.html")
    tables = parse(result.path.read_text(encoding="utf-8"))
    rows = {r[0]: r[1] for r in tables.tables["coverage-table"][1:]}
    assert number(rows["Series reviewed this cycle"]) == 0
    assert "realised-lines" not in tables.tables
    assert "No decision ledger" in " ".join(result.data.notices)


# --------------------------------------------------------------------------------------------
# A real browser


def _browser() -> str | None:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    return None


def _browser_args(profile: Path) -> list[str]:
    return [
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        f"--user-data-dir={profile}",
    ]


def render_png(
    document: Path, png: Path, *, height: int = 2000
) -> subprocess.CompletedProcess[str]:
    """Render an HTML file headless with Chromium to ``png`` (1200 px wide)."""
    browser = _browser()
    assert browser is not None
    with_profile = png.parent / ".chromium-profile"
    env = {**os.environ, "HOME": str(png.parent)}
    return subprocess.run(
        [
            browser,
            *_browser_args(with_profile),
            f"--screenshot={png}",
            f"--window-size=1200,{height}",
            document.resolve().as_uri(),
        ],
        capture_output=True,
        text=True,
        timeout=180,
        env=env,
    )


@pytest.mark.skipif(
    _browser() is None, reason="Chromium is not installed (.ci/run installs it from Debian)"
)
def test_report_renders_in_a_real_browser(
    written: tuple[page.ReportResult, Tables, str], tmp_path: Path
) -> None:
    from matplotlib import image

    result, _, _ = written
    png = tmp_path / "report.png"
    done = render_png(result.path, png)
    assert png.exists(), done.stderr[-2000:]
    assert png.stat().st_size > 30_000
    pixels = image.imread(str(png))
    grey = pixels[..., :3].mean(axis=2)
    # Not blank: ink on a good part of the page and a wide spread of tones.
    assert (grey < 0.9).mean() > 0.02
    assert grey.std() > 0.05
    dom = subprocess.run(
        [
            _browser(),
            *_browser_args(tmp_path / ".dom-profile"),
            "--dump-dom",
            result.path.resolve().as_uri(),
        ],
        capture_output=True,
        text=True,
        timeout=180,
        env={**os.environ, "HOME": str(tmp_path)},
    )
    rendered = parse(dom.stdout)
    assert (
        rendered.title
        == f"Weekly forecast review: {result.data.portfolio_name}, cycle {result.data.cycle}"
    )
    assert "realised-direction-size" in rendered.tables
