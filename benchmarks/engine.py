"""Engine benchmark: audit.frequency.evaluate against a per-loop python-control reference.

Usage::

    python benchmarks/engine.py [--loops 2000] [--seed 1] [--jobs 2]

Loops: a seeded synthetic inventory (audit.generate, without cascades and without entry
mistakes) read through audit.inventory: fopdt, sopdt, ipdt and tf models (one with an
open-loop unstable pole), ideal, series and parallel controllers, dead time from none
to dominant, PV filters, sample periods, detuned and over-tight settings, so some loops
are closed-loop unstable.

(a) The project's batch engine: one call of ``audit.frequency.evaluate`` on all loops
    (exact dead time, stability by the Nyquist argument, refined margins and peaks, band
    checks); also ``audit.parallel.evaluate_parallel`` with --jobs processes.
(b) A per-loop reference on python-control: the delay replaced by ``control.pade(theta, 6)``,
    closed-loop poles of ``feedback(L, 1)`` for stability, ``control.stability_margins``
    (all crossings), and |S| on 2,000 log-spaced frequencies from ``control.frequency_response``
    of ``feedback(1, L)``, its maximum refined by ``scipy.optimize.minimize_scalar`` between the
    neighbouring grid points. (``stability_margins``' own stability margin is printed too; it
    only sees the local minima of |1 + L| its polynomial method finds and misses the peak of
    some high-order Pade models.)

Printed: loops per second of each (wall and CPU time), their ratio (also against the reference's
first part alone: Pade model, ``stability_margins`` and the |S| grid, without the closed-loop
poles and the refinement), and the largest
relative differences in GM, PM and Ms over the loops where a 6th-order Pade model of the
dead time is accurate. Accuracy criterion (stated here and in the output): at every
frequency the compared figure depends on (the engine's phase crossover w180 for GM, gain
crossover wc for PM, peak frequency w_ms for Ms) w*theta <= 3 and the phase error of the
Pade model, |arg pade(jw) + w theta|, is below 0.1 % of w theta. Only closed-loop stable
loops (both methods agreeing) are compared: margins of an unstable loop are not figures
anyone acts on. This is a validation of the engine against an independent library
(python-control 0.10) plus a speed measurement, not a timed test.
"""

from __future__ import annotations

import argparse
import platform
import sys
import tempfile
import time
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import control  # noqa: E402
from scipy.optimize import minimize_scalar  # noqa: E402

import baseline  # noqa: E402  (benchmarks/baseline.py, beside this script)
from audit.frequency import evaluate  # noqa: E402
from audit.generate import synthetic_rows, GENERATED_COLUMNS  # noqa: E402
from audit.loop import LoopModel  # noqa: E402
from audit.parallel import evaluate_parallel  # noqa: E402

#: Pade order used by the reference. [-]
PADE_ORDER = 6
#: Frequencies of the reference's |S| grid. [-]
REF_POINTS = 2000
#: Largest w*theta at which a compared figure counts as Pade-accurate. [rad]
MAX_PHASE = 3.0
#: Largest relative phase error of the Pade model at that frequency. [-]
MAX_PADE_REL = 1e-3


@dataclass
class Reference:
    """python-control's figures of one loop (delay by Pade)."""

    stable: bool
    gm: float          # smallest gain margin above 1 [-]
    pm: float          # phase margin at the crossover with the smallest |PM| [deg]
    ms_grid: float     # max |S| on the 2,000-point grid [-]
    ms_refined: float  # that maximum refined by a bounded scalar search [-]
    ms_margins: float  # 1 / min |1 + L| from stability_margins (its local minima only) [-]


