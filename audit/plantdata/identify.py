"""Process models identified from logged plant data (output-error least squares).

A record's logged ``op`` drives the model; the model's output is compared with the
logged ``pv`` (both in % of range). Three structures are fitted:

==========  ====================================================  =======================
model       transfer function (pv/op)                              parameters
==========  ====================================================  =======================
fopdt       K e^{-theta s} / (tau1 s + 1)                           K [-], tau1 [s], theta [s]
sopdt       K (tau_lead s + 1) e^{-theta s} / ((tau1 s+1)(tau2 s+1))  K, tau1, tau2, tau_lead, theta
ipdt        K e^{-theta s} / s                                      K [1/s], theta [s]
==========  ====================================================  =======================

plus a bias (the pv at rest) and, for ipdt, the op at which pv stands still.

Simulation
----------
The logged op is held between samples (zero-order hold: a controller's output is held
between executions). The dead time is continuous: with theta = (d + f) dt, the delayed
input over a sample interval is u[k-d-1] for the first f dt and u[k-d] for the rest,
and the delay-free part is discretised exactly over each part (matrix exponential of
the augmented system), giving a difference equation run by :func:`scipy.signal.lfilter`
(no Python loop over samples). The record is taken to start at rest (op and pv steady
before the first sample).

Fitting
-------
1. Data checks: ``pv`` and ``op`` needed; spikes in pv replaced by the Hampel
   identifier [4]_ (window 7, 6 robust sigmas) and counted; the excitation test
   (:func:`excitation`): op must move by at least ``min_op_move_pct`` (robust range,
   0.5th to 99.5th percentile, default 1 % of range), and must not sit at 0 or 100 %
   for most of the record; otherwise no model is returned and the note says why.
2. Start: a step response estimated by least squares (a second-order ARX model on
   block-averaged data, the best whole-sample delay), then the two-point method of Smith [1]_
   (28.3 % and 63.2 % of the final value: tau1 = 1.5 (t63 - t28), theta = t63 - tau1);
   for ipdt the slope and intercept of the estimated ramp.
3. Refinement: :func:`scipy.optimize.least_squares` (trust region reflective) on the
   output error (records over 2,000 samples: first on every q-th sample, about 1,000 of
   them, then on all samples from that optimum), with the linear parameters (gain, bias, balance) eliminated by
   linear least squares at each step (variable projection [3]_); a few extra starts
   around the first guard against a local minimum in the dead time (tried only while the fit
   is below 90 %, every start for sopdt); tolerances 1e-7 on cost, step and gradient.
4. Confidence intervals, 95 %: from the Jacobian of all parameters at the optimum,
   cov = s^2 (J^T J)^-1 with s^2 = RSS/(N - p), multiplied by the variance-inflation
   factor (1 + r1)/(1 - r1) of AR(1)-correlated residuals (r1: lag-1 residual
   autocorrelation, applied only when r1 > 2/sqrt(N), i.e. significant), t quantile with N_eff - p degrees of freedom,
   N_eff = N (1 - r1)/(1 + r1) [5]_.
5. Fit %: 100 (1 - ||y - yhat|| / ||y - mean(y)||) (normalised root-mean-square error).
   Held-out fit: of the first and the last 30 % of the record, the block in which the
   model's output moves more is held out; the model is re-fitted on the rest (simulated
   over the whole record, scored on the rest) and its fit % on the held-out block is
   reported.
6. Residual checks [2]_: whiteness by the Ljung-Box statistic over 20 lags
   (p > 0.01: white); correlation with past inputs (lags 0..20) against the 99 % bound
   2.58/sqrt(N).
   A sopdt whose lead's interval holds 0 is refitted with the lead fixed at 0 (lead and dead
   time trade off at low frequency, so a free lead would blur the dead time).
7. Model selection by the Bayesian information criterion on the effective sample size,
   BIC = N_eff ln(RSS/N) + p ln(N_eff); a more complex model (sopdt) is chosen only when it
   lowers the BIC by more than ``bic_margin`` (default 10, "very strong" evidence in the
   scale of Kass and Raftery [6]_); otherwise the simpler one (fopdt, or ipdt) stands.
8. A model is refused ("not identifiable") when its fit % is below ``min_fit_pct``
   (default 30 %) or the 95 % interval of its gain is wider than its gain
   (half-width > |K|).

Closed-loop records work the same way (the logged op is the input). With noise fed
back through the controller, output-error estimates carry a bias of the order of the
noise-to-signal ratio; set-point changes excite the loop from outside and reduce it.

References
----------
.. [1] C. L. Smith, Digital Computer Process Control, Intext, 1972 (two-point method,
   28.3 % and 63.2 % of the final value).
.. [2] L. Ljung, System Identification: Theory for the User, 2nd ed., Prentice Hall,
   1999, sec. 16.6 (residual analysis).
.. [3] G. H. Golub and V. Pereyra, The differentiation of pseudo-inverses and nonlinear
   least squares problems whose variables separate, SIAM J. Numer. Anal. 10(2), 1973.
.. [4] R. K. Pearson, Outliers in process modeling and identification, IEEE Trans.
   Control Systems Technology 10(1), 2002 (the Hampel identifier).
.. [5] H. von Storch and F. W. Zwiers, Statistical Analysis in Climate Research,
   Cambridge, 1999, sec. 6.6 (effective sample size of AR(1) data).
.. [6] R. E. Kass and A. E. Raftery, Bayes factors, J. Amer. Statist. Assoc. 90, 1995.
.. [7] G. M. Ljung and G. E. P. Box, On a measure of lack of fit in time series models,
   Biometrika 65(2), 1978.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Mapping, Sequence

import numpy as np
from scipy import optimize, signal, stats

from .records import Record, Segment

MODELS = ("fopdt", "sopdt", "ipdt")
PARAMS = {"fopdt": ("gain", "tau1", "dead_time"),
          "sopdt": ("gain", "tau1", "tau2", "tau_lead", "dead_time"),
          "ipdt": ("gain", "dead_time"),
          "sopdt0": ("gain", "tau1", "tau2", "dead_time")}     # sopdt with the lead fixed at 0 (internal)
UNITS = {"gain": "-", "tau1": "s", "tau2": "s", "tau_lead": "s", "dead_time": "s"}
LAGS = 20
COARSE_POINTS = 1000      # records longer than twice this are searched on every q-th sample first


@dataclass(frozen=True)
class IdentifyPolicy:
    """Settings of identification.

    Attributes
    ----------
    min_op_move_pct : float
        Smallest robust range of op (0.5th to 99.5th percentile) that counts as excitation. [%]
    max_limited_share : float
        Largest share of samples with op at 0 or 100 % (within 0.5 %). [-]
    min_fit_pct : float
        Smallest fit % for a model to be returned. [%]
    bic_margin : float
        BIC decrease a more complex model must bring to be chosen. [-]
    holdout : float
        Share of the record held out for validation (its first or last part). [-]
    spike_sigmas : float
        Hampel identifier threshold in robust standard deviations. [-]
    models : tuple of str
        Structures tried.
    """

    min_op_move_pct: float = 1.0
    max_limited_share: float = 0.5
    min_fit_pct: float = 30.0
    bic_margin: float = 10.0
    holdout: float = 0.3
    spike_sigmas: float = 6.0
    models: tuple[str, ...] = MODELS


@dataclass(frozen=True)
class Fit:
    """One fitted structure.

    Attributes
    ----------
    model : str
        'fopdt', 'sopdt' or 'ipdt'.
    params : Mapping[str, float]
        Gain [-] (ipdt: [1/s]), time constants and dead time [s].
    ci95 : Mapping[str, float]
        Half-widths of the 95 % confidence intervals, same units as ``params``.
    bias : float
        pv at rest. [%]
    fit_pct : float
        100 (1 - ||y - yhat|| / ||y - mean y||) on the whole record. [%]
    fit_holdout_pct : float
        Fit % on the held-out block (first or last ``holdout`` share) of a model fitted on the
        rest; NaN when not computed (computed for the chosen structure only). [%]
    rss : float
        Residual sum of squares. [%^2]
    bic : float
        Information criterion on the effective sample size. [-]
    n_eff : float
        Effective number of independent residuals. [-]
    residual_lb_p : float
        Ljung-Box p-value of the residuals over 20 lags (small: not white). [-]
    residual_input_corr : float
        Largest |correlation| of the residuals with past op (lags 0..20). [-]
    yhat : ndarray
        Simulated pv. [%]
    """

    model: str
    params: Mapping[str, float]
    ci95: Mapping[str, float]
    bias: float
    fit_pct: float
    fit_holdout_pct: float
    rss: float
    bic: float
    n_eff: float
    residual_lb_p: float
    residual_input_corr: float
    yhat: np.ndarray = field(repr=False)

    @property
    def residual_white(self) -> bool:
        """True when the Ljung-Box test does not reject whiteness at 1 %."""
        return bool(self.residual_lb_p > 0.01)

    def corr_bound(self, n: int) -> float:
        """99 % bound 2.58/sqrt(n) of a residual-input correlation of ``n`` samples. [-]"""
        return 2.58 / math.sqrt(max(n, 1))


@dataclass(frozen=True)
class Identification:
    """What a record says about the process.

    Attributes
    ----------
    name : str
        The record.
    best : Fit or None
        The model the data support; None when nothing could be identified.
    fits : Mapping[str, Fit]
        Every structure fitted, by name.
    notes : tuple of str
        Data notes (from the reader and from the checks) and the reason when ``best`` is None.
    identifiable : bool
        False when the data did not allow a model.
    t : ndarray
        Time of the samples used. [s]
    pv, op : ndarray
        Data used (pv after spike removal). [%]
    dt : float
        Sample interval. [s]
    segment_lines : tuple of int
        First and last line of the segment used.
    """

    name: str
    best: Fit | None
    fits: Mapping[str, Fit]
    notes: tuple[str, ...]
    identifiable: bool
    t: np.ndarray = field(repr=False)
    pv: np.ndarray = field(repr=False)
    op: np.ndarray = field(repr=False)
    dt: float = float("nan")
    segment_lines: tuple[int, int] = (0, 0)


@dataclass(frozen=True)
class Excitation:
    """Whether the input moved enough.

    Attributes
    ----------
    ok : bool
        True when identification may proceed.
    op_move_pct : float
        Robust range of op (0.5th to 99.5th percentile). [%]
    limited_share : float
        Share of samples with op within 0.5 % of 0 or 100 %. [-]
    reason : str
        Why not, '' when ok.
    """

    ok: bool
    op_move_pct: float
    limited_share: float
    reason: str = ""


# --------------------------------------------------------------------------- simulation

def _modes(model: str, shape: Sequence[float]) -> list[tuple[float, float]]:
    """Unit-gain model as a sum of first-order modes (time constant [s], weight [-]); tau = inf: integrator."""
    if model == "fopdt":
        return [(shape[0], 1.0)]
    if model == "ipdt":
        return [(math.inf, 1.0)]
    t1, t2, ta = shape
    if abs(t1 - t2) < 1e-4 * max(t1, t2):        # repeated pole: split it slightly (relative error ~1e-12)
        t2 = t1 * (1.0 - 1e-4)
    return [(t1, (t1 - ta) / (t1 - t2)), (t2, (ta - t2) / (t1 - t2))]


def discretise(model: str, shape: Sequence[float], dead_time: float, dt: float) -> tuple[np.ndarray, np.ndarray]:
    """Exact difference equation of a unit-gain model with a held input and a continuous dead time.

    Parameters
    ----------
    model : str
        'fopdt', 'sopdt' or 'ipdt'.
    shape : sequence of float
        fopdt: (tau1,); sopdt: (tau1, tau2, tau_lead); ipdt: (). [s]
    dead_time : float
        Dead time, not necessarily a whole number of samples. [s]
    dt : float
        Sample interval. [s]

    Returns
    -------
    tuple of ndarray
        Numerator and denominator in powers of z^-1 for :func:`scipy.signal.lfilter`
        (output at sample k from inputs up to sample k).

    Notes
    -----
    With theta = (d + f) dt, a mode x' = (-x + w v)/tau driven by the delayed held input
    gives x[k+1] = a x[k] + w (1 - c) u[k-d] + w (c - a) u[k-d-1], a = e^{-dt/tau},
    c = e^{-(1-f) dt/tau} (integrator: x[k+1] = x[k] + w (1-f) dt u[k-d] + w f dt u[k-d-1]).
    The modes (partial fractions) are summed over a common denominator.
    """
    d, num, den = _difference(model, shape, dead_time, dt)
    return np.concatenate([np.zeros(d), num]), den


def _difference(model: str, shape: Sequence[float], dead_time: float, dt: float
                ) -> tuple[int, np.ndarray, np.ndarray]:
    """(whole-sample delay d, numerator, denominator): the delay kept apart for speed."""
    q = dead_time / dt
    d = int(math.floor(q + 1e-12))
    f = min(max(q - d, 0.0), 1.0)
    num = np.zeros(1)
    den = np.ones(1)
    for tau, w in _modes(model, shape):
        if math.isinf(tau):
            a, g2, g1 = 1.0, w * (1.0 - f) * dt, w * f * dt
        else:
            a = math.exp(-dt / tau)
            c = math.exp(-(1.0 - f) * dt / tau)
            g2, g1 = w * (1.0 - c), w * (c - a)
        bm, am = np.array([0.0, g2, g1]), np.array([1.0, -a])
        if len(den) > 1:
            x1, x2 = np.convolve(num, am), np.convolve(bm, den)
            m = max(len(x1), len(x2))
            num = np.pad(x1, (0, m - len(x1))) + np.pad(x2, (0, m - len(x2)))
        else:
            num = bm
        den = np.convolve(den, am)
    return d, num, den


def _run(model: str, shape: Sequence[float], dead_time: float, dt: float, u: np.ndarray) -> np.ndarray:
    """Unit-gain response to ``u`` (deviation, zero before the record): delay line, then the filter."""
    d, num, den = _difference(model, shape, dead_time, dt)
    if d >= len(u):
        return np.zeros(len(u))
    if d:
        u = np.concatenate([np.zeros(d), u[:len(u) - d]])
    return signal.lfilter(num, den, u)


def simulate(model: str, params: Mapping[str, float], op: np.ndarray, dt: float) -> np.ndarray:
    """Response of a model (gain included, no bias) to ``op - op[0]``, from rest.

    Parameters
    ----------
    model : str
        'fopdt', 'sopdt' or 'ipdt'.
    params : Mapping[str, float]
        As in :data:`PARAMS` (gain [-] or [1/s], times [s]).
    op : ndarray
        Input, held between samples. [%]
    dt : float
        Sample interval. [s]

    Returns
    -------
    ndarray
        pv deviation. [%]
    """
    return params["gain"] * _run(model, _shape(model, params), params["dead_time"], dt, op - op[0])


def _shape(model: str, params: Mapping[str, float]) -> tuple[float, ...]:
    if model == "fopdt":
        return (params["tau1"],)
    if model == "sopdt":
        return (params["tau1"], params["tau2"], params["tau_lead"])
    if model == "sopdt0":
        return (params["tau1"], params["tau2"], 0.0)
    return ()


# --------------------------------------------------------------------------- checks

def excitation(op: np.ndarray, policy: IdentifyPolicy = IdentifyPolicy()) -> Excitation:
    """The excitation test: did op move enough, and was it free to move?

    Parameters
    ----------
    op : ndarray
        Controller output. [%]
    policy : IdentifyPolicy
        ``min_op_move_pct`` [%] and ``max_limited_share`` [-] apply.

    Returns
    -------
    Excitation
    """
    lo, hi = np.percentile(op, [0.5, 99.5])
    move = float(hi - lo)
    limited = float(np.mean((op <= 0.5) | (op >= 99.5)))
    if limited > policy.max_limited_share:
        return Excitation(False, move, limited, f"op at its limit (0 or 100 %) for {100 * limited:.0f} % of the "
                                                f"record: the process was not free to respond; not identified")
    if not move >= policy.min_op_move_pct:
        return Excitation(False, move, limited, f"op moved only {move:.3g} % of range (0.5th to 99.5th "
                                                f"percentile), less than {policy.min_op_move_pct:g} %: too little "
                                                f"excitation to identify a model; make a bump of 2-10 %")
    return Excitation(True, move, limited)


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
    return float(stats.chi2.sf(q, lags))


def _acf(e: np.ndarray, lags: int) -> np.ndarray:
    e = e - e.mean()
    n = len(e)
    c0 = float(np.dot(e, e)) / n
    if c0 <= 0:
        return np.zeros(lags + 1)
    m = int(2 ** math.ceil(math.log2(2 * n)))
    F = np.fft.rfft(e, m)
    ac = np.fft.irfft(F * np.conj(F), m)[:lags + 1] / n
    return ac / c0


def _xcorr_past(e: np.ndarray, u: np.ndarray, lags: int) -> float:
    e = e - e.mean()
    u = u - u.mean()
    den = math.sqrt(float(np.dot(e, e)) * float(np.dot(u, u)))
    if den <= 0:
        return 0.0
    n = len(e)
    return max(abs(float(np.dot(e[k:], u[:n - k]))) / den for k in range(lags + 1))


# --------------------------------------------------------------------------- start

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
    best = None
    yc = y - y[0]
    top = max(m // 3, 2)
    delays = np.unique(np.concatenate([np.arange(min(top, 24)), np.geomspace(24, max(top, 25), 24).astype(int)]))
    for nk in delays[delays < top]:
        nk = int(nk)
        k0 = nk + 2
        if m - k0 < 10:
            break
        X = np.column_stack([-y[k0 - 1:m - 1], -y[k0 - 2:m - 2], u[k0 - nk:m - nk], u[k0 - nk - 1:m - nk - 1],
                             np.ones(m - k0)])
        coef = _lsq(X, y[k0:])
        a = np.array([1.0, coef[0], coef[1]])
        if np.any(np.abs(np.roots(a)) > 1.0 + 1e-9):
            continue
        # judged by its simulation error (the one-step error hardly sees the input)
        sim = signal.lfilter(np.concatenate([np.zeros(nk), coef[2:4]]), a, u)
        X2 = np.column_stack([sim, np.ones(m)])
        e = yc - X2 @ _lsq(X2, yc)
        r = float(e @ e)
        if best is None or r < best[0]:
            best = (r, nk, coef)
    if best is None:
        return np.zeros(max(m, 2)), q * dt
    _, nk, c = best
    a = np.array([1.0, c[0], c[1]])
    bb = np.concatenate([np.zeros(nk), [c[2], c[3]]])
    if np.any(np.abs(np.roots(a)) >= 1.0):      # an unstable ARX fit: integrating, or noise
        return np.arange(1, m + 1) * (c[2] + c[3]), q * dt
    return signal.lfilter(bb, a, np.ones(m)), q * dt


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


# --------------------------------------------------------------------------- fitting

def _basis(model: str, s: np.ndarray, t: np.ndarray) -> np.ndarray:
    cols = [np.ones_like(s), s]
    if model == "ipdt":
        cols.append(t)
    return np.column_stack(cols)


def _nl_to_shape(model: str, x: np.ndarray) -> tuple[tuple[float, ...], float]:
    if model == "fopdt":
        return (x[0],), x[1]
    if model == "sopdt":
        return (x[0], x[1], x[2]), x[3]
    if model == "sopdt0":
        return (x[0], x[1], 0.0), x[2]
    return (), x[0]


def _unit_response(model, x, u, dt):
    shape, theta = _nl_to_shape(model, x)
    return _run(model, shape, theta, dt, u)


def _lsq(X: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Small linear least squares by scaled normal equations (columns few, rows many)."""
    sc = np.sqrt(np.einsum("ij,ij->j", X, X))
    sc[sc == 0] = 1.0
    Xs = X / sc
    try:
        return np.linalg.solve(Xs.T @ Xs, Xs.T @ y) / sc
    except np.linalg.LinAlgError:
        return np.linalg.lstsq(X, y, rcond=None)[0]


