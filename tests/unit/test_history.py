"""Unit tests of the history's pure parts: strict JSON, fingerprints and the comparison.

All regression/behaviour checks (no published values apply); thresholds and unit
conversions are stated beside each check.
"""

from __future__ import annotations

import datetime as dt
import json
import math

import numpy as np
import pandas as pd
import pytest

from audit.history import (
    AuditSnapshot, canonical_model, canonical_tuning, compare, describe_model, describe_tuning,
    fingerprint, snapshot_of, strict_json_value,
)
from audit.policy import Policy
from audit.rows import LoopRow
from tests.unit.test_history_support import Loop, make_audit


def row(**kw) -> LoopRow:
    base = dict(index=0, sheet="loops", excel_row=2, tag="FIC-1", model="fopdt", gain=1.0, tau1=60.0,
                dead_time=10.0, kc=2.0, ti=120.0, td=0.0)
    base.update(kw)
    return LoopRow(**base)


def tfp(r: LoopRow) -> str:
    return fingerprint(canonical_tuning(r))


def mfp(r: LoopRow) -> str:
    return fingerprint(canonical_model(r))


# -- strict JSON ---------------------------------------------------------------------------------

def test_strict_json_writes_inf_as_text_and_nan_as_null():
    v = strict_json_value({"a": math.inf, "b": -np.inf, "c": np.nan, "d": np.float64(1.5), "e": np.int64(3),
                           "f": pd.NA, "g": np.bool_(True), "h": dt.date(2026, 1, 5), "i": (1.0, math.nan)})
    assert v == {"a": "inf", "b": "-inf", "c": None, "d": 1.5, "e": 3, "f": None, "g": True,
                 "h": "2026-01-05", "i": [1.0, None]}
    json.dumps(v, allow_nan=False)  # strict JSON: raises on inf/nan


# -- fingerprints: converted values, not text -----------------------------------------------------

def test_proportional_band_and_gain_are_the_same_tuning():
    # PB 50 % converts to Kc = 100/50 = 2 at the door (common practice); raw text differs, tuning does not.
    a = row(kc=2.0, raw={"pb_pct": "50"}, conventions={"kc": "pb_pct"})
    b = row(kc=2.0, raw={"kc": 2}, conventions={"kc": "kc"})
    assert tfp(a) == tfp(b)


def test_reset_rate_and_integral_time_are_the_same_tuning():
    # 0.5 repeats/min -> Ti = 60/0.5 = 120 s (common practice); conversion rounding does not count.
    assert tfp(row(ti=60.0 / 0.5)) == tfp(row(ti=120.0 * (1 + 1e-13)))


def test_no_integral_blank_or_zero_are_the_same():
    assert tfp(row(ti=None)) == tfp(row(ti=0.0))
    assert tfp(row(ti=None)) != tfp(row(ti=120.0))


def test_derivative_filter_counts_only_with_derivative():
    assert tfp(row(td=0.0, d_filter=0.1)) == tfp(row(td=None, d_filter=0.125))
    assert tfp(row(td=10.0, d_filter=0.1)) != tfp(row(td=10.0, d_filter=0.125))


@pytest.mark.parametrize("change", [dict(kc=2.2), dict(ti=100.0), dict(td=5.0), dict(action="direct"),
                                   dict(sample=1.0), dict(pv_filter=2.0), dict(form="series")])
def test_each_tuning_setting_counts(change):
    assert tfp(row()) != tfp(row(**change))
    assert mfp(row()) == mfp(row(**change))


def test_parallel_form_uses_its_own_settings():
    a = row(form="parallel", kc=None, ti=None, kp=2.0, ki=2.0 / 120.0, kd=0.0)
    assert tfp(a) == tfp(row(form="parallel", kc=7.0, ti=5.0, kp=2.0, ki=2.0 / 120.0, kd=None))
    assert tfp(a) != tfp(row(form="parallel", kp=2.0, ki=0.02, kd=0.0))


def test_model_fingerprint_canonical_forms():
    assert mfp(row(model="sopdt", tau1=60.0, tau2=10.0)) == mfp(row(model="sopdt", tau1=10.0, tau2=60.0))
    assert mfp(row(model="sopdt", tau1=60.0, tau2=None, lead=None)) == mfp(row(model="sopdt", tau1=60.0, tau2=0.0, lead=0.0))
    # 2/(10 s + 2) and 1/(5 s + 1) are one transfer function
    assert mfp(row(model="tf", num=(2.0,), den=(10.0, 2.0))) == mfp(row(model="tf", num=(1.0,), den=(5.0, 1.0)))
    assert mfp(row()) != mfp(row(dead_time=12.0))
    assert mfp(row()) != mfp(row(gain=1.1))
    assert mfp(row()) != mfp(row(model="ipdt"))
    assert tfp(row()) == tfp(row(dead_time=12.0))


def test_settings_in_words_carry_units():
    assert describe_tuning(canonical_tuning(row(td=15.0, sample=1.0))) == (
        "ideal PID: Kc 2, Ti 120 s, Td 15 s, derivative filter 0.1; reverse acting, sample 1 s")
    assert describe_tuning(canonical_tuning(row(ti=None))) == "ideal PID: Kc 2, no integral, Td 0 s; reverse acting"
    assert describe_model(canonical_model(row())) == "FOPDT: gain 1, tau1 60 s, dead time 10 s"
    assert describe_model(canonical_model(row(model="ipdt", gain=0.01, tau1=None))) == (
        "IPDT: gain 0.01 1/s, tau1 0 s, dead time 10 s")


