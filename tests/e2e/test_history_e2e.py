"""Periodic audits end to end: three audits of an invented plant with edits in between.

Each audit reads a CSV inventory with the real reader, builds the loop models and
evaluates them with the real frequency stage, then runs the history stage
(:func:`audit.history.add_history`) with the default history beside the inventory.
The history command is then run through ``audit.cli.main``.

Regression/behaviour test: the changes between audits are known by construction.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path

import pytest

from audit.cli import main
from audit.history import DEFAULT_FILE_NAME, HistorySection, add_history, open_history
from audit.inventory import read_inventory
from audit.pipeline import AuditOptions, build_models, evaluate_frequency, new_audit

HEADER = "tag,model,gain,tau1_s,dead_time_s,kc,pb_pct,ti_s,reset_rpm,action,band_rad_s,attenuation_db\n"

FIRST = HEADER + """\
FIC-101,fopdt,1.0,60,10,6.0,,30,,reverse,0.005,6
TIC-200,fopdt,1.5,300,30,,200,300,,reverse,,
LIC-300,fopdt,0.8,120,20,1.2,,120,,reverse,,
PIC-400,fopdt,1.0,30,3,1.0,,30,,reverse,,
"""
# FIC-101 retuned (Kc 6 -> 1.5, Ti 30 -> 60 s); TIC-200 re-entered in other units only
# (PB 200 % = Kc 0.5; 0.2 repeats/min = Ti 300 s: the same tuning); AIC-500 added.
SECOND = HEADER + """\
FIC-101,fopdt,1.0,60,10,1.5,,60,,reverse,0.005,6
TIC-200,fopdt,1.5,300,30,0.5,,,0.2,reverse,,
LIC-300,fopdt,0.8,120,20,1.2,,120,,reverse,,
PIC-400,fopdt,1.0,30,3,1.0,,30,,reverse,,
AIC-500,fopdt,2.0,200,40,0.4,,200,,reverse,,
"""
# LIC-300's model updated after a step test (gain 0.8 -> 5.0); PIC-400 removed.
THIRD = HEADER + """\
FIC-101,fopdt,1.0,60,10,1.5,,60,,reverse,0.005,6
TIC-200,fopdt,1.5,300,30,0.5,,,0.2,reverse,,
LIC-300,fopdt,5.0,120,20,1.2,,120,,reverse,,
AIC-500,fopdt,2.0,200,40,0.4,,200,,reverse,,
"""


def run_audit(folder: Path, text: str, date: str, site: str = "Larkmoor test works"):
    """Write the inventory, evaluate it with the real stages and run the history stage."""
    path = folder / "loops.csv"
    path.write_text(text)
    audit = new_audit(read_inventory(path), AuditOptions(out_dir=str(folder / "out"), site=site, date=date))
    build_models(audit)
    evaluate_frequency(audit)
    add_history(audit)
    return audit


def tags(items) -> list[str]:
    return [x.tag for x in items]


def test_three_audits_name_exactly_the_changes(tmp_path, capsys):
    a1 = run_audit(tmp_path, FIRST, "2026-01-05")
    a2 = run_audit(tmp_path, SECOND, "2026-04-06")
    a3 = run_audit(tmp_path, THIRD, "2026-07-06")
    status = {t: s for t, s in zip(a1.results["tag"], a1.results["status"])}
    assert status["FIC-101"] == "fails"  # the starting point the scenario needs

    h1, h2, h3 = (a.extras["history"] for a in (a1, a2, a3))
    assert isinstance(h1, HistorySection) and h1.changes.first_audit
    assert h1.target == str((tmp_path / DEFAULT_FILE_NAME).resolve())

    c2 = h2.changes
    assert not c2.first_audit and c2.previous_audit_id == h1.audit_id and c2.previous_date == "2026-01-05"
    assert tags(c2.tuning_changed) == ["FIC-101"]          # TIC-200's change of units is not a retune
    assert c2.tuning_changed[0].old == "ideal PID: Kc 6, Ti 30 s, Td 0 s; reverse acting"
    assert c2.tuning_changed[0].new == "ideal PID: Kc 1.5, Ti 60 s, Td 0 s; reverse acting"
    assert tags(c2.model_changed) == []
    assert tags(c2.new_loops) == ["AIC-500"] and tags(c2.removed_loops) == []
    assert tags(c2.fixed) == ["FIC-101"] and tags(c2.newly_failing) == []
    assert {m.figure for m in c2.moved if m.tag == "FIC-101"} >= {"ms", "gm_db", "pm_deg"}
    assert {m.tag for m in c2.moved} == {"FIC-101"}
    assert c2.work_list_acted_on is None  # no ranking stage in this run: tolerated

    c3 = h3.changes
    assert tags(c3.tuning_changed) == []
    assert tags(c3.model_changed) == ["LIC-300"]
    assert "gain 0.8," in c3.model_changed[0].old and "gain 5," in c3.model_changed[0].new
    assert tags(c3.new_loops) == [] and tags(c3.removed_loops) == ["PIC-400"]
    assert tags(c3.newly_failing) == ["LIC-300"] and tags(c3.fixed) == []
    assert {m.tag for m in c3.moved} == {"LIC-300"}

    # trends for the report
    assert [m.date for m in h3.status_mix] == ["2026-01-05", "2026-04-06", "2026-07-06"]
    assert sum(h3.status_mix[0].counts.values()) == 4 and sum(h3.status_mix[2].counts.values()) == 4
    fic = h3.series["FIC-101"]
    assert fic.dates == ["2026-01-05", "2026-04-06", "2026-07-06"]
    assert fic.ms[0] > 2.0 > fic.ms[1] and fic.ms[1] == pytest.approx(fic.ms[2], rel=1e-12)
    assert all(b is not None and math.isfinite(b) for b in fic.band_margin_db)
    assert h3.series["AIC-500"].audit_ids == [h2.audit_id, h3.audit_id]
    assert "PIC-400" not in h3.series

    # the command line lists the audits and one loop over time
    db = str(tmp_path / DEFAULT_FILE_NAME)
    capsys.readouterr()
    assert main(["history", "--db", db]) == 0
    lines = capsys.readouterr().out.strip().splitlines()
    assert lines[0].split()[:5] == ["audit", "date", "site", "inventory", "loops"]
    assert len(lines) == 4 and all("Larkmoor test works" in line for line in lines[1:])
    assert main(["history", "--db", db, "--tag", "FIC-101", "--csv"]) == 0
    rows = list(csv.DictReader(capsys.readouterr().out.splitlines()))
    assert [r["date"] for r in rows] == ["2026-01-05", "2026-04-06", "2026-07-06"]
    assert rows[0]["tuning"].startswith("ideal PID: Kc 6,") and rows[1]["status"] == "passes"
    assert float(rows[0]["ms"]) > 2.0


def test_same_inventory_twice_is_two_audits_and_sites_stay_apart(tmp_path):
    run_audit(tmp_path, FIRST, "2026-01-05")
    again = run_audit(tmp_path, FIRST, "2026-01-05")
    other = run_audit(tmp_path, FIRST, "2026-01-05", site="")
    c = again.extras["history"].changes
    assert not c.first_audit
    assert not (c.tuning_changed or c.model_changed or c.new_loops or c.removed_loops or c.moved
                or c.newly_failing or c.fixed)
    assert other.extras["history"].changes.first_audit  # the empty site is a site of its own
    with open_history(str(tmp_path / DEFAULT_FILE_NAME)) as store:
        assert [s.site for s in store.audits()] == ["Larkmoor test works", "Larkmoor test works", ""]


def test_no_history_option_records_nothing(tmp_path):
    path = tmp_path / "loops.csv"
    path.write_text(FIRST)
    audit = new_audit(read_inventory(path), AuditOptions(site="x", date="2026-01-05", record_history=False))
    build_models(audit)
    evaluate_frequency(audit)
    add_history(audit)
    assert "history" not in audit.extras
    assert not (tmp_path / DEFAULT_FILE_NAME).exists()


def test_history_command_without_database(tmp_path, capsys):
    assert main(["history", "--db", str(tmp_path / "none.sqlite")]) == 2
    assert "no history database" in capsys.readouterr().err
    assert not (tmp_path / "none.sqlite").exists()
