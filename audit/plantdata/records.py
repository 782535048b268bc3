"""The one reader of logged time series (plant records): CSV and Parquet, streamed.

Every record of plant data the audit reads -- bump tests, set-point changes, normal
operation, disturbance records -- goes through :func:`read_record`. It returns a
:class:`Record`: uniform :class:`Segment` s of the usable data in project units, and
:class:`Note` s naming the file and line of every problem. It never raises for a
problem in the user's file; a record with nothing usable has no segments and says why.

Record format
-------------
A CSV file (UTF-8, comma separated, a header line; blank lines and lines whose first
cell starts with ``#`` are skipped; no quoted line breaks) or a Parquet file, with:

* exactly one time column: ``time_s`` [s], ``time_min`` [min] or ``timestamp``
  (ISO 8601, e.g. ``2024-03-31T01:59:00+00:00``; either every line with a zone
  offset or ``Z``, or none). Zoned times are converted to UTC, so a daylight-saving
  change is no jump. Times without a zone are wall-clock times: give ``timezone=``
  (e.g. ``"Europe/London"``) to place them, the repeated hour of the autumn change
  resolved by order; without it a daylight-saving change shows as a gap or as time
  going back. In Parquet, a timestamp column may also be a native timestamp type.
* any subset of the signals (names case-insensitive):

  ====== =============================================== ==========================
  name   meaning                                          unit read -> kept
  ====== =============================================== ==========================
  sp     set point                                        % of PV range
  sp_eu  set point                                        engineering units -> %
  pv     process variable                                 % of PV range
  pv_eu  process variable                                 engineering units -> %
  op     controller output                                % of output range
  mode   controller mode as the site logs it (text)       kept as codes + labels
  ====== =============================================== ==========================

  ``*_eu`` columns are converted with the row's ``pv_lo``/``pv_hi``:
  ``100 (x - pv_lo)/(pv_hi - pv_lo)``. Callers may ask for other signal names
  (disturbance records use ``value``/``value_eu``).

What the reader checks and says
-------------------------------
* Historian quality words in a value cell (``ReadPolicy.quality_words``, matched
  without regard to case or repeated spaces, e.g. "Bad Value", "Shutdown",
  "I/O Timeout", "No Data") are missing values, counted per signal; they are never
  parsed as numbers. Empty cells and other text are missing values too, each named.
* Duplicate times and time going back: the later line is dropped and named.
* Gaps: a row is usable when every numeric signal present holds a finite value. Where
  usable rows are more than ``max_gap_intervals`` median sample intervals apart (a
  time gap, or a run of missing values), the record is split into segments; nothing
  is interpolated across such a gap. Shorter holes are filled by linear interpolation
  (said in a note). Segments shorter than ``min_samples`` are dropped (said).
* Non-uniform sampling inside a segment: resampled on the median interval by linear
  interpolation (``mode`` by holding the last value).
* Long flat runs of ``pv`` (or ``value``): ``flat_run_samples`` or more identical
  consecutive values, the mark of a compressing historian (or a frozen transmitter):
  the share of samples in such runs and the longest run are said.
* Units: ``pv``/``sp`` given in % but mostly outside -10..110 %, or ``op`` outside
  -10..110 %: a note suggests the column is in engineering units (or wrongly scaled).
* Size: data rows are read in chunks (``chunk_rows``) into numpy arrays; at most
  ``max_rows`` data rows are read (default 20 million, about 1 GB with three
  signals), the rest is said and not read. Only regular files are read (no FIFOs or
  devices); :func:`confine` keeps a path named by a spreadsheet inside the
  inventory's folder.

Stable interface (used by identification and loop-health analyses)
-------------------------------------------------------------------
``read_record(path, signals=SIGNALS, pv_lo=None, pv_hi=None, policy=ReadPolicy(),
name=None, timezone=None) -> Record``;
``Record.segments`` (tuple of :class:`Segment`), ``Record.notes`` (tuple of
:class:`Note`), ``Record.signals``, ``Record.dt`` [s], ``Record.start`` (zone-aware
UTC ``pandas.Timestamp`` for zoned input), ``Record.mode_labels``,
``Record.missing``/``Record.quality``/``Record.flat_fraction`` (per signal),
``Record.longest()``, ``Record.usable``; ``Segment.t`` [s from the record's start],
``Segment.dt`` [s], ``Segment.values[name]`` (% of range), ``Segment.mode`` (int16
codes into ``Record.mode_labels``, -1 missing), ``Segment.first_line``,
``Segment.last_line``; ``Note.kind``, ``Note.line``, ``str(note)``;
:func:`confine`, :class:`PathError`. Fields may be added; none will be renamed.
"""

from __future__ import annotations

import csv
import io
import math
import re
import stat
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator, Mapping, Sequence

import numpy as np
import pandas as pd

TIME_COLUMNS = ("time_s", "time_min", "timestamp")
SIGNALS = ("sp", "pv", "op", "mode")
EU_SIGNALS = ("sp", "pv", "value")          # signals that may come as *_eu (PV range)
TEXT_SIGNALS = ("mode",)
FLAT_SIGNALS = ("pv", "value")
MAX_PER_KIND = 20

DEFAULT_QUALITY_WORDS = (
    "bad", "bad value", "bad data", "bad input", "bad output", "bad quality", "bad status",
    "shutdown", "timeout", "i/o timeout", "io timeout", "comm fail", "comm failure",
    "communication failure", "no data", "no value", "no sample", "not connected",
    "disconnected", "out of service", "scan off", "scan timeout", "calc failed",
    "calculation failed", "invalid", "invalid data", "over range", "under range",
    "overrange", "underrange", "uncertain", "questionable", "offline", "off-line",
    "error", "failed", "null", "none", "n/a", "#n/a", "nodata", "---", "?",
)
"""Historian quality words read as missing values (case and repeated spaces ignored)."""

