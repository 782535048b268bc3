"""Limits in force, status and findings of every row.

Status, worst first: ``invalid`` (the row could not be evaluated), ``unstable``,
``fails`` (a robustness limit or the rejection requirement is broken),
``marginal`` (passes, but within ``marginal_pct`` of a limit) and ``passes``.

Limits: Ms <= ms_max; gain margin >= gm_min_db, both ways (a conditionally stable
loop whose gain may fall only to gm_low has a downward margin of 20 log10(1/gm_low));
phase margin >= pm_min_deg; band_s_db <= band_required_db.
Marginal means: Ms > (1 - p) ms_max; GM < (1 + p) gm_min_db; PM < (1 + p) pm_min_deg;
band_required_db - band_s_db < p * attenuation_db; with p = marginal_pct / 100.
"""

from __future__ import annotations

import math

import pandas as pd

from .policy import Policy
from .rows import LoopRow

STATUS_ORDER = ("invalid", "unstable", "fails", "marginal", "passes")


def limits_in_force(row: LoopRow, policy: Policy) -> dict[str, float]:
    """ms_max [-], gm_min_db [dB], pm_min_deg [deg] for one row (row overrides policy).

    Parameters
    ----------
    row : LoopRow
        The row, with its own overrides or None.
    policy : Policy
        The policy in force.
    """
    return {
        "ms_max": row.ms_max if row.ms_max is not None else policy.ms_max,
        "gm_min_db": row.gm_min_db if row.gm_min_db is not None else policy.gm_min_db,
        "pm_min_deg": row.pm_min_deg if row.pm_min_deg is not None else policy.pm_min_deg,
    }


def _f(x: float) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "n/a"
    if math.isinf(x):
        return "inf"
    return f"{x:.3g}" if abs(x) < 100 else f"{x:.0f}"


def judge(fig: pd.Series, lim: dict[str, float], attenuation_db: float | None, marginal_pct: float
          ) -> tuple[str, list[str]]:
    """Status and findings of one evaluated row.

    Parameters
    ----------
    fig : Series or mapping
        Figures of the row (columns of :func:`audit.frequency.evaluate`).
    lim : dict
        Limits in force (:func:`limits_in_force`).
    attenuation_db : float or None
        Required attenuation A in force. [dB]
    marginal_pct : float
        Marginal zone. [%]
    """
    p = marginal_pct / 100.0
    if not bool(fig["stable"]):
        n = fig["rhp_closed"]
        if n is None or n is pd.NA or (isinstance(n, float) and math.isnan(n)):
            # no finite count: |L(inf)| > 1 with dead time (a neutral loop), or its inner loop such
            words = ["closed loop unstable (infinitely many closed-loop poles in the right half-plane)"]
        elif n == 0:
            # poles on the imaginary axis are not in the right half-plane, but the loop is not stable
            words = ["closed loop not stable (no closed-loop pole in the right half-plane; see the engine note)"]
        else:
            words = [f"closed loop unstable ({n} closed-loop pole{'s' if n != 1 else ''} in the right half-plane)"]
        if fig.get("engine_note"):
            words.append(str(fig["engine_note"]))
        return "unstable", words
    broken: list[str] = []
    near: list[str] = []
    ms, msmax = fig["ms"], lim["ms_max"]
    bounds = str(fig.get("lower_bounds") or "").split()
    if "ms" in bounds:
        # the peak search was cut short: the value is a lower bound of Ms
        (broken if ms > msmax else near).append(f"Ms at least {_f(ms)} (a lower bound: the peak search was cut short)")
    elif ms > msmax:
        broken.append(f"Ms {_f(ms)} > {_f(msmax)}")
    elif ms > (1 - p) * msmax:
        near.append(f"Ms {_f(ms)} near limit {_f(msmax)}")
    gmdb, gmin = fig["gm_db"], lim["gm_min_db"]
    if gmdb < gmin:
        broken.append(f"GM {_f(gmdb)} dB < {_f(gmin)} dB")
    elif gmdb < (1 + p) * gmin:
        near.append(f"GM {_f(gmdb)} dB near limit {_f(gmin)} dB")
    gl = fig["gm_low"]
    if gl is not None and not (isinstance(gl, float) and math.isnan(gl)) and gl > 0:
        down = -20.0 * math.log10(gl)
        if down < gmin:
            broken.append(f"downward GM {_f(down)} dB < {_f(gmin)} dB (gain may fall only to {_f(gl)}x)")
        elif down < (1 + p) * gmin:
            near.append(f"downward GM {_f(down)} dB near limit {_f(gmin)} dB")
    pm, pmin = fig["pm_deg"], lim["pm_min_deg"]
    if pm < pmin:
        broken.append(f"PM {_f(pm)} deg < {_f(pmin)} deg")
    elif pm < (1 + p) * pmin:
        near.append(f"PM {_f(pm)} deg near limit {_f(pmin)} deg")
    bs = fig.get("band_s_db")
    if attenuation_db is not None and bs is not None and not (isinstance(bs, float) and math.isnan(bs)):
        req = -attenuation_db
        if bs > req:
            broken.append(f"|S| in band {_f(bs)} dB > {_f(req)} dB required")
        elif req - bs < p * attenuation_db:
            near.append(f"|S| in band {_f(bs)} dB near required {_f(req)} dB")
    if fig.get("engine_note"):
        near.append(str(fig["engine_note"]))
    if broken:
        return "fails", broken + near
    if near:
        return "marginal", near
    return "passes", []
