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
3. Refinement: output-error least squares by a bounded Levenberg-Marquardt
   (:func:`.oefit.levenberg_marquardt`) with the linear parameters (gain, bias, balance)
   eliminated in closed form at each step (variable projection [3]_). Records over 2,000
   samples are searched first on a coarse record (every q-th pv sample, about 1,000 of them,
   op averaged over each block), then refined on all samples from that optimum (at most 8
   iterations). Further starts guard against a local minimum in the dead time: tried only
   while the first fits below 90 %; for sopdt three starts (no lead, a lead, an inverse
   response) each run 4 iterations and the best goes on. Stop when the Gauss-Newton decrement
   is below 1e-8 of the residual sum of squares (1e-6 on the coarse record).
   Many records are fitted together (:func:`identify_many`): the steps of all records of a
   batch run as one set of array operations, each record with its own damping and stop, so
   a record's result does not depend on the others in its batch.
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
   scale of Kass and Raftery [6]_) and leaves a smaller residual sum of squares than fopdt
   (sopdt holds fopdt, so one that fits worse has not reached its optimum: its residuals,
   correlated, would shrink N_eff and with it its BIC); otherwise the simpler one (fopdt, or
   ipdt) stands.
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
import multiprocessing
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field, replace
from typing import Mapping, Sequence

import numpy as np

from .idchecks import LAGS, _acf, _xcorr_past, hampel, ljung_box_p, nrmse_fit, step_estimate, two_point
from .oefit import Solution, difference, predict, response_jacobian, run, solve_rows
from .records import Record, Segment

MODELS = ("fopdt", "sopdt", "ipdt")
PARAMS = {"fopdt": ("gain", "tau1", "dead_time"),
          "sopdt": ("gain", "tau1", "tau2", "tau_lead", "dead_time"),
          "ipdt": ("gain", "dead_time"),
          "sopdt0": ("gain", "tau1", "tau2", "dead_time")}     # sopdt with the lead fixed at 0 (internal)
UNITS = {"gain": "-", "tau1": "s", "tau2": "s", "tau_lead": "s", "dead_time": "s"}
COARSE_POINTS = 1000      # records longer than twice this are searched on every q-th sample first
SCOUT_ITER = 4            # iterations from each of several starts before the best goes on
FINE_ITER = 4             # iterations on all samples after the coarse search
COARSE_ITER = 40          # iterations on the coarse record
_CONTEXT = multiprocessing.get_context("fork") if "fork" in multiprocessing.get_all_start_methods() else None


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
    window_above : int
        The model check identifies a record longer than this many samples on its most
        informative window of excitation (:mod:`.windows`); shorter records whole. [-]
    window_samples : int
        Most samples of that window. [-]
    window_before, window_after : float
        The window runs from this many time scales of the loop before its first move to this
        many after its last. [-]
    window_noise_ratio : float
        A move counts when its step exceeds this many robust standard deviations of routine
        movement (and ``min_op_move_pct``, or ``min_sp_move_pct`` for the set point). [-]
    min_sp_move_pct : float
        Smallest set-point step that counts as a move. [% of range]
    window_tries : int
        The best this many windows are fitted together and the first in rank that gives a model
        is used. Default 1 (the best window alone): on the generated export, falling back to
        weaker windows turned refusals into disputes on fits of 35-60 %, more often wrong than right. [-]
    """

    min_op_move_pct: float = 1.0
    max_limited_share: float = 0.5
    min_fit_pct: float = 30.0
    bic_margin: float = 10.0
    holdout: float = 0.3
    spike_sigmas: float = 6.0
    models: tuple[str, ...] = MODELS
    window_above: int = 20_000
    window_samples: int = 8_000
    window_before: float = 1.0
    window_after: float = 5.0
    window_noise_ratio: float = 5.0
    min_sp_move_pct: float = 1.0
    window_tries: int = 1


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
    See :mod:`.oefit`: each mode integrated exactly over the two parts of a sample
    interval that the fractional delay splits, the modes summed over a common denominator.
    """
    d, num, den = difference(model, shape, dead_time, dt)
    return np.concatenate([np.zeros(d), num]), den


