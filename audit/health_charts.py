"""Charts of the loop-health section as data for the SVG writer (:mod:`audit.svg`, layout ``health``).

Three per loop: the trend of ``sp``, ``pv`` and ``op``; ``pv`` against ``op`` (a sticking valve
draws a parallelogram, a linear loop an ellipse); the autocorrelation of the control error with
the zero crossings that gave the period marked. Same rules as :mod:`audit.plots` (scaled
coordinates, thinned polylines, colour-blind-safe styles that differ by dash and marker too).

With plant data the charts are drawn by the per-loop task, where the record was analysed
(:func:`draw_health`): the run's process keeps each loop's charts as packed SVG text
(:class:`HealthDrawing`), never the plot arrays, and :func:`health_svgs` gives the page the same
text either way.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from markupsafe import Markup

from .health_report import HealthView, health_key
from .plantdata.packed import Packed
from .plots import (BLACK, BLUE, MARGIN_BOTTOM, ORANGE, REFERENCE, VERMILLION, WIDTH, Chart, Mark, Style,
                    _finish, _frame, _legend, _line_entries, _scale, _series, _ticks_lin, linear_range)
from .svg import chart_html

SP_STYLE = Style(BLACK, 1.2, "5 3")
PV_STYLE = Style(BLUE, 1.4)
OP_STYLE = Style(ORANGE, 1.2, "2 2")
ACF_STYLE = Style(BLUE, 1.4)


def _axes(x: np.ndarray, ys: list[np.ndarray], height: float, xtitle: str, ytitle: str, pad_zero: bool = False):
    vals = np.concatenate([y[np.isfinite(y)] for y in ys] + ([np.array([0.0])] if pad_zero else []))
    lo, hi = (float(vals.min()), float(vals.max())) if vals.size else (0.0, 1.0)
    pad = 0.06 * (hi - lo if hi > lo else 1.0)
    lo, hi, yv = linear_range(lo - pad, hi + pad, 5)
    xf = x[np.isfinite(x)]
    x0, x1 = (float(xf.min()), float(xf.max())) if xf.size else (0.0, 1.0)
    if x1 <= x0:
        x1 = x0 + 1.0
    x0, x1, xv = linear_range(x0, x1, 5, snap=False)
    f = _frame(height)
    f = _finish(f, xticks=_ticks_lin(xv, x0, x1, f.x0, f.x1), yticks=_ticks_lin(yv, lo, hi, f.y1, f.y0),
                xtitle=xtitle, ytitle=ytitle)
    return f, (lambda v: _scale(v, x0, x1, f.x0, f.x1)), (lambda v: _scale(v, lo, hi, f.y1, f.y0))


def _time_scale(t: np.ndarray) -> tuple[float, str]:
    span = float(t[-1] - t[0]) if t.size > 1 else 0.0
    return (3600.0, "time [h]") if span > 4 * 3600 else (60.0, "time [min]") if span > 600 else (1.0, "time [s]")


def trend_chart(hv: HealthView) -> Chart:
    """Set point, process value and output over the record.

    Parameters
    ----------
    hv : HealthView
        The loop's health view with plot data.
    """
    p = hv.plots
    div, xtitle = _time_scale(p.t)
    x = p.t / div
    f, sx, sy = _axes(x, [p.sp, p.pv, p.op], 150.0, xtitle, "sp, pv [% of range]; op [%]")
    series = [_series(label, st, sx(x), sy(y), f) for label, st, y in
              (("set point sp", SP_STYLE, p.sp), ("process value pv", PV_STYLE, p.pv), ("output op", OP_STYLE, p.op))
              if np.isfinite(y).any()]
    return Chart(f"{hv.key}-trend", "health", "Operating record: sp, pv and op",
                 "Set point, process value and controller output over the operating record.", WIDTH,
                 f.y1 + MARGIN_BOTTOM, f, tuple(series), legend=_legend(_line_entries(series)),
                 caption="Operating record.")


def pv_op_chart(hv: HealthView) -> Chart | None:
    """Process value against controller output over the latest cycles; None without data.

    Parameters
    ----------
    hv : HealthView
        The loop's health view with plot data.
    """
    p = hv.plots
    if p.pv_op is None or p.pv_op.op.size < 2:
        return None
    f, sx, sy = _axes(p.pv_op.op, [p.pv_op.pv], 190.0, "controller output op [%]", "process value pv [% of range]")
    s = _series("pv against op", PV_STYLE, sx(p.pv_op.op), sy(p.pv_op.pv), f)
    return Chart(f"{hv.key}-pvop", "health", "pv against op",
                 "Process value against controller output over the latest cycles: a sticking valve draws "
                 "a parallelogram (op moves, pv waits, then jumps); a linear loop an ellipse.", WIDTH,
                 f.y1 + MARGIN_BOTTOM, f, (s,), legend=_legend(_line_entries([s])), caption="pv against op.")


def acf_chart(hv: HealthView) -> Chart | None:
    """Autocorrelation of the control error, the zero crossings used and the period found.

    Parameters
    ----------
    hv : HealthView
        The loop's health view with plot data.
    """
    p = hv.plots
    if p.acf.size < 2:
        return None
    f, sx, sy = _axes(p.acf_lags_s, [p.acf, np.array([-1.0, 1.0])], 150.0, "lag [s]",
                      "autocorrelation of sp - pv [-]")
    zero = _series("", REFERENCE, np.array([f.x0, f.x1]), np.array([sy(0.0)] * 2), f)
    s = _series("autocorrelation", ACF_STYLE, sx(p.acf_lags_s), sy(p.acf), f)
    marks = tuple(Mark("zero crossings used", float(sx(z)), float(sy(0.0)), "circle", VERMILLION)
                  for z in p.acf_crossings_s)
    entries = _line_entries([s])
    if marks:
        entries.append(("zero crossings used for the period", "mark", {"colour": VERMILLION, "shape": "circle"}))
    if math.isfinite(p.period_s):
        x = float(sx(p.period_s))
        per = _series(f"one period, {p.period_s:.3g} s", Style(VERMILLION, 1.0, "4 3"), np.array([x, x]),
                      np.array([f.y0, f.y1]), f)
        entries.append((per.label, "line", {"style": per.style}))
        series = (zero, per, s)
        title = f"Autocorrelation: oscillation with a period of {p.period_s:.3g} s"
    else:
        series = (zero, s)
        title = "Autocorrelation: no regular oscillation"
    return Chart(f"{hv.key}-acf", "health", title,
                 "Autocorrelation of the control error; regular zero crossings mark an oscillation.", WIDTH,
                 f.y1 + MARGIN_BOTTOM, f, series, marks=marks, legend=_legend(entries),
                 caption="Autocorrelation of the control error.")


def health_charts(hv: HealthView) -> tuple[Chart, ...]:
    """The charts of one loop's health section, in the order shown.

    Parameters
    ----------
    hv : HealthView
        The loop's health view; no charts without plot data.
    """
    if hv.plots is None:
        return ()
    return tuple(c for c in (trend_chart(hv), pv_op_chart(hv), acf_chart(hv)) if c is not None)


@dataclass(frozen=True)
class HealthDrawing:
    """One loop's health charts, drawn: what the run keeps instead of the plot arrays.

    Attributes
    ----------
    key : str
        The health view's key the charts were drawn for (:func:`audit.health_report.health_key`);
        it is in every chart's ids.
    charts : Packed
        The charts as a tuple of (caption, SVG text of :func:`audit.svg.chart_html`), in the order shown.
    """

    key: str
    charts: Packed


def draw_health(key: str, plots) -> HealthDrawing:
    """Draw one loop's health charts now, for a section of key ``key`` (the per-loop task's call).

    Parameters
    ----------
    key : str
        The key of the loop's health view (:func:`audit.health_report.health_key` of its anchor).
    plots : audit.plantdata.health.HealthPlots
        The loop's plot data.

    Returns
    -------
    HealthDrawing
        The same charts, caption and SVG text, as :func:`health_svgs` draws from ``plots``.
    """
    hv = HealthView(key, (), (), "", plots)
    return HealthDrawing(key, Packed.of(tuple((c.caption, chart_html(c)) for c in health_charts(hv))))


def health_svgs(hv: HealthView) -> tuple[tuple[str, Markup], ...]:
    """The charts of one loop's health section as (caption, SVG markup), in the order shown.

    Parameters
    ----------
    hv : HealthView
        The loop's health view; its ``plots`` are the plot data (drawn here), the charts drawn by the
        per-loop task (:class:`HealthDrawing`, unpacked here) or None (no charts).

    Raises
    ------
    ValueError
        A drawing made for another section (its key is not the view's).
    """
    p = hv.plots
    if isinstance(p, HealthDrawing):
        if p.key != hv.key:
            raise ValueError(f"health charts drawn for {p.key!r} given to the section {hv.key!r}")
        # written by audit.svg, every text escaped
        return tuple((caption, Markup(svg)) for caption, svg in p.charts.unpack())
    return tuple((c.caption, Markup(chart_html(c))) for c in health_charts(hv))
