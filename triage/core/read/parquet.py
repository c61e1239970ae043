"""Parquet files: the full read into columns (:func:`read_parquet`) and the streamed scan.

:func:`scan_parquet` reads only the footer and schema; the row groups are read on demand by the
streamed build (``triage.core.read.stream``). Column types the streamed reader cannot convert
exactly as the full reader would send the file to the full reader.
"""

from __future__ import annotations

import bisect
import re
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from triage.core import schema
from triage.core.dialect import FileOptions
from triage.core.portfolio import DAY_NS
from triage.core.read.cells import FIRST_DAY, LAST_DAY
from triage.core.read.columns import (
    RawColumns,
    SeriesPick,
    checked_mapping,
    checked_options,
    column_label,
    file_kind,
    plan_columns,
)
from triage.core.read.memory import check_memory, competing_columns
from triage.core.read.messages import fail
from triage.core.read.stream import FastPathDeclined, StreamSource, float_values


def read_parquet(
    path: Path, mapping: dict[str, str], notices: list[str], pick: SeriesPick | None = None
) -> RawColumns:
    """The file's columns as read, before the cells are checked.

    ``pick``: read only the row groups whose item statistics may hold those series (every row
    group when the item column is not text or has no statistics); the rows keep their row
    numbers in the file (``RawColumns.file_rows``). The caller keeps the picked series' rows
    once the cells are checked.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        metadata = pq.read_metadata(path)
        arrow_schema = metadata.schema.to_arrow_schema()
    except (pa.ArrowException, OSError) as exc:
        fail(
            path,
            f"cannot read this as a Parquet file ({exc}).",
            "Check that the file is Parquet and not damaged; export it again if needed.",
        )
    if pick is None:
        check_memory(
            path, metadata.num_rows, "parquet", competing_columns(arrow_schema.names, mapping)
        )
    # pandas stores an unnamed index as '__index_level_N__'; it is not data.
    keep = [
        i for i, f in enumerate(arrow_schema) if not re.fullmatch(r"__index_level_\d+__", f.name)
    ]
    fields = [arrow_schema.field(i) for i in keep]
    plan = plan_columns(path, [f.name for f in fields], mapping, notices)
    for position, fld in enumerate(fields):
        kind = fld.type
        if pa.types.is_nested(kind) or pa.types.is_binary(kind) or pa.types.is_large_binary(kind):
            fail(
                path,
                f"column {column_label(plan, position)} holds {kind} values, not text, numbers "
                "or dates.",
                "Write the column as text, numbers or dates.",
            )
    text_roles = {schema.ITEM, schema.LOCATION, schema.PERIOD, schema.LAG, None}
    dictionary = [
        fld.name
        for position, fld in enumerate(fields)
        if plan.roles[position] in text_roles
        and (pa.types.is_string(fld.type) or pa.types.is_large_string(fld.type))
    ]
    file_rows: np.ndarray | None = None
    try:
        if pick is None:
            table = pq.read_table(
                path, columns=[f.name for f in fields], read_dictionary=dictionary
            )
        else:
            item = fields[plan.roles.index(schema.ITEM)].name
            groups = _groups_holding(metadata, item, pick.items)
            table = pq.ParquetFile(path, read_dictionary=dictionary).read_row_groups(
                groups, columns=[f.name for f in fields]
            )
            file_rows = _group_rows(metadata, groups)
            # Only the rows of the picked items go on to be checked and converted.
            keep = _item_rows(table.column(item), pick.items)
            if keep is not None:
                table = table.filter(keep)
                file_rows = file_rows[keep.to_numpy(zero_copy_only=False)]
    except (pa.ArrowException, OSError) as exc:
        fail(
            path,
            f"cannot read the Parquet data ({exc}).",
            "Check that the file is not damaged; export it again if needed.",
        )
    for position, fld in enumerate(table.schema):
        if pa.types.is_decimal(fld.type):
            table = table.set_column(position, fld.name, table.column(position).cast(pa.float64()))
    table = table.rename_columns([f"c{i}" for i in range(len(fields))])
    data: dict[int, pd.Series] = {}
    for position in range(len(fields)):
        # Column by column, releasing each Arrow column once converted: the peak holds one
        # column twice, not the whole table.
        data[position] = _arrow_to_series(table.column(0))
        table = table.remove_column(0)
    return RawColumns(plan, data, first_row=1, file_rows=file_rows, blank_rows_possible=False)


def _groups_holding(metadata: Any, column: str, items: list[str]) -> list[int]:
    """The row groups whose ``column`` statistics may hold one of ``items``
    (:func:`groups_holding` of :func:`_item_ranges`)."""
    return groups_holding(_item_ranges(metadata, column), items)


def groups_holding(ranges: Sequence[tuple[str, str] | None], items: Sequence[str]) -> list[int]:
    """The row groups that may hold one of ``items``, given each group's item (min, max):
    every group without text statistics (None), else those whose [min, max] holds an item.

    Parquet orders text statistics by their UTF-8 bytes, which is Python's order of ``str``; a
    writer that shortens long statistics keeps the minimum below and the maximum above every
    value, so no row group holding an item is left out.
    """
    wanted = sorted(items)
    keep = []
    for group, bounds in enumerate(ranges):
        if bounds is None:
            keep.append(group)
            continue
        first = bisect.bisect_left(wanted, bounds[0])
        if first < len(wanted) and wanted[first] <= bounds[1]:
            keep.append(group)
    return keep


def _item_ranges(metadata: Any, column: str) -> tuple[tuple[str, str] | None, ...]:
    """Each row group's (min, max) of ``column`` as written, None where the statistics are
    missing or not text (every group when the file has no such column)."""
    names = metadata.schema.names
    if column not in names:
        return tuple(None for _ in range(int(metadata.num_row_groups)))
    at = names.index(column)
    found: list[tuple[str, str] | None] = []
    for group in range(metadata.num_row_groups):
        low = high = None
        try:
            stats = metadata.row_group(group).column(at).statistics
            if stats is not None and stats.has_min_max:
                low, high = stats.min, stats.max
        except (UnicodeDecodeError, ValueError, TypeError):
            pass  # statistics that are not text as written: the row group is read
        text = isinstance(low, str) and isinstance(high, str)
        found.append((low, high) if text else None)  # type: ignore[arg-type]
    return tuple(found)


def item_ranges(path: Path, mapping: dict[str, str]) -> tuple[tuple[str, str] | None, ...]:
    """Each row group's item (min, max) from the file's footer alone (``mapping``: the
    ``--columns`` map): what a dataset's parts are chosen by before any is opened to fetch a
    few series (``dataset.fetch_series``).

    Raises:
        LoadError: The file is not Parquet, or its columns cannot be read as a portfolio's.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        metadata = pq.read_metadata(path)
        names = metadata.schema.to_arrow_schema().names
    except (pa.ArrowException, OSError) as exc:
        fail(
            path,
            f"cannot read this as a Parquet file ({exc}).",
            "Check that the file is Parquet and not damaged; export it again if needed.",
        )
    # As read_parquet reads them: pandas' unnamed index columns are not data.
    data = [n for n in names if not re.fullmatch(r"__index_level_\d+__", n)]
    plan = plan_columns(path, data, mapping, [])
    return _item_ranges(metadata, data[plan.roles.index(schema.ITEM)])


