"""Build sample_site/loops.xlsx: the inventory of an invented plant, Larkmoor Water Reclamation Works.

Every value below is invented for the demonstration (see README.md in this folder). The
workbook is written deterministically: the same bytes on every run (fixed document dates
and zip timestamps), so its sha256 is stable.

Usage::

    python sample_site/make_sample.py            # write sample_site/loops.xlsx
    python sample_site/make_sample.py --check    # also evaluate it and print each loop's status

Dynamics follow the usual orders of magnitude of the trade: flows fast (time constants of
seconds, little dead time), levels integrating, temperatures slow with dead time, analysers
(dissolved oxygen, pH, ammonia, phosphate, chlorine) with long dead time and long sample
periods. Settings that pass were chosen with SIMC-type reasoning (Skogestad, "Simple
analytic rules for model reduction and PID controller tuning", J. Process Control 13, 2003);
the failing ones are deliberately too aggressive, of the wrong action, or asked for a
rejection band that their dead time cannot deliver.
"""

from __future__ import annotations

import io
import re
import sys
import zipfile
from pathlib import Path

from openpyxl import Workbook
from openpyxl.comments import Comment
from openpyxl.styles import Font, PatternFill

HERE = Path(__file__).resolve().parent
OUT = HERE / "loops.xlsx"
FIXED_DATE = "2024-03-04T08:00:00Z"
ZIP_DATE = (2024, 3, 4, 8, 0, 0)

HEADERS = [
    "tag", "service", "area", "criticality", "model",
    "gain", "gain_per_min", "gain_eu", "pv_lo", "pv_hi",
    "tau1_s", "tau1_min", "tau1_h", "tau2_s", "tau2_min", "lead_s", "dead_time_s", "dead_time_min",
    "num", "den",
    "form", "kc", "pb_pct", "ti_s", "ti_min", "reset_rpm", "td_s", "td_min",
    "kp", "ki_per_s", "ki_per_min", "kd_s", "d_filter",
    "action", "sample_s", "pv_filter_s",
    "band_rad_s", "attenuation_db", "ms_max",
    "disturbance_file", "allowed_amplitude", "allowed_amplitude_eu",
    "inner_loop", "outer_model_input", "data_file",
    "dcs_node",   # not a known column: carried to the results as an extra
]

IP, AE, DG, BH, CD, SD = ("Intake pumping", "Aeration", "Digesters", "Boiler and heat recovery",
                          "Chemical dosing", "Sludge thickening")


def L(tag: str, service: str, area: str, crit: str, model: str, **cols) -> dict:
    """One inventory row as header -> cell value."""
    return {"tag": tag, "service": service, "area": area, "criticality": crit, "model": model, **cols}


