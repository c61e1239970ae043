"""The review report as one self-contained HTML file, and its short summary for the terminal.

The figures come from ``triage.core.report.build_report`` (a ``ReportData``); this module only
formats them. Charts are drawn with matplotlib's object API (no pyplot, so no global figure
state) and embedded as inline SVG: the file needs no network access, no script and no external
style sheet. A Content Security Policy in the page forbids loading anything at all.

Every text that comes from the data (series keys, reviewer names, notes, root-cause labels) is
shown with its control characters made visible and then ``html.escape``-d; none of it is put
into a chart.
"""

from __future__ import annotations

import html
import io
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from triage import __version__
from triage.core import history, schema, words
from triage.core.compare import TEST_NAME, Comparison
from triage.core.cycle import ReviewCycle
from triage.core.files import refuse_existing, write_text_atomic
from triage.core.report import (
    SUMMARY_BY,
    TOP_DEFAULT,
    BiasBins,
    OffenderChart,
    ReportData,
    ReportError,
    build_report,
    default_report_path,
    error_column,
)
from triage.core.text import DASH, count, number, percent, ratio, undefined, visible
from triage.render.compare import verdict_lines

#: Realised lines listed one by one; the rest are in the breakdowns (and ``triage overrides``).
LINES_MAX = 500
#: Rows listed in the repeat-offender, carried-over and active tables (highest ranked first for
#: repeat offenders); the counts above each table are always complete.
TABLE_MAX = 100
#: Longest note shown in a table cell.
NOTE_MAX = 200

#: The report's title by calendar (``schema.WEEKLY`` / ``schema.MONTHLY``).
TITLES = {schema.WEEKLY: "Weekly forecast review", schema.MONTHLY: "Monthly forecast review"}


def report_title(frequency: str) -> str:
    """The title for a portfolio's calendar."""
    return TITLES.get(frequency, "Forecast review")


EVIDENCE = (
    "Published evidence: Fildes, Goodwin, Lawrence & Nikolopoulos (2009, International Journal "
    "of Forecasting 25(1):3-23) studied judgmental adjustments in supply-chain companies and "
    "found that small adjustments often damaged accuracy and that upward adjustments were much "
    "less likely to improve it than downward ones. The tables below show how the overrides in "
    "this ledger turned out, by direction and size; they do not say why, and a few overrides "
    "prove nothing either way."
)


@dataclass(frozen=True)
class ReportResult:
    """What ``write_report`` wrote."""

    path: Path
    data: ReportData
    bytes: int


# --------------------------------------------------------------------------------------------
# Formatting


def text(value: object, limit: int | None = None) -> str:
    """Data text for HTML: control characters made visible, cut to ``limit``, escaped."""
    shown = visible(str(value), multiline=True)
    if limit is not None and len(shown) > limit:
        shown = shown[:limit] + "…"
    return html.escape(shown, quote=True)


#: The report's numbers: an undefined one is a dash (``text.DASH``), never an empty cell.
fmt_int = partial(count, missing=DASH)
fmt_units = partial(number, decimals=1, missing=DASH)
fmt_money = partial(number, decimals=2, missing=DASH)
fmt_pct = partial(percent, missing=DASH)
fmt_ratio = partial(ratio, missing=DASH)


# --------------------------------------------------------------------------------------------
# Charts


def _svg(draw: Callable[[Any], None], size: tuple[float, float]) -> str:
    """Draw on a new matplotlib Figure and return its SVG element for inline use."""
    import matplotlib
    from matplotlib.figure import Figure

    with matplotlib.rc_context(
        {
            "svg.fonttype": "path",
            "svg.hashsalt": "triage-report",
            "font.size": 8,
            "axes.spines.top": False,
            "axes.spines.right": False,
        }
    ):
        fig = Figure(figsize=size, dpi=100, layout="constrained")
        draw(fig)
        buffer = io.StringIO()
        fig.savefig(buffer, format="svg", metadata={"Date": None, "Creator": None})
    svg = buffer.getvalue()
    return svg[svg.index("<svg") :]


COLOURS = {
    "demand": "#1f4e79",
    "forecast": "#c55a11",
    "adjusted": "#548235",
    "up": "#c00000",
    "down": "#2e75b6",
}


def _bias_chart(bins: BiasBins) -> str:
    def draw(fig: Any) -> None:
        ax = fig.subplots()
        x = np.arange(len(bins.counts))
        ax.bar(
            x,
            bins.counts,
            color=np.where(bins.low >= 0, COLOURS["up"], COLOURS["down"]),
            width=0.85,
        )
        ticks = x[::2]
        ax.set_xticks(
            ticks, [bins.labels[i].replace(" to ", "..") for i in ticks], rotation=45, ha="right"
        )
        ax.set_ylabel("series")
        ax.set_xlabel("bias % over the window (forecast − demand) / demand")

    return _svg(draw, (7.5, 2.6))


