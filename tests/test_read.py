"""SR reader: SOP classes, tree walking, modifiers, identity, defensive reading."""

import copy
from io import BytesIO

import pydicom
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydicom.dataelem import RawDataElement
from pydicom.dataset import Dataset
from pydicom.sequence import Sequence as DicomSequence
from pydicom.tag import Tag

from service.errors import RejectedInput
from service.model import Code, Measure
from service.sr.echo_builder import (
    EchoItem,
    Encoding,
    Patient,
    SopClass,
    Study,
    Template,
    build_echo_sr,
    code_item,
    container,
    num_item,
)
from service.sr.read import SUPPORTED_SR_SOP_CLASSES, read_document, read_path
from service.vocabulary.mapper import build_measurements, load_mapping_table
from service.vocabulary.standard import code

M = Measure
TABLE = load_mapping_table()
E = [EchoItem(measure=M.mitral_e, value=80)]


def test_supported_sop_classes_are_sr_classes_known_to_pydicom():
    # source: PS3.4 / PS3.6 UID registry as bundled in pydicom
    for uid, name in SUPPORTED_SR_SOP_CLASSES.items():
        assert "SR" in pydicom.uid.UID(uid).name or "Structured" in pydicom.uid.UID(uid).name
        assert name
    assert "1.2.840.10008.5.1.4.1.1.88.72" in SUPPORTED_SR_SOP_CLASSES


@pytest.mark.parametrize("sop_class", list(SopClass))
def test_every_sr_class_is_read(sop_class):
    doc = read_document(build_echo_sr(E, sop_class=sop_class))
    assert doc.sop_class_uid == sop_class.value
    assert doc.observations[0].value == 80


def test_non_sr_class_is_rejected_by_name():
    ds = build_echo_sr(E)
    ds.SOPClassUID = "1.2.840.10008.5.1.4.1.1.6.1"  # Ultrasound Image Storage
    with pytest.raises(RejectedInput, match="Ultrasound Image Storage"):
        read_document(ds)


@pytest.mark.parametrize(
    ("mutate", "reason"),
    [
        (lambda ds: delattr(ds, "ContentSequence"), "no content tree"),
        (lambda ds: setattr(ds, "ContentSequence", DicomSequence([])), "no content tree"),
        (lambda ds: delattr(ds, "SOPInstanceUID"), "no SOP Instance UID"),
        (lambda ds: delattr(ds, "SOPClassUID"), "no SOP Class UID"),
        # UIDs a result must reference (PS3.5 9.1: digits and dots, no leading zero, <= 64)
        (lambda ds: setattr(ds, "SOPInstanceUID", "1.2.03.4"), "SOP Instance UID '1.2.03.4'"),
        (lambda ds: setattr(ds, "StudyInstanceUID", "1." + "2" * 70), "Study Instance UID"),
        (lambda ds: delattr(ds, "SeriesInstanceUID"), "Series Instance UID missing"),
    ],
)
def test_unusable_objects_are_rejected(mutate, reason):
    ds = build_echo_sr(E)
    mutate(ds)
    with pytest.raises(RejectedInput, match=reason):
        read_document(ds)


def test_identity_age_created_template_and_rhythm():
    af = Code(value="49436004", scheme="SCT", meaning="Atrial Fibrillation")
    ds = build_echo_sr(
        E,
        study=Study(study_uid="1.2.3.4", content_date="20260302", content_time="0815"),
        rhythm=af,
    )
    doc = read_document(ds)
    assert doc.study_instance_uid == "1.2.3.4"
    assert doc.created == "20260302081500.000000"
    assert doc.template == "5300"
    assert doc.patient_age_years == 66
    assert doc.document_title.value == "125200"
    (rhythm,) = doc.coded_items
    assert rhythm.concept.value == "8884-9" and rhythm.value == af


@pytest.mark.parametrize(
    ("age", "subject_age", "expected"),
    [
        ("030M", None, 2.5),
        ("012W", None, 12 * 7 / 365.25),
        (None, (70, "a"), 70),
        (None, (18, "mo"), 1.5),
        (None, None, 65.97),  # birth 1960-03-15, study 2026-03-01
    ],
)
def test_patient_age_sources(age, subject_age, expected):
    raw = []
    if subject_age is not None:
        raw.append(num_item(code("subject_age"), subject_age[0], subject_age[1]))
    ds = build_echo_sr(E, patient=Patient(age=age), raw_content=raw)
    doc = read_document(ds)
    assert doc.patient_age_years == pytest.approx(expected, abs=0.01)


