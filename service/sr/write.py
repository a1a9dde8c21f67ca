"""Build the result SR: a new Comprehensive SR carrying a diastolic-function assessment.

Shape (all content by value, following the TID 2000 pattern of PS3.16 without claiming it):

    CONTAINER (DFREPORT, 99DSRG, "Automated LV diastolic function assessment")
      HAS OBS CONTEXT   device observer (TID 1002 / TID 1004)
      CONTAINS CONTAINER (19005-8, LN, "Impressions")       the conclusion + the caution, first
      CONTAINS TEXT (STUDYNOTE, 99DSRG)                    what holds for every guideline, once
      CONTAINS CONTAINER (ASSESSMENT, 99DSRG)              one per guideline, primary first
        CODE role, CODE guideline, TEXT citation, TEXT algorithm name / version
        CODE pathway  > INFERRED FROM (by reference) the reasoning step that chose it, or
                        TEXT pathway reason when no reasoning step says it (by reference to
                        an earlier assessment's when it gave the same reason)
        CODE (8884-9, LN, "Cardiac Rhythm"), CODE special situations
        CODE grade              > INFERRED FROM (by reference) each criterion, or the pathway
        CODE filling pressure   > INFERRED FROM (by reference) each criterion, or the pathway
        CODE borderline (Yes/No) > INFERRED FROM TEXT flag > HAS PROPERTIES alternative results
        CONTAINER (CRITERIA, 99DSRG)   each criterion once: NUM (TEXT when unavailable)
                                        > HAS PROPERTIES verdict, rule, cut-off, step, source ...
        TEXT reasoning steps: the decisions only, in order (routing, counts, branches; the
                              criteria themselves are in the Criteria container), TEXT notes,
        TEXT readings of ambiguous rules > HAS PROPERTIES TEXT reading identifier,
        TEXT supporting findings
      CONTAINS CONTAINER (GLCOMPARISON, 99DSRG)             only when guidelines are compared
      CONTAINS CONTAINER (MEASUSED, 99DSRG)                 every value used, with its origin
      CONTAINS COMPOSITE (122073, DCM, "Current procedure evidence")   per source SR

Prose (impression, reasoning, notes) is the clinical vocabulary of :mod:`service.wording`;
identifiers (criterion, reading, codes) are items of their own, never inside a sentence.

The result is in the patient and study of ``sources[0]`` (its Patient and Study modules are
copied: :mod:`service.sr.header`), in a new series, UNVERIFIED and PRELIMINARY (PS3.3 C.17.2).
The tree is made of :mod:`service.sr.content` items and encoded by :mod:`service.sr.encode`.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from datetime import datetime

from pydicom import Dataset
from pydicom.dataelem import RawDataElement
from pydicom.filewriter import correct_ambiguous_vr
from pydicom.sr.coding import Code as PydicomCode

import service
from service.errors import UserError
from service.model import (
    CAUTION,
    Assessment,
    AssessmentSet,
    BorderlineFlag,
    Criterion,
    Grade,
    InstanceRef,
    Measurements,
    MeasureValue,
    Origin,
    Reading,
    Rhythm,
    SupportingFinding,
    Verdict,
)
from service.sr import codes as C
from service.sr.content import (
    Item,
    Reference,
    Rel,
    code_item,
    composite_item,
    container_item,
    num_item,
    reference_item,
    text_item,
    uidref_item,
)
from service.sr.encode import content_sequence
from service.sr.header import CodingScheme, result_header
from service.sr.identity import derive_uid, is_valid_uid
from service.wording import (
    GRADE_WORDS,
    GUIDELINE_NAMES,
    borderline_words,
    headline,
    reading_sentence,
)

MANUFACTURER = "diastolic-sr project"
MODEL_NAME = "diastolic-sr"
DEVICE_NAME = "diastolic-sr"
SERIES_DESCRIPTION = "Automated LV diastolic function assessment"
#: fixed, so every result names the same device (PS3.16 TID 1004)
DEVICE_UID = derive_uid("diastolic-sr", "device observer")

#: the shape of the result's content tree (which containers, in which order).  It is one of
#: the parts the result's SOP Instance UID is derived from, so a result laid out differently
#: never reuses the UID of an earlier one with other content (a re-sent study then gets a new
#: instance that names the earlier one as its predecessor).  Layout 2: Impressions first.
#: Layout 3: document title of its own, criteria once (referenced by grade and filling
#: pressure), readings of ambiguous rules as items of their own.  Layout 4: the reasoning holds
#: only the decision steps (no sentence per criterion), the pathway refers to the reasoning
#: step that chose it instead of repeating it, special situations in their clinical spelling.
#: Layout 5: counts agree in number ("1 of 1 available criterion"), a reasoning step no longer
#: repeats the reading it rests on, the impression names a borderline measure and leaves the
#: flag's sentence to the borderline item, a note that holds for every guideline (the rhythm
#: assumed) is a study note said once instead of a note in each assessment, and a study's
#: sources are in one order offline and on the node (service.pipeline.study_order).
DOCUMENT_LAYOUT = "layout-5"


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
    return GRADE_WORDS[grade]


def summary_text(assessments: AssessmentSet) -> str:
    """The impression: the guideline and the conclusion (:func:`service.wording.headline`, the
    same sentence as the summary's headline, the table and the JSON), then the measures a
    borderline flag names (the flag itself is said once, in the "Borderline criterion" item),
    then the other guidelines' results."""
    p = assessments.primary
    text = f"{GUIDELINE_NAMES[p.guideline]}: {headline(p)}"
    if p.borderline:
        text += " " + borderline_words(f.measure for f in p.borderline)
    for o in assessments.others:
        text += f" For comparison, {GUIDELINE_NAMES[o.guideline]}: {headline(o)}"
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


def _text(name: C.CodeDef, value: str, rel: Rel) -> Item:
    return text_item(name.code, value, rel)


def _code(name: C.CodeDef, value: C.CodeDef, rel: Rel) -> Item:
    return code_item(name.code, value.code, rel)


def _rhythm_item(a: Assessment) -> Item:
    """The Cardiac Rhythm the assessment went by: sinus rhythm, atrial fibrillation or
    undetermined; a stated rhythm of another kind as the source coded it (or undetermined when
    that code cannot be written as is; the pathway's reason names the rhythm in words)."""
    code = a.rhythm_code
    if a.rhythm is Rhythm.other and code is not None:
        try:
            stated = PydicomCode(code.value, code.scheme, " ".join(code.meaning.split()))
            return code_item(C.CARDIAC_RHYTHM.code, stated, Rel.CONTAINS)
        except ValueError:
            pass
    value = C.RHYTHM_VALUES.get(a.rhythm, C.UNDETERMINED)
    return _code(C.CARDIAC_RHYTHM, value, Rel.CONTAINS)


def _num(name: C.CodeDef, value: float, unit: str, rel: Rel) -> Item:
    return num_item(name.code, value, C.unit_code(unit), rel)


def _container(
    name: C.CodeDef, children: Sequence[Item | None], rel: Rel | None = Rel.CONTAINS
) -> Item:
    return container_item(name.code, list(children), rel)


def _with(item: Item, children: Sequence[Item | Reference | None]) -> Item:
    return item.with_children(list(children))


def _opt_text(name: C.CodeDef, value: str, rel: Rel) -> Item | None:
    """TEXT item, or None for an empty value (Text Value is Type 1, PS3.3 C.17.3.2.1)."""
    return _text(name, value, rel) if value and value.strip() else None


def _finite(value: float | None) -> bool:
    return value is not None and math.isfinite(value)


_VERDICTS = {
    Verdict.met: C.CRITERION_MET,
    Verdict.not_met: C.CRITERION_NOT_MET,
    Verdict.unavailable: C.CRITERION_UNAVAILABLE,
}


def criterion_item(c: Criterion) -> Item:
    """A criterion, once, in the Criteria container: NUM with the value used (TEXT "not
    available" when there is none), and its verdict, rule, cut-off, step, source, identifier
    and (for rows that count together) the words saying so, as properties.  The grade and the
    filling pressure refer to it by reference."""
    concept = C.MEASURE_CONCEPTS[c.measure]
    rule = c.label or f"{c.measure.value} {c.comparison.value} {c.threshold:g} {c.unit}"
    props: list[Item | None] = [
        _code(C.CRITERION_VERDICT, _VERDICTS[c.verdict], Rel.HAS_PROPERTIES),
        _text(C.CRITERION_RULE, rule, Rel.HAS_PROPERTIES),
    ]
    if _finite(c.threshold):
        props.append(_num(C.CUTOFF, c.threshold, c.unit, Rel.HAS_PROPERTIES))
    props += [
        _opt_text(C.ALGORITHM_STEP, c.step, Rel.HAS_PROPERTIES),
        _opt_text(C.CRITERION_GROUP, c.group, Rel.HAS_PROPERTIES),
        _opt_text(C.CUTOFF_SOURCE, c.source, Rel.HAS_PROPERTIES),
        _opt_text(C.CRITERION_ID, c.id, Rel.HAS_PROPERTIES),
    ]
    if _finite(c.value):
        item: Item = _num(concept, c.value, c.unit, Rel.CONTAINS)  # type: ignore[arg-type]
    else:
        item = _text(concept, C.NOT_AVAILABLE_TEXT, Rel.CONTAINS)
    return _with(item, props)


def _sentence_key(text: str) -> str:
    """A sentence as compared with another: whatever its case and its full stop."""
    return text.strip().rstrip(".").casefold()


def _same_sentence(a: str, b: str) -> bool:
    """The same sentence, whatever its case and its full stop (a comparison, never prose)."""
    return bool(_sentence_key(a)) and _sentence_key(a) == _sentence_key(b)


def _reading_item(r: Reading) -> Item:
    """A reading of an ambiguous rule: the words a person reads, the identifier apart."""
    return _with(
        _text(C.READING, reading_sentence(r.text), Rel.CONTAINS),
        [_text(C.READING_ID, r.id, Rel.HAS_PROPERTIES)],
    )


def _borderline_items(flags: Sequence[BorderlineFlag]) -> Item:
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


def _supporting_item(s: SupportingFinding) -> Item:
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


def assessment_container(
    a: Assessment, *, primary: bool, said: dict[str, Item] | None = None
) -> Item:
    """One guideline's assessment.  ``said``: pathway reasons already written by an earlier
    assessment of the same result, by sentence; a pathway with the same reason (e.g. both
    guidelines route an atrial-fibrillation study the same way, for the same stated rhythm)
    refers to that item by reference instead of saying it again."""
    said = {} if said is None else said
    items: list[Item | None] = [
        _code(C.ASSESSMENT_ROLE, C.PRIMARY if primary else C.COMPARISON, Rel.CONTAINS),
        _code(C.GUIDELINE, C.GUIDELINE_VALUES[a.guideline], Rel.CONTAINS),
        _text(
            C.GUIDELINE_CITATION, a.guideline_citation.strip() or a.guideline.value, Rel.CONTAINS
        ),
        _text(C.ALGORITHM_NAME, f"{service.SOFTWARE_NAME} {a.guideline.value}", Rel.CONTAINS),
        _text(C.ALGORITHM_VERSION, a.rule_set_version.strip() or "unspecified", Rel.CONTAINS),
    ]
    # the reasoning steps, in order; where one of them is the routing decision (the pathway's
    # reason), the pathway refers to it instead of saying it a second time
    reasoning = [_text(C.REASONING, r, Rel.CONTAINS) for r in a.reasoning if r.strip()]
    routing = next(
        (item for item in reasoning if _same_sentence(str(item.value), a.pathway_reason)), None
    )
    pathway = _code(C.PATHWAY, C.PATHWAY_VALUES[a.pathway], Rel.CONTAINS)
    earlier = said.get(_sentence_key(a.pathway_reason))
    if routing is not None:
        pathway = _with(pathway, [reference_item(Rel.INFERRED_FROM, routing)])
    elif earlier is not None:
        pathway = _with(pathway, [reference_item(Rel.INFERRED_FROM, earlier)])
    elif a.pathway_reason.strip():
        reason = _text(C.PATHWAY_REASON, a.pathway_reason, Rel.INFERRED_FROM)
        said[_sentence_key(a.pathway_reason)] = reason
        pathway = _with(pathway, [reason])
    items.append(pathway)
    items.append(_rhythm_item(a))
    for s in a.special_situations:
        items.append(_code(C.SPECIAL_SITUATION, C.SPECIAL_SITUATION_VALUES[s], Rel.CONTAINS))
    # each criterion once; both conclusions refer to the criteria by reference (a grade the
    # guideline does not give here is inferred from the pathway, which says why)
    criteria = [criterion_item(c) for c in a.criteria]
    from_criteria = [reference_item(Rel.INFERRED_FROM, c) for c in criteria]
    from_pathway = [reference_item(Rel.INFERRED_FROM, pathway)]
    grade_from = from_pathway if a.grade is Grade.not_applicable or not criteria else from_criteria
    pressure_from = from_criteria or from_pathway
    items.append(_with(_code(C.GRADE, C.GRADE_VALUES[a.grade], Rel.CONTAINS), grade_from))
    items.append(
        _with(
            _code(C.FILLING_PRESSURE, C.FILLING_PRESSURE_VALUES[a.filling_pressure], Rel.CONTAINS),
            pressure_from,
        )
    )
    items.append(_borderline_items(a.borderline))
    if criteria:
        items.append(_container(C.CRITERIA, criteria))
    items += reasoning
    items += [_opt_text(C.NOTE, n, Rel.CONTAINS) for n in a.notes]
    items += [_reading_item(r) for r in a.readings]
    items += [_supporting_item(s) for s in a.supporting]
    return _container(C.ASSESSMENT, items)


def measurements_container(m: Measurements) -> Item:
    items: list[Item] = []
    for measure, mv in m.values.items():
        if not _finite(mv.value):
            continue
        children: list[Item | None] = []
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
) -> Item:
    """The whole content tree (root CONTAINER), without any DICOM header."""
    observer = [
        _code(C.OBSERVER_TYPE, C.DEVICE, Rel.HAS_OBS_CONTEXT),
        uidref_item(C.DEVICE_OBSERVER_UID.code, DEVICE_UID, Rel.HAS_OBS_CONTEXT),
        _text(C.DEVICE_OBSERVER_NAME, DEVICE_NAME, Rel.HAS_OBS_CONTEXT),
        _text(C.DEVICE_OBSERVER_MANUFACTURER, MANUFACTURER, Rel.HAS_OBS_CONTEXT),
        _text(C.DEVICE_OBSERVER_MODEL, MODEL_NAME, Rel.HAS_OBS_CONTEXT),
    ]
    # the conclusion and the caution first: a reader (or a viewer showing the tree) meets
    # them before the hundreds of criteria that support them
    body: list[Item] = [
        _container(
            C.IMPRESSIONS,
            [
                _text(C.IMPRESSION, summary_text(assessments), Rel.CONTAINS),
                _text(C.CAUTION, CAUTION, Rel.CONTAINS),
            ],
        )
    ]
    # what holds for the study whichever guideline is applied (e.g. the rhythm assumed): said
    # once, before the assessments that rest on it
    body += [_text(C.STUDY_NOTE, n, Rel.CONTAINS) for n in assessments.context_notes]
    said: dict[str, Item] = {}
    body.append(assessment_container(assessments.primary, primary=True, said=said))
    body += [assessment_container(o, primary=False, said=said) for o in assessments.others]
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
    for src in sources:
        body.append(
            composite_item(
                C.CURRENT_PROCEDURE_EVIDENCE.code, src.SOPClassUID, src.SOPInstanceUID, Rel.CONTAINS
            )
        )
    return _container(C.RESULT_TITLE, observer + body, rel=None)


