"""The one cited threshold table of the ASE 2025 update.

Nagueh SF, Sanborn DY, Oh JK, et al. Recommendations for the Evaluation of Left Ventricular
Diastolic Function by Echocardiography and for Heart Failure With Preserved Ejection Fraction
Diagnosis: An Update From the American Society of Echocardiography. J Am Soc Echocardiogr
2025;38(7), doi 10.1016/j.echo.2025.03.011.

Each row states the abnormal side of a cut-off exactly as the project's reference gives it
(several are inclusive where ASE/EACVI 2016 was strict).  Evidence tags follow the reference:
"V" confirmed in a retrieved secondary source, "R" recalled from the paper, "brief" taken from the
project brief; combinations such as "brief+V" name every basis.  None of the rows was read in the
paper itself (see docs/guideline-verification.md, section 3).
"""

from __future__ import annotations

from service.grading.criteria import Threshold
from service.model import Comparison, Measure

#: the paper as every cut-off source cites it (author, journal, year, issue, doi)
PAPER = "Nagueh SF et al. J Am Soc Echocardiogr 2025;38(7), doi 10.1016/j.echo.2025.03.011"

# === Main algorithm =========================================================================

# --- Figure 3, step 1: e′ (impaired relaxation) ------------------------------------------------

E_PRIME_AVERAGE = Threshold(
    key="e_prime_average",
    name="Average e′",
    measure=Measure.e_prime_average,
    comparison=Comparison.le,
    value=6.5,
    unit="cm/s",
    citation=f"{PAPER}, Figure 3 (average e′ ≤ 6.5 cm/s, preferred when both sites)",
    reading="I-25-1",
    evidence="brief+V",
)
E_PRIME_SEPTAL = Threshold(
    key="e_prime_septal",
    name="Septal e′",
    measure=Measure.e_prime_septal,
    comparison=Comparison.le,
    value=6.0,
    unit="cm/s",
    citation=f"{PAPER}, Figure 3 (septal e′ ≤ 6 cm/s)",
    reading="I-25-1",
    evidence="brief+V",
)
E_PRIME_LATERAL = Threshold(
    key="e_prime_lateral",
    name="Lateral e′",
    measure=Measure.e_prime_lateral,
    comparison=Comparison.le,
    value=7.0,
    unit="cm/s",
    citation=f"{PAPER}, Figure 3 (lateral e′ ≤ 7 cm/s)",
    reading="I-25-1",
    evidence="brief+V",
)

# --- Figure 3, step 1: E/e′ ---------------------------------------------------------------------

E_E_PRIME_AVERAGE = Threshold(
    key="e_e_prime_average",
    name="Average E/e′",
    measure=Measure.e_e_prime_average,
    comparison=Comparison.ge,
    value=14.0,
    unit="",
    citation=f"{PAPER}, Figure 3 (average E/e′ ≥ 14, preferred when both sites)",
    reading="I-25-2",
    evidence="brief+R",
)
E_E_PRIME_SEPTAL = Threshold(
    key="e_e_prime_septal",
    name="Septal E/e′",
    measure=Measure.e_e_prime_septal,
    comparison=Comparison.ge,
    value=15.0,
    unit="",
    citation=f"{PAPER}, Figure 3 (septal E/e′ ≥ 15)",
    reading="I-25-2",
    evidence="brief+R",
)
E_E_PRIME_LATERAL = Threshold(
    key="e_e_prime_lateral",
    name="Lateral E/e′",
    measure=Measure.e_e_prime_lateral,
    comparison=Comparison.ge,
    value=13.0,
    unit="",
    citation=f"{PAPER}, Figure 3 (lateral E/e′ ≥ 13)",
    reading="I-25-2",
    evidence="brief+R",
)

# --- Figure 3, step 1: TR velocity or PASP ------------------------------------------------------

TR_VELOCITY = Threshold(
    key="tr_peak_velocity",
    name="TR peak velocity",
    measure=Measure.tr_peak_velocity,
    comparison=Comparison.ge,
    value=2.8,
    unit="m/s",
    citation=f"{PAPER}, Figure 3 (TR ≥ 2.8 m/s or PASP ≥ 35 mmHg)",
    reading="I-25-3",
    evidence="brief+V",
)
PASP = Threshold(
    key="pasp",
    name="PASP",
    measure=Measure.pasp,
    comparison=Comparison.ge,
    value=35.0,
    unit="mmHg",
    citation=f"{PAPER}, Figure 3 (TR ≥ 2.8 m/s or PASP ≥ 35 mmHg)",
    reading="I-25-3",
    evidence="brief+V",
)

# --- Figure 3, step 2: supplementary markers ----------------------------------------------------

