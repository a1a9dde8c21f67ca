"""The DICOM node in-process on loopback, against pynetdicom and DCMTK peers.

Status codes are from DICOM PS3.4 Annex B.2.3 (C-STORE: 0x0000 success, 0xA700 out of
resources, 0xA900 data set does not match SOP class, 0xCxxx cannot understand) and PS3.8
(association rejection)."""

from __future__ import annotations

import json
import logging
import sqlite3
import threading
import warnings
from io import BytesIO
from pathlib import Path

import pydicom
import pytest
from netutil import (
    DCMTK_REASON,
    LOOPBACK,
    NODE_AE,
    SKIP_WITHOUT_DCMTK,
    echo_ok,
    echo_sr,
    evidence_uids,
    fake_grade,
    free_port,
    journal_args,
    merged,
    pacs_uids,
    predecessor_uids,
    pynetdicom_echo,
    run_storescu,
    send,
    simple_sr,
    storescp,
    study_state,
    wait_for,
    write_files,
)
from pydicom import Dataset
from pydicom.dataset import FileMetaDataset
from pydicom.uid import (
    DeflatedExplicitVRLittleEndian,
    ExplicitVRLittleEndian,
    ImplicitVRLittleEndian,
    generate_uid,
)
from pynetdicom import AE, _config

from service.cli import main as cli_main
from service.errors import UserError
from service.network.demo_loop import ResultReceiver, run_network_demo
from service.network.service import Node
from service.store.journal import FOLDER_DESTINATION

pytestmark = pytest.mark.network


def needs_dcmtk(test):
    """DCMTK peer tests: marked external; skipped without DCMTK except in CI."""
    return pytest.mark.external(pytest.mark.skipif(SKIP_WITHOUT_DCMTK, reason=DCMTK_REASON)(test))


CT_IMAGE = "1.2.840.10008.5.1.4.1.1.2"  # CT Image Storage (PS3.4 Annex B.5)
ENHANCED_SR = "1.2.840.10008.5.1.4.1.1.88.22"  # Enhanced SR Storage (PS3.4 Annex B.5)
COMPREHENSIVE_SR = "1.2.840.10008.5.1.4.1.1.88.33"  # PS3.4 Annex B.5
SIMPLIFIED_ECHO_SR = "1.2.840.10008.5.1.4.1.1.88.72"  # PS3.4 Annex B.5


@pytest.fixture
def start_node(tmp_path, loopback_nodes):
    """Start an in-process node on 127.0.0.1 (free port) with a short settle window and
    short back-off; stopped at the end of the test."""

    def start(
        extra: dict | None = None,
        *,
        grade_fn=None,
        forward=(),
        settle: float = 0.2,
        data_dir: Path | None = None,
    ) -> Node:
        data = {
            "delivery": {"backoff_initial_seconds": 0.1, "backoff_max_seconds": 0.4},
            "limits": {"shutdown_grace_seconds": 2},
            "http": {"port": 0},
        }
        return loopback_nodes.start(
            merged(data, extra),
            grade_fn=grade_fn,
            settle=settle,
            forward=forward,
            data_dir=data_dir or tmp_path / "node",
        )

    return start


def _done(node: Node, *study_uids: str):
    return lambda: all(study_state(node, s) in ("delivered", "failed") for s in study_uids)


# -- verification and association policy --------------------------------------------------------


@needs_dcmtk
def test_c_echo_answers_dcmtk_echoscu_and_pynetdicom(start_node):
    node = start_node(grade_fn=fake_grade)
    assert echo_ok(node.port, NODE_AE)
    ae = AE(ae_title="ECHOER")
    ae.add_requested_context("1.2.840.10008.1.1")
    assoc = ae.associate(LOOPBACK, node.port, ae_title=NODE_AE)
    assert assoc.is_established
    assert assoc.send_c_echo().Status == 0x0000
    assoc.release()