def _run(model: str, shape: Sequence[float], dead_time: float, dt: float, u: np.ndarray) -> np.ndarray:
    """Unit-gain response to ``u`` (deviation, zero before the record); see :func:`.oefit.run`."""
    return run(model, shape, dead_time, dt, u)


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
    return predict(model, params, 0.0, 0.0, op - op[0], dt)


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


# --------------------------------------------------------------------------- fitting

def _multi_start(model: str, rows, starts: list[list], max_iter: int, ftol: float) -> list[Solution | None]:
    """The best of Levenberg-Marquardt runs from several starts per record, all records together.

    sopdt: every start runs :data:`SCOUT_ITER` iterations, the best goes on. Others: the first
    start runs to the end; the further starts are tried (scouted the same way) only where it
    fits below 90 %.
    """
    k = len(starts[0]) if starts else 0
    if k == 1 or not rows:
        return solve_rows(model, rows, [s[0] for s in starts], max_iter, ftol)
    if model == "sopdt":
        base: list[Solution | None] = [None] * len(rows)
        todo = list(range(len(rows)))
        tries = range(k)
    else:
        base = solve_rows(model, rows, [s[0] for s in starts], max_iter, ftol)
        spread = [float(np.sum((r[1][r[3]:r[4]] - r[1][r[3]:r[4]].mean()) ** 2)) for r in rows]
        todo = [i for i in range(len(rows)) if base[i] is None or not base[i].cost < 0.01 * spread[i]]
        tries = range(1, k)
    if not todo:
        return base
    scout = solve_rows(model, [rows[i] for i in todo for _ in tries], [starts[i][j] for i in todo for j in tries],
                       SCOUT_ITER, ftol)
    best: list[Solution | None] = []
    for a, i in enumerate(todo):
        found = [f for f in scout[a * len(tries):(a + 1) * len(tries)] if f is not None]
        best.append(min(found, key=lambda f: f.cost) if found else None)
    go = [a for a, f in enumerate(best) if f is not None and f.iterations >= SCOUT_ITER]
    more = solve_rows(model, [rows[todo[a]] for a in go], [best[a].x for a in go], max_iter, ftol)
    for a, m in zip(go, more):
        if m is not None and m.cost <= best[a].cost:
            best[a] = m
    out = list(base)
    for a, i in enumerate(todo):
        if best[a] is not None and (out[i] is None or best[a].cost < out[i].cost):
            out[i] = best[a]
    return out


def _coarse_row(u: np.ndarray, y: np.ndarray, dt: float):
    """Every q-th sample of a long record (about :data:`COARSE_POINTS`), the input averaged over each block.

    The block mean of a held input, held over the block, keeps its first moment in time, so a step
    inside a block is not moved to the block's edge (the coarse optimum is a start only).
    """
    n = len(u)
    q = n // COARSE_POINTS
    m = n // q
    return u[:m * q].reshape(m, q).mean(axis=1), y[:m * q:q], dt * q, 0, m


def _solve_many(model: str, rows, starts: list[list]) -> list[Solution | None]:
    """Coarse to fine: long records searched on the coarse record first, then all counted samples."""
    long_ = [i for i, r in enumerate(rows) if len(r[0]) > 2 * COARSE_POINTS and r[3] == 0 and r[4] == len(r[0])]
    starts = list(starts)
    if long_:
        coarse = _multi_start(model, [_coarse_row(rows[i][0], rows[i][1], rows[i][2]) for i in long_],
                              [starts[i] for i in long_], COARSE_ITER, 1e-6)
        for i, c in zip(long_, coarse):
            if c is not None:
                starts[i] = [c.x]
    out: list[Solution | None] = [None] * len(rows)
    fine = [i for i in long_ if len(starts[i]) == 1]
    rest = [i for i in range(len(rows)) if i not in set(fine)]
    for group, it in ((fine, FINE_ITER), (rest, 100)):
        if group:
            for i, sol in zip(group, _multi_start(model, [rows[i] for i in group], [starts[i] for i in group], it,
                                                  1e-8)):
                out[i] = sol
    return out


