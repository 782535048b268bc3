"""Write the invented disturbance records of the sample site (deterministic, seeded).

Run from anywhere: ``python sample_site/records/make_records.py``. Each record is the
PV deviation logged with its loop in manual (an output disturbance), invented for the
demo plant; no real plant data.

* slow_periodic.csv - aeration basin dissolved oxygen, influent load cycling with a
  2 h period and its second harmonic, 48 h every 30 s; ``time_s``, ``value`` [% of range].
* broadband.csv - clarifier level, filtered noise from surface wash and inflow surges,
  2 h every 1 s; ``timestamp`` (ISO 8601), ``value_eu`` [m] on a 0-4 m range.
* step_upset.csv - digester heating-loop temperature, a feed changeover held for 40 min
  then reversed, 6 h every 10 s; ``time_min``, ``value`` [% of range].
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
from scipy.signal import lfilter

HERE = Path(__file__).resolve().parent
SEED = 20240611


def slow_periodic(rng: np.random.Generator) -> str:
    t = np.arange(0.0, 48 * 3600.0, 30.0)
    w = 2 * np.pi / 7200.0
    d = 3.0 * np.sin(w * t) + 0.8 * np.sin(2 * w * t + 0.7) + 0.15 * rng.standard_normal(len(t))
    return "time_s,value\n" + "".join(f"{a:.0f},{b:.4f}\n" for a, b in zip(t, 50.0 + d))


def broadband(rng: np.random.Generator) -> str:
    n = 7200
    e = rng.standard_normal(n + 600)
    a = np.exp(-1.0 / 40.0)                       # first-order filter, time constant 40 s
    x = lfilter([0.0, 1.0 - a], [1.0, -a], e)[600:]
    x = lfilter([0.0, 1.0 - a], [1.0, -a], x)     # second order: rolls off above 1/40 rad/s
    level = 2.0 + 0.05 * x / np.std(x)            # [m], about 1.25 % of a 4 m range (1 sigma)
    t0 = dt.datetime(2024, 3, 4, 6, 0, 0)
    lines = [f"{(t0 + dt.timedelta(seconds=k)).isoformat()},{v:.5f}\n" for k, v in enumerate(level)]
    return "timestamp,value_eu\n" + "".join(lines)


def step_upset(rng: np.random.Generator) -> str:
    t = np.arange(0.0, 6 * 3600.0, 10.0)
    d = np.where((t >= 7200.0) & (t < 9600.0), 4.0, 0.0)
    tau = 300.0                                   # the changeover takes a few minutes to arrive
    a = np.exp(-10.0 / tau)
    d = lfilter([1.0 - a], [1.0, -a], d) + 0.1 * rng.standard_normal(len(t))
    return "time_min,value\n" + "".join(f"{a / 60.0:.6f},{b:.4f}\n" for a, b in zip(t, 40.0 + d))


def main() -> None:
    rng = np.random.default_rng(SEED)
    for name, make in (("slow_periodic.csv", slow_periodic), ("broadband.csv", broadband),
                       ("step_upset.csv", step_upset)):
        (HERE / name).write_text("# invented record for the demo plant; see make_records.py\n" + make(rng),
                                 encoding="utf-8")


if __name__ == "__main__":
    main()
