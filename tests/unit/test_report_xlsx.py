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
