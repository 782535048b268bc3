"""Interacting-loop benchmark: time of one group's stability verdict and full figures, by group size.

Usage::

    python benchmarks/multiloop.py [--groups 20] [--seed 1]

Groups: seeded random groups of n = 2, 4, 6 and 8 fopdt loops with PI controllers, every pair
coupled (the worst case: n^2 delayed elements). Printed per size: mean wall time of
``group_stability`` (generalised Nyquist verdict), of ``analyse_group`` (RGAs, Niederlinski index,
sigma peak, each loop with the others closed; the verdict included), the traced points, and the share
of stable groups. Figures only; nothing is asserted (speed targets live here, not in the tests).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from audit.loop import Controller, LoopModel, make_process  # noqa: E402
from audit.multiloop.figures import GroupModel, analyse_group, group_stability  # noqa: E402


def random_group(rng: np.random.Generator, n: int) -> GroupModel:
    """A fully coupled group of n fopdt/PI loops (benchmark data)."""
    loops, cpl = [], {}
    for i in range(n):
        for j in range(n):
            k = float(rng.uniform(0.5, 2.0)) if i == j else float(rng.uniform(-0.3, 0.3))
            p = make_process("fopdt", k, float(rng.uniform(5, 60)), dead_time=float(rng.uniform(0.5, 8)))
            if i == j:
                kc = float(rng.uniform(0.1, 0.6)) * p.tau1 / (k * p.dead_time)
                loops.append(LoopModel(f"L{i}", p, Controller("ideal", kc=kc, ti=p.tau1)))
            else:
                cpl[(i, j)] = p
    return GroupModel(tuple(m.tag for m in loops), tuple(loops), cpl)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--groups", type=int, default=20)
    ap.add_argument("--seed", type=int, default=1)
    a = ap.parse_args()
    rng = np.random.default_rng(a.seed)
    print(f"{'n':>3} {'verdict [ms]':>13} {'all figures [ms]':>17} {'points':>8} {'stable':>7}")
    for n in (2, 4, 6, 8):
        gs = [random_group(rng, n) for _ in range(a.groups)]
        t0 = time.perf_counter()
        sts = [group_stability(g) for g in gs]
        t1 = time.perf_counter()
        for g, st in zip(gs, sts):
            analyse_group(g, st)
        t2 = time.perf_counter()
        pts = np.mean([st.axis.t.size for st in sts])
        print(f"{n:>3} {1e3 * (t1 - t0) / a.groups:>13.1f} {1e3 * (t2 - t1) / a.groups:>17.1f} {pts:>8.0f} "
              f"{np.mean([st.stable for st in sts]):>7.2f}")


if __name__ == "__main__":
    main()
