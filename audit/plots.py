"""Plots of the audit report as inline SVG text, drawn from the report model.

Drawing only: every curve comes ready-made in :mod:`audit.report`. Each function
returns a :class:`Drawing` whose ``svg`` is a complete ``<svg>`` element (no XML
prolog) for inlining in the HTML page.

Output is deterministic: matplotlib settings are applied in a local
``rc_context`` (no global state is changed), ``svg.hashsalt`` and ``svg.id``
are derived from the drawing's key, and the date metadata is dropped, so the
same report gives the same bytes, and ids never clash between drawings.

Palette: derived from the Okabe-Ito colour-blind-safe set [1]_; every series
also differs by line style or hatch, and every status is named in the legend.

References
----------
.. [1] M. Okabe and K. Ito, "Color Universal Design (CUD): how to make figures and
   presentations that are friendly to colorblind people", 2008.
"""

from __future__ import annotations

import functools
import io
import re
from dataclasses import dataclass
from typing import Sequence

import matplotlib
import numpy as np
from matplotlib.backends.backend_svg import FigureCanvasSVG
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, LogLocator, NullLocator

from .report import FrequencyData, LoopPlots, ResidualData, StepData, Tally

INK = "#222222"
GRID = "#d9d9d9"
BLUE = "#0072B2"
VERMILLION = "#D55E00"
ORANGE = "#E69F00"
PURPLE = "#CC79A7"
GREEN = "#009E73"
SKY = "#56B4E9"
GREY = "#8c8c8c"

STATUS_COLOURS: dict[str, str] = {
    "unstable": VERMILLION, "fails": PURPLE, "marginal": ORANGE, "invalid": GREY,
    "not evaluated": "#c8c8c8", "passes": BLUE,
}
STATUS_HATCHES: dict[str, str] = {
    "unstable": "xxx", "fails": "///", "marginal": "...", "invalid": "---", "not evaluated": "+++", "passes": "",
}

_RC = {
    "svg.fonttype": "none",
    "font.family": "DejaVu Sans",
    "font.size": 8.0,
    "axes.edgecolor": INK,
    "axes.labelcolor": INK,
    "axes.linewidth": 0.6,
    "xtick.color": INK,
    "ytick.color": INK,
    "grid.color": GRID,
    "grid.linewidth": 0.5,
    "legend.frameon": False,
    "legend.fontsize": 7.0,
    "lines.linewidth": 1.3,
    "hatch.linewidth": 0.6,
    "path.simplify": True,
    "path.simplify_threshold": 0.3,
    "xtick.major.size": 0.0,
    "ytick.major.size": 0.0,
    "xtick.minor.size": 0.0,
    "ytick.minor.size": 0.0,
    "xtick.major.pad": 3.0,
    "ytick.major.pad": 3.0,
}


def _styled(fn):
    """Run a drawing function with the report's matplotlib settings (local, restored afterwards)."""
    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        with matplotlib.rc_context(_RC):
            return fn(*args, **kwargs)
    return wrapper


@dataclass(frozen=True)
class Drawing:
    """One plot: a stable key (also the SVG root id), a caption and the SVG text."""

    key: str
    caption: str
    svg: str


def _label(text: str) -> str:
    """Untrusted text made inert for matplotlib (no mathtext) and short."""
    text = str(text).replace("\\", "/").replace("$", r"\$")
    return text if len(text) <= 28 else text[:27] + "\u2026"


_PROLOG = re.compile(r"^.*?(?=<svg\b)", re.S)
_METADATA = re.compile(r"\s*<metadata>.*?</metadata>", re.S)
_GROUP_ID = re.compile(r'<g id="[A-Za-z0-9_.]+">')
_IDS = re.compile(r'(\bid="|url\(#|xlink:href="#)(?!plot-)([A-Za-z0-9_.-]+)')


