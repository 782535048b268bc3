"""The ``couplings`` sheet: how one loop's controller output moves another loop's PV, and the groups.

One row per coupling: ``from_tag`` (the loop whose controller output acts), ``to_tag`` (the loop
whose PV it moves) and a process model in the columns and units of the ``loops`` sheet (``model``,
``gain`` or ``gain_per_min``, ``tau1_*``, ``tau2_*``, ``lead_*``, ``dead_time_*``, ``num``, ``den``;
a time column needs its unit in the header). The gain is in % of the to-loop's PV range per % of
the from-loop's output. Cells are read with the loops sheet's readers and converted at the door by
the same unit conversions (:mod:`audit.inventory`, :mod:`audit.units`).

Loops joined by valid couplings form groups (connected components); each group is audited as
one multivariable loop with the loops' own controllers (:mod:`audit.multiloop.figures`).

Rules (each problem located as ``couplings!cell (column)``)
-----------------------------------------------------------
Errors make the coupling unused; the loops keep their single-loop results whatever the
couplings hold.

1. *Unknown tag*: ``from_tag`` or ``to_tag`` names no row of the loops sheet (tags compare as
   the loops sheet compares them: :func:`audit.rows.tag_key`).
2. *To itself*: ``from_tag`` equals ``to_tag`` (the loop's own model is on the loops sheet).
3. *Duplicate*: the same (from_tag, to_tag) pair on an earlier row.
4. *Model*: a missing or unknown model, a missing required value, a time column without unit,
   a zero gain, an improper tf, a value outside the accepted ranges (:mod:`audit.ranges`) -- as on
   the loops sheet; ``gain_eu`` is refused (the coupling
   has no PV range of its own).
5. *Invalid loop*: the named loop's row has errors; the coupling cannot be evaluated.
6. *Cascades*: a coupling between two loops of one cascade chain would close a cycle through
   the cascade, which already models that path; a cascade's inner loop cannot be coupled (its
   output reaches other PVs only through the outer loop's model): couple the outer loop.
7. *Group too large*: a group of more than :data:`audit.multiloop.figures.MAX_GROUP` loops is not
   evaluated (every coupling of it gets the error); split it or audit its loops alone.
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass
from typing import Any, Sequence

from ..loop import Process, make_process
from ..rows import LoopRow, Problem
from .figures import MAX_GROUP

#: Columns of the couplings sheet besides the model columns. [-]
KEY_COLUMNS = ("from_tag", "to_tag", "note")
#: Loops-sheet columns a coupling row may use (canonical names). [-]
MODEL_COLUMNS = ("model", "gain", "gain_per_min", "num", "den",
                 *(f"{b}_{u}" for b in ("tau1", "tau2", "lead", "dead_time") for u in ("s", "min", "h")))


@dataclass(frozen=True)
class Coupling:
    """One row of the couplings sheet, validated.

    Attributes
    ----------
    sheet : str
        Sheet name.
    excel_row : int
        Row number in the sheet (1-based).
    from_tag, to_tag : str or None
        Tags as entered.
    process : Process or None
        The coupling model (gain [-] or [1/s] for ipdt, times [s]); None when invalid.
    source : int or None
        Index of the from-loop's row in the inventory.
    target : int or None
        Index of the to-loop's row in the inventory.
    errors, warnings : tuple of Problem
        Problems located by cell.
    """

    sheet: str
    excel_row: int
    from_tag: str | None
    to_tag: str | None
    process: Process | None
    source: int | None = None
    target: int | None = None
    errors: tuple[Problem, ...] = ()
    warnings: tuple[Problem, ...] = ()

    @property
    def valid(self) -> bool:
        """True when the coupling is used."""
        return not self.errors and self.process is not None


@dataclass(frozen=True)
class LoopGroup:
    """Loops joined by couplings.

    Attributes
    ----------
    gid : str
        Group identifier ``G1``, ``G2``, ... in order of the group's first loop row.
    members : tuple of int
        Inventory row indices of the loops, in inventory order.
    couplings : tuple of Coupling
        The valid couplings among them.
    """

    gid: str
    members: tuple[int, ...]
    couplings: tuple[Coupling, ...]


@dataclass(frozen=True)
class CouplingSheet:
    """The couplings sheet read: every row, its problems and the groups.

    Attributes
    ----------
    rows : tuple of Coupling
        Every non-blank row in sheet order.
    problems : tuple of Problem
        Header problems then each row's problems, in order.
    groups : tuple of LoopGroup
        The groups evaluated (size within the limit).
    """

    rows: tuple[Coupling, ...]
    problems: tuple[Problem, ...]
    groups: tuple[LoopGroup, ...]


def _key(tag: str | None) -> str:
    """Tags compare as the loops sheet compares them (NFKC, format characters removed, case folded)."""
    from ..rows import tag_key
    return tag_key(tag)


def _validate_model(chk, sheet: str) -> Process | None:
    """The coupling's model from its cells, with the loops sheet's readers and conversions."""
    from .. import inventory as inv, units

    model = chk.choice("model", inv.MODELS)
    if model is None and not chk.present("model"):
        chk.err("model", f"model is required; accepted: {', '.join(inv.MODELS)}")
    if chk.present("gain_per_min") and model is not None and model != "ipdt":
        chk.err("gain_per_min", f"gain_per_min is for ipdt (integrating) models only; this row's model is {model}")
    gain, gconv = chk.group("gain", [("gain", float, inv._ANY), ("gain_per_min", units.per_min_to_per_s, inv._ANY)],
                            "1/s" if model == "ipdt" else "[-]")
    if gain is not None and gain == 0:
        chk.err(gconv or "gain", "coupling gain must not be zero (leave the coupling out instead)")
        gain = None

    def time_q(base: str, need: str) -> float | None:
        return chk.group(base, inv._time_members(base, need), "s")[0]

    got: dict[str, Any] = {"gain": gain, "tau1": time_q("tau1", inv._POS), "tau2": time_q("tau2", inv._POS),
                           "lead": time_q("lead", inv._ANY), "num": inv._parse_coeffs(chk, "num"),
                           "den": inv._parse_coeffs(chk, "den")}
    dead = time_q("dead_time", inv._NONNEG) or 0.0
    if model is None or chk.has_errors:
        return None
    for q in inv._MODEL_FIELDS:
        cols = inv.alternatives(q) if q not in ("num", "den") else [q]
        given = [c for c in cols if chk.present(c)]
        if given and q not in inv._MODEL_USES[model]:
            chk.warn(given[0], f"not used by model {model}; ignored")
            got[q] = None
    for q in inv._MODEL_REQUIRES[model]:
        cols = inv.alternatives(q) if q not in ("num", "den") else [q]
        cols = [c for c in cols if c != "gain_eu"]
        if got[q] is None and not any(chk.present(c) for c in cols):
            chk.err(cols[0], f"required for model {model}" + (f" (or {', '.join(cols[1:])})" if len(cols) > 1 else ""))
    if model == "tf" and got["num"] is not None and got["den"] is not None:
        inv.check_tf_cells(chk, got["num"], got["den"], "coupling")
    if chk.has_errors:
        return None
    return make_process(model, got["gain"], got["tau1"], got["tau2"], got["lead"], dead, got["num"], got["den"])


def _chains(rows: Sequence[LoopRow]) -> tuple[dict[str, str], dict[str, str]]:
    """(inner tag key -> outer tag key, tag key -> chain id) from the loops' inner_loop cells."""
    outer_of: dict[str, str] = {}
    for r in rows:
        if r.inner_loop and r.tag:
            outer_of[_key(r.inner_loop)] = _key(r.tag)
    chain: dict[str, int] = {}
    parent = {k: k for r in rows if r.tag for k in [_key(r.tag)]}

    def find(x):
        while parent.get(x, x) != x:
            x = parent[x]
        return x
    for a, b in outer_of.items():
        if a in parent and b in parent:
            parent[find(a)] = find(b)
    for k in parent:
        chain[k] = find(k)
    return outer_of, chain


