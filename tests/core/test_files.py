"""``triage.core.files``: all-or-nothing writes, the --force rule, and the leftovers of a crash.

The rules (reliability rules of the project; POSIX ``rename(2)`` and Linux ``renameat2(2)``
semantics): a target is the old file or the new one, never a mix; nothing is replaced without
``force``; a crashed write's scratch folder is removed by the next write, and nothing that a
live writer holds, or that triage did not make, is ever removed.
"""

from __future__ import annotations

import fcntl
import os
from pathlib import Path

import pytest

from triage.core import files
from triage.core.errors import TriageError
from triage.core.files import clean_leftovers, write_atomic, write_set_atomic, write_text_atomic


def listing(folder: Path) -> dict[str, bytes]:
    return {
        str(p.relative_to(folder)): p.read_bytes() if p.is_file() else b"<folder>"
        for p in sorted(folder.rglob("*"))
    }


def text_writer(text: str):
    def write(path: Path) -> None:
        path.write_text(text, encoding="utf-8")

    return write


SET = ("s-decisions.csv", "s-forecast.csv", "s-README.txt")


def write_set(folder: Path, tag: str, *, force: bool = True) -> tuple[Path, ...]:
    return write_set_atomic(folder, [(n, text_writer(f"{tag} {n}")) for n in SET], force=force)


def test_leftovers_of_crashed_writes_are_removed_and_nothing_else(tmp_path: Path) -> None:
    # What a killed write leaves: a scratch folder nobody holds (with half a file in it).
    dead = tmp_path / ".up.json.triage-k3j2h5g6.tmp"
    dead.mkdir()
    (dead / "up.json").write_text('{"half', encoding="utf-8")
    # A write in progress in another session: its scratch folder is locked.
    live = tmp_path / ".up.json.triage-abcdefgh.tmp"
    live.mkdir()
    held = os.open(live, os.O_RDONLY)
    fcntl.flock(held, fcntl.LOCK_EX | fcntl.LOCK_NB)
    # What earlier versions left: a temporary file and a backup hard link.
    legacy = [tmp_path / ".up.json.x1y2z3_9.tmp", tmp_path / ".up.json.0a1b2c3d.bak"]
    for path in legacy:
        path.write_text("old", encoding="utf-8")
    # The user's files, some of them named much alike.
    users = [
        tmp_path / "up.json",
        tmp_path / "up.json.bak",
        tmp_path / ".up.json.notes.tmp",
        tmp_path / ".up.json.0a1b2c3d.bak.keep",
        tmp_path / ".other.json.triage-k3j2h5g6.tmp",
        tmp_path / ".up.json.ABCDEFGH.bak",
    ]
    for path in users:
        path.write_text("mine", encoding="utf-8")
    a_folder = tmp_path / ".up.json.x1y2z3_0.tmp"  # legacy name, but a folder: not ours
    a_folder.mkdir()
    try:
        removed = clean_leftovers(tmp_path, "up.json")
        assert sorted(removed) == sorted([dead, *legacy])
        assert live.is_dir() and a_folder.is_dir()
        assert all(p.read_text(encoding="utf-8") == "mine" for p in users)
    finally:
        os.close(held)
    # Once its writer is gone, the other session's folder is a leftover too.
    assert clean_leftovers(tmp_path, "up.json") == [live]


def test_a_write_removes_earlier_leftovers_and_leaves_none(tmp_path: Path) -> None:
    target = tmp_path / "ranked.csv"
    (tmp_path / ".ranked.csv.triage-aaaaaaaa.tmp").mkdir()
    (tmp_path / ".ranked.csv.abcdefgh.tmp").write_text("half", encoding="utf-8")
    write_text_atomic(target, "new\n")
    assert listing(tmp_path) == {"ranked.csv": b"new\n"}


def test_without_force_an_existing_file_is_kept(tmp_path: Path) -> None:
    target = tmp_path / "out.txt"
    target.write_text("mine", encoding="utf-8")
    with pytest.raises(TriageError, match=r"out\.txt already exists; nothing was written"):
        write_text_atomic(target, "new", force=False)
    assert listing(tmp_path) == {"out.txt": b"mine"}


def test_a_file_that_appears_during_the_write_is_not_replaced(tmp_path: Path) -> None:
    # Without force the check and the rename are one step (RENAME_NOREPLACE): a file another
    # program creates while the new one is written survives.
    target = tmp_path / "out.txt"

    def write(path: Path) -> None:
        path.write_text("ours", encoding="utf-8")
        target.write_text("theirs", encoding="utf-8")

    with pytest.raises(TriageError, match="File exists; nothing was changed"):
        write_atomic(target, write, force=False)
    assert listing(tmp_path) == {"out.txt": b"theirs"}


