"""Sticking control valves from routine operating data (non-invasive tests).

Two published tests, applied only to an oscillating loop (see :mod:`audit.plantdata.oscillation`):

* **Cross-correlation test** (Horch [1]_), for self-regulating processes: the cross-correlation
  between the controller output ``op`` and the process value ``pv`` is an odd function of the lag
  (zero at lag 0) when a sticking valve drives the oscillation, and an even one (extreme at lag 0)
  when tuning or a linear disturbance does. We measure where lag 0 sits between the zero crossings
  of the cross-correlation either side of it (after removing the process dead time):
  ``oddness = abs(tau_r + tau_l) / (tau_r - tau_l)``, 0 for an even function and 1 for an odd one.
* **Curve fitting** (He, Wang, Pottmann and Qin [2]_): each half cycle of the oscillating signal is
  fitted by a half sine and by a triangle (apex free); stiction gives triangles. The stiction
  index ``SI = MSE_sine / (MSE_sine + MSE_triangle)``; SI >= 0.6 suggests stiction, SI <= 0.4
  rules it out, between is undecided [2]_. The signal fitted is ``op`` for a self-regulating
  process and ``pv`` for an integrating one [2]_.

The decision rests on curve fitting, with a stricter threshold than the published 0.6
(:data:`SI_STICKING` = 0.7): on seeded loops oscillating from an over-tuned controller and
driven by noise (tests/reference/test_health_reference.py), 28 % of SI values fell between 0.6
and 0.65, while every sticking-valve case we simulated gave SI >= 0.73. The cross-correlation
test is reported beside it but does not decide: it assumes that ``pv`` follows the valve
closely (fast, flow-like loops); with a process lag comparable to the period, or a linear
oscillation entering from outside at low frequency (the integral action turns the phase by 90
deg), it points the wrong way.

References
----------
.. [1] A. Horch, "A simple method for detection of stiction in control valves", Control
   Engineering Practice 7 (1999) 1221-1231.
.. [2] Q. P. He, J. Wang, M. Pottmann and S. J. Qin, "A curve fitting method for detecting
   valve stiction in oscillating control loops", Industrial & Engineering Chemistry Research 46
   (2007) 4549-4560 (stiction index and its thresholds 0.4 and 0.6).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .oscillation import detrend, zero_crossings

#: Stiction index at or above which a valve is reported as sticking (He et al. 2007 use 0.6;
#: see the module notes). [-]
SI_STICKING = 0.7
#: Stiction index at or below which curve fitting rules stiction out (He et al. 2007). [-]
SI_CLEAR = 0.4
#: Points per half cycle after resampling for the fits. [-]
_POINTS = 32


@dataclass(frozen=True)
class ValveTest:
    """Result of the sticking-valve tests on one oscillating loop.

    Attributes
    ----------
    sticking : bool
        True when the stiction index reaches :data:`SI_STICKING`.
    confidence : float
        How strongly the curve fit points to stiction: (SI - 0.4) / 0.6 clipped to [0, 1];
        0 where He et al. rule stiction out, 1 for a perfect triangle. NaN when not assessed. [-]
    stiction_index : float
        He et al.'s SI of the fitted signal; NaN with fewer than four half cycles. [-]
    oddness : float
        Oddness of the op-pv cross-correlation (Horch's test, reported, not deciding); NaN for
        an integrating process or without crossings either side of lag 0. [-]
    half_cycles : int
        Half cycles fitted. [-]
    method : str
        The tests applied, in words.
    """

    sticking: bool
    confidence: float
    stiction_index: float
    oddness: float
    half_cycles: int
    method: str


@dataclass(frozen=True)
class PvOpPoints:
    """pv against op for a plot (a sticking valve draws parallelograms, a linear loop ellipses).

    Attributes
    ----------
    op : ndarray
        Controller output, at most ``max_points`` samples of the latest cycles. [%]
    pv : ndarray
        Process value at the same samples. [% of range]
    """

    op: np.ndarray
    pv: np.ndarray


def cross_correlation_oddness(op: np.ndarray, pv: np.ndarray, ts: float, dead_time_s: float = 0.0
                              ) -> float:
    """Oddness of the cross-correlation between controller output and process value (Horch 1999).

    Parameters
    ----------
    op : ndarray
        Controller output of one uniformly sampled segment. [%]
    pv : ndarray
        Process value at the same samples. [% of range]
    ts : float
        Sample interval. [s]
    dead_time_s : float
        Process dead time; the cross-correlation is read around this lag instead of 0. [s]

    Returns
    -------
    float
        abs(tau_r + tau_l) / (tau_r - tau_l), with tau_l < 0 < tau_r the zero crossings of the
        normalised cross-correlation r(tau) = corr(op_t, pv_{t + theta + tau}) nearest to lag 0:
        0 for an even function, 1 for an odd one; NaN without a crossing on either side. [-]

    References
    ----------
    .. [1] A. Horch, "A simple method for detection of stiction in control valves", Control
       Engineering Practice 7 (1999) 1221-1231.
    """
    u = detrend(op)
    y = detrend(pv)
    n = u.size
    den = math.sqrt(float(np.einsum("i,i->", u, u)) * float(np.einsum("i,i->", y, y)))
    if den == 0:
        return math.nan
    m = n // 4
    from scipy import fft as _fft  # scipy when first needed: a run without plant data never loads it
    nfft = _fft.next_fast_len(n + m, real=True)                # no wrap-around up to lag m
    c = _fft.irfft(np.conj(_fft.rfft(u, nfft)) * _fft.rfft(y, nfft), nfft) / den
    r = np.concatenate((c[-m:], c[: m + 1]))            # lags -m .. m
    shift = dead_time_s / ts
    z = zero_crossings(r) - m - shift                     # lags relative to the dead time
    left, right = z[z < 0], z[z >= 0]
    if left.size == 0 or right.size == 0:
        return math.nan
    tl, tr = float(left.max()), float(right.min())
    return abs(tr + tl) / (tr - tl)


def half_cycles(x: np.ndarray, ts: float, period_s: float) -> np.ndarray:
    """The half cycles of an oscillating signal, resampled to a common length.

    Parameters
    ----------
    x : ndarray
        Signal of one uniformly sampled segment (op or pv). [%]
    ts : float
        Sample interval. [s]
    period_s : float
        Oscillation period (from the detector). [s]

    Returns
    -------
    ndarray
        One row per complete half cycle, :data:`_POINTS` values each, from one zero crossing of
        the signal's oscillation (the signal band-passed one octave around the period) to the
        next; the signal itself is low-passed at five times the oscillation frequency only and
        interpolated band-limited (polyphase resampling) where a half cycle has few samples. [%]
    """
    x = detrend(x)
    f0 = 2.0 * ts / period_s
    if not (0 < f0 < 0.5) or x.size < 3 * period_s / ts:
        return np.zeros((0, _POINTS))
    from scipy import signal as _sig
    band = _sig.sosfiltfilt(_sig.butter(2, [0.5 * f0, min(2 * f0, 0.95)], btype="bandpass", output="sos"), x)
    smooth = x if 5 * f0 >= 0.95 else _sig.sosfiltfilt(_sig.butter(2, 5 * f0, output="sos"), x)
    up = int(math.ceil(4 * _POINTS * ts / period_s))       # band-limited interpolation to >= 64 points per half cycle
    zc = zero_crossings(band) * max(up, 1)
    if zc.size < 2:
        return np.zeros((0, _POINTS))
    if up <= 1:
        return _cycles_at(zc, smooth)
    # the up-sampled signal is made a piece at a time (a fast oscillation in a long record would
    # otherwise take ``up`` times the record's memory, several times over)
    return _cycles_upsampled(zc, smooth, up)


#: Half cycles fitted at a time by :func:`stiction_index`. [-]
_SI_BLOCK = 4096
#: Samples of the record up-sampled at a time by :func:`half_cycles`. [-]
_PIECE = 1 << 16
#: Samples either side of a piece: more than the resampling filter's half length (10 samples). [-]
_MARGIN = 32


def _cycles_at(zc: np.ndarray, smooth: np.ndarray) -> np.ndarray:
    """Half cycles between the crossings ``zc`` (sample positions) read from ``smooth`` (not up-sampled)."""
    s = np.linspace(0.0, 1.0, _POINTS)
    pos = zc[:-1, None] + s[None, :] * (zc[1:] - zc[:-1])[:, None]
    keep = (zc[1:] - zc[:-1]) >= 3                         # at least three samples per half cycle
    keep &= pos[:, -1] <= smooth.size - 1
    return np.interp(pos[keep], np.arange(smooth.size), smooth)


def _cycles_upsampled(zc: np.ndarray, smooth: np.ndarray, up: int) -> np.ndarray:
    """The half cycles of ``smooth`` up-sampled ``up`` times (polyphase), made piece by piece.

    Each piece is up-sampled from the record with :data:`_MARGIN` samples either side, so each
    value is the one the whole record's up-sampling gives (the same filter taps summed in the same
    order), and the interpolation reads the same two neighbours: the figures are those of the
    whole, bit for bit.
    """
    from scipy import signal as _sig
    n_in = smooth.size
    size = n_in * up                                       # length of the whole up-sampled signal
    s = np.linspace(0.0, 1.0, _POINTS)
    starts = zc[:-1] / up                                  # half-cycle starts in record samples
    bounds = np.searchsorted(starts, np.arange(_PIECE, n_in + _PIECE, _PIECE), side="left")
    pieces, a = [], 0
    for b in np.append(bounds, zc.size - 1):
        b = int(b)
        if b > a:
            pieces.append((a, b))
            a = b
    # which half cycles are kept is known from the crossings alone (a half cycle's last point is its
    # end crossing), so the rows are counted first and written into one array: a fast oscillation
    # over a week gives some 10^5 half cycles (tens of MB), not to be held twice while pieces are joined
    dz = zc[1:] - zc[:-1]
    keep = (dz >= 3 * up) & (zc[:-1] + s[-1] * dz <= size - 1)
    rows = [int(np.count_nonzero(keep[a:b])) for a, b in pieces]
    out = np.empty((sum(rows), _POINTS))
    at = 0
    for (a, b), n in zip(pieces, rows):
        if not n:
            continue
        k = a + np.flatnonzero(keep[a:b])
        pk = zc[k, None] + s[None, :] * dz[k, None]
        lo = int(math.floor(float(pk.min())))
        hi = min(int(math.floor(float(pk.max()))) + 2, size)
        i0 = max(0, lo // up - _MARGIN)
        i1 = min(n_in, hi // up + 1 + _MARGIN)
        piece = _sig.resample_poly(smooth[i0:i1], up, 1)[lo - i0 * up:hi - i0 * up]
        out[at:at + n] = np.interp(pk, np.arange(lo, hi), piece)
        at += n
    return out


def stiction_index(cycles: np.ndarray) -> float:
    """He et al.'s stiction index of half cycles: sine against triangle fit.

    Parameters
    ----------
    cycles : ndarray
        Half cycles from :func:`half_cycles`, one per row. [%]

    Returns
    -------
    float
        SI = MSE_sine / (MSE_sine + MSE_triangle) over all half cycles, each fitted by least
        squares as offset + amplitude x shape (the triangle's apex searched over 5 % to 95 % of
        the half cycle); NaN with fewer than four half cycles. [-]

    References
    ----------
    .. [1] Q. P. He, J. Wang, M. Pottmann and S. J. Qin, Ind. Eng. Chem. Res. 46 (2007) 4549-4560.
    """
    if cycles.shape[0] < 4:
        return math.nan
    s = np.linspace(0.0, 1.0, cycles.shape[1])
    apex = np.linspace(0.05, 0.95, 19)
    tri = np.where(s[None, :] <= apex[:, None], s[None, :] / apex[:, None],
                   (1 - s[None, :]) / (1 - apex[:, None]))
    shapes = np.vstack((np.sin(np.pi * s)[None, :], tri))              # (20, P)
    fc = shapes - shapes.mean(axis=1, keepdims=True)
    ff = (fc * fc).sum(axis=1)[None, :]
    n = cycles.shape[0]
    sine, tri_best = np.empty(n), np.empty(n)
    for a in range(0, n, _SI_BLOCK):               # each half cycle's fit is its own row: in blocks, the
        c = cycles[a:a + _SI_BLOCK]                # temporaries stay small whatever the number of cycles
        yc = c - c.mean(axis=1, keepdims=True)
        amp = yc @ fc.T / ff                                            # (cycles, 20)
        np.multiply(yc, yc, out=yc)                                     # squared in place: one copy less
        resid = yc.sum(axis=1)[:, None] - amp ** 2 * ff
        sine[a:a + len(c)] = resid[:, 0]
        tri_best[a:a + len(c)] = resid[:, 1:].min(axis=1)
    mse_sine = float(sine.sum())
    mse_tri = float(tri_best.sum())
    tot = mse_sine + mse_tri
    return 0.5 if tot <= 0 else mse_sine / tot


def assess_valve(op: np.ndarray, pv: np.ndarray, ts: float, period_s: float, *,
               integrating: bool = False, dead_time_s: float = 0.0) -> ValveTest:
    """Sticking-valve tests of one oscillating loop.

    Parameters
    ----------
    op : ndarray
        Controller output of one uniformly sampled segment. [%]
    pv : ndarray
        Process value at the same samples. [% of range]
    ts : float
        Sample interval. [s]
    period_s : float
        Oscillation period from :func:`audit.plantdata.oscillation.detect_oscillation`. [s]
    integrating : bool
        True for an integrating process (levels): curve fitting on ``pv``, no cross-correlation.
    dead_time_s : float
        Process dead time, from the model. [s]

    Returns
    -------
    ValveTest
    """
    sig = pv if integrating else op
    cyc = half_cycles(sig, ts, period_s) if math.isfinite(period_s) else np.zeros((0, _POINTS))
    si = stiction_index(cyc)
    odd = math.nan if integrating else cross_correlation_oddness(op, pv, ts, dead_time_s)
    conf = min(1.0, max(0.0, (si - SI_CLEAR) / (1.0 - SI_CLEAR))) if math.isfinite(si) else math.nan
    sticking = bool(math.isfinite(si) and si >= SI_STICKING)
    method = ("curve fitting of pv (He et al. 2007)" if integrating else
              "curve fitting of op (He et al. 2007); op-pv cross-correlation (Horch 1999) reported")
    return ValveTest(sticking, conf, si, odd, int(cyc.shape[0]), method)


def pv_op_points(op: np.ndarray, pv: np.ndarray, max_points: int = 2000) -> PvOpPoints:
    """The latest samples of op and pv for the pv-op plot.

    Parameters
    ----------
    op : ndarray
        Controller output. [%]
    pv : ndarray
        Process value. [% of range]
    max_points : int
        Most points kept (the latest ones). [-]

    Returns
    -------
    PvOpPoints
    """
    op = np.asarray(op, dtype=float)[-max_points:]
    pv = np.asarray(pv, dtype=float)[-max_points:]
    ok = np.isfinite(op) & np.isfinite(pv)
    return PvOpPoints(op[ok], pv[ok])
