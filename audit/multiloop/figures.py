"""Figures of a group of interacting loops closed together, every dead time exact.

A group is n loops with their own (decentralised) controllers and the couplings between them.
With y the PVs [% of range] and u the controller outputs [%], y = G(s) u; loop j's controller
and execution delay are k_j(s) = sign_j C_j(s) e^{-s Ts_j/2}, loop i's PV filter F_i(s). The
loop matrix is

    L(s) = F(s) G(s) K(s),   L_ij(s) = F_i(s) g_ij(s) k_j(s),

whose diagonal elements are the single-loop transfers of :class:`audit.loop.LoopModel` (a
cascade's outer loop keeps its inner loop inside g_ii). Every element is a rational function
times one pure delay, evaluated as e^{-s theta} directly; Pade models appear only in the tests.

Stability is decided by the generalised Nyquist criterion [3]_: Z = P - Delta/(2 pi), where
Delta is the change of arg det(I + L(s)) around the Nyquist contour (up the imaginary axis,
a small semicircle to the right of s = 0 where integrators sit, and the large arc), and P is
the number of open-loop poles in the right half-plane of the element-wise realisation (each
element's own poles, a cascade's inner closed-loop poles included). See DEVELOPERS.md, "How
group stability is decided".

References
----------
.. [1] E. H. Bristol, "On a new measure of interaction for multivariable process control",
   IEEE Trans. Automatic Control 11 (1966) 133-134 (relative gain array).
.. [2] A. Niederlinski, "A heuristic approach to the design of linear multivariable interacting
   control systems", Automatica 7 (1971) 691-701; P. Grosdidier, M. Morari and B. R. Holt,
   "Closed-loop properties from steady-state gain information", Ind. Eng. Chem. Fundam. 24
   (1985) 221-235 (the sufficient condition stated rigorously).
.. [3] C. A. Desoer and Y. T. Wang, "On the generalized Nyquist stability criterion", IEEE
   Trans. Automatic Control 25 (1980) 187-196; S. Skogestad and I. Postlethwaite, Multivariable
   Feedback Control, 2nd ed., Wiley, 2005, sec. 4.9 (Theorem 4.9, det(I + L)).
.. [4] W. L. Luyben, "Simple method for tuning SISO controllers in multivariable systems",
   Ind. Eng. Chem. Process Des. Dev. 25 (1986) 654-660 (biggest log modulus tuning).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Callable, Sequence

import numpy as np

from ..loop import Controller, LoopModel, Process, Rational, lag

#: Largest phase change of det(I + L) between neighbouring points of a traced curve. [rad]
PHASE_STEP = math.pi / 8
#: Largest change of det(I + L) between neighbouring points, relative to its smaller modulus. [-]
CHORD_STEP = 0.5
#: Step in ln(w) of the logarithmic part of the grid. [-]
LOG_STEP = 0.05
#: Largest delay phase between neighbouring grid points. [rad]
DELAY_STEP = 0.5
#: Frobenius bound of |L(s)| beyond which (|s| larger) the tail is taken in closed form. [-]
TAIL_BOUND = 0.2
#: Refinement rounds of a traced curve at most. [-]
REFINE_ROUNDS = 40
#: Points of a traced curve at most. [-]
MAX_POINTS = 400_000
#: Steady-state relative gain above which a pairing is flagged as strongly interacting. [-]
RGA_LARGE = 10.0
#: Largest group audited together (larger groups are refused at the inventory). [-]
MAX_GROUP = 8


@dataclass(frozen=True)
class GroupModel:
    """A group of interacting loops.

    Attributes
    ----------
    tags : tuple of str
        Loop tags, in the order of the matrix rows and columns.
    loops : tuple of LoopModel
        Each loop as audited alone (its L is the diagonal element of the loop matrix).
    couplings : dict
        ``(i, j) -> Process``: the model from loop j's controller output [%] to loop i's PV
        [% of range], i != j; absent pairs do not interact.
    """

    tags: tuple[str, ...]
    loops: tuple[LoopModel, ...]
    couplings: dict[tuple[int, int], Process] = field(default_factory=dict)

    @property
    def size(self) -> int:
        """Number of loops n. [-]"""
        return len(self.loops)

    def with_controllers(self, controllers: Sequence[Controller]) -> "GroupModel":
        """The same group with other controller settings.

        Parameters
        ----------
        controllers : sequence of Controller
            One per loop, in order.
        """
        return replace(self, loops=tuple(m.with_controller(c) for m, c in zip(self.loops, controllers)))


@dataclass(frozen=True)
class _Element:
    rational: Rational
    delay: float
    inner: LoopModel | None = None


def _inner_t(model: LoopModel, s: np.ndarray) -> np.ndarray:
    """Set-point-to-PV response of a loop at complex s (exact delay), chains included."""
    Lv = model.rational(s) * np.exp(-s * model.delay)
    if model.inner is not None:
        Lv = Lv * _inner_t(model.inner, s)
    return Lv / (lag(model.pv_filter)(s) * (1.0 + Lv))


def _value(e: _Element, s: np.ndarray) -> np.ndarray:
    out = e.rational(s) * np.exp(-s * e.delay)
    if e.inner is not None:
        out = out * _inner_t(e.inner, s)
    return out


def _loop_elements(g: GroupModel) -> dict[tuple[int, int], _Element]:
    out: dict[tuple[int, int], _Element] = {}
    for i, m in enumerate(g.loops):
        out[(i, i)] = _Element(m.rational, m.delay, m.inner)
    for (i, j), p in g.couplings.items():
        mi, mj = g.loops[i], g.loops[j]
        r = (lag(mi.pv_filter) * p.rational * mj.controller.rational).scale(mj.sign)
        out[(i, j)] = _Element(r, p.dead_time + 0.5 * mj.sample)
    return out


def _process_elements(g: GroupModel) -> dict[tuple[int, int], _Element]:
    out = {(i, i): _Element(m.process.rational, m.process.dead_time, m.inner) for i, m in enumerate(g.loops)}
    for (i, j), p in g.couplings.items():
        out[(i, j)] = _Element(p.rational, p.dead_time)
    return out


def _horner(coef: np.ndarray, s: np.ndarray) -> np.ndarray:
    """Row-wise polynomials (E, d), descending, at the points s (N,): (E, N), all rows at once."""
    acc = np.zeros((coef.shape[0], s.size), complex)
    for c in coef.T:
        acc = acc * s[None, :] + c[:, None]
    return acc


def _padded(polys: list[tuple[float, ...]]) -> np.ndarray:
    width = max(len(p) for p in polys)
    out = np.zeros((len(polys), width))
    for k, p in enumerate(polys):
        out[k, width - len(p):] = p
    return out


def _matrix(elements: dict[tuple[int, int], _Element], n: int, s: np.ndarray) -> np.ndarray:
    """The matrix of the elements at every s; rational parts of all elements evaluated together."""
    s = np.asarray(s, complex)
    flat = s.ravel()
    keys = list(elements)
    els = [elements[k] for k in keys]
    num = _horner(_padded([e.rational.num for e in els]), flat)
    den = _horner(_padded([e.rational.den for e in els]), flat)
    delay = np.array([e.delay for e in els])
    with np.errstate(divide="ignore", invalid="ignore"):
        vals = num / den * np.exp(-delay[:, None] * flat[None, :])
    for k, e in enumerate(els):
        if e.inner is not None:
            vals[k] = vals[k] * _inner_t(e.inner, flat)
    out = np.zeros((flat.size, n, n), complex)
    ii = np.array([k[0] for k in keys])
    jj = np.array([k[1] for k in keys])
    out[:, ii, jj] = vals.T
    return out.reshape(s.shape + (n, n))


def loop_matrix(group: GroupModel, s: np.ndarray) -> np.ndarray:
    """The loop matrix L(s) = F G K, exact delays.

    Parameters
    ----------
    group : GroupModel
        The group.
    s : ndarray
        Complex frequencies (``1j * w`` on the imaginary axis). [rad/s]

    Returns
    -------
    ndarray (..., n, n)
        L at every s. [-]
    """
    return _matrix(_loop_elements(group), group.size, s)


def process_matrix(group: GroupModel, w: np.ndarray) -> np.ndarray:
    """The process matrix G(jw), exact delays (a cascade's inner loop closed inside g_ii).

    Parameters
    ----------
    group : GroupModel
        The group.
    w : ndarray
        Frequencies. [rad/s]

    Returns
    -------
    ndarray (..., n, n)
        G(jw). [-] (integrating elements: [1/s] at low frequency)
    """
    return _matrix(_process_elements(group), group.size, 1j * np.asarray(w, float))


def steady_state_gain(group: GroupModel) -> np.ndarray | None:
    """G(0), or None when an element integrates (its steady-state gain is infinite).

    Parameters
    ----------
    group : GroupModel
        The group.

    Returns
    -------
    ndarray (n, n) or None
        Steady-state gains. [-]
    """
    n = group.size
    out = np.zeros((n, n))
    for (i, j), e in _process_elements(group).items():
        if e.rational.den[-1] == 0:
            return None
        v = e.rational.num[-1] / e.rational.den[-1]
        if e.inner is not None:
            v *= _inner_dc(e.inner)
        out[i, j] = v
    return out


def _inner_dc(model: LoopModel) -> float:
    """T_inner(0): 1 with integral action in the inner loop, L0/(1 + L0) otherwise."""
    r = model.rational
    if r.den[-1] == 0:
        return 1.0
    L0 = r.num[-1] / r.den[-1] * (_inner_dc(model.inner) if model.inner is not None else 1.0)
    return L0 / (1.0 + L0)


def rga(G: np.ndarray) -> np.ndarray:
    """Relative gain array Lambda = G x (G^-1)^T (element-wise product), batched.

    Parameters
    ----------
    G : ndarray (..., n, n)
        Gain matrices (real or complex). [-]

    Returns
    -------
    ndarray (..., n, n)
        Relative gains; NaN where G is singular. [-]

    References
    ----------
    .. [1] E. H. Bristol, IEEE Trans. Automatic Control 11 (1966) 133-134.
    """
    G = np.asarray(G)
    out = np.full(G.shape, np.nan, dtype=np.result_type(G.dtype, float))
    cond = np.linalg.cond(G)
    ok = np.isfinite(cond) & (cond < 1e14)
    if np.any(ok):
        Gi = np.linalg.inv(G[ok])
        out[ok] = G[ok] * np.swapaxes(Gi, -1, -2)
    return out


def niederlinski(G0: np.ndarray) -> float:
    """Niederlinski index NI = det G(0) / prod g_ii(0).

    Parameters
    ----------
    G0 : ndarray (n, n)
        Steady-state gains, pairings on the diagonal. [-]

    Returns
    -------
    float
        NI. [-] NaN when a diagonal gain is zero.

    Notes
    -----
    For a stable rational G with integral action in every loop and each loop's low-frequency
    gain g_ii(0) k_i of positive sign, NI < 0 implies that the closed group is unstable,
    whatever the settings (a sufficient condition; NI > 0 proves nothing) [1]_.

    References
    ----------
    .. [1] A. Niederlinski, Automatica 7 (1971) 691-701; P. Grosdidier, M. Morari and
       B. R. Holt, Ind. Eng. Chem. Fundam. 24 (1985) 221-235.
    """
    d = np.prod(np.diag(G0))
    return float(np.linalg.det(G0) / d) if d != 0 else math.nan


# --------------------------------------------------------------------------------------
# Tracing det(I + L) along a path, refined until its phase and chord steps are small
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Trace:
    """det(I + L) traced along a path s(t).

    Attributes
    ----------
    t : ndarray
        Path parameter (the frequency w [rad/s] on the imaginary axis; the angle [rad] on the
        indentation).
    det : ndarray
        det(I + L(s(t))). [-]
    resolved : bool
        False when refinement stopped with steps still too large (the curve passes at or very
        near the origin: a marginal group).
    """

    t: np.ndarray
    det: np.ndarray
    resolved: bool


def _steps_too_large(d: np.ndarray) -> np.ndarray:
    a, b = d[:-1], d[1:]
    with np.errstate(invalid="ignore", divide="ignore"):
        dphi = np.abs(np.angle(b / a))
        chord = np.abs(b - a) / np.minimum(np.abs(a), np.abs(b))
    return ~(np.isfinite(dphi) & (dphi <= PHASE_STEP) & (chord <= CHORD_STEP))


def _trace(det_of: Callable[[np.ndarray], np.ndarray], t: np.ndarray) -> Trace:
    """Evaluate det along t and bisect every interval whose step is too large (all at once)."""
    d = det_of(t)
    for _ in range(REFINE_ROUNDS):
        bad = _steps_too_large(d)
        width = np.diff(t)
        bad &= width > 1e-11 * np.maximum(np.abs(t[1:]), 1e-300)
        if not bad.any():
            return Trace(t, d, True)
        if t.size + bad.sum() > MAX_POINTS:
            break
        k = np.flatnonzero(bad)
        tm = 0.5 * (t[k] + t[k + 1])
        dm = det_of(tm)
        t = np.insert(t, k + 1, tm)
        d = np.insert(d, k + 1, dm)
    return Trace(t, d, not _steps_too_large(d).any())


# --------------------------------------------------------------------------------------
# Stability: the generalised Nyquist criterion with exact delays
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class GroupStability:
    """Closed-loop stability of a group by the generalised Nyquist criterion.

    Attributes
    ----------
    stable : bool
        True when no closed-loop pole lies in the closed right half-plane (decided exactly).
    rhp_closed : int or None
        Closed-loop poles in the right half-plane Z; None when not decided. [-]
    rhp_open : int
        Open-loop poles in the right half-plane P (integrators excluded). [-]
    encirclements : int or None
        Clockwise encirclements of the origin by det(I + L) around the contour, Z - P. [-]
    note : str
        Why the verdict was not decided, or ''.
    axis : Trace
        det(I + L(jw)) on the imaginary axis from w_lo (0 without integrators) to w_hi.
    w_hi : float
        Frequency beyond which |L(s)| is small enough for the tail in closed form. [rad/s]
    at_zero : int
        Closed-loop poles at s = 0 (an integrating path that no loop holds at rest); the group
        is then not stable whatever ``rhp_closed`` says. [-]
    """

    stable: bool
    rhp_closed: int | None
    rhp_open: int
    encirclements: int | None
    note: str
    axis: Trace
    w_hi: float
    at_zero: int = 0


def _zero_order(coef: Sequence[float]) -> int:
    """Number of roots at s = 0 of a polynomial (trailing zero coefficients)."""
    k = 0
    for c in reversed(coef):
        if c != 0:
            break
        k += 1
    return k


def _open_loop_integrators(group: GroupModel) -> int:
    """Poles at s = 0 of the open loop as the plant has them: each controller's, and each PV's.

    A PV moved through integrating elements integrates once whichever output moves it: the
    integrators of one row of G are shared (a tank with several inflows is one integrator), so a
    row counts its largest integrator order, not the sum.
    """
    n = group.size
    ctrl = sum(_zero_order(m.controller.rational.den) for m in group.loops)
    rows = [0] * n
    for (i, j), e in _process_elements(group).items():
        rows[i] = max(rows[i], _zero_order(e.rational.den))
    return ctrl + sum(rows)


def _roots(coef: Sequence[float]) -> np.ndarray:
    c = np.asarray(coef, float)
    return np.roots(c) if c.size > 1 else np.zeros(0)


def _rhp_inner(model: LoopModel) -> int:
    """Closed-loop right-half-plane poles of a cascade's inner loop (the single-loop engine)."""
    from ..frequency import evaluate
    v = evaluate([model])["rhp_closed"].iloc[0]
    return int(v) if v == v else 0


def _all_rationals(el: _Element) -> list[Rational]:
    out = [el.rational]
    m = el.inner
    while m is not None:
        out.append(m.rational)
        m = m.inner
    return out


def _scan_bound(elements: dict[tuple[int, int], _Element], R: np.ndarray) -> np.ndarray:
    """Frobenius bound of |L(s)| on arcs |s| = R in the closed right half-plane (delays drop: |e^{-s theta}| <= 1)."""
    phi = np.linspace(-np.pi / 2, np.pi / 2, 17)
    s = R[:, None] * np.exp(1j * phi)[None, :]
    total = np.zeros(s.shape)
    for e in elements.values():
        mag = np.abs(e.rational(s))
        m = e.inner
        while m is not None:
            r = np.abs(m.rational(s))
            with np.errstate(divide="ignore", invalid="ignore"):
                t = np.where(r < 1, r / (np.abs(lag(m.pv_filter)(s)) * (1 - r)), np.inf)
            mag = mag * t
            m = m.inner
        total += mag ** 2
    return np.sqrt(total).max(axis=1)


def _frequency_scale(elements: dict[tuple[int, int], _Element]) -> tuple[float, float, float, bool, bool]:
    """(lowest corner, highest corner [rad/s], largest total delay [s], integrators present, poles on the axis)."""
    mags, integ, axis = [], False, False
    tmax = 0.0
    for e in elements.values():
        d = e.delay
        m = e.inner
        while m is not None:
            d += m.delay
            m = m.inner
        tmax = max(tmax, d)
        for r in _all_rationals(e):
            for z in np.concatenate([_roots(r.num), _roots(r.den)]):
                if abs(z) > 1e-12:
                    mags.append(abs(z))
            for p in _roots(r.den):
                if abs(p) <= 1e-12:
                    integ = True
                elif abs(p.real) <= 1e-10 * abs(p):
                    axis = True
    if tmax > 0:
        mags.append(1.0 / tmax)
    lo = min(mags) if mags else 1.0
    hi = max(mags) if mags else 1.0
    return lo, hi, tmax, integ, axis


def group_stability(group: GroupModel) -> GroupStability:
    """Closed-loop stability of the group, decided exactly (generalised Nyquist criterion).

    Parameters
    ----------
    group : GroupModel
        The group, every loop closed with its own controller.

    Returns
    -------
    GroupStability
        ``stable``, ``rhp_closed`` Z [-], ``rhp_open`` P [-], the traced det(I + L(jw)).

    Notes
    -----
    Z = P - Delta / (2 pi), Delta the change of arg det(I + L) around the contour:
    2 x (change along w_lo -> w_hi) + (indentation around s = 0, traced numerically on
    s = w_lo e^{j phi}, phi from -pi/2 to pi/2) - 2 x sum_i arg(1 + lambda_i(L(j w_hi))), the last
    term being exact for the tail and the large arc because there the Frobenius norm of L is below
    :data:`TAIL_BOUND`, so every eigenvalue factor 1 + lambda_i stays in the right half-plane.
    With integrators, the closed loop keeps (open-loop integrators - k) poles at s = 0, k being the
    order of the pole of det(I + L) at s = 0 read from the indentation; the open-loop count takes
    each controller's integrators and, per PV, the largest integrator order of its row of G (the
    plant's integrators, shared by the inputs that move one PV). Any pole at s = 0 makes the group
    not stable (``at_zero``). Groups whose curve passes through (or within refinement of) the origin, with open-loop
    poles on the imaginary axis other than integrators, or with a high-frequency loop gain too
    large to bound, are reported not stable with a note.

    References
    ----------
    .. [1] C. A. Desoer and Y. T. Wang, IEEE Trans. Automatic Control 25 (1980) 187-196.
    .. [2] S. Skogestad and I. Postlethwaite, Multivariable Feedback Control, 2nd ed., 2005,
       Theorem 4.9.
    """
    n = group.size
    elements = _loop_elements(group)
    lo, hi, tmax, integ, on_axis = _frequency_scale(elements)
    P = 0
    for (i, j), e in elements.items():
        P += int(np.sum(_roots(e.rational.den).real > 1e-10 * np.maximum(1.0, np.abs(_roots(e.rational.den)))))
        if e.inner is not None:
            P += _rhp_inner(e.inner)
    eye = np.eye(n)

    def det_axis(w):
        return np.linalg.det(eye + _matrix(elements, n, 1j * np.asarray(w, float)))

    w_lo = 1e-3 * lo
    empty = Trace(np.zeros(0), np.zeros(0, complex), False)
    if on_axis:
        return GroupStability(False, None, P, None, "open-loop poles on the imaginary axis other than integrators: "
                              "not decided, reported not stable", empty, math.nan)
    # where the tail starts: the bound must hold for every larger |s| scanned
    R = np.logspace(np.log10(w_lo), np.log10(max(hi, lo) * 1e5), 400)
    B = _scan_bound(elements, R)
    above = np.flatnonzero(~(B <= TAIL_BOUND))
    if above.size and above[-1] == R.size - 1:
        return GroupStability(False, None, P, None, "high-frequency loop gain too large to bound the tail (with dead "
                              "time the curve keeps turning): reported not stable", empty, math.nan)
    w_hi = float(R[above[-1] + 1]) if above.size else float(R[0])
    w_hi = max(w_hi, 10 * w_lo)
    n_log = int(math.ceil(math.log(w_hi / w_lo) / LOG_STEP)) + 1
    grid = np.geomspace(w_lo, w_hi, n_log)
    if tmax > 0:
        grid = np.union1d(grid, np.arange(w_lo, w_hi, DELAY_STEP / tmax))
    if not integ:
        grid = np.concatenate([[0.0], grid])
    axis = _trace(det_axis, grid)
    if not axis.resolved or not np.all(np.isfinite(axis.det)):
        k = int(np.nanargmin(np.abs(axis.det))) if axis.det.size else 0
        return GroupStability(False, None, P, None, "det(I + L) passes through or very near the origin at about "
                              f"{axis.t[k]:.4g} rad/s: marginal, reported not stable", axis, w_hi)
    delta = 2.0 * (np.unwrap(np.angle(axis.det))[-1] - np.angle(axis.det[0]))
    if integ:
        def det_semi(phi):
            return np.linalg.det(eye + _matrix(elements, n, w_lo * np.exp(1j * np.asarray(phi, float))))
        semi = _trace(det_semi, np.linspace(-np.pi / 2, np.pi / 2, 257))
        if not semi.resolved:
            return GroupStability(False, None, P, None, "det(I + L) passes near the origin on the indentation around "
                                  "s = 0 (a closed-loop pole near s = 0): marginal, reported not stable", axis, w_hi)
        d_ind = float(np.unwrap(np.angle(semi.det))[-1] - np.angle(semi.det[0]))
        delta += d_ind
        # det(I + L) ~ c s^-k near s = 0 turns by -k pi on the indentation; the closed loop keeps
        # (open-loop integrators - k) poles at s = 0 (det(sI - A_cl) = det(sI - A_ol) det(I + L))
        k = int(round(-d_ind / np.pi))
        at_zero = _open_loop_integrators(group) - k
    lam = np.linalg.eigvals(_matrix(elements, n, np.array([1j * w_hi]))[0])
    delta -= 2.0 * float(np.sum(np.angle(1.0 + lam)))
    zf = P - delta / (2 * np.pi)
    z = int(round(zf))
    if abs(zf - z) > 0.05 or z < 0:
        return GroupStability(False, None, P, None, f"winding count not an integer ({zf:.3f}): not decided, "
                              "reported not stable", axis, w_hi)
    if integ and at_zero != 0:
        if at_zero < 0:
            return GroupStability(False, None, P, None, "integrator count inconsistent on the indentation around "
                                  "s = 0: not decided, reported not stable", axis, w_hi)
        return GroupStability(False, z, P, z - P, f"{at_zero} closed-loop pole{'s' if at_zero != 1 else ''} at "
                              "s = 0: an integrating path that no loop can hold at rest (the group drifts), "
                              "reported not stable", axis, w_hi, at_zero)
    return GroupStability(z == 0, z, P, z - P, "", axis, w_hi)


# --------------------------------------------------------------------------------------
# Peaks and each loop with the others closed
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Peak:
    """A maximum over frequency.

    Attributes
    ----------
    value : float
        The maximum. [-]
    w : float
        Where it is. [rad/s]
    """

    value: float
    w: float


def _refine_max(f: Callable[[np.ndarray], np.ndarray], w: np.ndarray, v: np.ndarray, rounds: int = 4) -> list[Peak]:
    """Maximum of f (vectorised over columns) around each column's grid maximum, by dense resampling.

    ``v`` is (nw, m); returns one Peak per column in a list (m points resampled per round together).
    """
    k = np.nanargmax(v, axis=0)
    m = v.shape[1]
    lo = w[np.maximum(k - 1, 0)]
    hi = w[np.minimum(k + 1, w.size - 1)]
    best_w, best_v = w[k], v[k, np.arange(m)]
    for _ in range(rounds):
        t = np.linspace(0.0, 1.0, 33)
        ws = lo[:, None] + (hi - lo)[:, None] * t[None, :]          # (m, 33)
        vals = f(ws.ravel()).reshape(ws.shape[0], ws.shape[1], m)[np.arange(m), :, np.arange(m)]
        j = np.nanargmax(vals, axis=1)
        better = vals[np.arange(m), j] > best_v
        best_v = np.where(better, vals[np.arange(m), j], best_v)
        best_w = np.where(better, ws[np.arange(m), j], best_w)
        step = (hi - lo) / 32
        lo, hi = np.maximum(best_w - step, 0.0), best_w + step
    return [Peak(float(a), float(b)) for a, b in zip(best_v, best_w)]


@dataclass(frozen=True)
class Crossing:
    """A margin read at a crossing of the loop transfer.

    Attributes
    ----------
    value : float
        The margin: gain margin [-] or phase margin [deg]; inf when there is no crossing.
    w : float
        Crossing frequency. [rad/s] NaN when none.
    """

    value: float
    w: float


def _crossings(f: Callable[[np.ndarray], np.ndarray], w: np.ndarray, x: np.ndarray, keep: np.ndarray | None = None,
               rounds: int = 3) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Sign changes of every column of x(w) (nw, m) on the grid, refined together by resampling.

    ``f`` gives all columns at once, shape (N, m); ``keep`` (nw - 1, m) selects the intervals worth
    refining. Returns (column, lo, hi) of every bracket.
    """
    change = np.sign(x[:-1]) * np.sign(x[1:]) < 0
    if keep is not None:
        change &= keep
    k, col = np.nonzero(change)
    lo, hi = w[k], w[k + 1]
    t = np.linspace(0.0, 1.0, 17)
    for _ in range(rounds):
        if k.size == 0:
            break
        ws = lo[:, None] + (hi - lo)[:, None] * t[None, :]
        xs = f(ws.ravel()).reshape(ws.shape + (x.shape[1],))[np.arange(k.size), :, col]
        sc = np.sign(xs[:, :-1]) * np.sign(xs[:, 1:]) < 0
        j = np.argmax(sc, axis=1)
        lo, hi = ws[np.arange(k.size), j], ws[np.arange(k.size), j + 1]
    return col, lo, hi


@dataclass(frozen=True)
class LoopInGroup:
    """One loop's figures with the other loops of its group closed, beside its single-loop figures.

    Attributes
    ----------
    tag : str
        Loop tag.
    gm : float
        Gain margin of the effective loop (upward, ratio). [-] inf when none.
    w180_rad_s : float
        Its phase-crossover frequency. [rad/s]
    pm_deg : float
        Phase margin of the effective loop (smallest in absolute value). [deg] inf when none.
    wc_rad_s : float
        Its gain-crossover frequency. [rad/s]
    ms : float
        Peak of |S_ii|, the loop's own sensitivity with the others closed. [-]
    w_ms_rad_s : float
        Its frequency. [rad/s]
    rga_ss : float
        Diagonal relative gain lambda_ii at steady state; NaN when not defined. [-]
    rga_wc : complex
        Diagonal relative gain at the loop's own (single-loop) crossover frequency; NaN when none. [-]
    """

    tag: str
    gm: float
    w180_rad_s: float
    pm_deg: float
    wc_rad_s: float
    ms: float
    w_ms_rad_s: float
    rga_ss: float
    rga_wc: complex


@dataclass(frozen=True)
class GroupFigures:
    """Everything the audit says of one group.

    Attributes
    ----------
    tags : tuple of str
        Loop tags in matrix order.
    stability : GroupStability
        Generalised Nyquist verdict.
    rga_ss : ndarray (n, n) or None
        Steady-state relative gain array; None with an integrating element or a singular G(0). [-]
    rga_wc : tuple of ndarray
        RGA at each loop's single-loop crossover frequency (NaN matrix when the loop has none). [-]
    wc_rad_s : tuple of float
        Those crossover frequencies. [rad/s]
    niederlinski : float
        Niederlinski index; NaN when it does not apply (an integrating element, or a loop
        without integral action). [-]
    sigma_peak : Peak
        Peak of the largest singular value of (I + L(jw))^-1 over w >= 0. [-]
    lcm_db : float
        Luyben's biggest log modulus, max over w of 20 log10 |W/(1 + W)|, W = det(I + L) - 1. [dB]
    loops : tuple of LoopInGroup
        Each loop with the others closed.
    warnings : tuple of str
        Pairing and interaction warnings in words.
    """

    tags: tuple[str, ...]
    stability: GroupStability
    rga_ss: np.ndarray | None
    rga_wc: tuple[np.ndarray, ...]
    wc_rad_s: tuple[float, ...]
    niederlinski: float
    sigma_peak: Peak
    lcm_db: float
    loops: tuple[LoopInGroup, ...]
    warnings: tuple[str, ...]


#: Frobenius bound of |L| past which no margin is sought (a gain margin above 1/MARGIN_TAIL is not reported). [-]
MARGIN_TAIL = 1e-2


def _margin_grid(elements: dict[tuple[int, int], _Element], st: GroupStability) -> np.ndarray:
    """The stability trace's frequencies, extended until |L| has fallen below MARGIN_TAIL for good."""
    lo, hi, tmax, _, _ = _frequency_scale(elements)
    R = np.logspace(np.log10(1e-3 * lo), np.log10(max(hi, lo) * 1e5), 400)
    B = _scan_bound(elements, R)
    above = np.flatnonzero(~(B <= MARGIN_TAIL))
    w_end = float(R[min(above[-1] + 1, R.size - 1)]) * 1.25 if above.size else float(R[0])
    if tmax > 0:
        w_end += 2 * np.pi / tmax
    w = st.axis.t if st.axis.t.size else np.geomspace(1e-3 * lo, w_end, 2000)
    start = w[-1] if w.size else 1e-3 * lo
    if w_end > start:
        ext = np.geomspace(start, w_end, max(2, int(np.log(w_end / start) / LOG_STEP) + 2))
        if tmax > 0:
            ext = np.union1d(ext, np.arange(start, w_end, DELAY_STEP / tmax))
        w = np.union1d(w, ext)
    return w[w > 0]


def _has_integral(c: Controller) -> bool:
    return c.integral_gain != 0


def pairing_warnings(tags: Sequence[str], rga_ss: np.ndarray | None, rga_wc: Sequence[np.ndarray],
                     ni: float) -> list[str]:
    """The pairing warnings a practitioner expects, in words.

    Parameters
    ----------
    tags : sequence of str
        Loop tags in matrix order.
    rga_ss : ndarray or None
        Steady-state RGA. [-]
    rga_wc : sequence of ndarray
        RGA at each loop's crossover frequency. [-]
    ni : float
        Niederlinski index (NaN when not applicable). [-]

    Returns
    -------
    list of str
        A negative steady-state relative gain (the loop's gain changes sign as the others
        close: integrity is lost), one above :data:`RGA_LARGE` (strong interaction, sensitivity
        to model error), a negative real part or a magnitude above :data:`RGA_LARGE` at the
        loop's crossover, and a negative Niederlinski index.

    References
    ----------
    .. [1] S. Skogestad and I. Postlethwaite, Multivariable Feedback Control, 2nd ed., 2005,
       sec. 3.4 and 10.6 (pairing rules from the RGA).
    """
    out = []
    for i, tag in enumerate(tags):
        if rga_ss is not None and np.isfinite(rga_ss[i, i]):
            lam = float(rga_ss[i, i])
            if lam < 0:
                out.append(f"{tag}: negative steady-state relative gain {lam:.3g} (pairing to avoid: the loop's "
                           f"gain changes sign when the others close)")
            elif lam > RGA_LARGE:
                out.append(f"{tag}: steady-state relative gain {lam:.3g} > {RGA_LARGE:g} (strong interaction, "
                           f"sensitive to model error)")
        lw = rga_wc[i][i, i] if i < len(rga_wc) else np.nan
        if np.isfinite(lw):
            if lw.real < 0:
                out.append(f"{tag}: relative gain at its crossover has a negative real part ({lw.real:.3g})")
            elif abs(lw) > RGA_LARGE:
                out.append(f"{tag}: relative gain at its crossover |{abs(lw):.3g}| > {RGA_LARGE:g}")
    if np.isfinite(ni) and ni < 0:
        out.append(f"Niederlinski index {ni:.3g} < 0: with integral action in every loop (and a stable open loop) "
                   "the group is unstable whatever the settings")
    return out


def analyse_group(group: GroupModel, stability: GroupStability | None = None) -> GroupFigures:
    """All figures of one group.

    Parameters
    ----------
    group : GroupModel
        The group with its present controllers.
    stability : GroupStability, optional
        A verdict already computed for this group (it is computed when None).

    Returns
    -------
    GroupFigures
        RGAs [-], Niederlinski index [-], stability, sigma peak [-], biggest log modulus [dB] and
        each loop with the others closed (margins [-]/[deg], Ms [-], frequencies [rad/s]).

    References
    ----------
    .. [1] E. H. Bristol, IEEE Trans. Automatic Control 11 (1966) 133-134.
    .. [2] W. L. Luyben, Ind. Eng. Chem. Process Des. Dev. 25 (1986) 654-660.
    """
    from ..frequency import evaluate
    n = group.size
    st = stability or group_stability(group)
    alone = evaluate(list(group.loops))
    wc = tuple(float(x) for x in alone["wc_rad_s"].to_numpy(float))
    G0 = steady_state_gain(group)
    rga0 = None
    ni = math.nan
    if G0 is not None:
        r0 = rga(G0)
        rga0 = r0 if np.all(np.isfinite(r0)) else None
        if all(_has_integral(m.controller) for m in group.loops):
            ni = niederlinski(G0)
    wv = np.array([x if np.isfinite(x) and x > 0 else 1.0 for x in wc])
    rw = rga(process_matrix(group, wv))
    rga_wc = tuple(rw[i] if np.isfinite(wc[i]) and wc[i] > 0 else np.full((n, n), np.nan + 0j) for i in range(n))

    elements = _loop_elements(group)
    eye = np.eye(n)
    w = _margin_grid(elements, st)

    def sens(wv_):
        return np.linalg.inv(eye + _matrix(elements, n, 1j * np.asarray(wv_, float)))

    def smax(wv_):
        return 1.0 / np.linalg.svd(eye + _matrix(elements, n, 1j * np.asarray(wv_, float)), compute_uv=False)[..., -1]

    def lcm(wv_):
        W = np.linalg.det(eye + _matrix(elements, n, 1j * np.asarray(wv_, float))) - 1.0
        return 20 * np.log10(np.abs(W / (1.0 + W)))

    S = sens(w)
    diag = np.abs(np.diagonal(S, axis1=1, axis2=2))                 # (nw, n)
    sig = smax(w)
    sig_peak = _refine_max(lambda x: smax(x)[:, None], w, sig[:, None])[0]
    lcm_peak = _refine_max(lambda x: lcm(x)[:, None], w, lcm(w)[:, None])[0]
    ms_peaks = _refine_max(lambda x: np.abs(np.diagonal(sens(x), axis1=1, axis2=2)), w, diag)

    def leff(wv_):
        Sx = sens(wv_)
        return 1.0 / np.diagonal(Sx, axis1=1, axis2=2) - 1.0       # (nw, n)

    Le = 1.0 / np.diagonal(S, axis1=1, axis2=2) - 1.0
    # phase crossovers worth refining: on the negative real side with |L| between MARGIN_TAIL and 1
    neg = (Le.real[:-1] < 0) | (Le.real[1:] < 0)
    mag = np.maximum(np.abs(Le[:-1]), np.abs(Le[1:]))
    col_i, a_im, b_im = _crossings(lambda x: leff(x).imag, w, Le.imag, neg & (mag > MARGIN_TAIL))
    col_m, a_mg, b_mg = _crossings(lambda x: np.abs(leff(x)) - 1.0, w, np.abs(Le) - 1.0)
    w_im = 0.5 * (a_im + b_im)
    w_mg = 0.5 * (a_mg + b_mg)
    l_im = leff(w_im)[np.arange(w_im.size), col_i] if w_im.size else np.zeros(0, complex)
    l_mg = leff(w_mg)[np.arange(w_mg.size), col_m] if w_mg.size else np.zeros(0, complex)
    loops = []
    for i in range(n):
        gm, w180 = math.inf, math.nan
        k = np.flatnonzero((col_i == i) & (l_im.real < 0) & (np.abs(l_im) < 1))
        if k.size:
            j = k[np.argmax(np.abs(l_im[k]))]
            gm, w180 = float(1.0 / abs(l_im[j])), float(w_im[j])
        pm, wcx = math.inf, math.nan
        k = np.flatnonzero(col_m == i)
        if k.size:
            pmv = 180.0 - np.abs(np.degrees(np.angle(l_mg[k])))
            j = int(np.argmin(np.abs(pmv)))
            pm, wcx = float(pmv[j]), float(w_mg[k[j]])
        lam0 = float(rga0[i, i]) if rga0 is not None else math.nan
        loops.append(LoopInGroup(group.tags[i], gm, w180, pm, wcx, ms_peaks[i].value, ms_peaks[i].w, lam0,
                                 complex(rga_wc[i][i, i])))
    warns = pairing_warnings(group.tags, rga0, rga_wc, ni)
    return GroupFigures(tuple(group.tags), st, rga0, rga_wc, wc, ni, sig_peak, float(lcm_peak.value),
                        tuple(loops), tuple(warns))


# --------------------------------------------------------------------------------------
# Detuning: Luyben's biggest log modulus
# --------------------------------------------------------------------------------------


def detuned(c: Controller, factor: float) -> Controller:
    """A controller detuned by F: gain divided by F, integral time multiplied by F.

    Parameters
    ----------
    c : Controller
        Present settings.
    factor : float
        Detuning factor F >= 1. [-]

    Returns
    -------
    Controller
        kc/F and ti F (ideal, series); kp/F, ki/F^2 and kd/F (parallel); derivative time kept.

    References
    ----------
    .. [1] W. L. Luyben, Ind. Eng. Chem. Process Des. Dev. 25 (1986) 654-660.
    """
    if c.form == "parallel":
        return replace(c, kp=c.kp / factor, ki=c.ki / factor ** 2, kd=c.kd / factor)
    return replace(c, kc=c.kc / factor, ti=(c.ti * factor if c.ti else c.ti))


def biggest_log_modulus(group: GroupModel) -> float:
    """Luyben's biggest log modulus, max over w of 20 log10 |W/(1 + W)| with W = det(I + L) - 1.

    Parameters
    ----------
    group : GroupModel
        The group with its settings.

    Returns
    -------
    float
        L_cm max. [dB]

    References
    ----------
    .. [1] W. L. Luyben, Ind. Eng. Chem. Process Des. Dev. 25 (1986) 654-660.
    """
    n = group.size
    elements = _loop_elements(group)
    lo, hi, tmax, _, _ = _frequency_scale(elements)
    w = np.geomspace(1e-3 * lo, 1e2 * hi, 600)
    if tmax > 0:
        w = np.union1d(w, np.arange(w[0], 20.0 / tmax, DELAY_STEP / (4 * tmax)))
    eye = np.eye(n)

    def lcm(wv_):
        W = np.linalg.det(eye + _matrix(elements, n, 1j * np.asarray(wv_, float))) - 1.0
        return 20 * np.log10(np.abs(W / (1.0 + W)))

    return float(_refine_max(lambda x: lcm(x)[:, None], w, lcm(w)[:, None])[0].value)


@dataclass(frozen=True)
class Detuning:
    """A common detuning of a group's controllers.

    Attributes
    ----------
    factor : float
        Detuning factor F applied to every loop (F = 1: no change). [-]
    controllers : tuple of Controller
        The detuned settings, one per loop.
    lcm_db : float
        Biggest log modulus with them. [dB]
    stable : bool
        Group stability with them (generalised Nyquist).
    reached : bool
        False when no F up to ``max_factor`` met the target.
    """

    factor: float
    controllers: tuple[Controller, ...]
    lcm_db: float
    stable: bool
    reached: bool


def blt_detune(group: GroupModel, target_db: float | None = None, max_factor: float = 50.0,
               only: Sequence[bool] | None = None) -> Detuning:
    """The smallest common detuning factor F >= 1 for which the group is stable and L_cm max <= target.

    Parameters
    ----------
    group : GroupModel
        The group with the settings to detune (Ziegler-Nichols settings in Luyben's method;
        single-loop proposals in the audit).
    target_db : float, optional
        Target biggest log modulus; Luyben's 2 n dB when None. [dB]
    max_factor : float
        Largest F tried. [-]
    only : sequence of bool, optional
        Which loops are detuned (the others keep their settings); every loop when None.

    Returns
    -------
    Detuning
        F [-], settings, L_cm max [dB], stability.

    Notes
    -----
    F is found by doubling, then bisection on ln F to 0.2 % (L_cm max falls as F grows for the
    usual groups); every trial is checked by :func:`group_stability` as well.

    References
    ----------
    .. [1] W. L. Luyben, Ind. Eng. Chem. Process Des. Dev. 25 (1986) 654-660.
    """
    target = 2.0 * group.size if target_db is None else target_db
    base = [m.controller for m in group.loops]
    mask = [True] * group.size if only is None else list(only)

    def ctrls(f):
        return tuple(detuned(c, f) if m else c for c, m in zip(base, mask))

    def at(f):
        return group.with_controllers(ctrls(f))

    def ok(f):
        g = at(f)
        return biggest_log_modulus(g) <= target and group_stability(g).stable

    if ok(1.0):
        return Detuning(1.0, tuple(base), biggest_log_modulus(at(1.0)), True, True)
    lo, hi = 1.0, 2.0
    while not ok(hi):
        lo, hi = hi, hi * 2
        if hi > max_factor:
            g = at(max_factor)
            return Detuning(max_factor, ctrls(max_factor), biggest_log_modulus(g), group_stability(g).stable, False)
    for _ in range(20):
        mid = math.sqrt(lo * hi)
        if ok(mid):
            hi = mid
        else:
            lo = mid
        if hi / lo < 1.002:
            break
    return Detuning(hi, ctrls(hi), biggest_log_modulus(at(hi)), True, True)