def test_a_failed_write_leaves_the_old_file_and_no_scratch(tmp_path: Path) -> None:
    target = tmp_path / "out.txt"
    target.write_text("old", encoding="utf-8")

    def write(path: Path) -> None:
        path.write_text("half", encoding="utf-8")
        raise OSError(28, "No space left on device")

    with pytest.raises(TriageError, match=r"out\.txt: No space left on device; nothing was"):
        write_atomic(target, write)
    assert listing(tmp_path) == {"out.txt": b"old"}


def test_the_mode_of_a_replaced_file_is_kept(tmp_path: Path) -> None:
    target = tmp_path / "out.txt"
    target.write_text("old", encoding="utf-8")
    target.chmod(0o640)
    write_text_atomic(target, "new")
    assert (target.stat().st_mode & 0o777) == 0o640


@pytest.mark.parametrize("exchange", [True, False])
def test_a_set_is_replaced_as_a_whole(tmp_path: Path, monkeypatch, exchange: bool) -> None:
    if not exchange:  # a system without renameat2: the two-rename way
        monkeypatch.setattr(files, "_renameat2", lambda *_args: False)
    folder = tmp_path / "s"
    paths = write_set(folder, "old", force=False)
    assert [p.name for p in paths] == list(SET) and {p.parent for p in paths} == {folder}
    with pytest.raises(TriageError, match=r"/s already exists"):
        write_set(folder, "new", force=False)
    write_set(folder, "new")
    assert listing(tmp_path) == {"s": b"<folder>", **{f"s/{n}": f"new {n}".encode() for n in SET}}


def test_a_failed_set_write_changes_nothing(tmp_path: Path) -> None:
    folder = tmp_path / "s"
    write_set(folder, "old")
    before = listing(tmp_path)

    def fails(path: Path) -> None:
        path.write_text("half", encoding="utf-8")
        raise OSError(28, "No space left on device")

    with pytest.raises(TriageError, match=r"s/s-forecast\.csv: No space left on device"):
        write_set_atomic(
            folder,
            [(SET[0], text_writer("new")), (SET[1], fails), (SET[2], text_writer("new"))],
            force=True,
        )
    assert listing(tmp_path) == before


def test_a_set_folder_with_other_files_is_never_replaced(tmp_path: Path) -> None:
    folder = tmp_path / "s"
    write_set(folder, "old")
    (folder / "upload-log.txt").write_text("mine", encoding="utf-8")
    before = listing(tmp_path)
    with pytest.raises(TriageError, match=r"holds files that are not part of this export"):
        write_set(folder, "new", force=True)
    assert listing(tmp_path) == before
    (tmp_path / "f").write_text("a file", encoding="utf-8")
    with pytest.raises(TriageError, match="exists and is not a folder"):
        write_set(tmp_path / "f", "new", force=True)
    assert (tmp_path / "f").read_text(encoding="utf-8") == "a file"


def test_a_device_is_written_in_place_and_its_failure_is_a_message(tmp_path: Path) -> None:
    if not Path("/dev/full").is_char_device() or not Path("/dev/null").is_char_device():
        pytest.skip("no /dev/full or /dev/null")
    null = tmp_path / "null.txt"
    null.symlink_to("/dev/null")
    write_text_atomic(null, "gone", force=False)  # nothing is replaced: no --force needed
    assert null.is_symlink()
    full = tmp_path / "full.txt"
    full.symlink_to("/dev/full")
    with pytest.raises(TriageError, match=r"could not write to .*full\.txt, a device or pipe"):
        write_text_atomic(full, "x" * 100_000, force=True)
    assert full.is_symlink()


def test_without_exchange_a_failed_switch_puts_the_old_set_back(
    tmp_path: Path, monkeypatch
) -> None:
    monkeypatch.setattr(files, "_renameat2", lambda *_args: False)
    folder = tmp_path / "s"
    write_set(folder, "old")
    before = listing(tmp_path)
    real = os.rename
    calls: list[object] = []

    def second_fails(src: object, dst: object) -> None:
        calls.append(dst)
        if len(calls) == 2:  # the new folder into place
            raise OSError(5, "Input/output error")
        real(src, dst)  # type: ignore[arg-type]

    monkeypatch.setattr(os, "rename", second_fails)
    with pytest.raises(TriageError, match="Input/output error; nothing was changed"):
        write_set(folder, "new")
    assert len(calls) == 3 and listing(tmp_path) == before
