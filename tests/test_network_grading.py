"""Grading of the node's studies: sources the reader refuses are set aside by the pipeline
itself (each source read once), grading runs in worker processes, a worker that dies never
loses a study, and a worker never outlives its node.  The listener reads only the identifying
attributes of a received object.

Loopback only; every wait is bounded and polls a condition.  Invented data (fictional
"Harbour Vale Cardiac Centre")."""

from __future__ import annotations

import os
import signal
import sys
from datetime import datetime
from io import BytesIO
from pathlib import Path

import pydicom
import pytest
from netutil import (
    NodeProcess,
    echo_sr,
    evidence_uids,
    fake_grade,
    send,
    simple_sr,
    study_state,
    wait_for,
    write_config,
)
from pydicom.filewriter import write_dataset
from pydicom.uid import ExplicitVRLittleEndian, ImplicitVRLittleEndian

from service.config import config_from_dict
from service.errors import RejectedInput
from service.network.assembly import MAX_WORKER_CRASHES, Assembler, WorkerCrashed
from service.network.grading_worker import GradeJob, run_job
from service.network.listener import identifying_attributes
from service.network.service import Node
from service.pipeline import GradeOptions, GradeStatus, grade_study
from service.sr.encode import file_bytes
from service.sr.read import read_document
from service.store.sqlite_journal import SqliteJournal

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
    assert [uid for uid, _ in outcome.set_aside] == [a.SOPInstanceUID, b.SOPInstanceUID]


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
    assert all(n.startswith("set aside: spooled file unreadable") for n in record.notes.values())
    assert record.result is not None and record.result.data
    assert pydicom.dcmread(BytesIO(record.result.data)).SOPInstanceUID == record.result.uid


# -- grading in worker processes ------------------------------------------------------------------


@pytest.fixture
def node_factory(loopback_nodes):
    def start(*, workers: int = 1, grade_fn=None) -> Node:
        data = {
            "assembly": {"workers": workers},
            "limits": {"shutdown_grace_seconds": 2},
            "http": {"enabled": False},
        }
        return loopback_nodes.start(data, grade_fn=grade_fn)

    return start


def _worker_pids(node: Node) -> set[int]:
    pool = node.assembler._processes
    return set() if pool is None else {p.pid for p in (pool._processes or {}).values()}


def test_studies_are_graded_in_worker_processes(node_factory):
    node = node_factory(workers=2)
    assert _worker_pids(node)  # started with the node, not on demand
    studies = [echo_sr(f"pool-{i}") for i in range(3)]
    assert send(studies, node.port) == [0, 0, 0]
    wait_for(lambda: all(study_state(node, s.StudyInstanceUID) == "delivered" for s in studies), 60)
    assert len(node.journal.results()) == 3
    assert _worker_pids(node) and os.getpid() not in _worker_pids(node)


def test_a_dead_worker_loses_no_study(node_factory, caplog):
    node = node_factory(workers=1)
    assert _worker_pids(node)
    old_pool = node.assembler._processes
    for pid in _worker_pids(node):
        os.kill(pid, signal.SIGKILL)  # as the kernel's out-of-memory killer would
    wait_for(lambda: old_pool._broken, 30)
    first = echo_sr("after-crash")
    assert send([first], node.port) == [0]
    wait_for(lambda: study_state(node, first.StudyInstanceUID) == "delivered", 60)
    assert node.assembler._processes is not old_pool  # a new pool replaced the broken one
    assert "grading processes restarted" in caplog.text
    second = echo_sr("after-crash-2")
    assert send([second], node.port) == [0]
    wait_for(lambda: study_state(node, second.StudyInstanceUID) == "delivered", 60)


class _AlwaysCrashing(Assembler):
    """A grading slot whose worker dies on every study."""

    attempts = 0

    def _run_job(self, job):
        type(self).attempts += 1
        raise WorkerCrashed("the grading process ended unexpectedly (test)")


