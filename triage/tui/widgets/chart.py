"""Demand against forecast for one series, drawn with plotext on a figure of its own."""

from __future__ import annotations

import numpy as np
from plotext._figure import _figure_class
from rich.text import Text
from textual.widgets import Static

from triage.core.review import ChartSeries


def _segments(values: np.ndarray) -> list[tuple[np.ndarray, np.ndarray]]:
    """Contiguous runs of finite values, so a gap is drawn as a gap, never as a zero."""
    finite = np.isfinite(values)
    if not finite.any():
        return []
    idx = np.flatnonzero(finite)
    breaks = np.flatnonzero(np.diff(idx) > 1) + 1
    return [(run, values[run]) for run in np.split(idx, breaks)]


def render_chart(data: ChartSeries, width: int, height: int) -> Text:
    """Draw the chart as Rich text (plotext's ANSI output, decoded; no markup involved)."""
    fig = _figure_class()
    # plotext caps a figure at the size of the terminal it detects; the widget knows better.
    fig._limit_size(False, False)
    fig.plot_size(max(width, 20), max(height, 6))
    fig.theme("clear")
    series = [
        ("demand", data.demand, "hd", "cyan"),
        ("forecast", data.forecast, "dot", "orange"),
    ]
    if data.adjusted is not None:
        series.append(("adjusted", data.adjusted, "+", "green"))
    drew = False
    for label, values, marker, color in series:
        for i, (x, y) in enumerate(_segments(np.asarray(values, dtype=float))):
            fig.plot(
                x.tolist(), y.tolist(), marker=marker, color=color, label=label if i == 0 else None
            )
            drew = True
    if not drew:
        return Text("no values to draw for this series")
    fig.vertical_line(data.window_start - 0.5, color="gray")
    fig.vertical_line(data.last_actual + 0.5, color="gray")
    n = len(data.labels)
    ticks = sorted(
        {
            0,
            n - 1,
            *np.linspace(0, n - 1, num=max(2, min(5, width // 16))).round().astype(int).tolist(),
        }
    )
    fig.xticks(ticks, [data.labels[t] for t in ticks])
    return Text.from_ansi(fig.build())


class SeriesChart(Static):
    """A plotext chart of demand, forecast and the adjusted forward forecast."""

    DEFAULT_CSS = """
    SeriesChart {
        width: 1fr;
        height: 1fr;
        min-height: 6;
    }
    """

    def __init__(self, *, id: str | None = None, classes: str | None = None) -> None:
        super().__init__("", id=id, classes=classes, markup=False)
        self._data: ChartSeries | None = None
        self._drawn: tuple[int, int, int] | None = None

    def show(self, data: ChartSeries | None) -> None:
        """Draw ``data`` (None clears the chart)."""
        self._data = data
        self._drawn = None
        self._redraw()

    def on_resize(self) -> None:
        self._redraw()

    def _redraw(self) -> None:
        width, height = self.content_size
        if self._data is None or width <= 0 or height <= 0:
            self.update("", layout=False)
            return
        key = (id(self._data), width, height)
        if key == self._drawn:
            return
        self._drawn = key
        self.update(render_chart(self._data, width, height), layout=False)
