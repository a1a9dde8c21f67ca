"""The lean result-SR writer against highdicom and pydicom.

``service.sr.content`` / ``service.sr.encode`` build and encode the content tree, and
``service.sr.header`` the header, without highdicom's SR classes (for speed).  Here the same
document is built with highdicom 0.28's content item classes and ``ComprehensiveSR``
constructor, written by pydicom, and compared:

* the content tree byte for byte (highdicom sets the attributes of each value type from
  PS3.3 C.17.3; pydicom encodes explicit VR little endian per PS3.5);
* the header attribute by attribute, except what legitimately differs: the file meta
  (implementation identity) and highdicom naming itself as Contributing Equipment.

Sources: the 9 invented demo studies, benchmark-style studies (tests/bench/load.py), and
invented edge cases (extra Patient / Patient Study attributes, Latin-1 names, several sources
in two series, sources of another study, predecessors).  Fictional "Harbour Vale Cardiac
Centre" throughout.
"""

from __future__ import annotations

import math
import random
import struct
import sys
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest
from highdicom.sr import (
    CodeContentItem,
    CompositeContentItem,
    ComprehensiveSR,
    ContainerContentItem,
    NumContentItem,
    TextContentItem,
    UIDRefContentItem,
)
from hypothesis import given, settings
from hypothesis import strategies as st
from pydicom import Dataset, dcmread
from pydicom.dataelem import DataElement
from pydicom.filebase import DicomBytesIO
from pydicom.filewriter import write_dataset
from pydicom.sequence import Sequence
from pydicom.sr.coding import Code
from pydicom.valuerep import DA, DT, TM

import service
from service.demo.scenario import demo_datasets
from service.model import InstanceRef
from service.pipeline import GradeOptions, GradeStatus, grade_study
from service.sr import codes as C
from service.sr import write as W
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
from service.sr.encode import coded_concept, content_sequence, encode_item, file_bytes
from service.vocabulary.mapper import load_mapping_table

sys.path.insert(0, str(Path(__file__).parent / "bench"))
from load import bench_study

WHEN = datetime(2026, 11, 20, 14, 5, 9, 120000)
PREDECESSOR = InstanceRef(
    study_instance_uid="1.2.826.0.1.3680043.8.498.1",
    series_instance_uid="1.2.826.0.1.3680043.8.498.1.2",
    sop_class_uid="1.2.840.10008.5.1.4.1.1.88.33",
    sop_instance_uid="1.2.826.0.1.3680043.8.498.1.2.3",
)


# ---------------------------------------------------------------------------------------------
# The reference: the same tree and document through highdicom
# ---------------------------------------------------------------------------------------------


def to_highdicom(item: Item) -> Dataset:
    """A lean content item as highdicom's content item of the same value type.  highdicom has
    no class for a by-reference item (and its SR constructor refuses one): those are left out
    here and put in afterwards by :func:`with_references`."""
    rel = item.relationship
    vt = item.value_type
    if vt == "CONTAINER":
        hd: Dataset = ContainerContentItem(name=item.name, relationship_type=rel)
    elif vt == "TEXT":
        hd = TextContentItem(name=item.name, value=item.value, relationship_type=rel)
    elif vt == "CODE":
        hd = CodeContentItem(name=item.name, value=item.value, relationship_type=rel)
    elif vt == "NUM":
        number, unit = item.value  # type: ignore[misc]
        hd = NumContentItem(name=item.name, value=number, unit=unit, relationship_type=rel)
    elif vt == "UIDREF":
        hd = UIDRefContentItem(name=item.name, value=item.value, relationship_type=rel)
    elif vt == "COMPOSITE":
        sop_class, sop_instance = item.value  # type: ignore[misc]
        hd = CompositeContentItem(
            name=item.name,
            referenced_sop_class_uid=sop_class,
            referenced_sop_instance_uid=sop_instance,
            relationship_type=rel,
        )
    else:  # pragma: no cover - the lean module has no other value type
        raise AssertionError(vt)
    if item.children or vt == "CONTAINER":
        hd.ContentSequence = [to_highdicom(c) for c in item.children if isinstance(c, Item)]
    return hd