def test_association_policy_called_ae_and_allow_list(start_node, caplog):
    caplog.set_level(logging.WARNING, logger="diastolic_sr")
    node = start_node({"access": {"allowed_calling_aes": ["ECHO1"]}}, grade_fn=fake_grade)

    def associate(calling: str, called: str):
        ae = AE(ae_title=calling)
        ae.acse_timeout = 10
        ae.add_requested_context("1.2.840.10008.1.1")
        return ae.associate(LOOPBACK, node.port, ae_title=called)

    ok = associate("ECHO1", NODE_AE)
    assert ok.is_established
    ok.release()
    stranger = associate("STRANGER", NODE_AE)
    assert stranger.is_rejected
    wrong_called = associate("ECHO1", "SOMEONE_ELSE")
    assert wrong_called.is_rejected
    text = caplog.text
    assert "association rejected: calling AE 'STRANGER'" in text
    assert "from 127.0.0.1:" in text  # logged with the peer's address
    assert "calling AE 'ECHO1', called AE 'SOMEONE_ELSE'" in text


def test_at_least_eight_simultaneous_associations(start_node):
    node = start_node(grade_fn=fake_grade)
    assocs = []
    try:
        for i in range(8):
            ae = AE(ae_title=f"SCANNER{i}")
            ae.add_requested_context("1.2.840.10008.1.1")
            assoc = ae.associate(LOOPBACK, node.port, ae_title=NODE_AE)
            assocs.append(assoc)
        assert all(a.is_established for a in assocs)
        assert all(a.send_c_echo().Status == 0 for a in assocs)  # all usable at the same time
    finally:
        for a in assocs:
            if a.is_established:
                a.release()


def test_grading_runs_off_the_network_threads(start_node):
    entered, release = threading.Event(), threading.Event()
    threads: list[str] = []

    def slow_grade(datasets, options, **kwargs):
        threads.append(threading.current_thread().name)
        entered.set()
        release.wait(20)
        return fake_grade(datasets, options, **kwargs)

    node = start_node({"assembly": {"workers": 1}}, grade_fn=slow_grade, settle=0)
    first, second = simple_sr(), simple_sr()
    try:
        assert send([first], node.port) == [0]
        assert entered.wait(20)
        # the grader is busy: the node still acknowledges objects and answers echoes
        assert send([second], node.port) == [0]
        assert pynetdicom_echo(node.port) == 0
        assert study_state(node, second.StudyInstanceUID) == "received"
    finally:
        release.set()
    wait_for(_done(node, first.StudyInstanceUID, second.StudyInstanceUID), 30)
    assert threads and all(name.startswith("grade") for name in threads)


# -- receiving: durability and failure statuses ------------------------------------------------


def _raw_file(tmp_path: Path, name: str, meta_class: str, sop_uid: str, body: bytes) -> Path:
    """A Part 10 file whose file meta claims ``meta_class`` and whose data set is ``body``
    (sent as is by pynetdicom's chunked sending, so the node sees exactly these bytes)."""
    from pydicom.filebase import DicomBytesIO
    from pydicom.filewriter import write_file_meta_info

    meta = FileMetaDataset()
    meta.MediaStorageSOPClassUID = meta_class
    meta.MediaStorageSOPInstanceUID = sop_uid
    meta.TransferSyntaxUID = ExplicitVRLittleEndian
    buf = DicomBytesIO()
    buf.is_little_endian, buf.is_implicit_VR = True, False
    write_file_meta_info(buf, meta)
    path = tmp_path / name
    path.write_bytes(b"\x00" * 128 + b"DICM" + buf.getvalue() + body)
    return path


def _explicit_body(ds: Dataset) -> bytes:
    from pynetdicom.dsutils import encode

    return encode(ds, False, True)


