"""Loop health of one record: use, oscillation, sticking valve and the minimum-variance index.

Arrays in, one :class:`LoopHealth` out; the pipeline stage and the benchmark call
:func:`loop_health`. Use figures cover the whole record; the oscillation, valve and variance
analyses need uniformly sampled closed-loop data and take the longest stretch of it
(:func:`analysis_stretch`): every sample with ``sp``, ``pv`` and ``op``, the loop closed where a
mode is logged, the output off its limits (there the loop is open), no interval longer than 1.5
sample intervals.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from .oscillation import MIN_CROSSINGS, Oscillation, autocorrelation, detect_oscillation, detrend
from .use import AUTOMATIC, CASCADE, ModeWords, Use, loop_use
from .valve import PvOpPoints, ValveTest, assess_valve
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
    return _loop_health(t, sp, pv, op, mode, dead_time_s, integrating, settings)[0]


def _loop_health(t, sp, pv, op, mode, dead_time_s, integrating, settings) -> tuple[LoopHealth, np.ndarray | None]:
    """:func:`loop_health`, and the autocorrelation of the detrended error it used (None without one),
    so the report's plot does not compute it again."""
    t = np.asarray(t, dtype=float)
    use = loop_use(t, sp, pv, op, mode, words=settings.words, limit_band_pct=settings.limit_band_pct,
                   sp_change_min_pct=settings.sp_change_min_pct, max_gap_s=settings.max_gap_s)
    notes: list[str] = []
    if sp is None or pv is None or op is None:
        notes.append("sp, pv and op are all needed for the oscillation, valve and variance figures")
        return LoopHealth(use, None, None, None, math.nan, (0, 0), tuple(notes)), None
    sp_, pv_, op_ = (np.asarray(x, dtype=float) for x in (sp, pv, op))
    ok = np.isfinite(sp_) & np.isfinite(pv_) & np.isfinite(op_)
    if mode is not None:
        cls = settings.words.classes(mode)
        ok &= (cls == AUTOMATIC) | (cls == CASCADE)
    ok &= (op_ > settings.limit_band_pct) & (op_ < 100.0 - settings.limit_band_pct)   # at a limit the loop is open
    a, b = analysis_stretch(t, ok)
    if b - a < MIN_STRETCH:
        notes.append(f"longest closed-loop stretch has {b - a} samples, fewer than {MIN_STRETCH}: "
                     "no oscillation, valve or variance figures")
        return LoopHealth(use, None, None, None, math.nan, (a, b), tuple(notes)), None
    ts = float(np.median(np.diff(t[a:b])))
    e = sp_[a:b] - pv_[a:b]
    acf = autocorrelation(detrend(e)) if e.size >= 4 * MIN_CROSSINGS else None   # as detect_oscillation takes it
    osc = detect_oscillation(e, ts, min_amplitude_pct=settings.min_amplitude_pct, acf=acf)
    valve = None
    if osc.oscillating:
        valve = assess_valve(op_[a:b], pv_[a:b], ts, osc.period_s, integrating=integrating,
                             dead_time_s=dead_time_s or 0.0)
    var = None
    if dead_time_s is None or not math.isfinite(dead_time_s):
        notes.append("no dead time from a model: no Harris index")
    else:
        try:
            var = harris_index(e, delay_samples(dead_time_s, ts), criterion=settings.ar_criterion)
        except ValueError as exc:
            notes.append(f"no Harris index: {exc}")
    return LoopHealth(use, osc, valve, var, ts, (a, b), tuple(notes)), acf


# ----------------------------------------------------------------------------- the pipeline stage


@dataclass(frozen=True)
class OperationData:
    """One loop's record of normal operation, as arrays (what the stage needs from the reader).

    Attributes
    ----------
    t : ndarray
        Sample times from the record's start, ascending; gaps between segments kept. [s]
    sp, pv : ndarray or None
        Set point and process value. [% of range]
    op : ndarray or None
        Controller output. [%]
    mode : ndarray of object or None
        Mode words as logged (None where missing).
    source : str
        How notes name the record (file name).
    """

    t: np.ndarray
    sp: np.ndarray | None
    pv: np.ndarray | None
    op: np.ndarray | None
    mode: np.ndarray | None
    source: str