# The plant. Comments say what each row is meant to show.
LOOPS: list[dict] = [
    # ---- Intake pumping: wet-well levels (integrating, pumped out: negative gain, direct action), pump flows
    L("LIC-101", "Inlet wet well level (pump speed)", IP, "high", "ipdt", gain_per_min=-0.3, dead_time_s=5,
      sample_s=1, form="ideal", pb_pct=100, ti_min=14, action="direct", band_rad_s=0.0005, attenuation_db=6,
      dcs_node="PS1"),
    L("FIC-102", "Inlet pump 1 flow", IP, "medium", "fopdt", gain=1.2, tau1_s=3, dead_time_s=0.5, sample_s=0.25,
      form="ideal", kc=0.4, ti_s=3, action="reverse", band_rad_s=0.05, attenuation_db=6, data_file="records/plant/fic102_bump.csv", dcs_node="PS1"),
    # fragile: gain well above the SIMC value and integral time halved
    L("FIC-103", "Inlet pump 2 flow", IP, "medium", "fopdt", gain=1.2, tau1_s=3, dead_time_s=0.5, sample_s=0.25,
      form="ideal", kc=2.2, ti_s=1.2, action="reverse", band_rad_s=0.05, attenuation_db=6, dcs_node="PS1"),
    L("PIC-104", "Rising main pressure", IP, "high", "fopdt", gain=0.8, tau1_s=2, dead_time_s=0.3, sample_s=0.2,
      form="parallel", kp=0.6, ki_per_s=0.3, action="reverse", band_rad_s=0.02, attenuation_db=6, dcs_node="PS1"),
    L("LIC-105", "Storm tank level", IP, "low", "ipdt", gain=0.001, dead_time_s=10, sample_s=2, form="ideal",
      kc=2, ti_min=30, action="reverse", disturbance_file="records/broadband.csv", allowed_amplitude=1,
      pv_lo=0, pv_hi=4, dcs_node="PS2"),
    L("FIC-106", "Storm return pump flow", IP, "low", "fopdt", gain=1.0, tau1_s=5, dead_time_s=1, sample_s=0.5,
      form="ideal", kc=0.5, ti_s=5, action="reverse", data_file="operation/FIC-106_operation.csv", dcs_node="PS2"),
    # fragile: an integral time of seconds on an integrating level
    L("LIC-107", "Screen channel level", IP, "medium", "ipdt", gain=0.01, tau1_s=4, dead_time_s=2, sample_s=0.5,
      form="ideal", kc=3, ti_s=25, action="reverse", band_rad_s=0.003, attenuation_db=10, dcs_node="PS1"),
    # gain in engineering units: 2.5 m3/h per % on a 0-250 m3/h range
    L("FIC-108", "Grit pump flow", IP, "low", "fopdt", gain_eu=2.5, pv_lo=0, pv_hi=250, tau1_s=4, dead_time_s=1,
      sample_s=0.5, form="ideal", kc=0.5, ti_s=4, action="reverse", dcs_node="PS1"),
    # input error: a decimal comma in an integral time typed as text
    L("FIC-109", "Screenings wash water flow", IP, "low", "fopdt", gain=0.9, tau1_s=2, dead_time_s=0.5,
      sample_s=0.5, form="ideal", kc=0.3, ti_min="2,5", action="reverse", dcs_node="PS1"),
    L("PIC-110", "Odour control fan suction pressure", IP, "low", "fopdt", gain=1.5, tau1_s=1, dead_time_s=0.2,
      sample_s=0.1, form="parallel", kp=0.3, ki_per_s=0.4, action="reverse", dcs_node="PS1"),

    # ---- Aeration: air header and lane air flows (fast), dissolved oxygen and ammonia (analysers)
    L("PIC-201", "Air main header pressure", AE, "high", "fopdt", gain=0.6, tau1_s=8, dead_time_s=1, sample_s=0.5,
      form="ideal", kc=1.5, ti_s=10, action="reverse", dcs_node="BLW"),
    L("FIC-211", "Lane 1 air flow", AE, "medium", "fopdt", gain=1.5, tau1_s=4, dead_time_s=1, sample_s=0.5,
      form="ideal", kc=0.6, ti_s=4, action="reverse", band_rad_s=0.05, attenuation_db=6,
      data_file="operation/FIC-211_operation.csv", dcs_node="AE1"),
    L("FIC-212", "Lane 2 air flow", AE, "medium", "fopdt", gain=1.5, tau1_s=4, dead_time_s=1, sample_s=0.5,
      form="ideal", pb_pct=160, reset_rpm=15, action="reverse", band_rad_s=0.05, attenuation_db=6, dcs_node="AE1"),
    L("FIC-213", "Lane 3 air flow", AE, "medium", "fopdt", gain=1.5, tau1_s=4, dead_time_s=1, sample_s=0.5,
      form="parallel", kp=0.6, ki_per_min=9, action="reverse", band_rad_s=0.05, attenuation_db=6,
      dcs_node="AE2"),
    # unstable: far too much gain on a fast loop with a slow controller execution
    L("FIC-214", "Lane 4 air flow", AE, "medium", "fopdt", gain=1.5, tau1_s=4, dead_time_s=1, sample_s=1,
      form="series", kc=4.5, ti_s=2, action="reverse", band_rad_s=0.05, attenuation_db=6, dcs_node="AE2"),
    L("AIC-221", "Lane 1 dissolved oxygen", AE, "high", "fopdt", gain=0.8, tau1_s=180, dead_time_s=60,
      sample_s=10, pv_filter_s=5, form="ideal", kc=1.1, ti_min=3, action="reverse",
      disturbance_file="records/slow_periodic.csv", allowed_amplitude_eu=0.2, pv_lo=0, pv_hi=5,
      dcs_node="AE1"),
    # fragile: twice the SIMC gain on a dead-time-dominated analyser loop
    L("AIC-222", "Lane 2 dissolved oxygen", AE, "high", "fopdt", gain=0.8, tau1_s=180, dead_time_s=60,
      sample_s=10, form="ideal", kc=2.6, ti_min=2, action="reverse", band_rad_s=0.001, attenuation_db=6,
      dcs_node="AE1"),
    # misses its requirement: a band up to 0.01 rad/s is out of reach with a minute of dead time
    L("AIC-223", "Lane 3 dissolved oxygen", AE, "high", "fopdt", gain=0.8, tau1_s=180, dead_time_s=60,
      sample_s=10, form="ideal", kc=1.1, ti_min=3, action="reverse", band_rad_s=0.01, attenuation_db=10,
      dcs_node="AE2"),
    L("AIC-224", "Lane 4 dissolved oxygen", AE, "high", "fopdt", gain=0.8, tau1_s=180, dead_time_s=60,
      sample_s=10, form="parallel", kp=1.1, ki_per_min=0.35, action="reverse", band_rad_s=0.001,
      attenuation_db=6, dcs_node="AE2"),
    # cascade, model from the DO set point (identified with AIC-221 in automatic): ammonia -> oxygen
    L("AIC-231", "Lane 1 ammonia (sets AIC-221)", AE, "medium", "fopdt", gain=-0.6, tau1_min=25,
      dead_time_min=8, sample_s=300, form="ideal", kc=0.9, ti_min=30, action="direct", band_rad_s=0.0001,
      attenuation_db=6, inner_loop="AIC-221", outer_model_input="inner_sp", dcs_node="AE1"),
    L("FIC-241", "Return activated sludge flow", AE, "medium", "fopdt", gain=1.1, tau1_s=6, dead_time_s=2,
      sample_s=0.5, form="ideal", pb_pct=250, reset_rpm=10, action="reverse", band_rad_s=0.02, attenuation_db=6,
      data_file="operation/FIC-241_operation.csv", dcs_node="AE3"),
    # wrong action: direct on a process whose PV rises with output
    L("FIC-242", "Surplus activated sludge flow", AE, "low", "fopdt", gain=1.0, tau1_s=6, dead_time_s=2,
      sample_s=0.5, form="ideal", kc=0.4, ti_s=6, action="direct", dcs_node="AE3"),
    L("PIC-251", "Blower 1 discharge pressure", AE, "high", "sopdt", gain=0.9, tau1_s=6, tau2_s=1.5,
      dead_time_s=0.5, sample_s=0.2, form="series", kc=2.0, ti_s=6, td_s=1.5, action="reverse",
      band_rad_s=0.05, attenuation_db=10, dcs_node="BLW"),
    # unstable: parallel gains entered as if they were ideal-form settings
    L("SIC-252", "Blower 2 speed", AE, "medium", "fopdt", gain=1.0, tau1_s=1.5, dead_time_s=0.2, sample_s=0.1,
      form="parallel", kp=9, ki_per_s=6, action="reverse", dcs_node="BLW"),
    L("TIC-253", "Blower room ventilation temperature", AE, "low", "fopdt", gain=0.7, tau1_min=8,
      dead_time_s=60, sample_s=2, form="ideal", kc=2, ti_min=6, action="reverse", dcs_node="BLW"),

    # ---- Digesters: slow temperatures with dead time, feed flows, gas pressure
    # cascade, model from the hot-water flow PV: digester temperature -> hot-water flow
    L("TIC-301", "Digester 1 temperature (sets FIC-303)", DG, "high", "sopdt", gain=1.5, tau1_h=3, tau2_min=20,
      dead_time_min=10, sample_s=30, form="ideal", kc=2, ti_min=120, action="reverse", band_rad_s=0.0001,
      attenuation_db=10, inner_loop="FIC-303", disturbance_file="records/step_upset.csv",
      allowed_amplitude_eu=0.3, pv_lo=20, pv_hi=50, dcs_node="DG1"),
    # too much gain on a slow temperature: unstable
    L("TIC-302", "Digester 2 temperature", DG, "high", "sopdt", gain=1.5, tau1_h=3, tau2_min=20,
      dead_time_min=10, sample_s=30, form="ideal", kc=30, ti_min=20, action="reverse", band_rad_s=0.0001,
      attenuation_db=10, dcs_node="DG2"),
    L("FIC-303", "Digester 1 hot-water flow", DG, "medium", "fopdt", gain=1.3, tau1_s=5, dead_time_s=1,
      sample_s=0.5, form="ideal", kc=0.5, ti_s=5, action="reverse", band_rad_s=0.05, attenuation_db=6,
      dcs_node="DG1"),
    L("FIC-304", "Digester 2 hot-water flow", DG, "medium", "fopdt", gain=1.3, tau1_s=5, dead_time_s=1,
      sample_s=0.5, form="series", kc=0.5, ti_s=5, action="reverse", dcs_node="DG2"),
    L("FIC-305", "Digester 1 sludge feed flow", DG, "medium", "fopdt", gain=1.0, tau1_s=8, dead_time_s=3,
      sample_s=1, form="ideal", kc=0.7, ti_s=8, action="reverse", band_rad_s=0.01, attenuation_db=10,
      data_file="operation/FIC-305_operation.csv", dcs_node="DG1"),
    # misses its requirement: 10 dB of attenuation up to 0.05 rad/s with 3 s of dead time and a slow pump
    L("FIC-306", "Digester 2 sludge feed flow", DG, "medium", "fopdt", gain=1.0, tau1_s=8, dead_time_s=3,
      sample_s=1, form="ideal", kc=0.7, ti_s=8, action="reverse", band_rad_s=0.05, attenuation_db=10,
      dcs_node="DG2"),
    L("LIC-307", "Digester 1 level", DG, "medium", "ipdt", gain=0.0002, dead_time_s=30, sample_s=5,
      form="ideal", kc=2, ti_min=60, action="reverse", dcs_node="DG1"),
    L("PIC-308", "Gas holder pressure", DG, "high", "ipdt", gain=0.001, dead_time_s=5, sample_s=1,
      form="ideal", kc=5, ti_s=900, action="reverse", band_rad_s=0.001, attenuation_db=10, dcs_node="GAS"),
    # own transfer function: gas line with a lag pair and a zero
    L("PIC-309", "Digester gas line pressure", DG, "high", "tf", num="0.8 0.4", den="12 7 1", dead_time_s=0.5,
      sample_s=0.2, form="ideal", kc=1.2, ti_s=4, action="reverse", band_rad_s=0.05, attenuation_db=6,
      dcs_node="GAS"),
    L("FIC-310", "Biogas to engines flow", DG, "medium", "fopdt", gain=0.9, tau1_s=3, dead_time_s=0.5,
      sample_s=0.25, form="parallel", kp=0.5, ki_per_s=0.2, action="reverse", dcs_node="GAS"),
    # input error: a controller form word the tool does not know
    L("AIC-311", "Digester 1 pH (alkali dosing)", DG, "low", "fopdt", gain=1.5, tau1_min=40, dead_time_min=5,
      sample_s=60, form="PID", kc=0.8, ti_min=40, action="reverse", dcs_node="DG1"),
    # fragile: gain well above what 45 s of dead time allows
    L("TIC-312", "Sludge heat exchanger outlet temperature", DG, "medium", "fopdt", gain=0.9, tau1_s=240,
      dead_time_s=45, sample_s=2, form="ideal", kc=4.5, ti_s=240, action="reverse", band_rad_s=0.002,
      attenuation_db=6, data_file="records/plant/tic312_normal.csv", dcs_node="DG1"),

    # ---- Boiler and heat recovery
    L("TIC-401", "Engine jacket water temperature", BH, "high", "sopdt", gain=1.2, tau1_s=300, tau2_s=60,
      dead_time_s=20, sample_s=1, form="series", kc=6, ti_s=160, td_s=60, action="reverse",
      band_rad_s=0.005, attenuation_db=10, data_file="records/plant/tic401_bump.csv", dcs_node="CHP"),
    # fragile: integral time far shorter than the process time constant
    L("TIC-402", "Heat recovery water temperature", BH, "medium", "fopdt", gain=1.0, tau1_min=10,
      dead_time_s=90, sample_s=2, form="ideal", kc=2.5, ti_min=2, action="reverse", band_rad_s=0.001,
      attenuation_db=6, data_file="operation/TIC-402_operation.csv", dcs_node="CHP"),
    L("PIC-403", "Boiler steam pressure", BH, "high", "fopdt", gain=0.5, tau1_s=120, dead_time_s=10, sample_s=1,
      form="ideal", kc=14, ti_s=80, td_s=4, action="reverse", band_rad_s=0.005, attenuation_db=10,
      data_file="records/plant/pic403_sp_changes.csv", dcs_node="BLR"),
    # integrating drum level with a small lag
    L("LIC-404", "Boiler drum level", BH, "high", "ipdt", gain=0.002, tau1_s=5, dead_time_s=3, sample_s=0.5,
      form="ideal", kc=8, ti_min=4, action="reverse", band_rad_s=0.002, attenuation_db=10, dcs_node="BLR"),
    L("FIC-405", "Boiler feedwater flow", BH, "high", "fopdt", gain=1.1, tau1_s=2, dead_time_s=0.5,
      sample_s=0.25, form="ideal", kc=0.5, ti_s=2, action="reverse", band_rad_s=0.05, attenuation_db=6,
      dcs_node="BLR"),
    L("FIC-406", "Boiler biogas fuel flow", BH, "medium", "fopdt", gain=0.8, tau1_s=3, dead_time_s=0.5,
      sample_s=0.25, form="parallel", kp=0.6, ki_per_min=12, action="reverse", dcs_node="BLR"),
    # wrong action: more air damper gives more O2, yet the controller is set direct
    L("AIC-407", "Boiler flue gas oxygen", BH, "medium", "fopdt", gain=0.8, tau1_s=20, dead_time_s=15,
      sample_s=5, form="ideal", kc=0.8, ti_s=25, action="direct", band_rad_s=0.005, attenuation_db=6,
      data_file="records/plant/aic407_small_bump.csv", dcs_node="BLR"),
    # own transfer function: three lags of the heating header, gain 0.9
    L("TIC-408", "Hot-water header temperature", BH, "medium", "tf", num="0.9", den="360000 25200 380 1", dead_time_s=30, sample_s=2, form="ideal", kc=2, ti_s=300, td_s=40,
      action="reverse", band_rad_s=0.0005, attenuation_db=10, dcs_node="HWS"),
    L("PIC-409", "Hot-water header differential pressure", BH, "medium", "fopdt", gain=0.7, tau1_s=2,
      dead_time_s=0.4, sample_s=0.2, form="ideal", pb_pct=200, ti_s=2, action="reverse", dcs_node="HWS"),
    # too much gain: unstable
    L("TIC-410", "Dump radiator outlet temperature", BH, "medium", "fopdt", gain=1.4, tau1_s=90, dead_time_s=25,
      sample_s=1, form="ideal", kc=6, ti_s=40, action="reverse", dcs_node="CHP"),
    L("LIC-411", "Condensate tank level", BH, "low", "ipdt", gain=0.004, dead_time_s=4, sample_s=1,
      form="parallel", kp=1.5, ki_per_s=0.0015, action="reverse", data_file="records/plant/lic411_bump.parquet", dcs_node="BLR"),
    L("FIC-412", "Gas booster recycle flow", BH, "low", "fopdt", gain=1.2, tau1_s=2.5, dead_time_s=0.4,
      sample_s=0.2, form="parallel", kp=0.4, ki_per_s=0.16, action="reverse", dcs_node="GAS"),

    # ---- Chemical dosing: analysers with long dead time and long sample periods
    L("AIC-501", "Final effluent pH", CD, "high", "sopdt", gain=2.5, tau1_s=120, tau2_s=30, dead_time_s=60,
      sample_s=5, form="ideal", kc=0.55, ti_s=150, action="reverse", band_rad_s=0.001, attenuation_db=6,
      dcs_node="CHM"),
    L("FIC-502", "Caustic dosing pump flow", CD, "medium", "fopdt", gain=1.0, tau1_s=2, dead_time_s=1,
      sample_s=0.5, form="parallel", kp=0.3, ki_per_min=9, action="reverse", dcs_node="CHM"),
    # phosphate analyser with a 10-minute cycle
    L("AIC-503", "Final effluent phosphate (ferric dosing)", CD, "high", "fopdt", gain=-1.2, tau1_min=30,
      dead_time_min=15, sample_s=600, form="ideal", kc=0.3, ti_min=30, action="direct", band_rad_s=0.0002,
      attenuation_db=3, dcs_node="CHM"),
    L("FIC-504", "Ferric dosing flow", CD, "medium", "fopdt", gain=1.0, tau1_s=2, dead_time_s=1, sample_s=0.5,
      form="ideal", kc=0.35, ti_s=2, action="reverse", dcs_node="CHM"),
    # misses its requirement: 5 minutes of dead time and a 10 dB requirement up to 0.002 rad/s
    L("AIC-505", "Final effluent chlorine residual", CD, "high", "fopdt", gain=1.2, tau1_s=240, dead_time_s=300,
      sample_s=30, form="ideal", kc=0.4, ti_s=300, action="reverse", band_rad_s=0.002, attenuation_db=10,
      dcs_node="CHM"),
    L("FIC-506", "Hypochlorite dosing flow", CD, "medium", "fopdt", gain=1.0, tau1_s=2, dead_time_s=1,
      sample_s=0.5, form="series", kc=0.35, ti_s=2, action="reverse", dcs_node="CHM"),
    L("LIC-507", "Ferric day tank level", CD, "low", "ipdt", gain=0.0005, dead_time_s=5, sample_s=2,
      form="ideal", kc=3, ti_min=40, action="reverse", dcs_node="CHM"),
    # own transfer function: polymer make-up tank concentration with an inverse-response zero
    L("AIC-508", "Polymer make-up concentration", CD, "low", "tf", num="-20 1", den="3600 120 1",
      dead_time_s=20, sample_s=5, form="ideal", kc=0.6, ti_s=120, action="reverse", dcs_node="SLD"),
    L("FIC-509", "Polymer dosing flow", CD, "medium", "fopdt", gain=1.0, tau1_s=3, dead_time_s=1, sample_s=0.5,
      form="parallel", kp=0.4, ki_per_s=0.13, action="reverse", band_rad_s=0.02, attenuation_db=6,
      dcs_node="SLD"),
    # fragile: nitrate analyser loop tuned for speed
    L("AIC-510", "Nitrate (methanol dosing)", CD, "medium", "fopdt", gain=-0.9, tau1_min=20, dead_time_min=6,
      sample_s=120, form="ideal", kc=1.5, ti_min=10, action="direct", band_rad_s=0.0003, attenuation_db=6,
      dcs_node="CHM"),

    # ---- Sludge thickening: a level -> flow cascade
    L("FIC-601", "Thickener feed flow", SD, "medium", "fopdt", gain=1.0, tau1_s=5, dead_time_s=1.5,
      sample_s=0.5, form="ideal", kc=0.5, ti_s=5, action="reverse", band_rad_s=0.02, attenuation_db=6,
      data_file="records/plant/fic601_bump_gaps.csv", dcs_node="SLD"),
    # cascade, model from the flow PV: buffer tank level -> thickened sludge pump flow (pumped out)
    L("LIC-602", "Thickened sludge buffer tank level (sets FIC-603)", SD, "medium", "ipdt", gain=-0.0008,
      dead_time_s=10, sample_s=2, form="ideal", kc=3, ti_min=20, action="direct", band_rad_s=0.0005,
      attenuation_db=6, inner_loop="FIC-603", dcs_node="SLD"),
    L("FIC-603", "Thickened sludge pump flow", SD, "medium", "fopdt", gain=1.0, tau1_s=6, dead_time_s=2,
      sample_s=0.5, form="ideal", kc=0.5, ti_s=6, action="reverse", band_rad_s=0.02, attenuation_db=6,
      dcs_node="SLD"),
    # misses its requirement: two minutes of dead time against a band up to 0.003 rad/s
    L("AIC-604", "Thickened sludge dry solids", SD, "high", "sopdt", gain=0.7, tau1_s=300, tau2_s=60,
      dead_time_s=120, sample_s=10, form="ideal", kc=1.0, ti_s=300, action="reverse", band_rad_s=0.003,
      attenuation_db=6, dcs_node="SLD"),
    # own transfer function of a centrifuge differential speed drive
    L("SIC-605", "Centrifuge differential speed", SD, "medium", "tf", num="1.1", den="0.5 3 1",
      dead_time_s=0.2, sample_s=0.1, form="parallel", kp=0.8, ki_per_s=0.35, kd_s=0.1, action="reverse",
      dcs_node="SLD"),
    # input error: gain in engineering units with no PV range high end
    L("FIC-606", "Centrate return flow", SD, "low", "fopdt", gain_eu=0.8, pv_lo=0, tau1_s=4, dead_time_s=1,
      sample_s=0.5, form="ideal", kc=0.5, ti_s=4, action="reverse", dcs_node="SLD"),
    # fragile: too little integral time on a dead-time-heavy loop
    L("TIC-607", "Sludge pre-heater temperature", SD, "medium", "fopdt", gain=1.1, tau1_s=120, dead_time_s=40,
      sample_s=2, form="ideal", kc=1.4, ti_s=40, action="reverse", band_rad_s=0.001, attenuation_db=6,
      data_file="records/plant/tic607_bump.csv", dcs_node="SLD"),
    L("LIC-608", "Centrate sump level", SD, "low", "ipdt", gain=-0.002, dead_time_s=3, sample_s=1, form="ideal",
      kc=2, ti_min=15, action="direct", dcs_node="SLD"),

    # ---- Interacting loops (see COUPLINGS): each passes alone
    # blend tank: pre-heated thickened sludge feed sets dry solids, hot dilution water sets temperature;
    # each flow moves both (relative gain 0.75): the dry-solids loop fails with its partner closed
    L("AIC-611", "Sludge blend tank dry solids", SD, "high", "fopdt", gain=0.9, tau1_s=400, dead_time_s=60,
      sample_s=5, form="ideal", kc=4, ti_s=400, action="reverse", dcs_node="SLD"),
    L("TIC-612", "Sludge blend tank temperature", SD, "medium", "fopdt", gain=1.0, tau1_s=300, dead_time_s=30,
      sample_s=2, form="ideal", kc=4.5, ti_s=300, action="reverse", dcs_node="SLD"),
    # gas compressor: suction pressure on the recycle valve, recycle flow on the speed -- the wrong
    # pairing (negative relative gain): stable one by one, unstable together
    L("PIC-331", "Gas compressor suction pressure", DG, "high", "fopdt", gain=0.5, tau1_s=60, dead_time_s=5,
      sample_s=1, form="ideal", kc=2, ti_s=60, action="reverse", dcs_node="DIG"),
    L("FIC-332", "Gas compressor recycle flow", DG, "medium", "fopdt", gain=0.7, tau1_s=30, dead_time_s=2,
      sample_s=0.5, form="ideal", kc=1.5, ti_s=30, action="reverse", dcs_node="DIG"),
]

