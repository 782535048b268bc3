"""Builders and a throw-away PostgreSQL server for the history tests (no tests here).

Audits are built directly (Inventory, LoopRow, a results DataFrame) so the history
can be tested without the rest of the pipeline. The figures in these audits are
test data for the store and the comparison, not engineering results.
"""

from __future__ import annotations

import glob
import os
import shutil
import socket
import subprocess
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from audit.pipeline import Audit, AuditOptions
from audit.policy import Policy
from audit.rows import Inventory, LoopRow

UNIT_DIR = Path(__file__).resolve().parent


@dataclass
class Loop:
    """One loop of a test audit: the row's settings and the results it gets."""

    tag: str | None
    status: str = "passes"
    ms: float = 1.5
    gm_db: float = 9.0
    pm_deg: float = 55.0
    band_s_db: float = -25.0
    band_required_db: float = -20.0
    rank: int | None = None
    row: dict[str, Any] = field(default_factory=dict)


BASE_ROW = dict(model="fopdt", gain=1.2, tau1=80.0, dead_time=12.0, form="ideal", kc=1.5, ti=90.0, td=0.0)


def make_audit(loops: list[Loop], *, date: str = "2026-01-05", site: str = "Test site",
               folder: str | Path = ".", history: str | None = None, with_rank: bool = True,
               inventory_name: str = "loops.xlsx") -> Audit:
    """An Audit as the pipeline would leave it before the history stage."""
    rows = []
    for i, lp in enumerate(loops):
        fields_ = {**BASE_ROW, **lp.row}
        raw = {"tag": lp.tag, **{k: v for k, v in fields_.items()}}
        rows.append(LoopRow(index=i, sheet="loops", excel_row=i + 2, tag=lp.tag, raw=raw, **fields_))
    data = {
        "row": [r.excel_row for r in rows],
        "tag": [lp.tag for lp in loops],
        "status": [lp.status for lp in loops],
        "findings": ["" if lp.status == "passes" else f"Ms {lp.ms:.2f} above 2.0" for lp in loops],
        "stable": [lp.status != "unstable" for lp in loops],
        "ms": [lp.ms for lp in loops],
        "gm_db": [lp.gm_db for lp in loops],
        "pm_deg": [lp.pm_deg for lp in loops],
        "band_s_db": [lp.band_s_db for lp in loops],
        "band_required_db": [lp.band_required_db for lp in loops],
    }
    if with_rank:
        data["rank"] = pd.array([lp.rank for lp in loops], dtype="Int64")
    results = pd.DataFrame(data)
    path = str(Path(folder) / inventory_name)
    inv = Inventory(path=path, name=inventory_name, sha256="ab" * 32, rows=tuple(rows), policy=Policy())
    opts = AuditOptions(out_dir=str(Path(folder) / "out"), site=site, date=date, history=history)
    return Audit(inventory=inv, options=opts, models=[None] * len(rows), results=results, date=date)


def many_loops(n: int, prefix: str = "TIC") -> list[Loop]:
    """n passing loops with distinct tags."""
    return [Loop(f"{prefix}-{i:04d}", ms=1.3 + 0.001 * i) for i in range(n)]


# ------------------------------------------------------------------------------------------------
# A PostgreSQL server of our own, in a temporary folder, on a free localhost port