def _offender_chart(chart: OffenderChart) -> str:
    def draw(fig: Any) -> None:
        ax = fig.subplots()
        x = np.arange(len(chart.labels))
        # One axes, one scale: demand and forecast are read against the same units.
        ax.plot(x, chart.demand, color=COLOURS["demand"], lw=1.4, label="demand")
        ax.plot(x, chart.forecast, color=COLOURS["forecast"], lw=1.1, ls="--", label="forecast")
        if np.isfinite(chart.adjusted).any():
            ax.plot(
                x, chart.adjusted, color=COLOURS["adjusted"], lw=1.4, marker=".", label="override"
            )
        ax.axvline(chart.last_actual + 0.5, color="#999999", lw=0.8)
        ax.set_ylim(
            bottom=min(0.0, float(np.nanmin(np.concatenate([chart.demand, chart.forecast, [0.0]]))))
        )
        step = max(1, len(x) // 4)
        ax.set_xticks(x[::step], [chart.labels[i] for i in x[::step]])
        ax.legend(loc="upper left", fontsize=6, frameon=False, ncol=3)

    return _svg(draw, (3.6, 1.7))


def _realised_chart(cross: pd.DataFrame) -> str:
    rows = cross.loc[cross["direction"] != history.ALL]
    bands = [b for b in history.SIZE_BANDS if b in set(rows["size"])]

    def draw(fig: Any) -> None:
        share_ax, units_ax = fig.subplots(1, 2)
        x = np.arange(len(bands))
        for offset, direction in ((-0.2, history.UP), (0.2, history.DOWN)):
            part = rows.loc[rows["direction"] == direction].set_index("size").reindex(bands)
            share_ax.bar(
                x + offset,
                part["share_helped"].to_numpy() * 100,
                width=0.4,
                color=COLOURS[direction],
                label=direction,
            )
            units_ax.bar(
                x + offset,
                part["value_added"].to_numpy(),
                width=0.4,
                color=COLOURS[direction],
                label=direction,
            )
        for ax in (share_ax, units_ax):
            ax.set_xticks(x, bands)
            ax.set_xlabel("size of the override")
        share_ax.set_ylabel("% of overrides that helped")
        share_ax.set_ylim(0, 100)
        units_ax.set_ylabel("error removed (units)")
        units_ax.axhline(0, color="#666666", lw=0.8)
        share_ax.legend(fontsize=7, frameon=False)

    return _svg(draw, (7.5, 2.6))


def _cycle_chart(by_cycle: pd.DataFrame) -> str:
    rows = by_cycle.loc[by_cycle["cycle"] != history.ALL]

    def draw(fig: Any) -> None:
        ax = fig.subplots()
        values = rows["value_added"].to_numpy()
        ax.bar(
            np.arange(len(rows)),
            values,
            color=np.where(values >= 0, COLOURS["down"], COLOURS["up"]),
        )
        ax.set_xticks(np.arange(len(rows)), rows["cycle"].tolist())
        ax.axhline(0, color="#666666", lw=0.8)
        ax.set_ylabel("error removed (units)")
        ax.set_xlabel("cycle of the decision")

    return _svg(draw, (5.0, 2.2))


# --------------------------------------------------------------------------------------------
# HTML


CSS = """
body { font: 14px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, sans-serif; color: #1d1d1d;
       margin: 0 auto; max-width: 1100px; padding: 16px 24px 48px; background: #fff; }
h1 { font-size: 24px; margin: 8px 0 2px; }
h2 { font-size: 18px; margin: 28px 0 8px; border-bottom: 2px solid #1f4e79; padding-bottom: 3px; }
h3 { font-size: 15px; margin: 18px 0 6px; }
.sub { color: #555; margin: 0 0 12px; }
.caution { background: #fff4e5; border-left: 5px solid #c55a11; padding: 8px 12px; margin: 12px 0; }
.evidence { background: #eef4fb; border-left: 5px solid #2e75b6; padding: 8px 12px; margin: 8px 0; }
table { border-collapse: collapse; margin: 6px 0 10px; font-size: 12.5px; }
th, td { padding: 3px 7px; border-bottom: 1px solid #ddd; text-align: left; vertical-align: top; }
th { background: #f2f2f2; font-weight: 600; } td.num, th.num { text-align: right;
     font-variant-numeric: tabular-nums; white-space: nowrap; }
tr.total td { font-weight: 600; border-top: 2px solid #999; }
.neg { color: #c00000; } .pos { color: #2e7d32; }
.grid { display: flex; flex-wrap: wrap; gap: 10px; }
figure { margin: 0; border: 1px solid #ddd; padding: 4px 6px; width: 350px; }
figure.wide { width: auto; border: none; }
figcaption { font-size: 12px; color: #333; overflow-wrap: anywhere; }
svg { max-width: 100%; height: auto; }
.scroll { overflow-x: auto; max-width: 100%; } td.key { white-space: nowrap; }
td.date { white-space: nowrap; } details summary { cursor: default; color: #333; margin: 4px 0; }
.muted { color: #666; } footer { margin-top: 32px; font-size: 12px; color: #555; }
"""


#: Cell kinds: text, number, series key (kept on one line).
TEXT, NUMBER, KEY = 0, 1, 2
_CLASS = {TEXT: "", NUMBER: ' class="num"', KEY: ' class="key"', False: "", True: ' class="num"'}


@dataclass
class _Table:
    """A table being built: header cells and rows of (html, is_number) cells."""

    id: str
    header: list[tuple[str, bool]]
    rows: list[tuple[list[tuple[str, bool]], str]] = field(default_factory=list)

    def add(self, cells: Sequence[tuple[str, bool]], css: str = "") -> None:
        self.rows.append((list(cells), css))

    def html(self) -> str:
        head = "".join(f"<th{_CLASS[num]}>{h}</th>" for h, num in self.header)
        body = []
        for cells, css in self.rows:
            tds = "".join(f"<td{_CLASS[num]}>{c}</td>" for c, num in cells)
            body.append(f"<tr{f' class={css}' if css else ''}>{tds}</tr>")
        return (
            f'<div class="scroll"><table id="{self.id}"><thead><tr>{head}</tr></thead>'
            f"<tbody>{''.join(body)}</tbody></table></div>"
        )


def _n(value: str) -> tuple[str, bool]:
    return (value, True)


def _t(value: str) -> tuple[str, bool]:
    return (value, False)


def _d(value: str) -> tuple[str, Any]:
    """A cell kept on one line (dates)."""
    return (value, KEY)


def _key_cells(row: Any, with_location: bool) -> list[tuple[str, bool]]:
    cells: list[tuple[str, Any]] = [(text(row[schema.ITEM]), KEY)]
    if with_location:
        cells.append((text(row[schema.LOCATION]), KEY))
    return cells


def _key_header(with_location: bool) -> list[tuple[str, bool]]:
    return [_t("item")] + ([_t("location")] if with_location else [])


def _cause(data: ReportData, code: str) -> str:
    return text(data.cause_labels.get(code, code))


def _outcome(data: ReportData, code: str) -> str:
    return text(data.outcome_labels.get(code, code))


def _coverage_table(data: ReportData) -> _Table:
    c = data.coverage
    t = _Table("coverage-table", [_t("measure"), _n("value")])
    t.add([_t("Series in the portfolio"), _n(fmt_int(c.series))])
    t.add([_t("Series reviewed this cycle"), _n(fmt_int(c.reviewed))])
    t.add([_t("Share of error covered by the reviewed series"), _n(fmt_pct(c.covered))])
    t.add([_t("Handed to someone else (still open)"), _n(fmt_int(c.handed_off))])
    t.add([_t("Put off to a later cycle (still open)"), _n(fmt_int(c.deferred))])
    t.add([_t("Target share"), _n(fmt_pct(c.target))])
    t.add([_t("Worst-offender set (series covering the target share)"), _n(fmt_int(c.worst))])
    t.add([_t("Worst offenders reviewed"), _n(fmt_int(c.worst_reviewed))])
    t.add(
        [_t("Decisions of this cycle for series not in this file"), _n(fmt_int(c.not_in_portfolio))]
    )
    return t


def _decisions_table(data: ReportData) -> _Table:
    table = data.decisions
    causes = [c for c in table.columns if c != "total"]
    t = _Table(
        "decisions-table", [_t("outcome"), *[_n(_cause(data, c)) for c in causes], _n("total")]
    )
    for outcome, row in table.iterrows():
        label = "Total" if outcome == "total" else _outcome(data, str(outcome))
        cells = [_t(label), *[_n(fmt_int(row[c])) for c in causes], _n(fmt_int(row["total"]))]
        t.add(cells, "total" if outcome == "total" else "")
    return t


def _fva_table(data: ReportData) -> _Table:
    f = data.fva
    t = _Table("fva-table", [_t("measure"), _n("value")])
    t.add([_t("Absolute error of the forecast (units)"), _n(fmt_units(f["forecast_abs_error"]))])
    t.add([_t("Absolute error of the naive forecast (units)"), _n(fmt_units(f["naive_abs_error"]))])
    t.add(
        [
            _t("Forecast value added over naive (units)"),
            _n(fmt_units(f["value_added"], signed=True)),
        ]
    )
    if data.priced:
        t.add(
            [
                _t("Forecast value added over naive (value)"),
                _n(fmt_money(f["value_added_value"], signed=True)),
            ]
        )
    t.add([_t("Relative absolute error (forecast / naive)"), _n(fmt_ratio(f["relative_error"]))])
    t.add([_t("Series scored"), _n(fmt_int(f["series"]))])
    t.add(
        [_t("Series whose forecast is worse than naive"), _n(fmt_int(f["series_worse_than_naive"]))]
    )
    if data.stat_name is not None:
        row = data.summaries["direction"].iloc[-1]
        against = (
            f"Overrides against the statistical forecast {text(_stat_column(data))}, "
            f"{fmt_int(row['stat_adjustments'])} realised periods"
        )
        t.add([_t(f"{against} (units)"), _n(fmt_units(row["value_added_vs_stat"], signed=True))])
        if data.priced:
            t.add(
                [
                    _t(f"{against} (value)"),
                    _n(fmt_money(row["value_added_vs_stat_value"], signed=True)),
                ]
            )
    return t


def _stat_column(data: ReportData) -> str:
    """The statistical forecast's column, ``forecast_<name>`` (text, not HTML)."""
    return f"{schema.COMPETING_PREFIX}{data.stat_name}"


def _steps_table(data: ReportData, result: Comparison) -> _Table:
    """The process-step table: ``compare``'s portfolio rows, steps first in chain order."""
    table = result.table
    names = list(table["forecast_name"])
    order = [names.index(n) for n in result.steps] + [
        i for i, n in enumerate(names) if n not in result.steps
    ]
    priced = "abs_error_value" in table
    header = [
        _n("step"),
        _t("forecast"),
        _n("WAPE"),
        _n("bias %"),
        _n("abs error (units)"),
        *([_n("abs error (value)")] if priced else []),
        _n("FVA (units)"),
        _n("FVA %"),
        _n("p"),
        _n("MAPE"),
    ]
    t = _Table("steps-table", header)
    numeric = ["step", "wape", "bias_pct", "abs_error", "fva_units", "fva_pct", "p", "mape"]
    numeric += ["abs_error_value"] if priced else []
    # Floats throughout (the nullable step column's missing value becomes NaN).
    values = {c: table[c].to_numpy(dtype=np.float64, na_value=np.nan) for c in numeric}
    for i in order:
        row = {c: float(v[i]) for c, v in values.items()}
        fva = row["fva_units"]
        cells = [
            _n("" if np.isnan(row["step"]) else fmt_int(int(row["step"]))),
            _t(text(names[i])),
            _n(fmt_pct(row["wape"])),
            _n(fmt_pct(row["bias_pct"], signed=True)),
            _n(fmt_units(row["abs_error"])),
            *([_n(fmt_money(row["abs_error_value"]))] if priced else []),
            _n(f'<span class="{_signed_class(fva)}">{fmt_units(fva, signed=True)}</span>'),
            _n(fmt_pct(row["fva_pct"], signed=True)),
            _n(fmt_ratio(row["p"])),
            _n(fmt_pct(row["mape"])),
        ]
        t.add(cells)
    return t


def _steps_section(data: ReportData) -> list[str]:
    """The process-step section: only for a file with competing forecasts (without them the
    forecast value added over naive above is the one step)."""
    result = data.comparison
    if result is None:
        if data.comparison_note is None:
            return []
        return [
            '<section id="steps"><h2>Process steps: the competing forecasts</h2>',
            f'<p class="muted">No comparison: {text(data.comparison_note)}</p>',
            "</section>",
        ]
    paragraphs = []
    for line in verdict_lines(result):
        warning = result.verdict.mape_warning and line.startswith("Warning:")
        css = ' class="caution"' if warning else ""
        paragraphs.append(f"<p{css}>{text(line)}</p>")
    return [
        '<section id="steps"><h2>Process steps: the competing forecasts</h2>',
        f"<p>Every forecast of the file on the same {fmt_int(result.cells)} of "
        f"{fmt_int(result.window_cells)} window cells with demand (demand and every forecast "
        "present), along the steps "
        f"{text(' → '.join(result.steps))}. FVA = absolute error of the previous step − "
        "absolute error of this step (positive = the step removed error); p: "
        f"{text(TEST_NAME)} (docs/metrics.md).</p>",
        _steps_table(data, result).html(),
        '<div id="steps-verdict">',
        *paragraphs,
        "</div>",
        "</section>",
    ]


def _bias_table(data: ReportData) -> _Table:
    b = data.bias
    t = _Table("bias-table", [_t("bias % over the window"), _n("series")])
    for label, n in zip(b.labels, b.counts, strict=True):
        t.add([_t(text(label)), _n(fmt_int(n))])
    t.add([_t("undefined (no positive demand)"), _n(fmt_int(b.undefined))])
    return t


def _top_table(data: ReportData, with_location: bool) -> _Table:
    err = error_column(data.card)
    header = [
        _n("rank"),
        *_key_header(with_location),
        _n("share of error"),
        _n("cumulative"),
        _n("abs error (value)" if data.priced else "abs error (units)"),
        _n("bias %"),
        _t("persistent bias"),
        _n(f"in worst set (last {sum(c.startswith('worst_') for c in data.repeat.columns)})"),
        _t("decision this cycle"),
    ]
    t = _Table("top-table", header)
    for pos, row in data.top.iterrows():
        rep = data.repeat.loc[pos]
        outcome = data.current_outcome.get(int(pos))
        t.add(
            [
                _n(fmt_int(row["rank"])),
                *_key_cells(row, with_location),
                _n(fmt_pct(row["error_share"])),
                _n(fmt_pct(row["cum_share"])),
                _n(fmt_money(row[err]) if data.priced else fmt_units(row[err])),
                _n(fmt_pct(row["bias_pct"], signed=True)),
                _t(text(row["bias_flag"])),
                _n(f"{fmt_int(rep['times_in_worst'])} of {fmt_int(rep['windows_seen'])}"),
                _t(
                    _outcome(data, outcome)
                    if outcome
                    else '<span class="muted">not reviewed</span>'
                ),
            ]
        )
    return t


def _repeat_table(data: ReportData, with_location: bool) -> _Table:
    marks = [c for c in data.repeat.columns if c.startswith("worst_")]
    flagged = data.repeat.loc[data.repeat["repeat"]]
    rank = data.card["rank"]
    flagged = flagged.assign(rank=rank.reindex(flagged.index).to_numpy()).sort_values(
        ["times_in_worst", "rank"], ascending=[False, True], kind="stable"
    )
    header = [
        *_key_header(with_location),
        _n("times in worst set"),
        _n("cycles seen"),
        _n("rank now"),
        *[_n(text(c.removeprefix("worst_"))) for c in marks],
    ]
    t = _Table("repeat-table", header)
    for _, row in flagged.head(TABLE_MAX).iterrows():
        t.add(
            [
                *_key_cells(row, with_location),
                _n(fmt_int(row["times_in_worst"])),
                _n(fmt_int(row["windows_seen"])),
                _n(fmt_int(row["rank"])),
                *[_n("●" if row[c] else "·") for c in marks],
            ]
        )
    return t


def _carried_table(data: ReportData, with_location: bool) -> _Table:
    header = [
        *_key_header(with_location),
        _t("cycle"),
        _t("outcome"),
        _t("root cause"),
        _t("reviewer"),
        _t("note"),
        _t("reviewed now"),
    ]
    t = _Table("carried-table", header)
    for _, row in data.carried.head(TABLE_MAX).iterrows():
        t.add(
            [
                *_key_cells(row, with_location),
                _d(text(row["cycle"])),
                _t(_outcome(data, row["outcome"])),
                _t(_cause(data, row["root_cause"])),
                _t(text(row["reviewer"])),
                _t(text(row["note"], NOTE_MAX)),
                _t("yes" if row["reviewed_now"] else "no"),
            ]
        )
    return t


def _active_table(data: ReportData, with_location: bool) -> _Table:
    header = [
        _t("cycle"),
        *_key_header(with_location),
        _t("reviewer"),
        _t("root cause"),
        _t("adjustment"),
        _n("periods remaining"),
        _n("of"),
        _n("replaced later"),
        _t("remaining from"),
        _t("to"),
        _n("units change remaining"),
    ]
    t = _Table("active-table", header)
    for _, row in data.active.head(TABLE_MAX).iterrows():
        key = _key_cells(row, with_location)
        if row["series"] < 0:
            key[0] = _t(key[0][0] + ' <span class="muted">(not in this file)</span>')
        t.add(
            [
                _d(text(row["cycle"])),
                *key,
                _t(text(row["reviewer"])),
                _t(_cause(data, row["root_cause"])),
                _t(text(row["adjustment"])),
                _n(fmt_int(row["remaining"])),
                _n(fmt_int(row["periods"])),
                _n(fmt_int(row["superseded"])),
                _d(text(row["first_remaining"])),
                _d(text(row["last_remaining"])),
                _n(fmt_units(row["units_change"], signed=True)),
            ]
        )
    return t


def _status_table(data: ReportData) -> _Table:
    t = _Table("status-table", [_t("adjusted periods"), _n("periods"), _n("decisions")])
    for _, row in data.status.iterrows():
        t.add([_t(text(row["meaning"])), _n(fmt_int(row["lines"])), _n(fmt_int(row["decisions"]))])
    return t


GROUP_HEADERS = {
    "direction": "direction",
    "size": "size of the override",
    "reviewer": "reviewer",
    "root_cause": "root cause",
    "cycle": "cycle",
    "group": "group decision",
}


def _signed_class(value: float) -> str:
    if undefined(value) or value == 0:
        return ""
    return "pos" if value > 0 else "neg"


def _summary_table(data: ReportData, name: str) -> _Table:
    frame = data.summaries[name]
    by = SUMMARY_BY[name]
    groups = [by] if isinstance(by, str) else list(by)
    header = [
        *[_t(GROUP_HEADERS[g]) for g in groups],
        _n("overridden periods"),
        _n("decisions"),
        _n("helped"),
        _n("hurt"),
        _n("share helped"),
        _n("error before (units)"),
        _n("error after (units)"),
        _n("error removed (units)"),
        *([_n("error removed (value)")] if data.priced else []),
        _n("share of error removed"),
        _n("AvgRelMAE"),
    ]
    stat = data.stat_name is not None
    if stat:
        header += [
            _n("periods with stat"),
            _n("error of stat (units)"),
            _n("override beat stat by (units)"),
            *([_n("override beat stat by (value)")] if data.priced else []),
        ]
    t = _Table(f"realised-{name.replace('_', '-')}", header)
    for _, row in frame.iterrows():
        total = row[groups[0]] == history.ALL
        label_cells = []
        for g in groups:
            value = row[g]
            if value == history.ALL:
                shown = "All overrides" if g == groups[0] else ""
            elif g == "root_cause":
                shown = _cause(data, value)
            else:
                shown = text(value)
            label_cells.append(_t(shown))
        va = row["value_added"]
        cells = [
            *label_cells,
            _n(fmt_int(row["adjustments"])),
            _n(fmt_int(row["decisions"])),
            _n(fmt_int(row["helped"])),
            _n(fmt_int(row["hurt"])),
            _n(fmt_pct(row["share_helped"])),
            _n(fmt_units(row["abs_error_original"])),
            _n(fmt_units(row["abs_error_adjusted"])),
            _n(f'<span class="{_signed_class(va)}">{fmt_units(va, signed=True)}</span>'),
        ]
        if data.priced:
            vv = row["value_added_value"]
            cells.append(
                _n(f'<span class="{_signed_class(vv)}">{fmt_money(vv, signed=True)}</span>')
            )
        cells += [
            _n(fmt_pct(row["relative_value_added"], signed=True)),
            _n(fmt_ratio(row["avg_rel_mae"])),
        ]
        if stat:
            vs = row["value_added_vs_stat"]
            cells += [
                _n(fmt_int(row["stat_adjustments"])),
                _n(fmt_units(row["abs_error_stat"])),
                _n(f'<span class="{_signed_class(vs)}">{fmt_units(vs, signed=True)}</span>'),
            ]
            if data.priced:
                cells.append(_n(fmt_money(row["value_added_vs_stat_value"], signed=True)))
        t.add(cells, "total" if total else "")
    return t


def _lines_table(data: ReportData, with_location: bool) -> _Table:
    header = [
        _t("cycle"),
        *_key_header(with_location),
        _t("period"),
        _n("original"),
        _n("override"),
        _n("actual"),
        _n("error removed (units)"),
        *([_n("error removed (value)")] if data.priced else []),
        _t("direction"),
        _t("size"),
        _t("reviewer"),
        _t("root cause"),
    ]
    stat = data.stat_name is not None
    if stat:
        header += [_n("stat"), _n("override beat stat by (units)")]
    t = _Table("realised-lines", header)
    for _, row in data.realised.head(LINES_MAX).iterrows():
        va = row["value_added"]
        cells = [
            _d(text(row["cycle"])),
            *_key_cells(row, with_location),
            _d(text(row["period"])),
            _n(fmt_units(row["original"])),
            _n(fmt_units(row["adjusted"])),
            _n(fmt_units(row["actual"])),
            _n(f'<span class="{_signed_class(va)}">{fmt_units(va, signed=True)}</span>'),
        ]
        if data.priced:
            cells.append(_n(fmt_money(row["value_added_value"], signed=True)))
        cells += [
            _t(text(row["direction"])),
            _t(text(row["size"])),
            _t(text(row["reviewer"])),
            _t(_cause(data, row["root_cause"])),
        ]
        if stat:
            cells += [
                _n(fmt_units(row["stat"])),
                _n(fmt_units(row["value_added_vs_stat"], signed=True)),
            ]
        t.add(cells)
    return t


def highlights(data: ReportData) -> list[str]:
    """Plain sentences on how up/down and small overrides did (text, not HTML)."""
    out = []
    direction = data.summaries["direction"].set_index("direction")
    for d in (history.UP, history.DOWN):
        if d in direction.index:
            r = direction.loc[d]
            out.append(f"{d.capitalize()}ward overrides: {_helped(r)}.")
    size = data.summaries["size"].set_index("size")
    small = history.SIZE_BANDS[0]
    if small in size.index:
        r = size.loc[small]
        out.append(f"Overrides under 5%: {_helped(r)}.")
    return out


def _helped(row: pd.Series) -> str:
    """``2 of 6 helped (33.3%); error removed -7.0 units`` for a summary row."""
    return (
        f"{fmt_int(row['helped'])} of {fmt_int(row['adjustments'])} helped "
        f"({fmt_pct(row['share_helped'])}); error removed "
        f"{fmt_units(row['value_added'], signed=True)} units"
    )


def _s(count: float) -> str:
    """The plural ending for ``count`` of something."""
    return "" if count == 1 else "s"


def overall_sentence(data: ReportData) -> str:
    """The realised value of every override in one sentence (text, not HTML)."""
    row = data.summaries["direction"].iloc[-1]
    value = ""
    if data.priced:
        value = f" ({fmt_money(row['value_added_value'], signed=True)} in value)"
    sentence = (
        f"{fmt_int(row['adjustments'])} overridden period{_s(row['adjustments'])} with "
        f"actuals, from {fmt_int(row['decisions'])} decision{_s(row['decisions'])}; "
        f"{_helped(row)}{value}."
    )
    # Against the statistical forecast only when there are realised overrides to value.
    if data.stat_name is not None and row["adjustments"] > 0:
        sentence += " " + stat_sentence(data)
    return sentence


def stat_sentence(data: ReportData) -> str:
    """The overrides against the statistical forecast in one sentence (text, not HTML)."""
    row = data.summaries["direction"].iloc[-1]
    value = ""
    if data.priced:
        value = f" ({fmt_money(row['value_added_vs_stat_value'], signed=True)} in value)"
    return (
        f"Against the statistical forecast {_stat_column(data)}, on the "
        f"{fmt_int(row['stat_adjustments'])} periods that have one: the overrides beat it by "
        f"{fmt_units(row['value_added_vs_stat'], signed=True)} units{value} "
        "(|stat − actual| − |override − actual|; negative = the statistical forecast was closer)."
    )


CSP = "default-src 'none'; style-src 'unsafe-inline'; img-src data:"


def _shown(total: int, order: str) -> str:
    """A note when a table lists only the first ``TABLE_MAX`` of ``total`` rows."""
    if total <= TABLE_MAX:
        return ""
    return f'<p class="muted">Showing {fmt_int(TABLE_MAX)} of {fmt_int(total)}, {text(order)}.</p>'


def _ranked_in(data: ReportData) -> str:
    """What errors are ranked in, and why units when the file has a price column (HTML)."""
    if data.priced:
        return "in value (units × price)"
    if data.units_reason:
        return f"in units ({text(data.units_reason)})"
    return "in units"


def render_html(data: ReportData) -> str:
    """The report as one HTML document (inline CSS and SVG, no script, no external resource)."""
    with_location = schema.LOCATION in data.card.columns
    cov = data.coverage
    title = f"{report_title(data.frequency)}: {data.portfolio_name}, cycle {data.cycle}"
    win = data.window
    weighted = "value-weighted " if data.priced else ""
    naive = (
        "the last period's actual"
        if data.season == 1
        else f"the actual {data.season} periods earlier"
    )
    parts: list[str] = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f'<meta http-equiv="Content-Security-Policy" content="{CSP}">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{text(title)}</title>",
        f"<style>{CSS}</style></head><body>",
        f"<h1>{text(report_title(data.frequency))}</h1>",
        f'<p class="sub">Portfolio <b>{text(data.portfolio_name)}</b>, review cycle '
        f"<b>{text(data.cycle)}</b> ({text(data.frequency)}), scoring window "
        f"{text(win['first'])} to {text(win['last'])} "
        f"({fmt_int(win['periods'])} periods), ledger {text(data.ledger_name or 'none')}. "
        f"Generated {text(data.generated_at)} by triage {text(__version__)}.</p>",
        f'<p class="caution" id="caution"><b>Caution.</b> {text(data.caution)}</p>',
    ]
    for notice in data.notices:
        parts.append(f'<p class="muted">Note: {text(notice)}</p>')

    parts += [
        '<section id="coverage"><h2>Review coverage</h2>',
        f"<p>{fmt_int(cov.reviewed)} of {fmt_int(cov.series)} series reviewed this cycle, "
        f"holding {fmt_pct(cov.covered)} of the portfolio's {weighted}absolute error "
        f"(target {fmt_pct(cov.target)}). Reviewed means settled: no change needed, or adjusted; "
        f"{fmt_int(cov.handed_off)} handed off and {fmt_int(cov.deferred)} put off are still "
        "open.</p>",
        _coverage_table(data).html(),
        "<h3>Decisions this cycle, by outcome and root cause</h3>",
        _decisions_table(data).html(),
        "</section>",
        '<section id="fva"><h2>Forecast value added over the naive forecast</h2>',
        f"<p>Over the scoring window, against {naive} as the naive forecast (positive = the "
        "forecast beat naive).</p>",
        _fva_table(data).html(),
        "</section>",
        *_steps_section(data),
        '<section id="bias"><h2>Bias distribution</h2>',
        "<p>Series by bias over the scoring window, Σ(forecast − demand) / Σ demand: right of zero "
        "the forecast was too high, left of zero too low.</p>",
        f'<figure class="wide">{_bias_chart(data.bias)}</figure>',
        "<details><summary>Series per bin</summary>",
        _bias_table(data).html(),
        "</details>",
        "</section>",
        f'<section id="top"><h2>Top {fmt_int(len(data.top))} offenders</h2>',
        _top_table(data, with_location).html(),
        '<div class="grid">',
    ]
    keys = data.card
    for chart in data.charts:
        row = keys.loc[chart.series]
        name = text(row[schema.ITEM]) + (
            f" @ {text(row[schema.LOCATION])}" if with_location else ""
        )
        parts.append(
            f"<figure><figcaption>#{fmt_int(row['rank'])} {name}: demand (solid), forecast (dashed)"
            f", override in force (green); the grey line is the latest actual.</figcaption>"
            f"{_offender_chart(chart)}</figure>"
        )
    parts.append("</div></section>")

    n_repeat = int(data.repeat["repeat"].sum())
    n_cycles = sum(c.startswith("worst_") for c in data.repeat.columns)
    parts += [
        '<section id="repeat"><h2>Repeat offenders</h2>',
        f"<p>{fmt_int(n_repeat)} series were in the worst-offender set in at least "
        f"{fmt_int(data.repeat_n)} of the last {fmt_int(n_cycles)} cycles (re-scored from this "
        "file's history: each cycle's window ends one period earlier).</p>",
        _shown(n_repeat, "highest ranked now"),
        _repeat_table(data, with_location).html() if n_repeat else "",
        "</section>",
        '<section id="carried"><h2>Carried over</h2>',
        f"<p>{fmt_int(len(data.carried))} series handed off or put off in an earlier cycle are "
        "still in the worst-offender set; the review list shows the unreviewed ones first.</p>",
        _shown(len(data.carried), "highest ranked now"),
        _carried_table(data, with_location).html() if len(data.carried) else "",
        "</section>",
        '<section id="active"><h2>Active adjustments</h2>',
        f"<p>{fmt_int(len(data.active))} adjustments still have forward periods ahead of the "
        "latest actual.</p>",
        _shown(len(data.active), "oldest cycle first"),
        _active_table(data, with_location).html() if len(data.active) else "",
        "</section>",
    ]

    parts += [
        '<section id="realised"><h2>Realised value of the overrides so far</h2>',
        "<p>For every adjusted period whose actual demand is now known: error removed = "
        "|original − actual| − |override − actual| (positive = the override helped).</p>",
        f'<p id="realised-overall">{text(overall_sentence(data))}</p>',
        f'<p class="evidence">{text(EVIDENCE)}</p>',
        '<ul id="realised-highlights">'
        + "".join(f"<li>{text(s)}</li>" for s in highlights(data))
        + "</ul>",
        _status_table(data).html(),
    ]
    if len(data.realised):
        parts += [
            "<h3>By direction and size</h3>",
            f'<figure class="wide">{_realised_chart(data.summaries["direction_size"])}</figure>',
            _summary_table(data, "direction_size").html(),
            "<h3>By direction</h3>",
            _summary_table(data, "direction").html(),
            "<h3>By size</h3>",
            _summary_table(data, "size").html(),
            "<h3>By reviewer</h3>",
            _summary_table(data, "reviewer").html(),
            "<h3>By root cause</h3>",
            _summary_table(data, "root_cause").html(),
            "<h3>By cycle of the decision</h3>",
            f'<figure class="wide">{_cycle_chart(data.summaries["cycle"])}</figure>',
            _summary_table(data, "cycle").html(),
            *(
                ["<h3>By group decision</h3>", _summary_table(data, "group").html()]
                if (data.realised["group"] != history.SERIES_DECISIONS).any()
                else []
            ),
            f"<h3>Every overridden period ({fmt_int(min(len(data.realised), LINES_MAX))} of "
            f"{fmt_int(len(data.realised))} shown)</h3>",
            _lines_table(data, with_location).html(),
        ]
    parts += [
        "</section>",
        "<footer><p>Error = forecast − demand (positive = over-forecast). Ranking by absolute "
        f"error {_ranked_in(data)}. Share of error "
        "removed = Σ error removed / Σ error of the original forecasts. AvgRelMAE: weighted "
        "geometric mean over decisions of MAE(override) / MAE(original) (Davydenko &amp; "
        "Fildes 2013); below 1 the overrides were more accurate. Forecast value added after "
        "Gilliland (2010). "
        f"Portfolio fingerprint {text(data.portfolio_fingerprint[:16])}…</p>",
        f"<p>{text(data.caution)}</p></footer>",
        "</body></html>",
    ]
    return "\n".join(p for p in parts if p) + "\n"


