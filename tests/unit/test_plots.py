"""Chart data of audit.plots: geometry (clipping, thinning, simplification) against closed forms, axes and
ticks (common practice), what every chart must show, and that the report path does not use matplotlib.
Regression tests of this tool's own presentation rules unless a test says otherwise."""

from __future__ import annotations

import math
import subprocess
import sys

import numpy as np
import pytest

from audit import plots
from audit.report import Tally, build_report

from .test_report_support import make_audit


def _dist_to_polyline(p: np.ndarray, line: np.ndarray) -> np.ndarray:
    """Distance of each point of ``p`` to the polyline ``line`` (brute force). [px]"""
    a, b = line[:-1], line[1:]
    d = b - a
    L2 = np.maximum((d ** 2).sum(axis=1), 1e-300)
    t = np.clip(((p[:, None, :] - a[None]) * d[None]).sum(axis=2) / L2[None], 0, 1)
    q = a[None] + t[..., None] * d[None]
    return np.sqrt(((p[:, None, :] - q) ** 2).sum(axis=2)).min(axis=1)


def test_clipping_enters_and_leaves_at_the_exact_border():
    """Closed form: the line y = x from (-1,-1) to (3,3) inside [0,2]x[0,2] runs from (0,0) to (2,2)."""
    parts = plots.clip_polyline(np.array([[-1.0, -1.0], [1.0, 1.0], [3.0, 3.0]]), 0, 0, 2, 2)
    assert len(parts) == 1
    np.testing.assert_allclose(parts[0], [[0, 0], [1, 1], [2, 2]], atol=1e-12)


def test_clipping_breaks_at_gaps_and_drops_what_lies_outside():
    p = np.array([[0.5, 0.5], [1.5, 0.5], [5.0, 0.5], [5.0, 1.0], [1.5, 1.5], [np.nan, np.nan], [0.2, 0.2], [0.4, 0.4]])
    parts = plots.clip_polyline(p, 0, 0, 2, 2)
    assert len(parts) == 3
    np.testing.assert_allclose(parts[0], [[0.5, 0.5], [1.5, 0.5], [2.0, 0.5]], atol=1e-12)
    assert parts[1][0][0] == pytest.approx(2.0) and parts[1][-1] == pytest.approx([1.5, 1.5])
    np.testing.assert_allclose(parts[2], [[0.2, 0.2], [0.4, 0.4]])
    assert plots.clip_polyline(np.array([[5.0, 5.0], [6.0, 7.0]]), 0, 0, 2, 2) == []


def test_thinning_keeps_ends_and_extremes():
    x = np.arange(5000.0)
    y = np.sin(x / 300.0) + 0.01 * np.cos(x)
    y[3217] = 9.0                                     # a narrow peak (e.g. the Ms peak)
    p = plots.thin(np.column_stack([x, y]), 400)
    assert len(p) <= 400
    assert p[0, 0] == 0 and p[-1, 0] == 4999
    assert p[:, 1].max() == 9.0 and p[:, 1].min() == y.min()
    assert np.all(np.diff(p[:, 0]) > 0)


def test_simplification_stays_within_its_tolerance():
    """Every original point stays within passes x tol of the simplified line; a straight run collapses."""
    x = np.linspace(0, 300, 2000)
    p = np.column_stack([x, 80 + 60 * np.sin(x / 40.0)])
    s = plots.simplify(p, tol=0.2, passes=4)
    assert len(s) < len(p) / 3 and (s[0] == p[0]).all() and (s[-1] == p[-1]).all()
    assert _dist_to_polyline(p, s).max() <= 0.8 + 1e-9
    line = np.column_stack([x, 2 * x + 1])
    assert len(plots.simplify(line, passes=12)) == 2


@pytest.mark.parametrize("k, text", [(-3, "0.001"), (-1, "0.1"), (0, "1"), (2, "100"), (3, "1000"),
                                     (4, "10\u2074"), (-5, "10\u207b\u2075")])
def test_decade_labels(k, text):
    assert plots.decade_label(k) == text


def test_linear_ticks_are_round_and_cover_the_range():
    lo, hi, ticks = plots.linear_range(-63.0, 27.0, 6)
    assert lo <= -63 and hi >= 27 and ticks[0] == lo and ticks[-1] == hi
    steps = np.diff(ticks)
    assert np.allclose(steps, steps[0]) and steps[0] in (10.0, 20.0, 25.0)
    assert plots.tick_label(-20.0, 10.0) == "\u221220" and plots.tick_label(0.25, 0.25) == "0.25"
    assert plots.tick_label(-1e-17, 0.5) == "0.0"


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    return build_report(make_audit(tmp_path_factory.mktemp("out")), plot_limit=3)


