"""Unit tests of audit.multiloop.report and templates/groups.html.j2 (regression and escaping, invented data)."""

from __future__ import annotations

import numpy as np

from audit.multiloop.report import group_nyquist_chart, group_sections
from audit.render import draw, render_html
from audit.report import build_report

from .test_stage import BLEND, BLEND_C, OTHER, WRONG, WRONG_C, run


def test_group_sections_and_page(tmp_path):
    loops = [list(r) for r in BLEND] + WRONG + OTHER
    loops[0][0] = "AIC-611<b>"                     # spreadsheet text: must stay inert in the page
    cpl = [[("AIC-611<b>" if c[0] == "AIC-611" else c[0]), ("AIC-611<b>" if c[1] == "AIC-611" else c[1])] + c[2:]
           for c in BLEND_C] + WRONG_C
    audit = run(tmp_path, loops, cpl)
    secs = group_sections(audit)
    assert [s.gid for s in secs] == ["G1", "G2"]
    g1, g2 = secs
    assert g1.stable and not g2.stable and g2.rhp_closed == 1
    assert np.isnan(g2.sigma_peak) and np.isfinite(g1.sigma_peak)
    assert len(g1.couplings) == 2 and g1.couplings[0].model.startswith("fopdt, K = -0.6")
    assert [l.status_alone for l in g1.loops] == ["passes", "passes"]
    assert abs(g1.rga_ss[0][0] - 0.75) < 1e-12          # closed form 1/(1 - (-0.6)(0.5)/(0.9 x 1.0))
    chart = group_nyquist_chart(g1, "gnyq-g1")
    assert chart.title == "Generalised Nyquist curve of group G1" and chart.marks[0].label == "critical point \u22121"
    report = build_report(audit)
    html = render_html(report, draw(report))
    assert 'id="group-g1"' in html and 'id="group-g2"' in html
    assert "Generalised Nyquist curve of group G1" in html
    assert "The group is unstable with all its loops closed" in html
    assert "AIC-611<b>" not in html and "AIC-611&lt;b&gt;" in html
