"""End to end: the per-loop plant-data work gives byte-identical results.csv and results.json whether it runs
here (--jobs 1), in local processes (--jobs 2), on an existing Dask cluster (--scheduler tcp://...) or on a
local one started on demand (--scheduler local); on the sample site and on a larger generated set with
a record per loop (regression: every executor against the serial run; the cluster is a LocalCluster on the
loopback with 2 worker processes)."""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np
import pytest

from audit.cli import main
from tests.reference.plant_sim import open_loop

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample_site" / "loops.xlsx"
FILES = ("results.csv", "results.json")

pytest.importorskip("distributed")


@pytest.fixture(scope="module")
def cluster_address():
    """An existing cluster for ``--scheduler ADDRESS``: LocalCluster, loopback, 2 processes of one thread."""
    from distributed import LocalCluster
    c = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address=None,
                     silence_logs=logging.ERROR)
    yield c.scheduler_address
    c.close()


def run(inv: Path, out: Path, *extra: str) -> int:
    return main(["run", str(inv), "--out", str(out), "--no-history", "--quiet", "--no-pdf", "--date", "2026-12-01",
                 *extra])


def generated_site(folder: Path, n: int = 24) -> Path:
    """An inventory of ``n`` loops (fopdt, sopdt, ipdt in turn), each with a simulated record of sp, pv, op and
    mode (seeded), plus one unreadable record and one path outside the folder."""
    rng = np.random.default_rng(7)
    lines = ["tag,service,area,criticality,model,gain,tau1_s,tau2_s,dead_time_s,form,kc,ti_s,action,sample_s,"
             "data_file"]
    (folder / "rec").mkdir(parents=True)
    for i in range(n):
        kind = ("fopdt", "sopdt", "ipdt")[i % 3]
        k, t1, th = rng.uniform(0.5, 2.0), rng.uniform(20, 80), round(rng.uniform(2, 12) * 20) / 20   # on the fine grid
        p = {"gain": k, "tau1": t1, "dead_time": th}
        if kind == "sopdt":
            p.update(tau2=t1 / 4, tau_lead=0.0)
        if kind == "ipdt":
            p = {"gain": k / 100, "dead_time": th}
        m = 2000
        op = 40.0 + np.repeat(rng.uniform(-4, 4, m // 250), 250)
        pv = 50 + open_loop(kind, p, op, 1.0) + 0.2 * rng.standard_normal(m)
        mode = np.where(np.arange(m) < m - 200 * (i % 4), "AUTO", "MAN")
        name = f"rec/L{i:02d}.csv"
        (folder / name).write_text("time_s,sp,pv,op,mode\n" + "".join(
            f"{j},50,{pv[j]:.5f},{op[j]:.4f},{mode[j]}\n" for j in range(m)), encoding="utf-8")
        tau1 = "" if kind == "ipdt" else f"{t1:.3f}"
        tau2 = f"{t1 / 4:.3f}" if kind == "sopdt" else ""
        gain = f"{p['gain']:.5f}"
        lines.append(f"L{i:02d},flow,A,medium,{kind},{gain},{tau1},{tau2},{th:.3f},ideal,0.5,{max(t1, 10):.1f},"
                     f"reverse,1,{name}")
    (folder / "rec" / "bad.csv").write_text("t,level\n1,2\n", encoding="utf-8")
    lines.append("B-1,flow,A,medium,fopdt,1,30,5,ideal,0.5,30,reverse,1,rec/bad.csv")
    lines.append("B-2,flow,A,medium,fopdt,1,30,5,ideal,0.5,30,reverse,1,../outside.csv")
    inv = folder / "loops.csv"
    inv.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return inv


def same_outputs(a: Path, b: Path) -> None:
    for f in FILES:
        assert (a / f).read_bytes() == (b / f).read_bytes(), f"{f} differs between {a.name} and {b.name}"


@pytest.mark.parametrize("which", ["sample", "generated"])
def test_every_executor_gives_the_serial_results(which, tmp_path, cluster_address):
    inv = SAMPLE if which == "sample" else generated_site(tmp_path / "site")
    serial = tmp_path / "jobs1"
    code = run(inv, serial, "--jobs", "1")
    assert code in (0, 1)
    text = (serial / "results.csv").read_text(encoding="utf-8")
    assert "confirmed" in text or "disputed" in text           # the model check ran
    assert "health_note" in text.splitlines()[0]
    for name, extra in (("jobs2", ("--jobs", "2")), ("cluster", ("--scheduler", cluster_address)),
                        ("local", ("--jobs", "2", "--scheduler", "local"))):
        out = tmp_path / name
        assert run(inv, out, *extra) == code, name
        same_outputs(serial, out)
