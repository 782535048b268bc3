"""Unit tests of audit.cascade: links, errors by cell, composition, pair checks, tuning order.

Rows are built directly (LoopRow), test data only. Unless a test says 'validation',
these are regression and logic checks; the python-control and Pade validations of the
composed figures are in tests/reference/test_cascade_reference.py.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import pytest

from audit import pipeline
from audit.cascade import (MAX_LEVELS, CascadeLinks, add_cascade_checks, check_pair, compose, link_cascades, tuning_levels,
                           tuning_order, validate_cascades)
from audit.frequency import evaluate
from audit.loop import model_from_row
from audit.policy import Policy
from audit.rows import Inventory, LoopRow, Problem


def row(i: int, tag: str, inner: str | None = None, mode: str = "inner_pv", **kw) -> LoopRow:
    """A valid fopdt/PI row at sheet row i + 2 (test data)."""
    base = dict(model="fopdt", gain=1.0, tau1=10.0, dead_time=1.0, kc=2.0, ti=10.0)
    base.update(kw)
    return LoopRow(index=i, sheet="loops", excel_row=i + 2, tag=tag, inner_loop=inner, outer_model_input=mode, **base)


def flow(i: int, tag: str = "FIC-101", **kw) -> LoopRow:
    """A fast inner flow loop (test data)."""
    base = dict(gain=1.0, tau1=2.0, dead_time=0.2, kc=1.0, ti=2.0)
    base.update(kw)
    return row(i, tag, **base)


def temp(i: int, inner: str | None = "FIC-101", tag: str = "TIC-201", mode: str = "inner_pv", **kw) -> LoopRow:
    """A slow outer temperature loop (test data)."""
    base = dict(gain=1.5, tau1=120.0, dead_time=10.0, kc=2.0, ti=120.0)
    base.update(kw)
    return row(i, tag, inner, mode, **base)


@dataclass
class _Inv:
    """An inventory with the column letters a reader may provide."""

    rows: tuple
    policy: Policy = field(default_factory=Policy)
    column_letters: dict = field(default_factory=dict)


def run(rows, policy: Policy | None = None, letters: dict | None = None) -> pipeline.Audit:
    """models -> evaluate -> cascade stages on directly built rows."""
    inv = Inventory(path="x.xlsx", name="x.xlsx", sha256="0", rows=tuple(rows), policy=policy or Policy())
    audit = pipeline.new_audit(inv, pipeline.AuditOptions(date="2024-01-01"))
    if letters is not None:
        object.__setattr__(audit, "inventory", _Inv(tuple(rows), policy or Policy(), letters))
    pipeline.build_models(audit)
    pipeline.evaluate_frequency(audit)
    add_cascade_checks(audit)
    return audit


# ----------------------------------------------------------------------------------------------
# Errors by cell


def test_unknown_tag_is_an_error_at_the_inner_loop_cell():
    rows = [flow(0), temp(1, inner="FIC-999")]
    errs = validate_cascades(rows, letter="AK")
    assert list(errs) == [1]
    (p,) = errs[1]
    assert (p.sheet, p.cell, p.column, p.severity) == ("loops", "AK3", "inner_loop", "error")
    assert "FIC-999" in p.message and "not the tag" in p.message


def test_tags_match_ignoring_case_and_spaces():
    rows = [flow(0), temp(1, inner="  fic-101 ")]
    assert validate_cascades(rows, letter="B") == {}
    assert link_cascades(rows).inner_of == {1: 0}


def test_cell_without_column_letter_names_the_row():
    errs = validate_cascades([temp(0, inner="NOPE")])
    assert errs[0][0].cell == "2" and str(errs[0][0]).startswith("loops!2 (inner_loop)")


def test_column_letter_taken_from_a_problem_the_reader_located():
    warn = Problem("loops", "Q7", "inner_loop", "some warning", "warning")
    rows = [flow(0), temp(1, inner="NOPE"), row(5, "X", warnings=(warn,))]
    assert validate_cascades(rows)[1][0].cell == "Q3"


def test_cycle_marks_every_row_on_it():
    rows = [row(0, "A", "B"), row(1, "B", "C"), row(2, "C", "A"), row(3, "D", "A"), row(4, "E")]
    errs = validate_cascades(rows, letter="Z")
    for i in (0, 1, 2):
        assert "cascade cycle A -> B -> C -> A" in errs[i][0].message
    assert [p.cell for p in errs[0]] == ["Z2"]
    # D hangs on the cycle: it shares A with C, so both have the two-outer-loops error as well
    assert [p.message for p in errs[3]] == ["inner loop 'A' is also claimed by C (row 4); an inner loop's "
                                            "set-point has one source"]
    assert len(errs[2]) == 2 and "also claimed by D (row 5)" in errs[2][1].message
    assert 4 not in errs


def test_two_row_cycle_and_self_reference():
    errs = validate_cascades([row(0, "A", "B"), row(1, "B", "A"), row(2, "S", "S")])
    assert set(errs) == {0, 1, 2}
    assert "S -> S" in errs[2][0].message


def test_self_reference_already_reported_by_the_reader_is_not_repeated():
    own = Problem("loops", "K4", "inner_loop", "a loop cannot be its own inner loop")
    errs = validate_cascades([row(2, "S", "S", errors=(own,))])
    assert 0 not in errs


def test_inner_loop_claimed_by_two_outer_loops_marks_both_outer_rows():
    rows = [flow(0), temp(1), temp(2, tag="TIC-202", mode="inner_sp"), temp(3, inner=None, tag="TIC-203")]
    errs = validate_cascades(rows, letter="C")
    assert set(errs) == {1, 2}
    assert "also claimed by TIC-202 (row 4)" in errs[1][0].message
    assert "also claimed by TIC-201 (row 3)" in errs[2][0].message
    assert errs[2][0].cell == "C4"


def test_invalid_inner_row_makes_inner_pv_outer_invalid_but_not_inner_sp():
    bad = flow(0, errors=(Problem("loops", "F2", "gain", "must be a number"),))
    errs = validate_cascades([bad, temp(1)], letter="C")
    assert "FIC-101 (row 2) is invalid (it has errors of its own)" in errs[1][0].message
    assert "loops!2" in errs[1][0].message
    assert validate_cascades([bad, temp(1, mode="inner_sp")]) == {}


def test_an_error_deep_in_a_chain_invalidates_every_inner_pv_level_above_it():
    rows = [row(0, "X", "Y"), row(1, "Y", "NOPE"), row(2, "W", "X", mode="inner_sp")]
    errs = validate_cascades(rows, letter="D")
    assert "'NOPE' is not the tag" in errs[1][0].message
    assert "inner loop Y (row 3) is invalid (it has cascade errors)" in errs[0][0].message
    assert 2 not in errs            # inner_sp: its model already contains X


def test_chain_deeper_than_the_limit_is_refused_at_its_upper_rows():
    n = MAX_LEVELS + 3
    rows = [row(i, f"L{i}", f"L{i + 1}" if i + 1 < n else None) for i in range(n)]
    errs = validate_cascades(rows)
    assert sorted(errs) == [0, 1, 2]
    assert f"cascade of {n} levels" in errs[0][0].message and f"at most {MAX_LEVELS}" in errs[0][0].message
    audit = run(rows)
    assert [m is None for m in audit.models] == [True] * 3 + [False] * MAX_LEVELS
    assert audit.models[3].inner.inner is audit.models[5]


def test_very_long_chains_need_no_recursion():
    n = 3000
    rows = [row(i, f"L{i}", f"L{i + 1}" if i + 1 < n else None, mode="inner_sp") for i in range(n)]
    assert len(validate_cascades(rows)) == n - MAX_LEVELS
    assert tuning_order(rows) == list(range(n - 1, -1, -1))
    assert len(tuning_levels(rows)) == n


def test_ambiguous_inner_tag():
    rows = [flow(0), flow(1), temp(2)]
    errs = validate_cascades(rows)
    assert "ambiguous" in errs[2][0].message and "rows 2, 3" in errs[2][0].message


@pytest.mark.parametrize("kind", ["fopdt", "sopdt", "ipdt", "tf"])
def test_inner_model_type_never_blocks_a_composition(kind):
    """T_inner is dimensionless for every model type (rule 4 of the module docstring)."""
    kw = {"fopdt": {}, "sopdt": dict(model="sopdt", tau2=0.5),
          "ipdt": dict(model="ipdt", gain=0.5, tau1=None),
          "tf": dict(model="tf", gain=None, tau1=None, num=(2.0,), den=(1.0, 3.0, 1.0))}[kind]
    audit = run([flow(0, **kw), temp(1)])
    assert audit.models[1] is not None and audit.models[1].inner is audit.models[0]


# ----------------------------------------------------------------------------------------------
# Models and the pipeline


def test_errors_make_rows_invalid_with_the_message_naming_the_cell():
    rows = [flow(0), temp(1, inner="FIC-999"), row(2, "A", "B"), row(3, "B", "A"), temp(4, tag="TIC-300")]
    audit = run(rows, letters={"inner_loop": "AC"})
    res = audit.results
    assert [m is None for m in audit.models] == [False, True, True, True, False]
    assert list(res["status"])[:4] == ["passes", "invalid", "invalid", "invalid"]
    assert res.at[1, "message"].startswith("loops!AC3 (inner_loop): inner loop 'FIC-999'")
    assert "loops!AC4 (inner_loop): cascade cycle" in res.at[2, "message"]
    # building again does not repeat the message
    pipeline.build_models(audit)
    assert res.at[1, "message"].count("FIC-999") == 1
    assert isinstance(audit.extras["cascade"], CascadeLinks)


def test_existing_messages_are_kept_and_extended():
    bad = flow(0, errors=(Problem("loops", "F2", "gain", "must be a number"),))
    audit = run([bad, temp(1)])
    assert audit.results.at[0, "message"] == "loops!F2 (gain): must be a number"
    assert audit.results.at[1, "status"] == "invalid"
    assert "inner loop FIC-101 (row 2) is invalid" in audit.results.at[1, "message"]


def test_inner_pv_composes_the_inner_model_exactly():
    """L_outer = sign C P F e^{-jw theta} * L_i/(F_i (1 + L_i)) (closed form)."""
    audit = run([flow(0, pv_filter=0.5), temp(1, pv_filter=2.0, sample=1.0)])
    outer, inner = audit.models[1], audit.models[0]
    assert outer.inner is inner
    w = np.logspace(-4, 1, 50)
    own = model_from_row(audit.inventory.rows[1]).L(w)
    Li = inner.L(w)
    Ti = Li * (1 + 0.5j * w) / (1 + Li)
    assert np.allclose(outer.L(w), own * Ti, rtol=1e-12)


def test_inner_sp_gives_the_single_loop_figures_unchanged():
    """With inner_sp the outer row's figures equal those of the same row without inner_loop."""
    alone = run([flow(0), temp(1, inner=None)]).results
    sp = run([flow(0), temp(1, mode="inner_sp")]).results
    assert run([flow(0), temp(1, mode="inner_sp")]).models[1].inner is None
    for c in ("stable", "gm", "gm_db", "pm_deg", "wc_rad_s", "dm_s", "ms", "mt", "wb_rad_s", "w_ms_rad_s"):
        assert sp.at[1, c] == alone.at[1, c], c
    pv = run([flow(0), temp(1)]).results
    assert pv.at[1, "pm_deg"] != alone.at[1, "pm_deg"]