LA_RESERVOIR_STRAIN = Threshold(
    key="la_reservoir_strain",
    name="LA reservoir strain",
    measure=Measure.la_reservoir_strain,
    comparison=Comparison.le,
    value=18.0,
    unit="%",
    citation=f"{PAPER}, Figure 3 step 2 (LA reservoir strain ≤ 18 %)",
    reading="I-25-5",
    evidence="V",
)
PV_S_D = Threshold(
    key="pv_s_d_ratio",
    name="Pulmonary-vein S/D",
    measure=Measure.pv_s_d_ratio,
    comparison=Comparison.le,
    value=0.67,
    unit="",
    citation=f"{PAPER}, Figure 3 step 2 (PV S/D ≤ 0.67)",
    reading="I-25-5",
    evidence="V",
)
LAVI = Threshold(
    key="lavi",
    name="LAVI",
    measure=Measure.lavi,
    comparison=Comparison.gt,
    value=34.0,
    unit="mL/m²",
    citation=f"{PAPER}, Figure 3 step 2 (LAVI > 34 mL/m²)",
    reading="I-25-5",
    evidence="V",
)
IVRT = Threshold(
    key="ivrt",
    name="IVRT",
    measure=Measure.ivrt,
    comparison=Comparison.le,
    value=70.0,
    unit="ms",
    citation=f"{PAPER}, Figure 3 step 2 (IVRT ≤ 70 ms)",
    reading="I-25-5",
    evidence="V",
)

# --- Figure 3, grading ------------------------------------------------------------------------

E_A_HIGH = Threshold(
    key="e_a_ratio_high",
    name="E/A",
    measure=Measure.e_a_ratio,
    comparison=Comparison.ge,
    value=2.0,
    unit="",
    citation=f"{PAPER}, Figure 3 (raised LAP with E/A ≥ 2: grade III, else grade II)",
    evidence="R",
)
#: not used by the grading (no rule switch offers the secondary reading that asks for E/A ≤ 0.8
#: before reduced e′ alone means grade 1); kept only as a value the audit's counterfactual
#: probes on either side of (service.audit.counterfactual)
E_A_LOW = Threshold(
    key="e_a_ratio_low",
    name="E/A",
    measure=Measure.e_a_ratio,
    comparison=Comparison.le,
    value=0.8,
    unit="",
    citation=(
        f"{PAPER}, Figure 3 (reduced e′ alone: grade I only with E/A ≤ 0.8 in a secondary "
        "reading that this service does not apply)"
    ),
    evidence="V",
)

# === Atrial fibrillation ======================================================================

# --- AF algorithm (two steps) ------------------------------------------------------------------

AF_MITRAL_E = Threshold(
    key="af_mitral_e",
    name="Mitral E",
    measure=Measure.mitral_e,
    comparison=Comparison.ge,
    value=100.0,
    unit="cm/s",
    citation=f"{PAPER}, AF algorithm step 1 (E ≥ 100 cm/s)",
    evidence="V",
)
AF_E_E_PRIME_SEPTAL = Threshold(
    key="af_e_e_prime_septal",
    name="Septal E/e′",
    measure=Measure.e_e_prime_septal,
    comparison=Comparison.gt,
    value=11.0,
    unit="",
    citation=f"{PAPER}, AF algorithm step 1 (septal E/e′ > 11)",
    evidence="V",
)
AF_TR_VELOCITY = Threshold(
    key="af_tr_peak_velocity",
    name="TR peak velocity",
    measure=Measure.tr_peak_velocity,
    comparison=Comparison.gt,
    value=2.8,
    unit="m/s",
    citation=f"{PAPER}, AF algorithm step 1 (TR > 2.8 m/s or PASP > 35 mmHg)",
    evidence="V",
)
AF_PASP = Threshold(
    key="af_pasp",
    name="PASP",
    measure=Measure.pasp,
    comparison=Comparison.gt,
    value=35.0,
    unit="mmHg",
    citation=f"{PAPER}, AF algorithm step 1 (TR > 2.8 m/s or PASP > 35 mmHg)",
    evidence="V",
)
AF_DECELERATION_TIME = Threshold(
    key="af_deceleration_time",
    name="Mitral E deceleration time",
    measure=Measure.deceleration_time,
    comparison=Comparison.le,
    value=160.0,
    unit="ms",
    citation=f"{PAPER}, AF algorithm step 1 (DT ≤ 160 ms)",
    evidence="V",
)
AF_LA_RESERVOIR_STRAIN = Threshold(
    key="af_la_reservoir_strain",
    name="LA reservoir strain",
    measure=Measure.la_reservoir_strain,
    comparison=Comparison.lt,
    value=18.0,
    unit="%",
    citation=f"{PAPER}, AF algorithm step 2 (LA reservoir strain < 18 %)",
    reading="I-25-9",
    evidence="V",
)
AF_PV_S_D = Threshold(
    key="af_pv_s_d_ratio",
    name="Pulmonary-vein S/D",
    measure=Measure.pv_s_d_ratio,
    comparison=Comparison.lt,
    value=1.0,
    unit="",
    citation=f"{PAPER}, AF algorithm step 2 (PV S/D < 1)",
    reading="I-25-9",
    evidence="V",
)
AF_BMI = Threshold(
    key="af_bmi",
    name="BMI",
    measure=Measure.bmi,
    comparison=Comparison.gt,
    value=30.0,
    unit="kg/m²",
    citation=f"{PAPER}, AF algorithm step 2 (BMI > 30 kg/m²)",
    reading="I-25-9",
    evidence="V",
)

