"""The command line: ``plant-audit run|check|template|disturbance|identify|generate|history``.

``main(argv)`` takes a list and returns the exit code, so tests call it directly.
Exit codes of ``run``: 0 every loop passes (marginal included), 1 any loop is
unstable, fails or is invalid, 2 a mistake the user can fix: the inventory, an
option, the output folder or the history cannot be used (one line, no traceback;
nothing is changed), 3 an internal fault of the tool (a bug: one line, details with
``PLANT_AUDIT_DEBUG=1``; a fault inside a stage is contained: every row is still written, with
the traceback in ``fault.log`` of the output folder, and the audit is not recorded in the history).
"""

from __future__ import annotations

import datetime as _dt
import errno
import math
import sys
import time
from pathlib import Path

import click

from . import __version__
from .limits import MAX_ROWS


class UserError(Exception):
    """Anything the user can fix: reported in one line, exit code 2."""


class Progress:
    """Stage progress on stderr: a bar on a terminal, plain lines otherwise, nothing when quiet."""

    def __init__(self, stages: list[str], quiet: bool):
        self.stages, self.quiet = stages, quiet
        self.tty = sys.stderr.isatty()
        self.i = 0
        self.t0 = time.perf_counter()

    def __call__(self, name: str) -> None:
        if self.quiet:
            return
        self.i += 1
        n = len(self.stages)
        if self.tty:
            done = int(30 * (self.i - 1) / n)
            sys.stderr.write(f"\r[{'#' * done}{'.' * (30 - done)}] {self.i}/{n} {name:<12}")
            sys.stderr.flush()
        else:
            sys.stderr.write(f"plant-audit: stage {self.i}/{n} {name} "
                             f"({time.perf_counter() - self.t0:.1f} s)\n")

    def close(self) -> None:
        """End the progress display (a final line on a terminal)."""
        if not self.quiet and self.tty:
            sys.stderr.write(f"\r[{'#' * 30}] done in {time.perf_counter() - self.t0:.1f} s{' ' * 10}\n")


class PositiveFinite(click.ParamType):
    """A number > 0 and finite (``inf``, ``nan``, 0 and negatives are refused)."""

    name = "positive number"

    def convert(self, value, param, ctx):  # noqa: ANN001, D102 - click's interface
        try:
            x = float(value)
        except (TypeError, ValueError):
            self.fail(f"{value!r} is not a number", param, ctx)
        if not (math.isfinite(x) and x > 0):
            self.fail(f"{value!r} must be a finite number above 0", param, ctx)
        return x


def _iso_date(ctx, param, value):  # noqa: ANN001 - click callback
    """``--date``: a real calendar date YYYY-MM-DD, or None."""
    if value is None or value == "":
        return None
    try:
        return _dt.date.fromisoformat(value).isoformat()
    except ValueError as exc:
        raise click.BadParameter(f"{value!r} is not a date YYYY-MM-DD ({exc})") from None


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="plant-audit")
def cli() -> None:
    """Audit regulatory PID loops from a spreadsheet inventory."""


@cli.command()
@click.argument("inventory", type=click.Path(dir_okay=False))
@click.option("--out", "out_dir", default="audit-out", show_default=True, help="Folder for the results.")
@click.option("--site", default="", help="Site name shown in the report and used in the history.")
@click.option("--title", default="Control loop audit", show_default=True, help="Report title.")
@click.option("--date", "date", default=None, callback=_iso_date,
              help="Audit date YYYY-MM-DD (default today; fixes output for reproducible runs).")
@click.option("--paper", type=click.Choice(["a4", "letter"]), default="a4", show_default=True)
@click.option("--detail", type=click.Choice(["failing", "all"]), default="failing", show_default=True,
              help="Which loops get a detail section in the report.")
@click.option("--propose", type=click.Choice(["failing", "all", "none"]), default="failing", show_default=True,
              help="Which loops get retuning proposals.")
