"""Build the result SR: a new Comprehensive SR carrying a diastolic-function assessment.

Shape (all content by value, following the TID 2000 pattern of PS3.16 without claiming it):

    CONTAINER (42148-7, LN, "Echocardiography Report")
      HAS OBS CONTEXT   device observer (TID 1002 / TID 1004)
      CONTAINS CONTAINER (ASSESSMENT, 99DSRG)              one per guideline, primary first
        CODE role, CODE guideline, TEXT citation, TEXT algorithm name / version
        CODE pathway  > INFERRED FROM TEXT pathway reason
        CODE (8884-9, LN, "Cardiac Rhythm"), CODE special situations
        CODE grade              > INFERRED FROM NUM per criterion (TEXT when unavailable)
        CODE filling pressure   > INFERRED FROM NUM per criterion (TEXT when unavailable)
                                    each criterion > HAS PROPERTIES verdict, rule, cut-off ...
        CODE borderline (Yes/No) > INFERRED FROM TEXT flag > HAS PROPERTIES alternative results
        TEXT reasoning steps (in order), TEXT notes, TEXT supporting findings
      CONTAINS CONTAINER (GLCOMPARISON, 99DSRG)             only when guidelines are compared
      CONTAINS CONTAINER (MEASUSED, 99DSRG)                 every value used, with its origin
      CONTAINS CONTAINER (19005-8, LN, "Impressions")       summary + the caution
      CONTAINS COMPOSITE (122073, DCM, "Current procedure evidence")   per source SR

The result is in the patient and study of ``sources[0]`` (highdicom copies the Patient and
Study modules), in a new series, UNVERIFIED and PRELIMINARY (PS3.3 C.17.2).
"""

from __future__ import annotations

import math
import re
from collections.abc import Sequence
from datetime import datetime

from highdicom.sr import (
    CodeContentItem,
    CodedConcept,
    CompositeContentItem,
    ComprehensiveSR,
    ContainerContentItem,
    NumContentItem,
    TextContentItem,
    UIDRefContentItem,
)
from highdicom.sr import RelationshipTypeValues as Rel
from highdicom.sr.value_types import ContentSequence
from pydicom import Dataset
from pydicom.filewriter import correct_ambiguous_vr
from pydicom.sr.coding import Code
from pydicom.valuerep import DA, DT, TM

import service
from service.errors import UserError
from service.model import (
    CAUTION,
    Assessment,
    AssessmentSet,
    BorderlineFlag,
    Criterion,
    FillingPressure,
    Grade,
    InstanceRef,
    Measurements,
    MeasureValue,
    Origin,
    SupportingFinding,
    Verdict,
)
from service.sr import codes as C
from service.sr.identity import derive_uid


def _memoise_pixel_data_lookup() -> None:
    """highdicom asks, for every document it builds, whether the first evidence object's IOD
    has pixel data (to name its acquisition equipment): a walk over every attribute of every
    module of that IOD, tens of milliseconds, the same answer for the same SOP class every
    time.  The lookup is a pure function of the SOP Class UID over highdicom's bundled
    tables, so it is remembered per class (same answers, same documents)."""
    import functools

    import highdicom.base_content as base_content

    lookup = getattr(base_content, "does_iod_have_pixel_data", None)
    if lookup is not None and not hasattr(lookup, "cache_info"):
        base_content.does_iod_have_pixel_data = functools.lru_cache(maxsize=256)(lookup)


_memoise_pixel_data_lookup()

MANUFACTURER = "diastolic-sr project"
MODEL_NAME = "diastolic-sr"
DEVICE_NAME = "diastolic-sr"
SERIES_DESCRIPTION = "Diastolic function assessment (automated)"
#: fixed, so every result names the same device (PS3.16 TID 1004)
DEVICE_UID = derive_uid("diastolic-sr", "device observer")

#: Type 2 attributes highdicom reads from the first source; empty when the source lacks them
_TYPE2_FROM_SOURCE = (
    "PatientID",
    "PatientName",
    "PatientBirthDate",
    "PatientSex",
    "AccessionNumber",
    "StudyID",
    "StudyDate",
    "StudyTime",
    "ReferringPhysicianName",
)

_UID = re.compile(r"^(0|[1-9][0-9]*)(\.(0|[1-9][0-9]*))+$")

