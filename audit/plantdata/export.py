"""A site's whole historian export as one input: each loop's slice read on its own, streamed.

``plant-audit run INV --data PATH`` takes one export of the site's historian (a file, or a
folder of files) in place of a ``data_file`` per row. :class:`ExportSource` finds what each
file holds once (column names, layout, the tags in it) and then reads one tag's slice at a
time -- never a whole file -- and hands it to the record reader's own rule
(:func:`.records.assemble_record`): quality words, duplicates, time going back, gaps as
segments, flat runs, units and zone-aware timestamps are checked exactly as for a
``data_file``, and every note names the file, the row (Parquet) or line (CSV), and the tag.

Layouts
-------
* **long**: one row per tag, time and signal: a tag column (``export_tag_column``, default
  ``tag``), one time column the record reader knows (``time_s`` [s], ``time_min`` [min] or
  ``timestamp``, ISO 8601 text or a native timestamp), a signal column
  (``export_signal_column``, default ``signal``) and a value column (``export_value_column``,
  default ``value``). The signal words that mean sp, pv, op and mode are the policy's
  ``export_words_*``. A loop's rows are gathered, then put side by side by time (a time at
  which a signal has no row reads as an empty cell of that signal).
* **wide**: one time column and one column per tag and signal, named by the policy's
  ``export_columns_*`` patterns (default ``{tag}.pv`` or ``{tag}/pv``; any case).

A file is long when it has the tag, signal and value columns, wide otherwise. Parquet
(``.parquet``, ``.pq``) and CSV (``.csv``) files may be mixed in a folder; every file of one
export must use the same time column. A folder is read in file-name order (sub-folders
included), so name its files so that this is time order.

Reading one tag
---------------
* Parquet, long: only the row groups whose statistics of the tag column can hold the tag are
  read, in batches of ``ReadPolicy.chunk_rows`` rows, four columns each; the rows of other
  tags are dropped batch by batch. An export written sorted by tag (or with one tag per row
  group) is read in proportion to the tag's own rows.
* Parquet, wide: the time column and the tag's own columns only (column projection).
* CSV: streamed in chunks through the record reader's CSV chunker, only the needed columns
  parsed; a CSV has no index, so each tag's read passes over the file (use Parquet for large
  exports).

Memory is bounded whatever the export's size: a loop's slice holds at most
``ReadPolicy.max_rows`` times (for an export, :data:`audit.limits.MAX_RECORD_LINES`, 2 million:
23 days of 1-s data), the rest is said in a ``cap`` note and not read; a long export's slice
at most four rows per time. With three signals a slice is below about 0.3 GB.

:class:`ExportSource` is a plain picklable object (paths, names and what each file holds), so it
can be sent to worker processes; each read opens its files itself.

A row with its own ``data_file`` keeps it; otherwise the export supplies the row's operating
record (:func:`audit.plantdata.sources.record_for_row`, the one place the health and model-check stages get a row's
record).
"""

from __future__ import annotations

import os
import re
import stat
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Iterator, Mapping, Sequence

import numpy as np
import pandas as pd

from ..limits import MAX_EXPORT_FILES, MAX_RECORD_LINES
from .records import (SIGNALS, TIME_COLUMNS, ReadPolicy, Record, _Chunk, _csv_chunks, _csv_header, _Notes,
                      _parquet_chunks, _times, assemble_record)

PARQUET_SUFFIXES = (".parquet", ".pq")
CSV_SUFFIXES = (".csv",)
#: Line numbers of the files of a folder are kept apart by this stride while a slice is read. [-]
_STRIDE = 10 ** 12


class ExportError(ValueError):
    """The export as a whole cannot be used (a user's mistake: exit 2)."""


# --------------------------------------------------------------------------- naming

def _split(text: str) -> tuple[str, ...]:
    return tuple(w.strip() for w in str(text).split(",") if w.strip())


