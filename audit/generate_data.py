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

Speed and memory: the loops are ordered by the simulator's steps per sample
(:mod:`audit.plantdata.plantsim`) and filed :data:`FILE_LOOPS` to a file; all the loops of a job
(every loop with ``jobs=1``; with ``--jobs N`` the files are shared out among N processes, runs of
files of about equal cost) are simulated in one lockstep batch, so the fixed Python cost of a
step is paid once for all of them. Time is simulated in chunks of at most :data:`CHUNK_VALUES`
loop-samples of inputs and written in blocks of :data:`BLOCK_VALUES` loop-samples (at least
:data:`MIN_BLOCK` samples): one Parquet row group per tag and block in the long layout, one per
block in the wide layout. Memory is so bounded whatever the size (blocks about 0.4 GB and chunks
of inputs some 50 MB in all; 635 MiB peak in the larger process at 2,000 loops with two jobs). Values are written as 32-bit floats (a historian's usual resolution, about 7
significant digits; byte-split and zstd-compressed in Parquet).

The same seed gives the same export, whatever the number of jobs: each file group of loops draws
its inputs from its own generator (seeded by the seed and the file's number), and a loop's
simulation does not depend on which other loops share its batch. (Exports written before this
scheme, with one generator per batch of 500 loops, float64 values and every loop of a batch at the
batch's fastest rate, differ from today's for the same seed.)
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

#: Loops per file of a folder export. [-]
FILE_LOOPS = 100
#: Most values (loops x samples) of the simulator's inputs per chunk. [-]
CHUNK_VALUES = 500_000
#: Loop-samples held before they are written (13 bytes each: sp, pv, op as float32, mode). [-]
BLOCK_VALUES = 32_000_000
#: Fewest samples a loop of a block (one Parquet row group per tag and block in the long layout). [-]
MIN_BLOCK = 1024
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
    kept = {id(r) for r in sim}
    skipped = [r.tag or f"row {r.excel_row}" for r in rows if id(r) not in kept]
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
    """Seeded inputs of the loops of one job, chunk after chunk (state carried between chunks).

    Arrays are samples x loops (time first). Each file group of loops draws from its own
    generator (seeded by the seed and the group's number), so the export is the same whatever the
    number of jobs.
    """

    def __init__(self, plans: list[LoopPlan], groups: list[tuple[int, int, int]], n_total: int, ts: float,
                 seed: int):
        self.p, self.ts, self.n_total = plans, ts, n_total
        self.groups = [(a, b, np.random.default_rng([seed, 11, g])) for a, b, g in groups]
        n = len(plans)
        f = lambda name: np.array([getattr(q, name) for q in plans], dtype=float)  # noqa: E731
        self.op0, self.sp0, self.noise = f("op0"), f("sp0"), f("noise_sd")
        self.load_sd, self.load_tau, self.bias = f("load_sd"), f("load_tau"), f("load_bias")
        self.step, self.every = f("sp_step"), f("sp_every")
        self.amp, self.period = f("sin_amp"), f("sin_period")
        self.phase = np.zeros(n)
        for a, b, rng in self.groups:
            self.phase[a:b] = rng.uniform(0, 2 * np.pi, b - a)
        self.al = np.exp(-ts / self.load_tau)
        self.w_sd = self.load_sd * np.sqrt(1 - self.al ** 2)
        self.p_sp = ts / self.every
        self.load = np.zeros(n)
        self.parity = np.zeros(n)
        self.is_manual = np.array([q.scenario == "manual" for q in plans], dtype=bool)
        self.man = np.flatnonzero(self.is_manual)
        self.hand = self.op0[self.man].copy()
        self.cyc = np.flatnonzero(np.isfinite(self.period))
        settle = np.array([_settle(q.row) for q in plans])
        self.nb = np.minimum(0.1 * n_total, np.maximum(600.0, 12 * settle) / ts).astype(np.int64)
        self.nb = np.where(np.array([q.bump for q in plans], dtype=bool), self.nb, 0)
        self.k0 = 0

    def chunk(self, T: int) -> dict[str, np.ndarray]:
        n, ts = len(self.p), self.ts
        k = self.k0 + np.arange(T)
        ev, w, noise = np.empty((T, n)), np.empty((T, n)), np.empty((T, n))
        moves = np.zeros((T, len(self.man)))
        for a, b, rng in self.groups:
            ev[:, a:b] = rng.random((T, b - a))
            w[:, a:b] = rng.standard_normal((T, b - a))
            noise[:, a:b] = rng.standard_normal((T, b - a))
            ma, mb = np.searchsorted(self.man, [a, b])
            if mb > ma:
                x = rng.random((T, mb - ma))
                pm = ts / 900.0
                moves[:, ma:mb] = np.where(x < pm, np.where(x < pm / 2, -2.0, 2.0), 0.0)
        # set point: toggles between sp0 and sp0 + step at random times
        ev = ev < self.p_sp
        par = (self.parity + np.cumsum(ev, axis=0)) % 2
        self.parity = par[-1].copy()
        sp = self.sp0 + self.step * par
        # load: first-order filtered noise (each loop its own time constant), plus the constant load
        w *= self.w_sd
        load = w
        prev, tmp = self.load, np.empty(n)
        for t in range(T):
            np.multiply(self.al, prev, out=tmp)
            prev = load[t]
            prev += tmp
        self.load = load[-1].copy()
        lj = load + (self.bias - self.op0)
        # measurement: operating point, noise and the outside sinusoid (cycling loops only)
        noise *= self.noise
        base = noise + self.sp0
        if len(self.cyc):
            c = self.cyc
            base[:, c] += self.amp[c] * np.sin(2 * np.pi * (k * ts)[:, None] / self.period[c] + self.phase[c])
        # manual: bump tests at the start; manual loops for 85 % of the record, the operator moving by hand
        manual = np.zeros((T, n), dtype=bool)
        op_hand = np.broadcast_to(self.op0, (T, n)).copy()
        if len(self.man):
            hand = np.clip(self.hand + np.cumsum(moves, axis=0), 5.0, 95.0)
            self.hand = hand[-1].copy()
            op_hand[:, self.man] = hand
            manual[:, self.man] = (k < int(0.85 * self.n_total))[:, None]
        if k[0] < self.nb.max(initial=0):
            nb = np.maximum(self.nb, 1)
            frac = k[:, None] / nb
            bump_op = self.op0 + np.where((frac >= 0.2) & (frac < 0.45), 4.0,
                                          np.where((frac >= 0.45) & (frac < 0.7), -4.0, 0.0))
            in_bump = k[:, None] < self.nb
            manual |= in_bump
            op_hand = np.where(in_bump, bump_op, op_hand)
            sp = np.where(in_bump, self.sp0, sp)
        self.k0 += T
        return dict(sp=sp, base=base, lj=lj, manual=manual, op_hand=op_hand)


# --------------------------------------------------------------------------- writers

#: How a Parquet export is compressed (values are float32, a historian's usual resolution of about
#: 7 significant digits, split by byte; time stamps as deltas).
_PARQUET = dict(compression="zstd", write_statistics=["tag", "timestamp"])


class _Writer:
    """Appends blocks of a group of loops to the export's file(s) in one layout and format.

    A block holds ``vals`` (loops x 3 x samples: sp, pv, op, float32) and ``manual`` (loops x
    samples). In the long Parquet layout each block of each tag is one row group (so a reader
    keeps only the row groups of its tag by their statistics); in the wide layout each block is
    one row group, a tag's signals its own columns (a reader takes its tag's columns only).
    """

    def __init__(self, base: Path, tags: list[str], layout: str, fmt: str, text: bool = False):
        self.base, self.tags, self.layout, self.fmt = base, tags, layout, fmt
        self.text = text          # one long Parquet file: values as text, so mode words fit beside numbers
        self.w = self.wm = None
        self.first = True

    def write(self, times_us: np.ndarray, vals: np.ndarray, manual: np.ndarray) -> None:
        if self.fmt == "csv":
            self._csv(times_us, vals[:, 0], vals[:, 1], vals[:, 2], manual)
        elif self.layout == "long":
            self._long(times_us, vals, manual)
        else:
            self._wide(times_us, vals, manual)

    def _long(self, times_us, vals, manual) -> None:
        import pyarrow as pa
        import pyarrow.parquet as pq
        T = len(times_us)
        ts = pa.array(np.tile(times_us, 3), type=pa.timestamp("us", tz="UTC"))
        sig = pa.DictionaryArray.from_arrays(pa.array(np.repeat(np.arange(3, dtype=np.int32), T)),
                                             pa.array(["sp", "pv", "op"]))
        tm = pa.array(times_us, type=pa.timestamp("us", tz="UTC"))
        msig = pa.DictionaryArray.from_arrays(pa.array(np.zeros(T, np.int32)), pa.array(["mode"]))
        zeros3, zeros1 = pa.array(np.zeros(3 * T, np.int32)), pa.array(np.zeros(T, np.int32))
        words = pa.array(["AUTO", "MAN"])
        for i, tag in enumerate(self.tags):
            name = pa.array([tag])
            mv = pa.DictionaryArray.from_arrays(pa.array(manual[i].astype(np.int32)), words)
            mt = pa.table({"tag": pa.DictionaryArray.from_arrays(zeros1, name), "timestamp": tm, "signal": msig,
                           "value": mv})
            v = np.ascontiguousarray(vals[i]).reshape(-1)
            if self.text:
                tb = pa.table({"tag": pa.DictionaryArray.from_arrays(zeros3, name), "timestamp": ts, "signal": sig,
                               "value": pa.array(np.char.mod("%.9g", v.astype(float)).astype(object), pa.string())})
                both = pa.concat_tables([tb, mt.cast(tb.schema)])
                if self.w is None:
                    self.w = pq.ParquetWriter(self.base.with_name(self.base.name + ".parquet"), tb.schema,
                                              **_PARQUET)
                self.w.write_table(both, row_group_size=4 * T)
                continue
            tb = pa.table({"tag": pa.DictionaryArray.from_arrays(zeros3, name), "timestamp": ts, "signal": sig,
                           "value": pa.array(v)})
            if self.w is None:
                self.w = pq.ParquetWriter(self.base.with_name(self.base.name + ".parquet"), tb.schema,
                                          use_dictionary=["tag", "signal"],
                                          column_encoding={"value": "BYTE_STREAM_SPLIT",
                                                           "timestamp": "DELTA_BINARY_PACKED"}, **_PARQUET)
                self.wm = pq.ParquetWriter(self.base.with_name(self.base.name + "-mode.parquet"), mt.schema,
                                           use_dictionary=["tag", "signal", "value"],
                                           column_encoding={"timestamp": "DELTA_BINARY_PACKED"}, **_PARQUET)
            self.w.write_table(tb, row_group_size=3 * T)
            self.wm.write_table(mt, row_group_size=T)

    def _wide(self, times_us, vals, manual) -> None:
        import pyarrow as pa
        import pyarrow.parquet as pq
        cols = {"timestamp": pa.array(times_us, type=pa.timestamp("us", tz="UTC"))}
        words = pa.array(["AUTO", "MAN"])
        for i, tag in enumerate(self.tags):
            cols[f"{tag}.sp"] = pa.array(vals[i, 0])
            cols[f"{tag}.pv"] = pa.array(vals[i, 1])
            cols[f"{tag}.op"] = pa.array(vals[i, 2])
            cols[f"{tag}.mode"] = pa.DictionaryArray.from_arrays(pa.array(manual[i].astype(np.int32)), words)
        tb = pa.table(cols)
        if self.w is None:
            floats = [c for c in cols if not c.endswith(".mode") and c != "timestamp"]
            self.w = pq.ParquetWriter(self.base.with_name(self.base.name + ".parquet"), tb.schema,
                                      use_dictionary=[c for c in cols if c.endswith(".mode")],
                                      column_encoding={**{c: "BYTE_STREAM_SPLIT" for c in floats},
                                                       "timestamp": "DELTA_BINARY_PACKED"}, **_PARQUET)
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
                                               "value": np.char.mod("%.6g", v.astype(float))}))
                parts.append(pd.DataFrame({"tag": tag, "timestamp": stamps, "signal": "mode",
                                           "value": words[manual[i].astype(int)]}))
            df = pd.concat(parts, ignore_index=True)
        df.to_csv(path, mode="w" if self.first else "a", header=self.first, index=False, float_format="%.6g")
        self.first = False

    def close(self) -> None:
        for w in (self.w, self.wm):
            if w is not None:
                w.close()


