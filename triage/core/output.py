"""Scorecards and data-quality reports as CSV, JSON and readable text.

CSV and JSON keep full precision (shortest round-trip floats) and leave undefined values empty
(CSV) or ``null`` (JSON). Human text prints "over"/"under" beside every signed number.
"""

from __future__ import annotations

import io
import json
import math
import shutil

import numpy as np
import pandas as pd
from rich.console import Console
from rich.table import Table
from rich.text import Text

from triage.core import metrics, schema
from triage.core.portfolio import Portfolio

#: Rows a ``table`` shows when neither --top nor --cover is given.
TABLE_DEFAULT_ROWS = 25


def to_csv(card: pd.DataFrame) -> str:
    """The scorecard as CSV text, one row per series in the given order."""
    return card.to_csv(index=False, lineterminator="\n", float_format=None)


def to_json(portfolio: Portfolio, card: pd.DataFrame, window: int, season: int) -> str:
    """The scorecard as one JSON document: what was scored, then one object per series."""
    records = []
    columns = list(card.columns)
    arrays = [card[c].to_numpy() for c in columns]
    for values in zip(*arrays, strict=True):
        records.append({c: _json_value(v) for c, v in zip(columns, values, strict=True)})
    doc = {
        "portfolio": str(portfolio.path),
        "cycle": portfolio.cycle,
        "frequency": portfolio.calendar.freq,
        "lag": portfolio.lag,
        "window": window_info(portfolio, window),
        "season": season,
        "error_sign": "forecast - demand (positive = over-forecast)",
        "ranked_by": "abs_error_value" if portfolio.price is not None else "abs_error",
        "series": records,
    }
    return json.dumps(doc, ensure_ascii=False, allow_nan=False, indent=1) + "\n"


def _json_value(value: object) -> object:
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return None if math.isnan(value) else float(value)
    if value == "" or value is None:
        return None
    return value


def window_info(portfolio: Portfolio, window: int) -> dict[str, object]:
    """First and last period of the scoring window and how many periods it holds."""
    cols = metrics.window_columns(portfolio.demand, portfolio.last_actual, window)
    cal = portfolio.calendar
    return {"first": cal.label(int(cols[0])), "last": cal.label(int(cols[-1])), "periods": len(cols)}


def totals(card: pd.DataFrame) -> dict[str, float]:
    """Portfolio totals over the window: absolute error, bias %, WAPE, and value where priced."""
    demand = float(card["demand"].sum())
    abs_error = float(card["abs_error"].sum())
    bias = float(card["bias"].sum())
    out = {
        "series": float(len(card)),
        "abs_error": abs_error,
        "bias": bias,
        "bias_pct": bias / demand if demand > 0 else math.nan,
        "wape": abs_error / demand if demand > 0 else math.nan,
    }
    if "abs_error_value" in card:
        out["abs_error_value"] = float(card["abs_error_value"].sum())
        out["bias_value"] = float(card["bias_value"].sum())
    return out


def signed_pct(value: float) -> str:
    """``+12.3% over`` / ``-8.0% under`` / ``0.0%``; empty when undefined."""
    if value is None or math.isnan(value):
        return ""
    word = " over" if value > 0 else " under" if value < 0 else ""
    return f"{value * 100:+.1f}%{word}"


def signed_units(value: float, digits: int = 0) -> str:
    """``+1,234 over`` / ``-56 under``; empty when undefined."""
    if value is None or math.isnan(value):
        return ""
    word = " over" if value > 0 else " under" if value < 0 else ""
    return f"{value:+,.{digits}f}{word}"


def _num(value: float, fmt: str = ",.0f") -> str:
    return "" if value is None or math.isnan(value) else format(value, fmt)


def _pct(value: float) -> str:
    return "" if value is None or math.isnan(value) else f"{value * 100:.1f}%"


