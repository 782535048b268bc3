"""Unit tests of the model check on long records (audit.plantdata.windows and modelcheck.check_record):
the window of excitation is found around the move, the model identified on it is the true one, and a
record with no excitation from outside the loop is not identifiable, with its reason. Records are
built independently: the process by scipy.signal (tests/reference/plant_sim.py), the routine
movement by seeded noise, written as Parquet and read by the record reader."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import signal

from audit.plantdata.modelcheck import check_record, identify_policy_of
from audit.plantdata.records import read_record
from audit.plantdata.sources import RowRecord
from audit.plantdata.windows import WindowSettings, find_windows, time_scale
from audit.policy import Policy
from audit.rows import LoopRow
from tests.reference.plant_sim import closed_loop, open_loop

TRUE = {"gain": 1.5, "tau1": 40.0, "dead_time": 8.35}


def _row(**kw):
    base = dict(index=0, sheet="loops", excel_row=2, tag="FIC101", model="fopdt", gain=1.5, tau1=40.0,
                dead_time=8.35, kc=0.8, ti=40.0, sample=1.0)
    base.update(kw)
    return LoopRow(**base)


def _write(path, op, pv, sp, mode=None):
    cols = {"timestamp": pd.date_range("2026-03-02", periods=len(op), freq="1s", tz="UTC"), "sp": sp, "pv": pv,
            "op": op}
    if mode is not None:
        cols["mode"] = mode
    pd.DataFrame(cols).to_parquet(path)
    return RowRecord(read_record(path, timezone="UTC"), path.name)


def _bump_record(tmp_path, n=40_000, at=24_000, mode=True, seed=4):
    """Routine operation (op wandering 0.3 %, pv noise 0.1 %) with a manual bump test at ``at``."""
    rng = np.random.default_rng(seed)
    a = np.exp(-1.0 / 200.0)
    op = 45.0 + signal.lfilter([1 - a], [1, -a], rng.standard_normal(n)) * 3.0
    op[at:at + 600] += 5.0
    op[at + 600:at + 1200] -= 4.0
    pv = 50.0 + open_loop("fopdt", TRUE, op, 1.0) + 0.1 * rng.standard_normal(n)
    words = np.where((np.arange(n) >= at - 60) & (np.arange(n) < at + 1500), "MAN", "AUTO") if mode else None
    return _write(tmp_path / "bump.parquet", op, pv, np.full(n, 50.0), words)


def test_bump_in_a_long_record_is_found_and_identified(tmp_path):
    """The window holds the bump (starting one time scale before it) and the identified fopdt is the
    true one within its intervals (truth: the scipy.signal simulation of K 1.5, tau 40 s, theta 8.35 s)."""
    found = _bump_record(tmp_path)
    mc = check_record(_row(), found, Policy())
    ident = mc.identification
    T = time_scale(_row())                               # 48.35 s
    assert ident.t[0] == pytest.approx(24_000 - T, abs=2.0)
    assert len(ident.t) < 4_000 and ident.t[-1] >= 24_000 + 1200 + 4 * T
    b = ident.best
    assert b is not None and b.model == "fopdt"
    assert b.params["gain"] == pytest.approx(1.5, rel=0.05)
    assert b.params["tau1"] == pytest.approx(40.0, rel=0.1)
    assert b.params["dead_time"] == pytest.approx(8.35, abs=1.0)
    assert mc.verdict == "confirmed"
    assert mc.note.startswith("identified on the window 2026-03-02 06:39:")
    assert "manual output move" in mc.note and "open loop" in mc.note and "of 40,000 samples" in mc.note
    # the overlay plot's time range is the window's
    c = mc.compact()
    assert c.trace.t_first == pytest.approx(ident.t[0]) and c.trace.t_last == pytest.approx(ident.t[-1])


def test_stale_dead_time_is_disputed_from_the_window(tmp_path):
    """The inventory's dead time half the plant's: disputed, on the bump's window alone."""
    found = _bump_record(tmp_path)
    mc = check_record(_row(dead_time=4.0), found, Policy())
    assert mc.verdict == "disputed" and any(r.startswith("dead time") for r in mc.reasons)


