"""Report model of the model check: per loop "Model against plant data", and a site summary.

Plain frozen data built from ``audit.extras['model_checks']`` and the results columns of
:mod:`.modelcheck`; ``templates/plantdata_loop.html.j2`` and
``templates/plantdata_summary.html.j2`` draw it (the overlay plot as inline SVG from the
scaled coordinates computed here).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from .modelcheck import CheckTrace, ModelCheck
from .packed import Packed
from .sources import export_of, has_source

VERDICTS = ("confirmed", "disputed", "not identifiable", "record unusable", "not checked")
PLOT_W, PLOT_H, PAD_L, PAD_B, PAD_T, PAD_R = 560, 220, 52, 30, 10, 10


@dataclass(frozen=True)
class ParamRow:
    """One parameter, inventory against data.

    Attributes
    ----------
    name : str
        Parameter name (gain, tau1, tau2, tau_lead, dead_time).
    unit : str
        Its unit.
    inventory : Any
        The inventory's value (None when the model has no such parameter).
    identified : Any
        The identified value (None when none).
    ci95 : Any
        Half-width of its 95 % interval.
    """

    name: str
    unit: str
    inventory: Any
    identified: Any
    ci95: Any


@dataclass(frozen=True)
class Overlay:
    """The overlay plot: logged pv, identified model and inventory model, scaled to pixels.

    Attributes
    ----------
    width, height : int
        Plot size. [px]
    data, identified, inventory : str
        SVG polyline points ("x,y x,y ..."); '' when absent.
    x_ticks, y_ticks : tuple of (float, str)
        Tick positions [px] and labels.
    x_label, y_label : str
        Axis titles.
    """

    width: int
    height: int
    data: str
    identified: str
    inventory: str
    x_ticks: tuple[tuple[float, str], ...]
    y_ticks: tuple[tuple[float, str], ...]
    x_label: str
    y_label: str


@dataclass(frozen=True)
class DataCheckView:
    """The "Model against plant data" part of one loop's section.

    Attributes
    ----------
    record : str
        The record's name.
    verdict : str
        One of :data:`VERDICTS`.
    model_fit_pct, id_fit_pct, id_fit_holdout_pct : Any
        Fit % of the inventory model, of the identified model, held-out. [%]
    id_model : str
        Identified structure ('' when none).
    params : tuple of ParamRow
        Side by side.
    reasons : tuple of str
        Why disputed.
    notes : tuple of str
        What the reader and the identification said.
    overlay : Overlay or None
        The plot.
    id_ms, id_gm_db, id_pm_deg : Any
        Figures with the identified model and the current tuning. [-], [dB], [deg]
    id_stable : Any
        Stability with the identified model (None when not computed).
    """

    record: str
    verdict: str
    model_fit_pct: Any
    id_fit_pct: Any
    id_fit_holdout_pct: Any
    id_model: str
    params: tuple[ParamRow, ...]
    reasons: tuple[str, ...]
    notes: tuple[str, ...]
    overlay: Overlay | None
    id_ms: Any
    id_gm_db: Any
    id_pm_deg: Any
    id_stable: Any


@dataclass(frozen=True)
class DataSummaryLine:
    """One loop with a record in the site summary.

    Attributes
    ----------
    tag, anchor, verdict, id_model : str
        Loop, its detail anchor, the verdict and the identified structure.
    model_fit_pct, gain_ratio, dead_time_diff_s : Any
        [%], [-], [s].
    """

    tag: str
    anchor: str
    verdict: str
    id_model: str
    model_fit_pct: Any
    gain_ratio: Any
    dead_time_diff_s: Any


@dataclass(frozen=True)
class PlantDataSection:
    """Site summary of the model check.

    Attributes
    ----------
    counts : tuple of (str, int)
        Loops per verdict, in :data:`VERDICTS` order.
    total : int
        Loops with a record. [-]
    lines : tuple of DataSummaryLine
        Every loop with a record, inventory order.
    """

    counts: tuple[tuple[str, int], ...]
    total: int
    lines: tuple[DataSummaryLine, ...]


def _val(x: Any) -> Any:
    if x is None:
        return None
    try:
        f = float(x)
    except (TypeError, ValueError):
        return x
    return f if math.isfinite(f) or math.isinf(f) else None


def _ticks(lo: float, hi: float, n: int = 5) -> list[float]:
    if not (hi > lo):
        return [lo]
    raw = (hi - lo) / n
    mag = 10 ** math.floor(math.log10(raw))
    step = min((s * mag for s in (1, 2, 2.5, 5, 10) if s * mag >= raw), default=raw)
    start = math.ceil(lo / step) * step
    return [start + k * step for k in range(int((hi - start) / step + 1e-9) + 1)]


def overlay(trace: CheckTrace) -> Overlay:
    """Scaled polylines of the logged pv and the two models (the thinned trace of the check).

    Parameters
    ----------
    trace : CheckTrace
        Thinned samples of the logged pv [% of range] and of the identified and inventory
        models' outputs [% of range], with the whole segment's time span [s] and range.
    """
    lo, hi = trace.lo, trace.hi
    if hi - lo < 1e-9:
        lo, hi = lo - 1, hi + 1
    pad = 0.05 * (hi - lo)
    lo, hi = lo - pad, hi + pad
    scale_min = (trace.t_last - trace.t_first) > 1800
    scale = 60.0 if scale_min else 1.0
    tt = (trace.t - trace.t_first) / scale
    t_hi = float((np.float64(trace.t_last) - np.float64(trace.t_first)) / scale) or 1.0
    iw, ih = PLOT_W - PAD_L - PAD_R, PLOT_H - PAD_T - PAD_B

    def px(x):
        return PAD_L + iw * x / t_hi

    def py(y):
        return PAD_T + ih * (1 - (y - lo) / (hi - lo))

    def pts(s):
        if s is None:
            return ""
        return " ".join(f"{px(tt[i]):.1f},{py(s[i]):.1f}" for i in range(len(tt)) if np.isfinite(s[i]))
    xt = tuple((px(x), f"{x:g}") for x in _ticks(0.0, t_hi))
    yt = tuple((py(y), f"{y:.4g}") for y in _ticks(lo, hi))
    return Overlay(PLOT_W, PLOT_H, pts(trace.pv), pts(trace.identified), pts(trace.inventory), xt, yt,
                   "time [min]" if scale_min else "time [s]", "pv [% of range]")


def drawn_check(mc: ModelCheck) -> ModelCheck:
    """The check as the run keeps it: its overlay plot drawn (:func:`overlay`) and packed in place of its trace.

    The per-loop task calls it where the record was analysed, so the run's process holds the
    overlay's text, compressed, instead of the thinned arrays, and the report draws nothing.

    Parameters
    ----------
    mc : ModelCheck
        A compact check (:meth:`ModelCheck.compact`).

    Returns
    -------
    ModelCheck
        ``mc`` with ``drawn`` set and ``trace`` None; ``mc`` itself when it has no trace.
    """
    if mc.trace is None:
        return mc
    return replace(mc, trace=None, drawn=Packed.of(overlay(mc.trace)))


def _params(row, b) -> tuple[ParamRow, ...]:
    names = ("gain", "tau1", "tau2", "tau_lead", "dead_time")
    inv = {"gain": row.gain, "tau1": row.tau1, "tau2": row.tau2, "tau_lead": row.lead, "dead_time": row.dead_time}
    out = []
    for k in names:
        iv = _val(inv.get(k))
        idv = _val(b.params.get(k)) if b is not None else None
        if iv in (None, 0.0) and idv in (None, 0.0) and k not in ("gain", "dead_time"):
            continue
        unit = "s" if k != "gain" else ("1/s" if (b is not None and b.model == "ipdt") or row.model == "ipdt" else "-")
        out.append(ParamRow(k, unit, iv, idv, _val(b.ci95.get(k)) if b is not None else None))
    return tuple(out)


def data_views(audit) -> tuple[PlantDataSection | None, dict[int, DataCheckView]]:
    """The site summary and the per-loop views of the model check.

    Parameters
    ----------
    audit : Audit
        A finished run (the ``modelcheck`` stage stores its results in ``extras``).

    Returns
    -------
    tuple
        (section or None when no row has a record, row index -> view).
    """
    from ..report import loop_anchor

    res = audit.results
    if "model_check" not in res.columns:
        return None, {}
    checks = audit.extras.get("model_checks", {})
    export = export_of(audit)
    views: dict[int, DataCheckView] = {}
    lines = []
    for row in audit.inventory.rows:
        if not has_source(row, export):
            continue
        label = res.index[row.index]
        verdict = str(res.at[label, "model_check"] or "")
        mc = checks.get(row.index)
        ident = mc.identification if mc is not None else None
        b = ident.best if ident is not None else None
        ov = None
        if mc is not None and ident is not None and mc.drawn is not None:
            ov = mc.drawn.unpack()                       # drawn by the per-loop task (drawn_check)
        elif mc is not None and ident is not None:
            trace = mc.trace if mc.trace is not None else mc.compact().trace
            ov = overlay(trace) if trace is not None else None
        note = str(res.at[label, "data_note"] or "")
        views[row.index] = DataCheckView(
            record=(ident.name if ident is not None else str(row.data_file or row.tag).rsplit("/", 1)[-1]), verdict=verdict,
            model_fit_pct=_val(res.at[label, "model_fit_pct"]), id_fit_pct=_val(res.at[label, "id_fit_pct"]),
            id_fit_holdout_pct=_val(res.at[label, "id_fit_holdout_pct"]), id_model=str(res.at[label, "id_model"] or ""),
            params=_params(row, b), reasons=mc.reasons if mc is not None else (),
            notes=tuple(x for x in note.split("; ") if x), overlay=ov, id_ms=_val(res.at[label, "id_ms"]),
            id_gm_db=_val(res.at[label, "id_gm_db"]), id_pm_deg=_val(res.at[label, "id_pm_deg"]),
            id_stable=res.at[label, "id_stable"] if res.at[label, "id_stable"] in (True, False) else None)
        lines.append(DataSummaryLine(row.tag or f"row {row.excel_row}", loop_anchor(row), verdict,
                                     str(res.at[label, "id_model"] or ""), _val(res.at[label, "model_fit_pct"]),
                                     _val(res.at[label, "gain_ratio"]), _val(res.at[label, "dead_time_diff_s"])))
    if not lines:
        return None, views
    counts = tuple((v, sum(1 for ln in lines if ln.verdict == v)) for v in VERDICTS)
    return PlantDataSection(counts, len(lines), tuple(lines)), views

