"""The results columns: one name, one unit and one meaning each.

This table is the single source for the CSV/JSON/xlsx headers, the README's
results table and the report's glossary. A stage that adds columns adds them here.
Units: time [s], frequency [rad/s], phase [deg], ratios [-], levels [dB], amplitudes [% of PV range].
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Column:
    """One results column.

    Attributes
    ----------
    name : str
        Column header in the CSV, JSON and workbook.
    unit : str
        Unit as written in the glossary (``s``, ``rad/s``, ``deg``, ``dB``, ``-``, ...).
    meaning : str
        One-sentence meaning for the glossary and README.
    stage : str
        Stage that adds the column.
    """

    name: str
    unit: str
    meaning: str
    stage: str  # inventory | frequency | time | disturbance | proposal | priority | cascade | modelcheck | health | group


C = Column
RESULT_COLUMNS: tuple[Column, ...] = (
    C("row", "-", "Row number in the inventory sheet (CSV: line number).", "inventory"),
    C("tag", "-", "Loop identifier as entered.", "inventory"),
    C("service", "-", "What the loop does, as entered.", "inventory"),
    C("area", "-", "Plant area, as entered.", "inventory"),
    C("criticality", "-", "high, medium or low.", "inventory"),
    C("status", "-", "invalid, unstable, fails, marginal or passes.", "frequency"),
    C("findings", "-", "Each broken or nearly broken limit in words with values, separated by '; '.", "frequency"),
    C("message", "-", "Every validation problem of the row, each naming sheet, cell and column, separated by '; '.", "inventory"),
    C("stable", "-", "Closed-loop stability, decided by the Nyquist argument on the exact-delay L(jw).", "frequency"),
    C("rhp_closed", "-", "Number of closed-loop poles in the right half-plane (0 when stable; poles on the imaginary "
      "axis are not counted); blank when there are infinitely many (|L(inf)| > 1 with dead time: a neutral loop, "
      "or an outer loop around one).", "frequency"),
    C("rhp_open", "-", "Number of open-loop poles of L in the right half-plane (integrators excluded).", "frequency"),
    C("gm", "-", "Gain margin: smallest factor k > 1 by which the loop gain can rise before instability; inf when none.", "frequency"),
    C("gm_db", "dB", "Gain margin in dB, 20 log10(gm).", "frequency"),
    C("w180_rad_s", "rad/s", "Phase-crossover frequency of the gain margin.", "frequency"),
    C("gm_low", "-", "Largest factor k < 1 to which the loop gain can fall before instability; blank when none.", "frequency"),
    C("pm_deg", "deg", "Phase margin at the gain crossover where it is smallest in absolute value; inf when |L| never crosses 1.", "frequency"),
    C("wc_rad_s", "rad/s", "Gain-crossover frequency of pm_deg.", "frequency"),
    C("dm_s", "s", "Delay margin: the smallest added dead time that destabilises the loop.", "frequency"),
    C("ms", "-", "Sensitivity peak, sup over w >= 0 of |S(jw)|.", "frequency"),
    C("w_ms_rad_s", "rad/s", "Frequency of the sensitivity peak (inf when the supremum is the high-frequency limit).", "frequency"),
    C("mt", "-", "Complementary sensitivity peak, sup of |T(jw)|.", "frequency"),
    C("w_mt_rad_s", "rad/s", "Frequency of the complementary sensitivity peak (0 when the supremum is the w -> 0 limit).", "frequency"),
    C("lower_bounds", "-", "Figures reported as lower bounds, not values ('ms', 'mt'): the peak search was cut "
      "short on a loop passing near -1 very many times; blank when every figure is a value.", "frequency"),
    C("wb_rad_s", "rad/s", "Bandwidth: lowest frequency where |S| rises through 1/sqrt(2); blank when |S| starts above it.", "frequency"),
    C("band_rad_s", "rad/s", "Upper edge wd of the rejection band in force.", "frequency"),
    C("attenuation_db", "dB", "Required attenuation A in force.", "frequency"),
    C("band_s_db", "dB", "Largest 20 log10|S| over 0 < w <= wd.", "frequency"),
    C("band_l_db", "dB", "Smallest 20 log10|L| over 0 < w <= wd.", "frequency"),
    C("band_required_db", "dB", "Required level of |S| in the band, -attenuation_db.", "frequency"),
    C("band_ok", "-", "True when band_s_db <= band_required_db.", "frequency"),
    C("ms_max", "-", "Ms limit in force for the row.", "frequency"),
    C("gm_min_db", "dB", "Gain-margin limit in force for the row.", "frequency"),
    C("pm_min_deg", "deg", "Phase-margin limit in force for the row.", "frequency"),
    C("inner_loop", "-", "Tag of the inner loop when the row is a cascade's outer loop, as entered.", "cascade"),
    C("cascade_basis", "-", "Frequencies of cascade_ratio: wb (bandwidths) or wc (gain crossovers, when a "
                            "bandwidth is blank); blank when not checked.", "cascade"),
    C("cascade_ratio", "-", "Inner-loop frequency over outer-loop frequency (wb_rad_s, else wc_rad_s), outer "
                            "loop evaluated with its inner loop inside.", "cascade"),
    C("cascade_ok", "-", "True when cascade_ratio >= policy cascade_ratio_min; blank when not checked.", "cascade"),
    C("group_id", "-", "Group of interacting loops (couplings sheet) the loop belongs to, G1, G2, ...; blank when "
                       "none.", "group"),
    C("status_alone", "-", "The loop's status from its single-loop audit, before the group checks; blank when in "
                           "no group.", "group"),
    C("group_stable", "-", "Stability of the whole group with every loop closed (generalised Nyquist criterion on "
                           "det(I + L), exact delays).", "group"),
    C("group_rhp_closed", "-", "Closed-loop poles of the group in the right half-plane; blank when not decided.",
      "group"),
    C("group_niederlinski", "-", "Niederlinski index det G(0)/prod g_ii(0); blank unless every loop of the group has "
                                 "integral action and no element integrates.", "group"),
    C("group_sigma_peak", "-", "Peak over w of the largest singular value of the group's sensitivity matrix "
                               "(I + L)^-1; blank when the group is unstable.", "group"),
    C("rga_ss", "-", "Steady-state relative gain of the loop's pairing, lambda_ii(0) (Bristol); blank when an "
                     "element integrates.", "group"),
    C("rga_wc", "-", "Magnitude of the relative gain lambda_ii at the loop's own crossover frequency wc_rad_s.",
      "group"),
    C("ms_in_group", "-", "Peak of the loop's own sensitivity |S_ii| with the other loops of its group closed; blank "
                          "when the group is unstable.", "group"),
    C("gm_in_group", "-", "Gain margin of the loop with the other loops of its group closed (ratio); inf when "
                          "none; blank when the group is unstable.", "group"),
    C("gm_in_group_db", "dB", "gm_in_group in dB.", "group"),
    C("pm_in_group_deg", "deg", "Phase margin of the loop with the other loops of its group closed; blank when "
                               "the group is unstable.", "group"),
    C("wc_in_group_rad_s", "rad/s", "Gain-crossover frequency of pm_in_group_deg.", "group"),
    C("group_note", "-", "Pairing warnings (negative or large relative gains, negative Niederlinski index) and why "
                         "a group was not decided, separated by '; '.", "group"),
    C("verdict", "-", "retune, not achievable by tuning, no change needed, check model, not evaluated, or check "
                      "the valve first (a retune verdict of a loop whose valve is suspected sticking).", "proposal"),
    C("proposal_method", "-", "Which candidate is recommended, e.g. 'SIMC PI, tau_c = theta', 'AMIGO PID', "
                              "'max-ki PI at Ms <= 2'.", "proposal"),
    C("proposal_form", "-", "Controller form of the proposal (the row's, or ideal when no series form exists).", "proposal"),
    C("proposal_settings", "-", "Proposed settings in the row's own columns and units, three significant figures.",
      "proposal"),
    C("proposal_kc", "-", "Proposed controller gain in proposal_form (parallel: kp).", "proposal"),
    C("proposal_ti_s", "s", "Proposed integral time in proposal_form (parallel: kp/ki); blank for none.", "proposal"),
    C("proposal_td_s", "s", "Proposed derivative time in proposal_form (parallel: kd/kp).", "proposal"),
    C("proposal_changes", "-", "Change of each setting in the row's terms, in %.", "proposal"),
    C("proposal_ms", "-", "Ms of the proposal as rounded (exact engine).", "proposal"),
    C("proposal_gm_db", "dB", "Gain margin of the proposal.", "proposal"),
    C("proposal_pm_deg", "deg", "Phase margin of the proposal.", "proposal"),
    C("proposal_dm_s", "s", "Delay margin of the proposal.", "proposal"),
    C("proposal_band_s_db", "dB", "Largest 20 log10|S| over the rejection band with the proposal.", "proposal"),
    C("proposal_iae_s", "s", "Load-step IAE with the proposal (unit step at the process input), as load_iae_s.",
      "proposal"),
    C("best_band_s_db", "dB", "Deepest band level any candidate reaches within the robustness limits.", "proposal"),
    C("limiting_factor", "-", "What bounds the achievable rejection, with remedies (when not achievable by tuning).",
      "proposal"),
    C("proposal_note", "-", "Warnings on the proposal (action, form, settings moving by more than a factor two), "
                            "separated by '; '.", "proposal"),
    C("group_detuning", "-", "Common detuning factor F on the proposals of the loop's group (gain / F, integral "
                             "time x F; Luyben's biggest log modulus); 1 when the proposals keep the group within "
                             "its limits.", "group"),
    C("group_proposal_settings", "-", "The proposal detuned by group_detuning, in the row's own terms; blank when "
                                      "no detuning is needed.", "group"),
    C("group_proposal_ms", "-", "Ms of the loop with its group closed and the group's proposals (detuned when "
                                "needed) in place.", "group"),
    C("group_proposal_note", "-", "What closing the group does to the single-loop proposals.", "group"),
    C("priority_score", "-", "Priority: severity points + 30 x criticality weight + 60 x feasibility x benefit "
                             "(README, 'Priority').", "priority"),
    C("rank", "-", "Place on the work list, 1 = most urgent; blank when no action is needed.", "priority"),
    C("action", "-", "retune, check the model or the valve, structural change, fix the inventory row, return the "
                     "loop to automatic, check the valve: suspected sticking, retuning will not cure it, or check "
                     "valve sizing or range.", "priority"),
    C("reason", "-", "Why the loop is on the work list, in a few words.", "priority"),
    C("expected_improvement", "-", "Predicted change if the action is taken.", "priority"),
    C("load_iae_s", "s", "Integral of |e| after a unit load step (1 % of output) at the process input, "
                         "in % of PV range x s per % of step; blank when the load leaves an offset.", "time"),
    C("load_ie_s", "s", "Integral of e = r - y after the unit load step (signed; -sign/ki with integral "
                        "action); blank when the load leaves an offset.", "time"),
    C("load_peak", "-", "Largest |PV deviation| after the unit load step, % of PV range per % of step.", "time"),
    C("load_t_peak_s", "s", "Time of load_peak; blank when the PV creeps to its offset without passing it.",
      "time"),
    C("load_settle_s", "s", "Time after which the PV stays within settle_band_pct % of load_peak of its "
                            "final value.", "time"),
    C("load_offset", "-", "Final PV deviation after the unit load step (0 with integral action).", "time"),
    C("sp_overshoot_pct", "%", "Overshoot of a set-point step beyond the final PV value, % of that value.",
      "time"),
    C("sp_rise_s", "s", "Set-point step: time from 10 % to 90 % of the final PV value (first crossings).",
      "time"),
    C("sp_settle_s", "s", "Set-point step: time after which the PV stays within settle_band_pct % of its "
                          "final value.", "time"),
    C("sp_offset", "-", "Steady error after a unit set-point step, 1 - final PV value (0 with integral "
                        "action).", "time"),
    C("step_horizon_s", "s", "Longest time simulated for the step figures.", "time"),
    C("step_note", "-", "Why step figures are missing or qualified (unstable, offset, not settled).", "time"),
    C("dist_band_rad_s", "rad/s", "Band derived from the disturbance record: frequency below which "
                                  "band_energy_fraction of its variance lies (Welch).", "disturbance"),
    C("dist_attenuation_db", "dB", "Attenuation derived from the record, 20 log10(dist_amplitude / "
                                   "allowed_amplitude); <= 0 means none is needed.", "disturbance"),
    C("dist_amplitude", "% of range", "99.7th percentile of |d - mean| of the record, trend removed.",
      "disturbance"),
    C("dist_std", "% of range", "Standard deviation of the record, trend removed.", "disturbance"),
    C("dist_peak", "% of range", "Largest |d - mean| of the record, trend removed.", "disturbance"),
    C("dist_trend_per_s", "% of range/s", "Slope of the straight line removed from the record.",
      "disturbance"),
    C("dist_note", "-", "What was done to the record, or why it could not be used.", "disturbance"),
    C("residual_amplitude", "% of range", "99.7th percentile of |y - mean| when the record passes through S "
                                          "(time domain, exact dead time).", "disturbance"),
    C("residual_std", "% of range", "Standard deviation of that residual (time domain).", "disturbance"),
    C("residual_std_freq", "% of range", "sqrt(integral of the record's spectrum x |S(jw)|^2): the same "
                                         "standard deviation predicted in the frequency domain.", "disturbance"),
    C("residual_ok", "-", "True when residual_amplitude <= allowed_amplitude.", "disturbance"),
    C("model_check", "-", "The model against the loop's data_file: confirmed, disputed, not identifiable, record "
                          "unusable or not checked; blank without a record.", "modelcheck"),
    C("model_fit_pct", "%", "Fit of the inventory's model driven by the logged op against the logged pv, "
                            "100 (1 - ||y - yhat|| / ||y - mean y||).", "modelcheck"),
    C("id_model", "-", "Model structure the data support: fopdt, sopdt or ipdt (lowest BIC).", "modelcheck"),
    C("id_gain", "-", "Identified process gain (ipdt: 1/s).", "modelcheck"),
    C("id_gain_ci95", "-", "Half-width of the 95 % interval of id_gain (ipdt: 1/s).", "modelcheck"),
    C("id_tau1_s", "s", "Identified largest time constant.", "modelcheck"),
    C("id_tau1_ci95_s", "s", "Half-width of the 95 % interval of id_tau1_s.", "modelcheck"),
    C("id_tau2_s", "s", "Identified second time constant (sopdt).", "modelcheck"),
    C("id_lead_s", "s", "Identified lead time (sopdt; negative for an inverse response).", "modelcheck"),
    C("id_dead_time_s", "s", "Identified dead time (continuous, not whole samples).", "modelcheck"),
    C("id_dead_time_ci95_s", "s", "Half-width of the 95 % interval of id_dead_time_s.", "modelcheck"),
    C("id_fit_pct", "%", "Fit of the identified model on the record.", "modelcheck"),
    C("id_fit_holdout_pct", "%", "Fit of the identified structure, refitted without a held-out 30 % block, on "
                                 "that block.", "modelcheck"),
    C("gain_ratio", "-", "id_gain / the inventory's gain.", "modelcheck"),
    C("dead_time_diff_s", "s", "id_dead_time_s minus the inventory's dead time.", "modelcheck"),
    C("tau_ratio", "-", "id_tau1_s / the inventory's tau1.", "modelcheck"),
    C("id_stable", "-", "Closed-loop stability with the identified model and the current tuning (exact Nyquist).",
      "modelcheck"),
    C("id_ms", "-", "Ms with the identified model and the loop's current tuning.", "modelcheck"),
    C("id_gm_db", "dB", "Gain margin with the identified model and the current tuning.", "modelcheck"),
    C("id_pm_deg", "deg", "Phase margin with the identified model and the current tuning.", "modelcheck"),
    C("data_note", "-", "What the record reader and the identification said, or why the check could not run.",
      "modelcheck"),
    C("auto_pct", "%", "Share of the operating record with the loop closed (automatic or cascade, by the policy's "
                       "mode words); blank without a mode signal.", "health"),
    C("manual_pct", "%", "Share of the operating record in manual.", "health"),
    C("op_limited_pct", "%", "Share of the record with op within op_limit_band_pct of 0 % or 100 %.", "health"),
    C("pv_out_of_range_pct", "%", "Share of the record with pv below 0 % or above 100 % of its range.", "health"),
    C("sp_changes", "-", "Set-point moves in the record (a ramp counts once).", "health"),
    C("error_std_pct", "% of range", "Standard deviation of the control error sp - pv while the loop was closed.",
      "health"),
    C("iae_per_h", "% of range x s/h", "Integral of abs(sp - pv) while closed, per hour closed.", "health"),
    C("oscillating", "-", "True when the control error oscillates: regular autocorrelation zero crossings "
                          "(Thornhill et al. 2003) and amplitude >= oscillation_min_amplitude_pct.", "health"),
    C("oscillation_period_s", "s", "Period of the oscillation (mean interval between alternate zero crossings "
                                   "of the autocorrelation).", "health"),
    C("oscillation_amplitude_pct", "% of range", "Amplitude of the error within an octave of the oscillation "
                                                 "frequency.", "health"),
    C("oscillation_regularity", "-", "Regularity r = mean/(3 std) of the period estimates; > 1 is regular.",
      "health"),
    C("valve_sticking", "-", "True when the curve-fitting test (He et al. 2007) finds the oscillating op "
                             "triangular (stiction index >= 0.7); blank when the loop does not oscillate.",
      "health"),
    C("valve_sticking_confidence", "-", "How strongly the data points to stiction, 0 to 1: (stiction index "
                                        "- 0.4)/0.6, clipped.", "health"),
    C("stiction_index", "-", "Stiction index of the curve fit, MSE_sine/(MSE_sine + MSE_triangle).", "health"),
    C("harris_index", "-", "Minimum-variance variance over the error's variance (Harris 1989): 1 = minimum "
                           "variance, towards 0 = far from it.", "health"),
    C("health_delay_samples", "-", "Delay in samples used for harris_index (model dead time + half the "
                                   "controller's sample, over the record's sample interval, plus one).",
      "health"),
    C("health_findings", "-", "What the operating record shows, in words with the figures and the method, most "
                              "fundamental first, separated by '; '.", "health"),
    C("health_note", "-", "What the loop-health figures rest on (record, stretch analysed) or why they are "
                          "missing.", "health"),
)


def column(name: str) -> Column:
    """The column called ``name``.

    Parameters
    ----------
    name : str
        Column header, e.g. ``"gm_db"``.

    Returns
    -------
    Column

    Raises
    ------
    KeyError
        When no results column has that name.
    """
    for c in RESULT_COLUMNS:
        if c.name == name:
            return c
    raise KeyError(name)


def markdown_table(stage: str | None = None) -> str:
    """The results columns as a Markdown table (for the README).

    Parameters
    ----------
    stage : str or None
        Only the columns added by this stage (``inventory``, ``frequency``, ``time``,
        ``disturbance``, ``proposal``, ``priority``, ``cascade``, ``health``); every column when None.

    Returns
    -------
    str
        The table, one line per column (name, unit, meaning), ``|`` in meanings escaped.
    """
    lines = ["| column | unit | meaning |", "|---|---|---|"]
    for c in RESULT_COLUMNS:
        if stage is None or c.stage == stage:
            lines.append(f"| `{c.name}` | {c.unit} | {c.meaning.replace('|', chr(92) + '|')} |")
    return "\n".join(lines)
