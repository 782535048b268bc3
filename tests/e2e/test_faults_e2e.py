"""Hostile corpus, faults while writing: a failed run changes neither the history nor a previous output folder.

Each case first makes a good run (outputs and one audit in the history), then a second run that
fails in one way, and asserts the exit code, the one-line message, that the history still holds
exactly the first audit and that the output folder is byte for byte the first run's. The
expectations are the project's own rules (README, "Exit codes" and "Output folder"); common
practice for staged writes (write beside, rename into place, commit last).
"""

from __future__ import annotations

import csv
import errno
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from audit.cli import main
from audit.history import HistoryError, open_history

ROOT = Path(__file__).resolve().parents[2]

ROWS = [
    ["tag", "model", "gain", "tau1_s", "dead_time_s", "kc", "ti_s", "action"],
    ["FIC-101", "fopdt", 1.0, 10, 1, 0.5, 10, "reverse"],
    ["TIC-102", "fopdt", 2.0, 100, 20, 0.4, 90, "reverse"],
    ["LIC-103", "fopdt", "abc", 10, 1, 0.5, 10, "reverse"],
    ["PIC-104", "fopdt", 1.5, 5, 0.5, 1.2, 5, "reverse"],
]
TAGS = [r[0] for r in ROWS[1:]]


def write_inventory(path: Path) -> Path:
    with open(path, "w", newline="", encoding="utf-8") as fh:
        csv.writer(fh).writerows(ROWS)
    return path


def run(inv: Path, out: Path, history: Path, *extra: str, date: str = "2026-03-02") -> int:
    return main(["run", str(inv), "--out", str(out), "--history", str(history), "--quiet", "--no-pdf",
                 "--date", date, *extra])


def folder_state(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir()) if p.is_file()} if folder.exists() else {}


def history_state(history: Path) -> list[tuple]:
    with open_history(str(history), create=False) as store:
        return [(a.audit_id, a.date, a.loops) for a in store.audits()]


def leftovers(parent: Path) -> list[str]:
    return sorted(p.name for p in parent.iterdir() if ".partial-" in p.name or ".previous-" in p.name)


@pytest.fixture()
def site(tmp_path):
    """A folder with an inventory, a first good run in ``out`` and its audit in the history."""
    inv = write_inventory(tmp_path / "loops.csv")
    out, hist = tmp_path / "out", tmp_path / "history.sqlite"
    assert run(inv, out, hist, date="2026-03-01") == 1  # LIC-103 is invalid by design
    before = folder_state(out)
    assert set(before) == {"results.csv", "results.json", "report.html", "results.xlsx", "manifest.json"}
    rows = list(csv.DictReader(open(out / "results.csv", encoding="utf-8")))
    assert [r["tag"] for r in rows] == TAGS  # every row, in order
    return inv, out, hist, before, history_state(hist)


def assert_unchanged(site_, err: str) -> None:
    inv, out, hist, before, hist_before = site_
    assert folder_state(out) == before
    assert history_state(hist) == hist_before
    assert leftovers(out.parent) == []
    assert "internal error" not in err and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1


def test_second_good_run_replaces_the_folder_and_records_after(site):
    inv, out, hist, before, hist_before = site
    assert run(inv, out, hist, date="2026-03-02") == 1
    assert [a[1] for a in history_state(hist)] == ["2026-03-01", "2026-03-02"]
    assert '"date": "2026-03-02"' in (out / "manifest.json").read_text()
    assert leftovers(out.parent) == []


def test_out_naming_a_file(site, capsys, tmp_path):
    inv, out, hist, before, hist_before = site
    target = tmp_path / "notes.txt"
    target.write_text("mine")
    assert run(inv, target, hist) == 2
    err = capsys.readouterr().err
    assert "a file of that name exists" in err
    assert target.read_text() == "mine"
    assert run(inv, inv, hist) == 2  # the inventory itself
    assert "a file of that name exists" in capsys.readouterr().err
    assert inv.read_text(encoding="utf-8").splitlines()[1].startswith("FIC-101")
    assert_unchanged(site, err)