_GRADE_WORDS: dict[Grade, str] = {
    Grade.normal: "normal diastolic function",
    Grade.grade_1: "grade I diastolic dysfunction",
    Grade.grade_2: "grade II diastolic dysfunction",
    Grade.grade_3: "grade III diastolic dysfunction",
    Grade.indeterminate: "diastolic function indeterminate",
    Grade.not_gradable: "diastolic function not gradable",
}
_PRESSURE_WORDS: dict[FillingPressure, str] = {
    FillingPressure.normal: "normal",
    FillingPressure.elevated: "elevated",
    FillingPressure.indeterminate: "indeterminate",
    FillingPressure.unknown: "not estimated",
}
_ORIGIN_WORDS: dict[Origin, str] = {
    Origin.measured: "measured (single value in the source)",
    Origin.selected: "selected in the source (Selection Status)",
    Origin.device_mean: "mean reported by the source",
    Origin.mean_of_repeats: "mean of unmarked repeats, computed here",
    Origin.derived: "derived here from other measures",
    Origin.patient: "from the patient record",
}


# ---------------------------------------------------------------------------------------------
# Plain-language text
# ---------------------------------------------------------------------------------------------


def grade_words(grade: Grade) -> str:
    return _GRADE_WORDS[grade]


def summary_text(assessments: AssessmentSet) -> str:
    """One plain-language paragraph: the primary result first, then any comparison."""
    p = assessments.primary
    name = C.GUIDELINE_NAMES[p.guideline]
    text = (
        f"{name}: {_GRADE_WORDS[p.grade]}; estimated LV filling pressure "
        f"{_PRESSURE_WORDS[p.filling_pressure]}."
    )
    if p.grade is Grade.not_gradable:
        reason = p.reasoning[-1] if p.reasoning else p.pathway_reason
        if reason:
            text += f" Reason: {reason.rstrip('.')}."
    if p.borderline:
        text += " Borderline result: " + " ".join(f.text for f in p.borderline)
    for o in assessments.others:
        text += (
            f" For comparison, {C.GUIDELINE_NAMES[o.guideline]}: {_GRADE_WORDS[o.grade]}; "
            f"filling pressure {_PRESSURE_WORDS[o.filling_pressure]}."
        )
    return text


def origin_words(mv: MeasureValue) -> str:
    words = _ORIGIN_WORDS[mv.origin]
    if mv.origin in (Origin.mean_of_repeats, Origin.device_mean) and mv.n > 1:
        words += f", n = {mv.n}"
    if mv.detail:
        words += f"; {mv.detail}"
    return words


# ---------------------------------------------------------------------------------------------
# Content items
# ---------------------------------------------------------------------------------------------


_CONCEPTS: dict[tuple[str, str, str], CodedConcept] = {}


def _concept(code: Code) -> CodedConcept:
    """highdicom's coded concept for ``code``, made once per process.

    A result tree names the same few dozen concepts hundreds of times; building each one anew
    (a Dataset with checked attributes) took about a third of the time spent writing a result.
    The shared items are never modified after creation."""
    key = (code.value, code.scheme_designator, code.meaning)
    found = _CONCEPTS.get(key)
    if found is None:
        found = _CONCEPTS[key] = CodedConcept.from_code(code)
    return found


def _text(name: C.CodeDef, value: str, rel: Rel) -> TextContentItem:
    return TextContentItem(name=_concept(name.code), value=value, relationship_type=rel)


def _code(name: C.CodeDef, value: C.CodeDef, rel: Rel) -> CodeContentItem:
    return CodeContentItem(
        name=_concept(name.code), value=_concept(value.code), relationship_type=rel
    )


def _num(name: C.CodeDef, value: float, unit: str, rel: Rel) -> NumContentItem:
    return NumContentItem(
        name=_concept(name.code),
        value=value,
        unit=_concept(C.unit_code(unit)),
        relationship_type=rel,
    )


def _container(
    name: C.CodeDef, children: Sequence[Dataset | None], rel: Rel | None = Rel.CONTAINS
) -> Dataset:
    item = ContainerContentItem(name=_concept(name.code), relationship_type=rel)
    item.ContentSequence = [c for c in children if c is not None]
    return item


def _with(item: Dataset, children: Sequence[Dataset | None]) -> Dataset:
    kept = [c for c in children if c is not None]
    if kept:
        item.ContentSequence = kept
    return item


def _opt_text(name: C.CodeDef, value: str, rel: Rel) -> TextContentItem | None:
    """TEXT item, or None for an empty value (Text Value is Type 1, PS3.3 C.17.3.2.1)."""
    return _text(name, value, rel) if value and value.strip() else None


