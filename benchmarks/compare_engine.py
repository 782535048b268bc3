"""Regression check for changes to audit/frequency.py: before and after give the same figures.

Usage::

    cp audit/frequency.py /tmp/frequency_before.py      # before editing
    ... edit audit/frequency.py ...
    python benchmarks/compare_engine.py /tmp/frequency_before.py [--loops 600] [--seed 3]

Both versions evaluate the same seeded loops: a synthetic inventory (audit.generate,
cascades and invalid rows included, read through audit.inventory) and random loops of
every model type and controller form (tests/reference/loops_random.py). Every figure
must agree to 1e-9 relative (NaN with NaN, inf with inf); booleans, counts and notes
exactly. A peak location (w_ms, w_mt) may move when the loop's |S| (|T|) is the same at both
locations to 1e-9: a flat maximum has no better-defined location. Prints the largest relative difference per column and exits 1 on any
disagreement. Columns only the newer version has (e.g. ``lower_bounds``) are not compared.
This is a regression check (old code against new), not a validation; for ``tf`` loops, whose
figures a fix may rightly change, tests/reference/test_tf_truth.py compares with an independent
evaluation instead.
"""

from __future__ import annotations

import argparse
import importlib.util
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from audit import frequency  # noqa: E402
from audit.generate import write_synthetic_inventory  # noqa: E402

#: Largest relative difference accepted between two versions. [-]
RTOL = 1e-9


def load_engine(path: str):
    """Import another version of audit/frequency.py as a module of the audit package."""
    spec = importlib.util.spec_from_file_location("audit._engine_before", path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def inventory_models(loops: int, seed: int) -> tuple[list, np.ndarray]:
    """Models and bands of a synthetic inventory, built the way the pipeline builds them."""
    from audit.inventory import read_inventory
    from audit.pipeline import AuditOptions, build_models, new_audit

    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "synthetic.csv"
        write_synthetic_inventory(path, loops, seed)
        audit = new_audit(read_inventory(path), AuditOptions())
    build_models(audit)
    return audit.models, audit.results["band_rad_s"].to_numpy(float)


def random_models(loops: int, seed: int) -> tuple[list, np.ndarray]:
    """Random loops of tests/reference/loops_random.py, with a rejection band on every other one."""
    sys.path.insert(0, str(ROOT / "tests" / "reference"))
    from loops_random import random_loop

    rng = np.random.default_rng(seed)
    models = [random_loop(rng) for _ in range(loops)]
    band = np.where(np.arange(loops) % 2 == 0, 10 ** rng.uniform(-2, 0, loops), np.nan)
    return models, band


def _missing(v) -> bool:
    return v is None or v is pd.NA or (isinstance(v, float) and np.isnan(v))


#: Locations of maxima, and the magnitude each locates: |S| or |T| of the model at w. [-]
PEAK_LOCATIONS = {"w_ms_rad_s": lambda m, w: abs(m.S(np.array([w]))[0]),
                  "w_mt_rad_s": lambda m, w: abs(m.T(np.array([w]))[0])}


def _same_height(models, col: str, wa: float, wb: float) -> bool:
    """Two locations of one loop's maximum are equally good when the magnitude there agrees to RTOL."""
    if not (np.isfinite(wa) and np.isfinite(wb) and wa > 0 and wb > 0):
        return False
    fa, fb = PEAK_LOCATIONS[col](models, wa), PEAK_LOCATIONS[col](models, wb)
    return abs(fa - fb) <= RTOL * max(fa, fb)


def compare(a: pd.DataFrame, b: pd.DataFrame, models=None) -> dict[str, tuple[float, int]]:
    """Per column: largest relative difference and number of rows that disagree.

    The location of a flat maximum (w_ms, w_mt) is ill-determined: with ``models`` given, two
    locations whose |S| (|T|) agree to RTOL count as agreeing, however far apart.
    """
    out = {}
    for c in a.columns:
        x, y = a[c], b[c]
        if c in ("stable", "engine_note", "lower_bounds", "rhp_closed", "rhp_open"):
            bad = sum(not (_missing(u) and _missing(v) or (not _missing(u) and not _missing(v) and u == v))
                      for u, v in zip(x.astype(object), y.astype(object)))
            out[c] = (0.0 if bad == 0 else np.inf, bad)
            continue
        xv, yv = x.to_numpy(float), y.to_numpy(float)
        both_nan = np.isnan(xv) & np.isnan(yv)
        same = (xv == yv) | both_nan
        with np.errstate(invalid="ignore", divide="ignore"):
            rel = np.abs(xv - yv) / np.maximum(np.abs(xv), np.abs(yv))
        rel = np.where(same, 0.0, rel)
        rel = np.where(np.isnan(rel), np.inf, rel)
        if models is not None and c in PEAK_LOCATIONS:
            for i in np.flatnonzero(rel > RTOL):
                if models[i] is not None and _same_height(models[i], c, xv[i], yv[i]):
                    rel[i] = 0.0
        out[c] = (float(rel.max(initial=0.0)), int((rel > RTOL).sum()))
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("before", help="path of the earlier audit/frequency.py")
    ap.add_argument("--loops", type=int, default=600, help="loops of each set")
    ap.add_argument("--seed", type=int, default=3)
    args = ap.parse_args(argv)
    old = load_engine(args.before)
    worst = 0
    warnings.simplefilter("ignore", RuntimeWarning)
    for name, (models, band) in (("synthetic inventory", inventory_models(args.loops, args.seed)),
                                 ("random loops", random_models(args.loops, args.seed))):
        t0 = time.perf_counter()
        before = old.evaluate(models, band)
        t1 = time.perf_counter()
        after = frequency.evaluate(models, band)
        t2 = time.perf_counter()
        res = compare(before, after, models)
        bad = sum(n for _, n in res.values())
        worst = max(worst, bad)
        print(f"{name}: {len(models)} loops, before {t1 - t0:.2f} s, after {t2 - t1:.2f} s, "
              f"rows disagreeing {bad}")
        for c, (r, n) in res.items():
            if r > 0:
                print(f"  {c:<12} max rel diff {r:.3g}  rows > {RTOL:g}: {n}")
    print("identical within 1e-9" if worst == 0 else "DIFFERENCES FOUND")
    return 0 if worst == 0 else 1


if __name__ == "__main__":
    raise SystemExit(main())
