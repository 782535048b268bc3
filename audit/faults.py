"""Fault containment: an unexpected exception in one stage (or one row) never loses the run.

A *fault* is an exception the code did not expect (a bug), as opposed to a user's mistake
(:class:`audit.cli.UserError` and its kin, exit 2), which still ends the run at once.
:func:`audit.pipeline.run_stages` calls every stage through :func:`run_contained`:

- a stage that raises is recorded as a :class:`StageFault` for every row; the columns it had
  finished keep their values, the others stay not computed (blank);
- a later stage whose inputs that stage makes (:data:`STAGE_NEEDS`) is skipped, recorded the
  same way, so no figure is produced from missing inputs; a stage missing from the table needs
  every stage before it;
- stages that work row by row or in chunks catch a fault of one row themselves
  (:func:`row_fault`): that row is marked, the others complete;
- a row touched by a fault in a stage that judges it (:data:`JUDGING_STAGES`) never keeps
  ``passes`` or ``marginal``: a requirement that could not be judged is not met, and the status
  becomes ``not evaluated``;
- :func:`finish` puts one note per fault at the head of the row's ``findings``, adds every
  missing results column as blank, and the runner writes ``fault.log`` (:func:`write_fault_log`)
  with each traceback; the run ends with exit code 3 and is not recorded in the history.
"""

from __future__ import annotations

import traceback
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import pandas as pd

FAULT_LOG = "fault.log"
"""The file in the output folder that holds every fault of the run with its traceback."""

STAGE_NEEDS: dict[str, tuple[str, ...]] = {
    "models": (),
    "records": (),
    "evaluate": ("models",),
    "cascade": ("evaluate",),
    "steps": ("models",),
    "residuals": ("models", "records"),
    "residual_check": ("evaluate",),
    "proposals": ("evaluate",),
    "priority": ("evaluate",),
    "groups": ("evaluate",),
    "health": ("models",),
    "group_proposals": ("groups", "proposals"),
    "modelcheck": ("models",),
}
"""Stages whose outputs each stage needs; a stage not listed needs every stage before it."""

JUDGING_STAGES = frozenset({"records", "evaluate", "cascade", "groups", "residuals", "residual_check"})
"""Stages that decide a row's status: a row they did not finish cannot pass (so may a stage not in
:data:`STAGE_NEEDS`: it is treated as judging until its owner lists it)."""

_UNJUDGED_STATUS = "not evaluated"
_KEEP = ("passes", "marginal")


@dataclass(frozen=True)
class StageFault:
    """One internal fault, of a whole stage or of one row.

    Attributes
    ----------
    stage : str
        The stage's name (as in :data:`audit.pipeline.STAGES`).
    error : str
        ``ExceptionType: short message`` (one line, at most 200 characters).
    rows : tuple of int or None
        The rows (0-based inventory index) whose figures are missing; None for every row.
    detail : str
        The traceback, for ``fault.log``; for a skipped stage, the fault that caused it.
    skipped : bool
        The stage did not run because a stage it needs failed.
    """

    stage: str
    error: str
    rows: tuple[int, ...] | None
    detail: str
    skipped: bool = False

    def note(self) -> str:
        """The words put on each row this fault touches."""
        if self.skipped:
            return f"stage {self.stage} skipped ({self.error}); figures of this stage missing"
        return f"stage {self.stage} failed: internal fault ({self.error}); figures of this stage missing"


def short_error(exc: BaseException) -> str:
    """``ExceptionType: message`` on one line, at most 200 characters (how a fault is named).

    Parameters
    ----------
    exc : BaseException
        What was raised.
    """
    text = " ".join(str(exc).split())
    if len(text) > 160:
        text = text[:157] + "..."
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


def faults_of(audit) -> list[StageFault]:
    """The faults of the run so far (a list kept in ``audit.extras['faults']``).

    Parameters
    ----------
    audit : Audit
        The run.

    Returns
    -------
    list of StageFault
    """
    return audit.extras.setdefault("faults", [])


def user_errors() -> tuple[type[BaseException], ...]:
    """The exceptions that are the user's mistakes (exit 2): never contained as faults."""
    from .cli import UserError
    from .history import HistoryError
    from .inventory import InventoryError
    from .output import FileRefused
    return (UserError, InventoryError, HistoryError, FileRefused)


def row_fault(audit, stage: str, index: int, exc: BaseException) -> None:
    """Record that one row's computation in ``stage`` raised; the stage goes on with the others.

    Call it from inside an ``except Exception`` block (the traceback is taken from there).

    Parameters
    ----------
    audit : Audit
        The run.
    stage : str
        The stage's name.
    index : int
        The row (0-based inventory index).
    exc : BaseException
        What was raised.
    """
    if isinstance(exc, user_errors()):
        raise exc
    faults_of(audit).append(StageFault(stage, short_error(exc), (int(index),), traceback.format_exc()))


