"""Results delivered by STOW-RS to a destination that is a DICOMweb base URL.

Peer: Orthanc 1.10 (Debian) with its DICOMweb plugin, with HTTP basic authentication turned on
(``AuthenticationEnabled``, ``RegisteredUsers``).  The response format checked by the unit
tests is the Store Instances Response Module of PS3.18 Table 10.5.3-1 (Referenced SOP Sequence
(0008,1199), Failed SOP Sequence (0008,1198) with Failure Reason (0008,1197), Warning Reason
(0008,1196)); the bearer header is RFC 6750 section 2.1."""

from __future__ import annotations

import base64
import logging

import pytest
from netutil import echo_sr, send, wait_for
from orthancutil import ORTHANC_REASON, SKIP_WITHOUT_ORTHANC, Orthanc
from pydicom import Dataset

from service.dicomweb.stow import StowOutcome, _read_response

USER = ("hv-node", "Harbour-Vale-s3cret")
PDF = "1.2.840.10008.5.1.4.1.1.104.1"

needs_orthanc = pytest.mark.skipif(SKIP_WITHOUT_ORTHANC, reason=ORTHANC_REASON)


@pytest.fixture(scope="module")
def orthanc(tmp_path_factory):
    server = Orthanc(tmp_path_factory.mktemp("orthanc"), user=USER)
    server.start()
    yield server
    server.stop()


def _web_destination(orthanc, password=USER[1], **extra):
    return {
        "url": orthanc.dicomweb_url,
        "username": USER[0],
        "password": password,
        **extra,
    }


def _secrets() -> list[str]:
    basic = base64.b64encode(f"{USER[0]}:{USER[1]}".encode()).decode()
    return [USER[1], basic]


@needs_orthanc
@pytest.mark.network
@pytest.mark.external
def test_results_and_summaries_go_by_stow_rs_with_basic_authentication_never_logged(
    orthanc, loopback_nodes, caplog
):
    caplog.set_level(logging.DEBUG)  # every logger, every level: no secret anywhere
    for name in ("dicomweb_client", "urllib3", "requests"):
        caplog.set_level(logging.DEBUG, logger=name)
    node = loopback_nodes.start(
        {
            "assembly": {"workers": 1},
            "destinations": {"HV_WEB": _web_destination(orthanc, summary_pdf=True)},
        }
    )
    ds = echo_sr("stow-basic")
    assert send([ds], node.port) == [0]
    study = str(ds.StudyInstanceUID)
    wait_for(lambda: (node.journal.study(study) or {}).get("state") == "delivered", 120)

    web = [d for d in node.journal.deliveries() if d["destination"] == "HV_WEB"]
    assert len(web) == 2 and {d["state"] for d in web} == {"delivered"}
    assert {d["target"] for d in web} == {orthanc.dicomweb_url}  # the URL, no credential
    stored = {
        i["MainDicomTags"]["SOPInstanceUID"]: i for i in orthanc.study_instances(study)
    }  # Orthanc's REST API: what it holds
    results = [r["result_uid"] for r in node.journal.results(study)]
    assert set(results) <= set(stored), (results, list(stored))
    log_text = "\n".join(f"{r.name} {r.getMessage()} {r.__dict__}" for r in caplog.records)
    for secret in _secrets():
        assert secret not in log_text


@needs_orthanc
@pytest.mark.network
@pytest.mark.external
def test_a_wrong_password_fails_with_the_http_status_and_is_retried_like_c_store(
    orthanc, loopback_nodes
):
    node = loopback_nodes.start(
        {
            "assembly": {"workers": 1},
            "destinations": {"HV_WEB": _web_destination(orthanc, password="wrong")},
            "delivery": {"max_attempts": 2, "backoff_initial_seconds": 0.1},
        }
    )
    ds = echo_sr("stow-401")
    assert send([ds], node.port) == [0]
    study = str(ds.StudyInstanceUID)
    wait_for(lambda: (node.journal.study(study) or {}).get("state") == "failed", 120)
    row = node.journal.study(study)
    assert "to HV_WEB: gave up after 2 attempts" in row["reason"]
    assert "HTTP 401" in row["reason"] and "check the username/password" in row["reason"]
    (web,) = [d for d in node.journal.deliveries() if d["destination"] == "HV_WEB"]
    assert web["attempts"] == 2 and web["last_error"].startswith("gave up after 2 attempts")
    assert "wrong" not in row["reason"]
    assert orthanc.study_instances(study) == []


