"""The one cited threshold table of ASE/EACVI 2016.

Nagueh SF, Smiseth OA, Appleton CP, et al. Recommendations for the Evaluation of Left Ventricular
Diastolic Function by Echocardiography: An Update from the American Society of Echocardiography
and the European Association of Cardiovascular Imaging. J Am Soc Echocardiogr 2016;29:277-314.

Each row states the abnormal side of a cut-off exactly as published (strict or not).  Evidence:
"R" recalled from the paper, "V" confirmed in a retrieved secondary source, "I" an interpretation.
A row that depends on the project's reading of an ambiguity names it in ``reading`` (I-16-x,
:mod:`service.grading.readings`); citations are for readers and carry no identifier.

Sections: the main algorithm (Fig 8A/8B, :data:`TABLE`), atrial fibrillation (§V.E,
:data:`AF_TABLE`), special situations (§V specific diseases, :data:`SPECIAL_TABLE`) and the
Valsalva finding (:data:`VALSALVA_E_A_FALL`); :data:`ALL_ROWS` holds every row.  Section page
numbers are those of the paper's table of contents (docs/guideline-verification.md, section 2).
"""

from __future__ import annotations

from service.grading.criteria import Threshold
from service.model import Comparison, Measure

#: the paper as every cut-off source cites it (author, journal, year, pages)
PAPER = "Nagueh SF et al. J Am Soc Echocardiogr 2016;29:277–314"

# === Main algorithm =========================================================================

# --- Figure 8A (normal LVEF) and Figure 8B step 2 ---------------------------------------------

E_E_PRIME_AVERAGE = Threshold(
    key="e_e_prime_average",
    name="Average E/e′",
    measure=Measure.e_e_prime_average,
    comparison=Comparison.gt,
    value=14.0,
    unit="",
    citation=f"{PAPER}, Figures 8A and 8B",
    evidence="R+V",
)
E_E_PRIME_SEPTAL = Threshold(
    key="e_e_prime_septal",
    name="Septal E/e′",
    measure=Measure.e_e_prime_septal,
    comparison=Comparison.gt,
    value=15.0,
    unit="",
    citation=f"{PAPER}, Figures 8A and 8B (single-site E/e′)",
    evidence="R+V",
    reading="I-16-3",
)
E_E_PRIME_LATERAL = Threshold(
    key="e_e_prime_lateral",
    name="Lateral E/e′",
    measure=Measure.e_e_prime_lateral,
    comparison=Comparison.gt,
    value=13.0,
    unit="",
    citation=f"{PAPER}, Figures 8A and 8B (single-site E/e′)",
    evidence="R+V",
    reading="I-16-3",
)
E_PRIME_SEPTAL = Threshold(
    key="e_prime_septal",
    name="Septal e′",
    measure=Measure.e_prime_septal,
    comparison=Comparison.lt,
    value=7.0,
    unit="cm/s",
    citation=f"{PAPER}, Figure 8A (septal e′ < 7 or lateral e′ < 10)",
    evidence="R+V",
)
E_PRIME_LATERAL = Threshold(
    key="e_prime_lateral",
    name="Lateral e′",
    measure=Measure.e_prime_lateral,
    comparison=Comparison.lt,
    value=10.0,
    unit="cm/s",
    citation=f"{PAPER}, Figure 8A (septal e′ < 7 or lateral e′ < 10)",
    evidence="R+V",
)
TR_VELOCITY = Threshold(
    key="tr_peak_velocity",
    name="TR peak velocity",
    measure=Measure.tr_peak_velocity,
    comparison=Comparison.gt,
    value=2.8,
    unit="m/s",
    citation=f"{PAPER}, Figures 8A and 8B",
    evidence="R+V",
)
LAVI = Threshold(
    key="lavi",
    name="LAVI",
    measure=Measure.lavi,
    comparison=Comparison.gt,
    value=34.0,
    unit="mL/m²",
    citation=f"{PAPER}, Figures 8A and 8B",
    evidence="R+V",
)

# --- Figure 8B step 1 (mitral inflow) ---------------------------------------------------------

E_A_LOW = Threshold(
    key="e_a_ratio_low",
    name="E/A",
    measure=Measure.e_a_ratio,
    comparison=Comparison.le,
    value=0.8,
    unit="",
    citation=f"{PAPER}, Figure 8B (E/A ≤ 0.8 and E ≤ 50 cm/s: grade I)",
    evidence="R+V",
)
E_LOW = Threshold(
    key="mitral_e_low",
    name="Mitral E",
    measure=Measure.mitral_e,
    comparison=Comparison.le,
    value=50.0,
    unit="cm/s",
    citation=f"{PAPER}, Figure 8B (E/A ≤ 0.8 and E ≤ 50 cm/s: grade I)",
    evidence="R+V",
)
E_A_HIGH = Threshold(
    key="e_a_ratio_high",
    name="E/A",
    measure=Measure.e_a_ratio,
    comparison=Comparison.ge,
    value=2.0,
    unit="",
    citation=f"{PAPER}, Figure 8B (E/A ≥ 2: grade III)",
    evidence="R+V",
)

