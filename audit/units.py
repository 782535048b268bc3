"""Unit conversions used at the door (reading the inventory) and on the way back out
(writing a proposal in the row's own terms).

Project units: time [s], frequency [rad/s], controller gain [-] (% output per % of PV
range), integral gain [1/s], derivative gain [s], process gain [-] (% of PV range per
% output; integrating processes [1/s]), amplitudes [% of PV range].

Every function here is a closed-form conversion that is common practice in process
control; the controller-setting ones are stated in Astrom & Hagglund [1]_.

References
----------
.. [1] K. J. Astrom and T. Hagglund, PID Controllers: Theory, Design, and Tuning,
   2nd ed., ISA, 1995, sec. 3.2 (proportional band, reset rate, controller forms).
"""

from __future__ import annotations

import math

TIME_UNITS: dict[str, float] = {"s": 1.0, "min": 60.0, "h": 3600.0}
"""Seconds per unit for the time suffixes accepted in column names. [s]"""


def time_to_s(value: float, unit: str) -> float:
    """A time in ``unit`` (``s``, ``min`` or ``h``) in seconds.

    Parameters
    ----------
    value : float
        Time in ``unit``. [s], [min] or [h]
    unit : str
        ``s``, ``min`` or ``h``.

    Returns
    -------
    float
        The same time. [s]
    """
    return float(value) * TIME_UNITS[unit]


def s_to_time(value_s: float, unit: str) -> float:
    """A time in seconds expressed in ``unit`` (``s``, ``min`` or ``h``).

    Parameters
    ----------
    value_s : float
        Time. [s]
    unit : str
        ``s``, ``min`` or ``h``.

    Returns
    -------
    float
        The same time in ``unit``. [s], [min] or [h]
    """
    return float(value_s) / TIME_UNITS[unit]


def kc_from_pb(pb_pct: float) -> float:
    """Controller gain from proportional band, kc = 100 / PB.

    Parameters
    ----------
    pb_pct : float
        Proportional band, > 0. [%]

    Returns
    -------
    float
        Controller gain. [-]

    References
    ----------
    Astrom & Hagglund 1995, sec. 3.2 (proportional band).
    """
    if pb_pct <= 0:
        raise ValueError("proportional band must be positive")
    return 100.0 / float(pb_pct)


def pb_from_kc(kc: float) -> float:
    """Proportional band from controller gain, PB = 100 / kc.

    Parameters
    ----------
    kc : float
        Controller gain, > 0. [-]

    Returns
    -------
    float
        Proportional band. [%]
    """
    if kc <= 0:
        raise ValueError("controller gain must be positive")
    return 100.0 / float(kc)


def ti_from_reset_rpm(reset_rpm: float) -> float | None:
    """Integral time from reset rate: Ti = 1/reset minutes; 0 repeats/min means no integral action.

    Parameters
    ----------
    reset_rpm : float
        Reset rate, >= 0. [repeats/min]

    Returns
    -------
    float or None
        Integral time [s], or None for a zero reset rate.
    """
    if reset_rpm < 0:
        raise ValueError("reset rate must not be negative")
    if reset_rpm == 0:
        return None
    return 60.0 / float(reset_rpm)


def reset_rpm_from_ti(ti_s: float | None) -> float:
    """Reset rate from integral time: 1/Ti with Ti in minutes; no integral action gives 0.

    Parameters
    ----------
    ti_s : float or None
        Integral time, > 0, or None/0 for none. [s]

    Returns
    -------
    float
        Reset rate. [repeats/min]
    """
    if not ti_s:
        return 0.0
    return 60.0 / float(ti_s)


def per_min_to_per_s(value_per_min: float) -> float:
    """A rate per minute as a rate per second (integral gain, integrating process gain).

    Parameters
    ----------
    value_per_min : float
        Rate. [1/min]

    Returns
    -------
    float
        Rate. [1/s]
    """
    return float(value_per_min) / 60.0


def per_s_to_per_min(value_per_s: float) -> float:
    """A rate per second as a rate per minute.

    Parameters
    ----------
    value_per_s : float
        Rate. [1/s]

    Returns
    -------
    float
        Rate. [1/min]
    """
    return float(value_per_s) * 60.0


