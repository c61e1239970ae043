"""``triage compare`` as a readable table with a verdict in plain words, as CSV and as JSON.

CSV and JSON keep the column names of ``triage.core.compare`` (fractions, not percentages) at
full precision and leave undefined values empty (CSV) or ``null`` (JSON); ``best`` is written
``true``/``false``. The table shows percentages through ``triage.core.text``'s formatter and
every text from the file through ``visible``.
"""

from __future__ import annotations

import io
import math
from typing import Any

import numpy as np
import pandas as pd
from rich.console import Console
from rich.table import Table
from rich.text import Text

from triage.core import metrics
from triage.core.compare import TEST_NAME, Comparison
from triage.core.output import window_info
from triage.core.portfolio import Portfolio
from triage.core.text import count, number, over_under, percent, ratio, visible
from triage.render.export import dumps_json
from triage.render.scorecard import to_csv as frame_csv

#: Significance level the table's words use for "a real difference".
ALPHA = 0.05


def rows_frame(result: Comparison) -> pd.DataFrame:
    """What CSV writes: the per-series rows when asked for, else the portfolio table."""
    frame = result.by_series if result.by_series is not None else result.table
    if "best" in frame:
        frame = frame.assign(best=np.where(frame["best"].to_numpy(dtype=bool), "true", "false"))
    return frame


def to_csv(result: Comparison) -> str:
    """The comparison as CSV text (the scorecard's writer: shortest round-trip floats)."""
    return frame_csv(rows_frame(result))


def _records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    columns = list(frame.columns)
    arrays = [frame[c].to_numpy(dtype=object) for c in columns]
    return [
        {c: _json_value(v) for c, v in zip(columns, values, strict=True)}
        for values in zip(*arrays, strict=True)
    ]


def _json_value(value: object) -> object:
    if value is None or value is pd.NA:
        return None
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return None if math.isnan(value) else float(value)
    return value


def to_json(portfolio: Portfolio, result: Comparison, window: int) -> str:
    """The comparison as one JSON document: what was compared, the table, the verdict."""
    verdict = result.verdict
    doc: dict[str, Any] = {
        "portfolio": str(portfolio.path),
        "cycle": portfolio.cycle,
        "frequency": portfolio.calendar.freq,
        "lag": portfolio.lag,
        "window": window_info(portfolio, window, result.columns),
        "season": result.season,
        "error_sign": "forecast - demand (positive = over-forecast)",
        "window_cells": result.window_cells,
        "cells": result.cells,
        "missing": result.missing,
        "steps": list(result.steps),
        "test": {
            "name": TEST_NAME,
            "lags": result.test_lags,
            "periods": result.periods,
            "see": "docs/metrics.md",
        },
        "verdict": {
            "best": verdict.best,
            "lowest_wape": verdict.lowest_wape,
            "mape_pick": verdict.mape_pick,
            "mape_warning": verdict.mape_warning,
            "bias_limit": metrics.BIAS_MATERIAL,
        },
        "forecasts": _records(result.table),
    }
    if result.by_series is not None:
        doc["series"] = _records(result.by_series)
    return dumps_json(doc, indent=1) + "\n"


def _row(result: Comparison, name: str) -> dict[str, Any]:
    """The table's row of ``name``, each value as its column holds it (NaN, not NA, for floats)."""
    table = result.table
    at = int(np.flatnonzero(table["forecast_name"].to_numpy() == name)[0])
    return {column: table[column].iat[at] for column in table.columns}


def _shown(name: str) -> str:
    return visible(name)


def verdict_lines(result: Comparison) -> list[str]:
    """The verdict in plain words, then one line per step."""
    v = result.verdict
    limit = percent(metrics.BIAS_MATERIAL, 0)
    lines: list[str] = []

    def described(name: str) -> str:
        row = _row(result, name)
        return (
            f"{_shown(name)} (WAPE {percent(row['wape']) or 'n/a'}, bias "
            f"{over_under(row['bias_pct'], 1, fraction=True, plain_zero=True) or 'n/a'})"
        )

    if v.best is not None:
        lines.append(
            f"Best: {described(v.best)}: the lowest WAPE among forecasts whose bias is within "
            f"±{limit} of demand."
        )
        if v.lowest_wape is not None and v.lowest_wape != v.best:
            lines.append(
                f"{described(v.lowest_wape)} has a lower WAPE, but its bias is {limit} of "
                "demand or more."
            )
    elif v.lowest_wape is not None:
        lines.append(
            f"No forecast has a bias within ±{limit} of demand; the lowest WAPE is "
            f"{described(v.lowest_wape)}."
        )
    else:
        lines.append("WAPE is undefined: the compared cells hold no positive total demand.")
    if v.mape_warning and v.mape_pick is not None:
        lines.append(
            f"Warning: MAPE would pick {described(v.mape_pick)}, which under-forecasts by "
            f"{limit} of demand or more. MAPE rewards forecasts that are too low; judge by "
            "WAPE and bias."
        )
    for before, after in zip(result.steps[:-1], result.steps[1:], strict=True):
        row = _row(result, after)
        units = row["fva_units"]
        p = row["p"]
        if units != 0:
            amount = number(abs(units))
            change = (
                f"{'removes' if units > 0 else 'adds'} {amount} unit"
                f"{'' if amount == '1' else 's'} of error"
            )
            # No share when the previous step had no error to share it of.
            if not math.isnan(row["fva_pct"]):
                change += f" ({percent(abs(row['fva_pct']))})"
        else:
            change = "leaves the error unchanged"
        if math.isnan(p):
            judged = "p undefined (too few periods, or a constant difference)"
        elif p < ALPHA:
            shown = "p < 0.001" if p < 0.001 else f"p = {ratio(p)}"
            judged = f"{shown}: a real difference at the {percent(ALPHA, 0)} level"
        else:
            judged = f"p = {ratio(p)}: could be noise"
        lines.append(f"Step {_shown(before)} -> {_shown(after)}: {change}; {judged}.")
    return lines


