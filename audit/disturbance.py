"""Logged disturbance records: validation, spectrum, rejection band and required attenuation,
and the residual a loop would leave.

A record is a CSV file with a header line, one time column and one value column:

* time: ``time_s`` [s], ``time_min`` [min] or ``timestamp`` (ISO 8601, all with or
  all without a time zone);
* value: ``value`` [% of PV range] or ``value_eu`` [engineering units], converted
  with the row's ``pv_lo``/``pv_hi`` to % of range.

Blank lines and lines whose first cell starts with ``#`` are skipped. The record is
the PV's deviation as seen with the loop in manual (an output disturbance): the
residual with the loop in automatic is ``S d``.

Analysis
--------
The mean and a least-squares straight line are removed (the slope is reported as
the trend; a ramp is a matter of integral action, not of the band). The spectrum is
Welch's estimate [1]_ with a Hann window, segments of ``2**floor(log2(n/4))``
samples (at least 7 half-overlapping segments; at least 32 samples, at most n) and
50 % overlap. The band ``wd`` is the lowest Welch frequency at which the cumulative
variance reaches ``policy.band_energy_fraction`` of the total; it is resolved to
about 1.5 bins (``resolution_rad_s``). The observed amplitude is the 99.7th
percentile of ``|d - mean|`` (for a sinusoid of amplitude a, a sin(0.997 pi/2); for
Gaussian noise, 2.97 sigma). The required attenuation is
``A = 20 log10(amplitude/allowed)`` [dB].

References
----------
.. [1] P. D. Welch, The use of fast Fourier transform for the estimation of power
   spectra, IEEE Trans. Audio Electroacoustics 15(2), 1967, pp. 70-73.
.. [2] K. J. Astrom and R. M. Murray, Feedback Systems, 2nd ed., 2021, sec. 12.1
   (the sensitivity function S maps output disturbances to the output).
"""

from __future__ import annotations

import math
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd

from .limits import MAX_RECORD_BYTES, MAX_RECORD_LINES, NotARegularFile, open_regular
from .loop import LoopModel
from .plantdata import records as _records
from .policy import Policy
from .ranges import RECORD_INTERVAL, RECORD_VALUE
from .rows import printable
from . import timedomain as td

TIME_COLUMNS = ("time_s", "time_min", "timestamp")
VALUE_COLUMNS = ("value", "value_eu")
MAX_SHOWN = 20
AMPLITUDE_PERCENTILE = 99.7
DISAGREE = 0.10          # relative difference of the two residual stds that earns a note [-]

DIST_COLUMNS = ("dist_band_rad_s", "dist_attenuation_db", "dist_amplitude", "dist_std", "dist_peak",
                "dist_trend_per_s", "dist_note")
RESIDUAL_COLUMNS = ("residual_amplitude", "residual_std", "residual_std_freq", "residual_ok")


class RecordError(ValueError):
    """A disturbance record that cannot be used; the message lists every problem found.

    Control characters in the message (from the record's headers or cells) are escaped: it is printed.
    """

    def __init__(self, message: str = "") -> None:
        super().__init__(printable(message))


@dataclass(frozen=True)
class Record:
    """A validated disturbance record on a uniform grid.

    Attributes
    ----------
    name : str
        How messages name the file.
    t : ndarray
        Time from the first sample. [s]
    values : ndarray
        Disturbance. [% of PV range]
    dt : float
        Sample interval. [s]
    notes : tuple of str
        What was done to the record (resampling, unit conversion).
    start : str
        First timestamp as written, '' for relative time columns.
    """

    name: str
    t: np.ndarray
    values: np.ndarray
    dt: float
    notes: tuple[str, ...] = ()
    start: str = ""


