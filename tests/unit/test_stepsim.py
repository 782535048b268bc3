"""Regression tests of the lifted step simulation (audit.stepsim.simulate_lifted / simulate_steps).

The lifted evaluation is the same recurrence as the step-by-step :func:`simulate` (same grid, same
discretisation, same delay lines), evaluated in another order; these tests hold it to the step-by-step
run within rounding (1e-10 of each response's peak) on mixed loops, and hold the batched step figures
to the figures of each loop simulated alone. Validation against an independent library is in
tests/reference/test_steps_independent.py.
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np
import pytest

from audit import stepsim as td
from audit.loop import Controller, LoopModel, make_process
from audit.policy import Policy
from audit.stepsim import _nearest_fraction, build_batch, simulate, simulate_lifted, simulate_steps
from audit.timedomain import STEP_COLUMNS, step_figures


def _mixed() -> list[LoopModel]:
    """Invented loops of every structure: fopdt/sopdt/ipdt/tf (one open-loop unstable), three controller
    forms, derivative kick (jumps), PV filter, sampling, direct action, no delay, cascades of two and three
    levels with incommensurate delays, P-only (offset)."""
    out = [
        LoopModel("fo-pi", make_process("fopdt", 1.5, 40.0, dead_time=0.5), Controller("ideal", kc=2.0, ti=30.0)),
        LoopModel("fo-long", make_process("fopdt", 1.0, 5.0, dead_time=12.0), Controller("ideal", kc=0.3, ti=8.0),
                  sample=1.0),
        LoopModel("so-pid", make_process("sopdt", 2.0, 20.0, 5.0, lead=1.0, dead_time=0.8),
                  Controller("ideal", kc=1.5, ti=18.0, td=3.0, alpha=0.1), pv_filter=0.4),
        LoopModel("so-series", make_process("sopdt", -0.8, 12.0, 3.0, dead_time=2.3),
                  Controller("series", kc=1.2, ti=12.0, td=1.0), sample=0.5, sign=-1.0),
        LoopModel("ip-pi", make_process("ipdt", 0.05, 2.0, dead_time=1.3), Controller("parallel", kp=2.0, ki=0.05)),
        LoopModel("tf-unst-ol", make_process("tf", num=[1.0], den=[10.0, -1.0], dead_time=0.4),
                  Controller("ideal", kc=3.0, ti=8.0)),
        LoopModel("tf-zero", make_process("tf", num=[-2.0, 1.0], den=[20.0, 9.0, 1.0], dead_time=0.7),
                  Controller("parallel", kp=0.4, ki=0.04, kd=0.5)),
        LoopModel("no-delay", make_process("fopdt", 1.0, 10.0), Controller("ideal", kc=2.0, ti=10.0, td=1.0)),
        LoopModel("p-only", make_process("fopdt", 1.5, 8.0, dead_time=0.3), Controller("ideal", kc=0.9)),
    ]
    fic = LoopModel("fic", make_process("fopdt", 1.0, 2.0, dead_time=0.3), Controller("ideal", kc=1.0, ti=2.0),
                    sample=0.25)
    tic = LoopModel("tic", make_process("fopdt", 2.0, 300.0, dead_time=41.3), Controller("ideal", kc=1.0, ti=300.0),
                    sample=1.0, inner=fic)
    lic = LoopModel("lic", make_process("fopdt", 0.5, 900.0, dead_time=13.7), Controller("ideal", kc=2.0, ti=2500.0),
                    sample=2.0, inner=tic)
    return out + [fic, tic, lic]


def _unstable() -> LoopModel:
    return LoopModel("hot", make_process("fopdt", 1.0, 1.0, dead_time=1.0), Controller("ideal", kc=12.0, ti=1.0))


def _steps(batch: td.Batch, per_delay: float) -> np.ndarray:
    """A step per loop putting its shortest delay at ``per_delay`` steps (1 s without delays). [s]"""
    d = np.where(np.isnan(batch.delays), np.inf, batch.delays).min(axis=1)
    return np.where(np.isfinite(d), d / per_delay, 1.0)


def _close(a: np.ndarray, b: np.ndarray, rel: float = 1e-10) -> None:
    scale = np.maximum(np.abs(a).max(axis=(0, 1)), 1e-300)
    err = np.abs(a - b).max(axis=(0, 1)) / scale
    assert err.max() < rel, err


@pytest.mark.parametrize("kind", ["load", "setpoint", "output"])
@pytest.mark.parametrize("per_delay", [1.0, 2.5])
def test_lifted_equals_step_by_step(kind, per_delay):
    """Whole lifting (every delay line in the state), fractional delays, jumps: same values as simulate."""
    batch, errors = build_batch(_mixed(), kind)
    assert not errors
    h = _steps(batch, per_delay)
    ref = simulate(batch, h, 800, outputs=(0, 1))
    got = simulate_lifted(batch, h, 800, outputs=(0, 1), jumps=ref.ym is not ref.yp)
    _close(ref.yp, got.yp)
    _close(ref.ym, got.ym)
    assert (got.ym is got.yp) == (ref.ym is ref.yp)


@pytest.mark.parametrize("kind", ["load", "setpoint"])
def test_blocks_with_long_channels_equal_step_by_step(kind):
    """Cascades whose outer delay is many steps long and not a whole number of steps (read from outside
    the lifted state, block by block): same values as simulate."""
    ms = _mixed()
    casc = [m for m in ms if m.inner is not None and m.inner.inner is None]
    batch, _ = build_batch(casc, kind)
    h = np.array([0.4])                       # inner delay 0.425 s: 1.06 steps; outer 41.8 s: 104.5 steps
    n, frac = td._delay_steps(batch, h)
    assert n[0, 0] >= td.BLOCK_MIN and frac[0, 0] > 0.0 and n[1, 0] == 1
    ref = simulate(batch, h, 3000)
    got = simulate_lifted(batch, h, 3000, jumps=ref.ym is not ref.yp, long=[True, False])
    _close(ref.yp, got.yp)
    _close(ref.ym, got.ym)


def test_simulate_steps_mixes_paths_and_keeps_unstable_loops_exact():
    """simulate_steps on mixed loops (lifted whole, lifted in blocks, step by step) equals simulate; an
    unstable loop, whose response would leave the float range, is simulated step by step (held at
    STATE_LIMIT)."""
    ms = _mixed() + [_unstable()]
    for kind in ("load", "setpoint"):
        batch, _ = build_batch(ms, kind)
        h = _steps(batch, 1.0)
        h[-1] = 0.05                                  # the unstable loop: 20 steps of delay, grows past 1e100
        ref = simulate(batch, h, 5000)
        got = simulate_steps(batch, h, 5000)
        assert np.abs(ref.yp[:, 0, -1]).max() > 1e90          # held near STATE_LIMIT by simulate
        # run step by step (lifted, it would pass the float range): held at STATE_LIMIT like the reference;
        # numpy may round the last bit differently at another array length: 1e-9 of the response so far
        assert np.abs(got.yp[:, 0, -1]).max() <= td.STATE_LIMIT
        so_far = np.maximum.accumulate(np.abs(ref.yp[:, 0, -1]))
        assert (np.abs(got.yp[:, 0, -1] - ref.yp[:, 0, -1]) <= 1e-9 * so_far).all()
        _close(ref.yp[:, :, :-1], got.yp[:, :, :-1])
        _close(ref.ym[:, :, :-1], got.ym[:, :, :-1])


def test_batched_figures_equal_each_loop_alone():
    """The step figures of mixed loops computed together equal each loop's figures computed alone (its
    own batch, its own lifted or step-by-step path), notes included."""
    ms = _mixed() + [_unstable()]
    stable = [True] * (len(ms) - 1) + [None]
    pol = Policy()
    together = step_figures(ms, pol, stable)
    assert "grows" in together.at[len(ms) - 1, "step_note"]
    assert "load offset" in together.at[8, "step_note"]
    assert np.isfinite(together["load_peak"].iloc[:-1]).all()
    for k, m in enumerate(ms):
        alone = step_figures([m], pol, [stable[k]]).iloc[0]
        assert alone["step_note"] == together.at[k, "step_note"], m.tag
        for c in STEP_COLUMNS[:-1]:
            # overshoot is a difference of two numbers near 1: its rounding noise is absolute (1e-9 %)
            assert alone[c] == pytest.approx(together.at[k, c], rel=1e-9, abs=1e-9, nan_ok=True), (m.tag, c)


def test_nearest_fraction_is_limit_denominator():
    """The integer version used to plan steps gives exactly Fraction.limit_denominator (Python standard
    library, fractions module), on random and on exactly representable ratios."""
    rng = np.random.default_rng(5)
    xs = list(rng.uniform(1e-3, 50.0, 20000)) + list(rng.integers(1, 3000, 3000) / rng.integers(1, 3000, 3000))
    xs += [1 / 3, 0.1, 2.5, 1e-7, 1e7, 7.000000001, 1000.5]
    for x in xs:
        f = Fraction(float(x)).limit_denominator(1000)
        assert _nearest_fraction(float(x), 1000) == (f.numerator, f.denominator)


def _small_and_padded() -> list[LoopModel]:
    """Loops stepped one step at a time (delays of many steps): P-only first-order loops (two live states,
    one channel) beside second-order PID loops and cascades (more states, two channels)."""
    out = []
    for i in range(6):
        out.append(LoopModel(f"p{i}", make_process("fopdt", 1.0 + 0.2 * i, 10.0 + 3 * i, dead_time=6.0 + i),
                             Controller("ideal", kc=0.5 + 0.05 * i)))
    for i in range(3):
        out.append(LoopModel(f"so{i}", make_process("sopdt", 2.0, 20.0 + i, 5.0, dead_time=4.0 + i),
                             Controller("ideal", kc=0.6, ti=25.0, td=2.0, alpha=0.1), pv_filter=0.5))
    inner = LoopModel("in", make_process("fopdt", 1.0, 3.0, dead_time=0.9), Controller("ideal", kc=1.0, ti=4.0))
    out.append(LoopModel("casc", make_process("fopdt", 1.5, 30.0, dead_time=7.0), Controller("ideal", kc=0.4, ti=35.0),
                         inner=inner))
    return out


@pytest.mark.parametrize("kind", ["load", "setpoint"])
def test_small_loops_stepped_at_their_own_size_are_the_same_numbers(kind, monkeypatch):
    """Regression: loops of few live states stepped apart from the padded batch (``simulate(live=...)``)
    give the padded run's values bit for bit (the padding adds exact zeros only)."""
    models = _small_and_padded()
    batch, errors = build_batch(models, kind)
    assert not errors and batch.A.shape[1] > 3 and batch.Cq.shape[1] == 2
    live = td._live_states(batch, np.arange(len(models)))
    assert (live[:6] <= 3).all() and (live[6:] > 3).all()
    h = np.array([0.05 * (1 + i % 3) for i in range(len(models))])
    n = 1200
    ref = simulate(batch, h, n, outputs=(0, 1))
    monkeypatch.setattr(td, "SMALL_LOOPS", 1)
    monkeypatch.setattr(td, "LIFT_DEPTH", 1)          # every loop step by step
    got = simulate_steps(batch, h, n, outputs=(0, 1))
    assert np.array_equal(got.yp, ref.yp) and np.array_equal(got.ym, ref.ym)