def test_three_level_chain():
    """A composition -> temperature -> flow chain: each level composed with the one inside."""
    rows = [row(0, "AIC-1", "TIC-1", gain=0.8, tau1=900.0, dead_time=60.0, kc=1.0, ti=900.0),
            row(1, "TIC-1", "FIC-1", gain=1.5, tau1=120.0, dead_time=10.0, kc=2.0, ti=120.0),
            row(2, "FIC-1", gain=1.0, tau1=2.0, dead_time=0.2, kc=1.0, ti=2.0)]
    audit = run(rows)
    m = audit.models
    assert m[0].inner is m[1] and m[1].inner is m[2] and m[2].inner is None
    w = np.logspace(-5, 0, 40)
    t2 = m[2].L(w) / (1 + m[2].L(w))
    l1 = model_from_row(rows[1]).L(w) * t2
    t1 = l1 / (1 + l1)
    assert np.allclose(m[0].L(w), model_from_row(rows[0]).L(w) * t1, rtol=1e-12)
    res = audit.results
    assert list(res["status"]) == ["passes", "passes", "passes"]
    assert res.at[0, "cascade_basis"] == "wb" and res.at[1, "cascade_basis"] == "wb"
    assert res.at[0, "cascade_ratio"] == pytest.approx(res.at[1, "wb_rad_s"] / res.at[0, "wb_rad_s"])
    assert res.at[1, "cascade_ratio"] == pytest.approx(res.at[2, "wb_rad_s"] / res.at[1, "wb_rad_s"])
    assert bool(res.at[0, "cascade_ok"]) and pd.isna(res.at[2, "cascade_ok"])
    assert list(res["inner_loop"]) == ["TIC-1", "FIC-1", ""]
    assert tuning_order(rows) == [2, 1, 0]