@dataclass(frozen=True)
class RecordAnalysis:
    """What a record asks of the loop.

    Attributes
    ----------
    band_rad_s : float
        Frequency below which ``band_energy_fraction`` of the variance lies. [rad/s]
    attenuation_db : float
        Required attenuation 20 log10(amplitude/allowed); NaN without ``allowed``. [dB]
    amplitude : float
        99.7th percentile of |d - mean| after trend removal. [% of PV range]
    std : float
        Standard deviation after trend removal. [% of PV range]
    peak : float
        Largest |d - mean| after trend removal. [% of PV range]
    trend : float
        Slope of the straight line removed. [% of PV range per s]
    freqs : ndarray
        Welch frequencies. [rad/s]
    psd : ndarray
        Power spectral density, one-sided, integrating to the variance over ``freqs``. [%^2 s/rad]
    resolution_rad_s : float
        Bin spacing of the estimate. [rad/s]
    needs_attenuation : bool
        True when the amplitude exceeds ``allowed``.
    allowed : float or None
        Allowed amplitude used. [% of PV range]
    detrended : ndarray
        The record with mean and trend removed (input of the residual). [% of PV range]
    dt : float
        Sample interval of the record. [s]
    notes : tuple of str
    unusable : str
        Why the record cannot set or judge a requirement (empty when it can): an interval or
        values outside their ranges (:mod:`audit.ranges`), a band edge the record cannot resolve,
        statistics that are not finite.
    """

    band_rad_s: float
    attenuation_db: float
    amplitude: float
    std: float
    peak: float
    trend: float
    freqs: np.ndarray
    psd: np.ndarray
    resolution_rad_s: float
    needs_attenuation: bool
    allowed: float | None
    detrended: np.ndarray
    dt: float
    notes: tuple[str, ...] = ()
    unusable: str = ""


@dataclass(frozen=True)
class Residual:
    """The record through the loop: y = S d with the exact dead time.

    Attributes
    ----------
    t : ndarray  Time. [s]
    d : ndarray  Disturbance (mean and trend removed). [% of PV range]
    y : ndarray  PV deviation with the loop in automatic. [% of PV range]
    residual_amplitude : float  99.7th percentile of |y - mean(y)|. [% of PV range]
    residual_std : float  Standard deviation of y (time domain). [% of PV range]
    residual_std_freq : float  sqrt(integral of psd |S(jw)|^2 dw) (frequency domain). [% of PV range]
    residual_ok : bool or None  residual_amplitude <= allowed; None without ``allowed``.
    note : str
    """

    t: np.ndarray
    d: np.ndarray
    y: np.ndarray
    residual_amplitude: float
    residual_std: float
    residual_std_freq: float
    residual_ok: bool | None
    note: str = ""


# --------------------------------------------------------------------------- reading

def read_record(path: str | Path, pv_lo: float | None = None, pv_hi: float | None = None,
                policy: Policy = Policy(), name: str | None = None) -> Record:
    """Read and validate a disturbance record with the one record reader.

    Parameters
    ----------
    path : str or Path
        The CSV (or Parquet) file; see :mod:`audit.plantdata.records` for the format.
    pv_lo, pv_hi : float, optional
        PV range, needed for a ``value_eu`` column. [engineering units]
    policy : Policy
        ``min_samples``, ``uniform_tolerance`` and ``max_gap_s`` apply.
    name : str, optional
        How messages name the file (default: ``path`` as given).

    Returns
    -------
    Record

    Raises
    ------
    RecordError
        Naming the file, the line and the column of every problem (at most 20 shown):
        not a regular file or over ``MAX_RECORD_BYTES``, more than ``MAX_RECORD_LINES``
        lines, unreadable cells or times, time not increasing, a gap (a disturbance
        record must be one uniform stretch), too few samples. Quality words are missing
        values; short holes are filled and said in the notes.
    """
    shown = name or str(path)
    try:
        open_regular(path, MAX_RECORD_BYTES, "record", name=shown).close()
    except FileNotFoundError:
        raise RecordError(f"{shown}: file not found") from None
    except NotARegularFile as exc:
        raise RecordError(str(exc)) from None
    except OSError as exc:
        raise RecordError(f"{shown}: cannot be read ({exc.strerror or type(exc).__name__})") from None
    rp = _records.ReadPolicy(max_gap_intervals=policy.max_gap_s, uniform_tolerance=policy.uniform_tolerance,
                             min_samples=policy.min_samples, max_rows=MAX_RECORD_LINES)
    rec = _records.read_record(path, signals=VALUE_COLUMNS[:1], pv_lo=pv_lo, pv_hi=pv_hi, policy=rp, name=shown)
    if rec.truncated:
        raise RecordError(f"{shown}: more than {MAX_RECORD_LINES:,} lines; at most {MAX_RECORD_LINES:,} are read "
                          f"(decimate the record or split it)")
    for kinds in (("file", "header", "cell", "time", "order", "cap"), ("gap", "short")):
        problems = rec.notes_of(*kinds)
        if problems:
            total = sum(n.count for n in problems)
            shown_p = [str(n) for n in problems if n.count == 1][:MAX_SHOWN]
            more = f"; ... and {total - len(shown_p)} more" if total > len(shown_p) else ""
            raise RecordError("; ".join(shown_p) + more)
    seg = rec.segments[0]
    notes = tuple(n.text for n in rec.notes)
    return Record(rec.name, np.arange(seg.n) * seg.dt, seg.values["value"], seg.dt, notes, rec.start_text)


