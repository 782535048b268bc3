"""Charts as inline SVG text: the writer of every chart of the report.

:mod:`audit.plots` (and :mod:`audit.health_charts`, :mod:`audit.multiloop.report`) compute what a chart
shows, every coordinate already scaled to the chart's pixels; :func:`chart_html` writes it as a
``<figure>``: the title as page text, the plot as an ``<svg>`` element, the legend as page text
under it. The text is built directly from the chart's numpy arrays (one join per polyline), not
through a template: a report of many loops carries hundreds of charts of hundreds of points each.

Rules:

* every coordinate and length is written to 0.1 px (:func:`px`, :func:`points`), never ``-0.0``, so
  the same chart gives the same bytes;
* every text of a chart (title, description, tick labels, axis titles, legend labels, ids, which
  start with the chart's key) is escaped for HTML, so inventory text (tags, area names) stays inert;
* the layout of a chart (:attr:`audit.plots.Chart.layout`) says which parts it draws, in order.
"""

from __future__ import annotations

from typing import Any, Callable

import numpy as np
from markupsafe import escape

__all__ = ["LAYOUTS", "chart_html", "points", "px"]


def _esc(text: Any) -> str:
    return str(escape(text))


def px(value: Any) -> str:
    """A chart coordinate or length as SVG text: 0.1 px, never '-0.0' (same input, same bytes).

    Parameters
    ----------
    value : float
        Coordinate or length. [px]
    """
    text = f"{float(value):.1f}"
    return "0.0" if text == "-0.0" else text


def points(pts: Any) -> str:
    """``pts``, an (n, 2) array of chart pixels, as the text of an SVG ``points`` attribute (0.1 px).

    The coordinates are rounded to tenths (``np.round``, ``-0.0`` made ``0.0``); the shortest text of
    such a number is its one-decimal text, so ``repr`` writes each one as ``f"{x:.1f}"`` would.
    """
    arr = np.round(np.asarray(pts, float), 1) + 0.0     # + 0.0 turns -0.0 into 0.0
    if arr.size == 0:
        return ""
    xs = map(repr, arr[:, 0].tolist())
    ys = map(repr, arr[:, 1].tolist())
    return " ".join(map(",".join, zip(xs, ys)))


def _stroke(st) -> str:
    out = f'stroke="{_esc(st.colour)}" stroke-width="{_esc(st.width)}"'
    return out + f' stroke-dasharray="{_esc(st.dash)}"' if st.dash else out


def _marker(shape: str, x: float, y: float, colour: str) -> str:
    c = _esc(colour)
    if shape == "circle":
        return f'<circle cx="{px(x)}" cy="{px(y)}" r="2.6" fill="#fff" stroke="{c}" stroke-width="1.2"/>'
    if shape == "square":
        return (f'<rect x="{px(x - 2.5)}" y="{px(y - 2.5)}" width="5" height="5" fill="#fff" stroke="{c}" '
                f'stroke-width="1.2"/>')
    if shape == "triangle":
        return f'<path d="M{px(x)},{px(y - 3.6)} L{px(x + 3.2)},{px(y + 2)} L{px(x - 3.2)},{px(y + 2)} Z" fill="{c}"/>'
    if shape == "cross":
        return (f'<path d="M{px(x - 5)},{px(y - 5)} L{px(x + 5)},{px(y + 5)} M{px(x - 5)},{px(y + 5)} '
                f'L{px(x + 5)},{px(y - 5)}" stroke="{c}" stroke-width="2.2"/>')
    return ""


