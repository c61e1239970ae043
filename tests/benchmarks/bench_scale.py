"""Benchmark of ``triage rank --engine dask`` on a dataset far larger than one file.

Run by hand (pytest does not collect ``bench_*.py``)::

    python -m tests.benchmarks.bench_scale --series 10000000 --out bench-out/

Steps, in one run:

1. **The dataset**, generated part by part, each part in its own process (never the whole in one
   process): ``--part-series`` series of the project's generator (``sample.generate``) per part,
   each part with its own seed and its item ids prefixed with the part's number so that the
   parts hold different series. Parts are cut by series (an export by item range); cached.
2. **The baseline**: ``triage rank`` of one generated file of ``--baseline-series`` series (the
   local engine), ``--format csv`` to a file.
3. **The run**: ``triage rank DATASET --engine dask --workers W --memory-limit M --format csv``
   to a file.

Each command runs in its own process tree, watched every 0.2 s: wall time, the command's own
peak memory (the Dask client, which ranks and writes), and each Dask worker's peak (resident
memory of each process). The ratio reported is the run's wall time over ``series /
baseline-series`` times the baseline's: 1.0 is linear scaling.

``--layout period`` (or ``random``) measures the other path instead: the baseline file itself cut
into parts that each hold a slice of every series, which the engine shuffles by series key;
the ratio is then to the local run on the same rows (1.0: as fast as one process on one file).

``--command compare`` measures ``triage compare`` the same way (both runs compare the
generator's two competing forecasts, naive and the file's forecast); ``--command check`` measures
``triage check`` (its report goes to a file from standard output).

Results go to stderr and ``OUT/scale-LAYOUT-SERIESs.json`` (``scale-compare-…`` for compare).
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Any

from tests.benchmarks.bench_rank import ROOT, _child_env, triage_command


def make_part(out: Path, part: int, series: int, seed: int) -> None:
    """Part ``part`` of the dataset: the generator's portfolio, ids prefixed ``P<part>-``."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from sample import generate

    target = out / f"part-{part:05d}.parquet"
    if target.exists():
        return
    raw = out / f".raw-{part:05d}.parquet"
    items = math.ceil(series / generate.SAMPLE_LOCATIONS)
    generate.write_parquet(raw, items, seed=seed + part, awkward_ids=False)
    source = pq.ParquetFile(raw)
    partial = out / f".part-{part:05d}.parquet.partial"
    writer = None
    for group in range(source.num_row_groups):
        table = source.read_row_group(group)
        column = table.column("item").combine_chunks()
        prefixed = pa.compute.binary_join_element_wise(
            f"P{part:05d}-", column.dictionary.cast(pa.string()), ""
        )
        table = table.set_column(
            table.schema.get_field_index("item"),
            "item",
            pa.DictionaryArray.from_arrays(column.indices, prefixed),
        )
        if writer is None:
            writer = pq.ParquetWriter(partial, table.schema)
        writer.write_table(table)
    assert writer is not None
    writer.close()
    raw.unlink()
    os.replace(partial, target)


def build_dataset(args: argparse.Namespace) -> Path:
    """The dataset folder of ``args.series`` series, parts made two at a time in children."""
    parts = math.ceil(args.series / args.part_series)
    folder = args.out / f"dataset-{args.series}s-{args.part_series}p-seed{args.seed}"
    folder.mkdir(parents=True, exist_ok=True)
    todo = [k for k in range(parts) if not (folder / f"part-{k:05d}.parquet").exists()]
    running: list[subprocess.Popen[bytes]] = []
    started = time.perf_counter()
    for k in todo:
        while len(running) >= args.jobs:
            running = [p for p in running if p.poll() is None]
            time.sleep(0.2)
        running.append(
            subprocess.Popen(
                [
                    sys.executable, "-m", "tests.benchmarks.bench_scale", "--make-part", str(k),
                    "--out", str(folder), "--part-series", str(args.part_series),
                    "--seed", str(args.seed),
                ],
                cwd=ROOT,
                env=_child_env(),
            )
        )  # fmt: skip
    for p in running:
        if p.wait() != 0:
            raise SystemExit("a part failed")
    if todo:
        print(
            f"generated {len(todo)} parts in {time.perf_counter() - started:.0f} s",
            file=sys.stderr,
        )
    return folder


