"""Results of this software that come back (a PACS routing every new object of a study to every
node that took part in it) are recognised by what they carry, acknowledged, recorded as
ignored and never graded again, whether they arrive over the network or on disk."""

from __future__ import annotations

import copy
import json
import subprocess
import sys
from io import BytesIO
from pathlib import Path

import pydicom
import pytest
from netutil import (
    DCMTK_REASON,
    LOOPBACK,
    NODE_AE,
    SKIP_WITHOUT_DCMTK,
    STORESCU,
    bytes_kept,
    echo_sr,
    free_port,
    journal_args,
    pacs_uids,
    run_storescu,
    storescp,
    study_state,
    wait_for,
    write_files,
)
from pydicom.uid import generate_uid

from service.cli import main as cli_main
from service.pipeline import GradeOptions, build_summary, grade_study
from service.sr.codes import PRIVATE_SCHEME
from service.sr.provenance import IGNORED_OWN_RESULT, own_result_reason

CLI = [sys.executable, "-m", "service.cli"]

#: General Equipment module attributes (PS3.3 C.7.5.1) and the Device UID (PS3.3 C.7.5.1,
#: (0018,1002)) the recogniser may key on; removing all of them leaves the content's codes
EQUIPMENT = ("Manufacturer", "ManufacturerModelName", "SoftwareVersions", "DeviceUID")


@pytest.fixture(scope="module")
def graded():
    source = echo_sr("own-result")
    outcome = grade_study([source], GradeOptions())
    assert outcome.result is not None
    return source, outcome


def test_result_sr_and_summary_pdf_written_now_are_recognised(graded):
    source, outcome = graded
    assert own_result_reason(source) is None  # a scanner's measurement SR is not ours
    reason = own_result_reason(outcome.result)
    assert reason is not None and reason.startswith("result SR")
    summary = build_summary(outcome, [source])
    assert summary is not None
    # PS3.4 Annex B.5: Encapsulated PDF Storage
    assert summary.SOPClassUID == "1.2.840.10008.5.1.4.1.1.104.1"
    assert own_result_reason(summary).startswith("summary PDF")


def test_result_of_another_version_or_configuration_is_recognised(graded):
    _, outcome = graded
    other = copy.deepcopy(outcome.result)
    other.SoftwareVersions = "diastolic-sr 0.0.9"  # an older version of the node
    other.SOPInstanceUID = generate_uid(prefix="1.2.826.0.1.3680043.10.999.")  # another root
    assert "0.0.9" in own_result_reason(other)
    # another configuration: equipment rewritten (e.g. by a site build), content unchanged
    for keyword in EQUIPMENT:
        if keyword in other:
            delattr(other, keyword)
    reason = own_result_reason(other)
    assert reason is not None and PRIVATE_SCHEME in reason
    # the coding scheme declaration alone (PS3.3 C.12.1 Coding Scheme Identification Sequence)
    del other.CodingSchemeIdentificationSequence
    assert PRIVATE_SCHEME in own_result_reason(other)  # the codes in the content tree


def test_document_title_and_layout_are_not_what_is_keyed_on(graded):
    _, outcome = graded
    other = copy.deepcopy(outcome.result)
    # another title (the root concept name) in a standard scheme: still recognised
    other.ConceptNameCodeSequence[0].CodeValue = "18748-4"
    other.ConceptNameCodeSequence[0].CodingSchemeDesignator = "LN"
    other.ConceptNameCodeSequence[0].CodeMeaning = "Diagnostic imaging report"
    assert own_result_reason(other) is not None
    for keyword in EQUIPMENT:
        if keyword in other:
            delattr(other, keyword)
    del other.CodingSchemeIdentificationSequence
    other.ContentSequence = []  # nothing of ours left
    assert own_result_reason(other) is None


def _run(*args: object) -> subprocess.CompletedProcess:
    return subprocess.run(
        [*CLI, *map(str, args)], capture_output=True, text=True, timeout=120, check=False
    )


