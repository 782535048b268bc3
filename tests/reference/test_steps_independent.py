"""Validation of the step responses, including the loops simulated through powers of their one-step map
(audit.stepsim.simulate_lifted: short dead times over long horizons, and cascades or loops whose delay is
many steps long, simulated block by block), against an independent simulation and a closed form.

The independent simulation is python-control's: each delay-free part discretised with a first-order
hold (``control.c2d(..., 'foh')``) on a fine step that divides every delay, the dead times as exact
delay lines z^-N, the loop closed with ``control.feedback`` and simulated with ``control.step_response``.
Both methods hold the loop's signals linear between samples, so they agree to the square of the step,
but the triangle hold also spreads the sampled unit step over the sample before it (a ramp from t = -dt
to 0), which starts the reference half a sample early: it is read half a sample later (linear
interpolation), leaving an error of about (slope x dt / 8) at the kinks.
"""

from __future__ import annotations

import math

import control as ct
import numpy as np
import pytest

from audit import stepsim
from audit.loop import Controller, LoopModel, make_process
from audit.timedomain import step_traces


def _delay(n: int, dt: float) -> ct.TransferFunction:
    """z^-n: a delay line of n samples."""
    return ct.tf([1.0], [1.0] + [0.0] * n, dt)


def _foh(sys_c, dt: float):
    return ct.c2d(ct.ss(sys_c), dt, method="foh")


def _reference(G, t: np.ndarray, dt: float) -> np.ndarray:
    """Unit-step response of the discrete loop ``G`` at the times ``t``, read half a sample late."""
    k = int(np.ceil(t.max() / dt)) + 2
    tk = np.arange(k) * dt
    _, y = ct.step_response(G, tk)
    return np.interp(t - 0.5 * dt, tk, np.asarray(y).reshape(-1), left=0.0)


def test_short_dead_time_load_step_against_python_control():
    """PI on 1.5 e^{-0.5 s}/(40 s + 1), unit load step at the process input: y = P e^{-theta s}/(1 + L) d.
    The dead time is one grid step of a 1,000-step horizon, so the loop is lifted whole. Reference:
    python-control (FOH discretisation, 25-sample delay line, dt = 0.02 s); tolerance 1e-3 of the peak."""
    s = ct.tf("s")
    m = LoopModel("fo", make_process("fopdt", 1.5, 40.0, dead_time=0.5), Controller("ideal", kc=2.0, ti=30.0))
    tr = step_traces(m, "load")
    dt = 0.02
    P, C = _foh(1.5 / (40 * s + 1), dt), _foh(2.0 * (1 + 1 / (30 * s)), dt)
    G = ct.feedback(P * _delay(25, dt), C)
    t = tr.t[tr.t <= 150.0]
    ref = _reference(G, t, dt)
    assert np.max(np.abs(ref - tr.y[:len(t)])) < 1e-3 * np.max(np.abs(ref))


def test_cascade_setpoint_step_against_python_control():
    """Two-level cascade, set-point step: outer PI on 2 e^{-6.1 s}/(30 s + 1) around an inner PI flow loop
    on e^{-0.2 s}/(2 s + 1); the outer delay is 61 steps of the inner one, so it is read from outside the
    lifted state block by block. Reference: python-control, each loop closed with its own delay line
    (dt = 0.05 s: 4 and 122 samples); tolerance 1e-3 of a unit step."""
    s = ct.tf("s")
    inner = LoopModel("fic", make_process("fopdt", 1.0, 2.0, dead_time=0.2), Controller("ideal", kc=1.0, ti=2.0))
    outer = LoopModel("tic", make_process("fopdt", 2.0, 30.0, dead_time=6.1), Controller("ideal", kc=1.0, ti=30.0),
                      inner=inner)
    batch, _ = stepsim.build_batch([outer], "setpoint")
    plan = stepsim.plan_batch(batch, np.array([200.0]))[0]
    n, _ = stepsim._delay_steps(batch, np.array([plan.h]))
    assert n.max() >= stepsim.BLOCK_MIN and n.max() + 2 > stepsim.LIFT_DEPTH   # the block path
    tr = step_traces(outer, "setpoint", 200.0)
    dt = 0.05
    Ti = ct.feedback(_foh(1.0 * (1 + 1 / (2 * s)), dt) * _foh(1.0 / (2 * s + 1), dt) * _delay(4, dt), 1)
    G = ct.feedback(_foh(1.0 * (1 + 1 / (30 * s)), dt) * Ti * _foh(2.0 / (30 * s + 1), dt) * _delay(122, dt), 1)
    ref = _reference(G, tr.t, dt)
    assert np.max(np.abs(ref - tr.y)) < 1e-3


@pytest.mark.parametrize("a,theta", [(0.2, 1.0), (1.2, 1.0)])
def test_integrator_with_dead_time_method_of_steps(a, theta):
    """P control of K e^{-theta s}/s, set-point step: e = 1 - y obeys e'(t) = -a e(t - theta) (a = K kc) after
    t = theta, e = 1 before, whose solution by the method of steps is, with s = t - theta,
    e = sum_n (-a)^n (s - (n - 1) theta)^n / n! over the n with s > (n - 1) theta.
    Source: R. Bellman and K. L. Cooke, Differential-Difference Equations, Academic Press, 1963, ch. 3
    (method of steps). a theta = 0.2 is well damped, 1.2 oscillates (a theta < pi/2 is stable). The
    delay line holds ~40 steps of a single loop, simulated block by block. Tolerance 1e-3 (the delay
    line's linear interpolation, second order in the step)."""
    K, kc = 0.1, a / 0.1
    m = LoopModel("ip", make_process("ipdt", K, dead_time=theta), Controller("ideal", kc=kc))
    tr = step_traces(m, "setpoint", 30.0)
    sv = tr.t - theta
    e = np.ones_like(sv)
    for n in range(1, int(30.0 / theta) + 3):
        arg = sv - (n - 1) * theta
        e += np.where(arg > 0, (-a) ** n * np.maximum(arg, 0.0) ** n / math.factorial(n), 0.0)
    e[tr.t <= theta] = 1.0
    assert np.max(np.abs((1.0 - e) - tr.y)) < 1e-3
