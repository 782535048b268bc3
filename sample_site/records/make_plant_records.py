"""Write the invented plant records of the sample site (sample_site/records/plant/).

Every record is simulated here from an invented "true" process, seeded, so the files are
the same on every run. The plant is simulated on a grid ten times finer than the logging
interval (scipy.signal.cont2discrete, zero-order hold) with the dead time as a delay line;
the controller output is held between controller executions; measurement noise is white.

Usage::

    python sample_site/records/make_plant_records.py

| file | loop | what it shows |
|---|---|---|
| fic102_bump.csv | FIC-102 | a bump test in manual; the model in the inventory is right |
| tic401_bump.csv | TIC-401 | a bump test of a second-order loop, zoned timestamps across the spring clock change |
| pic403_sp_changes.csv | PIC-403 | set-point changes in automatic (PI), logged op drives the model |
| tic312_normal.csv | TIC-312 | normal operation in automatic: load upsets only, small moves of op |
| tic607_bump.csv | TIC-607 | a stale model: the true dead time is 80 s, the inventory says 40 s |
| aic407_small_bump.csv | AIC-407 | too little excitation: op moved 0.6 % in noise |
| lic411_bump.parquet | LIC-411 | an integrating level, Parquet |
| fic601_bump_gaps.csv | FIC-601 | a bump test with historian quality words and a communication gap |
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from scipy import signal

OUT = Path(__file__).resolve().parent / "plant"
FINE = 10


def plant(num, den, theta, dt):
    """Fine-grid state space and the delay in fine steps."""
    h = dt / FINE
    A, B, C, D, _ = signal.cont2discrete(signal.tf2ss(num, den), h, method="zoh")
    return A, B, C, int(round(theta / h))


def run(num, den, theta, dt, n, op_manual=None, sp=None, kc=0.0, ti=1.0, op0=50.0, load=None, noise=0.0,
        rng=None):
    """pv deviation and op over n samples: manual (op given) or PI in automatic (sp given)."""
    A, B, C, d = plant(num, den, theta, dt)
    x = np.zeros((A.shape[0], 1))
    line = np.zeros(d + 1)
    pv, op = np.zeros(n), np.zeros(n)
    e_prev, u = 0.0, op0
    for k in range(n):
        y = float((C @ x).item()) + (load[k] if load is not None else 0.0)
        meas = y + noise * rng.standard_normal()
        pv[k] = meas
        if op_manual is not None:
            u = op_manual[k]
        else:
            e = sp[k] - meas
            u = min(max(u + kc * (e - e_prev + dt / ti * e), 0.0), 100.0)
            e_prev = e
        op[k] = u
        for _ in range(FINE):
            line = np.roll(line, 1)
            line[0] = u - op0
            x = A @ x + B * line[d]
    return pv, op


def steps(n, levels, at):
    op = np.full(n, float(levels[0]))
    for lv, k in zip(levels[1:], at):
        op[k:] = lv
    return op


def write_csv(name, header, columns, fmt):
    lines = ["# invented record for the demo plant; see make_plant_records.py", ",".join(header)]
    for row in zip(*columns):
        lines.append(",".join(f(v) for f, v in zip(fmt, row)))
    (OUT / name).write_text("\n".join(lines) + "\n", encoding="utf-8")


def num(v):
    return f"{v:.4f}"


def main() -> None:
    OUT.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(20240304)

    # FIC-102: bump test in manual; true model = the inventory's (1.2, 3 s, 0.5 s)
    dt, n = 0.25, 2400
    op = steps(n, (40, 45, 38, 42), (400, 1100, 1800))
    pv, _ = run([1.2], [3, 1], 0.5, dt, n, op_manual=op, op0=40, noise=0.15, rng=rng)
    write_csv("fic102_bump.csv", ["time_s", "pv", "op", "mode"],
              [np.arange(n) * dt, 48 + pv, op, ["MAN"] * n], [lambda v: f"{v:g}", num, num, str])

    # TIC-401: sopdt bump test, 2-s samples, zoned timestamps across 2024-03-31 01:00 UTC (Europe/London)
    dt, n = 2.0, 5400
    op = steps(n, (30, 36, 27, 33), (600, 2100, 3600))
    pv, _ = run([1.2], list(np.polymul([300, 1], [60, 1])), 20.0, dt, n, op_manual=op, op0=30, noise=0.1, rng=rng)
    import pandas as pd
    t = pd.date_range("2024-03-30T23:00:00Z", periods=n, freq="2s").tz_convert("Europe/London")
    write_csv("tic401_bump.csv", ["timestamp", "pv", "op"], [[s.isoformat() for s in t], 55 + pv, op],
              [str, num, num])

    # PIC-403: set-point changes in automatic (PI kc 10, ti 80 s on the true plant 0.5, 120 s, 10 s)
    dt, n = 1.0, 3600
    sp = steps(n, (0, 4, -2, 3), (300, 1200, 2400))
    pv, op = run([0.5], [120, 1], 10.0, dt, n, sp=sp, kc=10.0, ti=80.0, op0=45, noise=0.08, rng=rng)
    write_csv("pic403_sp_changes.csv", ["time_s", "sp", "pv", "op", "mode"],
              [np.arange(n) * dt, 60 + sp, 60 + pv, op, ["AUTO"] * n], [lambda v: f"{v:g}", num, num, num, str])

    # TIC-312: normal operation in automatic: a slow load (filtered random walk) and noise, set point fixed
    dt, n = 2.0, 10800
    w = np.cumsum(rng.standard_normal(n)) * 0.05
    load = signal.lfilter([0.02], [1, -0.98], w)
    pv, op = run([0.9], [240, 1], 45.0, dt, n, sp=np.zeros(n), kc=2.0, ti=240.0, op0=50, load=load, noise=0.05,
                 rng=rng)
    write_csv("tic312_normal.csv", ["time_s", "sp", "pv", "op", "mode"],
              [np.arange(n) * dt, np.full(n, 62.0), 62 + pv, op, ["AUTO"] * n],
              [lambda v: f"{v:g}", num, num, num, str])

    # TIC-607: stale model: bump test of a plant whose dead time is 80 s (inventory: 40 s)
    dt, n = 3.0, 2400
    op = steps(n, (35, 41, 32, 38), (200, 870, 1600))
    pv, _ = run([1.1], [120, 1], 80.0, dt, n, op_manual=op, op0=35, noise=0.1, rng=rng)
    write_csv("tic607_bump.csv", ["time_min", "pv", "op"], [np.arange(n) * dt / 60, 58 + pv, op],
              [lambda v: f"{v:.2f}", num, num])

    # AIC-407: too little excitation: a 0.6 % bump buried in analyser noise
    dt, n = 5.0, 720
    op = steps(n, (50, 50.6), (360,))
    pv, _ = run([0.8], [20, 1], 15.0, dt, n, op_manual=op, op0=50, noise=0.4, rng=rng)
    write_csv("aic407_small_bump.csv", ["time_s", "pv", "op"], [np.arange(n) * dt, 40 + pv, op],
              [lambda v: f"{v:g}", num, num])

    # LIC-411: integrating level, bump and return, Parquet
    dt, n = 1.0, 1800
    op = steps(n, (50, 56, 50, 44, 50), (300, 420, 900, 1020))
    pv, _ = run([0.004], [1, 0], 4.0, dt, n, op_manual=op, op0=50, noise=0.05, rng=rng)
    import pyarrow as pa
    import pyarrow.parquet as pq
    tbl = pa.table({"time_s": np.arange(n) * dt, "pv": np.round(50 + pv, 4), "op": op})
    pq.write_table(tbl, OUT / "lic411_bump.parquet")

    # FIC-601: bump test with quality words and a 4-minute communication gap
    dt, n = 0.5, 3000
    op = steps(n, (45, 51, 41, 47), (400, 1200, 2100))
    pv, _ = run([1.0], [5, 1], 1.5, dt, n, op_manual=op, op0=45, noise=0.2, rng=rng)
    cells = [num(50 + v) for v in pv]
    for k in (150, 151, 990):
        cells[k] = "Bad Value"
    cells[1700] = "I/O Timeout"
    keep = np.r_[0:2500, 2980:n]                      # lines 2500-2979 never reached the historian
    write_csv("fic601_bump_gaps.csv", ["time_s", "pv", "op"],
              [(np.arange(n) * dt)[keep], [cells[k] for k in keep], op[keep]],
              [lambda v: f"{v:g}", str, num])


if __name__ == "__main__":
    main()
