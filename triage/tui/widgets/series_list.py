"""A virtual list of series: renders only the visible lines, whatever the portfolio size."""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import ClassVar

import numpy as np
from rich.cells import cell_len, set_cell_size
from rich.segment import Segment
from rich.style import Style
from textual import events
from textual.binding import Binding, BindingType
from textual.geometry import Size
from textual.message import Message
from textual.reactive import reactive
from textual.scroll_view import ScrollView
from textual.strip import Strip


@dataclass(frozen=True)
class Column:
    """One column of the list."""

    key: str
    """Name the row formatter fills."""
    label: str
    """Header text."""
    width: int
    """Width in terminal cells."""
    right: bool = False
    """Right-align (numbers)."""
    keep: int = 0
    """Higher keeps the column longer when the terminal is narrow."""


#: A cell: the text and an optional style name from ``SeriesList.COMPONENT_CLASSES``.
Cell = tuple[str, str | None]
RowFormatter = Callable[[int], dict[str, Cell]]


class RowList(ScrollView, can_focus=True):
    """Rows (series or groups) in review order, one per line, drawn on demand from the core's
    arrays.

    The list never holds widgets or strings for every row: ``render_line`` formats the few
    visible rows through ``formatter`` and keeps a small cache of them.

    | Key | Action |
    | --- | --- |
    | down, j | next series |
    | up, k | previous series |
    | pagedown, pageup | one screen down / up |
    | home, end | first / last series |
    """

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("down,j", "cursor(1)", "Down", show=False, id="list.down", tooltip="Next series"),
        Binding("up,k", "cursor(-1)", "Up", show=False, id="list.up", tooltip="Previous series"),
        Binding(
            "pagedown",
            "page(1)",
            "Page down",
            show=False,
            id="list.pagedown",
            tooltip="One screen down",
        ),
        Binding(
            "pageup", "page(-1)", "Page up", show=False, id="list.pageup", tooltip="One screen up"
        ),
        Binding(
            "home", "jump(0)", "First", show=False, id="list.first", tooltip="The worst offender"
        ),
        Binding(
            "end", "jump(-1)", "Last", show=False, id="list.last", tooltip="The last series shown"
        ),
    ]

    COMPONENT_CLASSES: ClassVar[set[str]] = {
        "series-list--header",
        "series-list--cursor",
        "series-list--over",
        "series-list--under",
        "series-list--flag",
        "series-list--done",
        "series-list--dim",
    }

    DEFAULT_CSS = """
    RowList {
        height: 1fr;
        overflow-x: hidden;
        scrollbar-size-vertical: 1;
    }
    RowList > .series-list--header { text-style: bold; background: $panel; }
    RowList > .series-list--cursor { background: $accent 40%; }
    RowList:focus > .series-list--cursor { background: $accent; color: $text; }
    RowList > .series-list--over { color: $warning; }
    RowList > .series-list--under { color: $secondary; }
    RowList > .series-list--flag { text-style: bold; }
    RowList > .series-list--done { color: $success; }
    RowList > .series-list--dim { color: $text-muted; }
    """

    cursor: reactive[int] = reactive(0, always_update=True)
    """Position of the highlighted line within the current order."""

    class Highlighted(Message):
        """The highlighted row changed (each kind of list posts its own subclass)."""

        def __init__(self, series: int | None) -> None:
            super().__init__()
            self.series = series
            """The row's index (a series' portfolio index, a group's number), None when the
            list is empty."""

    def __init__(
        self,
        columns: Sequence[Column],
        formatter: RowFormatter,
        *,
        cache_size: int = 512,
        name: str | None = None,
        id: str | None = None,
        classes: str | None = None,
    ) -> None:
        super().__init__(name=name, id=id, classes=classes)
        self._all_columns = tuple(columns)
        self._formatter = formatter
        self._order = np.zeros(0, dtype=np.int64)
        self._cache: OrderedDict[int, dict[str, Cell]] = OrderedDict()
        self._cache_size = cache_size
        self._fitted: tuple[Column, ...] = self._all_columns
        self._fitted_width = -1
        self._strips: OrderedDict[tuple[int, bool, int], Strip] = OrderedDict()

    # -- data -------------------------------------------------------------------------------

    @property
    def order(self) -> np.ndarray:
        """Portfolio indices of the series shown, in display order."""
        return self._order

    @property
    def current(self) -> int | None:
        """Portfolio index of the highlighted series."""
        if not len(self._order):
            return None
        return int(self._order[min(self.cursor, len(self._order) - 1)])

    def set_order(self, order: np.ndarray, *, keep: int | None = None) -> None:
        """Show ``order`` (portfolio indices); keep series ``keep`` highlighted if it is shown."""
        self._order = np.asarray(order, dtype=np.int64)
        self.virtual_size = Size(self.size.width, len(self._order) + 1)
        target = 0
        if keep is not None and len(self._order):
            hits = np.flatnonzero(self._order == keep)
            if len(hits):
                target = int(hits[0])
        self.cursor = target
        self.refresh()

    def set_columns(self, columns: Sequence[Column]) -> None:
        """Show another set of columns (another order shows what it sorts by)."""
        self._all_columns = tuple(columns)
        self._fitted_width = -1
        self.invalidate()

    def invalidate(self, series: int | None = None) -> None:
        """Forget cached text for one series (or all) after its data changed, and repaint."""
        if series is None:
            self._cache.clear()
            self._strips.clear()
        else:
            self._cache.pop(series, None)
            for key in [k for k in self._strips if k[0] == series]:
                del self._strips[key]
        self.refresh()

    # -- cursor -----------------------------------------------------------------------------

    def validate_cursor(self, value: int) -> int:
        return max(0, min(value, len(self._order) - 1)) if len(self._order) else 0

    def watch_cursor(self, old: int, new: int) -> None:
        top = int(self.scroll_y)
        self._scroll_cursor_into_view()
        if int(self.scroll_y) == top:
            # Only the two lines whose highlight changed are drawn again (line 0 is the header).
            self.refresh_line(old + 1)
            self.refresh_line(new + 1)
        else:
            self.refresh()
        self.post_message(self.Highlighted(self.current))

    def action_cursor(self, step: int) -> None:
        self.cursor += step

    def action_page(self, direction: int) -> None:
        self.cursor += direction * max(1, self.scrollable_content_region.height - 2)

    def action_jump(self, where: int) -> None:
        self.cursor = len(self._order) - 1 if where < 0 else where

    def _scroll_cursor_into_view(self) -> None:
        height = max(1, self.scrollable_content_region.height - 1)
        top = int(self.scroll_y)
        if self.cursor < top:
            self.scroll_to(y=self.cursor, animate=False, immediate=True)
        elif self.cursor >= top + height:
            self.scroll_to(y=self.cursor - height + 1, animate=False, immediate=True)

    async def _on_click(self, event: events.Click) -> None:
        line = event.y - 1 + int(self.scroll_y)
        if event.y >= 1 and 0 <= line < len(self._order):
            self.cursor = line

    def notify_style_update(self) -> None:
        # Focus and theme changes restyle every line.
        self._strips.clear()
        super().notify_style_update()

    def on_resize(self, event: events.Resize) -> None:
        self.virtual_size = Size(event.size.width, len(self._order) + 1)
        self._scroll_cursor_into_view()

    # -- rendering --------------------------------------------------------------------------

    def _columns_for(self, width: int) -> tuple[Column, ...]:
        """Drop the least important columns until the rest fit ``width``."""
        if width == self._fitted_width:
            return self._fitted
        columns = list(self._all_columns)
        while len(columns) > 1 and sum(c.width + 1 for c in columns) - 1 > width:
            drop = min(range(len(columns)), key=lambda i: (columns[i].keep, -i))
            columns.pop(drop)
        self._fitted, self._fitted_width = tuple(columns), width
        return self._fitted

    def _row_cells(self, series: int) -> dict[str, Cell]:
        cells = self._cache.get(series)
        if cells is None:
            cells = self._formatter(series)
            self._cache[series] = cells
            if len(self._cache) > self._cache_size:
                self._cache.popitem(last=False)
        else:
            self._cache.move_to_end(series)
        return cells

    def render_line(self, y: int) -> Strip:
        width = self.scrollable_content_region.width
        columns = self._columns_for(width)
        base = self.rich_style
        if y == 0:
            style = base + self.get_component_rich_style("series-list--header")
            cells: dict[str, tuple[str, str | None]] = {c.key: (c.label, None) for c in columns}
            return self._strip(columns, cells, width, style, header=True)
        line = int(self.scroll_y) + y - 1
        if line >= len(self._order):
            return Strip.blank(width, base)
        series = int(self._order[line])
        key = (series, line == self.cursor, width)
        strip = self._strips.get(key)
        if strip is not None:
            self._strips.move_to_end(key)
            return strip
        row_style = base
        if line == self.cursor:
            row_style = base + self.get_component_rich_style("series-list--cursor")
        strip = self._strip(columns, self._row_cells(series), width, row_style, header=False)
        self._strips[key] = strip
        if len(self._strips) > self._cache_size:
            self._strips.popitem(last=False)
        return strip

    def _strip(
        self,
        columns: tuple[Column, ...],
        cells: dict[str, Cell],
        width: int,
        style: Style,
        *,
        header: bool,
    ) -> Strip:
        segments: list[Segment] = []
        for i, column in enumerate(columns):
            text, kind = cells.get(column.key, ("", None))
            # Data text is placed as plain segments: never parsed as markup.
            if cell_len(text) > column.width:
                text = set_cell_size(text, column.width - 1) + "…"
            pad = column.width - cell_len(text)
            text = " " * pad + text if column.right else text + " " * pad
            cell_style = style
            if kind and not header:
                cell_style = style + self.get_component_rich_style(f"series-list--{kind}")
            if i:
                segments.append(Segment(" ", style))
            segments.append(Segment(text, cell_style))
        strip = Strip(segments)
        return strip.adjust_cell_length(width, style)


class SeriesList(RowList):
    """Series in review order (see :class:`RowList`)."""

    class Highlighted(RowList.Highlighted):
        """The highlighted series changed."""


class GroupList(RowList):
    """Groups of series in review order (see :class:`RowList`); rows are group numbers."""

    class Highlighted(RowList.Highlighted):
        """The highlighted group changed."""