def _inside(c: plots.Chart, s: plots.Series) -> bool:
    f = c.frame
    return all((q[:, 0] >= f.x0 - 1e-9).all() and (q[:, 0] <= f.x1 + 1e-9).all() and
               (q[:, 1] >= f.y0 - 1e-9).all() and (q[:, 1] <= f.y1 + 1e-9).all() for q in s.pieces)


def test_every_series_is_inside_its_frame_and_short(report):
    for d in report.details:
        for c in plots.loop_charts(d.plots):
            assert c.key.startswith(d.anchor) and c.frame.xtitle and "[" in c.frame.xtitle
            assert c.legend and len(c.frame.xticks) >= 2 and len(c.frame.yticks) >= 2
            for s in c.series:
                assert sum(len(q) for q in s.pieces) <= plots.MAX_POINTS
                assert _inside(c, s), (c.key, s.label)
            styles = [(s.style.colour, s.style.dash, s.style.marker) for s in c.series if s.label]
            dashes = [(dash, marker) for _, dash, marker in styles]
            assert len(set(dashes)) == len(dashes), c.key       # told apart without colour


def test_gain_chart_keeps_the_sensitivity_peak(report):
    """The highest point of the drawn |S| is the peak of |S| on the grid (the Ms peak is not thinned away)."""
    d = report.details[0]
    fd = d.plots.frequency
    c = plots.gain_chart(fd, "k")
    s = next(s for s in c.series if s.label.startswith("|S|"))
    top = min(q[:, 1].min() for q in s.pieces)                   # pixels grow downwards
    ys = {t.label: t.pos for t in c.frame.yticks}
    v = [float(k.replace("\u2212", "-")) for k in ys]
    slope = (ys[c.frame.yticks[1].label] - ys[c.frame.yticks[0].label]) / (v[1] - v[0])
    peak_db = 20 * np.log10(np.abs(fd.S).max())
    assert top == pytest.approx(ys[c.frame.yticks[0].label] + slope * (peak_db - v[0]), abs=0.05)


def test_nyquist_axes_have_one_scale_and_show_the_critical_point(report):
    fd = report.details[0].plots.frequency
    c = plots.nyquist_chart(fd, "n")
    def per_unit(ticks):
        v = [float(t.label.replace("\u2212", "-")) for t in ticks]
        return abs((ticks[-1].pos - ticks[0].pos) / (v[-1] - v[0]))
    assert per_unit(c.frame.xticks) == pytest.approx(per_unit(c.frame.yticks), rel=1e-9)
    crit = c.marks[0]
    assert c.frame.x0 < crit.x < c.frame.x1 and c.frame.y0 < crit.y < c.frame.y1
    centre = c.shades[0].outline[:-1].mean(axis=0)          # closed outline: last point = first
    assert centre == pytest.approx([crit.x, crit.y], abs=0.05)
    radius = np.hypot(*(c.shades[0].outline[0] - [crit.x, crit.y]))
    assert radius == pytest.approx(per_unit(c.frame.xticks) / fd.ms_max, rel=1e-6)


def test_status_bars_name_and_hatch_every_status():
    t = [Tally("North", 5, (("unstable", 1), ("fails", 2), ("passes", 2))), Tally("South", 1, (("passes", 1),))]
    c = plots.status_mix(t, ["unstable", "fails", "passes"])
    assert [e.label for e in c.legend] == ["\u2716 unstable", "\u25b2 fails", "\u2713 passes"]
    assert all(b.pattern for b in c.bars if b.status != "passes")
    assert sum(b.count for b in c.bars) == 6
    widths = {(b.status, round(b.w, 6)) for b in c.bars}
    assert len({w for s, w in widths if s == "passes"}) == 2          # 2 loops and 1 loop: different lengths


def test_the_report_path_does_not_import_matplotlib(tmp_path):
    code = ("import sys; from tests.unit.test_report_support import make_audit; "
            "from audit.report import build_report; from audit.render import draw, render_html; "
            f"r = build_report(make_audit({str(tmp_path)!r}), plot_limit=3); render_html(r, draw(r)); "
            "print('matplotlib' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         cwd=str(__import__("pathlib").Path(__file__).resolve().parents[2]))
    assert out.stdout.strip().splitlines()[-1] == "False"
