"""Kill ``triage export --to up.csv --force`` at many moments; count the mixed sets it leaves.

Run by hand (pytest does not collect ``bench_*.py``)::

    python -m tests.benchmarks.bench_export_kill --moments 60 --baseline-ref e0e2877

The target folder starts with a complete old export; each run writes the new one (another
ledger: both data files differ) and is sent SIGKILL a seeded random time after it created its
first entry in the folder, up to 1.1 x the write's length measured on an unkilled run (so some
runs finish first). After each kill the folder is classified (``tests/core/export_kill.py``):
*old* or *new* when one complete export is visible, *mixed* otherwise (a missing or partial file,
or the decisions of one export beside the forecast of the other). Then the export runs again to
completion, and the folder must hold the new export and no hidden leftover.

``--baseline-ref REV`` (or ``--baseline DIR``) runs the same loop, same seed, on another version
of the code in the same run, for the before figure. The seeded subset in the suite is
``tests/core/test_export_kill.py``.
"""

from __future__ import annotations

import argparse
import json
import random
import shutil
import subprocess
import tempfile
import time
from collections import Counter
from pathlib import Path

from tests.core import export_kill as kill


def run_loop(code: Path, inputs: kill.Inputs, folder: Path, fractions: list[float]) -> dict:
    """The kill loop for the source tree ``code``; counts of what each moment left."""
    folder.mkdir(parents=True)
    env = kill.environment(folder)
    template, ref, work = folder / "template", folder / "ref", folder / "work"
    old = kill.reference(code, inputs, inputs.old_ledger, template, folder)
    new = kill.reference(code, inputs, inputs.new_ledger, ref, folder)
    cmd = kill.command(code, inputs, inputs.new_ledger, work / "up.csv")
    window = kill.write_window(cmd, work, template, env)
    states: Counter[str] = Counter()
    killed = left_after_kill = dirty_after_next = 0
    examples: list[dict] = []
    started = time.monotonic()
    for fraction in fractions:
        kill.reset(work, template)
        result = kill.kill_after_write_starts(cmd, work, fraction * window, env, old, new)
        states[result.state] += 1
        killed += result.killed
        left_after_kill += bool(result.left)
        if result.state == "mixed" and len(examples) < 3:
            examples.append({"delay": round(result.delay, 4), "left": list(result.left)})
        done = subprocess.run(cmd, capture_output=True, text=True, env=env, timeout=600)
        if done.returncode != 0 or kill.read_export(work) != new or kill.leftovers(work):
            dirty_after_next += 1
    return {
        "code": str(code),
        "moments": len(fractions),
        "write_window_s": round(window, 4),
        "killed_before_the_end": killed,
        "old": states["old"],
        "new": states["new"],
        "mixed": states["mixed"],
        "leftovers_right_after_the_kill": left_after_kill,
        "not_clean_after_the_next_run": dirty_after_next,
        "mixed_examples": examples,
        "loop_s": round(time.monotonic() - started, 1),
    }


def checkout(rev: str, folder: Path) -> Path:
    """The source tree of ``rev`` (git archive), for the baseline."""
    folder.mkdir(parents=True)
    archive = subprocess.run(
        ["git", "-C", str(kill.ROOT), "archive", rev], capture_output=True, check=True
    )
    subprocess.run(["tar", "-x", "-C", str(folder)], input=archive.stdout, check=True)
    return folder


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--moments", type=int, default=60, help="kill moments per code version")
    parser.add_argument("--series", type=int, default=5000, help="series in the portfolio")
    parser.add_argument("--seed", type=int, default=20261203)
    parser.add_argument("--baseline", type=Path, help="source tree of the code to compare with")
    parser.add_argument("--baseline-ref", help="git revision to compare with (git archive)")
    parser.add_argument("--out", type=Path, help="folder for export_kill.json")
    args = parser.parse_args()

    rng = random.Random(args.seed)
    fractions = [rng.uniform(0.0, 1.1) for _ in range(args.moments)]
    scratch = Path(tempfile.mkdtemp(prefix="bench-export-kill-"))
    try:
        inputs = kill.build_inputs(scratch / "data", args.series)
        codes = {"current": kill.ROOT}
        if args.baseline_ref:
            codes["baseline"] = checkout(args.baseline_ref, scratch / "baseline-code")
        elif args.baseline:
            codes["baseline"] = args.baseline.resolve()
        results = {
            name: run_loop(code, inputs, scratch / name, fractions) for name, code in codes.items()
        }
    finally:
        shutil.rmtree(scratch, ignore_errors=True)

    print(f"{args.series:,} series x {kill.FORWARD} forward weeks, seed {args.seed}")
    for name, r in results.items():
        print(
            f"{name:>8}: {r['mixed']} mixed sets over {r['moments']} kill moments "
            f"({r['killed_before_the_end']} killed before the end; old {r['old']}, new {r['new']}; "
            f"write window {r['write_window_s']} s); leftovers right after the kill: "
            f"{r['leftovers_right_after_the_kill']}, not clean after the next run: "
            f"{r['not_clean_after_the_next_run']}"
        )
        for example in r["mixed_examples"]:
            print(f"          mixed at +{example['delay']} s, left {example['left']}")
    if args.out:
        args.out.mkdir(parents=True, exist_ok=True)
        settings = {"series": args.series, "moments": args.moments, "seed": args.seed}
        (args.out / "export_kill.json").write_text(
            json.dumps({"settings": settings, "results": results}, indent=2) + "\n",
            encoding="utf-8",
        )


if __name__ == "__main__":
    main()
