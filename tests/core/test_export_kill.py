"""An export killed with SIGKILL at any moment leaves the complete old or the complete new export.

Reliability rule of the project: every file triage writes is all or nothing, also under kill -9,
and the next run removes what a crashed one left. Two ways of choosing the moment:

* **every step**: a forked child kills itself just before its k-th file-system change (an audit
  hook, PEP 578, sees each ``open`` for writing, ``mkdir``, ``rename``, ``remove``, ``rmdir``,
  ``chmod`` and the ``renameat2`` call), for every k, so each state between two changes is
  seen once;
* **seeded delays**: ``triage export`` in a subprocess, killed a seeded random time after it
  created its first entry in the folder (the write began), as an outside tester would.

After each kill the visible files must be one complete export (``export_kill.classify``), and
after the next run the new export and no hidden leftover. The full loop over many delays is
``tests/benchmarks/bench_export_kill.py``.
"""

from __future__ import annotations

import json
import os
import random
import shutil
import signal
import sys
from collections.abc import Callable
from pathlib import Path

import openpyxl
import pytest

from tests.core import export_kill as kill
from triage.core.cycle import ReviewCycle
from triage.core.ledger import Ledger
from triage.core.portfolio import Portfolio
from triage.core.read import read_portfolio
from triage.render.export import export_review

#: Audit events (PEP 578; CPython "Audit events table") that change the file system.
CHANGES = frozenset(
    (
        "os.mkdir",
        "os.rename",
        "os.remove",
        "os.rmdir",
        "os.chmod",
        "os.link",
        "os.symlink",
        "os.truncate",
        "shutil.rmtree",
        "tempfile.mkdtemp",
        "tempfile.mkstemp",
        "ctypes.call_function",
    )
)
WRITE_FLAGS = os.O_WRONLY | os.O_RDWR | os.O_CREAT | os.O_TRUNC


def changes_files(event: str, args: tuple) -> bool:
    if event in CHANGES:
        return True
    if event != "open":
        return False
    mode, flags = (args[1], args[2]) if len(args) >= 3 else (None, 0)
    writes_mode = isinstance(mode, str) and any(c in mode for c in "wax+")
    return writes_mode or bool(isinstance(flags, int) and flags & WRITE_FLAGS)


def in_child(work: Callable[[], None], *, kill_at: int | None) -> tuple[int, int]:
    """Run ``work`` in a forked child that SIGKILLs itself before its ``kill_at``-th change.

    Returns:
        (the child's wait status, the number of changes it made; -1 when it was killed).
    """
    read_end, write_end = os.pipe()
    pid = os.fork()
    if pid == 0:  # the child: never returns into pytest
        code = 0
        try:
            os.close(read_end)
            seen = [0]

            def hook(event: str, args: tuple) -> None:
                if changes_files(event, args):
                    seen[0] += 1
                    if kill_at is not None and seen[0] >= kill_at:
                        os.kill(os.getpid(), signal.SIGKILL)

            sys.addaudithook(hook)
            work()
            os.write(write_end, str(seen[0]).encode())
        except BaseException:
            code = 3
        finally:
            os._exit(code)
    os.close(write_end)
    with os.fdopen(read_end, "rb") as pipe:
        told = pipe.read()
    _, status = os.waitpid(pid, 0)
    return status, int(told) if told else -1


@pytest.fixture(scope="module")
def scene(tmp_path_factory: pytest.TempPathFactory) -> dict:
    root = tmp_path_factory.mktemp("kill")
    inputs = kill.build_inputs(root / "data", n_series=40)
    return {"root": root, "inputs": inputs, "portfolio": read_portfolio(inputs.portfolio)}


def export_with(portfolio: Portfolio, ledger_path: Path, target: Path) -> None:
    with Ledger.open(ledger_path, read_only=True) as ledger:
        export_review(ReviewCycle(portfolio, ledger), target, force=True, exported_by="kill-test")


def single_file_state(path: Path, old: bytes) -> str:
    """``old``, ``new`` (a whole new file: both decisions) or ``mixed`` for an xlsx or JSON."""
    if not path.exists():
        return "mixed"
    if path.read_bytes() == old:
        return "old"
    try:
        if path.suffix == ".json":
            decisions = len(json.loads(path.read_text(encoding="utf-8"))["decisions"])
        else:
            book = openpyxl.load_workbook(path, read_only=True)
            decisions = sum(1 for _ in book["Decisions"].iter_rows()) - 1
            book.close()
    except Exception:
        return "mixed"
    return "new" if decisions == 2 else "mixed"


@pytest.mark.parametrize("name", ["up.csv", "up.xlsx", "up.json"])
def test_a_kill_before_any_step_leaves_one_complete_export(scene: dict, name: str) -> None:
    root: Path = scene["root"] / name
    inputs: kill.Inputs = scene["inputs"]
    portfolio: Portfolio = scene["portfolio"]
    template, work, ref = root / "template", root / "work", root / "ref"
    for folder in (template, ref):
        folder.mkdir(parents=True)
    export_with(portfolio, inputs.old_ledger, template / name)
    export_with(portfolio, inputs.new_ledger, ref / name)
    old = kill.read_export(template) if name == "up.csv" else None
    new = kill.read_export(ref) if name == "up.csv" else None

    def state() -> str:
        if old is not None and new is not None:
            return kill.classify(work, old, new)
        return single_file_state(work / name, (template / name).read_bytes())

    def new_export() -> None:
        export_with(portfolio, inputs.new_ledger, work / name)

    kill.reset(work, template)
    status, steps = in_child(new_export, kill_at=None)
    assert os.WIFEXITED(status) and os.WEXITSTATUS(status) == 0 and steps > 3
    assert state() == "new"

    seen = []
    for k in range(1, steps + 1):
        kill.reset(work, template)
        status, _ = in_child(new_export, kill_at=k)
        assert os.WIFSIGNALED(status) and os.WTERMSIG(status) == signal.SIGKILL, k
        seen.append(state())
        assert seen[-1] in ("old", "new"), (k, seen[-1], sorted(os.listdir(work)))
        # The next run writes the new export and removes what the killed one left.
        new_export()
        assert state() == "new", k
        assert kill.leftovers(work) == [], k
    assert seen[0] == "old" and "new" in seen  # the kills spanned the switch
    shutil.rmtree(root)


def test_triage_export_killed_at_seeded_moments_leaves_one_complete_set(tmp_path: Path) -> None:
    # A larger portfolio, so that writing lasts long enough to be hit at several moments.
    inputs = kill.build_inputs(tmp_path / "data", n_series=2000)
    env = kill.environment(tmp_path)
    old = kill.reference(kill.ROOT, inputs, inputs.old_ledger, tmp_path / "template", tmp_path)
    new = kill.reference(kill.ROOT, inputs, inputs.new_ledger, tmp_path / "ref", tmp_path)
    work = tmp_path / "work"
    cmd = kill.command(kill.ROOT, inputs, inputs.new_ledger, work / "up.csv")
    window = kill.write_window(cmd, work, tmp_path / "template", env)
    rng = random.Random(20261203)
    delays = sorted(rng.uniform(0.0, 1.2 * window) for _ in range(5))
    results = []
    for delay in delays:
        kill.reset(work, tmp_path / "template")
        result = kill.kill_after_write_starts(cmd, work, delay, env, old, new)
        results.append(result)
        assert result.state in ("old", "new"), result
        again = kill.reference(kill.ROOT, inputs, inputs.new_ledger, work, tmp_path)
        assert again == new
        assert kill.leftovers(work) == []
    assert any(r.killed for r in results), (window, results)
