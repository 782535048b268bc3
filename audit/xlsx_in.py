"""Reading an .xlsx workbook directly from its SpreadsheetML parts (ECMA-376), the reverse of
:mod:`audit.xlsx_out`.

The inventory reader needs little of a workbook: the sheet names and where each sheet's part is,
the shared strings, each cell style's number format (percentages, dates) and the date system; then
each sheet's cells as values, streamed row by row. This module reads exactly that with the standard
library's XML parser (expat, which refuses entity expansion bombs), one pass over each part, without
building cell objects. Every container check (size once inflated, legacy and foreign formats) stays
in :mod:`audit.inventory`, which opens the file first.

Cells are read as a spreadsheet program's last save left them (ECMA-376 Part 1, 18.3.1.4 ``c``):

* ``t="s"``: the shared string of that index (18.4.8 ``si``: its plain ``t`` text followed by the
  text of each rich-text run ``r``, phonetic runs left out; the escape ``_x005F_`` of a literal
  ``_x`` reduced as spreadsheet programs write it);
* ``t="inlineStr"``: the ``is`` element's text, read the same way;
* ``t="str"``: a formula's text result; ``t="b"``: a boolean; ``t="e"``: the error's text
  (``#DIV/0!``); ``t="d"``: an ISO 8601 date;
* numbers (``t="n"`` or none): an integer when the text has no point and no exponent, else a float;
  a cell whose style's number format is a date or time format becomes a date, time or duration
  (18.17.4, the 1900 or 1904 date system of ``workbookPr``);
* a formula's cached value is the cell's value; a formula cell with no cached value is reported
  (``uncomputed``), as a workbook written by a program and never opened would hold.

The reading matches openpyxl's read-only, values-only reader cell for cell (checked by
``tests/unit/test_xlsx_in.py`` on workbooks of every cell kind and the sample site); dates are converted by
openpyxl's own functions, imported only when a workbook holds a date.
"""

from __future__ import annotations

import posixpath
import re
import zipfile
from dataclasses import dataclass, field
from typing import Any, Iterator
from xml.etree.ElementTree import XMLPullParser, fromstring, iterparse

MAIN = "http://schemas.openxmlformats.org/spreadsheetml/2006/main"
_REL = "http://schemas.openxmlformats.org/officeDocument/2006/relationships"
_PKG_REL = "http://schemas.openxmlformats.org/package/2006/relationships"
_CT = "http://schemas.openxmlformats.org/package/2006/content-types"

_WORKBOOK_TYPES = (  # in the order a workbook part is looked for
    "application/vnd.ms-excel.template.macroEnabled.main+xml",
    "application/vnd.openxmlformats-officedocument.spreadsheetml.template.main+xml",
    "application/vnd.ms-excel.sheet.macroEnabled.main+xml",
    "application/vnd.openxmlformats-officedocument.spreadsheetml.sheet.main+xml",
)
_SHARED_STRINGS = "application/vnd.openxmlformats-officedocument.spreadsheetml.sharedStrings+xml"

_ROW, _C, _V, _F, _IS = (f"{{{MAIN}}}{t}" for t in ("row", "c", "v", "f", "is"))
_SI, _SHEET_DATA, _MERGE_CELL, _T = (f"{{{MAIN}}}{t}" for t in ("si", "sheetData", "mergeCell", "t"))

#: Number formats 0-49 built into every workbook (ECMA-376 Part 1, 18.8.30 ``numFmt``).
BUILTIN_FORMATS = {
    0: "General", 1: "0", 2: "0.00", 3: "#,##0", 4: "#,##0.00", 5: '"$"#,##0_);("$"#,##0)',
    6: '"$"#,##0_);[Red]("$"#,##0)', 7: '"$"#,##0.00_);("$"#,##0.00)', 8: '"$"#,##0.00_);[Red]("$"#,##0.00)',
    9: "0%", 10: "0.00%", 11: "0.00E+00", 12: "# ?/?", 13: "# ??/??", 14: "mm-dd-yy", 15: "d-mmm-yy",
    16: "d-mmm", 17: "mmm-yy", 18: "h:mm AM/PM", 19: "h:mm:ss AM/PM", 20: "h:mm", 21: "h:mm:ss",
    22: "m/d/yy h:mm", 37: "#,##0_);(#,##0)", 38: "#,##0_);[Red](#,##0)", 39: "#,##0.00_);(#,##0.00)",
    40: "#,##0.00_);[Red](#,##0.00)", 41: r'_(* #,##0_);_(* \(#,##0\);_(* "-"_);_(@_)',
    42: r'_("$"* #,##0_);_("$"* \(#,##0\);_("$"* "-"_);_(@_)',
    43: r'_(* #,##0.00_);_(* \(#,##0.00\);_(* "-"??_);_(@_)',
    44: r'_("$"* #,##0.00_)_("$"* \(#,##0.00\)_("$"* "-"??_)_(@_)', 45: "mm:ss", 46: "[h]:mm:ss",
    47: "mmss.0", 48: "##0.0E+0", 49: "@",
}
_FIRST_CUSTOM = 164

