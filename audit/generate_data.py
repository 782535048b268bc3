"""A seeded synthetic historian export for a generated inventory, streamed to disk.

``plant-audit generate --loops N INV.xlsx --data PATH`` writes the inventory of
:mod:`audit.generate` and a historian export of routine operation of its loops, each simulated
in closed loop from its own model and tuning (:mod:`audit.plantdata.plantsim`, exact dead time).
Some loops are given a known fault, so that ``run --data`` can be checked against what was
planted (listed in ``planted.json``):

* ``normal``: set-point steps now and then, load noise at the process input, measurement noise;
  every loop except the manual and pinned ones starts with a bump test (a few output steps in
  manual) so the model check has something to identify;
* ``manual``: in manual for 85 % of the record, the operator moving the output by hand;
* ``pinned``: a load larger than the valve can take: the output sits at 100 %;
* ``sticking``: the valve sticks (two-parameter stiction model, S such that the process gain
  times S is 3-6 % of range, J 30-70 % of S);
* ``cycling``: a sinusoidal disturbance from outside the loop, at three to five times the
  loop's own resonance period, sized so that the control error swings about 2 %;
* ``stale``: the plant's dead time is twice the inventory's (a model gone out of date).

Only valid rows with an fopdt, sopdt or ipdt model are simulated (a tf row or a row with an
entry mistake has no data in the export, which ``run`` reports). Planted faults go to loops
that are stable with Ms <= 2 as tuned and fast against the record; the outer loop of a cascade
is simulated on its own process (its inner loop taken as perfect) and never given a fault.

Memory is bounded whatever the size: loops are simulated in batches of at most
:data:`BATCH_LOOPS`, time in chunks of at most :data:`CHUNK_VALUES` values per batch, each chunk
written at once (one Parquet row group per tag and chunk in the long layout, one per chunk in
the wide layout). A folder export holds :data:`FILE_LOOPS` loops per file. The same seed gives
the same export.
"""

from __future__ import annotations

import json
import math
import os
import shutil
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from .output import FileRefused

#: Most loops simulated together (vectorised across loops). [-]
BATCH_LOOPS = 500
#: Loops per file of a folder export. [-]
FILE_LOOPS = 100
#: Most values (loops x samples) held per chunk of a batch. [-]
CHUNK_VALUES = 4_000_000
#: When the generated record starts (UTC).
START = "2026-11-02T00:00:00+00:00"
#: Share of the simulated loops given each planted fault (at least one each where a loop qualifies). [-]
PLANT_SHARE = 0.05
SCENARIOS = ("normal", "manual", "pinned", "sticking", "cycling", "stale")
SIMULATED = ("fopdt", "sopdt", "ipdt")


@dataclass(frozen=True)
class LoopPlan:
    """One simulated loop and what it was given.

    Attributes
    ----------
    row : audit.rows.LoopRow
        The inventory row.
    scenario : str
        One of :data:`SCENARIOS`.
    dead_time : float
        Dead time simulated. [s]
    op0, sp0 : float
        Operating point. [%], [% of range]
    noise_sd, load_sd, load_tau : float
        Measurement noise [% of range], load at the process input [%] and its time constant [s].
    sp_step, sp_every : float
        Set-point step [% of range] and mean time between steps [s] (inf: none).
    bump : bool
        A bump test in manual at the start.
    stick_s, stick_j : float
        Stiction (0: none). [%]
    sin_amp, sin_period : float
        Outside sinusoidal disturbance on the measurement. [% of range], [s]
    load_bias : float
        Constant load at the process input. [%]
    """

    row: Any
    scenario: str
    dead_time: float
    op0: float
    sp0: float
    noise_sd: float
    load_sd: float
    load_tau: float
    sp_step: float
    sp_every: float
    bump: bool
    stick_s: float = 0.0
    stick_j: float = 0.0
    sin_amp: float = 0.0
    sin_period: float = math.inf
    load_bias: float = 0.0


