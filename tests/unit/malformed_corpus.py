"""A corpus of malformed inventories, each built by code and paired with the message it must produce.

Regression material for :mod:`audit.inventory` (the expected messages are our own wording;
no outside source). Each case writes one file into a folder and says either which one-line
:class:`audit.inventory.InventoryError` the file gives, or which problems (cell, column,
message fragment) the reader must report.
"""

from __future__ import annotations

import io
import zipfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

from openpyxl import Workbook

GOOD = {"tag": "FIC-1", "model": "fopdt", "gain": 1.0, "tau1_s": 10, "dead_time_s": 1, "kc": 0.5, "ti_s": 10,
        "action": "reverse"}


def workbook(path: Path, header: list[str], rows: list[list], *, sheet: str = "loops",
             policy: list[list] | None = None, edit: Callable | None = None) -> Path:
    """Write a workbook with one data sheet (header + rows), an optional policy sheet and a last edit."""
    wb = Workbook()
    ws = wb.active
    ws.title = sheet
    ws.append(header)
    for r in rows:
        ws.append(r)
    if policy is not None:
        p = wb.create_sheet("policy")
        for r in policy:
            p.append(r)
    if edit:
        edit(wb)
    wb.save(path)
    return path


def good_row(**over) -> tuple[list[str], list]:
    """Header and one valid row, with some columns replaced or added."""
    d = {**GOOD, **over}
    d = {k: v for k, v in d.items() if v is not ...}
    return list(d), list(d.values())


def one_row(path: Path, **over) -> Path:
    header, row = good_row(**over)
    return workbook(path, header, [row])


@dataclass
class Case:
    """One malformed inventory and what reading it must say."""

    name: str
    build: Callable[[Path], Path]
    file_error: str | None = None                      # fragment of the InventoryError message
    expect: list[tuple[str, str, str]] = field(default_factory=list)  # (cell, column, fragment)


def _raw(name: str, data: bytes) -> Callable[[Path], Path]:
    def build(d: Path) -> Path:
        p = d / name
        p.write_bytes(data)
        return p
    return build


def _zip(name: str, members: dict[str, bytes]) -> Callable[[Path], Path]:
    def build(d: Path) -> Path:
        buf = io.BytesIO()
        with zipfile.ZipFile(buf, "w") as z:
            for k, v in members.items():
                z.writestr(k, v)
        p = d / name
        p.write_bytes(buf.getvalue())
        return p
    return build


OLE = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"


def _merge(wb) -> None:
    wb["loops"].merge_cells("B3:B4")


def _formula(wb) -> None:
    wb["loops"]["C2"] = "=0.5*2"


def _pct_format(wb) -> None:
    wb["loops"]["C2"].number_format = "0%"


