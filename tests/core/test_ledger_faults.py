"""Fault tests of the decision ledger, each in real child processes (docs/sources.md §4.5).

The child is tests/core/ledger_worker.py run with ``sys.executable``; it prints ``ACK <item>``
only after ``record()`` returned, so an acknowledged decision is one the reviewer was told is
saved. Every test then reopens the ledger the way the application does and checks that every
acknowledged decision is there and that ``PRAGMA integrity_check`` says ``ok``.
"""

from __future__ import annotations

import json
import os
import random
import shutil
import signal
import sqlite3
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pytest

from triage.core.ledger import (
    Ledger,
    LedgerBusyError,
    LedgerError,
)

WORKER = Path(__file__).with_name("ledger_worker.py")
REPO = Path(__file__).resolve().parents[2]
CYCLE = "2026-11-23"
NOBODY = 65534


def spawn(*args: object, prefix: tuple[str, ...] = (), env: dict[str, str] | None = None):
    full_env = {**os.environ, "PYTHONDONTWRITEBYTECODE": "1", **(env or {})}
    return subprocess.Popen(
        [*prefix, sys.executable, str(WORKER), *map(str, args)],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=full_env,
        cwd=REPO,
    )


def acked(out: str) -> list[str]:
    # Complete lines only: print() may write its parts one by one (unbuffered output), so a kill
    # can leave "ACK " without its item; that decision then counts as saved without its ACK.
    complete = out.split("\n")[:-1]
    return [line.split(" ", 1)[1] for line in complete if line.startswith("ACK ")]


def integrity(path: Path) -> list[str]:
    con = sqlite3.connect(path)
    try:
        return [row[0] for row in con.execute("PRAGMA integrity_check")]
    finally:
        con.close()


def seed_ledger(path: Path, items: list[str]) -> None:
    with Ledger.open(path) as ledger:
        for item in items:
            ledger.record(
                CYCLE,
                item,
                "",
                outcome="no_change",
                root_cause="unknown",
                note=f"earlier {item}",
                reviewer="parent",
                portfolio_name="week47.csv",
                portfolio_fingerprint="0" * 64,
                expected_version=0,
            )


# ---- kill -9 --------------------------------------------------------------------------------


def test_kill9_during_writes_loses_no_acknowledged_decision(tmp_path: Path) -> None:
    # docs/sources.md §4.1, measured: WAL + FULL survived 15 random SIGKILLs with every acked
    # commit present. Here 24 trials on one file, so later trials also recover earlier crashes;
    # the first trials die during start-up, possibly while the file is being created.
    path = tmp_path / "crash.ledger.sqlite"
    rng = random.Random(20261123)
    acknowledged: set[str] = set()
    trials_with_acks = 0
    for trial in range(24):
        child = spawn("loop", path, f"t{trial}", trial)
        if trial < 4:
            time.sleep(rng.uniform(0.0, 0.12))
        else:
            assert child.stdout is not None
            assert child.stdout.readline().strip() == "READY", child.stderr
            time.sleep(rng.uniform(0.005, 0.2))
        os.kill(child.pid, signal.SIGKILL)
        assert child.stdout is not None and child.stderr is not None
        # Read through the same buffer readline() used: communicate() reads the pipe itself, so
        # an ACK that arrived with READY and sits in that buffer would be lost.
        out = child.stdout.read()
        child.stderr.read()
        child.wait(timeout=10)
        assert child.returncode == -signal.SIGKILL
        mine = acked(out)
        acknowledged.update(mine)
        trials_with_acks += bool(mine)

        with Ledger.open(path) as ledger:  # the application reopens without any repair step
            present = [e.item for e in ledger.history() if e.item.startswith(f"t{trial}-")]
            assert acknowledged <= {e.item for e in ledger.history()}, f"trial {trial}"
        assert integrity(path) == ["ok"], f"trial {trial}"
        # At most the decision in flight when the kill came is saved without its ACK.
        assert present[: len(mine)] == mine and len(present) - len(mine) in (0, 1), trial
    # The kills really landed mid-stream: most trials had acknowledged decisions when killed
    # (how many each depends on the machine's speed, so only a floor is asserted).
    assert trials_with_acks >= 10 and len(acknowledged) > 20, (trials_with_acks, len(acknowledged))


# ---- kill -9 inside a group decision ---------------------------------------------------------


def _groups(path: Path) -> dict[str, tuple[int, int]]:
    """Per group key: its member events and lines as the file holds them."""
    con = sqlite3.connect(path)
    try:
        rows = con.execute(
            "SELECT g.key_values, (SELECT count(*) FROM event AS e WHERE e.group_id = g.id),"
            " (SELECT count(*) FROM event_line AS l JOIN event AS e ON e.id = l.event_id"
            "  WHERE e.group_id = g.id) FROM group_decision AS g"
        ).fetchall()
    finally:
        con.close()
    return {json.loads(keys)[0]: (events, lines) for keys, events, lines in rows}


