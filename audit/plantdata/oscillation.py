"""Oscillation in routine operating data: autocorrelation regularity and half-cycle IAE.

Two published detectors work on the control error of one uniformly sampled segment:

* the regularity of the zero crossings of the autocorrelation function (ACF) of Thornhill,
  Huang and Zhang [1]_: the intervals between alternate zero crossings estimate the period;
  their mean over three standard deviations is the regularity r, and r > 1 marks a regular
  oscillation;
* the integrated absolute error between zero crossings of the error of Hagglund [2]_: a half
  cycle whose IAE exceeds 2 a / w_u (a the amplitude that matters, w_u the ultimate frequency)
  is a load disturbance; many of them in a row are an oscillation.

The oscillation's amplitude is that of the error passed through a band-pass filter of one
octave on each side of the detected frequency: sqrt(2) times its standard deviation (the
amplitude of a sine of that power). Everything here is in % of range and seconds.

References
----------
.. [1] N. F. Thornhill, B. Huang and H. Zhang, "Detection of multiple oscillations in control
   loops", Journal of Process Control 13 (2003) 91-100, sec. 3 (ACF zero crossings, eq. for r).
.. [2] T. Hagglund, "A control-loop performance monitor", Control Engineering Practice 3 (1995)
   1543-1551, sec. 3 (IAE between zero crossings, IAE_lim = 2 a / w_u).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Regularity above which the ACF zero crossings mark an oscillation (Thornhill et al. 2003). [-]
REGULARITY_MIN = 1.0
#: Fewest ACF zero crossings for a period estimate (three alternate-crossing intervals). [-]
MIN_CROSSINGS = 5
#: Smallest ACF peak at about one period (between its second and third zero crossings). [-]
ACF_PEAK_MIN = 0.2
#: Most ACF zero crossings used (ten intervals, as in Thornhill et al. 2003). [-]
MAX_CROSSINGS = 11


@dataclass(frozen=True)
class Autocorrelation:
    """Normalised autocorrelation of a signal, for the report and for the detector.

    Attributes
    ----------
    lags_s : ndarray
        Lags, from 0. [s]
    values : ndarray
        Autocorrelation coefficient at each lag, 1 at lag 0. [-]
    crossings_s : ndarray
        Lags of the zero crossings used by the detector, interpolated linearly. [s]
    """

    lags_s: np.ndarray
    values: np.ndarray
    crossings_s: np.ndarray


@dataclass(frozen=True)
class Oscillation:
    """Result of the oscillation detector on one loop's control error.

    Attributes
    ----------
    oscillating : bool
        True when the ACF zero crossings are regular (``regularity`` > the threshold), the ACF
        comes back to at least :data:`ACF_PEAK_MIN` after one period (``acf_peak``) and the
        amplitude reaches the smallest that matters.
    period_s : float
        Period: mean interval between alternate ACF zero crossings; NaN with too few crossings. [s]
    amplitude_pct : float
        Amplitude of the error in one octave either side of the oscillation frequency (sqrt(2)
        x its standard deviation); NaN without a period. [% of range]
    regularity : float
        r = mean(Tp) / (3 std(Tp)) of the period estimates Tp; inf when they are all equal,
        NaN with too few crossings. [-]
    crossings : int
        Number of ACF zero crossings used. [-]
    acf_peak : float
        Largest ACF value between its second and third zero crossings (lag about one
        period): the share of the error's variance that repeats after a period. [-]
    half_cycles : int
        Half cycles of the error (between its zero crossings) counted by Hagglund's rule. [-]
    load_half_cycles : int
        Those whose IAE exceeds Hagglund's limit 2 a / w (a the amplitude that matters, w the
        oscillation frequency, or the one given). [-]
    """

    oscillating: bool
    period_s: float
    amplitude_pct: float
    regularity: float
    crossings: int
    acf_peak: float
    half_cycles: int
    load_half_cycles: int


def autocorrelation(x: np.ndarray, max_lag: int | None = None) -> np.ndarray:
    """Biased, normalised autocorrelation of a signal with its mean removed (by FFT).

    Parameters
    ----------
    x : ndarray
        Samples, uniformly spaced, no NaN. [any]
    max_lag : int or None
        Largest lag returned, in samples; ``len(x) // 2`` when None. [-]

    Returns
    -------
    ndarray
        ``max_lag + 1`` coefficients, 1 at lag 0 (all zero for a constant signal). [-]

    Notes
    -----
    r(k) = sum_t x_t x_{t+k} / sum_t x_t^2 over the record (the biased estimate, which is
    positive semi-definite), common practice (Box, Jenkins and Reinsel, Time Series Analysis,
    sec. 2.1.5).
    """
    x = np.asarray(x, dtype=float)
    n = x.size
    if max_lag is None:
        max_lag = n // 2
    max_lag = int(min(max_lag, n - 1))
    z = x - x.mean()
    from scipy import fft as _fft  # scipy when first needed: a run without plant data never loads it
    nfft = _fft.next_fast_len(max(n + max_lag, 2), real=True)   # no wrap-around up to max_lag
    f = _fft.rfft(z, nfft)
    acov = _fft.irfft(f.real ** 2 + f.imag ** 2, nfft)[: max_lag + 1]
    if acov[0] <= 0:
        return np.zeros(max_lag + 1)
    return acov / acov[0]


def detrend(x: np.ndarray) -> np.ndarray:
    """The signal less its least-squares straight line (closed form, O(n)).

    Parameters
    ----------
    x : ndarray
        Samples, uniformly spaced. [any]

    Returns
    -------
    ndarray
        Residual of the straight-line fit against the sample index. [same as x]
    """
    x = np.asarray(x, dtype=float)
    n = x.size
    if n < 2:
        return x - x.mean() if n else x.copy()
    k = np.arange(n, dtype=float) - (n - 1) / 2.0
    slope = float(np.einsum("i,i->", k, x)) / (n * (n * n - 1.0) / 12.0)   # sum k^2 in closed form
    return x - x.mean() - slope * k


def zero_crossings(r: np.ndarray) -> np.ndarray:
    """Positions of the sign changes of a sampled function, linearly interpolated.

    Parameters
    ----------
    r : ndarray
        Samples at positions 0, 1, 2, ... [any]

    Returns
    -------
    ndarray
        Fractional positions (in samples) where ``r`` crosses zero, ascending. [-]
    """
    r = np.asarray(r, dtype=float)
    s = np.signbit(r)
    k = np.flatnonzero(s[1:] != s[:-1])
    return k + r[k] / (r[k] - r[k + 1])


def regularity(crossings: np.ndarray) -> tuple[float, float]:
    """Period and regularity from the zero crossings of an ACF (Thornhill et al. 2003).

    Parameters
    ----------
    crossings : ndarray
        Lags of successive zero crossings. [s]

    Returns
    -------
    (float, float)
        Mean period [s] and regularity r [-]; NaN, NaN with fewer than
        :data:`MIN_CROSSINGS` crossings.

    Notes
    -----
    Each interval between alternate crossings, Tp_i = z_{i+2} - z_i, is a period estimate;
    r = mean(Tp) / (3 std(Tp)) [1]_ (std with n - 1; inf when every estimate is equal).

    References
    ----------
    .. [1] N. F. Thornhill, B. Huang and H. Zhang, Journal of Process Control 13 (2003) 91-100.
    """
    z = np.asarray(crossings, dtype=float)
    if z.size < MIN_CROSSINGS:
        return math.nan, math.nan
    tp = z[2:] - z[:-2]
    m, s = float(tp.mean()), float(tp.std(ddof=1))
    return m, (math.inf if s == 0 else m / (3.0 * s))


def half_cycle_iae(e: np.ndarray, ts: float) -> np.ndarray:
    """IAE of each complete half cycle of a signal (between successive zero crossings).

    Parameters
    ----------
    e : ndarray
        Control error, mean removed by the caller where wanted. [% of range]
    ts : float
        Sample interval. [s]

    Returns
    -------
    ndarray
        Integral of abs(e) between each pair of successive sign changes (the partial half
        cycles at the ends left out). [% of range x s]
    """
    e = np.asarray(e, dtype=float)
    s = np.signbit(e)
    k = np.flatnonzero(s[1:] != s[:-1]) + 1      # first sample of each new half cycle
    if k.size < 2:
        return np.zeros(0)
    c = np.concatenate(([0.0], np.cumsum(np.abs(e)) * ts))
    return c[k[1:]] - c[k[:-1]]


def band_amplitude(e: np.ndarray, ts: float, period_s: float) -> float:
    """Amplitude of the part of a signal within one octave of a given period.

    Parameters
    ----------
    e : ndarray
        Signal, uniformly sampled. [% of range]
    ts : float
        Sample interval. [s]
    period_s : float
        Period of the oscillation. [s]

    Returns
    -------
    float
        sqrt(2) x the standard deviation of ``e`` passed forward and backward through a
        second-order Butterworth band-pass from half to twice the oscillation frequency
        (upper edge held below 0.95 of the Nyquist frequency); NaN when the period is not
        finite or longer than the record. [% of range]
    """
    e = np.asarray(e, dtype=float)
    if not (math.isfinite(period_s) and period_s > 2 * ts) or period_s > e.size * ts:
        return math.nan
    f0 = 2.0 * ts / period_s                    # oscillation frequency / Nyquist frequency
    lo, hi = 0.5 * f0, min(2.0 * f0, 0.95)
    from scipy import signal as _sig
    sos = _sig.butter(2, [lo, hi], btype="bandpass", output="sos")
    y = _sig.sosfiltfilt(sos, e - e.mean())
    return float(math.sqrt(2.0) * y.std())


def detect_oscillation(e: np.ndarray, ts: float, *, min_amplitude_pct: float = 0.25,
                       regularity_min: float = REGULARITY_MIN, w_ultimate: float | None = None,
                       acf: np.ndarray | None = None) -> Oscillation:
    """Is the control error oscillating? Period, amplitude and regularity.

    Parameters
    ----------
    e : ndarray
        Control error sp - pv of one uniformly sampled segment, no NaN. [% of range]
    ts : float
        Sample interval. [s]
    min_amplitude_pct : float
        Smallest oscillation amplitude that matters (Hagglund's a). [% of range]
    regularity_min : float
        Regularity above which the oscillation is regular (1 in Thornhill et al. 2003). [-]
    w_ultimate : float or None
        Ultimate frequency for Hagglund's limit 2 a / w_u; the detected oscillation
        frequency when None. [rad/s]
    acf : ndarray or None
        The autocorrelation of ``e`` when already computed (:func:`autocorrelation`). [-]

    Returns
    -------
    Oscillation

    Notes
    -----
    The ACF is taken over lags up to half the record, after a straight line is removed from
    the error. Its zero crossings are used from the first on, at most :data:`MAX_CROSSINGS`
    of them [1]_. Irregular noise can give regular-looking crossings where the ACF has
    decayed to its estimation noise; the ACF must therefore also come back to
    :data:`ACF_PEAK_MIN` after one period (the first peak of the ACF as a measure of
    oscillation, as in the decay-ratio test of Miao and Seborg [3]_). Hagglund's count [2]_ is reported beside the decision; the decision itself
    is the regularity test and the amplitude.

    References
    ----------
    .. [1] N. F. Thornhill, B. Huang and H. Zhang, "Detection of multiple oscillations in
       control loops", J. Process Control 13 (2003) 91-100.
    .. [2] T. Hagglund, "A control-loop performance monitor", Control Eng. Practice 3 (1995)
       1543-1551.
    .. [3] T. Miao and D. E. Seborg, "Automatic detection of excessively oscillatory feedback
       control loops", Proc. IEEE Int. Conf. Control Applications, 1999, 359-364.
    """
    e = np.asarray(e, dtype=float)
    n = e.size
    if n < 4 * MIN_CROSSINGS:
        return Oscillation(False, math.nan, math.nan, math.nan, 0, math.nan, 0, 0)
    z = detrend(e)
    r = autocorrelation(z) if acf is None else np.asarray(acf, dtype=float)
    zk = zero_crossings(r)[:MAX_CROSSINGS]
    zc = zk * ts
    period, reg = regularity(zc)
    peak = math.nan
    if zk.size >= 3:
        lo, hi = int(math.ceil(zk[1])), int(math.floor(zk[2])) + 1
        peak = float(r[lo:hi].max()) if hi > lo else 0.0
    amp = band_amplitude(z, ts, period)
    hc = half_cycle_iae(z, ts)
    w = w_ultimate if w_ultimate else (2 * math.pi / period if math.isfinite(period) else math.nan)
    loads = int(np.count_nonzero(hc > 2.0 * min_amplitude_pct / w)) if math.isfinite(w) else 0
    osc = bool(math.isfinite(reg) and reg > regularity_min and peak >= ACF_PEAK_MIN
               and amp >= min_amplitude_pct)
    return Oscillation(osc, period, amp, reg, int(zc.size), peak, int(hc.size), loads)


def autocorrelation_for_plot(e: np.ndarray, ts: float, periods: float = 6.0,
                             period_s: float = math.nan, acf: np.ndarray | None = None) -> Autocorrelation:
    """The autocorrelation of the control error over a few periods, with the crossings used.

    Parameters
    ----------
    e : ndarray
        Control error of one uniformly sampled segment. [% of range]
    ts : float
        Sample interval. [s]
    periods : float
        How many oscillation periods of lag to keep (half the record when there is no period). [-]
    period_s : float
        Detected period; NaN when none. [s]
    acf : ndarray or None
        The autocorrelation of the detrended ``e`` when already computed (as
        :func:`detect_oscillation` uses it). [-]

    Returns
    -------
    Autocorrelation
    """
    r = autocorrelation(detrend(np.asarray(e, dtype=float))) if acf is None else np.asarray(acf, dtype=float)
    zc = zero_crossings(r)[:MAX_CROSSINGS] * ts
    if math.isfinite(period_s):
        keep = int(min(r.size, max(8, round(periods * period_s / ts))))
        r = r[:keep]
        zc = zc[zc <= (keep - 1) * ts]
    return Autocorrelation(np.arange(r.size) * ts, r, zc)
