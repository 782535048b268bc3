"""results.xlsx: the results as a workbook for engineers who filter and sort.

Sheets: ``summary`` (run identity, caution, counts, policy), ``loops`` (every
inventory row with every results column, units in the headers), ``work list``
and ``invalid rows``. Headers are frozen and filterable.

Text from the inventory is untrusted: any string that could be read as a
formula (:func:`audit.safety.is_formula_like`) is stored as a string cell with
the quote-prefix style, so spreadsheet programs show it and never evaluate it.
Infinite figures are written as the text ``inf``; missing ones are left blank.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any, Iterable, Sequence

import numpy as np
import pandas as pd
from openpyxl import Workbook
from openpyxl.cell.cell import ILLEGAL_CHARACTERS_RE
from openpyxl.styles import Alignment, Font, PatternFill
from openpyxl.utils import get_column_letter

from .columns import RESULT_COLUMNS
from .report import Report
from .output import plain
from .safety import is_formula_like

HEADER_FONT = Font(bold=True, color="FFFFFF")
HEADER_FILL = PatternFill("solid", fgColor="234E70")
NUMBER_FORMATS: dict[str, str] = {"dB": "0.0", "deg": "0.0", "-": "0.000", "s": "0.000", "rad/s": "0.0000"}
"""Number format by unit; frequencies below 0.001 rad/s switch to a scientific format."""

CAUTION = (
    "Advisory only: the figures rest on the process models and settings entered in the inventory.",
    "Any change to a running loop follows the site's management-of-change procedure and is reviewed by a "
    "qualified (where required, licensed) control engineer with operations present.",
    "Never apply to safety instrumented functions. Local codes and site procedures govern.",
)


def cell_value(value: Any) -> Any:
    """A results value as an openpyxl cell value.

    None/NaN -> None (blank), infinities -> ``'inf'``/``'-inf'`` (text), numpy
    scalars -> Python scalars, text stripped of characters XML cannot hold.

    Parameters
    ----------
    value : Any
        A results value; a list or tuple becomes comma-separated text.

    Returns
    -------
    Any
        None, bool, int, float or str.
    """
    if isinstance(value, (tuple, list)):
        return ILLEGAL_CHARACTERS_RE.sub("", ", ".join(str(x) for x in value))
    v = plain(value)   # None/NaN -> None, inf -> "inf", numpy scalars -> Python
    if isinstance(v, (dict, list)):
        v = str(v)
    return ILLEGAL_CHARACTERS_RE.sub("", v) if isinstance(v, str) else v


def put(ws, row: int, col: int, value: Any, number_format: str | None = None):
    """Write one cell; formula-like text becomes an explicit, quote-prefixed string cell.

    Parameters
    ----------
    ws : openpyxl.worksheet.worksheet.Worksheet
        Sheet to write into.
    row : int
        Row number, 1-based.
    col : int
        Column number, 1-based.
    value : Any
        A results value, converted by :func:`cell_value`.
    number_format : str or None
        Excel number format for a float (``"0.0000"`` switches to ``"0.00E+00"`` for
        0 < |value| < 1e-3); none when None.

    Returns
    -------
    openpyxl.cell.cell.Cell
        The cell written.
    """
    v = cell_value(value)
    cell = ws.cell(row=row, column=col)
    cell.value = v
    if isinstance(v, str):
        if is_formula_like(v) or cell.data_type == "f":
            cell.data_type = "s"
            cell.quotePrefix = True
    elif number_format and isinstance(v, float):
        cell.number_format = number_format if not (number_format == "0.0000" and 0 < abs(v) < 1e-3) else "0.00E+00"
    return cell


def _header(ws, row: int, names: Sequence[str]) -> None:
    for j, name in enumerate(names, start=1):
        c = put(ws, row, j, name)
        c.font, c.fill = HEADER_FONT, HEADER_FILL
        c.alignment = Alignment(wrap_text=True, vertical="top")


def _table(ws, headers: Sequence[str], rows: Iterable[Sequence[Any]], formats: Sequence[str | None] = (),
           widths: Sequence[float] = ()) -> None:
    """A sheet holding one table: header in row 1, frozen, with an autofilter."""
    _header(ws, 1, headers)
    n = 1
    for i, values in enumerate(rows, start=2):
        n = i
        for j, v in enumerate(values, start=1):
            put(ws, i, j, v, formats[j - 1] if j - 1 < len(formats) else None)
    ws.freeze_panes = "B2" if len(headers) > 2 else "A2"
    ws.auto_filter.ref = f"A1:{get_column_letter(max(len(headers), 1))}{n}"
    for j, h in enumerate(headers, start=1):
        w = widths[j - 1] if j - 1 < len(widths) else min(max(len(str(h)) + 2, 9), 40)
        ws.column_dimensions[get_column_letter(j)].width = w


def loop_columns(results: pd.DataFrame) -> list[str]:
    """Every results column: the documented ones in table order, then the rest in results order.

    Parameters
    ----------
    results : pandas.DataFrame
        The results table.

    Returns
    -------
    list of str
    """
    known = [c.name for c in RESULT_COLUMNS if c.name in results.columns]
    return known + [c for c in results.columns if c not in known]


def _unit_header(name: str, series: pd.Series) -> tuple[str, str | None]:
    col = next((c for c in RESULT_COLUMNS if c.name == name), None)
    numeric = pd.api.types.is_float_dtype(series.dtype)
    if col is None:
        return name, NUMBER_FORMATS["-"] if numeric else None
    if col.unit == "-" and not numeric:
        return name, None
    return f"{name} [{col.unit}]", NUMBER_FORMATS.get(col.unit) if numeric else None


def _summary(ws, report: Report) -> None:
    c = report.cover
    lines: list[tuple[Any, ...]] = [
        (c.title,), ("Site", c.site), ("Audit date", c.date), ("Report id", c.report_id),
        ("Inventory", c.inventory), ("Inventory SHA-256", c.inventory_sha256),
        ("Tool", f"{c.tool} {c.tool_version}"), (),
        ("Caution",), *[("", t) for t in CAUTION], (),
        ("Loops by status", "loops [-]"),
        *[(s, n) for s, n in report.total.by_status if n or s in report.statuses],
        ("all loops", report.total.total), (),
    ]
    if not report.work.ranked:
        lines += [("Work list", "ranking stage did not run: ordered by status, then tag"), ()]
    lines += [("By area", *report.statuses, "total")]
    lines += [(t.group, *[t.count(s) for s in report.statuses], t.total) for t in report.by_area]
    lines += [(), ("By criticality", *report.statuses, "total")]
    lines += [(t.group, *[t.count(s) for s in report.statuses], t.total) for t in report.by_criticality]
    lines += [(), ("Policy setting", "value", "meaning")]
    lines += [(p.label, p.value, p.note) for p in c.policy]
    for i, line in enumerate(lines, start=1):
        for j, v in enumerate(line, start=1):
            put(ws, i, j, v)
    ws["A1"].font = Font(bold=True, size=14)
    ws.column_dimensions["A"].width = 26
    ws.column_dimensions["B"].width = 70
    for col in "CDEFGH":
        ws.column_dimensions[col].width = 12


def write_results_xlsx(audit, report: Report, path: Path) -> Path:
    """Write results.xlsx.

    Parameters
    ----------
    audit : Audit
        The finished run (its ``results`` table fills the ``loops`` sheet).
    report : Report
        The report model (summary, work list, invalid rows).
    path : Path
        File to write.

    Returns
    -------
    Path
        ``path``.
    """
    wb = Workbook()
    _summary(wb.active, report)
    wb.active.title = "summary"

    res = audit.results.reset_index(drop=True)
    cols = loop_columns(res)
    heads = [_unit_header(c, res[c]) for c in cols]
    values = res[cols].astype(object).to_numpy().tolist()
    _table(wb.create_sheet("loops"), [h for h, _ in heads], values, [f for _, f in heads])

    work_heads = ["rank" if report.work.ranked else "position", "row", "tag", "area", "criticality", "status",
                  "reason", "action", "expected_improvement", "verdict", "proposal_settings"]
    work_rows = ([it.rank if report.work.ranked else it.position, it.row, it.tag, it.area, it.criticality,
                  it.status, it.reason, it.action, it.expected_improvement, it.verdict, it.proposal_settings]
                 for it in report.work.items)
    _table(wb.create_sheet("work list"), work_heads, work_rows, widths=(9, 7, 16, 14, 11, 11, 60, 30, 12, 20, 40))

    inv_rows = ([v.row, v.sheet, v.tag, m] for v in report.invalid for m in (v.messages or ("",)))
    _table(wb.create_sheet("invalid rows"), ["row", "sheet", "tag", "message"], inv_rows, widths=(7, 12, 16, 100))

    wb.properties.creator = f"{report.cover.tool} {report.cover.tool_version}"
    wb.save(path)
    return path
