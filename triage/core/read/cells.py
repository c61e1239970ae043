"""Cell validation: ids, attributes, periods, numbers and lags, vectorised per column.

Each ``checked_*`` function takes one column as read (text, categories, typed Parquet values or
xlsx cells) and returns it with its canonical type, or refuses the cells with a message naming
the column, the rows and examples (:class:`CellContext`). Checks run on the distinct values where
a column has few of them (categories).

Ids and attribute cells keep their control characters (C0 ``\\x00``-``\\x1f``, DEL, C1
``\\x80``-``\\x9f``) exactly as written, with a notice counting the cells: machine-readable
output (CSV, JSON, exports, the ledger) must join back with the file byte for byte. Whatever
shows them in a terminal replaces them (``triage.core.text.visible``). Periods, which are parsed
and never written back, have them replaced, so that a message quoting a cell is safe.

The patterns and limits here (control and bidi characters, look-alike ids, the year range, the
largest number and lag) are also what the streamed reader checks (``triage.core.read.stream``).
"""

from __future__ import annotations

import calendar
import datetime as dt
import re
import unicodedata
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import NoReturn

import numpy as np
import pandas as pd

from triage.core import schema
from triage.core.dialect import FileOptions, date_format_advice
from triage.core.errors import format_rows
from triage.core.ledger import TEXT_MAX
from triage.core.portfolio import DAY_NS
from triage.core.read.columns import ColumnPlan, column_label
from triage.core.read.messages import EXAMPLES_SHOWN, fail, plural, sanitized
from triage.core.text import STORED_TABLE

# C0, DEL and C1, written with escapes so the pattern itself holds no control bytes.
CONTROL_PATTERN = r"[\x00-\x1f\x7f-\x9f]"


# Trojan Source bidi controls (CVE-2021-42574) are flagged in ids, not replaced.
# Built from code points: pyarrow's RE2 engine has no \u escapes (pandas would fall back to
# Python's re, per cell), and bidi characters must not appear literally in source code.
_BIDI_PATTERN = f"[{chr(0x202A)}-{chr(0x202E)}{chr(0x2066)}-{chr(0x2069)}]"


SUSPECT_PATTERN = f"{CONTROL_PATTERN}|{_BIDI_PATTERN}"


# Look-alike ids (issue 10 §7): ids that differ only in what does not show. Characters that do
# not show: format characters (Unicode category Cf: zero-width space and joiners, word joiner,
# byte-order mark, soft hyphen, bidi marks) and the fillers that render blank. Spaces: every
# Unicode space, line and paragraph separator. Written as code points, for both regex engines.
_INVISIBLE = "".join(
    chr(c)
    for c in (
        0x00AD, 0x034F, 0x061C, 0x115F, 0x1160, 0x17B4, 0x17B5, 0x180E,
        *range(0x200B, 0x2010), *range(0x202A, 0x202F), *range(0x2060, 0x2070),
        0x3164, 0xFEFF, 0xFFA0,
    )
)  # fmt: skip


_SPACES = "".join(
    chr(c)
    for c in (0x20, 0x85, 0xA0, 0x1680, *range(0x2000, 0x200B), 0x2028, 0x2029, 0x202F, 0x205F,
              0x3000)
)  # fmt: skip


#: An id that may look like another: not ASCII, or a space at an end or two spaces in a row.
LOOKALIKE_CANDIDATE = f"[{chr(0x80)}-{chr(0x10FFFF)}]|^ | $|  "


# float64 holds every whole number exactly only up to 2**53 (IEEE 754 binary64, 53-bit significand).
MAX_MAGNITUDE = float(2**53)


# Digits are [0-9]: \d would also match Arabic-Indic, full-width and other digits, which
# Python's float() and int() read but docs/input-format.md does not accept (plain numbers only).
ISO_DATE = re.compile(r"^([0-9]{4})-([0-9]{2})(?:-([0-9]{2}))?(?:[T ]00:00(?::00(?:\.0+)?)?)?$")


_FIRST_YEAR, _LAST_YEAR = 1900, 2199


#: Largest forecast lag, in periods (almost two centuries of weeks): a larger number is a typo
#: or another column, and would not fit the integer types lags are held in.
LAG_MAX = 10_000


#: The day numbers (since 1970-01-01) of the accepted year range.
FIRST_DAY = (dt.date(_FIRST_YEAR, 1, 1) - dt.date(1970, 1, 1)).days


LAST_DAY = (dt.date(_LAST_YEAR, 12, 31) - dt.date(1970, 1, 1)).days


UNITS_PER_DAY = {"s": 86_400, "ms": 86_400_000, "us": 86_400 * 10**6, "ns": DAY_NS}


_NUMBER = r"^[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?$|^[+-]?(?:inf|infinity)$"


_INTEGER = r"^[+-]?[0-9]+(?:\.0*)?$"