def baseline_file(args: argparse.Namespace) -> Path:
    """One file of ``args.baseline_series`` series, by the same generator."""
    from sample import generate

    path = args.out / f"baseline-{args.baseline_series}s-seed{args.seed}.parquet"
    if not path.exists():
        args.out.mkdir(parents=True, exist_ok=True)
        items = math.ceil(args.baseline_series / generate.SAMPLE_LOCATIONS)
        subprocess.run(
            [
                sys.executable, "-m", "sample.generate", "--out", str(path),
                "--items", str(items), "--seed", str(args.seed),
            ],
            check=True,
            cwd=ROOT,
            env=_child_env(),
        )  # fmt: skip
    return path


def split_dataset(source: Path, layout: str) -> Path:
    """``source`` cut into the dataset layout ``layout`` (tests/core/datasets.py), one month or
    batch at a time; cached beside it."""
    import pyarrow.parquet as pq

    from tests.core.datasets import write_layout

    folder = source.with_name(f"{source.stem}-{layout}")
    if not folder.exists():
        partial = source.with_name(f".{folder.name}.partial")
        if partial.exists():
            import shutil

            shutil.rmtree(partial)
        write_layout(pq.read_table(source).to_pandas(), partial, layout, parts=12)
        os.replace(partial, folder)
    return folder


def watched(cmd: list[str], timeout: float, output: Path | None = None) -> dict[str, Any]:
    """Run ``cmd``; its wall time, exit status and the peak memory of each process in its tree.
    ``output``: the file its standard output goes to (a command without ``--output``)."""
    import psutil

    sink = None if output is None else output.open("wb")
    started = time.perf_counter()
    child = subprocess.Popen(
        cmd, cwd=ROOT, env=_child_env(), stdout=sink, stderr=subprocess.PIPE, text=True
    )
    peaks: dict[int, tuple[str, int]] = {}
    tree_peak = 0
    done = threading.Event()

    def watch() -> None:
        nonlocal tree_peak
        root = psutil.Process(child.pid)
        while not done.is_set():
            try:
                procs = [root, *root.children(recursive=True)]
            except psutil.NoSuchProcess:
                break
            total = 0
            for proc in procs:
                try:
                    rss = proc.memory_info().rss
                    role = _role(proc, child.pid)
                except psutil.Error:
                    continue
                total += rss
                if rss > peaks.get(proc.pid, ("", 0))[1]:
                    peaks[proc.pid] = (role, rss)
            tree_peak = max(tree_peak, total)
            time.sleep(0.2)

    watcher = threading.Thread(target=watch, daemon=True)
    watcher.start()
    try:
        _, err = child.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        child.kill()
        _, err = child.communicate()
    seconds = time.perf_counter() - started
    if sink is not None:
        sink.close()
    done.set()
    watcher.join()
    workers = sorted((rss for role, rss in peaks.values() if role == "worker"), reverse=True)
    return {
        "seconds": seconds,
        "returncode": child.returncode,
        "client_peak": max((rss for role, rss in peaks.values() if role == "command"), default=0),
        "worker_peaks": workers,
        "tree_peak": tree_peak,
        "stderr_tail": err.strip().splitlines()[-3:],
    }


def _written(command: str, target: Path) -> list[str]:
    """The options that write ``command``'s output to ``target`` (check prints its report)."""
    return [] if command == "check" else ["--format", "csv", "--output", str(target), "--force"]


def _printed(command: str, target: Path) -> Path | None:
    """Where ``command``'s standard output goes (check's report), or None."""
    return target if command == "check" else None


