"""The per-loop data task: one row's record read once, its loop health and its model check.

The stages ``health`` (:func:`audit.plantdata.health.add_loop_health`) and ``modelcheck``
(:func:`audit.plantdata.modelcheck.check_models`) both need the row's record. :func:`loop_data`
reads each record once and runs both analyses on it, on the run's executor
(:mod:`audit.executors`: this process, ``--jobs N`` local processes or a Dask cluster), and
keeps the compact results in ``audit.extras['loop_data']`` for both stages. A result holds
figures, notes and the report's charts of the loop already drawn and packed (the loop-health
charts, :func:`audit.health_charts.draw_health`, and the model check's overlay,
:func:`audit.plantdata.report_part.drawn_check`), never the record's samples nor plot arrays, so
what crosses a process boundary and what the run keeps stays small whatever the length of the
records. Every loop with a health record gets a detail section with its health charts (the page
draws them all, whatever the plot limit), so drawing them here is no guess of which loops the report
shows; the drawing is the same text the report would write from the plot arrays.

Each part is contained on its own: a part that raises gives a :class:`RowFailure` (the
exception's text and traceback) in its place, which the stage records as a fault of that row;
the row's other part and every other row complete. A user's mistake (e.g. a refused path
raised by an export source) is never contained.
"""

from __future__ import annotations

import ctypes
import gc
import multiprocessing
import os
import resource
import sys
import time
import traceback
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from .health import HealthOutcome, HealthSettings, health_outcome, operation_data, settings_from_policy
from .modelcheck import ModelCheck, check_record
from .records import ReadPolicy
from .report_part import drawn_check
from .sources import export_of, has_source, read_policy_of, record_for_row

#: Where the stages find the results (``audit.extras[KEY]``: row position -> LoopData).
KEY = "loop_data"


@dataclass(frozen=True)
class LoopTask:
    """One row's work.

    Attributes
    ----------
    index : int
        Row position in the inventory (0-based). [-]
    row : audit.rows.LoopRow
        The row (data_file, tag, pv range, model parameters).
    model : audit.loop.LoopModel or None
        The loop as tuned; None when the row was not evaluated (no model check then).
    health : bool
        Run the loop-health analysis (a valid row).
    check : bool
        Run the model check (when there is a model; the benchmark turns it off to time the
        loop health alone).
    """

    index: int
    row: Any
    model: Any
    health: bool
    check: bool = True


@dataclass(frozen=True)
class LoopSettings:
    """What every task of a run shares (sent once per chunk, or once per Dask worker).

    Attributes
    ----------
    folder : str
        The inventory's folder: a ``data_file`` must lie inside it.
    read_policy : ReadPolicy
        The reader's settings.
    policy : audit.policy.Policy
        Limits of the findings and the model check.
    health : HealthSettings
        Settings of the health analyses.
    export : object or None
        The site's export source (:mod:`audit.plantdata.sources`), for rows without a data_file.
    """

    folder: str
    read_policy: ReadPolicy
    policy: Any
    health: HealthSettings
    export: Any = None


@dataclass(frozen=True)
class RowFailure:
    """A part of a row's task that raised: what the stage records as that row's fault.

    Attributes
    ----------
    error : str
        ``ExceptionType: short message``.
    detail : str
        The traceback, as text.
    """

    error: str
    detail: str


