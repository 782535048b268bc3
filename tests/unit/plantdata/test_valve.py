"""Unit tests of audit.plantdata.valve on constructed waveforms (closed forms, common practice)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from audit.plantdata.valve import (assess_valve, cross_correlation_oddness, half_cycles, pv_op_points,
                                   stiction_index)


def _triangle(t, per):
    ph = (t / per) % 1.0
    return 4 * np.abs(ph - 0.5) - 1.0


def test_stiction_index_triangle_and_sine():
    """A triangular op gives SI near 1, a sinusoidal op near 0 (He et al. 2007, the idea of the index;
    the low-pass at five times the oscillation frequency rounds the apexes a little: 0.83)."""
    t = np.arange(3000.0)
    tri = half_cycles(3 * _triangle(t, 60.0), 1.0, 60.0)
    sin = half_cycles(3 * np.sin(2 * np.pi * t / 60.0), 1.0, 60.0)
    assert tri.shape[0] >= 90 and sin.shape[0] >= 90
    assert stiction_index(tri) > 0.8
    assert stiction_index(sin) < 0.1


def test_oddness_even_and_odd():
    """cos against cos: even cross-correlation, oddness 0; sin against cos: odd, oddness 1."""
    t = np.arange(4000.0)
    c = np.cos(2 * np.pi * t / 40.0)
    s = np.sin(2 * np.pi * t / 40.0)
    assert cross_correlation_oddness(c, -c, 1.0) == pytest.approx(0.0, abs=0.02)
    assert cross_correlation_oddness(s, c, 1.0) == pytest.approx(1.0, abs=0.02)


def test_oddness_dead_time_shift():
    """pv = op delayed by 5 s: read around lag 5, the cross-correlation is even again."""
    t = np.arange(4000.0)
    op = np.cos(2 * np.pi * t / 40.0)
    pv = np.cos(2 * np.pi * (t - 5.0) / 40.0)
    assert cross_correlation_oddness(op, pv, 1.0, dead_time_s=5.0) == pytest.approx(0.0, abs=0.02)


def test_assess_valve_on_shapes():
    t = np.arange(3000.0)
    pv = np.sign(np.sin(2 * np.pi * t / 60.0))
    v = assess_valve(3 * _triangle(t, 60.0), pv, 1.0, 60.0)
    assert v.sticking and v.confidence > 0.7 and v.half_cycles >= 90
    v = assess_valve(np.sin(2 * np.pi * t / 60.0), np.cos(2 * np.pi * t / 60.0), 1.0, 60.0)
    assert not v.sticking and v.confidence == 0.0


def test_integrating_fits_pv_and_skips_the_cross_correlation():
    t = np.arange(3000.0)
    v = assess_valve(np.sign(np.sin(2 * np.pi * t / 60.0)), _triangle(t, 60.0), 1.0, 60.0, integrating=True)
    assert v.sticking and math.isnan(v.oddness) and "pv" in v.method


def test_not_assessed_without_period():
    t = np.arange(3000.0)
    v = assess_valve(np.sin(t), np.cos(t), 1.0, math.nan)
    assert not v.sticking and math.isnan(v.stiction_index) and math.isnan(v.confidence)


def test_pv_op_points_keep_latest_and_drop_nan():
    p = pv_op_points(np.array([1.0, 2.0, np.nan, 4.0]), np.array([5.0, 6.0, 7.0, 8.0]), max_points=3)
    assert list(p.op) == [2.0, 4.0] and list(p.pv) == [6.0, 8.0]


def _half_cycles_whole(x, ts, period_s):
    """half_cycles as first written: the whole record up-sampled at once (scipy's resample_poly),
    then read by np.interp. The pieced version must give these values bit for bit."""
    import math

    from scipy import signal as sig

    from audit.plantdata.oscillation import detrend, zero_crossings
    x = detrend(x)
    f0 = 2.0 * ts / period_s
    band = sig.sosfiltfilt(sig.butter(2, [0.5 * f0, min(2 * f0, 0.95)], btype="bandpass", output="sos"), x)
    smooth = x if 5 * f0 >= 0.95 else sig.sosfiltfilt(sig.butter(2, 5 * f0, output="sos"), x)
    up = int(math.ceil(4 * 32 * ts / period_s))
    if up > 1:
        smooth = sig.resample_poly(smooth, up, 1)
    zc = zero_crossings(band) * max(up, 1)
    s = np.linspace(0.0, 1.0, 32)
    pos = zc[:-1, None] + s[None, :] * (zc[1:] - zc[:-1])[:, None]
    keep = ((zc[1:] - zc[:-1]) >= 3 * max(up, 1)) & (pos[:, -1] <= smooth.size - 1)
    return np.interp(pos[keep], np.arange(smooth.size), smooth)


@pytest.mark.parametrize("n, period_s, ts", [(200_000, 5.7, 1.0), (150_000, 7.3, 1.0), (120_000, 3.3, 0.5), (70_000, 40.0, 1.0),
                                             (9_000, 300.0, 2.0)])
def test_half_cycles_pieced_equal_whole_upsampling(n, period_s, ts):
    # common practice: a memory-bounded rewrite must not change a figure; the reference is the
    # whole-record polyphase up-sampling (scipy.signal.resample_poly) read by linear interpolation
    from audit.plantdata.valve import half_cycles
    rng = np.random.default_rng(7)
    t = np.arange(n) * ts
    x = np.sign(np.sin(2 * np.pi * t / period_s)) * 2.0 + np.sin(2 * np.pi * t / period_s) + rng.normal(0, 0.3, n)
    got, want = half_cycles(x, ts, period_s), _half_cycles_whole(x, ts, period_s)
    assert got.shape == want.shape and got.shape[0] > 10
    assert np.array_equal(got, want)