def tree_positions(root: Item) -> dict[int, list[int]]:
    """Position of every item of a lean tree, by identity, counted here on its own: the root
    is [1], its n-th child [1, n], ... (PS3.3 C.17.3.2.5, Referenced Content Item Identifier)."""
    out: dict[int, list[int]] = {}

    def visit(item: Item, where: list[int]) -> None:
        out[id(item)] = where
        for n, child in enumerate(item.children, 1):
            if isinstance(child, Item):
                visit(child, [*where, n])

    visit(root, [1])
    return out


def with_references(lean: Item, hd: Dataset, where: dict[int, list[int]]) -> None:
    """Put the by-reference items of ``lean`` into the highdicom-built ``hd`` at the same
    places: a plain pydicom item with Relationship Type and Referenced Content Item
    Identifier (UL, PS3.3 Table C.17-6), written by pydicom."""
    if not lean.children:
        return
    built = iter(list(hd.ContentSequence))
    items: list[Dataset] = []
    for child in lean.children:
        if isinstance(child, Reference):
            ref = Dataset()
            ref.RelationshipType = child.relationship.value
            ref.add_new(0x0040DB73, "UL", where[id(child.target)])
            items.append(ref)
        else:
            one = next(built)
            with_references(child, one, where)
            items.append(one)
    # set as a plain element: highdicom's own ContentSequence accepts only its content items
    hd[0x0040A730] = DataElement(0x0040A730, "SQ", Sequence(items))


