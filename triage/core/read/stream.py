"""The streamed way: blocks of rows straight into the dense arrays, without the long frame.

For Parquet and CSV files, :func:`~triage.core.read.parquet.scan_parquet` and
:func:`~triage.core.read.delimited.scan_csv` open a :class:`StreamSource`, which hands over one
block of rows at a time (a Parquet row group, or a batch Arrow's multi-threaded CSV reader
parsed) as numpy arrays (text as integer codes). :func:`build_streamed` fills the portfolio's
dense arrays from it in passes over the blocks, so a million series never exist as 116 million
Python objects or as a long frame. The source applies the full reader's checks, on distinct
values where it can; anything the full reader would refuse, change or remark on, and any file
the build cannot vouch for (several lags, duplicate rows, an irregular calendar), raises
:class:`FastPathDeclined` instead, and the caller reads the file with
:func:`~triage.core.read.frame.load_frame`, which then gives its usual result or message.
See docs/performance.md.
"""

from __future__ import annotations

import collections
import concurrent.futures
import itertools
import os
import threading
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, cast

import numpy as np
import pandas as pd

from triage.core import schema
from triage.core.ledger import TEXT_MAX
from triage.core.metrics import history_measures, window_columns
from triage.core.portfolio import (
    BLOCK_ROWS,
    ColumnSpan,
    Portfolio,
    UnitPrices,
    calendar_from_uniques,
    calendar_problem,
    fill_prices,
    large_text,
    last_actual_column,
    last_filled,
    price_note,
    str_array,
    text_rank,
)
from triage.core.read.cells import (
    CONTROL_PATTERN,
    FIRST_DAY,
    LAG_MAX,
    LAST_DAY,
    LOOKALIKE_CANDIDATE,
    MAX_MAGNITUDE,
    SUSPECT_PATTERN,
    UNITS_PER_DAY,
    lookalike_keys,
    parse_periods,
)
from triage.core.settings import SEASON


def float_values(array: Any) -> np.ndarray:
    """An Arrow number array as float64 with NaN for nulls (``to_numpy`` is slow with nulls).

    Integers become float64 as ``Table.to_pandas`` converts them: rounded to nearest.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    if not pa.types.is_float64(array.type):
        array = pc.cast(array, pa.float64(), safe=False)
    if array.null_count:
        array = pc.fill_null(array, np.nan)
    out: np.ndarray = array.to_numpy(zero_copy_only=False)
    return out


class FastPathDeclined(Exception):
    """The streamed reader cannot vouch for a file; the full loader must read it.

    Raised for anything the full loader would refuse, change or remark on (empty or bad cells,
    control characters, ids stored as numbers, types it converts specially), so that the full
    loader gives its own message or result and both paths always agree.
    """


@dataclass
class _Dictionary:
    """A text column's distinct values across row groups, one global code each."""

    is_id: bool
    """Ids may not be blank and may not hold bidi controls; attributes may."""
    index: dict[str, int] = field(default_factory=dict)
    values: list[str] = field(default_factory=list)
    blank: list[bool] = field(default_factory=list)
    has_blank: bool = False
    lookalikes: dict[str, str] = field(default_factory=dict)
    """How ids that may look like others look (see :func:`lookalike_keys`) -> the first such id."""

    def codes(
        self, chunk: Any, positions: np.ndarray | None = None, out: np.ndarray | None = None
    ) -> np.ndarray:
        """Global codes of one chunk (dictionary-encoded or plain text).

        Args:
            chunk: An Arrow array of text, dictionary-encoded or not.
            positions: Only these rows (all rows when None).
            out: Where to write the codes (its integer type must hold them); int32 otherwise.
        """
        import pyarrow as pa

        if not pa.types.is_dictionary(chunk.type):
            chunk = chunk.dictionary_encode()
        if chunk.dictionary.null_count:
            raise FastPathDeclined("null dictionary value")
        local = chunk.dictionary.to_pylist()
        indices = chunk.indices
        if positions is not None:
            indices = indices.take(pa.array(positions))
        if indices.null_count:
            if self.is_id:
                raise FastPathDeclined("missing id")
            # A missing attribute is the empty string, as the full loader fills it.
            local.append("")
            indices = indices.fill_null(len(local) - 1)
        fresh = list(dict.fromkeys(v for v in local if v not in self.index))
        if fresh:
            self._add(fresh)
        dtype = np.int32 if out is None else out.dtype
        if len(self.values) > np.iinfo(dtype).max:
            raise FastPathDeclined("too many distinct values")
        lut = np.fromiter((self.index[v] for v in local), dtype=dtype, count=len(local))
        local_codes = indices.to_numpy(zero_copy_only=False)
        if len(lut) and int(lut[-1]) - int(lut[0]) == len(lut) - 1 and (np.diff(lut) == 1).all():
            # The dictionary in the order of the global codes (ids first met in this block, a
            # file sorted by key): one addition instead of a lookup per row.
            codes: np.ndarray = np.add(local_codes, lut[0], out=out, dtype=dtype, casting="unsafe")
        else:
            # Every index is in range (Arrow checked the dictionary); "clip" lets numpy write
            # into ``out`` directly instead of through a buffer, as "raise" does.
            codes = np.take(lut, local_codes, out=out, mode="clip")
        if self.is_id and self.has_blank and np.asarray(self.blank)[codes].any():
            raise FastPathDeclined("blank id")
        return codes

    def _add(self, fresh: list[str]) -> None:
        import pyarrow as pa
        import pyarrow.compute as pc

        array = pa.array(fresh, type=pa.string())
        # Checked once per distinct value, as the full loader checks categories.
        pattern = SUSPECT_PATTERN if self.is_id else CONTROL_PATTERN
        if pc.any(pc.match_substring_regex(array, pattern)).as_py():
            raise FastPathDeclined("control characters")
        blank = [False] * len(fresh)
        if self.is_id and pc.max(pc.utf8_length(array)).as_py() > TEXT_MAX:
            raise FastPathDeclined("id too long")
        if self.is_id:
            self._check_lookalikes(array, fresh)
        if self.is_id:
            # Both notions of white space (Python's and Arrow's): whichever the full loader
            # applies, an id this path keeps is one it keeps too.
            trimmed = pc.utf8_trim_whitespace(array).to_pylist()
            blank = [not v.strip() or not t for v, t in zip(fresh, trimmed, strict=True)]
            self.has_blank = self.has_blank or any(blank)
        for value in fresh:
            self.index[value] = len(self.values)
            self.values.append(value)
        self.blank.extend(blank)

    def _check_lookalikes(self, array: Any, fresh: list[str]) -> None:
        """Decline when an id looks like another one (the full loader words the notice)."""
        import pyarrow as pa
        import pyarrow.compute as pc

        candidate = pc.match_substring_regex(array, LOOKALIKE_CANDIDATE)
        plain = array
        if pc.any(candidate).as_py():
            originals = pc.filter(array, candidate).to_pylist()
            keys = lookalike_keys(pd.Series(originals, dtype=str)).tolist()
            others = set(fresh)
            for original, key in zip(originals, keys, strict=True):
                seen = self.lookalikes.setdefault(key, original)
                if seen != original or (key != original and (key in self.index or key in others)):
                    raise FastPathDeclined("look-alike ids")
            plain = pc.filter(array, pc.invert(candidate))
        if self.lookalikes and len(plain):
            known = pa.array(list(self.lookalikes), type=pa.string())
            if pc.any(pc.is_in(plain, value_set=known)).as_py():
                raise FastPathDeclined("look-alike ids")