# Note kinds: which ones drop a line, which ones only inform.
LINE_KINDS = ("cell", "time", "order")      # a line or cell dropped
KINDS = ("file", "header", "cell", "quality", "time", "order", "zone", "gap", "fill", "short",
         "resample", "flat", "units", "cap")


class PathError(ValueError):
    """A record path that leads outside the inventory's folder."""


@dataclass(frozen=True)
class ReadPolicy:
    """How a record is read.

    Attributes
    ----------
    quality_words : tuple of str
        Cell texts read as missing values (lower case; see :data:`DEFAULT_QUALITY_WORDS`).
    max_gap_intervals : float
        Longest hole between usable rows filled by interpolation, as a multiple of the
        median sample interval; a longer one splits the record. [-]
    uniform_tolerance : float
        Relative deviation of sample intervals from their median beyond which a
        segment is resampled. [-]
    min_samples : int
        Fewest samples a segment may have. [-]
    flat_run_samples : int
        Identical consecutive values of ``pv`` that count as a flat run. [-]
    max_rows : int
        Most data rows read from one file. [-]
    chunk_rows : int
        Data rows read at a time. [-]
    """

    quality_words: tuple[str, ...] = DEFAULT_QUALITY_WORDS
    max_gap_intervals: float = 5.0
    uniform_tolerance: float = 0.01
    min_samples: int = 64
    flat_run_samples: int = 30
    max_rows: int = 20_000_000
    chunk_rows: int = 200_000


@dataclass(frozen=True)
class Note:
    """One thing the reader found, with where.

    Attributes
    ----------
    file : str
        The record as messages name it.
    kind : str
        One of :data:`KINDS`.
    text : str
        What was found and what was done.
    line : int or None
        Line of the file (CSV, 1-based) or data row (Parquet, 1-based); None for the
        whole file.
    line_end : int or None
        Last line of a range (gaps, flat runs).
    column : str
        Column concerned, '' for none.
    count : int
        Number of occurrences this note stands for (a summary note counts the rest). [-]
    unit : str
        'line' (CSV) or 'row' (Parquet).
    """

    file: str
    kind: str
    text: str
    line: int | None = None
    line_end: int | None = None
    column: str = ""
    count: int = 1
    unit: str = "line"

    def __str__(self) -> str:
        where = self.file
        if self.line is not None:
            if self.line_end is not None and self.line_end != self.line:
                where += f" {self.unit}s {self.line}-{self.line_end}"
            else:
                where += f" {self.unit} {self.line}"
        if self.column:
            where += f" ({self.column})"
        return f"{where}: {self.text}"


@dataclass(frozen=True)
class Segment:
    """A stretch of usable data on a uniform grid.

    Attributes
    ----------
    t0 : float
        Time of the first sample from the record's first time. [s]
    dt : float
        Sample interval. [s]
    values : Mapping[str, ndarray]
        Numeric signals (``sp``, ``pv`` in % of PV range, ``op`` in % of output range). [%]
    mode : ndarray or None
        Mode codes into :attr:`Record.mode_labels` (int16, -1 missing); None without a mode column.
    first_line, last_line : int
        Lines (or Parquet rows) of the first and last sample. [-]
    """

    t0: float
    dt: float
    values: Mapping[str, np.ndarray]
    mode: np.ndarray | None
    first_line: int
    last_line: int

    @property
    def n(self) -> int:
        """Number of samples. [-]"""
        return len(next(iter(self.values.values()))) if self.values else (
            0 if self.mode is None else len(self.mode))

    @property
    def t(self) -> np.ndarray:
        """Sample times from the record's first time. [s]"""
        return self.t0 + np.arange(self.n) * self.dt


@dataclass(frozen=True)
class Record:
    """A record as read: uniform segments of usable data and notes.

    Attributes
    ----------
    name : str
        How messages name the file.
    signals : tuple of str
        Signals present (project names: ``sp``, ``pv``, ``op``, ``mode``, ...).
    segments : tuple of Segment
        Usable stretches, in time order; empty when nothing is usable.
    notes : tuple of Note
        Everything found, in reading order.
    dt : float
        Median sample interval; NaN with fewer than two times. [s]
    time_column : str
        The time column read ('' when none).
    start : pandas.Timestamp or None
        First time for ``timestamp`` records (UTC, zone-aware, when the file gives zones
        or ``timezone`` was given; naive wall-clock otherwise); None for relative time.
    start_text : str
        First time as written.
    mode_labels : tuple of str
        Mode texts in order of first appearance (codes index this).
    n_rows : int
        Data rows read. [-]
    missing : Mapping[str, int]
        Missing cells per signal (empty, text, quality words). [-]
    quality : Mapping[str, int]
        Cells holding a quality word, per signal. [-]
    flat_fraction : Mapping[str, float]
        Share of samples in flat runs, per signal checked. [-]
    truncated : bool
        True when ``max_rows`` stopped the reading.
    """

    name: str
    signals: tuple[str, ...]
    segments: tuple[Segment, ...]
    notes: tuple[Note, ...]
    dt: float
    time_column: str = ""
    start: pd.Timestamp | None = None
    start_text: str = ""
    mode_labels: tuple[str, ...] = ()
    n_rows: int = 0
    missing: Mapping[str, int] = field(default_factory=dict)
    quality: Mapping[str, int] = field(default_factory=dict)
    flat_fraction: Mapping[str, float] = field(default_factory=dict)
    truncated: bool = False

    @property
    def usable(self) -> bool:
        """True when at least one segment holds data."""
        return bool(self.segments)

    def longest(self) -> Segment | None:
        """The longest segment, None when there is none."""
        return max(self.segments, key=lambda s: s.n) if self.segments else None

    def notes_of(self, *kinds: str) -> tuple[Note, ...]:
        """Notes of the given kinds (see :data:`KINDS`)."""
        return tuple(n for n in self.notes if n.kind in kinds)


