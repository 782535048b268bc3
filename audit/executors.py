"""Where per-loop work runs: here, in local worker processes, or on a Dask cluster.

A stage with independent work per loop hands a module-level function and its items to
:meth:`Executor.map_chunks`; the items are cut into consecutive chunks, each chunk goes to
``fn(chunk, shared)`` wherever the executor runs it, and the results come back as one list in
the order of the items, whatever the order in which the chunks finished. The function must
depend only on its arguments (no global state, no randomness without a seed of its own), so
every executor gives the same results to the last bit.

================  =========================================  =================================
executor          chosen by                                  runs chunks
================  =========================================  =================================
SerialExecutor    ``run --jobs 1`` (the default)             in this process, one after another
ProcessExecutor   ``run --jobs N``                           in N local processes started fresh
                                                             (forkserver, else spawn): a worker
                                                             never inherits the parent's memory
DaskExecutor      ``run --scheduler tcp://HOST:PORT``        on the workers of an existing Dask
                  ``run --scheduler local``                  cluster, or of a LocalCluster on
                                                             the loopback started on first use
                                                             (``--jobs`` worker processes)
================  =========================================  =================================

Dask is an optional extra (``pip install 'plant-audit[cluster]'``); without it ``--scheduler``
is refused as a user's mistake (exit 2). The workers of a cluster must have the same version
of plant-audit installed and see the inventory's folder at the same path (a shared file
system): a chunk carries rows and file names, never the records themselves. Nothing but the
named scheduler is contacted. Dask's nannies set ``MALLOC_TRIM_THRESHOLD_`` in their workers by
default, which about doubles the CPU time of numpy-heavy work (large temporaries mapped afresh each
time); the local cluster is started without it, and an existing cluster is best started so too
(``distributed.nanny.pre-spawn-environ`` in its Dask configuration).

The frequency evaluation keeps its own fork-based split (:mod:`audit.parallel`): it shares
the models with its workers at fork time, which this module does not do.
"""

from __future__ import annotations

import multiprocessing
from concurrent.futures import ProcessPoolExecutor
from typing import Any, Callable, Sequence

from .cli import UserError

#: Chunks per local worker process: enough to even out slow and quick loops, few enough that
#: the per-chunk cost (pickling the shared settings, a round trip) stays small. [-]
CHUNKS_PER_WORKER = 4
#: Longest wait for a Dask scheduler to answer. [s]
CONNECT_TIMEOUT_S = 10.0
#: The ``--scheduler`` value that starts a local cluster.
LOCAL = "local"
#: Address schemes a Dask scheduler is reached by.
SCHEMES = ("tcp://", "tls://")


#: Dask settings for the local cluster: its HTTP servers serve no pages. [-]
NO_HTTP_ROUTES = {"distributed.scheduler.http.routes": [], "distributed.worker.http.routes": [],
                  "distributed.nanny.http.routes": []}

class SchedulerError(UserError):
    """``--scheduler`` cannot be used (Dask missing, a bad address, no answer). Exit code 2."""


def chunk_bounds(n: int, chunks: int) -> list[tuple[int, int]]:
    """Consecutive ``[start, stop)`` bounds of ``n`` items in at most ``chunks`` near-equal chunks.

    Parameters
    ----------
    n : int
        Number of items. [-]
    chunks : int
        Chunks wanted (at least 1). [-]

    Returns
    -------
    list of (int, int)
        Non-empty chunks covering ``range(n)`` in order; empty when ``n`` is 0.
    """
    k = max(1, min(int(chunks), n))
    if n == 0:
        return []
    edges = [round(i * n / k) for i in range(k + 1)]
    return [(a, b) for a, b in zip(edges[:-1], edges[1:]) if b > a]


def _run_chunk(fn: Callable, chunk: list, shared: Any) -> list:
    """Worker side: ``fn`` on one chunk; it must give one result per item."""
    out = fn(chunk, shared)
    if len(out) != len(chunk):
        raise RuntimeError(f"{fn.__name__} gave {len(out)} results for {len(chunk)} items")
    return out


class SerialExecutor:
    """Runs every chunk here, in order (``--jobs 1``).

    Attributes
    ----------
    workers : int
        Always 1. [-]
    where : str
        How the report and the benchmarks name it.
    """

    workers = 1
    where = "this process"

    def map_chunks(self, fn: Callable, items: Sequence, shared: Any = None) -> list:
        """``fn(items, shared)`` in one call.

        Parameters
        ----------
        fn : callable
            ``fn(chunk: list, shared) -> list`` with one result per item, in order.
        items : sequence
            The work.
        shared : object
            Passed whole to every call.

        Returns
        -------
        list
            One result per item, in the order of ``items``.
        """
        items = list(items)
        return _run_chunk(fn, items, shared) if items else []

    def close(self) -> None:
        """Nothing to release."""