def _svg(fig: Figure, key: str) -> str:
    """The figure as an ``<svg>`` element whose ids are all prefixed by ``key`` (unique in the page)."""
    buf = io.StringIO()
    FigureCanvasSVG(fig)
    with matplotlib.rc_context({"svg.hashsalt": f"plant-audit:{key}", "svg.id": f"plot-{key}", **_RC}):
        fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None})
    text = _PROLOG.sub("", buf.getvalue(), count=1)
    text = _METADATA.sub("", text, count=1)
    text = _GROUP_ID.sub("<g>", text)           # matplotlib's group names repeat in every figure
    return _IDS.sub(lambda m: f"{m.group(1)}{key}-{m.group(2)}", text).strip()


def _figure(width: float, height: float, ncols: int, nrows: int = 1, left: float = 0.6,
            bottom: float = 0.45) -> tuple[Figure, list]:
    """A figure with fixed margins [in] (no layout engine: cheaper and deterministic)."""
    with matplotlib.rc_context(_RC):
        fig = Figure(figsize=(width, height))
        fig.subplots_adjust(left=left / width, right=1 - 0.12 / width, bottom=bottom / height,
                            top=1 - 0.28 / height, wspace=0.32, hspace=0.55)
        axes = fig.subplots(nrows, ncols, squeeze=False).ravel().tolist()
        for ax in axes:
            ax.grid(True, which="major")
    return fig, axes


def _log_ticks(v: float, _pos: int) -> str:
    return f"{v:g}"


def _logx(ax) -> None:
    ax.set_xscale("log")
    ax.xaxis.set_major_locator(LogLocator(base=10.0, numticks=8))
    ax.xaxis.set_major_formatter(FuncFormatter(_log_ticks))
    ax.xaxis.set_minor_locator(NullLocator())


