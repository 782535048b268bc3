"""Open-loop poles on the imaginary axis: stability decided, checked against Pade closed-loop poles.

A process with undamped poles (s^2 + w0^2 in its denominator) can be stabilised by feedback; the
engine decides such loops by evaluating them with the axis poles moved off the axis to either side
(closed-loop poles move continuously with the open-loop ones). Independent check: the closed-loop
poles of an order-10 Pade model of the delay (python-control ``pade``, ``feedback``, ``poles``).
"""

from __future__ import annotations

import control
import numpy as np
import pytest

from audit.frequency import evaluate
from audit.loop import model_from_row
from audit.rows import LoopRow

ALPHA = 0.1


def _pade_max_real_pole(num, den, theta, kc, ti, td) -> float:
    """Largest real part of the closed-loop poles with an ideal PID (filter alpha td) and a Pade delay."""
    pn, pd = control.pade(theta, 10)
    if td:
        C = control.tf([kc * ti * td * (1 + ALPHA), kc * (ti + ALPHA * td), kc], [ALPHA * td * ti, ti, 0.0])
    else:
        C = control.tf([kc * ti, kc], [ti, 0.0])
    L = C * control.tf(num, den) * control.tf(pn, pd)
    return float(np.max(control.poles(control.feedback(L, 1)).real))


# (num, den, dead time [s], kc, ti [s], td [s])
CASES = [
    ((1.0,), (1.0, 0.0, 1.0), 0.1, 1.0, 5.0, 1.0),
    ((1.0,), (1.0, 0.0, 1.0), 0.1, 0.2, 2.0, 0.0),
    ((1.0,), (1.0, 0.0, 4.0), 0.05, 2.0, 3.0, 0.5),
    ((1.0,), (1.0, 0.0, 1.0), 0.5, 3.0, 5.0, 1.0),
    ((2.0,), (1.0, 1.0, 1.0, 1.0), 0.2, 0.3, 4.0, 0.0),      # (s + 1)(s^2 + 1)
    ((1.0,), (1.0, 1.0, 1.0, 1.0), 0.1, 1.5, 3.0, 0.8),
]


@pytest.mark.parametrize("case", CASES)
def test_axis_poles_are_decided_like_pade(case):
    """Stable exactly when every Pade closed-loop pole has Re < 0 (cases kept 0.02 away from the axis)."""
    num, den, theta, kc, ti, td = case
    ref = _pade_max_real_pole(num, den, theta, kc, ti, td)
    assert abs(ref) > 0.02
    row = LoopRow(index=0, sheet="loops", excel_row=2, tag="X", model="tf", num=num, den=den, dead_time=theta,
                  kc=kc, ti=ti, td=td, d_filter=ALPHA)
    fig = evaluate([model_from_row(row)]).iloc[0]
    assert bool(fig["stable"]) == (ref < 0)
    assert "imaginary axis" in fig["engine_note"]
    assert int(fig["rhp_open"]) == 0
