"""Unit tests of audit.proposals: proposals of many loops at once, and the proposals stage.

A batch must give every loop the proposal it gets alone, whatever else is in the batch and
however many processes share the work (a batched computation equals its per-item form:
common practice); a loop whose own computation fails is marked and the others go on.
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest

import audit.candidates as cand
import audit.parallel as parallel
import audit.proposals as proposals
from audit.frequency import evaluate
from audit.loop import model_from_row
from audit.policy import Policy
from audit.proposals import proposal_record, propose_many
from audit.rows import LoopRow

POLICY = Policy()
SAMPLE = Path(__file__).resolve().parents[2] / "sample_site" / "loops.xlsx"


def _row(i, **kw) -> LoopRow:
    base = dict(index=i, sheet="loops", excel_row=i + 2, tag=f"T-{i}")
    base.update(kw)
    return LoopRow(**base)


#: Mixed loops (test data): fopdt, sopdt, ipdt, tf with a right-half-plane zero, an open-loop
#: unstable tf (unstable either way at its tuning: both actions are tried), a loop with the wrong
#: action, loops with and without a rejection requirement and with their own limits.
ROWS = [
    _row(0, model="fopdt", gain=2.0, tau1=20.0, dead_time=4.0, kc=2.0, ti=5.0, band_rad_s=0.01, attenuation_db=20,
         conventions={"kc": "pb_pct", "ti": "reset_rpm", "td": "td_min"}),
    _row(1, model="sopdt", gain=1.5, tau1=100.0, tau2=20.0, dead_time=10.0, kc=3.0, ti=30.0, form="series",
         sample=1.0, ms_max=1.6, band_rad_s=0.002, attenuation_db=10),
    _row(2, model="ipdt", gain=0.01, dead_time=10.0, kc=20.0, ti=100.0,
         conventions={"kc": "kc", "ti": "ti_min", "td": "td_min"}),
    _row(3, model="tf", num=(-1.0, 1.0), den=(10.0, 7.0, 1.0), dead_time=1.0, form="parallel", kp=1.0, ki=0.1,
         kd=0.0, conventions={"ki": "ki_per_min", "kd": "kd_s"}),
    _row(4, model="tf", num=(1.0,), den=(10.0, -1.0), dead_time=0.5, kc=0.05, ti=2.0),
    _row(5, model="fopdt", gain=1.0, tau1=10.0, dead_time=2.0, kc=1.0, ti=10.0, action="direct"),
    _row(6, model="fopdt", gain=1.0, tau1=10.0, dead_time=0.0, pv_filter=0.5, sample=0.2, kc=8.0, ti=1.0,
         band_rad_s=0.5, attenuation_db=10, gm_min_db=8.0, pm_min_deg=45.0),
    _row(7, model="ipdt", gain=0.02, tau1=15.0, dead_time=5.0, kc=5.0, ti=200.0, band_rad_s=0.005,
         attenuation_db=6),
]


def _items(rows):
    """(model, row, results row) as the frequency stage leaves them; the last is a cascade's outer
    loop whose inner loop is the first row's loop with a faster tuning (test data)."""
    models = [model_from_row(r) for r in rows]
    inner = model_from_row(_row(20, model="fopdt", gain=1.0, tau1=2.0, dead_time=0.2, kc=1.0, ti=2.0, tag="FIC-1"))
    outer_row = _row(21, model="fopdt", gain=1.5, tau1=120.0, dead_time=10.0, kc=2.0, ti=120.0, band_rad_s=0.005,
                     attenuation_db=10)
    rows = list(rows) + [outer_row]
    models.append(model_from_row(outer_row, inner))
    df = evaluate(models, [r.band_rad_s for r in rows])
    df["band_rad_s"] = [r.band_rad_s for r in rows]
    df["attenuation_db"] = [r.attenuation_db for r in rows]
    df["status"] = "fails"
    return [(m, r, df.iloc[i]) for i, (m, r) in enumerate(zip(models, rows))]


def _same(a, b):
    """Two proposals agree: every results column, and every candidate's settings and figures."""
    ra, rb = proposal_record(a), proposal_record(b)
    for k in ra:
        x, y = ra[k], rb[k]
        if isinstance(x, float) and isinstance(y, float):
            assert (math.isnan(x) and math.isnan(y)) or x == pytest.approx(y, rel=1e-9), k
        else:
            assert x == y, k
    assert len(a.candidates) == len(b.candidates)
    for ca, cb in zip(a.candidates, b.candidates):
        assert ca.settings == cb.settings
        assert (ca.meets_limits, ca.meets_requirement) == (cb.meets_limits, cb.meets_requirement)
        for f in dataclasses.fields(ca.figures):
            x, y = getattr(ca.figures, f.name), getattr(cb.figures, f.name)
            assert x == y or (isinstance(x, float) and (math.isnan(x) and math.isnan(y) or
                                                        x == pytest.approx(y, rel=1e-9))), f.name


@pytest.fixture(scope="module")
def batch():
    items = _items(ROWS)
    return items, propose_many(items, POLICY)


def test_batch_equals_each_loop_alone(batch):
    """propose_many on the mixed batch gives every loop what propose_many gives it alone."""
    items, got = batch
    verdicts = set()
    for item, p in zip(items, got):
        _same(p, propose_many([item], POLICY)[0])
        verdicts.add(p.verdict)
    # the batch holds a retune, a loop beyond tuning, and a wrong action
    assert {"retune", "not achievable by tuning", "check model"} <= verdicts