def test_grade_skips_its_own_results_and_summaries(tmp_path: Path):
    demo = tmp_path / "demo"
    assert _run("demo-data", demo).returncode == 0
    out = tmp_path / "out"
    first = _run("grade", demo / "grade-2.dcm", "--out", out, "--pdf", "--json")
    assert first.returncode == 0, first.stderr
    [row] = [json.loads(x) for x in first.stdout.splitlines()]
    again = _run("grade", out, "--json")
    assert again.returncode == 0, again.stderr  # skipping is not a failure
    rows = [json.loads(x) for x in again.stdout.splitlines()]
    assert sorted(Path(r["input"]).name for r in rows) == [
        "grade-2.result.dcm",
        "grade-2.summary.dcm",
    ]
    for r in rows:
        assert r["status"] == "skipped" and r["grade"] is None and r["output"] is None
        assert r["reason"].startswith(IGNORED_OWN_RESULT)
    assert "summary PDF" in next(r for r in rows if "summary" in r["input"])["reason"]
    # a source beside them is graded as before, to the same result
    (out / "grade-2.dcm").write_bytes((demo / "grade-2.dcm").read_bytes())
    mixed = [json.loads(x) for x in _run("grade", out, "--json").stdout.splitlines()]
    assert [r["result_uid"] for r in mixed if r["status"] == "graded"] == [row["result_uid"]]


needs_dcmtk = pytest.mark.skipif(SKIP_WITHOUT_DCMTK, reason=DCMTK_REASON)


@needs_dcmtk
@pytest.mark.network
def test_result_sent_back_with_dcmtk_storescu_is_acknowledged_and_ignored(
    tmp_path, loopback_nodes, capsys
):
    pacs_port, pacs_dir = free_port(), tmp_path / "pacs"
    with storescp(pacs_dir, pacs_port):
        node = loopback_nodes.start(
            {
                "delivery": {"backoff_initial_seconds": 0.1, "backoff_max_seconds": 0.4},
                "http": {"port": 0},
                "limits": {"shutdown_grace_seconds": 2},
            },
            forward=[f"PACS@{LOOPBACK}:{pacs_port}"],
            settle=0.2,
        )
        ds = echo_sr("loop")
        study = ds.StudyInstanceUID
        [source] = write_files([ds], tmp_path / "scanner")
        assert run_storescu([source], node.port).returncode == 0
        wait_for(lambda: study_state(node, study) == "delivered", 30)
        first = node.journal.study(study)
        [result_file] = wait_for(lambda: sorted(pacs_dir.glob("*")), 20)
        # the PACS forwards the result back (DCMTK storescu, PS3.4 B.2.3: 0x0000 success)
        sent = run_storescu([result_file], node.port, calling="PACS")
        assert sent.returncode == 0, sent.stderr
        # another version of the node wrote this one (other Software Versions, other UID)
        other = pydicom.dcmread(result_file)
        other.SoftwareVersions = "diastolic-sr 0.0.9"
        other.SOPInstanceUID = other.file_meta.MediaStorageSOPInstanceUID = generate_uid()
        other_file = tmp_path / "other.dcm"
        other.save_as(other_file, enforce_file_format=True)
        sent = run_storescu([other_file], node.port, calling="PACS")
        assert sent.returncode == 0, sent.stderr
        ignored = wait_for(
            lambda: (lambda r: r if len(r) == 2 else None)(node.journal.ignored_objects()), 20
        )
        assert {r["sop_instance_uid"] for r in ignored} == {
            first["result_uid"],
            str(other.SOPInstanceUID),
        }
        for r in ignored:
            assert r["reason"].startswith(IGNORED_OWN_RESULT) and r["study_uid"] == study
            assert bytes_kept(node.journal, r)  # kept, as acknowledged
        # never graded nor forwarded: the study was not re-opened
        again = node.journal.study(study)
        assert again["generation"] == first["generation"] and again["state"] == "delivered"
        assert [o["sop_instance_uid"] for o in node.journal.objects()] == [ds.SOPInstanceUID]
        assert len(node.journal.results()) == 1
        # re-sending the original source behaves as before: same result, nothing new delivered
        assert run_storescu([source], node.port, calling="ARCHIVE").returncode == 0
        wait_for(
            lambda: (
                node.journal.study(study)["generation"] > first["generation"]
                and study_state(node, study) == "delivered"
            ),
            30,
        )
        assert node.journal.study(study)["result_uid"] == first["result_uid"]
        assert pacs_uids(pacs_dir) == [first["result_uid"]]
        # the queue command shows what was ignored and why
        capsys.readouterr()
        assert cli_main(["queue", *journal_args(node), "--json"]) == 0
        report = json.loads(capsys.readouterr().out)
        listed = {o["sop_instance_uid"]: o for o in report["objects_ignored"]}
        assert set(listed) == {first["result_uid"], str(other.SOPInstanceUID)}
        assert listed[first["result_uid"]]["kind"] == "result SR"


