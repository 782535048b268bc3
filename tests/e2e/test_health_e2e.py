"""End to end: the loop-health figures of the sample site's operating records through main(argv).

Regression of the sample site's five cases (sample_site/operation/make_operation.py, seeded): each
record was made to show one thing, and the audit must say that thing and take the action that follows.
Bad records: every problem named by file and line, the row kept, the rest of the audit intact.
"""

from __future__ import annotations

import csv
from pathlib import Path

import pytest

from audit.cli import main

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample_site" / "loops.xlsx"


def _run(args: list[str]) -> int:
    return main(["run", *args, "--quiet", "--no-history", "--no-pdf", "--date", "2026-12-01"])


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    out = tmp_path_factory.mktemp("health") / "out"
    code = _run([str(SAMPLE), "--out", str(out), "--site", "Larkmoor Water Reclamation Works"])
    rows = {r["tag"]: r for r in csv.DictReader(open(out / "results.csv", encoding="utf-8"))}
    return code, rows, (out / "report.html").read_text(encoding="utf-8")


def test_every_row_back_and_only_five_with_records(site):
    code, rows, _ = site
    assert code in (0, 1) and len(rows) == 71   # every row of the sample site
    with_records = {t for t, r in rows.items() if r["health_note"].startswith("operation/")}
    assert with_records == {"FIC-106", "FIC-241", "FIC-211", "TIC-402", "FIC-305"}


@pytest.mark.parametrize("tag,action,words", [
    ("FIC-106", "return the loop to automatic", "mostly in manual"),
    ("FIC-241", "check valve sizing or range", "output at its high limit"),
    ("FIC-211", "check the valve: suspected sticking, retuning will not cure it", "valve suspected sticking"),
    ("TIC-402", "retune", "oscillating"),
    ("FIC-305", "retune", "enters from outside the loop"),
])
def test_each_case_says_its_finding_and_takes_its_action(site, tag, action, words):
    _, rows, _ = site
    r = rows[tag]
    assert action in r["action"].split("; ")         # the model check may add its own action beside it
    assert words in r["health_findings"]
    if tag == "FIC-211":
        assert "retune" not in r["action"].split("; ")
    assert r["rank"] != ""


def test_sticking_valve_flags(site):
    _, rows, _ = site
    assert rows["FIC-211"]["valve_sticking"] == "true"
    assert float(rows["FIC-211"]["stiction_index"]) >= 0.7
    assert rows["FIC-305"]["valve_sticking"] == "false" and rows["TIC-402"]["valve_sticking"] == "false"
    assert rows["FIC-211"]["verdict"] != "retune"


def test_report_has_site_summary_and_loop_charts(site):
    _, _, html = site
    assert "From the operating records" in html
    for tag in ("FIC-106", "FIC-241", "FIC-211", "TIC-402", "FIC-305"):
        assert f'>{tag}</a>' in html
    assert html.count('class="chart chart-health"') >= 13          # trends for 5, pv-op and ACF where closed
    assert "Autocorrelation: oscillation with a period of" in html


def test_bad_records_named_by_file_and_line_rest_intact(tmp_path):
    (tmp_path / "good.csv").write_text(
        "time_s,sp,pv,op,mode\n" + "".join(f"{k},50,{50 + (k % 7) * 0.01:.3f},40,AUTO\n" for k in range(600)),
        encoding="utf-8")
    bad = ["time_s,sp,pv,op,mode"] + [f"{k},50,50.1,40,AUTO" for k in range(300)]
    bad[120] = "119,50,Bad Value,40,AUTO"
    bad[200] = "nonsense,50,50,40,AUTO"
    (tmp_path / "bad.csv").write_text("\n".join(bad) + "\n", encoding="utf-8")
    inv = tmp_path / "loops.csv"
    inv.write_text("tag,service,area,criticality,model,gain,tau1_s,dead_time_s,form,kc,ti_s,action,sample_s,"
                   "data_file\n"
                   "F-1,flow,A,medium,fopdt,1,5,1,ideal,0.5,5,reverse,0.5,good.csv\n"
                   "F-2,flow,A,medium,fopdt,1,5,1,ideal,0.5,5,reverse,0.5,bad.csv\n"
                   "F-3,flow,A,medium,fopdt,1,5,1,ideal,0.5,5,reverse,0.5,missing.csv\n"
                   "F-4,flow,A,medium,fopdt,1,5,1,ideal,0.5,5,reverse,0.5,\n", encoding="utf-8")
    out = tmp_path / "out"
    assert _run([str(inv), "--out", str(out)]) in (0, 1)
    rows = {r["tag"]: r for r in csv.DictReader(open(out / "results.csv", encoding="utf-8"))}
    assert list(rows) == ["F-1", "F-2", "F-3", "F-4"]
    assert rows["F-1"]["auto_pct"] == "100.0" and rows["F-1"]["oscillating"] == "false"
    note2 = rows["F-2"]["health_note"]
    assert "bad.csv line 121" in note2 and "bad.csv line 201" in note2
    assert rows["F-2"]["auto_pct"] != ""                       # the rest of the record still used
    assert "missing.csv" in rows["F-3"]["health_note"] and rows["F-3"]["auto_pct"] == ""
    assert rows["F-4"]["health_note"] == "" and rows["F-4"]["ms"] != ""
    for r in rows.values():
        assert r["ms"] != ""                                   # model figures untouched
