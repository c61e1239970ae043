"""The precision rule of exported values (triage.core.rounding, docs/export.md "Precision").

The reference is Python's ``decimal`` module: a value's shortest decimal form (``repr``)
quantized with ROUND_HALF_UP, which rounds ties away from zero (Python documentation,
"decimal — Decimal fixed point and floating point arithmetic", rounding modes).
"""

from __future__ import annotations

from decimal import ROUND_HALF_UP, Decimal

import numpy as np
import pytest

from triage.core.errors import TriageError
from triage.core.rounding import (
    FILE,
    MAX_DECIMALS,
    decimals_for,
    decimals_used,
    parse_rounding,
    round_half_away,
)


def reference(value: float, decimals: int) -> float:
    step = Decimal(1).scaleb(-decimals)
    return float(Decimal(repr(value)).quantize(step, ROUND_HALF_UP)) + 0.0


def decimals_of(value: float) -> int:
    """Decimals in the shortest text of a float, as a CSV or JSON file shows it."""
    text = repr(value)
    assert "e" not in text, text
    return len(text.split(".")[1].rstrip("0")) if "." in text else 0


@pytest.mark.parametrize(
    ("value", "decimals", "want"),
    [
        (3.4760000000000004, 3, 3.476),  # float noise goes
        (3.4760000000000004, 6, 3.476),
        (95 * 1.07, 0, 102.0),  # 101.65000000000001
        (2.675, 2, 2.68),  # binary 2.67499999..., decimal 2.675: a tie, away from zero
        (1.005, 2, 1.01),
        (0.125, 2, 0.13),
        (2.5, 0, 3.0),  # not to even
        (-2.5, 0, -3.0),
        (-0.4, 0, 0.0),  # never -0.0
        (12.0, 1, 12.0),
        (1e300, 2, 1e300),  # no fractional digits left: unchanged
    ],
)
def test_round_half_away_known_values(value: float, decimals: int, want: float) -> None:
    got = float(round_half_away([value], decimals)[0])
    assert repr(got) == repr(want)
    if value < 1e15:
        assert repr(got) == repr(reference(value, decimals))


def test_round_half_away_agrees_with_decimal_and_prints_short() -> None:
    rng = np.random.default_rng(20261102)
    base = rng.uniform(-5000, 5000, 4000)
    # Products as adjustments make them, exact ties, and values just beside the ties.
    values = np.concatenate(
        [
            base,
            np.round(base, 2) * 1.07,
            np.round(base, 1) * 1.1,
            np.round(base, 0) + 0.5,
            np.round(base, 2) + 0.005,
            np.nextafter(np.round(base, 2) + 0.005, np.inf),
            np.nextafter(np.round(base, 2) + 0.005, -np.inf),
            [0.0, np.nan],
        ]
    )
    for decimals in range(MAX_DECIMALS + 1):
        got = round_half_away(values, decimals)
        for value, out in zip(values.tolist(), got.tolist(), strict=True):
            if value != value:
                assert out != out
                continue
            assert repr(out) == repr(reference(value, decimals)), (value, decimals)
            assert decimals_of(out) <= decimals, (value, decimals, out)


def test_decimals_used_finds_the_files_precision() -> None:
    # Values as read from text: the float nearest each decimal.
    assert decimals_used([float(t) for t in ("12", "7", "140")]) == 0
    assert decimals_used([float(t) for t in ("12.5", "7", "0.1", "3.0")]) == 1
    assert decimals_used([float(t) for t in ("12.25", "7.125", "0.3")]) == 3
    assert decimals_used([1.0, np.nan, 2.5]) == 1  # missing values do not count
    assert decimals_used([]) == 0
    assert decimals_used([0.1 + 0.2]) == MAX_DECIMALS  # more than the cap: the cap
    assert decimals_used(np.array([[1.5, 2.0], [3.25, np.nan]])) == 2
    assert decimals_for(FILE, [1.5]) == 1
    assert decimals_for("units", [1.5]) == 0
    assert decimals_for(3, [1.5]) == 3


def test_parse_rounding() -> None:
    assert parse_rounding("file") == FILE
    assert parse_rounding(" Units ") == 0
    assert parse_rounding("2") == 2
    assert parse_rounding(str(MAX_DECIMALS)) == MAX_DECIMALS
    for bad in ("7", "-1", "1.5", "", "cents"):
        with pytest.raises(TriageError, match="--round"):
            parse_rounding(bad)