@click.option("--no-pdf", is_flag=True, help="Skip report.pdf.")
@click.option("--jobs", type=click.IntRange(1, 64), default=1, show_default=True,
              help="Processes for the stages that parallelise.")
@click.option("--scheduler", default=None, help="Per-loop plant-data work on a Dask cluster: 'local' (a local "
                                               "cluster of --jobs processes) or tcp://HOST:PORT.")
@click.option("--history", "history", default=None, help="History database: a path (SQLite) or a URL.")
@click.option("--no-history", is_flag=True, help="Do not record this audit in the history.")
@click.option("--quiet", is_flag=True, help="No progress output.")
@click.option("--force", is_flag=True, help="Write into a folder that holds the inventory, or replace files "
                                            "of the output names that plant-audit did not write.")
@click.option("--data", "data", default=None, help="The site's historian export (a .parquet/.csv file or a folder of "
                                                   "them): each row's operating record unless it has a data_file.")
def run(inventory, out_dir, site, title, date, paper, detail, propose, no_pdf, jobs, scheduler, history, no_history,
        quiet, force, data):
    """Evaluate every loop of INVENTORY and write results and report into --out."""
    from .executors import check_scheduler
    from .pipeline import AuditOptions
    from .runner import run_audit

    check_scheduler(scheduler)
    opts = AuditOptions(out_dir=out_dir, site=site, title=title, date=date, paper=paper, detail=detail,
                        propose=propose, pdf=not no_pdf, jobs=jobs, scheduler=scheduler, quiet=quiet,
                        history=history, record_history=not no_history, data=data)
    audit, written = run_audit(inventory, opts, force=force)
    if not quiet and audit.extras.get("export") is not None:
        click.echo(audit.extras["export"].text(), err=True)
    if not quiet:
        counts = audit.results["status"].value_counts()
        summary = ", ".join(f"{counts.get(s, 0)} {s}" for s in ("passes", "marginal", "fails", "unstable", "invalid"))
        if counts.get("not evaluated", 0):   # only after an internal fault
            summary += f", {counts['not evaluated']} not evaluated"
        click.echo(f"{len(audit.results)} loops: {summary}")
        for name, path in written.items():
            click.echo(f"  {name}: {path}")
    faults = audit.extras.get("faults")
    if faults:  # contained internal faults: outputs written, results incomplete, not in the history
        stages = ", ".join(dict.fromkeys(f.stage for f in faults if not f.skipped))
        log = written.get("fault.log", Path(out_dir) / "fault.log")
        click.echo(f"plant-audit: internal fault in stage {stages} ({faults[0].error}): the results are incomplete "
                   f"and were not recorded in the history; details in {log}; please report it", err=True)
        raise SystemExit(3)
    bad = audit.results["status"].isin(["unstable", "fails", "invalid"]).any()
    raise SystemExit(1 if bad else 0)


@cli.command()
@click.argument("inventory", type=click.Path(dir_okay=False))
@click.option("--json", "as_json", is_flag=True, help="Print the problems as JSON.")
def check(inventory, as_json):
    """Validate INVENTORY without evaluating it."""
    import json

    from .inventory import check_json, check_report, format_check, read_inventory

    rep = check_report(read_inventory(inventory))
    if as_json:
        click.echo(json.dumps(check_json(rep), indent=1, ensure_ascii=False))
    else:
        click.echo(format_check(rep))
    raise SystemExit(rep.exit_code)


@cli.command()
@click.argument("path", type=click.Path(dir_okay=False))
@click.option("--force", is_flag=True, help="Replace PATH if it exists.")
def template(path, force):
    """Write a ready-to-fill inventory workbook to PATH (.xlsx)."""
    from .template import write_template

    write_template(path, force=force)
    click.echo(f"template written: {path}")


@cli.command()
@click.argument("record", type=click.Path(dir_okay=False))
@click.option("--allowed", type=PositiveFinite(), required=True,
              help="Largest acceptable deviation [% of PV range], a number above 0.")
