"""Test fixtures for the core: a stand-in for a loaded file and small frame builders.

``build_portfolio`` accepts any object shaped like a loaded file (frame, path, first_row,
attributes, notices and ``rows(index)``), so these tests do not depend on the file loader.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from triage.core import schema
from triage.core.portfolio import Portfolio, build_portfolio

#: First weekly period of the invented scenario (a Monday).
WEEK_ZERO = pd.Timestamp("2025-01-06")
#: First monthly period of the invented scenario.
MONTH_ZERO = pd.Timestamp("2023-01-01")


@dataclass
class FakeLoaded:
    """A loaded long frame with canonical columns, as the file loader would hand it over.

    ``rows`` maps frame positions to 1-based file line numbers: the header is on line
    ``first_row - 1`` and frame row ``i`` came from line ``first_row + i``.
    """

    frame: pd.DataFrame
    path: Path = Path("scenario/portfolio.csv")
    first_row: int = 2
    attributes: tuple[str, ...] = ()
    notices: tuple[str, ...] = field(default=())

    def rows(self, index: Sequence[int] | np.ndarray) -> list[int]:
        """File line numbers of frame positions ``index``."""
        return [self.first_row + int(i) for i in index]


def period_stamps(index: Sequence[int] | np.ndarray, freq: str) -> pd.DatetimeIndex:
    """Calendar dates of integer period numbers (0 = the scenario's first period)."""
    index = np.asarray(index, dtype=np.int64)
    if freq == schema.WEEKLY:
        return pd.DatetimeIndex(WEEK_ZERO + pd.to_timedelta(index * 7, unit="D"))
    months = MONTH_ZERO.month - 1 + index
    years = MONTH_ZERO.year + months // 12
    return pd.DatetimeIndex(
        pd.to_datetime({"year": years, "month": months % 12 + 1, "day": np.ones_like(index)})
    )


def long_frame(records: Sequence[dict[str, object]], *, freq: str = schema.WEEKLY) -> pd.DataFrame:
    """A canonical long frame from records whose ``period`` is an integer period number.

    Missing ``demand``/``forecast``/``price`` keys become NaN; text columns become ``str``.
    """
    frame = pd.DataFrame.from_records(list(records))
    frame[schema.PERIOD] = period_stamps(frame[schema.PERIOD].to_numpy(), freq)
    for name in (schema.DEMAND, schema.FORECAST):
        if name not in frame.columns:
            frame[name] = np.nan
    for name in schema.NUMERIC:
        if name in frame.columns:
            frame[name] = frame[name].astype(np.float64)
    if schema.LAG in frame.columns:
        frame[schema.LAG] = frame[schema.LAG].astype(np.int64)
    for name in frame.columns:
        if name not in (*schema.NUMERIC, schema.PERIOD, schema.LAG):
            frame[name] = frame[name].astype(str)
    return frame


def series_records(
    demand: Sequence[float | None],
    forecast: Sequence[float | None],
    *,
    item: str = "A",
    start: int = 0,
    **extra: object,
) -> list[dict[str, object]]:
    """Rows of one series over consecutive periods from ``start``; None means an empty cell."""
    out = []
    for offset, (d, f) in enumerate(zip(demand, forecast, strict=True)):
        out.append(
            {
                schema.ITEM: item,
                schema.PERIOD: start + offset,
                schema.DEMAND: np.nan if d is None else d,
                schema.FORECAST: np.nan if f is None else f,
                **extra,
            }
        )
    return out


def loaded_from(
    records: Sequence[dict[str, object]] | pd.DataFrame,
    *,
    freq: str = schema.WEEKLY,
    attributes: tuple[str, ...] = (),
) -> FakeLoaded:
    """A ``FakeLoaded`` from records (integer periods) or an already canonical frame."""
    frame = records if isinstance(records, pd.DataFrame) else long_frame(records, freq=freq)
    return FakeLoaded(frame=frame.reset_index(drop=True), attributes=attributes)


def portfolio_from(
    records: Sequence[dict[str, object]] | pd.DataFrame,
    *,
    freq: str = schema.WEEKLY,
    attributes: tuple[str, ...] = (),
    lag: int | None = None,
) -> Portfolio:
    """Build a portfolio straight from records or a canonical frame."""
    return build_portfolio(loaded_from(records, freq=freq, attributes=attributes), lag=lag)