def test_created_falls_back_to_instance_creation():
    ds = build_echo_sr(E)
    del ds.ContentDate
    del ds.ContentTime
    ds.InstanceCreationDate, ds.InstanceCreationTime = "20250101", "101010.5"
    assert read_document(ds).created == "20250101101010.500000"


def test_nested_containers_inherit_and_item_modifiers_override():
    doc = read_document(
        build_echo_sr(
            [EchoItem(measure=M.e_prime_septal, value=6, encoding=Encoding.tid5200)],
            template=Template.tid5200,
        )
    )
    (obs,) = doc.observations
    site = obs.modifier(code("finding_site"))
    assert site == code("medial_annulus")  # own beats the section's Left Ventricle
    inherited = {(m.name, m.value) for m in obs.modifiers if m.inherited}
    assert inherited == {
        (code("image_mode"), code("tdi")),
        (code("finding_site"), code("left_ventricle")),  # kept, but after the own site
    }
    own = [m for m in obs.modifiers if not m.inherited]
    assert own[0].value == code("medial_annulus")
    assert obs.modifiers[0] == own[0]
    assert obs.path == "1.1.2.2"  # root 1 > section 1 > group 2 (after Finding Site) > item 2


def test_selection_and_derivation_are_modifiers_not_inherited():
    item = EchoItem(
        measure=M.mitral_e, value=80, selection="user", derivation_mean=True, encoding="tid5200"
    )
    doc = read_document(build_echo_sr([item], template=Template.tid5200))
    (obs,) = doc.observations
    assert obs.modifier(code("selection_status")) == code("user_chosen")
    assert obs.modifier(code("derivation")) == code("mean")


def test_floating_point_value_is_preferred():
    ds = build_echo_sr([EchoItem(measure=M.mitral_e, value=80, float_value=True)])
    mv = ds.ContentSequence[0].ContentSequence[0].MeasuredValueSequence[0]
    mv.FloatingPointValue = 80.123456789
    assert read_document(ds).observations[0].value == 80.123456789


def test_qualifier_and_empty_value():
    q = Code(value="114007", scheme="DCM", meaning="Measurement not attempted")
    doc = read_document(build_echo_sr([EchoItem(measure=M.mitral_e, value=None, qualifier=q)]))
    (obs,) = doc.observations
    assert obs.value is None and obs.qualifier == q


def test_by_reference_items_are_counted_not_followed():
    ref = Dataset()
    ref.RelationshipType = "INFERRED FROM"
    ref.ReferencedContentItemIdentifier = [1, 1, 1]
    num = num_item(code("mv_e_vmax"), 80, "cm/s", [ref])
    doc = read_document(build_echo_sr([], raw_content=[container(code("mv_e_vmax"), [num])]))
    assert doc.by_reference_items == 1
    assert len(doc.observations) == 1


def test_malformed_items_become_warnings():
    good = num_item(code("mv_e_vmax"), 80, "cm/s")
    bad_value = num_item(code("mv_a_vmax"), 60, "cm/s")
    # as read from a file: a raw DS element whose text is not a number
    bad_value.MeasuredValueSequence[0][0x0040A30A] = RawDataElement(
        Tag(0x0040A30A), "DS", 3, b"abc", 0, True, True
    )
    no_concept = num_item(code("mv_a_vmax"), 60, "cm/s")
    no_concept.ConceptNameCodeSequence = DicomSequence([])
    no_type = Dataset()
    no_type.RelationshipType = "CONTAINS"
    bad_modifier = num_item(
        code("tr_vmax"), 2.5, "m/s", [code_item(code("finding_site"), code("left_atrium"))]
    )
    del bad_modifier.ContentSequence[0].ConceptCodeSequence
    ds = build_echo_sr([], raw_content=[good, bad_value, no_concept, no_type, bad_modifier])
    doc = read_document(ds)
    assert [o.concept.value for o in doc.observations] == ["80070-6", "80066-4", "79921-3"]
    assert doc.observations[1].value is None
    assert len(doc.warnings) == 4
    assert any("measured value" in w for w in doc.warnings)