@click.option("--plot", "plot", default=None, help="Where to write the spectrum plot (SVG).")
def disturbance(record, allowed, plot):
    """Derive the rejection requirement from a disturbance RECORD (CSV)."""
    from .disturbance import disturbance_command

    raise SystemExit(disturbance_command(record, allowed, plot))


@cli.command()
@click.argument("record", nargs=-1, required=True, type=click.Path(dir_okay=False))
@click.option("--pv-lo", type=float, default=None, help="PV range low, for *_eu columns [EU].")
@click.option("--pv-hi", type=float, default=None, help="PV range high, for *_eu columns [EU].")
@click.option("--timezone", default=None, help="IANA zone of timestamps written without one.")
@click.option("--json", "as_json", is_flag=True, help="Print JSON.")
@click.option("--write-inventory", "write_to", default=None,
              help="With an inventory (.xlsx): write a copy with the identified models to this new file.")
@click.option("--jobs", type=click.IntRange(1, 64), default=1, show_default=True,
              help="Worker processes for several records.")
def identify(record, pv_lo, pv_hi, timezone, as_json, write_to, jobs):
    """Identify a process model (fopdt, sopdt, ipdt) from logged RECORDs with op and pv (several are
    identified together), or from every data_file of an inventory (.xlsx)."""
    from .plantdata.command import identify_command, identify_inventory_command

    if len(record) == 1 and record[0].lower().endswith((".xlsx", ".xlsm")):
        raise SystemExit(identify_inventory_command(record[0], write_to, as_json, jobs))
    if any(r.lower().endswith((".xlsx", ".xlsm")) for r in record):
        raise UserError("an inventory (.xlsx) is identified on its own: give it as the only argument")
    if write_to:
        raise UserError("--write-inventory needs an inventory workbook (.xlsx) in place of RECORD")
    raise SystemExit(identify_command(record[0] if len(record) == 1 else list(record), pv_lo, pv_hi, as_json,
                                      timezone, jobs)[0])


@cli.command()
@click.option("--loops", type=click.IntRange(1, MAX_ROWS), required=True, help="Number of loops.")
@click.option("--seed", type=click.IntRange(min=0), default=1, show_default=True)
@click.option("--force", is_flag=True, help="Replace PATH (and --data) if it exists.")
@click.option("--data", "data", default=None,
              help="Also write a synthetic historian export of the loops' routine operation here "
                   "(a .parquet/.csv file, or a folder).")
@click.option("--days", type=PositiveFinite(), default=1.0, show_default=True, help="Length of the export [d].")
@click.option("--ts", "ts", type=PositiveFinite(), default=1.0, show_default=True,
              help="Sample interval of the export [s].")
@click.option("--layout", type=click.Choice(["long", "wide"]), default="long", show_default=True)
@click.option("--format", "fmt", type=click.Choice(["parquet", "csv"]), default="parquet", show_default=True,
              help="File format of a folder export (a file's ending decides for a file).")
@click.option("--jobs", type=click.IntRange(1, 64), default=1, show_default=True,
              help="Processes that simulate --data (a folder export; the same export whatever N).")