# A format is a date format when its first section, quoted text and [locale/colour] brackets left
# out, holds a date or time letter not escaped by _ or \ (18.8.31); a duration when it holds [h], [m]
# or [s] (elapsed time). The same rule as openpyxl's, so cells read alike.
_STRIP = re.compile(r'".*?"|\[(?!hh?\]|mm?\]|ss?\])[^\]]*\]')
_DATE_LETTER = re.compile(r"(?<![_\\])[dmhysDMHYS]")
_ELAPSED = re.compile(r"\[hh?\](:mm(:ss(\.0*)?)?)?|\[mm?\](:ss(\.0*)?)?|\[ss?\](\.0*)?", re.I)


def is_date_format(fmt: str | None) -> bool:
    """True when a cell of this number format shows a date or time.

    Parameters
    ----------
    fmt : str or None
        A number format code (``yyyy-mm-dd``, ``0.00%``); None for none.
    """
    return fmt is not None and _DATE_LETTER.search(_STRIP.sub("", fmt.split(";")[0])) is not None


def is_duration_format(fmt: str | None) -> bool:
    """True when a cell of this number format shows elapsed time ([h]:mm and the like).

    Parameters
    ----------
    fmt : str or None
        A number format code; None for none.
    """
    return fmt is not None and _ELAPSED.search(fmt.split(";")[0]) is not None


class NotAWorkbook(ValueError):
    """The zip file has no workbook part (the message says what is missing)."""


@dataclass
class SheetExtras:
    """What a sheet holds besides its cell values, filled while its rows are streamed.

    Attributes
    ----------
    merged : list of (ref, r0, c0, r1, c1)
        Merged ranges (``B3:B4``), first and last row and column (1-based).
    uncomputed : set of (row, column)
        Formula cells without a cached value.
    """

    merged: list[tuple[str, int, int, int, int]] = field(default_factory=list)
    uncomputed: set[tuple[int, int]] = field(default_factory=set)


@dataclass
class Workbook:
    """An opened workbook: sheet names in order, their parts, shared strings and cell styles."""

    archive: zipfile.ZipFile
    sheets: list[tuple[str, str | None]]        # (name, part path; None for a chart sheet)
    shared: list[str]
    style_formats: list[str]                    # number format code of each cell style (cellXfs)
    date_styles: frozenset[int]
    duration_styles: frozenset[int]
    date1904: bool = False

    @property
    def sheetnames(self) -> list[str]:
        """Names of the sheets, in workbook order."""
        return [name for name, _ in self.sheets]

    def close(self) -> None:
        """Close the archive."""
        self.archive.close()

    def rows(self, sheet: str, extras: SheetExtras) -> Iterator[tuple[int, list[tuple[int, Any, int]]]]:
        """Stream one sheet: (row number, [(column, value, style index), ...]) of each row with a
        non-blank cell, in the order of the sheet's XML; merged ranges and formulas without a
        cached value go into ``extras`` as they pass.

        Raises whatever the XML parser, the zip reader or a malformed cell raises (``SyntaxError``,
        ``ValueError``, ``IndexError``, ``zipfile.BadZipFile``, ``zlib.error``): the caller names
        the sheet as damaged.
        """
        part = next((p for n, p in self.sheets if n == sheet), None)
        if part is None:       # a chart sheet: no cells
            return
        with self.archive.open(part) as src:
            yield from _sheet_rows(src, self, extras)