def _vp_residual(model, x, u, y, t, dt, keep=None):
    s = _unit_response(model, x, u, dt)
    X = _basis(model, s, t)
    if keep is not None:
        X, y = X[keep], y[keep]
    return y - X @ _lsq(X, y)


def _bounds(model: str, dt: float, T: float):
    tmin, tmax = dt / 20.0, 20.0 * T
    thmax = 0.5 * T
    if model == "fopdt":
        return [tmin, 0.0], [tmax, thmax]
    if model == "sopdt":
        return [tmin, tmin, -tmax, 0.0], [tmax, tmax, tmax, thmax]
    if model == "sopdt0":
        return [tmin, tmin, 0.0], [tmax, tmax, thmax]
    return [0.0], [thmax]


def _fit_structure(model: str, u: np.ndarray, y: np.ndarray, t: np.ndarray, dt: float, starts,
                   keep: np.ndarray | None = None) -> np.ndarray:
    lo, hi = _bounds(model, dt, t[-1] - t[0] + dt)
    best, best_cost = None, np.inf
    yk = y if keep is None else y[keep]
    spread = float(np.sum((yk - yk.mean()) ** 2))
    for x0 in starts:
        if best is not None and model != "sopdt" and 2 * best_cost < 0.01 * spread:
            break                            # the first start already fits 90 % or better: no further starts
        x0 = np.clip(np.asarray(x0, float), np.asarray(lo) + 1e-9, np.asarray(hi) - 1e-9)
        try:
            r = optimize.least_squares(lambda x: _vp_residual(model, x, u, y, t, dt, keep), x0, bounds=(lo, hi),
                                       x_scale=np.maximum(np.abs(x0), dt), diff_step=1e-4, max_nfev=200,
                                       ftol=1e-7, xtol=1e-7, gtol=1e-7)
        except (ValueError, np.linalg.LinAlgError):
            continue
        if r.cost < best_cost:
            best, best_cost = r.x, r.cost
    return best


