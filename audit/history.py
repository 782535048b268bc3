"""Audit history: every run recorded, what changed since the previous audit, and trends.

A history database holds every audit of every site, append-only: an audit is
written in one transaction (all of it or none of it) and never changed
afterwards. SQLite is the default (one file beside the inventory); any database
URL that SQLAlchemy understands works for a team sharing a server
(``postgresql://...`` is mapped to the psycopg 3 driver).

Loops are matched across audits by tag. Whether a loop's process model or its
tuning changed is decided from canonical fingerprints computed from the
converted row fields (project units), never from the text as typed: a
proportional band of 50 % and a controller gain of 2 are the same tuning.

Schema (version 1)
------------------
``schema_version``  version, applied_at, tool_version (one row per applied migration)
``audits``          id, audit_date, recorded_at (UTC), site, title, inventory_name,
                    inventory_sha256, tool_version, policy_json, loops, work_list_size
``audit_rows``      id, audit_id, position, sheet, row_number, tag, status, on_work_list,
                    model_fingerprint, tuning_fingerprint, model_json, tuning_json,
                    inputs_json, results_json

JSON columns are strict JSON: infinities are written as the strings ``"inf"`` /
``"-inf"`` and NaN as ``null``.
"""

from __future__ import annotations

import csv
import datetime as _dt
import hashlib
import json
import math
import sys
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Any, Callable, Iterable, Iterator, Mapping

import sqlalchemy as sa
from sqlalchemy.engine import Connection, Engine, make_url

from .output import plain as strict_json_value  # the one strict-JSON conversion (re-exported)
from .verdict import STATUS_ORDER

SCHEMA_VERSION = 1
"""Version of the history schema this tool writes and reads."""

DEFAULT_FILE_NAME = "audit-history.sqlite"
"""File name of the default SQLite history, in the inventory's folder."""

FAILING = frozenset({"unstable", "fails"})
PASSING = frozenset({"marginal", "passes"})

TEXT_COLUMNS = frozenset({"tag", "service", "area", "criticality", "status", "findings", "message"})
"""Results columns that hold text; every other column is numeric or boolean."""

MOVE_FIGURES = (
    # figure, policy threshold setting, unit
    ("ms", "change_ms", "-"),
    ("gm_db", "change_margin_db", "dB"),
    ("pm_deg", "change_pm_deg", "deg"),
    ("band_s_db", "change_band_db", "dB"),
)
"""Figures compared between audits and the policy setting that says how far is a move."""

_PG_LOCK_KEY = 715_604_221  # advisory lock serialising schema migrations on PostgreSQL
_BUSY_TIMEOUT_MS = 60_000


class HistoryError(Exception):
    """The history database cannot be opened, read or written; the message says why and where."""


class HistoryEmpty(HistoryError):
    """The database exists but holds no plant-audit history (opened with ``create=False``)."""


# ---------------------------------------------------------------------------------------------
# Schema and migrations

metadata = sa.MetaData()

schema_version = sa.Table(
    "schema_version", metadata,
    sa.Column("version", sa.Integer, primary_key=True, autoincrement=False),
    sa.Column("applied_at", sa.Text, nullable=False),
    sa.Column("tool_version", sa.Text, nullable=False),
)

audits_table = sa.Table(
    "audits", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("audit_date", sa.Text, nullable=False),
    sa.Column("recorded_at", sa.Text, nullable=False),
    sa.Column("site", sa.Text, nullable=False),
    sa.Column("title", sa.Text, nullable=False),
    sa.Column("inventory_name", sa.Text, nullable=False),
    sa.Column("inventory_sha256", sa.Text, nullable=False),
    sa.Column("tool_version", sa.Text, nullable=False),
    sa.Column("policy_json", sa.Text, nullable=False),
    sa.Column("loops", sa.Integer, nullable=False),
    sa.Column("work_list_size", sa.Integer, nullable=True),
    sa.Index("ix_audits_site", "site"),
)

rows_table = sa.Table(
    "audit_rows", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("audit_id", sa.Integer, sa.ForeignKey("audits.id"), nullable=False),
    sa.Column("position", sa.Integer, nullable=False),
    sa.Column("sheet", sa.Text, nullable=False),
    sa.Column("row_number", sa.Integer, nullable=False),
    sa.Column("tag", sa.Text, nullable=True),
    sa.Column("status", sa.Text, nullable=True),
    sa.Column("on_work_list", sa.Boolean, nullable=True),
    sa.Column("model_fingerprint", sa.Text, nullable=False),
    sa.Column("tuning_fingerprint", sa.Text, nullable=False),
    sa.Column("model_json", sa.Text, nullable=False),
    sa.Column("tuning_json", sa.Text, nullable=False),
    sa.Column("inputs_json", sa.Text, nullable=False),
    sa.Column("results_json", sa.Text, nullable=False),
    sa.Index("ix_audit_rows_audit", "audit_id"),
    sa.Index("ix_audit_rows_tag", "tag"),
)


def _migrate_to_1(conn: Connection) -> None:
    """Version 1: the three tables and their indexes."""
    metadata.create_all(conn, tables=[audits_table, rows_table])


MIGRATIONS: dict[int, Callable[[Connection], None]] = {1: _migrate_to_1}
"""version -> function bringing a database at ``version - 1`` to ``version`` (inside one transaction)."""


# ---------------------------------------------------------------------------------------------
# Plain data handed to the report and the command line


@dataclass(frozen=True)
class AuditSummary:
    """One recorded audit, as listed by ``plant-audit history``.

    Attributes
    ----------
    audit_id : int
        Identifier in the history database (increases with each recorded audit).
    date : str
        Audit date, ISO ``YYYY-MM-DD``.
    recorded_at : str
        Wall-clock time the audit was recorded, ISO 8601 in UTC.
    site, title, inventory, inventory_sha256, tool_version : str
        As in the audit's meta data.
    loops : int
        Number of inventory rows audited. [-]
    counts : dict[str, int]
        Rows per status word, in :data:`STATUS_ORDER` (other words after them). [-]
    work_list_size : int or None
        Rows on the ranked work list; None when that audit had no ranking. [-]
    """

    audit_id: int
    date: str
    recorded_at: str
    site: str
    title: str
    inventory: str
    inventory_sha256: str
    tool_version: str
    loops: int
    counts: dict[str, int]
    work_list_size: int | None


