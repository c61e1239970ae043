"""The reopen cache: a loaded portfolio and its scorecard, kept to open the same file again fast.

Reading a large file into dense arrays takes most of a review's start (docs/performance.md).
A planner reopens the same week's file every morning, so the review screens keep what the read
made, in the user cache folder (``platformdirs.user_cache_dir("triage")``, ``portfolios/``):

* one entry (a folder) per file, named by its **lookup key**: the SHA-256 of the cache format,
  a digest of the source of the modules that decide the arrays and the scorecard, the read
  options (columns, sheet, lag, file options), the file's resolved path, its size and
  ``st_mtime_ns``, and the SHA-256 of its first and last MiB. A file that changes changes its key
  and is read afresh; its older entry is removed when the new one is stored;
* in the entry: every array as a numpy ``.npy`` file, opened memory-mapped (copy on write:
  pages come from the file as they are used, nothing is written back), the keys frame and the
  scorecards (one per window and season) as Arrow IPC files, and ``meta.json`` (calendar, lags,
  notices, and the SHA-256 of the whole file as it was stored);
* **checked on every hit**: the SHA-256 of the whole file is computed and must equal the stored
  one; otherwise the entry is removed and the file read afresh. So a cached portfolio is the
  file's own content, and ``Portfolio.fingerprint`` (what every decision stores) is the hash
  just computed, never an older one;
* written all or nothing (``files.write_set_atomic``: a scratch folder, fsync, one rename), so
  a writer killed at any moment leaves no entry, only a scratch folder that the next write
  removes; a half-written entry is never read;
* bounded: after each store the least recently used entries are removed until the folder holds
  at most ``settings.CACHE_LIMIT_MB``; an entry larger than the limit is not stored.

Nothing here is needed for correctness: every failure to read or write the cache falls back to
reading the file (``CacheMiss`` says why, for the record).
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import shutil
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from triage.core import files
from triage.core.portfolio import Calendar, Portfolio, UnitPrices

#: Layout of an entry; an entry of another format is never read.
FORMAT = 2
#: How much of each end of the file the lookup key hashes.
SAMPLE_BYTES = 1 << 20
META = "meta.json"
#: The modules whose code decides what a load or a scorecard holds (their source is hashed
#: into the key, so a changed loader never reads an older loader's entry).
_CODE_MODULES = (
    "triage.core.read",
    "triage.core.portfolio",
    "triage.core.ranking",
    "triage.core.metrics",
    "triage.core.compare",
    "triage.core.schema",
    "triage.core.dialect",
    "triage.core.cache",
)


def default_folder() -> Path:
    """``portfolios/`` in the user cache folder."""
    from platformdirs import user_cache_dir

    return Path(user_cache_dir("triage")) / "portfolios"


@dataclass(frozen=True)
class Stamp:
    """What the lookup key is made of, taken before the file is read."""

    path: Path
    """The file, resolved."""
    size: int
    mtime_ns: int
    sample: str
    """SHA-256 of the first and last ``SAMPLE_BYTES`` of the file."""
    key: str
    """The entry's name."""

    def still(self) -> bool:
        """Whether the file still has this size and modification time."""
        try:
            st = self.path.stat()
        except OSError:
            return False
        return (st.st_size, st.st_mtime_ns) == (self.size, self.mtime_ns)


def _code_digest() -> str:
    import importlib

    digest = hashlib.sha256()
    for name in _CODE_MODULES:
        module = importlib.import_module(name)
        origin = Path(str(module.__file__))
        sources = sorted(origin.parent.glob("*.py")) if origin.name == "__init__.py" else [origin]
        for source in sources:
            digest.update(source.name.encode())
            digest.update(source.read_bytes())
    return digest.hexdigest()


def stamp(path: Path, read_options: Mapping[str, object]) -> Stamp:
    """The lookup key of ``path`` read with ``read_options`` (see the module docstring).

    Raises:
        OSError: The file cannot be read.
    """
    path = path.resolve()
    st = path.stat()
    sample = hashlib.sha256()
    with path.open("rb") as handle:
        sample.update(handle.read(SAMPLE_BYTES))
        if st.st_size > SAMPLE_BYTES:
            handle.seek(max(SAMPLE_BYTES, st.st_size - SAMPLE_BYTES))
            sample.update(handle.read(SAMPLE_BYTES))
    key = hashlib.sha256()
    for part in (
        str(FORMAT),
        _code_digest(),
        json.dumps({k: repr(v) for k, v in sorted(read_options.items())}),
        str(path),
        str(st.st_size),
        str(st.st_mtime_ns),
        sample.hexdigest(),
    ):
        key.update(part.encode("utf-8", "surrogateescape"))
        key.update(b"\0")
    return Stamp(path, st.st_size, st.st_mtime_ns, sample.hexdigest(), key.hexdigest()[:40])


