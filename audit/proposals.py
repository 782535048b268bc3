"""Retuning proposals: every candidate judged by the exact engine, one chosen, a feasibility verdict.

For every loop that needs it the candidates of :mod:`audit.candidates` are written in the row's
own form and units, rounded to three significant figures (:func:`audit.tuning.rounded`), and
the *rounded* settings are re-evaluated by the exact engine (:func:`audit.frequency.evaluate`):
the candidates of all loops of a batch in one call. Only the exact engine decides what is
reported.

Choice. A candidate *meets the limits* when the exact engine finds it stable with Ms, both gain
margins and the phase margin within the row's limits (tolerances :data:`MS_TOL`,
:data:`GM_TOL_DB`, :data:`PM_TOL_DEG` cover the rounding). Among those that also meet the
rejection requirement the one with the most margin to spare is recommended: the largest of
min(relative slack to each limit and to the requirement, ki / largest ki among them), the last
term so that spare robustness is not bought with a sluggish loop. When none meets the
requirement the verdict is 'not achievable by tuning' and the candidate within the limits with
the deepest band attenuation is shown as the best effort.

Batches. :func:`propose_many` works on many loops at once: the action checks, the candidate
search, the exact evaluation and the load-step IAE of the recommended settings each run once
for the whole batch; with ``--jobs N`` the proposals stage spreads the batch over processes,
each simulating the load steps of its own recommendations (only the load step: the set-point
step is not read). A loop whose own computation raises is marked on its row and the others go on.

References
----------
.. [1] S. Skogestad and I. Postlethwaite, Multivariable Feedback Control, 2nd ed., 2005,
   sec. 5.5-5.6 (the delay and RHP-zero limitations quoted by :func:`limiting_factor`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from .candidates import candidate_settings_many
from .loop import LoopModel, Process
from .policy import Policy
from .rows import LoopRow
from .tuning import (Candidate, Figures, Limits, Proposal, Requirement, Settings, _finite, _TERM_INFO,
                     current_settings, rounded, row_terms, settings_text, to_form)

#: Relative tolerance on Ms when judging a rounded candidate (three significant figures). [-]
MS_TOL = 0.005
#: Tolerance on the gain margin when judging a rounded candidate. [dB]
GM_TOL_DB = 0.05
#: Tolerance on the phase margin when judging a rounded candidate. [deg]
PM_TOL_DEG = 0.25
#: A setting that changes by more than this factor is flagged: move in stages. [-]
STAGE_FACTOR = 2.0

VERDICTS = ("retune", "not achievable by tuning", "no change needed", "check model", "not evaluated")


# ----------------------------------------------------------------------------------------------
# judging and choosing


def judge_candidate(fig: Figures, lim: Limits, req: Requirement) -> tuple[bool, bool, float]:
    """(meets the limits, meets the requirement, spare) of one evaluated candidate.

    The limits are met when the loop is stable, Ms <= ms_max (1 + MS_TOL), both gain margins
    >= gm_min_db - GM_TOL_DB and PM >= pm_min_deg - PM_TOL_DEG (tolerances for the rounding to
    three significant figures). ``spare`` is the smallest relative slack over the limits and the
    requirement: (ms_max - Ms)/ms_max, (GM - gm_min)/gm_min, (PM - pm_min)/pm_min and
    (required level - band level)/A. [-]

    Parameters
    ----------
    fig : Figures
        Exact figures of the candidate: ``ms`` [-], ``gm_db`` [dB], ``gm_low`` [-],
        ``pm_deg`` [deg], ``band_s_db`` [dB].
    lim : Limits
        Robustness limits in force: ``ms_max`` [-], ``gm_min_db`` [dB], ``pm_min_deg`` [deg].
    req : Requirement
        Rejection requirement in force (``band_rad_s`` [rad/s], ``attenuation_db`` [dB]);
        always met when inactive.

    Returns
    -------
    tuple of (bool, bool, float)
        Meets the limits, meets the requirement, and ``spare`` (-inf when unstable). [-]
    """
    down = -20 * math.log10(fig.gm_low) if _finite(fig.gm_low) and fig.gm_low > 0 else math.inf
    gm = fig.gm_db if not math.isnan(fig.gm_db) else math.inf
    pm = fig.pm_deg if not math.isnan(fig.pm_deg) else math.inf
    meets = bool(fig.stable) and fig.ms <= lim.ms_max * (1 + MS_TOL) and gm >= lim.gm_min_db - GM_TOL_DB \
        and down >= lim.gm_min_db - GM_TOL_DB and pm >= lim.pm_min_deg - PM_TOL_DEG
    slack = [(lim.ms_max - fig.ms) / lim.ms_max, (gm - lim.gm_min_db) / max(lim.gm_min_db, 1.0),
             (down - lim.gm_min_db) / max(lim.gm_min_db, 1.0), (pm - lim.pm_min_deg) / max(lim.pm_min_deg, 1.0)]
    req_ok = True
    if req.active:
        band = fig.band_s_db
        req_ok = _finite(band) and band <= req.level_db + 0.01 or band == -math.inf
        slack.append((req.level_db - band) / max(float(req.attenuation_db), 1.0) if _finite(band) else
                     (math.inf if band == -math.inf else -math.inf))
    spare = min(slack) if fig.stable else -math.inf
    return meets, bool(req_ok), float(spare)


def _dc_sign(proc: Process) -> float:
    if proc.kind != "tf":
        return float(np.sign(proc.gain or 0.0))
    num = np.trim_zeros(np.asarray(proc.rational.num, float), "b")
    den = np.trim_zeros(np.asarray(proc.rational.den, float), "b")
    if not num.size or not den.size:
        return 0.0
    return float(np.sign(num[-1] * den[-1]))


def action_is_wrong(model: LoopModel) -> bool:
    """True when the controller action and gain sign give positive feedback at low frequency.

    A sign test only: it proves nothing about a process with open-loop poles in the right
    half-plane (there the stabilising action may well give positive feedback at w = 0).
    Action advice is decided by :func:`check_actions`, from the closed loop itself.

    Parameters
    ----------
    model : LoopModel
        The loop: its ``sign`` (controller action), the sign of the process's low-frequency
        gain and the sign of the controller gain (the integral gain when the gain is zero).

    Returns
    -------
    bool
        True for positive feedback; False when it is negative or a sign is zero.
    """
    c = model.controller
    g = c.kp if c.form == "parallel" else c.kc
    if not g:
        g = c.integral_gain
    return model.sign * _dc_sign(model.process) * float(np.sign(g or 0.0)) < 0


@dataclass(frozen=True)
class ActionCheck:
    """Whether a loop's controller action should be reversed, decided from its closed loop.

    Attributes
    ----------
    stable : bool
        Closed loop stable with the present action and tuning (exact engine).
    other_stable : bool
        Closed loop stable with the other action and the present tuning (exact engine).
    rhp_open : int
        Open-loop poles in the right half-plane (integrators excluded). [-]
    positive_feedback : bool
        The low-frequency sign test (:func:`action_is_wrong`) finds positive feedback.
    wrong : bool or None
        True: reverse the action; False: keep it; None: the present tuning cannot tell (an
        open-loop unstable process, unstable with either action): proposals are tried with both.
    reason : str
        Why, in words (empty when the action is kept).
    """

    stable: bool
    other_stable: bool
    rhp_open: int
    positive_feedback: bool
    wrong: bool | None
    reason: str = ""


def decide_action(stable: bool, other_stable: bool, rhp_open: int, positive_feedback: bool
                  ) -> tuple[bool | None, str]:
    """The action advice of one loop from its closed loop with either action.

    Rules: a stable loop keeps its action unless its process is open-loop stable, the sign
    test finds positive feedback and the other action is stable too (then reversing is safe and
    removes the positive feedback); an unstable loop that the other action makes stable is
    reversed; an unstable loop with an open-loop stable process and positive feedback is reversed
    (with integral action no tuning can stabilise it: 1 + L(s) changes sign on the positive real
    axis); otherwise an open-loop unstable process is undecided (None) and a stable one keeps
    its action. Advice never moves a stable loop to an unstable one.

    Parameters
    ----------
    stable : bool
        Closed loop stable with the present action (exact engine).
    other_stable : bool
        Closed loop stable with the other action, same tuning (exact engine).
    rhp_open : int
        Open-loop right-half-plane poles, integrators excluded. [-]
    positive_feedback : bool
        The low-frequency sign test finds positive feedback.

    Returns
    -------
    tuple of (bool or None, str)
        Reverse (True), keep (False) or undecided (None), and the reason in words.

    References
    ----------
    K. J. Astrom and R. M. Murray, Feedback Systems, 2nd ed., 2021, sec. 10.2 (the Nyquist
    criterion: with P open-loop poles in the right half-plane the curve must encircle -1 P times
    counter-clockwise, so the sign of L(0) says nothing about stability).
    """
    if stable:
        if positive_feedback and rhp_open == 0 and other_stable:
            return True, ("positive feedback at low frequency with an open-loop stable process; the loop is "
                          "stable with the other action too (exact evaluation)")
        return False, ""
    if other_stable:
        return True, ("the closed loop is unstable with the present action and stable with the other one at the "
                      "present tuning (exact evaluation)")
    if rhp_open == 0:
        if positive_feedback:
            return True, ("positive feedback at low frequency with an open-loop stable process: no tuning with "
                          "integral action can stabilise it")
        return False, ""
    return None, ""


def check_actions(models: Sequence[LoopModel]) -> list[ActionCheck]:
    """Decide for many loops whether the controller action should be reversed.

    Each loop is evaluated with the exact engine twice, with its present action and with the
    other one (same tuning), all in one call; :func:`decide_action` turns the two closed loops
    into advice.

    Parameters
    ----------
    models : sequence of LoopModel
        The loops with their present controllers.

    Returns
    -------
    list of ActionCheck
        One per model, in order.
    """
    from .frequency import evaluate

    if not models:
        return []
    both = list(models) + [replace(m, sign=-m.sign) for m in models]
    df = evaluate(both, mt=False)      # only stability is read
    n = len(models)
    stable, rhp_open = df["stable"].to_numpy(), df["rhp_open"].to_numpy()   # one column read, not a row each
    out = []
    for i, m in enumerate(models):
        st, ot = bool(stable[i]), bool(stable[n + i])
        rhp = rhp_open[i]
        rhp = int(rhp) if _finite(rhp) else 0
        pos = action_is_wrong(m)
        wrong, reason = decide_action(st, ot, rhp, pos)
        out.append(ActionCheck(st, ot, rhp, pos, wrong, reason))
    return out


def limiting_factor(model: LoopModel, req: Requirement) -> str:
    """What bounds the achievable rejection, in words, with the usual remedies.

    The effective dead time theta_e = theta + Ts/2 + tau_f + (inverse response) bounds the useful
    bandwidth to about 1/theta_e; a right-half-plane zero z bounds it to about z/2.

    Parameters
    ----------
    model : LoopModel
        The loop: process dead time [s], sample period [s], PV filter time constant [s],
        negative lead [s], right-half-plane zeros z (as 1/z [s]) and inner loop are weighed.
    req : Requirement
        Rejection requirement in force; its band edge ``band_rad_s`` [rad/s] is quoted
        when active.

    Returns
    -------
    str
        The largest contribution to the effective dead time, the bandwidth it allows
        [rad/s] and the remedies.

    References
    ----------
    S. Skogestad and I. Postlethwaite, Multivariable Feedback Control, 2nd ed., 2005, sec. 5.5-5.6
    (delay and RHP-zero limitations).
    """
    proc = model.process
    parts = {"dead time": proc.dead_time, "sample period (Ts/2)": 0.5 * model.sample,
             "PV filter": model.pv_filter}
    if proc.lead < 0:
        parts["inverse response (negative lead)"] = -proc.lead
    if proc.kind == "tf" and len(proc.rational.num) > 1:
        z = np.roots(proc.rational.num)
        rhp = z[z.real > 1e-12]
        if rhp.size:
            parts["right-half-plane zero"] = float(np.sum(1.0 / np.abs(rhp)))
    total = sum(parts.values())
    remedies = ["feedforward from a measured disturbance", "a relaxed requirement (less attenuation or a narrower band)"]
    if total <= 0:
        return "the robustness limits with this model's lags; remedies: " + ", ".join(remedies)
    name, value = max(parts.items(), key=lambda kv: kv[1])
    extra = {"dead time": "less dead time (measurement closer to the process, shorter transport)",
             "sample period (Ts/2)": "faster execution of the controller",
             "PV filter": "less PV filtering",
             "inverse response (negative lead)": "another manipulated variable or measurement point",
             "right-half-plane zero": "another manipulated variable or measurement point"}[name]
    remedies.insert(1, extra)
    txt = (f"{name} ({value:.3g} s of an effective {total:.3g} s dead time) bounds the useful bandwidth "
           f"to about 1/theta = {1 / total:.3g} rad/s")
    if req.active:
        txt += f", against a band edge of {float(req.band_rad_s):.3g} rad/s"
    if model.inner is not None:
        txt += "; the inner loop's response adds lag"
    return txt + "; remedies: " + ", ".join(remedies)


# ----------------------------------------------------------------------------------------------
# proposals


@dataclass
class _Job:
    """One loop on its way to a proposal."""

    model: LoopModel                  # action corrected when it was wrong
    row: LoopRow
    limits: Limits
    req: Requirement
    before: Figures
    status: str
    current: Settings | None
    form: str
    settings: list[Settings] = field(default_factory=list)   # rounded, row form
    form_notes: dict[int, str] = field(default_factory=dict)  # settings position -> note on its form
    notes: list[str] = field(default_factory=list)
    corrected_action: str | None = None
    figures: list[Figures] = field(default_factory=list)


def _get(rec: Mapping[str, Any] | None, key: str):
    if rec is None:
        return None
    v = rec.get(key) if hasattr(rec, "get") else None
    return None if v is None or (not isinstance(v, str) and pd.isna(v)) else v


def limits_for(row: LoopRow, figures_row: Mapping[str, Any] | None, policy: Policy) -> Limits:
    """Limits in force: the results row's, else the row's overrides, else the policy's.

    Parameters
    ----------
    row : LoopRow
        The inventory row; its overrides ``ms_max`` [-], ``gm_min_db`` [dB], ``pm_min_deg``
        [deg] apply where the results row has none.
    figures_row : mapping or None
        The row of the results table with the limits in force, or None.
    policy : Policy
        Default limits ``ms_max`` [-], ``gm_min_db`` [dB], ``pm_min_deg`` [deg].

    Returns
    -------
    Limits
    """
    def pick(k):
        v = _get(figures_row, k)
        if v is None:
            v = getattr(row, k, None)
        return float(v if v is not None else getattr(policy, k))
    return Limits(pick("ms_max"), pick("gm_min_db"), pick("pm_min_deg"))


def requirement_for(row: LoopRow, figures_row: Mapping[str, Any] | None) -> Requirement:
    """Rejection requirement in force: the results row's (which may come from a disturbance record), else the row's.

    Parameters
    ----------
    row : LoopRow
        The inventory row; its ``band_rad_s`` [rad/s] and ``attenuation_db`` [dB] apply
        when the results row has no ``band_rad_s`` column.
    figures_row : mapping or None
        The row of the results table with ``band_rad_s`` [rad/s] and ``attenuation_db``
        [dB], or None.

    Returns
    -------
    Requirement
    """
    wd, a = _get(figures_row, "band_rad_s"), _get(figures_row, "attenuation_db")
    if figures_row is None or "band_rad_s" not in figures_row:
        wd, a = row.band_rad_s, row.attenuation_db
    return Requirement(float(wd) if wd is not None else None, float(a) if a is not None else None)


def _in_row_form(s: Settings, form: str, conventions: Mapping[str, str]) -> tuple[Settings, str]:
    t = to_form(s, form)
    note = ""
    if t is None:
        t = to_form(s, "ideal")
        note = (f"{s.method}: no series form exists for these settings (Ti < 4 Td); given in ideal form: "
                "check the controller offers it")
    return rounded(t, conventions), note


def _prepare(model: LoopModel, row: LoopRow, figures_row: Mapping[str, Any] | None, policy: Policy,
             reverse: bool = False, reason: str = "") -> _Job:
    """A job for one loop (the action reversed when ``reverse``), its candidates still to be searched."""
    status = str(_get(figures_row, "status") or "")
    job = _Job(model, row, limits_for(row, figures_row, policy), requirement_for(row, figures_row),
               Figures.of(figures_row) if figures_row is not None else Figures(False, *([math.nan] * 6)),
               status, current_settings(row, model), row.form)
    if reverse:
        job.model = replace(model, sign=-model.sign)
        job.corrected_action = "direct" if model.sign > 0 else "reverse"
        job.notes.append(f"the controller action appears wrong ({reason}): set the action to "
                         f"{job.corrected_action}; that, not the tuning, is the fix. The settings below assume "
                         "the corrected action")
    return job


def _take_candidates(job: _Job, cands: Sequence[Settings], notes: Sequence[str]) -> None:
    """The candidates in the row's form, rounded as typed, duplicates and non-positive gains dropped."""
    job.notes += notes
    seen = set()
    for s in cands:
        r, note = _in_row_form(s, job.form, job.row.conventions)
        key = (r.form, r.kc, r.ti, r.td)
        if key in seen or not r.kc > 0:
            continue
        seen.add(key)
        if note:
            job.form_notes[len(job.settings)] = note
        job.settings.append(r)


