"""Rendering: filters, the jinja2 environment, the restricted fetcher, deterministic SVG, the HTML page.

Regression tests of this tool's own presentation rules (common practice), apart from
the two checks marked as validation.
"""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
from markupsafe import escape

from audit import plots
from audit.render import (BREAK_EVERY, LONG_RUN, OutputFolderFetcher, draw, environment, fmt_num, fmt_status,
                          render_chart, render_html)
from audit.report import Tally, build_report

from .test_report_support import HOSTILE_AREA, HOSTILE_SERVICE, HOSTILE_TAG, make_audit


@pytest.mark.parametrize("value, text", [
    (None, "\u2013"), (math.nan, "\u2013"), (math.inf, "\u221e"), (-math.inf, "\u2212\u221e"),
    (True, "yes"), (3, "3"), (1.23456, "1.23"), (-0.5, "\u22120.5"), (12345.6, "12,346"),
    (0.0, "0"), (2.5e-5, "2.5e\u221205"), ((1.0, 0.5), "1, 0.5"), ("FC-1", "FC-1"), (np.float64(2.0), "2"),
])
def test_number_filter(value, text):
    assert fmt_num(value) == text


def test_status_is_given_by_word_and_symbol():
    for s in ("unstable", "fails", "marginal", "passes", "invalid"):
        word_and_symbol = fmt_status(s)
        assert word_and_symbol.endswith(s) and len(word_and_symbol) > len(s) + 1


def test_environment_escapes_whatever_the_template_name():
    env = environment()
    assert env.autoescape is True
    assert env.from_string("{{ x }}").render(x="<script>") == "&lt;script&gt;"
    assert {"num", "status", "verdict", "css"} <= set(env.filters)



def test_long_runs_get_break_opportunities_and_stay_escaped():
    """Common practice: a zero-width space (U+200B) is a break opportunity that shows nothing; markup inside a
    long word is cut before escaping, so no entity is split and no tag survives."""
    brk = environment().from_string("{{ x|brk }}").render
    assert brk(x="FIC-332 thickening tank 2 outlet") == "FIC-332 thickening tank 2 outlet"   # normal words
    assert brk(x="a" * LONG_RUN) == "a" * LONG_RUN
    word = "b" * 95
    out = brk(x="area " + word + " end")
    pieces = out.split(" ")[1].split("\u200b")
    assert out.replace("\u200b", "") == "area " + word + " end"
    assert [len(p) for p in pieces] == [BREAK_EVERY] * 4 + [95 - 4 * BREAK_EVERY]
    hostile = "<script>alert(1)</script>" * 4 + "&amp;" * 10
    out = brk(x=hostile)
    assert "<" not in out and ">" not in out and "\u200b" in out
    assert out.replace("\u200b", "") == str(escape(hostile))
    assert re.search(r"&(?!(amp|lt|gt|#34|#39);)", out) is None      # every '&' starts a whole entity
    assert brk(x=None) == "None" and brk(x=2.5) == "2.5"


def test_fetcher_reads_data_uris_and_the_output_folder_only(tmp_path):
    inside = tmp_path / "out"
    inside.mkdir()
    (inside / "a.css").write_text("p{}")
    (tmp_path / "secret.txt").write_text("no")
    f = OutputFolderFetcher(inside)
    assert f((inside / "a.css").as_uri())["string"] == b"p{}"
    got = f("data:text/plain;base64,aGk=")
    assert (got.get("string") or got["file_obj"].read()) == b"hi"
    for url in ("http://example.invalid/font.woff", "https://example.invalid/x.png",
                (tmp_path / "secret.txt").as_uri(), (inside / ".." / "secret.txt").as_uri(), "ftp://x/y"):
        with pytest.raises(ValueError, match="refused"):
            f(url)


@pytest.fixture(scope="module")
def page(tmp_path_factory):
    audit = make_audit(tmp_path_factory.mktemp("out"))
    report = build_report(audit, plot_limit=2)
    return audit, report, render_html(report, draw(report))


def test_html_escapes_inventory_text(page):
    _, _, html = page
    assert HOSTILE_TAG not in html and "<b>" not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "&lt;b&gt;" in html
    assert "=HYPERLINK(&#34;http://example.invalid/x&#34;" in html or HOSTILE_SERVICE not in html
    assert len(re.findall(r"<script", html, flags=re.I)) == 0


def test_html_is_self_contained(page):
    _, _, html = page
    assert not re.search(r"""(src|href)\s*=\s*["']?(https?:|//)""", html, flags=re.I)
    assert "@import" not in html and "url(http" not in html
    assert "<link" not in html


