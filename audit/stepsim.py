"""Loops broken at their delays, simulated together: the engine of the step responses.

Each loop is written as a delay-free linear system closed through one pure delay per loop
level (:func:`build_batch`); a grid step is chosen per loop so that its delays are whole
numbers of steps where possible (:func:`plan_step`); the rational part is discretised exactly
for inputs linear between grid points and the delay lines keep the left and right limits of
their inputs (:func:`simulate`, method in :mod:`audit.timedomain`).

The same recurrence can be evaluated in two ways. :func:`simulate` advances every loop of a
batch together, one array operation set per step. :func:`simulate_lifted` writes one step as a
linear map of an augmented state (the loop's states, its short delay lines, its outputs) and
evaluates whole blocks of steps with powers of that map, so a loop with a short dead time and a
long horizon (thousands of steps) costs a few array operations per block instead of per step;
long delay channels (cascades whose outer dead time is many steps) are read from outside the
state, one block at a time. :func:`simulate_steps` sends each loop to the cheaper of the two.
The figures are computed from the responses in :mod:`audit.timedomain`.

References
----------
.. [1] G. F. Franklin, J. D. Powell and M. Workman, Digital Control of Dynamic Systems, 3rd ed.,
   1998, sec. 6.3 (triangle-hold equivalent, exact discretisation with the matrix exponential).
.. [2] C. Moler and C. Van Loan, Nineteen dubious ways to compute the exponential of a matrix,
   twenty-five years later, SIAM Review 45(1), 2003.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np

from .loop import Controller, LoopModel


N_TARGET = 1000          # steps per horizon aimed at
N_CAP = 16 * N_TARGET     # most steps of one simulation (a longer one is cut and reported)
#: Largest magnitude a simulated state or delayed signal keeps: an unstable loop's response grows
#: without bound and would overflow to inf (then inf - inf); it is held at this level instead, far
#: beyond any figure (such a loop is reported as growing). [-]
STATE_LIMIT = 1e100
#: Longest delay line (steps, one more with a fractional delay) of a loop simulated through powers of its
#: one-step map (:func:`simulate_lifted`); longer ones step by step (:func:`simulate`). [-]
LIFT_DEPTH = 12
#: Fewest and most steps of a block of :func:`simulate_lifted` for loops with long delay channels (a
#: channel at least BLOCK_MIN steps long is read from outside the lifted state). [-]
BLOCK_MIN = 4
BLOCK_MAX = 32
#: Loops with long delay channels are lifted only when fewer than this many would otherwise be simulated
#: step by step, and none has to be: past it the step-by-step run costs less per loop. [-]
BLOCK_LOOPS = 256
#: Products per block of :func:`simulate_lifted` aimed at with long delay channels (sets the block length). [-]
BLOCK_WORK = 20000
#: Loops stepped one step at a time (:func:`simulate`) with at most this many live states and one delay
#: channel run apart from the others, at their own size (the padding to the batch's largest loop left
#: out), when both parts have at least SMALL_LOOPS loops (each run pays the per-step cost once). [-]
SMALL_STATES = 3
SMALL_LOOPS = 64


# --------------------------------------------------------------------------- system building

def controller_poly(c: Controller) -> tuple[list[float], list[float]]:
    """num(s), den(s) of C(s), the same function as :attr:`Controller.rational`, built directly.

    Raises ValueError when C is improper (derivative without filter).

    Parameters
    ----------
    c : Controller
        The controller (parallel, series or ideal form) in project units: gains [-],
        integral and derivative times [s], integral gain ``ki`` [1/s], derivative gain ``kd`` [s],
        derivative filter factor ``alpha`` [-].

    Returns
    -------
    tuple of (list of float, list of float)
        Numerator and denominator coefficients, descending in s, numerator padded to
        the denominator's length.
    """
    a = c.alpha
    if c.form == "parallel":
        kp, ki, kd = c.kp or 0.0, c.ki or 0.0, c.kd or 0.0
        tf_ = a * kd / kp if (kd and kp) else 0.0
        if ki and kd:
            num, den = [kp * tf_ + kd, kp + ki * tf_, ki], [tf_, 1.0, 0.0]
        elif ki:
            num, den = [kp, ki], [1.0, 0.0]
        elif kd:
            num, den = [kp * tf_ + kd, kp], [tf_, 1.0]
        else:
            num, den = [kp], [1.0]
    else:
        kc, ti, td = c.kc or 0.0, c.ti or 0.0, c.td or 0.0
        if c.form == "series":
            if ti and td:
                num, den = [kc * ti * td, kc * (ti + td), kc], [a * td * ti, ti, 0.0]
            elif ti:
                num, den = [kc * ti, kc], [ti, 0.0]
            elif td:
                num, den = [kc * td, kc], [a * td, 1.0]
            else:
                num, den = [kc], [1.0]
        else:
            if ti and td:
                num, den = [kc * (1.0 + a) * td * ti, kc * (ti + a * td), kc], [a * td * ti, ti, 0.0]
            elif ti:
                num, den = [kc * ti, kc], [ti, 0.0]
            elif td:
                num, den = [kc * (1.0 + a) * td, kc], [a * td, 1.0]
            else:
                num, den = [kc], [1.0]
    return _proper(num, den, "controller")


def _proper(num, den, what: str) -> tuple[list[float], list[float]]:
    """Trim leading zeros; pad num to the length of den; refuse improper functions."""
    den = [float(x) for x in den]
    num = [float(x) for x in num]
    while den and den[0] == 0.0:
        den.pop(0)
    if not den:
        raise ValueError(f"{what} has a zero denominator")
    while len(num) > 1 and num[0] == 0.0:
        num.pop(0)
    if len(num) > len(den):
        raise ValueError(f"improper {what} (more zeros than poles; e.g. derivative without filter)")
    return [0.0] * (len(den) - len(num)) + num, den


def _lag_poly(tau: float) -> tuple[list[float], list[float]]:
    return ([0.0, 1.0], [float(tau), 1.0]) if tau else ([1.0], [1.0])


@dataclass
class Batch:
    """Loops broken at their delays, stacked: x' = A x + B U, q = Cq x + Dq U, y = Cy x + Dy U,
    U = [w; e], w_j(t) = q_j(t - delay_j).

    Shapes: A (L, ns, ns), B (L, ns, m+1), Cq (L, m, ns), Dq (L, m, m+1), Cy (L, ny, ns),
    Dy (L, ny, m+1); ``delays`` (L, m) in [s], NaN for an unused channel. Outputs: 0 the
    PV (shifted later by ``y_shift`` [s]), 1 the controller output (shifted by ``u_shift`` [s]).
    ``soft`` is a time worth making a whole number of steps [s].
    """

    A: np.ndarray
    B: np.ndarray
    Cq: np.ndarray
    Dq: np.ndarray
    Cy: np.ndarray
    Dy: np.ndarray
    delays: np.ndarray
    y_shift: np.ndarray
    u_shift: np.ndarray
    soft: np.ndarray

    def __len__(self) -> int:
        return self.A.shape[0]

    def take(self, idx) -> "Batch":
        """The loops ``idx`` of the batch, in that order.

        Parameters
        ----------
        idx : array_like of int
            Loop indices.

        Returns
        -------
        Batch
        """
        idx = np.asarray(idx, int)
        return Batch(*(getattr(self, f)[idx] for f in Batch.__dataclass_fields__))

    @staticmethod
    def concat(parts: list["Batch"]) -> "Batch":
        """Stack batches, padding states (decaying, unexcited) and channels (unused).

        Parameters
        ----------
        parts : list of Batch
            Batches with the same number of outputs.

        Returns
        -------
        Batch
            The loops of all parts, in order, padded to the largest state and channel counts.
        """
        ns = max([1] + [p.A.shape[1] for p in parts])
        m = max([1] + [p.Cq.shape[1] for p in parts])
        ny = parts[0].Cy.shape[1]
        out = []
        for p in parts:
            L, n, mm = p.A.shape[0], p.A.shape[1], p.Cq.shape[1]
            A = np.zeros((L, ns, ns))
            A[:, :n, :n] = p.A
            A[:, np.arange(n, ns), np.arange(n, ns)] = -1.0
            B = np.zeros((L, ns, m + 1))
            B[:, :n, :mm] = p.B[:, :, :mm]
            B[:, :n, m] = p.B[:, :, mm]
            Cq = np.zeros((L, m, ns))
            Cq[:, :mm, :n] = p.Cq
            Dq = np.zeros((L, m, m + 1))
            Dq[:, :mm, :mm] = p.Dq[:, :, :mm]
            Dq[:, :mm, m] = p.Dq[:, :, mm]
            Cy = np.zeros((L, ny, ns))
            Cy[:, :, :n] = p.Cy
            Dy = np.zeros((L, ny, m + 1))
            Dy[:, :, :mm] = p.Dy[:, :, :mm]
            Dy[:, :, m] = p.Dy[:, :, mm]
            d = np.full((L, m), np.nan)
            d[:, :mm] = p.delays
            out.append(Batch(A, B, Cq, Dq, Cy, Dy, d, p.y_shift, p.u_shift, p.soft))
        return Batch(*(np.concatenate([getattr(o, f) for o in out]) for f in Batch.__dataclass_fields__))


def _realise(num: np.ndarray, den: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Controllable canonical realisations of stacked proper rationals (num padded to den's length)."""
    L, k = den.shape
    num = num / den[:, :1]
    den = den / den[:, :1]
    n = k - 1
    d = num[:, 0]
    A = np.zeros((L, n, n))
    B = np.zeros((L, n, 1))
    if n:
        A[:, 0, :] = -den[:, 1:]
        A[:, np.arange(1, n), np.arange(n - 1)] = 1.0
        B[:, 0, 0] = 1.0
    C = (num[:, 1:] - d[:, None] * den[:, 1:]).reshape(L, 1, n)
    return A, B, C, d