@dataclass(frozen=True)
class HealthPlots:
    """What the report draws for one loop's health (thinned, plain arrays).

    Attributes
    ----------
    t : ndarray
        Times of the trend, from the record's start. [s]
    sp, pv, op : ndarray
        Trend of set point, process value [% of range] and output [%] (NaN where missing).
    pv_op : PvOpPoints or None
        pv against op over the analysed stretch's latest cycles.
    acf_lags_s : ndarray
        Lags of the autocorrelation of the control error. [s]
    acf : ndarray
        The autocorrelation. [-]
    acf_crossings_s : ndarray
        Zero crossings used for the period. [s]
    period_s : float
        Oscillation period when the loop oscillates, else NaN. [s]
    """

    t: np.ndarray
    sp: np.ndarray
    pv: np.ndarray
    op: np.ndarray
    pv_op: "PvOpPoints | None"
    acf_lags_s: np.ndarray
    acf: np.ndarray
    acf_crossings_s: np.ndarray
    period_s: float


#: Samples kept in a trend for the report (min/max per bucket keeps peaks). [-]
TREND_POINTS = 1200
#: Most points of the pv-op plot (the latest eight periods or so, evenly thinned). [-]
PV_OP_POINTS = 2000

HEALTH_COLUMNS = ("auto_pct", "manual_pct", "op_limited_pct", "pv_out_of_range_pct", "sp_changes",
                  "error_std_pct", "iae_per_h", "oscillating", "oscillation_period_s",
                  "oscillation_amplitude_pct", "oscillation_regularity", "valve_sticking",
                  "valve_sticking_confidence", "stiction_index", "harris_index", "health_delay_samples",
                  "health_findings", "health_note")


def settings_from_policy(policy) -> HealthSettings:
    """Health settings from the audit policy.

    Parameters
    ----------
    policy : audit.policy.Policy
        The policy in force (mode words, limit band, smallest oscillation amplitude).

    Returns
    -------
    HealthSettings
    """
    return HealthSettings(
        words=ModeWords.from_text(policy.mode_automatic, policy.mode_manual, policy.mode_cascade),
        limit_band_pct=float(policy.op_limit_band_pct),
        min_amplitude_pct=float(policy.oscillation_min_amplitude_pct),
        max_gap_s=None)