@dataclass
class _Chunk:
    """One row group of a :class:`StreamSource`, converted."""

    start: int
    """File position (0-based) of its first row."""
    size: int
    columns: dict[str, np.ndarray] = field(default_factory=dict)
    selected: np.ndarray | None = None
    """Positions (inside the row group) at which the sparse columns were converted."""


@dataclass
class StreamSource:
    """A portfolio read one block of rows at a time and checked as the full loader checks it.

    A block is a Parquet row group (read from the file on demand) or, for CSV, a record batch
    Arrow has already parsed (``tables``). :meth:`chunks` yields canonical columns as numpy
    arrays: text as int32 codes into :meth:`values`, periods as int32 day numbers since
    1970-01-01, numbers as float64 with NaN for missing, lags as int64. A cell the full loader
    would refuse, change or remark on raises :class:`FastPathDeclined`; the caller then loads
    the file the full way.
    """

    path: Path
    file: Any
    """The open ``pyarrow.parquet.ParquetFile``, or None when the blocks are ``tables``."""
    columns: dict[str, str]
    """Canonical name (or attribute name) -> column name in the file."""
    attributes: tuple[str, ...]
    notices: tuple[str, ...]
    n_rows: int
    plain_text: list[str] = field(default_factory=list)
    """File columns of plain text, read dictionary-encoded."""
    tables: list[Any] | None = None
    """The blocks, already in memory (CSV), one ``pyarrow.Table`` each."""
    date_format: str | None = None
    """``--date-format``: periods arrive as text and are parsed per distinct text."""
    _dictionaries: dict[str, _Dictionary] = field(default_factory=dict)
    _period_days: dict[str, int] = field(default_factory=dict)
    """Day number of each distinct period text parsed so far (with ``date_format``)."""

    def values(self, name: str) -> list[str]:
        """The distinct values of text column ``name`` read so far, in code order."""
        return self._dictionaries[name].values

    def chunks(
        self,
        names: Sequence[str],
        *,
        sparse: Sequence[str] = (),
        select: Callable[[int, int], np.ndarray] | None = None,
        into: dict[str, np.ndarray] | None = None,
        last: bool = False,
    ) -> Iterator[_Chunk]:
        """Every non-empty row group's columns, in file order.

        Row groups are read ahead on worker threads (decoding releases the GIL, and two row
        groups decode side by side); converting them stays on the calling thread, in order.

        Args:
            names: Columns converted on every row.
            sparse: Text columns converted only on the rows ``select(first_row, n_rows)``
                returns (positions inside the row group), e.g. one row per series.
            select: Required with ``sparse``.
            into: For text columns among ``names``: whole-file arrays to write the codes into
                (``columns[name]`` is then a view of it).
            last: These columns are not read again: blocks held in memory (CSV) let go of
                them once converted.
        """
        import pyarrow as pa
        import pyarrow.parquet as pq

        wanted = [self.columns[n] for n in (*names, *sparse)]
        local = threading.local()

        def read(group: int) -> Any:
            if self.tables is not None:
                return self.tables[group].select(wanted)
            if not hasattr(local, "file"):
                # One reader per thread; the parsed footer is shared.
                local.file = pq.ParquetFile(
                    self.path, read_dictionary=self.plain_text, metadata=self.file.metadata
                )
            try:
                return local.file.read_row_group(group, columns=wanted, use_threads=False)
            except (pa.ArrowException, OSError) as exc:
                # Damaged pages: the full loader reads the file and words the error.
                raise FastPathDeclined("unreadable row group") from exc

        groups = range(len(self.tables) if self.tables is not None else self.file.num_row_groups)
        workers = max(1, min(2, os.cpu_count() or 1))
        offset = 0
        with concurrent.futures.ThreadPoolExecutor(max_workers=workers) as pool:
            ahead: collections.deque[concurrent.futures.Future[Any]] = collections.deque()
            upcoming = iter(groups)
            for group in itertools.islice(upcoming, workers + 1):
                ahead.append(pool.submit(read, group))
            done = 0
            while ahead:
                table = ahead.popleft().result()
                for group in itertools.islice(upcoming, 1):
                    ahead.append(pool.submit(read, group))
                size = table.num_rows
                if size:
                    yield self._chunk(table, offset, names, sparse, select, into)
                if last and self.tables is not None:
                    self.tables[done] = self.tables[done].drop_columns(wanted)
                done += 1
                offset += size
                del table
        if offset != self.n_rows:  # pragma: no cover - footer and data disagree
            raise FastPathDeclined("row count")

    def _chunk(
        self,
        table: Any,
        offset: int,
        names: Sequence[str],
        sparse: Sequence[str],
        select: Callable[[int, int], np.ndarray] | None,
        into: dict[str, np.ndarray] | None,
    ) -> _Chunk:
        size = table.num_rows
        out = _Chunk(offset, size)
        for name, column in zip(names, table.columns, strict=False):
            target = into.get(name) if into else None
            if target is not None:
                start = offset
                for piece in column.chunks:
                    view = target[start : start + len(piece)]
                    values = self._convert(name, piece, view)
                    if values is not view:
                        view[:] = values
                    start += len(piece)
                out.columns[name] = target[offset : offset + size]
                continue
            parts = [self._convert(name, piece) for piece in column.chunks]
            out.columns[name] = parts[0] if len(parts) == 1 else np.concatenate(parts)
        if sparse and select is not None:
            out.selected = select(offset, size)
            for name in sparse:
                # Whole row group as one array: positions count from its first row.
                whole = table.column(self.columns[name]).combine_chunks()
                out.columns[name] = self._dictionary(name).codes(whole, out.selected)
        return out

    def _dictionary(self, name: str) -> _Dictionary:
        return self._dictionaries.setdefault(
            name, _Dictionary(is_id=name in (schema.ITEM, schema.LOCATION))
        )

    def _convert(self, name: str, chunk: Any, out: np.ndarray | None = None) -> np.ndarray:
        import pyarrow as pa

        kind = chunk.type
        if name in (schema.ITEM, schema.LOCATION) or name in self.attributes:
            return self._dictionary(name).codes(chunk, out=out)
        if chunk.null_count and name in (schema.PERIOD, schema.LAG):
            raise FastPathDeclined(f"missing {name}")
        if name == schema.PERIOD:
            if pa.types.is_dictionary(kind):
                days = _text_days(self, chunk)
            elif pa.types.is_date32(kind):
                days = chunk.view(pa.int32()).to_numpy()
            else:
                per_day = UNITS_PER_DAY["ms" if pa.types.is_date64(kind) else kind.unit]
                whole, rest = np.divmod(chunk.view(pa.int64()).to_numpy(), per_day)
                if rest.any():
                    raise FastPathDeclined("time of day")
                if whole.min() < FIRST_DAY or whole.max() > LAST_DAY:
                    raise FastPathDeclined("year range")
                days = whole.astype(np.int32)
            if days.min() < FIRST_DAY or days.max() > LAST_DAY:
                raise FastPathDeclined("year range")
            return days
        if name == schema.LAG:
            lags = chunk.to_numpy()
            if lags.min() < 0 or lags.max() > LAG_MAX:
                raise FastPathDeclined("lag range")
            as_int64: np.ndarray = lags.astype(np.int64)
            return as_int64
        numbers = float_values(chunk)
        low, high = np.fmin.reduce(numbers), np.fmax.reduce(numbers)
        if not np.isnan(low) and not (low > -MAX_MAGNITUDE and high < MAX_MAGNITUDE):
            raise FastPathDeclined("not finite")
        if name == schema.PRICE and low < 0:
            raise FastPathDeclined("negative price")
        return numbers


