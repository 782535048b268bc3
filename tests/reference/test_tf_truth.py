"""Validation of the engine on general transfer functions (``tf`` loops): every class of error once
found there, each checked against an outside source named in its docstring (python-control's margin
tests and closed-loop poles, closed forms), and a seeded random set of tf loops against an independent
evaluation (tests/reference/independent.py: a very dense grid with refinement, scipy's root and
maximum searches, python-control poles where there is no delay).
"""

from __future__ import annotations

import math
import warnings

import control
import numpy as np
import pytest
from scipy.optimize import brentq, minimize_scalar

import audit.frequency as fq
from audit.frequency import evaluate
from audit.loop import Controller, LoopModel, make_process

from .independent import disagreements, evaluate_independent
from .loops_random import random_tf_loops


def tf_loop(num, den, theta: float = 0.0, kp: float = 1.0, ki: float = 0.0) -> LoopModel:
    """L = (kp + ki/s) num/den e^{-theta s}."""
    return LoopModel("t", make_process("tf", num=num, den=den, dead_time=theta), Controller("parallel", kp=kp, ki=ki))


def closed_loop_poles(m: LoopModel) -> np.ndarray:
    """Poles of the delay-free closed loop by python-control (feedback(L, 1))."""
    r = m.rational
    return control.feedback(control.tf(list(r.num), list(r.den)), 1).poles()


def dense_peak(m: LoopModel, fun, centres) -> float:
    """sup of fun(L(jw)) by a dense grid around each centre, refined by scipy's bounded search (common practice)."""
    best = 0.0
    for c in centres:
        w = c * (1.0 + np.linspace(-0.05, 0.05, 400_001))
        v = fun(m.L(w))
        i = int(np.argmax(v))
        r = minimize_scalar(lambda x: -fun(m.L(np.array([x])))[0], bounds=(w[max(i - 1, 0)], w[min(i + 1, w.size - 1)]),
                            method="bounded", options={"xatol": 1e-14 * c})
        best = max(best, float(v[i]), -float(r.fun))
    return best


def S_abs(L):
    return 1.0 / np.abs(1.0 + L)


def T_abs(L):
    return np.abs(L) / np.abs(1.0 + L)


# ---------------------------------------------------------------------------------- python-control's cases

@pytest.mark.parametrize("num,den,gm,w180,pm,wc", [
    # 0.01 (10 - s)/((2 + s)(1 + s)): the phase crossover lies where |L| = 1/300, no gain crossover
    ([-0.01, 0.1], [1.0, 3.0, 2.0], 300.0, math.sqrt(32.0), math.inf, math.nan),
    # 2 s/(s + 1), biproper: gain crossover at 1/sqrt(3), PM -120 deg
    ([2.0, 0.0], [1.0, 1.0], math.inf, math.nan, -120.0, 1.0 / math.sqrt(3.0)),
])
def test_python_control_margin_cases(num, den, gm, w180, pm, wc):
    """python-control's margin tests (control/tests/margin_test.py, python-control 0.10): 0.01(10 - s)/((2 + s)
    (1 + s)) has GM 300 at 5.657 rad/s; 2s/(s + 1) has PM -120 deg at 0.577 rad/s. The same numbers from
    control.stability_margins here, and the engine agrees to 1e-9; stability as python-control's closed-loop poles."""
    m = tf_loop(num, den)
    f = evaluate([m]).iloc[0]
    ref = control.stability_margins(control.tf(num, den))
    assert ref[0] == pytest.approx(gm, rel=1e-9) or (math.isinf(gm) and math.isinf(ref[0]))
    assert ref[1] == pytest.approx(pm, rel=1e-9) or (math.isinf(pm) and math.isinf(ref[1]))
    for col, val in (("gm", gm), ("w180_rad_s", w180), ("pm_deg", pm), ("wc_rad_s", wc)):
        if math.isnan(val):
            assert math.isnan(f[col])
        elif math.isinf(val):
            assert f[col] == val
        else:
            assert f[col] == pytest.approx(val, rel=1e-9), col
    assert bool(f["stable"]) == bool(np.all(closed_loop_poles(m).real < 0))