def _thin_trend(t: np.ndarray, *ys: np.ndarray | None, n: int = TREND_POINTS) -> tuple[np.ndarray, ...]:
    """Bucketed min/max thinning: every bucket keeps its first sample and, of each signal with a
    finite sample there, its lowest and highest (first occurrence), all buckets at once."""
    size = t.size
    out_ys = [np.full(size, np.nan) if y is None else np.asarray(y, dtype=float) for y in ys]
    if size <= n:
        return (t, *out_ys)
    b = int(math.ceil(size / (n // 2)))
    nb = -(-size // b)
    starts = np.arange(nb) * b
    keep = [starts]
    for y in out_ys:
        pad = np.full(nb * b, np.nan)
        pad[:size] = y
        pad = pad.reshape(nb, b)
        has = np.isfinite(pad).any(axis=1)
        nan = np.isnan(pad)
        # NaN as +inf (-inf) never wins where a bucket has a finite sample: argmin (argmax) then
        # equals nanargmin (nanargmax), the first occurrence of the extreme
        lo = np.argmin(np.where(nan, np.inf, pad), axis=1)
        hi = np.argmax(np.where(nan, -np.inf, pad), axis=1)
        keep += [(starts + lo)[has], (starts + hi)[has]]
    sel = np.unique(np.concatenate(keep))
    return (t[sel], *[y[sel] for y in out_ys])


def health_plots(data: OperationData, h: LoopHealth, error_acf: np.ndarray | None = None) -> HealthPlots:
    """Trend, pv-op and autocorrelation data of one loop for the report.

    Parameters
    ----------
    data : OperationData
        The loop's record.
    h : LoopHealth
        Its health figures.
    error_acf : ndarray or None
        The autocorrelation of the detrended control error over the analysed stretch, when
        already computed; computed here when None. [-]

    Returns
    -------
    HealthPlots
    """
    from .oscillation import autocorrelation_for_plot
    from .valve import pv_op_points

    t, sp, pv, op = _thin_trend(data.t, data.sp, data.pv, data.op)
    a, b = h.stretch
    pvop, lags, acf, zc, period = None, np.zeros(0), np.zeros(0), np.zeros(0), math.nan
    if h.oscillation is not None and data.sp is not None and data.pv is not None and data.op is not None:
        period = h.oscillation.period_s if h.oscillation.oscillating else math.nan
        keep = b - a if not math.isfinite(period) else int(min(b - a, max(200, round(8 * period / h.ts))))
        step = max(1, int(math.ceil(keep / PV_OP_POINTS)))     # at most PV_OP_POINTS points, evenly spaced
        pvop = pv_op_points(data.op[b - keep:b:step], data.pv[b - keep:b:step], max_points=keep)
        e = np.asarray(data.sp[a:b], dtype=float) - np.asarray(data.pv[a:b], dtype=float)
        ac = autocorrelation_for_plot(e, h.ts, periods=6.0, period_s=period, acf=error_acf)
        lags, acf, zc = ac.lags_s, ac.values, ac.crossings_s
        if lags.size > 2000:
            step = int(math.ceil(lags.size / 2000))
            lags, acf = lags[::step], acf[::step]
        # copies: a slice of the week-long autocorrelation would keep all of it alive as long as the
        # plots (a worker's results of a chunk once held hundreds of MB that way)
        lags, acf, zc = np.array(lags), np.array(acf), np.array(zc)
    return HealthPlots(t, sp, pv, op, pvop, lags, acf, zc, period)


def _fmt(x: float) -> str:
    return "n/a" if x is None or not math.isfinite(x) else (f"{x:.3g}" if abs(x) < 1000 else f"{x:.0f}")


def findings_of(h: LoopHealth, policy) -> list[str]:
    """What the health figures say, in words with the figures and the method.

    Parameters
    ----------
    h : LoopHealth
        The figures of one loop.
    policy : audit.policy.Policy
        Limits: ``auto_min_pct``, ``op_limited_max_pct``, ``harris_min``.

    Returns
    -------
    list of str
        Most fundamental first: manual, sticking valve, saturation, oscillation, range,
        minimum variance.
    """
    u, words = h.use, []
    if math.isfinite(u.auto_pct) and u.auto_pct < policy.auto_min_pct:
        words.append(f"mostly in manual: closed {_fmt(u.auto_pct)} % of the record (policy: at least "
                     f"{_fmt(policy.auto_min_pct)} %)")
    if h.valve is not None and h.valve.sticking:
        words.append(f"valve suspected sticking: op triangular in the oscillation, stiction index "
                     f"{_fmt(h.valve.stiction_index)} (curve fitting, He et al. 2007), confidence "
                     f"{_fmt(h.valve.confidence)}")
    if math.isfinite(u.op_limited_pct) and u.op_limited_pct > policy.op_limited_max_pct:
        where = "high" if u.op_high_pct >= u.op_low_pct else "low"
        words.append(f"output at its {where} limit {_fmt(u.op_limited_pct)} % of the record (policy: at most "
                     f"{_fmt(policy.op_limited_max_pct)} %)")
    o = h.oscillation
    if o is not None and o.oscillating:
        words.append(f"oscillating: period {_fmt(o.period_s)} s, amplitude {_fmt(o.amplitude_pct)} % of range, "
                     f"regularity {_fmt(o.regularity)} (autocorrelation zero crossings, Thornhill et al. 2003)")
    if math.isfinite(u.pv_out_of_range_pct) and u.pv_out_of_range_pct > 0:
        words.append(f"pv outside its range {_fmt(u.pv_out_of_range_pct)} % of the record")
    v = h.variance
    if v is not None and math.isfinite(v.harris_index) and v.harris_index < policy.harris_min:
        words.append(f"far from minimum variance: Harris index {_fmt(v.harris_index)} (AR({v.ar_order}), "
                     f"delay {v.delay_samples} samples, Harris 1989)")
    return words


def source_words(model, period_s: float) -> str:
    """Where an oscillation comes from, by the loop's own model: its resonance against the period.

    Parameters
    ----------
    model : audit.loop.LoopModel
        The loop as tuned (exact dead time).
    period_s : float
        Period of the oscillation found in the record. [s]

    Returns
    -------
    str
        When the period lies outside half to twice the period of the peak of abs(S(jw)) of the
        model: that the oscillation probably enters from outside the loop, with abs(S) at its
        frequency (what a retune can change); '' otherwise.
    """
    if not (math.isfinite(period_s) and period_s > 0):
        return ""
    w = np.logspace(-4, 2, 600) / max(model.delay, 1e-3)
    s = np.abs(model.S(w))
    own = 2 * math.pi / float(w[int(np.argmax(s))])
    if 0.5 * own <= period_s <= 2.0 * own:
        return ""
    at = float(np.abs(model.S(np.array([2 * math.pi / period_s])))[0])
    return (f"the period is far from the loop's own resonance ({_fmt(own)} s by the model): the oscillation "
            f"probably enters from outside the loop; |S| = {_fmt(at)} at its frequency, so the loop as tuned "
            f"passes {_fmt(100 * at)} % of it")


def health_record(h: LoopHealth | None, policy, note: str) -> dict:
    """The results columns of one row (:data:`HEALTH_COLUMNS`).

    Parameters
    ----------
    h : LoopHealth or None
        The figures; None when the row has no record of normal operation.
    policy : audit.policy.Policy
        Limits for the findings.
    note : str
        What the figures rest on or why they are missing.

    Returns
    -------
    dict
        Column -> value (NaN or None where there is nothing).
    """
    rec: dict = {c: math.nan for c in HEALTH_COLUMNS}
    rec.update(oscillating=None, valve_sticking=None, health_findings="", health_note=note)
    if h is None:
        return rec
    u, o, v, var = h.use, h.oscillation, h.valve, h.variance
    rec.update(auto_pct=u.auto_pct, manual_pct=u.manual_pct, op_limited_pct=u.op_limited_pct,
               pv_out_of_range_pct=u.pv_out_of_range_pct, sp_changes=float(u.sp_changes),
               error_std_pct=u.error_std_pct, iae_per_h=u.iae_per_h)
    if o is not None:
        rec.update(oscillating=o.oscillating, oscillation_period_s=o.period_s if o.oscillating else math.nan,
                   oscillation_amplitude_pct=o.amplitude_pct if o.oscillating else math.nan,
                   oscillation_regularity=o.regularity)
    if v is not None:
        rec.update(valve_sticking=v.sticking, valve_sticking_confidence=v.confidence,
                   stiction_index=v.stiction_index)
    if var is not None:
        rec.update(harris_index=var.harris_index, health_delay_samples=float(var.delay_samples))
    rec["health_findings"] = "; ".join(findings_of(h, policy))
    notes = [note] + list(h.notes) + ([f"mode words not in the policy: {', '.join(u.other_modes)}"]
                                      if u.other_modes else [])
    rec["health_note"] = "; ".join(n for n in notes if n)
    return rec


def _not_the_valve(h: LoopHealth) -> bool:
    """Oscillating, and the valve is not suspected."""
    return (h.oscillation is not None and h.oscillation.oscillating
            and not (h.valve is not None and h.valve.sticking))


@dataclass(frozen=True)
class HealthOutcome:
    """One row's loop health as the stage writes it (compact: the record is not inside).

    Attributes
    ----------
    columns : dict
        :data:`HEALTH_COLUMNS` -> value (:func:`health_record`).
    figures : LoopHealth or None
        The figures; None when the row had no usable record.
    plots : HealthPlots, audit.health_charts.HealthDrawing or None
        What the report draws (thinned), or the charts already drawn from it (what the per-loop task
        returns: :mod:`audit.plantdata.loopdata`); None without ``figures``.
    message : str
        A note for the row's ``message`` (why its record gives no figures); '' otherwise.
    retune : bool
        Oscillating and the valve not suspected: a retune may help.
    """

    columns: dict
    figures: LoopHealth | None
    plots: Any
    message: str
    retune: bool


def health_outcome(data: OperationData | None, note: str, model, settings: HealthSettings, policy) -> HealthOutcome:
    """Loop health of one row from its arrays (or the note on why there are none).

    Parameters
    ----------
    data : OperationData or None
        The row's record of normal operation; None when it gives none.
    note : str
        What the reader found, or why there is no record.
    model : audit.loop.LoopModel or None
        The loop as tuned: its dead time [s] feeds the Harris index and its resonance the words
        on where an oscillation comes from.
    settings : HealthSettings
        From the policy (:func:`settings_from_policy`).
    policy : audit.policy.Policy
        Limits for the findings.

    Returns
    -------
    HealthOutcome
    """
    if data is None:
        return HealthOutcome(health_record(None, policy, note), None, None, note, False)
    dead = model.delay if model is not None else None
    integrating = model is not None and model.process.kind == "ipdt"
    h, acf = _loop_health(data.t, data.sp, data.pv, data.op, data.mode, dead, integrating, settings)
    a, b = h.stretch
    where = f"{data.source}: {b - a} samples of {_fmt(h.ts)} s analysed" if b > a else data.source
    rec = health_record(h, policy, f"{where}{'; ' + note if note else ''}")
    if model is not None and _not_the_valve(h):
        words = source_words(model, h.oscillation.period_s)
        if words:
            rec["health_findings"] = "; ".join(x for x in (rec["health_findings"], words) if x)
    return HealthOutcome(rec, h, health_plots(data, h, acf), "", _not_the_valve(h))


def add_loop_health(audit, source=None) -> None:
    """Pipeline stage: loop-health columns for every row with a record of normal operation.

    Each row's record is read once, for this stage and the model check together
    (:func:`audit.plantdata.loopdata.loop_data`, on the run's executor); a row whose analysis
    raises is recorded as a fault of this stage for that row, the others complete.

    Parameters
    ----------
    audit : Audit
        The run after the models are built; :data:`HEALTH_COLUMNS` are added to ``results``
        (blank for rows without a record), the figures and plot data go to
        ``audit.extras['health']`` (row position -> (LoopHealth, HealthPlots or the charts drawn from
        them, :class:`audit.health_charts.HealthDrawing`)), and the rows
        whose oscillation is not blamed on the valve to ``audit.extras['retune_for_oscillation']``.
    source : callable or None
        ``source(audit) -> dict`` of row position -> (OperationData or None, note), analysed
        here; when None, each row's own record (:func:`audit.plantdata.sources.record_for_row`).
    """
    rows = audit.inventory.rows
    policy = audit.inventory.policy
    outcomes: dict[int, HealthOutcome] = {}
    if source is not None:
        settings = settings_from_policy(policy)
        for i, (d, note) in source(audit).items():
            model = audit.models[i] if i < len(audit.models) else None
            outcomes[i] = health_outcome(d, note, model, settings, policy)
    else:
        from ..faults import row_fault_elsewhere
        from .loopdata import RowFailure, loop_data
        for i, got in loop_data(audit).items():
            if isinstance(got.health, RowFailure):
                row_fault_elsewhere(audit, "health", i, got.health.error, got.health.detail)
            elif got.health is not None:
                outcomes[i] = got.health
    recs, extras, retune = [], {}, set()
    for i, row in enumerate(rows):
        out = outcomes.get(i)
        if out is None:
            recs.append(health_record(None, policy, ""))
            continue
        recs.append(out.columns)
        if out.message:
            old = audit.results.at[audit.results.index[i], "message"]
            old = "" if old is None or (isinstance(old, float) and math.isnan(old)) else str(old)
            audit.results.at[audit.results.index[i], "message"] = "; ".join(x for x in (old, out.message) if x)
        if out.figures is not None:
            extras[i] = (out.figures, out.plots)
        if out.retune:
            retune.add(i)
    res = audit.results
    cols = {}
    for c in HEALTH_COLUMNS:
        vals = [r[c] for r in recs]
        if c in ("oscillating", "valve_sticking"):
            cols[c] = pd.array(vals, dtype="boolean")
        elif c in ("health_findings", "health_note"):
            cols[c] = pd.array(vals, dtype=object)
        else:
            cols[c] = np.asarray(vals, dtype=float)
    # one concatenation (and a consolidated copy) instead of many inserts: later stages add columns too
    new = pd.DataFrame(cols, index=res.index)
    audit.results = pd.concat([res.drop(columns=[c for c in HEALTH_COLUMNS if c in res.columns]), new],
                              axis=1).copy()
    audit.extras["health"] = extras
    audit.extras["retune_for_oscillation"] = frozenset(retune)


#: Reader notes said in health_note, with file and line (every kind the reader has).
_PROBLEM_KINDS = ("file", "header", "cell", "quality", "time", "order", "zone", "gap", "fill", "short",
                  "resample", "flat", "units", "cap")
#: Problems named one by one before the rest are counted. [-]
_SHOWN = 3


def record_arrays(rec) -> OperationData | None:
    """A record's segments joined into arrays (gaps kept as jumps in time).

    Parameters
    ----------
    rec : audit.plantdata.records.Record
        As read by :func:`audit.plantdata.records.read_record`.

    Returns
    -------
    OperationData or None
        None when the record has no usable segment.
    """
    if not rec.segments:
        return None
    t = np.concatenate([s.t for s in rec.segments])

    def joined(name: str) -> np.ndarray | None:
        if name not in rec.signals:
            return None
        parts = [np.asarray(s.values[name], dtype=float) if name in s.values else np.full(s.n, np.nan)
                 for s in rec.segments]
        return np.concatenate(parts)

    mode = None
    if "mode" in rec.signals and all(s.mode is not None for s in rec.segments):
        codes = np.concatenate([np.asarray(s.mode, dtype=np.int64) for s in rec.segments])
        mode = pd.Categorical.from_codes(codes, categories=list(dict.fromkeys(rec.mode_labels)))
    return OperationData(t, joined("sp"), joined("pv"), joined("op"), mode, rec.name)


def _problems(rec) -> str:
    probs = [n for n in rec.notes if n.kind in _PROBLEM_KINDS]
    if not probs:
        return ""
    total = sum(n.count for n in probs)
    shown = [str(n) for n in probs[:_SHOWN]]
    more = f"; and {total - len(shown)} more" if total > len(shown) else ""
    return "; ".join(shown) + more


def operation_data(found) -> tuple[OperationData | None, str] | None:
    """A row's record of normal operation as arrays, or the note on why it gives none.

    The record is used when it holds ``sp``, ``pv`` and ``op`` (``mode`` where logged).
    Problems the reader found are named by file and line in the note; a record with nothing
    usable gives no arrays, only the note.

    Parameters
    ----------
    found : audit.plantdata.sources.RowRecord
        The row's record as found (:func:`audit.plantdata.sources.record_for_row`).

    Returns
    -------
    tuple of (OperationData or None, str) or None
        The arrays (None when unusable) and the note; None when the row has no record at all.
    """
    if found.record is None:
        return (None, f"operating record: {found.refused}") if found.refused else None
    rec, shown = found.record, found.name
    problems = _problems(rec)
    missing = [s for s in ("sp", "pv", "op") if s not in rec.signals]
    if missing:
        return (None, f"{shown}: no {', '.join(missing)} column, so no loop-health figures (they need "
                      f"sp, pv and op of routine operation)" + (f"; {problems}" if problems else ""))
    data = record_arrays(rec)
    if data is None:
        return None, f"{shown}: nothing usable" + (f"; {problems}" if problems else "")
    return data, problems
