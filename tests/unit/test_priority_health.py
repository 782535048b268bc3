"""Unit tests of the work-list consequences of the operating records in audit.priority (regression of the
documented rules: which action follows from which finding, and that a sticking valve is never sent to a
retune; no outside source applies)."""

from __future__ import annotations

import math
from types import SimpleNamespace

import pandas as pd
import pytest

from audit.policy import Policy
from audit.priority import (ACTION_AUTOMATIC, ACTION_SIZING, ACTION_VALVE, HEALTH_POINTS, SEVERITY_POINTS,
                            add_priority, health_issue, priority_of, work_list)

POLICY = Policy()


def _rec(tag="L-1", status="passes", **kw):
    base = dict(tag=tag, row=2, status=status, criticality="medium", ms=1.5, gm_db=10.0, pm_deg=50.0,
                gm_low=math.nan, ms_max=2.0, gm_min_db=6.0, pm_min_deg=30.0, band_s_db=math.nan, findings="",
                verdict="no change needed", proposal_ms=math.nan, proposal_band_s_db=math.nan,
                auto_pct=100.0, valve_sticking=None, op_limited_pct=0.0, oscillating=False, health_findings="")
    base.update(kw)
    return base


def test_no_health_columns_no_finding():
    assert health_issue({"status": "passes"}, POLICY) is None


@pytest.mark.parametrize("kw,issue", [
    (dict(auto_pct=20.0), "manual"),
    (dict(valve_sticking=True, oscillating=True), "sticking"),
    (dict(op_limited_pct=40.0), "saturation"),
    (dict(oscillating=True, valve_sticking=False), "oscillation"),
    (dict(auto_pct=20.0, valve_sticking=True, op_limited_pct=40.0, oscillating=True), "manual"),
    (dict(valve_sticking=True, op_limited_pct=40.0, oscillating=True), "sticking"),
    (dict(auto_pct=60.0, op_limited_pct=5.0), None),
])
def test_which_finding_decides(kw, issue):
    assert health_issue(_rec(**kw), POLICY) == issue


def test_mostly_manual_loop_goes_back_to_automatic():
    p = priority_of(_rec(auto_pct=15.0, health_findings="mostly in manual: closed 15 % of the record"), POLICY)
    assert p.action == ACTION_AUTOMATIC
    assert p.reason.startswith("mostly in manual")
    assert p.score == HEALTH_POINTS["manual"] + 30 * POLICY.weight_medium


def test_sticking_valve_never_sent_to_retune_even_when_the_model_fails():
    rec = _rec(status="fails", ms=3.0, verdict="retune", proposal_ms=1.6, valve_sticking=True, oscillating=True,
               health_findings="valve suspected sticking: stiction index 0.9; oscillating: period 30 s")
    p = priority_of(rec, POLICY)
    assert p.action == ACTION_VALVE and "retuning will not cure it" in p.action
    assert p.expected_improvement == ""
    assert p.score >= SEVERITY_POINTS["fails robustness"]


def test_saturated_output_checks_sizing():
    p = priority_of(_rec(op_limited_pct=75.0, health_findings="output at its high limit 75 % of the record"), POLICY)
    assert p.action == ACTION_SIZING


def test_oscillation_without_valve_fault_is_retuned_with_the_outside_source_said():
    rec = _rec(oscillating=True, valve_sticking=False,
               health_findings="oscillating: period 150 s; the period is far from the loop's own resonance "
                               "(21.7 s by the model): the oscillation probably enters from outside the loop")
    p = priority_of(rec, POLICY)
    assert p.action == "retune"
    assert "oscillating" in p.reason and "outside" in p.reason


def test_model_action_kept_when_the_model_already_asks_for_one():
    rec = _rec(status="unstable", ms=8.0, verdict="retune", proposal_ms=1.6, oscillating=True, valve_sticking=False,
               health_findings="oscillating: period 30 s")
    p = priority_of(rec, POLICY)
    assert p.action == "retune" and p.reason == "closed loop unstable"


def test_add_priority_replaces_the_retune_verdict_of_a_sticking_valve():
    res = pd.DataFrame.from_records([
        _rec("A", status="fails", ms=3.0, verdict="retune", proposal_ms=1.6, valve_sticking=True, oscillating=True),
        _rec("B", status="fails", ms=3.0, verdict="retune", proposal_ms=1.6, valve_sticking=False)])
    res["valve_sticking"] = pd.array([True, False], dtype="boolean")
    audit = SimpleNamespace(results=res, inventory=SimpleNamespace(policy=POLICY))
    add_priority(audit)
    assert list(res["verdict"]) == ["check the valve first", "retune"]
    assert res.at[0, "action"] == ACTION_VALVE and res.at[1, "action"] == "retune"


def test_work_list_ranks_health_findings_among_model_findings():
    recs = [_rec("P", row=2), _rec("M", row=3, auto_pct=10.0), _rec("U", row=4, status="unstable", ms=8.0,
                                                                       verdict="retune", proposal_ms=1.6)]
    wl = work_list(pd.DataFrame.from_records(recs), POLICY)
    assert pd.isna(wl.loc[0, "rank"])
    assert wl.loc[2, "rank"] == 1 and wl.loc[1, "rank"] == 2
