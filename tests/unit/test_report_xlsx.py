"""results.xlsx: sheets, headers with units, inert inventory text (regression; openpyxl reads it back)."""

from __future__ import annotations

import math

import openpyxl
import pytest

from audit.report import build_report
from audit.xlsx_out import cell_value, write_results_xlsx

from .test_report_support import HOSTILE_AREA, HOSTILE_SERVICE, HOSTILE_TAG, make_audit


@pytest.fixture(scope="module")
def book(tmp_path_factory):
    out = tmp_path_factory.mktemp("out")
    audit = make_audit(out)
    path = write_results_xlsx(audit, build_report(audit, plot_limit=0), out / "results.xlsx")
    return audit, openpyxl.load_workbook(path)


def test_sheets(book):
    assert book[1].sheetnames == ["summary", "loops", "work list", "invalid rows"]


def test_no_cell_is_a_formula(book):
    _, wb = book
    for ws in wb.worksheets:
        for row in ws.iter_rows():
            for c in row:
                assert c.data_type != "f", (ws.title, c.coordinate, c.value)


def test_hostile_text_is_kept_verbatim_as_text(book):
    _, wb = book
    values = {c.value for row in wb["loops"].iter_rows() for c in row}
    assert {HOSTILE_TAG, HOSTILE_SERVICE, HOSTILE_AREA} <= values
    cell = next(c for row in wb["loops"].iter_rows() for c in row if c.value == HOSTILE_SERVICE)
    assert cell.data_type == "s" and cell.quotePrefix


def test_loops_sheet_has_every_row_and_column_with_units(book):
    audit, wb = book
    ws = wb["loops"]
    heads = [c.value for c in ws[1]]
    assert ws.max_row == len(audit.results) + 1
    assert len(heads) == len(audit.results.columns)
    for h in ("ms [-]", "gm_db [dB]", "pm_deg [deg]", "dm_s [s]", "wc_rad_s [rad/s]", "tag", "status"):
        assert h in heads
    assert ws.freeze_panes == "B2" and ws.auto_filter.ref.startswith("A1:")


def test_infinite_and_missing_values(book):
    audit, wb = book
    ws = wb["loops"]
    heads = [c.value for c in ws[1]]
    col = heads.index("gm [-]") + 1
    for i, v in enumerate(audit.results["gm"], start=2):
        got = ws.cell(row=i, column=col).value
        if v is None or (isinstance(v, float) and math.isnan(v)):
            assert got is None
        elif math.isinf(v):
            assert got == "inf"
        else:
            assert got == pytest.approx(v)


def test_work_list_and_invalid_rows(book):
    _, wb = book
    work = [[c.value for c in r] for r in wb["work list"].iter_rows(min_row=2)]
    assert [r[5] for r in work][:1] == ["unstable"]
    bad = [[c.value for c in r] for r in wb["invalid rows"].iter_rows(min_row=2)]
    assert bad[0][2] == "FC-101" and "F7" in bad[0][3]


@pytest.mark.parametrize("value, expected", [
    (float("inf"), "inf"), (float("-inf"), "-inf"), (float("nan"), None), (None, None), ("a\x01b", "ab"),
    ((1.0, 2.0), "1.0, 2.0"),
])
def test_cell_values(value, expected):
    assert cell_value(value) == expected


def test_formula_like_header_is_a_text_cell(tmp_path):
    """A formula-like column header that reached the results (the reader renames them; the writer
    does not rely on it) is stored as a quote-prefixed text cell, never a formula (OWASP, CSV
    Injection; common practice)."""
    audit = make_audit(tmp_path)
    audit.results["=1+2"] = "x"
    audit.results["+cmd|' /C calc'!A0"] = "y"
    path = write_results_xlsx(audit, build_report(audit, plot_limit=0), tmp_path / "results.xlsx")
    header = {c.value: c for c in next(openpyxl.load_workbook(path)["loops"].iter_rows(max_row=1))}
    for name in ("=1+2", "+cmd|' /C calc'!A0"):
        assert header[name].data_type == "s" and header[name].quotePrefix, name


# ----------------------------------------------------------------------------- the direct writer


def test_column_letters_agree_with_openpyxl():
    """Column letters of the direct writer against openpyxl's own (an independent implementation)."""
    from openpyxl.utils import get_column_letter

    from audit.xlsx_out import column_letter

    for j in list(range(1, 800)) + [16383, 16384]:
        assert column_letter(j) == get_column_letter(j)


def _parts(path):
    import zipfile
    import xml.etree.ElementTree as ET

    with zipfile.ZipFile(path) as zf:
        return {name: ET.fromstring(zf.read(name)) for name in zf.namelist() if name.endswith((".xml", ".rels"))}