# ---------------------------------------------------------------------------------------------
# Document
# ---------------------------------------------------------------------------------------------


def _check_uid(value: str, what: str) -> str:
    if not is_valid_uid(value):
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
    return out


#: the project's coding scheme, declared in every result (PS3.3 C.12.1.1.4)
PRIVATE_CODING_SCHEME = CodingScheme(
    designator=C.PRIVATE_SCHEME,
    name=C.PRIVATE_SCHEME_NAME,
    version=C.PRIVATE_SCHEME_VERSION,
    responsible_organization=C.PRIVATE_SCHEME_ORGANISATION,
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
    """A Comprehensive SR (a pydicom Dataset with file meta, ready to store or send) holding
    the assessment(s), in the patient and study of ``sources[0]``.  With ``content_datetime``
    given, the output is fully determined by the arguments."""
    evidence = _checked_sources(sources)
    _check_uid(sop_instance_uid, "SOP Instance UID")
    _check_uid(series_instance_uid, "Series Instance UID")
    for p in predecessors:
        _check_uid(p.sop_instance_uid, "predecessor SOP Instance UID")
    when = content_datetime or datetime.now()
    try:
        content = content_tree(evidence, assessments, measurements)
        sr = result_header(
            evidence,
            title=C.RESULT_TITLE.code,
            sop_instance_uid=sop_instance_uid,
            series_instance_uid=series_instance_uid,
            series_number=series_number,
            instance_number=instance_number,
            series_description=SERIES_DESCRIPTION,
            manufacturer=MANUFACTURER,
            model_name=MODEL_NAME,
            software_versions=f"{service.SOFTWARE_NAME} {software_version}",
            device_uid=DEVICE_UID,
            coding_scheme=PRIVATE_CODING_SCHEME,
            predecessors=predecessors,
            when=when,
        )
    except (ValueError, TypeError, AttributeError) as exc:
        raise UserError(f"cannot build the result SR: {exc}") from exc
    _resolve_vrs_once(sr)
    # the tree, already encoded: pydicom writes it as it is and decodes it if it is read
    sr[_CONTENT_SEQUENCE] = content_sequence(content.children)
    return sr


_CONTENT_SEQUENCE = 0x0040A730


def _resolve_vrs_once(ds: Dataset) -> None:
    """Resolve ambiguous VRs of the elements copied from the source, for explicit VR little
    endian (the transfer syntax of the document's file meta), and record that encoding on the
    document and every dataset in it.

    pydicom writes an already encoded element (everything :mod:`service.sr.header` makes, and
    the content tree) as it is only when the dataset's recorded encoding is the one being
    written, and it otherwise repeats the resolution below every sequence item of a dataset it
    did not read from a file.  Writing with another transfer syntax still resolves ambiguous
    VRs and re-encodes as usual."""
    copied = Dataset()
    for elem in ds.elements():
        if not isinstance(elem, RawDataElement):
            copied.add(elem)
    correct_ambiguous_vr(copied, True)
    ds.set_original_encoding(False, True, ds._character_set)
    stack = [copied]
    while stack:
        for elem in stack.pop():
            if elem.VR == "SQ":
                for item in elem.value:
                    # the character set too: pydicom compares it with the one in force
                    item.set_original_encoding(False, True, item._character_set)
                    stack.append(item)