def _evaluate_jobs(jobs: Sequence[_Job]) -> None:
    """Evaluate every candidate of every job with the exact engine, in one call (no search for Mt, which
    no candidate is judged by: every figure read is the same number)."""
    from .frequency import evaluate

    models, bands, owner = [], [], []
    for k, job in enumerate(jobs):
        for s in job.settings:
            models.append(job.model.with_controller(s.controller()))
            bands.append(job.req.band_rad_s if job.req.active else np.nan)
            owner.append(k)
    if not models:
        return
    df = evaluate(models, np.asarray(bands, float), mt=False)     # a candidate is judged without Mt
    for k, rec in zip(owner, df.to_dict("records")):
        jobs[k].figures.append(Figures.of(rec))


def _pct(new: float | None, old: float | None) -> float:
    if new is None or old is None or not _finite(old) or not _finite(new) or old == 0:
        return math.nan
    return 100.0 * (new - old) / abs(old)


def _stage_warnings(new: Settings, old: Settings | None) -> list[str]:
    if old is None:
        return []
    out = []
    for label, a, b in (("controller gain", new.kc, old.kc), ("integral gain", new.ki, old.ki),
                        ("derivative time", to_form(new, "ideal").td, to_form(old, "ideal").td if to_form(old, "ideal") else 0.0)):
        if not a and not b:
            continue
        if not b:
            out.append(f"adds {label.split()[0]} action")
            continue
        if not a:
            out.append(f"removes {label.split()[0]} action")
            continue
        f = a / b
        if f > STAGE_FACTOR or f < 1.0 / STAGE_FACTOR:
            word = "rises" if f > 1 else "falls"
            out.append(f"{label} {word} by a factor {max(f, 1 / f):.2g}: move in stages (about half way first) "
                       "and watch the loop")
    return out