def _full(model: str, x: np.ndarray, u, y, t, dt, keep=None) -> tuple[np.ndarray, list[str]]:
    """Nonlinear optimum + linear parameters -> full parameter vector and names."""
    s = _unit_response(model, x, u, dt)
    X = _basis(model, s, t)
    coef = _lsq(X, y) if keep is None else _lsq(X[keep], y[keep])
    names = list(PARAMS[model]) + ["bias"] + (["balance"] if model == "ipdt" else [])
    shape, theta = _nl_to_shape(model, x)
    if model == "sopdt0":
        shape = shape[:2]
    gain = coef[1]
    vals = [gain, *shape, theta, coef[0]]
    if model == "ipdt":
        vals.append(-coef[2] / gain if gain != 0 else 0.0)  # op offset at which pv stands still
    return np.array(vals, float), names


def _predict(model: str, full: np.ndarray, u, t, dt) -> np.ndarray:
    p = dict(zip(PARAMS[model], full))
    yhat = full[len(PARAMS[model])] + p["gain"] * _run(model, _shape(model, p), p["dead_time"], dt, u)
    if model == "ipdt":
        yhat = yhat - p["gain"] * full[-1] * t
    return yhat


def _jacobian(model, full, u, t, dt) -> np.ndarray:
    cols = []
    for i in range(len(full)):
        h = 1e-5 * max(abs(full[i]), dt if PARAMS[model][i:i + 1] and PARAMS[model][i] != "gain" else 1e-3)
        if i < len(PARAMS[model]) and PARAMS[model][i] == "dead_time" and full[i] - h < 0:
            up, dn = full.copy(), full.copy()
            up[i] += h
            cols.append((_predict(model, up, u, t, dt) - _predict(model, full, u, t, dt)) / h)
            continue
        up, dn = full.copy(), full.copy()
        up[i] += h
        dn[i] -= h
        cols.append((_predict(model, up, u, t, dt) - _predict(model, dn, u, t, dt)) / (2 * h))
    return np.column_stack(cols)