# ----------------------------------------------------------------------------------------------
# Pair checks


def test_slow_inner_loop_fails_the_cascade_ratio():
    slow = flow(0, tau1=60.0, dead_time=5.0, kc=0.5, ti=60.0)
    audit = run([slow, temp(1)])
    res = audit.results
    r = res.at[1, "cascade_ratio"]
    assert r == pytest.approx(res.at[0, "wb_rad_s"] / res.at[1, "wb_rad_s"]) and r < 4
    assert res.at[1, "cascade_ok"] == False  # noqa: E712 (pandas boolean)
    assert res.at[1, "status"] == "fails"
    assert f"cascade bandwidth ratio {r:.3g} < 4: inner loop FIC-101 is not fast enough" in res.at[1, "findings"]
    # the minimum comes from the policy
    lax = run([slow, temp(1)], policy=Policy(cascade_ratio_min=min(r * 0.5, 1.0)))
    assert bool(lax.results.at[1, "cascade_ok"])


def test_pair_check_rules():
    ok = {"status": "passes", "stable": True, "rhp_closed": 0, "wb_rad_s": 1.0, "wc_rad_s": 2.0}
    out = {"status": "passes", "stable": True, "rhp_closed": 0, "wb_rad_s": 0.1, "wc_rad_s": 0.2}
    pc = check_pair(out, ok, "FIC", 4.0, 10.0)
    assert (pc.basis, pc.ratio, pc.ok, pc.status, pc.findings) == ("wb", 10.0, True, "passes", ())
    near = check_pair({**out, "wb_rad_s": 0.23}, ok, "FIC", 4.0, 10.0)
    assert near.ok and near.status == "marginal" and near.findings[0].startswith("cascade bandwidth ratio 4.35 near")
    # crossover frequencies when a bandwidth is blank
    pc = check_pair({**out, "wb_rad_s": np.nan}, ok, "FIC", 4.0, 10.0)
    assert (pc.basis, pc.ratio, pc.ok, pc.status) == ("wc", 10.0, True, "passes")
    none = check_pair({**out, "wb_rad_s": np.nan, "wc_rad_s": np.nan}, ok, "FIC", 4.0, 10.0)
    assert none.ok is None and "not checked" in none.findings[0]
    # an unstable inner loop: conditional, ratio not checked, outer at best fails
    un = check_pair(out, {**ok, "status": "unstable", "stable": False, "rhp_closed": 1}, "FIC", 4.0, 10.0)
    assert un.status == "fails" and un.ok is None and np.isnan(un.ratio)
    assert un.findings[0].startswith("conditional: inner loop FIC is unstable on its own (1 closed-loop pole")
    assert check_pair({**out, "status": "unstable"}, {**ok, "status": "unstable"}, "FIC", 4, 10).status == "unstable"
    # a failing inner loop is a condition, not a change of status
    fa = check_pair(out, {**ok, "status": "fails"}, "FIC", 4.0, 10.0)
    assert fa.status == "passes" and fa.ok and fa.findings == ("conditional: inner loop FIC fails its own limits",)
    # invalid rows
    assert check_pair({**out, "status": "invalid"}, ok, "FIC", 4, 10).findings == ()
    iv = check_pair(out, {**ok, "status": "invalid"}, "FIC", 4.0, 10.0)
    assert iv.status == "passes" and "could not be evaluated" in iv.findings[0]


