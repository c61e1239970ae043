"""Turning the session's numbers into the short texts the list and the detail pane show."""

from __future__ import annotations

import unicodedata
from typing import TYPE_CHECKING, Literal

import numpy as np
from textual.binding import Binding

from triage.core import vocabulary
from triage.core.text import compact as compact  # the screens call it fmt.compact
from triage.core.text import over_under, percent, visible
from triage.tui.widgets.series_list import Cell, Column

if TYPE_CHECKING:
    from textual.app import App

    from triage.core.vocabulary import Choice

BLOCKS = "▁▂▃▄▅▆▇█"
MISSING = "·"
#: Periods drawn in the list's inline chart.
SPARK_PERIODS = 6

OUTCOME_SHORT = {**vocabulary.OUTCOME_SHORT, "": ""}
#: An earlier cycle's open or closed decision, shown while this cycle has none.
PAST_TINY = {code: f"↺ {word}" for code, word in vocabulary.OUTCOME_TINY.items()}
#: An earlier cycle's adjustment still carried into this cycle's export (``session.carries``).
CARRIED_TINY = f"⇢ {vocabulary.OUTCOME_TINY[vocabulary.ADJUSTED]}"
#: The review column's words, short enough for an 80-column terminal.
OUTCOME_TINY = {**{code: f"✓ {word}" for code, word in vocabulary.OUTCOME_TINY.items()}, "": "·"}
PATTERN_SHORT = {
    "smooth": "smooth",
    "erratic": "erratic",
    "intermittent": "intermit",
    "lumpy": "lumpy",
    "none": "no demand",
}

#: List columns; ``keep`` decides which survive a narrow terminal (80 columns keeps rank, keys,
#: share, error, bias, review and the sparkline).
LIST_COLUMNS = (
    Column("rank", "#", 6, right=True, keep=20),
    Column("item", "item", 12, keep=19),
    Column("location", "loc", 5, keep=18),
    Column("share", "share", 6, right=True, keep=17),
    Column("cum", "cum", 5, right=True, keep=5),
    Column("error", "abs err", 8, right=True, keep=16),
    Column("bias", "bias", 12, right=True, keep=15),
    Column("ts", "TS", 6, right=True, keep=6),
    Column("flag", "flag", 7, keep=12),
    Column("pattern", "pattern", 9, keep=4),
    Column("outcome", "review", 7, keep=13),
    Column("worst", "worst", 5, right=True, keep=9),
    Column("spark", "dem | fcst", 2 * SPARK_PERIODS + 1, keep=14),
)

#: Bias order shows what it sorts by: |bias| (value where priced), its share of the portfolio's
#: total |bias| and the cumulative share in that order, in place of the error columns.
BIAS_COLUMNS = tuple(
    {
        "share": Column("bshare", "bias sh", 7, right=True, keep=17),
        "cum": Column("bcum", "cum", 5, right=True, keep=5),
        "error": Column("bsize", "|bias|", 8, right=True, keep=16),
    }.get(c.key, c)
    for c in LIST_COLUMNS
)

#: Fva order shows what it sorts by: the error the last process step added (value where priced)
#: where the error column was; the error moves to the place of its cumulative share.
FVA_COLUMNS = tuple(
    {
        "cum": Column("error", "abs err", 8, right=True, keep=5),
        "error": Column("fvaloss", "fva loss", 8, right=True, keep=16),
    }.get(c.key, c)
    for c in LIST_COLUMNS
)

#: The list's columns in each order (``ranking.ORDERS``).
ORDER_COLUMNS = {
    vocabulary.BY_ERROR: LIST_COLUMNS,
    vocabulary.BY_BIAS: BIAS_COLUMNS,
    vocabulary.BY_FVA: FVA_COLUMNS,
}


#: The group view's columns: the group's key, its series and how many are decided, its share of
#: the series' error, the series' error and the error of the group's total (the gap between the
#: two: a mix problem), the total's bias and flag, and a sparkline of the total.
GROUP_COLUMNS = (
    Column("rank", "#", 5, right=True, keep=20),
    Column("group", "group", 22, keep=19),
    Column("series", "series", 6, right=True, keep=10),
    Column("share", "share", 6, right=True, keep=17),
    Column("cum", "cum", 5, right=True, keep=5),
    Column("error", "abs err", 8, right=True, keep=16),
    Column("total", "total err", 9, right=True, keep=11),
    Column("bias", "bias", 12, right=True, keep=15),
    Column("flag", "flag", 7, keep=12),
    Column("decided", "decided", 7, right=True, keep=13),
    Column("spark", "dem | fcst", 2 * SPARK_PERIODS + 1, keep=14),
)


def clip(text: str, limit: int = 200) -> str:
    """At most ``limit`` characters, with an ellipsis: a 1 MB cell must not stall a repaint.

    Control, bidirectional and invisible characters are shown as visible symbols
    (``text.visible``).
    """
    text = text if len(text) <= limit else text[: limit - 1] + "…"
    return visible(text)


