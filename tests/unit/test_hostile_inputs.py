"""Hostile and careless inputs: one bad value, record, header or tag never ends the run or drops a row.

Regression corpus of the documented behaviour (README, 'Ranges: what a row may hold', 'Disturbance
records', 'The inventory'; common practice for untrusted input): every case runs ``main([...])`` and
asserts the exit code, the message (sheet, cell and column), that every inventory row is in the
results in inventory order, and that no traceback or internal error was printed.
"""

from __future__ import annotations

import csv
import random
from pathlib import Path

import numpy as np
import pytest
from openpyxl import Workbook

from audit.cli import main
from audit.inventory import read_inventory
from audit.ranges import POLICY_RANGES, ROW_RANGES

BASE = {"tag": "", "model": "fopdt", "gain": "1.0", "tau1_s": "10", "dead_time_s": "1", "kc": "0.5",
        "ti_s": "10", "action": "reverse"}
TF_BASE = {"tag": "", "model": "tf", "num": "1", "den": "10 1", "dead_time_s": "1", "kc": "0.5", "ti_s": "10",
           "action": "reverse"}
PAR_BASE = {"tag": "", "model": "fopdt", "gain": "1.0", "tau1_s": "10", "dead_time_s": "1", "form": "parallel",
            "kp": "0.5", "ki_per_s": "0.05", "kd_s": "0.5", "action": "reverse"}
EXTREMES = ["0", "-1", "1e-300", "1e300", "inf", "-inf", "nan", "1e999", "1" * 1000, "5e-324", "1e20", "1e-20"]
NUMERIC = ["gain", "gain_per_min", "tau1_s", "tau1_h", "lead_s", "dead_time_s", "dead_time_h", "kc", "pb_pct",
           "ti_s", "ti_h", "reset_rpm", "td_s", "d_filter", "sample_s", "pv_filter_s", "band_rad_s",
           "attenuation_db", "ms_max", "gm_min_db", "pm_min_deg", "pv_lo", "allowed_amplitude"]


def write_csv(path: Path, rows: list[dict]) -> Path:
    cols: list[str] = []
    for r in rows:
        cols += [k for k in r if k not in cols]
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(cols)
        for r in rows:
            w.writerow([r.get(c, "") for c in cols])
    return path


def run(inv: Path, out: Path, capsys, *extra: str) -> tuple[int, str, list[dict]]:
    code = main(["run", str(inv), "--out", str(out), "--quiet", "--no-history", "--no-pdf", "--date", "2026-12-01",
                 *extra])
    err = capsys.readouterr().err
    assert "Traceback" not in err and "internal error" not in err, err[-2000:]
    res = list(csv.DictReader(open(out / "results.csv", encoding="utf-8"))) if (out / "results.csv").exists() else []
    return code, err, res


def assert_every_row(res: list[dict], rows: list[dict]) -> None:
    assert [r["tag"] for r in res] == [r["tag"] for r in rows]


def _letter(cols: list[str], name: str) -> str:
    i = cols.index(name) + 1
    out = ""
    while i:
        i, rem = divmod(i - 1, 26)
        out = chr(65 + rem) + out
    return out


def test_numeric_extremes_are_refused_by_cell_and_never_stop_the_run(tmp_path, capsys):
    """Every numeric column with 0, negatives, 1e-300, 1e300, inf, NaN, '1e999', a 1,000-digit number,
    a denormal and 1e20: exit 1, every row back in order, each invalid row's message names its cell."""
    rows, fuzzed = [], []
    for col in NUMERIC:
        for v in EXTREMES:
            r = dict(PAR_BASE if col in ("kp", "ki_per_s", "kd_s") else BASE, tag=f"X-{len(rows) + 1}")
            if col in ("band_rad_s", "attenuation_db"):
                r.update(band_rad_s="0.01", attenuation_db="6")
            if col == "pv_lo":
                r["pv_hi"] = "100"
            if col == "allowed_amplitude":
                r["disturbance_file"] = "missing.csv"
            r[col] = v
            rows.append(r)
            fuzzed.append(col)
        rows.append(dict(BASE, tag=f"OK-{len(rows) + 1}"))
        fuzzed.append(None)
    inv = write_csv(tmp_path / "loops.csv", rows)
    code, err, res = run(inv, tmp_path / "out", capsys)
    assert code == 1
    assert_every_row(res, rows)
    cols = list(dict.fromkeys(k for r in rows for k in r))
    for i, (r, col, out) in enumerate(zip(rows, fuzzed, res)):
        if col is None:
            assert out["status"] != "invalid", out["message"]
            continue
        if out["status"] == "invalid" and col in out["message"]:
            assert f"loops!{_letter(cols, col)}{i + 2} ({col})" in out["message"], out["message"]
        v = r[col]
        if v in ("inf", "-inf", "nan", "1e999", "1" * 1000, "1e300", "1e20", "5e-324", "1e-300", "1e-20") \
                and col not in ("pv_lo",):
            assert out["status"] == "invalid", (col, v, out["status"])
            assert f"({col})" in out["message"], (col, v, out["message"])


