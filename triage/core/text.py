"""Making text from files and the ledger safe to show in a terminal.

Control characters (C0, DEL, C1) could restyle the screen, set the terminal title or write the
clipboard (OSC 52). They are shown as visible symbols instead: U+2400.. control pictures for C0,
U+2421 for DEL, U+FFFD for C1.
"""

from __future__ import annotations

CONTROL_TABLE: dict[int, str] = {
    **{code: chr(0x2400 + code) for code in range(0x20)},
    0x7F: "\u2421",
    **{code: "\ufffd" for code in range(0x80, 0xA0)},
}
_MULTILINE_TABLE = {k: v for k, v in CONTROL_TABLE.items() if k != 0x0A}


def visible(text: str, *, multiline: bool = False) -> str:
    """``text`` with every control character replaced by a visible symbol.

    Args:
        text: Any text.
        multiline: Keep line feeds (for notes shown over several lines).
    """
    return text.translate(_MULTILINE_TABLE if multiline else CONTROL_TABLE)
