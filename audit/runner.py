"""One audit, end to end: read, evaluate, write, record.

Order of the end, so that a failed run changes neither the history nor a previous output folder:

1. the output folder is checked and a staging folder is made beside it (before any evaluation,
   so a folder that cannot be written is reported at once);
2. the audit is compared with the history, read only (the report shows what changed);
3. every output is written into the staging folder, then ``manifest.json`` (the run that
   wrote the folder, and every file's size and SHA-256) as the last file;
4. the staging folder is moved into place; the previous output folder is kept aside until
5. the audit is recorded in the history (one transaction); if that fails, the previous
   output folder is put back; if it succeeds, the previous one is deleted.

A run with an internal fault (:mod:`audit.faults`) writes its outputs and ``fault.log`` but is
not recorded in the history: its results are incomplete.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import os
import re
import secrets
import shutil
import socket
import time
from dataclasses import dataclass, field
from pathlib import Path

from .cli import UserError
from .output import output_columns, write_csv, write_json
from .pipeline import STAGES, Audit, AuditOptions, new_audit, run_stages

OUTPUT_NAMES = ("results.csv", "results.json", "report.html", "report.pdf", "results.xlsx", "fault.log")
"""Every file a run may write into the output folder, besides the manifest."""

MANIFEST = "manifest.json"
"""Written last into a complete output folder: the run that wrote it and its files."""


class OutputError(UserError):
    """The output folder cannot be used or written; nothing was changed. Exit code 2."""


@dataclass
class OutputPlan:
    """Where a run's outputs go and how they replace what is there.

    Attributes
    ----------
    out : Path
        The output folder, resolved.
    mode : str
        ``"new"`` (no folder yet), ``"replace"`` (a folder holding only plant-audit outputs:
        swapped whole) or ``"merge"`` (a folder holding other files too: only the outputs
        are replaced, one by one, the other files are left alone).
    stage : Path
        The staging folder beside ``out`` (same file system, so the moves are renames).
    previous : tuple of str
        In ``"merge"`` mode, the earlier outputs in ``out`` to be replaced or removed.
    backup : Path or None
        Where the previous outputs wait until the history is recorded.
    installed : list of str
        In ``"merge"`` mode, the names moved into ``out`` so far.
    """

    out: Path
    mode: str
    stage: Path
    previous: tuple[str, ...] = ()
    backup: Path | None = None
    installed: list[str] = field(default_factory=list)


def _os_message(exc: OSError) -> str:
    return exc.strerror or str(exc)


def _manifest_files(folder: Path) -> set[str] | None:
    """Names listed by the folder's manifest; None when there is none or it cannot be read."""
    try:
        with open(folder / MANIFEST, encoding="utf-8") as fh:
            doc = json.load(fh)
        return {str(n) for n in doc.get("files", {})}
    except (OSError, ValueError, AttributeError):
        return None


