"""The historian export reader (audit.plantdata.export): layouts, formats, file and folder, zones,
filter pushdown, and that a tag's slice is read by the record reader's own rule.

Regression and behaviour tests (common practice): the same data as a data_file must give the same
Record; a tag's read must touch only its own rows.
"""

from __future__ import annotations

import os
import pickle

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from audit.plantdata.export import ExportError, ExportNaming, ExportSource
from audit.plantdata.sources import has_source, record_for_row
from audit.plantdata.records import read_record
from audit.policy import Policy

N = 400


def _signals(seed: int, n: int = N) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    return {"sp": np.full(n, 50.0), "pv": 50 + rng.standard_normal(n).cumsum() * 0.1,
            "op": 40 + rng.standard_normal(n)}


def _stamps(n: int = N, start: str = "2026-11-02T00:00:00Z") -> pd.DatetimeIndex:
    return pd.date_range(start, periods=n, freq="1s")


def _long(tags, n: int = N) -> pd.DataFrame:
    parts = []
    for i, tag in enumerate(tags):
        for sig, v in _signals(i, n).items():
            parts.append(pd.DataFrame({"tag": tag, "timestamp": _stamps(n), "signal": sig, "value": v}))
    return pd.concat(parts, ignore_index=True)


def _same_record(a, b) -> None:
    """Field by field (numpy arrays compared exactly)."""
    assert a.name == b.name and a.signals == b.signals and a.dt == b.dt and a.time_column == b.time_column
    assert a.start == b.start and a.n_rows == b.n_rows and a.mode_labels == b.mode_labels
    assert dict(a.missing) == dict(b.missing) and dict(a.quality) == dict(b.quality)
    assert dict(a.flat_fraction) == dict(b.flat_fraction) and a.truncated == b.truncated
    assert a.notes == b.notes
    assert len(a.segments) == len(b.segments)
    for s, t in zip(a.segments, b.segments):
        assert (s.t0, s.dt, s.first_line, s.last_line) == (t.t0, t.dt, t.first_line, t.last_line)
        assert set(s.values) == set(t.values)
        for k in s.values:
            np.testing.assert_array_equal(s.values[k], t.values[k])
        if s.mode is None:
            assert t.mode is None
        else:
            np.testing.assert_array_equal(s.mode, t.mode)


def test_wide_csv_export_gives_the_identical_record_as_a_data_file(tmp_path):
    """A wide export holding one loop, with the problems the reader names (a quality word, a duplicate
    time, a gap, a text cell), reads to exactly the Record of the equivalent data_file."""
    s = _signals(1)
    stamps = _stamps().strftime("%Y-%m-%dT%H:%M:%S+00:00").tolist()
    pv = [f"{x:.6f}" for x in s["pv"]]
    pv[50] = "Bad Value"
    pv[60] = "oops"
    stamps[120] = stamps[119]                                    # duplicate time
    keep = [i for i in range(N) if not 200 <= i < 240]           # a 40 s gap
    mode = ["AUTO"] * N
    mode[300:320] = ["MAN"] * 20
    own = pd.DataFrame({"timestamp": stamps, "sp": s["sp"], "pv": pv, "op": s["op"], "mode": mode}).iloc[keep]
    wide = own.rename(columns={"sp": "FIC-101.SP", "pv": "FIC-101/pv", "op": "fic-101.op", "mode": "FIC-101.mode"})
    own.to_csv(tmp_path / "own.csv", index=False)
    wide.to_csv(tmp_path / "site.csv", index=False)
    a = read_record(tmp_path / "own.csv", name="X")
    b = ExportSource.open(tmp_path / "site.csv").read("FIC-101", name="X")
    _same_record(a, b)
    kinds = {n.kind for n in b.notes}
    assert {"quality", "cell", "order", "gap"} <= kinds
    assert any(n.kind == "quality" and n.line == 52 for n in b.notes)    # header line 1, data from line 2


