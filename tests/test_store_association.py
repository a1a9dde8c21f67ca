"""The node's C-STORE service user (service/network/store_association.py).

Its PDUs and command sets are decoded by independent implementations (pynetdicom's PDU
classes, pydicom's data set reader) and checked against DICOM PS3.8 (upper layer: A-ASSOCIATE-RQ
9.3.2, P-DATA-TF 9.3.5 and Annex E.2, A-ASSOCIATE-RJ 9.3.4 Table 9-21) and PS3.7 (C-STORE-RQ
Table 9.3-1, command set encoding 6.3.1, DIMSE status 9.1.1.1.9).  Then it talks to real
peers: DCMTK ``storescp`` (with a small maximum PDU and implicit VR only) and pynetdicom
acceptors that answer with failure statuses, reject, abort or never answer.  Every wait is
bounded by the timeouts given.
"""

from __future__ import annotations

import io
import socket
import threading
import time
from pathlib import Path

import pydicom
import pytest
from netutil import (
    COMPREHENSIVE_SR,
    DCMTK_REASON,
    LOOPBACK,
    SKIP_WITHOUT_DCMTK,
    echo_sr,
    free_port,
    pacs_uids,
    storescp,
    wait_for,
    write_files,
)
from pydicom.filereader import read_dataset
from pydicom.uid import ExplicitVRLittleEndian, ImplicitVRLittleEndian
from pynetdicom import evt
from pynetdicom.pdu import A_ASSOCIATE_RQ, P_DATA_TF

from service.network.demo_loop import ResultReceiver
from service.network.store_association import (
    IMPLEMENTATION_CLASS_UID,
    IMPLEMENTATION_VERSION_NAME,
    AssociationFailed,
    CannotConnect,
    Proposal,
    StoreAssociation,
    Timeouts,
    associate_rq,
    c_store_rq,
    p_data_pdus,
)
from service.sr.read import file_body_start

needs_dcmtk = pytest.mark.skipif(SKIP_WITHOUT_DCMTK, reason=DCMTK_REASON)

ENHANCED_SR = "1.2.840.10008.5.1.4.1.1.88.22"
ENCAPSULATED_PDF = "1.2.840.10008.5.1.4.1.1.104.1"
QUICK = Timeouts(connect=5, acse=5, dimse=5, network=5)


def _proposals(*sop_classes: str) -> list[Proposal]:
    return [Proposal(s, (ExplicitVRLittleEndian, ImplicitVRLittleEndian)) for s in sop_classes]


def _open(port: int, *, called: str = "PACS", timeouts: Timeouts = QUICK, classes=None):
    return StoreAssociation.open(
        LOOPBACK,
        port,
        calling_ae="DIASTOLIC_SR",
        called_ae=called,
        proposals=_proposals(*(classes or [COMPREHENSIVE_SR])),
        max_pdu=16382,
        timeouts=timeouts,
    )


def _part10(tmp_path: Path, seed: str = "scu-1", copies: int = 1):
    """An invented echo SR as a Part 10 file; ``copies``: its content repeated to make it
    larger (for fragmenting)."""
    ds = echo_sr(seed)
    ds.ContentSequence = list(ds.ContentSequence) * copies
    (path,) = write_files([ds], tmp_path / "out")
    data = path.read_bytes()
    return ds, data, memoryview(data)[file_body_start(data) :]


# -- encoding, decoded by independent implementations ---------------------------------------


