"""Validated inventory rows: the one internal form of a loop as the engineer entered it.

Every physical value here is already in the project's units (time [s], frequency
[rad/s], gains [-] in % of PV range per % of output, integrating gains [1/s]).
Conversion happens once, in :mod:`audit.inventory`; nothing downstream converts.
"""

from __future__ import annotations

import unicodedata
from dataclasses import dataclass, field
from typing import Any


def printable(text: Any) -> str:
    """``text`` with control and format characters escaped (``\\x1b``, ``\\u200b``), safe to print.

    Spreadsheet text is untrusted: a terminal escape sequence in a header or a cell must never reach
    a terminal or a report as such. Ordinary spaces are kept; tabs and line breaks are escaped too.

    Parameters
    ----------
    text : Any
        Any text (converted with ``str``).
    """
    s = str(text)
    if s.isprintable():
        return s
    out = []
    for ch in s:
        if ch.isprintable() or ch == " ":
            out.append(ch)
        else:
            o = ord(ch)
            out.append(f"\\x{o:02x}" if o < 0x100 else f"\\u{o:04x}" if o < 0x10000 else f"\\U{o:08x}")
    return "".join(out)


def tag_key(tag: Any) -> str:
    """The comparison key of a tag: NFKC-normalised, format characters removed, spaces trimmed, case folded.

    Look-alike tags (a zero-width space inside, full-width letters) have the same key, so they count as
    duplicates and match as inner loops.

    Parameters
    ----------
    tag : Any
        A tag as entered (None or blank gives '').
    """
    s = unicodedata.normalize("NFKC", str(tag or ""))
    s = "".join(ch for ch in s if unicodedata.category(ch) != "Cf")
    return s.strip().casefold()


@dataclass(frozen=True)
class Problem:
    """One validation finding, located in the workbook.

    Parameters
    ----------
    sheet : str
        Sheet name (``loops`` or ``policy``; the file stem for a CSV).
    cell : str
        Cell reference such as ``F12``; a row alone (``12``) when no column applies.
    column : str
        Canonical column name, or '' when the problem concerns the whole row.
    message : str
        Plain words: what is wrong and what was found.
    severity : str
        ``error`` (the row cannot be evaluated) or ``warning``.
    """

    sheet: str
    cell: str
    column: str
    message: str
    severity: str = "error"

    def __post_init__(self) -> None:
        # spreadsheet text quoted in a location or a message is never printed raw
        for name in ("sheet", "cell", "column", "message"):
            object.__setattr__(self, name, printable(getattr(self, name)))

    def __str__(self) -> str:
        where = f"{self.sheet}!{self.cell}"
        if self.column:
            where += f" ({self.column})"
        return f"{where}: {self.message}"


@dataclass(frozen=True)
class LoopRow:
    """One non-blank inventory row, converted to project units.

    Attributes hold ``None`` where the row left the value blank. ``conventions``
    records how the engineer expressed each setting (e.g. ``{"kc": "pb_pct",
    "ti": "reset_rpm", "td": "td_min"}``) so proposals can be written back in the
    row's own terms. ``raw`` holds the cell values as read, keyed by canonical
    column name; ``extras`` the unknown columns, carried to the results.
    """

    index: int                      # position among non-blank rows, 0-based
    sheet: str
    excel_row: int                  # 1-based row number in the sheet (CSV: line number)
    tag: str | None = None
    service: str = ""
    area: str = ""
    criticality: str = "medium"     # high | medium | low
    model: str | None = None        # fopdt | sopdt | ipdt | tf
    gain: float | None = None       # [-]; ipdt: [1/s]
    tau1: float | None = None       # [s]
    tau2: float | None = None       # [s]
    lead: float | None = None       # [s]
    dead_time: float | None = None  # [s]
    num: tuple[float, ...] | None = None  # tf numerator, descending powers of s
    den: tuple[float, ...] | None = None  # tf denominator
    form: str = "ideal"             # ideal | series | parallel
    kc: float | None = None         # [-]
    ti: float | None = None         # [s]; None means no integral action
    td: float | None = None         # [s]
    kp: float | None = None         # [-]
    ki: float | None = None         # [1/s]
    kd: float | None = None         # [s]
    d_filter: float = 0.1           # derivative filter factor alpha [-]
    action: str = "reverse"         # reverse | direct
    sample: float | None = None     # controller execution period [s]
    pv_filter: float | None = None  # PV filter time constant [s]
    band_rad_s: float | None = None       # rejection band upper edge wd [rad/s]
    attenuation_db: float | None = None   # required attenuation A > 0 [dB]
    ms_max: float | None = None           # per-row override [-]
    gm_min_db: float | None = None        # per-row override [dB]
    pm_min_deg: float | None = None       # per-row override [deg]
    pv_lo: float | None = None            # PV range low [engineering units]
    pv_hi: float | None = None            # PV range high [engineering units]
    disturbance_file: str | None = None   # CSV path relative to the inventory folder
    allowed_amplitude: float | None = None  # [% of PV range]
    inner_loop: str | None = None         # tag of the inner loop of a cascade
    outer_model_input: str = "inner_pv"   # inner_pv | inner_sp
    data_file: str | None = None          # plant record (op, pv) path, resolved inside the inventory folder
    conventions: dict[str, str] = field(default_factory=dict)
    raw: dict[str, Any] = field(default_factory=dict)
    extras: dict[str, Any] = field(default_factory=dict)
    errors: tuple[Problem, ...] = ()
    warnings: tuple[Problem, ...] = ()

    @property
    def valid(self) -> bool:
        """True when the row has no error and can be evaluated."""
        return not self.errors

    @property
    def location(self) -> str:
        """``sheet!row`` for messages about the whole row."""
        return f"{self.sheet}!{self.excel_row}"


@dataclass(frozen=True)
class Inventory:
    """A read inventory: rows in order, the policy in force and file-level findings."""

    path: str                      # as given by the user
    name: str                      # file name
    sha256: str                    # of the file's bytes
    rows: tuple[LoopRow, ...]
    policy: "Policy"               # noqa: F821  (audit.policy.Policy)
    problems: tuple[Problem, ...] = ()   # file-level: unknown columns, policy cells, ...
    blank_rows: int = 0            # blank rows skipped in the middle of the data
    sheets: tuple[str, ...] = ()
    extra_columns: tuple[str, ...] = ()  # unknown headers, carried to the results
    column_letters: dict[str, str] = field(default_factory=dict)  # canonical column -> sheet column letter
    couplings: "CouplingSheet | None" = None  # noqa: F821  (audit.multiloop.couplings; None without the sheet)
    # the loop of each row as the reader built it to check that the engine can evaluate it (a cascade's
    # inner loop not composed; None where the row was invalid then); the models stage reuses them
    models: tuple = field(default=(), compare=False, repr=False)