def test_unstable_inner_loop_makes_the_outer_result_conditional():
    """Inner P loop on an unstable process with kc*K < 1 keeps one RHP pole (closed form:
    1 + kc K/(tau s - 1) = 0 at s = (1 - kc K)/tau > 0)."""
    unstable = flow(0, model="tf", gain=None, tau1=None, num=(1.0,), den=(5.0, -1.0), dead_time=0.0,
                    kc=0.5, ti=None)
    audit = run([unstable, temp(1)])
    res = audit.results
    assert res.at[0, "status"] == "unstable" and int(res.at[0, "rhp_closed"]) == 1
    assert int(res.at[1, "rhp_open"]) == 1          # the inner closed-loop pole is an open-loop pole of the outer
    assert res.at[1, "status"] in ("fails", "unstable")
    assert "conditional: inner loop FIC-101 is unstable on its own" in res.at[1, "findings"]


def test_inner_sp_with_invalid_inner_row_is_evaluated_and_conditional():
    bad = flow(0, errors=(Problem("loops", "F2", "gain", "must be a number"),))
    res = run([bad, temp(1, mode="inner_sp")]).results
    assert res.at[1, "status"] in ("passes", "marginal", "fails")
    assert "conditional: inner loop FIC-101 could not be evaluated" in res.at[1, "findings"]


