"""The report model: what the audit report says, as plain frozen data.

:func:`build_report` reads an :class:`~audit.pipeline.Audit` (inventory, loop
models, results table, extras) and returns a :class:`Report`. Nothing here
formats numbers or writes markup; :mod:`audit.render` and the templates do.
Values stay in project units (time [s], frequency [rad/s], phase [deg], levels [dB]).

The curves of the loop charts (exact frequency responses, step responses, residuals) are
computed by :mod:`audit.curves` for the first detail sections, so that :mod:`audit.plots` only draws.

Stages that may not have run are read tolerantly: the ranking columns, the
time-domain traces (:mod:`audit.timedomain`), disturbance residuals, proposals
and history are each shown when present and left out, with a note, when not.
"""

from __future__ import annotations

import functools
import re
from dataclasses import dataclass, field, replace
from typing import Any, Callable

import numpy as np
import pandas as pd

from .columns import RESULT_COLUMNS
from .curves import LoopPlots, PlotJob, _finite, collect_steps, plot_data, proposed_model, residual_data, start_steps
from .health_report import health_summary, health_view
from .loop import LoopModel
from .plantdata.report_part import data_views
from .policy import POLICY_HELP
from .rows import LoopRow

STATUS_ORDER: tuple[str, ...] = ("unstable", "fails", "marginal", "invalid", "not evaluated", "passes")
"""Status words from most to least severe (the fallback order of the work list)."""

WORK_COLUMNS: tuple[str, ...] = ("rank", "tag", "area", "reason", "action", "expected_improvement", "verdict",
                                 "proposal_settings")
"""Results columns written by the ranking stage."""

SUMMARY_TOP = 10
"""Work-list items repeated in the executive summary."""


# ----------------------------------------------------------------------------- data


@dataclass(frozen=True)
class Item:
    """One labelled value: a policy setting, a model parameter, a cell as entered."""

    label: str
    value: Any
    unit: str = ""
    note: str = ""


@dataclass(frozen=True)
class Cover:
    """What identifies the run (from :attr:`Audit.meta`)."""

    title: str
    site: str
    date: str
    inventory: str
    inventory_sha256: str
    report_id: str
    tool: str
    tool_version: str
    policy: tuple[Item, ...]
    limits: tuple[Item, ...]     # the headline limits; ``note`` holds the rule, "<=" or ">="


@dataclass(frozen=True)
class Tally:
    """Loops counted by status within one group (an area, a criticality, or all)."""

    group: str
    total: int
    by_status: tuple[tuple[str, int], ...]   # (status, count) in STATUS_ORDER, zeros included

    def count(self, status: str) -> int:
        """Loops of ``status`` in this group."""
        return dict(self.by_status).get(status, 0)


@dataclass(frozen=True)
class WorkItem:
    """One line of the work list."""

    position: int
    index: int                 # position in the inventory (and results)
    rank: Any
    row: int
    tag: str
    anchor: str
    area: str
    criticality: str
    status: str
    reason: str
    action: str
    expected_improvement: Any
    verdict: str
    proposal_settings: str


@dataclass(frozen=True)
class WorkList:
    """The ranked work list, or the fallback order when the ranking stage did not run."""

    items: tuple[WorkItem, ...]
    ranked: bool


@dataclass(frozen=True)
class Check:
    """One figure of a loop against its limit."""

    figure: str
    column: str
    value: Any
    limit: Any
    unit: str
    rule: str        # "<=", ">=" or "" (no limit)
    verdict: str     # within | near | beyond | unstable | stable | not evaluated | for information


@dataclass(frozen=True)
class CascadeInfo:
    """A cascade's outer loop and its inner loop."""

    inner_tag: str
    inner_anchor: str          # the inner loop's detail section id ('' when unknown)
    inner_row_anchor: str      # the inner loop's line in the all-loops table ('' when unknown)
    ratio: Any                 # results column cascade_ratio when present [-]
    ratio_min: float           # policy cascade_ratio_min [-]


@dataclass(frozen=True)
class LoopDetail:
    """The detail section of one loop."""

    index: int
    row: int
    tag: str
    anchor: str
    status: str
    findings: str
    identity: tuple[Item, ...]
    model: tuple[Item, ...]
    tuning: tuple[Item, ...]
    entered: tuple[Item, ...]
    checks: tuple[Check, ...]
    cascade: CascadeInfo | None
    proposal: "ProposalView | None"
    plots: LoopPlots | None
    notes: tuple[str, ...] = ()
    health: Any = None                        # audit.health_report.HealthView when the row has an operating record
    data: Any = None                  # audit.plantdata.report_part.DataCheckView: the model against plant data