def test_wrong_python_types_never_escape_as_other_exceptions():
    ds = build_echo_sr(E)
    broken = copy.deepcopy(ds)
    broken.ContentSequence[0].ContentSequence[0].MeasuredValueSequence = DicomSequence([Dataset()])
    doc = read_document(broken)
    assert doc.observations[0].value is None
    with pytest.raises(RejectedInput):
        read_document("not a dataset")  # type: ignore[arg-type]


def test_read_path_errors(tmp_path):
    with pytest.raises(RejectedInput, match="file not found"):
        read_path(tmp_path / "missing.dcm")
    text = tmp_path / "notes.txt"
    text.write_text("hello")
    with pytest.raises(RejectedInput, match="not a DICOM file"):
        read_path(text)
    good = tmp_path / "good.dcm"
    build_echo_sr(E).save_as(good, enforce_file_format=True)
    _, doc = read_path(good)
    assert doc.observations[0].value == 80
    truncated = tmp_path / "truncated.dcm"
    data = good.read_bytes()
    truncated.write_bytes(data[: len(data) // 2])
    with pytest.raises(RejectedInput, match="truncated"):
        read_path(truncated)
    with pytest.raises(RejectedInput, match="directory"):
        read_path(tmp_path)


# --- fuzz: any damage to the tree yields a document or RejectedInput, nothing else -------------


def _elements(ds: Dataset, out: list) -> list:
    for elem in ds:
        out.append((ds, elem.tag, elem.VR))
        if elem.VR == "SQ":
            for item in elem.value:
                _elements(item, out)
    return out


@pytest.mark.filterwarnings("ignore::UserWarning")  # pydicom warns about the garbage values
@settings(max_examples=80, deadline=None, derandomize=True)
@given(
    st.lists(
        st.tuples(
            st.integers(min_value=0, max_value=10_000),
            st.sampled_from(["delete", "garbage", "empty"]),
            st.binary(max_size=12),
        ),
        min_size=1,
        max_size=6,
    )
)
def test_damaged_objects_never_raise_other_errors(damage):
    ds = build_echo_sr(
        [
            EchoItem(measure=M.mitral_e, value=80, encoding=Encoding.tid5200, selection="user"),
            EchoItem(measure=M.e_prime_septal, value=6, encoding=Encoding.tid5200),
            EchoItem(measure=M.tr_peak_velocity, value=2.5, encoding=Encoding.post),
        ],
        template=Template.tid5200,
    )
    for index, action, data in damage:
        elements = _elements(ds, [])
        owner, tag, vr = elements[index % len(elements)]
        if tag not in owner:
            continue
        if action == "delete":
            del owner[tag]
        elif action == "empty" or vr == "SQ":
            owner[tag] = RawDataElement(Tag(tag), vr, 0, b"", 0, True, True)
        else:
            owner[tag] = RawDataElement(Tag(tag), vr, len(data), data, 0, True, True)
    try:
        doc = read_document(ds)
    except RejectedInput:
        return
    assert all(isinstance(o.path, str) for o in doc.observations)
    build_measurements([doc], TABLE)  # and the mapper copes with whatever was read


# --- the content tree decoded from the element bytes equals pydicom's reading ------------------
# read_document decodes the elements it needs straight from their bytes when they are in the
# plain form and otherwise reads them through pydicom; both must give the same document.


def _through_pydicom(ds: Dataset) -> object:
    from unittest import mock

    from service.sr import read

    def not_plain(_ds):
        raise read._NotPlain

    with mock.patch.object(read, "_decoded_root", not_plain):
        try:
            return read_document(ds)
        except RejectedInput as exc:
            return f"rejected: {exc}"


def _both(data: bytes) -> tuple[object, object]:
    import io

    try:
        fast = read_document(pydicom.dcmread(io.BytesIO(data)))
    except RejectedInput as exc:
        fast = f"rejected: {exc}"
    return fast, _through_pydicom(pydicom.dcmread(io.BytesIO(data)))


def _encoded(ds: Dataset, *, implicit: bool = False, undefined: bool = False) -> bytes:
    import io

    from pydicom.uid import ExplicitVRLittleEndian, ImplicitVRLittleEndian

    ds = copy.deepcopy(ds)
    if undefined:  # sequences and items with undefined length (PS3.5 7.5.1)
        for elem in ds.iterall():
            if elem.VR == "SQ":
                elem.is_undefined_length = True
                for item in elem.value:
                    item.is_undefined_length_sequence_item = True
    ds.file_meta.TransferSyntaxUID = ImplicitVRLittleEndian if implicit else ExplicitVRLittleEndian
    out = io.BytesIO()
    ds.save_as(out, enforce_file_format=True)
    return out.getvalue()


_MIXED = [
    EchoItem(measure=M.mitral_e, value=0.82, unit="m/s", encoding=Encoding.tid5200),
    EchoItem(measure=M.e_prime_septal, value=6, encoding=Encoding.post, selection="user"),
    EchoItem(measure=M.tr_peak_velocity, value=2.5, encoding=Encoding.pre),
    EchoItem(
        measure=M.lavi,
        value=None,  # Measurement not attempted: (114007, DCM) in PS3.16 CID 42
        qualifier=Code(value="114007", scheme="DCM", meaning="Measurement not attempted"),
    ),
]


@pytest.mark.parametrize(
    ("implicit", "undefined"), [(False, False), (True, False), (False, True), (True, True)]
)
def test_decoded_tree_equals_pydicom_reading(implicit, undefined):
    # both VR encodings of PS3.5 7.1, defined and undefined lengths of PS3.5 7.5
    ds = build_echo_sr(_MIXED, template=Template.tid5200)
    ds.ContentSequence[0].ContentSequence[0].add_new(0x0040DB73, "UL", [1, 2])  # by reference
    fast, slow = _both(_encoded(ds, implicit=implicit, undefined=undefined))
    assert isinstance(fast, type(read_document(ds)))
    assert fast == slow
    assert len(fast.observations) == 4  # type: ignore[union-attr]


#: one damage step for :func:`_damaged`: (offset, action, bytes)
_DAMAGE_STEP = st.tuples(
    st.integers(min_value=0, max_value=100_000),
    st.sampled_from(["set", "delete", "insert", "cut"]),
    st.binary(min_size=1, max_size=4),
)


def _damaged(encoded: bytes, damage) -> bytearray:
    """``encoded`` with each (offset, action, chunk) applied after the preamble and "DICM"."""
    data = bytearray(encoded)
    for offset, action, chunk in damage:
        if len(data) <= 136:
            break
        at = 132 + offset % (len(data) - 132)
        if action == "set":
            data[at : at + len(chunk)] = chunk
        elif action == "delete":
            del data[at : at + len(chunk)]
        elif action == "insert":
            data[at:at] = chunk
        else:
            del data[at:]
    return data


@pytest.mark.filterwarnings("ignore::UserWarning")  # pydicom warns about the damaged values
@settings(max_examples=120, deadline=None, derandomize=True)
@given(
    damage=st.lists(_DAMAGE_STEP, min_size=1, max_size=4),
    implicit=st.booleans(),
)
def test_damaged_bytes_read_the_same_both_ways(damage, implicit):
    # a damaged element either decodes the same way or sends the document through pydicom
    data = _damaged(
        _encoded(build_echo_sr(_MIXED, template=Template.tid5200), implicit=implicit), damage
    )
    try:
        pydicom.dcmread(BytesIO(bytes(data)))
    except Exception:
        return  # not readable at all: nothing to compare
    fast, slow = _both(bytes(data))
    assert fast == slow
    assert repr(fast) == repr(slow)


# --- read_path skips pydicom's full decoding only where the bytes show it cannot fail ----------


@pytest.mark.filterwarnings("ignore::UserWarning")  # pydicom warns about the damaged values
@settings(max_examples=150, deadline=None, derandomize=True)
@given(damage=st.lists(_DAMAGE_STEP, min_size=1, max_size=3))
def test_bytes_said_decodable_always_decode(damage):
    import io

    from service.sr.read import decodes_without_error, file_body_start

    data = _damaged(_encoded(build_echo_sr(_MIXED, template=Template.tid5200)), damage)
    try:
        ds = pydicom.dcmread(io.BytesIO(bytes(data)))
    except Exception:
        return
    start = file_body_start(bytes(data))
    # PS3.5 Table A-1 (Explicit VR Little Endian, 1.2.840.10008.1.2.1)
    if start is not None and decodes_without_error(bytes(data), "1.2.840.10008.1.2.1", start):
        for _ in ds.iterall():  # must not raise
            pass


def test_decodable_check_refuses_what_pydicom_cannot_decode():
    import struct

    from service.sr.read import decodes_without_error, file_body_start

    good = _encoded(build_echo_sr(_MIXED, template=Template.tid5200))
    start = file_body_start(good)
    assert start is not None
    assert decodes_without_error(good, "1.2.840.10008.1.2.1", start)
    # an unknown VR "QQ" in the first element after the file meta (PS3.5 7.1.2 VR field)
    broken = good[: start + 4] + b"QQ" + good[start + 6 :]
    assert not decodes_without_error(broken, "1.2.840.10008.1.2.1", start)
    # a US value of 3 bytes is not a whole number of 2-byte values (PS3.5 6.2 US)
    odd = good + struct.pack("<HH2sH", 0x0028, 0x0010, b"US", 3) + b"\x00\x01\x02"
    assert not decodes_without_error(odd, "1.2.840.10008.1.2.1", start)
    # implicit VR: not known, so pydicom decodes everything (PS3.5 Table A-1)
    assert not decodes_without_error(good, "1.2.840.10008.1.2", start)


# --- the file meta UIDs the sender needs, read from the bytes ----------------------------------


@pytest.mark.filterwarnings("ignore::UserWarning")  # pydicom warns about the damaged values
@settings(max_examples=150, deadline=None, derandomize=True)
@given(damage=st.lists(_DAMAGE_STEP, min_size=0, max_size=2), cut=st.integers(0, 400))
def test_file_meta_uids_agree_with_pydicom(damage, cut):
    import tempfile

    from pydicom.filereader import read_file_meta_info

    from service.sr.read import file_meta_uids

    data = bytes(_damaged(_encoded(build_echo_sr(_MIXED, template=Template.tid5200)), damage))
    data = data[: len(data) - cut]
    got = file_meta_uids(data)
    with tempfile.NamedTemporaryFile(suffix=".dcm") as f:
        f.write(data)
        f.flush()
        try:
            meta = read_file_meta_info(f.name)  # PS3.10 7.1 as pydicom reads it
        except Exception:
            meta = None
    if got is not None:
        # every value this returns is the value pydicom reads
        assert meta is not None
        assert got == {k: str(getattr(meta, k)) for k in got}
    if not damage and cut < 300:
        # an intact meta group: all three found (PS3.10 Table 7.1-1, Type 1)
        assert got is not None and got["TransferSyntaxUID"] == "1.2.840.10008.1.2.1"


def test_file_meta_uids_refuse_what_is_not_part10():
    from service.sr.read import file_body_start, file_meta_uids

    good = _encoded(build_echo_sr(_MIXED, template=Template.tid5200))
    assert file_meta_uids(b"") is None
    assert file_meta_uids(b"\0" * 128 + b"DIcM" + good[132:]) is None  # PS3.10 7.1 prefix
    assert file_meta_uids(good[:140]) is None  # cut inside the meta group
    start = file_body_start(good)
    assert start is not None and file_meta_uids(good[:start]) is not None
    assert file_meta_uids(good[: start - 3]) is None  # its last value cut short


def test_file_meta_uids_refuse_a_meta_element_whose_vr_is_damaged():
    # PS3.10 7.1: the meta group is explicit VR little endian; with its VR damaged the length
    # of (0002,0010) is unknown, and pydicom, guessing implicit VR, reads another value than
    # the one the intact length gives: the bytes are not trusted at all
    from pydicom.filereader import read_file_meta_info

    from service.sr.read import file_meta_uids

    good = bytearray(_encoded(build_echo_sr(_MIXED, template=Template.tid5200)))
    at = bytes(good).index(b"\x02\x00\x10\x00UI", 132)
    good[at + 4] = 0
    import tempfile

    with tempfile.NamedTemporaryFile(suffix=".dcm") as f:
        f.write(good)
        f.flush()
        try:
            pydicom_reads = str(read_file_meta_info(f.name).TransferSyntaxUID)
        except Exception:
            pydicom_reads = None
    assert pydicom_reads != "1.2.840.10008.1.2.1"  # so a value from the intact length is wrong
    assert file_meta_uids(bytes(good)) is None
