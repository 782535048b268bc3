"""Validation of the time-domain and disturbance figures against closed forms, published
results and an independent library (python-control). Each test names its source."""

from __future__ import annotations

import math

import control as ct
import numpy as np
import pytest

from audit.disturbance import Record, analyse_record, predict_residual
from audit.loop import Controller, LoopModel, make_process
from audit.policy import Policy
from audit.timedomain import step_figures, step_traces


def _pi_loop(form: str, sign: float = 1.0) -> LoopModel:
    """PI on 1.0 e^{-2s}/(10 s + 1); direct action (sign -1) on a process of negative gain."""
    kc, ti = 2.5, 10.0
    if form == "parallel":
        c = Controller("parallel", kp=kc, ki=kc / ti, kd=0.0)
    else:
        c = Controller(form, kc=kc, ti=ti)
    return LoopModel("pi", make_process("fopdt", 1.0 * sign, 10.0, dead_time=2.0), c, sign=sign, sample=1.0)


@pytest.mark.parametrize("form,sign", [("ideal", 1.0), ("series", 1.0), ("parallel", 1.0), ("ideal", -1.0)])
def test_ie_equals_one_over_ki(form, sign):
    """IE = integral of e after a unit load step at the process input = 1/ki in magnitude.

    Source: K. J. Astrom and T. Hagglund, Advanced PID Control, ISA, 2006, sec. 4.3
    (IE = 1/ki for a controller with integral action). Sign: with e = r - y and u = sign C e
    the integral term must end at -1, so IE = -sign/ki. Tolerance 0.1 %.
    """
    m = _pi_loop(form, sign)
    f = step_figures([m], Policy()).iloc[0]
    ki = abs(m.controller.integral_gain)
    assert f["load_offset"] == 0.0
    assert abs(f["load_ie_s"]) == pytest.approx(1.0 / ki, rel=1e-3)
    assert np.sign(f["load_ie_s"]) == -np.sign(m.sign * m.controller.integral_gain)


def test_p_only_first_order_closed_form():
    """P control of K/(tau s + 1), no dead time: load offset K/(1 + K Kc), set-point final value
    K Kc/(1 + K Kc), closed-loop time constant tau/(1 + K Kc): 10-90 % rise tau_cl ln 9 and
    2 % settling tau_cl ln 50 for both steps. Source: closed form (first-order step response,
    K. Ogata, Modern Control Engineering, 5th ed., 2010, sec. 5-3). Tolerance 0.1 %.
    """
    K, tau, kc = 2.0, 10.0, 1.5
    m = LoopModel("p", make_process("fopdt", K, tau), Controller("ideal", kc=kc))
    f = step_figures([m], Policy(settle_band_pct=2.0)).iloc[0]
    tcl = tau / (1 + K * kc)
    assert f["load_offset"] == pytest.approx(K / (1 + K * kc), rel=1e-6)
    assert f["sp_offset"] == pytest.approx(1 / (1 + K * kc), rel=1e-6)
    assert f["sp_rise_s"] == pytest.approx(tcl * math.log(9), rel=1e-3)
    assert f["sp_settle_s"] == pytest.approx(tcl * math.log(50), rel=1e-3)
    assert f["load_settle_s"] == pytest.approx(tcl * math.log(50), rel=1e-3)
    assert f["sp_overshoot_pct"] == pytest.approx(0.0, abs=1e-6)
    assert np.isnan(f["load_iae_s"]) and np.isnan(f["load_t_peak_s"])
    assert "offset" in f["step_note"]


def test_pure_delay_staircase():
    """P control of K e^{-theta s}: y jumps at k theta to K Kc sum_{i<k} (-K Kc)^i (geometric series),
    nothing before theta. Source: closed form, common practice (method of steps). Exact to 1e-12.
    """
    K, kc, theta = 1.0, 0.5, 3.0
    m = LoopModel("d", make_process("fopdt", K, 0.0, dead_time=theta), Controller("ideal", kc=kc))
    tr = step_traces(m, "setpoint", 20 * theta)
    a = K * kc
    for k in range(0, 20):
        inside = (tr.t > k * theta + 1e-9) & (tr.t < (k + 1) * theta - 1e-9)
        expect = a * sum((-a) ** i for i in range(k))
        assert np.allclose(tr.y[inside], expect, atol=1e-12), k
    f = step_figures([m]).iloc[0]
    assert f["sp_rise_s"] == pytest.approx(0.0, abs=1e-12)
    assert f["sp_overshoot_pct"] == pytest.approx(50.0, rel=1e-9)
    assert f["load_t_peak_s"] == pytest.approx(theta, abs=1e-12)


def test_load_response_starts_after_dead_time():
    """A load at the process input shows at the PV exactly theta later (closed form, common practice)."""
    m = LoopModel("x", make_process("fopdt", 1.0, 5.0, dead_time=4.0), Controller("ideal", kc=1.0, ti=5.0),
                  sample=2.0)
    tr = step_traces(m, "load", 40.0)
    assert np.all(tr.y[tr.t <= 4.0 + 1e-12] == 0.0)
    assert tr.y[np.searchsorted(tr.t, 4.0 + 0.05)] > 0.0


def _pade_ss(theta: float, order: int = 8):
    n, d = ct.pade(theta, order)
    return ct.ss(ct.tf(n, d))


@pytest.mark.parametrize("kind,td,tol", [("setpoint", 0.0, 1e-3), ("load", 0.0, 1e-3), ("load", 1.0, 1e-3),
                                         ("setpoint", 1.0, 3e-3)])
