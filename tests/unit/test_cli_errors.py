"""Hostile corpus, user mistakes: every subcommand answers a bad value with exit 2 and one plain line.

Exit 3 is kept for internal faults (README, "Exit codes"); a mistake the user can fix never
prints "internal error" or a traceback, and changes nothing on disk. Also: files the user
already has are never replaced without ``--force``. The expectations are the project's own rules
(common practice for command-line tools: refuse clearly, lose nothing).
"""

from __future__ import annotations

import csv
import sqlite3
import zipfile
from pathlib import Path

import pytest
from openpyxl import Workbook

from audit.cli import main

HEADER = ["tag", "model", "gain", "tau1_s", "dead_time_s", "kc", "ti_s", "action"]
ROWS = [HEADER, ["FIC-1", "fopdt", 1.0, 10, 1, 0.5, 10, "reverse"], ["FIC-2", "fopdt", 2.0, 50, 5, 0.4, 40, "reverse"]]


def one_line_exit_2(capsys, argv: list[str], *fragments: str) -> str:
    code = main(argv)
    captured = capsys.readouterr()
    err = captured.err.strip()
    assert code == 2, (argv, code, err)
    assert "internal error" not in err and "Traceback" not in err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    if lines and lines[0].startswith("Usage:"):  # click's usage line, then its one-line error
        lines = [ln for ln in lines if ln.startswith("Error:")]
    assert len(lines) == 1, err
    for f in fragments:
        assert f in err, (f, err)
    return err


@pytest.fixture()
def inv(tmp_path) -> Path:
    path = tmp_path / "loops.csv"
    with open(path, "w", newline="") as fh:
        csv.writer(fh).writerows(ROWS)
    return path


@pytest.fixture()
def record(tmp_path) -> Path:
    path = tmp_path / "rec.csv"
    with open(path, "w") as fh:
        fh.write("time_s,value\n")
        for i in range(400):
            fh.write(f"{i},{(i * 37) % 11 * 0.3:.2f}\n")
    return path


RUN = ["--quiet", "--no-pdf", "--no-history"]


@pytest.mark.parametrize("date", ["2026-02-30", "2026-13-01", "yesterday", "2026/01/05"])
def test_run_date_not_a_calendar_date(capsys, inv, tmp_path, date):
    one_line_exit_2(capsys, ["run", str(inv), "--out", str(tmp_path / "o"), *RUN, "--date", date],
                    "--date", "not a date YYYY-MM-DD")
    assert not (tmp_path / "o").exists()


@pytest.mark.parametrize("allowed", ["inf", "-inf", "nan", "0", "-1", "1e999", "ten"])
def test_disturbance_allowed_must_be_finite_and_positive(capsys, record, allowed):
    one_line_exit_2(capsys, ["disturbance", str(record), "--allowed", allowed], "--allowed")


def test_disturbance_plot_is_svg_and_never_the_record(capsys, record, tmp_path):
    original = record.read_bytes()
    one_line_exit_2(capsys, ["disturbance", str(record), "--allowed", "1", "--plot", str(record)], "record itself")
    one_line_exit_2(capsys, ["disturbance", str(record), "--allowed", "1", "--plot", str(tmp_path / "p.png")],
                    "must end in .svg")
    assert record.read_bytes() == original
    assert main(["disturbance", str(record), "--allowed", "1", "--plot", str(tmp_path / "p.svg")]) == 0
    assert (tmp_path / "p.svg").read_text().lstrip().startswith("<?xml")


@pytest.mark.parametrize("url,fragment", [
    ("postgresql://u@h:notaport/db", "not a database URL"),
    ("://x", "not a database URL"),
    ("sqlite://", "in-memory database"),
    ("sqlite:///:memory:", "in-memory database"),
    ("sqlite:////no/such/folder/h.sqlite", "does not exist"),
])
def test_run_malformed_history_url(capsys, inv, tmp_path, url, fragment):
    one_line_exit_2(capsys, ["run", str(inv), "--out", str(tmp_path / "o"), "--quiet", "--no-pdf",
                             "--history", url], fragment)
    assert not (tmp_path / "o").exists()