@dataclass(frozen=True)
class LoopLine:
    """One line of the table of all loops."""

    row: int
    tag: str
    row_anchor: str
    detail_anchor: str        # '' when the loop has no detail section
    area: str
    criticality: str
    status: str
    ms: Any
    gm_db: Any
    pm_deg: Any
    band_s_db: Any
    band_required_db: Any
    findings: str


@dataclass(frozen=True)
class InvalidLine:
    """An inventory row that could not be evaluated, with its messages."""

    row: int
    sheet: str
    tag: str
    messages: tuple[str, ...]


@dataclass(frozen=True)
class HistoryEntry:
    """One loop in one kind of change: its tag and, where it applies, the figure and old/new values."""

    tag: str
    old: Any = None
    new: Any = None
    figure: str = ""
    unit: str = ""


@dataclass(frozen=True)
class HistoryItem:
    """One kind of change since the previous audit and the loops it concerns."""

    kind: str
    label: str
    entries: tuple[HistoryEntry, ...]


@dataclass(frozen=True)
class HistorySection:
    """Changes since the previous audit and the status mix over audits."""

    first_audit: bool
    previous_date: str
    items: tuple[HistoryItem, ...]
    acted_on: Any                                   # previous work-list items acted on [-], None when unknown
    previous_work_list: Any                         # size of the previous work list [-]
    trend_dates: tuple[str, ...]
    trend: tuple[tuple[str, tuple[int, ...]], ...]  # (status, counts per audit)


@dataclass(frozen=True)
class GlossaryEntry:
    """A results column: name, unit and meaning (from :mod:`audit.columns`)."""

    name: str
    unit: str
    meaning: str


@dataclass(frozen=True)
class Report:
    """The whole audit report as plain data."""

    cover: Cover
    total: Tally
    by_area: tuple[Tally, ...]
    by_criticality: tuple[Tally, ...]
    statuses: tuple[str, ...]                # status words present, most severe first
    work: WorkList
    details: tuple[LoopDetail, ...]          # work-list order
    needing_detail: int                      # loops that qualify for a detail section
    plot_limit: int | None                   # detail sections with plots: the first this many (None: all)
    loops: tuple[LoopLine, ...]
    invalid: tuple[InvalidLine, ...]
    file_problems: tuple[str, ...]
    history: HistorySection | None
    glossary: tuple[GlossaryEntry, ...]
    detail_mode: str
    notes: tuple[str, ...] = field(default=())
    health: Any = None                       # audit.health_report.HealthSummary when any row has an operating record
    groups: tuple = field(default=())        # audit.multiloop.report.GroupSection, one per group
    plant_data: Any = None                   # audit.plantdata.report_part.PlantDataSection, None without records

    @property
    def top_work(self) -> tuple[WorkItem, ...]:
        """The head of the work list shown in the executive summary."""
        return self.work.items[:SUMMARY_TOP]


# ----------------------------------------------------------------------------- helpers


def _blank(value: Any) -> bool:
    if value is None:
        return True
    kind = type(value)
    if kind is float:               # the common cases without pandas: NaN is the only float unequal to itself
        return value != value
    if kind is str or kind is int or kind is bool:
        return False
    try:
        return bool(pd.isna(value))
    except (TypeError, ValueError):
        return False


def _plain(value: Any) -> Any:
    """numpy scalars to Python, blanks to None."""
    if _blank(value):
        return None
    if isinstance(value, np.generic):
        return value.item()
    return value


def _text(value: Any) -> str:
    return "" if _blank(value) else str(value)


@functools.lru_cache(maxsize=65536)
def _slug(text: str) -> str:
    s = re.sub(r"[^A-Za-z0-9]+", "-", text).strip("-").lower()
    return s[:40] or "loop"


def loop_anchor(row: LoopRow) -> str:
    """Id of a loop's detail section: the tag made safe, plus the sheet row (unique, stable)."""
    return f"loop-{_slug(row.tag or '')}-r{row.excel_row}"


def row_anchor(row: LoopRow) -> str:
    """Id of a loop's line in the table of all loops.

    Parameters
    ----------
    row : LoopRow
        The inventory row.
    """
    return f"all-r{row.excel_row}"


