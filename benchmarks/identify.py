"""Benchmark of model identification from records (prints figures; not a test).

Seeded bump-test records of invented loops (fopdt, sopdt, ipdt in the proportions 3:1:1,
gains 0.3-3, time constants 5-200 samples, dead times 0-60 samples, white noise 1-3 % of
the pv's step), simulated with scipy.signal (fine grid, delay line: independent of the code
under test) before the clock starts, then identified with
:func:`audit.plantdata.identify.identify_many` (all three structures, held-out fit, residual
checks) over ``--jobs`` processes.

Usage::

    python benchmarks/identify.py [--records 2000] [--samples 10000] [--jobs 2] [--stages 100]
                                  [--tree DIR]

``--tree DIR`` imports ``audit`` from another checkout (for a before/after comparison, e.g.
``git worktree add /tmp/before main``); a tree without ``identify_many`` is run the way it was
then, one record per call of ``identify_arrays`` over a pool of ``--jobs`` processes.

Prints wall time, CPU time (user + sys of this process and its workers), the load average,
records per second, CPU per record, the split of one process's time over the stages (on the
first ``--stages`` records), how often the chosen structure is the true one and the median
relative error of the gain and the dead time.
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import os
import sys
import time
import warnings
from pathlib import Path

import numpy as np

import baseline  # benchmarks/baseline.py, beside this script

HERE = Path(__file__).resolve().parents[1]


def make_case(k: int, n: int) -> tuple[str, dict, np.ndarray, np.ndarray]:
    """One seeded record: (true structure, true parameters, op, pv)."""
    from tests.reference.plant_sim import open_loop

    rng = np.random.default_rng(1000 + k)
    model = ("fopdt", "fopdt", "fopdt", "sopdt", "ipdt")[k % 5]
    tau = float(rng.uniform(5, 200))
    theta = round(float(rng.uniform(0, 60)) * 20) / 20          # on the simulator's fine grid (dt/20)
    if model == "fopdt":
        p = {"gain": float(rng.uniform(0.3, 3)), "tau1": tau, "dead_time": theta}
    elif model == "sopdt":
        p = {"gain": float(rng.uniform(0.3, 3)), "tau1": tau, "tau2": tau * float(rng.uniform(0.2, 0.6)),
             "tau_lead": 0.0, "dead_time": theta}
    else:
        p = {"gain": float(rng.uniform(0.001, 0.01)), "dead_time": theta}
    op = np.full(n, 50.0)
    for j, at in enumerate(sorted(rng.choice(np.arange(n // 10, 9 * n // 10), 4, replace=False))):
        op[at:] = 50.0 + (5.0 if j % 2 == 0 else -3.0) * (1 if model != "ipdt" else (1 if j < 2 else -1))
    y = open_loop(model, p, op, 1.0)
    noise = float(rng.uniform(0.01, 0.03)) * max(float(np.ptp(y)), 1e-6)
    return model, p, op, 50 + y + noise * rng.standard_normal(n)


def _make(args):
    warnings.simplefilter("ignore")          # the simulator's scipy warns on a leading zero numerator
    return make_case(*args)


def summary(r) -> tuple[str, dict | None]:
    """What the benchmark keeps of an identification (computed in the worker)."""
    return (r.best.model, dict(r.best.params)) if r.best is not None else ("", None)


_CASES: list = []


def _old_one(k: int):
    from audit.plantdata.identify import identify_arrays
    _, _, op, pv = _CASES[k]
    return summary(identify_arrays(op, pv, 1.0))


def identify_all(cases, jobs: int):
    """Identify every case; the tree's batched entry when it has one, else one record per call."""
    import audit.plantdata.identify as ident

    if hasattr(ident, "identify_many"):
        return ident.identify_many([ident.Arrays(op, pv, 1.0) for _, _, op, pv in cases], jobs=jobs,
                                   summarise=summary)
    global _CASES
    _CASES = cases
    if jobs > 1:
        with mp.get_context("fork").Pool(jobs) as pool:
            return pool.map(_old_one, range(len(cases)), chunksize=4)
    return [_old_one(k) for k in range(len(cases))]