def _role(proc: Any, command_pid: int) -> str:
    if proc.pid == command_pid:
        return "command"
    line = " ".join(proc.cmdline())
    if "spawn_main" in line or "multiprocessing" in line:
        return "worker"
    return "other"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--series", type=int, default=10_000_000)
    parser.add_argument("--part-series", type=int, default=100_000)
    parser.add_argument("--baseline-series", type=int, default=1_000_000)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--memory-limit", default="6GB")
    parser.add_argument("--jobs", type=int, default=2, help="parts generated at once")
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--timeout", type=float, default=4 * 3600)
    parser.add_argument("--out", type=Path, default=ROOT / "bench-out")
    parser.add_argument(
        "--layout",
        choices=("blocks", "period", "random"),
        default="blocks",
        help="blocks: --series series generated in parts of whole series (no shuffle); period "
        "or random: the baseline file cut into parts that spread every series (a shuffle)",
    )
    parser.add_argument(
        "--command",
        choices=("rank", "compare", "check"),
        default="rank",
        help="the command measured, on one file and on the dataset (default rank)",
    )
    parser.add_argument("--make-part", type=int, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.make_part is not None:
        make_part(args.out, args.make_part, args.part_series, args.seed)
        return 0

    base = baseline_file(args)
    if args.layout == "blocks":
        folder = build_dataset(args)
    else:
        # The same rows as the baseline file, cut by period or at random: every series is spread
        # over every part, so the Dask engine shuffles the rows by key.
        args.series = args.baseline_series
        folder = split_dataset(base, args.layout)
    scratch = args.out / "scale-scratch"
    scratch.mkdir(parents=True, exist_ok=True)
    triage = triage_command()
    local = watched(
        [*triage, args.command, str(base), *_written(args.command, scratch / "base.csv")],
        args.timeout,
        _printed(args.command, scratch / "base.txt"),
    )
    print(
        f"local {args.command} {args.baseline_series:,}: {local['seconds']:.1f} s",
        file=sys.stderr,
    )
    spread = watched(
        [*triage, args.command, str(folder), "--engine", "dask", "--workers", str(args.workers),
         "--memory-limit", args.memory_limit, *_written(args.command, scratch / "spread.csv")],
        args.timeout,
        _printed(args.command, scratch / "spread.txt"),
    )  # fmt: skip
    scale = args.series / args.baseline_series
    result = {
        "series": args.series,
        "command": args.command,
        "layout": args.layout,
        "part_series": args.part_series,
        "baseline_series": args.baseline_series,
        "workers": args.workers,
        "memory_limit": args.memory_limit,
        "cpu_count": os.cpu_count(),
        "local": local,
        "dask": spread,
        "linear_ratio": spread["seconds"] / (scale * local["seconds"]),
    }
    name = "scale" if args.command == "rank" else f"scale-{args.command}"
    (args.out / f"{name}-{args.layout}-{args.series}s.json").write_text(
        json.dumps(result, indent=1) + "\n"
    )
    gb = 1e9
    print(
        f"local {args.command}, {args.baseline_series:,} series (one file): "
        f"{local['seconds']:.1f} s, "
        f"peak {local['client_peak'] / gb:.2f} GB\n"
        f"dask {args.command}, {args.series:,} series "
        f"({args.workers} workers, {args.memory_limit} each): "
        f"{spread['seconds']:.1f} s, exit {spread['returncode']}; command peak "
        f"{spread['client_peak'] / gb:.2f} GB; worker peaks "
        + ", ".join(f"{w / gb:.2f} GB" for w in spread["worker_peaks"])
        + f"\nratio to {scale:g} x the local run: {result['linear_ratio']:.2f}",
        file=sys.stderr,
    )
    if spread["returncode"] != 0:
        print("\n".join(spread["stderr_tail"]), file=sys.stderr)
    return 0 if spread["returncode"] == 0 else 1


if __name__ == "__main__":
    sys.exit(main())
