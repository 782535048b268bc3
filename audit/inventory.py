"""Read and validate a loop inventory (.xlsx or .csv); convert every value to project units.

The inventory is the one door into the tool. Each non-blank row of the ``loops`` sheet
becomes a :class:`audit.rows.LoopRow` in project units (time [s], frequency [rad/s],
gains [-] as % of PV range per % output, integrating gains [1/s], amplitudes [% of PV
range]), invalid rows included, each problem located as ``sheet!cell (column)``.
An optional ``policy`` sheet (columns ``setting``, ``value``) overrides
:class:`audit.policy.Policy` defaults.

Accepted columns are listed once, in :data:`INVENTORY_COLUMNS`; the reader, the template
(:mod:`audit.template`) and the README table all come from it.

Reading rules that are decisions rather than arithmetic
--------------------------------------------------------
* Headers match ignoring case, surrounding spaces, space versus underscore, and a unit in
  brackets: ``Dead time (s)`` -> ``dead_time_s``, ``Ti [min]`` -> ``ti_min``, ``PB (%)`` ->
  ``pb_pct``. A time header without a unit (``dead_time``) is refused: its values would be
  guessed otherwise.
* Numbers may be stored as text and carry surrounding spaces. A comma or an inner space
  (``1,250``, ``0,5``, ``1 250``) is ambiguous and refused rather than guessed.
* Percent: a number column in % (``pb_pct``, ``allowed_amplitude``) is read as the engineer
  sees it. A cell formatted as a percentage holding 0.25 shows ``25%`` and is read as 25;
  the text ``25%`` is read as 25; a plain 25 is 25. A percentage-formatted cell or a ``%``
  sign in any other column is refused (is ``50%`` a gain of 0.5 or of 50?).
* A formula whose value was never computed (a workbook written by a program and not yet
  opened in a spreadsheet) is an error asking the engineer to open and save the file once.
"""

from __future__ import annotations

import csv
import datetime as _dt
import difflib
import gc
import hashlib
import io
import math
import re
import zipfile
import zlib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Callable, Iterable

import numpy as np

from . import units
from .limits import MAX_CELL_CHARS, MAX_COLUMNS, MAX_INFLATED_BYTES, MAX_INVENTORY_BYTES, MAX_ROWS, NotARegularFile, \
    read_regular
from .policy import Policy
from .ranges import POLICY_RANGES, POLICY_TEXT_RULES, ROW_RANGES, tf_problems
from .rows import Inventory, LoopRow, Problem, printable, tag_key

# --------------------------------------------------------------------------------------
# The table of known columns
# --------------------------------------------------------------------------------------

MODELS = ("fopdt", "sopdt", "ipdt", "tf")
FORMS = ("ideal", "series", "parallel")
ACTIONS = ("reverse", "direct")
CRITICALITIES = ("high", "medium", "low")
OUTER_INPUTS = ("inner_pv", "inner_sp")


@dataclass(frozen=True)
class InventoryColumn:
    """One accepted inventory header.

    Attributes
    ----------
    name : str
        Canonical header (what the template writes and the README lists).
    quantity : str
        The :class:`LoopRow` attribute it fills ('' for pv_lo/pv_hi helpers that fill themselves).
    kind : str
        ``text``, ``choice``, ``number``, ``time``, ``list`` or ``path``.
    unit : str
        Unit of the value as entered.
    meaning : str
        Plain words for the engineer.
    example : str
        A typical entry.
    template : bool
        True for the one header per quantity that the template offers; the others are accepted
        alternatives, documented in the header comments and the instructions.
    choices : tuple of str
        Accepted words of a ``choice`` column.
    """

    name: str
    quantity: str
    kind: str
    unit: str
    meaning: str
    example: str = ""
    template: bool = False
    choices: tuple[str, ...] = ()


def _time_columns(base: str, meaning: str, example_s: float, template: bool = True) -> list[InventoryColumn]:
    out = []
    for suffix, factor in units.TIME_UNITS.items():
        ex = example_s / factor
        out.append(InventoryColumn(f"{base}_{suffix}", base, "time", suffix, meaning, f"{ex:g}",
                                   template and suffix == "s"))
    return out


_C = InventoryColumn
INVENTORY_COLUMNS: tuple[InventoryColumn, ...] = tuple([
    _C("tag", "tag", "text", "-", "Loop identifier; required and unique in the workbook.", "FIC-101", True),
    _C("service", "service", "text", "-", "What the loop does, free text.", "Return sludge flow", True),
    _C("area", "area", "text", "-", "Plant area, free text.", "Aeration", True),
    _C("criticality", "criticality", "choice", "-", "Consequence of poor control: high, medium or low; blank means medium.",
       "medium", True, CRITICALITIES),
    _C("model", "model", "choice", "-",
       "Process model: fopdt K e^(-θs)/(τ1 s+1); sopdt K (lead s+1) e^(-θs)/((τ1 s+1)(τ2 s+1)); "
       "ipdt K e^(-θs)/(s (τ1 s+1)) with τ1 optional; tf num(s)/den(s) e^(-θs).", "fopdt", True, MODELS),
    _C("gain", "gain", "number", "-",
       "Process gain K in % of PV range per % output; for ipdt the integrating gain in 1/s. Not zero.", "1.5", True),
    _C("gain_per_min", "gain", "number", "1/min", "ipdt only: integrating gain per minute, converted to 1/s.", "0.6"),
    _C("gain_eu", "gain", "number", "EU/%",
       "Process gain in engineering units per % output; needs pv_lo and pv_hi "
       "(gain = gain_eu × 100 / (pv_hi − pv_lo)).", "2.4"),
    _C("pv_lo", "pv_lo", "number", "EU", "Low end of the PV range, for gain_eu and allowed_amplitude_eu.", "0", True),
    _C("pv_hi", "pv_hi", "number", "EU", "High end of the PV range; greater than pv_lo.", "250", True),
    *_time_columns("tau1", "Time constant τ1 (fopdt, sopdt; optional lag of ipdt); positive.", 45.0),
    *_time_columns("tau2", "Second time constant τ2 (sopdt); positive.", 12.0),
    *_time_columns("lead", "Lead time of the sopdt numerator (lead s + 1); negative for an inverse response.", 0.0),
    *_time_columns("dead_time", "Dead time θ, >= 0; blank means 0.", 4.0),
    _C("num", "num", "list", "-",
       "tf numerator coefficients in descending powers of s (s in 1/s), gain included, separated by spaces or "
       "semicolons.", "0.8", True),
    _C("den", "den", "list", "-",
       "tf denominator coefficients, descending powers of s; leading coefficient not 0; degree >= numerator's.",
       "600 50 1", True),
    _C("form", "form", "choice", "-",
       "Controller form: ideal kc(1 + 1/(ti s) + td s/(α td s + 1)), series kc(1 + 1/(ti s))(td s + 1)/(α td s + 1), "
       "parallel kp + ki/s + kd s/(α (kd/kp) s + 1); blank means ideal.", "ideal", True, FORMS),
    _C("kc", "kc", "number", "-", "Controller gain (ideal, series), % output per % of PV range; positive.", "0.8", True),
    _C("pb_pct", "kc", "number", "%", "Proportional band instead of kc (kc = 100 / PB); positive.", "125"),
    *_time_columns("ti", "Integral time (ideal, series); blank or 0 means no integral action.", 30.0),
    _C("reset_rpm", "ti", "number", "repeats/min", "Reset rate instead of ti (ti = 1/reset minutes); 0 means none.",
       "2"),
    *_time_columns("td", "Derivative time (ideal, series); blank means 0.", 0.0),
    _C("kp", "kp", "number", "-", "Proportional gain (parallel form), >= 0.", "0.8", True),
    _C("ki_per_s", "ki", "number", "1/s", "Integral gain (parallel form), >= 0; blank means none.", "0.027", True),
    _C("ki_per_min", "ki", "number", "1/min", "Integral gain per minute (parallel form), converted to 1/s.", "1.6"),
    *_time_columns("kd", "Derivative gain (parallel form), >= 0; needs kp > 0 when positive.", 0.0),
    _C("d_filter", "d_filter", "number", "-",
       "Derivative filter factor α in (0, 1]: filter time α·td (parallel: α·kd/kp); blank means 0.1.", "0.1", True),
    _C("action", "action", "choice", "-",
       "Controller action: reverse (output rises when PV falls below set point, for a process whose PV rises "
       "with output) or direct; blank means reverse, with a warning.", "reverse", True, ACTIONS),
    *_time_columns("sample", "Controller execution period; adds half a period of dead time.", 1.0),
    *_time_columns("pv_filter", "PV filter time constant; blank or 0 means none.", 0.0),
    _C("band_rad_s", "band_rad_s", "number", "rad/s",
       "Upper edge ωd of the band 0 < ω <= ωd where disturbances must be attenuated; with attenuation_db.", "0.01",
       True),
    _C("attenuation_db", "attenuation_db", "number", "dB",
       "Required attenuation A > 0 over the band: 20 log10|S(jω)| <= −A.", "6", True),
    _C("ms_max", "ms_max", "number", "-", "This loop's limit on the sensitivity peak Ms, > 1 (overrides the policy).",
       "1.7", True),
    _C("gm_min_db", "gm_min_db", "number", "dB", "This loop's smallest gain margin, > 0 (overrides the policy).", "6",
       True),
    _C("pm_min_deg", "pm_min_deg", "number", "deg", "This loop's smallest phase margin (overrides the policy).", "45",
       True),
    _C("disturbance_file", "disturbance_file", "path", "-",
       "CSV record of a logged disturbance, relative to the inventory's folder (may not leave it).",
       "records/step_upset.csv", True),
    _C("allowed_amplitude", "allowed_amplitude", "number", "%",
       "Largest acceptable PV deviation caused by the recorded disturbance, % of PV range.", "2", True),
    _C("allowed_amplitude_eu", "allowed_amplitude", "number", "EU",
       "The same in engineering units; needs pv_lo and pv_hi.", "5"),
    _C("data_file", "data_file", "path", "-",
       "Logged record of this loop (CSV or Parquet with op and pv: bump test, set-point changes or normal "
       "operation), relative to the inventory's folder; checks the model against the data.",
       "records/fic101.csv", True),
    _C("inner_loop", "inner_loop", "text", "-", "Tag of the inner loop when this row is a cascade's outer loop.",
       "TIC-410", True),
    _C("outer_model_input", "outer_model_input", "choice", "-",
       "Input of this outer loop's model: inner_pv (default; the closed inner loop multiplies the model) or "
       "inner_sp (the model already includes the closed inner loop).", "inner_pv", True, OUTER_INPUTS),
])
del _C