def test_rows_outside_cascades_get_blank_cascade_columns():
    res = run([flow(0), temp(1, inner=None)]).results
    assert list(res["inner_loop"]) == ["", ""] and res["cascade_ratio"].isna().all()
    assert res["cascade_ok"].isna().all() and list(res["cascade_basis"]) == ["", ""]


# ----------------------------------------------------------------------------------------------
# Tuning order and composition helper


def test_tuning_order_puts_inner_loops_first_and_keeps_every_row():
    rows = [row(0, "OUT", "MID"), row(1, "X"), row(2, "MID", "IN"), row(3, "IN"), row(4, "A", "B"),
            row(5, "B", "A"), row(6, "Y", "NOPE")]
    order = tuning_order(rows)
    assert sorted(order) == list(range(7))
    assert order.index(3) < order.index(2) < order.index(0)
    assert order == [3, 2, 0, 1, 5, 4, 6]
    assert tuning_levels(rows) == [[1, 3, 4, 5, 6], [2], [0]]
    # the links the cascade stage keeps (with the column letter, which names cells only) give the same levels
    assert tuning_levels(rows, link_cascades(rows, "K")) == [[1, 3, 4, 5, 6], [2], [0]]


def test_compose_with_a_proposed_inner_loop():
    audit = run([flow(0), temp(1)])
    outer, inner = audit.models[1], audit.models[0]
    faster = inner.with_controller(type(inner.controller)("ideal", kc=3.0, ti=2.0))
    re = compose(outer, faster)
    assert re.inner is faster and re.controller == outer.controller
    w = np.array([0.01, 0.05])
    assert np.allclose(re.L(w), model_from_row(audit.inventory.rows[1]).L(w) * faster.T_sp(w))
    assert evaluate([re]).iloc[0]["stable"]
