"""Everything shown or written as text: the terminal sanitiser, the spreadsheet sanitiser and
the number formatter (one owner each).

**Terminal** (``visible``): text from files and the ledger made safe to show in a terminal.

Control characters (C0, DEL, C1) could restyle the screen, set the terminal title or write the
clipboard (OSC 52); bidirectional controls reorder what follows them on the line. They are shown
as visible symbols instead: U+2400.. control pictures for C0, U+2421 for DEL, U+FFFD for C1 and
for the bidirectional controls.

Invisible characters (zero-width spaces and joiners, variation selectors, the byte-order mark,
tag characters) are shown as U+FFFD too: two ids that differ only by one would otherwise look the
same, and terminals disagree on how wide a joined emoji sequence is, so a list would shift its
columns. The line and paragraph separators (U+2028, U+2029) are shown as U+2424. Only what is
shown changes: machine-readable output keeps the text exactly.

**Spreadsheets** (``neutralise``, ``xlsx_cell_text``): free text written to CSV or xlsx cannot
start a formula, and control characters a workbook cannot store are shown as the same symbols
``visible`` uses (docs/export.md).

**Numbers** (``number``, ``count``, ``percent``, ``ratio``, ``over_under``, ``compact``): how a
person reads a figure on a terminal, a review screen or the report. Each renderer chooses the
decimals and what stands for an undefined value (empty on a terminal, ``DASH`` in the report);
the rule (thousands separators, sign, percent of a fraction) is here once.
"""

from __future__ import annotations

import math
import re
from collections.abc import Sequence
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    import pandas as pd

#: Bidirectional formatting characters (Unicode UAX #9: ALM, LRM, RLM, LRE..RLO, LRI..PDI). The
#: loader keeps them in ids (with a notice); shown raw they reorder the rest of a table row.
BIDI_CONTROLS: tuple[int, ...] = (
    0x061C,
    0x200E,
    0x200F,
    *range(0x202A, 0x202F),
    *range(0x2066, 0x206A),
)

#: Characters that take no room on screen (Unicode format characters, variation selectors,
#: fillers): shown, they would make different ids look alike or shift a table's columns.
INVISIBLES: tuple[int, ...] = (
    0x00AD,
    0x034F,
    0x115F,
    0x1160,
    0x17B4,
    0x17B5,
    *range(0x180B, 0x1810),
    *range(0x200B, 0x200E),
    *range(0x2060, 0x2065),
    0x3164,
    *range(0xFE00, 0xFE10),
    0xFEFF,
    0xFFA0,
    *range(0xFFF9, 0xFFFC),
    *range(0x1D173, 0x1D17B),
    *range(0xE0000, 0xE0080),
    *range(0xE0100, 0xE01F0),
)

#: C0, DEL and C1 as visible symbols: control pictures for C0, U+2421 for DEL, U+FFFD for C1.
#: The loader writes these in place of the control characters of headers and ``--columns``
#: names, and of cells it quotes in a message; cells stored as data keep their text exactly.
STORED_TABLE: dict[int, str] = {
    **{code: chr(0x2400 + code) for code in range(0x20)},
    0x7F: "\u2421",
    **{code: "\ufffd" for code in range(0x80, 0xA0)},
}

#: What anything shown in a terminal replaces: the stored table, and the bidirectional and
#: invisible characters besides.
CONTROL_TABLE: dict[int, str] = {
    **STORED_TABLE,
    **{code: "\ufffd" for code in BIDI_CONTROLS},
    **{code: "\ufffd" for code in INVISIBLES},
    0x2028: "\u2424",
    0x2029: "\u2424",
}
_MULTILINE_TABLE = {k: v for k, v in CONTROL_TABLE.items() if k != 0x0A}


#: Shown in place of a space at either end of a key, where it would be invisible.
EDGE_SPACE = "\u2420"


def visible(text: str, *, multiline: bool = False, edges: bool = False) -> str:
    """``text`` with every control and invisible character replaced by a visible symbol.

    Args:
        text: Any text.
        multiline: Keep line feeds (for notes shown over several lines).
        edges: Show spaces at either end as U+2420, for keys: ``"A-1 "`` and ``"A-1"`` are
            different series and must not look the same.
    """
    shown = text.translate(_MULTILINE_TABLE if multiline else CONTROL_TABLE)
    if edges and shown and (shown[0] == " " or shown[-1] == " "):
        core = shown.strip(" ")
        if not core:
            return EDGE_SPACE * len(shown)
        lead = len(shown) - len(shown.lstrip(" "))
        trail = len(shown) - len(shown.rstrip(" "))
        shown = EDGE_SPACE * lead + core + EDGE_SPACE * trail
    return shown


def longest_word(text: str) -> int:
    """Characters in the longest word of ``text``: a table column at least this wide never
    breaks its heading inside a word."""
    return max((len(word) for word in text.split()), default=0)


# --------------------------------------------------------------------------------------------
# Spreadsheets

#: First characters that make a spreadsheet read a cell as a formula. OWASP "CSV Injection"
#: lists = + - @ Tab and CR, and Line Feed since August 2025 (OWASP/www-community PR #1116);
#: OWASP ASVS 5.0 V1.2.10 adds NUL (docs/sources.md §6.1).
FORMULA_TRIGGERS = "=+-@\t\r\n\0"
#: Matches text that starts with a formula trigger.
FORMULA_START = re.compile(r"[=+\-@\t\r\n\x00]")


