"""``plant-audit identify INVENTORY --write-inventory NEW.xlsx``: a copy of the inventory with
identified models filled in.

For every row with a ``data_file`` whose record gives a model, the copy holds the identified
structure and parameters in the canonical columns (``model``, ``gain``, ``tau1_s``,
``tau2_s``, ``lead_s``, ``dead_time_s``; added at the end of the header row when missing).
Other cells of the same quantities in that row (``tau1_min``, ``gain_eu``, ...) are
emptied, so the row states each quantity once. Every changed cell carries a comment with the
old value, the 95 % interval, the fit and the record it came from. Rows without a model are
left as they were. The user's file is never written: the target must be a new file.
"""

from __future__ import annotations

import os
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Mapping

from ..inventory import COLUMNS_BY_NAME, canonical_header
from .identify import Identification

TARGET = {"model": "model", "gain": "gain", "tau1": "tau1_s", "tau2": "tau2_s", "lead": "lead_s",
          "dead_time": "dead_time_s"}
FROM_FIT = {"gain": "gain", "tau1": "tau1", "tau2": "tau2", "lead": "tau_lead", "dead_time": "dead_time"}


class WriteError(ValueError):
    """The copy cannot be written (same file as the inventory, target exists, not a workbook)."""


@dataclass(frozen=True)
class WriteSummary:
    """What the copy holds.

    Attributes
    ----------
    path : str
        The file written.
    rows_changed : int
        Rows given an identified model. [-]
    cells_changed : int
        Cells written or emptied. [-]
    """

    path: str
    rows_changed: int
    cells_changed: int


def _header_row(ws) -> tuple[int, dict[str, int]]:
    for r in range(1, min(ws.max_row, 20) + 1):
        names = {}
        for c in range(1, ws.max_column + 1):
            name = canonical_header(ws.cell(r, c).value)
            if name and name not in names:
                names[name] = c
        if "tag" in names:
            return r, names
    raise WriteError("no header row with a 'tag' column in the first 20 rows of the loops sheet")


def write_identified_inventory(inventory_path: str | Path, out_path: str | Path,
                               found: Mapping[int, tuple[str, Identification]]) -> WriteSummary:
    """Write a copy of the inventory with identified models in the rows that have one.

    Parameters
    ----------
    inventory_path : str or Path
        The user's workbook (.xlsx); only read.
    out_path : str or Path
        The new workbook; must not exist and must not be the inventory.
    found : Mapping[int, tuple[str, Identification]]
        Sheet row number -> (record name, identification) for rows with a model.

    Returns
    -------
    WriteSummary

    Raises
    ------
    WriteError
        When the target is the inventory itself or exists, or the inventory is no workbook.
    """
    from openpyxl import load_workbook
    from openpyxl.comments import Comment

    src, dst = Path(inventory_path), Path(out_path)
    if dst.resolve() == src.resolve():
        raise WriteError(f"{dst.name}: that is the inventory itself; give a new file name")
    if dst.exists():
        raise WriteError(f"{dst.name} exists; give a new file name (the tool never overwrites a workbook)")
    if src.suffix.lower() not in (".xlsx", ".xlsm"):
        raise WriteError(f"{src.name}: --write-inventory needs an .xlsx inventory")
    wb = load_workbook(src)
    sheet = next((s for s in wb.sheetnames if s.strip().lower() == "loops"), None)
    if sheet is None:
        raise WriteError(f"{src.name} has no 'loops' sheet")
    ws = wb[sheet]
    hr, names = _header_row(ws)
    by_quantity: dict[str, list[int]] = {}
    for name, col in names.items():
        q = COLUMNS_BY_NAME[name].quantity
        by_quantity.setdefault(q, []).append(col)
    rows = cells = 0
    for r, (record, ident) in sorted(found.items()):
        b = ident.best
        if b is None:
            continue
        rows += 1
        stamp = (f"identified from {record} ({b.model}, fit {b.fit_pct:.0f} %, held-out "
                 f"{b.fit_holdout_pct:.0f} %) by plant-audit")
        for q, target in TARGET.items():
            if q == "model":
                new = b.model
                ci = ""
            else:
                key = FROM_FIT[q]
                new = b.params.get(key)
                ci = f" +/- {b.ci95[key]:.3g} (95 %)" if key in b.ci95 else ""
            col = names.get(target)
            if col is None and new is not None:
                col = ws.max_column + 1
                ws.cell(hr, col, target)
                names[target] = col
                by_quantity.setdefault(q, []).append(col)
            for other in by_quantity.get(q, []):
                if other == col:
                    continue
                old = ws.cell(r, other).value
                if old not in (None, ""):
                    ws.cell(r, other).value = None
                    ws.cell(r, other).comment = Comment(f"was {old!r}; emptied: {stamp}", "plant-audit")
                    cells += 1
            if col is None:
                continue
            cell = ws.cell(r, col)
            old = cell.value
            value = (round(float(new), 6) if isinstance(new, float) else new)
            if old == value:
                continue
            cell.value = value
            cell.comment = Comment(f"{target} = {value}{ci}; was {old!r}; {stamp}", "plant-audit")
            cells += 1
    fd, tmp = tempfile.mkstemp(suffix=".xlsx", dir=str(dst.resolve().parent))
    os.close(fd)
    try:
        wb.save(tmp)
        os.replace(tmp, dst)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return WriteSummary(str(dst), rows, cells)