class _Graph:
    """The block diagram of one loop structure: blocks are roles (letter, level, scale),
    one external input ``e``, one delay channel per loop level."""

    E = ("e", 0)

    def __init__(self) -> None:
        self.blocks: list[tuple[tuple, dict]] = []
        self.chans: list[list] = []

    def block(self, role: tuple, inputs: dict) -> tuple:
        self.blocks.append((role, dict(inputs)))
        return ("b", len(self.blocks) - 1)

    def delay(self, level: int) -> tuple:
        self.chans.append([level, None])
        return ("w", len(self.chans) - 1)

    def feed(self, w: tuple, src: dict) -> None:
        self.chans[w[1]][1] = dict(src)


def _closed_path(g: _Graph, level: int, depth: int, r: dict) -> tuple[tuple, tuple]:
    """Add loop ``level`` with set-point ``r``: PV = (P v)(t - D), v = sign C (r - F PV)."""
    w = g.delay(level)
    fy = g.block(("F", level, 1.0), {w: 1.0})
    src = dict(r)
    src[fy] = src.get(fy, 0.0) - 1.0
    v = g.block(("C", level, 1.0), src)
    pin = {v: 1.0}
    if level + 1 < depth:
        yi, _ = _closed_path(g, level + 1, depth, {v: 1.0})
        pin = {yi: 1.0}
    z = g.block(("P", level, 1.0), pin)
    g.feed(w, {z: 1.0})
    return w, v


def _graph(kind: str, depth: int) -> tuple[_Graph, list[dict]]:
    """The diagram of a response ``kind`` for a cascade of ``depth`` levels, and its outputs (PV, u)."""
    g = _Graph()
    E = _Graph.E
    if kind == "setpoint":
        y, v = _closed_path(g, 0, depth, {E: 1.0})
        return g, [{y: 1.0}, {v: 1.0}]
    if kind == "output":
        w = g.delay(0)
        fy = g.block(("F", 0, 1.0), {w: 1.0, E: 1.0})
        v = g.block(("C", 0, -1.0), {fy: 1.0})
        pin = {v: 1.0}
        if depth > 1:
            yi, _ = _closed_path(g, 1, depth, {v: 1.0})
            pin = {yi: 1.0}
        z = g.block(("P", 0, 1.0), pin)
        g.feed(w, {z: 1.0})
        return g, [{w: 1.0, E: 1.0}, {v: 1.0}]
    if kind == "load":
        w = g.delay(0)
        pin = {w: 1.0, E: 1.0}
        if depth > 1:
            yi, _ = _closed_path(g, 1, depth, {w: 1.0})
            pin = {yi: 1.0, E: 1.0}
        z = g.block(("P", 0, 1.0), pin)
        fz = g.block(("F", 0, 1.0), {z: 1.0})
        c = g.block(("C", 0, -1.0), {fz: 1.0})
        g.feed(w, {c: 1.0})
        return g, [{z: 1.0}, {w: 1.0}]
    raise ValueError(f"unknown response kind {kind!r}")


def _levels(m: LoopModel) -> list[LoopModel]:
    out = [m]
    while out[-1].inner is not None:
        out.append(out[-1].inner)
        if len(out) > 8:
            raise ValueError("cascade deeper than 8 levels (a loop of inner loops?)")
    return out


def _polys(g: _Graph, m: LoopModel) -> list[tuple[np.ndarray, np.ndarray]]:
    """num, den of every block of ``g`` for the loop ``m``."""
    lv = _levels(m)
    cpoly = [controller_poly(x.controller) for x in lv]
    out = []
    for (letter, level, scale), _ in g.blocks:
        x = lv[level]
        if letter == "F":
            out.append(_lag_poly(x.pv_filter))
        elif letter == "C":
            num, den = cpoly[level]
            k = scale * x.sign
            out.append(([k * v for v in num], den))
        else:
            out.append(_proper(x.process.rational.num, x.process.rational.den, "process model"))
    return out