def test_kill9_inside_a_group_decision_saves_none_of_it(tmp_path: Path) -> None:
    # docs/ledger.md, "Group decisions": one transaction, all or nothing. The writer is stopped
    # after every row of the group is written and before COMMIT, then killed.
    path = tmp_path / "triage-ledger.sqlite"
    seed_ledger(path, ["before"])
    child = spawn("groupstall", path, "g", 300)
    assert child.stdout is not None and child.stderr is not None
    line = child.stdout.readline().split()
    assert line[0] == "INSIDE", child.stderr.read()
    assert int(line[1]) == 1 + 300  # the seed and the group's 300 events, not committed
    os.kill(child.pid, signal.SIGKILL)
    child.communicate(timeout=10)
    assert child.returncode == -signal.SIGKILL
    with Ledger.open(path) as ledger:
        assert [e.item for e in ledger.history()] == ["before"]
        assert ledger.group_decisions() == []
    assert integrity(path) == ["ok"] and _groups(path) == {}


def test_kill9_during_group_decisions_leaves_each_whole_or_absent(tmp_path: Path) -> None:
    # As the series kill test above, with group decisions of 200 series x 13 lines each.
    path = tmp_path / "crash.ledger.sqlite"
    rng = random.Random(20261130)
    acknowledged: set[str] = set()
    for trial in range(10):
        child = spawn("grouploop", path, f"t{trial}", 200)
        assert child.stdout is not None and child.stderr is not None
        assert child.stdout.readline().strip() == "READY", child.stderr
        time.sleep(rng.uniform(0.01, 0.3))
        os.kill(child.pid, signal.SIGKILL)
        out = child.stdout.read()
        child.stderr.read()
        child.wait(timeout=10)
        acknowledged.update(acked(out))
        with Ledger.open(path):  # reopened without any repair step
            pass
        assert integrity(path) == ["ok"], trial
        found = _groups(path)
        assert acknowledged <= set(found), trial
        # Every group in the file is whole: 200 events and 200 x 13 lines, never part of one.
        assert set(found.values()) <= {(200, 200 * 13)}, trial
        assert len({k for k in found if k.startswith(f"t{trial}.")} - acknowledged) <= 1
    assert len(acknowledged) >= 5, acknowledged


# ---- full disk --------------------------------------------------------------------------------


def test_full_disk_refuses_the_decision_and_keeps_the_ledger(tmp_path: Path) -> None:
    # RLIMIT_FSIZE makes writes past the limit fail with EFBIG; SQLite reports SQLITE_IOERR and
    # rolls the transaction back (docs/sources.md §4.5, measured). The limit is put
    # at several distances from the end of the files, so the failure hits different writes of
    # the commit (the "fail at the Nth write" loop of SQLite's own tests).
    path = tmp_path / "full.ledger.sqlite"
    earlier = [f"early-{i}" for i in range(5)]
    seed_ledger(path, earlier)
    margins = [0, 1, 100, 1000, 4096, 4200, 9000, 20000, 50000, 120000]
    child = spawn("fsize", path, *margins)
    out, err = child.communicate(timeout=60)
    assert child.returncode == 0, err
    assert out.splitlines()[-1] == "DONE"
    failures = [line.split(" ", 3) for line in out.splitlines() if line.startswith("ERR ")]
    assert len(failures) == len(margins)
    for _, kind, _item, message in failures:
        assert kind == "LedgerWriteError"
        text = json.loads(message)
        assert text.startswith("The decision was NOT saved: ")
        assert "still holds every earlier decision" in text

    saved = acked(out)
    assert len(saved) > len(margins)  # the wider margins let some decisions through first
    assert integrity(path) == ["ok"]
    with Ledger.open(path) as ledger:
        history = {e.item: e for e in ledger.history()}
    assert set(earlier) | set(saved) == set(history)
    for _, _, item, _ in failures:
        assert item not in history
    # All or nothing: a saved adjustment has all 13 of its lines.
    assert all(
        len(e.lines) == 13
        for i, e in history.items()
        if i.startswith("fs-") and not i.endswith("after")
    )


# ---- two writers ------------------------------------------------------------------------------


