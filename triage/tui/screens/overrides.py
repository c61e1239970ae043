"""Did past overrides help? The realised value of adjustments, by grouping, with FVA for context."""

from __future__ import annotations

import math
from typing import ClassVar

import pandas as pd
from rich.console import Group, RenderableType
from rich.table import Table
from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding, BindingType
from textual.containers import Vertical, VerticalScroll
from textual.widgets import Static

from triage.core import words
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
}


def summary_table(
    by: str, frame: pd.DataFrame, priced: bool, causes: tuple[Choice, ...] = ()
) -> Table:
    """One grouping of ``history.summarise`` as a Rich table (data as ``Text``, never markup).

    Root causes appear as their labels, never as codes.
    """
    table = Table(title=TITLES.get(by, by), title_justify="left", box=None, header_style="bold")
    for name, right in [
        (by.replace("_", " "), False),
        ("periods", True),
        ("decisions", True),
        ("helped", True),
        ("share helped", True),
        ("error removed (units)", True),
        *([("in value", True)] if priced else []),
        ("of original error", True),
    ]:
        table.add_column(name, justify="right" if right else "left")
    for row in frame.itertuples(index=False):
        rec = row._asdict()
        shown = str(rec[by])
        if by == "root_cause":
            shown = fmt.cause_label(shown, causes)
        table.add_row(
            Text(fmt.plain(shown)),
            str(int(rec["adjustments"])),
            str(int(rec["decisions"])),
            str(int(rec["helped"])),
            percent(rec["share_helped"], 0),
            number(rec["value_added"], 1, signed=True),
            *([number(rec["value_added_value"], signed=True)] if priced else []),
            percent(rec["relative_value_added"], signed=True),
        )
    return table


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
    ) -> None:
        super().__init__()
        self._tables = tables
        self._fva = fva
        self._priced = priced
        self._causes = causes

    def compose(self) -> ComposeResult:
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
                    f"{int(total['adjustments'])} overridden periods from "
                    f"{int(total['decisions'])} decisions "
                    f"now have actuals; {total['share_helped'] * 100:.0f}% of them helped. "
                    + _net(total["value_added"], "units")
                    + (_net(total["value_added_value"], "in value") if self._priced else "")
                )
            )
            if self._priced:
                mix = words.mix_effect(total["value_added"], total["value_added_value"])
                if mix:
                    parts.append(Text(mix.capitalize() + "."))
            parts.append(Text(f"AvgRelMAE: {words.MEANINGS['AvgRelMAE']}.", style="dim"))
            for by, frame in self._tables.items():
                parts.append(Text(""))
                parts.append(summary_table(by, frame, self._priced, self._causes))
        fva = self._fva
        parts.append(Text(""))
        parts.append(
            Text(
                "For context, this cycle's forecast against the naive forecast: "
                f"{words.against_naive(fva.get('value_added', math.nan))} over the window "
                f"(relative error {fva.get('relative_error', math.nan):.3f}); "
                f"{int(fva.get('series_worse_than_naive', 0)):,} series worse than naive."
            )
        )
        with Vertical(classes="dialog help"):
            yield Static(Text("Did past overrides help?", style="bold"), classes="dialog-title")
            with VerticalScroll():
                yield Static(Group(*parts))
            yield Static(Text("escape, q or v: close"), classes="dialog-keys")

    def action_close(self) -> None:
        self.dismiss(None)
