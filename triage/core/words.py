"""Measures in a planner's words: one place for the phrasing the screens and the report share.

Forecast value added (FVA) is the error the forecast removes compared with the naive forecast
(Gilliland 2010, see docs/metrics.md): positive means better than naive, and it is said that way
("beat naive by 23 units a week") rather than as a signed error.
"""

from __future__ import annotations

import math

from triage.core.text import number

#: One-line meanings of the measures a planner meets on screen (detail pane and help).
MEANINGS = {
    "MASE": "error against a naive forecast's typical miss; below 1 beats naive",
    "sign test p": "chance of this many misses one way if the forecast were unbiased; "
    "small = persistent bias",
    "tracking signal": "running error over mean absolute error; far from 0 = drifting one way",
    "AvgRelMAE": "overrides' error over the original forecasts' (geometric mean); "
    "below 1 = overrides helped",
    "FVA": "error removed compared with the naive forecast (last period's actual)",
}


def against_naive(units: float, per: str = "") -> str:
    """Forecast value added in words: ``beat naive by 23 units a week`` / ``… worse than naive``.

    Args:
        units: Error removed against the naive forecast (positive = better than naive).
        per: ``" a week"`` or ``" a month"`` when ``units`` is per period.
    """
    if units is None or math.isnan(units):
        return "no comparison with naive (no earlier actual)"
    if round(units, 1) == 0:
        return "as good as naive"
    if units > 0:
        return f"beat naive by {number(abs(units), 1)} units{per}"
    return f"{number(abs(units), 1)} units{per} worse than naive"


def mix_effect(units: float, value: float) -> str:
    """Why units and value can disagree in sign; empty when they agree."""
    if any(v is None or math.isnan(v) for v in (units, value)) or units * value >= 0:
        return ""
    better = "cheaper" if units > 0 else "dearer"
    return (
        f"units and value disagree: the gains were on {better} items and the losses on the "
        "others (a mix effect), so judge by value where prices matter"
    )