_HATCH = {
    "diagonal": '<path d="M-1,1 L1,-1 M0,6 L6,0 M5,7 L7,5" stroke="{c}" stroke-width="1.1"/>\n',
    "cross": '<path d="M-1,1 L1,-1 M0,6 L6,0 M5,7 L7,5 M-1,5 L1,7 M0,0 L6,6 M5,-1 L7,1" stroke="{c}" stroke-width="1"/>\n',
    "dots": '<circle cx="3" cy="3" r="1.2" fill="{c}"/>\n',
    "horizontal": '<path d="M0,3 L6,3" stroke="{c}" stroke-width="1.2"/>\n',
    "vertical": '<path d="M3,0 L3,6" stroke="{c}" stroke-width="1.2"/>\n',
}


def _pattern(pat, pid: str) -> str:
    bg = f'<rect width="6" height="6" fill="{_esc(pat.background)}"/>' if pat.background else ""
    hatch = _HATCH.get(pat.kind, "").replace("{c}", _esc(pat.colour))
    return f'<pattern id="{_esc(pid)}" patternUnits="userSpaceOnUse" width="6" height="6">\n{bg}{hatch}</pattern>'


def _open(c) -> str:
    k = _esc(c.key)
    w, h = px(c.width), px(c.height)
    return (f'<svg xmlns="http://www.w3.org/2000/svg" class="plot" id="{k}" viewBox="0 0 {w} {h}" width="{w}" '
            f'height="{h}" role="img" aria-labelledby="{k}-t {k}-d" font-family="DejaVu Sans, Verdana, sans-serif" '
            f'font-size="9">\n<title id="{k}-t">{_esc(c.title)}</title>\n<desc id="{k}-d">{_esc(c.desc)}</desc>')


def _defs(c) -> str:
    if not c.patterns:
        return ""
    return "<defs>\n" + "".join(_pattern(p, p.id) for p in c.patterns) + "</defs>\n"


def _frame(c) -> str:
    f = c.frame
    x0, y0, x1, y1 = px(f.x0), px(f.y0), px(f.x1), px(f.y1)
    grid = []
    if f.xgrid:
        grid += [f"M{px(t.pos)},{y0} V{y1} " for t in f.xticks]
    if f.ygrid:
        grid += [f"M{x0},{px(t.pos)} H{x1} " for t in f.yticks]
    xlab_y = px(f.y1 + 14)
    ylab_x = px(f.x0 - 4)
    out = [f'<rect x="{x0}" y="{y0}" width="{px(f.x1 - f.x0)}" height="{px(f.y1 - f.y0)}" fill="#fff"/>\n',
           f'<path d="{"".join(grid)}M0,0" fill="none" stroke="#cfcfcf" stroke-width="0.6"/>\n',
           '<g fill="#000" text-anchor="middle">\n',
           "".join(f'<text x="{px(t.pos)}" y="{xlab_y}">{_esc(t.label)}</text>' for t in f.xticks),
           '</g>\n<g fill="#000" text-anchor="end">\n',
           "".join(f'<text x="{ylab_x}" y="{px(t.pos + 3)}">{_esc(t.label)}</text>' for t in f.yticks),
           "</g>\n"]
    if f.xtitle:
        out.append(f'<text x="{px((f.x0 + f.x1) / 2)}" y="{px(f.y1 + 28)}" font-size="10" text-anchor="middle" '
                   f'fill="#000">{_esc(f.xtitle)}</text>')
    if f.ytitle:
        out.append(f'<text transform="translate(11,{px((f.y0 + f.y1) / 2)}) rotate(-90)" font-size="10" '
                   f'text-anchor="middle" fill="#000">{_esc(f.ytitle)}</text>')
    return "".join(out)


def _border(c) -> str:
    f = c.frame
    return (f'<rect x="{px(f.x0)}" y="{px(f.y0)}" width="{px(f.x1 - f.x0)}" height="{px(f.y1 - f.y0)}" fill="none" '
            f'stroke="#000" stroke-width="0.8"/>')


def _series(c) -> str:
    out = []
    for s in c.series:
        stroke = _stroke(s.style)
        for piece in s.pieces:
            out.append(f'<polyline points="{points(piece)}" fill="none" {stroke} stroke-linejoin="round"/>\n')
        for m in s.markers:
            out.append(_marker(s.style.marker, m[0], m[1], s.style.colour))
    return "".join(out)


