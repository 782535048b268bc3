"""results.xlsx: the results as a workbook for engineers who filter and sort.

Sheets: ``summary`` (run identity, caution, counts, policy), ``loops`` (every
inventory row with every results column, units in the headers), ``work list``
and ``invalid rows``. Headers are frozen and filterable.

Text from the inventory is untrusted: any string that could be read as a
formula (:func:`audit.safety.is_formula_like`), header or cell, is stored as an
inline string cell with the quote-prefix style, so spreadsheet programs show it
and never evaluate it; no cell of this workbook is ever a formula. Infinite
figures are written as the text ``inf``; missing ones are left blank.

The workbook is written directly as its Office Open XML parts (ECMA-376 Part 1,
SpreadsheetML) in one pass, a column of the results table at a time, instead of
through a cell-object model: a 2,000-loop workbook (about 200,000 cells) takes a
fraction of a second. Numbers are written with Python's shortest round-trip
text, so a cell holds exactly the float of the results.

References
----------
.. [1] ECMA International, ECMA-376 Office Open XML File Formats, Part 1, 5th ed., 2016,
   section 18.3 (worksheets), 18.8 (styles), 18.2 (workbook).
"""

from __future__ import annotations

import datetime as _dt
import re
import zipfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Sequence
from xml.sax.saxutils import escape as _xml_escape

import numpy as np
import pandas as pd

from .columns import RESULT_COLUMNS
from .output import plain
from .report import Report
from .safety import is_formula_like

NUMBER_FORMATS: dict[str, str] = {"dB": "0.0", "deg": "0.0", "-": "0.000", "s": "0.000", "rad/s": "0.0000"}
"""Number format by unit; frequencies below 0.001 rad/s switch to a scientific format."""

SMALL_FORMAT = "0.00E+00"
"""Format of a frequency (``0.0000`` column) with 0 < |value| < 1e-3."""

HEADER_COLOUR = "234E70"
"""Fill of the header cells (white bold text on it)."""

CAUTION = (
    "Advisory only: the figures rest on the process models and settings entered in the inventory.",
    "Any change to a running loop follows the site's management-of-change procedure and is reviewed by a "
    "qualified (where required, licensed) control engineer with operations present.",
    "Never apply to safety instrumented functions. Local codes and site procedures govern.",
)

#: Characters an XML 1.0 document cannot hold (C0 controls other than tab, line feed and carriage
#: return; lone surrogates; U+FFFE and U+FFFF): removed from every text cell.
ILLEGAL_CHARACTERS_RE = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\ud800-\udfff\ufffe\uffff]")

_MAIN_NS = "http://schemas.openxmlformats.org/spreadsheetml/2006/main"
_REL_NS = "http://schemas.openxmlformats.org/officeDocument/2006/relationships"
_PKG_REL_NS = "http://schemas.openxmlformats.org/package/2006/relationships"
_XML_HEAD = '<?xml version="1.0" encoding="UTF-8" standalone="yes"?>\n'


