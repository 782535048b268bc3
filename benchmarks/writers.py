"""Writers benchmark: the output stage of a whole audit (results.csv/json, report.html, results.xlsx).

Usage::

    python benchmarks/writers.py [--loops 2000] [--seed 1] [--jobs 2] [--repeat 3] [--tree DIR ...] [--pdf]
                                 [--keep DIR]

A seeded inventory (audit.generate) is audited once by this checkout up to the writers (every stage
of ``run_stages``, no history); the finished audit is pickled. Then ``audit.runner.write_outputs`` (what
``plant-audit run`` calls into its staging folder) writes it in a fresh process per run, for this
checkout and every ``--tree`` (another checkout: before/after on the same audit), the trees taken in
turn ``--repeat`` times so that each sees the same minutes of a shared machine. Printed per run:
wall time of the stage, CPU time (user + sys) of the process and of its pool's workers, the stage's
own split (``Audit.timings``; with a pool the tables and the workbook are written beside the page,
so their columns are only the wait after it) and the 1-minute load average; then the least and the
median of each tree, and whether every tree wrote the same report.html, results.csv and results.json
bytes (results.xlsx: every part of the package but the time it was written) as the first.
A benchmark that prints figures, not a timed test.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import statistics
import subprocess
import sys
import tempfile
import zipfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

STAGES = """
import pickle, sys, warnings
warnings.simplefilter("ignore", RuntimeWarning)
from audit.inventory import read_inventory
from audit.pipeline import AuditOptions, new_audit, run_stages
inv = read_inventory(sys.argv[1])
audit = new_audit(inv, AuditOptions(out_dir=sys.argv[2], date="2026-01-05", site="Benchmark plant", quiet=True,
                                    record_history=False, pdf=False, jobs=int(sys.argv[3])))
run_stages(audit)
audit.executor = None
with open(sys.argv[2] + ".pickle", "wb") as fh:
    pickle.dump(audit, fh, protocol=pickle.HIGHEST_PROTOCOL)
"""

CHILD = """
import json, os, pickle, resource, sys, time, warnings
warnings.simplefilter("ignore", RuntimeWarning)
sys.path.insert(0, sys.argv[1])
import audit
from audit.runner import write_outputs
with open(sys.argv[2], "rb") as fh:
    au = pickle.load(fh)
au.options.jobs, au.options.pdf, au.timings = int(sys.argv[4]), sys.argv[5] == "1", {}
k0 = resource.getrusage(resource.RUSAGE_CHILDREN)
c0, t0 = time.process_time(), time.perf_counter()
write_outputs(au, sys.argv[3])
wall, cpu = time.perf_counter() - t0, time.process_time() - c0
k = resource.getrusage(resource.RUSAGE_CHILDREN)
print(json.dumps({"code": audit.__file__, "wall": wall, "cpu": cpu,
                  "workers": k.ru_utime + k.ru_stime - k0.ru_utime - k0.ru_stime,
                  "timings": au.timings, "load": os.getloadavg()[0]}))
"""

PARTS = ("report.html", "report.pdf", "results.xlsx")


def _same(a: Path, b: Path) -> list[str]:
    """Names of the files that differ between two output folders (results.xlsx by its parts' contents)."""
    bad = []
    for name in ("report.html", "results.csv", "results.json"):
        if (a / name).read_bytes() != (b / name).read_bytes():
            bad.append(name)
    def parts(path: Path) -> dict[str, bytes]:   # the time of writing (docProps/core.xml) left out
        with zipfile.ZipFile(path) as zf:
            return {n: re.sub(rb"<dcterms:(created|modified)[^<]*</dcterms:\1>", b"", zf.read(n)) for n in zf.namelist()}

    if parts(a / "results.xlsx") != parts(b / "results.xlsx"):
        bad.append("results.xlsx")
    return bad


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="Time the writers of a whole audit on one finished audit.")
    ap.add_argument("--loops", type=int, default=2000)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--jobs", type=int, default=2, help="as `run --jobs` (the report's pool)")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--tree", nargs="*", default=[], help="other checkouts to time on the same audit")
    ap.add_argument("--pdf", action="store_true", help="also report.pdf")
    ap.add_argument("--keep", default=None, help="folder for the inventory, the pickled audit and the outputs")
    args = ap.parse_args(argv)
    trees = [str(ROOT)] + [str(Path(t).resolve()) for t in args.tree]
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(args.keep or tmp)
        work.mkdir(parents=True, exist_ok=True)
        inv = work / f"inv{args.loops}_{args.seed}.xlsx"
        if not inv.exists():
            sys.path.insert(0, str(ROOT))
            from audit.generate import write_synthetic_inventory
            write_synthetic_inventory(inv, args.loops, args.seed)
        stage = work / f"audit{args.loops}_{args.seed}"
        if not Path(str(stage) + ".pickle").exists():
            subprocess.run([sys.executable, "-c", STAGES, str(inv), str(stage), str(args.jobs)], cwd=ROOT, check=True)
        rows: dict[str, list[dict]] = {t: [] for t in trees}
        print(f"{args.loops} loops, seed {args.seed}, --jobs {args.jobs}; load average before: "
              f"{' '.join(f'{x:.2f}' for x in os.getloadavg())}")
        print("| code | run | wall [s] | CPU [s] | workers CPU [s] | csv+json [s] | HTML [s] | PDF [s] | xlsx [s] | load |")
        print("|---|---|---|---|---|---|---|---|---|---|")
        for k in range(args.repeat):
            for n, tree in enumerate(trees):
                out = work / f"out{n}"
                proc = subprocess.run([sys.executable, "-c", CHILD, tree, str(stage) + ".pickle", str(out),
                                       str(args.jobs), "1" if args.pdf else "0"],
                                      capture_output=True, text=True, cwd=tree, check=False)
                if proc.returncode != 0:
                    print(proc.stderr[-2000:], file=sys.stderr)
                    return 1
                r = json.loads(proc.stdout.strip().splitlines()[-1])
                tm = r["timings"]
                r["csv+json"] = r["wall"] - sum(tm.get(p, 0.0) for p in PARTS)
                rows[tree].append(r)
                print(f"| {tree} | {k + 1} | {r['wall']:.2f} | {r['cpu']:.2f} | {r['workers']:.2f} | {r['csv+json']:.2f} | "
                      f"{tm.get('report.html', 0):.2f} | {tm.get('report.pdf', 0):.2f} | {tm.get('results.xlsx', 0):.2f} | "
                      f"{r['load']:.2f} |", flush=True)
        print()
        print("| code | wall least / median [s] | CPU + workers least / median [s] | same files as the first |")
        print("|---|---|---|---|")
        for n, tree in enumerate(trees):
            walls = [r["wall"] for r in rows[tree]]
            cpus = [r["cpu"] + r["workers"] for r in rows[tree]]
            bad = _same(work / "out0", work / f"out{n}") if n else []
            print(f"| {tree} | {min(walls):.2f} / {statistics.median(walls):.2f} | {min(cpus):.2f} / "
                  f"{statistics.median(cpus):.2f} | {'yes' if not bad else 'NO: ' + ', '.join(bad)} |")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