def _shades(c) -> str:
    out = []
    for sh in c.shades:
        pts = points(sh.outline)
        edge = " " + _stroke(sh.edge) if sh.edge else ' stroke="none"'
        out.append(f'<polygon points="{pts}" fill="{_esc(sh.colour)}" fill-opacity="0.14"/>\n'
                   f'<polygon points="{pts}" fill="url(#{_esc(sh.pattern)})"{edge}/>\n')
    return "".join(out)


def _marks(c) -> str:
    return "".join(_marker(m.shape, m.x, m.y, m.colour) for m in c.marks)


def _bars(c) -> str:
    out = ['<g stroke="#fff" stroke-width="0.8">\n']
    for b in c.bars:
        box = f'x="{px(b.x)}" y="{px(b.y)}" width="{px(b.w)}" height="{px(b.h)}"'
        out.append(f'<rect {box} fill="{_esc(b.colour)}"><title>{_esc(b.status)}: {_esc(b.count)}</title></rect>\n')
        if b.pattern:
            out.append(f'<rect {box} fill="url(#{_esc(b.pattern)})" stroke="none"/>')
    out.append("</g>")
    return "".join(out)


def _legend(c) -> str:
    out = ['<p class="legend">\n']
    for e in c.legend:
        whole = " whole" if len(e.label) <= 34 else ""
        if e.kind == "line":
            key = f'<line x1="1" y1="5" x2="25" y2="5" {_stroke(e.style)}/>'
            if e.style.marker:
                key += _marker(e.style.marker, 13, 5, e.style.colour)
        elif e.kind == "mark":
            key = _marker(e.shape, 13, 5, e.colour)
        else:
            shade = ' fill-opacity="0.14"' if e.kind == "shade" else ""
            key = f'<rect x="1" y="0.5" width="24" height="9" fill="{_esc(e.colour)}"{shade}/>'
            for pat in c.patterns:
                if pat.id == e.pattern:
                    edge = " " + _stroke(e.style) if e.style else ' stroke="none"'
                    key += (f"<defs>{_pattern(pat, pat.id + '-key')}</defs><rect x=\"1\" y=\"0.5\" width=\"24\" "
                            f"height=\"9\" fill=\"url(#{_esc(pat.id)}-key)\"{edge}/>")
        out.append(f'<span class="entry{whole}"><svg class="key" viewBox="0 0 26 10" width="26" height="10" '
                   f'aria-hidden="true">{key}</svg>&nbsp;{_esc(e.label)}</span>\n')
    out.append("</p>")
    return "".join(out)


LAYOUTS: dict[str, tuple[Callable[[Any], str], ...]] = {
    "frequency": (_defs, _frame, _shades, _series, _border),
    "nyquist": (_defs, _frame, _shades, _series, _marks, _border),
    "time": (_defs, _frame, _series, _border),
    "health": (_defs, _frame, _series, _marks, _border),
    "status-bars": (_defs, _frame, _bars, _border),
}
"""The parts each layout of chart draws inside its ``<svg>``, in order (the figure's class is
``chart-<layout>``)."""


def chart_html(chart) -> str:
    """One chart as a ``<figure>``: title, the plot as an ``<svg>`` element, the legend as page text.

    Parameters
    ----------
    chart : audit.plots.Chart
        The chart data; ``chart.layout`` is a key of :data:`LAYOUTS`.
    """
    parts = LAYOUTS[chart.layout]
    body = "\n".join(part(chart) for part in parts)
    return (f'<figure class="chart chart-{chart.layout}">\n<figcaption class="chart-title">{_esc(chart.title)}'
            f'</figcaption>\n{_open(chart)}\n{body}\n</svg>\n{_legend(chart)}\n</figure>').strip()