@dataclass(frozen=True)
class LoopSnapshot:
    """One loop (inventory row) as it stood in one audit.

    Attributes
    ----------
    audit_id : int or None
        The audit it belongs to; None for an audit not yet recorded.
    date, site : str
        Audit date (ISO) and site.
    tag : str or None
        Loop tag; None for an untagged row.
    row : int
        Row number in the inventory sheet (CSV: line number).
    status : str or None
        Status word of the results row.
    on_work_list : bool or None
        True when the row was ranked on the work list; None when that audit had no ranking.
    ms : float or None
        Sensitivity peak. [-]
    gm_db : float or None
        Gain margin. [dB]
    pm_deg : float or None
        Phase margin. [deg]
    band_s_db : float or None
        Largest 20 log10|S| over the rejection band. [dB]
    band_required_db : float or None
        Required level of |S| in the band. [dB]
    model, tuning : dict
        Canonical process model and tuning (project units) behind the fingerprints.
    model_fingerprint, tuning_fingerprint : str
        SHA-256 of the canonical model and tuning.
    inputs : dict
        The row as read: ``tag``, ``sheet``, ``row`` and ``raw`` (cells keyed by column).
    results : dict
        The results row (infinities restored as floats).
    """

    audit_id: int | None
    date: str
    site: str
    tag: str | None
    row: int
    status: str | None
    on_work_list: bool | None
    ms: float | None
    gm_db: float | None
    pm_deg: float | None
    band_s_db: float | None
    band_required_db: float | None
    model: dict[str, Any]
    tuning: dict[str, Any]
    model_fingerprint: str
    tuning_fingerprint: str
    inputs: dict[str, Any]
    results: dict[str, Any]

    @property
    def band_margin_db(self) -> float | None:
        """Margin to the rejection-band requirement, band_required_db - band_s_db. [dB]

        Positive when the band requirement is met with room to spare; None when either is missing.
        """
        if self.band_required_db is None or self.band_s_db is None:
            return None
        return self.band_required_db - self.band_s_db

    @property
    def model_words(self) -> str:
        """The process model in words, e.g. ``FOPDT: gain 1.5, tau1 60 s, dead time 8 s``."""
        return describe_model(self.model)

    @property
    def tuning_words(self) -> str:
        """The tuning in words, e.g. ``ideal PID: Kc 2, Ti 120 s, Td 0 s; reverse acting``."""
        return describe_tuning(self.tuning)


@dataclass(frozen=True)
class AuditSnapshot:
    """One audit's loops, keyed by tag, ready for :func:`compare`.

    Attributes
    ----------
    audit_id : int or None
        None for the audit being run (not yet recorded).
    date, site : str
        Audit date (ISO) and site.
    policy : dict
        The policy in force (setting -> value).
    loops : dict[str, LoopSnapshot]
        Tagged rows by tag; when a tag appears twice the first row is used.
    untagged : int
        Rows without a tag (kept in the database, not matched across audits). [-]
    duplicate_tags : tuple[str, ...]
        Tags that appear on more than one row.
    work_list_size : int or None
        Rows on the work list; None when the audit had no ranking. [-]
    """

    audit_id: int | None
    date: str
    site: str
    policy: dict[str, Any]
    loops: dict[str, LoopSnapshot]
    untagged: int = 0
    duplicate_tags: tuple[str, ...] = ()
    work_list_size: int | None = None


@dataclass(frozen=True)
class LoopChange:
    """A loop whose status changed, or that appeared or disappeared.

    Attributes
    ----------
    tag : str
    old_status, new_status : str or None
        None on the side where the loop is absent.
    """

    tag: str
    old_status: str | None
    new_status: str | None


@dataclass(frozen=True)
class SettingsChange:
    """A loop whose tuning or process model changed between the two audits.

    Attributes
    ----------
    tag : str
    old, new : str
        The settings in words (project units).
    old_settings, new_settings : dict
        The canonical settings behind the words.
    """

    tag: str
    old: str
    new: str
    old_settings: dict[str, Any]
    new_settings: dict[str, Any]


@dataclass(frozen=True)
class Move:
    """A figure that moved by more than the policy's threshold.

    Attributes
    ----------
    tag : str
    figure : str
        Results column: ``ms`` [-], ``gm_db`` [dB], ``pm_deg`` [deg] or ``band_s_db`` [dB].
    old, new : float
        Values in the previous and the current audit, in the figure's unit (may be inf).
    threshold : float
        The policy setting exceeded, in the figure's unit.
    unit : str
        Unit of the figure: ``-``, ``dB`` or ``deg``.
    """

    tag: str
    figure: str
    old: float
    new: float
    threshold: float
    unit: str

    @property
    def change(self) -> float:
        """new - old, in the figure's unit (inf when one side is infinite)."""
        return self.new - self.old if not (math.isinf(self.new) and math.isinf(self.old)) else 0.0


@dataclass(frozen=True)
class Changes:
    """What changed between the previous audit of a site and the current one.

    Attributes
    ----------
    site : str
    current_date : str
        Date of the current audit (ISO).
    first_audit : bool
        True when the site had no earlier audit; every list is then empty.
    previous_audit_id : int or None
    previous_date : str or None
    newly_failing : list[LoopChange]
        Loops present in both audits now failing (fails or unstable) that were not, plus loops
        that went from fails to unstable.
    newly_unstable : list[LoopChange]
        Loops now closed-loop unstable that were not (a subset of ``newly_failing``).
    fixed : list[LoopChange]
        Loops that failed (fails or unstable) and now pass (passes or marginal).
    tuning_changed : list[SettingsChange]
    model_changed : list[SettingsChange]
    new_loops : list[LoopChange]
        Tags in the current audit only (``old_status`` None).
    removed_loops : list[LoopChange]
        Tags in the previous audit only (``new_status`` None).
    moved : list[Move]
        Ms, gain margin, phase margin and band level changes beyond the policy thresholds.
    work_list_acted_on : int or None
        Items of the previous work list still in the inventory whose tuning or model changed,
        or that now pass. None when the previous audit had no ranking. [-]
    previous_work_list_size : int or None
        Items on the previous work list. [-]
    """

    site: str
    current_date: str
    first_audit: bool = False
    previous_audit_id: int | None = None
    previous_date: str | None = None
    newly_failing: list[LoopChange] = field(default_factory=list)
    newly_unstable: list[LoopChange] = field(default_factory=list)
    fixed: list[LoopChange] = field(default_factory=list)
    tuning_changed: list[SettingsChange] = field(default_factory=list)
    model_changed: list[SettingsChange] = field(default_factory=list)
    new_loops: list[LoopChange] = field(default_factory=list)
    removed_loops: list[LoopChange] = field(default_factory=list)
    moved: list[Move] = field(default_factory=list)
    work_list_acted_on: int | None = None
    previous_work_list_size: int | None = None

    def as_dict(self) -> dict[str, Any]:
        """Plain nested mapping (for results.json); infinities kept as floats."""
        return asdict(self)


@dataclass(frozen=True)
class StatusMix:
    """Rows per status word in one audit, for the status-over-time plot.

    Attributes
    ----------
    audit_id : int or None
        None for an audit not yet recorded.
    date : str
        Audit date (ISO).
    counts : dict[str, int]
        Rows per status word. [-]
    """

    audit_id: int | None
    date: str
    counts: dict[str, int]