def test_a_study_that_keeps_killing_its_worker_fails_with_the_reason(tmp_path):
    cfg = config_from_dict({})
    journal = SqliteJournal(tmp_path / "journal.sqlite3")
    ds = simple_sr()
    journal.store_object(
        sop_instance_uid=str(ds.SOPInstanceUID),
        study_uid=str(ds.StudyInstanceUID),
        sop_class_uid=str(ds.SOPClassUID),
        transfer_syntax=ExplicitVRLittleEndian,
        calling_ae="SCANNER1",
        data=b"",
        settle_seconds=0,
    )
    assembler = _AlwaysCrashing(cfg, journal, grade_fn=fake_grade, poll_seconds=0.02)
    assembler.start()
    try:
        wait_for(lambda: journal.study(str(ds.StudyInstanceUID))["state"] == "failed", 30)
    finally:
        assembler.stop()
        journal.close()
    assert _AlwaysCrashing.attempts == MAX_WORKER_CRASHES  # given back until then
    reason = SqliteJournal(tmp_path / "journal.sqlite3").study(str(ds.StudyInstanceUID))["reason"]
    assert "grading process ended unexpectedly" in reason


def _descendants(pid: int) -> set[int]:
    """Every process below ``pid`` (Linux /proc)."""
    out: set[int] = set()
    todo = [pid]
    while todo:
        p = todo.pop()
        for task in Path(f"/proc/{p}/task").glob("*"):
            try:
                children = (task / "children").read_text().split()
            except OSError:
                continue
            for c in map(int, children):
                if c not in out:
                    out.add(c)
                    todo.append(c)
    return out


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state != "Z"


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_worker_processes_end_with_a_killed_node(tmp_path):
    config = write_config(tmp_path / "node.toml", "[assembly]\nworkers = 2\n")
    node = NodeProcess(tmp_path / "data", ["--config", str(config)])
    node.start()
    try:
        assert node.proc is not None
        # the node, the fork server and the resource tracker, and two grading processes
        wait_for(lambda: len(_descendants(node.proc.pid)) >= 4, 60)
        below = _descendants(node.proc.pid)
    finally:
        node.kill()  # SIGKILL: no clean-up in the node
    wait_for(lambda: not any(_alive(p) for p in below), 30)


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


# -- grading processes log as the node logs -------------------------------------------------------


def _log_in_grading_process(log_setup) -> None:
    """Run in a fresh process: start up as a grading process, then log as pydicom would."""
    import logging

    from service.network.grading_worker import init_worker

    init_worker((), None, log_setup)
    logging.getLogger("pydicom").warning("invented warning from a grading process")


@pytest.mark.parametrize("fmt", ["json", "text"])
def test_grading_processes_log_in_the_nodes_format(capfd, fmt):
    # the node logs JSON lines (or text) on stderr; what a library logs inside a grading
    # process must come out the same way, not as a bare message
    import json
    import multiprocessing

    process = multiprocessing.get_context("spawn").Process(
        target=_log_in_grading_process, args=((fmt, "INFO"),)
    )
    process.start()
    process.join(120)
    assert process.exitcode == 0
    lines = [
        line
        for line in capfd.readouterr().err.splitlines()
        if "invented warning from a grading process" in line
    ]
    assert len(lines) == 1
    if fmt == "json":
        record = json.loads(lines[0])
        assert (record["level"], record["logger"]) == ("WARNING", "pydicom")
    else:
        assert " WARNING pydicom: invented warning" in lines[0]


def test_the_node_hands_its_logging_to_its_grading_processes():
    import logging

    from service.observability.logs import configure_logging, current_logging

    root = logging.getLogger()
    saved = (list(root.handlers), root.level)
    try:
        configure_logging("json", "WARNING")
        assert current_logging() == ("json", "WARNING")
        configure_logging("text", "DEBUG")
        assert current_logging() == ("text", "DEBUG")
    finally:
        root.handlers[:] = saved[0]
        root.setLevel(saved[1])