_EXCEL_ERRORS = ("#DIV/0!", "#VALUE!", "#REF!", "#NAME?", "#NUM!", "#NULL!", "#N/A", "#SPILL!")


@dataclass
class CellContext:
    """What a column check needs to word its message."""

    path: Path
    plan: ColumnPlan
    rows: Callable[[np.ndarray], list[int]]
    notices: list[str]
    control_cells: dict[str, int] = field(default_factory=dict)
    options: FileOptions = field(default_factory=FileOptions)

    def fail(
        self,
        position: int,
        problem: str,
        bad: np.ndarray,
        values: pd.Series | None,
        hint: str,
        detail: str = "",
    ) -> NoReturn:
        """Raise for the cells ``bad`` (positions) of column ``position``."""
        rows = self.rows(bad)
        examples = f": {_examples(values, bad, rows)}" if values is not None else ""
        fail(
            self.path,
            f"column {column_label(self.plan, position)} {problem} in {len(rows)} "
            f"{'row' if len(rows) == 1 else 'rows'} ({format_rows(rows)}){examples}."
            + (f" {detail}" if detail else ""),
            hint,
        )


def _examples(values: pd.Series, bad: np.ndarray, rows: list[int]) -> str:
    shown: dict[str, int] = {}
    sample = values.iloc[bad[:500]]
    for text, row in zip(sample.astype(object).tolist(), rows[:500], strict=False):
        key = sanitized(f"{text:.15g}" if isinstance(text, float) else str(text))
        if key not in shown:
            shown[key] = row
            if len(shown) == EXAMPLES_SHOWN:
                break
    return "e.g. " + ", ".join(f"'{text}' (row {row})" for text, row in shown.items())


def is_blank(values: pd.Series) -> np.ndarray:
    """Which cells are missing or only white space."""
    if isinstance(values.dtype, pd.CategoricalDtype):
        codes = category_codes(values)
        blank_codes = np.flatnonzero(np.asarray(values.cat.categories.str.strip() == ""))
        if not blank_codes.size:
            return codes < 0
        return (codes < 0) | np.isin(codes, blank_codes)
    out: np.ndarray = (values.str.strip() == "").to_numpy(dtype=bool, na_value=True)
    return out


def as_text(values: pd.Series) -> tuple[pd.Series, np.ndarray]:
    """Any column as text (``str``, or ``category`` of ``str``) plus its missing-cell mask.

    Numbers and dates from typed formats (Parquet, xlsx) become their plain written form; a whole
    number stored as float loses its '.0' (123.0 -> '123').
    """
    if isinstance(values.dtype, pd.CategoricalDtype):
        cats = values.cat.categories
        if not isinstance(cats.dtype, pd.StringDtype):
            values = _recode(values, pd.Index(_format_cells(pd.Series(cats, dtype=object))))
        return values, category_codes(values) < 0
    if isinstance(values.dtype, pd.StringDtype):
        return values, values.isna().to_numpy()
    if values.dtype == object:
        missing = pd.isna(values).to_numpy()
        return pd.Series(_format_cells(values), dtype=str), missing
    codes, uniques = pd.factorize(values, use_na_sentinel=True)
    labels = _format_cells(pd.Series(np.asarray(uniques, dtype=object), dtype=object))
    return _from_codes(codes, labels), codes < 0


def _format_cells(values: pd.Series) -> list[str]:
    """Written form of typed cells (per cell: only for xlsx cells and distinct Parquet values)."""
    out: list[str] = []
    for value in values.tolist():
        if value is None or (isinstance(value, float) and np.isnan(value)):
            out.append("")
        elif isinstance(value, bool):
            out.append("TRUE" if value else "FALSE")
        elif isinstance(value, float) and value.is_integer():
            out.append(str(int(value)))
        elif (
            isinstance(value, dt.datetime | pd.Timestamp)
            and value == pd.Timestamp(value).normalize()
        ):
            out.append(value.strftime("%Y-%m-%d"))
        else:
            out.append(str(value))
    return out


def category_codes(values: pd.Series) -> np.ndarray:
    """Category codes without a copy (``Series.cat.codes`` builds a new Series)."""
    return np.asarray(values.array.codes)


def _recode(values: pd.Series, categories: pd.Index) -> pd.Series:
    """Give a categorical new category labels, merging labels that became equal."""
    return _from_codes(category_codes(values), categories)


def _from_codes(codes: np.ndarray, labels: Sequence[str] | pd.Index) -> pd.Series:
    """Categorical text from codes (-1: missing) into ``labels``, which may repeat."""
    label_codes, uniques = pd.factorize(pd.Index(labels, dtype=str))
    if not len(label_codes):
        return pd.Series(pd.Categorical.from_codes(codes, categories=pd.Index([], dtype=str)))
    mapped = np.where(codes < 0, -1, label_codes[np.maximum(codes, 0)])
    return pd.Series(pd.Categorical.from_codes(mapped, categories=pd.Index(uniques, dtype=str)))


