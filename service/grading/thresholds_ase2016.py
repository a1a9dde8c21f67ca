"""The one cited threshold table of ASE/EACVI 2016.

Nagueh SF, Smiseth OA, Appleton CP, et al. Recommendations for the Evaluation of Left Ventricular
Diastolic Function by Echocardiography: An Update from the American Society of Echocardiography
and the European Association of Cardiovascular Imaging. J Am Soc Echocardiogr 2016;29:277-314.

Each row states the abnormal side of a cut-off exactly as published (strict or not).  Evidence:
"R" recalled from the paper, "V" confirmed in a retrieved secondary source, "I" an interpretation
(its identifier, I-16-x, is given in the citation and explained in the project's reference notes).
"""

from __future__ import annotations

from service.grading.criteria import Threshold
from service.model import Comparison, Measure

PAPER = "Nagueh 2016 JASE 29:277"

# --- Figure 8A (normal LVEF) and Figure 8B step 2 ---------------------------------------------

E_E_PRIME_AVERAGE = Threshold(
    key="e_e_prime_average",
    name="Average E/e′",
    measure=Measure.e_e_prime_average,
    comparison=Comparison.gt,
    value=14.0,
    unit="",
    citation=f"{PAPER}, Fig 8A and Fig 8B",
    evidence="R+V",
)
E_E_PRIME_SEPTAL = Threshold(
    key="e_e_prime_septal",
    name="Septal E/e′",
    measure=Measure.e_e_prime_septal,
    comparison=Comparison.gt,
    value=15.0,
    unit="",
    citation=f"{PAPER}, Fig 8A and Fig 8B (single-site E/e′, I-16-3)",
    evidence="R+V",
)
E_E_PRIME_LATERAL = Threshold(
    key="e_e_prime_lateral",
    name="Lateral E/e′",
    measure=Measure.e_e_prime_lateral,
    comparison=Comparison.gt,
    value=13.0,
    unit="",
    citation=f"{PAPER}, Fig 8A and Fig 8B (single-site E/e′, I-16-3)",
    evidence="R+V",
)
E_PRIME_SEPTAL = Threshold(
    key="e_prime_septal",
    name="Septal e′",
    measure=Measure.e_prime_septal,
    comparison=Comparison.lt,
    value=7.0,
    unit="cm/s",
    citation=f"{PAPER}, Fig 8A (septal e′ < 7 or lateral e′ < 10, I-16-2)",
    evidence="R+V",
)
E_PRIME_LATERAL = Threshold(
    key="e_prime_lateral",
    name="Lateral e′",
    measure=Measure.e_prime_lateral,
    comparison=Comparison.lt,
    value=10.0,
    unit="cm/s",
    citation=f"{PAPER}, Fig 8A (septal e′ < 7 or lateral e′ < 10, I-16-2)",
    evidence="R+V",
)
TR_VELOCITY = Threshold(
    key="tr_peak_velocity",
    name="TR peak velocity",
    measure=Measure.tr_peak_velocity,
    comparison=Comparison.gt,
    value=2.8,
    unit="m/s",
    citation=f"{PAPER}, Fig 8A and Fig 8B",
    evidence="R+V",
)
LAVI = Threshold(
    key="lavi",
    name="LAVI",
    measure=Measure.lavi,
    comparison=Comparison.gt,
    value=34.0,
    unit="mL/m²",
    citation=f"{PAPER}, Fig 8A and Fig 8B",
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
    citation=f"{PAPER}, Fig 8B (E/A ≤ 0.8 and E ≤ 50 cm/s: grade I, I-16-4)",
    evidence="R+V",
)
E_LOW = Threshold(
    key="mitral_e_low",
    name="Mitral E",
    measure=Measure.mitral_e,
    comparison=Comparison.le,
    value=50.0,
    unit="cm/s",
    citation=f"{PAPER}, Fig 8B (E/A ≤ 0.8 and E ≤ 50 cm/s: grade I)",
    evidence="R+V",
)
E_A_HIGH = Threshold(
    key="e_a_ratio_high",
    name="E/A",
    measure=Measure.e_a_ratio,
    comparison=Comparison.ge,
    value=2.0,
    unit="",
    citation=f"{PAPER}, Fig 8B (E/A ≥ 2: grade III, I-16-5)",
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
    citation=f"{PAPER}, Fig 8B (PV S/D < 1 when LVEF is depressed, I-16-6)",
    evidence="R",
)

# --- Routing ----------------------------------------------------------------------------------

#: The paper gives no number for "reduced"/"depressed" LVEF; 50 % is the operational default and
#: the engine takes the actual cut-off from Context.lvef_reduced_below (I-16-10).
LVEF_REDUCED = Threshold(
    key="lvef_reduced",
    name="LVEF",
    measure=Measure.lvef,
    comparison=Comparison.lt,
    value=50.0,
    unit="%",
    citation=f"{PAPER}, Fig 8A/8B routing; cut-off not stated, operational default (I-16-10)",
    evidence="I",
)

#: the table, in the order the algorithms use the rows
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

#: plain name and display unit of every measure the table uses (for reasoning and flag text)
NAMES: dict[Measure, tuple[str, str]] = {row.measure: (row.name, row.unit) for row in TABLE}