class _Results:
    """Tolerant access to the results table, row by position."""

    def __init__(self, frame: pd.DataFrame):
        self.frame = frame.reset_index(drop=True)
        self.columns = set(self.frame.columns)
        self.n = len(self.frame)
        self._arrays: dict[str, np.ndarray] = {}   # column -> its values by position

    def get(self, i: int, name: str) -> Any:
        if name not in self.columns or i >= self.n:
            return None
        arr = self._arrays.get(name, False)
        if arr is False:   # first use: the column's values by position (the same values as .at once made plain)
            col = self.frame[name]
            arr = self._arrays[name] = (col.to_numpy() if isinstance(col.dtype, np.dtype)
                                        and col.dtype.kind in "biufcO" else col.to_numpy(dtype=object))
        return _plain(arr[i])

    def has(self, name: str) -> bool:
        return name in self.columns and bool(self.frame[name].notna().any())


def _status(res: _Results, i: int, row: LoopRow) -> str:
    s = _text(res.get(i, "status"))
    if s:
        return s
    return "invalid" if not row.valid else "not evaluated"


def _severity(status: str) -> int:
    return STATUS_ORDER.index(status) if status in STATUS_ORDER else len(STATUS_ORDER)


# ----------------------------------------------------------------------------- sections


def _cover(audit) -> Cover:
    meta = audit.meta
    sha = _text(meta.get("inventory_sha256"))
    pol = dict(meta.get("policy") or {})
    policy = tuple(Item(k, v, note=POLICY_HELP.get(k, "")) for k, v in pol.items())
    return Cover(
        title=_text(meta.get("title")) or "Control loop audit",
        site=_text(meta.get("site")),
        date=_text(meta.get("date")),
        inventory=_text(meta.get("inventory")),
        inventory_sha256=sha,
        report_id=f"{sha[:8] or 'nohash'}-{_text(meta.get('date'))}",
        tool=_text(meta.get("tool")),
        tool_version=_text(meta.get("tool_version")),
        policy=policy,
        limits=tuple(Item(label, pol[name], unit, rule) for name, label, unit, rule in (
            ("ms_max", "Ms", "-", "<="), ("gm_min_db", "gain margin", "dB", ">="),
            ("pm_min_deg", "phase margin", "deg", ">=")) if name in pol),
    )


def _tally(group: str, statuses: list[str]) -> Tally:
    counts = tuple((s, statuses.count(s)) for s in STATUS_ORDER)
    extra = sorted({s for s in statuses if s not in STATUS_ORDER})
    counts += tuple((s, statuses.count(s)) for s in extra)
    return Tally(group, len(statuses), counts)


def _tallies(keys: list[str], statuses: list[str], order: list[str] | None = None) -> tuple[Tally, ...]:
    groups: dict[str, list[str]] = {}
    for k, s in zip(keys, statuses):
        groups.setdefault(k, []).append(s)
    names = order if order is not None else sorted(groups, key=lambda g: (g == "", g.lower()))
    return tuple(_tally(g or "(none)", groups[g]) for g in names if g in groups)


def _work_item(pos: int, i: int, row: LoopRow, res: _Results, status: str) -> WorkItem:
    return WorkItem(
        position=pos,
        index=i,
        rank=res.get(i, "rank"),
        row=row.excel_row,
        tag=row.tag or "",
        anchor=loop_anchor(row),
        area=row.area,
        criticality=row.criticality,
        status=status,
        reason=_text(res.get(i, "reason")) or _text(res.get(i, "findings")) or "; ".join(
            p.message for p in row.errors),
        action=_text(res.get(i, "action")),
        expected_improvement=res.get(i, "expected_improvement"),
        verdict=_text(res.get(i, "verdict")),
        proposal_settings=_text(res.get(i, "proposal_settings")),
    )


def _work_list(rows: tuple[LoopRow, ...], res: _Results, statuses: list[str]) -> WorkList:
    if res.has("rank"):
        ranked = [(res.get(i, "rank"), i) for i in range(len(rows)) if _finite(res.get(i, "rank"))]
        order = [i for _, i in sorted(ranked)]
        return WorkList(tuple(_work_item(p + 1, i, rows[i], res, statuses[i]) for p, i in enumerate(order)), True)
    need = [i for i in range(len(rows)) if statuses[i] != "passes"]
    order = sorted(need, key=lambda i: (_severity(statuses[i]), (rows[i].tag or "").lower(), rows[i].excel_row))
    return WorkList(tuple(_work_item(p + 1, i, rows[i], res, statuses[i]) for p, i in enumerate(order)), False)