def _finite(value: float | None) -> bool:
    return value is not None and math.isfinite(value)


_VERDICTS = {
    Verdict.met: C.CRITERION_MET,
    Verdict.not_met: C.CRITERION_NOT_MET,
    Verdict.unavailable: C.CRITERION_UNAVAILABLE,
}


def criterion_item(c: Criterion) -> Dataset:
    """A criterion as INFERRED FROM evidence: NUM with the value used (TEXT "not available"
    when there is none), and its verdict, rule, cut-off, step and source as properties."""
    concept = C.MEASURE_CONCEPTS[c.measure]
    rule = c.label or f"{c.measure.value} {c.comparison.value} {c.threshold:g} {c.unit}"
    props: list[Dataset | None] = [
        _code(C.CRITERION_VERDICT, _VERDICTS[c.verdict], Rel.HAS_PROPERTIES),
        _text(C.CRITERION_RULE, rule, Rel.HAS_PROPERTIES),
    ]
    if _finite(c.threshold):
        props.append(_num(C.CUTOFF, c.threshold, c.unit, Rel.HAS_PROPERTIES))
    props += [
        _opt_text(C.ALGORITHM_STEP, c.step, Rel.HAS_PROPERTIES),
        _opt_text(C.CUTOFF_SOURCE, c.source, Rel.HAS_PROPERTIES),
        _opt_text(C.CRITERION_ID, c.id, Rel.HAS_PROPERTIES),
    ]
    if _finite(c.value):
        item: Dataset = _num(concept, c.value, c.unit, Rel.INFERRED_FROM)  # type: ignore[arg-type]
    else:
        item = _text(concept, C.NOT_AVAILABLE_TEXT, Rel.INFERRED_FROM)
    return _with(item, props)


def _borderline_items(flags: Sequence[BorderlineFlag]) -> Dataset:
    evidence = []
    for f in flags:
        evidence.append(
            _with(
                _text(
                    C.BORDERLINE_CRITERION,
                    f.text or f"{f.measure.value} {f.value:g} is near its cut-off {f.threshold:g}",
                    Rel.INFERRED_FROM,
                ),
                [
                    _opt_text(C.CRITERION_ID, f.criterion_id, Rel.HAS_PROPERTIES),
                    _code(
                        C.ALTERNATIVE_GRADE,
                        C.GRADE_VALUES[f.alternative_grade],
                        Rel.HAS_PROPERTIES,
                    ),
                    _code(
                        C.ALTERNATIVE_FILLING_PRESSURE,
                        C.FILLING_PRESSURE_VALUES[f.alternative_filling_pressure],
                        Rel.HAS_PROPERTIES,
                    ),
                ],
            )
        )
    return _with(_code(C.BORDERLINE, C.YES if flags else C.NO, Rel.CONTAINS), evidence)


def _supporting_item(s: SupportingFinding) -> Dataset:
    props = []
    if s.supports_elevated_pressure is not None:
        props.append(
            _code(
                C.SUPPORTS_ELEVATED,
                C.YES if s.supports_elevated_pressure else C.NO,
                Rel.HAS_PROPERTIES,
            )
        )
    if s.agrees_with_result is not None:
        props.append(
            _code(C.AGREES_WITH_RESULT, C.YES if s.agrees_with_result else C.NO, Rel.HAS_PROPERTIES)
        )
    text = ": ".join(t for t in (s.name, s.text) if t) or "supporting finding"
    return _with(_text(C.SUPPORTING_FINDING, text, Rel.CONTAINS), props)


