"""Reading and validating inventories (regression: expected values are closed-form conversions
or our own messages; sources named where a convention is involved)."""

from __future__ import annotations

import json
import time

import pytest
from openpyxl import Workbook

from audit.cli import main
from audit.inventory import (INVENTORY_COLUMNS, InventoryError, canonical_header, check_json, check_report,
                             format_check, read_inventory)
from audit.loop import model_from_row
from tests.unit.malformed_corpus import CASES, GOOD, good_row, one_row, workbook


# ---------------------------------------------------------------- the malformed corpus

@pytest.mark.parametrize("case", [c for c in CASES if c.file_error], ids=lambda c: c.name)
def test_unreadable_file_gives_one_line(case, tmp_path, capsys):
    path = case.build(tmp_path)
    with pytest.raises(InventoryError) as exc:
        read_inventory(path)
    msg = str(exc.value)
    assert case.file_error in msg
    assert "\n" not in msg
    assert main(["check", str(path)]) == 2
    out = capsys.readouterr()
    assert case.file_error in out.err
    assert "Traceback" not in out.err + out.out


@pytest.mark.parametrize("case", [c for c in CASES if not c.file_error], ids=lambda c: c.name)
def test_malformed_rows_name_the_cell(case, tmp_path, capsys):
    path = case.build(tmp_path)
    inv = read_inventory(path)
    rep = check_report(inv)
    for cell, column, fragment in case.expect:
        hits = [p for p in rep.problems if p.cell == cell and p.column == column and fragment in p.message]
        assert hits, f"no problem at {cell} ({column}) containing {fragment!r}; got:\n{format_check(rep)}"
    assert rep.exit_code == 2
    assert main(["check", str(path)]) == 2
    out = capsys.readouterr()
    assert "Traceback" not in out.out + out.err
    assert f"!{case.expect[0][0]}" in out.out


def test_corpus_is_large_enough():
    assert len(CASES) >= 25


def test_problem_text_form(tmp_path):
    inv = read_inventory(one_row(tmp_path / "a.xlsx", ti_s="abc"))
    p = inv.rows[0].errors[0]
    assert str(p) == "loops!G2 (ti_s): must be a number >= 0, got 'abc'"


# ---------------------------------------------------------------- headers

@pytest.mark.parametrize("header, name", [
    ("Dead time (s)", "dead_time_s"), ("Ti [min]", "ti_min"), ("  TAU1_H ", "tau1_h"), ("dead time s", "dead_time_s"),
    ("PB (%)", "pb_pct"), ("Reset (repeats/min)", "reset_rpm"), ("Ki (1/min)", "ki_per_min"),
    ("Band (rad/s)", "band_rad_s"), ("Attenuation (dB)", "attenuation_db"), ("Gain (-)", "gain"),
    ("Gain (1/min)", "gain_per_min"), ("pv lo (m3/h)", "pv_lo"), ("Kd (seconds)", "kd_s"), ("D filter", "d_filter"),
    ("Allowed amplitude (%)", "allowed_amplitude"), ("dead_time", None), ("notes", None),
])
def test_header_matching(header, name):
    assert canonical_header(header) == name


def test_unknown_column_kept_with_one_warning_and_suggestion(tmp_path):
    header, row = good_row()
    path = workbook(tmp_path / "a.xlsx", [*header, "dead_tme_s", "Owner"],
                    [[*row, 5, "ops"], [*good_row(tag="B")[1], 6, "mech"]])
    inv = read_inventory(path)
    assert inv.extra_columns == ("dead_tme_s", "Owner")
    assert inv.rows[0].extras == {"dead_tme_s": 5, "Owner": "ops"}
    warns = [p for p in inv.problems if p.severity == "warning"]
    assert len(warns) == 2
    assert "did you mean dead_time_s?" in warns[0].message and warns[0].cell == "I1"
    assert "did you mean" not in warns[1].message
    assert all(r.valid for r in inv.rows)
    assert check_report(inv).exit_code == 0


# ---------------------------------------------------------------- units at the door

def test_conversions_and_conventions(tmp_path):
    header = ["tag", "model", "gain_eu", "pv_lo", "pv_hi", "tau1_min", "dead_time_h", "form", "pb_pct", "reset_rpm",
              "td_min", "sample_s", "action"]
    row = ["T-1", "fopdt", 2.5, 0, 250, 3, 0.01, "series", 125, 0.5, 0.2, 1, "reverse"]
    r = read_inventory(workbook(tmp_path / "a.xlsx", header, [row])).rows[0]
    assert r.valid, r.errors
    assert r.gain == pytest.approx(1.0)            # 2.5 * 100 / 250
    assert r.tau1 == 180.0 and r.dead_time == 36.0
    assert r.kc == pytest.approx(0.8)              # 100 / 125
    assert r.ti == pytest.approx(120.0)            # 1 / 0.5 repeats per minute = 2 min
    assert r.td == pytest.approx(12.0)
    assert r.form == "series"
    assert r.conventions["gain"] == "gain_eu" and r.conventions["kc"] == "pb_pct"
    assert r.conventions["ti"] == "reset_rpm" and r.conventions["td"] == "td_min"
    assert r.raw["pb_pct"] == 125 and r.raw["reset_rpm"] == 0.5
    json.dumps(r.raw)


