"""Retuning proposals: published tuning rules, a constrained optimum, and a feasibility verdict.

For every loop that needs it, a handful of candidate settings is built:

* SIMC PI (fopdt, sopdt by the half rule, ipdt) and SIMC PID in series form (sopdt, ipdt with a lag),
  each with tau_c = theta (tight) and with the largest tau_c that still meets the rejection
  requirement (smoother) [1]_;
* AMIGO PI and PID (fopdt) [2]_;
* the largest integral gain ki subject to Ms <= ms_max and the gain- and phase-margin limits,
  found on the exact-delay frequency response [3]_, as PI and (kept only where it raises ki by at
  least :data:`PID_GAIN_MIN`) PID with the row's derivative filter; and the point of the same
  frontier with the deepest attenuation in the rejection band.

Every candidate is written in the row's own form and units, rounded to three significant
figures (gain, integral gain and integral time rounded towards the more robust side), and the
*rounded* settings are re-evaluated by the exact engine (:func:`audit.frequency.evaluate`).
The search for tau_c and for the ki frontier screens candidates on a frequency grid
(:func:`_screen`); only the exact engine decides what is reported.

Choice. A candidate *meets the limits* when the exact engine finds it stable with Ms, both gain
margins and the phase margin within the row's limits (tolerances :data:`MS_TOL`,
:data:`GM_TOL_DB`, :data:`PM_TOL_DEG` cover the rounding). Among those that also meet the
rejection requirement the one with the most margin to spare is recommended: the largest of
min(relative slack to each limit and to the requirement, ki / largest ki among them), the last
term so that spare robustness is not bought with a sluggish loop. When none meets the
requirement the verdict is 'not achievable by tuning' and the candidate within the limits with
the deepest band attenuation is shown as the best effort.

Effective dead time. SIMC and AMIGO use the loop's effective dead time
theta_e = theta + Ts/2 + tau_f (the PV filter lag counted as dead time by the half rule [1]_),
plus tau2/2 (sopdt PI, half rule), the lag of an ipdt model for PI (half of it), and |lead| for
a negative lead (inverse response counted as dead time [1]_). When theta_e is zero SIMC's
tau_c has no natural floor; tau_c is then floored at :data:`TAU_C_FLOOR` times the largest
time constant (an ipdt model without lag, dead time, sample period or filter gets no tight
SIMC candidate: only the requirement sets its speed).

References
----------
.. [1] S. Skogestad, "Simple analytic rules for model reduction and PID controller tuning",
   J. Process Control 13 (2003) 291-309, sec. 3 (half rule), eqs. (27)-(29) (SIMC settings) and
   its table of robustness margins for tau_c = theta.
.. [2] K. J. Astrom and T. Hagglund, "Revisiting the Ziegler-Nichols step response method for
   PID control", J. Process Control 14 (2004) 635-650 (the AMIGO PI and PID rules).
.. [3] K. J. Astrom, H. Panagopoulos and T. Hagglund, "Design of PI controllers based on
   non-convex optimization", Automatica 34(5) (1998) 585-601 (maximise ki subject to a
   sensitivity constraint).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from . import units
from .loop import Controller, LoopModel, Process, ideal_to_series, series_to_ideal
from .policy import Policy
from .rows import LoopRow

#: With no effective dead time, SIMC's tau_c is floored at this fraction of the largest time constant. [-]
TAU_C_FLOOR = 0.1
#: A PID variant of the ki optimum is kept only when it raises ki by at least this factor over PI. [-]
PID_GAIN_MIN = 1.10
#: Relative tolerance on Ms when judging a rounded candidate (three significant figures). [-]
MS_TOL = 0.005
#: Tolerance on the gain margin when judging a rounded candidate. [dB]
GM_TOL_DB = 0.05
#: Tolerance on the phase margin when judging a rounded candidate. [deg]
PM_TOL_DEG = 0.25
#: A setting that changes by more than this factor is flagged: move in stages. [-]
STAGE_FACTOR = 2.0
#: Points of the screening frequency grid. [-]
GRID_POINTS = 500
#: Derivative times tried for the PID variant of the ki optimum, as multiples of 1/w180 of the process. [-]
PID_TD_FACTORS = (0.25, 0.5, 1.0)
#: The best-band point of a ki frontier keeps at least this fraction of the frontier's largest ki. [-]
BEST_BAND_KI_MIN = 0.5

VERDICTS = ("retune", "not achievable by tuning", "no change needed", "check model", "not evaluated")


# ----------------------------------------------------------------------------------------------
# data


@dataclass(frozen=True)
class Limits:
    """Robustness limits a proposal must meet.

    Attributes
    ----------
    ms_max : float
        Largest sensitivity peak. [-]
    gm_min_db : float
        Smallest gain margin (both ways). [dB]
    pm_min_deg : float
        Smallest phase margin. [deg]
    """

    ms_max: float = 2.0
    gm_min_db: float = 6.0
    pm_min_deg: float = 30.0


@dataclass(frozen=True)
class Requirement:
    """The rejection requirement |S(jw)| <= -attenuation_db over 0 < w <= band_rad_s.

    Attributes
    ----------
    band_rad_s : float or None
        Upper edge wd of the rejection band. [rad/s]
    attenuation_db : float or None
        Required attenuation A > 0. [dB]
    """

    band_rad_s: float | None = None
    attenuation_db: float | None = None

    @property
    def active(self) -> bool:
        """True when both the band edge and the attenuation are given."""
        return _finite(self.band_rad_s) and _finite(self.attenuation_db)

    @property
    def level_db(self) -> float:
        """Required level of |S| in the band, -attenuation_db (NaN when inactive). [dB]"""
        return -float(self.attenuation_db) if self.active else math.nan


@dataclass(frozen=True)
class Settings:
    """PID settings in project units in one controller form.

    ``parallel`` settings are held as their ideal equivalents (kp = kc, ki = kc/ti, kd = kc td),
    which is the same transfer function, derivative filter included.

    Attributes
    ----------
    method : str
        Where the settings come from, e.g. ``SIMC PI, tau_c = theta``.
    form : str
        ``ideal``, ``series`` or ``parallel``.
    kc : float
        Controller gain (parallel: kp). [-]
    ti : float or None
        Integral time; None for no integral action. [s]
    td : float
        Derivative time. [s]
    alpha : float
        Derivative filter factor. [-]
    """

    method: str
    form: str
    kc: float
    ti: float | None
    td: float = 0.0
    alpha: float = 0.1

    @property
    def ki(self) -> float:
        """Integral gain kc/ti. [1/s]"""
        return self.kc / self.ti if self.ti else 0.0

    @property
    def kd(self) -> float:
        """Derivative gain kc td (ideal and parallel forms). [s]"""
        return self.kc * self.td

    def controller(self) -> Controller:
        """The controller these settings describe."""
        if self.form == "parallel":
            return Controller("parallel", kp=self.kc, ki=self.ki, kd=self.kd, alpha=self.alpha)
        return Controller(self.form, kc=self.kc, ti=self.ti, td=self.td, alpha=self.alpha)


@dataclass(frozen=True)
class Figures:
    """Predicted figures of one set of settings (exact engine).

    Attributes
    ----------
    stable : bool
    ms : float  Sensitivity peak. [-]
    gm_db : float  Gain margin. [dB]
    gm_low : float  Downward gain factor to instability, NaN when none. [-]
    pm_deg : float  Phase margin. [deg]
    dm_s : float  Delay margin. [s]
    band_s_db : float  Largest |S| in the rejection band, NaN without a band. [dB]
    iae : float  Integrated absolute error after a unit load step at the process input, NaN when unknown. [s]
    """

    stable: bool
    ms: float
    gm_db: float
    gm_low: float
    pm_deg: float
    dm_s: float
    band_s_db: float
    iae: float = math.nan

    @staticmethod
    def of(fig: Mapping[str, Any]) -> "Figures":
        """From a row of :func:`audit.frequency.evaluate` or of the results table.

        Parameters
        ----------
        fig : mapping
            A row with ``stable``, ``ms`` [-], ``gm_db`` [dB], ``gm_low`` [-], ``pm_deg`` [deg],
            ``dm_s`` [s], ``band_s_db`` [dB] and ``iae`` [s]; missing or non-numeric values
            become NaN (``stable`` False).

        Returns
        -------
        Figures
        """
        def g(k):
            v = fig.get(k) if hasattr(fig, "get") else fig[k]
            try:
                return math.nan if v is None or pd.isna(v) else float(v)
            except (TypeError, ValueError):
                return math.nan
        st = fig.get("stable") if hasattr(fig, "get") else fig["stable"]
        return Figures(bool(st) if st is not None and not pd.isna(st) else False, g("ms"), g("gm_db"),
                       g("gm_low"), g("pm_deg"), g("dm_s"), g("band_s_db"), g("iae"))


@dataclass(frozen=True)
class Candidate:
    """One evaluated candidate: the rounded settings as typed and their exact figures."""

    settings: Settings
    figures: Figures
    meets_limits: bool
    meets_requirement: bool
    spare: float   # smallest relative slack over the limits and the requirement [-]


@dataclass(frozen=True)
class Proposal:
    """The outcome for one loop.

    Attributes
    ----------
    verdict : str
        One of :data:`VERDICTS`.
    settings : Settings or None
        The recommended settings in the row's form, rounded as the engineer types them.
    method : str
        Which candidate was recommended.
    text : str
        The settings in the row's own terms, e.g. ``PB 85.0 %, reset 0.238 repeats/min``.
    terms : dict
        Proposed settings in the row's own terms (convention -> value).
    current_terms : dict
        Current settings in the row's own terms.
    changes_pct : dict
        Change of each setting in the row's terms (convention -> %; NaN where one side is absent).
    before, after : Figures or None
        Predicted figures of the current and the proposed settings.
    limiting_factor : str
        What bounds the achievable rejection (when the requirement cannot be met).
    best_band_s_db : float
        Deepest band level any candidate reaches within the robustness limits. [dB]
    note : str
        Warnings and explanations, '; '-separated.
    candidates : tuple of Candidate
        Every evaluated candidate (for the report's comparison).
    corrected_action : str or None
        ``reverse``/``direct`` when the row's action appears wrong (verdict ``check model``).
    """

    verdict: str
    settings: Settings | None = None
    method: str = ""
    text: str = ""
    terms: dict[str, float | None] = field(default_factory=dict)
    current_terms: dict[str, float | None] = field(default_factory=dict)
    changes_pct: dict[str, float] = field(default_factory=dict)
    before: Figures | None = None
    after: Figures | None = None
    limiting_factor: str = ""
    best_band_s_db: float = math.nan
    note: str = ""
    candidates: tuple[Candidate, ...] = ()
    corrected_action: str | None = None


def _finite(x) -> bool:
    try:
        return x is not None and not pd.isna(x) and math.isfinite(float(x))
    except (TypeError, ValueError):
        return False


# ----------------------------------------------------------------------------------------------
# published rules


def _effective(process: Process, extra_delay: float, for_pid: bool) -> tuple[float, float, float, float]:
    """(k, tau1, tau2, theta_e) of a process for SIMC: half rule, inverse response as delay.

    tau2 is the time constant kept for the derivative (0 when none is kept).
    """
    kind = process.kind
    theta = process.dead_time + extra_delay
    if kind not in ("fopdt", "sopdt", "ipdt"):
        raise ValueError(f"SIMC rules need an fopdt, sopdt or ipdt model, not {kind}")
    if process.lead > 0:
        raise ValueError("SIMC rules are not applied to a model with a positive lead; see the ki optimum")
    theta += abs(process.lead)            # inverse response counted as dead time (Skogestad 2003, sec. 3)
    k = float(process.gain)
    if kind == "fopdt":
        return k, process.tau1, 0.0, theta
    if kind == "ipdt":
        lag_ = process.tau1
        if for_pid:
            return k, math.inf, lag_, theta
        return k, math.inf, 0.0, theta + lag_ / 2.0       # half rule, integrator as the dominant lag
    t1, t2 = max(process.tau1, process.tau2), min(process.tau1, process.tau2)
    if for_pid:
        return k, t1, t2, theta
    return k, t1 + t2 / 2.0, 0.0, theta + t2 / 2.0        # half rule (Skogestad 2003, sec. 3)


def simc_tau_c_min(process: Process, extra_delay: float = 0.0) -> float | None:
    """Smallest SIMC closed-loop time constant used: the effective dead time, or its floor. [s]

    Parameters
    ----------
    process : Process
        fopdt, sopdt or ipdt model.
    extra_delay : float
        Dead time the loop adds to the model's (Ts/2 + PV filter). [s]

    Returns
    -------
    float or None
        theta_e when positive; else :data:`TAU_C_FLOOR` times the largest finite time constant;
        None when there is none (ipdt without lag): no tight setting exists.
    """
    theta = _effective(process, extra_delay, for_pid=False)[3]
    if theta > 0:
        return theta
    taus = [t for t in (process.tau1, process.tau2) if t and math.isfinite(t)]
    return TAU_C_FLOOR * max(taus) if taus else None


def simc_pi(process: Process, tau_c: float, extra_delay: float = 0.0, alpha: float = 0.1) -> Settings:
    """SIMC PI settings.

    Parameters
    ----------
    process : Process
        fopdt, sopdt (half rule to first order) or ipdt (its lag, if any, half to dead time).
    tau_c : float
        Desired closed-loop time constant, > 0. [s]
    extra_delay : float
        Dead time the loop adds (Ts/2 + PV filter). [s]
    alpha : float
        Derivative filter factor carried along. [-]

    Returns
    -------
    Settings
        Ideal form (PI is the same in every form): kc = tau1/(k (tau_c + theta)),
        ti = min(tau1, 4 (tau_c + theta)); integrating: kc = 1/(k (tau_c + theta)), ti = 4 (tau_c + theta).

    References
    ----------
    Skogestad 2003, eqs. (27)-(28) and the half rule (sec. 3).
    """
    if not tau_c > 0:
        raise ValueError("SIMC needs tau_c > 0")
    k, t1, _, theta = _effective(process, extra_delay, for_pid=False)
    h = tau_c + theta
    if math.isinf(t1):
        return Settings("SIMC PI", "ideal", 1.0 / (k * h), 4.0 * h, 0.0, alpha)
    return Settings("SIMC PI", "ideal", t1 / (k * h), min(t1, 4.0 * h), 0.0, alpha)


def simc_pid_series(process: Process, tau_c: float, extra_delay: float = 0.0, alpha: float = 0.1) -> Settings:
    """SIMC PID in series (interacting) form, the second time constant as derivative time.

    Parameters
    ----------
    process : Process
        sopdt (tau2 = the smaller time constant) or ipdt with a lag tau1.
    tau_c : float
        Desired closed-loop time constant, > 0. [s]
    extra_delay : float
        Dead time the loop adds (Ts/2 + PV filter). [s]
    alpha : float
        Derivative filter factor. [-]

    Returns
    -------
    Settings
        Series form: kc = tau1/(k (tau_c + theta)), ti = min(tau1, 4 (tau_c + theta)), td = tau2;
        integrating with lag: kc = 1/(k (tau_c + theta)), ti = 4 (tau_c + theta), td = lag.

    References
    ----------
    Skogestad 2003, eqs. (27)-(29) (series PID for second-order processes).
    """
    if not tau_c > 0:
        raise ValueError("SIMC needs tau_c > 0")
    k, t1, t2, theta = _effective(process, extra_delay, for_pid=True)
    if not t2 > 0:
        raise ValueError("SIMC PID needs a second time constant")
    h = tau_c + theta
    if math.isinf(t1):
        return Settings("SIMC PID", "series", 1.0 / (k * h), 4.0 * h, t2, alpha)
    return Settings("SIMC PID", "series", t1 / (k * h), min(t1, 4.0 * h), t2, alpha)


def _fopdt_params(process: Process, extra_delay: float) -> tuple[float, float, float]:
    if process.kind != "fopdt":
        raise ValueError(f"AMIGO rules here need an fopdt model, not {process.kind}")
    L = process.dead_time + extra_delay
    if not L > 0:
        raise ValueError("AMIGO rules need a positive dead time")
    return float(process.gain), process.tau1, L


def amigo_pi(process: Process, extra_delay: float = 0.0, alpha: float = 0.1) -> Settings:
    """AMIGO PI settings for an fopdt model K e^{-L s}/(T s + 1).

    kc = 0.15/K + (0.35 - L T/(L + T)^2) T/(K L),  ti = 0.35 L + 13 L T^2/(T^2 + 12 L T + 7 L^2).

    Parameters
    ----------
    process : Process
        fopdt model.
    extra_delay : float
        Dead time the loop adds (Ts/2 + PV filter), added to L. [s]
    alpha : float
        Derivative filter factor carried along. [-]

    References
    ----------
    Astrom & Hagglund 2004 (AMIGO PI rule).
    """
    K, T, L = _fopdt_params(process, extra_delay)
    kc = 0.15 / K + (0.35 - L * T / (L + T) ** 2) * T / (K * L)
    ti = 0.35 * L + 13.0 * L * T ** 2 / (T ** 2 + 12.0 * L * T + 7.0 * L ** 2)
    return Settings("AMIGO PI", "ideal", kc, ti, 0.0, alpha)


def amigo_pid(process: Process, extra_delay: float = 0.0, alpha: float = 0.1) -> Settings:
    """AMIGO PID settings (ideal form) for an fopdt model K e^{-L s}/(T s + 1).

    kc = (0.2 + 0.45 T/L)/K,  ti = (0.4 L + 0.8 T) L/(L + 0.1 T),  td = 0.5 L T/(0.3 L + T).

    Parameters
    ----------
    process : Process
        fopdt model.
    extra_delay : float
        Dead time the loop adds (Ts/2 + PV filter), added to L. [s]
    alpha : float
        Derivative filter factor. [-]

    References
    ----------
    Astrom & Hagglund 2004 (AMIGO PID rule).
    """
    K, T, L = _fopdt_params(process, extra_delay)
    kc = (0.2 + 0.45 * T / L) / K
    ti = (0.4 * L + 0.8 * T) * L / (L + 0.1 * T)
    td = 0.5 * L * T / (0.3 * L + T)
    return Settings("AMIGO PID", "ideal", kc, ti, td, alpha)


# ----------------------------------------------------------------------------------------------
# form conversions and the row's own terms


def to_form(s: Settings, form: str) -> Settings | None:
    """The same settings in another form (filter aside); None when no series form exists (ti < 4 td).

    Parameters
    ----------
    s : Settings
        Settings in any form.
    form : str
        ``ideal``, ``series`` or ``parallel``.

    References
    ----------
    Astrom & Hagglund 1995, eqs. (3.10)-(3.11) (series <-> ideal).
    """
    if form == s.form:
        return s
    kc, ti, td = s.kc, s.ti, s.td
    if s.form == "series" and td and ti:
        kc, ti, td = series_to_ideal(kc, ti, td)
    if form == "series" and td:
        if not ti:
            return None
        out = ideal_to_series(kc, ti, td)
        if out is None:
            return None
        kc, ti, td = out
    return replace(s, form=form, kc=kc, ti=ti, td=td)


# convention -> (quantity, label, unit text, direction of the more robust rounding: -1 down, +1 up, 0 nearest)
_TERM_INFO: dict[str, tuple[str, str, str, int]] = {
    "kc": ("kc", "Kc", "", -1),
    "pb_pct": ("kc", "PB", "%", +1),
    "kp": ("kp", "Kp", "", -1),
    "reset_rpm": ("ti", "reset", "repeats/min", -1),
    "ki_per_s": ("ki", "Ki", "1/s", -1),
    "ki_per_min": ("ki", "Ki", "1/min", -1),
}
for _u in units.TIME_UNITS:
    _TERM_INFO[f"ti_{_u}"] = ("ti", "Ti", _u, +1)
    _TERM_INFO[f"td_{_u}"] = ("td", "Td", _u, 0)
    _TERM_INFO[f"kd_{_u}"] = ("kd", "Kd", _u, 0)

_DEFAULT_CONV = {"kc": "kc", "ti": "ti_s", "td": "td_s", "kp": "kp", "ki": "ki_per_s", "kd": "kd_s"}


def _conventions(form: str, conventions: Mapping[str, str]) -> list[str]:
    qs = ("kp", "ki", "kd") if form == "parallel" else ("kc", "ti", "td")
    out = []
    for q in qs:
        c = conventions.get(q) or _DEFAULT_CONV[q]
        if c not in _TERM_INFO or _TERM_INFO[c][0] != q and not (q == "kp" and c == "kc"):
            c = _DEFAULT_CONV[q]
        out.append(c)
    return out


def row_terms(s: Settings, conventions: Mapping[str, str]) -> dict[str, float | None]:
    """Settings in the row's own columns and units (convention -> value).

    Parameters
    ----------
    s : Settings
        Settings in the form the row uses.
    conventions : mapping
        ``LoopRow.conventions`` (e.g. ``{"kc": "pb_pct", "ti": "reset_rpm", "td": "td_min"}``);
        missing or unknown entries fall back to project units.

    Returns
    -------
    dict
        e.g. ``{"pb_pct": 85.0, "reset_rpm": 0.238, "td_min": 0.5}``; an integral time is None
        for no integral action.
    """
    out: dict[str, float | None] = {}
    for c in _conventions(s.form, conventions):
        q = _TERM_INFO[c][0]
        if q == "kp":
            out[c] = s.kc
            continue
        value = {"kc": s.kc, "ti": s.ti, "td": s.td, "ki": s.ki, "kd": s.kd}[q]
        if c == "pb_pct" and value <= 0:
            out[c] = math.nan
            continue
        out[c] = units.setting_in_convention(q, value, c)
    return out


def _from_convention(c: str, v: float | None) -> float | None:
    q = _TERM_INFO[c][0]
    if c in ("kc", "kp", "ki_per_s"):
        return v
    if c == "pb_pct":
        return units.kc_from_pb(v)
    if c == "reset_rpm":
        return units.ti_from_reset_rpm(v or 0.0)
    if c == "ki_per_min":
        return units.per_min_to_per_s(v or 0.0)
    unit = c.split("_", 1)[1]
    if v is None:
        return None if q == "ti" else 0.0
    return units.time_to_s(v, unit)


def from_row_terms(terms: Mapping[str, float | None], form: str, method: str = "", alpha: float = 0.1) -> Settings:
    """Settings in project units from values in the row's own terms (inverse of :func:`row_terms`).

    Parameters
    ----------
    terms : mapping
        Convention -> value, as returned by :func:`row_terms`.
    form : str
        ``ideal``, ``series`` or ``parallel``.
    method : str
        Carried into the result.
    alpha : float
        Derivative filter factor. [-]
    """
    got = {_TERM_INFO[c][0]: _from_convention(c, v) for c, v in terms.items()}
    if form == "parallel":
        kp, ki, kd = got.get("kp") or 0.0, got.get("ki") or 0.0, got.get("kd") or 0.0
        return Settings(method, form, kp, (kp / ki if ki else None), (kd / kp if kp else 0.0), alpha)
    ti = got.get("ti")
    return Settings(method, form, got.get("kc") or 0.0, ti if ti else None, got.get("td") or 0.0, alpha)


def round_sig(x: float, digits: int = 3, direction: int = 0) -> float:
    """x rounded to ``digits`` significant figures; direction -1 rounds down, +1 up, 0 nearest.

    Parameters
    ----------
    x : float
        Value. [any unit]
    digits : int
        Significant figures.
    direction : int
        -1, 0 or +1.
    """
    if x is None or not math.isfinite(x) or x == 0:
        return x
    e = math.floor(math.log10(abs(x))) - digits + 1
    q = x / 10.0 ** e
    qr = round(q, 9)
    r = math.floor(qr) if direction < 0 else math.ceil(qr) if direction > 0 else round(qr)
    return float(f"{r * 10.0 ** e:.{digits}g}") if abs(r) < 10 ** digits else float(f"{r * 10.0 ** e:.{digits + 1}g}")


def rounded(s: Settings, conventions: Mapping[str, str]) -> Settings:
    """The settings as the engineer would type them: three significant figures in the row's terms,
    the gain and the integral action rounded towards the more robust side.

    Parameters
    ----------
    s : Settings
        Settings in project units in the row's form.
    conventions : mapping
        ``LoopRow.conventions`` (e.g. ``{"kc": "pb_pct", "ti": "reset_rpm", "td": "td_min"}``);
        missing or unknown entries fall back to project units.

    Returns
    -------
    Settings
        The rounded settings, back in project units.
    """
    t = row_terms(s, conventions)
    r = {c: (None if v is None else round_sig(v, 3, _TERM_INFO[c][3])) for c, v in t.items()}
    return from_row_terms(r, s.form, s.method, s.alpha)


def settings_text(terms: Mapping[str, float | None], form: str) -> str:
    """Settings in words, e.g. ``PB 85.0 %, reset 0.238 repeats/min, Td 0.500 min (series form)``.

    Parameters
    ----------
    terms : mapping
        Settings in the row's own columns and units, convention -> value (from
        :func:`row_terms`); None for an absent term.
    form : str
        Controller form named at the end (``ideal``, ``series`` or ``parallel``).

    Returns
    -------
    str
        One label, value and unit per term, comma-separated.
    """
    parts = []
    for c, v in terms.items():
        _, label, unit, _ = _TERM_INFO[c]
        if v is None:
            parts.append(f"{label} none")
            continue
        if _TERM_INFO[c][0] in ("td", "kd") and v == 0:
            parts.append(f"{label} 0 (no derivative)")
            continue
        parts.append(f"{label} {_fmt(v)}{(' ' + unit) if unit else ''}")
    return ", ".join(parts) + f" ({form} form)"


def _fmt(v: float) -> str:
    if v is None or not math.isfinite(v):
        return "n/a"
    return f"{v:#.3g}".rstrip(".") if abs(v) < 1e5 else f"{v:.3g}"


# ----------------------------------------------------------------------------------------------
# screening on a frequency grid (search only; the exact engine decides what is reported)


def _unit_loop(model: LoopModel) -> LoopModel:
    """The loop with C = 1: sign P F e^{-s (theta + Ts/2)} [T_inner]."""
    return model.with_controller(Controller("parallel", kp=1.0))


def characteristic_w(model: LoopModel) -> float | None:
    """First frequency where the phase of the loop with C = 1 has fallen by a further 90 deg past -90 deg. [rad/s]

    For a process with non-negative low-frequency phase this is its phase crossover w180;
    None when the phase never gets there (no dead time or lag bounds the gain).

    Parameters
    ----------
    model : LoopModel
        The loop; its controller is replaced by C = 1 (sign, process, PV filter, dead time,
        half the sample period and inner loop are kept).

    Returns
    -------
    float or None
        The frequency, on a grid of 2401 points from 1e-7 to 1e5 rad/s. [rad/s]
    """
    w = np.logspace(-7, 5, 2401)
    ph = np.unwrap(np.angle(_unit_loop(model).L(w)))
    target = min(-np.pi, ph[0] - np.pi / 2)
    idx = np.flatnonzero(ph <= target)
    return float(w[idx[0]]) if idx.size else None


def _grid(wc: float, wd: float | None, n: int = GRID_POINTS) -> np.ndarray:
    w = np.logspace(math.log10(wc) - 2.5, math.log10(wc) + 1.2, n)
    if wd is not None and _finite(wd) and wd > 0:
        w = np.union1d(w, [wd])
    return w


def _c_response(form: str, kc, ti, td, alpha: float, w: np.ndarray) -> np.ndarray:
    """C(jw) of many ideal/series settings at once; kc, ti, td arrays (n,), ti NaN/0 for none."""
    kc, ti, td = (np.atleast_1d(np.asarray(x, float))[:, None] for x in (kc, ti, td))
    s = 1j * w[None, :]
    with np.errstate(divide="ignore", invalid="ignore"):
        integ = np.where((ti > 0) & np.isfinite(ti), 1.0 / (np.where(ti > 0, ti, 1.0) * s), 0.0)
    der = np.where(td > 0, td * s / (alpha * td * s + 1.0), 0.0)
    if form == "series":
        return kc * (1.0 + integ) * (td * s + 1.0) / (alpha * td * s + 1.0)
    return kc * (1.0 + integ + der)


@dataclass(frozen=True)
class Screen:
    """Grid estimates of the figures of many candidates (search only)."""

    ms: np.ndarray
    gm_db: np.ndarray
    gm_down_db: np.ndarray
    pm_deg: np.ndarray
    band_s_db: np.ndarray


def _screen(L: np.ndarray, w: np.ndarray, wd: float | None) -> Screen:
    """Grid estimates of Ms, gain margins (up and down), phase margin and band level of L (n, n_w)."""
    absS = 1.0 / np.abs(1.0 + L)
    ms = absS.max(-1)
    if wd is not None and _finite(wd):
        sel = w <= wd
        band = 20 * np.log10(absS[:, sel].max(-1)) if sel.any() else np.full(L.shape[0], -np.inf)
    else:
        band = np.full(L.shape[0], np.nan)
    im, re = L.imag, L.real
    c = (im[:, :-1] * im[:, 1:] <= 0) & (im[:, :-1] != im[:, 1:])
    with np.errstate(divide="ignore", invalid="ignore"):
        f = im[:, :-1] / (im[:, :-1] - im[:, 1:])
        x = re[:, :-1] + f * (re[:, 1:] - re[:, :-1])
    neg = c & (x < 0)
    up = np.where(neg & (x > -1), -x, 0.0).max(-1)
    down = np.where(neg & (x < -1), -x, np.inf).min(-1)
    with np.errstate(divide="ignore"):
        gm_db = -20 * np.log10(up)
        gm_down = 20 * np.log10(down)
    m = np.abs(L) - 1.0
    cc = (m[:, :-1] * m[:, 1:] <= 0)
    ang = np.degrees(np.abs(np.angle(L[:, :-1])))
    pm = np.where(cc, 180.0 - ang, np.inf).min(-1)
    return Screen(ms, gm_db, gm_down, pm, band)


def _screen_ok(sc: Screen, lim: Limits, req: Requirement) -> np.ndarray:
    ok = (sc.ms <= lim.ms_max) & (sc.gm_db >= lim.gm_min_db) & (sc.gm_down_db >= lim.gm_min_db) \
        & (sc.pm_deg >= lim.pm_min_deg)
    if req.active:
        ok &= sc.band_s_db <= req.level_db
    return ok


def _forbidden_points(lim: Limits) -> np.ndarray:
    """Points of the L-plane outside the Ms disc that the margin limits forbid the Nyquist curve to touch."""
    r = 1.0 / lim.ms_max
    g = 10.0 ** (lim.gm_min_db / 20.0)
    pts: list[complex] = []
    if -1.0 / g > -1.0 + r:                      # upward gain margin: (-1 + r, -1/g] on the real axis
        pts += list(np.linspace(-1.0 + r, -1.0 / g, 4)[1:])
    if -g < -1.0 - r:                            # downward gain margin: [-g, -1 - r)
        pts += list(np.linspace(-g, -1.0 - r, 3)[:-1])
    psi0 = 2.0 * math.degrees(math.asin(min(1.0, r / 2.0)))
    if lim.pm_min_deg > psi0:                    # phase margin: the unit-circle arc outside the disc
        for psi in np.linspace(psi0, lim.pm_min_deg, 3)[1:]:   # lower half-plane, where L(jw) of w > 0 meets it
            p = np.radians(psi)
            pts.append(complex(-math.cos(p), -math.sin(p)))
    return np.asarray(pts, complex)


def _first_contact(L0: np.ndarray, b: np.ndarray, r: float, pts: np.ndarray) -> np.ndarray:
    """Smallest t >= 0 for which L0 + t b (rows: candidates, columns: frequencies) touches the
    disc |1 + L| < r or one of ``pts``; 0 where t = 0 is already inside the disc, inf where never."""
    a = 1.0 + L0
    bb = (b * b.conj()).real
    ab = (a * b.conj()).real
    aa = (a * a.conj()).real - r * r
    disc = ab * ab - bb * aa
    with np.errstate(divide="ignore", invalid="ignore"):
        k1 = (-ab - np.sqrt(np.maximum(disc, 0.0))) / bb
    t = np.where((disc > 0) & (k1 > 0), k1, np.inf).min(-1)
    bad = (aa < 0).any(-1)
    b_ = np.broadcast_to(b, L0.shape)
    for x in pts:
        with np.errstate(divide="ignore", invalid="ignore"):
            z = (x - L0) / b_
        im, re = z.imag, z.real
        c = (im[..., :-1] * im[..., 1:] <= 0) & (im[..., :-1] != im[..., 1:])
        with np.errstate(divide="ignore", invalid="ignore"):
            f = im[..., :-1] / (im[..., :-1] - im[..., 1:])
            kr = re[..., :-1] + f * (re[..., 1:] - re[..., :-1])
        t = np.minimum(t, np.where(c & (kr > 0) & np.isfinite(kr), kr, np.inf).min(-1))
    return np.where(bad, 0.0, t)


@dataclass(frozen=True)
class Frontier:
    """The largest ki for each kp (one derivative time), grid estimate."""

    td: float
    kp: np.ndarray
    ki: np.ndarray
    band_s_db: np.ndarray


def _frontier(P: np.ndarray, w: np.ndarray, td: float, alpha: float, lim: Limits, wd: float | None,
              n_kp: int = 16) -> Frontier | None:
    r = 1.0 / lim.ms_max
    pts = _forbidden_points(lim)
    cd = 1.0 + (td * 1j * w / (alpha * td * 1j * w + 1.0) if td > 0 else np.zeros(w.size))
    kp_u = float(_first_contact(np.zeros((1, w.size), complex), (cd * P)[None, :], r, pts)[0])
    if not (math.isfinite(kp_u) and kp_u > 0):
        return None
    b = P / (1j * w)

    def ki_of(kp):
        return _first_contact(kp[:, None] * (cd * P)[None, :], b[None, :], r, pts)

    kp = kp_u * np.linspace(0.02, 0.995, n_kp)
    ki = ki_of(kp)
    if not np.isfinite(ki).all():
        return None
    j = int(np.argmax(ki))
    kp2 = np.linspace(kp[max(j - 1, 0)], kp[min(j + 1, n_kp - 1)], 10)[1:-1]
    kp, ki = np.concatenate([kp, kp2]), np.concatenate([ki, ki_of(kp2)])
    order = np.argsort(kp)
    kp, ki = kp[order], ki[order]
    if wd is not None and _finite(wd):
        sel = w <= wd
        L = (kp[:, None] * cd[None, sel] + ki[:, None] / (1j * w[None, sel])) * P[None, sel]
        band = 20 * np.log10((1.0 / np.abs(1.0 + L)).max(-1)) if sel.any() else np.full(kp.size, -np.inf)
    else:
        band = np.full(kp.size, np.nan)
    return Frontier(td, kp, ki, band)


def max_ki(model: LoopModel, limits: Limits, td: float = 0.0, alpha: float = 0.1) -> Settings | None:
    """Largest integral gain subject to Ms <= ms_max and the gain- and phase-margin limits.

    The Nyquist curve of L = (kp (1 + D) + ki/s) P moves along a straight line in the L-plane as
    ki grows at each frequency; the first ki at which it touches the Ms disc (a quadratic in ki per
    frequency, solved in closed form) or a point the margin limits forbid is the largest ki of
    that kp. kp is searched on a grid from 0 to the largest P(D)-only gain meeting the limits,
    then refined about the best. The loop response is exact (delay e^{-jw theta}); the
    search frequency grid is the only approximation, and callers re-evaluate the result with
    the exact engine.

    Parameters
    ----------
    model : LoopModel
        The loop (its controller is ignored); the action (sign) must give negative feedback.
    limits : Limits
        Ms, gain-margin and phase-margin limits.
    td : float
        Fixed derivative time of an ideal-form PID, 0 for PI. [s]
    alpha : float
        Derivative filter factor. [-]

    Returns
    -------
    Settings or None
        Ideal form; None when no dead time or lag bounds the gains (ki unbounded) or no kp
        meets the limits.

    References
    ----------
    Astrom, Panagopoulos & Hagglund 1998 (maximise ki subject to a sensitivity constraint).
    """
    wc = characteristic_w(model)
    if wc is None:
        return None
    w = _grid(wc, None)
    fr = _frontier(_unit_loop(model).L(w), w, td, alpha, limits, None)
    if fr is None:
        return None
    j = int(np.argmax(fr.ki))
    if not fr.ki[j] > 0:
        return None
    kind = "PID" if td > 0 else "PI"
    return Settings(f"max-ki {kind} at Ms <= {limits.ms_max:g}", "ideal", float(fr.kp[j]),
                    float(fr.kp[j] / fr.ki[j]), float(td), alpha)


# ----------------------------------------------------------------------------------------------
# candidates of one loop


def _simc_smoother(rule, proc: Process, extra: float, alpha: float, t0: float | None, P: np.ndarray,
                   w: np.ndarray, lim: Limits, req: Requirement, theta_e: float) -> Settings | None:
    """SIMC with the largest tau_c whose loop still meets the requirement and the limits (grid screen)."""
    wd = float(req.band_rad_s)
    lo = t0 if t0 else 0.01 / wd
    hi = max(100.0 * lo, 100.0 / wd)

    def ok_of(taus):
        ss = [rule(proc, float(t), extra, alpha) for t in taus]
        C = _c_response(ss[0].form, [s.kc for s in ss], [s.ti or np.nan for s in ss], [s.td for s in ss], alpha, w)
        return _screen_ok(_screen(C * P[None, :], w, wd), lim, req)

    taus = np.geomspace(lo, hi, 32)
    ok = ok_of(taus)
    if not ok.any():
        return None
    j = int(np.flatnonzero(ok)[-1])
    if j + 1 < taus.size:
        fine = np.geomspace(taus[j], taus[j + 1], 12)[1:-1]
        okf = ok_of(fine)
        if okf.any():
            taus, j = fine, int(np.flatnonzero(okf)[-1])
    tc = float(taus[j])
    s = rule(proc, tc, extra, alpha)
    kind = "PID" if rule is simc_pid_series else "PI"
    rel = f"{tc / theta_e:.2g} theta = " if theta_e > 0 else ""
    return replace(s, method=f"SIMC {kind}, tau_c = {rel}{tc:.3g} s (smoothest meeting the requirement)")


def _optimum_candidates(P: np.ndarray, w: np.ndarray, wc: float, alpha: float, lim: Limits,
                        req: Requirement) -> list[Settings]:
    wd = float(req.band_rad_s) if req.active else None
    out: list[Settings] = []
    fr_pi = _frontier(P, w, 0.0, alpha, lim, wd)
    if fr_pi is None:
        return out
    tag = f"at Ms <= {lim.ms_max:g}"

    def settings(fr, j, what):
        kind = "PID" if fr.td > 0 else "PI"
        return Settings(f"{what} {kind} {tag}", "ideal", float(fr.kp[j]), float(fr.kp[j] / fr.ki[j]), fr.td, alpha)

    j = int(np.argmax(fr_pi.ki))
    if fr_pi.ki[j] > 0:
        out.append(settings(fr_pi, j, "max-ki"))
    best_band = math.inf
    if wd is not None:
        jb = int(np.nanargmin(np.where(fr_pi.ki >= BEST_BAND_KI_MIN * fr_pi.ki.max(), fr_pi.band_s_db, np.inf)))
        best_band = fr_pi.band_s_db[jb]
        if jb != j and fr_pi.band_s_db[j] - best_band > 0.5:
            out.append(settings(fr_pi, jb, "best-band"))
    fr_d = [f for f in (_frontier(P, w, k / wc, alpha, lim, wd) for k in PID_TD_FACTORS) if f is not None]
    if fr_d:
        best = max(fr_d, key=lambda f: f.ki.max())
        jd = int(np.argmax(best.ki))
        pid_band = math.inf
        if best.ki[jd] >= PID_GAIN_MIN * fr_pi.ki[j]:
            out.append(settings(best, jd, "max-ki"))
            pid_band = best.band_s_db[jd] if wd is not None else math.inf
        if wd is not None:
            def usable(f):
                return np.where(f.ki >= BEST_BAND_KI_MIN * f.ki.max(), f.band_s_db, np.inf)
            fb = min(fr_d, key=lambda f: np.nanmin(usable(f)))
            jb = int(np.nanargmin(usable(fb)))
            if fb.band_s_db[jb] < min(best_band, pid_band) - 0.5:
                out.append(settings(fb, jb, "best-band"))
    return out


def effective_extra_delay(model: LoopModel) -> float:
    """Dead time the loop adds to its process model for the rules: Ts/2 + PV filter lag. [s]

    Parameters
    ----------
    model : LoopModel
        The loop: its sample period ``sample`` [s] and PV filter time constant ``pv_filter`` [s].

    Returns
    -------
    float
        The extra dead time. [s]
    """
    return 0.5 * model.sample + model.pv_filter


def candidate_settings(model: LoopModel, limits: Limits, req: Requirement, alpha: float = 0.1
                       ) -> tuple[list[Settings], list[str]]:
    """Every candidate of one loop, unrounded, each in its native form.

    Parameters
    ----------
    model : LoopModel
        The loop with an action that gives negative feedback.
    limits : Limits
        Robustness limits.
    req : Requirement
        Rejection requirement (may be inactive).
    alpha : float
        Derivative filter factor of the row. [-]

    Returns
    -------
    (list of Settings, list of str)
        Candidates and notes on rules that do not apply.
    """
    proc = model.process
    extra = effective_extra_delay(model)
    notes: list[str] = []
    out: list[Settings] = []
    wc = characteristic_w(model)
    w = _grid(wc, req.band_rad_s if req.active else None) if wc else None
    P = _unit_loop(model).L(w) if w is not None else None
    if proc.kind in ("fopdt", "sopdt", "ipdt"):
        try:
            t0 = simc_tau_c_min(proc, extra)
            theta_e = _effective(proc, extra, for_pid=False)[3]
            rules = [simc_pi]
            if (proc.kind == "sopdt" and min(proc.tau1, proc.tau2) > 0) or (proc.kind == "ipdt" and proc.tau1 > 0):
                rules.append(simc_pid_series)
            for rule in rules:
                kind = "PID" if rule is simc_pid_series else "PI"
                if t0 is not None:
                    lab = "tau_c = theta" if theta_e > 0 else \
                        f"tau_c = {t0:.3g} s ({TAU_C_FLOOR:g} x largest time constant: no dead time)"
                    out.append(replace(rule(proc, t0, extra, alpha), method=f"SIMC {kind}, {lab}"))
                if req.active and P is not None:
                    sm = _simc_smoother(rule, proc, extra, alpha, t0, P, w, limits, req, theta_e)
                    if sm is not None:
                        out.append(sm)
        except ValueError as e:
            notes.append(str(e))
    if proc.kind == "fopdt":
        try:
            out += [amigo_pi(proc, extra, alpha), amigo_pid(proc, extra, alpha)]
        except ValueError as e:
            notes.append(str(e))
    if P is not None:
        out += _optimum_candidates(P, w, wc, alpha, limits, req)
    else:
        notes.append("no dead time, sample period, filter or lag bounds the loop gain: the ki optimum does not exist")
    return out, notes


# ----------------------------------------------------------------------------------------------
# judging and choosing


def judge_candidate(fig: Figures, lim: Limits, req: Requirement) -> tuple[bool, bool, float]:
    """(meets the limits, meets the requirement, spare) of one evaluated candidate.

    The limits are met when the loop is stable, Ms <= ms_max (1 + MS_TOL), both gain margins
    >= gm_min_db - GM_TOL_DB and PM >= pm_min_deg - PM_TOL_DEG (tolerances for the rounding to
    three significant figures). ``spare`` is the smallest relative slack over the limits and the
    requirement: (ms_max - Ms)/ms_max, (GM - gm_min)/gm_min, (PM - pm_min)/pm_min and
    (required level - band level)/A. [-]

    Parameters
    ----------
    fig : Figures
        Exact figures of the candidate: ``ms`` [-], ``gm_db`` [dB], ``gm_low`` [-],
        ``pm_deg`` [deg], ``band_s_db`` [dB].
    lim : Limits
        Robustness limits in force: ``ms_max`` [-], ``gm_min_db`` [dB], ``pm_min_deg`` [deg].
    req : Requirement
        Rejection requirement in force (``band_rad_s`` [rad/s], ``attenuation_db`` [dB]);
        always met when inactive.

    Returns
    -------
    tuple of (bool, bool, float)
        Meets the limits, meets the requirement, and ``spare`` (-inf when unstable). [-]
    """
    down = -20 * math.log10(fig.gm_low) if _finite(fig.gm_low) and fig.gm_low > 0 else math.inf
    gm = fig.gm_db if not math.isnan(fig.gm_db) else math.inf
    pm = fig.pm_deg if not math.isnan(fig.pm_deg) else math.inf
    meets = bool(fig.stable) and fig.ms <= lim.ms_max * (1 + MS_TOL) and gm >= lim.gm_min_db - GM_TOL_DB \
        and down >= lim.gm_min_db - GM_TOL_DB and pm >= lim.pm_min_deg - PM_TOL_DEG
    slack = [(lim.ms_max - fig.ms) / lim.ms_max, (gm - lim.gm_min_db) / max(lim.gm_min_db, 1.0),
             (down - lim.gm_min_db) / max(lim.gm_min_db, 1.0), (pm - lim.pm_min_deg) / max(lim.pm_min_deg, 1.0)]
    req_ok = True
    if req.active:
        band = fig.band_s_db
        req_ok = _finite(band) and band <= req.level_db + 0.01 or band == -math.inf
        slack.append((req.level_db - band) / max(float(req.attenuation_db), 1.0) if _finite(band) else
                     (math.inf if band == -math.inf else -math.inf))
    spare = min(slack) if fig.stable else -math.inf
    return meets, bool(req_ok), float(spare)


def _dc_sign(proc: Process) -> float:
    if proc.kind != "tf":
        return float(np.sign(proc.gain or 0.0))
    num = np.trim_zeros(np.asarray(proc.rational.num, float), "b")
    den = np.trim_zeros(np.asarray(proc.rational.den, float), "b")
    if not num.size or not den.size:
        return 0.0
    return float(np.sign(num[-1] * den[-1]))


def action_is_wrong(model: LoopModel) -> bool:
    """True when the controller action and gain sign give positive feedback at low frequency.

    A sign test only: it proves nothing about a process with open-loop poles in the right
    half-plane (there the stabilising action may well give positive feedback at w = 0).
    Action advice is decided by :func:`check_actions`, from the closed loop itself.

    Parameters
    ----------
    model : LoopModel
        The loop: its ``sign`` (controller action), the sign of the process's low-frequency
        gain and the sign of the controller gain (the integral gain when the gain is zero).

    Returns
    -------
    bool
        True for positive feedback; False when it is negative or a sign is zero.
    """
    c = model.controller
    g = c.kp if c.form == "parallel" else c.kc
    if not g:
        g = c.integral_gain
    return model.sign * _dc_sign(model.process) * float(np.sign(g or 0.0)) < 0


@dataclass(frozen=True)
class ActionCheck:
    """Whether a loop's controller action should be reversed, decided from its closed loop.

    Attributes
    ----------
    stable : bool
        Closed loop stable with the present action and tuning (exact engine).
    other_stable : bool
        Closed loop stable with the other action and the present tuning (exact engine).
    rhp_open : int
        Open-loop poles in the right half-plane (integrators excluded). [-]
    positive_feedback : bool
        The low-frequency sign test (:func:`action_is_wrong`) finds positive feedback.
    wrong : bool or None
        True: reverse the action; False: keep it; None: the present tuning cannot tell (an
        open-loop unstable process, unstable with either action): proposals are tried with both.
    reason : str
        Why, in words (empty when the action is kept).
    """

    stable: bool
    other_stable: bool
    rhp_open: int
    positive_feedback: bool
    wrong: bool | None
    reason: str = ""


def decide_action(stable: bool, other_stable: bool, rhp_open: int, positive_feedback: bool
                  ) -> tuple[bool | None, str]:
    """The action advice of one loop from its closed loop with either action.

    Rules: a stable loop keeps its action unless its process is open-loop stable, the sign
    test finds positive feedback and the other action is stable too (then reversing is safe and
    removes the positive feedback); an unstable loop that the other action makes stable is
    reversed; an unstable loop with an open-loop stable process and positive feedback is reversed
    (with integral action no tuning can stabilise it: 1 + L(s) changes sign on the positive real
    axis); otherwise an open-loop unstable process is undecided (None) and a stable one keeps
    its action. Advice never moves a stable loop to an unstable one.

    Parameters
    ----------
    stable : bool
        Closed loop stable with the present action (exact engine).
    other_stable : bool
        Closed loop stable with the other action, same tuning (exact engine).
    rhp_open : int
        Open-loop right-half-plane poles, integrators excluded. [-]
    positive_feedback : bool
        The low-frequency sign test finds positive feedback.

    Returns
    -------
    tuple of (bool or None, str)
        Reverse (True), keep (False) or undecided (None), and the reason in words.

    References
    ----------
    K. J. Astrom and R. M. Murray, Feedback Systems, 2nd ed., 2021, sec. 10.2 (the Nyquist
    criterion: with P open-loop poles in the right half-plane the curve must encircle -1 P times
    counter-clockwise, so the sign of L(0) says nothing about stability).
    """
    if stable:
        if positive_feedback and rhp_open == 0 and other_stable:
            return True, ("positive feedback at low frequency with an open-loop stable process; the loop is "
                          "stable with the other action too (exact evaluation)")
        return False, ""
    if other_stable:
        return True, ("the closed loop is unstable with the present action and stable with the other one at the "
                      "present tuning (exact evaluation)")
    if rhp_open == 0:
        if positive_feedback:
            return True, ("positive feedback at low frequency with an open-loop stable process: no tuning with "
                          "integral action can stabilise it")
        return False, ""
    return None, ""


def check_actions(models: Sequence[LoopModel]) -> list[ActionCheck]:
    """Decide for many loops whether the controller action should be reversed.

    Each loop is evaluated with the exact engine twice, with its present action and with the
    other one (same tuning), all in one call; :func:`decide_action` turns the two closed loops
    into advice.

    Parameters
    ----------
    models : sequence of LoopModel
        The loops with their present controllers.

    Returns
    -------
    list of ActionCheck
        One per model, in order.
    """
    from .frequency import evaluate

    if not models:
        return []
    both = list(models) + [replace(m, sign=-m.sign) for m in models]
    df = evaluate(both)
    n = len(models)
    out = []
    for i, m in enumerate(models):
        st, ot = bool(df["stable"].iloc[i]), bool(df["stable"].iloc[n + i])
        rhp = df["rhp_open"].iloc[i]
        rhp = int(rhp) if _finite(rhp) else 0
        pos = action_is_wrong(m)
        wrong, reason = decide_action(st, ot, rhp, pos)
        out.append(ActionCheck(st, ot, rhp, pos, wrong, reason))
    return out


def limiting_factor(model: LoopModel, req: Requirement) -> str:
    """What bounds the achievable rejection, in words, with the usual remedies.

    The effective dead time theta_e = theta + Ts/2 + tau_f + (inverse response) bounds the useful
    bandwidth to about 1/theta_e; a right-half-plane zero z bounds it to about z/2.

    Parameters
    ----------
    model : LoopModel
        The loop: process dead time [s], sample period [s], PV filter time constant [s],
        negative lead [s], right-half-plane zeros z (as 1/z [s]) and inner loop are weighed.
    req : Requirement
        Rejection requirement in force; its band edge ``band_rad_s`` [rad/s] is quoted
        when active.

    Returns
    -------
    str
        The largest contribution to the effective dead time, the bandwidth it allows
        [rad/s] and the remedies.

    References
    ----------
    S. Skogestad and I. Postlethwaite, Multivariable Feedback Control, 2nd ed., 2005, sec. 5.5-5.6
    (delay and RHP-zero limitations).
    """
    proc = model.process
    parts = {"dead time": proc.dead_time, "sample period (Ts/2)": 0.5 * model.sample,
             "PV filter": model.pv_filter}
    if proc.lead < 0:
        parts["inverse response (negative lead)"] = -proc.lead
    if proc.kind == "tf" and len(proc.rational.num) > 1:
        z = np.roots(proc.rational.num)
        rhp = z[z.real > 1e-12]
        if rhp.size:
            parts["right-half-plane zero"] = float(np.sum(1.0 / np.abs(rhp)))
    total = sum(parts.values())
    remedies = ["feedforward from a measured disturbance", "a relaxed requirement (less attenuation or a narrower band)"]
    if total <= 0:
        return "the robustness limits with this model's lags; remedies: " + ", ".join(remedies)
    name, value = max(parts.items(), key=lambda kv: kv[1])
    extra = {"dead time": "less dead time (measurement closer to the process, shorter transport)",
             "sample period (Ts/2)": "faster execution of the controller",
             "PV filter": "less PV filtering",
             "inverse response (negative lead)": "another manipulated variable or measurement point",
             "right-half-plane zero": "another manipulated variable or measurement point"}[name]
    remedies.insert(1, extra)
    txt = (f"{name} ({value:.3g} s of an effective {total:.3g} s dead time) bounds the useful bandwidth "
           f"to about 1/theta = {1 / total:.3g} rad/s")
    if req.active:
        txt += f", against a band edge of {float(req.band_rad_s):.3g} rad/s"
    if model.inner is not None:
        txt += "; the inner loop's response adds lag"
    return txt + "; remedies: " + ", ".join(remedies)


# ----------------------------------------------------------------------------------------------
# proposals


@dataclass
class _Job:
    """One loop on its way to a proposal."""

    model: LoopModel                  # action corrected when it was wrong
    row: LoopRow
    limits: Limits
    req: Requirement
    before: Figures
    status: str
    current: Settings | None
    form: str
    settings: list[Settings] = field(default_factory=list)   # rounded, row form
    form_notes: dict[int, str] = field(default_factory=dict)  # settings position -> note on its form
    notes: list[str] = field(default_factory=list)
    corrected_action: str | None = None
    figures: list[Figures] = field(default_factory=list)


def _get(rec: Mapping[str, Any] | None, key: str):
    if rec is None:
        return None
    v = rec.get(key) if hasattr(rec, "get") else None
    return None if v is None or (not isinstance(v, str) and pd.isna(v)) else v


def limits_for(row: LoopRow, figures_row: Mapping[str, Any] | None, policy: Policy) -> Limits:
    """Limits in force: the results row's, else the row's overrides, else the policy's.

    Parameters
    ----------
    row : LoopRow
        The inventory row; its overrides ``ms_max`` [-], ``gm_min_db`` [dB], ``pm_min_deg``
        [deg] apply where the results row has none.
    figures_row : mapping or None
        The row of the results table with the limits in force, or None.
    policy : Policy
        Default limits ``ms_max`` [-], ``gm_min_db`` [dB], ``pm_min_deg`` [deg].

    Returns
    -------
    Limits
    """
    def pick(k):
        v = _get(figures_row, k)
        if v is None:
            v = getattr(row, k, None)
        return float(v if v is not None else getattr(policy, k))
    return Limits(pick("ms_max"), pick("gm_min_db"), pick("pm_min_deg"))


def requirement_for(row: LoopRow, figures_row: Mapping[str, Any] | None) -> Requirement:
    """Rejection requirement in force: the results row's (which may come from a disturbance record), else the row's.

    Parameters
    ----------
    row : LoopRow
        The inventory row; its ``band_rad_s`` [rad/s] and ``attenuation_db`` [dB] apply
        when the results row has no ``band_rad_s`` column.
    figures_row : mapping or None
        The row of the results table with ``band_rad_s`` [rad/s] and ``attenuation_db``
        [dB], or None.

    Returns
    -------
    Requirement
    """
    wd, a = _get(figures_row, "band_rad_s"), _get(figures_row, "attenuation_db")
    if figures_row is None or "band_rad_s" not in figures_row:
        wd, a = row.band_rad_s, row.attenuation_db
    return Requirement(float(wd) if wd is not None else None, float(a) if a is not None else None)


def current_settings(row: LoopRow, model: LoopModel) -> Settings:
    """The row's present settings as :class:`Settings` in the row's form.

    Parameters
    ----------
    row : LoopRow
        The inventory row (not used for the values; kept for a uniform call).
    model : LoopModel
        The loop; its controller gives the settings (parallel gains are held as their
        ideal equivalents: gain [-], integral time [s], derivative time [s]).

    Returns
    -------
    Settings
        With method ``current``.
    """
    c = model.controller
    if c.form == "parallel":
        return Settings("current", "parallel", c.kp, (c.kp / c.ki if c.ki else None), (c.kd / c.kp if c.kp else 0.0),
                        c.alpha)
    return Settings("current", c.form, c.kc, c.ti or None, c.td or 0.0, c.alpha)


def _in_row_form(s: Settings, form: str, conventions: Mapping[str, str]) -> tuple[Settings, str]:
    t = to_form(s, form)
    note = ""
    if t is None:
        t = to_form(s, "ideal")
        note = (f"{s.method}: no series form exists for these settings (Ti < 4 Td); given in ideal form: "
                "check the controller offers it")
    return rounded(t, conventions), note


def _prepare(model: LoopModel, row: LoopRow, figures_row: Mapping[str, Any] | None, policy: Policy,
             reverse: bool = False, reason: str = "") -> _Job:
    status = str(_get(figures_row, "status") or "")
    job = _Job(model, row, limits_for(row, figures_row, policy), requirement_for(row, figures_row),
               Figures.of(figures_row) if figures_row is not None else Figures(False, *([math.nan] * 6)),
               status, current_settings(row, model), row.form)
    if reverse:
        job.model = replace(model, sign=-model.sign)
        job.corrected_action = "direct" if model.sign > 0 else "reverse"
        job.notes.append(f"the controller action appears wrong ({reason}): set the action to "
                         f"{job.corrected_action}; that, not the tuning, is the fix. The settings below assume "
                         "the corrected action")
    cands, notes = candidate_settings(job.model, job.limits, job.req, row.d_filter)
    job.notes += notes
    seen = set()
    for s in cands:
        r, note = _in_row_form(s, job.form, row.conventions)
        key = (r.form, r.kc, r.ti, r.td)
        if key in seen or not r.kc > 0:
            continue
        seen.add(key)
        if note:
            job.form_notes[len(job.settings)] = note
        job.settings.append(r)
    return job


def _evaluate_jobs(jobs: Sequence[_Job], chunk: int = 150) -> None:
    """Evaluate every candidate of every job with the exact engine, in few calls."""
    from .frequency import evaluate

    models, bands, owner = [], [], []
    for k, job in enumerate(jobs):
        for s in job.settings:
            models.append(job.model.with_controller(s.controller()))
            bands.append(job.req.band_rad_s if job.req.active else np.nan)
            owner.append(k)
    figs: list[Figures] = []
    for i in range(0, len(models), chunk):
        df = evaluate(models[i:i + chunk], np.asarray(bands[i:i + chunk], float))
        figs += [Figures.of(df.iloc[j]) for j in range(len(df))]
    for k, f in zip(owner, figs):
        jobs[k].figures.append(f)


def _pct(new: float | None, old: float | None) -> float:
    if new is None or old is None or not _finite(old) or not _finite(new) or old == 0:
        return math.nan
    return 100.0 * (new - old) / abs(old)


def _stage_warnings(new: Settings, old: Settings | None) -> list[str]:
    if old is None:
        return []
    out = []
    for label, a, b in (("controller gain", new.kc, old.kc), ("integral gain", new.ki, old.ki),
                        ("derivative time", to_form(new, "ideal").td, to_form(old, "ideal").td if to_form(old, "ideal") else 0.0)):
        if not a and not b:
            continue
        if not b:
            out.append(f"adds {label.split()[0]} action")
            continue
        if not a:
            out.append(f"removes {label.split()[0]} action")
            continue
        f = a / b
        if f > STAGE_FACTOR or f < 1.0 / STAGE_FACTOR:
            word = "rises" if f > 1 else "falls"
            out.append(f"{label} {word} by a factor {max(f, 1 / f):.2g}: move in stages (about half way first) "
                       "and watch the loop")
    return out


def _finish(job: _Job, step_iae: float = math.nan) -> Proposal:
    conv = job.row.conventions
    cands = []
    for s, f in zip(job.settings, job.figures):
        meets, req_ok, spare = judge_candidate(f, job.limits, job.req)
        cands.append(Candidate(s, f, meets, req_ok, spare))
    robust = [c for c in cands if c.meets_limits]
    full = [c for c in robust if c.meets_requirement]
    best_band = min((c.figures.band_s_db for c in robust if _finite(c.figures.band_s_db)), default=math.nan)
    lf = ""
    if full:
        ki_best = max(c.settings.ki for c in full) or 1.0
        pick = max(full, key=lambda c: (min(c.spare, c.settings.ki / ki_best), c.settings.ki, c.settings.method))
        verdict = "retune"
    elif robust:
        pick = min(robust, key=lambda c: (c.figures.band_s_db, -c.spare, c.settings.method))
        verdict = "not achievable by tuning"
        lf = limiting_factor(job.model, job.req)
    else:
        pick = None
        verdict = "not achievable by tuning"
        lf = ("no setting tried meets the robustness limits with this model (e.g. an open-loop unstable or "
              "strongly non-minimum-phase process): check the model; structural change may be needed")
    if job.status == "passes":
        verdict = "no change needed"
    if job.corrected_action:
        verdict = "check model"
    notes = list(job.notes)
    current_terms = row_terms(job.current, conv) if job.current else {}
    if pick is None:
        return Proposal(verdict, None, "", "", {}, current_terms, {}, job.before, None, lf, best_band,
                        "; ".join(notes), tuple(cands), job.corrected_action)
    s = pick.settings
    notes.append(job.form_notes.get(cands.index(pick), ""))
    terms = row_terms(s, conv)
    changes = {c: _pct(v, current_terms.get(c)) for c, v in terms.items()}
    if s.form != job.form:
        notes.append(f"the row uses {job.form} form; the proposal is in {s.form} form")
    notes += _stage_warnings(s, job.current)
    if verdict == "not achievable by tuning" and job.req.active:
        notes.append(f"best effort: the requirement ({job.req.level_db:.3g} dB up to {job.req.band_rad_s:.3g} rad/s) "
                     f"cannot be met within the robustness limits; best reached {best_band:.3g} dB")
    after = replace(pick.figures, iae=step_iae)
    return Proposal(verdict, s, s.method, settings_text(terms, s.form), terms, current_terms, changes, job.before,
                    after, lf, best_band, "; ".join(dict.fromkeys(n for n in notes if n)), tuple(cands),
                    job.corrected_action)


def _step_iae(jobs: Sequence[_Job], picks: Sequence[Settings | None], policy: Policy) -> list[float]:
    """Load-step IAE of each recommended setting (NaN where none or no time-domain module)."""
    try:
        from .timedomain import step_figures
    except ImportError:
        return [math.nan] * len(jobs)
    models = [None if p is None else j.model.with_controller(p.controller()) for j, p in zip(jobs, picks)]
    if not any(m is not None for m in models):
        return [math.nan] * len(jobs)
    df = step_figures(models, policy)
    return [float(v) if _finite(v) else math.nan for v in df["load_iae_s"].tolist()]


def propose_many(items: Sequence[tuple[LoopModel, LoopRow, Mapping[str, Any] | None]], policy: Policy,
                 with_iae: bool = True) -> list[Proposal]:
    """Proposals of many loops with the candidates of all of them in few engine calls.

    Parameters
    ----------
    items : sequence of (LoopModel, LoopRow, figures row)
        The figures row is the loop's row of the results table (limits and requirement in force,
        current figures, status); None uses the row and the policy.
    policy : Policy
        Policy in force.
    with_iae : bool
        Add the load-step IAE of the recommended settings (time-domain simulation).
    """
    checks = check_actions([m for m, _, _ in items])
    tried: list[list[_Job]] = []
    for (m, r, f), c in zip(items, checks):
        if c.wrong is None:
            # open-loop unstable and unstable either way at the present tuning: tune for both actions
            tried.append([_prepare(m, r, f, policy),
                          _prepare(m, r, f, policy, True, "with the present tuning neither action gives a stable "
                                                          "loop; only with this action do settings that meet the "
                                                          "limits exist (exact evaluation)")])
        else:
            tried.append([_prepare(m, r, f, policy, bool(c.wrong), c.reason)])
    _evaluate_jobs([j for group in tried for j in group])
    jobs, first = [], []
    for group in tried:
        done = [(j, _finish(j)) for j in group]
        job, prop = done[0]
        if len(done) == 2 and not _meets_any(done[0][1]) and _meets_any(done[1][1]):
            job, prop = done[1]
        if len(done) == 2 and prop is done[0][1]:
            prop = replace(prop, note="; ".join(n for n in (prop.note, (
                "with the present tuning neither action gives a stable loop (open-loop unstable process)")) if n))
        jobs.append(job)
        first.append(prop)
    if not with_iae:
        return first
    iae = _step_iae(jobs, [p.settings for p in first], policy)
    return [replace(p, after=replace(p.after, iae=v)) if p.after is not None else p for p, v in zip(first, iae)]


def _meets_any(p: Proposal) -> bool:
    return any(c.meets_limits for c in p.candidates)


def propose(model: LoopModel, row: LoopRow, figures_row: Mapping[str, Any] | None, policy: Policy) -> Proposal:
    """The retuning proposal and feasibility verdict of one loop.

    Parameters
    ----------
    model : LoopModel
        The loop as evaluated (its present controller).
    row : LoopRow
        Its inventory row (form, conventions, derivative filter, overrides).
    figures_row : mapping or None
        Its row of the results table (status, limits and requirement in force, present figures).
    policy : Policy
        Policy in force.

    Returns
    -------
    Proposal
        Verdict, recommended settings in the row's own terms and predicted figures.
    """
    return propose_many([(model, row, figures_row)], policy)[0]


PROPOSAL_COLUMNS = (
    "verdict", "proposal_method", "proposal_form", "proposal_settings", "proposal_kc", "proposal_ti_s",
    "proposal_td_s", "proposal_changes", "proposal_ms", "proposal_gm_db", "proposal_pm_deg", "proposal_dm_s",
    "proposal_band_s_db", "proposal_iae_s", "best_band_s_db", "limiting_factor", "proposal_note",
)


def _changes_text(p: Proposal) -> str:
    parts = []
    for c, v in p.changes_pct.items():
        label = _TERM_INFO[c][1]
        old, new = p.current_terms.get(c), p.terms.get(c)
        if _finite(v):
            parts.append(f"{label} {v:+.0f} %")
        elif (old in (None, 0) or not _finite(old)) and new not in (None, 0):
            parts.append(f"{label} added")
        elif new in (None, 0) and old not in (None, 0):
            parts.append(f"{label} removed")
    return ", ".join(parts)


def proposal_record(p: Proposal | None) -> dict[str, Any]:
    """The results columns of one proposal (:data:`PROPOSAL_COLUMNS`).

    Parameters
    ----------
    p : Proposal or None
        The outcome for one loop; None for a loop with no proposal (blank text, NaN figures).

    Returns
    -------
    dict
        Column -> value; settings in project units (``proposal_kc`` [-], ``proposal_ti_s``
        [s], ``proposal_td_s`` [s]) and predicted figures (``proposal_ms`` [-],
        ``proposal_gm_db`` [dB], ``proposal_pm_deg`` [deg], ``proposal_dm_s`` [s],
        ``proposal_band_s_db`` [dB], ``proposal_iae_s`` [s]).
    """
    rec: dict[str, Any] = {c: math.nan for c in PROPOSAL_COLUMNS}
    for c in ("verdict", "proposal_method", "proposal_form", "proposal_settings", "proposal_changes",
              "limiting_factor", "proposal_note"):
        rec[c] = ""
    if p is None:
        return rec
    rec.update(verdict=p.verdict, limiting_factor=p.limiting_factor, proposal_note=p.note,
               best_band_s_db=p.best_band_s_db)
    if p.settings is not None:
        s = p.settings
        ideal_like = s if s.form != "parallel" else replace(s, form="ideal")
        rec.update(proposal_method=p.method, proposal_form=s.form, proposal_settings=p.text,
                   proposal_kc=ideal_like.kc, proposal_ti_s=ideal_like.ti if ideal_like.ti else math.nan,
                   proposal_td_s=ideal_like.td, proposal_changes=_changes_text(p))
    if p.after is not None:
        a = p.after
        rec.update(proposal_ms=a.ms, proposal_gm_db=a.gm_db, proposal_pm_deg=a.pm_deg, proposal_dm_s=a.dm_s,
                   proposal_band_s_db=a.band_s_db, proposal_iae_s=a.iae)
    return rec


def add_proposals(audit) -> None:
    """Pipeline stage: a proposal and a verdict for every row.

    Proposals are made for rows whose status is not ``passes`` (``--propose failing``), for
    every evaluated row (``all``) or for none (``none``). Adds :data:`PROPOSAL_COLUMNS` to
    ``audit.results`` and stores the :class:`Proposal` objects in
    ``audit.extras['proposals'][row.index]``.

    Parameters
    ----------
    audit : Audit
        The run, after the frequency (and cascade) stages; ``options.propose`` selects the
        rows, the inventory's policy gives the limits; ``results`` and ``extras`` change in place.
    """
    res = audit.results
    rows = audit.inventory.rows
    policy = audit.inventory.policy
    mode = getattr(audit.options, "propose", "failing")
    out: dict[int, Proposal] = {}
    todo: list[int] = []
    unjudged = audit.extras.get("records_unjudged_status", {})
    for i, row in enumerate(rows):
        model = audit.models[i]
        status = str(res.at[i, "status"]) if "status" in res.columns else ""
        if i in unjudged and unjudged[i] in ("passes", "marginal"):
            status = unjudged[i]   # fails only because its record could not be used: the fix is the record
        if model is None or status == "invalid":
            out[i] = Proposal("not evaluated", note="the row could not be evaluated: fix the inventory row first")
        elif mode == "none":
            out[i] = Proposal("no change needed" if status == "passes" else "",
                              note="" if status == "passes" else "proposals not requested (--propose none)")
        elif status == "passes" and mode != "all":
            out[i] = Proposal("no change needed")
        else:
            todo.append(i)
    if todo:
        # cascades: innermost loops first; each outer loop is proposed against the proposed
        # tuning of its inner loop (the inner loop keeps its present tuning when it needs none)
        from .cascade import compose, tuning_levels
        links = audit.extras.get("cascade")
        inner_of = getattr(links, "inner_of", {}) or {}
        composed = getattr(links, "composed", frozenset()) or frozenset()
        todo_set = set(todo)
        proposed_models: dict[int, object] = {}
        for level in tuning_levels(rows):
            batch = [i for i in level if i in todo_set]
            if not batch:
                continue
            items = []
            for i in batch:
                m = audit.models[i]
                j = inner_of.get(i)
                if j is not None and i in composed and j in proposed_models:
                    m = compose(m, proposed_models[j])
                items.append((m, rows[i], res.iloc[i]))
            for (m, _, _), i, p in zip(items, batch, propose_many(items, policy)):
                out[i] = p
                if p.settings is not None:
                    proposed_models[i] = m.with_controller(p.settings.controller())
    recs = [proposal_record(out.get(i)) for i in range(len(rows))]
    for c in PROPOSAL_COLUMNS:
        vals = [r[c] for r in recs]
        res[c] = pd.Series(vals, index=res.index, dtype=object if isinstance(recs[0][c], str) else float) \
            if recs else pd.Series([], dtype=float)
    audit.extras["proposals"] = {rows[i].index: out[i] for i in range(len(rows))}
