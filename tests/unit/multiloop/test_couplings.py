"""Unit tests of audit.multiloop.couplings: the couplings sheet read by cell, bad input, groups.

Regression and logic checks on invented test data (no published values here).
"""

from __future__ import annotations

import openpyxl
import pytest

from audit.inventory import check_report, format_check, read_inventory
from audit.multiloop.figures import MAX_GROUP

LOOP_HEAD = ["tag", "model", "gain", "tau1_s", "dead_time_s", "kc", "ti_s", "action", "inner_loop"]


def loop(tag, gain=1.0, inner=None, kc=0.5, action="reverse"):
    """A valid fopdt/PI loop row (test data)."""
    return [tag, "fopdt", gain, 60.0, 5.0, kc, 60.0, action, inner]


def book(tmp_path, loops, couplings, head=("from_tag", "to_tag", "model", "gain", "tau1_s", "dead_time_s")):
    """Write loops and couplings sheets to a workbook and return its path."""
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "loops"
    ws.append(LOOP_HEAD)
    for r in loops:
        ws.append(r)
    if couplings is not None:
        cs = wb.create_sheet("couplings")
        cs.append(list(head))
        for r in couplings:
            cs.append(r)
    p = tmp_path / "inv.xlsx"
    wb.save(p)
    return p


def problems(inv):
    return [str(p) for p in inv.problems if p.sheet == "couplings"]


def test_no_sheet_no_groups(tmp_path):
    inv = read_inventory(book(tmp_path, [loop("A"), loop("B")], None))
    assert inv.couplings is None


def test_valid_pair_forms_one_group_with_units_converted(tmp_path):
    head = ("from_tag", "to_tag", "model", "gain", "tau1_min", "dead_time_min")
    inv = read_inventory(book(tmp_path, [loop("A"), loop("B"), loop("C")],
                              [["A", "b", "fopdt", 0.4, 2.0, 0.5], ["B", "A", "fopdt", -0.3, 1.0, 0.25]], head))
    cs = inv.couplings
    assert problems(inv) == []
    assert len(cs.groups) == 1 and cs.groups[0].members == (0, 1) and cs.groups[0].gid == "G1"
    p = cs.rows[0].process
    assert p.tau1 == pytest.approx(120.0) and p.dead_time == pytest.approx(30.0) and p.gain == pytest.approx(0.4)
    assert check_report(inv).exit_code == 0


@pytest.mark.parametrize("cells, where, words", [
    (["A", "Z", "fopdt", 0.4, 60, 5], "couplings!B2 (to_tag)", "unknown tag 'Z'"),
    (["A", "a", "fopdt", 0.4, 60, 5], "couplings!B2 (to_tag)", "coupled to itself"),
    (["A", "B", "fopdt", 0, 60, 5], "couplings!D2 (gain)", "must not be zero"),
    (["A", "B", "fopdt", 0.4, None, 5], "couplings!E2 (tau1_s)", "required for model fopdt"),
    (["A", "B", "xyz", 0.4, 60, 5], "couplings!C2 (model)", "unknown model"),
    (["A", "B", "fopdt", 0.4, 60, -1], "couplings!F2 (dead_time_s)", "must be a number >= 0"),
    (["", "B", "fopdt", 0.4, 60, 5], "couplings!A2 (from_tag)", "from_tag is required"),
])
def test_bad_rows_named_by_cell(tmp_path, cells, where, words):
    inv = read_inventory(book(tmp_path, [loop("A"), loop("B")], [cells]))
    msgs = problems(inv)
    assert any(m.startswith(where) and words in m for m in msgs), msgs
    assert inv.couplings.groups == ()
    assert all(r.valid for r in inv.rows)          # single-loop rows untouched
    assert check_report(inv).exit_code == 2
    assert where in format_check(check_report(inv))


