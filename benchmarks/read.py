"""Reading an inventory workbook: ``audit.inventory.read_inventory`` on seeded inventories, each in a
fresh process.

Usage::

    python benchmarks/read.py [--sizes 2000 10000] [--repeat 3] [--tree DIR] [--seed 1]

For each size a seeded inventory is generated (``plant-audit generate --loops N --seed S``, .xlsx), then
read in a fresh process by the code of ``--tree`` (default: this checkout; give another checkout to
measure before against after on the same files). Printed per size: wall and CPU time (user + sys) of
the first read in the process, with the imports a run makes before it (``audit.runner``), then the
least CPU time of ``--repeat`` further reads (warm), rows read, the CPU time of building the loop
models afterwards as the models stage does, and the load average (the machine is shared: CPU time is
the figure to compare). A benchmark that prints figures, not a timed test.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

CHILD = r"""
import json, os, sys, time
sys.path.insert(0, sys.argv[1])
w0, c0 = time.perf_counter(), time.process_time()
import audit.runner                     # what a run has imported before its read stage
from audit.inventory import read_inventory
from audit.pipeline import AuditOptions, new_audit
w1, c1 = time.perf_counter(), time.process_time()
inv = read_inventory(sys.argv[2])
audit = new_audit(inv, AuditOptions())
w2, c2 = time.perf_counter(), time.process_time()
from audit.pipeline import build_models
build_models(audit)
c3 = time.process_time()
warm = []
for _ in range(int(sys.argv[3])):
    t = time.process_time()
    read_inventory(sys.argv[2])
    warm.append(time.process_time() - t)
import audit as pkg
print(json.dumps({"rows": len(inv.rows), "imports_wall": w1 - w0, "imports_cpu": c1 - c0, "read_wall": w2 - w1,
                  "read_cpu": c2 - c1, "models_cpu": c3 - c2, "warm_cpu": min(warm) if warm else None,
                  "load": os.getloadavg()[0], "code": os.path.dirname(pkg.__file__)}))
"""


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[2000, 10000])
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--tree", default=str(ROOT), help="checkout whose audit package reads (default: this one)")
    args = ap.parse_args(argv)
    sys.path.insert(0, str(ROOT))
    from audit.generate import write_synthetic_inventory

    print(f"load average before: {' '.join(f'{x:.2f}' for x in os.getloadavg())}; code: {args.tree}")
    print("| loops | first read [s wall] | first read [s CPU] | imports before it [s CPU] | warm read [s CPU] | "
          "models stage after it [s CPU] | load avg |")
    print("|---|---|---|---|---|---|---|")
    with tempfile.TemporaryDirectory() as tmp:
        for n in args.sizes:
            inv = Path(tmp) / f"inv_{n}.xlsx"
            write_synthetic_inventory(inv, n, args.seed)
            proc = subprocess.run([sys.executable, "-c", CHILD, args.tree, str(inv), str(args.repeat)],
                                  capture_output=True, text=True, cwd=args.tree, check=False)
            if proc.returncode != 0:
                raise SystemExit(proc.stderr[-3000:])
            r = json.loads(proc.stdout.strip().splitlines()[-1])
            warm = f"{r['warm_cpu']:.3f}" if r["warm_cpu"] is not None else "-"
            print(f"| {r['rows']:,} | {r['read_wall']:.3f} | {r['read_cpu']:.3f} | {r['imports_cpu']:.3f} | {warm} | "
                  f"{r['models_cpu']:.3f} | {r['load']:.1f} |", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