# --------------------------------------------------------------------------- paths

def confine(folder: str | Path, target: str | Path) -> tuple[Path, str]:
    """The resolved path of a record named by a spreadsheet, kept inside ``folder``.

    Parameters
    ----------
    folder : str or Path
        The inventory's folder.
    target : str or Path
        Path as written in the spreadsheet (relative to ``folder`` or absolute).

    Returns
    -------
    tuple of (Path, str)
        The resolved path and its name relative to ``folder`` (for messages).

    Raises
    ------
    PathError
        When the path (after resolving links) leads outside ``folder``.
    """
    base = Path(folder).resolve()
    p = Path(target)
    full = (p if p.is_absolute() else base / p).resolve()
    if full != base and base not in full.parents:
        raise PathError(f"{p.name}: path leads outside the inventory's folder; keep records in that folder")
    return full, full.relative_to(base).as_posix()


# --------------------------------------------------------------------------- notes

class _Notes:
    """Notes with at most MAX_PER_KIND per (kind, column); the rest counted in one summary."""

    def __init__(self, file: str, unit: str):
        self.file, self.unit = file, unit
        self.items: list[Note] = []
        self.extra: dict[tuple[str, str], int] = {}
        self.shown: dict[tuple[str, str], int] = {}

    def add(self, kind: str, text: str, line: int | None = None, column: str = "",
            line_end: int | None = None) -> None:
        key = (kind, column)
        if self.shown.get(key, 0) >= MAX_PER_KIND:
            self.extra[key] = self.extra.get(key, 0) + 1
            return
        self.shown[key] = self.shown.get(key, 0) + 1
        self.items.append(Note(self.file, kind, text, line, line_end, column, 1, self.unit))

    def add_lines(self, kind: str, lines: np.ndarray, texts: Sequence[str], column: str = "") -> None:
        """Many line notes at once (only the first MAX_PER_KIND become strings)."""
        key = (kind, column)
        room = max(MAX_PER_KIND - self.shown.get(key, 0), 0)
        for ln, tx in zip(lines[:room], texts[:room]):
            self.add(kind, tx, int(ln), column)
        if len(lines) > room:
            self.extra[key] = self.extra.get(key, 0) + len(lines) - room

    def done(self) -> tuple[Note, ...]:
        out = list(self.items)
        for (kind, col), k in self.extra.items():
            out.append(Note(self.file, kind, f"... and {k} more like this", None, None, col, k, self.unit))
        return tuple(out)


def _show(text: str) -> str:
    text = text if len(text) <= 40 else text[:37] + "..."
    return repr(text)


# --------------------------------------------------------------------------- chunks

@dataclass
class _Chunk:
    lines: np.ndarray                    # int64 line (CSV) or row (Parquet) numbers
    cols: dict[str, pd.Series]           # source column (lower-case) -> raw values
    bad: tuple[tuple[int, str], ...] = ()  # (line, why) of lines that are no readable CSV
    t: np.ndarray | None = None          # times already parsed by _times (a long export's pivot)
    col_lines: dict[str, np.ndarray] | None = None  # per column: the line each value came from


def _csv_header(fh) -> tuple[int, list[str]] | None:
    ln = 0
    for raw in fh:
        ln += 1
        text = raw.decode("utf-8-sig" if ln == 1 else "utf-8")
        if not text.strip() or text.lstrip().startswith("#"):
            continue
        return ln, next(csv.reader([text]))
    return None


def _csv_chunks(fh, first_line: int, names: list[str], want: list[int], rows: int) -> Iterator[_Chunk]:
    """Data rows of a CSV file after its header, ``rows`` lines at a time."""
    line = first_line
    ncol = len(names)
    keys = [names[i] for i in want]
    while True:
        raw = fh.readlines(max(rows * 24, 1 << 16))       # a size hint, about ``rows`` lines
        if not raw:
            return
        nl = len(raw)
        block = b"".join(raw)
        lines = np.arange(line, line + nl, dtype=np.int64)
        line += nl
        df = None
        limit = csv.field_size_limit()
        long_line = max(map(len, raw)) > limit
        if b"#" not in block and b'"' not in block and not long_line:
            try:
                df = pd.read_csv(io.BytesIO(block), header=None, names=list(range(ncol)), usecols=want,
                                 keep_default_na=False, na_values=[""], skip_blank_lines=False, engine="c",
                                 encoding="utf-8", low_memory=False)
            except (pd.errors.ParserError, ValueError, UnicodeDecodeError):
                df = None
            if df is not None and len(df) != nl:
                df = None
        if df is None:                                      # slow path: line by line
            cells: list[list[str]] = [[] for _ in want]
            keep = []
            bad = []
            for j, b in enumerate(raw):
                try:
                    r = next(csv.reader([b.decode("utf-8")]), [])
                except (csv.Error, UnicodeDecodeError) as exc:
                    bad.append((int(lines[j]), f"not a readable CSV line ({str(exc)[:80]})"))
                    continue
                if not r or not any(c.strip() for c in r) or r[0].lstrip().startswith("#"):
                    continue
                keep.append(j)
                for c, i in enumerate(want):
                    cells[c].append(r[i] if i < len(r) else "")
            yield _Chunk(lines[keep], {k: pd.Series(v, dtype=object) for k, v in zip(keys, cells)}, tuple(bad))
            continue
        df = df[want]
        df.columns = keys
        blank = df.isna().all(axis=1).to_numpy()
        if blank.all():
            continue
        if blank.any():
            df = df.loc[~blank]
            lines = lines[~blank]
        yield _Chunk(lines, {k: df[k].reset_index(drop=True) for k in keys})


