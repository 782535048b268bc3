"""Unit and regression tests of audit.timedomain (validation against closed forms, publications
and python-control is in tests/reference/test_time_reference.py)."""

from __future__ import annotations


import numpy as np
import pandas as pd
import pytest
from scipy.linalg import expm

from audit.loop import Controller, LoopModel, make_process
from audit.pipeline import AuditOptions, new_audit
from audit.policy import Policy
from audit.rows import Inventory, LoopRow
from audit.timedomain import (STEP_COLUMNS, add_step_results, build_batch, controller_poly, expm_batch,
                              plan_step, simulate, step_figures, step_traces)


@pytest.mark.parametrize("c", [
    Controller("ideal", kc=2.0), Controller("ideal", kc=2.0, ti=5.0), Controller("ideal", kc=2.0, td=1.0),
    Controller("ideal", kc=2.0, ti=5.0, td=1.0, alpha=0.125), Controller("series", kc=1.5, ti=4.0, td=0.5),
    Controller("series", kc=1.5, td=0.5), Controller("parallel", kp=1.0, ki=0.2, kd=0.5),
    Controller("parallel", kp=1.0, ki=0.2), Controller("parallel", kp=1.0, kd=0.3), Controller("parallel", kp=0.7),
])
def test_controller_poly_matches_controller_rational(c):
    """The fast controller polynomials equal Controller.rational (same frequency response)."""
    num, den = controller_poly(c)
    s = 1j * np.logspace(-3, 3, 25)
    np.testing.assert_allclose(np.polyval(num, s) / np.polyval(den, s), c.rational(s), rtol=1e-12)


def test_improper_controller_reported():
    m = LoopModel("x", make_process("fopdt", 1.0, 5.0, dead_time=1.0), Controller("ideal", kc=1.0, td=1.0, alpha=0.0))
    f = step_figures([m]).iloc[0]
    assert "improper" in f["step_note"] and np.isnan(f["load_peak"])


def test_expm_batch_matches_scipy():
    rng = np.random.default_rng(3)
    M = rng.normal(size=(20, 7, 7)) * rng.uniform(0.01, 40.0, size=(20, 1, 1))
    ref = np.array([expm(x) for x in M])
    err = np.abs(expm_batch(M) - ref).max(axis=(1, 2)) / np.abs(ref).max(axis=(1, 2))
    assert err.max() < 1e-10


def test_plan_whole_delays():
    p = plan_step([2.5, 0.5], 100.0, soft=[2.0], n_target=1000)
    assert 2.5 / p.h == pytest.approx(round(2.5 / p.h)) and 2.0 / p.h == pytest.approx(round(2.0 / p.h))
    assert p.n_steps <= 2000 and not p.truncated


def test_second_order_convergence():
    """Regression of the method: errors shrink as h^2 (exact discretisation, linear hold on the delay line)."""
    m = LoopModel("x", make_process("sopdt", 1.5, 8.0, 2.0, dead_time=2.0), Controller("ideal", kc=1.2, ti=8.0),
                  sample=1.0, pv_filter=0.5)
    b, _ = build_batch([m], "setpoint")
    grid = np.linspace(0.0, 60.0, 121)
    ys = []
    for h in (0.05, 0.025, 0.0125):
        r = simulate(b, np.array([h]), int(round(60 / h)))
        ys.append(np.interp(grid, np.arange(r.yp.shape[0]) * h, r.yp[:, 0, 0]))
    e1, e2 = np.abs(ys[0] - ys[2]).max(), np.abs(ys[1] - ys[2]).max()
    # with error C h^2: (h^2 - h^2/16) / (h^2/4 - h^2/16) = 5
    assert e1 < 1e-4 and e1 / e2 == pytest.approx(5.0, rel=0.2)


def test_none_and_unstable_rows():
    good = LoopModel("g", make_process("fopdt", 1.0, 10.0, dead_time=1.0), Controller("ideal", kc=1.0, ti=10.0))
    hot = LoopModel("h", make_process("fopdt", 1.0, 1.0, dead_time=5.0), Controller("ideal", kc=5.0, ti=1.0))
    f = step_figures([None, good, hot, hot], Policy(), stable=[None, True, False, None])
    assert list(f.columns) == list(STEP_COLUMNS) and len(f) == 4
    assert f.iloc[0].drop("step_note").isna().all() and f.at[0, "step_note"] == ""
    assert np.isfinite(f.at[1, "load_iae_s"]) and f.at[1, "step_note"] == ""
    assert f.at[2, "step_note"] == "closed loop unstable: no step figures" and np.isnan(f.at[2, "sp_rise_s"])
    assert "grows" in f.at[3, "step_note"] and np.isnan(f.at[3, "load_peak"])


def test_integrating_process_p_only_offset():
    """P control of K e^{-theta s}/s with a load at its input: offset 1/Kc (closed form, final value theorem)."""
    m = LoopModel("lic", make_process("ipdt", 0.02, dead_time=4.0), Controller("ideal", kc=3.0))
    f = step_figures([m]).iloc[0]
    assert f["load_offset"] == pytest.approx(1 / 3.0, rel=1e-9)
    assert f["sp_offset"] == pytest.approx(0.0, abs=1e-9)
    assert np.isfinite(f["sp_settle_s"])