def test_every_part_is_well_formed_and_no_cell_holds_a_formula(tmp_path):
    """Each part of the package parses as XML (ECMA-376 Part 1, 2016, the package of parts), and no cell has
    an <f> element: formula-like text from the inventory, in cells and headers, is a string (OWASP, CSV
    Injection; common practice)."""
    audit = make_audit(tmp_path, site="=1+2")
    audit.results["=cmd|' /C calc'!A0"] = "@SUM(1)"
    path = write_results_xlsx(audit, build_report(audit, plot_limit=0), tmp_path / "results.xlsx")
    parts = _parts(path)
    ns = "{http://schemas.openxmlformats.org/spreadsheetml/2006/main}"
    sheets = [p for name, p in parts.items() if name.startswith("xl/worksheets/")]
    assert len(sheets) == 4
    assert all(s.find(f".//{ns}f") is None for s in sheets)
    wb = openpyxl.load_workbook(path)
    quoted = {(ws.title, c.value) for ws in wb.worksheets for row in ws.iter_rows() for c in row
              if isinstance(c.value, str) and c.quotePrefix}
    for where in [("summary", "=1+2"), ("loops", "=cmd|' /C calc'!A0"), ("loops", "@SUM(1)"),
                  ("loops", HOSTILE_SERVICE), ("loops", HOSTILE_AREA), ("work list", HOSTILE_AREA)]:
        assert where in quoted, where
    # text that only looks odd elsewhere is not quote-prefixed
    assert ("loops", "FC-100") not in quoted


def test_loops_sheet_headers_follow_columns_py(book):
    """Headers are the results columns in the order of audit/columns.py, each with its unit; float
    columns carry the number format of their unit (regression)."""
    from audit.columns import RESULT_COLUMNS
    from audit.xlsx_out import NUMBER_FORMATS

    audit, wb = book
    ws = wb["loops"]
    heads = [c.value for c in ws[1]]
    cols = {c.name: c for c in RESULT_COLUMNS}
    present = [c.name for c in RESULT_COLUMNS if c.name in audit.results.columns]
    assert len(heads) == len(audit.results.columns)
    assert [h.split(" [")[0] for h in heads[:len(present)]] == present
    for j, name in enumerate(present, start=1):
        col, series = cols[name], audit.results[name]
        numeric = series.dtype.kind == "f"
        assert heads[j - 1] == (name if col.unit == "-" and not numeric else f"{name} [{col.unit}]")
        if not numeric:
            continue
        for i, v in enumerate(series, start=2):
            cell = ws.cell(row=i, column=j)
            if isinstance(cell.value, float):
                want = NUMBER_FORMATS.get(col.unit, "General")
                if want == "0.0000" and 0 < abs(cell.value) < 1e-3:
                    want = "0.00E+00"
                assert cell.number_format == want, (name, i)


def test_two_thousand_rows_written_exactly(tmp_path):
    """2,000 loops: every row and column, every float equal to the results to the last bit (the shortest
    round-trip text), NaN blank, infinities as text, booleans as booleans (regression)."""
    import numpy as np
    import pandas as pd

    audit = make_audit(tmp_path)
    report = build_report(audit, plot_limit=0)
    big = pd.concat([audit.results] * 334, ignore_index=True).iloc[:2000].copy()
    rng = np.random.default_rng(5)
    big["ms"] = rng.lognormal(0.4, 0.3, len(big))
    big.loc[::97, "ms"] = np.inf
    big.loc[::89, "ms"] = np.nan
    big["wc_rad_s"] = 10.0 ** rng.uniform(-6, 2, len(big))
    audit.results = big
    path = write_results_xlsx(audit, report, tmp_path / "results.xlsx")
    ws = openpyxl.load_workbook(path, read_only=True)["loops"]
    rows = list(ws.iter_rows(values_only=True))
    assert len(rows) == 2001 and all(len(r) == len(big.columns) for r in rows)
    heads = [h.split(" [")[0] for h in rows[0]]
    for name in ("ms", "wc_rad_s", "stable", "tag"):
        j = heads.index(name)
        for i, v in enumerate(big[name]):
            got = rows[i + 1][j]
            if isinstance(v, float) and math.isnan(v):
                assert got is None
            elif isinstance(v, float) and math.isinf(v):
                assert got == "inf"
            elif isinstance(v, (bool, np.bool_)):
                assert got is bool(v)
            else:
                assert got == v, (name, i)


def test_text_keeps_carriage_returns_and_drops_what_xml_cannot_hold(tmp_path):
    """Control characters XML 1.0 cannot carry are removed; tab, line feed and carriage return are kept
    (W3C, Extensible Markup Language 1.0, 5th ed., 2008, production [2] Char)."""
    audit = make_audit(tmp_path)
    audit.results["note"] = "a\x01b\rc\td\ne\x1f\ufffe"
    path = write_results_xlsx(audit, build_report(audit, plot_limit=0), tmp_path / "results.xlsx")
    ws = openpyxl.load_workbook(path)["loops"]
    j = [c.value for c in ws[1]].index("note") + 1
    assert ws.cell(row=2, column=j).value == "ab\rc\td\ne"
