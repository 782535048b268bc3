"""Unit tests of audit.plantdata.oscillation against closed forms (common practice)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from audit.plantdata.oscillation import (autocorrelation, autocorrelation_for_plot, detect_oscillation,
                                         half_cycle_iae, regularity, zero_crossings)


def test_autocorrelation_of_a_sine_is_a_cosine():
    """For a long sine the biased ACF is (1 - k/n) cos(w k) (closed form)."""
    n, per = 20000, 50.0
    k = np.arange(200)
    x = np.sin(2 * np.pi * np.arange(n) / per)
    r = autocorrelation(x, 199)
    np.testing.assert_allclose(r, (1 - k / n) * np.cos(2 * np.pi * k / per), atol=2e-3)


def test_autocorrelation_matches_numpy_correlate():
    x = np.random.default_rng(1).standard_normal(500)
    z = x - x.mean()
    full = np.correlate(z, z, "full")[499:499 + 40]
    np.testing.assert_allclose(autocorrelation(x, 39), full / full[0], rtol=1e-10, atol=1e-12)


def test_zero_crossings_interpolated():
    np.testing.assert_allclose(zero_crossings(np.array([1.0, -1.0, -1.0, 3.0])), [0.5, 2.25])


def test_regularity_of_equal_intervals_is_infinite():
    per, r = regularity(np.arange(1, 12) * 10.0)
    assert per == pytest.approx(20.0) and math.isinf(r)


def test_regularity_formula():
    """r = mean(Tp) / (3 std(Tp)), Tp the alternate-crossing intervals (Thornhill et al. 2003)."""
    z = np.array([0.0, 10.0, 21.0, 30.0, 42.0, 50.0])
    tp = z[2:] - z[:-2]
    per, r = regularity(z)
    assert per == pytest.approx(tp.mean())
    assert r == pytest.approx(tp.mean() / (3 * tp.std(ddof=1)))


def test_too_few_crossings():
    assert all(math.isnan(v) for v in regularity(np.array([1.0, 2.0, 3.0])))


def test_half_cycle_iae_of_a_sine():
    """Each half cycle of a sin(2 pi t / T) has IAE a T / pi (Hagglund 1995, closed form)."""
    ts, per, a = 0.01, 10.0, 3.0
    t = np.arange(0, 100, ts) + ts / 2
    iae = half_cycle_iae(a * np.sin(2 * np.pi * t / per), ts)
    assert iae.size >= 15
    np.testing.assert_allclose(iae, a * per / math.pi, rtol=2e-3)


def test_sine_in_noise_detected_with_period_and_amplitude():
    rng = np.random.default_rng(3)
    t = np.arange(5000.0)
    e = 1.5 * np.sin(2 * np.pi * t / 80.0) + 0.3 * rng.standard_normal(t.size)
    o = detect_oscillation(e, 1.0)
    assert o.oscillating
    assert o.period_s == pytest.approx(80.0, rel=0.01)
    assert o.amplitude_pct == pytest.approx(1.5, rel=0.1)
    assert o.regularity > 1.0 and o.acf_peak > 0.5


def test_small_oscillation_below_the_amplitude_that_matters():
    t = np.arange(5000.0)
    o = detect_oscillation(0.1 * np.sin(2 * np.pi * t / 80.0), 1.0, min_amplitude_pct=0.25)
    assert not o.oscillating and o.regularity > 1.0


def test_white_noise_not_oscillating():
    e = np.random.default_rng(4).standard_normal(5000)
    assert not detect_oscillation(e, 1.0).oscillating


def test_constant_error_and_short_record():
    assert not detect_oscillation(np.zeros(1000), 1.0).oscillating
    assert not detect_oscillation(np.ones(5), 1.0).oscillating


def test_plot_data_keeps_a_few_periods():
    t = np.arange(4000.0)
    acf = autocorrelation_for_plot(np.sin(2 * np.pi * t / 50.0), 1.0, periods=4, period_s=50.0)
    assert acf.lags_s[-1] == pytest.approx(199.0)
    assert acf.crossings_s.size >= 7
    assert acf.crossings_s[0] == pytest.approx(12.5, abs=0.1)
