"""Cascades: an outer loop evaluated with its inner loop inside, and the pair checked.

A row whose ``inner_loop`` names another row's tag is the outer loop of a cascade:
its controller output is the inner loop's set-point. ``outer_model_input`` says
what the outer row's process model was identified from:

``inner_pv`` (default)
    The model relates the outer PV to the inner PV [% of outer range per % of inner
    range]. The outer loop's effective process is T_inner(jw) P_outer(jw), with
    T_inner = L_i / (F_i (1 + L_i)) the inner set-point-to-PV response, composed
    exactly on the frequency response (every dead time as e^{-jw theta}); see
    :meth:`audit.loop.LoopModel.L`. Chains of any depth compose the same way.
``inner_sp``
    The model relates the outer PV to the inner set-point (identified with the inner
    loop in automatic), so it already contains the closed inner loop; the outer row
    is evaluated as a single loop and the inner row only enters the pair checks.

Rules (decisions, not arithmetic)
---------------------------------
Cascade errors are located at the outer row's ``inner_loop`` cell and make that row
invalid (model None, status ``invalid``):

1. *Unknown tag*: ``inner_loop`` names no row of the inventory (tags compare
   ignoring case and surrounding spaces, as the inventory's duplicate check does).
2. *Cycle*: following ``inner_loop`` from a row comes back to it; every row on the
   cycle gets the error (an inner set-point cannot, through other loops, drive itself).
3. *Two outer loops*: an inner loop's set-point has one source; when several rows
   name the same inner loop, every one of them gets the error (with either
   ``outer_model_input``).
4. *Composition meaningless* (``inner_pv`` only): the outer model needs T_inner,
   which exists only when the inner row is itself evaluable -- valid, free of
   cascade errors and, when it is an ``inner_pv`` outer loop in turn, composable
   down its own chain. An invalid inner row therefore makes the ``inner_pv`` outer
   row invalid, and the message names the inner row. With ``inner_sp`` an invalid
   inner row does not stop the outer evaluation (its model already contains the
   inner loop); the pair checks say the result is conditional instead.

   The process model type never makes a composition meaningless: the inner
   controller compares set-point and PV both in % of the inner PV range, so
   T_inner is dimensionless for fopdt, sopdt, ipdt and tf alike (an integrating
   inner process only sets T_inner(0) = 1). What the tool cannot check is whether
   the outer model really was identified from the inner PV; ``outer_model_input``
   is the engineer's declaration of that, and the unit of an ``inner_pv`` outer
   gain is % of outer PV range per % of inner PV range.
5. *Too deep*: a chain of more than :data:`MAX_LEVELS` loops (counting the outer
   loop) is refused at every row with more than that many levels below and
   including it; real cascades have two or three.

Pair checks (stage ``cascade``, outer rows that were evaluated):

* ``cascade_ratio`` = wb_inner / wb_outer (bandwidths, |S| = 1/sqrt(2), column
  ``wb_rad_s``); when either bandwidth is blank, the gain-crossover frequencies
  wc_inner / wc_outer (``wc_rad_s``) instead; ``cascade_basis`` says which. The
  outer figure is the composed one (``inner_pv``) or the outer row's own
  (``inner_sp``); the inner figure is the inner row's own.
* ``cascade_ok`` is False when the ratio is below ``policy.cascade_ratio_min``:
  the inner loop is too slow to be treated as an actuator, the cascade design rule
  is broken and the outer row ``fails``. A ratio within ``marginal_pct`` above the
  minimum makes a passing outer row ``marginal`` -- the same marginal zone as the
  other limits.
* An inner loop that is unstable on its own makes the outer result conditional:
  the composed figures hold only while both loops are in automatic and unsaturated.
  The outer row says so in its findings, is at best ``fails``, and the ratio is not
  checked. An inner loop that fails its limits, or could not be evaluated (only
  possible with ``inner_sp``), is named in the outer row's findings as a condition
  without changing its status.
* An outer row that is itself unstable or invalid gets no ratio.

References
----------
.. [1] F. G. Shinskey, Process Control Systems, 4th ed., McGraw-Hill, 1996, ch. 7
   (cascade control: the inner loop must be markedly faster than the outer).
.. [2] K. J. Astrom and T. Hagglund, Advanced PID Control, ISA, 2006, sec. 9.4
   (cascade control; tune the inner loop first, then the outer with it closed).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, replace
from typing import Mapping, Sequence

import numpy as np
import pandas as pd

from .loop import LoopModel, model_from_row
from .rows import LoopRow, Problem, tag_key

#: Results columns added by :func:`add_cascade_checks` (documented in :mod:`audit.columns`).
CASCADE_COLUMNS = ("inner_loop", "cascade_basis", "cascade_ratio", "cascade_ok")
#: Most loops in one chain of cascades (outer loop included). [-]
MAX_LEVELS = 8


def _key(tag: str | None) -> str:
    return tag_key(tag)


@dataclass(frozen=True)
class CascadeLinks:
    """How the rows of an inventory are chained.

    Attributes
    ----------
    inner_of : dict[int, int]
        Outer row index -> inner row index, for every ``inner_loop`` that names exactly
        one row (links of rows with cascade errors included).
    problems : dict[int, tuple[Problem, ...]]
        Cascade errors per row index (rows without errors are absent).
    composed : frozenset[int]
        Rows whose model is composed with their inner loop (``inner_pv``, no errors).
    """

    inner_of: dict[int, int]
    problems: dict[int, tuple[Problem, ...]]
    composed: frozenset[int]

    def ok(self, i: int) -> bool:
        """True when row ``i`` has no cascade error."""
        return i not in self.problems


def inner_loop_column_letter(inventory=None, rows: Sequence[LoopRow] = ()) -> str | None:
    """The sheet column letter of ``inner_loop``, when it can be known.

    Looks for an inventory mapping ``column_letters`` (canonical column -> letter),
    then for any problem the inventory already located in that column.

    Parameters
    ----------
    inventory : Inventory or None
        The inventory read; its ``column_letters`` mapping is used when it has one.
    rows : sequence of LoopRow
        Rows whose errors and warnings are searched for a cell in the ``inner_loop`` column.

    Returns
    -------
    str or None
        Column letter (e.g. ``"K"``), None when unknown.
    """
    letters = getattr(inventory, "column_letters", None)
    if isinstance(letters, Mapping) and letters.get("inner_loop"):
        return str(letters["inner_loop"])
    for r in rows:
        for p in (*r.errors, *r.warnings):
            m = re.fullmatch(r"([A-Z]{1,3})\d+", p.cell or "")
            if p.column == "inner_loop" and m:
                return m.group(1)
    return None


def _cell(row: LoopRow, letter: str | None) -> str:
    return f"{letter}{row.excel_row}" if letter else str(row.excel_row)


def _name(row: LoopRow) -> str:
    return f"{row.tag} (row {row.excel_row})" if row.tag else f"row {row.excel_row}"


def _chain_levels(n: int, inner_of: Mapping[int, int], stop: set[int] = frozenset()) -> dict[int, int]:
    """Loops in the chain below and including each row (1: no inner loop), without recursion.

    A walk ends at a row in ``stop`` (counted, not followed) or where it meets itself (a cycle).
    """
    levels: dict[int, int] = {}
    for s0 in range(n):
        walk: list[int] = []
        on_walk: set[int] = set()
        i = s0
        while i is not None and i not in levels and i not in on_walk:
            walk.append(i)
            on_walk.add(i)
            i = inner_of.get(i) if i not in stop else None
        base = levels[i] if i is not None and i in levels else 0
        for j in reversed(walk):
            base += 1
            levels[j] = base
    return levels


def link_cascades(rows: Sequence[LoopRow], letter: str | None = None) -> CascadeLinks:
    """Resolve every ``inner_loop`` and apply rules 1-5 of the module docstring.

    Parameters
    ----------
    rows : sequence of LoopRow
        All rows of the inventory, in order (``rows[i].index == i`` is not assumed).
    letter : str, optional
        Column letter of ``inner_loop`` in the sheet; without it problems name the row
        only (``cell`` = the row number) and the column by name.

    Returns
    -------
    CascadeLinks
    """
    n = len(rows)
    by_tag: dict[str, list[int]] = {}
    for i, r in enumerate(rows):
        if r.tag:
            by_tag.setdefault(_key(r.tag), []).append(i)
    errs: dict[int, list[str]] = {}
    inner_of: dict[int, int] = {}
    # a self-reference is already an inventory error at this cell; do not repeat it
    own_error = {i for i, r in enumerate(rows) if any(p.column == "inner_loop" for p in r.errors)}

    for i, r in enumerate(rows):
        if not r.inner_loop or not _key(r.inner_loop):
            continue
        hits = by_tag.get(_key(r.inner_loop), [])
        if not hits:
            errs.setdefault(i, []).append(f"inner loop {r.inner_loop!r} is not the tag of any row of the inventory")
        elif len(hits) > 1:
            errs.setdefault(i, []).append(
                f"inner loop {r.inner_loop!r} is ambiguous: the tag is in rows "
                f"{', '.join(str(rows[j].excel_row) for j in hits)}")
        else:
            inner_of[i] = hits[0]

    # rule 2: cycles (each row has at most one inner loop, so each walk meets at most one cycle)
    state = [0] * n  # 0 unvisited, 1 on the current walk, 2 done
    for s in range(n):
        walk: list[int] = []
        i = s
        while i is not None and state[i] == 0:
            state[i] = 1
            walk.append(i)
            i = inner_of.get(i)
        if i is not None and state[i] == 1:
            cyc = walk[walk.index(i):]
            if not (len(cyc) == 1 and cyc[0] in own_error):
                path = " -> ".join(rows[j].tag or f"row {rows[j].excel_row}" for j in cyc + [cyc[0]])
                for j in cyc:
                    errs.setdefault(j, []).append(f"cascade cycle {path}: an inner set-point cannot drive itself")
        for j in walk:
            state[j] = 2

    # rule 3: one outer loop per inner loop
    claims: dict[int, list[int]] = {}
    for o, j in inner_of.items():
        claims.setdefault(j, []).append(o)
    for j, outs in claims.items():
        if len(outs) < 2:
            continue
        for o in outs:
            others = ", ".join(_name(rows[k]) for k in sorted(outs) if k != o)
            errs.setdefault(o, []).append(
                f"inner loop {rows[j].tag!r} is also claimed by {others}; an inner loop's set-point has one source")

    # rule 5: at most MAX_LEVELS loops in one chain (cycles already marked)
    levels = _chain_levels(n, inner_of, set(errs))
    for i, lv in levels.items():
        if lv > MAX_LEVELS and i not in errs:
            errs[i] = [f"cascade of {lv} levels below and including this loop; at most {MAX_LEVELS} are evaluated"]

    # rule 4: an inner_pv composition needs an evaluable inner loop, down the chain
    memo: dict[int, bool] = {}

    def evaluable(i: int, seen: frozenset[int] = frozenset()) -> bool:
        if i in memo:
            return memo[i]
        if i in seen or not rows[i].valid or i in errs:
            memo[i] = False
            return False
        r = rows[i]
        ok = True
        if i in inner_of and r.outer_model_input == "inner_pv":
            j = inner_of[i]
            if not evaluable(j, seen | {i}):
                ok = False
                if i not in errs:
                    ir = rows[j]
                    why = "it has errors of its own" if not ir.valid else "it has cascade errors"
                    errs[i] = [f"inner loop {_name(ir)} is invalid ({why}), so this loop cannot be composed with it "
                               f"(outer_model_input inner_pv); fix {ir.sheet}!{ir.excel_row} or use inner_sp if "
                               f"the model was identified from the inner set-point"]
        memo[i] = ok
        return ok

    for i in range(n):
        evaluable(i)
    problems = {i: tuple(Problem(rows[i].sheet, _cell(rows[i], letter), "inner_loop", m) for m in ms)
                for i, ms in sorted(errs.items())}
    composed = frozenset(i for i, j in inner_of.items()
                         if rows[i].outer_model_input == "inner_pv" and i not in problems and rows[i].valid)
    return CascadeLinks(inner_of, problems, composed)


def validate_cascades(rows: Sequence[LoopRow], letter: str | None = None) -> dict[int, list[Problem]]:
    """Cascade errors per row index, each located at the row's ``inner_loop`` cell.

    Parameters
    ----------
    rows : sequence of LoopRow
        All rows of the inventory, in order.
    letter : str, optional
        Column letter of ``inner_loop``; found from the rows' own problems when None
        (see :func:`inner_loop_column_letter`), else problems carry the row number only.

    Returns
    -------
    dict[int, list[Problem]]
        Row index -> errors (rules 1-5 of the module docstring); rows without errors absent.
    """
    if letter is None:
        letter = inner_loop_column_letter(None, rows)
    return {i: list(ps) for i, ps in link_cascades(rows, letter).problems.items()}


def compose(outer: LoopModel, inner: LoopModel | None) -> LoopModel:
    """The outer loop with ``inner`` inside (``inner_pv``), e.g. with a proposed inner tuning.

    Parameters
    ----------
    outer : LoopModel
        The outer loop; its own ``inner`` is replaced.
    inner : LoopModel or None
        The inner loop whose set-point-to-PV response multiplies the outer process.
    """
    return replace(outer, inner=inner)


def build_models(audit) -> list[LoopModel | None]:
    """LoopModel per row (None for an invalid row); ``inner_pv`` cascades composed, inner first.

    Rows with cascade errors get model None and their problems appended to
    ``audit.results['message']`` ('; ' separated, each once). The links are kept in
    ``audit.extras['cascade']`` (:class:`CascadeLinks`) for :func:`add_cascade_checks`.

    Parameters
    ----------
    audit : Audit
        The run; its inventory rows are read, its ``results`` and ``extras`` changed in place.

    Returns
    -------
    list of LoopModel or None
        One per inventory row, in order.
    """
    rows = audit.inventory.rows
    links = link_cascades(rows, inner_loop_column_letter(audit.inventory, rows))
    audit.extras["cascade"] = links
    res = getattr(audit, "results", None)
    if res is not None and "message" in res.columns:
        for i, ps in links.problems.items():
            old = res.at[i, "message"]
            old = "" if old is None or (isinstance(old, float) and math.isnan(old)) else str(old)
            parts = [m for m in old.split("; ") if m]
            parts += [str(p) for p in ps if str(p) not in parts]
            res.at[i, "message"] = "; ".join(parts)
    built: dict[int, LoopModel | None] = {}
    read = getattr(audit.inventory, "models", ())   # the reader's loops, from the same row values (no inner loop)
    read = read if len(read) == len(rows) else ()

    def build(i: int) -> LoopModel | None:
        if i in built:
            return built[i]
        r = rows[i]
        if not r.valid or not links.ok(i):
            built[i] = None
            return None
        if i in links.composed:
            built[i] = model_from_row(r, build(links.inner_of[i]))
        else:
            pre = read[i] if read else None
            built[i] = pre if pre is not None and pre.tag == (r.tag or f"row {r.excel_row}") else model_from_row(r)
        return built[i]

    return [build(i) for i in range(len(rows))]


def tuning_order(rows: Sequence[LoopRow]) -> list[int]:
    """Row indices in the order proposals should be made: every inner loop before its outer loop.

    Tune the innermost loop first, then each outer loop against the proposed (not
    the present) tuning of the loop inside it [2]_. Rows outside cascades, and rows
    on a cycle, keep inventory order; every index appears once.

    Parameters
    ----------
    rows : sequence of LoopRow
        All rows of the inventory, in order.

    Returns
    -------
    list[int]
        A permutation of ``range(len(rows))``.
    """
    links = link_cascades(rows)
    order: list[int] = []
    placed: set[int] = set()
    for s0 in range(len(rows)):
        walk: list[int] = []
        on_walk: set[int] = set()
        i = s0
        while i is not None and i not in placed and i not in on_walk:
            walk.append(i)
            on_walk.add(i)
            i = links.inner_of.get(i)
        for j in reversed(walk):
            placed.add(j)
            order.append(j)
    return order


def tuning_levels(rows: Sequence[LoopRow], links: CascadeLinks | None = None) -> list[list[int]]:
    """Row indices in batches for proposals: level 0 has no inner loop to wait for, level k
    rows have their inner loop in level k - 1.

    Propose a whole level at once, then compose each outer row of the next level with
    its inner loop's proposed tuning (:func:`compose`) before proposing it. Rows on a
    cycle or with an unresolved inner loop are in level 0. Every index appears once;
    within a level, inventory order.

    Parameters
    ----------
    rows : sequence of LoopRow
        All rows of the inventory, in order.
    links : CascadeLinks, optional
        :func:`link_cascades` of these rows when the caller has it already (the cascade
        stage keeps it); worked out here when None.

    Returns
    -------
    list[list[int]]
        The levels, innermost first.
    """
    if links is None:
        links = link_cascades(rows)
    level = {i: v - 1 for i, v in _chain_levels(len(rows), links.inner_of).items()}
    # a cycle gives its members arbitrary levels; put them all at 0
    for i, ps in links.problems.items():
        if any("cascade cycle" in p.message for p in ps):
            level[i] = 0
    out: list[list[int]] = [[] for _ in range(max(level.values(), default=-1) + 1)]
    for i in range(len(rows)):
        out[level[i]].append(i)
    return [lv for lv in out if lv]


def _num(x) -> float:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return math.nan
    return v


def _fmt(x: float) -> str:
    return f"{x:.3g}"


@dataclass(frozen=True)
class PairCheck:
    """The checks of one outer row against its inner loop.

    Attributes
    ----------
    basis : str
        ``wb`` (bandwidths) or ``wc`` (gain crossovers); '' when no ratio. [-]
    ratio : float
        Inner to outer frequency ratio; NaN when not checked. [-]
    ok : bool or None
        Ratio at or above the minimum; None when not checked.
    status : str
        The outer row's status after the checks.
    findings : tuple[str, ...]
        Words to append to the outer row's findings.
    """

    basis: str
    ratio: float
    ok: bool | None
    status: str
    findings: tuple[str, ...]


def check_pair(outer: Mapping, inner: Mapping, inner_tag: str, ratio_min: float, marginal_pct: float) -> PairCheck:
    """Bandwidth ratio and inner-loop condition of one cascade (rules in the module docstring).

    Parameters
    ----------
    outer, inner : mapping
        Results of the outer and inner rows: ``status``, ``stable``, ``rhp_closed``,
        ``wb_rad_s`` [rad/s], ``wc_rad_s`` [rad/s].
    inner_tag : str
        The inner loop's tag, for the words.
    ratio_min : float
        Smallest acceptable ratio. [-]
    marginal_pct : float
        Marginal zone above the minimum. [%]
    """
    status = str(outer.get("status"))
    words: list[str] = []
    if status == "invalid":
        return PairCheck("", math.nan, None, status, ())
    ist = str(inner.get("status"))
    if ist == "invalid":
        words.append(f"conditional: inner loop {inner_tag} could not be evaluated (see its message); "
                     f"cascade ratio not checked")
        return PairCheck("", math.nan, None, status, tuple(words))
    if ist == "unstable":
        n = inner.get("rhp_closed")
        words.append(f"conditional: inner loop {inner_tag} is unstable on its own "
                     f"({n} closed-loop pole{'s' if n != 1 else ''} in the right half-plane); this result holds only "
                     f"with both loops in automatic and unsaturated; cascade ratio not checked")
        if status in ("passes", "marginal"):
            status = "fails"
        return PairCheck("", math.nan, None, status, tuple(words))
    if ist == "fails":
        words.append(f"conditional: inner loop {inner_tag} fails its own limits")
    if status == "unstable":
        return PairCheck("", math.nan, None, status, tuple(words))
    wbi, wbo = _num(inner.get("wb_rad_s")), _num(outer.get("wb_rad_s"))
    wci, wco = _num(inner.get("wc_rad_s")), _num(outer.get("wc_rad_s"))

    def usable(a: float, b: float) -> bool:
        return all(np.isfinite(x) and x > 0 for x in (a, b))

    if usable(wbi, wbo):
        basis, ratio = "wb", wbi / wbo
    elif usable(wci, wco):
        basis, ratio = "wc", wci / wco
    else:
        words.append(f"cascade ratio not checked: no bandwidth or gain crossover for inner loop {inner_tag} "
                     f"and this loop")
        return PairCheck("", math.nan, None, status, tuple(words))
    what = "bandwidth" if basis == "wb" else "crossover"
    p = marginal_pct / 100.0
    if ratio < ratio_min:
        words.insert(0, f"cascade {what} ratio {_fmt(ratio)} < {_fmt(ratio_min)}: inner loop {inner_tag} "
                        f"is not fast enough")
        if status in ("passes", "marginal"):
            status = "fails"
        return PairCheck(basis, ratio, False, status, tuple(words))
    if ratio < (1.0 + p) * ratio_min:
        words.insert(0, f"cascade {what} ratio {_fmt(ratio)} near limit {_fmt(ratio_min)}")
        if status == "passes":
            status = "marginal"
    return PairCheck(basis, ratio, True, status, tuple(words))


def add_cascade_checks(audit) -> None:
    """Cascade columns on every row and the pair checks on outer rows.

    Adds ``inner_loop`` (as entered), ``cascade_basis``, ``cascade_ratio`` [-] and
    ``cascade_ok``; appends pair findings to ``findings`` and updates ``status`` of
    outer rows (rules in the module docstring).

    Parameters
    ----------
    audit : Audit
        The run, after the frequency stage; its ``results`` are changed in place. The
        policy's ``cascade_ratio_min`` [-] and ``marginal_pct`` [%] apply.
    """
    rows = audit.inventory.rows
    res = audit.results
    links = audit.extras.get("cascade")
    if not isinstance(links, CascadeLinks):
        links = link_cascades(rows, inner_loop_column_letter(audit.inventory, rows))
    policy = audit.inventory.policy
    ratio_min = float(getattr(policy, "cascade_ratio_min", 4.0))
    marginal_pct = float(getattr(policy, "marginal_pct", 10.0))
    n = len(rows)
    basis = [""] * n
    ratio = np.full(n, np.nan)
    ok: list[bool | None] = [None] * n
    for i, j in links.inner_of.items():
        if not links.ok(i):
            continue
        inner_tag = rows[j].tag or f"row {rows[j].excel_row}"
        try:
            pc = check_pair(res.iloc[i], res.iloc[j], inner_tag, ratio_min, marginal_pct)
        except Exception as exc:  # noqa: BLE001 - one pair's fault: marked on its outer row, the others go on
            from .faults import row_fault
            row_fault(audit, "cascade", i, exc)
            continue
        basis[i], ratio[i], ok[i] = pc.basis, pc.ratio, pc.ok
        if pc.findings:
            old = res.at[i, "findings"]
            old = "" if old is None or (isinstance(old, float) and math.isnan(old)) else str(old)
            res.at[i, "findings"] = "; ".join([w for w in old.split("; ") if w] + list(pc.findings))
        res.at[i, "status"] = pc.status
    res["inner_loop"] = [r.inner_loop or "" for r in rows]
    res["cascade_basis"] = basis
    res["cascade_ratio"] = ratio
    res["cascade_ok"] = pd.array(ok, dtype="boolean")
