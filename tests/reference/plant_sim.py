"""An independent plant simulator for identification tests (not the code under test).

The continuous process is discretised with :func:`scipy.signal.cont2discrete` (zero-order
hold) on a grid ``fine`` times finer than the logging interval; the dead time is a delay
line of whole fine steps (so it must be a multiple of dt/fine); the logged op is held
between log samples. Closed loops use a discrete PI controller executing at each log
sample. Nothing here is shared with audit.plantdata.identify.
"""

from __future__ import annotations

import numpy as np
from scipy import signal


def tf_of(model: str, p: dict) -> tuple[list, list]:
    """Numerator and denominator (descending powers of s) of a model in the identify naming."""
    if model == "fopdt":
        return [p["gain"]], [p["tau1"], 1.0]
    if model == "sopdt":
        return [p["gain"] * p["tau_lead"], p["gain"]], list(np.polymul([p["tau1"], 1.0], [p["tau2"], 1.0]))
    return [p["gain"]], [1.0, 0.0]


def open_loop(model: str, p: dict, op: np.ndarray, dt: float, fine: int = 20) -> np.ndarray:
    """pv deviation (no bias) for a held op, exact for dead times on the fine grid."""
    num, den = tf_of(model, p)
    h = dt / fine
    uf = np.repeat(op - op[0], fine)
    d = int(round(p["dead_time"] / h))
    assert abs(d * h - p["dead_time"]) < 1e-9 * max(1.0, p["dead_time"]), "dead time must lie on the fine grid"
    ud = np.concatenate([np.zeros(d), uf[:len(uf) - d]])
    b, a, _ = signal.cont2discrete((num, den), h, method="zoh")
    return signal.lfilter(np.squeeze(b), a, ud)[::fine]


def closed_loop(model: str, p: dict, sp: np.ndarray, dt: float, kc: float, ti: float, op0: float = 50.0,
                noise: np.ndarray | None = None, fine: int = 10) -> tuple[np.ndarray, np.ndarray]:
    """(op, pv deviation) of a PI loop (velocity form, executing every dt) on the exact plant."""
    num, den = tf_of(model, p)
    h = dt / fine
    A, B, C, D, _ = signal.cont2discrete(signal.tf2ss(num, den), h, method="zoh")
    d = int(round(p["dead_time"] / h))
    n = len(sp)
    x = np.zeros((A.shape[0], 1))
    line = np.zeros(d + 1)
    op = np.zeros(n)
    pv = np.zeros(n)
    u = op0
    e_prev = 0.0
    v = 0.0
    for k in range(n):
        y = float((C @ x).item()) + (noise[k] if noise is not None else 0.0)
        pv[k] = y
        e = sp[k] - y
        u = u + kc * (e - e_prev + dt / ti * e)
        u = min(max(u, 0.0), 100.0)
        e_prev = e
        op[k] = u
        for _ in range(fine):
            line = np.roll(line, 1)
            line[0] = u - op0
            v = line[d]
            x = A @ x + B * v
    return op, pv
