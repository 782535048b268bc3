"""End to end: `plant-audit run` through main(argv) into a temporary folder.

Validation of units at the door (closed-form conversions, common practice) and regression of the
results files' shape.
"""

from __future__ import annotations

import csv
import hashlib
import json
import math
from pathlib import Path

import pytest

from audit.cli import main

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample_site" / "loops.xlsx"
FIG = ["stable", "gm", "gm_db", "w180_rad_s", "pm_deg", "wc_rad_s", "dm_s", "ms", "w_ms_rad_s", "mt",
       "wb_rad_s", "band_s_db", "band_l_db"]


def run(args: list[str]) -> int:
    return main(["run", *args, "--quiet", "--no-history", "--no-pdf", "--date", "2026-12-01"])


def load(out: Path) -> tuple[list[dict], dict]:
    rows = list(csv.DictReader(open(out / "results.csv", encoding="utf-8")))
    doc = json.loads((out / "results.json").read_text())
    return rows, doc


def write_csv(path: Path, header: list[str], rows: list[list]) -> Path:
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(header)
        w.writerows(rows)
    return path


def test_sample_site_every_row_comes_back(tmp_path):
    code = run([str(SAMPLE), "--out", str(tmp_path)])
    assert code == 1  # the invented site has failing loops by design
    rows, doc = load(tmp_path)
    from audit.inventory import read_inventory
    inv = read_inventory(SAMPLE)
    assert [r["tag"] for r in rows] == [r.tag or "" for r in inv.rows]
    assert doc["inventory_sha256"] == hashlib.sha256(SAMPLE.read_bytes()).hexdigest()
    assert doc["inventory"] == "loops.xlsx" and doc["tool_version"] and doc["policy"]["ms_max"] > 1
    statuses = {r["status"] for r in rows}
    assert {"passes", "fails", "unstable", "invalid"} <= statuses
    for r in rows:
        if r["status"] == "invalid":
            assert "loops!" in r["message"]


def test_unit_twins_give_identical_figures(tmp_path):
    """Closed-form conversions at the door: kc = 100/PB, ti = 1/reset_rpm min, times in min and h,
    gain = gain_eu * 100/(pv_hi - pv_lo) (common practice). The twins' figures are identical."""
    head = ["tag", "model", "gain", "gain_eu", "pv_lo", "pv_hi", "tau1_s", "tau1_min", "dead_time_s",
            "dead_time_h", "form", "kc", "pb_pct", "ti_s", "reset_rpm", "td_s", "td_min", "action",
            "band_rad_s", "attenuation_db"]
    rows = [
        ["A-S", "fopdt", 1.6, "", "", "", 120, "", 36, "", "ideal", 1.25, "", 150, "", 30, "", "reverse", 0.002, 10],
        ["A-U", "fopdt", "", 4.0, 0, 250, "", 2, "", 0.01, "ideal", "", 80, "", 0.4, "", 0.5, "reverse", 0.002, 10],
    ]
    inv = write_csv(tmp_path / "twins.csv", head, rows)
    out = tmp_path / "out"
    run([str(inv), "--out", str(out)])
    res, _ = load(out)
    a, b = res
    for c in FIG:
        if c == "stable":
            assert a[c] == b[c] == "true"
            continue
        x, y = float(a[c] or "nan"), float(b[c] or "nan")
        assert (math.isnan(x) and math.isnan(y)) or x == pytest.approx(y, rel=1e-12), c


def test_bad_rows_are_invalid_and_do_not_disturb_the_others(tmp_path):
    """Each bad row comes out `invalid` with a message naming its cell; good rows keep the
    figures they have when audited alone (regression)."""
    head = ["tag", "model", "gain", "tau1_s", "dead_time_s", "num", "den", "form", "kc", "ti_s", "action"]
    good = [["G-1", "fopdt", 1, 10, 1, "", "", "ideal", 5, 10, "reverse"],
            ["G-2", "ipdt", 0.01, "", 5, "", "", "ideal", 10, 40, "reverse"]]
    bad = [["B-NEG", "fopdt", 1, -10, 1, "", "", "ideal", 5, 10, "reverse"],
           ["B-GAIN", "fopdt", "", 10, 1, "", "", "ideal", 5, 10, "reverse"],
           ["B-WORD", "fopdtx", 1, 10, 1, "", "", "ideal", 5, 10, "reverse"],
           ["B-TEXT", "fopdt", 1, 10, 1, "", "", "ideal", 5, "abc", "reverse"],
           ["G-1", "fopdt", 1, 10, 1, "", "", "ideal", 5, 10, "reverse"],
           ["B-IMP", "tf", "", "", 1, "1 2 3", "1 1", "ideal", 5, 10, "reverse"]]
    mixed = write_csv(tmp_path / "mixed.csv", head, [good[0], *bad, good[1]])
    alone = write_csv(tmp_path / "alone.csv", head, [good[1]])
    run([str(mixed), "--out", str(tmp_path / "m")])
    run([str(alone), "--out", str(tmp_path / "a")])
    res, _ = load(tmp_path / "m")
    assert len(res) == 8
    expect_cells = {"B-NEG": "D", "B-GAIN": "C", "B-WORD": "B", "B-TEXT": "J", "B-IMP": "F"}
    for r in res[1:7]:
        assert r["status"] == "invalid", r["tag"]
        if r["tag"] in expect_cells:
            assert f"loops!{expect_cells[r['tag']]}" in r["message"] or \
                   f"mixed!{expect_cells[r['tag']]}" in r["message"], (r["tag"], r["message"])
    # the duplicate tag makes both G-1 rows invalid, each naming the other row
    assert res[0]["status"] == "invalid" and "row(s) 7" in res[0]["message"]
    ref, _ = load(tmp_path / "a")
    for c in FIG:
        assert res[7][c] == ref[0][c], c


def test_unreadable_inventory_exit_2_one_line(tmp_path, capsys):
    p = tmp_path / "not.xlsx"
    p.write_text("this is not a workbook")
    assert run([str(p), "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "Traceback" not in err[0]


def test_all_passing_exit_0(tmp_path):
    head = ["tag", "model", "gain", "tau1_s", "dead_time_s", "form", "kc", "ti_s", "action"]
    inv = write_csv(tmp_path / "ok.csv", head, [["G-1", "fopdt", 1, 10, 1, "ideal", 2.5, 10, "reverse"]])
    assert run([str(inv), "--out", str(tmp_path / "o")]) == 0
