"""Golden outputs: what `rank`, `check`, `export`, `report`, `overrides` and `history` print and
write on the invented sample and the seeded month of weekly reviews.

A restructuring of the code must not change one byte of them. ``produce(folder)`` runs every
command in-process and returns ``{name: text}``; ``python -m tests.cli.golden --write`` stores
the current outputs under ``tests/cli/golden/`` (do that only when a change of output is
intended, and say so in the commit).

Two things vary from run to run and are masked: the wall-clock time the ledger stamps on each
decision, and the temporary folder the scenario is built in.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import json
import re
import tempfile
from collections.abc import Iterator
from pathlib import Path

from sample.cycles import CYCLES_SEED, build_cycles
from triage.cli import main

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample" / "portfolio.csv"
GOLDEN = Path(__file__).resolve().parent / "golden"

#: The ledger's and the export's stamps (``2026-11-30T14:05:09.123Z``), the same shown to a
#: person (``2026-11-30 14:05 UTC``, ``2026-11-30 14:05:09``) and the report's "Generated" line.
_STAMP = re.compile(
    r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d(\.\d+)?Z"
    r"|\d{4}-\d\d-\d\d \d\d:\d\d(:\d\d)?( UTC)?(?= by triage| UTC|\s\s)"
)
#: A file's digest in an export's README: it covers the decisions file, which holds the stamps.
_DIGEST = re.compile(r"SHA-256 [0-9a-f]{64}")


def _run(argv: list[str]) -> str:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv)
    return f"exit {code}\n--- stdout\n{out.getvalue()}--- stderr\n{err.getvalue()}"


def _files(folder: Path) -> Iterator[tuple[str, str]]:
    for path in sorted(folder.rglob("*")):
        if path.is_file():
            yield path.relative_to(folder).as_posix(), path.read_text(encoding="utf-8")


def _xlsx_cells(path: Path) -> str:
    from openpyxl import load_workbook

    book = load_workbook(path, read_only=True)
    parts = []
    for sheet in book.worksheets:
        parts.append(f"## {sheet.title}")
        for row in sheet.iter_rows(values_only=True):
            parts.append(json.dumps([None if v is None else str(v) for v in row]))
    book.close()
    return "\n".join(parts) + "\n"


def produce(work: Path) -> dict[str, str]:
    """Every golden output, built in ``work`` (an empty folder)."""
    out: dict[str, str] = {}
    sample = str(SAMPLE)
    for fmt in ("table", "csv", "json"):
        out[f"rank-{fmt}"] = _run(["rank", sample, "--format", fmt])
    out["rank-bias-top"] = _run(["rank", sample, "--by", "bias", "--top", "25"])
    out["rank-cover-season"] = _run(
        ["rank", sample, "--cover", "0.8", "--season", "52", "--window", "26", "--format", "csv"]
    )
    out["check"] = _run(["check", sample])
    out["rank-group-table"] = _run(["rank", sample, "--group", "family,location", "--top", "10"])
    out["rank-group-csv"] = _run(["rank", sample, "--group", "planner", "--format", "csv"])
    out["rank-group-bias-json"] = _run(
        ["rank", sample, "--group", "family", "--by", "bias", "--format", "json"]
    )
    out["compare-csv"] = _run(["compare", sample, "--format", "csv"])

    scenario = build_cycles(work / "cycles", seed=CYCLES_SEED)
    newest = str(scenario.files[-1])
    out["history"] = _run(["history", newest])
    for by in ("reviewer", "root_cause", "direction", "size", "cycle"):
        out[f"overrides-{by}"] = _run(["overrides", newest, "--by", by])
    out["rank-cycles"] = _run(["rank", newest, "--format", "csv"])

    exports = work / "exports"
    exports.mkdir()
    out["export-csv"] = _run(["export", newest, "--to", str(exports / "week.csv")])
    for name, text in _files(exports / "week"):
        out[f"export-csv/{name}"] = text
    out["export-csv-wide"] = _run(
        [
            "export",
            newest,
            "--to",
            str(exports / "wide.csv"),
            "--layout",
            "wide",
            "--round",
            "units",
        ]
    )
    for name, text in _files(exports / "wide"):
        out[f"export-csv-wide/{name}"] = text
    out["export-json"] = _run(["export", newest, "--to", str(exports / "week.json")])
    out["export-json/file"] = (exports / "week.json").read_text(encoding="utf-8")
    out["export-xlsx"] = _run(["export", newest, "--to", str(exports / "week.xlsx")])
    out["export-xlsx/cells"] = _xlsx_cells(exports / "week.xlsx")
    earlier = str(scenario.files[1])
    out["export-earlier"] = _run(["export", earlier, "--to", str(exports / "earlier.json")])
    out["export-earlier/file"] = (exports / "earlier.json").read_text(encoding="utf-8")

    out["report"] = _run(["report", newest, "--to", str(exports / "report.html")])
    out["report/html"] = (exports / "report.html").read_text(encoding="utf-8")

    masked = {}
    for name, text in out.items():
        text = text.replace(str(work), "<work>").replace(str(ROOT), "<root>")
        masked[name] = _DIGEST.sub("SHA-256 <digest>", _STAMP.sub("<time>", text))
    return masked


def golden_path(name: str) -> Path:
    return GOLDEN / (name.replace("/", "__") + ".txt")


def main_write() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--write", action="store_true", help="store the current outputs")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        outputs = produce(Path(tmp))
    if args.write:
        GOLDEN.mkdir(exist_ok=True)
        for old in GOLDEN.glob("*.txt"):
            old.unlink()
        for name, text in outputs.items():
            golden_path(name).write_text(text, encoding="utf-8", newline="")
        print(f"wrote {len(outputs)} golden outputs to {GOLDEN}")
    else:
        for name, text in outputs.items():
            print(name, len(text))


if __name__ == "__main__":
    main_write()
