"""Independent reference for group stability: python-control state-space models, Pade delays.

The group is built as the plant has it: one SISO system per controller (sign C_j times an
order-``order`` Pade approximation of its half-sample delay), one per process element g_ij
(rational part times a Pade approximation of its dead time), one per PV filter, each from
``control.tf`` and ``control.pade`` and realised with ``control.tf2ss``. The subsystems are stacked
block-diagonally (``control.ss``) and closed by ``control.feedback`` with the static interconnection matrix
(controller j reads minus filter j's output; element (i, j) reads controller j; filter i reads
the sum of row i). The closed-loop poles are the eigenvalues of the result; their count in the
right half-plane is compared with the generalised Nyquist verdict. Not used by the tool.
"""

from __future__ import annotations

import control
import numpy as np
import scipy.linalg

from audit.loop import lag
from audit.multiloop.figures import GroupModel


def _ss(num, den, delay: float, order: int):
    sys = control.tf(list(num), list(den))
    if delay > 0:
        pn, pd = control.pade(delay, order)
        sys = sys * control.tf(pn, pd)
    return control.tf2ss(sys)


def closed_loop_poles(group: GroupModel, order: int = 10, gain: float = 1.0) -> np.ndarray:
    """Closed-loop poles of the group with Pade delays (python-control).

    Parameters
    ----------
    group : GroupModel
        A group without cascades (inner loops are not modelled here).
    order : int
        Pade order of every delay. [-]
    gain : float
        Factor on every loop's controller (for the distance-to-boundary rule). [-]

    Returns
    -------
    ndarray
        Closed-loop poles. [rad/s]
    """
    n = group.size
    subs = []          # (ss, kind, index): kind c (controller j), g (element (i, j)), f (filter i)
    for j, m in enumerate(group.loops):
        assert m.inner is None
        c = m.controller.rational.scale(m.sign * gain)
        subs.append((_ss(c.num, c.den, 0.5 * m.sample, order), "c", j))
    for i, m in enumerate(group.loops):
        for j in range(n):
            p = m.process if i == j else group.couplings.get((i, j))
            if p is not None:
                subs.append((_ss(p.rational.num, p.rational.den, p.dead_time, order), "g", (i, j)))
    for i, m in enumerate(group.loops):
        f = lag(m.pv_filter)
        subs.append((_ss(f.num, f.den, 0.0, order), "f", i))
    A = scipy.linalg.block_diag(*[np.asarray(x.A) for x, _, _ in subs])
    B = scipy.linalg.block_diag(*[np.asarray(x.B) for x, _, _ in subs])
    C = scipy.linalg.block_diag(*[np.asarray(x.C) for x, _, _ in subs])
    D = scipy.linalg.block_diag(*[np.asarray(x.D) for x, _, _ in subs])
    blk = control.ss(A, B, C, D)   # the stacked subsystems (as control.append, in one step)
    k = len(subs)
    Q = np.zeros((k, k))
    pos = {(kind, idx): a for a, (_, kind, idx) in enumerate(subs)}
    for a, (_, kind, idx) in enumerate(subs):
        if kind == "c":
            Q[a, pos[("f", idx)]] = -1.0
        elif kind == "g":
            Q[a, pos[("c", idx[1])]] = 1.0
        else:
            for b, (_, kb, ib) in enumerate(subs):
                if kb == "g" and ib[0] == idx:
                    Q[a, b] = 1.0
    cl = control.feedback(blk, Q, sign=1)
    return np.linalg.eigvals(np.asarray(cl.A)) if cl.nstates else np.zeros(0)
