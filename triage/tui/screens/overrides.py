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
    "group": "by group decision (a series decision's own lines last)",
}


def compared_with_stat(frame: pd.DataFrame) -> bool:
    """Whether a summary holds lines valued against the statistical forecast."""
    return "stat_adjustments" in frame and float(frame["stat_adjustments"].fillna(0).sum()) > 0


def summary_table(
    by: str, frame: pd.DataFrame, priced: bool, causes: tuple[Choice, ...] = ()
) -> Table:
    """One grouping of ``history.summarise`` as a Rich table (data as ``Text``, never markup).

    Root causes appear as their labels, never as codes. With lines valued against the
    statistical forecast, two more columns: how much the overrides beat it by.
    """
    stat = compared_with_stat(frame)
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
        *([("beat stat by", True)] if stat else []),
        *([("beat stat (value)", True)] if stat and priced else []),
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
            *([number(rec["value_added_vs_stat"], 1, signed=True)] if stat else []),
            *([number(rec["value_added_vs_stat_value"], signed=True)] if stat and priced else []),
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
                    f"{int(total['adjustments'])} overridden periods from "
                    f"{int(total['decisions'])} decisions "
                    f"now have actuals; {total['share_helped'] * 100:.0f}% of them helped. "
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
                        f"{abs(beat):,.1f} units ('beat stat by' below; positive = the override "
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
        return parts

    def action_close(self) -> None:
        self.dismiss(None)