def test_parallel_ipdt_per_minute(tmp_path):
    header = ["tag", "model", "gain_per_min", "dead_time_s", "form", "kp", "ki_per_min", "kd_min", "action"]
    r = read_inventory(workbook(tmp_path / "a.xlsx", header,
                                [["L-1", "ipdt", -0.3, 5, "parallel", 1.2, 0.6, 0.05, "direct"]])).rows[0]
    assert r.valid, r.errors
    assert r.gain == pytest.approx(-0.005) and r.ki == pytest.approx(0.01) and r.kd == pytest.approx(3.0)
    assert r.conventions == {"gain": "gain_per_min", "dead_time": "dead_time_s", "kd": "kd_min", "ki": "ki_per_min"}
    assert r.action == "direct"
    m = model_from_row(r)
    assert m.sign == -1.0 and m.controller.ki == pytest.approx(0.01)


def test_same_value_in_two_units_is_fine(tmp_path):
    r = read_inventory(one_row(tmp_path / "a.xlsx", tau1_min=10 / 60, pb_pct=200)).rows[0]
    assert r.valid, r.errors
    assert r.tau1 == pytest.approx(10.0) and r.kc == 0.5


def test_no_integral_action_and_defaults(tmp_path):
    r = read_inventory(one_row(tmp_path / "a.xlsx", ti_s=0, action=None)).rows[0]
    assert r.valid
    assert r.ti is None and r.td == 0.0 and r.d_filter == 0.1 and r.criticality == "medium" and r.form == "ideal"
    assert r.action == "reverse"
    assert [w.column for w in r.warnings] == ["action"]
    r = read_inventory(one_row(tmp_path / "b.xlsx", ti_s=..., reset_rpm=0)).rows[0]
    assert r.valid and r.ti is None and r.conventions["ti"] == "reset_rpm"


def test_numbers_as_text_and_percent(tmp_path):
    header, row = good_row(gain=" 1.5 ", tau1_s="1.2e1", pb_pct="25%", kc=..., allowed_amplitude="2 %",
                           disturbance_file="rec.csv")
    (tmp_path / "rec.csv").write_text("t,y\n0,0\n")

    def fmt(wb):
        wb["loops"]["A3"] = "FIC-2"
        for col, v in zip("BCDEFGHIJ", ["fopdt", 1, 10, 1, 10, "reverse", 0.25, 0.02, "rec.csv"]):
            wb["loops"][f"{col}3"] = v
        wb["loops"]["H3"].number_format = "0%"      # pb_pct cell showing 25%
        wb["loops"]["I3"].number_format = "0.0%"    # allowed_amplitude cell showing 2.0%
    r1, r2 = read_inventory(workbook(tmp_path / "a.xlsx", header, [row], edit=fmt)).rows
    assert header[7] == "pb_pct" and header[8] == "allowed_amplitude"
    for r in (r1, r2):
        assert r.valid, r.errors
        assert r.kc == pytest.approx(4.0)           # PB 25 % -> kc = 4
        assert r.allowed_amplitude == pytest.approx(2.0)
        assert r.disturbance_file == str((tmp_path / "rec.csv").resolve())
    assert r1.gain == 1.5 and r1.tau1 == 12.0


def test_allowed_amplitude_in_engineering_units(tmp_path):
    r = read_inventory(one_row(tmp_path / "a.xlsx", pv_lo=20, pv_hi=50, allowed_amplitude_eu=0.3,
                               disturbance_file="records/x.csv")).rows[0]
    assert r.allowed_amplitude == pytest.approx(1.0)   # 0.3 / 30 * 100
    assert r.conventions["allowed_amplitude"] == "allowed_amplitude_eu"
    assert any("not found" in w.message for w in r.warnings)


def test_model_columns_not_used_are_ignored_with_warning(tmp_path):
    r = read_inventory(one_row(tmp_path / "a.xlsx", tau2_s=5, kp=3)).rows[0]
    assert r.valid and r.tau2 is None and r.kp is None
    assert {w.column for w in r.warnings} == {"tau2_s", "kp"}


