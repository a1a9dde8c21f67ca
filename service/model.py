"""Typed values that cross module boundaries.

The flow is: ``sr.read`` turns an SR content tree into :class:`Observation` objects,
``vocabulary`` maps them to :class:`Measurements` (canonical measures in canonical units),
``grading`` turns :class:`Measurements` plus :class:`Context` into an :class:`Assessment`,
and ``sr.write`` turns that into a result SR.  No DICOM library types appear here.

All models are immutable (frozen) so a value handed to another module cannot be changed
behind its back.
"""

from __future__ import annotations

from enum import StrEnum

from pydantic import BaseModel, ConfigDict, Field, model_validator

#: Shown on every result (table, JSON, result SR, summary).  Wording is the project's own.
CAUTION = (
    "Decision support only: this automated assessment must be confirmed by a qualified "
    "reader under local protocols before any clinical use."
)


class Frozen(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


# ---------------------------------------------------------------------------------------------
# Codes
# ---------------------------------------------------------------------------------------------


class Code(Frozen):
    """A coded concept.  Equality and hashing ignore the meaning: codes are keyed by
    (scheme, value) only, because meanings differ between editions (common practice,
    PS3.16 advises matching on designator and value)."""

    value: str
    scheme: str
    meaning: str = ""

    @property
    def key(self) -> tuple[str, str]:
        return (self.scheme, self.value)

    def __eq__(self, other: object) -> bool:
        # same as comparing .key, without making two tuples (called very often)
        return isinstance(other, Code) and self.value == other.value and self.scheme == other.scheme

    def __hash__(self) -> int:
        return hash((self.scheme, self.value))

    def __str__(self) -> str:
        return f'({self.value}, {self.scheme}, "{self.meaning}")'


class Modifier(Frozen):
    """A CODE child that qualifies a measurement (HAS CONCEPT MOD / HAS ACQ CONTEXT /
    HAS PROPERTIES), either on the item itself or inherited from an enclosing container."""

    name: Code
    value: Code
    inherited: bool = False


class Observation(Frozen):
    """One NUM content item found in a source SR, with every modifier that applies to it."""

    path: str  # content-item path, "1" is the root, "1.3.2" its 3rd child's 2nd child
    concept: Code
    value: float | None  # None when the item has no measured value (see qualifier)
    unit: Code | None  # UCUM code from Measurement Units Code Sequence
    qualifier: Code | None = None  # Numeric Value Qualifier, when present
    modifiers: tuple[Modifier, ...] = ()  # own modifiers first, then inherited ones
    source_uid: str = ""  # SOP Instance UID of the SR it came from
    #: why the item's value cannot be used although it is there (several values, values that
    #: disagree, an invalid Value Type); "" when it can
    problem: str = ""

    def modifier(self, name: Code) -> Code | None:
        """Value of the nearest modifier with this concept name (own beats inherited)."""
        for m in self.modifiers:
            if m.name == name:
                return m.value
        return None


class CodedItem(Frozen):
    """A CODE content item that is not a modifier of a measurement (e.g. Cardiac Rhythm,
    a coded finding); the grading context may use it."""

    path: str
    concept: Code
    value: Code
    modifiers: tuple[Modifier, ...] = ()
    source_uid: str = ""


class InstanceRef(Frozen):
    """Reference to a stored DICOM instance (e.g. an earlier result SR now superseded)."""

    study_instance_uid: str
    series_instance_uid: str
    sop_class_uid: str
    sop_instance_uid: str


class SourceDocument(Frozen):
    """What the reader took out of one source SR (no DICOM types)."""

    sop_instance_uid: str
    sop_class_uid: str
    study_instance_uid: str
    series_instance_uid: str
    #: ContentDate + ContentTime (else InstanceCreationDate/Time) as "YYYYMMDDHHMMSS.ffffff";
    #: used to let the more recently created SR win when several carry one measure.
    created: str = ""
    template: str | None = None  # "5200", "5300", ... when identified
    document_title: Code | None = None
    patient_age_years: float | None = None  # from PatientAge / Subject Age
    observations: tuple[Observation, ...] = ()
    coded_items: tuple[CodedItem, ...] = ()
    by_reference_items: int = 0  # by-reference relationships seen (not followed)
    warnings: tuple[str, ...] = ()


# ---------------------------------------------------------------------------------------------
# Canonical measures
# ---------------------------------------------------------------------------------------------


class Measure(StrEnum):
    """Canonical measures.  The names are part of the JSON contract."""

    mitral_e = "mitral_e"
    mitral_a = "mitral_a"
    e_a_ratio = "e_a_ratio"
    deceleration_time = "deceleration_time"
    e_prime_septal = "e_prime_septal"
    e_prime_lateral = "e_prime_lateral"
    e_prime_average = "e_prime_average"
    e_e_prime_septal = "e_e_prime_septal"
    e_e_prime_lateral = "e_e_prime_lateral"
    e_e_prime_average = "e_e_prime_average"
    tr_peak_velocity = "tr_peak_velocity"
    pasp = "pasp"
    lavi = "lavi"
    lvef = "lvef"
    ivrt = "ivrt"
    pv_s_d_ratio = "pv_s_d_ratio"
    la_reservoir_strain = "la_reservoir_strain"
    age = "age"
    # used by special situations and the AF rules (issue-level additions; optional inputs)
    e_acceleration_rate = "e_acceleration_rate"  # cm/s2, peak acceleration rate of mitral E
    bmi = "bmi"  # kg/m2
    heart_rate = "heart_rate"  # /min
    ar_a_duration = "ar_a_duration"  # ms, pulmonary-vein Ar duration minus mitral A duration
    # mitral inflow during the Valsalva manoeuvre (Stage = 261039008 SCT), kept apart from rest
    mitral_e_valsalva = "mitral_e_valsalva"
    mitral_a_valsalva = "mitral_a_valsalva"
    e_a_ratio_valsalva = "e_a_ratio_valsalva"


#: canonical UCUM unit of every measure
CANONICAL_UNITS: dict[Measure, str] = {
    Measure.mitral_e: "cm/s",
    Measure.mitral_a: "cm/s",
    Measure.e_a_ratio: "{ratio}",
    Measure.deceleration_time: "ms",
    Measure.e_prime_septal: "cm/s",
    Measure.e_prime_lateral: "cm/s",
    Measure.e_prime_average: "cm/s",
    Measure.e_e_prime_septal: "{ratio}",
    Measure.e_e_prime_lateral: "{ratio}",
    Measure.e_e_prime_average: "{ratio}",
    Measure.tr_peak_velocity: "m/s",
    Measure.pasp: "mm[Hg]",
    Measure.lavi: "mL/m2",
    Measure.lvef: "%",
    Measure.ivrt: "ms",
    Measure.pv_s_d_ratio: "{ratio}",
    Measure.la_reservoir_strain: "%",
    Measure.age: "a",
    Measure.e_acceleration_rate: "cm/s2",
    Measure.bmi: "kg/m2",
    Measure.heart_rate: "/min",
    Measure.ar_a_duration: "ms",
    Measure.mitral_e_valsalva: "cm/s",
    Measure.mitral_a_valsalva: "cm/s",
    Measure.e_a_ratio_valsalva: "{ratio}",
}


class Origin(StrEnum):
    """How the value used for a measure was obtained from the source(s)."""

    measured = "measured"  # one value in the source
    selected = "selected"  # one of several, chosen by Selection Status in the source
    device_mean = "device-mean"  # the source marked it as a mean (Derivation = Mean)
    mean_of_repeats = "mean-of-repeats"  # several unmarked repeats, averaged here
    derived = "derived"  # computed here from other measures (e.g. E / average e')
    patient = "patient"  # from the patient module (age)


class MeasureValue(Frozen):
    measure: Measure
    value: float
    unit: str  # canonical UCUM unit of the measure
    origin: Origin
    n: int = 1  # number of samples behind the value
    detail: str = ""  # plain words, e.g. "mean of 3 unmarked repeats"
    codes: tuple[str, ...] = ()  # source concept codes, e.g. "80070-6 LN"
    paths: tuple[str, ...] = ()  # content-item paths in the source tree, e.g. "1.4.2.3"
    source_uids: tuple[str, ...] = ()  # SOP Instance UIDs of the source SRs used


class Exclusion(Frozen):
    """An observation that was recognised but not used, with the reason."""

    path: str
    concept: Code
    measure: Measure | None = None
    value: float | None = None
    unit: str | None = None
    reason: str
    source_uid: str = ""


class Unrecognised(Frozen):
    """A numeric item that no mapping recognised; kept so an administrator can map it."""

    path: str
    concept: Code
    value: float | None = None
    unit: str | None = None
    modifiers: tuple[Modifier, ...] = ()
    source_uid: str = ""


class Measurements(Frozen):
    values: dict[Measure, MeasureValue] = Field(default_factory=dict)
    excluded: tuple[Exclusion, ...] = ()
    unrecognised: tuple[Unrecognised, ...] = ()
    notes: tuple[str, ...] = ()  # e.g. reported ratio inconsistent with its components

    def get(self, measure: Measure) -> float | None:
        mv = self.values.get(measure)
        return None if mv is None else mv.value


# ---------------------------------------------------------------------------------------------
# Grading context and result
# ---------------------------------------------------------------------------------------------


class Guideline(StrEnum):
    ase_eacvi_2016 = "ase-eacvi-2016"
    ase_2025 = "ase-2025"
    bse_2024 = "bse-2024"


class SpecialSituation(StrEnum):
    """Conditions in which the standard algorithm does not apply as is (guideline sections on
    special populations).  Flagged by configuration, command line, or a coded SR finding."""

    sinus_tachycardia = "sinus-tachycardia"  # includes E-A fusion
    mitral_regurgitation = "mitral-regurgitation"  # moderate or more
    mitral_stenosis = "mitral-stenosis"
    mitral_annular_calcification = "mitral-annular-calcification"  # moderate or severe
    prosthetic_mitral_valve = "prosthetic-mitral-valve"
    heart_transplant = "heart-transplant"
    hypertrophic_cardiomyopathy = "hypertrophic-cardiomyopathy"
    restrictive_cardiomyopathy = "restrictive-cardiomyopathy"
    pulmonary_hypertension_non_cardiac = "pulmonary-hypertension-non-cardiac"
    lbbb_or_ventricular_pacing = "lbbb-or-ventricular-pacing"


class Rhythm(StrEnum):
    sinus = "sinus"
    af = "af"
    unknown = "unknown"
    #: a rhythm the source SR states that is neither sinus rhythm nor atrial fibrillation
    #: (atrial flutter, a paced rhythm, ...): the guidelines' algorithms do not cover it, and
    #: it is never configured (only a coded Cardiac Rhythm item can state it)
    other = "other"


#: the rhythms a sender default or a command-line option may set
SETTABLE_RHYTHMS = (Rhythm.sinus, Rhythm.af, Rhythm.unknown)


class Context(Frozen):
    """What the grading needs beyond the measurements."""

    rhythm: Rhythm = Rhythm.unknown
    myocardial_disease: bool = False
    #: LVEF below this is "reduced" (ASE/EACVI 2016 gives no number; 50 % is the usual
    #: operational cut-off: reading I-16-10).
    lvef_reduced_below: float = 50.0
    #: Algorithm A decides only when at least this many criteria are available (I-16-1).
    min_criteria_available: int = 1
    special_situations: frozenset[SpecialSituation] = frozenset()
    #: where the rhythm came from, in plain words ("coded Cardiac Rhythm item", "sender default")
    rhythm_source: str = ""
    #: the coded rhythm the source states when it is ``Rhythm.other`` (e.g. atrial flutter)
    rhythm_code: Code | None = None
    #: the special situations the source SR states itself by a coded finding (a subset of
    #: ``special_situations``; :mod:`service.sr.situations`), so the result can say so
    situations_stated: frozenset[SpecialSituation] = frozenset()
    #: a value within this fraction of a cut-off is "near" it (borderline check); 0 disables
    borderline_fraction: float = 0.10

    @model_validator(mode="after")
    def _other_rhythm_is_coded(self) -> Context:
        if (self.rhythm is Rhythm.other) != (self.rhythm_code is not None):
            raise ValueError("a rhythm code is given exactly when the rhythm is 'other'")
        return self


class Grade(StrEnum):
    normal = "normal"
    grade_1 = "grade-1"
    grade_2 = "grade-2"
    grade_3 = "grade-3"
    indeterminate = "indeterminate"
    not_gradable = "not-gradable"  # the algorithm lacked the data it needs
    #: no grade because the guideline gives none here: atrial fibrillation (filling pressure
    #: only), a special situation (alternative criteria, or the standard algorithm not applicable)
    not_applicable = "not-applicable"


class GradeRange(StrEnum):
    """How far an algorithm narrowed a grade it could not give: the grade stays
    ``indeterminate`` and the result says what is known."""

    #: ASE/EACVI 2016: Algorithm A found diastolic dysfunction, Algorithm B could not grade it
    #: (shared reference §2.1: report both results)
    dysfunction_present = "dysfunction-present"
    #: ASE 2025: raised LAP, E/A not available to tell grade II from III (reading I-25-8)
    grade_2_or_3 = "grade-2-or-3"
    #: ASE 2025: normal LAP, e′ not available to tell normal from grade I (reading I-25-7)
    normal_or_grade_1 = "normal-or-grade-1"


class FillingPressure(StrEnum):
    """The estimate of LV filling pressure.  ``indeterminate``: criteria were evaluated but do
    not decide; ``not-estimated``: no estimate was made (no criterion available, or no rule that
    applies).  Words for each: :mod:`service.wording` (docs/vocabulary.md)."""

    normal = "normal"
    elevated = "elevated"
    indeterminate = "indeterminate"
    not_estimated = "not-estimated"
    #: the earlier name of ``not_estimated`` (whose token was "unknown"): same member
    unknown = "not-estimated"


class Comparison(StrEnum):
    gt = ">"
    ge = ">="
    lt = "<"
    le = "<="

    def holds(self, value: float, threshold: float) -> bool:
        match self:
            case Comparison.gt:
                return value > threshold
            case Comparison.ge:
                return value >= threshold
            case Comparison.lt:
                return value < threshold
            case Comparison.le:
                return value <= threshold
        raise AssertionError(self)  # pragma: no cover


class Verdict(StrEnum):
    met = "met"
    not_met = "not-met"
    unavailable = "unavailable"


class Criterion(Frozen):
    """One evaluated rule: ``measure comparison threshold`` and its verdict."""

    id: str  # stable identifier, e.g. "ase16.a.e_e_prime_average"
    step: str  # algorithm step, e.g. "algorithm A", "algorithm B step 2"
    label: str  # plain words, e.g. "Average E/e' > 14"
    measure: Measure
    value: float | None
    unit: str
    comparison: Comparison
    threshold: float
    verdict: Verdict
    source: str  # citation of the threshold
    #: words when this row counts together with others as one criterion, e.g. "septal or
    #: lateral e′: one criterion" ("" for a criterion of its own)
    group: str = ""


class Pathway(StrEnum):
    normal_lvef = "normal-lvef"  # ASE/EACVI 2016 Figure 8A, then 8B if dysfunction
    reduced_lvef_or_myocardial_disease = "reduced-lvef-or-myocardial-disease"  # Figure 8B
    sinus_general = "sinus-general"  # ASE 2025 general algorithm (any LVEF)
    atrial_fibrillation = "atrial-fibrillation"  # filling pressure only, no grade
    special_situation = "special-situation"  # alternative criteria of a guideline
    not_applicable = "not-applicable"  # the standard algorithm does not apply; no grade


class Outcome(StrEnum):
    """What one assessment concluded, as one token: the vocabulary of the JSON ``outcome``
    field, the journal, the metrics and the audit.  A grade when the standard algorithm
    graded the study; otherwise why there is no grade.  Atrial fibrillation (filling
    pressure only, no grade) and special situations (alternative criteria or "the standard
    algorithm does not apply") are outcomes of their own, never counted with studies that
    could not be graded for missing data."""

    normal = "normal"
    grade_1 = "grade-1"
    grade_2 = "grade-2"
    grade_3 = "grade-3"
    indeterminate = "indeterminate"
    not_gradable = "not-gradable"  # the standard algorithm lacked the data it needs
    atrial_fibrillation = "atrial-fibrillation"  # no grade; filling pressure by AF criteria
    special_situation = "special-situation"  # alternative criteria, or algorithm not applicable


class BorderlineFlag(Frozen):
    """A criterion whose value lies within measurement variability of its cut-off and whose
    flip to the other side would change the grade or the filling pressure."""

    criterion_id: str
    measure: Measure
    value: float
    threshold: float
    alternative_grade: Grade
    alternative_filling_pressure: FillingPressure
    text: str


class SupportingFinding(Frozen):
    """Evidence reported beside the algorithm, never a vote inside it (e.g. Valsalva)."""

    name: str
    text: str
    supports_elevated_pressure: bool | None = None
    agrees_with_result: bool | None = None


class Reading(Frozen):
    """A reading of an ambiguous published rule that a result relied on: its identifier (for
    software and audit, never in prose) and its plain words (:mod:`service.grading.readings`)."""

    id: str  # e.g. "I-16-7"
    text: str


class Assessment(Frozen):
    guideline: Guideline
    guideline_citation: str
    rule_set_version: str
    pathway: Pathway
    pathway_reason: str
    grade: Grade
    filling_pressure: FillingPressure
    criteria: tuple[Criterion, ...] = ()
    reasoning: tuple[str, ...] = ()  # short sentences in the order the algorithm took
    notes: tuple[str, ...] = ()  # caveats, missing data, inconsistencies
    #: notes about the study that hold whichever guideline is applied (e.g. the rhythm the
    #: algorithm assumed): a result says each once (:attr:`AssessmentSet.context_notes`)
    context_notes: tuple[str, ...] = ()
    rhythm: Rhythm = Rhythm.unknown
    #: the coded rhythm the source states when ``rhythm`` is ``Rhythm.other``
    rhythm_code: Code | None = None
    #: what an indeterminate grade was narrowed to (None: nothing, or the grade was given)
    grade_range: GradeRange | None = None
    special_situations: tuple[SpecialSituation, ...] = ()
    borderline: tuple[BorderlineFlag, ...] = ()
    supporting: tuple[SupportingFinding, ...] = ()
    #: the project's readings of ambiguous published rules that this result relied on
    readings: tuple[Reading, ...] = ()
    caution: str = CAUTION

    @model_validator(mode="after")
    def _range_only_without_grade(self) -> Assessment:
        if self.grade_range is not None and self.grade is not Grade.indeterminate:
            raise ValueError("a grade range is given only when the grade is indeterminate")
        return self

    @property
    def is_borderline(self) -> bool:
        return bool(self.borderline)

    @property
    def outcome(self) -> Outcome:
        if self.pathway is Pathway.atrial_fibrillation:
            return Outcome.atrial_fibrillation
        if self.pathway in (Pathway.special_situation, Pathway.not_applicable):
            return Outcome.special_situation
        return Outcome(self.grade.value)


class AssessmentSet(Frozen):
    """One or more guidelines evaluated on the same measurements; the primary comes first."""

    primary: Assessment
    others: tuple[Assessment, ...] = ()
    disagreements: tuple[str, ...] = ()  # plain-language sentences where guidelines differ

    @property
    def context_notes(self) -> tuple[str, ...]:
        """The notes about the study (not about one guideline's rules), each once, in the
        order the assessments give them."""
        notes = (n for a in (self.primary, *self.others) for n in a.context_notes)
        return tuple(dict.fromkeys(n for n in notes if n.strip()))
