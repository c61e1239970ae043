"""Every kind of bad portfolio file: the installed command exits 2 with a message, no traceback.

The loader's own tests (tests/core/test_load.py) check each message in detail; here each case
goes through ``triage rank`` and ``triage check`` as a user would run them.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.cli.test_cli import run

HEADER = "item,period,demand,forecast\n"
GOOD = "A,2026-10-05,10,9\nA,2026-10-12,12,11\n"

CASES: dict[str, tuple[bytes, tuple[str, ...]]] = {
    "missing required column": (b"item,period,demand\nA,2026-10-05,3\n", ("forecast", "--columns")),
    "non-numeric demand": ((HEADER + "A,2026-10-05,(5),9\n" + GOOD).encode(), ("demand", "row 2", "(5)")),
    "non-finite forecast": ((HEADER + "A,2026-10-05,5,inf\n" + GOOD).encode(), ("forecast", "row 2")),
    "ambiguous dates": ((HEADER + "A,01/02/2024,5,9\nA,02/02/2024,5,9\n").encode(), ("period", "YYYY-MM-DD")),
    "duplicate rows": ((HEADER + "A,2026-10-05,10,9\nA,2026-10-05,30,9\n").encode(), ("rows 2, 3", "10, 30")),
    "semicolon separated": (b"item;period;demand;forecast\nA;2026-10-05;1,5;2\n", ("semicolon", "decimal comma")),
    "not utf-8": ("item,period,demand,forecast,family\nA,2026-10-05,1,2,Caf\xe9\n".encode("cp1252"), ("UTF-8",)),
    "empty file": (b"", ("empty",)),
    "header only": (HEADER.encode(), ("no data rows",)),
    "no actual demand": ((HEADER + "A,2026-10-05,,9\nA,2026-10-12,,9\n").encode(), ("no row has actual demand",)),
    "irregular calendar": ((HEADER + "A,2026-10-05,1,2\nA,2026-10-07,1,2\nA,2026-10-12,1,2\n").encode(), ("irregular calendar",)),
    "several lags without --lag": (
        b"item,period,lag,demand,forecast\nA,2026-10-05,1,5,4\nA,2026-10-05,2,5,6\n",
        ("--lag", "lags"),
    ),
    "ragged row": ((HEADER + "A,2026-10-05,1,2,3\n" + GOOD).encode(), ("line", "fields")),
}


@pytest.mark.parametrize("name", sorted(CASES))
@pytest.mark.parametrize("command", ["rank", "check"])
def test_bad_input_exits_2_with_a_message(tmp_path: Path, name: str, command: str) -> None:
    content, needles = CASES[name]
    path = tmp_path / "portfolio.csv"
    path.write_bytes(content)
    result = run(command, str(path))
    assert result.returncode == 2, (name, result.stdout, result.stderr)
    assert result.stdout == ""
    assert "Traceback" not in result.stderr
    message = result.stderr
    assert "portfolio.csv" in message, message
    for needle in needles:
        assert needle.lower() in message.lower(), (name, needle, message)