def plan_output(out_dir: str | Path, inventory_path: str | Path, force: bool = False) -> OutputPlan:
    """Check the output folder and make the staging folder beside it.

    Parameters
    ----------
    out_dir : str or Path
        The ``--out`` folder (created when missing, with its parents).
    inventory_path : str or Path
        The inventory being read: a folder holding it is refused unless ``force``.
    force : bool
        Write into a folder that holds the inventory, or replace files of the output names
        that plant-audit did not write.

    Returns
    -------
    OutputPlan

    Raises
    ------
    OutputError
        ``out_dir`` is a file; it holds the inventory, or files of the output names that a
        manifest does not list (without ``force``); or the staging folder cannot be made.
    """
    if not str(out_dir).strip():
        raise OutputError("--out is empty; give a folder for the results")
    out = Path(out_dir).expanduser().resolve()
    inv = Path(inventory_path).expanduser().resolve()
    if out == inv or (out.exists() and not out.is_dir()):
        raise OutputError(f"--out {out_dir}: a file of that name exists; give a folder for the results")
    if out.parent == out:
        raise OutputError(f"--out {out_dir}: the root of a file system cannot be the output folder")
    if inv.is_relative_to(out) and not force:
        raise OutputError(f"--out {out_dir} holds the inventory {inv.name}; give another folder, "
                          "or --force to write the results beside it")
    mode, previous = "new", ()
    if out.exists():
        try:
            entries = sorted(os.listdir(out))
        except OSError as exc:
            raise OutputError(f"--out {out_dir}: cannot be read ({_os_message(exc)})") from None
        ours = set(OUTPUT_NAMES) | {MANIFEST}
        foreign = [e for e in entries if e not in ours]
        if not foreign and not inv.is_relative_to(out) and not Path.cwd().resolve().is_relative_to(out):
            mode = "replace"  # swapped whole (never the folder the process stands in)
        else:
            listed = _manifest_files(out) or set()
            clash = [e for e in entries if e in OUTPUT_NAMES and e not in listed]
            if clash and not force:
                raise OutputError(f"--out {out_dir} holds other files and {', '.join(clash)} that plant-audit did "
                                  "not write (no manifest lists them); give another folder, or --force to "
                                  "replace them")
            mode = "merge"
            previous = tuple(e for e in entries if e in ours)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        _sweep_stale_stages(out)
        stage = out.parent / f".{out.name}.partial-{_HOST}-{os.getpid()}-{secrets.token_hex(3)}"
        stage.mkdir()
    except OSError as exc:
        raise OutputError(f"--out {out_dir}: cannot write in {out.parent} ({_os_message(exc)}); "
                          "nothing was changed") from None
    return OutputPlan(out, mode, stage, previous)


#: This machine's name as it appears in a staging folder's name (letters, digits and dots; any other
#: character as ``_``, so that ``web-1`` and ``web1`` stay two names).
_HOST = re.sub(r"[^A-Za-z0-9.]", "_", socket.gethostname())[:40] or "host"


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (OSError, OverflowError, ValueError):  # another user's process, or no PID of this machine: kept
        return True
    return True


def _sweep_stale_stages(out: Path) -> list[Path]:
    """Remove staging folders of ``out`` left by runs on this machine that were killed (SIGKILL, power loss).

    A staging folder is named ``.<out>.partial-<host>-<pid>-<6 hex>``; it is stale when it was
    made on this machine (same host name) by a process that no longer runs. Folders of runs
    on other machines sharing the folder, of a live process, or of any other name are left
    alone, as are the previous outputs a run keeps aside (``.<out>.previous-...``), which may
    be the user's only copy after a kill in the middle of installing. Returns what was removed.
    """
    pattern = re.compile(r"\." + re.escape(out.name) + r"\.partial-(.+)-(\d+)-[0-9a-f]{6}")
    removed = []
    try:
        entries = list(out.parent.iterdir())
    except OSError:
        return removed
    for entry in entries:
        m = pattern.fullmatch(entry.name)
        if m is None or m.group(1) != _HOST or int(m.group(2)) == os.getpid() or _pid_alive(int(m.group(2))):
            continue
        if entry.is_dir() and not entry.is_symlink():
            shutil.rmtree(entry, ignore_errors=True)
            removed.append(entry)
    return removed


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
        os.fsync(fh.fileno())
    return h.hexdigest()


def write_manifest(folder: Path, audit: Audit, written: dict[str, Path]) -> Path:
    """Write ``manifest.json`` into ``folder``: the run that wrote it and every file's size and SHA-256.

    Parameters
    ----------
    folder : Path
        The staging folder, every other output already in it.
    audit : Audit
        The run (its ``meta`` identifies it).
    written : dict of str to Path
        The files written, by name.

    Returns
    -------
    Path
        The manifest.
    """
    meta = {k: v for k, v in audit.meta.items() if k != "policy"}
    files = {name: {"bytes": path.stat().st_size, "sha256": _sha256(path)} for name, path in written.items()}
    doc = {**meta, "written_at": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
           "complete": True, "files": files}
    path = folder / MANIFEST
    with open(path, "w", encoding="utf-8") as fh:
        json.dump(doc, fh, indent=1, ensure_ascii=False)
        fh.write("\n")
        fh.flush()
        os.fsync(fh.fileno())
    return path


