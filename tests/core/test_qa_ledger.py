"""QA regression tests (outside tester): defects found probing the decision ledger.

Each test is the smallest reproduction of one defect and fails on the code it was found on.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from triage.core.errors import TriageError
from triage.core.ledger import Ledger


def test_qa_a_save_into_a_ledger_deleted_meanwhile_is_not_reported_as_saved(
    tmp_path: Path,
) -> None:
    """QA defect (low): with the review screens open, the review folder (ledger included) was
    deleted; every later decision still said 'saved: … (ledger event N)' -- it went into the
    unlinked file and was gone when the screens closed. A commit into a ledger whose path no
    longer names the open file should fail like any other write that cannot be kept."""
    path = tmp_path / "l.sqlite"
    with Ledger.open(path) as ledger:
        for suffix in ("", "-wal", "-shm"):
            Path(f"{path}{suffix}").unlink(missing_ok=True)
        with pytest.raises(TriageError):
            ledger.record(
                "2026-11-02",
                "A",
                "",
                outcome="no_change",
                root_cause="unknown",
                note="",
                reviewer="ana",
                portfolio_name="week.csv",
                portfolio_fingerprint="f",
                expected_version=0,
            )
