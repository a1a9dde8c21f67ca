"""The one-page summary (DICOM Encapsulated PDF) delivered with the result SR, on or off per
destination: it follows the result SR on the same association, is journaled like any delivery
and is written to the results folder.  Real grading pipeline, loopback peers."""

from __future__ import annotations

import pydicom
import pytest
from netutil import LOOPBACK, echo_sr, send, wait_for

from service.config import apply_overrides, config_from_dict
from service.network.demo_loop import ResultReceiver
from service.network.service import Node

pytestmark = pytest.mark.network

ENCAPSULATED_PDF = "1.2.840.10008.5.1.4.1.1.104.1"  # PS3.4 Annex B.5, Encapsulated PDF Storage
COMPREHENSIVE_SR = "1.2.840.10008.5.1.4.1.1.88.33"  # PS3.4 Annex B.5


def _node(tmp_path, destinations: dict, **delivery) -> Node:
    cfg = apply_overrides(
        config_from_dict(
            {
                "destinations": destinations,
                "http": {"enabled": False},
                "delivery": {
                    "backoff_initial_seconds": 0.1,
                    "backoff_max_seconds": 0.4,
                    **delivery,
                },
            }
        ),
        port=0,
        bind=LOOPBACK,
        data_dir=str(tmp_path / "node"),
        settle_seconds=0,
    )
    node = Node(cfg, poll_seconds=0.05)
    node.start()
    return node


def test_summary_pdf_follows_the_result_to_destinations_that_ask_for_it(tmp_path):
    with_pdf = ResultReceiver("HV_PACS", extra_classes=[ENCAPSULATED_PDF])
    without = ResultReceiver("HV_ARCHIVE")  # does not even accept the PDF class
    with_pdf.start()
    without.start()
    node = None
    try:
        node = _node(
            tmp_path,
            {
                "PACS_MAIN": {
                    "ae_title": "HV_PACS",
                    "host": LOOPBACK,
                    "port": with_pdf.port,
                    "summary_pdf": True,
                },
                "ARCHIVE": {"ae_title": "HV_ARCHIVE", "host": LOOPBACK, "port": without.port},
            },
        )
        source = echo_sr("summary-delivery")
        assert send([source], node.port) == [0]
        study = str(source.StudyInstanceUID)
        wait_for(lambda: (node.journal.study(study) or {}).get("state") == "delivered", 60)

        classes = [str(ds.SOPClassUID) for ds in with_pdf.received]
        assert classes == [COMPREHENSIVE_SR, ENCAPSULATED_PDF]  # the SR first, then its summary
        assert [str(ds.SOPClassUID) for ds in without.received] == [COMPREHENSIVE_SR]
        sr, pdf = with_pdf.received
        assert pdf.StudyInstanceUID == sr.StudyInstanceUID == source.StudyInstanceUID
        assert pdf.SeriesInstanceUID != sr.SeriesInstanceUID  # a series of its own
        assert pdf.MIMETypeOfEncapsulatedDocument == "application/pdf"
        assert bytes(pdf.EncapsulatedDocument).startswith(b"%PDF")
        assert pdf.PatientName == source.PatientName

        # journaled like any delivery: SR to both peers and the folder, PDF to PACS and folder
        rows = node.journal.deliveries(states=["delivered"])
        by_result: dict[str, set[str]] = {}
        for r in rows:
            by_result.setdefault(r["result_uid"], set()).add(r["destination"])
        assert by_result[str(sr.SOPInstanceUID)] == {"PACS_MAIN", "ARCHIVE", "(folder)"}
        assert by_result[str(pdf.SOPInstanceUID)] == {"PACS_MAIN", "(folder)"}
        folder = node.config.results_dir
        written = {
            str(pydicom.dcmread(p, stop_before_pixels=True).SOPClassUID)
            for p in folder.glob("*.dcm")
        }
        assert written == {COMPREHENSIVE_SR, ENCAPSULATED_PDF}
    finally:
        if node is not None:
            node.stop()
        with_pdf.stop()
        without.stop()


