"""results.csv and results.json: the machine-readable results.

CSV: one line per inventory row in inventory order; an infinite value is ``inf``,
a missing one is empty; free text that could be read as a formula is prefixed
with an apostrophe. JSON: strict (no NaN/Infinity tokens): infinite values are the
string ``"inf"`` (``"-inf"``), missing values ``null``; it also records the tool
version, the inventory's file name and SHA-256, and the policy in force.

:func:`write_file_safely` writes one file the user named (the template, a generated
inventory, a plot) through a temporary file beside it and never over an existing file
without ``force``.
"""

from __future__ import annotations

import csv
import datetime as _dt
import json
import math
import os
from pathlib import Path
from typing import Any, Callable, Mapping

import numpy as np
import pandas as pd

from .columns import RESULT_COLUMNS
from .safety import neutralise_formula


def output_columns(results: pd.DataFrame, extra_columns: tuple[str, ...] = ()) -> list[str]:
    """Known results columns present in the table, in table order, then the row's own extra columns.

    Parameters
    ----------
    results : pandas.DataFrame
        The results table.
    extra_columns : tuple of str
        The inventory's unknown headers, carried to the results; those present and
        not already known are appended in this order.

    Returns
    -------
    list of str
        Column names to write.
    """
    known = [c.name for c in RESULT_COLUMNS if c.name in results.columns]
    extras = [c for c in extra_columns if c in results.columns and c not in known]
    return known + extras


def plain(value: Any) -> Any:
    """A strict-JSON-safe Python value: inf -> "inf", NaN/None/NA -> None, numpy scalars -> Python.

    The one conversion used by results.json, results.csv, results.xlsx and the history store.

    Parameters
    ----------
    value : Any
        A results or cell value; lists, tuples, arrays and mappings are converted element by
        element, dates become ISO text, anything else not a number becomes text.

    Returns
    -------
    Any
        None, bool, int, float (finite), str, list or dict.
    """
    t = type(value)
    if value is None or t is str or t is bool or t is int:
        return value
    if t is float:
        if math.isnan(value):
            return None
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return value
    if isinstance(value, (list, tuple)):
        return [plain(v) for v in value]
    if isinstance(value, Mapping):
        return {str(k): plain(v) for k, v in value.items()}
    if getattr(value, "ndim", 0) and hasattr(value, "tolist"):
        return plain(value.tolist())  # an array
    if hasattr(value, "item") and not isinstance(value, (str, bytes)):
        try:
            value = value.item()  # numpy scalar -> Python
        except (TypeError, ValueError):
            pass
    if isinstance(value, (bool, int, str)):
        return value
    if isinstance(value, float):
        return plain(value)
    try:
        if pd.isna(value):
            return None
    except (TypeError, ValueError):
        pass
    if isinstance(value, (_dt.date, _dt.datetime, _dt.time)):
        return value.isoformat()
    return str(value)


def csv_cell(value: Any) -> str:
    """Text of one CSV cell.

    Parameters
    ----------
    value : Any
        A results value (numpy or Python scalar, text, None/NaN).

    Returns
    -------
    str
        Blank for None/NaN, ``true``/``false`` for booleans, ``repr`` of floats
        (``inf``/``-inf`` kept), and text with formula-like content neutralised.
    """
    v = plain(value)
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return repr(v)
    if isinstance(v, int):
        return str(v)
    if v in ("inf", "-inf") and isinstance(value, (float, np.floating)):
        return v
    return neutralise_formula(str(v))


def plain_column(series: pd.Series) -> list[Any]:
    """:func:`plain` of every value of a column, float and boolean columns converted in one go.

    Parameters
    ----------
    series : pandas.Series
        One results column.

    Returns
    -------
    list
        The same values :func:`plain` gives one by one.
    """
    if series.dtype == np.float64:
        arr = series.to_numpy()
        out = arr.tolist()
        bad = np.flatnonzero(~np.isfinite(arr))
        for i in bad.tolist():
            v = out[i]
            out[i] = None if v != v else ("inf" if v > 0 else "-inf")
        return out
    if series.dtype == np.bool_ or series.dtype == np.int64:
        return series.to_numpy().tolist()
    out = series.tolist()
    for i, v in enumerate(out):
        t = type(v)
        if t is str or v is None or t is bool or t is int:
            continue   # plain() gives these back as they are
        out[i] = None if v is pd.NA else plain(v)
    return out


def _csv_column(series: pd.Series) -> list[str]:
    """:func:`csv_cell` of every value of a column (float columns without a call per value)."""
    if series.dtype == np.float64:
        arr = series.to_numpy()
        out = list(map(float.__repr__, arr.tolist()))   # repr, as csv_cell writes a float
        for i in np.flatnonzero(np.isnan(arr)).tolist():
            out[i] = ""
        return out
    out = series.tolist()
    for i, v in enumerate(out):
        t = type(v)
        if t is str:   # the common case: free text, as csv_cell writes it
            out[i] = neutralise_formula(v)
        elif v is None or v is pd.NA:
            out[i] = ""
        elif t is bool:
            out[i] = "true" if v else "false"
        else:
            out[i] = csv_cell(v)
    return out