def test_full_disk_while_writing(site, capsys, monkeypatch):
    """A writer that fails with ENOSPC half way (the xlsx, written after the CSV, JSON and HTML)."""
    import audit.xlsx_out

    def full(audit, report, path):
        Path(path).write_bytes(b"PK\x03\x04 half")
        raise OSError(errno.ENOSPC, "No space left on device", str(path))

    monkeypatch.setattr(audit.xlsx_out, "write_results_xlsx", full)
    inv, out, hist, *_ = site
    assert run(inv, out, hist) == 2
    err = capsys.readouterr().err
    assert "No space left on device" in err and "nothing was changed" in err
    assert_unchanged(site, err)


def test_read_only_folder(site, capsys, monkeypatch):
    """A folder that refuses new entries (root ignores chmod, so the refusal is simulated)."""
    real_mkdir = Path.mkdir

    def refuse(self, *a, **k):
        if ".partial-" in self.name:
            raise PermissionError(errno.EACCES, "Permission denied", str(self))
        return real_mkdir(self, *a, **k)

    monkeypatch.setattr(Path, "mkdir", refuse)
    inv, out, hist, *_ = site
    assert run(inv, out, hist) == 2
    err = capsys.readouterr().err
    assert "Permission denied" in err and "nothing was changed" in err
    assert_unchanged(site, err)


def test_read_only_file_inside_the_staging_folder(site, capsys, monkeypatch):
    import audit.runner

    def refuse(path, *a, **k):
        raise PermissionError(errno.EACCES, "Permission denied", str(path))

    monkeypatch.setattr(audit.runner, "write_csv", refuse)
    inv, out, hist, *_ = site
    assert run(inv, out, hist) == 2
    err = capsys.readouterr().err
    assert "results.csv: Permission denied" in err
    assert_unchanged(site, err)


def test_history_that_refuses_the_audit_puts_the_previous_folder_back(site, capsys, monkeypatch):
    import audit.history

    def refuse(self, audit, payloads):
        raise HistoryError(f"history: could not record the audit in {self.target}: disk I/O error")

    monkeypatch.setattr(audit.history.HistoryStore, "_record", refuse)
    inv, out, hist, *_ = site
    assert run(inv, out, hist) == 2
    err = capsys.readouterr().err
    assert "disk I/O error" in err and "the results were not kept" in err
    assert_unchanged(site, err)


def test_history_refusal_in_a_shared_folder_restores_the_previous_outputs(tmp_path, capsys, monkeypatch):
    """Merge mode (the folder holds the inventory, --force): only the outputs move, and move back."""
    import audit.history

    inv = write_inventory(tmp_path / "loops.csv")
    hist = tmp_path / "h" / "history.sqlite"
    hist.parent.mkdir()
    assert run(inv, tmp_path, hist, "--force", date="2026-03-01") == 1
    before = folder_state(tmp_path)
    assert {"loops.csv", "results.csv", "manifest.json"} <= set(before)
    monkeypatch.setattr(audit.history.HistoryStore, "_record",
                        lambda self, a, p: (_ for _ in ()).throw(HistoryError("history: refused")))
    assert run(inv, tmp_path, hist, "--force") == 2
    assert "the results were not kept" in capsys.readouterr().err
    assert folder_state(tmp_path) == before
    assert [a[1] for a in history_state(hist)] == ["2026-03-01"]


KILLED_WRITER = """
import sys, time
from pathlib import Path
import audit.xlsx_out
def slow(audit, report, path):
    Path(path).write_bytes(b"PK half a workbook")
    Path(sys.argv[1]).write_text("writing")
    time.sleep(120)
audit.xlsx_out.write_results_xlsx = slow
from audit.cli import main
sys.exit(main(sys.argv[2:]))
"""


