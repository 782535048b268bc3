"""The audit pipeline: inventory -> models -> figures -> (proposals, ranking) -> outputs.

Each stage is a function that takes the :class:`Audit` and adds columns to its
``results`` table (one row per inventory row, in inventory order; nothing is
ever dropped). Stages never convert units; the inventory did that.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np
import pandas as pd

from . import __version__
from .loop import LoopModel
from .rows import Inventory


@dataclass
class AuditOptions:
    """What the user asked for on the command line."""

    out_dir: str = "audit-out"
    site: str = ""
    title: str = "Control loop audit"
    date: str | None = None          # ISO date; today when None
    paper: str = "a4"
    detail: str = "failing"          # failing | all
    propose: str = "failing"         # failing | all | none
    pdf: bool = True
    jobs: int = 1
    scheduler: str | None = None     # Dask: "local" or tcp://host:port (audit.executors)
    quiet: bool = False
    history: str | None = None       # path or URL; None -> default beside the inventory
    record_history: bool = True
    data: Any = None                 # historian export (--data): a path, or an opened plantdata.export.ExportSource


@dataclass
class Audit:
    """Everything one run knows. ``results`` grows column by column as stages run."""

    inventory: Inventory
    options: AuditOptions
    models: list[LoopModel | None]
    results: pd.DataFrame
    date: str
    tool_version: str = __version__
    extras: dict[str, Any] = field(default_factory=dict)   # per-stage side data (records, proposals, ...)
    timings: dict[str, float] = field(default_factory=dict)  # stage -> wall time [s]
    executor: Any = None    # where per-loop work runs during run_stages (audit.executors); None: here

    @property
    def meta(self) -> dict[str, Any]:
        """What identifies the run: recorded in results.json, the report and the history."""
        return {
            "tool": "plant-audit",
            "tool_version": self.tool_version,
            "date": self.date,
            "site": self.options.site,
            "title": self.options.title,
            "inventory": self.inventory.name,
            "inventory_sha256": self.inventory.sha256,
            "policy": self.inventory.policy.as_dict(),
        }


def audit_date(option: str | None) -> str:
    """The audit date as ISO text (``--date`` makes runs reproducible).

    Parameters
    ----------
    option : str or None
        The ``--date`` option, an ISO date (YYYY-MM-DD); today when None or empty.

    Returns
    -------
    str
        The date as YYYY-MM-DD.

    Raises
    ------
    ValueError
        When ``option`` is not an ISO date.
    """
    if option:
        return _dt.date.fromisoformat(option).isoformat()
    return _dt.date.today().isoformat()



def base_results(inv: Inventory) -> pd.DataFrame:
    """The identity columns of every row, the row's problems, and its own extra columns.

    Parameters
    ----------
    inv : Inventory
        The inventory read; every row gives one results row, in order.

    Returns
    -------
    pandas.DataFrame
        Columns ``row``, ``tag``, ``service``, ``area``, ``criticality``, ``message``,
        ``band_rad_s`` [rad/s] and ``attenuation_db`` [dB] (as entered, NaN when blank),
        then the inventory's extra columns.
    """
    recs = []
    for r in inv.rows:
        msgs = [str(p) for p in r.errors] + [f"warning: {p}" for p in r.warnings]
        rec = {
            "row": r.excel_row, "tag": r.tag or "", "service": r.service, "area": r.area,
            "criticality": r.criticality, "message": "; ".join(msgs),
            "band_rad_s": r.band_rad_s, "attenuation_db": r.attenuation_db,
        }
        for k, v in r.extras.items():
            rec[k] = v
        recs.append(rec)
    df = pd.DataFrame.from_records(recs, columns=["row", "tag", "service", "area", "criticality", "message",
                                                  "band_rad_s", "attenuation_db", *inv.extra_columns])
    for c in ("band_rad_s", "attenuation_db"):
        df[c] = pd.to_numeric(df[c], errors="coerce").astype(float)
    return df


def build_models(audit: "Audit") -> None:
    """A LoopModel for every valid row (None for invalid rows); cascades composed.

    Parameters
    ----------
    audit : Audit
        The run; its ``models`` are set in place.
    """
    from .cascade import build_models as _build
    audit.models = _build(audit)


def evaluate_frequency(audit: "Audit") -> None:
    """Frequency-domain figures, limits in force, status and findings of every row.

    Parameters
    ----------
    audit : Audit
        The run, after :func:`build_models`; the figure columns, ``ms_max`` [-],
        ``gm_min_db`` [dB], ``pm_min_deg`` [deg], ``band_required_db`` [dB], ``band_ok``,
        ``status`` and ``findings`` are added to its ``results`` in place.
    """
    from .frequency import FIGURE_COLUMNS
    from .parallel import evaluate_parallel
    from .verdict import judge, limits_in_force

    res = audit.results
    figs = evaluate_parallel(audit.models, res["band_rad_s"].to_numpy(float), audit.options.jobs)
    for c in FIGURE_COLUMNS:
        if c == "engine_note":
            continue
        res[c] = figs[c].to_numpy()
    policy = audit.inventory.policy
    records = figs.to_dict("records")   # one mapping per row (row-wise iloc is slow at scale)
    status, findings, lims = [], [], {"ms_max": [], "gm_min_db": [], "pm_min_deg": []}
    req, ok = [], []
    for i, row in enumerate(audit.inventory.rows):
        lim = limits_in_force(row, policy)
        for k in lims:
            lims[k].append(lim[k])
        att = res.at[i, "attenuation_db"]
        att = None if pd.isna(att) else float(att)
        has_band = att is not None and not pd.isna(res.at[i, "band_rad_s"])
        req.append(-att if has_band else np.nan)
        if audit.models[i] is None:
            status.append("invalid")
            findings.append("row not evaluated: see message")
            ok.append(None)
            continue
        fig = records[i]
        ok.append(bool(fig["band_s_db"] <= -att) if has_band else None)
        st, words = judge(fig, lim, att if has_band else None, policy.marginal_pct)
        status.append(st)
        findings.append("; ".join(words))
    for k, v in lims.items():
        res[k] = v
    res["band_required_db"] = req
    res["band_ok"] = pd.array(ok, dtype="boolean")
    res["status"] = status
    res["findings"] = findings


def judge_residuals(audit: "Audit") -> None:
    """A predicted residual above the allowed amplitude breaks the rejection requirement.

    The record of the disturbance passed through S (exact delay) is what the loop as tuned would
    leave; when its amplitude exceeds ``allowed_amplitude`` the loop fails, whatever the band check
    said (the record is the more direct evidence).

    Parameters
    ----------
    audit : Audit
        The run, after :func:`audit.disturbance.add_residuals`; ``status`` and ``findings`` of its ``results``
        are updated in place. Nothing happens without a ``residual_ok`` column.
    """
    from .disturbance import judge_unusable_records
    judge_unusable_records(audit)   # a record that could not be used: its requirement is not met
    res = audit.results
    if "residual_ok" not in res.columns:
        return
    for i, row in enumerate(audit.inventory.rows):
        ok = res.at[i, "residual_ok"]
        if ok is None or pd.isna(ok) or bool(ok) or res.at[i, "status"] in ("invalid", "unstable"):
            continue
        amp = float(res.at[i, "residual_amplitude"])
        words = f"predicted residual {amp:.3g} % > allowed {row.allowed_amplitude:.3g} %"
        old = str(res.at[i, "findings"] or "")
        res.at[i, "findings"] = f"{words}; {old}" if old else words
        res.at[i, "status"] = "fails"


STAGES: tuple[tuple[str, str, str], ...] = (
    # (name, module, function) in order; every stage takes the Audit
    ("models", "audit.pipeline", "build_models"),
    ("records", "audit.disturbance", "analyse_records"),
    ("evaluate", "audit.pipeline", "evaluate_frequency"),
    ("cascade", "audit.cascade", "add_cascade_checks"),
    ("groups", "audit.multiloop.stage", "add_group_checks"),
    ("steps", "audit.timedomain", "add_step_results"),
    ("residuals", "audit.disturbance", "add_residuals"),
    ("residual_check", "audit.pipeline", "judge_residuals"),
    ("health", "audit.plantdata.health", "add_loop_health"),
    ("proposals", "audit.proposals", "add_proposals"),
    ("group_proposals", "audit.multiloop.stage", "check_group_proposals"),
    ("priority", "audit.priority", "add_priority"),
    ("modelcheck", "audit.plantdata.modelcheck", "check_models"),
)


def run_stages(audit: "Audit", progress: Callable[[str], None] | None = None) -> None:
    """Run every stage in order, timing each; a fault of one stage is contained (:mod:`audit.faults`).

    Parameters
    ----------
    audit : Audit
        The run (from :func:`new_audit`); each stage adds to it in place, and the
        stage's wall time [s] goes into ``audit.timings``. Faults go to ``audit.extras['faults']``.
        Per-loop work runs on ``audit.executor``, opened here from ``--jobs``/``--scheduler``
        (:func:`audit.executors.open_executor`) and closed after the last stage.
    progress : callable or None
        Called with each stage's name before the stage runs; nothing when None.
    """
    import importlib
    import time

    from .faults import finish, run_contained

    from .executors import open_executor

    done: list[str] = []
    audit.executor = open_executor(audit.options.jobs, audit.options.scheduler)
    try:
        for name, mod, fn in STAGES:
            if progress:
                progress(name)
            t0 = time.perf_counter()
            run_contained(audit, name, getattr(importlib.import_module(mod), fn), done)
            audit.timings[name] = time.perf_counter() - t0
    finally:
        audit.executor.close()
        audit.executor = None
    finish(audit)


def new_audit(inv: Inventory, options: AuditOptions) -> Audit:
    """An Audit with identity columns only, ready for the stages.

    Parameters
    ----------
    inv : Inventory
        The inventory read.
    options : AuditOptions
        What the user asked for; ``options.date`` fixes the audit date.

    Returns
    -------
    Audit
        With ``results`` from :func:`base_results` and no models yet (None per row).
    """
    return Audit(inventory=inv, options=options, models=[None] * len(inv.rows),
                 results=base_results(inv), date=audit_date(options.date))
