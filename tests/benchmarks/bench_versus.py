"""``triage rank`` side by side with a hand-written Polars script and a bare Arrow read.

Run by hand (Polars only for this benchmark: ``pip install polars``)::

    python -m tests.benchmarks.bench_versus --series 1000000 --out bench-out/

On the generator's Parquet portfolio (cached by ``bench_rank``), each command runs in its own
process, alternately, ``--repeat`` times:

* ``triage``: ``triage rank FILE --format csv --output OUT.csv`` (every scorecard column);
* ``polars``: ``tests/benchmarks/script_polars.py FILE OUT.csv`` (the window's error, bias and
  shares only; see that file);
* ``read``: ``pyarrow.parquet.read_table`` of the six columns both use.

It prints the median wall time and peak memory of each and the ratios to the Polars script, and
checks them against the targets (``TARGETS``). ``--baseline-ref REV`` adds ``triage rank`` of
an older revision, interleaved, for a before/after ratio. See ``tests/benchmarks/README.md``.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
from pathlib import Path

from tests.benchmarks.bench_rank import (
    CORE_COLUMNS,
    ROOT,
    alternate,
    built_portfolio,
    checkout,
    environment,
    triage_command,
)

#: ``triage rank`` against the Polars script: at most this ratio of wall time, and this peak.
TARGETS = {"time_ratio": 1.0, "peak_bytes": 1.5e9}

_READ = (
    "import sys, pyarrow.parquet as pq\n"
    "pq.read_table(sys.argv[1], columns=sys.argv[2].split(','))\n"
)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m tests.benchmarks.bench_versus")
    parser.add_argument("--series", type=int, default=1_000_000)
    parser.add_argument("--out", type=Path, default=ROOT / "bench-out")
    parser.add_argument("--file", type=Path, help="a Parquet portfolio instead of generating one")
    parser.add_argument("--locations", type=int, default=4)
    parser.add_argument("--weeks", type=int, default=104)
    parser.add_argument("--forward", type=int, default=13)
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--baseline-ref", metavar="REV")
    args = parser.parse_args(argv)

    path = args.file or built_portfolio(args.series, args)
    script = ROOT / "tests" / "benchmarks" / "script_polars.py"
    with tempfile.TemporaryDirectory(prefix="bench-versus-") as scratch:
        out = Path(scratch)
        commands = {
            "triage": [
                *triage_command(), "rank", str(path), "--format", "csv",
                "--output", str(out / "triage.csv"), "--force",
            ],
            "polars": [sys.executable, str(script), str(path), str(out / "polars.csv")],
            "read": [sys.executable, "-c", _READ, str(path), ",".join(CORE_COLUMNS)],
        }  # fmt: skip
        if args.baseline_ref:
            code = checkout(args.baseline_ref, out / "baseline-code")
            commands["baseline"] = [
                sys.executable, "-c",
                "import sys; sys.path.insert(0, sys.argv.pop(1)); "
                "from triage.cli import main; sys.exit(main())",
                str(code), "rank", str(path), "--format", "csv",
                "--output", str(out / "baseline.csv"), "--force",
            ]  # fmt: skip
        seconds, peak, runs = alternate(commands, args.repeat, path.name)

    ratio = {name: seconds[name] / seconds["polars"] for name in seconds}
    peak_ratio = {name: peak[name] / peak["polars"] for name in peak}
    verdict = {
        "time": "PASS" if ratio["triage"] <= TARGETS["time_ratio"] else "FAIL",
        "peak": "PASS" if peak["triage"] <= TARGETS["peak_bytes"] else "FAIL",
    }
    print(f"\n{path.name}, median of {args.repeat} alternating runs each")
    print(f"{'command':10} {'seconds':>9} {'x polars':>9} {'peak MB':>9} {'x polars':>9}")
    for name in seconds:
        print(
            f"{name:10} {seconds[name]:9.2f} {ratio[name]:9.2f} "
            f"{peak[name] / 1e6:9,.0f} {peak_ratio[name]:9.2f}"
        )
    if "baseline" in seconds:
        print(
            f"triage / {args.baseline_ref}: {seconds['triage'] / seconds['baseline']:.2f}x time, "
            f"{peak['triage'] / peak['baseline']:.2f}x peak"
        )
    print(
        f"targets: time <= {TARGETS['time_ratio']}x polars: {verdict['time']}; "
        f"peak <= {TARGETS['peak_bytes'] / 1e9:.1f} GB: {verdict['peak']}"
    )
    args.out.mkdir(parents=True, exist_ok=True)
    payload = {
        "environment": environment(),
        "file": str(path),
        "seconds": seconds,
        "peak_bytes": peak,
        "ratio_to_polars": ratio,
        "peak_ratio_to_polars": peak_ratio,
        "runs": runs,
        "targets": TARGETS,
        "verdict": verdict,
    }
    (args.out / "versus.json").write_text(json.dumps(payload, indent=2) + "\n")
    print(f"wrote {args.out / 'versus.json'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
