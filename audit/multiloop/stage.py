"""Pipeline stages for interacting loops: group figures and verdicts, then proposals checked together.

``add_group_checks`` (after the single-loop and cascade stages) evaluates every group of the
couplings sheet with the loops' present settings and adds :data:`GROUP_COLUMNS`. Its verdicts:

* *The group is unstable*: every loop of a group whose generalised Nyquist verdict is unstable
  (or not decided) becomes ``unstable``, whatever it is alone; the finding names the group and
  its closed-loop right-half-plane pole count.
* *Passes alone, fails with its group closed*: a loop whose own sensitivity peak with the others
  closed (``ms_in_group``), gain margin or phase margin breaks its limits in force becomes
  ``fails`` (``marginal`` inside the marginal zone) with the figures in words.
* Pairing warnings (negative or large relative gains, negative Niederlinski index) go to
  ``group_note`` of the loops concerned, not to the status.

``status_alone`` keeps each group loop's single-loop status; the single-loop figure columns are
never changed.

``check_group_proposals`` (after the proposals) re-evaluates each group with the single-loop
proposals in place of the present settings of the loops that have one. When the group is then
unstable or a loop's in-group Ms exceeds its limit, the proposals are detuned together by
Luyben's biggest-log-modulus factor F (gain / F, integral time x F on every proposed loop; the
smallest F for which the group is stable and L_cm max <= 2N dB), and the detuned settings are
reported beside the single-loop ones. Where no detuning can restore the group (a negative
Niederlinski index, or no factor up to 50), the loops' verdict becomes ``not achievable by
tuning`` (the work list then asks for a structural change: re-pairing or decoupling).

References
----------
.. [1] W. L. Luyben, "Simple method for tuning SISO controllers in multivariable systems",
   Ind. Eng. Chem. Process Des. Dev. 25 (1986) 654-660.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import pandas as pd

from .couplings import LoopGroup
from .figures import GroupFigures, GroupModel, analyse_group, blt_detune, detuned

GROUP_COLUMNS = (
    "group_id", "status_alone", "group_stable", "group_rhp_closed", "group_niederlinski", "group_sigma_peak",
    "rga_ss", "rga_wc", "ms_in_group", "gm_in_group", "gm_in_group_db", "pm_in_group_deg", "wc_in_group_rad_s",
    "group_note",
)
GROUP_PROPOSAL_COLUMNS = ("group_detuning", "group_proposal_settings", "group_proposal_ms", "group_proposal_note")


@dataclass(frozen=True)
class GroupResult:
    """What the audit keeps of one group for the report.

    Attributes
    ----------
    group : LoopGroup
        Members and couplings.
    model : GroupModel or None
        The group with present settings; None when a member could not be evaluated.
    figures : GroupFigures or None
        The figures with present settings.
    note : str
        Why the group was not evaluated, or ''.
    """

    group: LoopGroup
    model: GroupModel | None
    figures: GroupFigures | None
    note: str = ""


def group_model(group: LoopGroup, models: list, rows) -> GroupModel | None:
    """The GroupModel of a group from the audit's loop models, or None when a member has none.

    Parameters
    ----------
    group : LoopGroup
        Members (inventory row indices) and couplings.
    models : list of LoopModel or None
        The audit's models, one per inventory row (cascades composed).
    rows : sequence of LoopRow
        The inventory rows (for the tags).
    """
    ms = [models[i] for i in group.members]
    if any(m is None for m in ms):
        return None
    pos = {r: k for k, r in enumerate(group.members)}
    cpl = {(pos[c.target], pos[c.source]): c.process for c in group.couplings}
    return GroupModel(tuple(str(rows[i].tag) for i in group.members), tuple(ms), cpl)


def _f(x: float) -> str:
    if x is None or not math.isfinite(x):
        return "inf" if x == math.inf else "n/a"
    return f"{x:.3g}"


def _in_group_words(lp, lim: dict[str, float], marginal_pct: float) -> tuple[list[str], list[str]]:
    """(broken, near) limits of one loop with its group closed, in words."""
    p = marginal_pct / 100.0
    broken, near = [], []
    if lp.ms > lim["ms_max"]:
        broken.append(f"Ms {_f(lp.ms)} > {_f(lim['ms_max'])}")
    elif lp.ms > (1 - p) * lim["ms_max"]:
        near.append(f"Ms {_f(lp.ms)} near limit {_f(lim['ms_max'])}")
    gdb = 20 * math.log10(lp.gm) if lp.gm > 0 else -math.inf
    if gdb < lim["gm_min_db"]:
        broken.append(f"GM {_f(gdb)} dB < {_f(lim['gm_min_db'])} dB")
    elif gdb < (1 + p) * lim["gm_min_db"]:
        near.append(f"GM {_f(gdb)} dB near limit {_f(lim['gm_min_db'])} dB")
    if lp.pm_deg < lim["pm_min_deg"]:
        broken.append(f"PM {_f(lp.pm_deg)} deg < {_f(lim['pm_min_deg'])} deg")
    elif lp.pm_deg < (1 + p) * lim["pm_min_deg"]:
        near.append(f"PM {_f(lp.pm_deg)} deg near limit {_f(lim['pm_min_deg'])} deg")
    return broken, near


def _prepend(old: Any, words: str) -> str:
    old = "" if old is None or (isinstance(old, float) and math.isnan(old)) else str(old)
    return f"{words}; {old}" if old else words


def add_group_checks(audit) -> None:
    """Pipeline stage: figures and verdicts of every group of interacting loops.

    Parameters
    ----------
    audit : Audit
        The run, after the frequency and cascade stages. Adds :data:`GROUP_COLUMNS` to
        ``results`` (blank for loops in no group; ``ms_in_group`` [-], ``gm_in_group`` [-],
        ``gm_in_group_db`` [dB], ``pm_in_group_deg`` [deg], ``wc_in_group_rad_s`` [rad/s],
        ``group_sigma_peak`` [-], ``rga_ss`` [-], ``rga_wc`` [-], ``group_niederlinski`` [-]),
        updates ``status`` and ``findings`` of group loops, and stores a :class:`GroupResult`
        per group in ``audit.extras['groups']``. Nothing happens without a couplings sheet.
    """
    from ..verdict import limits_in_force

    cs = getattr(audit.inventory, "couplings", None)
    if cs is None:
        return
    res = audit.results
    n = len(res)
    cols: dict[str, list] = {c: [None] * n for c in GROUP_COLUMNS}
    policy = audit.inventory.policy
    out: list[GroupResult] = []
    for grp in cs.groups:
        tags = ", ".join(str(audit.inventory.rows[i].tag) for i in grp.members)
        gm_ = group_model(grp, audit.models, audit.inventory.rows)
        for i in grp.members:
            cols["group_id"][i] = grp.gid
            cols["status_alone"][i] = str(res.at[i, "status"])
        if gm_ is None:
            note = f"group {grp.gid} ({tags}) not evaluated: one of its loops could not be evaluated"
            out.append(GroupResult(grp, None, None, note))
            for i in grp.members:
                cols["group_note"][i] = note
            continue
        fig = analyse_group(gm_)
        out.append(GroupResult(grp, gm_, fig))
        st = fig.stability
        for k, i in enumerate(grp.members):
            lp = fig.loops[k]
            cols["group_stable"][i] = bool(st.stable)
            cols["group_rhp_closed"][i] = st.rhp_closed
            cols["group_niederlinski"][i] = fig.niederlinski
            cols["rga_ss"][i] = lp.rga_ss
            cols["rga_wc"][i] = abs(lp.rga_wc) if np.isfinite(lp.rga_wc) else math.nan
            if st.stable:       # peaks and margins of an unstable group mean nothing: left blank
                cols["group_sigma_peak"][i] = fig.sigma_peak.value
                cols["ms_in_group"][i] = lp.ms
                cols["gm_in_group"][i] = lp.gm
                cols["gm_in_group_db"][i] = 20 * math.log10(lp.gm) if lp.gm > 0 else -math.inf
                cols["pm_in_group_deg"][i] = lp.pm_deg
                cols["wc_in_group_rad_s"][i] = lp.wc_rad_s
            mine = [w for w in fig.warnings if w.startswith(f"{lp.tag}:") or w.startswith("Niederlinski")]
            cols["group_note"][i] = "; ".join(mine + ([st.note] if st.note else []))
            status = str(res.at[i, "status"])
            if status == "invalid":
                continue
            if not st.stable:
                z = st.rhp_closed
                zwords = f"{z} closed-loop pole{'s' if z != 1 else ''} in the right half-plane" if z is not None \
                    else st.note
                res.at[i, "findings"] = _prepend(res.at[i, "findings"],
                                                 f"the group {grp.gid} ({tags}) is unstable with all its loops "
                                                 f"closed ({zwords})")
                res.at[i, "status"] = "unstable"
                continue
            lim = limits_in_force(audit.inventory.rows[i], policy)
            broken, near = _in_group_words(lp, lim, policy.marginal_pct)
            if broken and status in ("passes", "marginal"):
                res.at[i, "findings"] = _prepend(res.at[i, "findings"], f"passes alone, fails with its group "
                                                 f"{grp.gid} closed: {', '.join(broken)}")
                res.at[i, "status"] = "fails"
            elif broken:
                res.at[i, "findings"] = _prepend(res.at[i, "findings"], f"with its group {grp.gid} closed: "
                                                 f"{', '.join(broken)}")
            elif near and status == "passes":
                res.at[i, "findings"] = _prepend(res.at[i, "findings"], f"with its group {grp.gid} closed: "
                                                 f"{', '.join(near)}")
                res.at[i, "status"] = "marginal"
    for c in GROUP_COLUMNS:
        vals = cols[c]
        if c in ("group_id", "status_alone", "group_note"):
            res[c] = pd.Series(["" if v is None else v for v in vals], index=res.index, dtype=object)
        elif c == "group_stable":
            res[c] = pd.array(vals, dtype="boolean")
        elif c == "group_rhp_closed":
            res[c] = pd.array(vals, dtype="Int64")
        else:
            res[c] = pd.Series([np.nan if v is None else float(v) for v in vals], index=res.index, dtype=float)
    audit.extras["groups"] = out


@dataclass(frozen=True)
class GroupProposal:
    """The single-loop proposals of a group checked together.

    Attributes
    ----------
    gid : str
        Group identifier.
    stable : bool
        Group stability with the single-loop proposals in place.
    ms_in_group : tuple of float
        Each loop's Ms with the others closed, proposals in place. [-]
    factor : float
        Common detuning factor applied (1 when the proposals keep the group within its limits). [-]
    lcm_db : float
        Biggest log modulus with the settings finally proposed. [dB]
    detuned_ms : tuple of float
        Each loop's Ms with the others closed after the detuning. [-]
    reached : bool
        False when no common factor restores the group (negative Niederlinski index, or none up to
        the search limit met Luyben's criterion); ``factor`` is then NaN.
    """

    gid: str
    stable: bool
    ms_in_group: tuple[float, ...]
    factor: float
    lcm_db: float
    detuned_ms: tuple[float, ...]
    reached: bool


def check_group_proposals(audit) -> None:
    """Pipeline stage: the single-loop proposals of each group re-evaluated with the group closed.

    Parameters
    ----------
    audit : Audit
        The run, after the proposals stage. Adds :data:`GROUP_PROPOSAL_COLUMNS`
        (``group_detuning`` [-], ``group_proposal_settings`` in the row's terms,
        ``group_proposal_ms`` [-], ``group_proposal_note``) and stores a :class:`GroupProposal`
        per group in ``audit.extras['group_proposals']``. Nothing happens without groups.
    """
    from ..tuning import row_terms, rounded, settings_text
    from ..verdict import limits_in_force

    results = audit.extras.get("groups")
    if not results:
        return
    res = audit.results
    n = len(res)
    cols: dict[str, list] = {c: [None] * n for c in GROUP_PROPOSAL_COLUMNS}
    props = audit.extras.get("proposals", {})
    rows = audit.inventory.rows
    policy = audit.inventory.policy
    out: dict[str, GroupProposal] = {}
    for gr in results:
        if gr.model is None:
            continue
        members = gr.group.members
        settings = [getattr(props.get(rows[i].index), "settings", None) for i in members]
        if not any(s is not None for s in settings):
            continue
        ctrls = [s.controller() if s is not None else m.controller for s, m in zip(settings, gr.model.loops)]
        g1 = gr.model.with_controllers(ctrls)
        fig1 = analyse_group(g1)
        ms1 = tuple(lp.ms for lp in fig1.loops)
        lims = [limits_in_force(rows[i], policy)["ms_max"] for i in members]
        breaks = not fig1.stability.stable or any(m > lim for m, lim in zip(ms1, lims))
        if not breaks:
            gp = GroupProposal(gr.group.gid, True, ms1, 1.0, fig1.lcm_db, ms1, True)
            out[gr.group.gid] = gp
            for k, i in enumerate(members):
                if settings[k] is not None:
                    cols["group_detuning"][i] = 1.0
                    cols["group_proposal_ms"][i] = ms1[k]
                    cols["group_proposal_note"][i] = f"the proposals of group {gr.group.gid} keep it stable and " \
                                                     f"within the Ms limits when closed together"
            continue
        why = "unstable" if not fig1.stability.stable else "outside the Ms limits"

        def unrepairable(note: str, reason: str) -> None:
            """No detuning restores the group: notes on the proposed loops, verdict 'not achievable by tuning'."""
            out[gr.group.gid] = GroupProposal(gr.group.gid, fig1.stability.stable, ms1, math.nan, fig1.lcm_db, ms1,
                                              False)
            for k, i in enumerate(members):
                if settings[k] is not None:
                    cols["group_proposal_ms"][i] = ms1[k]
                    cols["group_proposal_note"][i] = (f"the single-loop proposals leave group {gr.group.gid} {why} "
                                                      f"when closed together{note}: change the pairing or decouple")
            _not_by_tuning(res, members, f"group {gr.group.gid}: {reason} (change the pairing or decouple)")

        if np.isfinite(fig1.niederlinski) and fig1.niederlinski < 0:
            unrepairable(f"; its Niederlinski index {fig1.niederlinski:.3g} < 0, so no detuning with integral "
                         f"action can help", "pairing with a negative Niederlinski index")
            continue
        # Luyben's common factor, on the proposed loops only (the others keep their settings)
        proposed = [s is not None for s in settings]
        sub = blt_detune(g1, only=proposed)
        if not sub.reached:
            unrepairable(", and no common detuning factor up to 50 restores it", "no common detuning restores the group")
            continue
        g2 = g1.with_controllers([detuned(c, sub.factor) if p else c for c, p in zip(ctrls, proposed)])
        fig2 = analyse_group(g2)
        ms2 = tuple(lp.ms for lp in fig2.loops)
        out[gr.group.gid] = GroupProposal(gr.group.gid, fig1.stability.stable, ms1, sub.factor, fig2.lcm_db, ms2,
                                          fig2.stability.stable)
        for k, i in enumerate(members):
            if settings[k] is None:
                continue
            s = settings[k]
            d = replace(s, kc=s.kc / sub.factor, ti=(s.ti * sub.factor if s.ti else s.ti),
                        method=f"{s.method}, detuned F = {sub.factor:.3g} (BLT)")
            d = rounded(d, rows[i].conventions)
            cols["group_detuning"][i] = sub.factor
            cols["group_proposal_settings"][i] = settings_text(row_terms(d, rows[i].conventions), d.form)
            cols["group_proposal_ms"][i] = ms2[k]
            cols["group_proposal_note"][i] = (
                f"the single-loop proposals leave group {gr.group.gid} {why} when closed together; detuned "
                f"together by F = {sub.factor:.3g} (Luyben's biggest log modulus, L_cm max {fig2.lcm_db:.3g} dB)"
                + ("" if ms2[k] <= lims[k] else f"; Ms with the group closed {ms2[k]:.3g} still above "
                   f"{lims[k]:.3g}"))
    for c in GROUP_PROPOSAL_COLUMNS:
        vals = cols[c]
        if c in ("group_proposal_settings", "group_proposal_note"):
            res[c] = pd.Series(["" if v is None else v for v in vals], index=res.index, dtype=object)
        else:
            res[c] = pd.Series([np.nan if v is None else float(v) for v in vals], index=res.index, dtype=float)
    audit.extras["group_proposals"] = out


def _not_by_tuning(res: pd.DataFrame, members: tuple[int, ...], why: str) -> None:
    """Loops whose group no retuning can restore: the verdict says so, so the work list asks for a structural
    change instead of a retune."""
    for i in members:
        if "verdict" in res.columns and str(res.at[i, "verdict"]) == "retune":
            res.at[i, "verdict"] = "not achievable by tuning"
            if "limiting_factor" in res.columns:
                res.at[i, "limiting_factor"] = _prepend(res.at[i, "limiting_factor"], why)
