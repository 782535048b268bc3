"""Candidate settings of many loops at once: the published rules, the tau_c screen and the ki frontiers.

For every loop a handful of candidate settings is built:

* SIMC PI (fopdt, sopdt by the half rule, ipdt) and SIMC PID in series form (sopdt, ipdt with a lag),
  each with tau_c = theta (tight) and with the largest tau_c that still meets the rejection
  requirement (smoother) [1]_;
* AMIGO PI and PID (fopdt) [2]_;
* the largest integral gain ki subject to Ms <= ms_max and the gain- and phase-margin limits,
  found on the exact-delay frequency response [3]_, as PI and (kept only where it raises ki by at
  least :data:`PID_GAIN_MIN`) PID with the row's derivative filter; and the point of the same
  frontier with the deepest attenuation in the rejection band.

The search for tau_c and for the ki frontier screens candidates on a frequency grid of
:data:`GRID_POINTS` points about the loop's characteristic frequency (:func:`characteristic_w`);
only the exact engine decides what is reported (:mod:`audit.proposals`).

Batched across loops. Like the frequency engine, the search works on arrays of loops x
candidates x frequencies: the characteristic frequencies, the grids, the process responses,
the tau_c screens and the ki frontiers of every loop of a batch are computed together, in
blocks of about :data:`BLOCK_ELEMENTS` complex values (memory bound), and only the bookkeeping of
each loop's few candidates runs in Python. Each loop's figures depend only on its own row of
every array, so a loop gets the same candidates alone or in any batch (numpy's vectorised
elementary functions may round the last bit differently at another array position).

References
----------
.. [1] S. Skogestad, "Simple analytic rules for model reduction and PID controller tuning",
   J. Process Control 13 (2003) 291-309, sec. 3 (half rule), eqs. (27)-(29) (SIMC settings).
.. [2] K. J. Astrom and T. Hagglund, "Revisiting the Ziegler-Nichols step response method for
   PID control", J. Process Control 14 (2004) 635-650 (the AMIGO PI and PID rules).
.. [3] K. J. Astrom, H. Panagopoulos and T. Hagglund, "Design of PI controllers based on
   non-convex optimization", Automatica 34(5) (1998) 585-601 (maximise ki subject to a
   sensitivity constraint).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Sequence

import numpy as np

from .loop import Controller, LoopModel
from .tuning import (TAU_C_FLOOR, Limits, Requirement, Settings, _effective, amigo_pi, amigo_pid,
                     effective_extra_delay, simc_pi, simc_pid_series, simc_tau_c_min)

#: A PID variant of the ki optimum is kept only when it raises ki by at least this factor over PI. [-]
PID_GAIN_MIN = 1.10
#: Points of the screening frequency grid. [-]
GRID_POINTS = 500
#: Derivative times tried for the PID variant of the ki optimum, as multiples of 1/w180 of the process. [-]
PID_TD_FACTORS = (0.25, 0.5, 1.0)
#: The best-band point of a ki frontier keeps at least this fraction of the frontier's largest ki. [-]
BEST_BAND_KI_MIN = 0.5
#: Proportional gains on the first pass of a ki frontier, as fractions of the largest P(D)-only gain. [-]
KP_FRACTIONS = np.linspace(0.02, 0.995, 16)
#: Taus of the coarse and the fine pass of the SIMC tau_c screen. [-]
TAU_POINTS = (32, 12)
#: Complex values per block of the batched search (bounds the memory of its temporaries). [-]
BLOCK_ELEMENTS = 1 << 18
#: Frequencies on which the characteristic frequency is looked for. [rad/s]
CHARACTERISTIC_GRID = np.logspace(-7, 5, 2401)
#: Points of that grid computed at a time (a loop stops at its first hit). [-]
CHARACTERISTIC_PIECE = 400


# ----------------------------------------------------------------------------------------------
# loop responses of many loops


def _unit_loop(model: LoopModel) -> LoopModel:
    """The loop with C = 1: sign P F e^{-s (theta + Ts/2)} [T_inner]."""
    return model.with_controller(Controller("parallel", kp=1.0))


def _polyval_rows(coef: np.ndarray, s: np.ndarray) -> np.ndarray:
    """Each row's polynomial (coefficients descending, left-padded with zeros) at its row of ``s`` (Horner)."""
    y = np.zeros_like(s)
    for k in range(coef.shape[1]):
        y = y * s + coef[:, k, None]
    return y


def _pad(polys: Sequence[Sequence[float]]) -> np.ndarray:
    width = max(len(p) for p in polys)
    out = np.zeros((len(polys), width))
    for i, p in enumerate(polys):
        out[i, width - len(p):] = p
    return out


