"""Report benchmark: where the time of report.html, report.pdf and results.xlsx goes.

Usage::

    python benchmarks/report.py [--sizes 100 2000] [--no-sample] [--no-pdf] [--traces] [--seed 1] [--jobs 1]

For the sample site and for seeded generated inventories of each size (audit.generate), one
process runs the pipeline stages, then times the report apart, stage by stage:

* ``build``: :func:`audit.report.build_report` (plot data; the step responses of all
  detail loops in one batched simulation);
* ``draw``: :func:`audit.render.draw` (chart data and the chart templates);
* ``HTML``: the page rendered and written; ``PDF``: the print page rendered and laid out by
  WeasyPrint; ``xlsx``: results.xlsx;
* with ``--jobs N`` above 1, build, draw and HTML run as ``write_outputs`` runs them: one process pool of
  N workers for the step batches, the loop charts and the detail sections; ``workers_cpu`` is the CPU
  time of its workers (``html_cpu`` stays that of this process);
* with ``--traces``: the step traces of the detail loops simulated loop by loop
  (:func:`audit.timedomain.step_traces`) against one batch (:func:`step_traces_many`).

Printed: a Markdown table, one row per inventory, times in seconds (wall; ``html_cpu``: CPU time of
build + draw + HTML, ``xlsx_cpu`` of the workbook, user + sys of this process); pages of the PDF; the
1-minute load average after the workbook (the machine is shared).
A benchmark that prints figures, not a timed test.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
import warnings
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

SAMPLE = ROOT / "sample_site" / "loops.xlsx"


def _traces(report, audit) -> tuple[float, float, int]:
    """Per-loop against batched step traces of the loops with plots: (per loop [s], batched [s], models)."""
    from audit.report import proposed_model
    from audit.timedomain import step_traces, step_traces_many

    models = []
    for d in report.details:
        if d.plots is None:
            continue
        m = audit.models[d.index]
        models.append(m)
        p = proposed_model(m, (audit.extras.get("proposals") or {}).get(audit.inventory.rows[d.index].index))
        if p is not None:
            models.append(p)
    t0 = time.perf_counter()
    for kind in ("load", "setpoint"):
        for m in models:
            try:
                step_traces(m, kind)
            except ValueError:
                pass
    one = time.perf_counter() - t0
    t0 = time.perf_counter()
    for kind in ("load", "setpoint"):
        step_traces_many(models, kind)
    return one, time.perf_counter() - t0, len(models)


def measure(inventory: Path, out: Path, pdf: bool, traces: bool, jobs: int = 1) -> dict:
    """Stage and report times [s] of one inventory."""
    import contextlib
    import inspect
    import resource

    from audit import render as render_mod
    from audit.inventory import read_inventory
    from audit.pipeline import AuditOptions, new_audit, run_stages
    from audit.render import PLOT_LIMIT, draw, render_html, write_pdf
    from audit.report import build_report
    from audit.xlsx_out import write_results_xlsx

    out.mkdir(parents=True, exist_ok=True)
    row: dict = {}
    t0 = time.perf_counter()
    inv = read_inventory(str(inventory))
    audit = new_audit(inv, AuditOptions(out_dir=str(out), date="2026-12-01", quiet=True, record_history=False))
    row["read"] = time.perf_counter() - t0
    run_stages(audit)
    row["stages"] = sum(audit.timings.values())
    row["proposals"] = audit.timings.get("proposals", 0.0)
    pool = (getattr(render_mod, "_mapper", None) if jobs > 1 else None) or (lambda n: contextlib.nullcontext(map))
    pooled_render = "mapper" in inspect.signature(render_html).parameters   # earlier code rendered in one process
    kids0 = resource.getrusage(resource.RUSAGE_CHILDREN)
    c0 = time.process_time()
    t0 = time.perf_counter()
    with pool(jobs) as mapper:
        report = build_report(audit, plot_limit=PLOT_LIMIT, mapper=mapper)
        row["build"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        rendered = draw(report, mapper=mapper)
        row["draw"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        html = (render_html(report, rendered, mapper=mapper) if pooled_render else render_html(report, rendered))
        (out / "report.html").write_text(html, encoding="utf-8")
        row["HTML"] = time.perf_counter() - t0
    row["html_cpu"] = time.process_time() - c0
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    if jobs > 1:
        row["workers_cpu"] = kids.ru_utime + kids.ru_stime - kids0.ru_utime - kids0.ru_stime
    row["html_mb"] = len(html.encode()) / 1e6
    if pdf:
        from pypdf import PdfReader

        t0 = time.perf_counter()
        write_pdf(render_html(report, rendered, for_print=True), out / "report.pdf", out)
        row["PDF"] = time.perf_counter() - t0
        row["pages"] = len(PdfReader(out / "report.pdf").pages)
    c0 = time.process_time()
    t0 = time.perf_counter()
    write_results_xlsx(audit, report, out / "results.xlsx")
    row["xlsx"] = time.perf_counter() - t0
    row["xlsx_cpu"] = time.process_time() - c0
    row["load"] = os.getloadavg()[0]
    row["loops"] = len(audit.results)
    row["details"] = len(report.details)
    row["charts"] = sum(len(v) for v in rendered.loops.values())
    row["html_total"] = row["read"] + row["stages"] + row["build"] + row["draw"] + row["HTML"]
    if traces:
        row["traces_one"], row["traces_batch"], row["trace_models"] = _traces(report, audit)
    return row


COLUMNS = (("inventory", "{}"), ("loops", "{:,}"), ("details", "{:,}"), ("charts", "{:,}"), ("read", "{:.2f}"),
           ("stages", "{:.1f}"), ("proposals", "{:.1f}"), ("build", "{:.2f}"), ("draw", "{:.2f}"),
           ("HTML", "{:.2f}"), ("html_cpu", "{:.2f}"), ("workers_cpu", "{:.2f}"), ("html_mb", "{:.2f}"), ("html_total", "{:.1f}"), ("PDF", "{:.1f}"),
           ("pages", "{}"), ("xlsx", "{:.2f}"), ("xlsx_cpu", "{:.2f}"), ("load", "{:.1f}"), ("traces_one", "{:.1f}"), ("traces_batch", "{:.2f}"),
           ("trace_models", "{}"))


def table(rows: list[dict]) -> str:
    """The figures as a Markdown table (times [s]; html_total: read + stages + report HTML)."""
    cols = [c for c, _ in COLUMNS if any(c in r for r in rows)]
    fmt = dict(COLUMNS)
    lines = ["| " + " | ".join(cols) + " |", "|" + "---|" * len(cols)]
    for r in rows:
        lines.append("| " + " | ".join(fmt[c].format(r[c]) if c in r else "-" for c in cols) + " |")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="Time the report of plant-audit, stage by stage.")
    ap.add_argument("--sizes", type=int, nargs="*", default=[100, 2000])
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--no-sample", action="store_true")
    ap.add_argument("--no-pdf", action="store_true")
    ap.add_argument("--traces", action="store_true", help="also time per-loop against batched step traces")
    ap.add_argument("--jobs", type=int, default=1, help="worker processes for the report, as `run --jobs`")
    args = ap.parse_args(argv)
    warnings.simplefilter("ignore", RuntimeWarning)
    from audit.generate import write_synthetic_inventory

    try:
        from engine import machine
        print(f"machine: {machine()}")
    except ImportError:
        pass
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        todo = ([("sample site", SAMPLE)] if not args.no_sample else [])
        for n in args.sizes:
            inv = Path(tmp) / f"site_{n}.xlsx"
            write_synthetic_inventory(inv, n, args.seed)
            todo.append((f"generated {n}", inv))
        for name, inv in todo:
            r = measure(inv, Path(tmp) / name.replace(" ", "_"), not args.no_pdf, args.traces, args.jobs)
            r["inventory"] = name
            rows.append(r)
            print(f"{name}: " + ", ".join(f"{k} {v:.2f}" for k, v in r.items() if isinstance(v, float)), flush=True)
    print()
    print(table(rows))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
