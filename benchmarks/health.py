"""Loop-health benchmark: :func:`audit.plantdata.health.loop_health` on long operating records.

Usage::

    python benchmarks/health.py [--loops 500] [--days 7] [--ts 1] [--seed 1]

Each loop gets a seeded synthetic week of 1-s samples (604,800 per signal: ``sp``, ``pv``,
``op`` and a ``mode`` word column), one of four kinds in turn: noise only, an oscillation
entering from outside, a triangular (sticking-valve-like) output, and a loop in manual for part
of the time. The records are made one at a time (never all held), and only the analysis is
timed: use figures, oscillation detection, the valve tests when it oscillates and the Harris
index (AR orders 1-30 by AIC). Printed: total and per-loop time, samples per second, the time of
each part on one loop, and the peak resident memory of the process. A benchmark that prints
figures, not a timed test.
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.signal import lfilter

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import baseline  # noqa: E402  (benchmarks/baseline.py, beside this script)
from audit.plantdata.health import HealthSettings, loop_health  # noqa: E402
from audit.plantdata.oscillation import detect_oscillation  # noqa: E402
from audit.plantdata.use import loop_use  # noqa: E402
from audit.plantdata.valve import assess_valve  # noqa: E402
from audit.plantdata.variance import harris_index  # noqa: E402

KINDS = ("noise", "external", "triangle", "manual")
MODE_WORDS = ["AUTO", "MAN"]


def record(kind: str, n: int, ts: float, rng: np.random.Generator):
    """One synthetic record: t [s], sp, pv [% of range], op [%], mode words."""
    t = np.arange(n) * ts
    a = np.exp(-ts / 60.0)
    noise = lfilter([1 - a], [1, -a], rng.standard_normal(n)) * 8.0 + 0.2 * rng.standard_normal(n)
    sp = np.full(n, 50.0)
    per = rng.uniform(60.0, 600.0)
    ph = 2 * np.pi * t / per
    if kind == "external":
        pv = 50.0 + 1.5 * np.sin(ph) + noise
        op = 50.0 - 3.0 * np.cos(ph) + 0.5 * noise
    elif kind == "triangle":
        tri = 2.0 / np.pi * np.arcsin(np.sin(ph))
        pv = 50.0 + 1.5 * np.sign(np.sin(ph)) + 0.3 * noise
        op = 50.0 + 4.0 * tri + 0.1 * noise
    else:
        pv = 50.0 + noise
        op = 50.0 - 2.0 * noise
    code = np.zeros(n, dtype=np.int8)
    if kind == "manual":
        code[n // 3:] = 1
    return t, sp, pv, op, pd.Categorical.from_codes(code, MODE_WORDS)   # as the reader's codes and labels


def parts(t, sp, pv, op, mode, ts) -> dict:
    """Time of each part of the analysis on one record. [s]"""
    out = {}
    t0 = time.perf_counter()
    loop_use(t, sp, pv, op, mode)
    out["use"] = time.perf_counter() - t0
    e = sp - pv
    t0 = time.perf_counter()
    o = detect_oscillation(e, ts)
    out["oscillation"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    assess_valve(op, pv, ts, o.period_s if o.oscillating else 300.0)
    out["valve"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    harris_index(e, 5)
    out["variance"] = time.perf_counter() - t0
    return out


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--loops", type=int, default=500)
    ap.add_argument("--days", type=float, default=7.0)
    ap.add_argument("--ts", type=float, default=1.0, help="sample interval [s]")
    ap.add_argument("--seed", type=int, default=1)
    baseline.add_arguments(ap)
    a = ap.parse_args(argv)
    n = int(round(a.days * 86400 / a.ts))
    rng = np.random.default_rng(a.seed)
    print(f"{a.loops} loops, {n:,} samples each ({a.days:g} days every {a.ts:g} s); load average at start "
          f"{os.getloadavg()[0]:.1f} on {os.cpu_count()} CPUs", flush=True)
    first = record("triangle", n, a.ts, np.random.default_rng(a.seed + 1))
    p = parts(*first, a.ts)
    print("one loop, by part [s]: " + ", ".join(f"{k} {v:.3f}" for k, v in p.items()))
    total, made, counts = 0.0, 0.0, {"oscillating": 0, "sticking": 0}
    settings = HealthSettings()
    t_all = time.perf_counter()
    for i in range(a.loops):
        t0 = time.perf_counter()
        rec = record(KINDS[i % len(KINDS)], n, a.ts, rng)
        t1 = time.perf_counter()
        h = loop_health(*rec, dead_time_s=4.0, settings=settings)
        total += time.perf_counter() - t1
        made += t1 - t0
        counts["oscillating"] += bool(h.oscillation is not None and h.oscillation.oscillating)
        counts["sticking"] += bool(h.valve is not None and h.valve.sticking)
        if (i + 1) % 50 == 0 and i + 1 < a.loops:
            print(f"  {i + 1} loops: analysis {total:.1f} s ({total / (i + 1):.3f} s per loop)", flush=True)
    wall = time.perf_counter() - t_all
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    print(f"analysis {total:.1f} s ({total / a.loops:.3f} s per loop, {a.loops * n / total / 1e6:.1f} M samples/s); "
          f"making the records {made:.1f} s; wall {wall:.1f} s")
    print(f"found: {counts['oscillating']} oscillating, {counts['sticking']} valves suspected sticking "
          f"(by construction {sum(1 for i in range(a.loops) if KINDS[i % 4] in ('external', 'triangle'))} "
          f"oscillate, {sum(1 for i in range(a.loops) if KINDS[i % 4] == 'triangle')} have a triangular op)")
    print(f"peak resident memory {peak:.0f} MiB (one record at a time)")
    baseline.report("health", {f"loops={a.loops} days={a.days:g} ts={a.ts:g} seed={a.seed}":
                               {"analysis s per loop": total / a.loops, "M samples/s": a.loops * n / total / 1e6,
                                "peak MiB": peak}}, a, higher=("M samples/s",))


if __name__ == "__main__":
    main()