def test_associate_rq_decodes_with_pynetdicom():
    raw = associate_rq(
        "DIASTOLIC_SR",
        "PACS_MAIN",
        [
            Proposal(COMPREHENSIVE_SR, (ExplicitVRLittleEndian, ImplicitVRLittleEndian)),
            *_proposals(ENHANCED_SR),
        ],
        16382,
    )
    pdu = A_ASSOCIATE_RQ()
    pdu.decode(raw)
    assert pdu.pdu_length == len(raw) - 6  # PS3.8 9.3.2: length after the 6-byte header
    assert pdu.protocol_version == 1
    assert pdu.called_ae_title.strip() == "PACS_MAIN"
    assert pdu.calling_ae_title.strip() == "DIASTOLIC_SR"
    assert pdu.application_context_name == "1.2.840.10008.3.1.1.1"  # PS3.7 Annex A.2.1
    contexts = pdu.presentation_context
    assert [cx.context_id for cx in contexts] == [1, 3]  # odd IDs (PS3.8 9.3.2.2)
    assert [str(cx.abstract_syntax) for cx in contexts] == [COMPREHENSIVE_SR, ENHANCED_SR]
    assert [str(t) for t in contexts[0].transfer_syntax] == [
        ExplicitVRLittleEndian,
        ImplicitVRLittleEndian,
    ]
    user = {type(i).__name__: i for i in pdu.user_information.user_data}
    assert user["MaximumLengthSubItem"].maximum_length_received == 16382
    assert str(user["ImplementationClassUIDSubItem"].implementation_class_uid) == (
        IMPLEMENTATION_CLASS_UID
    )
    assert user["ImplementationVersionNameSubItem"].implementation_version_name == (
        IMPLEMENTATION_VERSION_NAME
    )
    # PS3.5 Annex B.2: UUID-derived UIDs are "2.25." and a decimal integer; at most 64 chars
    assert IMPLEMENTATION_CLASS_UID.startswith("2.25.") and len(IMPLEMENTATION_CLASS_UID) <= 64
    assert len(IMPLEMENTATION_VERSION_NAME) <= 16  # PS3.7 D.3.3.2


def test_c_store_rq_command_set_reads_back_with_pydicom():
    sop_instance = "1.2.3.4.5"  # odd length: padded with one NULL (PS3.5 9.1)
    raw = c_store_rq(7, COMPREHENSIVE_SR, sop_instance)
    cmd = read_dataset(io.BytesIO(raw), is_implicit_VR=True, is_little_endian=True)
    assert cmd.CommandGroupLength == len(raw) - 12  # the bytes after (0000,0000) itself
    assert cmd.CommandField == 0x0001  # C-STORE-RQ (PS3.7 Table E.1-1)
    assert cmd.MessageID == 7
    assert cmd.Priority == 0x0000  # MEDIUM
    assert cmd.CommandDataSetType != 0x0101  # 0x0101 would mean "no data set"
    assert cmd.AffectedSOPClassUID == COMPREHENSIVE_SR
    assert cmd.AffectedSOPInstanceUID == sop_instance
    tags = [int(e.tag) for e in cmd]
    assert tags == sorted(tags)  # ascending tag order (PS3.5 7.1)
    assert len(raw) % 2 == 0