def card_name(window: int, season: int) -> str:
    """The scorecard file of one window and season."""
    return f"card-w{window}-s{season}.arrow"


# --------------------------------------------------------------------------------------------
# Reading


@dataclass(frozen=True)
class Hit:
    """A portfolio from the cache (its arrays memory-mapped) and the entry it came from."""

    portfolio: Portfolio
    entry: Path


def load(found: Stamp, folder: Path) -> Hit | None:
    """The cached portfolio of ``found``, or None (no entry, or one that fails its checks:
    removed). The whole file's SHA-256 is checked against the stored one (module docstring).
    """
    entry = folder / found.key
    if not (entry / META).is_file():
        return None
    try:
        meta = json.loads((entry / META).read_text(encoding="utf-8"))
        if meta.get("format") != FORMAT or meta.get("key") != found.key:
            raise ValueError("another format")
        fingerprint = files.sha256_of(found.path)
        if fingerprint != meta["fingerprint"] or not found.still():
            raise ValueError("the file's content differs from the stored one")
        portfolio = _portfolio(entry, meta, found.path)
    except (OSError, ValueError, KeyError, TypeError) as exc:
        drop(entry, str(exc))
        return None
    # The hash just computed is the file's: what decisions store (Portfolio.fingerprint).
    portfolio.__dict__["fingerprint"] = fingerprint
    _touch(entry)
    return Hit(portfolio, entry)


def load_card(entry: Path, window: int, season: int) -> pd.DataFrame | None:
    """The cached scorecard of one window and season (review order), or None."""
    path = entry / card_name(window, season)
    if not path.is_file():
        return None
    try:
        return _read_frame(path)
    except (OSError, ValueError):
        with contextlib.suppress(OSError):
            path.unlink()
        return None


def _array(entry: Path, name: str) -> np.ndarray:
    array: np.ndarray = np.load(entry / f"{name}.npy", mmap_mode="c", allow_pickle=False)
    return array


def _read_frame(path: Path) -> pd.DataFrame:
    import pyarrow as pa

    with pa.memory_map(str(path), "r") as source:
        table = pa.ipc.open_file(source).read_all()
    frame: pd.DataFrame = table.to_pandas()
    return frame


def _portfolio(entry: Path, meta: dict[str, Any], path: Path) -> Portfolio:
    periods = pd.DatetimeIndex(
        np.load(entry / "periods.npy", allow_pickle=False),
        freq=meta["periods_freq"],
        name=meta["periods_name"],
    )
    price = (
        UnitPrices(
            _array(entry, "price_base"), _array(entry, "price_rows"), _array(entry, "price_values")
        )
        if meta["priced"]
        else None
    )
    keys = _read_frame(entry / "keys.arrow")
    return Portfolio(
        path=path,
        keys=keys,
        key_columns=tuple(meta["key_columns"]),
        attributes=tuple(meta["attributes"]),
        calendar=Calendar(meta["freq"], periods),
        demand=_array(entry, "demand"),
        forecast=_array(entry, "forecast"),
        price=price,
        last_actual=int(meta["last_actual"]),
        lag=meta["lag"],
        lags=tuple(meta["lags"]),
        rows=int(meta["rows"]),
        notices=tuple(meta["notices"]),
        units_reason=str(meta["units_reason"]),
        competing={
            name: _array(entry, f"competing_{i}") for i, name in enumerate(meta["competing"])
        },
    )


# --------------------------------------------------------------------------------------------
# Writing


def _npy(array: np.ndarray) -> Callable[[Path], None]:
    def write(target: Path) -> None:
        with target.open("wb") as handle:
            np.save(handle, np.ascontiguousarray(array), allow_pickle=False)

    return write


def _arrow(frame: pd.DataFrame) -> Callable[[Path], None]:
    def write(target: Path) -> None:
        import pyarrow as pa

        table = pa.Table.from_pandas(frame, preserve_index=True)
        with pa.OSFile(str(target), "wb") as sink, pa.ipc.new_file(sink, table.schema) as out:
            out.write_table(table)

    return write


