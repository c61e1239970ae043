"""Demand against forecast for one series, drawn with plotext on a figure of its own."""

from __future__ import annotations

import numpy as np
from plotext._figure import _figure_class
from rich.text import Text
from textual.widgets import Static

from triage.core.review import ChartSeries
from triage.core.text import visible


def _segments(values: np.ndarray) -> list[tuple[np.ndarray, np.ndarray]]:
    """Contiguous runs of finite values, so a gap is drawn as a gap, never as a zero."""
    finite = np.isfinite(values)
    if not finite.any():
        return []
    idx = np.flatnonzero(finite)
    breaks = np.flatnonzero(np.diff(idx) > 1) + 1
    return [(run, values[run]) for run in np.split(idx, breaks)]


#: Marker and colour of each competing forecast, in file order (cycled when there are more):
#: every line differs in its marker as well as its colour, so the legend reads without colour.
OTHER_STYLES: tuple[tuple[str, str], ...] = (
    ("x", "magenta"),
    ("*", "blue"),
    ("o", "yellow"),
    ("#", "white"),
    ("%", "gray"),
)

#: Periods with actuals the chart shows by default (the scoring window with context before it).
RECENT_PERIODS = 26
#: With clipping on, values above this multiple of the shown values' 90th percentile are cut.
CLIP_FACTOR = 2.0


def first_shown(data: ChartSeries, whole: bool) -> int:
    """First period drawn: the whole history, or the last ``RECENT_PERIODS`` with actuals."""
    if whole:
        return 0
    return max(0, min(data.window_start, data.last_actual + 1 - RECENT_PERIODS))


def clip_level(values: list[np.ndarray]) -> float | None:
    """The level a spike is cut at: ``CLIP_FACTOR`` x the 90th percentile of the shown values
    (None when nothing rises above it)."""
    pooled = np.concatenate([v[np.isfinite(v)] for v in values]) if values else np.array([])
    if not len(pooled):
        return None
    level = CLIP_FACTOR * float(np.quantile(np.abs(pooled), 0.9))
    return level if level > 0 and float(np.abs(pooled).max()) > level else None


def render_chart(
    data: ChartSeries,
    width: int,
    height: int,
    *,
    whole: bool = False,
    clip: bool = False,
    others: bool = True,
) -> Text:
    """Draw the chart as Rich text (plotext's ANSI output, decoded; no markup involved).

    Args:
        data: The series' arrays.
        width: Cells across.
        height: Rows.
        whole: Draw the whole history; else the last ``RECENT_PERIODS`` with actuals and the
            forward periods.
        clip: Cut spikes at ``clip_level`` so the rest stays readable; cut points are drawn
            with their own marker and the legend says so.
        others: Overlay the file's competing forecasts (``data.others``), each in its own
            marker and colour, named in the legend.
    """
    start = first_shown(data, whole)
    demand = np.asarray(data.demand, dtype=float)[start:]
    forecast = np.asarray(data.forecast, dtype=float)[start:]
    adjusted = None if data.adjusted is None else np.asarray(data.adjusted, dtype=float)[start:]
    rivals = [
        (visible(name), np.asarray(values, dtype=float)[start:])
        for name, values in (data.others if others else ())
    ]
    shown = [demand, forecast] + ([adjusted] if adjusted is not None else [])
    shown += [values for _, values in rivals]
    level = clip_level(shown) if clip else None
    cut: list[tuple[np.ndarray, np.ndarray]] = []
    if level is not None:
        for values in shown:
            over = np.flatnonzero(np.isfinite(values) & (values > level))
            if len(over):
                cut.append((over, np.full(len(over), level)))
            values[over] = level
    fig = _figure_class()
    # plotext caps a figure at the size of the terminal it detects; the widget knows better.
    fig._limit_size(False, False)
    fig.plot_size(max(width, 20), max(height, 6))
    fig.theme("clear")
    # Drawn in this order, later lines on top: the forecast under review over the others.
    series = [("demand", demand, "hd", "cyan")]
    for i, (name, values) in enumerate(rivals):
        marker, color = OTHER_STYLES[i % len(OTHER_STYLES)]
        series.append((name, values, marker, color))
    series.append(("forecast", forecast, "dot", "orange"))
    if adjusted is not None:
        series.append(("adjusted", adjusted, "+", "green"))
    drew = False
    for label, values, marker, color in series:
        for i, (x, y) in enumerate(_segments(values)):
            fig.plot(
                x.tolist(), y.tolist(), marker=marker, color=color, label=label if i == 0 else None
            )
            drew = True
    if not drew:
        return Text("no values to draw for this series")
    for i, (x, y) in enumerate(cut):
        mark = f"clipped at {level:,.0f}" if i == 0 else None
        fig.scatter(x.tolist(), y.tolist(), marker="▲", color="red", label=mark)
    fig.vertical_line(data.window_start - start - 0.5, color="gray")
    fig.vertical_line(data.last_actual - start + 0.5, color="gray")
    n = len(data.labels) - start
    ticks = sorted(
        {
            0,
            n - 1,
            *np.linspace(0, n - 1, num=max(2, min(5, width // 16))).round().astype(int).tolist(),
        }
    )
    fig.xticks(ticks, [data.labels[start + t] for t in ticks])
    return Text.from_ansi(fig.build())


class SeriesChart(Static):
    """A plotext chart of demand, forecast, the adjusted forward forecast and (when the file
    has them) the competing forecasts."""

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
        self._drawn: tuple[int, int, int, bool, bool, bool] | None = None
        self.whole = False
        """Draw the whole history instead of the recent periods and the forward horizon."""
        self.clip = False
        """Cut spikes so the window and the forecast stay readable."""
        self.others = True
        """Overlay the competing forecasts of the file."""

    def set_view(self, *, whole: bool, clip: bool, others: bool) -> None:
        """Zoom out or in, clip spikes or not, overlay the other forecasts or not; redraws."""
        self.whole, self.clip, self.others = whole, clip, others
        self._redraw()

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
        key = (id(self._data), width, height, self.whole, self.clip, self.others)
        if key == self._drawn:
            return
        self._drawn = key
        self.update(
            render_chart(
                self._data, width, height, whole=self.whole, clip=self.clip, others=self.others
            ),
            layout=False,
        )
