"""Unit tests of batched identification (audit.plantdata.identify.identify_many): a record's result does
not depend on the batch it is in (records of several lengths, sample intervals and segments mixed, one or
two processes), and a bad record gets its own refusal and never stops the others (behaviour; data from the
independent simulator in tests/reference/plant_sim.py)."""

from __future__ import annotations

import json

import numpy as np
import pytest

from audit.cli import main
from audit.plantdata.identify import Arrays, identify_arrays, identify_many, identify_record
from audit.plantdata.records import read_record
from tests.reference.plant_sim import open_loop

CASES = [
    ("fopdt", {"gain": 1.5, "tau1": 30.0, "dead_time": 7.35}, 1500, 1.0),
    ("sopdt", {"gain": 2.0, "tau1": 40.0, "tau2": 10.0, "tau_lead": 5.0, "dead_time": 4.6}, 3000, 1.0),
    ("ipdt", {"gain": 0.01, "dead_time": 3.3}, 2400, 1.0),
    ("fopdt", {"gain": -0.8, "tau1": 8.0, "dead_time": 1.0}, 600, 0.5),
    ("fopdt", {"gain": 0.9, "tau1": 120.0, "dead_time": 30.0}, 6000, 2.0),
]


def _case(k: int):
    model, p, n, dt = CASES[k]
    rng = np.random.default_rng(50 + k)
    op = np.full(n, 40.0)
    for j, at in enumerate((n // 6, n // 2, 5 * n // 6)):
        op[at:] = 40.0 + (5.0, -3.0, 2.0)[j] * (1 if model != "ipdt" or j != 1 else -2)
    pv = 50 + open_loop(model, p, op, dt) + 0.2 * rng.standard_normal(n)
    return Arrays(op, pv, dt, name=f"case{k}")


def _same(a, b):
    """The same result to rounding: records of one length are batched without padding, so each record's
    arithmetic is its own (every fit, not only the chosen one, which a degenerate fit would expose)."""
    assert a.identifiable == b.identifiable and a.notes == b.notes
    if a.best is None:
        return
    assert a.best.model == b.best.model and set(a.fits) == set(b.fits)
    for m in a.fits:
        for k, v in a.fits[m].params.items():
            assert v == pytest.approx(b.fits[m].params[k], rel=1e-12, abs=1e-12), (m, k)
            assert a.fits[m].ci95[k] == pytest.approx(b.fits[m].ci95[k], rel=1e-9, abs=1e-12), (m, k)
    assert a.best.fit_pct == pytest.approx(b.best.fit_pct, abs=1e-9)
    assert a.best.fit_holdout_pct == pytest.approx(b.best.fit_holdout_pct, abs=1e-9)


def test_batch_equals_one_record_at_a_time():
    items = [_case(k) for k in range(len(CASES))]
    batch = identify_many(items)
    assert [r.name for r in batch] == [f"case{k}" for k in range(len(CASES))]
    for it, r in zip(items, batch):
        _same(r, identify_arrays(it.op, it.pv, it.dt, name=it.name))
    assert [r.best.model for r in batch] == [c[0] for c in CASES]


def test_two_processes_equal_one():
    items = [_case(k % len(CASES)) for k in range(16)]
    one = identify_many(items, jobs=1)
    two = identify_many(items, jobs=2)
    for a, b in zip(one, two):
        _same(a, b)
    short = identify_many(items[:3], jobs=2, summarise=lambda r: r.best.model)   # too few for workers: here
    assert short == [r.best.model for r in one[:3]]


def _csv(path, a: Arrays, gap_after: int | None = None):
    rows = ["time_s,pv,op"]
    for k in range(len(a.op)):
        t = k * a.dt + (900 if gap_after is not None and k > gap_after else 0)
        rows.append(f"{t:g},{a.pv[k]:.6f},{a.op[k]:g}")
    path.write_text("\n".join(rows) + "\n", encoding="utf-8")
    return path


def test_records_with_segments_and_lengths_mixed(tmp_path):
    """Records read from files (one with a gap: the longest segment is used) batched with plain arrays."""
    a, b, c = _case(0), _case(3), _case(2)
    ra = read_record(_csv(tmp_path / "a.csv", a, gap_after=1100))
    rb = read_record(_csv(tmp_path / "b.csv", b))
    batch = identify_many([ra, c, rb])
    singles = [identify_record(ra), identify_arrays(c.op, c.pv, c.dt, name=c.name), identify_record(rb)]
    for x, y in zip(batch, singles):
        _same(x, y)
    assert any("segments; the longest (lines 2-1102) used" in n for n in batch[0].notes)
    assert batch[0].segment_lines == (2, 1102) and len(batch[0].pv) == 1101


def test_bad_records_refused_on_their_own(tmp_path):
    good = [_case(0), _case(2)]
    n = 800
    nan = Arrays(good[0].op[:n], np.where(np.arange(n) == 300, np.nan, good[0].pv[:n]), 1.0, name="nan")
    flat = Arrays(np.full(n, 40.0), good[0].pv[:n], 1.0, name="flat")
    uneven = Arrays(good[0].op[:n], good[0].pv[:n - 5], 1.0, name="uneven")
    still = Arrays(good[0].op, np.full(len(good[0].op), 50.0), 1.0, name="still")   # pv never moves
    x = tmp_path / "x.csv"
    x.write_text("time_s,pv\n" + "".join(f"{k},{50 + k % 7}\n" for k in range(200)), encoding="utf-8")
    no_op = read_record(x)
    out = identify_many([nan, good[0], flat, uneven, still, good[1], no_op])
    assert [r.identifiable for r in out] == [False, True, False, False, False, True, False]
    assert "must be finite" in out[0].notes[-1]
    assert "op moved only 0 %" in out[2].notes[-1]
    assert "of equal length" in out[3].notes[-1]
    assert "fits only" in out[4].notes[-1] or "not determined" in out[4].notes[-1] or \
        "no model could be fitted" in out[4].notes[-1]
    assert "no op column" in out[6].notes[-1]
    _same(out[1], identify_arrays(good[0].op, good[0].pv, 1.0, name="case0"))
    _same(out[5], identify_arrays(good[1].op, good[1].pv, 1.0, name="case2"))


def test_command_with_several_records(tmp_path, capsys):
    a = _csv(tmp_path / "a.csv", _case(0))
    b = _csv(tmp_path / "b.csv", _case(3))
    assert main(["identify", str(a), str(b), "--json", "--jobs", "2"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert [r["best"]["model"] for r in data["records"]] == ["fopdt", "fopdt"]
    assert data["records"][0]["best"]["params"]["gain"] == pytest.approx(1.5, rel=0.02)
    assert main(["identify", str(a), str(tmp_path / "none.csv")]) == 2
    captured = capsys.readouterr()
    assert "file not found" in captured.err and "model         fopdt" in captured.out
