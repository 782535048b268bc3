"""Exact frequency-domain evaluation of many loops at once.

For every loop L(jw) = sign C P F e^{-j w (theta + Ts/2)} [T_inner] is evaluated
with the exact delay on a per-loop frequency grid, all loops and frequencies in
flat numpy arrays. Every crossing and peak found on the grid is then refined on
the exact response (vectorised false position and Brent's method, with a branch and bound
over grid intervals so that no narrow peak hides between points), so the
figures do not depend on the grid.

Stability is decided by the Nyquist argument: the number of closed-loop poles in
the right half-plane is Z = P - 2 n + m, where P counts open-loop poles with
Re > 0, n is the net number of downward crossings of the ray (-inf, -1) by
L(jw) for w > 0, and m accounts for the small indentation around integrators
(see DEVELOPERS.md, "How stability is decided"). Margins never decide it.

References
----------
.. [1] K. J. Astrom and R. M. Murray, Feedback Systems, 2nd ed., Princeton, 2021, ch. 10
   (Nyquist criterion, margins, Ms).
.. [2] S. Skogestad and I. Postlethwaite, Multivariable Feedback Control, 2nd ed.,
   Wiley, 2005, sec. 2.4 (bandwidth as |S| = 1/sqrt(2), Ms bounds on margins).
"""

from __future__ import annotations

import gc
from contextlib import contextmanager
from dataclasses import dataclass, replace
from typing import Sequence

import numpy as np
import pandas as pd

from .loop import LoopModel, Rational
from .stepsim import controller_poly

#: |L| below which the tail of the frequency axis is not sampled densely. [-]
TAIL_LEVEL = 1e-2
#: Factor between the first scan point past the tail level and the end of the dense grid. [-]
TAIL_MARGIN = 1.25
#: Largest delay phase between neighbouring grid points. [rad]
DELAY_STEP = 0.5
#: Largest step in ln(w) between neighbouring grid points. [-]
LOG_STEP = 0.08
#: Step in ln(w) below a tenth of the lowest corner frequency. [-]
LOW_STEP = 0.25
#: Grid points processed in one block (memory bound). [-]
BLOCK_POINTS = 2_000_000
#: Points per loop at most. [-]
MAX_POINTS = 400_000
#: Loops evaluated together (one grid, one set of searches). [-]
CHUNK_LOOPS = 1000
#: Damping below which a root of L gets grid points of its own around it. [-]
CLUSTER_ZETA = 0.05
#: Points on the tangent scale across a lightly damped root's circle (about 0.1 rad of its angle each). [-]
CLUSTER_POINTS = 31
#: Ratio of the geometric run that joins a root's tangent scale to the log grid. [-]
CLUSTER_RATIO = 1.5

FIGURE_COLUMNS = (
    "stable", "rhp_closed", "rhp_open", "gm", "gm_db", "w180_rad_s", "gm_low", "pm_deg", "wc_rad_s",
    "dm_s", "ms", "w_ms_rad_s", "mt", "w_mt_rad_s", "wb_rad_s", "band_s_db", "band_l_db", "engine_note",
    "lower_bounds",
)


@dataclass
class Batch:
    """Loops flattened into arrays; inner loops of cascades are entries too.

    Attributes
    ----------
    num, den : ndarray (n, d)
        Coefficients of sign C P F, descending in s, left-padded with zeros.
    delay : ndarray (n,)
        Own dead time theta + Ts/2. [s]
    inner : ndarray (n,) of int
        Entry of the inner loop whose set-point response multiplies L, or -1.
    pvf : ndarray (n,)
        PV filter time constant of the entry. [s]
    """

    num: np.ndarray
    den: np.ndarray
    delay: np.ndarray
    inner: np.ndarray
    pvf: np.ndarray

    def __post_init__(self):
        #: even and odd parts of num and den (see :class:`_Points`): E_n, O_n, E_d, O_d
        self.split = (*_split_even_odd(self.num), *_split_even_odd(self.den))


def _flatten(models: Sequence[LoopModel | None]) -> tuple[list[LoopModel], np.ndarray, list[int]]:
    entries: list[LoopModel] = []
    inner_of: list[int] = []
    seen: dict[int, int] = {}

    def add(m: LoopModel) -> int:
        key = id(m)
        if key in seen:
            return seen[key]
        inn = add(m.inner) if m.inner is not None else -1
        entries.append(m)
        inner_of.append(inn)
        seen[key] = len(entries) - 1
        return seen[key]

    top = np.array([add(m) if m is not None else -1 for m in models], dtype=int)
    return entries, top, inner_of


def _pad(polys: list[tuple[float, ...]]) -> np.ndarray:
    width = max(len(p) for p in polys)
    out = np.zeros((len(polys), width))
    for i, p in enumerate(polys):
        out[i, width - len(p):] = p
    return out