def compare_table(portfolio: Portfolio, result: Comparison, window: int) -> str:
    """The readable comparison: what was compared, the table, the verdict."""
    win = window_info(portfolio, window, result.columns)
    priced = "abs_error_value" in result.table
    missing = [f"{_shown(n)} {count(m)}" for n, m in result.missing.items() if m]
    lines = [
        f"{visible(portfolio.path.name)}: {result.series:,} series, "
        f"{portfolio.calendar.freq}, window {win['first']} .. {win['last']} "
        f"({win['periods']} period{'' if win['periods'] == 1 else 's'})"
        + (f", lag {portfolio.lag}" if portfolio.lag is not None else ""),
        "error = forecast - demand; 'over' = forecast above demand",
        f"compared on {count(result.cells)} of {count(result.window_cells)} window cells with "
        "demand (demand and every forecast present)"
        + (f"; missing: {', '.join(missing)}" if missing else ""),
        "naive = previous period's actual"
        + (f"; snaive = actual {result.season} periods back" if result.season > 1 else "")
        + f"; MASE scale: naive with season {result.season}",
        "",
    ]
    t = result.table
    columns: list[tuple[str, str, list[Any]]] = [
        ("forecast", "left", [Text(_shown(n)) for n in t["forecast_name"]]),
        ("WAPE", "right", [percent(v) for v in t["wape"]]),
        (
            "bias %",
            "right",
            [over_under(v, 1, fraction=True, plain_zero=True) for v in t["bias_pct"]],
        ),
        ("abs err" + (" value" if priced else ""), "right", _numbers(t, priced)),
        ("MAE", "right", [number(v, 2) for v in t["mae"]]),
        ("RMSE", "right", [number(v, 2) for v in t["rmse"]]),
        ("MASE", "right", [ratio(v, 2) for v in t["mase"]]),
        ("MAPE", "right", [percent(v) for v in t["mape"]]),
        ("MAPE cap", "right", [percent(v) for v in t["mape_capped"]]),
        ("step", "right", [_int(v) for v in t["step"]]),
        ("FVA", "right", [number(v, signed=True) for v in t["fva_units"]]),
        ("FVA %", "right", [percent(v, signed=True) for v in t["fva_pct"]]),
        ("p", "right", [ratio(v) for v in t["p"]]),
        ("series best", "right", [count(v) for v in t["series_best"]]),
    ]
    table = Table(box=None, pad_edge=False, show_edge=False, header_style="bold")
    for name, justify, _ in columns:
        table.add_column(name, justify=justify, no_wrap=True)  # type: ignore[arg-type]
    for row in zip(*(cells for _, _, cells in columns), strict=True):
        table.add_row(*row)
    # Wide enough for every cell: a long forecast name widens the line, never cuts a figure.
    natural = sum(
        max(len(name), *(len(str(cell)) for cell in cells)) + 2 for name, _, cells in columns
    )
    buffer = io.StringIO()
    console = Console(
        file=buffer,
        width=max(200, natural),
        color_system=None,
        markup=False,
        emoji=False,
        highlight=False,
    )
    console.print(table)
    lines.extend(line.rstrip() for line in buffer.getvalue().rstrip("\n").split("\n"))
    lines.append("")
    lines.append(
        f"FVA = abs error of the previous step - abs error of this step (positive = removed "
        f"error); p: {TEST_NAME} (docs/metrics.md)."
    )
    mase_left = int(t["mase_series"].iloc[0])
    dropped = int(t["mape_cells_dropped"].iloc[0])
    if mase_left:
        lines.append(f"MASE leaves out {count(mase_left)} series without a usable scale.")
    if dropped:
        lines.append(
            f"MAPE leaves out {count(dropped)} cell{'' if dropped == 1 else 's'} with demand "
            f"<= 0; MAPE cap counts {'it' if dropped == 1 else 'them'} as 100%."
        )
    lines.append("")
    lines.extend(verdict_lines(result))
    if result.by_series is not None:
        lines.append("")
        lines.append("one row per series and forecast: use --format csv or --format json")
    return "\n".join(lines) + "\n"


def _numbers(table: pd.DataFrame, priced: bool) -> list[str]:
    return [number(v) for v in table["abs_error_value" if priced else "abs_error"]]


def _int(value: object) -> str:
    return "" if value is None or value is pd.NA else str(int(value))  # type: ignore[call-overload]