def _finish(job: _Job, step_iae: float = math.nan) -> Proposal:
    conv = job.row.conventions
    cands = []
    for s, f in zip(job.settings, job.figures):
        meets, req_ok, spare = judge_candidate(f, job.limits, job.req)
        cands.append(Candidate(s, f, meets, req_ok, spare))
    robust = [c for c in cands if c.meets_limits]
    full = [c for c in robust if c.meets_requirement]
    best_band = min((c.figures.band_s_db for c in robust if _finite(c.figures.band_s_db)), default=math.nan)
    lf = ""
    if full:
        ki_best = max(c.settings.ki for c in full) or 1.0
        pick = max(full, key=lambda c: (min(c.spare, c.settings.ki / ki_best), c.settings.ki, c.settings.method))
        verdict = "retune"
    elif robust:
        pick = min(robust, key=lambda c: (c.figures.band_s_db, -c.spare, c.settings.method))
        verdict = "not achievable by tuning"
        lf = limiting_factor(job.model, job.req)
    else:
        pick = None
        verdict = "not achievable by tuning"
        lf = ("no setting tried meets the robustness limits with this model (e.g. an open-loop unstable or "
              "strongly non-minimum-phase process): check the model; structural change may be needed")
    if job.status == "passes":
        verdict = "no change needed"
    if job.corrected_action:
        verdict = "check model"
    notes = list(job.notes)
    current_terms = row_terms(job.current, conv) if job.current else {}
    if pick is None:
        return Proposal(verdict, None, "", "", {}, current_terms, {}, job.before, None, lf, best_band,
                        "; ".join(notes), tuple(cands), job.corrected_action)
    s = pick.settings
    notes.append(job.form_notes.get(cands.index(pick), ""))
    terms = row_terms(s, conv)
    changes = {c: _pct(v, current_terms.get(c)) for c, v in terms.items()}
    if s.form != job.form:
        notes.append(f"the row uses {job.form} form; the proposal is in {s.form} form")
    notes += _stage_warnings(s, job.current)
    if verdict == "not achievable by tuning" and job.req.active:
        notes.append(f"best effort: the requirement ({job.req.level_db:.3g} dB up to {job.req.band_rad_s:.3g} rad/s) "
                     f"cannot be met within the robustness limits; best reached {best_band:.3g} dB")
    after = replace(pick.figures, iae=step_iae)
    return Proposal(verdict, s, s.method, settings_text(terms, s.form), terms, current_terms, changes, job.before,
                    after, lf, best_band, "; ".join(dict.fromkeys(n for n in notes if n)), tuple(cands),
                    job.corrected_action)