class ProcessExecutor:
    """Chunks over ``jobs`` local worker processes (``--jobs N``).

    Workers are started by the forkserver (spawn where there is none): a new interpreter
    imports what it needs, so a worker does not carry the parent's memory (records, results)
    and its peak is its own work's.

    Parameters
    ----------
    jobs : int
        Worker processes. [-]
    chunks_per_worker : int
        Chunks per worker. [-]

    Attributes
    ----------
    workers : int
        Worker processes. [-]
    where : str
        How the report and the benchmarks name it.
    """

    def __init__(self, jobs: int, chunks_per_worker: int = CHUNKS_PER_WORKER):
        self.workers = max(1, int(jobs))
        self.chunks_per_worker = max(1, int(chunks_per_worker))
        methods = multiprocessing.get_all_start_methods()
        self.method = "forkserver" if "forkserver" in methods else "spawn"
        self.where = f"{self.workers} local processes ({self.method})"

    def map_chunks(self, fn: Callable, items: Sequence, shared: Any = None) -> list:
        """``fn(chunk, shared)`` over consecutive chunks in the worker processes.

        Parameters
        ----------
        fn : callable
            A module-level function ``fn(chunk: list, shared) -> list``.
        items : sequence
            The work; every item and ``shared`` must be picklable.
        shared : object
            Passed whole to every call.

        Returns
        -------
        list
            One result per item, in the order of ``items``.
        """
        items = list(items)
        if len(items) <= 1 or self.workers == 1:
            return SerialExecutor().map_chunks(fn, items, shared)
        bounds = chunk_bounds(len(items), self.workers * self.chunks_per_worker)
        workers = min(self.workers, len(bounds))
        out: list = []
        with ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context(self.method)) as pool:
            futures = [pool.submit(_run_chunk, fn, items[a:b], shared) for a, b in bounds]
            for f in futures:                      # in item order, whatever finished first
                out.extend(f.result())
        return out

    def close(self) -> None:
        """Nothing held between calls (a pool lives for one call)."""


def dask_available() -> bool:
    """True when Dask's distributed scheduler can be imported."""
    try:
        import distributed  # noqa: F401
    except ImportError:
        return False
    return True


def check_scheduler(address: str | None) -> None:
    """Refuse a ``--scheduler`` value that cannot work, before any evaluation.

    Parameters
    ----------
    address : str or None
        ``local``, ``tcp://HOST:PORT`` or ``tls://HOST:PORT``; None for no cluster.

    Raises
    ------
    SchedulerError
        Dask is not installed, or the address is neither ``local`` nor a scheduler address.
    """
    if address is None:
        return
    text = address.strip()
    if text != LOCAL and not (text.startswith(SCHEMES) and ":" in text.split("://", 1)[1]):
        raise SchedulerError(f"--scheduler {address!r}: give 'local' or a Dask scheduler address such as "
                             "tcp://10.0.0.5:8786")
    if not dask_available():
        raise SchedulerError("--scheduler needs Dask's distributed scheduler, which is not installed: "
                             "pip install 'plant-audit[cluster]' (or run without --scheduler; --jobs N uses "
                             "local processes)")


def _tool_version() -> str:
    """Worker side: the plant-audit version installed there."""
    from . import __version__
    return __version__