def _settle(row) -> float:
    """A time scale of the loop (dead time plus lags, or plus reset time when integrating). [s]"""
    th = float(row.dead_time or 0.0)
    if row.model == "ipdt":
        from .plantdata.plantsim import ideal_settings
        return th + float(row.tau1 or 0.0) + min(ideal_settings(row)[1], 1e6)
    return th + float(row.tau1 or 0.0) + float(row.tau2 or 0.0)


def plan_loops(rows, duration_s: float, ts: float, seed: int) -> tuple[list[LoopPlan], list[str]]:
    """Which rows are simulated, with what operating point and which planted fault.

    Parameters
    ----------
    rows : sequence of audit.rows.LoopRow
        The inventory's rows.
    duration_s : float
        Length of the record. [s]
    ts : float
        Sample interval. [s]
    seed : int
        Seed. [-]

    Returns
    -------
    (list of LoopPlan, list of str)
        The simulated loops, in inventory order, and the tags not simulated.
    """
    from .frequency import evaluate
    from .loop import model_from_row

    rng = np.random.default_rng([seed, 7])
    inners = {r.inner_loop for r in rows if r.inner_loop}
    sim = [r for r in rows if r.valid and r.model in SIMULATED and r.gain is not None and r.tag
           and (r.kc or r.kp)]
    skipped = [r.tag or f"row {r.excel_row}" for r in rows if r not in sim]
    if not sim:
        return [], skipped
    as_run = [replace(r, pv_filter=None, inner_loop=None) for r in sim]
    figs = evaluate([model_from_row(r) for r in as_run])
    stale_figs = evaluate([model_from_row(replace(r, dead_time=2 * float(r.dead_time or 0.0))) for r in as_run])
    ok = (figs["stable"].to_numpy(bool) & (figs["ms"].to_numpy(float) <= 2.0))
    settle = np.array([_settle(r) for r in sim])
    fast = ok & (settle * 150 <= duration_s) & np.array([not r.inner_loop and r.tag not in inners for r in sim])
    th = np.array([float(r.dead_time or 0.0) for r in sim])
    from .plantdata.plantsim import ideal_settings
    kcs, tis = (np.array(v) for v in zip(*[ideal_settings(r)[:2] for r in sim]))
    gains = np.array([float(r.gain) for r in sim])
    w_own = figs["w_ms_rad_s"].to_numpy(float)
    periods = np.where(np.isfinite(w_own) & (w_own > 0), 2 * np.pi / np.where(w_own > 0, w_own, 1.0), np.nan)
    periods = np.maximum(periods * rng.uniform(3.0, 5.0, len(sim)), 20 * ts)
    s_at = np.array([float(np.abs(model_from_row(r).S(np.array([2 * np.pi / P])))[0]) if np.isfinite(P) else 0.0
                     for r, P in zip(as_run, periods)])
    qualifies = {
        "stale": fast & (th >= 4 * ts) & stale_figs["stable"].to_numpy(bool) & (stale_figs["ms"].to_numpy(float) <= 3.0),
        "sticking": fast & (settle * 400 <= duration_s) & np.array([r.model != "ipdt" for r in sim])
        & (kcs * np.abs(gains) <= 4.0) & np.isfinite(tis),
        "cycling": fast & np.isfinite(figs["w_ms_rad_s"].to_numpy(float)) & (kcs * np.abs(gains) <= 5.0)
        & (s_at >= 0.35),
        "manual": fast.copy(),
        "pinned": fast & np.array([r.model != "ipdt" for r in sim]),
    }
    scen = ["normal"] * len(sim)
    want = max(1, int(round(PLANT_SHARE * len(sim))))
    order = rng.permutation(len(sim))
    for kind in ("stale", "sticking", "cycling", "manual", "pinned"):
        got = 0
        for i in order:
            if got >= want:
                break
            if scen[i] == "normal" and qualifies[kind][i]:
                scen[i] = kind
                got += 1
    plans = []
    for i, r in enumerate(sim):
        kind = scen[i]
        st = float(settle[i])
        p = dict(row=r, scenario=kind, dead_time=float(r.dead_time or 0.0) * (2 if kind == "stale" else 1),
                 op0=float(rng.uniform(35, 65)), sp0=float(rng.uniform(35, 65)), noise_sd=float(rng.uniform(0.05, 0.15)),
                 load_sd=float(rng.uniform(0.3, 1.0)), load_tau=max(10 * ts, 3.0 * st),
                 sp_step=float(rng.uniform(2.0, 5.0)), sp_every=max(300.0, float(rng.uniform(8, 20)) * st),
                 bump=kind not in ("manual", "pinned"))
        if kind in ("sticking", "cycling"):
            p.update(sp_every=math.inf, load_sd=p["load_sd"] * 0.3)
        if kind == "sticking":
            s = min(float(rng.uniform(3.0, 6.0)) / max(abs(float(r.gain)), 0.3), 25.0)   # K S: 3-6 % of range
            p.update(stick_s=s, stick_j=s * float(rng.uniform(0.3, 0.7)),
                     noise_sd=min(p["noise_sd"], s / (10.0 * max(float(kcs[i]), 1e-6))))   # noise must not mask it
        if kind == "cycling":
            p.update(sin_period=float(periods[i]), sin_amp=min(2.0 / max(float(s_at[i]), 1e-3), 6.0))
        if kind == "pinned":
            p.update(load_bias=-(100.0 - p["op0"] + 15.0), sp_every=math.inf)
        plans.append(LoopPlan(**p))
    return plans, skipped


