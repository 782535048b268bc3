"""Frequency evaluation over several processes (audit.parallel) equals the one-process result.

Regression checks (the parallel path against the serial engine), not validation.
"""

from __future__ import annotations

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
    """Regression: step responses over two processes equal the one-process figures to 1e-9 relative
    (loops batched with others of another state size may differ in the last bits of a product)."""
    from audit.parallel import step_figures_parallel
    from audit.policy import Policy
    from audit.timedomain import step_figures

    models, _ = synthetic
    models = models[:300]
    monkeypatch.setattr(parallel, "MIN_LOOPS_PER_JOB", 100)
    one = step_figures(models, Policy())
    two = step_figures_parallel(models, Policy(), None, jobs=2)
    pd.testing.assert_frame_equal(one, two, check_exact=False, rtol=1e-9, atol=0)
