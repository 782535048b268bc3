"""Regression check for changes to the writers: two output folders of the same audit must read the same.

Usage::

    python benchmarks/compare_outputs.py BEFORE_DIR AFTER_DIR

Both folders come from ``plant-audit run`` on the same inventory with the same ``--date`` (e.g. one by
the code before a change, one after). Compared:

* ``report.html``: byte for byte; when the bytes differ, the visible text (tags dropped, white space
  collapsed) must be the same, and the differing SVG drawings are counted;
* ``results.xlsx`` (both read with openpyxl): sheet names and order, each sheet's used range, frozen
  cell, filter range and column widths, and for every cell its value (floats equal to 1e-15 relative:
  the earlier writer kept 16 significant digits, the present one the shortest exact text), kind
  (number, text, boolean, blank), number format, font (bold, size, colour), fill, alignment and quote
  prefix. An empty text cell and a blank cell both read as blank;
* ``results.csv``, ``results.json``: byte for byte.

Prints one line per file and exits 0 when everything matches, 1 otherwise.
A regression check that prints its findings, not a timed test.
"""

from __future__ import annotations

import argparse
import html.parser
import math
import re
from pathlib import Path

FLOAT_REL = 1e-15
"""Largest relative difference of two float cells taken as equal. [-]"""


class _Text(html.parser.HTMLParser):
    """Visible text of a page: everything outside tags, minus <style> contents."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.parts: list[str] = []
        self._skip = 0

    def handle_starttag(self, tag, attrs):
        if tag in ("style", "script"):
            self._skip += 1

    def handle_endtag(self, tag):
        if tag in ("style", "script"):
            self._skip -= 1

    def handle_data(self, data):
        if not self._skip:
            self.parts.append(data)


def visible_text(page: str) -> str:
    """The page's text as a reader sees it, white space collapsed."""
    p = _Text()
    p.feed(page)
    return " ".join(" ".join(p.parts).split())


def compare_html(a: Path, b: Path) -> tuple[bool, str]:
    """(same, message) for two report.html files."""
    x, y = a.read_bytes(), b.read_bytes()
    if x == y:
        return True, f"identical bytes ({len(x):,} B)"
    tx, ty = visible_text(x.decode()), visible_text(y.decode())
    svg = re.compile(r"<svg.*?</svg>", re.S)
    sx, sy = svg.findall(x.decode()), svg.findall(y.decode())
    diff = sum(1 for p, q in zip(sx, sy) if p != q) + abs(len(sx) - len(sy))
    if tx != ty:
        k = next((i for i, (p, q) in enumerate(zip(tx, ty)) if p != q), min(len(tx), len(ty)))
        return False, f"visible text differs at character {k}: {tx[k - 60:k + 60]!r} / {ty[k - 60:k + 60]!r}"
    return False, (f"bytes differ ({len(x):,} / {len(y):,} B); visible text identical; "
                   f"{diff} of {len(sx)} SVG drawings differ in markup")


def _kind(v) -> str:
    if v is None:
        return "blank"
    if isinstance(v, bool):
        return "bool"
    if isinstance(v, (int, float)):
        return "number"
    return "text"


def _same_value(p, q) -> bool:
    if isinstance(p, float) or isinstance(q, float):
        if isinstance(p, bool) or isinstance(q, bool) or not isinstance(p, (int, float)) \
                or not isinstance(q, (int, float)):
            return False
        return p == q or math.isclose(p, q, rel_tol=FLOAT_REL, abs_tol=0.0)
    return p == q


def _look(c) -> tuple:
    f, fill, al = c.font, c.fill, c.alignment
    colour = f.color.rgb if f is not None and f.color is not None and f.color.type == "rgb" else None
    fg = fill.fgColor.rgb if fill is not None and fill.patternType == "solid" else None
    return (c.number_format, bool(f.b), f.sz if f.sz != 11 else None, colour, fill.patternType if fg else None,
            fg, bool(al.wrap_text), al.vertical, bool(c.quotePrefix))


def compare_xlsx(a: Path, b: Path) -> tuple[bool, str]:
    """(same, message) for two results.xlsx files (values, kinds and look of every cell)."""
    import openpyxl

    wa, wb = openpyxl.load_workbook(a), openpyxl.load_workbook(b)
    if wa.sheetnames != wb.sheetnames:
        return False, f"sheets {wa.sheetnames} / {wb.sheetnames}"
    problems: list[str] = []
    cells = 0
    for name in wa.sheetnames:
        x, y = wa[name], wb[name]
        for what, p, q in (("rows", x.max_row, y.max_row), ("columns", x.max_column, y.max_column),
                           ("frozen", x.freeze_panes, y.freeze_panes), ("filter", x.auto_filter.ref, y.auto_filter.ref)):
            if p != q:
                problems.append(f"{name}: {what} {p} / {q}")
        wx = {k: d.width for k, d in x.column_dimensions.items() if d.customWidth}
        wy = {k: d.width for k, d in y.column_dimensions.items() if d.customWidth}
        if wx != wy:
            problems.append(f"{name}: column widths differ")
        for rx, ry in zip(x.iter_rows(max_row=max(x.max_row, y.max_row), max_col=max(x.max_column, y.max_column)),
                          y.iter_rows(max_row=max(x.max_row, y.max_row), max_col=max(x.max_column, y.max_column))):
            for cx, cy in zip(rx, ry):
                cells += 1
                if _kind(cx.value) != _kind(cy.value) or not _same_value(cx.value, cy.value):
                    problems.append(f"{name}!{cx.coordinate}: value {cx.value!r} / {cy.value!r}")
                elif cx.value is not None and _look(cx) != _look(cy):
                    problems.append(f"{name}!{cx.coordinate}: look {_look(cx)} / {_look(cy)}")
                if len(problems) > 20:
                    break
    if problems:
        return False, f"{len(problems)} differences (first: " + "; ".join(problems[:8]) + ")"
    return True, f"{len(wa.sheetnames)} sheets, {cells:,} cells: same values, kinds and look"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="Compare two output folders of the same audit.")
    ap.add_argument("before", type=Path)
    ap.add_argument("after", type=Path)
    args = ap.parse_args(argv)
    ok = True
    for name, fn in (("report.html", compare_html), ("results.xlsx", compare_xlsx)):
        same, msg = fn(args.before / name, args.after / name)
        ok &= same
        print(f"{name}: {'SAME' if same else 'DIFFERENT'}: {msg}")
    for name in ("results.csv", "results.json"):
        same = (args.before / name).read_bytes() == (args.after / name).read_bytes()
        ok &= same
        print(f"{name}: {'SAME' if same else 'DIFFERENT'}: {'identical bytes' if same else 'bytes differ'}")
    return 0 if ok else 1


if __name__ == "__main__":
    raise SystemExit(main())