# --------------------------------------------------------------------------- inputs of a chunk

class _Inputs:
    """Seeded inputs of one batch, chunk after chunk (state carried between chunks)."""

    def __init__(self, plans: list[LoopPlan], n_total: int, ts: float, seed: int, batch: int):
        self.p, self.ts, self.n_total = plans, ts, n_total
        self.rng = np.random.default_rng([seed, 11, batch])
        n = len(plans)
        f = lambda name: np.array([getattr(q, name) for q in plans], dtype=float)  # noqa: E731
        self.op0, self.sp0, self.noise = f("op0"), f("sp0"), f("noise_sd")
        self.load_sd, self.load_tau, self.bias = f("load_sd"), f("load_tau"), f("load_bias")
        self.step, self.every = f("sp_step"), f("sp_every")
        self.amp, self.period = f("sin_amp"), f("sin_period")
        self.phase = self.rng.uniform(0, 2 * np.pi, n)
        self.al = np.exp(-ts / self.load_tau)
        self.load = np.zeros(n)
        self.parity = np.zeros(n)
        self.hand = self.op0.copy()
        self.is_manual = np.array([q.scenario == "manual" for q in plans])
        self.bump = np.array([q.bump for q in plans])
        settle = np.array([_settle(q.row) for q in plans])
        self.nb = np.minimum(0.1 * n_total, np.maximum(600.0, 12 * settle) / ts).astype(np.int64)
        self.nb = np.where(self.bump, self.nb, 0)
        self.k0 = 0

    def chunk(self, T: int) -> dict[str, np.ndarray]:
        n = len(self.p)
        rng, ts = self.rng, self.ts
        k = self.k0 + np.arange(T)
        # set point: toggles between sp0 and sp0 + step at random times
        ev = rng.random((n, T)) < (ts / self.every)[:, None]
        par = (self.parity[:, None] + np.cumsum(ev, axis=1)) % 2
        self.parity = par[:, -1].copy()
        sp = self.sp0[:, None] + self.step[:, None] * par
        # load: first-order filtered noise, plus the constant load
        w = rng.standard_normal((n, T)) * (self.load_sd * np.sqrt(1 - self.al ** 2))[:, None]
        from scipy.signal import lfilter
        load = np.empty((n, T))
        for i in range(n):                       # one filter per loop (its own time constant)
            load[i], zf = lfilter([1.0], [1.0, -self.al[i]], w[i], zi=[self.al[i] * self.load[i]])
        self.load = load[:, -1].copy()
        load += self.bias[:, None]
        # measurement: noise and the outside sinusoid
        t = k * ts
        with np.errstate(invalid="ignore"):
            sinus = np.where(np.isfinite(self.period)[:, None],
                             self.amp[:, None] * np.sin(2 * np.pi * t[None, :] / np.where(
                                 np.isfinite(self.period), self.period, 1.0)[:, None] + self.phase[:, None]), 0.0)
        noise = rng.standard_normal((n, T)) * self.noise[:, None] + sinus
        # manual: bump tests at the start; manual loops for 85 % of the record, the operator moving by hand
        bump_pos = k[None, :] - 0 * self.nb[:, None]
        nb = np.maximum(self.nb, 1)[:, None]
        frac = bump_pos / nb
        bump_op = self.op0[:, None] + np.where((frac >= 0.2) & (frac < 0.45), 4.0,
                                               np.where((frac >= 0.45) & (frac < 0.7), -4.0, 0.0))
        in_bump = k[None, :] < self.nb[:, None]
        moves = (rng.random((n, T)) < ts / 900.0) * rng.choice([-2.0, 2.0], (n, T))
        hand = np.clip(self.hand[:, None] + np.cumsum(moves, axis=1), 5.0, 95.0)
        self.hand = hand[:, -1].copy()
        man_loop = self.is_manual[:, None] & (k[None, :] < int(0.85 * self.n_total))
        manual = in_bump | man_loop
        op_hand = np.where(in_bump, bump_op, hand)
        sp = np.where(in_bump | ~np.isfinite(self.every)[:, None], np.where(in_bump, self.sp0[:, None], sp), sp)
        self.k0 += T
        return dict(sp=sp, noise=noise, load=load, manual=manual, op_hand=op_hand)


