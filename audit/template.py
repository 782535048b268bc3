"""A ready-to-fill inventory workbook, built from the column table of :mod:`audit.inventory`.

Sheets: ``loops`` (one header per quantity, frozen, each header commented with meaning, unit,
example and the accepted alternative headers; drop-down lists and number checks on the
cells), ``policy`` (every setting with its default and meaning), ``instructions`` (plain
words) and a hidden ``lists`` sheet holding the drop-down words.
"""

from __future__ import annotations

from pathlib import Path

from openpyxl import Workbook
from openpyxl.comments import Comment
from openpyxl.styles import Alignment, Font, PatternFill
from openpyxl.utils import get_column_letter
from openpyxl.worksheet.datavalidation import DataValidation

from .inventory import TEMPLATE_COLUMNS, InventoryColumn, alternatives
from .output import write_file_safely
from .policy import POLICY_HELP, Policy

TEMPLATE_ROWS = 2000
"""Rows below the header that carry the drop-down lists and number checks. [-]"""

# Number checks offered by the spreadsheet program while typing (the reader checks again).
_CHECKS: dict[str, tuple[str, float, float | None, str]] = {
    # name: (operator, formula1, formula2, message)
    "gain": ("notEqual", 0, None, "a non-zero number"),
    "tau1_s": ("greaterThan", 0, None, "a positive time in seconds"),
    "tau2_s": ("greaterThan", 0, None, "a positive time in seconds"),
    "dead_time_s": ("greaterThanOrEqual", 0, None, "a time >= 0 in seconds"),
    "kc": ("greaterThan", 0, None, "a positive controller gain"),
    "ti_s": ("greaterThanOrEqual", 0, None, "an integral time >= 0 in seconds (0 or blank: none)"),
    "td_s": ("greaterThanOrEqual", 0, None, "a derivative time >= 0 in seconds"),
    "kp": ("greaterThanOrEqual", 0, None, "a gain >= 0"),
    "ki_per_s": ("greaterThanOrEqual", 0, None, "an integral gain >= 0 in 1/s"),
    "kd_s": ("greaterThanOrEqual", 0, None, "a derivative gain >= 0 in seconds"),
    "d_filter": ("between", 1e-6, 1, "a number in (0, 1]"),
    "sample_s": ("greaterThan", 0, None, "a positive period in seconds"),
    "pv_filter_s": ("greaterThanOrEqual", 0, None, "a time >= 0 in seconds"),
    "band_rad_s": ("greaterThan", 0, None, "a positive frequency in rad/s"),
    "attenuation_db": ("greaterThan", 0, None, "a positive level in dB"),
    "ms_max": ("greaterThan", 1, None, "a number > 1"),
    "gm_min_db": ("greaterThan", 0, None, "a positive level in dB"),
    "pm_min_deg": ("between", 1e-6, 179.999, "an angle in (0, 180) degrees"),
    "allowed_amplitude": ("greaterThan", 0, None, "a positive % of the PV range"),
}

INSTRUCTIONS = [
    "How to fill this workbook",
    "",
    "1. One row per control loop on the 'loops' sheet, starting in row 2. Blank rows are skipped.",
    "2. 'tag' is required and must be unique. Hover over a header to see what it means, its unit and an example.",
    "3. Choose 'model' from the list: fopdt (first order plus dead time), sopdt (second order plus dead time),",
    "   ipdt (integrating, such as most levels; gain in 1/s) or tf (your own transfer function in num and den).",
    "4. Process gain is in % of the PV range per % of controller output. If you know it in engineering units,",
    "   rename the 'gain' header to 'gain_eu' and fill pv_lo and pv_hi; the tool converts it.",
    "5. Times are in seconds here. You may rename any time header to minutes or hours instead: ti_s -> ti_min",
    "   or ti_h, dead_time_s -> dead_time_min, and so on. Use one unit per quantity in a row.",
    "6. Controller settings as the control system shows them: choose 'form' ideal, series or parallel.",
    "   Ideal and series use kc, ti_s, td_s; parallel uses kp, ki_per_s, kd_s.",
    "   A proportional band can replace kc (header pb_pct, kc = 100/PB); a reset rate can replace ti (header",
    "   reset_rpm, repeats per minute); ki_per_min can replace ki_per_s.",
    "   Leave ti blank (or 0) for a controller without integral action; leave td blank for no derivative.",
    "7. 'action': reverse when the output must rise as the PV falls below set point on a process whose PV rises",
    "   with output (the usual case); direct otherwise. A blank is read as reverse, with a warning.",
    "8. Disturbance rejection: band_rad_s is the highest frequency that must be attenuated and attenuation_db",
    "   how much (|S| must stay below -attenuation_db over the band). Leave both blank if there is no requirement.",
    "   Alternatively name a logged disturbance record (CSV, in this workbook's folder) in disturbance_file and",
    "   the largest acceptable PV deviation in allowed_amplitude (% of range).",
    "9. For the outer loop of a cascade, give the inner loop's tag in inner_loop.",
    "10. ms_max, gm_min_db and pm_min_deg on a row override the 'policy' sheet for that loop only.",
    "11. The 'policy' sheet holds the limits for every loop; change a value only where the site requires it.",
    "12. Columns the tool does not know are kept and carried to the results (a warning names them).",
    "13. Numbers are plain numbers: no thousands separators, a point as the decimal mark.",
    "    Run 'check' on the workbook to see every problem with its cell before running the audit.",
    "",
    "The audit is advisory. Any tuning change goes through the site's management-of-change procedure and a review",
    "by a qualified control engineer; never apply it to safety instrumented functions. Local codes and site",
    "procedures govern.",
]

