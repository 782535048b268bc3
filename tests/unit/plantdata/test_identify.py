"""Unit tests of audit.plantdata.identify and the identify command: bad input gives a clear note and
no model; spikes, gaps and quality words are handled (behaviour; data from the independent simulator
in tests/reference/plant_sim.py)."""

from __future__ import annotations

import json

import numpy as np
import pytest

from audit.cli import main
from audit.plantdata.identify import excitation, hampel, identify_arrays, identify_record
from audit.plantdata.records import read_record
from tests.reference.plant_sim import open_loop

P = {"gain": 1.5, "tau1": 30.0, "dead_time": 7.35}


def _bump(n=1500, noise=0.2, seed=1):
    op = np.full(n, 40.0)
    op[n // 5:] = 45.0
    op[3 * n // 5:] = 38.0
    pv = 50 + open_loop("fopdt", P, op, 1.0) + noise * np.random.default_rng(seed).standard_normal(n)
    return op, pv


def _csv(path, op, pv, pv_cells=None):
    cells = [f"{v:.5f}" for v in pv] if pv_cells is None else pv_cells
    path.write_text("time_s,pv,op\n" + "".join(f"{k},{cells[k]},{op[k]:g}\n" for k in range(len(op))),
                    encoding="utf-8")
    return path


def test_flat_op_is_refused():
    op, pv = _bump()
    r = identify_arrays(np.full_like(op, 40.0), pv, 1.0)
    assert not r.identifiable and r.best is None and not r.fits
    assert "op moved only 0 % of range" in r.notes[-1] and "too little excitation" in r.notes[-1]


def test_saturated_op_is_refused():
    op, pv = _bump()
    op = np.where(np.arange(len(op)) > 200, 100.0, op)
    r = identify_arrays(op, pv, 1.0)
    assert r.best is None and "op at its limit" in r.notes[-1]
    assert excitation(op).limited_share > 0.8


def test_small_bump_in_noise_is_refused_not_fitted():
    """A 1.2 % bump buried in 3 % noise: op moved, but no model the data support."""
    op = np.full(600, 40.0)
    op[300:] = 41.2
    pv = 50 + open_loop("fopdt", P, op, 1.0) + 3.0 * np.random.default_rng(5).standard_normal(600)
    r = identify_arrays(op, pv, 1.0)
    assert r.best is None and ("fits only" in r.notes[-1] or "not determined" in r.notes[-1])


def test_spikes_in_pv_removed_and_counted():
    op, pv = _bump()
    bad = pv.copy()
    bad[[100, 400, 401, 900, 1200]] += [40, -35, 30, 50, -60]
    found = hampel(bad)[1]
    assert set(np.flatnonzero(found)) >= {100, 400, 900, 1200}
    r = identify_arrays(op, bad, 1.0)
    assert r.identifiable and any("spikes in pv replaced" in n for n in r.notes)
    assert r.best.params["gain"] == pytest.approx(1.5, rel=0.02)


def test_gap_longest_segment_used_and_said(tmp_path):
    op, pv = _bump(3000)
    p = tmp_path / "gap.csv"
    lines = ["time_s,pv,op"] + [f"{k + (600 if k >= 2400 else 0)},{pv[k]:.5f},{op[k]:g}" for k in range(3000)]
    p.write_text("\n".join(lines) + "\n", encoding="utf-8")
    r = identify_record(read_record(p))
    assert any("gap of 601 s" in n for n in r.notes) and any("the longest (lines 2-2401) used" in n for n in r.notes)
    assert r.identifiable and r.segment_lines == (2, 2401)


def test_quality_words_missing_not_model(tmp_path):
    op, pv = _bump()
    cells = [f"{v:.5f}" for v in pv]
    for k in (50, 51, 700):
        cells[k] = "Bad Value"
    r = identify_record(read_record(_csv(tmp_path / "q.csv", op, pv, cells)))
    assert r.identifiable and any("historian quality word 'Bad Value'" in n for n in r.notes)
    for k in range(200, 1200):
        cells[k] = "Shutdown"
    r = identify_record(read_record(_csv(tmp_path / "q2.csv", op, pv, cells)))
    assert any("segments; the longest" in n for n in r.notes) or r.best is None


def test_wrong_units_refused(tmp_path):
    op, pv = _bump()
    r = identify_record(read_record(_csv(tmp_path / "u.csv", op, pv * 8.0)))   # pv in EU, named as %
    assert r.best is None and "units of pv or op in doubt" in r.notes[-1]


def test_command_text_json_and_exit_codes(tmp_path, capsys):
    op, pv = _bump()
    p = _csv(tmp_path / "b.csv", op, pv)
    assert main(["identify", str(p)]) == 0
    out = capsys.readouterr().out
    assert "model         fopdt" in out and "dead_time" in out and "held-out" in out
    assert main(["identify", str(p), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["best"]["model"] == "fopdt" and data["best"]["params"]["gain"] == pytest.approx(1.5, rel=0.02)
    assert set(data["fits"]) == {"fopdt", "sopdt", "ipdt"}
    flat = _csv(tmp_path / "f.csv", np.full_like(op, 40.0), pv)
    assert main(["identify", str(flat)]) == 1
    assert "too little excitation" in capsys.readouterr().out
    assert main(["identify", str(tmp_path / "none.csv")]) == 2
    assert "file not found" in capsys.readouterr().err