def _clean_controls(
    ctx: CellContext, position: int, values: pd.Series, *, replace: bool = False
) -> pd.Series:
    """Count the cells holding control characters (checked vectorised first), for the notice.

    Ids and attributes keep them: the text stays exactly as written, so that machine-readable
    output joins back with the file; whatever shows it in a terminal makes them visible
    (``triage.core.text.visible``). With ``replace`` (periods, which are parsed, never written
    back) they are replaced by visible symbols, so that a message quoting the cell is safe.
    """
    name = ctx.plan.headers[position]
    if isinstance(values.dtype, pd.CategoricalDtype):
        cats = values.cat.categories
        dirty = np.asarray(cats.str.contains(CONTROL_PATTERN, regex=True))
        if not dirty.any():
            return values
        count = int(np.isin(category_codes(values), np.flatnonzero(dirty)).sum())
        cleaned = (
            _recode(values, pd.Index(cats.str.translate(STORED_TABLE), dtype=str))
            if replace
            else values
        )
    else:
        mask = values.str.contains(CONTROL_PATTERN, regex=True, na=False).to_numpy(dtype=bool)
        if not mask.any():
            return values
        count = int(mask.sum())
        cleaned = values
        if replace:
            cleaned = values.copy()
            cleaned.loc[mask] = values.loc[mask].str.translate(STORED_TABLE)
    if count:
        ctx.control_cells[name] = ctx.control_cells.get(name, 0) + count
    return cleaned


def checked_ids(ctx: CellContext, position: int, values: pd.Series, role: str) -> pd.Series:
    """An item or location column: never empty, not longer than the ledger stores; notices for
    ids stored as numbers, control characters, bidi controls and look-alike ids."""
    numeric = _typed_numbers(values)
    if numeric:
        ctx.notices.append(
            f"Column {column_label(ctx.plan, position)}: {plural(numeric, 'id')} stored as numbers "
            "in the file, so leading zeros (00123) may have been lost before triage read it. Store "
            "ids as text (in Excel: format the column as Text before typing or pasting)."
        )
    text, missing = as_text(values)
    strings = text.cat.categories if isinstance(text.dtype, pd.CategoricalDtype) else text
    # One scan for both kinds of suspicious characters; most files have neither.
    suspect = bool(strings.str.contains(SUSPECT_PATTERN, regex=True, na=False).any())
    if suspect:
        text = _clean_controls(ctx, position, text)
    empty = missing | is_blank(text)
    if empty.any():
        ctx.fail(
            position,
            "is empty",
            np.flatnonzero(empty),
            None,
            f"Every row needs {'an item id' if role == schema.ITEM else 'a location'}: "
            "fill it in, or delete the rows.",
        )
    distinct = _distinct_ids(text)
    _check_id_length(ctx, position, text, distinct, role)
    _note_lookalikes(ctx, position, distinct)
    if suspect and bool(strings.str.contains(_BIDI_PATTERN, regex=True, na=False).any()):
        ctx.notices.append(
            f"Column {column_label(ctx.plan, position)} has ids containing bidirectional text "
            "controls (U+202A-U+202E, U+2066-U+2069), which can make an id look different from "
            "what it is."
        )
    if role == schema.LOCATION and not isinstance(text.dtype, pd.CategoricalDtype):
        text = text.astype("category")
    return text


def _distinct_ids(text: pd.Series) -> pd.Series:
    """The distinct ids a column holds (categories no row uses are left out)."""
    if isinstance(text.dtype, pd.CategoricalDtype):
        codes = category_codes(text)
        used = np.bincount(codes[codes >= 0], minlength=len(text.cat.categories)) > 0
        return pd.Series(text.cat.categories[used], dtype=str)
    return pd.Series(pd.unique(text.dropna()), dtype=str)


def _check_id_length(
    ctx: CellContext, position: int, text: pd.Series, distinct: pd.Series, role: str
) -> None:
    """Refuse ids the decision ledger could not store, here rather than at every save."""
    lengths = distinct.str.len().to_numpy()
    if not len(lengths) or lengths.max() <= TEXT_MAX:
        return
    long_rows = text.isin(distinct[lengths > TEXT_MAX]).to_numpy(dtype=bool)
    what = "item ids" if role == schema.ITEM else "locations"
    ctx.fail(
        position,
        f"has {what} longer than {TEXT_MAX:,} characters (the most the decision ledger stores)",
        np.flatnonzero(long_rows),
        None,
        "Shorten those ids, or check that --columns maps the right column to "
        f"{role} (an id is a code or a short name).",
        f"The longest is {int(lengths.max()):,} characters.",
    )