def open_workbook(archive: zipfile.ZipFile) -> Workbook:
    """Read the workbook part, its relationships, the shared strings and the cell styles.

    Parameters
    ----------
    archive : zipfile.ZipFile
        The opened package (its container already checked by the caller).

    Returns
    -------
    Workbook

    Raises
    ------
    NotAWorkbook, KeyError, SyntaxError, ValueError, zipfile.BadZipFile
        On a package that is not a readable workbook; the caller turns them into one message.
    """
    names = set(archive.namelist())
    types = fromstring(archive.read("[Content_Types].xml"))
    overrides = [(o.get("PartName") or "", o.get("ContentType")) for o in types if o.tag == f"{{{_CT}}}Override"]
    wb_part = None
    for ct in _WORKBOOK_TYPES:
        wb_part = next((p for p, c in overrides if c == ct), None)
        if wb_part:
            break
    if not wb_part:
        defaults = {d.get("ContentType") for d in types if d.tag == f"{{{_CT}}}Default"}
        if not defaults & set(_WORKBOOK_TYPES):
            raise NotAWorkbook("File contains no valid workbook part")
        wb_part = "/xl/workbook.xml"
    wb_part = wb_part[1:]
    shared: list[str] = []
    ss_part = next((p for p, c in overrides if c == _SHARED_STRINGS), None)
    if ss_part is not None:
        with archive.open(ss_part[1:]) as src:
            shared = _shared_strings(src)

    root = fromstring(archive.read(wb_part))
    pr = root.find(f"{{{MAIN}}}workbookPr")
    flag = pr.get("date1904") if pr is not None else None
    date1904 = bool(flag) and flag not in ("false", "f", "0")
    folder = posixpath.dirname(wb_part)
    rels_path = posixpath.join(folder, "_rels", posixpath.basename(wb_part) + ".rels")
    targets: dict[str, tuple[str, str]] = {}
    if rels_path in names:
        parent = posixpath.split(posixpath.dirname(rels_path))[0]
        for r in fromstring(archive.read(rels_path)):
            if r.tag != f"{{{_PKG_REL}}}Relationship" or r.get("TargetMode") == "External":
                continue
            target = r.get("Target") or ""
            target = target[1:] if target.startswith("/") else posixpath.normpath(posixpath.join(parent, target))
            targets[r.get("Id") or ""] = (target, r.get("Type") or "")
    sheets: list[tuple[str, str | None]] = []
    found = root.find(f"{{{MAIN}}}sheets")
    for s in (found if found is not None else ()):
        if s.tag != f"{{{MAIN}}}sheet":
            continue
        target, kind = targets.get(s.get(f"{{{_REL}}}id") or "", ("", ""))
        if target not in names:
            continue            # a sheet whose part is missing is not in the workbook
        sheets.append((s.get("name") or "", None if "chartsheet" in kind else target))

    formats, dates, durations = _styles(archive, names)
    return Workbook(archive, sheets, shared, formats, dates, durations, date1904)


def _text_of(node) -> str:
    """Text of a shared or inline string: its plain ``t`` then each run's ``t`` (18.4.8, 18.4.4)."""
    plain = None
    runs = []
    for child in node:
        local = child.tag.rpartition("}")[2]
        if local == "t":
            plain = child.text
        elif local == "r":
            t = None
            for part in child:
                if part.tag.rpartition("}")[2] == "t":
                    t = part.text
            if t is not None:
                runs.append(t)
    if plain is not None:
        runs.insert(0, plain)
    return "".join(runs)


def _shared_strings(src) -> list[str]:
    out: list[str] = []
    for _, node in iterparse(src):
        if node.tag == _SI:
            out.append(_text_of(node).replace("x005F_", ""))
            node.clear()
    return out


def _styles(archive: zipfile.ZipFile, names: set[str]) -> tuple[list[str], frozenset[int], frozenset[int]]:
    """Number format code of every cell style (``cellXfs``), and which show dates and durations."""
    if "xl/styles.xml" not in names:
        return [], frozenset(), frozenset()
    root = fromstring(archive.read("xl/styles.xml"))
    custom: dict[int, str] = {}
    nf = root.find(f"{{{MAIN}}}numFmts")
    for f in (nf if nf is not None else ()):
        if f.tag == f"{{{MAIN}}}numFmt":
            custom[int(f.get("numFmtId"))] = f.get("formatCode") or ""
    formats: list[str] = []
    dates, durations = set(), set()
    xfs = root.find(f"{{{MAIN}}}cellXfs")
    for i, xf in enumerate(x for x in (xfs if xfs is not None else ()) if x.tag == f"{{{MAIN}}}xf"):
        fid = int(xf.get("numFmtId") or 0)
        code = custom.get(fid) if fid in custom else BUILTIN_FORMATS.get(fid)
        formats.append(code if code is not None else "General")
        if is_date_format(code):
            dates.add(i)
        if is_duration_format(code):
            durations.add(i)
    return formats, frozenset(dates), frozenset(durations)


_LETTERS = re.compile(r"[A-Za-z]{1,3}")
_COLUMNS: dict[str, int] = {}
_DIGITS = "0123456789"


def _column(ref: str) -> int:
    """Column index (1-based) of a cell reference such as ``AB12``; ValueError when malformed."""
    letters = ref.rstrip(_DIGITS)
    n = _COLUMNS.get(letters)
    if n is None:
        if not _LETTERS.fullmatch(letters):
            raise ValueError(f"{ref!r} is not a cell reference")
        n = 0
        for ch in letters.upper():
            n = n * 26 + ord(ch) - 64
        if len(_COLUMNS) < 20_000:
            _COLUMNS[letters] = n
    if len(letters) == len(ref):
        raise ValueError(f"{ref!r} is not a cell reference")   # the row part must be a number
    return n