def _text_days(source: StreamSource, chunk: Any) -> np.ndarray:
    """Day numbers (since 1970-01-01) of a block of period texts, parsed once per distinct text
    by :func:`parse_periods` with the source's date format; anything else declines."""
    local = chunk.dictionary.to_pylist()
    fresh = [v for v in dict.fromkeys(local) if v not in source._period_days]
    if fresh:
        parsed = parse_periods(pd.Series(fresh, dtype=str), source.date_format)
        stamps = parsed.to_numpy()
        if np.isnat(stamps).any():
            raise FastPathDeclined("period not in the date format")
        days = stamps.astype("datetime64[D]").astype(np.int64)
        if days.min() < FIRST_DAY or days.max() > LAST_DAY:
            raise FastPathDeclined("year range")
        source._period_days.update(zip(fresh, days.tolist(), strict=True))
    lut = np.fromiter((source._period_days[v] for v in local), dtype=np.int32, count=len(local))
    out: np.ndarray = np.take(lut, chunk.indices.to_numpy(zero_copy_only=False))
    return out


@dataclass
class _RowCells:
    """Each row's cell (``series * n_periods + column``), block by block (row groups).

    A block whose rows fill adjacent cells in order (a file sorted by key and period, every
    period present: the usual case) is kept as its first cell alone and placed by slices. A
    block whose rows mostly step forward by 1 to 255 cells (each series' periods in order, with
    gaps; the series in any order) keeps one byte per row, that step, plus the other steps in
    full. Other blocks keep one int32 cell per row. On a file sorted by series and period this
    frees most of the 4 bytes per row of the cell array (464 MB at a million series).
    """

    first: dict[int, int]
    """Block start row -> the cell of its first row, for blocks of adjacent cells."""
    steps: dict[int, tuple[int, np.ndarray, np.ndarray, np.ndarray]]
    """Block start row -> (its first row's cell, uint8 step from each row's cell to the next,
    and where a step does not fit a byte: its int32 positions and steps)."""
    cells: dict[int, np.ndarray]
    """Block start row -> each row's cell (int32), for the other blocks."""
    _recent: tuple[int, np.ndarray] = (-1, np.empty(0, dtype=np.int32))
    """The last block's cells (int32), rebuilt from its steps or as kept."""
    _recent_index: tuple[int, np.ndarray] = (-1, np.empty(0, dtype=np.intp))
    """The last block's cells as intp (numpy converts an int32 index on every use)."""

    @classmethod
    def of(cls, cell: np.ndarray, blocks: Sequence[tuple[int, int]]) -> _RowCells:
        """From the whole file's cell array and its blocks' (start row, rows)."""
        first: dict[int, int] = {}
        steps: dict[int, tuple[int, np.ndarray, np.ndarray, np.ndarray]] = {}
        others: list[tuple[int, int]] = []
        for start, size in blocks:
            block = cell[start : start + size]
            step = np.diff(block)
            if int(block[-1]) - int(block[0]) == size - 1 and (step == 1).all():
                first[start] = int(block[0])
                continue
            wide = np.flatnonzero((step < 1) | (step > np.iinfo(np.uint8).max)).astype(np.int32)
            if len(wide) * 16 <= size:
                # A byte per row and 8 bytes per wide step: well under 4 bytes per row.
                narrow = step.astype(np.uint8)
                narrow[wide] = 0
                steps[start] = (int(block[0]), narrow, wide, step[wide])
            else:
                others.append((start, size))
        # Copies only when they free the whole array, views (of the kept array) otherwise.
        copy = sum(size for _, size in others) * 2 < len(cell)
        cells = {
            start: cell[start : start + size].copy() if copy else cell[start : start + size]
            for start, size in others
        }
        return cls(first, steps, cells)

    def _cells32(self, start: int) -> np.ndarray:
        """The cells of the block starting at row ``start`` (int32; not for ``first`` blocks)."""
        if self._recent[0] != start:
            stepped = self.steps.get(start)
            if stepped is None:
                self._recent = (start, self.cells[start])
            else:
                head, narrow, wide, wide_steps = stepped
                step = narrow.astype(np.int32)
                step[wide] = wide_steps
                cells = np.empty(len(step) + 1, dtype=np.int32)
                cells[0] = head
                # The running sum stays in int32: it is a cell minus the first one.
                np.cumsum(step, out=cells[1:])
                cells[1:] += head
                self._recent = (start, cells)
        return self._recent[1]

    def _cells(self, start: int) -> np.ndarray:
        if self._recent_index[0] != start:
            self._recent_index = (start, self._cells32(start).astype(np.intp))
        return self._recent_index[1]

    def scatter(
        self,
        flat: np.ndarray,
        start: int,
        values: np.ndarray,
        n_periods: int = 0,
        span_start: int = 0,
        width: int = 0,
    ) -> tuple[bool, bool]:
        """Place the values of the block starting at row ``start`` into ``flat``.

        ``flat`` is the series x period matrix, flattened; with ``width`` (and ``n_periods``)
        it holds only the columns ``span_start`` to ``span_start + width - 1`` of each series,
        and the values of the other columns are left out. Returns whether any value left out
        was not NaN, (before the kept columns, after them).
        """
        narrow = bool(width) and width != n_periods
        head = self.first.get(start)
        if head is not None and not narrow:
            flat[head : head + len(values)] = values
            return False, False
        if head is not None:
            # Lay the block out as whole series rows, then copy the kept columns. The rows at
            # its two ends are shared with the neighbouring blocks: only this block's cells
            # (not NaN in the layout) are copied. A NaN value skipped is NaN in ``flat`` too:
            # each cell comes from exactly one row.
            lo, hi = head // n_periods, (head + len(values) - 1) // n_periods + 1
            layout = np.full((hi - lo) * n_periods, np.nan)
            offset = head - lo * n_periods
            layout[offset : offset + len(values)] = values
            rows = layout.reshape(hi - lo, n_periods)
            part = rows[:, span_start : span_start + width]
            target = flat.reshape(-1, width)[lo:hi]
            np.copyto(target, part, where=~np.isnan(part))
            return (
                bool((~np.isnan(rows[:, :span_start])).any()),
                bool((~np.isnan(rows[:, span_start + width :])).any()),
            )
        if not narrow:
            flat[self._cells(start)] = values
            return False, False
        # In int32, as the cells are stored: numpy's int32 division is three times its int64's.
        cells = self._cells32(start)
        series = cells // np.int32(n_periods)
        column = cells - series * np.int32(n_periods)
        column -= np.int32(span_start)
        # One unsigned comparison keeps 0 <= column < width (a negative column wraps past it).
        inside = np.flatnonzero(column.view(np.uint32) < width)
        target = series[inside].astype(np.intp)
        target *= width
        target += column[inside]
        flat[target] = values[inside]
        given = ~np.isnan(values)
        return bool((given & (column < 0)).any()), bool((given & (column >= width)).any())

    def series(self, start: int, positions: np.ndarray, n_periods: int) -> np.ndarray:
        """The series of the rows at ``positions`` in the block starting at row ``start``."""
        head = self.first.get(start)
        if head is not None:
            found: np.ndarray = (head + positions) // n_periods
            return found
        out: np.ndarray = self._cells32(start)[positions] // np.int32(n_periods)
        return out

    def rows_at(self, wanted: np.ndarray, n_periods: int) -> Callable[[int, int], np.ndarray]:
        """For ``StreamSource.chunks``: positions, in a block, of the rows in cells ``wanted``
        (one per series, in series order: ``wanted[s]`` is a cell of series ``s``)."""

        def select(start: int, size: int) -> np.ndarray:
            head = self.first.get(start)
            if head is not None:
                lo, hi = np.searchsorted(wanted, [head, head + size])
                return wanted[lo:hi] - head
            cells = self._cells32(start)
            return np.flatnonzero(cells == wanted[cells // np.int32(n_periods)])

        return select


def build_streamed(
    source: StreamSource,
    lag: int | None,
    scored_window: int | None = None,
    season: int = SEASON.default,
) -> Portfolio:
    """Build from a Parquet or CSV file in passes over its blocks, without the long frame.

    Pass 1 reads the keys and periods and numbers every row's cell; the next passes read the
    prices, the demand and attributes, then the forecasts, and place them in their cells. Only
    files with one row per (series, period) and one history lag take this way; for anything
    else :class:`FastPathDeclined` sends the file to the full loader, which gives the same
    result or the same error.

    With ``scored_window`` (``triage rank`` and ``compare``), the forecasts are kept only from
    the first column of that scoring window to the latest actual, and the demand from
    ``season`` columns before it (:class:`ColumnSpan`): the only columns scoring reads, with
    the naive baselines of lag 1 and ``season``. The history measures, which read every
    period's demand, are taken on a worker thread during the forecast pass
    (``Portfolio.history``), from a demand held as float32 while every value fits exactly.
    """
    n_rows = source.n_rows
    has_location = schema.LOCATION in source.columns
    has_lag = schema.LAG in source.columns
    has_price = schema.PRICE in source.columns
    key_columns = (schema.ITEM, schema.LOCATION) if has_location else (schema.ITEM,)
    small = np.iinfo(np.int16)
    if lag is not None and not has_lag:
        raise FastPathDeclined("--lag without a lag column")

    # Pass 1: keys and periods. Day numbers are kept as int16 offsets from the first row's.
    item = np.empty(n_rows, dtype=np.int32)
    loc = np.empty(n_rows if has_location else 0, dtype=np.int16)
    day = np.empty(n_rows, dtype=np.int16)
    base: int | None = None
    days_seen: set[int] = set()
    lag_first_day: dict[int, int] = {}
    names = [*key_columns, schema.PERIOD, *([schema.LAG] if has_lag else [])]
    into: dict[str, np.ndarray] = {schema.ITEM: item, schema.LOCATION: loc}
    blocks: list[tuple[int, int]] = []
    for chunk in source.chunks(names, into=into, last=True):
        start, stop = chunk.start, chunk.start + chunk.size
        blocks.append((start, chunk.size))
        days = chunk.columns[schema.PERIOD]
        low, high = int(days.min()), int(days.max())
        base = low if base is None else base
        if low - base < small.min or high - base > small.max:
            raise FastPathDeclined("periods too far apart")
        np.subtract(days, base, out=day[start:stop], casting="unsafe")
        days_seen.update((np.flatnonzero(np.bincount(days - low)) + low).tolist())
        if has_lag:
            row_lags = chunk.columns[schema.LAG]
            if row_lags.max() >= 1 << 16:
                raise FastPathDeclined("large lags")
            first = np.full(int(row_lags.max()) + 1, np.iinfo(np.int32).max, dtype=np.int32)
            np.minimum.at(first, row_lags, days)
            for value in np.flatnonzero(first < np.iinfo(np.int32).max).tolist():
                lag_first_day[value] = min(
                    lag_first_day.get(value, first[value]), int(first[value])
                )
    assert base is not None  # the file has rows
    del into, chunk  # they hold the code arrays, which are freed as soon as they are used

    # Series numbers: every (item, location) pair in use, in key order. Only the pairs are
    # sorted; the rows pass twice (pair code, then cell) and are updated in place.
    item_text = np.array(source.values(schema.ITEM), dtype=object)
    loc_text = np.array(source.values(schema.LOCATION) if has_location else [""], dtype=object)
    n_loc = len(loc_text)
    if len(item_text) * n_loc >= np.iinfo(np.int32).max:
        raise FastPathDeclined("too many key pairs")
    pair = item
    used = np.zeros(len(item_text) * n_loc, dtype=bool)
    for lo in range(0, n_rows, BLOCK_ROWS):
        block = pair[lo : lo + BLOCK_ROWS]
        if has_location:
            block *= n_loc
            block += loc[lo : lo + BLOCK_ROWS]
        used[block] = True
    del loc, item
    pairs = np.flatnonzero(used)
    del used
    item_rank = text_rank(item_text)
    loc_rank = text_rank(loc_text)
    pairs = pairs[np.lexsort((loc_rank[pairs % n_loc], item_rank[pairs // n_loc]))]
    n_series = len(pairs)
    text_codes = {schema.ITEM: (item_text, (pairs // n_loc).astype(np.int32))}
    if has_location:
        text_codes[schema.LOCATION] = (loc_text, (pairs % n_loc).astype(np.int32))
    keys_unique = pd.DataFrame({k: str_array(*v) for k, v in text_codes.items()})

    uniques = np.array(sorted(days_seen), dtype=np.int64)
    found = calendar_from_uniques(
        pd.DatetimeIndex(uniques.astype("datetime64[D]").astype("datetime64[ns]"))
    )
    if found is None:
        raise FastPathDeclined("irregular calendar")
    calendar, unique_codes = found
    if calendar_problem(calendar, unique_codes, n_rows, n_series) is not None:
        raise FastPathDeclined("calendar")
    n_periods = len(calendar.periods)
    if n_series * n_periods >= np.iinfo(np.int32).max or n_periods > small.max:
        raise FastPathDeclined("too many cells")
    # Row -> cell in one pass through two lookup tables: pair -> first cell of its series,
    # day offset -> calendar column. The cells overwrite the pair codes.
    first_cell = np.zeros(len(item_text) * n_loc, dtype=np.int32)
    first_cell[pairs] = np.arange(n_series, dtype=np.int32) * n_periods
    shift = int(uniques[0]) - base
    column_of_day = np.full(int(uniques[-1] - uniques[0]) + 1, -1, dtype=np.int32)
    column_of_day[uniques - uniques[0]] = unique_codes
    cell = pair
    filled = np.zeros(n_series * n_periods, dtype=bool)
    for lo in range(0, n_rows, BLOCK_ROWS):
        block = cell[lo : lo + BLOCK_ROWS]
        offsets = day[lo : lo + BLOCK_ROWS].astype(np.int32)
        offsets -= shift
        np.take(first_cell, block, out=block, mode="clip")
        block += column_of_day[offsets]
        filled[block] = True
    del day, pair, first_cell, pairs, block, offsets  # the views too: they hold whole arrays
    if np.count_nonzero(filled) != n_rows:
        raise FastPathDeclined("several rows for one series and period")
    # Attributes come from each series' latest row: its cell, found from the bitmap.
    latest_cell = None
    if source.attributes:
        latest = last_filled(filled.reshape(n_series, n_periods))
        latest += np.arange(n_series, dtype=np.int64) * n_periods
        latest_cell = latest.astype(np.int32)  # as the cells are (fewer than 2**31 of them)
        del latest
    del filled
    placed = _RowCells.of(cell, blocks)
    del cell
    select = placed.rows_at(latest_cell, n_periods) if latest_cell is not None else None
    # The dense arrays are allocated and NaN-filled on a worker thread while this one reads the
    # next pass's first row groups: first touching a GB of memory is mostly kernel time, which
    # the other core can take. Not while the cells are packed: the row arrays would be held at
    # the same time. Scoring only, the forecasts are allocated once the window is known (much
    # smaller), and the demand is held as float32 while every value fits exactly (half the
    # memory); the prices, when there are any, take float64 memory first.
    n_whole = 2 if scored_window is None else 1
    held = np.dtype(np.float32 if scored_window is not None else np.float64)
    allocated = np.dtype(np.float64) if has_price else held
    allocating = concurrent.futures.ThreadPoolExecutor(max_workers=1)
    dense_job = allocating.submit(
        lambda: [np.full(n_series * n_periods, np.nan, dtype=allocated) for _ in range(n_whole)]
    )
    allocating.shutdown(wait=False)
    dense: list[np.ndarray] = []
    demand = np.empty(0, dtype=allocated)

    def take_dense(chunks: Iterator[_Chunk]) -> Iterator[_Chunk]:
        """``chunks``, the first few read while the dense arrays are made, then awaited."""
        nonlocal dense, demand
        early = list(_read_while(dense_job, chunks))
        dense = dense_job.result()
        demand = dense.pop(0)
        yield from early
        yield from chunks

    # Pass 2: prices first, into the demand matrix's memory: the dense price matrix lives only
    # until it is compressed (most series have one price throughout).
    price = None
    missing_prices = 0
    if has_price:
        for chunk in take_dense(source.chunks([schema.PRICE], last=True)):
            values = chunk.columns[schema.PRICE]
            placed.scatter(demand, chunk.start, values)
            missing_prices += int(np.count_nonzero(np.isnan(values)))
        prices = demand.reshape(n_series, n_periods)
        if fill_prices(prices).size:
            raise FastPathDeclined("series without a price")
        price = UnitPrices.from_dense(prices)
        del prices
        if demand.dtype == held:
            demand.fill(np.nan)
        else:  # the prices' float64 memory goes before the float32 demand's is taken
            demand = np.empty(0)
            demand = np.full(n_series * n_periods, np.nan, dtype=held)

    # Pass 3: demand and attributes.
    attribute_codes = {name: np.full(n_series, -1, dtype=np.int32) for name in source.attributes}
    demand_chunks = source.chunks(
        [schema.DEMAND], sparse=source.attributes, select=select, last=True
    )
    for chunk in demand_chunks if has_price else take_dense(demand_chunks):
        values = chunk.columns[schema.DEMAND]
        if demand.dtype == np.float32:
            exact = _float32_if_exact(values)
            if exact is None:
                demand = demand.astype(np.float64)  # every value placed so far was exact
            else:
                values = exact
        placed.scatter(demand, chunk.start, values)
        if chunk.selected is not None:
            owners = placed.series(chunk.start, chunk.selected, n_periods)
            for name, codes in attribute_codes.items():
                codes[owners] = chunk.columns[name]
    del select
    demand_grid = demand.reshape(n_series, n_periods)
    last_actual = last_actual_column(demand_grid)
    if last_actual < 0:
        raise FastPathDeclined("no actual demand")

    chosen = None
    lags: tuple[int, ...] = ()
    if has_lag:
        lags = tuple(
            sorted(
                v
                for v, first in lag_first_day.items()
                if column_of_day[first - int(uniques[0])] <= last_actual
            )
        )
        if len(lags) != 1 or (lag is not None and lag not in lags):
            raise FastPathDeclined("lag choice")
        chosen = lags[0]

    # Pass 4: the forecast and competing forecasts (forecast_<name>), over the columns kept.
    # Scoring only, the history measures are taken meanwhile on a worker thread.
    span_start = 0
    history_job = None
    if scored_window is not None:
        span_start = int(window_columns(demand_grid, last_actual, scored_window)[0])
        measuring = concurrent.futures.ThreadPoolExecutor(max_workers=1)
        history_job = measuring.submit(history_measures, demand_grid[:, : last_actual + 1], season)
        measuring.shutdown(wait=False)
    width = n_periods if scored_window is None else last_actual + 1 - span_start
    forecast = dense.pop() if scored_window is None else np.full(n_series * width, np.nan)
    del dense
    rivals = [name for name in source.columns if schema.competing_name(name) is not None]
    competing = {name: np.full(n_series * width, np.nan) for name in rivals}
    # Whether each forecast has values before the kept columns and after them (ColumnSpan).
    outside = {name: [False, False] for name in [schema.FORECAST, *rivals]}
    for chunk in source.chunks([schema.FORECAST, *rivals], last=True):
        for name, flat in ((schema.FORECAST, forecast), *competing.items()):
            before, after = placed.scatter(
                flat, chunk.start, chunk.columns[name], n_periods, span_start, width
            )
            outside[name][0] |= before
            outside[name][1] |= after
    del placed
    history = None
    if history_job is not None:
        history = history_job.result()
        del history_job
        # The demand from `season` columns before the window (its naive baselines) on.
        keep_from = max(span_start - season, 0)
        demand_grid = cast(
            np.ndarray,
            ColumnSpan(
                demand_grid[:, keep_from : last_actual + 1].astype(np.float64),
                keep_from,
                n_periods,
                values_before=_any_value(demand_grid, keep_from),
            ),
        )
        del demand

    def kept(flat: np.ndarray, name: str) -> np.ndarray:
        grid = flat.reshape(n_series, width)
        if scored_window is None:
            return grid
        # Reads like the whole matrix inside the kept columns (see ColumnSpan).
        before, after = outside[name]
        span = ColumnSpan(grid, span_start, n_periods, values_before=before, values_after=after)
        return cast(np.ndarray, span)

    notices = list(source.notices)
    if missing_prices:
        notices.append(price_note(missing_prices))

    keys = keys_unique
    for name, codes in attribute_codes.items():
        text_codes[name] = (np.array(source.values(name), dtype=object), codes)
        keys[name] = str_array(*text_codes[name])
    return Portfolio(
        path=source.path,
        keys=keys,
        key_columns=key_columns,
        attributes=source.attributes,
        calendar=calendar,
        demand=demand_grid,
        forecast=kept(forecast, schema.FORECAST),
        price=price,
        last_actual=last_actual,
        lag=chosen,
        lags=lags,
        rows=n_rows,
        notices=tuple(notices),
        competing={
            name[len(schema.COMPETING_PREFIX) :]: kept(flat, name)
            for name, flat in competing.items()
        },
        _text_codes={
            k: (keys, codes, large_text(values)) for k, (values, codes) in text_codes.items()
        },
        history=history,
    )


#: Row groups read at most while the dense arrays are made, before waiting for them.
READ_WHILE_ALLOCATING = 8


def _read_while(job: concurrent.futures.Future[Any], chunks: Iterator[_Chunk]) -> Iterator[_Chunk]:
    """The first of ``chunks``, read until ``job`` is done (one at least, at most
    ``READ_WHILE_ALLOCATING``)."""
    for count, chunk in enumerate(chunks, start=1):
        yield chunk
        if job.done() or count == READ_WHILE_ALLOCATING:
            return


def _float32_if_exact(values: np.ndarray) -> np.ndarray | None:
    """``values`` (float64) as float32 when every one converts back to the same bits, else None.

    A sufficient test: a NaN whose payload float32 cannot keep says None, which only costs the
    narrowing, never a changed value.
    """
    with np.errstate(over="ignore"):  # out of float32's range: infinity, which comes back wrong
        narrow = values.astype(np.float32)
    back = narrow.astype(np.float64)
    return narrow if np.array_equal(back.view(np.int64), values.view(np.int64)) else None


def _any_value(grid: np.ndarray, stop: int) -> bool:
    """Whether any cell of ``grid``'s columns before ``stop`` holds a value (not NaN)."""
    if stop == 0:
        return False
    for lo in range(0, grid.shape[0], BLOCK_ROWS):
        if not np.isnan(grid[lo : lo + BLOCK_ROWS, :stop]).all():
            return True
    return False