def find_pg_bin() -> Path | None:
    """Folder of Debian's PostgreSQL server binaries (newest), or None."""
    found = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"),
                   key=lambda p: int(Path(p).parts[-3]) if Path(p).parts[-3].isdigit() else 0)
    if found:
        return Path(found[-1]).parent
    initdb = shutil.which("initdb")
    return Path(initdb).parent if initdb and shutil.which("pg_ctl") else None


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class PgServer:
    """initdb + pg_ctl start in a temporary folder; as root the server runs as user ``postgres``."""

    def __init__(self, bindir: Path) -> None:
        self.bindir = bindir
        self.root = Path(tempfile.mkdtemp(prefix="plant-audit-pg-"))
        self.data = self.root / "data"
        self.sock = self.root / "sock"
        self.sock.mkdir()
        self.port = _free_port()
        self.as_root = os.geteuid() == 0
        if self.as_root:
            os.chmod(self.root, 0o755)
            shutil.chown(self.root, "postgres", "postgres")
            shutil.chown(self.sock, "postgres", "postgres")
        self._n = 0

    def _run(self, *args: str) -> subprocess.CompletedProcess:
        cmd = list(args)
        if self.as_root:
            cmd = ["runuser", "-u", "postgres", "--", *cmd]
        return subprocess.run(cmd, capture_output=True, text=True, timeout=120, cwd=self.root)

    def start(self) -> "PgServer":
        r = self._run(str(self.bindir / "initdb"), "-D", str(self.data), "-U", "audit", "-A", "trust",
                      "-E", "UTF8", "--no-sync")
        if r.returncode:
            raise RuntimeError(f"initdb failed: {r.stdout}\n{r.stderr}")
        opts = (f"-p {self.port} -k {self.sock} -c listen_addresses=127.0.0.1 -c fsync=off "
                f"-c max_connections=50")
        r = self._run(str(self.bindir / "pg_ctl"), "-D", str(self.data), "-o", opts, "-w", "-t", "60",
                      "-l", str(self.root / "server.log"), "start")
        if r.returncode:
            log = (self.root / "server.log").read_text() if (self.root / "server.log").exists() else ""
            raise RuntimeError(f"pg_ctl start failed: {r.stdout}\n{r.stderr}\n{log}")
        return self

    def stop(self) -> None:
        self._run(str(self.bindir / "pg_ctl"), "-D", str(self.data), "-m", "fast", "-w", "stop")
        shutil.rmtree(self.root, ignore_errors=True)

    def url(self, database: str = "postgres") -> str:
        """Plain ``postgresql://`` URL (the history maps it to psycopg 3)."""
        return f"postgresql://audit@127.0.0.1:{self.port}/{database}"

    def new_database(self) -> str:
        """A fresh, empty database; returns its URL."""
        import sqlalchemy as sa
        self._n += 1
        name = f"history_{os.getpid()}_{self._n}_{int(time.time() * 1000) % 100000}"
        engine = sa.create_engine(self.url().replace("postgresql://", "postgresql+psycopg://"),
                                  isolation_level="AUTOCOMMIT")
        with engine.connect() as conn:
            conn.exec_driver_sql(f'CREATE DATABASE "{name}"')
        engine.dispose()
        return self.url(name)


class GivenPg:
    """A server named by PLANT_AUDIT_TEST_PG_URL (a URL of a database where we may CREATE DATABASE)."""

    def __init__(self, url: str) -> None:
        self.admin_url = url
        self._n = 0

    def stop(self) -> None:
        pass

    def new_database(self) -> str:
        import sqlalchemy as sa
        from sqlalchemy.engine import make_url
        self._n += 1
        name = f"history_{os.getpid()}_{self._n}_{int(time.time() * 1000) % 100000}"
        url = make_url(self.admin_url)
        if url.drivername in ("postgresql", "postgres"):
            url = url.set(drivername="postgresql+psycopg")
        engine = sa.create_engine(url, isolation_level="AUTOCOMMIT")
        with engine.connect() as conn:
            conn.exec_driver_sql(f'CREATE DATABASE "{name}"')
        engine.dispose()
        return url.set(database=name).render_as_string(hide_password=False)


def postgres_for_tests():
    """The PostgreSQL to test against: a given one, or one started here; None with the reason."""
    given = os.environ.get("PLANT_AUDIT_TEST_PG_URL")
    if given:
        return GivenPg(given), ""
    bindir = find_pg_bin()
    if bindir is None:
        return None, ("PostgreSQL server binaries not found (initdb and pg_ctl under /usr/lib/postgresql/*/bin); "
                      "install Debian's 'postgresql' package or set PLANT_AUDIT_TEST_PG_URL")
    if os.geteuid() == 0 and shutil.which("runuser") is None:
        return None, "running as root but 'runuser' is missing (the server must run as user postgres)"
    return PgServer(bindir).start(), ""


CHILD = r'''
import pathlib, sys, time
sys.path.insert(0, sys.argv[6])
import audit.history as h
from tests.unit.test_history_support import make_audit, many_loops
target, mode, marker, n, prefix = sys.argv[1:6]
n = int(n)
store = h.open_history(target)
store.batch_size = 10
audit = make_audit(many_loops(n, prefix), site="Busy site", date="2026-02-01")
if mode == "hang":
    orig = h._row_payload
    def slow(position, *args):
        if position == n // 2:
            pathlib.Path(marker).write_text("half written")
            time.sleep(300)
        return orig(position, *args)
    h._row_payload = slow
else:
    go = pathlib.Path(marker)
    pathlib.Path(f"{marker}.{prefix}.ready").write_text("ready")
    deadline = time.time() + 60
    while not go.exists() and time.time() < deadline:
        time.sleep(0.005)
print(store.record(audit), flush=True)
store.close()
'''


def child_command(target: str, mode: str, marker: str | Path, n: int, prefix: str) -> list[str]:
    """argv of a separate process that records an audit of n loops (``hang``: stops half-way)."""
    import sys
    return [sys.executable, "-c", CHILD, target, mode, str(marker), str(n), prefix, str(UNIT_DIR.parents[1])]