# ---------------------------------------------------------------------------------- class 1 and 2: resonances

@pytest.mark.parametrize("zeta,wr", [(1e-3, 37.3), (1e-3, 23.9), (1e-4, 37.3), (1e-4, 23.9), (1e-6, 5.0)])
@pytest.mark.parametrize("k", [0.05, 0.012, 0.003])
def test_lightly_damped_resonance_is_not_stepped_over(zeta, wr, k):
    """Closed-loop poles by python-control: P = 1/((s + 1)((s/wr)^2 + 2 zeta s/wr + 1)) under PI control
    k (1 + 1/s) has a resonance far above the crossover, where |L| is otherwise below 0.01 and the peak
    a few hundredths of a percent wide; with the higher gains its peak encircles -1 (unstable; an earlier
    engine called three of these stable), with the lower it sets Ms, Mt and the gain margin. The engine
    agrees on stability and the count of right half-plane poles; its Ms and Mt are never below a dense
    grid's around the resonance (refined by scipy) and equal the independent evaluation's to 1e-6; the
    gain margin equals python-control's stability_margins to 1e-6."""
    den = np.polymul([1.0, 1.0], [1.0 / wr**2, 2 * zeta / wr, 1.0])
    m = tf_loop([1.0], den, kp=k, ki=k)
    f = evaluate([m]).iloc[0]
    poles = closed_loop_poles(m)
    assert bool(f["stable"]) == bool(np.all(poles.real < 0))
    assert f["rhp_closed"] == int(np.sum(poles.real > 0))
    t = evaluate_independent(m)
    ms = max(dense_peak(m, S_abs, [wr]), 1.0)     # (limits: |S| -> 1 as w -> inf, |T| -> 1 as w -> 0)
    mt = max(dense_peak(m, T_abs, [wr]), 1.0)
    assert f["ms"] >= ms * (1 - 1e-9) and f["mt"] >= mt * (1 - 1e-9)
    assert f["ms"] == pytest.approx(t.ms, rel=1e-6)
    assert f["mt"] == pytest.approx(t.mt, rel=1e-6)
    if f["stable"]:
        gm_ref = control.stability_margins(control.tf(list(m.rational.num), list(m.rational.den)))[0]
        assert f["gm"] == pytest.approx(gm_ref, rel=1e-6)


def test_narrow_pair_of_gain_crossovers():
    """Closed form: L = k/(s (s^2 + 2 zeta s + 1)) with zeta = 1e-3 and k = 0.01: |L| rises above 1 only in a
    band of relative width about 2e-3 around w = 1 (|L(j1)| = k/(2 zeta) = 5), so the two gain crossovers
    lie there; python-control's stability_margins (exact polynomial roots) gives the same PM to 1e-6, and
    the delay margin is the smaller PM/wc of the two (the engine's dm_s)."""
    m = tf_loop([0.01], [1.0, 2e-3, 1.0, 0.0])
    f = evaluate([m]).iloc[0]
    gm, pm, sm, wpc, wgc, wms = control.stability_margins(control.tf([0.01], [1.0, 2e-3, 1.0, 0.0]), returnall=True)
    pmw = (np.asarray(pm) + 180.0) % 360.0 - 180.0
    j = int(np.argmin(np.abs(pmw)))
    assert abs(f["wc_rad_s"] - 1.0) < 5e-3
    assert f["pm_deg"] == pytest.approx(pmw[j], rel=1e-6)
    dm = np.min(np.radians(np.mod(pm, 360.0)) / wgc)
    assert f["dm_s"] == pytest.approx(dm, rel=1e-6)


