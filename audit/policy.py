"""The audit policy: limits and settings that apply to every loop unless a row overrides them.

The defaults and their sources are listed in README.md ("Policy"). A workbook's
``policy`` sheet overrides the defaults; a row's ``ms_max``, ``gm_min_db`` and
``pm_min_deg`` override the sheet for that row.
"""

from __future__ import annotations

from dataclasses import dataclass, fields, replace
from typing import Any, Mapping


@dataclass(frozen=True)
class Policy:
    """Limits and settings of one audit.

    Attributes
    ----------
    ms_max : float
        Largest acceptable sensitivity peak Ms. [-]
    gm_min_db : float
        Smallest acceptable gain margin. [dB]
    pm_min_deg : float
        Smallest acceptable phase margin. [deg]
    marginal_pct : float
        A passing loop within this many percent of a limit is ``marginal``. [%]
    band_energy_fraction : float
        Fraction of a disturbance record's variance below the derived band edge. [-]
    max_gap_s : float
        Longest gap tolerated in a disturbance record, as a multiple of the median
        sample interval; larger gaps reject the record. [-]
    uniform_tolerance : float
        Relative deviation of sample intervals from their median beyond which a
        record is resampled. [-]
    min_samples : int
        Fewest samples a disturbance record may have. [-]
    settle_band_pct : float
        Band for settling times of step responses, as % of the step. [%]
    cascade_ratio_min : float
        Smallest acceptable ratio of inner to outer loop bandwidth. [-]
    weight_high, weight_medium, weight_low : float
        Criticality weights of the priority score. [-]
    change_ms, change_margin_db, change_pm_deg, change_band_db : float
        Change between audits above which a figure is reported as moved.
        [-], [dB], [deg], [dB]
    model_gain_ratio_max : float
        The data dispute the model when identified gain / model gain lies outside
        [1/x, x] and the model's gain lies outside the identified 95 % interval. [-]
    model_dead_time_tol : float
        ... when the dead times differ by more than this share of the model's dead time
        (at least one sample interval) and beyond the identified interval. [-]
    model_tau_ratio_max : float
        ... when identified tau1 / model tau1 lies outside [1/x, x] and beyond its interval. [-]
    model_fit_gap_pct : float
        ... when the model's fit % on the data trails the identified model's by more
        than this. [%]
    model_window_above : int
        A record longer than this many samples is identified on its most informative window of
        excitation (set-point changes, manual moves), not whole (:mod:`audit.plantdata.windows`). [-]
    model_window_samples : int
        Most samples of that window. [-]
    model_window_after : float
        The window runs this many time scales of the loop (dead time + lags) past its last move. [-]
    model_window_noise_ratio : float
        A move counts when its step exceeds this many robust standard deviations of routine movement. [-]
    model_window_sp_move_pct : float
        Smallest set-point step that counts as a move. [% of range]
    mode_automatic, mode_manual, mode_cascade : str
        The site's mode words (comma-separated, any case) for automatic, manual and cascade
        in operating records.
    auto_min_pct : float
        A loop closed (automatic or cascade) for less of its record than this is mostly in
        manual. [%]
    op_limited_max_pct : float
        A loop whose output sits at a limit for more of its record than this needs its valve
        sizing or range checked. [%]
    op_limit_band_pct : float
        An output within this of 0 % or 100 % counts as at the limit. [%]
    oscillation_min_amplitude_pct : float
        Smallest oscillation amplitude of the control error that matters. [% of range]
    harris_min : float
        A Harris index below this puts the loop far from minimum variance. [-]
    export_tag_column, export_signal_column, export_value_column : str
        Column names of a historian export in long form (one row per tag, time and signal).
    export_words_sp, export_words_pv, export_words_op, export_words_mode : str
        Signal words of a long export that mean set point, process value, output and mode
        (comma-separated, any case).
    export_columns_sp, export_columns_pv, export_columns_op, export_columns_mode : str
        Column-name patterns of a wide export (one column per tag and signal), ``{tag}`` standing
        for the tag (comma-separated alternatives, any case), e.g. ``{tag}.pv, {tag}/pv``.
    export_units : str
        ``percent``: an export's sp and pv are in % of the PV range; ``eu``: in engineering units,
        converted with the row's pv_lo and pv_hi.
    export_timezone : str
        IANA zone of an export's timestamps written without a zone; ``none``: read as wall-clock
        time (said in a note).
    """

    ms_max: float = 2.0
    gm_min_db: float = 6.0
    pm_min_deg: float = 30.0
    marginal_pct: float = 10.0
    band_energy_fraction: float = 0.95
    max_gap_s: float = 5.0
    uniform_tolerance: float = 0.01
    min_samples: int = 64
    settle_band_pct: float = 2.0
    cascade_ratio_min: float = 4.0
    weight_high: float = 3.0
    weight_medium: float = 2.0
    weight_low: float = 1.0
    change_ms: float = 0.1
    change_margin_db: float = 1.0
    change_pm_deg: float = 5.0
    change_band_db: float = 3.0
    model_gain_ratio_max: float = 1.5
    model_dead_time_tol: float = 0.5
    model_tau_ratio_max: float = 2.0
    model_fit_gap_pct: float = 20.0
    model_window_above: int = 20_000
    model_window_samples: int = 8_000
    model_window_after: float = 5.0
    model_window_noise_ratio: float = 5.0
    model_window_sp_move_pct: float = 1.0
    mode_automatic: str = "auto, automatic, aut, a"
    mode_manual: str = "man, manual, m"
    mode_cascade: str = "cas, cascade, casc, remote, rsp"
    auto_min_pct: float = 50.0
    op_limited_max_pct: float = 10.0
    op_limit_band_pct: float = 0.5
    oscillation_min_amplitude_pct: float = 0.25
    harris_min: float = 0.3
    export_tag_column: str = "tag"
    export_signal_column: str = "signal"
    export_value_column: str = "value"
    export_words_sp: str = "sp, setpoint, set point"
    export_words_pv: str = "pv, measurement, process value"
    export_words_op: str = "op, output, out"
    export_words_mode: str = "mode"
    export_columns_sp: str = "{tag}.sp, {tag}/sp"
    export_columns_pv: str = "{tag}.pv, {tag}/pv"
    export_columns_op: str = "{tag}.op, {tag}/op"
    export_columns_mode: str = "{tag}.mode, {tag}/mode"
    export_units: str = "percent"
    export_timezone: str = "none"

    def as_dict(self) -> dict[str, Any]:
        """The policy as a plain mapping (setting -> value), in declaration order."""
        return {f.name: getattr(self, f.name) for f in fields(self)}

    def with_values(self, values: Mapping[str, Any]) -> "Policy":
        """A copy with some settings replaced (values already validated)."""
        return replace(self, **dict(values))