COLUMNS_BY_NAME: dict[str, InventoryColumn] = {c.name: c for c in INVENTORY_COLUMNS}
TEMPLATE_COLUMNS: tuple[InventoryColumn, ...] = tuple(c for c in INVENTORY_COLUMNS if c.template)
_TIME_BASES = ("tau1", "tau2", "lead", "dead_time", "ti", "td", "kd", "sample", "pv_filter")
_NEEDS_UNIT = {**{b: [f"{b}_{u}" for u in units.TIME_UNITS] for b in _TIME_BASES},
               "ki": ["ki_per_s", "ki_per_min"]}
_PCT_COLUMNS = frozenset(c.name for c in INVENTORY_COLUMNS if c.unit == "%")


_ALTERNATIVES: dict[str, list[str]] = {}
for _col in INVENTORY_COLUMNS:
    _ALTERNATIVES.setdefault(_col.quantity, []).append(_col.name)


def alternatives(quantity: str) -> list[str]:
    """Every accepted header that fills ``quantity`` (e.g. ``ti`` -> ti_s, ti_min, ti_h, reset_rpm)."""
    return list(_ALTERNATIVES.get(quantity, []))


def inventory_columns_markdown() -> str:
    """The table of accepted columns as Markdown (for README.md), from :data:`INVENTORY_COLUMNS`.

    Returns
    -------
    str
        One line per quantity: the template's header, the accepted alternatives, unit and meaning.
    """
    lines = ["| Column | Also accepted | Unit | Meaning | Example |", "|---|---|---|---|---|"]
    seen: set[str] = set()
    for c in INVENTORY_COLUMNS:
        key = c.quantity if c.quantity not in ("pv_lo", "pv_hi", "num", "den") else c.name
        if key in seen:
            continue
        seen.add(key)
        group = [x for x in INVENTORY_COLUMNS if (x.quantity if x.quantity not in ("pv_lo", "pv_hi", "num", "den")
                                                  else x.name) == key]
        main = next((x for x in group if x.template), group[0])
        alts = ", ".join(f"`{x.name}` [{x.unit}]" for x in group if x is not main)
        unit = main.unit if main.kind in ("number", "time") else ""
        choices = f" One of: {', '.join(main.choices)}." if main.choices else ""
        meaning = (main.meaning + choices).replace("|", "\\|")
        lines.append(f"| `{main.name}` | {alts} | {unit} | {meaning} | {main.example} |")
    return "\n".join(lines)


class InventoryError(Exception):
    """The file itself cannot be read as an inventory (one line, for the engineer).

    Control characters in the message (from sheet names, headers) are escaped: it is printed.
    """

    def __init__(self, message: str = "") -> None:
        super().__init__(printable(message))


# --------------------------------------------------------------------------------------
# Headers
# --------------------------------------------------------------------------------------

_UNIT_TOKENS = {
    "s": "s", "sec": "s", "secs": "s", "second": "s", "seconds": "s",
    "min": "min", "mins": "min", "minute": "min", "minutes": "min",
    "h": "h", "hr": "h", "hrs": "h", "hour": "h", "hours": "h",
    "%": "pct", "pct": "pct", "percent": "pct",
    "rad/s": "rad_s", "db": "db", "deg": "deg", "degrees": "deg", "°": "deg",
    "1/s": "per_s", "/s": "per_s", "s-1": "per_s", "1/min": "per_min", "/min": "per_min", "min-1": "per_min",
    "rpm": "rpm", "repeats/min": "rpm",
}
_BRACKET = re.compile(r"^(.*?)\s*[\(\[]\s*([^\)\]]*?)\s*[\)\]]\s*$")


def _norm(text: str) -> str:
    return re.sub(r"[\s_]+", "_", text.strip().lower()).strip("_")


def canonical_header(text: Any) -> str | None:
    """The canonical column name of a header cell, or None when it is not a known column.

    Parameters
    ----------
    text : Any
        The header cell's value.

    Returns
    -------
    str or None
        e.g. ``Dead time (s)`` -> ``dead_time_s``, ``Ti [min]`` -> ``ti_min``.
    """
    if text is None:
        return None
    raw = str(text).strip()
    m = _BRACKET.match(raw)
    candidates = []
    if m:
        base, unit = _norm(m.group(1)), m.group(2).strip().lower()
        token = _UNIT_TOKENS.get(unit)
        if token:
            candidates.append(f"{base}_{token}")
        candidates.append(base)
    candidates.append(_norm(raw))
    for c in candidates:
        if c in COLUMNS_BY_NAME:
            return c
    return None


def _base_of(text: Any) -> str:
    raw = str(text).strip()
    m = _BRACKET.match(raw)
    return _norm(m.group(1)) if m else _norm(raw)


# --------------------------------------------------------------------------------------
# Reading a sheet into plain cells
# --------------------------------------------------------------------------------------


@dataclass
class _Table:
    """A sheet as plain cells: the header row and the non-blank rows after it."""

    sheet: str
    header_row: int
    headers: dict[int, Any]                        # column index (1-based) -> header value
    rows: list[tuple[int, dict[int, Any], dict[int, str]]]  # (sheet row, col -> value, col -> number format)
    blank_rows: int = 0
    merged: list[tuple[str, int, int, int, int]] = field(default_factory=list)  # ref, r0, c0, r1, c1
    uncomputed: set[tuple[int, int]] = field(default_factory=set)  # (row, col) formulas without a value


def _col_letter(idx: int) -> str:
    s = ""
    while idx:
        idx, r = divmod(idx - 1, 26)
        s = chr(65 + r) + s
    return s


def _is_blank(v: Any) -> bool:
    return v is None or (isinstance(v, str) and not v.strip())


def _build_table(sheet: str, rows: Iterable[tuple[int, list[tuple[int, Any, str | None]]]], key: str,
                 what: str) -> _Table:
    """Find the header row (first of the first 20 rows with a ``key`` header) and collect the data.

    ``rows`` gives each row's number and its non-blank cells as (column, value, number format of a
    numeric cell or None). The limits of :mod:`audit.limits` apply while streaming: more than
    ``MAX_ROWS`` data rows, or a non-blank cell right of column ``MAX_COLUMNS``, refuses the sheet at
    once; a cell longer than ``MAX_CELL_CHARS`` is replaced by a marker that makes its row invalid.
    """
    it = iter(rows)
    header_row, headers = 0, {}
    for rownum, cells in it:
        if rownum > 20:
            break
        if any(canonical_header(v) == key or (isinstance(v, str) and _norm(v) == key) for _, v, _ in cells):
            header_row = rownum
            headers = _capped(sheet, rownum, cells)
            for col, h in headers.items():
                if isinstance(h, Unreadable):
                    raise InventoryError(f"sheet '{sheet}' header {_col_letter(col)}{rownum}: {h.message}")
            break
    if not header_row:
        raise InventoryError(f"sheet '{sheet}' has no '{key}' header in its first 20 rows; {what}")
    data: list[tuple[int, dict[int, Any], dict[int, str]]] = []
    blank = 0
    prev = header_row
    for rownum, cells in it:
        if not cells:
            continue
        vals = _capped(sheet, rownum, cells)
        if len(data) >= MAX_ROWS:
            raise InventoryError(f"sheet '{sheet}' has more than {MAX_ROWS:,} loops (row {rownum} holds loop "
                                 f"{MAX_ROWS + 1:,}); at most {MAX_ROWS:,} are read: split the inventory, "
                                 "e.g. by area")
        blank += rownum - prev - 1
        prev = rownum
        fmts = {c: f for c, _, f in cells if f}
        data.append((rownum, vals, fmts))
    return _Table(sheet, header_row, headers, data, blank)


def _capped(sheet: str, rownum: int, cells: list[tuple[int, Any, str | None]]) -> dict[int, Any]:
    """The non-blank cells of one row by column (1-based), within the column and cell-length limits."""
    vals: dict[int, Any] = {}
    for col, v, _ in cells:
        if col > MAX_COLUMNS:
            raise InventoryError(f"sheet '{sheet}' cell {_col_letter(col)}{rownum} is right of column "
                                 f"{_col_letter(MAX_COLUMNS)}; at most {MAX_COLUMNS} columns are read")
        if isinstance(v, str) and len(v) > MAX_CELL_CHARS:
            v = Unreadable(f"cell of {len(v):,} characters; at most {MAX_CELL_CHARS:,} are read")
        vals[col] = v
    return vals


