"""Hostile corpus, resource exhaustion: every documented limit refuses early with a plain message.

Memory and time of the same cases at full size are measured by ``benchmarks/hostile.py``, not
here; these tests assert the refusal, its message, and that no row is lost where rows are read.
The limits are the project's own (README, "Limits"); the zip structure follows the published
format (PKWARE, APPNOTE.TXT 6.3.9, 2020, sec. 4.3.12: central directory file header).
"""

from __future__ import annotations

import csv
import io
import os
import re
import signal
import struct
import zipfile
from contextlib import contextmanager
from pathlib import Path

import pytest
from openpyxl import Workbook

import audit.disturbance as disturbance
import audit.inventory as inventory
from audit.cli import main
from audit.disturbance import RecordError, read_record
from audit.inventory import InventoryError, read_inventory
from audit.limits import LIMITS, MAX_CELL_CHARS, MAX_COLUMNS, limits_markdown

ROOT = Path(__file__).resolve().parents[2]
HEADER = ["tag", "model", "gain", "tau1_s", "dead_time_s", "kc", "ti_s", "action"]


def good(tag: str) -> list:
    return [tag, "fopdt", 1.0, 10, 1, 0.5, 10, "reverse"]


def write_csv(path: Path, rows: list[list]) -> Path:
    with open(path, "w", newline="", encoding="utf-8") as fh:
        csv.writer(fh).writerows(rows)
    return path


@contextmanager
def no_hang(seconds: int = 30):
    """Fail instead of hanging for ever (a FIFO opened the ordinary way blocks until a writer comes)."""
    def boom(*_):
        raise AssertionError(f"still blocked after {seconds} s")
    old = signal.signal(signal.SIGALRM, boom)
    signal.alarm(seconds)
    try:
        yield
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, old)


def test_readme_lists_every_limit():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    m = re.search(r"<!-- limits:start -->\n(.*?)<!-- limits:end -->", readme, re.S)
    assert m and m.group(1).strip() == limits_markdown().strip()
    assert len(LIMITS) == 9          # with the two limits of a historian export (run --data)


def test_too_many_rows_refused_while_streaming(tmp_path, monkeypatch):
    monkeypatch.setattr(inventory, "MAX_ROWS", 5)
    path = write_csv(tmp_path / "big.csv", [HEADER] + [good(f"F-{i}") for i in range(6)])
    with pytest.raises(InventoryError, match=r"more than 5 loops \(row 7 holds loop 6\).*split the inventory"):
        read_inventory(path)
    path = write_csv(tmp_path / "ok.csv", [HEADER] + [good(f"F-{i}") for i in range(5)])
    assert [r.tag for r in read_inventory(path).rows] == [f"F-{i}" for i in range(5)]


def test_too_many_rows_in_a_workbook(tmp_path, monkeypatch):
    monkeypatch.setattr(inventory, "MAX_ROWS", 3)
    wb = Workbook()
    ws = wb.active
    ws.title = "loops"
    for r in [HEADER] + [good(f"F-{i}") for i in range(4)]:
        ws.append(r)
    wb.save(tmp_path / "big.xlsx")
    with pytest.raises(InventoryError, match="sheet 'loops' has more than 3 loops"):
        read_inventory(tmp_path / "big.xlsx")


def test_cell_right_of_the_last_column_refused_naming_it(tmp_path):
    row = good("F-1") + [""] * (MAX_COLUMNS - len(HEADER)) + ["stray"]
    path = write_csv(tmp_path / "wide.csv", [HEADER, row])
    with pytest.raises(InventoryError, match=r"cell GS2 is right of column GR; at most 200 columns"):
        read_inventory(path)
    wb = Workbook()
    ws = wb.active
    ws.title = "loops"
    ws.append(HEADER)
    ws.append(good("F-1"))
    ws.cell(3, 16384, "far away")
    ws.cell(2, 9000).number_format = "0.00"  # a styled empty cell far right is nothing, not refused
    wb.save(tmp_path / "wide.xlsx")
    with pytest.raises(InventoryError, match=r"cell XFD3 is right of column GR"):
        read_inventory(tmp_path / "wide.xlsx")


