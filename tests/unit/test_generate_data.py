"""Synthetic historian exports (audit.generate_data): seeded, streamed, readable by the export reader.

Regression (common practice): the same seed gives the same export in every layout and format; a
different seed a different one; what is written reads back through ExportSource.
"""

from __future__ import annotations

import json

import pyarrow.parquet as pq
import pytest

from audit.cli import main
from audit.plantdata.export import ExportSource


def _gen(tmp, name, seed=4, layout="long", fmt="parquet", suffix=""):
    inv = tmp / f"{name}.xlsx"
    data = tmp / f"{name}{suffix}"
    code = main(["generate", "--loops", "6", str(inv), "--data", str(data), "--days", "0.01", "--seed", str(seed),
                 "--layout", layout, "--format", fmt])
    assert code == 0
    return inv, data


def _content(path):
    files = sorted(p for p in path.rglob("*") if p.suffix in (".parquet", ".csv")) if path.is_dir() else [path]
    out = []
    for f in files:
        out.append(pq.read_table(f).to_pandas() if f.suffix == ".parquet" else f.read_text())
    return out


@pytest.mark.parametrize("layout,fmt,suffix", [("long", "parquet", ""), ("wide", "parquet", ""),
                                               ("long", "csv", ""), ("wide", "csv", ".csv"),
                                               ("long", "parquet", ".parquet")])
def test_same_seed_same_export(tmp_path, layout, fmt, suffix):
    _, a = _gen(tmp_path, "a", 4, layout, fmt, suffix)
    _, b = _gen(tmp_path, "b", 4, layout, fmt, suffix)
    ca, cb = _content(a), _content(b)
    assert len(ca) == len(cb) >= 1
    for x, y in zip(ca, cb):
        if isinstance(x, str):
            assert x == y
        else:
            assert x.equals(y)
    src = ExportSource.open(a)
    meta = json.loads((a / "planted.json" if a.is_dir() else a.with_name(a.name + ".planted.json")).read_text())
    planted = meta["planted"]
    assert set(src.tags.values()) == set(planted)
    tag = sorted(planted)[0]
    rec = src.read(tag)
    assert rec.signals == ("sp", "pv", "op", "mode") and rec.dt == 1.0 and len(rec.segments) == 1
    assert rec.segments[0].n == 864 and str(rec.start) == "2026-11-02 00:00:00+00:00"
    assert not [n for n in rec.notes if n.kind not in ("flat",)]


def test_other_seed_other_export(tmp_path):
    _, a = _gen(tmp_path, "a", 4)
    _, b = _gen(tmp_path, "b", 5)
    ca, cb = _content(a), _content(b)
    same = len(ca) == len(cb) and all(len(x) == len(y) and x.equals(y) for x, y in zip(ca, cb))
    assert not same


def test_existing_data_is_not_replaced_without_force(tmp_path, capsys):
    (tmp_path / "d").mkdir()
    code = main(["generate", "--loops", "3", str(tmp_path / "i.xlsx"), "--data", str(tmp_path / "d")])
    assert code == 2 and "exists" in capsys.readouterr().err
    assert not (tmp_path / "i.xlsx").exists()


def test_same_export_whatever_the_jobs(tmp_path, monkeypatch):
    """The files are shared out among processes; each file group of loops draws from its own seeded
    generator and a loop's simulation does not depend on the others (common practice: a seeded
    result must not depend on how the work is split)."""
    import audit.generate_data as gd
    monkeypatch.setattr(gd, "FILE_LOOPS", 2)                 # several files, so two jobs have work
    monkeypatch.setattr(gd, "CHUNK_VALUES", 7 * 50)          # simulated 50 samples at a time: several chunks
    inv = tmp_path / "i.xlsx"
    assert main(["generate", "--loops", "7", str(inv), "--seed", "2"]) == 0
    one = gd.write_synthetic_export(inv, tmp_path / "one", days=0.005, seed=2, jobs=1)
    two = gd.write_synthetic_export(inv, tmp_path / "two", days=0.005, seed=2, jobs=2)
    ca, cb = _content(one.path), _content(two.path)
    assert len(ca) == len(cb) >= 4
    for x, y in zip(ca, cb):
        assert x.equals(y)
    f = sorted((tmp_path / "one").glob("loops-*[0-9].parquet"))[0]
    md = pq.ParquetFile(f).metadata
    assert md.num_row_groups == 2                            # one row group per tag and block
    assert str(pq.ParquetFile(f).schema_arrow.field("value").type) == "float"
