"""``output.to_csv`` writes exactly what ``pandas.DataFrame.to_csv`` writes, only faster.

The reference is pandas itself (``DataFrame.to_csv(index=False, lineterminator="\\n")``): every
float in its shortest round-trip form, missing values empty, text quoted where Python's csv
module quotes it. Values cover every magnitude where the text changes form (Python's ``repr``
switches to exponents below 1e-4 and from 1e16; Arrow, which does the formatting, at 1e-6 and
1e10), signed zeros, infinities, whole numbers and awkward text.
"""

from __future__ import annotations

import csv
import io
import math

import numpy as np
import pandas as pd
import pytest

from triage.render import scorecard as output

EDGES = [
    0.0,
    -0.0,
    1.0,
    -1.0,
    12.0,
    0.1,
    1 / 3,
    2.5e-6,
    1e-4,
    9.999999999999999e-05,
    1e-5,
    1e-6,
    9.99e-7,
    1e-7,
    5e-324,
    2.2250738585072014e-308,
    1e10,
    9999999999.5,
    12345678901.234567,
    1e15,
    1234567890123456.8,
    1e16,
    1e17,
    1.7976931348623157e308,
    2.0**53,
    -(2.0**53) + 1,
    math.inf,
    -math.inf,
    math.nan,
]


def frame(n: int, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    wide = 10.0 ** rng.uniform(-320, 300, n) * rng.choice([-1, 1], n)
    return pd.DataFrame(
        {
            "item": pd.Series(
                rng.choice(["HOSE-25", "00123", "rake, steel", 'pot 12"', "a\nb", "ü€", ""], n),
                dtype="str",
            ),
            "rank": rng.integers(-(10**12), 10**12, n),
            "wide": wide,
            "window": rng.normal(0, 1, n) * 10.0 ** rng.integers(-9, 18, n),
            "whole": np.round(rng.normal(0, 1e6, n)),
            "edges": rng.choice(np.array(EDGES), n),
            "flag": rng.choice(np.array(["over", "", "under", None], dtype=object), n),
            "family": pd.Categorical(rng.choice(["seeds", "tools, hand", None], n)),
        }
    )


@pytest.mark.parametrize("seed", [1, 2])
def test_text_is_pandas_text(seed: int) -> None:
    card = frame(70_000, seed)  # several blocks of rows
    card.loc[card.index % 11 == 0, "window"] = np.nan
    assert output.to_csv(card) == card.to_csv(index=False, lineterminator="\n")


def test_floats_round_trip_and_empty_is_missing() -> None:
    card = frame(5_000, 3)
    rows = list(csv.reader(io.StringIO(output.to_csv(card))))
    header, body = rows[0], rows[1:]
    for name in ("wide", "window", "whole", "edges"):
        column = header.index(name)
        values = card[name].to_numpy()
        for text, value in zip((r[column] for r in body), values, strict=True):
            if math.isnan(value):
                assert text == ""
            else:
                assert float(text) == value and math.copysign(1, float(text)) == math.copysign(
                    1, value
                )


def test_empty_frame_and_scorecard_dtypes() -> None:
    empty = frame(10, 4).iloc[:0]
    assert output.to_csv(empty) == empty.to_csv(index=False, lineterminator="\n")
    # Unsupported column types fall back to pandas itself.
    odd = pd.DataFrame({"when": pd.to_datetime(["2025-01-06"]), "ok": [True]})
    assert output.to_csv(odd) == odd.to_csv(index=False, lineterminator="\n")


def test_blocks_are_whole_lines_in_order() -> None:
    # Reference: pandas DataFrame.to_csv, as above; the blocks are what `triage rank --format
    # csv` writes one after another, so each must end at a line break.
    card = frame(3 * 32_768 + 5, 5)
    blocks = list(output.csv_blocks(card))
    assert len(blocks) == 5  # header, then four blocks of rows
    assert blocks[0] == (",".join(card.columns) + "\n").encode()
    assert all(block.endswith(b"\n") for block in blocks)
    assert b"".join(blocks).decode() == card.to_csv(index=False, lineterminator="\n")