def _iae_of(models: Sequence[LoopModel | None], policy: Policy) -> list[float]:
    """Load-step IAE of each loop (NaN where None, unknown or no time-domain module). [s]

    Only the load step is simulated (:func:`audit.timedomain.load_step_figures`), in this
    process: the proposals stage spreads it over its workers with the search.
    """
    try:
        from .timedomain import load_step_figures
    except ImportError:
        return [math.nan] * len(models)
    if not any(m is not None for m in models):
        return [math.nan] * len(models)
    df = load_step_figures(models, policy)
    return [float(v) if _finite(v) else math.nan for v in df["load_iae_s"].tolist()]


def _step_iae(jobs: Sequence[_Job], picks: Sequence[Settings | None], policy: Policy) -> list[float]:
    """Load-step IAE of each recommended setting (NaN where none or no time-domain module)."""
    return _iae_of([None if p is None else j.model.with_controller(p.controller()) for j, p in zip(jobs, picks)],
                   policy)


def tuned_model(model: LoopModel, p: Proposal) -> LoopModel | None:
    """The loop with a proposal's settings in place (and its corrected action); None without settings.

    Parameters
    ----------
    model : LoopModel
        The loop the proposal was made for (as given to :func:`propose_many`).
    p : Proposal
        Its proposal; a ``corrected_action`` reverses the loop's action.

    Returns
    -------
    LoopModel or None
        The loop the proposal's predicted figures describe.
    """
    if p.settings is None:
        return None
    return _tuned(model, p.settings, p.corrected_action)


