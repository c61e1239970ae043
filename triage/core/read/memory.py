"""Refusing a file whose rows would need more memory than this machine (or process) has.

The row count is known before any cell is read (a Parquet footer, a CSV line count); each way of
reading has its measured peak per row (``BYTES_PER_ROW``).
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Iterable, Mapping
from pathlib import Path

from triage.core import schema
from triage.core.read.messages import fail

#: Peak memory per row of each way of reading, in bytes: measured at 116M rows
#: (docs/performance.md: 28, 69, 73 and 130) and rounded up. A Parquet file of a billion
#: identical rows compresses to a few megabytes; the row count, known before any cell is read,
#: says what reading it would take.
BYTES_PER_ROW = {"parquet-streamed": 32, "parquet": 80, "csv-streamed": 80, "csv": 140}
#: What each competing forecast column adds per row: its float64 cell in the dense matrix and
#: one float64 copy while it is read, twice that in the full ways (the long frame holds it
#: too). Estimated from that layout, not measured.
BYTES_PER_COMPETING = {"parquet-streamed": 16, "parquet": 24, "csv-streamed": 16, "csv": 24}


def competing_columns(headers: Iterable[str], mapping: Mapping[str, str]) -> int:
    """How many competing forecast columns a file may hold: headers named ``forecast_<name>``
    and ``--columns`` entries that map one (a column counted twice only makes the estimate
    safer)."""
    return sum(schema.competing_name(h) is not None for h in headers) + sum(
        schema.competing_name(c) is not None for c in mapping
    )


def check_memory(path: Path, rows: int, way: str, competing: int = 0) -> None:
    """Refuse a file whose rows would need more memory than this machine (or process) has.

    Args:
        path: The file, for the message.
        rows: Its rows, known before any cell is read.
        way: Which way of reading (``BYTES_PER_ROW``).
        competing: Competing forecast columns it holds (``competing_columns``).
    """
    total = _memory_limit()
    need = rows * (BYTES_PER_ROW[way] + competing * BYTES_PER_COMPETING[way])
    if total is not None and need > total:
        fail(
            path,
            f"the file has {rows:,} rows; reading them takes about {_bytes(need)} of memory, "
            f"and this machine allows {_bytes(total)}.",
            "Split the file (for example by location or by range of items) and review each "
            "part, or run triage where more memory is available.",
        )


def _bytes(size: int) -> str:
    return f"{size / 2**30:,.1f} GB" if size >= 2**30 else f"{size / 2**20:,.1f} MB"


def _memory_limit() -> int | None:
    """Bytes of memory this process may use: physical memory, or a lower container or
    address-space limit; None when the system does not say."""
    limits: list[int] = []
    with contextlib.suppress(AttributeError, ValueError, OSError):
        limits.append(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES"))
    try:
        text = Path("/sys/fs/cgroup/memory.max").read_text().strip()
        if text.isdigit():
            limits.append(int(text))
    except OSError:
        pass
    try:
        import resource

        soft = resource.getrlimit(resource.RLIMIT_AS)[0]
        if soft != resource.RLIM_INFINITY and soft > 0:
            limits.append(soft)
    except (ImportError, AttributeError, ValueError, OSError):
        pass
    return min(limits) if limits else None