CASES: list[Case] = [
    # ---- the file itself
    Case("text file named xlsx", _raw("a.xlsx", b"tag,model\nx,fopdt\n"), "not an .xlsx workbook"),
    Case("legacy xls", _raw("a.xls", OLE + b"\x00" * 600), "legacy Excel 97-2003"),
    Case("password protected", _raw("a.xlsx", OLE + b"\x00" * 64 + "EncryptionInfo".encode("utf-16-le") + b"\x00" * 64),
         "password-protected"),
    Case("binary xlsb", _zip("a.xlsb", {"[Content_Types].xml": b"<x/>", "xl/workbook.bin": b"\x00"}),
         "binary workbook (.xlsb)"),
    Case("opendocument", _zip("a.xlsx", {"mimetype": b"application/vnd.oasis.opendocument.spreadsheet"}),
         "OpenDocument"),
    Case("damaged zip", _raw("a.xlsx", b"PK\x03\x04" + b"\x00" * 40), "damaged"),
    Case("empty file", _raw("a.xlsx", b""), "is empty"),
    Case("no loops sheet", lambda d: workbook(d / "a.xlsx", ["tag"], [["X"]], sheet="Data"),
         "no 'loops' sheet; sheets found: Data"),
    Case("empty loops sheet", lambda d: workbook(d / "a.xlsx", [], []), "no 'tag' header"),
    Case("no tag header", lambda d: workbook(d / "a.xlsx", ["name", "model"], [["X", "fopdt"]]), "no 'tag' header"),

    # ---- cells
    Case("text in a number column", lambda d: one_row(d / "a.xlsx", ti_s="abc"),
         expect=[("G2", "ti_s", "must be a number >= 0, got 'abc'")]),
    Case("thousands separator", lambda d: one_row(d / "a.xlsx", kc="1,250"),
         expect=[("F2", "kc", "'1,250' is ambiguous")]),
    Case("decimal comma", lambda d: one_row(d / "a.xlsx", gain="0,5"),
         expect=[("C2", "gain", "'0,5' is ambiguous")]),
    Case("inner space in a number", lambda d: one_row(d / "a.xlsx", tau1_s="1 000"),
         expect=[("D2", "tau1_s", "'1 000' is ambiguous")]),
    Case("percent sign outside a % column", lambda d: one_row(d / "a.xlsx", gain="50%"),
         expect=[("C2", "gain", "a % sign is accepted only in % columns")]),
    Case("percent format outside a % column",
         lambda d: workbook(d / "a.xlsx", good_row()[0], [good_row(gain=0.5)[1]], edit=_pct_format),
         expect=[("C2", "gain", "formatted as a percentage (shows 50%)")]),
    Case("spreadsheet error value", lambda d: one_row(d / "a.xlsx", tau1_s="#DIV/0!"),
         expect=[("D2", "tau1_s", "spreadsheet error #DIV/0!")]),
    Case("boolean in a number column", lambda d: one_row(d / "a.xlsx", kc=True),
         expect=[("F2", "kc", "got TRUE")]),
    Case("unknown model word", lambda d: one_row(d / "a.xlsx", model="fodpt"),
         expect=[("B2", "model", "unknown model 'fodpt' (did you mean fopdt?); accepted: fopdt, sopdt, ipdt, tf")]),
    Case("unknown form word", lambda d: one_row(d / "a.xlsx", form="PID"),
         expect=[("I2", "form", "unknown form 'PID'; accepted: ideal, series, parallel")]),
    Case("unknown action word", lambda d: one_row(d / "a.xlsx", action="reversed"),
         expect=[("H2", "action", "accepted: reverse, direct")]),
    Case("unknown criticality", lambda d: one_row(d / "a.xlsx", criticality="urgent"),
         expect=[("I2", "criticality", "accepted: high, medium, low")]),
    Case("missing tag", lambda d: one_row(d / "a.xlsx", tag=None),
         expect=[("A2", "tag", "tag is required")]),
    Case("duplicate tags",
         lambda d: workbook(d / "a.xlsx", good_row()[0], [good_row()[1], good_row(tag="X")[1], good_row()[1],
                                                          good_row(tag="fic-1")[1]]),
         expect=[("A2", "tag", "duplicate tag 'FIC-1': also in row(s) 4, 5"),
                 ("A4", "tag", "also in row(s) 2, 5"), ("A5", "tag", "also in row(s) 2, 4")]),
    Case("fopdt without tau1", lambda d: one_row(d / "a.xlsx", tau1_s=None),
         expect=[("D2", "tau1_s", "required for model fopdt")]),
    Case("sopdt without tau2", lambda d: one_row(d / "a.xlsx", model="sopdt"),
         expect=[("2", "tau2_s", "required for model sopdt")]),
    Case("ideal form without kc", lambda d: one_row(d / "a.xlsx", kc=...),
         expect=[("2", "kc", "kc (or pb_pct) is required for form ideal")]),
    Case("improper tf", lambda d: one_row(d / "a.xlsx", model="tf", gain=..., tau1_s=..., num="1 2 3", den="5 1"),
         expect=[("G2", "num", "improper transfer function")]),
    Case("tf denominator leading zero",
         lambda d: one_row(d / "a.xlsx", model="tf", gain=..., tau1_s=..., num="1", den="0 5 1"),
         expect=[("H2", "den", "leading coefficient must not be 0")]),
    Case("tf coefficients with commas",
         lambda d: one_row(d / "a.xlsx", model="tf", gain=..., tau1_s=..., num="1", den="5, 1"),
         expect=[("H2", "den", "separate coefficients with spaces or semicolons")]),
    Case("zero gain", lambda d: one_row(d / "a.xlsx", gain=0),
         expect=[("C2", "gain", "process gain must not be zero")]),
    Case("negative dead time", lambda d: one_row(d / "a.xlsx", dead_time_s=-2),
         expect=[("E2", "dead_time_s", "must be a number >= 0, got -2")]),
    Case("zero time constant", lambda d: one_row(d / "a.xlsx", tau1_s=0),
         expect=[("D2", "tau1_s", "must be a positive number, got 0")]),
    Case("negative integral time", lambda d: one_row(d / "a.xlsx", ti_s=-5),
         expect=[("G2", "ti_s", "must be a number >= 0, got -5")]),
    Case("derivative filter out of range", lambda d: one_row(d / "a.xlsx", d_filter=1.5),
         expect=[("I2", "d_filter", "must be a number in (0, 1], got 1.5")]),
    Case("sample period too long", lambda d: one_row(d / "a.xlsx", sample_s=20),
         expect=[("I2", "sample_s", "sample period 20 s is longer than dead time plus the largest time constant")]),
    Case("kc and pb_pct disagree", lambda d: one_row(d / "a.xlsx", pb_pct=100),
         expect=[("I2", "pb_pct", "pb_pct = 100 gives kc = 1 [-] but kc (F2) = 0.5")]),
    Case("tau1 in two units that disagree", lambda d: one_row(d / "a.xlsx", tau1_min=1),
         expect=[("I2", "tau1_min", "tau1_min = 1 gives tau1 = 60 s but tau1_s (D2) = 10")]),
    Case("ti and reset rate disagree", lambda d: one_row(d / "a.xlsx", reset_rpm=1),
         expect=[("I2", "reset_rpm", "gives ti = 60 s but ti_s (G2) = 10")]),
    Case("ki per s and per min disagree",
         lambda d: one_row(d / "a.xlsx", form="parallel", kc=..., ti_s=..., kp=0.5, ki_per_s=0.05, ki_per_min=6),
         expect=[("J2", "ki_per_min", "ki_per_min = 6 gives ki = 0.1 1/s but ki_per_s (I2) = 0.05")]),
    Case("parallel derivative without kp",
         lambda d: one_row(d / "a.xlsx", form="parallel", kc=..., ti_s=..., kp=0, ki_per_s=0.1, kd_s=2),
         expect=[("H2", "kp", "kp must be > 0 when kd > 0")]),
    Case("parallel without kp", lambda d: one_row(d / "a.xlsx", form="parallel", kc=..., ti_s=..., ki_per_s=0.1),
         expect=[("2", "kp", "kp is required for form parallel")]),
    Case("gain per minute on a fopdt", lambda d: one_row(d / "a.xlsx", gain=..., gain_per_min=2),
         expect=[("H2", "gain_per_min", "gain_per_min is for ipdt (integrating) models only")]),
    Case("gain in EU without the range", lambda d: one_row(d / "a.xlsx", gain=..., gain_eu=2, pv_lo=0),
         expect=[("H2", "gain_eu", "gain_eu needs pv_lo and pv_hi")]),
    Case("range upside down", lambda d: one_row(d / "a.xlsx", pv_lo=100, pv_hi=0),
         expect=[("J2", "pv_hi", "must be greater than pv_lo (100), got 0")]),
    Case("disturbance file outside the folder", lambda d: one_row(d / "a.xlsx", disturbance_file="../x.csv",
                                                                  allowed_amplitude=2),
         expect=[("I2", "disturbance_file", "leads outside the inventory's folder")]),
    Case("disturbance file absolute", lambda d: one_row(d / "a.xlsx", disturbance_file="/etc/passwd",
                                                        allowed_amplitude=2),
         expect=[("I2", "disturbance_file", "must be a path relative to the inventory's folder")]),
    Case("disturbance file with a drive letter", lambda d: one_row(d / "a.xlsx", disturbance_file="C:\\data\\x.csv",
                                                                   allowed_amplitude=2),
         expect=[("I2", "disturbance_file", "must be a path relative")]),
    Case("formula never computed", lambda d: workbook(d / "a.xlsx", good_row()[0], [good_row()[1]], edit=_formula),
         expect=[("C2", "gain", "open it in a spreadsheet program, save it once")]),
    Case("merged cells in the data",
         lambda d: workbook(d / "a.xlsx", good_row()[0], [good_row()[1], good_row(tag="B")[1],
                                                          good_row(tag="C")[1]], edit=_merge),
         expect=[("B3", "model", "merged cells B3:B4"), ("B4", "model", "merged cells B3:B4")]),
    Case("time header without unit",
         lambda d: workbook(d / "a.xlsx", [*good_row()[0], "dead_time"], [[*good_row()[1], 3]]),
         expect=[("I1", "", "column 'dead_time' needs its unit in the header"),
                 ("I2", "", "needs its unit in the header")]),
    Case("policy value not a number",
         lambda d: workbook(d / "a.xlsx", good_row()[0], [good_row()[1]],
                            policy=[["setting", "value"], ["ms_max", "high"], ["pm_min_deg", 200]]),
         expect=[("B2", "ms_max", "must be a number greater than 1 and at most 100 (the range accepted), got 'high'"),
                 ("B3", "pm_min_deg", "must be a number from 0.001 to just below 180 deg (the range accepted), got 200")]),
    Case("column header twice with different values",
         lambda d: workbook(d / "a.xlsx", [*good_row()[0], "Gain"], [[*good_row()[1], 2.0]]),
         expect=[("I2", "gain", "column gain appears twice with different values")]),
]