@dataclass(frozen=True)
class LoopSeries:
    """One loop's figures over the audits of a site, for trend plots.

    The lists run in parallel, one entry per audit that had the tag, oldest first.

    Attributes
    ----------
    tag : str
    audit_ids : list[int or None]
        None for an audit not yet recorded.
    dates : list[str]
        Audit dates (ISO).
    ms : list[float or None]
        Sensitivity peak. [-]
    band_margin_db : list[float or None]
        band_required_db - band_s_db; positive is margin to spare. [dB]
    """

    tag: str
    audit_ids: list[int | None]
    dates: list[str]
    ms: list[float | None]
    band_margin_db: list[float | None]


@dataclass(frozen=True)
class HistorySection:
    """What :func:`add_history` leaves in ``audit.extras['history']`` for the report.

    Attributes
    ----------
    target : str
        Where the history is kept (path, or URL with the password hidden).
    audit_id : int or None
        Identifier of the audit just recorded; None while it is only prepared.
    changes : Changes
        Since the previous audit of the same site (``first_audit`` when there was none).
    status_mix : list[StatusMix]
        Every audit of the site, oldest first, the current one included.
    series : dict[str, LoopSeries]
        Per-tag trends over the site's audits, for the tags of the current audit.
    """

    target: str
    audit_id: int | None
    changes: Changes
    status_mix: list[StatusMix]
    series: dict[str, LoopSeries]


# ---------------------------------------------------------------------------------------------
# Canonical values, fingerprints and words


def _dumps(value: Any) -> str:
    return json.dumps(strict_json_value(value), allow_nan=False, sort_keys=True, separators=(",", ":"))


def _loads(text: Any, where: str, kind: type = dict) -> Any:
    """A stored JSON value of type ``kind``; HistoryError naming ``where`` when it is damaged."""
    try:
        value = json.loads(text)
    except (TypeError, ValueError) as exc:
        raise HistoryError(f"history: the stored {where} is damaged (not JSON: {exc}); restore the history from "
                           "a backup, or record into another one with --history") from None
    if not isinstance(value, kind):
        raise HistoryError(f"history: the stored {where} is damaged (a JSON {type(value).__name__} where a "
                           f"{'mapping' if kind is dict else kind.__name__} belongs); restore the history from a "
                           "backup, or record into another one with --history")
    return value


def _restore_inf(results: dict[str, Any]) -> dict[str, Any]:
    """Results mapping with "inf"/"-inf" turned back into floats in the non-text columns."""
    out = {}
    for k, v in results.items():
        if k not in TEXT_COLUMNS and v in ("inf", "-inf"):
            v = math.inf if v == "inf" else -math.inf
        out[k] = v
    return out


def _canon(x: float | None, default: float | None = None) -> float | None:
    """A number rounded to 9 significant digits (so unit conversions do not show as changes)."""
    if x is None:
        return default
    x = float(x)
    if math.isnan(x):
        return default
    if math.isinf(x):
        return x
    return float(f"{x:.9g}") + 0.0  # + 0.0 folds -0.0 into 0.0


def canonical_model(row: Any) -> dict[str, Any]:
    """The process model of a row in canonical form (project units).

    Only the parameters the model type uses are kept; blank optional parameters read as 0;
    a second-order model's two time constants are sorted (they commute); a transfer
    function is scaled to a monic denominator.

    Parameters
    ----------
    row : LoopRow
        An inventory row (fields ``model``, ``gain`` [-] or [1/s], ``tau1``, ``tau2``,
        ``lead``, ``dead_time`` [s], ``num``, ``den``).

    Returns
    -------
    dict
        ``{"model": kind, parameter: value, ...}``.
    """
    kind = row.model
    theta = _canon(row.dead_time, 0.0)
    if kind == "fopdt":
        return {"model": kind, "gain": _canon(row.gain), "tau1": _canon(row.tau1, 0.0), "dead_time": theta}
    if kind == "sopdt":
        t = sorted([_canon(row.tau1, 0.0), _canon(row.tau2, 0.0)], reverse=True)
        return {"model": kind, "gain": _canon(row.gain), "tau1": t[0], "tau2": t[1],
                "lead": _canon(row.lead, 0.0), "dead_time": theta}
    if kind == "ipdt":
        return {"model": kind, "gain": _canon(row.gain), "tau1": _canon(row.tau1, 0.0), "dead_time": theta}
    if kind == "tf" and row.num and row.den:
        den = [float(c) for c in row.den]
        num = [float(c) for c in row.num]
        while den and den[0] == 0.0:
            den.pop(0)
        while len(num) > 1 and num[0] == 0.0:
            num.pop(0)
        lead_coef = den[0] if den else 1.0
        return {"model": kind, "num": [_canon(c / lead_coef) for c in num],
                "den": [_canon(c / lead_coef) for c in den], "dead_time": theta}
    out: dict[str, Any] = {"model": kind}
    for name in ("gain", "tau1", "tau2", "lead", "dead_time"):
        if getattr(row, name, None) is not None:
            out[name] = _canon(getattr(row, name))
    for name in ("num", "den"):
        if getattr(row, name, None):
            out[name] = [_canon(c) for c in getattr(row, name)]
    return out


def canonical_tuning(row: Any) -> dict[str, Any]:
    """The controller settings of a row in canonical form (project units).

    The form's own settings are kept (ideal/series: kc [-], ti [s], td [s]; parallel: kp [-],
    ki [1/s], kd [s]); ti blank or 0 both mean no integral action (None); blank derivative,
    sample period and PV filter read as 0; the derivative filter factor is kept only when
    there is derivative action, since it changes nothing otherwise.

    Parameters
    ----------
    row : LoopRow
        An inventory row.

    Returns
    -------
    dict
        ``{"form": ..., settings..., "action": ..., "sample": [s], "pv_filter": [s]}``.
    """
    form = row.form or "ideal"
    out: dict[str, Any] = {"form": form}
    if form == "parallel":
        out.update(kp=_canon(row.kp), ki=_canon(row.ki, 0.0), kd=_canon(row.kd, 0.0))
        derivative = bool(out["kd"])
    else:
        ti = _canon(row.ti)
        out.update(kc=_canon(row.kc), ti=ti if ti else None, td=_canon(row.td, 0.0))
        derivative = bool(out["td"])
    if derivative:
        out["d_filter"] = _canon(row.d_filter)
    out.update(action=row.action or "reverse", sample=_canon(row.sample, 0.0), pv_filter=_canon(row.pv_filter, 0.0))
    return out


def fingerprint(canonical: Mapping[str, Any]) -> str:
    """SHA-256 (hex) of a canonical model or tuning, written as sorted strict JSON.

    Parameters
    ----------
    canonical : mapping
        Output of :func:`canonical_model` or :func:`canonical_tuning`.
    """
    return hashlib.sha256(_dumps(canonical).encode("utf-8")).hexdigest()


def _num(x: Any, unit: str = "") -> str:
    if x is None:
        return "blank"
    text = f"{x:.4g}" if isinstance(x, float) else str(x)
    return f"{text} {unit}" if unit else text


