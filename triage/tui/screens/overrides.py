"""Did past overrides help? The realised value of adjustments, by grouping, with FVA for context."""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any, ClassVar

import pandas as pd
from rich.console import Console, ConsoleOptions, Group, RenderableType, RenderResult
from rich.measure import Measurement
from rich.table import Table
from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding, BindingType
from textual.containers import Vertical, VerticalScroll
from textual.widgets import Static

from triage.core import words
from triage.core.read.messages import plural
from triage.core.text import number, percent
from triage.core.vocabulary import Choice
from triage.tui import format as fmt
from triage.tui.screens.base import Dialog

TITLES = {
    "direction": "by direction (up = forecast raised)",
    "size": "by size of the change, relative to the original forecast",
    "reviewer": "by reviewer",
    "root_cause": "by root cause",
    "cycle": "by review cycle",
    "group": "by group decision (a series decision's own lines last)",
}


def compared_with_stat(frame: pd.DataFrame) -> bool:
    """Whether a summary holds lines valued against the statistical forecast."""
    return "stat_adjustments" in frame and float(frame["stat_adjustments"].fillna(0).sum()) > 0


#: The measure columns of a grouping's table: (header, compact header or "" where the compact
#: table leaves the column out, the cell of a summary row, which tables have it). The compact
#: headers are for narrow terminals (80 columns): no word longer than 7 characters, so every
#: word shows whole when the header wraps; the counts of decisions and of periods that helped
#: are left out there (the sentence above the tables gives them, and "share helped" the rate).
_MEASURES: tuple[tuple[str, str, Callable[[dict[str, Any]], str], str], ...] = (
    ("periods", "periods", lambda r: str(int(r["adjustments"])), ""),
    ("decisions", "", lambda r: str(int(r["decisions"])), ""),
    ("helped", "", lambda r: str(int(r["helped"])), ""),
    ("share helped", "share helped", lambda r: percent(r["share_helped"], 0), ""),
    (
        "error removed (units)",
        "removed (units)",
        lambda r: number(r["value_added"], 1, signed=True),
        "",
    ),
    ("in value", "removed (value)", lambda r: number(r["value_added_value"], signed=True), "$"),
    (
        "of original error",
        "of orig. error",
        lambda r: percent(r["relative_value_added"], signed=True),
        "",
    ),
    (
        "beat stat by",
        "beat stat (units)",
        lambda r: number(r["value_added_vs_stat"], 1, signed=True),
        "s",
    ),
    (
        "beat stat (value)",
        "beat stat (value)",
        lambda r: number(r["value_added_vs_stat_value"], signed=True),
        "$s",
    ),
)


def summary_table(
    by: str,
    frame: pd.DataFrame,
    priced: bool,
    causes: tuple[Choice, ...] = (),
    *,
    compact: bool = False,
) -> Table:
    """One grouping of ``history.summarise`` as a Rich table (data as ``Text``, never markup).

    Root causes appear as their labels, never as codes. With lines valued against the
    statistical forecast, two more columns: how much the overrides beat it by. Each number
    column is as wide as its longest header word or cell, so neither is ever cut; the first
    column takes what is left and wraps. ``compact``: the narrow terminal's table (short
    headers, fewer columns).
    """
    stat = compared_with_stat(frame)
    kept = [
        (wide, short, cell)
        for wide, short, cell, needs in _MEASURES
        if (priced or "$" not in needs) and (stat or "s" not in needs) and (short or not compact)
    ]
    rows: list[list[Text | str]] = []
    for row in frame.itertuples(index=False):
        rec = row._asdict()
        shown = str(rec[by])
        if by == "root_cause":
            shown = fmt.cause_label(shown, causes)
        rows.append([Text(fmt.plain(shown)), *(cell(rec) for _, _, cell in kept)])
    table = Table(
        title=TITLES.get(by, by),
        title_justify="left",
        box=None,
        header_style="bold",
        collapse_padding=compact,
        pad_edge=not compact,
    )
    # Each number column as wide as its longest header word or cell: the header wraps between
    # words and nothing is cut; the first column takes the rest and wraps its labels.
    table.add_column(by.replace("_", " "), overflow="fold")
    for index, (wide, short, _) in enumerate(kept, start=1):
        header = short if compact else wide
        longest_word = max(len(word) for word in header.split())
        width = max([longest_word, *(len(str(r[index])) for r in rows)])
        table.add_column(header, justify="right", width=width)
    for cells in rows:
        table.add_row(*cells)
    return table


