"""``Portfolio.price`` (``UnitPrices``) indexes exactly like the dense float64 matrix it stands for.

The reference is numpy's own indexing of the same matrix (integers, slices, integer and boolean
arrays on either axis, and two arrays paired element by element). Prices are invented.
"""

from __future__ import annotations

import numpy as np
import pytest
from helpers import portfolio_from

from triage.core import schema
from triage.core.portfolio import UnitPrices


@pytest.fixture(scope="module")
def prices() -> tuple[np.ndarray, UnitPrices]:
    rng = np.random.default_rng(9)
    dense = np.repeat(rng.uniform(0.5, 40, 30)[:, None], 11, axis=1)
    changing = np.array([2, 3, 17, 29])
    dense[changing, 6:] *= 1.08  # a price increase part-way
    return dense, UnitPrices.from_dense(dense)


ROWS = [
    0,
    -1,
    7,
    np.int64(3),
    slice(None),
    slice(2, 20, 3),
    slice(None, None, -1),
    [3, 17, 3],
    np.array([-2, 0, 29]),
]
COLS = [
    0,
    -1,
    6,
    np.int32(10),
    slice(None),
    slice(5, 9),
    slice(4, 4),
    [0, 10, 10],
    np.array([1, 2]),
]


def test_whole_matrix_and_changing_rows(prices) -> None:
    dense, price = prices
    np.testing.assert_array_equal(np.asarray(price), dense)
    assert price.shape == dense.shape and price.dtype == np.float64 and len(price) == 30
    np.testing.assert_array_equal(price.changing, [2, 3, 17, 29])


@pytest.mark.parametrize("row", ROWS, ids=repr)
@pytest.mark.parametrize("col", COLS, ids=repr)
def test_indexing_matches_numpy(prices, row, col) -> None:
    dense, price = prices
    try:
        expected = dense[row, col]
    except IndexError:
        with pytest.raises(IndexError):
            price[row, col]
        return
    got = price[row, col]
    assert np.shape(got) == np.shape(expected)
    np.testing.assert_array_equal(got, expected)


def test_boolean_masks_and_single_axis(prices) -> None:
    dense, price = prices
    rows = np.arange(30) % 4 == 1
    cols = np.arange(11) > 6
    np.testing.assert_array_equal(price[rows], dense[rows])
    np.testing.assert_array_equal(price[:, cols], dense[:, cols])
    np.testing.assert_array_equal(price[5], dense[5])
    with pytest.raises(IndexError):
        price[30]
    with pytest.raises(IndexError):
        price[np.array([True, False])]


def test_portfolio_price_is_compact_and_exact() -> None:
    records = []
    for t in range(6):
        records.append(
            {
                schema.ITEM: "HOSE",
                schema.PERIOD: t,
                schema.DEMAND: 4.0,
                schema.FORECAST: 5.0,
                schema.PRICE: 3.0,
            }
        )
        change = 2.0 if t < 3 else 2.5
        records.append(
            {
                schema.ITEM: "RAKE",
                schema.PERIOD: t,
                schema.DEMAND: 1.0,
                schema.FORECAST: 2.0,
                schema.PRICE: change,
            }
        )
    p = portfolio_from(records)
    assert isinstance(p.price, UnitPrices)
    np.testing.assert_array_equal(p.price.changing, [1])  # only RAKE's price changes
    np.testing.assert_array_equal(p.price[1], [2.0, 2.0, 2.0, 2.5, 2.5, 2.5])
    np.testing.assert_array_equal(p.price[0, 2:4], [3.0, 3.0])
