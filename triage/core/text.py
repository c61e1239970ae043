"""Making text from files and the ledger safe to show in a terminal.

Control characters (C0, DEL, C1) could restyle the screen, set the terminal title or write the
clipboard (OSC 52); bidirectional controls reorder what follows them on the line. They are shown
as visible symbols instead: U+2400.. control pictures for C0, U+2421 for DEL, U+FFFD for C1 and
for the bidirectional controls.
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

CONTROL_TABLE: dict[int, str] = {
    **{code: chr(0x2400 + code) for code in range(0x20)},
    0x7F: "\u2421",
    **{code: "\ufffd" for code in range(0x80, 0xA0)},
    **{code: "\ufffd" for code in BIDI_CONTROLS},
}
_MULTILINE_TABLE = {k: v for k, v in CONTROL_TABLE.items() if k != 0x0A}


def visible(text: str, *, multiline: bool = False) -> str:
    """``text`` with every control character replaced by a visible symbol.

    Args:
        text: Any text.
        multiline: Keep line feeds (for notes shown over several lines).
    """
    return text.translate(_MULTILINE_TABLE if multiline else CONTROL_TABLE)