def assessment_container(a: Assessment, *, primary: bool) -> Dataset:
    items: list[Dataset | None] = [
        _code(C.ASSESSMENT_ROLE, C.PRIMARY if primary else C.COMPARISON, Rel.CONTAINS),
        _code(C.GUIDELINE, C.GUIDELINE_VALUES[a.guideline], Rel.CONTAINS),
        _text(
            C.GUIDELINE_CITATION, a.guideline_citation.strip() or a.guideline.value, Rel.CONTAINS
        ),
        _text(C.ALGORITHM_NAME, f"{service.SOFTWARE_NAME} {a.guideline.value}", Rel.CONTAINS),
        _text(C.ALGORITHM_VERSION, a.rule_set_version.strip() or "unspecified", Rel.CONTAINS),
    ]
    pathway = _code(C.PATHWAY, C.PATHWAY_VALUES[a.pathway], Rel.CONTAINS)
    if a.pathway_reason.strip():
        pathway.ContentSequence = [_text(C.PATHWAY_REASON, a.pathway_reason, Rel.INFERRED_FROM)]
    items.append(pathway)
    items.append(_code(C.CARDIAC_RHYTHM, C.RHYTHM_VALUES[a.rhythm], Rel.CONTAINS))
    for s in a.special_situations:
        items.append(_code(C.SPECIAL_SITUATION, C.SPECIAL_SITUATION_VALUES[s], Rel.CONTAINS))
    items.append(
        _with(
            _code(C.GRADE, C.GRADE_VALUES[a.grade], Rel.CONTAINS),
            [criterion_item(c) for c in a.criteria],
        )
    )
    items.append(
        _with(
            _code(C.FILLING_PRESSURE, C.FILLING_PRESSURE_VALUES[a.filling_pressure], Rel.CONTAINS),
            [criterion_item(c) for c in a.criteria],
        )
    )
    items.append(_borderline_items(a.borderline))
    items += [_opt_text(C.REASONING, r, Rel.CONTAINS) for r in a.reasoning]
    items += [_opt_text(C.NOTE, n, Rel.CONTAINS) for n in a.notes]
    items += [_supporting_item(s) for s in a.supporting]
    return _container(C.ASSESSMENT, items)


def measurements_container(m: Measurements) -> Dataset:
    items: list[Dataset] = []
    for measure, mv in m.values.items():
        if not _finite(mv.value):
            continue
        children: list[Dataset | None] = []
        if mv.origin in (Origin.device_mean, Origin.mean_of_repeats):
            children.append(_code(C.DERIVATION, C.MEAN, Rel.HAS_CONCEPT_MOD))
        elif mv.origin is Origin.derived:
            children.append(_code(C.DERIVATION, C.CALCULATED, Rel.HAS_CONCEPT_MOD))
        children.append(_text(C.VALUE_ORIGIN, origin_words(mv), Rel.HAS_PROPERTIES))
        if mv.codes:
            children.append(_text(C.SOURCE_CONCEPT, "; ".join(mv.codes), Rel.HAS_PROPERTIES))
        num = _num(C.MEASURE_CONCEPTS[measure], mv.value, mv.unit, Rel.CONTAINS)
        items.append(_with(num, children))
    for note in m.notes:
        if note.strip():
            items.append(_text(C.MEASUREMENT_NOTE, note, Rel.CONTAINS))
    for ex in m.excluded:
        what = f"{ex.concept.meaning or ex.concept.value} ({ex.concept.value}, {ex.concept.scheme})"
        if ex.value is not None:
            what += f" = {ex.value:g}" + (f" {ex.unit}" if ex.unit else "")
        items.append(_text(C.EXCLUDED_OBSERVATION, f"{what}: {ex.reason}", Rel.CONTAINS))
    if not items:
        items.append(_text(C.MEASUREMENT_NOTE, "no measurement was available", Rel.CONTAINS))
    return _container(C.MEASUREMENTS_USED, items)


def content_tree(
    sources: Sequence[Dataset], assessments: AssessmentSet, measurements: Measurements
) -> Dataset:
    """The whole content tree (root CONTAINER), without any DICOM header."""
    observer = [
        _code(C.OBSERVER_TYPE, C.DEVICE, Rel.HAS_OBS_CONTEXT),
        UIDRefContentItem(
            name=C.DEVICE_OBSERVER_UID.code, value=DEVICE_UID, relationship_type=Rel.HAS_OBS_CONTEXT
        ),
        _text(C.DEVICE_OBSERVER_NAME, DEVICE_NAME, Rel.HAS_OBS_CONTEXT),
        _text(C.DEVICE_OBSERVER_MANUFACTURER, MANUFACTURER, Rel.HAS_OBS_CONTEXT),
        _text(C.DEVICE_OBSERVER_MODEL, MODEL_NAME, Rel.HAS_OBS_CONTEXT),
    ]
    body: list[Dataset] = [assessment_container(assessments.primary, primary=True)]
    body += [assessment_container(o, primary=False) for o in assessments.others]
    if assessments.others:
        sentences = [d for d in assessments.disagreements if d.strip()] or [
            "The guidelines evaluated agree on grade and filling pressure."
        ]
        body.append(
            _container(
                C.GUIDELINE_COMPARISON,
                [_text(C.DISAGREEMENT, s, Rel.CONTAINS) for s in sentences],
            )
        )
    body.append(measurements_container(measurements))
    body.append(
        _container(
            C.IMPRESSIONS,
            [
                _text(C.IMPRESSION, summary_text(assessments), Rel.CONTAINS),
                _text(C.CAUTION, CAUTION, Rel.CONTAINS),
            ],
        )
    )
    for src in sources:
        body.append(
            CompositeContentItem(
                name=C.CURRENT_PROCEDURE_EVIDENCE.code,
                referenced_sop_class_uid=src.SOPClassUID,
                referenced_sop_instance_uid=src.SOPInstanceUID,
                relationship_type=Rel.CONTAINS,
            )
        )
    return _container(C.ECHO_REPORT, observer + body, rel=None)