def lookalike_keys(ids: pd.Series) -> pd.Series:
    """How each id looks: NFKC form, invisible characters removed, spaces made one plain space,
    none at the ends. Ids with the same key look alike on screen (or nearly).

    Args:
        ids: Distinct ids, as ``str``.
    """
    return (
        ids.str.normalize("NFKC")
        .str.replace(f"[{_INVISIBLE}]", "", regex=True)
        .str.replace(f"[{_SPACES}]+", " ", regex=True)
        .str.strip(" ")
    )


def _lookalike_candidates(ids: pd.Series) -> np.ndarray:
    """Which ids could look like another (everything else looks like itself only)."""
    # One pass over all ids joined (C speed) settles the usual case: plain ASCII, single spaces.
    joined = "\n" + "\n".join(ids.tolist()) + "\n"
    if joined.isascii() and not any(odd in joined for odd in ("  ", " \n", "\n ")):
        return np.zeros(len(ids), dtype=bool)
    out: np.ndarray = ids.str.contains(LOOKALIKE_CANDIDATE, regex=True).to_numpy(dtype=bool)
    return out


def _note_lookalikes(ctx: CellContext, position: int, ids: pd.Series) -> None:
    """Notice ids that look alike but differ: kept apart, but the reviewer should know."""
    candidate = _lookalike_candidates(ids)
    if not candidate.any():
        return
    originals = ids[candidate]
    keys = lookalike_keys(originals)
    plain = ids[~candidate]
    hits = plain[plain.isin(keys).to_numpy(dtype=bool)]
    pairs = pd.DataFrame(
        {"key": pd.concat([keys, hits]).to_numpy(), "id": pd.concat([originals, hits]).to_numpy()}
    )
    shared = pairs[pairs["key"].duplicated(keep=False).to_numpy()]
    if shared.empty:
        return
    groups = shared.groupby("key", sort=False)["id"].agg(list)
    examples = "; ".join(
        " and ".join(_shown_id(v) for v in sorted(group)[:3])
        for group in groups.iloc[:EXAMPLES_SHOWN]
    )
    ctx.notices.append(
        f"Column {column_label(ctx.plan, position)}: {len(shared)} ids look like another id but "
        "differ in spaces, Unicode form or invisible characters; each is kept as its own "
        f"series: {examples}"
        + (
            f" and {len(groups) - EXAMPLES_SHOWN} more groups"
            if len(groups) > EXAMPLES_SHOWN
            else ""
        )
        + ". If they are the same, write them the same way in the file."
    )


def _shown_id(text: str) -> str:
    """An id quoted, with what does not show (and control characters) written as a code
    (``\\u200D``, ``\\u001B``)."""
    out = []
    for ch in text:
        kind = unicodedata.category(ch)
        if (
            kind in ("Cc", "Mn", "Me", "Cf", "Zl", "Zp")
            or (kind == "Zs" and ch != " ")
            or ch in _INVISIBLE
        ):
            out.append(f"\\u{ord(ch):04X}" if ord(ch) <= 0xFFFF else f"\\U{ord(ch):08X}")
        else:
            out.append(ch)
    return "'" + "".join(out) + "'"


def _typed_numbers(values: pd.Series) -> int:
    """How many id cells the file stores as numbers (xlsx cells, numeric Parquet columns)."""
    if pd.api.types.is_numeric_dtype(values.dtype) and not pd.api.types.is_bool_dtype(values.dtype):
        return int(values.notna().sum())
    if values.dtype == object:
        return sum(isinstance(v, int | float) and not isinstance(v, bool) for v in values.tolist())
    return 0


def checked_attribute(ctx: CellContext, position: int, values: pd.Series) -> pd.Series:
    """An attribute column as categorical text, missing as ``""`` (control characters counted)."""
    text, missing = as_text(values)
    if isinstance(text.dtype, pd.CategoricalDtype):
        if missing.any():
            if "" not in text.cat.categories:
                text = text.cat.add_categories([""])
            text = text.fillna("")
    else:
        text = text.fillna("").astype("category")
    return _clean_controls(ctx, position, text)