def test_killed_while_writing(site):
    """SIGKILL in the middle of writing: no cleanup can run, yet nothing the user had is touched."""
    inv, out, hist, before, hist_before = site
    flag = out.parent / "writing.flag"
    args = ["run", str(inv), "--out", str(out), "--history", str(hist), "--quiet", "--no-pdf",
            "--date", "2026-03-02"]
    proc = subprocess.Popen([sys.executable, "-c", KILLED_WRITER, str(flag), *args], cwd=ROOT,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        deadline = time.monotonic() + 240
        while not flag.exists():
            assert proc.poll() is None, "the run ended before it was killed"
            assert time.monotonic() < deadline
            time.sleep(0.2)
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait()
    assert proc.returncode == -signal.SIGKILL
    assert folder_state(out) == before
    assert history_state(hist) == hist_before
    # the staging folder of the killed run is left beside, marked as partial; the folder itself is whole
    stale = leftovers(out.parent)
    assert stale and all(".partial-" in n for n in stale)
    # the next run on this machine removes it (its process is gone), and leaves nothing of its own
    from audit.runner import _HOST
    kept = [f".{out.name}.partial-otherhost-{proc.pid}-abcdef",        # another machine's
            f".{out.name}.partial-{_HOST}-{10 ** 30}-abcdef"]          # no PID of this machine (os.kill overflows)
    for name in kept:
        (out.parent / name).mkdir()
    assert subprocess.run([sys.executable, "-m", "audit.cli", *args], cwd=ROOT, capture_output=True).returncode in (0, 1)
    assert leftovers(out.parent) == sorted(kept)


def test_out_holding_the_inventory_needs_force(tmp_path, capsys):
    inv = write_inventory(tmp_path / "loops.csv")
    original = inv.read_bytes()
    hist = tmp_path / "h.sqlite"
    assert run(inv, tmp_path, hist) == 2
    err = capsys.readouterr().err
    assert "holds the inventory loops.csv" in err and "--force" in err
    assert not hist.exists() and not (tmp_path / "results.csv").exists()
    assert run(inv, tmp_path, hist, "--force") == 1
    assert inv.read_bytes() == original  # beside the results, untouched
    rows = list(csv.DictReader(open(tmp_path / "results.csv", encoding="utf-8")))
    assert [r["tag"] for r in rows] == TAGS
    assert [a[2] for a in history_state(hist)] == [4]


def test_foreign_files_of_the_output_names_need_force(tmp_path, capsys):
    inv = write_inventory(tmp_path / "loops.csv")
    out = tmp_path / "shared"
    out.mkdir()
    (out / "notes.txt").write_text("keep me")
    (out / "report.html").write_text("<p>someone else's report</p>")
    hist = tmp_path / "h.sqlite"
    assert run(inv, out, hist) == 2
    err = capsys.readouterr().err
    assert "report.html" in err and "--force" in err
    assert (out / "report.html").read_text() == "<p>someone else's report</p>" and not hist.exists()
    assert run(inv, out, hist, "--force") == 1
    assert (out / "notes.txt").read_text() == "keep me"
    assert "plant-audit" in (out / "manifest.json").read_text()
    # next time the manifest says the outputs are ours: no --force needed, notes.txt still kept
    assert run(inv, out, hist, date="2026-03-03") == 1
    assert (out / "notes.txt").read_text() == "keep me"
    assert len(history_state(hist)) == 2


def test_no_history_leaves_none(tmp_path):
    inv = write_inventory(tmp_path / "loops.csv")
    assert main(["run", str(inv), "--out", str(tmp_path / "o"), "--no-history", "--quiet", "--no-pdf"]) == 1
    assert not (tmp_path / "audit-history.sqlite").exists()
    assert os.path.exists(tmp_path / "o" / "manifest.json")


def test_move_failing_half_way_in_a_shared_folder_puts_everything_back(tmp_path, capsys, monkeypatch):
    """Merge mode: the third file's move fails; the two already moved go back, the old ones return."""
    inv = write_inventory(tmp_path / "loops.csv")
    hist = tmp_path / "h" / "history.sqlite"
    hist.parent.mkdir()
    assert run(inv, tmp_path, hist, "--force", date="2026-03-01") == 1
    before, hist_before = folder_state(tmp_path), history_state(hist)
    real_replace, moved = os.replace, []

    def flaky(src, dst):
        if Path(src).parent.name.startswith(".") and ".partial-" in Path(src).parent.name:
            moved.append(Path(dst).name)
            if len(moved) == 3:
                raise OSError(errno.EIO, "Input/output error", str(dst))
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", flaky)
    assert run(inv, tmp_path, hist, "--force") == 2
    err = capsys.readouterr().err
    assert "Input/output error" in err and "nothing was changed" in err
    monkeypatch.undo()
    assert folder_state(tmp_path) == before
    assert history_state(hist) == hist_before
    assert leftovers(tmp_path) == []