# --------------------------------------------------------------------------- the loops of one job

def _order(plans: list[LoopPlan], ts: float) -> list[LoopPlan]:
    """Loops in the order they are simulated and filed: by decreasing steps per sample (the
    simulator's rule), then alike together (so that the simulator's per-step masks run in blocks)."""
    from .plantdata.plantsim import ideal_settings, substeps_for

    def key(i):
        q = plans[i]
        _, ti, td = ideal_settings(q.row)
        return (-substeps_for([q.row], ts), float(q.row.sample or 0.0) > ts, math.isinf(ti), td > 0,
                q.scenario, i)
    return [plans[i] for i in sorted(range(len(plans)), key=key)]


def _job_bounds(steps: np.ndarray, files: list[tuple[int, int]], jobs: int) -> list[tuple[int, int]]:
    """Split the files (consecutive; loops by decreasing steps) into at most ``jobs`` runs of files
    of about equal cost. A job's cost per sample is about a fixed cost per lockstep step (so many
    steps as its deepest loop takes) plus a small cost per loop-step."""
    if jobs <= 1 or len(files) <= 1:
        return [(0, len(files))]
    fixed = 1000.0                                           # loop-steps that cost as much as one lockstep step

    def cost(a, b):
        lo, hi = files[a][0], files[b - 1][1]
        return fixed * float(steps[lo]) + float(steps[lo:hi].sum())

    def split(bound):
        out, a = [], 0
        while a < len(files):
            b = a + 1
            while b < len(files) and cost(a, b + 1) <= bound:
                b += 1
            out.append((a, b))
            a = b
        return out
    lo, hi = 0.0, cost(0, len(files))
    for _ in range(50):
        mid = (lo + hi) / 2
        if len(split(mid)) <= jobs:
            hi = mid
        else:
            lo = mid
    return split(hi)


