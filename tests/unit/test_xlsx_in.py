"""The direct workbook reader (:mod:`audit.xlsx_in`) against an independent reader, openpyxl 3.1
(read-only, values only), on workbooks holding every kind of cell: shared strings, inline strings,
rich text, booleans, errors, dates in both date systems, durations, percentages, formulas with and
without a cached value, cells without a reference, merged ranges. Every non-blank cell must read with
the same value and, for numbers, the same number format (common practice: a differential test
against a second implementation of ECMA-376 Part 1, 18.3.1.4 ``c`` and 18.4.8 ``si``)."""

from __future__ import annotations

import datetime as dt
import io
import zipfile
from pathlib import Path

import pytest
from openpyxl import Workbook, load_workbook
from openpyxl.cell.rich_text import CellRichText, TextBlock
from openpyxl.cell.text import InlineFont

from audit.xlsx_in import SheetExtras, open_workbook

ROOT = Path(__file__).resolve().parents[2]


def ours(data: bytes) -> dict[str, dict[tuple[int, int], tuple]]:
    book = open_workbook(zipfile.ZipFile(io.BytesIO(data)))
    out = {}
    for name in book.sheetnames:
        cells = {}
        for r, row in book.rows(name, SheetExtras()):
            for c, v, s in row:
                fmt = book.style_formats[s] if (s and isinstance(v, (int, float)) and not isinstance(v, bool)) else None
                cells[(r, c)] = (v, fmt)
        out[name] = cells
    return out


def reference(data: bytes) -> dict[str, dict[tuple[int, int], tuple]]:
    wb = load_workbook(io.BytesIO(data), read_only=True, data_only=True)
    out = {}
    for ws in wb.worksheets:
        cells = {}
        for row in ws.iter_rows():
            for cell in row:
                v = cell.value
                if v is None or (isinstance(v, str) and not v.strip()):
                    continue
                fmt = cell.number_format if (isinstance(v, (int, float)) and not isinstance(v, bool)
                                             and cell._style_id) else None
                cells[(cell.row, cell.column)] = (v, fmt)
        out[ws.title] = cells
    return out


def every_kind() -> bytes:
    wb = Workbook()
    ws = wb.active
    ws.title = "loops"
    ws.append(["tag", "gain", "flag", "when", "pct", "text", "dur"])
    ws.append(["FIC-1", 1.5, True, dt.datetime(2026, 1, 5, 12, 30), 0.25, "  spaced ", dt.timedelta(hours=30)])
    ws.append(["FIC-2", 7, False, dt.date(1900, 2, 1), 1, "=text", None])
    ws.append(["x_x005F_y", "#DIV/0!", None, dt.time(6, 15), 12345678901234567890, "", "   "])
    ws["E2"].number_format = "0%"
    ws["E3"].number_format = "0.00%"
    ws["G2"].number_format = "[h]:mm:ss"
    ws["B3"].number_format = '0.0" s"'
    ws["F5"] = CellRichText(["plain ", TextBlock(InlineFont(b=True), "bold"), " end"])
    ws["A6"] = "=1+2"              # a formula never computed
    ws.merge_cells("B7:C8")
    ws["B7"] = 3.25
    p = wb.create_sheet("policy")
    p.append(["setting", "value"])
    p.append(["ms_max", 1.6])
    buf = io.BytesIO()
    wb.save(buf)
    return buf.getvalue()


def edited(data: bytes, part: str, edit) -> bytes:
    src = zipfile.ZipFile(io.BytesIO(data))
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as z:
        for info in src.infolist():
            d = src.read(info.filename)
            z.writestr(info.filename, edit(d) if info.filename == part else d)
    return buf.getvalue()


def test_every_kind_of_cell_reads_as_openpyxl_reads_it():
    data = every_kind()
    got, want = ours(data), reference(data)
    assert got == want
    assert got["loops"][(2, 4)][0] == dt.datetime(2026, 1, 5, 12, 30)
    assert got["loops"][(5, 6)][0] == "plain bold end"
    assert got["loops"][(2, 5)] == (0.25, "0%")


def test_inline_strings_errors_cells_without_reference_and_1904_dates():
    """Hand-written sheet XML (as other programs write it): inline rich text, t="e", t="str", t="b",
    cells and rows without r, a formula with a cached value, the 1904 date system."""
    sheet = (b'<?xml version="1.0" encoding="UTF-8"?><worksheet xmlns="http://schemas.openxmlformats.org/'
             b'spreadsheetml/2006/main"><sheetData>'
             b'<row r="1"><c r="A1" t="inlineStr"><is><t>tag</t></is></c><c t="inlineStr"><is><r><t>ga</t></r>'
             b'<r><rPr><b/></rPr><t>in</t></r></is></c><c t="inlineStr"><is><t xml:space="preserve"> x </t></is></c></row>'
             b'<row><c t="e"><v>#N/A</v></c><c t="str"><f>A1</f><v>tag</v></c><c t="b"><v>1</v></c></row>'
             b'<row r="5"><c r="C5" s="1"><v>36526</v></c><c r="D5"><f>1+1</f><v>2</v></c>'
             b'<c r="E5" t="str"><f>""</f><v></v></c><c r="F5" s="2"><v>0.5</v></c></row>'
             b'</sheetData></worksheet>')
    styles = (b'<?xml version="1.0" encoding="UTF-8"?><styleSheet xmlns="http://schemas.openxmlformats.org/'
              b'spreadsheetml/2006/main"><numFmts count="1"><numFmt numFmtId="164" formatCode="yyyy-mm-dd"/></numFmts>'
              b'<cellXfs count="3"><xf numFmtId="0"/><xf numFmtId="164"/><xf numFmtId="9"/></cellXfs></styleSheet>')
    base = every_kind()
    data = edited(base, "xl/worksheets/sheet1.xml", lambda _: sheet)
    data = edited(data, "xl/styles.xml", lambda _: styles)
    data = edited(data, "xl/workbook.xml", lambda x: x.replace(b"<workbookPr", b'<workbookPr date1904="1"', 1))
    got, want = ours(data), reference(data)
    assert got == want
    assert got["loops"][(1, 2)][0] == "gain" and got["loops"][(2, 1)][0] == "#N/A"
    assert got["loops"][(5, 3)][0] == dt.datetime(2004, 1, 2)   # 36526 days after 1904-01-01
    book = open_workbook(zipfile.ZipFile(io.BytesIO(data)))
    extras = SheetExtras()
    list(book.rows("loops", extras))
    assert extras.uncomputed == set()  # D5 has its value, E5 is an empty text result


@pytest.mark.parametrize("path", sorted((ROOT / "sample_site").glob("*.xlsx")))
def test_sample_site_workbook(path):
    data = path.read_bytes()
    assert ours(data) == reference(data)


def test_uncomputed_formulas_and_merged_ranges_found_while_streaming():
    book = open_workbook(zipfile.ZipFile(io.BytesIO(every_kind())))
    extras = SheetExtras()
    list(book.rows("loops", extras))
    assert extras.uncomputed == {(3, 6), (6, 1)}   # "=text" is stored as a formula too
    assert extras.merged == [("B7:C8", 7, 2, 8, 3)]
