"""A whole run with --jobs 2: the tables and the workbook written beside the page, the run still atomic.

A failed run changes neither the history nor a previous output folder (the project's rules, "Output
folder"; common practice for staged writes: write beside, rename into place, commit last), also when
the failing writer runs in a worker of the report's pool; a good run writes the files of one process.
"""

from __future__ import annotations

import errno
import re
import zipfile
from pathlib import Path

from .test_faults_e2e import assert_unchanged, run, site  # noqa: F401  (the fixture)


def _xlsx_parts(path: Path) -> dict[str, bytes]:
    """Every part of a workbook package, the time of writing (docProps/core.xml) left out."""
    with zipfile.ZipFile(path) as zf:
        return {name: re.sub(rb"<dcterms:(created|modified)[^<]*</dcterms:\1>", b"", zf.read(name))
                for name in zf.namelist()}


def test_failing_workbook_beside_the_page_leaves_the_previous_folder(site, capsys, monkeypatch):  # noqa: F811
    """A whole run with --jobs 2 whose workbook writer fails half way (in a worker of the report's pool):
    exit 2, one line naming the error, the previous output folder and the history as they were."""
    import audit.xlsx_out

    def full(audit, report, path):
        Path(path).write_bytes(b"PK\x03\x04 half")
        raise OSError(errno.ENOSPC, "No space left on device", str(path))

    monkeypatch.setattr(audit.xlsx_out, "write_results_xlsx", full)
    inv, out, hist, *_ = site
    assert run(inv, out, hist, "--jobs", "2") == 2
    err = capsys.readouterr().err
    assert "No space left on device" in err and "nothing was changed" in err
    assert_unchanged(site, err)


def test_a_good_run_with_a_pool_writes_what_one_process_writes(site, tmp_path):  # noqa: F811
    """The CLI with --jobs 2 and with --jobs 1 on the same inventory and date: the same results files."""
    inv, out, hist, *_ = site
    a, b = tmp_path / "a", tmp_path / "b"
    assert run(inv, a, hist, "--jobs", "1", "--no-history") == 1
    assert run(inv, b, hist, "--jobs", "2", "--no-history") == 1
    for name in ("results.csv", "results.json", "report.html"):
        assert (a / name).read_bytes() == (b / name).read_bytes(), name
    assert _xlsx_parts(a / "results.xlsx") == _xlsx_parts(b / "results.xlsx")
