"""The report model built from a hand-made audit (regression tests of the report's own logic)."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest

from audit.loop import Controller
from audit.report import STATUS_ORDER, build_report, loop_anchor, proposed_model

from .test_report_support import HOSTILE_TAG, make_audit


@pytest.fixture(scope="module")
def audit(tmp_path_factory):
    return make_audit(tmp_path_factory.mktemp("out"))


@pytest.fixture(scope="module")
def report(audit):
    return build_report(audit, plot_limit=2)


def test_cover_carries_identity_and_policy(report):
    c = report.cover
    assert (c.site, c.date, c.inventory) == ("Invented Works", "2024-05-01", "loops.xlsx")
    assert c.report_id == "abababab-2024-05-01"
    assert c.inventory_sha256 == "ab" * 32
    assert {p.label for p in c.policy} >= {"ms_max", "gm_min_db", "pm_min_deg", "marginal_pct"}
    assert [it.label for it in c.limits] == ["Ms", "gain margin", "phase margin"]


def test_counts_add_up_by_status_area_and_criticality(report, audit):
    statuses = audit.results["status"].tolist()
    assert report.total.total == len(statuses) == 6
    for s in set(statuses):
        assert report.total.count(s) == statuses.count(s)
    assert sum(t.total for t in report.by_area) == 6
    assert [t.group for t in report.by_criticality] == ["high", "medium", "low"]
    assert report.statuses == tuple(s for s in STATUS_ORDER if s in statuses)


def test_without_ranking_the_work_list_falls_back_to_severity_then_tag(report, audit):
    assert not report.work.ranked
    assert any("ranking stage did not run" in n for n in report.notes)
    order = [(it.status, it.tag) for it in report.work.items]
    assert order == sorted(order, key=lambda p: (STATUS_ORDER.index(p[0]), p[1].lower()))
    assert "passes" not in {s for s, _ in order}
    assert [s for s, _ in order][0] == "unstable"
    # the invalid row is on the list (its data needs fixing), after the evaluated ones
    assert order[-1] == ("invalid", "FC-101")


def test_ranked_work_list_follows_rank_column(audit):
    ranked = audit.results.copy()
    ranked["rank"] = [np.nan, 2.0, 1.0, np.nan, 3.0, np.nan]
    ranked["action"] = ["", "retune", "retune", "", "retune", ""]
    a2 = SimpleNamespace(**{**audit.__dict__, "results": ranked})
    a2.meta = audit.meta
    rep = build_report(a2, plot_limit=0)
    assert rep.work.ranked and not rep.notes
    assert [it.tag for it in rep.work.items] == ["PC-300", "TC-200", HOSTILE_TAG]
    assert [it.action for it in rep.work.items] == ["retune"] * 3


def test_detail_sections_only_for_loops_needing_attention(report, audit):
    tags = [d.tag for d in report.details]
    assert set(tags) == {"TC-200", "PC-300", HOSTILE_TAG}
    assert report.needing_detail == 3
    # plot data for the first two in work-list order only
    assert [d.plots is not None for d in report.details] == [True, True, False]


def test_detail_all_covers_every_valid_loop(tmp_path):
    rep = build_report(make_audit(tmp_path, detail="all"), plot_limit=0)
    assert {d.tag for d in rep.details} == {"FC-100", "TC-200", "PC-300", "LC-400", HOSTILE_TAG}


def test_checks_compare_each_figure_with_its_limit(report):
    d = next(d for d in report.details if d.tag == "TC-200")
    by = {c.column: c for c in d.checks}
    assert by["stable"].verdict == "stable"
    assert by["ms"].rule == "<=" and by["ms"].limit == 2.0 and by["ms"].verdict == "beyond"
    assert by["gm_db"].rule == ">=" and by["gm_db"].limit == 6.0
    assert by["band_s_db"].limit == -20.0
    assert by["dm_s"].verdict == "for information"
    unstable = next(d for d in report.details if d.tag == "PC-300")
    assert {c.verdict for c in unstable.checks if c.column in ("ms", "gm_db", "pm_deg")} == {
        "not meaningful (unstable)"}


def test_anchors_are_stable_unique_and_safe(report, audit):
    anchors = [loop_anchor(r) for r in audit.inventory.rows]
    assert len(set(anchors)) == len(anchors)
    assert all(a.replace("-", "").isalnum() for a in anchors)
    assert loop_anchor(audit.inventory.rows[4]) == "loop-script-alert-1-script-r6"


def test_plot_curves_are_the_exact_loop_responses(report, audit):
    """S = 1/(1 + L) and T = L/(1 + L) on the plotted grid, with L from LoopModel.L (exact delay)."""
    d = report.details[0]
    fd = d.plots.frequency
    m = audit.models[d.index]
    np.testing.assert_allclose(fd.L, m.L(fd.w), rtol=1e-12)
    np.testing.assert_allclose(fd.S, 1 / (1 + fd.L), rtol=1e-12)
    np.testing.assert_allclose(fd.T, fd.L / (1 + fd.L), rtol=1e-12)
    assert np.all(np.diff(fd.w) > 0)


def test_invalid_rows_keep_their_messages(report):
    assert [(v.tag, v.row) for v in report.invalid] == [("FC-101", 7)]
    assert "F7" in report.invalid[0].messages[0]


def test_glossary_comes_from_the_columns_table(report):
    from audit.columns import RESULT_COLUMNS
    assert [g.name for g in report.glossary] == [c.name for c in RESULT_COLUMNS]


def test_history_section_reads_changes_and_status_mix():
    from audit.report import _history
    changes = SimpleNamespace(first_audit=False, previous_date="2024-01-01",
                              newly_failing=[SimpleNamespace(tag="TC-200", old_status="passes", new_status="fails")],
                              fixed=[], moved=[SimpleNamespace(tag="FC-100", figure="ms", old=1.2, new=1.6, unit="-")],
                              work_list_acted_on=2, previous_work_list_size=5)
    mix = [SimpleNamespace(date="2024-01-01", counts={"passes": 5, "fails": 1}),
           SimpleNamespace(date="2024-05-01", counts={"passes": 4, "fails": 2})]
    h = _history(SimpleNamespace(changes=changes, status_mix=mix))
    assert not h.first_audit and h.previous_date == "2024-01-01" and h.acted_on == 2
    items = {i.kind: i for i in h.items}
    assert items["newly_failing"].entries[0].old == "passes"
    assert items["moved"].entries[0].figure == "ms"
    assert h.trend_dates == ("2024-01-01", "2024-05-01")
    assert dict(h.trend) == {"fails": (1, 2), "passes": (5, 4)}


def test_proposed_model_accepts_several_shapes(audit):
    base = audit.models[0]
    ctrl = Controller("ideal", kc=0.5, ti=20.0)
    assert proposed_model(base, None) is None
    assert proposed_model(base, SimpleNamespace(model=base.with_controller(ctrl))).controller == ctrl
    got = proposed_model(base, SimpleNamespace(settings=SimpleNamespace(controller=lambda: ctrl),
                                               corrected_action="direct"))
    assert got.controller == ctrl and got.sign == -1.0
    assert proposed_model(base, SimpleNamespace(verdict="no change needed", settings=None)) is None


def test_results_missing_a_status_column_do_not_break_the_report(audit):
    bare = audit.results.drop(columns=["status"])
    a2 = SimpleNamespace(**{**audit.__dict__, "results": bare})
    a2.meta = audit.meta
    rep = build_report(a2, plot_limit=0)
    assert rep.total.count("not evaluated") == 5 and rep.total.count("invalid") == 1


def test_a_failing_step_simulation_leaves_a_note_and_the_other_kind(tmp_path, monkeypatch):
    """One kind of step simulation failing costs that kind's plots only, with the reason in the notes;
    without a time-domain stage every plotted loop says so (regression of the report's error path)."""
    import audit.curves as curves_mod
    from audit.timedomain import step_traces_many

    def flaky(models, kind):
        if kind == "load":
            raise ValueError("no memory left for the load batch")
        return step_traces_many(models, kind)

    audit = make_audit(tmp_path)
    monkeypatch.setattr(curves_mod, "_step_source", lambda: flaky)
    plotted = [d for d in build_report(audit).details if d.plots is not None]
    assert plotted
    for d in plotted:
        assert [s.kind for s in d.plots.steps] == ["setpoint"]
        assert "The load step response could not be computed: no memory left for the load batch." in d.notes
    monkeypatch.setattr(curves_mod, "_step_source", lambda: None)
    for d in build_report(audit).details:
        if d.plots is not None:
            assert d.plots.steps == ()
            assert any("not available in this build" in n for n in d.notes)