@dataclass(frozen=True)
class ExportNaming:
    """How an export names tags and signals (from the policy's ``export_*`` settings).

    Attributes
    ----------
    tag_column, signal_column, value_column : str
        Column names of the long form (matched without regard to case).
    words : tuple of (str, tuple of str)
        Signal (sp, pv, op, mode) -> the words of the long form's signal column that mean it.
    columns : tuple of (str, tuple of str)
        Signal -> column-name patterns of the wide form, ``{tag}`` standing for the tag.
    units : str
        ``percent`` or ``eu`` (sp and pv in engineering units, converted with pv_lo/pv_hi).
    timezone : str
        IANA zone of timestamps written without a zone; '' for none.
    """

    tag_column: str = "tag"
    signal_column: str = "signal"
    value_column: str = "value"
    words: tuple[tuple[str, tuple[str, ...]], ...] = (
        ("sp", ("sp", "setpoint", "set point")), ("pv", ("pv", "measurement", "process value")),
        ("op", ("op", "output", "out")), ("mode", ("mode",)))
    columns: tuple[tuple[str, tuple[str, ...]], ...] = (
        ("sp", ("{tag}.sp", "{tag}/sp")), ("pv", ("{tag}.pv", "{tag}/pv")), ("op", ("{tag}.op", "{tag}/op")),
        ("mode", ("{tag}.mode", "{tag}/mode")))
    units: str = "percent"
    timezone: str = ""

    @classmethod
    def from_policy(cls, policy) -> "ExportNaming":
        """The naming of the policy in force.

        Parameters
        ----------
        policy : audit.policy.Policy
            Its ``export_*`` settings.
        """
        return cls(policy.export_tag_column.strip(), policy.export_signal_column.strip(),
                   policy.export_value_column.strip(),
                   tuple((s, _split(getattr(policy, f"export_words_{s}"))) for s in SIGNALS),
                   tuple((s, _split(getattr(policy, f"export_columns_{s}"))) for s in SIGNALS),
                   policy.export_units.strip().lower(),
                   "" if policy.export_timezone.strip().lower() in ("", "none") else policy.export_timezone.strip())

    def signal_of(self) -> dict[str, str]:
        """Signal word (lower case, single spaces) -> signal."""
        out: dict[str, str] = {}
        for sig, ws in self.words:
            for w in ws:
                out.setdefault(" ".join(w.lower().split()), sig)
        return out

    def column_rules(self) -> list[tuple[re.Pattern, str]]:
        """(regular expression with a ``tag`` group, signal) for every wide pattern."""
        rules = []
        for sig, pats in self.columns:
            for p in pats:
                a, b = p.split("{tag}", 1)
                rules.append((re.compile(re.escape(a) + "(?P<tag>.+)" + re.escape(b), re.I | re.S), sig))
        return rules


def tag_key(tag: object) -> str:
    """How tags are matched: stripped, case folded.

    Parameters
    ----------
    tag : object
        A tag as written (text or a number).
    """
    return str(tag).strip().casefold()


# --------------------------------------------------------------------------- what a file holds

@dataclass(frozen=True)
class ExportFile:
    """One file of an export, as scanned.

    Attributes
    ----------
    path : str
        The file.
    shown : str
        How messages name it (relative to the export's folder).
    fmt : str
        ``parquet`` or ``csv``.
    layout : str
        ``long`` or ``wide``.
    time_column : str
        The time column as written.
    columns : tuple of str
        Long: the tag, signal and value columns as written. Wide: ().
    wide : tuple of (str, tuple of (str, str))
        Wide: tag key -> (signal, column as written) pairs.
    tags : tuple of (str, tuple of str)
        Tag key -> the spellings found in the file.
    rows : int
        Data rows (Parquet; -1 for CSV, not counted). [-]
    """

    path: str
    shown: str
    fmt: str
    layout: str
    time_column: str
    columns: tuple[str, ...] = ()
    wide: tuple[tuple[str, tuple[tuple[str, str], ...]], ...] = ()
    tags: tuple[tuple[str, tuple[str, ...]], ...] = ()
    rows: int = -1

    @property
    def unit(self) -> str:
        """'row' (Parquet) or 'line' (CSV)."""
        return "row" if self.fmt == "parquet" else "line"


