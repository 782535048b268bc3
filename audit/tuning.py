"""Tuning settings and the published rules: SIMC, AMIGO, controller forms and the row's own terms.

What a proposal is made of, kept apart from the search for it (:mod:`audit.candidates`) and the
choice among the candidates (:mod:`audit.proposals`):

* the data of a proposal: :class:`Limits`, :class:`Requirement`, :class:`Settings`,
  :class:`Figures`, :class:`Candidate` and :class:`Proposal`;
* SIMC PI (fopdt, sopdt by the half rule, ipdt) and SIMC PID in series form (sopdt, ipdt with a
  lag) for a given tau_c [1]_, and AMIGO PI and PID (fopdt) [2]_;
* conversions between the ideal, series and parallel forms, the row's own terms (PB, reset rate,
  minutes, ...) and their rounding to three significant figures as an engineer types them (gain,
  integral gain and integral time rounded towards the more robust side).

Effective dead time. SIMC and AMIGO use the loop's effective dead time
theta_e = theta + Ts/2 + tau_f (the PV filter lag counted as dead time by the half rule [1]_),
plus tau2/2 (sopdt PI, half rule), the lag of an ipdt model for PI (half of it), and |lead| for
a negative lead (inverse response counted as dead time [1]_). When theta_e is zero SIMC's
tau_c has no natural floor; tau_c is then floored at :data:`TAU_C_FLOOR` times the largest
time constant (an ipdt model without lag, dead time, sample period or filter gets no tight
SIMC candidate: only the requirement sets its speed).

The search for candidates is in :mod:`audit.candidates`, the choice and the stage in
:mod:`audit.proposals`.

References
----------
.. [1] S. Skogestad, "Simple analytic rules for model reduction and PID controller tuning",
   J. Process Control 13 (2003) 291-309, sec. 3 (half rule), eqs. (27)-(29) (SIMC settings) and
   its table of robustness margins for tau_c = theta.
.. [2] K. J. Astrom and T. Hagglund, "Revisiting the Ziegler-Nichols step response method for
   PID control", J. Process Control 14 (2004) 635-650 (the AMIGO PI and PID rules).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Any, Mapping

import pandas as pd

from . import units
from .loop import Controller, LoopModel, Process, ideal_to_series, series_to_ideal
from .rows import LoopRow

#: With no effective dead time, SIMC's tau_c is floored at this fraction of the largest time constant. [-]
TAU_C_FLOOR = 0.1

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
            if type(v) is float:     # the common case (NaN stays NaN), without pandas' missing-value test
                return v
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
        One of :data:`audit.proposals.VERDICTS`.
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
    if type(x) is float:         # the common case, without pandas' general missing-value test
        return math.isfinite(x)
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