# --------------------------------------------------------------------------- analysis

def welch_segment(n: int) -> int:
    """Welch segment length for ``n`` samples: 2**floor(log2(n/4)), within [min(n, 32), n]. [-]

    Parameters
    ----------
    n : int
        Number of samples in the record. [-]

    Returns
    -------
    int
        Samples per segment. [-]
    """
    seg = 2 ** int(math.floor(math.log2(max(n / 4.0, 1.0))))
    return int(min(n, max(seg, min(n, 32))))


def detrend(t: np.ndarray, x: np.ndarray) -> tuple[np.ndarray, float]:
    """x minus its least-squares straight line; returns (residual, slope [units/s]).

    Parameters
    ----------
    t : ndarray
        Sample times. [s]
    x : ndarray
        Samples, same length as ``t``. [% of PV range]

    Returns
    -------
    tuple of (ndarray, float)
        The residual (mean and trend removed) [% of PV range] and the slope of the
        removed line [% of PV range per s]; slope 0 when all times are equal.
    """
    tc = t - t.mean()
    den = float(np.dot(tc, tc))
    slope = float(np.dot(tc, x - x.mean()) / den) if den > 0 else 0.0
    return x - x.mean() - slope * tc, slope


def amplitude_of(x: np.ndarray) -> float:
    """The amplitude statistic: 99.7th percentile of |x - mean(x)|. [same unit as x]

    Parameters
    ----------
    x : ndarray
        Samples, e.g. a disturbance or a residual. [% of PV range]

    Returns
    -------
    float
        The amplitude, in the unit of ``x``. [% of PV range]
    """
    return float(np.percentile(np.abs(x - np.mean(x)), AMPLITUDE_PERCENTILE))


def analyse_record(record: Record, allowed_amplitude: float | None, policy: Policy = Policy()) -> RecordAnalysis:
    """Band, amplitude and required attenuation of a record (see the module notes).

    Parameters
    ----------
    record : Record
    allowed_amplitude : float or None
        Largest acceptable amplitude of the PV deviation. [% of PV range]
    policy : Policy
        ``band_energy_fraction`` applies. [-]
    """
    bad = _out_of_range(record)
    if bad:
        nan = float("nan")
        return RecordAnalysis(nan, nan, nan, nan, nan, nan, np.zeros(0), np.zeros(0), nan, False,
                              allowed_amplitude, np.zeros(0), record.dt, tuple(record.notes) + (bad,), bad)
    d, slope = detrend(record.t, record.values)
    n = len(d)
    from scipy.signal import welch   # here, not at import: a run without records need not load scipy.signal
    seg = welch_segment(n)
    f, p = welch(d, fs=1.0 / record.dt, window="hann", nperseg=seg, noverlap=seg // 2,
                 detrend=False, scaling="density", return_onesided=True)
    w = 2.0 * math.pi * f
    psd = p / (2.0 * math.pi)
    dw = float(w[1] - w[0]) if len(w) > 1 else float("nan")
    energy = psd * dw
    total = float(energy.sum())
    notes = list(record.notes)
    unusable = ""
    if total > 0 and math.isfinite(total):
        cum = np.cumsum(energy) / total
        k = int(np.argmax(cum >= policy.band_energy_fraction - 1e-12))
        band = float(w[k])
        if not band > 0:
            # the variance lies below the lowest frequency the record resolves: no band edge can be read
            band = float("nan")
            unusable = (f"{100 * float(cum[0]):.3g} % of the variance lies below the lowest frequency the record "
                        f"resolves ({float(w[1]) if len(w) > 1 else float('nan'):.3g} rad/s), more than "
                        f"band_energy_fraction {policy.band_energy_fraction:g}: the record is too short for this "
                        f"disturbance (log a longer one); no band edge derived")
    elif total > 0:
        band = float("nan")
    else:
        band = float("nan")
        notes.append("record is constant after trend removal: no band")
    amp = amplitude_of(d)
    std = float(np.std(d))
    peak = float(np.max(np.abs(d)))
    if not all(math.isfinite(x) for x in (amp, std, peak, slope, total)):
        unusable = "the record's statistics are not finite (values too large or too uneven to analyse)"
    if unusable:
        notes.append(unusable)
        return RecordAnalysis(band, float("nan"), amp, std, peak, slope, w, psd, dw, False,
                              allowed_amplitude, d, record.dt, tuple(notes), unusable)
    if allowed_amplitude is None or not (allowed_amplitude > 0):
        att = float("nan")
        need = False
        notes.append("no allowed amplitude given: attenuation not derived")
    else:
        att = 20.0 * math.log10(amp / allowed_amplitude) if amp > 0 else float("-inf")
        need = att > 0
        if not need:
            notes.append(f"no attenuation needed: amplitude {amp:.3g} % <= allowed {allowed_amplitude:.3g} %")
    return RecordAnalysis(band, att, amp, std, peak, slope, w, psd, dw, need,
                          allowed_amplitude, d, record.dt, tuple(notes))


