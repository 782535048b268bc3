"""The closed-loop simulator of synthetic exports (audit.plantdata.plantsim) against closed forms.

Validation: the open-loop step response of a first-order-plus-dead-time process with a dead time
that is not a whole number of samples, and the ramp of an integrator, are exact at the samples
(closed form, e.g. Seborg, Edgar and Mellichamp, Process Dynamics and Control, 2nd ed., 2004,
eq. 5-18 with a time delay, and the integrator K t); the stiction model follows its definition
(Choudhury, Thornhill and Shah, Control Eng. Practice 13 (2005) 641-658, sec. 4); the closed loop
agrees with scipy.signal.dlsim of the same loop built as a discrete transfer function.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from audit.plantdata.plantsim import LoopState, discretise, run_chunk, start_state, stiction
from audit.rows import LoopRow


def _row(**kw) -> LoopRow:
    base = dict(tag="X", model="fopdt", gain=2.0, tau1=7.0, dead_time=2.6, form="ideal", kc=0.5, ti=10.0)
    base.update(kw)
    return LoopRow(0, "loops", 2, **base)


def _open_loop(row, n=60, step=5.0, ts=1.0):
    p = discretise([row], ts)
    op0, sp0 = np.array([40.0]), np.array([50.0])
    st = start_state(p, op0, sp0)
    z = np.zeros((1, n))
    hand = np.full((1, n), 40.0 + step)
    pv, op = run_chunk(p, st, np.full((1, n), 50.0), z, z, np.ones((1, n), bool), hand, op0, sp0,
                       np.zeros(1), np.zeros(1))
    return pv[0] - 50.0, op[0]


@pytest.mark.parametrize("theta", [0.0, 2.6, 3.0])
def test_fopdt_step_exact_at_the_samples(theta):
    """y(t) = K du (1 - exp(-(t - theta)/tau)) for t >= theta, the step applied (held) from t = 0."""
    y, _ = _open_loop(_row(dead_time=theta))
    t = np.arange(60.0)
    want = np.where(t >= theta, 2.0 * 5.0 * (1 - np.exp(-(t - theta) / 7.0)), 0.0)
    np.testing.assert_allclose(y, want, atol=1e-12)


def test_ipdt_ramp_and_sopdt_with_lead():
    """Integrator: y = K du (t - theta); second order with a lead: the closed-form step response
    K du [1 + (tl - t1)/(t1 - t2) e^{-t/t1} + (t2 - tl)/(t1 - t2) e^{-t/t2}] delayed by theta."""
    y, _ = _open_loop(_row(model="ipdt", gain=0.01, tau1=None, dead_time=1.5))
    t = np.arange(60.0)
    np.testing.assert_allclose(y, 0.01 * 5.0 * np.maximum(t - 1.5, 0.0), atol=1e-12)
    t1, t2, tl, th = 9.0, 3.0, 1.2, 2.25
    y, _ = _open_loop(_row(model="sopdt", tau1=t1, tau2=t2, lead=tl, dead_time=th))
    s = np.maximum(t - th, 0.0)
    want = 2.0 * 5.0 * (1 + (tl - t1) / (t1 - t2) * np.exp(-s / t1) + (t2 - tl) / (t1 - t2) * np.exp(-s / t2))
    np.testing.assert_allclose(y[t >= th], want[t >= th], atol=1e-9)


def test_stiction_sticks_then_slips():
    """A rising ramp from rest: the valve holds until the input has moved S, then jumps to
    u - (S - J)/2 and follows at that lag."""
    S, J = np.array([4.0]), np.array([1.0])
    st = LoopState(np.zeros((1, 3)), np.zeros((1, 3)), 0, np.zeros(1), np.zeros(1), np.zeros(1), np.full(1, 50.0),
                   np.full(1, 50.0), np.zeros(1), np.full(1, 50.0), np.ones(1, bool), np.full(1, 50.0))
    xs = [float(stiction(np.array([50.0 + 0.5 * k]), st, S, J)[0]) for k in range(1, 16)]
    u = 50.0 + 0.5 * np.arange(1, 16)
    stuck = u - 50.0 <= 4.0
    np.testing.assert_allclose(np.array(xs)[stuck], 50.0)
    np.testing.assert_allclose(np.array(xs)[~stuck], u[~stuck] - 1.5)


def test_closed_loop_agrees_with_dlsim():
    """PI on an fopdt with a whole-sample dead time, set-point step, no limits reached: the simulator
    against scipy.signal.dlsim of the closed loop T = CP/(1 + CP) (independent library)."""
    ts, K, tau, d, kc, ti = 1.0, 1.5, 8.0, 3, 0.8, 9.0
    row = _row(gain=K, tau1=tau, dead_time=float(d), kc=kc, ti=ti)
    p = discretise([row], ts)
    n = 120
    op0, sp0 = np.array([50.0]), np.array([50.0])
    st = start_state(p, op0, sp0)
    sp = np.full((1, n), 52.0)
    z = np.zeros((1, n))
    pv, _ = run_chunk(p, st, sp, z, z, np.zeros((1, n), bool), z, op0, sp0, np.zeros(1), np.zeros(1))
    a = np.exp(-ts / tau)
    # P(z) = K (1 - a) z^-(d+1) / (1 - a z^-1); C(z) = kc + kc ts/ti / (1 - z^-1), in powers of z
    Pn = np.concatenate([[0.0], [K * (1 - a)]])
    Pd = np.concatenate([[1.0, -a], np.zeros(d)])
    Cn = np.array([kc + kc * ts / ti, -kc])
    Cd = np.array([1.0, -1.0])
    L_n, L_d = np.polymul(Pn, Cn), np.polymul(Pd, Cd)
    L_n = np.concatenate([np.zeros(len(L_d) - len(L_n)), L_n])
    T_n, T_d = L_n, np.polyadd(L_d, L_n)
    _, y = signal.dlsim((np.trim_zeros(T_n, "f"), T_d, ts), np.full(n, 2.0))
    np.testing.assert_allclose(pv[0] - 50.0, y[:, 0], atol=1e-9)


def _batch_inputs(rows, n=400, seed=3):
    rng = np.random.default_rng(seed)
    k = len(rows)
    op0, sp0 = np.full(k, 45.0), np.full(k, 50.0)
    sp = sp0[:, None] + np.where((np.arange(n) // 90) % 2 == 1, 3.0, 0.0)[None, :]
    noise = rng.standard_normal((k, n)) * 0.1
    load = op0[:, None] + np.cumsum(rng.standard_normal((k, n)) * 0.05, axis=1)
    manual = np.zeros((k, n), bool)
    manual[:, :40] = True
    manual[1, 200:260] = True
    hand = op0[:, None] + np.where(np.arange(n) % 30 < 15, 4.0, -4.0)[None, :]
    return op0, sp0, sp, noise, load, manual, hand


def test_a_loop_runs_the_same_in_any_batch():
    """Vectorising across loops must not couple them (common practice): a batch of loops of
    different speeds (1, 2, 4 and 10 steps a sample, a controller every 2 s), with derivative
    action, a lead, an integrator, a sticking valve and manual periods gives each loop, bit for bit,
    what it gives simulated alone (what lets the export be split over processes)."""
    from audit.plantdata.plantsim import substeps_for
    rows = [_row(tag="F1", sample=0.1, dead_time=0.35),
            _row(tag="F2", sample=0.25, model="sopdt", tau1=6.0, tau2=2.0, lead=1.0, dead_time=1.3),
            _row(tag="F3", sample=0.5, td=1.5, d_filter=0.125),
            _row(tag="L1", model="ipdt", gain=0.02, tau1=3.0, dead_time=4.4, sample=1.0, ti=60.0),
            _row(tag="T1", sample=2.0, dead_time=7.5, tau1=30.0),
            _row(tag="S1", sample=1.0, dead_time=2.0)]
    steps = [substeps_for([r], 1.0) for r in rows]
    assert steps == [10, 4, 2, 1, 1, 1]
    S, J = np.array([0, 0, 0, 0, 0, 4.0]), np.array([0, 0, 0, 0, 0, 1.5])
    op0, sp0, sp, noise, load, manual, hand = _batch_inputs(rows)
    p = discretise(rows, 1.0, substeps=steps)
    st = start_state(p, op0, sp0)
    parts = [run_chunk(p, st, *(v[:, a:b] for v in (sp, noise, load, manual, hand)), op0, sp0, S, J)
             for a, b in ((0, 150), (150, 400))]
    pv, op = (np.concatenate([q[i] for q in parts], axis=1) for i in (0, 1))
    for i, r in enumerate(rows):
        q = discretise([r], 1.0, substeps=steps[i])
        one = start_state(q, op0[i:i + 1], sp0[i:i + 1])
        pv1, op1 = run_chunk(q, one, *(v[i:i + 1] for v in (sp, noise, load, manual, hand)), op0[i:i + 1],
                             sp0[i:i + 1], S[i:i + 1], J[i:i + 1])
        assert np.array_equal(pv1[0], pv[i]) and np.array_equal(op1[0], op[i]), r.tag
    assert np.all((op >= 0) & (op <= 100)) and np.ptp(op[5]) > 0


def test_fast_controller_agrees_with_dlsim():
    """A PI controller executing every 0.25 s, logged every 1 s (four steps a sample): the logged
    measurement is every fourth sample of scipy.signal.dlsim of the closed loop at 0.25 s
    (independent library), dead time 3 s = 12 steps."""
    h, K, tau, d, kc, ti = 0.25, 1.5, 8.0, 12, 0.8, 9.0
    row = _row(gain=K, tau1=tau, dead_time=d * h, kc=kc, ti=ti, sample=h)
    p = discretise([row], 1.0, substeps=4)
    n = 60
    op0, sp0 = np.array([50.0]), np.array([50.0])
    st = start_state(p, op0, sp0)
    z = np.zeros((1, n))
    pv, _ = run_chunk(p, st, np.full((1, n), 52.0), z, z, np.zeros((1, n), bool), z, op0, sp0, np.zeros(1),
                      np.zeros(1))
    a = np.exp(-h / tau)
    Pn, Pd = np.array([0.0, K * (1 - a)]), np.concatenate([[1.0, -a], np.zeros(d)])
    Cn, Cd = np.array([kc + kc * h / ti, -kc]), np.array([1.0, -1.0])
    L_n, L_d = np.polymul(Pn, Cn), np.polymul(Pd, Cd)
    L_n = np.concatenate([np.zeros(len(L_d) - len(L_n)), L_n])
    _, y = signal.dlsim((np.trim_zeros(L_n, "f"), np.polyadd(L_d, L_n), h), np.full(4 * n, 2.0))
    np.testing.assert_allclose(pv[0] - 50.0, y[::4, 0], atol=1e-9)
