"""Every coded concept the result SR uses.

Standard codes carry their source (PS3.16 context group, SNOMED CT, LOINC) and, unless marked
"from memory", were checked against pydicom's bundled PS3.16 dictionary
(``pydicom.sr._concepts_dict``; ``tests/test_result_codes.py`` repeats that check).

Where no standard concept exists (PS3.16 has none for a diastolic-function grade, an estimated
LV filling pressure, average e', E/e', ...), the project's own coding scheme is used:
designator ``99DSRG`` ("99" prefix = local scheme, PS3.3 section 8.2), declared in the
Coding Scheme Identification Sequence of every result.  Rules for this scheme: a code's
meaning never changes; new meanings get new codes; code values are at most 16 characters
(SH) and meanings at most 64 (LO).

Design choice for the grade: all six grade values are private, one closed value set, because
"normal diastolic function" is a narrower statement than SNOMED CT 17621005 "Normal" and a
reader of the coded value should never have to mix two schemes to interpret one concept.
Filling pressure values are standard (PS3.16 CID 3642 Elevated / Normal Range; CID 222
Normality Undetermined for "indeterminate"; CID 230 Undetermined for "not estimated"); only the
concept name is private.

Criterion verdicts are private (met / not met / not evaluable) rather than (121402, DCM,
"Normality") with CID 222 values: a criterion being met is not always an abnormality (E/A <= 0.8
selects grade I; LVEF < 50 % selects a pathway).  For the same reason a criterion's threshold is
written as a private "Criterion cut-off value" NUM, not as a TID 312 normal-range limit: it is
a decision cut-off whose direction is stated by the rule text, not a reference-range bound.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

from pydicom.sr.coding import Code

from service.model import FillingPressure, Grade, Guideline, Measure, Pathway, Rhythm
from service.model import SpecialSituation as SS

PRIVATE_SCHEME = "99DSRG"
PRIVATE_SCHEME_NAME = "diastolic-sr grading concepts"
PRIVATE_SCHEME_VERSION = "1"
PRIVATE_SCHEME_ORGANISATION = "diastolic-sr project"


@dataclass(frozen=True)
class CodeDef:
    """A concept: value, designator, meaning and where it comes from."""

    value: str
    scheme: str
    meaning: str
    source: str  # citation for standard codes; definition for private ones
    from_memory: bool = False  # standard code not present in pydicom's dictionary

    @functools.cached_property
    def code(self) -> Code:
        """The pydicom Code, made once (a result names each concept many times)."""
        return Code(self.value, self.scheme, self.meaning)

    @property
    def private(self) -> bool:
        return self.scheme == PRIVATE_SCHEME


STANDARD: list[CodeDef] = []
PRIVATE: list[CodeDef] = []


def _std(value: str, scheme: str, meaning: str, source: str) -> CodeDef:
    c = CodeDef(value, scheme, meaning, source)
    STANDARD.append(c)
    return c


def _p(value: str, meaning: str, definition: str) -> CodeDef:
    c = CodeDef(value, PRIVATE_SCHEME, meaning, definition)
    PRIVATE.append(c)
    return c


# ---------------------------------------------------------------------------------------------
# Standard codes (checked against pydicom 3.0.2's PS3.16 dictionary)
# ---------------------------------------------------------------------------------------------

IMPRESSIONS = _std("19005-8", "LN", "Impressions", "PS3.16 CID 7001")
IMPRESSION = _std("121073", "DCM", "Impression", "PS3.16 CID 7002")
OBSERVER_TYPE = _std("121005", "DCM", "Observer Type", "PS3.16 TID 1002")
DEVICE = _std("121007", "DCM", "Device", "PS3.16 CID 270")
DEVICE_OBSERVER_UID = _std("121012", "DCM", "Device Observer UID", "PS3.16 TID 1004")
DEVICE_OBSERVER_NAME = _std("121013", "DCM", "Device Observer Name", "PS3.16 TID 1004")
DEVICE_OBSERVER_MANUFACTURER = _std(
    "121014", "DCM", "Device Observer Manufacturer", "PS3.16 TID 1004"
)
DEVICE_OBSERVER_MODEL = _std("121015", "DCM", "Device Observer Model Name", "PS3.16 TID 1004")
CURRENT_PROCEDURE_EVIDENCE = _std("122073", "DCM", "Current procedure evidence", "PS3.16 CID 7009")
ALGORITHM_NAME = _std("111001", "DCM", "Algorithm Name", "PS3.16 TID 4019")
ALGORITHM_VERSION = _std("111003", "DCM", "Algorithm Version", "PS3.16 TID 4019")
CARDIAC_RHYTHM = _std("8884-9", "LN", "Cardiac Rhythm", "PS3.16 CID 3441")
ATRIAL_FIBRILLATION = _std("49436004", "SCT", "Atrial Fibrillation", "PS3.16 CID 3230")
NORMAL_SINUS_RHYTHM = _std("64730000", "SCT", "normal sinus rhythm", "PS3.16 CID 3826")
DERIVATION = _std("121401", "DCM", "Derivation", "PS3.16 TID 300")
MEAN = _std("373098007", "SCT", "Mean", "PS3.16 CID 3627")
CALCULATED = _std("258090004", "SCT", "Calculated", "PS3.16 CID 3627")
YES = _std("373066001", "SCT", "Yes", "PS3.16 CID 230")
NO = _std("373067005", "SCT", "No", "PS3.16 CID 230")
UNDETERMINED = _std("373068000", "SCT", "Undetermined", "PS3.16 CID 230")
ELEVATED = _std("75540009", "SCT", "Elevated", "PS3.16 CID 3642")
NORMAL_RANGE = _std("260395002", "SCT", "Normal Range", "PS3.16 CID 3642")
NORMALITY_UNDETERMINED = _std("371934000", "SCT", "Normality Undetermined", "PS3.16 CID 222")

# measures with a standard concept (pre-coordinated LOINC of CID 12300 where one exists)
MITRAL_E = _std("80070-6", "LN", "Mitral valve E-wave Vmax", "PS3.16 CID 12300")
MITRAL_A = _std("80066-4", "LN", "Mitral valve A-wave Vmax", "PS3.16 CID 12300")
MITRAL_E_A = _std("18038-0", "LN", "Mitral Valve E to A Ratio", "PS3.16 CID 12300")
MITRAL_DT = _std("78191-4", "LN", "Mitral valve deceleration time", "PS3.16 CID 12300")
E_PRIME_SEPTAL = _std("79911-4", "LN", "Mitral septal e-prime Vmax", "PS3.16 CID 12300")
E_PRIME_LATERAL = _std("80054-0", "LN", "Mitral lateral e-prime Vmax", "PS3.16 CID 12300")
TR_VMAX = _std("79921-3", "LN", "Tricuspid regurgitation Vmax", "PS3.16 CID 12300")
LVEF = _std("18043-0", "LN", "Left Ventricular Ejection Fraction by US", "PS3.16 CID 12202")
IVRT = _std("18071-1", "LN", "Left Ventricular Isovolumic Relaxation Time", "PS3.16 CID 12203")
HEART_RATE = _std("8867-4", "LN", "Heart rate", "PS3.16 CID 12220")
SUBJECT_AGE = _std("121033", "DCM", "Subject Age", "PS3.16 TID 1007")
BMI = _std(
    "60621009", "SCT", "Body mass index (observable entity)", "SNOMED CT, in PS3.16 dictionary"
)

# ---------------------------------------------------------------------------------------------
# Private codes (99DSRG)
# ---------------------------------------------------------------------------------------------

RESULT_TITLE = _p(
    "DFREPORT",
    "Automated LV diastolic function assessment",
    "Document title of every result SR (no standard title names this assessment)",
)
ASSESSMENT = _p(
    "ASSESSMENT", "LV diastolic function assessment", "Container: one guideline's assessment"
)
ASSESSMENT_ROLE = _p("ASMTROLE", "Assessment role", "Whether the assessment is primary")
PRIMARY = _p("PRIMARY", "Primary assessment", "The assessment the result is based on")
COMPARISON = _p("COMPARISON", "Comparison assessment", "Another guideline, for comparison")
GUIDELINE = _p("GUIDELINE", "Guideline applied", "Published guideline whose rules were used")
GUIDELINE_CITATION = _p("GLCITATION", "Guideline citation", "Bibliographic citation (TEXT)")
PATHWAY = _p("PATHWAY", "Grading pathway", "Which algorithm of the guideline was applied")
PATHWAY_REASON = _p("PATHREASON", "Pathway reason", "Why that pathway was chosen (TEXT)")
SPECIAL_SITUATION = _p(
    "SPECSITUATION", "Special situation", "Condition in which the standard algorithm differs"
)
GRADE = _p("DFGRADE", "LV diastolic function grade", "Grade of LV diastolic function")
FILLING_PRESSURE = _p(
    "LVFILLPRESSURE",
    "Estimated LV filling pressure",
    "Echo estimate of LV filling pressure (left atrial pressure), not a measured pressure",
)
REASONING = _p("REASONING", "Reasoning step", "One sentence of the algorithm's path, in order")
NOTE = _p("NOTE", "Assessment note", "Caveat, missing data or inconsistency")
BORDERLINE = _p(
    "BORDERLINE", "Borderline result", "Whether a value near a cut-off could change the result"
)
BORDERLINE_CRITERION = _p(
    "BORDERCRIT", "Borderline criterion", "A criterion whose value lies near its cut-off"
)
ALTERNATIVE_GRADE = _p(
    "ALTGRADE", "Grade if value crossed its cut-off", "Grade with the value on the other side"
)
ALTERNATIVE_FILLING_PRESSURE = _p(
    "ALTFILLPRESSURE",
    "Filling pressure if value crossed its cut-off",
    "Filling pressure with the value on the other side",
)
SUPPORTING_FINDING = _p(
    "SUPPFINDING", "Supporting finding", "Evidence reported beside the algorithm, not a vote"
)
SUPPORTS_ELEVATED = _p(
    "SUPPELEVATED", "Supports elevated filling pressure", "Direction of a supporting finding"
)
AGREES_WITH_RESULT = _p("AGREESRESULT", "Agrees with result", "Finding agrees with the result")
CRITERION_VERDICT = _p("CRITVERDICT", "Criterion verdict", "Outcome of one criterion")
CRITERION_MET = _p("CRITMET", "Criterion met", "The value satisfies the criterion")
CRITERION_NOT_MET = _p("CRITNOTMET", "Criterion not met", "The value does not satisfy it")
CRITERION_UNAVAILABLE = _p(
    "CRITUNAVAIL", "Criterion not evaluable, value unavailable", "No value for the measure"
)
CRITERION_RULE = _p("CRITRULE", "Criterion rule", "The criterion in words, e.g. 'E/e' > 14'")
CRITERION_ID = _p("CRITID", "Criterion identifier", "Stable identifier of the criterion")
ALGORITHM_STEP = _p("ALGSTEP", "Algorithm step", "Step of the algorithm the criterion belongs to")
CUTOFF = _p("CUTOFF", "Criterion cut-off value", "Threshold the value is compared with")
CUTOFF_SOURCE = _p("CUTOFFSOURCE", "Cut-off source", "Citation of the threshold")
GUIDELINE_COMPARISON = _p(
    "GLCOMPARISON", "Guideline comparison", "Container: results of several guidelines compared"
)
DISAGREEMENT = _p("DISAGREEMENT", "Guideline disagreement", "Where guidelines differ (TEXT)")
MEASUREMENTS_USED = _p(
    "MEASUSED", "Measurements used", "Container: values the assessment was computed from"
)
VALUE_ORIGIN = _p("VALUEORIGIN", "Value origin", "How the value was obtained, in plain words")
SOURCE_CONCEPT = _p("SOURCECONCEPT", "Source concept", "Concept code(s) in the source SR")
EXCLUDED_OBSERVATION = _p(
    "EXCLUDED", "Excluded observation", "A recognised source value not used, with the reason"
)
MEASUREMENT_NOTE = _p("MEASNOTE", "Measurement note", "Note about the measurements")
STUDY_NOTE = _p(
    "STUDYNOTE",
    "Study note",
    "Note about the study that holds for every guideline applied, said once (TEXT)",
)
CAUTION = _p("CAUTION", "Decision support caution", "Result must be confirmed by a reader")
CRITERIA = _p(
    "CRITERIA", "Criteria evaluated", "Container: each criterion once, referenced by the results"
)
CRITERION_GROUP = _p(
    "CRITGROUP", "Counted as one criterion", "Rows that count together as one criterion (TEXT)"
)
READING = _p(
    "READING",
    "Reading of an ambiguous guideline rule",
    "The project's reading where the guideline is silent or ambiguous (TEXT)",
)
READING_ID = _p("READINGID", "Reading identifier", "Stable identifier of a reading, e.g. I-16-7")
NOT_AVAILABLE_TEXT = "not available"

# grade values: one closed private value set (see module docstring)
GRADE_NORMAL = _p("DFG-NORMAL", "Normal diastolic function", "Grade value")
GRADE_1 = _p("DFG-1", "Grade I diastolic dysfunction", "Grade value")
GRADE_2 = _p("DFG-2", "Grade II diastolic dysfunction", "Grade value")
GRADE_3 = _p("DFG-3", "Grade III diastolic dysfunction", "Grade value")
GRADE_INDETERMINATE = _p("DFG-INDET", "Diastolic function indeterminate", "Grade value")
GRADE_NOT_GRADABLE = _p("DFG-NOTGRADABLE", "Diastolic function not gradable", "Grade value")
GRADE_NOT_APPLICABLE = _p(
    "DFG-NA",
    "Grade not applicable",
    "Grade value: the guideline gives no grade (atrial fibrillation, special situation)",
)

GRADE_VALUES: dict[Grade, CodeDef] = {
    Grade.normal: GRADE_NORMAL,
    Grade.grade_1: GRADE_1,
    Grade.grade_2: GRADE_2,
    Grade.grade_3: GRADE_3,
    Grade.indeterminate: GRADE_INDETERMINATE,
    Grade.not_gradable: GRADE_NOT_GRADABLE,
    Grade.not_applicable: GRADE_NOT_APPLICABLE,
}

FILLING_PRESSURE_VALUES: dict[FillingPressure, CodeDef] = {
    FillingPressure.normal: NORMAL_RANGE,
    FillingPressure.elevated: ELEVATED,
    FillingPressure.indeterminate: NORMALITY_UNDETERMINED,
    FillingPressure.not_estimated: UNDETERMINED,
}

GUIDELINE_VALUES: dict[Guideline, CodeDef] = {
    Guideline.ase_eacvi_2016: _p(
        "GL-ASEEACVI2016",
        "ASE/EACVI 2016 diastolic function recommendations",
        "Nagueh et al. J Am Soc Echocardiogr 2016;29:277-314",
    ),
    Guideline.ase_2025: _p(
        "GL-ASE2025",
        "ASE 2025 diastolic function recommendations",
        "Nagueh et al. J Am Soc Echocardiogr 2025;38(7)",
    ),
    Guideline.bse_2024: _p(
        "GL-BSE2024",
        "BSE 2024 diastolic function guidance",
        "Robinson et al. Echo Res Pract 2024;11:16",
    ),
}

#: short names used in plain-language text
GUIDELINE_NAMES: dict[Guideline, str] = {
    Guideline.ase_eacvi_2016: "ASE/EACVI 2016",
    Guideline.ase_2025: "ASE 2025",
    Guideline.bse_2024: "BSE 2024",
}

PATHWAY_VALUES: dict[Pathway, CodeDef] = {
    Pathway.normal_lvef: _p("PW-NORMALLVEF", "Normal LVEF pathway", "ASE/EACVI 2016 Fig 8A"),
    Pathway.reduced_lvef_or_myocardial_disease: _p(
        "PW-REDUCEDLVEF", "Reduced LVEF or myocardial disease pathway", "ASE/EACVI 2016 Fig 8B"
    ),
    Pathway.sinus_general: _p("PW-SINUSGENERAL", "General sinus rhythm pathway", "Any LVEF"),
    Pathway.atrial_fibrillation: _p("PW-AF", "Atrial fibrillation pathway", "Pressure only"),
    Pathway.special_situation: _p("PW-SPECIAL", "Special situation pathway", "Alt. criteria"),
    Pathway.not_applicable: _p(
        "PW-NOTAPPLICABLE", "Standard algorithm not applicable", "No grade given"
    ),
}

RHYTHM_VALUES: dict[Rhythm, CodeDef] = {
    Rhythm.sinus: NORMAL_SINUS_RHYTHM,
    Rhythm.af: ATRIAL_FIBRILLATION,
    Rhythm.unknown: UNDETERMINED,
}

SPECIAL_SITUATION_VALUES: dict[SS, CodeDef] = {
    SS.sinus_tachycardia: _p("SS-TACHYCARDIA", "Sinus tachycardia or E-A fusion", "Situation"),
    SS.mitral_regurgitation: _p("SS-MR", "Moderate or severe mitral regurgitation", "Situation"),
    SS.mitral_stenosis: _p("SS-MS", "Mitral stenosis", "Situation"),
    SS.mitral_annular_calcification: _p(
        "SS-MAC", "Moderate or severe mitral annular calcification", "Situation"
    ),
    SS.prosthetic_mitral_valve: _p("SS-MVPROSTHESIS", "Prosthetic mitral valve", "Situation"),
    SS.heart_transplant: _p("SS-TRANSPLANT", "Heart transplant", "Situation"),
    SS.hypertrophic_cardiomyopathy: _p("SS-HCM", "Hypertrophic cardiomyopathy", "Situation"),
    SS.restrictive_cardiomyopathy: _p("SS-RCM", "Restrictive cardiomyopathy", "Situation"),
    SS.pulmonary_hypertension_non_cardiac: _p(
        "SS-NONCARDIACPH", "Pulmonary hypertension of non-cardiac cause", "Situation"
    ),
    SS.lbbb_or_ventricular_pacing: _p(
        "SS-LBBBPACING", "Left bundle branch block or ventricular pacing", "Situation"
    ),
}

# measures without a standard concept (no code in PS3.16 / CID 12300 for these)
E_PRIME_AVERAGE = _p("EPRIMEAVG", "Mitral annular e' velocity, septal-lateral average", "Derived")
E_E_PRIME_SEPTAL = _p("EEPRIMESEPTAL", "Mitral E / septal e' ratio", "Derived")
E_E_PRIME_LATERAL = _p("EEPRIMELATERAL", "Mitral E / lateral e' ratio", "Derived")
E_E_PRIME_AVERAGE = _p("EEPRIMEAVERAGE", "Mitral E / average e' ratio", "Derived")
PV_S_D_RATIO = _p("PVSDRATIO", "Pulmonary vein S/D velocity ratio", "Derived")
LA_RESERVOIR_STRAIN = _p("LARSTRAIN", "LA reservoir strain", "Speckle-tracking LA strain")
PASP = _p("PASP", "Pulmonary artery systolic pressure, echo estimate", "4V^2 + RAP")
LAVI = _p("LAVI", "LA maximum volume indexed to BSA", "Method as in the source")
E_ACCELERATION_RATE = _p("EACCELRATE", "Mitral E-wave acceleration rate", "Peak rate")
AR_A_DURATION = _p("ARMINUSA", "PV Ar duration minus mitral A duration", "Derived")
MITRAL_E_VALSALVA = _p("MVEVALSALVA", "Mitral E velocity during Valsalva", "Staged")
MITRAL_A_VALSALVA = _p("MVAVALSALVA", "Mitral A velocity during Valsalva", "Staged")
E_A_RATIO_VALSALVA = _p("EAVALSALVA", "Mitral E/A ratio during Valsalva", "Staged")
E_A_VALSALVA_CHANGE = _p("EAVALSALVACHG", "Change in mitral E/A ratio with Valsalva", "Derived")

MEASURE_CONCEPTS: dict[Measure, CodeDef] = {
    Measure.mitral_e: MITRAL_E,
    Measure.mitral_a: MITRAL_A,
    Measure.e_a_ratio: MITRAL_E_A,
    Measure.deceleration_time: MITRAL_DT,
    Measure.e_prime_septal: E_PRIME_SEPTAL,
    Measure.e_prime_lateral: E_PRIME_LATERAL,
    Measure.e_prime_average: E_PRIME_AVERAGE,
    Measure.e_e_prime_septal: E_E_PRIME_SEPTAL,
    Measure.e_e_prime_lateral: E_E_PRIME_LATERAL,
    Measure.e_e_prime_average: E_E_PRIME_AVERAGE,
    Measure.tr_peak_velocity: TR_VMAX,
    Measure.pasp: PASP,
    Measure.lavi: LAVI,
    Measure.lvef: LVEF,
    Measure.ivrt: IVRT,
    Measure.pv_s_d_ratio: PV_S_D_RATIO,
    Measure.la_reservoir_strain: LA_RESERVOIR_STRAIN,
    Measure.age: SUBJECT_AGE,
    Measure.e_acceleration_rate: E_ACCELERATION_RATE,
    Measure.bmi: BMI,
    Measure.heart_rate: HEART_RATE,
    Measure.ar_a_duration: AR_A_DURATION,
    Measure.mitral_e_valsalva: MITRAL_E_VALSALVA,
    Measure.mitral_a_valsalva: MITRAL_A_VALSALVA,
    Measure.e_a_ratio_valsalva: E_A_RATIO_VALSALVA,
}

#: UCUM units (code, meaning); the meaning is plain text, the code is what matters (UCUM)
UNIT_MEANINGS: dict[str, str] = {
    "cm/s": "cm/s",
    "m/s": "m/s",
    "ms": "ms",
    "{ratio}": "ratio",
    "mm[Hg]": "mmHg",
    "mL/m2": "mL/m2",
    "%": "%",
    "a": "year",
    "cm/s2": "cm/s2",
    "kg/m2": "kg/m2",
    "/min": "/min",
    "1": "no units",
}


@functools.lru_cache(maxsize=256)
def unit_code(unit: str) -> Code:
    """UCUM code for a canonical unit string (the string itself is the UCUM code)."""
    return Code(unit, "UCUM", UNIT_MEANINGS.get(unit, unit))


def all_codes() -> list[CodeDef]:
    return [*STANDARD, *PRIVATE]