def test_bad_objects_get_failure_status_and_the_association_goes_on(
    start_node, tmp_path, monkeypatch, caplog
):
    caplog.set_level(logging.WARNING, logger="diastolic_sr")
    node = start_node(grade_fn=fake_grade)
    monkeypatch.setattr(_config, "STORE_SEND_CHUNKED_DATASET", True)
    good = simple_sr()
    wrong_class = simple_sr()
    wrong_class.SOPClassUID = ENHANCED_SR  # data set says Enhanced SR, context is Comprehensive
    no_study = simple_sr()
    del no_study.StudyInstanceUID
    garbage_uid = generate_uid()
    files = [
        _raw_file(
            tmp_path, "a", good.SOPClassUID, wrong_class.SOPInstanceUID, _explicit_body(wrong_class)
        ),
        _raw_file(
            tmp_path, "b", good.SOPClassUID, no_study.SOPInstanceUID, _explicit_body(no_study)
        ),
        # an element with a VR that does not exist: cannot be decoded
        _raw_file(tmp_path, "c", good.SOPClassUID, garbage_uid, b"\x08\x00\x16\x00ZZ\x04\x001234"),
        _raw_file(tmp_path, "d", good.SOPClassUID, good.SOPInstanceUID, _explicit_body(good)),
    ]
    ae = AE(ae_title="SCANNER1")
    ae.add_requested_context(good.SOPClassUID, ExplicitVRLittleEndian)
    assoc = ae.associate(LOOPBACK, node.port, ae_title=NODE_AE)
    assert assoc.is_established
    statuses = [int(assoc.send_c_store(f).Status) for f in files]
    assert assoc.is_established  # still up after three bad objects
    assoc.release()
    assert statuses[0] == 0xA900  # PS3.4 B.2.3: Data Set does not match SOP Class
    assert statuses[1] == 0xA900
    assert 0xC000 <= statuses[2] <= 0xCFFF  # PS3.4 B.2.3: Cannot understand
    assert statuses[3] == 0x0000
    assert [o["sop_instance_uid"] for o in node.journal.objects()] == [good.SOPInstanceUID]
    assert "not the negotiated class" in caplog.text
    assert "Study Instance UID missing" in caplog.text
    assert "cannot be decoded" in caplog.text
    wait_for(_done(node, good.StudyInstanceUID), 20)


@pytest.mark.sqlite_only
def test_store_failure_answers_out_of_resources_and_nothing_is_acknowledged(
    start_node, monkeypatch
):
    node = start_node(grade_fn=fake_grade)
    first, second = simple_sr(), simple_sr()
    # a full disk, for real: SQLite refuses to grow the journal past the pages it has
    # (https://www.sqlite.org/pragma.html#pragma_max_page_count), so the object cannot be stored
    with node.journal._lock:
        pages = node.journal._db.execute("PRAGMA page_count").fetchone()[0]
        node.journal._db.execute(f"PRAGMA max_page_count={pages}")
    first.add_new((0x0009, 0x0010), "LO", "HARBOUR VALE PADDING")
    first.add_new((0x0009, 0x1001), "OB", b"\0" * 200_000)  # more than a free page can take
    assert send([first], node.port) == [0xA700]  # PS3.4 B.2.3: Out of Resources
    assert node.journal.objects() == []
    with node.journal._lock:
        node.journal._db.execute("PRAGMA max_page_count=1073741823")
    real_tx = node.journal._tx

    def journal_broken(**kwargs):
        raise sqlite3.OperationalError("disk I/O error")

    monkeypatch.setattr(node.journal, "_tx", journal_broken)
    assert send([first], node.port) == [0xA700]
    monkeypatch.setattr(node.journal, "_tx", real_tx)
    assert send([second], node.port) == [0x0000]
    assert [o["sop_instance_uid"] for o in node.journal.objects()] == [second.SOPInstanceUID]


def test_one_node_per_data_directory(start_node, tmp_path):
    start_node(grade_fn=fake_grade)
    with pytest.raises(UserError, match="in use by another running node"):
        start_node(grade_fn=fake_grade)


def test_stop_waits_for_open_associations_then_aborts_them(start_node):
    node = start_node({"limits": {"shutdown_grace_seconds": 0.5}}, grade_fn=fake_grade)
    ae = AE(ae_title="LINGERER")
    ae.add_requested_context("1.2.840.10008.1.1")
    assoc = ae.associate(LOOPBACK, node.port, ae_title=NODE_AE)
    assert assoc.is_established
    stopper = threading.Thread(target=node.stop)
    stopper.start()
    stopper.join(30)
    assert not stopper.is_alive()
    wait_for(lambda: not assoc.is_established, 10)  # aborted after the grace period
    assert pynetdicom_echo(node.port) is None  # and no longer listening


