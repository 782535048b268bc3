"""An independent evaluation of single loops, written for the tests (not used by the tool).

It shares nothing with audit/frequency.py but :meth:`audit.loop.LoopModel.L` (numpy's polyval
and the exact delay factor). Per loop, in plain numpy and scipy:

- a very dense grid: 4,000 log-spaced points over 12 decades around the loop's roots, plus
  points on a tangent scale around every lightly damped pole and zero (so no resonance lies
  between points), then bisection of every interval where arg L, ln|L|, arg(1 + L) or ln|1 + L|
  changes by more than 0.05 until none does;
- crossings refined by scipy's brentq, maxima by scipy's bounded minimize_scalar;
- stability: without dead time, the poles of the closed loop by python-control
  (``feedback(L, 1).poles()``); with dead time, the argument principle on the Nyquist contour,
  the small half-circle around integrators evaluated point by point and unwrapped.

References
----------
.. [1] K. J. Astrom and R. M. Murray, Feedback Systems, 2nd ed., Princeton, 2021, sec. 10.2
   (Nyquist criterion with indentations around poles on the imaginary axis).
.. [2] R. P. Brent, Algorithms for Minimization without Derivatives, Prentice-Hall, 1973
   (as scipy.optimize.brentq and minimize_scalar 'bounded').
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import control
import numpy as np
from scipy.optimize import brentq, minimize_scalar

from audit.loop import LoopModel

#: Largest change of arg or ln-modulus (of L and of 1 + L) between neighbouring points. [-]
STEP = 0.05
#: |L| below which the tail of a loop with dead time is not followed further: gain margins of such
#: loops are compared up to 1/TAIL (above it, as 'above 1/TAIL'). [-]
TAIL = 2e-3
#: Turns of the delay spiral followed past the roots when |L(inf)| > 0 with dead time. [-]
TURNS = 200


@dataclass
class Truth:
    """Figures of one loop, same names and units as the engine's columns."""

    stable: bool
    rhp_closed: float       # inf for infinitely many
    gm: float
    gm_low: float
    pm_deg: float
    wc_rad_s: float
    dm_s: float
    ms: float
    mt: float
    wb_rad_s: float
    neutral: bool
    gm_seen: float          # gain margins are compared up to this value (the end of the grid's tail)
    tail_level: float       # |L| at the end of the grid: |S| and |T| beyond may exceed the grid's by about that


def _roots(m: LoopModel):
    r = m.rational
    num, den = np.trim_zeros(np.asarray(r.num, float), "f"), np.trim_zeros(np.asarray(r.den, float), "f")
    return num, den, np.roots(num), np.roots(den)


def _seed_grid(m: LoopModel, zeros, poles) -> tuple[np.ndarray, float, float]:
    roots = np.concatenate([zeros, poles])
    mags = np.abs(roots)
    mags = mags[mags > 1e-12]
    scales = list(mags)
    if m.delay > 0:
        scales.append(1.0 / m.delay)
    scales = np.array(scales or [1.0])
    lo, hi = scales.min() * 1e-6, scales.max() * 1e6
    w = list(np.geomspace(lo, hi, 4_000))
    for p in roots:
        wn = abs(p)
        if wn < 1e-12:
            continue
        zeta = abs(p.real) / wn
        if zeta < 0.3:
            wd = abs(p.imag)
            width = max(abs(p.real), 1e-15 * wd)
            phi = np.linspace(-math.pi / 2, math.pi / 2, 402)[1:-1]
            w.extend(wd + width * np.tan(phi))
    w = np.unique(np.array(w))
    return w[w > 0], lo, hi


