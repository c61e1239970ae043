"""Keys on screen: look-alike ids look different, and no id makes a list shift its columns.

Reference for widths: Unicode's East Asian Width property (``unicodedata.east_asian_width``,
UAX #11): a terminal gives W and F characters two cells and others one; combining marks take
none. Rich measures the same way only when no invisible character (joiner, variation selector)
is left in the text, which is what the screen's key text guarantees.
"""

from __future__ import annotations

import unicodedata

from rich.cells import cell_len

from triage.core.text import INVISIBLES
from triage.tui import format as fmt

LOOK_ALIKES = [
    ("A-100", "A-100 "),  # trailing space
    ("A-100", " A-100"),  # leading space
    ("caf\u00e9", "cafe\u0301"),  # NFC and NFD
    ("AB", "A\u200dB"),  # zero-width joiner
    ("AB", "A\u200bB"),  # zero-width space
    ("A\u2028B", "A B"),  # line separator
    ("\u2764", "\u2764\ufe0f"),  # variation selector 16 (emoji presentation)
]
EMOJI = [
    "\U0001f468\u200d\U0001f469\u200d\U0001f467-fam",
    "flag-\U0001f1eb\U0001f1f7",
    "x\u2764\ufe0fy",
]


def uax11_width(text: str) -> int:
    return sum(
        0
        if unicodedata.combining(ch)
        else 2
        if unicodedata.east_asian_width(ch) in ("W", "F")
        else 1
        for ch in text
    )


def test_look_alike_keys_are_told_apart_on_screen() -> None:
    for a, b in LOOK_ALIKES:
        assert fmt.key_text(a) != fmt.key_text(b), (a, b)


def test_no_invisible_is_left_and_widths_agree_with_uax11() -> None:
    for text in [b for _, b in LOOK_ALIKES] + EMOJI:
        shown = fmt.key_text(text)
        assert not any(ord(ch) in INVISIBLES for ch in shown), shown
        assert "\u2028" not in shown and "\u200d" not in shown
        assert cell_len(shown) == uax11_width(shown), shown


def test_clean_keys_are_shown_as_they_are() -> None:
    for text in ["GF-10213", "00412", "日本語-1", "caf\u00e9", "A 1"]:
        assert fmt.key_text(text) == text
    assert fmt.key_text(("GF-1", "WST")) == "GF-1 @ WST"