@dataclass(frozen=True)
class LoopData:
    """One row's plant-data results (compact, picklable).

    Attributes
    ----------
    index : int
        Row position in the inventory. [-]
    health : HealthOutcome, RowFailure or None
        Loop health, its charts drawn (``plots`` a :class:`audit.health_charts.HealthDrawing`); None
        when the row has no record or is not valid.
    check : ModelCheck, RowFailure or None
        Model check, compacted (:meth:`ModelCheck.compact`) and its overlay drawn
        (:func:`audit.plantdata.report_part.drawn_check`); None without a model.
    read_s, health_s, check_s : float
        Wall time of reading the record, of the health analysis and of the model check. [s]
    cpu_s : float
        CPU time of the whole task in its process. [s]
    samples : int
        Samples per signal in the record's usable segments. [-]
    worker : int
        Process id that ran it (for the benchmark's memory figures). [-]
    worker_peak_mib : float
        That process's peak resident memory so far. [MiB]
    """

    index: int
    health: HealthOutcome | RowFailure | None
    check: ModelCheck | RowFailure | None
    read_s: float = 0.0
    health_s: float = 0.0
    check_s: float = 0.0
    cpu_s: float = 0.0
    samples: int = 0
    worker: int = 0
    worker_peak_mib: float = 0.0


def _failure() -> RowFailure:
    """The exception being handled, as a :class:`RowFailure` (call inside ``except``)."""
    from ..faults import short_error
    return RowFailure(short_error(sys.exc_info()[1]), traceback.format_exc())


def _peak_mib() -> float:
    # ru_maxrss is in KiB on Linux
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _checks(task: LoopTask) -> bool:
    return task.check and task.model is not None


def analyse_loop(task: LoopTask, shared: LoopSettings) -> LoopData:
    """Read one row's record once; its loop health and its model check on it.

    Parameters
    ----------
    task : LoopTask
        The row.
    shared : LoopSettings
        The run's settings.

    Returns
    -------
    LoopData
    """
    from ..faults import user_errors

    c0, t0 = time.process_time(), time.perf_counter()
    try:
        found = record_for_row(task.row, Path(shared.folder), shared.read_policy, shared.export)
    except user_errors():
        raise
    except Exception:  # noqa: BLE001 - contained: both parts of this row fail, the others go on
        bad = _failure()
        return LoopData(task.index, bad if task.health else None, bad if _checks(task) else None,
                        cpu_s=time.process_time() - c0, worker=os.getpid(), worker_peak_mib=_peak_mib())
    t1 = time.perf_counter()
    rec = found.record
    samples = int(sum(s.n for s in rec.segments)) if rec is not None else 0
    health = None
    if task.health:
        try:
            got = operation_data(found)
            if got is not None:
                health = _drawn(health_outcome(got[0], got[1], task.model, shared.health, shared.policy), task.row)
        except user_errors():
            raise
        except Exception:  # noqa: BLE001 - contained: recorded as this row's fault of stage health
            health = _failure()
    t2 = time.perf_counter()
    check = None
    if _checks(task):
        try:
            try:
                mc = check_record(task.row, found, shared.policy)
            except (ValueError, FloatingPointError, np.linalg.LinAlgError) as exc:   # a bad record, never the run
                mc = ModelCheck("record unusable", note=f"data record could not be analysed: {exc}")
            check = drawn_check(mc.compact())
        except user_errors():
            raise
        except Exception:  # noqa: BLE001 - contained: recorded as this row's fault of stage modelcheck
            check = _failure()
    t3 = time.perf_counter()
    return LoopData(task.index, health, check, t1 - t0, t2 - t1, t3 - t2, time.process_time() - c0, samples,
                    os.getpid(), _peak_mib())


def _drawn(out: HealthOutcome, row) -> HealthOutcome:
    """``out`` with its health charts drawn for the row's detail section, in place of the plot arrays."""
    if out.plots is None:
        return out
    from ..health_charts import draw_health
    from ..health_report import health_key
    from ..report import loop_anchor
    return replace(out, plots=draw_health(health_key(loop_anchor(row)), out.plots))