# --------------------------------------------------------------------------- writers

class _Writer:
    """Appends chunks of a group of loops to the export's file(s) in one layout and format."""

    def __init__(self, base: Path, tags: list[str], layout: str, fmt: str, text: bool = False):
        self.base, self.tags, self.layout, self.fmt = base, tags, layout, fmt
        self.text = text          # one long Parquet file: values as text, so mode words fit beside numbers
        self.w = self.wm = None
        self.first = True

    def write(self, times_us: np.ndarray, sp, pv, op, manual) -> None:
        if self.fmt == "csv":
            self._csv(times_us, sp, pv, op, manual)
        elif self.layout == "long":
            self._long(times_us, sp, pv, op, manual)
        else:
            self._wide(times_us, sp, pv, op, manual)

    def _long(self, times_us, sp, pv, op, manual) -> None:
        import pyarrow as pa
        import pyarrow.parquet as pq
        T = len(times_us)
        ts = pa.array(np.tile(times_us, 3), type=pa.timestamp("us", tz="UTC"))
        sig = pa.DictionaryArray.from_arrays(pa.array(np.repeat(np.arange(3, dtype=np.int32), T)),
                                             pa.array(["sp", "pv", "op"]))
        tm = pa.array(times_us, type=pa.timestamp("us", tz="UTC"))
        msig = pa.DictionaryArray.from_arrays(pa.array(np.zeros(T, np.int32)), pa.array(["mode"]))
        for i, tag in enumerate(self.tags):
            tg = pa.DictionaryArray.from_arrays(pa.array(np.zeros(3 * T, np.int32)), pa.array([tag]))
            vals = np.concatenate([sp[i], pv[i], op[i]])
            mv = pa.DictionaryArray.from_arrays(pa.array(manual[i].astype(np.int32)), pa.array(["AUTO", "MAN"]))
            mt = pa.table({"tag": pa.DictionaryArray.from_arrays(pa.array(np.zeros(T, np.int32)), pa.array([tag])),
                           "timestamp": tm, "signal": msig, "value": mv})
            if self.text:
                tb = pa.table({"tag": tg, "timestamp": ts, "signal": sig,
                               "value": pa.array(np.char.mod("%.10g", vals).astype(object), pa.string())})
                both = pa.concat_tables([tb, mt.cast(tb.schema)])
                if self.w is None:
                    self.w = pq.ParquetWriter(self.base.with_name(self.base.name + ".parquet"), tb.schema)
                self.w.write_table(both, row_group_size=4 * T)
                continue
            tb = pa.table({"tag": tg, "timestamp": ts, "signal": sig, "value": pa.array(vals)})
            if self.w is None:
                self.w = pq.ParquetWriter(self.base.with_name(self.base.name + ".parquet"), tb.schema)
                self.wm = pq.ParquetWriter(self.base.with_name(self.base.name + "-mode.parquet"), mt.schema)
            self.w.write_table(tb, row_group_size=3 * T)
            self.wm.write_table(mt, row_group_size=T)

    def _wide(self, times_us, sp, pv, op, manual) -> None:
        import pyarrow as pa
        import pyarrow.parquet as pq
        cols = {"timestamp": pa.array(times_us, type=pa.timestamp("us", tz="UTC"))}
        for i, tag in enumerate(self.tags):
            cols[f"{tag}.sp"] = pa.array(sp[i])
            cols[f"{tag}.pv"] = pa.array(pv[i])
            cols[f"{tag}.op"] = pa.array(op[i])
            cols[f"{tag}.mode"] = pa.DictionaryArray.from_arrays(pa.array(manual[i].astype(np.int32)),
                                                                 pa.array(["AUTO", "MAN"]))
        tb = pa.table(cols)
        if self.w is None:
            self.w = pq.ParquetWriter(self.base.with_name(self.base.name + ".parquet"), tb.schema)
        self.w.write_table(tb, row_group_size=len(times_us))

    def _csv(self, times_us, sp, pv, op, manual) -> None:
        import pandas as pd
        stamps = pd.to_datetime(times_us, unit="us", utc=True).strftime("%Y-%m-%dT%H:%M:%S.%f").str[:-3] + "Z"
        path = self.base.with_name(self.base.name + ".csv")
        words = np.array(["AUTO", "MAN"])
        if self.layout == "wide":
            data = {"timestamp": stamps}
            for i, tag in enumerate(self.tags):
                data[f"{tag}.sp"], data[f"{tag}.pv"], data[f"{tag}.op"] = sp[i], pv[i], op[i]
                data[f"{tag}.mode"] = words[manual[i].astype(int)]
            df = pd.DataFrame(data)
        else:
            parts = []
            for i, tag in enumerate(self.tags):
                for name, v in (("sp", sp[i]), ("pv", pv[i]), ("op", op[i])):
                    parts.append(pd.DataFrame({"tag": tag, "timestamp": stamps, "signal": name,
                                               "value": np.char.mod("%.6g", v)}))
                parts.append(pd.DataFrame({"tag": tag, "timestamp": stamps, "signal": "mode",
                                           "value": words[manual[i].astype(int)]}))
            df = pd.concat(parts, ignore_index=True)
        df.to_csv(path, mode="w" if self.first else "a", header=self.first, index=False, float_format="%.6g")
        self.first = False

    def close(self) -> None:
        for w in (self.w, self.wm):
            if w is not None:
                w.close()