def install(plan: OutputPlan) -> None:
    """Move the staging folder's files into place, keeping the previous outputs aside (``plan.backup``).

    Parameters
    ----------
    plan : OutputPlan
        From :func:`plan_output`, the staging folder complete.
    """
    out, stage = plan.out, plan.stage
    if plan.mode == "new":
        os.rename(stage, out)
        return
    plan.backup = out.parent / f".{out.name}.previous-{os.getpid()}-{secrets.token_hex(3)}"
    if plan.mode == "replace":
        os.rename(out, plan.backup)
        try:
            os.rename(stage, out)
        except OSError:
            os.rename(plan.backup, out)
            plan.backup = None
            raise
        return
    plan.backup.mkdir()
    try:
        # The old manifest goes first and the new one comes last: between, the folder is unmarked.
        for name in sorted(plan.previous, key=lambda n: n != MANIFEST):
            os.replace(out / name, plan.backup / name)
        for name in sorted(os.listdir(stage), key=lambda n: n == MANIFEST):
            os.replace(stage / name, out / name)
            plan.installed.append(name)
    except BaseException:
        roll_back(plan)  # the files moved so far go back
        raise
    stage.rmdir()


def roll_back(plan: OutputPlan) -> None:
    """Undo :func:`install`: the previous outputs back in place, the new ones removed.

    Parameters
    ----------
    plan : OutputPlan
        A plan whose :func:`install` completed (in ``"merge"`` mode, also one that stopped part way).
    """
    out = plan.out
    if plan.mode == "new":
        shutil.rmtree(out, ignore_errors=True)
    elif plan.mode == "replace":
        trash = out.parent / f".{out.name}.discarded-{os.getpid()}-{secrets.token_hex(3)}"
        os.rename(out, trash)
        if plan.backup is not None:
            os.rename(plan.backup, out)
            plan.backup = None
        shutil.rmtree(trash, ignore_errors=True)
    else:
        for name in reversed(plan.installed):
            (out / name).unlink(missing_ok=True)
        if plan.backup is not None:
            for name in sorted(os.listdir(plan.backup), key=lambda n: n == MANIFEST):
                os.replace(plan.backup / name, out / name)
            plan.backup.rmdir()
            plan.backup = None


def _clean(plan: OutputPlan, succeeded: bool) -> None:
    """Remove the staging folder; the kept previous outputs too, but only after a success."""
    for folder in (plan.stage, plan.backup if succeeded else None):
        if folder is not None and folder.exists():
            shutil.rmtree(folder, ignore_errors=True)


