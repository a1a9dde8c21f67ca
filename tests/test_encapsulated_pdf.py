"""Encapsulated PDF around the one-page summary: identity, references and external validators.

Validators: dicom3tools ``dciodvfy`` (hard dependency in CI: with env ``CI`` set a missing
tool fails instead of skipping) and DCMTK ``dcm2pdf`` (Debian dcmtk, by absolute path).
Patients are fictional (Harbour Vale Cardiac Centre).
"""

from __future__ import annotations

import io
import os
import shutil
import subprocess
from datetime import UTC, datetime
from functools import cache
from pathlib import Path

import pydicom
import pytest
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.uid import ComprehensiveSRStorage, EncapsulatedPDFStorage, ExplicitVRLittleEndian

from service.errors import UserError
from service.model import (
    Assessment,
    AssessmentSet,
    FillingPressure,
    Grade,
    Guideline,
    Measurements,
    Pathway,
)
from service.report import identity_from_dataset, render_summary_pdf
from service.sr.encapsulated_pdf import MIME_TYPE, build_encapsulated_pdf, summary_uids

STUDY = "2.25.93017245113340561273890144528216644521"
SOURCE_SERIES = "2.25.210552094815306183347212853902446703311"
SOURCE_SOP = "2.25.154482630097311530624281941512001877412"
RESULT_SERIES = "2.25.25790367447106120658447735093118830761"
RESULT_SOP = "2.25.182212338316700130426312095592810012345"
PDF_SERIES = "2.25.300911723359920066735150104223873512217"
PDF_SOP = "2.25.66372150021941763280811590215617712244"
WHEN = datetime(2026, 12, 1, 9, 30, 0)
TITLE = "Diastolic function summary"


def dciodvfy() -> str:
    path = shutil.which("dciodvfy")
    if path is None:
        if os.environ.get("CI"):
            pytest.fail("dciodvfy (dicom3tools) is required in CI")
        pytest.skip("dciodvfy (dicom3tools) not installed")
    return path


def source_sr(**overrides: object) -> Dataset:
    """A source echo SR header, read back from bytes as the service would see it."""
    ds = Dataset()
    ds.SpecificCharacterSet = "ISO_IR 100"  # Latin-1, so re-encoding to UTF-8 is exercised
    ds.SOPClassUID = ComprehensiveSRStorage
    ds.SOPInstanceUID = SOURCE_SOP
    ds.StudyInstanceUID = STUDY
    ds.SeriesInstanceUID = SOURCE_SERIES
    ds.Modality = "SR"
    ds.PatientName = "Øyen^Åsa"
    ds.PatientID = "HVCC-558102"
    ds.IssuerOfPatientID = "HVCC"
    ds.PatientBirthDate = "19610704"
    ds.PatientSex = "F"
    ds.PatientAge = "065Y"
    ds.StudyDate = "20261130"
    ds.StudyTime = "101500"
    ds.StudyID = "E4471"
    ds.AccessionNumber = "HV26-88977"
    ds.ReferringPhysicianName = "Tidewell^Corin"
    ds.StudyDescription = "Transthoracic echocardiogram"
    ds.InstitutionName = "Harbour Vale Cardiac Centre"
    ds.Manufacturer = "Lanternfish Acoustics"
    ds.ManufacturerModelName = "Tidewater 5"
    ds.SeriesDescription = "Adult echo measurements"
    for k, v in overrides.items():
        if v is None:
            delattr(ds, k)
        else:
            setattr(ds, k, v)
    ds.file_meta = FileMetaDataset()
    ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
    buf = io.BytesIO()
    ds.save_as(buf, enforce_file_format=True)
    buf.seek(0)
    return pydicom.dcmread(buf)


def result_sr() -> Dataset:
    """The result SR as far as the summary refers to it."""
    ds = Dataset()
    ds.SOPClassUID = ComprehensiveSRStorage
    ds.SOPInstanceUID = RESULT_SOP
    ds.StudyInstanceUID = STUDY
    ds.SeriesInstanceUID = RESULT_SERIES
    return ds


