"""The results columns: one name, one unit and one meaning each.

This table is the single source for the CSV/JSON/xlsx headers, the README's
results table and the report's glossary. A stage that adds columns adds them here.
Units: time [s], frequency [rad/s], phase [deg], ratios [-], levels [dB], amplitudes [% of PV range].
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Column:
    name: str
    unit: str
    meaning: str
    stage: str  # inventory | frequency | time | disturbance | proposal | priority | cascade


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
    C("rhp_closed", "-", "Number of closed-loop poles in the right half-plane (0 when stable).", "frequency"),
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
)


def column_names(stage: str | None = None) -> list[str]:
    """Names of the results columns, all or those of one stage, in table order."""
    return [c.name for c in RESULT_COLUMNS if stage is None or c.stage == stage]


def column(name: str) -> Column:
    """The column called ``name``."""
    for c in RESULT_COLUMNS:
        if c.name == name:
            return c
    raise KeyError(name)