def _num_items(row: LoopRow, spec: tuple[tuple[str, str, str], ...]) -> tuple[Item, ...]:
    out = []
    for name, label, unit in spec:
        v = getattr(row, name, None)
        if v is not None and v != ():
            out.append(Item(label, v, unit))
    return tuple(out)


_MODEL_SPEC = (
    ("model", "Model type", ""), ("gain", "Process gain K", "-"), ("tau1", "Time constant tau1", "s"),
    ("tau2", "Time constant tau2", "s"), ("lead", "Lead time", "s"), ("dead_time", "Dead time theta", "s"),
    ("num", "Numerator (descending powers of s)", ""), ("den", "Denominator (descending powers of s)", ""),
    ("action", "Controller action", ""), ("sample", "Execution period Ts", "s"),
    ("pv_filter", "PV filter time constant", "s"),
)
_TUNING_SPEC = (
    ("form", "Controller form", ""), ("kc", "Controller gain Kc", "-"), ("ti", "Integral time Ti", "s"),
    ("td", "Derivative time Td", "s"), ("kp", "Proportional gain kp", "-"), ("ki", "Integral gain ki", "1/s"),
    ("kd", "Derivative gain kd", "s"), ("d_filter", "Derivative filter factor", "-"),
)


def _model_items(row: LoopRow) -> tuple[Item, ...]:
    items = list(_num_items(row, _MODEL_SPEC))
    if row.model == "ipdt":
        items = [Item(it.label, it.value, "1/s") if it.label.startswith("Process gain") else it for it in items]
    return tuple(items)


def _tuning_items(row: LoopRow) -> tuple[Item, ...]:
    items = list(_num_items(row, _TUNING_SPEC))
    if row.form != "parallel" and row.ti is None:
        items.append(Item("Integral action", "none"))
    return tuple(items)


def _verdict(value: Any, limit: Any, rule: str, margin_pct: float) -> str:
    if value is None:
        return "not evaluated"
    if limit is None or not rule:
        return "for information"
    if rule == "<=":
        if value > limit:
            return "beyond"
        return "near" if _finite(value) and value > limit - abs(limit) * margin_pct / 100 else "within"
    if value < limit:
        return "beyond"
    return "near" if _finite(value) and value < limit + abs(limit) * margin_pct / 100 else "within"


def _checks(i: int, res: _Results, policy) -> tuple[Check, ...]:
    m = float(getattr(policy, "marginal_pct", 10.0))
    stable = res.get(i, "stable")
    out = []
    if stable is not None:
        n = res.get(i, "rhp_closed")
        out.append(Check("Closed-loop stability (Nyquist)", "stable", bool(stable), None, "-", "",
                         "stable" if stable else "unstable"))
        if not stable and n is not None:
            out.append(Check("Closed-loop poles in the right half-plane", "rhp_closed", n, 0, "-", "<=", "beyond"))
    specs = (
        ("Sensitivity peak Ms", "ms", "ms_max", "-", "<="),
        ("Gain margin", "gm_db", "gm_min_db", "dB", ">="),
        ("Phase margin", "pm_deg", "pm_min_deg", "deg", ">="),
    )
    for label, col, lim, unit, rule in specs:
        v, L = res.get(i, col), res.get(i, lim)
        out.append(Check(label, col, v, L, unit, rule, _verdict(v, L, rule, m)))
    band, req = res.get(i, "band_s_db"), res.get(i, "band_required_db")
    if band is not None or req is not None:
        ok = res.get(i, "band_ok")
        v = _verdict(band, req, "<=", 0.0) if ok is None else ("within" if ok else "beyond")
        out.append(Check("Largest |S| in the rejection band", "band_s_db", band, req, "dB", "<=", v))
    out.append(Check("Delay margin", "dm_s", res.get(i, "dm_s"), None, "s", "", "for information"
                     if res.get(i, "dm_s") is not None else "not evaluated"))
    if stable is False:
        out = [c if c.column in ("stable", "rhp_closed") else
               Check(c.figure, c.column, c.value, c.limit, c.unit, c.rule, "not meaningful (unstable)")
               for c in out]
    return tuple(out)


def _entered(row: LoopRow) -> tuple[Item, ...]:
    return tuple(Item(str(k), v) for k, v in row.raw.items() if not _blank(v) and str(v).strip() != "")


