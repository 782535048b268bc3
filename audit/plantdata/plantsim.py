"""Closed-loop simulation of many loops side by side: each its own model and tuning, exact dead time.

Used by :mod:`audit.generate_data` to write synthetic historian exports. All loops of a batch
are advanced together in lockstep, one logged sample at a time, as numpy rows (vectorised across
loops; each step a fixed set of in-place numpy operations on preallocated arrays, so its Python
cost is paid once for the whole batch). Each loop steps at its own rate: ``steps`` simulation
steps per logged sample (its controller's rate, see below); the loops are held in order of
decreasing ``steps``, so that the loops that take their q-th step within a sample are a leading
slice of the batch (views, no copies).

Process
-------
The row's model (fopdt, sopdt with its lead, ipdt with its lag) as a sum of first-order modes
(:func:`audit.plantdata.modelcheck.row_modes`), each discretised exactly for an input held
between samples (zero-order hold), with the dead time theta = d ts + f (d whole samples,
0 <= f < ts) applied exactly by a delay line and the modified z-transform [1]_:

    x[k+1] = a x[k] + (1 - e^{-(ts - f)/tau}) u[k-d] + (e^{-(ts - f)/tau} - a) u[k-d-1],  a = e^{-ts/tau}

and for the integrating mode x[k+1] = x[k] + (ts - f) u[k-d] + f u[k-d-1]. A static share (the
part of a lead that passes at once) is held for one sample.

Controller
----------
The row's PID in ideal form (series and parallel settings converted), executing at the row's
own sample time (rounded to the loop's simulation step; every step when blank): proportional and
integral on the error, derivative on the measurement through the row's filter alpha td, output
limited to 0..100 % with back-calculation of the integral (and tracking in manual, so the return
to automatic is bumpless), held between executions. Each loop's process is advanced in its own
``steps`` steps per logged sample (:func:`substeps_for` of the row alone) so that a fast
controller runs at its own rate; the PV filter is not simulated. Logged values are the
measurement and output at each logged sample. Inputs (set point, load, noise, manual) change
at the logged samples only.

The delay line is a ring buffer of d + 1 places per loop, all loops in one flat array (a few
MB at most): at each step the valve position (plus load) goes in at the loop's slot and the
value put in d steps earlier comes out; the one before it (u[k-d-1]) is the previous step's.

Valve
-----
Stiction by the two-parameter data-driven model of Choudhury, Thornhill and Shah [2]_:
S = deadband + stickband and J = slip jump in % of the valve span. The valve sticks when its
input comes to rest or reverses, stays until the input has moved S from where it stuck, then
slips to u - sign(v) (S - J)/2 and follows at that lag while the input keeps moving.

References
----------
.. [1] K. J. Astrom and B. Wittenmark, Computer-Controlled Systems, 3rd ed., 1997, sec. 2.3
   (sampling a system with a time delay).
.. [2] M. A. A. S. Choudhury, N. F. Thornhill and S. L. Shah, "Modelling valve stiction",
   Control Engineering Practice 13 (2005) 641-658, sec. 4 and Fig. 5.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..loop import parallel_to_ideal, series_to_ideal
from .modelcheck import row_modes

#: Most first-order modes of one loop's model. [-]
MAX_MODES = 3


@dataclass(frozen=True)
class PlantArrays:
    """Discretised processes and controllers of a batch of loops (one entry per loop).

    Attributes
    ----------
    ts : float
        Logged sample interval. [s]
    substeps : int
        Most simulation steps per logged sample of any loop. [-]
    every : ndarray of int
        Steps between executions of each controller. [-]
    a, b1, b2, c : ndarray
        Per loop and mode: pole, the two input weights and the output weight (gain times the
        mode's share; [1/s] for the integrating mode). [-]
    d : ndarray of int
        Whole samples of dead time. [-]
    kc, ti, td, alpha : ndarray
        Ideal-form PID: gain [-], integral time [s] (inf: none), derivative time [s], filter factor [-].
    sign : ndarray
        +1 for reverse action on a positive process gain, -1 otherwise. [-]
    steps : ndarray of int
        Simulation steps per logged sample of each loop (its step h = ts / steps). [-]
    """

    ts: float
    substeps: int
    every: np.ndarray
    a: np.ndarray
    b1: np.ndarray
    b2: np.ndarray
    c: np.ndarray
    d: np.ndarray
    kc: np.ndarray
    ti: np.ndarray
    td: np.ndarray
    alpha: np.ndarray
    sign: np.ndarray
    steps: np.ndarray = None


def ideal_settings(row) -> tuple[float, float, float]:
    """The row's controller as ideal-form (kc [-], ti [s] (inf: none), td [s]).

    Parameters
    ----------
    row : audit.rows.LoopRow
        A valid row.
    """
    if row.form == "parallel":
        kc, ti, td = parallel_to_ideal(row.kp or 0.0, row.ki or 0.0, row.kd or 0.0)
    elif row.form == "series" and row.ti and row.td:
        kc, ti, td = series_to_ideal(row.kc, row.ti, row.td)
    else:
        kc, ti, td = row.kc or 0.0, row.ti, row.td or 0.0
    return float(kc), float(ti) if ti else math.inf, float(td or 0.0)


def substeps_for(rows, ts: float, most: int = 10) -> int:
    """Simulation steps per logged sample so that the fastest controller runs at its own rate.

    Parameters
    ----------
    rows : sequence of audit.rows.LoopRow
        The batch.
    ts : float
        Logged sample interval. [s]
    most : int
        At most this many. [-]
    """
    fastest = min((float(r.sample) for r in rows if r.sample), default=ts)
    return int(min(max(math.ceil(ts / fastest - 1e-9), 1), most))


def discretise(rows, ts: float, dead_times=None, substeps=1) -> PlantArrays:
    """Exact zero-order-hold discretisation of each row's model and its controller.

    Parameters
    ----------
    rows : sequence of audit.rows.LoopRow
        Valid fopdt, sopdt or ipdt rows.
    ts : float
        Sample interval. [s]
    dead_times : sequence of float, optional
        Dead time simulated per row (default: the row's own). [s]
    substeps : int or sequence of int
        Simulation steps per logged sample, for all rows or per row. [-]

    Returns
    -------
    PlantArrays
    """
    n = len(rows)
    a = np.zeros((n, MAX_MODES))
    b1 = np.zeros((n, MAX_MODES))
    b2 = np.zeros((n, MAX_MODES))
    c = np.zeros((n, MAX_MODES))
    d = np.zeros(n, dtype=np.int64)
    kc, ti, td, alpha, sign = (np.zeros(n) for _ in range(5))
    every = np.ones(n, dtype=np.int64)
    steps = np.broadcast_to(np.asarray(substeps, dtype=np.int64), (n,)).copy()
    ts_log = ts
    for i, row in enumerate(rows):
        h = ts = ts_log / steps[i]
        every[i] = max(1, int(round(float(row.sample) / h))) if row.sample else 1
        theta = float(row.dead_time or 0.0) if dead_times is None else float(dead_times[i])
        d[i] = int(math.floor(theta / ts + 1e-9))
        f = max(theta - d[i] * ts, 0.0)
        for j, (tau, w) in enumerate(row_modes(row)[:MAX_MODES]):
            c[i, j] = float(row.gain) * w
            if math.isinf(tau):
                a[i, j], b1[i, j], b2[i, j] = 1.0, ts - f, f
            elif tau <= 0.0:
                a[i, j], b1[i, j], b2[i, j] = 0.0, 1.0, 0.0
            else:
                a[i, j] = math.exp(-ts / tau)
                e = math.exp(-(ts - f) / tau)
                b1[i, j], b2[i, j] = 1.0 - e, e - a[i, j]
        kc[i], ti[i], td[i] = ideal_settings(row)
        alpha[i] = float(row.d_filter or 0.1)
        sign[i] = 1.0 if float(row.gain) > 0 else -1.0
    return PlantArrays(ts_log, int(steps.max(initial=1)), every, a, b1, b2, c, d, kc, ti, td, alpha, sign, steps)


@dataclass
class LoopState:
    """What a batch of loops carries from one sample to the next (and from one chunk to the next).

    Attributes
    ----------
    x : ndarray
        Each mode's share of the measurement (the mode's state times its output weight), modes x loops. [% of range]
    line : ndarray
        Delay lines of the valve position plus load (deviation), d + 1 places a loop, loop after loop. [%]
    k : int
        Samples simulated so far. [-]
    integ : ndarray
        Integral part (with the bias) of each controller. [%]
    dfilt : ndarray
        Filtered derivative part. [%]
    meas_prev : ndarray
        Measurement at the controller's last execution (kept where td > 0). [%]
    valve : ndarray
        Valve position. [%]
    u_prev, v_old, u_stuck : ndarray
        Stiction model state: previous input, last direction, input where the valve stuck. [%], [-], [%]
    stuck : ndarray of bool
        Valve stuck.
    u_out : ndarray
        Controller output held since its last execution. [%]
    late : ndarray, optional
        What the delay line's previous output u[k-d-1] adds at the next step, b2 u[k-d-1] times the
        output weight, modes x loops. [% of range]
    """

    x: np.ndarray
    line: np.ndarray
    k: int
    integ: np.ndarray
    dfilt: np.ndarray
    meas_prev: np.ndarray
    valve: np.ndarray
    u_prev: np.ndarray
    v_old: np.ndarray
    u_stuck: np.ndarray
    stuck: np.ndarray
    u_out: np.ndarray
    late: np.ndarray = None


def start_state(p: PlantArrays, op0: np.ndarray, sp0: np.ndarray) -> LoopState:
    """Every loop at rest at its operating point.

    Parameters
    ----------
    p : PlantArrays
        The batch.
    op0 : ndarray
        Output at rest. [%]
    sp0 : ndarray
        Set point at rest (the measurement starts there). [% of range]
    """
    n = len(op0)
    width = int(np.sum(p.d + 1))
    return LoopState(np.zeros((MAX_MODES, n)), np.zeros(width), 0, op0.astype(float).copy(), np.zeros(n),
                     sp0.astype(float).copy(), op0.astype(float).copy(), op0.astype(float).copy(), np.zeros(n),
                     op0.astype(float).copy(), np.ones(n, dtype=bool), op0.astype(float).copy(),
                     np.zeros((MAX_MODES, n)))


def _stick(u, S, half, u_prev, v_old, u_stuck, stuck, valve) -> None:
    """One step of the stiction model on arrays updated in place (``valve`` is the result).

    ``half`` is (S - J) / 2. Every loop given here has S > 0. The valve sticks when the input
    comes to rest or reverses (v v_old <= 0 for directions in {-1, 0, 1}).
    """
    v = np.sign(u - u_prev)
    mv = v != 0
    newly = np.less_equal(v * v_old, 0.0) > stuck             # comes to rest or reverses, not stuck yet
    np.copyto(u_stuck, u_prev, where=newly)
    stuck |= newly
    slip = np.abs(u - u_stuck) > S
    slip &= stuck
    still = stuck > slip                                       # stuck and does not slip
    np.copyto(valve, u - v * half, where=mv > still)           # moving (free or slipping) in a direction
    np.copyto(stuck, still)
    np.copyto(v_old, v, where=mv)
    np.copyto(u_prev, u)


def stiction(u: np.ndarray, st: LoopState, S: np.ndarray, J: np.ndarray) -> np.ndarray:
    """Valve position for controller outputs ``u`` by the two-parameter stiction model (see module notes).

    Parameters
    ----------
    u : ndarray
        Controller output this sample. [%]
    st : LoopState
        Valve state, updated in place.
    S, J : ndarray
        Deadband plus stickband and slip jump; S = 0: no stiction (the valve follows). [%]

    Returns
    -------
    ndarray
        Valve position. [%]
    """
    u = np.asarray(u, dtype=float)
    st.u_prev, st.v_old, st.u_stuck = (np.array(v, dtype=float) for v in (st.u_prev, st.v_old, st.u_stuck))
    st.stuck, st.valve = np.array(st.stuck, dtype=bool), np.array(st.valve, dtype=float)
    _stick(u, S, (S - J) / 2, st.u_prev, st.v_old, st.u_stuck, st.stuck, st.valve)
    st.valve = np.where(S > 0, st.valve, u)
    return st.valve


def advance(p: PlantArrays, st: LoopState, base: np.ndarray, sp: np.ndarray, lj: np.ndarray, manual: np.ndarray,
            op_hand: np.ndarray, S: np.ndarray, J: np.ndarray, pv: np.ndarray | None = None,
            op: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Advance every loop over one chunk of logged samples (inputs samples x loops, time first).

    The loops must be in order of decreasing ``p.steps``.

    Parameters
    ----------
    p : PlantArrays
        The batch.
    st : LoopState
        Its state, advanced in place.
    base : ndarray
        Operating point of the measurement plus what is added to it (noise, outside disturbances). [% of range]
    sp : ndarray
        Set points. [% of range]
    lj : ndarray
        Load at the process input less the operating output (deviation added to the valve position). [%]
    manual : ndarray of bool
        True where the loop is in manual.
    op_hand : ndarray
        The operator's output in manual. [%]
    S, J : ndarray
        Valve stiction per loop (0: none). [%]
    pv, op : ndarray, optional
        Where to write the logged measurement [% of range] and output [%] (samples x loops).

    Returns
    -------
    (ndarray, ndarray)
        Measurement [% of range] and controller output [%], samples x loops.
    """
    T, n = sp.shape
    steps = p.steps if p.steps is not None else np.full(n, p.substeps, dtype=np.int64)
    if np.any(np.diff(steps) > 0):
        raise ValueError("loops must be in order of decreasing steps per sample")
    pv = np.empty((T, n)) if pv is None else pv
    op = np.empty((T, n)) if op is None else op
    if n == 0 or T == 0:
        return pv, op
    smax = int(steps[0])
    h = p.ts / steps
    tc = p.every * h                                        # each controller's execution period [s]
    fin = np.isfinite(p.ti)
    ki = np.where(fin, p.kc * tc / np.where(fin, p.ti, 1.0), 0.0)
    den = p.alpha * p.td + tc
    dfa = np.where(p.td > 0, p.alpha * p.td / den, 0.0)
    sdf = p.sign * np.where(p.td > 0, p.kc * p.td / den, 0.0)
    ks, kis = p.sign * p.kc, p.sign * ki
    gate = manual | (ki > 0)[None, :]                         # back-calculation (anti-windup) and tracking
    used = np.flatnonzero(np.any(p.c != 0, axis=0))
    m = int(used[-1]) + 1 if len(used) else 1
    A = np.ascontiguousarray(p.a[:, :m].T)
    B1 = np.ascontiguousarray((p.c * p.b1)[:, :m].T)
    B2 = np.ascontiguousarray((p.c * p.b2)[:, :m].T)
    X = np.ascontiguousarray(st.x[:m])
    width = p.d + 1
    off = np.concatenate([[0], np.cumsum(width)[:-1]]).astype(np.int64)
    line = st.line
    P = np.zeros((m, n)) if st.late is None else np.ascontiguousarray(st.late[:m])   # b2 u[k-d-1] (weighted)
    lo, hi = np.zeros(n), np.full(n, 100.0)
    sid = np.flatnonzero(S > 0)
    s_S, s_half = S[sid], (S[sid] - J[sid]) / 2
    s_prev, s_vold, s_ust = st.u_prev[sid].astype(float), st.v_old[sid].astype(float), st.u_stuck[sid].astype(float)
    s_stuck, s_valve = st.stuck[sid].astype(bool), st.valve[sid].astype(float)
    u, integ, dfilt, mprev = st.u_out, st.integ, st.dfilt, st.meas_prev
    kk = st.k + np.arange(T, dtype=np.int64)[:, None]
    views = []
    for q in range(smax):
        nq = int(np.count_nonzero(steps > q))
        kq = kk * steps[:nq] + q                                # each loop's own step count
        wq, rq = off[:nq] + kq % width[:nq], off[:nq] + (kq + 1) % width[:nq]
        ev = p.every[:nq]
        run = (kq % ev == 0) if np.any(ev > 1) else None
        ms = int(np.count_nonzero(sid < nq))
        used = np.flatnonzero(np.any(p.c[:nq] != 0, axis=0))
        mq = int(used[-1]) + 1 if len(used) else 1
        flags = (q == 0, mq, bool(np.any(p.td[:nq] > 0)), bool(manual[:, :nq].any()), not bool(gate[:, :nq].all()),
                 run is not None, ms)
        views.append((flags, wq, rq, run, X[:mq, :nq], A[:mq, :nq], B1[:mq, :nq], B2[:mq, :nq], np.empty((mq, nq)),
                      np.empty((7, nq)), ks[:nq], kis[:nq], dfa[:nq], sdf[:nq], u[:nq], integ[:nq], dfilt[:nq],
                      mprev[:nq], P[:mq, :nq], lo[:nq], hi[:nq], sid[:ms], slice(0, nq)))
    for j in range(T):
        bj, spj, ljj, mj, hj, gj = base[j], sp[j], lj[j], manual[j], op_hand[j], gate[j]
        for ((first, mq, td_q, man_q, gate_q, gated, ms), wq, rq, run, Xq, Aq, B1q, B2q, TM, tmp, ksq, kisq, dfaq,
             sdfq, uq, iq, dq, mpq, Pq, loq, hiq, sq, cut) in views:
            if first:                                          # the logged sample: every loop takes this step
                meas, bq, spq, lq = pv[j], bj, spj, ljj
            else:
                meas, bq, spq, lq = tmp[0], bj[cut], spj[cut], ljj[cut]
            r, prop, t1 = tmp[1], tmp[2], tmp[3]
            # measurement
            if mq == 1:
                np.add(bq, Xq[0], out=meas)
            else:
                np.add(Xq[0], Xq[1], out=meas)
                for i in range(2, mq):
                    np.add(meas, Xq[i], out=meas)
                np.add(bq, meas, out=meas)
            # controller
            iN, dN, uN = (tmp[4], tmp[5], tmp[6]) if gated else (iq, dq, uq)
            np.subtract(spq, meas, out=r)
            np.multiply(ksq, r, out=prop)
            np.multiply(kisq, r, out=t1)
            np.add(iq, t1, out=iN)
            np.add(prop, iN, out=uN)
            if td_q:
                np.subtract(meas, mpq, out=t1)
                np.multiply(sdfq, t1, out=t1)
                np.multiply(dfaq, dq, out=dN)
                np.subtract(dN, t1, out=dN)
                np.add(uN, dN, out=uN)
            np.maximum(uN, loq, out=uN)
            np.minimum(uN, hiq, out=uN)
            if man_q:
                np.copyto(uN, hj if first else hj[cut], where=mj if first else mj[cut])
            # back-calculation of the integral (anti-windup), tracking in manual
            if gate_q:
                np.subtract(uN, prop, out=t1)
                if td_q:
                    np.subtract(t1, dN, out=t1)
                np.copyto(iN, t1, where=gj if first else gj[cut])
            else:
                np.subtract(uN, prop, out=iN)
                if td_q:
                    np.subtract(iN, dN, out=iN)
            if gated:
                rj = run[j]
                np.copyto(uq, uN, where=rj)
                np.copyto(iq, iN, where=rj)
                if td_q:
                    np.copyto(dq, dN, where=rj)
                    np.copyto(mpq, meas, where=rj)
            elif td_q:
                np.copyto(mpq, meas)
            if first:
                np.copyto(op[j], uq)
            # the valve, then the delay line
            np.add(uq, lq, out=t1)
            if ms:
                _stick(uq[sq], s_S[:ms], s_half[:ms], s_prev[:ms], s_vold[:ms], s_ust[:ms], s_stuck[:ms],
                       s_valve[:ms])
                t1[sq] = s_valve[:ms] + lq[sq]
            line[wq[j]] = t1
            u1 = line[rq[j]]                                   # u[k-d]
            # process: x = a x + b2 u[k-d-1] + b1 u[k-d]
            np.multiply(Aq, Xq, out=Xq)
            np.add(Xq, Pq, out=Xq)
            np.multiply(B1q, u1, out=TM)
            np.add(Xq, TM, out=Xq)
            np.multiply(B2q, u1, out=Pq)
    st.x[:m] = X
    st.k += T
    st.late = np.zeros((MAX_MODES, n))
    st.late[:m] = P
    st.u_prev[sid], st.v_old[sid], st.u_stuck[sid], st.stuck[sid], st.valve[sid] = (s_prev, s_vold, s_ust, s_stuck,
                                                                                      s_valve)
    return pv, op


def run_chunk(p: PlantArrays, st: LoopState, sp: np.ndarray, noise: np.ndarray, load: np.ndarray,
              manual: np.ndarray, op_hand: np.ndarray, op0: np.ndarray, sp0: np.ndarray, S: np.ndarray,
              J: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Advance every loop over one chunk of samples (loops x samples inputs; see :func:`advance`).

    Parameters
    ----------
    p : PlantArrays
        The batch (loops in order of decreasing steps per sample).
    st : LoopState
        Its state, advanced in place.
    sp : ndarray
        Set points. [% of range]
    noise : ndarray
        What is added to the measurement (noise, outside disturbances). [% of range]
    load : ndarray
        Load at the process input. [%]
    manual : ndarray of bool
        True where the loop is in manual.
    op_hand : ndarray
        The operator's output in manual. [%]
    op0, sp0 : ndarray
        Operating point: output and measurement at rest. [%], [% of range]
    S, J : ndarray
        Valve stiction (0: none). [%]

    Returns
    -------
    (ndarray, ndarray)
        Measurement [% of range] and controller output [%], loops x samples.
    """
    f = lambda v: np.ascontiguousarray(np.asarray(v).T)  # noqa: E731
    pv, op = advance(p, st, f(sp0[:, None] + noise), f(sp), f(load - op0[:, None]), f(np.asarray(manual, bool)),
                     f(op_hand), np.asarray(S, float), np.asarray(J, float))
    return pv.T.copy(), op.T.copy()
