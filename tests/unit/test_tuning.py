"""Unit tests of audit.tuning: proposals, verdicts, forms and the row's own terms.

Checks marked 'closed form' are validation against an exact identity; the rest are regression
tests of the module's documented behaviour.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from audit.frequency import evaluate
from audit.loop import model_from_row
from audit.policy import Policy
from audit.rows import LoopRow
from audit.proposals import propose, propose_many
from audit.tuning import Settings, from_row_terms, round_sig, row_terms, rounded, simc_tau_c_min, to_form
from audit.loop import make_process

POLICY = Policy()


def _row(i=0, **kw) -> LoopRow:
    base = dict(index=i, sheet="loops", excel_row=i + 2, tag=f"T-{i}")
    base.update(kw)
    return LoopRow(**base)


def _figures(rows):
    """A results table as the frequency stage makes it (figures, requirement, limits, status)."""
    models = [model_from_row(r) for r in rows]
    df = evaluate(models, [r.band_rad_s for r in rows])
    df["band_rad_s"] = [r.band_rad_s for r in rows]
    df["attenuation_db"] = [r.attenuation_db for r in rows]
    df["status"] = "fails"
    return models, df


CASES = [
    _row(0, model="fopdt", gain=2.0, tau1=20.0, dead_time=4.0, kc=2.0, ti=5.0, band_rad_s=0.01, attenuation_db=20,
         conventions={"kc": "pb_pct", "ti": "reset_rpm", "td": "td_min"}),
    _row(1, model="ipdt", gain=0.01, dead_time=10.0, kc=20.0, ti=100.0,
         conventions={"kc": "kc", "ti": "ti_min", "td": "td_min"}),
    _row(2, model="sopdt", gain=1.5, tau1=100.0, tau2=20.0, dead_time=10.0, kc=3.0, ti=30.0, form="series",
         sample=1.0, ms_max=1.6),
    _row(3, model="fopdt", gain=-1.0, tau1=10.0, dead_time=2.0, kc=1.0, ti=10.0),
    _row(4, model="tf", num=(-1.0, 1.0), den=(10.0, 7.0, 1.0), dead_time=1.0, form="parallel", kp=1.0, ki=0.1,
         kd=0.0, conventions={"ki": "ki_per_min", "kd": "kd_s"}),
    _row(5, model="fopdt", gain=1.0, tau1=10.0, dead_time=0.0, pv_filter=0.5, sample=0.2, kc=8.0, ti=1.0,
         action="direct"),
]


@pytest.fixture(scope="module")
def proposals():
    models, df = _figures(CASES)
    return models, df, propose_many([(m, r, df.iloc[i]) for i, (m, r) in enumerate(zip(models, CASES))], POLICY)


def test_every_recommended_proposal_meets_ms_max_within_one_percent(proposals):
    """Every recommendation, re-evaluated by the exact engine, meets ms_max within 1 % (common practice:
    the limit of the row, or of the policy)."""
    models, df, props = proposals
    for row, p in zip(CASES, props):
        assert p.settings is not None, row.tag
        ms_max = row.ms_max or POLICY.ms_max
        assert p.after.stable
        assert p.after.ms <= ms_max * 1.01, (row.tag, p.method, p.after.ms)


def test_reported_figures_are_those_of_the_rounded_settings(proposals):
    """The figures shown are the exact engine's for the settings as typed (three significant figures)."""
    models, df, props = proposals
    for m, row, p in zip(models, CASES, props):
        for v in p.terms.values():
            if v not in (None, 0):
                assert float(f"{v:.3g}") == pytest.approx(v, rel=1e-12)
        again = from_row_terms(p.terms, p.settings.form, alpha=row.d_filter)
        loop = replace(m, sign=-m.sign if p.corrected_action else m.sign, controller=again.controller())
        fig = evaluate([loop], [row.band_rad_s]).iloc[0]
        assert fig["ms"] == pytest.approx(p.after.ms, rel=1e-9)


def test_row_terms_are_kept(proposals):
    """Proposals speak the row's language: PB and reset rate, Ti in minutes, Ki per minute."""
    _, _, props = proposals
    assert set(props[0].terms) == {"pb_pct", "reset_rpm", "td_min"}
    assert "PB" in props[0].text and "repeats/min" in props[0].text
    assert set(props[1].terms) == {"kc", "ti_min", "td_min"}
    assert set(props[4].terms) == {"kp", "ki_per_min", "kd_s"}
    assert props[4].settings.form == "parallel"


def test_wrong_action_is_check_model(proposals):
    """A reverse-acting controller on a negative-gain process: the fix is the action setting."""
    _, df, props = proposals
    assert not bool(df.iloc[3]["stable"])
    assert props[3].verdict == "check model"
    assert props[3].corrected_action == "direct"
    assert "action" in props[3].note


