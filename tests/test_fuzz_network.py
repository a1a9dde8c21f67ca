"""Malformed input over the network: an in-process node on 127.0.0.1 with the real grading
pipeline receives mutated echo SRs (the mutations of ``test_fuzz_grade``; hypothesis, seeded
and bounded), truncated datasets on the wire, garbage, oversized PDUs and abrupt disconnects.

Every object gets a C-STORE response (success, or a failure status: 0xA700 / 0xA900 / 0xC000,
PS3.4 Annex B.2.3, or 0x0122 for a PDF the node did not write, PS3.7 Annex C); every study the
node acknowledged ends delivered or failed with a reason; and after each case the node still
answers C-ECHO (PS3.7 9.1.5)."""

from __future__ import annotations

import contextlib
import copy
import socket
import struct
import time
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from netutil import LOOPBACK, NODE_AE, pynetdicom_echo, wait_for
from pydicom import Dataset
from pydicom.dataset import FileMetaDataset
from pydicom.uid import ExplicitVRLittleEndian, ImplicitVRLittleEndian, generate_uid
from pynetdicom import AE
from test_fuzz_grade import _BASES, FUZZ, encode, mutated_datasets

from service.config import apply_overrides, config_from_dict
from service.network.service import Node
from service.sr.echo_builder import Template

pytestmark = [pytest.mark.network]

#: C-STORE statuses the node may answer (PS3.4 Annex B.2.3): success, Out of Resources,
#: Data Set does not match SOP Class, Cannot understand; and Refused: SOP Class not supported
#: (a general status, PS3.7 Annex C) for an Encapsulated PDF it did not write
ANSWERS = {0x0000, 0xA700, 0xA900, 0xC000, 0x0122}
COMPREHENSIVE_SR = "1.2.840.10008.5.1.4.1.1.88.33"  # PS3.4 Annex B.5


@pytest.fixture(scope="module")
def node(tmp_path_factory):
    """One node for the whole module (starting one per example would dominate the time)."""
    data = {
        "delivery": {"backoff_initial_seconds": 0.1, "backoff_max_seconds": 0.4},
        "limits": {
            "shutdown_grace_seconds": 2,
            "network_timeout": 5,
            "acse_timeout": ACSE_TIMEOUT,
            "dimse_timeout": 5,
        },
        "http": {"port": 0},
    }
    cfg = apply_overrides(
        config_from_dict(data),
        port=0,
        bind=LOOPBACK,
        data_dir=str(tmp_path_factory.mktemp("fuzz-node")),
        settle_seconds=0,
    )
    n = Node(cfg, poll_seconds=0.05)
    n.start()
    yield n
    n.stop()


#: ACSE timeout of the module's node (s): a connection that never completes association
#: negotiation holds one of the node's association slots at most this long
ACSE_TIMEOUT = 5


def assert_alive(node: Node) -> None:
    """The node answers C-ECHO; bounded by the time pynetdicom keeps the slot of a broken
    connection (see test_broken_connections_do_not_hold_association_slots)."""
    wait_for(lambda: pynetdicom_echo(node.port) == 0x0000, ACSE_TIMEOUT * 3, 0.2)


def scu(*sop_classes: str) -> AE:
    ae = AE(ae_title="FUZZER")
    ae.acse_timeout = ae.dimse_timeout = ae.network_timeout = 10
    for uid in sop_classes:
        ae.add_requested_context(uid, [ExplicitVRLittleEndian, ImplicitVRLittleEndian])
    return ae


REFUSED = "refused at negotiation"


