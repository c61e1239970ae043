"""Scorecards and data-quality reports as CSV, JSON and readable text (``triage rank`` and
``triage check``).

CSV and JSON keep full precision (shortest round-trip floats) and leave undefined values empty
(CSV) or ``null`` (JSON). Human text prints "over"/"under" beside every signed number.
"""

from __future__ import annotations

import collections
import concurrent.futures
import functools
import io
import math
import os
import re
import shutil
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from rich.console import Console
from rich.table import Table
from rich.text import Text

from triage.core import metrics, ranking, schema
from triage.core.compare import last_step
from triage.core.output import totals, window_info
from triage.core.portfolio import Portfolio
from triage.core.quality import Quality
from triage.core.text import number, over_under, percent, visible
from triage.render.export import dumps_json

if TYPE_CHECKING:
    import pyarrow as pa

#: Rows a ``table`` shows when neither --top nor --cover is given.
TABLE_DEFAULT_ROWS = 25


def to_csv(card: pd.DataFrame) -> str:
    """The scorecard as CSV text, one row per series in the given order (see :func:`csv_blocks`)."""
    return b"".join(csv_blocks(card)).decode("utf-8")


def csv_blocks(card: pd.DataFrame) -> Iterator[bytes]:
    """The scorecard as UTF-8 CSV, in blocks of rows: the header first, then the rows in order.

    Joined, the blocks are exactly what ``DataFrame.to_csv(index=False, lineterminator="\\n")``
    writes: floats in their shortest round-trip form (``repr``), missing values empty, text
    quoted only where needed, and text kept exactly (ids with tabs, escapes or NUL join back
    with the file). One difference: a field holding a carriage return is quoted, which the csv
    writer of CPython before 3.11.9 does not do, so that a reader never splits the row there.
    Number, text and categorical columns are formatted column by column in Arrow (several times
    faster than pandas' per-cell formatting), a few blocks ahead on every core; a frame with
    any other column type is written by pandas, in one block. Writing the blocks as they come
    keeps one block's text in memory, not the whole file's.
    """
    sources = _arrow_sources(card)
    if sources is None:
        yield card.to_csv(index=False, lineterminator="\n", float_format=None).encode("utf-8")
        return
    yield (",".join(_quote_field(n) for n in card.columns) + "\n").encode("utf-8")
    starts = range(0, len(card), _CSV_ROWS)
    workers = min(len(starts), os.cpu_count() or 1, 8)
    if workers <= 1:
        yield from (_csv_rows(sources, lo) for lo in starts)
        return
    # Arrow's kernels release the GIL: blocks are formatted on worker threads, at most two per
    # worker ahead of the one being written.
    with concurrent.futures.ThreadPoolExecutor(max_workers=workers) as pool:
        pending: collections.deque[concurrent.futures.Future[bytes]] = collections.deque()
        for lo in starts:
            pending.append(pool.submit(_csv_rows, sources, lo))
            if len(pending) > 2 * workers:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


#: Characters that make a field quoted: what Python's csv writer quotes (QUOTE_MINIMAL, line
#: terminator "\n"), and a carriage return, which any CSV reader takes for a line end.
_CSV_SPECIAL = '[,"\n\r]'


def _arrow_sources(card: pd.DataFrame) -> list[tuple[str, Any]] | None:
    """What each column is formatted from, or None for frames the Arrow writer does not handle."""
    names = list(card.columns)
    # One column: the csv module quotes an empty field alone on its line; leave that to pandas.
    if len(names) < 2 or not all(isinstance(n, str) for n in names) or not card.columns.is_unique:
        return None
    found = [_column_source(card[name]) for name in names]
    sources = [source for source in found if source is not None]
    return sources if len(sources) == len(found) else None


#: Rows per block of CSV text.
_CSV_ROWS = 1 << 15


