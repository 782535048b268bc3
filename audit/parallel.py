"""The frequency evaluation spread over several processes (``plant-audit run --jobs N``).

Loops are split into chunks that never separate a cascade: an outer loop, its inner
loop and anything further down the chain go to the same chunk. Each chunk is
evaluated by :func:`audit.frequency.evaluate` in a worker process and the rows are
put back in inventory order. Every loop's figures depend only on its own model, so
the result equals ``evaluate(models, band_rad_s)`` for any number of jobs (numpy's vectorised
elementary functions may round the last bit differently at another array position, so
figures agree to about 1e-15 relative).
"""

from __future__ import annotations

import multiprocessing
from contextlib import contextmanager
from concurrent.futures import ProcessPoolExecutor
from typing import Sequence

import numpy as np
import pandas as pd

from .frequency import evaluate
from .loop import LoopModel

#: Fewer loops than this per job are evaluated in this process (workers cost ~0.3 s to start). [-]
MIN_LOOPS_PER_JOB = 250
#: Chunks per job, so a chunk of slow loops (long dead times) does not hold the others up. [-]
CHUNKS_PER_JOB = 4
#: The frequency engine does about 10,000 loops per second in one process: a worker pays for its
#: start only with this many loops. [-]
MIN_LOOPS_PER_EVALUATE_JOB = 2000


def cascade_groups(models: Sequence[LoopModel | None]) -> list[list[int]]:
    """Indices of ``models`` grouped so that loops sharing a cascade chain are together.

    Parameters
    ----------
    models : sequence of LoopModel or None
        The loops; an outer loop holds its inner loop as ``inner`` (the same object as the
        inner row's model, or an equal copy, which is grouped with the outer loop only).

    Returns
    -------
    list of list of int
        Groups in order of their first index; indices ascending within a group.
    """
    parent = list(range(len(models)))

    def find(i: int) -> int:
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    holder: dict[int, int] = {}
    for i, m in enumerate(models):
        cur = m
        while cur is not None:
            j = holder.setdefault(id(cur), i)
            if j != i:
                a, b = find(i), find(j)
                parent[max(a, b)] = min(a, b)
            cur = cur.inner
    groups: dict[int, list[int]] = {}
    for i in range(len(models)):
        groups.setdefault(find(i), []).append(i)
    return sorted(groups.values(), key=lambda g: g[0])


def _chunks(groups: list[list[int]], n_chunks: int) -> list[np.ndarray]:
    """Consecutive groups joined into at most ``n_chunks`` chunks of about equal loop counts."""
    sizes = np.array([len(g) for g in groups])
    edges = np.cumsum(sizes)
    cuts = np.searchsorted(edges, edges[-1] * np.arange(1, n_chunks) / n_chunks, side="left") + 1
    out = []
    for part in np.split(np.arange(len(groups)), np.unique(cuts[(cuts > 0) & (cuts < len(groups))])):
        if part.size:
            out.append(np.concatenate([np.asarray(groups[k], int) for k in part]))
    return out


def _evaluate_chunk(models: list[LoopModel | None], band: np.ndarray) -> pd.DataFrame:
    return evaluate(models, band)


_SHARED: tuple | None = None
_CONTEXT = multiprocessing.get_context("fork") if "fork" in multiprocessing.get_all_start_methods() else None


def _run_shared(idx: np.ndarray) -> pd.DataFrame:
    """Worker side of :func:`map_chunks`: the chunk ``idx`` of the loops shared at fork time."""
    fn, models, per_loop, extra = _SHARED
    sub = [models[i] for i in idx]
    args = [[seq[i] for i in idx] for seq in per_loop]
    return fn(sub, *extra, *args) if extra else fn(sub, *args)