# --- Figure 8B step 2 substitute (depressed LVEF only) ----------------------------------------

PV_S_D = Threshold(
    key="pv_s_d_ratio",
    name="Pulmonary-vein S/D",
    measure=Measure.pv_s_d_ratio,
    comparison=Comparison.lt,
    value=1.0,
    unit="",
    citation=f"{PAPER}, Figure 8B (PV S/D < 1 when LVEF is reduced)",
    evidence="R",
    reading="I-16-6",
)

# --- Routing ----------------------------------------------------------------------------------

#: The paper gives no number for "reduced"/"depressed" LVEF; 50 % is the operational default and
#: the engine takes the actual cut-off from Context.lvef_reduced_below (reading I-16-10).
LVEF_REDUCED = Threshold(
    key="lvef_reduced",
    name="LVEF",
    measure=Measure.lvef,
    comparison=Comparison.lt,
    value=50.0,
    unit="%",
    citation=f"{PAPER}, Figures 8A and 8B (which figure applies)",
    evidence="I",
    reading="I-16-10",
)

#: the main-algorithm rows (Fig 8A/8B), in the order the algorithms use them
TABLE: tuple[Threshold, ...] = (
    LVEF_REDUCED,
    E_E_PRIME_AVERAGE,
    E_E_PRIME_SEPTAL,
    E_E_PRIME_LATERAL,
    E_PRIME_SEPTAL,
    E_PRIME_LATERAL,
    TR_VELOCITY,
    LAVI,
    E_A_LOW,
    E_LOW,
    E_A_HIGH,
    PV_S_D,
)

#: plain name and display unit of every measure the main-algorithm rows use (reasoning, flags)
NAMES: dict[Measure, tuple[str, str]] = {row.measure: (row.name, row.unit) for row in TABLE}


def _row(
    key: str,
    name: str,
    measure: Measure,
    comparison: Comparison,
    value: float,
    unit: str,
    where: str,
    evidence: str = "R",
    reading: str = "",
) -> Threshold:
    """One §V row (atrial fibrillation, specific diseases); evidence "R" unless stated (the
    reference's §2.5 marks every cut-off there [R] unless noted otherwise)."""
    return Threshold(
        key=key,
        name=name,
        measure=measure,
        comparison=comparison,
        value=value,
        unit=unit,
        citation=f"{PAPER}, {where}",
        evidence=evidence,
        reading=reading,
    )


# === Atrial fibrillation (§V.E) ===============================================================
# Each criterion supports elevated filling pressure; no rule combining them is stated (reading
# I-16-11).

_AF = "§V.E atrial fibrillation (p295)"

AF16_E_ACCELERATION = _row(
    "af_e_acceleration_rate",
    "Peak acceleration rate of mitral E",
    Measure.e_acceleration_rate,
    Comparison.ge,
    1900.0,
    "cm/s²",
    _AF,
)
AF16_IVRT = _row("af_ivrt", "IVRT", Measure.ivrt, Comparison.le, 65.0, "ms", _AF)
AF16_E_E_PRIME_SEPTAL = _row(
    "af_e_e_prime_septal",
    "Septal E/e′",
    Measure.e_e_prime_septal,
    Comparison.ge,
    11.0,
    "",
    f"{_AF} (after Sohn DW et al., J Am Soc Echocardiogr 1999;12:927: "
    "E/e′ ≥ 11 predicted LV diastolic pressure ≥ 15 mmHg)",
    evidence="R+V",
)
AF16_DECELERATION_TIME = _row(
    "af_deceleration_time",
    "Mitral E deceleration time",
    Measure.deceleration_time,
    Comparison.le,
    160.0,
    "ms",
    f"{_AF} (with reduced LVEF only)",
)

#: the atrial-fibrillation rows, in the order the AF rule uses them
AF_TABLE: tuple[Threshold, ...] = (
    AF16_E_ACCELERATION,
    AF16_IVRT,
    AF16_E_E_PRIME_SEPTAL,
    AF16_DECELERATION_TIME,
)

# === Special situations (§V specific diseases) ================================================

_TACHY = "§V specific diseases, sinus tachycardia"
_MR = "§V.C valvular disease (p290), mitral regurgitation"
_MS = "§V.C valvular disease (p290), mitral stenosis"
_HCM = "§V.A hypertrophic cardiomyopathy (p289)"
_RCM = "§V.B restrictive cardiomyopathy (p289)"
_PH = "§V specific diseases, pulmonary hypertension of non-cardiac cause"