def _xlsx_rows(book, sheet: str, extras) -> Iterable[tuple[int, list[tuple[int, Any, str | None]]]]:
    """(sheet row, [(column, value, number format of a numeric cell)]) of every row with a non-blank cell.

    Streams the sheet's XML once (:mod:`audit.xlsx_in`: no cell objects, no reliance on the sheet's
    stored dimension, which some writers get wrong); merged ranges and formulas without a value go
    into ``extras``.
    """
    formats_of = book.style_formats
    numeric = (int, float)
    for rownum, cells in book.rows(sheet, extras):
        width = max(c for c, _, _ in cells)
        if width > MAX_COLUMNS:
            raise InventoryError(f"sheet '{sheet}' cell {_col_letter(width)}{rownum} is right of column "
                                 f"{_col_letter(MAX_COLUMNS)}; at most {MAX_COLUMNS} columns are read")
        yield rownum, [(col, v, (formats_of[style] if formats_of else "General")
                        if style and v.__class__ in numeric else None) for col, v, style in cells]


def _col_index(letters: bytes | str) -> int:
    n = 0
    for ch in letters if isinstance(letters, str) else letters.decode():
        n = n * 26 + ord(ch) - 64
    return n


def _read_xlsx_table(book, sheet_name: str, key: str, what: str) -> _Table:
    from .xlsx_in import SheetExtras

    extras = SheetExtras()
    table = _build_table(sheet_name, _xlsx_rows(book, sheet_name, extras), key, what)  # the row limit refuses early
    table.merged = extras.merged
    table.uncomputed = {(r, c) for r, c in extras.uncomputed if r > table.header_row}
    by_row = {r: vals for r, vals, _ in table.rows}
    extra = False
    for r, c in sorted(table.uncomputed):
        if r not in by_row:  # a row whose only content is uncomputed formulas is not blank
            by_row[r] = {}
            table.rows.append((r, by_row[r], {}))
            extra = True
        by_row[r][c] = UNCOMPUTED
    if extra:
        table.rows.sort(key=lambda t: t[0])
        table.blank_rows = _count_blanks(table)
    return table


def _count_blanks(table: _Table) -> int:
    prev, blank = table.header_row, 0
    for r, *_ in table.rows:
        blank += r - prev - 1
        prev = r
    return blank


def _sniff_csv(text: str) -> str:
    first = text.split("\n", 1)[0]
    return ";" if first.count(";") > first.count(",") else ","


def _read_csv_table(path: Path, data: bytes) -> _Table:
    text = None
    for enc in ("utf-8-sig", "cp1252"):
        try:
            text = data.decode(enc)
            break
        except UnicodeDecodeError:
            continue
    if text is None:
        raise InventoryError(f"{path.name}: not readable as text (neither UTF-8 nor Windows-1252); "
                             "save it as 'CSV UTF-8' and read that")
    if "\x00" in text:
        raise InventoryError(f"{path.name}: not a text CSV file (it contains binary data)")
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=_sniff_csv(text))

    def rows():
        start = 1
        try:
            for values in reader:
                yield start, [(i + 1, v, None) for i, v in enumerate(values) if not _is_blank(v)]
                start = reader.line_num + 1
        except csv.Error as exc:
            raise InventoryError(f"{path.name} line {reader.line_num}: not a readable CSV line ({exc})") from None

    return _build_table(path.stem, rows(), "tag", "the first line must name the columns, one of them 'tag'")


# --------------------------------------------------------------------------------------
# Opening the file
# --------------------------------------------------------------------------------------

_OLE = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"


def _open_workbook(path: Path, data: bytes):
    """Check the container and open it read-only with values; raises InventoryError."""
    if data.startswith(_OLE):
        if "EncryptionInfo".encode("utf-16-le") in data or "EncryptedPackage".encode("utf-16-le") in data:
            raise InventoryError(f"{path.name} is password-protected; save an unprotected copy (.xlsx) and read that")
        raise InventoryError(f"{path.name} is a legacy Excel 97-2003 workbook (.xls); save it as .xlsx and read that")
    if not data.startswith(b"PK"):
        raise InventoryError(f"{path.name} is not an .xlsx workbook or a CSV file")
    try:
        zf = zipfile.ZipFile(io.BytesIO(data))
        names = set(zf.namelist())
    except zipfile.BadZipFile:
        raise InventoryError(f"{path.name} is damaged: it looks like an .xlsx workbook but cannot be opened") from None
    if "xl/workbook.bin" in names:
        raise InventoryError(f"{path.name} is a binary workbook (.xlsb); save it as .xlsx and read that")
    if "mimetype" in names and b"opendocument" in zf.read("mimetype"):
        raise InventoryError(f"{path.name} is an OpenDocument spreadsheet; save it as .xlsx and read that")
    if "xl/workbook.xml" not in names:
        raise InventoryError(f"{path.name} is a zip file but not an .xlsx workbook")
    # Python's zipfile never inflates a part past the size its directory entry states (a part
    # whose data inflates further fails its check as damaged), so the stated sizes bound the total.
    inflated = sum(i.file_size for i in zf.infolist())
    if inflated > MAX_INFLATED_BYTES:
        raise InventoryError(f"{path.name} would inflate to {inflated / 1024 ** 2:,.0f} MiB once decompressed; "
                             f"a workbook may hold at most {MAX_INFLATED_BYTES // 1024 ** 2:,} MiB: refused")
    from .xlsx_in import open_workbook
    try:
        return open_workbook(zf)
    except Exception as exc:  # a damaged package raises many types
        raise InventoryError(f"{path.name} cannot be opened as a workbook ({type(exc).__name__}: {exc})") from None


_DAMAGE = (SyntaxError, ValueError, KeyError, IndexError, TypeError, OverflowError, EOFError, zipfile.BadZipFile,
           zlib.error)
"""What reading a damaged sheet raises (XML parse errors are SyntaxErrors)."""


class DamagedSheet(InventoryError):
    """A sheet whose XML cannot be parsed: the whole file is refused (a policy sheet too)."""


def _damaged_guard(path: Path, sheet: str, read: Callable[[], "_Table"]) -> "_Table":
    """Run ``read``; a damaged sheet becomes a one-line InventoryError naming file and sheet."""
    try:
        return read()
    except InventoryError:
        raise
    except _DAMAGE as exc:
        detail = " ".join(str(exc).split())[:160]
        raise DamagedSheet(f"{path.name}: sheet '{sheet}' is damaged and cannot be read ({type(exc).__name__}: "
                           f"{detail}); open and save it in a spreadsheet program, or restore a copy") from None


def _find_sheet(names: list[str], wanted: str) -> str | None:
    for n in names:
        if n.strip().lower() == wanted:
            return n
    return None


# --------------------------------------------------------------------------------------
# Cell values
# --------------------------------------------------------------------------------------

_NUM_RE = re.compile(r"^[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?$")
_XL_ERRORS = ("#DIV/0!", "#N/A", "#NAME?", "#NULL!", "#NUM!", "#REF!", "#VALUE!", "#GETTING_DATA", "#SPILL!",
              "#CALC!")


class Unreadable:
    """Marks a cell the reader cannot take at face value; ``message`` says why (an error on its row).

    Parameters
    ----------
    message : str
        The problem, as shown against the cell.
    """

    def __init__(self, message: str) -> None:
        self.message = message

    def __repr__(self) -> str:
        return f"<{self.message}>"


_UNCOMPUTED_MSG = ("formula without a computed value (the workbook was written by a program and never "
                   "recalculated); open it in a spreadsheet program, save it once, and read it again")
UNCOMPUTED = Unreadable(_UNCOMPUTED_MSG)


class _Bad(Exception):
    """A cell value that is not what the column needs; the message completes 'must be ...'."""


def _shown(v: Any) -> str:
    if isinstance(v, bool):
        return "TRUE" if v else "FALSE"
    if isinstance(v, (_dt.datetime, _dt.date, _dt.time)):
        return f"a date/time {v.isoformat()}"
    if isinstance(v, float):
        return f"{v:g}"
    return repr(v)


def _to_number(v: Any, fmt: str | None, column: str, need: str) -> float:
    """A cell value as a float, or _Bad with the message to show."""
    pct_col = column in _PCT_COLUMNS
    if isinstance(v, bool) or isinstance(v, (_dt.datetime, _dt.date, _dt.time, _dt.timedelta)):
        raise _Bad(f"must be {need}, got {_shown(v)}")
    if isinstance(v, (int, float)):
        try:
            x = float(v)
        except OverflowError:
            raise _Bad(f"must be {need}, got a number of {len(str(abs(int(v))))} digits, too large to hold") from None
        if fmt and "%" in fmt.replace('"%"', "").replace("\\%", ""):
            if pct_col:
                x *= 100.0  # the cell shows 100 x its value followed by %: read what is shown
            else:
                raise _Bad(f"must be {need}; the cell is formatted as a percentage (shows {x * 100:g}%) but "
                           f"{column} is not in %: enter the plain number with a General or Number format")
        if not math.isfinite(x):
            raise _Bad(f"must be {need}, got {x}")
        return x
    text = str(v)
    t = text.replace("\u2212", "-").replace("\u00a0", " ").replace("\u202f", " ").replace("\u2009", " ").strip()
    if t.upper() in _XL_ERRORS:
        raise _Bad(f"must be {need}; the cell holds the spreadsheet error {t}")
    if t.endswith("%"):
        if not pct_col:
            raise _Bad(f"must be {need}; a % sign is accepted only in % columns, got {text!r}")
        t = t[:-1].strip()
    if "," in t or " " in t:
        if _NUM_RE.match(t.replace(",", "").replace(" ", "")) or _NUM_RE.match(t.replace(",", ".")):
            raise _Bad(f"must be {need}; {text!r} is ambiguous (thousands separator or decimal comma?): "
                       f"write it with no separators and a point as the decimal mark")
        raise _Bad(f"must be {need}, got {text!r}")
    if not _NUM_RE.match(t):
        raise _Bad(f"must be {need}, got {_clip(text)!r}")
    x = float(t)
    if not math.isfinite(x):
        raise _Bad(f"must be {need}; {_clip(text)!r} is too large to hold as a number")
    return x


