"""Priority score and the ranked work list.

Every loop that needs action gets a score; the work list orders them, highest first.

    priority_score = severity points + 30 x criticality weight + 60 x feasibility x benefit

* severity points (the class dominates): unstable 800; invalid row ('fix the inventory') 600;
  fails a robustness limit (Ms, gain or phase margin) 400; misses only the rejection requirement
  300; marginal 100; passes 0.
* criticality weight: ``policy.weight_high`` / ``weight_medium`` / ``weight_low`` (3 / 2 / 1 by default).
* feasibility: 1 for ``retune`` and ``check model`` (the fix is known), 0.5 for
  ``not achievable by tuning`` (tuning helps only in part), 0 for rows not evaluated.
* benefit in [0, 1]: 1 when an unstable loop is made stable; otherwise the largest of the
  predicted band improvement / 20 dB, the Ms reduction (Ms - Ms')/(Ms - 1) and the relative
  load-step IAE reduction, each clipped to [0, 1].

With the default weights every unstable loop (>= 830) ranks above every invalid row (<= 690),
and every invalid row (>= 630) above every failing loop (<= 550). Within the lower classes the
spread (at most 30 x 3 + 60 = 150 points) lets a high-criticality loop with a large feasible
benefit pass a low-criticality loop of the next class up, which is intended.
Ties are broken by tag, then by row number, so the list is deterministic.

Loop health from operating records (``audit.plantdata.health``) can put a loop on the work list
whatever its model says, with the action that follows from the data; the first that applies wins:

* closed less than ``auto_min_pct`` of the record: **return the loop to automatic** (350 points);
* the valve suspected sticking (curve-fitting test): **check the valve: suspected sticking,
  retuning will not cure it** (400 points); no retune is offered for that loop, whatever its
  model says, and its verdict becomes ``check the valve first``;
* the output at a limit more than ``op_limited_max_pct`` of the record: **check valve sizing or
  range** (300 points);
* (then the model's own action, as above;)
* oscillating with no sign of a valve fault: **retune** (350 points), with the model's proposal
  (the proposals stage makes one for such a loop even when its model passes).

The score is the larger of these points and the model's severity points, plus the criticality
points, plus the benefit points of a retune.
Groups of interacting loops (``group_id``, couplings sheet) are ranked as one item: every loop of a
group that needs action takes the highest score among them, and they stand together on the list
(ordered by tag within the group), since retuning one of them changes what the others see.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Mapping

import pandas as pd

from .policy import Policy

SEVERITY_POINTS: dict[str, float] = {
    "unstable": 800.0,
    "invalid": 600.0,
    "fails robustness": 400.0,
    "misses requirement": 300.0,
    "marginal": 100.0,
    "passes": 0.0,
}
#: Points per unit of criticality weight. [-]
CRITICALITY_POINTS = 30.0
#: Points of a full expected benefit at full feasibility. [-]
BENEFIT_POINTS = 60.0
#: Band improvement that counts as the full benefit. [dB]
BENEFIT_BAND_DB = 20.0
FEASIBILITY: dict[str, float] = {
    "retune": 1.0,
    "check model": 1.0,
    "not achievable by tuning": 0.5,
    "no change needed": 0.0,
    "not evaluated": 0.0,
    "": 1.0,            # proposals not requested: the benefit is unknown, counted as zero below
}
ACTION_AUTOMATIC = "return the loop to automatic"
ACTION_VALVE = "check the valve: suspected sticking, retuning will not cure it"
ACTION_SIZING = "check valve sizing or range"
ACTIONS = ("retune", "check the model or the valve", "structural change", "fix the inventory row",
           ACTION_AUTOMATIC, ACTION_VALVE, ACTION_SIZING)
#: Points of the findings from operating records (see the module notes). [-]
HEALTH_POINTS: dict[str, float] = {"manual": 350.0, "sticking": 400.0, "saturation": 300.0,
                                   "oscillation": 350.0}
PRIORITY_COLUMNS = ("priority_score", "rank", "action", "reason", "expected_improvement")


@dataclass(frozen=True)
class Priority:
    """The priority of one row.

    Attributes
    ----------
    severity : str
        Key of :data:`SEVERITY_POINTS`.
    score : float
        Priority score. [-]
    action : str or None
        One of :data:`ACTIONS`; None when nothing needs doing.
    reason : str
        Why, in a few words.
    expected_improvement : str
        Predicted change if the action is taken.
    benefit : float
        Expected benefit in [0, 1]. [-]
    """

    severity: str
    score: float
    action: str | None
    reason: str
    expected_improvement: str
    benefit: float


def _num(rec: Mapping[str, Any], key: str) -> float:
    v = rec.get(key) if hasattr(rec, "get") else None
    try:
        return math.nan if v is None or pd.isna(v) else float(v)
    except (TypeError, ValueError):
        return math.nan


def _txt(rec: Mapping[str, Any], key: str) -> str:
    v = rec.get(key) if hasattr(rec, "get") else None
    return "" if v is None or (not isinstance(v, str) and pd.isna(v)) else str(v)


def severity(rec: Mapping[str, Any]) -> str:
    """Severity class of one results row (status, limits in force and figures).

    Parameters
    ----------
    rec : mapping
        One row of the results table: ``status``, the figures ``ms`` [-], ``gm_db`` [dB],
        ``pm_deg`` [deg], ``gm_low`` [-] and the limits in force ``ms_max`` [-],
        ``gm_min_db`` [dB], ``pm_min_deg`` [deg].

    Returns
    -------
    str
        ``unstable``, ``invalid``, ``marginal`` or ``passes`` as the status says; for a
        failing row ``fails robustness`` when a robustness limit is broken (both ways for the
        gain margin), else ``misses requirement``; any other status gives ``fails robustness``.
    """
    status = _txt(rec, "status")
    if status in ("unstable", "invalid", "marginal", "passes"):
        return status
    ms, gm, pm, down = (_num(rec, k) for k in ("ms", "gm_db", "pm_deg", "gm_low"))
    robust_broken = (ms > _num(rec, "ms_max")) or (gm < _num(rec, "gm_min_db")) or (pm < _num(rec, "pm_min_deg"))
    if math.isfinite(down) and 0 < down:
        robust_broken |= -20 * math.log10(down) < _num(rec, "gm_min_db")
    if robust_broken or status != "fails":
        return "fails robustness"
    return "misses requirement"


def benefit(rec: Mapping[str, Any]) -> float:
    """Expected benefit in [0, 1] of the proposal of one results row (see the module notes).

    Parameters
    ----------
    rec : mapping
        One row of the results table with the figures before (``ms`` [-], ``band_s_db`` [dB],
        ``load_iae_s`` [s]) and after the proposal (``proposal_ms`` [-],
        ``proposal_band_s_db`` [dB], ``proposal_iae_s`` [s]) and ``status``.

    Returns
    -------
    float
        The largest relative improvement, clipped to [0, 1]; 0 without a proposal,
        1 for an unstable loop with one. [-]
    """
    after_ms = _num(rec, "proposal_ms")
    if not math.isfinite(after_ms):
        return 0.0
    if _txt(rec, "status") == "unstable":
        return 1.0
    parts = []
    b0, b1 = _num(rec, "band_s_db"), _num(rec, "proposal_band_s_db")
    if math.isfinite(b0) and math.isfinite(b1):
        parts.append((b0 - b1) / BENEFIT_BAND_DB)
    m0 = _num(rec, "ms")
    if math.isfinite(m0) and m0 > 1:
        parts.append((m0 - after_ms) / (m0 - 1.0))
    i0, i1 = _num(rec, "load_iae_s"), _num(rec, "proposal_iae_s")
    if math.isfinite(i0) and math.isfinite(i1) and i0 > 0:
        parts.append((i0 - i1) / i0)
    return max([0.0] + [min(1.0, max(0.0, p)) for p in parts])


def _fmt(x: float) -> str:
    return "n/a" if not math.isfinite(x) else f"{x:.3g}"


def _improvement(rec: Mapping[str, Any]) -> str:
    if not math.isfinite(_num(rec, "proposal_ms")):
        return ""
    b0, b1 = _num(rec, "band_s_db"), _num(rec, "proposal_band_s_db")
    m0, m1 = _num(rec, "ms"), _num(rec, "proposal_ms")
    if _txt(rec, "status") == "unstable":
        # the figures of an unstable closed loop describe no response: quote the proposal's alone
        parts = [f"unstable -> Ms {_fmt(m1)}"]
        if math.isfinite(b1):
            parts.append(f"band |S| {_fmt(b1)} dB")
        return "; ".join(parts)
    parts = []
    if math.isfinite(b1):
        parts.append(f"band |S| {_fmt(b0)} -> {_fmt(b1)} dB")
    parts.append(f"Ms {_fmt(m0)} -> {_fmt(m1)}")
    i0, i1 = _num(rec, "load_iae_s"), _num(rec, "proposal_iae_s")
    if math.isfinite(i0) and math.isfinite(i1) and i0 > 0:
        parts.append(f"load IAE {100 * (i1 - i0) / i0:+.0f} %")
    return "; ".join(parts)


def _reason(rec: Mapping[str, Any], sev: str) -> str:
    if sev == "invalid":
        return "inventory row not valid"
    if sev == "unstable":
        return "closed loop unstable"
    first = _txt(rec, "findings").split("; ")[0]
    if sev == "misses requirement":
        return f"misses rejection requirement ({first})" if first else "misses rejection requirement"
    return first or sev


def _action(sev: str, verdict: str) -> str | None:
    if sev == "invalid":
        return "fix the inventory row"
    if sev == "passes":
        return None
    if verdict == "check model":
        return "check the model or the valve"
    if verdict == "not achievable by tuning":
        return "structural change"
    if verdict == "no change needed":
        # not passing, yet the tuning needs no change: an input of the row (its disturbance record) is the fix
        return "fix the inventory row"
    return "retune"


def _flag(rec: Mapping[str, Any], key: str) -> bool:
    v = rec.get(key) if hasattr(rec, "get") else None
    return v is not None and not (not isinstance(v, (bool, str)) and pd.isna(v)) and bool(v)


def health_issue(rec: Mapping[str, Any], policy: Policy) -> str | None:
    """The finding from operating records that decides the action, if any.

    Parameters
    ----------
    rec : mapping
        One results row with the health columns ``auto_pct`` [%], ``valve_sticking``,
        ``op_limited_pct`` [%] and ``oscillating`` (absent or blank: no finding).
    policy : Policy
        ``auto_min_pct`` [%] and ``op_limited_max_pct`` [%].

    Returns
    -------
    str or None
        ``manual``, ``sticking``, ``saturation`` or ``oscillation`` (the first that applies, in
        that order), None when the record shows none of them.
    """
    auto = _num(rec, "auto_pct")
    if math.isfinite(auto) and auto < policy.auto_min_pct:
        return "manual"
    if _flag(rec, "valve_sticking"):
        return "sticking"
    lim = _num(rec, "op_limited_pct")
    if math.isfinite(lim) and lim > policy.op_limited_max_pct:
        return "saturation"
    if _flag(rec, "oscillating"):
        return "oscillation"
    return None


def _health_first(rec: Mapping[str, Any], issue: str) -> str:
    words = _txt(rec, "health_findings").split("; ")
    key = {"manual": "mostly in manual", "sticking": "valve suspected", "saturation": "output at",
           "oscillation": "oscillating"}[issue]
    first = next((w for w in words if w.startswith(key)), words[0])
    outside = next((w for w in words if "enters from outside" in w), "")
    return f"{first}; {outside}" if issue == "oscillation" and outside else first


def priority_of(rec: Mapping[str, Any], policy: Policy) -> Priority:
    """Score, action and words of one results row.

    Parameters
    ----------
    rec : mapping
        One row of the results table with the frequency, proposal (and optionally step) columns.
    policy : Policy
        Criticality weights.
    """
    sev = severity(rec)
    crit = _txt(rec, "criticality") or "medium"
    weight = {"high": policy.weight_high, "medium": policy.weight_medium, "low": policy.weight_low}.get(
        crit, policy.weight_medium)
    verdict = _txt(rec, "verdict")
    b = benefit(rec)
    feas = FEASIBILITY.get(verdict, 1.0)
    action = _action(sev, verdict)
    score = SEVERITY_POINTS[sev] + CRITICALITY_POINTS * weight + BENEFIT_POINTS * feas * b
    if action is None:
        score = SEVERITY_POINTS[sev] + CRITICALITY_POINTS * weight if sev != "passes" else 0.0
    issue = health_issue(rec, policy) if sev != "invalid" else None
    if issue is not None and not (issue == "oscillation" and action is not None):
        points = max(SEVERITY_POINTS[sev], HEALTH_POINTS[issue]) + CRITICALITY_POINTS * weight
        if issue == "oscillation":
            b = benefit(rec)
            return Priority(sev, float(points + BENEFIT_POINTS * b), "retune", _health_first(rec, issue),
                            _improvement(rec), b)
        act = {"manual": ACTION_AUTOMATIC, "sticking": ACTION_VALVE, "saturation": ACTION_SIZING}[issue]
        return Priority(sev, float(points), act, _health_first(rec, issue), "", 0.0)
    return Priority(sev, float(score), action, _reason(rec, sev) if action else "",
                    _improvement(rec) if action else "", b)


def _records(results: pd.DataFrame) -> list[dict[str, Any]]:
    """Each row of the results as a dict (column -> value), built a column at a time: one ``iloc``
    Series per row cost more than the scoring itself. The values are those of the row (numbers as
    Python numbers, missing as NaN, None or NA), read by :func:`_num`, :func:`_txt` and :func:`_flag`."""
    names = list(results.columns)
    columns = [results.iloc[:, j].tolist() for j in range(len(names))]
    return [dict(zip(names, values)) for values in zip(*columns)] if names else [{} for _ in range(len(results))]


def work_list(results: pd.DataFrame, policy: Policy) -> pd.DataFrame:
    """Score and rank every row; the work list is the rows with a rank.

    Parameters
    ----------
    results : pandas.DataFrame
        The results table with the frequency and proposal (and optionally step) columns.
    policy : Policy
        Criticality weights ``weight_high``, ``weight_medium``, ``weight_low``. [-]

    Returns
    -------
    pandas.DataFrame
        Indexed like ``results``, columns :data:`PRIORITY_COLUMNS`; ``rank`` is 1 for the most
        urgent row and missing for rows that need no action. Loops of a group (``group_id``) that need
        action share the group's highest score and stand together. Ties are broken by group, tag, then row.
    """
    pr = [priority_of(rec, policy) for rec in _records(results)]
    groups = [("" if pd.isna(g) else str(g)) for g in results["group_id"]] if "group_id" in results.columns \
        else [""] * len(results)
    top: dict[str, float] = {}
    for g, p in zip(groups, pr):
        if g and p.action:
            top[g] = max(top.get(g, 0.0), p.score)
    score = [top[g] if g and p.action else p.score for g, p in zip(groups, pr)]
    out = pd.DataFrame({
        "priority_score": score,
        "action": [p.action or "" for p in pr],
        "reason": [p.reason for p in pr],
        "expected_improvement": [p.expected_improvement for p in pr],
    }, index=results.index)
    tags = results["tag"].astype(str).tolist() if "tag" in results.columns else [""] * len(results)
    rows = results["row"].tolist() if "row" in results.columns else list(range(len(results)))
    todo = [i for i, p in enumerate(pr) if p.action]
    todo.sort(key=lambda i: (-round(score[i], 9), groups[i], tags[i], rows[i]))
    rank = [pd.NA] * len(results)
    for r, i in enumerate(todo, start=1):
        rank[i] = r
    out["rank"] = pd.array(rank, dtype="Int64")
    return out[list(PRIORITY_COLUMNS)]


def add_priority(audit) -> None:
    """Pipeline stage: add :data:`PRIORITY_COLUMNS` to ``audit.results``.

    Parameters
    ----------
    audit : Audit
        The run, after the proposals stage; ``results`` is changed in place and the
        inventory's policy gives the criticality weights. A loop whose valve is suspected
        sticking has its ``retune`` verdict replaced by ``check the valve first``.
    """
    res = audit.results
    if "valve_sticking" in res.columns and "verdict" in res.columns:
        stick = res["valve_sticking"].fillna(False).astype(bool) & (res["verdict"] == "retune")
        res.loc[stick, "verdict"] = "check the valve first"
    wl = work_list(res, audit.inventory.policy)
    for c in PRIORITY_COLUMNS:
        res[c] = wl[c]
