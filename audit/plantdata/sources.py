"""Where a row's record of plant data comes from: its ``data_file``, or a site historian export.

One function, :func:`record_for_row`, gives every plant-data analysis of a row (loop health,
the model check) the same record, read once. A row's ``data_file`` is read from the
inventory's folder (a path leading outside it is refused, see
:func:`audit.plantdata.records.confine`); a row without one is looked up in the site's
export when the run was given one.

An export source is any picklable object with a method
``read(tag, pv_lo=None, pv_hi=None, policy=ReadPolicy()) -> Record`` (duck-typed: the work
may run in another process or on another machine, so the object travels with it and must be
able to read there).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .records import PathError, ReadPolicy, Record, confine, read_record


@dataclass(frozen=True)
class RowRecord:
    """A row's record as found, or why there is none.

    Attributes
    ----------
    record : Record or None
        The record read; None when the row names none or its path was refused.
    name : str
        How messages name the record (the path relative to the inventory's folder, or the
        export and tag); '' when there is none.
    refused : str
        Why a record the row names could not be opened (the path leads outside the
        inventory's folder); '' otherwise.
    """

    record: Record | None
    name: str = ""
    refused: str = ""


def read_policy_of(policy) -> ReadPolicy:
    """The reader's settings from the audit policy.

    Parameters
    ----------
    policy : audit.policy.Policy
        ``max_gap_s`` (a multiple of the sample interval [-]), ``uniform_tolerance`` [-] and
        ``min_samples`` [-].

    Returns
    -------
    ReadPolicy
    """
    return ReadPolicy(max_gap_intervals=policy.max_gap_s, uniform_tolerance=policy.uniform_tolerance,
                      min_samples=policy.min_samples)


def has_source(row, export: Any = None) -> bool:
    """Whether a row has a record to read: its ``data_file``, or a tag to look up in ``export``.

    Parameters
    ----------
    row : audit.rows.LoopRow
        The row.
    export : object or None
        The site's export source (see the module notes); None without one.

    Returns
    -------
    bool
    """
    return bool(getattr(row, "data_file", None)) or (export is not None and bool(row.tag))


def record_for_row(row, folder: str | Path, read_policy: ReadPolicy = ReadPolicy(), export: Any = None) -> RowRecord:
    """Read a row's record once: its ``data_file`` (inside ``folder``), else its tag in ``export``.

    Parameters
    ----------
    row : audit.rows.LoopRow
        The row; ``data_file``, ``tag``, ``pv_lo`` and ``pv_hi`` [engineering units] are used.
    folder : str or Path
        The inventory's folder: a ``data_file`` must lie inside it.
    read_policy : ReadPolicy
        Gap, resampling and size settings of the reader.
    export : object or None
        The site's export source, used for a row without a ``data_file`` (see the module notes).

    Returns
    -------
    RowRecord
        ``record`` None when the row has no source, or ``refused`` says why its path was refused.
        Problems inside a record are the record's notes (the reader never raises for them).
    """
    target = getattr(row, "data_file", None)
    if target:
        try:
            full, shown = confine(folder, str(target))
        except PathError as exc:
            return RowRecord(None, str(target), str(exc))
        return RowRecord(read_record(full, pv_lo=row.pv_lo, pv_hi=row.pv_hi, policy=read_policy, name=shown), shown)
    if export is not None and row.tag:
        rec = export.read(row.tag, pv_lo=row.pv_lo, pv_hi=row.pv_hi, policy=read_policy)
        return RowRecord(rec, rec.name)
    return RowRecord(None)


#: Where a run keeps the site's export source (``audit.extras[EXPORT_KEY]``), when it has one.
EXPORT_KEY = "export_source"


def export_of(audit) -> Any:
    """The run's export source (see the module notes), or None.

    Parameters
    ----------
    audit : Audit
        The run; whoever opens a site export puts it into ``audit.extras[EXPORT_KEY]``.

    Returns
    -------
    object or None
    """
    return audit.extras.get(EXPORT_KEY)