# ---------------------------------------------------------------------------------------------
# Document
# ---------------------------------------------------------------------------------------------


def _check_uid(value: str, what: str) -> str:
    if not isinstance(value, str) or len(value) > 64 or not _UID.match(value):
        raise UserError(f"{what} {value!r} is not a valid DICOM UID")
    return value


def _checked_sources(sources: Sequence[Dataset]) -> list[Dataset]:
    if not sources:
        raise UserError("a result SR needs at least one source SR")
    out: list[Dataset] = []
    seen: set[str] = set()
    for i, src in enumerate(sources):
        for kw in ("SOPClassUID", "SOPInstanceUID", "StudyInstanceUID", "SeriesInstanceUID"):
            if not src.get(kw):
                raise UserError(f"source {i + 1} has no {kw}; it cannot be referenced")
        if src.SOPInstanceUID in seen:
            continue
        seen.add(src.SOPInstanceUID)
        out.append(src)
    # highdicom reads these Type 2 attributes from the first source: supply empty ones
    first = Dataset()
    for elem in out[0]:  # a new top-level dict: the caller's dataset is left unchanged
        first.add(elem)
    for kw in _TYPE2_FROM_SOURCE:
        if kw not in first:
            setattr(first, kw, "")
    out[0] = first
    return out


def _predecessor_sequence(predecessors: Sequence[InstanceRef]) -> list[Dataset]:
    """Predecessor Documents Sequence items (SOP Instance Reference Macro, PS3.3 C.17.2.3),
    grouped by study then series, in the order given."""
    studies: dict[str, dict[str, list[InstanceRef]]] = {}
    seen: set[str] = set()
    for p in predecessors:
        if p.sop_instance_uid in seen:
            continue
        seen.add(p.sop_instance_uid)
        studies.setdefault(p.study_instance_uid, {}).setdefault(p.series_instance_uid, []).append(p)
    items = []
    for study_uid, series in studies.items():
        study_item = Dataset()
        series_items = []
        for series_uid, refs in series.items():
            series_item = Dataset()
            sops = []
            for r in refs:
                sop = Dataset()
                sop.ReferencedSOPClassUID = r.sop_class_uid
                sop.ReferencedSOPInstanceUID = r.sop_instance_uid
                sops.append(sop)
            series_item.ReferencedSOPSequence = sops
            series_item.SeriesInstanceUID = series_uid
            series_items.append(series_item)
        study_item.ReferencedSeriesSequence = series_items
        study_item.StudyInstanceUID = study_uid
        items.append(study_item)
    return items


def _coding_scheme_item() -> Dataset:
    item = Dataset()
    item.CodingSchemeDesignator = C.PRIVATE_SCHEME
    item.CodingSchemeName = C.PRIVATE_SCHEME_NAME
    item.CodingSchemeVersion = C.PRIVATE_SCHEME_VERSION
    item.CodingSchemeResponsibleOrganization = C.PRIVATE_SCHEME_ORGANISATION
    return item


def _shell(content: Dataset) -> Dataset:
    """The root container with only its evidence references (COMPOSITE items) as children.

    highdicom's SR constructor deep-copies and re-parses the whole tree it is given and searches
    it twice; for a result tree of a few hundred items that was most of the time spent grading a
    study.  Every item was already built (and checked) by highdicom's content item classes, so
    the document is made from this shell, which still lets highdicom check that each referenced
    instance is in the evidence, and the full ContentSequence is put in place afterwards.  The
    encoded document is the same."""
    shell = Dataset()
    for elem in content:
        if elem.keyword != "ContentSequence":
            shell.add(elem)
    shell.ContentSequence = [
        item for item in content.ContentSequence if item.ValueType == "COMPOSITE"
    ]
    return shell