@pytest.mark.parametrize("shared", [False, True], ids=["own-series", "same-series"])
def test_two_processes_writing_lose_nothing(tmp_path: Path, shared: bool) -> None:
    # docs/sources.md §4.2, measured: with deferred transactions 487 of 800 read-modify-write
    # updates failed; with BEGIN IMMEDIATE none. Both children also create the file at once.
    path = tmp_path / "two.ledger.sqlite"
    count = 200
    children = [spawn("writer", path, name, count, int(shared)) for name in ("a", "b")]
    for child in children:
        assert child.stdout is not None and child.stdin is not None
        assert child.stdout.readline().strip() == "READY", child.stderr.read()
    for child in children:
        child.stdin.write("go\n")
        child.stdin.flush()
    outs = []
    for child in children:
        out, err = child.communicate(timeout=60)
        assert child.returncode == 0, err
        outs.append(out)
        assert len(acked(out)) == count
    stale = sum(int(out.splitlines()[-1].split()[1]) for out in outs)

    assert integrity(path) == ["ok"]
    with Ledger.open(path) as ledger:
        history = ledger.history()
        notes = sorted(e.note for e in history)
        assert notes == sorted(f"{name} {i}" for name in "ab" for i in range(count))
        for (_item, _loc), version in ledger.versions(CYCLE).items():
            assert version == sum(1 for e in history if e.item == _item)
    if shared:
        # 400 writes on 3 series, each made against the version its writer had just read: the
        # gapless per-series versions add up to every write, so no update overwrote another.
        versions = ledger_versions(path)
        assert set(versions) == {(f"shared-{i}", "") for i in range(3)}
        assert sum(versions.values()) == 2 * count
        print(f"\nstale retries over {2 * count} shared writes: {stale}")


def ledger_versions(path: Path) -> dict[tuple[str, str], int]:
    with Ledger.open(path, read_only=True) as ledger:
        return ledger.versions(CYCLE)


# ---- corrupt files ----------------------------------------------------------------------------