def read_couplings(table, loop_rows: Sequence[LoopRow]) -> CouplingSheet:
    """Validate the couplings sheet by cell and form the groups.

    Parameters
    ----------
    table : audit.inventory._Table
        The sheet as plain cells (header row with ``from_tag``).
    loop_rows : sequence of LoopRow
        The loops sheet's rows, validated.

    Returns
    -------
    CouplingSheet
        Every coupling row, the problems by cell and the groups within the size limit.
    """
    from .. import inventory as inv

    problems: list[Problem] = []
    colmap: dict[str, list[int]] = {}
    allowed = set(MODEL_COLUMNS)
    for col, h in sorted(table.headers.items()):
        cell = f"{inv._col_letter(col)}{table.header_row}"
        word = inv._norm(str(h))
        name = word if word in KEY_COLUMNS else inv.canonical_header(h)
        if name in KEY_COLUMNS or name in allowed:
            colmap.setdefault(name, []).append(col)
        elif name == "gain_eu":
            problems.append(Problem(table.sheet, cell, "gain_eu", "gain_eu is not accepted on the couplings sheet "
                                    "(no PV range there): give gain in % of the to-loop's PV range per % output"))
            colmap.setdefault("gain_eu", []).append(col)
        elif inv._base_of(h) in ("tau1", "tau2", "lead", "dead_time"):
            problems.append(Problem(table.sheet, cell, "", f"column '{h}' needs its unit in the header: use one of "
                                    f"{', '.join(inv._NEEDS_UNIT[inv._base_of(h)])}; its values are not read"))
            colmap.setdefault("_unitless", []).append(col)
        else:
            near = difflib.get_close_matches(word, [*KEY_COLUMNS, *allowed], n=1, cutoff=0.75)
            hint = f"; did you mean {near[0]}?" if near else ""
            problems.append(Problem(table.sheet, cell, "", f"column '{h}' is not used on the couplings sheet; "
                                    f"ignored{hint}", "warning"))
    for req in ("from_tag", "to_tag"):
        if req not in colmap:
            problems.append(Problem(table.sheet, str(table.header_row), req, f"no '{req}' column; couplings not read"))
    if any(p.severity == "error" and p.column in ("from_tag", "to_tag") for p in problems):
        return CouplingSheet((), tuple(problems), ())

    by_tag = {_key(r.tag): r for r in loop_rows if r.tag}
    outer_of, chain = _chains(loop_rows)
    seen: dict[tuple[str, str], int] = {}
    out: list[Coupling] = []
    order = {n: cols[0] for n, cols in colmap.items()}
    for r, vals, fmts in table.rows:
        chk = inv._RowCheck(table.sheet, r, vals, fmts, colmap, order)
        for c in colmap.get("_unitless", []):
            if c in vals:
                chk.err("", "value not read: the column's header needs a unit", c)
        if "gain_eu" in colmap and chk.present("gain_eu"):
            chk.err("gain_eu", "gain_eu not accepted here; give gain")
        ft, tt = chk.text("from_tag"), chk.text("to_tag")
        if not ft:
            chk.err("from_tag", "from_tag is required (the loop whose controller output acts)")
        if not tt:
            chk.err("to_tag", "to_tag is required (the loop whose PV moves)")
        src = by_tag.get(_key(ft)) if ft else None
        dst = by_tag.get(_key(tt)) if tt else None
        for name, tag, row in (("from_tag", ft, src), ("to_tag", tt, dst)):
            if tag and row is None:
                near = difflib.get_close_matches(_key(tag), list(by_tag), n=1, cutoff=0.75)
                hint = f" (did you mean {by_tag[near[0]].tag}?)" if near else ""
                chk.err(name, f"unknown tag {tag!r}: no row of the loops sheet has it{hint}")
            elif row is not None and not row.valid:
                chk.err(name, f"loop {row.tag!r} ({row.location}) has errors; the coupling cannot be evaluated "
                              f"until that row is fixed")
        if ft and tt and _key(ft) == _key(tt):
            chk.err("to_tag", "a loop cannot be coupled to itself (its own model is on the loops sheet)")
        elif src is not None and dst is not None:
            a, b = _key(ft), _key(tt)
            if chain.get(a) == chain.get(b) and (a in outer_of or b in outer_of or
                                                 a in outer_of.values() or b in outer_of.values()):
                chk.err("to_tag", f"{ft} and {tt} are in the same cascade: a coupling would close a cycle through "
                                  f"the cascade, whose model already holds this path")
            else:
                for name, k, tag in (("from_tag", a, ft), ("to_tag", b, tt)):
                    if k in outer_of:
                        outer = by_tag[outer_of[k]].tag
                        chk.err(name, f"{tag} is the inner loop of cascade {outer}: couple the outer loop {outer} "
                                      f"instead")
            pair = (a, b)
            if pair in seen:
                chk.err("to_tag", f"coupling {ft} -> {tt} given twice (first in row {seen[pair]}); this one ignored")
            else:
                seen[pair] = r
        proc = _validate_model(chk, table.sheet)
        ps = [p for *_, p in sorted(chk.problems, key=lambda t: (t[0], t[1]))]
        errs = tuple(p for p in ps if p.severity == "error")
        out.append(Coupling(table.sheet, r, ft or None, tt or None, proc if not errs else None,
                            src.index if src is not None else None, dst.index if dst is not None else None,
                            errs, tuple(p for p in ps if p.severity == "warning")))
    out, groups = _form_groups(out, loop_rows, inv._col_letter(colmap["from_tag"][0]))
    for c in out:
        problems.extend(c.errors + c.warnings)
    return CouplingSheet(tuple(out), tuple(problems), groups)


