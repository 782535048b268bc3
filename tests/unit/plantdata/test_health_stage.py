"""Unit tests of the loop-health pipeline stage (audit.plantdata.health.add_loop_health) on a small
inventory with arrays given directly (the reader is tested on its own): columns for every row, none
dropped, findings in words, and the rows whose oscillation is left to a retune."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd

from audit.inventory import read_inventory
from audit.pipeline import AuditOptions, build_models, new_audit
from audit.plantdata.health import (HEALTH_COLUMNS, OperationData, add_loop_health, record_arrays,
                                    source_words)
from audit.plantdata.records import read_record


def _inventory(tmp_path: Path) -> Path:
    p = tmp_path / "loops.csv"
    p.write_text("tag,service,area,criticality,model,gain,tau1_s,dead_time_s,form,kc,ti_s,action,sample_s\n"
                 "F-1,flow,A,medium,fopdt,1,5,1,ideal,0.5,5,reverse,0.5\n"
                 "F-2,flow,A,medium,fopdt,1,5,1,ideal,0.5,5,reverse,0.5\n"
                 "F-3,flow,A,medium,fopdt,1,5,1,ideal,0.5,5,reverse,0.5\n", encoding="utf-8")
    return p


def test_stage_columns_for_every_row(tmp_path):
    inv = read_inventory(_inventory(tmp_path))
    audit = new_audit(inv, AuditOptions())
    build_models(audit)
    t = np.arange(4000.0)
    rng = np.random.default_rng(1)
    osc = OperationData(t, np.full(t.size, 50.0), 50.0 + 2 * np.sin(2 * np.pi * t / 150.0)
                        + 0.1 * rng.standard_normal(t.size), 50.0 - 3 * np.cos(2 * np.pi * t / 150.0),
                        np.array(["AUTO"] * t.size, dtype=object), "f2.csv")
    manual = OperationData(t, np.full(t.size, 50.0), 50.0 + 0.2 * rng.standard_normal(t.size),
                           np.full(t.size, 40.0), np.array(["MAN"] * t.size, dtype=object), "f3.csv")
    add_loop_health(audit, source=lambda a: {1: (osc, ""), 2: (manual, ""), 0: (None, "f1.csv: nothing usable")})
    res = audit.results
    assert len(res) == 3 and all(c in res.columns for c in HEALTH_COLUMNS)
    assert math.isnan(res.at[0, "auto_pct"]) and "nothing usable" in res.at[0, "health_note"]
    assert "nothing usable" in res.at[0, "message"]
    assert bool(res.at[1, "oscillating"]) and abs(res.at[1, "oscillation_period_s"] - 150.0) < 2.0
    assert not bool(res.at[1, "valve_sticking"])
    assert "enters from outside" in res.at[1, "health_findings"]       # 150 s against a resonance of ~20 s
    assert res.at[2, "auto_pct"] == 0.0 and res.at[2, "health_findings"].startswith("mostly in manual")
    assert audit.extras["retune_for_oscillation"] == frozenset({1})
    assert set(audit.extras["health"]) == {1, 2}


def test_source_words_silent_near_the_loops_own_resonance(tmp_path):
    inv = read_inventory(_inventory(tmp_path))
    audit = new_audit(inv, AuditOptions())
    build_models(audit)
    m = audit.models[0]
    w = np.logspace(-4, 2, 600) / m.delay
    own = 2 * np.pi / w[np.argmax(np.abs(m.S(w)))]
    assert source_words(m, own) == ""
    assert "outside" in source_words(m, 10 * own)


def test_record_arrays_joins_segments_and_mode_words(tmp_path):
    """A record with a gap gives two segments; the arrays keep the jump in time and the mode words."""
    lines = ["time_s,sp,pv,op,mode"]
    for k in range(200):
        lines.append(f"{k},50,{50 + np.sin(k / 5):.4f},40,AUTO")
    for k in range(1000, 1200):
        lines.append(f"{k},50,{50 + np.sin(k / 5):.4f},40,{'MAN' if k % 2 else 'AUTO'}")
    p = tmp_path / "r.csv"
    p.write_text("\n".join(lines) + "\n", encoding="utf-8")
    rec = read_record(p, name="r.csv")
    d = record_arrays(rec)
    assert d.t.size == 400 and d.t[199] == 199.0 and d.t[200] == 1000.0
    assert isinstance(d.mode, pd.Categorical)
    assert list(d.mode[198:202]) == ["AUTO", "AUTO", "AUTO", "MAN"]
    assert d.source == "r.csv"


def test_every_health_column_is_documented():
    """Each column the stage adds has its name, unit and meaning in audit.columns (README table)."""
    from audit.columns import RESULT_COLUMNS
    names = {c.name: c for c in RESULT_COLUMNS}
    for c in HEALTH_COLUMNS:
        assert c in names and names[c].stage == "health"


def test_mode_words_from_the_policy_sheet(tmp_path):
    """A site's own mode words in the policy sheet decide what counts as automatic."""
    import openpyxl

    from audit.plantdata.health import settings_from_policy
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "loops"
    ws.append(["tag", "service", "area", "criticality", "model", "gain", "tau1_s", "dead_time_s", "form", "kc",
               "ti_s", "action", "sample_s"])
    ws.append(["F-1", "flow", "A", "medium", "fopdt", 1, 5, 1, "ideal", 0.5, 5, "reverse", 0.5])
    pol = wb.create_sheet("policy")
    pol.append(["setting", "value"])
    pol.append(["mode_automatic", "AUT, LOCAL"])
    pol.append(["mode_manual", "HAND"])
    pol.append(["auto_min_pct", 80])
    p = tmp_path / "loops.xlsx"
    wb.save(p)
    inv = read_inventory(p)
    assert not [x for x in inv.problems if x.sheet == "policy"]
    st = settings_from_policy(inv.policy)
    assert st.words.automatic == ("aut", "local") and st.words.manual == ("hand",)
    assert list(st.words.classify(np.array(["LOCAL", "HAND", "AUTO"], dtype=object))) == ["automatic", "manual",
                                                                                         "other"]
    assert inv.policy.auto_min_pct == 80