def test_long_parquet_export_gives_the_same_segments_as_a_data_file(tmp_path):
    df = _long(["FIC-101"])
    pq.write_table(pa.Table.from_pandas(df, preserve_index=False), tmp_path / "site.parquet")
    s = _signals(0)
    pd.DataFrame({"timestamp": _stamps(), **s}).to_parquet(tmp_path / "own.parquet", index=False)
    a = read_record(tmp_path / "own.parquet", name="X")
    b = ExportSource.open(tmp_path / "site.parquet").read("fic-101", name="X")
    assert b.signals == a.signals and b.start == a.start and b.dt == a.dt == 1.0
    assert str(b.start.tz) == "UTC"
    for k in ("sp", "pv", "op"):
        np.testing.assert_array_equal(a.segments[0].values[k], b.segments[0].values[k])


def test_long_parquet_read_touches_only_its_tag(tmp_path):
    """Row groups of other tags are skipped by their statistics (filter pushdown): the rows decoded
    are exactly the tag's own."""
    tags = [f"TIC-{i:03d}" for i in range(8)]
    df = _long(tags)
    pq.write_table(pa.Table.from_pandas(df, preserve_index=False), tmp_path / "site.parquet",
                   row_group_size=3 * N)                         # one tag per row group (written sorted by tag)
    src = ExportSource.open(tmp_path / "site.parquet")
    stats: dict = {}
    rec = src.read("TIC-005", stats=stats)
    assert stats == {"rows_scanned": 3 * N, "row_groups": 1, "files": 1}
    np.testing.assert_allclose(rec.segments[0].values["pv"], _signals(5)["pv"])


def test_wide_parquet_reads_only_its_columns(tmp_path):
    """Column projection: only the time column and the tag's own columns are read."""
    cols = {"timestamp": _stamps()}
    for i in range(50):
        for k, v in _signals(i).items():
            cols[f"LIC-{i:02d}.{k}"] = v
    pq.write_table(pa.table(cols), tmp_path / "site.parquet", row_group_size=100)
    src = ExportSource.open(tmp_path / "site.parquet")
    assert len(src.tags) == 50
    seen = []
    real = pq.ParquetFile.iter_batches

    def spy(self, *a, **kw):
        seen.append(tuple(kw.get("columns") or ()))
        return real(self, *a, **kw)

    pq.ParquetFile.iter_batches = spy
    try:
        rec = src.read("LIC-07")
    finally:
        pq.ParquetFile.iter_batches = real
    assert seen == [("timestamp", "LIC-07.sp", "LIC-07.pv", "LIC-07.op")]
    np.testing.assert_allclose(rec.segments[0].values["op"], _signals(7)["op"])


def test_folder_of_days_notes_name_the_right_file_and_row(tmp_path):
    """A folder: one long CSV per day; a quality word in the second file is named by that file, its
    line and the tag; the two days join without a gap."""
    day = 200
    df = _long(["FIC-7"], 2 * day)
    df["value"] = df["value"].map(lambda x: f"{x:.6f}")
    df["timestamp"] = df["timestamp"].dt.strftime("%Y-%m-%dT%H:%M:%S+00:00")
    first = df[df.groupby("signal").cumcount() < day]
    second = df[df.groupby("signal").cumcount() >= day].copy()
    second.iloc[5, second.columns.get_loc("value")] = "I/O Timeout"
    (tmp_path / "x").mkdir()
    first.to_csv(tmp_path / "x" / "2026-11-02.csv", index=False)
    second.to_csv(tmp_path / "x" / "2026-11-03.csv", index=False)
    rec = ExportSource.open(tmp_path / "x").read("FIC-7")
    q = [n for n in rec.notes if n.kind == "quality" and n.line is not None]
    assert len(q) == 1 and q[0].file == "2026-11-03.csv (tag FIC-7)" and q[0].line == 7 and q[0].unit == "line"
    assert "I/O Timeout" in str(q[0])
    assert len(rec.segments) == 1 and rec.segments[0].n == 2 * day