def _form_groups(rows: list[Coupling], loop_rows: Sequence[LoopRow],
                 from_col: str) -> tuple[list[Coupling], tuple[LoopGroup, ...]]:
    """Connected components of the valid couplings; groups over the size limit refused by cell."""
    parent: dict[int, int] = {}

    def find(x: int) -> int:
        while parent.setdefault(x, x) != x:
            parent[x] = parent[parent[x]]
            x = parent[x]
        return x
    for c in rows:
        if c.valid:
            parent[find(c.source)] = find(c.target)
    comps: dict[int, list[int]] = {}
    for x in list(parent):
        comps.setdefault(find(x), []).append(x)
    groups: list[LoopGroup] = []
    out = list(rows)
    big: dict[int, str] = {}
    for root, members in sorted(comps.items(), key=lambda kv: min(kv[1])):
        members = sorted(members)
        if len(members) > MAX_GROUP:
            tags = ", ".join(str(loop_rows[m].tag) for m in members)
            big[root] = (f"these couplings join {len(members)} loops ({tags}), more than the limit of {MAX_GROUP} "
                         f"audited together; the group is not evaluated (its loops keep their single-loop results)")
            continue
        cs = tuple(c for c in rows if c.valid and find(c.source) == root)
        groups.append(LoopGroup(f"G{len(groups) + 1}", tuple(members), cs))
    if big:
        for k, c in enumerate(out):
            if c.valid and find(c.source) in big:
                p = Problem(c.sheet, f"{from_col}{c.excel_row}", "from_tag", big[find(c.source)])
                out[k] = Coupling(c.sheet, c.excel_row, c.from_tag, c.to_tag, None, c.source, c.target,
                                  (p,) + c.errors, c.warnings)
    return out, tuple(groups)


