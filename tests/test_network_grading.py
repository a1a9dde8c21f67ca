"""Grading of the node's studies: sources the reader refuses are set aside by the pipeline
itself (each source read once), and stored objects that cannot be read are noted in the
claim's order.  The listener reads only the identifying attributes of a received object, and
stores it as pydicom would write it.

Loopback only; every wait is bounded and polls a condition.  Invented data (fictional
"Harbour Vale Cardiac Centre")."""

from __future__ import annotations

from datetime import datetime
from io import BytesIO

import pydicom
import pytest
from netutil import (
    echo_sr,
    evidence_uids,
    fake_grade,
    send,
    simple_sr,
    study_state,
    wait_for,
)
from pydicom.filewriter import write_dataset
from pydicom.uid import ExplicitVRLittleEndian, ImplicitVRLittleEndian

from service.errors import RejectedInput
from service.network.grading_worker import GradeJob, run_job
from service.network.listener import identifying_attributes
from service.pipeline import GradeOptions, GradeStatus, grade_study, study_order
from service.sr.encode import file_bytes
from service.sr.read import read_document

pytestmark = pytest.mark.network

WHEN = datetime(2026, 1, 2, 10, 30)


def _reader_reason(ds) -> str:
    """Why the project's SR reader refuses ``ds``."""
    with pytest.raises(RejectedInput) as info:
        read_document(ds)
    return str(info.value)


# -- the pipeline sets unusable sources aside -----------------------------------------------------


def test_a_source_the_reader_refuses_is_set_aside_and_the_rest_graded():
    echo = echo_sr("aside")
    empty = simple_sr(str(echo.StudyInstanceUID))  # an SR without a content tree
    mixed = grade_study([echo, empty], GradeOptions(), content_datetime=WHEN)
    alone = grade_study([echo], GradeOptions(), content_datetime=WHEN)
    assert mixed.status is GradeStatus.graded
    assert mixed.set_aside == ((str(empty.SOPInstanceUID), _reader_reason(empty)),)
    assert alone.set_aside == ()
    # the result is the one of the usable source alone, byte for byte
    assert file_bytes(mixed.result) == file_bytes(alone.result)
    # PS3.3 C.17.2: the evidence names only the instance the document was made from
    assert evidence_uids(mixed.result) == {str(echo.SOPInstanceUID)}


def test_a_single_unusable_source_is_rejected_with_the_readers_reason():
    empty = simple_sr()
    outcome = grade_study([empty], GradeOptions())
    assert outcome.status is GradeStatus.rejected
    assert outcome.reason == _reader_reason(empty)
    assert outcome.result is None


def test_no_usable_source_among_several_is_rejected_naming_each():
    a, b = simple_sr(), simple_sr()
    outcome = grade_study([a, b], GradeOptions())
    assert outcome.status is GradeStatus.rejected
    assert outcome.reason.startswith("no usable source: ")
    # each named, in the order the study is graded in (service.pipeline.study_order)
    expected = [ds.SOPInstanceUID for ds in study_order([a, b])]
    assert [uid for uid, _ in outcome.set_aside] == expected
    assert [uid for uid, _ in grade_study([b, a], GradeOptions()).set_aside] == expected


def test_a_job_notes_unreadable_spooled_files_in_the_claims_order(tmp_path):
    good = simple_sr()
    good_path = tmp_path / "good.dcm"
    good.save_as(good_path, enforce_file_format=True)
    job = GradeJob(
        study_uid=str(good.StudyInstanceUID),
        object_uids=("1.2.3.1", str(good.SOPInstanceUID), "1.2.3.2"),
        # missing from the store, whole, not DICOM at all
        objects=("FileNotFoundError: gone", good_path.read_bytes(), b"not DICOM at all"),
        options=GradeOptions(),
        mapping_paths=(),
    )
    record = run_job(job, fake_grade, table=None)
    assert record.status == "graded"
    assert record.sources == (str(good.SOPInstanceUID),)
    assert list(record.notes) == ["1.2.3.1", "1.2.3.2"]
    assert all(n.startswith("set aside: stored object unreadable") for n in record.notes.values())
    assert record.result is not None and record.result.data
    assert pydicom.dcmread(BytesIO(record.result.data)).SOPInstanceUID == record.result.uid


# -- the listener reads only what identifies an object --------------------------------------------


def _body(ds, implicit: bool) -> bytes:
    buf = pydicom.filebase.DicomBytesIO()
    buf.is_little_endian, buf.is_implicit_VR = True, implicit
    write_dataset(buf, ds)
    return buf.getvalue()


