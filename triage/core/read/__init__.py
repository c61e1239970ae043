"""Reading a portfolio file (CSV, xlsx or Parquet): one module per concern.

* :mod:`~triage.core.read.columns`: the column plan (file type, ``--columns``, header matching).
* :mod:`~triage.core.read.cells`: cell validation (ids, attributes, periods, numbers, lags).
* :mod:`~triage.core.read.delimited`, :mod:`~triage.core.read.parquet`,
  :mod:`~triage.core.read.workbook`: one module per format.
* :mod:`~triage.core.read.frame`: the full way, a file into the canonical long frame
  (:func:`load_frame`).
* :mod:`~triage.core.read.stream`: the streamed way, blocks of rows straight into the dense
  arrays (:func:`build_streamed`).
* :mod:`~triage.core.read.memory`, :mod:`~triage.core.read.messages`: the memory check before
  a read, and the wording of refusals.

:func:`read_portfolio` tries the streamed way first and reads the file the full way whenever
the streamed way declines; both give the same portfolio or the same error
(``tests/core/test_parquet_streamed.py``, ``tests/core/test_csv_streamed.py``).
"""

from __future__ import annotations

from pathlib import Path

from triage.core import schema
from triage.core.dialect import FileOptions
from triage.core.portfolio import Portfolio, build_portfolio, value_or_units
from triage.core.read.cells import LAG_MAX, lookalike_keys, parse_periods
from triage.core.read.columns import SUFFIXES, parse_column_map
from triage.core.read.delimited import scan_csv
from triage.core.read.frame import LoadedFrame, load_frame
from triage.core.read.memory import BYTES_PER_ROW
from triage.core.read.parquet import scan_parquet
from triage.core.read.stream import FastPathDeclined, StreamSource, build_streamed
from triage.core.read.workbook import XLSX_MAX_CELLS, XLSX_MAX_COLUMNS, XLSX_MAX_ROWS, xlsx_rows
from triage.core.settings import SEASON

__all__ = [
    "BYTES_PER_ROW",
    "LAG_MAX",
    "SUFFIXES",
    "XLSX_MAX_CELLS",
    "XLSX_MAX_COLUMNS",
    "XLSX_MAX_ROWS",
    "FastPathDeclined",
    "LoadedFrame",
    "StreamSource",
    "build_streamed",
    "load_frame",
    "lookalike_keys",
    "parse_column_map",
    "parse_periods",
    "read_portfolio",
    "scan_csv",
    "scan_parquet",
    "xlsx_rows",
]


def read_portfolio(
    path: str | Path,
    *,
    columns: dict[str, str] | None = None,
    sheet: str | None = None,
    lag: int | None = None,
    smallest_lag: bool = False,
    options: FileOptions | None = None,
    scored_window: int | None = None,
    season: int = SEASON.default,
) -> Portfolio:
    """Load a portfolio file and build its arrays (see :func:`load_frame` and ``build_portfolio``).

    ``options`` say how the file writes its cells (``--sep``, ``--decimal``, ``--date-format``,
    ``--header-row``; see ``triage.core.dialect``); both ways read them.

    A Parquet or CSV file is first read the streamed way (:func:`scan_parquet`,
    :func:`scan_csv`): one block of rows at a time, straight into the dense arrays, without
    the long frame. Whenever that reader cannot vouch for the file (a bad or unusual cell,
    several lags, duplicate rows, ...) the file is read the full way, which gives the same
    portfolio or the same error.

    ``scored_window`` (``triage rank`` and ``compare``): the portfolio is read to be scored
    over a window of that many periods, with a naive baseline of season ``season``, and nothing
    else. The streamed way then keeps the forecasts only over that window and the demand only
    from ``season`` periods before it (``portfolio.ColumnSpan``), and takes the measures of the
    whole history while reading (``Portfolio.history``): most of the arrays' memory is never
    held. Any other use of those arrays raises ``IndexError``.
    """
    scan = {".parquet": scan_parquet, ".pq": scan_parquet, ".csv": scan_csv}.get(
        Path(path).suffix.lower()
    )
    header = (columns or {}).get(schema.PRICE, schema.PRICE)
    if sheet is None and scan is not None:
        try:
            streamed = build_streamed(
                scan(path, columns=columns, options=options), lag, scored_window, season
            )
        except FastPathDeclined:
            pass
        else:
            return value_or_units(streamed, header)
    loaded = load_frame(path, columns=columns, sheet=sheet, options=options)
    built = build_portfolio(loaded, lag=lag, consume=True, smallest_lag=smallest_lag)
    return value_or_units(built, header)
