"""Unit tests of the per-loop data task (audit.plantdata.loopdata) and of where a row's record comes from
(audit.plantdata.sources): each record read once for loop health and the model check, a site export used
for rows without a data_file, a row that raises kept to its row, and results compact (behaviour, regression;
records from the independent simulator of tests/reference/plant_sim.py)."""

from __future__ import annotations

import math
import pickle
from pathlib import Path

import numpy as np
import pytest

from audit.faults import faults_of
from audit.inventory import read_inventory
from audit.loop import model_from_row
from audit.pipeline import AuditOptions, build_models, new_audit
from audit.plantdata import loopdata, sources
from audit.plantdata.health import HEALTH_COLUMNS, add_loop_health
from audit.plantdata.loopdata import LoopTask, analyse_loop, loop_data, loop_tasks
from audit.plantdata.modelcheck import MODELCHECK_COLUMNS, check_models, check_record
from audit.plantdata.records import ReadPolicy, read_record
from audit.plantdata.report_part import PAD_B, PAD_L, PAD_R, PAD_T, PLOT_H, PLOT_W, _ticks, overlay
from audit.plantdata.sources import EXPORT_KEY, RowRecord, record_for_row
from audit.policy import Policy
from audit.rows import Inventory, LoopRow
from tests.reference.plant_sim import open_loop

ROOT = Path(__file__).resolve().parents[3]
SAMPLE = ROOT / "sample_site" / "loops.xlsx"
P = {"gain": 1.5, "tau1": 30.0, "dead_time": 6.0}