def checked_periods(ctx: CellContext, position: int, values: pd.Series) -> pd.Series:
    """A period column as ``datetime64[ns]`` at midnight: ISO text (or ``--date-format``) or date
    cells, never empty, in the accepted years."""
    if pd.api.types.is_datetime64_any_dtype(values.dtype):
        stamps = values.reset_index(drop=True)
        if stamps.dt.tz is not None:
            # Keep the wall-clock date the file shows, whatever its time zone.
            stamps = stamps.dt.tz_localize(None)
        _check_stamps(ctx, position, stamps)
        return stamps.astype("datetime64[ns]")
    if values.dtype == object:
        return _periods_from_cells(ctx, position, values)
    if pd.api.types.is_numeric_dtype(values.dtype):
        _date_error(ctx, position, np.arange(len(values)), values)
    text, missing = as_text(values)
    text = _clean_controls(ctx, position, text, replace=True)
    if not isinstance(text.dtype, pd.CategoricalDtype):
        text = text.astype("category")
    cats = pd.Series(text.cat.categories, dtype=str)
    parsed = parse_periods(cats, ctx.options.date_format)
    codes = category_codes(text)
    empty = missing | np.isin(codes, np.flatnonzero((cats.str.strip() == "").to_numpy()))
    if empty.any():
        ctx.fail(
            position,
            "is empty",
            np.flatnonzero(empty),
            None,
            "Every row needs a period; write dates as YYYY-MM-DD (e.g. 2024-03-04).",
        )
    bad_codes = np.flatnonzero(parsed.isna().to_numpy())
    if bad_codes.size:
        # Categories no row uses any more (left by skipped blank rows) must not count.
        wrong = np.isin(codes, bad_codes)
        if wrong.any():
            _date_error(ctx, position, np.flatnonzero(wrong), text)
    result = pd.Series(parsed.to_numpy()[codes], copy=False)
    _check_stamps(ctx, position, result)
    return result.astype("datetime64[ns]")


def parse_periods(texts: pd.Series, date_format: str | None = None) -> pd.Series:
    """Period texts -> ``datetime64[us]``, NaT where a text is not a period.

    Without ``date_format``: ISO ``YYYY-MM-DD`` / ``YYYY-MM`` only. With it (``--date-format``,
    e.g. ``%d.%m.%Y``): exactly that pattern, as ``datetime.strptime`` reads it, digits 0-9
    only; a format without a day reads the first of the month. Spaces around a text are
    ignored. Both read paths parse periods here, once per distinct text.
    """
    if date_format is None:
        return _parse_iso(texts)
    stripped = texts.str.strip()
    # \d is any script's digit in Python's re: a digit that is not 0-9 is refused.
    foreign = stripped.str.contains(r"(?![0-9])\d", regex=True, na=False).to_numpy(dtype=bool)
    out = pd.to_datetime(stripped.where(~foreign), format=date_format, errors="coerce")
    return pd.Series(np.asarray(out, dtype="datetime64[us]"), copy=False)


def _parse_iso(texts: pd.Series) -> pd.Series:
    """ISO ``YYYY-MM-DD`` / ``YYYY-MM`` (optionally ``00:00:00``) -> datetime64[us], else NaT.

    Microseconds hold any four-digit year; the range check comes before the cast to ns, which
    would wrap around silently.
    """
    parts = texts.str.strip().str.extract(ISO_DATE.pattern)
    day = parts[2].fillna("01")
    joined = (parts[0] + "-" + parts[1] + "-" + day).where(parts[0].notna())
    out = pd.to_datetime(joined, format="%Y-%m-%d", errors="coerce")
    return pd.Series(out.to_numpy(dtype="datetime64[us]"), copy=False)


def _periods_from_cells(ctx: CellContext, position: int, values: pd.Series) -> pd.Series:
    cells = values.tolist()
    is_date = np.array([isinstance(v, dt.date) for v in cells], dtype=bool)
    missing = np.array(
        [v is None or (isinstance(v, str) and not v.strip()) for v in cells], dtype=bool
    )
    is_text = np.array([isinstance(v, str) for v in cells], dtype=bool) & ~missing
    if missing.any():
        ctx.fail(
            position,
            "is empty",
            np.flatnonzero(missing),
            None,
            "Every row needs a period; write dates as YYYY-MM-DD or use date cells.",
        )
    # Cells that are neither dates nor text (numbers) and text that is not an ISO date are
    # reported together, in row order, so that one message lists every kind of bad cell.
    wrong = ~(is_date | is_text | missing)
    result = np.empty(len(cells), dtype="datetime64[us]")
    if is_date.any():
        dates = pd.to_datetime(pd.Series([cells[i] for i in np.flatnonzero(is_date)], dtype=object))
        result[is_date] = dates.to_numpy(dtype="datetime64[us]")
    if is_text.any():
        text = pd.Series([sanitized(cells[i]) for i in np.flatnonzero(is_text)], dtype=str)
        parsed = parse_periods(text, ctx.options.date_format)
        wrong[np.flatnonzero(is_text)[parsed.isna().to_numpy()]] = True
        result[is_text] = parsed.to_numpy()
    if wrong.any():
        _date_error(ctx, position, np.flatnonzero(wrong), values)
    series = pd.Series(result, copy=False)
    _check_stamps(ctx, position, series)
    return series.astype("datetime64[ns]")