def reference_document(sources, outcome, predecessors=(), when=WHEN) -> Dataset:
    """The result built with highdicom's ComprehensiveSR from the same arguments (the code path
    the writer used before it had its own encoder)."""
    evidence = W._checked_sources(sources)
    first = Dataset()
    for elem in evidence[0]:
        first.add(elem)
    for kw in ("PatientID", "PatientName", "PatientBirthDate", "PatientSex", "AccessionNumber"):
        if kw not in first:
            setattr(first, kw, "")
    for kw in ("StudyID", "StudyDate", "StudyTime", "ReferringPhysicianName"):
        if kw not in first:
            setattr(first, kw, "")
    evidence = [first, *evidence[1:]]
    tree = W.content_tree(evidence, outcome.assessments, outcome.measurements)
    content = to_highdicom(tree)
    sr = ComprehensiveSR(
        evidence=evidence,
        content=content,
        series_instance_uid=str(outcome.result.SeriesInstanceUID),
        series_number=9901,
        sop_instance_uid=str(outcome.result.SOPInstanceUID),
        instance_number=1,
        manufacturer=W.MANUFACTURER,
        is_complete=True,
        is_verified=False,
        is_final=False,
        series_description=W.SERIES_DESCRIPTION,
        manufacturer_model_name=W.MODEL_NAME,
        software_versions=f"{service.SOFTWARE_NAME} {service.__version__}",
        content_date=when.date(),
        content_time=when.time(),
        specific_character_set="ISO_IR 192",
        previous_versions=[_as_dataset(p) for p in predecessors] or None,
    )
    sr.InstanceCreationDate = DA(when.date())
    sr.InstanceCreationTime = TM(when.time())
    if when.utcoffset() is not None:
        offset = int(when.utcoffset().total_seconds() // 60)
        sign = "+" if offset >= 0 else "-"
        sr.TimezoneOffsetFromUTC = f"{sign}{abs(offset) // 60:02d}{abs(offset) % 60:02d}"
    sr.DeviceUID = W.DEVICE_UID
    scheme = Dataset()  # PS3.3 C.12.1.1.4, the project's scheme as service/sr/codes.py states it
    scheme.CodingSchemeDesignator = C.PRIVATE_SCHEME
    scheme.CodingSchemeName = C.PRIVATE_SCHEME_NAME
    scheme.CodingSchemeVersion = C.PRIVATE_SCHEME_VERSION
    scheme.CodingSchemeResponsibleOrganization = C.PRIVATE_SCHEME_ORGANISATION
    sr.CodingSchemeIdentificationSequence = [scheme]
    assert sr.ContributingEquipmentSequence[0].ManufacturerModelName == "highdicom"
    sr.ContributingEquipmentSequence[0].ContributionDateTime = DT(when)
    # the by-reference items, at their places, with positions counted by this test
    with_references(tree, sr, tree_positions(tree))
    return sr


def _as_dataset(ref: InstanceRef) -> Dataset:
    ds = Dataset()
    ds.StudyInstanceUID = ref.study_instance_uid
    ds.SeriesInstanceUID = ref.series_instance_uid
    ds.SOPClassUID = ref.sop_class_uid
    ds.SOPInstanceUID = ref.sop_instance_uid
    return ds


def encoded(ds: Dataset) -> bytes:
    """The data set (no file meta) in explicit VR little endian, as pydicom writes it."""
    fp = DicomBytesIO()
    fp.is_little_endian = True
    fp.is_implicit_VR = False
    write_dataset(fp, ds)
    return fp.getvalue()


def elements(ds: Dataset) -> dict[int, bytes]:
    """Each top-level element encoded on its own, by tag."""
    out = {}
    for elem in ds:
        one = Dataset()
        one.SpecificCharacterSet = ds.SpecificCharacterSet
        one.add(elem)
        out[int(elem.tag)] = encoded(one)
    return out


def assert_same_as_highdicom(sources, predecessors=(), options=None, when=WHEN) -> Dataset:
    table = load_mapping_table(())
    outcome = grade_study(
        sources,
        options or GradeOptions(),
        table=table,
        predecessors=predecessors,
        content_datetime=when,
    )
    assert outcome.result is not None, outcome.reason
    ours = dcmread(_part10(outcome.result))
    ref = reference_document(sources, outcome, predecessors, when)
    # the comparison covers by-reference items: every result has some (the conclusions name
    # their criteria, or their pathway, by reference)
    assert b"\x40\x00\x73\xdbUL" in encoded(ref)
    mine, theirs = elements(ours), elements(ref)
    theirs.pop(0x0018A001)  # Contributing Equipment: highdicom names itself; we do not
    assert sorted(mine) == sorted(theirs), set(mine) ^ set(theirs)
    for tag in theirs:
        assert mine[tag] == theirs[tag], f"({tag >> 16:04X},{tag & 0xFFFF:04X}) differs"
    return ours


def _part10(ds: Dataset) -> DicomBytesIO:
    buf = DicomBytesIO()
    ds.save_as(buf, enforce_file_format=True)
    buf.seek(0)
    return buf


# ---------------------------------------------------------------------------------------------
# Whole documents
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("index", range(9))
def test_demo_results_match_highdicom(index):
    datasets = demo_datasets()
    studies: dict[str, list[Dataset]] = {}
    for ds in datasets:
        studies.setdefault(str(ds.StudyInstanceUID), []).append(ds)
    sources = list(studies.values())[index]
    assert_same_as_highdicom(sources, options=GradeOptions(compare=index % 2 == 1))


def test_benchmark_results_match_highdicom():
    rng = random.Random(20261202)
    checked = 0
    for i in range(24):
        outcome_sources = [bench_study(i, rng)]
        probe = grade_study(outcome_sources, GradeOptions())
        if probe.status is GradeStatus.rejected:
            continue
        assert_same_as_highdicom(
            outcome_sources,
            predecessors=[PREDECESSOR] if i % 4 == 0 else (),
            options=GradeOptions(compare=i % 3 == 0),
        )
        checked += 1
    assert checked >= 18  # most benchmark studies are gradable (the load says so)


def _demo_source() -> Dataset:
    return demo_datasets()[0]


def test_extra_patient_and_study_attributes_are_copied_as_highdicom_copies_them():
    # Patient module (PS3.3 C.7.1.1) and Patient Study module (C.7.2.2) attributes
    src = _demo_source()
    src.SpecificCharacterSet = "ISO_IR 100"
    src.PatientName = "Ní Bhriain^Sorcha"  # Latin-1 in the source, UTF-8 in the result
    src.PatientAge = "061Y"  # read by the grading (age-related cut-offs): decoded by then
    src.PatientWeight = "71.5"
    src.PatientSize = "1.64"
    src.IssuerOfPatientID = "HVCC"
    other = Dataset()
    other.PatientID = "HV-OLD-0042"
    other.IssuerOfPatientID = "HVCC-legacy"
    src.OtherPatientIDsSequence = [other]
    src.StudyDescription = "Transthoracic echo"
    src.AdmittingDiagnosesDescription = "Breathlessness on exertion"
    src.InstitutionName = "Harbour Vale Cardiac Centre"  # General Equipment: not copied
    ours = assert_same_as_highdicom([src])
    assert str(ours.PatientName) == "Ní Bhriain^Sorcha"
    assert ours.OtherPatientIDsSequence[0].PatientID == "HV-OLD-0042"
    assert "InstitutionName" not in ours


def test_missing_type2_attributes_are_present_and_empty():
    # PS3.3 C.7.1.1 / C.7.2.1: Type 2 attributes present, empty when unknown
    src = _demo_source()
    for kw in ("PatientBirthDate", "PatientSex", "AccessionNumber", "StudyID", "StudyTime"):
        delattr(src, kw)
    ours = assert_same_as_highdicom([src])
    for kw in ("PatientBirthDate", "PatientSex", "AccessionNumber", "StudyID", "StudyTime"):
        assert kw in ours and not ours[kw].value


def test_sources_in_two_series_and_another_study_are_grouped_as_highdicom_groups_them():
    # SOP Instance Reference Macro (PS3.3 C.17.2.3): by study, then series
    first = _demo_source()
    second = _demo_source()
    second.SOPInstanceUID = "1.2.826.0.1.3680043.8.498.555.2"
    second.SeriesInstanceUID = "1.2.826.0.1.3680043.8.498.555.9"
    second.ContentDate = first.ContentDate
    second.ContentTime = "235959"
    ours = assert_same_as_highdicom([first, second], predecessors=[PREDECESSOR])
    series = ours.CurrentRequestedProcedureEvidenceSequence[0].ReferencedSeriesSequence
    assert len(series) == 2
    # an evidence object of another study goes to Pertinent Other Evidence (C.17.2.2);
    # grading refuses two studies, so the writer is called directly here
    outcome = grade_study([first], GradeOptions())
    foreign = _demo_source()
    foreign.StudyInstanceUID = "1.2.826.0.1.3680043.8.498.777"
    foreign.SOPInstanceUID = "1.2.826.0.1.3680043.8.498.555.3"
    doc = W.build_result_sr(
        [first, foreign],
        outcome.assessments,
        outcome.measurements,
        sop_instance_uid="2.25.1",
        series_instance_uid="2.25.2",
        content_datetime=WHEN,
    )
    other = doc.PertinentOtherEvidenceSequence
    assert other[0].StudyInstanceUID == "1.2.826.0.1.3680043.8.498.777"
    assert len(doc.CurrentRequestedProcedureEvidenceSequence) == 1


def test_timezone_offset_follows_the_content_datetime():
    when = WHEN.replace(tzinfo=timezone(timedelta(hours=-3, minutes=-30)))
    ours = assert_same_as_highdicom([_demo_source()], when=when)
    assert ours.TimezoneOffsetFromUTC == "-0330"


# ---------------------------------------------------------------------------------------------
# Items: the encoder against pydicom's writer of highdicom's items
# ---------------------------------------------------------------------------------------------

NAME = C.IMPRESSION.code
UNIT = Code("cm/s", "UCUM", "centimeter per second")


def _same(item: Item) -> None:
    """Our bytes for ``item`` equal pydicom's encoding of highdicom's item, in a document."""
    hd = encoded(_in_document([to_highdicom(item)]))
    raw = content_sequence([item])
    header = b"\x40\x00\x30\xa7SQ\x00\x00" + struct.pack("<I", raw.length)
    assert encoded(_in_document([])).removesuffix(_EMPTY_SQ) + header + raw.value == hd
    assert dcmread_item(encode_item(item)).ValueType == item.value_type  # pydicom reads it


_EMPTY_SQ = b"\x40\x00\x30\xa7SQ\x00\x00\x00\x00\x00\x00"


def _in_document(items: list[Dataset]) -> Dataset:
    ds = Dataset()
    ds.SpecificCharacterSet = "ISO_IR 192"
    ds.ContentSequence = items
    return ds


def dcmread_item(body: bytes) -> Dataset:
    """Decode one encoded item with pydicom's reader (a sequence of one item)."""
    from pydicom.dataelem import RawDataElement
    from pydicom.tag import Tag

    value = b"\xfe\xff\x00\xe0" + struct.pack("<I", len(body)) + body
    ds = Dataset()
    ds.SpecificCharacterSet = "ISO_IR 192"
    ds[0x0040A730] = RawDataElement(Tag(0x0040A730), "SQ", len(value), value, 0, False, True)
    return ds.ContentSequence[0]


@pytest.mark.parametrize(
    "item",
    [
        text_item(NAME, "odd", Rel.CONTAINS),  # odd length: padded with a space (PS3.5 6.2)
        text_item(NAME, "even", Rel.CONTAINS),
        text_item(NAME, "e′ ≤ 7 cm/s — Ní Bhriain", Rel.CONTAINS),  # UTF-8, ISO_IR 192
        code_item(NAME, C.YES.code, Rel.HAS_PROPERTIES),
        num_item(NAME, 7, UNIT, Rel.INFERRED_FROM),  # int: Numeric Value only
        num_item(NAME, 7.0, UNIT, Rel.INFERRED_FROM),  # float: Floating Point Value too
        num_item(NAME, 0.1 + 0.2, UNIT, Rel.INFERRED_FROM),  # DS auto-format (16 chars max)
        num_item(NAME, -0.0, UNIT, Rel.INFERRED_FROM),
        num_item(NAME, 1e-12, UNIT, Rel.INFERRED_FROM),
        num_item(NAME, 123456789.123456, UNIT, Rel.INFERRED_FROM),
        uidref_item(NAME, "2.25.123", Rel.HAS_OBS_CONTEXT),  # odd: NUL padded
        composite_item(NAME, "1.2.840.10008.5.1.4.1.1.88.33", "1.2.3.44", Rel.CONTAINS),
        container_item(NAME, [text_item(NAME, "child", Rel.CONTAINS)]),
        text_item(NAME, "with children", Rel.CONTAINS).with_children(
            [code_item(NAME, C.NO.code, Rel.HAS_PROPERTIES), None]
        ),
    ],
    ids=lambda i: f"{i.value_type}",
)
def test_items_encode_as_pydicom_writes_highdicom_items(item):
    _same(item)


def test_by_reference_items_encode_as_pydicom_writes_them():
    # PS3.3 C.17.3.2.5: a by-reference item holds Relationship Type and Referenced Content
    # Item Identifier (UL, one value per level of the target's position, the root being 1);
    # pydicom writes the reference dataset built independently by with_references()
    target = num_item(NAME, 7.0, UNIT, Rel.CONTAINS)
    group = container_item(NAME, [text_item(NAME, "a", Rel.CONTAINS), target])
    source = code_item(NAME, C.YES.code, Rel.CONTAINS).with_children(
        [reference_item(Rel.INFERRED_FROM, target), reference_item(Rel.HAS_PROPERTIES, target)]
    )
    root = container_item(NAME, [group, source], rel=None)
    ours = Dataset()
    ours.SpecificCharacterSet = "ISO_IR 192"
    ours[0x0040A730] = content_sequence(root.children)
    theirs = _in_document([to_highdicom(c) for c in root.children])
    with_references(root, theirs, tree_positions(root))
    assert encoded(ours) == encoded(theirs)
    refs = ours.ContentSequence[1].ContentSequence
    assert [r.RelationshipType for r in refs] == ["INFERRED FROM", "HAS PROPERTIES"]
    assert list(refs[0].ReferencedContentItemIdentifier) == [1, 1, 2]
    assert "ValueType" not in refs[0] and "ConceptNameCodeSequence" not in refs[0]


def test_a_reference_needs_its_target_once_in_the_tree():
    target = num_item(NAME, 7.0, UNIT, Rel.CONTAINS)
    dangling = code_item(NAME, C.YES.code, Rel.CONTAINS).with_children(
        [reference_item(Rel.INFERRED_FROM, target)]
    )
    with pytest.raises(ValueError, match="not in the tree once"):
        content_sequence([dangling])
    twice = container_item(NAME, [target, target, dangling])
    with pytest.raises(ValueError, match="not in the tree once"):
        content_sequence([twice])
    with pytest.raises(ValueError, match="cannot be"):
        reference_item(Rel.CONTAINS, target)


def test_long_and_urn_code_values_go_where_highdicom_puts_them():
    # PS3.3 Table 8.8-1: Long Code Value (UC) over 16 characters, URN Code Value (UR) for URNs
    long_code = Code("A" * 17, "99TEST", "a long code")
    urn_code = Code("urn:oid:2.16.840.1.113883.6.1", "99TEST", "an URN code")
    versioned = Code("X1", "99TEST", "a versioned code", scheme_version="2026")
    for code in (long_code, urn_code, versioned):
        _same(code_item(NAME, code, Rel.CONTAINS))
    assert b"\x08\x00\x19\x01UC" in coded_concept(long_code)
    assert b"\x08\x00\x20\x01UR" in coded_concept(urn_code)


def test_codes_differing_only_in_meaning_are_encoded_apart():
    # pydicom's Code compares value and scheme only; the encoding must follow the meaning too
    a = Code("cm/s", "UCUM", "cm/s")
    b = Code("cm/s", "UCUM", "centimeter per second")
    assert a == b and coded_concept(a) != coded_concept(b)
    _same(num_item(NAME, 1.0, a, Rel.CONTAINS))
    _same(num_item(NAME, 1.0, b, Rel.CONTAINS))


def test_whole_tree_round_trips_through_pydicom():
    tree = container_item(
        NAME,
        [
            text_item(NAME, "a", Rel.CONTAINS),
            container_item(NAME, [num_item(NAME, 1.5, UNIT, Rel.CONTAINS)]),
        ],
        rel=None,
    )
    ds = Dataset()
    ds.SpecificCharacterSet = "ISO_IR 192"
    ds[0x0040A730] = content_sequence(tree.children)
    items = ds.ContentSequence
    assert items[0].TextValue == "a"
    assert float(items[1].ContentSequence[0].MeasuredValueSequence[0].NumericValue) == 1.5


# ---------------------------------------------------------------------------------------------
# Constructors refuse what could not be encoded (PS3.3 C.17.3)
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "make, message",
    [
        (lambda: text_item(NAME, "", Rel.CONTAINS), "non-empty"),
        (lambda: num_item(NAME, math.nan, UNIT, Rel.CONTAINS), "not finite"),
        (lambda: num_item(NAME, math.inf, UNIT, Rel.CONTAINS), "not finite"),
        (lambda: uidref_item(NAME, "1.02.3", Rel.CONTAINS), "not a valid DICOM UID"),
        (lambda: uidref_item(NAME, "1." + "2" * 70, Rel.CONTAINS), "not a valid DICOM UID"),
        (lambda: composite_item(NAME, "x", "1.2", Rel.CONTAINS), "not a valid DICOM UID"),
        (lambda: code_item(NAME, Code("1", "99T", "m" * 65), Rel.CONTAINS), "over 64"),
        (lambda: code_item(NAME, Code("1", "S" * 17, "m"), Rel.CONTAINS), "over 16"),
        (lambda: text_item(NAME, "root?", None), "only a container"),
        (lambda: text_item(NAME, "x", "NOT A RELATIONSHIP"), "is not a valid"),
        (
            lambda: container_item(NAME, [container_item(NAME, [], rel=None)]),
            "needs a relationship type",
        ),
        # the constructor itself checks: no unchecked item can be made around the functions
        (lambda: Item("TEXT", NAME, Rel.CONTAINS, (), ""), "non-empty"),
        (lambda: Item("SCOORD", NAME, Rel.CONTAINS), "is not one of"),
        (lambda: Item("CONTAINER", NAME, Rel.CONTAINS, (), "value"), "has no value"),
        (lambda: Item("NUM", NAME, Rel.CONTAINS, (), (math.nan, UNIT)), "not finite"),
        (lambda: Item("CODE", NAME, Rel.CONTAINS, (), "not a code"), "must be a pydicom Code"),
        (lambda: Item("UIDREF", NAME, Rel.CONTAINS, (), "abc"), "not a valid DICOM UID"),
    ],
)
def test_invalid_items_cannot_be_made(make, message):
    with pytest.raises((ValueError, TypeError), match=message):
        make()


