"""A hand-written Polars script: the comparison ``bench_versus`` runs ``triage rank`` against.

It does what a capable analyst would write in an afternoon to rank a portfolio by its share of
absolute error over the last 13 periods with actual demand: read the Parquet file lazily, keep
the window's cells, sum per series, rank by error in value (price x units where a price is
given), and write a CSV with the shares. It computes about half of ``triage rank``'s columns
(no tracking-signal run, sign test, MASE, FVA or demand pattern) and checks nothing about the
file, so it is a lower bound for the same job, not an equivalent.

Run (Polars is installed only for the benchmark, ``pip install polars``)::

    python tests/benchmarks/script_polars.py PORTFOLIO.parquet OUT.csv [--window 13]
"""

from __future__ import annotations

import argparse
import sys


def main(argv: list[str] | None = None) -> int:
    import polars as pl

    parser = argparse.ArgumentParser()
    parser.add_argument("portfolio")
    parser.add_argument("out")
    parser.add_argument("--window", type=int, default=13)
    args = parser.parse_args(argv)

    keys = ["item", "location"]
    frame = pl.scan_parquet(args.portfolio).select(*keys, "period", "demand", "forecast", "price")
    # The window: the last N calendar periods up to the last one with any actual demand,
    # found first so that the main query reads only the window's rows (predicate pushdown).
    last = frame.filter(pl.col("demand").is_not_null()).select(pl.col("period").max()).collect()
    periods = (
        frame.select(pl.col("period").unique())
        .filter(pl.col("period") <= last.item())
        .sort("period")
        .tail(args.window)
        .collect()
    )
    first = periods["period"].min()
    error = pl.col("forecast") - pl.col("demand")
    # A missing price takes the series' nearest one inside the window.
    price = pl.col("price").fill_null(strategy="forward").fill_null(strategy="backward")
    scored = (
        frame.filter(pl.col("period").is_between(first, last.item()))
        .sort([*keys, "period"])
        .with_columns(price=price.over(keys))
        .filter(pl.col("demand").is_not_null() & pl.col("forecast").is_not_null())
        .with_columns(error=error)
        .group_by(keys)
        .agg(
            n=pl.len(),
            demand=pl.col("demand").sum(),
            abs_error=pl.col("error").abs().sum(),
            bias=pl.col("error").sum(),
            squared=(pl.col("error") ** 2).sum(),
            abs_error_value=(pl.col("error").abs() * pl.col("price")).sum(),
            bias_value=(pl.col("error") * pl.col("price")).sum(),
        )
        .with_columns(
            mae=pl.col("abs_error") / pl.col("n"),
            rmse=(pl.col("squared") / pl.col("n")).sqrt(),
            wape=pl.col("abs_error") / pl.col("demand"),
            bias_pct=pl.col("bias") / pl.col("demand"),
        )
        .with_columns(tracking_signal=pl.col("bias") / pl.col("mae"))
        .sort(["abs_error_value", *keys], descending=[True, False, False])
        .with_columns(
            rank=pl.int_range(1, pl.len() + 1),
            error_share=pl.col("abs_error_value") / pl.col("abs_error_value").sum(),
        )
        .with_columns(cum_share=pl.col("error_share").cum_sum())
        .drop("squared")
    )
    scored.collect().write_csv(args.out)
    return 0


if __name__ == "__main__":
    sys.exit(main())
