"""The model check of ``run``: every row's model against its logged record (``data_file``).

For a row with a record holding ``op`` and ``pv``:

1. ``model_fit_pct``: the inventory's model driven by the logged op (exact dead time, op
   held between samples, the record taken to start at rest) against the logged pv; the
   operating point (bias, and for ipdt the balancing op) is fitted, since the inventory
   does not hold it.
2. A model re-identified from the same data (:mod:`.identify`).
3. How they differ: ``gain_ratio`` = identified / inventory gain, ``dead_time_diff_s`` =
   identified - inventory dead time, ``tau_ratio`` = identified / inventory tau1
   (largest time constant; blank for ipdt).
4. The verdict ``model_check``:

   * ``disputed`` when the identified model is returned and any of: the gain ratio lies
     outside [1/``model_gain_ratio_max``, ``model_gain_ratio_max``] (default 1.5); the
     dead times differ by more than ``model_dead_time_tol`` (default 50 %) of the
     inventory's dead time and by more than one sample; the tau ratio lies outside
     [1/``model_tau_ratio_max``, ``model_tau_ratio_max``] (default 2); or the model's fit
     trails the identified one by more than ``model_fit_gap_pct`` (default 20 points).
     A parameter difference counts only when the inventory's value also lies outside the
     identified 95 % interval (the data must be sure);
   * ``confirmed`` otherwise; ``not identifiable`` when the data support no model (the
     note says why); ``record unusable`` when the record cannot be read; ``not checked``
     for a model type the check does not simulate (``tf``) or a row not evaluated.

   The defaults follow common practice: a gain margin of 2 (6 dB) absorbs a gain error of
   a factor 2, so a factor 1.5 already spends most of it; a dead-time error of 50 % costs
   about 30 degrees of phase margin at a SIMC crossover; time constants matter less.

A disputed model adds the finding "the data dispute the model ...: re-identify; model-based
figures rest on a disputed model", the action "re-identify the model" before any other,
and the loop's Ms, gain and phase margins with the identified model beside the inventory's
(``id_ms``, ``id_gm_db``, ``id_pm_deg``). A disputed loop with no place on the work list
is added at its end. A bad record degrades only the row's data columns to a note.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import pandas as pd

from .identify import (Arrays, Identification, IdentifyPolicy, _arrays_of, _run, excitation, identify_many,
                       identify_record, nrmse_fit)
from .sources import RowRecord, has_source
from .windows import WindowSettings, describe, find_windows, time_scale

MODELCHECK_COLUMNS = ("model_check", "model_fit_pct", "id_model", "id_gain", "id_gain_ci95", "id_tau1_s",
                      "id_tau1_ci95_s", "id_tau2_s", "id_lead_s", "id_dead_time_s", "id_dead_time_ci95_s",
                      "id_fit_pct", "id_fit_holdout_pct", "gain_ratio", "dead_time_diff_s", "tau_ratio",
                      "id_stable", "id_ms", "id_gm_db", "id_pm_deg", "data_note")
TEXT_COLUMNS = ("model_check", "id_model", "data_note", "id_stable")
SIMULATED = ("fopdt", "sopdt", "ipdt")
#: Most samples of each line of the overlay plot (data, identified model, inventory model). [-]
TRACE_POINTS = 600


@dataclass(frozen=True)
class CheckTrace:
    """The overlay plot's data, thinned to every k-th sample (at most :data:`TRACE_POINTS`).

    Attributes
    ----------
    t : ndarray
        Times of the samples kept. [s]
    pv : ndarray
        Logged pv at those times (after spike removal). [% of range]
    identified, inventory : ndarray or None
        The identified and the inventory model's pv there; None when absent. [% of range]
    t_first, t_last : float
        First and last time of the whole segment. [s]
    lo, hi : float
        Lowest and highest value of the three lines over the whole segment. [% of range]
    """

    t: np.ndarray
    pv: np.ndarray
    identified: np.ndarray | None
    inventory: np.ndarray | None
    t_first: float
    t_last: float
    lo: float
    hi: float


def check_trace(t: np.ndarray, pv: np.ndarray, identified: np.ndarray | None,
                inventory: np.ndarray | None) -> CheckTrace:
    """Thin the overlay's lines to every k-th sample, keeping the whole segment's range.

    Parameters
    ----------
    t : ndarray
        Time. [s]
    pv : ndarray
        Logged pv. [% of range]
    identified, inventory : ndarray or None
        The identified and the inventory model's pv, as long as ``pv``. [% of range]

    Returns
    -------
    CheckTrace
    """
    n = len(t)
    idx = np.arange(0, n, max(1, int(math.ceil(n / TRACE_POINTS))))
    series = [s for s in (pv, identified, inventory) if s is not None]
    lo = float(min(np.nanmin(s) for s in series))
    hi = float(max(np.nanmax(s) for s in series))
    return CheckTrace(t[idx], pv[idx], None if identified is None else identified[idx],
                      None if inventory is None else inventory[idx], float(t[0]), float(t[-1]), lo, hi)


@dataclass(frozen=True)
class ModelCheck:
    """One row's model against its data.

    Attributes
    ----------
    verdict : str
        confirmed, disputed, not identifiable, record unusable or not checked.
    model_fit_pct : float
        Fit % of the inventory's model on the data. [%]
    model_yhat : ndarray or None
        The inventory model's simulated pv. [%]
    identification : Identification or None
        The re-identification.
    gain_ratio : float
        Identified / inventory gain. [-]
    dead_time_diff_s : float
        Identified - inventory dead time. [s]
    tau_ratio : float
        Identified / inventory tau1. [-]
    reasons : tuple of str
        Why disputed, in words with values.
    note : str
        What was done or why not.
    trace : CheckTrace or None
        The overlay plot's data, thinned (set by :meth:`compact`).
    drawn : audit.plantdata.packed.Packed or None
        The overlay plot drawn (:class:`audit.plantdata.report_part.Overlay`, packed), in place of
        ``trace``: what the per-loop task returns (:func:`audit.plantdata.report_part.drawn_check`).
    """

    verdict: str
    model_fit_pct: float = float("nan")
    model_yhat: np.ndarray | None = None
    identification: Identification | None = None
    gain_ratio: float = float("nan")
    dead_time_diff_s: float = float("nan")
    tau_ratio: float = float("nan")
    reasons: tuple[str, ...] = ()
    note: str = ""
    trace: CheckTrace | None = None
    drawn: Any = None

    def compact(self) -> "ModelCheck":
        """The same check without the record's samples: the overlay thinned into ``trace``.

        What crosses a process boundary and what the run keeps: the identification keeps its
        figures, parameters and notes, its arrays and each fit's ``yhat`` are emptied, and
        ``model_yhat`` is dropped.

        Returns
        -------
        ModelCheck
        """
        ident = self.identification
        if ident is None:
            return replace(self, model_yhat=None)
        trace = self.trace
        if trace is None and len(ident.pv):
            b = ident.best
            inv = self.model_yhat if self.model_yhat is not None and len(self.model_yhat) == len(ident.pv) else None
            trace = check_trace(ident.t, ident.pv, b.yhat if b is not None else None, inv)
        empty = np.zeros(0)
        fits = {k: replace(f, yhat=empty) for k, f in ident.fits.items()}
        best = None if ident.best is None else replace(ident.best, yhat=empty)
        return replace(self, model_yhat=None, trace=trace,
                       identification=replace(ident, best=best, fits=fits, t=empty, pv=empty, op=empty))


def row_modes(row) -> list[tuple[float, float]]:
    """The inventory model of a row as first-order modes (time constant [s], weight [-]) at unit gain.

    Parameters
    ----------
    row : LoopRow
        A row whose ``model`` is fopdt, sopdt or ipdt (ipdt may carry tau1).

    Returns
    -------
    list of tuple
        ``(tau, w)`` pairs with tau = inf for an integrator: the sum of w/(tau s + 1) (w/s).
    """
    t1, t2, ld = float(row.tau1 or 0.0), float(row.tau2 or 0.0), float(row.lead or 0.0)
    if row.model == "fopdt":
        return [(t1, 1.0)] if t1 > 0 else [(0.0, 1.0)]
    if row.model == "ipdt":
        return [(math.inf, 1.0)] + ([(t1, -t1)] if t1 > 0 else [])
    if t1 <= 0 and t2 <= 0:
        return [(0.0, 1.0)]
    if t2 <= 0 or t1 <= 0:
        t = max(t1, t2)
        return [(t, (t - ld) / t), (0.0, ld / t)]
    if abs(t1 - t2) < 1e-4 * max(t1, t2):
        t2 = t1 * (1 - 1e-4)
    return [(t1, (t1 - ld) / (t1 - t2)), (t2, (ld - t2) / (t1 - t2))]


def simulate_row(row, op: np.ndarray, dt: float) -> np.ndarray:
    """The row's model (gain included) driven by ``op - op[0]`` from rest. [%]

    Parameters
    ----------
    row : LoopRow
        fopdt, sopdt or ipdt row.
    op : ndarray
        Logged op. [%]
    dt : float
        Sample interval. [s]
    """
    u = op - op[0]
    y = np.zeros(len(u))
    for tau, w in row_modes(row):
        if tau == 0.0:                     # a static share (no lag): the held input, delayed
            q = float(row.dead_time or 0.0) / dt
            d = int(math.floor(q + 1e-12)) + (1 if q - math.floor(q + 1e-12) > 1e-12 else 0)
            y += w * np.concatenate([np.zeros(min(d, len(u))), u[:max(len(u) - d, 0)]])
            continue
        if math.isinf(tau):
            y += w * _run("ipdt", (), float(row.dead_time or 0.0), dt, u)
        else:
            y += w * _run("fopdt", (tau,), float(row.dead_time or 0.0), dt, u)
    return float(row.gain) * y


def _fit_offsets(row, y: np.ndarray, s: np.ndarray, dt: float) -> np.ndarray:
    cols = [np.ones_like(s)]
    if row.model == "ipdt":
        cols.append(np.arange(len(s)) * dt)
    X = np.column_stack(cols)
    coef = np.linalg.lstsq(X, y - s, rcond=None)[0]
    return s + X @ coef


def identify_policy_of(policy) -> IdentifyPolicy:
    """The identification settings of the model check: the defaults, the window selection from the policy.

    Parameters
    ----------
    policy : Policy
        ``model_window_*`` settings (absent ones keep :class:`IdentifyPolicy`'s defaults).

    Returns
    -------
    IdentifyPolicy
    """
    d = IdentifyPolicy()
    get = lambda name, default: getattr(policy, name, default)  # noqa: E731
    return replace(d, window_above=int(get("model_window_above", d.window_above)),
                   window_samples=int(get("model_window_samples", d.window_samples)),
                   window_after=float(get("model_window_after", d.window_after)),
                   window_noise_ratio=float(get("model_window_noise_ratio", d.window_noise_ratio)),
                   min_sp_move_pct=float(get("model_window_sp_move_pct", d.min_sp_move_pct)))


def window_settings(id_policy: IdentifyPolicy) -> WindowSettings:
    """The window selection's settings out of the identification settings ``id_policy``."""
    p = id_policy
    return WindowSettings(p.window_above, p.window_samples, p.window_before, p.window_after, p.window_noise_ratio,
                          p.min_op_move_pct, p.min_sp_move_pct)


def _manual_of(rec, seg, policy) -> np.ndarray | None:
    """True where the segment's mode word means manual (the policy's words); None without a mode."""
    if seg.mode is None or not rec.mode_labels:
        return None
    from .use import MANUAL, ModeWords
    words = ModeWords.from_text(getattr(policy, "mode_automatic", "auto"), getattr(policy, "mode_manual", "man"),
                                getattr(policy, "mode_cascade", "cas"))
    try:
        cat = pd.Categorical.from_codes(np.asarray(seg.mode, dtype=np.int64), categories=list(rec.mode_labels))
    except (ValueError, TypeError):        # labels that are not a clean category list: treated as no mode
        return None
    return words.classes(cat) == MANUAL


def identify_windowed(row, rec, policy, id_policy: IdentifyPolicy) -> tuple[Identification, str]:
    """Identification on the record's most informative window of excitation (:mod:`.windows`).

    For a record whose longest segment is longer than ``id_policy.window_above`` samples: the
    excitation test of the whole segment, then the windows, then the identification of the best
    one. With no window, an identification refused with the reason (the whole segment's data
    kept for the overlay plot).

    Parameters
    ----------
    row : LoopRow
        Its model gives the time scale of the windows.
    rec : Record
        The record.
    policy : Policy
        Mode words.
    id_policy : IdentifyPolicy
        Identification and window settings.

    Returns
    -------
    tuple of (Identification, str)
        The identification and the note naming the window ('' when none was used).
    """
    a = _arrays_of(rec)
    if isinstance(a, Identification):
        return a, ""
    seg = rec.longest()
    op, pv = np.asarray(a.op, float), np.asarray(a.pv, float)
    t = a.t0 + np.arange(len(op)) * a.dt

    def refuse(reason: str) -> tuple[Identification, str]:
        return Identification(a.name, None, {}, (*a.notes, reason), False, t, pv, op, a.dt, a.lines), ""

    if not (np.all(np.isfinite(op)) and np.all(np.isfinite(pv))):
        return identify_many([a], id_policy)[0], ""
    ex = excitation(op, id_policy)
    if not ex.ok:
        return refuse(ex.reason)
    sp = seg.values.get("sp")
    choice = find_windows(op, pv, sp, _manual_of(rec, seg, policy), a.dt, time_scale(row), window_settings(id_policy))
    if not choice.windows:
        return refuse(choice.reason())
    ones = seg.last_line - seg.first_line == seg.n - 1        # a line per sample: the window's lines are known
    parts, notes = [], []
    for rank, win in enumerate(choice.windows[:max(1, id_policy.window_tries)]):
        note = describe(win, choice, len(op), a.dt, a.t0, rec.start, (seg.first_line, 1) if ones else None, rank)
        m, end = win.samples()
        lines = (seg.first_line + win.lo, seg.first_line + end - 1) if ones else a.lines
        q = win.stride
        # block means (q = 1: the samples themselves), each block's time its middle
        parts.append(Arrays(op[win.lo:end].reshape(m, q).mean(axis=1), pv[win.lo:end].reshape(m, q).mean(axis=1),
                            a.dt * q, a.name, (*a.notes, note), a.t0 + (win.lo + (q - 1) / 2) * a.dt, lines))
        notes.append(note)
    # the windows are fitted together; the first in rank that gives a model is used, else the best's refusal
    got = identify_many(parts, id_policy)
    for k, ident in enumerate(got):
        if ident.best is not None:
            if k:
                why = got[0].notes[-1] if got[0].notes else "no model"
                note = f"{notes[k]} (the better-ranked window{'s' if k > 1 else ''} gave no model: {why})"
                ident = replace(ident, notes=tuple(note if x == notes[k] else x for x in ident.notes))
                return ident, note
            return ident, notes[0]
    return got[0], notes[0]


def check_record(row, found: RowRecord, policy, id_policy: IdentifyPolicy | None = None) -> ModelCheck:
    """Check one row's model against its record, already read.

    Parameters
    ----------
    row : LoopRow
        The row (model type and parameters).
    found : RowRecord
        Its record (:func:`audit.plantdata.sources.record_for_row`).
    policy : Policy
        ``model_*`` thresholds.
    id_policy : IdentifyPolicy, optional
        Identification settings; by default :func:`identify_policy_of` the policy.

    Returns
    -------
    ModelCheck
        With the full arrays; :meth:`ModelCheck.compact` thins them. A record longer than
        ``window_above`` samples is judged on its most informative window of excitation
        (:func:`identify_windowed`), named in the note.
    """
    if found.record is None:
        return ModelCheck("record unusable", note=f"data record: {found.refused or 'none found'}")
    rec, shown = found.record, found.name
    if not rec.usable or "pv" not in rec.signals or "op" not in rec.signals:
        why = [str(n) for n in rec.notes_of("file", "header", "short")] or \
            [f"{shown}: needs op and pv columns"]
        return ModelCheck("record unusable", note="data record: " + "; ".join(why[:5]))
    if id_policy is None:
        id_policy = identify_policy_of(policy)
    seg = rec.longest()
    wnote = ""
    if seg is not None and seg.n > id_policy.window_above:
        ident, wnote = identify_windowed(row, rec, policy, id_policy)
        if not wnote:                          # no window: the record does not judge the model
            if row.model not in SIMULATED or row.gain is None:
                return ModelCheck("not checked", identification=ident,
                                  note=f"model type {row.model!r} is not simulated against data; " +
                                       (ident.notes[-1] if ident.notes else ""))
            return ModelCheck("not identifiable", identification=ident,
                              note="; ".join(ident.notes[-3:]) if ident.notes else "")
        op, pv, dt = ident.op, ident.pv, ident.dt
    else:
        ident = identify_record(rec, id_policy)
        op, pv, dt = seg.values["op"], seg.values["pv"], seg.dt
    if row.model not in SIMULATED or row.gain is None:
        return ModelCheck("not checked", identification=ident,
                          note=f"model type {row.model!r} is not simulated against data; identified model shown"
                               + (f"; {wnote}" if wnote else ""))
    yhat = _fit_offsets(row, ident.pv if len(ident.pv) == len(pv) else pv, simulate_row(row, op, dt), dt)
    y = ident.pv if len(ident.pv) == len(pv) else pv
    mfit = nrmse_fit(y, yhat)
    tail = [n for n in ident.notes[-3:] if n != wnote] if ident.notes else []
    notes = "; ".join(([wnote] if wnote else []) + tail)
    if ident.best is None:
        return ModelCheck("not identifiable", mfit, yhat, ident, note=notes)
    b = ident.best
    inv_k, inv_th = float(row.gain), float(row.dead_time or 0.0)
    inv_tau = float(row.tau1 or 0.0)
    kid = b.params["gain"]
    same_kind = (b.model == "ipdt") == (row.model == "ipdt")
    ratio = kid / inv_k if same_kind and inv_k != 0 else float("nan")
    dtd = b.params["dead_time"] - inv_th
    tr = (b.params["tau1"] / inv_tau) if ("tau1" in b.params and inv_tau > 0 and row.model != "ipdt") else float("nan")
    reasons = []
    if not same_kind:
        reasons.append(f"the data show {'an integrating' if b.model == 'ipdt' else 'a self-regulating'} process, "
                       f"the model is {row.model}")
    if np.isfinite(ratio) and not (1 / policy.model_gain_ratio_max <= ratio <= policy.model_gain_ratio_max) \
            and abs(kid - inv_k) > b.ci95["gain"]:
        reasons.append(f"gain {kid:.3g} from the data vs {inv_k:.3g} (ratio {ratio:.2f})")
    if abs(dtd) > max(policy.model_dead_time_tol * inv_th, dt) and abs(dtd) > b.ci95["dead_time"]:
        reasons.append(f"dead time {b.params['dead_time']:.3g} s from the data vs {inv_th:.3g} s")
    if np.isfinite(tr) and not (1 / policy.model_tau_ratio_max <= tr <= policy.model_tau_ratio_max) \
            and abs(b.params["tau1"] - inv_tau) > b.ci95["tau1"]:
        reasons.append(f"tau1 {b.params['tau1']:.3g} s from the data vs {inv_tau:.3g} s (ratio {tr:.2f})")
    if mfit < b.fit_pct - policy.model_fit_gap_pct:
        reasons.append(f"the model fits the data {mfit:.0f} %, the identified one {b.fit_pct:.0f} %")
    verdict = "disputed" if reasons else "confirmed"
    return ModelCheck(verdict, mfit, yhat, ident, ratio, dtd, tr, tuple(reasons), notes)


def _append(res: pd.DataFrame, label, col: str, text: str, first: bool = False) -> None:
    old = res.at[label, col] if col in res.columns else ""
    old = "" if old is None or (isinstance(old, float) and math.isnan(old)) else str(old)
    res.at[label, col] = (f"{text}; {old}" if first else f"{old}; {text}") if old else text


def _identified_row(row, b):
    p = b.params
    return replace(row, model=b.model, gain=p["gain"], tau1=p.get("tau1"), tau2=p.get("tau2"),
                   lead=p.get("tau_lead"), dead_time=p["dead_time"], num=None, den=None)


def check_models(audit) -> None:
    """Pipeline stage: the model check of every row with a ``data_file`` (see the module notes).

    The checks themselves ran with the loop health, on the same record read once
    (:func:`audit.plantdata.loopdata.loop_data`); this stage puts them into the results. Adds
    :data:`MODELCHECK_COLUMNS`; stores each :class:`ModelCheck` in
    ``audit.extras['model_checks'][row.index]`` (compact: the overlay thinned, no samples); for
    disputed models adds the finding and the action "re-identify the model" (not when the
    loop-health stage suspects the valve: then the data cannot judge the model, and the finding
    says so). A row whose check raised is recorded as a fault of this stage for that row. Run
    after the priority stage.

    Parameters
    ----------
    audit : Audit
        The run; ``results`` and ``extras`` are changed in place.
    """
    from ..frequency import evaluate
    from ..loop import model_from_row

    from ..faults import row_fault_elsewhere
    from .loopdata import RowFailure, loop_data
    from .sources import export_of

    res = audit.results
    inv = audit.inventory
    export = export_of(audit)
    rows = [r for r in inv.rows if has_source(r, export)]
    if not rows:
        return
    for c in MODELCHECK_COLUMNS:
        if c not in res.columns:
            res[c] = pd.Series([None if c == "id_stable" else ""] * len(res) if c in TEXT_COLUMNS else np.nan,
                               index=res.index,
                               dtype=object if c in TEXT_COLUMNS else float)
    store = audit.extras.setdefault("model_checks", {})
    id_rows, id_models = [], []
    for row in rows:
        label = res.index[row.index]
        if audit.models[row.index] is None:
            res.at[label, "model_check"] = "not checked"
            res.at[label, "data_note"] = "row not evaluated: see message"
            continue
        got = loop_data(audit).get(row.index)
        mc = got.check if got is not None else None
        if isinstance(mc, RowFailure):
            row_fault_elsewhere(audit, "modelcheck", row.index, mc.error, mc.detail)
            continue
        if mc is None:
            mc = ModelCheck("not checked", note="no data record found")
        store[row.index] = mc
        res.at[label, "model_check"] = mc.verdict
        res.at[label, "model_fit_pct"] = mc.model_fit_pct
        res.at[label, "gain_ratio"] = mc.gain_ratio
        res.at[label, "dead_time_diff_s"] = mc.dead_time_diff_s
        res.at[label, "tau_ratio"] = mc.tau_ratio
        note = mc.note
        b = mc.identification.best if mc.identification is not None else None
        if b is not None:
            res.at[label, "id_model"] = b.model
            res.at[label, "id_gain"] = b.params["gain"]
            res.at[label, "id_gain_ci95"] = b.ci95["gain"]
            res.at[label, "id_tau1_s"] = b.params.get("tau1", np.nan)
            res.at[label, "id_tau1_ci95_s"] = b.ci95.get("tau1", np.nan)
            res.at[label, "id_tau2_s"] = b.params.get("tau2", np.nan)
            res.at[label, "id_lead_s"] = b.params.get("tau_lead", np.nan)
            res.at[label, "id_dead_time_s"] = b.params["dead_time"]
            res.at[label, "id_dead_time_ci95_s"] = b.ci95["dead_time"]
            res.at[label, "id_fit_pct"] = b.fit_pct
            res.at[label, "id_fit_holdout_pct"] = b.fit_holdout_pct
            if row.inner_loop:
                note = "; ".join(x for x in (note, "cascade outer loop: figures with the identified model not "
                                                   "computed") if x)
            else:
                id_rows.append(row)
                id_models.append(model_from_row(_identified_row(row, b)))
        res.at[label, "data_note"] = note
    figs = evaluate(id_models) if id_models else None
    for j, row in enumerate(id_rows):
        label = res.index[row.index]
        res.at[label, "id_stable"] = bool(figs["stable"].iloc[j])
        res.at[label, "id_ms"] = figs["ms"].iloc[j]
        res.at[label, "id_gm_db"] = figs["gm_db"].iloc[j]
        res.at[label, "id_pm_deg"] = figs["pm_deg"].iloc[j]
    for row in rows:
        mc = store.get(row.index)
        if mc is None or mc.verdict != "disputed":
            continue
        label = res.index[row.index]
        stuck = res.at[label, "valve_sticking"] if "valve_sticking" in res.columns else None
        if stuck is not None and stuck is not pd.NA and bool(stuck):
            # loop health (audit.plantdata.health) suspects the valve: the logged op is not where the valve is
            _append(res, label, "findings", "the data disagree with the model (" + "; ".join(mc.reasons) + "), "
                    "but the valve is suspected sticking: the logged op is not the valve's position, so the data "
                    "cannot judge the model; check the valve first")
            continue
        words = "the data dispute the model (" + "; ".join(mc.reasons) + "): re-identify"
        st = res.at[label, "id_stable"]
        if st is True:
            words += (f"; with the identified model and the current tuning Ms {res.at[label, 'id_ms']:.3g}, "
                      f"GM {res.at[label, 'id_gm_db']:.3g} dB, PM {res.at[label, 'id_pm_deg']:.3g} deg")
        elif st is False:
            words += "; with the identified model the current tuning is unstable"
        words += "; model-based figures rest on a disputed model"
        _append(res, label, "findings", words, first=True)
        if "action" in res.columns:
            _append(res, label, "action", "re-identify the model", first=True)
        if "reason" in res.columns:
            _append(res, label, "reason", "model disputed by plant data", first=True)
    if "rank" in res.columns:
        disputed = res.index[(res["model_check"] == "disputed") & res["rank"].isna()]
        top = float(np.nanmax(res["rank"].to_numpy(float))) if res["rank"].notna().any() else 0.0
        order = sorted(disputed, key=lambda i: (str(res.at[i, "tag"]), res.at[i, "row"]))
        for k, label in enumerate(order):
            res.at[label, "rank"] = top + 1 + k
