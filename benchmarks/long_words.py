"""Long-word benchmark: the time of the sample site's report when one cell holds a long unbroken word.

Usage::

    python benchmarks/long_words.py [--chars 5000] [--column area] [--repo PATH]

Copies the sample site, writes ``--chars`` letters with no space into ``--column`` of its first row and
runs ``audit run`` in this process with the PDF on. ``--repo`` imports plant-audit from another checkout
(e.g. an older commit) to compare. Printed: wall and CPU time [s] of the whole run, and of the write stage
(report.html, report.pdf, results files). A benchmark that prints figures, not a timed test.
"""

from __future__ import annotations

import argparse
import resource
import shutil
import sys
import tempfile
import time
from pathlib import Path

import openpyxl


def main() -> None:
    """Build the inventory, run the audit, print the figures."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--chars", type=int, default=5000)
    ap.add_argument("--column", default="area")
    ap.add_argument("--repo", type=Path, default=Path(__file__).resolve().parents[1])
    a = ap.parse_args()
    sys.path.insert(0, str(a.repo))
    from audit.cli import main as cli

    with tempfile.TemporaryDirectory() as tmp:
        site = Path(tmp) / "site"
        shutil.copytree(a.repo / "sample_site", site)
        wb = openpyxl.load_workbook(site / "loops.xlsx")
        ws = wb["loops"]
        heads = [c.value for c in ws[1]]
        if a.chars:
            ws.cell(row=2, column=heads.index(a.column) + 1).value = "W" * a.chars
        wb.save(site / "loops.xlsx")
        w0, c0 = time.perf_counter(), time.process_time()
        code = cli(["run", str(site / "loops.xlsx"), "--out", str(Path(tmp) / "out"), "--no-history",
                    "--date", "2026-12-01", "--quiet"])
        wall, cpu = time.perf_counter() - w0, time.process_time() - c0
        cpu += resource.getrusage(resource.RUSAGE_CHILDREN).ru_utime          # worker processes, if any
        pdf = (Path(tmp) / "out" / "report.pdf").stat().st_size
    print(f"| {a.repo} | {a.column} | {a.chars} | exit {code} | wall {wall:.1f} s | CPU {cpu:.1f} s | "
          f"PDF {pdf / 1e6:.2f} MB |")


if __name__ == "__main__":
    main()