class _ResultSR(ComprehensiveSR):
    """A ComprehensiveSR built from :func:`_shell`; ``content`` reads the full tree."""

    @property
    def content(self) -> ContentSequence:
        root = Dataset()
        for elem in self:
            if elem.keyword in _ROOT_KEYWORDS:
                root.add(elem)
        return ContentSequence.from_sequence([root], is_root=True, copy=True)


_ROOT_KEYWORDS = frozenset(
    {
        "ConceptNameCodeSequence",
        "ContentSequence",
        "ValueType",
        "ContinuityOfContent",
        "ContentTemplateSequence",
    }
)


def build_result_sr(
    sources: Sequence[Dataset],
    assessments: AssessmentSet,
    measurements: Measurements,
    *,
    sop_instance_uid: str,
    series_instance_uid: str,
    predecessors: Sequence[InstanceRef] = (),
    instance_number: int = 1,
    series_number: int = 9901,
    content_datetime: datetime | None = None,
    software_version: str = service.__version__,
) -> Dataset:
    """A Comprehensive SR (highdicom ``ComprehensiveSR``, a pydicom Dataset) holding the
    assessment(s), in the patient and study of ``sources[0]``.  With ``content_datetime``
    given, the output is fully determined by the arguments."""
    evidence = _checked_sources(sources)
    _check_uid(sop_instance_uid, "SOP Instance UID")
    _check_uid(series_instance_uid, "Series Instance UID")
    for p in predecessors:
        _check_uid(p.sop_instance_uid, "predecessor SOP Instance UID")
    when = content_datetime or datetime.now()
    content = content_tree(evidence, assessments, measurements)
    try:
        sr = _ResultSR(
            evidence=evidence,
            content=_shell(content),
            series_instance_uid=series_instance_uid,
            series_number=series_number,
            sop_instance_uid=sop_instance_uid,
            instance_number=instance_number,
            manufacturer=MANUFACTURER,
            is_complete=True,
            is_verified=False,
            is_final=False,
            series_description=SERIES_DESCRIPTION,
            manufacturer_model_name=MODEL_NAME,
            software_versions=f"{service.SOFTWARE_NAME} {software_version}",
            content_date=when.date(),
            content_time=when.time(),
            specific_character_set="ISO_IR 192",
        )
    except (ValueError, TypeError, AttributeError) as exc:
        raise UserError(f"cannot build the result SR: {exc}") from exc
    sr.ContentSequence = content.ContentSequence  # the whole tree (see _shell)
    # deterministic header: creation time is the content time
    sr.InstanceCreationDate = DA(when.date())
    sr.InstanceCreationTime = TM(when.time())
    for item in sr.get("ContributingEquipmentSequence", []):
        if item.get("ManufacturerModelName") == "highdicom" and "ContributionDateTime" in item:
            item.ContributionDateTime = DT(when)
    if when.utcoffset() is not None:
        offset = int(when.utcoffset().total_seconds() // 60)  # type: ignore[union-attr]
        sign = "+" if offset >= 0 else "-"
        sr.TimezoneOffsetFromUTC = f"{sign}{abs(offset) // 60:02d}{abs(offset) % 60:02d}"
    sr.DeviceUID = DEVICE_UID
    sr.CodingSchemeIdentificationSequence = [_coding_scheme_item()]
    if predecessors:
        sr.PredecessorDocumentsSequence = _predecessor_sequence(predecessors)
    _resolve_vrs_once(sr)
    return sr


def _resolve_vrs_once(ds: Dataset) -> None:
    """Resolve ambiguous VRs once for the whole tree, for explicit VR little endian (the
    transfer syntax of the document's file meta), and record that encoding on every dataset.

    pydicom otherwise repeats the resolution over the whole subtree below every sequence
    item of a dataset it did not read from a file: for a result tree of some 400 items that
    was about a third of the time spent writing it.  The encoded bytes are the same; writing
    with another transfer syntax still resolves ambiguous VRs as usual."""
    correct_ambiguous_vr(ds, True)
    ds.set_original_encoding(False, True, ds._character_set)
    stack = [ds]
    while stack:
        for elem in stack.pop():
            if elem.VR == "SQ":
                for item in elem.value:
                    # the character set too: pydicom compares it with the one in force
                    item.set_original_encoding(False, True, item._character_set)
                    stack.append(item)
