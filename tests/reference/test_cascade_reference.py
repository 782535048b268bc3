"""Validation of composed cascades against python-control (independent library).

Every test here is validation: the exact, delay-free or exact-delay figures of the
frequency engine for an outer loop with its inner loop inside are compared with an
independent computation in python-control (rational composition with
``control.feedback``, margins from ``control.stability_margins``, peaks on a dense
grid, closed-loop poles of a state-space model with Pade delays).
"""

from __future__ import annotations

import control
import numpy as np
import pytest

from audit.frequency import evaluate
from audit.loop import Controller, LoopModel, make_process



def _tf(r) -> control.TransferFunction:
    return control.tf(list(r.num), list(r.den))


def _forward_tf(m: LoopModel) -> control.TransferFunction:
    """sign C P (no filter, no delay) of a delay-free loop."""
    return _tf(m.controller.rational * m.process.rational) * m.sign


def _filter_tf(m: LoopModel) -> control.TransferFunction:
    return control.tf([1.0], [m.pv_filter, 1.0]) if m.pv_filter else control.tf([1.0], [1.0])


def _L_tf(m: LoopModel) -> control.TransferFunction:
    """L of a delay-free loop, inner loops composed with control.feedback: T_sp = G/(1 + G F)."""
    L = _forward_tf(m) * _filter_tf(m)
    if m.inner is not None:
        Ti = control.feedback(_forward_tf(m.inner) * _inner_delay_free(m.inner), _filter_tf(m.inner))
        L = L * Ti
    return L


def _inner_delay_free(m: LoopModel) -> control.TransferFunction:
    """The inner loop's own inner composition (1 when none)."""
    if m.inner is None:
        return control.tf([1.0], [1.0])
    return control.feedback(_forward_tf(m.inner) * _inner_delay_free(m.inner), _filter_tf(m.inner))


def _cascade(kind: str) -> LoopModel:
    """Delay-free cascades (test data, not demo data)."""
    fic = LoopModel("FIC", make_process("fopdt", 2.0, 5.0), Controller("ideal", kc=3.0))   # P-only, first order
    if kind == "p_pi":
        return LoopModel("TIC", make_process("fopdt", 1.5, 40.0), Controller("ideal", kc=2.0, ti=30.0), inner=fic)
    if kind == "p_pi_filters":
        fic_f = LoopModel("FIC", make_process("fopdt", 2.0, 5.0), Controller("ideal", kc=3.0), pv_filter=0.5)
        return LoopModel("TIC", make_process("fopdt", 1.5, 40.0), Controller("ideal", kc=4.0, ti=20.0),
                         pv_filter=4.0, inner=fic_f)
    if kind == "pi_pid_direct":
        fic_pi = LoopModel("FIC", make_process("sopdt", -0.8, 6.0, 2.0), Controller("series", kc=2.5, ti=8.0),
                           sign=-1.0, pv_filter=0.3)
        return LoopModel("AIC", make_process("sopdt", 1.2, 60.0, 10.0),
                         Controller("ideal", kc=6.0, ti=50.0, td=8.0, alpha=0.1), inner=fic_pi)
    if kind == "three_level":
        fic_pi = LoopModel("FIC", make_process("fopdt", 1.0, 2.0), Controller("ideal", kc=1.5, ti=2.5))
        tic = LoopModel("TIC-IN", make_process("fopdt", 1.3, 25.0), Controller("ideal", kc=3.0, ti=25.0),
                        pv_filter=1.0, inner=fic_pi)
        return LoopModel("AIC", make_process("ipdt", 0.01, 15.0), Controller("parallel", kp=2.0, ki=0.01),
                         inner=tic)
    if kind == "unstable_inner":
        # inner P loop on an unstable process with too little gain: one closed-loop RHP pole
        fic_u = LoopModel("FIC", make_process("tf", num=[1.0], den=[10.0, -1.0]), Controller("ideal", kc=0.5))
        return LoopModel("TIC", make_process("fopdt", 4.0, 3.0), Controller("ideal", kc=2.0, ti=6.0), inner=fic_u)
    raise ValueError(kind)


def _dense_peak(L: control.TransferFunction, which: str) -> float:
    w = np.logspace(-6, 4, 400_001)
    Lw = L(1j * w)
    v = np.abs(1.0 / (1.0 + Lw)) if which == "S" else np.abs(Lw / (1.0 + Lw))
    return float(v.max())