def describe_model(model: Mapping[str, Any]) -> str:
    """A canonical process model in words, units in the text (e.g. ``dead time 8 s``).

    Parameters
    ----------
    model : mapping
        Output of :func:`canonical_model` (times [s], gain [-] or [1/s] for ipdt).
    """
    kind = model.get("model")
    if not kind:
        return "no model"
    parts = []
    gain_unit = "1/s" if kind == "ipdt" else ""
    names = {"gain": ("gain", gain_unit), "tau1": ("tau1", "s"), "tau2": ("tau2", "s"),
             "lead": ("lead", "s"), "dead_time": ("dead time", "s")}
    for key, (label, unit) in names.items():
        if key in model:
            parts.append(f"{label} {_num(model[key], unit)}")
    for key in ("num", "den"):
        if key in model:
            parts.append(f"{key} [{', '.join(_num(c) for c in model[key])}]")
    return f"{str(kind).upper()}: " + ", ".join(parts)


def describe_tuning(tuning: Mapping[str, Any]) -> str:
    """Canonical controller settings in words, units in the text.

    Parameters
    ----------
    tuning : mapping
        Output of :func:`canonical_tuning` (kc, kp [-], ti, td, kd, sample, pv_filter [s], ki [1/s]).
    """
    form = tuning.get("form", "ideal")
    if form == "parallel":
        parts = [f"Kp {_num(tuning.get('kp'))}", f"Ki {_num(tuning.get('ki'), '1/s')}",
                 f"Kd {_num(tuning.get('kd'), 's')}"]
    else:
        ti = tuning.get("ti")
        parts = [f"Kc {_num(tuning.get('kc'))}", "no integral" if ti is None else f"Ti {_num(ti, 's')}",
                 f"Td {_num(tuning.get('td'), 's')}"]
    if "d_filter" in tuning:
        parts.append(f"derivative filter {_num(tuning['d_filter'])}")
    text = f"{form} PID: " + ", ".join(parts) + f"; {tuning.get('action', 'reverse')} acting"
    if tuning.get("sample"):
        text += f", sample {_num(tuning['sample'], 's')}"
    if tuning.get("pv_filter"):
        text += f", PV filter {_num(tuning['pv_filter'], 's')}"
    return text


# ---------------------------------------------------------------------------------------------
# From an Audit object to row payloads and snapshots


def _status_of(result: Mapping[str, Any]) -> str | None:
    s = result.get("status")
    return s if isinstance(s, str) and s else None


def _figure(result: Mapping[str, Any], name: str) -> float | None:
    v = result.get(name)
    if v is None or isinstance(v, (bool, str)):
        return None
    try:
        v = float(v)
    except (TypeError, ValueError):
        return None
    return None if math.isnan(v) else v


def _work_list_flag(results_columns: Iterable[str], result: Mapping[str, Any]) -> bool | None:
    if "rank" not in results_columns:
        return None
    return result.get("rank") is not None


def _row_payloads(audit: Any) -> Iterator[dict[str, Any]]:
    """One insertable mapping per inventory row, in inventory order (built lazily)."""
    rows = audit.inventory.rows
    results = audit.results
    if len(results) != len(rows):
        raise HistoryError(
            f"results have {len(results)} rows but the inventory has {len(rows)}; nothing recorded")
    columns = list(results.columns)
    records = results.to_dict("records")
    for position, (row, record) in enumerate(zip(rows, records)):
        yield _row_payload(position, row, record, columns)


def _row_payload(position: int, row: Any, record: Mapping[str, Any], columns: list[str]) -> dict[str, Any]:
    """The stored form of one row: inputs, results and fingerprints."""
    result = strict_json_value(dict(record))
    tag = row.tag if row.tag else None
    model = canonical_model(row)
    tuning = canonical_tuning(row)
    inputs = {"tag": tag, "sheet": row.sheet, "row": row.excel_row, "raw": dict(row.raw)}
    return {
        "position": position,
        "sheet": row.sheet,
        "row_number": int(row.excel_row),
        "tag": tag,
        "status": _status_of(result),
        "on_work_list": _work_list_flag(columns, result),
        "model_fingerprint": fingerprint(model),
        "tuning_fingerprint": fingerprint(tuning),
        "model_json": _dumps(model),
        "tuning_json": _dumps(tuning),
        "inputs_json": _dumps(inputs),
        "results_json": _dumps(result),
    }


def _snapshot_of_row(audit_id: int | None, date: str, site: str, r: Mapping[str, Any]) -> LoopSnapshot:
    where = f"row {r.get('position')} of audit {audit_id}" if audit_id is not None else "row"
    results = _restore_inf(_loads(r["results_json"], f"results of {where}"))
    try:
        row_number = int(r["row_number"])
    except (TypeError, ValueError):
        raise HistoryError(f"history: the stored sheet row of {where} is damaged ({r['row_number']!r})") from None
    return LoopSnapshot(
        audit_id=audit_id, date=date, site=site, tag=r["tag"], row=row_number,
        status=r["status"], on_work_list=None if r["on_work_list"] is None else bool(r["on_work_list"]),
        ms=_figure(results, "ms"), gm_db=_figure(results, "gm_db"), pm_deg=_figure(results, "pm_deg"),
        band_s_db=_figure(results, "band_s_db"), band_required_db=_figure(results, "band_required_db"),
        model=_loads(r["model_json"], f"model of {where}"), tuning=_loads(r["tuning_json"], f"tuning of {where}"),
        model_fingerprint=r["model_fingerprint"], tuning_fingerprint=r["tuning_fingerprint"],
        inputs=_loads(r["inputs_json"], f"inputs of {where}"), results=results,
    )


def _assemble(audit_id: int | None, date: str, site: str, policy: dict[str, Any],
              rows: Iterable[Mapping[str, Any]], work_list_size: int | None) -> AuditSnapshot:
    loops: dict[str, LoopSnapshot] = {}
    untagged = 0
    duplicates: list[str] = []
    for r in rows:
        snap = _snapshot_of_row(audit_id, date, site, r)
        if not snap.tag:
            untagged += 1
        elif snap.tag in loops:
            if snap.tag not in duplicates:
                duplicates.append(snap.tag)
        else:
            loops[snap.tag] = snap
    return AuditSnapshot(audit_id, date, site, policy, loops, untagged, tuple(duplicates), work_list_size)


def snapshot_of(audit: Any) -> AuditSnapshot:
    """The snapshot of an audit that has not been recorded (``audit_id`` None).

    Built through the same stored form as :meth:`HistoryStore.record`, so comparing it with a
    stored snapshot compares like with like.

    Parameters
    ----------
    audit : audit.pipeline.Audit
        Needs ``meta``, ``inventory.rows`` and ``results``.
    """
    return _snapshot_from_payloads(audit, list(_row_payloads(audit)))


