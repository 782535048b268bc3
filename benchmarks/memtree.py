"""Resident memory of a process and all its descendants, sampled while it runs (Linux only).

A run with ``--jobs`` has several processes at once (the run's own, the ``--jobs`` workers, the
fork server, the report's writers). Each process's own peak (``ru_maxrss``) says nothing of when it
happened, and a page shared between processes (the libraries every worker maps, the memory a
forked process shares with its parent until either writes it) counts in each. This samples the
whole tree every ``every`` seconds and keeps the largest totals seen:

* ``rss``: the sum of the processes' resident sets (a shared page counted once per process);
* ``pss``: the sum of their proportional sets (a page shared by k processes counted 1/k in each):
  what the tree holds of the machine's memory at that moment.

A sample can miss a peak shorter than ``every``; the figures are lower bounds of the true peaks,
and the per-process ``ru_maxrss`` figures stay beside them in the benchmark's table. Read from
``/proc/PID/smaps_rollup`` and ``/proc/PID/task/TID/children``; elsewhere nothing is sampled.
"""

from __future__ import annotations

import os
import threading
from pathlib import Path


def _children(pid: int) -> list[int]:
    out: list[int] = []
    try:
        for tid in os.listdir(f"/proc/{pid}/task"):
            out += [int(x) for x in Path(f"/proc/{pid}/task/{tid}/children").read_text().split()]
    except OSError:
        pass
    return out


def _tree(pid: int) -> list[int]:
    out, todo = [], [pid]
    while todo:
        p = todo.pop()
        out.append(p)
        todo += _children(p)
    return out


def _rollup(pid: int) -> tuple[float, float] | None:
    """(Rss, Pss) of one process [MiB], or None when it has gone."""
    try:
        text = Path(f"/proc/{pid}/smaps_rollup").read_text()
    except OSError:
        return None
    got = {}
    for line in text.splitlines():
        parts = line.split()
        if parts and parts[0] in ("Rss:", "Pss:"):
            got[parts[0]] = int(parts[1]) / 1024.0
    return got.get("Rss:", 0.0), got.get("Pss:", 0.0)


def available() -> bool:
    """True where the tree can be sampled (Linux with smaps_rollup)."""
    return Path(f"/proc/{os.getpid()}/smaps_rollup").exists()


class TreeSampler:
    """Sample the memory of ``pid`` and its descendants in a thread until :meth:`stop`.

    Attributes (after :meth:`stop`)
    ---------------------------------
    peak_rss_mib, peak_pss_mib : float
        Largest sum over the tree of resident and proportional set sizes seen. [MiB]
    processes : int
        Most processes seen at once. [-]
    samples : int
        Samples taken. [-]
    """

    def __init__(self, pid: int, every: float = 0.5):
        self.pid, self.every = pid, every
        self.peak_rss_mib = self.peak_pss_mib = 0.0
        self.processes = self.samples = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        if available():
            self._thread.start()

    def _run(self) -> None:
        while not self._stop.is_set():
            self.sample()
            self._stop.wait(self.every)

    def sample(self) -> None:
        """Take one sample now."""
        rss = pss = 0.0
        n = 0
        for p in _tree(self.pid):
            got = _rollup(p)
            if got is not None:
                rss += got[0]
                pss += got[1]
                n += 1
        if n:
            self.samples += 1
            self.peak_rss_mib = max(self.peak_rss_mib, rss)
            self.peak_pss_mib = max(self.peak_pss_mib, pss)
            self.processes = max(self.processes, n)

    def stop(self) -> dict:
        """Stop sampling; the figures as a dict (empty where nothing could be sampled)."""
        self._stop.set()
        if self._thread.is_alive():
            self._thread.join()
        if not self.samples:
            return {}
        return {"tree_rss_mib": self.peak_rss_mib, "tree_pss_mib": self.peak_pss_mib,
                "tree_processes": self.processes, "tree_samples": self.samples}