@dataclass(frozen=True)
class ProposalView:
    """A retuning proposal as the report shows it."""

    verdict: str
    method: str
    settings: str                    # proposed settings in the row's own terms
    terms: tuple[tuple[str, Any, Any], ...]          # (setting in the row's own terms, as tuned, proposed)
    compare: tuple[tuple[str, str, Any, Any], ...]   # (figure, unit, as tuned, proposed)
    limiting_factor: str
    note: str


_COMPARE = (("Ms", "ms", "-"), ("Gain margin", "gm_db", "dB"), ("Phase margin", "pm_deg", "deg"),
            ("Delay margin", "dm_s", "s"), ("Largest |S| in the band", "band_s_db", "dB"),
            ("IAE after a unit load step", "iae", "s"))


def _proposal_view(proposal: Any, res: _Results, i: int) -> ProposalView | None:
    settings_text = _text(res.get(i, "proposal_settings"))
    if proposal is None and not settings_text:
        return None
    get = (lambda n: _field(proposal, n)) if proposal is not None else (lambda n: None)
    before, after = get("before"), get("after")
    compare = []
    if before is not None or after is not None:
        for label, name, unit in _COMPARE:
            b = _plain(_field(before, name)) if before is not None else None
            a = _plain(_field(after, name)) if after is not None else None
            if b is not None or a is not None:
                compare.append((label, unit, b, a))
    cur, new = dict(get("current_terms") or {}), dict(get("terms") or {})
    terms = tuple((str(k), _plain(cur.get(k)), _plain(new.get(k))) for k in list(new) + [k for k in cur if k not in new])
    return ProposalView(
        verdict=_text(get("verdict")) or _text(res.get(i, "verdict")),
        method=_text(get("method")),
        settings=_text(get("text")) or settings_text,
        terms=terms,
        compare=tuple(compare),
        limiting_factor=_text(get("limiting_factor")),
        note=_text(get("note")),
    )


# ----------------------------------------------------------------------------- plot jobs


def _plot_job(audit, i: int, row: LoopRow, model: LoopModel, res: _Results, proposed: LoopModel | None,
              inner_tag: str) -> PlotJob:
    ms_max = res.get(i, "ms_max")
    if ms_max is None:
        ms_max = audit.inventory.policy.ms_max
    band, att = res.get(i, "band_rad_s"), res.get(i, "attenuation_db")
    refs = tuple(res.get(i, c) for c in ("wc_rad_s", "w180_rad_s", "w_ms_rad_s", "band_rad_s"))
    return PlotJob(loop_anchor(row), model, proposed, refs, float(ms_max), band if _finite(band) else None,
                   att if _finite(att) else None, inner_tag,
                   residual_data((audit.extras.get("residuals") or {}).get(row.index)))


# ----------------------------------------------------------------------------- details


def _detail_order(rows, statuses, work: WorkList, mode: str, also: frozenset = frozenset()) -> list[int]:
    by_tag_order = [it.index for it in work.items]
    if mode == "all":
        head = [i for i in by_tag_order if rows[i].valid]
        seen = set(head)
        return head + [i for i in range(len(rows)) if i not in seen and rows[i].valid]
    return [i for i in by_tag_order if (statuses[i] not in ("passes", "invalid") or i in also) and rows[i].valid]


def _first_by_tag(rows) -> dict[str, LoopRow]:
    """The first row of each tag (an inner loop is found by its tag)."""
    out: dict[str, LoopRow] = {}
    for r in rows:
        if r.tag:
            out.setdefault(r.tag, r)
    return out


def _inner_row(by_tag: dict[str, LoopRow], row: LoopRow) -> LoopRow | None:
    if not row.inner_loop:
        return None
    return by_tag.get(row.inner_loop)


