"""Seeded generator of an invented demand-planning portfolio.

The scenario is made up: *Hollowmere Garden Supply*, a regional wholesaler of garden and outdoor
goods with warehouses ``NTH``, ``STH`` and ``WST`` (more codes are invented for larger portfolios).
Each item-location series has two years of weekly history (Mondays) with the one-step-ahead
statistical forecast that was made for each week, followed by forward weeks that carry only a
forecast. ``sample/README.md`` lists which series show which behaviour.

Everything is vectorised over series: the only Python loops run over week columns and over blocks
of :data:`CHUNK` series, so a million series can be written to Parquet with bounded memory. The
random stream of a block depends only on the seed and the block number, so the same seed gives the
same series whether the portfolio is built in memory or streamed to a file.

Run ``python -m sample.generate --out sample/portfolio.csv --seed 7`` to rebuild the committed file.
"""

from __future__ import annotations

import argparse
import itertools
import os
import sys
import time
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from datetime import date
from pathlib import Path

import numpy as np
import pandas as pd

#: Seed of the committed ``sample/portfolio.csv``.
SAMPLE_SEED = 7
SAMPLE_ITEMS = 100
SAMPLE_LOCATIONS = 3
#: Last history week of the committed sample (a Monday).
SAMPLE_END = date(2026, 11, 23)
#: Series per simulation block; the random stream of each block is keyed on its number.
CHUNK = 8192

COLUMNS: tuple[str, ...] = (
    "item",
    "location",
    "period",
    "demand",
    "forecast",
    "price",
    "family",
    "planner",
    "supplier",
    "abc_class",
)

#: Competing forecasts of the committed sample, written after ``forecast`` (``--competing``).
COMPETING: tuple[str, ...] = ("forecast_stat", "forecast_customer")
#: Spread of the statistical engine's forecast around the planning forecast (log scale).
STAT_NOISE = 0.2
#: The customer's forecast: share of the planning forecast, spread and rows left empty.
CUSTOMER_LEVEL, CUSTOMER_NOISE, CUSTOMER_MISSING = 0.7, 0.15, 0.02

PATTERNS: tuple[str, ...] = ("smooth", "erratic", "intermittent", "lumpy")
SMOOTH, ERRATIC, INTERMITTENT, LUMPY = range(4)

LOCATIONS: tuple[str, ...] = ("NTH", "STH", "WST", "EST", "MID", "HBR", "UPL", "VLY")
#: Relative size of each warehouse; codes beyond the list get 0.8.
LOCATION_SCALE: tuple[float, ...] = (1.25, 1.0, 0.7, 0.9, 1.1, 0.6, 0.5, 0.8)

ABC_CLASSES: tuple[str, ...] = ("A", "B", "C")
#: Cumulative value shares closing classes A and B (the 80/15/5 split is common practice).
ABC_CUTS: tuple[float, float] = (0.80, 0.95)

#: Item ids that stay legal but trip careless readers: leading zeros, and a text that starts
#: with a missing-value token.
AWKWARD_IDS: tuple[str, ...] = ("00412", "NA-17")


@dataclass(frozen=True)
class Family:
    """A product family: its seasonality, price band, owner and suppliers.

    Attributes:
        name: Family name written to the ``family`` column.
        share: Share of items in the family.
        peak_day: Day of the year at which demand peaks.
        amplitude: Concentration of the seasonal peak; the weekly index is
            ``exp(amplitude * cos(angle to peak)) / I0(amplitude)``, which averages 1 over a year.
        price_low: Lowest unit price in the family.
        price_high: Highest unit price in the family.
        volume: Multiplier on the typical weekly units.
        planner: Planner who owns the family.
        suppliers: Suppliers the family buys from.
    """

    name: str
    share: float
    peak_day: int
    amplitude: float
    price_low: float
    price_high: float
    volume: float
    planner: str
    suppliers: tuple[str, ...]


FAMILIES: tuple[Family, ...] = (
    Family("seeds", 0.25, 80, 0.9, 0.5, 6.0, 2.0, "Mara", ("Corrie Seed Co", "Marlow Growers")),
    Family("soil", 0.13, 100, 0.7, 3.0, 30.0, 1.5, "Mara", ("Tarnside Organics",)),
    Family(
        "tools", 0.20, 105, 0.35, 4.0, 90.0, 1.0, "Tobias", ("Brackwater Tools", "Dunmore Metal")
    ),
    Family("irrigation", 0.15, 180, 0.8, 2.0, 150.0, 1.0, "Ines", ("Fenwick Polymers",)),
    Family("furniture", 0.12, 140, 0.7, 40.0, 400.0, 0.3, "Kofi", ("Alder & Finch",)),
    Family(
        "lighting", 0.15, 305, 0.6, 6.0, 160.0, 0.8, "Lena", ("Elmhurst Lamps", "Quill Electric")
    ),
)
PLANNERS: tuple[str, ...] = tuple(dict.fromkeys(f.planner for f in FAMILIES))
SUPPLIERS: tuple[str, ...] = tuple(s for f in FAMILIES for s in f.suppliers)