def test_num_refuses_non_numbers():
    with pytest.raises(TypeError):
        num_item(NAME, "7", UNIT, Rel.CONTAINS)  # type: ignore[arg-type]
    with pytest.raises(TypeError):
        num_item(NAME, True, UNIT, Rel.CONTAINS)


def test_part10_writes_what_pydicom_writes():
    # PS3.10 7.1 file format; pydicom's save_as(enforce_file_format=True) as the reference,
    # over results with copied sequences (Other Patient IDs), Latin-1 names and predecessors
    from service.sr.encode import part10

    extra = _demo_source()
    extra.SpecificCharacterSet = "ISO_IR 100"
    extra.PatientName = "Ní Bhriain^Sorcha"
    other = Dataset()
    other.PatientID = "HV-OLD-0042"
    extra.OtherPatientIDsSequence = [other]
    cases = [([extra], ()), ([_demo_source()], [PREDECESSOR])]
    cases += [([ds], ()) for ds in demo_datasets()[1:5]]
    for sources, predecessors in cases:
        outcome = grade_study(
            sources, GradeOptions(compare=True), predecessors=predecessors, content_datetime=WHEN
        )
        buf = DicomBytesIO()
        outcome.result.save_as(buf, enforce_file_format=True)
        assert part10(outcome.result) == buf.getvalue()
        again = dcmread(DicomBytesIO(part10(outcome.result)))
        assert again.SOPInstanceUID == outcome.result_uid
    assert (
        str(dcmread(DicomBytesIO(part10(grade_study([extra], GradeOptions()).result))).PatientName)
        == "Ní Bhriain^Sorcha"
    )
    outcome.result.file_meta.TransferSyntaxUID = "1.2.840.10008.1.2"  # implicit VR
    with pytest.raises(ValueError, match="explicit VR little endian"):
        part10(outcome.result)


