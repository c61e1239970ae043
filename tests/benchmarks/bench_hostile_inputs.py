"""Time and peak memory of refusing hostile inputs, against reading a normal workbook.

Run by hand (pytest does not collect ``bench_*.py``)::

    python -m tests.benchmarks.bench_hostile_inputs --out bench-out/

Each input goes through ``triage rank FILE --format csv --output /dev/null`` in its own process
(peak memory from ``bench_rank.measure``):

* ``sample.xlsx``: the bundled sample portfolio (34,855 rows, 10 columns) as a workbook, the
  baseline every ratio is taken against;
* ``empty-rows.xlsx``: issue 10's case, the five-row portfolio followed by about 250 million
  empty ``<row/>`` elements: 2.2 MB on disk, 1.5 GB of sheet XML (under the 2 GB declared-size
  cap), which ran 5.5 minutes to 7.6 GB before a MemoryError;
* ``numbered-rows.xlsx``: one row element numbered past the row limit (the reader yields every
  empty row before it: the streamed count refuses it);
* ``billion-rows.parquet``: a billion identical rows, 15 MB (refused from the row count).

Prints a table and writes ``OUT/hostile.json``.
"""

from __future__ import annotations

import argparse
import csv
import json
import sys
from pathlib import Path

import openpyxl

from tests.benchmarks.bench_rank import ROOT, measure
from tests.core.hostile_xlsx import empty_rows, row_xml, write_workbook
from tests.core.test_input_limits import write_parquet_bomb
from triage.core.read import XLSX_MAX_ROWS


def sample_workbook(path: Path) -> Path:
    """The bundled sample portfolio as an xlsx sheet (numbers as numbers, dates as text)."""
    book = openpyxl.Workbook(write_only=True)
    sheet = book.create_sheet("portfolio")
    with (ROOT / "sample" / "portfolio.csv").open(newline="", encoding="utf-8") as handle:
        reader = csv.reader(handle)
        header = next(reader)
        sheet.append(header)
        numeric = {header.index(n) for n in ("demand", "forecast", "price") if n in header}
        for row in reader:
            sheet.append(
                [float(v) if i in numeric and v else (v or None) for i, v in enumerate(row)]
            )
    book.save(path)
    return path


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--out", type=Path, default=Path("bench-out"))
    parser.add_argument("--empty-rows", type=int, default=250 * (1 << 20))
    args = parser.parse_args()
    args.out.mkdir(parents=True, exist_ok=True)
    inputs = {
        "sample.xlsx": sample_workbook(args.out / "sample.xlsx"),
        "empty-rows.xlsx": write_workbook(
            args.out / "empty-rows.xlsx", empty_rows(args.empty_rows)
        ),
        "numbered-rows.xlsx": write_workbook(
            args.out / "numbered-rows.xlsx",
            [row_xml(XLSX_MAX_ROWS + 10, ["C", "2026-10-05", 1, 1])],
        ),
        "billion-rows.parquet": write_parquet_bomb(
            args.out / "billion-rows.parquet", 1_000_000_000
        ),
    }
    results = {}
    for name, path in inputs.items():
        command = [
            str(Path(sys.executable).with_name("triage")),
            "rank",
            str(path),
            "--format",
            "csv",
            "--output",
            "/dev/null",
        ]
        run = measure(command)
        results[name] = {
            "file_bytes": path.stat().st_size,
            "seconds": run.seconds,
            "peak_bytes": run.peak_bytes,
            "returncode": run.returncode,
        }
    base = results["sample.xlsx"]
    print(f"{'input':22} {'file':>9} {'exit':>4} {'wall s':>7} {'peak MB':>8}  vs sample.xlsx")
    for name, r in results.items():
        peak = r["peak_bytes"] or 0
        ratio_time = r["seconds"] / base["seconds"]
        ratio_peak = peak / (base["peak_bytes"] or 1)
        print(
            f"{name:22} {r['file_bytes'] / 1e6:8.1f}M {r['returncode']:4d} {r['seconds']:7.2f} "
            f"{peak / 2**20:8.0f}  time x{ratio_time:.2f}, peak x{ratio_peak:.2f}"
        )
    (args.out / "hostile.json").write_text(json.dumps(results, indent=2))


if __name__ == "__main__":
    main()