def test_check_and_run_agree_on_what_a_row_may_hold(tmp_path, capsys):
    """A row that `check` accepts is evaluated by `run` (no crash, not invalid); one it refuses is invalid
    in `run` with the same message."""
    rows = []
    for q, rng in ROW_RANGES.items():
        col = {"tau1": "tau1_s", "tau2": "tau2_s", "lead": "lead_s", "dead_time": "dead_time_s", "sample": "sample_s",
               "pv_filter": "pv_filter_s", "ti": "ti_s", "td": "td_s", "kd": "kd_s", "ki": "ki_per_s"}.get(q, q)
        if q in ("pv_hi",):
            continue
        for v in (rng.lo if rng.lo > 0 else 1e-3, rng.hi):
            base = PAR_BASE if q in ("kp", "ki", "kd") else BASE
            r = dict(base, tag=f"B-{len(rows) + 1}")
            if q in ("band_rad_s", "attenuation_db"):
                r.update(band_rad_s="0.01", attenuation_db="6")
            if q == "pv_lo":
                r["pv_hi"] = repr(2 * rng.hi)
            if q == "allowed_amplitude":
                continue
            if q == "ms_max" and v == rng.lo:
                v = 1.0001
            if q == "pm_min_deg" and v == rng.hi:
                v = 179.9
            if q == "tau2":
                r.update(model="sopdt")
            r[col] = repr(float(v))
            rows.append(r)
    inv = write_csv(tmp_path / "loops.csv", rows)
    checked = {r.tag: r for r in read_inventory(inv).rows}
    code, err, res = run(inv, tmp_path / "out", capsys)
    assert code in (0, 1)
    assert_every_row(res, rows)
    for out in res:
        row = checked[out["tag"]]
        assert (out["status"] == "invalid") == (not row.valid), (out["tag"], out["message"])
        if not row.valid:
            assert str(row.errors[0]) in out["message"]


def test_seeded_combinations_of_accepted_extremes(tmp_path, capsys):
    """Random combinations of range ends (seeded): the run ends normally with every row."""
    rng = random.Random(18)

    def pick(lo, hi, zero=False, signed=False):
        c = rng.choice([lo, hi, (lo * hi) ** 0.5] + ([0.0] if zero else []))
        return repr(-c if signed and rng.random() < 0.3 else c)

    rows = []
    for i in range(24):
        m = rng.choice(["fopdt", "sopdt", "ipdt", "tf"])
        r = {"tag": f"R-{i}", "model": m, "dead_time_s": pick(1e-6, 1e7, zero=True),
             "action": rng.choice(["reverse", "direct"]), "kc": pick(1e-6, 1e6), "ti_s": pick(1e-6, 1e8, zero=True),
             "td_s": pick(1e-6, 1e7, zero=True), "d_filter": pick(1e-3, 1.0)}
        if m == "tf":
            r.update(num=pick(1e-6, 1e6), den=f"{pick(1e-6, 1e6)} {pick(1e-6, 1e6)} 1")
        else:
            r.update(gain=pick(1e-8, 1e6, signed=True), tau1_s=pick(1e-6, 1e7))
        if m == "sopdt":
            r.update(tau2_s=pick(1e-6, 1e7), lead_s=pick(1e-6, 1e7, zero=True, signed=True))
        if rng.random() < 0.5:
            r.update(band_rad_s=pick(1e-9, 1e6), attenuation_db=pick(1e-3, 200.0))
        rows.append(r)
    inv = write_csv(tmp_path / "loops.csv", rows)
    code, err, res = run(inv, tmp_path / "out", capsys)
    assert code in (0, 1)
    assert_every_row(res, rows)