def test_integrating_process_pi():
    m = LoopModel("lic", make_process("ipdt", 0.02, dead_time=4.0), Controller("ideal", kc=3.0, ti=200.0))
    f = step_figures([m]).iloc[0]
    assert f["load_offset"] == 0.0 and f["load_ie_s"] == pytest.approx(-200.0 / 3.0, rel=1e-3)
    assert f["step_note"] == ""


def test_slow_loop_gets_longer_horizon():
    """A sluggish PI loop (settling far beyond the first horizon) is rerun until it settles."""
    m = LoopModel("s", make_process("fopdt", 1.0, 10.0, dead_time=1.0), Controller("ideal", kc=0.05, ti=2.0))
    f = step_figures([m]).iloc[0]
    assert f["step_note"] == ""
    assert f["sp_settle_s"] < 0.75 * f["step_horizon_s"]


def test_cascade_depth_three_runs():
    a = LoopModel("a", make_process("fopdt", 1.0, 1.0, dead_time=0.1), Controller("ideal", kc=1.0, ti=1.0))
    b = LoopModel("b", make_process("fopdt", 1.0, 10.0, dead_time=1.0), Controller("ideal", kc=1.0, ti=10.0),
                  inner=a)
    c = LoopModel("c", make_process("fopdt", 1.0, 100.0, dead_time=7.0), Controller("ideal", kc=1.0, ti=100.0),
                  inner=b)
    f = step_figures([c, b]).iloc[0]
    assert f["sp_offset"] == 0.0 and np.isfinite(f["sp_settle_s"]) and f["load_offset"] == 0.0
    assert abs(f["load_ie_s"]) == pytest.approx(100.0, rel=1e-3)   # 1/ki of the outer loop


def test_batch_equals_single():
    """Regression: a loop's figures do not depend on the other loops of the batch."""
    ms = [LoopModel(str(k), make_process("sopdt", 1.0 + 0.1 * k, 10.0 + k, 2.0, dead_time=1.0 + 0.3 * k),
                    Controller("ideal", kc=1.0, ti=10.0 + k, td=0.5 * (k % 2)), sample=0.5 * (k % 3))
          for k in range(6)]
    together = step_figures(ms)
    for k, m in enumerate(ms):
        alone = step_figures([m]).iloc[0]
        for c in STEP_COLUMNS[:-1]:
            assert alone[c] == pytest.approx(together.at[k, c], rel=1e-9, nan_ok=True), c


def test_traces_shapes():
    m = LoopModel("x", make_process("fopdt", 1.0, 10.0, dead_time=2.0), Controller("ideal", kc=2.0, ti=10.0),
                  sample=1.0)
    tr = step_traces(m, "load")
    assert tr.t.shape == tr.y.shape == tr.u.shape and tr.t[0] == 0.0
    assert tr.u[-1] == pytest.approx(-1.0, abs=1e-3)          # the controller cancels the load
    with pytest.raises(ValueError):
        step_traces(m, "ramp")


def test_add_step_results_stage(tmp_path):
    rows = tuple(LoopRow(index=i, sheet="loops", excel_row=i + 2, tag=f"L{i}") for i in range(3))
    inv = Inventory(path=str(tmp_path / "loops.xlsx"), name="loops.xlsx", sha256="0", rows=rows, policy=Policy())
    a = new_audit(inv, AuditOptions())
    m = LoopModel("L0", make_process("fopdt", 1.0, 10.0, dead_time=2.0), Controller("ideal", kc=2.0, ti=10.0))
    a.models = [m, None, m]
    a.results["stable"] = pd.array([True, pd.NA, False], dtype="boolean")
    add_step_results(a)
    r = a.results
    assert set(STEP_COLUMNS) <= set(r.columns) and len(r) == 3
    assert np.isfinite(r.at[0, "load_iae_s"]) and np.isnan(r.at[1, "load_iae_s"]) and np.isnan(r.at[2, "sp_rise_s"])
    assert r.at[2, "step_note"] == "closed loop unstable: no step figures"


def test_load_step_figures_are_step_figures_load_columns():
    """The load-step figures simulated alone equal those of the load and set-point run (the two
    responses are simulated separately: common practice); the set-point columns are left blank."""
    from audit.timedomain import load_step_figures
    ms = [LoopModel("a", make_process("fopdt", 1.0, 10.0, dead_time=2.0), Controller("ideal", kc=1.5, ti=10.0)),
          LoopModel("b", make_process("ipdt", 0.05, dead_time=3.0), Controller("ideal", kc=2.0, ti=60.0)),
          None,
          LoopModel("c", make_process("sopdt", 2.0, 30.0, 5.0, dead_time=1.0), Controller("ideal", kc=0.8)),
          LoopModel("d", make_process("fopdt", 1.0, 10.0, dead_time=2.0), Controller("ideal", kc=1.0, td=1.0,
                                                                                      alpha=0.0))]
    both = step_figures(ms, Policy())
    load = load_step_figures(ms, Policy())
    cols = [c for c in STEP_COLUMNS if c.startswith("load_")]
    pd.testing.assert_frame_equal(load[cols], both[cols])
    assert load[[c for c in STEP_COLUMNS if c.startswith("sp_")]].isna().all().all()
    assert np.isfinite(load.at[0, "load_iae_s"]) and np.isfinite(load.at[3, "load_offset"])
    assert "improper" in load.at[4, "step_note"]