def test_no_dead_time_uses_a_floor(proposals):
    """theta = 0: SIMC's tau_c is floored by Ts/2 + PV filter (here 0.6 s), and without those at
    0.1 tau1."""
    _, _, props = proposals
    methods = [c.settings.method for c in props[5].candidates]
    assert any(m.startswith("SIMC PI, tau_c = theta") for m in methods)
    assert simc_tau_c_min(make_process("fopdt", 1.0, 10.0), 0.6) == pytest.approx(0.6)
    assert simc_tau_c_min(make_process("fopdt", 1.0, 10.0), 0.0) == pytest.approx(1.0)
    assert simc_tau_c_min(make_process("ipdt", 1.0), 0.0) is None


def test_series_row_falls_back_to_ideal_when_no_series_form_exists():
    """Ti < 4 Td has no series equivalent (Astrom & Hagglund 1995, eq. 3.11): ideal form, said so."""
    s = Settings("x", "ideal", 2.0, 10.0, 3.0)
    assert to_form(s, "series") is None
    ok = Settings("x", "ideal", 2.0, 20.0, 3.0)
    ser = to_form(ok, "series")
    back = to_form(ser, "ideal")
    assert (back.kc, back.ti, back.td) == pytest.approx((2.0, 20.0, 3.0), rel=1e-12)


@pytest.mark.parametrize("conv,form,s", [
    ({"kc": "pb_pct", "ti": "reset_rpm", "td": "td_min"}, "ideal", Settings("x", "ideal", 1.7, 42.0, 6.5)),
    ({"kc": "kc", "ti": "ti_min", "td": "td_s"}, "series", Settings("x", "series", 0.3, 600.0, 30.0)),
    ({"kc": "kc", "ti": "ti_h", "td": "td_h"}, "ideal", Settings("x", "ideal", 12.0, 7200.0, 0.0)),
    ({"ki": "ki_per_min", "kd": "kd_min"}, "parallel", Settings("x", "parallel", 2.5, 25.0, 4.0)),
    ({}, "ideal", Settings("x", "ideal", 0.8, None, 0.0)),
])
def test_row_terms_round_trip(conv, form, s):
    """Closed form: settings -> the row's terms -> settings is the identity (units.py conversions)."""
    t = row_terms(s, conv)
    back = from_row_terms(t, form, alpha=s.alpha)
    assert back.kc == pytest.approx(s.kc, rel=1e-12)
    assert (back.ti is None) == (s.ti is None)
    if s.ti is not None:
        assert back.ti == pytest.approx(s.ti, rel=1e-12)
    assert back.td == pytest.approx(s.td, rel=1e-12, abs=1e-15)


def test_parallel_and_ideal_describe_the_same_controller():
    """Closed form: kp = kc, ki = kc/ti, kd = kc td gives the same C(jw), derivative filter included."""
    s = Settings("x", "ideal", 2.0, 15.0, 3.0, 0.1)
    p = to_form(s, "parallel")
    w = np.logspace(-3, 2, 50)
    assert np.allclose(s.controller().rational(1j * w), p.controller().rational(1j * w), rtol=1e-12)


def test_rounding_goes_to_the_robust_side():
    """Gain and integral action are rounded down, PB and Ti up (three significant figures)."""
    assert round_sig(1.23456, 3, -1) == 1.23
    assert round_sig(1.23456, 3, +1) == 1.24
    assert round_sig(0.0098765, 3, 0) == 0.00988
    assert round_sig(999.6, 3, +1) == 1000.0
    s = rounded(Settings("x", "ideal", 1.23456, 61.111, 0.0), {"kc": "pb_pct", "ti": "reset_rpm"})
    assert s.kc <= 1.23456 and s.ti >= 61.111


def _fopdt_row(band, att):
    return _row(9, model="fopdt", gain=1.0, tau1=10.0, dead_time=5.0, kc=0.5, ti=10.0, band_rad_s=band,
                attenuation_db=att)


def test_dead_time_makes_the_requirement_impossible_and_relaxing_makes_it_achievable():
    """-20 dB up to 0.5 rad/s with 5 s of dead time is beyond any tuning (bandwidth ~ 1/theta = 0.2 rad/s,
    Skogestad & Postlethwaite 2005, sec. 5.5); -10 dB up to 0.01 rad/s is achievable."""
    hard = _fopdt_row(0.5, 20.0)
    m, df = _figures([hard])
    p = propose(m[0], hard, df.iloc[0], POLICY)
    assert p.verdict == "not achievable by tuning"
    assert "dead time" in p.limiting_factor and "feedforward" in p.limiting_factor
    assert p.best_band_s_db > -20.0
    easy = _fopdt_row(0.01, 10.0)
    m, df = _figures([easy])
    q = propose(m[0], easy, df.iloc[0], POLICY)
    assert q.verdict == "retune"
    assert q.after.band_s_db <= -10.0


def test_stage_warning_for_large_changes(proposals):
    """A setting moving by more than a factor of two is flagged: move in stages."""
    _, _, props = proposals
    assert "move in stages" in props[1].note   # ipdt: kc from 20 to about 5


def test_passing_loop_gets_no_change_needed():
    row = _row(0, model="fopdt", gain=1.0, tau1=10.0, dead_time=1.0, kc=2.0, ti=10.0)
    m, df = _figures([row])
    df["status"] = "passes"
    p = propose(m[0], row, df.iloc[0], POLICY)
    assert p.verdict == "no change needed"
