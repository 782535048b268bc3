"""Unit tests of identify --write-inventory (audit.plantdata.writeback): the copy holds the identified
models with comments; the user's file is never written (behaviour)."""

from __future__ import annotations

import hashlib

import numpy as np
import pytest
from openpyxl import Workbook, load_workbook

from audit.cli import main
from audit.inventory import read_inventory
from tests.reference.plant_sim import open_loop


def _site(tmp_path):
    site = tmp_path / "site"
    (site / "rec").mkdir(parents=True)
    op = np.full(1800, 40.0)
    op[300:] = 46.0
    op[1000:] = 37.0
    pv = 50 + open_loop("fopdt", {"gain": 1.5, "tau1": 30.0, "dead_time": 12.0}, op, 1.0)
    pv += 0.1 * np.random.default_rng(4).standard_normal(len(op))
    (site / "rec" / "a.csv").write_text("time_s,pv,op\n" + "".join(f"{k},{pv[k]:.5f},{op[k]:g}\n"
                                                                   for k in range(len(op))), encoding="utf-8")
    (site / "rec" / "flat.csv").write_text("time_s,pv,op\n" + "".join(f"{k},{pv[k]:.5f},40\n"
                                                                      for k in range(len(op))), encoding="utf-8")
    wb = Workbook()
    ws = wb.active
    ws.title = "loops"
    ws.append(["tag", "model", "gain", "tau1_min", "dead_time_s", "kc", "ti_s", "sample_s", "data_file"])
    ws.append(["TIC-1", "fopdt", 1.5, 0.5, 6, 0.8, 30, 1, "rec/a.csv"])
    ws.append(["TIC-2", "fopdt", 1.0, 1.0, 5, 0.5, 60, 1, "rec/flat.csv"])
    ws.append(["TIC-3", "fopdt", 1.0, 1.0, 5, 0.5, 60, 1, None])
    inv = site / "loops.xlsx"
    wb.save(inv)
    return inv


def test_copy_holds_identified_model_with_comments(tmp_path, capsys):
    inv = _site(tmp_path)
    before = hashlib.sha256(inv.read_bytes()).hexdigest()
    new = tmp_path / "site" / "loops-identified.xlsx"
    assert main(["identify", str(inv), "--write-inventory", str(new)]) == 0
    out = capsys.readouterr().out
    assert "TIC-1" in out and "no model: op moved only" in out and "written:" in out
    assert hashlib.sha256(inv.read_bytes()).hexdigest() == before
    rows = read_inventory(new).rows
    assert rows[0].dead_time == pytest.approx(12.0, abs=0.5) and rows[0].tau1 == pytest.approx(30.0, rel=0.05)
    assert not rows[0].errors
    assert rows[1].dead_time == 5 and rows[1].tau1 == 60.0          # no model: the row as it was
    ws = load_workbook(new)["loops"]
    head = [c.value for c in ws[1]]
    assert "tau1_s" in head and ws.cell(2, head.index("tau1_min") + 1).value is None
    note = ws.cell(2, head.index("dead_time_s") + 1).comment.text
    assert "identified from rec/a.csv (fopdt, fit" in note and "was 6" in note and "+/-" in note


def test_never_overwrites(tmp_path, capsys):
    inv = _site(tmp_path)
    assert main(["identify", str(inv), "--write-inventory", str(inv)]) == 2
    assert "the inventory itself" in capsys.readouterr().err
    other = tmp_path / "site" / "exists.xlsx"
    other.write_bytes(b"keep")
    assert main(["identify", str(inv), "--write-inventory", str(other)]) == 2
    assert other.read_bytes() == b"keep" and "exists" in capsys.readouterr().err
    rec = tmp_path / "site" / "rec" / "a.csv"
    assert main(["identify", str(rec), "--write-inventory", str(tmp_path / "x.xlsx")]) == 2