def test_figures_are_consistent_with_each_other():
    """Skogestad & Postlethwaite, Multivariable Feedback Control, 2nd ed., 2005, sec. 2.4.3, eq. (2.40)-(2.43)
    (at the phase crossover L = -1/GM, so |S| = GM/(GM - 1) and |T| = 1/(GM - 1); at a gain crossover
    |1 + L| = 2 sin(PM/2)): Ms >= GM/(GM - 1), Mt >= 1/(GM - 1), Ms and Mt >= 1/(2 sin(|PM|/2)), and
    likewise for the downward margin, Mt >= 1/(1 - gm_low); on the random tf set, every loop."""
    models = random_tf_loops(400, seed=5)
    figs = evaluate(models)
    tol = 1 - 1e-7
    gm, gml = figs["gm"].to_numpy(float), figs["gm_low"].to_numpy(float)
    ms, mt, pm = figs["ms"].to_numpy(float), figs["mt"].to_numpy(float), figs["pm_deg"].to_numpy(float)
    g = np.isfinite(gm) & (gm > 1)
    assert g.sum() > 100
    assert np.all(ms[g] >= gm[g] / (gm[g] - 1) * tol)
    assert np.all(mt[g] >= 1 / (gm[g] - 1) * tol)
    p = np.isfinite(pm)
    bound = 1 / (2 * np.sin(np.radians(np.abs(pm[p])) / 2))
    assert p.sum() > 100
    assert np.all(ms[p] >= bound * tol) and np.all(mt[p] >= bound * tol)
    lo = np.isfinite(gml) & (gml > 0)
    assert lo.sum() > 20
    assert np.all(mt[lo] >= 1 / (1 - gml[lo]) * tol)


# ---------------------------------------------------------------------------------- class 4 and 5: biproper

def test_biproper_with_dead_time_gain_margin_is_the_limit():
    """Closed form (derived here): L = 0.4 (s + 1)/(s + 2) e^{-s}: |L| rises from 0.2 towards |L(inf)| = 0.4 and
    the crossings of the negative real axis go on for ever, their |L| tending to 0.4: the gain margin is the
    infimum 1/0.4 = 2.5 (at w -> inf). Consistency: the loop is stable at 2.49 times the gain and not at 2.51."""
    m = tf_loop([1.0, 1.0], [1.0, 2.0], theta=1.0, kp=0.4)
    f = evaluate([m]).iloc[0]
    assert f["stable"]
    assert f["gm"] == pytest.approx(2.5, rel=1e-12) and f["w180_rad_s"] == math.inf
    out = evaluate([tf_loop([1.0, 1.0], [1.0, 2.0], theta=1.0, kp=0.4 * k) for k in (2.49, 2.51)])
    assert list(out["stable"]) == [True, False]


def test_neutral_loop_reports_infinitely_many_poles():
    """Closed form: with dead time and |L(inf)| > 1 the closed loop is of neutral type with a chain of
    infinitely many roots in the right half-plane (Hale & Verduyn Lunel, Introduction to Functional
    Differential Equations, 1993, ch. 9): rhp_closed is blank (no finite count), the note says so."""
    m = tf_loop([2.0, 1.0], [1.0, 1.0], theta=0.5)
    f = evaluate([m]).iloc[0]
    assert not f["stable"]
    assert f["rhp_closed"] is pd_na()
    assert "infinitely many closed-loop poles in the right half-plane" in f["engine_note"]
    # 1 + 2 e^{-0.5 s} (s + 1/2)/(s + 1) = 0 has roots with Re s > 0 at every large |Im s|: one of them,
    # refined from the asymptote e^{-0.5 s} = -1/2 (s = 2 ln 2 + j (2k + 1) 2 pi), is found by Newton
    g = lambda s: (s + 1) + (2 * s + 1) * np.exp(-0.5 * s)           # noqa: E731
    dg = lambda s: 1 + (2 - 0.5 * (2 * s + 1)) * np.exp(-0.5 * s)    # noqa: E731
    for k in (10, 100):
        s = 2 * math.log(2) + 1j * (2 * k + 1) * 2 * math.pi
        for _ in range(50):
            s = s - g(s) / dg(s)
        assert abs(g(s)) < 1e-9 and s.real > 1.0


def pd_na():
    import pandas as pd

    return pd.NA


# ---------------------------------------------------------------------------------- class 6: bounds