@pytest.mark.parametrize("kind", ["p_pi", "p_pi_filters", "pi_pid_direct", "three_level", "unstable_inner"])
def test_delay_free_cascade_against_python_control(kind):
    """Composed figures agree with python-control on the rational composition to 1e-4.

    Source: python-control (``control.feedback`` for T_inner = G/(1 + G F),
    ``control.stability_margins(returnall=True)`` for all crossings, closed-loop poles of
    ``control.feedback(L, 1)``), and the maximum of |S| and |T| on a dense logarithmic grid.
    The first case is an inner P-only loop on a first-order process inside an outer PI
    loop on a first-order process (common practice: flow inside temperature).
    """
    m = _cascade(kind)
    fig = evaluate([m]).iloc[0]
    L = _L_tf(m)
    w = np.logspace(-4, 3, 2000)
    assert np.allclose(m.L(w), L(1j * w), rtol=1e-10, atol=0), "composition itself"
    gms, pms, _sms, wpcs, wgcs, _wms = control.stability_margins(L, returnall=True)
    poles = control.poles(control.feedback(L, 1))
    stable = bool(np.all(poles.real < -1e-9))
    assert bool(fig["stable"]) == stable
    assert int(fig["rhp_closed"]) == int(np.sum(poles.real > 1e-9))
    gms, wpcs = np.atleast_1d(gms), np.atleast_1d(wpcs)
    up = gms[gms > 1.0]
    if up.size:
        k = np.argmin(up)
        assert fig["gm"] == pytest.approx(up[k], rel=1e-4)
        assert fig["w180_rad_s"] == pytest.approx(wpcs[gms > 1.0][k], rel=1e-4)
    else:
        assert np.isinf(fig["gm"])
    pms, wgcs = np.atleast_1d(pms), np.atleast_1d(wgcs)
    if pms.size:
        k = np.argmin(np.abs(pms))
        assert fig["pm_deg"] == pytest.approx(pms[k], rel=1e-4)
        assert fig["wc_rad_s"] == pytest.approx(wgcs[k], rel=1e-4)
    if stable:
        assert fig["ms"] == pytest.approx(_dense_peak(L, "S"), rel=1e-4)
        assert fig["mt"] == pytest.approx(_dense_peak(L, "T"), rel=1e-4)


def test_inner_p_outer_pi_has_no_phase_crossover():
    """Closed form: the first case's L = PI * first order * first-order closed loop tends to
    -180 deg without crossing it, so the gain margin is infinite (from memory: phase of
    k(Ti s + 1)/(Ti s (t1 s + 1)(t2 s + 1)) lies in (-180, -90) deg)."""
    fig = evaluate([_cascade("p_pi")]).iloc[0]
    assert np.isinf(fig["gm"]) and bool(fig["stable"])


# --------------------------------------------------------------------------------------
# Dead times: stability against the poles of a high-order Pade model

PADE_ORDER = 14


def _pade_ss(theta: float) -> control.StateSpace:
    """e^{-theta s} as a Pade model of order PADE_ORDER (control.pade), realised for theta = 1
    and time-scaled (A/theta, B/theta) for conditioning."""
    num, den = control.pade(1.0, PADE_ORDER)
    base = control.ss(control.tf(num, den))
    return control.ss(base.A / theta, base.B / theta, base.C, base.D)


def _pade_err(theta: float, w: np.ndarray) -> float:
    num, den = control.pade(1.0, PADE_ORDER)
    x = 1j * w * theta
    return float(np.max(np.abs(np.polyval(num, x) / np.polyval(den, x) - np.exp(-x)))) if theta > 0 else 0.0


def _ss(r) -> control.StateSpace:
    return control.ss(control.tf(list(r.num), list(r.den)))


def _delay(theta: float) -> control.StateSpace:
    return _pade_ss(theta) if theta > 0 else control.ss([], [], [], [[1.0]])


def _forward_ss(m: LoopModel) -> control.StateSpace:
    """sign C P e^{-(theta + Ts/2) s} [T_inner] as a state-space model (Pade delays)."""
    g = _ss((m.controller.rational * m.process.rational).scale(m.sign)) * _delay(m.delay)
    if m.inner is not None:
        g = g * _T_ss(m.inner)
    return g


def _F_ss(m: LoopModel) -> control.StateSpace:
    return control.ss(control.tf([1.0], [m.pv_filter, 1.0])) if m.pv_filter else control.ss([], [], [], [[1.0]])


def _T_ss(m: LoopModel) -> control.StateSpace:
    return control.feedback(_forward_ss(m), _F_ss(m))


def _closed_poles(m: LoopModel) -> np.ndarray:
    return np.linalg.eigvals(control.feedback(_forward_ss(m) * _F_ss(m), 1).A)


