"""Writing files so that a reader never sees half of one."""

from __future__ import annotations

import contextlib
import os
import stat
import tempfile
from collections.abc import Callable, Iterable
from pathlib import Path

from triage.core.errors import TriageError


def write_atomic(path: str | Path, write: Callable[[Path], None], *, force: bool = True) -> Path:
    """Write ``path`` through a temporary file in the same folder, then rename it into place.

    ``write`` receives the temporary path and fills it. On any failure the target is unchanged and
    the temporary file is removed. A target that exists but is not a regular file (``/dev/null``,
    a pipe) is written directly: renaming over it would replace the device.

    Raises:
        TriageError: The target exists and ``force`` is false, or the folder cannot be written.
    """
    target = Path(path)
    if target.exists() and not stat.S_ISREG(target.stat().st_mode):
        write(target)
        return target
    if target.exists() and not force:
        raise TriageError(
            f"{target} already exists; it was left unchanged.",
            hint="Choose another file name, or pass --force to replace it.",
        )
    folder = target.parent if str(target.parent) else Path(".")
    try:
        handle, tmp_name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=folder)
    except OSError as exc:
        raise TriageError(
            f"cannot write to {folder}: {exc.strerror or exc}.", hint="Choose another folder."
        ) from exc
    os.close(handle)
    tmp = Path(tmp_name)
    # mkstemp makes the file private (0600); give it the mode a plain open() would, or keep the
    # mode of the file being replaced.
    mode = stat.S_IMODE(target.stat().st_mode) if target.exists() else 0o666 & ~_UMASK
    os.chmod(tmp, mode)
    try:
        write(tmp)
        with tmp.open("rb") as done:
            os.fsync(done.fileno())
        os.replace(tmp, target)
    except OSError as exc:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise TriageError(
            f"could not write {target}: {exc.strerror or exc}; nothing was changed.",
            hint="Check the free space and permissions of the folder, then try again.",
        ) from exc
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise
    _fsync_dir(folder)
    return target


def _read_umask() -> int:
    current = os.umask(0)
    os.umask(current)
    return current


# Read once at import: os.umask is process-wide, and workers write files from threads.
_UMASK = _read_umask()


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


def _fsync_dir(folder: Path) -> None:
    """Make the rename itself durable (POSIX: fsync the containing directory)."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)
