"""``triage check`` on a file holding several forecast lags reports them instead of refusing.

Issue 9 §6. Metrics never mix lags (a forecast made one week ahead and one made three weeks
ahead are different forecasts; common practice in forecast-accuracy reporting), so ``rank``
still needs ``--lag``; ``check`` is the data-quality report and says which lags the history
holds and which option chooses one. The file is invented.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

from tests.cli.test_cli import run


def lag_file(path: Path) -> Path:
    lines = ["item,location,period,lag,demand,forecast"]
    monday = dt.date(2025, 9, 1)
    for n, item in enumerate(("CAN-5L", "CAN-10L", "SPRAY")):
        for week in range(10):
            period = monday + dt.timedelta(weeks=week)
            for lag in (0, 1, 3):
                demand = "" if week >= 8 else str(20 + n + week % 3)
                lines.append(f"{item},DC1,{period},{lag},{demand},{21 + n + lag}")
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def test_check_lists_the_lags_and_the_choice(tmp_path: Path) -> None:
    path = lag_file(tmp_path / "lags.csv")
    result = run("check", str(path))
    assert result.returncode == 0, result.stderr
    out = result.stdout.splitlines()
    lags_line = next(line for line in out if line.startswith("lags "))
    assert "0, 1, 3; no --lag given, so this report scores lag 0 (the smallest)" in lags_line
    assert out[-1].startswith("ok: ") and "--lag 0, 1 or 3" in out[-1]
    # The rest of the report is the report of --lag 0.
    chosen = run("check", str(path), "--lag", "0")
    assert chosen.returncode == 0, chosen.stderr
    other = chosen.stdout.splitlines()
    assert other[-1] == "ok: the file can be scored"
    assert "0, 1, 3; scoring lag 0" in next(line for line in other if line.startswith("lags "))
    same = [line for line in out if not line.startswith(("lags ", "ok: "))]
    assert same == [line for line in other if not line.startswith(("lags ", "ok: "))]


def test_rank_still_needs_the_lag(tmp_path: Path) -> None:
    path = lag_file(tmp_path / "lags.csv")
    result = run("rank", str(path))
    assert result.returncode == 2
    assert "the history holds 3 forecast lags (0, 1, 3)" in result.stderr
    assert "Traceback" not in result.stderr
    assert run("rank", str(path), "--lag", "3").returncode == 0
