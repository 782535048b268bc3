"""Validation of audit.plantdata.identify against an independent simulator and closed forms.

Independent simulator: tests/reference/plant_sim.py (scipy.signal.cont2discrete with a zero-order
hold on a fine grid and a delay line of whole fine steps). Closed forms: the NRMSE fit of a model on
its own data with white noise, 100 (1 - sigma_e/std(y)) (from the definition, common practice); the
binomial band of interval coverage (common practice).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from audit.plantdata.identify import fit_structure, identify_arrays, nrmse_fit, simulate

from .plant_sim import closed_loop, open_loop

DT = 1.0
CASES = [
    ("fopdt", {"gain": 1.5, "tau1": 30.0, "dead_time": 7.35}),
    ("fopdt", {"gain": -0.8, "tau1": 4.0, "dead_time": 0.45}),
    ("sopdt", {"gain": 2.0, "tau1": 40.0, "tau2": 10.0, "tau_lead": 5.0, "dead_time": 4.6}),
    ("sopdt", {"gain": 1.0, "tau1": 25.0, "tau2": 8.0, "tau_lead": -6.0, "dead_time": 2.05}),
    ("ipdt", {"gain": 0.01, "dead_time": 3.3}),
]


def _steps(n=3000, levels=(40, 45, 38, 42), seed=None):
    op = np.full(n, float(levels[0]))
    for i, lv in enumerate(levels[1:]):
        op[(i + 1) * n // len(levels) - n // 20:] = lv
    return op


@pytest.mark.parametrize("model,p", CASES)
def test_simulation_matches_independent_simulator(model, p):
    """Exact discretisation with a fractional dead time equals the fine-grid ZOH simulation
    (scipy.signal.cont2discrete; independent library) to rounding."""
    op = _steps()
    np.testing.assert_allclose(simulate(model, p, op, DT), open_loop(model, p, op, DT), atol=1e-9, rtol=0)


@pytest.mark.parametrize("model,p", CASES)
def test_parameters_recovered_and_structure_chosen(model, p):
    """Known models with white noise (sigma 0.2 %): the chosen structure is the true one and each
    parameter lies within about its 95 % interval (x 2.05, i.e. 4 standard errors; independent
    simulator); the held-out fit is near its closed form 100 (1 - sigma/std(y))."""
    rng = np.random.default_rng(7)
    op = _steps()
    pv = 50 + open_loop(model, p, op, DT) + 0.2 * rng.standard_normal(len(op))
    r = identify_arrays(op, pv, DT)
    assert r.identifiable and r.best.model == model, (r.best and r.best.model, {m: f.bic for m, f in r.fits.items()})
    for k, v in p.items():
        est, half = r.best.params[k], r.best.ci95[k]
        assert abs(est - v) <= 2.05 * half + 1e-9, (k, est, v, half)
    n, m = len(op), int(round(0.3 * len(op)))
    blk = pv[:m] if np.std(r.best.yhat[:m]) > np.std(r.best.yhat[n - m:]) else pv[n - m:]
    expect = 100 * (1 - 0.2 / np.std(blk))             # the closed form of fit % with the true model
    assert r.best.fit_holdout_pct > expect - 3 and r.best.residual_white


def test_interval_coverage_binomial_band():
    """200 seeded fopdt bump tests with white noise: each parameter's 95 % interval covers the truth
    in 180..199 cases (the 99.9 % band of Binomial(200, 0.95); common practice)."""
    p = {"gain": 1.2, "tau1": 12.0, "dead_time": 3.5}
    op = np.full(400, 40.0)
    op[60:] = 46.0
    op[230:] = 37.0
    y0 = open_loop("fopdt", p, op, DT)
    rng = np.random.default_rng(2024)
    hits = {k: 0 for k in p}
    n = 200
    for _ in range(n):
        f = fit_structure("fopdt", op, 50 + y0 + 0.3 * rng.standard_normal(len(op)), DT, holdout=0)
        for k, v in p.items():
            hits[k] += abs(f.params[k] - v) <= f.ci95[k]
    lo, hi = stats.binom.ppf([0.0005, 0.9995], n, 0.95)
    assert all(lo <= h <= hi for h in hits.values()), (hits, lo, hi)


def test_fit_percent_closed_form():
    """A model on its own noiseless data fits 100 %; with white noise of std sigma, fit % equals
    100 (1 - sigma_e/std(y)) where sigma_e is the noise's sample rms (from the definition)."""
    model, p = CASES[0]
    op = _steps()
    y = 50 + open_loop(model, p, op, DT)
    yhat = 50 + simulate(model, p, op, DT)
    assert nrmse_fit(y, yhat) == pytest.approx(100.0, abs=1e-8)
    e = 0.5 * np.random.default_rng(3).standard_normal(len(op))
    got = nrmse_fit(y + e, yhat)
    assert got == pytest.approx(100 * (1 - np.sqrt(np.mean(e ** 2)) / np.std(y + e)), abs=1e-9)
    assert got == pytest.approx(100 * (1 - 0.5 / np.std(y + e)), abs=1.5)


def test_closed_loop_record_with_setpoint_changes():
    """A PI loop (Kc 1.2, Ti 25 s) on a known fopdt, set-point steps and small noise: the model
    identified from logged op and pv is close to the truth (independent closed-loop simulator)."""
    p = {"gain": 1.5, "tau1": 30.0, "dead_time": 6.0}
    n = 3000
    sp = np.zeros(n)
    sp[300:] = 5.0
    sp[1200:] = -3.0
    sp[2100:] = 2.0
    rng = np.random.default_rng(11)
    op, pv = closed_loop("fopdt", p, sp, DT, kc=0.8, ti=25.0, noise=0.05 * rng.standard_normal(n))
    r = identify_arrays(op, 50 + pv, DT)
    assert r.identifiable and r.best.model == "fopdt"
    assert r.best.params["gain"] == pytest.approx(1.5, rel=0.05)
    assert r.best.params["tau1"] == pytest.approx(30.0, rel=0.1)
    assert r.best.params["dead_time"] == pytest.approx(6.0, abs=1.0)
