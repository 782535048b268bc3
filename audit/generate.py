"""Seeded synthetic inventories of an invented plant, for benchmarks and load tests.

``plant-audit generate --loops N PATH`` writes N loops in the inventory format that
:func:`audit.inventory.read_inventory` reads (canonical headers, times in seconds).
The plant is invented: six areas, each with its own mixture of loop kinds (flow,
pressure, level, temperature, composition), controller vintages (ideal, series or
parallel form), cascades, rejection-band requirements and a few rows with an entry
mistake. Controllers start from SIMC settings [1]_ and are then detuned or
over-tightened by a random factor, as real loops drift, so a realistic share of
the loops fails the audit or is closed-loop unstable.

The same seed always gives the same rows.

References
----------
.. [1] S. Skogestad, "Simple analytic rules for model reduction and PID controller
   tuning", Journal of Process Control 13 (2003) 291-309, eqs. (27)-(30) (SIMC settings)
   and sec. 3 (half rule).
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .loop import ideal_to_parallel, series_to_ideal
from .output import write_file_safely

#: Headers written, in order; every one is a canonical inventory column. [-]
GENERATED_COLUMNS: tuple[str, ...] = (
    "tag", "service", "area", "criticality", "model", "gain", "tau1_s", "tau2_s", "lead_s", "dead_time_s",
    "num", "den", "form", "kc", "ti_s", "td_s", "kp", "ki_per_s", "kd_s", "d_filter", "action", "sample_s",
    "pv_filter_s", "band_rad_s", "attenuation_db", "inner_loop",
)


@dataclass(frozen=True)
class Area:
    """One area of the invented plant.

    Attributes
    ----------
    name : str
        Area name.
    code : int
        Digit used in tags. [-]
    kinds : dict
        Loop kind -> weight of that kind in the area. [-]
    forms : dict
        Controller form -> weight (the area's control-system vintage). [-]
    weight : float
        Share of the plant's loops in this area. [-]
    """

    name: str
    code: int
    kinds: dict[str, float]
    forms: dict[str, float]
    weight: float


AREAS: tuple[Area, ...] = (
    Area("Boiler house", 1, {"pressure": 0.30, "flow": 0.30, "level": 0.25, "temperature": 0.15},
         {"ideal": 0.7, "series": 0.2, "parallel": 0.1}, 0.15),
    Area("Reactor bay", 2, {"temperature": 0.30, "reactor": 0.08, "flow": 0.30, "pressure": 0.12,
                            "composition": 0.10, "level": 0.10},
         {"ideal": 0.5, "series": 0.1, "parallel": 0.4}, 0.20),
    Area("Separation train", 3, {"temperature": 0.25, "composition": 0.25, "flow": 0.25, "level": 0.20,
                                 "pressure": 0.05},
         {"ideal": 0.6, "series": 0.3, "parallel": 0.1}, 0.20),
    Area("Tank farm", 4, {"level": 0.50, "flow": 0.40, "pressure": 0.10},
         {"ideal": 0.3, "series": 0.7}, 0.15),
    Area("Utilities", 5, {"pressure": 0.35, "flow": 0.25, "heat exchanger": 0.25, "temperature": 0.15},
         {"ideal": 0.8, "parallel": 0.2}, 0.15),
    Area("Effluent treatment", 6, {"composition": 0.30, "level": 0.30, "flow": 0.40},
         {"ideal": 0.4, "series": 0.3, "parallel": 0.3}, 0.15),
)

_PREFIX = {"flow": "FIC", "pressure": "PIC", "level": "LIC", "temperature": "TIC", "reactor": "TIC",
           "heat exchanger": "TIC", "composition": "AIC"}
_SERVICE = {
    "flow": ("Feed flow", "Reflux flow", "Steam flow", "Cooling water flow", "Recycle flow", "Dosing flow"),
    "pressure": ("Header pressure", "Drum pressure", "Column top pressure", "Vessel pressure"),
    "level": ("Drum level", "Tank level", "Sump level", "Reboiler level", "Buffer tank level"),
    "temperature": ("Tray temperature", "Outlet temperature", "Jacket temperature", "Preheater temperature"),
    "reactor": ("Reactor temperature",),
    "heat exchanger": ("Exchanger outlet temperature", "Condensate temperature"),
    "composition": ("Bottoms composition", "Effluent pH", "Dissolved oxygen", "Product purity"),
}
_HIGH = {"pressure", "reactor"}


def _sig(x: float, digits: int = 4) -> float:
    """x rounded to ``digits`` significant digits, as an engineer would type it."""
    return float(f"{x:.{digits}g}")


def _pick(rng: np.random.Generator, weights: dict[str, float]) -> str:
    keys = list(weights)
    p = np.array([weights[k] for k in keys], float)
    return keys[int(rng.choice(len(keys), p=p / p.sum()))]


def _loguniform(rng: np.random.Generator, lo: float, hi: float) -> float:
    return float(math.exp(rng.uniform(math.log(lo), math.log(hi))))


def _process(rng: np.random.Generator, kind: str) -> dict[str, Any]:
    """Model columns of one loop kind, plus the first-order-plus-dead-time view used for tuning.

    The returned ``_k``, ``_tau``, ``_tau2``, ``_theta`` and ``_integrating`` keys are for tuning only.
    """
    if kind == "flow":
        tau = _loguniform(rng, 1.0, 15.0)
        theta = _loguniform(rng, 0.2, 3.0) if rng.random() < 0.85 else 0.0
        k = _loguniform(rng, 0.5, 2.5)
        return {"model": "fopdt", "gain": _sig(k), "tau1_s": _sig(tau), "dead_time_s": _sig(theta),
                "_k": k, "_tau": tau, "_theta": theta}
    if kind == "pressure":
        tau = _loguniform(rng, 5.0, 120.0)
        theta = _loguniform(rng, 0.5, 8.0) if rng.random() < 0.8 else 0.0
        k = _loguniform(rng, 0.3, 3.0) * (-1 if rng.random() < 0.3 else 1)
        return {"model": "fopdt", "gain": _sig(k), "tau1_s": _sig(tau), "dead_time_s": _sig(theta),
                "_k": k, "_tau": tau, "_theta": theta}
    if kind == "level":
        k = _loguniform(rng, 2e-4, 2e-2) * (-1 if rng.random() < 0.4 else 1)
        theta = _loguniform(rng, 1.0, 30.0)
        tau1 = _loguniform(rng, 2.0, 20.0) if rng.random() < 0.3 else 0.0
        row = {"model": "ipdt", "gain": _sig(k, 3), "dead_time_s": _sig(theta),
               "_k": k, "_tau": 0.0, "_theta": theta + tau1, "_integrating": True}
        if tau1:
            row["tau1_s"] = _sig(tau1)
        return row
    if kind == "temperature":
        tau1 = _loguniform(rng, 60.0, 900.0)
        tau2 = tau1 * _loguniform(rng, 0.05, 0.5)
        theta = tau1 * _loguniform(rng, 0.01, 0.5)
        k = _loguniform(rng, 0.4, 4.0)
        lead = -_loguniform(rng, 0.05, 0.3) * tau2 if rng.random() < 0.1 else 0.0
        row = {"model": "sopdt", "gain": _sig(k), "tau1_s": _sig(tau1), "tau2_s": _sig(tau2),
               "dead_time_s": _sig(theta), "_k": k, "_tau": tau1, "_tau2": tau2, "_theta": theta - lead}
        if lead:
            row["lead_s"] = _sig(lead)
        return row
    if kind == "composition":
        tau = _loguniform(rng, 60.0, 1200.0)
        theta = tau * _loguniform(rng, 0.1, 5.0)       # up to dead-time dominant
        k = _loguniform(rng, 0.2, 5.0) * (-1 if rng.random() < 0.3 else 1)
        return {"model": "fopdt", "gain": _sig(k), "tau1_s": _sig(tau), "dead_time_s": _sig(theta),
                "_k": k, "_tau": tau, "_theta": theta}
    if kind == "heat exchanger":
        # third-order lag or a lightly damped pair with a lag, entered as num/den
        k = _loguniform(rng, 0.5, 3.0)
        t = sorted((_loguniform(rng, 5.0, 300.0) for _ in range(3)), reverse=True)
        theta = _loguniform(rng, 1.0, 30.0) if rng.random() < 0.7 else 0.0
        if rng.random() < 0.3:
            wn, z = 1.0 / t[1], rng.uniform(0.15, 0.6)
            den = np.polymul([t[0], 1.0], [1.0 / wn ** 2, 2 * z / wn, 1.0])
            tau2 = 0.0
        else:
            den = np.polymul(np.polymul([t[0], 1.0], [t[1], 1.0]), [t[2], 1.0])
            tau2 = t[1]
        den = [_sig(c, 5) for c in den]
        return {"model": "tf", "num": _sig(k), "den": den, "dead_time_s": _sig(theta),
                "_k": k, "_tau": t[0], "_tau2": tau2, "_theta": theta + (t[2] if tau2 else t[1] / 2)}
    if kind == "reactor":
        # exothermic reactor: one open-loop unstable pole, den (tu s - 1)(t2 s + 1)
        k = _loguniform(rng, 0.5, 3.0)
        tu = _loguniform(rng, 200.0, 2000.0)
        t2 = _loguniform(rng, 10.0, 100.0)
        theta = _loguniform(rng, 1.0, 15.0)
        den = [_sig(c, 5) for c in np.polymul([tu, -1.0], [t2, 1.0])]
        return {"model": "tf", "num": _sig(k), "den": den, "dead_time_s": _sig(theta),
                "_k": k, "_tau": tu, "_tau2": 0.0, "_theta": theta + t2, "_unstable": True}
    raise ValueError(f"unknown loop kind {kind!r}")


def _tuning(rng: np.random.Generator, p: dict[str, Any], form: str) -> dict[str, Any]:
    """SIMC settings for the model's FOPDT view, then drifted by a random factor.

    SIMC (Skogestad 2003, eqs. (27)-(30)) with tc = theta: kc = tau/(K (tc + theta)),
    ti = min(tau, 4 (tc + theta)); integrating: kc = 1/(K (tc + theta)), ti = 4 (tc + theta);
    second order: td = tau2 (series form).
    """
    k, tau, theta = abs(p["_k"]), p["_tau"], p["_theta"]
    tc = max(theta, 0.5 if tau < 30 else 0.05 * tau)
    if p.get("_integrating"):
        kc, ti = 1.0 / (k * (tc + theta)), 4.0 * (tc + theta)
    elif p.get("_unstable"):
        # an unstable pole needs kc K > 1 and a slow enough reset
        kc, ti = 2.0 / k, 8.0 * (tc + theta)
    else:
        kc, ti = tau / (k * (tc + theta)), min(tau, 4.0 * (tc + theta))
    td = p.get("_tau2", 0.0) if rng.random() < 0.6 else 0.0
    # drift: most loops within a factor of two either way, some far off
    kc *= float(np.exp(rng.normal(0.0, 0.5)))
    ti *= float(np.exp(rng.normal(0.0, 0.35)))
    if rng.random() < 0.08:
        ti = 0.0       # integral action switched off (P or PD only)
    out: dict[str, Any] = {"form": form}
    if form == "series":
        out.update(kc=_sig(kc), ti_s=_sig(ti) if ti else None, td_s=_sig(td) if td else None)
        return out
    if ti and td:
        kc, ti, td = series_to_ideal(kc, ti, td)
    if form == "ideal":
        out.update(kc=_sig(kc), ti_s=_sig(ti) if ti else None, td_s=_sig(td) if td else None)
    else:
        kp, ki, kd = ideal_to_parallel(kc, ti or None, td)
        out.update(kp=_sig(kp), ki_per_s=_sig(ki) if ki else None, kd_s=_sig(kd) if kd else None)
    return out


def _one_loop(rng: np.random.Generator, area: Area, kind: str, tag: str) -> dict[str, Any]:
    p = _process(rng, kind)
    row: dict[str, Any] = {
        "tag": tag, "service": str(rng.choice(_SERVICE[kind])), "area": area.name,
        "criticality": "high" if kind in _HIGH and rng.random() < 0.7 else str(rng.choice(
            ["high", "medium", "low", ""], p=[0.15, 0.5, 0.25, 0.1])),
    }
    row.update({key: v for key, v in p.items() if not key.startswith("_")})
    if isinstance(row.get("den"), list):
        row["num"] = f"{row['num']:g}"
        row["den"] = " ".join(f"{c:g}" for c in row["den"])
    row.update(_tuning(rng, p, _pick(rng, area.forms)))
    row["action"] = "direct" if p["_k"] < 0 else ("reverse" if rng.random() < 0.97 else "")
    if rng.random() < 0.1:
        row["d_filter"] = 0.125
    scale = p["_theta"] + 0.1 * max(p["_tau"], 1.0)
    if rng.random() < 0.85:      # blank: a continuous (analogue or very fast) controller
        row["sample_s"] = _sig(min(float(rng.choice([0.25, 0.5, 1.0, 2.0, 5.0])), max(0.1, 0.2 * scale)), 2)
    if rng.random() < 0.2:
        row["pv_filter_s"] = _sig(_loguniform(rng, 0.05, 0.5) * max(p["_theta"], 0.5))
    if rng.random() < 0.35:
        row["band_rad_s"] = _sig(_loguniform(rng, 0.02, 0.4) / (p["_theta"] + 0.1 * max(p["_tau"], 1.0)), 3)
        row["attenuation_db"] = float(rng.choice([3.0, 6.0, 10.0, 20.0]))
    return row


def _spoil(rng: np.random.Generator, row: dict[str, Any]) -> dict[str, Any]:
    """One typical entry mistake, so the invalid path is exercised."""
    mistake = int(rng.integers(3))
    if mistake == 0 and row["model"] != "tf":
        row["gain"] = None                                  # gain left blank
    elif mistake == 1 and row["form"] != "parallel":
        row["kc"] = -abs(row["kc"] or 1.0)                  # negative controller gain
    else:
        row["dead_time_s"] = "n/a"                          # text in a number column
    return row


def synthetic_rows(loops: int, seed: int = 1, cascades: bool = True,
                   invalid_fraction: float = 0.003) -> list[dict[str, Any]]:
    """Rows of a synthetic inventory, keyed by :data:`GENERATED_COLUMNS`.

    Parameters
    ----------
    loops : int
        Number of rows (inner loops of cascades included). [-]
    seed : int
        Seed of the random generator; equal seeds give equal rows. [-]
    cascades : bool
        Make some temperature and composition loops the outer loop of a flow loop.
    invalid_fraction : float
        Share of rows given an entry mistake. [-]

    Returns
    -------
    list of dict
        One dict per row; missing keys and None are blank cells.
    """
    rng = np.random.default_rng(seed)
    weights = np.array([a.weight for a in AREAS])
    rows: list[dict[str, Any]] = []
    seq = 0
    while len(rows) < loops:
        area = AREAS[int(rng.choice(len(AREAS), p=weights / weights.sum()))]
        kind = _pick(rng, area.kinds)
        seq += 1
        tag = f"{_PREFIX[kind]}-{area.code}{seq:05d}"
        row = _one_loop(rng, area, kind, tag)
        if (cascades and kind in ("temperature", "composition") and rng.random() < 0.2
                and len(rows) + 2 <= loops):
            seq += 1
            inner = _one_loop(rng, area, "flow", f"FIC-{area.code}{seq:05d}")
            inner["service"] = f"{row['service']} (inner flow)"
            row["inner_loop"] = inner["tag"]
            rows.append(inner)
        if rng.random() < invalid_fraction:
            row = _spoil(rng, row)
        rows.append(row)
    return rows


def _cell(v: Any) -> Any:
    return None if v is None or v == "" else v


def write_synthetic_inventory(path: str | Path, loops: int, seed: int = 1, force: bool = False) -> Path:
    """Write a seeded synthetic inventory (.xlsx sheet ``loops``, or .csv).

    Parameters
    ----------
    path : str or Path
        Output file, ending in ``.csv`` (CSV) or ``.xlsx`` (a workbook).
    loops : int
        Number of rows. [-]
    seed : int
        Random seed (>= 0). [-]
    force : bool
        Replace an existing file (a filled inventory, perhaps); refused without it.

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    audit.output.FileRefused
        ``path`` exists (without ``force``), is not a regular file, or has another ending.
    """
    p = Path(path)
    is_csv = p.suffix.lower() == ".csv"

    def write(tmp: Path) -> None:
        rows = synthetic_rows(loops, seed)
        table = ([_cell(r.get(c)) for c in GENERATED_COLUMNS] for r in rows)
        if is_csv:
            with tmp.open("w", newline="", encoding="utf-8") as fh:
                w = csv.writer(fh)
                w.writerow(GENERATED_COLUMNS)
                for values in table:
                    w.writerow(["" if v is None else v for v in values])
            return
        from openpyxl import Workbook

        wb = Workbook(write_only=True)
        ws = wb.create_sheet("loops")
        ws.append(list(GENERATED_COLUMNS))
        for values in table:
            ws.append(values)
        wb.save(tmp)

    return write_file_safely(p, write, force=force, suffixes=(".xlsx", ".csv"))
