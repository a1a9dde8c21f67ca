"""Structured logs: a node in a subprocess writes one JSON object per line, one line per event
(association opened/rejected, object received/rejected, study graded, result delivered), with
UIDs and without patient names or IDs by default; the opt-in adds them."""

from __future__ import annotations

import json
import logging

import pytest
from netutil import (
    LOOPBACK,
    NODE_AE,
    NodeProcess,
    echo_sr,
    fake_grade,
    send,
    simple_sr,
    wait_for,
    write_config,
)
from pynetdicom import AE

from service.config import apply_overrides, config_from_dict
from service.model import Outcome
from service.network.demo_loop import ResultReceiver
from service.network.service import Node
from service.observability.logs import JsonLineFormatter

pytestmark = pytest.mark.network

PATIENT_NAME = "Quillfeather^Marisol"  # invented
PATIENT_ID = "HV-PRIV-7731"  # invented


def _lines(text: str) -> list[dict]:
    out = []
    for line in text.splitlines():
        if line.strip():
            out.append(json.loads(line))  # every line is one JSON object
    return out


def test_json_lines_carry_events_and_uids_but_no_patient_identity(tmp_path):
    pacs = ResultReceiver("HV_PACS")
    pacs.start()
    cfg = write_config(
        tmp_path / "node.toml",
        f'[logging]\nformat = "json"\n\n[destinations.PACS]\nae_title = "HV_PACS"\n'
        f'host = "{LOOPBACK}"\nport = {pacs.port}\n',
    )
    node = NodeProcess(
        tmp_path / "data", ["--config", str(cfg), "--port", "0", "--settle-seconds", "0"]
    )
    try:
        port = node.start()
        ae = AE(ae_title="HV_ECHO1")
        ae.acse_timeout = 5
        ae.add_requested_context("1.2.840.10008.1.1")
        assert ae.associate(LOOPBACK, port, ae_title="SOMEONE_ELSE").is_rejected
        good = echo_sr("logs", patient_name=PATIENT_NAME, patient_id=PATIENT_ID)
        bad = simple_sr(patient=PATIENT_NAME, patient_id=PATIENT_ID)
        del bad.StudyInstanceUID
        assert send([good, bad], port, calling="HV_ECHO1") == [0, 0xA900]
        wait_for(lambda: len(pacs.received) == 1, 60)
        wait_for(lambda: '"result_delivered"' in node.log(), 20)
        assert node.terminate() == 0
    finally:
        node.kill()
        pacs.stop()
    text = node.log()
    records = _lines(text)
    events = {r["event"] for r in records}
    for name in (
        "node_ready",
        "association_rejected",
        "association_opened",
        "object_received",
        "object_rejected",
        "study_graded",
        "result_delivered",
    ):
        assert name in events, name
    received = next(r for r in records if r["event"] == "object_received")
    assert received["sop_instance_uid"] == str(good.SOPInstanceUID)
    assert received["study_uid"] == str(good.StudyInstanceUID)
    assert received["calling_ae"] == "HV_ECHO1"
    graded = next(r for r in records if r["event"] == "study_graded")
    # what the study concluded, as an Outcome token (docs/vocabulary.md)
    assert graded["outcome"] in {o.value for o in Outcome} and graded["result_uid"]
    assert graded["status"] in ("graded", "not-gradable")
    rejected = next(r for r in records if r["event"] == "association_rejected")
    assert rejected["address"] == LOOPBACK and rejected["called_ae"] == "SOMEONE_ELSE"
    # no patient identity anywhere, in any form (DICOM PN components, the ID)
    for piece in ("Quillfeather", "Marisol", PATIENT_ID):
        assert piece not in text


def test_patient_identifiers_only_when_asked_for(tmp_path, caplog):
    caplog.set_level(logging.INFO, logger="diastolic_sr")
    cfg = apply_overrides(
        config_from_dict(
            {"logging": {"include_patient_identifiers": True}, "http": {"enabled": False}}
        ),
        port=0,
        bind=LOOPBACK,
        data_dir=str(tmp_path / "node"),
        settle_seconds=0,
    )
    node = Node(cfg, grade_fn=fake_grade, poll_seconds=0.05)
    node.start()
    try:
        ds = simple_sr(patient=PATIENT_NAME, patient_id=PATIENT_ID)
        assert send([ds], node.port, called=NODE_AE) == [0]
    finally:
        node.stop()
    fmt = JsonLineFormatter()
    received = [
        json.loads(fmt.format(r))
        for r in caplog.records
        if getattr(r, "event", "") == "object_received"
    ]
    assert received and received[0]["patient_name"] == PATIENT_NAME
    assert received[0]["patient_id"] == PATIENT_ID


def test_pynetdicom_per_message_log_handlers_are_not_bound(monkeypatch):
    # pynetdicom _config.LOG_HANDLER_LEVEL (its documented switch): "none" binds no standard
    # handlers for EVT_DIMSE_RECV/SENT and EVT_PDU_RECV/SENT; their INFO/DEBUG lines would be
    # dropped anyway (the pynetdicom logger is kept at WARNING)
    from pynetdicom import _config, evt
    from pynetdicom._handlers import standard_dimse_recv_handler
    from pynetdicom.association import Association

    from service.observability.logs import NOISY_LOGGERS, configure_logging

    monkeypatch.setattr(_config, "LOG_HANDLER_LEVEL", "standard")
    root = logging.getLogger()
    handlers, level = root.handlers[:], root.level
    before_noisy = {n: logging.getLogger(n).level for n in NOISY_LOGGERS}
    try:
        bound = Association(AE(), mode="requestor").get_handlers(evt.EVT_DIMSE_RECV)
        assert (standard_dimse_recv_handler, None) in bound  # the library's default
        configure_logging("json", "INFO")
        assert logging.getLogger("pynetdicom").level == logging.WARNING
        for event_type in (evt.EVT_DIMSE_RECV, evt.EVT_DIMSE_SENT, evt.EVT_PDU_RECV):
            assert Association(AE(), mode="requestor").get_handlers(event_type) == []
    finally:
        root.handlers[:] = handlers
        root.setLevel(level)
        for name, level in before_noisy.items():
            logging.getLogger(name).setLevel(level)