def _date_error(ctx: CellContext, position: int, bad: np.ndarray, values: pd.Series) -> NoReturn:
    sample = [str(v).strip() for v in values.iloc[bad[:200]].tolist()]
    notes = []
    slash = next(
        (s for s in sample if re.fullmatch(r"[0-9]{1,2}[/.][0-9]{1,2}[/.][0-9]{2,4}", s)), None
    )
    if slash and ctx.options.date_format is None:
        first, second = (int(x) for x in re.split(r"[/.]", slash)[:2])
        if 1 <= first <= 12 and 1 <= second <= 12:
            notes.append(
                f"'{slash}' could be {first} {calendar.month_name[second]} or "
                f"{second} {calendar.month_name[first]}."
            )
        else:
            notes.append(f"'{slash}' is read day-first or month-first depending on the region.")
    if any(re.fullmatch(r"\d{5}(\.\d+)?", s) for s in sample):
        notes.append("5-digit numbers look like Excel day numbers (dates without a date format).")
    if any(re.fullmatch(r"\d{4}-\d{2}-\d{2}[T ]\d{1,2}:\d{2}.*", s) for s in sample):
        notes.append("Periods are dates, without a time of day.")
    digits = _foreign_digits(sample)
    if digits:
        notes.append(f"Dates are written with the digits 0-9 ({digits}).")
    date_format = ctx.options.date_format
    invalid = next((s for s in sample if ISO_DATE.fullmatch(s)), None)
    if invalid and date_format is None:
        notes.append(f"'{invalid}' is not a date in the calendar.")
    # Which --date-format would read them (advice only: several may fit, none is applied).
    advice = date_format_advice(sample) if not digits else ""
    if date_format is not None:
        if advice and f"--date-format {date_format} " in f"{advice} ":
            advice = ""  # the format given fits the pattern: the dates themselves are wrong
        if not advice and not digits:
            notes.append("They do not exist in the calendar or are written another way.")
        ctx.fail(
            position,
            f"has dates that do not match --date-format {date_format}",
            bad,
            values,
            "Give --date-format the pattern of the file's periods (%d day, %m month, %Y year: "
            "%d.%m.%Y reads 01.10.2025), or correct those cells.",
            " ".join([*notes, advice]).strip(),
        )
    ctx.fail(
        position,
        "has dates that are ambiguous or not ISO",
        bad,
        values,
        "Write dates as YYYY-MM-DD (e.g. 2024-03-04), or YYYY-MM for months (read as the first "
        "of the month); in Excel, format the column as yyyy-mm-dd before saving"
        + ("; or read them as they are with --date-format (see above)." if advice else "."),
        " ".join([*notes, advice]).strip(),
    )


def _foreign_digits(sample: list[str]) -> str:
    """Digits other than 0-9 in the sample, named for a message ('' when there are none)."""
    found = list(
        dict.fromkeys(ch for text in sample for ch in text if ch.isdigit() and not ch.isascii())
    )
    if not found:
        return ""
    shown = ", ".join(f"'{ch}'" for ch in found[:3])
    return f"{shown} {'is a digit' if len(found) == 1 else 'are digits'} of another script"


def _check_stamps(ctx: CellContext, position: int, stamps: pd.Series) -> None:
    """Periods are present, at midnight, and in years a calendar of demand can hold."""
    missing = stamps.isna().to_numpy()
    if missing.any():
        ctx.fail(
            position,
            "is empty",
            np.flatnonzero(missing),
            None,
            "Every row needs a period; write dates as YYYY-MM-DD (e.g. 2024-03-04).",
        )
    # Checked on the distinct periods (about a hundred), not on every row.
    distinct = pd.Series(pd.unique(stamps), copy=False)
    off = distinct[(distinct != distinct.dt.normalize()).to_numpy(dtype=bool)]
    if len(off):
        ctx.fail(
            position,
            "has a time of day, not just a date",
            np.flatnonzero(stamps.isin(off).to_numpy()),
            stamps,
            "Periods are dates: write them as YYYY-MM-DD with no time.",
        )
    years = distinct.dt.year
    # Also keeps every period inside the datetime64[ns] range (years 1677-2262).
    outside = distinct[((years < _FIRST_YEAR) | (years > _LAST_YEAR)).to_numpy(dtype=bool)]
    if len(outside):
        ctx.fail(
            position,
            f"has dates outside the years {_FIRST_YEAR}-{_LAST_YEAR}",
            np.flatnonzero(stamps.isin(outside).to_numpy()),
            stamps,
            "Check the year (a typo such as 0224 or 20244?); write dates as YYYY-MM-DD.",
        )


