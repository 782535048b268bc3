"""Historian-export benchmark: write a synthetic site export, then read every loop's slice back.

Usage::

    python benchmarks/export.py [--loops 100 500] [--days 7] [--ts 1] [--layout long|wide]
                                [--format parquet|csv] [--jobs N] [--keep DIR] [--read-every K]
                                [--skip-generate]

For each size, in a fresh process each: (1) ``plant-audit generate --loops N INV --data DIR``
(:func:`audit.generate_data.write_synthetic_export`, every loop simulated in closed loop), then
(2) :class:`audit.plantdata.export.ExportSource` opens the export and reads every tag's record
(the record reader's full rule: quality words, order, gaps, flat runs, segments) one after the
other, as ``run --data`` does (``--read-every K``: every K-th tag only, spread over all files).
Printed per step: wall and CPU time (user + sys, the simulating processes included), samples per
second per core (samples = loops x samples per loop x 3 numeric signals, on CPU time), peak
resident memory of the process (and of its largest worker), the export's size on disk, the read
time per loop, and the load average. ``--keep DIR`` writes ``DIR/inv<N>.xlsx`` and
``DIR/export<N>`` and keeps them; ``--skip-generate`` reads what is there. A benchmark that
prints figures, not a timed test.
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

GEN = r"""
import json, resource, sys, time
sys.path.insert(0, {root!r})
from audit.generate import write_synthetic_inventory
from audit.generate_data import write_synthetic_export
t0, c0 = time.perf_counter(), time.process_time()
write_synthetic_inventory({inv!r}, {loops}, 1, force=True)
w = write_synthetic_export({inv!r}, {data!r}, days={days}, ts={ts}, seed=1, layout={layout!r}, fmt={fmt!r}, force=True,
                           jobs={jobs})
ru, rc = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
print(json.dumps(dict(wall=time.perf_counter() - t0,
                      cpu=ru.ru_utime + ru.ru_stime + rc.ru_utime + rc.ru_stime + w.worker_cpu_s,
                      rss_mib=ru.ru_maxrss / 1024, child_mib=w.worker_peak_mib, loops=w.loops, samples=w.samples)))
"""

READ = r"""
import json, resource, sys, time
sys.path.insert(0, {root!r})
from audit.plantdata.export import ExportSource
ru0 = resource.getrusage(resource.RUSAGE_SELF)
t0 = time.perf_counter()
src = ExportSource.open({data!r})
t_open = time.perf_counter() - t0
n = rows = 0
tags = list(src.tags.values())[::{every}]
for tag in tags:
    st = {{}}
    rec = src.read(tag, stats=st)
    n += sum(s.n for s in rec.segments)
    rows += st["rows_scanned"]
ru = resource.getrusage(resource.RUSAGE_SELF)
print(json.dumps(dict(wall=time.perf_counter() - t0, open=t_open,
                      cpu=ru.ru_utime + ru.ru_stime - ru0.ru_utime - ru0.ru_stime,
                      rss_mib=ru.ru_maxrss / 1024, tags=len(src.tags), read=len(tags), samples=n, rows_scanned=rows)))
"""


def _run(code: str) -> dict:
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def _size(path: Path) -> int:
    return sum(f.stat().st_size for f in path.rglob("*") if f.is_file()) if path.is_dir() else path.stat().st_size


def main() -> None:
    """Run the benchmark and print the figures."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--loops", type=int, nargs="+", default=[100, 500])
    ap.add_argument("--days", type=float, default=7.0)
    ap.add_argument("--ts", type=float, default=1.0)
    ap.add_argument("--layout", choices=["long", "wide"], default="long")
    ap.add_argument("--format", dest="fmt", choices=["parquet", "csv"], default="parquet")
    ap.add_argument("--jobs", type=int, default=1, help="Simulating processes of generate --data.")
    ap.add_argument("--keep", default=None, help="Write the exports here and keep them (default: a temporary folder).")
    ap.add_argument("--read-every", type=int, default=1, help="Read every K-th tag only.")
    ap.add_argument("--skip-generate", action="store_true", help="Read the kept export without generating it.")
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    import baseline  # benchmarks/baseline.py, beside this script
    baseline.add_arguments(ap)
    a = ap.parse_args()
    base = Path(a.keep) if a.keep else Path(tempfile.mkdtemp(prefix="export-bench-"))
    base.mkdir(parents=True, exist_ok=True)
    print(f"# {a.layout} {a.fmt}, {a.days:g} d of {a.ts:g}-s samples, --jobs {a.jobs}; {os.cpu_count()} CPUs; "
          f"load average {os.getloadavg()[0]:.1f} at the start")
    print("| loops | step | wall [s] | CPU [s] | samples/s per core | peak RSS [MiB] | notes |")
    print("|---|---|---|---|---|---|---|")
    cases = {}
    for n in a.loops:
        inv, data = base / f"inv{n}.xlsx", base / f"export{n}"
        case = f"loops={n} days={a.days:g} ts={a.ts:g} {a.layout} {a.fmt} jobs={a.jobs}"
        if not a.skip_generate:
            g = _run(GEN.format(root=str(ROOT), inv=str(inv), data=str(data), loops=n, days=a.days, ts=a.ts,
                                layout=a.layout, fmt=a.fmt, jobs=a.jobs))
            vals = g["loops"] * g["samples"] * 3
            print(f"| {n} | generate ({g['loops']} simulated) | {g['wall']:.1f} | {g['cpu']:.1f} | "
                  f"{vals / g['cpu']:,.0f} | {g['rss_mib']:.0f} (worker {g['child_mib']:.0f}) | "
                  f"{_size(data) / 1024 ** 2:,.0f} MiB on disk, load {os.getloadavg()[0]:.1f} |")
            sys.stdout.flush()
            cases[case + " generate"] = {"wall s": g["wall"], "CPU s": g["cpu"], "peak MiB": g["rss_mib"],
                                         "worker peak MiB": g["child_mib"], "MiB on disk": _size(data) / 1024 ** 2}
        r = _run(READ.format(root=str(ROOT), data=str(data), every=a.read_every))
        vals = r["samples"] * 3
        what = "every tag" if r["read"] == r["tags"] else f"{r['read']} tags"
        print(f"| {n} | read {what} "
              f"| {r['wall']:.1f} | {r['cpu']:.1f} | {vals / r['cpu']:,.0f} | "
              f"{r['rss_mib']:.0f} | {r['cpu'] / max(r['read'], 1):.2f} s CPU a loop; open {r['open']:.2f} s, "
              f"{r['read']} of {r['tags']} tags, {r['rows_scanned']:,} rows decoded, load {os.getloadavg()[0]:.1f} |")
        sys.stdout.flush()
        cases[case + f" read every {a.read_every}"] = {"CPU s per loop": r["cpu"] / max(r["read"], 1),
                                                      "peak MiB": r["rss_mib"]}
    baseline.report("export", cases, a)
    if not a.keep:
        import shutil
        shutil.rmtree(base, ignore_errors=True)


if __name__ == "__main__":
    main()