def run_audit(inventory_path: str, options: AuditOptions, force: bool = False) -> tuple[Audit, dict[str, Path]]:
    """Read the inventory, run every stage, write every output, then record the audit.

    Parameters
    ----------
    inventory_path : str
        The loop inventory workbook (or CSV) to read.
    options : AuditOptions
        What the user asked for (output folder, date, jobs, history, quiet, ...).
    force : bool
        Write into an output folder that holds the inventory or foreign files of the output
        names (see :func:`plan_output`).

    Returns
    -------
    tuple of (Audit, dict of str to Path)
        The finished run and the files written (in the output folder), by name.

    Raises
    ------
    OutputError
        The output folder cannot be used or written; the history and any previous output
        folder are unchanged.
    audit.history.HistoryError
        The history cannot be read or written; likewise nothing is changed.
    """
    from .cli import Progress
    from .inventory import read_inventory

    names = ["read"] + [s[0] for s in STAGES] + ["write", "history"]
    progress = Progress(names, options.quiet)
    if options.record_history and options.history is not None:
        from .history import check_target
        check_target(options.history)
    plan = plan_output(options.out_dir, inventory_path, force)
    installed = False
    try:
        progress("read")
        t0 = time.perf_counter()
        inv = read_inventory(inventory_path, jobs=options.jobs)
        audit = new_audit(inv, options)
        from .plantdata.sources import EXPORT_KEY
        if options.data is not None and not hasattr(options.data, "read"):
            from .plantdata.export import ExportError, open_for_audit
            try:
                src, summary = open_for_audit(str(options.data), inv)
            except ExportError as exc:
                raise UserError(str(exc)) from None
            audit.extras["export"] = summary
            audit.extras[EXPORT_KEY] = src
        elif options.data is not None:
            audit.extras[EXPORT_KEY] = options.data
        audit.timings["read"] = time.perf_counter() - t0
        run_stages(audit, progress)
        progress("write")
        t0 = time.perf_counter()
        pending = None
        if options.record_history and not audit.extras.get("faults"):
            # an audit with an internal fault is incomplete: written, never recorded
            # compared now (the report shows what changed), recorded only once the outputs are in place
            from .history import prepare_history
            pending = prepare_history(audit)
        try:
            staged = write_outputs(audit, plan.stage)
            write_manifest(plan.stage, audit, staged)
            install(plan)
        except OSError as exc:
            where = getattr(exc, "filename", None) or plan.out
            raise OutputError(f"cannot write the results into {plan.out} ({Path(where).name}: {_os_message(exc)}); "
                              "nothing was changed: the previous results and the history are as they were") from None
        installed = True
        audit.timings["write"] = time.perf_counter() - t0
        progress("history")
        if pending is not None:
            from .history import HistoryError
            t0 = time.perf_counter()
            try:
                pending.commit(audit)
            except HistoryError as exc:
                raise HistoryError(f"{exc}; the results were not kept: {plan.out} is as it was before") from None
            audit.timings["history"] = time.perf_counter() - t0
    except BaseException:
        if installed:
            roll_back(plan)
        _clean(plan, succeeded=False)  # a previous folder still aside (a failed undo) is left, never deleted
        raise
    _clean(plan, succeeded=True)
    progress.close()
    return audit, {name: plan.out / path.name for name, path in staged.items()}


def write_outputs(audit: Audit, folder: str | Path | None = None) -> dict[str, Path]:
    """results.csv, results.json, then the report and workbook, into ``folder``.

    With ``--jobs`` above 1 results.csv and results.json are written beside the page (by a worker of the
    report's pool, forked with the run: :func:`audit.render.write_outputs`); the files are the same.

    Parameters
    ----------
    audit : Audit
        The finished run.
    folder : str or Path, optional
        Where the files go (created when missing); ``audit.options.out_dir`` when None.
        :func:`run_audit` gives its staging folder.

    Returns
    -------
    dict of str to Path
        The files written, by name.
    """
    out = Path(folder if folder is not None else audit.options.out_dir)
    out.mkdir(parents=True, exist_ok=True)
    cols = output_columns(audit.results, audit.inventory.extra_columns)
    written = {}
    if audit.extras.get("faults"):
        from .faults import FAULT_LOG, write_fault_log
        written[FAULT_LOG] = write_fault_log(audit, out)   # first: whatever fails later, the log is there

    def tables() -> None:
        write_csv(out / "results.csv", audit.results, cols)
        write_json(out / "results.json", audit.results, cols, audit.meta)

    written["results.csv"] = out / "results.csv"
    written["results.json"] = out / "results.json"
    from .render import write_outputs as render_outputs
    final = audit.options.out_dir
    audit.options.out_dir = str(out)   # the report's writer puts its files into options.out_dir
    try:
        written.update(render_outputs(audit, beside=tables))
    finally:
        audit.options.out_dir = final
    return written