class DaskExecutor:
    """Chunks on the workers of a Dask cluster (``--scheduler``).

    The cluster is reached (or, for ``local``, started on the loopback) on the first call of
    :meth:`map_chunks`, so a run without per-loop work starts nothing.

    Parameters
    ----------
    address : str
        ``local`` or a scheduler address ``tcp://HOST:PORT``.
    jobs : int
        Worker processes of a local cluster (ignored for an existing cluster). [-]

    Attributes
    ----------
    workers : int
        Worker processes (known once connected; ``jobs`` before). [-]
    where : str
        How the report and the benchmarks name it.
    """

    def __init__(self, address: str, jobs: int = 2):
        check_scheduler(address)
        self.address = address.strip()
        self.workers = max(1, int(jobs))
        self.where = (f"Dask LocalCluster ({self.workers} processes)" if self.address == LOCAL
                      else f"Dask cluster at {self.address}")
        self._client = None
        self._cluster = None

    def _connect(self):
        if self._client is not None:
            return self._client
        import logging

        from distributed import Client, LocalCluster
        if self.address == LOCAL:
            import dask
            # Dask's nannies set MALLOC_TRIM_THRESHOLD_ for their workers, which turns off glibc's
            # adaptive mmap threshold: every large numpy temporary is then mapped and faulted in
            # afresh, which doubled the CPU time of the loop-health analysis (benchmarks/README.md)
            environ = {k: v for k, v in dict(dask.config.get("distributed.nanny.pre-spawn-environ", {})).items()
                       if k != "MALLOC_TRIM_THRESHOLD_"}
            # Dask's scheduler and workers always start an HTTP server (the dashboard, health and
            # metrics pages; without an address, the scheduler's takes port 8787). Here they listen
            # on the loopback at a free port and serve no pages (no routes): nothing about the run
            # can be read from them
            with dask.config.set({"distributed.nanny.pre-spawn-environ": environ, **NO_HTTP_ROUTES}):
                self._cluster = LocalCluster(n_workers=self.workers, threads_per_worker=1, processes=True,
                                             host="127.0.0.1", dashboard_address="127.0.0.1:0",
                                             worker_dashboard_address="127.0.0.1:0", scheduler_kwargs={"dashboard": False},
                                             silence_logs=logging.ERROR)
            self._client = Client(self._cluster, set_as_default=False)
        else:
            try:
                self._client = Client(self.address, timeout=f"{CONNECT_TIMEOUT_S:g}s", set_as_default=False)
            except (OSError, TimeoutError, ValueError) as exc:
                raise SchedulerError(f"--scheduler {self.address}: no Dask scheduler answered within "
                                     f"{CONNECT_TIMEOUT_S:g} s ({type(exc).__name__}: {exc})") from None
        workers = self._client.scheduler_info().get("workers", {})
        if not workers:
            self.close()
            raise SchedulerError(f"--scheduler {self.address}: the cluster has no workers")
        self.workers = len(workers)
        from . import __version__
        theirs = {str(v) for v in self._client.run(_tool_version).values()}
        if theirs != {__version__}:
            self.close()
            raise SchedulerError(f"--scheduler {self.address}: the workers run plant-audit "
                                 f"{', '.join(sorted(theirs))}, this is {__version__}; install the same version "
                                 "on every worker")
        return self._client

    def map_chunks(self, fn: Callable, items: Sequence, shared: Any = None) -> list:
        """``fn(chunk, shared)`` over consecutive chunks on the cluster's workers.

        ``shared`` is sent to every worker once; each chunk is one task. Results are
        gathered in the order of the items.

        Parameters
        ----------
        fn : callable
            A module-level function ``fn(chunk: list, shared) -> list`` importable on the workers.
        items : sequence
            The work; every item and ``shared`` must be picklable.
        shared : object
            Passed whole to every call.

        Returns
        -------
        list
            One result per item, in the order of ``items``.
        """
        items = list(items)
        if not items:
            return []
        client = self._connect()
        bounds = chunk_bounds(len(items), self.workers * CHUNKS_PER_WORKER)
        shared_f = client.scatter(shared, broadcast=True)
        futures = [client.submit(_run_chunk, fn, items[a:b], shared_f, pure=False) for a, b in bounds]
        try:
            parts = client.gather(futures)
        finally:
            client.cancel(futures + [shared_f])
        return [r for part in parts for r in part]

    def close(self) -> None:
        """Disconnect; a local cluster is shut down."""
        if self._client is not None:
            self._client.close()
            self._client = None
        if self._cluster is not None:
            self._cluster.close()
            self._cluster = None


def open_executor(jobs: int = 1, scheduler: str | None = None):
    """The executor a run asked for: Dask with ``scheduler``, local processes with ``jobs`` > 1.

    Parameters
    ----------
    jobs : int
        ``--jobs``: local worker processes, or the workers of ``--scheduler local``. [-]
    scheduler : str or None
        ``--scheduler``: ``local``, a scheduler address, or None.

    Returns
    -------
    SerialExecutor, ProcessExecutor or DaskExecutor
        Close it (``close()``) when the run ends.

    Raises
    ------
    SchedulerError
        ``scheduler`` cannot be used (see :func:`check_scheduler`).
    """
    if scheduler:
        return DaskExecutor(scheduler, jobs)
    if int(jobs) > 1:
        return ProcessExecutor(jobs)
    return SerialExecutor()

