"""Unit tests of audit.frequency: closed forms (validation) and invariances (regression)."""

from __future__ import annotations

import math

import numpy as np
import pytest

import audit.frequency as fq
from audit.frequency import evaluate
from audit.loop import Controller, LoopModel, make_process

from ..reference.loops_random import random_loops


def test_p_only_first_order_closed_form():
    """Closed form for L = a/(tau s + 1), a = K Kc > 1 (common practice, from memory):
    wc = sqrt(a^2 - 1)/tau, PM = 180 - atan(wc tau) deg, no phase crossover, Mt = a/(1 + a) at w = 0,
    |S| rises monotonically to 1."""
    K, kc, tau = 2.0, 3.0, 5.0
    a = K * kc
    m = LoopModel("p", make_process("fopdt", K, tau), Controller("ideal", kc=kc))
    f = evaluate([m]).iloc[0]
    wc = math.sqrt(a * a - 1) / tau
    assert f["stable"]
    assert f["wc_rad_s"] == pytest.approx(wc, rel=1e-9)
    assert f["pm_deg"] == pytest.approx(180 - math.degrees(math.atan(wc * tau)), rel=1e-9)
    assert math.isinf(f["gm"])
    assert f["mt"] == pytest.approx(a / (1 + a), rel=1e-9) and f["w_mt_rad_s"] == 0.0
    assert f["ms"] == pytest.approx(1.0, rel=1e-9) and math.isinf(f["w_ms_rad_s"])
    assert f["dm_s"] == pytest.approx(math.radians(f["pm_deg"]) / wc, rel=1e-9)


def test_direct_action_gain_margin_at_zero_frequency():
    """Closed form: L = -a/(tau s + 1) with a < 1 is stable; L(0) = -a is real and negative, so the
    gain can rise by 1/a before the pole at s = (a - 1)/tau crosses into the right half-plane."""
    m = LoopModel("d", make_process("fopdt", 0.5, 4.0), Controller("ideal", kc=1.0), sign=-1.0)
    f = evaluate([m]).iloc[0]
    assert f["stable"]
    assert f["gm"] == pytest.approx(2.0, rel=1e-12) and f["w180_rad_s"] == 0.0


def test_biproper_loop_with_delay_and_high_gain_is_not_stable():
    """Closed form: a neutral loop with |L(inf)| >= 1 and dead time has closed-loop roots reaching
    into the right half-plane (Hale & Verduyn Lunel, Introduction to Functional Differential
    Equations, 1993, ch. 9); it must not be reported stable."""
    P = make_process("tf", num=[2.0, 1.0], den=[1.0, 1.0], dead_time=0.5)
    f = evaluate([LoopModel("n", P, Controller("ideal", kc=1.0))]).iloc[0]
    assert not f["stable"]
    assert "high-frequency" in f["engine_note"]


def test_double_integrator_with_pd_is_stable():
    """Closed form: P = 1/s^2, C = Kc (1 + Td s) without filter -> s^2 + Kc Td s + Kc: stable.
    With the derivative filter alpha = 0.1 the characteristic polynomial stays Hurwitz (Routh)."""
    P = make_process("tf", num=[1.0], den=[1.0, 0.0, 0.0])
    m = LoopModel("dd", P, Controller("ideal", kc=1.0, td=2.0, alpha=0.1))
    f = evaluate([m]).iloc[0]
    r = m.rational
    ref = bool(np.all(np.roots(np.polyadd(r.den, r.num)).real < 0))
    assert ref and bool(f["stable"])
    m2 = LoopModel("dd", P, Controller("ideal", kc=1.0))  # P-only on a double integrator: marginal
    assert not bool(evaluate([m2]).iloc[0]["stable"])


def test_none_rows_give_missing_values_and_keep_order():
    """Regression: an invalid row (None) keeps its place and gets missing values."""
    m = LoopModel("a", make_process("fopdt", 1.0, 1.0, dead_time=0.2), Controller("ideal", kc=1.0, ti=1.0))
    df = evaluate([None, m, None])
    assert len(df) == 3
    assert df.iloc[0]["stable"] is None and math.isnan(df.iloc[0]["ms"])
    assert df.iloc[1]["stable"]