def _column_source(column: pd.Series) -> tuple[str, Any] | None:
    """What a column is formatted from: ("float" | "int", numpy array) or ("text", Arrow text)."""
    import pyarrow as pa

    dtype = column.dtype
    if dtype == np.float64:
        return "float", column.to_numpy()
    if isinstance(dtype, np.dtype) and dtype.kind in "iu":
        return "int", column.to_numpy()
    if isinstance(dtype, pd.CategoricalDtype):
        labels = _text_array(pd.Series(dtype.categories))
        if labels is None:
            return None
        codes = np.asarray(column.array.codes)
        return "text", labels.take(pa.array(codes, mask=codes < 0))
    text = _text_array(column)
    return None if text is None else ("text", text)


def _csv_rows(sources: list[tuple[str, Any]], lo: int) -> bytes:
    """UTF-8 CSV lines of rows ``lo`` to ``lo + _CSV_ROWS`` (each line ends with a line feed)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    cells = []
    for kind, values in sources:
        if kind == "float":
            cells.append(_float_text(values[lo : lo + _CSV_ROWS]))
        elif kind == "int":
            whole = pa.array(values[lo : lo + _CSV_ROWS])
            cells.append(whole.cast(pa.large_string()))
        else:
            cells.append(values.slice(lo, _CSV_ROWS))
    # A last empty field after the line feed's separator: each row then ends with "\n", and the
    # joined rows' data buffer is the block's text.
    cells[-1] = pc.binary_join_element_wise(
        cells[-1], _text(""), _text("\n"), null_handling="replace", null_replacement=""
    )
    rows = pc.binary_join_element_wise(
        *cells, _text(","), null_handling="replace", null_replacement=""
    )
    offsets = np.frombuffer(rows.buffers()[1], dtype=np.int64)
    offsets = offsets[rows.offset : rows.offset + len(rows) + 1]
    return bytes(memoryview(rows.buffers()[2])[int(offsets[0]) : int(offsets[-1])])


def _text_array(column: pd.Series) -> Any | None:
    """Text (``str`` dtype, or objects that are all str) as quoted-where-needed Arrow text."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if isinstance(column.dtype, pd.StringDtype):
        values = pa.array(column.array, type=pa.large_string())
    elif column.dtype == object:
        try:
            values = pa.array(column.to_numpy(), type=pa.large_string(), from_pandas=True)
        except (pa.ArrowInvalid, pa.ArrowTypeError):
            return None
    else:
        return None
    special = pc.match_substring_regex(values, _CSV_SPECIAL)
    if pc.any(special).as_py():
        doubled = pc.replace_substring(values, '"', '""')
        quoted = pc.binary_join_element_wise(_text('"'), doubled, _text('"'), _text(""))
        values = pc.if_else(special, quoted, values)
    return values


def _text(value: str) -> object:
    """An Arrow large_string scalar (compute kernels want one string type throughout)."""
    import pyarrow as pa

    return pa.scalar(value, pa.large_string())


def _quote_field(text: str) -> str:
    return '"' + text.replace('"', '""') + '"' if re.search(_CSV_SPECIAL, text) else text