def _starts(model: str, step: np.ndarray, h: float, dt: float, seed: np.ndarray | None) -> list[list[float]]:
    k, tau, theta = two_point(step, h)
    if model == "fopdt":
        return [[tau, theta], [0.5 * tau, theta + 0.5 * tau]]
    if model == "sopdt":
        tf, thf = (seed[0], seed[1]) if seed is not None else (tau, theta)
        # a lead trades off against the dead time: start with none, a lead, and an inverse response
        return [[0.8 * tf, 0.2 * tf, 0.0, 0.8 * thf], [0.55 * tf, 0.45 * tf, 0.3 * tf, 0.5 * thf],
                [0.7 * tf, 0.3 * tf, -0.3 * tf, 0.3 * thf]]
    # ipdt: intercept of the ramp's tangent as the dead time
    grow = np.gradient(step, h)
    j = int(np.argmax(np.abs(grow)))
    th = max(j * h - step[j] / grow[j], 0.0) if grow[j] != 0 else theta
    return [[th], [0.5 * th + dt]]


def _holdout_many(cases) -> list[float]:
    """Fit % on the held-out block (first or last ``share``, the livelier) of a refit on the rest, per case. [%]

    ``cases``: ``(model, x, op, pv, dt, share, yhat)``; the refits of one structure run together.
    """
    out = [float("nan")] * len(cases)
    plan = {}
    for c, (model, x, op, pv, dt, share, yhat) in enumerate(cases):
        n = len(op)
        m = int(round(n * share))
        if not (m > 20 and n - m > 20):
            continue
        first = bool(np.std(yhat[:m]) > np.std(yhat[n - m:]))
        lo, hi = (m, n) if first else (0, n - m)
        if not np.ptp(op[lo:hi]) > 0:
            continue
        plan.setdefault(model, []).append((c, (op - op[0], pv, dt, lo, hi), np.asarray(x, float),
                                           slice(0, m) if first else slice(n - m, n)))
    for model, items in plan.items():
        sols = solve_rows(model, [it[1] for it in items], [it[2] for it in items])
        for (c, row, _, block), sol in zip(items, sols):
            if sol is None:
                continue
            yh = sol.coef[0] + sol.coef[1] * sol.s
            if model == "ipdt":
                yh = yh + sol.coef[2] * np.arange(len(yh)) * row[2]
            out[c] = nrmse_fit(row[1][block], yh[block])
    return out


def _fit_of(model: str, sol: Solution, op: np.ndarray, pv: np.ndarray, dt: float) -> Fit:
    """Statistics of an optimum: intervals, fit %, BIC, residual checks (see the module notes)."""
    n = len(op)
    u = op - op[0]
    x, coef = sol.x, sol.coef
    gain = float(coef[1])
    full = np.concatenate([[gain], x, [coef[0]]])
    yhat = coef[0] + gain * sol.s
    if model == "ipdt":
        full = np.append(full, -coef[2] / gain if gain != 0 else 0.0)   # op offset at which pv stands still
        yhat = yhat + coef[2] * np.arange(n) * dt
    e = pv - yhat
    rss = float(np.dot(e, e))
    p = len(full)
    r1 = float(_acf(e, 1)[1]) if n > 2 else 0.0
    # correct for correlated residuals only where the correlation is significant (|r1| > 2/sqrt(N))
    infl = (1 + r1) / (1 - r1) if 2.0 / math.sqrt(n) < r1 < 0.999 else (1.0 if r1 < 0.999 else 2000.0)
    n_eff = max(n / infl, p + 1.0)
    J = response_jacobian(model, x, coef, u, dt)
    s2 = rss / max(n - p, 1)
    try:
        cov = np.linalg.pinv(J.T @ J) * s2 * infl
        from scipy import special  # scipy when first needed: a run without plant data never loads it
        half = special.stdtrit(max(n_eff - p, 1), 0.975) * np.sqrt(np.maximum(np.diag(cov), 0))
    except np.linalg.LinAlgError:
        half = np.full(p, np.inf)
    bic = n_eff * math.log(max(rss / n, 1e-300)) + p * math.log(n_eff)
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
    return Fit("sopdt" if model == "sopdt0" else model, params, ci, float(full[len(PARAMS[model])]),
               nrmse_fit(pv, yhat), float("nan"), rss, bic, n_eff, ljung_box_p(e), _xcorr_past(e, op, LAGS), yhat)