def test_batch_equals_single_and_grid_independence(monkeypatch):
    """Regression: a loop's figures do not depend on which other loops share the batch, nor on the
    grid density (refinement makes them grid-independent to 1e-6 relative)."""
    models = random_loops(60, seed=3)
    cols = ["gm", "pm_deg", "dm_s", "ms", "mt", "wb_rad_s", "wc_rad_s"]
    batch = evaluate(models)
    singles = [evaluate([m]).iloc[0] for m in models[:10]]
    for i, s in enumerate(singles):
        for c in cols:
            a, b = batch.iloc[i][c], s[c]
            assert (np.isnan(a) and np.isnan(b)) or a == pytest.approx(b, rel=1e-12)
    monkeypatch.setattr(fq, "LOG_STEP", 0.008)
    monkeypatch.setattr(fq, "DELAY_STEP", 0.12)
    fine = evaluate(models)
    assert list(fine["stable"]) == list(batch["stable"])
    st = batch["stable"].astype(bool).to_numpy()
    for c in cols:
        a = batch[c].to_numpy(float)[st]
        b = fine[c].to_numpy(float)[st]
        both = np.isfinite(a) & np.isfinite(b)
        assert np.array_equal(np.isfinite(a), np.isfinite(b)), c
        np.testing.assert_allclose(a[both], b[both], rtol=1e-6, err_msg=c)


def test_without_the_mt_search_every_other_figure_is_the_same_number():
    """evaluate(..., mt=False) (the proposals' candidates) leaves Mt out and changes no other figure by a
    bit: the two peaks are searched side by side, each on its own (a shortcut equals the computation it
    shortens: common practice). Loops with and without a band requirement, stable and not."""
    models = random_loops(200, seed=5)
    band = np.where(np.arange(200) % 2 == 0, 0.05, np.nan)
    full = evaluate(models, band)
    part = evaluate(models, band, mt=False)
    assert full["stable"].astype(bool).any() and not full["stable"].astype(bool).all()
    assert np.isfinite(full["mt"].to_numpy(float)).sum() > 100
    assert part["mt"].isna().all() and part["w_mt_rad_s"].isna().all()
    for c in fq.FIGURE_COLUMNS:
        if c in ("mt", "w_mt_rad_s", "lower_bounds"):
            continue
        assert full[c].equals(part[c]), c          # same values bit for bit, missing ones in the same places
    assert (part["lower_bounds"] == full["lower_bounds"].str.replace("mt", "").str.strip()).all()


def test_band_requirement_with_dead_time():
    """Closed form: SIMC loop L = e^{-theta s}/(2 theta s); at low frequency |S| ~ 2 theta w, so for
    wd = 0.01/theta the band level is about 20 log10(0.02) = -34 dB (Skogestad 2003, eq. for S at
    low frequency with integral action; common practice)."""
    theta = 2.0
    m = LoopModel("b", make_process("fopdt", 1.0, 4.0, dead_time=theta), Controller("ideal", kc=1.0, ti=4.0))
    wd = 0.01 / theta
    f = evaluate([m], [wd]).iloc[0]
    exact = 20 * math.log10(abs(m.S(np.array([wd]))[0]))
    assert f["band_s_db"] == pytest.approx(exact, abs=1e-9)
    assert f["band_s_db"] == pytest.approx(20 * math.log10(0.02), abs=0.01)


