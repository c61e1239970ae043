"""The reopen cache (``triage.core.cache``): a cached portfolio is the freshly read one, a changed
file is read afresh, the folder stays within its bound, and a write killed at any moment leaves
no entry that would be read.
"""

from __future__ import annotations

import os
import shutil
import signal
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from sample import generate
from tests.core.test_export_kill import in_child
from triage.core import cache, files
from triage.core.portfolio import Portfolio
from triage.core.ranking import scorecard
from triage.core.read import read_portfolio

SAMPLE = Path(__file__).resolve().parents[2] / "sample" / "portfolio.csv"
OPTIONS = {"columns": None, "sheet": None, "lag": None, "file_options": None}
BIG = 1 << 40


def assert_same(cached: Portfolio, fresh: Portfolio) -> None:
    """Every field of two portfolios, arrays element by element (NaN where NaN)."""
    pd.testing.assert_frame_equal(cached.keys, fresh.keys, check_exact=True)
    assert cached.key_columns == fresh.key_columns
    assert cached.attributes == fresh.attributes
    assert cached.calendar.freq == fresh.calendar.freq
    assert cached.calendar.periods.equals(fresh.calendar.periods)
    assert cached.calendar.periods.dtype == fresh.calendar.periods.dtype
    assert cached.calendar.periods.freq == fresh.calendar.periods.freq
    for name in ("demand", "forecast"):
        a, b = getattr(cached, name), getattr(fresh, name)
        assert a.dtype == b.dtype and a.shape == b.shape
        np.testing.assert_array_equal(a, b)
    assert list(cached.competing) == list(fresh.competing)
    for name, values in fresh.competing.items():
        np.testing.assert_array_equal(cached.competing[name], values)
    if fresh.price is None:
        assert cached.price is None
    else:
        assert cached.price is not None
        np.testing.assert_array_equal(np.asarray(cached.price), np.asarray(fresh.price))
        np.testing.assert_array_equal(cached.price.changing, fresh.price.changing)
    assert cached.last_actual == fresh.last_actual
    assert (cached.lag, cached.lags, cached.rows) == (fresh.lag, fresh.lags, fresh.rows)
    assert cached.notices == fresh.notices
    assert cached.cycle == fresh.cycle
    assert cached.fingerprint == fresh.fingerprint


@pytest.fixture
def parquet(tmp_path: Path) -> Path:
    """A priced Parquet portfolio over 2 MiB (longer than the key's two sampled ends)."""
    path = tmp_path / "week.parquet"
    generate.write_parquet(path, 3000, competing=True)
    assert path.stat().st_size > 2 * cache.SAMPLE_BYTES
    return path


@pytest.mark.parametrize("source", ["csv", "parquet"])
def test_cached_portfolio_is_the_fresh_one(source: str, tmp_path: Path, request) -> None:
    if source == "csv":
        path = tmp_path / "week.csv"
        shutil.copy(SAMPLE, path)
    else:
        path = request.getfixturevalue("parquet")
    folder = tmp_path / "cache"
    fresh = read_portfolio(path)
    card = scorecard(fresh, 13, 1)
    found = cache.stamp(path, OPTIONS)
    assert cache.load(found, folder) is None
    entry = cache.store(found, fresh, {(13, 1): card}, folder, BIG)
    assert entry is not None and entry.parent == folder

    again = read_portfolio(path)  # what a second fresh read gives, fingerprint not yet taken
    hit = cache.load(cache.stamp(path, OPTIONS), folder)
    assert hit is not None
    assert isinstance(hit.portfolio.demand, np.memmap)
    assert_same(hit.portfolio, again)
    # The fingerprint decisions store is the whole file's SHA-256 (docs/ledger.md).
    assert hit.portfolio.fingerprint == files.sha256_of(path)
    cached_card = cache.load_card(hit.entry, 13, 1)
    assert cached_card is not None
    pd.testing.assert_frame_equal(cached_card, card, check_exact=True)
    pd.testing.assert_frame_equal(cached_card, scorecard(hit.portfolio, 13, 1), check_exact=True)
    assert cache.load_card(hit.entry, 8, 1) is None  # another window: not stored
    cache.store_card(hit.entry, 8, 1, scorecard(again, 8, 1))
    pd.testing.assert_frame_equal(cache.load_card(hit.entry, 8, 1), scorecard(again, 8, 1))


def test_read_options_are_part_of_the_key(tmp_path: Path) -> None:
    path = tmp_path / "week.csv"
    shutil.copy(SAMPLE, path)
    assert cache.stamp(path, OPTIONS).key != cache.stamp(path, {**OPTIONS, "lag": 1}).key
    assert cache.stamp(path, OPTIONS).key == cache.stamp(path, dict(OPTIONS)).key


