"""Benchmark of ``triage rank`` and its scoring kernel on large generated portfolios.

Run by hand (pytest does not collect ``bench_*.py``)::

    python -m tests.benchmarks.bench_rank --series 100000 --series 1000000 --out bench-out/

For each size the runner builds (or reuses) a Parquet portfolio with ``sample.generate``, then
measures, each step in a fresh process so that its peak memory is its own:

* ``generate``: writing the Parquet file (skipped when a cached file is reused);
* ``cli``: ``triage rank FILE --format csv --output /dev/null`` end to end, interpreter start-up
  included;
* ``read``: ``pyarrow.parquet.read_table`` of the whole file;
* ``kernel``: ``triage.core.read.read_portfolio`` (reported as ``load``) and then
  ``triage.core.ranking.scorecard(portfolio, window=13)``, timed in-process;
* ``baseline``: the same scoring done by a per-series ``groupby().apply`` on the first
  ``--baseline-series`` series, scaled linearly to the full count: every scorecard column
  (window measures, sign test and bias flag, MASE, FVA, ADI/CV² pattern, ranks and shares; the
  target's comparison), and, for comparison with earlier runs, the window measures alone.

Results go to a table on stdout and to ``OUT/results.json``. See ``tests/benchmarks/README.md``.
"""

from __future__ import annotations

import argparse
import functools
import hashlib
import json
import math
import os
import platform
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[2]
GB = 1e9
#: Columns scoring needs; ``read`` also times reading just these.
CORE_COLUMNS: tuple[str, ...] = ("item", "location", "period", "demand", "forecast", "price")
#: Measures computed per series by the baseline (and expected from the scorecard).
MEASURES: tuple[str, ...] = (
    "abs_error",
    "abs_error_value",
    "bias",
    "bias_value",
    "bias_pct",
    "mae",
    "rmse",
    "wape",
    "tracking_signal",
    "bias_run",
    "n_over",
    "n_nonzero",
    "bias_pvalue",
    "mase",
    "fva",
    "adi",
    "cv2",
    "rank",
    "error_share",
    "cum_share",
)
#: Text measures compared for equality by the cross-check.
LABELS: tuple[str, ...] = ("pattern", "bias_flag")


@dataclass(frozen=True)
class Target:
    """Upper bounds for one portfolio size; ``None`` means no bound."""

    seconds: float | None
    peak_bytes: float | None


#: End-to-end targets of ``triage rank`` by series count.
TARGETS: dict[int, Target] = {
    100_000: Target(3.0, 1.5 * GB),
    1_000_000: Target(20.0, 6.0 * GB),
}
#: The kernel must beat the per-series baseline by at least this factor.
MIN_SPEEDUP = 200.0


@dataclass
class Run:
    """One child process: wall time, peak resident memory, exit status and its JSON report."""

    seconds: float
    peak_bytes: int | None
    returncode: int
    report: dict[str, Any] = field(default_factory=dict)
    error: str = ""


# --------------------------------------------------------------------------------------------
# Running children with their peak memory


def _child_env(code: Path | None = None) -> dict[str, str]:
    """The children's environment; ``code``: another source tree whose ``triage`` comes first."""
    env = dict(os.environ)
    # ``sample`` and ``tests`` live at the repository root and are not installed.
    first = [str(code)] if code is not None else []
    env["PYTHONPATH"] = os.pathsep.join(
        p for p in (*first, str(ROOT), env.get("PYTHONPATH", "")) if p
    )
    return env


@functools.lru_cache(maxsize=1)
def _time_binary() -> str | None:
    """``/usr/bin/time`` if it supports ``-v`` (GNU time), else None."""
    path = shutil.which("time", path="/usr/bin:/bin")
    if path is None:
        return None
    probe = subprocess.run([path, "-v", "true"], capture_output=True, text=True)
    return path if "Maximum resident set size" in probe.stderr else None


_RUSAGE_WRAPPER = (
    "import resource, subprocess, sys\n"
    "rc = subprocess.run(sys.argv[1:]).returncode\n"
    "peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss\n"
    "sys.stderr.write(f'\\nBENCH_MAXRSS_KB {peak}\\n')\n"
    "sys.exit(rc)\n"
)