# The couplings sheet: how one loop's output moves another loop's PV (invented, like everything here).
COUPLING_HEADERS = ["from_tag", "to_tag", "model", "gain", "tau1_s", "dead_time_s", "note"]
COUPLINGS: list[dict] = [
    {"from_tag": "TIC-612", "to_tag": "AIC-611", "model": "fopdt", "gain": -0.6, "tau1_s": 350, "dead_time_s": 50,
     "note": "hot dilution water lowers dry solids"},
    {"from_tag": "AIC-611", "to_tag": "TIC-612", "model": "fopdt", "gain": 0.5, "tau1_s": 280, "dead_time_s": 40,
     "note": "pre-heated sludge feed raises the temperature"},
    {"from_tag": "FIC-332", "to_tag": "PIC-331", "model": "fopdt", "gain": 0.8, "tau1_s": 50, "dead_time_s": 4,
     "note": "speed raises suction draw"},
    {"from_tag": "PIC-331", "to_tag": "FIC-332", "model": "fopdt", "gain": 1.0, "tau1_s": 40, "dead_time_s": 3,
     "note": "recycle valve opening raises recycle flow"},
]

POLICY = [
    ("ms_max", 2.0, "Largest acceptable sensitivity peak Ms [-]."),
    ("gm_min_db", 6.0, "Smallest acceptable gain margin [dB]."),
    ("pm_min_deg", 30.0, "Smallest acceptable phase margin [deg]."),
    ("marginal_pct", 10.0, "A passing loop within this many % of a limit is marginal [%]."),
]