# === Special situations =======================================================================

# --- Special populations: moderate or severe mitral annular calcification ---------------------

_MAC = (
    f"{PAPER}, special populations, mitral annular calcification (after Abudiab MM et al., "
    "JACC Cardiovasc Imaging 2017;10:1411; signs at 0.8, 1.8 and 80 not verified)"
)
MAC_E_A_LOW = Threshold(
    key="mac_e_a_ratio_low",
    name="E/A",
    measure=Measure.e_a_ratio,
    comparison=Comparison.lt,
    value=0.8,
    unit="",
    citation=f"{_MAC}: E/A < 0.8 → normal LAP",
    evidence="R",
)
MAC_E_A_HIGH = Threshold(
    key="mac_e_a_ratio_high",
    name="E/A",
    measure=Measure.e_a_ratio,
    comparison=Comparison.gt,
    value=1.8,
    unit="",
    citation=f"{_MAC}: E/A > 1.8 → elevated LAP",
    evidence="R",
)
MAC_IVRT = Threshold(
    key="mac_ivrt",
    name="IVRT",
    measure=Measure.ivrt,
    comparison=Comparison.lt,
    value=80.0,
    unit="ms",
    citation=f"{_MAC}: E/A 0.8-1.8 with IVRT < 80 ms → elevated LAP",
    evidence="R",
)

# --- Special populations: pulmonary hypertension ----------------------------------------------

_PH = f"{PAPER}, special populations, pulmonary hypertension (lateral E/e′ preferred)"
PH_E_E_PRIME_LATERAL_HIGH = Threshold(
    key="ph_e_e_prime_lateral_high",
    name="Lateral E/e′",
    measure=Measure.e_e_prime_lateral,
    comparison=Comparison.gt,
    value=13.0,
    unit="",
    citation=f"{_PH}: > 13 → left-heart (post-capillary) contribution",
    evidence="R",
)
PH_E_E_PRIME_LATERAL_LOW = Threshold(
    key="ph_e_e_prime_lateral_low",
    name="Lateral E/e′",
    measure=Measure.e_e_prime_lateral,
    comparison=Comparison.lt,
    value=8.0,
    unit="",
    citation=f"{_PH}: < 8 → non-cardiac cause (8 to 13 not resolved, reported indeterminate)",
    evidence="R",
)

# === Valsalva =================================================================================
# No ASE 2025 row: the Valsalva finding reported beside either guideline's result uses the
# ASE/EACVI 2016 row (service.grading.thresholds_ase2016.VALSALVA_E_A_FALL).

#: the table (main algorithm, atrial fibrillation, special situations), in the order the
#: algorithms use the rows
TABLE: tuple[Threshold, ...] = (
    E_PRIME_AVERAGE,
    E_PRIME_SEPTAL,
    E_PRIME_LATERAL,
    E_E_PRIME_AVERAGE,
    E_E_PRIME_SEPTAL,
    E_E_PRIME_LATERAL,
    TR_VELOCITY,
    PASP,
    LA_RESERVOIR_STRAIN,
    PV_S_D,
    LAVI,
    IVRT,
    E_A_HIGH,
    E_A_LOW,
    AF_MITRAL_E,
    AF_E_E_PRIME_SEPTAL,
    AF_TR_VELOCITY,
    AF_PASP,
    AF_DECELERATION_TIME,
    AF_LA_RESERVOIR_STRAIN,
    AF_PV_S_D,
    AF_BMI,
    MAC_E_A_LOW,
    MAC_E_A_HIGH,
    MAC_IVRT,
    PH_E_E_PRIME_LATERAL_HIGH,
    PH_E_E_PRIME_LATERAL_LOW,
)

#: plain name and display unit of every measure the table uses (for reasoning and flag text)
NAMES: dict[Measure, tuple[str, str]] = {row.measure: (row.name, row.unit) for row in TABLE}
