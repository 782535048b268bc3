"""``plant-audit identify RECORD [RECORD ...]``: text and JSON views of identifications.

Exit codes: 0 a model was identified (from every record); 1 a record was read but the
data do not support a model (the notes say why: too little excitation, op at a limit,
poor fit); 2 a record cannot be read (missing file, bad header, nothing usable; the
others are still identified). Several records are identified together
(:func:`.identify.identify_many`, ``--jobs`` processes).
"""

from __future__ import annotations

import json
import math
import sys
from typing import Any, Sequence

from .identify import PARAMS, UNITS, Fit, Identification, IdentifyPolicy, identify_many
from .records import read_record


def fit_json(f: Fit) -> dict[str, Any]:
    """One fit as plain JSON-ready data (non-finite numbers as None).

    Parameters
    ----------
    f : Fit
        The fit.
    """
    def num(x):
        return float(x) if isinstance(x, (int, float)) and math.isfinite(x) else None
    return {"model": f.model,
            "params": {k: num(v) for k, v in f.params.items()},
            "ci95": {k: num(v) for k, v in f.ci95.items()},
            "bias_pct": num(f.bias), "fit_pct": num(f.fit_pct), "fit_holdout_pct": num(f.fit_holdout_pct),
            "bic": num(f.bic), "n_eff": num(f.n_eff), "residual_ljung_box_p": num(f.residual_lb_p),
            "residual_white": f.residual_white, "residual_input_corr": num(f.residual_input_corr)}


def identification_json(r: Identification) -> dict[str, Any]:
    """An identification as plain JSON-ready data.

    Parameters
    ----------
    r : Identification
        The result.
    """
    return {"record": r.name, "identifiable": r.identifiable, "samples": int(len(r.pv)),
            "dt_s": r.dt if math.isfinite(r.dt) else None, "lines": list(r.segment_lines),
            "best": fit_json(r.best) if r.best else None,
            "fits": {m: fit_json(f) for m, f in r.fits.items()}, "notes": list(r.notes)}


def format_identification(r: Identification) -> str:
    """Plain-text summary of an identification (what the command prints).

    Parameters
    ----------
    r : Identification
        The result.
    """
    out = [f"record        {r.name}  ({len(r.pv)} samples every {r.dt:g} s, lines "
           f"{r.segment_lines[0]}-{r.segment_lines[1]})" if len(r.pv) else f"record        {r.name}"]
    b = r.best
    if b is not None:
        others = ", ".join(f"{m} {f.bic - b.bic:+.1f}" for m, f in r.fits.items() if m != b.model)
        out.append(f"model         {b.model}  (chosen by BIC; difference of the others: {others})")
        for k in PARAMS[b.model]:
            unit = "1/s" if (b.model == "ipdt" and k == "gain") else UNITS[k]
            out.append(f"  {k:<11} {b.params[k]:.4g} +/- {b.ci95[k]:.2g} [{unit}] (95 %)")
        out.append(f"fit           {b.fit_pct:.1f} %  (held-out part: {b.fit_holdout_pct:.1f} %)")
        white = "white" if b.residual_white else "not white"
        out.append(f"residuals     {white} (Ljung-Box p {b.residual_lb_p:.3g}); largest correlation with past op "
                   f"{b.residual_input_corr:.3f} (99 % bound {b.corr_bound(len(r.pv)):.3f})")
    else:
        out.append("model         none: the data do not support one (see the notes)")
        for m, f in r.fits.items():
            out.append(f"  tried {m:<6} fit {f.fit_pct:.1f} %")
    for n in r.notes:
        out.append(f"note          {n}")
    return "\n".join(out)


