"""Synthetic inventories (audit.generate): format, determinism and mixture.

Regression and format checks of our own generator, not validation against a publication.
"""

from __future__ import annotations

import warnings
from collections import Counter

import numpy as np
import pytest

from audit.cli import main
from audit.generate import AREAS, GENERATED_COLUMNS, synthetic_rows, write_synthetic_inventory
from audit.inventory import COLUMNS_BY_NAME, read_inventory
from audit.loop import model_from_row

N = 600


@pytest.fixture(scope="module")
def csv_inventory(tmp_path_factory):
    path = tmp_path_factory.mktemp("gen") / "site.csv"
    write_synthetic_inventory(path, N, seed=4)
    return read_inventory(path)


def test_every_header_is_a_documented_inventory_column():
    assert set(GENERATED_COLUMNS) <= set(COLUMNS_BY_NAME)


def test_same_seed_same_rows_other_seed_other_rows():
    assert synthetic_rows(200, seed=9) == synthetic_rows(200, seed=9)
    assert synthetic_rows(200, seed=9) != synthetic_rows(200, seed=10)


def test_row_count_and_unique_tags(csv_inventory):
    rows = csv_inventory.rows
    assert len(rows) == N
    tags = [r.tag for r in rows if r.tag]
    assert len(tags) == len(set(tags)) == N


def test_mixture_covers_every_model_form_and_area(csv_inventory):
    valid = [r for r in csv_inventory.rows if r.valid]
    assert {r.model for r in valid} == {"fopdt", "sopdt", "ipdt", "tf"}
    assert {r.form for r in valid} == {"ideal", "series", "parallel"}
    assert {r.area for r in valid} == {a.name for a in AREAS}
    assert {r.action for r in valid} == {"reverse", "direct"}
    theta = np.array([r.dead_time or 0.0 for r in valid])
    assert any(not r.dead_time and not r.sample for r in valid)      # no delay at all
    # dead-time dominant loops are present: theta larger than the largest time constant
    assert any((r.dead_time or 0) > max(r.tau1 or 0, r.tau2 or 0) > 0 for r in valid)
    assert sum(r.band_rad_s is not None for r in valid) > 0.2 * len(valid)
    outer = [r for r in valid if r.inner_loop]
    assert outer and all(any(o.inner_loop == r.tag for r in valid) for o in outer)


def test_a_few_rows_carry_entry_mistakes_located_by_cell(tmp_path):
    path = tmp_path / "many.csv"
    write_synthetic_inventory(path, 3000, seed=2)
    inv = read_inventory(path)
    bad = [r for r in inv.rows if not r.valid]
    assert 0 < len(bad) < 0.02 * len(inv.rows)
    assert all("!" in str(p) for r in bad for p in r.errors)


def test_xlsx_and_csv_hold_the_same_rows(tmp_path, csv_inventory):
    path = tmp_path / "site.xlsx"
    write_synthetic_inventory(path, N, seed=4)
    inv = read_inventory(path)
    keys = ("tag", "model", "gain", "tau1", "tau2", "lead", "dead_time", "num", "den", "form", "kc", "ti", "td",
            "kp", "ki", "kd", "action", "sample", "pv_filter", "band_rad_s", "attenuation_db", "inner_loop")
    for a, b in zip(inv.rows, csv_inventory.rows):
        assert [getattr(a, k) for k in keys] == [getattr(b, k) for k in keys]
        assert len(a.errors) == len(b.errors)


def test_some_loops_fail_most_are_stable(csv_inventory):
    from audit.frequency import evaluate

    models = [model_from_row(r) if r.valid and not r.inner_loop else None for r in csv_inventory.rows]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        figs = evaluate(models)
    stable = figs["stable"].dropna().astype(bool)
    assert 0.6 < stable.mean() < 0.99
    ms = figs["ms"].to_numpy(float)
    ms = ms[np.isfinite(ms)]
    assert (ms > 2.0).any() and (ms < 1.6).any()


def test_cli_generate_writes_the_requested_loops(tmp_path):
    path = tmp_path / "cli.xlsx"
    assert main(["generate", "--loops", "50", "--seed", "3", str(path)]) == 0
    inv = read_inventory(path)
    assert len(inv.rows) == 50
    assert Counter(r.valid for r in inv.rows)[True] >= 48