# -- the comparison -------------------------------------------------------------------------------

def snap(loops, with_rank=True, **kw) -> AuditSnapshot:
    return snapshot_of(make_audit(loops, with_rank=with_rank, **kw))


def test_first_audit():
    ch = compare(None, snap([Loop("A")]), Policy())
    assert ch.first_audit and ch.previous_audit_id is None
    assert not (ch.new_loops or ch.moved or ch.tuning_changed)


def test_status_changes():
    before = snap([Loop("A", "passes"), Loop("B", "fails", ms=2.5), Loop("C", "unstable", ms=math.inf),
                   Loop("D", "marginal"), Loop("E", "fails", ms=2.2), Loop("F", "invalid")])
    after = snap([Loop("A", "fails", ms=1.5), Loop("B", "unstable", ms=2.5), Loop("C", "passes", ms=1.5),
                  Loop("D", "unstable", ms=1.5), Loop("E", "fails", ms=2.2), Loop("F", "passes")])
    ch = compare(before, after, Policy())
    assert [c.tag for c in ch.newly_failing] == ["A", "B", "D"]
    assert [c.tag for c in ch.newly_unstable] == ["B", "D"]
    assert [(c.tag, c.old_status, c.new_status) for c in ch.fixed] == [("C", "unstable", "passes")]
    assert not ch.tuning_changed and not ch.model_changed and not ch.new_loops and not ch.removed_loops


def test_moves_beyond_policy_thresholds_only():
    # Policy defaults: change_ms 0.1, change_margin_db 1 dB, change_pm_deg 5 deg, change_band_db 3 dB.
    before = snap([Loop("A", ms=1.50, gm_db=9.0, pm_deg=50.0, band_s_db=-20.0),
                   Loop("B", ms=1.50, gm_db=9.0, pm_deg=50.0, band_s_db=-20.0),
                   Loop("C", ms=1.50, gm_db=math.inf, pm_deg=50.0)])
    after = snap([Loop("A", ms=1.55, gm_db=8.5, pm_deg=46.0, band_s_db=-18.0),   # all within
                  Loop("B", ms=1.75, gm_db=7.0, pm_deg=40.0, band_s_db=-15.0),   # all beyond
                  Loop("C", ms=1.50, gm_db=12.0, pm_deg=50.0)])                  # inf -> finite
    ch = compare(before, after, Policy())
    moved = {(m.tag, m.figure): m for m in ch.moved}
    assert set(moved) == {("B", "ms"), ("B", "gm_db"), ("B", "pm_deg"), ("B", "band_s_db"), ("C", "gm_db")}
    assert moved[("B", "ms")].old == 1.5 and moved[("B", "ms")].new == 1.75 and moved[("B", "ms")].threshold == 0.1
    assert moved[("B", "band_s_db")].change == pytest.approx(5.0)
    assert moved[("C", "gm_db")].old == math.inf
    # a looser policy (as a mapping, like audit.meta['policy']) reports fewer moves
    loose = {**Policy().as_dict(), "change_ms": 0.5}
    assert ("B", "ms") not in {(m.tag, m.figure) for m in compare(before, after, loose).moved}


def test_settings_changes_new_and_removed_loops():
    before = snap([Loop("A"), Loop("B"), Loop("C"), Loop(None)])
    after = snap([Loop("A", row=dict(kc=3.0)), Loop("B", row=dict(tau1=95.0)), Loop("D"), Loop(None)])
    ch = compare(before, after, Policy())
    assert [c.tag for c in ch.tuning_changed] == ["A"]
    assert ch.tuning_changed[0].old == "ideal PID: Kc 1.5, Ti 90 s, Td 0 s; reverse acting"
    assert ch.tuning_changed[0].new == "ideal PID: Kc 3, Ti 90 s, Td 0 s; reverse acting"
    assert [c.tag for c in ch.model_changed] == ["B"]
    assert "tau1 95 s" in ch.model_changed[0].new and "tau1 80 s" in ch.model_changed[0].old
    assert [c.tag for c in ch.new_loops] == ["D"]
    assert [(c.tag, c.old_status) for c in ch.removed_loops] == [("C", "passes")]
    assert after.untagged == 1


def test_work_list_acted_on():
    before = snap([Loop("A", "fails", rank=1), Loop("B", "fails", rank=2), Loop("C", "fails", rank=3),
                   Loop("D", "marginal", rank=4), Loop("E", "passes")])
    after = snap([Loop("A", "fails", row=dict(kc=1.0)),      # retuned, still failing: acted on
                  Loop("B", "fails", row=dict(gain=1.6)),    # model updated: acted on
                  Loop("C", "fails"),                        # untouched: not acted on
                  Loop("D", "passes"),                       # now passes: acted on
                  Loop("E", "passes", row=dict(kc=9.0))])    # not on the work list
    ch = compare(before, after, Policy())
    assert ch.previous_work_list_size == 4
    assert ch.work_list_acted_on == 3


def test_tolerant_when_ranking_absent():
    before = snap([Loop("A", "fails")], with_rank=False)
    after = snap([Loop("A", "passes")], with_rank=False)
    ch = compare(before, after, Policy())
    assert before.work_list_size is None
    assert ch.work_list_acted_on is None and ch.previous_work_list_size is None
    assert [c.tag for c in ch.fixed] == ["A"]


def test_duplicate_tags_first_row_is_matched():
    s = snap([Loop("A", ms=1.2), Loop("A", ms=3.0)])
    assert s.duplicate_tags == ("A",) and s.loops["A"].ms == 1.2
