"""Read a portfolio file (CSV, xlsx or Parquet) into the canonical long frame.

One function, :func:`load_frame`, turns a planner's file into a :class:`LoadedFrame`: the columns
of :mod:`triage.core.schema` with fixed types, rows in file order, plus what the user should know
about the file (notices). Anything that would make the numbers wrong stops the load with a
:class:`~triage.core.errors.LoadError` naming the file, the column, the rows, what is wrong and
what to do. Checks that need the whole portfolio (duplicate rows, calendar, forward periods)
belong to the builder; this package checks cells, columns and lines, vectorised.

Types of the canonical frame:

* ``item``: ``str`` (CSV, xlsx) or ``category`` with ``str`` categories (Parquet), text exactly
  as written: ``NA``, ``00123``, ``1e5`` and leading spaces survive. Never empty.
* ``location`` (optional): ``category`` with ``str`` categories. Never empty.
* ``period``: ``datetime64[ns]`` at midnight, from ISO dates (``YYYY-MM-DD``, ``YYYY-MM``) or
  real date cells. Nothing else is guessed.
* ``demand``, ``forecast``: ``float64``; NaN means missing (empty cell or a token in
  :data:`~triage.core.schema.NUMERIC_MISSING`), never zero. Finite; negative allowed.
* ``price`` (optional): ``float64``, NaN allowed, finite, not negative.
* ``lag`` (optional): ``int64``, whole numbers from 0 up, never missing.
* ``forecast_<name>`` (optional, any number, right after ``forecast`` in file order): competing
  forecasts, ``float64`` checked as ``forecast`` is.
* every other column: a text attribute, ``category`` with ``str`` categories, missing as ``""``.

Ids and attribute cells keep their control characters exactly as written (see
:mod:`triage.core.read.cells`). Headers are names, not data: their control characters are
replaced at load by the Unicode control pictures ``␀``-``␟`` (tab ``␉``, line feed ``␊``,
escape ``␛``), ``␡`` for DEL and ``�`` for C1, as are cells quoted in messages.

File row numbers in messages count the header as row 1, as a spreadsheet does. In a CSV file a
row is a record: it is the line number unless a quoted cell holds a line break.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from triage.core import schema
from triage.core.dialect import FileOptions
from triage.core.errors import format_rows
from triage.core.read.cells import (
    CellContext,
    as_text,
    category_codes,
    checked_attribute,
    checked_ids,
    checked_lags,
    checked_numbers,
    checked_periods,
    is_blank,
)
from triage.core.read.columns import (
    ColumnPlan,
    RawColumns,
    SeriesPick,
    checked_mapping,
    checked_options,
    file_kind,
)
from triage.core.read.delimited import read_delimited
from triage.core.read.messages import fail, plural, quote_list
from triage.core.read.parquet import read_parquet
from triage.core.read.workbook import read_workbook

#: Column order of the canonical frame; attributes follow in file order.
_ORDER: tuple[str, ...] = (
    schema.ITEM,
    schema.LOCATION,
    schema.PERIOD,
    schema.LAG,
    schema.DEMAND,
    schema.FORECAST,
    schema.PRICE,
)


@dataclass(frozen=True)
class LoadedFrame:
    """A validated portfolio in canonical long form, and what the user should know about it.

    Attributes:
        frame: Canonical columns (see the module docstring for types), rows in file order,
            ``RangeIndex`` 0..n-1.
        path: The file that was read.
        first_row: File row number of frame row 0 (CSV and xlsx: 2 when the header is row 1;
            Parquet: 1).
        attributes: Names of the extra text columns kept, in file order.
        notices: Things worth telling the user that are not errors.
        sheet: The xlsx sheet read, or None for other formats.
    """

    frame: pd.DataFrame
    path: Path
    first_row: int
    attributes: tuple[str, ...]
    notices: tuple[str, ...]
    sheet: str | None = None
    #: File row number of every frame row, when blank rows were skipped (None: consecutive).
    _file_rows: np.ndarray | None = field(default=None, repr=False, compare=False)

    def rows(self, index: Any) -> list[int]:
        """Map frame positions to file row numbers, for messages.

        Args:
            index: One position, a sequence or array of positions, or a boolean mask as long as
                the frame.

        Returns:
            The file row numbers, in the order given.
        """
        positions = _positions(index, len(self.frame))
        if self._file_rows is not None:
            rows: list[int] = self._file_rows[positions].tolist()
        else:
            rows = (positions + self.first_row).tolist()
        return rows


def load_frame(
    path: str | Path,
    *,
    columns: dict[str, str] | None = None,
    sheet: str | None = None,
    options: FileOptions | None = None,
) -> LoadedFrame:
    """Read and validate a portfolio file.

    Args:
        path: A ``.csv`` (UTF-8, with or without BOM, comma-separated), ``.xlsx``/``.xlsm`` or
            ``.parquet`` file.
        columns: Canonical name -> file header, applied before headers are matched by name
            (see :func:`parse_column_map`).
        sheet: The xlsx sheet to read; default the first visible one.
        options: How the cells are written, when not triage's default (separator, decimal mark,
            date format, header row; see :class:`~triage.core.dialect.FileOptions`).

    Returns:
        The canonical frame with its file row numbers and notices.

    Raises:
        LoadError: The file cannot be read, or a cell, column or line is not usable as it is.
    """
    file = Path(path)
    kind = file_kind(file)
    if sheet is not None and kind != "xlsx":
        fail(
            file,
            f"--sheet {sheet!r} was given, but this is a {kind} file, which has no sheets.",
            "Leave out --sheet, or point to the .xlsx file.",
        )
    dialect = checked_options(file, kind, options)
    mapping = checked_mapping(file, columns)
    notices: list[str] = []
    sheet_used: str | None = None
    try:
        if kind == "csv":
            raw = read_delimited(file, mapping, notices, dialect)
        elif kind == "parquet":
            raw = read_parquet(file, mapping, notices)
        else:
            raw, sheet_used = read_workbook(file, mapping, sheet, notices, dialect)
    except OSError as exc:
        fail(
            file,
            f"the file cannot be read ({exc.strerror or exc}).",
            "Check that you may read the file and that no other program has it locked.",
        )
    return _build(file, raw, notices, sheet_used, dialect)


def load_picked(
    path: str | Path,
    pick: SeriesPick,
    *,
    columns: dict[str, str] | None = None,
    options: FileOptions | None = None,
) -> LoadedFrame | None:
    """The rows of the series ``pick`` of a Parquet file, checked as :func:`load_frame` checks
    a file (every row of the row groups read is checked), with their row numbers in the file.

    Only the row groups whose item statistics may hold the series are read
    (``read_parquet``): a dataset's histories fetched on demand.

    Returns:
        The picked series' rows, or None when the file holds none of them.

    Raises:
        LoadError: As :func:`load_frame`, for the rows read.
    """
    file = Path(path)
    kind = file_kind(file)
    if kind != "parquet":
        raise ValueError(f"series are picked from Parquet files only, not {kind}")
    dialect = checked_options(file, kind, options)
    mapping = checked_mapping(file, columns)
    notices: list[str] = []
    try:
        raw = read_parquet(file, mapping, notices, pick)
    except OSError as exc:
        fail(
            file,
            f"the file cannot be read ({exc.strerror or exc}).",
            "Check that you may read the file and that no other program has it locked.",
        )
    if raw.file_rows is not None and not len(raw.file_rows):
        return None
    loaded = _build(file, raw, notices, None, dialect)
    positions = _picked_rows(loaded.frame, pick)
    if not len(positions):
        return None
    rows = np.asarray(loaded.rows(positions), dtype=np.int64)
    return LoadedFrame(
        frame=loaded.frame.iloc[positions].reset_index(drop=True),
        path=file,
        first_row=int(rows[0]),
        attributes=loaded.attributes,
        notices=loaded.notices,
        _file_rows=rows,
    )


def _picked_rows(frame: pd.DataFrame, pick: SeriesPick) -> np.ndarray:
    """Positions of the rows of ``frame`` that belong to a series of ``pick``."""
    item = frame[schema.ITEM]
    rows = np.flatnonzero(item.isin(pick.items).to_numpy(dtype=bool))
    if schema.LOCATION not in frame.columns or not len(rows):
        return rows
    found = pd.MultiIndex.from_arrays(
        [item.iloc[rows].astype(str), frame[schema.LOCATION].iloc[rows].astype(str)]
    )
    kept: np.ndarray = rows[found.isin(list(pick.keys))]
    return kept


def _positions(index: Any, n: int) -> np.ndarray:
    array = np.asarray(index.to_numpy() if hasattr(index, "to_numpy") else index)
    if array.dtype == bool:
        if array.shape != (n,):
            raise ValueError(f"boolean mask of length {array.size}, frame has {n} rows")
        return np.flatnonzero(array)
    return np.atleast_1d(array).astype(np.int64)


def _build(
    path: Path,
    raw: RawColumns,
    notices: list[str],
    sheet: str | None,
    options: FileOptions | None = None,
) -> LoadedFrame:
    plan, data = raw.plan, raw.data
    n = len(next(iter(data.values()))) if data else 0
    keep: np.ndarray | None = None
    if raw.blank_rows_possible and n:
        blank = _blank_rows(data, plan)
        if blank.any():
            keep = np.flatnonzero(~blank)
            # Empty rows after the data (a final blank line, formatted but empty sheet rows)
            # are not worth a notice; gaps between data rows are.
            inner = int(blank[: keep[-1]].sum()) if keep.size else 0
            if inner:
                notices.append(f"{plural(inner, 'empty row')} between data rows skipped.")
            data = {i: s.iloc[keep].reset_index(drop=True) for i, s in data.items()}
            n = len(keep)
    if n == 0:
        where = f" of sheet '{sheet}'" if sheet else ""
        fail(
            path,
            f"the file{where} has a header but no data rows.",
            "Export the portfolio again with its rows, or check that you chose the right "
            "file" + (" and sheet (--sheet)." if sheet else "."),
        )
    if raw.file_rows is not None:
        file_rows = raw.file_rows if keep is None else raw.file_rows[keep]
    elif keep is not None:
        file_rows = keep.astype(np.int64) + raw.first_row
    else:
        file_rows = None
    first_row = int(file_rows[0]) if file_rows is not None else raw.first_row
    consecutive = file_rows is None or bool(file_rows[-1] - file_rows[0] == len(file_rows) - 1)
    if consecutive:
        file_rows = None

    def rows(positions: np.ndarray) -> list[int]:
        positions = np.asarray(positions, dtype=np.int64)
        numbers: list[int] = (
            file_rows[positions] if file_rows is not None else positions + first_row
        ).tolist()
        return numbers

    ctx = CellContext(path, plan, rows, notices, options=options or FileOptions())
    for position in plan.unnamed:
        text, missing = as_text(data[position])
        if not (missing | is_blank(text)).all():
            filled = np.flatnonzero(~(missing | is_blank(text)))
            fail(
                path,
                f"column {position + 1} has no name in the header but holds values "
                f"({format_rows(rows(filled))}).",
                "Give the column a name in the header, or delete it.",
            )
    columns: dict[str, pd.Series] = {}
    for position, role in enumerate(plan.roles):
        if role in (schema.ITEM, schema.LOCATION):
            columns[role] = checked_ids(ctx, position, data[position], role)
        elif role == schema.PERIOD:
            columns[role] = checked_periods(ctx, position, data[position])
        elif role == schema.LAG:
            columns[role] = checked_lags(ctx, position, data[position])
        elif schema.is_number_column(role):
            columns[role] = checked_numbers(ctx, position, data[position], role)
    attributes: list[str] = []
    for position, name in plan.attributes.items():
        columns[name] = checked_attribute(ctx, position, data[position])
        attributes.append(name)
    if ctx.control_cells:
        total = sum(ctx.control_cells.values())
        where = quote_list(list(ctx.control_cells))
        notices.append(
            f"{total} {'cell' if total == 1 else 'cells'} contain control characters (column "
            f"{where}). They are kept exactly in CSV, JSON, exports and the ledger, and shown "
            "as visible symbols on screen: ␀-␟ for C0 (tab ␉, line feed ␊, escape ␛), ␡ for "
            "DEL, � for C1."
        )
    # Competing forecasts follow ``forecast``, in file order.
    competing = [name for name in columns if schema.competing_name(name) is not None]
    canonical = [name for name in _ORDER if name in columns]
    at = canonical.index(schema.FORECAST) + 1
    order = canonical[:at] + competing + canonical[at:] + attributes
    # copy=False keeps each column as its own block instead of copying into 2-D blocks.
    frame = pd.DataFrame({name: columns[name] for name in order}, copy=False)
    frame.index = pd.RangeIndex(len(frame))
    return LoadedFrame(
        frame=frame,
        path=path,
        first_row=first_row,
        attributes=tuple(attributes),
        notices=tuple(notices),
        sheet=sheet,
        _file_rows=file_rows,
    )


def _blank_rows(data: dict[int, pd.Series], plan: ColumnPlan) -> np.ndarray:
    """Rows with no value in any column (blank lines, Excel's trailing ',,,')."""
    item = data[plan.roles.index(schema.ITEM)]
    candidate = _empty_cells(item)
    if not candidate.any():
        return candidate
    rows = np.flatnonzero(candidate)
    for series in data.values():
        rows = rows[_empty_cells(series.iloc[rows])]
        if not rows.size:
            break
    blank = np.zeros(len(item), dtype=bool)
    blank[rows] = True
    return blank


def _empty_cells(values: pd.Series) -> np.ndarray:
    if isinstance(values.dtype, pd.CategoricalDtype):
        codes = category_codes(values)
        empty_codes = np.flatnonzero(np.asarray(values.cat.categories == ""))
        return (codes < 0) | np.isin(codes, empty_codes)
    if values.dtype == object:
        return np.array(
            [
                v is None or v == "" or (isinstance(v, float) and np.isnan(v))
                for v in values.to_numpy()
            ],
            dtype=bool,
        )
    if isinstance(values.dtype, pd.StringDtype):
        out: np.ndarray = (values == "").to_numpy(dtype=bool, na_value=True)
    else:
        out = values.isna().to_numpy()
    return out
