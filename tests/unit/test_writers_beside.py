"""The writers of a whole audit with a pool: results.csv/json and results.xlsx written beside the page.

With ``--jobs`` above 1 the tables and the workbook are written by the report pool's workers (forked with
the run) while the main process builds and renders the page; the files must be those of one process, and a failure of any writer must leave a previous output
folder as it was (the project's rules, "Output folder"; common practice for staged writes: write beside,
rename into place, commit last). The column writers are checked against the value-by-value encoders
over awkward values (Python's float repr and the json module; common practice).
"""

from __future__ import annotations

import csv
import errno
import io
import json
import math
import re
import zipfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from audit.output import csv_cell, plain, write_csv, write_json
from audit.runner import write_outputs

from .test_report_support import make_audit

AWKWARD = [math.nan, math.inf, -math.inf, -0.0, 0.0, 1e-300, 5e-324, 1e21, 1e16, 9007199254740993.0,
           5.0, -12.0, 0.1 + 0.2, 1 / 3, 123456789.125, -2.5e-7]
"""Floats whose text is easy to get wrong: NaN, infinities, negative zero, subnormal and huge values, the
switch to exponent notation at 1e16, integers stored as floats, and values with 17 significant digits."""


def _xlsx_parts(path: Path) -> dict[str, bytes]:
    """Every part of a workbook package, the time of writing (docProps/core.xml) left out."""
    with zipfile.ZipFile(path) as zf:
        return {name: re.sub(rb"<dcterms:(created|modified)[^<]*</dcterms:\1>", b"", zf.read(name))
                for name in zf.namelist()}


def test_outputs_with_a_pool_are_the_files_of_one_process(tmp_path):
    """--jobs 2 (tables and workbook beside the page) writes the same bytes as --jobs 1 (one after another):
    results.csv, results.json and report.html byte for byte, every part of results.xlsx."""
    audit = make_audit(tmp_path / "unused")
    one = write_outputs(audit, tmp_path / "one")
    audit.options.jobs = 2
    two = write_outputs(audit, tmp_path / "two")
    assert list(one) == list(two) == ["results.csv", "results.json", "report.html", "results.xlsx"]
    for name in ("results.csv", "results.json", "report.html"):
        assert (tmp_path / "one" / name).read_bytes() == (tmp_path / "two" / name).read_bytes(), name
    assert _xlsx_parts(tmp_path / "one" / "results.xlsx") == _xlsx_parts(tmp_path / "two" / "results.xlsx")
    assert "results.xlsx" in audit.timings and "report.html" in audit.timings


@pytest.mark.parametrize("jobs", [1, 2])
def test_a_failing_table_writer_stops_the_write(tmp_path, monkeypatch, jobs):
    """An error of the CSV writer reaches the caller (with a pool, from the worker that wrote it)."""
    import audit.runner

    def broken(path, results, columns):
        raise OSError(errno.EIO, "Input/output error", str(path))

    monkeypatch.setattr(audit.runner, "write_csv", broken)
    au = make_audit(tmp_path / "unused")
    au.options.jobs = jobs
    with pytest.raises(OSError, match="Input/output error"):
        write_outputs(au, tmp_path / "out")


def test_a_failing_report_with_a_pool_does_not_wait_for_ever(tmp_path, monkeypatch):
    """The tables are queued after the pool's first tasks; a report that fails before any still queues
    them: the error is raised, and the tables were written (the staging folder is discarded)."""
    import audit.render

    def broken(*args, **kwargs):
        raise ValueError("report model broken")

    monkeypatch.setattr(audit.render, "build_report", broken)
    au = make_audit(tmp_path / "unused")
    au.options.jobs = 2
    with pytest.raises(ValueError, match="report model broken"):
        write_outputs(au, tmp_path / "out")
    assert (tmp_path / "out" / "results.csv").exists() and not (tmp_path / "out" / "report.html").exists()


def test_with_a_pool_the_main_process_writes_neither_tables_nor_workbook(tmp_path, monkeypatch):
    """--jobs 2: results.csv, results.json and results.xlsx are written by the pool's workers, not by the
    process that renders the page (the point of the arrangement: that process's CPU goes to the page), and
    the files are still those of one process."""
    import os

    import audit.runner
    import audit.xlsx_out

    log = tmp_path / "pids.txt"

    def traced(fn, name):
        def call(*args, **kwargs):
            with open(log, "a", encoding="utf-8") as fh:
                fh.write(f"{name} {os.getpid()}\n")
            return fn(*args, **kwargs)
        return call

    au = make_audit(tmp_path / "unused")
    one = write_outputs(au, tmp_path / "one")
    monkeypatch.setattr(audit.runner, "write_csv", traced(audit.runner.write_csv, "csv"))
    monkeypatch.setattr(audit.runner, "write_json", traced(audit.runner.write_json, "json"))
    monkeypatch.setattr(audit.xlsx_out, "write_results_xlsx", traced(audit.xlsx_out.write_results_xlsx, "xlsx"))
    au.options.jobs = 2
    two = write_outputs(au, tmp_path / "two")
    seen = dict(line.split() for line in log.read_text(encoding="utf-8").splitlines())
    assert sorted(seen) == ["csv", "json", "xlsx"]
    assert str(os.getpid()) not in seen.values()
    assert list(one) == list(two)
    for name in ("results.csv", "results.json"):
        assert (tmp_path / "one" / name).read_bytes() == (tmp_path / "two" / name).read_bytes(), name
    assert _xlsx_parts(tmp_path / "one" / "results.xlsx") == _xlsx_parts(tmp_path / "two" / "results.xlsx")