def test_narrow_sensitivity_peak_is_found():
    """Regression (found by comparing against a 3-million-point grid): an unstable loop whose
    Nyquist curve passes within 0.016 of -1 at high frequency has a narrow |S| peak of about 65.6
    between two grid points; the interval bound must catch it. Reference: the maximum of |S| on
    a dense grid (common practice), which can only under-estimate the peak."""
    P = make_process("fopdt", 0.4575492989618892, 1.004459716143385, dead_time=0.6108488539933529)
    C = Controller("ideal", kc=11.40399604072938, ti=0.4906901069597777, td=0.25111492903584626, alpha=0.1)
    m = LoopModel("spike", P, C, sign=-1.0)
    f = evaluate([m]).iloc[0]
    w = np.linspace(39.0, 40.5, 2_000_001)
    dense = float(np.max(np.abs(m.S(w))))
    assert dense > 60
    assert f["ms"] >= dense * (1 - 1e-12)
    assert f["ms"] == pytest.approx(dense, rel=1e-6)


def _near_critical(models, rng):
    """The same loops with the controller gain put 0.3-3 % away from the gain margin: L(jw) passes
    that close to -1 near w180, so abs(S) and abs(T) have sharp peaks (tens to hundreds)."""
    import dataclasses

    figs = evaluate(models)
    out, centre = [], []
    for m, (_, f) in zip(models, figs.iterrows()):
        if not (np.isfinite(f["gm"]) and np.isfinite(f["w180_rad_s"]) and f["w180_rad_s"] > 0):
            continue
        k = f["gm"] * (1 + rng.choice([-1, 1]) * 10 ** rng.uniform(-2.5, -1.5))
        c = m.controller
        c = (dataclasses.replace(c, kc=c.kc * k) if c.form != "parallel"
             else dataclasses.replace(c, kp=c.kp * k, ki=c.ki * k, kd=c.kd * k))
        out.append(dataclasses.replace(m, controller=c))
        centre.append(f["w180_rad_s"])
    return out, centre


def test_sharp_peaks_against_a_dense_grid():
    """Regression of the peak search (interval bounds, branch and bound, Brent): on loops brought
    within 0.3-3 % of the critical gain, the engine's Ms and Mt are never below the maximum of a dense
    grid (200,001 points around w180 plus 20,001 log-spaced; common practice: a grid can only
    under-estimate a supremum) and agree with it to 1e-5 (the grid's own error on a peak of 1,000)."""
    models, centre = _near_critical(random_loops(120, seed=8), np.random.default_rng(8))
    figs = evaluate(models)
    assert len(models) > 60
    assert float(np.median(figs["ms"])) > 30
    for m, wc, (_, f) in zip(models, centre, figs.iterrows()):
        w = np.concatenate([wc * np.linspace(0.8, 1.25, 200_001), np.logspace(-5, 5, 20_001) / max(m.delay, 1e-2)])
        L = m.L(w)
        s = np.abs(1.0 / (1.0 + L))
        for col, dense in (("ms", s.max()), ("mt", (np.abs(L) * s).max())):
            assert f[col] >= dense * (1 - 1e-9), (m.tag, col)
            assert f[col] == pytest.approx(dense, rel=1e-5), (m.tag, col)


def test_ripples_that_approach_their_limit():
    """Closed form (derived here): L = 0.4 (s + 1)/(s + 2) e^{-s} has abs(L(jw)) rising from 0.2
    towards l = 0.4, so abs(T) = abs(L)/abs(1 + L) <= abs(L)/(1 - abs(L)) < l/(1 - l) at every finite
    w, and tends to that limit along the delay's ripples; the engine reports the limit, at w = inf,
    and a dense grid stays below it."""
    P = make_process("tf", num=[1.0, 1.0], den=[1.0, 2.0], dead_time=1.0)    # (s + 1)/(s + 2)
    m = LoopModel("lag-lead", P, Controller("parallel", kp=0.4))             # abs(L) rises 0.2 -> 0.4
    f = evaluate([m]).iloc[0]
    l_inf = 0.4
    assert f["stable"]
    assert f["mt"] == pytest.approx(l_inf / (1 - l_inf), rel=1e-12)
    assert f["w_mt_rad_s"] == math.inf
    w = np.linspace(1.0, 400.0, 400_001)
    L = m.L(w)
    assert np.max(np.abs(L) / np.abs(1 + L)) < f["mt"]