def _item_rows(column: Any, items: list[str]) -> Any:
    """A boolean Arrow mask of the rows whose item is one of ``items``, or None when the column
    is not text (ids stored as numbers are matched once converted, as every read converts them).

    A dictionary column is matched on its dictionary, then taken by its indices."""
    import pyarrow as pa
    import pyarrow.compute as pc

    wanted = pa.array(items, type=pa.string())
    masks = []
    for chunk in column.chunks:
        kind = chunk.type
        if pa.types.is_dictionary(kind) and _is_text(kind.value_type):
            found = pc.is_in(chunk.dictionary.cast(pa.string()), value_set=wanted)
            masks.append(pc.fill_null(pc.take(found, chunk.indices), False))
        elif _is_text(kind):
            masks.append(pc.fill_null(pc.is_in(chunk.cast(pa.string()), value_set=wanted), False))
        else:
            return None
    if not masks:
        return pa.array([], type=pa.bool_())
    return pa.concat_arrays(masks)


def _is_text(kind: Any) -> bool:
    import pyarrow as pa

    return bool(pa.types.is_string(kind) or pa.types.is_large_string(kind))


def _group_rows(metadata: Any, groups: list[int]) -> np.ndarray:
    """The file row numbers (1 = the first data row) of the rows of ``groups``, in order."""
    starts = np.cumsum(
        [0] + [metadata.row_group(g).num_rows for g in range(metadata.num_row_groups)]
    )
    pieces = [np.arange(starts[g], starts[g + 1], dtype=np.int64) for g in groups]
    return (np.concatenate(pieces) if pieces else np.empty(0, dtype=np.int64)) + 1