def test_acknowledged_object_is_on_disk_as_received_in_every_transfer_syntax(start_node):
    node = start_node(grade_fn=fake_grade, settle=60)  # grading not needed here
    sent = {}
    for ts in (ImplicitVRLittleEndian, ExplicitVRLittleEndian, DeflatedExplicitVRLittleEndian):
        ds = simple_sr(patient="Syntax^Case")
        assert send([ds], node.port, transfer_syntaxes=[ts]) == [0]
        sent[ds.SOPInstanceUID] = (ts, ds)
    rows = {o["sop_instance_uid"]: o for o in node.journal.objects()}
    assert set(rows) == set(sent)
    for uid, (ts, ds) in sent.items():
        assert rows[uid]["transfer_syntax"] == ts
        stored = pydicom.dcmread(BytesIO(node.journal.object_data(uid)))
        assert stored.file_meta.TransferSyntaxUID == ts
        assert stored.SOPInstanceUID == uid
        assert stored.StudyInstanceUID == ds.StudyInstanceUID
        assert str(stored.PatientName) == "Syntax^Case"


def test_every_sr_storage_class_is_accepted_and_kept(start_node):
    # PS3.4 Table B.5-1: Basic Text, Enhanced, Comprehensive, Comprehensive 3D, Extensible and
    # Simplified Adult Echo SR Storage (the last is not in pynetdicom's default list)
    classes = [
        "1.2.840.10008.5.1.4.1.1.88.11",
        "1.2.840.10008.5.1.4.1.1.88.22",
        "1.2.840.10008.5.1.4.1.1.88.33",
        "1.2.840.10008.5.1.4.1.1.88.34",
        "1.2.840.10008.5.1.4.1.1.88.35",
        "1.2.840.10008.5.1.4.1.1.88.72",
    ]
    for uid in classes:
        assert uid in pydicom.uid.UID_dictionary  # pydicom's PS3.6 UID registry
    node = start_node(grade_fn=fake_grade, settle=60)
    datasets = []
    for uid in classes:
        ds = simple_sr()
        ds.SOPClassUID = ds.file_meta.MediaStorageSOPClassUID = uid
        datasets.append(ds)
    assert send(datasets, node.port) == [0] * len(classes)
    assert sorted(o["sop_class_uid"] for o in node.journal.objects()) == sorted(classes)


def _ct_image() -> Dataset:
    ds = Dataset()
    ds.SOPClassUID = CT_IMAGE
    ds.SOPInstanceUID = generate_uid()
    ds.StudyInstanceUID = generate_uid()
    ds.SeriesInstanceUID = generate_uid()
    ds.Modality = "CT"
    ds.Rows = ds.Columns = 2
    ds.BitsAllocated = ds.BitsStored = 8
    ds.HighBit = 7
    ds.SamplesPerPixel = 1
    ds.PixelRepresentation = 0
    ds.PhotometricInterpretation = "MONOCHROME2"
    ds.PixelData = b"\x00\x01\x02\x03"
    ds.file_meta = FileMetaDataset()
    ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
    return ds


def test_images_are_refused_by_default_and_discarded_when_configured(start_node, tmp_path):
    node = start_node(grade_fn=fake_grade)
    ae = AE(ae_title="MODALITY")
    ae.add_requested_context(CT_IMAGE, ExplicitVRLittleEndian)
    assoc = ae.associate(LOOPBACK, node.port, ae_title=NODE_AE)
    # no SR context proposed, image context refused -> no usable presentation context
    assert not assoc.is_established or not assoc.accepted_contexts
    if assoc.is_established:
        assoc.release()
    node.stop()
    images = start_node(
        {"access": {"accept_images": True}}, grade_fn=fake_grade, data_dir=tmp_path / "n2"
    )
    ct = _ct_image()
    assert send([ct], images.port, transfer_syntaxes=[ExplicitVRLittleEndian]) == [0]
    assert images.journal.objects() == []
    # discarded: no bytes kept anywhere (the journal holds them; before, a spool folder did)
    assert images.journal._query("SELECT COUNT(*) FROM object_data")[0][0] == 0
    assert not any((tmp_path / "n2").rglob("*.dcm"))


# -- the real grading pipeline end to end --------------------------------------------------------


def test_no_configuration_writes_results_to_the_folder(start_node, tmp_path):
    node = start_node()  # real pipeline, embedded defaults, no destination
    ds = echo_sr("folder-case")
    assert send([ds], node.port) == [0]
    wait_for(_done(node, ds.StudyInstanceUID), 30)
    study = node.journal.study(ds.StudyInstanceUID)
    assert study["state"] == "delivered"
    [result_file] = (tmp_path / "node" / "results").glob("*.dcm")
    result = pydicom.dcmread(result_file)
    assert result.SOPInstanceUID == study["result_uid"]
    assert result.StudyInstanceUID == ds.StudyInstanceUID  # same study, new series
    assert evidence_uids(result) == {ds.SOPInstanceUID}


