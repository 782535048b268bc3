"""A disturbance record sets the requirement when the row gives none (closed form: a sinusoid of
amplitude a against an allowed amplitude b needs 20 log10(a/b) dB over a band ending at its
frequency; Welch's method locates the frequency, common practice)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from audit.inventory import read_inventory
from audit.pipeline import AuditOptions, build_models, evaluate_frequency, new_audit


def test_derived_requirement_in_force(tmp_path):
    w0, amp = 0.01, 4.0
    t = np.arange(0, 60000, 5.0)
    (tmp_path / "rec.csv").write_text("time_s,value\n" + "".join(
        f"{a:.1f},{50 + amp * math.sin(w0 * a):.6f}\n" for a in t))
    (tmp_path / "loops.csv").write_text(
        "tag,model,gain,tau1_s,dead_time_s,form,kc,ti_s,action,disturbance_file,allowed_amplitude,"
        "band_rad_s,attenuation_db\n"
        "A,fopdt,1,100,10,ideal,5,100,reverse,rec.csv,1,,\n"
        "B,fopdt,1,100,10,ideal,5,100,reverse,rec.csv,1,0.002,3\n")
    audit = new_audit(read_inventory(tmp_path / "loops.csv"), AuditOptions())
    build_models(audit)
    from audit.disturbance import analyse_records
    analyse_records(audit)
    evaluate_frequency(audit)
    r = audit.results
    # row A: derived band and attenuation are in force and judged
    assert r.at[0, "band_rad_s"] == pytest.approx(r.at[0, "dist_band_rad_s"])
    assert r.at[0, "band_rad_s"] == pytest.approx(w0, rel=0.05)
    assert r.at[0, "attenuation_db"] == pytest.approx(20 * math.log10(amp * math.sin(math.pi / 2 * 0.997) / 1.0),
                                                      abs=0.1)
    assert not math.isnan(r.at[0, "band_s_db"])
    # row B: its own requirement governs
    assert r.at[1, "band_rad_s"] == 0.002 and r.at[1, "attenuation_db"] == 3
    assert "govern" in r.at[1, "dist_note"]
