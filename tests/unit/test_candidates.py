"""Unit tests of audit.candidates: the candidate search batched across loops.

The batched search must give every loop the candidates it gets alone (a batched computation
equals its per-item form: common practice), its array shortcuts must equal the plain
definitions they replace, and one loop whose search fails must not stop the others.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import audit.candidates as cand
from audit.candidates import (
    candidate_settings, candidate_settings_many, characteristic_w, characteristic_ws, loop_responses, max_ki,
    screening_grids,
)
from audit.loop import model_from_row
from audit.rows import LoopRow
from audit.tuning import Limits, Requirement


def _row(i, **kw) -> LoopRow:
    base = dict(index=i, sheet="loops", excel_row=i + 2, tag=f"T-{i}")
    base.update(kw)
    return LoopRow(**base)


#: Mixed loops (test data): fopdt, sopdt, ipdt with and without lag, a tf with a right-half-plane
#: zero, an open-loop unstable tf, a loop without dead time, direct action, a series-form row.
ROWS = [
    _row(0, model="fopdt", gain=2.0, tau1=20.0, dead_time=4.0, kc=2.0, ti=5.0),
    _row(1, model="sopdt", gain=1.5, tau1=100.0, tau2=20.0, dead_time=10.0, kc=3.0, ti=30.0, form="series",
         sample=1.0),
    _row(2, model="ipdt", gain=0.01, dead_time=10.0, kc=20.0, ti=100.0),
    _row(3, model="ipdt", gain=0.02, tau1=15.0, dead_time=5.0, kc=5.0, ti=200.0, pv_filter=1.0),
    _row(4, model="tf", num=(-1.0, 1.0), den=(10.0, 7.0, 1.0), dead_time=1.0, form="parallel", kp=1.0, ki=0.1,
         kd=0.0),
    _row(5, model="tf", num=(1.0,), den=(10.0, -1.0), dead_time=0.5, kc=2.0, ti=20.0),
    _row(6, model="fopdt", gain=1.0, tau1=10.0, dead_time=0.0, pv_filter=0.5, sample=0.2, kc=8.0, ti=1.0),
    _row(7, model="fopdt", gain=-1.0, tau1=10.0, dead_time=2.0, kc=1.0, ti=10.0, action="direct"),
    _row(8, model="sopdt", gain=0.8, tau1=30.0, tau2=30.0, dead_time=3.0, kc=1.0, ti=30.0, td=5.0),
]
#: Requirements and limits varied across the loops: some without a requirement, some with
#: limits that add forbidden points (a tight gain margin) or remove them (a loose phase margin).
REQS = [Requirement(0.01, 20.0), Requirement(0.002, 10.0), Requirement(), Requirement(0.005, 6.0), Requirement(),
        Requirement(0.05, 10.0), Requirement(0.5, 10.0), Requirement(0.02, 12.0), Requirement(0.01, 3.0)]
LIMS = [Limits(), Limits(1.6, 6.0, 30.0), Limits(), Limits(2.0, 10.0, 45.0), Limits(1.4, 8.0, 50.0),
        Limits(), Limits(2.0, 4.0, 20.0), Limits(), Limits(1.8, 6.0, 30.0)]


def _models():
    models = [model_from_row(r) for r in ROWS]
    # a cascade's outer loop: the slow sopdt loop around the fast fopdt loop as its inner loop
    inner = model_from_row(_row(9, model="fopdt", gain=1.0, tau1=2.0, dead_time=0.2, kc=1.0, ti=2.0, tag="FIC-1"))
    outer = model_from_row(_row(10, model="fopdt", gain=1.5, tau1=120.0, dead_time=10.0, kc=2.0, ti=120.0), inner)
    return models + [outer], REQS + [Requirement(0.005, 10.0)], LIMS + [Limits()]


def _same_settings(a, b):
    assert a.method == b.method and a.form == b.form
    for x, y in ((a.kc, b.kc), (a.ti, b.ti), (a.td, b.td), (a.alpha, b.alpha)):
        assert (x is None and y is None) or x == pytest.approx(y, rel=1e-12), (a.method, x, y)


def test_batched_candidates_equal_each_loop_alone():
    """Every loop of a mixed batch (rules, tau_c screens, ki frontiers) gets the candidates it gets
    alone, in the same order (a batched computation equals its per-item form: common practice)."""
    models, reqs, lims = _models()
    alphas = [0.1, 0.125, 0.1, 0.1, 0.1, 0.1, 0.1, 0.1, 0.2, 0.1]
    many = candidate_settings_many(models, lims, reqs, alphas)
    assert len(many) == len(models)
    kinds = set()
    for m, lim, req, a, got in zip(models, lims, reqs, alphas, many):
        assert got.error is None
        alone, notes = candidate_settings(m, lim, req, a)
        assert got.notes == notes
        assert len(got.settings) == len(alone), m.tag
        for x, y in zip(got.settings, alone):
            _same_settings(x, y)
        kinds |= {s.method.split(",")[0].split(" at ")[0] for s in got.settings}
    # the batch exercised every kind of candidate
    assert {"SIMC PI", "SIMC PID", "AMIGO PI", "AMIGO PID", "max-ki PI", "max-ki PID"} <= kinds
    assert any("smoothest" in s.method for c in many for s in c.settings)
    assert any(s.method.startswith("best-band") for c in many for s in c.settings)


def test_batch_order_does_not_matter():
    """Reversing the batch gives each loop the same candidates (common practice)."""
    models, reqs, lims = _models()
    alphas = [0.1] * len(models)
    fwd = candidate_settings_many(models, lims, reqs, alphas)
    rev = candidate_settings_many(models[::-1], lims[::-1], reqs[::-1], alphas)[::-1]
    for a, b in zip(fwd, rev):
        assert len(a.settings) == len(b.settings)
        for x, y in zip(a.settings, b.settings):
            _same_settings(x, y)


def test_one_loop_whose_search_fails_does_not_stop_the_others(monkeypatch):
    """A loop whose own search raises gets the exception; every other loop its usual candidates."""
    models, reqs, lims = _models()
    alphas = [0.1] * len(models)
    clean = candidate_settings_many(models, lims, reqs, alphas)
    real = cand._plan

    def plan(model, *a, **k):
        if model.tag == "T-3":
            raise RuntimeError("planted search fault")
        return real(model, *a, **k)

    monkeypatch.setattr(cand, "_plan", plan)
    got = candidate_settings_many(models, lims, reqs, alphas)
    for m, a, b in zip(models, got, clean):
        if m.tag == "T-3":
            assert isinstance(a.error, RuntimeError) and a.settings == []
            continue
        assert a.error is None and len(a.settings) == len(b.settings)
        for x, y in zip(a.settings, b.settings):
            _same_settings(x, y)
    with pytest.raises(RuntimeError, match="planted"):
        candidate_settings(models[3], lims[3], reqs[3])


def test_a_fault_of_the_batched_arithmetic_costs_only_its_loop(monkeypatch):
    """When the batched arithmetic itself raises, the loops are searched one by one: only the loop
    at fault is lost."""
    models, reqs, lims = _models()
    alphas = [0.1] * len(models)
    clean = candidate_settings_many(models, lims, reqs, alphas)
    real = cand.characteristic_ws

    def wcs(ms, *args, **kwargs):
        if any(m.tag == "T-1" for m in ms):
            raise FloatingPointError("planted arithmetic fault")
        return real(ms, *args, **kwargs)

    monkeypatch.setattr(cand, "characteristic_ws", wcs)
    got = candidate_settings_many(models, lims, reqs, alphas)
    assert [g.error is not None for g in got] == [m.tag == "T-1" for m in models]
    for a, b in zip(got, clean):
        if a.error is None:
            assert [s.method for s in a.settings] == [s.method for s in b.settings]


def test_loop_responses_equal_each_loops_own_response():
    """The batched L(jw) (padded Horner, delay, inner set-point response) equals LoopModel.L of
    each loop (common practice)."""
    models, _, _ = _models()
    w = np.logspace(-4, 2, 301)
    got = loop_responses(models, w)
    for m, row in zip(models, got):
        np.testing.assert_allclose(row, m.L(w), rtol=1e-13, atol=0)


def test_characteristic_w_is_the_phase_crossover_of_a_pure_delay_lag():
    """For K e^{-theta s}/(tau s + 1) with C = 1 the phase reaches -180 deg where
    w theta + atan(w tau) = pi (closed form); the grid point found lies at or just past it."""
    m = model_from_row(_row(0, model="fopdt", gain=1.0, tau1=10.0, dead_time=2.0, kc=1.0, ti=10.0))
    from scipy.optimize import brentq
    w180 = brentq(lambda w: w * 2.0 + math.atan(w * 10.0) - math.pi, 1e-3, 10.0)
    wc = characteristic_w(m)
    step = 10 ** (12 / 2400)
    assert w180 <= wc <= w180 * step
    assert characteristic_ws([m, m])[1] == wc
    # no dead time or lag: the phase never falls far enough
    free = model_from_row(_row(1, model="ipdt", gain=1.0, dead_time=0.0, kc=1.0, ti=10.0))
    assert characteristic_w(free) is None


def test_screening_grid_is_the_log_grid_with_the_band_edge():
    """Each row is numpy's union of the log grid and the band edge (the definition it replaces),
    padded by repeating its last point when the edge is absent or already a grid point."""
    wc = np.array([0.3, 2.0, 5.0, 0.01])
    base = [np.logspace(math.log10(x) - 2.5, math.log10(x) + 1.2, 500) for x in wc]
    wd = np.array([0.05, np.nan, base[2][100], 7.0])
    g = screening_grids(wc, wd)
    for k in range(len(wc)):
        ref = np.union1d(base[k], [wd[k]]) if np.isfinite(wd[k]) else base[k]
        np.testing.assert_array_equal(g.w[k, :ref.size], ref)
        if ref.size == 500:
            assert g.w[k, 500] == ref[-1] and not g.pair[k, 499]
        else:
            assert g.pair[k].all()


def test_ki_contact_equals_the_general_first_contact():
    """The real-arithmetic contact of L0 = kp A equals the general contact of the line L0 + t b
    (the same geometry solved two ways: common practice)."""
    rng = np.random.default_rng(5)
    R, K, n = 3, 7, 400
    w = np.logspace(-2, 1, n)
    A = (2.0 / (1j * w * 5 + 1))[None, :] * np.exp(-1j * w[None, :] * rng.uniform(0.5, 2.0, (R, 1)))
    b = A / (1j * w[None, :])
    kp = np.sort(rng.uniform(0.05, 1.0, (R, K)), -1)
    r = np.array([0.5, 0.6, 0.55])
    pts = np.array([[-2.0, -1.7, np.nan], [-1.9, np.nan, np.nan], [complex(-0.87, -0.5), -2.0, -1.6]])
    got = cand._ki_contact(kp, A, b, r, pts)
    ref = cand._first_contact(kp[..., None] * A[:, None, :], b[:, None, :], r, pts)
    np.testing.assert_allclose(got, ref, rtol=1e-9)
    assert np.isfinite(got).all() and (got > 0).sum() > R * K // 2   # mostly real contacts, not t = 0


def test_max_ki_is_unchanged_by_the_batch_of_one():
    """max_ki of a loop equals the max-ki PI candidate its batched search finds (same frontier)."""
    models, reqs, lims = _models()
    s = max_ki(models[0], lims[0])
    got = candidate_settings_many(models[:1], lims[:1], [Requirement()], [0.1])[0]
    pick = [c for c in got.settings if c.method.startswith("max-ki PI")][0]
    assert s.kc == pick.kc and s.ti == pick.ti


def test_disc_pruning_leaves_every_ki_contact_unchanged():
    """The disc contacts worked out only where the bounds over the block's gains allow (as the ki
    frontiers call them) equal the contacts over every frequency, number for number, and the
    general contact of the line L0 + t b (the same geometry solved two ways: common practice)."""
    rng = np.random.default_rng(11)
    R, n = 6, 501
    w = np.logspace(-2.5, 1.2, n)
    A = (rng.uniform(0.5, 3.0, (R, 1)) / (1j * w * rng.uniform(1.0, 20.0, (R, 1)) + 1)) \
        * np.exp(-1j * w[None, :] * rng.uniform(0.5, 2.0, (R, 1)))
    b = A / (1j * w[None, :])
    kp_u = rng.uniform(0.2, 1.0, R)
    kp = kp_u[:, None] * cand.KP_FRACTIONS[None, :]
    r = np.full(R, 0.5)
    pts = np.array([cand._forbidden_points(Limits(2.0, 6.0, 45.0))] * R)
    rows = cand._contact_rows(A, b, r, pts, (kp[:, 0], kp[:, -1]))
    cols = cand._disc_columns(rows, kp)
    assert cols is not None and cols[0].size < R * n       # frequencies were left out
    assert (cols[2] < n).all() and cols[2].sum() == cols[0].size   # each row's own count, none padded
    got = cand._ki_contacts(rows, kp, (cand.KP_FRACTIONS, np.zeros(R), kp_u))
    whole = cand._ki_contacts(cand._contact_rows(A, b, r, pts), kp)     # no span: every frequency
    np.testing.assert_array_equal(got, whole)
    ref = cand._first_contact(kp[..., None] * A[:, None, :], b[:, None, :], r, pts)
    np.testing.assert_allclose(got, ref, rtol=1e-9)
    assert np.isfinite(got).all() and (got > 0).all()


def test_frontier_band_level_is_its_plain_definition():
    """The band level of every (kp, ki) point of every ki frontier (each row's own band, no row padded
    to the widest) equals its definition: the largest |S| = 1/|1 + L| over the row's grid points up to
    the band edge, in dB, with L = (kp (1 + D) + ki/(jw)) P computed here from each loop's own response
    (common practice)."""
    models, reqs, lims = _models()
    ms = [m for m, q in zip(models, reqs) if q.active]
    qs = [q for q in reqs if q.active]
    ls = [lim for lim, q in zip(lims, reqs) if q.active]
    wc = characteristic_ws(ms)
    wd = np.array([q.band_rad_s for q in qs], float)
    S = cand._search_arrays(ms, wc, wd, ls, [0.1] * len(ms))
    loop = np.repeat(np.arange(len(ms)), 2)
    td = np.array([0.0 if k % 2 == 0 else 0.5 / wc[i] for k, i in enumerate(loop)])
    frs = cand._frontier_rows(S, loop, td)
    checked = 0
    for fr, i, t in zip(frs, loop, td):
        if fr is None:
            continue
        w = S.w[i]
        band = w <= wd[i]
        assert band.any() and not band.all()
        P = loop_responses([cand._unit_loop(ms[i])], w[band])[0]
        cd = 1.0 + (1j * w[band] * t) / (0.1 * t * 1j * w[band] + 1.0) if t > 0 else 1.0
        for kp, ki, got in zip(fr.kp, fr.ki, fr.band_s_db):
            ref = 20 * np.log10(np.max(1.0 / np.abs(1.0 + (kp * cd + ki / (1j * w[band])) * P)))
            assert got == pytest.approx(ref, rel=1e-12, abs=1e-12)
            checked += 1
    assert checked >= 24 * len(ms)


def test_tau_screen_with_the_requirement_first_equals_the_full_screen_of_every_tau():
    """The SIMC tau_c screen, which screens the limits only for the taus that meet the requirement on
    the band, gives every (request, tau) the verdict of the full screen (the loop C P on the grid,
    :func:`_screen` and :func:`_screen_ok` of each tau, written out here: common practice), and the
    full screens do differ: some taus fail the requirement, some the limits, some pass."""
    from audit.tuning import _effective, effective_extra_delay, simc_pi
    models, reqs, lims = _models()
    pick = [i for i, m in enumerate(models) if m.process.kind in ("fopdt", "sopdt", "ipdt") and reqs[i].active]
    ms = [models[i] for i in pick]
    wc = characteristic_ws(ms)
    wd = np.array([reqs[i].band_rad_s for i in pick], float)
    S = cand._search_arrays(ms, wc, wd, [lims[i] for i in pick], [0.1] * len(ms))
    sm = []
    for k, i in enumerate(pick):
        extra = effective_extra_delay(models[i])
        kk, t1, t2, theta = _effective(models[i].process, extra, for_pid=False)
        sm.append(cand._Smooth(k, simc_pi, 0.0, 0.0, kk, t1, t2, theta, lims[i], reqs[i]))
    taus = np.geomspace(0.05 * np.ones(len(sm)), 500.0 * np.ones(len(sm)), 40, axis=-1)
    got = cand._tau_ok(S, sm, False, taus)
    ref = np.zeros_like(got)
    skipped = limits_only = 0
    for k, q in enumerate(sm):
        h = taus[k] + q.theta
        kc = q.t1 / (q.k * h) if math.isfinite(q.t1) else 1.0 / (q.k * h)
        ti = np.minimum(q.t1, 4.0 * h) if math.isfinite(q.t1) else 4.0 * h
        s = 1j * S.w[k]
        L = kc[:, None] * S.P[k][None, :] + (kc / ti)[:, None] * (S.P[k] / s)[None, :]
        sc = cand._screen(L, S.sel[k][None, :], np.ones(len(h), bool), S.pair[k][None, :])
        ref[k] = cand._screen_ok(sc, q.lim.ms_max, q.lim.gm_min_db, q.lim.pm_min_deg, q.req.level_db)
        band_fail = ~(sc.band_s_db <= q.req.level_db)
        limits_fail = ~cand._screen_ok(sc, q.lim.ms_max, q.lim.gm_min_db, q.lim.pm_min_deg, np.nan)
        skipped += band_fail.sum()
        limits_only += (~band_fail & limits_fail).sum()
    np.testing.assert_array_equal(got, ref)
    assert got.any() and skipped > 0 and limits_only > 0      # both ways of failing are exercised


def test_characteristic_w_in_pieces_equals_the_whole_grid_unwrapped():
    """The characteristic frequencies found piece by piece equal the first grid point where numpy's
    unwrap of the whole grid falls past the target (the definition: common practice)."""
    models, _, _ = _models()
    got = characteristic_ws(models)
    w = cand.CHARACTERISTIC_GRID
    for m, g in zip(models, got):
        ph = np.unwrap(np.angle(loop_responses([cand._unit_loop(m)], w)[0]))
        target = min(-np.pi, ph[0] - np.pi / 2)
        hit = np.flatnonzero(ph <= target)
        assert (g == w[hit[0]]) if hit.size else np.isnan(g), m.tag


def test_screen_equals_its_plain_definitions():
    """The screen's Ms, band level, gain margins and phase margin equal their plain grid definitions
    (largest 1/|1 + L|; real-axis crossings interpolated; unit-circle crossings): common practice."""
    rng = np.random.default_rng(3)
    w = np.logspace(-2, 1.5, 300)
    L = (rng.uniform(0.5, 4.0, (5, 3, 1)) * np.exp(-1j * w * rng.uniform(0.5, 2.0, (5, 3, 1)))
         / (1j * w * rng.uniform(1.0, 10.0, (5, 3, 1)) + 1) * (1 + 1 / (1j * w * rng.uniform(2.0, 20.0, (5, 3, 1)))))
    sel = (w <= 0.1)[None, None, :]
    pair = np.ones(w.size - 1, bool)
    sc = cand._screen(L, sel, np.ones((5, 1), bool), pair)
    absS = 1.0 / np.abs(1.0 + L)
    np.testing.assert_array_equal(sc.ms, absS.max(-1))
    np.testing.assert_array_equal(sc.band_s_db, 20 * np.log10(absS[..., w <= 0.1].max(-1)))
    for i in range(5):
        for j in range(3):
            l = L[i, j]
            xs, pms = [], []
            for k in range(w.size - 1):
                a, c = l[k], l[k + 1]
                if a.imag * c.imag <= 0 and a.imag != c.imag:
                    xs.append(a.real + a.imag / (a.imag - c.imag) * (c.real - a.real))
                if (abs(a) - 1) * (abs(c) - 1) <= 0:
                    pms.append(180.0 - np.degrees(abs(np.angle(a))))
            up = max([-x for x in xs if -1 < x < 0], default=0.0)
            down = min([-x for x in xs if x < -1], default=np.inf)
            with np.errstate(divide="ignore"):
                assert sc.gm_db[i, j] == -20 * np.log10(up) and sc.gm_down_db[i, j] == 20 * np.log10(down)
            assert sc.pm_deg[i, j] == min(pms, default=np.inf)


def test_contact_rows_with_x_over_b_per_loop_equal_the_rows_own():
    """x/b of the forbidden points worked out once per loop and shared by its rows (several derivative
    times, as the ki frontiers do) gives every ki contact of every row number for number as each row's
    own x/b, and the general contact of the line L0 + t b (common practice)."""
    rng = np.random.default_rng(17)
    loops, n = 3, 501
    w = np.logspace(-2.5, 1.2, n)
    P = (rng.uniform(0.5, 3.0, (loops, 1)) / (1j * w * rng.uniform(1.0, 20.0, (loops, 1)) + 1)) \
        * np.exp(-1j * w[None, :] * rng.uniform(0.5, 2.0, (loops, 1)))
    inv = np.repeat(np.arange(loops), 2)                       # two rows a loop: td = 0 and td > 0
    td = np.tile([0.0, 1.5], loops)
    cd = np.where(td[:, None] > 0, 1.0 + (1j * w * td[:, None]) / (0.1 * td[:, None] * 1j * w + 1.0), 1.0 + 0j)
    A = cd * P[inv]
    b_loop = P / (1j * w[None, :])
    b = b_loop[inv]
    pts_loop = np.array([cand._forbidden_points(Limits(ms, 6.0, 45.0)) for ms in (1.6, 2.0, 1.4)])
    xb = pts_loop[:, :, None] / b_loop[:, None, :]
    pts, r = pts_loop[inv], 1.0 / np.array([1.6, 2.0, 1.4])[inv]
    kp_u = rng.uniform(0.2, 0.6, inv.size)
    kp = kp_u[:, None] * cand.KP_FRACTIONS[None, :]
    span = (kp[:, 0], kp[:, -1])
    shared = cand._contact_rows(A, b, r, pts, span, (xb, inv))
    own = cand._contact_rows(A, b, r, pts, span)
    grid = (cand.KP_FRACTIONS, np.zeros(inv.size), kp_u)
    got = cand._ki_contacts(shared, kp, grid)
    np.testing.assert_array_equal(got, cand._ki_contacts(own, kp, grid))
    ref = cand._first_contact(kp[..., None] * A[:, None, :], b[:, None, :], r, pts)
    np.testing.assert_allclose(got, ref, rtol=1e-9)
    assert np.isfinite(got).all() and (got > 0).all()