def identify_command(path: str | Sequence[str], pv_lo: float | None = None, pv_hi: float | None = None,
                     as_json: bool = False, timezone: str | None = None, jobs: int = 1
                     ) -> tuple[int, Identification | list[Identification | None] | None]:
    """Read one record or several, identify (several together, over ``jobs`` processes), print.

    Parameters
    ----------
    path : str or sequence of str
        The record(s) (CSV or Parquet).
    pv_lo, pv_hi : float, optional
        PV range for ``*_eu`` columns. [engineering units]
    as_json : bool
        Print JSON instead of text.
    timezone : str, optional
        Zone of timestamps written without one.
    jobs : int
        Worker processes for several records. [-]

    Returns
    -------
    tuple
        Exit code and the result. One record: 0 model, 1 no model, 2 unreadable, and the
        :class:`Identification` (None when unreadable). Several: 2 when any record cannot be
        read, else 1 when any gives no model, else 0; and a list (None for an unreadable record).
    """
    paths = [path] if isinstance(path, str) else list(path)
    recs = [read_record(p, pv_lo=pv_lo, pv_hi=pv_hi, timezone=timezone) for p in paths]
    ok = [not (not r.usable and r.notes_of("file", "header")) for r in recs]
    for r, good in zip(recs, ok):
        if not good:
            for n in r.notes_of("file", "header"):
                print(f"plant-audit identify: {n}", file=sys.stderr)
    found = iter(identify_many([r for r, good in zip(recs, ok) if good], IdentifyPolicy(), jobs=jobs))
    results = [next(found) if good else None for good in ok]
    if len(paths) == 1:
        r = results[0]
        if r is None:
            return 2, None
        print(json.dumps(identification_json(r), indent=1, ensure_ascii=False) if as_json
              else format_identification(r))
        return (0 if r.identifiable else 1), r
    if as_json:
        print(json.dumps({"records": [identification_json(r) if r is not None else
                                      {"record": p, "readable": False} for p, r in zip(paths, results)]},
                         indent=1, ensure_ascii=False))
    else:
        print("\n\n".join(format_identification(r) if r is not None else f"record        {p}  (cannot be read)"
                           for p, r in zip(paths, results)))
    code = 2 if any(r is None for r in results) else (1 if not all(r.identifiable for r in results) else 0)
    return code, results


def identify_inventory_command(path: str, write_to: str | None = None, as_json: bool = False, jobs: int = 1) -> int:
    """``plant-audit identify INVENTORY.xlsx [--write-inventory NEW.xlsx]``: every row's ``data_file``.

    Parameters
    ----------
    path : str
        The inventory workbook.
    write_to : str, optional
        A new workbook: a copy of the inventory with the identified models (see
        :mod:`audit.plantdata.writeback`).
    as_json : bool
        Print JSON instead of text.
    jobs : int
        Worker processes. [-]

    Returns
    -------
    int
        0 when at least one row got a model, 1 when none did, 2 when the copy cannot be written.
    """
    from pathlib import Path

    from ..inventory import read_inventory
    from .records import PathError, confine
    from .writeback import WriteError, write_identified_inventory

    inv = read_inventory(path)
    folder = Path(path).resolve().parent
    found: dict[int, tuple[str, Identification]] = {}
    items: list = []
    todo = []
    for row in inv.rows:
        if not row.data_file:
            continue
        where = f"{inv.sheets[0] if inv.sheets else 'loops'}!{row.excel_row}"
        try:
            full, shown = confine(folder, row.data_file)
        except PathError as exc:
            items.append({"row": row.excel_row, "tag": row.tag, "record": None, "identifiable": False,
                          "notes": [str(exc)]})
            continue
        todo.append((len(items), row, where, shown, read_record(full, pv_lo=row.pv_lo, pv_hi=row.pv_hi, name=shown)))
        items.append(None)
    # every row's record identified together (batched, over ``jobs`` processes)
    for (k, row, where, shown, _), r in zip(todo, identify_many([t[4] for t in todo], IdentifyPolicy(), jobs=jobs)):
        if r.best is not None:
            found[row.excel_row] = (shown, r)
        items[k] = {"row": row.excel_row, "tag": row.tag, "where": where, **identification_json(r)}
    summary = None
    if write_to:
        try:
            summary = write_identified_inventory(path, write_to, found)
        except WriteError as exc:
            print(f"plant-audit identify: {exc}", file=sys.stderr)
            return 2
    if as_json:
        print(json.dumps({"inventory": inv.name, "loops": items,
                          "written": summary.path if summary else None}, indent=1, ensure_ascii=False))
    else:
        for it in items:
            b = it.get("best")
            what = (f"{b['model']}  fit {b['fit_pct']:.1f} %  " + "  ".join(
                f"{k} {v:.4g}" for k, v in b["params"].items())) if b else \
                f"no model: {(it['notes'] or [''])[-1]}"
            print(f"{it['tag'] or 'row ' + str(it['row']):<12} {it.get('record') or '-':<28} {what}")
        if summary:
            print(f"written: {summary.path} ({summary.rows_changed} rows, {summary.cells_changed} cells changed, "
                  f"each with a comment)")
    return 0 if found else 1
