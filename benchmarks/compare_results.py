"""Compare two results.csv files column by column (a change that must not change results).

Usage::

    python benchmarks/compare_results.py BEFORE.csv AFTER.csv [--columns proposal] [--rtol 1e-9]

Rows are matched by position and must carry the same ``row`` and ``tag``. A text column (verdict,
method, settings text, notes, findings, ...) must be identical. A numeric column must be identical
or equal to ``--rtol`` relative (absolute ``--rtol`` near zero), NaN matching NaN. Printed: per
column, the rows identical, the rows equal within the tolerance and the largest relative
difference, and the rows that differ beyond it (first few shown). Exit status 0 when every
compared column agrees, 1 otherwise. A check that prints figures, not a timed test.

``--columns proposal`` compares the columns the proposals stages write (the verdict, the
``proposal_*`` and ``group_*proposal*`` columns, ``best_band_s_db``, ``limiting_factor``) and the
ranking that reads them (``priority_score``, ``rank``); ``--columns all`` compares every column
the two files share.
"""

from __future__ import annotations

import argparse
import math
import sys

import pandas as pd

PROPOSAL_COLUMNS = ("verdict", "best_band_s_db", "limiting_factor", "priority_score", "rank")


def proposal_columns(cols) -> list[str]:
    """The columns written by the proposals stages (and the ranking), in file order."""
    return [c for c in cols if c in PROPOSAL_COLUMNS or c.startswith("proposal_")
            or (c.startswith("group_") and ("proposal" in c or "detuning" in c))]


def _num(v) -> float | None:
    """The value as a float when it is one (blank is NaN), else None."""
    if v is None or (isinstance(v, float) and math.isnan(v)) or v == "":
        return math.nan
    try:
        return float(v)
    except (TypeError, ValueError):
        return None


def compare(before: pd.DataFrame, after: pd.DataFrame, columns: list[str], rtol: float) -> dict[str, dict]:
    """Per column: counts of identical, tolerated and differing rows, and the largest relative difference.

    Parameters
    ----------
    before, after : pandas.DataFrame
        The two results tables, read as text (``dtype=str``, blanks kept as NaN).
    columns : list of str
        Columns to compare.
    rtol : float
        Relative tolerance for numbers. [-]

    Returns
    -------
    dict
        Column -> ``{"same": int, "close": int, "max_rel": float, "differ": [(row, before, after), ...]}``.
    """
    out: dict[str, dict] = {}
    for c in columns:
        same = close = 0
        max_rel = 0.0
        differ = []
        for k, (a, b) in enumerate(zip(before[c].tolist(), after[c].tolist())):
            if (a == b) or (pd.isna(a) and pd.isna(b)):
                same += 1
                continue
            x, y = _num(a), _num(b)
            if x is not None and y is not None and not (math.isnan(x) or math.isnan(y)):
                scale = max(abs(x), abs(y))
                rel = abs(x - y) / scale if scale > 1.0 else abs(x - y)
                if rel <= rtol:
                    close += 1
                    max_rel = max(max_rel, rel)
                    continue
            differ.append((before["row"].iloc[k], a, b))
        out[c] = {"same": same, "close": close, "max_rel": max_rel, "differ": differ}
    return out


def main(argv: list[str] | None = None) -> int:
    """Compare the files named in ``argv``; 0 when they agree, 1 when they do not."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("before")
    ap.add_argument("after")
    ap.add_argument("--columns", choices=("proposal", "all"), default="proposal")
    ap.add_argument("--rtol", type=float, default=1e-9)
    a = ap.parse_args(argv)
    before = pd.read_csv(a.before, dtype=str, keep_default_na=False, na_values=[""])
    after = pd.read_csv(a.after, dtype=str, keep_default_na=False, na_values=[""])
    if len(before) != len(after) or before["row"].tolist() != after["row"].tolist() \
            or before["tag"].fillna("").tolist() != after["tag"].fillna("").tolist():
        print(f"the files hold different rows ({len(before)} and {len(after)})")
        return 1
    shared = [c for c in before.columns if c in after.columns]
    cols = proposal_columns(shared) if a.columns == "proposal" else shared
    missing = sorted(set(proposal_columns(before.columns)) ^ set(proposal_columns(after.columns)))
    got = compare(before, after, cols, a.rtol)
    print(f"{len(before)} rows, {len(cols)} columns compared (relative tolerance {a.rtol:g})")
    print(f"{'column':28s} {'identical':>9s} {'close':>6s} {'max rel':>9s} {'differ':>6s}")
    bad = 0
    for c, r in got.items():
        print(f"{c:28s} {r['same']:9d} {r['close']:6d} {r['max_rel']:9.2g} {len(r['differ']):6d}")
        bad += len(r["differ"])
        for row, x, y in r["differ"][:3]:
            print(f"    row {row}: {x!r} -> {y!r}")
    if missing:
        print("columns in only one file:", ", ".join(missing))
    print("AGREE" if not bad and not missing else f"DIFFER: {bad} values")
    return 0 if not bad and not missing else 1


if __name__ == "__main__":
    sys.exit(main())