def _tuned(model: LoopModel, s: Settings, corrected_action: str | None) -> LoopModel:
    """The loop with settings ``s`` (its action reversed when it was corrected)."""
    m = replace(model, sign=-model.sign) if corrected_action else model
    return m.with_controller(s.controller())


def propose_many(items: Sequence[tuple[LoopModel, LoopRow, Mapping[str, Any] | None]], policy: Policy,
                 with_iae: bool = True, errors: dict[int, BaseException] | None = None) -> list[Proposal | None]:
    """Proposals of many loops: action checks, candidate search, exact evaluation and IAE once for all.

    Parameters
    ----------
    items : sequence of (LoopModel, LoopRow, figures row)
        The figures row is the loop's row of the results table (limits and requirement in force,
        current figures, status); None uses the row and the policy.
    policy : Policy
        Policy in force.
    with_iae : bool
        Add the load-step IAE of the recommended settings (time-domain simulation).
    errors : dict or None
        When given, a loop whose own computation raises gets None in the result and its
        exception here (position in ``items`` -> exception), and the others go on; when None
        the first such exception is raised.

    Returns
    -------
    list of Proposal or None
        One per item, in order (None only for a loop recorded in ``errors``).
    """
    n = len(items)
    failed: dict[int, BaseException] = {}

    def fail(k: int, exc: BaseException) -> None:
        if errors is None:
            raise exc
        failed.setdefault(k, exc)

    checks = check_actions([m for m, _, _ in items])
    tried: list[list[_Job]] = [[] for _ in range(n)]
    for k, ((m, r, f), c) in enumerate(zip(items, checks)):
        try:
            if c.wrong is None:
                # open-loop unstable and unstable either way at the present tuning: tune for both actions
                tried[k] = [_prepare(m, r, f, policy),
                            _prepare(m, r, f, policy, True, "with the present tuning neither action gives a stable "
                                                            "loop; only with this action do settings that meet the "
                                                            "limits exist (exact evaluation)")]
            else:
                tried[k] = [_prepare(m, r, f, policy, bool(c.wrong), c.reason)]
        except Exception as exc:  # noqa: BLE001 - this loop's fault; the others go on
            fail(k, exc)
    flat = [(k, j) for k in range(n) for j in tried[k]]
    found = candidate_settings_many([j.model for _, j in flat], [j.limits for _, j in flat],
                                    [j.req for _, j in flat], [j.row.d_filter for _, j in flat])
    for (k, job), got in zip(flat, found):
        if k in failed:
            continue
        try:
            if got.error is not None:
                raise got.error
            _take_candidates(job, got.settings, got.notes)
        except Exception as exc:  # noqa: BLE001 - this loop's fault; the others go on
            fail(k, exc)
    _evaluate_jobs([j for k, j in flat if k not in failed])
    jobs: list[_Job | None] = [None] * n
    first: list[Proposal | None] = [None] * n
    for k, group in enumerate(tried):
        if k in failed:
            continue
        try:
            done = [(j, _finish(j)) for j in group]
            job, prop = done[0]
            if len(done) == 2 and not _meets_any(done[0][1]) and _meets_any(done[1][1]):
                job, prop = done[1]
            if len(done) == 2 and prop is done[0][1]:
                prop = replace(prop, note="; ".join(n for n in (prop.note, (
                    "with the present tuning neither action gives a stable loop (open-loop unstable process)")) if n))
            jobs[k], first[k] = job, prop
        except Exception as exc:  # noqa: BLE001 - this loop's fault; the others go on
            fail(k, exc)
    if errors is not None:
        errors.update(failed)
    if not with_iae:
        return first
    live = [k for k in range(n) if first[k] is not None]
    iae = _step_iae([jobs[k] for k in live], [first[k].settings for k in live], policy)
    for k, v in zip(live, iae):
        p = first[k]
        if p.after is not None:
            first[k] = replace(p, after=replace(p.after, iae=v))
    return first


