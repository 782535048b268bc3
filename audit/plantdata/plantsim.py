"""Closed-loop simulation of many loops side by side: each its own model and tuning, exact dead time.

Used by :mod:`audit.generate_data` to write synthetic historian exports. Every loop is advanced
one sample at a time, all loops of a batch together as numpy rows (vectorised across loops).

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
own sample time (rounded to the simulation step; every step when blank): proportional and
integral on the error, derivative on the measurement through the row's filter alpha td, output
limited to 0..100 % with back-calculation of the integral (and tracking in manual, so the return
to automatic is bumpless), held between executions. The process is advanced in ``substeps``
steps per logged sample so that a fast controller runs at its own rate; the PV filter is not
simulated. Logged values are the measurement and output at each logged sample.

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
        Simulation steps per logged sample (step h = ts / substeps). [-]
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


def discretise(rows, ts: float, dead_times=None, substeps: int = 1) -> PlantArrays:
    """Exact zero-order-hold discretisation of each row's model and its controller.

    Parameters
    ----------
    rows : sequence of audit.rows.LoopRow
        Valid fopdt, sopdt or ipdt rows.
    ts : float
        Sample interval. [s]
    dead_times : sequence of float, optional
        Dead time simulated per row (default: the row's own). [s]
    substeps : int
        Simulation steps per logged sample. [-]

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
    h = ts / substeps
    ts_log = ts
    ts = h
    for i, row in enumerate(rows):
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
    return PlantArrays(ts_log, substeps, every, a, b1, b2, c, d, kc, ti, td, alpha, sign)


@dataclass
class LoopState:
    """What a batch of loops carries from one sample to the next (and from one chunk to the next).

    Attributes
    ----------
    x : ndarray
        Mode states, loops x modes.
    line : ndarray
        Delay line of the valve position (deviation), loops x (max dead time + 2 samples).
    k : int
        Samples simulated so far. [-]
    integ : ndarray
        Integral part (with the bias) of each controller. [%]
    dfilt : ndarray
        Filtered derivative part. [%]
    meas_prev : ndarray
        Previous measurement. [%]
    valve : ndarray
        Valve position. [%]
    u_prev, v_old, u_stuck : ndarray
        Stiction model state: previous input, last direction, input where the valve stuck. [%], [-], [%]
    stuck : ndarray of bool
        Valve stuck.
    u_out : ndarray
        Controller output held since its last execution. [%]
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
    width = int(p.d.max(initial=0)) + 2
    return LoopState(np.zeros((n, MAX_MODES)), np.zeros((n, width)), 0, op0.astype(float).copy(), np.zeros(n),
                     sp0.astype(float).copy(), op0.astype(float).copy(), op0.astype(float).copy(), np.zeros(n),
                     op0.astype(float).copy(), np.ones(n, dtype=bool), op0.astype(float).copy())


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
    v = np.sign(u - st.u_prev)
    stop = (v == 0) | (v != st.v_old)
    newly = stop & ~st.stuck
    st.u_stuck = np.where(newly, st.u_prev, st.u_stuck)
    st.stuck = st.stuck | newly
    slip = st.stuck & (np.abs(u - st.u_stuck) > S)
    moving = ~st.stuck | slip
    x = np.where(moving & (v != 0), u - v * (S - J) / 2, st.valve)
    st.stuck = st.stuck & ~slip
    x = np.where(S > 0, x, u)
    st.v_old = np.where(v != 0, v, st.v_old)
    st.u_prev = u
    st.valve = x
    return x


def run_chunk(p: PlantArrays, st: LoopState, sp: np.ndarray, noise: np.ndarray, load: np.ndarray,
              manual: np.ndarray, op_hand: np.ndarray, op0: np.ndarray, sp0: np.ndarray, S: np.ndarray,
              J: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Advance every loop over one chunk of samples (loops x samples inputs).

    Parameters
    ----------
    p : PlantArrays
        The batch.
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
    n, T = sp.shape
    pv = np.empty((n, T))
    op = np.empty((n, T))
    rows = np.arange(n)
    width = st.line.shape[1]
    tc = p.every * (p.ts / p.substeps)                       # each controller's execution period [s]
    fin = np.isfinite(p.ti)
    ki = np.where(fin, p.kc * tc / np.where(fin, p.ti, 1.0), 0.0)
    den = p.alpha * p.td + tc
    df_a = np.where(p.td > 0, p.alpha * p.td / den, 0.0)
    df_b = np.where(p.td > 0, p.kc * p.td / den, 0.0)
    has_i = ki > 0
    any_st = bool(np.any(S > 0))
    any_d = bool(np.any(p.td > 0))
    any_man = bool(manual.any())
    all_run = bool(np.all(p.every == 1))
    simple_i = bool(np.all(has_i)) and not any_man            # back-calculation alone
    m = max(1, int(np.max(np.count_nonzero(p.c, axis=1), initial=1)))   # modes in use
    x, line = st.x[:, :m], st.line
    c, a, b1, b2 = p.c[:, :m], p.a[:, :m], p.b1[:, :m], p.b2[:, :m]
    sdf = p.sign * df_b
    sign, kc = p.sign, p.kc
    u = st.u_out
    dfilt = st.dfilt
    for j in range(T):
        man = manual[:, j]
        hand = op_hand[:, j]
        spj = sp[:, j]
        base = sp0 + noise[:, j]
        lj = load[:, j] - op0
        for sub in range(p.substeps):
            k = st.k
            meas = base + (x[:, 0] * c[:, 0] if m == 1 else (x * c).sum(axis=1))
            if sub == 0:
                pv[:, j] = meas
            e = sign * (spj - meas)
            prop = kc * e
            if any_d:
                dfilt = df_a * st.dfilt - sdf * (meas - st.meas_prev)
            integ = st.integ + ki * e
            un = np.minimum(np.maximum(prop + integ + dfilt, 0.0), 100.0)
            if any_man:
                un = np.where(man, hand, un)
            if simple_i:
                integ = un - prop - dfilt
            else:
                integ = np.where(has_i | man, un - prop - dfilt, integ)   # back-calculation and tracking
            if all_run:
                u, st.integ, st.dfilt, st.meas_prev = un, integ, dfilt, meas
            else:
                run = (k % p.every) == 0
                u = np.where(run, un, u)
                st.integ = np.where(run, integ, st.integ)
                st.dfilt = np.where(run, dfilt, st.dfilt)
                st.meas_prev = np.where(run, meas, st.meas_prev)
            if sub == 0:
                op[:, j] = u
            xv = stiction(u, st, S, J) if any_st else u
            line[:, k % width] = xv + lj
            u1 = line[rows, (k - p.d) % width]
            u2 = line[rows, (k - p.d - 1) % width]
            x = a * x + b1 * u1[:, None] + b2 * u2[:, None]
            st.k = k + 1
    full = np.zeros_like(st.x)
    full[:, :m] = x
    x = full
    st.x = x
    st.u_out = u
    return pv, op