def test_object_that_is_no_echo_sr_is_set_aside_with_a_note(start_node, tmp_path, capsys):
    node = start_node()  # real pipeline
    echo = echo_sr("mixed")
    empty = simple_sr(str(echo.StudyInstanceUID))  # an SR without a content tree
    assert send([echo, empty], node.port) == [0, 0]
    wait_for(_done(node, echo.StudyInstanceUID), 30)
    assert study_state(node, echo.StudyInstanceUID) == "delivered"
    [row] = node.journal.results()
    assert row["sources"] == [echo.SOPInstanceUID]
    notes = {o["sop_instance_uid"]: o["note"] for o in node.journal.objects()}
    assert notes[echo.SOPInstanceUID] == ""
    assert notes[empty.SOPInstanceUID].startswith("set aside: ")
    assert cli_main(["queue", *journal_args(node), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    [aside] = report["objects_set_aside"]
    assert aside["sop_instance_uid"] == empty.SOPInstanceUID
    assert report["recent"][0]["grade"]  # the echo SR was graded
    alone = simple_sr()
    assert send([alone], node.port) == [0]
    wait_for(_done(node, alone.StudyInstanceUID), 30)
    study = node.journal.study(alone.StudyInstanceUID)
    assert study["state"] == "failed" and study["reason"].startswith("no usable source")


def test_study_with_two_srs_gives_one_merged_result_naming_both(start_node):
    receiver = ResultReceiver("RESULTS")
    port = receiver.start()
    try:
        node = start_node(forward=[f"RESULTS@{LOOPBACK}:{port}"], settle=0.5)
        first = echo_sr(
            "merge",
            instance=1,
            content_time="101500",
            values={"mitral_e": 80.0, "mitral_a": 60.0, "e_prime_septal": 6.0},
        )
        second = echo_sr(
            "merge",
            instance=2,
            content_time="103000",
            values={"e_prime_lateral": 8.0, "tr_peak_velocity": 3.0, "lavi": 40.0, "lvef": 60.0},
        )
        assert first.StudyInstanceUID == second.StudyInstanceUID
        assert first.SOPInstanceUID != second.SOPInstanceUID
        # two associations, as two devices would send them, within the settle window
        threads = [threading.Thread(target=send, args=([d], node.port)) for d in (first, second)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(30)
        wait_for(_done(node, first.StudyInstanceUID), 30)
        wait_for(lambda: receiver.received, 10)
        assert len(node.journal.results()) == 1
        [result] = receiver.received
        assert evidence_uids(result) == {first.SOPInstanceUID, second.SOPInstanceUID}
        row = node.journal.results()[0]
        assert sorted(row["sources"]) == sorted([first.SOPInstanceUID, second.SOPInstanceUID])
        assert row["grade"] not in (None, "not-gradable")  # the merge made it gradable
    finally:
        receiver.stop()


def test_late_sr_triggers_a_regrade_that_names_the_earlier_result(start_node):
    receiver = ResultReceiver("RESULTS")
    port = receiver.start()
    try:
        node = start_node(forward=[f"RESULTS@{LOOPBACK}:{port}"])
        first = echo_sr("late", instance=1, values={"mitral_e": 80.0, "mitral_a": 60.0})
        assert send([first], node.port) == [0]
        wait_for(_done(node, first.StudyInstanceUID), 30)
        second = echo_sr("late", instance=2, content_time="110000")
        assert send([second], node.port) == [0]
        wait_for(lambda: len(receiver.uids()) == 2, 30)
        wait_for(_done(node, first.StudyInstanceUID), 30)
        old, new = receiver.received
        assert old.SOPInstanceUID != new.SOPInstanceUID
        # PS3.3 C.17.2.3: Predecessor Documents Sequence names the superseded result
        assert predecessor_uids(new) == {str(old.SOPInstanceUID)}
        assert evidence_uids(new) == {first.SOPInstanceUID, second.SOPInstanceUID}
    finally:
        receiver.stop()


@needs_dcmtk
def test_many_studies_in_parallel_associations_dcmtk_scanner_and_pacs(start_node, tmp_path):
    pacs_port, pacs_dir = free_port(), tmp_path / "pacs"
    with storescp(pacs_dir, pacs_port):
        node = start_node(forward=[f"PACS@{LOOPBACK}:{pacs_port}"], settle=0.3)
        # half of them in the Simplified Adult Echo SR class (PS3.4 B.5)
        studies = [
            echo_sr(
                f"parallel-{i}",
                patient_id=f"HV-P-{i:03d}",
                sop_class=SIMPLIFIED_ECHO_SR if i % 2 else COMPREHENSIVE_SR,
            )
            for i in range(8)
        ]
        files = [write_files([ds], tmp_path / f"scanner{i}")[0] for i, ds in enumerate(studies)]
        results: list = [None] * len(files)

        def scan(i: int) -> None:
            results[i] = run_storescu([files[i]], node.port, calling=f"SCANNER{i}")

        threads = [threading.Thread(target=scan, args=(i,)) for i in range(len(files))]
        for t in threads:
            t.start()
        for t in threads:
            t.join(90)
        assert all(r is not None and r.returncode == 0 for r in results), [
            r.stderr for r in results if r is not None and r.returncode
        ]
        uids = [ds.StudyInstanceUID for ds in studies]
        try:
            wait_for(_done(node, *uids), 60)
        except AssertionError:
            rows = [node.journal.study(u) for u in uids]
            raise AssertionError(f"studies not done: {rows}; {node.journal.deliveries()}") from None
        expected = {node.journal.study(u)["result_uid"] for u in uids}
        assert all(node.journal.study(u)["state"] == "delivered" for u in uids)
        got = wait_for(lambda: (lambda x: x if len(x) >= 8 else None)(pacs_uids(pacs_dir)), 20)
        assert sorted(got) == sorted(expected)  # each result exactly once


@needs_dcmtk
def test_resent_study_gives_no_new_instance_and_no_second_delivery(start_node, tmp_path):
    pacs_port, pacs_dir = free_port(), tmp_path / "pacs"
    with storescp(pacs_dir, pacs_port):
        node = start_node(forward=[f"PACS@{LOOPBACK}:{pacs_port}"])
        ds = echo_sr("resend")
        [path] = write_files([ds], tmp_path / "archive")
        assert run_storescu([path], node.port).returncode == 0
        wait_for(_done(node, ds.StudyInstanceUID), 30)
        first = node.journal.study(ds.StudyInstanceUID)
        wait_for(lambda: len(pacs_uids(pacs_dir)) == 1, 20)
        # the archive sends the same study again
        assert run_storescu([path], node.port, calling="ARCHIVE").returncode == 0
        wait_for(
            lambda: (
                node.journal.study(ds.StudyInstanceUID)["generation"] > first["generation"]
                and study_state(node, ds.StudyInstanceUID) == "delivered"
            ),
            30,
        )
        again = node.journal.study(ds.StudyInstanceUID)
        assert again["result_uid"] == first["result_uid"]
        assert len(node.journal.results()) == 1
        assert len(node.journal.deliveries()) == 2  # PACS + folder, each once
        assert node.journal.objects()[0]["times_received"] == 2
        assert pacs_uids(pacs_dir) == [first["result_uid"]]  # one file: delivered once


@needs_dcmtk
def test_pacs_down_then_up_every_result_is_delivered(start_node, tmp_path):
    pacs_port, pacs_dir = free_port(), tmp_path / "pacs"
    node = start_node(forward=[f"PACS@{LOOPBACK}:{pacs_port}"])
    studies = [echo_sr(f"down-{i}") for i in range(3)]
    assert send(studies, node.port) == [0, 0, 0]
    uids = [ds.StudyInstanceUID for ds in studies]

    def retried() -> bool:
        pending = [d for d in node.journal.deliveries(states=["pending"]) if d["destination"]]
        return len(pending) == 3 and all(d["attempts"] >= 2 for d in pending)

    wait_for(retried, 30)  # the PACS is down: attempts are counted, nothing is dropped
    pending = node.journal.deliveries(states=["pending"])[0]
    assert "cannot connect to PACS@127.0.0.1" in pending["last_error"]
    with storescp(pacs_dir, pacs_port):
        wait_for(_done(node, *uids), 30)
        expected = {node.journal.study(u)["result_uid"] for u in uids}
        got = wait_for(lambda: (lambda x: x if len(x) >= 3 else None)(pacs_uids(pacs_dir)), 20)
    assert sorted(got) == sorted(expected)
    assert all(study_state(node, u) == "delivered" for u in uids)


@needs_dcmtk
def test_stored_result_damaged_before_delivery_fails_with_a_reason(start_node, tmp_path):
    pacs_port, pacs_dir = free_port(), tmp_path / "pacs"
    node = start_node(forward=[f"PACS@{LOOPBACK}:{pacs_port}"])  # the PACS is down at first
    study = echo_sr("damaged-spool")
    assert send([study], node.port) == [0]

    def to_pacs(state: str) -> list[dict]:
        return [
            d
            for d in node.journal.deliveries(states=[state])
            if d["destination"] != FOLDER_DESTINATION  # the results folder's copy is apart
        ]

    wait_for(lambda: to_pacs("pending"), 30)
    (pending,) = to_pacs("pending")
    with node.journal._tx() as db:  # e.g. a disk fault after grading
        db.execute(
            "UPDATE result_data SET data = ? WHERE result_uid = ?",
            (b"not a DICOM file", pending["result_uid"]),
        )
    with storescp(pacs_dir, pacs_port):
        wait_for(lambda: to_pacs("failed"), 30)
    (failed,) = to_pacs("failed")
    assert failed["last_error"].startswith("stored result unreadable: no DICOM file meta")
    assert pacs_uids(pacs_dir) == []  # nothing was sent


@needs_dcmtk
def test_pacs_accepting_only_implicit_vr_gets_the_result_converted(start_node, tmp_path):
    # results are spooled in explicit VR little endian; a PACS that accepts only implicit VR
    # little endian (the DICOM default transfer syntax, PS3.5 10.1) gets the same data set
    # in that syntax
    pacs_port, pacs_dir = free_port(), tmp_path / "pacs"
    with storescp(pacs_dir, pacs_port, extra=["+xi"]):
        node = start_node(forward=[f"PACS@{LOOPBACK}:{pacs_port}"])
        study = echo_sr("implicit-pacs")
        assert send([study], node.port) == [0]
        wait_for(_done(node, study.StudyInstanceUID), 30)
        wait_for(lambda: pacs_uids(pacs_dir), 20)
    result = node.journal.result(node.journal.study(study.StudyInstanceUID)["result_uid"])
    spooled = pydicom.dcmread(BytesIO(node.journal.result_data(result["result_uid"])))
    (path,) = [p for p in pacs_dir.iterdir() if p.is_file()]
    with warnings.catch_warnings():
        # pydicom warns when a data set labelled implicit VR is encoded explicit VR
        warnings.simplefilter("error")
        at_pacs = pydicom.dcmread(path)
    assert at_pacs.file_meta.TransferSyntaxUID == "1.2.840.10008.1.2"  # implicit VR LE
    assert spooled.file_meta.TransferSyntaxUID == "1.2.840.10008.1.2.1"
    assert at_pacs.SOPInstanceUID == spooled.SOPInstanceUID
    assert at_pacs == spooled  # every element, value for value


def test_results_follow_the_routing_table_of_the_calling_ae(start_node):
    echo1_pacs, default_pacs = ResultReceiver("PACS_A"), ResultReceiver("PACS_B")
    port_a, port_b = echo1_pacs.start(), default_pacs.start()
    try:
        node = start_node(
            {
                "destinations": {
                    "A": {"ae_title": "PACS_A", "host": LOOPBACK, "port": port_a},
                    "B": {"ae_title": "PACS_B", "host": LOOPBACK, "port": port_b},
                },
                "routes": [
                    {"calling_ae": "ECHO1", "destinations": ["A", "B"]},
                    {"calling_ae": "*", "destinations": ["B"]},
                ],
                "delivery": {"results_folder": ""},
            },
            grade_fn=fake_grade,
        )
        from_echo1, from_other = simple_sr(), simple_sr()
        assert send([from_echo1], node.port, calling="ECHO1") == [0]
        assert send([from_other], node.port, calling="ECHO7") == [0]
        wait_for(_done(node, from_echo1.StudyInstanceUID, from_other.StudyInstanceUID), 30)
        r1 = node.journal.study(from_echo1.StudyInstanceUID)["result_uid"]
        r2 = node.journal.study(from_other.StudyInstanceUID)["result_uid"]
        assert echo1_pacs.uids() == [r1]
        assert sorted(default_pacs.uids()) == sorted([r1, r2])
    finally:
        echo1_pacs.stop()
        default_pacs.stop()


def test_attempt_limit_marks_failed_with_reason_then_requeue(start_node, tmp_path, capsys):
    pacs_port = free_port()
    node = start_node(
        {"delivery": {"max_attempts": 2, "results_folder": ""}},
        forward=[f"PACS@{LOOPBACK}:{pacs_port}"],
        grade_fn=fake_grade,
    )
    ds = simple_sr()
    assert send([ds], node.port) == [0]
    wait_for(_done(node, ds.StudyInstanceUID), 30)
    study = node.journal.study(ds.StudyInstanceUID)
    assert study["state"] == "failed"
    assert "gave up after 2 attempts" in study["reason"]
    assert cli_main(["queue", *journal_args(node)]) == 0
    out = capsys.readouterr().out
    assert "failed deliveries: 1" in out and "gave up after 2 attempts" in out
    receiver = ResultReceiver("PACS", port=pacs_port)
    receiver.start()
    try:
        assert cli_main(["queue", *journal_args(node), "--requeue-failed"]) == 0
        assert "1 failed delivery re-queued" in capsys.readouterr().out
        wait_for(lambda: study_state(node, ds.StudyInstanceUID) == "delivered", 30)
        assert receiver.uids() == [study["result_uid"]]
    finally:
        receiver.stop()


def test_queue_regrade_and_json_listing(start_node, tmp_path, capsys):
    node = start_node(grade_fn=fake_grade)
    ds = simple_sr()
    assert send([ds], node.port) == [0]
    wait_for(_done(node, ds.StudyInstanceUID), 30)
    before = node.journal.study(ds.StudyInstanceUID)
    assert cli_main(["queue", *journal_args(node), "--regrade", ds.StudyInstanceUID]) == 0
    wait_for(
        lambda: (
            node.journal.study(ds.StudyInstanceUID)["generation"] > before["generation"]
            and study_state(node, ds.StudyInstanceUID) == "delivered"
        ),
        30,
    )
    assert len(node.journal.deliveries()) == 1  # same result: not written twice
    capsys.readouterr()
    assert cli_main(["queue", *journal_args(node), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["recent"][0]["study_uid"] == ds.StudyInstanceUID
    assert report["recent"][0]["state"] == "delivered"
    assert cli_main(["queue", *journal_args(node), "--regrade", "1.2.3.999"]) == 2
    assert "unknown study" in capsys.readouterr().err
    assert cli_main(["queue", "--data-dir", str(tmp_path / "nothing")]) == 2


def test_network_demo_loop_with_the_real_pipeline(tmp_path, caplog):
    caplog.set_level(logging.INFO)
    studies = [
        echo_sr("demo-a", patient_name="Quayside^Mara", patient_id="HV-D-001"),
        echo_sr(
            "demo-b",
            patient_name="Lighthouse^Ben",
            patient_id="HV-D-002",
            values={
                "mitral_e": 50.0,
                "mitral_a": 80.0,
                "e_prime_septal": 9.0,
                "e_prime_lateral": 12.0,
                "lvef": 62.0,
            },
        ),
    ]
    rows = run_network_demo(studies, tmp_path, timeout=60)
    assert [r["patient_id"] for r in rows] == ["HV-D-001", "HV-D-002"]
    for row in rows:
        assert row["status"] == "delivered", row
        assert row["delivered"] and row["result_uid"].startswith("2.25.")
        assert row["guideline"] == "ase-eacvi-2016"
        assert row["grade"] and row["filling_pressure"]
    # logs carry UIDs, never patient names or IDs
    for secret in ("Quayside", "Lighthouse", "HV-D-001", "HV-D-002"):
        assert secret not in caplog.text