def _meets_any(p: Proposal) -> bool:
    return any(c.meets_limits for c in p.candidates)


def propose(model: LoopModel, row: LoopRow, figures_row: Mapping[str, Any] | None, policy: Policy) -> Proposal:
    """The retuning proposal and feasibility verdict of one loop.

    Parameters
    ----------
    model : LoopModel
        The loop as evaluated (its present controller).
    row : LoopRow
        Its inventory row (form, conventions, derivative filter, overrides).
    figures_row : mapping or None
        Its row of the results table (status, limits and requirement in force, present figures).
    policy : Policy
        Policy in force.

    Returns
    -------
    Proposal
        Verdict, recommended settings in the row's own terms and predicted figures.
    """
    return propose_many([(model, row, figures_row)], policy)[0]


PROPOSAL_COLUMNS = (
    "verdict", "proposal_method", "proposal_form", "proposal_settings", "proposal_kc", "proposal_ti_s",
    "proposal_td_s", "proposal_changes", "proposal_ms", "proposal_gm_db", "proposal_pm_deg", "proposal_dm_s",
    "proposal_band_s_db", "proposal_iae_s", "best_band_s_db", "limiting_factor", "proposal_note",
)


def _changes_text(p: Proposal) -> str:
    parts = []
    for c, v in p.changes_pct.items():
        label = _TERM_INFO[c][1]
        old, new = p.current_terms.get(c), p.terms.get(c)
        if _finite(v):
            parts.append(f"{label} {v:+.0f} %")
        elif (old in (None, 0) or not _finite(old)) and new not in (None, 0):
            parts.append(f"{label} added")
        elif new in (None, 0) and old not in (None, 0):
            parts.append(f"{label} removed")
    return ", ".join(parts)


def proposal_record(p: Proposal | None) -> dict[str, Any]:
    """The results columns of one proposal (:data:`PROPOSAL_COLUMNS`).

    Parameters
    ----------
    p : Proposal or None
        The outcome for one loop; None for a loop with no proposal (blank text, NaN figures).

    Returns
    -------
    dict
        Column -> value; settings in project units (``proposal_kc`` [-], ``proposal_ti_s``
        [s], ``proposal_td_s`` [s]) and predicted figures (``proposal_ms`` [-],
        ``proposal_gm_db`` [dB], ``proposal_pm_deg`` [deg], ``proposal_dm_s`` [s],
        ``proposal_band_s_db`` [dB], ``proposal_iae_s`` [s]).
    """
    rec: dict[str, Any] = {c: math.nan for c in PROPOSAL_COLUMNS}
    for c in ("verdict", "proposal_method", "proposal_form", "proposal_settings", "proposal_changes",
              "limiting_factor", "proposal_note"):
        rec[c] = ""
    if p is None:
        return rec
    rec.update(verdict=p.verdict, limiting_factor=p.limiting_factor, proposal_note=p.note,
               best_band_s_db=p.best_band_s_db)
    if p.settings is not None:
        s = p.settings
        ideal_like = s if s.form != "parallel" else replace(s, form="ideal")
        rec.update(proposal_method=p.method, proposal_form=s.form, proposal_settings=p.text,
                   proposal_kc=ideal_like.kc, proposal_ti_s=ideal_like.ti if ideal_like.ti else math.nan,
                   proposal_td_s=ideal_like.td, proposal_changes=_changes_text(p))
    if p.after is not None:
        a = p.after
        rec.update(proposal_ms=a.ms, proposal_gm_db=a.gm_db, proposal_pm_deg=a.pm_deg, proposal_dm_s=a.dm_s,
                   proposal_band_s_db=a.band_s_db, proposal_iae_s=a.iae)
    return rec


#: Fewest loops a worker process is started for in the proposals stage (each costs ~5 ms of search). [-]
MIN_LOOPS_PER_PROPOSAL_JOB = 25
#: Recommendations' load steps are simulated in blocks of this many loops of the stage (by position),
#: whatever ``--jobs``: a batch's make-up moves the last bits of its loops' figures (matrices padded to
#: the batch's largest loop), so fixed blocks keep the IAE the same to the last bit for any job count.
IAE_BLOCK = 512


def _iae_safe(models: list[LoopModel | None], policy: Policy, errors: dict[int, BaseException],
              at: Sequence[int]) -> list[float]:
    """:func:`_iae_of` of many loops; after a fault, halves until the loop at fault is found (NaN, its
    exception in ``errors`` under its position ``at[k]``)."""
    try:
        return _iae_of(models, policy)
    except Exception as exc:  # noqa: BLE001 - one loop's fault must not cost the others
        if len(models) == 1:
            errors[int(at[0])] = exc
            return [math.nan]
    h = len(models) // 2
    return _iae_safe(models[:h], policy, errors, at[:h]) + _iae_safe(models[h:], policy, errors, at[h:])