@dataclass(frozen=True)
class ExportSource:
    """A historian export: what each file holds, and one tag's record on request. Picklable.

    ``ExportSource(path, naming)`` scans the export (as :meth:`open` does; :class:`ExportError` when
    it cannot be used).

    Attributes
    ----------
    path : str
        The file or folder given (the user's own path: not confined).
    naming : ExportNaming
        Column names, signal words and patterns.
    files : tuple of ExportFile
        The files, in reading order.
    """

    path: str
    naming: ExportNaming
    files: tuple[ExportFile, ...] = ()
    _where: Mapping[str, tuple[int, ...]] = field(default_factory=dict, repr=False, compare=False)

    @classmethod
    def open(cls, path: str | Path, naming: ExportNaming = ExportNaming()) -> "ExportSource":
        """Scan an export (file or folder): layout, columns and tags of every file.

        Parameters
        ----------
        path : str or Path
            A ``.parquet``/``.pq``/``.csv`` file or a folder of them.
        naming : ExportNaming
            How tags and signals are named.

        Returns
        -------
        ExportSource

        Raises
        ------
        ExportError
            Nothing at ``path``; not a regular file or folder; a folder with no export file or a
            file inside it that is not a regular file; a file without a usable header (missing
            columns, wrong column types, unreadable); files with different time columns.
        """
        p = Path(path).expanduser()
        try:
            st = os.stat(p)
        except FileNotFoundError:
            raise ExportError(f"--data {path}: nothing at that path") from None
        except OSError as exc:
            raise ExportError(f"--data {path}: cannot be read ({exc.strerror})") from None
        if stat.S_ISDIR(st.st_mode):
            found = _folder_files(p)
            if not found:
                raise ExportError(f"--data {path}: the folder holds no .parquet, .pq or .csv file")
        elif stat.S_ISREG(st.st_mode):
            if p.suffix.lower() not in PARQUET_SUFFIXES + CSV_SUFFIXES:
                raise ExportError(f"--data {path}: an export is a .parquet, .pq or .csv file or a folder of them")
            found = [(p, p.name)]
        else:
            raise ExportError(f"--data {path}: not a regular file or a folder (a pipe or a device is not read)")
        files = tuple(_scan_file(f, shown, naming) for f, shown in found)
        times = sorted({f.time_column.lower() for f in files})
        if len(times) > 1:
            raise ExportError(f"--data {path}: the files use different time columns ({', '.join(times)}); one "
                              f"export must use one of {', '.join(TIME_COLUMNS)} throughout")
        return cls(str(p), naming, files, _index(files))

    def __post_init__(self):
        if not self.files:                       # ExportSource(path, naming): scanned here
            object.__setattr__(self, "files", ExportSource.open(self.path, self.naming).files)
        if not self._where:
            object.__setattr__(self, "_where", _index(self.files))

    @property
    def tags(self) -> dict[str, str]:
        """Tag key -> the tag as first written in the export."""
        out: dict[str, str] = {}
        for f in self.files:
            for k, spell in f.tags:
                out.setdefault(k, spell[0])
        return out

    def has(self, tag: str) -> bool:
        """True when some file holds ``tag`` (matched without regard to case)."""
        return tag_key(tag) in self._where

    def read(self, tag: str, pv_lo: float | None = None, pv_hi: float | None = None,
             policy: ReadPolicy | None = None, name: str | None = None, stats: dict | None = None) -> Record:
        """One tag's record, read from the files that hold it and checked by the record reader's rule.

        Parameters
        ----------
        tag : str
            The loop's tag (matched without regard to case).
        pv_lo, pv_hi : float, optional
            PV range, for ``export_units = eu``. [engineering units]
        policy : ReadPolicy, optional
            Reading limits; default ReadPolicy with ``max_rows`` = :data:`audit.limits.MAX_RECORD_LINES`.
        name : str, optional
            How the record and its notes are named (default ``"<file> (tag <tag>)"``).
        stats : dict, optional
            Filled with ``rows_scanned`` (export rows decoded), ``row_groups`` (Parquet row groups
            read) and ``files`` (files opened). [-]

        Returns
        -------
        Record
            With no segments and a note when the export holds no data for the tag.
        """
        policy = replace(policy, max_rows=min(policy.max_rows, MAX_RECORD_LINES)) if policy else \
            ReadPolicy(max_rows=MAX_RECORD_LINES)
        stats = stats if stats is not None else {}
        stats.update(rows_scanned=0, row_groups=0, files=0)
        key = tag_key(tag)
        idx = self._where.get(key, ())
        base = Path(self.path).name or self.path
        shown = name or f"{self.files[idx[0]].shown if len(idx) == 1 else base} (tag {tag})"
        unit = self.files[idx[0]].unit if idx else "row"
        notes = _Notes(shown, unit)
        if not idx:
            notes.add("file", f"no data for tag {tag} in the export {base} ({len(self.files)} file"
                              f"{'s' if len(self.files) != 1 else ''} searched)")
            return Record(shown, (), (), notes.done(), float("nan"))
        files = [self.files[i] for i in idx]
        multi = len(files) > 1
        eu = self.naming.units == "eu"
        tname = files[0].time_column.lower()
        layouts = {f.layout for f in files}
        if len(layouts) > 1:
            notes.add("header", f"tag {tag} is in long files and in wide files of the export; keep one layout "
                                f"per tag")
            return Record(shown, (), (), notes.done(), float("nan"), tname)
        if layouts == {"long"}:
            chunks, found, state = _long_slice(files, key, self.naming, policy, notes, tname, stats, multi)
        else:
            chunks, found, state = _wide_slice(files, key, policy, notes, tname, stats, multi)
        found = {s: (c, eu and s in ("sp", "pv")) for s, (c, _) in found.items()}
        if not found:
            notes.add("header", f"tag {tag}: none of the signals {', '.join(SIGNALS)} found in the export "
                                f"(see the policy's export_words_* settings)")
            return Record(shown, (), (), notes.done(), float("nan"), tname)
        rec = assemble_record(shown, unit, notes, tname, found, chunks, lambda: None, SIGNALS, pv_lo, pv_hi, policy,
                              self.naming.timezone or None, state)
        return _unstride(rec, files, tag) if multi else rec


def _index(files: Sequence[ExportFile]) -> dict[str, tuple[int, ...]]:
    where: dict[str, list[int]] = {}
    for i, f in enumerate(files):
        for k, _ in f.tags:
            where.setdefault(k, []).append(i)
    return {k: tuple(v) for k, v in where.items()}