def _read_back(ds: Dataset, *, decoded: bool) -> Dataset:
    """``ds`` written as a Part 10 file in explicit VR little endian and read again, as the
    node reads a received object; ``decoded``: every element decoded before grading."""
    buf = DicomBytesIO()
    ds.save_as(buf, enforce_file_format=True)
    again = dcmread(DicomBytesIO(buf.getvalue()))
    if decoded:
        for _ in again.iterall():
            pass
    return again


def _copied_raw(result: Dataset, keyword: str) -> bool:
    from pydicom.datadict import tag_for_keyword
    from pydicom.dataelem import RawDataElement

    return isinstance(result.get_item(tag_for_keyword(keyword)), RawDataElement)


@pytest.mark.parametrize("charset", ["", "ISO_IR 100", "ISO_IR 192"])
def test_ascii_source_elements_go_into_the_result_as_read(charset):
    # PS3.5 6.1: with an ASCII G0 set and no code extension, an ASCII value is the same text in
    # the source's character set and in the result's UTF-8; such elements are copied as read.
    # The file must be byte for byte the one made from the same source decoded by pydicom.
    src = _demo_source()
    if charset:
        src.SpecificCharacterSet = charset
    elif "SpecificCharacterSet" in src:
        del src.SpecificCharacterSet
    src.PatientAge = "061Y"  # read by the grading (age-related cut-offs): decoded by then
    src.StudyDescription = "Transthoracic echo"
    as_read = grade_study([_read_back(src, decoded=False)], GradeOptions(), content_datetime=WHEN)
    decoded = grade_study([_read_back(src, decoded=True)], GradeOptions(), content_datetime=WHEN)
    for keyword in ("PatientID", "PatientName", "StudyDescription", "StudyDate"):
        assert _copied_raw(as_read.result, keyword), keyword  # the path under test was taken
        assert not _copied_raw(decoded.result, keyword), keyword
    assert file_bytes(as_read.result) == file_bytes(decoded.result)
    # and the same as highdicom's copy (PS3.3 C.7.1.1, C.7.2.1, C.7.2.2)
    assert_same_as_highdicom([_read_back(src, decoded=False)])