def _refine(f, w: np.ndarray, passes: int = 60) -> tuple[np.ndarray, np.ndarray]:
    """Bisect every interval where arg or ln-modulus of L or 1 + L moves more than STEP."""
    Lw = f(w)
    for _ in range(passes):
        a, b = Lw[:-1], Lw[1:]
        with np.errstate(divide="ignore", invalid="ignore"):
            # (arg and ln-modulus of L matter only where |L| is not negligible)
            big = np.maximum(np.abs(a), np.abs(b)) > 0.1 * TAIL
            bad = ((big & ((np.abs(np.angle(b / a)) > STEP) | (np.abs(np.log(np.abs(b) / np.abs(a))) > STEP)))
                   | (np.abs(np.angle((1 + b) / (1 + a))) > STEP)
                   | (np.abs(np.log(np.abs(1 + b) / np.abs(1 + a))) > STEP))
        bad &= (w[1:] - w[:-1]) > 1e-13 * w[1:]
        idx = np.flatnonzero(bad)
        if idx.size == 0:
            break
        mid = 0.5 * (w[idx] + w[idx + 1])
        Lm = f(mid)
        w = np.insert(w, idx + 1, mid)
        Lw = np.insert(Lw, idx + 1, Lm)
    return w, Lw


def _tail_end(m: LoopModel, zeros, poles, l_inf: float) -> float:
    """Where the grid of a loop with dead time ends: past the last point with |L| >= TAIL and past a
    hundred times the largest root (strictly proper), or TURNS turns of the delay past that (|L(inf)| > 0)."""
    mags = np.abs(np.concatenate([zeros, poles, [1.0 / m.delay]]))
    top = 100.0 * mags.max()
    if l_inf > 0:
        return top + TURNS * 2 * math.pi / m.delay
    w = np.geomspace(top * 1e-8, top * 1e8, 4001)
    above = np.flatnonzero(np.abs(m.rational(1j * w)) >= TAIL)
    # (never before ``top``: a resonance's narrow peak may lie between these points)
    return max(float(w[min(above[-1] + 1, w.size - 1)]), top) if above.size else top


def _bisect(g, a: np.ndarray, b: np.ndarray, steps: int = 60) -> np.ndarray:
    """Roots of g (vectorised) on brackets [a, b] where g changes sign, by plain bisection."""
    a, b = a.copy(), b.copy()
    ga = g(a) > 0
    for _ in range(steps):
        m = 0.5 * (a + b)
        gm = g(m) > 0
        same = gm == ga
        a = np.where(same, m, a)
        b = np.where(same, b, m)
    return 0.5 * (a + b)