def checked_numbers(ctx: CellContext, position: int, values: pd.Series, role: str) -> pd.Series:
    """A demand, forecast or price column as float64 (NaN for missing): finite, below 2**53 in
    size, prices not negative."""
    if values.dtype == np.float64:
        numbers = values.to_numpy()
        raw = None
    elif pd.api.types.is_bool_dtype(values.dtype) or pd.api.types.is_datetime64_any_dtype(
        values.dtype
    ):
        ctx.fail(
            position,
            f"holds {values.dtype} values, not numbers",
            np.arange(len(values)),
            values,
            "Write the column as numbers.",
        )
    elif pd.api.types.is_numeric_dtype(values.dtype):
        numbers = values.to_numpy(dtype=np.float64, na_value=np.nan)
        raw = None
    else:
        numbers, bad = _numbers_from_text(values, ctx.options.decimal)
        if bad.any():
            _number_error(ctx, position, np.flatnonzero(bad), values)
        raw = values
    # fmin/fmax skip NaN without allocating: one pass each settles the usual all-good case.
    low, high = np.fmin.reduce(numbers), np.fmax.reduce(numbers)
    if not (low > -MAX_MAGNITUDE and high < MAX_MAGNITUDE) and not np.isnan(low):
        finite = np.isfinite(numbers) | np.isnan(numbers)
        # 2**53 itself is refused: 9007199254740993 reads as 9007199254740992.0 = 2**53.
        too_big = np.abs(np.where(finite, numbers, 0.0)) >= MAX_MAGNITUDE
        shown = raw if raw is not None else pd.Series(numbers, copy=False)
        ctx.fail(
            position,
            "has values that are not finite or are too large",
            np.flatnonzero(~finite | too_big),
            shown,
            "Replace them with real quantities; leave the cell empty for a missing value.",
            f"Numbers must be finite and smaller than {MAX_MAGNITUDE:,.0f} in size, the limit "
            "below which every whole number is held exactly.",
        )
    if role == schema.PRICE and low < 0:
        ctx.fail(
            position,
            "has negative prices",
            np.flatnonzero(numbers < 0),
            pd.Series(numbers, copy=False),
            "Prices weight errors by value and must be 0 or more; leave the cell empty if unknown.",
        )
    return pd.Series(numbers, dtype=np.float64, copy=False)


def _numbers_from_text(values: pd.Series, decimal: str = ".") -> tuple[np.ndarray, np.ndarray]:
    """Parse text (or mixed xlsx cells) as numbers: returns float64 values and a bad-cell mask.

    With ``decimal`` ``","`` a number is written ``1,5`` (``1.5`` is refused: a point could be
    a thousands separator), as pandas reads ``decimal=","``.
    """
    if values.dtype == object:
        cells = values.tolist()
        kind = np.array(
            [
                0
                if v is None
                else 1
                if isinstance(v, int | float) and not isinstance(v, bool)
                else 2
                if isinstance(v, str)
                else 3
                for v in cells
            ],
            dtype=np.int8,
        )
        numbers = np.full(len(cells), np.nan)
        direct = np.flatnonzero(kind == 1)
        numbers[direct] = np.array([cells[i] for i in direct], dtype=np.float64)
        texts = np.flatnonzero(kind == 2)
        bad = kind == 3
        if texts.size:
            parsed, wrong = _numbers_from_text(
                pd.Series([cells[i] for i in texts], dtype=str), decimal
            )
            numbers[texts] = parsed
            bad[texts] = wrong
        return numbers, bad
    text = values.astype(str) if not isinstance(values.dtype, pd.StringDtype) else values
    stripped = text.str.strip()
    missing = (stripped.isin(schema.NUMERIC_MISSING) | text.isna()).to_numpy(dtype=bool)
    pattern = _NUMBER if decimal == "." else _NUMBER.replace("\\.", ",")
    valid = stripped.str.fullmatch(pattern, case=False).to_numpy(dtype=bool, na_value=False)
    bad = ~missing & ~valid
    numbers = np.full(len(text), np.nan)
    good = valid & ~missing
    written = stripped[good] if decimal == "." else stripped[good].str.replace(",", ".")
    # float() per cell: accepts 1e400 (-> inf, reported as not finite) like the CSV parser does.
    numbers[good] = np.asarray(written.to_numpy(dtype=object), dtype=np.float64)
    return numbers, bad


def _number_error(ctx: CellContext, position: int, bad: np.ndarray, values: pd.Series) -> NoReturn:
    sample = [str(v).strip() for v in values.iloc[bad[:200]].tolist()]
    hints = []
    comma = ctx.options.decimal == ","
    if comma and any(re.fullmatch(r"[+-]?[0-9]*[.][0-9]+(?:,[0-9]*)?", s) for s in sample):
        hints.append(
            "with --decimal , a number is written 1,5 and without thousands separators "
            "(1500, not 1.500: a point could be either, so it is not read)"
        )
    elif not comma and any(re.fullmatch(r"[+-]?[0-9]*,[0-9]+", s) for s in sample):
        hints.append(
            "write decimals with a point and no thousands separator (1.5 and 1234, not "
            "1,5 or 1,234); or, if the file writes decimal commas, read it with --decimal , "
            "(such files usually separate their fields with semicolons: --sep ';')"
        )
    if any(re.fullmatch(r"\(\s*[\d.,]+\s*\)", s) for s in sample):
        hints.append("write negative numbers (returns) with a minus sign: -5, not (5)")
    if any(s in _EXCEL_ERRORS for s in sample):
        hints.append(
            "fix the Excel formulas that give errors (#DIV/0!, #VALUE!), or clear those cells"
        )
    digits = _foreign_digits(sample)
    if digits:
        hints.append(f"write digits as 0-9 ({digits})")
    hints.append("leave a cell empty (or write NA) for a missing value")
    hint = "Use plain numbers such as 12 or -3.5: " + "; ".join(hints) + "."
    ctx.fail(position, "has values that are not numbers", bad, values, hint)