@pytest.mark.parametrize("size", [0, 1, 4090, 4096, 4097, 20_000])
def test_p_data_fragments_respect_the_peers_maximum_pdu(size):
    data = bytes(range(256)) * (size // 256) + bytes(size % 256)
    pdus = p_data_pdus(5, 0x00, data, 4096)
    joined, flags = b"", []
    for raw in pdus:
        pdu = P_DATA_TF()
        pdu.decode(raw)
        assert pdu.pdu_length <= 4096  # no PDU longer than the peer accepts (PS3.8 9.3.5)
        for pdv in pdu.presentation_data_value_items:
            assert pdv.context_id == 5
            joined += pdv.data[1:]
            flags.append(pdv.data[0])
    assert joined == data
    # message control header (PS3.8 Annex E.2): data set (bit 0 clear), last fragment bit 1
    # on the last one only
    assert flags == [0x00] * (len(flags) - 1) + [0x02]
    (command,) = p_data_pdus(1, 0x01, b"x" * 10, 4096)
    assert command[-11] == 0x03  # command, last fragment


# -- real peers -----------------------------------------------------------------------------


@needs_dcmtk
def test_dcmtk_storescp_with_a_small_pdu_stores_the_object_unchanged(tmp_path):
    ds, _, body = _part10(tmp_path, copies=12)
    port = free_port()
    with storescp(tmp_path / "pacs", port, extra=["-pdu", "4096"]):
        assoc = _open(port)
        assert assoc.peer_max_pdu == 4096  # what storescp announced; the object is over 4× that
        assert len(body) > 4 * 4096
        cx = assoc.context_for(COMPREHENSIVE_SR, ExplicitVRLittleEndian)
        assert cx is not None
        response = assoc.store(cx, ds.SOPInstanceUID, body)
        second = assoc.store(cx, ds.SOPInstanceUID, body)  # message IDs go on
        assoc.release()
        assert not assoc.is_established
        wait_for(lambda: len(pacs_uids(tmp_path / "pacs")) == 2, 10)
    assert (response.status, second.status) == (0x0000, 0x0000)  # PS3.7 C.4.2: success
    stored = next(p for p in (tmp_path / "pacs").iterdir() if p.is_file()).read_bytes()
    # storescp +B writes the data set as received: byte for byte what was sent
    assert stored[file_body_start(stored) :] == bytes(body)


@needs_dcmtk
def test_dcmtk_storescp_accepting_only_implicit_vr(tmp_path):
    port = free_port()
    with storescp(tmp_path / "pacs", port, extra=["+xi"]):
        assoc = _open(port)
        (cx,) = assoc.accepted_contexts
        assert (cx.abstract_syntax, cx.transfer_syntax) == (
            COMPREHENSIVE_SR,
            ImplicitVRLittleEndian,
        )
        assert assoc.context_for(COMPREHENSIVE_SR, ExplicitVRLittleEndian) is None
        assoc.release()


class _Acceptor(ResultReceiver):
    """The demo's storage SCP (pynetdicom, every SR storage class) for one test, which also
    notes each requestor's implementation identifiers and each release; ``answer`` decides
    each C-STORE."""

    def __init__(self, answer, *, require_called: bool = False):
        super().__init__("PACS")
        self._ae.require_called_aet = require_called
        self._ae.acse_timeout = self._ae.dimse_timeout = self._ae.network_timeout = 5
        self.requestors: list[tuple[str, str]] = []
        self.released = threading.Event()
        self._answer = answer
        self.start()

    def _on_store(self, event):
        requestor = event.assoc.requestor
        self.requestors.append(
            (str(requestor.implementation_class_uid), requestor.implementation_version_name)
        )
        super()._on_store(event)  # keeps the data set
        return self._answer(event)

    def _handlers(self):
        return [*super()._handlers(), (evt.EVT_RELEASED, lambda e: self.released.set())]


@pytest.fixture
def acceptor():
    made = []

    def make(answer=lambda e: 0x0000, **kw):
        a = _Acceptor(answer, **kw)
        made.append(a)
        return a

    yield make
    for a in made:
        a.stop()


def test_pynetdicom_acceptor_receives_the_same_data_set(acceptor, tmp_path):
    ds, _, body = _part10(tmp_path)
    peer = acceptor()
    assoc = _open(peer.port)
    response = assoc.store(assoc.context_for(COMPREHENSIVE_SR), ds.SOPInstanceUID, body)
    assoc.release()
    assert response.status == 0x0000 and response.error_comment is None
    (got,) = peer.received
    assert got.SOPInstanceUID == ds.SOPInstanceUID
    assert got.ContentSequence == ds.ContentSequence
    assert peer.requestors == [(IMPLEMENTATION_CLASS_UID, IMPLEMENTATION_VERSION_NAME)]
    assert peer.released.wait(5)  # A-RELEASE, not an abort


def test_failure_status_and_error_comment_are_returned(acceptor, tmp_path):
    ds, _, body = _part10(tmp_path)

    def refuse(event):
        status = pydicom.Dataset()
        status.Status = 0xA700  # Refused: out of resources (PS3.4 B.2.3)
        status.ErrorComment = "archive full"
        return status

    peer = acceptor(refuse)
    assoc = _open(peer.port)
    response = assoc.store(assoc.context_for(COMPREHENSIVE_SR), ds.SOPInstanceUID, body)
    assert (response.status, response.error_comment) == (0xA700, "archive full")
    assert assoc.is_established  # a failure status does not end the association
    assoc.release()


def test_rejection_names_result_source_and_reason(acceptor):
    peer = acceptor(require_called=True)
    with pytest.raises(AssociationFailed) as err:
        _open(peer.port, called="NOT_THE_PACS")
    assert err.value.rejected
    # PS3.8 Table 9-21: result 1 permanent, source 1 service-user, reason 7 called AE title
    assert str(err.value) == "rejected-permanent, service-user: called AE title not recognised"


def test_no_accepted_context_is_a_failure(acceptor):
    peer = acceptor()  # SR storage only: Encapsulated PDF Storage (PS3.4 B.5) is not supported
    with pytest.raises(AssociationFailed, match="no proposed presentation context"):
        _open(peer.port, classes=[ENCAPSULATED_PDF])
    assert peer.released.wait(5)  # the association was released, not left open


def test_peer_abort_during_a_c_store(acceptor, tmp_path):
    ds, _, body = _part10(tmp_path)

    def abort(event):
        event.assoc.abort()
        return 0x0000

    peer = acceptor(abort)
    assoc = _open(peer.port)
    with pytest.raises(AssociationFailed, match=r"aborted|closed"):
        assoc.store(assoc.context_for(COMPREHENSIVE_SR), ds.SOPInstanceUID, body)
    assert not assoc.is_established
    with pytest.raises(AssociationFailed, match="no longer established"):
        assoc.store(assoc.context_for(COMPREHENSIVE_SR), ds.SOPInstanceUID, body)


def test_slow_response_times_out_within_the_dimse_timeout(acceptor, tmp_path):
    ds, _, body = _part10(tmp_path)
    hold = threading.Event()

    def stall(event):
        hold.wait(10)
        return 0x0000

    peer = acceptor(stall)
    assoc = _open(peer.port, timeouts=Timeouts(connect=5, acse=5, dimse=0.5, network=5))
    t0 = time.monotonic()
    try:
        with pytest.raises(AssociationFailed, match="timed out waiting for the C-STORE"):
            assoc.store(assoc.context_for(COMPREHENSIVE_SR), ds.SOPInstanceUID, body)
    finally:
        hold.set()
    assert time.monotonic() - t0 < 3
    assert not assoc.is_established


def test_silent_peer_times_out_within_the_acse_timeout():
    with socket.socket() as server:
        server.bind((LOOPBACK, 0))
        server.listen(1)
        port = server.getsockname()[1]
        t0 = time.monotonic()
        with pytest.raises(AssociationFailed, match="timed out during association set-up"):
            _open(port, timeouts=Timeouts(connect=5, acse=0.5, dimse=5, network=5))
        assert time.monotonic() - t0 < 3


def test_nothing_listening():
    with pytest.raises(CannotConnect, match="refused"):
        _open(free_port())


def test_garbage_instead_of_an_association_answer():
    with socket.socket() as server:
        server.bind((LOOPBACK, 0))
        server.listen(1)
        port = server.getsockname()[1]

        def answer():
            conn, _ = server.accept()
            with conn:
                conn.recv(65536)
                conn.sendall(b"HTTP/1.1 400 Bad Request\r\n\r\n")

        t = threading.Thread(target=answer, daemon=True)
        t.start()
        with pytest.raises(AssociationFailed) as err:
            _open(port)
        t.join(5)
    assert not err.value.rejected
    assert "PDU" in str(err.value) or "closed" in str(err.value)
