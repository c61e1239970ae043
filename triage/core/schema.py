"""Canonical column names and types of a loaded portfolio, in one place.

A portfolio file is long: one row per series and period (and forecast lag). After loading, every
frame uses these names whatever the file called them (see ``--columns``).
"""

from __future__ import annotations

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