def test_against_python_control_pade(kind, td, tol):
    """Independent cross-check: a PI/PID loop on a SOPDT with PV filter and sampling, against
    python-control (0.10) step responses of the same loop with 8th-order Pade delays.
    Tolerance 1e-3 of a unit step, 3e-3 for the PID set-point step: the Pade approximation
    error dominates (3e-4 to 2e-3 for orders 6-10 here, largest with the derivative kick),
    while our result converges as h^2 to 1e-6 (tests/unit/test_timedomain.py)."""
    K, tau, th, Ts = 1.5, 8.0, 2.0, 1.0
    m = LoopModel("x", make_process("sopdt", K, tau, 2.0, dead_time=th),
                  Controller("ideal", kc=1.2, ti=8.0, td=td, alpha=0.1), sample=Ts, pv_filter=0.5)
    tr = step_traces(m, kind, 60.0)
    s = ct.tf("s")
    C = ct.ss(1.2 * (1 + 1 / (8 * s) + td * s / (0.1 * td * s + 1))) if td else ct.ss(1.2 * (1 + 1 / (8 * s)))
    P = ct.ss(K / ((tau * s + 1) * (2 * s + 1)))
    F = ct.ss(1 / (0.5 * s + 1))
    G = ct.feedback(C * _pade_ss(Ts / 2) * P * _pade_ss(th), F) if kind == "setpoint" \
        else ct.feedback(P * _pade_ss(th), C * _pade_ss(Ts / 2) * F)
    _, y = ct.step_response(G, tr.t)
    assert np.max(np.abs(y - tr.y)) < tol


def test_cascade_against_python_control_pade():
    """Cross-check of a two-level cascade (outer PI on a FOPDT fed by a PI flow loop) against
    python-control with 8th-order Pade delays; tolerance 1e-3 of a unit step (Pade error)."""
    inner = LoopModel("fic", make_process("fopdt", 1.0, 2.0, dead_time=0.5), Controller("ideal", kc=1.0, ti=2.0),
                      sample=0.5)
    outer = LoopModel("tic", make_process("fopdt", 2.0, 30.0, dead_time=5.0), Controller("ideal", kc=1.0, ti=30.0),
                      sample=2.0, inner=inner)
    tr = step_traces(outer, "setpoint", 200.0)
    s = ct.tf("s")
    Ci, Pi = ct.ss(1.0 * (1 + 1 / (2 * s))), ct.ss(1.0 / (2 * s + 1))
    Ti = ct.feedback(Ci * _pade_ss(0.25) * Pi * _pade_ss(0.5), 1)
    Co, Po = ct.ss(1.0 * (1 + 1 / (30 * s))), ct.ss(2.0 / (30 * s + 1))
    G = ct.feedback(Co * _pade_ss(1.0) * Ti * Po * _pade_ss(5.0), 1)
    _, y = ct.step_response(G, tr.t)
    assert np.max(np.abs(y - tr.y)) < 1e-3


def _sinusoid(a: float, cycles: int, n: int, dt: float = 1.0) -> tuple[Record, float]:
    t = np.arange(n) * dt
    w0 = 2 * math.pi * cycles / (n * dt)
    return Record("sine", t, 3.0 + a * np.sin(w0 * t + 0.3), dt), w0


def test_sinusoid_band_amplitude_and_parseval():
    """A sinusoid of amplitude a: the 99.7th percentile of |a sin| is a sin(0.997 pi/2) (closed
    form: |sin| of a uniform phase has CDF (2/pi) arcsin x), within 1 %; the band lands on the
    sinusoid's frequency within the stated resolution (1.5 bins); Welch's spectrum integrates
    to the variance within 2 % (Parseval; P. D. Welch, IEEE Trans. Audio Electroacoust. 15, 1967)."""
    a = 2.0
    rec, w0 = _sinusoid(a, cycles=500, n=2 ** 16)
    an = analyse_record(rec, allowed_amplitude=0.5)
    assert an.amplitude == pytest.approx(a * math.sin(math.pi / 2 * 0.997), rel=0.01)
    assert abs(an.band_rad_s - w0) <= 1.5 * an.resolution_rad_s
    assert abs(an.band_rad_s - w0) / w0 < 0.02
    assert np.sum(an.psd) * an.resolution_rad_s == pytest.approx(np.var(an.detrended), rel=0.02)
    assert an.attenuation_db == pytest.approx(20 * math.log10(an.amplitude / 0.5), rel=1e-12)
    assert an.needs_attenuation


@pytest.mark.parametrize("w_factor", [0.3, 1.0, 3.0])
def test_sinusoid_through_s_frequency_response_theorem(w_factor):
    """A long sinusoid through S leaves a sinusoid of amplitude |S(j w0)| a (frequency-response
    theorem; K. J. Astrom and R. M. Murray, Feedback Systems, 2nd ed., 2021, sec. 6.3), here with
    3 s of process dead time and sampling. Tolerance 2 %. The frequency-domain standard deviation
    agrees with the time-domain one within 2 %."""
    m = LoopModel("x", make_process("fopdt", 1.0, 20.0, dead_time=3.0), Controller("ideal", kc=2.0, ti=20.0),
                  sample=1.0)
    wc = 0.1
    n = 2 ** 15
    cycles = int(round(w_factor * wc * n / (2 * math.pi)))
    a = 2.0
    rec, w0 = _sinusoid(a, cycles, n)
    r = predict_residual(m, rec, allowed_amplitude=1.0)
    late = r.y[n // 2:]
    expect = a * abs(m.S(np.array([w0]))[0])
    assert np.max(np.abs(late)) == pytest.approx(expect, rel=0.02)
    assert r.residual_std_freq == pytest.approx(r.residual_std, rel=0.02)