def _run_job(plans: list[LoopPlan], groups: list[tuple[int, int, int]], tmp: str, single: bool, layout: str,
             fmt: str, n_total: int, ts: float, seed: int, block: int, chunk: int) -> tuple[float, float]:
    """Simulate the loops of one job (file groups ``groups``: start, stop, file number) and write their files.

    ``block`` samples are written at a time and ``chunk`` simulated at a time; both are the whole
    export's (not the job's), since each file group's generator draws chunk after chunk: the same
    sizes in every job keep the export the same whatever ``jobs``.

    Returns the CPU time [s] and peak resident memory [MiB] of the process that ran it.
    """
    import resource
    import time
    from .plantdata.plantsim import advance, discretise, start_state, substeps_for

    tmp_p = Path(tmp)
    steps = np.array([substeps_for([q.row], ts) for q in plans], dtype=np.int64)
    p = discretise([q.row for q in plans], ts, [q.dead_time for q in plans], steps)
    inputs = _Inputs(plans, groups, n_total, ts, seed)
    st = start_state(p, inputs.op0, inputs.sp0)
    S = np.array([q.stick_s for q in plans])
    J = np.array([q.stick_j for q in plans])
    writers = [(a, b, _Writer(tmp_p / ("export" if single else f"loops-{g + 1:04d}"),
                              [q.row.tag for q in plans[a:b]], layout, fmt, text=single)) for a, b, g in groups]
    n = len(plans)
    t0_us = int(np.datetime64(START.replace("+00:00", ""), "us").astype(np.int64))
    T = chunk
    vals = np.empty((n, 3, block), dtype=np.float32)
    man = np.empty((n, block), dtype=bool)
    pv, op = np.empty((T, n)), np.empty((T, n))
    done = 0
    try:
        while done < n_total:
            nb = min(block, n_total - done)
            at = 0
            while at < nb:
                m = min(T, nb - at)
                x = inputs.chunk(m)
                advance(p, st, x["base"], x["sp"], x["lj"], x["manual"], x["op_hand"], S, J, pv=pv[:m], op=op[:m])
                vals[:, 0, at:at + m] = x["sp"].T
                vals[:, 1, at:at + m] = pv[:m].T
                vals[:, 2, at:at + m] = op[:m].T
                man[:, at:at + m] = x["manual"].T
                at += m
            times = t0_us + np.round((done + np.arange(nb)) * ts * 1e6).astype(np.int64)
            for a, b, w in writers:
                w.write(times, vals[a:b, :, :nb], man[a:b, :nb])
            done += nb
    finally:
        for _, _, w in writers:
            w.close()
    return time.process_time(), resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


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
    worker_cpu_s, worker_peak_mib : float
        CPU time of the worker processes (``jobs`` > 1; 0 otherwise) [s] and the largest one's peak memory [MiB].
    """

    path: Path
    loops: int
    samples: int
    planted: dict
    not_simulated: tuple[str, ...]
    worker_cpu_s: float = 0.0
    worker_peak_mib: float = 0.0


def write_synthetic_export(inventory_path: str | Path, path: str | Path, days: float = 1.0, ts: float = 1.0,
                           seed: int = 1, layout: str = "long", fmt: str = "parquet",
                           force: bool = False, jobs: int = 1) -> ExportWritten:
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
        Seed; the same seed gives the same export (whatever ``jobs``). [-]
    layout : str
        ``long`` or ``wide``.
    fmt : str
        ``parquet`` or ``csv`` (for a folder; a file's ending decides for a file).
    force : bool
        Replace an existing ``path``.
    jobs : int
        Processes that simulate (a folder export; its files are shared out among them). [-]

    Returns
    -------
    ExportWritten

    Raises
    ------
    audit.output.FileRefused
        ``path`` exists (without ``force``), or is not a file or folder plant-audit may replace.
    """
    from .inventory import read_inventory
    from .plantdata.plantsim import substeps_for

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
    try:
        order = _order(plans, ts)
        n = len(order)
        size = max(n, 1) if single else FILE_LOOPS
        files = [(a, min(a + size, n)) for a in range(0, n, size)]
        steps = np.array([substeps_for([q.row], ts) for q in order], dtype=np.int64)
        block = int(max(1, min(n_total, max(BLOCK_VALUES // max(n, 1), MIN_BLOCK))))
        chunk = int(max(1, min(n_total, block, CHUNK_VALUES // max(n, 1))))   # of all the loops, not a job's
        work = []
        for fa, fb in _job_bounds(steps, files, 1 if single else max(1, int(jobs))):
            lo, hi = files[fa][0], files[fb - 1][1]
            groups = [(files[g][0] - lo, files[g][1] - lo, g) for g in range(fa, fb)]
            work.append((order[lo:hi], groups, str(tmp), single, layout, fmt, n_total, ts, seed, block, chunk))
        used = []
        if len(work) == 1:
            _run_job(*work[0])
        elif work:
            import multiprocessing
            from concurrent.futures import ProcessPoolExecutor
            methods = multiprocessing.get_all_start_methods()
            ctx = multiprocessing.get_context("forkserver" if "forkserver" in methods else "spawn")
            with ProcessPoolExecutor(max_workers=len(work), mp_context=ctx) as pool:
                used = [f.result() for f in [pool.submit(_run_job, *w) for w in work]]
        planted = {q.row.tag: q.scenario for q in plans}
        _install(tmp, out, single, force)
        meta = {"seed": seed, "days": days, "ts_s": ts, "layout": layout, "format": fmt, "start": START,
                "planted": planted, "not_simulated": skipped}
        side = (out / "planted.json") if out.is_dir() else out.with_name(out.name + ".planted.json")
        side.write_text(json.dumps(meta, indent=1, sort_keys=True), encoding="utf-8")
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return ExportWritten(out, len(plans), n_total, planted, tuple(skipped), sum(u[0] for u in used),
                         max((u[1] for u in used), default=0.0))


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
