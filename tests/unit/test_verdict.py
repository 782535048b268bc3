"""Status and findings (audit.verdict): the documented rules, checked case by case (common practice)."""

from __future__ import annotations

import math

import pandas as pd

from audit.policy import Policy
from audit.rows import LoopRow
from audit.verdict import judge, limits_in_force

LIM = {"ms_max": 2.0, "gm_min_db": 6.0, "pm_min_deg": 30.0}


def fig(**kw) -> pd.Series:
    base = dict(stable=True, rhp_closed=0, ms=1.5, gm_db=10.0, gm_low=math.nan, pm_deg=60.0,
                band_s_db=-30.0, engine_note="")
    base.update(kw)
    return pd.Series(base)


def test_passes_marginal_fails_unstable():
    assert judge(fig(), LIM, 20.0, 10.0) == ("passes", [])
    st, words = judge(fig(ms=1.85), LIM, None, 10.0)
    assert st == "marginal" and "Ms 1.85 near limit 2" in words[0]
    st, words = judge(fig(ms=2.49), LIM, None, 10.0)
    assert st == "fails" and words == ["Ms 2.49 > 2"]
    st, words = judge(fig(band_s_db=-15.0), LIM, 20.0, 10.0)
    assert st == "fails" and "-15 dB > -20 dB" in words[0]
    st, words = judge(fig(band_s_db=-21.0), LIM, 20.0, 10.0)
    assert st == "marginal"
    st, words = judge(fig(stable=False, rhp_closed=2), LIM, 20.0, 10.0)
    assert st == "unstable" and "2 closed-loop poles in the right half-plane" in words[0]


def test_neutral_loop_and_imaginary_axis_wording():
    """Closed form: |L(inf)| > 1 with dead time gives infinitely many closed-loop poles in the right
    half-plane (Hale & Verduyn Lunel, Introduction to Functional Differential Equations, 1993, ch. 9): the
    engine leaves rhp_closed blank and the finding says so. Poles exactly on the imaginary axis are not in
    the right half-plane: a loop not stable with none counted says that, not '0 poles'."""
    st, words = judge(fig(stable=False, rhp_closed=pd.NA, engine_note="neutral"), LIM, None, 10.0)
    assert st == "unstable" and "infinitely many closed-loop poles in the right half-plane" in words[0]
    st, words = judge(fig(stable=False, rhp_closed=0, engine_note="passes through -1"), LIM, None, 10.0)
    assert st == "unstable" and "no closed-loop pole in the right half-plane" in words[0]
    assert "0 poles" not in " ".join(words)


def test_ms_lower_bound_is_said():
    """A peak reported as a lower bound (lower_bounds holds 'ms') is worded as 'at least' (common practice)."""
    st, words = judge(fig(ms=2.5, lower_bounds="ms"), LIM, None, 10.0)
    assert st == "fails" and "Ms at least 2.5 (a lower bound" in words[0]
    st, words = judge(fig(ms=1.2, lower_bounds="ms mt"), LIM, None, 10.0)
    assert st == "marginal" and "a lower bound" in words[0]


def test_downward_gain_margin_counts():
    """A conditionally stable loop whose gain may fall only to 0.7x has a downward margin of
    20 log10(1/0.7) = 3.1 dB < 6 dB: it fails (Astrom & Murray, Feedback Systems, 2021, sec. 10.3)."""
    st, words = judge(fig(gm_low=0.7), LIM, None, 10.0)
    assert st == "fails" and "downward GM 3.1 dB" in words[0]


def test_row_overrides_policy():
    row = LoopRow(index=0, sheet="loops", excel_row=2, ms_max=1.6)
    lim = limits_in_force(row, Policy(ms_max=2.0, pm_min_deg=45.0))
    assert lim == {"ms_max": 1.6, "gm_min_db": 6.0, "pm_min_deg": 45.0}