def loop_responses(models: Sequence[LoopModel], w: np.ndarray, rats: Sequence | None = None) -> np.ndarray:
    """L(jw) of many loops, each on its own row of frequencies, as :meth:`LoopModel.L` computes it.

    Parameters
    ----------
    models : sequence of LoopModel
        The loops (inner loops of cascades included through their set-point responses).
    w : ndarray
        Frequencies, (n_w,) shared or (n_models, n_w) one row per loop. [rad/s]
    rats : sequence of Rational, optional
        The models' ``rational`` when the caller has them already.

    Returns
    -------
    ndarray
        Complex, (n_models, n_w): sign C P F e^{-jw (theta + Ts/2)} [T_inner]. [-]
    """
    n = len(models)
    w = np.asarray(w, float)
    w = np.broadcast_to(w, (n, w.shape[-1]))
    out = np.empty(w.shape, complex)
    if n == 0:
        return out
    rows = max(1, 4 * BLOCK_ELEMENTS // w.shape[1])
    for a in range(0, n, rows):
        sub = models[a:a + rows]
        ww = w[a:a + rows]
        rr = [m.rational for m in sub] if rats is None else rats[a:a + rows]
        s = 1j * ww
        L = _polyval_rows(_pad([r.num for r in rr]), s) / _polyval_rows(_pad([r.den for r in rr]), s)
        delay = np.array([m.delay for m in sub], float)
        L = L * np.exp(-1j * ww * delay[:, None])
        inner = [k for k, m in enumerate(sub) if m.inner is not None]
        if inner:
            L[inner] = L[inner] * _setpoint_responses([sub[k].inner for k in inner], ww[inner])
        out[a:a + rows] = L
    return out


def _setpoint_responses(models: Sequence[LoopModel], w: np.ndarray) -> np.ndarray:
    """Set-point-to-PV responses L/(F (1 + L)) of many loops (as :meth:`LoopModel.T_sp`)."""
    Lw = loop_responses(models, w)
    s = 1j * w
    tau = np.array([[m.pv_filter if m.pv_filter else 0.0, 1.0] for m in models], float)
    F = _polyval_rows(np.ones((len(models), 1)), s) / _polyval_rows(tau, s)
    return Lw / (F * (1.0 + Lw))


def characteristic_ws(models: Sequence[LoopModel], rats: Sequence | None = None) -> np.ndarray:
    """:func:`characteristic_w` of many loops at once (NaN where there is none). [rad/s]

    The grid is walked in pieces of :data:`CHARACTERISTIC_PIECE` points and a loop leaves the
    walk at its first hit; the phase is unwrapped piece by piece with the running correction
    carried over, the same sums in the same order as :func:`numpy.unwrap` on the whole grid.

    Parameters
    ----------
    models : sequence of LoopModel
        The loops; each controller is replaced by C = 1.
    rats : sequence of Rational, optional
        The ``rational`` of each loop with C = 1, when the caller has them already.

    Returns
    -------
    ndarray
        One frequency per loop on :data:`CHARACTERISTIC_GRID`, NaN where the phase never falls
        far enough. [rad/s]
    """
    w = CHARACTERISTIC_GRID
    out = np.full(len(models), np.nan)
    rows = max(1, 4 * BLOCK_ELEMENTS // w.size)
    for a in range(0, len(models), rows):
        units = [_unit_loop(m) for m in models[a:a + rows]]
        ur = [u.rational for u in units] if rats is None else rats[a:a + rows]
        live = np.arange(len(units))
        found = np.full(len(units), np.nan)
        last_p = last_s = target = None
        for c0 in range(0, w.size, CHARACTERISTIC_PIECE):
            ww = w[c0:c0 + CHARACTERISTIC_PIECE]
            p = np.angle(loop_responses([units[i] for i in live], ww, [ur[i] for i in live]))
            if c0 == 0:
                dd = np.diff(p, axis=-1)
                head = p[:, :1]
            else:
                dd = np.diff(np.concatenate([last_p[:, None], p], -1), axis=-1)
            # numpy.unwrap's correction of each step
            ddmod = np.mod(dd + np.pi, 2 * np.pi) - np.pi
            np.copyto(ddmod, np.pi, where=(ddmod == -np.pi) & (dd > 0))
            corr = ddmod - dd
            np.copyto(corr, 0, where=abs(dd) < np.pi)
            if c0 == 0:
                cum = np.cumsum(corr, axis=-1)
                ph = np.concatenate([head, p[:, 1:] + cum], -1)
                first = ph[:, 0] - np.pi / 2
                target = np.where(first < -np.pi, first, -np.pi)      # min(-pi, ph[0] - pi/2), NaN giving -pi
                last_s = cum[:, -1] if cum.shape[1] else np.zeros(len(live))
            else:
                cum = np.cumsum(np.concatenate([last_s[:, None], corr], -1), axis=-1)[:, 1:]
                ph = p + cum
                last_s = cum[:, -1]
            last_p = p[:, -1]
            hit = ph <= target[:, None]
            got = hit.any(-1)
            found[live[got]] = ww[hit[got].argmax(-1)]
            keep = ~got
            live, last_p, last_s, target = live[keep], last_p[keep], last_s[keep], target[keep]
            if not live.size:
                break
        out[a:a + rows] = found
    return out


def characteristic_w(model: LoopModel) -> float | None:
    """First frequency where the phase of the loop with C = 1 has fallen by a further 90 deg past -90 deg. [rad/s]

    For a process with non-negative low-frequency phase this is its phase crossover w180;
    None when the phase never gets there (no dead time or lag bounds the gain).

    Parameters
    ----------
    model : LoopModel
        The loop; its controller is replaced by C = 1 (sign, process, PV filter, dead time,
        half the sample period and inner loop are kept).

    Returns
    -------
    float or None
        The frequency, on a grid of 2401 points from 1e-7 to 1e5 rad/s. [rad/s]
    """
    wc = float(characteristic_ws([model])[0])
    return wc if math.isfinite(wc) else None


@dataclass(frozen=True)
class Grids:
    """The screening grids of many loops, one row each.

    Attributes
    ----------
    w : ndarray (n, GRID_POINTS + 1)
        Log-spaced about each loop's characteristic frequency, the band edge added when it is
        not a grid point; a row without it repeats its last point. [rad/s]
    pair : ndarray (n, GRID_POINTS) of bool
        Neighbouring points that are both real grid points (crossings are sought between them).
    """

    w: np.ndarray
    pair: np.ndarray


def screening_grids(wc: np.ndarray, wd: np.ndarray, n: int = GRID_POINTS) -> Grids:
    """``n`` points from wc 10^-2.5 to wc 10^1.2 per loop, with the band edge wd inserted.

    Parameters
    ----------
    wc : ndarray
        Characteristic frequency of each loop. [rad/s]
    wd : ndarray
        Band edge of each loop's rejection requirement; NaN (or not positive) for none. [rad/s]
    n : int
        Log-spaced points. [-]

    Returns
    -------
    Grids
    """
    lw = np.array([math.log10(x) for x in wc], float)
    base = np.logspace(lw - 2.5, lw + 1.2, n, axis=-1)
    m = len(wc)
    wd = np.asarray(wd, float)
    with np.errstate(invalid="ignore"):
        has = np.isfinite(wd) & (wd > 0)
        pos = np.where(has, (base < wd[:, None]).sum(-1), n)
    at = np.minimum(pos, n - 1)
    dup = has & (pos < n) & (base[np.arange(m), at] == wd)
    ins = has & ~dup
    pos = np.where(ins, pos, n + 1)          # n + 1: nothing inserted, the last point repeated
    j = np.arange(n + 1)[None, :]
    src = np.where(j < pos[:, None], j, j - 1)
    w = np.take_along_axis(base, np.clip(src, 0, n - 1), axis=-1)
    w[ins, pos[ins]] = wd[ins]
    pair = np.ones((m, n), bool)
    pair[~ins, n - 1] = False
    return Grids(w, pair)


# ----------------------------------------------------------------------------------------------
# screening on a frequency grid (search only; the exact engine decides what is reported)


@dataclass(frozen=True)
class Screen:
    """Grid estimates of the figures of many candidates (search only).

    Attributes
    ----------
    ms : ndarray
        Sensitivity peak. [-]
    gm_db, gm_down_db : ndarray
        Gain margins up and down (inf where none). [dB]
    pm_deg : ndarray
        Phase margin (inf where |L| never crosses 1). [deg]
    band_s_db : ndarray
        Largest |S| up to the band edge; NaN without a requirement. [dB]
    """

    ms: np.ndarray
    gm_db: np.ndarray
    gm_down_db: np.ndarray
    pm_deg: np.ndarray
    band_s_db: np.ndarray


def _screen(L: np.ndarray, sel: np.ndarray, has_band: np.ndarray, pair: np.ndarray) -> Screen:
    """Grid estimates of Ms, gain margins (up and down), phase margin and band level of L (..., n_w).

    ``sel`` marks the frequencies in the band (broadcast against L), ``has_band`` the rows with a
    requirement, ``pair`` the neighbouring points that are both grid points. The largest 1/|1 + L|
    is taken as 1/(least |1 + L|) (the same number: 1/x rounds monotonically), and the crossings
    of the real axis and of the unit circle are worked out only where they are.
    """
    d = np.abs(1.0 + L)
    with np.errstate(divide="ignore"):
        ms = 1.0 / d.min(-1)
    insel = np.broadcast_to(sel, L.shape)
    with np.errstate(divide="ignore"):
        band = np.where(insel.any(-1), 20 * np.log10(1.0 / np.where(insel, d, np.inf).min(-1)), -np.inf)
    band = np.where(has_band, band, np.nan)
    im, re = L.imag, L.real
    c = np.nonzero((im[..., :-1] * im[..., 1:] <= 0) & (im[..., :-1] != im[..., 1:]))
    nxt = c[:-1] + (c[-1] + 1,)
    i0, i1, r0 = im[c], im[nxt], re[c]
    with np.errstate(divide="ignore", invalid="ignore"):
        f = i0 / (i0 - i1)
        x = r0 + f * (re[nxt] - r0)
    head = L.shape[:-1]
    flat = np.ravel_multi_index(c[:-1], head) if len(head) else np.zeros(len(x), int)
    up = np.zeros(head).reshape(-1)
    down = np.full(head, np.inf).reshape(-1)
    neg = x < 0
    u = neg & (x > -1)
    np.maximum.at(up, flat[u], -x[u])
    dn = neg & (x < -1)
    np.minimum.at(down, flat[dn], -x[dn])
    up, down = up.reshape(head), down.reshape(head)
    with np.errstate(divide="ignore"):
        gm_db = -20 * np.log10(up)
        gm_down = 20 * np.log10(down)
    m = np.abs(L) - 1.0
    cc = np.nonzero((m[..., :-1] * m[..., 1:] <= 0) & pair)
    pm = np.full(head, np.inf).reshape(-1)
    ang = np.degrees(np.abs(np.angle(L[cc])))
    np.minimum.at(pm, np.ravel_multi_index(cc[:-1], head) if len(head) else np.zeros(len(ang), int), 180.0 - ang)
    return Screen(ms, gm_db, gm_down, pm.reshape(head), band)


def _screen_ok(sc: Screen, ms_max, gm_min_db, pm_min_deg, level_db) -> np.ndarray:
    """Screened candidates within the limits and, where ``level_db`` is not NaN, the requirement."""
    ok = (sc.ms <= ms_max) & (sc.gm_db >= gm_min_db) & (sc.gm_down_db >= gm_min_db) & (sc.pm_deg >= pm_min_deg)
    return ok & (np.isnan(level_db) | (sc.band_s_db <= level_db))


def _forbidden_points(lim: Limits) -> np.ndarray:
    """Points of the L-plane outside the Ms disc that the margin limits forbid the Nyquist curve to touch."""
    r = 1.0 / lim.ms_max
    g = 10.0 ** (lim.gm_min_db / 20.0)
    pts: list[complex] = []
    if -1.0 / g > -1.0 + r:                      # upward gain margin: (-1 + r, -1/g] on the real axis
        pts += list(np.linspace(-1.0 + r, -1.0 / g, 4)[1:])
    if -g < -1.0 - r:                            # downward gain margin: [-g, -1 - r)
        pts += list(np.linspace(-g, -1.0 - r, 3)[:-1])
    psi0 = 2.0 * math.degrees(math.asin(min(1.0, r / 2.0)))
    if lim.pm_min_deg > psi0:                    # phase margin: the unit-circle arc outside the disc
        for psi in np.linspace(psi0, lim.pm_min_deg, 3)[1:]:   # lower half-plane, where L(jw) of w > 0 meets it
            p = np.radians(psi)
            pts.append(complex(-math.cos(p), -math.sin(p)))
    return np.asarray(pts, complex)


def _first_contact(L0: np.ndarray, b: np.ndarray, r: np.ndarray, pts: np.ndarray) -> np.ndarray:
    """Smallest t >= 0 for which L0 + t b touches the disc |1 + L| < r or one of ``pts``.

    L0 and b are (rows, ..., n_w) (b broadcast against L0), r is (rows,) and ``pts`` (rows, q),
    NaN where a row has fewer points. 0 where t = 0 is already inside the disc, inf where never.
    """
    shape = (-1,) + (1,) * (L0.ndim - 1)
    a = 1.0 + L0
    bb = (b * b.conj()).real
    ab = (a * b.conj()).real
    aa = (a * a.conj()).real - (r * r).reshape(shape)
    disc = ab * ab - bb * aa
    with np.errstate(divide="ignore", invalid="ignore"):
        k1 = (-ab - np.sqrt(np.maximum(disc, 0.0))) / bb
    t = np.ascontiguousarray(np.where((disc > 0) & (k1 > 0), k1, np.inf).min(-1))
    bad = (aa < 0).any(-1)
    b_ = np.broadcast_to(b, L0.shape)
    flat_t = t.reshape(-1)   # a view: the contacts found below are written into t
    for k in range(pts.shape[1]):
        rows = np.flatnonzero(np.isfinite(pts[:, k]))
        if not rows.size:
            continue
        whole = rows.size == pts.shape[0]
        x = pts[:, k] if whole else pts[rows, k]
        l0, bk = (L0, b_) if whole else (L0[rows], b_[rows])
        with np.errstate(divide="ignore", invalid="ignore"):
            z = (x.reshape(shape) - l0) / bk
        im = z.imag
        c = (im[..., :-1] * im[..., 1:] <= 0) & (im[..., :-1] != im[..., 1:])
        hit = np.nonzero(c)
        if not hit[0].size:
            continue
        nxt = hit[:-1] + (hit[-1] + 1,)
        i0, i1 = im[hit], im[nxt]
        with np.errstate(divide="ignore", invalid="ignore"):
            f = i0 / (i0 - i1)
            r0 = z.real[hit]
            kr = r0 + f * (z.real[nxt] - r0)
        good = (kr > 0) & np.isfinite(kr)
        where = np.ravel_multi_index(hit[:-1], im.shape[:-1])[good]
        if not whole:
            where = _lift(where, rows, im.shape[:-1], L0.shape[:-1])
        np.minimum.at(flat_t, where, kr[good])
    return np.where(bad, 0.0, t)


def _ki_contact(kp: np.ndarray, A: np.ndarray, b: np.ndarray, r: np.ndarray, pts: np.ndarray,
                grid: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None) -> np.ndarray:
    """:func:`_first_contact` of L0 = kp A (rows x gains) along b, in real arithmetic.

    With L0 = kp A the point of each frequency where L0 + t b meets a forbidden point x solves
    Im((x - kp A)/b) = Im(x/b) - kp Im(A/b) = 0: per gain only a product and a difference of
    arrays shared by the row's gains, and the real part only where the sign changes. The same
    contacts as :func:`_first_contact`, to rounding. One call of :func:`_ki_contacts` on
    :func:`_contact_rows` (callers with several sets of gains on the same rows share the latter).

    Parameters
    ----------
    kp : ndarray (R, K)
        Proportional gains of each row. [-]
    A : ndarray (R, n_w)
        (1 + D(jw)) P(jw) of each row. [-]
    b : ndarray (R, n_w)
        Direction of the ki term, P(jw)/(jw). [s]
    r : ndarray (R,)
        Radius of the forbidden disc about -1. [-]
    pts : ndarray (R, q)
        Forbidden points, NaN padded. [-]
    grid : (u, c0, c1) or None
        When the gains are c0 + c1 u (u (K,) ascending and shared by the rows, c0 and c1 (R,)),
        that description (it makes the search of the gains between two frequencies cheaper).

    Returns
    -------
    ndarray (R, K)
        The largest ki of each gain (0 inside the disc at ki = 0, inf where never). [1/s]
    """
    return _ki_contacts(_contact_rows(A, b, r, pts), kp, grid)


@dataclass
class _ContactRows:
    """What the ki contacts of a block of rows share across their gains (:func:`_contact_rows`)."""

    br: np.ndarray           # (R, n_w) Re b, b = P/(jw) the direction of ki [s]
    e: np.ndarray            # (R, n_w) Re(A conj b), A = (1 + D) P [s]
    A2: np.ndarray           # (R, n_w) |A|^2 [-]
    A2r: np.ndarray          # (R, n_w) 2 Re A [-]
    bb: np.ndarray           # (R, n_w) |b|^2 [s^2]
    nbb: np.ndarray          # (R, n_w) -|b|^2 [s^2]
    c0: np.ndarray           # (R,) 1 - r^2, r the disc radius [-]
    points: list             # per forbidden-point column: a _PointRows
    span: tuple              # (lo, hi) (R,) the gains the bounds below hold for
    never: np.ndarray | None  # (R, n_w) no disc contact for a gain of the span (None: not worked out)
    lb: np.ndarray | None     # (R, n_w) lower bound of the disc contact of the span's gains [1/s]
    probes: tuple | None = None  # e, br, A2, A2r, bb, nbb at each row's DISC_PROBES frequencies of least lb


@dataclass
class _PointRows:
    """One forbidden point x of each of some rows: x/b and A/b, and the intervals where Im((x - kp A)/b)
    may change sign for a gain within the rows' span."""

    rows: np.ndarray | None  # rows of the block that have this point (None: all)
    Ur: np.ndarray           # (R', n_w) Re(x/b)
    Ui: np.ndarray           # (R', n_w) Im(x/b)
    Vr: np.ndarray           # (R', n_w) Re(A/b)
    Vi: np.ndarray           # (R', n_w) Im(A/b)
    fast: np.ndarray         # (R',) Im(A/b) > 0 throughout and everything finite: the intervals below hold
    span: tuple              # (lo, hi) (R',) the gains the intervals were found for
    cells: tuple             # (row, interval, lo, hi, Ur0, Ur1, Vr0, Vr1): the intervals of fast rows
                             # whose range [lo, hi] of Ui/Vi (with slack) meets the span


def _contact_rows(A: np.ndarray, b: np.ndarray, r: np.ndarray, pts: np.ndarray,
                  span: tuple[np.ndarray, np.ndarray] | None = None,
                  xb: tuple[np.ndarray, np.ndarray] | None = None) -> _ContactRows:
    """The parts of :func:`_ki_contacts` that do not depend on the gains: x/b and A/b of every forbidden
    point x and, where Im(A/b) > 0 throughout a row, the intervals between neighbouring frequencies
    where Im((x - kp A)/b) changes sign for some gain kp of ``span`` (lowest and highest gain of each
    row, (R,) each; None: any gain). ``xb``: x/b already worked out for rows that share their b and
    points (several derivative times of one loop), as (X (loops, q, n_w), the loop of each row (R,));
    the same numbers."""
    R = A.shape[0]
    with np.errstate(divide="ignore", invalid="ignore"):
        V = A / b
    if span is None:
        span = (np.full(R, -np.inf), np.full(R, np.inf))
    points = []
    for q in range(pts.shape[1]):
        rows = np.flatnonzero(np.isfinite(pts[:, q]))
        if not rows.size:
            continue
        whole = rows.size == R
        x = pts[:, q] if whole else pts[rows, q]
        v = V if whole else V[rows]
        if xb is not None:
            U = xb[0][xb[1] if whole else xb[1][rows], q]
        else:
            with np.errstate(divide="ignore", invalid="ignore"):
                U = x[:, None] / (b if whole else b[rows])
        Ur, Ui, Vr, Vi = U.real, U.imag, v.real, v.imag
        s_lo, s_hi = (span[0], span[1]) if whole else (span[0][rows], span[1][rows])
        with np.errstate(invalid="ignore", divide="ignore"):
            fast = (Vi > 0).all(-1) & np.isfinite(Ui).all(-1) & np.isfinite(Vi).all(-1)
            f = np.flatnonzero(fast)
            rho = Ui[f] / Vi[f]
        lo = np.minimum(rho[:, :-1], rho[:, 1:])
        hi = np.maximum(rho[:, :-1], rho[:, 1:])
        lo -= 1e-9 * np.abs(lo)
        hi += 1e-9 * np.abs(hi)
        with np.errstate(invalid="ignore"):
            rr, ii = np.nonzero((hi >= s_lo[f, None]) & (lo <= s_hi[f, None]))
        lo_c, hi_c = lo[rr, ii], hi[rr, ii]
        rr = f[rr]
        cells = (rr, ii, lo_c, hi_c, Ur[rr, ii], Ur[rr, ii + 1], Vr[rr, ii], Vr[rr, ii + 1])
        points.append(_PointRows(None if whole else rows, Ur, Ui, Vr, Vi, fast, (s_lo, s_hi), cells))
    br, bi, Ar, Ai = b.real, b.imag, A.real, A.imag
    bb = br * br + bi * bi
    e, A2, A2r, c0 = Ar * br + Ai * bi, Ar * Ar + Ai * Ai, 2.0 * Ar, 1.0 - r * r
    never = lb = None
    if A.shape[1] >= 8 * DISC_PROBES and np.isfinite(span[0]).all() and np.isfinite(span[1]).all():
        never, lb = _disc_bounds(e, br, A2, A2r, bb, c0, span[0], span[1])
    return _ContactRows(br, e, A2, A2r, bb, -bb, c0, points, span, never, lb)


def _ki_contacts(C: _ContactRows, kp: np.ndarray, grid=None) -> np.ndarray:
    """:func:`_ki_contact` of gains ``kp`` (R, K) on rows prepared by :func:`_contact_rows`.

    The disc is met where a quadratic in t has a positive root (every row, gain and frequency).
    A forbidden point is met where Im((x - kp A)/b) changes sign between two frequencies; only
    the intervals where that contact could still lower a row's largest ki so far are looked at:
    the contact there is Re((x - kp A)/b) interpolated, not less than its smallest value at the
    interval's ends and gains, so an interval whose bound exceeds every ki of the row is skipped
    (the minimum is unchanged).
    """
    cols = _disc_columns(C, kp)
    if cols is None:
        t, bad = _disc_contact(kp, C.e, C.br, C.A2, C.A2r, C.bb, C.nbb, C.c0)
    else:
        t, bad = _disc_contact_kept(kp, C, *cols)
    k = kp[..., None]
    flat_t = t.reshape(-1)   # a view: the contacts found below are written into t
    for pr in C.points:
        rows = pr.rows
        whole = rows is None
        kk = k if whole else k[rows]
        top = t.max(-1) if whole else t[rows].max(-1)      # the row's largest ki so far
        g = None if grid is None else (grid[0], grid[1] if whole else grid[1][rows], grid[2] if whole else grid[2][rows])
        hit, i0, i1 = _point_changes(pr, kk[..., 0], top, g)
        if not hit[0].size:
            continue
        kh = kk[hit[0], hit[1], 0]
        Ur, Vr = pr.Ur, pr.Vr
        with np.errstate(divide="ignore", invalid="ignore"):
            f = i0 / (i0 - i1)
            r0 = Ur[hit[0], hit[2]] - kh * Vr[hit[0], hit[2]]
            r1 = Ur[hit[0], hit[2] + 1] - kh * Vr[hit[0], hit[2] + 1]
            kr = r0 + f * (r1 - r0)
        good = (kr > 0) & np.isfinite(kr)
        where = np.ravel_multi_index(hit[:-1], kk.shape[:-1])[good]
        if not whole:
            where = _lift(where, rows, kk.shape[:-1], t.shape)
        np.minimum.at(flat_t, where, kr[good])
    return np.where(bad, 0.0, t)


def _disc_contact(kp, e, br, A2, A2r, bb, nbb, c0) -> tuple[np.ndarray, np.ndarray]:
    """Smallest t > 0 at which 1 + kp A + t b enters the disc |.| < r, over the given frequencies (inf: never),
    and whether 1 + kp A is inside it at some frequency: (R, K) each (see :class:`_ContactRows`)."""
    k = kp[..., None]
    ab = k * e[:, None, :]
    ab += br[:, None, :]                        # Re((1 + kp A) conj(b)) = Re(conj b) + kp Re(A conj b)
    aa = k * A2[:, None, :]
    aa += A2r[:, None, :]
    aa *= k
    aa += c0[:, None, None]                     # |1 + kp A|^2 - r^2 = 1 - r^2 + kp (2 Re A + kp |A|^2)
    bad = (aa < 0).any(-1)
    aa *= bb[:, None, :]
    disc = np.multiply(ab, ab)
    disc -= aa                                  # (Re a conj b)^2 - |b|^2 (|a|^2 - r^2)
    ok = disc > 0
    k1 = np.maximum(disc, 0.0, out=aa)
    np.sqrt(k1, out=k1)
    k1 += ab
    with np.errstate(divide="ignore", invalid="ignore"):
        k1 /= nbb[:, None, :]                   # the smaller root in t: -(Re a conj b + sqrt(disc))/|b|^2
    ok &= k1 > 0
    return np.ascontiguousarray(np.where(ok, k1, np.inf).min(-1)), bad


#: Frequencies per row at which the disc contact is worked out first, for an upper bound of the row's ki. [-]
DISC_PROBES = 4


def _disc_bounds(e, br, A2, A2r, bb, c0, lo, hi) -> tuple[np.ndarray, np.ndarray]:
    """For gains in [lo, hi] (R,) each: where the line 1 + kp A + t b cannot enter the disc at t > 0 with
    1 + kp A outside it (``never``), and a lower bound of the contact t elsewhere (``lb``, 0 where
    1 + kp A may be inside): (R, n_w) each.

    Over the range of gains, |1 + kp A|^2 - r^2 is a convex quadratic in kp, Re((1 + kp A) conj b)
    is linear and the discriminant of the contact is a concave quadratic, so each has its least or
    largest value at an end of the range or at its vertex; the contact t is at least
    (|1 + kp A| - r)/|b|. Margins cover the rounding of the contacts themselves.
    """
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        lo, hi, c0 = lo[:, None], hi[:, None], c0[:, None]
        kv = np.clip(np.where(A2 > 0, -A2r / (2.0 * A2), lo), lo, hi)

        def aa(k):
            return c0 + k * (A2r + k * A2)

        a_lo, a_hi = aa(lo), aa(hi)
        aa_min = np.minimum(np.minimum(a_lo, a_hi), aa(kv))
        scale_a = np.abs(c0) + hi * np.abs(A2r) + hi * hi * A2
        outside = aa_min > 1e-12 * scale_a
        ab_lo, ab_hi = br + lo * e, br + hi * e
        behind = np.minimum(ab_lo, ab_hi) > 1e-12 * (np.abs(br) + hi * np.abs(e))
        q2 = e * e - bb * A2
        q1 = 2.0 * br * e - bb * A2r
        kd = np.clip(np.where(q2 < 0, -q1 / (2.0 * q2), lo), lo, hi)
        d_max = np.maximum(np.maximum(ab_lo * ab_lo - bb * a_lo, ab_hi * ab_hi - bb * a_hi),
                           (br + kd * e) ** 2 - bb * aa(kd))
        ab_big = np.maximum(np.abs(ab_lo), np.abs(ab_hi))
        miss = d_max < -1e-10 * (ab_big * ab_big + bb * scale_a)
        never = outside & (behind | miss)
        r = np.sqrt(1.0 - c0)
        lb = np.where(outside, (np.sqrt(aa_min + r * r) - r) / np.sqrt(bb), 0.0)
    return never, np.where(np.isfinite(lb), lb, 0.0)


def _disc_columns(C: _ContactRows, kp: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """The frequencies of each row that can hold the disc contact of one of its gains, or None for all:
    (rows, frequencies) of the kept pairs, row by row in order, and the count of each row.

    A frequency is left out when, for every gain of the row's span (:func:`_disc_bounds`), the point
    1 + kp A is outside the disc there (so it cannot make the row 'inside') and either the line
    cannot enter the disc at a positive t or it cannot enter before the bound ``lb``, more than twice
    an upper bound of every gain's contact (its contacts at the row's :data:`DISC_PROBES`
    frequencies of least bound). The least contact of every gain is then at a frequency kept (the
    same number), and 'inside' is unchanged. A row with none kept keeps its first frequency.
    """
    if C.never is None:
        return None
    R, m = C.e.shape
    with np.errstate(invalid="ignore"):
        if not ((np.nanmin(kp, -1) >= C.span[0]) & (np.nanmax(kp, -1) <= C.span[1])).all():
            return None
    never, lb = C.never, C.lb
    if C.probes is None:      # the same frequencies for every set of gains of these rows: found once
        probe = np.argpartition(np.where(never, np.inf, lb), DISC_PROBES - 1, -1)[:, :DISC_PROBES]
        C.probes = tuple(np.take_along_axis(x, probe, -1) for x in (C.e, C.br, C.A2, C.A2r, C.bb, C.nbb))
    t, _ = _disc_contact(kp, *C.probes, C.c0)
    ub = t.max(-1)
    with np.errstate(invalid="ignore"):
        keep = ~(never | (lb > 2.0 * np.where(np.isfinite(ub), ub, np.inf)[:, None]))
    n = keep.sum(-1)
    if n.sum() > 0.7 * keep.size:
        return None
    # a row with no frequency kept: its frequency 0 (every contact there is inf, as everywhere else)
    keep[n == 0, 0] = True
    r, c = np.nonzero(keep)
    return r, c, np.maximum(n, 1)


def _disc_contact_kept(kp: np.ndarray, C: _ContactRows, r: np.ndarray, c: np.ndarray, n: np.ndarray
                       ) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_disc_contact` over the kept frequencies of each row only (:func:`_disc_columns`): the kept
    (row, frequency) pairs side by side, no row padded to the longest, each row's least contact and
    'inside' reduced over its own run. The same arithmetic element by element, so the same numbers."""
    k = kp[r]                                    # (N, K) the gains of each pair's row
    idx = (r, c)
    ab = k * C.e[idx][:, None]
    ab += C.br[idx][:, None]
    aa = k * C.A2[idx][:, None]
    aa += C.A2r[idx][:, None]
    aa *= k
    aa += C.c0[r][:, None]
    inside = aa < 0
    aa *= C.bb[idx][:, None]
    disc = np.multiply(ab, ab)
    disc -= aa
    ok = disc > 0
    k1 = np.maximum(disc, 0.0, out=aa)
    np.sqrt(k1, out=k1)
    k1 += ab
    with np.errstate(divide="ignore", invalid="ignore"):
        k1 /= C.nbb[idx][:, None]
    ok &= k1 > 0
    start = np.cumsum(n) - n
    t = np.minimum.reduceat(np.where(ok, k1, np.inf), start, axis=0)
    bad = np.logical_or.reduceat(inside, start, axis=0)
    return t, bad


def _point_changes(pr: _PointRows, kp: np.ndarray, top: np.ndarray, grid):
    """Where im = Ui - kp Vi changes sign between neighbouring frequencies, for every gain of a row,
    leaving out intervals whose contact cannot be below ``top`` (R',) (see :func:`_ki_contacts`).

    Exactly the (row, gain, interval) with im0 im1 <= 0 and im0 != im1 that are not left out,
    and im at both ends. Where Vi > 0 throughout a row and its gains ascend within the span of
    :func:`_contact_rows`, im falls with kp through zero at Ui/Vi, so the gains with a change in
    an interval lie between the interval's bounds of Ui/Vi (with a 1e-9 relative slack, far above
    rounding): they are found by a sorted search and only they are tested; other rows are tested
    in full.

    Parameters
    ----------
    pr : _PointRows
        The rows' point.
    kp : ndarray (R', K)
        Gains of each row. [-]
    top : ndarray (R',)
        Largest ki of each row so far (inf: none). [1/s]
    grid : (u, c0, c1) or None
        The gains as c0 + c1 u (u (K,) shared), when they are.

    Returns
    -------
    tuple
        (rows, gains, intervals) index arrays, and im at the interval's two ends.
    """
    Ui, Vi = pr.Ui, pr.Vi
    K = kp.shape[1]
    with np.errstate(invalid="ignore"):
        fast = pr.fast & (kp > 0).all(-1) & (np.diff(kp, axis=-1) > 0).all(-1) \
            & (kp[:, 0] >= pr.span[0]) & (kp[:, -1] <= pr.span[1])
    parts = []
    slow = np.flatnonzero(~fast)
    if slow.size:
        im = Ui[slow, None, :] - kp[slow, :, None] * Vi[slow, None, :]
        h = np.nonzero(im[..., :-1] * im[..., 1:] <= 0)
        parts.append((slow[h[0]], h[1], h[2]))
    rr, ii, lo, hi, ur0, ur1, vr0, vr1 = pr.cells
    if rr.size and fast.any():
        kmin, kmax = kp[rr, 0], kp[rr, -1]
        cell = fast[rr] & (hi >= kmin) & (lo <= kmax)
        lim = top[rr]
        fin = np.isfinite(lim)
        if fin.any():
            # the contact of a gain in [kl, kh] in an interval is at least the least of
            # Ur - kp Vr at its two ends and at kl, kh (linear in kp; interpolation is convex)
            kl = np.maximum(lo, kmin)
            kh = np.minimum(hi, kmax)
            bound = np.minimum(np.minimum(ur0 - kl * vr0, ur0 - kh * vr0), np.minimum(ur1 - kl * vr1, ur1 - kh * vr1))
            bound -= 1e-12 * (np.abs(ur0) + np.abs(ur1) + kmax * (np.abs(vr0) + np.abs(vr1)))  # rounding
            with np.errstate(invalid="ignore"):
                cell &= ~(bound > np.where(fin, lim * (1.0 + 1e-12), np.inf))
        sel = np.flatnonzero(cell)
        if sel.size:
            rs, lo_c, hi_c = rr[sel], lo[sel], hi[sel]
            if grid is not None:
                u, c0, c1 = grid
                a = np.searchsorted(u, (lo_c - c0[rs]) / c1[rs], "left")
                e = np.searchsorted(u, (hi_c - c0[rs]) / c1[rs], "right")
            else:
                scale = kp[:, -1]
                base = 4.0 * np.arange(kp.shape[0])[:, None]      # rows apart: arctan spans less than pi
                keys = (np.arctan(kp / scale[:, None]) + base).ravel()  # ascending within and across rows
                a = np.searchsorted(keys, np.arctan(lo_c / scale[rs]) + base[rs, 0], "left") - K * rs
                e = np.searchsorted(keys, np.arctan(hi_c / scale[rs]) + base[rs, 0], "right") - K * rs
            a, e = np.clip(a, 0, K), np.clip(e, 0, K)
            n = np.maximum(e - a, 0)
            if n.sum():
                c = np.repeat(np.arange(n.size), n)
                k = np.repeat(a, n) + np.arange(n.sum()) - np.repeat(np.cumsum(n) - n, n)
                parts.append((rs[c], k, ii[sel][c]))
    if not parts:
        e = np.zeros(0, int)
        return (e, e, e), np.zeros(0), np.zeros(0)
    r, k, i = (np.concatenate(x) for x in zip(*parts))
    kr = kp[r, k]
    i0 = Ui[r, i] - kr * Vi[r, i]
    i1 = Ui[r, i + 1] - kr * Vi[r, i + 1]
    keep = (i0 * i1 <= 0) & (i0 != i1)   # the sign test itself; i0 != i1: a change, not a pair of zeros
    return (r[keep], k[keep], i[keep]), i0[keep], i1[keep]


def _lift(flat: np.ndarray, rows: np.ndarray, sub_shape: tuple, full_shape: tuple) -> np.ndarray:
    """Flat indices into an array of ``sub_shape`` (rows ``rows`` of the full one) as flat indices of ``full_shape``."""
    idx = np.unravel_index(flat, sub_shape)
    return np.ravel_multi_index((rows[idx[0]],) + idx[1:], full_shape)


# ----------------------------------------------------------------------------------------------
# ki frontiers


@dataclass(frozen=True)
class Frontier:
    """The largest ki for each kp (one derivative time), grid estimate.

    Attributes
    ----------
    td : float
        Derivative time of the ideal-form PID, 0 for PI. [s]
    kp : ndarray
        Proportional gains, ascending. [-]
    ki : ndarray
        Largest integral gain at each kp within the limits. [1/s]
    band_s_db : ndarray
        Largest |S| up to the band edge at each (kp, ki); NaN without a requirement. [dB]
    """

    td: float
    kp: np.ndarray
    ki: np.ndarray
    band_s_db: np.ndarray


@dataclass(frozen=True)
class _Search:
    """What the search knows of a batch of loops with a screening grid (one row per loop)."""

    w: np.ndarray          # (n, m) grid [rad/s]
    pair: np.ndarray       # (n, m - 1) neighbouring grid points
    P: np.ndarray          # (n, m) loop response with C = 1 [-]
    sel: np.ndarray        # (n, m) points in the rejection band
    has_band: np.ndarray   # (n,) a requirement is in force
    alpha: np.ndarray      # (n,) derivative filter factor [-]
    r: np.ndarray          # (n,) radius 1/ms_max of the forbidden disc [-]
    pts: np.ndarray        # (n, q) forbidden points, NaN padded


def _search_arrays(models: Sequence[LoopModel], wc: np.ndarray, wd: np.ndarray, limits: Sequence[Limits],
                   alpha: Sequence[float], rats: Sequence | None = None) -> _Search:
    g = screening_grids(wc, wd)
    P = loop_responses([_unit_loop(m) for m in models], g.w, rats)
    pts = [_forbidden_points(lim) for lim in limits]
    q = max((p.size for p in pts), default=0)
    pad = np.full((len(pts), q), np.nan + 0j)
    for i, p in enumerate(pts):
        pad[i, :p.size] = p
    with np.errstate(invalid="ignore"):
        sel = g.w <= wd[:, None]
    return _Search(g.w, g.pair, P, sel, np.isfinite(wd), np.asarray(alpha, float),
                   np.array([1.0 / lim.ms_max for lim in limits], float), pad)


def _frontier_rows(S: _Search, loop: np.ndarray, td: np.ndarray) -> list[Frontier | None]:
    """The ki frontier of each (loop, td) row: kp on a grid up to the largest P(D)-only gain meeting
    the limits, the largest ki at each, then refined about the best (see :func:`max_ki`)."""
    out: list[Frontier | None] = [None] * len(loop)
    m = S.w.shape[1]
    nk = KP_FRACTIONS.size
    block = max(1, 2 * BLOCK_ELEMENTS // (nk * m))   # twice the usual: fewer calls on the rows' forbidden points
    for a in range(0, len(loop), block):
        rows = np.arange(a, min(a + block, len(loop)))
        li, tdb = loop[rows], td[rows]
        w, P, r, pts = S.w[li], S.P[li], S.r[li], S.pts[li]
        alpha = S.alpha[li]
        with np.errstate(divide="ignore", invalid="ignore"):
            jw = (tdb[:, None] * 1j) * w
            cd = np.where(tdb[:, None] > 0, 1.0 + jw / (((alpha * tdb)[:, None] * 1j) * w + 1.0), 1.0 + 0j)
        cdP = cd * P
        kp_u = _first_contact(np.zeros_like(cdP), cdP, r, pts)
        ok = np.flatnonzero(np.isfinite(kp_u) & (kp_u > 0))
        if not ok.size:
            continue
        w, P, r, pts, cd, cdP, li = w[ok], P[ok], r[ok], pts[ok], cd[ok], cdP[ok], li[ok]
        # b = P/(jw) and x/b of the forbidden points x depend on the loop, not on td: once per loop
        ul, inv = np.unique(li, return_inverse=True)
        b_loop = S.P[ul] / (1j * S.w[ul])
        with np.errstate(divide="ignore", invalid="ignore"):
            xb = S.pts[ul][:, :, None] / b_loop[:, None, :]
        b = b_loop[inv]
        kp = kp_u[ok, None] * KP_FRACTIONS[None, :]
        lines = _contact_rows(cdP, b, r, pts, (kp[:, 0], kp[:, -1]), (xb, inv))
        ki = _ki_contacts(lines, kp, (KP_FRACTIONS, np.zeros(ok.size), kp_u[ok]))
        fin = np.isfinite(ki).all(-1)
        if not fin.any():
            continue
        keep = np.flatnonzero(fin)
        ok, w, P, r, pts, cd, cdP, b, kp, ki, li, inv = (x[keep] for x in (ok, w, P, r, pts, cd, cdP, b, kp, ki, li,
                                                                         inv))
        if keep.size < fin.size:
            lines = _contact_rows(cdP, b, r, pts, (kp[:, 0], kp[:, -1]), (xb, inv))
        j = np.argmax(ki, -1)
        n = np.arange(len(keep))
        # the refined gains start + k step, k = 1..8 (as np.linspace makes them)
        start, stop = kp[n, np.maximum(j - 1, 0)], kp[n, np.minimum(j + 1, nk - 1)]
        kp2 = np.linspace(start, stop, 10, axis=-1)[:, 1:-1].copy()
        ki2 = _ki_contacts(lines, kp2, (np.arange(1.0, 9.0), start, (stop - start) / 9))
        kp, ki = np.concatenate([kp, kp2], -1), np.concatenate([ki, ki2], -1)
        order = np.argsort(kp, -1)
        kp, ki = np.take_along_axis(kp, order, -1), np.take_along_axis(ki, order, -1)
        band = np.full(kp.shape, np.nan)
        hb = S.has_band[li]
        if hb.any():
            h = np.flatnonzero(hb)
            nb = S.sel[li[h]].sum(-1)             # the band is a leading part of each grid
            band[h[nb == 0]] = -np.inf
            h, nb = h[nb > 0], nb[nb > 0]
            if h.size:
                # the band's (row, frequency) pairs side by side, no row padded to the widest band
                start = np.cumsum(nb) - nb
                r = np.repeat(h, nb)
                c = np.arange(r.size) - np.repeat(start, nb)
                L = (kp[r] * cd[r, c][:, None] + ki[r] / (1j * w[r, c])[:, None]) * P[r, c][:, None]
                absS = np.maximum.reduceat(1.0 / np.abs(1.0 + L), start, axis=0)
                with np.errstate(divide="ignore"):
                    band[h] = 20 * np.log10(absS)
        for k, row in enumerate(rows[ok]):
            out[row] = Frontier(float(td[row]), kp[k], ki[k], band[k])
    return out


def max_ki(model: LoopModel, limits: Limits, td: float = 0.0, alpha: float = 0.1) -> Settings | None:
    """Largest integral gain subject to Ms <= ms_max and the gain- and phase-margin limits.

    The Nyquist curve of L = (kp (1 + D) + ki/s) P moves along a straight line in the L-plane as
    ki grows at each frequency; the first ki at which it touches the Ms disc (a quadratic in ki per
    frequency, solved in closed form) or a point the margin limits forbid is the largest ki of
    that kp. kp is searched on a grid from 0 to the largest P(D)-only gain meeting the limits,
    then refined about the best. The loop response is exact (delay e^{-jw theta}); the
    search frequency grid is the only approximation, and callers re-evaluate the result with
    the exact engine.

    Parameters
    ----------
    model : LoopModel
        The loop (its controller is ignored); the action (sign) must give negative feedback.
    limits : Limits
        Ms, gain-margin and phase-margin limits.
    td : float
        Fixed derivative time of an ideal-form PID, 0 for PI. [s]
    alpha : float
        Derivative filter factor. [-]

    Returns
    -------
    Settings or None
        Ideal form; None when no dead time or lag bounds the gains (ki unbounded) or no kp
        meets the limits.

    References
    ----------
    Astrom, Panagopoulos & Hagglund 1998 (maximise ki subject to a sensitivity constraint).
    """
    wc = characteristic_ws([model])
    if not np.isfinite(wc[0]):
        return None
    S = _search_arrays([model], wc, np.array([np.nan]), [limits], [alpha])
    fr = _frontier_rows(S, np.array([0]), np.array([float(td)]))[0]
    if fr is None:
        return None
    j = int(np.argmax(fr.ki))
    if not fr.ki[j] > 0:
        return None
    kind = "PID" if td > 0 else "PI"
    return Settings(f"max-ki {kind} at Ms <= {limits.ms_max:g}", "ideal", float(fr.kp[j]),
                    float(fr.kp[j] / fr.ki[j]), float(td), alpha)


def _optimum_candidates(fr_pi: Frontier | None, fr_d: list[Frontier], alpha: float, lim: Limits,
                        req: Requirement) -> list[Settings]:
    """The max-ki and best-band points of a loop's PI frontier and of its best PID frontiers."""
    wd = float(req.band_rad_s) if req.active else None
    out: list[Settings] = []
    if fr_pi is None:
        return out
    tag = f"at Ms <= {lim.ms_max:g}"

    def settings(fr, j, what):
        kind = "PID" if fr.td > 0 else "PI"
        return Settings(f"{what} {kind} {tag}", "ideal", float(fr.kp[j]), float(fr.kp[j] / fr.ki[j]), fr.td, alpha)

    j = int(np.argmax(fr_pi.ki))
    if fr_pi.ki[j] > 0:
        out.append(settings(fr_pi, j, "max-ki"))
    best_band = math.inf
    if wd is not None:
        jb = int(np.nanargmin(np.where(fr_pi.ki >= BEST_BAND_KI_MIN * fr_pi.ki.max(), fr_pi.band_s_db, np.inf)))
        best_band = fr_pi.band_s_db[jb]
        if jb != j and fr_pi.band_s_db[j] - best_band > 0.5:
            out.append(settings(fr_pi, jb, "best-band"))
    if fr_d:
        best = max(fr_d, key=lambda f: f.ki.max())
        jd = int(np.argmax(best.ki))
        pid_band = math.inf
        if best.ki[jd] >= PID_GAIN_MIN * fr_pi.ki[j]:
            out.append(settings(best, jd, "max-ki"))
            pid_band = best.band_s_db[jd] if wd is not None else math.inf
        if wd is not None:
            def usable(f):
                return np.where(f.ki >= BEST_BAND_KI_MIN * f.ki.max(), f.band_s_db, np.inf)
            fb = min(fr_d, key=lambda f: np.nanmin(usable(f)))
            jb = int(np.nanargmin(usable(fb)))
            if fb.band_s_db[jb] < min(best_band, pid_band) - 0.5:
                out.append(settings(fb, jb, "best-band"))
    return out


# ----------------------------------------------------------------------------------------------
# the SIMC tau_c screen


@dataclass(frozen=True)
class _Smooth:
    """One request for the smoothest SIMC setting of a loop (one rule)."""

    loop: int              # row of the search arrays
    rule: object           # simc_pi or simc_pid_series
    lo: float              # smallest tau_c tried [s]
    hi: float              # largest tau_c tried [s]
    k: float               # gain of the rule's model [-]
    t1: float              # its dominant time constant (inf for an integrator) [s]
    t2: float              # its second time constant (derivative time of the PID) [s]
    theta: float           # its effective dead time [s]
    lim: Limits
    req: Requirement


def _tau_ok(S: _Search, reqs: Sequence[_Smooth], series: bool, taus: np.ndarray) -> np.ndarray:
    """Screen the SIMC settings of each request at each of its taus (R, T): within the limits and the requirement.

    The requirement is checked first on the band alone; the limits only for the taus that meet it (the
    same verdicts: a tau that fails the requirement fails the screen).
    """
    out = np.zeros(taus.shape, bool)
    m = S.w.shape[1]
    block = max(1, BLOCK_ELEMENTS // (taus.shape[1] * m))
    for a in range(0, len(reqs), block):
        sub = reqs[a:a + block]
        li = np.array([q.loop for q in sub])

        def col(vals):
            return np.array(vals, float)[:, None]

        k, t1, t2, theta = (col([getattr(q, n) for q in sub]) for n in ("k", "t1", "t2", "theta"))
        tau = taus[a:a + block]
        h = tau + theta
        with np.errstate(divide="ignore", invalid="ignore"):
            integrating = np.isinf(t1)
            kc = np.where(integrating, 1.0 / (k * h), t1 / (k * h))
            ti = np.where(integrating, 4.0 * h, np.minimum(t1, 4.0 * h))
            ki = np.where((ti > 0) & np.isfinite(ti), kc / np.where(ti > 0, ti, 1.0), 0.0)
        # L = C P = kc F P + ki F P/s, F = (td s + 1)/(alpha td s + 1) of the series PID (1 for PI):
        # the parts of each loop computed once for all its taus
        s = 1j * S.w[li]
        PF = S.P[li]
        if series:
            td = t2 * np.ones_like(s.real)
            PF = PF * np.where(td > 0, (td * s + 1.0) / (S.alpha[li][:, None] * td * s + 1.0), 1.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            Pi = PF / s
        level = col([q.req.level_db for q in sub])
        # the requirement first, on the band's leading part of each grid alone (the same numbers as the
        # screen's own band level): only the taus that meet it are screened in full
        sel = S.sel[li]
        c = max(1, int(sel.sum(-1).max()))
        Lb = kc[..., None] * PF[:, None, :c]
        Lb += ki[..., None] * Pi[:, None, :c]
        insel = np.broadcast_to(sel[:, None, :c], Lb.shape)
        with np.errstate(divide="ignore"):
            band = np.where(insel.any(-1), 20 * np.log10(1.0 / np.where(insel, np.abs(1.0 + Lb), np.inf).min(-1)),
                            -np.inf)
            r, t = np.nonzero(np.isnan(level) | (band <= level))
        if not r.size:
            continue
        L = kc[r, t][:, None] * PF[r]
        L += ki[r, t][:, None] * Pi[r]
        sc = _screen(L, sel[r], np.ones(r.size, bool), S.pair[li][r])
        out[a + r, t] = _screen_ok(sc, col([q.lim.ms_max for q in sub])[r, 0], col([q.lim.gm_min_db for q in sub])[r, 0],
                                   col([q.lim.pm_min_deg for q in sub])[r, 0], level[r, 0])
    return out


def _smoothest(S: _Search, reqs: Sequence[_Smooth]) -> np.ndarray:
    """Largest screened tau_c of each request meeting the limits and the requirement (NaN where none). [s]"""
    tc = np.full(len(reqs), np.nan)
    for series in (False, True):
        idx = [k for k, q in enumerate(reqs) if (q.rule is simc_pid_series) == series]
        if not idx:
            continue
        sub = [reqs[k] for k in idx]
        coarse, fine_n = TAU_POINTS
        taus = np.geomspace([q.lo for q in sub], [q.hi for q in sub], coarse, axis=-1)
        ok = _tau_ok(S, sub, series, taus)
        found = ok.any(-1)
        j = coarse - 1 - np.argmax(ok[:, ::-1], -1)
        n = np.arange(len(sub))
        got = taus[n, j]
        again = np.flatnonzero(found & (j + 1 < coarse))
        if again.size:
            fine = np.geomspace(taus[again, j[again]], taus[again, j[again] + 1], fine_n, axis=-1)[:, 1:-1]
            okf = _tau_ok(S, [sub[k] for k in again], series, fine)
            hit = okf.any(-1)
            jf = fine.shape[1] - 1 - np.argmax(okf[:, ::-1], -1)
            got[again[hit]] = fine[np.flatnonzero(hit), jf[hit]]
        tc[idx] = np.where(found, got, np.nan)
    return tc


# ----------------------------------------------------------------------------------------------
# candidates of many loops


@dataclass
class CandidateSet:
    """The candidates of one loop.

    Attributes
    ----------
    settings : list of Settings
        Unrounded, each in its native form, in a fixed order (SIMC tight and smoother per rule,
        AMIGO, the ki optimum points).
    notes : list of str
        Rules that do not apply, and why.
    error : Exception or None
        What the loop's own search raised (its candidates are then empty).
    """

    settings: list[Settings] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    error: BaseException | None = None


def _plan(model: LoopModel, lim: Limits, req: Requirement, alpha: float, loop: int | None,
          smooth: list[_Smooth]) -> tuple[list, list[str]]:
    """The rule-based candidates of one loop, with placeholders (request numbers) for the screened ones."""
    proc = model.process
    extra = effective_extra_delay(model)
    notes: list[str] = []
    items: list = []
    if proc.kind in ("fopdt", "sopdt", "ipdt"):
        try:
            t0 = simc_tau_c_min(proc, extra)
            theta_e = _effective(proc, extra, for_pid=False)[3]
            rules = [simc_pi]
            if (proc.kind == "sopdt" and min(proc.tau1, proc.tau2) > 0) or (proc.kind == "ipdt" and proc.tau1 > 0):
                rules.append(simc_pid_series)
            for rule in rules:
                kind = "PID" if rule is simc_pid_series else "PI"
                if t0 is not None:
                    lab = "tau_c = theta" if theta_e > 0 else \
                        f"tau_c = {t0:.3g} s ({TAU_C_FLOOR:g} x largest time constant: no dead time)"
                    items.append(replace(rule(proc, t0, extra, alpha), method=f"SIMC {kind}, {lab}"))
                if req.active and loop is not None:
                    wd = float(req.band_rad_s)
                    lo = t0 if t0 else 0.01 / wd
                    hi = max(100.0 * lo, 100.0 / wd)
                    if not (lo > 0 and hi > 0):
                        raise ValueError("SIMC needs tau_c > 0")
                    k, t1, t2, theta = _effective(proc, extra, for_pid=rule is simc_pid_series)
                    smooth.append(_Smooth(loop, rule, lo, hi, k, t1, t2, theta, lim, req))
                    items.append((len(smooth) - 1, rule, proc, extra, alpha, theta_e))
        except ValueError as e:
            notes.append(str(e))
    if proc.kind == "fopdt":
        try:
            items += [amigo_pi(proc, extra, alpha), amigo_pid(proc, extra, alpha)]
        except ValueError as e:
            notes.append(str(e))
    if loop is None:
        notes.append("no dead time, sample period, filter or lag bounds the loop gain: the ki optimum does not exist")
    return items, notes


def _smoother_settings(tc: float, rule, proc, extra: float, alpha: float, theta_e: float) -> Settings | None:
    if not math.isfinite(tc):
        return None
    s = rule(proc, tc, extra, alpha)
    kind = "PID" if rule is simc_pid_series else "PI"
    rel = f"{tc / theta_e:.2g} theta = " if theta_e > 0 else ""
    return replace(s, method=f"SIMC {kind}, tau_c = {rel}{tc:.3g} s (smoothest meeting the requirement)")


def _candidates_batch(models: Sequence[LoopModel], limits: Sequence[Limits], reqs: Sequence[Requirement],
                      alphas: Sequence[float]) -> list[CandidateSet]:
    n = len(models)
    out = [CandidateSet() for _ in range(n)]
    rats = [_unit_loop(m).rational for m in models]   # sign P F of each loop, shared by both searches
    wc = characteristic_ws(models, rats)
    has = np.flatnonzero(np.isfinite(wc))
    loop_of = {int(i): k for k, i in enumerate(has)}
    wd = np.array([float(reqs[i].band_rad_s) if reqs[i].active else np.nan for i in has], float)
    S = _search_arrays([models[i] for i in has], wc[has], wd, [limits[i] for i in has],
                       [alphas[i] for i in has], [rats[i] for i in has]) if has.size else None
    smooth: list[_Smooth] = []
    plans: list = [None] * n
    for i in range(n):
        try:
            plans[i] = _plan(models[i], limits[i], reqs[i], alphas[i], loop_of.get(i), smooth)
        except Exception as exc:  # noqa: BLE001 - this loop's fault, said on its row; the others go on
            out[i].error = exc
    tc = _smoothest(S, smooth) if smooth else np.zeros(0)
    rows = [(k, float(td)) for k, i in enumerate(has) if plans[i] is not None
            for td in (0.0, *(f / wc[i] for f in PID_TD_FACTORS))]
    frs = _frontier_rows(S, np.array([k for k, _ in rows], int), np.array([t for _, t in rows], float)) \
        if rows else []
    by_loop: dict[int, list] = {}
    for (k, _), fr in zip(rows, frs):
        by_loop.setdefault(k, []).append(fr)
    for i in range(n):
        if plans[i] is None:
            continue
        try:
            items, notes = plans[i]
            got: list[Settings] = []
            for it in items:
                if isinstance(it, Settings):
                    got.append(it)
                    continue
                req_no, rule, proc, extra, alpha, theta_e = it
                sm = _smoother_settings(float(tc[req_no]), rule, proc, extra, alpha, theta_e)
                if sm is not None:
                    got.append(sm)
            if i in loop_of:
                fr = by_loop[loop_of[i]]
                got += _optimum_candidates(fr[0], [f for f in fr[1:] if f is not None], alphas[i], limits[i],
                                           reqs[i])
            out[i].settings, out[i].notes = got, notes
        except Exception as exc:  # noqa: BLE001 - this loop's fault, said on its row; the others go on
            out[i].error = exc
    return out


def candidate_settings_many(models: Sequence[LoopModel], limits: Sequence[Limits], reqs: Sequence[Requirement],
                            alphas: Sequence[float]) -> list[CandidateSet]:
    """Every candidate of many loops, unrounded, each in its native form; the search batched across loops.

    Parameters
    ----------
    models : sequence of LoopModel
        The loops, each with an action that gives negative feedback.
    limits : sequence of Limits
        Robustness limits of each loop (``ms_max`` [-], ``gm_min_db`` [dB], ``pm_min_deg`` [deg]).
    reqs : sequence of Requirement
        Rejection requirement of each loop (``band_rad_s`` [rad/s], ``attenuation_db`` [dB]; may
        be inactive).
    alphas : sequence of float
        Derivative filter factor of each row. [-]

    Returns
    -------
    list of CandidateSet
        One per loop, in order: the same candidates as :func:`candidate_settings` gives the loop
        alone. A loop whose own search raises gets its exception in ``error``; should the
        batched arithmetic itself raise, the loops are searched one by one so that only the
        loop at fault is lost.
    """
    models = list(models)
    try:
        return _candidates_batch(models, limits, reqs, alphas)
    except Exception:  # noqa: BLE001 - find the loop at fault; the others go on
        out = []
        for i in range(len(models)):
            try:
                out += _candidates_batch(models[i:i + 1], limits[i:i + 1], reqs[i:i + 1], alphas[i:i + 1])
            except Exception as exc:  # noqa: BLE001 - said on its row
                out.append(CandidateSet(error=exc))
        return out


def candidate_settings(model: LoopModel, limits: Limits, req: Requirement, alpha: float = 0.1
                       ) -> tuple[list[Settings], list[str]]:
    """Every candidate of one loop, unrounded, each in its native form.

    Parameters
    ----------
    model : LoopModel
        The loop with an action that gives negative feedback.
    limits : Limits
        Robustness limits: ``ms_max`` [-], ``gm_min_db`` [dB], ``pm_min_deg`` [deg].
    req : Requirement
        Rejection requirement (``band_rad_s`` [rad/s], ``attenuation_db`` [dB]; may be inactive).
    alpha : float
        Derivative filter factor of the row. [-]

    Returns
    -------
    (list of Settings, list of str)
        Candidates and notes on rules that do not apply.

    Raises
    ------
    Exception
        Whatever the loop's search raised.
    """
    got = candidate_settings_many([model], [limits], [req], [alpha])[0]
    if got.error is not None:
        raise got.error
    return got.settings, got.notes