def _folder_files(folder: Path) -> list[tuple[Path, str]]:
    """Export files under ``folder`` in name order; any that is not a regular file is refused."""
    out = []
    for root, dirs, names in os.walk(folder):
        dirs[:] = sorted(d for d in dirs if not d.startswith("."))
        for n in sorted(names):
            if n.startswith(".") or Path(n).suffix.lower() not in PARQUET_SUFFIXES + CSV_SUFFIXES:
                continue
            f = Path(root) / n
            rel = f.relative_to(folder).as_posix()
            try:
                st = os.stat(f)
            except OSError as exc:
                raise ExportError(f"--data {folder}: {rel} cannot be read ({exc.strerror})") from None
            if not stat.S_ISREG(st.st_mode):
                raise ExportError(f"--data {folder}: {rel} is not a regular file (a pipe, device or folder); "
                                  f"files of an export must be plain files")
            out.append((f, rel))
            if len(out) > MAX_EXPORT_FILES:
                raise ExportError(f"--data {folder}: more than {MAX_EXPORT_FILES:,} files; split the export")
    out.sort(key=lambda x: x[1])
    return out


def _pick(names: Sequence[str], want: str) -> str | None:
    low = {str(n).strip().lower(): n for n in names}
    return low.get(want.strip().lower())


def _scan_file(path: Path, shown: str, naming: ExportNaming) -> ExportFile:
    fmt = "parquet" if path.suffix.lower() in PARQUET_SUFFIXES else "csv"
    if fmt == "parquet":
        try:
            import pyarrow.parquet as pq
            pf = pq.ParquetFile(path)
        except Exception as exc:                       # pyarrow raises several types for a bad file
            raise ExportError(f"{shown}: cannot be read as Parquet ({type(exc).__name__}: {str(exc)[:80]})") from None
        names = list(pf.schema_arrow.names)
        types = {n: pf.schema_arrow.field(n).type for n in names}
    else:
        try:
            with open(path, "rb") as fh:
                head = _csv_header(fh)
        except UnicodeDecodeError:
            raise ExportError(f"{shown}: cannot be read as UTF-8 text") from None
        except OSError as exc:
            raise ExportError(f"{shown}: cannot be opened ({exc.strerror})") from None
        if head is None:
            raise ExportError(f"{shown}: empty file; expected a header line")
        names, types, pf = list(head[1]), {}, None
    tcols = [n for n in names if str(n).strip().lower() in TIME_COLUMNS]
    if len(tcols) != 1:
        raise ExportError(f"{shown}: needs exactly one time column ({', '.join(TIME_COLUMNS)}); found "
                          f"{', '.join(repr(str(n)) for n in names[:12])}{' ...' if len(names) > 12 else ''}")
    tcol = tcols[0]
    if types:
        _check_time_type(shown, tcol, types[tcol])
    cols = [_pick(names, c) for c in (naming.tag_column, naming.signal_column, naming.value_column)]
    if all(cols):
        if types:
            _check_long_types(shown, cols, types)
        tags = _long_tags(path, fmt, pf, cols[0], shown)
        return ExportFile(str(path), shown, fmt, "long", tcol, tuple(cols),
                          tags=tuple((k, tuple(v)) for k, v in tags.items()),
                          rows=pf.metadata.num_rows if pf is not None else -1)
    rules = naming.column_rules()
    wide: dict[str, list[tuple[str, str]]] = {}
    spell: dict[str, list[str]] = {}
    for n in names:
        if n == tcol:
            continue
        for rx, sig in rules:
            m = rx.fullmatch(str(n).strip())
            if m:
                k = tag_key(m.group("tag"))
                if sig not in (s for s, _ in wide.get(k, [])):
                    wide.setdefault(k, []).append((sig, str(n)))
                    spell.setdefault(k, [])
                    if m.group("tag").strip() not in spell[k]:
                        spell[k].append(m.group("tag").strip())
                break
    if not wide:
        missing = [c for c, v in zip((naming.tag_column, naming.signal_column, naming.value_column), cols) if not v]
        raise ExportError(f"{shown}: neither a long export (columns {naming.tag_column}, {naming.signal_column}, "
                          f"{naming.value_column} and a time column; missing {', '.join(missing)}) nor a wide one "
                          f"(columns named like {naming.columns[1][1][0]}); found "
                          f"{', '.join(repr(str(n)) for n in names[:12])}{' ...' if len(names) > 12 else ''} "
                          f"(the policy's export_* settings name them)")
    if types:
        for k, pairs in wide.items():
            for sig, c in pairs:
                _check_value_type(shown, c, types[c], sig == "mode")
    return ExportFile(str(path), shown, fmt, "wide", tcol, (),
                      tuple((k, tuple(v)) for k, v in wide.items()),
                      tuple((k, tuple(spell[k])) for k in wide), pf.metadata.num_rows if pf is not None else -1)


def _check_time_type(shown: str, col: str, t) -> None:
    import pyarrow as pa
    name = str(col).strip().lower()
    ok = (pa.types.is_timestamp(t) or pa.types.is_string(t) or pa.types.is_large_string(t)
          or pa.types.is_date(t)) if name == "timestamp" else (pa.types.is_integer(t) or pa.types.is_floating(t)
                                                                or pa.types.is_string(t) or pa.types.is_decimal(t))
    if not ok:
        want = "a timestamp or ISO 8601 text" if name == "timestamp" else "numbers"
        raise ExportError(f"{shown}: column {col} holds {t}; it must hold {want}")