def _clip(text: str, n: int = 40) -> str:
    """Long text shortened for a message (its length said)."""
    return text if len(text) <= n else f"{text[:n]}... ({len(text)} characters)"


def _json_value(v: Any) -> Any:
    if v is None or isinstance(v, (bool, int, str)):
        return v
    if isinstance(v, float):
        return v if math.isfinite(v) else str(v)
    if isinstance(v, (_dt.datetime, _dt.date, _dt.time)):
        return v.isoformat()
    return str(v)


def _plain(v: Any) -> Any:
    return None if isinstance(v, Unreadable) else v


_KEPT_AS_IS = frozenset({type(None), bool, int, str})


def _raw_value(v: Any) -> Any:
    """A cell as kept in ``LoopRow.raw``: ``_json_value(_plain(v))``, the common kinds without a call."""
    return v if v.__class__ in _KEPT_AS_IS else _json_value(_plain(v))


def _text(v: Any) -> str:
    if isinstance(v, float) and v.is_integer():
        return str(int(v))
    return str(v).strip()


# --------------------------------------------------------------------------------------
# Validating one row
# --------------------------------------------------------------------------------------

_POS, _NONNEG, _ANY = "a positive number", "a number >= 0", "a number"


class _RowCheck:
    """Reads and checks one data row; collects problems located by cell."""

    def __init__(self, sheet: str, excel_row: int, vals: dict[int, Any], fmts: dict[int, str],
                 colmap: dict[str, list[int]], order: dict[str, int], name_of: dict[int, str] | None = None):
        self.sheet, self.r, self.vals, self.fmts, self.colmap = sheet, excel_row, vals, fmts, colmap
        self.order = order
        self.byname: dict[str, list[tuple[int, Any]]] = {}
        if name_of is None:
            for name, cols in colmap.items():
                g = [(c, vals[c]) for c in cols if c in vals]
                if g:
                    self.byname[name] = g
        else:   # the same, from the row's cells (fewer than the columns); a repeated header in its columns' order
            byname = self.byname
            for c, v in vals.items():
                name = name_of.get(c)
                if name is not None:
                    if name in byname:
                        byname[name].append((c, v))
                    else:
                        byname[name] = [(c, v)]
            for name, g in byname.items():
                if len(g) > 1:
                    byname[name] = [(c, vals[c]) for c in colmap[name] if c in vals]
        self.problems: list[tuple[int, int, Problem]] = []
        self._seq = 0

    # -- locating and reporting
    def coord(self, name: str, col: int | None = None) -> tuple[str, int]:
        if col is None:
            cols = self.colmap.get(name)
            col = cols[0] if cols else None
        if col is None:
            return str(self.r), 10 ** 6
        return f"{_col_letter(col)}{self.r}", col

    def add(self, name: str, message: str, severity: str = "error", col: int | None = None) -> None:
        cell, c = self.coord(name, col)
        self._seq += 1
        self.problems.append((c, self._seq, Problem(self.sheet, cell, name, message, severity)))

    def err(self, name: str, message: str, col: int | None = None) -> None:
        self.add(name, message, "error", col)

    def warn(self, name: str, message: str, col: int | None = None) -> None:
        self.add(name, message, "warning", col)

    @property
    def has_errors(self) -> bool:
        return any(p.severity == "error" for *_, p in self.problems)

    # -- raw access
    def given(self, name: str) -> list[tuple[int, Any]]:
        """Non-blank (column, value) pairs of ``name`` (several when the header appears twice)."""
        return self.byname.get(name, [])

    def present(self, name: str) -> bool:
        return name in self.byname

    def raw(self, name: str) -> tuple[int, Any] | tuple[None, None]:
        g = self.byname.get(name)
        if not g:
            return None, None
        if len(g) == 1:                 # the common case, the same outcome as below
            c, v = g[0]
            if isinstance(v, Unreadable):
                self.err(name, v.message, c)
                return None, None
            return c, v
        for c, v in g:
            if isinstance(v, Unreadable):
                self.err(name, v.message, c)
                return None, None
        if len(g) > 1 and len({_json_value(v) for _, v in g}) > 1:
            self.err(name, f"column {name} appears twice with different values "
                           f"({', '.join(f'{_col_letter(c)}{self.r}={_shown(v)}' for c, v in g)})", g[1][0])
            return None, None
        return g[0] if g else (None, None)

    # -- typed readers
    def text(self, name: str) -> str | None:
        c, v = self.raw(name)
        if c is None:
            return None
        if isinstance(v, (_dt.datetime, _dt.date, _dt.time)):
            return v.isoformat()
        return _text(v)

    def choice(self, name: str, words: tuple[str, ...]) -> str | None:
        c, v = self.raw(name)
        if c is None:
            return None
        word = _norm(str(v))
        if word in words:
            return word
        near = difflib.get_close_matches(word, words, n=1, cutoff=0.6)
        hint = f" (did you mean {near[0]}?)" if near else ""
        self.err(name, f"unknown {name} {_text(v)!r}{hint}; accepted: {', '.join(words)}", c)
        return None

    def number(self, name: str, need: str = _ANY, check: Callable[[float], bool] | None = None,
               ranged: bool = True) -> float | None:
        c, v = self.raw(name)
        if c is None:
            return None
        try:
            x = _to_number(v, self.fmts.get(c), name, need)
        except _Bad as exc:
            self.err(name, str(exc), c)
            return None
        ok = check(x) if check else (x > 0 if need == _POS else x >= 0 if need == _NONNEG else True)
        if not ok:
            self.err(name, f"must be {need}, got {x:g}", c)
            return None
        rng = ROW_RANGES.get(name) if ranged else None
        if rng is not None and not rng.accepts(x):
            self.err(name, f"must be {rng.describe()} (the range accepted), got {x:g}", c)
            return None
        return x

    def group(self, quantity: str, members: list[tuple[str, Callable[[float], float], str]],
              unit: str) -> tuple[float | None, str | None]:
        """One quantity given by alternative columns: (value in project units, column used)."""
        byname = self.byname
        found: list[tuple[str, float, float]] = []
        for name, conv, need in members:
            if name not in byname:
                continue
            x = self.number(name, need, ranged=False)
            if x is None:
                return None, name
            try:
                v = conv(x)
            except (ValueError, OverflowError, ZeroDivisionError) as exc:
                self.err(name, f"{name} = {x:g} cannot be converted to {quantity}: {exc}")
                return None, name
            found.append((name, x, v))
        if not found:
            return None, None
        name0, x0, v0 = found[0]
        for name, x, v in found[1:]:
            if not math.isclose(v, v0, rel_tol=1e-9, abs_tol=1e-12):
                cell0 = self.coord(name0)[0]
                self.err(name, f"{name} = {x:g} gives {quantity} = {v:g} {unit} but {name0} ({cell0}) = {x0:g} "
                               f"gives {v0:g} {unit}; give one of them, or the same value")
                return None, name
        rng = ROW_RANGES.get(quantity)
        # exactly 0 is left to the caller's own message (a zero gain); every other group refuses 0 by ``need``
        if rng is not None and v0 != 0 and not rng.accepts(v0):
            shown = f"{x0:g}" if v0 == x0 else f"{x0:g}, that is {quantity} = {v0:g} {rng.unit},"
            self.err(name0, f"{name0} = {shown} outside the range accepted: {rng.describe()}")
            return None, name0
        return v0, name0


def _ti_from_rpm(r: float) -> float:
    return units.ti_from_reset_rpm(r) or 0.0


_TIME_MEMBERS: dict[tuple[str, str], list[tuple[str, Callable[[float], float], str]]] = {}


def _time_members(base: str, need: str) -> list[tuple[str, Callable[[float], float], str]]:
    """The columns of a time quantity, one per unit (one list per quantity, shared: not to be changed)."""
    got = _TIME_MEMBERS.get((base, need))
    if got is None:
        got = _TIME_MEMBERS[(base, need)] = [(f"{base}_{u}", (lambda x, u=u: units.time_to_s(x, u)), need)
                                             for u in units.TIME_UNITS]
    return got


_MODEL_USES = {
    "fopdt": {"gain", "tau1", "dead_time"},
    "sopdt": {"gain", "tau1", "tau2", "lead", "dead_time"},
    "ipdt": {"gain", "tau1", "dead_time"},
    "tf": {"num", "den", "dead_time"},
}
_MODEL_REQUIRES = {"fopdt": ("gain", "tau1"), "sopdt": ("gain", "tau1", "tau2"), "ipdt": ("gain",),
                   "tf": ("num", "den")}