@pytest.mark.parametrize("setting", sorted(POLICY_RANGES))
def test_policy_values_out_of_range_are_refused_by_cell(tmp_path, setting):
    """Each policy setting: 1e300, -1, NaN text and '1e999' are errors naming the policy cell; defaults apply."""
    wb = Workbook()
    ws = wb.active
    ws.title = "loops"
    ws.append(list(BASE))
    ws.append(["P-1", *list(BASE.values())[1:]])
    p = wb.create_sheet("policy")
    p.append(["setting", "value"])
    for v in (1e300, -1.0, "nan", "1e999"):
        p.append([setting, v])
    wb.save(tmp_path / "a.xlsx")
    inv = read_inventory(tmp_path / "a.xlsx")
    msgs = [str(x) for x in inv.problems if x.column == setting]
    assert any(m.startswith("policy!B2") and "range accepted" in m for m in msgs), msgs
    assert getattr(inv.policy, setting) == getattr(type(inv.policy)(), setting)


def test_policy_at_its_range_ends_runs(tmp_path, capsys):
    """Every policy setting at the low end of its range, then at the high end: the run ends normally."""
    for end in ("lo", "hi"):
        wb = Workbook()
        ws = wb.active
        ws.title = "loops"
        ws.append(list(BASE) + ["disturbance_file", "allowed_amplitude"])
        for i in range(3):
            ws.append([f"Q-{i}", *list(BASE.values())[1:], "rec.csv" if i == 1 else None, 0.5 if i == 1 else None])
        p = wb.create_sheet("policy")
        p.append(["setting", "value"])
        for name, rng in POLICY_RANGES.items():
            v = rng.lo if end == "lo" else rng.hi
            if rng.lo_open and end == "lo":
                v = rng.lo + max(1e-3, 1e-3 * rng.lo)
            if rng.hi_open and end == "hi":
                v = rng.hi - 1e-3
            p.append([name, v])
        d = tmp_path / end
        d.mkdir()
        wb.save(d / "a.xlsx")
        t = np.arange(600) * 1.0
        with open(d / "rec.csv", "w") as fh:
            fh.write("time_s,value\n")
            for a, b in zip(t, np.sin(0.3 * t) + 0.1 * np.cos(2.1 * t)):
                fh.write(f"{a!r},{float(b)!r}\n")
        code, err, res = run(d / "a.xlsx", d / "out", capsys)
        assert code in (0, 1)
        assert [r["tag"] for r in res] == ["Q-0", "Q-1", "Q-2"]


def _record(path: Path, t, v) -> None:
    with open(path, "w") as fh:
        fh.write("time_s,value\n")
        for a, b in zip(t, v):
            fh.write(f"{float(a)!r},{float(b)!r}\n")


