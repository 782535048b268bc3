"""Unit tests of audit.plantdata.use: shares of time, mode words, set-point moves, error figures.
Expected values are worked by hand from the constructed records (closed forms)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from audit.plantdata.use import ModeWords, count_changes, loop_use, sample_weights


def test_mode_words_classify_case_and_space_insensitive():
    w = ModeWords.from_text("AUTO, A", "MAN", "CAS, RSP")
    got = w.classify(np.array([" auto", "MAN", "cas", "Rsp", "LOCAL", None, float("nan")], dtype=object))
    assert list(got) == ["automatic", "manual", "cascade", "cascade", "other", "missing", "missing"]


def test_shares_by_time_not_by_sample():
    """Samples 1 s apart for 60 s in AUTO, then 10 s apart for 40 s in MAN: 60 % / 40 % by time
    (by sample count it would be 60/65); the last sample ends the record and stands for no time."""
    t = np.concatenate((np.arange(60.0), 60.0 + 10.0 * np.arange(5)))
    mode = np.array(["AUTO"] * 60 + ["MAN"] * 5, dtype=object)
    u = loop_use(t, None, None, None, mode, max_gap_s=20.0)
    assert u.duration_s == pytest.approx(100.0)
    assert u.auto_pct == pytest.approx(60.0)
    assert u.manual_pct == pytest.approx(40.0)


def test_gap_counts_for_nothing():
    t = np.array([0.0, 1.0, 2.0, 3.0, 1000.0, 1001.0])
    w = sample_weights(t)
    assert list(w) == [1.0, 1.0, 1.0, 0.0, 1.0, 0.0]


def test_unknown_mode_word_is_named_and_left_out():
    t = np.arange(10.0)
    mode = np.array(["AUTO"] * 5 + ["LOCAL"] * 5, dtype=object)
    u = loop_use(t, None, None, None, mode)
    assert u.other_modes == ("LOCAL",)
    assert u.auto_pct == pytest.approx(100.0)


def test_no_mode_signal_gives_no_auto_share():
    u = loop_use(np.arange(10.0), np.full(10, 50.0), np.full(10, 50.0), np.full(10, 50.0))
    assert math.isnan(u.auto_pct) and math.isnan(u.manual_pct)


def test_op_limits_and_pv_range():
    t = np.arange(101.0)                 # 100 s: the last sample ends the record
    op = np.full(101, 50.0)
    op[:20] = 100.0
    op[20:30] = 0.2                      # within the 0.5 % band of the low limit
    pv = np.full(101, 50.0)
    pv[:5] = 101.0
    pv[5:10] = -1.0
    u = loop_use(t, np.full(101, 50.0), pv, op)
    assert u.op_high_pct == pytest.approx(20.0)
    assert u.op_low_pct == pytest.approx(10.0)
    assert u.op_limited_pct == pytest.approx(30.0)
    assert u.pv_out_of_range_pct == pytest.approx(10.0)


def test_missing_values_leave_the_denominator():
    op = np.array([100.0, np.nan, np.nan, 50.0, 50.0])
    u = loop_use(np.arange(5.0), None, None, op)
    assert u.op_limited_pct == pytest.approx(50.0)


def test_set_point_moves_ramp_counts_once():
    sp = np.concatenate((np.full(10, 50.0), np.linspace(50, 60, 11), np.full(10, 60.0), np.full(5, 60.05)))
    assert count_changes(sp, 0.1) == 1       # the ramp; the 0.05 % move is below the threshold
    assert count_changes(sp, 0.01) == 2


def test_error_figures_of_a_sine():
    """e = 2 sin(2 pi t / 100) over whole periods: std = 2/sqrt 2, mean |e| = 4/pi, so the IAE
    per hour is 3600 x 4/pi (closed form)."""
    t = np.arange(0.0, 1000.0, 0.1)
    e = 2.0 * np.sin(2 * np.pi * t / 100.0)
    u = loop_use(t, 50.0 + e, np.full(t.size, 50.0), np.full(t.size, 40.0))
    assert u.error_std_pct == pytest.approx(math.sqrt(2.0), rel=1e-3)
    assert u.iae_per_h == pytest.approx(3600.0 * 4.0 / math.pi, rel=1e-3)


def test_error_only_while_closed():
    t = np.arange(100.0)
    sp = np.full(100, 50.0)
    pv = np.full(100, 50.0)
    pv[50:] = 80.0                         # large error while in manual: not counted
    mode = np.array(["AUTO"] * 50 + ["MAN"] * 50, dtype=object)
    u = loop_use(t, sp, pv, np.full(100, 40.0), mode)
    assert u.error_std_pct == 0.0 and u.iae_per_h == 0.0
    assert u.closed_s == pytest.approx(50.0)