def _check_long_types(shown: str, cols: Sequence[str], types) -> None:
    import pyarrow as pa

    def text(t):
        if pa.types.is_dictionary(t):
            t = t.value_type
        return pa.types.is_string(t) or pa.types.is_large_string(t)

    tag_t, sig_t, val_t = (types[c] for c in cols)
    if not (text(tag_t) or pa.types.is_integer(tag_t)):
        raise ExportError(f"{shown}: column {cols[0]} holds {tag_t}; tags must be text")
    if not text(sig_t):
        raise ExportError(f"{shown}: column {cols[1]} holds {sig_t}; signal words must be text")
    _check_value_type(shown, cols[2], val_t, True)


def _check_value_type(shown: str, col: str, t, text_ok: bool) -> None:
    import pyarrow as pa
    if pa.types.is_dictionary(t):
        t = t.value_type
    ok = pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t) or pa.types.is_null(t)
    ok = ok or pa.types.is_string(t) or pa.types.is_large_string(t)       # quality words, mode words
    if not ok:
        raise ExportError(f"{shown}: column {col} holds {t}; values must be numbers (or text: quality and mode words)")


def _long_tags(path: Path, fmt: str, pf, tag_col: str, shown: str) -> dict[str, list[str]]:
    """Tags of a long file: from row-group statistics when each group holds one tag, else one pass."""
    out: dict[str, list[str]] = {}

    def add(values) -> None:
        for v in values:
            if v is None or (isinstance(v, float) and np.isnan(v)):
                continue
            s = str(v).strip()
            k = tag_key(s)
            lst = out.setdefault(k, [])
            if s not in lst and len(lst) < 8:
                lst.append(s)

    if fmt == "parquet":
        import pyarrow.compute as pc
        md = pf.metadata
        ci = pf.schema_arrow.get_field_index(tag_col)
        stats = []
        for g in range(md.num_row_groups):
            s = md.row_group(g).column(ci).statistics
            stats.append((s.min, s.max) if s is not None and s.has_min_max else None)
        if stats and all(x is not None and x[0] == x[1] for x in stats):
            add(x[0] for x in stats)
            return out
        for batch in pf.iter_batches(batch_size=1 << 20, columns=[tag_col]):
            add(pc.unique(batch.column(0)).to_pylist())
        return out
    with open(path, "rb") as fh:
        hline, header = _csv_header(fh)
        keys = [str(h).strip().lower() for h in header]
        want = [keys.index(tag_col.strip().lower())]
        for ch in _csv_chunks(fh, hline + 1, keys, want, 500_000):
            add(pd.unique(ch.cols[keys[want[0]]].astype(str)))
    return out


def _is_text(t) -> bool:
    import pyarrow as pa
    if pa.types.is_dictionary(t):
        t = t.value_type
    return pa.types.is_string(t) or pa.types.is_large_string(t)


# --------------------------------------------------------------------------- reading one tag

def _file_spellings(f: ExportFile, key: str) -> tuple[str, ...]:
    for k, v in f.tags:
        if k == key:
            return v
    return ()


def _long_batches(f: ExportFile, key: str, rows: int, stats: dict) -> Iterator[tuple[np.ndarray, dict[str, pd.Series]]]:
    """(lines, {time, signal, value} raw) of one tag's rows of a long file, batch by batch."""
    tag_c, sig_c, val_c = f.columns
    spell = _file_spellings(f, key)
    stats["files"] += 1
    if f.fmt == "parquet":
        import pyarrow as pa
        import pyarrow.compute as pc
        import pyarrow.parquet as pq
        pf = pq.ParquetFile(f.path)
        md = pf.metadata
        ci = pf.schema_arrow.get_field_index(tag_c)
        lo_hi = sorted(spell)
        text_tags = _is_text(pf.schema_arrow.field(tag_c).type)
        first = 1
        for g in range(md.num_row_groups):
            rg = md.row_group(g)
            n = rg.num_rows
            s = rg.column(ci).statistics
            only = False                                   # the row group holds this tag alone
            if s is not None and s.has_min_max and text_tags:
                if not any(str(s.min) <= t <= str(s.max) for t in lo_hi):
                    first += n
                    continue
                only = s.min == s.max and s.null_count == 0
            stats["row_groups"] += 1
            start = first
            for batch in pf.iter_batches(batch_size=rows, row_groups=[g], columns=[tag_c, f.time_column, sig_c, val_c]):
                m = batch.num_rows
                stats["rows_scanned"] += m
                tags = batch.column(0)
                if not _is_text(tags.type):
                    tags = tags.cast(pa.string())
                if only:
                    idx = np.arange(m)
                    sub = batch
                else:
                    mask = pc.is_in(pc.utf8_trim_whitespace(tags.cast(pa.string())),
                                    value_set=pa.array(list(spell), pa.string()))
                    mask = pc.fill_null(mask, False)
                    idx = np.flatnonzero(mask.to_numpy(zero_copy_only=False))
                    sub = batch.take(pa.array(idx)) if len(idx) else None
                if len(idx):
                    words = sub.column(2)
                    if _is_text(words.type) and not pa.types.is_dictionary(words.type):
                        words = pc.dictionary_encode(words)     # each word once: a categorical series
                    cols = {"time": sub.column(1).to_pandas(), "signal": words.to_pandas(),
                            "value": sub.column(3).to_pandas()}
                    yield start + idx.astype(np.int64), cols
                start += m
            first += n
        return
    with open(f.path, "rb") as fh:
        hline, header = _csv_header(fh)
        keys = [str(h).strip().lower() for h in header]
        want = [keys.index(c.strip().lower()) for c in (tag_c, f.time_column, sig_c, val_c)]
        kt, kti, ks, kv = (keys[i] for i in want)
        spl = {tag_key(s) for s in spell}
        for ch in _csv_chunks(fh, hline + 1, keys, want, rows):
            stats["rows_scanned"] += len(ch.lines)
            sel = ch.cols[kt].astype(str).str.strip().str.casefold().isin(spl).to_numpy()
            if sel.any():
                yield ch.lines[sel], {"time": ch.cols[kti][sel].reset_index(drop=True),
                                      "signal": ch.cols[ks][sel].reset_index(drop=True),
                                      "value": ch.cols[kv][sel].reset_index(drop=True)}