def _starts(model: str, step: np.ndarray, h: float, dt: float, seed: np.ndarray | None) -> list[list[float]]:
    k, tau, theta = two_point(step, h)
    if model == "fopdt":
        return [[tau, theta], [0.5 * tau, theta + 0.5 * tau]]
    if model == "sopdt":
        tf, thf = (seed[0], seed[1]) if seed is not None else (tau, theta)
        return [[0.8 * tf, 0.2 * tf, 0.0, 0.8 * thf], [0.55 * tf, 0.45 * tf, 0.3 * tf, 0.5 * thf]]
    # ipdt: intercept of the ramp's tangent as the dead time
    grow = np.gradient(step, h)
    j = int(np.argmax(np.abs(grow)))
    th = max(j * h - step[j] / grow[j], 0.0) if grow[j] != 0 else theta
    return [[th], [0.5 * th + dt]]


def _holdout(model: str, x: np.ndarray, op: np.ndarray, pv: np.ndarray, dt: float, share: float,
             yhat: np.ndarray) -> float:
    """Fit % on the held-out block (first or last ``share``, the livelier) of a refit on the rest. [%]"""
    n = len(op)
    t = np.arange(n) * dt
    u = op - op[0]
    m = int(round(n * share))
    if not (m > 20 and n - m > 20):
        return float("nan")
    first = np.arange(n) < m
    last = np.arange(n) >= n - m
    block = first if np.std(yhat[first]) > np.std(yhat[last]) else last
    keep = ~block
    if not np.ptp(op[keep]) > 0:
        return float("nan")
    xh = _fit_structure(model, u, pv, t, dt, [x], keep)
    if xh is None:
        return float("nan")
    fh, _ = _full(model, xh, u, pv, t, dt, keep)
    return nrmse_fit(pv[block], _predict(model, fh, u, t, dt)[block])