def _parquet_chunks(pf, columns: list[str], source: list[str], rows: int) -> Iterator[_Chunk]:
    first = 1
    for batch in pf.iter_batches(batch_size=rows, columns=source):
        n = batch.num_rows
        cols = {}
        for k, s in zip(columns, source):
            arr = batch.column(batch.schema.get_field_index(s))
            cols[k] = arr.to_pandas()
        yield _Chunk(np.arange(first, first + n, dtype=np.int64), cols)
        first += n


# --------------------------------------------------------------------------- cells

_ZONE = re.compile(r"[T ]\d{2}(?::?\d{2}){0,2}(?:[.,]\d+)?\s*(?:[zZ]|[+-]\d{2}(?::?\d{2})?)\s*$")


def _numbers(s: pd.Series, lines: np.ndarray, col: str, quality: frozenset[str], notes: _Notes,
             counts: dict[str, list[int]]) -> np.ndarray:
    """Float values of a column chunk, NaN where missing; every missing cell named or counted."""
    if pd.api.types.is_numeric_dtype(s.dtype) and not pd.api.types.is_bool_dtype(s.dtype):
        v = s.to_numpy(dtype=float, na_value=np.nan)
        bad = ~np.isfinite(v)
        if bad.any():
            notes.add_lines("cell", lines[bad], ["empty" if np.isnan(x) else f"not a number: '{x:g}'"
                                                 for x in v[bad][:MAX_PER_KIND]], col)
            counts[col][0] += int(bad.sum())
            v[bad] = np.nan
        return v
    v = pd.to_numeric(s, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    bad = ~np.isfinite(v)
    if not bad.any():
        return v
    idx = np.flatnonzero(bad)
    sub = s.iloc[idx]
    nulls = sub.isna().to_numpy()
    text = sub.astype(str).str.strip()
    again = pd.to_numeric(text.str.replace("\u2212", "-", regex=False), errors="coerce").to_numpy(dtype=float)
    fixed = np.isfinite(again)
    if fixed.any():                      # a typographic minus sign
        v[idx[fixed]] = again[fixed]
        idx, nulls, text = idx[~fixed], nulls[~fixed], text[~fixed]
        if not len(idx):
            return v
    v[idx] = np.nan
    text = text.reset_index(drop=True)
    words = text.str.lower().str.replace(r"\s+", " ", regex=True)
    empty = (text == "").to_numpy() | nulls
    isq = words.isin(quality).to_numpy() & ~empty
    other = ~isq & ~empty
    counts[col][0] += len(idx)
    counts[col][1] += int(isq.sum())
    if isq.any():
        q = idx[isq]
        notes.add_lines("quality", lines[q], [f"historian quality word {_show(w)}: missing value"
                                              for w in text[isq].iloc[:MAX_PER_KIND]], col)
    if empty.any():
        notes.add_lines("cell", lines[idx[empty]], ["empty"] * int(empty.sum()), col)
    if other.any():
        o = idx[other]
        notes.add_lines("cell", lines[o], [f"not a number: {_show(w)}" for w in text[other].iloc[:MAX_PER_KIND]],
                        col)
    return v


def _times(s: pd.Series, lines: np.ndarray, tname: str, notes: _Notes, state: dict) -> np.ndarray:
    """Times of a chunk: seconds (relative columns) or int64 ns (timestamps); NaN/NaT-marked bad."""
    if tname != "timestamp":
        dummy = {tname: [0, 0]}
        v = _numbers(s, lines, tname, frozenset(), _TimeNotes(notes), dummy)
        return v * (60.0 if tname == "time_min" else 1.0)
    if isinstance(s.dtype, pd.DatetimeTZDtype) or pd.api.types.is_datetime64_any_dtype(s.dtype):
        zoned = isinstance(s.dtype, pd.DatetimeTZDtype)
        # UTC (zoned) or wall-clock ns as int64 (NaT as the int64 minimum), one copy at most; on the
        # array, not the Series (a Series' ``.dt`` makes a reference cycle that holds the copy)
        dt64 = np.asarray(s.array.tz_convert(None) if zoned else s.array, dtype="datetime64[ns]")
        ns = dt64.view(np.int64)
        bad = np.isnat(dt64)
        state.setdefault("zoned", zoned)
        if "text" not in state and (~bad).any():
            state["text"] = str(s[~bad].iloc[0])
        if bad.any():
            notes.add_lines("time", lines[bad], ["empty time"] * int(bad.sum()), tname)
        out = ns.astype(float)
        out[bad] = np.nan
        return out
    nulls = s.isna().to_numpy()
    text = s.astype(str).where(~nulls, "")
    zone = text.str.contains(_ZONE).to_numpy()
    empty = nulls | (text.str.len() == 0).to_numpy()
    if "zoned" not in state:
        first = np.flatnonzero(~empty)
        if len(first):
            state["zoned"] = bool(zone[first[0]])
    zoned = state.get("zoned", False)
    if zoned:
        dt = pd.to_datetime(text, format="ISO8601", utc=True, errors="coerce")
        ns = dt.dt.tz_localize(None)
    else:
        ns = pd.to_datetime(text, format="ISO8601", errors="coerce")
    nsv = ns.to_numpy(dtype="datetime64[ns]")
    bad = np.isnat(nsv)
    mixed = (zone != zoned) & ~empty
    out = nsv.astype(np.int64).astype(float)
    if "text" not in state:
        ok = np.flatnonzero(~bad & ~mixed)
        if len(ok):
            state["text"] = text.iloc[ok[0]]
    if mixed.any():
        notes.add_lines("time", lines[mixed], ["time zone given on some lines and not on others"] * int(mixed.sum()),
                        tname)
    nb = bad & ~mixed
    if nb.any():
        notes.add_lines("time", lines[nb], ["empty time" if e else f"not an ISO 8601 time: {_show(w)}"
                                            for e, w in zip(empty[nb][:MAX_PER_KIND],
                                                            text[nb].iloc[:MAX_PER_KIND])], tname)
    out[bad | mixed] = np.nan
    return out


class _TimeNotes:
    """Routes cell notes of a relative time column to the 'time' kind."""

    def __init__(self, notes: _Notes):
        self.notes = notes

    def add_lines(self, kind, lines, texts, column=""):
        self.notes.add_lines("time", lines, texts, column)


# --------------------------------------------------------------------------- reading

def _header_map(header: Sequence[str], signals: Sequence[str], shown: str, hline: int | None,
                notes: _Notes) -> tuple[str, dict[str, tuple[str, bool]]] | None:
    """Time column and signal -> (source column, in engineering units), or None with a header note."""
    keys = [str(h).strip().lower() for h in header]
    tcols = [k for k in keys if k in TIME_COLUMNS]
    found: dict[str, tuple[str, bool]] = {}
    problems = []
    for sig in signals:
        plain = sig in keys
        eu = sig in EU_SIGNALS and f"{sig}_eu" in keys
        if plain and eu:
            problems.append(f"both {sig} and {sig}_eu given; keep one")
        elif plain:
            found[sig] = (sig, False)
        elif eu:
            found[sig] = (f"{sig}_eu", True)
    wanted = ", ".join(s + (f"/{s}_eu" if s in EU_SIGNALS else "") for s in signals)
    if len(tcols) != 1 or not found or problems:
        msg = (f"the header needs exactly one time column ({', '.join(TIME_COLUMNS)}) and at least one "
               f"signal column ({wanted}); found {', '.join(_show(str(h)) for h in header)}")
        if problems:
            msg = "; ".join(problems)
        notes.add("header", msg, hline)
        return None
    return tcols[0], found


def _open_chunks(path: Path, signals: Sequence[str], shown: str, notes: _Notes, rows: int):
    """(time column, signal map, chunk iterator, closer) or None with a note."""
    suffix = path.suffix.lower()
    if suffix in (".parquet", ".pq"):
        try:
            import pyarrow.parquet as pq
            pf = pq.ParquetFile(path)
        except Exception as exc:                       # pyarrow raises several types for a bad file
            notes.add("file", f"cannot be read as Parquet ({type(exc).__name__}: {str(exc)[:80]})")
            return None
        names = list(pf.schema_arrow.names)
        hm = _header_map(names, signals, shown, None, notes)
        if hm is None:
            return None
        tname, found = hm
        lower = {n.strip().lower(): n for n in names}
        cols = [tname] + [found[s][0] for s in found]
        return tname, found, _parquet_chunks(pf, cols, [lower[c] for c in cols], rows), (lambda: None)
    try:
        fh = open(path, "rb")
    except OSError as exc:
        notes.add("file", f"cannot be opened ({exc.strerror})")
        return None
    try:
        head = _csv_header(fh)
    except UnicodeDecodeError:
        fh.close()
        notes.add("file", "cannot be read as UTF-8 text")
        return None
    if head is None:
        fh.close()
        notes.add("file", "empty file; expected a header line such as 'time_s,pv,op'")
        return None
    hline, header = head
    hm = _header_map(header, signals, shown, hline, notes)
    if hm is None:
        fh.close()
        return None
    tname, found = hm
    keys = [h.strip().lower() for h in header]
    want = [keys.index(tname)] + [keys.index(found[s][0]) for s in found]
    return tname, found, _csv_chunks(fh, hline + 1, keys, want, rows), fh.close


def read_record(path: str | Path, signals: Sequence[str] = SIGNALS, pv_lo: float | None = None,
                pv_hi: float | None = None, policy: ReadPolicy = ReadPolicy(), name: str | None = None,
                timezone: str | None = None) -> Record:
    """Read a record (CSV or Parquet) into uniform segments in project units.

    Parameters
    ----------
    path : str or Path
        The file (``.parquet``/``.pq`` read as Parquet, anything else as CSV).
    signals : sequence of str
        Signals looked for (default ``sp``, ``pv``, ``op``, ``mode``).
    pv_lo, pv_hi : float, optional
        PV range, needed for ``*_eu`` columns. [engineering units]
    policy : ReadPolicy
        Quality words, gap and resampling limits, size cap.
    name : str, optional
        How notes name the file (default: ``path`` as given).
    timezone : str, optional
        IANA zone of timestamps written without a zone (e.g. ``"Europe/Berlin"``).

    Returns
    -------
    Record
        Never raises for a problem in the file: problems are notes, and a record with
        nothing usable has no segments.
    """
    shown = name or str(path)
    p = Path(path)
    unit = "row" if p.suffix.lower() in (".parquet", ".pq") else "line"
    notes = _Notes(shown, unit)

    def empty(tname: str = "", sigs: tuple[str, ...] = ()) -> Record:
        return Record(shown, sigs, (), notes.done(), float("nan"), tname)

    try:
        st = p.stat()
    except FileNotFoundError:
        notes.add("file", "file not found")
        return empty()
    except OSError as exc:
        notes.add("file", f"cannot be read ({exc.strerror})")
        return empty()
    if not stat.S_ISREG(st.st_mode):
        notes.add("file", "not a regular file (a record must be a plain file, not a pipe or device)")
        return empty()
    opened = _open_chunks(p, signals, shown, notes, policy.chunk_rows)
    if opened is None:
        return empty()
    tname, found, chunks, close = opened
    return assemble_record(shown, unit, notes, tname, found, chunks, close, signals, pv_lo, pv_hi, policy,
                           timezone)


def assemble_record(shown: str, unit: str, notes: "_Notes", tname: str, found: Mapping[str, tuple[str, bool]],
                    chunks: Iterator["_Chunk"], close, signals: Sequence[str] = SIGNALS,
                    pv_lo: float | None = None, pv_hi: float | None = None, policy: ReadPolicy = ReadPolicy(),
                    timezone: str | None = None, state: dict | None = None) -> Record:
    """The reader's one rule: raw chunks of a record -> checked, uniform segments and notes.

    :func:`read_record` feeds it the chunks of one file; :mod:`.export` feeds it one tag's
    slice of a historian export. Nothing is validated anywhere else.

    Parameters
    ----------
    shown : str
        How notes name the record.
    unit : str
        ``"line"`` or ``"row"`` (how notes count).
    notes : _Notes
        Where notes go (its ``file`` may change while chunks are read).
    tname : str
        The time column (one of :data:`TIME_COLUMNS`).
    found : mapping
        Signal -> (chunk column key, in engineering units).
    chunks : iterator of _Chunk
        Raw values; a chunk's ``t`` holds times already parsed (by :func:`_times`) when set.
    close : callable
        Called once the chunks are read (closes the file).
    signals : sequence of str
        Signals looked for, in order.
    pv_lo, pv_hi : float, optional
        PV range for ``*_eu`` signals. [engineering units]
    policy : ReadPolicy
        Quality words, gap and resampling limits, size cap.
    timezone : str, optional
        IANA zone of timestamps written without a zone.
    state : dict, optional
        The time parser's state (zone seen, first time as written) when times were parsed before.

    Returns
    -------
    Record
    """
    present = tuple(s for s in signals if s in found)

    def empty(tname: str = "", sigs: tuple[str, ...] = ()) -> Record:
        return Record(shown, sigs, (), notes.done(), float("nan"), tname)

    for sig, (col, eu) in found.items():
        if eu and (pv_lo is None or pv_hi is None or not pv_hi > pv_lo):
            close()
            notes.add("header", f"column {col} needs the row's pv_lo and pv_hi (pv_hi > pv_lo) "
                                f"to convert to % of range")
            return empty(tname, present)
    quality = frozenset(w.strip().lower() for w in policy.quality_words)
    counts = {s: [0, 0] for s in present}
    parts_t, parts_l = [], []
    parts_v: dict[str, list[np.ndarray]] = {s: [] for s in present if s not in TEXT_SIGNALS}
    parts_m: list[np.ndarray] = []
    labels: dict[str, int] = {}
    state = {} if state is None else state
    n_rows = 0
    truncated = False
    try:
        for ch in chunks:
            if n_rows + len(ch.lines) > policy.max_rows:
                keep = policy.max_rows - n_rows
                last = int(ch.lines[keep - 1]) if keep > 0 else None
                ch = _Chunk(ch.lines[:keep], {k: v.iloc[:keep] for k, v in ch.cols.items()}, ch.bad,
                            None if ch.t is None else ch.t[:keep],
                            None if ch.col_lines is None else {k: v[:keep] for k, v in ch.col_lines.items()})
                truncated = True
                notes.add("cap", f"more than {policy.max_rows} data {unit}s; nothing after "
                                 f"{unit} {last} read (ReadPolicy.max_rows)")
            for ln, why in ch.bad:
                notes.add("cell", why, ln)
            n_rows += len(ch.lines)
            parts_l.append(ch.lines)
            parts_t.append(ch.t if ch.t is not None else _times(ch.cols[tname], ch.lines, tname, notes, state))
            for sig in present:
                col = found[sig][0]
                if sig in TEXT_SIGNALS:
                    codes, uniq = pd.factorize(ch.cols[col])
                    uniq = [str(u).strip() for u in uniq]
                    remap = np.array([labels.setdefault(u, len(labels)) if u not in ("", "nan", "None") else -1
                                      for u in uniq], dtype=np.int16)
                    m = remap[codes] if len(uniq) else np.full(len(codes), -1, np.int16)
                    m[codes < 0] = -1
                    counts[sig][0] += int((m < 0).sum())
                    parts_m.append(m.astype(np.int16))
                else:
                    cl = ch.lines if ch.col_lines is None else ch.col_lines.get(col, ch.lines)
                    parts_v[sig].append(_numbers(ch.cols[col], cl, sig, quality, notes, counts))
            if truncated:
                break
        ch = None        # the last chunk's raw columns (a week of a tag: tens of MB) not held through the checks
    finally:
        close()
    lines = np.concatenate(parts_l) if parts_l else np.zeros(0, np.int64)
    t = np.concatenate(parts_t) if parts_t else np.zeros(0)
    vals = {s: (np.concatenate(v) if v else np.zeros(0)) for s, v in parts_v.items()}
    mode = np.concatenate(parts_m) if parts_m else None
    del parts_l, parts_t, parts_v, parts_m
    for sig, (col, eu) in found.items():
        if eu:
            vals[sig] = (vals[sig] - pv_lo) / (pv_hi - pv_lo) * 100.0
            notes.add("units", f"{col} converted from engineering units with range {pv_lo:g} to {pv_hi:g}",
                      column=col)
    for sig, (q_n) in counts.items():
        if q_n[1]:
            notes.add("quality", f"{q_n[1]} cell{'s' if q_n[1] != 1 else ''} hold historian quality words; "
                                 f"read as missing values", column=found[sig][0])
    # ---- time in seconds from the first valid time
    start, start_text = None, state.get("text", "")
    ok = np.isfinite(t)
    if tname == "timestamp" and ok.any():
        if not state.get("zoned") and timezone:
            t, ok = _localise(t, ok, timezone, lines, notes)
            state["zoned"] = True
        ns0 = int(t[np.flatnonzero(ok)[0]])
        start = pd.Timestamp(ns0, tz="UTC") if state.get("zoned") else pd.Timestamp(ns0)
        t = (t - ns0) / 1e9
        if not state.get("zoned"):
            notes.add("zone", "timestamps carry no time zone: read as wall-clock time (a daylight-saving "
                              "change shows as a gap or as time going back; give offsets or the site's zone)")
    elif ok.any():
        t = t - t[np.flatnonzero(ok)[0]]
    # ---- order: drop lines whose time does not exceed every earlier time
    idx = np.flatnonzero(ok)
    tk = t[idx]
    if len(tk) > 1:
        prev = np.maximum.accumulate(tk)[:-1]
        back = np.flatnonzero(tk[1:] <= prev) + 1
        if len(back):
            texts = []
            for k in back[:MAX_PER_KIND]:
                if tk[k] == tk[k - 1]:
                    texts.append(f"time not increasing (same time as {unit} {lines[idx[k - 1]]}); {unit} dropped")
                else:
                    texts.append(f"time not increasing ({tk[k]:g} s after {prev[k - 1]:g} s, relative to the "
                                 f"first sample); {unit} dropped")
            notes.add_lines("order", lines[idx[back]], texts, tname)
            steps = prev[back - 1] - tk[back]
            dt_guess = float(np.median(np.diff(tk))) if len(tk) > 2 else 0.0
            if tname == "timestamp" and not state.get("zoned") and np.any(np.abs(steps + dt_guess - 3600.0) < max(60.0, 0.5 * dt_guess)):
                notes.add("zone", "time goes back by about an hour: a daylight-saving change in wall-clock "
                                  "time; give zone offsets or the site's time zone", column=tname)
            ok[idx[back]] = False
    dts_all = np.diff(t[ok])
    dt = float(np.median(dts_all)) if len(dts_all) else float("nan")
    # ---- flat runs of raw values (compressing historians)
    flat: dict[str, float] = {}
    for sig in present:
        if sig in FLAT_SIGNALS:
            flat[sig] = _flat_runs(vals[sig][ok], lines[ok], sig, policy.flat_run_samples, notes, unit)
    _units_check(vals, ok, found, notes)
    # ---- usable rows and segments
    usable = ok.copy()
    for v in vals.values():
        usable &= np.isfinite(v)
    ui = np.flatnonzero(usable)
    segs: list[Segment] = []
    if len(ui) < policy.min_samples:
        notes.add("short", f"{len(ui)} sample{'s' if len(ui) != 1 else ''}; at least "
                           f"{policy.min_samples} are needed")
    elif math.isfinite(dt) and dt > 0:
        segs = _segments(t, lines, vals, mode, ui, dt, policy, notes, tname)
    else:
        notes.add("time", "all times equal: no sample interval", column=tname)
    missing = {s: counts[s][0] for s in present}
    qual = {s: counts[s][1] for s in present if s not in TEXT_SIGNALS}
    return Record(shown, present, tuple(segs), notes.done(), dt, tname, start, start_text,
                  tuple(labels), n_rows, missing, qual, flat, truncated)


def _localise(t: np.ndarray, ok: np.ndarray, timezone: str, lines: np.ndarray, notes: _Notes
              ) -> tuple[np.ndarray, np.ndarray]:
    """Wall-clock ns in ``timezone`` -> UTC ns; the repeated autumn hour resolved by order."""
    idx = np.flatnonzero(ok)
    wall = pd.DatetimeIndex(t[idx].astype(np.int64))
    try:
        loc = wall.tz_localize(timezone, ambiguous="infer", nonexistent="NaT")
    except Exception:                              # pytz/zoneinfo raise several types when order cannot decide
        loc = wall.tz_localize(timezone, ambiguous="NaT", nonexistent="NaT")
    utc = loc.tz_convert("UTC").tz_localize(None)
    bad = np.isnat(utc.to_numpy())
    out = t.copy()
    out[idx] = utc.to_numpy().astype(np.int64).astype(float)
    if bad.any():
        notes.add_lines("time", lines[idx[bad]], [f"wall-clock time does not exist or is ambiguous in {timezone}"]
                        * int(bad.sum()), "timestamp")
        ok = ok.copy()
        ok[idx[bad]] = False
    return out, ok


def _segments(t, lines, vals, mode, ui, dt, policy: ReadPolicy, notes: _Notes, tname: str) -> list[Segment]:
    """Split usable rows at long holes; put each stretch on a uniform grid of ``dt``."""
    tu = t[ui]
    d = np.diff(tu)
    cuts = np.flatnonzero(d > policy.max_gap_intervals * dt)
    for k in cuts:
        notes.add("gap", f"gap of {d[k]:g} s, more than {policy.max_gap_intervals:g} x the median interval "
                         f"{dt:g} s; record split, nothing interpolated across it", int(lines[ui[k]]), tname,
                  int(lines[ui[k + 1]]))
    bounds = np.concatenate([[0], cuts + 1, [len(ui)]])
    segs = []
    filled = 0
    jit = [np.inf, 0.0]
    # every row usable and one segment (a clean record): the segment takes the arrays themselves, which
    # the caller drops (a week of a tag: no second copy of every signal)
    whole = len(ui) == len(t) and len(bounds) == 2
    for a, b in zip(bounds[:-1], bounds[1:]):
        sel = ui[a:b]
        if len(sel) < policy.min_samples:
            notes.add("short", f"segment of {len(sel)} samples, fewer than {policy.min_samples}: not used",
                      int(lines[sel[0]]), tname, int(lines[sel[-1]]))
            continue
        ts = t if whole else t[sel]
        dts = np.diff(ts)
        if float(np.max(np.abs(dts - dt)) / dt) > policy.uniform_tolerance:
            span = (ts[-1] - ts[0]) / dt
            if not span < policy.max_rows:
                notes.add("cap", f"resampling every {dt:g} s over {ts[-1] - ts[0]:g} s would give {span:.3g} "
                                 f"samples; at most {policy.max_rows:,} are used (decimate the record)",
                          int(lines[sel[0]]), tname, int(lines[sel[-1]]))
                continue
            steps = np.rint(dts / dt)
            holes = steps >= 2
            filled += int(np.sum(steps[holes] - 1))
            odd = np.abs(dts - steps * dt) > policy.uniform_tolerance * dt
            if odd.any():
                jit = [min(jit[0], float(dts[odd].min())), max(jit[1], float(dts[odd].max()))]
            n = int(math.floor((ts[-1] - ts[0]) / dt + 1e-9)) + 1
            grid = ts[0] + np.arange(n) * dt
            values = {s: np.interp(grid, ts, v[sel]) for s, v in vals.items()}
            m = None
            if mode is not None:
                pos = np.clip(np.searchsorted(ts, grid + 1e-9 * dt, side="right") - 1, 0, len(ts) - 1)
                m = mode[sel][pos]
        elif whole:
            values, m = dict(vals), mode
        else:
            values = {s: v[sel].copy() for s, v in vals.items()}
            m = mode[sel].copy() if mode is not None else None
        segs.append(Segment(float(ts[0]), dt, values, m, int(lines[sel[0]]), int(lines[sel[-1]])))
    if filled:
        notes.add("fill", f"{filled} missing sample{'s' if filled != 1 else ''} inside segments filled by linear "
                          f"interpolation (holes of at most {policy.max_gap_intervals:g} intervals)")
    if jit[1] > 0:
        notes.add("resample", f"sampling not uniform (intervals {jit[0]:g} to {jit[1]:g} s); resampled every "
                              f"{dt:g} s by linear interpolation")
    return segs


def _flat_runs(v: np.ndarray, lines: np.ndarray, sig: str, min_run: int, notes: _Notes, unit: str) -> float:
    """Share of samples in runs of >= ``min_run`` identical finite values; a note when any. [-]"""
    n = len(v)
    if n < min_run or min_run < 2:
        return 0.0
    same = np.zeros(n, bool)
    same[1:] = (v[1:] == v[:-1]) & np.isfinite(v[1:])
    starts = np.flatnonzero(~same)
    ends = np.append(starts[1:], n)
    lens = ends - starts
    long = lens >= min_run
    share = float(lens[long].sum() / n)
    if long.any():
        k = int(np.argmax(np.where(long, lens, 0)))
        notes.add("flat", f"{100 * share:.0f} % of samples lie in runs of {min_run} or more identical values "
                          f"(longest {lens[k]}): the mark of a compressing historian or a frozen transmitter; "
                          f"figures from these stretches are uncertain",
                  int(lines[starts[k]]), sig, int(lines[ends[k] - 1]))
    return share


def _units_check(vals: Mapping[str, np.ndarray], ok: np.ndarray, found, notes: _Notes) -> None:
    for sig, v in vals.items():
        x = v[ok]
        x = x[np.isfinite(x)]
        if not len(x) or sig not in ("pv", "sp", "op"):
            continue
        out = float(np.mean((x < -10.0) | (x > 110.0)))
        if out > 0.05:
            col = found[sig][0]
            hint = ("is the column in engineering units? name it " + f"{sig}_eu and give pv_lo/pv_hi"
                    if sig != "op" and not found[sig][1] else "check the scaling and pv_lo/pv_hi"
                    if sig != "op" else "op is read in % of output range")
            notes.add("units", f"{100 * out:.0f} % of values outside -10..110 % of range "
                               f"(from {x.min():.4g} to {x.max():.4g}): {hint}", column=col)
