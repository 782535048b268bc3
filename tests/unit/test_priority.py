"""Unit tests of audit.priority: severity classes, score and the deterministic work list (regression of
the documented score formula; no outside source applies)."""

from __future__ import annotations

import math

import pandas as pd

from audit.policy import Policy
from audit.priority import SEVERITY_POINTS, priority_of, severity, work_list

POLICY = Policy()


def _rec(tag, status, crit="medium", row=2, **kw):
    base = dict(tag=tag, row=row, status=status, criticality=crit, ms=1.5, gm_db=10.0, pm_deg=50.0, gm_low=math.nan,
                ms_max=2.0, gm_min_db=6.0, pm_min_deg=30.0, band_s_db=math.nan, findings="", verdict="",
                proposal_ms=math.nan, proposal_band_s_db=math.nan)
    base.update(kw)
    return base


def _table(recs):
    return pd.DataFrame.from_records(recs)


def test_unstable_high_criticality_above_every_passing_loop():
    recs = [_rec("P-1", "passes", "high", 2), _rec("P-2", "passes", "low", 3),
            _rec("U-1", "unstable", "high", 4, ms=8.0, verdict="retune", proposal_ms=1.6),
            _rec("M-1", "marginal", "high", 5, ms=1.9, verdict="retune", proposal_ms=1.5)]
    wl = work_list(_table(recs), POLICY)
    assert wl.loc[2, "rank"] == 1
    assert pd.isna(wl.loc[0, "rank"]) and pd.isna(wl.loc[1, "rank"])
    assert wl.loc[2, "priority_score"] > wl.loc[0, "priority_score"]
    assert wl.loc[2, "action"] == "retune" and wl.loc[2, "expected_improvement"] == "unstable -> Ms 1.6"


def test_unstable_loop_improvement_quotes_the_proposal_alone():
    """An unstable closed loop has no meaningful Ms or |S| (common practice: the peaks of the frequency
    response describe a steady state that does not exist), so only the proposal's figures are quoted."""
    recs = [_rec("U-1", "unstable", "high", 2, ms=1.04, band_s_db=-48.1, verdict="retune", proposal_ms=1.46,
                 proposal_band_s_db=-16.4, load_iae_s=3.0, proposal_iae_s=2.0)]
    text = work_list(_table(recs), POLICY).loc[0, "expected_improvement"]
    assert text == "unstable -> Ms 1.46; band |S| -16.4 dB"
    assert "1.04" not in text and "-48.1" not in text and "IAE" not in text


def test_classes_order_with_default_weights():
    """unstable > invalid ('fix the inventory') > fails robustness > misses requirement > marginal."""
    recs = [
        _rec("A", "marginal", "high", 2, ms=1.9, verdict="retune", proposal_ms=1.2, band_s_db=-5, proposal_band_s_db=-30),
        _rec("B", "fails", "low", 3, band_s_db=-3, findings="|S| in band -3 dB > -10 dB required", verdict="retune",
             proposal_ms=1.6, proposal_band_s_db=-12),
        _rec("C", "fails", "low", 4, ms=2.5, findings="Ms 2.5 > 2", verdict="retune", proposal_ms=1.6),
        _rec("D", "invalid", "low", 5),
        _rec("E", "unstable", "low", 6, verdict="retune", proposal_ms=1.7),
        _rec("F", "invalid", "high", 7),
    ]
    wl = work_list(_table(recs), POLICY)
    order = [recs[i]["tag"] for i in wl["rank"].astype(int).sort_values().index]
    assert order == ["E", "F", "D", "C", "B", "A"]
    assert wl.loc[3, "action"] == "fix the inventory row"
    assert severity(recs[1]) == "misses requirement" and severity(recs[2]) == "fails robustness"


def test_not_achievable_is_a_structural_change_and_check_model_names_the_model():
    a = priority_of(_rec("X", "fails", verdict="not achievable by tuning", proposal_ms=1.9, band_s_db=0,
                         proposal_band_s_db=-2, findings="|S| in band 0 dB > -20 dB required"), POLICY)
    b = priority_of(_rec("Y", "unstable", verdict="check model", proposal_ms=1.9), POLICY)
    assert a.action == "structural change"
    assert b.action == "check the model or the valve"


def test_benefit_raises_the_score_within_a_class():
    lo = priority_of(_rec("X", "fails", ms=2.2, verdict="retune", proposal_ms=2.1), POLICY)
    hi = priority_of(_rec("X", "fails", ms=2.2, verdict="retune", proposal_ms=1.3), POLICY)
    assert hi.score > lo.score
    assert lo.score >= SEVERITY_POINTS["fails robustness"]


def test_work_list_is_deterministic_ties_by_tag_then_row():
    recs = [_rec(t, "fails", "medium", r, ms=2.5, verdict="retune", proposal_ms=1.5)
            for t, r in (("B", 9), ("A", 8), ("A", 3), ("C", 2))]
    t1 = _table(recs)
    wl1 = work_list(t1, POLICY)
    t2 = t1.iloc[::-1].reset_index(drop=True)
    wl2 = work_list(t2, POLICY)
    key1 = sorted(zip(wl1["rank"].astype(int), t1["tag"], t1["row"]))
    key2 = sorted(zip(wl2["rank"].astype(int), t2["tag"], t2["row"]))
    assert key1 == key2 == [(1, "A", 3), (2, "A", 8), (3, "B", 9), (4, "C", 2)]