def synthetic_models(loops: int, seed: int) -> tuple[list[LoopModel], np.ndarray]:
    """Single loops (no cascades, no invalid rows) of a synthetic inventory, through the reader."""
    import csv

    from audit.inventory import read_inventory
    from audit.pipeline import AuditOptions, build_models, new_audit

    rows = synthetic_rows(loops, seed, cascades=False, invalid_fraction=0.0)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "engine.csv"
        with path.open("w", newline="") as fh:
            w = csv.writer(fh)
            w.writerow(GENERATED_COLUMNS)
            for r in rows:
                w.writerow(["" if r.get(c) is None else r.get(c) for c in GENERATED_COLUMNS])
        audit = new_audit(read_inventory(path), AuditOptions())
    build_models(audit)
    keep = [i for i, m in enumerate(audit.models) if m is not None]
    return [audit.models[i] for i in keep], audit.results["band_rad_s"].to_numpy(float)[keep]


def _pade_tf(theta: float):
    if theta <= 0:
        return control.tf([1.0], [1.0])
    n, d = control.pade(theta, PADE_ORDER)
    return control.tf(n, d)


#: Seconds spent by the reference, by part: the three the issue names (Pade model and loop
#: transfer, stability_margins, |S| on the grid) and the two added here (closed-loop poles for
#: stability, the refined Ms maximum).
CLOCK = {"core": 0.0, "poles": 0.0, "refine": 0.0}


def reference(m: LoopModel) -> Reference:
    """One loop through python-control (delay by a 6th-order Pade model)."""
    t0 = time.perf_counter()
    r = m.rational
    L = control.tf(list(r.num), list(r.den)) * _pade_tf(m.delay)
    t1 = time.perf_counter()
    cl = control.feedback(L, 1)
    stable = bool(np.all(np.real(control.poles(cl)) < 0))
    t2 = time.perf_counter()
    gm_all, pm_all, sm_all, _, _, _ = control.stability_margins(L, returnall=True)
    gm_all = np.asarray(gm_all, float)
    up = gm_all[gm_all > 1.0]
    gm = float(up.min()) if up.size else np.inf
    pm_all = np.asarray(pm_all, float)
    pm = float(pm_all[np.argmin(np.abs(pm_all))]) if pm_all.size else np.inf
    sm = float(np.min(sm_all)) if np.size(sm_all) else np.inf
    mags = np.abs(np.concatenate([np.roots(r.num) if len(r.num) > 1 else [],
                                  np.roots(r.den) if len(r.den) > 1 else []]))
    mags = mags[mags > 0]
    if m.delay > 0:
        mags = np.append(mags, 1.0 / m.delay)
    lo, hi = (mags.min(), mags.max()) if mags.size else (1.0, 1.0)
    w = np.logspace(np.log10(lo) - 3, np.log10(hi) + 2, REF_POINTS)
    S = control.feedback(1, L)
    mag = np.asarray(control.frequency_response(S, w).magnitude).ravel()
    k = int(np.argmax(mag))
    ms_grid = float(mag[k])
    t3 = time.perf_counter()
    # the grid maximum refined by a bounded scalar search on the same Pade model (scipy)
    lo_x, hi_x = np.log(w[max(k - 1, 0)]), np.log(w[min(k + 1, w.size - 1)])
    opt = minimize_scalar(lambda x: -abs(S(1j * np.exp(x))), bounds=(lo_x, hi_x), method="bounded",
                          options={"xatol": 1e-12})
    ms_ref = max(ms_grid, float(-opt.fun))
    t4 = time.perf_counter()
    CLOCK["core"] += (t1 - t0) + (t3 - t2)
    CLOCK["poles"] += t2 - t1
    CLOCK["refine"] += t4 - t3
    return Reference(stable, gm, pm, ms_grid, ms_ref, 1.0 / sm if sm > 0 else np.inf)


def pade_ok(theta: float, w: float) -> bool:
    """The accuracy criterion at one frequency (see the module docstring)."""
    if not np.isfinite(w) or w < 0:
        return False
    x = w * theta
    if x == 0:
        return True
    if x > MAX_PHASE:
        return False
    n, d = control.pade(theta, PADE_ORDER)
    ph = np.angle(np.polyval(n, 1j * w) / np.polyval(d, 1j * w))
    err = abs(np.angle(np.exp(1j * (ph + x))))
    return err <= MAX_PADE_REL * x