def checked_lags(ctx: CellContext, position: int, values: pd.Series) -> pd.Series:
    """A lag column as int64: whole numbers from 0 to ``LAG_MAX``, never missing."""
    dtype = values.dtype
    if isinstance(dtype, np.dtype) and dtype.kind in "iu":
        if dtype.kind == "u" and len(values) and values.max() > LAG_MAX:
            _lag_range_error(ctx, position, np.flatnonzero(values.to_numpy() > LAG_MAX), values)
        lags = values.to_numpy().astype(np.int64, copy=False)
        missing = np.zeros(1, dtype=bool)
        shown: pd.Series = values
    elif pd.api.types.is_integer_dtype(dtype):
        lags = values.to_numpy(dtype=np.int64, na_value=-1)
        missing = values.isna().to_numpy()
        shown = values
    elif pd.api.types.is_float_dtype(dtype):
        numbers = values.to_numpy(dtype=np.float64)
        missing = np.isnan(numbers)
        wrong = ~missing & ~(np.isfinite(numbers) & (numbers == np.round(numbers)))
        if wrong.any():
            _lag_error(ctx, position, np.flatnonzero(wrong), values)
        # Checked before the cast: a float past the int64 range would wrap around to negative.
        large = np.flatnonzero(~missing & (numbers > LAG_MAX))
        if large.size:
            _lag_range_error(ctx, position, large, values)
        lags = np.where(missing | (numbers < -LAG_MAX), -1, numbers).astype(np.int64)
        shown = values
    else:
        text, missing_text = as_text(values)
        if not isinstance(text.dtype, pd.CategoricalDtype):
            text = text.astype("category")
        cats = pd.Series(text.cat.categories, dtype=str).str.strip()
        codes = category_codes(text)
        empty_cats = np.flatnonzero(cats.isin(schema.NUMERIC_MISSING).to_numpy())
        missing = missing_text | np.isin(codes, empty_cats)
        integer = _INTEGER if ctx.options.decimal == "." else _INTEGER.replace("\\.", ",")
        whole = cats.str.fullmatch(integer).to_numpy(dtype=bool, na_value=False)
        bad_cats = np.flatnonzero(~whole & ~cats.isin(schema.NUMERIC_MISSING).to_numpy())
        wrong = np.isin(codes, bad_cats) & ~missing
        if wrong.any():
            _lag_error(ctx, position, np.flatnonzero(wrong), text)
        # As float64 first: a whole number of any length converts, where int64 would overflow.
        numbers = pd.to_numeric(cats.where(whole, "0").str.replace(",", ".")).to_numpy(
            dtype=np.float64
        )
        too_large = np.isin(codes, np.flatnonzero(whole & (numbers > LAG_MAX)))
        if too_large.any():
            _lag_range_error(ctx, position, np.flatnonzero(too_large), text)
        cat_values = np.where(whole & (numbers >= -LAG_MAX), numbers, -1).astype(np.int64)
        lags = np.where(codes < 0, -1, cat_values[np.maximum(codes, 0)]).astype(np.int64)
        shown = text
    if missing.any():
        ctx.fail(
            position,
            "is empty",
            np.flatnonzero(missing),
            None,
            "Every row of a file with a lag column needs its lag: the number of periods "
            "between making the forecast and the period it is for (0, 1, 2, ...).",
        )
    if lags.min() < 0:
        negative = lags < 0
        ctx.fail(
            position,
            "has negative lags",
            np.flatnonzero(negative),
            shown,
            "A lag counts periods from making the forecast to the period it is for: 0 or more.",
        )
    if lags.max() > LAG_MAX:
        _lag_range_error(ctx, position, np.flatnonzero(lags > LAG_MAX), shown)
    return pd.Series(lags, dtype=np.int64, copy=False)


def _lag_range_error(
    ctx: CellContext, position: int, bad: np.ndarray, values: pd.Series
) -> NoReturn:
    ctx.fail(
        position,
        f"has lags larger than {LAG_MAX:,} periods",
        bad,
        values,
        "A lag counts periods from making the forecast to the period it is for (0, 1, 2, ...); "
        "check that this is the lag column (or map another with --columns lag=<column>).",
    )


def _lag_error(ctx: CellContext, position: int, bad: np.ndarray, values: pd.Series) -> NoReturn:
    ctx.fail(
        position,
        "has values that are not whole numbers",
        bad,
        values,
        "Write the lag as a whole number of periods (0, 1, 2, ...).",
    )
