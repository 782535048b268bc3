"""results.csv / results.json writers (regression and format checks; strict JSON per RFC 8259)."""

from __future__ import annotations

import csv
import json
import math

import numpy as np
import pandas as pd

from audit.output import csv_cell, output_columns, plain, write_csv, write_json


def _frame() -> pd.DataFrame:
    return pd.DataFrame({
        "row": [2, 3], "tag": ["=HYPERLINK(\"http://x\")", "FIC-1"], "service": ["+cmd", "feed"],
        "gm": [math.inf, 3.14], "gm_low": [np.nan, 0.5], "stable": [True, None],
        "band_ok": pd.array([None, True], dtype="boolean"), "rhp_closed": pd.array([0, None], dtype="Int64"),
        "owner": ["-ops", "me"],
    })


def test_plain_values():
    """RFC 8259 has no NaN or Infinity: inf becomes "inf", missing becomes null."""
    assert plain(math.inf) == "inf" and plain(-math.inf) == "-inf"
    assert plain(float("nan")) is None and plain(pd.NA) is None and plain(None) is None
    assert plain(np.int64(3)) == 3 and plain(np.bool_(True)) is True


def test_csv_inf_missing_and_formula_neutralised(tmp_path):
    """inf is written `inf`, missing is empty, and text that a spreadsheet would run as a formula
    (starting with = + - @) gets a leading apostrophe (OWASP, CSV Injection; common practice)."""
    df = _frame()
    cols = output_columns(df, ("owner",))
    assert cols[-1] == "owner"
    write_csv(tmp_path / "r.csv", df, cols)
    rows = list(csv.DictReader(open(tmp_path / "r.csv", encoding="utf-8")))
    assert rows[0]["gm"] == "inf" and rows[0]["gm_low"] == ""
    assert rows[0]["tag"].startswith("'=") and rows[0]["service"] == "'+cmd" and rows[0]["owner"] == "'-ops"
    assert rows[1]["gm"] == "3.14" and rows[1]["stable"] == "" and rows[0]["stable"] == "true"
    assert csv_cell(-3.5) == "-3.5"  # numbers are not text: never prefixed


def test_json_is_strict(tmp_path):
    """The JSON parses with a strict parser that rejects NaN/Infinity tokens."""
    df = _frame()
    cols = output_columns(df)
    write_json(tmp_path / "r.json", df, cols, {"tool_version": "x", "policy": {"ms_max": 2.0}})

    def reject(token):
        raise ValueError(token)

    doc = json.loads((tmp_path / "r.json").read_text(), parse_constant=reject)
    assert doc["loops"][0]["gm"] == "inf" and doc["loops"][0]["gm_low"] is None
    assert doc["loops"][1]["rhp_closed"] is None and doc["policy"]["ms_max"] == 2.0
    assert [r["row"] for r in doc["loops"]] == [2, 3]


def test_csv_formula_like_headers_neutralised(tmp_path):
    """The writer does not trust the reader to have renamed formula-like headers: a header starting
    with = + - @ gets the same leading apostrophe as a cell (OWASP, CSV Injection; common practice)."""
    df = _frame().rename(columns={"owner": "=HYPERLINK(\"http://x\")"})
    df["@sum(A1)"] = ["a", "b"]
    cols = output_columns(df, ("=HYPERLINK(\"http://x\")", "@sum(A1)"))
    write_csv(tmp_path / "r.csv", df, cols)
    with open(tmp_path / "r.csv", encoding="utf-8", newline="") as fh:
        header, first, _ = list(csv.reader(fh))
    assert header[-2:] == ["'=HYPERLINK(\"http://x\")", "'@sum(A1)"]
    assert not any(h.startswith(("=", "+", "-", "@")) for h in header)
    assert header[:2] == ["row", "tag"] and first[-2:] == ["'-ops", "a"]  # known headers and cells as before


def _reference_json(df: pd.DataFrame, cols: list[str], meta: dict) -> str:
    """results.json as the json module writes it value by value (the layout the writer promises)."""
    rows = [{c: plain(v) for c, v in zip(cols, rec)} for rec in df[cols].itertuples(index=False, name=None)]
    return json.dumps({**plain(meta), "columns": cols, "loops": rows}, indent=1, allow_nan=False,
                      ensure_ascii=False) + "\n"


def _reference_csv(df: pd.DataFrame, cols: list[str]) -> list[list[str]]:
    return [[c for c in cols]] + [[csv_cell(v) for v in rec] for rec in df[cols].itertuples(index=False, name=None)]


def test_column_writers_give_the_bytes_of_the_value_by_value_encoders(tmp_path):
    """The column-at-a-time writers give the same bytes as json.dump / csv_cell value by value (regression),
    over quotes, backslashes, control characters, non-ASCII text, -0.0, large integers, infinities and NaN."""
    rng = np.random.default_rng(11)
    n = 500
    df = pd.DataFrame({
        "row": np.arange(2, n + 2), "tag": [f'T"{i}\\\u00e9\u2013\x01' for i in range(n)],
        "ms": rng.lognormal(0, 1, n), "gm": np.where(rng.random(n) < 0.1, np.inf, rng.random(n)),
        "pm_deg": np.where(rng.random(n) < 0.2, np.nan, -rng.random(n)), "stable": rng.random(n) < 0.5,
        "rhp_closed": pd.array([None if i % 7 == 0 else i for i in range(n)], dtype="Int64"),
        "findings": [None if i % 3 else "ok" for i in range(n)], "owner": [2 ** 60 + i for i in range(n)],
    })
    df.loc[3, "ms"] = -0.0
    df.loc[5, "gm"] = -np.inf
    cols = output_columns(df, ("owner",))
    meta = {"tool": "plant-audit", "inventory": "\u00e9.xlsx", "policy": {"ms_max": 2.0}}
    write_json(tmp_path / "r.json", df, cols, meta)
    assert (tmp_path / "r.json").read_text(encoding="utf-8") == _reference_json(df, cols, meta)
    write_csv(tmp_path / "r.csv", df, cols)
    with open(tmp_path / "r.csv", encoding="utf-8", newline="") as fh:
        got = list(csv.reader(fh))
    want = _reference_csv(df, cols)
    assert got == want


def test_json_with_a_list_cell_and_an_empty_table(tmp_path):
    """A cell holding a list falls back to the general encoder; no rows gives an empty list (regression)."""
    df = _frame()
    df["tag"] = [["a", 1.5], "b"]
    cols = output_columns(df)
    meta = {"tool": "plant-audit"}
    write_json(tmp_path / "r.json", df, cols, meta)
    assert (tmp_path / "r.json").read_text(encoding="utf-8") == _reference_json(df, cols, meta)
    empty = _frame().iloc[:0]
    write_json(tmp_path / "e.json", empty, output_columns(empty), meta)
    assert (tmp_path / "e.json").read_text(encoding="utf-8") == _reference_json(empty, output_columns(empty), meta)
    assert json.loads((tmp_path / "e.json").read_text())["loops"] == []