def test_source_elements_that_differ_in_utf8_are_decoded_and_encoded_again():
    # PS3.3 C.12.1.1.2: a Latin-1 name (ISO_IR 100) is different bytes in UTF-8 (ISO_IR 192);
    # ISO 2022 sets may switch sets with ESC; an odd-length value needs padding (PS3.5 7.1.1)
    latin = _demo_source()
    latin.SpecificCharacterSet = "ISO_IR 100"
    latin.PatientName = "Ní Bhriain^Sorcha"
    result = grade_study([_read_back(latin, decoded=False)], GradeOptions()).result
    assert not _copied_raw(result, "PatientName")
    assert _copied_raw(result, "PatientID")  # ASCII: as read
    again = dcmread(DicomBytesIO(file_bytes(result)))
    assert str(again.PatientName) == "Ní Bhriain^Sorcha"
    assert "Ní".encode() in file_bytes(result)

    iso2022 = _demo_source()
    iso2022.SpecificCharacterSet = ["", "ISO 2022 IR 87"]
    result = grade_study([_read_back(iso2022, decoded=False)], GradeOptions()).result
    assert not _copied_raw(result, "PatientID")

    odd = _read_back(_demo_source(), decoded=False)
    from pydicom.dataelem import RawDataElement
    from pydicom.tag import Tag

    pid = odd.get_item(Tag("PatientID"))
    odd["PatientID"] = RawDataElement(
        Tag("PatientID"), "LO", 3, b"HV7", pid.value_tell, False, True
    )  # not padded to even length, as some writers leave it
    result = grade_study([odd], GradeOptions()).result
    assert not _copied_raw(result, "PatientID")
    assert b"HV7 " in file_bytes(result)  # padded with a space (PS3.5 6.2)


