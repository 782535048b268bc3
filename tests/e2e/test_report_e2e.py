"""End to end: `plant-audit run` on the sample site and on a hostile inventory; the report files read back.

Regression of the report outputs (no published values are involved): every loop is named, the caution is
present, inventory text stays inert in HTML, PDF, xlsx and CSV, and two runs with the same --date give the
same HTML.
"""

from __future__ import annotations

import csv
import re
from pathlib import Path

import openpyxl
import pytest
from pypdf import PdfReader

from audit.cli import main

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample_site" / "loops.xlsx"
CAUTION = ("Advisory only", "management-of-change", "safety instrumented function", "Local rules govern")
HOSTILE = {"tag": "<script>alert('x')</script>", "service": '=HYPERLINK("http://example.invalid","open")',
           "area": "+cmd|' /C calc'!A0 <b>"}


def run(inventory: Path, out: Path, *extra: str) -> int:
    return main(["run", str(inventory), "--out", str(out), "--date", "2024-05-01", "--site", "Larkmoor Water Reclamation Works",
                 "--quiet", "--no-history", *extra])


def sample_tags() -> list[str]:
    ws = openpyxl.load_workbook(SAMPLE, read_only=True)["loops"]
    rows = list(ws.iter_rows(values_only=True))
    i = list(rows[0]).index("tag")
    return [str(r[i]) for r in rows[1:] if r and r[i] not in (None, "")]


@pytest.fixture(scope="module")
def sample_runs(tmp_path_factory):
    a, b = tmp_path_factory.mktemp("a"), tmp_path_factory.mktemp("b")
    codes = [run(SAMPLE, a), run(SAMPLE, b, "--no-pdf", "--jobs", "2")]  # serial with the PDF, and pooled
    assert all(c in (0, 1) for c in codes)
    return a, b


def test_sample_html_names_every_loop_and_carries_the_caution(sample_runs):
    html = (sample_runs[0] / "report.html").read_text(encoding="utf-8")
    assert "<svg" in html and "matplotlib" not in html.lower()
    for tag in sample_tags():
        assert f">{tag}<" in html, tag
    for words in CAUTION:
        assert words in html
    assert not re.search(r"""(src|href)\s*=\s*["']?(https?:|//)""", html)
    assert "<script" not in html.lower()


def test_same_date_gives_identical_html_serial_or_pooled(sample_runs):
    a, b = sample_runs
    assert (a / "report.html").read_bytes() == (b / "report.html").read_bytes()


def test_sample_workbook_has_every_row_and_no_formula(sample_runs):
    wb = openpyxl.load_workbook(sample_runs[0] / "results.xlsx")
    assert wb["loops"].max_row - 1 == len(sample_tags())
    assert all(c.data_type != "f" for ws in wb.worksheets for row in ws.iter_rows() for c in row)


def hostile_inventory(folder: Path, n: int = 4) -> Path:
    """The sample workbook cut to its first ``n`` loops, the first one's text cells made hostile."""
    wb = openpyxl.load_workbook(SAMPLE)
    ws = wb["loops"]
    heads = [c.value for c in ws[1]]
    ws.delete_rows(n + 2, ws.max_row)
    for name, text in HOSTILE.items():
        ws.cell(row=2, column=heads.index(name) + 1).value = text
        ws.cell(row=2, column=heads.index(name) + 1).data_type = "s"
    path = folder / "hostile.xlsx"
    wb.save(path)
    return path


@pytest.fixture(scope="module")
def hostile_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("hostile")
    inv = hostile_inventory(folder)
    out = folder / "out"
    assert run(inv, out, "--detail", "all", "--no-pdf") in (0, 1)
    ws = openpyxl.load_workbook(inv, read_only=True)["loops"]
    rows = list(ws.iter_rows(values_only=True))
    tags = [str(r[0]) for r in rows[1:] if r and r[0]]
    return out, tags


def test_hostile_text_is_escaped_in_html(hostile_run):
    out, _ = hostile_run
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "<script" not in html.lower() and "<b>" not in html
    assert "&lt;script&gt;alert(&#39;x&#39;)&lt;/script&gt;" in html


def test_hostile_text_is_plain_text_in_xlsx_and_csv(hostile_run):
    out, _ = hostile_run
    wb = openpyxl.load_workbook(out / "results.xlsx")
    cells = [c for ws in wb.worksheets for row in ws.iter_rows() for c in row]
    assert all(c.data_type != "f" for c in cells)
    assert HOSTILE["service"] in {c.value for c in cells}
    with open(out / "results.csv", newline="", encoding="utf-8") as fh:
        values = [v for row in csv.reader(fh) for v in row]
    assert "'" + HOSTILE["service"] in values and HOSTILE["service"] not in values
    assert "'" + HOSTILE["area"] in values


def test_sample_pdf_names_every_loop_and_carries_the_caution(sample_runs):
    reader = PdfReader(sample_runs[0] / "report.pdf")
    text = " ".join(" ".join((p.extract_text() or "").split()) for p in reader.pages)
    for tag in sample_tags():
        assert tag in text, tag
    for words in CAUTION:
        assert words in text
    first = " ".join((reader.pages[0].extract_text() or "").split())
    assert "Advisory only" in first
    assert re.search(r"page 2 of \d+", text)
    # the detail pages carry their charts: axis titles with units are text in the PDF
    assert "frequency ω [rad/s]" in text and "time [s]" in text


def test_sample_groups_of_interacting_loops(sample_runs):
    """The sample's couplings sheet: two groups, each with its section, and the group verdicts in results.csv."""
    html = (sample_runs[0] / "report.html").read_text(encoding="utf-8")
    for gid in ("g1", "g2"):
        assert f'id="group-{gid}"' in html
    assert "Generalised Nyquist curve of group G1" in html
    with open(sample_runs[0] / "results.csv", newline="", encoding="utf-8") as f:
        rows = {r["tag"]: r for r in csv.DictReader(f)}
    assert rows["AIC-611"]["status_alone"] == "passes" and rows["AIC-611"]["status"] == "fails"
    assert "passes alone, fails with its group G1 closed" in rows["AIC-611"]["findings"]
    assert rows["PIC-331"]["status"] == "unstable" and rows["PIC-331"]["group_stable"] == "false"
    assert rows["FIC-102"]["group_id"] == ""


def test_sample_models_against_plant_data(sample_runs):
    """The sample site's records: the stale dead time is disputed, the small bump not identifiable,
    the bump tests confirmed; the report carries the site summary and each loop's part."""
    import csv
    rows = {r["tag"]: r for r in csv.DictReader((sample_runs[0] / "results.csv").open(encoding="utf-8"))}
    assert rows["TIC-607"]["model_check"] == "disputed" and float(rows["TIC-607"]["dead_time_diff_s"]) > 30
    assert "re-identify the model" in rows["TIC-607"]["action"]
    assert rows["AIC-407"]["model_check"] == "not identifiable" and "op moved only" in rows["AIC-407"]["data_note"]
    assert rows["FIC-102"]["model_check"] == "confirmed" and rows["LIC-411"]["id_model"] == "ipdt"
    html = (sample_runs[0] / "report.html").read_text(encoding="utf-8")
    assert "Models against plant data" in html and "13 loops with a logged record" in html   # 8 plant records + 5 operating records
    section = html[html.index('id="loop-tic-607'):]
    section = section[:section.index("</section>")]
    assert "Model against plant data" in section and "<polyline" in section and "disputed" in section