def test_zones_and_daylight_saving(tmp_path):
    """Times written with their local offsets across the spring change (Europe, 29 March 2026,
    01:00 UTC) are one uniform record in UTC; written without a zone, the policy's export_timezone
    places them (the missing hour does not exist, so there is no gap)."""
    utc = pd.date_range("2026-03-29T00:30:00Z", periods=3600, freq="1s")
    local = utc.tz_convert("Europe/Berlin")
    s = _signals(3, 3600)
    zoned = pd.DataFrame({"timestamp": local.strftime("%Y-%m-%dT%H:%M:%S%z"), "FIC-1.pv": s["pv"],
                          "FIC-1.op": s["op"]})
    zoned.to_csv(tmp_path / "zoned.csv", index=False)
    rec = ExportSource.open(tmp_path / "zoned.csv").read("FIC-1")
    assert len(rec.segments) == 1 and rec.segments[0].n == 3600 and rec.start == utc[0]
    naive = zoned.assign(timestamp=local.strftime("%Y-%m-%dT%H:%M:%S"))
    naive.to_csv(tmp_path / "naive.csv", index=False)
    rec2 = ExportSource.open(tmp_path / "naive.csv", ExportNaming(timezone="Europe/Berlin")).read("FIC-1")
    assert len(rec2.segments) == 1 and rec2.start == utc[0] and not rec2.notes_of("zone")
    rec3 = ExportSource.open(tmp_path / "naive.csv").read("FIC-1")
    assert rec3.notes_of("zone") and len(rec3.segments) == 2          # wall-clock: the hour shows as a gap


def test_naming_from_the_policy(tmp_path):
    """Patterns and words of the policy sheet: 'TAG:MEAS' columns, German-style signal words."""
    pol = Policy().with_values({"export_columns_pv": "{tag}:MEAS", "export_columns_op": "{tag}:OUT",
                                "export_words_pv": "istwert", "export_words_op": "stellgroesse",
                                "export_tag_column": "point"})
    s = _signals(2)
    pd.DataFrame({"time_s": np.arange(N, dtype=float), "P-9:MEAS": s["pv"], "P-9:OUT": s["op"]}).to_csv(
        tmp_path / "w.csv", index=False)
    rec = ExportSource.open(tmp_path / "w.csv", ExportNaming.from_policy(pol)).read("p-9")
    assert rec.signals == ("pv", "op") and rec.time_column == "time_s"
    long = pd.DataFrame({"point": "P-9", "time_min": np.repeat(np.arange(N) / 60.0, 1),
                         "signal": "Istwert", "value": s["pv"]})
    long = pd.concat([long, long.assign(signal="stellgroesse", value=s["op"]), long.assign(signal="xyz")])
    long.to_csv(tmp_path / "l.csv", index=False)
    rec = ExportSource.open(tmp_path / "l.csv", ExportNaming.from_policy(pol)).read("P-9")
    assert rec.signals == ("pv", "op") and rec.dt == pytest.approx(1.0)
    assert any("'xyz'" in n.text for n in rec.notes_of("header"))


def test_a_tag_without_data_is_a_note(tmp_path):
    pq.write_table(pa.Table.from_pandas(_long(["A-1"]), preserve_index=False), tmp_path / "e.parquet")
    rec = ExportSource.open(tmp_path / "e.parquet").read("B-2")
    assert not rec.usable and "no data for tag B-2" in str(rec.notes[0])


@pytest.mark.parametrize("frame,words", [
    (pd.DataFrame({"timestamp": ["2026-01-01T00:00:00Z"], "what": [1.0]}), "neither a long export"),
    (pd.DataFrame({"tag": ["A"], "signal": ["pv"], "value": [1.0]}), "needs exactly one time column"),
    (pd.DataFrame({"tag": ["A"], "time_s": [0.0], "signal": ["pv"], "value": [True]}), "values must be numbers"),
    (pd.DataFrame({"tag": [1.5], "time_s": [0.0], "signal": ["pv"], "value": [1.0]}), "tags must be text"),
    (pd.DataFrame({"time_s": [True], "A.pv": [1.0]}), "must hold numbers"),
])
def test_bad_exports_are_refused_with_a_message(tmp_path, frame, words):
    frame.to_parquet(tmp_path / "bad.parquet", index=False)
    with pytest.raises(ExportError, match=words) as e:
        ExportSource.open(tmp_path / "bad.parquet")
    assert "bad.parquet" in str(e.value)


