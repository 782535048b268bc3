"""Output-error fitting kernels: the exact held-input simulation and a bounded Levenberg-Marquardt.

What :mod:`.identify` fits with, kept apart so that the statistics and the model choice read
on their own. Everything here works on one record at a time; the cost is a handful of calls
of :func:`scipy.signal.lfilter` (C) per iteration, never a Python loop over samples.

Simulation
----------
The input is held between samples (zero-order hold) and the dead time is continuous: with
theta = (d + f) dt the delayed input over a sample interval is u[k-d-1] for the first f dt
and u[k-d] for the rest. Each first-order mode x' = (-x + w v)/tau is integrated exactly over
both parts, x[k+1] = a x[k] + w (1 - c) u[k-d] + w (c - a) u[k-d-1], a = e^{-dt/tau},
c = e^{-(1-f) dt/tau} (integrator: x[k+1] = x[k] + w (1-f) dt u[k-d] + w f dt u[k-d-1]);
the modes (partial fractions) are summed over a common denominator, so a model is one
difference equation run by ``lfilter`` after a delay line of d samples. The record is taken
to start at rest.

Least squares
-------------
The output-error residual r = y - (bias + gain s(x) [+ slope t]) is minimised over the
nonlinear parameters x (time constants, lead, dead time) with the linear ones eliminated
in closed form at every step (variable projection [1]_). The Jacobian is Kaufman's
approximation [2]_, J = -P (gain ds/dx), P the projection off the linear basis, with ds/dx
by forward differences through the same filter. Steps are Levenberg-Marquardt [3]_ with
Marquardt's diagonal scaling; a parameter at a bound that the step would push past is held
there for that step. Stop: relative decrease of the cost below ``ftol`` or a relative step
below ``xtol``.

References
----------
.. [1] G. H. Golub and V. Pereyra, The differentiation of pseudo-inverses and nonlinear
   least squares problems whose variables separate, SIAM J. Numer. Anal. 10(2), 1973.
.. [2] L. Kaufman, A variable projection method for solving separable nonlinear least
   squares problems, BIT 15, 1975.
.. [3] D. W. Marquardt, An algorithm for least-squares estimation of nonlinear parameters,
   J. SIAM 11(2), 1963.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

_CORE = None       # the filter: lfilter's C core, or lfilter itself (found by _filter_core when first needed)


def _filter_core():
    """The C core of :func:`scipy.signal.lfilter` (without the argument checks that cost more than a short
    record's filtering), checked on a known response; else a call of the public function. Loaded when
    first needed: a run without plant data never loads scipy."""
    global _CORE
    if _CORE is None:
        from scipy import signal
        try:
            from scipy.signal._sigtools import _linear_filter as core
            if not np.allclose(core(np.array([0.0, 1.0]), np.array([1.0, -0.5]), np.ones(3), -1), [0.0, 1.0, 1.5]):
                core = None
        except (ImportError, TypeError, ValueError):            # another scipy: the public function
            core = None
        _CORE = core if core is not None else (lambda b, a, x, axis: signal.lfilter(b, a, x, axis=axis))
    return _CORE

#: Nonlinear parameters of each structure, in the order of the vector ``x``.
NONLINEAR = {"fopdt": ("tau1", "dead_time"), "sopdt": ("tau1", "tau2", "tau_lead", "dead_time"),
             "sopdt0": ("tau1", "tau2", "dead_time"), "ipdt": ("dead_time",)}


# --------------------------------------------------------------------------- simulation

def coefficients(model: str, X: np.ndarray, dt: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Exact difference equations of many parameter vectors at once (see the module notes).

    Each model is a sum of first-order modes (partial fractions): fopdt one mode of weight 1,
    ipdt an integrator, sopdt the modes tau1 and tau2 of weights (tau1 - tau_lead)/(tau1 - tau2)
    and (tau_lead - tau2)/(tau1 - tau2) (a repeated pole split by 1e-4 relative, an error of about
    1e-12), summed over the common denominator.

    Parameters
    ----------
    model : str
        'fopdt', 'sopdt', 'sopdt0' or 'ipdt'.
    X : ndarray
        Nonlinear parameters, one row each (order of :data:`NONLINEAR`). [s]
    dt : ndarray
        Sample interval of each row. [s]

    Returns
    -------
    tuple of ndarray
        Whole-sample delays d [samples], numerators (rows, powers of z^-1) and denominators of the
        part after the delay line.
    """
    X = np.asarray(X, float)
    dt = np.asarray(dt, float)
    theta = X[:, -1]
    q = theta / dt
    d = np.floor(q + 1e-12)
    f = np.clip(q - d, 0.0, 1.0)
    d = d.astype(int)
    m = len(X)
    if model == "ipdt":
        num, den = np.zeros((m, 3)), np.empty((m, 2))
        num[:, 1], num[:, 2] = (1.0 - f) * dt, f * dt
        den[:, 0], den[:, 1] = 1.0, -1.0
        return d, num, den
    if model == "fopdt":
        a = np.exp(-dt / X[:, 0])
        c = np.exp(-(1.0 - f) * dt / X[:, 0])
        num, den = np.zeros((m, 3)), np.empty((m, 2))
        num[:, 1], num[:, 2] = 1.0 - c, c - a
        den[:, 0], den[:, 1] = 1.0, -a
        return d, num, den
    t1, t2 = X[:, 0], X[:, 1]
    ta = X[:, 2] if model == "sopdt" else 0.0
    t2 = np.where(np.abs(t1 - t2) < 1e-4 * np.maximum(t1, t2), t1 * (1.0 - 1e-4), t2)   # repeated pole: split
    w1, w2 = (t1 - ta) / (t1 - t2), (ta - t2) / (t1 - t2)
    a1, c1 = np.exp(-dt / t1), np.exp(-(1.0 - f) * dt / t1)
    a2, c2 = np.exp(-dt / t2), np.exp(-(1.0 - f) * dt / t2)
    g21, g11, g22, g12 = w1 * (1.0 - c1), w1 * (c1 - a1), w2 * (1.0 - c2), w2 * (c2 - a2)
    num, den = np.zeros((m, 4)), np.empty((m, 3))
    num[:, 1], num[:, 2], num[:, 3] = g21 + g22, g11 - a2 * g21 + g12 - a1 * g22, -(a2 * g11 + a1 * g12)
    den[:, 0], den[:, 1], den[:, 2] = 1.0, -(a1 + a2), a1 * a2
    return d, num, den


def difference(model: str, shape: Sequence[float], dead_time: float, dt: float
               ) -> tuple[int, np.ndarray, np.ndarray]:
    """Whole-sample delay, numerator and denominator of the exact difference equation.

    Parameters
    ----------
    model : str
        'fopdt', 'sopdt' or 'ipdt'.
    shape : sequence of float
        fopdt: (tau1,); sopdt: (tau1, tau2, tau_lead); ipdt: (). [s]
    dead_time : float
        Dead time. [s]
    dt : float
        Sample interval. [s]

    Returns
    -------
    tuple of (int, ndarray, ndarray)
        d [samples], and the numerator and denominator in powers of z^-1 of the part after
        the delay line (see the module notes).
    """
    d, num, den = coefficients(model, np.array([[*shape, dead_time]], float), np.array([dt], float))
    return int(d[0]), num[0], den[0]


def _lfilter(b: np.ndarray, a: np.ndarray, x: np.ndarray) -> np.ndarray:
    """:func:`scipy.signal.lfilter` of a 1-D float array, through its C core when that can be reached."""
    return (_CORE or _filter_core())(b, a, x, -1)


def run(model: str, shape: Sequence[float], dead_time: float, dt: float, u: np.ndarray) -> np.ndarray:
    """Unit-gain response to ``u`` (deviation, zero before the record): delay line, then the filter.

    Parameters
    ----------
    model : str
        'fopdt', 'sopdt' or 'ipdt'.
    shape : sequence of float
        fopdt: (tau1,); sopdt: (tau1, tau2, tau_lead); ipdt: (). [s]
    dead_time : float
        Dead time. [s]
    dt : float
        Sample interval. [s]
    u : ndarray
        Input deviation, held between samples. [%]

    Returns
    -------
    ndarray
        Response, one value per input sample. [%]
    """
    d, num, den = difference(model, shape, dead_time, dt)
    n = len(u)
    out = np.zeros(n)
    if d < n:
        out[d:] = _lfilter(num, den, np.ascontiguousarray(u[:n - d], float))
    return out


def shape_of(model: str, x: Sequence[float]) -> tuple[tuple[float, ...], float]:
    """(shape for :func:`run`, dead time) of a nonlinear parameter vector ``x`` (order of :data:`NONLINEAR`).

    Parameters
    ----------
    model : str
        'fopdt', 'sopdt', 'sopdt0' (sopdt with the lead fixed at 0) or 'ipdt'.
    x : sequence of float
        Time constants [s] and dead time [s].
    """
    if model == "fopdt":
        return (x[0],), x[1]
    if model == "sopdt":
        return (x[0], x[1], x[2]), x[3]
    if model == "sopdt0":
        return (x[0], x[1], 0.0), x[2]
    return (), x[0]


def unit_response(model: str, x: Sequence[float], u: np.ndarray, dt: float) -> np.ndarray:
    """Unit-gain response of a structure with nonlinear parameters ``x`` to ``u``. [%]

    Parameters
    ----------
    model : str
        As in :func:`shape_of`.
    x : sequence of float
        Nonlinear parameters. [s]
    u : ndarray
        Input deviation. [%]
    dt : float
        Sample interval. [s]
    """
    shape, theta = shape_of(model, x)
    return run("sopdt" if model == "sopdt0" else model, shape, theta, dt, u)


def bounds(model: str, dt: float, T: float) -> tuple[np.ndarray, np.ndarray]:
    """Lower and upper bounds of ``x``: time constants dt/20 .. 20 T, lead +/- 20 T, dead time 0 .. T/2. [s]

    Parameters
    ----------
    model : str
        As in :func:`shape_of`.
    dt : float
        Sample interval. [s]
    T : float
        Record length. [s]
    """
    tmin, tmax = dt / 20.0, 20.0 * T
    thmax = 0.5 * T
    lo, hi = {"fopdt": ([tmin, 0.0], [tmax, thmax]),
              "sopdt": ([tmin, tmin, -tmax, 0.0], [tmax, tmax, tmax, thmax]),
              "sopdt0": ([tmin, tmin, 0.0], [tmax, tmax, thmax]),
              "ipdt": ([0.0], [thmax])}[model]
    return np.array(lo, float), np.array(hi, float)


# --------------------------------------------------------------------------- least squares, batched

@dataclass(frozen=True)
class Batch:
    """Records prepared for fitting together: rows padded to one length, weights mark the counted samples.

    Attributes
    ----------
    u : ndarray
        Input deviation from each record's first sample, R x L (zero past a record's end). [%]
    y : ndarray
        Output, R x L. [%]
    w : ndarray
        1.0 where a sample counts in the cost, 0.0 elsewhere (held-out blocks, padding), R x L. [-]
    n : ndarray
        Length of each record. [samples]
    dt : ndarray
        Sample interval of each record. [s]
    integrating : bool
        True for ipdt (a ramp joins the linear basis).
    """

    u: np.ndarray
    y: np.ndarray
    w: np.ndarray
    n: np.ndarray
    dt: np.ndarray
    integrating: bool

    @classmethod
    def of(cls, rows: Sequence[tuple[np.ndarray, np.ndarray, float, int, int]], model: str) -> "Batch":
        """A batch of ``(u, y, dt, lo, hi)`` rows: the cost counts samples ``lo:hi`` of each.

        Parameters
        ----------
        rows : sequence of tuple
            Input deviation [%], output [%], sample interval [s], first and end counted sample.
        model : str
            Structure (ipdt adds a ramp to the linear basis).
        """
        R = len(rows)
        L = max(len(r[0]) for r in rows)
        u, y, w = np.zeros((R, L)), np.zeros((R, L)), np.zeros((R, L))
        for i, (ui, yi, _, lo, hi) in enumerate(rows):
            u[i, :len(ui)] = ui
            y[i, :len(yi)] = yi
            w[i, lo:hi] = 1.0
        return cls(u, y, w, np.array([len(r[0]) for r in rows]), np.array([float(r[2]) for r in rows]),
                   model == "ipdt")

    def __len__(self) -> int:
        return len(self.n)


def _fill(model: str, X: np.ndarray, b: Batch, rows: np.ndarray) -> np.ndarray:
    """Unit-gain responses of the rows ``rows`` of ``b`` with parameters ``X`` (one row each)."""
    S = np.zeros((len(rows), b.u.shape[1]))
    with np.errstate(all="ignore"):
        d, num, den = coefficients(model, np.nan_to_num(X, nan=1.0), b.dt[rows])
    bad = ~(np.isfinite(X).all(axis=1) & np.isfinite(num).all(axis=1) & np.isfinite(den).all(axis=1))
    for j, i in enumerate(rows):
        n, dj = int(b.n[i]), int(d[j])
        if bad[j]:
            S[j] = np.nan
        elif dj < n:
            S[j, dj:n] = _lfilter(num[j], den[j], b.u[i, :n - dj])
    return S


class _Basis:
    """Projection off the linear basis {1, s[, t]} on the counted samples (closed form, centred, batched)."""

    def __init__(self, b: Batch):
        w = b.w
        self.w = w
        self.nw = np.maximum(w.sum(axis=1), 1.0)
        self.ym = (w * b.y).sum(axis=1) / self.nw
        self.yc = (b.y - self.ym[:, None]) * w
        self.tc = None
        if b.integrating:
            t = np.arange(w.shape[1])[None, :] * b.dt[:, None]
            self.tm = (w * t).sum(axis=1) / self.nw
            self.tc = (t - self.tm[:, None]) * w
            self.tt = np.einsum("ij,ij->i", self.tc, self.tc)
            self.ty = np.einsum("ij,ij->i", self.tc, self.yc)

    def take(self, idx: np.ndarray) -> "_Basis":
        out = object.__new__(_Basis)
        out.w, out.nw, out.ym, out.yc, out.tc = self.w[idx], self.nw[idx], self.ym[idx], self.yc[idx], None
        if self.tc is not None:
            out.tm, out.tc, out.tt, out.ty = self.tm[idx], self.tc[idx], self.tt[idx], self.ty[idx]
        return out

    def fit(self, S: np.ndarray):
        """(coefficients [bias, gain(, slope)] per row, residuals, centred S, RSS) of responses ``S``."""
        sm = np.einsum("ij,ij->i", self.w, S) / self.nw
        sc = (S - sm[:, None]) * self.w
        ss = np.einsum("ij,ij->i", sc, sc)
        sy = np.einsum("ij,ij->i", sc, self.yc)
        with np.errstate(all="ignore"):
            if self.tc is None:
                g = np.where(ss > 0, sy / np.where(ss > 0, ss, 1.0), 0.0)
                coef = np.column_stack([self.ym - g * sm, g])
                r = self.yc - g[:, None] * sc
            else:
                st = np.einsum("ij,ij->i", sc, self.tc)
                det = ss * self.tt - st * st
                ok = det > 1e-14 * ss * self.tt
                dd = np.where(ok, det, 1.0)
                g = np.where(ok, (sy * self.tt - st * self.ty) / dd, 0.0)
                sl = np.where(ok, (ss * self.ty - st * sy) / dd, self.ty / self.tt)
                coef = np.column_stack([self.ym - g * sm - sl * self.tm, g, sl])
                r = self.yc - g[:, None] * sc - sl[:, None] * self.tc
        return coef, r, sc, np.einsum("ij,ij->i", r, r)

    def normal(self, D: np.ndarray, sc: np.ndarray, r: np.ndarray, gain: np.ndarray
               ) -> tuple[np.ndarray, np.ndarray]:
        """J^T J and J^T r of Kaufman's Jacobian J = -P (gain D), P the projection off {1, s[, t]}.

        Formed from Gram matrices, never the projected J itself: P D = D - (parts on the basis),
        and the residual ``r`` of the linear fit is already orthogonal to the basis, so
        J^T r = -gain D^T r.
        """
        Dw = D * self.w[:, None, :]
        G = np.matmul(Dw, D.transpose(0, 2, 1))
        m = Dw.sum(axis=2) / self.nw[:, None]
        G -= self.nw[:, None, None] * m[:, :, None] * m[:, None, :]
        ds = np.einsum("ipj,ij->ip", D, sc)
        ss = np.einsum("ij,ij->i", sc, sc)
        with np.errstate(all="ignore"):
            if self.tc is None:
                G -= ds[:, :, None] * ds[:, None, :] / np.where(ss > 0, ss, np.inf)[:, None, None]
            else:
                st = np.einsum("ij,ij->i", sc, self.tc)
                dtt = np.einsum("ipj,ij->ip", D, self.tc)
                det = ss * self.tt - st * st
                inv = 1.0 / np.where(det > 0, det, np.inf)
                # P^T [[ss, st], [st, tt]]^-1 P with P = [ds; dtt]
                G -= inv[:, None, None] * (self.tt[:, None, None] * ds[:, :, None] * ds[:, None, :]
                                           - st[:, None, None] * (ds[:, :, None] * dtt[:, None, :]
                                                                  + dtt[:, :, None] * ds[:, None, :])
                                           + ss[:, None, None] * dtt[:, :, None] * dtt[:, None, :])
        A = gain[:, None, None] ** 2 * G
        g = -gain[:, None] * np.einsum("ipj,ij->ip", D, r)
        return A, g


@dataclass(frozen=True)
class Solutions:
    """The optima of one structure on each row of a batch.

    Attributes
    ----------
    x : ndarray
        Nonlinear parameters, R x p (order of :data:`NONLINEAR`). [s]
    coef : ndarray
        bias [%], gain [-] (ipdt [1/s]) and, for ipdt, the ramp slope [%/s], R x k.
    cost : ndarray
        Residual sum of squares on the counted samples (inf where the start gave nothing finite). [%^2]
    s : ndarray
        Unit-gain responses over the whole records, R x L. [%]
    iterations : ndarray
        Jacobians computed per row. [-]
    """

    x: np.ndarray
    coef: np.ndarray
    cost: np.ndarray
    s: np.ndarray
    iterations: np.ndarray


def _row_bounds(model: str, b: Batch) -> tuple[np.ndarray, np.ndarray]:
    pairs = [bounds(model, float(dt), float(n) * float(dt)) for dt, n in zip(b.dt, b.n)]
    return np.array([p[0] for p in pairs]), np.array([p[1] for p in pairs])


def _solve_rows(M: np.ndarray, g: np.ndarray) -> np.ndarray:
    """-M^-1 g for each row (least squares where a row's matrix is singular)."""
    try:
        return np.linalg.solve(M, -g[:, :, None])[:, :, 0]
    except np.linalg.LinAlgError:
        out = np.zeros_like(g)
        for i in range(len(g)):             # row by row: only a singular row falls back to least squares
            try:
                out[i] = np.linalg.solve(M[i:i + 1], -g[i:i + 1, :, None])[0, :, 0]
            except np.linalg.LinAlgError:
                out[i] = np.linalg.lstsq(M[i], -g[i], rcond=None)[0]
        return out


def _held_solve(M: np.ndarray, g: np.ndarray, held: np.ndarray) -> np.ndarray:
    """Solve with the ``held`` parameters fixed (their step 0)."""
    if not held.any():
        return _solve_rows(M, g)
    M = M.copy()
    g = np.where(held, 0.0, g)
    hh = held[:, :, None] | held[:, None, :]
    M[hh] = 0.0
    i = np.arange(M.shape[1])
    M[:, i, i] = np.where(held, 1.0, M[:, i, i])
    return _solve_rows(M, g)


def levenberg_marquardt(model: str, x0: np.ndarray, b: Batch, max_iter: int = 100, ftol: float = 1e-8,
                        xtol: float = 1e-9) -> Solutions:
    """Bounded Levenberg-Marquardt on the variable-projection residual, every row of a batch in step.

    See the module notes. Each row keeps its own damping and stops on its own; the
    arithmetic of all rows is done together, the filters one row at a time.

    Parameters
    ----------
    model : str
        'fopdt', 'sopdt', 'sopdt0' or 'ipdt'.
    x0 : ndarray
        Starts, R x p (clipped into :func:`bounds`). [s]
    b : Batch
        The records.
    max_iter : int
        Largest number of Jacobians per row. [-]
    ftol : float
        Stop when the Gauss-Newton decrement is below this share of the cost. [-]
    xtol : float
        Stop when an accepted step is below this share of the parameters' size. [-]

    Returns
    -------
    Solutions
    """
    R = len(b)
    lo, hi = _row_bounds(model, b)
    X = np.clip(np.asarray(x0, float).reshape(R, -1), lo + 1e-9, hi - 1e-9)
    p = X.shape[1]
    basis = _Basis(b)
    allr = np.arange(R)
    with np.errstate(all="ignore"):
        S = _fill(model, X, b, allr)
        coef, res, sc, cost = basis.fit(S)
    cost = np.where(np.isfinite(cost), cost, np.inf)
    scale = np.maximum(np.abs(X), b.dt[:, None])
    lam, nu = np.full(R, 1e-3), np.full(R, 2.0)
    it = np.zeros(R, int)
    active = np.isfinite(cost)
    need = active.copy()
    A, g, dA = np.zeros((R, p, p)), np.zeros((R, p)), np.ones((R, p))
    diag = np.arange(p)
    with np.errstate(all="ignore"):
        while active.any():
            idx = np.flatnonzero(active & need)
            if len(idx):
                # forward differences of s through the filter, one column per parameter
                D = np.empty((len(idx), p, b.u.shape[1]))
                for k in range(p):
                    h = 1e-6 * np.maximum(np.abs(X[idx, k]), b.dt[idx])
                    h = np.where(X[idx, k] + h > hi[idx, k], -h, h)
                    Xk = X[idx].copy()
                    Xk[:, k] += h
                    D[:, k] = (_fill(model, Xk, b, idx) - S[idx]) / h[:, None]
                A[idx], g[idx] = basis.take(idx).normal(D, sc[idx], res[idx], coef[idx, 1])   # Kaufman's J
                it[idx] += 1
                need[idx] = False
                bad = ~(np.isfinite(A[idx]).all(axis=(1, 2)) & np.isfinite(g[idx]).all(axis=1))
                active[idx[bad]] = False
                dA[idx] = np.maximum(A[idx][:, diag, diag], 1e-12 * np.maximum(A[idx][:, diag, diag].max(axis=1),
                                                                                1e-300)[:, None])
                # the Gauss-Newton decrement g^T A^-1 g over the parameters not held at a bound by the gradient
                Xi = X[idx]
                held = ((Xi <= lo[idx] + 1e-9) & (g[idx] > 0)) | ((Xi >= hi[idx] - 1e-9) & (g[idx] < 0))
                gn = _held_solve(A[idx] + 1e-12 * dA[idx][:, :, None] * np.eye(p), g[idx], held)
                dec = -np.einsum("ip,ip->i", g[idx], gn)
                done = ~(dec > ftol * cost[idx]) | (it[idx] > max_iter)
                active[idx[done]] = False
            idx = np.flatnonzero(active)
            if not len(idx):
                break
            # damped steps; a parameter at a bound that its step pushes past is held there
            M = A[idx] + lam[idx][:, None, None] * dA[idx][:, :, None] * np.eye(p)
            Xi, li, hi_ = X[idx], lo[idx], hi[idx]
            held = np.zeros((len(idx), p), bool)
            for _ in range(p + 1):
                step = _held_solve(M, g[idx], held)
                out = ~held & (((Xi <= li + 1e-9) & (step < 0)) | ((Xi >= hi_ - 1e-9) & (step > 0)))
                if not out.any():
                    break
                held |= out
            Xn = np.clip(Xi + step, li, hi_)
            Sn = _fill(model, Xn, b, idx)
            cn, rn, scn, costn = basis.take(idx).fit(Sn)
            acc = np.isfinite(costn) & (costn < cost[idx])
            dstep = Xn - Xi
            pred = -2.0 * np.einsum("ip,ip->i", g[idx], dstep) - np.einsum("ip,ipq,iq->i", dstep, A[idx], dstep)
            rho = np.where(pred > 0, (cost[idx] - costn) / np.where(pred > 0, pred, 1.0), 0.0)
            a_idx = idx[acc]
            lam[a_idx] *= np.maximum(1.0 / 3.0, 1.0 - (2.0 * rho[acc] - 1.0) ** 3)
            nu[a_idx] = 2.0
            small = np.max(np.abs(dstep[acc]) / scale[a_idx], axis=1) <= xtol if acc.any() else np.zeros(0, bool)
            X[a_idx], S[a_idx], coef[a_idx], res[a_idx], sc[a_idx], cost[a_idx] = \
                Xn[acc], Sn[acc], cn[acc], rn[acc], scn[acc], costn[acc]
            need[a_idx] = True
            active[a_idx[small]] = False
            r_idx = idx[~acc]
            lam[r_idx] *= nu[r_idx]
            nu[r_idx] *= 2.0
            active[r_idx[lam[r_idx] >= 1e12]] = False
            active &= it <= max_iter
    return Solutions(X, coef, cost, S, it)


def response_jacobian(model: str, x: np.ndarray, coef: np.ndarray, u: np.ndarray, dt: float) -> np.ndarray:
    """Jacobian of the simulated pv with respect to every parameter of one record, for the covariance.

    Columns: gain, the nonlinear parameters (forward differences of s through the filter,
    step 1e-6 of the parameter; backward at an upper bound), bias, and for ipdt the balancing op (pv stands still when op - op[0]
    equals it; the ramp slope is -gain x balance).

    Parameters
    ----------
    model : str
        'fopdt', 'sopdt', 'sopdt0' or 'ipdt'.
    x : ndarray
        Nonlinear parameters. [s]
    coef : ndarray
        bias, gain (and slope) from :class:`Solutions`.
    u : ndarray
        Input deviation. [%]
    dt : float
        Sample interval. [s]

    Returns
    -------
    ndarray
        n x p, columns in the order of ``PARAMS[model]`` of :mod:`.identify`, then bias
        (and balance).
    """
    hi = bounds(model, dt, len(u) * dt)[1]
    s = unit_response(model, x, u, dt)
    gain = coef[1]
    t = np.arange(len(s)) * dt
    cols = [s]
    if model == "ipdt":
        balance = -coef[2] / gain if gain != 0 else 0.0
        cols = [s - balance * t]
    for i in range(len(x)):
        h = 1e-6 * max(abs(x[i]), dt)
        up = x.copy()
        up[i] = x[i] + h if x[i] + h <= hi[i] else x[i] - h
        cols.append(gain * (unit_response(model, up, u, dt) - s) / (up[i] - x[i]))
    cols.append(np.ones_like(s))
    if model == "ipdt":
        cols.append(-gain * t)
    return np.column_stack(cols)


def predict(model: str, params: Mapping[str, float], bias: float, balance: float, u: np.ndarray,
            dt: float) -> np.ndarray:
    """Simulated pv of a fitted structure: bias + gain s (ipdt: minus gain x balance x t). [%]

    Parameters
    ----------
    model : str
        'fopdt', 'sopdt' or 'ipdt'.
    params : Mapping[str, float]
        gain [-] ([1/s] for ipdt), time constants [s], dead time [s].
    bias : float
        pv at rest. [%]
    balance : float
        ipdt: op deviation at which pv stands still. [%]
    u : ndarray
        Input deviation. [%]
    dt : float
        Sample interval. [s]
    """
    shape = {"fopdt": lambda: (params["tau1"],), "ipdt": lambda: (),
             "sopdt": lambda: (params["tau1"], params["tau2"], params["tau_lead"])}[model]()
    y = bias + params["gain"] * run(model, shape, params["dead_time"], dt, u)
    if model == "ipdt":
        y = y - params["gain"] * balance * np.arange(len(u)) * dt
    return y


@dataclass(frozen=True)
class Solution:
    """The optimum of one structure on one record (a row of :class:`Solutions`).

    Attributes
    ----------
    x : ndarray
        Nonlinear parameters (order of :data:`NONLINEAR`). [s]
    coef : ndarray
        bias [%], gain [-] (ipdt [1/s]) and, for ipdt, the ramp slope [%/s].
    cost : float
        Residual sum of squares on the counted samples. [%^2]
    s : ndarray
        Unit-gain response over the whole record. [%]
    iterations : int
        Jacobians computed. [-]
    """

    x: np.ndarray
    coef: np.ndarray
    cost: float
    s: np.ndarray
    iterations: int


#: Largest batch, in samples x (parameters + 1) x rows, fitted at once (bounds the memory to ~100 MB). [-]
BATCH_ELEMENTS = 4_000_000


def solve_rows(model: str, rows: Sequence[tuple[np.ndarray, np.ndarray, float, int, int]],
               x0: Sequence[np.ndarray], max_iter: int = 100, ftol: float = 1e-8) -> list[Solution | None]:
    """:func:`levenberg_marquardt` over many records, in batches of records of one length.

    Parameters
    ----------
    model : str
        'fopdt', 'sopdt', 'sopdt0' or 'ipdt'.
    rows : sequence of tuple
        ``(u, y, dt, lo, hi)`` per record: input deviation [%], output [%], sample interval [s],
        and the counted samples ``lo:hi``.
    x0 : sequence of ndarray
        A start per record. [s]
    max_iter : int
        Largest number of Jacobians per record. [-]
    ftol : float
        Relative Gauss-Newton decrement at which a record stops. [-]

    Returns
    -------
    list of Solution or None
        In the order of ``rows``; None where the start gave no finite cost.
    """
    out: list[Solution | None] = [None] * len(rows)
    if not rows:
        return out
    order = np.argsort([len(r[0]) for r in rows], kind="stable")
    p = len(NONLINEAR[model]) + 1
    k = 0
    while k < len(order):
        size = len(rows[order[k]][0])
        m = 1           # records of one length together: no padding, so a record's arithmetic is its own
        while k + m < len(order) and len(rows[order[k + m]][0]) == size and (m + 1) * p * size <= BATCH_ELEMENTS:
            m += 1
        part = order[k:k + m]
        b = Batch.of([rows[i] for i in part], model)
        sol = levenberg_marquardt(model, np.array([x0[i] for i in part], float), b, max_iter, ftol)
        for j, i in enumerate(part):
            if np.isfinite(sol.cost[j]):
                n = int(b.n[j])
                out[i] = Solution(sol.x[j].copy(), sol.coef[j].copy(), float(sol.cost[j]), sol.s[j, :n].copy(),
                                  int(sol.iterations[j]))
        k += m
    return out