_HEADER_FILL = PatternFill("solid", fgColor="DDE7F0")


def _comment_text(col: InventoryColumn) -> str:
    lines = [col.meaning]
    if col.kind in ("number", "time"):
        lines.append("Unit: [-] (a ratio)." if col.unit == "-" else f"Unit: {col.unit}.")
    if col.choices:
        lines.append(f"Choose: {', '.join(col.choices)}.")
    if col.example:
        lines.append(f"Example: {col.example}")
    alts = [a for a in alternatives(col.quantity) if a != col.name] if col.quantity else []
    if alts:
        lines.append(f"Instead, rename the header to: {', '.join(alts)}.")
    return "\n".join(lines)


def write_template(path: str | Path, force: bool = False) -> None:
    """Write a ready-to-fill inventory workbook.

    Parameters
    ----------
    path : str or Path
        Where to write the .xlsx file.
    force : bool
        Replace an existing file (a filled inventory, perhaps); refused without it.

    Raises
    ------
    audit.output.FileRefused
        ``path`` exists (without ``force``), is not a regular file, or does not end in .xlsx.
    """
    wb = Workbook()
    ws = wb.active
    ws.title = "loops"
    lists = wb.create_sheet("lists")
    choice_cols = [c for c in TEMPLATE_COLUMNS if c.choices]
    for j, col in enumerate(choice_cols, start=1):
        lists.cell(1, j, col.name)
        for i, word in enumerate(col.choices, start=2):
            lists.cell(i, j, word)
    lists.sheet_state = "hidden"

    last = TEMPLATE_ROWS + 1
    for j, col in enumerate(TEMPLATE_COLUMNS, start=1):
        cell = ws.cell(1, j, col.name)
        cell.font = Font(bold=True)
        cell.fill = _HEADER_FILL
        cell.alignment = Alignment(horizontal="center")
        note = Comment(_comment_text(col), "plant-audit")
        note.width, note.height = 320, 170
        cell.comment = note
        letter = get_column_letter(j)
        ws.column_dimensions[letter].width = max(10, min(28, len(col.name) + 4))
        rng = f"{letter}2:{letter}{last}"
        if col.choices:
            k = choice_cols.index(col) + 1
            lk = get_column_letter(k)
            dv = DataValidation(type="list", formula1=f"=lists!${lk}$2:${lk}${len(col.choices) + 1}",
                                allow_blank=True, showErrorMessage=True, errorStyle="stop",
                                errorTitle=col.name, error=f"Choose one of: {', '.join(col.choices)}")
        elif col.kind in ("number", "time"):
            op, f1, f2, msg = _CHECKS.get(col.name, ("between", -1e300, 1e300, "a number"))
            dv = DataValidation(type="decimal", operator=op, formula1=repr(f1) if f1 is not None else None,
                                formula2=repr(f2) if f2 is not None else None, allow_blank=True,
                                showErrorMessage=True, errorStyle="stop", errorTitle=col.name,
                                error=f"{col.name} must be {msg}.")
        else:
            continue
        ws.add_data_validation(dv)
        dv.add(rng)
    ws.freeze_panes = "A2"

    pol = wb.create_sheet("policy")
    for j, h in enumerate(("setting", "value", "meaning"), start=1):
        c = pol.cell(1, j, h)
        c.font = Font(bold=True)
        c.fill = _HEADER_FILL
    for i, (name, value) in enumerate(Policy().as_dict().items(), start=2):
        pol.cell(i, 1, name)
        pol.cell(i, 2, value)
        pol.cell(i, 3, POLICY_HELP.get(name, ""))
    pol.column_dimensions["A"].width = 24
    pol.column_dimensions["B"].width = 10
    pol.column_dimensions["C"].width = 100
    pol.freeze_panes = "A2"

    ins = wb.create_sheet("instructions")
    for i, line in enumerate(INSTRUCTIONS, start=1):
        ins.cell(i, 1, line)
    ins["A1"].font = Font(bold=True, size=13)
    ins.column_dimensions["A"].width = 120

    wb.move_sheet("lists", offset=len(wb.sheetnames))
    write_file_safely(path, wb.save, force=force, suffixes=(".xlsx",))