def test_tf_row(tmp_path):
    r = read_inventory(one_row(tmp_path / "a.xlsx", model="tf", gain=..., tau1_s=..., num="0.8; 0.4",
                               den="12 7 1")).rows[0]
    assert r.valid, r.errors
    assert r.num == (0.8, 0.4) and r.den == (12.0, 7.0, 1.0)


def test_physical_warnings(tmp_path):
    r = read_inventory(one_row(tmp_path / "a.xlsx", gain=150, dead_time_s=200)).rows[0]
    assert r.valid
    msgs = " ".join(w.message for w in r.warnings)
    assert "above 100" in msgs and "more than 10 times" in msgs


def test_band_without_attenuation_is_dropped_with_warning(tmp_path):
    r = read_inventory(one_row(tmp_path / "a.xlsx", band_rad_s=0.1)).rows[0]
    assert r.valid and r.band_rad_s is None and r.attenuation_db is None
    assert r.warnings[0].column == "attenuation_db"


def test_row_overrides_stay_on_row_and_policy_sheet(tmp_path):
    header, row = good_row(ms_max=1.6, gm_min_db=8, pm_min_deg=45)
    inv = read_inventory(workbook(tmp_path / "a.xlsx", header, [row],
                                  policy=[["setting", "value", "meaning"], ["ms_max", 1.8, "x"],
                                          ["min_samples", "128", ""], ["colour", "red", ""]]))
    r = inv.rows[0]
    assert (r.ms_max, r.gm_min_db, r.pm_min_deg) == (1.6, 8.0, 45.0)
    assert inv.policy.ms_max == 1.8 and inv.policy.min_samples == 128 and isinstance(inv.policy.min_samples, int)
    assert inv.policy.gm_min_db == 6.0
    assert [p.severity for p in inv.problems] == ["warning"] and "colour" in inv.problems[0].message
    assert inv.problems[0].sheet == "policy" and inv.problems[0].cell == "A4"


def test_cascade_columns(tmp_path):
    header, row = good_row(inner_loop="FIC-9", outer_model_input="Inner_SP")
    r = read_inventory(workbook(tmp_path / "a.xlsx", header, [row])).rows[0]
    assert r.inner_loop == "FIC-9" and r.outer_model_input == "inner_sp"
    r = read_inventory(one_row(tmp_path / "b.xlsx", inner_loop="FIC-1")).rows[0]
    assert not r.valid and "own inner loop" in r.errors[0].message


# ---------------------------------------------------------------- blank rows, order, indexes

def test_blank_rows_skipped_and_counted_trailing_ignored(tmp_path):
    header, row = good_row()

    def edit(wb):
        ws = wb["loops"]
        for c in "ABCDEFGH":
            ws[f"{c}9"] = "  "              # whitespace only: blank
        ws["B5000"].number_format = "0.00"  # formatted but empty, far below

    rows = [row, [], good_row(tag="B")[1], [None] * 3, [], good_row(tag="C")[1]]
    inv = read_inventory(workbook(tmp_path / "a.xlsx", header, rows, edit=edit))
    assert [(r.index, r.excel_row, r.tag) for r in inv.rows] == [(0, 2, "FIC-1"), (1, 4, "B"), (2, 7, "C")]
    assert inv.blank_rows == 3
    assert "3 blank rows skipped" in format_check(check_report(inv))


def test_header_below_a_title(tmp_path):
    wb = Workbook()
    ws = wb.active
    ws.title = "Loops"
    ws["A1"] = "Larkmoor loop list"
    ws.merge_cells("A1:D1")
    header, row = good_row()
    ws.append([])
    ws.append(header)
    ws.append(row)
    wb.save(tmp_path / "a.xlsx")
    inv = read_inventory(tmp_path / "a.xlsx")
    assert inv.rows[0].excel_row == 4 and inv.rows[0].valid and inv.rows[0].sheet == "Loops"


def test_every_invalid_row_is_kept(tmp_path):
    header, row = good_row()
    rows = [row, good_row(tag="B", model="x")[1], good_row(tag="C")[1]]
    inv = read_inventory(workbook(tmp_path / "a.xlsx", header, rows))
    rep = check_report(inv)
    assert (rep.rows_read, rep.valid, rep.invalid) == (3, 2, 1)
    js = check_json(rep)
    assert js["exit_code"] == 2 and js["problems"][0]["cell"] == "B3"
    json.dumps(js)