class SummaryTable:
    """A grouping's table that fits the width it is drawn at: the full headers where every
    word and number shows whole (the labels' longest word included), else the compact table
    (``summary_table``)."""

    def __init__(
        self, by: str, frame: pd.DataFrame, priced: bool, causes: tuple[Choice, ...] = ()
    ) -> None:
        self.wide = summary_table(by, frame, priced, causes)
        self.compact = summary_table(by, frame, priced, causes, compact=True)

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        # The width below which the full table would cut a word or a number.
        needed = Measurement.get(console, options.update(max_width=10_000), self.wide).minimum
        yield self.wide if needed <= options.max_width else self.compact


def _net(removed: float, unit: str) -> str:
    """``the overrides removed 12.0 units of error`` / ``added``, in words."""
    if removed is None or math.isnan(removed):
        return ""
    verb = "removed" if removed >= 0 else "added"
    return f"The overrides {verb} {abs(removed):,.1f} {unit} of error. "


class OverridesScreen(Dialog[None]):
    """The realised value of past overrides: positive error removed means the override helped."""

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("escape,q,v", "close", "Close", id="overrides.close", tooltip="Back to the list")
    ]

    def __init__(
        self,
        tables: dict[str, pd.DataFrame],
        fva: dict[str, float],
        priced: bool,
        causes: tuple[Choice, ...] = (),
        stat_name: str = "",
    ) -> None:
        super().__init__()
        self._stat_name = stat_name
        self._tables = tables
        self._fva = fva
        self._priced = priced
        self._causes = causes

    def compose(self) -> ComposeResult:
        with Vertical(classes="dialog help"):
            yield Static(Text("Did past overrides help?", style="bold"), classes="dialog-title")
            with VerticalScroll():
                yield Static(Group(*self.parts()))
            yield Static(Text("escape, q or v: close"), classes="dialog-keys")

    def parts(self) -> list[RenderableType]:
        """What the screen says, in order: sentences (``Text``) and tables."""
        overall = self._tables.get("direction")
        parts: list[RenderableType] = []
        if overall is None or overall.empty or int(overall.iloc[-1]["adjustments"]) == 0:
            parts.append(
                Text("No past adjustment has actuals yet: come back once its periods have passed.")
            )
        else:
            total = overall.iloc[-1]
            parts.append(
                Text(
                    f"{plural(int(total['adjustments']), 'overridden period')} from "
                    f"{plural(int(total['decisions']), 'decision')} "
                    f"now {'has' if int(total['adjustments']) == 1 else 'have'} actuals; "
                    f"{total['share_helped'] * 100:.0f}% of them helped. "
                    + _net(total["value_added"], "units")
                    + (_net(total["value_added_value"], "in value") if self._priced else "")
                )
            )
            if compared_with_stat(overall):
                beat = float(total["value_added_vs_stat"])
                parts.append(
                    Text(
                        f"Against the statistical forecast (forecast_{fmt.plain(self._stat_name)}),"
                        f" over the {int(total['stat_adjustments'])} periods it has a value for: "
                        f"the overrides {'beat' if beat >= 0 else 'did worse than'} it by "
                        f"{abs(beat):,.1f} units ('beat stat' below; positive = the override "
                        "was closer to the actual)."
                    )
                )
            if self._priced:
                mix = words.mix_effect(total["value_added"], total["value_added_value"])
                if mix:
                    parts.append(Text(mix.capitalize() + "."))
            parts.append(Text(f"AvgRelMAE: {words.MEANINGS['AvgRelMAE']}.", style="dim"))
            for by, frame in self._tables.items():
                parts.append(Text(""))
                parts.append(SummaryTable(by, frame, self._priced, self._causes))
        fva = self._fva
        parts.append(Text(""))
        if not fva:
            parts.append(
                Text(
                    "This cycle's forecast against the naive forecast is not shown in a review "
                    "on a stored scorecard (it adds up every series' history): triage compare "
                    "DATASET --engine dask gives it."
                )
            )
            return parts
        parts.append(
            Text(
                "For context, this cycle's forecast against the naive forecast: "
                f"{words.against_naive(fva.get('value_added', math.nan))} over the window "
                f"(relative error {fva.get('relative_error', math.nan):.3f}); "
                f"{int(fva.get('series_worse_than_naive', 0)):,} series worse than naive."
            )
        )
        return parts

    def action_close(self) -> None:
        self.dismiss(None)