def key_text(parts: tuple[str, ...] | str, limit: int = 200) -> str:
    """A series key for the screen: ``item @ location``, spaces at either end of each part
    shown (``A-1 `` and ``A-1`` are different series), clipped like ``clip``."""
    if isinstance(parts, str):
        parts = (parts,)
    shown = [
        _marks_apart(
            visible(p if len(p) <= limit else p[: limit - 1] + "…", edges=True).translate(
                ODD_SPACES
            )
        )
        for p in parts
    ]
    return " @ ".join(p for p in shown if p)


#: Spaces that look like a plain space but are other characters (no-break, figure, narrow
#: no-break, ideographic, ...): in a key they are shown as U+237D so "A B" and "A<NBSP>B" differ.
ODD_SPACES = str.maketrans(
    dict.fromkeys([0x00A0, 0x2007, 0x202F, 0x3000, *range(0x2000, 0x200B), 0x205F], "\u237d")
)


def _marks_apart(text: str) -> str:
    """A key not in composed form (NFC) shows each combining mark on a dotted circle (U+25CC),
    the usual way to write a mark alone, so ``e`` + U+0301 does not look like ``é``."""
    if unicodedata.is_normalized("NFC", text):
        return text
    return "".join(f"\u25cc{ch}" if unicodedata.combining(ch) else ch for ch in text)


#: ``12.3%``; empty when undefined (``text.percent``).
pct = percent


def signed_pct(value: float) -> Cell:
    """``+12.3% over`` with a style name: over and under differ in words, not only colour."""
    shown = over_under(value, 1, fraction=True, plain_zero=True)
    if not shown:
        return ("", None)
    return (shown, "over" if value > 0 else "under" if value < 0 else None)


def sparkline(demand: np.ndarray, forecast: np.ndarray) -> str:
    """Demand and forecast of the same periods side by side, on one shared scale.

    Each value becomes one of eight block heights between the joint minimum and maximum of both
    series; a missing value is a dot, never a zero.
    """
    values = np.concatenate([demand, forecast])
    finite = values[np.isfinite(values)]
    if not len(finite):
        return MISSING * len(demand) + "|" + MISSING * len(forecast)
    low, high = float(finite.min()), float(finite.max())
    span = high - low

    def draw(arr: np.ndarray) -> str:
        out = []
        for v in arr:
            if not np.isfinite(v):
                out.append(MISSING)
            elif span == 0:
                out.append(BLOCKS[3])
            else:
                out.append(BLOCKS[min(7, int((v - low) / span * 7 + 0.5))])
        return "".join(out)

    return draw(demand) + "|" + draw(forecast)


def plain(text: str, limit: int = 200) -> str:
    """Data text (an id, a reviewer's name, a path) ready for a widget: clipped, controls visible.

    Pass the result inside a ``Text`` or to ``toast``; never into markup.
    """
    return clip(str(text), limit)


def when(recorded_at: str) -> str:
    """``2026-11-30 14:05 UTC`` from the ledger's ``2026-11-30T14:05:09.123Z``."""
    text = visible(str(recorded_at))
    if len(text) >= 16 and text[10] == "T":
        return f"{text[:10]} {text[11:16]} UTC"
    return text


def outcome_label(code: str | None) -> str:
    """The words for an outcome code (``triage.core.vocabulary``), made safe to show."""
    return visible(vocabulary.outcome_label(code))


def cause_label(code: str | None, causes: tuple[Choice, ...]) -> str:
    """The words for a root-cause code from the configured list (the code if it is gone), made
    safe to show."""
    return visible(vocabulary.label_of(code, causes))


#: Longest notification, in characters: a message quoting a huge cell must not fill the screen.
TOAST_MAX = 600


def toast(
    app: App,
    message: str,
    *,
    severity: Literal["information", "warning", "error"] = "information",
    timeout: float = 10,
) -> None:
    """The one way the review screens notify: plain text, controls visible, never markup.

    Messages quote cells, headers, ids, reviewers' names and paths, so Textual's markup (on by
    default in ``App.notify``) would let ``[/]`` crash the app or ``[@click=...]`` plant an
    action.
    """
    text = visible(str(message), multiline=True)
    if len(text) > TOAST_MAX:
        text = text[: TOAST_MAX - 1] + "…"
    app.notify(text, severity=severity, timeout=timeout, markup=False)


def digit_bindings(action: str, scope: str, tooltip: str) -> list[Binding]:
    """Bindings ``1``..``9``, ``0`` to ``action(0)``..``action(9)``: the root-cause shortcuts."""
    return [
        Binding(
            digit,
            f"{action}({i})",
            f"Root cause {digit}",
            show=False,
            id=f"{scope}.cause_{digit}",
            tooltip=tooltip,
        )
        for i, digit in enumerate("1234567890")
    ]