def test_unusable_records_give_an_honest_status(tmp_path, capsys):
    """A slow drift whose variance lies below the record's resolution (band edge 0 rad/s with
    band_energy_fraction 0.5), values near 1e200, a 1e-12 s interval, a 200,000-character cell and a
    missing file: each row fails with 'disturbance requirement not judged', the others are evaluated,
    exit 1 (a requirement that could not be judged is not met)."""
    rng = np.random.default_rng(1)
    t = np.arange(400) * 1.0
    _record(tmp_path / "drift.csv", t, 0.01 * t + 0.3 * np.sin(2 * np.pi * t / 1200) + 0.01 * rng.standard_normal(400))
    _record(tmp_path / "huge.csv", t, 1e200 * (1 + rng.standard_normal(400)))
    _record(tmp_path / "fast.csv", t * 1e-12, rng.standard_normal(400))
    _record(tmp_path / "ok.csv", t, 0.1 * rng.standard_normal(400))
    with open(tmp_path / "long.csv", "w") as fh:
        fh.write("time_s,value\n")
        for i in range(400):
            fh.write(f"{i},{'1' * 200_000 if i == 5 else 0.1}\n")
    files = ["drift.csv", "huge.csv", "fast.csv", "long.csv", "missing.csv", "ok.csv"]
    wb = Workbook()
    ws = wb.active
    ws.title = "loops"
    ws.append(list(BASE) + ["disturbance_file", "allowed_amplitude"])
    for i, f in enumerate(files):
        ws.append([f"D-{i}", *list(BASE.values())[1:], f, 5.0])
    p = wb.create_sheet("policy")
    p.append(["setting", "value"])
    p.append(["band_energy_fraction", 0.5])
    wb.save(tmp_path / "a.xlsx")
    code, err, res = run(tmp_path / "a.xlsx", tmp_path / "out", capsys)
    assert code == 1
    assert [r["tag"] for r in res] == [f"D-{i}" for i in range(len(files))]
    for r, f in zip(res[:-1], files[:-1]):
        assert r["status"] == "fails", (f, r["status"])
        assert r["findings"].startswith("disturbance requirement not judged"), r["findings"]
        assert f in r["dist_note"] and f in r["message"]
        assert r["action"] == "fix the inventory row"
    assert "lowest frequency the record resolves" in res[0]["dist_note"]
    assert "1e+09" in res[1]["dist_note"] and "sample interval 1e-12 s" in res[2]["dist_note"]
    assert "long.csv line 7" in res[3]["dist_note"]
    assert "not judged" not in res[-1]["findings"]
    assert "no attenuation needed" not in res[1]["dist_note"]


def test_disturbance_allowed_zero_is_an_error(tmp_path, capsys):
    """`disturbance --allowed 0` is a user error (exit 2, one line), not 'no allowed amplitude given'."""
    _record(tmp_path / "r.csv", np.arange(200.0), np.sin(np.arange(200.0)))
    code = main(["disturbance", str(tmp_path / "r.csv"), "--allowed", "0", "--plot", str(tmp_path / "p.svg")])
    err = capsys.readouterr().err
    assert code == 2
    assert "'--allowed'" in err and "must be a finite number above 0" in err and "Traceback" not in err


def test_result_named_and_formula_headers_are_kept_apart(tmp_path, capsys):
    """Headers named like results columns, a formula-like header and one with a terminal escape: kept as
    extra:<header> after the results columns, nothing shifted or lost, nothing printed raw."""
    odd = ["row", "message", "status", "ms", "rank", "Status", "=1+2", "\x1b[31mred", "note", "note "]
    rows = []
    for i in range(3):
        r = dict(BASE, tag=f"C-{i}")
        for j, h in enumerate(odd):
            r[h] = f"v{j}"
        rows.append(r)
    inv = write_csv(tmp_path / "loops.csv", rows)
    code, err, res = run(inv, tmp_path / "out", capsys)
    assert code in (0, 1)
    assert_every_row(res, rows)
    head = next(csv.reader(open(tmp_path / "out" / "results.csv", encoding="utf-8")))
    assert head[0] == "row" and head.count("status") == 1 and head.count("message") == 1
    tail = head[-len(odd):]
    assert tail == ["extra:row", "extra:message", "extra:status", "extra:ms", "extra:rank", "extra:Status",
                    "extra:=1+2", "extra:\\x1b[31mred", "note", "extra:note"]
    assert not any(h.startswith(("=", "+", "-", "@")) for h in head)
    assert [r["extra:status"] for r in res] == ["v2"] * 3 and [r["row"] for r in res] == ["2", "3", "4"]
    assert res[0]["status"] in ("passes", "marginal", "fails")
    main(["check", str(inv)])
    out = capsys.readouterr().out
    assert "\x1b" not in out and "\\x1b[31mred" in out


def test_results_file_fed_back_as_inventory(tmp_path, capsys):
    """results.csv and results.xlsx of a run, given back as inventories, are read and run (exit 1), every
    row in order: their columns do not collide with the results'."""
    rows = [dict(BASE, tag=f"F-{i}") for i in range(3)]
    inv = write_csv(tmp_path / "loops.csv", rows)
    code, _, _ = run(inv, tmp_path / "out", capsys)
    for name in ("results.csv", "results.xlsx"):
        d = tmp_path / name.replace(".", "_")
        d.mkdir()
        (d / name).write_bytes((tmp_path / "out" / name).read_bytes())
        code, err, res = run(d / name, d / "out", capsys)
        assert code in (1, 2)
        if code == 1:
            assert [r["tag"] for r in res] == ["F-0", "F-1", "F-2"]


