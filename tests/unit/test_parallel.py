"""Frequency evaluation over several processes (audit.parallel) equals the one-process result.

Regression checks (the parallel path against the serial engine), not validation.
"""

from __future__ import annotations

import os
import warnings

import numpy as np
import pandas as pd
import pytest

from audit import parallel
from audit.frequency import evaluate
from audit.loop import Controller, LoopModel, make_process
from audit.parallel import _chunks, cascade_groups, evaluate_parallel


def _loop(tag: str, inner: LoopModel | None = None) -> LoopModel:
    return LoopModel(tag, make_process("fopdt", 1.0, 10.0, dead_time=1.0), Controller("ideal", kc=1.0, ti=10.0),
                     inner=inner)


def test_cascade_chains_form_one_group():
    a = _loop("A")
    b = _loop("B", inner=a)
    c = _loop("C", inner=b)
    d = _loop("D")
    models = [c, d, None, a, b]
    assert cascade_groups(models) == [[0, 3, 4], [1], [2]]


def test_chunks_never_split_a_group():
    groups = [[0, 5], [1], [2, 3, 4], [6], [7, 8]]
    parts = _chunks(groups, 3)
    assert sorted(np.concatenate(parts).tolist()) == list(range(9))
    for g in groups:
        assert sum(np.isin(g, p).all() for p in parts) == 1


@pytest.fixture(scope="module")
def synthetic(tmp_path_factory):
    from audit.generate import write_synthetic_inventory
    from audit.inventory import read_inventory
    from audit.pipeline import AuditOptions, build_models, new_audit

    path = tmp_path_factory.mktemp("par") / "site.csv"
    write_synthetic_inventory(path, 700, seed=6)
    audit = new_audit(read_inventory(path), AuditOptions())
    build_models(audit)
    return audit.models, audit.results["band_rad_s"].to_numpy(float)


def test_two_jobs_give_exactly_the_one_job_result(synthetic, monkeypatch):
    models, band = synthetic
    assert any(m is not None and m.inner is not None for m in models)
    assert any(m is None for m in models)
    monkeypatch.setattr(parallel, "MIN_LOOPS_PER_EVALUATE_JOB", 100)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        one = evaluate(models, band)
        two = evaluate_parallel(models, band, jobs=2)
        serial = evaluate_parallel(models, band, jobs=1)
    pd.testing.assert_frame_equal(one, two, check_exact=True)
    pd.testing.assert_frame_equal(one, serial, check_exact=True)


def test_two_jobs_give_exactly_the_one_job_step_figures(synthetic, monkeypatch):
    """Regression: step responses over two processes (split by response kind, each over every loop)
    equal the one-process figures bit for bit, notes included."""
    from audit.parallel import step_figures_parallel
    from audit.policy import Policy
    from audit.timedomain import step_figures

    models, _ = synthetic
    models = models[:300]
    monkeypatch.setattr(parallel, "MIN_LOOPS_PER_JOB", 100)
    stable = [None if m is None else (i % 17 != 3) for i, m in enumerate(models)]   # some known unstable
    one = step_figures(models, Policy(), stable)
    two = step_figures_parallel(models, Policy(), stable, jobs=2)
    pd.testing.assert_frame_equal(one, two, check_exact=True)
    assert (two["step_note"] == "closed loop unstable: no step figures").sum() == sum(s is False for s in stable)


def test_step_kinds_in_a_worker_match_the_closed_form(monkeypatch):
    """The load steps simulated in the forked worker: IE = -1/ki for a unit load step at the process
    input of a PI loop (K. J. Astrom and T. Hagglund, Advanced PID Control, ISA, 2006, sec. 4.3), and
    the final value 1 of the set-point step (integral action, common practice)."""
    from audit.parallel import step_figures_parallel
    from audit.policy import Policy

    monkeypatch.setattr(parallel, "MIN_LOOPS_PER_JOB", 4)
    models = [LoopModel(f"L{i}", make_process("fopdt", 1.0 + 0.1 * i, 10.0 + i, dead_time=1.0 + 0.2 * i),
                        Controller("ideal", kc=0.8, ti=12.0 + i)) for i in range(10)]
    got = step_figures_parallel(models, Policy(), [True] * 10, jobs=2)
    ki = np.array([0.8 / (12.0 + i) for i in range(10)])      # kc/ti [1/s]
    # to 1e-3, as tests/reference/test_time_reference.py: the trapezoid integral stops at the horizon
    np.testing.assert_allclose(got["load_ie_s"].to_numpy(float), -1.0 / ki, rtol=1e-3)
    np.testing.assert_allclose(got["sp_offset"].to_numpy(float), 0.0, atol=1e-9)
    assert (got["step_note"] == "").all()


