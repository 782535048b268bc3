"""Validation of the loop models and PID forms (closed forms from the literature)."""

from __future__ import annotations

import numpy as np
import pytest

from audit.loop import (Controller, LoopModel, ideal_to_parallel, ideal_to_series, make_process,
                        parallel_to_ideal, series_to_ideal)

W = np.logspace(-3, 3, 61)


@pytest.mark.parametrize("kc,ti,td", [(2.0, 10.0, 1.0), (0.5, 100.0, 25.0), (1.3, 4.0, 0.2)])
def test_series_ideal_round_trip(kc, ti, td):
    """Astrom & Hagglund, PID Controllers: Theory, Design, and Tuning, 2nd ed., 1995, sec. 3.4,
    eqs. (3.10)-(3.11): series (Kc, Ti, Td) <-> ideal (Kc', Ti', Td'), Kc' = Kc (1 + Td/Ti),
    Ti' = Ti + Td, Td' = Ti Td/(Ti + Td); the inverse exists when Ti' >= 4 Td'. Round trip to 1e-12,
    and the unfiltered controllers have the same frequency response."""
    ki, tii, tdi = series_to_ideal(kc, ti, td)
    back = ideal_to_series(ki, tii, tdi)
    assert back == pytest.approx((kc, ti, td), rel=1e-12)
    tiny = 1e-9  # derivative filter negligible: compare the ideal PID laws themselves
    cs = Controller("series", kc=kc, ti=ti, td=td, alpha=tiny).rational(1j * W)
    ci = Controller("ideal", kc=ki, ti=tii, td=tdi, alpha=tiny).rational(1j * W)
    np.testing.assert_allclose(cs, ci, rtol=1e-5)


def test_ideal_without_series_equivalent():
    """Astrom & Hagglund (1995), sec. 3.4: an ideal PID with Ti < 4 Td has complex zeros and no
    series form."""
    assert ideal_to_series(1.0, 3.0, 1.0) is None
    assert ideal_to_series(1.0, 4.0, 1.0) == pytest.approx((0.5, 2.0, 2.0))


def test_parallel_ideal_round_trip():
    """Astrom & Hagglund (1995), sec. 3.4: kp = Kc, ki = Kc/Ti, kd = Kc Td; the parallel form with
    filter alpha kd/kp equals the ideal form with filter alpha Td exactly."""
    kc, ti, td = 1.7, 12.0, 2.5
    kp, ki, kd = ideal_to_parallel(kc, ti, td)
    assert parallel_to_ideal(kp, ki, kd) == pytest.approx((kc, ti, td), rel=1e-12)
    a = Controller("ideal", kc=kc, ti=ti, td=td, alpha=0.1).rational(1j * W)
    b = Controller("parallel", kp=kp, ki=ki, kd=kd, alpha=0.1).rational(1j * W)
    np.testing.assert_allclose(a, b, rtol=1e-12)


def test_loop_transfer_matches_definition():
    """Closed form of L(jw) = sign C P F e^{-jw(theta + Ts/2)} with the exact delay (Astrom &
    Wittenmark, Computer-Controlled Systems, 1997: a zero-order hold adds Ts/2 of dead time)."""
    K, tau, theta, ts, tf = 2.0, 10.0, 1.5, 0.4, 0.3
    m = LoopModel("x", make_process("fopdt", K, tau, dead_time=theta), Controller("ideal", kc=0.8, ti=9.0),
                  sign=1.0, pv_filter=tf, sample=ts)
    s = 1j * W
    ref = 0.8 * (1 + 1 / (9.0 * s)) * K / (tau * s + 1) / (tf * s + 1) * np.exp(-s * (theta + ts / 2))
    np.testing.assert_allclose(m.L(W), ref, rtol=1e-12)
    np.testing.assert_allclose(m.S(W) + m.T(W), 1.0, rtol=1e-12)
