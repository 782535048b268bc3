"""Previous figures beside the new ones, so that a regression shows when a benchmark is run.

Each benchmark keeps the figures of its last saved run in ``benchmarks/baseline/<script>.json``
(committed with the code that produced them), one entry per case (for example
``loops=2000 jobs=2 pdf=no``), with the commit, the date, the machine and the load average of
that run. Run a benchmark as usual: after its own table it prints, for every case it measured
that has saved figures, a table of each figure before and now and the ratio now / before.
Run it with ``--save`` to make the new figures the ones later runs are compared with (do that
on an idle machine, after checking the results did not change).

Ratios are printed, never judged: this machine's speed drifts by 20-30 % within minutes, so a
ratio within about 1.3 says nothing; larger ones (or every stage moving together) do. Figures
are "lower is better" (times, memory) unless listed in ``higher``.

Usage from a benchmark::

    import baseline
    baseline.add_arguments(parser)                      # --save, --no-compare
    ...
    baseline.report("site", cases, args)                # cases: {case: {figure: value}}
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import os
import platform
import subprocess
from pathlib import Path

HERE = Path(__file__).resolve().parent
STORE = HERE / "baseline"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Add ``--save`` (store this run's figures as the baseline) and ``--no-compare``."""
    parser.add_argument("--save", action="store_true",
                        help="store this run's figures in benchmarks/baseline/ for later runs to compare with")
    parser.add_argument("--no-compare", action="store_true", help="do not print the saved figures beside these")


def _commit() -> str:
    try:
        out = subprocess.run(["git", "-C", str(HERE), "rev-parse", "--short", "HEAD"], capture_output=True,
                             text=True, timeout=10, check=False)
        dirty = subprocess.run(["git", "-C", str(HERE), "status", "--porcelain", "--", "../audit"],
                               capture_output=True, text=True, timeout=10, check=False).stdout.strip()
        return (out.stdout.strip() or "?") + ("+changes" if dirty else "")
    except OSError:
        return "?"


def load(script: str) -> dict:
    """The saved entries of ``script`` ({case: entry}); empty when none were saved."""
    path = STORE / f"{script}.json"
    if not path.exists():
        return {}
    return json.loads(path.read_text(encoding="utf-8"))


def save(script: str, cases: dict[str, dict[str, float]]) -> Path:
    """Store ``cases`` as the baseline of ``script`` (other saved cases are kept)."""
    STORE.mkdir(exist_ok=True)
    saved = load(script)
    when = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="minutes")
    meta = {"commit": _commit(), "when": when, "machine": f"{os.cpu_count()} CPUs, {platform.python_version()}",
            "load": round(os.getloadavg()[0], 2)}
    for case, figures in cases.items():
        saved[case] = {**meta, "figures": {k: (round(v, 6) if isinstance(v, float) else v)
                                           for k, v in figures.items()}}
    path = STORE / f"{script}.json"
    path.write_text(json.dumps(saved, indent=1, sort_keys=True) + "\n", encoding="utf-8")
    return path


def compare_table(saved: dict, cases: dict[str, dict[str, float]], higher: tuple[str, ...] = ()) -> str:
    """Markdown table: case, figure, before (commit, date), now, now / before."""
    lines = ["| case | figure | before | now | now / before |", "|---|---|---|---|---|"]
    for case, figures in cases.items():
        entry = saved.get(case)
        if entry is None:
            lines.append(f"| {case} | (no saved figures) | - | - | - |")
            continue
        old = entry["figures"]
        for name, value in figures.items():
            before = old.get(name)
            if not isinstance(value, (int, float)) or not isinstance(before, (int, float)):
                continue
            ratio = value / before if before else float("nan")
            mark = ""
            if before and ((ratio > 1.3 and name not in higher) or (ratio < 1 / 1.3 and name in higher)):
                mark = " (worse)"
            elif before and ((ratio < 1 / 1.3 and name not in higher) or (ratio > 1.3 and name in higher)):
                mark = " (better)"
            lines.append(f"| {case} | {name} | {before:.4g} | {value:.4g} | {ratio:.2f}{mark} |")
        lines.append(f"| {case} | (before: {entry['commit']}, {entry['when']}, load {entry['load']}) | | | |")
    return "\n".join(lines)


def report(script: str, cases: dict[str, dict[str, float]], args: argparse.Namespace,
           higher: tuple[str, ...] = ()) -> None:
    """Print the saved figures beside ``cases``; store ``cases`` when ``--save`` was given."""
    if not getattr(args, "no_compare", False):
        print()
        print(f"Against the saved figures (benchmarks/baseline/{script}.json; ratios within ~1.3 are this "
              "machine's drift):")
        print(compare_table(load(script), cases, higher))
    if getattr(args, "save", False):
        print(f"\nsaved as the baseline: {save(script, cases)}")