def test_rows_checked_in_two_processes_read_the_same(tmp_path, monkeypatch):
    """``read_inventory(jobs=2)`` forks a worker for a share of the rows: the same rows, values,
    problems and messages (sheet, cell, column) as one process, on a workbook with bad rows
    (regression against the one-process reading)."""
    from audit import inventory as inv_mod
    from audit.generate import write_synthetic_inventory
    from audit.inventory import read_inventory

    import openpyxl
    path = tmp_path / "site.xlsx"
    write_synthetic_inventory(path, 60, seed=4)
    wb = openpyxl.load_workbook(path)
    ws = wb["loops"]
    heads = [c.value for c in ws[1]]
    ws.cell(5, heads.index("tag") + 1, None)                  # tag missing
    ws.cell(9, heads.index("model") + 1, "fopdtt")            # unknown word
    ws.cell(40, heads.index("criticality") + 1, "urgent")     # in the worker's share
    ws.cell(55, heads.index("form") + 1, 3.5)
    wb.save(path)
    monkeypatch.setattr(inv_mod, "MIN_ROWS_PER_JOB", 10)
    one = read_inventory(path)
    two = read_inventory(path, jobs=2)
    assert one.rows == two.rows
    assert one.problems == two.problems
    msgs = [str(p) for r in two.rows for p in r.errors]
    assert any("C40" in m or "40" in m for m in msgs) and any("criticality" in m for m in msgs)


def _indices(idx):
    return idx.tolist()


def test_parts_start_at_multiples_of_align(monkeypatch):
    """``map_parts(align=a)``: every part but the first starts at a multiple of ``a``, the parts cover
    every index once, in order (common practice: blocks fixed by position, not by job count)."""
    got = parallel.map_parts(_indices, 1000, 3, min_per_job=100, align=128)
    assert [i for part in got for i in part] == list(range(1000))
    assert len(got) == 3 and all(part[0] % 128 == 0 for part in got[1:])
    one = parallel.map_parts(_indices, 300, 2, min_per_job=100, align=512)   # no boundary inside: one part
    assert one == [list(range(300))]


def test_two_jobs_give_exactly_the_one_job_proposals(tmp_path, monkeypatch):
    """Regression: every results column, proposals and their load-step IAE included, is the same to the
    last bit with one and two processes. The IAE is simulated in fixed blocks of the stage's loops: a
    batch's make-up moves the last bits of its loops' figures, so a block must not depend on the part."""
    from audit import proposals
    from audit.generate import write_synthetic_inventory
    from audit.inventory import read_inventory
    from audit.pipeline import AuditOptions, new_audit, run_stages

    path = tmp_path / "site.csv"
    write_synthetic_inventory(path, 400, seed=3)
    monkeypatch.setattr(proposals, "MIN_LOOPS_PER_PROPOSAL_JOB", 40)
    monkeypatch.setattr(proposals, "IAE_BLOCK", 48)
    got = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        for jobs in (1, 2):
            audit = new_audit(read_inventory(path), AuditOptions(jobs=jobs, record_history=False, pdf=False,
                                                                 quiet=True))
            run_stages(audit)
            got.append(audit.results)
    assert got[0]["proposal_iae_s"].notna().sum() > 100
    pd.testing.assert_frame_equal(got[0], got[1], check_exact=True)


def _pid_and(extra_fn, x):
    return os.getpid(), extra_fn(x)


def test_shared_pool_runs_rounds_in_forked_workers_with_inherited_arguments():
    """``shared_pool``: calls run in another process with the arguments given at fork time (a lambda,
    which could not be pickled, so it was inherited, not sent), in two rounds of the same workers,
    the second using the first's results (common practice: fork inherits the parent's memory)."""
    assert parallel.pool_available()      # Linux: the fork start method
    square = lambda x: x * x   # noqa: E731 - unpicklable on purpose
    with parallel.shared_pool(1, (square,)) as submit:
        first = [f.result() for f in [submit(_pid_and, k) for k in range(3)]]
        second = submit(_pid_and, sum(v for _, v in first)).result()
    assert [v for _, v in first] == [0, 1, 4] and second[1] == 25
    pids = {p for p, _ in first} | {second[0]}
    assert len(pids) == 1 and os.getpid() not in pids     # one worker, forked once, not this process
