"""Validation of the group figures (audit/multiloop/figures.py) against publications and python-control.

Each test names its source. Regression checks of the same module live in tests/unit/multiloop/.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from audit.loop import Controller, LoopModel, make_process
from audit.multiloop.figures import (GroupModel, analyse_group, biggest_log_modulus, blt_detune, group_stability,
                                     niederlinski, rga, steady_state_gain)

from .multiloop_pade import closed_loop_poles

MIN = 60.0  # the published models are in minutes; the tool works in seconds


def wood_berry(kc=(0.375, 0.075), ti=(8.29, 23.6)) -> GroupModel:
    """Wood and Berry (1973) methanol-water column, R -> x_D, S -> x_B, times in minutes (converted to s).

    G = [[12.8 e^-s/(16.7 s + 1), -18.9 e^-3s/(21 s + 1)], [6.6 e^-7s/(10.9 s + 1), -19.4 e^-3s/(14.4 s + 1)]].
    Loop 2 has a negative process gain, so its controller acts directly (sign -1, kc > 0).
    """
    p11 = make_process("fopdt", 12.8, 16.7 * MIN, dead_time=1 * MIN)
    p12 = make_process("fopdt", -18.9, 21.0 * MIN, dead_time=3 * MIN)
    p21 = make_process("fopdt", 6.6, 10.9 * MIN, dead_time=7 * MIN)
    p22 = make_process("fopdt", -19.4, 14.4 * MIN, dead_time=3 * MIN)
    l1 = LoopModel("XC-101", p11, Controller("ideal", kc=kc[0], ti=ti[0] * MIN), sign=1.0)
    l2 = LoopModel("XC-102", p22, Controller("ideal", kc=kc[1], ti=ti[1] * MIN), sign=-1.0)
    return GroupModel(("XC-101", "XC-102"), (l1, l2), {(0, 1): p12, (1, 0): p21})


def test_wood_berry_steady_state_rga_and_niederlinski():
    """R. K. Wood and M. W. Berry, Chem. Eng. Sci. 28 (1973) 1707; the steady-state RGA lambda_11 = 2.01 is
    tabulated by Luyben (1986) and Skogestad and Postlethwaite (2005) for this model. For a 2x2 group
    NI = 1/lambda_11 (closed form)."""
    g = wood_berry()
    G0 = steady_state_gain(g)
    lam = rga(G0)
    assert lam[0, 0] == pytest.approx(2.01, abs=0.005)
    assert lam[0, 0] + lam[0, 1] == pytest.approx(1.0, abs=1e-12)   # rows sum to one (Bristol 1966)
    assert niederlinski(G0) == pytest.approx(1.0 / lam[0, 0], rel=1e-12)
    assert niederlinski(G0) == pytest.approx(0.498, abs=0.001)


def test_wood_berry_blt_settings_group_stable():
    """W. L. Luyben, Ind. Eng. Chem. Process Des. Dev. 25 (1986) 654, Table I: BLT settings for Wood-Berry
    Kc = 0.375, -0.075 and Ti = 8.29, 23.6 min give a stable group with L_cm max = 2N = 4 dB.
    Checked against the poles of an order-12 Pade model (python-control) as well."""
    g = wood_berry()
    st = group_stability(g)
    assert st.stable and st.rhp_closed == 0 and st.rhp_open == 0
    poles = closed_loop_poles(g, order=12)
    assert poles.real.max() < 0
    assert biggest_log_modulus(g) == pytest.approx(4.0, abs=0.1)
    fig = analyse_group(g)
    assert fig.stability.stable
    assert fig.lcm_db == pytest.approx(4.0, abs=0.1)
    for lp in fig.loops:
        assert 1.0 < lp.ms < 2.0 and lp.gm > 1.5 and 0 < lp.pm_deg < 180


def test_wood_berry_blt_detuning_factor():
    """Luyben (1986), Table I: from the Ziegler-Nichols settings Kc = 0.96, -0.19 and Ti = 3.25, 9.2 min the
    BLT factor reaching 4 dB is F = 2.55 (the published settings are these divided/multiplied by F; the
    published ZN settings are rounded, hence 2 % tolerance)."""
    zn = wood_berry((0.96, 0.19), (3.25, 9.2))
    d = blt_detune(zn)
    assert d.reached and d.stable
    assert d.factor == pytest.approx(2.55, rel=0.02)
    assert d.lcm_db == pytest.approx(4.0, abs=0.05)
    assert d.controllers[0].kc == pytest.approx(0.375, rel=0.02)
    assert d.controllers[1].ti / MIN == pytest.approx(23.6, rel=0.02)


def test_skogestad_distillation_lv_rga():
    """S. Skogestad and I. Postlethwaite, Multivariable Feedback Control, 2005, the LV distillation model
    G = [[87.8, -86.4], [108.2, -109.6]]/(75 s + 1): steady-state lambda_11 = 35.1 (from memory); the
    pairing is flagged as strongly interacting."""
    ps = [make_process("fopdt", k, 75.0 * MIN, dead_time=1.0) for k in (87.8, -86.4, 108.2, -109.6)]
    l1 = LoopModel("FC-1", ps[0], Controller("ideal", kc=0.002, ti=75 * MIN))
    l2 = LoopModel("FC-2", ps[3], Controller("ideal", kc=0.002, ti=75 * MIN), sign=-1.0)
    g = GroupModel(("FC-1", "FC-2"), (l1, l2), {(0, 1): ps[1], (1, 0): ps[2]})
    lam = rga(steady_state_gain(g))
    assert lam[0, 0] == pytest.approx(35.1, abs=0.05)
    fig = analyse_group(g)
    assert any("strong interaction" in w for w in fig.warnings)


def test_rga_closed_form_and_negative_pairing():
    """Closed form: for G = [[1, 2], [3, 4]], lambda_11 = g11 g22/(g11 g22 - g12 g21) = 4/(4 - 6) = -2;
    Skogestad and Postlethwaite (2005, sec. 10.6): avoid pairing on a negative steady-state RGA element;
    Niederlinski (1971): NI = det G/(g11 g22) = -0.5 < 0 means instability with integral action in both
    loops. The generalised Nyquist verdict agrees (order-10 Pade poles, python-control)."""
    p = {k: make_process("fopdt", v, 10.0, dead_time=1.0) for k, v in {(0, 0): 1, (0, 1): 2, (1, 0): 3, (1, 1): 4}.items()}
    l1 = LoopModel("A", p[(0, 0)], Controller("ideal", kc=0.3, ti=10.0))
    l2 = LoopModel("B", p[(1, 1)], Controller("ideal", kc=0.1, ti=10.0))
    g = GroupModel(("A", "B"), (l1, l2), {(0, 1): p[(0, 1)], (1, 0): p[(1, 0)]})
    assert rga(steady_state_gain(g))[0, 0] == pytest.approx(-2.0, abs=1e-12)
    fig = analyse_group(g)
    assert fig.niederlinski == pytest.approx(-0.5, abs=1e-12)
    assert any("negative steady-state relative gain" in w for w in fig.warnings)
    assert not fig.stability.stable
    assert closed_loop_poles(g).real.max() > 0


# ------------------------------------------------------------------------------------------
# Random groups against python-control (Pade order 12 for every delay)
# ------------------------------------------------------------------------------------------

def _random_group(rng: np.random.Generator) -> GroupModel:
    n = int(rng.integers(2, 5))
    tags = tuple(f"L{i}" for i in range(n))
    loops, couplings = [], {}
    for i in range(n):
        for j in range(n):
            if i != j and rng.random() > 0.6:
                continue
            kind = rng.choice(["fopdt", "sopdt", "ipdt", "fopdt_unstable"]) if i != j else rng.choice(["fopdt", "sopdt", "ipdt"])
            k = float(rng.uniform(0.3, 2.0) * rng.choice([-1, 1])) * (1.0 if i == j else rng.uniform(0.1, 0.8))
            theta = float(rng.uniform(0.5, 5.0))
            tau = float(rng.uniform(2.0, 30.0))
            if kind == "fopdt":
                p = make_process("fopdt", k, tau, dead_time=theta)
            elif kind == "sopdt":
                p = make_process("sopdt", k, tau, float(rng.uniform(1.0, 10.0)), dead_time=theta)
            elif kind == "ipdt":
                p = make_process("ipdt", k / tau, dead_time=theta)
            else:
                p = make_process("tf", num=[k], den=[tau, -1.0], dead_time=theta)
            if i == j:
                sign = 1.0 if k > 0 else -1.0
                kc = float(rng.uniform(0.1, 1.2)) * tau / (abs(k) * (theta + 1.0)) / (3.0 if kind == "ipdt" else 1.0)
                if kind == "ipdt":
                    kc = float(rng.uniform(0.05, 0.6)) / (abs(k / tau) * theta)
                ti = float(rng.uniform(0.5, 3.0)) * (tau if kind != "ipdt" else 8 * theta)
                td = float(rng.uniform(0.0, 0.5)) * theta if rng.random() < 0.3 else 0.0
                c = Controller("ideal", kc=kc, ti=ti, td=td, alpha=0.1)
                pvf = float(rng.uniform(0.0, 1.0)) if rng.random() < 0.3 else 0.0
                samp = float(rng.uniform(0.1, 1.0)) if rng.random() < 0.3 else 0.0
                loops.append(LoopModel(tags[i], p, c, sign=sign, pv_filter=pvf, sample=samp))
            else:
                couplings[(i, j)] = p
    return GroupModel(tags, tuple(loops), couplings)


def _rhp(poles: np.ndarray) -> int:
    return int(np.sum(poles.real > 0))


def test_random_groups_against_pade_poles():
    """Independent library: python-control (control.pade order 10, control.tf2ss, control.feedback) on 200 seeded
    random groups of 2 to 4 loops (fopdt, sopdt, ipdt loops; couplings including integrating and open-loop unstable ones; PI
    and PID, PV filters, execution periods). The generalised Nyquist verdict and its closed-loop right-half-plane
    pole count must equal the Pade model's.

    Poles at s = 0 (|p| < 1e-6 rad/s, far below every group's dynamics; a multiple one spreads numerically
    to |p| ~ 1e-8): an integrating path that no loop holds at rest. Their number must equal the engine's
    ``at_zero`` (open-loop integrators, a row's integrators shared, less the order of the pole of det(I + L)
    at s = 0), and such a group must be reported not stable.

    Distance-to-boundary rule (documented, never silent): a group is near-marginal, and excluded, when another
    closed-loop pole p of the Pade model has |Re p| < 0.005 |p| (damping below 0.5 %: a change of the settings
    of that order moves it across the axis). At most 5 % may be excluded; both verdicts occur often."""
    rng = np.random.default_rng(20261202)
    agree = excluded = stable = at_zero_seen = 0
    for case in range(200):
        g = _random_group(rng)
        poles = closed_loop_poles(g, 10)
        at_zero = np.abs(poles) < 1e-6
        poles = poles[~at_zero]
        if np.any(np.abs(poles.real) < 0.005 * np.abs(poles)):
            excluded += 1
            continue
        ref = _rhp(poles)
        st = group_stability(g)
        assert st.rhp_closed is not None, (case, st.note)
        assert st.rhp_closed == ref, (case, st.rhp_closed, ref, g)
        assert st.at_zero == int(at_zero.sum()), (case, st.at_zero, int(at_zero.sum()))
        assert st.stable == (ref == 0 and not at_zero.any())
        at_zero_seen += int(at_zero.any())
        agree += 1
        stable += st.stable
    assert excluded <= 10 and at_zero_seen >= 3
    assert agree >= 190
    assert 30 <= stable <= agree - 30


def test_negative_niederlinski_index_means_unstable_on_random_groups():
    """Niederlinski (1971), as stated rigorously by Grosdidier, Morari and Holt (Ind. Eng. Chem. Fundam. 24,
    1985, Theorem 1): for an open-loop stable G with integral action in every loop and each loop's gain sign
    chosen so that g_ii(0) k_i > 0, NI = det G(0)/prod g_ii(0) < 0 implies closed-loop instability for any
    settings. On seeded random groups (2 to 4 loops, open-loop stable) whose NI < 0, the generalised Nyquist
    verdict must be 'unstable' every time, with settings from timid to aggressive."""
    rng = np.random.default_rng(1971)
    seen = 0
    while seen < 25:
        n = int(rng.integers(2, 5))
        P = {(i, j): make_process("fopdt", float(rng.uniform(0.3, 2.0) * rng.choice([-1, 1])),
                                  float(rng.uniform(2.0, 30.0)), dead_time=float(rng.uniform(0.5, 5.0)))
             for i in range(n) for j in range(n)}
        G0 = np.array([[P[(i, j)].gain for j in range(n)] for i in range(n)])
        ni = niederlinski(G0)
        if not ni < 0:
            continue
        for scale in (0.02, 0.3, 1.0):
            loops = tuple(LoopModel(f"L{i}", P[(i, i)], Controller(
                "ideal", kc=scale * P[(i, i)].tau1 / (abs(P[(i, i)].gain) * 2 * P[(i, i)].dead_time),
                ti=P[(i, i)].tau1), sign=float(np.sign(P[(i, i)].gain))) for i in range(n))
            g = GroupModel(tuple(m.tag for m in loops), loops, {k: v for k, v in P.items() if k[0] != k[1]})
            st = group_stability(g)
            assert not st.stable, (seen, ni, scale)
        seen += 1
