"""How a loop is used in routine operation: mode, saturation, range, set-point moves, variability.

Figures are shares of time: each sample stands for the interval to the next one (the last for
none: it ends the record); intervals
longer than the gap allowed (a hole in the record) count for nothing, and a sample whose value is
missing counts only in the denominators of the signals it has. All signals are in % (``pv`` and
``sp`` of the instrument range, ``op`` of the output span), time in seconds.

Mode words are the site's own (``AUTO``, ``MAN``, ``CAS``, ``A``, ``LOCAL``...); the policy
lists which mean automatic, manual and cascade (:class:`ModeWords`). A word in none of the
lists is counted as ``other`` and named in the result, never guessed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

#: Default words, compared case-insensitively after trimming.
DEFAULT_AUTOMATIC = ("auto", "automatic", "aut", "a")
DEFAULT_MANUAL = ("man", "manual", "m")
DEFAULT_CASCADE = ("cas", "cascade", "casc", "remote", "rsp")


#: Mode classes, as :meth:`ModeWords.classes` codes them.
AUTOMATIC, MANUAL, CASCADE, OTHER, MISSING = range(5)
CLASS_NAMES = ("automatic", "manual", "cascade", "other", "missing")


@dataclass(frozen=True)
class ModeWords:
    """The site's mode words and what they mean.

    Attributes
    ----------
    automatic : tuple of str
        Words for automatic with a local set point.
    manual : tuple of str
        Words for manual (the operator sets ``op``).
    cascade : tuple of str
        Words for cascade or remote set point (closed loop, set point from elsewhere).
    """

    automatic: tuple[str, ...] = DEFAULT_AUTOMATIC
    manual: tuple[str, ...] = DEFAULT_MANUAL
    cascade: tuple[str, ...] = DEFAULT_CASCADE

    @classmethod
    def from_text(cls, automatic: str, manual: str, cascade: str) -> "ModeWords":
        """Mode words from comma-separated lists (as written in the policy sheet).

        Parameters
        ----------
        automatic, manual, cascade : str
            Comma-separated words, e.g. ``"AUTO, A"``.
        """
        def split(s: str) -> tuple[str, ...]:
            return tuple(w.strip().lower() for w in str(s).split(",") if w.strip())
        return cls(split(automatic), split(manual), split(cascade))

    def classify(self, modes: np.ndarray) -> np.ndarray:
        """The class of every mode word.

        Parameters
        ----------
        modes : ndarray of object or pandas.Categorical
            Mode words as logged; None or NaN where missing (a Categorical, as the record
            reader's codes and labels give it, is classified without touching each sample).

        Returns
        -------
        ndarray of str
            ``automatic``, ``manual``, ``cascade``, ``other`` or ``missing`` per sample.
        """
        return np.array(CLASS_NAMES)[self.classes(modes)]

    def classes(self, modes: np.ndarray) -> np.ndarray:
        """The class of every mode word as a small integer (index into :data:`CLASS_NAMES`).

        Parameters
        ----------
        modes : ndarray of object or pandas.Categorical
            Mode words as logged; None or NaN where missing.

        Returns
        -------
        ndarray of int8
            :data:`AUTOMATIC`, :data:`MANUAL`, :data:`CASCADE`, :data:`OTHER` or :data:`MISSING`.
        """
        codes, uniq = _factorize(modes)
        lut = np.empty(len(uniq) + 1, dtype=np.int8)
        for j, u in enumerate(uniq):
            w = _norm(u)
            lut[j] = (MISSING if w == "" else AUTOMATIC if w in self.automatic else CASCADE if w in self.cascade
                      else MANUAL if w in self.manual else OTHER)
        lut[-1] = MISSING                                    # code -1 takes the last entry
        return lut[codes]

    def unknown(self, modes: np.ndarray) -> tuple[str, ...]:
        """The mode words seen that none of the lists holds, as written (trimmed), sorted.

        Parameters
        ----------
        modes : ndarray of object
            Mode words as logged; None or NaN where missing.
        """
        _, uniq = _factorize(modes)
        known = set(self.automatic) | set(self.manual) | set(self.cascade) | {""}
        return tuple(sorted({str(u).strip() for u in uniq if _norm(u) not in known}))


def _factorize(modes) -> tuple[np.ndarray, list]:
    """Integer codes (-1 missing) and the distinct words of a mode signal."""
    if isinstance(modes, pd.Categorical):
        return np.asarray(modes.codes), list(modes.categories)
    codes, uniq = pd.factorize(pd.Series(np.asarray(modes, dtype=object)), use_na_sentinel=True)
    return codes, list(uniq)


def _norm(w) -> str:
    if w is None or (isinstance(w, float) and math.isnan(w)):
        return ""
    return str(w).strip().lower()


@dataclass(frozen=True)
class Use:
    """How one loop was used over its record.

    Attributes
    ----------
    duration_s : float
        Time covered by the record, gaps left out. [s]
    auto_pct : float
        Share of the time with a known mode spent with the loop closed (automatic or
        cascade); NaN without a mode signal. [%]
    cascade_pct : float
        Share in cascade (part of ``auto_pct``). [%]
    manual_pct : float
        Share in manual. [%]
    other_modes : tuple of str
        Mode words seen that the policy does not map (their time is in no share above).
    op_limited_pct : float
        Share of the time ``op`` was at or beyond a limit (within ``limit_band_pct``). [%]
    op_low_pct, op_high_pct : float
        The same at the low and at the high limit. [%]
    pv_out_of_range_pct : float
        Share of the time ``pv`` was below 0 % or above 100 % of its range. [%]
    sp_changes : int
        Set-point moves larger than the smallest counted; a ramp counts once. [-]
    error_std_pct : float
        Standard deviation of the control error sp - pv while closed (all the time without a
        mode signal). [% of range]
    iae_per_h : float
        Integral of abs(sp - pv) over the same time, per hour. [% of range x s / h]
    closed_s : float
        Time over which the error figures were taken. [s]
    """

    duration_s: float
    auto_pct: float
    cascade_pct: float
    manual_pct: float
    other_modes: tuple[str, ...]
    op_limited_pct: float
    op_low_pct: float
    op_high_pct: float
    pv_out_of_range_pct: float
    sp_changes: int
    error_std_pct: float
    iae_per_h: float
    closed_s: float


def sample_weights(t: np.ndarray, max_gap_s: float | None = None) -> np.ndarray:
    """Time each sample stands for: the interval to the next sample, nothing across a gap.

    Parameters
    ----------
    t : ndarray
        Sample times, ascending. [s]
    max_gap_s : float or None
        Longest interval that is not a gap; 5 x the median interval when None. [s]

    Returns
    -------
    ndarray
        Weights; the last sample gets none (it ends the record). [s]
    """
    t = np.asarray(t, dtype=float)
    if t.size < 2:
        return np.zeros(t.size)
    dt = np.diff(t)
    med = float(np.median(dt))
    lim = 5.0 * med if max_gap_s is None else max_gap_s
    w = np.append(dt, 0.0)
    w[:-1][dt > lim] = 0.0
    return w


def _share(w: np.ndarray, mask: np.ndarray, valid: np.ndarray) -> float:
    tot = float(w[valid].sum())
    return math.nan if tot <= 0 else 100.0 * float(w[mask & valid].sum()) / tot


def count_changes(x: np.ndarray, min_change: float) -> int:
    """Number of moves of a stepwise signal: runs of consecutive changes count once.

    Parameters
    ----------
    x : ndarray
        Signal, e.g. the set point; NaN samples are skipped. [%]
    min_change : float
        Smallest move counted (over a run of consecutive changes). [%]

    Returns
    -------
    int
    """
    v = np.asarray(x, dtype=float)
    v = v[np.isfinite(v)]
    if v.size < 2:
        return 0
    moving = np.diff(v) != 0
    if not moving.any():
        return 0
    edges = np.diff(np.concatenate(([0], moving.astype(np.int8), [0])))
    starts, stops = np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)
    return int(np.count_nonzero(np.abs(v[stops] - v[starts]) >= min_change))


def loop_use(t: np.ndarray, sp: np.ndarray | None, pv: np.ndarray | None, op: np.ndarray | None,
             mode: np.ndarray | None = None, *, words: ModeWords = ModeWords(),
             op_lo: float = 0.0, op_hi: float = 100.0, limit_band_pct: float = 0.5,
             sp_change_min_pct: float = 0.1, max_gap_s: float | None = None) -> Use:
    """Use, saturation, range and variability figures of one loop's record.

    Parameters
    ----------
    t : ndarray
        Sample times, ascending. [s]
    sp : ndarray or None
        Set point; None when not logged. [% of range]
    pv : ndarray or None
        Process value; None when not logged. [% of range]
    op : ndarray or None
        Controller output; None when not logged. [%]
    mode : ndarray of object, pandas.Categorical or None
        Mode words as logged; None when not logged.
    words : ModeWords
        The site's mode words.
    op_lo, op_hi : float
        Output limits. [%]
    limit_band_pct : float
        ``op`` within this of a limit counts as at the limit. [%]
    sp_change_min_pct : float
        Smallest set-point move counted. [% of range]
    max_gap_s : float or None
        Longest interval that is not a gap (:func:`sample_weights`). [s]

    Returns
    -------
    Use
    """
    t = np.asarray(t, dtype=float)
    n = t.size
    w = sample_weights(t, max_gap_s)
    nan = np.full(n, np.nan)
    sp_ = nan if sp is None else np.asarray(sp, dtype=float)
    pv_ = nan if pv is None else np.asarray(pv, dtype=float)
    op_ = nan if op is None else np.asarray(op, dtype=float)
    everywhere = np.ones(n, dtype=bool)
    if mode is None:
        auto = cas = man = math.nan
        others: tuple[str, ...] = ()
        closed = everywhere
    else:
        cls = words.classes(mode)
        known = cls <= CASCADE
        closed = (cls == AUTOMATIC) | (cls == CASCADE)
        auto = _share(w, closed, known)
        cas = _share(w, cls == CASCADE, known)
        man = _share(w, cls == MANUAL, known)
        others = words.unknown(mode)
    opv = np.isfinite(op_)
    low = op_ <= op_lo + limit_band_pct
    high = op_ >= op_hi - limit_band_pct
    pvv = np.isfinite(pv_)
    e = sp_ - pv_
    ev = np.isfinite(e) & closed & (w > 0)
    we = w[ev]
    closed_s = float(we.sum())
    if closed_s > 0:
        mean = float(np.sum(we * e[ev]) / closed_s)
        std = math.sqrt(float(np.sum(we * (e[ev] - mean) ** 2) / closed_s))
        iae = float(np.sum(we * np.abs(e[ev]))) / (closed_s / 3600.0)
    else:
        std = iae = math.nan
    return Use(
        duration_s=float(w.sum()), auto_pct=auto, cascade_pct=cas, manual_pct=man, other_modes=others,
        op_limited_pct=_share(w, low | high, opv), op_low_pct=_share(w, low, opv),
        op_high_pct=_share(w, high, opv),
        pv_out_of_range_pct=_share(w, (pv_ < 0.0) | (pv_ > 100.0), pvv),
        sp_changes=count_changes(sp_, sp_change_min_pct), error_std_pct=std, iae_per_h=iae,
        closed_s=closed_s)