def _snapshot_from_payloads(audit: Any, payloads: list[dict[str, Any]]) -> AuditSnapshot:
    meta = audit.meta
    wl = _work_list_size(audit.results.columns, payloads)
    return _assemble(None, meta["date"], meta["site"] or "", dict(meta["policy"]), payloads, wl)


def _work_list_size(columns: Iterable[str], payloads: list[dict[str, Any]]) -> int | None:
    if "rank" not in list(columns):
        return None
    return sum(1 for p in payloads if p["on_work_list"])


# ---------------------------------------------------------------------------------------------
# The store


def _database_url(target: str) -> sa.URL:
    """SQLAlchemy URL for a path or URL; plain ``postgresql://`` gets the psycopg 3 driver."""
    if "://" in target:
        try:
            url = make_url(target)
        except (sa.exc.ArgumentError, ValueError) as exc:
            raise HistoryError(f"history: not a database URL: {target!r} ({exc})") from None
        if url.drivername in ("postgresql", "postgres"):
            url = url.set(drivername="postgresql+psycopg")
        if url.get_backend_name() == "sqlite" and url.database in (None, "", ":memory:"):
            raise HistoryError(f"history: {target!r} is an in-memory database, which keeps nothing; "
                               "give a file path or a server URL")
        return url
    if not target.strip():
        raise HistoryError("history: no database given (an empty path)")
    return sa.URL.create("sqlite", database=str(Path(target).expanduser().resolve()))


def _shown(url: sa.URL) -> str:
    if url.get_backend_name() == "sqlite":
        return str(url.database)
    return url.render_as_string(hide_password=True)


def _sqlite_engine(url: sa.URL) -> Engine:
    engine = sa.create_engine(url, connect_args={"timeout": _BUSY_TIMEOUT_MS / 1000.0})

    @sa.event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn, _record):  # noqa: ANN001
        dbapi_conn.isolation_level = None  # we issue BEGIN ourselves (see _on_begin)
        cur = dbapi_conn.cursor()
        cur.execute(f"PRAGMA busy_timeout = {_BUSY_TIMEOUT_MS}")
        cur.execute("PRAGMA journal_mode = WAL")
        cur.execute("PRAGMA foreign_keys = ON")
        cur.close()

    @sa.event.listens_for(engine, "begin")
    def _on_begin(conn):  # noqa: ANN001
        # Writers take the write lock up front, so two writers queue on the busy timeout
        # instead of one failing when it upgrades a read transaction.
        conn.exec_driver_sql("BEGIN IMMEDIATE" if conn.get_execution_options().get("write") else "BEGIN")

    return engine


