"""Windows of excitation in a long record of routine operation: where the model check identifies.

A week of routine operation is mostly uninformative: the loop in automatic holding a steady set
point, the output answering noise and unmeasured load. What identifies a process are the moves
made from outside the loop: a set-point change, an operator's output move in manual (a bump
test). An engineer identifies on those stretches, each from a little before the move to a few
settling times after it, and on nothing when there is none. :func:`find_windows` does the same
on a record longer than ``window_above`` samples (shorter records, such as a bump test logged on
its own, are identified whole, as before).

Finding the moves
-----------------
The time scale T of the loop is the inventory model's dead time plus its lags (fopdt, sopdt:
theta + tau1 + tau2; ipdt: 4 (theta + tau1)), at least 20 samples; a row without one takes T
from the sample budget. A signal's *step* at sample k is the mean over the next w samples less
the mean over the previous w, w = T/4 (2 samples at least): a moving difference of block means
(cumulative sums, one pass over the record), which a step of size s raises to s and white noise
of standard deviation sigma only to sigma sqrt(2/w).

* The output's routine movement is the robust standard deviation (1.4826 median absolute
  deviation) of its step over the whole record: mostly routine operation, so what the controller
  does against noise and load. An output move counts when its step exceeds
  ``window_noise_ratio`` (default 5) times that and ``min_op_move_pct`` (default 1 %).
* A set-point change counts when the set point's step exceeds ``min_sp_move_pct`` (default 1 %
  of range) and ``window_noise_ratio`` times the measurement's noise (robust standard deviation
  of pv's sample-to-sample difference over sqrt 2).
* An output move counts as an operator's move when the mode says manual at it (the site's mode
  words of the policy); with no mode logged, when it is abrupt (half the step within one sample,
  as a hand move or a bump test is and a controller's answer to a load is not). An output move
  in automatic without a set-point change answers an unmeasured load: the load enters where the
  output does, so output and measurement then confound the process with the disturbance, and
  such a move is not used (it is counted in the note).

Windows
-------
Each move used opens a window from ``window_before`` (default 1) times T before it to
``window_after`` (default 5) times T after it (a first-order process settles to 2 % in the dead
time plus four time constants); windows less than ``window_after`` times T apart merge, and so do
the moves of one stretch in manual (the steps of a bump test make one window). A window holds
excitation when the output's largest step in it passes the output's threshold above (a set-point
change the output hardly answered does not count). A window longer than ``window_samples``
samples (default 8,000) is averaged over q consecutive samples to fit, as long as T keeps 20
averaged samples (a slow loop logged every second is oversampled; the block mean of the held
output drives the model over the block), and cut to the budget beyond that (the moves past the
cut left out). Windows rank: open loop first (moves in manual: no feedback from the noise, the
best data), then by the sum of the output's steps in units of the threshold (more and larger
moves inform more). The model is identified on the best window alone; the note names it, its
time range and how many others there were. With no window holding excitation the model check
says ``not identifiable`` and why, rather than fitting routine closed-loop data: without
excitation from outside the loop, closed-loop data do not tell the process from the controller
and the disturbance (L. Ljung, System Identification: Theory for the User, 2nd ed., 1999,
sec. 13.4, identifiability in closed loop; from memory).

The defaults follow common practice: a step test's move should stand at least five times above
the noise band, and the record should run from steady state before the move until the process
has settled after it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Smallest time scale, in samples, so that a window holds enough samples to fit. [-]
MIN_SCALE_SAMPLES = 20


@dataclass(frozen=True)
class WindowSettings:
    """Settings of the window selection (from :class:`audit.plantdata.identify.IdentifyPolicy`).

    Attributes
    ----------
    above : int
        Records longer than this many samples are identified on windows. [-]
    samples : int
        Most samples of the window identified. [-]
    before, after : float
        Window start before the first move and end after the last, in time scales T. [-]
    noise_ratio : float
        A move counts when its step exceeds this many robust standard deviations of routine movement. [-]
    min_op_move_pct : float
        Smallest output step that counts. [%]
    min_sp_move_pct : float
        Smallest set-point step that counts. [% of range]
    """

    above: int = 20_000
    samples: int = 8_000
    before: float = 1.0
    after: float = 5.0
    noise_ratio: float = 5.0
    min_op_move_pct: float = 1.0
    min_sp_move_pct: float = 1.0


@dataclass(frozen=True)
class Window:
    """One stretch of the record around moves made from outside the loop.

    Attributes
    ----------
    lo, hi : int
        Samples ``lo:hi`` of the segment. [-]
    open_loop : bool
        Holds an operator's output move in manual. [-]
    moves : int
        Moves in it. [-]
    kinds : tuple of str
        What moved: ``manual output move``, ``output step`` (no mode logged), ``set-point change``.
    op_step_pct : float
        Largest step of the output in it. [%]
    sp_step_pct : float
        Largest step of the set point in it (0 without one). [% of range]
    score : float
        Sum of the output's steps at its moves, in units of the output's threshold. [-]
    cut : bool
        Cut to the sample budget. [-]
    stride : int
        Samples averaged into one for the identification (1: none). [-]
    """

    lo: int
    hi: int
    open_loop: bool
    moves: int
    kinds: tuple[str, ...]
    op_step_pct: float
    sp_step_pct: float
    score: float
    cut: bool = False
    stride: int = 1

    def samples(self) -> tuple[int, int]:
        """Samples identified (whole blocks of ``stride``) and the end of the last block. [-]"""
        m = (self.hi - self.lo) // self.stride
        return m, self.lo + m * self.stride


@dataclass(frozen=True)
class WindowChoice:
    """The windows of a record, best first, and the thresholds that found them.

    Attributes
    ----------
    windows : tuple of Window
        Windows holding excitation, best first; empty when none.
    span : int
        Samples w of the step's two blocks. [-]
    scale_s : float
        Time scale T used. [s]
    op_threshold_pct : float
        Output step that counts. [%]
    sp_threshold_pct : float
        Set-point step that counts. [% of range]
    op_largest_pct : float
        Largest output step anywhere in the record. [%]
    sp_largest_pct : float
        Largest set-point step anywhere (NaN without sp). [% of range]
    load_moves : int
        Output moves in automatic without a set-point change (not used). [-]
    op_routine_pct : float
        Robust standard deviation of the output's step over the record (its routine movement). [%]
    noise_ratio : float
        The setting a move's step is compared with, in routine movements. [-]
    op_min_pct : float
        The smallest output step that counts (the policy's). [%]
    weak_sp : int
        Set-point changes the output hardly answered (not used). [-]
    """

    windows: tuple[Window, ...]
    span: int
    scale_s: float
    op_threshold_pct: float
    sp_threshold_pct: float
    op_largest_pct: float
    sp_largest_pct: float
    load_moves: int = 0
    weak_sp: int = 0
    op_routine_pct: float = float("nan")
    noise_ratio: float = 5.0
    op_min_pct: float = 1.0

    def reason(self) -> str:
        """Why no window holds excitation ('' when one does)."""
        if self.windows:
            return ""
        sp = "" if not math.isfinite(self.sp_largest_pct) else \
            f"; the set point moved at most {self.sp_largest_pct:.3g} % (needs {self.sp_threshold_pct:.3g} %)"
        more = []
        if self.load_moves:
            more.append(f"{self.load_moves} output move{'s' if self.load_moves != 1 else ''} in automatic without "
                        f"a set-point change (an unmeasured load's doing, so not used)")
        if self.weak_sp:
            more.append(f"{self.weak_sp} set-point change{'s' if self.weak_sp != 1 else ''} the output hardly "
                        f"answered")
        return ("no set-point change or manual move large enough in the record: the output stepped at most "
                f"{self.op_largest_pct:.3g} % (a move needs {self.op_threshold_pct:.3g} %, the larger of the policy's "
                f"minimum {self.op_min_pct:g} % and {self.noise_ratio:g} times the output's routine movement of "
                f"{self.op_routine_pct:.3g} %){sp}"
                + (f"; {', '.join(more)}" if more else "")
                + "; routine closed-loop data without excitation from outside do not identify the process: "
                  "not identified (make a bump test or a set-point change)")


def time_scale(row) -> float:
    """The loop's time scale T from the inventory model of ``row`` (NaN when there is none). [s]

    fopdt, sopdt: dead time + tau1 + tau2; ipdt: 4 (dead time + tau1).
    """
    model = getattr(row, "model", None)
    th, t1, t2 = (float(getattr(row, k, None) or 0.0) for k in ("dead_time", "tau1", "tau2"))
    if model in ("fopdt", "sopdt"):
        return th + t1 + t2 if th + t1 + t2 > 0 else float("nan")
    if model == "ipdt":
        return 4.0 * (th + t1) if th + t1 > 0 else float("nan")
    return float("nan")


def _step(x: np.ndarray, w: int) -> np.ndarray:
    """Mean of the next w samples less the mean of the previous w, at samples w..n-w (length n - 2w + 1)."""
    c = np.concatenate([[0.0], np.cumsum(x, dtype=float)])
    return (c[2 * w:] - 2.0 * c[w:len(c) - w] + c[:len(c) - 2 * w]) / w


#: Most values the robust standard deviation looks at (a long record is taken at a regular stride). [-]
ROBUST_POINTS = 50_000


def _robust_sd(x: np.ndarray) -> float:
    """1.4826 median absolute deviation (the standard deviation of normal data, robust to moves).

    Of a record longer than :data:`ROBUST_POINTS`, every k-th value (the median of 50,000 values
    is within about 0.6 % of the whole record's, in standard errors of normal data).
    """
    if not len(x):
        return 0.0
    x = x[::max(1, len(x) // ROBUST_POINTS)]
    return float(1.4826 * np.median(np.abs(x - np.median(x))))


def _peaks(step: np.ndarray, thr: float, w: int) -> tuple[np.ndarray, np.ndarray]:
    """Moves: runs of |step| above ``thr``; their samples (run centres, in record samples) and sizes."""
    above = np.abs(step) > thr
    if not above.any():
        return np.zeros(0, dtype=np.int64), np.zeros(0)
    edges = np.flatnonzero(np.diff(np.concatenate([[0], above.view(np.int8), [0]])))
    starts, ends = edges[0::2], edges[1::2]
    # from each run's start to the next run's start: between runs |step| stays below thr, so this is the run's peak
    size = np.maximum.reduceat(np.abs(step), starts)
    return (starts + ends) // 2 + w, size


def find_windows(op: np.ndarray, pv: np.ndarray, sp: np.ndarray | None, manual: np.ndarray | None, dt: float,
                 scale_s: float, settings: WindowSettings = WindowSettings()) -> WindowChoice:
    """The windows of a record that hold excitation, best first (see the module notes).

    Parameters
    ----------
    op, pv : ndarray
        Controller output [%] and measurement [% of range] on a uniform grid.
    sp : ndarray or None
        Set point [% of range]; None when not logged.
    manual : ndarray of bool or None
        True where the mode says manual; None when no mode is logged.
    dt : float
        Sample interval. [s]
    scale_s : float
        The loop's time scale T (:func:`time_scale`); NaN when unknown. [s]
    settings : WindowSettings
        Budget and thresholds.

    Returns
    -------
    WindowChoice
    """
    n = len(op)
    span_t = settings.before + settings.after
    T = scale_s if (math.isfinite(scale_s) and scale_s > 0) else settings.samples * dt / max(span_t, 1.0)
    T = max(T, MIN_SCALE_SAMPLES * dt)
    w = int(max(2, min(round(T / (4 * dt)), max(n // 20, 2))))
    if n < 4 * w:
        return WindowChoice((), w, T, float("nan"), float("nan"), 0.0, float("nan"))
    op_step = _step(op, w)
    routine = _robust_sd(op_step)
    op_thr = max(settings.min_op_move_pct, settings.noise_ratio * routine)
    op_at, op_size = _peaks(op_step, op_thr, w)
    op_largest = float(np.abs(op_step).max())
    sp_at = np.zeros(0, dtype=np.int64)
    sp_thr, sp_largest = float("nan"), float("nan")
    sp_step = None
    if sp is not None and np.all(np.isfinite(sp)):
        pv_noise = _robust_sd(np.diff(pv)) / math.sqrt(2.0)
        sp_thr = max(settings.min_sp_move_pct, settings.noise_ratio * pv_noise)
        sp_step = _step(sp, w)
        sp_at, _ = _peaks(sp_step, sp_thr, w)
        if manual is not None and len(sp_at):  # in manual the set point drives nothing
            sp_at = sp_at[~np.asarray(manual, bool)[np.clip(sp_at, 0, n - 1)]]
        sp_largest = float(np.abs(sp_step).max())
    # which output moves come from outside the loop
    near_sp = np.zeros(len(op_at), dtype=bool)
    if len(sp_at) and len(op_at):
        j = np.searchsorted(sp_at, op_at)
        d_next = np.abs(sp_at[np.minimum(j, len(sp_at) - 1)] - op_at)
        d_prev = np.abs(op_at - sp_at[np.maximum(j - 1, 0)])
        near_sp = np.minimum(d_next, d_prev) <= 2 * w
    if manual is not None:
        by_hand = np.asarray(manual, bool)[np.clip(op_at, 0, n - 1)] & ~near_sp
        kind_hand = "manual output move"
    else:
        jump = np.abs(np.diff(op))
        lo_ = np.clip(op_at - w, 0, n - 2)
        hi_ = np.clip(op_at + w, 1, n - 1)
        biggest = np.array([float(jump[a:b].max()) if b > a else 0.0 for a, b in zip(lo_, hi_)])
        by_hand = (biggest >= 0.5 * op_size) & ~near_sp
        kind_hand = "output step"
    load_moves = int(np.sum(~by_hand & ~near_sp))
    # the moves used: set-point changes and operator's moves
    at = np.concatenate([sp_at, op_at[by_hand]])
    hand = np.concatenate([np.zeros(len(sp_at), bool), np.ones(int(by_hand.sum()), bool)])
    if not len(at):
        return WindowChoice((), w, T, op_thr, sp_thr, op_largest, sp_largest, load_moves, 0, routine,
                            settings.noise_ratio, settings.min_op_move_pct)
    order = np.argsort(at, kind="stable")
    at, hand = at[order], hand[order]
    lo = np.maximum(at - int(round(settings.before * T / dt)), 0)
    hi = np.minimum(at + int(round(settings.after * T / dt)) + 1, n)
    # merge windows less than `after` time scales apart (the steps of one bump test make one window): a new
    # window starts where its start lies that far past every end before it
    reach = np.maximum.accumulate(hi) + int(round(settings.after * T / dt))
    apart = lo[1:] >= reach[:-1]
    if manual is not None:                     # moves of one stretch in manual (a bump test) make one window
        man = np.asarray(manual, bool)
        period = np.cumsum(man & ~np.concatenate([[False], man[:-1]]))[np.clip(at, 0, n - 1)]
        apart &= ~(hand[1:] & hand[:-1] & (period[1:] == period[:-1]))
    new = np.concatenate([[True], apart])
    g_lo = lo[new]
    g_hi = np.maximum.reduceat(hi, np.flatnonzero(new))
    # the output's step at each move (the controller's answer to a set-point change)
    idx = np.clip(at - w, 0, len(op_step) - 1)
    lo_i = np.clip(idx - w, 0, len(op_step) - 1)
    hi_i = np.clip(idx + w + 1, 1, len(op_step))
    absstep = np.abs(op_step)
    move_op = np.array([float(absstep[a:b].max()) for a, b in zip(lo_i, hi_i)])
    sp_move = np.zeros(len(at))
    if sp_step is not None:
        sp_move = np.array([float(np.abs(sp_step[a:b]).max()) for a, b in zip(lo_i, hi_i)])
    windows = []
    weak_sp = 0
    bounds = np.append(np.flatnonzero(new), len(at))
    for g in range(len(g_lo)):
        m = slice(int(bounds[g]), int(bounds[g + 1]))
        op_big = float(move_op[m].max())
        if not op_big > op_thr:
            weak_sp += int(np.sum(~hand[m]))
            continue
        a, b = int(g_lo[g]), int(g_hi[g])
        # over the budget: averaged over q samples while T keeps 20 of them, then cut
        stride = max(1, min(-(-(b - a) // int(settings.samples)), int(T / (MIN_SCALE_SAMPLES * dt))))
        cut = b - a > settings.samples * stride
        if cut:                                # the moves past the budget are left out
            b = a + int(settings.samples) * stride
            m = slice(m.start, m.start + max(1, int(np.searchsorted(at[m], b - int(round(settings.after * T / dt))))))
            op_big = float(move_op[m].max())
        kinds = tuple(k for k, there in ((kind_hand, bool(np.any(hand[m]))),
                                         ("set-point change", bool(np.any(~hand[m])))) if there)
        score = float(np.sum(move_op[m]) / op_thr)
        windows.append(Window(a, b, bool(manual is not None and np.any(hand[m])), m.stop - m.start, kinds, op_big,
                              float(sp_move[m].max()), score, cut, stride))
    windows.sort(key=lambda x: (not x.open_loop, -x.score, x.lo))
    return WindowChoice(tuple(windows), w, T, op_thr, sp_thr, op_largest, sp_largest, load_moves, weak_sp, routine,
                        settings.noise_ratio, settings.min_op_move_pct)


def describe(win: Window, choice: WindowChoice, n: int, dt: float, t0: float, start=None,
             lines: tuple[int, int] | None = None, rank: int = 0) -> str:
    """The note naming the window identified on: its time range, what moved, and the others.

    Parameters
    ----------
    win : Window
        The window used.
    choice : WindowChoice
        All windows found.
    n : int
        Samples in the segment. [-]
    dt : float
        Sample interval. [s]
    t0 : float
        Time of the segment's first sample from the record's start. [s]
    start : pandas.Timestamp, optional
        The record's first time (absolute times in the note when given).
    lines : tuple of int, optional
        First line of the segment and its step per sample (to name the window's lines).
    rank : int
        The window's place among those found (0: the best). [-]
    """
    _, end = win.samples()
    a_s, b_s = t0 + win.lo * dt, t0 + (end - 1) * dt
    if start is not None:
        import pandas as pd
        fmt = "%Y-%m-%d %H:%M:%S"
        when = (f"{(start + pd.Timedelta(seconds=a_s)).strftime(fmt)} to "
                f"{(start + pd.Timedelta(seconds=b_s)).strftime(fmt)}")
    else:
        when = f"t = {a_s:.6g} to {b_s:.6g} s"
    where = f" (lines {lines[0] + win.lo:,}-{lines[0] + end - 1:,})" if lines is not None else ""
    kinds = [k + ("s" if win.moves > 1 else "") for k in win.kinds]
    what = f"{win.moves} move{'s' if win.moves > 1 else ''}: " + " and ".join(kinds) if len(kinds) > 1 else \
        f"{win.moves} {kinds[0]}"
    size = f"output step up to {win.op_step_pct:.3g} %" + (
        f", set-point step up to {win.sp_step_pct:.3g} %" if "set-point change" in win.kinds else "")
    others = len(choice.windows) - 1
    return (f"identified on the window {when}{where}, {end - win.lo:,} of {n:,} samples: {what} ({size}"
            f"{', open loop' if win.open_loop else ', closed loop'})"
            + (f", averaged over {win.stride} samples ({win.stride * dt:.3g} s)" if win.stride > 1 else "")
            + (f", cut to {win.samples()[0]:,} samples" if win.cut else "")
            + ("; the only window with excitation" if not others else
               f"; the best of {others + 1} windows with excitation" if not rank else
               f"; number {rank + 1} of {others + 1} windows with excitation"))