def test_bad_paths(tmp_path):
    with pytest.raises(ExportError, match="nothing at that path"):
        ExportSource.open(tmp_path / "none.parquet")
    (tmp_path / "empty").mkdir()
    with pytest.raises(ExportError, match="holds no"):
        ExportSource.open(tmp_path / "empty")
    (tmp_path / "f").mkdir()
    os.mkfifo(tmp_path / "f" / "pipe.csv")
    with pytest.raises(ExportError, match="not a regular file"):
        ExportSource.open(tmp_path / "f")
    (tmp_path / "mixed").mkdir()
    pd.DataFrame({"time_s": [0.0, 1.0], "A.pv": [1.0, 2.0]}).to_csv(tmp_path / "mixed" / "a.csv", index=False)
    pd.DataFrame({"time_min": [0.0, 1.0], "B.pv": [1.0, 2.0]}).to_csv(tmp_path / "mixed" / "b.csv", index=False)
    with pytest.raises(ExportError, match="different time columns"):
        ExportSource.open(tmp_path / "mixed")


def test_source_pickles_and_reads_alike(tmp_path):
    """Sent to a worker process, the source reads the same record."""
    pq.write_table(pa.Table.from_pandas(_long(["A-1", "A-2"]), preserve_index=False), tmp_path / "e.parquet")
    src = ExportSource.open(tmp_path / "e.parquet")
    again = pickle.loads(pickle.dumps(src))
    assert src.read("A-2").segments and src.read("A-2").segments[0].n == N   # a real record, not two empty ones
    _same_record(src.read("A-2"), again.read("A-2"))
    _same_record(src.read("A-2"), ExportSource(str(tmp_path / "e.parquet"), ExportNaming()).read("A-2"))


def test_record_for_row_keeps_a_data_file_and_confines_it(tmp_path):
    from audit.rows import LoopRow
    pq.write_table(pa.Table.from_pandas(_long(["FIC-1"]), preserve_index=False), tmp_path / "e.parquet")
    s = _signals(9)
    pd.DataFrame({"time_s": np.arange(N, dtype=float), **s}).to_csv(tmp_path / "own.csv", index=False)

    src = ExportSource(str(tmp_path / "e.parquet"), ExportNaming())
    own = record_for_row(LoopRow(0, "loops", 2, tag="FIC-1", data_file="own.csv"), tmp_path, export=src)
    assert own.name == "own.csv" and own.record.time_column == "time_s"
    exp = record_for_row(LoopRow(0, "loops", 2, tag="FIC-1"), tmp_path, export=src)
    assert "FIC-1" in exp.name and exp.record.time_column == "timestamp"
    out = record_for_row(LoopRow(0, "loops", 2, tag="FIC-1", data_file="../x.csv"), tmp_path / "sub", export=src)
    assert out.record is None and "outside the inventory's folder" in out.refused
    assert record_for_row(LoopRow(0, "loops", 2, tag="FIC-1"), tmp_path).record is None
    # a row whose tag the export does not hold is read too: its record says so, in the row's note
    assert has_source(LoopRow(0, "loops", 2, tag="TIC-9"), src)
    none = record_for_row(LoopRow(0, "loops", 2, tag="TIC-9"), tmp_path, export=src)
    assert not none.record.segments and "no data for tag TIC-9" in str(none.record.notes[0])


def test_long_rows_in_any_order_give_the_same_record(tmp_path):
    """A long export sorted by tag, signal and time (each signal's times ascending and the same: the
    reader's short path) and the same rows shuffled (sorted and merged by time) give one record, also
    with one signal's rows missing at some times (common practice: a historian export has no row
    order to rely on)."""
    df = _long(["FIC-1", "TIC-2"])
    holes = (df["signal"] == "op") & df["timestamp"].isin(_stamps()[100:120])
    for name, table in (("full", df), ("holes", df[~holes])):
        table.to_parquet(tmp_path / f"{name}-sorted.parquet")
        table.sample(frac=1, random_state=4).to_parquet(tmp_path / f"{name}-shuffled.parquet")
        for tag in ("FIC-1", "TIC-2"):
            a = ExportSource.open(tmp_path / f"{name}-sorted.parquet").read(tag, name="X")
            b = ExportSource.open(tmp_path / f"{name}-shuffled.parquet").read(tag, name="X")
            assert a.signals == b.signals == ("sp", "pv", "op") and a.n_rows == b.n_rows == N
            assert [n.kind for n in a.notes] == [n.kind for n in b.notes]
            assert [(s.t0, s.dt, len(s.values["pv"])) for s in a.segments] == \
                [(s.t0, s.dt, len(s.values["pv"])) for s in b.segments]
            want = _signals(0 if tag == "FIC-1" else 1)
            for sig in ("sp", "pv", "op"):
                va = np.concatenate([s.values[sig] for s in a.segments])
                np.testing.assert_array_equal(va, np.concatenate([s.values[sig] for s in b.segments]))
                if name == "full":
                    np.testing.assert_array_equal(va, want[sig])
            if name == "holes":
                assert sum(len(s.values["op"]) for s in a.segments) < N   # the times without op are not kept whole


