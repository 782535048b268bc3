"""Process models, controller forms and the loop transfer L(s), kept exact.

A loop is held as rational factors (coefficient arrays in descending powers of
s, s in [1/s]) and one pure dead time [s]. Nothing here approximates the delay:
:meth:`LoopModel.L` evaluates e^{-j w theta} directly.

References
----------
.. [1] K. J. Astrom and T. Hagglund, PID Controllers: Theory, Design, and Tuning,
   2nd ed., ISA, 1995, ch. 3 (controller forms and their conversions).
.. [2] K. J. Astrom and B. Wittenmark, Computer-Controlled Systems, 3rd ed., 1997
   (a zero-order hold adds about half a sample period of dead time).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .rows import LoopRow

MODEL_TYPES = ("fopdt", "sopdt", "ipdt", "tf")
FORMS = ("ideal", "series", "parallel")


def _lead_trimmed(coef) -> tuple[float, ...]:
    """Coefficients as floats without leading zeros (np.trim_zeros 'f', without its per-call overhead)."""
    vals = np.atleast_1d(np.asarray(coef, float)).tolist()
    i = 0
    while i < len(vals) and vals[i] == 0:
        i += 1
    return tuple(vals[i:])


def _polymul(a, b) -> np.ndarray:
    """Product of two coefficient sequences (np.polymul without building poly1d objects)."""
    return np.convolve(a, b) if len(a) and len(b) else np.polymul(a, b)


@dataclass(frozen=True)
class Rational:
    """A rational transfer function num(s)/den(s), coefficients descending in s."""

    num: tuple[float, ...]
    den: tuple[float, ...]

    @staticmethod
    def of(num, den) -> "Rational":
        """Build from sequences, trimming leading zeros.

        Parameters
        ----------
        num, den : sequence of float
            Numerator and denominator coefficients, descending powers of s (s in [1/s]).
        """
        return Rational(_lead_trimmed(num) or (0.0,), _lead_trimmed(den))

    def __mul__(self, other: "Rational") -> "Rational":
        return Rational.of(_polymul(self.num, other.num), _polymul(self.den, other.den))

    def __add__(self, other: "Rational") -> "Rational":
        n = np.polyadd(_polymul(self.num, other.den), _polymul(other.num, self.den))
        return Rational.of(n, _polymul(self.den, other.den))

    def scale(self, k: float) -> "Rational":
        """k times this transfer function."""
        return Rational.of(np.asarray(self.num) * k, self.den)

    def __call__(self, s: np.ndarray) -> np.ndarray:
        s = np.asarray(s, dtype=complex)
        return np.polyval(self.num, s) / np.polyval(self.den, s)



ONE = Rational((1.0,), (1.0,))


def lag(tau: float) -> Rational:
    """First-order lag 1/(tau s + 1); a zero tau gives 1.

    Parameters
    ----------
    tau : float
        Time constant. [s]
    """
    return ONE if not tau else Rational.of([1.0], [tau, 1.0])


@dataclass(frozen=True)
class Process:
    """An identified process model P(s) = rational(s) e^{-theta s}.

    Attributes
    ----------
    kind : str
        fopdt, sopdt, ipdt or tf.
    rational : Rational
        Delay-free part, gain included. [-] (ipdt: [1/s] at low frequency)
    dead_time : float
        theta. [s]
    gain, tau1, tau2, lead : float
        The parameters as entered, for tuning rules. [-] or [1/s], [s]
    """

    kind: str
    rational: Rational
    dead_time: float = 0.0
    gain: float | None = None
    tau1: float = 0.0
    tau2: float = 0.0
    lead: float = 0.0

    def response(self, w: np.ndarray) -> np.ndarray:
        """P(jw) with the exact delay; w in [rad/s]."""
        w = np.asarray(w, float)
        return self.rational(1j * w) * np.exp(-1j * w * self.dead_time)


def make_process(kind: str, gain: float | None = None, tau1: float | None = None, tau2: float | None = None,
                 lead: float | None = None, dead_time: float | None = None,
                 num=None, den=None) -> Process:
    """The process model of one row.

    Parameters
    ----------
    kind : str
        ``fopdt``: K e^{-theta s}/(tau1 s + 1); ``sopdt``: K (lead s + 1) e^{-theta s}/((tau1 s + 1)(tau2 s + 1));
        ``ipdt``: K e^{-theta s}/(s (tau1 s + 1)), tau1 optional; ``tf``: num(s)/den(s) e^{-theta s}.
    gain : float
        K. [-] for fopdt/sopdt, [1/s] for ipdt.
    tau1, tau2, lead, dead_time : float
        Time constants, lead time and dead time. [s]
    num, den : sequence of float
        tf coefficients, descending powers of s.
    """
    theta = float(dead_time or 0.0)
    t1, t2, ld = float(tau1 or 0.0), float(tau2 or 0.0), float(lead or 0.0)
    if kind == "fopdt":
        r = lag(t1).scale(gain)
    elif kind == "sopdt":
        r = (lag(t1) * lag(t2) * Rational.of([ld, 1.0], [1.0])).scale(gain)
    elif kind == "ipdt":
        r = (Rational.of([1.0], [1.0, 0.0]) * lag(t1)).scale(gain)
    elif kind == "tf":
        r = Rational.of(num, den)
        return Process(kind, r, theta, None, 0.0, 0.0, 0.0)
    else:
        raise ValueError(f"unknown model type {kind!r}")
    return Process(kind, r, theta, float(gain), t1, t2, ld)


@dataclass(frozen=True)
class Controller:
    """A PID controller in one of three forms, settings in project units.

    ideal:    C = kc [1 + 1/(ti s) + td s/(alpha td s + 1)]
    series:   C = kc (1 + 1/(ti s)) (td s + 1)/(alpha td s + 1)
    parallel: C = kp + ki/s + kd s/(alpha (kd/kp) s + 1)

    ``ti`` None (or 0) means no integral action; ``td`` 0 means none.

    Attributes
    ----------
    kc : float  Controller gain. [-]
    ti : float | None  Integral time. [s]
    td : float  Derivative time. [s]
    kp, ki, kd : float  Parallel gains. [-], [1/s], [s]
    alpha : float  Derivative filter factor. [-]
    """

    form: str = "ideal"
    kc: float = 0.0
    ti: float | None = None
    td: float = 0.0
    kp: float = 0.0
    ki: float = 0.0
    kd: float = 0.0
    alpha: float = 0.1

    @property
    def rational(self) -> Rational:
        """C(s) as one rational function."""
        a = self.alpha
        if self.form == "parallel":
            c = Rational.of([self.kp], [1.0])
            if self.ki:
                c = c + Rational.of([self.ki], [1.0, 0.0])
            if self.kd:
                tf_ = a * self.kd / self.kp if self.kp else 0.0
                c = c + Rational.of([self.kd, 0.0], [tf_, 1.0])
            return c
        ti, td, kc = self.ti, self.td or 0.0, self.kc
        if self.form == "series":
            c = Rational.of([kc], [1.0])
            if ti:
                c = c * Rational.of([ti, 1.0], [ti, 0.0])
            if td:
                c = c * Rational.of([td, 1.0], [a * td, 1.0])
            return c
        c = ONE
        if ti:
            c = c + Rational.of([1.0], [ti, 0.0])
        if td:
            c = c + Rational.of([td, 0.0], [a * td, 1.0])
        return c.scale(kc)

    @property
    def integral_gain(self) -> float:
        """ki = lim s->0 s C(s). [1/s] (0 without integral action)."""
        if self.form == "parallel":
            return self.ki or 0.0
        return self.kc / self.ti if self.ti else 0.0



def series_to_ideal(kc: float, ti: float, td: float) -> tuple[float, float, float]:
    """Series (interacting) settings to ideal (non-interacting), filter aside.

    kc' = kc (1 + td/ti), ti' = ti + td, td' = ti td/(ti + td)  (Astrom & Hagglund 1995, eq. 3.10).

    Parameters
    ----------
    kc : float
        Series controller gain. [-]
    ti, td : float
        Series integral and derivative times. [s]

    Returns
    -------
    tuple of float
        Ideal (kc [-], ti [s], td [s]).
    """
    return kc * (1.0 + td / ti), ti + td, ti * td / (ti + td)


def ideal_to_series(kc: float, ti: float, td: float) -> tuple[float, float, float] | None:
    """Ideal settings to series; exists only when ti >= 4 td (Astrom & Hagglund 1995, eq. 3.11).

    Parameters
    ----------
    kc : float
        Ideal controller gain. [-]
    ti, td : float
        Ideal integral and derivative times. [s]

    Returns
    -------
    tuple of float or None
        Series (kc [-], ti [s], td [s]), or None when no series equivalent exists.
    """
    if td == 0:
        return kc, ti, 0.0
    disc = 1.0 - 4.0 * td / ti
    if disc < 0:
        return None
    r = math.sqrt(disc)
    return kc / 2 * (1 + r), ti / 2 * (1 + r), ti / 2 * (1 - r)


def ideal_to_parallel(kc: float, ti: float | None, td: float) -> tuple[float, float, float]:
    """kp = kc, ki = kc/ti, kd = kc td.

    Parameters
    ----------
    kc : float
        Controller gain. [-]
    ti : float or None
        Integral time; None for no integral action. [s]
    td : float
        Derivative time. [s]

    Returns
    -------
    tuple of float
        (kp [-], ki [1/s], kd [s]).
    """
    return kc, (kc / ti if ti else 0.0), kc * td


def parallel_to_ideal(kp: float, ki: float, kd: float) -> tuple[float, float | None, float]:
    """kc = kp, ti = kp/ki, td = kd/kp.

    Parameters
    ----------
    kp : float
        Proportional gain. [-]
    ki : float
        Integral gain. [1/s]
    kd : float
        Derivative gain. [s]

    Returns
    -------
    tuple
        (kc [-], ti [s] or None, td [s]).
    """
    return kp, (kp / ki if ki else None), (kd / kp if kp else 0.0)


@dataclass(frozen=True)
class LoopModel:
    """One feedback loop: L(s) = sign C(s) P(s) F(s) e^{-(theta + Ts/2) s} [times T_inner(s)].

    Attributes
    ----------
    tag : str
    process : Process
    controller : Controller
    sign : float
        +1 for reverse action, -1 for direct action. [-]
    pv_filter : float
        PV filter time constant tau_f; F = 1/(tau_f s + 1). [s]
    sample : float
        Controller execution period Ts, adding Ts/2 of dead time. [s]
    inner : LoopModel | None
        For a cascade's outer loop whose model relates the outer PV to the inner PV:
        the inner loop, whose set-point-to-PV response multiplies P.
    """

    tag: str
    process: Process
    controller: Controller
    sign: float = 1.0
    pv_filter: float = 0.0
    sample: float = 0.0
    inner: "LoopModel | None" = None

    @property
    def delay(self) -> float:
        """Total dead time of the loop's own path, theta + Ts/2. [s]"""
        return self.process.dead_time + 0.5 * self.sample

    @property
    def rational(self) -> Rational:
        """sign C P F without the delay and without the inner loop."""
        return (self.controller.rational * self.process.rational * lag(self.pv_filter)).scale(self.sign)

    def with_controller(self, controller: Controller) -> "LoopModel":
        """The same loop with other settings (for proposals).

        Parameters
        ----------
        controller : Controller
            The settings to put in place of the present ones.
        """
        # what dataclasses.replace does, without its look-up of the fields (called per candidate)
        return type(self)(self.tag, self.process, controller, self.sign, self.pv_filter, self.sample, self.inner)

    def L(self, w: np.ndarray) -> np.ndarray:
        """Loop transfer L(jw), exact delay, inner loop included; w in [rad/s]."""
        w = np.asarray(w, float)
        out = self.rational(1j * w) * np.exp(-1j * w * self.delay)
        if self.inner is not None:
            out = out * self.inner.T_sp(w)
        return out

    def T_sp(self, w: np.ndarray) -> np.ndarray:
        """Set-point-to-PV response L/(F (1 + L)) (the PV filter acts in the feedback path).

        Parameters
        ----------
        w : ndarray
            Frequencies. [rad/s]
        """
        Lw = self.L(w)
        F = lag(self.pv_filter)(1j * np.asarray(w, float))
        return Lw / (F * (1.0 + Lw))

    def S(self, w: np.ndarray) -> np.ndarray:
        """Sensitivity 1/(1 + L(jw)).

        Parameters
        ----------
        w : ndarray
            Frequencies. [rad/s]
        """
        return 1.0 / (1.0 + self.L(w))

    def T(self, w: np.ndarray) -> np.ndarray:
        """Complementary sensitivity L/(1 + L).

        Parameters
        ----------
        w : ndarray
            Frequencies. [rad/s]
        """
        Lw = self.L(w)
        return Lw / (1.0 + Lw)


