"""Charts of the audit report as data for the SVG writer (:mod:`audit.svg`).

Drawing is split in two: this module computes what a chart shows — every
coordinate already scaled to the chart's own pixel frame, tick positions and
their labels, legend places — and :func:`audit.svg.chart_html` writes the SVG
(:func:`audit.render.draw`). No markup is built here.

Rules every chart follows:

* scaled coordinates are rounded when written (0.1 px), so the same report gives
  the same bytes; every id inside a chart starts with the chart's key, which
  starts with the loop's anchor, so ids never clash in the page;
* a polyline keeps at most :data:`MAX_POINTS` points: it is cut to the plot
  area (Liang-Barsky, exact) and thinned by keeping, in each run of points, the
  lowest and the highest one, so peaks (the Ms peak) survive;
* colours come from the Okabe-Ito colour-blind-safe set [1]_; every series also
  differs by dash pattern and/or markers, shaded regions are hatched, and status
  bars carry a hatch per status besides the status word in the legend;
* text is black on white, at least :data:`FONT_SMALL` px in a chart about
  :data:`WIDTH` px wide (about 7 pt when printed half a page wide).

References
----------
.. [1] M. Okabe and K. Ito, "Color Universal Design (CUD): how to make figures and
   presentations that are friendly to colorblind people", 2008.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from .curves import FrequencyData, LoopPlots, ResidualData, StepData
from .report import Tally

# Okabe-Ito
BLACK = "#000000"
ORANGE = "#E69F00"
SKY = "#56B4E9"
GREEN = "#009E73"
BLUE = "#0072B2"
VERMILLION = "#D55E00"
PURPLE = "#CC79A7"
GREY = "#767676"

MAX_POINTS = 400
"""Most points of one plotted series. [-]"""

WIDTH = 360.0
"""Width of a chart in its own units (px). [-]"""

FONT = 10.0
"""Size of axis titles. [px]"""

FONT_SMALL = 9.0
"""Size of tick labels and legend text. [px]"""

MARKERS_PER_SERIES = 7
"""Markers spread along a series that carries markers. [-]"""

STATUS_COLOURS: dict[str, str] = {
    "unstable": VERMILLION, "fails": PURPLE, "marginal": ORANGE, "invalid": GREY,
    "not evaluated": "#BBBBBB", "passes": BLUE,
}
STATUS_HATCHES: dict[str, str] = {
    "unstable": "cross", "fails": "diagonal", "marginal": "dots", "invalid": "horizontal",
    "not evaluated": "vertical", "passes": "",
}
"""A hatch per status, so that status is never told by colour alone."""

STATUS_SYMBOLS: dict[str, str] = {
    "unstable": "\u2716", "fails": "\u25b2", "marginal": "\u25c6", "invalid": "\u25cb",
    "not evaluated": "\u2013", "passes": "\u2713",
}


# ----------------------------------------------------------------------------- chart data


@dataclass(frozen=True)
class Style:
    """How a series is stroked: colour, width [px], dash pattern ('' solid) and marker shape ('' none)."""

    colour: str
    width: float
    dash: str = ""
    marker: str = ""


S_AS_TUNED = Style(BLUE, 2.0)
L_STYLE = Style(BLACK, 1.2, "7 2 1.5 2")
T_STYLE = Style(VERMILLION, 1.4, "5 3")
MS_STYLE = Style(PURPLE, 1.3, "2 2")
BAND_STYLE = Style(ORANGE, 1.6)
PROPOSED = Style(GREEN, 1.6, "8 3 2 3", "triangle")
INNER = Style(SKY, 1.6, "4 2", "square")
MIRROR = Style(GREY, 0.8, "1.5 2")
RECORD = Style(GREY, 0.8, "", "circle")
REFERENCE = Style(GREY, 0.8, "3 3")


@dataclass(frozen=True)
class Tick:
    """A tick: position along its axis in chart pixels and its label."""

    pos: float
    label: str


@dataclass(frozen=True)
class Frame:
    """The plot area [px] and its axes: ticks, axis titles, and which ticks get grid lines."""

    x0: float
    y0: float
    x1: float
    y1: float
    xticks: tuple[Tick, ...]
    yticks: tuple[Tick, ...]
    xtitle: str
    ytitle: str
    xgrid: bool = True
    ygrid: bool = True


@dataclass(frozen=True)
class Series:
    """A plotted line: pieces inside the plot area, each an (n, 2) array of pixels, and marker places."""

    label: str
    style: Style
    pieces: tuple[np.ndarray, ...]
    markers: np.ndarray


@dataclass(frozen=True)
class Shade:
    """A shaded, hatched region: outline (n, 2) [px], colour; ``pattern`` is the id of its hatch."""

    label: str
    colour: str
    outline: np.ndarray
    pattern: str
    edge: Style | None = None


@dataclass(frozen=True)
class Mark:
    """One marked point [px]: e.g. the critical point -1."""

    label: str
    x: float
    y: float
    shape: str
    colour: str


@dataclass(frozen=True)
class LegendEntry:
    """A legend line: a sample of a series, of a shade, of a mark or of a bar, and its label."""

    label: str
    kind: str                      # line | shade | mark | bar
    style: Style | None = None
    colour: str = ""
    pattern: str = ""
    shape: str = ""


@dataclass(frozen=True)
class Pattern:
    """A hatch defined in the chart: id, kind (diagonal, cross, dots, horizontal, vertical), ink and
    background colour ('' for none: the hatch is laid over a filled shape)."""

    id: str
    kind: str
    colour: str
    background: str


@dataclass(frozen=True)
class Bar:
    """One segment of a stacked bar [px]."""

    x: float
    y: float
    w: float
    h: float
    status: str
    count: int
    colour: str
    pattern: str


@dataclass(frozen=True)
class Chart:
    """One chart: its key (the SVG id and the prefix of every id inside), layout (a key of
    :data:`audit.svg.LAYOUTS`: which parts are drawn), title, text alternative, size [px], frame and what
    is drawn in it."""

    key: str
    layout: str
    title: str
    desc: str
    width: float
    height: float
    frame: Frame
    series: tuple[Series, ...] = ()
    shades: tuple[Shade, ...] = ()
    marks: tuple[Mark, ...] = ()
    bars: tuple[Bar, ...] = ()
    patterns: tuple[Pattern, ...] = ()
    legend: tuple[LegendEntry, ...] = ()
    caption: str = ""


# ----------------------------------------------------------------------------- geometry


def clip_polyline(p: np.ndarray, x0: float, y0: float, x1: float, y1: float) -> list[np.ndarray]:
    """The parts of a polyline inside a rectangle (Liang-Barsky clipping, vectorised over segments).

    Parameters
    ----------
    p : ndarray
        Points (n, 2); a non-finite point breaks the line. [px]
    x0, y0, x1, y1 : float
        The rectangle, x0 < x1 and y0 < y1. [px]

    Returns
    -------
    list of ndarray
        Pieces, each (m >= 2, 2), in order.
    """
    p = np.asarray(p, float)
    if len(p) < 2:
        return []
    x, y = p[:, 0], p[:, 1]
    ax, ay = x[:-1], y[:-1]
    dx, dy = x[1:] - ax, y[1:] - ay
    fin = np.isfinite(x) & np.isfinite(y)
    if fin.all() and x.min() >= x0 and x.max() <= x1 and y.min() >= y0 and y.max() <= y1:
        # wholly inside: every segment keeps t0 = 0, t1 = 1, so the one piece is the same arithmetic below
        return [np.column_stack([np.concatenate([ax[:1], ax + dx]), np.concatenate([ay[:1], ay + dy])])]
    ok = fin[:-1] & fin[1:]
    ax, ay = np.where(ok, ax, 0.0), np.where(ok, ay, 0.0)
    dx, dy = np.where(ok, dx, 0.0), np.where(ok, dy, 0.0)
    t0 = np.zeros(len(ax))
    t1 = np.ones(len(ax))
    with np.errstate(divide="ignore", invalid="ignore"):
        for pk, qk in ((-dx, ax - x0), (dx, x1 - ax), (-dy, ay - y0), (dy, y1 - ay)):
            r = qk / pk
            ok &= ~((pk == 0) & (qk < 0))
            t0 = np.where(pk < 0, np.maximum(t0, r), t0)
            t1 = np.where(pk > 0, np.minimum(t1, r), t1)
    vis = ok & (t0 <= t1)
    if not vis.any():
        return []
    cax, cay = ax + t0 * dx, ay + t0 * dy
    cbx, cby = ax + t1 * dx, ay + t1 * dy
    prev_vis = np.concatenate([[False], vis[:-1]])
    prev_whole_end = np.concatenate([[False], t1[:-1] >= 1.0])
    start = vis & (~prev_vis | ~prev_whole_end | (t0 > 0.0))
    idx = np.flatnonzero(vis)
    run = np.cumsum(start)[idx]
    out = []
    for seg in np.split(idx, np.flatnonzero(np.diff(run)) + 1):   # runs are consecutive in idx
        out.append(np.column_stack([np.concatenate([cax[seg[:1]], cbx[seg]]),
                                    np.concatenate([cay[seg[:1]], cby[seg]])]))
    return out


def thin(p: np.ndarray, n: int = MAX_POINTS) -> np.ndarray:
    """At most ``n`` points of a polyline: the first, the last, and the lowest and highest of each run.

    Parameters
    ----------
    p : ndarray
        Points (m, 2), finite. [px]
    n : int
        Most points kept (>= 4). [-]
    """
    m = len(p)
    if m <= n:
        return p
    buckets = max(1, (n - 2) // 2)
    k = -(-m // buckets)
    pad = buckets * k - m
    y = np.concatenate([p[:, 1], np.full(pad, p[-1, 1])]).reshape(buckets, k)
    base = np.arange(buckets) * k
    keep = np.concatenate([[0, m - 1], np.minimum(base + np.argmin(y, axis=1), m - 1),
                           np.minimum(base + np.argmax(y, axis=1), m - 1)])
    return p[np.unique(keep)]


SIMPLIFY_PX = 0.2
"""A point closer than this to the chord of its neighbours is dropped (per pass, 4 passes). [px]"""


def simplify(p: np.ndarray, tol: float = SIMPLIFY_PX, passes: int = 4) -> np.ndarray:
    """Drop points that lie (within ``tol``) on the line through their neighbours.

    Each pass looks at every second interior point and keeps its neighbours, so the
    drawn line moves by at most ``passes * tol`` pixels; ends and corners (peaks) stay.

    Parameters
    ----------
    p : ndarray
        Points (n, 2), finite. [px]
    tol : float
        Distance from the chord below which a point is dropped. [px]
    passes : int
        Passes over the line. [-]
    """
    x, y = p[:, 0], p[:, 1]
    for _ in range(passes):
        n = len(x)
        if n < 3:
            break
        # every second interior point (1, 3, 5, ...) against the chord of its neighbours; slices, not copies
        ax, ay = x[0:n - 2:2], y[0:n - 2:2]
        abx, aby = x[1:n - 1:2] - ax, y[1:n - 1:2] - ay
        acx, acy = x[2:n:2] - ax, y[2:n:2] - ay
        chord = np.hypot(acx, acy)
        cross = np.abs(acx * aby - acy * abx)
        pos = chord > 0
        dist = np.where(pos, cross / np.where(pos, chord, 1.0), np.hypot(abx, aby))
        # the point must also lie between its neighbours along the chord (no fold-backs dropped)
        along = abx * acx + aby * acy
        drop = (dist <= tol) & (along >= 0) & (along <= chord ** 2)
        if not drop.any():
            break
        keep = np.ones(n, bool)
        keep[1:n - 1:2][drop] = False
        x, y = x[keep], y[keep]
    if len(x) == len(p):
        return p
    return np.column_stack([x, y])


def _pieces(x: np.ndarray, y: np.ndarray, f: Frame, budget: int = MAX_POINTS) -> tuple[np.ndarray, ...]:
    """Pixel points of a series: cut to the frame, straight runs simplified, thinned to ``budget`` in all."""
    parts = [simplify(q) for q in clip_polyline(np.column_stack([x, y]), f.x0, f.y0, f.x1, f.y1)]
    total = sum(len(q) for q in parts)
    if total <= budget:
        return tuple(parts)
    return tuple(thin(q, max(4, int(budget * len(q) / total))) for q in parts)


def _marker_places(pieces: Sequence[np.ndarray], count: int = MARKERS_PER_SERIES) -> np.ndarray:
    """``count`` places spread by arc length along the pieces of a series. [px]"""
    if not pieces:
        return np.zeros((0, 2))
    pts = np.vstack(pieces)
    seg = np.concatenate([[0.0], np.cumsum(np.hypot(*np.diff(pts, axis=0).T))])
    if seg[-1] <= 0:
        return pts[:1]
    want = (np.arange(count) + 0.5) / count * seg[-1]
    return pts[np.minimum(np.searchsorted(seg, want), len(pts) - 1)]


def _series(label: str, style: Style, x: np.ndarray, y: np.ndarray, f: Frame) -> Series:
    pieces = _pieces(x, y, f)
    marks = _marker_places(pieces) if style.marker else np.zeros((0, 2))
    return Series(label, style, pieces, marks)


# ----------------------------------------------------------------------------- axes


def _minus(text: str) -> str:
    return text.replace("-", "\u2212")


_SUPER = str.maketrans("-0123456789", "\u207b\u2070\u00b9\u00b2\u00b3\u2074\u2075\u2076\u2077\u2078\u2079")


def decade_label(k: int) -> str:
    """Label of 10^k: plain for 0.001 ... 1000, else 10 with a superscript exponent."""
    if -3 <= k <= 3:
        return f"{10.0 ** k:.{max(0, -k)}f}"
    return "10" + str(k).translate(_SUPER)


def nice_step(span: float, target: int = 5) -> float:
    """A round tick step (1, 2, 2.5 or 5 times a power of ten) giving about ``target`` ticks.

    Parameters
    ----------
    span : float
        Length of the axis in data units.
    target : int
        Number of ticks wanted. [-]
    """
    if not (span > 0 and math.isfinite(span)):
        return 1.0
    raw = span / target
    mag = 10.0 ** math.floor(math.log10(raw))
    for m in (1.0, 2.0, 2.5, 5.0, 10.0):
        if m * mag >= raw * (1 - 1e-9):
            return m * mag
    return 10.0 * mag


def tick_label(v: float, step: float) -> str:
    """A tick value with just enough decimals for ``step``; minus sign, never '-0'.

    Parameters
    ----------
    v : float
        The tick value, in data units.
    step : float
        The tick step, in the same units.
    """
    dec = max(0, -math.floor(math.log10(step) + 1e-9))
    if abs(step / 10.0 ** math.floor(math.log10(step) + 1e-9) - 2.5) < 1e-6:
        dec += 1
    if abs(v) < step * 1e-6:
        v = 0.0
    if abs(v) >= 1e5 or (v != 0 and abs(v) < 1e-4):
        return _minus(f"{v:.3g}")
    return _minus(f"{v:.{dec}f}")


def linear_range(lo: float, hi: float, target: int = 5, snap: bool = True) -> tuple[float, float, list[float]]:
    """A linear axis covering [lo, hi]: (lo, hi, tick values), the ends snapped to ticks when ``snap``.

    Parameters
    ----------
    lo, hi : float
        Data range to cover.
    target : int
        Number of ticks wanted. [-]
    snap : bool
        Extend the ends to whole ticks.
    """
    if not (math.isfinite(lo) and math.isfinite(hi)):
        lo, hi = 0.0, 1.0
    if hi - lo <= 1e-12 * max(1.0, abs(hi), abs(lo)):
        pad = 0.5 * max(abs(hi), 1e-3)
        lo, hi = lo - pad, hi + pad
    step = nice_step(hi - lo, target)
    if snap:
        lo, hi = math.floor(lo / step + 1e-9) * step, math.ceil(hi / step - 1e-9) * step
    first = math.ceil(lo / step - 1e-9) * step
    ticks = [first + i * step for i in range(int(math.floor((hi - first) / step + 1e-9)) + 1)]
    return lo, hi, ticks


def _ticks_lin(values: Sequence[float], lo: float, hi: float, p0: float, p1: float) -> tuple[Tick, ...]:
    step = values[1] - values[0] if len(values) > 1 else max(abs(hi - lo), 1e-12)
    return tuple(Tick(_scale(v, lo, hi, p0, p1), tick_label(v, step)) for v in values)


def _ticks_log(lo: float, hi: float, p0: float, p1: float) -> tuple[Tick, ...]:
    """Decade ticks between 10^lo and 10^hi (lo, hi in decades); every second when more than seven."""
    ks = list(range(math.ceil(lo - 1e-9), math.floor(hi + 1e-9) + 1))
    every = 1 if len(ks) <= 7 else 2
    return tuple(Tick(_scale(k, lo, hi, p0, p1), decade_label(k)) for k in ks if k % every == 0)


def _scale(v, lo: float, hi: float, p0: float, p1: float):
    return p0 + (np.asarray(v, float) - lo) * ((p1 - p0) / (hi - lo)) if np.ndim(v) else \
        p0 + (float(v) - lo) * ((p1 - p0) / (hi - lo))


def _db(x: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        out = 20.0 * np.log10(np.abs(np.asarray(x)))
    return np.where(np.isfinite(out), out, np.nan)


def _text_width(text: str, size: float = FONT_SMALL) -> float:
    """Rough width of a label in DejaVu Sans. [px]"""
    return 0.6 * size * len(text)


# ----------------------------------------------------------------------------- legend and layout


MARGIN_LEFT = 50.0
MARGIN_RIGHT = 20.0
MARGIN_TOP = 8.0
MARGIN_BOTTOM = 34.0


def _legend(entries: Sequence[tuple[str, str, dict]]) -> tuple[LegendEntry, ...]:
    """Legend entries, in order (the SVG writer lays them out under the plot, as page text)."""
    return tuple(LegendEntry(label, kind, **kw) for label, kind, kw in entries)


def _frame(height: float, xticks=(), yticks=(), xtitle="", ytitle="", width: float = WIDTH,
           left: float = MARGIN_LEFT) -> Frame:
    return Frame(left, MARGIN_TOP, width - MARGIN_RIGHT, MARGIN_TOP + height, tuple(xticks), tuple(yticks),
                 xtitle, ytitle)


def _finish(f: Frame, **fields) -> Frame:
    return Frame(**{**f.__dict__, **fields})


def _line_entries(series: Sequence[Series]) -> list[tuple[str, str, dict]]:
    return [(s.label, "line", {"style": s.style}) for s in series if s.label]


# ----------------------------------------------------------------------------- frequency charts


def _freq_axes(fd: FrequencyData, curves: Sequence[np.ndarray], levels: Sequence[float], height: float):
    """Frame and scalers of a log-frequency / dB chart."""
    xlo, xhi = math.log10(fd.w[0]), math.log10(fd.w[-1])
    vals = np.concatenate([c[np.isfinite(c)] for c in curves] + [np.asarray(levels, float)])
    lo = max(float(vals.min()) if vals.size else -40.0, -60.0)
    hi = min(float(vals.max()) if vals.size else 20.0, 40.0)
    lo, hi, yv = linear_range(lo - 2.0, hi + 2.0, 6)
    f = _frame(height)
    f = _finish(f, xticks=_ticks_log(xlo, xhi, f.x0, f.x1), yticks=_ticks_lin(yv, lo, hi, f.y1, f.y0),
                xtitle="frequency \u03c9 [rad/s]", ytitle="gain [dB]")
    sx = lambda w: _scale(np.log10(w), xlo, xhi, f.x0, f.x1)  # noqa: E731
    sy = lambda v: _scale(v, lo, hi, f.y1, f.y0)  # noqa: E731
    return f, sx, sy


def _requirement(fd: FrequencyData, f: Frame, sx, sy, key: str) -> tuple[list[Shade], list[Series]]:
    """The rejection requirement: the region |S| must stay out of (w <= wd, above -A dB), hatched."""
    if fd.band_rad_s is None or fd.attenuation_db is None:
        return [], []
    xb = float(min(max(sx(fd.band_rad_s), f.x0), f.x1))
    yb = float(min(max(sy(-fd.attenuation_db), f.y0), f.y1))
    if xb <= f.x0 or yb <= f.y0:
        return [], []
    outline = np.array([[f.x0, f.y0], [xb, f.y0], [xb, yb], [f.x0, yb]])
    label = (f"|S| must stay below {_minus(f'{-fd.attenuation_db:.3g}')} dB for "
             f"\u03c9 \u2264 {fd.band_rad_s:.3g} rad/s (hatched: not allowed)")
    edge = Series("", BAND_STYLE, (np.array([[f.x0, yb], [xb, yb], [xb, f.y0]]),), np.zeros((0, 2)))
    return [Shade(label, ORANGE, outline, f"{key}-hatch")], [edge]


def _ms_line(fd: FrequencyData, f: Frame, sy, label: str) -> Series:
    y = float(sy(20.0 * math.log10(fd.ms_max)))
    return _series(label, MS_STYLE, np.array([f.x0, f.x1]), np.array([y, y]), f)


def gain_chart(fd: FrequencyData, key: str) -> Chart:
    """Gains of L, S and T against frequency (log-log, dB), the rejection requirement and the Ms limit.

    Parameters
    ----------
    fd : FrequencyData
        Exact frequency responses of the loop.
    key : str
        Chart key (SVG id; prefix of every id inside).
    """
    curves = [_db(fd.L), _db(fd.S), _db(fd.T)]
    levels = [20.0 * math.log10(fd.ms_max)] + ([-fd.attenuation_db] if fd.attenuation_db is not None else [])
    f, sx, sy = _freq_axes(fd, curves[1:] + [np.clip(curves[0], -60, 40)], levels, 170.0)
    x = sx(fd.w)
    series = [_series("|L| loop", L_STYLE, x, sy(curves[0]), f),
              _series("|T| complementary sensitivity", T_STYLE, x, sy(curves[2]), f),
              _series("|S| sensitivity", S_AS_TUNED, x, sy(curves[1]), f)]
    ms = _ms_line(fd, f, sy, f"Ms limit {fd.ms_max:.3g} ({_minus(f'{20 * math.log10(fd.ms_max):.3g}')} dB)")
    shades, edges = _requirement(fd, f, sx, sy, key)
    entries = _line_entries(series[::-1] + [ms]) + [(s.label, "shade", {"colour": s.colour, "pattern": s.pattern,
                                                                       "style": BAND_STYLE}) for s in shades]
    legend = _legend(entries)
    return Chart(key, "frequency", "Gains of L, S and T",
                 "Gain of the loop transfer L, the sensitivity S and the complementary sensitivity T against "
                 "frequency, with the Ms limit" + (" and the rejection requirement." if shades else "."),
                 WIDTH, f.y1 + MARGIN_BOTTOM, f, tuple(edges + [ms] + series), tuple(shades), (), (),
                 _hatches(shades), legend,
                 "Gains against frequency" + (", with the rejection requirement hatched." if shades else "."))


def _hatches(shades: Sequence[Shade]) -> tuple[Pattern, ...]:
    return tuple(Pattern(s.pattern, "diagonal", s.colour, "") for s in shades)


def compare_chart(fd: FrequencyData, other: np.ndarray, key: str, title: str, label: str, style: Style,
                  base_label: str = "|S| as tuned") -> Chart:
    """|S| of the loop against another sensitivity (the proposed tuning, or a cascade's inner loop).

    Parameters
    ----------
    fd : FrequencyData
        The loop (its |S|, Ms limit and rejection requirement).
    other : ndarray
        The other sensitivity on ``fd.w``. [-]
    key, title, label : str
        Chart key, title, legend label of ``other``.
    style : Style
        How ``other`` is drawn.
    base_label : str
        Legend label of the loop's own |S|.
    """
    a, b = _db(fd.S), _db(other)
    levels = [20.0 * math.log10(fd.ms_max)] + ([-fd.attenuation_db] if fd.attenuation_db is not None else [])
    f, sx, sy = _freq_axes(fd, [a, b], levels, 150.0)
    f = _finish(f, ytitle="|S| [dB]")
    x = sx(fd.w)
    series = [_series(base_label, S_AS_TUNED, x, sy(a), f), _series(label, style, x, sy(b), f)]
    ms = _ms_line(fd, f, sy, f"Ms limit {fd.ms_max:.3g}")
    shades, edges = _requirement(fd, f, sx, sy, key)
    entries = _line_entries(series + [ms]) + [("rejection requirement (hatched: not allowed)", "shade",
                                               {"colour": s.colour, "pattern": s.pattern, "style": BAND_STYLE})
                                              for s in shades]
    legend = _legend(entries)
    return Chart(key, "frequency", title, f"{title}: {base_label} and {label} against frequency.",
                 WIDTH, f.y1 + MARGIN_BOTTOM, f, tuple(edges + [ms] + series[::-1]), tuple(shades), (), (),
                 _hatches(shades), legend, title + ".")


NYQUIST_LIMIT = 8.0
"""Largest |Re| shown on the Nyquist chart: the curve is cut where it leaves the view. [-]"""


def _nyquist_view(L: np.ndarray, ms_max: float, aspect: float) -> tuple[float, float, float, float]:
    """A view around -1 holding the keep-out circle, the origin and the crossings of the negative real axis."""
    r = 1.0 / ms_max
    xlo, xhi = -1.0 - max(r, 1.0) - 0.25, 1.0
    z = L[np.isfinite(L)]
    if len(z) > 1:
        s = np.sign(z.imag)
        cross = np.flatnonzero(s[:-1] * s[1:] < 0)
        if cross.size:
            a, b = z[cross], z[cross + 1]
            with np.errstate(divide="ignore", invalid="ignore"):
                re = a.real - a.imag * (b.real - a.real) / (b.imag - a.imag)
            re = re[np.isfinite(re) & (re < 0)]
            if re.size:
                xlo = min(xlo, max(float(re.min()) * 1.15, -NYQUIST_LIMIT))
        near = z[(np.abs(z) < 2.0)]
        if near.size:
            xhi = min(max(xhi, float(near.real.max()) + 0.2), 2.0)
    span_y = (xhi - xlo) * aspect
    inside = z[(z.real >= xlo) & (z.real <= xhi) & (np.abs(z.imag) <= span_y)] if len(z) else z
    top = float(inside.imag.max()) + 0.15 * span_y if inside.size else 0.25 * span_y
    top = min(max(top, 0.25 * span_y, r + 0.1), 0.75 * span_y, span_y - r - 0.1)
    return xlo, xhi, top - span_y, top


def nyquist_chart(fd: FrequencyData, key: str) -> Chart:
    """Nyquist curve of L (and of the proposed L), the critical point -1 and the circle of radius 1/Ms_max.

    Both axes have the same scale; the view is chosen around -1 (see :func:`_nyquist_view`) and the
    curve is cut where it leaves it.

    Parameters
    ----------
    fd : FrequencyData
        The loop's frequency response (L as tuned, and as proposed when there is a proposal) and Ms limit.
    key : str
        Unique prefix of the chart's ids in the page.
    """
    f0 = _frame(210.0)
    aspect = (f0.y1 - f0.y0) / (f0.x1 - f0.x0)
    xlo, xhi, ylo, yhi = _nyquist_view(fd.L, fd.ms_max, aspect)
    xstep = nice_step(xhi - xlo, 6)
    xv = [v for v in linear_range(xlo, xhi, 6, snap=False)[2]]
    yv = [k * xstep for k in range(math.ceil(ylo / xstep - 1e-9), math.floor(yhi / xstep + 1e-9) + 1)]
    f = _finish(f0, xticks=_ticks_lin(xv, xlo, xhi, f0.x0, f0.x1), yticks=_ticks_lin(yv, ylo, yhi, f0.y1, f0.y0),
                xtitle="real part of L(j\u03c9) [-]", ytitle="imaginary part [-]")
    sx = lambda v: _scale(v, xlo, xhi, f.x0, f.x1)  # noqa: E731
    sy = lambda v: _scale(v, ylo, yhi, f.y1, f.y0)  # noqa: E731
    r = 1.0 / fd.ms_max
    t = np.linspace(0.0, 2.0 * np.pi, 73)
    circle = np.column_stack([sx(-1.0 + r * np.cos(t)), sy(r * np.sin(t))])
    circle_shade = Shade(f"circle of radius 1/Ms limit = {r:.3g} around \u22121 (the curve must stay outside)",
                         PURPLE, circle, f"{key}-hatch", MS_STYLE)
    L = fd.L
    series = [_series("", MIRROR, sx(L.real), sy(-L.imag), f),
              _series("L(j\u03c9) as tuned, \u03c9 > 0", S_AS_TUNED, sx(L.real), sy(L.imag), f)]
    if fd.proposed_L is not None:
        series.append(_series("L(j\u03c9) proposed", PROPOSED, sx(fd.proposed_L.real), sy(fd.proposed_L.imag), f))
    mirror = series[0]
    series[0] = Series("mirror image (\u03c9 < 0)", mirror.style, mirror.pieces, mirror.markers)
    axes = [_series("", REFERENCE, np.array([f.x0, f.x1]), np.array([sy(0.0)] * 2), f),
            _series("", REFERENCE, np.array([sx(0.0)] * 2), np.array([f.y0, f.y1]), f)]
    crit = Mark("critical point \u22121", float(sx(-1.0)), float(sy(0.0)), "cross", VERMILLION)
    entries = _line_entries(series[1:] + series[:1]) + [
        (crit.label, "mark", {"colour": crit.colour, "shape": crit.shape}),
        (circle_shade.label, "shade", {"colour": PURPLE, "pattern": circle_shade.pattern, "style": MS_STYLE})]
    legend = _legend(entries)
    return Chart(key, "nyquist", "Nyquist curve of L",
                 "Nyquist curve of the loop transfer L with the critical point -1 and the circle of radius "
                 "1/Ms limit around it.", WIDTH, f.y1 + MARGIN_BOTTOM, f, tuple(axes + series),
                 (circle_shade,), (crit,), (), (Pattern(circle_shade.pattern, "diagonal", PURPLE, ""),),
                 legend, "Nyquist curve of L near the critical point.")


# ----------------------------------------------------------------------------- time charts


def _time_chart(key: str, title: str, desc: str, ytitle: str, lines: Sequence[tuple[str, Style, np.ndarray,
                np.ndarray]], ref: float | None) -> Chart:
    t_hi = max(float(np.nanmax(t)) for _, _, t, _ in lines)
    ys = np.concatenate([y[np.isfinite(y)] for _, _, _, y in lines] + [np.array([0.0] + ([ref] if ref else []))])
    lo, hi = float(ys.min()), float(ys.max())
    pad = 0.06 * (hi - lo if hi > lo else 1.0)
    lo, hi, yv = linear_range(lo - pad, hi + pad, 5)
    f = _frame(140.0)
    _, _, xv = linear_range(0.0, t_hi, 5, snap=False)
    f = _finish(f, xticks=_ticks_lin(xv, 0.0, t_hi, f.x0, f.x1), yticks=_ticks_lin(yv, lo, hi, f.y1, f.y0),
                xtitle="time [s]", ytitle=ytitle)
    sx = lambda v: _scale(v, 0.0, t_hi, f.x0, f.x1)  # noqa: E731
    sy = lambda v: _scale(v, lo, hi, f.y1, f.y0)  # noqa: E731
    series = [_series(label, style, sx(t), sy(y), f) for label, style, t, y in lines]
    refs = []
    if ref is not None:
        refs.append(_series("", REFERENCE, np.array([f.x0, f.x1]), np.array([sy(ref)] * 2), f))
    legend = _legend(_line_entries(series))
    return Chart(key, "time", title, desc, WIDTH, f.y1 + MARGIN_BOTTOM, f,
                 tuple(refs + series[::-1]), (), (), (), (), legend, title + ".")


def step_chart(st: StepData, key: str) -> Chart:
    """A load or set-point step response, as tuned and (when there is one) as proposed.

    Parameters
    ----------
    st : StepData
        The traces (time [s], response [-]) of one kind, as tuned and proposed.
    key : str
        Unique prefix of the chart's ids in the page.
    """
    lines = [("as tuned", S_AS_TUNED, st.t, st.y)]
    if st.proposed_t is not None and st.proposed_y is not None:
        lines.append(("proposed", PROPOSED, st.proposed_t, st.proposed_y))
    if st.kind == "load":
        return _time_chart(key, "Unit load step at the process input",
                           "Deviation of the process value after a unit step at the process input.",
                           "PV deviation [-]", lines, 0.0)
    return _time_chart(key, "Unit set-point step", "Process value after a unit set-point step.",
                       "process value [-]", lines, 1.0)


def residual_chart(rd: ResidualData, key: str) -> Chart:
    """A disturbance record against the closed-loop residual predicted through S.

    Parameters
    ----------
    rd : ResidualData
        Time [s], record and residual [% of PV range].
    key : str
        Unique prefix of the chart's ids in the page.
    """
    return _time_chart(key, "Disturbance record and predicted residual",
                       "The logged disturbance and the residual the loop as tuned would leave (through S).",
                       "deviation [% of PV range]",
                       [("disturbance record d", RECORD, rd.t, rd.d),
                        ("predicted closed-loop residual", S_AS_TUNED, rd.t, rd.y)], 0.0)


# ----------------------------------------------------------------------------- the charts of one loop


def loop_charts(plots: LoopPlots) -> tuple[Chart, ...]:
    """The charts of one loop's detail section, in the order shown.

    Gains and Nyquist; the proposed tuning against the present one; a cascade's
    inner loop against the outer; the step responses; the disturbance residual.
    Each chart's key starts with ``plots.key`` (the loop's anchor).
    """
    out = []
    fd = plots.frequency
    k = plots.key
    if fd is not None:
        out += [gain_chart(fd, f"{k}-gains"), nyquist_chart(fd, f"{k}-nyquist")]
        if fd.proposed_S is not None:
            out.append(compare_chart(fd, fd.proposed_S, f"{k}-proposal", "Sensitivity as tuned and as proposed",
                                     "|S| proposed", PROPOSED))
        if fd.inner_S is not None:
            inner = fd.inner_tag if len(fd.inner_tag) <= 24 else fd.inner_tag[:23] + "\u2026"
            out.append(compare_chart(fd, fd.inner_S, f"{k}-cascade", "Cascade: sensitivity of both loops",
                                     f"|S| inner loop {inner}", INNER, "|S| outer loop (this one)"))
    for st in plots.steps:
        out.append(step_chart(st, f"{k}-{st.kind}"))
    if plots.residual is not None:
        out.append(residual_chart(plots.residual, f"{k}-residual"))
    return tuple(out)


# ----------------------------------------------------------------------------- status bars


def _status_patterns(key: str, statuses: Sequence[str]) -> dict[str, Pattern]:
    return {s: Pattern(f"{key}-p{i}", STATUS_HATCHES[s], "#FFFFFF", "")
            for i, s in enumerate(statuses) if STATUS_HATCHES.get(s)}


def _status_legend(statuses: Sequence[str], pats: dict[str, Pattern]) -> tuple[LegendEntry, ...]:
    entries = [(f"{STATUS_SYMBOLS.get(s, '')} {s}".strip(), "bar",
                {"colour": STATUS_COLOURS.get(s, GREY), "pattern": pats[s].id if s in pats else ""})
               for s in statuses]
    return _legend(entries)


def _short(text: str, n: int = 26) -> str:
    return text if len(text) <= n else text[:n - 1] + "\u2026"


def status_mix(tallies: Sequence[Tally], statuses: Sequence[str], key: str = "status-mix") -> Chart:
    """Horizontal stacked bars: loops per status in each group (area), top to bottom in the given order.

    Parameters
    ----------
    tallies : sequence of Tally
        One per group.
    statuses : sequence of str
        Status words to stack, most severe first.
    key : str
        Chart key (SVG id; prefix of every id inside).
    """
    labels = [_short(t.group) for t in tallies]
    left = min(max([_text_width(s) for s in labels] + [30.0]) + 14.0, 180.0)
    row = 16.0
    f = _frame(max(row * len(tallies), row), width=2 * WIDTH - 120, left=left)
    top = max([t.total for t in tallies] + [1])
    lo, hi, xv = linear_range(0.0, float(top), 6)
    xv = [v for v in xv if abs(v - round(v)) < 1e-9]
    pats = _status_patterns(key, statuses)
    sx = lambda v: _scale(v, 0.0, hi, f.x0, f.x1)  # noqa: E731
    bars = []
    for i, t in enumerate(tallies):
        y = f.y0 + row * i + 2.5
        acc = 0
        for s in statuses:
            n = t.count(s)
            if n:
                x0, x1 = float(sx(acc)), float(sx(acc + n))
                bars.append(Bar(x0, y, x1 - x0, row - 5.0, s, n, STATUS_COLOURS.get(s, GREY),
                                pats[s].id if s in pats else ""))
                acc += n
    yticks = tuple(Tick(f.y0 + row * (i + 0.5), lab) for i, lab in enumerate(labels))
    f = _finish(f, xticks=_ticks_lin(xv, 0.0, hi, f.x0, f.x1), yticks=yticks, xtitle="loops [-]", ytitle="",
                ygrid=False)
    legend = _status_legend(statuses, pats)
    return Chart(key, "status-bars", "Loops per status in each area",
                 "Stacked bars: number of loops of each status in each area.", f.x1 + MARGIN_RIGHT,
                 f.y1 + MARGIN_BOTTOM, f, bars=tuple(bars), patterns=tuple(pats.values()), legend=legend,
                 caption="Status mix per area.")


def status_trend(dates: Sequence[str], trend: Sequence[tuple[str, Sequence[int]]],
                 key: str = "status-trend") -> Chart:
    """Vertical stacked bars: loops per status at each recorded audit, oldest first.

    Parameters
    ----------
    dates : sequence of str
        Audit dates, oldest first.
    trend : sequence of (status, counts)
        For each status, its number of loops at each date. [-]
    key : str
        Unique prefix of the chart's ids in the page.
    """
    statuses = [s for s, _ in trend]
    n = max(len(dates), 1)
    f = _frame(150.0, width=2 * WIDTH - 120, left=MARGIN_LEFT)
    totals = [sum(int(c[i]) for _, c in trend) for i in range(len(dates))]
    lo, hi, yv = linear_range(0.0, float(max(totals + [1])), 5)
    yv = [v for v in yv if abs(v - round(v)) < 1e-9]
    pats = _status_patterns(key, statuses)
    slot = (f.x1 - f.x0) / n
    width = min(slot * 0.7, 40.0)
    sy = lambda v: _scale(v, 0.0, hi, f.y1, f.y0)  # noqa: E731
    bars = []
    for i in range(len(dates)):
        acc = 0
        x = f.x0 + slot * (i + 0.5) - width / 2
        for s, counts in trend:
            c = int(counts[i])
            if c:
                ya, yb = float(sy(acc)), float(sy(acc + c))
                bars.append(Bar(x, yb, width, ya - yb, s, c, STATUS_COLOURS.get(s, GREY),
                                pats[s].id if s in pats else ""))
                acc += c
    every = max(1, math.ceil(n / 8))
    xticks = tuple(Tick(f.x0 + slot * (i + 0.5), _short(d, 12)) for i, d in enumerate(dates) if i % every == 0)
    f = _finish(f, xticks=xticks, yticks=_ticks_lin(yv, 0.0, hi, f.y1, f.y0), xtitle="audit date",
                ytitle="loops [-]", xgrid=False)
    legend = _status_legend(statuses, pats)
    return Chart(key, "status-bars", "Loops per status at each audit",
                 "Stacked bars: number of loops of each status at each recorded audit, oldest first.",
                 f.x1 + MARGIN_RIGHT, f.y1 + MARGIN_BOTTOM, f, bars=tuple(bars), patterns=tuple(pats.values()),
                 legend=legend, caption="Status mix over audits.")
