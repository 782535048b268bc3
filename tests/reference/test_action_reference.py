"""Controller action advice decided from the closed loop, checked against closed forms and Pade poles.

The action advice (verdict ``check model``) must never turn a stable loop unstable. For a process
with open-loop poles in the right half-plane the sign of L(0) says nothing about stability
(K. J. Astrom and R. M. Murray, Feedback Systems, 2nd ed., 2021, sec. 10.2: the Nyquist curve must
encircle -1 once counter-clockwise per unstable open-loop pole). Independent checks: the closed-loop
poles of an order-10 Pade model of the delay (python-control ``pade`` and ``feedback``) and the
closed-form pole of a first-order loop without delay.
"""

from __future__ import annotations

import control
import numpy as np
import pytest

from audit.frequency import evaluate
from audit.loop import model_from_row
from audit.policy import Policy
from audit.rows import LoopRow
from audit.proposals import check_actions, decide_action, propose_many


def _row(i, **kw) -> LoopRow:
    base = dict(index=i, sheet="loops", excel_row=i + 2, tag=f"A-{i}")
    base.update(kw)
    return LoopRow(**base)


def _pade_stable(num, den, theta, kc, ti, sign) -> bool:
    """Closed-loop stability of sign * Kc (1 + 1/(Ti s)) num/den e^{-theta s} with an order-10 Pade delay."""
    pn, pd = control.pade(theta, 10) if theta > 0 else ([1.0], [1.0])
    C = control.tf([sign * kc * ti, sign * kc], [ti, 0.0])
    L = C * control.tf(num, den) * control.tf(pn, pd)
    poles = control.poles(control.feedback(L, 1))
    return bool(np.all(poles.real < 0))


# (num, den, dead time [s], kc, ti [s], action): open-loop unstable processes with dead time
UNSTABLE_CASES = [
    ((1.0,), (10.0, -1.0), 0.5, 3.0, 8.0, "reverse"),     # the case of the issue: stable, action right
    ((1.0,), (10.0, -1.0), 0.5, 3.0, 8.0, "direct"),      # the same, action wrong
    ((1.0,), (10.0, -1.0), 0.5, 0.5, 8.0, "reverse"),     # gain below 1/K: unstable either way
    ((2.0,), (20.0, -1.0), 1.0, 2.0, 20.0, "reverse"),
    ((-2.0,), (20.0, -1.0), 1.0, 2.0, 20.0, "direct"),
    ((1.0,), (5.0, 6.0, -1.0), 0.3, 4.0, 10.0, "reverse"),
]


@pytest.mark.parametrize("case", UNSTABLE_CASES)
def test_action_advice_never_destabilises(case):
    """The advised action (present, or the corrected one) is stable whenever the present one is; the
    engine's stability with either action agrees with the Pade poles (python-control, order 10)."""
    num, den, theta, kc, ti, action = case
    row = _row(0, model="tf", num=num, den=den, dead_time=theta, kc=kc, ti=ti, action=action)
    m = model_from_row(row)
    chk = check_actions([m])[0]
    assert chk.rhp_open >= 1
    assert chk.stable == _pade_stable(num, den, theta, kc, ti, m.sign)
    assert chk.other_stable == _pade_stable(num, den, theta, kc, ti, -m.sign)
    if chk.stable:
        assert chk.wrong is False
    if chk.wrong:
        assert chk.other_stable


def test_issue_case_is_not_called_wrong():
    """e^{-0.5 s}/(10 s - 1) with a reverse-acting PI Kc 3, Ti 8 s is stable (Pade poles): no
    'check model', no corrected action, with --propose all as with failing rows."""
    row = _row(0, model="tf", num=(1.0,), den=(10.0, -1.0), dead_time=0.5, kc=3.0, ti=8.0, action="reverse")
    m = model_from_row(row)
    assert _pade_stable((1.0,), (10.0, -1.0), 0.5, 3.0, 8.0, 1.0)
    assert not _pade_stable((1.0,), (10.0, -1.0), 0.5, 3.0, 8.0, -1.0)
    fig = evaluate([m]).iloc[0]
    assert bool(fig["stable"])
    for status in ("passes", "fails"):
        rec = fig.copy()
        rec["status"] = status
        p = propose_many([(m, row, rec)], Policy(), with_iae=False)[0]
        assert p.corrected_action is None
        assert p.verdict != "check model"
        assert "action" not in p.note or "appears wrong" not in p.note


def test_wrong_action_on_unstable_process_is_corrected_to_the_stable_one():
    """The same loop with direct action is unstable (Pade poles) and the reverse action stabilises it:
    the advice is to set it to reverse."""
    row = _row(0, model="tf", num=(1.0,), den=(10.0, -1.0), dead_time=0.5, kc=3.0, ti=8.0, action="direct")
    m = model_from_row(row)
    rec = evaluate([m]).iloc[0].copy()
    rec["status"] = "unstable"
    p = propose_many([(m, row, rec)], Policy(), with_iae=False)[0]
    assert p.corrected_action == "reverse"
    assert p.verdict == "check model"


@pytest.mark.parametrize("kc", [0.5, 0.9, 1.5, 3.0])
def test_first_order_unstable_closed_form(kc):
    """P = 1/(10 s - 1), proportional control, no delay: the closed-loop pole is s = (1 - sign Kc)/10
    (closed form), stable iff sign Kc > 1. The engine's stability with either action follows it."""
    row = _row(0, model="tf", num=(1.0,), den=(10.0, -1.0), dead_time=0.0, kc=kc, ti=None, action="reverse")
    chk = check_actions([model_from_row(row)])[0]
    assert chk.stable == (kc > 1.0)
    assert chk.other_stable is False       # pole (1 + Kc)/10 > 0
    assert chk.wrong is (False if kc > 1.0 else None)


def test_open_loop_stable_positive_feedback_is_wrong():
    """An open-loop stable process with positive feedback and integral action cannot be stable
    (1 + L(s) changes sign on the positive real axis; common practice): the action is reversed."""
    row = _row(0, model="fopdt", gain=-1.0, tau1=10.0, dead_time=2.0, kc=1.0, ti=10.0, action="reverse")
    chk = check_actions([model_from_row(row)])[0]
    assert not chk.stable and chk.other_stable and chk.positive_feedback
    assert chk.wrong is True


def test_decision_table():
    """decide_action's rules (README 'Retuning proposals'): never from stable to unstable."""
    assert decide_action(True, False, 1, True) == (False, "")
    assert decide_action(True, False, 0, True) == (False, "")
    assert decide_action(True, True, 0, True)[0] is True
    assert decide_action(True, True, 1, True)[0] is False
    assert decide_action(False, True, 1, False)[0] is True
    assert decide_action(False, False, 1, True)[0] is None
    assert decide_action(False, False, 0, True)[0] is True
    assert decide_action(False, False, 0, False)[0] is False
