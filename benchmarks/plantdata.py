"""Plant-data benchmark: the per-loop data task (:mod:`audit.plantdata.loopdata`) on every executor.

Usage::

    python benchmarks/plantdata.py [--loops 100 500] [--days 7] [--ts 1] [--records 8]
                                   [--executors serial jobs2 dask] [--check-loops 0]

A seeded site is written into a temporary folder: ``--records`` distinct week-long records of 1-s
samples (Parquet: ``sp``, ``pv``, ``op`` and a ``mode`` word; the four kinds of
``benchmarks/health.py``: noise only, an oscillation from outside, a triangular output, part of the
time in manual) and an inventory of ``--loops`` fopdt loops whose ``data_file`` names them in turn
(the files repeat, so the disk cache holds them: the figures are the analysis, not the disk).
For each size and executor a fresh process reads the inventory, builds the models and runs
:func:`audit.plantdata.loopdata.analyse_chunk` over every row on the executor (loop health; the
model check only with ``--check-loops``, on that many loops, because the identification of a
week of samples takes tens of seconds a loop). Printed per run: wall and CPU time (the process
and the workers), time per loop, samples per second per core (samples per signal, over wall time
and workers), the time of reading and of the analysis summed over loops, and the peak resident
memory of the process and of the largest worker, and the sum of the peaks of all processes (the
process and each worker: "all processes MiB", a bound on what the run held at once); then whether every executor gave the same
results (a digest of every result). A benchmark that prints figures, not a timed test.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import pickle
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))

EXECUTORS = ("serial", "jobs2", "dask")


def make_site(folder: Path, loops: int, records: int, days: float, ts: float, seed: int) -> Path:
    """Write ``records`` Parquet records and an inventory of ``loops`` rows naming them in turn."""
    import pandas as pd

    from health import KINDS, record   # benchmarks/health.py: the same synthetic records

    n = int(round(days * 86400 / ts))
    (folder / "rec").mkdir(parents=True, exist_ok=True)
    for k in range(records):
        path = folder / "rec" / f"r{k:02d}.parquet"
        if path.exists():
            continue
        t, sp, pv, op, mode = record(KINDS[k % len(KINDS)], n, ts, np.random.default_rng(seed + k))
        pd.DataFrame({"time_s": t, "sp": sp, "pv": pv, "op": op, "mode": np.asarray(mode).astype(str)}) \
            .to_parquet(path)
    lines = ["tag,service,area,criticality,model,gain,tau1_s,dead_time_s,form,kc,ti_s,action,sample_s,data_file"]
    for i in range(loops):
        lines.append(f"L{i:04d},flow,A,medium,fopdt,1,60,4,ideal,0.8,60,reverse,1,rec/r{i % records:02d}.parquet")
    inv = folder / f"loops_{loops}.csv"
    inv.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return inv


def child(inventory: str, executor: str, check_loops: int) -> dict:
    """One run in this (fresh) process: the per-loop task over every row on one executor."""
    from audit.executors import open_executor
    from audit.inventory import read_inventory
    from audit.pipeline import AuditOptions, build_models, new_audit
    from audit.plantdata.loopdata import LoopTask, analyse_chunk, loop_tasks

    jobs, scheduler = {"serial": (1, None), "jobs2": (2, None), "dask": (2, "local")}[executor]
    audit = new_audit(read_inventory(inventory), AuditOptions(jobs=jobs, scheduler=scheduler))
    build_models(audit)
    tasks, shared = loop_tasks(audit)
    tasks = [LoopTask(t.index, t.row, t.model, t.health, check=t.index < check_loops) for t in tasks]
    ex = open_executor(jobs, scheduler)
    start = 0.0
    if executor == "dask":                       # the cluster's start, apart from the work
        t0 = time.perf_counter()
        ex._connect()
        start = time.perf_counter() - t0
    c0, t0 = time.process_time(), time.perf_counter()
    got = ex.map_chunks(analyse_chunk, tasks, shared)
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    ex.close()
    digest = hashlib.sha256()
    for r in got:
        h, c = r.health, r.check
        digest.update(pickle.dumps((r.index, h.columns if h is not None else None,
                                    None if c is None else (c.verdict, c.model_fit_pct, c.note))))
    workers: dict[int, float] = {}
    for r in got:
        workers[r.worker] = max(workers.get(r.worker, 0.0), r.worker_peak_mib)
    me = os.getpid()
    return {"executor": executor, "loops": len(got), "wall_s": wall, "start_s": start, "cpu_parent_s": cpu,
            "cpu_tasks_s": sum(r.cpu_s for r in got), "read_s": sum(r.read_s for r in got),
            "health_s": sum(r.health_s for r in got), "check_s": sum(r.check_s for r in got),
            "samples": sum(r.samples for r in got), "workers": 1 if executor == "serial" else 2,
            "peak_parent_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0,
            "peak_worker_mib": max((v for k, v in workers.items() if k != me), default=0.0),
            "peak_sum_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
            + sum(v for k, v in workers.items() if k != me),
            "digest": digest.hexdigest()[:16]}


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--loops", type=int, nargs="+", default=[100, 500])
    ap.add_argument("--days", type=float, default=7.0)
    ap.add_argument("--ts", type=float, default=1.0, help="sample interval [s]")
    ap.add_argument("--records", type=int, default=8, help="distinct record files")
    ap.add_argument("--executors", nargs="+", choices=EXECUTORS, default=list(EXECUTORS))
    ap.add_argument("--check-loops", type=int, default=0, help="loops that also get the model check")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--folder", default=None, help="keep the site here (default: a temporary folder)")
    ap.add_argument("--child", nargs=2, metavar=("INVENTORY", "EXECUTOR"), help=argparse.SUPPRESS)
    import baseline  # benchmarks/baseline.py, beside this script
    baseline.add_arguments(ap)
    a = ap.parse_args(argv)
    if a.child:
        print(json.dumps(child(a.child[0], a.child[1], a.check_loops)))
        return
    tmp = None if a.folder else tempfile.TemporaryDirectory(prefix="plantdata-bench-")
    folder = Path(a.folder or tmp.name)
    print(f"{a.records} distinct records of {a.days:g} days every {a.ts:g} s; load average at start "
          f"{os.getloadavg()[0]:.1f} on {os.cpu_count()} CPUs", flush=True)
    head = (f"{'loops':>6} {'executor':>8} {'wall s':>8} {'cpu s':>8} {'s/loop':>7} {'Msamples/s/core':>16} "
            f"{'read s':>7} {'health s':>9} {'check s':>8} {'start s':>7} {'peak MiB':>9} {'worker MiB':>10} "
            f"{'all processes MiB':>17} digest")
    rows, cases = [], {}
    for n in a.loops:
        inv = make_site(folder, n, a.records, a.days, a.ts, a.seed)
        for ex in a.executors:
            out = subprocess.run([sys.executable, __file__, "--child", str(inv), ex, "--check-loops",
                                  str(a.check_loops)], capture_output=True, text=True, cwd=ROOT)
            if out.returncode:
                print(out.stderr[-3000:], file=sys.stderr)
                raise SystemExit(out.returncode)
            r = json.loads(out.stdout.strip().splitlines()[-1])
            rows.append(r)
            cpu = r["cpu_parent_s"] + (r["cpu_tasks_s"] if ex != "serial" else 0.0)
            rate = r["samples"] / r["wall_s"] / r["workers"] / 1e6
            if len(rows) == 1:
                print(head)
            print(f"{n:>6} {ex:>8} {r['wall_s']:>8.1f} {cpu:>8.1f} {r['wall_s'] / n:>7.3f} {rate:>16.2f} "
                  f"{r['read_s']:>7.1f} {r['health_s']:>9.1f} {r['check_s']:>8.1f} {r['start_s']:>7.1f} "
                  f"{r['peak_parent_mib']:>9.0f} {r['peak_worker_mib']:>10.0f} {r['peak_sum_mib']:>17.0f} "
                  f"{r['digest']}", flush=True)
            cases[f"loops={n} executor={ex} days={a.days:g} ts={a.ts:g} check-loops={a.check_loops}"] = {
                "wall s": r["wall_s"], "CPU s": cpu, "read s": r["read_s"], "health s": r["health_s"],
                "check s": r["check_s"], "peak MiB": r["peak_parent_mib"], "worker peak MiB": r["peak_worker_mib"],
                "all processes peak MiB (sum)": r["peak_sum_mib"]}
        same = len({r["digest"] for r in rows if r["loops"] == n}) == 1
        print(f"  {n} loops: every executor gave the same results: {'yes' if same else 'NO'}; load average now "
              f"{os.getloadavg()[0]:.1f}", flush=True)
    baseline.report("plantdata", cases, a)
    if tmp is not None:
        tmp.cleanup()


if __name__ == "__main__":
    main()
