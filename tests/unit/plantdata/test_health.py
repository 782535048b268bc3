"""Unit tests of audit.plantdata.health: the stretch analysed and the combined result."""

from __future__ import annotations

import numpy as np

from audit.plantdata.health import MIN_STRETCH, analysis_stretch, loop_health


def test_stretch_longest_run_of_usable_even_samples():
    t = np.concatenate((np.arange(100.0), 200 + np.arange(300.0)))
    ok = np.ones(t.size, dtype=bool)
    ok[250] = False
    assert analysis_stretch(t, ok) == (100, 250)   # runs: 0-99, 100-249, 251-399
    assert analysis_stretch(t, np.zeros(t.size, dtype=bool)) == (0, 0)


def test_health_of_an_oscillating_loop_in_auto():
    t = np.arange(4000.0)
    e = 2.0 * np.sin(2 * np.pi * t / 60.0)
    h = loop_health(t, np.full(t.size, 50.0), 50.0 - e, 50.0 + 3 * np.cos(2 * np.pi * t / 60.0),
                    np.array(["AUTO"] * t.size, dtype=object), dead_time_s=3.0)
    assert h.oscillation.oscillating and abs(h.oscillation.period_s - 60.0) < 1.0
    assert h.valve is not None and not h.valve.sticking
    assert h.variance is not None and 0.0 <= h.variance.harris_index <= 1.0
    assert h.stretch == (0, 4000) and h.ts == 1.0


def test_short_or_manual_record_gives_use_only():
    t = np.arange(1000.0)
    mode = np.array(["MAN"] * (1000 - MIN_STRETCH + 1) + ["AUTO"] * (MIN_STRETCH - 1), dtype=object)
    h = loop_health(t, np.full(1000, 50.0), np.full(1000, 50.0), np.full(1000, 50.0), mode, dead_time_s=2.0)
    assert h.oscillation is None and h.variance is None
    assert "fewer than" in h.notes[0]
    assert h.use.manual_pct > 60


def test_missing_signal_and_dead_time_are_said():
    t = np.arange(1000.0)
    h = loop_health(t, None, np.full(1000, 50.0), None)
    assert h.oscillation is None and "all needed" in h.notes[0]
    rng = np.random.default_rng(0)
    h = loop_health(t, np.full(1000, 50.0), 50 + rng.standard_normal(1000), np.full(1000, 50.0))
    assert h.variance is None and any("dead time" in n for n in h.notes)


def test_plot_data_bounded_for_long_records():
    """A day at 1 s with a slow oscillation: the report's arrays stay small whatever the record's length."""
    from audit.plantdata.health import PV_OP_POINTS, OperationData, health_plots
    t = np.arange(86400.0)
    e = 2.0 * np.sin(2 * np.pi * t / 3000.0)
    d = OperationData(t, np.full(t.size, 50.0), 50.0 - e, 50.0 + 3 * np.cos(2 * np.pi * t / 3000.0), None, "x.csv")
    h = loop_health(d.t, d.sp, d.pv, d.op, None, dead_time_s=2.0)
    assert h.oscillation.oscillating
    p = health_plots(d, h)
    assert p.t.size <= 5000 and p.pv_op.op.size <= PV_OP_POINTS and p.acf.size <= 2000
    assert abs(p.period_s - 3000.0) < 30.0
    # and they hold only themselves: no view keeps a record-long array alive (common practice); the
    # bound is four trend-sized arrays (the 5,000 points above), under a quarter of one record-long array
    for a in (p.t, p.sp, p.pv, p.op, p.acf_lags_s, p.acf, p.acf_crossings_s, p.pv_op.op, p.pv_op.pv):
        held = a.base if a.base is not None else a
        assert held.nbytes <= 4 * 5000 * 8