@needs_orthanc
@pytest.mark.network
@pytest.mark.external
def test_a_stopped_dicomweb_destination_is_retried_until_it_is_back(orthanc, loopback_nodes):
    node = loopback_nodes.start(
        {
            "assembly": {"workers": 1},
            "destinations": {"HV_WEB": _web_destination(orthanc)},
            "delivery": {
                "max_attempts": 1000,
                "backoff_initial_seconds": 0.2,
                "backoff_max_seconds": 0.5,
            },
        }
    )
    orthanc.stop()
    try:
        ds = echo_sr("stow-down")
        assert send([ds], node.port) == [0]
        study = str(ds.StudyInstanceUID)

        def retrying():
            rows = [d for d in node.journal.deliveries() if d["destination"] == "HV_WEB"]
            return rows and rows[0]["attempts"] >= 2 and rows[0]

        row = wait_for(retrying, 120)
        assert row["state"] == "pending"
        assert row["last_error"].startswith(f"cannot connect to STOW-RS to {orthanc.dicomweb_url}")
    finally:
        orthanc.start()
    wait_for(lambda: (node.journal.study(study) or {}).get("state") == "delivered", 120)
    assert orthanc.study_instances(study)


@needs_orthanc
@pytest.mark.network
@pytest.mark.external
def test_one_object_the_server_refuses_does_not_hold_back_the_others(orthanc):
    import io

    from service.config import DicomwebDestinationConfig
    from service.dicomweb.stow import store_files

    def part10(ds: Dataset) -> bytes:
        out = io.BytesIO()
        ds.save_as(out, enforce_file_format=True)
        return out.getvalue()

    good, bad = echo_sr("stow-good"), echo_sr("stow-bad")
    del bad.StudyInstanceUID  # Orthanc refuses it, and with it the whole request (HTTP 400)
    dest = DicomwebDestinationConfig(url=orthanc.dicomweb_url, username=USER[0], password=USER[1])
    outcomes = store_files(dest, [part10(bad), part10(good), b"not DICOM"])
    assert [o.stored for o in outcomes] == [False, True, False]
    assert "HTTP 400" in outcomes[0].reason
    assert outcomes[2].reason.startswith("stored object unreadable")
    assert orthanc.study_instances(str(good.StudyInstanceUID))


def test_the_store_instances_response_gives_one_outcome_per_object():
    # PS3.18 Table 10.5.3-1: Referenced SOP Sequence and Failed SOP Sequence items
    response = Dataset()
    ok, warned, failed = Dataset(), Dataset(), Dataset()
    ok.ReferencedSOPClassUID = warned.ReferencedSOPClassUID = "1.2.840.10008.5.1.4.1.1.88.33"
    failed.ReferencedSOPClassUID = PDF
    ok.ReferencedSOPInstanceUID = "1.2.3.1"
    warned.ReferencedSOPInstanceUID = "1.2.3.2"
    warned.WarningReason = 0xB000  # PS3.4 Annex B.2.3: coercion of data elements
    failed.ReferencedSOPInstanceUID = "1.2.3.3"
    failed.FailureReason = 0xA700  # out of resources
    response.ReferencedSOPSequence = [ok, warned]
    response.FailedSOPSequence = [failed]
    by_uid = _read_response(response, "STOW-RS to https://pacs.example/dicom-web")
    assert by_uid["1.2.3.1"] == StowOutcome("1.2.3.1", True, "")
    assert by_uid["1.2.3.2"].stored and "warning 0xB000" in by_uid["1.2.3.2"].reason
    assert not by_uid["1.2.3.3"].stored
    assert "failure reason 0xA700 (refused: out of resources)" in by_uid["1.2.3.3"].reason


def test_a_bearer_token_goes_in_the_authorization_header_and_never_in_its_repr():
    import requests

    from service.config import DicomwebDestinationConfig
    from service.dicomweb.session import BearerToken, session_for

    session = session_for(
        DicomwebDestinationConfig(url="https://pacs.example/dicom-web", token="tok-123")
    )
    assert isinstance(session.auth, BearerToken)
    prepared = session.prepare_request(requests.Request("GET", "https://pacs.example/x"))
    assert prepared.headers["Authorization"] == "Bearer tok-123"  # RFC 6750 section 2.1
    assert "tok-123" not in repr(session.auth)
    assert session.verify is True and session.trust_env is False