def evaluate_independent(m: LoopModel) -> Truth:
    """Figures of one loop (no cascade), computed independently of the engine.

    Parameters
    ----------
    m : LoopModel
        A single loop without inner loop.

    Returns
    -------
    Truth
        The figures; ``rhp_closed`` is inf for a neutral loop (|L(inf)| > 1 with dead time).
    """
    assert m.inner is None
    num, den, zeros, poles = _roots(m)
    k = int(np.sum(np.abs(poles) < 1e-12) - np.sum(np.abs(zeros) < 1e-12))
    proper_eq = len(num) == len(den)
    l_inf_real = num[0] / den[0] if proper_eq else 0.0
    l_inf = abs(l_inf_real)
    delay = m.delay
    gm_seen = math.inf                  # gain margins above this are beyond the grid's tail
    tail_level = 0.0                    # |L| where the grid's tail ends (peaks may exceed the grid's by that)
    w, lo, hi = _seed_grid(m, zeros, poles)
    if delay > 0:
        end = max(_tail_end(m, zeros, poles, l_inf), lo * 10)
        # the delay turns the curve by w * delay: at most STEP / 2 between base points, 200,000 at most
        end = min(end, 200_000 * STEP / (2.0 * delay))
        if l_inf == 0:
            tail_level = float(np.abs(np.polyval(num, 1j * end) / np.polyval(den, 1j * end)))
            gm_seen = 1.0 / max(TAIL, tail_level)
        w = w[w <= end]
        n_lin = int(2.0 * end * delay / STEP)
        w = np.unique(np.concatenate([w, np.linspace(lo, end, n_lin + 2)[1:]]))
    def f(x):
        # L(jw) as LoopModel.L computes it (polyval, exact delay factor), the rational part built once
        s_ = 1j * np.asarray(x, float)
        return np.polyval(num, s_) / np.polyval(den, s_) * np.exp(-s_ * delay)

    w, Lw = _refine(f, w)
    one = 1.0 + Lw

    # ---- stability ----
    neutral = delay > 0 and l_inf >= 1.0
    p_open = int(np.sum(poles.real > 1e-9 * max(1.0, np.abs(poles).max(initial=0.0))))
    if neutral:
        stable, rhp = False, math.inf
    elif delay == 0:
        cl = control.feedback(control.tf(list(num), list(den)), 1).poles()
        scale = max(1.0, float(np.abs(cl).max(initial=0.0)))
        rhp = float(np.sum(cl.real > 1e-9 * scale))
        stable = bool(np.all(cl.real < -1e-9 * scale))
    else:
        # argument principle, clockwise contour: Z = P - (change of arg(1 + L)) / (2 pi)
        eps = w[0]
        phi = np.linspace(-math.pi / 2, math.pi / 2, 20_001)
        s = eps * np.exp(1j * phi)
        ind = 1.0 + np.polyval(num, s) / np.polyval(den, s) * np.exp(-s * delay)
        d_ind = float(np.sum(np.angle(ind[1:] / ind[:-1])))
        d_pos = float(np.sum(np.angle(one[1:] / one[:-1])))
        d_pos += float(np.angle(1.0 / one[-1]))              # |L| < 1 beyond: back to arg 1
        total = 2.0 * d_pos + d_ind
        rhp = float(round(p_open - total / (2 * math.pi)))
        stable = rhp == 0 and float(np.min(np.abs(one))) > 1e-9
        rhp = max(rhp, 0.0)

    # ---- negative real axis crossings ----
    im_w = Lw.imag
    sc = np.flatnonzero(((im_w[:-1] > 0) != (im_w[1:] > 0)) & ((Lw[:-1].real < 0) | (Lw[1:].real < 0)))
    xs = _bisect(lambda x: f(x).imag, w[sc], w[sc + 1])
    Lx = f(xs)
    re = Lx.real
    # (a crossing through L = 0, at a zero on the imaginary axis, is no crossing of the negative axis)
    kf = list(-1.0 / re[(re < 0) & (np.abs(Lx) > 1e-12)])
    L0 = complex(np.polyval(num, 0.0) / np.polyval(den, 0.0)) if k <= 0 else None
    if k == 0 and L0.real < 0:
        kf.append(-1.0 / L0.real)
    if delay > 0 and 0 < l_inf < 1:
        kf.append(1.0 / l_inf)                   # infimum of the crossings as w -> inf
    if delay == 0 and l_inf_real < 0:
        kf.append(-1.0 / l_inf_real)             # the crossing at w = inf (a pole through infinity)
    kf = np.array(kf)
    up = kf[kf > 1]
    gm = float(up.min()) if up.size else math.inf
    lowk = kf[kf < 1]
    gm_low = float(lowk.max()) if lowk.size else math.nan

    # ---- gain crossovers ----
    mag = np.abs(Lw)
    gc = np.flatnonzero((mag[:-1] > 1) != (mag[1:] > 1))
    wcs = list(_bisect(lambda x: np.abs(f(x)) - 1.0, w[gc], w[gc + 1]))
    pms = []
    for x in wcs:
        pm = 180.0 + math.degrees(float(np.angle(f(np.array([x]))[0])))
        pms.append(pm - 360.0 if pm > 180.0 else pm)
    if pms:
        pa = np.array(pms)
        j = int(np.argmin(np.abs(pa)))
        pm_deg, wc = float(pa[j]), float(wcs[j])
        dm = float(np.min(np.radians(np.mod(pa, 360.0)) / np.array(wcs)))
    else:
        pm_deg, wc, dm = math.inf, math.nan, math.inf

    # ---- peaks ----
    absS = 1.0 / np.abs(one)
    absT = np.abs(Lw) * absS

    def peak(vals, fun, lim0, liminf):
        best = max(float(vals.max()), lim0, liminf)
        loc = np.flatnonzero((vals[1:-1] >= vals[:-2]) & (vals[1:-1] >= vals[2:])) + 1
        loc = loc[np.argsort(-vals[loc])][:6]
        for i in loc:
            a, b = math.log(w[i - 1]), math.log(w[i + 1])
            r = minimize_scalar(lambda x: -fun(math.exp(x)), bounds=(a, b), method="bounded",
                                options={"xatol": 1e-13})
            best = max(best, -float(r.fun))
        return best

    S = lambda x: abs(1.0 / (1.0 + f(np.array([x]))[0]))          # noqa: E731
    T = lambda x: (lambda v: abs(v / (1.0 + v)))(f(np.array([x]))[0])  # noqa: E731
    if k > 0:
        s0, t0 = 0.0, 1.0
    else:
        s0, t0 = 1.0 / abs(1.0 + L0), abs(L0) / abs(1.0 + L0)
    if delay > 0 and l_inf > 0:
        sinf = 1.0 / (1.0 - l_inf) if l_inf < 1 else math.inf
        tinf = l_inf / (1.0 - l_inf) if l_inf < 1 else math.inf
    else:
        sinf, tinf = 1.0 / abs(1.0 + l_inf_real), l_inf / abs(1.0 + l_inf_real)
    ms = peak(absS, S, s0, sinf)
    mt = peak(absT, T, t0, tinf)

    # ---- bandwidth ----
    thr = 1.0 / math.sqrt(2.0)
    rise = np.flatnonzero((absS[:-1] < thr) & (absS[1:] >= thr))
    if absS[0] >= thr or rise.size == 0:
        wb = math.nan
    else:
        i = rise[0]
        wb = brentq(lambda x: S(x) - thr, w[i], w[i + 1], xtol=1e-15 * w[i], rtol=1e-15, maxiter=200)
    return Truth(stable, rhp, gm, gm_low, pm_deg, wc, dm, ms, mt, wb, neutral, gm_seen, tail_level)