def span(pv_lo: float, pv_hi: float) -> float:
    """PV range span pv_hi - pv_lo, which must be positive.

    Parameters
    ----------
    pv_lo, pv_hi : float
        Range limits. [engineering units]

    Returns
    -------
    float
        Span. [engineering units]
    """
    s = float(pv_hi) - float(pv_lo)
    if not s > 0:
        raise ValueError("pv_hi must be greater than pv_lo")
    return s


def gain_from_eu(gain_eu: float, pv_lo: float, pv_hi: float) -> float:
    """Process gain in % of PV range per % output from a gain in engineering units per % output.

    gain = gain_eu * 100 / (pv_hi - pv_lo).

    Parameters
    ----------
    gain_eu : float
        Process gain. [engineering units per % output] (integrating: per s)
    pv_lo, pv_hi : float
        PV range. [engineering units]

    Returns
    -------
    float
        Process gain. [-] (integrating: [1/s])
    """
    return float(gain_eu) * 100.0 / span(pv_lo, pv_hi)


def gain_to_eu(gain: float, pv_lo: float, pv_hi: float) -> float:
    """Inverse of :func:`gain_from_eu`.

    Parameters
    ----------
    gain : float
        Process gain. [-] (integrating: [1/s])
    pv_lo, pv_hi : float
        PV range. [engineering units]

    Returns
    -------
    float
        Process gain. [engineering units per % output]
    """
    return float(gain) * span(pv_lo, pv_hi) / 100.0


def eu_to_pct_of_range(amount_eu: float, pv_lo: float, pv_hi: float) -> float:
    """An amplitude in engineering units as % of the PV range.

    Parameters
    ----------
    amount_eu : float
        Amplitude. [engineering units]
    pv_lo, pv_hi : float
        PV range. [engineering units]

    Returns
    -------
    float
        Amplitude. [% of PV range]
    """
    return float(amount_eu) * 100.0 / span(pv_lo, pv_hi)


def db(ratio: float) -> float:
    """20 log10 of a magnitude ratio.

    Parameters
    ----------
    ratio : float
        Magnitude ratio, > 0. [-]

    Returns
    -------
    float
        Level. [dB]
    """
    return 20.0 * math.log10(ratio)


def from_db(level_db: float) -> float:
    """Magnitude ratio of a level in dB, 10^(dB/20).

    Parameters
    ----------
    level_db : float
        Level. [dB]

    Returns
    -------
    float
        Magnitude ratio. [-]
    """
    return 10.0 ** (float(level_db) / 20.0)


def setting_in_convention(quantity: str, value: float | None, convention: str) -> float | None:
    """A controller setting in project units written back in one of the accepted column conventions.

    Parameters
    ----------
    quantity : str
        ``kc``, ``ti``, ``td``, ``ki`` or ``kd``.
    value : float or None
        The setting in project units: kc [-], ti [s] (None: no integral), td [s], ki [1/s], kd [s].
    convention : str
        A column name recorded in ``LoopRow.conventions``: ``kc``, ``pb_pct``, ``ti_s``, ``ti_min``,
        ``ti_h``, ``reset_rpm``, ``td_s``/``_min``/``_h``, ``ki_per_s``, ``ki_per_min``,
        ``kd_s``/``_min``/``_h``.

    Returns
    -------
    float or None
        The value in the convention's own unit; None where the convention cannot express "none"
        (an integral time for no integral action).
    """
    if convention in ("kc", "ki_per_s"):
        return value
    if convention == "pb_pct":
        return pb_from_kc(value)
    if convention == "reset_rpm":
        return reset_rpm_from_ti(value)
    if convention == "ki_per_min":
        return per_s_to_per_min(value or 0.0)
    for prefix in ("ti_", "td_", "kd_"):
        if convention.startswith(prefix) and convention[len(prefix):] in TIME_UNITS:
            if value is None:
                return None
            return s_to_time(value, convention[len(prefix):])
    raise ValueError(f"unknown convention {convention!r} for {quantity}")
