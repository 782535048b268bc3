"""Seeded closed-loop simulations for the loop-health validation (a test helper, not a test).

A first-order process with dead time under PI control, sampled every ``ts`` seconds and
simulated exactly: zero-order hold, y[k+1] = a y[k] + K (1 - a) x[k - d] with a = exp(-ts/tau),
the dead time an exact delay line of d whole samples. Many cases run side by side as numpy rows.

Valve stiction follows the two-parameter data-driven model of Choudhury, Thornhill and Shah:
S = deadband + stickband and J = slip jump, both in % of the valve span. As we read the
model's flow chart: the valve sticks when its input comes to rest or reverses, stays where
it is until the input has moved S away from the input at which it stuck, then slips to
u - sign(v) (S - J) / 2 and follows the input at that lag while it keeps moving.

Reference: M. A. A. S. Choudhury, N. F. Thornhill and S. L. Shah, "Modelling valve stiction",
Control Engineering Practice 13 (2005) 641-658, sec. 4 and Fig. 5.

Four classes of cases, as in the issue's validation plan: stiction (well-tuned PI, sticking
valve), aggressive (PI gain raised to a gain margin of 1.1-1.4, linear), sinusoid (well-tuned
PI, external sinusoidal load), noise (well-tuned PI, coloured load noise only). All carry
measurement noise. Two more classes repeat stiction and over-tuning on integrating processes
(levels: k'/s, simulated as K/(tau s + 1) with tau = 1e7 s and K = k' tau). Tuning: SIMC with tau_c = theta (S. Skogestad, "Simple analytic rules for
model reduction and PID controller tuning", J. Process Control 13 (2003) 291-309, eq. (21)-(22)).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

CLASSES = ("stiction", "aggressive", "sinusoid", "noise")
INTEGRATING_CLASSES = ("stiction_integrating", "aggressive_integrating")


@dataclass(frozen=True)
class Cases:
    """Parameters of a batch of loops (one entry per case)."""

    K: np.ndarray        # process gain [-]
    tau: np.ndarray      # time constant [s]
    d: np.ndarray        # dead time in samples [-]
    kc: np.ndarray       # controller gain [-]
    ti: np.ndarray       # integral time [s]
    S: np.ndarray        # stiction deadband + stickband [%]; 0: no stiction
    J: np.ndarray        # slip jump [%]
    sin_amp: np.ndarray  # amplitude of a sinusoid added to the process output [%]
    sin_period: np.ndarray  # its period [s]
    load_sd: np.ndarray  # standard deviation of the coloured load at the process input [%]
    load_tau: np.ndarray  # time constant of that load's first-order filter [s]
    load_bias: np.ndarray  # constant load at the process input [%] (the valve must sit off its start)
    noise_sd: np.ndarray  # measurement noise standard deviation [%]


@dataclass(frozen=True)
class Traces:
    """Simulated records: rows are cases, columns samples (ts apart)."""

    ts: float
    sp: np.ndarray
    pv: np.ndarray
    op: np.ndarray
    valve: np.ndarray


def loop_response(c: Cases, w: np.ndarray, ts: float = 1.0) -> np.ndarray:
    """L(e^{jw ts}) of each case (rows) at frequencies ``w`` [rad/s] (columns), exact."""
    a = np.exp(-ts / c.tau)[:, None]
    zi = np.exp(-1j * np.asarray(w)[None, :] * ts)                 # z^-1
    p = c.K[:, None] * (1 - a) * zi ** (c.d[:, None] + 1) / (1 - a * zi)
    ctrl = c.kc[:, None] * (1 + (ts / c.ti[:, None]) / (1 - zi))
    return ctrl * p


def gain_margin(c: Cases, ts: float = 1.0) -> np.ndarray:
    """Gain margin [-] of each case's sampled loop: 1/abs(L) where its phase first reaches -180 deg."""
    w = np.linspace(1e-4, np.pi / ts, 4000)
    L = loop_response(c, w, ts)
    ph = np.unwrap(np.angle(L), axis=1)
    below = ph <= -np.pi
    k = np.argmax(below, axis=1)
    rows = np.arange(len(k))
    f = (ph[rows, k - 1] + np.pi) / (ph[rows, k - 1] - ph[rows, k])
    mag = np.abs(L[rows, k - 1]) * (1 - f) + np.abs(L[rows, k]) * f
    return 1.0 / mag