#: Headers of the template's couplings sheet, with their help text (the loops sheet's units).
TEMPLATE_HEADERS: tuple[tuple[str, str], ...] = (
    ("from_tag", "Tag of the loop whose controller output acts (a row of the loops sheet)."),
    ("to_tag", "Tag of the loop whose PV it moves (another row of the loops sheet)."),
    ("model", "fopdt, sopdt, ipdt or tf, as on the loops sheet."),
    ("gain", "Gain in % of the to-loop's PV range per % of the from-loop's output (ipdt: 1/s). Not zero."),
    ("tau1_s", "Time constant [s]; rename to tau1_min or tau1_h for other units."),
    ("tau2_s", "sopdt only: second time constant [s]."),
    ("lead_s", "sopdt only: lead time [s]."),
    ("dead_time_s", "Dead time of the coupling path [s]."),
    ("num", "tf only: numerator coefficients, descending powers of s, separated by spaces."),
    ("den", "tf only: denominator coefficients."),
    ("note", "Free text (ignored by the tool)."),
)

#: The couplings sheet's instructions (also in the template's instructions sheet).
TEMPLATE_HELP = (
    "Interacting loops (optional 'couplings' sheet): one row per way one loop's controller output moves",
    "another loop's PV: from_tag, to_tag and a model in the loops sheet's columns and units. Loops joined by",
    f"couplings are audited together as a group (at most {MAX_GROUP} loops), each keeping its single-loop results.",
    "Do not couple a cascade's inner loop or two loops of one cascade (the cascade already models that path).",
)


def write_template_sheet(wb) -> None:
    """Add an empty ``couplings`` sheet with header notes to a template workbook.

    Parameters
    ----------
    wb : openpyxl.Workbook
        The template being written (the sheet goes after ``loops``).
    """
    from openpyxl.comments import Comment
    from openpyxl.styles import Font, PatternFill

    ws = wb.create_sheet("couplings", index=1)
    for j, (name, text) in enumerate(TEMPLATE_HEADERS, start=1):
        c = ws.cell(1, j, name)
        c.font = Font(bold=True)
        c.fill = PatternFill("solid", fgColor="DDE7F0")
        note = Comment(text, "plant-audit")
        note.width, note.height = 300, 110
        c.comment = note
        ws.column_dimensions[c.column_letter].width = max(10, len(name) + 4)
    ws.freeze_panes = "A2"