@cache
def summary_pdf() -> bytes:
    a = Assessment(
        guideline=Guideline.ase_eacvi_2016,
        guideline_citation="Nagueh SF et al. J Am Soc Echocardiogr 2016;29:277-314",
        rule_set_version="ase-eacvi-2016/1",
        pathway=Pathway.normal_lvef,
        pathway_reason="no measurement the guideline uses is available",
        grade=Grade.not_gradable,
        filling_pressure=FillingPressure.not_estimated,
    )
    return render_summary_pdf(
        AssessmentSet(primary=a),
        Measurements(),
        identity_from_dataset(source_sr()),
        result_sr_uid=RESULT_SOP,
    )


def build(pdf: bytes | None = None, **kw) -> Dataset:
    args = {
        "result_sr": result_sr(),
        "sop_instance_uid": PDF_SOP,
        "series_instance_uid": PDF_SERIES,
        "document_title": TITLE,
        "content_datetime": WHEN,
    }
    args.update(kw)
    source = args.pop("source", None) or source_sr()
    return build_encapsulated_pdf(summary_pdf() if pdf is None else pdf, source, **args)


def written(ds: Dataset, path: Path) -> Path:
    ds.save_as(path, enforce_file_format=True)
    return path


def validator_errors(path: Path) -> list[str]:
    out = subprocess.run(
        [dciodvfy(), str(path)], capture_output=True, text=True, timeout=60, check=False
    )
    lines = (out.stdout + out.stderr).splitlines()
    return [ln for ln in lines if ln.startswith("Error")]


# ---------------------------------------------------------------------------------------------


@pytest.mark.external
def test_dciodvfy_reports_no_error(tmp_path: Path) -> None:
    # dicom3tools dciodvfy checks the Encapsulated PDF IOD (PS3.3 A.45.1)
    assert validator_errors(written(build(), tmp_path / "summary.dcm")) == []


@pytest.mark.external
def test_dciodvfy_reports_no_error_without_result_sr_and_sparse_source(tmp_path: Path) -> None:
    sparse = source_sr(PatientBirthDate=None, StudyID=None, AccessionNumber=None, PatientAge=None)
    ds = build(result_sr=None, source=sparse)
    assert validator_errors(written(ds, tmp_path / "summary.dcm")) == []
    assert ds.PatientBirthDate == "" and ds.AccessionNumber == ""  # Type 2: present, empty


@pytest.mark.external
def test_dciodvfy_catches_a_missing_mime_type(tmp_path: Path) -> None:
    # control: the validator check above can fail (MIME type is Type 1, PS3.3 C.24.2)
    ds = build()
    del ds.MIMETypeOfEncapsulatedDocument
    errors = validator_errors(written(ds, tmp_path / "bad.dcm"))
    assert any("MIMETypeOfEncapsulatedDocument" in e for e in errors)


def test_same_patient_and_study_new_series(tmp_path: Path) -> None:
    src = source_sr()
    ds = pydicom.dcmread(written(build(), tmp_path / "summary.dcm"))
    for kw in (
        "PatientID",
        "IssuerOfPatientID",
        "PatientBirthDate",
        "PatientSex",
        "PatientAge",
        "StudyInstanceUID",
        "StudyDate",
        "StudyTime",
        "StudyID",
        "AccessionNumber",
        "StudyDescription",
    ):
        assert ds[kw].value == src[kw].value, kw
    assert str(ds.PatientName) == "Øyen^Åsa"  # Latin-1 source re-encoded as UTF-8
    assert ds.SpecificCharacterSet == "ISO_IR 192"
    assert str(ds.ReferringPhysicianName) == "Tidewell^Corin"
    assert ds.SeriesInstanceUID == PDF_SERIES != src.SeriesInstanceUID
    assert ds.SOPInstanceUID == PDF_SOP == ds.file_meta.MediaStorageSOPInstanceUID


def test_sop_class_title_mime_and_reference(tmp_path: Path) -> None:
    ds = pydicom.dcmread(written(build(), tmp_path / "summary.dcm"))
    # Encapsulated PDF Storage, PS3.6 Annex A via pydicom's UID registry
    assert ds.SOPClassUID == EncapsulatedPDFStorage == "1.2.840.10008.5.1.4.1.1.104.1"
    assert ds.Modality == "DOC"  # PS3.3 C.24.1
    assert ds.MIMETypeOfEncapsulatedDocument == MIME_TYPE == "application/pdf"
    assert ds.DocumentTitle == TITLE
    refs = [
        (r.ReferencedSOPClassUID, r.ReferencedSOPInstanceUID) for r in ds.SourceInstanceSequence
    ]
    assert refs == [(ComprehensiveSRStorage, RESULT_SOP), (ComprehensiveSRStorage, SOURCE_SOP)]


