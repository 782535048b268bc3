"""The loop-health part of the report model: per loop and for the site (plain frozen data).

Built from ``audit.extras['health']`` (see :mod:`audit.plantdata.health`) and the health
columns of the results. Nothing here formats numbers or writes markup; the templates
``health_loop.html.j2`` and ``health_summary.html.j2`` and :mod:`audit.health_charts` do.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd



@dataclass(frozen=True)
class HealthFigure:
    """One health figure of a loop: label, value (plain), unit and results column."""

    label: str
    value: Any
    unit: str
    column: str


@dataclass(frozen=True)
class HealthView:
    """The loop-health part of one loop's detail section.

    Attributes
    ----------
    key : str
        Prefix of the chart ids (the loop's anchor plus ``-health``).
    figures : tuple of HealthFigure
        The figures from the operating record.
    findings : tuple of str
        What they show, most fundamental first.
    note : str
        What the figures rest on (record, stretch analysed) or why some are missing.
    plots : audit.plantdata.health.HealthPlots, audit.health_charts.HealthDrawing or None
        Trend, pv-op and autocorrelation data, or the charts already drawn from them (the per-loop
        task draws them with plant data, :func:`audit.health_charts.draw_health`).
    """

    key: str
    figures: tuple[HealthFigure, ...]
    findings: tuple[str, ...]
    note: str
    plots: Any


def health_key(anchor: str) -> str:
    """The key of a loop's health view (prefix of its charts' ids) from the loop's anchor.

    Parameters
    ----------
    anchor : str
        The loop's anchor in the page (:func:`audit.report.loop_anchor`).
    """
    return f"{anchor}-health"


@dataclass(frozen=True)
class HealthGroup:
    """Loops sharing one finding, for the site summary: what, how many, which (tag, anchor)."""

    label: str
    loops: tuple[tuple[str, str], ...]


@dataclass(frozen=True)
class HealthSummary:
    """What the operating records say across the site, for a manager at a glance.

    Attributes
    ----------
    with_records : int
        Loops with a record of routine operation analysed. [-]
    with_mode : int
        Those whose record carries a mode signal. [-]
    median_auto_pct : float
        Median share of time closed over the loops with a mode signal; NaN without any. [%]
    auto_min_pct : float
        The policy's limit for "mostly in manual". [%]
    groups : tuple of HealthGroup
        Mostly in manual, valves suspected sticking, outputs at a limit, oscillating, far from
        minimum variance (empty groups kept, so the summary always reads the same).
    """

    with_records: int
    with_mode: int
    median_auto_pct: float
    auto_min_pct: float
    groups: tuple[HealthGroup, ...]


FIGURES = (("time closed (automatic or cascade)", "auto_pct", "%"),
           ("time in manual", "manual_pct", "%"),
           ("output at a limit", "op_limited_pct", "%"),
           ("pv outside its range", "pv_out_of_range_pct", "%"),
           ("set-point moves", "sp_changes", "-"),
           ("control error, standard deviation", "error_std_pct", "% of range"),
           ("control error, IAE per hour", "iae_per_h", "% of range x s/h"),
           ("oscillating", "oscillating", "-"),
           ("oscillation period", "oscillation_period_s", "s"),
           ("oscillation amplitude", "oscillation_amplitude_pct", "% of range"),
           ("oscillation regularity", "oscillation_regularity", "-"),
           ("valve suspected sticking", "valve_sticking", "-"),
           ("stiction index", "stiction_index", "-"),
           ("sticking: confidence", "valve_sticking_confidence", "-"),
           ("Harris index", "harris_index", "-"))


def _plain(v: Any) -> Any:
    if v is None or v is pd.NA:
        return None
    if isinstance(v, (bool, np.bool_)):
        return bool(v)
    if isinstance(v, (int, float, np.integer, np.floating)):
        x = float(v)
        return None if math.isnan(x) else x
    return v


def health_view(audit, i: int, anchor: str) -> HealthView | None:
    """The health part of row ``i``'s detail section; None when the row has no operating record.

    Parameters
    ----------
    audit : Audit
        A finished run.
    i : int
        Row position.
    anchor : str
        The loop's anchor in the page.
    """
    got = (audit.extras.get("health") or {}).get(i)
    if got is None:
        return None
    _, plots = got
    res = audit.results
    cols = res.columns

    def cell(col: str) -> Any:
        # one cell by position, column first (as row i's value: not a copy of the whole row, which for a
        # results table of some 150 columns of mixed kinds cost milliseconds a loop)
        return res[col].iat[i] if col in cols else None

    figs = tuple(HealthFigure(label, v, unit, col) for label, col, unit in FIGURES
                 if col in cols and (v := _plain(cell(col))) is not None)
    words = str(cell("health_findings") or "")
    return HealthView(health_key(anchor), figs, tuple(w for w in words.split("; ") if w),
                      str(cell("health_note") or ""), plots)


def health_summary(audit, anchors: dict[int, str]) -> HealthSummary | None:
    """The site summary of the operating records; None when no row has one.

    Parameters
    ----------
    audit : Audit
        A finished run.
    anchors : dict
        Row position -> the loop's anchor ('' when it has no detail section).
    """
    got = audit.extras.get("health") or {}
    if not got:
        return None
    res = audit.results.reset_index(drop=True)
    pol = audit.inventory.policy
    idx = sorted(got)

    def col(name: str) -> list[Any]:
        return [_plain(res.at[i, name]) if name in res.columns else None for i in idx]

    tags = [str(res.at[i, "tag"] or "") for i in idx]
    auto, stick, lim, osc, harris = (col(c) for c in ("auto_pct", "valve_sticking", "op_limited_pct",
                                                      "oscillating", "harris_index"))

    def group(label: str, keep: list[bool]) -> HealthGroup:
        return HealthGroup(label, tuple((tags[k], anchors.get(idx[k], "")) for k in range(len(idx)) if keep[k]))

    known = [a for a in auto if a is not None]
    groups = (
        group(f"mostly in manual (closed less than {pol.auto_min_pct:g} % of the time)",
              [a is not None and a < pol.auto_min_pct for a in auto]),
        group("valve suspected sticking (retuning will not cure it)", [bool(s) for s in stick]),
        group(f"output at a limit more than {pol.op_limited_max_pct:g} % of the time",
              [x is not None and x > pol.op_limited_max_pct for x in lim]),
        group("oscillating", [bool(o) for o in osc]),
        group(f"far from minimum variance (Harris index below {pol.harris_min:g})",
              [h is not None and h < pol.harris_min for h in harris]),
    )
    return HealthSummary(len(idx), len(known), float(np.median(known)) if known else math.nan,
                         float(pol.auto_min_pct), groups)
