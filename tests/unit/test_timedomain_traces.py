"""Regression tests of the batched step traces (audit.timedomain.step_traces_many): a loop's trace
simulated with many others equals the one-loop simulation it replaces, within 1e-9 (regression against
the earlier per-loop code path, which is rebuilt here from the public building blocks)."""

from __future__ import annotations

import numpy as np
import pytest

from audit.loop import Controller, LoopModel, make_process
from audit.timedomain import (HORIZON_FACTOR, Trace, _shifted, build_batch, characteristic_time, plan_batch,
                              simulate, step_traces, step_traces_many)


def _alone(model: LoopModel, kind: str, t_end: float | None = None) -> Trace:
    """The per-loop simulation as it was before batching (one loop, its own plan)."""
    batch, errors = build_batch([model], kind)
    if batch is None:
        raise ValueError(errors[0])
    H = float(t_end) if t_end else HORIZON_FACTOR * characteristic_time(model)
    p = plan_batch(batch, np.array([H]))[0]
    res = simulate(batch, np.array([p.h]), p.n_steps, outputs=(0, 1))
    t = np.arange(p.n_steps + 1) * p.h
    y = _shifted(t, res.ym[:, 0, 0], res.yp[:, 0, 0], float(batch.y_shift[0]))
    u = _shifted(t, res.ym[:, 1, 0], res.yp[:, 1, 0], float(batch.u_shift[0]))
    return Trace(t, y, u, kind)


def _models() -> list[LoopModel]:
    """About twenty invented loops of every structure: FOPDT/SOPDT/IPDT/lead, three controller forms,
    sampling, PV filter, direct action, no delay, a two- and a three-level cascade, an aggressive one."""
    out = []
    for k in range(12):
        kind = ("fopdt", "sopdt", "ipdt")[k % 3]
        proc = (make_process("ipdt", 0.02 + 0.01 * k, dead_time=1.0 + 0.5 * k) if kind == "ipdt" else
                make_process(kind, 1.0 + 0.2 * k, 5.0 + 3 * k, 2.0 + k if kind == "sopdt" else None,
                             dead_time=0.4 * k))
        ctrl = (Controller("ideal", kc=0.8 + 0.1 * k, ti=6.0 + 2 * k, td=0.5 * (k % 2)) if k % 3 != 2 else
                Controller("parallel", kp=0.5, ki=0.02, kd=0.1 * (k % 2)))
        out.append(LoopModel(f"L{k}", proc, ctrl, sign=-1.0 if k == 5 else 1.0, sample=0.5 * (k % 4),
                             pv_filter=0.3 * (k % 2)))
    out.append(LoopModel("lead", make_process("sopdt", 2.0, 20.0, 5.0, lead=3.0, dead_time=1.5),
                         Controller("series", kc=1.2, ti=15.0, td=2.0), sample=1.0))
    out.append(LoopModel("aggr", make_process("fopdt", 1.0, 10.0, dead_time=4.0), Controller("ideal", kc=6.0, ti=3.0)))
    inner = LoopModel("fic", make_process("fopdt", 1.0, 2.0, dead_time=0.3), Controller("ideal", kc=1.0, ti=2.0),
                      sample=0.25)
    mid = LoopModel("tic", make_process("fopdt", 2.0, 30.0, dead_time=5.0), Controller("ideal", kc=1.0, ti=30.0),
                    sample=1.0, inner=inner)
    out += [inner, mid, LoopModel("lic", make_process("fopdt", 0.5, 200.0, dead_time=13.0),
                                  Controller("ideal", kc=2.0, ti=250.0), sample=2.0, inner=mid)]
    out.append(LoopModel("p-only", make_process("fopdt", 1.5, 8.0, dead_time=1.0), Controller("ideal", kc=0.9)))
    out.append(LoopModel("ratio", make_process("fopdt", 1.0, 10.0, dead_time=0.7), Controller("ideal", kc=1.0, ti=10.0),
                         sample=0.3))
    return out


@pytest.mark.parametrize("kind", ["load", "setpoint"])
def test_batched_traces_equal_per_loop_traces(kind):
    models = _models()
    assert len(models) >= 19
    many = step_traces_many(models, kind)
    for m, tr in zip(models, many):
        ref = _alone(m, kind)
        assert tr.note == "" and tr.kind == kind
        assert tr.t.shape == ref.t.shape, m.tag
        np.testing.assert_allclose(tr.t, ref.t, rtol=0, atol=1e-12)
        # 1e-9 of the trace's own scale (a diverging trace reaches 1e7; rounding differs at 1e-15 relative)
        for got, want in ((tr.y, ref.y), (tr.u, ref.u)):
            scale = max(1.0, float(np.max(np.abs(want))))
            np.testing.assert_allclose(got, want, rtol=0, atol=1e-9 * scale, err_msg=m.tag)


def test_own_horizons_and_the_one_loop_wrapper():
    models = _models()[:4]
    ends = [30.0, None, 120.0, 0.0]
    many = step_traces_many(models, "load", ends)
    for m, e, tr in zip(models, ends, many):
        expect = e if e else HORIZON_FACTOR * characteristic_time(m)
        assert tr.t[-1] == pytest.approx(expect, rel=2e-3)
        one = step_traces(m, "load", e)
        np.testing.assert_allclose(one.y, tr.y, rtol=0, atol=1e-9)


def test_a_loop_that_cannot_be_simulated_leaves_the_others():
    bad = LoopModel("bad", make_process("fopdt", 1.0, 5.0, dead_time=1.0), Controller("ideal", kc=1.0, td=1.0,
                                                                                       alpha=0.0))
    good = _models()[0]
    a, b = step_traces_many([bad, good], "setpoint")
    assert "improper" in a.note and a.t.size == 0
    np.testing.assert_allclose(b.y, _alone(good, "setpoint").y, rtol=0, atol=1e-9)
    with pytest.raises(ValueError, match="improper"):
        step_traces(bad, "setpoint")
    with pytest.raises(ValueError):
        step_traces_many([good], "ramp")
    assert step_traces_many([], "load") == []