def test_long_export_as_generated_equals_a_plain_pandas_reading(tmp_path):
    """An export laid out as ``generate --data`` writes it (dictionary-encoded tag and signal columns,
    float32 values, microsecond UTC timestamps, mode words in a file of their own, several row groups,
    read in batches smaller than a row group) gives each tag's record that a plain pandas reading
    gives: the rows of the tag put side by side by time (pandas.DataFrame.pivot), values as float64,
    mode words coded in order of first appearance, the first time zone-aware in UTC (common practice:
    a memory-bounded reader must not change a value)."""
    from audit.plantdata.records import ReadPolicy
    n, tags = 1000, ["FIC-1", "TIC-2", "LIC-3"]
    rng = np.random.default_rng(3)
    stamps = pd.date_range("2026-11-02T00:00:00Z", periods=n, freq="1s").as_unit("us")
    num, modes = [], []
    for tag in tags:
        for sig in ("sp", "pv", "op"):
            num.append(pd.DataFrame({"tag": tag, "timestamp": stamps, "signal": sig,
                                     "value": (50 + rng.standard_normal(n).cumsum()).astype(np.float32)}))
        words = np.where(np.arange(n) % 300 < 40, "MAN", "AUTO")
        modes.append(pd.DataFrame({"tag": tag, "timestamp": stamps, "signal": "mode", "value": words}))
    (tmp_path / "exp").mkdir()
    for name, parts in (("loops-0001.parquet", num), ("loops-0001-mode.parquet", modes)):
        df = pd.concat(parts, ignore_index=True)
        table = pa.Table.from_pandas(df, preserve_index=False)
        table = table.set_column(0, "tag", pc_encode(table.column("tag")))
        table = table.set_column(2, "signal", pc_encode(table.column("signal")))
        if name.endswith("mode.parquet"):
            table = table.set_column(3, "value", pc_encode(table.column("value")))
        pq.write_table(table, tmp_path / "exp" / name, row_group_size=n)   # one row group per tag and signal
    src = ExportSource.open(tmp_path / "exp")
    for tag in tags:
        rec = src.read(tag, policy=ReadPolicy(chunk_rows=97))
        plain = pd.concat([pd.read_parquet(tmp_path / "exp" / f) for f in
                           ("loops-0001.parquet", "loops-0001-mode.parquet")])
        plain = plain[plain["tag"].astype(str) == tag].pivot(index="timestamp", columns="signal", values="value")
        plain = plain.sort_index()
        assert rec.signals == ("sp", "pv", "op", "mode") and len(rec.segments) == 1 and rec.dt == 1.0
        assert rec.start == plain.index[0] and str(rec.start.tz) == "UTC"
        seg = rec.segments[0]
        for sig in ("sp", "pv", "op"):
            np.testing.assert_array_equal(seg.values[sig], plain[sig].to_numpy(dtype=np.float64))
        labels = np.array(rec.mode_labels, dtype=object)
        np.testing.assert_array_equal(labels[seg.mode], plain["mode"].astype(str).to_numpy())
        assert rec.mode_labels == ("MAN", "AUTO")


def pc_encode(col):
    """A column dictionary-encoded (as the generator writes text columns)."""
    import pyarrow.compute as pc
    return pc.dictionary_encode(col)