def test_no_summary_when_no_destination_asks_for_it(tmp_path):
    pacs = ResultReceiver("HV_PACS", extra_classes=[ENCAPSULATED_PDF])
    pacs.start()
    node = None
    try:
        node = _node(
            tmp_path, {"PACS_MAIN": {"ae_title": "HV_PACS", "host": LOOPBACK, "port": pacs.port}}
        )
        source = echo_sr("summary-off")
        assert send([source], node.port) == [0]
        study = str(source.StudyInstanceUID)
        wait_for(lambda: (node.journal.study(study) or {}).get("state") == "delivered", 60)
        assert [str(ds.SOPClassUID) for ds in pacs.received] == [COMPREHENSIVE_SR]
        assert all(r["sop_class_uid"] != ENCAPSULATED_PDF for r in node.journal.results())
    finally:
        if node is not None:
            node.stop()
        pacs.stop()


def test_a_failed_summary_delivery_fails_the_study_with_its_reason(tmp_path):
    pacs = ResultReceiver("HV_PACS")  # refuses the Encapsulated PDF class
    pacs.start()
    node = None
    try:
        node = _node(
            tmp_path,
            {
                "PACS_MAIN": {
                    "ae_title": "HV_PACS",
                    "host": LOOPBACK,
                    "port": pacs.port,
                    "summary_pdf": True,
                }
            },
            max_attempts=1,
            results_folder="",
        )
        source = echo_sr("summary-refused")
        assert send([source], node.port) == [0]
        study = str(source.StudyInstanceUID)
        wait_for(lambda: (node.journal.study(study) or {}).get("state") == "failed", 60)
        assert [str(ds.SOPClassUID) for ds in pacs.received] == [COMPREHENSIVE_SR]
        reason = node.journal.study(study)["reason"]
        # the reason names the object whose delivery failed (its kind and UID)
        assert reason.startswith("delivery of summary PDF ") and " to PACS_MAIN: " in reason
    finally:
        if node is not None:
            node.stop()
        pacs.stop()


class _RefusesSR(ResultReceiver):
    """A peer that answers 0xA700 (out of resources, PS3.4 Annex B.2.3) to SR objects."""

    def _on_store(self, event):
        if str(event.context.abstract_syntax) == COMPREHENSIVE_SR:
            return 0xA700
        return super()._on_store(event)


def test_the_summary_never_goes_where_its_result_sr_did_not_arrive(tmp_path):
    pacs = _RefusesSR("HV_PACS", extra_classes=[ENCAPSULATED_PDF])
    pacs.start()
    node = None
    try:
        node = _node(
            tmp_path,
            {
                "PACS_MAIN": {
                    "ae_title": "HV_PACS",
                    "host": LOOPBACK,
                    "port": pacs.port,
                    "summary_pdf": True,
                }
            },
            max_attempts=2,
        )
        source = echo_sr("summary-orphan")
        assert send([source], node.port) == [0]
        study = str(source.StudyInstanceUID)
        wait_for(lambda: (node.journal.study(study) or {}).get("state") == "failed", 60)
        # the SR's delivery can give up a moment before its summary's: wait for both
        wait_for(lambda: len(node.journal.deliveries(states=["failed"])) >= 2, 60)
        assert pacs.received == []  # no summary without its SR
        failed = node.journal.deliveries(states=["failed"])
        assert len(failed) == 2  # the SR and its summary, both with reasons
        assert any("is not delivered there yet" in d["last_error"] for d in failed)
        assert any("0xA700" in d["last_error"] for d in failed)
        # the queue names each object (kind and UID) with its own reason
        from service.commands.queue import build_report

        report = build_report(node.journal, recent=5)
        listed = {(d["kind"], d["uid"]): d["reason"] for d in report["deliveries_failed"]}
        result_uid = node.journal.study(study)["result_uid"]
        [pdf_uid] = [uid for kind, uid in listed if kind == "summary PDF"]
        assert set(listed) == {("result SR", result_uid), ("summary PDF", pdf_uid)}
        assert "0xA700" in listed[("result SR", result_uid)]
        assert "not delivered there yet" in listed[("summary PDF", pdf_uid)]
        [entry] = report["failed"]
        assert entry["result_uid"] == result_uid
        lines = entry["failed_deliveries"]
        assert len(lines) == 2
        assert any(x.startswith(f"result SR {result_uid} to PACS_MAIN: ") for x in lines)
        assert any(x.startswith(f"summary PDF {pdf_uid} to PACS_MAIN: ") for x in lines)
    finally:
        if node is not None:
            node.stop()
        pacs.stop()
