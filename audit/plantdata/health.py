"""Loop health of one record: use, oscillation, sticking valve and the minimum-variance index.

Arrays in, one :class:`LoopHealth` out; the pipeline stage and the benchmark call
:func:`loop_health`. Use figures cover the whole record; the oscillation, valve and variance
analyses need uniformly sampled closed-loop data and take the longest stretch of it
(:func:`analysis_stretch`): every sample with ``sp``, ``pv`` and ``op``, the loop closed where a
mode is logged, no interval longer than 1.5 sample intervals.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .oscillation import Oscillation, detect_oscillation
from .use import ModeWords, Use, loop_use
from .valve import ValveTest, assess_valve
from .variance import MAX_ORDER, HarrisIndex, delay_samples, harris_index

#: Fewest samples in the analysed stretch for oscillation, valve and variance figures. [-]
MIN_STRETCH = 10 * MAX_ORDER


@dataclass(frozen=True)
class HealthSettings:
    """Settings of the health analyses (from the policy).

    Attributes
    ----------
    words : ModeWords
        The site's mode words.
    limit_band_pct : float
        ``op`` within this of a limit counts as at the limit. [%]
    sp_change_min_pct : float
        Smallest set-point move counted. [% of range]
    min_amplitude_pct : float
        Smallest oscillation amplitude that matters. [% of range]
    ar_criterion : str
        ``aic`` or ``bic`` for the AR order of the Harris index.
    max_gap_s : float or None
        Longest interval that is not a gap; 5 sample intervals when None. [s]
    """

    words: ModeWords = field(default_factory=ModeWords)
    limit_band_pct: float = 0.5
    sp_change_min_pct: float = 0.1
    min_amplitude_pct: float = 0.25
    ar_criterion: str = "aic"
    max_gap_s: float | None = None


@dataclass(frozen=True)
class LoopHealth:
    """Everything the health analyses found in one record.

    Attributes
    ----------
    use : Use
        Mode, saturation, range, set-point moves and variability over the whole record.
    oscillation : Oscillation or None
        Oscillation of the control error over the analysed stretch; None without one.
    valve : ValveTest or None
        Sticking-valve tests; None unless the loop oscillates.
    variance : HarrisIndex or None
        Minimum-variance benchmark; None without a stretch or a dead time.
    ts : float
        Sample interval of the analysed stretch. [s]
    stretch : tuple of int
        First and one-past-last sample index of the analysed stretch. [-]
    notes : tuple of str
        Why a figure is missing.
    """

    use: Use
    oscillation: Oscillation | None
    valve: ValveTest | None
    variance: HarrisIndex | None
    ts: float
    stretch: tuple[int, int]
    notes: tuple[str, ...]


def analysis_stretch(t: np.ndarray, ok: np.ndarray) -> tuple[int, int]:
    """The longest run of usable, evenly spaced samples.

    Parameters
    ----------
    t : ndarray
        Sample times, ascending. [s]
    ok : ndarray of bool
        Which samples are usable.

    Returns
    -------
    (int, int)
        Start and one-past-end index; (0, 0) when no sample is usable.
    """
    t = np.asarray(t, dtype=float)
    ok = np.asarray(ok, dtype=bool).copy()
    if t.size < 2 or not ok.any():
        return 0, 0
    dt = np.diff(t)
    med = float(np.median(dt))
    brk = np.concatenate(([True], dt > 1.5 * med)) | ~ok     # a run starts after a break
    run_id = np.cumsum(brk)
    run_id[~ok] = 0
    counts = np.bincount(run_id)
    counts[0] = 0
    best = int(np.argmax(counts))
    if counts[best] == 0:
        return 0, 0
    idx = np.flatnonzero(run_id == best)
    return int(idx[0]), int(idx[-1]) + 1


def loop_health(t: np.ndarray, sp: np.ndarray | None, pv: np.ndarray | None, op: np.ndarray | None,
                mode: np.ndarray | None = None, *, dead_time_s: float | None = None,
                integrating: bool = False, settings: HealthSettings = HealthSettings()) -> LoopHealth:
    """Health figures of one loop's record.

    Parameters
    ----------
    t : ndarray
        Sample times, ascending. [s]
    sp, pv : ndarray or None
        Set point and process value; None when not logged. [% of range]
    op : ndarray or None
        Controller output; None when not logged. [%]
    mode : ndarray of object or None
        Mode words; None when not logged.
    dead_time_s : float or None
        Process dead time from the loop's model (with half the controller's sample); None
        when unknown (no Harris index). [s]
    integrating : bool
        True for an integrating process (the valve test then fits ``pv``).
    settings : HealthSettings
        Settings from the policy.

    Returns
    -------
    LoopHealth
    """
    t = np.asarray(t, dtype=float)
    use = loop_use(t, sp, pv, op, mode, words=settings.words, limit_band_pct=settings.limit_band_pct,
                   sp_change_min_pct=settings.sp_change_min_pct, max_gap_s=settings.max_gap_s)
    notes: list[str] = []
    if sp is None or pv is None or op is None:
        notes.append("sp, pv and op are all needed for the oscillation, valve and variance figures")
        return LoopHealth(use, None, None, None, math.nan, (0, 0), tuple(notes))
    sp_, pv_, op_ = (np.asarray(x, dtype=float) for x in (sp, pv, op))
    ok = np.isfinite(sp_) & np.isfinite(pv_) & np.isfinite(op_)
    if mode is not None:
        cls = settings.words.classify(mode)
        ok &= (cls == "automatic") | (cls == "cascade")
    a, b = analysis_stretch(t, ok)
    if b - a < MIN_STRETCH:
        notes.append(f"longest closed-loop stretch has {b - a} samples, fewer than {MIN_STRETCH}: "
                     "no oscillation, valve or variance figures")
        return LoopHealth(use, None, None, None, math.nan, (a, b), tuple(notes))
    ts = float(np.median(np.diff(t[a:b])))
    e = sp_[a:b] - pv_[a:b]
    osc = detect_oscillation(e, ts, min_amplitude_pct=settings.min_amplitude_pct)
    valve = None
    if osc.oscillating:
        valve = assess_valve(op_[a:b], pv_[a:b], ts, osc.period_s, integrating=integrating,
                             dead_time_s=dead_time_s or 0.0)
    var = None
    if dead_time_s is None or not math.isfinite(dead_time_s):
        notes.append("no dead time from a model: no Harris index")
    else:
        var = harris_index(e, delay_samples(dead_time_s, ts), criterion=settings.ar_criterion)
    return LoopHealth(use, osc, valve, var, ts, (a, b), tuple(notes))
