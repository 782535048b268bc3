"""The ranges an inventory value or a policy setting may take: the one table `check` and `run` share.

Every number of a row is checked here after conversion to project units (so a time given in hours
and a gain given in engineering units meet the same range), and so is every policy setting.
The ranges are physically generous (a microsecond to about four months for a time, a gain of 1e-8
to 1e6) and keep every value the engine is given inside what it evaluates in double precision:
a value outside its range, a text that overflows (``1e999``) or a conversion whose result is not
finite makes the row invalid with a message naming its cell, and never reaches the engine.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Range:
    """The accepted values of one quantity, in project units.

    Attributes
    ----------
    unit : str
        Project unit of the quantity (``s``, ``rad/s``, ``dB``, ``-``, ...).
    lo : float
        Smallest magnitude accepted when the value is not zero (and not below ``floor``).
    hi : float
        Largest magnitude accepted.
    zero : bool
        0 is accepted (it means 'none' or 'blank' for the quantity).
    signed : bool
        Negative values are accepted (their magnitude is checked).
    lo_open : bool
        ``lo`` itself is not accepted (e.g. ms_max > 1).
    hi_open : bool
        ``hi`` itself is not accepted (e.g. pm_min_deg < 180).
    whole : bool
        Only whole numbers.
    """

    unit: str
    lo: float
    hi: float
    zero: bool = False
    signed: bool = False
    lo_open: bool = False
    hi_open: bool = False
    whole: bool = False

    def accepts(self, x: float) -> bool:
        """True when ``x`` (project units) lies in the range.

        Parameters
        ----------
        x : float
            The value in the range's unit.
        """
        if not isinstance(x, (int, float)) or not math.isfinite(x):
            return False
        if self.whole and not float(x).is_integer():
            return False
        if x == 0:
            return self.zero or (self.lo == 0 and not self.lo_open)
        if x < 0 and not self.signed:
            return False
        a = abs(x)
        above = a > self.lo if self.lo_open else a >= self.lo
        below = a < self.hi if self.hi_open else a <= self.hi
        return above and below

    def describe(self) -> str:
        """The range in words, e.g. ``from 1e-06 to 1e+07 s, or 0``."""
        u = f" {self.unit}" if self.unit not in ("", "-") else ""
        mag = "in magnitude " if self.signed else ""
        if self.signed and self.lo == 0:
            return f"a number from {-self.hi:g} to {self.hi:g}{u}"
        if self.lo_open:
            span = f"greater than {self.lo:g} and {'less than' if self.hi_open else 'at most'} {self.hi:g}"
        else:
            span = f"from {self.lo:g} to {'just below ' if self.hi_open else ''}{self.hi:g}"
        txt = f"{'a whole number' if self.whole else 'a number'} {mag}{span}{u}"
        if self.zero and self.lo > 0:
            txt += ", or 0"
        return txt


_TIME = Range("s", 1e-6, 1e7)
_TIME0 = Range("s", 1e-6, 1e7, zero=True)

#: Ranges of the row quantities (``LoopRow`` attributes), in project units.
ROW_RANGES: dict[str, Range] = {
    "gain": Range("[-] (ipdt: 1/s)", 1e-8, 1e6, signed=True),
    "tau1": _TIME,
    "tau2": _TIME,
    "lead": Range("s", 1e-6, 1e7, zero=True, signed=True),
    "dead_time": _TIME0,
    "sample": _TIME,
    "pv_filter": _TIME0,
    "kc": Range("-", 1e-6, 1e6),
    "ti": Range("s", 1e-6, 1e8, zero=True),
    "td": _TIME0,
    "kp": Range("-", 1e-6, 1e6, zero=True),
    "ki": Range("1/s", 1e-12, 1e6, zero=True),
    "kd": Range("s", 1e-9, 1e7, zero=True),
    "d_filter": Range("-", 1e-3, 1.0),
    "band_rad_s": Range("rad/s", 1e-9, 1e6),
    "attenuation_db": Range("dB", 1e-3, 200.0),
    "ms_max": Range("-", 1.0, 100.0, lo_open=True),
    "gm_min_db": Range("dB", 1e-3, 100.0),
    "pm_min_deg": Range("deg", 1e-3, 180.0, hi_open=True),
    "pv_lo": Range("EU", 0.0, 1e15, zero=True, signed=True),
    "pv_hi": Range("EU", 0.0, 1e15, zero=True, signed=True),
    "allowed_amplitude": Range("% of range", 1e-9, 1e6),
}

#: A tf coefficient: 0, or a magnitude in this range. [-]
TF_COEFFICIENT = Range("-", 1e-30, 1e30, zero=True, signed=True)
#: Most coefficients of a tf numerator or denominator (a 12th-order model). [-]
TF_MAX_COEFFICIENTS = 13
#: Poles and zeros of a tf model: 0, or a magnitude in this range (1/time constant). [rad/s]
TF_ROOT = Range("rad/s", 1e-7, 1e6, zero=True)
#: Gain of a tf model: ratio of the lowest-order nonzero numerator and denominator coefficients. [-]
TF_GAIN = ROW_RANGES["gain"]

#: A row whose loop needs more frequency-grid points than this is refused (dead time times the highest
#: frequency where abs(L) matters, over the grid's 0.5 rad of delay phase per step). [-]
MAX_GRID_POINTS = 20_000_000

#: A disturbance record's sample interval. [s]
RECORD_INTERVAL = Range("s", 1e-6, 1e7)
#: A disturbance record's values, in % of the PV range (after conversion from engineering units). [%]
RECORD_VALUE = Range("% of range", 0.0, 1e9, zero=True, signed=True)

#: Ranges of the policy settings.
POLICY_RANGES: dict[str, Range] = {
    "ms_max": ROW_RANGES["ms_max"],
    "gm_min_db": ROW_RANGES["gm_min_db"],
    "pm_min_deg": ROW_RANGES["pm_min_deg"],
    "marginal_pct": Range("%", 0.0, 100.0, lo_open=True),
    "band_energy_fraction": Range("-", 0.01, 0.9999),
    "max_gap_s": Range("-", 1.0, 1e6),
    "uniform_tolerance": Range("-", 1e-6, 1.0),
    "min_samples": Range("-", 8, 10_000_000, whole=True),
    "settle_band_pct": Range("%", 0.01, 50.0),
    "cascade_ratio_min": Range("-", 1e-3, 1e3),
    "weight_high": Range("-", 0.0, 1e3, zero=True),
    "weight_medium": Range("-", 0.0, 1e3, zero=True),
    "weight_low": Range("-", 0.0, 1e3, zero=True),
    "change_ms": Range("-", 1e-6, 100.0),
    "change_margin_db": Range("dB", 1e-6, 100.0),
    "change_pm_deg": Range("deg", 1e-6, 180.0),
    "change_band_db": Range("dB", 1e-6, 200.0),
    "model_gain_ratio_max": Range("-", 1.0, 100.0, lo_open=True),
    "model_dead_time_tol": Range("-", 1e-3, 100.0),
    "model_tau_ratio_max": Range("-", 1.0, 100.0, lo_open=True),
    "model_fit_gap_pct": Range("%", 0.0, 100.0, zero=True),
    "model_window_above": Range("-", 100, 1_000_000_000, whole=True),
    "model_window_samples": Range("-", 100, 10_000_000, whole=True),
    "model_window_after": Range("-", 0.5, 100.0),
    "model_window_noise_ratio": Range("-", 1.0, 100.0),
    "model_window_sp_move_pct": Range("%", 0.01, 100.0),
    "auto_min_pct": Range("%", 0.0, 100.0, lo_open=True),
    "op_limited_max_pct": Range("%", 0.0, 100.0, lo_open=True),
    "op_limit_band_pct": Range("%", 0.0, 50.0, zero=True),
    "oscillation_min_amplitude_pct": Range("%", 0.0, 100.0, lo_open=True),
    "harris_min": Range("-", 0.0, 1.0, lo_open=True),
}


@dataclass(frozen=True)
class TextRule:
    """What a text setting of the policy may hold.

    Attributes
    ----------
    kind : str
        ``words`` (comma-separated words, at least one), ``patterns`` (comma-separated column
        names, each holding ``{tag}`` once), ``column`` (one column name), ``choice`` (one of
        ``choices``) or ``zone`` (an IANA time zone, or ``none``).
    choices : tuple of str
        The accepted values of a ``choice``.
    """

    kind: str
    choices: tuple[str, ...] = ()

    def problem(self, text: str) -> str | None:
        """Why ``text`` cannot be used, or None when it can.

        Parameters
        ----------
        text : str
            The value as written (stripped).
        """
        text = str(text).strip()
        if len(text) > 500:
            return "at most 500 characters"
        if self.kind == "choice":
            return None if text.lower() in self.choices else f"one of {', '.join(self.choices)}"
        if self.kind == "zone":
            if not text or text.lower() == "none":
                return None
            try:
                import zoneinfo
                zoneinfo.ZoneInfo(text)
            except (ValueError, KeyError, OSError, ImportError):
                return "an IANA time zone such as Europe/London, or none"
            except Exception:                      # zoneinfo raises its own error types for odd names
                return "an IANA time zone such as Europe/London, or none"
            return None
        if self.kind == "column":
            return None if text and "," not in text else "one column name"
        items = [w.strip() for w in text.split(",")]
        if not any(items) or not all(items):
            return "comma-separated words, none blank"
        if self.kind == "patterns":
            for it in items:
                rest = it.replace("{tag}", "", 1)
                if "{tag}" not in it or "{" in rest or "}" in rest or not rest:
                    return f"column names each holding {{tag}} once besides other text (e.g. {{tag}}.pv), got {it!r}"
        return None

    def describe(self) -> str:
        """The rule in words."""
        return {"words": "comma-separated words", "patterns": "comma-separated column names, each with {tag} once",
                "column": "a column name", "zone": "an IANA time zone, or none",
                "choice": " or ".join(self.choices)}[self.kind]


#: Rules of the text settings of the policy.
POLICY_TEXT_RULES: dict[str, TextRule] = {
    "mode_automatic": TextRule("words"), "mode_manual": TextRule("words"), "mode_cascade": TextRule("words"),
    "export_tag_column": TextRule("column"), "export_signal_column": TextRule("column"),
    "export_value_column": TextRule("column"),
    "export_words_sp": TextRule("words"), "export_words_pv": TextRule("words"), "export_words_op": TextRule("words"),
    "export_words_mode": TextRule("words"),
    "export_columns_sp": TextRule("patterns"), "export_columns_pv": TextRule("patterns"),
    "export_columns_op": TextRule("patterns"), "export_columns_mode": TextRule("patterns"),
    "export_units": TextRule("choice", ("percent", "eu")), "export_timezone": TextRule("zone"),
}


def tf_problems(num: tuple[float, ...], den: tuple[float, ...]) -> list[tuple[str, str]]:
    """What keeps a tf model num(s)/den(s) from being evaluated, as (column, message) pairs.

    Parameters
    ----------
    num, den : tuple of float
        Coefficients in descending powers of s (s in [1/s]), leading denominator coefficient not 0.

    Returns
    -------
    list of (str, str)
        Empty when every coefficient, every pole and zero [rad/s] and the gain [-] lie in their ranges.
    """
    out: list[tuple[str, str]] = []
    for name, c in (("num", num), ("den", den)):
        if len(c) > TF_MAX_COEFFICIENTS:
            out.append((name, f"at most {TF_MAX_COEFFICIENTS} coefficients (a 12th-order model), got {len(c)}"))
        bad = [x for x in c if not TF_COEFFICIENT.accepts(x)]
        if bad:
            out.append((name, f"coefficient {bad[0]:g} outside the range accepted: "
                              f"{TF_COEFFICIENT.describe()}"))
    if out:
        return out
    for name, c in (("num", num), ("den", den)):
        a = np.trim_zeros(np.asarray(c, float), "f")
        if a.size < 2:
            continue
        with np.errstate(all="ignore"):
            r = np.roots(a)
        mags = np.abs(r)
        if not np.all(np.isfinite(mags)):
            out.append((name, "its roots cannot be computed"))
            continue
        scale = max(np.max(mags), 1.0)
        off = [m for m in mags if m > 1e-12 * scale and not TF_ROOT.accepts(float(m))]
        if off:
            what = "pole" if name == "den" else "zero"
            out.append((name, f"a {what} of magnitude {off[0]:.3g} rad/s (time constant {1 / off[0]:.3g} s) lies "
                              f"outside the range accepted: {TF_ROOT.describe()}"))
    if out:
        return out
    n = [x for x in num if x != 0]
    d = [x for x in den if x != 0]
    if n and d:
        g = n[-1] / d[-1]
        if not TF_GAIN.accepts(g):
            out.append(("num", f"gain (lowest-order coefficients num/den) {g:g} outside the range accepted: "
                               f"{TF_GAIN.describe()}"))
    return out


def ranges_markdown() -> str:
    """The ranges as a markdown table (README, 'Ranges')."""
    lines = ["| quantity | accepted |", "|---|---|"]
    for name, r in ROW_RANGES.items():
        lines.append(f"| `{name}` | {r.describe()} |")
    lines.append(f"| tf `num`, `den` | at most {TF_MAX_COEFFICIENTS} coefficients, each {TF_COEFFICIENT.describe()}; "
                 f"poles and zeros {TF_ROOT.describe()}; gain {TF_GAIN.describe()} |")
    lines.append(f"| disturbance record: sample interval | {RECORD_INTERVAL.describe()} |")
    lines.append(f"| disturbance record: values | {RECORD_VALUE.describe()} |")
    lines.append("")
    lines.append("| policy setting | accepted |")
    lines.append("|---|---|")
    for name, r in POLICY_RANGES.items():
        lines.append(f"| `{name}` | {r.describe()} |")
    for name, t in POLICY_TEXT_RULES.items():
        lines.append(f"| `{name}` | {t.describe()} |")
    return "\n".join(lines)
