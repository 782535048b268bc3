"""Unit tests of the model check stage (audit.plantdata.modelcheck): verdicts, findings, actions, and
bad records kept to their row (behaviour; records from the independent simulator of
tests/reference/plant_sim.py)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from audit.loop import model_from_row
from audit.pipeline import AuditOptions, new_audit
from audit.plantdata.modelcheck import MODELCHECK_COLUMNS, check_models, simulate_row
from audit.policy import Policy
from audit.rows import Inventory, LoopRow
from tests.reference.plant_sim import open_loop


def _record(path, p, n=2400, noise=0.15, seed=3, flat=False):
    op = np.full(n, 40.0)
    if not flat:
        op[n // 6:] = 46.0
        op[n // 2:] = 37.0
        op[5 * n // 6:] = 42.0
    pv = 50 + open_loop("fopdt", p, op, 1.0) + noise * np.random.default_rng(seed).standard_normal(n)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("time_s,pv,op\n" + "".join(f"{k},{pv[k]:.5f},{op[k]:g}\n" for k in range(n)), encoding="utf-8")


def _audit(tmp_path, files):
    site = tmp_path / "site"
    rows = tuple(LoopRow(index=i, sheet="loops", excel_row=i + 2, tag=f"L{i}", model="fopdt", gain=1.5, tau1=30.0,
                         dead_time=6.0, kc=0.8, ti=30.0, sample=1.0, data_file=f) for i, f in enumerate(files))
    inv = Inventory(path=str(site / "loops.xlsx"), name="loops.xlsx", sha256="0", rows=rows, policy=Policy())
    a = new_audit(inv, AuditOptions())
    a.models = [model_from_row(r) for r in rows]
    a.results["findings"] = ""
    a.results["action"] = ""
    a.results["reason"] = ""
    a.results["rank"] = np.nan
    return a


def test_verdicts_and_bad_records_stay_in_their_row(tmp_path):
    site = tmp_path / "site"
    _record(site / "rec" / "good.csv", {"gain": 1.5, "tau1": 30.0, "dead_time": 6.0})
    _record(site / "rec" / "stale.csv", {"gain": 1.5, "tau1": 30.0, "dead_time": 12.0})
    _record(site / "rec" / "flat.csv", {"gain": 1.5, "tau1": 30.0, "dead_time": 6.0}, flat=True)
    (site / "rec" / "bad.csv").write_text("t,level\n1,2\n", encoding="utf-8")
    (tmp_path / "outside.csv").write_text("time_s,pv,op\n", encoding="utf-8")
    a = _audit(tmp_path, ["rec/good.csv", "rec/stale.csv", "rec/flat.csv", "rec/bad.csv", "../outside.csv", None])
    check_models(a)
    r = a.results
    assert set(MODELCHECK_COLUMNS) <= set(r.columns) and len(r) == 6
    assert list(r["model_check"]) == ["confirmed", "disputed", "not identifiable", "record unusable",
                                      "record unusable", ""]
    assert r.at[0, "model_fit_pct"] > 90 and r.at[0, "gain_ratio"] == pytest.approx(1.0, abs=0.05)
    assert r.at[1, "dead_time_diff_s"] == pytest.approx(6.0, abs=1.0)
    assert r.at[1, "findings"].startswith("the data dispute the model (dead time")
    assert "model-based figures rest on a disputed model" in r.at[1, "findings"]
    assert r.at[1, "action"] == "re-identify the model" and r.at[1, "rank"] == 1
    assert np.isfinite(r.at[1, "id_ms"]) and r.at[1, "id_pm_deg"] < r.at[0, "id_pm_deg"]
    assert "with the identified model" in r.at[1, "findings"]
    assert "op moved only" in r.at[2, "data_note"]
    assert "header needs exactly one time column" in r.at[3, "data_note"]
    assert "outside the inventory's folder" in r.at[4, "data_note"]
    assert pd.isna(r.at[5, "model_fit_pct"]) and r.at[5, "data_note"] == ""


def test_model_fit_of_the_rows_model_is_exact_on_its_own_data():
    """simulate_row of an sopdt row with a lead equals the independent simulator (scipy cont2discrete)."""
    row = LoopRow(index=0, sheet="s", excel_row=2, model="sopdt", gain=2.0, tau1=40.0, tau2=10.0, lead=5.0,
                  dead_time=4.6)
    op = np.full(800, 40.0)
    op[100:] = 45.0
    want = open_loop("sopdt", {"gain": 2.0, "tau1": 40.0, "tau2": 10.0, "tau_lead": 5.0, "dead_time": 4.6}, op, 1.0)
    np.testing.assert_allclose(simulate_row(row, op, 1.0), want, atol=1e-9)
    ip = LoopRow(index=0, sheet="s", excel_row=2, model="ipdt", gain=0.01, tau1=0.0, dead_time=3.3)
    want = open_loop("ipdt", {"gain": 0.01, "dead_time": 3.3}, op, 1.0)
    np.testing.assert_allclose(simulate_row(ip, op, 1.0), want, atol=1e-9)
