"""Unit conversions at the door: closed-form results (common practice; controller settings as in
K. J. Astrom and T. Hagglund, PID Controllers: Theory, Design, and Tuning, 2nd ed., ISA, 1995, sec. 3.2)."""

from __future__ import annotations

import math

import pytest

from audit import units
from audit.inventory import read_inventory
from tests.unit.malformed_corpus import one_row, workbook


@pytest.mark.parametrize("value, unit, seconds", [(1, "s", 1.0), (2.5, "min", 150.0), (0.5, "h", 1800.0),
                                                  (1 / 3, "min", 20.0)])
def test_time_to_seconds(value, unit, seconds):
    """Common practice: 1 min = 60 s, 1 h = 3600 s."""
    assert units.time_to_s(value, unit) == pytest.approx(seconds, rel=1e-15)
    assert units.s_to_time(seconds, unit) == pytest.approx(value, rel=1e-15)


@pytest.mark.parametrize("pb, kc", [(100, 1.0), (50, 2.0), (250, 0.4), (400, 0.25)])
def test_proportional_band(pb, kc):
    """Astrom & Hagglund 1995, sec. 3.2: kc = 100 / PB[%]."""
    assert units.kc_from_pb(pb) == pytest.approx(kc, rel=1e-15)
    assert units.pb_from_kc(kc) == pytest.approx(pb, rel=1e-15)


@pytest.mark.parametrize("rpm, ti", [(1, 60.0), (0.5, 120.0), (4, 15.0), (0, None)])
def test_reset_rate(rpm, ti):
    """Common practice: reset rate in repeats/min is 1/Ti with Ti in minutes; 0 means no integral action."""
    got = units.ti_from_reset_rpm(rpm)
    assert got == (pytest.approx(ti, rel=1e-15) if ti else None)
    assert units.reset_rpm_from_ti(ti) == pytest.approx(rpm, rel=1e-15)


def test_rates_per_minute():
    """Common practice: x per minute = x/60 per second."""
    assert units.per_min_to_per_s(6.0) == pytest.approx(0.1, rel=1e-15)
    assert units.per_s_to_per_min(0.1) == pytest.approx(6.0, rel=1e-15)


def test_gain_in_engineering_units():
    """Common practice: a gain in EU per % output over a span is gain_eu * 100 / span in % per %."""
    assert units.gain_from_eu(2.5, 0, 250) == pytest.approx(1.0, rel=1e-15)
    assert units.gain_from_eu(-0.3, 20, 50) == pytest.approx(-1.0, rel=1e-15)
    assert units.gain_to_eu(1.0, 0, 250) == pytest.approx(2.5, rel=1e-15)
    assert units.eu_to_pct_of_range(0.3, 20, 50) == pytest.approx(1.0, rel=1e-15)
    with pytest.raises(ValueError):
        units.gain_from_eu(1, 5, 5)


def test_decibels():
    """Common practice: 20 log10; 6.0206 dB is a factor 2."""
    assert units.db(2.0) == pytest.approx(6.0206, abs=1e-4)
    assert units.from_db(-20.0) == pytest.approx(0.1, rel=1e-15)


@pytest.mark.parametrize("quantity, value, convention, expected", [
    ("kc", 0.8, "pb_pct", 125.0), ("ti", 120.0, "reset_rpm", 0.5), ("ti", 120.0, "ti_min", 2.0),
    ("ti", 7200.0, "ti_h", 2.0), ("td", 12.0, "td_min", 0.2), ("ki", 0.01, "ki_per_min", 0.6),
    ("kd", 30.0, "kd_min", 0.5), ("ti", None, "ti_s", None), ("ti", None, "reset_rpm", 0.0), ("kc", 0.8, "kc", 0.8),
])
def test_setting_written_back_in_the_rows_terms(quantity, value, convention, expected):
    got = units.setting_in_convention(quantity, value, convention)
    assert got == (pytest.approx(expected, rel=1e-12) if expected is not None else None)


def test_reader_converts_exactly(tmp_path):
    """The reader gives the closed-form values for every unit variant of a row (common practice)."""
    header = ["tag", "model", "gain_per_min", "tau1_h", "dead_time_min", "form", "pb_pct", "reset_rpm", "td_h",
              "sample_s", "pv_filter_s", "action"]
    row = ["L-1", "ipdt", 0.6, 0.01, 0.25, "ideal", 40, 0.25, 0.001, 2, 1, "reverse"]
    r = read_inventory(workbook(tmp_path / "a.xlsx", header, [row])).rows[0]
    assert r.valid, r.errors
    assert r.gain == pytest.approx(0.01, rel=1e-15)       # 0.6 / 60 [1/s]
    assert r.tau1 == pytest.approx(36.0, rel=1e-15)       # 0.01 h
    assert r.dead_time == pytest.approx(15.0, rel=1e-15)  # 0.25 min
    assert r.kc == pytest.approx(2.5, rel=1e-15)          # 100 / 40
    assert r.ti == pytest.approx(240.0, rel=1e-15)        # 1 / 0.25 min
    assert r.td == pytest.approx(3.6, rel=1e-12)          # 0.001 h
    assert (r.sample, r.pv_filter) == (2.0, 1.0)
    r = read_inventory(one_row(tmp_path / "b.xlsx", gain=..., gain_eu=-0.3, pv_lo=20, pv_hi=50,
                               ki_per_min=...)).rows[0]
    assert r.gain == pytest.approx(-1.0, rel=1e-15)
    assert math.isclose(r.kc, 0.5) and r.ti == 10.0
