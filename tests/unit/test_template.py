"""The ready-to-fill template: its contents and the round trip (regression)."""

from __future__ import annotations

import pytest
from openpyxl import load_workbook

from audit.inventory import TEMPLATE_COLUMNS, InventoryError, check_report, read_inventory
from audit.policy import Policy
from audit.template import write_template


@pytest.fixture(scope="module")
def template(tmp_path_factory):
    path = tmp_path_factory.mktemp("tpl") / "inventory.xlsx"
    write_template(path)
    return path


def test_template_layout(template):
    wb = load_workbook(template)
    assert wb.sheetnames == ["loops", "policy", "instructions", "lists"]
    assert wb["lists"].sheet_state == "hidden"
    ws = wb["loops"]
    headers = [c.value for c in ws[1]]
    assert headers == [c.name for c in TEMPLATE_COLUMNS]
    assert ws.freeze_panes == "A2"
    for cell in ws[1]:
        assert cell.comment is not None and len(cell.comment.text) > 10
    assert "Example: 45" in ws.cell(1, headers.index("tau1_s") + 1).comment.text
    assert "ti_min, ti_h, reset_rpm" in ws.cell(1, headers.index("ti_s") + 1).comment.text
    dv = {str(d.sqref).split(":")[0]: d for d in ws.data_validations.dataValidation}
    letter = {h: ws.cell(1, i + 1).column_letter for i, h in enumerate(headers)}
    for name in ("model", "form", "action", "criticality", "outer_model_input"):
        d = dv[f"{letter[name]}2"]
        assert d.type == "list" and d.formula1.startswith("=lists!")
    assert dv[f"{letter['tau1_s']}2"].type == "decimal" and dv[f"{letter['tau1_s']}2"].operator == "greaterThan"
    assert dv[f"{letter['kc']}2"].type == "decimal"
    words = [c.value for c in wb["lists"]["A"] if c.value]
    assert words[0] in ("criticality", "model")
    pol = wb["policy"]
    assert [c.value for c in pol[1]] == ["setting", "value", "meaning"]
    assert {r[0].value: r[1].value for r in pol.iter_rows(min_row=2)} == Policy().as_dict()
    assert any("management-of-change" in (c.value or "") for c in wb["instructions"]["A"])


def test_empty_template_reads_clean(template):
    """The template's only fault is that it holds no loops yet: one plain line, nothing else
    (README: an inventory without loops is exit 2 for run and check)."""
    with pytest.raises(InventoryError) as exc:
        read_inventory(template)
    assert str(exc.value) == f"sheet 'loops' of {template.name}: no loops below the header row (row 1); nothing to audit"


def test_filled_template_round_trip(template, tmp_path):
    """What the engineer types is what the reader gives back (all in project units already)."""
    entries = [
        {"tag": "FIC-101", "service": "Feed flow", "area": "Intake", "criticality": "high", "model": "fopdt",
         "gain": 1.5, "tau1_s": 45, "dead_time_s": 4, "form": "ideal", "kc": 0.8, "ti_s": 30, "td_s": 2,
         "d_filter": 0.2, "action": "reverse", "sample_s": 1, "pv_filter_s": 0.5, "band_rad_s": 0.01,
         "attenuation_db": 6, "ms_max": 1.7, "gm_min_db": 8, "pm_min_deg": 45},
        {"tag": "LIC-2", "criticality": "low", "model": "ipdt", "gain": -0.004, "tau1_s": 3, "dead_time_s": 2,
         "form": "parallel", "kp": 2, "ki_per_s": 0.004, "kd_s": 1, "action": "direct", "pv_lo": 0, "pv_hi": 4,
         "inner_loop": "FIC-101", "outer_model_input": "inner_sp"},
        {"tag": "TIC-3", "model": "tf", "num": "0.9", "den": "360000 25200 380 1", "dead_time_s": 30,
         "form": "series", "kc": 2, "ti_s": 300, "action": "reverse", "disturbance_file": "rec/a.csv",
         "allowed_amplitude": 2.5},
        {"tag": "PIC-4", "model": "sopdt", "gain": 0.9, "tau1_s": 6, "tau2_s": 1.5, "lead_s": -0.5,
         "dead_time_s": 0.5, "form": "ideal", "kc": 2, "action": "reverse"},
    ]
    wb = load_workbook(template)
    ws = wb["loops"]
    col = {c.value: c.column for c in ws[1]}
    for i, e in enumerate(entries, start=2):
        for k, v in e.items():
            ws.cell(i, col[k], v)
    wb["policy"]["B2"] = 1.8
    out = tmp_path / "filled.xlsx"
    (tmp_path / "rec").mkdir()
    (tmp_path / "rec" / "a.csv").write_text("t,y\n")
    wb.save(out)
    inv = read_inventory(out)
    assert check_report(inv).errors == 0, [str(p) for r in inv.rows for p in r.errors]
    assert inv.policy.ms_max == 1.8
    field = {"tau1_s": "tau1", "tau2_s": "tau2", "lead_s": "lead", "dead_time_s": "dead_time", "ti_s": "ti",
             "td_s": "td", "ki_per_s": "ki", "kd_s": "kd", "sample_s": "sample", "pv_filter_s": "pv_filter"}
    for e, row in zip(entries, inv.rows):
        for k, v in e.items():
            got = getattr(row, field.get(k, k))
            if k in ("num", "den"):
                assert got == tuple(float(x) for x in v.split())
            elif k == "disturbance_file":
                assert got == str((tmp_path / v).resolve())
            else:
                assert got == v, (e["tag"], k, got, v)
            assert row.raw[k] == v