_MERGE_REF = re.compile(r"([A-Z]+)(\d+)(?::([A-Z]+)(\d+))?")


def _number(text: str) -> int | float:
    return float(text) if ("." in text or "E" in text or "e" in text) else int(text)


def _sheet_rows(src, book: Workbook, extras: SheetExtras) -> Iterator[tuple[int, list[tuple[int, Any, int]]]]:
    """The sheet's rows from start events alone (half the events of start and end): a row is
    complete when the next row starts or the part ends. Each row read is removed from ``sheetData``,
    so memory stays that of one row however many rows the sheet holds."""
    data = None
    pending = None
    state = [0]               # the row counter, for rows without r
    parser = XMLPullParser(("start",))
    read = src.read
    while parser is not None:
        chunk = read(1 << 16)
        if chunk:
            parser.feed(chunk)
            events = parser.read_events()
        else:
            parser.close()       # a sheet cut short raises here (ParseError, a SyntaxError)
            events, parser = parser.read_events(), None
        for _, el in events:
            tag = el.tag
            if tag == _ROW:
                if pending is not None:
                    cells = _row_cells(pending, book, extras, state)
                    if data is not None:
                        data.clear()
                    if cells:
                        yield state[0], cells
                pending = el
            elif tag == _SHEET_DATA:
                data = el
            elif tag == _MERGE_CELL:
                ref = el.get("ref") or ""
                m = _MERGE_REF.fullmatch(ref)
                if m:
                    c0, r0 = _column(m.group(1) + m.group(2)), int(m.group(2))
                    c1, r1 = (_column(m.group(3) + m.group(4)), int(m.group(4))) if m.group(3) else (c0, r0)
                    extras.merged.append((ref, r0, c0, r1, c1))
    if pending is not None:
        cells = _row_cells(pending, book, extras, state)
        if cells:
            yield state[0], cells


def _row_cells(el, book: Workbook, extras: SheetExtras, state: list[int]) -> list[tuple[int, Any, int]]:
    """(column, value, style) of the non-blank cells of one ``row`` element; ``state[0]`` becomes its number."""
    shared = book.shared
    dates = book.date_styles
    v_tag, f_tag, is_tag, t_tag = _V, _F, _IS, _T
    column = _column
    r = el.get("r")
    if r is not None:
        try:
            row_counter = int(r)
        except ValueError:
            x = float(r)
            if not x.is_integer():
                raise ValueError(f"{r} is not a valid row number") from None
            row_counter = int(x)
    else:
        row_counter = state[0] + 1
    state[0] = row_counter
    col = 0
    cells = []
    for c in el:
        ref = c.get("r")
        col = column(ref) if ref else col + 1
        t = c.get("t", "n")
        s = c.get("s", 0)
        if s:
            s = int(s)
        if c.find(f_tag) is not None:
            v = c.find(v_tag)
            if not ((v is not None and v.text) or (t == "str" and v is not None)):
                extras.uncomputed.add((row_counter, col))
        if t == "inlineStr":
            node = c.find(is_tag)
            if node is None:
                continue
            if len(node) == 1 and node[0].tag == t_tag:
                value = node[0].text or ""
            else:
                value = _text_of(node)
        else:
            value = c.findtext(v_tag)
            if not value:
                continue
            if t == "n":
                value = _number(value)
                if s in dates:
                    value = _date_value(value, book, s)
                cells.append((col, value, s))
                continue
            if t == "s":
                i = int(value)
                if i < 0:
                    raise IndexError(f"shared string {i} does not exist")
                value = shared[i]
            elif t == "b":
                cells.append((col, bool(int(value)), s))
                continue
            elif t == "d":
                from openpyxl.utils.datetime import from_ISO8601
                value = from_ISO8601(value)
        if value.__class__ is str and not value.strip():
            continue
        cells.append((col, value, s))
    return cells


def _date_value(value: int | float, book: Workbook, style: int) -> Any:
    """A serial number in a date-formatted cell as a date, time or duration (18.17.4)."""
    from openpyxl.utils.datetime import MAC_EPOCH, WINDOWS_EPOCH, from_excel
    try:
        return from_excel(value, MAC_EPOCH if book.date1904 else WINDOWS_EPOCH,
                          timedelta=style in book.duration_styles)
    except (OverflowError, ValueError):
        return "#VALUE!"   # a date out of the calendar's range reads as the error a spreadsheet shows