def test_one_loop_whose_search_fails_does_not_stop_the_others(batch, monkeypatch):
    """A loop whose candidate search raises gets None and its exception; the others their
    proposals as without the fault. Without ``errors`` the fault is raised."""
    items, clean = batch
    real = cand._plan

    def plan(model, *a, **k):
        if model.tag == "T-2":
            raise RuntimeError("planted search fault")
        return real(model, *a, **k)

    monkeypatch.setattr(cand, "_plan", plan)
    errors = {}
    got = propose_many(items, POLICY, errors=errors)
    assert list(errors) == [2] and isinstance(errors[2], RuntimeError)
    assert got[2] is None
    for k, (a, b) in enumerate(zip(got, clean)):
        if k != 2:
            _same(a, b)
    with pytest.raises(RuntimeError, match="planted"):
        propose_many(items, POLICY)


@pytest.fixture(scope="module")
def site():
    """The sample site read and evaluated up to the proposals (cascades, groups, requirements)."""
    from audit.cascade import add_cascade_checks
    from audit.inventory import read_inventory
    from audit.pipeline import AuditOptions, build_models, evaluate_frequency, new_audit

    def make(jobs):
        a = new_audit(read_inventory(str(SAMPLE)), AuditOptions(out_dir="unused", jobs=jobs, propose="all"))
        build_models(a)
        evaluate_frequency(a)
        add_cascade_checks(a)
        return a
    return make


def test_stage_over_two_processes_equals_one(site, monkeypatch):
    """The proposals stage with the search and the IAE spread over two processes gives every row
    the same proposal as in one process."""
    one = site(1)
    proposals.add_proposals(one)
    monkeypatch.setattr(proposals, "MIN_LOOPS_PER_PROPOSAL_JOB", 2)
    monkeypatch.setattr(parallel, "MIN_LOOPS_PER_JOB", 2)
    two = site(2)
    proposals.add_proposals(two)
    assert one.extras["proposals"].keys() == two.extras["proposals"].keys()
    assert any(r.inner_loop for r in one.inventory.rows)
    for k, p in one.extras["proposals"].items():
        _same(p, two.extras["proposals"][k])
    assert not one.extras.get("faults") and not two.extras.get("faults")


def test_stage_marks_a_failing_loop_and_proposes_the_rest(site, monkeypatch):
    """In the stage, a loop whose search raises is marked on its row ('internal fault'); every
    other row gets the proposal of the run without the fault."""
    clean = site(1)
    proposals.add_proposals(clean)
    a = site(1)
    victim = next(i for i, r in enumerate(a.inventory.rows)
                  if clean.results.at[i, "proposal_method"] and not r.inner_loop)
    tag = a.models[victim].tag
    real = cand._plan

    def plan(model, *args, **k):
        if model.tag == tag:
            raise RuntimeError("planted search fault")
        return real(model, *args, **k)

    monkeypatch.setattr(cand, "_plan", plan)
    proposals.add_proposals(a)
    faults = a.extras.get("faults")
    assert [f.rows for f in faults] == [(victim,)] and "planted" in faults[0].error
    assert a.results.at[victim, "proposal_method"] == ""
    inner_of_victim = {i for i, r in enumerate(a.inventory.rows) if r.inner_loop == tag}
    for i, r in enumerate(a.inventory.rows):
        if i == victim or i in inner_of_victim:
            continue
        _same(a.extras["proposals"][r.index], clean.extras["proposals"][r.index])


def test_stage_over_three_processes_with_small_iae_blocks_equals_one(site, monkeypatch):
    """With three processes the search is cut off the IAE blocks' edges and the blocks are shared out
    in a second round (``_shares``); every proposal, its load-step IAE included, is the same to the
    last bit as in one process (common practice: work shared out must not change a figure)."""
    monkeypatch.setattr(proposals, "IAE_BLOCK", 5)
    one = site(1)
    proposals.add_proposals(one)
    monkeypatch.setattr(proposals, "MIN_LOOPS_PER_PROPOSAL_JOB", 2)
    n = len(one.inventory.rows)
    cuts, mine = proposals._shares(n, 3, True)
    assert any(c % 5 for c in cuts)                     # a search part starts inside a block
    assert sum(len(b) for b in mine) == -(-n // 5) >= 3  # every block in one process, several blocks
    three = site(3)
    proposals.add_proposals(three)
    iae = 0
    for k, p in one.extras["proposals"].items():
        _same(p, three.extras["proposals"][k])
        iae += p.after is not None and math.isfinite(p.after.iae)
    assert iae > 5
    assert not one.extras.get("faults") and not three.extras.get("faults")


@pytest.mark.parametrize("n,jobs", [(60, 2), (934, 2), (54, 2), (2000, 3), (1030, 4)])
def test_shares_cover_every_loop_once_with_about_equal_work(n, jobs):
    """The search parts cover positions 0..n-1 once, in order; every IAE block of the stage goes to
    exactly one process; each process's work (its search plus IAE_SHARE a simulated loop) is within
    a block's IAE and a loop of its target, this process's HOME_SHARE of a worker's (common practice:
    a balanced split)."""
    cuts, mine = proposals._shares(n, jobs, True)
    parts = [len(p) for p in np.split(np.arange(n), cuts)]
    assert len(parts) == jobs and sum(parts) == n and list(cuts) == sorted(cuts)
    blocks = sorted(b for m in mine for b in m)
    assert blocks == list(range(-(-n // proposals.IAE_BLOCK)))
    size = [min(proposals.IAE_BLOCK, n - b * proposals.IAE_BLOCK) for b in range(len(blocks))]
    work = [parts[p] + proposals.IAE_SHARE * sum(size[b] for b in mine[p]) for p in range(jobs)]
    weight = [proposals.HOME_SHARE] + [1.0] * (jobs - 1)
    target = [sum(work) * w / sum(weight) for w in weight]
    for p in range(jobs):
        assert abs(work[p] - target[p]) <= proposals.IAE_SHARE * proposals.IAE_BLOCK + 1