def write_csv(path: Path, results: pd.DataFrame, columns: list[str]) -> None:
    """Write results.csv.

    Parameters
    ----------
    path : Path
        File to write (UTF-8, overwritten).
    results : pandas.DataFrame
        The results table, one row per inventory row.
    columns : list of str
        Columns to write, in order (see :func:`output_columns`); the header row. A header
        that could be read as a formula is neutralised like any cell (the inventory's reader
        already renames such headers; this writer does not rely on it).
    """
    with open(path, "w", newline="", encoding="utf-8") as fh:
        wr = csv.writer(fh)
        wr.writerow([neutralise_formula(str(c)) for c in columns])
        cells = [_csv_column(results.iloc[:, j]) for j in _positions(results, columns)]
        wr.writerows(zip(*cells) if cells else ([] for _ in range(len(results))))


def write_json(path: Path, results: pd.DataFrame, columns: list[str], meta: dict[str, Any]) -> None:
    """Write results.json (strict JSON).

    Parameters
    ----------
    path : Path
        File to write (UTF-8, overwritten).
    results : pandas.DataFrame
        The results table, one row per inventory row.
    columns : list of str
        Columns to write, in order (see :func:`output_columns`); listed under ``columns``.
    meta : dict
        What identifies the run (``Audit.meta``); its keys go at the top level.
    """
    values = [plain_column(results.iloc[:, j]) for j in _positions(results, columns)]
    head = {**plain(meta), "columns": columns}
    with open(path, "w", encoding="utf-8") as fh:
        if (all(type(c) is str for c in columns) and len(set(columns)) == len(columns)
                and all(type(v) in _SCALARS for col in values for v in col)):
            _dump_loops(fh, head, columns, values, len(results))
        else:   # a list or mapping in some cell: the general encoder (same layout)
            rows = [dict(zip(columns, rec)) for rec in zip(*values)] if columns else [{} for _ in range(len(results))]
            json.dump({**head, "loops": rows}, fh, indent=1, allow_nan=False, ensure_ascii=False)
        fh.write("\n")


_SCALARS = frozenset({type(None), bool, int, float, str})


def _positions(results: pd.DataFrame, columns: list[str]) -> list[int]:
    """Positions of ``columns`` in ``results`` (the first of a repeated name, as ``results[columns]`` reads)."""
    first: dict[str, int] = {}
    for j, c in enumerate(results.columns):
        first.setdefault(c, j)
    return [first[c] for c in columns]


def _dump_loops(fh, head: dict[str, Any], columns: list[str], values: list[list[Any]], n: int) -> None:
    """results.json as ``json.dump(..., indent=1)`` writes it, the loops (scalars only) encoded a cell at a time.

    The head (run identity, columns) goes through the json module; each loop is an object at depth 2 whose
    members are ``"name": value`` lines indented by three spaces, encoded by the json module's own
    scalar encoders, so the bytes are those of the general encoder.
    """
    enc_str = json.encoder.encode_basestring          # ensure_ascii=False
    float_repr = float.__repr__
    keys = [enc_str(c) + ": " for c in columns]
    text = json.dumps({**head, "loops": []}, indent=1, allow_nan=False, ensure_ascii=False)
    fh.write(text[:-len("[]\n}")])
    if n == 0:
        fh.write("[]\n}")
        return
    encode = {str: enc_str, float: float_repr, type(None): lambda v: "null",
              bool: lambda v: "true" if v else "false", int: int.__repr__}   # the json module's text of each
    cols = []
    for key, col in zip(keys, values):
        kinds = set(map(type, col))
        if len(kinds) == 1:   # a column of one kind: its encoder over the whole column
            cells = [key + t for t in map(encode[kinds.pop()], col)]
        else:
            cells = [key + encode[type(v)](v) for v in col]
        cols.append(cells)
    if cols:
        rows = ["{\n   " + ",\n   ".join(cells) + "\n  }" for cells in zip(*cols)]
    else:
        rows = ["{}"] * n
    fh.write("[\n  " + ",\n  ".join(rows) + "\n ]\n}")


class FileRefused(Exception):
    """A file the user named will not be written (it exists, or is not a regular file); exit code 2."""


def write_file_safely(path: str | Path, write: Callable[[Path], Any], force: bool = False,
                      suffixes: tuple[str, ...] = ()) -> Path:
    """Write one file through a temporary file beside it, moved into place only once complete.

    Parameters
    ----------
    path : str or Path
        The file to write.
    write : callable
        Called with the temporary path; writes the whole file there.
    force : bool
        Replace an existing file; without it an existing file is refused.
    suffixes : tuple of str
        Accepted file name endings (lower case, with the dot); any when empty.

    Returns
    -------
    Path
        ``path``.

    Raises
    ------
    FileRefused
        ``path`` exists (without ``force``), is not a regular file, or has another ending.
    OSError
        The folder cannot be written (the temporary file is removed; ``path`` is unchanged).
    """
    p = Path(path)
    if suffixes and p.suffix.lower() not in suffixes:
        raise FileRefused(f"{p}: the file name must end in {' or '.join(suffixes)}")
    if p.exists() or p.is_symlink():
        if not p.is_file():
            raise FileRefused(f"{p} exists and is not a regular file; give another path")
        if not force:
            raise FileRefused(f"{p} exists; give another path, or --force to replace it")
    tmp = p.with_name(f".{p.name}.partial-{os.getpid()}")
    try:
        write(tmp)
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, p)
    finally:
        tmp.unlink(missing_ok=True)
    return p