@needs_dcmtk
@pytest.mark.network
def test_summary_pdf_sent_back_with_dcmtk_storescu_is_recorded_as_ignored(
    tmp_path, loopback_nodes, graded, capsys
):
    # access.accept_images accepts Encapsulated PDF Storage (PS3.4 Annex B.5) with the image
    # classes: the node's own summary coming back is kept and listed, like an own result SR
    source, outcome = graded
    summary = build_summary(outcome, [source])
    assert summary is not None and own_result_reason(summary).startswith("summary PDF")
    foreign = copy.deepcopy(summary)  # another vendor's PDF report of the same study
    for keyword in (*EQUIPMENT, "CodingSchemeIdentificationSequence", "ConceptNameCodeSequence"):
        if keyword in foreign:
            delattr(foreign, keyword)
    foreign.Manufacturer = "Lanternfish Acoustics"
    foreign.SOPInstanceUID = foreign.file_meta.MediaStorageSOPInstanceUID = generate_uid()
    assert own_result_reason(foreign) is None
    files = write_files([summary, foreign], tmp_path / "pacs-out")
    node = loopback_nodes.start({"access": {"accept_images": True}, "http": {"port": 0}})
    sent = run_storescu(files, node.port, calling="PACS")  # DCMTK storescu -R
    assert sent.returncode == 0, sent.stderr
    [row] = wait_for(lambda: node.journal.ignored_objects() or None, 20)
    assert row["sop_instance_uid"] == summary.SOPInstanceUID
    assert row["reason"].startswith(IGNORED_OWN_RESULT) and "summary PDF" in row["reason"]
    assert row["study_uid"] == summary.StudyInstanceUID and bytes_kept(node.journal, row)
    # kept as received: the PDF itself
    kept = pydicom.dcmread(BytesIO(node.journal.ignored_data(row["sop_instance_uid"])))
    assert kept.EncapsulatedDocument == summary.EncapsulatedDocument
    # never graded: no study opened, nothing queued; the foreign PDF discarded as before
    assert node.journal.study(summary.StudyInstanceUID) is None
    assert node.journal.objects() == []
    capsys.readouterr()
    assert cli_main(["queue", *journal_args(node), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    [listed] = report["objects_ignored"]
    assert listed["sop_instance_uid"] == summary.SOPInstanceUID
    assert listed["kind"] == "summary PDF"


def _storescu_debug(path: Path, port: int) -> subprocess.CompletedProcess:
    """DCMTK storescu proposing the file's own SOP class (-R), with the response dumped (-d):
    DCMTK words the status itself ("0x0122: Refused: SOP Class not supported") and prints the
    status detail, Error Comment included."""
    return subprocess.run(
        [STORESCU, "-R", "-d", "-aet", "PACS", "-aec", NODE_AE, "-to", "10", LOOPBACK,
         str(port), str(path)],
        capture_output=True, text=True, timeout=60, check=False,
    )  # fmt: skip


@needs_dcmtk
@pytest.mark.network
@pytest.mark.parametrize("accept_images", [False, True])
def test_summary_pdf_sent_back_is_answered_success_however_the_node_is_configured(
    tmp_path, loopback_nodes, graded, capsys, accept_images
):
    # Encapsulated PDF Storage (PS3.4 Annex B.5, 1.2.840.10008.5.1.4.1.1.104.1) is always
    # accepted, so a PACS rule forwarding the node's summary back never fails nor retries:
    # the node's own PDF is answered 0x0000 Success (PS3.4 B.2.3), kept and listed as ignored.
    # Another PDF is refused with 0x0122 "Refused: SOP Class not supported" (a general status,
    # PS3.7 Annex C) and an Error Comment (0000,0902) unless access.accept_images is on, when it
    # is acknowledged and discarded as before.
    source, outcome = graded
    summary = build_summary(outcome, [source])
    foreign = copy.deepcopy(summary)  # another vendor's PDF report of the same study
    for keyword in (*EQUIPMENT, "CodingSchemeIdentificationSequence", "ConceptNameCodeSequence"):
        if keyword in foreign:
            delattr(foreign, keyword)
    foreign.Manufacturer = "Lanternfish Acoustics"
    foreign.SOPInstanceUID = foreign.file_meta.MediaStorageSOPInstanceUID = generate_uid()
    own_file, foreign_file = write_files([summary, foreign], tmp_path / "pacs-out")
    node = loopback_nodes.start({"access": {"accept_images": accept_images}, "http": {"port": 0}})

    own = _storescu_debug(own_file, node.port)
    assert own.returncode == 0, own.stderr
    assert "0x0000: Success" in own.stderr
    [row] = wait_for(lambda: node.journal.ignored_objects() or None, 20)
    assert row["sop_instance_uid"] == summary.SOPInstanceUID
    assert row["reason"].startswith(IGNORED_OWN_RESULT) and "summary PDF" in row["reason"]

    other = _storescu_debug(foreign_file, node.port)
    if accept_images:
        assert other.returncode == 0, other.stderr
        assert "0x0000: Success" in other.stderr
    else:
        assert other.returncode != 0
        assert "0x0122: Refused: SOP Class not supported" in other.stderr
        assert "(0000,0902) LO [Only summary PDFs written by this node are accepted]" in (
            other.stderr
        )
    # never graded nor forwarded, and the foreign PDF not kept
    assert [r["sop_instance_uid"] for r in node.journal.ignored_objects()] == [
        summary.SOPInstanceUID
    ]
    assert node.journal.study(summary.StudyInstanceUID) is None
    assert node.journal.objects() == []
    capsys.readouterr()
    assert cli_main(["queue", *journal_args(node), "--json"]) == 0
    [listed] = json.loads(capsys.readouterr().out)["objects_ignored"]
    assert listed["sop_instance_uid"] == summary.SOPInstanceUID
    assert listed["kind"] == "summary PDF"


def test_ignored_object_is_kept_then_purged_with_finished_work(tmp_path):
    from service.store.sqlite_journal import SqliteJournal

    journal = SqliteJournal(tmp_path / "journal.sqlite3")
    try:
        for when in (100.0, 200.0):  # the same result sent back twice
            journal.store_ignored(
                sop_instance_uid="2.25.1",
                study_uid="2.25.9",
                sop_class_uid="1.2.840.10008.5.1.4.1.1.88.33",
                calling_ae="PACS",
                data=b"\0" * 132,
                reason=f"{IGNORED_OWN_RESULT}: test",
                now=when,
            )
        [row] = journal.ignored_objects()
        assert row["times_received"] == 2 and bytes_kept(journal, row)
        assert journal.study("2.25.9") is None  # no study opened for grading
        assert journal.purge_finished(150.0).files == 0  # kept until its cut-off
        assert journal.purge_finished(250.0).files == 1
        assert journal.ignored_objects() == [] and not bytes_kept(journal, row)
    finally:
        journal.close()
