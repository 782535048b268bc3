"""Checks and starting values of identification from records.

Residual and data statistics (spike removal by the Hampel identifier [1]_, fit %, the
Ljung-Box whiteness test [2]_, the correlation of residuals with past input [3]_) and the
start of every fit: the step response of a least-squares ARX model and Smith's two-point
method [4]_ on it. Used by :mod:`.identify`, which documents the procedure.

References
----------
.. [1] R. K. Pearson, Outliers in process modeling and identification, IEEE Trans.
   Control Systems Technology 10(1), 2002 (the Hampel identifier).
.. [2] G. M. Ljung and G. E. P. Box, On a measure of lack of fit in time series models,
   Biometrika 65(2), 1978.
.. [3] L. Ljung, System Identification: Theory for the User, 2nd ed., Prentice Hall,
   1999, sec. 16.6 (residual analysis).
.. [4] C. L. Smith, Digital Computer Process Control, Intext, 1972 (two-point method,
   28.3 % and 63.2 % of the final value).
"""

from __future__ import annotations

import math

import numpy as np

from .oefit import _lfilter

LAGS = 20


def hampel(x: np.ndarray, window: int = 7, sigmas: float = 5.0) -> tuple[np.ndarray, np.ndarray]:
    """Spikes replaced by the local median (Hampel identifier).

    Parameters
    ----------
    x : ndarray
        Samples. [%]
    window : int
        Odd window length. [-]
    sigmas : float
        Threshold in robust standard deviations of the noise (1.4826 x the median
        absolute deviation of the first differences, divided by sqrt 2). [-]

    Returns
    -------
    tuple of ndarray
        The cleaned samples [%] and a boolean mask of the spikes.
    """
    from scipy.ndimage import median_filter
    med = median_filter(x, size=window, mode="nearest")
    dev = np.abs(x - med)
    dx = np.diff(x)
    s = 1.4826 * float(np.median(np.abs(dx - np.median(dx)))) / math.sqrt(2)
    if s <= 0:
        s = 1.4826 * float(np.median(dev)) or 1e-12
    spikes = dev > sigmas * s
    out = np.where(spikes, med, x)
    return out, spikes


def nrmse_fit(y: np.ndarray, yhat: np.ndarray) -> float:
    """Fit % = 100 (1 - ||y - yhat|| / ||y - mean(y)||) (normalised root-mean-square error). [%]

    Parameters
    ----------
    y : ndarray
        Measured pv. [%]
    yhat : ndarray
        Simulated pv. [%]
    """
    den = float(np.linalg.norm(y - np.mean(y)))
    return 100.0 * (1.0 - float(np.linalg.norm(y - yhat)) / den) if den > 0 else float("nan")


def ljung_box_p(e: np.ndarray, lags: int = LAGS) -> float:
    """p-value of the Ljung-Box statistic Q = N(N+2) sum r_k^2/(N-k), k = 1..lags, against chi2(lags). [-]

    Parameters
    ----------
    e : ndarray
        Residuals. [%]
    lags : int
        Number of autocorrelations. [-]
    """
    r = _acf(e, lags)
    n = len(e)
    q = n * (n + 2) * float(np.sum(r[1:] ** 2 / (n - np.arange(1, lags + 1))))
    from scipy import special  # scipy when first needed: a run without plant data never loads it
    return float(special.chdtrc(lags, q))


def _acf(e: np.ndarray, lags: int) -> np.ndarray:
    """Sample autocorrelation r_0..r_lags (biased estimator, divided by n c_0); direct sums, O(N lags)."""
    e = e - e.mean()
    n = len(e)
    c0 = float(np.dot(e, e))
    if c0 <= 0:
        return np.zeros(lags + 1)
    return np.array([c0] + [float(np.dot(e[k:], e[:n - k])) for k in range(1, lags + 1)]) / c0


def _xcorr_past(e: np.ndarray, u: np.ndarray, lags: int) -> float:
    e = e - e.mean()
    u = u - u.mean()
    den = math.sqrt(float(np.dot(e, e)) * float(np.dot(u, u)))
    if den <= 0:
        return 0.0
    n = len(e)
    return max(abs(float(np.dot(e[k:], u[:n - k]))) / den for k in range(lags + 1))