def test_duplicate_pair(tmp_path):
    inv = read_inventory(book(tmp_path, [loop("A"), loop("B")],
                              [["A", "B", "fopdt", 0.4, 60, 5], ["a", "B", "fopdt", 0.2, 60, 5]]))
    msgs = problems(inv)
    assert any(m.startswith("couplings!B3 (to_tag)") and "given twice (first in row 2)" in m for m in msgs)
    assert len(inv.couplings.groups) == 1


def test_invalid_source_loop(tmp_path):
    bad = loop("B")
    bad[2] = "x"      # gain not a number: row B is invalid
    inv = read_inventory(book(tmp_path, [loop("A"), bad], [["B", "A", "fopdt", 0.4, 60, 5]]))
    msgs = problems(inv)
    assert any(m.startswith("couplings!A2 (from_tag)") and "has errors" in m for m in msgs)
    assert inv.couplings.groups == ()


def test_cycle_through_cascade_and_inner_loop(tmp_path):
    loops = [loop("FIC-1"), loop("TIC-1", inner="FIC-1"), loop("LIC-1")]
    inv = read_inventory(book(tmp_path, loops, [["TIC-1", "FIC-1", "fopdt", 0.4, 60, 5],
                                                ["FIC-1", "LIC-1", "fopdt", 0.4, 60, 5],
                                                ["TIC-1", "LIC-1", "fopdt", 0.4, 60, 5]]))
    msgs = problems(inv)
    assert any(m.startswith("couplings!B2 (to_tag)") and "cycle through the cascade" in m for m in msgs)
    assert any(m.startswith("couplings!A3 (from_tag)") and "inner loop of cascade TIC-1" in m for m in msgs)
    g = inv.couplings.groups
    assert len(g) == 1 and g[0].members == (1, 2)       # the outer loop may be coupled


def test_group_over_size_limit(tmp_path):
    n = MAX_GROUP + 1
    loops = [loop(f"L{i}") for i in range(n)] + [loop("X"), loop("Y")]
    chain = [[f"L{i}", f"L{i + 1}", "fopdt", 0.1, 60, 5] for i in range(n - 1)]
    inv = read_inventory(book(tmp_path, loops, chain + [["X", "Y", "fopdt", 0.2, 60, 5]]))
    msgs = problems(inv)
    assert sum("more than the limit of" in m for m in msgs) == n - 1
    assert any(m.startswith("couplings!A2 (from_tag)") for m in msgs)
    assert [g.members for g in inv.couplings.groups] == [(n, n + 1)]
    assert all(r.valid for r in inv.rows)


def test_time_column_without_unit_and_gain_eu(tmp_path):
    inv = read_inventory(book(tmp_path, [loop("A"), loop("B")], [["A", "B", "fopdt", 0.4, 60, 5, 3]],
                              head=("from_tag", "to_tag", "model", "gain", "tau1_s", "dead_time", "gain_eu")))
    msgs = problems(inv)
    assert any(m.startswith("couplings!F1") and "needs its unit" in m for m in msgs)
    assert any(m.startswith("couplings!G1 (gain_eu)") for m in msgs)


def test_check_command_names_coupling_cells(tmp_path, capsys):
    """`check` reports coupling problems by cell and exits 2; the loops themselves stay valid."""
    from audit.cli import main
    p = book(tmp_path, [loop("A"), loop("B")], [["A", "Q", "fopdt", 0.4, 60, 5]])
    code = main(["check", str(p)])
    out = capsys.readouterr().out
    assert code == 2
    assert "couplings!B2 (to_tag): unknown tag 'Q'" in out
    assert "2 rows read, 2 valid, 0 invalid" in out


def test_out_of_range_values_refused_by_cell(tmp_path):
    """The loops sheet's ranges (audit.ranges) apply to a coupling's model too."""
    inv = read_inventory(book(tmp_path, [loop("A"), loop("B")], [["A", "B", "fopdt", 1e9, 60, 5]]))
    msgs = problems(inv)
    assert any(m.startswith("couplings!D2 (gain)") and "range" in m for m in msgs), msgs
    assert inv.couplings.groups == ()
