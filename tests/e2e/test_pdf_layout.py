"""report.pdf as it prints: page images, and the positions of its words.

Regression of the printed layout (no published values are involved). The sample site's PDF is
rendered to PNG images (poppler's ``pdftoppm``; kept under pytest's temporary folder and listed at
the end of the run, for a person to look at) and its words are read with their boxes (poppler's
``pdftotext -bbox``, in the order the PDF draws them). Checked, on every page:

- no two words overlap (the header cells of a narrow table column printed over each other did);
- no word and no ink lies in the side margins (a table or a long word running off the page);
- no word is broken inside (``medi`` / ``um``): two consecutive words that join into a word of the
  report, neither being one alone, are a word split by a too-narrow column.

The same checks run on a small inventory whose ``area`` is one unbroken word of 1,000 characters:
it must break inside the text block. (Longer words cost WeasyPrint time roughly with the square of
their length when they break; see the PDF time measured for a word at the cell limit,
:data:`audit.limits.MAX_CELL_CHARS`, in the report of this change.)
"""

from __future__ import annotations

import html as htmllib
import re
import subprocess
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import openpyxl
import pytest
from PIL import Image

from audit.cli import main
from audit.limits import MAX_CELL_CHARS

LONG = min(1000, MAX_CELL_CHARS)
"""Length of the unbroken word of the long-word case. [characters]"""

from .conftest import SAMPLE, keep_pictures, tool

MARGIN_PT = 13 / 25.4 * 72
"""Side margin of the print style sheet (13 mm). [pt]"""
DPI = 50
WORD = re.compile(r'<word xMin="([\d.]+)" yMin="([\d.]+)" xMax="([\d.]+)" yMax="([\d.]+)">(.*?)</word>')
PAGE = re.compile(r'<page width="([\d.]+)" height="([\d.]+)">(.*?)</page>', re.S)


@dataclass(frozen=True)
class Word:
    """One word of a PDF page and its box (origin top left). [pt]"""

    page: int
    x0: float
    y0: float
    x1: float
    y1: float
    text: str


@dataclass(frozen=True)
class Page:
    """A page's size [pt] and its words in drawing order."""

    number: int
    width: float
    height: float
    words: tuple[Word, ...]


def pdf_words(pdf: Path) -> list[Page]:
    """Every page of ``pdf`` with its words, from ``pdftotext -bbox``."""
    exe = tool("pdftotext")
    out = subprocess.run([exe, "-bbox", str(pdf), "-"], capture_output=True, text=True, check=True).stdout
    pages = []
    for n, (w, h, body) in enumerate(PAGE.findall(out), start=1):
        words = tuple(Word(n, float(a), float(b), float(c), float(d), htmllib.unescape(t))
                      for a, b, c, d, t in WORD.findall(body))
        pages.append(Page(n, float(w), float(h), words))
    return pages


def overlaps(page: Page, tol: float = 0.5) -> list[str]:
    """Pairs of words whose boxes overlap by more than ``tol`` [pt] both ways."""
    ws = sorted(page.words, key=lambda w: w.x0)
    found = []
    for i, a in enumerate(ws):
        for b in ws[i + 1:]:
            if b.x0 >= a.x1 - tol:
                break
            if min(a.x1, b.x1) - max(a.x0, b.x0) > tol and min(a.y1, b.y1) - max(a.y0, b.y0) > tol:
                found.append(f"page {page.number}: {a.text!r} over {b.text!r} at x {b.x0:.0f} pt, y {b.y0:.0f} pt")
    return found


def in_margins(page: Page, tol: float = 1.0) -> list[str]:
    """Words that reach into the left or right margin."""
    return [f"page {page.number}: {w.text[:30]!r} spans x {w.x0:.0f}..{w.x1:.0f} pt of {page.width:.0f}"
            for w in page.words if w.x0 < MARGIN_PT - tol or w.x1 > page.width - MARGIN_PT + tol]


def split_words(pages: list[Page], vocabulary: set[str]) -> list[str]:
    """Consecutive words that are the two halves of a word of ``vocabulary`` (neither one alone)."""
    found = []
    for p in pages:
        for a, b in zip(p.words, p.words[1:]):
            if b.y0 > a.y0 and a.text + b.text in vocabulary and a.text not in vocabulary and b.text not in vocabulary:
                found.append(f"page {p.number}: {a.text!r} / {b.text!r}")
    return found


def render_pages(pdf: Path, folder: Path) -> list[Path]:
    """PNG images of every page at :data:`DPI`, written into ``folder``."""
    exe = tool("pdftoppm")
    subprocess.run([exe, "-r", str(DPI), "-png", str(pdf), str(folder / "page")], check=True)
    return sorted(folder.glob("page-*.png"))