def test_overlong_cell_makes_its_row_invalid_and_keeps_the_others(tmp_path):
    rows = [HEADER + ["service"], good("F-1") + ["pump"], good("F-2") + ["x" * (MAX_CELL_CHARS + 1)],
            good("F-3") + ["y" * MAX_CELL_CHARS]]
    inv = read_inventory(write_csv(tmp_path / "long.csv", rows))
    assert [r.tag for r in inv.rows] == ["F-1", "F-2", "F-3"]
    assert not inv.rows[0].errors and not inv.rows[2].errors
    (err,) = inv.rows[1].errors
    assert err.cell == "I3" and "cell of 5,001 characters; at most 5,000 are read" in err.message


def test_overlong_tag_cell_is_an_error_not_a_crash(tmp_path):
    inv = read_inventory(write_csv(tmp_path / "t.csv", [HEADER, ["T" * 10_000] + good("x")[1:], good("F-2")]))
    assert len(inv.rows) == 2 and inv.rows[0].errors and not inv.rows[1].errors


def test_inventory_file_size_limit(tmp_path, monkeypatch):
    monkeypatch.setattr(inventory, "MAX_INVENTORY_BYTES", 100)
    path = write_csv(tmp_path / "inv.csv", [HEADER] + [good(f"F-{i}") for i in range(5)])
    with pytest.raises(InventoryError, match=r"the inventory may be at most"):
        read_inventory(path)


def _bomb(path: Path, inflated: int) -> Path:
    """A workbook whose sheet states (and holds) ``inflated`` bytes of XML, mostly one long comment."""
    wb = Workbook()
    ws = wb.active
    ws.title = "loops"
    ws.append(HEADER)
    ws.append(good("F-1"))
    buf = io.BytesIO()
    wb.save(buf)
    src = zipfile.ZipFile(buf)
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as z:
        for info in src.infolist():
            data = src.read(info.filename)
            if info.filename == "xl/worksheets/sheet1.xml":
                pad = inflated - len(data)
                data = data.replace(b"<sheetData>", b"<!--" + b" " * pad + b"--><sheetData>", 1)
            z.writestr(info.filename, data)
    return path


def test_workbook_inflating_past_the_limit_refused_before_reading(tmp_path, monkeypatch):
    monkeypatch.setattr(inventory, "MAX_INFLATED_BYTES", 4 * 1024 ** 2)
    path = _bomb(tmp_path / "bomb.xlsx", 6 * 1024 ** 2)
    assert path.stat().st_size < 100_000  # small on disk
    with pytest.raises(InventoryError, match=r"would inflate to 6 MiB once decompressed; a workbook may hold at most 4 MiB"):
        read_inventory(path)


def test_workbook_whose_directory_understates_a_part_is_damaged_not_inflated(tmp_path):
    """A lying central directory entry (APPNOTE 4.3.12: uncompressed size at offset 24) cannot make
    the reader inflate more than it states: the part is cut there and fails its CRC."""
    path = _bomb(tmp_path / "liar.xlsx", 200_000)
    data = bytearray(path.read_bytes())
    name = b"xl/worksheets/sheet1.xml"
    at = data.find(b"PK\x01\x02")
    while at != -1:
        (name_len,) = struct.unpack_from("<H", data, at + 28)
        if bytes(data[at + 46:at + 46 + name_len]) == name:
            struct.pack_into("<I", data, at + 24, 1000)
            break
        at = data.find(b"PK\x01\x02", at + 4)
    assert at != -1
    path.write_bytes(bytes(data))
    with pytest.raises(InventoryError, match=r"(damaged|cannot be opened)"):
        read_inventory(path)


