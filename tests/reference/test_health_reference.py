"""Validation of the loop-health detectors on simulated loops of known cause (seeded).

Four classes of 120 loops each (tests/reference/loopsim.py): a sticking valve (two-parameter
model of Choudhury, Thornhill and Shah, Control Eng. Practice 13 (2005) 641-658), an
over-tuned PI (gain margin 1.03-1.2), an external sinusoidal load, and coloured noise only;
and two classes of 100 integrating loops (levels): a sticking valve and an over-tuned PI.
Each record is 2,400 samples of 1 s. The rates measured are recorded in README.md
("Loop health from operating data"); the bounds below sit a little under them, so a change that
costs detection or adds false alarms fails here.

Validation (against the simulated truth), not regression: the class of each loop is known by
construction, the period of a sinusoidal load is known exactly, and the over-tuned loop's
oscillation frequency is where its exact sampled |S(e^{jw})| peaks.
"""

from __future__ import annotations

import numpy as np
import pytest

from audit.plantdata.oscillation import detect_oscillation
from audit.plantdata.valve import assess_valve

from .loopsim import CLASSES, INTEGRATING_CLASSES, loop_response, make_cases, simulate

N_CASES = 120
N_SAMPLES = 2400


@pytest.fixture(scope="module")
def outcome():
    """Per class: the cases, the oscillation results and the valve results (None when not oscillating)."""
    out = {}
    for i, cls in enumerate(CLASSES):
        c = make_cases(cls, N_CASES, 100 + i)
        tr = simulate(c, N_SAMPLES, 200 + i)
        osc, valve = [], []
        for j in range(N_CASES):
            o = detect_oscillation(tr.sp[j] - tr.pv[j], tr.ts)
            osc.append(o)
            valve.append(assess_valve(tr.op[j], tr.pv[j], tr.ts, o.period_s, dead_time_s=(c.d[j] + 0.5) * tr.ts)
                         if o.oscillating else None)
        out[cls] = (c, osc, valve)
    return out


def _rates(outcome, cls):
    c, osc, valve = outcome[cls]
    detected = np.array([o.oscillating for o in osc])
    sticking = np.array([v is not None and v.sticking for v in valve])
    return detected.mean(), sticking.mean(), detected, sticking


def test_class_sizes(outcome):
    """At least 100 seeded cases per class, as the validation plan asks."""
    for cls in CLASSES:
        assert len(outcome[cls][1]) >= 100


def test_noise_only_gives_no_oscillation(outcome):
    """False alarms of the oscillation detector on noise-driven, well-tuned loops: measured 0/120."""
    det, stick, _, _ = _rates(outcome, "noise")
    assert det <= 0.03
    assert stick == 0.0


@pytest.mark.parametrize("cls,bound", [("aggressive", 0.92), ("sinusoid", 0.97), ("stiction", 0.70)])
def test_oscillations_detected(outcome, cls, bound):
    """Detection rate of oscillations of each cause: measured 96.7 %, 100 %, 75.8 %. The sticking
    valves missed are those whose cycle is smaller than the load noise (amplitude < 0.25 %)."""
    det, _, _, _ = _rates(outcome, cls)
    assert det >= bound


def test_sinusoid_period(outcome):
    """The detected period of an external sinusoidal load equals its period (within 1 %)."""
    c, osc, _ = outcome["sinusoid"]
    per = np.array([o.period_s for o in osc])
    assert np.all(np.abs(per - c.sin_period) <= 0.01 * c.sin_period)


def test_overtuned_period_is_the_resonance(outcome):
    """An over-tuned loop driven by noise oscillates near the peak of |S|: the detected period
    within 15 % of 2 pi / w_ms for 95 % of the detected cases (w_ms from the exact sampled loop)."""
    c, osc, _ = outcome["aggressive"]
    w = np.linspace(1e-3, np.pi, 6000)
    s = np.abs(1.0 / (1.0 + loop_response(c, w)))
    t_ms = 2 * np.pi / w[np.argmax(s, axis=1)]
    per = np.array([o.period_s for o in osc])
    det = np.array([o.oscillating for o in osc])
    rel = np.abs(per[det] - t_ms[det]) / t_ms[det]
    assert np.mean(rel <= 0.15) >= 0.95


def test_sticking_valves_found(outcome):
    """Sticking valves reported: measured 73.3 % of all stiction cases, 96.7 % of those oscillating."""
    det, stick, d, s = _rates(outcome, "stiction")
    assert stick >= 0.68
    assert s[d].mean() >= 0.93


@pytest.mark.parametrize("cls,bound", [("aggressive", 0.03), ("sinusoid", 0.01)])
def test_no_sticking_reported_for_linear_oscillations(outcome, cls, bound):
    """An oscillation from tuning or from an external load must not be blamed on the valve:
    measured 0.8 % (1/120) and 0 %."""
    _, stick, _, _ = _rates(outcome, cls)
    assert stick <= bound


def test_amplitude_of_sinusoid(outcome):
    """The amplitude reported for an external sinusoid: the error's amplitude is set to 1-4 % by
    construction (through the exact |S| at its frequency); the band amplitude is within 20 %
    of it for 95 % of cases (the load noise adds to the band)."""
    c, osc, _ = outcome["sinusoid"]
    L = np.diagonal(loop_response(c, 2 * np.pi / c.sin_period))
    true_amp = c.sin_amp * np.abs(1.0 / (1.0 + L))
    amp = np.array([o.amplitude_pct for o in osc])
    assert np.mean(np.abs(amp - true_amp) <= 0.2 * true_amp) >= 0.95


@pytest.fixture(scope="module")
def integrating():
    """Per integrating class (100 seeded levels each): oscillating and sticking flags, curve fit on pv."""
    out = {}
    for i, cls in enumerate(INTEGRATING_CLASSES):
        c = make_cases(cls, 100, 300 + i)
        tr = simulate(c, N_SAMPLES, 400 + i)
        osc, stick = [], []
        for j in range(100):
            o = detect_oscillation(tr.sp[j] - tr.pv[j], tr.ts)
            osc.append(o.oscillating)
            stick.append(bool(o.oscillating and assess_valve(tr.op[j], tr.pv[j], tr.ts, o.period_s, integrating=True,
                                                             dead_time_s=(c.d[j] + 0.5) * tr.ts).sticking))
        out[cls] = (np.array(osc), np.array(stick))
    return out


def test_integrating_sticking_valves(integrating):
    """Levels with a sticking valve (S = 2-6 %, J = 0.4-1 S): oscillation detected in 60/100 and the valve
    reported in 57/100 (57 of the 60 detected). The misses are irregular cycles: with an integrating
    process the load noise decides when the valve breaks free."""
    osc, stick = integrating["stiction_integrating"]
    assert osc.mean() >= 0.55 and stick.mean() >= 0.52
    assert stick[osc].mean() >= 0.9


def test_integrating_overtuned_not_blamed_on_the_valve(integrating):
    """Over-tuned level loops (gain margin 1.03-1.2): oscillation detected in 79/100, valve reported in 0."""
    osc, stick = integrating["aggressive_integrating"]
    assert osc.mean() >= 0.7
    assert stick.sum() == 0
