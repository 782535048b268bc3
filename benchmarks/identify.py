"""Benchmark of model identification from records (prints figures; not a test).

Seeded bump-test records of invented loops (fopdt, sopdt, ipdt in the proportions 3:1:1,
gains 0.3-3, time constants 5-200 samples, dead times 0-60 samples, white noise 1-3 % of
the pv's step), simulated with scipy.signal (fine grid, delay line: independent of the code
under test), then identified with :func:`audit.plantdata.identify.identify_arrays` (all
three structures, held-out fit, residual checks) over ``--jobs`` processes.

Usage::

    python benchmarks/identify.py [--records 2000] [--samples 10000] [--jobs 2]

Prints wall time, records per second, samples per second and, against the true models,
how often the chosen structure is the true one and the median relative error of the gain
and the dead time.
"""

from __future__ import annotations

import argparse
import warnings
import multiprocessing as mp
import os
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from audit.plantdata.identify import identify_arrays  # noqa: E402
from tests.reference.plant_sim import open_loop  # noqa: E402


def make_case(k: int, n: int) -> tuple[str, dict, np.ndarray, np.ndarray]:
    """One seeded record: (true structure, true parameters, op, pv)."""
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


def run_case(args: tuple[int, int]) -> tuple[str, str, float, float, float]:
    k, n = args
    model, p, op, pv = make_case(k, n)
    t0 = time.perf_counter()
    r = identify_arrays(op, pv, 1.0)
    el = time.perf_counter() - t0
    if r.best is None:
        return model, "", float("nan"), float("nan"), el
    b = r.best
    ge = abs(b.params["gain"] / p["gain"] - 1)
    te = abs(b.params["dead_time"] - p["dead_time"]) / max(p["dead_time"], 1.0)
    return model, b.model, ge, te, el


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--records", type=int, default=2000)
    ap.add_argument("--samples", type=int, default=10000)
    ap.add_argument("--jobs", type=int, default=2)
    a = ap.parse_args()
    warnings.simplefilter("ignore")          # the simulator's scipy warns on a leading zero numerator
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    t0 = time.perf_counter()
    jobs = [(k, a.samples) for k in range(a.records)]
    if a.jobs > 1:
        with mp.get_context("fork").Pool(a.jobs) as pool:
            out = pool.map(run_case, jobs, chunksize=4)
    else:
        out = [run_case(j) for j in jobs]
    wall = time.perf_counter() - t0
    # the records are simulated inside the workers: time the simulation alone on a sample
    s0 = time.perf_counter()
    m = min(20, a.records)
    for k in range(m):
        make_case(k, a.samples)
    sim = (time.perf_counter() - s0) / m
    fit = np.array([o[4] for o in out])
    same = np.mean([o[0] == o[1] for o in out])
    ident = [o for o in out if o[1]]
    print(f"records {a.records} x {a.samples} samples, {a.jobs} process(es), load {os.getloadavg()[0]:.1f}")
    print(f"wall {wall:.1f} s (of which simulating the records about {sim * a.records / a.jobs:.1f} s)")
    print(f"identification per record: median {np.median(fit) * 1e3:.0f} ms, 90th percentile "
          f"{np.percentile(fit, 90) * 1e3:.0f} ms; {a.records / fit.sum() * a.jobs:.1f} records/s on {a.jobs} "
          f"process(es), {a.records * a.samples / fit.sum() * a.jobs / 1e3:.1f} k samples/s")
    print(f"identified {len(ident)} of {a.records}; true structure chosen {100 * same:.1f} %")
    if ident:
        print(f"median |gain error| {100 * np.nanmedian([o[2] for o in ident]):.2f} %, median |dead-time error| "
              f"{100 * np.nanmedian([o[3] for o in ident]):.2f} % (of max(theta, 1 sample))")


if __name__ == "__main__":
    main()