def _x_of(f: Fit) -> tuple[str, np.ndarray]:
    """Internal structure name and nonlinear parameters of a fit (to refit it)."""
    p = f.params
    if f.model == "fopdt":
        return "fopdt", np.array([p["tau1"], p["dead_time"]])
    if f.model == "ipdt":
        return "ipdt", np.array([p["dead_time"]])
    if p["tau_lead"] == 0.0 and f.ci95["tau_lead"] == 0.0:
        return "sopdt0", np.array([p["tau1"], p["tau2"], p["dead_time"]])
    return "sopdt", np.array([p["tau1"], p["tau2"], p["tau_lead"], p["dead_time"]])


def fit_structure(model: str, op: np.ndarray, pv: np.ndarray, dt: float, step: tuple[np.ndarray, float] | None = None,
                  holdout: float = 0.3, seed: Fit | None = None) -> Fit | None:
    """Fit one structure by output-error least squares (see the module notes).

    Parameters
    ----------
    model : str
        'fopdt', 'sopdt' or 'ipdt'.
    op, pv : ndarray
        Input and output on a uniform grid. [%]
    dt : float
        Sample interval. [s]
    step : tuple of (ndarray, float), optional
        Estimated step response and its spacing (from :func:`step_estimate`). [-], [s]
    holdout : float
        Share held out (first or last block) for the held-out fit; 0 to skip. [-]
    seed : Fit, optional
        A fopdt fit to start a sopdt from.

    Returns
    -------
    Fit or None
        None when the optimiser found nothing finite.
    """
    n = len(op)
    t = np.arange(n) * dt
    u = op - op[0]
    T = n * dt
    if step is None:
        step = step_estimate(op, pv, dt)
    sx = np.array([seed.params["tau1"], seed.params["dead_time"]]) if seed is not None and seed.model == "fopdt" \
        else None
    starts = _starts(model, step[0], step[1], dt, sx) if model != "sopdt0" else \
        [[seed.params["tau1"], seed.params["tau2"], max(seed.params["dead_time"] + seed.params["tau_lead"], 0.0)]]
    if n > 2 * COARSE_POINTS:
        # coarse to fine: the search on every q-th sample (op still held, so the model is the same),
        # then a few refining steps on all samples from there
        q = n // COARSE_POINTS
        xc = _fit_structure(model, u[::q], pv[::q], t[::q], dt * q, starts)
        if xc is not None:
            starts = [xc]
    x = _fit_structure(model, u, pv, t, dt, starts)
    if x is None:
        return None
    full, names = _full(model, x, u, pv, t, dt)
    yhat = _predict(model, full, u, t, dt)
    e = pv - yhat
    rss = float(np.dot(e, e))
    p = len(full)
    r1 = float(_acf(e, 1)[1]) if n > 2 else 0.0
    # correct for correlated residuals only where the correlation is significant (|r1| > 2/sqrt(N))
    infl = (1 + r1) / (1 - r1) if 2.0 / math.sqrt(n) < r1 < 0.999 else (1.0 if r1 < 0.999 else 2000.0)
    n_eff = max(n / infl, p + 1.0)
    J = _jacobian(model, full, u, t, dt)
    s2 = rss / max(n - p, 1)
    try:
        cov = np.linalg.pinv(J.T @ J) * s2 * infl
        half = stats.t.ppf(0.975, max(n_eff - p, 1)) * np.sqrt(np.maximum(np.diag(cov), 0))
    except np.linalg.LinAlgError:
        half = np.full(p, np.inf)
    bic = n_eff * math.log(max(rss / n, 1e-300)) + p * math.log(n_eff)
    fit_h = _holdout(model, x, op, pv, dt, holdout, yhat) if holdout > 0 else float("nan")
    params = {k: float(v) for k, v in zip(PARAMS[model], full)}
    ci = {k: float(v) for k, v in zip(PARAMS[model], half)}
    if model in ("sopdt", "sopdt0") and params["tau2"] > params["tau1"]:
        params["tau1"], params["tau2"] = params["tau2"], params["tau1"]
        ci["tau1"], ci["tau2"] = ci["tau2"], ci["tau1"]
    if model == "sopdt0":
        params = {"gain": params["gain"], "tau1": params["tau1"], "tau2": params["tau2"], "tau_lead": 0.0,
                  "dead_time": params["dead_time"]}
        ci = {"gain": ci["gain"], "tau1": ci["tau1"], "tau2": ci["tau2"], "tau_lead": 0.0,
              "dead_time": ci["dead_time"]}
    out = Fit("sopdt" if model == "sopdt0" else model, params, ci, float(full[len(PARAMS[model])]),
              nrmse_fit(pv, yhat), fit_h, rss, bic, n_eff, ljung_box_p(e), _xcorr_past(e, op, LAGS), yhat)
    if model == "sopdt" and not abs(params["tau_lead"]) > ci["tau_lead"]:
        # the data do not show a lead (its interval holds 0): the lead and the dead time trade off at low
        # frequency, so fix the lead at 0 and fit again
        reduced = fit_structure("sopdt0", op, pv, dt, step, holdout, out)
        if reduced is not None:
            return reduced
    return out


