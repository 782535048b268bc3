"""Independent reference for group stability: python-control state-space models, Pade delays.

The group is built as the plant has it: one SISO system per controller (sign C_j times an
order-``order`` Pade approximation of its half-sample delay), one per process element g_ij
(rational part times a Pade approximation of its dead time; integrators common to a row are one
block, since a PV moved through several integrating elements integrates once), one per PV filter,
each from
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


def _zeros_at_origin(den) -> int:
    k = 0
    for c in reversed(list(den)):
        if c != 0:
            break
        k += 1
    return k


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
        row = {j: (m.process if i == j else group.couplings.get((i, j))) for j in range(n)}
        row = {j: p for j, p in row.items() if p is not None}
        q = max(_zeros_at_origin(p.rational.den) for p in row.values())
        for j, p in row.items():
            r = _zeros_at_origin(p.rational.den)       # s^q g_ij: the row's shared integrators taken out
            num = list(p.rational.num) + [0.0] * (q - r)
            den = list(p.rational.den)[:len(p.rational.den) - r]
            subs.append((_ss(num, den, p.dead_time, order), "g", (i, j)))
        if q:
            subs.append((_ss([1.0], [1.0] + [0.0] * q, 0.0, order), "i", i))
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
        else:   # a row's integrator, or its filter when the row has none, sums the row's elements
            if kind == "f" and ("i", idx) in pos:
                Q[a, pos[("i", idx)]] = 1.0
                continue
            for b, (_, kb, ib) in enumerate(subs):
                if kb == "g" and ib[0] == idx:
                    Q[a, b] = 1.0
    cl = control.feedback(blk, Q, sign=1)
    return np.linalg.eigvals(np.asarray(cl.A)) if cl.nstates else np.zeros(0)