def test_look_alike_tags_are_duplicates(tmp_path, capsys):
    """A zero-width space inside a tag and full-width letters: the same tag after NFKC normalisation
    and removal of format characters, so both rows are refused as duplicates, naming the other."""
    rows = [dict(BASE, tag="FIC-101"), dict(BASE, tag="FIC-\u200b101"), dict(BASE, tag="\uff26\uff29\uff23-101"),
            dict(BASE, tag="TIC-1")]
    inv = write_csv(tmp_path / "loops.csv", rows)
    code, err, res = run(inv, tmp_path / "out", capsys)
    assert code == 1
    assert_every_row(res, rows)
    assert [r["status"] for r in res[:3]] == ["invalid"] * 3 and res[3]["status"] != "invalid"
    assert "loops!A3 (tag): duplicate tag" in res[1]["message"] and "\\u200b" in res[1]["message"]


def test_control_characters_in_sheet_names_and_record_headers_are_escaped(tmp_path, capsys):
    """A sheet name holding a bidi override and a record header holding a terminal escape are printed
    escaped, never raw."""
    wb = Workbook()
    wb.active.title = "Data\u202e"      # a right-to-left override: reverses what a terminal shows
    wb.active.append(["tag"])
    wb.save(tmp_path / "a.xlsx")
    assert main(["check", str(tmp_path / "a.xlsx")]) == 2
    err = capsys.readouterr().err
    assert "\u202e" not in err and "\\u202e" in err
    (tmp_path / "r.csv").write_text("time_s,\x1b[2Jvalue\n" + "".join(f"{i},{i % 3}\n" for i in range(100)))
    assert main(["disturbance", str(tmp_path / "r.csv"), "--allowed", "1", "--plot", str(tmp_path / "p.svg")]) == 2
    err = capsys.readouterr().err
    assert "\x1b" not in err and "Traceback" not in err


def test_empty_inventory_is_exit_2(tmp_path, capsys):
    """Headers and no loops: exit 2 with one plain line for run and check (nothing to audit)."""
    (tmp_path / "loops.csv").write_text("tag,model,gain\n,,\n")
    for cmd in (["run", str(tmp_path / "loops.csv"), "--out", str(tmp_path / "out"), "--no-history", "--quiet"],
                ["check", str(tmp_path / "loops.csv")]):
        code = main(cmd)
        cap = capsys.readouterr()
        assert code == 2
        assert "no loops below the header row" in cap.err and "Traceback" not in cap.err
    assert not (tmp_path / "out" / "results.csv").exists()


def test_overflowing_xlsx_cells(tmp_path, capsys):
    """In a workbook: text '1e999', a 400-digit integer stored as text, and a tf coefficient 5e-324 are refused by
    cell in `check` and make only their rows invalid in `run`."""
    wb = Workbook()
    ws = wb.active
    ws.title = "loops"
    ws.append(["tag", "model", "gain", "tau1_s", "dead_time_s", "kc", "ti_s", "action", "num", "den"])
    ws.append(["O-1", "fopdt", "1e999", 10, 1, 0.5, 10, "reverse", None, None])
    ws.append(["O-2", "fopdt", 1.0, 10, 1, "9" * 400, 10, "reverse", None, None])
    ws.append(["O-3", "tf", None, None, 1, 0.5, 10, "reverse", "5e-324", "10 1"])
    ws.append(["O-4", "fopdt", 1.0, 10, 1, 0.5, 10, "reverse", None, None])
    wb.save(tmp_path / "a.xlsx")
    assert main(["check", str(tmp_path / "a.xlsx")]) == 2
    out = capsys.readouterr().out
    assert "loops!C2 (gain)" in out and "loops!F3 (kc)" in out and "loops!I4 (num)" in out
    code, err, res = run(tmp_path / "a.xlsx", tmp_path / "out", capsys)
    assert code == 1
    assert [r["status"] == "invalid" for r in res] == [True, True, True, False]
