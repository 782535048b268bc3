"""Cascades: an outer loop evaluated with its inner loop inside.

With ``outer_model_input = inner_pv`` (the default) the outer model relates the
outer PV to the inner PV, so the outer loop's effective process is
T_inner(jw) P_outer(jw), composed exactly on the frequency response; with
``inner_sp`` the outer model was identified with the inner loop in automatic and
already contains it.
"""

from __future__ import annotations

from .loop import LoopModel, model_from_row


def build_models(audit) -> list[LoopModel | None]:
    """LoopModel per row (None for an invalid row); inner loops composed, inner first."""
    rows = audit.inventory.rows
    by_tag = {r.tag: r for r in rows if r.valid and r.tag}
    built: dict[int, LoopModel | None] = {}

    def build(i: int, stack: tuple[int, ...] = ()) -> LoopModel | None:
        if i in built:
            return built[i]
        r = rows[i]
        if not r.valid:
            built[i] = None
            return None
        inner = None
        if r.inner_loop and r.outer_model_input == "inner_pv":
            ir = by_tag.get(r.inner_loop)
            if ir is not None and ir.index not in stack:
                inner = build(ir.index, stack + (i,))
        built[i] = model_from_row(r, inner)
        return built[i]

    return [build(i) for i in range(len(rows))]


def add_cascade_checks(audit) -> None:
    """Cascade findings (bandwidth ratio and inner-loop state) on outer rows."""
    return None