def build_workbook() -> Workbook:
    """The sample inventory as an openpyxl workbook."""
    wb = Workbook()
    ws = wb.active
    ws.title = "loops"
    bold, fill = Font(bold=True), PatternFill("solid", fgColor="DDE7F0")
    for j, h in enumerate(HEADERS, start=1):
        c = ws.cell(1, j, h)
        c.font, c.fill = bold, fill
    ws.cell(1, HEADERS.index("dcs_node") + 1).comment = Comment("Site column: control system node.", "Larkmoor")
    for i, loop in enumerate(LOOPS, start=2):
        unknown = set(loop) - set(HEADERS)
        if unknown:
            raise KeyError(f"{loop['tag']}: no column {sorted(unknown)}")
        for j, h in enumerate(HEADERS, start=1):
            if h in loop:
                ws.cell(i, j, loop[h])
    ws.freeze_panes = "B2"
    for j, h in enumerate(HEADERS, start=1):
        ws.column_dimensions[ws.cell(1, j).column_letter].width = 34 if h == "service" else max(9, len(h) + 2)
    cpl = wb.create_sheet("couplings")
    cpl.append(COUPLING_HEADERS)
    for c in COUPLINGS:
        cpl.append([c.get(h) for h in COUPLING_HEADERS])
    for j in range(1, len(COUPLING_HEADERS) + 1):
        cpl.cell(1, j).font, cpl.cell(1, j).fill = bold, fill
    pol = wb.create_sheet("policy")
    pol.append(["setting", "value", "meaning"])
    for row in POLICY:
        pol.append(list(row))
    return wb