def _fit_many(model: str, cases) -> list[Fit | None]:
    """One structure fitted to many records: ``cases`` of ``(op, pv, dt, step, seed)`` (seed: a fit or None).

    A sopdt whose lead's interval holds 0 is refitted with the lead fixed at 0 (lead and dead time
    trade off at low frequency, so a free lead would blur the dead time).
    """
    starts = []
    for op, pv, dt, step, seed in cases:
        if model == "sopdt0":
            sp = seed.params
            starts.append([np.array([sp["tau1"], sp["tau2"], max(sp["dead_time"] + sp["tau_lead"], 0.0)])])
        else:
            sx = np.array([seed.params["tau1"], seed.params["dead_time"]]) if seed is not None and \
                seed.model == "fopdt" else None
            starts.append([np.asarray(v, float) for v in _starts(model, step[0], step[1], dt, sx)])
    sols = _solve_many(model, [(op - op[0], pv, dt, 0, len(op)) for op, pv, dt, _, _ in cases], starts)
    fits: list[Fit | None] = []
    for (op, pv, dt, _, _), sol in zip(cases, sols):
        fits.append(_fit_of(model, sol, op, pv, dt) if sol is not None else None)
    if model == "sopdt":
        again = [i for i, f in enumerate(fits) if f is not None and not abs(f.params["tau_lead"]) > f.ci95["tau_lead"]]
        if again:
            reduced = _fit_many("sopdt0", [(cases[i][0], cases[i][1], cases[i][2], cases[i][3], fits[i])
                                           for i in again])
            for i, r in zip(again, reduced):
                if r is not None:
                    fits[i] = r
    return fits


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
    if step is None:
        step = step_estimate(op, pv, dt)
    f = _fit_many(model, [(op, pv, dt, step, seed)])[0]
    if f is None or not holdout > 0:
        return f
    name_x, x = _x_of(f)
    return replace(f, fit_holdout_pct=_holdout_many([(name_x, x, op, pv, dt, holdout, f.yhat)])[0])


# --------------------------------------------------------------------------- many records

@dataclass(frozen=True)
class Arrays:
    """One stretch of data to identify from, when it is not a :class:`Record`.

    Attributes
    ----------
    op, pv : ndarray
        Controller output and process variable on a uniform grid. [%]
    dt : float
        Sample interval. [s]
    name : str
        Name for notes.
    notes : tuple of str
        Notes carried from reading.
    t0 : float
        Time of the first sample. [s]
    lines : tuple of int
        First and last line of the data.
    """

    op: np.ndarray
    pv: np.ndarray
    dt: float
    name: str = ""
    notes: tuple[str, ...] = ()
    t0: float = 0.0
    lines: tuple[int, int] = (0, 0)


def _arrays_of(record: Record) -> Arrays | Identification:
    """The longest usable segment of a record, or the refusal that says why there is none."""
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
    return Arrays(seg.values["op"], seg.values["pv"], seg.dt, record.name, tuple(notes), seg.t0,
                  (seg.first_line, seg.last_line))


@dataclass
class _Case:
    """A record on its way through :func:`identify_many`."""

    a: Arrays
    t: np.ndarray
    pv: np.ndarray
    notes: list[str]
    step: tuple[np.ndarray, float] | None = None
    fits: dict = field(default_factory=dict)
    done: Identification | None = None

    def refuse(self, reason: str, fits=None) -> Identification:
        self.notes.append(reason)
        return Identification(self.a.name, None, fits or {}, tuple(self.notes), False, self.t, self.pv, self.a.op,
                              self.a.dt, self.a.lines)