def cell_value(value: Any) -> Any:
    """A results value as a cell value.

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


def column_letter(j: int) -> str:
    """Spreadsheet column letters of a 1-based column number (1 -> A, 27 -> AA).

    Parameters
    ----------
    j : int
        Column number, 1-based.
    """
    out = ""
    while j > 0:
        j, r = divmod(j - 1, 26)
        out = chr(65 + r) + out
    return out


# ----------------------------------------------------------------------------- styles


@dataclass(frozen=True)
class CellStyle:
    """How a cell looks: font (``''`` normal, ``title``, ``header``), number format (``''`` General),
    quote prefix (text shown as typed, never evaluated)."""

    font: str = ""
    number_format: str = ""
    quote: bool = False


PLAIN = CellStyle()
TITLE = CellStyle("title")
HEADER = CellStyle("header")

_FONTS = {  # font id, XML
    "": (0, '<font><name val="Calibri"/><family val="2"/><color theme="1"/><sz val="11"/><scheme val="minor"/></font>'),
    "title": (1, '<font><b val="1"/><sz val="14"/></font>'),
    "header": (2, '<font><b val="1"/><color rgb="00FFFFFF"/></font>'),
}
_BUILTIN_FORMATS = {"": 0, "0.00E+00": 11}


@dataclass
class Styles:
    """The cell formats used in a workbook, numbered as they are first asked for (0 is the default)."""

    ids: dict[CellStyle, int] = field(default_factory=lambda: {PLAIN: 0})

    def id(self, style: CellStyle) -> int:
        """The ``s`` attribute of cells of this style.

        Parameters
        ----------
        style : CellStyle
            The style.
        """
        got = self.ids.get(style)
        if got is None:
            got = self.ids[style] = len(self.ids)
        return got

    def xml(self) -> str:
        """The styles part (``xl/styles.xml``)."""
        custom: dict[str, int] = {}
        for st in self.ids:
            if st.number_format and st.number_format not in _BUILTIN_FORMATS:
                custom.setdefault(st.number_format, 164 + len(custom))
        fmts = "".join(f'<numFmt numFmtId="{i}" formatCode="{_xml_escape(code, {chr(34): "&quot;"})}"/>'
                       for code, i in custom.items())
        xfs = []
        for st in self.ids:
            num = _BUILTIN_FORMATS.get(st.number_format, custom.get(st.number_format, 0))
            font = _FONTS[st.font][0]
            fill = 2 if st.font == "header" else 0
            attrs = f'numFmtId="{num}" fontId="{font}" fillId="{fill}" borderId="0" xfId="0"'
            if num:
                attrs += ' applyNumberFormat="1"'
            if font:
                attrs += ' applyFont="1"'
            if fill:
                attrs += ' applyFill="1"'
            if st.quote:
                attrs += ' quotePrefix="1"'
            if st.font == "header":
                xfs.append(f'<xf {attrs} applyAlignment="1"><alignment vertical="top" wrapText="1"/></xf>')
            else:
                xfs.append(f"<xf {attrs}/>")
        return (f'{_XML_HEAD}<styleSheet xmlns="{_MAIN_NS}">'
                + (f'<numFmts count="{len(custom)}">{fmts}</numFmts>' if custom else "")
                + f'<fonts count="{len(_FONTS)}">' + "".join(x for _, x in _FONTS.values()) + "</fonts>"
                '<fills count="3"><fill><patternFill patternType="none"/></fill>'
                '<fill><patternFill patternType="gray125"/></fill>'
                f'<fill><patternFill patternType="solid"><fgColor rgb="00{HEADER_COLOUR}"/></patternFill></fill></fills>'
                '<borders count="1"><border><left/><right/><top/><bottom/><diagonal/></border></borders>'
                '<cellStyleXfs count="1"><xf numFmtId="0" fontId="0" fillId="0" borderId="0"/></cellStyleXfs>'
                f'<cellXfs count="{len(xfs)}">' + "".join(xfs) + "</cellXfs>"
                '<cellStyles count="1"><cellStyle name="Normal" xfId="0" builtinId="0"/></cellStyles>'
                "</styleSheet>")


# ----------------------------------------------------------------------------- cells


def _text_xml(ref: str, text: str, s: int) -> str:
    """An inline string cell; the text escaped (a carriage return kept as a character reference)."""
    esc = _xml_escape(text).replace("\r", "&#13;")
    sa = f' s="{s}"' if s else ""
    return f'<c r="{ref}"{sa} t="inlineStr"><is><t xml:space="preserve">{esc}</t></is></c>'


def cell_xml(ref: str, value: Any, styles: Styles, style: CellStyle = PLAIN) -> str:
    """One cell as SpreadsheetML; '' for a blank.

    Parameters
    ----------
    ref : str
        Cell reference, e.g. ``B7``.
    value : Any
        A results value, converted by :func:`cell_value`.
    styles : Styles
        The workbook's styles (a new combination is added to it).
    style : CellStyle
        Font and number format; the number format applies to floats only (``0.0000`` becomes
        ``0.00E+00`` for 0 < |value| < 1e-3), and formula-like text gets the quote prefix.
    """
    v = cell_value(value)
    if v is None:
        return ""
    if isinstance(v, str):
        if not v:
            return ""
        st = CellStyle(style.font, "", is_formula_like(v))
        return _text_xml(ref, v, styles.id(st))
    if isinstance(v, bool):
        s = styles.id(CellStyle(style.font))
        return f'<c r="{ref}"{f" s={chr(34)}{s}{chr(34)}" if s else ""} t="b"><v>{int(v)}</v></c>'
    fmt = ""
    if isinstance(v, float):
        fmt = style.number_format
        if fmt == "0.0000" and 0 < abs(v) < 1e-3:
            fmt = SMALL_FORMAT
    s = styles.id(CellStyle(style.font, fmt))
    return f'<c r="{ref}"{f" s={chr(34)}{s}{chr(34)}" if s else ""}><v>{v!r}</v></c>'


def _float_column(letter: str, values: np.ndarray, styles: Styles, number_format: str) -> list[str]:
    """Cells of a float column, vectorised: blank for NaN, text for infinities, numbers in their format."""
    out = [""] * len(values)
    finite = np.isfinite(values)
    if number_format:
        s = styles.id(CellStyle("", number_format))
        sa = f' s="{s}"' if s else ""
        small = np.zeros(len(values), bool)
        if number_format == "0.0000":
            with np.errstate(invalid="ignore"):
                small = finite & (np.abs(values) < 1e-3) & (values != 0)
        s_small = styles.id(CellStyle("", SMALL_FORMAT)) if small.any() else 0
        sa_small = f' s="{s_small}"'
    else:
        sa = sa_small = ""
        small = np.zeros(len(values), bool)
    lst = values.tolist()
    for i in np.flatnonzero(finite & ~small).tolist():
        out[i] = f'<c r="{letter}{i + 2}"{sa}><v>{lst[i]!r}</v></c>'
    for i in np.flatnonzero(small).tolist():
        out[i] = f'<c r="{letter}{i + 2}"{sa_small}><v>{lst[i]!r}</v></c>'
    for i in np.flatnonzero(np.isinf(values)).tolist():
        out[i] = _text_xml(f"{letter}{i + 2}", "inf" if lst[i] > 0 else "-inf", 0)
    return out


def _object_column(letter: str, values: list, styles: Styles, number_format: str) -> list[str]:
    """Cells of any other column, one by one (text, booleans, integers, mixed values)."""
    style = CellStyle("", number_format)
    quoted = styles.id(CellStyle(quote=True))
    out = []
    for i, v in enumerate(values, start=2):
        t = type(v)
        if v is None or (t is str and not v):
            out.append("")
        elif t is str:   # the common case, as cell_xml would write it
            v = ILLEGAL_CHARACTERS_RE.sub("", v)
            out.append(_text_xml(f"{letter}{i}", v, quoted if is_formula_like(v) else 0) if v else "")
        elif t is bool:
            out.append(f'<c r="{letter}{i}" t="b"><v>{int(v)}</v></c>')
        else:
            out.append(cell_xml(f"{letter}{i}", v, styles, style))
    return out


# ----------------------------------------------------------------------------- sheets


@dataclass
class Sheet:
    """One worksheet being written: rows of cell XML, column widths, frozen header, filter range."""

    name: str
    rows: list[str] = field(default_factory=list)
    widths: dict[int, float] = field(default_factory=dict)
    freeze: str = ""            # top-left cell of the scrolling part, e.g. "B2"; '' none
    filter_ref: str = ""        # e.g. "A1:K996"; '' none
    last_col: int = 1
    last_row: int = 1

    def add_row(self, r: int, cells: Iterable[str]) -> None:
        """Append row ``r`` (1-based, ascending) made of cell XML ('' are blanks).

        Parameters
        ----------
        r : int
            Row number.
        cells : iterable of str
            The row's cells, from :func:`cell_xml`.
        """
        body = "".join(cells)
        if body:
            self.rows.append(f'<row r="{r}">{body}</row>')
            self.last_row = max(self.last_row, r)

    def xml(self, selected: bool) -> str:
        """The worksheet part."""
        dim = f"A1:{column_letter(self.last_col)}{self.last_row}"
        tab = ' tabSelected="1"' if selected else ""
        if self.freeze:
            m = re.fullmatch(r"([A-Z]+)(\d+)", self.freeze)
            cols = sum((ord(ch) - 64) * 26 ** k for k, ch in enumerate(reversed(m.group(1)))) - 1
            rows = int(m.group(2)) - 1
            split = (f' xSplit="{cols}"' if cols else "") + (f' ySplit="{rows}"' if rows else "")
            pane = "bottomRight" if cols and rows else ("bottomLeft" if rows else "topRight")
            view = (f'<pane{split} topLeftCell="{self.freeze}" activePane="{pane}" state="frozen"/>'
                    f'<selection pane="{pane}" activeCell="A1" sqref="A1"/>')
        else:
            view = '<selection activeCell="A1" sqref="A1"/>'
        cols = "".join(f'<col min="{j}" max="{j}" width="{w:g}" customWidth="1"/>'
                       for j, w in sorted(self.widths.items()))
        return (f'{_XML_HEAD}<worksheet xmlns="{_MAIN_NS}" xmlns:r="{_REL_NS}">'
                f'<dimension ref="{dim}"/><sheetViews><sheetView{tab} workbookViewId="0">{view}</sheetView>'
                '</sheetViews><sheetFormatPr defaultRowHeight="15"/>'
                + (f"<cols>{cols}</cols>" if cols else "")
                + "<sheetData>" + "".join(self.rows) + "</sheetData>"
                + (f'<autoFilter ref="{self.filter_ref}"/>' if self.filter_ref else "")
                + '<pageMargins left="0.75" right="0.75" top="1" bottom="1" header="0.5" footer="0.5"/>'
                "</worksheet>")


def _header_cells(names: Sequence[str], styles: Styles) -> list[str]:
    return [cell_xml(f"{column_letter(j)}1", name, styles, HEADER) for j, name in enumerate(names, start=1)]


def _finish_table(sheet: Sheet, headers: Sequence[str], n_rows: int, widths: Sequence[float] = ()) -> None:
    """Frozen header (and first column when wider than two), filter over the table, column widths."""
    n = max(len(headers), 1)
    sheet.last_col = max(sheet.last_col, n)
    sheet.freeze = "B2" if len(headers) > 2 else "A2"
    sheet.filter_ref = f"A1:{column_letter(n)}{n_rows + 1}"
    for j, h in enumerate(headers, start=1):
        sheet.widths[j] = widths[j - 1] if j - 1 < len(widths) else min(max(len(str(h)) + 2, 9), 40)


def _table(name: str, headers: Sequence[str], rows: Iterable[Sequence[Any]], styles: Styles,
           widths: Sequence[float] = ()) -> Sheet:
    """A sheet holding one small table, written cell by cell: header in row 1, frozen, with a filter."""
    sheet = Sheet(name)
    sheet.add_row(1, _header_cells(headers, styles))
    letters = [column_letter(j) for j in range(1, len(headers) + 1)]
    n = 0
    for i, values in enumerate(rows, start=2):
        n = i - 1
        sheet.add_row(i, [cell_xml(f"{letters[j] if j < len(letters) else column_letter(j + 1)}{i}", v, styles)
                          for j, v in enumerate(values)])
    _finish_table(sheet, headers, n, widths)
    return sheet


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


def _unit_header(name: str, series: pd.Series) -> tuple[str, str]:
    """Header text (with the unit) and the number format of a floating-point column ('' none)."""
    col = next((c for c in RESULT_COLUMNS if c.name == name), None)
    numeric = pd.api.types.is_float_dtype(series.dtype)
    if col is None:
        return name, NUMBER_FORMATS["-"] if numeric else ""
    if col.unit == "-" and not numeric:
        return name, ""
    return f"{name} [{col.unit}]", (NUMBER_FORMATS.get(col.unit) or "") if numeric else ""


def _loops_sheet(results: pd.DataFrame, styles: Styles) -> Sheet:
    """The ``loops`` sheet, built a column at a time (float columns vectorised)."""
    res = results.reset_index(drop=True)
    cols = loop_columns(res)
    heads = [_unit_header(c, res[c]) for c in cols]
    columns = []
    for j, (c, (_, fmt)) in enumerate(zip(cols, heads), start=1):
        s = res[c]
        letter = column_letter(j)
        if s.dtype == np.float64:
            columns.append(_float_column(letter, s.to_numpy(), styles, fmt))
        else:
            columns.append(_object_column(letter, s.astype(object).tolist(), styles, fmt))
    sheet = Sheet("loops")
    sheet.add_row(1, _header_cells([h for h, _ in heads], styles))
    for i, cells in enumerate(zip(*columns), start=2):
        sheet.add_row(i, cells)
    _finish_table(sheet, [h for h, _ in heads], len(res))
    return sheet


def _summary(report: Report, styles: Styles) -> Sheet:
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
    sheet = Sheet("summary")
    for i, line in enumerate(lines, start=1):
        sheet.add_row(i, [cell_xml(f"{column_letter(j)}{i}", v, styles, TITLE if (i, j) == (1, 1) else PLAIN)
                          for j, v in enumerate(line, start=1)])
        sheet.last_col = max(sheet.last_col, len(line))
    sheet.widths.update({1: 26, 2: 70, **{j: 12 for j in range(3, 9)}})
    return sheet


# ----------------------------------------------------------------------------- the package


def _quote_sheet(name: str) -> str:
    return "'" + name.replace("'", "''") + "'"


def _absolute(ref: str) -> str:
    return ":".join(re.sub(r"([A-Z]+)(\d+)", r"$\1$\2", part) for part in ref.split(":"))


_THEME: list[str] = []


def _default_theme() -> str:
    """The default Office theme (the part the default font refers to), as openpyxl ships it.

    Read from openpyxl's module file without importing the openpyxl package: the package's import
    (about 0.2 s of CPU) would be the only use of openpyxl in a run, the inventory being read directly
    (:mod:`audit.xlsx_in`). The module is a single string constant; any surprise falls back to the import.
    """
    if not _THEME:
        try:
            import importlib.util
            from pathlib import Path as _Path
            found = importlib.util.find_spec("openpyxl")        # finds the package without importing it
            spec = importlib.util.spec_from_file_location(
                "_plant_audit_openpyxl_theme", _Path(found.origin).parent / "writer" / "theme.py")
            module = importlib.util.module_from_spec(spec)
            spec.loader.exec_module(module)
            text = module.theme_xml
            if not (isinstance(text, str) and "<a:theme" in text):
                raise ValueError("unexpected theme module")
        except Exception:
            from openpyxl.writer.theme import theme_xml as text
        _THEME.append(text)
    return _THEME[0]


def _package_parts(sheets: Sequence[Sheet], styles: Styles, creator: str) -> Iterable[tuple[str, str]]:
    """(part name, XML) of every part of the package, worksheets last."""
    theme_xml = _default_theme()

    n = len(sheets)
    ws_type = "application/vnd.openxmlformats-officedocument.spreadsheetml.worksheet+xml"
    yield "[Content_Types].xml", (
        f'{_XML_HEAD}<Types xmlns="http://schemas.openxmlformats.org/package/2006/content-types">'
        '<Default Extension="rels" ContentType="application/vnd.openxmlformats-package.relationships+xml"/>'
        '<Default Extension="xml" ContentType="application/xml"/>'
        '<Override PartName="/xl/workbook.xml" '
        'ContentType="application/vnd.openxmlformats-officedocument.spreadsheetml.sheet.main+xml"/>'
        + "".join(f'<Override PartName="/xl/worksheets/sheet{k}.xml" ContentType="{ws_type}"/>'
                  for k in range(1, n + 1))
        + '<Override PartName="/xl/theme/theme1.xml" '
        'ContentType="application/vnd.openxmlformats-officedocument.theme+xml"/>'
        '<Override PartName="/xl/styles.xml" '
        'ContentType="application/vnd.openxmlformats-officedocument.spreadsheetml.styles+xml"/>'
        '<Override PartName="/docProps/core.xml" '
        'ContentType="application/vnd.openxmlformats-package.core-properties+xml"/>'
        '<Override PartName="/docProps/app.xml" '
        'ContentType="application/vnd.openxmlformats-officedocument.extended-properties+xml"/></Types>')
    yield "_rels/.rels", (
        f'{_XML_HEAD}<Relationships xmlns="{_PKG_REL_NS}">'
        '<Relationship Id="rId1" Type="http://schemas.openxmlformats.org/officeDocument/2006/relationships/'
        'officeDocument" Target="xl/workbook.xml"/>'
        '<Relationship Id="rId2" Type="http://schemas.openxmlformats.org/package/2006/relationships/metadata/'
        'core-properties" Target="docProps/core.xml"/>'
        '<Relationship Id="rId3" Type="http://schemas.openxmlformats.org/officeDocument/2006/relationships/'
        'extended-properties" Target="docProps/app.xml"/></Relationships>')
    now = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    yield "docProps/core.xml", (
        f'{_XML_HEAD}<cp:coreProperties xmlns:cp="http://schemas.openxmlformats.org/package/2006/metadata/'
        'core-properties" xmlns:dc="http://purl.org/dc/elements/1.1/" xmlns:dcterms="http://purl.org/dc/terms/" '
        'xmlns:xsi="http://www.w3.org/2001/XMLSchema-instance">'
        f"<dc:creator>{_xml_escape(creator)}</dc:creator>"
        f'<dcterms:created xsi:type="dcterms:W3CDTF">{now}</dcterms:created>'
        f'<dcterms:modified xsi:type="dcterms:W3CDTF">{now}</dcterms:modified></cp:coreProperties>')
    yield "docProps/app.xml", (
        f'{_XML_HEAD}<Properties xmlns="http://schemas.openxmlformats.org/officeDocument/2006/extended-properties">'
        f"<Application>{_xml_escape(creator)}</Application></Properties>")
    names = "".join(
        f'<definedName name="_xlnm._FilterDatabase" localSheetId="{k}" hidden="1">'
        f"{_xml_escape(_quote_sheet(s.name))}!{_absolute(s.filter_ref)}</definedName>"
        for k, s in enumerate(sheets) if s.filter_ref)
    yield "xl/workbook.xml", (
        f'{_XML_HEAD}<workbook xmlns="{_MAIN_NS}" xmlns:r="{_REL_NS}">'
        '<bookViews><workbookView activeTab="0"/></bookViews><sheets>'
        + "".join(f'<sheet name="{_xml_escape(s.name)}" sheetId="{k}" r:id="rId{k}"/>'
                  for k, s in enumerate(sheets, start=1))
        + "</sheets>" + (f"<definedNames>{names}</definedNames>" if names else "")
        + '<calcPr calcId="124519" fullCalcOnLoad="1"/></workbook>')
    rel = "http://schemas.openxmlformats.org/officeDocument/2006/relationships/"
    yield "xl/_rels/workbook.xml.rels", (
        f'{_XML_HEAD}<Relationships xmlns="{_PKG_REL_NS}">'
        + "".join(f'<Relationship Id="rId{k}" Type="{rel}worksheet" Target="worksheets/sheet{k}.xml"/>'
                  for k in range(1, n + 1))
        + f'<Relationship Id="rId{n + 1}" Type="{rel}styles" Target="styles.xml"/>'
        f'<Relationship Id="rId{n + 2}" Type="{rel}theme" Target="theme/theme1.xml"/></Relationships>')
    yield "xl/theme/theme1.xml", theme_xml
    yield "xl/styles.xml", styles.xml()
    for k, s in enumerate(sheets, start=1):
        yield f"xl/worksheets/sheet{k}.xml", s.xml(selected=k == 1)


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
    styles = Styles()
    sheets = [_summary(report, styles), _loops_sheet(audit.results, styles)]

    work_heads = ["rank" if report.work.ranked else "position", "row", "tag", "area", "criticality", "status",
                  "reason", "action", "expected_improvement", "verdict", "proposal_settings"]
    work_rows = ([it.rank if report.work.ranked else it.position, it.row, it.tag, it.area, it.criticality,
                  it.status, it.reason, it.action, it.expected_improvement, it.verdict, it.proposal_settings]
                 for it in report.work.items)
    sheets.append(_table("work list", work_heads, work_rows, styles,
                         widths=(9, 7, 16, 14, 11, 11, 60, 30, 12, 20, 40)))
    inv_rows = ([v.row, v.sheet, v.tag, m] for v in report.invalid for m in (v.messages or ("",)))
    sheets.append(_table("invalid rows", ["row", "sheet", "tag", "message"], inv_rows, styles,
                         widths=(7, 12, 16, 100)))

    creator = f"{report.cover.tool} {report.cover.tool_version}"
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED, compresslevel=1) as zf:
        for name, xml in _package_parts(sheets, styles, creator):
            zf.writestr(name, xml.encode("utf-8"))
    return path