_MODEL_FIELDS = ("gain", "tau1", "tau2", "lead", "num", "den")
_FORM_USES = {"ideal": {"kc", "ti", "td"}, "series": {"kc", "ti", "td"}, "parallel": {"kp", "ki", "kd"}}


def _parse_coeffs(chk: _RowCheck, name: str) -> tuple[float, ...] | None:
    c, v = chk.raw(name)
    if c is None:
        return None
    if isinstance(v, (int, float)) and not isinstance(v, bool):
        try:
            x = float(v)
        except OverflowError:
            x = math.inf
        if not math.isfinite(x):
            chk.err(name, "the coefficient is too large to hold as a number", c)
            return None
        return (x,)
    text = str(v).strip()
    if "," in text:
        chk.err(name, f"separate coefficients with spaces or semicolons (a comma is ambiguous), got {text!r}", c)
        return None
    parts = [p for p in re.split(r"[\s;]+", text.replace("\u2212", "-")) if p]
    if not parts or not all(_NUM_RE.match(p) for p in parts):
        chk.err(name, f"must be numbers separated by spaces or semicolons, got {_clip(text)!r}", c)
        return None
    vals = tuple(float(p) for p in parts)
    if not all(math.isfinite(x) for x in vals):
        chk.err(name, f"a coefficient is too large to hold as a number, got {_clip(text)!r}", c)
        return None
    return vals


def _confine(chk: _RowCheck, base_dir: Path, name: str = "disturbance_file") -> str | None:
    c, v = chk.raw(name)
    if c is None:
        return None
    text = _text(v).replace("\\", "/")
    if text.startswith("/") or re.match(r"^[A-Za-z]:", text) or text.startswith("~"):
        chk.err(name, f"must be a path relative to the inventory's folder, got {_text(v)!r}", c)
        return None
    root = base_dir.resolve()
    target = (root / text).resolve()
    if target != root and root not in target.parents:
        chk.err(name, f"{_text(v)!r} leads outside the inventory's folder; "
                      f"keep records in that folder or below it", c)
        return None
    if not target.is_file():
        chk.warn(name, f"file {_text(v)!r} not found in the inventory's folder", c)
    return str(target)


def _largest_time_constant(model: str | None, tau1, tau2, den) -> float:
    if model == "tf" and den:
        try:
            poles = np.roots(den)
        except Exception:
            return 0.0
        taus = [1.0 / abs(p) for p in poles if abs(p) > 1e-12]
        return max(taus, default=0.0)
    return max(tau1 or 0.0, tau2 or 0.0)


def _validate_row(index: int, sheet: str, excel_row: int, vals: dict[int, Any], fmts: dict[int, str],
                  colmap: dict[str, list[int]], extra_cols: dict[int, str], base_dir: Path,
                  unitless: dict[int, str], merged: list[tuple[str, int, int, int, int]],
                  layout: tuple[dict[str, int], dict[int, str]]) -> LoopRow:
    order, name_of = layout
    chk = _RowCheck(sheet, excel_row, vals, fmts, colmap, order, name_of)

    # Cells the reader could not take at face value.
    for ref, r0, c0, r1, c1 in merged:
        if r0 <= excel_row <= r1:
            chk.err(name_of.get(c0, ""), f"merged cells {ref} inside the data; unmerge them and fill every cell",
                    c0)
    only_formulas = bool(vals) and all(v is UNCOMPUTED for v in vals.values())
    for c, v in vals.items():
        if isinstance(v, Unreadable) and c not in name_of:
            chk.err("", v.message, c)
    for c, base in unitless.items():
        if c in vals:
            chk.err("", f"column '{base}' needs its unit in the header: use one of "
                        f"{', '.join(_NEEDS_UNIT[base])}; value {_shown(vals[c])} not read", c)

    tag = chk.text("tag")
    if not tag:
        chk.err("tag", "tag is required")
    service = chk.text("service") or ""
    area = chk.text("area") or ""
    criticality = chk.choice("criticality", CRITICALITIES) or "medium"
    model = chk.choice("model", MODELS)
    if model is None and not chk.present("model"):
        chk.err("model", f"model is required; accepted: {', '.join(MODELS)}")
    form = chk.choice("form", FORMS) or "ideal"
    action = chk.choice("action", ACTIONS)
    if action is None:
        if not chk.present("action"):
            chk.warn("action", "blank: reverse action assumed (output rises when the PV falls)")
        action = "reverse"

    conventions: dict[str, str] = {}

    # PV range (for gain_eu and allowed_amplitude_eu)
    pv_lo, pv_hi = chk.number("pv_lo"), chk.number("pv_hi")
    span_ok = pv_lo is not None and pv_hi is not None
    if span_ok and not pv_hi > pv_lo:
        chk.err("pv_hi", f"must be greater than pv_lo ({pv_lo:g}), got {pv_hi:g}")
        span_ok = False

    # Process gain
    def gain_eu_conv(x: float) -> float:
        return units.gain_from_eu(x, pv_lo, pv_hi) if span_ok else math.nan

    if chk.present("gain_eu") and not span_ok:
        chk.err("gain_eu", "gain_eu needs pv_lo and pv_hi (with pv_hi > pv_lo) to be read as % of range")
    if chk.present("gain_per_min") and model is not None and model != "ipdt":
        chk.err("gain_per_min", f"gain_per_min is for ipdt (integrating) models only; this row's model is {model}")
    members = [("gain", float, _ANY), ("gain_per_min", units.per_min_to_per_s, _ANY)]
    if span_ok:
        members.insert(1, ("gain_eu", gain_eu_conv, _ANY))
    gain, conv = chk.group("gain", members, "1/s" if model == "ipdt" else "[-]")
    if conv:
        conventions["gain"] = conv
    if gain is not None and gain == 0:
        chk.err(conv or "gain", "process gain must not be zero")
        gain = None

    # Times
    def time_q(base: str, need: str) -> float | None:
        v, conv_ = chk.group(base, _time_members(base, need), "s")
        if conv_:
            conventions[base] = conv_
        return v

    tau1 = time_q("tau1", _POS)
    tau2 = time_q("tau2", _POS)
    lead = time_q("lead", _ANY)
    dead_time = time_q("dead_time", _NONNEG)
    ti_members = _time_members("ti", _NONNEG) + [("reset_rpm", _ti_from_rpm, _NONNEG)]
    ti, ti_conv = chk.group("ti", ti_members, "s")
    td = time_q("td", _NONNEG)
    kd = time_q("kd", _NONNEG)
    sample = time_q("sample", _POS)
    pv_filter = time_q("pv_filter", _NONNEG)

    # Controller gains
    kc, kc_conv = chk.group("kc", [("kc", float, _POS), ("pb_pct", units.kc_from_pb, _POS)], "[-]")
    kp = chk.number("kp", _NONNEG)
    ki, ki_conv = chk.group("ki", [("ki_per_s", float, _NONNEG), ("ki_per_min", units.per_min_to_per_s, _NONNEG)],
                            "1/s")
    d_filter = chk.number("d_filter", "a number in (0, 1]", lambda a: 0 < a <= 1)

    # Requirements
    band = chk.number("band_rad_s", _POS)
    atten = chk.number("attenuation_db", _POS)
    ms_max = chk.number("ms_max", "a number > 1", lambda x: x > 1)
    gm_min_db = chk.number("gm_min_db", _POS)
    pm_min_deg = chk.number("pm_min_deg", "a number in (0, 180)", lambda x: 0 < x < 180)

    # Lists
    num = _parse_coeffs(chk, "num")
    den = _parse_coeffs(chk, "den")

    # Disturbance record
    dfile = _confine(chk, base_dir)
    data_file = _confine(chk, base_dir, "data_file")
    if chk.present("allowed_amplitude_eu") and not span_ok:
        chk.err("allowed_amplitude_eu", "allowed_amplitude_eu needs pv_lo and pv_hi (with pv_hi > pv_lo)")
    am = [("allowed_amplitude", float, _POS)]
    if span_ok:
        am.append(("allowed_amplitude_eu", lambda x: units.eu_to_pct_of_range(x, pv_lo, pv_hi), _POS))
    allowed, am_conv = chk.group("allowed_amplitude", am, "% of range")
    if am_conv:
        conventions["allowed_amplitude"] = am_conv

    inner_loop = chk.text("inner_loop") or None
    outer_input = chk.choice("outer_model_input", OUTER_INPUTS)
    if inner_loop and tag and tag_key(inner_loop) == tag_key(tag):
        chk.err("inner_loop", "a loop cannot be its own inner loop")
    if outer_input and not inner_loop:
        chk.warn("outer_model_input", "used only with inner_loop; ignored")
    outer_input = outer_input or "inner_pv"

    # ---- the model
    got = {"gain": gain, "tau1": tau1, "tau2": tau2, "lead": lead, "num": num, "den": den}
    if model is not None:
        for q in _MODEL_FIELDS:
            cols = _ALTERNATIVES.get(q, []) if q not in ("num", "den") else [q]
            given_cols = [c for c in cols if chk.present(c)]
            if given_cols and q not in _MODEL_USES[model]:
                chk.warn(given_cols[0], f"not used by model {model}; ignored")
                got[q] = None
        for q in _MODEL_REQUIRES[model]:
            cols = _ALTERNATIVES.get(q, []) if q not in ("num", "den") else [q]
            if got[q] is None and not any(chk.present(c) for c in cols):
                chk.err(cols[0], f"required for model {model}" +
                        (f" (or {', '.join(cols[1:])})" if len(cols) > 1 else ""))
        if model == "tf" and got["num"] is not None and got["den"] is not None:
            check_tf_cells(chk, got["num"], got["den"], "process")
        if model != "tf" and got["gain"] is not None and abs(got["gain"]) > 100:
            chk.warn(conventions.get("gain", "gain"), f"|gain| = {abs(got['gain']):g} is above 100; check the units")
    gain, tau1, tau2, lead, num, den = (got[k] for k in ("gain", "tau1", "tau2", "lead", "num", "den"))
    dead = dead_time or 0.0

    # ---- the controller
    settings = {"kc": kc, "ti": ti, "td": td, "kp": kp, "ki": ki, "kd": kd}
    for q, used_by in (("kc", FORMS[:2]), ("ti", FORMS[:2]), ("td", FORMS[:2]), ("kp", ("parallel",)),
                       ("ki", ("parallel",)), ("kd", ("parallel",))):
        cols = [c for c in (_ALTERNATIVES.get(q) or [q]) if chk.present(c)]
        if cols and form not in used_by:
            chk.warn(cols[0], f"not used by form {form}; ignored")
            settings[q] = None
    kc, ti, td, kp, ki, kd = (settings[k] for k in ("kc", "ti", "td", "kp", "ki", "kd"))
    if form in ("ideal", "series"):
        if kc is None and not any(chk.present(c) for c in ("kc", "pb_pct")):
            chk.err("kc", f"kc (or pb_pct) is required for form {form}")
        ti = ti or None            # blank or 0: no integral action
        td = td or 0.0
        conventions["kc"] = kc_conv or "kc"
        ti_unit = (ti_conv or "ti_s").rsplit("_", 1)[-1]
        conventions["ti"] = ti_conv or "ti_s"
        conventions["td"] = conventions.get("td") or (f"td_{ti_unit}" if ti_unit in units.TIME_UNITS else "td_min")
        conventions.pop("kd", None)
    else:
        if kp is None and not chk.present("kp"):
            chk.err("kp", "kp is required for form parallel")
        ki = ki or 0.0
        kd = kd or 0.0
        if kd > 0 and kp is not None and kp == 0:
            chk.err("kp", "kp must be > 0 when kd > 0 (the derivative filter time is d_filter·kd/kp)")
        if kp == 0 and ki == 0 and kd == 0:
            chk.err("kp", "kp, ki and kd are all zero: the controller does nothing")
        conventions["ki"] = ki_conv or "ki_per_s"
        conventions["kd"] = conventions.get("kd") or "kd_s"
        conventions.pop("td", None)

    # ---- physical plausibility
    tau_max = _largest_time_constant(model, tau1, tau2, den)
    if sample is not None and dead + tau_max > 0 and sample > dead + tau_max:
        chk.err(conventions.get("sample", "sample_s"),
                f"sample period {sample:g} s is longer than dead time plus the largest time constant "
                f"({dead + tau_max:g} s); the loop cannot be judged from this model")
    if tau_max > 0 and dead > 10 * tau_max:
        chk.warn(conventions.get("dead_time", "dead_time_s"),
                 f"dead time {dead:g} s is more than 10 times the largest time constant ({tau_max:g} s); "
                 f"check the model")

    # ---- requirements
    if (band is None) != (atten is None) and not (chk.has_errors and (chk.present("band_rad_s")
                                                                     and chk.present("attenuation_db"))):
        missing = "attenuation_db" if atten is None else "band_rad_s"
        chk.warn(missing, "blank while " + ("band_rad_s" if atten is None else "attenuation_db") +
                 " is given; the rejection-band requirement is not checked")
        band = atten = None
    if allowed is not None and dfile is None and not chk.present("disturbance_file"):
        chk.warn(am_conv or "allowed_amplitude", "used only with disturbance_file; ignored")
    if dfile is not None and allowed is None and not any(chk.present(c) for c in
                                                         ("allowed_amplitude", "allowed_amplitude_eu")):
        chk.warn("allowed_amplitude", "blank: the disturbance record cannot set a requirement without it")

    problems = [p for *_, p in sorted(chk.problems, key=lambda t: (t[0], t[1]))]
    if only_formulas:
        problems = [p for p in problems if p.message == _UNCOMPUTED_MSG]
    kept, get = _KEPT_AS_IS, vals.get
    raw = {n: v if (v := get(c)).__class__ in kept else _raw_value(v) for n, c in order.items()}
    extras = {h: v if (v := get(c)).__class__ in kept else _raw_value(v) for c, h in extra_cols.items()}
    return LoopRow(
        index=index, sheet=sheet, excel_row=excel_row, tag=tag or None, service=service, area=area,
        criticality=criticality, model=model, gain=gain, tau1=tau1, tau2=tau2, lead=lead,
        dead_time=dead_time if dead_time is not None else 0.0, num=num, den=den, form=form,
        kc=kc, ti=ti, td=td, kp=kp, ki=ki, kd=kd, d_filter=d_filter if d_filter is not None else 0.1,
        action=action, sample=sample, pv_filter=pv_filter, band_rad_s=band, attenuation_db=atten,
        ms_max=ms_max, gm_min_db=gm_min_db, pm_min_deg=pm_min_deg, pv_lo=pv_lo, pv_hi=pv_hi,
        disturbance_file=dfile, allowed_amplitude=allowed, inner_loop=inner_loop, data_file=data_file,
        outer_model_input=outer_input, conventions=conventions, raw=raw, extras=extras,
        errors=tuple(p for p in problems if p.severity == "error"),
        warnings=tuple(p for p in problems if p.severity == "warning"),
    )