@dataclass(frozen=True)
class Mix:
    """Shares of each demand pattern and behaviour in a generated portfolio.

    Pattern shares are of series and sum to 1. Behaviour shares are of series unless noted; a
    positive share always yields at least one case, so a small portfolio shows every behaviour.

    Attributes:
        smooth: Regular demand with low size variation.
        erratic: Regular demand with widely varying sizes.
        intermittent: Sporadic demand with steady sizes.
        lumpy: Sporadic demand with widely varying sizes.
        over_forecast: Series whose forecast runs persistently 25-40 % high.
        under_forecast: Series whose forecast runs persistently 20-38 % low.
        promotion: Series with one unforecast promotion (one or two weeks at 2.5-4x).
        stockout: Series whose demand drops to near zero for 2-4 weeks.
        returns: Sporadic series with a couple of weeks of small negative demand.
        missing_rows: Share of history rows left out of the file.
        new_item: Share of items launched late in the history (ramping up).
        phase_out: Share of items being run down to zero.
        price_change: Share of items with one price increase.
    """

    smooth: float = 0.40
    erratic: float = 0.20
    intermittent: float = 0.25
    lumpy: float = 0.15
    over_forecast: float = 0.03
    under_forecast: float = 0.02
    promotion: float = 0.03
    stockout: float = 0.02
    returns: float = 0.04
    missing_rows: float = 0.0005
    new_item: float = 0.01
    phase_out: float = 0.01
    price_change: float = 0.05

    @property
    def patterns(self) -> tuple[float, float, float, float]:
        """Pattern shares in the order of :data:`PATTERNS`."""
        return (self.smooth, self.erratic, self.intermittent, self.lumpy)


@dataclass
class Design:
    """Every per-item and per-series parameter of a portfolio, drawn before any week is simulated.

    Week indices count from 0 (first history week); history weeks are ``0 .. n_weeks - 1`` and
    forward weeks follow. ``-1`` means "none".
    """

    seed: int
    n_items: int
    n_locations: int
    n_weeks: int
    n_forward: int
    periods: np.ndarray
    locations: tuple[str, ...]
    location_scale: np.ndarray
    # per item
    item_ids: np.ndarray
    item_family: np.ndarray
    item_supplier: np.ndarray
    item_abc: np.ndarray
    item_price: np.ndarray
    price_change_week: np.ndarray
    price_change_factor: np.ndarray
    start_week: np.ndarray
    phase_out_start: np.ndarray
    phase_out_end: np.ndarray
    # per series
    pattern: np.ndarray
    level: np.ndarray
    occurrence: np.ndarray
    sigma: np.ndarray
    amplitude: np.ndarray
    trend: np.ndarray
    alpha: np.ndarray
    bias: np.ndarray
    promo_week: np.ndarray
    promo_length: np.ndarray
    promo_lift: np.ndarray
    stockout_week: np.ndarray
    stockout_length: np.ndarray
    returns: np.ndarray
    #: Flat indices ``series * n_weeks + week`` of history rows left out, sorted.
    missing: np.ndarray

    @property
    def n_series(self) -> int:
        """Number of item-location series."""
        return self.n_items * self.n_locations

    @property
    def n_periods(self) -> int:
        """History plus forward weeks."""
        return self.n_weeks + self.n_forward


def _count(share: float, n: int) -> int:
    """Cases for a share of ``n``: at least one whenever the share is positive."""
    if share <= 0 or n <= 0:
        return 0
    return min(n, max(1, round(share * n)))


def _split(shares: Sequence[float], n: int) -> np.ndarray:
    """Whole counts for shares of ``n`` that add up to ``n`` (largest remainder)."""
    raw = np.asarray(shares, dtype=float) * n / float(np.sum(shares))
    counts = np.floor(raw).astype(np.int64)
    order = np.argsort(-(raw - counts), kind="stable")
    counts[order[: n - int(counts.sum())]] += 1
    return counts


def _item_ids(n_items: int, rng: np.random.Generator, awkward: bool) -> np.ndarray:
    """Ordinary ``GF-`` ids with a few awkward ones, sorted as text."""
    numbers = np.sort(rng.choice(np.arange(10_000, 10_000 + 9 * n_items), n_items, replace=False))
    ids = np.char.add("GF-", numbers.astype(str)).astype(object)
    if awkward and n_items >= 2 * len(AWKWARD_IDS):
        spots = rng.choice(n_items, len(AWKWARD_IDS), replace=False)
        ids[spots] = AWKWARD_IDS
    return np.sort(ids)