def _meta(meta: dict[str, Any]) -> Callable[[Path], None]:
    def write(target: Path) -> None:
        target.write_text(json.dumps(meta, indent=1), encoding="utf-8")

    return write


class Cancelled(OSError):
    """A cache write stopped because the app closes."""


def _unless(cancelled: Callable[[], bool], write: Callable[[Path], None]) -> Callable[[Path], None]:
    def guarded(target: Path) -> None:
        if cancelled():
            raise Cancelled("the app closed while the cache was written")
        write(target)

    return guarded


def entry_bytes(portfolio: Portfolio) -> int:
    """About how many bytes an entry of ``portfolio`` takes (its arrays; text is extra)."""
    arrays = [portfolio.demand, portfolio.forecast, *portfolio.competing.values()]
    size = sum(a.nbytes for a in arrays)
    if portfolio.price is not None:
        size += portfolio.price._values.nbytes + portfolio.price._base.nbytes * 2
    return size


def store(
    found: Stamp,
    portfolio: Portfolio,
    cards: Mapping[tuple[int, int], pd.DataFrame],
    folder: Path,
    limit_bytes: int,
    *,
    cancelled: Callable[[], bool] = lambda: False,
) -> Path | None:
    """Keep ``portfolio`` (read from ``found``'s file) and its scorecards by (window, season).

    Nothing is stored when the entry would exceed ``limit_bytes``, or when the file changed
    since ``found`` was taken (the arrays would not be its content). Other entries of the same
    file are removed, then the least recently used ones beyond the limit.

    Args:
        found: The file's stamp, taken before it was read.
        portfolio: What the read made of it.
        cards: Its scorecards, by (window, season).
        folder: The cache folder.
        limit_bytes: The cache's bound.
        cancelled: Asked before each file is written; True stops the write (nothing is left).

    Returns:
        The entry, or None when nothing was stored.

    Raises:
        TriageError: The entry cannot be written (``files.write_set_atomic``), or the write
            was cancelled; nothing is left.
    """
    if entry_bytes(portfolio) > limit_bytes or not found.still():
        return None
    fingerprint = portfolio.fingerprint
    if not found.still():
        return None
    calendar = portfolio.calendar
    meta: dict[str, Any] = {
        "format": FORMAT,
        "key": found.key,
        "path": str(found.path),
        "size": found.size,
        "mtime_ns": found.mtime_ns,
        "sample": found.sample,
        "fingerprint": fingerprint,
        "freq": calendar.freq,
        "periods_freq": calendar.periods.freqstr,
        "periods_name": calendar.periods.name,
        "key_columns": list(portfolio.key_columns),
        "attributes": list(portfolio.attributes),
        "last_actual": portfolio.last_actual,
        "lag": portfolio.lag,
        "lags": list(portfolio.lags),
        "rows": portfolio.rows,
        "notices": list(portfolio.notices),
        "competing": list(portfolio.competing),
        "priced": portfolio.price is not None,
        "units_reason": portfolio.units_reason,
        "stored_at": time.time(),
    }
    parts: list[tuple[str, Callable[[Path], None]]] = [
        ("periods.npy", _npy(calendar.periods.to_numpy())),
        ("demand.npy", _npy(portfolio.demand)),
        ("forecast.npy", _npy(portfolio.forecast)),
        ("keys.arrow", _arrow(portfolio.keys)),
    ]
    for i, values in enumerate(portfolio.competing.values()):
        parts.append((f"competing_{i}.npy", _npy(values)))
    if portfolio.price is not None:
        price = portfolio.price
        parts += [
            ("price_base.npy", _npy(price._base)),
            ("price_rows.npy", _npy(price._rows)),
            ("price_values.npy", _npy(price._values)),
        ]
    for (window, season), card in cards.items():
        parts.append((card_name(window, season), _arrow(card)))
    parts.append((META, _meta(meta)))  # last: an entry without it is never read
    parts = [(name, _unless(cancelled, write)) for name, write in parts]
    folder.mkdir(parents=True, exist_ok=True)
    entry = folder / found.key
    if entry.exists():
        drop(entry, "rewritten")
    files.write_set_atomic(entry, parts, force=False)
    for other in _entries(folder):
        if other.name != found.key and _meta_of(other).get("path") == str(found.path):
            drop(other, "the file changed")
    evict(folder, limit_bytes, keep=entry)
    return entry


def store_card(entry: Path, window: int, season: int, card: pd.DataFrame) -> None:
    """Add one scorecard to an entry (all or nothing)."""
    files.write_atomic(entry / card_name(window, season), _arrow(card), force=True)