def test_changed_file_is_read_afresh_and_its_old_entry_goes(tmp_path: Path) -> None:
    path = tmp_path / "week.csv"
    shutil.copy(SAMPLE, path)
    folder = tmp_path / "cache"
    old = cache.stamp(path, OPTIONS)
    cache.store(old, read_portfolio(path), {}, folder, BIG)
    text = path.read_text()
    lines = text.splitlines(keepends=True)
    path.write_text("".join(lines[:-1]))  # one row fewer
    new = cache.stamp(path, OPTIONS)
    assert new.key != old.key
    assert cache.load(new, folder) is None
    cache.store(new, read_portfolio(path), {}, folder, BIG)
    assert [p.name for p in folder.iterdir() if not p.name.startswith(".")] == [new.key]


def test_same_size_and_time_other_content_is_not_used(parquet: Path, tmp_path: Path) -> None:
    """A byte changed in the middle, size and modification time put back: the lookup key is the
    same, the whole-file hash is not, so the entry is dropped and the file read afresh."""
    folder = tmp_path / "cache"
    found = cache.stamp(parquet, OPTIONS)
    cache.store(found, read_portfolio(parquet), {}, folder, BIG)
    st = parquet.stat()
    data = bytearray(parquet.read_bytes())
    middle = len(data) // 2
    data[middle] ^= 0xFF
    parquet.write_bytes(bytes(data))
    os.utime(parquet, ns=(st.st_atime_ns, st.st_mtime_ns))
    same = cache.stamp(parquet, OPTIONS)
    assert same.key == found.key
    assert cache.load(same, folder) is None
    assert not (folder / found.key).exists()


def test_folder_stays_within_its_limit(tmp_path: Path) -> None:
    folder = tmp_path / "cache"
    paths = []
    for i in range(3):
        path = tmp_path / f"week{i}.csv"
        shutil.copy(SAMPLE, path)
        paths.append(path)
    first = read_portfolio(paths[0])
    one = cache.entry_bytes(first)
    # Room for two entries (text and metadata take some more than the arrays).
    limit = 2 * one + one // 2
    stamps = []
    for n, path in enumerate(paths):
        found = cache.stamp(path, OPTIONS)
        stamps.append(found)
        assert cache.store(found, read_portfolio(path), {}, folder, limit) is not None
        os.utime(folder / found.key, (1_000_000 + n, 1_000_000 + n))  # oldest first
    cache.evict(folder, limit)
    kept = sorted(p.name for p in folder.iterdir() if not p.name.startswith("."))
    assert kept == sorted(s.key for s in stamps[1:])  # the least recently used went
    assert sum(cache._size(folder / k) for k in kept) <= limit
    # An entry larger than the limit is not stored at all.
    assert cache.store(stamps[0], first, {}, folder, one // 2) is None


def test_a_write_killed_at_any_step_leaves_no_entry_that_is_read(tmp_path: Path) -> None:
    """Reliability rule: all or nothing under kill -9. The child SIGKILLs itself before its
    k-th file-system change, for every k (tests/core/test_export_kill.py's harness)."""
    path = tmp_path / "week.csv"
    shutil.copy(SAMPLE, path)
    folder = tmp_path / "cache"
    fresh = read_portfolio(path)
    card = scorecard(fresh, 13, 1)
    found = cache.stamp(path, OPTIONS)

    def write() -> None:
        cache.store(found, fresh, {(13, 1): card}, folder, BIG)

    status, changes = in_child(write, kill_at=None)
    assert os.WIFEXITED(status) and os.WEXITSTATUS(status) == 0 and changes > 5
    shutil.rmtree(folder)
    for k in range(1, changes + 1):
        status, _ = in_child(write, kill_at=k)
        assert os.WIFSIGNALED(status) and os.WTERMSIG(status) == signal.SIGKILL, k
        hit = cache.load(found, folder)
        if hit is not None:  # only a complete entry is ever read
            assert_same(hit.portfolio, read_portfolio(path))
            pd.testing.assert_frame_equal(cache.load_card(hit.entry, 13, 1), card)
        shutil.rmtree(folder / found.key, ignore_errors=True)
    # The next write removes what the killed ones left.
    assert cache.store(found, fresh, {(13, 1): card}, folder, BIG) is not None
    assert [p.name for p in folder.iterdir()] == [found.key]
    assert_same(cache.load(found, folder).portfolio, read_portfolio(path))
