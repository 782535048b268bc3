"""Unit tests of audit.multiloop.stage: the group stages in the pipeline (logic and regression, invented data)."""

from __future__ import annotations

import math

import openpyxl
import pandas as pd
import pytest

from audit.inventory import read_inventory
from audit.pipeline import AuditOptions, new_audit, run_stages

HEAD = ["tag", "model", "gain", "tau1_s", "dead_time_s", "sample_s", "kc", "ti_s", "action", "criticality"]
BLEND = [["AIC-611", "fopdt", 0.9, 400, 60, 5, 4, 400, "reverse", "high"],
         ["TIC-612", "fopdt", 1.0, 300, 30, 2, 4.5, 300, "reverse", "medium"]]
BLEND_C = [["TIC-612", "AIC-611", "fopdt", -0.6, 350, 50], ["AIC-611", "TIC-612", "fopdt", 0.5, 280, 40]]
WRONG = [["PIC-331", "fopdt", 0.5, 60, 5, 1, 2, 60, "reverse", "high"],
         ["FIC-332", "fopdt", 0.7, 30, 2, 0.5, 1.5, 30, "reverse", "low"]]
WRONG_C = [["FIC-332", "PIC-331", "fopdt", 0.8, 50, 4], ["PIC-331", "FIC-332", "fopdt", 1.0, 40, 3]]
OTHER = [["FIC-900", "fopdt", 1.0, 5, 1, 0.5, 4.0, 2, "reverse", "low"]]     # fails alone (too much gain)


def run(tmp_path, loops, couplings, propose="failing"):
    """Write a workbook and run every compute stage on it (test data)."""
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "loops"
    ws.append(HEAD)
    for r in loops:
        ws.append(r)
    if couplings is not None:
        cs = wb.create_sheet("couplings")
        cs.append(["from_tag", "to_tag", "model", "gain", "tau1_s", "dead_time_s"])
        for r in couplings:
            cs.append(r)
    p = tmp_path / "inv.xlsx"
    wb.save(p)
    audit = new_audit(read_inventory(p), AuditOptions(date="2024-01-01", propose=propose))
    run_stages(audit)
    return audit


def test_passes_alone_fails_with_group(tmp_path):
    res = run(tmp_path, BLEND + OTHER, BLEND_C).results.set_index("tag")
    a = res.loc["AIC-611"]
    assert a.status_alone == "passes" and a.status == "fails"
    assert a.findings.startswith("passes alone, fails with its group G1 closed: Ms")
    assert a.ms < 2.0 < a.ms_in_group
    assert a.rga_ss == pytest.approx(0.75, abs=1e-12)            # closed form: 1/(1 - (-0.6)(0.5)/(0.9 x 1.0))
    assert a.group_niederlinski == pytest.approx(1 / 0.75, abs=1e-12)
    assert bool(a.group_stable) and a.group_rhp_closed == 0
    assert res.loc["FIC-900"].group_id == "" and pd.isna(res.loc["FIC-900"].group_stable)
    # the proposal for AIC-611 keeps the group within its limits (F = 1)
    assert a.group_detuning == 1.0 and a.group_proposal_ms <= 2.0


def test_unstable_group_and_work_list(tmp_path):
    audit = run(tmp_path, OTHER + WRONG, WRONG_C)
    res = audit.results.set_index("tag")
    for t in ("PIC-331", "FIC-332"):
        r = res.loc[t]
        assert r.status_alone == "passes" and r.status == "unstable"
        assert "group G1 (PIC-331, FIC-332) is unstable" in r.findings
        assert "negative steady-state relative gain" in r.group_note and "Niederlinski" in r.group_note
        assert "no detuning with integral action can help" in r.group_proposal_note
        assert math.isnan(r.group_detuning)
        assert r.verdict == "not achievable by tuning" and r.action == "structural change"
    # the group's loops share a score and stand together, above the failing single loop
    assert res.loc["PIC-331"].priority_score == res.loc["FIC-332"].priority_score
    assert sorted([res.loc["PIC-331"]["rank"], res.loc["FIC-332"]["rank"]]) == [1, 2]
    assert res.loc["FIC-900"]["rank"] == 3
    assert [g.group.gid for g in audit.extras["groups"]] == ["G1"]


def test_bad_couplings_leave_single_loop_results_intact(tmp_path):
    """Whatever the couplings hold, the single-loop figures and statuses are those of a run without them."""
    base = run(tmp_path, BLEND + OTHER, None, propose="none").results
    bad = run(tmp_path, BLEND + OTHER, [["AIC-611", "NOPE", "fopdt", 0.3, 10, 1], ["AIC-611", "AIC-611", "fopdt", 1, 1, 1],
                                        ["TIC-612", "AIC-611", "fopdt", "x", 10, 1]], propose="none").results
    cols = ["tag", "status", "findings", "stable", "ms", "gm", "pm_deg", "wc_rad_s"]
    pd.testing.assert_frame_equal(base[cols], bad[cols])
    assert (bad["group_id"] == "").all()


def test_proposals_detuned_when_they_break_the_group(tmp_path):
    """Both blend loops far too aggressive alone, and stronger couplings (relative gain 0.4, which raises
    each loop's effective gain 2.5 times): the single-loop proposals, closed together, break the group and are
    detuned by a common factor F > 1 until the group is stable with L_cm max <= 4 dB (Luyben 1986)."""
    loops = [r[:6] + [r[6] * 3] + r[7:] for r in BLEND]
    strong = [["TIC-612", "AIC-611", "fopdt", -1.2, 350, 20], ["AIC-611", "TIC-612", "fopdt", 1.125, 280, 20]]
    audit = run(tmp_path, loops, strong, propose="all")
    res = audit.results.set_index("tag")
    gp = audit.extras["group_proposals"]["G1"]
    assert max(gp.ms_in_group) > 2.0
    assert gp.factor > 1.0 and gp.reached and gp.lcm_db <= 4.0 + 1e-6
    assert max(gp.detuned_ms) < max(gp.ms_in_group)
    for t in ("AIC-611", "TIC-612"):
        assert res.loc[t].group_detuning == pytest.approx(gp.factor)
        assert "Kc" in res.loc[t].group_proposal_settings and "detuned together" in res.loc[t].group_proposal_note