def _long_slice(files: Sequence[ExportFile], key: str, naming: ExportNaming, policy: ReadPolicy, notes: _Notes,
                tname: str, stats: dict, multi: bool):
    """Gather one tag's long rows (bounded), parse times once, put the signals side by side by time."""
    cap = policy.max_rows * len(SIGNALS)
    words = naming.signal_of()
    parts_l, parts_t, parts_s, parts_v = [], [], [], []
    n = 0
    capped = False
    for j, f in enumerate(files):
        off = j * _STRIDE if multi else 0
        for lines, cols in _long_batches(f, key, policy.chunk_rows, stats):
            if n + len(lines) > cap:
                keep = cap - n
                lines = lines[:keep]
                cols = {k: v.iloc[:keep] for k, v in cols.items()}
                capped = True
            parts_l.append(lines + off)
            parts_t.append(cols["time"])
            parts_s.append(cols["signal"])
            parts_v.append(cols["value"])
            n += len(lines)
            if capped:
                notes.add("cap", f"more than {cap:,} rows for this tag ({policy.max_rows:,} times of "
                                 f"{len(SIGNALS)} signals, ReadPolicy.max_rows); nothing after {f.unit} "
                                 f"{int(lines[-1]) if len(lines) else 0} read", int(lines[-1] + off) if len(lines) else None)
                break
        if capped:
            break
    if not parts_l:
        return iter(()), {}, {}
    lines = np.concatenate(parts_l)
    del parts_l
    starts = np.cumsum([0] + [len(v) for v in parts_v[:-1]])
    # times parsed part by part (as the file reader does chunk by chunk), each part's raw times
    # dropped once parsed: no whole-slice copy of the raw column beside the parsed one
    state: dict = {}
    t = np.empty(len(lines))
    for k, a in enumerate(starts):
        b = a + len(parts_t[k])
        t[a:b] = _times(parts_t[k], lines[a:b], tname, notes, state)
        parts_t[k] = None
    del parts_t
    sig_parts, word_parts = [], []
    for part in parts_s:                                                # words normalised once each, part by part
        if isinstance(part.dtype, pd.CategoricalDtype):
            codes, uniq = part.cat.codes.to_numpy(), part.cat.categories
        else:
            codes, uniq = pd.factorize(part)
        norm = np.array([" ".join(str(u).lower().split()) for u in uniq] + [""], dtype=object)
        lut = np.array([SIGNALS.index(words[w]) if w in words else -1 for w in norm], dtype=np.int8)
        sig_parts.append(lut[codes])                                    # index into SIGNALS, -1 unknown
        word_parts.append((norm, codes))
    sig = np.concatenate(sig_parts)
    del parts_s, sig_parts
    unknown = sig < 0
    if unknown.any():
        bounds = np.cumsum([0] + [len(c) for _, c in word_parts])
        vc = pd.Series(np.concatenate([norm[codes[unknown[a:b]]] for (norm, codes), a, b
                                       in zip(word_parts, bounds[:-1], bounds[1:])])).value_counts()
        shown = ", ".join(f"{w!r} ({c})" for w, c in vc.head(6).items())
        notes.add("header", f"signal words not in the policy's export_words_* settings: {shown}"
                            f"{' ...' if len(vc) > 6 else ''}; those rows are not read", column="signal")
    ok = ~unknown & np.isfinite(t)
    present = [s for j, s in enumerate(SIGNALS) if np.any(sig[ok] == j)]
    if not present:
        return iter(()), {}, state
    per: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    for s in present:
        idx = np.flatnonzero(ok & (sig == SIGNALS.index(s)))
        ts = t[idx]
        if not np.all(ts[1:] > ts[:-1]):                    # not already in strictly ascending time
            order = np.argsort(ts, kind="stable")
            idx, ts = idx[order], ts[order]
        dup = np.flatnonzero(ts[1:] == ts[:-1]) + 1
        if len(dup):
            notes.add_lines("order", lines[idx[dup]], [f"a second {s} row at the same time as {files[0].unit} "
                                                       f"{int(lines[idx[k - 1]]) % _STRIDE}; row dropped"
                                                       for k in dup[:20]], s)
            keep = np.ones(len(idx), bool)
            keep[dup] = False
            idx, ts = idx[keep], ts[keep]
        per[s] = (idx, ts)
    # the times of all rows read, once each: when every signal has the same times (the usual export),
    # those are the grid, in order (a dropped duplicate repeats a time that is kept)
    first_ts = per[present[0]][1]
    same = all(np.array_equal(per[s][1], first_ts) for s in present[1:])
    grid = first_ts if same else np.unique(t[ok])
    del t, ok, sig, unknown                             # a week of a tag: each tens of MB, not needed below
    if same:                                            # each signal's times are the grid's
        per = {s: (idx, None) for s, (idx, _) in per.items()}
    rep = np.full(len(grid), np.iinfo(np.int64).max, dtype=np.int64)
    cols: dict[str, pd.Series] = {}
    col_lines: dict[str, np.ndarray] = {}
    converted: dict[int, np.ndarray] = {}
    for s in present:
        idx, ts = per[s]
        vals, numeric = _take(parts_v, starts, idx, s != "mode", converted)
        if same:                                        # every time has a row of this signal, in order
            arr, ln = vals, lines[idx]
            np.minimum(rep, ln, out=rep)
        else:
            pos = np.searchsorted(grid, ts)
            arr = np.full(len(grid), np.nan) if numeric else np.full(len(grid), None, dtype=object)
            arr[pos] = vals
            ln = np.zeros(len(grid), dtype=np.int64)
            ln[pos] = lines[idx]
            np.minimum.at(rep, pos, lines[idx])
        cols[s] = pd.Series(arr, dtype=arr.dtype, copy=False)   # no inference pass over a mode column's words
        col_lines[s] = ln
    del converted, per
    for s in present:                                   # a time with no row of a signal: named by a row at that time
        miss = col_lines[s] == 0
        col_lines[s][miss] = rep[miss]
    chunk = _Chunk(rep, cols, (), grid.astype(float), col_lines)
    return iter((chunk,)), {s: (s, False) for s in present}, state