def store(ds: Dataset, port: int) -> int | str | None:
    """C-STORE one dataset over its own association; the status, :data:`REFUSED` when the node
    accepted no presentation context for its SOP class (e.g. an image class, refused by
    default), or None when our side could not even encode it (then it reaches no node)."""
    sop_class = str(ds.get("SOPClassUID", "") or "")
    try:
        ae = scu(sop_class)
    except Exception:  # not a UID at all: no presentation context can carry it
        return None
    assoc = ae.associate(LOOPBACK, port, ae_title=NODE_AE)
    if not assoc.is_established:
        return REFUSED
    try:
        if not any(str(cx.abstract_syntax) == sop_class for cx in assoc.accepted_contexts):
            return REFUSED
        try:
            status = assoc.send_c_store(ds)
        except Exception:  # raised on our side while encoding: nothing was sent
            return None
        assert "Status" in status, "no C-STORE response"
        return int(status.Status)
    finally:
        if assoc.is_established:
            assoc.release()


def fresh(ds: Dataset) -> Dataset:
    """The dataset with new study and instance UIDs (each case its own study)."""
    ds = copy.deepcopy(ds)
    ds.StudyInstanceUID = generate_uid()
    ds.SOPInstanceUID = generate_uid()
    if hasattr(ds, "file_meta"):
        ds.file_meta.MediaStorageSOPInstanceUID = ds.SOPInstanceUID
    return ds


def settled_with_reason(node: Node, study_uids: list[str]) -> bool:
    rows = [node.journal.study(u) for u in study_uids]
    if not all(r is not None and r["state"] in ("delivered", "failed") for r in rows):
        return False
    for r in rows:
        if r["state"] == "failed":
            assert r["reason"].strip(), r
    return True


# -- mutated objects ------------------------------------------------------------------------------


ACKED: list[str] = []


@settings(FUZZ, max_examples=25)
@given(case=mutated_datasets(max_mutations=2))
def test_mutated_objects_get_a_status_and_the_node_stays_up(node, case):
    ds, what = case
    if ds.get("StudyInstanceUID") and ds.get("SOPInstanceUID"):  # each case its own study
        ds.StudyInstanceUID = generate_uid()
        ds.SOPInstanceUID = generate_uid()
    status = store(ds, node.port)
    if isinstance(status, int):
        assert status in ANSWERS, (what, hex(status))
        if status == 0x0000:
            ACKED.append(str(ds.StudyInstanceUID))
    assert_alive(node)


def test_every_acknowledged_mutated_study_ends_delivered_or_failed_with_reason(node):
    """Runs after the fuzz test above: nothing the node acknowledged is left hanging."""
    assert ACKED, "no mutated object was acknowledged (the fuzz test did not run first?)"
    wait_for(lambda: settled_with_reason(node, ACKED), 120, 0.1)
    assert_alive(node)


# -- truncated datasets on the wire ----------------------------------------------------------------


def send_raw_dataset(port: int, sop_class: str, sop_uid: str, body: bytes) -> int | None:
    """C-STORE whose data set is exactly ``body`` (explicit VR little endian), as a sender
    that forwards a damaged file without decoding it would send it."""
    import pynetdicom.association as association

    real = association.encode
    ae = scu(sop_class)
    assoc = ae.associate(LOOPBACK, port, ae_title=NODE_AE)
    assert assoc.is_established
    ds = Dataset()
    ds.file_meta = FileMetaDataset()
    ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.SOPClassUID = sop_class
    ds.SOPInstanceUID = sop_uid
    try:
        association.encode = lambda *a, **k: body
        try:
            status = assoc.send_c_store(ds)
        finally:
            association.encode = real
        return int(status.Status) if "Status" in status else None
    finally:
        if assoc.is_established:
            assoc.release()


def _body(ds: Dataset) -> bytes:
    """The data set bytes of a Part 10 encoding (after the file meta group)."""
    data = encode(ds)
    pos = 132
    while struct.unpack_from("<H", data, pos)[0] == 0x0002:
        vr = data[pos + 4 : pos + 6]
        if vr in (b"OB", b"UN", b"SQ", b"UT", b"UC", b"UR"):
            pos += 12 + struct.unpack_from("<I", data, pos + 8)[0]
        else:
            pos += 8 + struct.unpack_from("<H", data, pos + 6)[0]
    return data[pos:]