@dataclass(frozen=True)
class ExportWritten:
    """What :func:`write_synthetic_export` wrote.

    Attributes
    ----------
    path : Path
        The export (file or folder).
    loops : int
        Loops simulated. [-]
    samples : int
        Samples per loop. [-]
    planted : dict
        Tag -> scenario of every simulated loop.
    not_simulated : tuple of str
        Tags (or rows) with no data in the export.
    """

    path: Path
    loops: int
    samples: int
    planted: dict
    not_simulated: tuple[str, ...]


def write_synthetic_export(inventory_path: str | Path, path: str | Path, days: float = 1.0, ts: float = 1.0,
                           seed: int = 1, layout: str = "long", fmt: str = "parquet",
                           force: bool = False) -> ExportWritten:
    """Simulate every simulable loop of an inventory and write the export (see the module notes).

    Parameters
    ----------
    inventory_path : str or Path
        The inventory (as written by :func:`audit.generate.write_synthetic_inventory`).
    path : str or Path
        A ``.parquet``/``.csv`` file (every loop in it) or a folder (:data:`FILE_LOOPS` loops a file).
    days : float
        Length of the record. [d]
    ts : float
        Sample interval. [s]
    seed : int
        Seed; the same seed gives the same export. [-]
    layout : str
        ``long`` or ``wide``.
    fmt : str
        ``parquet`` or ``csv`` (for a folder; a file's ending decides for a file).
    force : bool
        Replace an existing ``path``.

    Returns
    -------
    ExportWritten

    Raises
    ------
    audit.output.FileRefused
        ``path`` exists (without ``force``), or is not a file or folder plant-audit may replace.
    """
    from .inventory import read_inventory
    from .plantdata.plantsim import discretise, run_chunk, start_state, substeps_for

    out = Path(path)
    single = out.suffix.lower() in (".parquet", ".pq", ".csv")
    if single:
        fmt = "csv" if out.suffix.lower() == ".csv" else "parquet"
    if out.exists() and not force:
        raise FileRefused(f"{out} exists; give --force to replace it")
    if out.exists() and not (out.is_file() or out.is_dir()) or out.is_symlink():
        raise FileRefused(f"{out} is not a regular file or folder; not replaced")
    inv = read_inventory(inventory_path)
    n_total = max(int(round(days * 86400.0 / ts)), 2)
    plans, skipped = plan_loops(inv.rows, n_total * ts, ts, seed)
    tmp = out.with_name(f".{out.name}.partial")
    if tmp.exists():
        shutil.rmtree(tmp) if tmp.is_dir() else tmp.unlink()
    tmp.mkdir(parents=True)
    t0_us = int(np.datetime64(START.replace("+00:00", ""), "us").astype(np.int64))
    try:
        # loops of like speed together; a batch steps at its fastest controller's rate (per-step cost
        # is mostly fixed, so one large batch beats many small ones)
        order = sorted(plans, key=lambda q: substeps_for([q.row], ts))
        size = max(len(order), 1) if single else BATCH_LOOPS
        batches = [(b0, order[b0:b0 + size]) for b0 in range(0, len(order), size)]
        for b0, batch in batches:
            p = discretise([q.row for q in batch], ts, [q.dead_time for q in batch],
                           substeps_for([q.row for q in batch], ts))
            inputs = _Inputs(batch, n_total, ts, seed, b0)
            st = start_state(p, inputs.op0, inputs.sp0)
            S = np.array([q.stick_s for q in batch])
            J = np.array([q.stick_j for q in batch])
            if single:
                groups = [(0, len(batch), tmp / "export")]
            else:
                groups = [(g, min(g + FILE_LOOPS, len(batch)), tmp / f"loops-{(b0 + g) // FILE_LOOPS + 1:04d}")
                          for g in range(0, len(batch), FILE_LOOPS)]
            writers = [(a, b, _Writer(base, [q.row.tag for q in batch[a:b]], layout, fmt, text=single))
                       for a, b, base in groups]
            T = max(1, min(n_total, CHUNK_VALUES // (4 * len(batch))))
            done = 0
            while done < n_total:
                m = min(T, n_total - done)
                x = inputs.chunk(m)
                pv, op = run_chunk(p, st, x["sp"], x["noise"], x["load"], x["manual"], x["op_hand"], inputs.op0,
                                   inputs.sp0, S, J)
                times = t0_us + np.round((done + np.arange(m)) * ts * 1e6).astype(np.int64)
                for a, b, w in writers:
                    w.write(times, x["sp"][a:b], pv[a:b], op[a:b], x["manual"][a:b])
                done += m
            for _, _, w in writers:
                w.close()
        planted = {q.row.tag: q.scenario for q in plans}
        _install(tmp, out, single, force)
        meta = {"seed": seed, "days": days, "ts_s": ts, "layout": layout, "format": fmt, "start": START,
                "planted": planted, "not_simulated": skipped}
        side = (out / "planted.json") if out.is_dir() else out.with_name(out.name + ".planted.json")
        side.write_text(json.dumps(meta, indent=1, sort_keys=True), encoding="utf-8")
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return ExportWritten(out, len(plans), n_total, planted, tuple(skipped))


def _install(tmp: Path, out: Path, single: bool, force: bool) -> None:
    """Move the finished export into place (a failed generation leaves ``out`` as it was)."""
    if out.exists() and force:
        shutil.rmtree(out) if out.is_dir() else out.unlink()
    if single:
        (made,) = [f for f in tmp.iterdir() if not f.name.startswith(".")]
        os.replace(made, out)
        shutil.rmtree(tmp, ignore_errors=True)
    else:
        os.replace(tmp, out)