def _detail(audit, i: int, res: _Results, status: str, with_plots: bool,
            by_tag: dict[str, LoopRow]) -> tuple[LoopDetail, PlotJob | None]:
    rows, model = audit.inventory.rows, audit.models[i]
    row = rows[i]
    notes: list[str] = []
    proposal = (audit.extras.get("proposals") or {}).get(row.index)
    proposed = proposed_model(model, proposal) if model is not None and with_plots else None   # plots only
    cascade = None
    inner_tag = ""
    if model is not None and model.inner is not None:
        inner = _inner_row(by_tag, row)
        inner_tag = inner.tag if inner is not None and inner.tag else model.inner.tag
        cascade = CascadeInfo(inner_tag, loop_anchor(inner) if inner is not None else "",
                              row_anchor(inner) if inner is not None else "", res.get(i, "cascade_ratio"),
                              float(getattr(audit.inventory.policy, "cascade_ratio_min", 4.0)))
    job = _plot_job(audit, i, row, model, res, proposed, inner_tag) if with_plots and model is not None else None
    identity = (Item("Tag", row.tag or ""), Item("Service", row.service), Item("Area", row.area),
                Item("Criticality", row.criticality), Item("Inventory row", row.location))
    if row.inner_loop:
        identity += (Item("Inner loop", row.inner_loop),)
    return LoopDetail(
        index=i, row=row.excel_row, tag=row.tag or "", anchor=loop_anchor(row), status=status,
        findings=_text(res.get(i, "findings")), identity=identity, model=_model_items(row),
        tuning=_tuning_items(row), entered=_entered(row), checks=_checks(i, res, audit.inventory.policy),
        cascade=cascade, proposal=_proposal_view(proposal, res, i), plots=None,
        health=health_view(audit, i, loop_anchor(row)),
        notes=tuple(notes) + tuple(w.message if hasattr(w, "message") else str(w) for w in row.warnings),
    ), job


# ----------------------------------------------------------------------------- history


def _field(obj: Any, *names: str, default: Any = None) -> Any:
    for n in names:
        v = obj.get(n) if isinstance(obj, dict) else getattr(obj, n, None)
        if v is not None:
            return v
    return default


def _entry(obj: Any) -> HistoryEntry:
    if isinstance(obj, str):
        return HistoryEntry(obj)
    old = _field(obj, "old_status", "old")
    new = _field(obj, "new_status", "new")
    return HistoryEntry(str(_field(obj, "tag", default="")), _plain(old) if not isinstance(old, dict) else None,
                        _plain(new) if not isinstance(new, dict) else None,
                        str(_field(obj, "figure", default="")), str(_field(obj, "unit", default="")))


_HISTORY_ITEMS = (
    ("newly_unstable", "Newly unstable"), ("newly_failing", "Newly failing"), ("fixed", "Now passing"),
    ("tuning_changed", "Tuning changed"), ("model_changed", "Process model changed"),
    ("moved", "Figures that moved beyond the policy's change thresholds"),
    ("new_loops", "New loops"), ("removed_loops", "Loops no longer in the inventory"),
)


def _history(section: Any) -> HistorySection | None:
    """The history section from ``audit.extras['history']`` (an object with ``changes`` and ``status_mix``)."""
    if section is None:
        return None
    changes = _field(section, "changes", default=section)
    items = []
    for name, label in _HISTORY_ITEMS:
        v = _field(changes, name)
        if v is None:
            continue
        entries = tuple(_entry(e) for e in (v if isinstance(v, (list, tuple)) else [v]))
        items.append(HistoryItem(name, label, entries))
    dates, trend = _trend(_field(section, "status_mix", "trend", default=()))
    return HistorySection(
        first_audit=bool(_field(changes, "first_audit", default=False)),
        previous_date=_text(_field(changes, "previous_date", default="")),
        items=tuple(items),
        acted_on=_plain(_field(changes, "work_list_acted_on")),
        previous_work_list=_plain(_field(changes, "previous_work_list_size")),
        trend_dates=dates,
        trend=trend,
    )


def _trend(mix: Any) -> tuple[tuple[str, ...], tuple[tuple[str, tuple[int, ...]], ...]]:
    """Status counts per audit, oldest first, from a sequence of objects with ``date`` and ``counts``."""
    dates, counts = [], []
    for m in mix or ():
        dates.append(_text(_field(m, "date", default="")))
        counts.append(dict(_field(m, "counts", default={}) or {}))
    present = {s for c in counts for s, n in c.items() if n}
    statuses = [s for s in STATUS_ORDER if s in present] + sorted(present - set(STATUS_ORDER))
    return tuple(dates), tuple((s, tuple(int(c.get(s, 0) or 0) for c in counts)) for s in statuses)


# ----------------------------------------------------------------------------- build