def _deterministic(data: bytes) -> bytes:
    """Rewrite the .xlsx zip with fixed document dates and entry timestamps."""
    src = zipfile.ZipFile(io.BytesIO(data))
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as dst:
        for info in src.infolist():
            body = src.read(info.filename)
            if info.filename == "docProps/core.xml":
                body = re.sub(rb"(<dcterms:(created|modified)[^>]*>)[^<]*(</dcterms:)", rb"\g<1>" +
                              FIXED_DATE.encode() + rb"\g<3>", body)
            zi = zipfile.ZipInfo(info.filename, ZIP_DATE)
            zi.compress_type = zipfile.ZIP_DEFLATED
            zi.external_attr = 0o644 << 16
            dst.writestr(zi, body)
    return out.getvalue()


def write(path: Path = OUT) -> Path:
    """Write the sample workbook to ``path`` and return it."""
    buf = io.BytesIO()
    build_workbook().save(buf)
    path.write_bytes(_deterministic(buf.getvalue()))
    return path


def check(path: Path = OUT) -> None:
    """Read the workbook back, evaluate every loop with the exact engine and print the statuses."""
    from audit.inventory import check_report, format_check, read_inventory
    from audit.pipeline import AuditOptions, build_models, evaluate_frequency, new_audit

    inv = read_inventory(path)
    print(format_check(check_report(inv)))
    audit = new_audit(inv, AuditOptions())
    build_models(audit)
    evaluate_frequency(audit)
    res = audit.results
    cols = ["tag", "status", "ms", "gm_db", "pm_deg", "band_s_db", "band_required_db", "findings"]
    import pandas as pd
    with pd.option_context("display.width", 250, "display.max_rows", 200, "display.max_colwidth", 90):
        print(res[cols].round(2).to_string())
        print(res["status"].value_counts().to_string())


if __name__ == "__main__":
    p = write()
    print(f"written {p} ({len(LOOPS)} loops)")
    if "--check" in sys.argv[1:]:
        check(p)