def _take(parts: Sequence[pd.Series], starts: np.ndarray, idx: np.ndarray, numbers: bool,
          converted: dict[int, np.ndarray] | None = None) -> tuple[np.ndarray, bool]:
    """Values at positions ``idx`` of the parts laid end to end; floats when every part holding them is numeric.

    ``converted`` keeps each numeric part's values between calls (the signals of one slice share
    parts): the part's own array when it is already of a float type (the values taken are converted,
    exactly, not the whole part), else the part as floats.
    """
    which = np.searchsorted(starts, idx, side="right") - 1
    used = np.flatnonzero(np.bincount(which, minlength=len(parts)))
    numeric = numbers and all(pd.api.types.is_numeric_dtype(parts[w].dtype)
                              and not pd.api.types.is_bool_dtype(parts[w].dtype) for w in used)
    out = np.empty(len(idx), dtype=float if numeric else object)
    cache = {} if converted is None else converted
    one = len(used) == 1
    for w in used:
        at = idx - starts[w] if one else idx[which == w] - starts[w]
        if numeric:
            if w not in cache:
                p = parts[w]
                cache[w] = p.to_numpy() if p.dtype in (np.float32, np.float64) else \
                    p.to_numpy(dtype=float, na_value=np.nan)
            got = cache[w][at].astype(float, copy=False)
        else:
            got = parts[w].iloc[at].to_numpy(dtype=object)
        if one:
            out[:] = got
        else:
            out[which == w] = got
    return out, numeric


