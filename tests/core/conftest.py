"""Fixtures for the core tests: small portfolio files written on the fly."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import pytest

HEADER = "item,period,demand,forecast"


@pytest.fixture
def write_csv(tmp_path: Path) -> Callable[..., Path]:
    """Write CSV text (or raw bytes) to ``tmp_path/name`` and return the path."""

    def write(content: str | bytes, name: str = "portfolio.csv") -> Path:
        path = tmp_path / name
        if isinstance(content, bytes):
            path.write_bytes(content)
        else:
            # newline="" keeps the line endings exactly as written in the test.
            with path.open("w", encoding="utf-8", newline="") as handle:
                handle.write(content)
        return path

    return write


@pytest.fixture
def csv_rows(write_csv: Callable[..., Path]) -> Callable[..., Path]:
    """Write a CSV with the standard header and the given data lines."""

    def write(*lines: str, header: str = HEADER, name: str = "portfolio.csv") -> Path:
        return write_csv(header + "\n" + "".join(line + "\n" for line in lines), name)

    return write
