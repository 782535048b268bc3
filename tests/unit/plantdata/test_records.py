"""Unit tests of audit.plantdata.records, the one record reader (regression and behaviour).

The checks are against what the format documents; the daylight-saving cases use the
IANA zone database through pandas (an independent library) as the outside reference."""

from __future__ import annotations

import os

import numpy as np
import pandas as pd
import pytest

from audit.plantdata.records import (DEFAULT_QUALITY_WORDS, PathError, ReadPolicy, confine, read_record)


def _csv(path, header, rows):
    path.write_text(header + "\n" + "".join(",".join(map(str, r)) + "\n" for r in rows), encoding="utf-8")
    return path


def _loop_rows(n=400, dt=1.0):
    k = np.arange(n)
    op = 40 + 5 * (k >= n // 4)
    pv = 30 + 0.05 * k / n
    return [(f"{i * dt:g}", f"{50.0:g}", f"{pv[i]:.6f}", f"{op[i]:g}", "AUTO" if i < n // 2 else "MAN")
            for i in range(n)]


def test_all_signals_in_project_units(tmp_path):
    r = read_record(_csv(tmp_path / "a.csv", "time_s,sp,pv,op,mode", _loop_rows()))
    assert r.signals == ("sp", "pv", "op", "mode") and r.dt == 1.0 and len(r.segments) == 1
    s = r.segments[0]
    assert s.n == 400 and s.first_line == 2 and s.last_line == 401
    assert s.values["op"][100] == 45 and s.values["sp"][0] == 50
    assert r.mode_labels == ("AUTO", "MAN") and s.mode[0] == 0 and s.mode[-1] == 1
    assert not r.notes


def test_any_subset_and_case(tmp_path):
    rows = [(f"{i}", f"{i % 3}") for i in range(100)]
    r = read_record(_csv(tmp_path / "b.csv", "Time_Min,OP", rows))
    assert r.signals == ("op",) and r.dt == 60.0


def test_eu_columns_converted_with_row_range(tmp_path):
    rows = [(f"{i}", "2.0", f"{1.0 + (i % 2)}") for i in range(100)]
    r = read_record(_csv(tmp_path / "c.csv", "time_s,sp_eu,pv_eu", rows), pv_lo=0.0, pv_hi=4.0)
    assert r.segments[0].values["sp"][0] == pytest.approx(50.0)
    assert r.segments[0].values["pv"][:2] == pytest.approx([25.0, 50.0])
    r2 = read_record(tmp_path / "c.csv")
    assert not r2.usable and "needs the row's pv_lo and pv_hi" in str(r2.notes[0])


def test_quality_words_missing_counted_never_parsed(tmp_path):
    rows = _loop_rows()
    rows[10] = rows[10][:2] + ("Bad Value",) + rows[10][3:]
    rows[11] = rows[11][:2] + ("I/O  timeout",) + rows[11][3:]
    rows[50] = rows[50][:3] + ("SHUTDOWN",) + rows[50][4:]
    r = read_record(_csv(tmp_path / "q.csv", "time_s,sp,pv,op,mode", rows))
    assert r.quality == {"sp": 0, "pv": 2, "op": 1} and r.missing["pv"] == 2
    text = [str(n) for n in r.notes]
    assert "q.csv line 12 (pv): historian quality word 'Bad Value': missing value" in [t[-62:] for t in text] or \
        any(t.endswith("q.csv line 12 (pv): historian quality word 'Bad Value': missing value") for t in text)
    assert any("filled by linear interpolation" in t for t in text)
    assert len(r.segments) == 1 and np.all(np.isfinite(r.segments[0].values["pv"]))
    # a site's own word, configured
    rows[20] = rows[20][:2] + ("Frozen",) + rows[20][3:]
    p = _csv(tmp_path / "q2.csv", "time_s,sp,pv,op,mode", rows)
    assert any("not a number: 'Frozen'" in str(n) for n in read_record(p).notes)
    r3 = read_record(p, policy=ReadPolicy(quality_words=DEFAULT_QUALITY_WORDS + ("frozen",)))
    assert r3.quality["pv"] == 3


def test_duplicates_and_time_going_back_named(tmp_path):
    rows = _loop_rows()
    rows[30] = (rows[29][0],) + rows[30][1:]
    rows[60] = ("55",) + rows[60][1:]
    r = read_record(_csv(tmp_path / "o.csv", "time_s,sp,pv,op,mode", rows))
    order = [str(n) for n in r.notes_of("order")]
    assert any("line 32 (time_s): time not increasing (same time as line 31)" in t for t in order)
    assert any("line 62 (time_s): time not increasing" in t for t in order)
    assert len(r.segments) == 1


def test_gap_splits_and_is_never_interpolated(tmp_path):
    rows = _loop_rows(600)
    rows = rows[:300] + [(f"{float(r[0]) + 50:g}",) + r[1:] for r in rows[300:]]
    r = read_record(_csv(tmp_path / "g.csv", "time_s,sp,pv,op,mode", rows))
    assert len(r.segments) == 2
    assert r.segments[0].last_line == 301 and r.segments[1].first_line == 302
    assert r.segments[1].t0 == pytest.approx(350.0)
    assert any("lines 301-302 (time_s): gap of 51 s" in str(n) for n in r.notes_of("gap"))
    # a run of missing values longer than the policy allows splits too
    rows = _loop_rows(600)
    for i in range(200, 210):
        rows[i] = rows[i][:2] + ("No Data",) + rows[i][3:]
    r = read_record(_csv(tmp_path / "g2.csv", "time_s,sp,pv,op,mode", rows))
    assert len(r.segments) == 2 and r.segments[0].n == 200 and r.segments[1].t0 == 210.0
    r = read_record(tmp_path / "g2.csv", policy=ReadPolicy(max_gap_intervals=20))
    assert len(r.segments) == 1 and r.segments[0].n == 600


def test_short_segments_and_too_few_samples(tmp_path):
    r = read_record(_csv(tmp_path / "s.csv", "time_s,pv", [("0", "1")]))
    assert not r.usable and "1 sample; at least 64 are needed" in str(r.notes[-1])


def test_flat_runs_of_a_compressing_historian(tmp_path):
    k = np.arange(2000)
    pv = np.round(np.sin(k / 300.0) * 2, 0)          # stepped: a deadband of 1 %
    rows = [(f"{i}", f"{pv[i]:g}", "40") for i in range(2000)]
    r = read_record(_csv(tmp_path / "f.csv", "time_s,pv,op", rows))
    assert r.flat_fraction["pv"] > 0.9
    assert any("compressing historian" in str(n) and "(pv)" in str(n) for n in r.notes_of("flat"))
    rows = [(f"{i}", f"{np.sin(i / 7):.6f}", "40") for i in range(2000)]
    assert read_record(_csv(tmp_path / "f2.csv", "time_s,pv,op", rows)).flat_fraction["pv"] == 0.0


def test_zoned_timestamps_across_autumn_change(tmp_path):
    """A 1-min log across the end of summer time in Europe/London (2024-10-27 01:00 UTC)."""
    utc = pd.date_range("2024-10-26T23:00:00Z", periods=240, freq="1min")
    local = utc.tz_convert("Europe/London")
    rows = [(t.isoformat(), f"{i}") for i, t in enumerate(local)]
    r = read_record(_csv(tmp_path / "z.csv", "timestamp,pv", rows))
    assert len(r.segments) == 1 and r.segments[0].n == 240 and r.dt == 60.0
    assert r.start == pd.Timestamp("2024-10-26T23:00:00Z") and r.start.tzinfo is not None
    # the same wall-clock times without zones: time goes back an hour, said as such
    rows = [(t.tz_localize(None).isoformat(), f"{i}") for i, t in enumerate(local)]
    p = _csv(tmp_path / "w.csv", "timestamp,pv", rows)
    r = read_record(p)
    assert any("about an hour" in str(n) for n in r.notes_of("zone"))
    # ... and placed with the site's zone: the repeated hour resolved by order
    r = read_record(p, timezone="Europe/London")
    assert len(r.segments) == 1 and r.segments[0].n == 240 and not r.notes_of("order")
    assert r.start == pd.Timestamp("2024-10-26T23:00:00Z")


def test_spring_change_zoned_is_no_gap(tmp_path):
    utc = pd.date_range("2024-03-31T00:00:00Z", periods=180, freq="1min")
    rows = [(t.tz_convert("Europe/Berlin").isoformat(), "1.5") for t in utc]
    r = read_record(_csv(tmp_path / "sp.csv", "timestamp,pv", rows))
    assert len(r.segments) == 1 and not r.notes_of("gap")


def test_mixed_zones_named(tmp_path):
    rows = [(f"2024-01-01T00:{i // 60:02d}:{i % 60:02d}" + ("+00:00" if i != 70 else ""), "1") for i in range(100)]
    r = read_record(_csv(tmp_path / "m.csv", "timestamp,pv", rows))
    assert any("line 72 (timestamp): time zone given on some lines and not on others" in str(n) for n in r.notes)


def test_parquet_reads_like_csv(tmp_path):
    pa = pytest.importorskip("pyarrow")
    import pyarrow.parquet as pq
    rows = _loop_rows()
    rows[10] = rows[10][:2] + ("Bad Value",) + rows[10][3:]
    p = _csv(tmp_path / "p.csv", "time_s,sp,pv,op,mode", rows)
    df = pd.read_csv(p, dtype=str)
    pq.write_table(pa.Table.from_pandas(df), tmp_path / "p.parquet")
    a, b = read_record(p), read_record(tmp_path / "p.parquet")
    assert np.array_equal(a.segments[0].values["pv"], b.segments[0].values["pv"])
    assert b.quality["pv"] == 1 and any(str(n).endswith("p.parquet row 11 (pv): historian quality word "
                                                         "'Bad Value': missing value") for n in b.notes)
    # native types: zone-aware timestamps and floats
    t = pd.date_range("2024-03-31T00:00:00Z", periods=200, freq="10s")
    tbl = pa.table({"timestamp": t, "pv": np.linspace(0, 1, 200), "op": np.full(200, 40.0)})
    pq.write_table(tbl, tmp_path / "n.parquet")
    r = read_record(tmp_path / "n.parquet")
    assert r.dt == 10.0 and r.start == t[0] and r.segments[0].n == 200


def test_chunks_give_the_same_record(tmp_path):
    rows = _loop_rows(1000)
    rows[500] = rows[500][:2] + ("timeout",) + rows[500][3:]
    p = _csv(tmp_path / "k.csv", "time_s,sp,pv,op,mode", rows)
    a = read_record(p)
    b = read_record(p, policy=ReadPolicy(chunk_rows=7))
    assert np.array_equal(a.segments[0].values["pv"], b.segments[0].values["pv"])
    assert np.array_equal(a.segments[0].mode, b.segments[0].mode)
    c = read_record(p, policy=ReadPolicy(max_rows=300))
    assert c.truncated and c.segments[0].n == 300 and c.notes_of("cap")


def test_comment_lines_and_blank_lines_keep_line_numbers(tmp_path):
    p = tmp_path / "c.csv"
    body = "".join(f"{i},{i % 5}\n" + ("\n# operator note, shift change\n" if i == 40 else "") for i in range(100))
    p.write_text("# exported\ntime_s,pv\n" + body.replace("70,0\n", "70,oops\n"), encoding="utf-8")
    r = read_record(p)
    assert any(str(n).endswith("c.csv line 75 (pv): not a number: 'oops'") for n in r.notes)


def test_wrong_units_said(tmp_path):
    rows = [(f"{i}", f"{350 + i % 4}", "40") for i in range(100)]
    r = read_record(_csv(tmp_path / "u.csv", "time_s,pv,op", rows))
    assert any("engineering units" in str(n) and "pv_eu" in str(n) for n in r.notes_of("units"))


def test_not_a_regular_file_and_missing(tmp_path):
    fifo = tmp_path / "pipe.csv"
    os.mkfifo(fifo)
    r = read_record(fifo)
    assert not r.usable and "not a regular file" in str(r.notes[0])
    assert "file not found" in str(read_record(tmp_path / "none.csv").notes[0])
    assert "header needs exactly one time column" in str(
        read_record(_csv(tmp_path / "h.csv", "t,level", [("1", "2")])).notes[0])


def test_confine(tmp_path):
    (tmp_path / "site" / "rec").mkdir(parents=True)
    full, shown = confine(tmp_path / "site", "rec/a.csv")
    assert shown == "rec/a.csv" and full == (tmp_path / "site" / "rec" / "a.csv").resolve()
    with pytest.raises(PathError, match="outside the inventory's folder"):
        confine(tmp_path / "site", "../x.csv")
    os.symlink(tmp_path / "x.csv", tmp_path / "site" / "link.csv")
    with pytest.raises(PathError):
        confine(tmp_path / "site", "link.csv")