def test_capped_peak_search_says_bound(monkeypatch):
    """Common practice (a grid can only under-estimate a supremum): with the cap on pieces forced down to
    one, every Ms and Mt of the random tf set is either the dense-grid value (to 1e-6) or flagged in
    ``lower_bounds`` and not above it."""
    models = random_tf_loops(60, seed=9)
    monkeypatch.setattr(fq, "BNB_PIECES", 1)
    figs = evaluate(models)
    flagged = 0
    for m, (_, f) in zip(models, figs.iterrows()):
        t = evaluate_independent(m)
        for col in ("ms", "mt"):
            ref = getattr(t, col)
            if col in str(f["lower_bounds"]).split():
                flagged += 1
                assert f[col] <= ref * (1 + 1e-6 + 3 * t.tail_level)    # (beyond the truth's tail: see independent.py)
            elif math.isfinite(ref):
                assert f[col] == pytest.approx(ref, rel=1e-4) or ref <= f[col] <= ref * (1 + 3 * t.tail_level)
    assert flagged > 0


# ---------------------------------------------------------------------------------- class 7: bandwidth

def test_narrow_first_rise_of_sensitivity():
    """Closed form: L = 100 (s^2 + 2e-4 w0 s + w0^2)/(w0^2 s) with w0 = 0.1: |L| >= 100 w/w0^2 |1 - (w/w0)^2|
    is large everywhere (|S| < 0.02) except near the almost undamped zero pair at w0, where L -> 0 and
    |S| -> 1: |S| rises through 1/sqrt(2) only there, in a band about 0.4 % wide. The bandwidth is that
    rise (scipy brentq on a dense grid)."""
    w0 = 0.1
    m = tf_loop([100.0, 100.0 * 2e-4 * w0, 100.0 * w0 * w0], [w0 * w0, 0.0])
    f = evaluate([m]).iloc[0]
    w = w0 * (1 + np.linspace(-0.01, 0.0, 200_001))
    assert np.abs(m.S(w[:1]))[0] < 0.5 and np.abs(m.S(np.array([0.9 * w0, 1.1 * w0]))).max() < 0.05
    s = np.abs(m.S(w))
    i = int(np.flatnonzero(s >= 1 / math.sqrt(2))[0])
    ref = brentq(lambda x: abs(m.S(np.array([x]))[0]) - 1 / math.sqrt(2), w[i - 1], w[i], xtol=1e-16)
    assert f["wb_rad_s"] == pytest.approx(ref, rel=1e-9)


# ---------------------------------------------------------------------------------- class 8: time domain

def test_time_domain_stage_raises_no_warnings():
    """Common practice: unstable and neutral tf loops (responses growing without bound) simulate without a
    numpy RuntimeWarning reaching the user; such loops are reported as growing."""
    from audit.timedomain import step_figures, step_traces_many

    models = random_tf_loops(48, seed=17)[36:]      # loop 42 overflowed (matmul, reduce) before the fix
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        out = step_figures(models)
        step_traces_many(models, "load")
        step_traces_many(models, "setpoint")
    assert len(out) == len(models)


# ---------------------------------------------------------------------------------- the random set

def test_random_tf_loops_against_independent_evaluation():
    """Independent evaluation (tests/reference/independent.py: dense refined grid, scipy brentq and bounded
    minimize_scalar, python-control closed-loop poles without delay, the argument principle with the exact
    delay otherwise) on seeded random tf loops: resonances with damping down to 3e-5, undamped zeros,
    biproper, delay-free, open-loop unstable, up to nine poles, with and without dead time. No stability
    verdict or count differs; no figure differs beyond 1e-4 relative, except margins of neutral loops
    (README: over the grid only)."""
    models = random_tf_loops(150, seed=31)
    figs = evaluate(models)
    truths = [evaluate_independent(m) for m in models]
    assert sum(t.stable for t in truths) > 30 and sum(not t.stable for t in truths) > 30
    assert sum(m.delay == 0 for m in models) > 50 and sum(m.delay > 0 for m in models) > 50
    bad = {c: rows for c, rows in disagreements(models, figs, truths).items() if rows}
    assert bad == {}
