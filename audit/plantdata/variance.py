"""Minimum-variance benchmark: the Harris index from routine closed-loop data.

Under any linear controller the control error of a loop whose process has a delay of d
samples (control move at t first seen in the output at t + d) can be written as
e_t = psi_0 a_t + psi_1 a_{t-1} + ... with a_t white. The first d terms cannot be changed by any
controller; the minimum achievable variance is sigma_mv^2 = sigma_a^2 (psi_0^2 + ... +
psi_{d-1}^2) [1]_. Fitting an autoregressive model 1/A(q) to the error gives sigma_a^2 and the
psi's (the impulse response of 1/A); the **Harris index** reported here is

    harris_index = sigma_mv^2 / sigma_e^2   (1: minimum variance, towards 0: far from it),

the normalised performance index of Desborough and Harris being eta = 1 - harris_index [2]_.

The AR order is chosen by an information criterion (AIC or BIC) over 1..max_order, every order
fitted by least squares on the same samples (the first max_order held back), so that the
criteria compare like with like. All orders come from one Cholesky factor of the lagged Gram
matrix, itself built from the lagged products sum_t z_t z_{t-k} (k <= p) with exact end
corrections: the cost is O(N p + p^3).

References
----------
.. [1] T. J. Harris, "Assessment of control loop performance", Canadian Journal of Chemical
   Engineering 67 (1989) 856-861.
.. [2] L. Desborough and T. Harris, "Performance assessment measures for univariate feedback
   control", Canadian Journal of Chemical Engineering 70 (1992) 1186-1197 (eta = 1 -
   sigma_mv^2 / sigma_y^2, estimated from the AR fit).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Largest AR order tried. [-]
MAX_ORDER = 30


@dataclass(frozen=True)
class ArFit:
    """Least-squares autoregressive fit of a zero-mean series, y_t = sum_i a_i y_{t-i} + eps_t.

    Attributes
    ----------
    order : int
        Chosen order p. [-]
    coefficients : ndarray
        a_1 .. a_p. [-]
    sigma2 : float
        Residual variance, sum of squared residuals / number of residuals. [signal^2]
    criterion : str
        ``aic`` or ``bic``.
    scores : ndarray
        The criterion for orders 1 .. max_order (n log sigma2_p + penalty x p). [-]
    nobs : int
        Residuals in each fit (samples less max_order). [-]
    """

    order: int
    coefficients: np.ndarray
    sigma2: float
    criterion: str
    scores: np.ndarray
    nobs: int


@dataclass(frozen=True)
class HarrisIndex:
    """Minimum-variance benchmark of one loop.

    Attributes
    ----------
    harris_index : float
        sigma_mv^2 / sigma_e^2 in [0, 1]: 1 at minimum variance. [-]
    eta : float
        Desborough and Harris's eta = 1 - harris_index. [-]
    error_var : float
        Variance of the control error (mean removed). [(% of range)^2]
    mv_var : float
        Minimum-variance estimate sigma_mv^2. [(% of range)^2]
    delay_samples : int
        Delay d used (dead time over the sample interval, plus the hold's sample). [-]
    ar_order : int
        AR order chosen. [-]
    """

    harris_index: float
    eta: float
    error_var: float
    mv_var: float
    delay_samples: int
    ar_order: int


def _gram(z: np.ndarray, p: int) -> np.ndarray:
    """Gram matrix of the columns [y_{t-1}, ..., y_{t-p}, y_t] over t = p .. n-1 (exact)."""
    n = z.size
    # s[k] = sum_{t>=k} z_t z_{t-k}; einsum, not BLAS: its threads only contend on a busy machine
    s = np.array([float(np.einsum("i,i->", z[k:], z[: n - k])) for k in range(p + 1)])
    g = np.empty((p + 1, p + 1))
    # columns: lags 1..p, then lag 0 (y_t itself)
    lags = np.concatenate((np.arange(1, p + 1), [0]))
    for a in range(p + 1):
        for b in range(a, p + 1):
            la, lb = lags[a], lags[b]
            lo, hi = min(la, lb), max(la, lb)
            k = hi - lo
            # sum over t = p..n-1 of z_{t-lo} z_{t-hi}; with s = t - lo: s = p-lo .. n-1-lo
            total = s[k]                                   # s = k .. n-1
            start, stop = p - lo, n - 1 - lo
            head = np.dot(z[k:start], z[0:start - k]) if start > k else 0.0
            tail = np.dot(z[stop + 1:n], z[stop + 1 - k:n - k]) if stop + 1 < n else 0.0
            g[a, b] = g[b, a] = total - head - tail
    return g


def fit_ar(y: np.ndarray, max_order: int = MAX_ORDER, criterion: str = "aic") -> ArFit:
    """Autoregressive model of a series, order chosen by AIC or BIC.

    Parameters
    ----------
    y : ndarray
        Series, uniformly sampled, no NaN; its mean is removed. [any]
    max_order : int
        Largest order tried. [-]
    criterion : str
        ``aic`` (penalty 2 per coefficient, Akaike 1974) or ``bic`` (penalty ln n, Schwarz
        1978).

    Returns
    -------
    ArFit

    Raises
    ------
    ValueError
        For an unknown criterion, fewer than ``10 * max_order`` samples, or a degenerate series.

    Notes
    -----
    Least squares on t = max_order .. n-1 for every order, as statsmodels' ``ar_select_order``
    does (it holds back the same samples), so that the orders are compared on one sample.
    """
    if criterion not in ("aic", "bic"):
        raise ValueError(f"criterion must be 'aic' or 'bic', got {criterion!r}")
    z = np.asarray(y, dtype=float)
    z = z - z.mean()
    p = int(max_order)
    if z.size < 10 * p:
        raise ValueError(f"{z.size} samples are too few for AR orders up to {p} (need {10 * p})")
    from scipy import linalg as _la  # scipy when first needed: a run without plant data never loads it
    g = _gram(z, p)
    scale = max(float(np.trace(g)) / (p + 1), 1e-300)
    for jitter in (0.0, 1e-12, 1e-10, 1e-8, 1e-6):   # a perfectly predictable series is singular
        try:
            r = _la.cholesky(g / scale + jitter * np.eye(p + 1), lower=False) * math.sqrt(scale)
            break
        except np.linalg.LinAlgError:
            continue
    else:
        raise ValueError("the series is constant or degenerate: no AR model")
    nobs = z.size - p
    ssr = np.array([float(np.sum(r[k:, -1] ** 2)) for k in range(1, p + 1)])   # orders 1..p
    sigma2 = ssr / nobs
    pen = 2.0 if criterion == "aic" else math.log(nobs)
    scores = nobs * np.log(np.maximum(sigma2, 1e-300)) + pen * np.arange(1, p + 1)
    k = int(np.argmin(scores)) + 1
    coef = _la.solve_triangular(r[:k, :k], r[:k, -1])
    return ArFit(k, coef, float(sigma2[k - 1]), criterion, scores, nobs)


def impulse_response(coefficients: np.ndarray, n: int) -> np.ndarray:
    """First ``n`` coefficients psi_0 .. psi_{n-1} of 1 / (1 - a_1 q^-1 - ... - a_p q^-p).

    Parameters
    ----------
    coefficients : ndarray
        AR coefficients a_1 .. a_p. [-]
    n : int
        Number of coefficients wanted. [-]

    Returns
    -------
    ndarray
        psi_0 = 1, psi_1, ... [-]
    """
    a = np.concatenate(([1.0], -np.asarray(coefficients, dtype=float)))
    imp = np.zeros(n)
    imp[0] = 1.0
    from scipy import signal as _sig
    return _sig.lfilter([1.0], a, imp)


def delay_samples(dead_time_s: float, ts: float) -> int:
    """Delay d in samples of a sampled loop: floor(dead time / ts) + 1 (the hold adds one).

    Parameters
    ----------
    dead_time_s : float
        Process dead time. [s]
    ts : float
        Sample interval. [s]

    Returns
    -------
    int
        d >= 1. [-]
    """
    return int(math.floor(max(dead_time_s, 0.0) / ts + 1e-9)) + 1


def harris_index(e: np.ndarray, d: int, *, max_order: int = MAX_ORDER, criterion: str = "aic"
                 ) -> HarrisIndex:
    """Harris index of a closed-loop control error for a loop delay of ``d`` samples.

    Parameters
    ----------
    e : ndarray
        Control error of one uniformly sampled segment in automatic, no NaN. [% of range]
    d : int
        Delay in samples from a control move to the first change in the error (>= 1), e.g.
        :func:`delay_samples`. [-]
    max_order : int
        Largest AR order tried. [-]
    criterion : str
        ``aic`` or ``bic`` for the AR order.

    Returns
    -------
    HarrisIndex

    References
    ----------
    .. [1] T. J. Harris, Can. J. Chem. Eng. 67 (1989) 856-861.
    .. [2] L. Desborough and T. Harris, Can. J. Chem. Eng. 70 (1992) 1186-1197.
    """
    d = max(int(d), 1)
    z = np.asarray(e, dtype=float)
    z = z - z.mean()
    var = float(np.einsum("i,i->", z, z)) / z.size
    if var <= 0:
        return HarrisIndex(math.nan, math.nan, 0.0, 0.0, d, 0)
    fit = fit_ar(z, max_order, criterion)
    psi = impulse_response(fit.coefficients, d)
    mv = fit.sigma2 * float(psi @ psi)
    h = min(1.0, mv / var)
    return HarrisIndex(h, 1.0 - h, var, mv, d, fit.order)