def test_dataset_cut_inside_its_content_tree_is_not_acknowledged(node):
    """pydicom decodes the items it finds in a data set cut short inside a sequence; the node
    must not acknowledge such an object (PS3.4 B.2.3: 0xC000 Cannot understand)."""
    ds = fresh(_BASES[Template.tid5300])
    body = _body(ds)
    cut = body[: len(body) * 3 // 5]  # inside the ContentSequence (0040,A730)
    status = send_raw_dataset(node.port, str(ds.SOPClassUID), str(ds.SOPInstanceUID), cut)
    assert_alive(node)
    assert status == 0xC000, "a truncated object was acknowledged"


@pytest.mark.parametrize(
    "declared",
    ["1.2.840.10008.5.1.4.1.1.2", "1.2.840.10008.5.1.4.1.1.88.22", ""],
    ids=["ct-image", "enhanced-sr", "none"],
)
def test_object_of_another_class_sent_as_comprehensive_sr_gets_a900(node, declared):
    """The data set's SOP Class UID differs from the negotiated one (PS3.4 B.2.3: 0xA900)."""
    ds = fresh(_BASES[Template.tid5300])
    if declared:
        ds.SOPClassUID = declared
    else:
        del ds.SOPClassUID
    body = _body(ds)
    status = send_raw_dataset(node.port, COMPREHENSIVE_SR, str(ds.SOPInstanceUID), body)
    assert status == 0xA900, hex(status or -1)
    assert node.journal.study(str(ds.StudyInstanceUID)) is None
    assert_alive(node)


@settings(FUZZ, max_examples=15)
@given(frac=st.floats(0.0, 0.999), template=st.sampled_from(list(Template)))
def test_truncated_dataset_on_the_wire_gets_a_status_and_the_node_stays_up(node, frac, template):
    ds = fresh(_BASES[template])
    body = _body(ds)
    cut = body[: max(1, int(len(body) * frac))]  # an empty data set is never sent at all
    status = send_raw_dataset(node.port, str(ds.SOPClassUID), str(ds.SOPInstanceUID), cut)
    assert status in ANSWERS, hex(status or -1)
    assert_alive(node)
    if status == 0x0000:  # then it is graded or failed with a reason, never stuck
        wait_for(lambda: settled_with_reason(node, [str(ds.StudyInstanceUID)]), 60, 0.1)


# -- garbage, oversized PDUs, abrupt disconnects ---------------------------------------------------


def raw_session(port: int, payload: bytes, *, linger: float = 0.0) -> None:
    """Connect, send ``payload``, close (RST when ``linger`` is 0: an abrupt disconnect)."""
    with socket.create_connection((LOOPBACK, port), timeout=5) as s:
        s.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
        with contextlib.suppress(OSError):  # the node may drop us first: fine
            s.sendall(payload)
        if linger:
            time.sleep(linger)


def pdu(pdu_type: int, length: int, body: bytes = b"") -> bytes:
    """PS3.8 9.3: type, reserved, 4-byte big endian length, then the body."""
    return struct.pack(">BBI", pdu_type, 0, length) + body


@settings(FUZZ, max_examples=20)
@given(payload=st.binary(min_size=0, max_size=4096))
def test_garbage_bytes_then_disconnect_leave_the_node_up(node, payload):
    raw_session(node.port, payload)
    assert_alive(node)


@pytest.mark.parametrize(
    "payload",
    [
        pdu(0x01, 0xFFFFFFFF, b"\x00\x01" + b"A" * 64),  # A-ASSOCIATE-RQ claiming 4 GiB
        pdu(0x01, 50_000_000, b"\x00" * 200_000),  # 50 MB announced, 200 kB sent, then gone
        pdu(0x04, 0xFFFFFFF0, b"\x00" * 1000),  # P-DATA-TF before any association
        pdu(0x07, 4, b"\x00\x00\x02\x00"),  # A-ABORT out of the blue
        pdu(0x09, 0),  # unknown PDU type
        b"\x01",  # one byte of a PDU header
    ],
    ids=["assoc-rq-4GiB", "assoc-rq-50MB-cut", "pdata-first", "abort", "unknown-type", "1-byte"],
)
def test_oversized_or_cut_pdus_before_association_leave_the_node_up(node, payload):
    raw_session(node.port, payload, linger=0.05)
    assert_alive(node)


def test_broken_connections_do_not_hold_association_slots(node):
    """Connections closed before any association request (port probes, TCP health checks)
    must not keep association slots (limits.max_associations) until the ACSE timeout."""
    assert_alive(node)
    for _ in range(node.config.limits.max_associations + 2):
        raw_session(node.port, b"")  # connect, reset: what a TCP health check does
    assert pynetdicom_echo(node.port) == 0x0000  # a scanner right after is still accepted


def test_oversized_pdata_inside_an_association_is_dropped_and_node_stays_up(node):
    """After a normal association, a P-DATA-TF PDU far above the node's maximum PDU length
    (limits.max_pdu, PS3.8 D.1) followed by a cut: the node drops that association only."""
    assert_alive(node)  # association slots of earlier broken connections are free again
    ae = scu("1.2.840.10008.5.1.4.1.1.88.33")
    assoc = ae.associate(LOOPBACK, node.port, ae_title=NODE_AE)
    assert assoc.is_established
    sock = assoc.dul.socket.socket
    with contextlib.suppress(OSError):
        sock.sendall(pdu(0x04, 64_000_000, b"\x00" * 300_000))
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
    sock.close()
    assoc.abort()
    assert_alive(node)
    wait_for(lambda: node.listener.active_associations() == 0, 30, 0.1)


def test_disconnect_in_the_middle_of_a_c_store_acknowledges_nothing(node):
    """The peer vanishes after a few PDUs of a 1 MB object (command sent, data set partly
    sent): the node records nothing for it and goes on."""
    assert_alive(node)
    ds = fresh(_BASES[Template.tid5300])
    ds.add_new(0x00091010, "LO", "HARBOUR VALE PRIVATE")
    ds.add_new(0x00091011, "OB", b"\x00" * 1_000_000)  # bulk: many PDUs of max_pdu bytes
    ae = scu(str(ds.SOPClassUID))
    assoc = ae.associate(LOOPBACK, node.port, ae_title=NODE_AE)
    assert assoc.is_established
    transport = assoc.dul.socket
    real_send = transport.send
    sent = {"pdus": 0}

    def send_then_vanish(data: bytes) -> None:
        sent["pdus"] += 1
        if sent["pdus"] == 5:  # the connection dies under pynetdicom's own send
            sock = transport.socket
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
            with contextlib.suppress(OSError):
                sock.shutdown(socket.SHUT_RDWR)
        # after the shutdown the socket's send fails as with a vanished peer, and pynetdicom
        # handles that itself (a closed transport connection: PS3.8 Evt17), as it would for
        # a real peer; raising from here instead would be an error pynetdicom never sees
        real_send(data)

    transport.send = send_then_vanish
    with contextlib.suppress(Exception):  # our side sees its own broken connection
        assoc.send_c_store(ds)
    assoc.abort()
    assert sent["pdus"] > 4, "the object fitted in four PDUs: nothing was cut"
    assert_alive(node)
    wait_for(lambda: node.listener.active_associations() == 0, 30, 0.1)
    assert node.journal.study(str(ds.StudyInstanceUID)) is None, "a cut object was recorded"


def test_results_folder_holds_only_results_of_acknowledged_studies(node):
    """Whatever the fuzzing did, every file in the results folder is a readable result SR."""
    import pydicom

    folder = Path(node.config.results_dir or "")
    if not folder.is_dir():
        pytest.skip("no results folder configured")
    files = sorted(folder.glob("*.dcm"))
    assert files, "no result at all: the fuzzing acknowledged nothing gradable"
    for p in files:
        ds = pydicom.dcmread(p)
        assert str(ds.SOPClassUID) == COMPREHENSIVE_SR