@pytest.mark.parametrize("url", ["postgresql://u@h:notaport/db", "://x", "sqlite://"])
def test_history_command_malformed_url(capsys, url):
    one_line_exit_2(capsys, ["history", "--db", url], "history")


def test_history_a_folder(capsys, inv, tmp_path):
    one_line_exit_2(capsys, ["run", str(inv), "--out", str(tmp_path / "o"), "--quiet", "--no-pdf",
                             "--history", str(tmp_path)], "not a regular file")
    one_line_exit_2(capsys, ["history", "--db", str(tmp_path)], "not a regular file")


@pytest.mark.parametrize("column,value", [("results_json", "{bad"), ("model_json", "[1, 2"),
                                          ("results_json", "[]"), ("inputs_json", "")])
def test_damaged_history_json(capsys, inv, tmp_path, column, value):
    hist, out = tmp_path / "h.sqlite", tmp_path / "o"
    assert main(["run", str(inv), "--out", str(out), "--quiet", "--no-pdf", "--history", str(hist)]) == 0
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    with sqlite3.connect(hist) as con:
        con.execute(f"UPDATE audit_rows SET {column} = ? WHERE position = 0", (value,))
    with sqlite3.connect(hist) as con:
        snapshot = con.execute("SELECT * FROM audit_rows ORDER BY id").fetchall()
    one_line_exit_2(capsys, ["history", "--db", str(hist), "--tag", "FIC-1"], "damaged")
    one_line_exit_2(capsys, ["run", str(inv), "--out", str(out), "--quiet", "--no-pdf", "--history", str(hist)],
                    "damaged", "restore the history")
    with sqlite3.connect(hist) as con:
        assert con.execute("SELECT * FROM audit_rows ORDER BY id").fetchall() == snapshot
        assert con.execute("SELECT COUNT(*) FROM audits").fetchone()[0] == 1
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before


def test_damaged_policy_json_in_history(capsys, inv, tmp_path):
    hist = tmp_path / "h.sqlite"
    assert main(["run", str(inv), "--out", str(tmp_path / "o"), "--quiet", "--no-pdf", "--history", str(hist)]) == 0
    with sqlite3.connect(hist) as con:
        con.execute("UPDATE audits SET policy_json = '{'")
    one_line_exit_2(capsys, ["run", str(inv), "--out", str(tmp_path / "o2"), "--quiet", "--no-pdf",
                             "--history", str(hist)], "policy of audit 1", "damaged")
    assert not (tmp_path / "o2").exists()


def test_csv_in_neither_utf8_nor_cp1252(capsys, tmp_path):
    path = tmp_path / "loops.csv"
    path.write_bytes(b"tag,model\n\x81\x8d\x8f,fopdt\n")  # bytes cp1252 leaves undefined
    one_line_exit_2(capsys, ["check", str(path)], "neither UTF-8 nor Windows-1252")
    one_line_exit_2(capsys, ["run", str(path), "--out", str(tmp_path / "o"), *RUN], "neither UTF-8")


def _damaged(tmp_path: Path, name: str, edit) -> Path:
    wb = Workbook()
    ws = wb.active
    ws.title = "loops"
    for r in ROWS:
        ws.append(r)
    good = tmp_path / "good.xlsx"
    wb.save(good)
    src = zipfile.ZipFile(good)
    out = tmp_path / name
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as z:
        for info in src.infolist():
            data = src.read(info.filename)
            z.writestr(info.filename, edit(data) if info.filename == "xl/worksheets/sheet1.xml" else data)
    return out


