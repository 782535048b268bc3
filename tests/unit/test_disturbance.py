"""Unit and regression tests of audit.disturbance: record validation, messages, pipeline stages,
the command helper. Checks against published values live in tests/reference/."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from audit.disturbance import (DIST_COLUMNS, RESIDUAL_COLUMNS, Record, RecordError, add_residuals,
                               analyse_record, analyse_records, disturbance_command, read_record, welch_segment)
from audit.loop import Controller, LoopModel, make_process
from audit.pipeline import AuditOptions, new_audit
from audit.policy import Policy
from audit.rows import Inventory, LoopRow

SAMPLE = Path(__file__).resolve().parents[2] / "sample_site" / "records"


def _write(path: Path, header: str, rows) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(header + "\n" + "".join(f"{a},{b}\n" for a, b in rows), encoding="utf-8")
    return path


def _good_rows(n=200, dt=2.0):
    return [(f"{k * dt:g}", f"{math.sin(0.05 * k):.6f}") for k in range(n)]


def test_reads_time_s_and_value(tmp_path):
    rec = read_record(_write(tmp_path / "a.csv", "time_s,value", _good_rows()))
    assert rec.dt == 2.0 and len(rec.values) == 200 and rec.t[0] == 0.0 and not rec.notes


def test_time_min_and_value_eu_convert(tmp_path):
    rows = [(f"{k * 0.5:g}", f"{2.0 + 0.1 * math.sin(k / 5):.5f}") for k in range(100)]
    rec = read_record(_write(tmp_path / "b.csv", "time_min,value_eu", rows), pv_lo=0.0, pv_hi=4.0)
    assert rec.dt == pytest.approx(30.0)
    assert rec.values[0] == pytest.approx(50.0)
    assert any("engineering units" in n for n in rec.notes)


def test_timestamps_iso(tmp_path):
    rows = [(f"2024-01-01T00:{k // 60:02d}:{k % 60:02d}", "1.0") for k in range(0, 600, 5)]
    rec = read_record(_write(tmp_path / "c.csv", "timestamp,value", rows))
    assert rec.dt == pytest.approx(5.0) and rec.start == "2024-01-01T00:00:00"


def test_value_eu_needs_range(tmp_path):
    with pytest.raises(RecordError, match="pv_lo and pv_hi"):
        read_record(_write(tmp_path / "d.csv", "time_s,value_eu", _good_rows()))


def test_text_and_nan_reported_by_line(tmp_path):
    rows = _good_rows()
    rows[15] = (rows[15][0], "abc")
    rows[20] = (rows[20][0], "nan")
    rows[30] = (rows[30][0], "")
    p = _write(tmp_path / "records" / "x.csv", "time_s,value", rows)
    with pytest.raises(RecordError) as e:
        read_record(p, name="records/x.csv")
    msg = str(e.value)
    assert "records/x.csv line 17 (value): not a number: 'abc'" in msg
    assert "records/x.csv line 22 (value): not a number: 'nan'" in msg
    assert "records/x.csv line 32 (value): empty" in msg


def test_unsorted_time(tmp_path):
    rows = _good_rows()
    rows[10], rows[11] = rows[11], rows[10]
    with pytest.raises(RecordError, match=r"line 13 \(time_s\): time not increasing"):
        read_record(_write(tmp_path / "e.csv", "time_s,value", rows))


def test_one_sample(tmp_path):
    with pytest.raises(RecordError, match="1 sample; at least 64 are needed"):
        read_record(_write(tmp_path / "f.csv", "time_s,value", _good_rows(1)))


def test_gap_rejected(tmp_path):
    rows = _good_rows()
    rows = rows[:100] + [(f"{float(r[0]) + 100:g}", r[1]) for r in rows[100:]]
    with pytest.raises(RecordError, match=r"lines 101-102 \(time_s\): gap of 102 s"):
        read_record(_write(tmp_path / "g.csv", "time_s,value", rows))


def test_many_problems_capped(tmp_path):
    rows = [(f"{k}", "x") for k in range(100)]
    with pytest.raises(RecordError, match=r"and 80 more"):
        read_record(_write(tmp_path / "h.csv", "time_s,value", rows))


def test_bad_header(tmp_path):
    with pytest.raises(RecordError, match="exactly one time column"):
        read_record(_write(tmp_path / "i.csv", "t,level", _good_rows()))


def test_non_uniform_resampled(tmp_path):
    rows = [(f"{k * 2.0 + (0.3 if k % 2 else 0.0):g}", f"{k * 0.01:g}") for k in range(200)]
    rec = read_record(_write(tmp_path / "j.csv", "time_s,value", rows))
    assert any("resampled" in n for n in rec.notes)
    assert np.allclose(np.diff(rec.t), rec.dt)


def test_welch_segment_rule():
    """Segment rule as documented: 2**floor(log2(n/4)), at least min(n, 32)."""
    assert welch_segment(64) == 32 and welch_segment(1000) == 128 and welch_segment(2 ** 16) == 2 ** 14


def test_no_attenuation_needed_note():
    t = np.arange(4096.0)
    an = analyse_record(Record("r", t, 0.1 * np.sin(0.2 * t) + 0.002 * t, 1.0), allowed_amplitude=1.0)
    assert not an.needs_attenuation and an.attenuation_db < 0
    assert any("no attenuation needed" in n for n in an.notes)
    assert an.trend == pytest.approx(0.002, rel=1e-3)


def _audit(tmp_path: Path, files: list[str | None]):
    inv_path = tmp_path / "site" / "loops.xlsx"
    inv_path.parent.mkdir(parents=True, exist_ok=True)
    rows = tuple(LoopRow(index=i, sheet="loops", excel_row=i + 2, tag=f"L{i}", model="fopdt", gain=1.0,
                         tau1=20.0, dead_time=3.0, kc=2.0, ti=20.0, sample=1.0, disturbance_file=f,
                         allowed_amplitude=1.0)
                 for i, f in enumerate(files))
    inv = Inventory(path=str(inv_path), name="loops.xlsx", sha256="0", rows=rows, policy=Policy())
    a = new_audit(inv, AuditOptions())
    a.models = [LoopModel(r.tag, make_process("fopdt", 1.0, 20.0, dead_time=3.0),
                          Controller("ideal", kc=2.0, ti=20.0), sample=1.0) for r in rows]
    return a


def test_stages_bad_records_keep_other_results(tmp_path):
    site = tmp_path / "site"
    t = np.arange(2048) * 5.0
    _write(site / "records" / "ok.csv", "time_s,value", [(f"{a:g}", f"{2 * math.sin(0.01 * a):.5f}") for a in t])
    bad = _good_rows()
    bad[5] = ("10", "oops")
    _write(site / "records" / "bad.csv", "time_s,value", bad)
    _write(tmp_path / "outside.csv", "time_s,value", _good_rows())
    a = _audit(tmp_path, ["records/ok.csv", "records/bad.csv", str(tmp_path / "outside.csv"), None])
    analyse_records(a)
    add_residuals(a)
    r = a.results
    assert set(DIST_COLUMNS) <= set(r.columns) and set(RESIDUAL_COLUMNS) <= set(r.columns)
    assert len(r) == 4
    assert np.isfinite(r.at[0, "dist_band_rad_s"]) and np.isfinite(r.at[0, "residual_amplitude"])
    assert "records/bad.csv line 7 (value): not a number: 'oops'" in r.at[1, "dist_note"]
    assert "records/bad.csv line 7" in r.at[1, "message"]
    assert "outside the inventory's folder" in r.at[2, "message"]
    assert np.isnan(r.at[1, "residual_amplitude"]) and np.isnan(r.at[3, "dist_band_rad_s"])
    assert 0 in a.extras["records"] and 0 in a.extras["residuals"]
    res = a.extras["residuals"][0]
    assert res.residual_std_freq == pytest.approx(res.residual_std, rel=0.05)
    assert r.at[0, "residual_ok"] == (res.residual_amplitude <= 1.0)


def test_unstable_row_gets_no_residual(tmp_path):
    site = tmp_path / "site"
    t = np.arange(512) * 5.0
    _write(site / "r.csv", "time_s,value", [(f"{a:g}", f"{math.sin(0.01 * a):.5f}") for a in t])
    a = _audit(tmp_path, ["r.csv"])
    a.results["stable"] = np.array([False])
    analyse_records(a)
    add_residuals(a)
    assert np.isnan(a.results.at[0, "residual_amplitude"])
    assert "unstable" in a.results.at[0, "dist_note"]


@pytest.mark.parametrize("name", ["slow_periodic.csv", "broadband.csv", "step_upset.csv"])
def test_sample_records_read(name):
    """Regression: the sample records read cleanly and ask for some attenuation at 1 % allowed."""
    rec = read_record(SAMPLE / name, pv_lo=0.0, pv_hi=4.0)
    an = analyse_record(rec, 1.0)
    assert an.band_rad_s > 0 and an.attenuation_db > 0


def test_command_writes_deterministic_svg(tmp_path, capsys):
    src = SAMPLE / "step_upset.csv"
    a, b = tmp_path / "a.svg", tmp_path / "b.svg"
    assert disturbance_command(str(src), 1.0, str(a)) == 0
    assert disturbance_command(str(src), 1.0, str(b)) == 0
    out = capsys.readouterr().out
    assert "band wd" in out and "attenuation A" in out
    assert a.read_bytes() == b.read_bytes() and b"<svg" in a.read_bytes()


def test_command_bad_record(tmp_path, capsys):
    p = _write(tmp_path / "bad.csv", "time_s,value", [("0", "x")])
    assert disturbance_command(str(p), 1.0, None) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "not a number" in err