def make_cases(cls: str, n: int, seed: int, ts: float = 1.0) -> Cases:
    """``n`` seeded cases of one class (see the module notes)."""
    rng = np.random.default_rng(seed)
    K = rng.uniform(0.5, 2.0, n)
    tau = rng.uniform(5.0, 40.0, n)
    d = rng.integers(1, 6, n)
    theta = (d + 0.5) * ts                     # dead time seen by the tuning (hold adds ts/2)
    kc = tau / (K * 2 * theta)                 # SIMC, tau_c = theta
    ti = np.minimum(tau, 8 * theta)
    z = np.zeros(n)
    S, J, amp, per = z.copy(), z.copy(), z.copy(), np.full(n, np.inf)
    load_sd = rng.uniform(0.2, 1.0, n)
    load_tau = rng.uniform(10.0, 60.0, n)
    noise_sd = rng.uniform(0.05, 0.3, n)
    if cls.endswith("_integrating"):
        # integrating process k'/s as the limit of K/(tau s + 1) with tau >> record, K = k' tau
        kint = rng.uniform(0.02, 0.1, n)                       # [%/s per %]
        tau = np.full(n, 1e7)
        K = kint * tau
        kc = 1.0 / (kint * 2 * theta)                          # SIMC for an integrating process
        ti = 8 * theta
        load_sd = rng.uniform(0.05, 0.2, n)
    if cls == "stiction_integrating":
        S = rng.uniform(2.0, 6.0, n)
        J = S * rng.uniform(0.4, 1.0, n)
    elif cls == "aggressive_integrating":
        base = Cases(K, tau, d, kc, ti, S, J, amp, per, load_sd, load_tau, z, noise_sd)
        kc = kc * gain_margin(base, ts) / rng.uniform(1.03, 1.2, n)
    elif cls == "stiction":
        S = rng.uniform(3.0, 10.0, n) / K        # K S: 3-10 % of PV range
        J = S * rng.uniform(0.4, 1.0, n)
        load_sd = rng.uniform(0.1, 0.5, n)
    elif cls == "aggressive":
        load_sd = rng.uniform(0.5, 3.0, n)
        base = Cases(K, tau, d, kc, ti, S, J, amp, per, load_sd, load_tau, z, noise_sd)
        kc = kc * gain_margin(base, ts) / rng.uniform(1.03, 1.2, n)
    elif cls == "sinusoid":
        per = rng.uniform(30.0, 300.0, n)
        load_sd = rng.uniform(0.1, 0.5, n)
        base = Cases(K, tau, d, kc, ti, S, J, amp, per, load_sd, load_tau, z, noise_sd)
        w = 2 * np.pi / per
        L = np.diagonal(loop_response(base, w, ts))
        amp = rng.uniform(1.0, 4.0, n) / np.abs(1.0 / (1.0 + L))   # error amplitude 1-4 %
    elif cls == "noise":
        load_sd = rng.uniform(0.5, 3.0, n)
    else:
        raise ValueError(cls)
    bias = rng.uniform(1.0, 5.0, n) * rng.choice([-1.0, 1.0], n)
    return Cases(K, tau, d, kc, ti, S, J, amp, per, load_sd, load_tau, bias, noise_sd)


def simulate(c: Cases, n_samples: int, seed: int, ts: float = 1.0) -> Traces:
    """Simulate every case for ``n_samples`` samples (seeded); the first 300 samples are dropped
    as the start-up transient is not routine operation."""
    rng = np.random.default_rng(seed)
    m = c.K.size
    warm = 300
    total = n_samples + warm
    a = np.exp(-ts / c.tau)
    b = c.K * (1 - a)
    dmax = int(c.d.max())
    # load: first-order filtered white noise of the given standard deviation
    al = np.exp(-ts / c.load_tau)
    w = rng.standard_normal((m, total)) * (c.load_sd * np.sqrt(1 - al ** 2))[:, None]
    noise = rng.standard_normal((m, total)) * c.noise_sd[:, None]
    phase = rng.uniform(0, 2 * np.pi, m)
    tt = np.arange(total) * ts
    sinus = c.sin_amp[:, None] * np.sin(2 * np.pi * tt[None, :] / c.sin_period[:, None] + phase[:, None])
    line = np.zeros((m, dmax + 1))              # exact delay line of valve positions
    rows = np.arange(m)
    y = np.zeros(m)
    load = np.zeros(m)
    integ = np.zeros(m)
    x = np.zeros(m)                              # valve position (deviation) [%]
    u_prev = np.zeros(m)
    v_old = np.zeros(m)
    stuck = np.ones(m, dtype=bool)
    u_stuck = np.zeros(m)
    has_st = c.S > 0
    half = (c.S - c.J) / 2
    pv = np.empty((m, n_samples)); op = np.empty((m, n_samples)); xv = np.empty((m, n_samples))
    ki = c.kc * ts / c.ti
    for k in range(total):
        meas = y + sinus[:, k] + noise[:, k]
        e = -meas
        integ = integ + ki * e
        u = np.clip(c.kc * e + integ, -50.0, 50.0)
        integ = u - c.kc * e                    # back-calculation at the limits
        # stiction (Choudhury, Thornhill and Shah 2005)
        v = np.sign(u - u_prev)
        stop = (v == 0) | (v != v_old)
        newly = stop & ~stuck
        u_stuck = np.where(newly, u_prev, u_stuck)
        stuck = stuck | newly
        slip = stuck & (np.abs(u - u_stuck) > c.S)
        moving = ~stuck | slip
        x_st = np.where(moving & (v != 0), u - v * half, x)
        stuck = stuck & ~slip
        x = np.where(has_st, x_st, u)
        v_old = np.where(v != 0, v, v_old)
        u_prev = u
        line[:, k % (dmax + 1)] = x
        delayed = line[rows, (k - c.d) % (dmax + 1)]
        load = al * load + w[:, k]
        y = a * y + b * (delayed + load + c.load_bias)
        if k >= warm:
            j = k - warm
            pv[:, j] = 50.0 + meas; op[:, j] = 50.0 + u; xv[:, j] = 50.0 + x
    return Traces(ts, np.full_like(pv, 50.0), pv, op, xv)