def _assemble(g: _Graph, outputs: list[dict], polys: list[list], delays: np.ndarray) -> Batch:
    """State-space form of a group of loops with the same diagram, block orders and zero delays."""
    L = len(polys)
    real = [_realise(np.array([p[b][0] for p in polys], float), np.array([p[b][1] for p in polys], float))
            for b in range(len(g.blocks))]
    nb = len(g.blocks)
    sizes = [r[0].shape[1] for r in real]
    offs = np.concatenate([[0], np.cumsum(sizes)]).astype(int)
    ns = int(offs[-1])
    zero = [j for j in range(len(g.chans)) if delays[0, j] <= 0.0]
    dly = [j for j in range(len(g.chans)) if delays[0, j] > 0.0]
    nu, nk = nb + len(zero), ns + len(dly) + 1

    def combo(d: dict) -> tuple[np.ndarray, np.ndarray]:
        au, ak = np.zeros(nu), np.zeros(nk)
        for sig, cf in d.items():
            if sig[0] == "e":
                ak[nk - 1] += cf
            elif sig[0] == "b":
                au[sig[1]] += cf
            elif sig[1] in zero:
                au[nb + zero.index(sig[1])] += cf
            else:
                ak[ns + dly.index(sig[1])] += cf
        return au, ak

    Mu = np.zeros((L, nu, nu))
    Mk = np.zeros((L, nu, nk))
    for i, (_, ins) in enumerate(g.blocks):
        A, B, C, D = real[i]
        au, ak = combo(ins)
        Mu[:, i] = D[:, None] * au[None, :]
        Mk[:, i] = D[:, None] * ak[None, :]
        Mk[:, i, offs[i]:offs[i + 1]] += C[:, 0]
    for p, j in enumerate(zero):
        au, ak = combo(g.chans[j][1])
        Mu[:, nb + p] = au
        Mk[:, nb + p] = ak
    Ru = np.linalg.solve(np.eye(nu)[None] - Mu, Mk)

    def row(d: dict) -> np.ndarray:
        au, ak = combo(d)
        return np.einsum("u,luk->lk", au, Ru) + ak[None, :]

    full = np.zeros((L, ns, nk))
    for i, (_, ins) in enumerate(g.blocks):
        A, B, C, D = real[i]
        sl = slice(offs[i], offs[i + 1])
        full[:, sl, sl] += A
        full[:, sl] += B * row(ins)[:, None, :]
    Q = np.stack([row(g.chans[j][1]) for j in dly], axis=1) if dly else np.zeros((L, 0, nk))
    Y = np.stack([row(o) for o in outputs], axis=1)
    nan = np.full(L, np.nan)
    return Batch(full[:, :, :ns], full[:, :, ns:], Q[:, :, :ns], Q[:, :, ns:], Y[:, :, :ns], Y[:, :, ns:],
                 delays[:, dly], nan, nan.copy(), nan.copy())


def build_batch(models: Sequence[LoopModel], kind: str) -> tuple[Batch | None, dict[int, str]]:
    """Stacked systems of ``models`` for a response ``kind`` (``load``, ``setpoint``, ``output``).

    Loops that cannot be built (improper controller, ...) are left out and listed
    with the reason in the second return value (index -> message); the batch rows
    follow the order of the remaining models.

    Parameters
    ----------
    models : sequence of LoopModel
        The loops (inner loops of cascades included through ``inner``).
    kind : str
        ``load`` (unit step at the process input), ``setpoint`` (unit set-point step) or
        ``output`` (disturbance at the process output, through S).

    Returns
    -------
    tuple of (Batch or None, dict of int to str)
        The batch (None when no loop could be built) and the loops left out, by index.
    """
    graphs: dict[int, tuple[_Graph, list[dict]]] = {}
    groups: dict[tuple, list[int]] = {}
    prepared: dict[int, tuple] = {}
    errors: dict[int, str] = {}
    for i, m in enumerate(models):
        try:
            lv = _levels(m)
            depth = len(lv)
            if depth not in graphs:
                graphs[depth] = _graph(kind, depth)
            g, _ = graphs[depth]
            polys = _polys(g, m)
            delays = np.array([lv[c[0]].delay for c in g.chans])
        except (ValueError, ZeroDivisionError) as exc:
            errors[i] = str(exc)
            continue
        key = (depth, tuple(len(p[1]) for p in polys), tuple(delays <= 0.0))
        groups.setdefault(key, []).append(i)
        prepared[i] = (polys, delays, lv)
    parts, order = [], []
    for key, idx in groups.items():
        g, outs = graphs[key[0]]
        try:
            b = _assemble(g, outs, [prepared[i][0] for i in idx], np.array([prepared[i][1] for i in idx]))
        except np.linalg.LinAlgError:
            for i in idx:
                errors[i] = "algebraic loop without dead time cannot be solved (1 + L(inf) = 0)"
            continue
        lv0 = [prepared[i][2][0] for i in idx]
        theta = np.array([x.process.dead_time for x in lv0])
        half = np.array([0.5 * x.sample for x in lv0])
        b.y_shift = theta if kind == "load" else np.zeros(len(idx))
        b.u_shift = np.zeros(len(idx)) if kind == "load" else half
        b.soft = theta if kind == "load" else half
        parts.append(b)
        order.extend(idx)
    if not parts:
        return None, errors
    batch = Batch.concat(parts)
    ok = sorted(order)
    pos = {i: k for k, i in enumerate(order)}
    return batch.take([pos[i] for i in ok]), errors


def _common_unit(values: list[float]) -> float | None:
    """Largest g with every value a whole multiple of g (ratios with denominators <= 1000), or None."""
    return _common_unit_t(tuple(values))


def _nearest_fraction(x: float, max_den: int) -> tuple[int, int]:
    """p, q of ``Fraction(x).limit_denominator(max_den)`` (x > 0), in integers without Fraction objects.

    The same continued-fraction steps and the same choice between the last convergent and the
    best semiconvergent, so the same p/q (both are in lowest terms).
    """
    n, d = x.as_integer_ratio()
    if d <= max_den:
        return n, d
    n0, d0 = n, d
    p0, q0, p1, q1 = 0, 1, 1, 0
    while True:
        a = n // d
        q2 = q0 + a * q1
        if q2 > max_den:
            break
        p0, q0, p1, q1 = p1, q1, p0 + a * p1, q2
        n, d = d, n - a * d
    k = (max_den - q0) // q1
    pb, qb = p0 + k * p1, q0 + k * q1
    # |p1/q1 - x| <= |pb/qb - x|, exactly
    if abs(p1 * d0 - n0 * q1) * qb <= abs(pb * d0 - n0 * qb) * q1:
        return p1, q1
    return pb, qb


