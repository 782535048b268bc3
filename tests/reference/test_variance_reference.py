"""Validation of the minimum-variance benchmark (Harris index) and its AR fit.

Sources: T. J. Harris, "Assessment of control loop performance", Can. J. Chem. Eng. 67 (1989)
856-861 (sigma_mv^2 = sigma_a^2 sum_{i<d} psi_i^2); L. Desborough and T. Harris, Can. J. Chem.
Eng. 70 (1992) 1186-1197 (eta = 1 - sigma_mv^2/sigma_y^2); G. E. P. Box, G. M. Jenkins and
G. C. Reinsel, Time Series Analysis, 4th ed., 2008, eq. (3.2.28) (variance of an AR(2) process);
statsmodels (AutoReg, ar_select_order) as the independent implementation of the AR fit.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import lfilter
from statsmodels.tsa.ar_model import AutoReg, ar_select_order

from audit.plantdata.variance import delay_samples, fit_ar, harris_index, impulse_response


def _p_control(phi: float, gk: float, d: int, n: int, seed: int) -> np.ndarray:
    """y_t = g u_{t-d} + n_t, n_t = phi n_{t-1} + a_t, u_t = -K y_t (sigma_a = 1), simulated
    step by step as a loop (not as the closed-form filter)."""
    rng = np.random.default_rng(seed)
    a = rng.standard_normal(n + 500)
    y = np.zeros(n + 500)
    u = np.zeros(n + 500)
    noise = 0.0
    for t in range(n + 500):
        noise = phi * noise + a[t]
        y[t] = (u[t - d] if t >= d else 0.0) + noise     # g = 1, the gain is in K = gk
        u[t] = -gk * y[t]
    return y[500:]


def test_closed_form_first_order_disturbance_p_control():
    """d = 1, AR(1) disturbance (phi = 0.8) under proportional control (gK = 0.5).

    Closed loop: (1 - phi q^-1)(1 + gK q^-1) y = a, an AR(2) with a1 = phi - gK, a2 = phi gK.
    Its variance (Box, Jenkins and Reinsel, eq. 3.2.28) is
    sigma_y^2 = (1 - a2) / ((1 + a2)((1 - a2)^2 - a1^2)) sigma_a^2, and with d = 1 the minimum
    variance is sigma_a^2 (psi_0 = 1), so the Harris index is
    (1 + a2)((1 - a2)^2 - a1^2) / (1 - a2) = 1.4 x 0.27 / 0.6 = 0.63 here. Estimated from 40,000 samples:
    within 0.02 (the standard error of a variance ratio over 40,000 samples is about 0.01).
    """
    phi, gk = 0.8, 0.5
    a1, a2 = phi - gk, phi * gk
    expect = (1 + a2) * ((1 - a2) ** 2 - a1 ** 2) / (1 - a2)
    assert expect == pytest.approx(0.63, abs=1e-12)
    y = _p_control(phi, gk, 1, 40000, seed=11)
    h = harris_index(y, 1)
    assert h.harris_index == pytest.approx(expect, abs=0.02)
    assert h.eta == pytest.approx(1 - h.harris_index)


def test_closed_form_delay_three():
    """d = 3, same disturbance, gK = 0.3: closed loop y = a / ((1 - phi q^-1)(1 + gK q^-3)).
    The first three impulse-response terms are 1, phi, phi^2 (the feedback enters at lag 3), so
    sigma_mv^2 = 1 + phi^2 + phi^4; sigma_y^2 is the sum of the squared impulse response
    (Harris 1989, eq. for sigma_mv^2; the sum taken to 4,000 terms, converged to 1e-12).
    Estimate within 0.02 of the exact index."""
    phi, gk, d = 0.8, 0.3, 3
    imp = np.zeros(4000)
    imp[0] = 1.0
    psi = lfilter([1.0], np.convolve([1.0, -phi], [1.0, 0.0, 0.0, gk]), imp)
    expect = (1 + phi ** 2 + phi ** 4) / float(psi @ psi)
    y = _p_control(phi, gk, d, 40000, seed=12)
    assert harris_index(y, d).harris_index == pytest.approx(expect, abs=0.02)


@pytest.mark.parametrize("d", [1, 2, 4])
def test_minimum_variance_controller_index_near_one(d):
    """Under the minimum-variance controller u_t = -phi^d (y_t - g u_{t-d}) / g (Harris 1989;
    the d-step prediction of an AR(1) disturbance set to zero) the output is the MA(d-1) process
    sum_{i<d} phi^i a_{t-i}: the index is 1 in theory; estimated >= 0.95."""
    phi, g, n = 0.9, 2.0, 30000
    rng = np.random.default_rng(20 + d)
    a = rng.standard_normal(n)
    y = np.zeros(n)
    u = np.zeros(n)
    noise = 0.0
    for t in range(n):
        noise = phi * noise + a[t]
        past = u[t - d] if t >= d else 0.0
        y[t] = g * past + noise
        u[t] = -phi ** d * (y[t] - g * past) / g
    h = harris_index(y, d)
    assert h.harris_index >= 0.95


@pytest.mark.parametrize("criterion", ["aic", "bic"])
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_ar_fit_matches_statsmodels(criterion, seed):
    """Order chosen, coefficients and residual variance agree with statsmodels' ar_select_order
    and AutoReg (no trend, the same samples held back) to 1e-8."""
    rng = np.random.default_rng(seed)
    y = lfilter([1.0, 0.4], [1.0, -1.3, 0.6, -0.1], rng.standard_normal(3000)) + 5.0
    ours = fit_ar(y, 15, criterion)
    z = y - y.mean()
    sel = ar_select_order(z, 15, ic=criterion, trend="n")
    assert ours.order == max(sel.ar_lags)
    ref = AutoReg(z, lags=ours.order, trend="n", hold_back=15).fit()
    np.testing.assert_allclose(ours.coefficients, ref.params, rtol=1e-8, atol=1e-10)
    assert ours.sigma2 == pytest.approx(ref.sigma2, rel=1e-8)


def test_impulse_response_of_ar1():
    """1/(1 - phi q^-1) has psi_i = phi^i (closed form)."""
    np.testing.assert_allclose(impulse_response(np.array([0.7]), 6), 0.7 ** np.arange(6), rtol=1e-14)


def test_delay_samples():
    """d = floor(theta / ts) + 1: the hold adds one sample (common practice, Harris 1989)."""
    assert delay_samples(0.0, 1.0) == 1
    assert delay_samples(3.0, 1.0) == 4
    assert delay_samples(3.5, 1.0) == 4
    assert delay_samples(10.0, 5.0) == 3


def test_too_short_record_is_refused():
    """An AR fit needs at least ten samples per order tried."""
    with pytest.raises(ValueError, match="too few"):
        fit_ar(np.random.default_rng(0).standard_normal(100), 30)
