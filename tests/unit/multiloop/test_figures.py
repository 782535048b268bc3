"""Unit tests of audit.multiloop.figures.

Consistency checks against the single-loop engine (audit.frequency, itself validated against
python-control in tests/reference): a group without couplings is its loops side by side, so every
figure must equal the single-loop one. Published values and the Pade cross-check are in
tests/reference/test_multiloop_reference.py.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from audit.frequency import evaluate
from audit.loop import Controller, LoopModel, make_process
from audit.multiloop.figures import (GroupModel, analyse_group, detuned, group_stability, loop_matrix, rga)


def loops():
    """Three single loops of different kinds (test data): fopdt/PI, ipdt/PI with filter and sample, sopdt/PID."""
    return (
        LoopModel("A", make_process("fopdt", 1.5, 40.0, dead_time=4.0), Controller("ideal", kc=2.0, ti=30.0)),
        LoopModel("B", make_process("ipdt", 0.02, dead_time=3.0), Controller("ideal", kc=3.0, ti=80.0),
                  pv_filter=1.0, sample=1.0),
        LoopModel("C", make_process("sopdt", -2.0, 30.0, 5.0, dead_time=2.0),
                  Controller("series", kc=1.2, ti=30.0, td=5.0), sign=-1.0),
    )


def test_uncoupled_group_equals_single_loops():
    """A block-diagonal group: stability, Ms, gain and phase margins equal the single-loop engine's."""
    ls = loops()
    g = GroupModel(tuple(m.tag for m in ls), ls, {})
    fig = analyse_group(g)
    alone = evaluate(list(ls))
    assert fig.stability.stable == bool(alone["stable"].all())
    for i, lp in enumerate(fig.loops):
        assert lp.ms == pytest.approx(alone["ms"][i], rel=1e-4)
        assert lp.gm == pytest.approx(alone["gm"][i], rel=1e-4)
        assert lp.pm_deg == pytest.approx(alone["pm_deg"][i], abs=1e-2)
        assert lp.wc_rad_s == pytest.approx(alone["wc_rad_s"][i], rel=1e-4)
    assert fig.sigma_peak.value == pytest.approx(alone["ms"].max(), rel=1e-4)


def test_uncoupled_unstable_loop_counts():
    """One loop made unstable alone (gain x 6): the group has the engine's count of closed-loop RHP poles."""
    a, b, c = loops()
    a = a.with_controller(Controller("ideal", kc=12.0, ti=30.0))
    g = GroupModel(("A", "B", "C"), (a, b, c), {})
    st = group_stability(g)
    alone = evaluate([a, b, c])
    assert not st.stable
    assert st.rhp_closed == int(alone["rhp_closed"].sum())


def test_loop_matrix_diagonal_is_single_loop_L():
    """The diagonal of L(jw) is LoopModel.L(w) exactly (same formula, exact delays)."""
    ls = loops()
    w = np.geomspace(1e-4, 10, 50)
    L = loop_matrix(GroupModel(("A", "B", "C"), ls, {(0, 1): make_process("fopdt", 0.3, 10.0, dead_time=1.0)}), 1j * w)
    for i, m in enumerate(ls):
        np.testing.assert_allclose(L[:, i, i], m.L(w), rtol=1e-12)


def test_high_frequency_gain_with_delay_not_decided():
    """A biproper element with dead time and a large high-frequency gain: the tail cannot be bounded,
    the group is reported not stable with a note (as the single-loop engine does for |L(inf)| >= 1)."""
    a, b, _ = loops()
    a = LoopModel("A", make_process("tf", num=[3.0, 1.0], den=[1.0, 1.0], dead_time=1.0),
                  Controller("ideal", kc=1.0, ti=10.0))
    st = group_stability(GroupModel(("A", "B"), (a, b), {(1, 0): make_process("fopdt", 0.1, 10.0, dead_time=2.0)}))
    assert not st.stable and st.rhp_closed is None and "high-frequency" in st.note


def test_rga_rows_and_columns_sum_to_one_complex():
    """Bristol (1966): every row and column of the RGA sums to 1, at any frequency (random complex matrices)."""
    rng = np.random.default_rng(7)
    G = rng.normal(size=(20, 4, 4)) + 1j * rng.normal(size=(20, 4, 4))
    lam = rga(G)
    np.testing.assert_allclose(lam.sum(axis=-1), 1.0, atol=1e-10)
    np.testing.assert_allclose(lam.sum(axis=-2), 1.0, atol=1e-10)
    assert np.isnan(rga(np.ones((2, 2)))).all()


def test_detuned_forms():
    """Luyben's detuning: gain / F, integral time x F; the parallel form keeps ti = kp/ki and td = kd/kp the same way."""
    c = detuned(Controller("ideal", kc=2.0, ti=10.0, td=1.0), 2.0)
    assert (c.kc, c.ti, c.td) == (1.0, 20.0, 1.0)
    p = detuned(Controller("parallel", kp=2.0, ki=0.2, kd=2.0), 2.0)
    assert p.kp == 1.0 and p.kp / p.ki == pytest.approx(20.0) and p.kd / p.kp == pytest.approx(1.0)


def test_cascade_outer_loop_in_a_group_keeps_its_inner_loop():
    """A cascade's outer loop (inner_pv) in a group: its diagonal element is the composed single-loop L
    (inner set-point response inside, exact delays), and an uncoupled group of it and another loop has the
    single-loop engine's verdict and Ms."""
    inner = LoopModel("FIC-1", make_process("fopdt", 1.0, 5.0, dead_time=0.5), Controller("ideal", kc=1.0, ti=5.0))
    outer = LoopModel("TIC-1", make_process("fopdt", 1.5, 120.0, dead_time=10.0), Controller("ideal", kc=2.0, ti=120.0),
                      inner=inner)
    a = loops()[0]
    g = GroupModel(("TIC-1", "A"), (outer, a), {})
    w = np.geomspace(1e-4, 1.0, 40)
    np.testing.assert_allclose(loop_matrix(g, 1j * w)[:, 0, 0], outer.L(w), rtol=1e-12)
    fig = analyse_group(g)
    alone = evaluate([outer, a])
    assert fig.stability.stable == bool(alone["stable"].all())
    assert fig.loops[0].ms == pytest.approx(alone["ms"][0], rel=1e-4)


def test_integrating_coupling_into_a_self_regulating_loop_drifts():
    """Closed form (steady state): if loop A's output integrates into B's PV while B's own process is
    self-regulating, A must rest at zero output and B's PV integrator can sit anywhere, offset by B's
    output: a closed-loop pole at s = 0, so the group is not stable. The same coupling into an integrating
    PV (a tank with two inflows: one integrator) leaves no pole at s = 0."""
    a = LoopModel("A", make_process("fopdt", 1.0, 20.0, dead_time=2.0), Controller("ideal", kc=1.0, ti=20.0))
    b = LoopModel("B", make_process("fopdt", 1.0, 30.0, dead_time=3.0), Controller("ideal", kc=1.0, ti=30.0))
    cpl = {(1, 0): make_process("ipdt", 0.002, dead_time=2.0)}
    st = group_stability(GroupModel(("A", "B"), (a, b), cpl))
    assert not st.stable and st.at_zero == 1 and st.rhp_closed == 0 and "s = 0" in st.note
    b_int = LoopModel("B", make_process("ipdt", 0.01, dead_time=3.0), Controller("ideal", kc=2.0, ti=300.0))
    st2 = group_stability(GroupModel(("A", "B"), (a, b_int), cpl))
    assert st2.at_zero == 0 and st2.stable