def _float_text(values: np.ndarray) -> object:
    """float64 as Python's ``repr`` writes each value, NaN as null; built from Arrow's cast.

    Arrow writes the same shortest round-trip digits as ``repr`` but places the decimal point
    differently: positional from 1e-6 to 1e10 (``repr``: 1e-4 to 1e16), exponents without a
    leading zero (``1e-7``; ``repr``: ``1e-07``), whole numbers without ``.0``. Whole numbers
    are written from their int64 value (cheaper than the float cast) plus ``.0``; the cells in
    the other ranges are rewritten, and 1e10 <= |x| < 1e16 (rare) and -0.0 take ``repr`` itself.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    size = np.abs(values)
    missing = np.isnan(values)
    finite = ~missing & (size != np.inf)
    negative_zero = (values == 0) & np.signbit(values)
    whole = finite & (np.trunc(values) == values) & (size < 1e16) & ~negative_zero
    n_whole = int(np.count_nonzero(whole))
    if n_whole == len(values) - int(np.count_nonzero(missing)):
        return _whole_text(np.where(whole, values, 0.0), missing)
    text = pa.array(values, from_pandas=True).cast(pa.large_string())
    if n_whole:
        text = pc.replace_with_mask(text, pa.array(whole), _whole_text(values[whole], None))
    # 1e-6 <= |x| < 1e-4: positional in Arrow, exponent in repr; below 1e-6 both use exponents,
    # but Arrow writes a one-digit exponent without the leading zero.
    rewrites: list[tuple[np.ndarray, Callable[[Any], Any]]] = [
        ((size >= 1e-5) & (size < 1e-4), functools.partial(_positional_to_exponent, zeros=4)),
        ((size >= 1e-6) & (size < 1e-5), functools.partial(_positional_to_exponent, zeros=5)),
        ((size < 1e-6) & (size > 0), _pad_exponent),
    ]
    for mask, rewrite in rewrites:
        if mask.any():
            picked = pa.array(mask)
            text = pc.replace_with_mask(text, picked, rewrite(text.filter(picked)))
    exact = (finite & ~whole & (size >= 1e10) & (size < 1e16)) | negative_zero
    if exact.any():
        shown = pa.array([repr(v) for v in values[exact].tolist()], type=pa.large_string())
        text = pc.replace_with_mask(text, pa.array(exact), shown)
    return text


def _positional_to_exponent(text: Any, zeros: int) -> Any:
    """``0.0000123`` -> ``1.23e-05`` (``zeros`` zeros after the point, then a non-zero digit)."""
    import pyarrow.compute as pc

    lead = rf"^(-?)0\.{'0' * zeros}([1-9])"
    exponent = f"e-{zeros + 1:02d}"
    text = pc.replace_substring_regex(text, lead + r"(\d+)$", rf"\1\2.\3{exponent}")
    return pc.replace_substring_regex(text, lead + "$", rf"\1\2{exponent}")


def _pad_exponent(text: Any) -> Any:
    """``1.5e-7`` -> ``1.5e-07``: ``repr`` writes at least two exponent digits."""
    import pyarrow.compute as pc

    return pc.replace_substring_regex(text, r"e([+-])(\d)$", r"e\10\2")


def _whole_text(values: np.ndarray, missing: np.ndarray | None) -> object:
    """Whole numbers below 1e16 as ``repr`` writes them (``12.0``); ``missing`` cells null."""
    import pyarrow as pa
    import pyarrow.compute as pc

    digits = pa.array(values.astype(np.int64), mask=missing).cast(pa.large_string())
    return pc.binary_join_element_wise(digits, _text(".0"), _text(""))


#: Rows per file of a scorecard written as Parquet files.
PARQUET_ROWS = 1_000_000
#: The names of those files (``part-00000.parquet`` first).
PARQUET_PART = re.compile(r"part-\d{5,}\.parquet")


def parquet_owned(name: str) -> bool:
    """Whether ``name`` in a scorecard folder is one of the files rank writes there (a part, or
    the folder's description): what replacing the folder with ``--force`` may remove."""
    from triage.core.card_folder import DESCRIPTION

    return name == DESCRIPTION or PARQUET_PART.fullmatch(name) is not None


def parquet_encoding(schema: pa.Schema) -> dict[str, Any]:
    """How the scorecard's columns are stored in Parquet: ``pyarrow.parquet.write_table``'s
    ``compression`` and ``use_dictionary``.

    Measures (floats) are stored plain, neither compressed nor dictionary-encoded: they hardly
    compress (a file of ten million series' scorecard is 1.7x larger), and decoding them is most
    of reading a scorecard; keys, text and counts keep Parquet's default (Snappy, dictionary),
    which every reader knows. Reading the 10M benchmark's scorecard took 0.52x the time of the
    default encoding in one run (docs/performance.md).
    """
    import pyarrow as pa

    floats = {f.name for f in schema if pa.types.is_floating(f.type)}
    return {
        "compression": {f.name: "none" if f.name in floats else "snappy" for f in schema},
        "use_dictionary": [f.name for f in schema if f.name not in floats],
    }


def parquet_parts(card: pd.DataFrame) -> list[tuple[str, Callable[[Path], None]]]:
    """The scorecard as Parquet files of :data:`PARQUET_ROWS` rows each, in review order
    (``part-00000.parquet`` holds the first rows): (file name, writer) for ``write_set_atomic``.

    Columns and text are exactly the scorecard's; missing numbers are nulls.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    def writer(lo: int) -> Callable[[Path], None]:
        def write(path: Path) -> None:
            block = card.iloc[lo : lo + PARQUET_ROWS]
            table = pa.Table.from_pandas(block, preserve_index=False)
            pq.write_table(table, path, **parquet_encoding(table.schema))

        return write

    starts = range(0, max(len(card), 1), PARQUET_ROWS)
    return [(f"part-{k:05d}.parquet", writer(lo)) for k, lo in enumerate(starts)]


def to_json(
    portfolio: Portfolio,
    card: pd.DataFrame,
    window: int,
    season: int,
    *,
    by: str = ranking.BY_ERROR,
    steps: Sequence[str] | None = None,
    cols: np.ndarray | None = None,
) -> str:
    """The scorecard as one JSON document: what was scored, then one object per series.

    Args:
        portfolio: The portfolio scored.
        card: The rows to write, in order.
        window: Latest periods with actual demand scored.
        season: Seasonal period of the naive baseline.
        by: The order of the rows (``ranking.ORDERS``).
        steps: The process steps ``fva_loss`` was measured along (None: the default chain).
        cols: The window's columns when ``portfolio`` describes a larger whole
            (``output.window_info``).
    """
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
        "window": window_info(portfolio, window, cols),
        "season": season,
        "error_sign": "forecast - demand (positive = over-forecast)",
        "ranked_by": _ranked_by(by, portfolio.price is not None),
        **_units_reason(portfolio),
        "fva_steps": dict(
            zip(("previous", "final"), last_step(portfolio, season, steps), strict=True)
        ),
        "series": records,
    }
    # Text exactly as in the file; DEL and C1 escaped as JSON allows (the export's writer).
    return dumps_json(doc, indent=1) + "\n"


def ranked_in(portfolio: Portfolio, priced: bool) -> str:
    """`` in value``, `` in units``, or why in units when the file has a price column
    (``Portfolio.units_reason``), for the "ranked by" line of a table."""
    if priced:
        return " in value"
    if portfolio.units_reason:
        return f" in units ({visible(portfolio.units_reason)})"
    return " in units"


def _units_reason(portfolio: Portfolio) -> dict[str, str]:
    """The JSON key that says why a file with a price column ranks in units (none otherwise)."""
    return {"units_reason": portfolio.units_reason} if portfolio.units_reason else {}


def _ranked_by(by: str, priced: bool) -> str:
    """The scorecard column the rows are in descending order of (bias: after the flag)."""
    if by == ranking.BY_FVA:
        return "fva_loss_value" if priced else "fva_loss"
    return "abs_error_value" if priced else "abs_error"


def _json_value(value: object) -> object:
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return None if math.isnan(value) else float(value)
    if value == "" or value is None:
        return None
    return value


def _bias_text(fraction: float, bias: float) -> str:
    """Bias as a share of demand, or only its direction when that share is undefined."""
    if fraction is None or math.isnan(fraction):
        if bias is None or math.isnan(bias) or bias == 0:
            return ""
        return "over" if bias > 0 else "under"
    return over_under(fraction, 1, fraction=True)


def rank_table(
    portfolio: Portfolio,
    card: pd.DataFrame,
    shown: pd.DataFrame,
    window: int,
    season: int,
    *,
    by: str = ranking.BY_ERROR,
    steps: Sequence[str] | None = None,
    cols: np.ndarray | None = None,
) -> str:
    """A readable ranked list with a header of portfolio totals.

    With ``by`` fva the list also shows the loss of the last process step (``steps``, None for
    the default chain) and says which step it is.
    """
    priced = "abs_error_value" in card
    fva = by == ranking.BY_FVA
    previous, final = last_step(portfolio, season, steps) if fva else ("", "")
    tot = totals(card)
    win = window_info(portfolio, window, cols)
    lines = [
        f"{visible(portfolio.path.name)}: {len(card):,} series, {portfolio.calendar.freq}, "
        f"window {win['first']} .. {win['last']} "
        f"({win['periods']} period{'' if win['periods'] == 1 else 's'})"
        + (f", lag {portfolio.lag}" if portfolio.lag is not None else ""),
        "error = forecast - demand; 'over' = forecast above demand",
        f"total absolute error {number(tot['abs_error'])} units"
        + (f", {number(tot['abs_error_value'])} in value" if priced else ""),
        f"portfolio bias {over_under(tot['bias_pct'], 1, fraction=True) or 'n/a'}; "
        f"WAPE {percent(tot['wape']) or 'n/a'}",
        "ranked by "
        + (
            "persistent bias, then absolute bias"
            if by == ranking.BY_BIAS
            else f"error added by the last step, {visible(previous)} -> {visible(final)}"
            if fva
            else "share of absolute error"
        )
        + ranked_in(portfolio, priced),
        *(
            [f"step loss = |e| of {visible(final)} - |e| of {visible(previous)} (+ = error added)"]
            if fva
            else []
        ),
        *(_no_loss_lines(card) if fva else []),
        "",
    ]
    rank_col, rank_head = {
        ranking.BY_BIAS: ("bias_rank", "bias rank"),
        ranking.BY_FVA: ("fva_rank", "fva rank"),
    }.get(by, ("rank", "rank"))
    loss_col = "fva_loss_value" if priced else "fva_loss"
    err_col = "abs_error_value" if priced else "abs_error"
    has_location = schema.LOCATION in card
    # (header, justify, cells, priority): when the terminal is too narrow for every column, the
    # highest priority numbers go first (pattern, then run, ...); the rest are never cut short.
    # Ordered by the step loss, the list gives up the absolute error last of all.
    columns: list[Column] = [
        (rank_head, "right", [str(v) for v in shown[rank_col]], 0),
        (schema.ITEM, "left", [Text(visible(str(v))) for v in shown[schema.ITEM]], 0),
        *(
            [(schema.LOCATION, "left", [Text(visible(str(v))) for v in shown[schema.LOCATION]], 0)]
            if has_location
            else []
        ),
        ("share", "right", [percent(v) for v in shown["error_share"]], 0),
        ("cum", "right", [percent(v) for v in shown["cum_share"]], 4),
        (
            "abs err" + (" value" if priced else ""),
            "right",
            [number(v) for v in shown[err_col]],
            0.5 if fva else 0,
        ),
        *(
            [
                (
                    "step loss" + (" value" if priced else ""),
                    "right",
                    [number(v, signed=True) for v in shown[loss_col]],
                    0,
                )
            ]
            if fva
            else []
        ),
        (
            "bias %",
            "right",
            [_bias_text(p, b) for p, b in zip(shown["bias_pct"], shown["bias"], strict=True)],
            0,
        ),
        ("WAPE", "right", [percent(v) for v in shown["wape"]], 3),
        ("TS", "right", [over_under(v, 1) for v in shown["tracking_signal"]], 2),
        ("run", "right", [_run_text(v) for v in shown["bias_run"]], 1),
        ("persistent", "left", list(shown["bias_flag"]), 0),
        ("pattern", "left", list(shown["pattern"]), 5),
    ]
    lines.extend(fitted_table(columns, key_columns=(schema.ITEM, schema.LOCATION)))
    if len(shown) < len(card):
        lines.append("")
        lines.append(
            f"showing {len(shown):,} of {len(card):,} series; "
            "use --top K, --cover F or --format csv for more"
        )
    return "\n".join(lines) + "\n"


def _no_loss_lines(card: pd.DataFrame) -> list[str]:
    """How many series have no step loss (no window cell with demand and both steps), which
    ``--by fva`` lists last in key order; nothing when every series has one."""
    none = int(card["fva_loss"].isna().sum())
    if not none:
        return []
    if none == len(card):
        return ["no series has a window cell with both steps: no loss, the list is in key order"]
    return [
        f"{none:,} of {len(card):,} series have no window cell with both steps: "
        "no loss, listed last"
    ]


def group_table(
    portfolio: Portfolio,
    table: pd.DataFrame,
    shown: pd.DataFrame,
    window: int,
    by_columns: tuple[str, ...],
    *,
    by: str = "error",
    cols: np.ndarray | None = None,
) -> str:
    """The ranked groups as a readable table with a header of portfolio totals.

    ``cols``: the window's columns when ``portfolio`` describes a larger whole (a dataset
    scored on the Dask engine); the series are counted from ``table``."""
    priced = "abs_error_value" in table
    win = window_info(portfolio, window, cols)
    n_series = int(table["series"].sum())
    abs_total = float(table["abs_error"].sum())
    demand_total = float(table["demand"].sum())
    bias_total = float(table["bias"].sum())
    lines = [
        f"{visible(portfolio.path.name)}: {n_series:,} series in {len(table):,} "
        f"group{'' if len(table) == 1 else 's'} "
        f"by {', '.join(visible(c) for c in by_columns)}, {portfolio.calendar.freq}, "
        f"window {win['first']} .. {win['last']} "
        f"({win['periods']} period{'' if win['periods'] == 1 else 's'})",
        "error = forecast - demand; 'over' = forecast above demand",
        f"series-level absolute error {number(abs_total)} units"
        + (f", {number(float(table['abs_error_value'].sum()))} in value" if priced else "")
        + f"; error of the group totals {number(float(table['aggregate_abs_error'].sum()))}",
        f"portfolio bias "
        f"{over_under(bias_total / demand_total, 1, fraction=True) if demand_total > 0 else 'n/a'}",
        "ranked by "
        + (
            "persistent bias of the group total, then absolute bias"
            if by == "bias"
            else "share of the series' absolute error"
        )
        + ranked_in(portfolio, priced),
        "",
    ]
    err_col = "abs_error_value" if priced else "abs_error"
    columns: list[Column] = [
        (
            "bias rank" if by == "bias" else "rank",
            "right",
            [str(v) for v in shown["bias_rank" if by == "bias" else "rank"]],
            0,
        ),
        *[(name, "left", [Text(visible(str(v))) for v in shown[name]], 0) for name in by_columns],
        ("series", "right", [number(v) for v in shown["series"]], 3),
        ("share", "right", [percent(v) for v in shown["error_share"]], 0),
        ("cum", "right", [percent(v) for v in shown["cum_share"]], 5),
        ("abs err" + (" value" if priced else ""), "right", [number(v) for v in shown[err_col]], 0),
        ("total err", "right", [number(v) for v in shown["aggregate_abs_error"]], 2),
        (
            "bias %",
            "right",
            [_bias_text(p, b) for p, b in zip(shown["bias_pct"], shown["bias"], strict=True)],
            0,
        ),
        ("WAPE", "right", [percent(v) for v in shown["wape"]], 4),
        ("persistent", "left", list(shown["bias_flag"]), 0),
        ("flagged", "right", [number(v) for v in shown["flagged_series"]], 1),
        ("top series", "left", [Text(visible(str(v))) for v in shown["top_series"]], 6),
    ]
    lines.extend(fitted_table(columns, key_columns=(*by_columns, "top series")))
    lines += [
        "",
        "abs err: the series' errors summed (what a series-by-series review fixes);",
        "total err: the error of the group's total, where over and under cancel.",
        "A large gap between them: the series err in opposite directions (a mix problem).",
    ]
    if len(shown) < len(table):
        lines.append("")
        lines.append(
            f"showing {len(shown):,} of {len(table):,} groups; "
            "use --top K, --cover F or --format csv for more"
        )
    return "\n".join(lines) + "\n"


def groups_json(
    portfolio: Portfolio,
    table: pd.DataFrame,
    window: int,
    season: int,
    by_columns: tuple[str, ...],
    *,
    cols: np.ndarray | None = None,
) -> str:
    """The group scorecard as one JSON document: what was scored, then one object per group
    (``cols`` as for :func:`group_table`)."""
    columns = list(table.columns)
    arrays = [table[c].to_numpy() for c in columns]
    records = [
        {c: _json_value(v) for c, v in zip(columns, values, strict=True)}
        for values in zip(*arrays, strict=True)
    ]
    doc = {
        "portfolio": str(portfolio.path),
        "cycle": portfolio.cycle,
        "frequency": portfolio.calendar.freq,
        "lag": portfolio.lag,
        "window": window_info(portfolio, window, cols),
        "season": season,
        "error_sign": "forecast - demand (positive = over-forecast)",
        "grouped_by": list(by_columns),
        "ranked_by": "abs_error_value" if portfolio.price is not None else "abs_error",
        **_units_reason(portfolio),
        "groups": records,
    }
    return dumps_json(doc, indent=1) + "\n"


#: Widest an item or location id is shown in the table (longer ids end in an ellipsis).
_KEY_WIDTH = 24


#: A table column: (header, justify, cells, priority); priority 0 is never dropped, and when the
#: terminal is too narrow the highest priority goes first.
Column = tuple[str, str, list[Any], float]


def fitted_table(
    columns: list[Column], *, key_columns: tuple[str, ...], width: int | None = None
) -> list[str]:
    """Lines of a plain table that fits the terminal's width: low-priority columns are dropped
    (and named below it) rather than any cell cut short; key columns end in an ellipsis beyond
    ``_KEY_WIDTH``.

    Args:
        columns: The table's columns (see ``Column``), in order.
        key_columns: Headers of the columns holding ids (cut to ``_KEY_WIDTH``).
        width: The width to fit; None for the terminal's (120 when it has none).
    """
    lines: list[str] = []
    all_columns = list(columns)
    columns = list(columns)
    if width is None:
        width = shutil.get_terminal_size((120, 24)).columns

    def natural(cells: list[Any], header: str, key: bool) -> int:
        widest = max((len(str(c)) for c in cells), default=0)
        return min(max(widest, len(header)), _KEY_WIDTH) if key else max(widest, len(header))

    sizes = [natural(c, h, h in key_columns) for h, _, c, _ in columns]
    dropped: list[str] = []
    # Columns are two spaces apart (padding 1 on each side, none at the edges).
    while sum(sizes) + 2 * (len(sizes) - 1) > width and any(col[3] for col in columns):
        drop = max(range(len(columns)), key=lambda i: columns[i][3])
        dropped.append(columns[drop][0])
        del columns[drop], sizes[drop]
    table = Table(box=None, pad_edge=False, show_edge=False, header_style="bold")
    for (name, justify, _, _), size in zip(columns, sizes, strict=True):
        key = name in key_columns
        table.add_column(
            name,
            justify=justify,  # type: ignore[arg-type]
            no_wrap=True,
            overflow="ellipsis",
            min_width=size,
            max_width=_KEY_WIDTH if key else None,
        )
    for row in zip(*(cells for _, _, cells, _ in columns), strict=True):
        table.add_row(*row)
    buffer = io.StringIO()
    console = Console(
        file=buffer,
        width=max(width, sum(sizes) + 2 * (len(sizes) - 1)),
        color_system=None,
        markup=False,
        emoji=False,
        highlight=False,
    )
    console.print(table)
    lines.extend(line.rstrip() for line in buffer.getvalue().rstrip("\n").split("\n"))
    if dropped:
        order = [name for name, *_ in all_columns if name in dropped]
        lines.append("")
        said = f"not shown at {width} columns: {', '.join(order)}"
        if len(said) + len(" (widen the terminal,") <= width:
            lines.append(f"{said} (widen the terminal,")
            lines.append("or use --format csv for every measure)")
        else:
            lines.append(said)
            lines.append("(widen the terminal, or use --format csv for every measure)")
    return lines


def _run_text(run: int) -> str:
    if run == 0:
        return "0"
    return f"{abs(run)} {'over' if run > 0 else 'under'}"


def check_text(
    portfolio: Portfolio,
    window: int,
    season: int,
    found: Quality,
    cols: np.ndarray,
    *,
    lag_given: bool = True,
) -> str:
    """The data-quality report of ``triage check``.

    Args:
        portfolio: The portfolio; with several lags and ``lag_given`` false, built scoring the
            smallest lag (``read_portfolio(..., smallest_lag=True)``); or what describes a
            dataset counted in parts (its calendar, lags, columns, rows).
        window: Latest periods with actual demand to score.
        season: Seasonal period of the naive baseline.
        found: The counts of every series (``quality.quality``, or ``Quality.total`` of the
            parts).
        cols: The scoring window's columns.
        lag_given: Whether ``--lag`` chose the lag. Without it, a file of several lags is
            reported with its lags and the choice to make, not refused.
    """
    choose = len(portfolio.lags) > 1 and not lag_given
    cal = portfolio.calendar
    win = window_info(portfolio, window, cols)

    lines = [
        f"file           {visible(str(portfolio.path))}",
        f"rows           {portfolio.rows:,}",
        f"series         {found.series:,} (key: {', '.join(portfolio.key_columns)})",
        f"calendar       {cal.freq}, {cal.label(0)} .. {cal.label(len(cal.periods) - 1)} "
        f"({len(cal.periods)} periods)",
        f"latest actual  {cal.label(portfolio.last_actual)} (review cycle {portfolio.cycle})",
        f"window         {win['first']} .. {win['last']} ({win['periods']} periods with actuals; "
        f"asked for {window}), naive season {season}",
        "lags           "
        + (
            f"{', '.join(map(str, portfolio.lags))}; no --lag given, so this report scores "
            f"lag {portfolio.lag} (the smallest)"
            if choose
            else f"{', '.join(map(str, portfolio.lags))}; scoring lag {portfolio.lag}"
            if portfolio.lags
            else "no lag column (one forecast per period)"
        ),
        f"forward        {portfolio.n_forward} periods, "
        f"{found.forward:,} forecast values"
        + (
            f" ({cal.label(portfolio.last_actual + 1)} .. {cal.label(len(cal.periods) - 1)})"
            if portfolio.n_forward
            else ""
        ),
        "price          "
        + (
            "yes: errors are ranked in value"
            if portfolio.price is not None
            else f"not used: {visible(portfolio.units_reason)}; errors are ranked in units"
            if portfolio.units_reason
            else "no: errors are ranked in units"
        ),
        f"attributes     {', '.join(portfolio.attributes) if portfolio.attributes else 'none'}",
        *(
            [f"competing      {', '.join(portfolio.competing)} (triage compare ranks them)"]
            if portfolio.competing
            else []
        ),
        "",
        f"missing actuals   {found.missing:,} series-periods after each series' first actual "
        f"({found.window_missing:,} in the window); missing is never read as zero",
        f"no forecast       {found.no_forecast:,} window periods with an actual but no forecast "
        "(not scored)",
        f"negative demand   {found.negative:,} periods (returns; counted as demand)",
        f"zero demand       {found.zero:,} periods",
        f"no actual demand  {found.no_actual:,} series (nothing to score)",
        f"none above zero   {found.zero_only:,} series (actuals, but every one zero or negative)",
        "patterns          "
        + ", ".join(
            f"{name} {int(c):,}" for name, c in zip(metrics.PATTERNS, found.patterns, strict=True)
        ),
    ]
    if portfolio.notices:
        lines.append("")
        lines.extend(f"note: {visible(n, multiline=True)}" for n in portfolio.notices)
    lines.append("")
    if not found.scorable:
        lines.append(f"not ok: {ranking.NOTHING_TO_SCORE.format(periods=len(cols))}")
    elif choose:
        listed = ", ".join(map(str, portfolio.lags[:-1])) + f" or {portfolio.lags[-1]}"
        lines.append(
            f"ok: the file can be scored one lag at a time: the history holds "
            f"{len(portfolio.lags)} forecast lags and metrics never mix them, so rank, review, "
            f"report and export need --lag {listed} (e.g. --lag {portfolio.lag})"
        )
    else:
        lines.append("ok: the file can be scored")
    return "\n".join(lines)