def ink_in_margins(png: Path) -> int:
    """Columns of pixels in the side margins (less 1 px) that hold anything darker than near-white."""
    img = np.asarray(Image.open(png).convert("L"))
    m = int(MARGIN_PT / 72 * DPI) - 1
    sides = np.concatenate([img[:, :m], img[:, -m:]], axis=1)
    return int((sides < 235).any(axis=0).sum())


def report_vocabulary(html: Path) -> set[str]:
    """Words of the report's text made of 3 letters or more (numbers and symbols left out)."""
    text = re.sub(r"<[^>]+>", " ", html.read_text(encoding="utf-8"))
    return {w for w in htmllib.unescape(text).split() if len(w) >= 3 and w.isalpha()}


@pytest.fixture(scope="module")
def sample_pages(sample_report) -> list[Page]:
    return pdf_words(sample_report / "report.pdf")


def test_sample_pdf_pages_as_images_have_clear_margins(sample_report, tmp_path_factory):
    folder = keep_pictures(tmp_path_factory.mktemp("sample-pdf-pages"))
    pngs = render_pages(sample_report / "report.pdf", folder)
    assert len(pngs) > 20
    assert {png.name: n for png in pngs if (n := ink_in_margins(png))} == {}, folder


def test_sample_pdf_no_two_words_overlap(sample_pages):
    assert sum(len(p.words) for p in sample_pages) > 5000
    found = [o for p in sample_pages for o in overlaps(p)]
    assert found == []


def test_sample_pdf_all_loops_header_reads_cell_by_cell(sample_pages):
    """The header of the 'All loops' table: every cell's words present, none over another."""
    page = next(p for p in sample_pages if any(w.text == "Findings" for w in p.words)
                and any(w.text == "Required" for w in p.words))
    head = [w for w in page.words if w.text in ("Band", "|S|", "[dB]", "Required", "Findings")]
    assert len(head) >= 6
    assert overlaps(Page(page.number, page.width, page.height, tuple(head))) == []



def test_sample_pdf_group_tables_read_cell_by_cell(sample_pages):
    """The 'Interacting loops' tables: the per-loop header's words all present and clear of each other, every
    column of each relative gain array headed by its tag (none pushed off the page)."""
    pages = [p for p in sample_pages if any(w.text == "Niederlinski" for w in p.words)]
    assert pages
    for page in pages:
        if not ({"alone", "[deg]", "Couplings"} <= {w.text for w in page.words}):
            continue
        head = [w for w in page.words if w.text in ("Ms", "GM", "PM", "alone", "group", "[dB]", "[deg]")]
        assert sum(w.text == "alone" for w in head) >= 3 and sum(w.text == "[deg]" for w in head) >= 2
        assert overlaps(Page(page.number, page.width, page.height, tuple(head))) == []
    rga = [p for p in sample_pages if any(w.text == "steady" for w in p.words)]
    assert rga
    for page in rga:
        assert in_margins(page) == []
        assert any(w.text.startswith("AIC-611") or w.text.startswith("PIC-331") for w in page.words)


def test_sample_pdf_words_stay_inside_the_text_block(sample_pages):
    assert [m for p in sample_pages for m in in_margins(p)] == []


def test_sample_pdf_breaks_no_word_inside(sample_pages, sample_report):
    vocab = report_vocabulary(sample_report / "report.html")
    assert {"medium", "Aeration", "unstable", "retune"} <= vocab
    assert split_words(sample_pages, vocab) == []


def test_long_unbroken_word_breaks_inside_the_page(tmp_path):
    wb = openpyxl.load_workbook(SAMPLE)
    ws = wb["loops"]
    heads = [c.value for c in ws[1]]
    ws.delete_rows(5, ws.max_row)                      # three loops
    ws.cell(row=2, column=heads.index("area") + 1).value = "W" * LONG
    wb.save(tmp_path / "long.xlsx")
    code = main(["run", str(tmp_path / "long.xlsx"), "--out", str(tmp_path / "out"), "--date", "2024-05-01",
                 "--quiet", "--no-history"])
    assert code in (0, 1)
    pages = pdf_words(tmp_path / "out" / "report.pdf")
    assert sum(w.text.count("W") for p in pages for w in p.words) >= LONG
    assert [m for p in pages for m in in_margins(p)] == []
    assert [o for p in pages for o in overlaps(p)] == []
    folder = keep_pictures(tmp_path / "pages")
    folder.mkdir()
    assert {png.name: n for png in render_pages(tmp_path / "out" / "report.pdf", folder)
            if (n := ink_in_margins(png))} == {}