POLICY_HELP: dict[str, str] = {
    "ms_max": "Largest acceptable sensitivity peak Ms [-]; 1.2-2.0 is the usual range (Astrom & Hagglund).",
    "gm_min_db": "Smallest acceptable gain margin [dB]; 6 dB (a factor of 2) is common practice.",
    "pm_min_deg": "Smallest acceptable phase margin [deg]; 30 deg is common practice.",
    "marginal_pct": "A passing loop within this many % of a limit is reported as marginal [%].",
    "band_energy_fraction": "Fraction of a disturbance record's variance that lies below the derived band edge [-].",
    "max_gap_s": "Largest gap in a disturbance record, as a multiple of the median sample interval [-].",
    "uniform_tolerance": "Relative jitter of sample intervals above which a record is resampled [-].",
    "min_samples": "Fewest samples a disturbance record may have [-].",
    "settle_band_pct": "Settling band of step responses, % of the step [%].",
    "cascade_ratio_min": "Smallest ratio of inner to outer loop bandwidth in a cascade [-].",
    "weight_high": "Priority weight of a high-criticality loop [-].",
    "weight_medium": "Priority weight of a medium-criticality loop [-].",
    "weight_low": "Priority weight of a low-criticality loop [-].",
    "change_ms": "Change in Ms between audits reported as a move [-].",
    "change_margin_db": "Change in gain margin between audits reported as a move [dB].",
    "change_pm_deg": "Change in phase margin between audits reported as a move [deg].",
    "change_band_db": "Change in band attenuation between audits reported as a move [dB].",
    "model_gain_ratio_max": "Data dispute the model when identified/model gain is outside [1/x, x] [-].",
    "model_dead_time_tol": "Data dispute the model when the dead times differ by more than this share [-].",
    "model_tau_ratio_max": "Data dispute the model when identified/model tau1 is outside [1/x, x] [-].",
    "model_fit_gap_pct": "Data dispute the model when its fit % trails the identified model's by more [%].",
    "model_window_above": "A record longer than this many samples is identified on its most informative window "
                          "of excitation (set-point change, manual move), not whole [-].",
    "model_window_samples": "Most samples of the window identified [-].",
    "model_window_after": "The window runs this many time scales of the loop (dead time + lags) past its last "
                          "move [-]; 5 lets a first-order process settle.",
    "model_window_noise_ratio": "A move counts when its step exceeds this many robust standard deviations of "
                                "routine movement [-]; 5 is common practice for a step test.",
    "model_window_sp_move_pct": "Smallest set-point step that counts as a move [% of range].",
    "mode_automatic": "Mode words of the operating records that mean automatic (comma-separated, any case).",
    "mode_manual": "Mode words that mean manual (comma-separated, any case).",
    "mode_cascade": "Mode words that mean cascade or remote set point (comma-separated, any case).",
    "auto_min_pct": "A loop closed for less than this share of its record is mostly in manual [%].",
    "op_limited_max_pct": "Share of the record with the output at a limit above which valve sizing or range "
                          "is checked [%].",
    "op_limit_band_pct": "An output within this of 0 % or 100 % counts as at its limit [%].",
    "oscillation_min_amplitude_pct": "Smallest oscillation amplitude of the control error that matters "
                                     "[% of range].",
    "harris_min": "Harris index below which a loop is far from minimum variance [-] (1 = minimum variance).",
    "export_tag_column": "Historian export, long form: the column holding the tag.",
    "export_signal_column": "Historian export, long form: the column holding the signal word.",
    "export_value_column": "Historian export, long form: the column holding the value.",
    "export_words_sp": "Signal words of a long export that mean the set point (comma-separated, any case).",
    "export_words_pv": "Signal words that mean the process value (comma-separated, any case).",
    "export_words_op": "Signal words that mean the controller output (comma-separated, any case).",
    "export_words_mode": "Signal words that mean the controller mode (comma-separated, any case).",
    "export_columns_sp": "Wide export: column names of a tag's set point, {tag} for the tag (comma-separated).",
    "export_columns_pv": "Wide export: column names of a tag's process value, {tag} for the tag.",
    "export_columns_op": "Wide export: column names of a tag's controller output, {tag} for the tag.",
    "export_columns_mode": "Wide export: column names of a tag's mode, {tag} for the tag.",
    "export_units": "percent: an export's sp and pv are in % of range; eu: engineering units, converted with "
                    "the row's pv_lo and pv_hi.",
    "export_timezone": "IANA time zone of an export's timestamps written without a zone (e.g. Europe/London); none: "
                       "wall-clock time.",
}
