"""Hostile workbooks written byte by byte: small files whose sheets inflate to huge XML.

Used by tests/core/test_xlsx_limits.py and tests/benchmarks/bench_xlsx_limits.py. The sheet XML
is streamed into the zip writer, so that a workbook inflating to gigabytes is written without
holding it in memory; deflate shrinks runs of identical rows about a thousand times.
"""

from __future__ import annotations

import zipfile
from collections.abc import Iterable
from pathlib import Path

_NS = "http://schemas.openxmlformats.org/spreadsheetml/2006/main"
_REL = "http://schemas.openxmlformats.org/officeDocument/2006/relationships"
_PKG = "http://schemas.openxmlformats.org/package/2006"
_TYPE = "application/vnd.openxmlformats-officedocument.spreadsheetml"

CONTENT_TYPES = (
    f'<?xml version="1.0" encoding="UTF-8"?><Types xmlns="{_PKG}/content-types">'
    '<Default Extension="rels" ContentType="application/vnd.openxmlformats-package.'
    'relationships+xml"/><Default Extension="xml" ContentType="application/xml"/>'
    f'<Override PartName="/xl/workbook.xml" ContentType="{_TYPE}.sheet.main+xml"/>'
    f'<Override PartName="/xl/worksheets/sheet1.xml" ContentType="{_TYPE}.worksheet+xml"/>'
    "</Types>"
)
ROOT_RELS = (
    f'<?xml version="1.0" encoding="UTF-8"?><Relationships xmlns="{_PKG}/relationships">'
    f'<Relationship Id="rId1" Type="{_REL}/officeDocument" Target="xl/workbook.xml"/>'
    "</Relationships>"
)
WORKBOOK = (
    f'<?xml version="1.0" encoding="UTF-8"?><workbook xmlns="{_NS}" xmlns:r="{_REL}">'
    '<sheets><sheet name="data" sheetId="1" r:id="rId1"/></sheets></workbook>'
)
WORKBOOK_RELS = (
    f'<?xml version="1.0" encoding="UTF-8"?><Relationships xmlns="{_PKG}/relationships">'
    f'<Relationship Id="rId1" Type="{_REL}/worksheet" Target="worksheets/sheet1.xml"/>'
    "</Relationships>"
)
STRINGS_TYPE = (
    f'<Override PartName="/xl/sharedStrings.xml" ContentType="{_TYPE}.sharedStrings+xml"/>'
)
STRINGS_REL = f'<Relationship Id="rId2" Type="{_REL}/sharedStrings" Target="sharedStrings.xml"/>'

#: A small valid portfolio: two series over two weeks.
DATA: list[list[object]] = [
    ["item", "period", "demand", "forecast"],
    ["A", "2026-10-05", 5, 4],
    ["A", "2026-10-12", 5, 6],
    ["B", "2026-10-05", 1, 1],
    ["B", "2026-10-12", 2, 1],
]


def row_xml(number: int, cells: list[object]) -> bytes:
    """One ``<row>`` with inline-string and number cells in columns A, B, ..."""
    out = [f'<row r="{number}">']
    for i, value in enumerate(cells):
        ref = f"{chr(65 + i)}{number}"
        if isinstance(value, str):
            out.append(f'<c r="{ref}" t="inlineStr"><is><t>{value}</t></is></c>')
        else:
            out.append(f'<c r="{ref}"><v>{value}</v></c>')
    out.append("</row>")
    return "".join(out).encode()


def write_workbook(
    path: Path,
    tail: Iterable[bytes] = (),
    *,
    data: list[list[object]] | None = None,
    strings: Iterable[bytes] | None = None,
    compression: int = zipfile.ZIP_DEFLATED,
    dimension: bool = False,
) -> Path:
    """A one-sheet workbook: ``data`` (default :data:`DATA`) from row 1, then the ``tail`` bytes.

    Args:
        path: Where to write the .xlsx file.
        tail: Raw XML written inside ``<sheetData>`` after the data rows, block by block.
        data: The rows written first, as cell values.
        strings: Raw XML of a shared-strings part (inside ``<sst>``), block by block; None
            writes no such part.
        compression: ``zipfile.ZIP_DEFLATED``, or ``ZIP_STORED`` to change bytes in place.
        dimension: Write a ``<dimension>`` element before the cells (as Excel does), so that the
            reader does not parse the sheet when it opens the workbook.
    """
    rows = DATA if data is None else data
    with zipfile.ZipFile(path, "w", compression, compresslevel=9) as archive:
        content_types, workbook_rels = CONTENT_TYPES, WORKBOOK_RELS
        if strings is not None:
            content_types = content_types.replace("</Types>", STRINGS_TYPE + "</Types>")
            workbook_rels = workbook_rels.replace(
                "</Relationships>", STRINGS_REL + "</Relationships>"
            )
            with archive.open("xl/sharedStrings.xml", "w", force_zip64=True) as part:
                part.write(f'<?xml version="1.0" encoding="UTF-8"?><sst xmlns="{_NS}">'.encode())
                for block in strings:
                    part.write(block)
                part.write(b"</sst>")
        archive.writestr("[Content_Types].xml", content_types)
        archive.writestr("_rels/.rels", ROOT_RELS)
        archive.writestr("xl/workbook.xml", WORKBOOK)
        archive.writestr("xl/_rels/workbook.xml.rels", workbook_rels)
        with archive.open("xl/worksheets/sheet1.xml", "w", force_zip64=True) as sheet:
            sheet.write(f'<?xml version="1.0" encoding="UTF-8"?><worksheet xmlns="{_NS}">'.encode())
            if dimension:
                sheet.write(b'<dimension ref="A1:D5"/>')
            sheet.write(b"<sheetData>")
            for number, cells in enumerate(rows, start=1):
                sheet.write(row_xml(number, cells))
            for block in tail:
                sheet.write(block)
            sheet.write(b"</sheetData></worksheet>")
    return path


def empty_rows(count: int, *, block: int = 1 << 20) -> Iterable[bytes]:
    """``count`` empty ``<row/>`` elements (6 bytes each), in blocks of ``block`` rows."""
    while count > 0:
        size = min(block, count)
        yield b"<row/>" * size
        count -= size