def design_portfolio(
    n_items: int = SAMPLE_ITEMS,
    n_locations: int = SAMPLE_LOCATIONS,
    n_weeks: int = 104,
    n_forward: int = 13,
    seed: int = SAMPLE_SEED,
    *,
    end: date = SAMPLE_END,
    mix: Mix | None = None,
    awkward_ids: bool = True,
) -> Design:
    """Draw all item and series parameters of a portfolio.

    Args:
        n_items: Items; each is stocked at every location.
        n_locations: Warehouses.
        n_weeks: History weeks, the last one ending on ``end``.
        n_forward: Forward weeks that carry a forecast and no demand.
        seed: Seed of :func:`numpy.random.default_rng`.
        end: Last history week; must be a Monday.
        mix: Pattern and behaviour shares; defaults to :class:`Mix()`.
        awkward_ids: Replace two ordinary item ids by :data:`AWKWARD_IDS`.

    Returns:
        The design; :func:`simulate` turns it into rows.

    Raises:
        ValueError: If a size is out of range, ``end`` is not a Monday or the pattern shares do
            not sum to 1.
    """
    mix = mix or Mix()
    if n_items < 1 or n_locations < 1 or n_weeks < 8 or n_forward < 0:
        raise ValueError(
            f"need n_items >= 1, n_locations >= 1, n_weeks >= 8 and n_forward >= 0; got "
            f"{n_items}, {n_locations}, {n_weeks}, {n_forward}"
        )
    if end.weekday() != 0:
        raise ValueError(f"end must be a Monday; {end.isoformat()} is a {end:%A}")
    if not np.isclose(sum(mix.patterns), 1.0):
        raise ValueError(f"pattern shares must sum to 1; they sum to {sum(mix.patterns):.3f}")

    rng = np.random.default_rng(seed)
    n_series = n_items * n_locations
    H = n_weeks
    first = np.datetime64(end, "D") - np.timedelta64(7 * (H - 1), "D")
    periods = first + np.arange(H + n_forward) * np.timedelta64(7, "D")

    locations = LOCATIONS[:n_locations] + tuple(
        f"W{k:02d}" for k in range(len(LOCATIONS), n_locations)
    )
    location_scale = np.array(
        LOCATION_SCALE[:n_locations] + (0.8,) * max(0, n_locations - len(LOCATION_SCALE))
    )

    # Items: family, supplier, price, launch and run-down.
    item_ids = _item_ids(n_items, rng, awkward_ids)
    item_family = rng.permutation(
        np.repeat(np.arange(len(FAMILIES)), _split([f.share for f in FAMILIES], n_items))
    )
    n_sup = np.array([len(f.suppliers) for f in FAMILIES])
    sup_offset = np.concatenate([[0], np.cumsum(n_sup)[:-1]])
    item_supplier = sup_offset[item_family] + rng.integers(0, n_sup[item_family])
    lo = np.array([f.price_low for f in FAMILIES])[item_family]
    hi = np.array([f.price_high for f in FAMILIES])[item_family]
    item_price = np.clip(np.round(np.exp(rng.uniform(np.log(lo), np.log(hi))), 2), 0.5, 400.0)

    price_change_week = np.full(n_items, -1)
    price_change_factor = np.ones(n_items)
    k = _count(mix.price_change, n_items)
    changed = rng.choice(n_items, k, replace=False)
    price_change_week[changed] = rng.integers(max(1, H - 50), H - 4, k)
    price_change_factor[changed] = rng.uniform(1.04, 1.12, k)

    start_week = np.zeros(n_items, dtype=np.int64)
    phase_out_start = np.full(n_items, -1)
    phase_out_end = np.full(n_items, -1)
    n_new, n_out = _count(mix.new_item, n_items), _count(mix.phase_out, n_items)
    lifecycle = rng.choice(n_items, min(n_items, n_new + n_out), replace=False)
    new_items, out_items = lifecycle[:n_new], lifecycle[n_new:]
    start_week[new_items] = H - rng.integers(min(20, H // 2), min(31, H - 4), len(new_items))
    phase_out_end[out_items] = H - rng.integers(6, 11, len(out_items))
    phase_out_start[out_items] = phase_out_end[out_items] - rng.integers(20, 27, len(out_items))
    np.maximum(phase_out_start, np.where(phase_out_end >= 0, 0, -1), out=phase_out_start)

    # Series: pattern and size parameters. ``level`` is the mean weekly units at the end of
    # the history; sporadic series spread it over fewer, larger orders.
    series_item = np.arange(n_series) // n_locations
    pattern = rng.permutation(np.repeat(np.arange(4), _split(mix.patterns, n_series)))
    special = np.isin(series_item, lifecycle)
    pattern[special] = SMOOTH
    spot = -1
    if awkward_ids and AWKWARD_IDS[0] in item_ids:
        # The leading-zero id gets a visible over-forecast so a reviewer sees it survive loading.
        spot = int(np.flatnonzero(item_ids == AWKWARD_IDS[0])[0]) * n_locations
        pattern[spot] = SMOOTH
    fam = item_family[series_item]
    scale = (
        np.array([f.volume for f in FAMILIES])[fam]
        * location_scale[np.arange(n_series) % n_locations]
    )
    occurrence = np.select(
        [pattern == SMOOTH, pattern == ERRATIC, pattern == INTERMITTENT],
        [1.0, rng.uniform(0.88, 1.0, n_series), rng.uniform(0.15, 0.55, n_series)],
        rng.uniform(0.10, 0.50, n_series),
    )
    order_size = np.select(
        [pattern == SMOOTH, pattern == ERRATIC, pattern == INTERMITTENT],
        [
            np.maximum(6.0, rng.lognormal(np.log(25.0), 0.7, n_series) * scale),
            np.maximum(3.0, rng.lognormal(np.log(14.0), 0.7, n_series) * scale),
            np.maximum(1.5, rng.lognormal(np.log(4.0), 0.5, n_series) * np.sqrt(scale)),
        ],
        np.maximum(2.0, rng.lognormal(np.log(9.0), 0.7, n_series) * np.sqrt(scale)),
    )
    level = order_size * occurrence
    sigma = np.select(
        [pattern == SMOOTH, pattern == ERRATIC, pattern == INTERMITTENT],
        [
            rng.uniform(0.10, 0.25, n_series),
            rng.uniform(0.85, 1.25, n_series),
            rng.uniform(0.15, 0.35, n_series),
        ],
        rng.uniform(0.90, 1.35, n_series),
    )
    amplitude = np.array([f.amplitude for f in FAMILIES])[fam] * rng.uniform(0.5, 1.1, n_series)
    trend = rng.normal(0.0, 0.10, n_series)
    strong = rng.random(n_series) < 0.08
    trend[strong] = rng.choice([-1.0, 1.0], int(strong.sum())) * rng.uniform(
        0.3, 0.6, int(strong.sum())
    )
    alpha = rng.uniform(0.10, 0.30, n_series)

    # Behaviours on disjoint series, so each one reads cleanly in the demo: bias, promotions and
    # stock-outs on regular series, returns on sporadic ones.
    ordinary = ~special
    regular = rng.permutation(np.flatnonzero(ordinary & (pattern <= ERRATIC)))
    sporadic = rng.permutation(np.flatnonzero(ordinary & (pattern >= INTERMITTENT)))
    if spot >= 0 and not special[spot]:
        regular = np.concatenate([[spot], regular[regular != spot]])
    counts = [
        _count(share, n_series)
        for share in (mix.over_forecast, mix.under_forecast, mix.promotion, mix.stockout)
    ]
    bounds = np.minimum(np.cumsum([0, *counts]), len(regular))
    over, under, promo, stock = (regular[a:b] for a, b in itertools.pairwise(bounds))

    bias = np.ones(n_series)
    bias[over] = rng.uniform(1.25, 1.40, len(over))
    bias[under] = rng.uniform(0.62, 0.80, len(under))

    promo_week = np.full(n_series, -1)
    promo_length = np.zeros(n_series, dtype=np.int64)
    promo_lift = np.ones(n_series)
    promo_week[promo] = rng.integers(max(8, H - 60), H - 2, len(promo))
    promo_length[promo] = rng.integers(1, 3, len(promo))
    promo_lift[promo] = rng.uniform(2.5, 4.0, len(promo))

    stockout_week = np.full(n_series, -1)
    stockout_length = np.zeros(n_series, dtype=np.int64)
    stockout_length[stock] = rng.integers(2, 5, len(stock))
    stockout_week[stock] = rng.integers(max(8, H - 40), H - 4, len(stock))
    np.minimum(stockout_week, H - stockout_length, out=stockout_week, where=stockout_length > 0)

    returns = np.zeros(n_series, dtype=bool)
    returns[sporadic[: _count(mix.returns, n_series)]] = True

    n_missing = _count(mix.missing_rows, n_series * H)
    candidates = rng.integers(0, n_series * H, n_missing)
    # Launch weeks of new items have no row to drop, and the first rows of a series stay so its
    # start is unambiguous.
    keep = (candidates % H) >= np.maximum(start_week[candidates // H // n_locations] + 1, 1)
    missing = np.unique(candidates[keep])

    abc = _abc_classes(level, item_price, series_item, n_items)

    return Design(
        seed=seed,
        n_items=n_items,
        n_locations=n_locations,
        n_weeks=n_weeks,
        n_forward=n_forward,
        periods=periods,
        locations=locations,
        location_scale=location_scale,
        item_ids=item_ids,
        item_family=item_family,
        item_supplier=item_supplier,
        item_abc=abc,
        item_price=item_price,
        price_change_week=price_change_week,
        price_change_factor=price_change_factor,
        start_week=start_week,
        phase_out_start=phase_out_start,
        phase_out_end=phase_out_end,
        pattern=pattern,
        level=level,
        occurrence=occurrence,
        sigma=sigma,
        amplitude=amplitude,
        trend=trend,
        alpha=alpha,
        bias=bias,
        promo_week=promo_week,
        promo_length=promo_length,
        promo_lift=promo_lift,
        stockout_week=stockout_week,
        stockout_length=stockout_length,
        returns=returns,
        missing=missing,
    )


def _abc_classes(
    level: np.ndarray, price: np.ndarray, series_item: np.ndarray, n_items: int
) -> np.ndarray:
    """ABC class per item from expected annual sales value.

    The item whose value crosses a cut still belongs to the higher class (the share of value
    *before* it is below the cut); the 80/15/5 split is common practice.
    """
    value = np.bincount(series_item, weights=level, minlength=n_items) * price * 52.0
    order = np.argsort(-value, kind="stable")
    before = (np.cumsum(value[order]) - value[order]) / max(float(value.sum()), 1e-12)
    classes = np.empty(n_items, dtype=np.int64)
    classes[order] = np.searchsorted(np.asarray(ABC_CUTS), before, side="right")
    return classes


def _seasonal_index(amplitude: np.ndarray, angle: np.ndarray) -> np.ndarray:
    """Von Mises-shaped weekly index with a mean of 1 over a year."""
    return np.exp(amplitude * np.cos(angle)) / np.i0(amplitude)


def simulate(design: Design, lo: int, hi: int) -> dict[str, np.ndarray]:
    """Simulate series ``lo .. hi - 1`` of a design and return their rows.

    ``lo`` must be a multiple of :data:`CHUNK` and ``hi - lo`` at most :data:`CHUNK`, so every
    block is drawn from its own stream and results do not depend on how callers batch blocks.

    Args:
        design: Parameters from :func:`design_portfolio`.
        lo: First series.
        hi: One past the last series.

    Returns:
        Row arrays in item, location, period order: ``series`` (global series index), ``week``
        (index into ``design.periods``), ``demand`` (NaN on forward rows), ``forecast``, ``price``.
    """
    if lo % CHUNK or not 0 < hi - lo <= CHUNK:
        raise ValueError(f"blocks start at a multiple of {CHUNK} and hold at most {CHUNK} series")
    d = design
    rng = np.random.default_rng([d.seed, 1, lo // CHUNK])
    m, H, T = hi - lo, d.n_weeks, d.n_periods
    s = slice(lo, hi)
    week = np.arange(T)
    item = np.arange(lo, hi) // d.n_locations
    fam = d.item_family[item]
    pattern = d.pattern[s]
    sporadic = (pattern >= INTERMITTENT)[:, None]

    doy = (d.periods - d.periods.astype("datetime64[Y]")).astype(np.int64)
    peak = np.array([f.peak_day for f in FAMILIES])[fam]
    angle = 2 * np.pi * (doy[None, :] - peak[:, None]) / 365.25
    season = _seasonal_index(d.amplitude[s][:, None], angle)
    # The statistical forecast only knows the family profile, not each series' own amplitude.
    family_amp = np.array([f.amplitude for f in FAMILIES])[fam][:, None]
    known_season = _seasonal_index(family_amp, angle)

    # Lifecycle: 1 in normal life, ramps up after a launch, runs down to 0 in a phase-out.
    start = d.start_week[item][:, None]
    since = week[None, :] - start + 1
    life = np.where(start > 0, 1.0 - np.exp(-np.maximum(since, 0) / 4.0), 1.0)
    p0 = d.phase_out_start[item][:, None]
    p1 = d.phase_out_end[item][:, None]
    fading = p1[:, 0] >= 0
    if fading.any():
        span = np.maximum(p1 - p0, 1)
        run_down = np.clip((p1 - week[None, :]) / span, 0.0, 1.0)
        life = np.where(fading[:, None], np.minimum(life, run_down), life)

    trend = np.exp(d.trend[s][:, None] * (week[None, :] - (H - 1)) / 52.0)
    occurrence = d.occurrence[s][:, None]
    occ_p = np.where(sporadic, np.clip(occurrence * season, 0.01, 0.95), occurrence)
    size_mean = (d.level[s] / d.occurrence[s])[:, None] * trend * life
    size_mean = np.where(sporadic, size_mean, size_mean * season)

    promo = np.zeros((m, T), dtype=bool)
    pw = d.promo_week[s]
    for k in range(int(d.promo_length[s].max(initial=0))):
        on = (pw >= 0) & (k < d.promo_length[s])
        promo[np.flatnonzero(on), pw[on] + k] = True
    size_mean = np.where(promo, size_mean * d.promo_lift[s][:, None], size_mean)
    occ_p = np.where(promo, 1.0, occ_p)

    sig = d.sigma[s][:, None]
    size = size_mean * np.exp(sig * rng.standard_normal((m, T)) - sig * sig / 2.0)
    ordered = (rng.random((m, T)) < occ_p) & (life > 0)
    demand = np.where(ordered, np.maximum(1.0, np.rint(size)), 0.0)

    sw, sl = d.stockout_week[s], d.stockout_length[s]
    longest = int(sl.max(initial=0))
    cut = rng.uniform(0.0, 0.08, (m, longest))
    for k in range(longest):
        rows = np.flatnonzero((sw >= 0) & (k < sl))
        demand[rows, sw[rows] + k] = np.rint(demand[rows, sw[rows] + k] * cut[rows, k])

    back = np.flatnonzero(d.returns[s])
    if back.size:
        rows = np.repeat(back, 2)
        cols = rng.integers(0, H, rows.size)
        demand[rows, cols] = -rng.integers(1, 4, rows.size).astype(float)

    exists = np.ones((m, T), dtype=bool)
    exists &= week[None, :] >= start
    gone = d.missing[np.searchsorted(d.missing, lo * H) : np.searchsorted(d.missing, hi * H)]
    exists[gone // H - lo, gone % H] = False
    demand[:, H:] = np.nan

    forecast = _forecast(demand, exists, known_season, d.alpha[s], H) * d.bias[s][:, None]
    forecast = np.round(np.maximum(forecast, 0.0), 1)

    price = d.item_price[item][:, None] * np.where(
        (d.price_change_week[item][:, None] >= 0)
        & (week[None, :] >= d.price_change_week[item][:, None]),
        d.price_change_factor[item][:, None],
        1.0,
    )
    price = np.round(price, 2)

    flat = np.flatnonzero(exists.ravel())
    return {
        "series": lo + flat // T,
        "week": flat % T,
        "demand": demand.ravel()[flat],
        "forecast": forecast.ravel()[flat],
        "price": price.ravel()[flat],
    }


def _forecast(
    demand: np.ndarray, exists: np.ndarray, season: np.ndarray, alpha: np.ndarray, n_weeks: int
) -> np.ndarray:
    """One-step-ahead seasonal simple exponential smoothing, all series at once.

    The level is smoothed on deseasonalised demand (returns count as zero) and starts at the mean
    of a series' first eight rows; a missing row leaves the level unchanged. Forward weeks carry
    the last level times the seasonal index.
    """
    m, T = demand.shape
    hist = exists[:, :n_weeks]
    x = np.where(hist, np.maximum(demand[:, :n_weeks], 0.0) / season[:, :n_weeks], np.nan)
    first = hist & (np.cumsum(hist, axis=1) <= 8)
    init = np.where(first, x, 0.0).sum(axis=1) / np.maximum(first.sum(axis=1), 1)
    out = np.empty((m, T))
    level = np.full(m, np.nan)
    for t in range(n_weeks):
        base = np.where(np.isnan(level), init, level)
        out[:, t] = base * season[:, t]
        xt = x[:, t]
        level = np.where(np.isnan(xt), level, alpha * xt + (1.0 - alpha) * base)
    last = np.where(np.isnan(level), init, level)
    out[:, n_weeks:] = last[:, None] * season[:, n_weeks:]
    return out


def competing_forecasts(design: Design, rows: dict[str, np.ndarray], lo: int) -> None:
    """Add the two competing forecasts of :data:`COMPETING` to the rows of block ``lo``.

    Both start from the planning forecast without its designed bias. ``forecast_stat`` is a
    statistical engine's: unbiased but noisy (a mean-one log-normal factor of spread
    :data:`STAT_NOISE` on every row). ``forecast_customer`` is a customer's: steady but low
    (:data:`CUSTOMER_LEVEL` of it), with a few rows left empty. Under-forecasts have absolute
    percentage errors of at most 100 %, over-forecasts do not, so MAPE prefers the customer's
    forecast while WAPE, which weighs errors by volume, prefers the engine's (Hyndman & Koehler
    2006, "Another look at measures of forecast accuracy"; docs/metrics.md). The draws come
    from a stream of their own, so the other columns are the same with or without them.
    """
    rng = np.random.default_rng([design.seed, 2, lo // CHUNK])
    base = rows["forecast"] / design.bias[rows["series"]]
    n = len(base)

    def factor(spread: float) -> np.ndarray:
        return np.exp(spread * rng.standard_normal(n) - spread * spread / 2.0)

    stat = np.round(base * factor(STAT_NOISE), 1)
    customer = np.round(base * CUSTOMER_LEVEL * factor(CUSTOMER_NOISE), 1)
    customer[rng.random(n) < CUSTOMER_MISSING] = np.nan
    rows["forecast_stat"], rows["forecast_customer"] = stat, customer


def iter_blocks(design: Design) -> Iterator[tuple[int, int]]:
    """Series ranges ``(lo, hi)`` of the simulation blocks, :data:`CHUNK` series each."""
    for lo in range(0, design.n_series, CHUNK):
        yield lo, min(lo + CHUNK, design.n_series)


def _attribute_codes(
    design: Design, series: np.ndarray
) -> dict[str, tuple[np.ndarray, tuple[str, ...]]]:
    """Codes and categories of the text columns for rows of the given series."""
    item = series // design.n_locations
    fam = design.item_family[item]
    planner_of_family = np.array([PLANNERS.index(f.planner) for f in FAMILIES])
    return {
        "location": (series % design.n_locations, design.locations),
        "family": (fam, tuple(f.name for f in FAMILIES)),
        "planner": (planner_of_family[fam], PLANNERS),
        "supplier": (design.item_supplier[item], SUPPLIERS),
        "abc_class": (design.item_abc[item], ABC_CLASSES),
    }


def frame_from_rows(design: Design, rows: dict[str, np.ndarray]) -> pd.DataFrame:
    """Long frame with the :data:`COLUMNS` of the file format from simulated rows."""
    series = rows["series"]
    data: dict[str, object] = {
        "item": pd.Categorical.from_codes(
            series // design.n_locations, categories=pd.Index(design.item_ids, dtype=str)
        ),
        "period": design.periods.astype("datetime64[s]")[rows["week"]],
        "demand": rows["demand"],
        "forecast": rows["forecast"],
        "price": rows["price"],
    }
    for name, (codes, categories) in _attribute_codes(design, series).items():
        data[name] = pd.Categorical.from_codes(codes, categories=pd.Index(categories, dtype=str))
    data.update({name: rows[name] for name in COMPETING if name in rows})
    return pd.DataFrame({c: data[c] for c in columns_of(competing=COMPETING[0] in rows)})


def columns_of(*, competing: bool) -> tuple[str, ...]:
    """The file's columns: :data:`COLUMNS`, with :data:`COMPETING` after ``forecast``."""
    if not competing:
        return COLUMNS
    at = COLUMNS.index("forecast") + 1
    return COLUMNS[:at] + COMPETING + COLUMNS[at:]


def generate_portfolio(
    n_items: int = SAMPLE_ITEMS,
    n_locations: int = SAMPLE_LOCATIONS,
    n_weeks: int = 104,
    n_forward: int = 13,
    seed: int = SAMPLE_SEED,
    *,
    end: date = SAMPLE_END,
    mix: Mix | None = None,
    awkward_ids: bool = True,
    competing: bool = False,
) -> pd.DataFrame:
    """Build a whole portfolio in memory as a long frame.

    Args:
        n_items: Items; each is stocked at every location.
        n_locations: Warehouses.
        n_weeks: History weeks, the last one ending on ``end``.
        n_forward: Forward weeks with a forecast and empty demand.
        seed: Seed of :func:`numpy.random.default_rng`.
        end: Last history week; must be a Monday.
        mix: Pattern and behaviour shares.
        awkward_ids: Include the ids in :data:`AWKWARD_IDS`.
        competing: Add the competing forecasts :data:`COMPETING` (see
            :func:`competing_forecasts`).

    Returns:
        One row per series and week, columns :data:`COLUMNS` (with :data:`COMPETING` after
        ``forecast`` when asked); ``demand`` is NaN on forward rows,
        text columns are categoricals, ``period`` is a datetime of the Monday.
    """
    design = design_portfolio(
        n_items, n_locations, n_weeks, n_forward, seed, end=end, mix=mix, awkward_ids=awkward_ids
    )
    parts = [simulate(design, lo, hi) for lo, hi in iter_blocks(design)]
    if competing:
        for part, (lo, _) in zip(parts, iter_blocks(design), strict=True):
            competing_forecasts(design, part, lo)
    rows = {key: np.concatenate([p[key] for p in parts]) for key in parts[0]}
    return frame_from_rows(design, rows)


def build_sample(seed: int = SAMPLE_SEED) -> pd.DataFrame:
    """The committed demo portfolio: 100 items at 3 warehouses, 104 + 13 weeks, with the two
    competing forecasts."""
    return generate_portfolio(SAMPLE_ITEMS, SAMPLE_LOCATIONS, 104, 13, seed, competing=True)


def write_csv(frame: pd.DataFrame, path: str | Path) -> None:
    """Write a generated frame as CSV: whole-unit demand, empty cells for forward demand."""
    out = frame.assign(demand=frame["demand"].astype("Int64"))
    out.to_csv(path, index=False, date_format="%Y-%m-%d", lineterminator="\n")


def write_parquet(
    path: str | Path,
    n_items: int,
    n_locations: int = SAMPLE_LOCATIONS,
    n_weeks: int = 104,
    n_forward: int = 13,
    seed: int = SAMPLE_SEED,
    *,
    end: date = SAMPLE_END,
    mix: Mix | None = None,
    awkward_ids: bool = True,
    competing: bool = False,
) -> int:
    """Stream a portfolio to Parquet, one row group per block of :data:`CHUNK` series.

    Text columns are dictionary-encoded, ``period`` is ``date32``, numbers are ``float64`` with
    nulls for forward demand. Memory stays at a few hundred MB whatever the size. The file is
    written under a temporary name and renamed when complete, so an interrupted run leaves no
    truncated file behind.

    Args:
        path: Output file.
        n_items: Items; each is stocked at every location.
        n_locations: Warehouses.
        n_weeks: History weeks.
        n_forward: Forward weeks.
        seed: Seed of :func:`numpy.random.default_rng`.
        end: Last history week; must be a Monday.
        mix: Pattern and behaviour shares.
        awkward_ids: Include the ids in :data:`AWKWARD_IDS`.
        competing: Add the competing forecasts :data:`COMPETING`.

    Returns:
        Number of rows written.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    design = design_portfolio(
        n_items, n_locations, n_weeks, n_forward, seed, end=end, mix=mix, awkward_ids=awkward_ids
    )
    # Small dictionaries get one-byte codes: they repeat on every row and would otherwise cost
    # more memory on reading than the numbers do.
    item_type = pa.dictionary(pa.int32(), pa.string())
    code_type = pa.dictionary(pa.int8() if design.n_locations < 128 else pa.int32(), pa.string())
    small = pa.dictionary(pa.int8(), pa.string())
    schema = pa.schema(
        [
            ("item", item_type),
            ("location", code_type),
            ("period", pa.date32()),
            ("demand", pa.float64()),
            ("forecast", pa.float64()),
            *[(name, pa.float64()) for name in (COMPETING if competing else ())],
            ("price", pa.float64()),
            ("family", small),
            ("planner", small),
            ("supplier", small),
            ("abc_class", small),
        ]
    )
    days = design.periods.astype("datetime64[D]").astype(np.int32)
    path = Path(path)
    tmp = path.with_name(path.name + ".part")
    total = 0
    with pq.ParquetWriter(tmp, schema, compression="snappy") as writer:
        for lo, hi in iter_blocks(design):
            rows = simulate(design, lo, hi)
            if competing:
                competing_forecasts(design, rows, lo)
            series = rows["series"]
            first_item = lo // design.n_locations
            last_item = (hi - 1) // design.n_locations
            item = pa.DictionaryArray.from_arrays(
                pa.array(series // design.n_locations - first_item, pa.int32()),
                pa.array(design.item_ids[first_item : last_item + 1].tolist(), pa.string()),
            )
            columns: dict[str, pa.Array] = {
                "item": item,
                "period": pa.array(days[rows["week"]], pa.date32()),
                "demand": pa.array(rows["demand"], pa.float64(), from_pandas=True),
                "forecast": pa.array(rows["forecast"], pa.float64()),
                "price": pa.array(rows["price"], pa.float64()),
            }
            for name in COMPETING if competing else ():
                columns[name] = pa.array(rows[name], pa.float64(), from_pandas=True)
            for name, (codes, categories) in _attribute_codes(design, series).items():
                columns[name] = pa.DictionaryArray.from_arrays(
                    pa.array(codes, schema.field(name).type.index_type),
                    pa.array(list(categories), pa.string()),
                )
            table = pa.table([columns[f.name] for f in schema], schema=schema)
            writer.write_table(table, row_group_size=len(table))
            total += len(table)
    os.replace(tmp, path)
    return total


def behaviour_table(design: Design) -> pd.DataFrame:
    """One row per series with the behaviours the design put into it (for the README)."""
    n = design.n_series
    series = np.arange(n)
    item = series // design.n_locations
    periods = pd.DatetimeIndex(design.periods)

    def when(week: np.ndarray) -> pd.Series:
        return pd.Series(np.where(week >= 0, periods.strftime("%Y-%m-%d")[week], ""), dtype=str)

    return pd.DataFrame(
        {
            "item": design.item_ids[item].astype(str),
            "location": np.array(design.locations)[series % design.n_locations],
            "family": np.array([f.name for f in FAMILIES])[design.item_family[item]],
            "pattern": np.array(PATTERNS)[design.pattern],
            "weekly_units": np.round(design.level, 1),
            "bias": np.round(design.bias, 2),
            "promo_from": when(design.promo_week),
            "promo_weeks": design.promo_length,
            "stockout_from": when(design.stockout_week),
            "stockout_weeks": design.stockout_length,
            "returns": design.returns,
            "launched": when(np.where(design.start_week[item] > 0, design.start_week[item], -1)),
            "phase_out_from": when(design.phase_out_start[item]),
            "zero_from": when(design.phase_out_end[item]),
            "price_change_from": when(design.price_change_week[item]),
        }
    )


def sbc_class(frame: pd.DataFrame) -> pd.Series:
    """Syntetos-Boylan-Croston class of each series' history (for the description only).

    ADI = history rows / rows with positive demand; CV² = population variance over squared mean
    of the positive demands; cut-offs 1.32 and 0.49 (Syntetos, Boylan & Croston 2005, JORS 56(5)).
    """
    hist = frame.loc[frame["demand"].notna(), ["item", "location", "demand"]]
    keys = ["item", "location"]
    pos = hist.loc[hist["demand"] > 0]
    n = hist.groupby(keys, observed=True)["demand"].size()
    g = pos.groupby(keys, observed=True)["demand"]
    adi = n / g.size().reindex(n.index)
    cv2 = (g.var(ddof=0) / g.mean() ** 2).reindex(n.index)
    label = np.where(
        adi <= 1.32,
        np.where(cv2 <= 0.49, "smooth", "erratic"),
        np.where(cv2 <= 0.49, "intermittent", "lumpy"),
    )
    return pd.Series(label, index=n.index, name="sbc_class")


def describe(design: Design, frame: pd.DataFrame) -> str:
    """Markdown summary of a design: pattern counts and the series with notable behaviour."""
    table = behaviour_table(design)
    realised = sbc_class(frame).value_counts()
    lines = [
        f"{design.n_series} series, {len(frame):,} rows, "
        f"{design.periods[0]} to {design.periods[design.n_weeks - 1]} "
        f"(+{design.n_forward} forward weeks).",
        "",
        "| pattern | generated as | SBC class of the history |",
        "|---|---|---|",
    ]
    generated = table["pattern"].value_counts()
    for name in PATTERNS:
        lines.append(f"| {name} | {generated.get(name, 0)} | {realised.get(name, 0)} |")

    def listing(title: str, mask: pd.Series, extra: str) -> None:
        picked = table.loc[mask]
        lines.extend(["", f"**{title}** ({len(picked)}):", ""])
        for row in picked.itertuples():
            detail = extra.format(**row._asdict())
            lines.append(f"- `{row.item}` @ {row.location} ({row.family}, {row.pattern}){detail}")

    listing("Over-forecast", table["bias"] > 1, ": forecast x{bias}")
    listing("Under-forecast", table["bias"] < 1, ": forecast x{bias}")
    listing(
        "Promotions (not in the forecast)",
        table["promo_weeks"] > 0,
        ": {promo_weeks} week(s) from {promo_from}",
    )
    listing(
        "Stock-outs", table["stockout_weeks"] > 0, ": {stockout_weeks} weeks from {stockout_from}"
    )
    listing("Returns (negative weeks)", table["returns"], "")
    listing("New item", table["launched"] != "", ": first row {launched}")
    listing(
        "Phase-out",
        table["phase_out_from"] != "",
        ": runs down from {phase_out_from}, zero from {zero_from}",
    )
    changed = table.drop_duplicates("item").loc[lambda t: t["price_change_from"] != ""]
    lines.extend(["", f"**Price change** ({len(changed)} items, all warehouses):", ""])
    lines.extend(f"- `{r.item}` from {r.price_change_from}" for r in changed.itertuples())
    missing = design.missing
    lines.extend(["", f"**Missing rows** ({len(missing)}):", ""])
    for flat in missing:
        s, w = divmod(int(flat), design.n_weeks)
        lines.append(
            f"- `{design.item_ids[s // design.n_locations]}` @ "
            f"{design.locations[s % design.n_locations]} {design.periods[w]}"
        )
    return "\n".join(lines)


def main(argv: Sequence[str] | None = None) -> int:
    """Command line: write a portfolio to CSV or Parquet (chosen by the file suffix)."""
    parser = argparse.ArgumentParser(
        prog="python -m sample.generate", description="Write an invented demo portfolio."
    )
    parser.add_argument("--out", type=Path, required=True, help=".csv or .parquet file to write")
    parser.add_argument("--seed", type=int, default=SAMPLE_SEED)
    parser.add_argument("--items", type=int, default=SAMPLE_ITEMS)
    parser.add_argument("--locations", type=int, default=SAMPLE_LOCATIONS)
    parser.add_argument("--weeks", type=int, default=104)
    parser.add_argument("--forward", type=int, default=13)
    parser.add_argument(
        "--describe", action="store_true", help="print which series show which behaviour"
    )
    parser.add_argument(
        "--competing",
        action=argparse.BooleanOptionalAction,
        default=None,
        help="add the competing forecasts forecast_stat and forecast_customer (default: yes "
        "for .csv, the demo; no for .parquet, the benchmarks' files, which keep the columns "
        "earlier revisions read)",
    )
    args = parser.parse_args(argv)
    sizes = (args.items, args.locations, args.weeks, args.forward, args.seed)
    started = time.perf_counter()
    suffix = args.out.suffix.lower()
    competing = args.competing if args.competing is not None else suffix == ".csv"
    if suffix == ".parquet":
        rows = write_parquet(args.out, *sizes, competing=competing)
    elif suffix == ".csv":
        frame = generate_portfolio(*sizes, competing=competing)
        write_csv(frame, args.out)
        rows = len(frame)
        if args.describe:
            print(describe(design_portfolio(*sizes), frame))
    else:
        parser.error(f"--out must end in .csv or .parquet, not {args.out.suffix!r}")
    seconds = time.perf_counter() - started
    print(f"wrote {rows:,} rows to {args.out} in {seconds:.1f} s", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
