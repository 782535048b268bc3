"""Memory and time of the hostile inputs that once exhausted the machine: each is refused early now.

Usage::

    python benchmarks/hostile.py [--only NAME ...] [--keep DIR]

Each case builds its input in a temporary folder, then runs ``plant-audit`` on it in a fresh
process and prints the exit code, the wall time, the child's peak resident memory and the first
words of its message. Nothing passes or fails here; ``tests/unit/test_limits.py`` asserts the
refusals. The limits themselves are in ``audit/limits.py`` (and the README).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
import zipfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

CHILD = """
import json, resource, sys, time
t0 = time.perf_counter()
from audit.cli import main
code = main(sys.argv[1:])
print(json.dumps({"code": code, "seconds": time.perf_counter() - t0,
                  "peak_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}), file=sys.stderr)
"""

HEADER = "tag,model,gain,tau1_s,dead_time_s,kc,ti_s,action\n"


def bomb_xlsx(folder: Path, inflated: int = 2 * 1024 ** 3) -> list[str]:
    """A workbook of about 2 MB whose sheet inflates to ``inflated`` bytes (a long XML comment)."""
    from openpyxl import Workbook

    wb = Workbook()
    ws = wb.active
    ws.title = "loops"
    ws.append(HEADER.strip().split(","))
    ws.append(["FIC-1", "fopdt", 1, 10, 1, 0.5, 10, "reverse"])
    good = folder / "good.xlsx"
    wb.save(good)
    path = folder / "bomb.xlsx"
    src = zipfile.ZipFile(good)
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED, compresslevel=9) as z:
        for info in src.infolist():
            data = src.read(info.filename)
            if info.filename != "xl/worksheets/sheet1.xml":
                z.writestr(info.filename, data)
                continue
            head, tail = data.split(b"<sheetData>", 1)
            with z.open(info.filename, "w", force_zip64=True) as fh:
                fh.write(head + b"<!--")
                block = b" " * (1 << 24)
                left = inflated - len(data) - 7
                while left > 0:
                    fh.write(block[:min(left, len(block))])
                    left -= len(block)
                fh.write(b"--><sheetData>" + tail)
    print(f"  bomb.xlsx: {path.stat().st_size / 1024 ** 2:.1f} MiB on disk, {inflated / 1024 ** 3:.1f} GiB inflated")
    return ["check", str(path)]


def long_record(folder: Path, lines: int = 10_000_000) -> list[str]:
    """A record of ``lines`` samples."""
    path = folder / "long.csv"
    with open(path, "w") as fh:
        fh.write("time_s,value\n")
        chunk = 100_000
        for start in range(0, lines, chunk):
            fh.write("".join(f"{i},{(i * 7919) % 97 * 0.01:.2f}\n" for i in range(start, min(start + chunk, lines))))
    print(f"  long.csv: {lines:,} lines, {path.stat().st_size / 1024 ** 2:.0f} MiB")
    return ["disturbance", str(path), "--allowed", "1", "--plot", str(folder / "long.svg")]


def huge_inventory(folder: Path, rows: int = 1_000_000) -> list[str]:
    """A CSV inventory of ``rows`` valid loops."""
    path = folder / "huge.csv"
    with open(path, "w") as fh:
        fh.write(HEADER)
        chunk = 100_000
        for start in range(0, rows, chunk):
            fh.write("".join(f"F-{i},fopdt,1,10,1,0.5,10,reverse\n" for i in range(start, min(start + chunk, rows))))
    print(f"  huge.csv: {rows:,} rows, {path.stat().st_size / 1024 ** 2:.0f} MiB")
    return ["run", str(path), "--out", str(folder / "out"), "--no-pdf", "--no-history", "--quiet"]


def huge_xlsx(folder: Path, rows: int = 1_000_000) -> list[str]:
    """A workbook of ``rows`` valid loops (sheet XML written directly, inline strings)."""
    from openpyxl import Workbook

    wb = Workbook()
    wb.active.title = "loops"
    good = folder / "good.xlsx"
    wb.save(good)
    src = zipfile.ZipFile(good)
    path = folder / "huge.xlsx"
    cols = HEADER.strip().split(",")

    def row(r: int, values: list) -> bytes:
        cells = []
        for j, v in enumerate(values):
            ref = f"{chr(65 + j)}{r}"
            if isinstance(v, str):
                cells.append(f'<c r="{ref}" t="inlineStr"><is><t>{v}</t></is></c>')
            else:
                cells.append(f'<c r="{ref}"><v>{v}</v></c>')
        return f'<row r="{r}">{"".join(cells)}</row>'.encode()

    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as z:
        for info in src.infolist():
            if info.filename != "xl/worksheets/sheet1.xml":
                z.writestr(info.filename, src.read(info.filename))
                continue
            with z.open(info.filename, "w", force_zip64=True) as fh:
                fh.write(b'<?xml version="1.0" encoding="UTF-8"?><worksheet xmlns="http://schemas.openxmlformats.org/'
                         b'spreadsheetml/2006/main"><sheetData>')
                fh.write(row(1, cols))
                for start in range(0, rows, 50_000):
                    fh.write(b"".join(row(i + 2, [f"F-{i}", "fopdt", 1, 10, 1, 0.5, 10, "reverse"])
                                      for i in range(start, min(start + 50_000, rows))))
                fh.write(b"</sheetData></worksheet>")
    inflated = sum(i.file_size for i in zipfile.ZipFile(path).infolist())
    print(f"  huge.xlsx: {rows:,} rows, {path.stat().st_size / 1024 ** 2:.0f} MiB on disk, "
          f"{inflated / 1024 ** 2:.0f} MiB inflated")
    return ["check", str(path)]


def fifo_record(folder: Path) -> list[str]:
    """A named pipe with no writer, named as a record."""
    path = folder / "pipe.csv"
    os.mkfifo(path)
    return ["disturbance", str(path), "--allowed", "1"]


def fifo_inventory(folder: Path) -> list[str]:
    """A named pipe with no writer, named as the inventory."""
    path = folder / "pipe_inv.csv"
    os.mkfifo(path)
    return ["check", str(path)]


def long_cell(folder: Path, chars: int = 100_000) -> list[str]:
    """A CSV inventory whose second row has a ``service`` cell of ``chars`` characters."""
    path = folder / "long_cell.csv"
    with open(path, "w") as fh:
        fh.write(HEADER.strip() + ",service\n")
        fh.write("F-1,fopdt,1,10,1,0.5,10,reverse,pump\n")
        fh.write("F-2,fopdt,1,10,1,0.5,10,reverse," + "x" * chars + "\n")
    return ["check", str(path)]


CASES = {
    "bomb_xlsx": (bomb_xlsx, "4 GiB"),
    "long_record": (long_record, "4.6 GiB"),
    "huge_inventory": (huge_inventory, "killed at 300 s with 5.7 GiB"),
    "huge_xlsx": (huge_xlsx, "-"),
    "huge_xlsx_200k": (lambda f: huge_xlsx(f, 200_000), "-"),
    "fifo_record": (fifo_record, "hung for ever"),
    "fifo_inventory": (fifo_inventory, "hung for ever"),
    "long_cell": (long_cell, "-"),
}


def run_case(name: str, folder: Path, timeout: float = 600) -> dict:
    build, before = CASES[name]
    argv = build(folder)
    t0 = time.perf_counter()
    try:
        proc = subprocess.run([sys.executable, "-c", CHILD, *argv], cwd=ROOT, capture_output=True, text=True,
                              timeout=timeout)
    except subprocess.TimeoutExpired:
        return {"case": name, "code": "timeout", "seconds": timeout, "peak_mib": float("nan"), "message": "",
                "before": before}
    wall = time.perf_counter() - t0
    lines = proc.stderr.strip().splitlines()
    stats = json.loads(lines[-1]) if lines and lines[-1].startswith("{") else {}
    message = next((ln for ln in lines if ln.startswith(("plant-audit", "Error"))), "")
    message = message or next((ln for ln in proc.stdout.splitlines() if "error" in ln), "")
    return {"case": name, "code": stats.get("code", proc.returncode), "seconds": wall,
            "peak_mib": stats.get("peak_mib", float("nan")), "message": message[:110], "before": before}


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", nargs="*", choices=list(CASES), help="run only these cases")
    ap.add_argument("--keep", default=None, help="build the inputs in this folder and keep them")
    args = ap.parse_args(argv)
    names = args.only or list(CASES)
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        base = Path(args.keep) if args.keep else Path(tmp)
        for name in names:
            folder = base / name
            folder.mkdir(parents=True, exist_ok=True)
            print(f"{name}:")
            rows.append(run_case(name, folder))
    print()
    print("| case | exit | wall [s] (process start included) | peak RSS [MiB] | before this change | message |")
    print("|---|---|---|---|---|---|")
    for r in rows:
        print(f"| {r['case']} | {r['code']} | {r['seconds']:.1f} | {r['peak_mib']:.0f} | {r['before']} | "
              f"{r['message']} |")


if __name__ == "__main__":
    main()
