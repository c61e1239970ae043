"""Command-line options shared by several subcommands, defined once."""

from __future__ import annotations

import argparse
from pathlib import Path


def portfolio_args(parser: argparse.ArgumentParser) -> None:
    """The portfolio file and how to read it: ``PORTFOLIO --columns --sheet --lag``."""
    parser.add_argument("portfolio", type=Path, help="portfolio file: .csv, .parquet or .xlsx")
    parser.add_argument(
        "--columns",
        metavar="MAP",
        help="map our column names to the file's headers, e.g. demand=qty_shipped,item=sku",
    )
    parser.add_argument("--sheet", help="xlsx sheet to read (default: the first visible sheet)")
    parser.add_argument("--lag", type=int, help="forecast lag to score, when the file holds several")


def score_args(parser: argparse.ArgumentParser) -> None:
    """How series are scored: ``--window --season``."""
    parser.add_argument(
        "--window", type=int, default=13, help="latest periods with actual demand to score (default 13)"
    )
    parser.add_argument(
        "--season", type=int, default=1, help="seasonal period of the naive baseline (default 1)"
    )