def _damage(path: Path, how: str) -> None:
    data = bytearray(path.read_bytes())
    rng = random.Random(7)
    if how == "garbage-header":
        data[:100] = rng.randbytes(100)
    elif how == "truncated-half":
        data = data[: len(data) // 2]
    elif how == "zeroed-tail":
        data[-8192:] = bytes(8192)
    path.write_bytes(bytes(data))


@pytest.mark.parametrize("how", ["garbage-header", "truncated-half", "zeroed-tail"])
def test_corrupt_ledger_is_detected_and_its_bytes_unchanged(tmp_path: Path, how: str) -> None:
    # docs/sources.md §4.4, measured: garbage gives SQLITE_NOTADB, truncation SQLITE_CORRUPT;
    # required: never overwrite or repair in place. The zeroed tail stands in for power-loss
    # damage at the end of the file (docs/sources.md §4.5).
    path = tmp_path / "bad.ledger.sqlite"
    seed_ledger(path, [f"item-{i}-" + "x" * 400 for i in range(300)])
    assert not path.with_name(path.name + "-wal").exists()  # clean close checkpointed it
    _damage(path, how)
    before = path.read_bytes()
    for read_only in (False, True):
        with pytest.raises(LedgerError) as caught:
            Ledger.open(path, read_only=read_only)
        message = str(caught.value)
        assert str(path) in message and "left unchanged" in message
        assert ("damaged" in message) or ("not a triage decision ledger" in message)
        assert path.read_bytes() == before


# ---- lock held by another process -------------------------------------------------------------


def test_locked_ledger_times_out_clearly_and_works_once_released(tmp_path: Path) -> None:
    path = tmp_path / "locked.ledger.sqlite"
    seed_ledger(path, ["A"])
    holder = spawn("hold", path)
    assert holder.stdout is not None and holder.stdin is not None
    try:
        assert holder.stdout.readline().strip() == "LOCKED"
        # Opening and reading are not blocked by a WAL writer (docs/sources.md §4.2, measured):
        # were they, the open or the read would raise the busy error after the timeout.
        with Ledger.open(path, timeout=0.5) as ledger:
            assert [d.item for d in ledger.current(CYCLE)] == ["A"]
            t0 = time.perf_counter()
            with pytest.raises(LedgerBusyError) as caught:
                ledger.record(
                    CYCLE,
                    "B",
                    "",
                    outcome="no_change",
                    root_cause="unknown",
                    note="",
                    reviewer="me",
                    portfolio_name="w",
                    portfolio_fingerprint="f",
                    expected_version=0,
                )
            waited = time.perf_counter() - t0
            # Bounded wait: the busy timeout, not forever (docs/sources.md §4.2: 1.01 s for
            # timeout=1.0).
            assert 0.45 <= waited < 2.5, waited
            assert str(caught.value).startswith(
                "The decision ledger is being written by another session; nothing was saved; "
                "retry in a moment"
            )
            assert ledger.version(CYCLE, "B", "") == 0

            holder.stdin.write("commit\n")
            holder.stdin.flush()
            assert holder.stdout.readline().strip() == "RELEASED"
            ledger.record(
                CYCLE,
                "B",
                "",
                outcome="no_change",
                root_cause="unknown",
                note="retried",
                reviewer="me",
                portfolio_name="w",
                portfolio_fingerprint="f",
                expected_version=0,
            )
            assert [d.item for d in ledger.current(CYCLE)] == ["A", "B"]
    finally:
        holder.kill()
        holder.communicate(timeout=10)
    assert integrity(path) == ["ok"]


# ---- read-only folder and file ----------------------------------------------------------------


def _as_unprivileged() -> tuple[str, ...]:
    """Command prefix that runs a child as uid 65534, or () when we are not root."""
    if os.geteuid() != 0:
        return ()
    setpriv = shutil.which("setpriv")
    if setpriv is None:
        pytest.skip("running as root and setpriv is missing: root ignores file permissions")
    prefix = (setpriv, f"--reuid={NOBODY}", f"--regid={NOBODY}", "--clear-groups")
    # The child needs the interpreter and the worker script: a checkout under a 0700 folder
    # (mktemp -d) is out of reach for uid 65534, and then this test cannot run here.
    worker = Path(__file__).with_name("ledger_worker.py")
    probe = subprocess.run(
        [*prefix, sys.executable, "-c", f"open({str(worker)!r}).close(); import triage"],
        capture_output=True,
        timeout=60,
    )
    if probe.returncode != 0:
        pytest.skip(f"uid {NOBODY} cannot read this checkout: {probe.stderr.decode()[-200:]}")
    return prefix


def test_read_only_folder_and_file_open_read_only_with_a_notice() -> None:
    # Root ignores chmod (docs/sources.md §4.4, measured), so the child runs as
    # nobody. pytest's tmp_path sits under a 0700 folder, hence a world-traversable mkdtemp.
    prefix = _as_unprivileged()
    base = Path(tempfile.mkdtemp(prefix="triage-ro-"))
    try:
        base.chmod(0o755)
        in_ro_folder = base / "shared" / "week47.ledger.sqlite"
        ro_file = base / "open" / "week47.ledger.sqlite"
        for ledger_path in (in_ro_folder, ro_file):
            ledger_path.parent.mkdir()
            seed_ledger(ledger_path, ["A", "B"])
        (base / "shared" / "week47.csv").write_text("item,period,demand,forecast\n")
        in_ro_folder.chmod(0o666)  # only the folder is read-only here
        ro_file.chmod(0o444)  # only the file is read-only here
        (base / "shared").chmod(0o555)
        (base / "open").chmod(0o777)
        data_home = base / "xdg"
        data_home.mkdir(mode=0o777)
        data_home.chmod(0o777)
        before = {p: p.read_bytes() for p in (in_ro_folder, ro_file)}

        child = spawn("readonly", in_ro_folder, ro_file, prefix=prefix)
        out, err = child.communicate(timeout=30)
        assert child.returncode == 0, err
        reports = [json.loads(line) for line in out.splitlines()]
        assert [r["path"] for r in reports] == [str(in_ro_folder), str(ro_file)]
        for report in reports:
            assert "open_error" not in report, report
            assert report["read_only"] is True
            assert "read-only" in report["notice"] and "cannot be saved" in report["notice"]
            assert report["items"] == ["A", "B"]
            assert report["saved"] is False and report["error"] == "LedgerReadOnlyError"
            assert report["message"].startswith("The decision was NOT saved: ")
        assert "folder" in reports[0]["notice"] and "is not writable" in reports[0]["notice"]
        assert "the file is read-only" not in reports[0]["notice"]
        assert "the file is read-only" in reports[1]["notice"]
        assert "folder" not in reports[1]["notice"]
        assert {p: p.read_bytes() for p in before} == before

        child = spawn(
            "defaultpath",
            base / "shared" / "week47.csv",
            prefix=prefix,
            env={"XDG_DATA_HOME": str(data_home)},
        )
        out, err = child.communicate(timeout=30)
        assert child.returncode == 0, err
        where = json.loads(out)
        # One stand-in ledger per read-only review folder, in the user data folder.
        stand_in = Path(where["path"])
        assert stand_in.name == "triage-ledger.sqlite"
        assert stand_in.parent.parent == data_home / "triage" / "folders"
        assert stand_in.parent.name.startswith("shared-")
        assert "is not writable" in where["notice"] and where["path"] in where["notice"]
    finally:
        for folder in base.rglob("*"):
            if folder.is_dir():
                folder.chmod(0o755)
        shutil.rmtree(base, ignore_errors=True)
