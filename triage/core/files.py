"""Writing files so that a reader never sees half of one, also after a kill -9.

**One file** (``write_atomic``): the new file is written in a fresh hidden scratch folder beside
the target, ``.NAME.triage-XXXXXXXX.tmp/NAME``, flushed to disk, and renamed over the target in
one step (``rename(2)`` is atomic on POSIX). The target is the old file or the new one, never a
mix; a crash leaves only the scratch folder.

**A set of files** (``write_set_atomic``): the files are written into a new folder inside the
scratch folder, flushed, and that folder then takes the set's name in one step: Linux
``renameat2(RENAME_EXCHANGE)`` swaps it with the existing set folder (the old set lands in the
scratch folder and is removed), or a plain rename when there is no set yet. Whoever opens the set
folder finds the complete old set or the complete new set.

**Leftovers.** While it works, a writer holds an exclusive ``flock`` on its scratch folder; a
crashed writer's lock is gone with its process. Every write first removes the scratch folders of
the same target that nobody holds (``clean_leftovers``): only names this module makes, never
another file. Earlier versions of triage left ``.NAME.XXXXXXXX.tmp`` and ``.NAME.XXXXXXXX.bak``
files; those are removed too.

**Replacing.** An existing target is replaced only with ``force`` (``refuse_existing`` words the
refusal for every command). A target that is a device or a pipe (``/dev/null``, ``/dev/stdout``)
is written in place: renaming over it would replace the device, and nothing is replaced.
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import hashlib
import os
import re
import shutil
import stat
import sys
import tempfile
from collections.abc import Callable, Iterable, Iterator, Sequence
from pathlib import Path

from triage.core.errors import TriageError

try:  # POSIX; without it leftovers are never judged abandoned, so none is removed.
    import fcntl
except ImportError:  # pragma: no cover - not POSIX
    fcntl = None  # type: ignore[assignment]

#: Longest target name (UTF-8 bytes) used as it is in a scratch folder's name; a longer one is
#: replaced by a digest, so the scratch name stays within NAME_MAX (255 bytes).
_NAME_IN_SCRATCH = 200
#: ``tempfile`` random names: 8 characters from this set (CPython ``_RandomNameSequence``).
_RANDOM = "[a-z0-9_]{8}"

# renameat2(2) flags (linux/fs.h).
_AT_FDCWD = -100
_RENAME_NOREPLACE = 1
_RENAME_EXCHANGE = 2


def refuse_existing(paths: Iterable[Path], *, force: bool) -> None:
    """The one rule for every file triage writes: an existing file is replaced only with force.

    A device or a pipe is not a file being replaced (it is written in place) and passes.

    Raises:
        TriageError: ``force`` is false and a target exists; it names them and what to do.
    """
    if force:
        return
    existing = [p for p in paths if _occupied(p)]
    if existing:
        names = ", ".join(str(p) for p in existing)
        raise TriageError(
            f"{names} already exist{'s' if len(existing) == 1 else ''}; nothing was written "
            "and the existing file(s) were left unchanged.",
            hint="Choose another file name, or pass --force to replace them.",
        )


def write_atomic(path: str | Path, write: Callable[[Path], None], *, force: bool = True) -> Path:
    """Write ``path`` all or nothing: in a scratch folder beside it, then renamed into place.

    ``write`` receives the path to create and fills it; it may put scratch files of its own in
    that path's folder (they are removed with it). On any failure, or a kill, the target is
    unchanged. A target that is a device or a pipe is written directly.

    Raises:
        TriageError: The target exists and ``force`` is false, or it cannot be written (the
            message names the file and the system's reason).
    """
    target = Path(path)
    if _special(target):
        _write_in_place(target, write)
        return target
    refuse_existing([target], force=force)
    folder = _folder_of(target)
    clean_leftovers(folder, target.name)
    try:
        with _scratch(folder, target.name) as scratch:
            tmp = scratch / target.name
            write(tmp)
            _keep_mode(target, tmp)
            _fsync(tmp)
            _rename(tmp, target, replace=force)
            _fsync(folder)
    except OSError as exc:
        raise _write_error(target, exc) from exc
    return target


def write_set_atomic(
    folder: str | Path,
    files: Sequence[tuple[str, Callable[[Path], None]]],
    *,
    force: bool,
    owned: Callable[[str], bool] | None = None,
) -> tuple[Path, ...]:
    """Write several files as one set in ``folder``: all old or all new, also under kill -9.

    Args:
        folder: The set's folder; created, or replaced as a whole.
        files: (file name, writer) in the order to write them; each writer receives the path
            to create in the new folder.
        force: Replace an existing set folder. Even then a folder that holds anything but the
            set's files is refused: those files are not ours to delete.
        owned: Which other names in an existing set folder an earlier set of the same kind
            wrote (a scorecard of more parts), so that ``force`` replaces them too.

    Returns:
        The paths of the files in ``folder``.

    Raises:
        TriageError: The folder exists (without ``force``), is not a folder, holds other files,
            or cannot be written; nothing was changed.
    """
    target = Path(folder)
    names = [name for name, _ in files]
    parent = _folder_of(target)
    if target.is_symlink() or (target.exists() and not target.is_dir()):
        kind = "a link" if target.is_symlink() else "not a folder"
        raise TriageError(
            f"{target} exists and is {kind}; this export writes a folder of that name and "
            "replaces only such a folder. It was left unchanged.",
            hint="Choose another file name.",
        )
    refuse_existing([target], force=force)
    if target.exists():
        try:
            others = sorted(
                name
                for name in set(os.listdir(target)) - set(names)
                if owned is None or not owned(name)
            )
        except OSError as exc:
            raise _write_error(target, exc) from exc
        if others:
            shown = ", ".join(others[:5]) + (
                f" and {len(others) - 5} more" if len(others) > 5 else ""
            )
            raise TriageError(
                f"{target} holds files that are not part of this export ({shown}); nothing was "
                "changed, and they are not deleted even with --force.",
                hint="Move them out of the folder, or choose another file name.",
            )
    clean_leftovers(parent, target.name)
    current = target
    try:
        with _scratch(parent, target.name) as scratch:
            new = scratch / target.name
            os.mkdir(new)
            for name, write in files:
                current = target / name
                write(new / name)
                _fsync(new / name)
            current = target
            _keep_mode(target, new)
            _fsync(new)
            if target.exists():
                _exchange(new, target, scratch)
            else:
                _rename(new, target, replace=False)
            _fsync(parent)
    except OSError as exc:
        raise _write_error(current, exc) from exc
    return tuple(target / name for name in names)


def write_text_atomic(path: str | Path, text: str, *, force: bool = True) -> Path:
    """Atomically write UTF-8 text (see ``write_atomic``)."""
    return write_blocks_atomic(path, [text.encode("utf-8")], force=force)


def write_blocks_atomic(path: str | Path, blocks: Iterable[bytes], *, force: bool = True) -> Path:
    """Atomically write a file from blocks of bytes, each written as it comes.

    See :func:`write_atomic`.
    """

    def write(p: Path) -> None:
        with p.open("wb") as handle:
            for block in blocks:
                handle.write(block)

    return write_atomic(path, write, force=force)


def sha256_of(path: Path) -> str:
    """The SHA-256 of a file, hex (for a manifest a reader checks)."""
    with path.open("rb") as handle:
        return hashlib.file_digest(handle, "sha256").hexdigest()


# --------------------------------------------------------------------------------------------
# Leftovers


def _scratch_names(name: str) -> re.Pattern[str]:
    """Scratch folders ``write_atomic`` and ``write_set_atomic`` make for a target ``name``."""
    return re.compile(rf"\.{re.escape(_scratch_stem(name))}\.triage-{_RANDOM}\.tmp")


def in_scratch(path: Path) -> bool:
    """Whether ``path`` is the file ``write_atomic`` asked to be written, in its scratch folder.

    A writer may then put scratch files of its own beside it; they go with the folder.
    """
    return bool(_scratch_names(path.name).fullmatch(path.parent.name))


def _legacy_names(name: str) -> re.Pattern[str]:
    """Temporary and backup files earlier versions of triage left beside ``name``."""
    return re.compile(rf"\.{re.escape(name)}\.(?:{_RANDOM}\.tmp|[0-9a-f]{{8}}\.bak)")


def clean_leftovers(folder: str | Path, name: str) -> list[Path]:
    """Remove what crashed writes of ``name`` left in ``folder``; returns what was removed.

    A scratch folder is removed only when no process holds its lock (its writer is gone);
    the temporary and backup files of earlier versions (which took no lock) always. Nothing
    else is touched, and a failure to remove is silent: it is tried again next time.
    """
    where = Path(folder)
    scratch, legacy = _scratch_names(name), _legacy_names(name)
    removed: list[Path] = []
    try:
        entries = list(os.scandir(where))
    except OSError:
        return removed
    for entry in entries:
        path = where / entry.name
        with contextlib.suppress(OSError):
            if scratch.fullmatch(entry.name) and entry.is_dir(follow_symlinks=False):
                if _remove_if_abandoned(path):
                    removed.append(path)
            elif legacy.fullmatch(entry.name) and entry.is_file(follow_symlinks=False):
                os.unlink(path)
                removed.append(path)
    return removed


def _remove_if_abandoned(path: Path) -> bool:
    if fcntl is None:
        return False
    fd = os.open(path, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0) | getattr(os, "O_NOFOLLOW", 0))
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            return False  # a live writer holds it, or locks are not supported here: keep it
        shutil.rmtree(path)
        return True
    finally:
        os.close(fd)


@contextlib.contextmanager
def _scratch(folder: Path, name: str) -> Iterator[Path]:
    """A fresh hidden folder beside the target, locked while in use and removed afterwards.

    Another run that cleans leftovers between ``mkdtemp`` and ``flock`` (microseconds) would
    remove it: the write then fails with a message and changes nothing.
    """
    try:
        path = Path(
            tempfile.mkdtemp(prefix=f".{_scratch_stem(name)}.triage-", suffix=".tmp", dir=folder)
        )
    except OSError as exc:
        raise TriageError(
            f"cannot write to {folder}: {exc.strerror or exc}; nothing was changed.",
            hint="Choose another folder, or check its permissions and free space.",
        ) from exc
    fd = None
    with contextlib.suppress(OSError):
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
        if fcntl is not None:
            with contextlib.suppress(OSError):
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    try:
        yield path
    finally:
        shutil.rmtree(path, ignore_errors=True)
        if fd is not None:
            os.close(fd)


def _scratch_stem(name: str) -> str:
    if len(name.encode("utf-8", "surrogateescape")) <= _NAME_IN_SCRATCH:
        return name
    return hashlib.sha256(name.encode("utf-8", "surrogateescape")).hexdigest()[:32]


# --------------------------------------------------------------------------------------------
# Renaming


def _rename(src: Path, dst: Path, *, replace: bool) -> None:
    """Rename ``src`` to ``dst``; without ``replace``, fail if ``dst`` appeared meanwhile."""
    if replace:
        os.replace(src, dst)
        return
    if _renameat2(src, dst, _RENAME_NOREPLACE):
        return
    if dst.exists() or dst.is_symlink():
        raise FileExistsError(errno.EEXIST, os.strerror(errno.EEXIST), str(dst))
    os.rename(src, dst)


def _exchange(new: Path, target: Path, scratch: Path) -> None:
    """Put the folder ``new`` in the place of the folder ``target`` in one step."""
    if _renameat2(new, target, _RENAME_EXCHANGE):
        return
    # No atomic exchange here (not Linux, or a file system without it): move the old set
    # aside first. A crash between the two renames leaves no set under the name, and the old
    # one complete in the scratch folder until the next run cleans it (docs/export.md).
    aside = scratch / ".old"
    os.rename(target, aside)
    try:
        os.rename(new, target)
    except OSError:
        os.rename(aside, target)  # put the old set back before the scratch folder goes
        raise


def _renameat2(src: Path, dst: Path, flags: int) -> bool:
    """``renameat2(2)``; False when this system or file system does not offer it."""
    function = _libc_renameat2()
    if function is None:
        return False
    done = function(_AT_FDCWD, os.fsencode(src), _AT_FDCWD, os.fsencode(dst), flags)
    if done == 0:
        return True
    code = ctypes.get_errno()
    if code in (errno.EINVAL, errno.ENOSYS, errno.ENOTSUP, errno.EOPNOTSUPP):
        return False
    raise OSError(code, os.strerror(code), str(dst))


_RENAMEAT2: list[Callable[..., int] | None] = []


def _libc_renameat2() -> Callable[..., int] | None:
    if not _RENAMEAT2:
        function = None
        if sys.platform.startswith("linux"):
            with contextlib.suppress(OSError, AttributeError):
                libc = ctypes.CDLL(None, use_errno=True)
                function = libc.renameat2
                function.argtypes = (
                    ctypes.c_int,
                    ctypes.c_char_p,
                    ctypes.c_int,
                    ctypes.c_char_p,
                    ctypes.c_uint,
                )
                function.restype = ctypes.c_int
        _RENAMEAT2.append(function)
    return _RENAMEAT2[0]


# --------------------------------------------------------------------------------------------
# Helpers


def _occupied(path: Path) -> bool:
    """A name that writing would replace: a file, a folder or a dangling link (a device or a
    pipe, also behind a link, is written in place instead)."""
    if path.exists():
        return not _special(path)
    return path.is_symlink()


def _special(path: Path) -> bool:
    """An existing device, pipe or socket (after following links)."""
    try:
        mode = path.stat().st_mode
    except OSError:
        return False
    return not (stat.S_ISREG(mode) or stat.S_ISDIR(mode))


def _write_in_place(target: Path, write: Callable[[Path], None]) -> None:
    try:
        write(target)
    except OSError as exc:
        raise TriageError(
            f"could not write to {target}, a device or pipe written in place: "
            f"{exc.strerror or exc}.",
            hint="Give a regular file as the target, or check the device.",
        ) from exc


def _write_error(target: Path, exc: OSError) -> TriageError:
    return TriageError(
        f"could not write {target}: {exc.strerror or exc}; nothing was changed.",
        hint="Check the free space and permissions of the folder, then try again.",
    )


def _folder_of(target: Path) -> Path:
    return target.parent if str(target.parent) else Path(".")


def _keep_mode(target: Path, new: Path) -> None:
    """Give ``new`` the permissions of the file or folder it replaces."""
    with contextlib.suppress(OSError):
        if target.exists():
            os.chmod(new, stat.S_IMODE(target.stat().st_mode))


def _fsync(path: Path) -> None:
    """Flush a file's data (or a folder's entries, POSIX) to disk."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError as exc:
        # A folder cannot be fsync'ed on some systems; a file's failed flush is a failed write.
        if not path.is_dir():
            raise
        del exc
    finally:
        os.close(fd)