def test_fifo_as_inventory_and_as_record_refused_without_blocking(tmp_path, capsys):
    fifo = tmp_path / "loops.csv"
    os.mkfifo(fifo)
    with no_hang():
        with pytest.raises(InventoryError, match=r"named pipe \(FIFO\); only a regular file is read as the inventory"):
            read_inventory(fifo)
        with pytest.raises(RecordError, match=r"named pipe \(FIFO\); only a regular file is read as the record"):
            read_record(fifo)
        assert main(["check", str(fifo)]) == 2
        assert main(["disturbance", str(fifo), "--allowed", "1"]) == 2
    err = capsys.readouterr().err
    assert "internal error" not in err and err.count("FIFO") == 2


def test_fifo_named_by_an_inventory_row_fails_that_row_only(tmp_path):
    """A record path on a row that names a FIFO: the row gets the message, the run goes on."""
    os.mkfifo(tmp_path / "rec.csv")
    rows = [HEADER + ["disturbance_file", "allowed_amplitude"], good("F-1") + ["rec.csv", 1.0], good("F-2") + ["", ""]]
    inv_path = write_csv(tmp_path / "loops.csv", rows)
    from audit.pipeline import AuditOptions, new_audit
    audit = new_audit(read_inventory(inv_path), AuditOptions())
    with no_hang():
        disturbance.analyse_records(audit)
    assert list(audit.results["tag"]) == ["F-1", "F-2"]
    assert "named pipe (FIFO)" in audit.results["dist_note"].iloc[0]


def _record(path: Path, n: int) -> Path:
    with open(path, "w") as fh:
        fh.write("time_s,value\n")
        for i in range(n):
            fh.write(f"{i},{(i * 7919) % 13 * 0.1:.2f}\n")
    return path


def test_record_line_limit(tmp_path, monkeypatch, capsys):
    monkeypatch.setattr(disturbance, "MAX_RECORD_LINES", 500)
    ok = read_record(_record(tmp_path / "ok.csv", 499))  # 500 lines with the header
    assert len(ok.t) == 499
    path = _record(tmp_path / "long.csv", 1000)
    with pytest.raises(RecordError, match=r"long.csv: more than 500 lines; at most 500 are read"):
        read_record(path)
    assert main(["disturbance", str(path), "--allowed", "1", "--plot", str(tmp_path / "p.svg")]) == 2
    assert "more than 500 lines" in capsys.readouterr().err


def test_record_size_limit(tmp_path, monkeypatch):
    monkeypatch.setattr(disturbance, "MAX_RECORD_BYTES", 1000)
    with pytest.raises(RecordError, match=r"the record may be at most"):
        read_record(_record(tmp_path / "r.csv", 200))


def test_record_resampling_cannot_exceed_the_line_limit(tmp_path, monkeypatch):
    """Uneven sampling with a tiny median interval would resample into a huge array: refused."""
    monkeypatch.setattr(disturbance, "MAX_RECORD_LINES", 10_000)
    with open(tmp_path / "r.csv", "w") as fh:
        fh.write("time_s,value\n")
        t = 0.0
        for i in range(300):
            t += 0.001 if i % 3 else 50.0
            fh.write(f"{t:.6f},{i % 7}\n")
    with pytest.raises(RecordError, match=r"would give .* samples; at most 10,000 are used"):
        read_record(tmp_path / "r.csv", policy=disturbance.Policy(max_gap_s=1e9))


def test_record_cell_beyond_the_csv_field_limit(tmp_path):
    (tmp_path / "r.csv").write_text("time_s,value\n0,1\n1," + "9" * 200_000 + "\n")
    with pytest.raises(RecordError, match=r"r.csv line 3: not a readable CSV line"):
        read_record(tmp_path / "r.csv")


def test_overlong_header_refused_naming_the_cell(tmp_path):
    path = write_csv(tmp_path / "h.csv", [HEADER + ["n" * (MAX_CELL_CHARS + 1)], good("F-1") + ["x"]])
    with pytest.raises(InventoryError, match=r"header I1: cell of 5,001 characters"):
        read_inventory(path)
