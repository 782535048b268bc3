"""Keeping untrusted spreadsheet text inert in what the tool writes.

Text that begins with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return is
read as a formula by spreadsheet programs (CSV/formula injection; OWASP, "CSV
Injection"). Such text is written with a leading apostrophe in CSV and as an
explicit string cell in xlsx, so it is shown, never evaluated.
"""

from __future__ import annotations

FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


def is_formula_like(text: str) -> bool:
    """True when a spreadsheet program could take ``text`` for a formula.

    Parameters
    ----------
    text : str
        Free text from the inventory or the results.
    """
    return isinstance(text, str) and text.startswith(FORMULA_STARTS)


def neutralise_formula(text: str) -> str:
    """``text`` made inert for CSV: a leading apostrophe when it could be a formula.

    Numbers written by the tool itself (e.g. ``-3.2``) never pass through here;
    only free text does.

    Parameters
    ----------
    text : str
        Free text from the inventory or the results.
    """
    if is_formula_like(text):
        return "'" + text
    return text