def _wide_slice(files: Sequence[ExportFile], key: str, policy: ReadPolicy, notes: _Notes, tname: str, stats: dict,
                multi: bool):
    """One tag's columns (and the time column) of each wide file, as the record reader's chunks."""
    found: dict[str, tuple[str, bool]] = {}
    per_file = []
    for f in files:
        pairs = dict(next(v for k, v in f.wide if k == key))
        per_file.append(pairs)
        for sig in SIGNALS:
            if sig in pairs and sig not in found:
                found[sig] = (sig, False)

    def gen() -> Iterator[_Chunk]:
        for j, (f, pairs) in enumerate(zip(files, per_file)):
            off = j * _STRIDE if multi else 0
            stats["files"] += 1
            sigs = [s for s in SIGNALS if s in pairs]
            if f.fmt == "parquet":
                import pyarrow.parquet as pq
                pf = pq.ParquetFile(f.path)
                stats["row_groups"] += pf.metadata.num_row_groups
                it = _parquet_chunks(pf, [tname] + sigs, [f.time_column] + [pairs[s] for s in sigs], policy.chunk_rows)
                fh = None
            else:
                fh = open(f.path, "rb")
                hline, header = _csv_header(fh)
                keys = [str(h).strip().lower() for h in header]
                want = [keys.index(f.time_column.strip().lower())] + [keys.index(pairs[s].strip().lower())
                                                                      for s in sigs]
                it = _rename(_csv_chunks(fh, hline + 1, keys, want, policy.chunk_rows),
                             {keys[w]: k for w, k in zip(want, [tname] + sigs)})
            try:
                for ch in it:
                    stats["rows_scanned"] += len(ch.lines)
                    cols = dict(ch.cols)
                    for s in found:
                        if s not in cols:
                            cols[s] = pd.Series(np.full(len(ch.lines), None, dtype=object))
                    yield _Chunk(ch.lines + off, cols, tuple((ln + off, why) for ln, why in ch.bad))
            finally:
                if fh is not None:
                    fh.close()

    return gen(), found, {}


def _rename(chunks: Iterator[_Chunk], names: dict[str, str]) -> Iterator[_Chunk]:
    for ch in chunks:
        yield _Chunk(ch.lines, {names.get(k, k): v for k, v in ch.cols.items()}, ch.bad)


def _unstride(rec: Record, files: Sequence[ExportFile], tag: str) -> Record:
    """A slice read from several files: each note and segment line back to its own file."""
    def where(line):
        j, ln = divmod(int(line), _STRIDE)
        return files[min(j, len(files) - 1)], ln

    notes = []
    for n in rec.notes:
        if n.line is None:
            notes.append(n)
            continue
        f, ln = where(n.line)
        end = None
        if n.line_end is not None:
            f2, e = where(n.line_end)
            end = e if f2 is f else None
            if f2 is not f:
                text = f"{n.text} (to {f2.unit} {e} of {f2.shown})"
                n = replace(n, text=text)
        notes.append(replace(n, file=f"{f.shown} (tag {tag})", line=ln, line_end=end, unit=f.unit))
    segs = tuple(replace(s, first_line=int(s.first_line) % _STRIDE, last_line=int(s.last_line) % _STRIDE)
                 for s in rec.segments)
    return replace(rec, notes=tuple(notes), segments=segs)


# --------------------------------------------------------------------------- the export against the inventory

@dataclass(frozen=True)
class ExportSummary:
    """What an export holds against the inventory.

    Attributes
    ----------
    path : str
        The export.
    files : int
        Files read. [-]
    matched : int
        Inventory tags with data in the export. [-]
    without_data : tuple of str
        Inventory tags (rows without a data_file) the export holds nothing for.
    not_in_inventory : tuple of str
        Tags of the export that no inventory row names.
    """

    path: str
    files: int
    matched: int
    without_data: tuple[str, ...]
    not_in_inventory: tuple[str, ...]

    def text(self) -> str:
        """One line for the user."""
        extra = ""
        if self.not_in_inventory:
            few = ", ".join(self.not_in_inventory[:5])
            extra = (f"; {len(self.not_in_inventory)} tag{'s' if len(self.not_in_inventory) != 1 else ''} of the "
                     f"export not in the inventory ({few}{', ...' if len(self.not_in_inventory) > 5 else ''}), "
                     f"not read")
        miss = (f"; {len(self.without_data)} inventory tag{'s' if len(self.without_data) != 1 else ''} without "
                f"data in it") if self.without_data else ""
        return f"export {self.path}: {self.files} file{'s' if self.files != 1 else ''}, {self.matched} loops " \
               f"matched{miss}{extra}"


def open_for_audit(path: str, inventory) -> tuple[ExportSource, ExportSummary]:
    """Open the export of a run and compare its tags with the inventory's.

    Parameters
    ----------
    path : str
        ``--data``.
    inventory : audit.rows.Inventory
        The inventory read (its policy names the export's columns and signals).

    Returns
    -------
    (ExportSource, ExportSummary)

    Raises
    ------
    ExportError
        The export cannot be used (see :meth:`ExportSource.open`).
    """
    src = ExportSource.open(str(path), ExportNaming.from_policy(inventory.policy))
    inv_tags = {tag_key(r.tag): r for r in inventory.rows if r.tag}
    have = src.tags
    matched = sum(1 for k in inv_tags if k in have)
    without = tuple(r.tag for k, r in inv_tags.items()
                    if k not in have and not (getattr(r, "data_file", None) or r.extras.get("data_file")))
    extra = tuple(sorted(v for k, v in have.items() if k not in inv_tags))
    return src, ExportSummary(str(path), len(src.files), matched, without, extra)