def test_computed_formula_is_read(tmp_path):
    """A formula whose value the spreadsheet program stored reads as that value (written here as XML)."""
    import zipfile
    header, row = good_row()
    path = workbook(tmp_path / "a.xlsx", header, [row])
    z = zipfile.ZipFile(path)
    parts = {n: z.read(n) for n in z.namelist()}
    z.close()
    sheet = parts["xl/worksheets/sheet1.xml"].decode()
    import re
    sheet = re.sub(r'<c r="C2"[^>]*>.*?</c>', '<c r="C2"><f>0.5*2</f><v>1</v></c>', sheet)
    parts["xl/worksheets/sheet1.xml"] = sheet.encode()
    with zipfile.ZipFile(path, "w") as out:
        for n, b in parts.items():
            out.writestr(n, b)
    r = read_inventory(path).rows[0]
    assert r.valid and r.gain == 1.0


# ---------------------------------------------------------------- CSV

def test_csv_inventory(tmp_path):
    p = tmp_path / "site loops.csv"
    p.write_text("Tag,Model,Gain,Tau1 (min),Dead time (s),PB (%),Ti [min],Action\n"
                 "FIC-1,fopdt,1.5,0.5,3,200,0.5,reverse\n"
                 "\n"
                 "FIC-2,fopdt,abc,0.5,3,200,0.5,reverse\n", encoding="utf-8")
    inv = read_inventory(p)
    assert inv.sheets == ()
    a, b = inv.rows
    assert a.valid and a.tau1 == 30.0 and a.kc == 0.5 and a.ti == 30.0 and a.sheet == "site loops"
    assert b.excel_row == 4 and not b.valid
    assert str(b.errors[0]) == "site loops!C4 (gain): must be a number, got 'abc'"
    assert inv.blank_rows == 1


def test_csv_semicolons_and_windows_encoding(tmp_path):
    p = tmp_path / "x.csv"
    p.write_bytes("tag;service;model;gain;tau1_s;kc;ti_s;action\nTIC-1;Temp\xe9rature;fopdt;1;10;1;10;reverse\n"
                  .encode("cp1252"))
    r = read_inventory(p).rows[0]
    assert r.valid and r.service == "Température"


# ---------------------------------------------------------------- scale (not timed: see benchmarks)

def test_ten_thousand_rows_read(tmp_path):
    header, _ = good_row()
    wb = Workbook(write_only=True)
    ws = wb.create_sheet("loops")
    ws.append(header)
    for i in range(10_000):
        ws.append([f"L-{i}", "fopdt", 1.0 + i % 7, 10 + i % 13, 1, 0.5, 10, "reverse"])
    wb.save(tmp_path / "big.xlsx")
    t0 = time.perf_counter()
    inv = read_inventory(tmp_path / "big.xlsx")
    elapsed = time.perf_counter() - t0
    assert len(inv.rows) == 10_000 and all(r.valid for r in inv.rows)
    assert inv.rows[-1].excel_row == 10_001
    print(f"10,000 rows read in {elapsed:.2f} s")


def test_column_table_is_complete():
    names = [c.name for c in INVENTORY_COLUMNS]
    assert len(names) == len(set(names))
    for required in ("tag", "gain", "gain_eu", "gain_per_min", "pb_pct", "reset_rpm", "ki_per_min", "ti_h",
                     "disturbance_file", "allowed_amplitude_eu", "inner_loop", "outer_model_input"):
        assert required in names
    assert all(c.meaning and c.unit for c in INVENTORY_COLUMNS)
    assert set(GOOD) <= set(names)


def test_columns_markdown_lists_every_column():
    from audit.inventory import inventory_columns_markdown
    md = inventory_columns_markdown()
    for c in INVENTORY_COLUMNS:
        assert f"`{c.name}`" in md
    assert all(line.count("|") - line.count("\\|") == 6 for line in md.splitlines())


def test_models_built_once_and_reused_by_the_models_stage():
    """The loops the reader builds to check evaluability are the loops of the models stage: equal to
    building them again from the rows (common practice), the same objects for loops that are not a
    cascade's composed outer loop, and the composed outer loops still built with their inner loop."""
    from pathlib import Path

    from audit import pipeline

    inv = read_inventory(Path(__file__).resolve().parents[2] / "sample_site" / "loops.xlsx")
    assert len(inv.models) == len(inv.rows)
    for row, m in zip(inv.rows, inv.models):
        if m is not None:
            assert row.valid
            assert m == model_from_row(row)
    audit = pipeline.new_audit(inv, pipeline.AuditOptions(date="2026-01-05"))
    pipeline.build_models(audit)
    composed = audit.extras["cascade"].composed
    reused = [i for i, m in enumerate(inv.models) if m is not None and i not in composed]
    assert reused and all(audit.models[i] is inv.models[i] for i in reused)
    for i in composed:
        if audit.models[i] is not None:
            assert audit.models[i].inner is not None
            assert audit.models[i] == model_from_row(inv.rows[i], audit.models[audit.extras["cascade"].inner_of[i]])
