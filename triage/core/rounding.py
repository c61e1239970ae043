"""The precision of the numbers triage computes, before they leave in a file: one rule, here.

An adjusted forecast is a computed float (``95 * 1.07``), so it carries binary noise
(``101.65000000000001``) or more decimals than the planning system keeps. The export rounds
every value triage computed: the adjusted forecast of each adjusted period, and the decisions'
``units_change`` and ``value_change``. The file's own forecast passes through unchanged.
docs/export.md ("Precision") states the rule for users.

* **How many decimals** (``--round``): ``file`` (the default) uses as many as the portfolio's
  forward forecast uses, the smallest ``d`` such that every forward forecast value has at most
  ``d`` decimals, capped at ``MAX_DECIMALS``; ``units`` is 0 (whole units); a number ``N`` is
  N decimals (0 to ``MAX_DECIMALS``).
* **How**: half away from zero, as a spreadsheet's ROUND, applied to the value's shortest
  decimal form (the text Python's ``repr`` gives, which reads back as the same float): 2.675 →
  2.68, 101.65 → 102 (at 0 decimals), -0.5 → -1, 3.4760000000000004 → 3.476.

The ledger keeps the values as decided (its history is never rewritten); rounding is a property
of the file written, so it lives at export and nowhere else.
"""

from __future__ import annotations

import re
from decimal import ROUND_HALF_UP, Decimal

import numpy as np
from numpy.typing import ArrayLike

from triage.core.errors import TriageError

#: ``--round file``: as many decimals as the portfolio's forward forecast uses.
FILE = "file"
#: ``--round units``: whole units.
UNITS = "units"
#: The default precision of exported values.
DEFAULT = FILE
#: Most decimals kept, detected or asked for. Float64 noise starts near the 16th significant
#: digit, so six decimals keep values up to a billion free of it; no quantity needs more.
MAX_DECIMALS = 6

Rounding = str | int
"""``FILE``, or a number of decimals (``UNITS`` is read as 0)."""

#: Beyond this magnitude (after scaling) a float has no fractional digits left to round.
_EXACT = 2.0**52


def parse_rounding(text: str | int) -> Rounding:
    """Read a ``--round`` value: ``file``, ``units`` or a number of decimals.

    Raises:
        TriageError: Anything else, or a number outside 0 to ``MAX_DECIMALS``.
    """
    hint = (
        f"Use --round file (as many decimals as the file's forecast, the default), --round "
        f"units (whole units), or --round N with N from 0 to {MAX_DECIMALS}."
    )
    if isinstance(text, int) and not isinstance(text, bool):
        value = str(text)
    elif isinstance(text, str):
        value = text.strip().lower()
    else:
        raise TriageError(f"--round must be text or a number, not {type(text).__name__}.")
    if value == FILE:
        return FILE
    if value == UNITS:
        return 0
    if re.fullmatch(r"\d+", value):
        decimals = int(value)
        if decimals <= MAX_DECIMALS:
            return decimals
        raise TriageError(f"--round {value}: at most {MAX_DECIMALS} decimals.", hint=hint)
    raise TriageError(f"--round {text!r} is not file, units or a number of decimals.", hint=hint)


def decimals_used(values: ArrayLike, cap: int = MAX_DECIMALS) -> int:
    """The fewest decimals that write every finite value exactly, at most ``cap``.

    A value read from text with ``d`` decimals is the float nearest that decimal, and
    ``np.round(v, d)`` gives back that very float, so ``d`` is found by trying 0, 1, ... and
    keeping only the values not yet exact (one vectorised pass per digit). No value: 0.
    """
    remaining = np.asarray(values, dtype=np.float64).ravel()
    remaining = remaining[np.isfinite(remaining)]
    for decimals in range(cap + 1):
        with np.errstate(over="ignore", invalid="ignore"):
            remaining = remaining[np.round(remaining, decimals) != remaining]
        if not remaining.size:
            return decimals
    return cap


def decimals_for(rounding: Rounding, forward: ArrayLike) -> int:
    """The decimals ``rounding`` stands for, given the portfolio's forward forecast."""
    if rounding == FILE:
        return decimals_used(forward)
    if rounding == UNITS:
        return 0
    if (
        isinstance(rounding, int)
        and not isinstance(rounding, bool)
        and 0 <= rounding <= MAX_DECIMALS
    ):
        return rounding
    return decimals_for(parse_rounding(rounding), forward)


def round_half_away(values: ArrayLike, decimals: int) -> np.ndarray:
    """``values`` rounded to ``decimals``, half away from zero, as a new float64 array.

    Each value's shortest decimal form is rounded (see the module docstring); NaN stays NaN,
    and a value too large to have that many decimals is returned as it is. The result is the
    float nearest the rounded decimal, so it prints (``repr``) with at most ``decimals``
    decimals. Vectorised; only values within a few units in the last place of a half (where
    the binary value and its decimal form may fall on different sides) are settled one by one
    with ``decimal``, and there are few of those.
    """
    x = np.array(values, dtype=np.float64)
    scale = 10.0**decimals
    with np.errstate(over="ignore", invalid="ignore"):
        scaled = np.abs(x) * scale
        low = np.floor(scaled)
        frac = scaled - low
        up = frac >= 0.5
        near = np.abs(frac - 0.5) <= 4 * np.spacing(scaled)
        out = np.copysign((low + up) / scale, x) + 0.0  # + 0.0: no "-0.0" in a file
    keep = ~np.isfinite(x) | ~(scaled < _EXACT)
    out[keep] = x[keep]
    near &= ~keep
    if near.any():
        step = Decimal(1).scaleb(-decimals)
        ties = np.unique(x[near])
        exact = [float(Decimal(repr(float(v))).quantize(step, ROUND_HALF_UP)) for v in ties]
        out[near] = np.asarray(exact, dtype=np.float64)[np.searchsorted(ties, x[near])] + 0.0
    return out


def describe(rounding: Rounding, decimals: int) -> str:
    """The precision in words, for the README and messages: ``1 decimal, as the file's
    forecast``."""
    amount = "whole units" if decimals == 0 else f"{decimals} decimal{'s' if decimals > 1 else ''}"
    if rounding == FILE:
        return f"{amount}, as the portfolio's forward forecast (--round file)"
    return f"{amount} (--round {UNITS if decimals == 0 else decimals})"