def test_bump_without_a_mode_column_is_found_as_an_abrupt_output_step(tmp_path):
    found = _bump_record(tmp_path, mode=False)
    mc = check_record(_row(), found, Policy())
    assert mc.verdict == "confirmed" and "output step" in mc.note and "closed loop" in mc.note
    assert mc.identification.best.params["gain"] == pytest.approx(1.5, rel=0.05)


def test_routine_closed_loop_without_excitation_is_not_identifiable(tmp_path):
    """A PI loop holding its set point against measurement noise (independent closed-loop simulator):
    the output moves only in answer to noise, so no model, and the note says why (closed-loop
    identifiability: L. Ljung, System Identification, 2nd ed., 1999, sec. 13.4)."""
    n = 24_000
    noise = 0.3 * np.random.default_rng(7).standard_normal(n)
    op, pv = closed_loop("fopdt", {"gain": 1.5, "tau1": 40.0, "dead_time": 8.0}, np.zeros(n), 1.0, 0.8, 40.0,
                         op0=50.0, noise=noise, fine=2)
    found = _write(tmp_path / "routine.parquet", op, 50.0 + pv, np.full(n, 50.0), np.full(n, "AUTO"))
    assert np.ptp(op) > 1.0                               # the output did move: the whole-record test would pass
    mc = check_record(_row(), found, Policy())
    assert mc.verdict == "not identifiable" and mc.identification.best is None
    assert "no set-point change or manual move large enough in the record" in mc.note
    assert "not identified" in mc.note


def test_set_point_step_in_closed_loop_gives_a_closed_loop_window(tmp_path):
    """A set-point step of 4 % in the middle of routine closed-loop operation: the window is found
    there and the identified gain is the plant's within 15 % (closed loop, output-error)."""
    n = 24_000
    sp = np.zeros(n)
    sp[12_000:] = 4.0
    noise = 0.1 * np.random.default_rng(8).standard_normal(n)
    op, pv = closed_loop("fopdt", {"gain": 1.5, "tau1": 40.0, "dead_time": 8.0}, sp, 1.0, 0.8, 40.0, op0=50.0,
                         noise=noise, fine=2)
    found = _write(tmp_path / "sp.parquet", op, 50.0 + pv, 50.0 + sp, np.full(n, "AUTO"))
    mc = check_record(_row(dead_time=8.0), found, Policy())
    assert "set-point change" in mc.note and "closed loop" in mc.note
    assert mc.identification.t[0] == pytest.approx(12_000 - 48.0, abs=2.0)
    assert mc.identification.best.params["gain"] == pytest.approx(1.5, rel=0.15)
    assert mc.verdict == "confirmed"


def test_output_moves_in_automatic_without_a_set_point_change_are_not_used():
    """A load step answered by the controller moves the output, but the load is not logged: no window."""
    n = 30_000
    rng = np.random.default_rng(3)
    op = 50.0 + 0.05 * rng.standard_normal(n)
    op[15_000:] += np.minimum(np.arange(n - 15_000) / 30.0, 1.0) * 3.0   # the integral action's ramp
    pv = 50.0 + 0.1 * rng.standard_normal(n)
    got = find_windows(op, pv, np.full(n, 50.0), np.zeros(n, bool), 1.0, 48.0, WindowSettings())
    assert got.windows == () and got.load_moves == 1
    assert "1 output move in automatic without a set-point change" in got.reason()


def test_window_settings_come_from_the_policy_and_short_records_stay_whole(tmp_path):
    p = identify_policy_of(Policy(model_window_above=50_000, model_window_samples=3_000, model_window_after=4.0,
                                  model_window_noise_ratio=6.0, model_window_sp_move_pct=2.0))
    assert (p.window_above, p.window_samples, p.window_after, p.window_noise_ratio, p.min_sp_move_pct) == \
        (50_000, 3_000, 4.0, 6.0, 2.0)
    found = _bump_record(tmp_path)
    whole = check_record(_row(), found, Policy(model_window_above=50_000))
    assert len(whole.identification.t) == 40_000 and "identified on the window" not in whole.note
    cut = check_record(_row(), found, Policy(model_window_samples=300))
    # 1,491 samples over a budget of 300: averaged over 2 (T = 48 s keeps 20 of them), then cut
    assert len(cut.identification.t) == 300 and cut.identification.dt == 2.0
    assert "averaged over 2 samples (2 s), cut to 300 samples" in cut.note