SR_CLASSES = (
    "1.2.840.10008.5.1.4.1.1.88.11",  # Basic Text SR
    "1.2.840.10008.5.1.4.1.1.88.22",  # Enhanced SR
    "1.2.840.10008.5.1.4.1.1.88.33",  # Comprehensive SR
    "1.2.840.10008.5.1.4.1.1.88.34",  # Comprehensive 3D SR
    "1.2.840.10008.5.1.4.1.1.88.35",  # Extensible SR
    "1.2.840.10008.5.1.4.1.1.88.72",  # Simplified Adult Echo SR
)


@pytest.mark.parametrize("sop_class", SR_CLASSES)
def test_copied_modules_are_highdicoms_patient_and_study_modules(sop_class):
    # highdicom's module tables (derived from PS3.3): root-level attributes of the modules of
    # the Patient and Study information entities of the IOD, which its SR constructor copies
    from highdicom._standard_utils import (
        get_iod_module_map,
        get_module_attribute_map,
        get_sop_class_iod_map,
    )

    from service.sr.header import PATIENT_AND_STUDY_MODULES

    modules = get_iod_module_map()[get_sop_class_iod_map()[sop_class]]
    attributes = get_module_attribute_map()
    theirs = [
        str(a["keyword"])
        for ie in ("Patient", "Study")
        for m in modules
        if m["ie"] == ie
        for a in attributes[m["key"]]
        if len(a["path"]) == 0
    ]
    ours = [k for keywords in PATIENT_AND_STUDY_MODULES.values() for k in keywords]
    assert ours == theirs


@settings(max_examples=300, deadline=None)
@given(
    st.text(alphabet=st.characters(max_codepoint=0x17F), max_size=40),
    st.sampled_from(["SH", "LO", "ST", "LT", "UT"]),
)
def test_clean_text_replaces_exactly_what_each_text_vr_forbids(value, vr):
    # PS3.5 6.2, Table 6.2-1: no control character in SH and LO (ESC only for ISO 2022
    # extensions, unused in a UTF-8 document) and no backslash there (the value delimiter);
    # TAB, LF, FF and CR allowed in ST, LT and UT.  The reference is written out per character.
    from service.sr.content import clean_text

    def forbidden(ch: str) -> bool:
        control = ord(ch) < 0x20 or 0x7F <= ord(ch) < 0xA0
        if vr in ("SH", "LO"):
            return control or ch == "\\"
        return control and ch not in "\t\n\f\r"

    expected = "".join(" " if forbidden(ch) else ch for ch in value)
    if expected != value and not expected.strip():
        expected = "?"
    assert clean_text(value, vr) == expected