def write_report(
    review: ReviewCycle,
    target: str | Path | None = None,
    *,
    force: bool = True,
    top: int = TOP_DEFAULT,
    generated_at: datetime | None = None,
) -> ReportResult:
    """Gather the report (``build_report``), render it and write it atomically (a reader never
    sees half a file).

    Args:
        review: The current portfolio's review cycle, with its ledger (read-only is enough, or
            None) and settings.
        target: HTML file to write; default ``default_report_path(portfolio)``.
        force: Replace the file if it exists (``triage report`` passes its ``--force``).
        top: Top offenders shown with charts.
        generated_at: The report's time stamp (default now).

    Raises:
        ReportError: The target is not an ``.html``/``.htm`` file (so never the portfolio or the
            ledger), or a setting is out of range.
        TriageError: The file exists and ``force`` is false, or it cannot be written
            (``files.write_atomic``).
    """
    path = Path(target) if target is not None else default_report_path(review.portfolio)
    if path.suffix.lower() not in (".html", ".htm"):
        raise ReportError(
            f"the report is an HTML file; {path.name} does not end in .html.",
            hint="Pass --to NAME.html.",
        )
    refuse_existing([path], force=force)  # before the work, not only at the write
    data = build_report(review, top=top, generated_at=generated_at)
    document = render_html(data)
    write_text_atomic(path, document, force=force)
    return ReportResult(path=path, data=data, bytes=len(document.encode("utf-8")))