def _conv_rows(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Row-wise products of polynomials (rows descending, left-padded with zeros), all rows at once."""
    out = np.zeros((a.shape[0], a.shape[1] + b.shape[1] - 1))
    for i in range(a.shape[1]):
        for j in range(b.shape[1]):
            out[:, i + j] += a[:, i] * b[:, j]
    return out


def _trim_columns(coef: np.ndarray) -> np.ndarray:
    """Leading columns that are zero in every row left out (at least one column kept)."""
    nz = np.flatnonzero(coef.any(axis=0))
    return coef[:, nz[0]:] if nz.size else coef[:, -1:]


def _put_rows(coef: np.ndarray, rows: dict[int, Sequence[float]]) -> np.ndarray:
    """``coef`` with some rows replaced by other polynomials (widened, left-padded, as needed)."""
    width = max(coef.shape[1], max(len(p) for p in rows.values()))
    out = np.zeros((coef.shape[0], width))
    out[:, width - coef.shape[1]:] = coef
    for i, p in rows.items():
        out[i] = 0.0
        out[i, width - len(p):] = p
    return out


def _loop_polys(entries: Sequence[LoopModel], pvf: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """num, den of sign C P F (as :attr:`LoopModel.rational`) of every entry, one row each;
    ``pvf`` is each entry's PV filter time constant [s].

    The products are taken for all rows at once; a controller that :func:`controller_poly`
    refuses (improper) takes its row from :attr:`LoopModel.rational`.
    """
    cn_l, cd_l, odd = [], [], []
    for i, m in enumerate(entries):
        try:
            cn, cd = controller_poly(m.controller)
        except ValueError:
            cn, cd = [0.0], [1.0]
            odd.append(i)
        cn_l.append(cn)
        cd_l.append(cd)
    pn = _pad([m.process.rational.num for m in entries])
    pd_ = _pad([m.process.rational.den for m in entries])
    sign = np.array([m.sign for m in entries], float)
    num = _conv_rows(_pad(cn_l), pn) * sign[:, None]
    den = _conv_rows(_conv_rows(_pad(cd_l), pd_), np.stack([pvf, np.ones_like(pvf)], axis=1))
    if odd:
        rows = {i: entries[i].rational for i in odd}
        num = _put_rows(num, {i: r.num for i, r in rows.items()})
        den = _put_rows(den, {i: r.den for i, r in rows.items()})
    return _trim_columns(num), _trim_columns(den)


def build_batch(models: Sequence[LoopModel | None]) -> tuple[Batch, np.ndarray]:
    """Flatten loops (and their inner loops) into a :class:`Batch`.

    Returns the batch and, for each model, its entry index (-1 for None).

    Parameters
    ----------
    models : sequence of LoopModel or None
        One model per row; None for a row that cannot be evaluated. An inner-loop
        model object shared by several outer loops becomes one entry.

    Returns
    -------
    tuple of (Batch, ndarray of int)
        The batch and, per model, the index of its entry (-1 for None).
    """
    entries, top, inner_of = _flatten(models)
    if not entries:
        z = np.zeros((0, 1))
        return Batch(z, z, np.zeros(0), np.zeros(0, int), np.zeros(0)), top
    pvf = np.array([m.pv_filter for m in entries], float)
    num, den = _loop_polys(entries, pvf)
    batch = Batch(
        num=num,
        den=den,
        delay=np.array([m.delay for m in entries], float),
        inner=np.array(inner_of, int),
        pvf=pvf,
    )
    return batch, top


def _split_even_odd(coef: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Rows of P(s) (descending) as E and O with P(jw) = E(-w^2) + j w O(-w^2), ascending in x = -w^2."""
    asc = coef[:, ::-1]
    return np.ascontiguousarray(asc[:, 0::2].T), np.ascontiguousarray(asc[:, 1::2].T)


def _horner(cols: np.ndarray, x: np.ndarray, idx: np.ndarray | None = None) -> np.ndarray:
    """sum_m c_m x^m pointwise (real); ``cols`` is (terms, rows), ascending in m.

    With ``idx`` the coefficients of point i are ``cols[:, idx[i]]`` (gathered term by term);
    without it ``cols`` holds one column per point.
    """
    if cols.shape[0] == 0:
        return np.zeros(x.shape)
    col = (lambda m: cols[m]) if idx is None else (lambda m: cols[m].take(idx))
    acc = col(cols.shape[0] - 1)
    acc = acc.copy() if idx is None else acc
    for m in range(cols.shape[0] - 2, -1, -1):
        acc *= x
        acc += col(m)
    return acc


class _Points:
    """L(jw) at given entries and frequencies, exact delay.

    The rational part is evaluated in real arithmetic from its even and odd parts,
    N(jw) = E_n(-w^2) + j w O_n(-w^2) and likewise D(jw); the delay factor e^{-jw theta}
    exactly. Entries with an inner loop get T_inner = L_i / (F (1 + L_i)) as a factor.
    With ``reuse`` (iterations at fixed entries) the coefficients are gathered once;
    otherwise term by term, which keeps memory low on a large grid.
    """

    def __init__(self, batch: Batch, idx: np.ndarray, reuse: bool = True):
        idx = np.asarray(idx, int)
        if reuse:
            self.coef, self.idx = [c.take(idx, axis=1) for c in batch.split], None
        else:
            self.coef, self.idx = list(batch.split), idx
        self.delay = batch.delay.take(idx)
        inn = batch.inner.take(idx)
        self.has = np.flatnonzero(inn >= 0)
        self.inner = _Points(batch, inn[self.has], reuse) if self.has.size else None
        self.pvf = batch.pvf.take(inn[self.has]) if self.has.size else None

    def __call__(self, w: np.ndarray, delay: bool = True) -> np.ndarray:
        """L(jw) at the entries' frequencies ``w`` [rad/s]; ``delay`` False leaves out the entries' own
        delay factor (of modulus 1: for |L| alone), not an inner loop's."""
        w = np.asarray(w, float)
        x = -(w * w)
        en, on, ed, od = (_horner(c, x, self.idx) for c in self.coef)
        num = np.empty(w.shape, complex)
        num.real, num.imag = en, w * on
        den = np.empty(w.shape, complex)
        den.real, den.imag = ed, w * od
        L = num / den
        if delay:
            L *= np.exp(-1j * (w * self.delay))
        if self.inner is not None:
            wi = w[self.has]
            Li = self.inner(wi)
            F = 1.0 / (1.0 + 1j * wi * self.pvf)
            L[self.has] = L[self.has] * Li / (F * (1.0 + Li))
        return L


def eval_L(batch: Batch, idx: np.ndarray, w: np.ndarray) -> np.ndarray:
    """L(jw) of entries ``idx`` at frequencies ``w`` (same shape), exact delay. [-]

    Parameters
    ----------
    batch : Batch
        Loops flattened by :func:`build_batch`.
    idx : ndarray of int
        Entry of the batch for each point.
    w : ndarray
        Frequency of each point, same shape as ``idx``. [rad/s]

    Returns
    -------
    ndarray of complex
        L(jw) pointwise, with e^{-jw theta} evaluated exactly and an inner loop's
        closed-loop response included. [-]
    """
    return _Points(batch, idx, reuse=False)(w)


# ----------------------------------------------------------------------------------------------
# Static (delay-free) properties of each entry: integrators, open-loop RHP poles, corner frequencies


@dataclass
class _Static:
    k: np.ndarray          # net integrators (poles at s = 0) of the own rational part
    p_own: np.ndarray      # open-loop poles with Re > 0 of the own rational part
    axis_poles: np.ndarray  # poles on the imaginary axis other than 0 (unsupported)
    c_min: np.ndarray      # lowest corner frequency [rad/s]
    c_max: np.ndarray      # highest corner frequency [rad/s]
    zeta: np.ndarray       # smallest damping of complex roots [-] (1 when none)
    l_inf: np.ndarray      # lim |L| as w -> inf of the own rational part [-]
    l_inf_real: np.ndarray  # its signed value (real) [-]
    res_w: np.ndarray = None      # lightly damped roots (poles and zeros, zeta < CLUSTER_ZETA): |Im| [rad/s]
    res_h: np.ndarray = None      # their |Re| [rad/s]
    res_own: np.ndarray = None    # their entry
    res_pole: np.ndarray = None   # True for a pole


def _row_roots(coef: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Roots of every row's polynomial between its first and last non-zero coefficient.

    The same companion matrices as ``np.roots`` of each trimmed row, their eigenvalues
    computed in stacks of one size. Returns the roots (complex) and the row of each.
    """
    nz = coef != 0
    any_nz = nz.any(axis=1)
    width = coef.shape[1]
    first = np.where(any_nz, np.argmax(nz, axis=1), width)
    last = np.where(any_nz, width - 1 - np.argmax(nz[:, ::-1], axis=1), -1)
    size = last - first + 1
    roots, owner = [np.zeros(0, complex)], [np.zeros(0, int)]
    for m in np.unique(size[size > 1]):
        rows = np.flatnonzero(size == m)
        p = coef[rows[:, None], first[rows][:, None] + np.arange(m)]
        a = np.zeros((rows.size, m - 1, m - 1))
        a[:, np.arange(1, m - 1), np.arange(m - 2)] = 1.0
        a[:, 0, :] = -p[:, 1:] / p[:, :1]
        roots.append(np.linalg.eigvals(a).astype(complex).ravel())
        owner.append(np.repeat(rows, m - 1))
    return np.concatenate(roots), np.concatenate(owner)


def _static(batch: Batch) -> _Static:
    n = batch.num.shape[0]
    num, den = batch.num, batch.den
    width_n, width_d = num.shape[1], den.shape[1]
    nz_n, nz_d = num != 0, den != 0
    has_n, has_d = nz_n.any(axis=1), nz_d.any(axis=1)
    last_n = np.where(has_n, width_n - 1 - np.argmax(nz_n[:, ::-1], axis=1), -1)
    last_d = np.where(has_d, width_d - 1 - np.argmax(nz_d[:, ::-1], axis=1), -1)
    first_n = np.where(has_n, np.argmax(nz_n, axis=1), width_n)
    first_d = np.where(has_d, np.argmax(nz_d, axis=1), width_d)
    k = np.where(has_d, width_d - 1 - last_d, 0) - np.where(has_n, width_n - 1 - last_n, 0)
    rn, on = _row_roots(num)
    rd, od = _row_roots(den)
    allr = np.concatenate([rn, rd])
    own = np.concatenate([on, od])
    scale = np.abs(allr)
    big = np.full(n, -np.inf)
    np.maximum.at(big, own, scale)
    tol = 1e-9 * np.where(np.isneginf(big), 1.0, np.fmax(1.0, big))
    p_own = np.zeros(n, int)
    np.add.at(p_own, od, rd.real > tol[od])
    axis = np.zeros(n, int)
    np.add.at(axis, od, (np.abs(rd.real) <= tol[od]) & (np.abs(rd) > tol[od]))
    # corner frequencies: root magnitudes, 1/delay, and the crossover c0^(1/k) of the
    # low-frequency asymptote c0 / s^k
    cw, co = [scale[scale > 0]], [own[scale > 0]]
    dl = np.flatnonzero(batch.delay > 0)
    cw.append(1.0 / batch.delay[dl])
    co.append(dl)
    ok = np.flatnonzero(has_n & has_d & (k > 0))
    c0 = np.abs(num[ok, last_n[ok]] / den[ok, last_d[ok]])
    ok, c0 = ok[c0 > 0], c0[c0 > 0]
    # scalar pow (libm), as per loop: the array power may round the last bit differently
    cw.append(np.array([x ** (1.0 / kk) for x, kk in zip(c0.tolist(), k[ok].tolist())], float))
    co.append(ok)
    cw, co = np.concatenate(cw), np.concatenate(co)
    c_min = np.full(n, np.inf)
    c_max = np.full(n, -np.inf)
    np.minimum.at(c_min, co, cw)
    np.maximum.at(c_max, co, cw)
    none = np.bincount(co, minlength=n) == 0
    c_min[none] = 1.0
    c_max[none] = 1.0
    cplx = np.abs(allr.imag) > 1e-12 * np.maximum(scale, 1e-300)
    zeta = np.full(n, np.inf)
    np.minimum.at(zeta, own[cplx], np.abs(allr[cplx].real) / scale[cplx])
    zeta[np.isposinf(zeta)] = 1.0
    # lightly damped roots (upper half-plane ones; the grid gets points placed by each of them)
    is_pole = np.concatenate([np.zeros(rn.size, bool), np.ones(rd.size, bool)])
    light = (allr.imag > 0) & (np.abs(allr.real) < CLUSTER_ZETA * scale)
    res = (allr.imag[light], np.abs(allr.real[light]), own[light], is_pole[light])
    l_inf = np.zeros(n)
    l_inf_real = np.zeros(n)
    same = has_d & ((width_n - first_n) == (width_d - first_d))
    l_inf_real[same] = num[same, first_n[same]] / den[same, first_d[same]]
    l_inf[same] = np.abs(l_inf_real[same])
    # Cascades: an outer entry inherits its inner loops' time scales; its own rational part
    # is multiplied by T_inner, strictly proper when the inner loop is, so l_inf drops to 0.
    for i in np.flatnonzero(batch.inner >= 0):
        j = batch.inner[i]
        if j >= 0:
            c_min[i] = min(c_min[i], c_min[j])
            c_max[i] = max(c_max[i], c_max[j])
            zeta[i] = min(zeta[i], zeta[j])
            l_inf[i] = 0.0 if l_inf[j] == 0 else l_inf[i] * l_inf[j] / max(abs(1 - l_inf[j]), 1e-12)
            l_inf_real[i] = 0.0 if l_inf[j] == 0 else l_inf[i]
    return _Static(k, p_own, axis, c_min, c_max, zeta, l_inf, l_inf_real, *res)


def _total_delay(batch: Batch) -> np.ndarray:
    d = batch.delay.copy()
    for i in range(d.size):
        j = batch.inner[i]
        while j >= 0:
            d[i] += batch.delay[j]
            j = batch.inner[j]
    return d


def _depth(batch: Batch) -> np.ndarray:
    depth = np.zeros(batch.inner.size, int)
    for i in range(depth.size):
        j = batch.inner[i]
        while j >= 0:
            depth[i] += 1
            j = batch.inner[j]
    return depth


# ----------------------------------------------------------------------------------------------
# Vectorised refinement


class _Jobs:
    """Brackets of several searches side by side, each job ``(entries, a, b, fun)`` with its own fun(L, w).

    :meth:`f` evaluates the functions at some brackets (an active subset, shrinking as brackets
    converge); the coefficients of L are gathered once for the active set and gathered again
    only when it has shrunk well below the set gathered.
    """

    def __init__(self, batch: Batch, jobs):
        self.batch = batch
        self.funs = [j[3] for j in jobs]
        sizes = [np.size(j[0]) for j in jobs]
        self.edges = np.concatenate([[0], np.cumsum(sizes)]).astype(int)
        self.ent = np.concatenate([np.asarray(j[0], int) for j in jobs])
        self.a = np.concatenate([np.asarray(j[1], float) for j in jobs])
        self.b = np.concatenate([np.asarray(j[2], float) for j in jobs])
        self.kind = np.repeat(np.arange(len(jobs)), sizes)
        # optional fifth element: relative location tolerance of a job's maxima
        self.xrtol = np.repeat([j[4] if len(j) > 4 else PEAK_XRTOL for j in jobs], sizes).astype(float)
        # optional sixth: a known inner point and the values at a, that point and b (fun, not negated)
        self.init = np.full((4, self.a.size), np.nan)
        for j, lo, hi in zip(jobs, self.edges[:-1], self.edges[1:]):
            if len(j) > 5 and hi > lo:
                self.init[:, lo:hi] = np.asarray(j[5], float)
        self.built = None

    def f(self, idx: np.ndarray, x: np.ndarray) -> np.ndarray:
        """fun(L(j x), x) of brackets ``idx`` (sorted; a subset of the previous call's, or any set
        larger than it) at frequencies ``x``. [-]"""
        if self.built is None or idx.size > self.built.size or idx.size < 0.6 * self.built.size:
            self.built = idx.copy()
            self.at = _Points(self.batch, self.ent[idx])
            self.w_built = self.a[idx].copy()
            self.kind_built = self.kind[idx]
        if idx.size == self.built.size:
            pos = slice(None)
        else:
            pos = np.searchsorted(self.built, idx)
        self.w_built[pos] = x
        Lv = self.at(self.w_built)[pos]
        kind = self.kind_built[pos]
        out = np.empty(x.shape)
        for k, fun in enumerate(self.funs):
            # brackets stay in job order (active sets are sorted), so each job is one run
            lo, hi = np.searchsorted(kind, [k, k + 1])
            if hi > lo:
                out[lo:hi] = fun(Lv[lo:hi], x[lo:hi])
        return out

    def split(self, *arrays):
        """Per job: the part of each array (one value per bracket) that belongs to it."""
        cut = [slice(self.edges[i], self.edges[i + 1]) for i in range(len(self.funs))]
        return [tuple(arr[c] for arr in arrays) if len(arrays) > 1 else arrays[0][c] for c in cut]


#: Relative width at which a root bracket counts as closed (margins then follow to about 1e-13). [-]
ROOT_RTOL = 1e-13
#: Relative location tolerance of a maximum: fine enough that a peak of 5e4 keeps its value to 1e-11. [-]
PEAK_XRTOL = 1e-10
#: Tolerance for a maximum over the last interval of a band, mostly at one of its ends (known). [-]
EDGE_XRTOL = float(np.sqrt(np.finfo(float).eps))


def _find_roots(batch: Batch, jobs, max_iter: int = 100) -> list[np.ndarray]:
    """Roots for several jobs ``(entries, a, b, fun)`` at once: Illinois false position, bisection as a fallback.

    Each job's fun(L, w) changes sign on every one of its brackets [a, b] (the sign class of a value
    is ``fun > 0``). The false-position point with the Illinois halving converges superlinearly on
    smooth functions; a bisection step is taken where that point is not finite, and for every
    bracket still open after 40 steps (so at most 40 + 60 steps).
    A bracket is done when its width is below ROOT_RTOL relative. Returns the roots per job.

    Reference: M. Dowell and P. Jarratt, "A modified regula falsi method for computing the root
    of an equation", BIT 11 (1971) 168-174 (the Illinois method).
    """
    J = _Jobs(batch, jobs)
    n = J.a.size
    if n == 0:
        return J.split(J.a)
    act = np.arange(n)
    A, B = J.a.copy(), J.b.copy()
    FA, FB = J.f(act, A), J.f(act, B)
    PA = FA > 0
    SIDE = np.zeros(n, np.int8)
    root = 0.5 * (A + B)                         # results, by bracket
    for it in range(max_iter + 1):
        tol = ROOT_RTOL * np.maximum(np.abs(A), np.abs(B))
        go = (B - A) > tol
        if not go.all():
            # brackets done: keep their middle, go on with the others (state kept compact)
            root[act[~go]] = 0.5 * (A[~go] + B[~go])
            act, A, B, FA, FB, PA, SIDE, tol = (z[go] for z in (act, A, B, FA, FB, PA, SIDE, tol))
        if act.size == 0 or it == max_iter:
            break
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            xs = (A * FB - B * FA) / (FB - FA)
        bis = (it >= 40) | ~np.isfinite(xs)
        # (with opposite signs at the ends the point lies in [A, B]; one on or within the tolerance
        # of an end moves to just inside it, so that the bracket closes on the next step when that
        # end is, to rounding, the root)
        d = 0.4 * tol
        x = np.where(bis, 0.5 * (A + B), np.clip(xs, A + d, B - d))
        fx = J.f(act, x)
        right = (fx > 0) == PA                   # the root lies in [x, b]
        # Illinois: an end kept twice in a row has its function value halved for the interpolation
        FB = np.where(right, np.where(SIDE == -1, 0.5 * FB, FB), fx)
        FA = np.where(right, fx, np.where(SIDE == 1, 0.5 * FA, FA))
        A, B = np.where(right, x, A), np.where(right, B, x)
        SIDE = np.where(right, -1, 1).astype(np.int8)
    root[act] = 0.5 * (A + B)
    return J.split(root)


#: The golden-section fraction of Brent's method. [-]
_CGOLD = 0.5 * (3.0 - np.sqrt(5.0))


def _find_maxima(batch: Batch, jobs, max_iter: int = 200) -> list[tuple[np.ndarray, np.ndarray]]:
    """Maxima of several jobs ``(entries, a, b, fun[, xrtol[, init]])`` at once, by Brent's method on each bracket.

    Golden-section steps with parabolic interpolation where the parabola is acceptable, until the
    location is known to ``xrtol`` relative (PEAK_XRTOL by default; the value then to about its square). Returns, per job,
    the location and the value of the largest value found inside each bracket [a, b] (the ends,
    grid points, are the caller's). ``init`` = (x0, f(a), f(x0), f(b)), arrays, gives a known inner
    point with values no lower than at the ends (a grid maximum): the search starts from the three
    points with a parabolic step instead of a golden-section one.

    Reference: R. P. Brent, Algorithms for Minimization without Derivatives, Prentice-Hall, 1973,
    ch. 5 (the bounded variant as in scipy.optimize.fminbound).
    """
    J = _Jobs(batch, jobs)
    n = J.a.size
    if n == 0:
        return J.split(J.a, J.a)
    act = np.arange(n)
    A, B = J.a.copy(), J.b.copy()
    X = A + _CGOLD * (B - A)
    FX = np.full(n, np.inf)
    cold = np.isnan(J.init[0])
    if cold.any():
        FX[cold] = -J.f(act[cold], X[cold])      # minimise g = -fun
    W, V, FW, FV = X.copy(), X.copy(), FX.copy(), FX.copy()
    E, RAT = np.zeros(n), np.zeros(n)
    # brackets with a known inner point start from it and the two ends, parabolic step first
    warm = ~cold
    if warm.any():
        x0, fa, f0, fb = J.init[:, warm]
        a_best = fa >= fb
        X[warm], FX[warm] = x0, -f0
        W[warm], FW[warm] = np.where(a_best, A[warm], B[warm]), -np.maximum(fa, fb)
        V[warm], FV[warm] = np.where(a_best, B[warm], A[warm]), -np.minimum(fa, fb)
        E[warm] = RAT[warm] = B[warm] - A[warm]
    FX, FW, FV = (np.where(np.isnan(z), np.inf, z) for z in (FX, FW, FV))
    TOL = J.xrtol
    xf, fx = X.copy(), FX.copy()                # results, by bracket
    for _ in range(max_iter):
        t1 = TOL * np.abs(X) + 1e-300
        t2 = 2.0 * t1
        xm = 0.5 * (A + B)
        go = np.abs(X - xm) > (t2 - 0.5 * (B - A))
        if not go.all():
            # brackets done: keep their best point, go on with the others (state kept compact)
            done = ~go
            xf[act[done]], fx[act[done]] = X[done], FX[done]
            act, A, B, X, FX, W, FW, V, FV, E, RAT, TOL, t1, t2, xm = (
                z[go] for z in (act, A, B, X, FX, W, FW, V, FV, E, RAT, TOL, t1, t2, xm))
        if act.size == 0:
            break
        # parabola through (X, FX), (W, FW), (V, FV)
        with np.errstate(invalid="ignore", over="ignore"):
            r = (X - W) * (FX - FV)
            q = (X - V) * (FX - FW)
            p = (X - V) * q - (X - W) * r
            q = 2.0 * (q - r)
            p = np.where(q > 0.0, -p, p)
            q = np.abs(q)
            ok = (np.abs(E) > t1) & (np.abs(p) < np.abs(0.5 * q * E)) & (p > q * (A - X)) & (p < q * (B - X))
            rat_p = np.where(ok, p / np.where(q == 0, 1.0, q), 0.0)
        e_new = np.where(ok, RAT, np.where(X >= xm, A - X, B - X))
        rat_new = np.where(ok, rat_p, _CGOLD * e_new)
        # a parabolic point too near an end steps by t1 towards the middle
        xp = X + rat_new
        near = ok & (((xp - A) < t2) | ((B - xp) < t2))
        rat_new = np.where(near, np.where(xm - X >= 0, t1, -t1), rat_new)
        u = X + np.where(rat_new >= 0, 1.0, -1.0) * np.maximum(np.abs(rat_new), t1)
        fu = -J.f(act, u)
        fu = np.where(np.isnan(fu), np.inf, fu)
        better = fu <= FX
        right = u >= X
        # bracket
        A, B = (np.where(better, np.where(right, X, A), np.where(right, A, u)),
                np.where(better, np.where(right, B, X), np.where(right, u, B)))
        # the three best points
        w_to_v = better | (fu <= FW) | (W == X)
        u_to_v = ~w_to_v & ((fu <= FV) | (V == X) | (V == W))
        V, FV = np.where(w_to_v, W, np.where(u_to_v, u, V)), np.where(w_to_v, FW, np.where(u_to_v, fu, FV))
        W, FW = np.where(better, X, np.where(w_to_v, u, W)), np.where(better, FX, np.where(w_to_v, fu, FW))
        X, FX = np.where(better, u, X), np.where(better, fu, FX)
        E, RAT = e_new, rat_new
    xf[act], fx[act] = X, FX
    return J.split(xf, -fx)


def _abs_s(Lv: np.ndarray, _w: np.ndarray) -> np.ndarray:
    return 1.0 / np.abs(1.0 + Lv)


def _abs_t(Lv: np.ndarray, _w: np.ndarray) -> np.ndarray:
    return np.abs(Lv) / np.abs(1.0 + Lv)


def _neg_abs_l(Lv: np.ndarray, _w: np.ndarray) -> np.ndarray:
    return -np.abs(Lv)


def _seg_reduce(ufunc, values: np.ndarray, seg: np.ndarray, out: np.ndarray) -> np.ndarray:
    """``ufunc.at(out, seg, values)``; by ``ufunc.reduceat`` over runs when ``seg`` is sorted (grid points are).

    Both give the same values: max, min, fmax are exact and order-free (NaN propagates alike).
    """
    if values.size < 64 or not (seg[1:] >= seg[:-1]).all():
        ufunc.at(out, seg, values)
        return out
    starts = np.flatnonzero(np.concatenate(([True], seg[1:] != seg[:-1])))
    s = seg[starts]
    out[s] = ufunc(out[s], ufunc.reduceat(values, starts))
    return out


def _seg_max(values: np.ndarray, seg: np.ndarray, n: int, fill: float = -np.inf) -> np.ndarray:
    return _seg_reduce(np.maximum, values, seg, np.full(n, fill))


def _seg_min(values: np.ndarray, seg: np.ndarray, n: int, fill: float = np.inf) -> np.ndarray:
    return _seg_reduce(np.minimum, values, seg, np.full(n, fill))


def _arg_by_seg(values: np.ndarray, seg: np.ndarray, n: int) -> np.ndarray:
    """Index (into values) of the per-segment maximum; -1 for empty segments."""
    out = np.full(n, -1, int)
    if values.size == 0:
        return out
    # ties and NaN as a stable sort on (seg, -values) would take them: the first of the
    # largest values, NaN only when the segment holds nothing else (no sort: O(size))
    top = _seg_reduce(np.fmax, values, seg, np.full(n, np.nan))
    hit = np.flatnonzero((values == top[seg]) | np.isnan(top[seg]))
    segs, first = np.unique(seg[hit], return_index=True)
    out[segs] = hit[first]
    return out


def _interior(same: np.ndarray) -> np.ndarray:
    """Mask over points 1 .. N-2: a left and a right neighbour in the point's own segment.

    ``same[i]`` tells whether points i and i + 1 lie in one segment (length N - 1).
    """
    return same[:-1] & same[1:]


# ----------------------------------------------------------------------------------------------
# The grid


def _grids(batch: Batch, ents: np.ndarray, st: _Static, tdelay: np.ndarray, cap: bool = True):
    """Per-entry frequency ranges and point counts (``cap=False``: counts before the cap MAX_POINTS)."""
    c_min, c_max = st.c_min[ents], st.c_max[ents]
    w_lo = 1e-3 * c_min
    # coarse magnitude scan to find where |L| has fallen to the tail level for good; it starts at
    # a tenth of the lowest corner: below, |L| follows its asymptote c0 / w^k (k >= 0), so it is
    # above the level there if it is anywhere below (with integrators |L| >= 10 at the start)
    per_dec = 12
    w_s = 100.0 * w_lo
    # it ends two decades above the highest corner, where |L| of a strictly proper loop falls
    # steadily (every factor is within 1 % of its asymptote); four above for an outer loop of a
    # cascade, whose inner loop's closed-loop resonance is not among the corners
    top = np.where(batch.inner[ents] >= 0, 1e4, 1e2) * c_max
    ndec = np.log10(top / w_s)
    npts = np.ceil(ndec * per_dec).astype(int) + 1
    seg = np.repeat(np.arange(ents.size), npts)
    start = np.cumsum(npts) - npts
    pos = np.arange(seg.size) - start[seg]
    w = w_s[seg] * 10.0 ** (pos / per_dec)
    with np.errstate(divide="ignore", invalid="ignore"):     # (a point on an undamped pole: |L| = inf, above)
        mag = np.abs(_Points(batch, ents[seg], reuse=False)(w, delay=False))    # |e^{-jw theta}| = 1
    # (with 0 < |L(inf)| < 1 below 1 as well: |L| may fall through 1 close to its limit)
    linf = st.l_inf[ents]
    thr = np.maximum(TAIL_LEVEL, linf * (1 + 1e-3) + TAIL_LEVEL * linf)
    thr = np.where(linf < 1.0, np.minimum(thr, np.maximum(0.5 * (1.0 + linf), TAIL_LEVEL)), thr)
    above = mag >= thr[seg]
    last = _seg_max(np.where(above, pos, -1), seg, ents.size, -1)
    w_hi = np.where(last >= 0, w_s * 10.0 ** ((last + 1) / per_dec), w_lo * 100.0) * TAIL_MARGIN
    # still above the tail level at the end of the scan: beyond every corner |L| falls at least
    # as 1/w (strictly proper loops), so it is below the level by w_end |L(w_end)| / level
    end_above = (last == npts - 1) & (st.l_inf[ents] == 0)
    if end_above.any():
        mag_end = mag[start + npts - 1]
        w_hi = np.where(end_above, top * np.maximum(mag_end / thr, 1.0) * 2.0, w_hi)
    w_hi = np.maximum(w_hi, 100.0 * w_lo)
    # a resonance narrower than the scan's step: |L| at each lightly damped pole itself, and past
    # it |L| ~ |L(j w_d)| h / |w - w_d| (h = |Re p|) falls below the level at w_d + h |L(j w_d)| / level
    r_loc, r_w, r_h, _ = _resonances(st, ents, pole=True)
    if r_loc.size:
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            peak = np.abs(_Points(batch, ents[r_loc], reuse=False)(r_w, delay=False))
            end = (r_w + r_h * peak / thr[r_loc]) * TAIL_MARGIN
        # (a pole on the axis itself, h = 0, has no finite peak: such loops are decided apart)
        hit = (peak >= thr[r_loc]) & np.isfinite(end)
        np.maximum.at(w_hi, r_loc[hit], end[hit])
    # without dead time the phase only settles beyond every corner: the grid goes on to ``top``,
    # so that a phase crossover where |L| is small (a large gain margin) and the crossover of a
    # biproper loop whose |L| never rises above the level are on it
    w_hi = np.where(tdelay[ents] > 0, w_hi, np.maximum(w_hi, top))
    # one more turn of the delay spiral: its first crossing of the negative real axis is the
    # largest-|L| crossing of the tail, which sets the gain margin when none lies further in
    td = tdelay[ents]
    w_hi = w_hi + np.where(td > 0, 2.2 * np.pi / np.where(td > 0, td, 1.0), 0.0)
    h_log = np.clip(st.zeta[ents] / 3.0, 0.002, LOG_STEP)
    with np.errstate(divide="ignore"):
        w_b = np.where(tdelay[ents] > 0, DELAY_STEP / (np.maximum(tdelay[ents], 1e-300) * h_log), np.inf)
    w_mid = np.minimum(w_b, w_hi)
    # below a tenth of the lowest corner L follows its low-frequency asymptote c0 (jw)^-k with
    # a negligible delay phase: nothing turns there, a coarse log step suffices
    w_a = np.minimum(0.1 * c_min, w_mid)
    n_low = np.where(w_a > w_lo, np.ceil(np.log(w_a / w_lo) / LOW_STEP), 0).astype(int)
    n_log = n_low + np.ceil(np.log(w_mid / np.maximum(w_a, w_lo)) / h_log).astype(int) + 1
    with np.errstate(invalid="ignore", over="ignore"):
        # clipped before the cast: an extreme delay times bandwidth must not wrap around to a negative count
        n_lin_f = np.where(w_hi > w_b, np.ceil((w_hi - w_mid) * tdelay[ents] / DELAY_STEP), 0)
    n_lin = np.nan_to_num(np.minimum(n_lin_f, 1e15), nan=1e15).astype(np.int64)
    over = (n_log + n_lin) > MAX_POINTS
    if over.any() and cap:
        n_lin = np.where(over, np.maximum(MAX_POINTS - n_log, 0), n_lin)
    return w_lo, w_hi, w_mid, h_log, n_log, n_lin, over, np.maximum(w_a, w_lo), n_low


def _resonances(st: _Static, ents: np.ndarray, pole: bool | None = None):
    """Lightly damped roots of the entries ``ents``: (position in ``ents``, |Im| [rad/s], |Re| [rad/s],
    is a pole); ``pole`` True or False keeps poles or zeros only."""
    pos = np.full(st.k.size, -1)
    pos[ents] = np.arange(ents.size)
    loc = pos[st.res_own]
    keep = loc >= 0
    if pole is not None:
        keep &= st.res_pole == pole
    return loc[keep], st.res_w[keep], st.res_h[keep], st.res_pole[keep]


def _cluster_points(st: _Static, ents: np.ndarray, w_lo: np.ndarray, w_hi: np.ndarray, h_log: np.ndarray):
    """Grid points placed by every lightly damped root p = -h + j w_d of the entries (poles and zeros).

    Near such a root L follows a circle, c / (h + j (w - w_d)) for a pole: its angle moves by
    atan((w - w_d) / h), all of it within a few h of w_d, however small h is. The points sit at
    w_d + h tan(phi) for CLUSTER_POINTS equal steps of phi across (-pi/2, pi/2) (about 0.1 rad of the
    circle each), then on a geometric run (ratio CLUSTER_RATIO) out to the log grid's own step, so
    that no step of the grid can pass over the root. Returns (position in ``ents``, w) [-], [rad/s].
    """
    loc, wd, h, _ = _resonances(st, ents)
    if loc.size == 0:
        return np.zeros(0, int), np.zeros(0)
    h = np.maximum(h, 1e-9 * wd)
    phi = np.linspace(-0.5 * np.pi, 0.5 * np.pi, CLUSTER_POINTS + 2)[1:-1]
    core = h[:, None] * np.tan(phi)[None, :]
    x_out = h * np.tan(phi[-1])
    reach = wd * np.expm1(h_log[loc])
    n_geo = np.ceil(np.log(np.maximum(reach / x_out, 1.0)) / np.log(CLUSTER_RATIO)).astype(int)
    j = np.arange(1, int(n_geo.max(initial=0)) + 1)
    geo = x_out[:, None] * CLUSTER_RATIO ** j[None, :]
    geo = np.where(j[None, :] <= n_geo[:, None], geo, np.nan)
    off = np.concatenate([core, geo, -geo], axis=1)
    w = wd[:, None] + off
    seg = np.broadcast_to(loc[:, None], w.shape)
    ok = np.isfinite(w) & (w > w_lo[loc][:, None]) & (w < w_hi[loc][:, None])
    return seg[ok], w[ok]


def _merge_points(seg, w, eseg, ew, n):
    """The grid (``seg``, ``w``: sorted by segment, ascending within) with points (``eseg``, ``ew``)
    added in order; equal points once. Returns seg, w, start, counts."""
    if ew.size:
        aff = np.zeros(n, bool)
        aff[eseg] = True
        mine = aff[seg]
        sub_seg = np.concatenate([seg[mine], eseg])
        sub_w = np.concatenate([w[mine], ew])
        o = np.lexsort((sub_w, sub_seg))
        sub_seg, sub_w = sub_seg[o], sub_w[o]
        dup = np.concatenate([[False], (sub_seg[1:] == sub_seg[:-1]) & (sub_w[1:] <= sub_w[:-1])])
        sub_seg, sub_w = sub_seg[~dup], sub_w[~dup]
        seg = np.concatenate([seg[~mine], sub_seg])
        w = np.concatenate([w[~mine], sub_w])
        o = np.argsort(seg, kind="stable")
        seg, w = seg[o], w[o]
    counts = np.bincount(seg, minlength=n)
    return seg, w, np.cumsum(counts) - counts, counts


def _make_points(w_lo, w_mid, w_hi, h_log, n_log, n_lin, w_a, n_low):
    """All grid points of a block: per loop a coarse log run [w_lo, w_a), a fine log run [w_a, w_mid]
    and a linear run (w_mid, w_hi]; built as runs (base + k step, exponentiated on the log runs)."""
    counts = n_log + n_lin
    n = counts.size
    seg = np.repeat(np.arange(n), counts)
    start = np.cumsum(counts) - counts
    with np.errstate(invalid="ignore", divide="ignore"):
        step_low = np.log(w_a / w_lo) / np.maximum(n_low, 1)
        step_log = np.log(w_mid / w_a) / np.maximum(n_log - n_low - 1, 1)
        step_lin = (w_hi - w_mid) / np.maximum(n_lin, 1)
    # three runs per loop, in order: (count, first value, step, exponentiate)
    run_n = np.stack([n_low, n_log - n_low, n_lin], axis=1).ravel()
    base = np.stack([np.log(w_lo), np.log(w_a), w_mid + step_lin], axis=1).ravel()
    step = np.stack([step_low, step_log, step_lin], axis=1).ravel()
    rid = np.repeat(np.arange(run_n.size), run_n)
    k = np.arange(rid.size) - (np.cumsum(run_n) - run_n)[rid]
    v = base[rid] + k * step[rid]
    lin = (rid % 3) == 2
    w = np.where(lin, v, np.exp(np.where(lin, 0.0, v)))
    return seg, w, start, counts


# ----------------------------------------------------------------------------------------------
# Evaluation of one block of entries


def _evaluate_block(batch: Batch, ents: np.ndarray, st: _Static, tdelay: np.ndarray, p_open: np.ndarray,
                    band: np.ndarray, grid, mt: bool = True) -> dict[str, np.ndarray]:
    n = ents.size
    out: dict[str, np.ndarray] = {}
    w_lo, w_hi, w_mid, h_log, n_log, n_lin, capped, w_a, n_low = grid
    seg, w, start, counts = _make_points(w_lo, w_mid, w_hi, h_log, n_log, n_lin, w_a, n_low)
    seg, w, start, counts = _merge_points(seg, w, *_cluster_points(st, ents, w_lo, w_hi, h_log), n)
    ent_pt = ents[seg]
    L = eval_L(batch, ent_pt, w)
    one_plus = 1.0 + L
    absL = np.abs(L)
    abs1 = np.abs(one_plus)
    absS = 1.0 / abs1
    same = seg[1:] == seg[:-1]
    # grid intervals [w_i, w_i+1] are indexed by their left point i; ``same[i]``: both ends in one segment
    inner = _interior(same)
    k = st.k[ents]
    kpos = np.maximum(k, 0)

    # values at w = 0 (finite only without integrators)
    L0 = np.full(n, np.nan, complex)
    fin = k <= 0
    if fin.any():
        L0[fin] = eval_L(batch, ents[fin], np.zeros(int(fin.sum())))
    L0 = np.where(k < 0, 0.0 + 0.0j, L0)
    L0r = L0.real

    # ---- Nyquist: real-axis crossings of L(jw) ----
    im = L.imag
    pos_im = im > 0
    br = np.flatnonzero(same & (pos_im[:-1] != pos_im[1:]))
    ta = im[br] / (im[br] - im[br + 1])
    Lest = L[br] + ta * (L[br + 1] - L[br])
    neg = Lest.real < 0
    big = neg & (np.abs(Lest) > 0.05)
    small = neg & ~big
    pick = np.flatnonzero(big)
    if small.any():
        sidx = np.flatnonzero(small)
        best = _arg_by_seg(np.abs(Lest[sidx]), seg[br[sidx]], n)
        pick = np.union1d(pick, sidx[best[best >= 0]])
    brp = br[pick]
    # gain crossovers (|L| through 1) and the first rise of |S| through 1/sqrt(2) (bandwidth)
    lg_pos = absL > 1.0
    bc = np.flatnonzero(same & (lg_pos[:-1] != lg_pos[1:]))
    thr = 1.0 / np.sqrt(2.0)
    rise = np.flatnonzero(same & (absS[:-1] < thr) & (absS[1:] >= thr))
    first = _arg_by_seg(-rise.astype(float), seg[rise], n)
    rb = rise[first[first >= 0]]
    wx, wc_all, wb_rise = _find_roots(batch, [
        (ent_pt[brp], w[brp], w[brp + 1], lambda Lv, _w: Lv.imag),
        (ent_pt[bc], w[bc], w[bc + 1], lambda Lv, _w: np.log(np.abs(Lv))),
        (ent_pt[rb], w[rb], w[rb + 1], lambda Lv, w_: _abs_s(Lv, w_) - thr)])
    Lx = eval_L(batch, ent_pt[brp], wx)
    rex = Lx.real
    sx = seg[brp]
    down = pos_im[brp]
    left = rex < -1.0
    n_net = np.zeros(n, int)
    np.add.at(n_net, sx[left], np.where(down[left], 1, -1))
    a_lo = np.angle(one_plus[start])
    m = np.round((2.0 * a_lo + kpos * np.pi) / (2.0 * np.pi)).astype(int)
    # the large arc: without dead time L -> L(inf) there, and a biproper loop with L(inf) < -1 crosses the
    # ray (-inf, -1) once on it (L ~ L(inf) + a/s: from the side where L(jw) ends, to the other); counted
    # once (no mirror half), +1 when downward (Im L > 0 at the end of the grid), as n counts
    last = start + counts - 1
    arc = np.where((tdelay[ents] == 0) & (st.l_inf_real[ents] < -1.0) & (batch.inner[ents] < 0),
                   np.sign(L.imag[last]), 0.0).astype(int)
    z = p_open - 2 * n_net - arc + m
    # neutral-type loops: |L(inf)| >= 1 with a delay cannot be stable
    neutral = (st.l_inf[ents] >= 1.0) & (tdelay[ents] > 0)
    min_dist = _seg_min(abs1, seg, n)
    marginal = (min_dist < 1e-9) | (st.axis_poles[ents] > 0)
    # |L(inf)| > 1 with dead time: infinitely many closed-loop poles in the right half-plane (no count)
    endless = neutral & (st.l_inf[ents] > 1.0)
    out["rhp_closed"] = np.where(endless, np.nan, np.maximum(z, 0))
    out["stable"] = (z == 0) & ~neutral & ~marginal
    out["_z_raw"] = z
    out["_endless"] = endless
    notes = np.full(n, "", object)
    notes[neutral] = ("high-frequency loop gain |L(inf)| = 1 with dead time: closed-loop poles approach the "
                      "imaginary axis without end; not stable")
    notes[endless] = ("high-frequency loop gain |L(inf)| > 1 with dead time (a neutral loop): infinitely many "
                      "closed-loop poles in the right half-plane")
    notes[st.axis_poles[ents] > 0] = AXIS_NOTE
    notes[min_dist < 1e-9] = "L(jw) passes through -1: marginally stable, treated as not stable"
    notes[capped] = "frequency grid capped; figures at very high frequency may be incomplete"
    # (with open-loop poles on the axis the count means nothing: their note stays, they are decided apart)
    notes[(z < 0) & (st.axis_poles[ents] == 0)] = "Nyquist count inconsistent (numerical); treated as not stable"
    out["stable"] &= z >= 0

    # ---- gain margins ----
    # (a pass through L = 0, at a zero on the imaginary axis, is no crossing of the negative real axis)
    negx = (rex < 0) & (np.abs(Lx) > 1e-12)
    kfac = np.where(negx, -1.0 / np.where(negx, rex, -1.0), np.nan)
    with np.errstate(invalid="ignore"):
        up = negx & (kfac > 1.0)
        lowm = negx & (kfac < 1.0)
    gm = np.full(n, np.inf)
    w180 = np.full(n, np.nan)
    gm_low = np.full(n, np.nan)
    if up.any():
        iu = np.flatnonzero(up)
        best = _arg_by_seg(-kfac[iu], sx[iu], n)
        ok = best >= 0
        gm[ok] = kfac[iu[best[ok]]]
        w180[ok] = wx[iu[best[ok]]]
    if lowm.any():
        il = np.flatnonzero(lowm)
        best = _arg_by_seg(kfac[il], sx[il], n)
        ok = best >= 0
        gm_low[ok] = kfac[il[best[ok]]]
    # crossing at w = 0: L(0) real and negative
    with np.errstate(divide="ignore", invalid="ignore"):
        k0 = np.where((k == 0) & (L0r < 0), -1.0 / L0r, np.nan)
    z0 = (k0 > 1.0) & (k0 < gm)
    gm = np.where(z0, k0, gm)
    w180 = np.where(z0, 0.0, w180)
    z1 = (k0 < 1.0) & ~(gm_low >= k0)
    gm_low = np.where(z1, k0, gm_low)
    # with dead time and 0 < |L(inf)| < 1 the crossings of the negative real axis go on for ever, their
    # |L| tending to |L(inf)|: the margin is the infimum over all of them, at most the limit 1/|L(inf)|
    # (reached as w -> inf when |L| approaches |L(inf)| from below)
    linf_e = st.l_inf[ents]
    with np.errstate(divide="ignore"):
        k_lim = np.where((tdelay[ents] > 0) & (linf_e > 0) & (linf_e < 1.0), 1.0 / linf_e, np.inf)
    zl = k_lim < gm
    gm = np.where(zl, k_lim, gm)
    w180 = np.where(zl, np.inf, w180)
    # without dead time a biproper loop with L(inf) real and negative crosses the negative real axis at
    # w = inf (the large arc): at the factor -1/L(inf) a closed-loop pole passes through infinity
    lr = st.l_inf_real[ents]
    with np.errstate(divide="ignore"):
        k_arc = np.where((tdelay[ents] == 0) & (lr < 0) & (batch.inner[ents] < 0), -1.0 / lr, np.nan)
    za = (k_arc > 1.0) & (k_arc < gm)
    gm = np.where(za, k_arc, gm)
    w180 = np.where(za, np.inf, w180)
    zb = (k_arc < 1.0) & ~(gm_low >= k_arc)
    gm_low = np.where(zb, k_arc, gm_low)
    out["gm"] = gm
    with np.errstate(divide="ignore"):
        out["gm_db"] = 20.0 * np.log10(gm)
    out["w180_rad_s"] = w180
    out["gm_low"] = gm_low

    # ---- gain crossovers: phase and delay margins ----
    Lc = eval_L(batch, ent_pt[bc], wc_all)
    pm_all = 180.0 + np.degrees(np.angle(Lc))
    pm_all = np.where(pm_all > 180.0, pm_all - 360.0, pm_all)
    sc = seg[bc]
    pm = np.full(n, np.inf)
    wc = np.full(n, np.nan)
    dm = np.full(n, np.inf)
    if bc.size:
        best = _arg_by_seg(-np.abs(pm_all), sc, n)
        ok = best >= 0
        pm[ok] = pm_all[best[ok]]
        wc[ok] = wc_all[best[ok]]
        dm_all = np.radians(np.mod(pm_all, 360.0)) / wc_all
        dmin = _seg_min(dm_all, sc, n)
        dm = np.where(np.isfinite(dmin), dmin, np.inf)
    out["pm_deg"], out["wc_rad_s"], out["dm_s"] = pm, wc, dm

    # ---- peaks of |S| and |T| ----
    tail_d = tdelay[ents] > 0
    linf = st.l_inf[ents]
    with np.errstate(divide="ignore"):
        s_inf = np.where(tail_d & (linf > 0), 1.0 / np.maximum(1.0 - linf, 0.0),
                         1.0 / np.abs(1.0 + st.l_inf_real[ents]))
        t_inf = np.where(tail_d & (linf > 0), linf / np.maximum(1.0 - linf, 0.0),
                         linf / np.abs(1.0 + st.l_inf_real[ents]))
        s_0 = np.where(k > 0, 0.0, 1.0 / np.abs(1.0 + L0))
        t_0 = np.where(k > 0, 1.0, np.abs(L0) / np.abs(1.0 + L0))
    p1a, p1b, la, lb = abs1[:-1], abs1[1:], absL[:-1], absL[1:]
    dL = np.abs(L[1:] - L[:-1])
    s_up = np.where(same, _s_upper(p1a, p1b, dL), -np.inf)
    peaks = (_Peak(ent_pt, seg, w, L, absS, inner, n, s_0, s_inf, _abs_s, s_up, _s_bound),)
    if mt:
        # (the peak of |T| is searched side by side with that of |S|, each on its own: neither changes the other)
        t_up = np.where(same, _t_upper(p1a, p1b, la, lb, dL), -np.inf)
        peaks += (_Peak(ent_pt, seg, w, L, absL * absS, inner, n, t_0, t_inf, _abs_t, t_up, _t_bound),)
    band_search = _Band(ents, ent_pt, seg, w, absS, absL, inner, n, band, s_0, np.where(k > 0, np.inf, np.abs(L0)))
    # every search for a maximum side by side: grid maxima of |S| and |T|, extrema in the band
    found = _find_maxima(batch, [p.first_job() for p in peaks] + band_search.jobs(batch))
    for p, f in zip(peaks, found):
        p.add(*f)
    out["band_s_db"], out["band_l_db"] = band_search.finish(found[len(peaks):])
    # then the grid intervals that may still hide a higher value, both magnitudes together
    groups = []
    for p in peaks:
        h = p.hidden(w_a)
        groups.append((ent_pt[h], w[h], w[h + 1], L[h], L[h + 1], seg[h], p.best, p.bound, p.fun))
    for p, found in zip(peaks, _branch_and_bound(batch, groups)):
        p.add(*found[:3])
        p.dropped = np.fmax(p.dropped, found[3])
    out["ms"], out["w_ms_rad_s"] = peaks[0].result()
    if mt:
        out["mt"], out["w_mt_rad_s"] = peaks[1].result()
        ms_b, mt_b = peaks[0].is_bound(out["ms"]), peaks[1].is_bound(out["mt"])
    else:
        out["mt"], out["w_mt_rad_s"] = np.full(n, np.nan), np.full(n, np.nan)
        ms_b, mt_b = peaks[0].is_bound(out["ms"]), np.zeros(n, bool)
    out["lower_bounds"] = np.where(ms_b & mt_b, "ms mt", np.where(ms_b, "ms", np.where(mt_b, "mt", ""))).astype(object)

    # ---- bandwidth: first rise of |S| through 1/sqrt(2) ----
    wb = np.full(n, np.nan)
    wb[seg[rb]] = wb_rise
    wb[absS[start] >= thr] = np.nan
    out["wb_rad_s"] = wb

    out["engine_note"] = notes
    return out


def _top_by_seg(idx: np.ndarray, score: np.ndarray, seg: np.ndarray, k: int) -> np.ndarray:
    """The ``k`` entries of ``idx`` with the highest ``score`` in each segment."""
    if idx.size == 0:
        return idx
    order = np.lexsort((-score, seg))
    cs = seg[order]
    rank = np.arange(cs.size) - np.searchsorted(cs, cs, side="left")
    return idx[order][rank < k]


def _s_upper(p1a: np.ndarray, p1b: np.ndarray, d: np.ndarray) -> np.ndarray:
    """Upper bound of |S| on an interval [w_a, w_b] from |1 + L| at its ends and d = |L_b - L_a|.

    Between neighbouring grid points the curve turns little, so it stays within about half
    a chord of its ends: |1 + L| >= min(|1 + L_a|, |1 + L_b|) - 0.6 |L_b - L_a| on the interval.
    """
    return 1.0 / np.maximum(np.minimum(p1a, p1b) - 0.6 * d, 1e-300)


def _t_upper(p1a: np.ndarray, p1b: np.ndarray, la: np.ndarray, lb: np.ndarray, d: np.ndarray) -> np.ndarray:
    """Upper bound of |T| on an interval from |1 + L|, |L| at its ends and d = |L_b - L_a| (the tighter of two).

    |T| = |L| |S| <= (max |L| + 0.6 d) * bound of |S|, loose where |L| is large; and
    |T| = 1 / |1 + 1/L| with the same chord argument applied to the curve 1/L (which turns as
    much as L does and is small exactly where |L| is large): |1/L_b - 1/L_a| = d / (|L_a| |L_b|).
    """
    t_l = (np.maximum(la, lb) + 0.6 * d) * _s_upper(p1a, p1b, d)
    with np.errstate(divide="ignore", invalid="ignore"):
        t_g = 1.0 / np.maximum(np.minimum(p1a / la, p1b / lb) - 0.6 * d / (la * lb), 1e-300)
    return np.fmin(t_l, t_g)


#: Largest distance of the curve from its chord on an interval, as a fraction of the chord. [-]
SAGITTA = 0.25


def _chord_gap(P: np.ndarray, Q: np.ndarray) -> np.ndarray:
    """Lower bound of |1 + z| on a curve piece with ends P, Q (complex): distance from -1 to the
    chord [P, Q], less SAGITTA times the chord.

    An arc that turns by phi stays within (|Q - P| / 2) tan(phi / 4) of its chord: 0.25 |Q - P|
    allows turns of up to 1.8 rad on one grid interval (the grid allows 0.5 rad of delay phase
    and a small part of any corner per step).
    """
    d = Q - P
    dd = d.real * d.real + d.imag * d.imag
    r = -1.0 - P
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.clip((r.real * d.real + r.imag * d.imag) / dd, 0.0, 1.0)
    t = np.where(dd > 0, t, 0.0)
    return np.abs(r - t * d) - SAGITTA * np.sqrt(dd)


def _s_bound(La: np.ndarray, Lb: np.ndarray) -> np.ndarray:
    """Upper bound of |S| on a piece from L at its ends: the tighter of :func:`_s_upper` and the
    chord bound (:func:`_chord_gap`)."""
    ends = _s_upper(np.abs(1.0 + La), np.abs(1.0 + Lb), np.abs(Lb - La))
    return np.fmin(ends, 1.0 / np.maximum(_chord_gap(La, Lb), 1e-300))


def _t_bound(La: np.ndarray, Lb: np.ndarray) -> np.ndarray:
    """Upper bound of |T| on a piece from L at its ends: the tightest of :func:`_t_upper` and the
    chord bounds on L (|T| <= max |L| / |1 + L|, the largest |L| on a chord is at an end) and on 1/L."""
    d = np.abs(Lb - La)
    t_old = _t_upper(np.abs(1.0 + La), np.abs(1.0 + Lb), np.abs(La), np.abs(Lb), d)
    t_l = (np.maximum(np.abs(La), np.abs(Lb)) + SAGITTA * d) / np.maximum(_chord_gap(La, Lb), 1e-300)
    with np.errstate(divide="ignore", invalid="ignore"):
        t_g = 1.0 / np.maximum(_chord_gap(1.0 / La, 1.0 / Lb), 1e-300)
    return np.fmin(np.fmin(t_old, t_l), t_g)


#: Halvings of a hidden-peak interval before what is left of it goes to Brent's method. [-]
BNB_ROUNDS = 14
#: Grid intervals per loop and magnitude given to the branch and bound, and pieces kept in play
#: (highest bounds first). [-]
BNB_PIECES = 64


def _branch_and_bound(batch: Batch, groups, rounds: int = BNB_ROUNDS) -> list[tuple[np.ndarray, ...]]:
    """Largest value of a magnitude on grid intervals that may hide a peak, by halving with bounds.

    ``groups`` holds ``(entries, a, b, L_a, L_b, loop, best, bound, fun)`` per magnitude, one row per
    interval [a, b] (``loop``: index into ``best``, the best value known per loop). Every round
    evaluates the middle of each piece still in play (all groups in one call), raises ``best`` with
    the values found, and keeps a half only while ``bound(L_a, L_b)`` of it exceeds the loop's best:
    a piece is dropped only when no value in it can beat what is known. Pieces still in play after
    ``rounds`` halvings are searched by :func:`_find_maxima`. At most BNB_PIECES pieces per loop
    and magnitude stay in play, those with the highest bounds. Returns per group the frequencies,
    values and loops of every value that raised a best. [rad/s], [-], [-]
    """
    out = [([], [], []) for _ in groups]
    if not groups or sum(g[0].size for g in groups) == 0:
        return [tuple(np.zeros(0, t) for t in (float, float, int)) + (np.full(g[6].size, -np.inf),)
                for g in groups]
    best = [g[6].copy() for g in groups]
    dropped = [np.full(g[6].size, -np.inf) for g in groups]
    kind = np.concatenate([np.full(g[0].size, i) for i, g in enumerate(groups)]).astype(int)
    ent, a, b, La, Lb, loop = (np.concatenate([g[k] for g in groups]) for k in range(6))

    def by_kind(fn, kind, *args):
        res = np.empty(args[0].shape)
        for i, g in enumerate(groups):
            sel = kind == i
            if sel.any():
                res[sel] = fn(i, *(x[sel] for x in args))
        return res

    def target(kind, loop):
        return by_kind(lambda i, lp: best[i][lp], kind, loop)

    for r in range(rounds):
        if kind.size == 0:
            break
        m = 0.5 * (a + b)
        Lm = eval_L(batch, ent, m)
        fm = by_kind(lambda i, L_, w_: groups[i][8](L_, w_), kind, Lm, m)
        raise_ = fm > target(kind, loop)
        for i in range(len(groups)):
            sel = raise_ & (kind == i)
            if sel.any():
                np.maximum.at(best[i], loop[sel], fm[sel])
                for lst, val in zip(out[i], (m[sel], fm[sel], loop[sel])):
                    lst.append(val)
        kind, ent, loop = (np.concatenate([x, x]) for x in (kind, ent, loop))
        a, b, La, Lb = np.concatenate([a, m]), np.concatenate([m, b]), np.concatenate([La, Lm]), np.concatenate([Lm, Lb])
        up = by_kind(lambda i, x, y: groups[i][7](x, y), kind, La, Lb)
        live = np.flatnonzero(up > target(kind, loop) * (1.0 + 1e-12))
        # at most BNB_PIECES per loop and magnitude (checked every third round), highest bound first (a loop whose ripples
        # approach a limit value from below, as with |L(inf)| > 0 and dead time, has no end of them)
        key = kind[live] * (int(loop.max()) + 1) + loop[live]
        crowded = np.bincount(key)[key] > BNB_PIECES
        if crowded.any() and (r % 3 == 2 or r == rounds - 1):     # (pieces at most double per round)
            few, many = live[~crowded], live[crowded]
            kept = _top_by_seg(many, up[many], key[crowded], BNB_PIECES)
            gone = np.setdiff1d(many, kept, assume_unique=True)
            for i in range(len(groups)):
                sel = gone[kind[gone] == i]
                if sel.size:
                    np.maximum.at(dropped[i], loop[sel], up[sel])
            live = np.sort(np.concatenate([few, kept]))
        kind, ent, loop, a, b, La, Lb = (x[live] for x in (kind, ent, loop, a, b, La, Lb))
    if kind.size:
        found = _find_maxima(batch, [(ent[kind == i], a[kind == i], b[kind == i], g[8]) for i, g in enumerate(groups)])
        for i, (wf, ff) in enumerate(found):
            for lst, val in zip(out[i], (wf, ff, loop[kind == i])):
                lst.append(val)
    return [tuple(np.concatenate(lst) if lst else np.zeros(0, t) for lst, t in zip(o, (float, float, int)))
            + (d,) for o, d in zip(out, dropped)]


class _Peak:
    """sup over w >= 0 of |S| or |T| of every loop of a block, limits at 0 and infinity included.

    ``upper[i]`` is an upper bound of the magnitude on the grid interval [w_i, w_i+1] (-inf where
    the two points belong to different loops); ``bound(La, Lb)`` a bound from L at the ends of any
    piece, tighter where it matters (:func:`_s_bound`, :func:`_t_bound`).
    Searched: [w_i-1, w_i+1] around the highest grid maxima whose bound reaches the grid maximum
    (:meth:`first_job`), then every grid interval whose bound still exceeds the best value found
    (:meth:`hidden`), searched by :func:`_branch_and_bound`: a narrow peak between two grid points
    cannot hide there.
    """

    def __init__(self, ent_pt, seg, w, L, vals, inner, n, v0, vinf, fun, upper, bound):
        self.ent_pt, self.seg, self.w, self.L, self.vals, self.n = ent_pt, seg, w, L, vals, n
        self.v0, self.vinf, self.fun, self.upper, self.bound = v0, vinf, fun, upper, bound
        mid = vals[1:-1]
        locmax = np.flatnonzero(inner & (mid >= vals[:-2]) & (mid > vals[2:])) + 1
        self.gmax = _seg_max(vals, seg, n)
        cand = locmax[vals[locmax] >= 0.8 * self.gmax[seg[locmax]]]
        if cand.size:
            # a bracket whose bound stays below the grid maximum cannot hold the peak (the grid
            # maximum's own bracket always stays: its bound is at least its value)
            cand = cand[np.maximum(upper[cand - 1], upper[cand]) >= self.gmax[seg[cand]]]
        self.cand = _top_by_seg(cand, vals[cand], seg[cand], 8)       # the highest 8 per loop
        self.wpk, self.fpk, self.seg_pk = [], [], []
        #: per loop, the highest bound of an interval the cap on pieces left unsearched
        self.dropped = np.full(n, -np.inf)

    def first_job(self):
        """Search job over the brackets around the grid maxima, started from the grid maximum."""
        c, v = self.cand, self.vals
        return self.ent_pt[c], self.w[c - 1], self.w[c + 1], self.fun, PEAK_XRTOL, (self.w[c], v[c - 1], v[c], v[c + 1])

    def add(self, wpk: np.ndarray, fpk: np.ndarray, loops: np.ndarray | None = None) -> None:
        """Take maxima found: on the brackets of :meth:`first_job` (``loops`` None) or anywhere in ``loops``."""
        self.wpk.append(wpk)
        self.fpk.append(fpk)
        self.seg_pk.append(self.seg[self.cand] if loops is None else loops)

    @property
    def best(self) -> np.ndarray:
        """Best value per loop so far (grid, refined maxima, limits at 0 and infinity)."""
        f = np.concatenate(self.fpk)
        refined = _seg_max(f, np.concatenate(self.seg_pk), self.n) if f.size else np.full(self.n, -np.inf)
        return np.fmax(np.fmax(self.gmax, refined), np.fmax(self.v0, self.vinf))

    def hidden(self, w_a: np.ndarray) -> np.ndarray:
        """Grid intervals (their left points) whose bound exceeds the best value, outside the searched brackets.

        Intervals below ``w_a`` (a tenth of the loop's lowest corner frequency) are left out: there L
        follows its low-frequency asymptote and nothing turns (the same reason the grid is coarse there).
        """
        best = self.best
        level = np.repeat(best * (1.0 + 1e-12), np.bincount(self.seg, minlength=self.n))[:-1]
        over = self.upper > level
        over[self.cand] = False                 # the two intervals of each searched bracket
        over[self.cand - 1] = False
        hid = np.flatnonzero(over)
        hid = hid[self.w[hid + 1] > w_a[self.seg[hid]]]
        up = self.bound(self.L[hid], self.L[hid + 1])       # the piece bound, tighter than ``upper``
        keep = up > level[hid]
        hid, up = hid[keep], up[keep]
        top = _top_by_seg(hid, up, self.seg[hid], BNB_PIECES)    # the highest BNB_PIECES per loop
        left = np.ones(hid.size, bool)
        left[np.searchsorted(hid, top)] = False
        self.note_dropped(self.seg[hid[left]], up[left])
        return top

    def note_dropped(self, loops: np.ndarray, bounds: np.ndarray) -> None:
        """Remember the bounds of intervals left unsearched by the cap on pieces (see :attr:`is_bound`)."""
        if loops.size:
            np.maximum.at(self.dropped, loops, bounds)

    def is_bound(self, value: np.ndarray) -> np.ndarray:
        """Per loop: True where an interval left unsearched (cap on pieces) may hold more than ``value``,
        so that the value reported is a lower bound of the peak, not the peak."""
        return self.dropped > value * (1.0 + 1e-9)

    def result(self) -> tuple[np.ndarray, np.ndarray]:
        """Peak value and its frequency per loop (0 or inf for a limit). [-], [rad/s]"""
        n, vals, seg, w = self.n, self.vals, self.seg, self.w
        wpk, fpk, seg_c = (np.concatenate(x) for x in (self.wpk, self.fpk, self.seg_pk))
        value = _seg_max(fpk, seg_c, n) if fpk.size else np.full(n, -np.inf)
        arg = _arg_by_seg(fpk, seg_c, n) if fpk.size else np.full(n, -1)
        where = np.where(arg >= 0, wpk[np.maximum(arg, 0)] if fpk.size else np.nan, np.nan)
        # grid values (ends of the sampled range) as a floor
        gw = _arg_by_seg(vals, seg, n)
        gbetter = vals[gw] > value
        value = np.where(gbetter, vals[gw], value)
        where = np.where(gbetter, w[gw], where)
        at0 = self.v0 > value
        value = np.where(at0, self.v0, value)
        where = np.where(at0, 0.0, where)
        atinf = self.vinf > value
        value = np.where(atinf, self.vinf, value)
        where = np.where(atinf, np.inf, where)
        return value, where


class _Band:
    """max |S| and min |L| over 0 < w <= wd of every loop of a block, in dB."""

    def __init__(self, ents, ent_pt, seg, w, absS, absL, inner, n, band, s0, l0):
        self.n = n
        self.has = np.isfinite(band) & (band > 0)
        self.smax = np.full(n, np.nan)
        self.lmin = np.full(n, np.nan)
        self._jobs = []
        if not self.has.any():
            return
        has = self.has
        wd = np.where(has, band, np.nan)
        inband = w <= wd[seg]
        smax = _seg_max(np.where(inband, absS, -np.inf), seg, n)
        lmin = _seg_min(np.where(inband, absL, np.inf), seg, n)
        self.hi = np.flatnonzero(has)
        self.ents, self.wd = ents, wd
        self.smax, self.lmin = np.maximum(smax, s0), np.minimum(lmin, l0)
        # interior extrema strictly inside the band, refined
        # (points 1 .. N-2 with both neighbours in their segment, themselves and the right one in the band)
        trip = inner & inband[1:-1] & inband[2:]
        s_mid, l_mid = absS[1:-1], absL[1:-1]
        smx = np.flatnonzero(trip & (s_mid >= absS[:-2]) & (s_mid > absS[2:])) + 1
        lmn = np.flatnonzero(trip & (l_mid <= absL[:-2]) & (l_mid < absL[2:])) + 1
        self.seg_smx, self.seg_lmn = seg[smx], seg[lmn]
        # the last grid interval before the band edge: [w_j-1, wd], j the last grid point <= wd
        last = _seg_max(np.where(inband, np.arange(w.size), -1), seg, n, -1)
        e = np.flatnonzero(has & (last > 0))
        j = last[e]
        j = np.where(seg[j - 1] == e, j - 1, j)
        a, b = w[j], wd[e]
        okb = b > a
        self.e, a, b = e[okb], a[okb], b[okb]
        self._jobs = [(ent_pt[smx], w[smx - 1], w[smx + 1], _abs_s, PEAK_XRTOL,
                       (w[smx], absS[smx - 1], absS[smx], absS[smx + 1])),
                      (ent_pt[lmn], w[lmn - 1], w[lmn + 1], _neg_abs_l, PEAK_XRTOL,
                       (w[lmn], -absL[lmn - 1], -absL[lmn], -absL[lmn + 1])),
                      (ents[self.e], a, b, _abs_s, EDGE_XRTOL), (ents[self.e], a, b, _neg_abs_l, EDGE_XRTOL)]

    def jobs(self, batch: Batch):
        """Search jobs (Brent): interior maxima of |S|, minima of |L|, and the last interval before wd.

        Also takes |S| and |L| at the band edge itself (one evaluation).
        """
        if self._jobs:
            Ld = eval_L(batch, self.ents[self.hi], self.wd[self.hi])
            self.smax[self.hi] = np.maximum(self.smax[self.hi], 1.0 / np.abs(1.0 + Ld))
            self.lmin[self.hi] = np.minimum(self.lmin[self.hi], np.abs(Ld))
        return self._jobs

    def finish(self, found) -> tuple[np.ndarray, np.ndarray]:
        """Band figures in dB from the searches' results (in the order of :meth:`jobs`)."""
        n, has = self.n, self.has
        s_db = np.full(n, np.nan)
        l_db = np.full(n, np.nan)
        if not self._jobs:
            return s_db, l_db
        (_, f_s), (_, f_l), (_, f_es), (_, f_el) = found
        smax = np.maximum(self.smax, _seg_max(f_s, self.seg_smx, n))
        lmin = np.minimum(self.lmin, _seg_min(-f_l, self.seg_lmn, n))
        smax[self.e] = np.maximum(smax[self.e], f_es)
        lmin[self.e] = np.minimum(lmin[self.e], -f_el)
        with np.errstate(divide="ignore"):
            s_db[has] = 20.0 * np.log10(smax[has])
            l_db[has] = 20.0 * np.log10(lmin[has])
        return s_db, l_db


# ----------------------------------------------------------------------------------------------


_HEAP_KEPT = False


def _keep_freed_memory() -> None:
    """Ask glibc's malloc to keep freed memory for reuse (once per process; no-op elsewhere).

    Every block of the engine allocates temporaries of the same few sizes (megabytes each). By
    default glibc returns such blocks to the system when they are freed and faults fresh pages in
    for the next ones; with the trim threshold at 1 GiB and the mmap threshold at its largest
    (32 MiB) the next block reuses the heap. The process keeps its peak heap until it exits.
    """
    global _HEAP_KEPT
    if _HEAP_KEPT:
        return
    _HEAP_KEPT = True
    try:
        import ctypes
        import os

        if not os.confstr("CS_GNU_LIBC_VERSION"):
            return
        libc = ctypes.CDLL(None)            # this process's own symbols: glibc's malloc
        libc.mallopt(-1, 1 << 30)   # M_TRIM_THRESHOLD
        libc.mallopt(-3, 32 << 20)  # M_MMAP_THRESHOLD
    except (OSError, AttributeError, ValueError):
        pass


@contextmanager
def _no_gc_pauses():
    """Python's cycle collector held off for the call: with tens of thousands of live objects
    (loop models, tables) its full passes, triggered by the many small lists built per loop, cost
    more than the work itself. The engine creates no reference cycles; the collector's state is
    restored on the way out."""
    was = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was:
            gc.enable()


def grid_points(models: Sequence[LoopModel | None]) -> np.ndarray:
    """Points each loop's frequency grid would need before the cap :data:`MAX_POINTS`.

    The same sizing as :func:`evaluate` (``_grids``), so that the inventory's validation can refuse
    the loops the engine cannot evaluate (dead time times the highest frequency where abs(L) still
    matters far too large); loops above the cap but below the refusal are evaluated on a capped grid
    with an ``engine_note``.

    Parameters
    ----------
    models : sequence of LoopModel or None
        The loops; None gives False.

    Returns
    -------
    ndarray of float
        One count per model (0 for None). [-]
    """
    models = list(models)
    out = np.zeros(len(models))
    if not any(m is not None for m in models):
        return out
    batch, top = build_batch(models)
    st = _static(batch)
    tdel = _total_delay(batch)
    ne = batch.num.shape[0]
    count = np.zeros(ne)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        for chunk in np.array_split(np.arange(ne), int(np.ceil(ne / CHUNK_LOOPS))):
            g = _grids(batch, chunk, st, tdel, cap=False)
            count[chunk] = g[4] + g[5]
    ok = top >= 0
    out[ok] = count[top[ok]]
    return out


def evaluate(models: Sequence[LoopModel | None], band_rad_s=None, mt: bool = True) -> pd.DataFrame:
    """Exact frequency-domain figures of many loops.

    Parameters
    ----------
    models : sequence of LoopModel or None
        The loops; None (an invalid row) gives a row of missing values.
    band_rad_s : array-like, optional
        Upper edge wd of each loop's rejection band (NaN or None: no requirement). [rad/s]
    mt : bool
        Search the peak of |T| too (default). False leaves ``mt`` and ``w_mt_rad_s`` NaN and
        saves that search (the proposals judge candidates without Mt); every other figure is the
        same number either way (the two peaks are searched side by side, each on its own).

    Returns
    -------
    pandas.DataFrame
        One row per model, columns :data:`FIGURE_COLUMNS`: ``stable`` [-], ``rhp_closed`` [-],
        ``rhp_open`` [-], ``gm`` [-], ``gm_db`` [dB], ``w180_rad_s`` [rad/s], ``gm_low`` [-],
        ``pm_deg`` [deg], ``wc_rad_s`` [rad/s], ``dm_s`` [s], ``ms`` [-], ``w_ms_rad_s`` [rad/s],
        ``mt`` [-], ``w_mt_rad_s`` [rad/s], ``wb_rad_s`` [rad/s], ``band_s_db`` [dB],
        ``band_l_db`` [dB], ``engine_note`` (text).
    """
    with _no_gc_pauses():
        df = _evaluate(models, band_rad_s, mt)
        return _decide_axis_poles(list(models), df, band_rad_s, mt)


# ----------------------------------------------------------------------------------------------
# Open-loop poles on the imaginary axis (other than integrators)

#: Engine note of a loop with open-loop poles on the imaginary axis other than integrators.
AXIS_NOTE = "open-loop poles on the imaginary axis (other than integrators): treated as not stable"
#: Relative shift of such poles, off the axis to either side, for the two-sided stability check. [-]
AXIS_SHIFT = 1e-4


def _shift_axis_poles(m: LoopModel, rel: float) -> LoopModel | None:
    """The loop with its process's imaginary-axis poles (other than 0) moved by ``rel`` x their magnitude
    along the real axis (rel < 0: into the left half-plane); None when it has none or is a cascade."""
    if m is None or m.inner is not None:
        return None
    den = np.asarray(m.process.rational.den, float)
    if den.size < 3:
        return None
    r = np.roots(den)
    mag = np.abs(r)
    tol = 1e-9 * max(1.0, float(mag.max()))
    axis = (np.abs(r.real) <= tol) & (mag > tol)
    if not axis.any():
        return None
    r = np.where(axis, 1j * r.imag + rel * mag, r)
    new = np.real(np.poly(r)) * den[0]
    proc = replace(m.process, rational=Rational.of(m.process.rational.num, new))
    return replace(m, process=proc)


def _decide_axis_poles(models: list, df: pd.DataFrame, band_rad_s, mt: bool = True) -> pd.DataFrame:
    """Stability of loops with open-loop poles on the imaginary axis, decided instead of assumed.

    Closed-loop poles depend continuously on the open-loop ones, so when the closed loop has no pole
    on the imaginary axis, moving the axis poles a little off it, to either side, changes nothing:
    the loop is evaluated twice, with them moved left and moved right by :data:`AXIS_SHIFT` of their
    magnitude (the right-hand ones then count in P of the Nyquist argument). When both agree, that is
    the verdict (figures of the left-shifted loop, with a note); when they differ a closed-loop pole
    lies on or near the axis, and the loop stays not stable. Cascades keep the engine's rule.
    """
    idx = [i for i, note in enumerate(df["engine_note"]) if note == AXIS_NOTE]
    pairs = [(i, _shift_axis_poles(models[i], -AXIS_SHIFT), _shift_axis_poles(models[i], AXIS_SHIFT)) for i in idx]
    pairs = [(i, a, b) for i, a, b in pairs if a is not None and b is not None]
    if not pairs:
        return df
    band = np.full(len(models), np.nan) if band_rad_s is None else \
        np.array([np.nan if b is None else float(b) for b in band_rad_s], float)
    sub_band = np.concatenate([band[[i for i, _, _ in pairs]]] * 2)
    both = _evaluate([a for _, a, _ in pairs] + [b for _, _, b in pairs], sub_band, mt)
    n = len(pairs)
    df = df.copy()
    for j, (i, _, _) in enumerate(pairs):
        left, right = both.iloc[j], both.iloc[n + j]
        clean = not left["engine_note"] and not right["engine_note"]
        if clean and bool(left["stable"]) == bool(right["stable"]):
            keep_open = df.at[i, "rhp_open"]
            for c in FIGURE_COLUMNS:
                df.at[i, c] = left[c]
            df.at[i, "rhp_open"] = keep_open
            df.at[i, "engine_note"] = (
                f"open-loop poles on the imaginary axis: stability decided with them moved off the axis by "
                f"{AXIS_SHIFT:g} of their magnitude to either side (both give {'stable' if left['stable'] else 'unstable'}); "
                f"figures of the loop with them moved left")
        else:
            df.at[i, "engine_note"] = ("open-loop poles on the imaginary axis with a closed-loop pole on or near the "
                                       "axis (moved to either side they disagree): treated as not stable")
    return df


def _evaluate(models, band_rad_s, mt: bool = True) -> pd.DataFrame:
    _keep_freed_memory()
    models = list(models)
    nmod = len(models)
    if band_rad_s is None:
        band_rad_s = np.full(nmod, np.nan)
    band_in = np.array([np.nan if b is None else float(b) for b in band_rad_s], float)
    batch, top = build_batch(models)
    ne = batch.num.shape[0]
    text = ("engine_note", "lower_bounds")
    res = {c: np.full(ne, np.nan, object if c in text else float) for c in FIGURE_COLUMNS}
    res["stable"] = np.zeros(ne, bool)
    res["engine_note"] = np.full(ne, "", object)
    res["lower_bounds"] = np.full(ne, "", object)
    zraw = np.zeros(ne, int)
    endless = np.zeros(ne, bool)        # infinitely many closed-loop RHP poles
    if ne:
        st = _static(batch)
        tdel = _total_delay(batch)
        depth = _depth(batch)
        band_e = np.full(ne, np.nan)
        given = (top >= 0) & np.isfinite(band_in)
        band_e[top[given]] = band_in[given]
        p_open = st.p_own.copy()
        for level in range(int(depth.max()) + 1):
            lev = np.flatnonzero(depth == level)
            outer = lev[batch.inner[lev] >= 0]
            # an outer loop's open-loop RHP poles: its own and its inner loop's closed-loop ones
            p_open[outer] = st.p_own[outer] + np.maximum(zraw[batch.inner[outer]], 0)
            for chunk in np.array_split(lev, int(np.ceil(lev.size / CHUNK_LOOPS))):
                grid = _grids(batch, chunk, st, tdel)
                for sub in _blocks(grid[4] + grid[5]):
                    blk = chunk[sub]
                    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                        o = _evaluate_block(batch, blk, st, tdel, p_open[blk], band_e[blk],
                                            tuple(g[sub] for g in grid), mt)
                    zraw[blk] = o.pop("_z_raw")
                    endless[blk] = o.pop("_endless")
                    for c, v in o.items():
                        res[c][blk] = v
            # an outer loop around an inner loop with infinitely many closed-loop RHP poles has as many
            # open-loop ones: not stable, no count
            sick = outer[endless[batch.inner[outer]]]
            if sick.size:
                endless[sick] = True
                res["stable"][sick] = False
                res["rhp_closed"][sick] = np.nan
                p_open[sick] = -1
                res["engine_note"][sick] = ("inner loop with infinitely many closed-loop poles in the right "
                                            "half-plane: not stable")
        res["rhp_open"] = np.where(p_open < 0, np.nan, p_open).astype(float)
    ok = top >= 0
    frame = {}
    for c in FIGURE_COLUMNS:
        if c == "stable" or c in text:
            col = np.full(nmod, None, object)
            vals = res[c][top[ok]]
            col[ok] = [bool(v) for v in vals] if c == "stable" else list(vals)
        else:
            col = np.full(nmod, np.nan)
            col[ok] = np.asarray(res[c], float)[top[ok]]
        frame[c] = col
    df = pd.DataFrame(frame, columns=list(FIGURE_COLUMNS))
    for c in ("rhp_closed", "rhp_open"):
        df[c] = pd.array(df[c].to_numpy(dtype=float), dtype="Float64").round().astype("Int64")
    return df


def _blocks(counts: np.ndarray):
    """Consecutive index ranges whose point counts add up to at most BLOCK_POINTS."""
    edges = np.cumsum(counts)
    i = 0
    while i < counts.size:
        j = int(np.searchsorted(edges, (edges[i - 1] if i else 0) + BLOCK_POINTS, side="right"))
        j = max(j, i + 1)
        yield np.arange(i, j)
        i = j
