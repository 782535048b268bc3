"""Write the invented operating records of the sample site (deterministic, seeded).

Run from anywhere: ``python sample_site/operation/make_operation.py``. Each record is routine
operation of one Larkmoor loop as a historian would export it: ``timestamp`` (ISO 8601, UTC),
``sp`` and ``pv`` in % of the PV range, ``op`` in %, ``mode`` as the control system writes it
(``AUTO``, ``MAN``). Invented for the demo plant; no real plant data. Each loop is simulated
from its own inventory model and tuning (first order plus dead time, exact delay line, ideal PI),
with measurement noise and a slow load:

* FIC-106_operation.csv - storm return pump flow, left in manual for most of the shift (the
  operator moves the output by hand).
* FIC-241_operation.csv - return activated sludge flow, the pump at full speed most of the time:
  the set point asks for more than the pump can give (output pinned at 100 %).
* FIC-211_operation.csv - lane 1 air flow, the air valve sticking (deadband plus stickband 4 %,
  slip jump 2.5 %): a limit cycle that no retune will remove.
* TIC-402_operation.csv - heat recovery water temperature, tuned too tightly (the inventory's
  settings give Ms above 3): it cycles with noise alone (logged every 4 s).
* FIC-305_operation.csv - digester 1 sludge feed flow, pushed by the thickener upstream, whose
  level cycles with a period of 150 s.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
SEED = 20261103
START = dt.datetime(2026, 11, 3, 6, 0, 0, tzinfo=dt.timezone.utc)


def simulate(rng, *, n, dt_s, K, tau, theta, kc, ti, sp, op0, noise=0.2, load_sd=0.5, load_tau=300.0,
             load_bias=0.0, stiction=None, sinus=None, manual=None, op_hand=None):
    """One loop: returns sp, pv, op, mode arrays (n samples every dt_s seconds).

    ``manual``: boolean array, True where the loop is in manual; ``op_hand``: the operator's
    output there. ``stiction``: (S, J) of the two-parameter model of Choudhury, Thornhill and
    Shah (2005). ``sinus``: (amplitude [%], period [s]) added to the process output.
    """
    d = int(round(theta / dt_s))
    a = np.exp(-dt_s / tau)
    b = K * (1 - a)
    al = np.exp(-dt_s / load_tau)
    line = np.full(d + 1, op0)
    y = (sp[0] - 50.0)
    load = 0.0
    integ = op0 - kc * 0.0
    x = op0
    u_prev, v_old, stuck, u_stuck = op0, 0.0, True, op0
    out_pv, out_op, out_mode = np.empty(n), np.empty(n), []
    for k in range(n):
        t = k * dt_s
        pv = 50.0 + y + noise * rng.standard_normal() + (sinus[0] * np.sin(2 * np.pi * t / sinus[1]) if sinus else 0.0)
        e = sp[k] - pv
        if manual is not None and manual[k]:
            u = op_hand[k]
            integ = u - kc * e                          # tracking: bumpless return to automatic
            out_mode.append("MAN")
        else:
            integ += kc * dt_s / ti * e
            u = kc * e + integ
            out_mode.append("AUTO")
        u = min(100.0, max(0.0, u))
        if manual is None or not manual[k]:
            integ = u - kc * e                          # back-calculation at the limits
        if stiction is not None:
            S, J = stiction
            v = np.sign(u - u_prev)
            if (v == 0 or v != v_old) and not stuck:
                stuck, u_stuck = True, u_prev
            if stuck and abs(u - u_stuck) > S:
                stuck = False
            if not stuck and v != 0:
                x = u - v * (S - J) / 2
            if v != 0:
                v_old = v
            u_prev = u
        else:
            x = u
        line[k % (d + 1)] = x
        delayed = line[(k - d) % (d + 1)]
        load = al * load + load_sd * np.sqrt(1 - al ** 2) * rng.standard_normal()
        # deviation model around op = 50 %, pv = 50 %
        y = a * y + b * (delayed - 50.0 + load + load_bias)
        out_pv[k], out_op[k] = pv, u
    return sp, out_pv, out_op, np.array(out_mode, dtype=object)


def write(name: str, dt_s: float, log_every: int, sp, pv, op, mode) -> None:
    idx = np.arange(0, len(pv), log_every)
    lines = ["timestamp,sp,pv,op,mode\n"]
    for i in idx:
        ts = (START + dt.timedelta(seconds=float(i * dt_s))).isoformat()
        lines.append(f"{ts},{sp[i]:.3f},{pv[i]:.3f},{op[i]:.2f},{mode[i]}\n")
    (HERE / name).write_text("".join(lines), encoding="utf-8", newline="\n")


def main() -> None:
    rng = np.random.default_rng(SEED)
    hours2 = int(2 * 3600 / 0.5)
    # FIC-106: manual from minute 20 to the end, the operator moving the output every 15 min
    n = hours2
    manual = np.zeros(n, dtype=bool)
    manual[int(1200 / 0.5):] = True
    hand = 45.0 + 5.0 * np.floor(np.arange(n) * 0.5 / 900.0) % 3
    write("FIC-106_operation.csv", 0.5, 2, *simulate(
        rng, n=n, dt_s=0.5, K=1.0, tau=5.0, theta=1.0, kc=0.5, ti=5.0, sp=np.full(n, 48.0), op0=48.0,
        manual=manual, op_hand=hand))
    # FIC-241: the set point asks for more flow than the pump gives, except for an hour at 40 %
    sp = np.full(n, 70.0)
    sp[int(3000 / 0.5):int(4800 / 0.5)] = 40.0
    write("FIC-241_operation.csv", 0.5, 2, *simulate(
        rng, n=n, dt_s=0.5, K=1.1, tau=6.0, theta=2.0, kc=0.4, ti=6.0, sp=sp, op0=100.0, load_bias=-40.0))
    # FIC-211: sticking air valve
    write("FIC-211_operation.csv", 0.5, 2, *simulate(
        rng, n=n, dt_s=0.5, K=1.5, tau=4.0, theta=1.0, kc=0.6, ti=4.0, sp=np.full(n, 55.0), op0=52.0,
        stiction=(4.0, 2.5), load_bias=2.0, load_sd=0.3))
    # TIC-402: over-tuned, twelve hours every 2 s
    n12 = int(12 * 3600 / 2.0)
    write("TIC-402_operation.csv", 2.0, 2, *simulate(
        rng, n=n12, dt_s=2.0, K=1.0, tau=600.0, theta=90.0, kc=2.5, ti=120.0, sp=np.full(n12, 60.0), op0=60.0,
        noise=0.1, load_sd=4.0, load_tau=1800.0))
    # FIC-305: upstream thickener level cycling with a 10 min period
    write("FIC-305_operation.csv", 0.5, 2, *simulate(
        rng, n=n, dt_s=0.5, K=1.0, tau=8.0, theta=3.0, kc=0.7, ti=8.0, sp=np.full(n, 50.0), op0=50.0,
        sinus=(4.0, 150.0)))


if __name__ == "__main__":
    main()