TACHY_IVRT = _row("tachy_ivrt", "IVRT", Measure.ivrt, Comparison.le, 70.0, "ms", _TACHY)
TACHY_E_E_PRIME_LATERAL = _row(
    "tachy_e_e_prime_lateral",
    "Lateral E/e′",
    Measure.e_e_prime_lateral,
    Comparison.gt,
    10.0,
    "",
    f"{_TACHY} (a ratio > 12 is the most specific)",
)
MR_AR_A = _row(
    "mr_ar_a_duration", "Ar-A duration", Measure.ar_a_duration, Comparison.ge, 30.0, "ms", _MR
)
MR_IVRT = _row("mr_ivrt", "IVRT", Measure.ivrt, Comparison.lt, 60.0, "ms", _MR)
MR_E_E_PRIME_AVERAGE = _row(
    "mr_e_e_prime_average",
    "Average E/e′",
    Measure.e_e_prime_average,
    Comparison.gt,
    14.0,
    "",
    f"{_MR} (usable only with depressed LVEF)",
)
MS_IVRT = _row("ms_ivrt", "IVRT", Measure.ivrt, Comparison.lt, 60.0, "ms", _MS)
MS_MITRAL_A = _row(
    "ms_mitral_a",
    "Mitral A",
    Measure.mitral_a,
    Comparison.gt,
    150.0,
    "cm/s",
    f"{_MS} (mitral A velocity > 1.5 m/s)",
    evidence="R+V",
)
HCM_E_E_PRIME_AVERAGE = _row(
    "hcm_e_e_prime_average",
    "Average E/e′",
    Measure.e_e_prime_average,
    Comparison.gt,
    14.0,
    "",
    _HCM,
    reading="I-16-12",
)
HCM_AR_A = _row(
    "hcm_ar_a_duration",
    "Ar-A duration",
    Measure.ar_a_duration,
    Comparison.ge,
    30.0,
    "ms",
    _HCM,
    reading="I-16-12",
)
HCM_TR = _row(
    "hcm_tr_peak_velocity",
    "TR peak velocity",
    Measure.tr_peak_velocity,
    Comparison.gt,
    2.8,
    "m/s",
    _HCM,
    reading="I-16-12",
)
HCM_LAVI = _row(
    "hcm_lavi",
    "LAVI",
    Measure.lavi,
    Comparison.gt,
    34.0,
    "mL/m²",
    _HCM,
    reading="I-16-12",
)
RCM_DT = _row(
    "rcm_deceleration_time",
    "Mitral E deceleration time",
    Measure.deceleration_time,
    Comparison.lt,
    140.0,
    "ms",
    _RCM,
)
RCM_E_A = _row("rcm_e_a_ratio", "E/A", Measure.e_a_ratio, Comparison.gt, 2.5, "", _RCM)
RCM_IVRT = _row("rcm_ivrt", "IVRT", Measure.ivrt, Comparison.lt, 50.0, "ms", _RCM)
RCM_E_E_PRIME_AVERAGE = _row(
    "rcm_e_e_prime_average",
    "Average E/e′",
    Measure.e_e_prime_average,
    Comparison.gt,
    14.0,
    "",
    _RCM,
)
PH_E_E_PRIME_LATERAL_HIGH = _row(
    "ph_e_e_prime_lateral_high",
    "Lateral E/e′",
    Measure.e_e_prime_lateral,
    Comparison.gt,
    13.0,
    "",
    f"{_PH}: > 13 → cardiac cause with raised LAP",
)
PH_E_E_PRIME_LATERAL_LOW = _row(
    "ph_e_e_prime_lateral_low",
    "Lateral E/e′",
    Measure.e_e_prime_lateral,
    Comparison.lt,
    8.0,
    "",
    f"{_PH}: < 8 → non-cardiac cause (8 to 13 indeterminate)",
    reading="I-16-13",
)

#: the special-situation rows, in the order the situation rules use them
SPECIAL_TABLE: tuple[Threshold, ...] = (
    TACHY_IVRT,
    TACHY_E_E_PRIME_LATERAL,
    MR_AR_A,
    MR_IVRT,
    MR_E_E_PRIME_AVERAGE,
    MS_IVRT,
    MS_MITRAL_A,
    HCM_E_E_PRIME_AVERAGE,
    HCM_AR_A,
    HCM_TR,
    HCM_LAVI,
    RCM_DT,
    RCM_E_A,
    RCM_IVRT,
    RCM_E_E_PRIME_AVERAGE,
    PH_E_E_PRIME_LATERAL_HIGH,
    PH_E_E_PRIME_LATERAL_LOW,
)

# === Valsalva (mitral inflow with Valsalva) ===================================================
# Supporting evidence only, never a vote inside a rule set.  The row is not evaluated as a plain
# criterion: its value is the fall of E/A during the manoeuvre as a fraction of E/A at rest.

VALSALVA_E_A_FALL = Threshold(
    key="valsalva_e_a_fall",
    name="Fall in E/A during Valsalva (fraction of rest)",
    measure=Measure.e_a_ratio_valsalva,
    comparison=Comparison.ge,
    value=0.5,
    unit="",
    citation=f"{PAPER}, mitral inflow with the Valsalva manoeuvre",
    evidence="R",
)

#: every ASE/EACVI 2016 row (main algorithm, atrial fibrillation, special situations, Valsalva)
ALL_ROWS: tuple[Threshold, ...] = (*TABLE, *AF_TABLE, *SPECIAL_TABLE, VALSALVA_E_A_FALL)