def measure(cmd: list[str], *, timeout: float = 3600.0, code: Path | None = None) -> Run:
    """Run ``cmd`` from the repository root and return its wall time and peak RSS.

    Peak memory comes from ``/usr/bin/time -v`` when available; otherwise a one-child wrapper
    reads ``getrusage(RUSAGE_CHILDREN)``, which then covers that child alone. If the child
    prints a JSON object on its last stdout line, it becomes ``Run.report``. ``code``: run
    another source tree's ``triage`` (``--baseline-ref``).
    """
    timer = _time_binary()
    with tempfile.NamedTemporaryFile("r", suffix=".time", delete=False) as handle:
        time_file = Path(handle.name)
    if timer:
        full = [timer, "-v", "-o", str(time_file), *cmd]
    else:
        full = [sys.executable, "-c", _RUSAGE_WRAPPER, *cmd]
    started = time.perf_counter()
    try:
        done = subprocess.run(
            full, cwd=ROOT, env=_child_env(code), capture_output=True, text=True, timeout=timeout
        )
    except subprocess.TimeoutExpired:
        time_file.unlink(missing_ok=True)
        return Run(timeout, None, -1, error=f"timed out after {timeout:.0f} s")
    seconds = time.perf_counter() - started
    peak_kb: int | None = None
    source = time_file.read_text() if timer else done.stderr
    time_file.unlink(missing_ok=True)
    for line in source.splitlines():
        if "Maximum resident set size" in line or line.startswith("BENCH_MAXRSS_KB"):
            peak_kb = int(line.split()[-1])
    run = Run(seconds, None if peak_kb is None else peak_kb * 1024, done.returncode)
    lines = done.stdout.strip().splitlines()
    if lines and lines[-1].startswith("{"):
        run.report = json.loads(lines[-1])
    if done.returncode != 0:
        tail = [ln for ln in done.stderr.splitlines() if ln.strip() and "BENCH_MAXRSS_KB" not in ln]
        run.error = tail[-1] if tail else f"exit status {done.returncode}"
    return run


# --------------------------------------------------------------------------------------------
# Stages run in their own process (``--stage NAME``); each prints one JSON line.


