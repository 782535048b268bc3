"""The report model of the groups of interacting loops (plain frozen data), and their chart data.

:func:`group_sections` reads a finished :class:`~audit.pipeline.Audit` and returns one
:class:`GroupSection` per group; :func:`group_nyquist_chart` turns a section's generalised Nyquist
curve into chart data in the style of :mod:`audit.plots`. ``templates/groups.html.j2`` renders
them. Values stay in project units (frequency [rad/s], phase [deg], levels [dB]).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np


@dataclass(frozen=True)
class CouplingLine:
    """One coupling as the report lists it.

    Attributes
    ----------
    from_tag, to_tag : str
        The acting loop and the loop whose PV moves.
    model : str
        The model in words, project units (gain [-] or [1/s], times [s]).
    """

    from_tag: str
    to_tag: str
    model: str


@dataclass(frozen=True)
class GroupLoopLine:
    """One loop of a group, alone and with its group closed.

    Attributes
    ----------
    tag, anchor : str
        Tag, and the anchor of its line in the loop list.
    status, status_alone : str
        Status with the group checks, and from the single-loop audit.
    ms, gm_db, pm_deg : float
        Alone: Ms [-], gain margin [dB], phase margin [deg].
    ms_in_group, gm_in_group_db, pm_in_group_deg : float
        With the others closed: Ms [-], gain margin [dB], phase margin [deg].
    rga_ss : float
        lambda_ii(0). [-]
    rga_wc : float
        |lambda_ii| at the loop's crossover. [-]
    wc_rad_s : float
        The loop's own crossover frequency. [rad/s]
    """

    tag: str
    anchor: str
    status: str
    status_alone: str
    ms: float
    gm_db: float
    pm_deg: float
    ms_in_group: float
    gm_in_group_db: float
    pm_in_group_deg: float
    rga_ss: float
    rga_wc: float
    wc_rad_s: float


@dataclass(frozen=True)
class GroupSection:
    """Everything the report shows of one group.

    Attributes
    ----------
    gid, anchor : str
        Group identifier and page anchor.
    tags : tuple of str
        Loops in matrix order.
    evaluated : bool
        False when a loop of the group could not be evaluated (``note`` says why).
    stable : bool
        Generalised Nyquist verdict.
    rhp_closed : int or None
        Closed-loop right-half-plane poles; None when not decided. [-]
    rhp_open : int
        Open-loop right-half-plane poles counted. [-]
    niederlinski : float
        Niederlinski index; NaN when it does not apply. [-]
    sigma_peak : float
        Peak of the largest singular value of (I + L)^-1; NaN when the group is unstable. [-]
    w_sigma_peak : float
        Its frequency. [rad/s]
    lcm_db : float
        Biggest log modulus; NaN when the group is unstable. [dB]
    couplings : tuple of CouplingLine
        The coupling table.
    rga_ss : tuple of tuple of float, or None
        Steady-state RGA, rows and columns in ``tags`` order. [-]
    rga_wc : tuple of (str, float, tuple of tuple of float)
        For each loop: tag, its crossover frequency [rad/s] and |RGA| there [-].
    loops : tuple of GroupLoopLine
        Each loop alone and in its group.
    warnings : tuple of str
        Pairing warnings.
    proposal_note : str
        What closing the group does to the proposals.
    note : str
        Why the verdict is not decided, or why the group was not evaluated.
    W : ndarray
        W(jw) = det(I + L(jw)) - 1 on the traced frequencies (the generalised Nyquist curve). [-]
    """

    gid: str
    anchor: str
    tags: tuple[str, ...]
    evaluated: bool
    stable: bool
    rhp_closed: int | None
    rhp_open: int
    niederlinski: float
    sigma_peak: float
    w_sigma_peak: float
    lcm_db: float
    couplings: tuple[CouplingLine, ...]
    rga_ss: tuple[tuple[float, ...], ...] | None
    rga_wc: tuple[tuple[str, float, tuple[tuple[float, ...], ...]], ...]
    loops: tuple[GroupLoopLine, ...]
    warnings: tuple[str, ...]
    proposal_note: str
    note: str
    W: np.ndarray


def _model_words(p) -> str:
    if p is None:
        return ""
    parts = [p.kind]
    if p.gain is not None:
        parts.append(f"K = {p.gain:.4g}" + (" 1/s" if p.kind == "ipdt" else ""))
    for name, v in (("tau1", p.tau1), ("tau2", p.tau2), ("lead", p.lead)):
        if v:
            parts.append(f"{name} = {v:.4g} s")
    if p.kind == "tf":
        parts.append(f"num {' '.join(f'{x:g}' for x in p.rational.num)}; den {' '.join(f'{x:g}' for x in p.rational.den)}")
    parts.append(f"dead time = {p.dead_time:.4g} s")
    return ", ".join(parts)


def _f(res, i: int, col: str) -> float:
    v = res.at[i, col] if col in res.columns else math.nan
    try:
        return float(v)
    except (TypeError, ValueError):
        return math.nan


def _matrix(m) -> tuple[tuple[float, ...], ...]:
    return tuple(tuple(float(x) for x in row) for row in np.asarray(m))


def group_sections(audit: Any) -> tuple[GroupSection, ...]:
    """The report sections of every group of interacting loops.

    Parameters
    ----------
    audit : Audit
        A finished run; groups come from ``audit.extras['groups']`` (empty without a couplings sheet).

    Returns
    -------
    tuple of GroupSection
        In group order (G1, G2, ...).
    """
    from ..report import row_anchor

    groups = audit.extras.get("groups") or ()
    res = audit.results
    rows = audit.inventory.rows
    out = []
    for gr in groups:
        members = gr.group.members
        tags = tuple(str(rows[i].tag) for i in members)
        cpl = tuple(CouplingLine(str(c.from_tag), str(c.to_tag), _model_words(c.process)) for c in gr.group.couplings)
        lines = tuple(GroupLoopLine(
            str(rows[i].tag), row_anchor(rows[i]), str(res.at[i, "status"]), str(res.at[i, "status_alone"]),
            _f(res, i, "ms"), _f(res, i, "gm_db"), _f(res, i, "pm_deg"), _f(res, i, "ms_in_group"),
            _f(res, i, "gm_in_group_db"), _f(res, i, "pm_in_group_deg"), _f(res, i, "rga_ss"), _f(res, i, "rga_wc"),
            _f(res, i, "wc_rad_s")) for i in members)
        pnotes = [str(res.at[i, "group_proposal_note"]) for i in members
                  if "group_proposal_note" in res.columns and str(res.at[i, "group_proposal_note"] or "")]
        fig = gr.figures
        if fig is None:
            out.append(GroupSection(gr.group.gid, f"group-{gr.group.gid.lower()}", tags, False, False, None, 0,
                                    math.nan, math.nan, math.nan, math.nan, cpl, None, (), lines, (), "", gr.note,
                                    np.zeros(0, complex)))
            continue
        st = fig.stability
        rga_wc = tuple((tags[k], fig.wc_rad_s[k], _matrix(np.abs(fig.rga_wc[k]))) for k in range(len(tags)))
        out.append(GroupSection(
            gr.group.gid, f"group-{gr.group.gid.lower()}", tags, True, bool(st.stable), st.rhp_closed, st.rhp_open,
            fig.niederlinski, *((fig.sigma_peak.value, fig.sigma_peak.w, fig.lcm_db) if st.stable else
                                (math.nan, math.nan, math.nan)), cpl,
            _matrix(fig.rga_ss) if fig.rga_ss is not None else None, rga_wc, lines, fig.warnings,
            pnotes[0] if pnotes else "", st.note, st.axis.det - 1.0))
    return tuple(out)


def group_nyquist_chart(sec: GroupSection, key: str):
    """Generalised Nyquist chart: W(jw) = det(I + L(jw)) - 1 and the critical point -1.

    The group is stable when the number of clockwise encirclements of -1 by W over the whole
    contour equals minus the open-loop right-half-plane poles (zero for open-loop stable groups);
    see :func:`audit.multiloop.figures.group_stability`. Both axes have the same scale.

    Parameters
    ----------
    sec : GroupSection
        The group (its ``W`` curve).
    key : str
        Unique prefix of the chart's ids in the page.

    Returns
    -------
    audit.plots.Chart
        Chart data (:mod:`audit.svg` layout ``nyquist``).

    References
    ----------
    .. [1] W. L. Luyben, Ind. Eng. Chem. Process Des. Dev. 25 (1986) 654-660 (W = -1 + det(I + G K)).
    """
    from .. import plots as P

    f0 = P._frame(210.0)
    aspect = (f0.y1 - f0.y0) / (f0.x1 - f0.x0)
    W = sec.W
    xlo, xhi, ylo, yhi = P._nyquist_view(W, 2.0, aspect)
    xstep = P.nice_step(xhi - xlo, 6)
    xv = list(P.linear_range(xlo, xhi, 6, snap=False)[2])
    yv = [k * xstep for k in range(math.ceil(ylo / xstep - 1e-9), math.floor(yhi / xstep + 1e-9) + 1)]
    f = P._finish(f0, xticks=P._ticks_lin(xv, xlo, xhi, f0.x0, f0.x1),
                  yticks=P._ticks_lin(yv, ylo, yhi, f0.y1, f0.y0),
                  xtitle="real part of det(I + L(j\u03c9)) \u2212 1 [-]", ytitle="imaginary part [-]")
    sx = lambda v: P._scale(v, xlo, xhi, f.x0, f.x1)  # noqa: E731
    sy = lambda v: P._scale(v, ylo, yhi, f.y1, f.y0)  # noqa: E731
    mirror = P._series("mirror image (\u03c9 < 0)", P.MIRROR, sx(W.real), sy(-W.imag), f)
    main = P._series("det(I + L(j\u03c9)) \u2212 1, \u03c9 > 0", P.S_AS_TUNED, sx(W.real), sy(W.imag), f)
    axes = [P._series("", P.REFERENCE, np.array([f.x0, f.x1]), np.array([sy(0.0)] * 2), f),
            P._series("", P.REFERENCE, np.array([sx(0.0)] * 2), np.array([f.y0, f.y1]), f)]
    crit = P.Mark("critical point \u22121", float(sx(-1.0)), float(sy(0.0)), "cross", P.VERMILLION)
    legend = P._legend(P._line_entries([main, mirror]) + [(crit.label, "mark", {"colour": crit.colour,
                                                                                  "shape": crit.shape})])
    title = f"Generalised Nyquist curve of group {sec.gid}"
    return P.Chart(key, "nyquist", title,
                   f"Curve of det(I + L) - 1 for the loops {', '.join(sec.tags)} closed together, with the critical "
                   f"point -1.", P.WIDTH, f.y1 + P.MARGIN_BOTTOM, f, tuple(axes + [main, mirror]), (), (crit,), (), (),
                   legend, title + ".")
