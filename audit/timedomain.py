"""Load and set-point step responses with the exact dead time, vectorised across loops.

Method
------
Each loop is written as a delay-free linear system closed through one pure delay
per loop level (the loop's own ``theta + Ts/2``; a cascade adds one level per inner
loop, depth up to 3). The delays are moved along the loop path where that is exact
for a linear time-invariant loop:

* load step at the process input: ``z(t) = y(t + theta)`` obeys
  ``z = P (u + d)``, ``u(t) = c(t - D)``, ``c = -sign C F z``; the PV is ``z``
  shifted by ``theta``;
* set-point step: ``v = sign C (r - F y)``, ``y(t) = (P v)(t - D)``; the controller
  output the process sees is ``v`` shifted by ``Ts/2``;
* output disturbance (used by :mod:`audit.disturbance`): as the set-point case with
  ``r = 0`` and the disturbance added to the PV.

Each loop gets its own fixed step ``h``, chosen from its horizon and its delays so
that every delay is a whole number of steps when the delays are commensurate (and
at least one step always). The rational part is discretised exactly (matrix
exponential) for inputs that are linear between grid points (first-order hold);
the delay line stores the left and right limits of its input at every grid point,
so jumps (proportional kicks, pure-gain processes) pass through the delay exactly.
Delays that are not whole numbers of steps (incommensurate cascade delays) are read
from the delay line by linear interpolation at the exact delayed time. The engine is
:mod:`audit.stepsim`: loops of a batch advance together, arrays across loops, either
step by step or, for loops with short delay lines (short dead times over long horizons)
and cascades with long outer delays, in blocks of steps through powers of the one-step
map (the same recurrence, evaluated in another order).

Horizon
-------
A characteristic time ``Tc`` is built from the model (dead time, time constants,
filter, ``Ti``, the closed-loop integral time ``(1 + |K Kc|)/|K ki|``, ``1/|K Kc|``
for integrating processes). The first horizon is ``4 Tc``; a response that has not
stayed inside its settling band over the last quarter of the horizon is run again
with a horizon four times longer, twice at most (a rerun takes at most
``RERUN_CAP`` steps; a loop whose short dead time would need more is reported as
not settled).

References
----------
.. [1] K. J. Astrom and T. Hagglund, Advanced PID Control, ISA, 2006, sec. 4.3
   (IE = 1/ki for a unit load step at the process input; IAE).
.. [2] K. Ogata, Modern Control Engineering, 5th ed., 2010, sec. 5-3
   (rise time, overshoot, settling time).
.. [3] G. F. Franklin, J. D. Powell and M. Workman, Digital Control of Dynamic
   Systems, 3rd ed., 1998, sec. 6.3 (triangle-hold equivalent, exact discretisation
   with the matrix exponential).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pandas as pd

from .loop import LoopModel, Rational
from .policy import Policy
# the engine's names that callers (disturbance, frequency, tests) know from this module
from .stepsim import (N_CAP, N_TARGET, Batch, build_batch, controller_poly, expm_batch,  # noqa: F401
                      final_values, plan_batch, plan_step, simulate, simulate_steps)

MEMORY_BUDGET = 128e6    # bytes of stored responses per simulated chunk
FIGURE_CHUNK = 1024      # loops per block of figure computations (bounds temporaries)
HORIZON_FACTOR = 4.0     # first horizon = HORIZON_FACTOR * Tc
RERUNS = 2               # horizon x4 at most this many times
RERUN_CAP = 8 * N_TARGET  # most steps of a rerun (a longer one is cut and reported as not settled)
SETTLED_FRACTION = 0.75  # a response must settle before this fraction of the horizon

STEP_COLUMNS = ("load_iae_s", "load_ie_s", "load_peak", "load_t_peak_s", "load_settle_s", "load_offset",
                "sp_overshoot_pct", "sp_rise_s", "sp_settle_s", "sp_offset", "step_horizon_s", "step_note")


# --------------------------------------------------------------------------- time scales and steps

def _dc(r: Rational) -> tuple[int, float]:
    """(number of integrators, gain of the rest at s = 0) of a rational function."""
    den = np.asarray(r.den, float)
    num = np.asarray(r.num, float)
    k = 0
    while len(den) > 1 and den[-1] == 0.0:
        den = den[:-1]
        k += 1
    while len(num) > 1 and num[-1] == 0.0:
        num = num[:-1]
        k -= 1
    return k, float(num[-1] / den[-1])


def _scales(r: Rational) -> float:
    """Sum of 1/|root| over the non-zero poles and zeros of a rational function. [s]"""
    total = 0.0
    for poly in (r.num, r.den):
        if len(poly) > 1:
            roots = np.roots(poly)
            roots = roots[np.abs(roots) > 1e-12 * max(1.0, np.max(np.abs(roots)))]
            total += float(np.sum(1.0 / np.abs(roots))) if len(roots) else 0.0
    return total


def characteristic_time(m: LoopModel) -> float:
    """A time by which the loop's step responses should have largely settled, /HORIZON_FACTOR. [s]

    Parameters
    ----------
    m : LoopModel
        The loop: dead time, PV filter, derivative time, process lags (or rational
        time scales), inner loop and the integrating or self-regulating gains all add.

    Returns
    -------
    float
        Characteristic time Tc, 1 s when the sum is not finite and positive. [s]
    """
    c = m.controller
    kc = c.kp if c.form == "parallel" else c.kc
    ki = c.integral_gain
    tc = m.delay + m.pv_filter + (c.td or 0.0) + (c.kd / c.kp if c.form == "parallel" and c.kp else 0.0)
    pr = m.process
    if pr.kind == "tf":
        tc += _scales(pr.rational)
    else:
        tc += abs(pr.tau1) + abs(pr.tau2) + abs(pr.lead)
    n_int, k = _dc(m.process.rational)
    if m.inner is not None:
        tc += characteristic_time(m.inner)
    if n_int > 0:
        if kc:
            tc += 1.0 / abs(k * kc)
        if ki:
            tc += (abs(kc / ki) if kc else 0.0) + 1.0 / math.sqrt(abs(k * ki))
    elif ki and k:
        tc += (1.0 + abs(k * kc)) / abs(k * ki)
    if not np.isfinite(tc) or tc <= 0.0:
        tc = 1.0
    return float(tc)


# --------------------------------------------------------------------------- figures

@dataclass
class _Resp:
    """Responses of a chunk of loops: ``Y`` (K, L) with ``rep`` values per grid point (2: left and
    right limits interleaved, 1: continuous), grid t_k = k h + shift."""

    Y: np.ndarray
    h: np.ndarray
    shift: np.ndarray
    rep: int

    @staticmethod
    def of(ym: np.ndarray, yp: np.ndarray, h: np.ndarray, shift: np.ndarray) -> "_Resp":
        if ym is yp:
            return _Resp(yp, h, shift, 1)
        Y = np.empty((2 * ym.shape[0], ym.shape[1]))
        Y[0::2] = ym
        Y[1::2] = yp
        return _Resp(Y, h, shift, 2)

    def t(self, i: np.ndarray) -> np.ndarray:
        """Times of the per-column indices ``i``. [s]"""
        return (i // self.rep) * self.h + self.shift

    def integral(self, Y: np.ndarray) -> np.ndarray:
        """Trapezoid integral of ``Y`` (same layout) over the grid, jumps taking no time."""
        if self.rep == 1:
            return self.h * (Y.sum(axis=0) - 0.5 * (Y[0] + Y[-1]))
        return self.h * 0.5 * (Y[1:-1:2] + Y[2::2]).sum(axis=0)

    @property
    def horizon(self) -> np.ndarray:
        return self.t(np.full(self.Y.shape[1], self.Y.shape[0] - 1))


def _first_crossing(r: _Resp, Y: np.ndarray, level: np.ndarray) -> np.ndarray:
    """First time each column reaches ``level`` (linear between points); NaN if never."""
    hit = Y >= level[None, :]
    i = np.argmax(hit, axis=0)
    c = np.arange(Y.shape[1])
    ok = hit[i, c]
    ip = np.maximum(i - 1, 0)
    y0, y1, t0, t1 = Y[ip, c], Y[i, c], r.t(ip), r.t(i)
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where((i > 0) & (y1 > y0), (level - y0) / (y1 - y0), 1.0)
    out = t0 + np.clip(frac, 0.0, 1.0) * (t1 - t0)
    return np.where(ok, out, np.nan)


def _settle(r: _Resp, Y: np.ndarray, final: np.ndarray, band: np.ndarray) -> np.ndarray:
    """Time after which |y - final| <= band for good (NaN when still outside at the end)."""
    s = Y - final[None, :]
    out_ = np.abs(s) > band[None, :]
    K = Y.shape[0]
    last = K - 1 - np.argmax(out_[::-1], axis=0)
    c = np.arange(Y.shape[1])
    any_out = out_[last, c]
    at_end = last >= K - 1
    nx = np.minimum(last + 1, K - 1)
    s0, s1, t0, t1 = s[last, c], s[nx, c], r.t(last), r.t(nx)
    lvl = np.where(s0 > 0, band, -band)
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where(s1 != s0, (lvl - s0) / (s1 - s0), 0.0)
    t = t0 + np.clip(frac, 0.0, 1.0) * (t1 - t0)
    t = np.where(any_out, t, 0.0)
    return np.where(at_end & any_out, np.nan, t)


@dataclass
class _Figs:
    values: dict[str, np.ndarray]
    settled: np.ndarray
    grows: np.ndarray


def _grows(dev: np.ndarray) -> np.ndarray:
    """True where the largest deviation of the last quarter exceeds 1.5 times the earlier largest."""
    q = max(1, dev.shape[0] // 4)
    return np.max(dev[-q:], axis=0) > 1.5 * np.max(dev[:-q], axis=0)


def _load_figures(r: _Resp, final: np.ndarray, pct: float) -> _Figs:
    Y = r.Y
    absy = np.abs(Y)
    ipk = np.argmax(absy, axis=0)
    c = np.arange(Y.shape[1])
    peak = absy[ipk, c]
    band = pct / 100.0 * peak
    tpk = np.where(peak - np.abs(final) > band, r.t(ipk), np.nan)
    settle = _settle(r, Y, final, band)
    offset = np.where(np.abs(final) <= 1e-9 * np.maximum(peak, 1e-300), 0.0, final)
    has_off = offset != 0.0
    iae = np.where(has_off, np.nan, r.integral(absy))
    ie = np.where(has_off, np.nan, -r.integral(Y))
    settled = np.isfinite(settle) & (settle <= r.shift + SETTLED_FRACTION * (r.horizon - r.shift))
    return _Figs(dict(load_iae_s=iae, load_ie_s=ie, load_peak=peak, load_t_peak_s=tpk,
                      load_settle_s=settle, load_offset=offset), settled, _grows(absy))


def _sp_figures(r: _Resp, final: np.ndarray, pct: float) -> _Figs:
    sg = np.where(final < 0, -1.0, 1.0)
    Ys = r.Y * sg[None, :]
    fin = np.abs(final)
    with np.errstate(invalid="ignore", divide="ignore"):
        over = np.maximum(0.0, (Ys.max(axis=0) - fin) / fin) * 100.0
        rise = _first_crossing(r, Ys, 0.9 * fin) - _first_crossing(r, Ys, 0.1 * fin)
    settle = _settle(r, Ys, fin, pct / 100.0 * fin)
    offset = 1.0 - final
    offset = np.where(np.abs(offset) < 1e-9, 0.0, offset)
    settled = np.isfinite(settle) & (settle <= SETTLED_FRACTION * r.horizon)
    grows = _grows(np.abs(Ys - fin[None, :]))
    bad = ~(fin > 1e-12)
    for a in (over, rise, settle):
        a[bad] = np.nan
    return _Figs(dict(sp_overshoot_pct=over, sp_rise_s=rise, sp_settle_s=settle, sp_offset=offset), settled, grows)


def _run_kind(batch: Batch, kind: str, pct: float, horizons: np.ndarray, n_cap: int = N_CAP) -> dict[str, np.ndarray]:
    """Simulate one response kind for a batch (bucketed by step count, chunked by memory)."""
    L = len(batch)
    finals = final_values(batch)[0]
    plans = plan_batch(batch, horizons, n_cap=n_cap)
    names = ("load_iae_s", "load_ie_s", "load_peak", "load_t_peak_s", "load_settle_s", "load_offset") \
        if kind == "load" else ("sp_overshoot_pct", "sp_rise_s", "sp_settle_s", "sp_offset")
    out = {k: np.full(L, np.nan) for k in names}
    out["settled"] = np.zeros(L, bool)
    out["grows"] = np.zeros(L, bool)
    out["horizon"] = np.full(L, np.nan)
    out["truncated"] = np.array([p.truncated for p in plans])
    nreq = np.array([p.n_steps for p in plans])
    buckets = N_TARGET * 2 ** np.ceil(np.log2(np.maximum(nreq / N_TARGET, 1.0))).astype(int)
    buckets = np.minimum(buckets, N_CAP)
    for nb in np.unique(buckets):
        idx = np.flatnonzero(buckets == nb)
        chunk = max(1, int(MEMORY_BUDGET // (8.0 * (nb + 1) * 2)))
        for a in range(0, len(idx), chunk):
            sel = idx[a:a + chunk]
            h = np.array([plans[i].h for i in sel])
            sub = batch.take(sel)
            res = simulate_steps(sub, h, int(nb))
            for b0 in range(0, len(sel), FIGURE_CHUNK):
                cs = slice(b0, b0 + FIGURE_CHUNK)
                ss = sel[cs]
                shift = sub.y_shift[cs] if kind == "load" else np.zeros(len(ss))
                rr = _Resp.of(res.ym[:, 0, cs], res.yp[:, 0, cs], h[cs], shift)
                f = (_load_figures if kind == "load" else _sp_figures)(rr, finals[ss], pct)
                out["horizon"][ss] = rr.horizon
                for k in names:
                    out[k][ss] = f.values[k]
                out["settled"][ss] = f.settled
                out["grows"][ss] = f.grows
    return out


def _note_join(parts: list[str]) -> str:
    return "; ".join(p for p in parts if p)


def step_figures(models: Sequence[LoopModel | None], policy: Policy = Policy(),
                 stable: Sequence[bool] | np.ndarray | None = None) -> pd.DataFrame:
    """Load and set-point step figures of every loop, with the exact dead time.

    Parameters
    ----------
    models : sequence of LoopModel or None
        One per inventory row; None gives a row of NaN.
    policy : Policy
        ``settle_band_pct`` sets the settling bands. [%]
    stable : array-like of bool, optional
        Closed-loop stability decided elsewhere (Nyquist). A False entry gives NaN
        figures and a note; when None, a response that grows is reported instead.

    Returns
    -------
    pandas.DataFrame
        One row per model, columns :data:`STEP_COLUMNS`:

        - ``load_iae_s``: integral of |e| for a unit load step at the process input
          (e = r - y). [% of PV range x s per % of output]
        - ``load_ie_s``: integral of e (signed; equals -sign/ki with integral action [1]_).
        - ``load_peak``: largest |y| (deviation from the initial steady state). [-]
        - ``load_t_peak_s``: time of that peak. [s]
        - ``load_settle_s``: time after which |y - y_final| stays within
          settle_band_pct % of load_peak. [s]
        - ``load_offset``: y_final, the steady PV deviation (0 with integral action). [-]
        - ``sp_overshoot_pct``: 100 (max y - y_final)/y_final, >= 0. [%]
        - ``sp_rise_s``: time from 10 % to 90 % of y_final (first crossings). [s]
        - ``sp_settle_s``: time after which |y - y_final| stays within
          settle_band_pct % of |y_final|. [s]
        - ``sp_offset``: 1 - y_final, the steady error of a unit set-point step. [-]
        - ``step_horizon_s``: longest horizon simulated (load or set-point). [s]
        - ``step_note``: what was not computed and why.

        IAE and IE are NaN when the load response has an offset (they grow without bound).

    References
    ----------
    .. [1] K. J. Astrom and T. Hagglund, Advanced PID Control, ISA, 2006, sec. 4.3.
    """
    return _step_frame(models, policy, stable, ("load", "setpoint"))


def load_step_figures(models: Sequence[LoopModel | None], policy: Policy = Policy(),
                      stable: Sequence[bool] | np.ndarray | None = None) -> pd.DataFrame:
    """The load-step figures of :func:`step_figures` alone (the set-point step is not simulated).

    The ``load_*`` columns are those :func:`step_figures` gives (the load and set-point
    responses are simulated separately); the ``sp_*`` columns are NaN and ``step_horizon_s``
    and ``step_note`` speak of the load step only. For callers that read only the load step
    (the IAE of retuning proposals), at about half the cost.

    Parameters
    ----------
    models : sequence of LoopModel or None
        One per row; None gives a row of NaN.
    policy : Policy
        ``settle_band_pct`` sets the settling band. [%]
    stable : array-like of bool, optional
        As for :func:`step_figures`.

    Returns
    -------
    pandas.DataFrame
        One row per model, columns :data:`STEP_COLUMNS`.
    """
    return _step_frame(models, policy, stable, ("load",))


def _step_todo(models: Sequence[LoopModel | None], stable) -> tuple[list[int], list[str]]:
    """Rows to simulate (a model, not known unstable) and the notes of the rows left out."""
    notes = [""] * len(models)
    stab = None if stable is None else [None if pd.isna(s) else bool(s) for s in stable]
    todo: list[int] = []
    for i, m in enumerate(models):
        if m is None:
            continue
        if stab is not None and stab[i] is False:
            notes[i] = "closed loop unstable: no step figures"
            continue
        todo.append(i)
    return todo, notes


def step_kind_part(ms: Sequence[LoopModel], base: np.ndarray, kind: str, pct: float) -> tuple:
    """One response kind of :func:`step_figures` for the loops ``ms`` (the work of a step stage's process).

    Depends on its arguments alone, so it gives the same figures wherever it runs; the rows'
    notes and columns are filled from it by :func:`_apply_kind_part`, in the order of the kinds.

    Parameters
    ----------
    ms : sequence of LoopModel
        The loops to simulate.
    base : ndarray
        First horizon of each loop, ``HORIZON_FACTOR * characteristic_time``. [s]
    kind : str
        ``load`` or ``setpoint``.
    pct : float
        Settling band. [%]

    Returns
    -------
    tuple
        (loops left out with their messages, indices of the loops simulated, figures of those
        loops by name); the last two are None when no loop could be built.
    """
    batch, errors = build_batch(ms, kind)
    if batch is None:
        return errors, None, None
    okj = np.array([j for j in range(len(ms)) if j not in errors], int)
    horizons = base[okj].copy()
    pending = np.arange(len(okj))
    acc: dict[str, np.ndarray] = {}
    for attempt in range(RERUNS + 1):
        got = _run_kind(batch.take(pending), kind, pct, horizons[pending],
                        N_CAP if attempt == 0 else RERUN_CAP)
        for k, v in got.items():
            acc.setdefault(k, np.zeros(len(okj), v.dtype) if v.dtype == bool
                           else np.full(len(okj), np.nan))[pending] = v
        again = pending[~got["settled"] & ~got["truncated"] & ~got["grows"]]
        if attempt == RERUNS or not len(again):
            break
        horizons[again] *= 4.0
        pending = again
    return errors, okj, acc


def _apply_kind_part(kind: str, part: tuple, todo: list[int], cols: dict[str, np.ndarray], notes: list[str]) -> None:
    """Fill ``cols`` and ``notes`` (all rows) from :func:`step_kind_part` of ``kind`` on the rows ``todo``."""
    errors, okj, acc = part
    for j, msg in errors.items():
        if "no step figures" not in notes[todo[j]]:
            notes[todo[j]] = _note_join([notes[todo[j]], f"no step figures: {msg}"])
    if okj is None:
        return
    rows = np.asarray(todo)[okj]
    label = "load" if kind == "load" else "set-point"
    names = [k for k in acc if k not in ("settled", "grows", "horizon", "truncated")]
    bad = ~acc["settled"] & acc["grows"]
    for k in names:
        cols[k][rows] = np.where(bad, np.nan, acc[k])
    cols["step_horizon_s"][rows] = np.fmax(cols["step_horizon_s"][rows], acc["horizon"])
    for jj in np.flatnonzero(~acc["settled"]):
        i = rows[jj]
        if acc["grows"][jj]:
            notes[i] = _note_join([notes[i], f"{label} response grows: the closed loop looks unstable"])
        else:
            why = " (step count capped by a short dead time)" if acc["truncated"][jj] else ""
            notes[i] = _note_join([notes[i], f"{label} response not settled within "
                                             f"{acc['horizon'][jj]:.4g} s{why}"])
    if kind == "load":
        off = cols["load_offset"][rows]
        for i in rows[np.isfinite(off) & (off != 0.0)]:
            notes[i] = _note_join([notes[i], "no integral action: load offset, IAE and IE unbounded"])
    else:
        for i in rows[~np.isfinite(cols["sp_overshoot_pct"][rows])]:
            if "set-point" not in notes[i]:
                notes[i] = _note_join([notes[i], "no set-point response (zero steady-state gain)"])


def _step_frame(models: Sequence[LoopModel | None], policy: Policy, stable, kinds: tuple[str, ...],
                run_parts=None) -> pd.DataFrame:
    """:func:`step_figures` of the step kinds ``kinds`` (``load``, ``setpoint``).

    ``run_parts(ms, base, kinds, pct)``, when given, returns :func:`step_kind_part` of every kind
    in order (e.g. each kind in its own process); by default they run here, one after the other.
    """
    pct = float(policy.settle_band_pct)
    n = len(models)
    cols = {c: np.full(n, np.nan) for c in STEP_COLUMNS[:-1]}
    todo, notes = _step_todo(models, stable)
    if todo:
        ms = [models[i] for i in todo]
        base = np.array([HORIZON_FACTOR * characteristic_time(m) for m in ms])
        if run_parts is None:
            parts = [step_kind_part(ms, base, kind, pct) for kind in kinds]
        else:
            parts = run_parts(ms, base, kinds, pct)
        for kind, part in zip(kinds, parts):
            _apply_kind_part(kind, part, todo, cols, notes)
    out = pd.DataFrame(cols)
    out["step_note"] = notes
    return out


@dataclass(frozen=True)
class Trace:
    """A step response for plotting.

    Attributes
    ----------
    t : ndarray  Time. [s]
    y : ndarray  PV deviation. [% of PV range per % of step]
    u : ndarray  Controller output as the process sees it. [% of output per % of step]
    kind : str   ``load`` or ``setpoint``.
    note : str   Why the loop could not be simulated ('' when it was; then t, y, u are empty).
    """

    t: np.ndarray
    y: np.ndarray
    u: np.ndarray
    kind: str
    note: str = ""


def _shifted(t: np.ndarray, ym: np.ndarray, yp: np.ndarray, shift: float) -> np.ndarray:
    """Values at t of a signal sampled at t + shift (zero before the shift), right limits."""
    if shift <= 0.0:
        return yp.copy()
    T2 = np.repeat(t + shift, 2)
    Y2 = np.empty(2 * len(t))
    Y2[0::2] = ym
    Y2[1::2] = yp
    T2 = np.concatenate([[0.0], T2])
    Y2 = np.concatenate([[0.0], Y2])
    # right limit: search from the right side of equal times
    idx = np.searchsorted(T2, t, side="right") - 1
    idx = np.clip(idx, 0, len(T2) - 2)
    t0, t1 = T2[idx], T2[idx + 1]
    with np.errstate(invalid="ignore", divide="ignore"):
        fr = np.where(t1 > t0, (t - t0) / (t1 - t0), 0.0)
    return Y2[idx] + np.clip(fr, 0, 1) * (Y2[idx + 1] - Y2[idx])


TRACE_MEMORY = 64e6
"""Bytes of stored responses per simulated block of :func:`step_traces_many`. [B]"""


def step_traces_many(models: Sequence[LoopModel], kind: str,
                     t_end: float | Sequence[float | None] | None = None) -> list[Trace]:
    """Load or set-point step responses of many loops, simulated together, for plots.

    All loops are built into one batch (:func:`build_batch`) and advanced together by
    :func:`simulate`: loops whose step counts fall in the same power-of-two bucket run in
    one block (memory-bounded by :data:`TRACE_MEMORY`), each on its own step ``h``; each
    trace is then cut at its own horizon. A loop's trace does not depend on the other
    loops of the batch (the arithmetic is per loop; regression within 1e-9 of a run alone).

    Parameters
    ----------
    models : sequence of LoopModel
        The loops.
    kind : str
        ``load`` (unit step at the process input) or ``setpoint`` (unit set-point step).
    t_end : float or sequence, optional
        Length of each trace [s]: one value for all, or one per model (None or 0 for
        the default). Default: ``HORIZON_FACTOR * characteristic_time(model)``, the
        horizon of the first attempt of :func:`step_figures`.

    Returns
    -------
    list of Trace
        One per model, in order. A loop that cannot be simulated (e.g. improper
        controller) gives a Trace with empty arrays and the reason in ``note``.

    Raises
    ------
    ValueError
        When ``kind`` is neither ``load`` nor ``setpoint``, or ``t_end`` has the wrong length.
    """
    if kind not in ("load", "setpoint"):
        raise ValueError(f"kind must be 'load' or 'setpoint', got {kind!r}")
    n = len(models)
    ends = list(t_end) if isinstance(t_end, (list, tuple, np.ndarray)) else [t_end] * n
    if len(ends) != n:
        raise ValueError(f"t_end has {len(ends)} values for {n} models")
    empty = np.zeros(0)
    out: list[Trace] = [Trace(empty, empty, empty, kind, "loop cannot be simulated")] * n
    if not n:
        return out
    batch, errors = build_batch(models, kind)
    for i, msg in errors.items():
        out[i] = Trace(empty, empty, empty, kind, msg or "loop cannot be simulated")
    if batch is None:
        return out
    ok = [i for i in range(n) if i not in errors]
    H = np.array([float(ends[i]) if ends[i] else HORIZON_FACTOR * characteristic_time(models[i]) for i in ok])
    plans = plan_batch(batch, H)
    nreq = np.array([p.n_steps for p in plans])
    buckets = 2 ** np.ceil(np.log2(np.maximum(nreq, 1))).astype(int)
    for nb in np.unique(buckets):
        idx = np.flatnonzero(buckets == nb)
        chunk = max(1, int(TRACE_MEMORY // (8.0 * (int(nb) + 1) * 2 * 2)))
        for a in range(0, len(idx), chunk):
            sel = idx[a:a + chunk]
            sub = batch.take(sel)
            steps = int(nreq[sel].max())
            res = simulate_steps(sub, np.array([plans[j].h for j in sel]), steps, outputs=(0, 1))
            for c, j in enumerate(sel):
                p = plans[j]
                t = np.arange(p.n_steps + 1) * p.h
                k = p.n_steps + 1
                y = _shifted(t, res.ym[:k, 0, c], res.yp[:k, 0, c], float(sub.y_shift[c]))
                u = _shifted(t, res.ym[:k, 1, c], res.yp[:k, 1, c], float(sub.u_shift[c]))
                out[ok[j]] = Trace(t, y, u, kind)
    return out


def step_traces(model: LoopModel, kind: str, t_end: float | None = None) -> Trace:
    """The load or set-point step response of one loop, for plots (:func:`step_traces_many` of one).

    Parameters
    ----------
    model : LoopModel
    kind : str
        ``load`` (unit step at the process input) or ``setpoint`` (unit set-point step).
    t_end : float, optional
        Length of the trace. [s] Default: the horizon of the first attempt of
        :func:`step_figures`.

    Raises
    ------
    ValueError
        When the loop cannot be simulated (e.g. improper controller).
    """
    tr = step_traces_many([model], kind, t_end)[0]
    if tr.note:
        raise ValueError(tr.note)
    return tr


def _steps_one_by_one(audit, stable) -> pd.DataFrame:
    """Step figures loop by loop (after a fault of the batch): a loop that raises is marked on its row."""
    from .faults import row_fault
    parts = []
    for i, m in enumerate(audit.models):
        try:
            parts.append(step_figures([m], audit.inventory.policy, None if stable is None else [stable[i]]))
        except Exception as exc:  # noqa: BLE001 - marked on its row, its figures blank
            row_fault(audit, "steps", i, exc)
            parts.append(step_figures([None], audit.inventory.policy))
    return pd.concat(parts, ignore_index=True) if parts else step_figures([], audit.inventory.policy)


def add_step_results(audit) -> None:
    """Pipeline stage: add :data:`STEP_COLUMNS` to ``audit.results`` (rows with a model).

    Uses the ``stable`` column when an earlier stage has added it.

    Parameters
    ----------
    audit : Audit
        The run, with its models built; ``results`` is changed in place. The policy's
        ``settle_band_pct`` [%] and ``options.jobs`` (worker processes) apply.
    """
    res = audit.results
    stable = None
    if "stable" in res.columns:
        stable = [None if pd.isna(v) else bool(v) for v in res["stable"].tolist()]
    from .parallel import step_figures_parallel
    try:
        figs = step_figures_parallel(audit.models, audit.inventory.policy, stable, getattr(audit.options, "jobs", 1))
    except Exception:  # noqa: BLE001 - one loop's fault must not cost the others: each loop alone
        figs = _steps_one_by_one(audit, stable)
    for c in STEP_COLUMNS:
        col = figs[c].to_numpy()
        res[c] = pd.Series(col, index=res.index, dtype=object if c == "step_note" else float)