#: Figures compared with the engine's columns, and the relative tolerance. [-]
COMPARED = ("gm", "gm_low", "pm_deg", "dm_s", "ms", "mt", "wb_rad_s")
RTOL = 1e-4


def _differs(a: float, b: float, rtol: float = RTOL) -> bool:
    a, b = float(a), float(b)
    if math.isnan(a) or math.isnan(b):
        return math.isnan(a) != math.isnan(b)
    if math.isinf(a) or math.isinf(b):
        return a != b
    return abs(a - b) > rtol * max(abs(a), abs(b), 1e-12)


def disagreements(models, figs, truths) -> dict[str, list[int]]:
    """Per figure (and ``stable``, ``rhp_closed``): the rows where engine and truth disagree.

    Figures of loops that are not stable are compared too (they are reported); ``rhp_closed``
    of a neutral loop is compared as 'infinitely many' (the engine leaves it blank).
    """
    out: dict[str, list[int]] = {c: [] for c in ("stable", "rhp_closed") + COMPARED}
    for i, (t, (_, f)) in enumerate(zip(truths, figs.iterrows())):
        if bool(f["stable"]) != t.stable:
            out["stable"].append(i)
        r = f["rhp_closed"]
        r = math.inf if r is None or r is np.nan or (not isinstance(r, (int, np.integer)) and pd_isna(r)) else float(r)
        if r != t.rhp_closed:
            out["rhp_closed"].append(i)
        for c in COMPARED:
            a, b = f[c], getattr(t, c)
            if t.neutral and c not in ("ms", "mt", "wb_rad_s"):
                continue        # margins of a neutral loop: over the grid only (README), not compared
            if c == "gm" and min(a, b) > t.gm_seen:
                continue                        # the tail of the truth's grid ends at |L| = TAIL
            if c in ("ms", "mt") and b <= a <= b * (1.0 + 3.0 * t.tail_level):
                continue                        # the engine's peak lies beyond the truth's tail
            if _differs(a, b):
                out[c].append(i)
    return out


def pd_isna(x) -> bool:
    import pandas as pd

    return bool(pd.isna(x))