def build_report(audit, plot_limit: int | None = None, mapper: Callable = map) -> Report:
    """The report model of an audit.

    Parameters
    ----------
    audit : Audit
        A finished run: inventory, models, results (one row per inventory row), extras.
    plot_limit : int | None
        Detail sections, in work-list order, that carry plot data; None for all.
    mapper : callable
        ``map`` or a process pool's ``map``: runs the step simulations of the loops with plots (one batch
        per kind; with a pool, in its workers while this process computes the frequency responses and
        the rest of the report).

    Returns
    -------
    Report
        Plain frozen data; :func:`audit.render.render_html` turns it into a page.
    """
    rows = audit.inventory.rows
    res = _Results(audit.results)
    statuses = [_status(res, i, r) for i, r in enumerate(rows)]
    work = _work_list(rows, res, statuses)
    mode = audit.options.detail if audit.options.detail in ("failing", "all") else "failing"
    order = _detail_order(rows, statuses, work, mode, frozenset(audit.extras.get("health") or ()))
    anchors = {loop_anchor(rows[i]) for i in order}
    by_tag = _first_by_tag(rows)
    plotted = len(order) if plot_limit is None else max(0, min(plot_limit, len(order)))
    pairs = [_detail(audit, i, res, statuses[i], True, by_tag) for i in order[:plotted]]
    jobs = [job for _, job in pairs if job is not None]
    # one vectorised simulation per kind for all loops, in the pool's workers when there is a pool,
    # while this process builds the other detail sections, the frequency responses and the rest
    pending = start_steps(jobs, mapper)
    pairs += [_detail(audit, i, res, statuses[i], False, by_tag) for i in order[plotted:]]
    freq = {j.key: plot_data(j)[0] for j in jobs}
    plant_data, data = data_views(audit)
    details = tuple(replace(d, data=data[d.index]) if d.index in data else d for d, _ in pairs)
    present = [s for s in STATUS_ORDER if s in statuses] + sorted({s for s in statuses if s not in STATUS_ORDER})
    crit_order = [c for c in ("high", "medium", "low")] + sorted(
        {r.criticality for r in rows} - {"high", "medium", "low"})
    notes = []
    if not work.ranked:
        notes.append("The ranking stage did not run: the work list is ordered by status (most severe first), "
                     "then by tag.")
    loops = tuple(_loop_line(rows[i], res, i, statuses[i], anchors) for i in range(len(rows)))
    invalid = tuple(_invalid_line(r, res, i) for i, r in enumerate(rows) if statuses[i] == "invalid")
    health = health_summary(audit, {d.index: d.anchor for d in details})
    groups = _group_sections(audit)
    batched = collect_steps(jobs, pending)
    details = tuple(d if d.anchor not in freq else
                    replace(d, plots=replace(freq[d.anchor], steps=batched[d.anchor][0]),
                            notes=batched[d.anchor][1] + d.notes) for d in details)
    return Report(
        cover=_cover(audit),
        total=_tally("all loops", statuses),
        by_area=_tallies([r.area for r in rows], statuses),
        by_criticality=_tallies([r.criticality for r in rows], statuses, crit_order),
        statuses=tuple(present),
        work=work,
        details=details,
        needing_detail=len(order),
        plot_limit=plot_limit,
        loops=loops,
        invalid=invalid,
        file_problems=tuple(str(p) for p in audit.inventory.problems),
        history=_history(audit.extras.get("history")),
        glossary=tuple(GlossaryEntry(c.name, c.unit, c.meaning) for c in RESULT_COLUMNS),
        detail_mode=mode,
        notes=tuple(notes),
        health=health,
        groups=groups,
        plant_data=plant_data,
    )


def _group_sections(audit) -> tuple:
    from .multiloop.report import group_sections
    return group_sections(audit)


def _loop_line(row: LoopRow, res: _Results, i: int, status: str, anchors: set[str]) -> LoopLine:
    a = loop_anchor(row)
    return LoopLine(row.excel_row, row.tag or "", row_anchor(row), a if a in anchors else "", row.area,
                    row.criticality, status, res.get(i, "ms"), res.get(i, "gm_db"), res.get(i, "pm_deg"),
                    res.get(i, "band_s_db"), res.get(i, "band_required_db"), _text(res.get(i, "findings")))


def _invalid_line(row: LoopRow, res: _Results, i: int) -> InvalidLine:
    msg = _text(res.get(i, "message"))
    messages = tuple(m.strip() for m in msg.split("; ") if m.strip()) if msg else tuple(str(p) for p in row.errors)
    return InvalidLine(row.excel_row, row.sheet, row.tag or "", messages)
