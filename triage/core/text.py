"""Making text from files and the ledger safe to show in a terminal.

Control characters (C0, DEL, C1) could restyle the screen, set the terminal title or write the
clipboard (OSC 52); bidirectional controls reorder what follows them on the line. They are shown
as visible symbols instead: U+2400.. control pictures for C0, U+2421 for DEL, U+FFFD for C1 and
for the bidirectional controls.

Invisible characters (zero-width spaces and joiners, variation selectors, the byte-order mark,
tag characters) are shown as U+FFFD too: two ids that differ only by one would otherwise look the
same, and terminals disagree on how wide a joined emoji sequence is, so a list would shift its
columns. The line and paragraph separators (U+2028, U+2029) are shown as U+2424. Only what is
shown changes: machine-readable output keeps the text exactly.
"""

from __future__ import annotations

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