def stage_split(cases) -> dict[str, float]:
    """CPU seconds per stage of the batched path, in this process (wrapping its stage functions)."""
    import audit.plantdata.identify as ident

    if not hasattr(ident, "identify_many"):
        return {}
    spent: dict[str, float] = {}
    saved = {}

    def timed(name, fn, key):
        def inner(*a, **kw):
            t = time.process_time()
            try:
                return fn(*a, **kw)
            finally:
                k = key(*a) if callable(key) else key
                spent[k] = spent.get(k, 0.0) + time.process_time() - t
        saved[name] = fn
        setattr(ident, name, inner)

    timed("_prepare", ident._prepare, "checks and start (Hampel, excitation, ARX step response)")
    timed("_solve_many", ident._solve_many, lambda m, *a: f"least squares: {m}")
    timed("_fit_of", ident._fit_of, "intervals, residual checks (per fit)")
    timed("_holdout_many", ident._holdout_many, "held-out refit")
    t0 = time.process_time()
    try:
        ident.identify_many([ident.Arrays(op, pv, 1.0) for _, _, op, pv in cases], summarise=summary)
    finally:
        for name, fn in saved.items():
            setattr(ident, name, fn)
    spent["total"] = time.process_time() - t0
    return spent


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--records", type=int, default=2000)
    ap.add_argument("--samples", type=int, default=10000)
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--stages", type=int, default=100, help="records for the stage split (0: none)")
    ap.add_argument("--tree", default=str(HERE), help="checkout whose audit package is measured")
    baseline.add_arguments(ap)
    a = ap.parse_args()
    sys.path.insert(0, str(HERE))
    sys.path.insert(0, str(Path(a.tree).resolve()))
    warnings.simplefilter("ignore")
    import audit

    s0 = time.perf_counter()
    with mp.get_context("fork").Pool(a.jobs) as pool:
        cases = pool.map(_make, [(k, a.samples) for k in range(a.records)], chunksize=16)
    sim = time.perf_counter() - s0
    identify_all(cases[:1], 1)               # warm-up: first-call imports (scipy.ndimage, ...) not timed
    before = os.times()
    t0 = time.perf_counter()
    out = identify_all(cases, a.jobs)
    wall = time.perf_counter() - t0
    after = os.times()
    cpu = (after.user - before.user) + (after.system - before.system) + \
        (after.children_user - before.children_user) + (after.children_system - before.children_system)
    load = os.getloadavg()
    same = np.mean([c[0] == o[0] for c, o in zip(cases, out)])
    ident = [(c, o) for c, o in zip(cases, out) if o[1] is not None]
    print(f"tree {Path(audit.__file__).resolve().parents[1]}")
    print(f"records {a.records} x {a.samples} samples, {a.jobs} process(es); load average "
          f"{load[0]:.1f} / {load[1]:.1f} / {load[2]:.1f} (1 / 5 / 15 min) on {os.cpu_count()} CPUs")
    print(f"simulating the records (not timed below): {sim:.1f} s")
    print(f"identification: wall {wall:.1f} s, CPU {cpu:.1f} s (user+sys, workers included); "
          f"{a.records / wall:.1f} records/s, {1e3 * cpu / a.records:.1f} ms CPU per record")
    print(f"identified {len(ident)} of {a.records}; true structure chosen {100 * same:.1f} %")
    if ident:
        ge = [abs(o[1]["gain"] / c[1]["gain"] - 1) for c, o in ident]
        te = [abs(o[1]["dead_time"] - c[1]["dead_time"]) / max(c[1]["dead_time"], 1.0) for c, o in ident]
        print(f"median |gain error| {100 * np.median(ge):.2f} %, median |dead-time error| {100 * np.median(te):.2f} % "
              f"(of max(theta, 1 sample))")
    if a.stages:
        split = stage_split(cases[:a.stages])
        if split:
            tot = split.pop("total")
            print(f"stage split, one process, first {min(a.stages, a.records)} records: {1e3 * tot / min(a.stages, a.records):.1f} ms CPU per record")
            for k, v in sorted(split.items(), key=lambda kv: -kv[1]):
                print(f"  {k:<58} {1e3 * v / min(a.stages, a.records):6.1f} ms  ({100 * v / tot:4.1f} %)")
    figures = {"wall s": wall, "CPU s": cpu, "ms CPU per record": 1e3 * cpu / a.records,
               "true structure %": 100 * same, "identified": len(ident)}
    if ident:
        figures.update({"median gain error %": 100 * np.median(ge), "median dead-time error %": 100 * np.median(te)})
    baseline.report("identify", {f"records={a.records} samples={a.samples} jobs={a.jobs}": figures}, a,
                    higher=("true structure %", "identified"))


if __name__ == "__main__":
    main()