def identify_arrays(op: np.ndarray, pv: np.ndarray, dt: float, policy: IdentifyPolicy = IdentifyPolicy(),
                    name: str = "", notes: Sequence[str] = (), t0: float = 0.0,
                    lines: tuple[int, int] = (0, 0)) -> Identification:
    """Identify from arrays (see the module notes): checks, fits, selection.

    Parameters
    ----------
    op, pv : ndarray
        Controller output and process variable, uniform grid. [%]
    dt : float
        Sample interval. [s]
    policy : IdentifyPolicy
        Thresholds.
    name : str
        Record name for notes.
    notes : sequence of str
        Notes carried from reading.
    t0 : float
        Time of the first sample. [s]
    lines : tuple of int
        First and last line of the data.

    Returns
    -------
    Identification
    """
    out = list(notes)
    t = t0 + np.arange(len(op)) * dt

    def refuse(reason: str, fits=None) -> Identification:
        out.append(reason)
        return Identification(name, None, fits or {}, tuple(out), False, t, pv, op, dt, lines)

    ex = excitation(op, policy)
    if not ex.ok:
        return refuse(ex.reason)
    clean, spikes = hampel(pv, 7, policy.spike_sigmas)
    if spikes.any():
        out.append(f"{int(spikes.sum())} spike{'s' if spikes.sum() != 1 else ''} in pv replaced by the local "
                   f"median (Hampel identifier, window 7, {policy.spike_sigmas:g} robust sigmas)")
    pv = clean
    step = step_estimate(op, pv, dt)
    fits: dict[str, Fit] = {}
    for m in sorted(policy.models, key=("fopdt", "ipdt", "sopdt").index):
        f = fit_structure(m, op, pv, dt, step, 0.0, fits.get("fopdt"))   # held-out fit: the chosen one only
        if f is not None and np.isfinite(f.rss):
            fits[m] = f
    if not fits:
        return refuse("no model could be fitted")
    order = [m for m in ("fopdt", "ipdt", "sopdt") if m in fits]
    simple = [m for m in order if m != "sopdt"]
    best = min(simple, key=lambda m: fits[m].bic) if simple else "sopdt"
    if "sopdt" in fits and best != "sopdt":
        so = fits["sopdt"]
        if so.bic < fits[best].bic - policy.bic_margin and so.params["tau2"] > dt:
            best = "sopdt"
    bf = fits[best]
    if policy.holdout > 0:
        name_x, x = _x_of(bf)
        bf = replace(bf, fit_holdout_pct=_holdout(name_x, x, op, pv, dt, policy.holdout, bf.yhat))
        fits[best] = bf
    if not bf.fit_pct >= policy.min_fit_pct:
        return refuse(f"best model ({best}) fits only {bf.fit_pct:.0f} % (less than {policy.min_fit_pct:g} %): "
                      f"the data do not support a model", fits)
    g, gh = bf.params["gain"], bf.ci95["gain"]
    if not (np.isfinite(gh) and gh < abs(g)):
        return refuse(f"gain of the best model ({best}) not determined: {g:.3g} +/- {gh:.3g}; too little "
                      f"excitation for the noise", fits)
    return Identification(name, bf, fits, tuple(out), True, t, pv, op, dt, lines)