def analyse_chunk(tasks: list[LoopTask], shared: LoopSettings) -> list[LoopData]:
    """:func:`analyse_loop` over a chunk of rows, in order (what an executor runs).

    Parameters
    ----------
    tasks : list of LoopTask
        Consecutive rows.
    shared : LoopSettings
        The run's settings.

    Returns
    -------
    list of LoopData
        One per task, in order.

    Notes
    -----
    Linear algebra runs on one thread here, wherever the chunk runs: a threaded BLAS splits
    sums by its thread count, which changes the last bits of a least-squares fit, so one
    thread makes every executor (and every machine) give the same figures. The work is
    parallel across loops instead.
    """
    from threadpoolctl import threadpool_limits

    tidy = _Tidy() if multiprocessing.parent_process() is not None else None
    out = []
    try:
        with threadpool_limits(limits=1, user_api="blas"):
            for t in tasks:
                out.append(analyse_loop(t, shared))
                if tidy is not None:
                    tidy()
    finally:
        if tidy is not None:
            tidy.close()
    return out


class _Tidy:
    """In a worker process, after each loop: free the loop's memory now, not at some later collection.

    A pandas object from the reader sits in a reference cycle (pandas' own internals), so its
    arrays -- a week of 1-s samples is tens of MB a loop -- wait for a full cyclic collection,
    which a worker reaches only now and then: memory grows loop by loop. So after each loop the
    cycles are collected (the objects alive before the first loop are frozen, so a collection
    looks only at what the loop left: a few ms), and the heap's freed pages go back to the system
    (glibc ``malloc_trim``; Arrow's pool ``release_unused``). The work and its results are the
    same; only when memory is freed changes. Only in worker processes: the run's own process keeps
    Python's usual collection.
    """

    def __init__(self):
        gc.collect()
        gc.freeze()
        try:
            self._trim = ctypes.CDLL(None).malloc_trim
        except (OSError, AttributeError):         # not glibc: the allocator keeps its own ways
            self._trim = None

    def __call__(self) -> None:
        gc.collect()
        gc.freeze()                               # results kept so far: not looked at again
        if self._trim is not None:
            self._trim(0)
        pa = sys.modules.get("pyarrow")
        if pa is not None:
            pa.default_memory_pool().release_unused()

    @staticmethod
    def close() -> None:
        """Back to Python's usual collection (the process may run other work after this chunk)."""
        gc.unfreeze()


def loop_tasks(audit) -> tuple[list[LoopTask], LoopSettings]:
    """The rows with a record to analyse, and the settings they share.

    A row takes part when it names a ``data_file`` (or has a tag and the run has an export
    source) and is valid (loop health) or has a model (model check).

    Parameters
    ----------
    audit : Audit
        The run, after its models are built.

    Returns
    -------
    tuple of (list of LoopTask, LoopSettings)
    """
    inv = audit.inventory
    export = export_of(audit)
    shared = LoopSettings(str(Path(inv.path).resolve().parent), read_policy_of(inv.policy), inv.policy,
                          settings_from_policy(inv.policy), export)
    tasks = []
    for i, row in enumerate(inv.rows):
        model = audit.models[i] if i < len(audit.models) else None
        if has_source(row, export) and (row.valid or model is not None):
            tasks.append(LoopTask(i, row, model, bool(row.valid)))
    return tasks, shared


def loop_data(audit, executor=None) -> dict[int, LoopData]:
    """Every row's plant-data results, computed once per run (kept in ``audit.extras['loop_data']``).

    Parameters
    ----------
    audit : Audit
        The run, after its models are built.
    executor : SerialExecutor, ProcessExecutor or DaskExecutor, optional
        Where the tasks run (:mod:`audit.executors`); the run's own (``audit.executor``) when
        None, this process when the run has none.

    Returns
    -------
    dict of int to LoopData
        Row position -> results, in inventory order; rows without a record are absent.
    """
    got = audit.extras.get(KEY)
    if got is not None:
        return got
    from ..executors import SerialExecutor

    tasks, shared = loop_tasks(audit)
    ex = executor or getattr(audit, "executor", None) or SerialExecutor()
    results = ex.map_chunks(analyse_chunk, tasks, shared) if tasks else []
    got = {r.index: r for r in sorted(results, key=lambda r: r.index)}
    audit.extras[KEY] = got
    return got