def test_without_fork_the_tables_are_written_first_and_the_files_are_the_same(tmp_path, monkeypatch):
    """Where the platform does not fork (render._FORK None) the workers cannot inherit the run: the tables
    are written before the page and the workbook after it, by this process; the same files (regression)."""
    import audit.render

    au = make_audit(tmp_path / "unused")
    write_outputs(au, tmp_path / "one")
    monkeypatch.setattr(audit.render, "_FORK", None)
    au.options.jobs = 2
    write_outputs(au, tmp_path / "two")
    for name in ("results.csv", "results.json", "report.html"):
        assert (tmp_path / "one" / name).read_bytes() == (tmp_path / "two" / name).read_bytes(), name
    assert _xlsx_parts(tmp_path / "one" / "results.xlsx") == _xlsx_parts(tmp_path / "two" / "results.xlsx")


def test_the_workbook_reads_only_the_part_of_the_report_sent_to_a_worker(tmp_path):
    """results.xlsx from the report model without its detail sections, loop lines and page-only parts
    (render._book_part, what a worker is sent) is the workbook of the whole model, part for part."""
    from audit.render import _book_part
    from audit.report import build_report
    from audit.xlsx_out import write_results_xlsx

    au = make_audit(tmp_path / "unused")
    report = build_report(au, plot_limit=2)
    part = _book_part(report)
    assert report.details and report.loops and not part.details and not part.loops
    write_results_xlsx(au, report, tmp_path / "whole.xlsx")
    write_results_xlsx(au, part, tmp_path / "part.xlsx")
    assert _xlsx_parts(tmp_path / "whole.xlsx") == _xlsx_parts(tmp_path / "part.xlsx")


def _frame() -> pd.DataFrame:
    n = len(AWKWARD)
    objects = [None, pd.NA, True, False, 0, -7, 2 ** 63, "", "plain", "=1+1", "+x", "-y", "@z", "\tq", "\rr",
               "caf\u00e9 \u2013 \"q\" \\ \x01"]
    assert len(objects) == n
    return pd.DataFrame({
        "row": np.arange(2, n + 2),
        "ms": np.array(AWKWARD),
        "findings": pd.Series(objects, dtype=object),
        "note": pd.Series(AWKWARD, dtype=object),             # floats held in an object column
        "band_ok": pd.array([None if i % 3 == 0 else bool(i % 2) for i in range(n)], dtype="boolean"),
        "rank": pd.array([None if i % 4 == 0 else i for i in range(n)], dtype="Int64"),
    })


def test_float_text_is_python_repr_over_awkward_values(tmp_path):
    """results.csv writes a finite float as Python's repr (shortest text that reads back to the same
    float), blank for NaN, inf/-inf; results.json the same numbers, null and "inf"/"-inf" (strict JSON)."""
    df = _frame()
    cols = list(df.columns)
    write_csv(tmp_path / "r.csv", df, cols)
    with open(tmp_path / "r.csv", encoding="utf-8", newline="") as fh:
        got = list(csv.reader(fh))
    ms = [line[cols.index("ms")] for line in got[1:]]
    want = ["" if math.isnan(v) else ("inf" if v == math.inf else "-inf" if v == -math.inf else repr(v))
            for v in AWKWARD]
    assert ms == want
    assert ms[AWKWARD.index(-0.0)] == "-0.0" and ms[AWKWARD.index(1e21)] == "1e+21"
    assert ms[AWKWARD.index(1e16)] == "1e+16" and ms[AWKWARD.index(5.0)] == "5.0"
    assert all(float(t) == v for t, v in zip(ms, AWKWARD) if t not in ("", "inf", "-inf"))
    write_json(tmp_path / "r.json", df, cols, {"tool": "plant-audit"})
    loops = json.loads((tmp_path / "r.json").read_text(encoding="utf-8"))["loops"]
    for rec, v in zip(loops, AWKWARD):
        got_v = rec["ms"]
        if math.isnan(v):
            assert got_v is None
        elif math.isinf(v):
            assert got_v == ("inf" if v > 0 else "-inf")
        else:
            assert got_v == v and math.copysign(1, got_v) == math.copysign(1, v)


def test_column_writers_equal_the_value_by_value_encoders(tmp_path):
    """Every column (float, object of mixed kinds, nullable boolean and integer) gives the bytes of
    csv_cell / plain + json.dump value by value, formula-like text neutralised in the CSV (regression)."""
    df = _frame()
    cols = list(df.columns)
    write_csv(tmp_path / "r.csv", df, cols)
    buf = io.StringIO(newline="")
    wr = csv.writer(buf)
    wr.writerow(cols)
    wr.writerows([csv_cell(v) for v in rec] for rec in df[cols].itertuples(index=False, name=None))
    assert (tmp_path / "r.csv").read_bytes().decode("utf-8") == buf.getvalue()
    assert "'=1+1" in buf.getvalue() and "'@z" in buf.getvalue() and ",'-y," in buf.getvalue()
    meta = {"tool": "plant-audit"}
    write_json(tmp_path / "r.json", df, cols, meta)
    rows = [dict(zip(cols, (plain(v) for v in rec))) for rec in df[cols].itertuples(index=False, name=None)]
    want = json.dumps({**meta, "columns": cols, "loops": rows}, indent=1, allow_nan=False, ensure_ascii=False)
    assert (tmp_path / "r.json").read_text(encoding="utf-8") == want + "\n"