# --------------------------------------------------------------------------------------
# Headers of the loops sheet
# --------------------------------------------------------------------------------------


def _map_headers(table: _Table) -> tuple[dict[str, list[int]], dict[int, str], dict[int, str], list[Problem]]:
    """(canonical name -> columns, unknown columns, time columns without unit, header problems)."""
    colmap: dict[str, list[int]] = {}
    extras: dict[int, str] = {}
    unitless: dict[int, str] = {}
    problems: list[Problem] = []
    known = list(COLUMNS_BY_NAME)
    for col, h in sorted(table.headers.items()):
        cell = f"{_col_letter(col)}{table.header_row}"
        name = canonical_header(h)
        if name:
            colmap.setdefault(name, []).append(col)
            continue
        base = _base_of(h)
        if base in _NEEDS_UNIT:
            unitless[col] = base
            problems.append(Problem(table.sheet, cell, "", f"column '{h}' needs its unit in the header: use one of "
                                                          f"{', '.join(_NEEDS_UNIT[base])}; its values are not read",
                                    "error"))
            continue
        header = _text(h)
        near = difflib.get_close_matches(_norm(header), known, n=1, cutoff=0.75)
        hint = f"; did you mean {near[0]}?" if near else ""
        name, why = _extra_name(header, extras.values())
        if name in extras.values():
            name = f"{name} ({_col_letter(col)})"
        extras[col] = name
        if why:
            problems.append(Problem(table.sheet, cell, "", f"unknown column {header!r} {why}: kept as the extra "
                                                           f"column '{name}', apart from the results{hint}", "warning"))
        else:
            problems.append(Problem(table.sheet, cell, "", f"unknown column '{header}' kept as an extra column{hint}",
                                    "warning"))
    for name, cols in colmap.items():
        if len(cols) > 1:
            problems.append(Problem(table.sheet, f"{_col_letter(cols[1])}{table.header_row}", name,
                                    f"column {name} appears more than once (columns "
                                    f"{', '.join(_col_letter(c) for c in cols)}); rows must agree", "warning"))
    for ref, r0, c0, r1, c1 in table.merged:
        if r0 <= table.header_row <= r1:
            problems.append(Problem(table.sheet, ref.split(":")[0], "", f"merged header cells {ref}; unmerge them so "
                                                                        f"each column has its own header", "error"))
    return colmap, extras, unitless, problems


#: Prefix of an extra column whose header could be mistaken for a results column or a formula.
EXTRA_PREFIX = "extra:"


def _extra_name(header: str, taken) -> tuple[str, str]:
    """The results name of an unknown inventory column, and why it was changed ('' when it was not).

    An extra column is carried to the results after every results column. A header that reads like a
    results column (``status``, ``Row``, ``ms``; compared NFKC-normalised and case-folded), like another
    extra column, or like a formula (``=...``), or that holds control characters, is kept under
    ``extra:<header>`` (control characters escaped) so it can neither replace nor shift a results column
    and a spreadsheet never runs it.
    """
    from .columns import RESULT_COLUMNS
    from .safety import is_formula_like

    key = tag_key(header)
    results = {c.name.casefold() for c in RESULT_COLUMNS}
    why = ""
    if key in results:
        why = "has the name of a results column"
    elif key.startswith(EXTRA_PREFIX):
        why = f"begins with {EXTRA_PREFIX!r}, the mark of a renamed extra column"
    elif key in {tag_key(t) for t in taken}:
        why = "repeats another extra column's name"
    elif is_formula_like(header.lstrip(" ")) or not header.strip():
        why = "could be read as a formula" if header.strip() else "is blank"
    elif not header.isprintable():
        why = "holds control or invisible characters"
    if not why:
        return header, ""
    return EXTRA_PREFIX + printable(header), why