# --------------------------------------------------------------------------------------------
# Stored scorecards of datasets (``review DATASET --scorecard DIR``)

#: The file of a stored scorecard's entry: its table as Arrow IPC, opened memory-mapped.
SCORECARD = "scorecard.arrow"


def scorecard_key(folder: Path, files_of: Sequence[Path], description: bytes) -> str:
    """The lookup key of a stored scorecard: the SHA-256 of the cache format, the folder's
    resolved path, its description's bytes, and each scorecard file's name, size and
    ``st_mtime_ns``. A scorecard made again (or a file of it touched) gets another key."""
    digest = hashlib.sha256()
    digest.update(f"scorecard {FORMAT} {folder.resolve()}".encode())
    digest.update(description)
    for path in files_of:
        stat = path.stat()
        digest.update(f"{path.name} {stat.st_size} {stat.st_mtime_ns}".encode())
    return digest.hexdigest()


def load_scorecard(key: str, folder: Path) -> Any | None:
    """The stored scorecard's Arrow table of entry ``key``, memory-mapped, or None when the
    cache has no complete entry of it."""
    import pyarrow as pa

    entry = folder / key
    if _meta_of(entry).get("format") != FORMAT:
        return None
    try:
        table = pa.ipc.open_file(pa.memory_map(str(entry / SCORECARD))).read_all()
    except (OSError, pa.ArrowException):
        drop(entry, "unreadable")
        return None
    _touch(entry)
    return table


def store_scorecard(
    key: str,
    card: pd.DataFrame,
    source: Path,
    folder: Path,
    limit_bytes: int,
    *,
    cancelled: Callable[[], bool] = lambda: False,
) -> Path | None:
    """Keep a stored scorecard's table (``card``, as read) in entry ``key``, all or nothing,
    then bound the folder as portfolio entries are bounded (the same limit for both).

    Returns:
        The entry, or None when the table alone is larger than the limit.
    """
    import pyarrow as pa

    table = pa.Table.from_pandas(card, preserve_index=False)
    if table.nbytes > limit_bytes:
        return None

    def write(target: Path) -> None:
        with pa.OSFile(str(target), "wb") as sink, pa.ipc.new_file(sink, table.schema) as out:
            out.write_table(table)

    meta = {"format": FORMAT, "kind": "scorecard", "path": str(source), "stored_at": time.time()}
    parts = [(SCORECARD, _unless(cancelled, write)), (META, _unless(cancelled, _meta(meta)))]
    folder.mkdir(parents=True, exist_ok=True)
    entry = folder / key
    if entry.exists():
        drop(entry, "rewritten")
    files.write_set_atomic(entry, parts, force=False)
    for other in _entries(folder):
        if other.name != key and _meta_of(other).get("path") == str(source):
            drop(other, "the scorecard was made again")
    evict(folder, limit_bytes, keep=entry)
    return entry


# --------------------------------------------------------------------------------------------
# Upkeep


def _entries(folder: Path) -> list[Path]:
    try:
        return [p for p in folder.iterdir() if p.is_dir() and not p.name.startswith(".")]
    except OSError:
        return []


def _meta_of(entry: Path) -> dict[str, Any]:
    try:
        meta: dict[str, Any] = json.loads((entry / META).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return meta


def _size(entry: Path) -> int:
    total = 0
    for item in entry.iterdir():
        with contextlib.suppress(OSError):
            total += item.stat().st_size
    return total


def _touch(entry: Path) -> None:
    with contextlib.suppress(OSError):
        os.utime(entry)


def drop(entry: Path, reason: str = "") -> None:
    """Remove an entry (a reader that has it memory-mapped keeps its pages)."""
    _ = reason
    shutil.rmtree(entry, ignore_errors=True)


def evict(folder: Path, limit_bytes: int, *, keep: Path | None = None) -> list[Path]:
    """Remove the least recently used entries until the folder holds at most ``limit_bytes``.

    Returns:
        The entries removed.
    """
    entries = []
    for entry in _entries(folder):
        try:
            entries.append((entry.stat().st_mtime, entry, _size(entry)))
        except OSError:
            continue
    total = sum(size for _, _, size in entries)
    removed = []
    for _, entry, size in sorted(entries, key=lambda e: e[0]):
        if total <= limit_bytes:
            break
        if keep is not None and entry == keep:
            continue
        drop(entry, "over the limit")
        removed.append(entry)
        total -= size
    return removed