def rank_table(
    portfolio: Portfolio,
    card: pd.DataFrame,
    shown: pd.DataFrame,
    window: int,
    season: int,
    *,
    by: str = "error",
) -> str:
    """A readable ranked list with a header of portfolio totals."""
    priced = "abs_error_value" in card
    tot = totals(card)
    win = window_info(portfolio, window)
    lines = [
        f"{portfolio.path.name}: {len(card):,} series, {portfolio.calendar.freq}, "
        f"window {win['first']} .. {win['last']} ({win['periods']} periods)"
        + (f", lag {portfolio.lag}" if portfolio.lag is not None else ""),
        "error = forecast - demand; 'over' = forecast above demand",
        f"total absolute error {_num(tot['abs_error'])} units"
        + (f", {_num(tot['abs_error_value'])} in value" if priced else "")
        + f"; portfolio bias {signed_pct(tot['bias_pct']) or 'n/a'}; WAPE {_pct(tot['wape']) or 'n/a'}",
        f"ranked by {'persistent bias, then absolute bias' if by == 'bias' else 'share of absolute error'}"
        + (" in value" if priced else " in units"),
        "",
    ]
    table = Table(box=None, pad_edge=False, show_edge=False, header_style="bold")
    for name, justify in [
        ("rank", "right"),
        (schema.ITEM, "left"),
        *([(schema.LOCATION, "left")] if schema.LOCATION in card else []),
        ("share", "right"),
        ("cum", "right"),
        ("abs err" + (" value" if priced else ""), "right"),
        ("bias %", "right"),
        ("WAPE", "right"),
        ("TS", "right"),
        ("run", "right"),
        ("persistent", "left"),
        ("pattern", "left"),
    ]:
        key = name in (schema.ITEM, schema.LOCATION)
        widest = max((len(str(v)) for v in shown[name]), default=0) if key else 0
        table.add_column(
            name,
            justify=justify,
            no_wrap=True,
            overflow="ellipsis",
            min_width=min(max(widest, len(name)), 24) if key else None,
            max_width=24 if key else None,
        )
    err_col = "abs_error_value" if priced else "abs_error"
    for row in shown.itertuples(index=False):
        rec = row._asdict()
        cells = [
            str(rec["rank"]),
            Text(str(rec[schema.ITEM])),
            *([Text(str(rec[schema.LOCATION]))] if schema.LOCATION in card else []),
            _pct(rec["error_share"]),
            _pct(rec["cum_share"]),
            _num(rec[err_col]),
            signed_pct(rec["bias_pct"]),
            _pct(rec["wape"]),
            _num(rec["tracking_signal"], "+.1f"),
            _run_text(rec["bias_run"]),
            rec["bias_flag"],
            rec["pattern"],
        ]
        table.add_row(*cells)
    width = max(100, shutil.get_terminal_size((120, 24)).columns)
    buffer = io.StringIO()
    Console(file=buffer, width=width, color_system=None, markup=False, emoji=False, highlight=False).print(table)
    lines.append(buffer.getvalue().rstrip("\n"))
    if len(shown) < len(card):
        lines.append("")
        lines.append(
            f"showing {len(shown):,} of {len(card):,} series; use --top K, --cover F or --format csv for more"
        )
    return "\n".join(lines) + "\n"


def _run_text(run: int) -> str:
    if run == 0:
        return "0"
    return f"{abs(run)} {'over' if run > 0 else 'under'}"


def check_text(portfolio: Portfolio, window: int, season: int) -> str:
    """The data-quality report of ``triage check``."""
    demand = portfolio.demand
    hist = demand[:, : portfolio.last_actual + 1]
    cal = portfolio.calendar
    cols = metrics.window_columns(demand, portfolio.last_actual, window)
    win = window_info(portfolio, window)
    actual = ~np.isnan(hist)
    first_actual = np.where(actual.any(axis=1), actual.argmax(axis=1), hist.shape[1])
    # A cell before a series' first actual is not missing: the series had not started yet.
    started = np.arange(hist.shape[1])[None, :] >= first_actual[:, None]
    missing_hist = int((started & ~actual).sum())
    window_missing = int((~actual[:, cols] & started[:, cols]).sum())
    forecast_w = portfolio.forecast[:, cols]
    no_forecast = int((actual[:, cols] & np.isnan(forecast_w)).sum())
    fwd = portfolio.forecast[:, portfolio.last_actual + 1 :]
    no_actual_series = int((~actual.any(axis=1)).sum())
    zero_only = int((actual.any(axis=1) & ~(np.nan_to_num(hist) > 0).any(axis=1)).sum())
    pattern = metrics.demand_pattern(hist)
    counts = np.bincount(pattern.pattern, minlength=len(metrics.PATTERNS))

    lines = [
        f"file           {portfolio.path}",
        f"rows           {portfolio.rows:,}",
        f"series         {portfolio.n_series:,} (key: {', '.join(portfolio.key_columns)})",
        f"calendar       {cal.freq}, {cal.label(0)} .. {cal.label(len(cal.periods) - 1)} "
        f"({len(cal.periods)} periods)",
        f"latest actual  {cal.label(portfolio.last_actual)} (review cycle {portfolio.cycle})",
        f"window         {win['first']} .. {win['last']} ({win['periods']} periods with actuals; "
        f"asked for {window}), naive season {season}",
        "lags           "
        + (
            f"{', '.join(map(str, portfolio.lags))}; scoring lag {portfolio.lag}"
            if portfolio.lags
            else "no lag column (one forecast per period)"
        ),
        f"forward        {portfolio.n_forward} periods, {int((~np.isnan(fwd)).sum()):,} forecast values"
        + (f" ({cal.label(portfolio.last_actual + 1)} .. {cal.label(len(cal.periods) - 1)})"
           if portfolio.n_forward else ""),
        f"price          {'yes: errors are ranked in value' if portfolio.price is not None else 'no: errors are ranked in units'}",
        f"attributes     {', '.join(portfolio.attributes) if portfolio.attributes else 'none'}",
        "",
        f"missing actuals   {missing_hist:,} series-periods after each series' first actual "
        f"({window_missing:,} in the window); missing is never read as zero",
        f"no forecast       {no_forecast:,} window periods with an actual but no forecast (not scored)",
        f"negative demand   {int((hist < 0).sum()):,} periods (returns; counted as demand)",
        f"zero demand       {int((hist == 0).sum()):,} periods",
        f"no actual demand  {no_actual_series:,} series (nothing to score)",
        f"only zero demand  {zero_only:,} series",
        "patterns          "
        + ", ".join(f"{name} {int(c):,}" for name, c in zip(metrics.PATTERNS, counts, strict=True)),
    ]
    if portfolio.notices:
        lines.append("")
        lines.extend(f"note: {n}" for n in portfolio.notices)
    lines.append("")
    lines.append("ok: the file can be scored")
    return "\n".join(lines)
