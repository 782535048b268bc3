"""One audit, end to end: read, evaluate, write, record."""

from __future__ import annotations

import time
from pathlib import Path

from .output import output_columns, write_csv, write_json
from .pipeline import STAGES, Audit, AuditOptions, new_audit, run_stages


def run_audit(inventory_path: str, options: AuditOptions) -> tuple[Audit, dict[str, Path]]:
    """Read the inventory, run every stage, write every output; return the Audit and the files written.

    Parameters
    ----------
    inventory_path : str
        The loop inventory workbook (or CSV) to read.
    options : AuditOptions
        What the user asked for (output folder, date, jobs, history, quiet, ...).

    Returns
    -------
    tuple of (Audit, dict of str to Path)
        The finished run and the files written, by name (e.g. ``"results.csv"``).
    """
    from .cli import Progress
    from .inventory import read_inventory

    names = ["read"] + [s[0] for s in STAGES] + ["history", "write"]
    progress = Progress(names, options.quiet)
    progress("read")
    t0 = time.perf_counter()
    inv = read_inventory(inventory_path)
    audit = new_audit(inv, options)
    audit.timings["read"] = time.perf_counter() - t0
    run_stages(audit, progress)
    progress("history")
    if options.record_history:
        # recorded before the report is written, so the report can show what changed
        from .history import add_history
        t0 = time.perf_counter()
        add_history(audit)
        audit.timings["history"] = time.perf_counter() - t0
    progress("write")
    t0 = time.perf_counter()
    written = write_outputs(audit)
    audit.timings["write"] = time.perf_counter() - t0
    progress.close()
    return audit, written


def write_outputs(audit: Audit) -> dict[str, Path]:
    """results.csv, results.json, then the report and workbook.

    Parameters
    ----------
    audit : Audit
        The finished run; files go into ``audit.options.out_dir`` (created when missing).

    Returns
    -------
    dict of str to Path
        The files written, by name.
    """
    out = Path(audit.options.out_dir)
    out.mkdir(parents=True, exist_ok=True)
    cols = output_columns(audit.results, audit.inventory.extra_columns)
    written = {}
    write_csv(out / "results.csv", audit.results, cols)
    written["results.csv"] = out / "results.csv"
    write_json(out / "results.json", audit.results, cols, audit.meta)
    written["results.json"] = out / "results.json"
    from .render import write_outputs as render_outputs
    written.update(render_outputs(audit))
    return written