#: Fewest data rows a worker process is forked for by ``read_inventory(jobs=...)``: below it the
#: fork and the rows' way back cost more than the checks they take off this process. [-]
MIN_ROWS_PER_JOB = 250


def _validate_rows(table: _Table, colmap: dict[str, list[int]], extras: dict[int, str], base_dir: Path,
                   unitless: dict[int, str], layout: tuple, idx) -> tuple[list[LoopRow], dict[int, Any]]:
    """:func:`_validate_row` of the rows ``idx`` of ``table`` (the work of one process), and the loop
    of each valid row (row index -> loop, None when it cannot be built: the row then says why)."""
    from .loop import model_from_row
    out, built = [], {}
    for i in idx:
        i = int(i)
        r, vals, fmts = table.rows[i]
        row = _validate_row(i, table.sheet, r, vals, fmts, colmap, extras, base_dir, unitless, table.merged, layout)
        if row.valid:
            built[i], row = _row_model(row, model_from_row)
        out.append(row)
    return out, built


def _rows_from_table(table: _Table, base_dir: Path, jobs: int = 1) -> tuple[list[LoopRow], list[Problem],
                                                                             tuple[str, ...], tuple]:
    colmap, extras, unitless, problems = _map_headers(table)
    tag_col = _col_letter(colmap["tag"][0]) if "tag" in colmap else ""
    layout = _layout(colmap)
    args = (table, colmap, extras, base_dir, unitless, layout)
    if jobs > 1 and len(table.rows) >= 2 * MIN_ROWS_PER_JOB:
        from .parallel import map_parts
        # each row's checks depend on that row alone: the same rows and messages in any split
        rows, built = [], {}
        for part_rows, part_built in map_parts(_validate_rows, len(table.rows), jobs, args, MIN_ROWS_PER_JOB):
            rows.extend(part_rows)
            built.update(part_built)
    else:
        rows, built = _validate_rows(*args, range(len(table.rows)))
    rows, models = _mark_unevaluable(rows, colmap, built)
    return _mark_duplicates(rows, tag_col), problems, tuple(extras.values()), models


def _layout(colmap: dict[str, list[int]]) -> tuple[dict[str, int], dict[int, str]]:
    """(first column of each name, name of each column): the same for every row of a sheet."""
    return {n: cols[0] for n, cols in colmap.items()}, {c: n for n, cols in colmap.items() for c in cols}


_UNBUILT = object()


def _row_model(row: LoopRow, model_from_row) -> tuple[Any, LoopRow]:
    """The loop of a valid row, or None and the row with the reason it cannot be built."""
    try:
        return model_from_row(row), row
    except (ValueError, ZeroDivisionError, OverflowError, FloatingPointError) as exc:
        return None, replace(row, errors=row.errors + (Problem(
            row.sheet, str(row.excel_row), "model", f"the loop cannot be built from this row: {exc}"),))


def _mark_unevaluable(rows: list[LoopRow], colmap: dict[str, list[int]],
                      prebuilt: dict[int, Any] | None = None) -> tuple[list[LoopRow], tuple]:
    """Refuse valid rows whose loop the engine cannot evaluate in full (the engine's own grid sizing).

    Each value lies in its range, but together they can still span more than the engine resolves:
    a long dead time with a fast loop turns the delay spiral more times than the grid holds.
    Returns the rows and the loop built for each row that stays valid (None for the others), which
    the models stage reuses instead of building every loop again. ``prebuilt`` holds the loops
    already built by :func:`_validate_rows` (row index -> loop or None; its rows carry the reason).
    """
    from .frequency import grid_points
    from .ranges import MAX_GRID_POINTS
    from .loop import model_from_row

    idx = [i for i, r in enumerate(rows) if r.valid]
    if not idx:
        return rows, ()
    models = []
    for i in idx:
        m = prebuilt.get(i, _UNBUILT) if prebuilt is not None else _UNBUILT
        if m is _UNBUILT:
            m, rows[i] = _row_model(rows[i], model_from_row)
        models.append(m)
    flags = grid_points(models) > MAX_GRID_POINTS
    out = list(rows)
    built: list = [None] * len(rows)
    for i, bad, m in zip(idx, flags, models):
        if not bad:
            built[i] = m
            continue
        row = rows[i]
        name = row.conventions.get("dead_time") or next(
            (c for c in ("dead_time_s", "dead_time_min", "dead_time_h") if c in colmap), "model")
        col = colmap.get(name, [None])[0]
        cell = f"{_col_letter(col)}{row.excel_row}" if col is not None else str(row.excel_row)
        msg = (f"with this model and tuning the loop's response matters over too wide a range of frequencies "
               f"for the exact evaluation (the delay spiral would need more than {MAX_GRID_POINTS:,.0f} grid "
               f"points); check the units of the times and gains")
        out[i] = replace(row, errors=row.errors + (Problem(row.sheet, cell, name, msg),))
    return out, tuple(built)


def _mark_duplicates(rows: list[LoopRow], tag_col: str) -> list[LoopRow]:
    by_tag: dict[str, list[int]] = {}
    for i, row in enumerate(rows):
        if row.tag:
            by_tag.setdefault(tag_key(row.tag), []).append(i)
    out = list(rows)
    for idxs in by_tag.values():
        if len(idxs) < 2:
            continue
        for i in idxs:
            row = rows[i]
            others = ", ".join(str(rows[j].excel_row) for j in idxs if j != i)
            cell = f"{tag_col}{row.excel_row}"
            alike = {rows[j].tag for j in idxs} - {row.tag}
            how = (f" as {', '.join(repr(t) for t in sorted(alike))} (the same once look-alike and invisible "
                   f"characters are normalised)") if alike else ""
            p = Problem(row.sheet, cell, "tag", f"duplicate tag {row.tag!r}: also in row(s) {others}{how}")
            out[i] = replace(row, errors=(p,) + row.errors)
    return out


# --------------------------------------------------------------------------------------
# Policy sheet
# --------------------------------------------------------------------------------------

def _read_policy(table: _Table) -> tuple[Policy, list[Problem]]:
    problems: list[Problem] = []
    names = {_norm(str(h)): c for c, h in table.headers.items()}
    if "value" not in names:
        problems.append(Problem(table.sheet, str(table.header_row), "", "no 'value' column next to 'setting'; "
                                                                        "policy sheet ignored"))
        return Policy(), problems
    c_set, c_val = names["setting"], names["value"]
    defaults = Policy().as_dict()
    values: dict[str, Any] = {}
    seen: dict[str, str] = {}
    for r, vals, fmts in table.rows:
        s, v = vals.get(c_set), vals.get(c_val)
        cell_s, cell_v = f"{_col_letter(c_set)}{r}", f"{_col_letter(c_val)}{r}"
        if (r, c_val) in table.uncomputed or (r, c_set) in table.uncomputed:
            problems.append(Problem(table.sheet, cell_v, "value", "formula without a computed value; open the "
                                                                  "workbook in a spreadsheet program, save it once"))
            continue
        if s is None:
            if v is not None:
                problems.append(Problem(table.sheet, cell_s, "setting", "value without a setting name", "warning"))
            continue
        key = _norm(str(s))
        if key not in defaults:
            near = difflib.get_close_matches(key, list(defaults), n=1, cutoff=0.7)
            hint = f"; did you mean {near[0]}?" if near else ""
            problems.append(Problem(table.sheet, cell_s, "setting", f"unknown setting {_text(s)!r} ignored{hint}",
                                    "warning"))
            continue
        if key in seen:
            problems.append(Problem(table.sheet, cell_s, key, f"setting given twice (first in {seen[key]}); "
                                                               f"this one ignored"))
            continue
        seen[key] = cell_s
        if v is None:
            d = defaults[key]
            problems.append(Problem(table.sheet, cell_v, key, "blank value; the default "
                                    f"{d if isinstance(d, str) else format(d, 'g')} applies", "warning"))
            continue
        if isinstance(defaults[key], str):              # words, column names, patterns (ranges.POLICY_TEXT_RULES)
            why = POLICY_TEXT_RULES[key].problem(str(v))
            if why:
                problems.append(Problem(table.sheet, cell_v, key, f"must be {why}"))
                continue
            values[key] = str(v).strip()
            continue
        rng = POLICY_RANGES[key]
        need, ok = f"{rng.describe()} (the range accepted)", rng.accepts
        try:
            x = _to_number(v, fmts.get(c_val), key, need)
        except _Bad as exc:
            problems.append(Problem(table.sheet, cell_v, key, str(exc)))
            continue
        if not ok(x):
            problems.append(Problem(table.sheet, cell_v, key, f"must be {need}, got {x:g}"))
            continue
        values[key] = int(x) if isinstance(defaults[key], int) else x
    return Policy().with_values(values), problems


# --------------------------------------------------------------------------------------
# Public entry point
# --------------------------------------------------------------------------------------


def read_inventory(path: str | Path, jobs: int = 1) -> Inventory:
    """Read an inventory workbook (.xlsx) or CSV file and validate every row.

    Parameters
    ----------
    path : str or Path
        The workbook (sheet ``loops``, optional sheet ``policy``) or a CSV of the loops.
    jobs : int
        Processes for the rows' checks (``run --jobs``): with more than one and at least
        ``2 * MIN_ROWS_PER_JOB`` rows, forked workers check a share of the rows each while this
        process checks the first share; the same rows and messages in every case. [-]

    Returns
    -------
    Inventory
        Every non-blank row as a :class:`LoopRow` in project units (invalid rows included,
        with their errors), the policy in force and the file-level problems.

    Raises
    ------
    InventoryError
        When the file itself cannot be read (missing, not a workbook, legacy or binary format,
        password-protected, no ``loops`` sheet, no ``tag`` header). The message is one line.
    """
    was = gc.isenabled()
    gc.disable()       # see _read_inventory
    try:
        return _read_inventory(Path(path), path, jobs)
    finally:
        if was:
            gc.enable()