def identify_record(record: Record, policy: IdentifyPolicy = IdentifyPolicy()) -> Identification:
    """Identify a model from a record read by :func:`audit.plantdata.records.read_record`.

    Parameters
    ----------
    record : Record
        Needs ``pv`` and ``op``; the longest segment is used.
    policy : IdentifyPolicy
        Thresholds.

    Returns
    -------
    Identification
        With ``best`` None and a note when the record cannot give a model.
    """
    notes = [str(n) for n in record.notes]
    empty = np.zeros(0)
    missing = [s for s in ("pv", "op") if s not in record.signals]
    if missing:
        notes.append(f"{record.name}: no {' and no '.join(missing)} column: a model needs pv and op")
        return Identification(record.name, None, {}, tuple(notes), False, empty, empty, empty)
    if record.notes_of("units") and any(n.column in ("pv", "op", "pv_eu") for n in record.notes_of("units")):
        notes.append(f"{record.name}: units of pv or op in doubt (see above): not identified")
        return Identification(record.name, None, {}, tuple(notes), False, empty, empty, empty)
    seg: Segment | None = record.longest()
    if seg is None:
        notes.append(f"{record.name}: no usable stretch of data: not identified")
        return Identification(record.name, None, {}, tuple(notes), False, empty, empty, empty)
    if len(record.segments) > 1:
        notes.append(f"{record.name}: {len(record.segments)} segments; the longest (lines {seg.first_line}-"
                     f"{seg.last_line}) used")
    return identify_arrays(seg.values["op"], seg.values["pv"], seg.dt, policy, record.name, notes, seg.t0,
                           (seg.first_line, seg.last_line))
