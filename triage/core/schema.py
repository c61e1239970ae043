"""Canonical column names and types of a loaded portfolio, in one place.

A portfolio file is long: one row per series and period (and forecast lag). After loading, every
frame uses these names whatever the file called them (see ``--columns``).
"""

from __future__ import annotations

import re
from typing import TypeGuard

ITEM = "item"
LOCATION = "location"
PERIOD = "period"
DEMAND = "demand"
FORECAST = "forecast"
PRICE = "price"
LAG = "lag"

#: Columns a portfolio file must have (after the column mapping is applied).
REQUIRED: tuple[str, ...] = (ITEM, PERIOD, DEMAND, FORECAST)
#: Columns with a fixed meaning that a file may have.
OPTIONAL: tuple[str, ...] = (LOCATION, PRICE, LAG)
#: Every column with a fixed meaning; any other column is a text attribute.
KNOWN: tuple[str, ...] = REQUIRED + OPTIONAL
#: Columns read as numbers; everything else is read as text, exactly as written.
NUMERIC: tuple[str, ...] = (DEMAND, FORECAST, PRICE)
#: Competing forecasts of the same periods: ``forecast_<name>`` columns, ``<name>`` lower-case
#: letters, digits and ``_``. Read as numbers, at the lag ``forecast`` is read at.
COMPETING_PREFIX = "forecast_"
_COMPETING = re.compile(r"forecast_[a-z0-9_]+")


def competing_name(column: str | None) -> str | None:
    """``<name>`` of a canonical competing-forecast column ``forecast_<name>``, else None."""
    if column is None or not _COMPETING.fullmatch(column):
        return None
    return column[len(COMPETING_PREFIX) :]


def looks_competing(header: str) -> bool:
    """Whether a header is written like a competing forecast (``forecast_x``, ``Forecast-X``,
    ``forecast_``), valid or not: ``forecast`` in any case, then a character that is neither a
    letter nor a digit. Such a column is never an attribute (``forecaster`` still is)."""
    return (
        len(header) > len(FORECAST)
        and header[: len(FORECAST)].lower() == FORECAST
        and not header[len(FORECAST)].isalnum()
    )


def is_canonical(name: str | None) -> TypeGuard[str]:
    """A column with a fixed meaning: one of :data:`KNOWN` or a competing forecast."""
    return name in KNOWN or competing_name(name) is not None


def is_number_column(name: str | None) -> TypeGuard[str]:
    """A column read as numbers: one of :data:`NUMERIC` or a competing forecast."""
    return name in NUMERIC or competing_name(name) is not None


#: Columns that identify a series, in sort order.
KEY_ORDER: tuple[str, ...] = (ITEM, LOCATION)

#: Columns the scorecard computes (``ranking.scorecard``), besides the key columns. A file
#: column of the same name (any case) is kept as an attribute under another name.
SCORE_COLUMNS: tuple[str, ...] = (
    "rank", "bias_rank", "periods", "demand", "forecast", "abs_error", "bias", "bias_pct",
    "wape", "mae", "rmse", "abs_error_value", "bias_value", "error_share", "cum_share",
    "tracking_signal", "bias_run", "bias_pvalue", "bias_flag", "mase", "fva", "pattern", "adi",
    "cv2",
)  # fmt: skip

#: Cell text that means "no value" in a numeric column. Text columns have no missing tokens:
#: an item called ``NA`` is an item called ``NA``.
NUMERIC_MISSING: tuple[str, ...] = (
    "",
    "NA",
    "N/A",
    "n/a",
    "#N/A",
    "-",
    "NaN",
    "nan",
    "null",
    "NULL",
)

WEEKLY = "weekly"
MONTHLY = "monthly"
