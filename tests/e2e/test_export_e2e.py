"""End to end: a generated site export through ``run --data`` finds what was planted.

Regression of the synthetic export (audit.generate_data, seed 5, 24 loops, 0.1 day of 1-s data):
every planted loop must show its fault in the health and model-check results. Bad exports are a
user's mistake (exit 2, one line) and leave a previous output folder as it was.
"""

from __future__ import annotations

import csv
import json

import pytest

from audit.cli import main


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("export")
    inv, data, out = tmp / "inv.xlsx", tmp / "export", tmp / "out"
    assert main(["generate", "--loops", "24", str(inv), "--data", str(data), "--days", "0.1", "--seed", "5"]) == 0
    code = main(["run", str(inv), "--data", str(data), "--out", str(out), "--quiet", "--no-history", "--no-pdf",
                 "--date", "2026-12-01"])
    rows = {r["tag"]: r for r in csv.DictReader(open(out / "results.csv", encoding="utf-8"))}
    planted = json.loads((data / "planted.json").read_text())
    return code, rows, planted, tmp


def _of(planted, kind):
    tags = [t for t, k in planted["planted"].items() if k == kind]
    assert tags, kind
    return tags


def test_every_row_back_and_every_simulated_loop_read(site):
    code, rows, planted, _ = site
    assert code in (0, 1) and len(rows) == 24
    for tag in planted["planted"]:
        assert rows[tag]["health_note"].startswith("export (tag "), tag
    for tag in planted["not_simulated"]:
        if tag in rows and rows[tag]["status"] != "invalid":
            assert "no data for tag" in rows[tag]["message"]


def test_planted_faults_are_found(site):
    _, rows, planted, _ = site
    for tag in _of(planted, "manual"):
        assert "mostly in manual" in rows[tag]["health_findings"]
    for tag in _of(planted, "pinned"):
        assert "output at its high limit" in rows[tag]["health_findings"]
    for tag in _of(planted, "sticking"):
        assert rows[tag]["valve_sticking"] == "true"
    for tag in _of(planted, "cycling"):
        assert rows[tag]["oscillating"] == "true"
        assert "enters from outside the loop" in rows[tag]["health_findings"]
    for tag in _of(planted, "stale"):
        assert rows[tag]["model_check"] == "disputed"
        assert float(rows[tag]["dead_time_diff_s"]) > 0
        assert "dead time" in rows[tag]["findings"]


def test_bad_export_is_exit_2_and_changes_nothing(site, tmp_path, capsys):
    _, _, _, tmp = site
    out = tmp / "out"
    before = (out / "results.csv").read_bytes()
    bad = tmp_path / "bad.csv"
    bad.write_text("when,what\n1,2\n", encoding="utf-8")
    for data, words in ((bad, "needs exactly one time column"), (tmp_path / "nothing", "nothing at that path")):
        code = main(["run", str(tmp / "inv.xlsx"), "--data", str(data), "--out", str(out), "--quiet",
                     "--no-history", "--no-pdf"])
        err = capsys.readouterr().err
        assert code == 2 and words in err and "internal" not in err
    assert (out / "results.csv").read_bytes() == before


def test_tags_of_the_export_not_in_the_inventory_are_counted(site, tmp_path, capsys):
    """An inventory of fewer loops than the export: the rest is counted and said."""
    _, _, planted, tmp = site
    from openpyxl import load_workbook
    wb = load_workbook(tmp / "inv.xlsx")
    ws = wb["loops"]
    ws.delete_rows(8, ws.max_row)
    wb.save(tmp_path / "few.xlsx")
    code = main(["run", str(tmp_path / "few.xlsx"), "--data", str(tmp / "export"), "--out", str(tmp_path / "o"),
                 "--no-history", "--no-pdf"])
    err = capsys.readouterr().err
    assert code in (0, 1)
    assert "of the export not in the inventory" in err