def _prepare(a: Arrays, policy: IdentifyPolicy) -> _Case:
    """Data checks, spike removal and the start (step response) of one record."""
    op = np.asarray(a.op, float)
    pv = np.asarray(a.pv, float)
    a = replace(a, op=op, pv=pv)
    c = _Case(a, a.t0 + np.arange(len(op)) * a.dt, pv, list(a.notes))
    if len(op) != len(pv) or not (math.isfinite(a.dt) and a.dt > 0) or len(op) < 10 or \
            not (np.all(np.isfinite(op)) and np.all(np.isfinite(pv))):
        c.done = c.refuse(f"{a.name or 'record'}: op and pv must be finite, of equal length (at least 10 samples) "
                          f"on a positive sample interval: not identified")
        return c
    ex = excitation(op, policy)
    if not ex.ok:
        c.done = c.refuse(ex.reason)
        return c
    clean, spikes = hampel(pv, 7, policy.spike_sigmas)
    if spikes.any():
        c.notes.append(f"{int(spikes.sum())} spike{'s' if spikes.sum() != 1 else ''} in pv replaced by the local "
                       f"median (Hampel identifier, window 7, {policy.spike_sigmas:g} robust sigmas)")
    c.pv = clean
    c.step = step_estimate(op, clean, a.dt)
    return c


def _fit_cases(cases: list[_Case], policy: IdentifyPolicy) -> None:
    """Every structure over every open case (all records together), then selection and the held-out fit."""
    open_ = [c for c in cases if c.done is None]
    for m in sorted(policy.models, key=("fopdt", "ipdt", "sopdt").index):
        fits = _fit_many(m, [(c.a.op, c.pv, c.a.dt, c.step, c.fits.get("fopdt")) for c in open_])
        for c, f in zip(open_, fits):
            if f is not None and np.isfinite(f.rss):
                c.fits[m] = f
    chosen = []
    for c in open_:
        if not c.fits:
            c.done = c.refuse("no model could be fitted")
            continue
        order = [m for m in ("fopdt", "ipdt", "sopdt") if m in c.fits]
        simple = [m for m in order if m != "sopdt"]
        best = min(simple, key=lambda m: c.fits[m].bic) if simple else "sopdt"
        if "sopdt" in c.fits and best != "sopdt":
            so = c.fits["sopdt"]
            # sopdt holds fopdt (tau2 -> 0, no lead): one that fits worse has not reached its optimum
            if so.bic < c.fits[best].bic - policy.bic_margin and so.params["tau2"] > c.a.dt and \
                    ("fopdt" not in c.fits or so.rss < c.fits["fopdt"].rss):
                best = "sopdt"
        chosen.append((c, best))
    if policy.holdout > 0:
        held = _holdout_many([(*_x_of(c.fits[b]), c.a.op, c.pv, c.a.dt, policy.holdout, c.fits[b].yhat)
                              for c, b in chosen])
        for (c, b), h in zip(chosen, held):
            c.fits[b] = replace(c.fits[b], fit_holdout_pct=h)
    for c, best in chosen:
        bf = c.fits[best]
        if not bf.fit_pct >= policy.min_fit_pct:
            c.done = c.refuse(f"best model ({best}) fits only {bf.fit_pct:.0f} % (less than {policy.min_fit_pct:g} "
                              f"%): the data do not support a model", c.fits)
            continue
        g, gh = bf.params["gain"], bf.ci95["gain"]
        if not (np.isfinite(gh) and gh < abs(g)):
            c.done = c.refuse(f"gain of the best model ({best}) not determined: {g:.3g} +/- {gh:.3g}; too little "
                              f"excitation for the noise", c.fits)
            continue
        c.done = Identification(c.a.name, bf, c.fits, tuple(c.notes), True, c.t, c.pv, c.a.op, c.a.dt, c.a.lines)