@functools.lru_cache(maxsize=4096)
def _common_unit_t(values: tuple[float, ...]) -> float | None:
    vals = [v for v in values if v > 0.0]
    if not vals:
        return None
    base = min(vals)
    den = 1
    for v in vals:
        ratio = v / base
        p, q = _nearest_fraction(ratio, 1000)
        if abs(p / q - ratio) > 1e-9 * ratio:
            return None
        den = den * q // math.gcd(den, q)
        if den > 1000:
            return None
    return base / den


@dataclass(frozen=True)
class _Plan:
    h: float          # step [s]
    n_steps: int      # steps wanted
    truncated: bool   # horizon cut by the step cap


def plan_step(delays: Sequence[float], horizon: float, soft: Sequence[float] = (),
              divisor: float | None = None, n_target: int = N_TARGET, n_cap: int = N_CAP) -> _Plan:
    """Choose the step of one loop.

    The step is close to ``horizon/n_target`` (at most twice it) and at most the shortest delay; every
    delay (and every ``soft`` time, when possible) is a whole number of steps when
    the delays are commensurate; the step divides ``divisor`` when given. Beyond
    ``n_cap`` steps the horizon is cut (``truncated``). Times in [s].

    Parameters
    ----------
    delays : sequence of float
        Delays of the loop's channels; zero or negative ones are ignored. [s]
    horizon : float
        Time to simulate. [s]
    soft : sequence of float
        Times worth making a whole number of steps, when possible. [s]
    divisor : float or None
        A time the step must divide (e.g. a record's sample interval); none when None. [s]
    n_target : int
        Steps per horizon aimed at. [-]
    n_cap : int
        Most steps of one simulation. [-]

    Returns
    -------
    _Plan
        Step ``h`` [s], number of steps ``n_steps`` [-] and ``truncated``.
    """
    req = [float(d) for d in delays if d > 0.0]
    h0 = horizon / n_target
    fixed = req + ([float(divisor)] if divisor else [])
    for cand in (fixed + [float(s) for s in soft if s > 0.0], fixed):
        g = _common_unit(cand)
        if g is None:
            continue
        h = g / max(1, math.floor(g / h0 + 1e-9))
        n = int(math.ceil(horizon / h - 1e-9))
        if n <= 2 * n_target:
            return _Plan(h, max(n, 1), False)
    if divisor:
        lim = min([h0] + req)
        h = divisor / math.ceil(divisor / lim - 1e-9)
    elif req:
        h = min(req) / max(1, math.floor(min(req) / h0 + 1e-9))
    else:
        h = h0
    n = int(math.ceil(horizon / h - 1e-9))
    if n > n_cap:
        return _Plan(h, n_cap, True)
    return _Plan(h, max(n, 1), False)


# --------------------------------------------------------------------------- batch simulation

@dataclass
class SimResult:
    """Responses of a batch on each loop's own grid t_k = k h (k = 0..N).

    ``ym``/``yp`` hold the left and right limits of the stored outputs at the grid
    points, shape (N + 1, outputs, loops).
    """

    h: np.ndarray
    ym: np.ndarray
    yp: np.ndarray


def expm_batch(M: np.ndarray) -> np.ndarray:
    """Matrix exponentials of stacked square matrices (L, n, n).

    Scaling and squaring with a degree-16 Taylor polynomial on matrices scaled to
    infinity-norm <= 1/2 (truncation below 1e-19 relative) [4]_.

    Parameters
    ----------
    M : ndarray, shape (L, n, n)
        Stacked square matrices (e.g. A h, a state matrix times a step [s]). [-]

    Returns
    -------
    ndarray, shape (L, n, n)
        exp(M[i]) for each i. [-]

    References
    ----------
    .. [4] C. Moler and C. Van Loan, Nineteen dubious ways to compute the exponential
       of a matrix, twenty-five years later, SIAM Review 45(1), 2003, method 3.
    """
    L, n, _ = M.shape
    norm = np.max(np.sum(np.abs(M), axis=2), axis=1)
    s = np.maximum(0, np.ceil(np.log2(np.maximum(norm, 1e-300) / 0.5))).astype(int)
    X = M / (2.0 ** s)[:, None, None]
    eye = np.broadcast_to(np.eye(n), M.shape)
    E = eye.copy()
    for k in range(16, 0, -1):
        E = eye + (X @ E) / k
    for j in range(int(s.max()) if L else 0):
        sq = E @ E
        # an unstable loop on a long step: e^{lambda h} beyond any float; held at STATE_LIMIT (its
        # simulated response is held there too) instead of overflowing to inf
        np.clip(sq, -STATE_LIMIT, STATE_LIMIT, out=sq)
        E = np.where((j < s)[:, None, None], sq, E)
    return E


