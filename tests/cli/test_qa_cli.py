"""QA regression tests (outside tester): defects found probing the commands other than decide.

Each test is the smallest reproduction of one defect and fails on the code it was found on.
"""

from __future__ import annotations

from pathlib import Path

from tests.cli.test_cli import run
from tests.cli.test_qa_decide import batch, portfolio

#: Bidirectional controls: shown raw they reorder the rest of a terminal line.
BIDI = {chr(c) for c in [0x061C, 0x200E, 0x200F, *range(0x202A, 0x202F), *range(0x2066, 0x206A)]}


def test_qa_history_table_prints_bidi_controls_of_an_id_raw(tmp_path: Path) -> None:
    """QA defect: `triage history` (table) shows ids, notes and names through its own
    sanitiser (export.printable), which replaces C0/C1 controls but not bidirectional ones,
    so an id holding U+202E (accepted by the loader with a notice) reorders the printed row.
    `triage rank` shows the same id with the control made visible."""
    path = portfolio(tmp_path, ["\u202eRTL", "B"])
    rows = batch(tmp_path / "b.csv", "item,outcome,note\n\u202eRTL,no_change,x\u2066y\n")
    done = run("decide", str(path), "--from", str(rows), "--reviewer", "ana", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    shown = run("history", str(path), cwd=tmp_path)
    assert shown.returncode == 0, shown.stderr
    assert "RTL" in shown.stdout
    assert not set(shown.stdout) & BIDI, shown.stdout[-300:]
    ranked = run("rank", str(path), cwd=tmp_path)
    assert not set(ranked.stdout) & BIDI  # the rank table holds


def test_qa_a_configuration_saved_with_a_byte_order_mark_is_read_or_named(tmp_path: Path) -> None:
    """QA defect (low): a config.toml saved as 'UTF-8 with BOM' (Windows Notepad) is refused
    with 'is not valid TOML: Invalid statement (at line 1, column 1)', naming nothing the user
    can see; portfolio and decisions files with a BOM are read."""
    path = portfolio(tmp_path, ["A", "B"])
    config = tmp_path / "config.toml"
    config.write_bytes('\ufeffreviewer = "ana"\n'.encode())
    done = run("rank", str(path), "--top", "1", cwd=tmp_path)
    assert done.returncode == 0
    rows = batch(tmp_path / "b.csv", "item,outcome\nA,no_change\n")
    done = run("decide", str(path), "--from", str(rows), "--config", str(config), cwd=tmp_path)
    assert (
        done.returncode == 0
        or "byte-order mark" in done.stderr.lower().replace("byte order", "byte-order")
        or "bom" in done.stderr.lower()
    ), done.stderr