def map_chunks(fn, models: Sequence[LoopModel | None], per_loop: Sequence[Sequence], jobs: int,
               extra: tuple = (), chunks_per_job: int = CHUNKS_PER_JOB,
               min_per_job: int | None = None) -> pd.DataFrame:
    """``fn(models, *per_loop_args, *extra)`` over cascade-safe chunks in ``jobs`` processes.

    ``fn`` returns one DataFrame row per model; the rows are put back in order. With one job
    (or too few loops to pay for workers) ``fn`` runs once, here, on everything.

    Parameters
    ----------
    fn : callable
        A module-level function (picklable) of (models, *per-loop arguments, *extra).
    models : sequence of LoopModel or None
        The loops.
    per_loop : sequence of sequences
        Arguments with one entry per loop (split with the loops).
    jobs : int
        Worker processes. [-]
    extra : tuple
        Arguments passed whole to every call.
    chunks_per_job : int
        Chunks per worker (more balance the load; fewer save per-call overhead). [-]
    min_per_job : int, optional
        Fewest loops a worker is started for (default MIN_LOOPS_PER_JOB). [-]
    """
    models = list(models)
    n = len(models)
    jobs = max(1, int(jobs))
    least = MIN_LOOPS_PER_JOB if min_per_job is None else min_per_job
    if jobs == 1 or n < 2 * least:
        return fn(models, *per_loop, *extra) if not extra else fn(models, *extra, *per_loop)
    jobs = min(jobs, n // least)
    parts = _chunks(cascade_groups(models), jobs * chunks_per_job)
    global _SHARED
    _SHARED = (fn, models, [list(seq) for seq in per_loop], extra)
    try:
        # forked workers inherit the loops: only the chunks' indices cross the process boundary
        with ProcessPoolExecutor(max_workers=jobs, mp_context=_CONTEXT) as pool:
            frames = list(pool.map(_run_shared, parts))
    finally:
        _SHARED = None
    order = np.concatenate(parts)
    df = pd.concat(frames, ignore_index=True)
    df.index = order
    df = df.sort_index()
    df.index = pd.RangeIndex(n)
    return df


def evaluate_parallel(models: Sequence[LoopModel | None], band_rad_s=None, jobs: int = 1) -> pd.DataFrame:
    """:func:`audit.frequency.evaluate` over ``jobs`` processes; the same result.

    Parameters
    ----------
    models : sequence of LoopModel or None
        The loops; None (an invalid row) gives a row of missing values.
    band_rad_s : array-like, optional
        Upper edge wd of each loop's rejection band (NaN or None: no requirement). [rad/s]
    jobs : int
        Worker processes; 1 (or too few loops to pay for workers) evaluates here. [-]

    Returns
    -------
    pandas.DataFrame
        Exactly what ``evaluate(models, band_rad_s)`` returns: one row per model, in order.
    """
    models = list(models)
    n = len(models)
    band = np.full(n, np.nan) if band_rad_s is None else np.array(
        [np.nan if b is None else float(b) for b in band_rad_s], float)
    # one chunk per worker: the engine's cost per loop is even (bounded searches), and every
    # further chunk pays the engine's fixed cost per call again
    return map_chunks(_evaluate_chunk, models, [band], jobs, chunks_per_job=1,
                      min_per_job=MIN_LOOPS_PER_EVALUATE_JOB)


def _step_kinds(ms: list, base: np.ndarray, kinds: tuple, pct: float, idx: np.ndarray) -> list:
    """Worker side of :func:`step_figures_parallel`: the response kinds ``kinds[idx]`` of every loop."""
    from .timedomain import step_kind_part
    return [step_kind_part(ms, base, kinds[k], pct) for k in idx]


def step_figures_parallel(models: Sequence[LoopModel | None], policy, stable=None, jobs: int = 1) -> pd.DataFrame:
    """:func:`audit.timedomain.step_figures` over ``jobs`` processes; the same result.

    The work is split by response kind, not by loop: this process simulates the set-point
    steps of every loop while one forked worker simulates the load steps. A split by loop
    would pay the simulation's fixed costs (per time step, per group of loops of one structure)
    once per worker; split by kind each is paid once, as in one process, and every figure is
    the one :func:`audit.timedomain.step_figures` gives in one process, to the last bit.

    Parameters
    ----------
    models : sequence of LoopModel or None
        The loops.
    policy : Policy
        Settling band and other settings.
    stable : sequence of bool or None, optional
        Closed-loop stability per loop, when known.
    jobs : int
        Worker processes; 1 (or fewer than ``2 * MIN_LOOPS_PER_JOB`` loops) simulates here. [-]
    """
    from . import timedomain
    models = list(models)
    st = [None] * len(models) if stable is None else list(stable)
    if int(jobs) < 2 or len(models) < 2 * MIN_LOOPS_PER_JOB:
        return timedomain.step_figures(models, policy, st)

    def run_parts(ms, base, kinds, pct):
        # the first part runs here (the set-point steps, the larger), the other in a forked worker
        rev = tuple(kinds[::-1])
        got = [p for part in map_parts(_step_kinds, len(rev), 2, (ms, base, rev, pct), min_per_job=1)
               for p in part]
        return got[::-1]

    return timedomain._step_frame(models, policy, st, ("load", "setpoint"), run_parts)


_PARTS: tuple | None = None


def _run_part(idx: np.ndarray):
    """Worker side of :func:`map_parts`: ``fn(*extra, idx)`` with the arguments shared at fork time."""
    fn, extra = _PARTS
    return fn(*extra, idx)


def map_parts(fn, n: int, jobs: int, extra: tuple = (), min_per_job: int = MIN_LOOPS_PER_JOB,
              align: int = 1) -> list:
    """``fn(*extra, indices)`` on consecutive parts of ``range(n)`` in ``jobs`` processes; results in order.

    With one job (or too few items to pay for workers) ``fn`` runs once, here, on every index;
    otherwise this process does the first part and ``jobs - 1`` forked workers the others. Forked
    workers inherit ``extra``: only the indices and the results cross the process boundary.

    Parameters
    ----------
    fn : callable
        A module-level function of (*extra, indices) returning a picklable result.
    n : int
        Number of items. [-]
    jobs : int
        Worker processes. [-]
    extra : tuple
        Arguments passed whole to every call (items, settings, ...).
    min_per_job : int
        Fewest items a worker is started for. [-]
    align : int
        Parts start at multiples of ``align`` (so that work done in fixed blocks of ``align`` items
        meets the same blocks whatever ``jobs``). [-]

    Returns
    -------
    list
        One result per part, in order of the parts.
    """
    jobs = max(1, int(jobs))
    if jobs == 1 or n < 2 * min_per_job or _CONTEXT is None:
        return [fn(*extra, np.arange(n))]
    jobs = min(jobs, n // min_per_job)
    parts = np.array_split(np.arange(n), jobs)
    if align > 1:   # each boundary moved to its nearest multiple of align; empty parts dropped
        cuts = sorted({min(n, int(round(p[0] / align)) * align) for p in parts[1:]} - {0, n})
        parts = np.split(np.arange(n), cuts)
        if len(parts) == 1:
            return [fn(*extra, parts[0])]
    global _PARTS
    _PARTS = (fn, extra)
    try:
        # jobs - 1 workers; this process does the first part meanwhile (one process fewer to
        # start, one part's result not pickled)
        with ProcessPoolExecutor(max_workers=jobs - 1, mp_context=_CONTEXT) as pool:
            rest = pool.map(_run_part, parts[1:])
            first = fn(*extra, parts[0])
            return [first, *rest]
    finally:
        _PARTS = None


_POOL_SHARED: tuple | None = None


def _run_pooled(fn, args: tuple):
    """Worker side of :func:`shared_pool`: ``fn(*extra, *args)`` with ``extra`` shared at fork time."""
    return fn(*_POOL_SHARED, *args)


def fork_context():
    """The 'fork' start method's context, or None where the system has none (workers then cannot inherit).

    Returns
    -------
    multiprocessing.context.BaseContext or None
        What every pool of the run that shares data at fork time is started with.
    """
    return _CONTEXT


def pool_available() -> bool:
    """True where worker processes can be forked (:func:`shared_pool` needs it).

    Returns
    -------
    bool
        The 'fork' start method exists on this system.
    """
    return _CONTEXT is not None


@contextmanager
def shared_pool(workers: int, extra: tuple = ()):
    """``workers`` forked processes that inherit ``extra``, for calls in rounds (one fork for all of them).

    Yields ``submit(fn, *args)``, which runs ``fn(*extra, *args)`` in a worker and returns its
    :class:`concurrent.futures.Future`: only ``args`` and the result cross the process boundary.
    The caller does its own share meanwhile; a later round may use what an earlier one returned.
    Needs :func:`pool_available`.

    Parameters
    ----------
    workers : int
        Worker processes (at least 1). [-]
    extra : tuple
        Arguments passed whole to every call, inherited at fork time.

    Yields
    ------
    callable
        ``submit(fn, *args) -> Future``; ``fn`` a module-level function.
    """
    global _POOL_SHARED
    if _CONTEXT is None:
        raise RuntimeError("no 'fork' start method on this system: no worker processes")
    _POOL_SHARED = extra
    try:
        with ProcessPoolExecutor(max_workers=max(1, int(workers)), mp_context=_CONTEXT) as pool:
            yield lambda fn, *args: pool.submit(_run_pooled, fn, args)
    finally:
        _POOL_SHARED = None