@pytest.mark.parametrize("name,edit", [
    ("truncated.xlsx", lambda x: x[: len(x) // 2]),
    ("not_xml.xlsx", lambda x: x.replace(b"<sheetData>", b"<sheetData><<<", 1)),
    ("bad_ref.xlsx", lambda x: x.replace(b'r="A2"', b'r="A2x!"', 1)),
    ("bad_number.xlsx", lambda x: x.replace(b"<v>1</v>", b"<v>1abc</v>", 1)),
])
def test_damaged_sheet_xml(capsys, tmp_path, name, edit):
    path = _damaged(tmp_path, name, edit)
    one_line_exit_2(capsys, ["check", str(path)], name, "sheet 'loops' is damaged")


def test_generate_bad_values(capsys, tmp_path):
    one_line_exit_2(capsys, ["generate", "--loops", "3", "--seed", "-1", str(tmp_path / "g.csv")], "--seed")
    one_line_exit_2(capsys, ["generate", "--loops", "0", str(tmp_path / "g.csv")], "--loops")
    one_line_exit_2(capsys, ["generate", "--loops", "20001", str(tmp_path / "g.csv")], "--loops")
    one_line_exit_2(capsys, ["generate", "--loops", "3", str(tmp_path / "g.ods")], "must end in .xlsx or .csv")
    one_line_exit_2(capsys, ["generate", "--loops", "3", str(tmp_path / "no" / "g.csv")], "No such file or directory")
    assert not list(tmp_path.iterdir())


def test_template_and_generate_never_replace_a_filled_inventory(capsys, inv, tmp_path):
    original = inv.read_bytes()
    one_line_exit_2(capsys, ["generate", "--loops", "3", str(inv)], "exists", "--force")
    assert inv.read_bytes() == original
    filled = tmp_path / "site.xlsx"
    assert main(["template", str(filled)]) == 0
    wb_bytes = filled.read_bytes()
    one_line_exit_2(capsys, ["template", str(filled)], "exists", "--force")
    one_line_exit_2(capsys, ["generate", "--loops", "3", str(filled)], "exists", "--force")
    assert filled.read_bytes() == wb_bytes
    one_line_exit_2(capsys, ["template", str(tmp_path / "t.csv")], "must end in .xlsx")
    assert main(["generate", "--loops", "3", "--force", str(inv)]) == 0
    rows = list(csv.reader(open(inv, encoding="utf-8")))
    assert len(rows) == 4 and rows[0][0] == "tag"
    assert main(["template", "--force", str(filled)]) == 0
    assert not [p.name for p in tmp_path.iterdir() if ".partial-" in p.name]


def test_out_under_a_file_and_empty_out(capsys, inv, tmp_path):
    one_line_exit_2(capsys, ["run", str(inv), "--out", str(inv / "sub"), *RUN], "--out")
    one_line_exit_2(capsys, ["run", str(inv), "--out", "", *RUN], "--out is empty")


def test_inventory_a_folder_or_missing(capsys, tmp_path):
    one_line_exit_2(capsys, ["check", str(tmp_path / "none.xlsx")], "file not found")
    one_line_exit_2(capsys, ["run", str(tmp_path / "none.xlsx"), "--out", str(tmp_path / "o"), *RUN],
                    "file not found")
    assert not (tmp_path / "o").exists()


def test_damaged_policy_sheet_refuses_the_file_rather_than_using_defaults(capsys, tmp_path):
    wb = Workbook()
    ws = wb.active
    ws.title = "loops"
    for r in ROWS:
        ws.append(r)
    pol = wb.create_sheet("policy")
    pol.append(["setting", "value"])
    pol.append(["ms_max", 1.6])
    good = tmp_path / "good.xlsx"
    wb.save(good)
    src = zipfile.ZipFile(good)
    out = tmp_path / "policy_damaged.xlsx"
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as z:
        for info in src.infolist():
            data = src.read(info.filename)
            z.writestr(info.filename, data[:-40] if info.filename == "xl/worksheets/sheet2.xml" else data)
    one_line_exit_2(capsys, ["check", str(out)], "sheet 'policy' is damaged")