def _out_of_range(record: Record) -> str:
    """Why a record's interval or values lie outside their ranges (:mod:`audit.ranges`); empty when they do not."""
    if not RECORD_INTERVAL.accepts(float(record.dt)):
        return (f"sample interval {record.dt:g} s outside the range accepted ({RECORD_INTERVAL.describe()}): "
                f"check the time column and its unit")
    v = np.asarray(record.values, float)
    big = float(np.max(np.abs(v))) if v.size else 0.0
    if not RECORD_VALUE.accepts(big):
        return (f"values up to {big:.3g} % of range, outside the range accepted ({RECORD_VALUE.describe()}): "
                f"check the value column and its unit")
    return ""


# --------------------------------------------------------------------------- residual

def _kernels(models: Sequence[LoopModel], dts: np.ndarray, lengths: np.ndarray
             ) -> tuple[list[np.ndarray | None], np.ndarray, list[str]]:
    """Hat responses gamma_i = y(i dt) of the output-disturbance loop, and S(0), per loop."""
    n = len(models)
    out: list[np.ndarray | None] = [None] * n
    notes = [""] * n
    s0 = np.full(n, np.nan)
    batch, errors = td.build_batch(models, "output")
    for i, msg in errors.items():
        notes[i] = f"residual not simulated: {msg}"
    if batch is None:
        return out, s0, notes
    ok = [i for i in range(n) if i not in errors]
    # a delay line of more than N_CAP record intervals (a record sampled far faster than the loop's
    # dead time) cannot be simulated on the record's own step: leave that loop out, say so
    with np.errstate(invalid="ignore"):
        dmax = np.nan_to_num(np.nanmax(np.where(np.isnan(batch.delays), 0.0, batch.delays), axis=1), nan=0.0) \
            if batch.delays.size else np.zeros(len(ok))
    too_fine = [i for j, i in enumerate(ok) if dmax[j] / dts[i] > td.N_CAP]
    if too_fine:
        for i in too_fine:
            notes[i] = (f"residual not simulated: the record's interval {dts[i]:.3g} s is more than "
                        f"{td.N_CAP:,} times shorter than the loop's dead time")
        keep = [i for i in ok if i not in set(too_fine)]
        if not keep:
            return out, s0, notes
        sub_out, sub_s0, sub_notes = _kernels([models[i] for i in keep], dts[keep], lengths[keep])
        for j, i in enumerate(keep):
            out[i], s0[i], notes[i] = sub_out[j], sub_s0[j], sub_notes[j]
        return out, s0, notes
    s0[ok] = td.final_values(batch)[0]
    tc = np.array([td.characteristic_time(models[i]) for i in ok])
    dt = dts[ok]
    klen = np.minimum(lengths[ok], np.ceil(4.0 * td.HORIZON_FACTOR * tc / dt) + 2).astype(int)
    horizon = (klen + 1) * dt
    plans = td.plan_batch(batch, horizon, divisors=dt)
    h = np.array([p.h for p in plans])
    msteps = np.rint(dt / h).astype(int)
    need = (klen + 1) * msteps
    cut = need > td.N_CAP
    klen = np.where(cut, td.N_CAP // msteps - 1, klen)
    nsteps = int(np.max((klen + 1) * msteps))
    if np.any(klen < 1):
        for j in np.flatnonzero(klen < 1):
            notes[ok[j]] = "residual not simulated: record interval too long for the loop's dead time"
    res = td.simulate(batch, h, nsteps, ext=lambda k: np.maximum(0.0, 1.0 - np.abs(k * h - dt) / dt))
    for j, i in enumerate(ok):
        if klen[j] < 1:
            continue
        idx = (np.arange(klen[j]) + 1) * msteps[j]
        out[i] = res.yp[idx, 0, j]
        if cut[j]:
            notes[i] = f"residual kernel cut at {klen[j] * dt[j]:.4g} s by the step count"
    return out, s0, notes


def _residual_from(t: np.ndarray, d: np.ndarray, kern: np.ndarray, s0: float, model: LoopModel,
                   an: RecordAnalysis | None, allowed: float | None, note: str) -> Residual:
    from scipy.signal import fftconvolve
    x = d - d[0]
    y = s0 * d[0] + fftconvolve(x, kern)[:len(d)] if len(kern) else np.full(len(d), s0 * d[0])
    amp = amplitude_of(y)
    std = float(np.std(y))
    sf = float("nan")
    if an is not None and len(an.freqs) > 1:
        w = an.freqs[1:]                     # the w = 0 bin holds no variance after mean removal
        S = model.S(w)
        sf = float(math.sqrt(np.sum(an.psd[1:] * np.abs(S) ** 2) * an.resolution_rad_s))
    ok = None if allowed is None or not allowed > 0 else bool(amp <= allowed)
    if math.isfinite(sf) and sf > 0 and abs(std / sf - 1.0) > DISAGREE:
        note = "; ".join(x for x in (note, f"time- and frequency-domain residual std differ by "
                                           f"{100 * abs(std / sf - 1):.0f} %: the record has variance near its "
                                           f"Nyquist frequency (sampled slowly for this loop); read both with care")
                         if x)
    return Residual(t, d, y, amp, std, sf, ok, note)


def predict_residual(model: LoopModel, record: Record | RecordAnalysis, allowed_amplitude: float | None,
                     policy: Policy = Policy()) -> Residual:
    """The record through S with the loop's model and tuning, with the exact dead time.

    Parameters
    ----------
    model : LoopModel
        The loop as tuned (process, controller, dead time, PV filter, inner loop).
    record : Record or RecordAnalysis
        The disturbance as logged in manual (a Record is analysed first). Mean and
        trend are removed, as in :func:`analyse_record`.
    allowed_amplitude : float or None
        Largest acceptable amplitude of the PV deviation; None when not given. [% of PV range]
    policy : Policy
        Used only to analyse a :class:`Record` (``band_energy_fraction`` applies). [-]

    Notes
    -----
    The loop is simulated from rest with the record's first value held before t = 0
    (steady state S(0) d(0)). The response to one linear-interpolation basis function
    of the record (a triangle of half-width dt) is simulated with the exact delay;
    by linearity the residual is its convolution with the record, which is exact for
    a record that is linear between samples. The kernel is cut where the loop has
    settled (16 Tc, see :mod:`audit.timedomain`).
    """
    an = record if isinstance(record, RecordAnalysis) else analyse_record(record, allowed_amplitude, policy)
    return _residuals([model], [an], [allowed_amplitude])[0]


def _residuals(models: Sequence[LoopModel], analyses: Sequence[RecordAnalysis],
               allowed: Sequence[float | None]) -> list[Residual]:
    dts = [a.dt for a in analyses]
    lengths = np.array([len(a.detrended) for a in analyses])
    kern, s0, notes = _kernels(models, np.asarray(dts, float), lengths)
    out = []
    for i, (m, a) in enumerate(zip(models, analyses)):
        t = np.arange(len(a.detrended)) * dts[i]
        if kern[i] is None:
            nan = float("nan")
            sf = _residual_from(t, a.detrended, np.zeros(0), 0.0, m, a, allowed[i], "").residual_std_freq
            out.append(Residual(t, a.detrended, np.full(len(t), np.nan), nan, nan, sf, None, notes[i]))
        else:
            out.append(_residual_from(t, a.detrended, kern[i], float(s0[i]), m, a, allowed[i], notes[i]))
    return out


# --------------------------------------------------------------------------- pipeline stages

def _append(res: pd.DataFrame, label, col: str, text: str) -> None:
    old = res.at[label, col] if col in res.columns else ""
    old = "" if old is None or (isinstance(old, float) and math.isnan(old)) else str(old)
    res.at[label, col] = f"{old}; {text}" if old else text


def _confined(folder: Path, target: str) -> tuple[Path, str]:
    """The record's resolved path and its name relative to the inventory folder; RecordError outside it."""
    p = Path(target)
    full = (p if p.is_absolute() else folder / p).resolve()
    if full != folder and folder not in full.parents:
        raise RecordError(f"{p.name}: path leads outside the inventory's folder; keep records in that folder")
    return full, full.relative_to(folder).as_posix()


def analyse_records(audit) -> None:
    """Pipeline stage: read and analyse every row's disturbance record.

    Adds :data:`DIST_COLUMNS`; stores each :class:`RecordAnalysis` in
    ``audit.extras['records'][row.index]``. A bad record puts its message in
    ``dist_note`` and appends it to ``message``; the row's other results stay.

    Parameters
    ----------
    audit : Audit
        The run; record paths are confined to the inventory's folder. Its ``results`` and
        ``extras`` are changed in place; a derived requirement (``band_rad_s`` [rad/s],
        ``attenuation_db`` [dB]) is put in force when the row gives none.
    """
    res = audit.results
    inv = audit.inventory
    policy = inv.policy
    folder = Path(inv.path).resolve().parent
    store = audit.extras.setdefault("records", {})
    for c in DIST_COLUMNS:
        if c not in res.columns:
            res[c] = "" if c == "dist_note" else np.nan
    res["dist_note"] = res["dist_note"].astype(object)
    unjudged = audit.extras.setdefault("records_unjudged", {})
    for row in inv.rows:
        if not row.disturbance_file:
            continue
        try:
            label = res.index[row.index]
            try:
                full, shown = _confined(folder, row.disturbance_file)
                rec = read_record(full, row.pv_lo, row.pv_hi, policy, name=shown)
            except RecordError as exc:
                msg = f"disturbance record: {exc}"
                res.at[label, "dist_note"] = msg
                _append(res, label, "message", msg)
                unjudged[row.index] = msg
                continue
            an = analyse_record(rec, row.allowed_amplitude, policy)
            if an.unusable:
                msg = f"disturbance record {rec.name}: {an.unusable}"
                res.at[label, "dist_note"] = "; ".join(list(an.notes[:-1]) + [msg])
                _append(res, label, "message", msg)
                unjudged[row.index] = msg
                continue
            store[row.index] = an
            notes = list(an.notes)
            if row.band_rad_s is not None or row.attenuation_db is not None:
                notes.append("the row's band_rad_s/attenuation_db govern; derived values shown for comparison")
            elif an.needs_attenuation and np.isfinite(an.band_rad_s) and np.isfinite(an.attenuation_db):
                # no requirement on the row: the record's derived requirement is the one in force
                res.at[label, "band_rad_s"] = an.band_rad_s
                res.at[label, "attenuation_db"] = an.attenuation_db
                notes.append("the requirement derived from the record is in force (band_rad_s, attenuation_db)")
            res.at[label, "dist_band_rad_s"] = an.band_rad_s
            res.at[label, "dist_attenuation_db"] = an.attenuation_db
            res.at[label, "dist_amplitude"] = an.amplitude
            res.at[label, "dist_std"] = an.std
            res.at[label, "dist_peak"] = an.peak
            res.at[label, "dist_trend_per_s"] = an.trend
            res.at[label, "dist_note"] = "; ".join(notes)
        except Exception as exc:  # noqa: BLE001 - one row's fault: marked on its row, the others go on
            from .faults import row_fault
            store.pop(row.index, None)
            row_fault(audit, "records", row.index, exc)


def judge_unusable_records(audit) -> None:
    """A row whose disturbance record could not be used has a requirement that was not judged: not met.

    Such a row (a record named with an allowed amplitude, but unreadable or unusable: see
    ``dist_note``) is reported ``fails`` with a finding saying why, unless it is already invalid,
    unstable or failing; the status it had before is kept in
    ``audit.extras['records_unjudged_status']`` for the proposals (the tuning may be fine: the fix
    is the record).

    Parameters
    ----------
    audit : Audit
        The run, after the frequency stage; ``status`` and ``findings`` of its ``results`` change in place.
    """
    res = audit.results
    unjudged = audit.extras.get("records_unjudged", {})
    before = audit.extras.setdefault("records_unjudged_status", {})
    rows = audit.inventory.rows
    for i, msg in unjudged.items():
        row = rows[i]
        if row.allowed_amplitude is None or "status" not in res.columns:
            continue
        st = str(res.at[i, "status"])
        if st in ("invalid", "unstable"):
            continue
        words = "disturbance requirement not judged: the record could not be used (see dist_note); fix the record"
        old = str(res.at[i, "findings"] or "")
        res.at[i, "findings"] = f"{words}; {old}" if old else words
        before[i] = st
        res.at[i, "status"] = "fails"


def add_residuals(audit) -> None:
    """Pipeline stage: residual columns for rows with an analysed record and a model.

    Adds :data:`RESIDUAL_COLUMNS`; :class:`Residual` objects go to
    ``audit.extras['residuals'][row.index]``. Run after :func:`analyse_records`
    (and after the frequency stage: rows whose ``stable`` is False are skipped).

    Parameters
    ----------
    audit : Audit
        The run, with its models built; ``results`` and ``extras`` are changed in place.
    """
    res = audit.results
    records = audit.extras.get("records", {})
    store = audit.extras.setdefault("residuals", {})
    for c in RESIDUAL_COLUMNS:
        if c not in res.columns:
            res[c] = np.nan if c != "residual_ok" else None
    res["residual_ok"] = res["residual_ok"].astype(object)
    rows, models, analyses, allowed = [], [], [], []
    for row in audit.inventory.rows:
        an = records.get(row.index)
        m = audit.models[row.index] if row.index < len(audit.models) else None
        if an is None or m is None:
            continue
        label = res.index[row.index]
        st = res.at[label, "stable"] if "stable" in res.columns else None
        if st is not None and not pd.isna(st) and not bool(st):
            _append(res, label, "dist_note", "closed loop unstable: no residual")
            continue
        rows.append(row)
        models.append(m)
        analyses.append(an)
        allowed.append(row.allowed_amplitude)
    if not rows:
        return
    try:
        out = _residuals(models, analyses, allowed)
    except Exception:  # noqa: BLE001 - one row's fault must not cost the others: each alone
        from .faults import row_fault
        out = []
        for row, m, an, a in zip(rows, models, analyses, allowed):
            try:
                out.append(_residuals([m], [an], [a])[0])
            except Exception as exc:  # noqa: BLE001 - marked on its row
                row_fault(audit, "residuals", row.index, exc)
                out.append(None)
    for row, r in zip(rows, out):
        if r is None:
            continue
        label = res.index[row.index]
        store[row.index] = r
        res.at[label, "residual_amplitude"] = r.residual_amplitude
        res.at[label, "residual_std"] = r.residual_std
        res.at[label, "residual_std_freq"] = r.residual_std_freq
        res.at[label, "residual_ok"] = r.residual_ok
        if r.note:
            _append(res, label, "dist_note", r.note)


# --------------------------------------------------------------------------- command

def plot_spectrum(an: RecordAnalysis, out: str | Path, title: str = "") -> None:
    """Write an SVG of the spectrum with the band edge marked (deterministic output).

    Parameters
    ----------
    an : RecordAnalysis
        Analysed record: its Welch spectrum (``freqs`` [rad/s], ``psd``
        [%^2 s/rad]) and band edge ``band_rad_s`` [rad/s].
    out : str or Path
        SVG file to write (overwritten).
    title : str
        Title above the plot; none when empty.
    """
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    with matplotlib.rc_context({"svg.hashsalt": "plant-audit", "svg.fonttype": "path"}):
        fig, ax = plt.subplots(figsize=(6.4, 3.6))
        keep = an.freqs > 0
        ax.loglog(an.freqs[keep], np.maximum(an.psd[keep], 1e-300), color="0.2", lw=1.2, label="Welch spectrum")
        if math.isfinite(an.band_rad_s) and an.band_rad_s > 0:
            ax.axvline(an.band_rad_s, color="tab:blue", ls="--", lw=1.2,
                       label=f"band edge {an.band_rad_s:.3g} rad/s")
        ax.set_xlabel("frequency [rad/s]")
        ax.set_ylabel("PSD [%$^2$ s/rad]")
        ax.set_title(title, fontsize=10)
        ax.grid(True, which="both", lw=0.3, color="0.85")
        ax.legend(fontsize=8)
        fig.tight_layout()
        fig.savefig(out, format="svg", metadata={"Date": None})
        plt.close(fig)


def disturbance_command(path: str, allowed: float, out: str | None = None) -> int:
    """``plant-audit disturbance RECORD.csv --allowed X [--plot PATH]``.

    Prints the derived requirement and writes the spectrum plot (default
    ``<stem>-spectrum.svg`` beside the record). Returns 0, or 2 with a one-line
    message on stderr for a bad or unusable record or an ``allowed`` that is not a
    positive finite number (0 included: it is not "not given").

    Parameters
    ----------
    path : str
        Disturbance record (CSV) to read.
    allowed : float
        Largest acceptable amplitude of the PV deviation. [% of PV range]
    out : str or None
        SVG file for the spectrum plot; ``<stem>-spectrum.svg`` beside the record when None.

    Returns
    -------
    int
        Exit code: 0 on success, 2 for a bad record or an unwritable plot.
    """
    if not (isinstance(allowed, (int, float)) and math.isfinite(allowed) and allowed > 0):
        print(f"plant-audit disturbance: --allowed must be a positive number of % of PV range, got {allowed!r}",
              file=sys.stderr)
        return 2
    try:
        rec = read_record(path)
    except RecordError as exc:
        print(f"plant-audit disturbance: {exc}", file=sys.stderr)
        return 2
    an = analyse_record(rec, allowed)
    if an.unusable:
        print(f"plant-audit disturbance: {rec.name}: {an.unusable}", file=sys.stderr)
        return 2
    target = Path(out) if out else Path(path).with_name(Path(path).stem + "-spectrum.svg")
    print(f"record          {rec.name}  ({len(rec.t)} samples every {rec.dt:g} s)")
    print(f"band wd         {an.band_rad_s:.4g} rad/s  (resolution {an.resolution_rad_s:.3g} rad/s)")
    print(f"attenuation A   {an.attenuation_db:.3g} dB  (allowed amplitude {allowed:g} % of range)")
    print(f"amplitude       {an.amplitude:.4g} % of range (99.7th percentile of |d - mean|)")
    print(f"std             {an.std:.4g} % of range")
    print(f"peak            {an.peak:.4g} % of range")
    print(f"trend           {an.trend:.4g} % of range per s (removed)")
    for note in an.notes:
        print(f"note            {note}")
    from .output import FileRefused, write_file_safely
    try:
        if target.exists() and target.resolve() == Path(path).resolve():
            raise FileRefused(f"{target} is the record itself; give another --plot path")
        write_file_safely(target, lambda tmp: plot_spectrum(an, tmp, title=Path(path).name), force=True,
                          suffixes=(".svg",))
    except FileRefused as exc:
        print(f"plant-audit disturbance: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:
        print(f"plant-audit disturbance: cannot write {target}: {exc.strerror}", file=sys.stderr)
        return 2
    print(f"plot            {target}")
    return 0