def controller_from_row(row: LoopRow) -> Controller:
    """The controller of a validated row.

    Parameters
    ----------
    row : LoopRow
        A row without errors.
    """
    if row.form == "parallel":
        return Controller("parallel", kp=row.kp or 0.0, ki=row.ki or 0.0, kd=row.kd or 0.0, alpha=row.d_filter)
    return Controller(row.form, kc=row.kc or 0.0, ti=row.ti or None, td=row.td or 0.0, alpha=row.d_filter)


def process_from_row(row: LoopRow) -> Process:
    """The process model of a validated row.

    Parameters
    ----------
    row : LoopRow
        A row without errors.
    """
    return make_process(row.model, row.gain, row.tau1, row.tau2, row.lead, row.dead_time, row.num, row.den)


def model_from_row(row: LoopRow, inner: LoopModel | None = None) -> LoopModel:
    """The loop of a validated row.

    Parameters
    ----------
    row : LoopRow
        A row without errors.
    inner : LoopModel, optional
        For a cascade's outer loop with ``inner_pv``: the inner loop.
    """
    return LoopModel(
        tag=row.tag or f"row {row.excel_row}",
        process=process_from_row(row),
        controller=controller_from_row(row),
        sign=1.0 if row.action == "reverse" else -1.0,
        pv_filter=row.pv_filter or 0.0,
        sample=row.sample or 0.0,
        inner=inner,
    )