def summary_text(data: ReportData, path: Path | None = None) -> str:
    """A few plain lines for the terminal (data text made visible, nothing else changed)."""
    cov = data.coverage
    decided = data.decisions.loc[data.decisions.index != "total", "total"]
    parts_decided = [
        f"{fmt_int(n)} {data.outcome_labels.get(o, o).lower()}" for o, n in decided.items() if n
    ]
    n_cycles = sum(c.startswith("worst_") for c in data.repeat.columns)
    open_now = int((~data.carried["reviewed_now"].astype(bool)).sum()) if len(data.carried) else 0
    ahead = int(data.active["remaining"].sum()) if len(data.active) else 0
    lines = [
        f"{report_title(data.frequency)}: {visible(data.portfolio_name)}, cycle {data.cycle}",
        f"Coverage: {fmt_int(cov.reviewed)} of {fmt_int(cov.series)} series reviewed, "
        f"{fmt_pct(cov.covered)} of error (target {fmt_pct(cov.target)}); "
        f"{fmt_int(cov.handed_off)} handed off and {fmt_int(cov.deferred)} put off (still open); "
        f"worst-offender set {fmt_int(cov.worst)} series, {fmt_int(cov.worst_reviewed)} reviewed.",
        "Decisions this cycle: " + ("; ".join(parts_decided) if parts_decided else "none") + ".",
        f"Repeat offenders: {fmt_int(int(data.repeat['repeat'].sum()))} series in the worst set "
        f"in at least {data.repeat_n} of the last {n_cycles} cycles.",
        f"Carried over: {fmt_int(len(data.carried))} handed-off or put-off series still among the "
        f"worst ({fmt_int(open_now)} not yet reviewed).",
        f"Active adjustments: {fmt_int(len(data.active))} with {fmt_int(ahead)} periods ahead.",
        f"Realised override value: {overall_sentence(data)}",
    ]
    lines += [f"  {s}" for s in highlights(data)]
    lines.append(
        f"Forecast against naive over the window: {words.against_naive(data.fva['value_added'])} "
        f"(relative absolute error {fmt_ratio(data.fva['relative_error'])})."
    )
    if data.comparison is not None:
        result = data.comparison
        lines.append(
            f"Process steps ({' -> '.join(visible(s) for s in result.steps)}, on "
            f"{fmt_int(result.cells)} window cells):"
        )
        lines += [f"  {line}" for line in verdict_lines(result)]
    elif data.comparison_note is not None:
        lines.append(f"Process steps: no comparison: {data.comparison_note}")
    if path is not None:
        lines.append(f"Report: {visible(str(path))}")
    lines.append(f"Caution: {data.caution}")
    return "\n".join(lines) + "\n"
