"""Site benchmark: ``plant-audit run`` on synthetic inventories of growing size.

Usage::

    python benchmarks/site.py [--sizes 100 1000 10000] [--jobs 1] [--no-pdf] [--seed 1]
    python benchmarks/site.py --inventory INV.xlsx --data EXPORT [--jobs 2] [--scheduler local] [--no-pdf]

For each size a seeded inventory is generated (audit.generate, .xlsx) and audited by
:func:`audit.runner.run_audit` in a fresh process (so each peak memory is its own), with
every output written (results.csv/json, report.html, report.pdf unless --no-pdf,
results.xlsx) and no history. With ``--inventory`` and ``--data`` one given inventory is audited
with its historian export (``run --data``; e.g. from ``plant-audit generate --data``): the
"plant data" column is loop health and the model check of every loop with data. Stage times come from ``Audit.timings``; peak memory is the
process's maximum resident set size (``resource.getrusage``), worker processes listed
apart; "all processes MiB (sum of peaks)" adds the run's own peak and each plant-data worker's own
peak (the workers run side by side: a bound on what the run held at once), or, without plant data,
``--jobs`` times the largest worker's peak; "all processes at once" is the largest total over the
run's process tree sampled every 0.5 s while it runs (resident and proportional set sizes,
benchmarks/memtree.py). Printed: one table row per size with the time of each stage, the total, the time
per loop (constant when cost grows linearly with loops), proposals per failing loop and
peak memory, the CPU time (user + sys) of the audit process and of its worker processes, and the
1-minute load average at the end of the run (the machine is shared: wall times are only as good as
the load beside them), then the figures saved by an earlier run beside these (``--save`` stores
these: benchmarks/baseline.py). A benchmark that prints figures, not a timed test.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import baseline  # noqa: E402  (benchmarks/baseline.py, beside this script)
import memtree  # noqa: E402  (benchmarks/memtree.py)

#: Stage columns of the table: (heading, keys of Audit.timings added together).
COLUMNS = (
    ("read", ("read",)),
    ("models", ("models", "records", "cascade")),
    ("evaluate", ("evaluate",)),
    ("steps", ("steps",)),
    ("proposals", ("proposals",)),
    ("priority", ("residuals", "priority")),
    ("plant data", ("health", "modelcheck")),
    ("csv+json", ("csv+json",)),
    ("HTML", ("report.html",)),
    ("PDF", ("report.pdf",)),
    ("xlsx", ("results.xlsx",)),
)


def child(inventory: str, out_dir: str, jobs: int, pdf: bool, data: str | None = None,
          scheduler: str | None = None) -> dict:
    """Audit one inventory in this process; stage times [s], peak memory [MiB] and counts."""
    import warnings

    from audit.pipeline import AuditOptions
    from audit.runner import run_audit

    warnings.simplefilter("ignore", RuntimeWarning)
    opts = AuditOptions(out_dir=out_dir, date="2026-01-05", site="Benchmark plant", pdf=pdf, jobs=jobs,
                        quiet=True, record_history=False, data=data, scheduler=scheduler)
    t0 = time.perf_counter()
    audit, _ = run_audit(inventory, opts)
    wall = time.perf_counter() - t0
    tm = dict(audit.timings)
    render = sum(tm.get(k, 0.0) for k in ("report.html", "report.pdf", "results.xlsx"))
    tm["csv+json"] = max(tm.get("write", 0.0) - render, 0.0)
    status = audit.results["status"].value_counts().to_dict()
    # --jobs workers are children of multiprocessing's fork server, not of this process: their CPU time
    # reaches RUSAGE_CHILDREN only once the fork server has exited and been waited for (a private
    # call of the standard library; a benchmark may use it)
    from multiprocessing import forkserver
    if getattr(forkserver._forkserver, "_forkserver_pid", None):
        forkserver._forkserver._stop()
    own, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    # each plant-data worker's own peak (its last task's ru_maxrss, by process id): processes that ran
    # side by side, so their peaks are added to this process's for a bound on the run's total
    per_worker: dict[int, float] = {}
    for r in (audit.extras.get("loop_data") or {}).values():
        if r.worker and r.worker != os.getpid():
            per_worker[r.worker] = max(per_worker.get(r.worker, 0.0), r.worker_peak_mib)
    peak = own.ru_maxrss / 1024
    # without plant-data workers: the other stages' pools, ``jobs`` workers side by side at most, each
    # bounded by the largest child's peak
    side = sum(per_worker.values()) if per_worker else (jobs * kids.ru_maxrss / 1024 if jobs > 1 else 0.0)
    return {
        "loops": len(audit.results), "wall": wall, "timings": tm, "status": status,
        "cpu": own.ru_utime + own.ru_stime, "workers_cpu": kids.ru_utime + kids.ru_stime,
        "load": os.getloadavg(),
        "peak_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        "workers_peak_mib": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024,
        "data_workers_peak_mib": sorted(per_worker.values(), reverse=True),
        "sum_peak_mib": peak + side,
    }


def run_size(n: int, seed: int, jobs: int, pdf: bool, tmp: Path, inventory: str | None = None,
             data: str | None = None, scheduler: str | None = None) -> dict:
    """Generate an inventory of ``n`` loops (or take ``inventory``) and audit it in a fresh process."""
    from audit.generate import write_synthetic_inventory

    inv = Path(inventory) if inventory else tmp / f"site_{n}.xlsx"
    t0 = time.perf_counter()
    if not inventory:
        write_synthetic_inventory(inv, n, seed)
    gen = time.perf_counter() - t0
    cmd = [sys.executable, __file__, "--child", str(inv), str(tmp / f"out_{n}"), "--jobs", str(jobs)]
    if not pdf:
        cmd.append("--no-pdf")
    if data:
        cmd += ["--data", data]
    if scheduler:
        cmd += ["--scheduler", scheduler]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    sampler = memtree.TreeSampler(proc.pid)
    out, err = proc.communicate()
    tree = sampler.stop()
    if proc.returncode != 0:
        raise SystemExit(f"audit of {n} loops failed:\n{err[-3000:]}")
    res = json.loads(out.strip().splitlines()[-1])
    res["generate"] = gen
    res.update(tree)
    return res


def table(results: list[dict]) -> str:
    """The figures as a Markdown table."""
    head = ["loops"] + [c for c, _ in COLUMNS] + ["total", "CPU s (+workers)", "load avg", "ms/loop",
                                                  "ms/failing loop (proposals)", "peak MiB",
                                                  "all processes MiB (sum of peaks)",
                                                  "all processes at once MiB (RSS / PSS, sampled)"]
    lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
    for r in results:
        tm = r["timings"]
        cells = [f"{r['loops']:,}"]
        for _, keys in COLUMNS:
            got = [tm[k] for k in keys if k in tm]
            cells.append(f"{sum(got):.2f}" if got else "-")
        failing = sum(v for k, v in r["status"].items() if k in ("fails", "unstable"))
        prop = tm.get("proposals")
        cells += [f"{r['wall']:.1f}", f"{r['cpu']:.1f} (+{r['workers_cpu']:.1f})", f"{r['load'][0]:.1f}",
                  f"{1000 * r['wall'] / r['loops']:.2f}",
                  f"{1000 * prop / failing:.1f} ({failing:,})" if prop is not None and failing else "-",
                  f"{r['peak_mib']:.0f}" + (f" (+workers {r['workers_peak_mib']:.0f})" if r["workers_peak_mib"] else ""),
                  _sum_cell(r),
                  f"{r['tree_rss_mib']:.0f} / {r['tree_pss_mib']:.0f}" if "tree_rss_mib" in r else "-"]
        lines.append("| " + " | ".join(cells) + " |")
    return "\n".join(lines)


def _sum_cell(r: dict) -> str:
    """The summed peak of all processes, with the plant-data workers' own peaks."""
    if "sum_peak_mib" not in r:
        return "-"
    each = r.get("data_workers_peak_mib") or []
    return f"{r['sum_peak_mib']:.0f}" + (f" ({r['peak_mib']:.0f} + {' + '.join(f'{w:.0f}' for w in each)})"
                                         if each else "")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="plant-audit run on synthetic inventories of growing size.")
    ap.add_argument("--sizes", type=int, nargs="+", default=[100, 1000, 10000])
    ap.add_argument("--jobs", type=int, default=1)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--no-pdf", action="store_true")
    ap.add_argument("--inventory", default=None, help="audit this inventory (once) instead of generated ones")
    ap.add_argument("--data", default=None, help="with --inventory: the site's historian export (run --data)")
    ap.add_argument("--scheduler", default=None, help="run --scheduler (local or tcp://HOST:PORT)")
    ap.add_argument("--child", nargs=2, metavar=("INVENTORY", "OUT"), help=argparse.SUPPRESS)
    baseline.add_arguments(ap)
    args = ap.parse_args(argv)
    if args.child:
        print(json.dumps(child(args.child[0], args.child[1], args.jobs, not args.no_pdf, args.data, args.scheduler)))
        return 0
    if args.data and not args.inventory:
        ap.error("--data needs --inventory (the export's own inventory)")
    from engine import machine

    print(f"machine: {machine()}; load average before: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    print(f"jobs {args.jobs}, pdf {not args.no_pdf}, seed {args.seed}")
    results = []
    with tempfile.TemporaryDirectory() as tmp:
        for n in ([0] if args.inventory else args.sizes):
            r = run_size(n, args.seed, args.jobs, not args.no_pdf, Path(tmp), args.inventory, args.data, args.scheduler)
            results.append(r)
            st = ", ".join(f"{v} {k}" for k, v in sorted(r["status"].items()))
            load = " ".join(f"{x:.2f}" for x in os.getloadavg())
            print(f"{r['loops']} loops: generated in {r['generate']:.1f} s; audited in {r['wall']:.1f} s "
                  f"(CPU {r['cpu']:.1f} s + workers {r['workers_cpu']:.1f} s; load average after: {load}); {st}",
                  flush=True)
    print()
    print(table(results))
    baseline.report("site", {case_name(r["loops"], args): figures(r) for r in results}, args)
    return 0


def case_name(loops: int, args) -> str:
    """The saved-figures key of one size: what makes two runs comparable."""
    where = f" scheduler={args.scheduler}" if args.scheduler else ""
    if args.inventory:
        return (f"inventory={Path(args.inventory).name} data={Path(args.data).name if args.data else '-'} "
                f"jobs={args.jobs}{where} pdf={'no' if args.no_pdf else 'yes'}")
    return f"loops={loops} jobs={args.jobs}{where} pdf={'no' if args.no_pdf else 'yes'} seed={args.seed}"


def figures(r: dict) -> dict[str, float]:
    """Figures of one size to compare with a saved run: stage times [s], total, CPU [s], peak [MiB]."""
    out = {}
    for name, keys in COLUMNS:
        got = [r["timings"][k] for k in keys if k in r["timings"]]
        if got:
            out[f"{name} s"] = sum(got)
    out["total s"] = r["wall"]
    out["CPU s"] = r["cpu"]
    out["workers CPU s"] = r["workers_cpu"]
    out["peak MiB"] = r["peak_mib"]
    out["workers peak MiB"] = r["workers_peak_mib"]
    if "sum_peak_mib" in r:
        out["all processes peak MiB (sum)"] = r["sum_peak_mib"]
    if "tree_rss_mib" in r:
        out["all processes at once MiB (RSS)"] = r["tree_rss_mib"]
        out["all processes at once MiB (PSS)"] = r["tree_pss_mib"]
    return out


if __name__ == "__main__":
    raise SystemExit(main())