def _read_inventory(p: Path, path: str | Path, jobs: int = 1) -> Inventory:
    """:func:`read_inventory` with Python's cycle collector held off by the caller: reading creates
    several objects per cell (XML elements, values, problems) and none in a reference cycle; with the
    collector on, its full passes over the growing set of rows read cost a third of the reading at
    10,000 loops (they grow with the rows, so the reading grew faster than the rows)."""
    if not p.exists():
        raise InventoryError(f"{p}: file not found")
    if p.is_dir():
        raise InventoryError(f"{p} is a folder; give the inventory workbook (.xlsx) or CSV file")
    try:
        data = read_regular(p, MAX_INVENTORY_BYTES, "inventory")
    except NotARegularFile as exc:
        raise InventoryError(str(exc)) from None
    except FileNotFoundError:
        raise InventoryError(f"{p}: file not found") from None
    except OSError as exc:
        raise InventoryError(f"{p}: cannot be read ({exc.strerror or exc})") from None
    if not data:
        raise InventoryError(f"{p.name} is empty")
    sha = hashlib.sha256(data).hexdigest()
    base_dir = p.resolve().parent
    policy = Policy()
    policy_problems: list[Problem] = []
    ctable = None
    is_csv = p.suffix.lower() in (".csv", ".txt") and not data.startswith((b"PK", _OLE))
    if is_csv:
        table = _read_csv_table(p, data)
        sheets: tuple[str, ...] = ()
    else:
        wb = _open_workbook(p, data)
        try:
            sheets = tuple(wb.sheetnames)
            loops = _find_sheet(list(sheets), "loops")
            if loops is None:
                raise InventoryError(f"{p.name} has no 'loops' sheet; sheets found: {', '.join(sheets) or 'none'}")
            table = _damaged_guard(p, loops, lambda: _read_xlsx_table(
                wb, loops, "tag", "the header row must name the columns, one of them 'tag'"))
            pol = _find_sheet(list(sheets), "policy")
            if pol is not None:
                try:
                    ptable = _damaged_guard(p, pol, lambda: _read_xlsx_table(wb, pol, "setting", ""))
                    policy, policy_problems = _read_policy(ptable)
                except DamagedSheet:
                    raise
                except InventoryError:
                    policy_problems = [Problem(pol, "A1", "", "no 'setting' header in the first 20 rows; "
                                                              "policy sheet ignored, defaults apply")]
            ctable = _couplings_table(wb, sheets)
        finally:
            wb.close()
    rows, header_problems, extra_columns, models = _rows_from_table(table, base_dir, jobs)
    if not rows:
        where = f"sheet '{table.sheet}' of {p.name}" if sheets else p.name
        raise InventoryError(f"{where}: no loops below the header row (row {table.header_row}); nothing to audit")
    letters: dict[str, str] = {}
    for col, h in sorted(table.headers.items()):
        name = canonical_header(h)
        if name and name not in letters:
            letters[name] = _col_letter(col)
    couplings = None
    if isinstance(ctable, Problem):
        policy_problems.append(ctable)
    elif ctable is not None:
        from .multiloop.couplings import read_couplings
        couplings = read_couplings(ctable, rows)
        policy_problems.extend(couplings.problems)
    return Inventory(path=str(path), name=p.name, sha256=sha, rows=tuple(rows), policy=policy,
                     problems=tuple(header_problems) + tuple(policy_problems), blank_rows=table.blank_rows,
                     sheets=sheets, extra_columns=extra_columns, column_letters=letters, couplings=couplings,
                     models=models)


def _couplings_table(wb, sheets: tuple[str, ...]) -> "_Table | Problem | None":
    """The optional ``couplings`` sheet as plain cells (read by :mod:`audit.multiloop.couplings`)."""
    name = _find_sheet(list(sheets), "couplings")
    if name is None:
        return None
    try:
        return _read_xlsx_table(wb, name, "from_tag", "")
    except InventoryError:
        return Problem(name, "A1", "", "no 'from_tag' header in the first 20 rows; couplings sheet ignored, "
                                       "every loop audited alone")


# --------------------------------------------------------------------------------------
# The check command
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class CheckReport:
    """Findings of ``check``: every problem in reading order and the counts.

    Attributes
    ----------
    problems : list of Problem
        Header problems, then each row's problems in row order, then policy problems.
    rows_read, valid, invalid : int
        Non-blank rows read, rows without error, rows with at least one error. [-]
    errors, warnings : int
        Problem counts by severity (file-level problems included). [-]
    blank_rows : int
        Blank rows skipped in the middle of the data. [-]
    """

    problems: list[Problem]
    rows_read: int
    valid: int
    invalid: int
    errors: int
    warnings: int
    blank_rows: int = 0
    name: str = ""

    @property
    def exit_code(self) -> int:
        """0 when every row is valid and no file-level error was found, else 2."""
        return 0 if self.errors == 0 else 2


def check_report(inv: Inventory) -> CheckReport:
    """Collect the problems of a read inventory.

    Parameters
    ----------
    inv : Inventory
        As returned by :func:`read_inventory`.

    Returns
    -------
    CheckReport
    """
    loop_sheet = inv.rows[0].sheet if inv.rows else None
    head = [p for p in inv.problems if p.sheet == loop_sheet or loop_sheet is None and p.sheet != "policy"]
    tail = [p for p in inv.problems if p not in head]
    problems = list(head)
    for row in inv.rows:
        problems.extend(sorted(row.errors + row.warnings, key=_cell_order))
    problems.extend(tail)
    invalid = sum(1 for r in inv.rows if r.errors)
    return CheckReport(
        problems=problems, rows_read=len(inv.rows), valid=len(inv.rows) - invalid, invalid=invalid,
        errors=sum(p.severity == "error" for p in problems), warnings=sum(p.severity == "warning" for p in problems),
        blank_rows=inv.blank_rows, name=inv.name)


def _cell_order(p: Problem) -> tuple[int, int]:
    m = re.match(r"^([A-Z]*)(\d+)", p.cell)
    if not m:
        return (10 ** 6, 0)
    return (_col_index(m.group(1)) if m.group(1) else 10 ** 6, 0)


def format_check(report: CheckReport) -> str:
    """The check findings as text: one problem a line, then a one-line summary.

    Parameters
    ----------
    report : CheckReport

    Returns
    -------
    str
    """
    lines = [str(p) if p.severity == "error" else f"{p} [warning]" for p in report.problems]
    blank = f"; {report.blank_rows} blank row{'s' if report.blank_rows != 1 else ''} skipped" \
        if report.blank_rows else ""
    verdict = "all rows valid" if report.exit_code == 0 else "fix the errors above"
    lines.append(f"{report.name + ': ' if report.name else ''}{report.rows_read} row{'s' if report.rows_read != 1 else ''} read, {report.valid} valid, "
                 f"{report.invalid} invalid; {report.errors} error{'s' if report.errors != 1 else ''}, "
                 f"{report.warnings} warning{'s' if report.warnings != 1 else ''}{blank} - {verdict}")
    return "\n".join(lines)


def check_json(report: CheckReport) -> dict[str, Any]:
    """The check findings as a JSON-serialisable mapping.

    Parameters
    ----------
    report : CheckReport

    Returns
    -------
    dict
        ``inventory``, counts, ``exit_code`` and ``problems`` (sheet, cell, column, severity,
        message, text).
    """
    return {
        "inventory": report.name,
        "rows_read": report.rows_read, "valid": report.valid, "invalid": report.invalid,
        "errors": report.errors, "warnings": report.warnings, "blank_rows": report.blank_rows,
        "exit_code": report.exit_code,
        "problems": [{"sheet": p.sheet, "cell": p.cell, "column": p.column, "severity": p.severity,
                      "message": p.message, "text": str(p)} for p in report.problems],
    }


def check_tf_cells(chk: Any, num: list[float], den: list[float], what: str) -> None:
    """Problems of a tf model's ``num``/``den`` cells, reported on ``chk`` (loops and couplings sheets alike).

    Parameters
    ----------
    chk : row checker
        Has ``err(column, message)``.
    num, den : list of float
        Coefficients, highest power first. [-]
    what : str
        Whose gain the numerator sets, for the message ('process', 'coupling').
    """
    if den[0] == 0:
        chk.err("den", f"leading coefficient must not be 0, got {' '.join(f'{x:g}' for x in den)}")
    elif all(x == 0 for x in den):
        chk.err("den", "all coefficients are zero")
    else:
        n_trim = np.trim_zeros(np.asarray(num, float), "f")
        if n_trim.size == 0:
            chk.err("num", f"all coefficients are zero: the {what} gain is zero")
        elif n_trim.size > len(den):
            chk.err("num", f"improper transfer function: numerator degree {n_trim.size - 1} exceeds "
                           f"denominator degree {len(den) - 1}")
        else:
            for col_, msg_ in tf_problems(num, den):
                chk.err(col_, msg_)
