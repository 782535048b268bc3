"""Regression check of a run's results: every column of two results files must agree.

Usage::

    python benchmarks/compare_results.py BEFORE.csv AFTER.csv [--rtol 1e-9]
    python benchmarks/compare_results.py BEFORE.json AFTER.json [--rtol 1e-9] [--atol 0]
    python benchmarks/compare_results.py BEFORE.csv AFTER.csv --columns proposal

Both files come from ``plant-audit run`` on the same inventory with the same ``--date`` (one
before a change, one after). Rows are matched by position (the results keep inventory order)
and must be as many. A column holding numbers in both files agrees where both values are
missing, or equal, or differ by at most ``atol + rtol`` times the larger magnitude (floating-point
order may change the last bits; ``atol``, none by default, admits the rounding noise of a figure
that is a small difference of large numbers, such as an overshoot of 1e-11 %); every other column (verdicts, findings, notes, ranks given as text) must be
equal as text. For ``results.json`` the run's other entries (meta, policy, columns) must be
equal too. Printed: one line per column that differs (how many rows, the largest relative
difference, the first row), then a summary; exit status 0 when everything agrees, 1 otherwise.

``--columns proposal`` compares only the columns the proposals stages write (the verdict, the
``proposal_*`` and ``group_*proposal*`` columns, ``best_band_s_db``, ``limiting_factor``) and the
ranking that reads them (``priority_score``, ``rank``); ``all`` (the default) every column.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path

import numpy as np
import pandas as pd


def _table(path: Path) -> tuple[pd.DataFrame, dict]:
    """The results rows (every cell as read, text kept) and, for JSON, the other top-level entries."""
    if path.suffix.lower() == ".json":
        doc = json.loads(path.read_text(encoding="utf-8"))
        rows = doc.pop("loops")
        return pd.DataFrame.from_records(rows), doc
    return pd.read_csv(path, dtype=str, keep_default_na=False), {}


PROPOSAL_COLUMNS = ("verdict", "best_band_s_db", "limiting_factor", "priority_score", "rank")


def proposal_columns(cols) -> list[str]:
    """The columns written by the proposals stages (and the ranking), in file order."""
    return [c for c in cols if c in PROPOSAL_COLUMNS or c.startswith("proposal_")
            or (c.startswith("group_") and ("proposal" in c or "detuning" in c))]


def _numbers(col: pd.Series) -> np.ndarray | None:
    """The column as floats (blank and NaN-like cells as NaN), or None when a cell is not a number."""
    out = np.empty(len(col))
    for i, v in enumerate(col.tolist()):
        if v is None or v == "" or (isinstance(v, float) and math.isnan(v)):
            out[i] = np.nan
        elif isinstance(v, bool):
            return None
        else:
            try:
                out[i] = float(v)
            except (TypeError, ValueError):
                return None
    return out


def compare(before: Path, after: Path, rtol: float = 1e-9, atol: float = 0.0, columns: str = "all") -> list[str]:
    """Differences between two results files, one text line each (empty when they agree).

    Parameters
    ----------
    before, after : Path
        ``results.csv`` or ``results.json`` of two runs (the same kind).
    rtol : float
        Largest relative difference of two numbers taken as equal. [-]
    atol : float
        Absolute difference allowed besides ``rtol`` (in each column's own unit).
    columns : str
        ``all``, or ``proposal`` for the proposals' columns and the ranking only.

    Returns
    -------
    list of str
        What differs.
    """
    a, meta_a = _table(before)
    b, meta_b = _table(after)
    out: list[str] = []
    for k in sorted(set(meta_a) | set(meta_b)):
        if meta_a.get(k) != meta_b.get(k):
            out.append(f"entry {k!r}: {meta_a.get(k)!r} != {meta_b.get(k)!r}")
    if columns == "proposal":
        a, b = a[proposal_columns(a.columns)], b[proposal_columns(b.columns)]
    if list(a.columns) != list(b.columns):
        out.append(f"columns differ: only before {sorted(set(a.columns) - set(b.columns))}, "
                   f"only after {sorted(set(b.columns) - set(a.columns))}, or in another order")
    if len(a) != len(b):
        out.append(f"rows: {len(a)} before, {len(b)} after")
        return out
    for c in [c for c in a.columns if c in b.columns]:
        x, y = _numbers(a[c]), _numbers(b[c])
        if x is not None and y is not None:
            both_nan = np.isnan(x) & np.isnan(y)
            with np.errstate(invalid="ignore"):
                scale = np.maximum(np.abs(x), np.abs(y))
                diff = np.abs(x - y)
                same = both_nan | (x == y) | (diff <= atol + rtol * scale)
                rel = np.where(scale > 0, diff / np.where(scale > 0, scale, 1.0), diff)
            bad = np.flatnonzero(~same)
            if len(bad):
                worst = np.nanmax(np.where(same, 0.0, np.where(np.isnan(rel), np.inf, rel)))
                i = bad[0]
                out.append(f"{c}: {len(bad)} rows differ, largest relative difference {worst:.3g}; "
                           f"first at row {i}: {x[i]!r} -> {y[i]!r}")
        else:
            sa, sb = a[c].astype(str).tolist(), b[c].astype(str).tolist()
            bad = [i for i, (p, q) in enumerate(zip(sa, sb)) if p != q]
            if bad:
                i = bad[0]
                out.append(f"{c}: {len(bad)} rows differ as text; first at row {i}: {sa[i][:80]!r} -> {sb[i][:80]!r}")
    return out


def largest_difference(before: Path, after: Path, atol: float = 0.0) -> float:
    """Largest relative difference over the numeric cells of two results files that differ by more than ``atol``. [-]"""
    a, _ = _table(before)
    b, _ = _table(after)
    worst = 0.0
    for c in [c for c in a.columns if c in b.columns]:
        x, y = _numbers(a[c]), _numbers(b[c])
        if x is None or y is None or len(x) != len(y):
            continue
        with np.errstate(invalid="ignore", divide="ignore"):
            scale = np.maximum(np.abs(x), np.abs(y))
            rel = np.where(np.abs(x - y) > atol, np.abs(x - y) / scale, 0.0)
        rel = rel[np.isfinite(rel)]
        if len(rel):
            worst = max(worst, float(rel.max()))
    return worst


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="Compare two plant-audit results files column by column.")
    ap.add_argument("before", type=Path)
    ap.add_argument("after", type=Path)
    ap.add_argument("--rtol", type=float, default=1e-9)
    ap.add_argument("--atol", type=float, default=0.0)
    ap.add_argument("--columns", choices=("all", "proposal"), default="all")
    args = ap.parse_args(argv)
    diffs = compare(args.before, args.after, args.rtol, args.atol, args.columns)
    for line in diffs:
        print(line)
    worst = largest_difference(args.before, args.after, args.atol)
    n = len(_table(args.before)[0])
    if diffs:
        print(f"DIFFERENT: {len(diffs)} columns or entries differ beyond rtol {args.rtol:g}, atol {args.atol:g} "
              f"({n} rows)")
        return 1
    print(f"same: {n} rows, every column equal; largest relative difference of a number beyond atol {worst:.3g} "
          f"(rtol {args.rtol:g}, atol {args.atol:g})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