def test_small_loops_stepped_apart_match_closed_forms(monkeypatch):
    """Validation of the loops stepped at their own size: before the feedback acts (t < dead time) the PV of a
    unit load step is the open-loop step K (1 - exp(-t/tau)) of a first-order lag, and the steady PV of a
    P-only loop is K / (1 + K kc) (final-value theorem; K. Ogata, Modern Control Engineering, 5th ed., 2010,
    sec. 5-8)."""
    monkeypatch.setattr(td, "SMALL_LOOPS", 1)
    monkeypatch.setattr(td, "LIFT_DEPTH", 1)
    models = _small_and_padded()
    batch, _ = build_batch(models, "load")
    h = np.full(len(models), 0.1)
    res = simulate_steps(batch, h, 4000)
    for i in range(6):
        p = models[i].process
        K, tau, theta = p.gain, p.tau1, p.dead_time
        kc = models[i].controller.kc
        # the load PV is z shifted by theta: z(t) = y(t + theta); before the delayed feedback (t < theta) it
        # is the open-loop response
        k = np.arange(int(theta / 0.1))
        np.testing.assert_allclose(res.yp[k, 0, i], K * (1.0 - np.exp(-k * 0.1 / tau)), rtol=1e-12, atol=1e-14)
        assert res.yp[-1, 0, i] == pytest.approx(K / (1.0 + K * kc), rel=1e-6)