def _arrow_to_series(column: Any) -> pd.Series:
    """One Arrow column as the Series ``Table.to_pandas`` gives, without its detours.

    Dictionary columns become categoricals straight from the unified dictionary's indices (no
    per-row strings); dates in the accepted years become ``datetime64[ns]`` by one integer
    multiplication. Everything else, and every case the checks must see as read (dates outside
    the accepted years, null dictionary values), goes through ``to_pandas``.
    """
    import pyarrow as pa

    kind = column.type
    if (
        pa.types.is_dictionary(kind)
        and (pa.types.is_string(kind.value_type) or pa.types.is_large_string(kind.value_type))
        and column.num_chunks
    ):
        column = column.unify_dictionaries()
        dictionary = column.chunk(0).dictionary
        categories = pd.Index(dictionary.to_pylist(), dtype=str)
        if not dictionary.null_count and categories.is_unique:
            codes = np.empty(len(column), dtype=_code_dtype(len(categories)))
            start = 0
            for chunk in column.chunks:
                stop = start + len(chunk)
                codes[start:stop] = chunk.indices.fill_null(-1).to_numpy(zero_copy_only=False)
                start = stop
            dtype = pd.CategoricalDtype(categories)
            return pd.Series(pd.Categorical.from_codes(codes, dtype=dtype, validate=False))
    if pa.types.is_date32(kind) and column.null_count == 0 and len(column):
        stamps = np.empty(len(column), dtype=np.int64)
        start = 0
        for chunk in column.chunks:
            stop = start + len(chunk)
            stamps[start:stop] = chunk.view(pa.int32()).to_numpy()
            start = stop
        # Outside the accepted years the product could overflow: let the checks see the dates.
        if stamps.min() >= FIRST_DAY and stamps.max() <= LAST_DAY:
            stamps *= DAY_NS
            return pd.Series(stamps.view("datetime64[ns]"), copy=False)
    if pa.types.is_float64(kind) and column.null_count:
        values = np.empty(len(column), dtype=np.float64)
        start = 0
        for chunk in column.chunks:
            stop = start + len(chunk)
            values[start:stop] = float_values(chunk)
            start = stop
        return pd.Series(values, copy=False)
    return column.to_pandas(date_as_object=False, ignore_metadata=True)


def _code_dtype(size: int) -> type[np.signedinteger[Any]]:
    """The smallest signed integer type that holds codes 0..size-1 and -1 for missing."""
    for dtype in (np.int8, np.int16, np.int32):
        if size <= np.iinfo(dtype).max:
            return dtype
    return np.int64


def scan_parquet(
    path: str | Path,
    *,
    columns: dict[str, str] | None = None,
    options: FileOptions | None = None,
) -> StreamSource:
    """Open a Parquet portfolio for the streamed reader (reads the footer and schema only).

    ``options`` matter for text cells only (a decimal mark, a date format), and columns of
    text where numbers or dates belong decline this path: the full loader reads them.

    Raises:
        LoadError: The errors :func:`load_frame` raises before it reads any cell (file type,
            ``--columns``, column names), with the same messages.
        FastPathDeclined: The file needs the full loader.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    file_path = Path(path)
    kind = file_kind(file_path)
    checked_options(file_path, kind, options)
    if kind != "parquet":
        raise FastPathDeclined("not parquet")
    mapping = checked_mapping(file_path, columns)
    try:
        arrow_schema = pq.read_schema(file_path)
    except (pa.ArrowException, OSError) as exc:
        raise FastPathDeclined("unreadable") from exc
    fields = [f for f in arrow_schema if not re.fullmatch(r"__index_level_\d+__", f.name)]
    for fld in fields:
        kind = fld.type
        if pa.types.is_nested(kind) or pa.types.is_binary(kind) or pa.types.is_large_binary(kind):
            raise FastPathDeclined("nested or binary column")
    notices: list[str] = []
    plan = plan_columns(file_path, [f.name for f in fields], mapping, notices)
    if plan.unnamed:
        raise FastPathDeclined("unnamed column")
    names: dict[str, str] = {}
    plain_text: list[str] = []
    for position, fld in enumerate(fields):
        role = plan.roles[position]
        name = role if role is not None else plan.attributes.get(position)
        if name is None:
            continue
        # Column selection treats dots as paths into nested columns.
        if "." in fld.name or not _streamable(role, fld.type):
            raise FastPathDeclined(f"column {fld.name!r} of type {fld.type}")
        names[name] = fld.name
        if role in (schema.ITEM, schema.LOCATION, None) and not pa.types.is_dictionary(fld.type):
            plain_text.append(fld.name)
    try:
        # Plain text columns come back dictionary-encoded: no Python string per row.
        file = pq.ParquetFile(file_path, read_dictionary=plain_text)
    except (pa.ArrowException, OSError) as exc:
        raise FastPathDeclined("unreadable") from exc
    if file.metadata.num_rows == 0:
        raise FastPathDeclined("no rows")
    check_memory(
        file_path,
        file.metadata.num_rows,
        "parquet-streamed",
        sum(schema.competing_name(name) is not None for name in names),
    )
    return StreamSource(
        path=file_path,
        file=file,
        columns=names,
        attributes=tuple(plan.attributes.values()),
        notices=tuple(notices),
        n_rows=file.metadata.num_rows,
        plain_text=plain_text,
    )


def _streamable(role: str | None, kind: Any) -> bool:
    """Column types the streamed reader converts exactly as the full loader would."""
    import pyarrow as pa

    def text(t: Any) -> bool:
        return bool(pa.types.is_string(t) or pa.types.is_large_string(t))

    if role in (schema.ITEM, schema.LOCATION, None):
        return text(kind) or (pa.types.is_dictionary(kind) and text(kind.value_type))
    if role == schema.PERIOD:
        return (
            pa.types.is_date32(kind)
            or pa.types.is_date64(kind)
            or (pa.types.is_timestamp(kind) and kind.tz is None)
        )
    if role == schema.LAG:
        return bool(pa.types.is_integer(kind))
    return bool(pa.types.is_floating(kind) or pa.types.is_integer(kind))