def test_html_names_every_loop_and_carries_the_caution(page):
    audit, _, html = page
    for r in audit.inventory.rows:
        assert (r.tag if r.tag != HOSTILE_TAG else "&lt;script&gt;alert(1)&lt;/script&gt;") in html
    for words in ("Advisory only", "management-of-change", "safety instrumented function", "Local rules govern",
                  "licensed"):
        assert words in html


def test_html_ids_are_unique(page):
    _, _, html = page
    ids = re.findall(r'\sid="([^"]+)"', html)
    assert len(ids) == len(set(ids)), [i for i in ids if ids.count(i) > 1][:5]
    for target in re.findall(r'href="#([^"]+)"', html):
        assert target in ids, target


def test_ranking_fallback_is_said(page):
    assert "ranking stage did not run" in page[2]


def test_charts_are_deterministic_and_ids_are_prefixed(page):
    _, report, _ = page
    d = report.details[0]
    a = [str(render_chart(c)) for c in plots.loop_charts(d.plots)]
    b = [str(render_chart(c)) for c in plots.loop_charts(d.plots)]
    assert a == b and len(a) >= 4
    for fig in a:
        assert fig.startswith("<figure") and "<svg" in fig and "<?xml" not in fig
        for i in re.findall(r'\sid="([^"]+)"', fig):
            assert i.startswith(d.anchor), i
        for ref in re.findall(r'url\(#([^)]+)\)', fig):
            assert f'id="{ref}"' in fig, ref


def test_chart_labels_from_the_inventory_are_inert():
    t = Tally(HOSTILE_AREA, 3, (("fails", 1), ("passes", 2)))
    fig = str(render_chart(plots.status_mix([t], ["fails", "passes"])))
    assert "<b>" not in fig and "&lt;b&gt;" in fig
    assert "$x$" in fig


def test_print_variant_caps_detail_sections(page, monkeypatch):
    import audit.render as render
    _, report, _ = page
    monkeypatch.setattr(render, "PDF_DETAIL_LIMIT", 1)
    html = render_html(report, draw(report), for_print=True)
    assert html.count('<section class="loop"') == 1
    assert "first 1 of the\n    3 loops" in html or "first 1 of the 3 loops" in " ".join(html.split())


def test_two_renderings_are_identical(page):
    audit, _, html = page
    report = build_report(audit, plot_limit=2)
    assert render_html(report, draw(report)) == html


def test_page_written_piece_by_piece_is_the_page(page, tmp_path):
    """write_html streams the template's pieces to the file: the bytes of the page encoded whole, and
    the page has many pieces (else nothing is streamed) (common practice: same output, less memory)."""
    from audit.render import _html_pieces, write_html
    audit, _, html = page
    report = build_report(audit, plot_limit=2)
    rendered = draw(report)
    path = write_html(tmp_path / "report.html", report, rendered)
    assert path.read_bytes() == html.encode("utf-8")
    assert sum(1 for _ in _html_pieces(report, rendered)) > 100


def test_page_with_a_process_pool_is_the_same_page(page, monkeypatch):
    """--jobs 2: step batches, charts and detail sections in a pool's workers give the bytes of one process
    (common practice: parallel work must not change the output); runs of one section and one chart's loop
    so that every run boundary is crossed."""
    import audit.render as render
    audit, _, html = page
    monkeypatch.setattr(render, "SECTION_CHUNK", 1)
    monkeypatch.setattr(render, "CHART_CHUNK", 1)
    with render._mapper(2) as mapper:
        report = build_report(audit, plot_limit=2, mapper=mapper)
        pooled = render_html(report, draw(report, mapper=mapper), mapper=mapper)
    assert pooled == html


@pytest.mark.parametrize("xy", [[[0.04, -0.04]], [[-0.05, 0.05]], [[12.25, -7.35]], [[123456.78, 1e-9]],
                                [[-3.0, 99.95]], [[0.15, 0.25]]])
def test_svg_points_are_fixed_point_tenths(xy):
    """The writer's coordinate text equals Python's fixed-point formatting of the value rounded to 0.1 px
    ('{:.1f}' of numpy's round), '-0.0' written '0.0' (common practice: same chart, same bytes)."""
    from audit.svg import points, px
    arr = np.asarray(xy, float)
    want = " ".join(",".join(("0.0" if t == "-0.0" else t) for t in (f"{v:.1f}" for v in np.round(p, 1)))
                    for p in arr)
    assert points(arr) == want
    assert px(arr[0, 0]) == ("0.0" if f"{arr[0, 0]:.1f}" == "-0.0" else f"{arr[0, 0]:.1f}")
