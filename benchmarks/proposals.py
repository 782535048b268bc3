"""Proposals benchmark: the proposals stage alone, split into its parts, on seeded inventories.

Usage::

    python benchmarks/proposals.py [--sizes 2000 10000] [--jobs 1 2] [--seed 1]

For each size a seeded inventory is generated (audit.generate) and the stages before the
proposals are run untimed (the step responses, which the proposals do not read, are skipped).
Then the proposals stage (:func:`audit.proposals.add_proposals`) runs once per ``--jobs``
value on a fresh copy, in this process, with wall time and CPU time (user + system, this
process and its finished worker processes; and this process's alone) of the stage and of its parts: the action checks,
the candidate search (:func:`audit.candidates.candidate_settings_many`), the exact evaluation
of every candidate and the load-step IAE simulation of the recommendations. The load average
is printed beside each row: the machine may be shared. A benchmark that prints figures, not a
timed test.
"""

from __future__ import annotations

import argparse
import copy
import os
import resource
import sys
import tempfile
import time
import warnings
from collections import Counter
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def _cpu() -> float:
    """CPU time [s] of this process and its finished children (user + system)."""
    a = resource.getrusage(resource.RUSAGE_SELF)
    b = resource.getrusage(resource.RUSAGE_CHILDREN)
    return a.ru_utime + a.ru_stime + b.ru_utime + b.ru_stime


def prepared(n: int, seed: int, tmp: Path):
    """An Audit of ``n`` seeded loops, every stage before the proposals run but the step responses."""
    from audit.faults import run_contained
    from audit.generate import write_synthetic_inventory
    from audit.inventory import read_inventory
    from audit.pipeline import STAGES, AuditOptions, new_audit

    inv = tmp / f"site_{n}.xlsx"
    write_synthetic_inventory(inv, n, seed)
    audit = new_audit(read_inventory(str(inv)), AuditOptions(out_dir=str(tmp / "out"), date="2026-01-05",
                                                              quiet=True, record_history=False))
    done: list[str] = []
    for name, mod, fn in STAGES:
        if name == "proposals":
            break
        if name == "steps":
            continue
        run_contained(audit, name, getattr(__import__(mod, fromlist=[fn]), fn), done)
    return audit


def timed_stage(audit, jobs: int) -> dict:
    """Run the proposals stage with ``jobs`` processes; wall and CPU time of it and of its parts. [s]"""
    try:
        import audit.proposals as P
    except ImportError:   # an earlier version: the stage and its parts lived in audit.tuning
        import audit.tuning as P

    parts: Counter = Counter()
    real = {k: getattr(P, k) for k in ("check_actions", "candidate_settings_many", "_evaluate_jobs", "_iae_of")
            if hasattr(P, k)}

    def wrap(name, fn):
        def inner(*a, **k):
            w0, c0 = time.perf_counter(), _cpu()
            try:
                return fn(*a, **k)
            finally:
                parts[name + " wall"] += time.perf_counter() - w0
                parts[name + " cpu"] += _cpu() - c0
        return inner

    for k, fn in real.items():
        setattr(P, k, wrap(k, fn))
    audit.options.jobs = jobs
    try:
        w0, c0, h0 = time.perf_counter(), _cpu(), time.process_time()
        P.add_proposals(audit)
        wall, cpu, here = time.perf_counter() - w0, _cpu() - c0, time.process_time() - h0
    finally:
        for k, fn in real.items():
            setattr(P, k, fn)
    failing = int((audit.results["status"] != "passes").sum() - (audit.results["status"] == "invalid").sum())
    return {"wall": wall, "cpu": cpu, "here": here, "parts": dict(parts), "proposed": failing, "load": os.getloadavg()[0]}


def main(argv: list[str] | None = None) -> int:
    """Print one row per size and job count."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[2000, 10000])
    ap.add_argument("--jobs", type=int, nargs="+", default=[1, 2])
    ap.add_argument("--seed", type=int, default=1)
    import baseline  # benchmarks/baseline.py, beside this script
    baseline.add_arguments(ap)
    args = ap.parse_args(argv)
    warnings.simplefilter("ignore", RuntimeWarning)
    from engine import machine

    print(f"machine: {machine()}, seed {args.seed}")
    head = ("loops", "jobs", "proposed", "stage wall", "stage cpu", "of it this process", "actions", "search", "exact evaluation",
            "IAE simulation", "load avg")
    print("| " + " | ".join(head) + " |")
    print("|" + "---|" * len(head))
    cases = {}
    with tempfile.TemporaryDirectory() as tmp:
        for n in args.sizes:
            base = prepared(n, args.seed, Path(tmp))
            for jobs in args.jobs:
                r = timed_stage(copy.deepcopy(base), jobs)
                p = r["parts"]
                cases[f"loops={n} jobs={jobs} seed={args.seed}"] = {"stage wall s": r["wall"], "stage CPU s": r["cpu"]}

                def cell(k):
                    return f"{p.get(k + ' wall', 0):.2f} ({p.get(k + ' cpu', 0):.2f})"
                print(f"| {n:,} | {jobs} | {r['proposed']:,} | {r['wall']:.2f} | {r['cpu']:.2f} | {r['here']:.2f} | "
                      f"{cell('check_actions')} | {cell('candidate_settings_many')} | {cell('_evaluate_jobs')} | "
                      f"{cell('_iae_of')} | {r['load']:.1f} |", flush=True)
    print("\nwall [s] (cpu [s]); cpu counts this process and its finished workers ('of it this process': the "
          "run's own process alone); 'search' and 'exact evaluation' are those of the main process (with "
          "--jobs > 1 the workers' share is in the stage figures)")
    baseline.report("proposals", cases, args)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