def _identify_chunk(items: Sequence[Record | Arrays], policy: IdentifyPolicy, summarise=None) -> list:
    """:func:`identify_many` in one process."""
    cases: list[_Case | Identification] = []
    for it in items:
        a = _arrays_of(it) if isinstance(it, Record) else it
        if isinstance(a, Identification):
            cases.append(a)
            continue
        try:
            cases.append(_prepare(a, policy))
        except (ValueError, FloatingPointError, np.linalg.LinAlgError) as exc:   # one bad record, never the batch
            cases.append(Identification(a.name, None, {}, (*a.notes, f"{a.name or 'record'}: could not be analysed: "
                                                           f"{exc}"), False, np.zeros(0), np.zeros(0), np.zeros(0)))
    work = [c for c in cases if isinstance(c, _Case)]
    try:
        _fit_cases(work, policy)
    except (ValueError, FloatingPointError, np.linalg.LinAlgError):
        for c in work:                       # find the record at fault: each on its own
            if c.done is not None:
                continue
            try:
                c.fits = {}
                _fit_cases([c], policy)
            except (ValueError, FloatingPointError, np.linalg.LinAlgError) as exc:
                c.done = c.refuse(f"{c.a.name or 'record'}: could not be analysed: {exc}")
    out = [c.done if isinstance(c, _Case) else c for c in cases]
    return [summarise(r) for r in out] if summarise is not None else out


_SHARED: tuple | None = None


def _run_shared(bounds_: tuple[int, int]) -> list:
    """Worker side of :func:`identify_many`: records ``lo:hi`` of those shared at fork time."""
    items, policy, summarise = _SHARED
    return _identify_chunk(items[bounds_[0]:bounds_[1]], policy, summarise)


#: Fewer records than this per process are identified here (a worker costs ~0.3 s to start). [-]
MIN_RECORDS_PER_JOB = 8


def identify_many(items: Sequence[Record | Arrays], policy: IdentifyPolicy = IdentifyPolicy(), jobs: int = 1,
                  summarise=None, chunk: int = 500) -> list:
    """Identify models from many records at once (see the module notes).

    Records are fitted together: each structure's Levenberg-Marquardt steps run for all records
    of a batch in one set of array operations (:func:`.oefit.levenberg_marquardt`), records of any
    length and with any sample interval mixed. A record that cannot be analysed gets its own
    refusal note and never stops the others. The result of a record does not depend on the
    others in its batch.

    Parameters
    ----------
    items : sequence of Record or Arrays
        The records (the longest segment of a :class:`Record` is used).
    policy : IdentifyPolicy
        Thresholds.
    jobs : int
        Worker processes (forked; records split in contiguous chunks). [-]
    summarise : callable, optional
        Applied to each :class:`Identification` in the worker, its result returned instead
        (keeps large batches from carrying every simulated pv back).
    chunk : int
        Most records fitted in one batch. [-]

    Returns
    -------
    list
        One :class:`Identification` (or its summary) per item, in order.
    """
    items = list(items)
    n = len(items)
    jobs = max(1, min(int(jobs), n // MIN_RECORDS_PER_JOB)) if n else 1
    parts = max(jobs * 2 if jobs > 1 else 1, -(-n // max(chunk, 1))) if n else 0
    edges = [round(k * n / parts) for k in range(parts + 1)] if parts else [0]
    spans = [(lo, hi) for lo, hi in zip(edges[:-1], edges[1:]) if hi > lo]
    if jobs == 1 or _CONTEXT is None:
        return [r for lo, hi in spans for r in _identify_chunk(items[lo:hi], policy, summarise)]
    global _SHARED
    _SHARED = (items, policy, summarise)
    try:
        # forked workers inherit the records: only the chunks' bounds and the results cross
        with ProcessPoolExecutor(max_workers=jobs, mp_context=_CONTEXT) as pool:
            return [r for part in pool.map(_run_shared, spans) for r in part]
    finally:
        _SHARED = None


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
    return identify_many([Arrays(op, pv, dt, name, tuple(notes), t0, lines)], policy)[0]


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
    return identify_many([record], policy)[0]