def _rel(a: float, b: float) -> float:
    if a == b:
        return 0.0
    return abs(a - b) / max(abs(a), abs(b))


def machine() -> str:
    """nproc, CPU model and memory of this machine."""
    import os

    cpu = "?"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
        mem = next(line for line in Path("/proc/meminfo").read_text().splitlines() if line.startswith("MemTotal"))
        mem_gib = int(mem.split()[1]) / 2 ** 20
    except (OSError, StopIteration):
        mem_gib = float("nan")
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    return (f"{os.cpu_count()} CPUs ({cpu}), {mem_gib:.1f} GiB, Python {platform.python_version()}, "
            f"numpy {np.__version__}, control {control.__version__}, load average {load:.1f} at start")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="Batch engine against a per-loop python-control reference.")
    ap.add_argument("--loops", type=int, default=2000)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--jobs", type=int, default=2, help="processes for the parallel engine figure")
    ap.add_argument("--no-reference", action="store_true", help="time the engine only (large --loops)")
    baseline.add_arguments(ap)
    args = ap.parse_args(argv)
    warnings.simplefilter("ignore", RuntimeWarning)
    print(f"machine: {machine()}")
    models, band = synthetic_models(args.loops, args.seed)
    n = len(models)
    kinds = {k: sum(m.process.kind == k for m in models) for k in ("fopdt", "sopdt", "ipdt", "tf")}
    forms = {f: sum(m.controller.form == f for m in models) for f in ("ideal", "series", "parallel")}
    ratio = np.array([m.delay / max(m.process.tau1, m.process.tau2, 1e-9) if m.process.kind != "tf" else np.nan
                      for m in models])
    print(f"loops: {n} ({', '.join(f'{k} {v}' for k, v in kinds.items())}; "
          f"{', '.join(f'{k} {v}' for k, v in forms.items())}; no dead time {sum(m.delay == 0 for m in models)}, "
          f"dead time > largest time constant {int(np.nansum(ratio > 1))})")

    t0, c0 = time.perf_counter(), time.process_time()
    figs = evaluate(models, band)
    t_eng, c_eng = time.perf_counter() - t0, time.process_time() - c0
    t0 = time.perf_counter()
    figs_par = evaluate_parallel(models, band, args.jobs)
    t_par = time.perf_counter() - t0
    num = [c for c in figs.columns if c not in ("stable", "engine_note", "lower_bounds", "rhp_closed", "rhp_open")]
    a_, b_ = figs[num].to_numpy(float), figs_par[num].to_numpy(float)
    ok = np.isfinite(a_) & np.isfinite(b_) & (a_ != 0)
    rel = float(np.max(np.abs(a_[ok] - b_[ok]) / np.abs(a_[ok]), initial=0.0))
    same_flags = figs["stable"].equals(figs_par["stable"]) and np.array_equal(np.isfinite(a_), np.isfinite(b_))
    same_par = f"{'same' if same_flags else 'DIFFERENT'} stability, max rel diff {rel:.1e}"
    from audit import parallel
    if args.jobs > 1 and n < 2 * parallel.MIN_LOOPS_PER_EVALUATE_JOB:
        same_par += (f"; fewer than {2 * parallel.MIN_LOOPS_PER_EVALUATE_JOB} loops: no worker was started, "
                     "this is a second call in this process")

    case = f"loops={n} seed={args.seed} jobs={args.jobs}"
    saved = {"engine 1 process s": t_eng, "engine 1 process CPU s": c_eng, f"engine {args.jobs} processes s": t_par}
    if args.no_reference:
        print(f"(a) engine, 1 process : {n / t_eng:9.0f} loops/s  ({t_eng:.3f} s wall, {c_eng:.3f} s CPU)")
        print(f"    engine, {args.jobs} processes: {n / t_par:9.0f} loops/s  ({t_par:.3f} s wall; against 1 process: {same_par})")
        baseline.report("engine", {case: saved}, args)
        return 0
    refs = []
    t0, c0 = time.perf_counter(), time.process_time()
    for m in models:
        refs.append(reference(m))
    t_ref, c_ref = time.perf_counter() - t0, time.process_time() - c0

    print(f"(a) engine, 1 process : {n / t_eng:9.0f} loops/s  ({t_eng:.3f} s wall, {c_eng:.3f} s CPU)")
    print(f"    engine, {args.jobs} processes: {n / t_par:9.0f} loops/s  ({t_par:.3f} s wall; against 1 process: {same_par})")
    print(f"(b) python-control    : {n / t_ref:9.0f} loops/s  ({t_ref:.2f} s wall, {c_ref:.2f} s CPU)")
    print(f"speed ratio engine/reference: {t_ref / t_eng:.1f} x wall, {c_ref / c_eng:.1f} x CPU "
          f"(with {args.jobs} processes: {t_ref / t_par:.1f} x wall)")
    core = CLOCK["core"]
    print(f"    of the reference: Pade + stability_margins + |S| grid {core:.2f} s, closed-loop poles "
          f"{CLOCK['poles']:.2f} s, Ms refinement {CLOCK['refine']:.2f} s; against the first part alone "
          f"(no stability verdict, grid Ms): {core / t_eng:.1f} x wall in one process, {core / t_par:.1f} x with {args.jobs}")

    eng_stable = figs["stable"].astype(bool).to_numpy()
    ref_stable = np.array([r.stable for r in refs])
    print(f"closed-loop unstable: engine {int((~eng_stable).sum())}, reference {int((~ref_stable).sum())}; "
          f"disagreements {int((eng_stable != ref_stable).sum())}")
    disagree = np.flatnonzero(eng_stable != ref_stable)
    for i in disagree[:5]:
        m = models[i]
        print(f"  {m.tag}: engine stable={eng_stable[i]}, Pade stable={ref_stable[i]}, "
              f"theta={m.delay:g} s, wc*theta={figs['wc_rad_s'].iat[i] * m.delay:.2f}")

    print(f"Pade accuracy criterion: w*theta <= {MAX_PHASE:g} and Pade phase error <= {MAX_PADE_REL:.1%} of w*theta "
          f"at the figure's frequency; both methods stable")
    for name, col, wcol, get in (("GM", "gm", "w180_rad_s", lambda r: r.gm),
                                 ("PM", "pm_deg", "wc_rad_s", lambda r: r.pm),
                                 ("Ms (grid, refined)", "ms", "w_ms_rad_s", lambda r: r.ms_refined),
                                 ("Ms (2,000-point grid)", "ms", "w_ms_rad_s", lambda r: r.ms_grid),
                                 ("Ms (stability_margins)", "ms", "w_ms_rad_s", lambda r: r.ms_margins)):
        rel, used = [], 0
        for i, m in enumerate(models):
            if not (eng_stable[i] and ref_stable[i]):
                continue
            a, b = float(figs[col].iat[i]), get(refs[i])
            if not (np.isfinite(a) and np.isfinite(b)):
                continue
            if not pade_ok(m.delay, float(figs[wcol].iat[i])):
                continue
            used += 1
            rel.append(_rel(a, b))
        rel = np.array(rel)
        if rel.size:
            print(f"  {name:<22} loops compared {used:5d}: max rel diff {rel.max():.2e}, "
                  f"99th percentile {np.percentile(rel, 99):.2e}, median {np.median(rel):.2e}")
        else:
            print(f"  {name:<22} no loop met the criterion")
    saved.update({"reference CPU s": c_ref, "reference CPU / engine CPU": c_ref / c_eng,
                  "stability disagreements": int((eng_stable != ref_stable).sum())})
    baseline.report("engine", {case: saved}, args, higher=("reference CPU / engine CPU",))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