def _lsq(X: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Small linear least squares by scaled normal equations (columns few, rows many)."""
    sc = np.sqrt(np.einsum("ij,ij->j", X, X))
    sc[sc == 0] = 1.0
    Xs = X / sc
    try:
        return np.linalg.solve(Xs.T @ Xs, Xs.T @ y) / sc
    except np.linalg.LinAlgError:
        return np.linalg.lstsq(X, y, rcond=None)[0]



def step_estimate(op: np.ndarray, pv: np.ndarray, dt: float, points: int = 400) -> tuple[np.ndarray, float]:
    """Step response of pv to op from a second-order ARX model fitted by least squares.

    The data are block-averaged to about ``points`` samples; for every whole delay of
    0 to a third of the record, y[k] = -a1 y[k-1] - a2 y[k-2] + b1 u[k-nk] + b2 u[k-nk-1] + c
    is fitted by linear least squares; the stable fit whose simulation (driven by op
    alone) errs least wins and its model's unit step response is returned (a start only: ARX estimates are biased
    by output noise) [2]_ (module references).

    Parameters
    ----------
    op, pv : ndarray
        Input and output. [%]
    dt : float
        Sample interval. [s]
    points : int
        Samples after averaging. [-]

    Returns
    -------
    tuple of (ndarray, float)
        Unit step response at the averaged spacing, over the record's length [-], and
        that spacing [s].
    """
    n = len(op)
    q = max(1, n // points)
    m = n // q
    u = op[:m * q].reshape(m, q).mean(axis=1) - op[0]
    y = pv[:m * q].reshape(m, q).mean(axis=1)
    yc = y - y[0]
    top = max(m // 3, 2)
    delays = np.unique(np.concatenate([np.arange(min(top, 24)), np.geomspace(24, max(top, 25), 24).astype(int)]))
    delays = delays[(delays < top) & (m - delays - 2 >= 10)]
    if not len(delays):
        return np.zeros(max(m, 2)), q * dt
    # every delay's least squares at once: rows before a delay's first usable sample are zero
    k = np.arange(m)
    rows = (k[None, :] >= delays[:, None] + 2).astype(float)
    y1, y2 = np.concatenate([[0.0], y[:-1]]), np.concatenate([[0.0, 0.0], y[:-2]])
    i0 = np.clip(k[None, :] - delays[:, None], 0, m - 1)
    i1 = np.clip(i0 - 1, 0, m - 1)
    X = np.empty((len(delays), m, 5))
    X[:, :, 0], X[:, :, 1], X[:, :, 2], X[:, :, 3], X[:, :, 4] = -y1, -y2, u[i0], u[i1], 1.0
    X *= rows[:, :, None]
    Xt = X.transpose(0, 2, 1)
    G = Xt @ X
    h = (Xt @ (y[None, :] * rows)[:, :, None])[:, :, 0]
    sc = np.sqrt(np.maximum(np.diagonal(G, axis1=1, axis2=2), 1e-300))
    try:
        coefs = np.linalg.solve(G / sc[:, :, None] / sc[:, None, :], (h / sc)[:, :, None])[:, :, 0] / sc
    except np.linalg.LinAlgError:
        coefs = np.array([_lsq(X[j][rows[j] > 0], y[rows[j] > 0]) for j in range(len(delays))])
    # stable fits only, judged by their simulation error (the one-step error hardly sees the input)
    disc = np.sqrt((coefs[:, 0] * coefs[:, 0] - 4.0 * coefs[:, 1]).astype(complex))
    radius = np.maximum(np.abs((-coefs[:, 0] + disc) / 2.0), np.abs((-coefs[:, 0] - disc) / 2.0))
    keep = np.flatnonzero(radius <= 1.0 + 1e-9)
    best = None
    if len(keep):
        sims = np.zeros((len(keep), m))
        for j, i in enumerate(keep):
            nk = int(delays[i])
            sims[j, nk:] = _lfilter(np.ascontiguousarray(coefs[i, 2:4]), np.array([1.0, coefs[i, 0], coefs[i, 1]]),
                                    u[:m - nk])
        sm = sims - sims.mean(axis=1, keepdims=True)
        ss = np.einsum("ij,ij->i", sm, sm)
        yz = yc - yc.mean()
        g = np.where(ss > 0, (sm @ yz) / np.where(ss > 0, ss, 1.0), 0.0)
        e = yz[None, :] - g[:, None] * sm
        r = np.einsum("ij,ij->i", e, e)
        r = np.where(np.isnan(r), np.inf, r)
        j = int(np.argmin(r))                # the first of equals, as a strict "<" in order of delays
        best = (float(r[j]), int(delays[keep[j]]), coefs[keep[j]])
    if best is None:
        return np.zeros(max(m, 2)), q * dt
    _, nk, c = best
    a = np.array([1.0, c[0], c[1]])
    bb = np.concatenate([np.zeros(nk), [c[2], c[3]]])
    if _pole_radius(a) >= 1.0:      # an unstable ARX fit: integrating, or noise
        return np.arange(1, m + 1) * (c[2] + c[3]), q * dt
    from scipy import signal
    return signal.lfilter(bb, a, np.ones(m)), q * dt


def _pole_radius(a: np.ndarray) -> float:
    """Largest |root| of z^2 + a[1] z + a[2] (closed form). [-]"""
    disc = complex(a[1] * a[1] - 4.0 * a[2]) ** 0.5
    return max(abs((-a[1] + disc) / 2.0), abs((-a[1] - disc) / 2.0))


def two_point(step: np.ndarray, h: float) -> tuple[float, float, float]:
    """Smith's two-point method on a unit step response: (gain [-], tau1 [s], dead time [s]).

    Parameters
    ----------
    step : ndarray
        Unit step response sampled every ``h``, starting at the step. [-]
    h : float
        Spacing. [s]

    Notes
    -----
    Gain is the final value (mean of the last fifth); t28 and t63 are where the
    response first reaches 28.3 % and 63.2 % of it (linear interpolation);
    tau1 = 1.5 (t63 - t28), theta = t63 - tau1 [1]_ (module references).
    """
    k = float(np.mean(step[-max(len(step) // 5, 1):]))
    if k == 0 or not np.isfinite(k):
        return 0.0, 5 * h, h
    r = step / k
    t = np.arange(len(step)) * h

    def cross(level):
        idx = np.flatnonzero(r >= level)
        if not len(idx):
            return t[-1]
        i = int(idx[0])
        if i == 0:
            return t[0] * level / max(r[0], 1e-9)
        return t[i - 1] + (level - r[i - 1]) / (r[i] - r[i - 1]) * h
    t28, t63 = cross(0.283), cross(0.632)
    tau = max(1.5 * (t63 - t28), 0.5 * h)
    theta = max(t63 - tau, 0.0)
    return k, tau, theta