@click.argument("path", type=click.Path(dir_okay=False))
def generate(loops, seed, force, data, days, ts, layout, fmt, jobs, path):
    """Write a seeded synthetic inventory of --loops loops to PATH (.xlsx or .csv),
    and with --data a synthetic historian export of their operation."""
    from .generate import write_synthetic_inventory

    if data is not None:
        if days * 86400.0 / ts > 1e8:
            raise UserError(f"--days {days:g} at --ts {ts:g} s is more than 100 million samples a loop; "
                            "shorten the record or sample more slowly")
        if Path(data).exists() and not force:
            raise UserError(f"--data {data} exists; give --force to replace it")
    write_synthetic_inventory(path, loops, seed, force=force)
    click.echo(f"{loops} synthetic loops written: {path}")
    if data is not None:
        from .generate_data import write_synthetic_export

        t0 = time.perf_counter()
        w = write_synthetic_export(path, data, days=days, ts=ts, seed=seed, layout=layout, fmt=fmt, force=force,
                                   jobs=jobs)
        counts = {k: list(w.planted.values()).count(k) for k in ("normal", "manual", "pinned", "sticking", "cycling",
                                                                  "stale")}
        click.echo(f"export written: {w.path} ({w.loops} loops x {w.samples:,} samples in "
                   f"{time.perf_counter() - t0:.1f} s; " + ", ".join(f"{v} {k}" for k, v in counts.items())
                   + (f"; {len(w.not_simulated)} rows not simulated (tf model or entry mistake)"
                      if w.not_simulated else "") + ")")


@cli.command()
@click.option("--db", default=None, help="History database path or URL (default: audit-history.sqlite here).")
@click.option("--tag", default=None, help="One loop's figures and tunings over time.")
@click.option("--site", default=None, help="Only audits of this site.")
@click.option("--csv", "as_csv", is_flag=True, help="Print CSV.")
def history(db, tag, site, as_csv):
    """List recorded audits, or one loop's history."""
    from .history import history_command

    raise SystemExit(history_command(db, tag, as_csv, site=site))


_ENVIRONMENT_ERRNOS = frozenset({errno.ENOENT, errno.EACCES, errno.EPERM, errno.ENOSPC, errno.EDQUOT, errno.EROFS,
                                 errno.EISDIR, errno.ENOTDIR, errno.EEXIST, errno.ENAMETOOLONG, errno.EFBIG,
                                 errno.EXDEV, errno.EBUSY, errno.ENOTEMPTY, errno.ELOOP, errno.EIO})
"""What the file system answers about the user's paths and disks (exit 2), as opposed to a fault of ours."""


def main(argv: list[str] | None = None) -> int:
    """Run the command line and return the exit code.

    Parameters
    ----------
    argv : list of str, optional
        The arguments after the program name (default ``sys.argv[1:]``).
    """
    from .history import HistoryError
    from .inventory import InventoryError
    from .output import FileRefused

    try:
        cli.main(args=list(sys.argv[1:] if argv is None else argv), prog_name="plant-audit", standalone_mode=False)
        return 0
    except SystemExit as exc:
        return int(exc.code or 0)
    except click.exceptions.Abort:
        click.echo("plant-audit: aborted", err=True)
        return 2
    except click.ClickException as exc:
        exc.show()
        return 2
    except (InventoryError, HistoryError, UserError, FileRefused) as exc:
        click.echo(f"plant-audit: {' '.join(str(exc).split())}", err=True)  # one line, whatever a driver said
        return 2
    except OSError as exc:
        if exc.errno not in _ENVIRONMENT_ERRNOS:
            return _internal(exc)
        where = f"{exc.filename}: " if getattr(exc, "filename", None) else ""
        click.echo(f"plant-audit: {where}{exc.strerror or exc}", err=True)
        return 2
    except Exception as exc:  # noqa: BLE001 - the user gets one line; details with PLANT_AUDIT_DEBUG=1
        return _internal(exc)


def _internal(exc: BaseException) -> int:
    """Report an internal fault in one line (re-raised with ``PLANT_AUDIT_DEBUG=1``); exit code 3."""
    import os
    if os.environ.get("PLANT_AUDIT_DEBUG"):
        raise exc
    click.echo(f"plant-audit: internal error: {type(exc).__name__}: {exc} "
               "(set PLANT_AUDIT_DEBUG=1 for details)", err=True)
    return 3


if __name__ == "__main__":
    # ``python -m audit.cli``: run the package's own module, so that the UserError raised by other
    # modules (imported from audit.cli) is the class main() catches, not a copy made for __main__
    from audit.cli import main as _main
    raise SystemExit(_main())
