"""Unit tests of audit.plantdata.packed (a value kept zlib-compressed) and of the model check's overlay kept
drawn (audit.plantdata.report_part.drawn_check): round trips and sizes (common practice: zlib and pickle
round trips are lossless, Python standard library documentation)."""

from __future__ import annotations

import pickle

import numpy as np

from audit.plantdata.modelcheck import CheckTrace, ModelCheck
from audit.plantdata.packed import Packed
from audit.plantdata.report_part import drawn_check, overlay


def test_packed_round_trip_is_exact_and_smaller_for_text():
    text = " ".join(f"{x:.1f},{y:.1f}" for x, y in zip(np.linspace(52, 550, 600), 120 + 80 * np.sin(np.arange(600))))
    value = (("Operating record.", text), ("pv against op.", "<svg>" + text[:500] + "</svg>"), 3.0, None)
    p = Packed.of(value)
    assert p.unpack() == value and p.unpack() is not p.unpack()      # a new copy at each call
    assert p.size == len(p.blob) and p.size < len(text) / 2
    assert pickle.loads(pickle.dumps(p)).unpack() == value           # crosses a process boundary


def test_drawn_check_keeps_the_overlay_the_report_draws():
    t = np.arange(0.0, 3600.0, 6.0)
    pv = 40 + 5 * np.tanh((t - 900) / 300)
    trace = CheckTrace(t, pv, pv + 0.1, None, 0.0, 3594.0, float(pv.min()), float(pv.max() + 0.1))
    mc = ModelCheck("confirmed", model_fit_pct=91.0, trace=trace)
    kept = drawn_check(mc)
    assert kept.trace is None and kept.drawn.unpack() == overlay(trace)
    assert kept.model_fit_pct == 91.0 and kept.verdict == "confirmed"
    assert kept.drawn.size < len(pickle.dumps(trace))
    bare = ModelCheck("not checked", note="no data record found")
    assert drawn_check(bare) is bare
