"""The curves of the report's loop charts: exact frequency responses, step responses, residuals.

The report model (:mod:`audit.report`) gives each of the first loops of its detail sections a
:class:`LoopPlots`; this module computes what it holds, in project units (time [s], frequency
[rad/s]), with no scaling and no markup (:mod:`audit.plots` turns it into chart data):

* :func:`plot_data`: L, S and T of the loop as tuned (and as proposed, and a cascade's inner S)
  evaluated exactly (dead time as e^{-jw theta}) on :func:`plot_frequencies`, the crossovers and the
  Ms peak among the frequencies;
* :func:`start_steps` / :func:`collect_steps`: the load and set-point step responses of every plotted
  loop, as tuned and as proposed, in one batched simulation per kind
  (:func:`audit.timedomain.step_traces_many`), thinned to :data:`TRACE_POINTS` where they are
  simulated (with a process pool, in its workers while the report model is built);
* :func:`residual_data`: a disturbance record and the residual the loop would leave.
"""

from __future__ import annotations

import importlib
import math
from dataclasses import dataclass, replace
from typing import Any, Callable

import numpy as np

from .loop import LoopModel

PLOT_POINTS = 400
"""Frequency points per plotted curve. [-]"""


def _finite(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def _note(obj: Any) -> str:
    """The ``note`` of a trace ('' when it has none)."""
    v = getattr(obj, "note", "")
    return "" if v is None else str(v)


@dataclass(frozen=True)
class FrequencyData:
    """Exact frequency responses of one loop, for the gain and Nyquist plots.

    Attributes
    ----------
    w : ndarray
        Frequencies, ascending. [rad/s]
    L, S, T : ndarray
        Loop transfer, sensitivity and complementary sensitivity on ``w``. [-]
    ms_max : float
        Ms limit in force. [-]
    band_rad_s : float | None
        Upper edge of the rejection band. [rad/s]
    attenuation_db : float | None
        Required attenuation A in the band. [dB]
    inner_S : ndarray | None
        Sensitivity of a cascade's inner loop on ``w``. [-]
    proposed_L, proposed_S : ndarray | None
        The same for the proposed tuning. [-]
    """

    w: np.ndarray
    L: np.ndarray
    S: np.ndarray
    T: np.ndarray
    ms_max: float
    band_rad_s: float | None = None
    attenuation_db: float | None = None
    inner_S: np.ndarray | None = None
    inner_tag: str = ""
    proposed_L: np.ndarray | None = None
    proposed_S: np.ndarray | None = None


@dataclass(frozen=True)
class StepData:
    """A step response: ``kind`` is ``load`` or ``setpoint``; t [s], y and u [% of range]."""

    kind: str
    t: np.ndarray
    y: np.ndarray
    u: np.ndarray | None = None
    proposed_t: np.ndarray | None = None
    proposed_y: np.ndarray | None = None


@dataclass(frozen=True)
class ResidualData:
    """A disturbance record d(t) and the predicted closed-loop residual y(t); t [s], d, y [% of range]."""

    t: np.ndarray
    d: np.ndarray
    y: np.ndarray


@dataclass(frozen=True)
class LoopPlots:
    """Everything the plots of one loop need."""

    key: str                                  # deterministic, unique within the report
    frequency: FrequencyData | None
    steps: tuple[StepData, ...] = ()
    residual: ResidualData | None = None



def plot_frequencies(model: LoopModel, refs: list[Any]) -> np.ndarray:
    """A log grid covering the loop's characteristic frequencies, with those frequencies on it.

    Parameters
    ----------
    model : LoopModel
        The loop (its time constants and dead time set the scale when ``refs`` is empty).
    refs : list
        Frequencies the plot must show (crossovers, the Ms peak, band edge). [rad/s]

    Returns
    -------
    ndarray
        At most :data:`PLOT_POINTS` frequencies, ascending, from a whole decade to a whole
        decade, the finite positive ``refs`` among them (so the Ms peak is drawn at its
        computed height). [rad/s]
    """
    good = sorted({float(r) for r in refs if _finite(r) and r > 0})
    if not good:
        p = model.process
        good = [1.0 / max(model.delay, p.tau1, p.tau2, 1e-3)]
    lo = math.floor(math.log10(min(good) / 300.0))
    hi = math.ceil(math.log10(max(good) * 100.0))
    grid = np.logspace(lo, hi, PLOT_POINTS - len(good))
    return np.unique(np.concatenate([grid, good]))



def proposed_model(base: LoopModel, proposal: Any) -> LoopModel | None:
    """The proposed loop carried by a proposal object, whatever its exact shape.

    A :class:`LoopModel` itself; else its first attribute among ``model``,
    ``proposed_model``, ``proposed``, ``loop`` that is a LoopModel; else its
    ``settings.controller()`` (or a ``controller``) applied to ``base``, with the
    action reversed when the proposal corrects it (``corrected_action``).
    """
    if proposal is None:
        return None
    if isinstance(proposal, LoopModel):
        return proposal
    for name in ("model", "proposed_model", "proposed", "loop", "new_model"):
        cand = getattr(proposal, name, None)
        if isinstance(cand, LoopModel):
            return cand
    ctrl = getattr(proposal, "controller", None)
    settings = getattr(proposal, "settings", None)
    if ctrl is None and settings is not None:
        ctrl = getattr(settings, "controller", None)
    if callable(ctrl) and not hasattr(ctrl, "rational"):
        ctrl = ctrl()
    if ctrl is None or not hasattr(ctrl, "rational"):
        return None
    action = getattr(proposal, "corrected_action", None)
    sign = {"reverse": 1.0, "direct": -1.0}.get(action, base.sign) if isinstance(action, str) else base.sign
    return replace(base, controller=ctrl, sign=sign)



def _arrays(obj: Any, *names: str) -> tuple[np.ndarray | None, ...]:
    out = []
    for n in names:
        v = obj.get(n) if isinstance(obj, dict) else getattr(obj, n, None)
        out.append(None if v is None else np.asarray(v, float))
    return tuple(out)


def _step_source() -> Callable[[list[LoopModel], str], list[Any]] | None:
    """:func:`audit.timedomain.step_traces_many`, or None when the time-domain stage is not in this build."""
    try:
        mod = importlib.import_module("audit.timedomain")
    except ImportError:
        return None
    return getattr(mod, "step_traces_many", None)


TRACE_POINTS = 800
"""Most points kept per time trace in the report model (the chart thins further). [-]"""

TRACE_CUT = 20.0
"""A diverging trace is cut where its magnitude first exceeds this many unit steps. [-]"""


def _thin(t: np.ndarray, *ys: np.ndarray | None, cut: bool = True) -> tuple[np.ndarray | None, ...]:
    """At most :data:`TRACE_POINTS` points: the ends and, in each run of points, the lowest and highest
    of every trace (peaks survive); the trace cut where it diverges."""
    n = len(t)
    if cut and ys and ys[0] is not None:
        big = np.flatnonzero(~np.isfinite(ys[0]) | (np.abs(ys[0]) > TRACE_CUT))
        if big.size:
            n = max(int(big[0]) + 1, 2)
    real = [y[:n] for y in ys if y is not None]
    if n <= TRACE_POINTS or not real:
        idx = np.arange(n)
    else:
        buckets = max(1, TRACE_POINTS // (2 * len(real)) - 1)
        k = -(-n // buckets)
        base = np.arange(buckets) * k
        keep = [np.array([0, n - 1])]
        for y in real:
            v = np.nan_to_num(np.concatenate([y, np.full(buckets * k - n, y[-1])]), nan=0.0).reshape(buckets, k)
            keep += [np.minimum(base + v.argmin(axis=1), n - 1), np.minimum(base + v.argmax(axis=1), n - 1)]
        idx = np.unique(np.concatenate(keep))
    return (t[idx],) + tuple(None if y is None else y[idx] for y in ys)


def _step_data(kind: str, tr: Any, ptr: Any, notes: list[str]) -> StepData | None:
    """One step response for the plots from its trace (and the proposed tuning's), or None with a note."""
    t, y, u = _arrays(tr, "t", "y", "u")
    why = _note(tr)
    if why or t is None or y is None or len(t) != len(y) or len(t) < 2:
        notes.append(f"The {kind} step response could not be computed: {why or 'no trace'}.")
        return None
    t2, y2, u2 = _thin(t, y, u if u is not None and len(u) == len(t) else None)
    if len(t2) and t2[-1] < t[-1] - 1e-12 * abs(t[-1]) and np.abs(y2).max() > TRACE_CUT / 2:
        notes.append(f"The {kind} step response grows without bound; its plot stops at t = {t2[-1]:.4g} s.")
    pt = py = None
    if ptr is not None and not _note(ptr):
        pt, py = _arrays(ptr, "t", "y")
        if pt is not None and py is not None and len(pt) == len(py) and len(pt) >= 2:
            pt, py = _thin(pt, py)
        else:
            pt = py = None
    return StepData(kind, t2, y2, u2, pt, py)


StepResult = tuple["StepData | None", tuple[str, ...]]
"""One loop's response of one kind for its plots, and notes about what could not be computed."""


def _steps_of_kind(task: tuple[list[LoopModel], list[int], str]) -> list[StepResult] | str:
    """Step responses of one kind for the plotted loops, one batched simulation (a task a process pool can run).

    The traces are thinned here (:func:`_thin`), so a pool's worker sends back at most
    :data:`TRACE_POINTS` points per trace.

    Parameters
    ----------
    task : tuple
        (models: the n plotted loops as tuned, then the proposed tuning of those that have one;
        positions among the n of the loops with a proposed tuning; ``load`` or ``setpoint``).

    Returns
    -------
    list or str
        Per plotted loop, (:class:`StepData` or None, notes); or why the simulation failed.
    """
    models, with_prop, kind = task
    try:
        traces = list(_step_source()(models, kind))
    except Exception as exc:  # a failing simulation leaves the rest of the report intact
        return f"{exc}"
    n = len(models) - len(with_prop)
    prop = dict(zip(with_prop, traces[n:]))
    out = []
    for k in range(n):
        notes: list[str] = []
        st = _step_data(kind, traces[k], prop.get(k), notes)
        out.append((st, tuple(notes)))
    return out


def start_steps(jobs: list["PlotJob"], mapper: Callable = map) -> Any:
    """Start the step simulations of the loops with plots: one batch per kind, present and proposed tuning.

    With a process pool's ``map`` both kinds run in the workers at once while the caller goes on; with
    ``map`` they run when :func:`collect_steps` reads them. Either way the traces are the same.

    Parameters
    ----------
    jobs : list of PlotJob
        The loops with plots.
    mapper : callable
        ``map`` or a process pool's ``map``.

    Returns
    -------
    iterator or None
        Per kind, in the order load, set point: :func:`_steps_of_kind`'s result; None when there is
        nothing to simulate.
    """
    if _step_source() is None or not jobs:
        return None
    models = [j.model for j in jobs] + [j.proposed for j in jobs if j.proposed is not None]
    with_prop = [k for k, j in enumerate(jobs) if j.proposed is not None]
    return mapper(_steps_of_kind, [(models, with_prop, "load"), (models, with_prop, "setpoint")])


def collect_steps(jobs: list["PlotJob"], pending: Any) -> dict[str, tuple[tuple[StepData, ...], tuple[str, ...]]]:
    """The step data of every loop with plots from :func:`start_steps`.

    Parameters
    ----------
    jobs : list of PlotJob
        The loops with plots, as given to :func:`start_steps`.
    pending : iterator or None
        What :func:`start_steps` returned.

    Returns
    -------
    dict
        Plot key -> (step data, notes about what could not be computed).
    """
    notes: dict[str, list[str]] = {j.key: [] for j in jobs}
    steps: dict[str, list[StepData]] = {j.key: [] for j in jobs}
    if _step_source() is None:
        for j in jobs:
            notes[j.key].append("Step responses are not shown: the time-domain stage is not available in this build.")
    elif pending is not None:
        for kind, result in zip(("load", "setpoint"), pending):
            if isinstance(result, str):
                for j in jobs:
                    notes[j.key].append(f"The {kind} step response could not be computed: {result}.")
                continue
            for j, (st, why) in zip(jobs, result):
                notes[j.key].extend(why)
                if st is not None:
                    steps[j.key].append(st)
    return {k: (tuple(steps[k]), tuple(notes[k])) for k in notes}


def residual_data(rec: Any) -> ResidualData | None:
    """A disturbance record and its predicted residual for the plots (thinned).

    Parameters
    ----------
    rec : object, dict or None
        The residual stage's record: ``t`` [s], ``d`` and ``y`` (the logged disturbance and the
        predicted residual), as attributes or keys.

    Returns
    -------
    ResidualData or None
        None when there is no record or it is malformed.
    """
    if rec is None:
        return None
    t, d, y = _arrays(rec, "t", "d", "y")
    if t is None or d is None or y is None or not (len(t) == len(d) == len(y)) or len(t) < 2:
        return None
    t, d, y = _thin(t, d, y, cut=False)
    return ResidualData(t, d, y)



@dataclass(frozen=True)
class PlotJob:
    """What one loop's plot data is computed from (picklable, for a process pool)."""

    key: str
    model: LoopModel
    proposed: LoopModel | None
    refs: tuple[Any, ...]          # frequencies the plots must show [rad/s]
    ms_max: float                  # [-]
    band_rad_s: float | None       # [rad/s]
    attenuation_db: float | None   # [dB]
    inner_tag: str
    residual: ResidualData | None
    steps: tuple[StepData, ...] = ()     # from :func:`collect_steps`
    notes: tuple[str, ...] = ()          # what could not be computed


def plot_data(job: PlotJob) -> tuple[LoopPlots, tuple[str, ...]]:
    """The curves of one loop: exact frequency responses; the step responses come in the job.

    Parameters
    ----------
    job : PlotJob
        The loop and its limits.

    Returns
    -------
    tuple
        (:class:`LoopPlots`, notes about anything that could not be computed).
    """
    model, proposed = job.model, job.proposed
    w = plot_frequencies(model, list(job.refs))
    with np.errstate(all="ignore"):
        Lw = model.L(w)
        S, T = 1.0 / (1.0 + Lw), Lw / (1.0 + Lw)
        inner_S = model.inner.S(w) if model.inner is not None else None
        pL = proposed.L(w) if proposed is not None else None
        pS = 1.0 / (1.0 + pL) if pL is not None else None
    freq = FrequencyData(w, Lw, S, T, job.ms_max, job.band_rad_s, job.attenuation_db, inner_S, job.inner_tag,
                         pL, pS)
    return LoopPlots(job.key, freq, job.steps, job.residual), job.notes