def stage_read(path: Path, repeat: int) -> dict[str, Any]:
    """Time ``pyarrow.parquet.read_table`` of the whole file."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    runs, core_runs = [], []
    for _ in range(repeat):
        started = time.perf_counter()
        table = pq.read_table(path)
        runs.append(time.perf_counter() - started)
        rows, nbytes = table.num_rows, table.nbytes
        del table
    for _ in range(repeat):
        # What scoring needs, without the text attributes repeated on every row.
        started = time.perf_counter()
        table = pq.read_table(path, columns=list(CORE_COLUMNS))
        core_runs.append(time.perf_counter() - started)
        core_bytes = table.nbytes
        del table
    return {
        "seconds": statistics.median(runs),
        "runs": runs,
        "rows": rows,
        "table_bytes": nbytes,
        "core_seconds": statistics.median(core_runs),
        "core_runs": core_runs,
        "core_table_bytes": core_bytes,
        "pyarrow": pa.__version__,
    }


def stage_kernel(path: Path, repeat: int, window: int) -> dict[str, Any]:
    """Time ``read_portfolio`` once, ``scorecard`` ``repeat`` times, and the loss of the last
    process step alone (``compare.last_step_loss``, one of the scorecard's pieces), in-process."""
    from triage.core import metrics
    from triage.core.compare import last_step_loss
    from triage.core.ranking import scorecard
    from triage.core.read import read_portfolio

    started = time.perf_counter()
    portfolio = read_portfolio(path)
    load = time.perf_counter() - started
    runs, step_runs = [], []
    cols = metrics.window_columns(portfolio.demand, portfolio.last_actual, window)
    for _ in range(repeat):
        started = time.perf_counter()
        card = scorecard(portfolio, window=window)
        runs.append(time.perf_counter() - started)
        started = time.perf_counter()
        last_step_loss(portfolio, cols)
        step_runs.append(time.perf_counter() - started)
    return {
        "load_seconds": load,
        "seconds": statistics.median(runs),
        "runs": runs,
        "fva_loss_seconds": statistics.median(step_runs),
        "fva_loss_runs": step_runs,
        "rows": len(card),
        "columns": [str(c) for c in card.columns],
    }


def read_first_series(path: Path, n_series: int) -> Any:
    """The rows of the first ``n_series`` series of a generated file (in file order)."""
    import pandas as pd
    import pyarrow as pa
    import pyarrow.parquet as pq

    file = pq.ParquetFile(path)
    tables, seen = [], 0
    for group in range(file.num_row_groups):
        table = file.read_row_group(group)
        tables.append(table)
        keys = table.select(["item", "location"]).to_pandas().drop_duplicates()
        seen += len(keys)
        if seen >= n_series:
            break
    frame = pa.concat_tables(tables).to_pandas()
    for column in ("item", "location"):
        frame[column] = frame[column].astype(str)
    frame["period"] = pd.to_datetime(frame["period"])
    key = frame["item"] + "\x1f" + frame["location"]
    first = pd.unique(key)[:n_series]
    return frame.loc[key.isin(first)].reset_index(drop=True)


def window_measures(group: Any) -> Any:
    """Window measures of one series, written plainly (the per-series baseline).

    Sign convention as in ``triage.core.metrics``: e = forecast − demand, positive =
    over-forecast. abs_error = Σ|e|; abs_error_value = Σ price·|e|; bias = Σe; bias_value =
    Σ price·e; bias_pct = Σe / Σdemand; mae = mean |e|; rmse = √(mean e²); wape = Σ|e| / Σdemand
    (the MAD/Mean ratio, Kolassa & Schütz 2007); ratios are NaN when the denominator is <= 0.
    tracking_signal = Σe / MAD with MAD = mean |e| over the window (Brown's signal as described
    by Trigg 1964); bias_run = signed length of the run of latest errors sharing the strict sign
    of the latest one (0 if it is exactly 0); n_over and n_nonzero are the counts the sign test
    uses (scipy.stats.binomtest(n_over, n_nonzero)).
    """
    import numpy as np
    import pandas as pd

    demand = group["demand"].to_numpy(dtype=float)
    error = group["forecast"].to_numpy(dtype=float) - demand
    price = group["price"].to_numpy(dtype=float)
    absolute = np.abs(error)
    n = len(error)
    mae = absolute.sum() / n if n else np.nan
    total = demand.sum()
    run = 0
    if n and error[-1] != 0:
        latest = np.sign(error[-1])
        for value in error[::-1]:
            if np.sign(value) != latest:
                break
            run += 1
        run = int(run * latest)
    return pd.Series(
        {
            "abs_error": absolute.sum(),
            "abs_error_value": (price * absolute).sum(),
            "bias": error.sum(),
            "bias_value": (price * error).sum(),
            "bias_pct": error.sum() / total if total > 0 else np.nan,
            "mae": mae,
            "rmse": math.sqrt((error**2).sum() / n) if n else np.nan,
            "wape": absolute.sum() / total if total > 0 else np.nan,
            "tracking_signal": error.sum() / mae if n and mae > 0 else np.nan,
            "bias_run": run,
            "n_over": int((error > 0).sum()),
            "n_nonzero": int((error != 0).sum()),
        }
    )


def baseline_scores(frame: Any, window: int) -> Any:
    """Per-series ``groupby().apply`` of :func:`window_measures` over the last ``window`` weeks."""
    history = frame.loc[frame["demand"].notna()]
    calendar = history["period"].drop_duplicates().sort_values()
    recent = history.loc[history["period"] >= calendar.iloc[-window]]
    return recent.groupby(["item", "location"], sort=False)[["demand", "forecast", "price"]].apply(
        window_measures
    )


def sign_test_pvalue(positive: int, nonzero: int) -> float:
    """Two-sided exact sign test, written plainly (scipy.stats.binomtest(k, n, 0.5) agrees).

    The binomial(n, 1/2) distribution is symmetric, so the two-sided p-value is twice the
    smaller tail, capped at 1; 1.0 when there is no non-zero error.
    """
    if nonzero == 0:
        return 1.0
    k = min(positive, nonzero - positive)
    tail = sum(math.comb(nonzero, i) for i in range(k + 1)) / 2.0**nonzero
    return min(1.0, 2.0 * tail)


def series_scores(group: Any, window_cols: Any, season: int) -> Any:
    """Everything ``scorecard`` computes for one series, written plainly (the full baseline).

    ``group`` holds one series' rows up to the window end (``col`` = calendar position), in
    calendar order. Window measures as :func:`window_measures`; then, over the series' actual
    history: the MASE scale (mean |D_t − D_{t−m}| over pairs of actual periods, Hyndman &
    Koehler 2006), FVA (mean over window periods with D_{t−m} of |D_t − D_{t−m}| − |e_t|),
    ADI = actual periods / periods with positive demand and CV² = (population std / mean)² of
    the positive demands (Syntetos, Boylan & Croston 2005), the sign-test p-value and the
    persistent-bias flag as documented in ``docs/metrics.md``.
    """
    import numpy as np
    import pandas as pd

    from triage.core.metrics import ADI_CUTOFF, BIAS_ALPHA, BIAS_MATERIAL, BIAS_RUN, CV2_CUTOFF

    cols = group["col"].to_numpy()
    demand_all = group["demand"].to_numpy(dtype=float)
    actual = ~np.isnan(demand_all)
    in_window = np.isin(cols, window_cols) & actual & group["forecast"].notna().to_numpy()
    scores = window_measures(group.loc[in_window]).to_dict()

    by_col = dict(zip(cols[actual].tolist(), demand_all[actual].tolist(), strict=True))
    diffs = [abs(d - by_col[c - season]) for c, d in by_col.items() if c - season in by_col]
    scale = sum(diffs) / len(diffs) if diffs else math.nan
    mae = scores["mae"]
    scores["mase"] = mae / scale if scale > 0 else math.nan

    gains = []
    window_rows = group.loc[in_window]
    for c, d, f in zip(
        window_rows["col"], window_rows["demand"], window_rows["forecast"], strict=True
    ):
        if c - season in by_col:
            gains.append(abs(d - by_col[c - season]) - abs(f - d))
    scores["fva"] = sum(gains) / len(gains) if gains else math.nan

    positive = [d for d in by_col.values() if d > 0]
    if positive:
        mean = sum(positive) / len(positive)
        var = sum((d - mean) ** 2 for d in positive) / len(positive)
        adi, cv2 = len(by_col) / len(positive), var / mean**2
        if adi >= ADI_CUTOFF and cv2 >= CV2_CUTOFF:
            pattern = "lumpy"
        elif adi >= ADI_CUTOFF:
            pattern = "intermittent"
        elif cv2 >= CV2_CUTOFF:
            pattern = "erratic"
        else:
            pattern = "smooth"
    else:
        adi = cv2 = math.nan
        pattern = "none"
    scores.update(adi=adi, cv2=cv2, pattern=pattern)

    n_over, n_nonzero = int(scores["n_over"]), int(scores["n_nonzero"])
    scores["bias_pvalue"] = pvalue = sign_test_pvalue(n_over, n_nonzero)
    majority = int(np.sign(2 * n_over - n_nonzero))
    run = int(scores["bias_run"])
    if pvalue <= BIAS_ALPHA and majority != 0:
        direction = majority
    elif abs(run) >= BIAS_RUN:
        direction = int(np.sign(run))
    else:
        direction = 0
    bias, total = scores["bias"], window_rows["demand"].sum()
    material = total <= 0 or abs(bias) >= BIAS_MATERIAL * total * (1 - 1e-12)  # as documented
    flag = direction if direction != 0 and np.sign(bias) == direction and material else 0
    scores["bias_flag"] = {1: "over", -1: "under", 0: ""}[flag]
    return pd.Series(scores)


def full_baseline_scores(frame: Any, window: int, season: int = 1) -> Any:
    """The whole scorecard by a per-series ``groupby().apply`` of :func:`series_scores`.

    The window is the ``window`` latest calendar periods holding any actual demand; after the
    per-series step, the ranks, error shares and cumulative shares (a sort and a sum: cheap).
    """
    import numpy as np

    calendar = np.sort(frame["period"].unique())
    frame = frame.assign(col=np.searchsorted(calendar, frame["period"].to_numpy()))
    actual_cols = np.sort(frame.loc[frame["demand"].notna(), "col"].unique())
    window_cols = actual_cols[-window:]
    upto = frame.loc[frame["col"] <= window_cols[-1]].sort_values(["col"], kind="stable")
    scores = upto.groupby(["item", "location"], sort=False)[
        ["col", "demand", "forecast", "price"]
    ].apply(lambda g: series_scores(g, window_cols, season))
    scores = scores.sort_index()  # ties by key, ascending
    error = scores["abs_error_value"].astype(float)
    scores["rank"] = error.rank(method="first", ascending=False).astype(int)
    scores = scores.sort_values("rank")
    scores["error_share"] = error.loc[scores.index] / error.sum()
    scores["cum_share"] = scores["error_share"].cumsum()
    return scores


def stage_baseline(path: Path, n_series: int, window: int) -> dict[str, Any]:
    """Time both per-series baselines on the first ``n_series`` series; cross-check the full one.

    ``seconds`` is the full scoring (every scorecard column, :func:`full_baseline_scores`),
    the comparison the target is set against; ``window_seconds`` is the window measures alone
    (:func:`baseline_scores`), kept for comparison with earlier runs.
    """
    frame = read_first_series(path, n_series)
    started = time.perf_counter()
    scores = full_baseline_scores(frame, window)
    seconds = time.perf_counter() - started
    started = time.perf_counter()
    baseline_scores(frame, window)
    window_seconds = time.perf_counter() - started
    report: dict[str, Any] = {
        "seconds": seconds,
        "window_seconds": window_seconds,
        "series": len(scores),
    }
    report["cross_check"] = cross_check(frame, scores, window)
    return report


def cross_check(frame: Any, scores: Any, window: int) -> dict[str, Any]:
    """Compare the scorecard with the baseline on the subset, for measures with the same name.

    Informational only: a name the scorecard does not use is listed as missing, and a different
    definition shows as a difference rather than an error.
    """
    import numpy as np
    import pandas as pd

    try:
        from triage.core.ranking import scorecard
        from triage.core.read import read_portfolio
    except ImportError as exc:
        return {"skipped": f"triage core not importable: {exc}"}
    with tempfile.TemporaryDirectory() as tmp:
        subset = Path(tmp) / "subset.parquet"
        out = frame.copy()
        out["period"] = out["period"].dt.date
        out.to_parquet(subset, index=False)
        try:
            card = scorecard(read_portfolio(subset), window=window)
        except Exception as exc:  # the lead's code may still be moving; report, do not fail
            return {"skipped": f"{type(exc).__name__}: {exc}"}
    card = card.reset_index()
    keys = [k for k in ("item", "location") if k in card.columns]
    if "item" not in keys:
        return {"skipped": f"scorecard has no item column: {list(card.columns)[:12]}"}
    for k in keys:
        card[k] = card[k].astype(str)
    merged = scores.reset_index().merge(card, on=keys, suffixes=("", "_card"))
    result: dict[str, Any] = {"matched_series": len(merged), "max_abs_diff": {}, "missing": []}
    for name in MEASURES:
        other = f"{name}_card"
        if other not in merged.columns:
            result["missing"].append(name)
            continue
        a = merged[name].to_numpy(dtype=float)
        b = pd.to_numeric(merged[other], errors="coerce").to_numpy(dtype=float)
        both = ~(np.isnan(a) & np.isnan(b))
        diff = np.abs(a[both] - b[both])
        result["max_abs_diff"][name] = float(np.nanmax(diff)) if diff.size else 0.0
    result["label_mismatches"] = {}
    for name in LABELS:
        other = f"{name}_card"
        if name not in merged.columns or other not in merged.columns:
            result["missing"].append(name)
            continue
        a = merged[name].astype(str).to_numpy()
        b = merged[other].fillna("").astype(str).to_numpy()
        result["label_mismatches"][name] = int((a != b).sum())
    return result


# --------------------------------------------------------------------------------------------
# The runner


def environment() -> dict[str, Any]:
    """Interpreter, library versions and machine facts for the report."""
    import numpy as np
    import pandas as pd
    import pyarrow as pa

    info: dict[str, Any] = {
        "python": sys.version.split()[0],
        "implementation": platform.python_implementation(),
        "platform": platform.platform(),
        "numpy": np.__version__,
        "pandas": pd.__version__,
        "pyarrow": pa.__version__,
        "nproc": os.cpu_count(),
        "usable_cpus": len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else None,
        "peak_memory_source": "/usr/bin/time -v"
        if _time_binary()
        else "getrusage(RUSAGE_CHILDREN)",
        "started": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
    }
    try:
        import triage

        info["triage"] = triage.__version__
    except ImportError:
        info["triage"] = None
    meminfo = Path("/proc/meminfo")
    if meminfo.exists():
        for line in meminfo.read_text().splitlines():
            if line.startswith("MemTotal:"):
                info["memory_bytes"] = int(line.split()[1]) * 1024
    return info


def generator_digest() -> str:
    """Short hash of the generator source, so a cached file is rebuilt when it changes."""
    return hashlib.sha256((ROOT / "sample" / "generate.py").read_bytes()).hexdigest()[:8]


#: ``triage`` started from whichever source tree comes first on PYTHONPATH (``--baseline-ref``).
MODULE_COMMAND = [sys.executable, "-c", "import sys; from triage.cli import main; sys.exit(main())"]


def _cli_summary(runs: list[Run]) -> dict[str, Any]:
    ok = [r for r in runs if r.returncode == 0]
    return {
        "seconds": statistics.median(r.seconds for r in ok) if ok else None,
        "runs": [r.seconds for r in runs],
        "peak_bytes": max((r.peak_bytes or 0) for r in ok) if ok else None,
        "error": next((r.error for r in runs if r.returncode != 0), ""),
    }


def checkout(rev: str, folder: Path) -> Path:
    """The source tree of ``rev`` (git archive) in ``folder``, for ``--baseline-ref``."""
    folder.mkdir(parents=True, exist_ok=True)
    archive = subprocess.run(
        ["git", "-C", str(ROOT), "archive", rev], capture_output=True, check=True
    )
    subprocess.run(["tar", "-x", "-C", str(folder)], input=archive.stdout, check=True)
    return folder


def triage_command() -> list[str]:
    """How to start the ``triage`` command: the installed script, else the module."""
    script = Path(sys.executable).with_name("triage")
    if script.exists():
        return [str(script)]
    found = shutil.which("triage")
    if found:
        return [found]
    return [sys.executable, "-c", "import sys; from triage.cli import main; sys.exit(main())"]


def portfolio_file(out: Path, n_items: int, n_locations: int, args: argparse.Namespace) -> Path:
    series = n_items * n_locations
    name = (
        f"portfolio-{series}s-{args.weeks}w-{args.forward}f-seed{args.seed}-"
        f"{generator_digest()}.parquet"
    )
    return out / name


def built_portfolio(series: int, args: argparse.Namespace, *, competing: bool = False) -> Path:
    """The generator's Parquet portfolio of ``series`` series under ``args.out`` (built once,
    then cached); ``competing`` adds its forecast_stat and forecast_customer columns."""
    n_items = math.ceil(series / args.locations)
    path = portfolio_file(args.out, n_items, args.locations, args)
    if competing:
        path = path.with_name(path.stem + "-competing.parquet")
    if not path.exists():
        args.out.mkdir(parents=True, exist_ok=True)
        print(f"generating {path.name} ...", file=sys.stderr, flush=True)
        subprocess.run(
            [
                sys.executable, "-m", "sample.generate", "--out", str(path),
                *(["--competing"] if competing else []),
                "--items", str(n_items), "--locations", str(args.locations),
                "--weeks", str(args.weeks), "--forward", str(args.forward),
                "--seed", str(args.seed),
            ],
            check=True,
            cwd=ROOT,
        )  # fmt: skip
    return path


def alternate(
    commands: dict[str, list[str]], repeat: int, label: str
) -> tuple[dict[str, float], dict[str, float], dict[str, list[tuple[float, float]]]]:
    """Run each command in its own process, alternately, ``repeat`` times; return the median
    seconds and peak bytes per command, and every (seconds, peak bytes) run."""
    runs: dict[str, list[tuple[float, float]]] = {name: [] for name in commands}
    for _ in range(repeat):
        for name, cmd in commands.items():
            run = measure(cmd)
            if run.returncode != 0:
                raise SystemExit(f"{name} failed: {run.error}")
            runs[name].append((run.seconds, float(run.peak_bytes or math.nan)))
            print(
                f"{label} {name}: {run.seconds:.2f} s, {(run.peak_bytes or 0) / 1e6:,.0f} MB",
                file=sys.stderr,
                flush=True,
            )
    seconds = {n: statistics.median(t for t, _ in r) for n, r in runs.items()}
    peak = {n: statistics.median(m for _, m in r) for n, r in runs.items()}
    return seconds, peak, runs


def parquet_to_csv(source: Path, target: Path) -> None:
    """The benchmark portfolio as CSV (text quoted, as Arrow's writer and many exports do)."""
    import pyarrow as pa
    import pyarrow.csv as pa_csv
    import pyarrow.parquet as pq

    file = pq.ParquetFile(source)
    plain = pa.schema(
        [
            pa.field(f.name, f.type.value_type if pa.types.is_dictionary(f.type) else f.type)
            for f in file.schema_arrow
        ]
    )
    tmp = target.with_suffix(".csv.tmp")
    with pa_csv.CSVWriter(tmp, plain) as writer:
        for group in range(file.num_row_groups):
            writer.write_table(file.read_row_group(group).cast(plain))
    tmp.replace(target)


def _stage_cmd(stage: str, path: Path, *extra: str) -> list[str]:
    return [
        sys.executable,
        "-m",
        "tests.benchmarks.bench_rank",
        "--stage",
        stage,
        "--file",
        str(path),
        *extra,
    ]


def _mb(value: float | None) -> str:
    return "-" if value is None else f"{value / 1e6:,.0f}"


def _s(value: float | None) -> str:
    return "-" if value is None else f"{value:,.2f}"


def bench_size(n_series: int, args: argparse.Namespace) -> dict[str, Any]:
    """All measurements for one portfolio size."""
    n_items = math.ceil(n_series / args.locations)
    path = portfolio_file(args.out, n_items, args.locations, args)
    result: dict[str, Any] = {
        "series_requested": n_series,
        "series": n_items * args.locations,
        "file": str(path),
    }

    if path.exists():
        result["generate"] = {"cached": True}
    else:
        print(f"generating {path.name} ...", file=sys.stderr, flush=True)
        gen = measure(
            [
                sys.executable, "-m", "sample.generate", "--out", str(path),
                "--items", str(n_items), "--locations", str(args.locations),
                "--weeks", str(args.weeks), "--forward", str(args.forward),
                "--seed", str(args.seed),
            ]
        )  # fmt: skip
        result["generate"] = {
            "cached": False,
            "seconds": gen.seconds,
            "peak_bytes": gen.peak_bytes,
            "error": gen.error,
        }
        if gen.returncode != 0:
            return result

    import pyarrow.parquet as pq

    result["rows"] = pq.ParquetFile(path).metadata.num_rows
    result["file_bytes"] = path.stat().st_size

    if not args.skip_cli:
        print(f"{n_series:,} series: triage rank x{args.repeat} ...", file=sys.stderr, flush=True)
        rank = ["rank", str(path), "--format", "csv", "--output", os.devnull]
        runs, older = [], []
        for _ in range(args.repeat):
            runs.append(measure([*triage_command(), *rank]))
            if args.baseline_code is not None:
                # Interleaved with this version's runs: both see the same machine load.
                older.append(measure([*MODULE_COMMAND, *rank], code=args.baseline_code))
        result["cli"] = _cli_summary(runs)
        if args.baseline_code is not None:
            result["cli_baseline"] = {"ref": args.baseline_ref, **_cli_summary(older)}
            now, then = result["cli"], result["cli_baseline"]
            if now["seconds"] and then["seconds"]:
                result["cli_ratio"] = now["seconds"] / then["seconds"]
            if now["peak_bytes"] and then["peak_bytes"]:
                result["cli_peak_ratio"] = now["peak_bytes"] / then["peak_bytes"]

    if args.csv and not args.skip_cli:
        csv_path = path.with_suffix(".csv")
        if not csv_path.exists():
            print(f"writing {csv_path.name} ...", file=sys.stderr, flush=True)
            parquet_to_csv(path, csv_path)
        print(f"{n_series:,} series: triage rank (CSV) x{args.repeat} ...", file=sys.stderr)
        runs = [
            measure(
                [
                    *triage_command(),
                    "rank",
                    str(csv_path),
                    "--format",
                    "csv",
                    "--output",
                    os.devnull,
                ]
            )
            for _ in range(args.repeat)
        ]
        ok = [r for r in runs if r.returncode == 0]
        result["cli_csv"] = {
            "file_bytes": csv_path.stat().st_size,
            "seconds": statistics.median(r.seconds for r in ok) if ok else None,
            "runs": [r.seconds for r in runs],
            "peak_bytes": max((r.peak_bytes or 0) for r in ok) if ok else None,
            "error": next((r.error for r in runs if r.returncode != 0), ""),
        }

    print(f"{n_series:,} series: parquet read ...", file=sys.stderr, flush=True)
    read = measure(_stage_cmd("read", path, "--repeat", str(args.repeat)))
    result["read"] = {**read.report, "peak_bytes": read.peak_bytes, "error": read.error}

    if not args.skip_kernel:
        print(f"{n_series:,} series: scorecard kernel ...", file=sys.stderr, flush=True)
        kernel = measure(
            _stage_cmd("kernel", path, "--repeat", str(args.repeat), "--window", str(args.window))
        )
        result["kernel"] = {**kernel.report, "peak_bytes": kernel.peak_bytes, "error": kernel.error}

    print(f"{n_series:,} series: per-series baseline ...", file=sys.stderr, flush=True)
    base = measure(
        _stage_cmd(
            "baseline", path, "--baseline-series", str(args.baseline_series),
            "--window", str(args.window),
        )
    )  # fmt: skip
    result["baseline"] = {**base.report, "peak_bytes": base.peak_bytes, "error": base.error}
    if base.report.get("series"):
        scaled = base.report["seconds"] * result["series"] / base.report["series"]
        result["baseline"]["scaled_seconds"] = scaled
        window_scaled = base.report["window_seconds"] * result["series"] / base.report["series"]
        result["baseline"]["window_scaled_seconds"] = window_scaled
        kernel_s = result.get("kernel", {}).get("seconds")
        if kernel_s:
            result["speedup"] = scaled / kernel_s
            result["window_speedup"] = window_scaled / kernel_s

    result["verdict"] = verdict(result)
    return result


def verdict(result: dict[str, Any]) -> dict[str, str]:
    """PASS / FAIL / n/a against the targets for this size."""
    out: dict[str, str] = {}
    target = TARGETS.get(result["series"])
    cli = result.get("cli", {})
    if target and target.seconds is not None:
        s = cli.get("seconds")
        out["cli_seconds"] = "n/a" if s is None else ("PASS" if s <= target.seconds else "FAIL")
    if target and target.peak_bytes is not None:
        p = cli.get("peak_bytes")
        out["cli_peak"] = "n/a" if p is None else ("PASS" if p <= target.peak_bytes else "FAIL")
    speed = result.get("speedup")
    out["speedup"] = "n/a" if speed is None else ("PASS" if speed >= MIN_SPEEDUP else "FAIL")
    return out


def print_table(results: list[dict[str, Any]], env: dict[str, Any]) -> None:
    print(
        f"Python {env['python']}, numpy {env['numpy']}, pandas {env['pandas']}, "
        f"pyarrow {env['pyarrow']}, nproc {env['nproc']}, triage {env['triage']}"
    )
    header = (
        f"{'series':>10} {'rows':>12} {'gen s':>7} {'rank s':>7} {'rank MB':>8} {'read s':>7} "
        f"{'read MB':>8} {'load s':>7} {'kernel s':>9} {'base s*':>9} {'speedup':>8} "
        f"{'win s*':>8} {'win x':>6}  verdict"
    )
    print(header)
    print("-" * len(header))
    for r in results:
        gen = r.get("generate", {})
        cli, read, kernel = r.get("cli", {}), r.get("read", {}), r.get("kernel", {})
        base = r.get("baseline", {})
        speed, window = r.get("speedup"), r.get("window_speedup")
        print(
            f"{r['series']:>10,} {r.get('rows', 0):>12,} "
            f"{'cache' if gen.get('cached') else _s(gen.get('seconds')):>7} "
            f"{_s(cli.get('seconds')):>7} {_mb(cli.get('peak_bytes')):>8} "
            f"{_s(read.get('seconds')):>7} {_mb(read.get('peak_bytes')):>8} "
            f"{_s(kernel.get('load_seconds')):>7} {_s(kernel.get('seconds')):>9} "
            f"{_s(base.get('scaled_seconds')):>9} "
            f"{'-' if speed is None else f'{speed:,.0f}x':>8} "
            f"{_s(base.get('window_scaled_seconds')):>8} "
            f"{'-' if window is None else f'{window:,.0f}x':>6}  "
            + " ".join(f"{k}={v}" for k, v in r.get("verdict", {}).items())
        )
        csv_run = r.get("cli_csv")
        if csv_run:
            print(
                f"{'':>10} same portfolio as CSV ({csv_run['file_bytes'] / 1e9:,.2f} GB): "
                f"triage rank {_s(csv_run.get('seconds'))} s, {_mb(csv_run.get('peak_bytes'))} MB"
            )
        if "cli_ratio" in r:
            older = r["cli_baseline"]
            print(
                f"{'':>10} triage rank at {older['ref']} in the same run: "
                f"{_s(older.get('seconds'))} s, {_mb(older.get('peak_bytes'))} MB; this version / "
                f"that: {r['cli_ratio']:.2f}x time, {r.get('cli_peak_ratio', math.nan):.2f}x memory"
            )
        step_s = kernel.get("fva_loss_seconds")
        if step_s and kernel.get("seconds"):
            print(
                f"{'':>10} fva_loss alone (compare.last_step_loss) {step_s:.3f} s = "
                f"{step_s / kernel['seconds']:.1%} of the scorecard kernel"
            )
        for step in ("generate", "cli", "cli_csv", "read", "kernel", "baseline"):
            error = r.get(step, {}).get("error")
            if error:
                print(f"{'':>10} {step} failed: {error}")
    print(
        "* baseline: per-series groupby().apply on a subset, scaled linearly to all series;\n"
        "  base = every scorecard column (the target's comparison), win = window measures only."
    )
    print("  MB = peak resident memory of that step's process, 10^6 bytes.")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m tests.benchmarks.bench_rank")
    parser.add_argument("--series", type=int, action="append", help="portfolio size; repeatable")
    parser.add_argument("--out", type=Path, default=ROOT / "bench-out")
    parser.add_argument("--locations", type=int, default=4, help="warehouses per item")
    parser.add_argument("--weeks", type=int, default=104)
    parser.add_argument("--forward", type=int, default=13)
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--window", type=int, default=13)
    parser.add_argument("--repeat", type=int, default=3, help="runs per timing (median)")
    parser.add_argument("--baseline-series", type=int, default=2000)
    parser.add_argument("--skip-cli", action="store_true")
    parser.add_argument("--skip-kernel", action="store_true")
    parser.add_argument(
        "--csv", action="store_true", help="also time triage rank on a CSV copy of each file"
    )
    parser.add_argument(
        "--baseline-ref",
        metavar="REV",
        help="also time triage rank of git revision REV (git archive), interleaved, same file",
    )
    parser.add_argument("--stage", choices=("read", "kernel", "baseline"), help=argparse.SUPPRESS)
    parser.add_argument("--file", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)

    if args.stage:
        if args.stage == "read":
            report = stage_read(args.file, args.repeat)
        elif args.stage == "kernel":
            report = stage_kernel(args.file, args.repeat, args.window)
        else:
            report = stage_baseline(args.file, args.baseline_series, args.window)
        print(json.dumps(report))
        return 0

    args.out.mkdir(parents=True, exist_ok=True)
    env = environment()
    with tempfile.TemporaryDirectory(prefix="bench-rank-") as scratch:
        args.baseline_code = (
            checkout(args.baseline_ref, Path(scratch) / "baseline-code")
            if args.baseline_ref
            else None
        )
        results = [bench_size(n, args) for n in (args.series or [100_000])]
    print_table(results, env)
    payload = {
        "environment": env,
        "settings": {
            k: (str(v) if isinstance(v, Path) else v)
            for k, v in vars(args).items()
            if k not in ("stage", "file", "baseline_code")
        },
        "targets": {
            "cli": {str(k): vars(v) for k, v in TARGETS.items()},
            "min_speedup": MIN_SPEEDUP,
        },
        "results": results,
    }
    (args.out / "results.json").write_text(json.dumps(payload, indent=2) + "\n")
    print(f"wrote {args.out / 'results.json'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