def write_record(path: Path, n: int = 2400, seed: int = 3, sp: bool = True) -> None:
    """Open-loop op steps through the fopdt of ``P`` plus white noise; sp held (so loop health runs too)."""
    op = np.full(n, 40.0)
    op[n // 6:], op[n // 2:], op[5 * n // 6:] = 46.0, 37.0, 42.0
    pv = 50 + open_loop("fopdt", P, op, 1.0) + 0.15 * np.random.default_rng(seed).standard_normal(n)
    path.parent.mkdir(parents=True, exist_ok=True)
    head = "time_s,sp,pv,op\n" if sp else "time_s,pv,op\n"
    path.write_text(head + "".join(f"{k},{'50,' if sp else ''}{pv[k]:.5f},{op[k]:g}\n" for k in range(n)),
                    encoding="utf-8")


class FolderExport:
    """A stand-in for a site historian export: one CSV per tag in a folder (picklable, duck-typed)."""

    def __init__(self, folder: Path):
        self.folder = Path(folder)
        self.calls: list = []

    def read(self, tag, pv_lo=None, pv_hi=None, policy=ReadPolicy()):
        self.calls.append((tag, pv_lo, pv_hi, policy))
        return read_record(self.folder / f"{tag}.csv", pv_lo=pv_lo, pv_hi=pv_hi, policy=policy, name=f"export:{tag}")


def small_audit(tmp_path: Path, files: list, tags: list | None = None):
    site = tmp_path / "site"
    tags = tags or [f"L{i}" for i in range(len(files))]
    rows = tuple(LoopRow(index=i, sheet="loops", excel_row=i + 2, tag=tags[i], model="fopdt", gain=1.5, tau1=30.0,
                         dead_time=6.0, kc=0.8, ti=30.0, sample=1.0, data_file=f) for i, f in enumerate(files))
    inv = Inventory(path=str(site / "loops.xlsx"), name="loops.xlsx", sha256="0", rows=rows, policy=Policy())
    a = new_audit(inv, AuditOptions())
    a.models = [model_from_row(r) for r in rows]
    for c in ("findings", "action", "reason"):
        a.results[c] = ""
    a.results["rank"] = np.nan
    return a


def test_record_for_row_inside_outside_export_and_none(tmp_path):
    site = tmp_path / "site"
    write_record(site / "rec" / "a.csv", n=300)
    (tmp_path / "outside.csv").write_text("time_s,pv,op\n", encoding="utf-8")
    row = LoopRow(index=0, sheet="loops", excel_row=2, tag="A-1", data_file="rec/a.csv")
    got = record_for_row(row, site)
    assert got.name == "rec/a.csv" and got.record.segments[0].n == 300 and got.refused == ""
    out = record_for_row(LoopRow(index=0, sheet="loops", excel_row=2, tag="A-1", data_file="../outside.csv"), site)
    assert out.record is None and "outside the inventory's folder" in out.refused
    export = FolderExport(site / "rec")
    pol = ReadPolicy(min_samples=80)
    via = record_for_row(LoopRow(index=0, sheet="loops", excel_row=2, tag="a", pv_lo=0.0, pv_hi=10.0), site, pol,
                         export)
    assert via.name == "export:a" and via.record.segments[0].n == 300
    assert export.calls == [("a", 0.0, 10.0, pol)]
    # a data_file wins over the export; no data_file and no export: nothing
    assert record_for_row(row, site, pol, export).name == "rec/a.csv" and len(export.calls) == 1
    assert record_for_row(LoopRow(index=0, sheet="loops", excel_row=2, tag="a"), site) == RowRecord(None)


def test_each_record_read_once_for_both_stages(monkeypatch):
    """The sample site: every valid row with a data_file read exactly once, for health and model check."""
    calls: list = []
    real = sources.read_record

    def counting(path, *a, **k):
        calls.append(Path(path).name)
        return real(path, *a, **k)

    monkeypatch.setattr(sources, "read_record", counting)
    inv = read_inventory(str(SAMPLE))
    audit = new_audit(inv, AuditOptions())
    build_models(audit)
    add_loop_health(audit)
    check_models(audit)
    want = [Path(r.data_file).name for r in inv.rows if r.data_file and (r.valid or audit.models[r.index])]
    assert len(want) == 13 and sorted(calls) == sorted(want)
    assert not faults_of(audit)
    assert set(audit.extras["model_checks"]) <= {r.index for r in inv.rows if r.data_file}


def test_export_source_for_rows_without_data_file(tmp_path):
    """Rows without a data_file read from the export by tag: the same figures as the same file by data_file."""
    site = tmp_path / "site"
    write_record(site / "rec" / "E1.csv")
    a = small_audit(tmp_path, ["rec/E1.csv", None, None], tags=["F1", "E1", "E9"])
    export = FolderExport(site / "rec")
    a.extras[EXPORT_KEY] = export
    add_loop_health(a)
    check_models(a)
    r = a.results
    assert [c[0] for c in export.calls] == ["E1", "E9"]          # F1 has its data_file
    for c in ("op_limited_pct", "error_std_pct", "model_fit_pct", "id_gain", "id_dead_time_s"):
        assert r.at[1, c] == r.at[0, c], c                        # same record, same figures
    assert r.at[1, "model_check"] == r.at[0, "model_check"] == "confirmed"
    assert "export:E9" in r.at[2, "data_note"] and r.at[2, "model_check"] == "record unusable"
    assert r.at[2, "health_note"].startswith("export:E9")


def test_a_row_that_raises_stays_in_its_row(tmp_path, monkeypatch):
    """A planted fault in one row's health and another row's model check: those rows are faults of their
    stage, every row is kept, the others have their figures."""
    site = tmp_path / "site"
    for k in range(3):
        write_record(site / "rec" / f"r{k}.csv", seed=k)
    a = small_audit(tmp_path, [f"rec/r{k}.csv" for k in range(3)])
    real_health, real_check = loopdata.health_outcome, loopdata.check_record

    def health(data, *args, **kw):
        if data is not None and data.source == "rec/r0.csv":
            raise RuntimeError("planted health fault")
        return real_health(data, *args, **kw)

    def check(row, *args, **kw):
        if row.index == 2:
            raise KeyError("planted check fault")
        return real_check(row, *args, **kw)

    monkeypatch.setattr(loopdata, "health_outcome", health)
    monkeypatch.setattr(loopdata, "check_record", check)
    add_loop_health(a)
    check_models(a)
    f = {(x.stage, x.rows): x for x in faults_of(a)}
    assert set(f) == {("health", (0,)), ("modelcheck", (2,))}
    assert "RuntimeError: planted health fault" in f[("health", (0,))].error
    assert "Traceback" in f[("modelcheck", (2,))].detail and "planted check fault" in f[("modelcheck", (2,))].detail
    r = a.results
    assert len(r) == 3 and all(c in r.columns for c in HEALTH_COLUMNS + MODELCHECK_COLUMNS)
    assert math.isnan(r.at[0, "error_std_pct"]) and r.at[0, "model_check"] == "confirmed"
    assert r.at[2, "error_std_pct"] > 0 and r.at[2, "model_check"] == ""
    assert r.at[1, "error_std_pct"] > 0 and r.at[1, "model_check"] == "confirmed"


def _overlay_from_full(t, pv, ident, inv):
    """The overlay as drawn from the full arrays before the check was compacted (regression reference)."""
    n = len(t)
    idx = np.arange(0, n, max(1, int(math.ceil(n / 600))))
    series = [s for s in (pv, ident, inv) if s is not None]
    lo, hi = float(min(np.nanmin(s) for s in series)), float(max(np.nanmax(s) for s in series))
    pad = 0.05 * (hi - lo)
    lo, hi = lo - pad, hi + pad
    scale_min = (t[-1] - t[0]) > 1800
    tt = (t - t[0]) / (60.0 if scale_min else 1.0)
    t_hi = float(tt[-1]) or 1.0
    iw, ih = PLOT_W - PAD_L - PAD_R, PLOT_H - PAD_T - PAD_B

    def pts(s):
        return "" if s is None else " ".join(
            f"{PAD_L + iw * tt[i] / t_hi:.1f},{PAD_T + ih * (1 - (s[i] - lo) / (hi - lo)):.1f}"
            for i in idx if np.isfinite(s[i]))
    return pts(pv), pts(ident), pts(inv), tuple(f"{x:g}" for x in _ticks(0.0, t_hi))


def test_compact_result_is_small_and_draws_the_same_overlay(tmp_path):
    """A 40,000-sample record: the task's result pickles to a few tens of kB (no samples, no plot arrays),
    and the overlay it returns drawn equals the one drawn from the full arrays."""
    site = tmp_path / "site"
    write_record(site / "rec" / "long.csv", n=40_000)
    a = small_audit(tmp_path, ["rec/long.csv"])
    tasks, shared = loop_tasks(a)
    got = analyse_loop(tasks[0], shared)
    size = len(pickle.dumps(got))
    assert size < 40_000, size                               # the record alone is 40,000 x 4 x 8 = 1.3 MB
    full = check_record(a.inventory.rows[0], record_for_row(a.inventory.rows[0], site), a.inventory.policy)
    ident = full.identification
    want = _overlay_from_full(ident.t, ident.pv, ident.best.yhat, full.model_yhat)
    assert got.check.trace is None and got.check.drawn is not None     # the run keeps the drawing, packed
    ov = got.check.drawn.unpack()
    assert ov == overlay(full.compact().trace)
    assert (ov.data, ov.identified, ov.inventory) == want[:3]
    assert tuple(label for _, label in ov.x_ticks) == want[3]
    assert got.check.identification.best.params == ident.best.params and got.check.model_fit_pct == full.model_fit_pct
    assert got.samples == 40_000 and got.health.figures is not None


def test_tasks_cover_valid_rows_with_a_record(tmp_path):
    write_record(tmp_path / "site" / "rec" / "a.csv", n=300)
    a = small_audit(tmp_path, ["rec/a.csv", None, "rec/a.csv"])
    a.models[2] = None
    tasks, shared = loop_tasks(a)
    assert [(t.index, t.health, t.model is not None) for t in tasks] == [(0, True, True), (2, True, False)]
    assert shared.folder == str((tmp_path / "site").resolve())
    data = loop_data(a)
    assert list(data) == [0, 2] and data[2].check is None and loop_data(a) is data   # computed once per run


@pytest.mark.parametrize("field", ["health", "check"])
def test_task_without_its_part_gives_none(tmp_path, field):
    write_record(tmp_path / "site" / "rec" / "a.csv", n=300)
    a = small_audit(tmp_path, ["rec/a.csv"])
    tasks, shared = loop_tasks(a)
    t = tasks[0]
    t = LoopTask(t.index, t.row, t.model, health=field != "health", check=field != "check")
    got = analyse_loop(t, shared)
    assert getattr(got, field) is None and getattr(got, "check" if field == "health" else "health") is not None


def test_worker_tidy_frees_a_loops_cycles_and_unfreezes():
    """After a loop in a worker, what the loop left in reference cycles is freed at once, and the
    collector is back to normal after the chunk (common practice: gc.freeze / gc.unfreeze)."""
    import gc
    import weakref

    from audit.plantdata.loopdata import _Tidy

    class Holder:
        pass

    tidy = _Tidy()
    try:
        a, b = Holder(), Holder()
        a.other, b.other = b, a                       # a cycle, as a pandas Series with .dt used
        a.data = np.zeros(1000)
        gone = weakref.ref(a)
        del a, b
        assert gone() is not None                     # reference counting alone does not free a cycle
        tidy()
        assert gone() is None
    finally:
        tidy.close()
    assert gc.get_freeze_count() == 0


def test_task_returns_the_health_charts_the_report_would_draw(tmp_path):
    """The per-loop task keeps no plot arrays: it returns the loop's health charts drawn for its section's key,
    and they are the very text the report draws from the full plot data (regression: were the memory fix to drop
    data a chart reads, or draw for another section, this fails). The key is the row's anchor's."""
    from dataclasses import replace

    from audit.health_charts import HealthDrawing, health_svgs
    from audit.health_report import HealthView, health_key
    from audit.plantdata.health import HealthPlots, health_outcome, operation_data
    from audit.report import loop_anchor

    site = tmp_path / "site"
    write_record(site / "rec" / "long.csv", n=20_000)
    a = small_audit(tmp_path, ["rec/long.csv"])
    tasks, shared = loop_tasks(a)
    got = analyse_loop(tasks[0], shared)
    drawing = got.health.plots
    key = health_key(loop_anchor(a.inventory.rows[0]))
    assert isinstance(drawing, HealthDrawing) and drawing.key == key
    found = record_for_row(a.inventory.rows[0], site, shared.read_policy)
    full = health_outcome(*operation_data(found), a.models[0], shared.health, shared.policy)
    assert isinstance(full.plots, HealthPlots) and full.plots.t.size > 1000
    assert replace(got.health, plots=None) == replace(full, plots=None)        # figures, columns: the same
    want = health_svgs(HealthView(key, (), (), "", full.plots))
    drawn = health_svgs(HealthView(key, (), (), "", drawing))
    assert len(want) == 3 and drawn == want
    assert all(key + "-" in svg for _, svg in drawn)
    # what the run keeps for the charts: a few kB packed, against the arrays they were drawn from
    assert drawing.charts.size < len(pickle.dumps(full.plots)) / 4
    with pytest.raises(ValueError, match="drawn for"):
        health_svgs(HealthView("loop-other-r9-health", (), (), "", drawing))