class HistoryStore:
    """A history database, opened with :func:`open_history`.

    Parameters
    ----------
    engine : sqlalchemy.engine.Engine
    shown : str
        Where it is, for messages (password hidden).
    """

    batch_size = 500
    """Rows inserted per statement while recording."""

    def __init__(self, engine: Engine, shown: str) -> None:
        self.engine = engine
        self.target = shown

    # -- plumbing ------------------------------------------------------------------------------

    def __enter__(self) -> "HistoryStore":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Release the database connections."""
        self.engine.dispose()

    def _write(self) -> Any:
        conn = self.engine.connect()
        conn.execution_options(write=True)
        return conn

    def _lock_for_migration(self, conn: Connection) -> None:
        if self.engine.dialect.name == "postgresql":
            conn.execute(sa.text("SELECT pg_advisory_xact_lock(:k)"), {"k": _PG_LOCK_KEY})

    def _current_version(self, conn: Connection) -> int:
        """Schema version of the database (0 when empty); refuses foreign and newer databases."""
        from . import __version__
        insp = sa.inspect(conn)
        if insp.has_table("schema_version"):
            current = int(conn.execute(sa.select(sa.func.max(schema_version.c.version))).scalar() or 0)
        elif insp.has_table("audits") or insp.has_table("audit_rows"):
            raise HistoryError(f"history: {self.target} has audit tables but no schema version; "
                               "it was not written by plant-audit. Use another --history.")
        else:
            current = 0
        if current > SCHEMA_VERSION:
            raise HistoryError(
                f"history: {self.target} was written by a newer plant-audit (schema version {current}; "
                f"this version {__version__} reads up to {SCHEMA_VERSION}). Upgrade plant-audit, "
                "or record into another history with --history.")
        return current

    def _ensure_schema(self, create: bool) -> None:
        """Check the schema version; create or migrate it when ``create``.

        The check is a plain read (it never waits for a writer); only a database that needs a
        migration takes the write lock, and checks again under it.
        """
        from . import __version__
        with self._read() as conn:
            current = self._current_version(conn)
        if current == SCHEMA_VERSION:
            return
        if not create:
            raise HistoryEmpty(f"history: {self.target} holds no plant-audit history")
        with self._write() as conn, conn.begin():
            self._lock_for_migration(conn)
            current = self._current_version(conn)
            if current == SCHEMA_VERSION:
                return  # another process migrated it meanwhile
            if current == 0:
                metadata.create_all(conn, tables=[schema_version])
            now = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
            for version in range(current + 1, SCHEMA_VERSION + 1):
                MIGRATIONS[version](conn)
                conn.execute(sa.insert(schema_version).values(version=version, applied_at=now,
                                                              tool_version=__version__))

    def schema_version(self) -> int:
        """The schema version recorded in the database. [-]"""
        with self.engine.connect() as conn:
            return int(conn.execute(sa.select(sa.func.max(schema_version.c.version))).scalar() or 0)

    # -- writing -------------------------------------------------------------------------------

    def record(self, audit: Any) -> int:
        """Record an audit in one transaction and return its id.

        Parameters
        ----------
        audit : audit.pipeline.Audit
            Needs ``meta``, ``inventory.rows`` (LoopRow) and ``results`` (one row per inventory row).

        Returns
        -------
        int
            The new audit's id.

        Raises
        ------
        HistoryError
            When the database refuses the write; nothing of the audit is then stored.
        """
        return self._record(audit, _row_payloads(audit))

    def _record(self, audit: Any, payloads: Iterable[dict[str, Any]]) -> int:
        """:meth:`record` with the row payloads given (built lazily or once beforehand)."""
        meta = audit.meta
        columns = list(audit.results.columns)
        recorded_at = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="microseconds")
        try:
            with self._write() as conn, conn.begin():
                audit_id = conn.execute(sa.insert(audits_table).values(
                    audit_date=str(meta["date"]), recorded_at=recorded_at, site=meta.get("site") or "",
                    title=meta.get("title") or "", inventory_name=meta.get("inventory") or "",
                    inventory_sha256=meta.get("inventory_sha256") or "",
                    tool_version=str(meta.get("tool_version") or ""), policy_json=_dumps(meta.get("policy") or {}),
                    loops=len(audit.inventory.rows), work_list_size=None,
                )).inserted_primary_key[0]
                work_list = 0
                batch: list[dict[str, Any]] = []
                for payload in payloads:
                    payload = {**payload, "audit_id": audit_id}
                    work_list += bool(payload["on_work_list"])
                    batch.append(payload)
                    if len(batch) >= self.batch_size:
                        conn.execute(sa.insert(rows_table), batch)
                        batch = []
                if batch:
                    conn.execute(sa.insert(rows_table), batch)
                if "rank" in columns:
                    conn.execute(sa.update(audits_table).where(audits_table.c.id == audit_id)
                                 .values(work_list_size=work_list))
        except sa.exc.SQLAlchemyError as exc:
            raise HistoryError(f"history: could not record the audit in {self.target}: {getattr(exc, 'orig', None) or exc}") from exc
        return int(audit_id)

    # -- reading -------------------------------------------------------------------------------

    def audits(self, site: str | None = None) -> list[AuditSummary]:
        """Recorded audits, oldest first, of one site or of all (``site`` None).

        Parameters
        ----------
        site : str or None
            Site name as given with ``--site`` ('' is a site too); None lists every site.
        """
        a, r = audits_table, rows_table
        q = sa.select(a).order_by(a.c.id)
        cq = sa.select(r.c.audit_id, r.c.status, sa.func.count().label("n")).group_by(r.c.audit_id, r.c.status)
        if site is not None:
            q = q.where(a.c.site == site)
            cq = cq.where(r.c.audit_id.in_(sa.select(a.c.id).where(a.c.site == site)))
        with self._read() as conn:
            heads = conn.execute(q).mappings().all()
            counts: dict[int, dict[str, int]] = {}
            for c in conn.execute(cq).mappings():
                counts.setdefault(c["audit_id"], {})[c["status"] or "unknown"] = int(c["n"])
        return [AuditSummary(
            audit_id=h["id"], date=h["audit_date"], recorded_at=h["recorded_at"], site=h["site"], title=h["title"],
            inventory=h["inventory_name"], inventory_sha256=h["inventory_sha256"], tool_version=h["tool_version"],
            loops=h["loops"], counts=_ordered_counts(counts.get(h["id"], {})), work_list_size=h["work_list_size"],
        ) for h in heads]

    def snapshot(self, audit_id: int) -> AuditSnapshot:
        """The stored audit ``audit_id`` with all its rows.

        Parameters
        ----------
        audit_id : int
            Identifier returned by :meth:`record` or listed by :meth:`audits`.
        """
        with self._read() as conn:
            head = conn.execute(sa.select(audits_table).where(audits_table.c.id == audit_id)).mappings().first()
            if head is None:
                raise HistoryError(f"history: no audit {audit_id} in {self.target}")
            rows = conn.execute(sa.select(rows_table).where(rows_table.c.audit_id == audit_id)
                                .order_by(rows_table.c.position)).mappings().all()
        return _assemble(head["id"], head["audit_date"], head["site"], _loads(head["policy_json"], f"policy of audit {audit_id}"), rows,
                         head["work_list_size"])

    def previous(self, site: str, before_audit_id: int | None = None) -> AuditSnapshot | None:
        """The latest audit of ``site`` recorded before ``before_audit_id`` (None: the latest of all).

        "Previous" follows the order of recording, not the audit dates.

        Parameters
        ----------
        site : str
            Site name ('' is a site too).
        before_audit_id : int or None
            Only audits recorded before this one; None for the latest audit of the site.
        """
        q = sa.select(sa.func.max(audits_table.c.id)).where(audits_table.c.site == (site or ""))
        if before_audit_id is not None:
            q = q.where(audits_table.c.id < before_audit_id)
        with self._read() as conn:
            audit_id = conn.execute(q).scalar()
        return None if audit_id is None else self.snapshot(int(audit_id))

    def loop_history(self, tag: str, site: str | None = None) -> list[LoopSnapshot]:
        """One loop (by tag) in every audit that had it, oldest first (first row when a tag repeats).

        Parameters
        ----------
        tag : str
            Loop tag, matched exactly.
        site : str or None
            Only audits of this site; None for every site.
        """
        a, r = audits_table, rows_table
        q = (sa.select(r, a.c.audit_date, a.c.site).join(a, a.c.id == r.c.audit_id).where(r.c.tag == tag)
             .order_by(a.c.id, r.c.position))
        if site is not None:
            q = q.where(a.c.site == site)
        out: list[LoopSnapshot] = []
        seen: set[int] = set()
        with self._read() as conn:
            for m in conn.execute(q).mappings():
                if m["audit_id"] in seen:
                    continue
                seen.add(m["audit_id"])
                out.append(_snapshot_of_row(m["audit_id"], m["audit_date"], m["site"], m))
        return out

    def _read(self) -> Connection:
        return self.engine.connect()


def _ordered_counts(counts: Mapping[str, int]) -> dict[str, int]:
    out = {s: counts[s] for s in STATUS_ORDER if s in counts}
    out.update({s: n for s, n in sorted(counts.items()) if s not in out})
    return out


def default_history_path(inventory_path: str) -> str:
    """The default history file: ``audit-history.sqlite`` in the inventory's folder.

    Parameters
    ----------
    inventory_path : str
        The inventory file as given by the user.
    """
    return str(Path(inventory_path).expanduser().resolve().parent / DEFAULT_FILE_NAME)


def open_history(target: str, create: bool = True) -> HistoryStore:
    """Open (and when needed create or migrate) a history database.

    Parameters
    ----------
    target : str
        A file path (SQLite) or a database URL (``sqlite:///...``, ``postgresql://...``,
        ``postgresql+psycopg://...``).
    create : bool
        Create the file and schema when absent; False only opens an existing history.

    Returns
    -------
    HistoryStore

    Raises
    ------
    HistoryError
        Unreachable database, a file that is not a database, a database written by a newer
        version of the tool, or (``create`` False) no history there.
    """
    url = _database_url(target)
    shown = _shown(url)
    if url.get_backend_name() == "sqlite":
        path = Path(url.database or "")
        if not create and not path.exists():
            raise HistoryError(f"history: no history database at {shown}")
        if path.exists() and not path.is_file():
            raise HistoryError(f"history: {shown} is not a regular file (a folder, pipe or device)")
        if not path.parent.is_dir():
            raise HistoryError(f"history: folder {path.parent} does not exist")
        engine = _sqlite_engine(url)
    else:
        try:
            engine = sa.create_engine(url, pool_pre_ping=True)
        except (sa.exc.ArgumentError, ImportError, sa.exc.NoSuchModuleError) as exc:
            raise HistoryError(f"history: cannot use {shown}: {exc}") from None
    store = HistoryStore(engine, shown)
    try:
        store._ensure_schema(create)
    except sa.exc.SQLAlchemyError as exc:
        store.close()
        raise HistoryError(f"history: cannot open {shown}: {getattr(exc, 'orig', None) or exc}") from None
    except HistoryError:
        store.close()
        raise
    return store


# ---------------------------------------------------------------------------------------------
# Comparison and trends


def _policy_value(policy: Any, name: str) -> float:
    if isinstance(policy, Mapping):
        return float(policy[name])
    return float(getattr(policy, name))


def _moved(old: float | None, new: float | None, threshold: float) -> bool:
    if old is None or new is None:
        return False
    if math.isinf(old) or math.isinf(new):
        return old != new
    return abs(new - old) > threshold


def compare(previous: AuditSnapshot | None, current: AuditSnapshot, policy: Any) -> Changes:
    """What changed from the previous audit of a site to the current one.

    Parameters
    ----------
    previous : AuditSnapshot or None
        The earlier audit; None when the site has none (the result has ``first_audit`` True).
    current : AuditSnapshot
        The audit being run (or any later audit).
    policy : Policy or mapping
        Supplies ``change_ms`` [-], ``change_margin_db`` [dB], ``change_pm_deg`` [deg] and
        ``change_band_db`` [dB], the thresholds of a move.

    Returns
    -------
    Changes
        Lists in the current audit's row order (removed loops in the previous audit's order).
    """
    if previous is None:
        return Changes(site=current.site, current_date=current.date, first_audit=True)
    thresholds = {fig: _policy_value(policy, setting) for fig, setting, _ in MOVE_FIGURES}
    lists: dict[str, list[Any]] = {k: [] for k in ("newly_failing", "newly_unstable", "fixed", "tuning_changed",
                                                   "model_changed", "new_loops", "removed_loops", "moved")}
    acted = 0
    for tag, new in current.loops.items():
        old = previous.loops.get(tag)
        if old is None:
            lists["new_loops"].append(LoopChange(tag, None, new.status))
            continue
        lc = LoopChange(tag, old.status, new.status)
        now_unstable = new.status == "unstable" and old.status != "unstable"
        if now_unstable:
            lists["newly_unstable"].append(lc)
        if new.status in FAILING and (old.status not in FAILING or now_unstable):
            lists["newly_failing"].append(lc)
        if old.status in FAILING and new.status in PASSING:
            lists["fixed"].append(lc)
        tuned = old.tuning_fingerprint != new.tuning_fingerprint
        remodelled = old.model_fingerprint != new.model_fingerprint
        if tuned:
            lists["tuning_changed"].append(
                SettingsChange(tag, old.tuning_words, new.tuning_words, old.tuning, new.tuning))
        if remodelled:
            lists["model_changed"].append(SettingsChange(tag, old.model_words, new.model_words, old.model, new.model))
        for fig, _setting, unit in MOVE_FIGURES:
            a, b = getattr(old, fig), getattr(new, fig)
            if _moved(a, b, thresholds[fig]):
                lists["moved"].append(Move(tag, fig, a, b, thresholds[fig], unit))
        if old.on_work_list and (tuned or remodelled or new.status in PASSING):
            acted += 1
    for tag, old in previous.loops.items():
        if tag not in current.loops:
            lists["removed_loops"].append(LoopChange(tag, old.status, None))
    return Changes(
        site=current.site, current_date=current.date, first_audit=False, previous_audit_id=previous.audit_id,
        previous_date=previous.date, previous_work_list_size=previous.work_list_size,
        work_list_acted_on=None if previous.work_list_size is None else acted, **lists)


def status_mix_over_time(store: HistoryStore, site: str) -> list[StatusMix]:
    """Rows per status in every audit of a site, oldest first (for the status-over-time plot).

    Parameters
    ----------
    store : HistoryStore
    site : str
        Site name ('' is a site too).
    """
    return [StatusMix(s.audit_id, s.date, s.counts) for s in store.audits(site=site)]


def loop_series(store: HistoryStore, site: str, tags: Iterable[str] | None = None) -> dict[str, LoopSeries]:
    """Per-loop Ms [-] and band margin [dB] over the audits of a site, oldest first.

    Parameters
    ----------
    store : HistoryStore
    site : str
    tags : iterable of str or None
        The loops wanted; None for every tag the site ever had.
    """
    a, r = audits_table, rows_table
    q = (sa.select(r.c.audit_id, r.c.tag, r.c.results_json, a.c.audit_date)
         .join(a, a.c.id == r.c.audit_id).where(a.c.site == site, r.c.tag.is_not(None))
         .order_by(a.c.id, r.c.position))
    wanted = None if tags is None else set(tags)
    out: dict[str, LoopSeries] = {}
    with store._read() as conn:
        for m in conn.execute(q).mappings():
            tag = m["tag"]
            if wanted is not None and tag not in wanted:
                continue
            s = out.setdefault(tag, LoopSeries(tag, [], [], [], []))
            if s.audit_ids and s.audit_ids[-1] == m["audit_id"]:
                continue  # a repeated tag: first row only
            res = _restore_inf(_loads(m["results_json"], f"results of a row of audit {m['audit_id']}"))
            ms, bs, br = _figure(res, "ms"), _figure(res, "band_s_db"), _figure(res, "band_required_db")
            s.audit_ids.append(m["audit_id"])
            s.dates.append(m["audit_date"])
            s.ms.append(ms)
            s.band_margin_db.append(None if bs is None or br is None else br - bs)
    return out


# ---------------------------------------------------------------------------------------------
# Pipeline stage and command


@dataclass
class PendingHistory:
    """An audit compared with its site's history but not yet recorded (see :func:`prepare_history`).

    Attributes
    ----------
    target : str
        The history as given (path or URL).
    payloads : list of dict
        The stored form of every row, in inventory order.
    section : HistorySection
        What the report shows; its ``audit_id`` (and the current audit's entries in
        ``status_mix`` and ``series``) are None until :meth:`commit`.
    """

    target: str
    payloads: list[dict[str, Any]]
    section: HistorySection

    def commit(self, audit: Any) -> int:
        """Record the audit in one transaction; fill in its id; return it.

        Parameters
        ----------
        audit : audit.pipeline.Audit
            The audit this was prepared from.

        Returns
        -------
        int
            The new audit's id.

        Raises
        ------
        HistoryError
            When the history cannot be written (nothing of the audit is then stored).
        """
        with open_history(self.target) as store:
            audit_id = store._record(audit, self.payloads)
        sec = self.section
        mix = [m if m.audit_id is not None else replace(m, audit_id=audit_id) for m in sec.status_mix]
        for s in sec.series.values():
            s.audit_ids[:] = [audit_id if a is None else a for a in s.audit_ids]
        self.section = replace(sec, audit_id=audit_id, status_mix=mix)
        audit.extras["history"] = self.section
        return audit_id


def check_target(target: str) -> None:
    """Refuse at once a history that can never be used: a malformed URL, an in-memory database, a
    SQLite file in a missing folder or a path that is not a regular file (nothing is opened).

    Parameters
    ----------
    target : str
        A path or a database URL, as given with ``--history``.

    Raises
    ------
    HistoryError
    """
    url = _database_url(target)
    if url.get_backend_name() == "sqlite":
        path = Path(url.database or "")
        if not path.parent.is_dir():
            raise HistoryError(f"history: folder {path.parent} does not exist")
        if path.exists() and not path.is_file():
            raise HistoryError(f"history: {path} is not a regular file (a folder, pipe or device)")


def _open_existing(target: str) -> HistoryStore | None:
    """The history at ``target`` opened for reading, or None when there is none yet (nothing is written)."""
    check_target(target)
    url = _database_url(target)
    if url.get_backend_name() == "sqlite" and not Path(url.database or "").exists():
        return None
    try:
        return open_history(target, create=False)
    except HistoryEmpty:
        return None


def prepare_history(audit: Any) -> PendingHistory | None:
    """Compare the audit with its site's history without recording it; the report can show the changes.

    The history is read only: a run that fails afterwards (an output that cannot be written, a
    kill) leaves it as it was. :meth:`PendingHistory.commit` records the audit once the outputs
    are in place. Leaves the :class:`HistorySection` in ``audit.extras['history']``.

    Parameters
    ----------
    audit : audit.pipeline.Audit
        A run whose stages are done. ``audit.options.history`` (path or URL) names the history;
        None means ``audit-history.sqlite`` beside the inventory.

    Returns
    -------
    PendingHistory or None
        None when ``audit.options.record_history`` is False.

    Raises
    ------
    HistoryError
        When the history cannot be opened or read.
    """
    options = audit.options
    if not getattr(options, "record_history", True):
        return None
    target = options.history or default_history_path(audit.inventory.path)
    site = options.site or ""
    payloads = list(_row_payloads(audit))
    current = _snapshot_from_payloads(audit, payloads)
    store = _open_existing(target)
    shown = _shown(_database_url(target))
    previous, mix, series = None, [], {}
    if store is not None:
        with store:
            try:
                previous = store.previous(site)
                mix = status_mix_over_time(store, site)
                series = loop_series(store, site, tags=current.loops.keys())
            except sa.exc.SQLAlchemyError as exc:
                raise HistoryError(f"history: cannot read {store.target}: "
                                   f"{getattr(exc, 'orig', None) or exc}") from None
            shown = store.target
    changes = compare(previous, current, audit.inventory.policy)
    counts: dict[str, int] = {}
    for pl in payloads:
        counts[pl["status"] or "unknown"] = counts.get(pl["status"] or "unknown", 0) + 1
    mix.append(StatusMix(None, current.date, _ordered_counts(counts)))
    for tag, snap in current.loops.items():
        s = series.setdefault(tag, LoopSeries(tag, [], [], [], []))
        s.audit_ids.append(None)
        s.dates.append(current.date)
        s.ms.append(snap.ms)
        s.band_margin_db.append(snap.band_margin_db)
    section = HistorySection(shown, None, changes, mix, series)
    audit.extras["history"] = section
    return PendingHistory(target, payloads, section)


def add_history(audit: Any) -> None:
    """Compare with the site's previous audit, record this one at once, keep trends.

    :func:`prepare_history` then :meth:`PendingHistory.commit`; ``plant-audit run`` calls the
    two apart, with the outputs written in between.

    Does nothing when ``audit.options.record_history`` is False. The history is
    ``audit.options.history`` (path or URL) or, when None, ``audit-history.sqlite`` beside the
    inventory. Leaves a :class:`HistorySection` in ``audit.extras['history']``.

    Parameters
    ----------
    audit : audit.pipeline.Audit

    Raises
    ------
    HistoryError
        When the history cannot be opened or written (nothing partial is left behind).
    """
    options = audit.options
    if not getattr(options, "record_history", True):
        return
    pending = prepare_history(audit)
    if pending is not None:
        pending.commit(audit)


def _fmt(x: Any) -> str:
    if x is None:
        return ""
    if isinstance(x, bool):
        return "yes" if x else "no"
    if isinstance(x, float):
        return "inf" if x == math.inf else "-inf" if x == -math.inf else f"{x:.4g}"
    return str(x)


def _safe_cell(text: str) -> str:
    """Neutralise text that a spreadsheet would read as a formula (numbers left alone)."""
    if text and text[0] in "=+-@\t\r":
        try:
            float(text)
            return text
        except ValueError:
            return "'" + text
    return text


def _history_table(store: HistoryStore, tag: str | None, site: str | None) -> tuple[list[str], list[list[str]]]:
    if tag is None:
        audits = store.audits(site=site)
        statuses = list(STATUS_ORDER)
        for s in audits:
            statuses += [k for k in s.counts if k not in statuses]
        header = ["audit", "date", "site", "inventory", "loops", *statuses, "work list"]
        body = [[str(s.audit_id), s.date, s.site, s.inventory, str(s.loops),
                 *[str(s.counts.get(k, 0)) for k in statuses], _fmt(s.work_list_size)] for s in audits]
        return header, body
    header = ["audit", "date", "site", "row", "status", "ms", "gm_db", "pm_deg", "band_s_db", "band_margin_db",
              "work list", "model", "tuning"]
    body = [[str(h.audit_id), h.date, h.site, str(h.row), h.status or "", _fmt(h.ms), _fmt(h.gm_db),
             _fmt(h.pm_deg), _fmt(h.band_s_db), _fmt(h.band_margin_db), _fmt(h.on_work_list),
             h.model_words, h.tuning_words] for h in store.loop_history(tag, site=site)]
    return header, body


def history_command(db: str | None, tag: str | None, as_csv: bool, site: str | None = None) -> int:
    """``plant-audit history``: list the recorded audits, or one loop over time.

    Parameters
    ----------
    db : str or None
        History path or URL; None means ``audit-history.sqlite`` in the current folder.
    tag : str or None
        A loop tag: print its figures and settings in every audit instead of the audit list.
    as_csv : bool
        Print CSV (text cells neutralised against spreadsheet formulas) instead of a table.
    site : str or None
        Only this site's audits.

    Returns
    -------
    int
        0 on success (also when there is nothing to list), 2 when the history cannot be read.
    """
    try:
        with open_history(db or DEFAULT_FILE_NAME, create=False) as store:
            try:
                header, body = _history_table(store, tag, site)
            except sa.exc.SQLAlchemyError as exc:
                raise HistoryError(f"history: cannot read {store.target}: "
                                   f"{getattr(exc, 'orig', None) or exc}") from None
    except HistoryError as exc:
        print(f"plant-audit history: {' '.join(str(exc).split())}", file=sys.stderr)
        return 2
    if as_csv:
        w = csv.writer(sys.stdout, lineterminator="\n")
        w.writerow(header)
        w.writerows([[_safe_cell(c) for c in line] for line in body])
        return 0
    if not body:
        print(f"No audits of loop {tag!r} recorded." if tag else "No audits recorded.")
        return 0
    widths = [max(len(h), *(len(line[i]) for line in body)) for i, h in enumerate(header)]
    for line in [header, *body]:
        print("  ".join(c.ljust(wd) for c, wd in zip(line, widths)).rstrip())
    return 0