def neutralise(values: pd.Series | Sequence[str]) -> pd.Series:
    """Free text made safe to open in a spreadsheet, as object Series of str.

    CR LF and bare CR become LF (one line-break convention, and no bare CR for the CSV writer
    of CPython < 3.11.9 to leave unquoted, docs/sources.md §6.3). Text starting with a formula
    trigger (``FORMULA_TRIGGERS``) gets a leading apostrophe, the neutralisation OWASP "CSV
    Injection" gives and Symfony uses since CVE-2021-41270; a tab or space prefix would not do.
    Quotes and separators inside the text are left to the CSV writer's quoting.
    """
    import pandas as pd

    series = pd.Series(values, dtype=object)
    if series.empty:
        return series
    # Work on the distinct values: long columns (the forecast table's outcome) repeat a few.
    codes, uniques = pd.factorize(series, use_na_sentinel=False)
    text = pd.Series(uniques, dtype=object).map(str)
    text = text.str.replace("\r\n", "\n", regex=False).str.replace("\r", "\n", regex=False)
    lead = text.str.match(FORMULA_START).to_numpy(dtype=bool)
    if lead.any():
        text = text.where(~lead, "'" + text)
    return pd.Series(text.to_numpy(dtype=object)[codes], index=series.index, dtype=object)


def neutralise_one(value: str) -> str:
    """``neutralise`` for a single text."""
    return str(neutralise([value]).iat[0])


#: Characters an xlsx file cannot hold: openpyxl's ``ILLEGAL_CHARACTERS_RE`` (C0 controls but
#: tab, LF and CR), plus U+FFFE and U+FFFF, which XML 1.0 does not allow either.
XLSX_ILLEGAL = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\ufffe\uffff]")
#: What stands for each of them: the terminal's control pictures (``CONTROL_TABLE``), U+FFFD
#: for the two non-characters.
_XLSX_TABLE: dict[int, str] = {
    code: CONTROL_TABLE.get(code, "\ufffd")
    for code in (*range(0x09), 0x0B, 0x0C, *range(0x0E, 0x20), 0xFFFE, 0xFFFF)
}


def xlsx_cell_text(text: str) -> str:
    """``text`` with the characters an xlsx cell cannot hold (``XLSX_ILLEGAL``) replaced by
    visible symbols; everything else is kept."""
    return text.translate(_XLSX_TABLE)


# --------------------------------------------------------------------------------------------
# Numbers

#: Shown for an undefined number where an empty cell would look like a gap (the report).
DASH = "\u2013"


def undefined(value: float | None) -> bool:
    """None or NaN: a figure that has no value (never shown as zero)."""
    if value is None:
        return True
    try:
        return math.isnan(value)
    except TypeError:
        return False


def number(
    value: float | None, decimals: int = 0, *, signed: bool = False, missing: str = ""
) -> str:
    """``1,234`` / ``1,234.5`` (``+1,234.5`` when ``signed``); ``missing`` when undefined."""
    if undefined(value):
        return missing
    return f"{value:{'+' if signed else ''},.{decimals}f}"


def count(value: float | None, *, missing: str = "") -> str:
    """A whole number with thousands separators: ``1,234``; ``missing`` when undefined."""
    if value is None or undefined(value):
        return missing
    return f"{int(value):,}"


def percent(
    value: float | None, decimals: int = 1, *, signed: bool = False, missing: str = ""
) -> str:
    """A fraction as a percentage: ``0.4167`` -> ``41.7%``; ``missing`` when undefined."""
    if value is None or undefined(value):
        return missing
    return f"{value * 100:{'+' if signed else ''}.{decimals}f}%"


def ratio(value: float | None, decimals: int = 3, *, missing: str = "") -> str:
    """A ratio without separators: ``0.912``; ``missing`` when undefined."""
    if undefined(value):
        return missing
    return f"{value:.{decimals}f}"


def over_under(
    value: float | None, decimals: int = 0, *, fraction: bool = False, plain_zero: bool = False
) -> str:
    """A signed figure with its direction in words: ``+1,234 over`` / ``-8.0% under``.

    Args:
        value: Units (``fraction`` false) or a fraction shown as a percentage.
        decimals: Digits after the point.
        fraction: Show ``value`` as a percentage.
        plain_zero: Show zero without a sign (``0.0%``) rather than ``+0.0%``.

    Empty when undefined. Over and under differ in words, never only in colour.
    """
    if value is None or undefined(value):
        return ""
    if plain_zero and value == 0:
        return percent(0.0, decimals) if fraction else number(0.0, decimals)
    word = " over" if value > 0 else " under" if value < 0 else ""
    shown = (
        percent(value, decimals, signed=True) if fraction else number(value, decimals, signed=True)
    )
    return shown + word


def compact(value: float | None, *, signed: bool = False) -> str:
    """``1,234`` / ``12.3k`` / ``4.5M``: short numbers for narrow columns; empty when undefined.

    ``signed`` writes ``+`` before a positive number (``+1,234``).
    """
    if value is None or undefined(value):
        return ""
    size = abs(value)
    sign = "+" if signed else ""
    if size >= 10_000_000:
        return f"{value / 1e6:{sign}.1f}M"
    if size >= 100_000:
        return f"{value / 1e3:{sign}.0f}k"
    return f"{value:{sign},.0f}"