def _random_cascade(rng: np.random.Generator) -> LoopModel:
    """An inner loop (sometimes unstable, sometimes on an unstable process) inside a slower
    outer loop; seeded test data."""
    ti_ = float(10 ** rng.uniform(-0.3, 1.0))
    thi = float(10 ** rng.uniform(-1.5, -0.3)) * ti_
    Ki = float(10 ** rng.uniform(-0.3, 0.3)) * rng.choice([-1, 1])
    kind = rng.choice(["fopdt", "sopdt", "unstable"])
    if kind == "fopdt":
        Pi = make_process("fopdt", Ki, ti_, dead_time=thi)
    elif kind == "sopdt":
        Pi = make_process("sopdt", Ki, ti_, 0.3 * ti_, 0.0, thi)
    else:
        Pi = make_process("tf", num=[Ki], den=[ti_, -1.0], dead_time=0.3 * thi)
    kci = float(10 ** rng.uniform(-0.6, 0.9)) / abs(Ki)
    Ci = Controller("ideal", kc=kci, ti=(float(ti_ * 10 ** rng.uniform(-0.5, 0.3)) if rng.uniform() < 0.7 else None))
    si = float(np.sign(Ki)) if rng.uniform() < 0.95 else -float(np.sign(Ki))
    inner = LoopModel("IN", Pi, Ci, si, pv_filter=float(rng.choice([0.0, 0.1 * ti_])))
    to = ti_ * float(10 ** rng.uniform(0.3, 1.5))
    tho = float(10 ** rng.uniform(-1.0, 0.0)) * to
    Ko = float(10 ** rng.uniform(-0.3, 0.3))
    kind_o = rng.choice(["fopdt", "ipdt", "sopdt"])
    if kind_o == "fopdt":
        Po = make_process("fopdt", Ko, to, dead_time=tho)
        scale = to / (Ko * tho)
    elif kind_o == "sopdt":
        Po = make_process("sopdt", Ko, to, 0.2 * to, 0.0, tho)
        scale = to / (Ko * (tho + 0.2 * to))
    else:
        Po = make_process("ipdt", Ko / to, dead_time=tho)
        scale = to / (Ko * tho)
    kco = float(scale * 10 ** rng.uniform(-1.0, 0.5))
    tio = float(to * 10 ** rng.uniform(-0.5, 0.3)) if kind_o != "ipdt" else float(8 * tho * 10 ** rng.uniform(-0.5, 0.3))
    td = float(rng.choice([0.0, 0.0, 0.3 * tho]))
    Co = Controller(str(rng.choice(["ideal", "series"])), kc=kco, ti=tio, td=td, alpha=0.1)
    return LoopModel("OUT", Po, Co, 1.0, pv_filter=float(rng.choice([0.0, 0.05 * to])),
                     sample=float(rng.choice([0.0, 0.1 * thi])), inner=inner)


def _pade_is_accurate(m: LoopModel) -> bool:
    """True when each delay's Pade model matches e^{-jw theta} to 1e-4 wherever it can matter.

    The outer delay matters where |L_outer| > 0.1, the inner delay where |L_outer| > 0.1 or
    |L_inner| > 0.1: elsewhere the Pade all-pass (|pade(jw)| = 1 exactly) keeps the loop gain
    well below 1 and cannot change an encirclement of -1.
    """
    w = np.logspace(-5, 4, 6_000) / max(m.inner.delay + m.delay, 1e-9)
    lo = np.abs(m.L(w)) > 0.1
    li = lo | (np.abs(m.inner.L(w)) > 0.1)
    return ((not lo.any() or _pade_err(m.delay, w[lo]) < 1e-4)
            and (not li.any() or _pade_err(m.inner.delay, w[li]) < 1e-4))


def _clear_of_minus_one(m: LoopModel) -> bool:
    """Skip knife-edge cases whose stability no finite model can settle."""
    w = np.logspace(-6, 4, 40_000) / max(m.inner.delay + m.delay, 1e-9)
    return float(np.min(np.abs(1 + m.L(w)))) > 0.02 and float(np.min(np.abs(1 + m.inner.L(w)))) > 0.02


def test_delay_cascade_stability_against_pade_poles():
    """Closed-loop stability of exact-delay cascades agrees with the eigenvalues of a state-space
    model built in python-control with Pade delays (``control.pade``, order 14; inner loop
    closed with ``control.feedback``) on 110 seeded random cascades, unstable inner loops
    included. Cases where the Pade model is not accurate over the loop's band, or where
    L(jw) passes within 0.02 of -1, are left out and counted."""
    rng = np.random.default_rng(20240609)
    cases = [_random_cascade(rng) for _ in range(110)]
    used = [m for m in cases if _pade_is_accurate(m) and _clear_of_minus_one(m)]
    assert len(used) >= 80, f"only {len(used)} usable cases"
    figs = evaluate(used + [m.inner for m in used])
    n = len(used)
    mismatches = []
    n_unstable_inner = n_outer_unstable = 0
    for i, m in enumerate(used):
        p_out = _closed_poles(m)
        p_in = _closed_poles(m.inner)
        scale = 1.0 / max(m.delay + m.inner.delay, 1e-9)
        ref_out = int(np.sum(p_out.real > 1e-7 * scale))
        ref_in = int(np.sum(p_in.real > 1e-7 * scale))
        n_unstable_inner += ref_in > 0
        n_outer_unstable += ref_out > 0
        got_out, got_in = int(figs.iloc[i]["rhp_closed"]), int(figs.iloc[n + i]["rhp_closed"])
        if (got_out, got_in) != (ref_out, ref_in) or bool(figs.iloc[i]["stable"]) != (ref_out == 0):
            mismatches.append((i, got_out, ref_out, got_in, ref_in))
    assert not mismatches
    assert n_unstable_inner >= 5 and n_outer_unstable >= 10 and n - n_outer_unstable >= 10