def test_document_round_trips_with_padding(tmp_path: Path) -> None:
    pdf = summary_pdf()
    odd = pdf if len(pdf) % 2 else pdf + b"\n"  # a PDF may end with extra whitespace
    ds = pydicom.dcmread(written(build(odd), tmp_path / "summary.dcm"))
    assert len(ds.EncapsulatedDocument) % 2 == 0  # OB is even (PS3.5 section 7.1)
    assert ds.EncapsulatedDocumentLength == len(odd)
    assert ds.EncapsulatedDocument[: ds.EncapsulatedDocumentLength] == odd


@pytest.mark.external
def test_dcmtk_extracts_the_same_pdf(tmp_path: Path) -> None:
    dcm2pdf = Path("/usr/bin/dcm2pdf")  # DCMTK, absolute path (see project notes)
    if not dcm2pdf.exists():
        if os.environ.get("CI"):
            pytest.fail("DCMTK dcm2pdf is required in CI")
        pytest.skip("DCMTK not installed")
    path = written(build(), tmp_path / "summary.dcm")
    out = tmp_path / "out.pdf"
    subprocess.run([str(dcm2pdf), str(path), str(out)], check=True, timeout=60)
    assert out.read_bytes().rstrip(b"\x00") == summary_pdf().rstrip(b"\x00")


def test_deterministic(tmp_path: Path) -> None:
    a = written(build(), tmp_path / "a.dcm").read_bytes()
    b = written(build(), tmp_path / "b.dcm").read_bytes()
    assert a == b


def test_timezone_offset_written_for_aware_time() -> None:
    ds = build(content_datetime=datetime(2026, 12, 1, 9, 30, tzinfo=UTC))
    assert ds.TimezoneOffsetFromUTC == "+0000"
    assert "TimezoneOffsetFromUTC" not in build()


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"pdf": b"GIF89a"}, "not a PDF"),
        ({"series_instance_uid": SOURCE_SERIES}, "new series"),
        ({"series_instance_uid": RESULT_SERIES}, "own series"),
        ({"sop_instance_uid": "1.2.03"}, "not a valid DICOM UID"),
        ({"document_title": "   "}, "document title"),
        ({"source": "not a dataset"}, "must be a DICOM dataset"),
    ],
)
def test_bad_input_is_a_user_error(change: dict, message: str) -> None:
    pdf = change.pop("pdf", None)
    source = change.pop("source", None)
    with pytest.raises(UserError, match=message):
        if source is not None:
            build_encapsulated_pdf(
                summary_pdf(),
                source,  # type: ignore[arg-type]
                result_sr=None,
                sop_instance_uid=PDF_SOP,
                series_instance_uid=PDF_SERIES,
                document_title=TITLE,
            )
        build(pdf, **change)


def test_result_sr_of_another_study_is_refused() -> None:
    other = result_sr()
    other.StudyInstanceUID = "2.25.1"
    with pytest.raises(UserError, match="another study"):
        build(result_sr=other)


def test_source_without_study_uid_is_refused() -> None:
    with pytest.raises(UserError, match="Study Instance UID"):
        build(source=source_sr(StudyInstanceUID=None))


def test_summary_uids_are_deterministic_and_distinct() -> None:
    sop, series = summary_uids(RESULT_SOP, STUDY)
    assert (sop, series) == summary_uids(RESULT_SOP, STUDY)
    assert len({sop, series, RESULT_SOP, RESULT_SERIES, STUDY}) == 5
    other_sop, other_series = summary_uids("2.25.7", STUDY)
    assert other_sop != sop and other_series == series  # one summary series per study
    rooted, _ = summary_uids(RESULT_SOP, STUDY, root="1.2.826.0.1.3680043.10.999")
    assert rooted.startswith("1.2.826.0.1.3680043.10.999.") and len(rooted) <= 64
    with pytest.raises(UserError):
        summary_uids("not-a-uid", STUDY)