def _discretise(A: np.ndarray, B: np.ndarray, h: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Phi, G0, G1 with x(h) = Phi x(0) + G0 U(0) + G1 U(h) for U linear over the step (exact) [1]_."""
    L, ns, r = B.shape
    M = np.zeros((L, ns + 2 * r, ns + 2 * r))
    M[:, :ns, :ns] = A * h[:, None, None]
    M[:, :ns, ns:ns + r] = B * h[:, None, None]
    M[:, ns + np.arange(r), ns + r + np.arange(r)] = 1.0
    E = expm_batch(M)
    Phi = E[:, :ns, :ns]
    Ga = E[:, :ns, ns:ns + r]
    Gb = E[:, :ns, ns + r:]
    return Phi, Ga - Gb, Gb


def simulate(batch: Batch, h: np.ndarray, n_steps: int, ext: Callable[[int], np.ndarray] | None = None,
             outputs: Sequence[int] = (0,), live: tuple[int, int] | None = None) -> SimResult:
    """Advance a batch of loops together for ``n_steps`` steps from rest.

    Parameters
    ----------
    batch : Batch
        Loops broken at their delays.
    h : ndarray
        Step of each loop; every delay must be at least one step. [s]
    n_steps : int
        Number of steps. [-]
    ext : callable, optional
        ``ext(k)`` gives the external input at t_k = k h for every loop (right limit;
        linear between grid points; zero before t = 0). Default: a unit step at t = 0.
    outputs : sequence of int
        Outputs to store (0 PV, 1 controller output).
    live : (int, int), optional
        Only the first ``ns`` states and ``m`` delay channels of every loop matter: the others are
        padding (:meth:`Batch.concat`: no input reaches them, they reach no output, their delays
        are NaN). The step is discretised with them (the same matrix exponential, so the same
        numbers) and then left out: every product dropped is an exact zero, so every value is the
        same, at the cost of the live sizes. Default: every state and channel.
    """
    L = len(batch)
    h = np.asarray(h, float)
    Phi, G0, G1 = _discretise(batch.A, batch.B, h)
    if live is not None and live != (batch.A.shape[1], batch.Cq.shape[1]):
        ns_, m_ = live
        cols = list(range(m_)) + [batch.Cq.shape[1]]
        Phi, G0, G1 = Phi[:, :ns_, :ns_], G0[:, :ns_][:, :, cols], G1[:, :ns_][:, :, cols]
        batch = _narrow(batch, m_)
        batch = Batch(batch.A[:, :ns_, :ns_], batch.B[:, :ns_], batch.Cq[:, :, :ns_], batch.Dq, batch.Cy[:, :, :ns_],
                      batch.Dy, batch.delays, batch.y_shift, batch.u_shift, batch.soft)
    ns, m = batch.A.shape[1], batch.Cq.shape[1]
    r = m + 1
    G = np.ascontiguousarray(np.concatenate([Phi, G0, G1], axis=2).transpose(1, 2, 0))
    sel = list(outputs)
    H = np.concatenate([np.concatenate([batch.Cq, batch.Dq], axis=2),
                        np.concatenate([batch.Cy[:, sel], batch.Dy[:, sel]], axis=2)], axis=1)
    H = np.ascontiguousarray(H.transpose(1, 2, 0))
    steps = np.where(np.isnan(batch.delays), 1.0, batch.delays / h[:, None]).T      # (m, L)
    n = np.floor(steps + 1e-9).astype(int)
    frac = steps - n
    frac[frac < 1e-9] = 0.0
    if (n < 1).any():
        raise ValueError("a delay is shorter than one step")
    use_frac = bool((frac > 0.0).any())
    R = int(n.max()) + 2
    mL = m * L
    base = (np.arange(m)[:, None] * L + np.arange(L)[None, :])
    off = (base - n * mL).ravel()                  # read index of w(t_k) is k mL + off (mod R mL)
    off1 = (base - (n + 1) * mL).ravel()
    fr = frac.ravel()
    QM = np.zeros(R * mL)
    QP = np.zeros(R * mL)
    ny = len(sel)
    Hw = H[:, ns:ns + m]
    jumps = bool(np.any(H[:, ns:] != 0.0))         # w or e reach q or y without a lag: keep left limits apart
    YP = np.empty((n_steps + 1, ny, L))
    YM = np.empty((n_steps + 1, ny, L)) if jumps else YP
    step_input = ext is None
    if step_input:
        ones = np.ones(L)
        ext = lambda k: ones  # noqa: E731
    V = np.zeros((ns + 2 * r, L))        # [x; U+(t_k); U-(t_k+1)]
    e0 = np.asarray(ext(0), float)
    # t = 0: the left limit is rest; the right limit has e = e(0)
    Op = np.einsum("ijl,jl->il", H, np.concatenate([np.zeros((ns + m, L)), e0[None]], axis=0))
    QP[:mL] = Op[:m].ravel()
    YP[0] = Op[m:]
    if jumps:
        YM[0] = 0.0
    else:
        YP[0] = Op[m:]
    V[ns + m] = e0
    V[ns + r + m] = e0
    Hx = H
    for k in range(n_steps):
        c = (k + 1) * mL
        wm = np.take(QM, c + off, mode="wrap")
        wp = np.take(QP, c + off, mode="wrap")
        if use_frac:
            prev = np.take(QP, c + off1, mode="wrap")
            wf = (1.0 - fr) * wm + fr * prev
            wm = np.where(fr > 0.0, wf, wm)
            wp = np.where(fr > 0.0, wf, wp)
        wm = wm.reshape(m, L)
        wp = wp.reshape(m, L)
        if not step_input:
            ek = np.asarray(ext(k + 1), float)
            V[ns + 2 * r - 1] = ek
        V[ns + r:ns + r + m] = wm
        x = np.einsum("ijl,jl->il", G, V)
        np.clip(x, -STATE_LIMIT, STATE_LIMIT, out=x)      # an unstable loop's growth stops short of overflow
        V[:ns] = x
        V[ns:ns + m] = wp
        if not step_input:
            V[ns + m] = ek
        Op = np.einsum("ijl,jl->il", Hx, V[:ns + r])
        np.clip(Op, -STATE_LIMIT, STATE_LIMIT, out=Op)    # (a neutral loop grows through its delay line alone)
        s = ((k + 1) % R) * mL
        QP[s:s + mL] = Op[:m].ravel()
        YP[k + 1] = Op[m:]
        if jumps:
            Om = Op + np.einsum("ijl,jl->il", Hw, wm - wp)
            np.clip(Om, -STATE_LIMIT, STATE_LIMIT, out=Om)
            QM[s:s + mL] = Om[:m].ravel()
            YM[k + 1] = Om[m:]
        else:
            QM[s:s + mL] = QP[s:s + mL]
    return SimResult(h, YM, YP)


def _delay_steps(batch: Batch, h: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Whole steps ``n`` (m, L) and fraction ``frac`` (m, L) of every delay channel, as :func:`simulate` reads them."""
    steps = np.where(np.isnan(batch.delays), 1.0, batch.delays / h[:, None]).T      # (m, L)
    n = np.floor(steps + 1e-9).astype(int)
    frac = steps - n
    frac[frac < 1e-9] = 0.0
    return n, frac


@dataclass
class _Lifted:
    """One step of a group of loops as an affine map of an augmented state, S_{k+1} = M S_k + N u_{k+1}.

    The state holds x, the right limit of w, the last ``depth`` values of both limits of every
    short delay channel's input q, the stored outputs' right and left limits, both limits of the
    long channels' inputs q at t_k and a constant 1 (the unit step input); ``start`` is S_0.
    ``u`` holds the long channels' delayed values (left limits, then right limits), read from
    outside the state (they are at least one block old).
    """

    M: np.ndarray          # (L, na, na)
    N: np.ndarray          # (L, na, 2 ml)
    start: np.ndarray      # (L, na)
    outs: np.ndarray       # indices of [yp (ny); ym (ny); qp long (ml); qm long (ml)] in the state


def _lift(batch: Batch, h: np.ndarray, sel: Sequence[int], jumps: bool, long: np.ndarray) -> _Lifted:
    """The augmented one-step map of :func:`simulate` (unit step input) for every loop of ``batch``.

    ``long`` (m,) marks the channels read from outside the state. The map is built by applying
    the operations of one step of :func:`simulate` to the columns of an identity matrix, so it is
    the same recurrence (without the overflow guard).
    """
    L = len(batch)
    Phi, G0, G1 = _discretise(batch.A, batch.B, h)
    ns, m = batch.A.shape[1], batch.Cq.shape[1]
    H = np.concatenate([np.concatenate([batch.Cq, batch.Dq], axis=2),
                        np.concatenate([batch.Cy[:, sel], batch.Dy[:, sel]], axis=2)], axis=1)   # (L, m+ny, ns+r)
    ny = len(sel)
    n, frac = _delay_steps(batch, h)
    if (n < 1).any():
        raise ValueError("a delay is shorter than one step")
    sh = np.flatnonzero(~long)
    lg = np.flatnonzero(long)
    ms, ml = len(sh), len(lg)
    use_frac = bool((frac[sh] > 0.0).any())
    depth = int(n[sh].max()) + 1 + int(use_frac) if ms else 0
    iwp = ns
    iqp = ns + m
    iqm = iqp + ms * depth
    iyp = iqm + ms * depth
    iym = iyp + ny
    ilp = iym + ny
    ilm = ilp + ml
    na = ilm + ml + 1
    S = np.broadcast_to(np.eye(na + 2 * ml), (L, na + 2 * ml, na + 2 * ml))
    x = S[:, :ns]
    wp = S[:, iwp:iwp + m]
    QP = S[:, iqp:iqm].reshape(L, ms, depth, na + 2 * ml)
    QM = S[:, iqm:iyp].reshape(L, ms, depth, na + 2 * ml)
    one = S[:, na - 1:na]
    wm1 = np.empty((L, m, na + 2 * ml))
    wp1 = np.empty((L, m, na + 2 * ml))
    wm1[:, lg] = S[:, na:na + ml]
    wp1[:, lg] = S[:, na + ml:]
    if ms:
        li = np.arange(L)[:, None]
        ci = np.arange(ms)[None, :]
        pos = (depth - n[sh]).T                              # read position of w(t_{k+1}), (L, ms)
        a = QM[li, ci, pos]
        b = QP[li, ci, pos]
        if use_frac:
            fr = frac[sh].T[:, :, None]
            prev = QP[li, ci, pos - 1]
            wf = (1.0 - fr) * a + fr * prev
            a = np.where(fr > 0.0, wf, a)
            b = np.where(fr > 0.0, wf, b)
        wm1[:, sh] = a
        wp1[:, sh] = b
    V = np.concatenate([x, wp, one, wm1, one], axis=1)        # [x; U+(t_k); U-(t_k+1)]
    G = np.concatenate([Phi, G0, G1], axis=2)
    x1 = G @ V
    Op = H @ np.concatenate([x1, wp1, one], axis=1)
    Om = Op + H[:, :, ns:ns + m] @ (wm1 - wp1) if jumps else Op
    T = np.empty((L, na, na + 2 * ml))
    T[:, :ns] = x1
    T[:, iwp:iwp + m] = wp1
    if ms:
        T[:, iqp:iqm] = np.concatenate([QP[:, :, 1:], Op[:, sh, None]], axis=2).reshape(L, ms * depth, na + 2 * ml)
        T[:, iqm:iyp] = np.concatenate([QM[:, :, 1:], Om[:, sh, None]], axis=2).reshape(L, ms * depth, na + 2 * ml)
    T[:, iyp:iym] = Op[:, m:]
    T[:, iym:ilp] = Om[:, m:]
    T[:, ilp:ilm] = Op[:, lg]
    T[:, ilm:na - 1] = Om[:, lg]
    T[:, na - 1] = 0.0
    T[:, na - 1, na - 1] = 1.0
    # t = 0: the left limit is rest; the right limit has e = 1
    start = np.zeros((L, na))
    Op0 = H[:, :, ns + m]
    if ms:
        start[:, iqp + depth - 1:iqm:depth] = Op0[:, sh]
    start[:, iyp:iym] = Op0[:, m:]
    start[:, iym:ilp] = 0.0 if jumps else Op0[:, m:]
    start[:, ilp:ilm] = Op0[:, lg]
    start[:, na - 1] = 1.0
    return _Lifted(np.ascontiguousarray(T[:, :, :na]), np.ascontiguousarray(T[:, :, na:]), start,
                   np.arange(iyp, na - 1))


def _powers_rows(E: np.ndarray, M: np.ndarray, count: int) -> tuple[np.ndarray, np.ndarray]:
    """Rows E M^i for i < ``count`` (a power of two), by doubling, and M^count.

    Parameters
    ----------
    E : ndarray, shape (L, k, na)
    M : ndarray, shape (L, na, na)
    count : int

    Returns
    -------
    tuple of ndarray
        (L, count, k, na) and (L, na, na).
    """
    P = E[:, None]
    Mp = M
    while P.shape[1] < count:
        P = np.concatenate([P, P @ Mp[:, None]], axis=1)
        Mp = Mp @ Mp
    return P, Mp


def simulate_lifted(batch: Batch, h: np.ndarray, n_steps: int, outputs: Sequence[int] = (0,),
                    jumps: bool | None = None, long: Sequence[bool] | None = None) -> SimResult:
    """:func:`simulate` of a unit step, evaluated through powers of the one-step map.

    Every step of :func:`simulate` is linear in an augmented state (x, the short delay lines,
    the outputs and a constant), S_{k+1} = M S_k + N u_{k+1}, where u holds the delayed values of
    the ``long`` channels. Without long channels the grid is cut into blocks of ``b`` steps
    (``b`` a power of two near sqrt(N)): the output rows E M^i (i < b) are formed by doubling,
    the block starts S_{jb} by ``b``-th powers of M, and all outputs in one product
    y_{jb+i} = (E M^i) S_{jb}. With long channels the blocks are at most as long as the
    shortest long delay, so every u of a block is already known when it starts; each block is
    then one product with E M^i and one with the block Toeplitz matrix of E M^d N. Either way
    it takes a few array operations per block instead of a few per step, at a cost that grows
    with the square of the state size: it suits loops whose short delays are few steps long.
    Same grid, same recurrence: the values differ from :func:`simulate` by rounding only (about
    1e-12 relative for a stable loop); a loop whose response leaves the float range gives
    non-finite values here, where :func:`simulate` holds it at :data:`STATE_LIMIT`.

    Parameters
    ----------
    batch : Batch
        Loops broken at their delays.
    h : ndarray
        Step of each loop; every delay must be at least one step. [s]
    n_steps : int
        Number of steps. [-]
    outputs : sequence of int
        Outputs to store (0 PV, 1 controller output).
    jumps : bool or None
        Keep left and right limits apart (as :func:`simulate` does when any signal reaches an
        output without a lag); decided from the batch when None.
    long : sequence of bool or None
        Channels read from outside the state, each at least :data:`BLOCK_MIN` steps long in
        every loop; none when None.

    Returns
    -------
    SimResult
        As :func:`simulate` returns it.
    """
    L = len(batch)
    h = np.asarray(h, float)
    sel = list(outputs)
    ny = len(sel)
    m = batch.Cq.shape[1]
    long = np.zeros(m, bool) if long is None else np.asarray(long, bool)
    if jumps is None:
        jumps = bool(np.any(batch.Dq != 0.0) or np.any(batch.Dy[:, sel] != 0.0))
    lf = _lift(batch, h, sel, jumps, long)
    na = lf.M.shape[1]
    E = np.broadcast_to(np.eye(na)[lf.outs], (L, len(lf.outs), na))
    K = n_steps + 1
    lg = np.flatnonzero(long)
    ml = len(lg)
    if not ml:
        b = 1 << max(0, int(math.ceil(0.5 * math.log2(K))))
        P, Mb = _powers_rows(E, lf.M, b)
        J = -(-K // b)
        starts = np.empty((L, na, J))
        s = lf.start
        for j in range(J):
            starts[:, :, j] = s
            if j + 1 < J:
                s = np.einsum("lij,lj->li", Mb, s)
        Y = np.einsum("lkn,lnj->jkl", P.reshape(L, -1, na), starts)         # (J, b 2ny, L)
        Y = Y.reshape(J * b, 2 * ny, L)[:K]
    else:
        n, frac = _delay_steps(batch, h)
        n, frac = n[lg], frac[lg]                                          # (ml, L)
        outs, N = lf.outs, lf.N
        if not jumps:
            # left and right limits agree: one output per signal, one input per long channel
            outs = np.concatenate([outs[:ny], outs[2 * ny:2 * ny + ml]])
            N = N[:, :, :ml] + N[:, :, ml:]
        nout, nin = len(outs), N.shape[2]
        E = np.broadcast_to(np.eye(na)[outs], (L, nout, na))
        # block length: at most the shortest long delay; near the length that balances the work per
        # block (L nout nin b^2 products) against the fixed cost of the few array operations per block
        b_work = math.sqrt(BLOCK_WORK / (L * nout * nin))
        b = 1 << max(0, min(int(math.floor(math.log2(min(int(n.min()), BLOCK_MAX)))), int(round(math.log2(b_work)))))
        P, Mb = _powers_rows(E, lf.M, b)                                   # E M^i, i < b
        F = P @ N[:, None]                                                 # E M^d N, d < b
        Pb = np.concatenate([P[:, 1:], (E @ Mb)[:, None]], axis=1).reshape(L, b * nout, na)   # E M^i, i = 1..b
        T = np.zeros((L, b, nout, b, nin))                                 # block Toeplitz of F
        for d in range(b):
            T[:, np.arange(d, b), :, np.arange(0, b - d), :] = F[:, d][None]
        T = T.reshape(L, b * nout, b * nin)
        # end of a block: M^b S + sum_l M^{b-l} N u_l
        W = np.empty((L, na, b, nin))
        W[:, :, b - 1] = N
        cur = N
        for i in range(b - 2, -1, -1):
            cur = lf.M @ cur
            W[:, :, i] = cur
        W = W.reshape(L, na, b * nin)
        G = np.concatenate([np.concatenate([Pb, T], axis=2), np.concatenate([Mb, W], axis=2)], axis=1)
        # outputs z_t (t = 0..J b) of every loop in one buffer, after ``pad`` zeros (rest before t = 0)
        pad = int(n.max()) + 2
        J = -(-(K - 1) // b)
        width = pad + J * b + 1
        Z = np.zeros((L, width, nout))
        Z[:, pad] = lf.start[:, outs]
        # flat read positions of u at the first block: q of every long channel at t - n (left limit,
        # right limit) and the right limit at t - n - 1 (fractional delays)
        t = pad + np.arange(1, b + 1)[None, :, None] - n.T[:, None, :]                # (L, b, ml)
        row = (np.arange(L)[:, None, None] * width + t) * nout
        qp = (2 * ny if jumps else ny) + np.arange(ml)   # columns of the long channels' right limits
        qm = qp + ml if jumps else qp
        at = np.concatenate([row + qm, row + qp, row - nout + qp], axis=2)            # (L, b, 3 ml)
        fr = frac.T[:, None, :]
        use_frac = bool((frac > 0.0).any())
        flat = Z.reshape(-1)
        # the block's right-hand side [S; u] and its product live in buffers made once: each block
        # writes the same values into them that it would concatenate (the same products, the same sums)
        vec = np.empty((L, na + b * nin, 1))
        vec[:, :na, 0] = lf.start
        uv = vec[:, na:, 0].reshape(L, b, nin)
        um, up = (uv[:, :, :ml], uv[:, :, ml:]) if jumps else (None, uv)
        out = np.empty((L, b * nout + na, 1))
        zo = out[:, :b * nout, 0].reshape(L, b, nout)
        pos = at.copy()
        got = np.empty(at.shape)
        if use_frac:
            keep, has = 1.0 - fr, fr > 0.0
        for j in range(J):
            np.take(flat, pos, out=got)
            wm, wp = got[:, :, :ml], got[:, :, ml:2 * ml]
            if use_frac:
                wf = keep * wm + fr * got[:, :, 2 * ml:]
                wm = np.where(has, wf, wm)
                wp = np.where(has, wf, wp)
            if jumps:
                um[...] = wm
            up[...] = wp
            np.matmul(G, vec, out=out)
            Z[:, pad + 1 + j * b:pad + 1 + (j + 1) * b] = zo
            vec[:, :na, 0] = out[:, b * nout:, 0]
            pos += b * nout
        Z = Z[:, pad:, :2 * ny] if jumps else Z[:, pad:, :ny][:, :, [*range(ny), *range(ny)]]
        Y = Z.transpose(1, 2, 0)
        Y = Y[:K]
    YP = np.ascontiguousarray(Y[:, :ny])
    YM = np.ascontiguousarray(Y[:, ny:]) if jumps else YP
    return SimResult(h, YM, YP)


def _narrow(batch: Batch, mu: int) -> Batch:
    """The batch with only its first ``mu`` delay channels (the others unused: NaN delay, zero paths)."""
    m = batch.Cq.shape[1]
    if mu == m:
        return batch
    cols = list(range(mu)) + [m]
    return Batch(batch.A, batch.B[:, :, cols], batch.Cq[:, :mu], batch.Dq[:, :mu][:, :, cols], batch.Cy,
                 batch.Dy[:, :, cols], batch.delays[:, :mu], batch.y_shift, batch.u_shift, batch.soft)


def simulate_steps(batch: Batch, h: np.ndarray, n_steps: int, outputs: Sequence[int] = (0,)) -> SimResult:
    """:func:`simulate` of a unit step, each loop by the cheaper of two evaluations of the same recurrence.

    Loops whose delay lines are at most :data:`LIFT_DEPTH` steps long go to
    :func:`simulate_lifted` (grouped by delay-line length and channel count), the others to
    :func:`simulate`; so does a lifted loop whose response leaves +-1e90 (an unstable loop,
    held at :data:`STATE_LIMIT` there). Left and right limits are kept apart for the whole batch
    when :func:`simulate` would keep them apart for it, so the result has the same layout.

    Parameters
    ----------
    batch : Batch
        Loops broken at their delays.
    h : ndarray
        Step of each loop; every delay must be at least one step. [s]
    n_steps : int
        Number of steps. [-]
    outputs : sequence of int
        Outputs to store (0 PV, 1 controller output).

    Returns
    -------
    SimResult
        As :func:`simulate` returns it.
    """
    L = len(batch)
    h = np.asarray(h, float)
    sel = list(outputs)
    jumps = bool(np.any(batch.Dq != 0.0) or np.any(batch.Dy[:, sel] != 0.0))
    n, frac = _delay_steps(batch, h)
    used = ~np.isnan(batch.delays.T)                                   # (m, L)
    mu = np.maximum(used.sum(axis=0), 1)
    whole = np.where(used, n, 1).max(axis=0) + 1 + (used & (frac > 0.0)).any(axis=0)
    long = used & (n >= BLOCK_MIN) & (whole > LIFT_DEPTH)[None, :]
    short = ~long
    depth = np.where(short, n, 1).max(axis=0) + 1 + (short & (frac > 0.0)).any(axis=0)
    block = 1 << np.floor(np.log2(np.minimum(np.where(long, n, BLOCK_MAX).min(axis=0), BLOCK_MAX))).astype(int)
    full = ~long.any(axis=0) & (depth <= LIFT_DEPTH)
    lift = (depth <= LIFT_DEPTH) & (n >= 1).all(axis=0)
    if (~full).sum() >= BLOCK_LOOPS or not lift[~full].all():
        lift = full     # the step-by-step run is needed anyway: loops with long channels join it (cheaper)
    ny = len(sel)
    YP = np.empty((n_steps + 1, ny, L))
    YM = np.empty((n_steps + 1, ny, L)) if jumps else YP
    seq = list(np.flatnonzero(~lift))
    # groups: channel count, which channels are long, block length (loops with long channels) or
    # delay-line length (the others: the state grows with it)
    group = np.where(long.any(axis=0), block, -depth)
    keys = {(int(mu[i]), tuple(long[:mu[i], i].tolist()), int(group[i])) for i in np.flatnonzero(lift)}
    for key in sorted(keys):
        km, kl, kg = key
        idx = np.flatnonzero(lift & (mu == km) & (long[:km] == np.array(kl)[:, None]).all(axis=0) & (group == kg))
        # an unstable loop's powers may overflow: its values are then not finite, and it runs step by step
        with np.errstate(over="ignore", invalid="ignore"):
            res = simulate_lifted(_narrow(batch.take(idx), km), h[idx], n_steps, sel, jumps, kl)
            big = ~(np.abs(res.yp) <= 1e90).all(axis=(0, 1)) | ~(np.abs(res.ym) <= 1e90).all(axis=(0, 1))
        good = ~big
        YP[:, :, idx[good]] = res.yp[:, :, good]
        if jumps:
            YM[:, :, idx[good]] = res.ym[:, :, good]
        seq.extend(idx[big].tolist())
    if seq:
        seq_all = np.array(sorted(seq), int)
        # most loops have fewer states and channels than the batch's largest (padding): the loops of
        # at most SMALL_STATES live states and one channel step apart, at their own size
        live_ns = _live_states(batch, seq_all)
        small = (live_ns <= SMALL_STATES) & (mu[seq_all] == 1)
        if small.sum() < SMALL_LOOPS or (~small).sum() < SMALL_LOOPS:
            small[:] = False
        for part in (seq_all[small], seq_all[~small]):
            if not len(part):
                continue
            live = (int(_live_states(batch, part).max()), int(mu[part].max()))
            res = simulate(batch.take(part), h[part], n_steps, outputs=sel, live=live)
            YP[:, :, part] = res.yp
            if jumps:
                YM[:, :, part] = res.ym
                if res.ym is res.yp:      # no jump in these loops: the left limit at t = 0 is rest
                    YM[0, :, part] = 0.0
    return SimResult(h, YM, YP)


def _live_states(batch: Batch, idx: np.ndarray) -> np.ndarray:
    """Live states of the loops ``idx``: all but the trailing ones that nothing reaches and that reach nothing.

    A trailing state is dead when its row and column of A are zero off the diagonal, its row of B
    is zero and its columns of Cq and Cy are zero (the padding of :meth:`Batch.concat`): from rest
    it stays zero and adds exact zeros to every sum.
    """
    A, B, Cq, Cy = batch.A[idx], batch.B[idx], batch.Cq[idx], batch.Cy[idx]
    ns = A.shape[1]
    off = A * (1.0 - np.eye(ns))[None]
    dead = ((off == 0.0).all(axis=2) & (off == 0.0).all(axis=1) & (B == 0.0).all(axis=2)
            & (Cq == 0.0).all(axis=1) & (Cy == 0.0).all(axis=1))                     # (L, ns)
    trailing = np.cumprod(dead[:, ::-1], axis=1).sum(axis=1)
    return np.maximum(ns - trailing, 1)


def final_values(batch: Batch) -> np.ndarray:
    """Steady outputs after a unit step (every delay is 1 at s = 0), shape (outputs, loops); NaN when none.

    Parameters
    ----------
    batch : Batch
        Loops broken at their delays (see :class:`Batch`).

    Returns
    -------
    ndarray, shape (outputs, loops)
        Final value of each output (0 the PV, 1 the controller output) per unit of the
        step; NaN for a loop with no steady state (singular closed-loop matrix). [-]
    """
    L, ns, m = len(batch), batch.A.shape[1], batch.Cq.shape[1]
    K = np.linalg.solve(np.eye(m)[None] - batch.Dq[:, :, :m], np.concatenate([batch.Cq, batch.Dq[:, :, m:]], axis=2))
    Acl = batch.A + batch.B[:, :, :m] @ K[:, :, :ns]
    bcl = batch.B[:, :, m] + np.einsum("lij,lj->li", batch.B[:, :, :m], K[:, :, ns])
    ok = np.linalg.cond(Acl) < 1e12
    x = np.zeros((L, ns))
    if ok.any():
        x[ok] = np.linalg.solve(Acl[ok], -bcl[ok][:, :, None])[:, :, 0]
    w = np.einsum("lij,lj->li", K[:, :, :ns], x) + K[:, :, ns]
    y = np.einsum("lij,lj->li", batch.Cy, x) + np.einsum("lij,lj->li", batch.Dy[:, :, :m], w) + batch.Dy[:, :, m]
    y[~ok] = np.nan
    return y.T


def plan_batch(batch: Batch, horizons: np.ndarray, divisors: np.ndarray | None = None,
               n_target: int = N_TARGET, n_cap: int = N_CAP) -> list[_Plan]:
    """:func:`plan_step` for every loop of a batch.

    Parameters
    ----------
    batch : Batch
        The loops; their ``delays`` [s] and ``soft`` times [s] are used.
    horizons : ndarray
        Time to simulate, one per loop. [s]
    divisors : ndarray or None
        A time each loop's step must divide (e.g. a record's sample interval), one per
        loop; none when None. [s]
    n_target : int
        Steps per horizon aimed at. [-]
    n_cap : int
        Most steps of one simulation; a longer horizon is cut. [-]

    Returns
    -------
    list of _Plan
        Step [s], number of steps and whether the horizon was cut, one per loop.
    """
    out = []
    for i in range(len(batch)):
        d = batch.delays[i]
        out.append(plan_step(d[~np.isnan(d)].tolist(), float(horizons[i]), [float(batch.soft[i])],
                             None if divisors is None else float(divisors[i]), n_target, n_cap))
    return out