def row_fault_elsewhere(audit, stage: str, index: int, error: str, detail: str) -> None:
    """Record a fault of one row's computation that ran in another process or on another machine.

    The worker caught the exception and sent its description and traceback back as text
    (:func:`short_error`, :func:`traceback.format_exc`); the stage goes on with the other rows.

    Parameters
    ----------
    audit : Audit
        The run.
    stage : str
        The stage's name.
    index : int
        The row (0-based inventory index).
    error : str
        ``ExceptionType: short message``.
    detail : str
        The worker's traceback.
    """
    faults_of(audit).append(StageFault(stage, error, (int(index),), detail))


def _failed(audit) -> dict[str, StageFault]:
    return {f.stage: f for f in faults_of(audit) if f.rows is None}


def run_contained(audit, name: str, fn: Callable, done: list[str]) -> None:
    """Run one stage, containing a fault; skip it when a stage it needs failed.

    Parameters
    ----------
    audit : Audit
        The run.
    name : str
        The stage's name.
    fn : callable
        The stage function, called with ``audit``.
    done : list of str
        The names of the stages before this one (this one is appended).
    """
    failed = _failed(audit)
    needs = STAGE_NEEDS.get(name, tuple(done))
    missing = [n for n in needs if n in failed]
    done.append(name)
    if missing:
        cause = failed[missing[0]]
        faults_of(audit).append(StageFault(name, f"needs stage {missing[0]}", None,
                                           f"skipped: stage {missing[0]} failed ({cause.error})", skipped=True))
    else:
        try:
            fn(audit)
        except user_errors():
            raise
        except Exception as exc:  # noqa: BLE001 - contained: recorded with its traceback, the run goes on
            faults_of(audit).append(StageFault(name, short_error(exc), None, traceback.format_exc()))
    _unjudge(audit)


def _unjudge(audit) -> None:
    """Rows touched by a fault of a judging stage: ``passes``/``marginal`` -> ``not evaluated``."""
    res = audit.results
    if "status" not in res.columns:
        return
    n = len(res)
    touched: set[int] = set()
    for f in faults_of(audit):
        if f.stage in JUDGING_STAGES or f.stage not in STAGE_NEEDS:   # a stage not listed may judge
            touched.update(range(n) if f.rows is None else f.rows)
    for i in sorted(touched):
        if str(res.iat[i, res.columns.get_loc("status")]) in _KEEP:
            res.iat[i, res.columns.get_loc("status")] = _UNJUDGED_STATUS


def finish(audit) -> None:
    """After the last stage: notes into ``findings``, missing results columns blank, statuses set.

    Nothing happens when the run had no fault.

    Parameters
    ----------
    audit : Audit
        The run; its ``results`` change in place.
    """
    faults = faults_of(audit)
    if not faults:
        return
    from .columns import RESULT_COLUMNS
    res = audit.results
    n = len(res)
    missing = [c.name for c in RESULT_COLUMNS if c.name not in res.columns]
    if missing:   # added at once (column by column fragments the table)
        blank = pd.DataFrame({c: pd.Series([None] * n, index=res.index, dtype=object) for c in missing})
        audit.results = res = pd.concat([res, blank], axis=1)
    status = res["status"].astype(object).tolist()
    res["status"] = [s if isinstance(s, str) and s else
                     ("invalid" if not audit.inventory.rows[i].valid else _UNJUDGED_STATUS)
                     for i, s in enumerate(status)]
    _unjudge(audit)
    notes: list[list[str]] = [[] for _ in range(n)]
    for f in faults:
        for i in (range(n) if f.rows is None else f.rows):
            if f.note() not in notes[i]:
                notes[i].append(f.note())
    old = res["findings"].astype(object).tolist()
    res["findings"] = ["; ".join(notes[i] + ([str(o)] if isinstance(o, str) and o else []))
                       for i, o in enumerate(old)]


def write_fault_log(audit, folder: str | Path) -> Path:
    """Write ``fault.log``: every fault of the run, the rows it touched and its traceback.

    Parameters
    ----------
    audit : Audit
        The run (its faults in ``audit.extras['faults']``).
    folder : str or Path
        Where the file goes.

    Returns
    -------
    Path
        The file written.
    """
    rows = audit.inventory.rows
    lines = ["plant-audit: internal faults in this run; the results are incomplete. Please report this file",
             "together with the inventory that caused it.", ""]
    for k, v in audit.meta.items():
        if k != "policy":
            lines.append(f"{k}: {v}")
    for f in faults_of(audit):
        where = "every row" if f.rows is None else ", ".join(
            f"row {rows[i].excel_row} ({rows[i].tag or 'no tag'})" for i in f.rows)
        lines += ["", "-" * 72, f"stage: {f.stage}", f"rows: {where}", f"note: {f.note()}", "", f.detail.rstrip()]
    path = Path(folder) / FAULT_LOG
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path