@pytest.mark.parametrize("implicit", [False, True])
def test_identifying_attributes_are_read_and_the_content_is_not(implicit):
    ds = echo_sr("identify", patient_name="Harbourvale^Ida", patient_id="HV-T-0042")
    # negotiated explicit VR; a body in either VR encoding is read (as pydicom does)
    got = identifying_attributes(_body(ds, implicit), ExplicitVRLittleEndian)
    assert got.SOPClassUID == ds.SOPClassUID
    assert got.SOPInstanceUID == ds.SOPInstanceUID
    assert got.StudyInstanceUID == ds.StudyInstanceUID
    assert str(got.PatientName) == "Harbourvale^Ida" and got.PatientID == "HV-T-0042"
    assert "ContentSequence" in ds and "ContentSequence" not in got
    assert "SeriesInstanceUID" not in got  # (0020,000E) comes after Study Instance UID


def test_identifying_attributes_refuse_a_body_cut_short():
    body = _body(echo_sr("cut"), implicit=False)
    # cut inside the content tree: pydicom alone would return the items it found
    for cut in (len(body) - 7, len(body) // 2 + 3):
        with pytest.raises(ValueError, match="cut short or damaged"):
            identifying_attributes(body[:cut], ExplicitVRLittleEndian)
    assert identifying_attributes(body, ImplicitVRLittleEndian).SOPInstanceUID  # whole: read


def _pydicom_part10(ds) -> bytes:
    buf = BytesIO()
    ds.save_as(buf, enforce_file_format=True)
    return buf.getvalue()


def test_results_are_spooled_as_pydicom_writes_them():
    outcome = grade_study([echo_sr("bytes")], GradeOptions(), content_datetime=WHEN)
    fake = fake_grade([simple_sr()], GradeOptions()).result
    for ds in (outcome.result, fake):
        assert file_bytes(ds) == _pydicom_part10(ds)
    fake.file_meta.ImplementationVersionName = "OTHER_1"  # not the encoder's: pydicom writes it
    assert file_bytes(fake) == _pydicom_part10(fake)


@pytest.mark.parametrize(
    ("sop_class", "sop_instance", "syntax"),
    [
        ("1.2.840.10008.5.1.4.1.1.88.33", "1.2.3.4", ExplicitVRLittleEndian),  # even lengths
        ("1.2.840.10008.5.1.4.1.1.88.22", "1.2.3.45", ImplicitVRLittleEndian),  # odd: padded
        ("1.2.840.10008.5.1.4.1.1.88.72", "2.25.1", "1.2.840.10008.1.2.1.99"),  # deflated
    ],
)
def test_spooled_file_meta_is_what_pydicom_writes(sop_class, sop_instance, syntax):
    # PS3.10 7.1 file meta; pynetdicom's description of a received object and pydicom's writer
    # as the reference
    from pydicom.filebase import DicomBytesIO
    from pydicom.filewriter import write_file_meta_info
    from pynetdicom.dsutils import create_file_meta

    from service.network.listener import file_meta_bytes

    buf = DicomBytesIO()
    buf.is_little_endian, buf.is_implicit_VR = True, False
    meta = create_file_meta(
        sop_class_uid=sop_class, sop_instance_uid=sop_instance, transfer_syntax=syntax
    )
    write_file_meta_info(buf, meta, enforce_standard=True)
    assert file_meta_bytes(sop_class, sop_instance, syntax) == buf.getvalue()


# -- claims held while a study is being graded ----------------------------------------------------


def test_a_long_grading_keeps_its_claim_and_is_graded_once(loopback_nodes):
    # the lease is 2 s and this grading takes 5: the grader's lease keeper renews the claim,
    # so the other grader never takes the study over
    import threading

    calls: list[str] = []
    lock = threading.Lock()

    def slow_grade(datasets, options, **kwargs):
        with lock:
            calls.append(str(datasets[0].StudyInstanceUID))
        threading.Event().wait(5)
        return fake_grade(datasets, options, **kwargs)

    node = loopback_nodes.start(
        {
            "assembly": {"workers": 2},
            "journal": {"lease_seconds": 2},
            "http": {"enabled": False},
        },
        grade_fn=slow_grade,
    )
    ds = simple_sr()
    assert send([ds], node.port) == [0]
    wait_for(lambda: study_state(node, ds.StudyInstanceUID) == "delivered", 30)
    assert calls == [str(ds.StudyInstanceUID)]