def _with_iae(items, got: list[Proposal | None], policy: Policy, at: Sequence[int]) -> dict[int, BaseException]:
    """Put the load-step IAE of every recommendation of ``got`` (proposals of ``items``) in place, one
    simulation per block of :data:`IAE_BLOCK` positions ``at`` (the stage's own, whatever the part);
    the faults of single loops by position ``at[k]``."""
    live = [k for k, p in enumerate(got) if p is not None and p.settings is not None and p.after is not None]
    errors: dict[int, BaseException] = {}
    blocks: dict[int, list[int]] = {}
    for k in live:                                   # fixed blocks of the stage's positions
        blocks.setdefault(int(at[k]) // IAE_BLOCK, []).append(k)
    for ks in blocks.values():
        iae = _iae_safe([tuned_model(items[k][0], got[k]) for k in ks], policy, errors, [at[k] for k in ks])
        for k, v in zip(ks, iae):
            got[k] = replace(got[k], after=replace(got[k].after, iae=v))
    return errors


def _search_part(items, policy: Policy, idx: Sequence[int]):
    """The proposals of ``items[idx]`` without their load-step IAE, and their loops' faults (by position)."""
    errors: dict[int, BaseException] = {}
    got = propose_many([items[k] for k in idx], policy, with_iae=False, errors=errors)
    return got, {int(idx[k]): e for k, e in errors.items()}


def _iae_part(items, policy: Policy, at: Sequence[int], picks: Sequence[tuple[Settings, str | None]]):
    """The load-step IAE of one block: the loops ``items[at]`` with their recommended settings and
    corrected actions ``picks`` (as :func:`tuned_model`), in one simulation; the faults of single loops."""
    models = [_tuned(items[k][0], s, corrected) for k, (s, corrected) in zip(at, picks)]
    errors: dict[int, BaseException] = {}
    return _iae_safe(models, policy, errors, list(at)), errors


#: CPU of a recommendation's load-step IAE relative to its loop's search (about 0.9 ms against 5.5 ms
#: a loop): used only to share the stage's work out evenly over the processes. [-]
IAE_SHARE = 0.17


#: This process's share of the stage's work, against a worker's 1 (it also forks the workers, takes their
#: results in and writes the proposals' columns, but a worker pickles its results and copies the pages it
#: touches: at 2,000 loops, with 0.9 here, the worker used about 0.4 s of CPU more than this process). [-]
HOME_SHARE = 1.0


def _shares(n: int, jobs: int, with_iae: bool) -> tuple[np.ndarray, list[list[int]]]:
    """How :func:`_propose_spread` shares ``n`` loops over ``jobs`` processes (this process is number 0):
    the cuts of the search into consecutive parts, and the IAE blocks (:data:`IAE_BLOCK` positions each)
    of each process. The blocks go to the least loaded process, largest first (ties to the last
    process: this one has the stage's own bookkeeping besides); the search is cut so that each process
    gets about the same work (:data:`IAE_SHARE`), this one :data:`HOME_SHARE` of it. Only the balance
    depends on it, never a figure."""
    sizes = [min(IAE_BLOCK, n - a) for a in range(0, n, IAE_BLOCK)] if with_iae else []
    load = [0.0] * jobs
    mine: list[list[int]] = [[] for _ in range(jobs)]
    for b in sorted(range(len(sizes)), key=lambda b: (-sizes[b], b)):
        p = min(range(jobs), key=lambda q: (load[q], -q))
        mine[p].append(b)
        load[p] += IAE_SHARE * sizes[b]
    weight = np.array([HOME_SHARE] + [1.0] * (jobs - 1))
    search = np.maximum(0.0, (n + sum(load)) * weight / weight.sum() - np.asarray(load))
    search *= n / search.sum() if search.sum() > 0 else 0.0
    cuts = np.round(np.cumsum(search)[:-1]).astype(int)
    return np.clip(cuts, 0, n), mine


def _propose_spread(items, policy: Policy, jobs: int, errors: dict[int, BaseException],
                    with_iae: bool = False, iae_errors: dict[int, BaseException] | None = None
                    ) -> list[Proposal | None]:
    """:func:`propose_many` (IAE when ``with_iae``), the loops shared over ``jobs`` processes when they
    are enough (:data:`MIN_LOOPS_PER_PROPOSAL_JOB` each).

    Two rounds in one set of forked workers: the search, cut into consecutive parts anywhere (a loop's
    proposal is its own), then the load-step IAE, one simulation per block of :data:`IAE_BLOCK` of
    the stage's positions (a batch's make-up moves the last bits, so the blocks are fixed whatever
    ``jobs``), each block in one process (:func:`_shares`). This process does its share of each round.
    """
    from .parallel import pool_available, shared_pool
    n = len(items)
    jobs = min(max(1, int(jobs)), n // MIN_LOOPS_PER_PROPOSAL_JOB) if pool_available() else 1
    iae_errors = {} if iae_errors is None else iae_errors
    if jobs <= 1:
        got, errs = _search_part(items, policy, np.arange(n))
        errors.update(errs)
        if with_iae:
            iae_errors.update(_with_iae(items, got, policy, range(n)))
        return got
    cuts, mine = _shares(n, jobs, with_iae)
    parts = np.split(np.arange(n), cuts)
    with shared_pool(jobs - 1, (items, policy)) as submit:
        futures = [submit(_search_part, p) for p in parts[1:]]
        got, errs = _search_part(items, policy, parts[0])
        for f in futures:
            g, e = f.result()
            got += g
            errs.update(e)
        errors.update(errs)
        if not with_iae:
            return got
        blocks: dict[int, list[int]] = {}
        for k, p in enumerate(got):
            if p is not None and p.settings is not None and p.after is not None:
                blocks.setdefault(k // IAE_BLOCK, []).append(k)

        def task(b):
            return blocks[b], [(got[k].settings, got[k].corrected_action) for k in blocks[b]]

        theirs = [b for q in range(1, jobs) for b in mine[q] if b in blocks]
        ours = [b for b in mine[0] if b in blocks]
        futures = [submit(_iae_part, *task(b)) for b in theirs]
        done = [_iae_part(items, policy, *task(b)) for b in ours] + [f.result() for f in futures]
    for b, (iae, errs) in zip(ours + theirs, done):
        for k, v in zip(blocks[b], iae):
            got[k] = replace(got[k], after=replace(got[k].after, iae=v))
        iae_errors.update(errs)
    return got


def _propose_contained(audit, items, batch: list[int], policy: Policy, jobs: int = 1) -> list[Proposal | None]:
    """Proposals with the load-step IAE of their recommendations, a loop's own fault marked on its row;
    after a fault of the batch as a whole, loop by loop (None for a loop that raises)."""
    iae_errors: dict[int, BaseException] = {}
    try:
        errors: dict[int, BaseException] = {}
        got = _propose_spread(items, policy, jobs, errors, True, iae_errors)
    except Exception:  # noqa: BLE001 - one loop's fault must not cost the others
        got, errors, iae_errors = [], {}, {}
        for k, item in enumerate(items):
            try:
                got.append(propose_many([item], policy, with_iae=False)[0])
            except Exception as exc:  # noqa: BLE001 - marked on its row
                errors[k] = exc
                got.append(None)
        iae_errors = _with_iae(items, got, policy, range(len(items)))
    for k, exc in sorted({**iae_errors, **errors}.items()):
        _mark(audit, batch[k], exc)
    return got


def _mark(audit, i: int, exc: BaseException) -> None:
    """Record a fault of row ``i`` in the proposals stage (with the exception's own traceback)."""
    from .faults import row_fault
    try:
        raise exc
    except Exception as e:  # noqa: BLE001 - row_fault takes the traceback from here
        row_fault(audit, "proposals", i, e)


def add_proposals(audit) -> None:
    """Pipeline stage: a proposal and a verdict for every row.

    Proposals are made for rows whose status is not ``passes`` (``--propose failing``), for
    every evaluated row (``all``) or for none (``none``). Adds :data:`PROPOSAL_COLUMNS` to
    ``audit.results`` and stores the :class:`Proposal` objects in
    ``audit.extras['proposals'][row.index]``.

    Parameters
    ----------
    audit : Audit
        The run, after the frequency (and cascade) stages; ``options.propose`` selects the
        rows, the inventory's policy gives the limits; ``results`` and ``extras`` change in place.
    """
    from .frequency import _no_gc_pauses
    with _no_gc_pauses():     # tens of thousands of small objects per batch: no full passes of the collector
        _add_proposals(audit)


def _add_proposals(audit) -> None:
    res = audit.results
    rows = audit.inventory.rows
    policy = audit.inventory.policy
    mode = getattr(audit.options, "propose", "failing")
    out: dict[int, Proposal] = {}
    todo: list[int] = []
    unjudged = audit.extras.get("records_unjudged_status", {})
    status_of = dict(zip(res.index, res["status"].tolist())) if "status" in res.columns else {}
    for i, row in enumerate(rows):
        model = audit.models[i]
        status = str(status_of[i]) if "status" in res.columns else ""
        if i in unjudged and unjudged[i] in ("passes", "marginal"):
            status = unjudged[i]   # fails only because its record could not be used: the fix is the record
        if model is None or status == "invalid":
            out[i] = Proposal("not evaluated", note="the row could not be evaluated: fix the inventory row first")
        elif mode == "none":
            out[i] = Proposal("no change needed" if status == "passes" else "",
                              note="" if status == "passes" else "proposals not requested (--propose none)")
        elif status == "passes" and mode != "all" and i not in audit.extras.get("retune_for_oscillation", ()):
            out[i] = Proposal("no change needed")
        else:
            todo.append(i)
    if todo:
        # cascades: innermost loops first; each outer loop is proposed against the proposed
        # tuning of its inner loop (the inner loop keeps its present tuning when it needs none)
        from .cascade import CascadeLinks, compose, tuning_levels
        links = audit.extras.get("cascade")
        inner_of = getattr(links, "inner_of", {}) or {}
        composed = getattr(links, "composed", frozenset()) or frozenset()
        todo_set = set(todo)
        proposed_models: dict[int, object] = {}
        jobs = max(1, int(getattr(audit.options, "jobs", 1) or 1))
        # the results rows as plain dicts (a pandas row per loop costs more than its proposal's bookkeeping)
        figures_rows = dict(zip(todo, res.iloc[todo].to_dict("records")))
        for level in tuning_levels(rows, links if isinstance(links, CascadeLinks) else None):
            batch = [i for i in level if i in todo_set]
            if not batch:
                continue
            items = []
            for i in batch:
                m = audit.models[i]
                j = inner_of.get(i)
                if j is not None and i in composed and j in proposed_models:
                    m = compose(m, proposed_models[j])
                items.append((m, rows[i], figures_rows[i]))
            for (m, _, _), i, p in zip(items, batch, _propose_contained(audit, items, batch, policy, jobs)):
                if p is None:   # an internal fault of this loop: no proposal, said on its row
                    out[i] = Proposal("", note="no proposal: internal fault (see findings)")
                    continue
                out[i] = p
                if p.settings is not None:
                    proposed_models[i] = m.with_controller(p.settings.controller())
    recs = [proposal_record(out.get(i)) for i in range(len(rows))]
    for c in PROPOSAL_COLUMNS:
        vals = [r[c] for r in recs]
        res[c] = pd.Series(vals, index=res.index, dtype=object if isinstance(recs[0][c], str) else float) \
            if recs else pd.Series([], dtype=float)
    audit.extras["proposals"] = {rows[i].index: out[i] for i in range(len(rows))}