def _db(x: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        return 20.0 * np.log10(np.abs(x))


def _db_limits(curves: Sequence[np.ndarray], extra: Sequence[float] = ()) -> tuple[float, float]:
    vals = np.concatenate([c[np.isfinite(c)] for c in curves] + [np.asarray(extra, float)])
    lo = max(float(np.min(vals)) if vals.size else -40.0, -80.0)
    hi = min(float(np.max(vals)) if vals.size else 20.0, 60.0)
    return lo - 3.0, hi + 3.0


def _gains(ax, fd: FrequencyData) -> None:
    curves = [_db(fd.L), _db(fd.S), _db(fd.T)]
    extra = [20 * np.log10(fd.ms_max)]
    if fd.attenuation_db is not None:
        extra.append(-fd.attenuation_db)
    lo, hi = _db_limits(curves, extra)
    if fd.band_rad_s is not None and fd.attenuation_db is not None:
        ax.fill_between([fd.w[0], fd.band_rad_s], -fd.attenuation_db, hi, facecolor=ORANGE, alpha=0.18,
                        edgecolor=ORANGE, hatch="//", linewidth=0.0,
                        label=f"|S| must stay below {-fd.attenuation_db:.3g} dB here")
    _logx(ax)
    ax.plot(fd.w, curves[0], color=INK, linestyle="-", label="|L|")
    ax.plot(fd.w, curves[1], color=BLUE, linestyle="-", linewidth=1.8, label="|S|")
    ax.plot(fd.w, curves[2], color=VERMILLION, linestyle="--", label="|T|")
    ax.axhline(20 * np.log10(fd.ms_max), color=PURPLE, linestyle=":", linewidth=1.0,
               label=f"Ms limit {fd.ms_max:.3g}")
    ax.set_ylim(lo, hi)
    ax.set_xlim(fd.w[0], fd.w[-1])
    ax.set_xlabel("frequency [rad/s]")
    ax.set_ylabel("gain [dB]")
    ax.set_title("Gains of L, S and T", loc="left", fontsize=8, y=1.0, pad=3)
    ax.legend(loc="upper right")


def _window(L: np.ndarray, half: float = 6.0) -> np.ndarray:
    z = L.copy()
    z[(np.abs(z.real + 1) > half) | (np.abs(z.imag) > half)] = np.nan
    return z


def _nyquist(ax, fd: FrequencyData) -> None:
    r = 1.0 / fd.ms_max
    t = np.linspace(0.0, 2.0 * np.pi, 181)
    ax.fill(-1 + r * np.cos(t), r * np.sin(t), facecolor=PURPLE, alpha=0.15, edgecolor=PURPLE, hatch="\\\\",
            linewidth=0.8, label=f"keep-out circle, radius 1/Ms limit = {r:.3g}")
    z = _window(fd.L)
    ax.plot(z.real, -z.imag, color=GREY, linewidth=0.7, linestyle="--", label="L(-jw) (mirror)")
    ax.plot(z.real, z.imag, color=INK, label="L(jw), w > 0")
    if fd.proposed_L is not None:
        p = _window(fd.proposed_L)
        ax.plot(p.real, p.imag, color=GREEN, linestyle="-.", label="L(jw), proposed")
    ax.plot([-1], [0], marker="+", color=VERMILLION, markersize=9, markeredgewidth=1.5, linestyle="none",
            label="critical point -1")
    ax.set_xlim(-3.0, 1.0)
    ax.set_ylim(-2.0, 1.5)
    ax.set_aspect("equal", adjustable="box")
    ax.set_xlabel("real part [-]")
    ax.set_ylabel("imaginary part [-]")
    ax.set_title("Nyquist curve of L", loc="left", fontsize=8, y=1.0, pad=3)
    ax.legend(loc="lower right", fontsize=6.5)


def _compare(ax, fd: FrequencyData, other: np.ndarray, name: str, colour: str, style: str, title: str) -> None:
    a, b = _db(fd.S), _db(other)
    _logx(ax)
    ax.plot(fd.w, a, color=BLUE, linewidth=1.8, label="|S| as tuned")
    ax.plot(fd.w, b, color=colour, linestyle=style, label=name)
    ax.axhline(20 * np.log10(fd.ms_max), color=PURPLE, linestyle=":", linewidth=1.0, label="Ms limit")
    ax.set_ylim(*_db_limits([a, b], [20 * np.log10(fd.ms_max)]))
    ax.set_xlim(fd.w[0], fd.w[-1])
    ax.set_xlabel("frequency [rad/s]")
    ax.set_ylabel("|S| [dB]")
    ax.set_title(title, loc="left", fontsize=8, y=1.0, pad=3)
    ax.legend(loc="lower right")


def _step(ax, st: StepData) -> None:
    ax.plot(st.t, st.y, color=BLUE, linewidth=1.6, label="as tuned")
    if st.proposed_t is not None and st.proposed_y is not None:
        ax.plot(st.proposed_t, st.proposed_y, color=GREEN, linestyle="-.", label="proposed")
    what = "Unit load step at the process input" if st.kind == "load" else "Unit set-point step"
    ax.set_title(what, loc="left", fontsize=8, y=1.0, pad=3)
    ax.set_xlabel("time [s]")
    ax.set_ylabel("process value [-]")
    if st.proposed_y is not None:
        ax.legend(loc="upper right")


def _residual(ax, rd: ResidualData) -> None:
    ax.plot(rd.t, rd.d, color=GREY, linewidth=0.8, label="disturbance record d")
    ax.plot(rd.t, rd.y, color=BLUE, linewidth=1.2, label="predicted closed-loop residual")
    ax.set_title("Disturbance record against the predicted residual", loc="left", fontsize=8, y=1.0, pad=3)
    ax.set_xlabel("time [s]")
    ax.set_ylabel("[% of PV range]")
    ax.legend(loc="upper right")


@_styled
def loop_drawings(plots: LoopPlots) -> tuple[Drawing, ...]:
    """The plots of one loop's detail section.

    Parameters
    ----------
    plots : LoopPlots
        Curves from :func:`audit.report.build_report`.

    Returns
    -------
    tuple of Drawing
        Gains and Nyquist; the comparisons (cascade inner loop, proposed tuning)
        when present; the step responses and the disturbance residual when present.
    """
    out = []
    fd = plots.frequency
    if fd is not None:
        fig, (a, b) = _figure(7.0, 2.45, 2)
        _gains(a, fd)
        _nyquist(b, fd)
        out.append(Drawing(f"{plots.key}-freq", "Gains against frequency, with the rejection requirement; "
                           "Nyquist curve with the circle the Ms limit keeps clear.", _svg(fig, f"{plots.key}-freq")))
        pairs = []
        if fd.inner_S is not None:
            pairs.append((fd.inner_S, f"|S| inner loop {_label(fd.inner_tag)}", SKY, "--",
                          "Cascade: sensitivity of the outer and inner loops"))
        if fd.proposed_S is not None:
            pairs.append((fd.proposed_S, "|S| proposed", GREEN, "-.", "Sensitivity as tuned and as proposed"))
        if pairs:
            fig, axes = _figure(7.0, 2.1, len(pairs))
            for ax, (curve, name, colour, style, title) in zip(axes, pairs):
                _compare(ax, fd, curve, name, colour, style, title)
            out.append(Drawing(f"{plots.key}-cmp", "Comparison of sensitivities.", _svg(fig, f"{plots.key}-cmp")))
    panels = list(plots.steps) + ([plots.residual] if plots.residual is not None else [])
    if panels:
        fig, axes = _figure(7.0, 1.95, len(panels)) if len(panels) <= 2 else _figure(7.0, 3.8, 2, 2)
        for ax, p in zip(axes, panels):
            _step(ax, p) if isinstance(p, StepData) else _residual(ax, p)
        for ax in axes[len(panels):]:
            ax.set_visible(False)
        out.append(Drawing(f"{plots.key}-time", "Time responses.", _svg(fig, f"{plots.key}-time")))
    return tuple(out)


@_styled
def status_mix(tallies: Sequence[Tally], statuses: Sequence[str], key: str = "status-mix") -> Drawing:
    """Horizontal stacked bars: loops per status within each group (area).

    Parameters
    ----------
    tallies : sequence of Tally
        One per group, drawn top to bottom in the given order.
    statuses : sequence of str
        Status words to stack, most severe first.
    key : str
        Drawing key and SVG id.
    """
    n = max(len(tallies), 1)
    longest = max((len(_label(t.group)) for t in tallies), default=4)
    fig, (ax,) = _figure(7.0, max(0.75 + 0.21 * n, 1.5), 1, left=min(0.25 + 0.062 * longest, 2.2), bottom=0.42)
    fig.subplots_adjust(right=1 - 1.25 / 7.0, top=1 - 0.12 / fig.get_figheight())
    y = np.arange(len(tallies))[::-1]
    left = np.zeros(len(tallies))
    for s in statuses:
        v = np.array([t.count(s) for t in tallies], float)
        ax.barh(y, v, left=left, color=STATUS_COLOURS.get(s, GREY), hatch=STATUS_HATCHES.get(s, ""),
                edgecolor="white", linewidth=0.6, label=s, height=0.7)
        left += v
    ax.set_yticks(y, [_label(t.group) for t in tallies])
    ax.set_xlabel("loops [-]")
    ax.grid(False, axis="y")
    ax.set_ylim(-0.6, len(tallies) - 0.4)
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.2)
    return Drawing(key, "Status mix per area.", _svg(fig, key))


@_styled
def status_trend(dates: Sequence[str], trend: Sequence[tuple[str, Sequence[int]]],
                 key: str = "status-trend") -> Drawing:
    """Stacked bars: loops per status at each audit, oldest first."""
    fig, (ax,) = _figure(7.0, 2.4, 1)
    fig.subplots_adjust(right=1 - 1.25 / 7.0, top=1 - 0.12 / 2.4)
    x = np.arange(len(dates))
    bottom = np.zeros(len(dates))
    for s, counts in trend:
        v = np.asarray(counts, float)
        ax.bar(x, v, bottom=bottom, color=STATUS_COLOURS.get(s, GREY), hatch=STATUS_HATCHES.get(s, ""),
               edgecolor="white", linewidth=0.6, label=s, width=0.7)
        bottom += v
    ax.set_xticks(x, [_label(d) for d in dates], rotation=30 if len(dates) > 6 else 0)
    ax.set_ylabel("loops [-]")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.2)
    return Drawing(key, "Status mix over audits.", _svg(fig, key))
