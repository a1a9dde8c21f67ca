"""The node's C-STORE sending (service/network/store_scu.py: pynetdicom's requestor with total
deadlines, TCP_NODELAY, the node's implementation identity, user identity negotiation and the
status categories of PS3.7 Annex C).

Real peers on loopback: DCMTK ``storescp`` (with a small maximum PDU, and accepting implicit VR
only), pynetdicom acceptors that answer with warning or failure statuses, reject, abort or
never answer, and raw sockets that answer garbage or trickle their bytes.  Every wait is
bounded: a call that could hang runs on a thread the test joins with a limit.
"""

from __future__ import annotations

import os
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
    TricklingPeer,
    TricklingProxy,
    echo_sr,
    free_port,
    pacs_uids,
    storescp,
    wait_for,
    write_files,
)
from pydicom.uid import ExplicitVRLittleEndian, ImplicitVRLittleEndian
from pynetdicom import evt

from service.network.demo_loop import ResultReceiver
from service.network.store_scu import (
    DEADLINE_SLACK,
    IMPLEMENTATION_CLASS_UID,
    IMPLEMENTATION_VERSION_NAME,
    AssociationFailed,
    StoreResponse,
    StoreSession,
    Timeouts,
    UserIdentity,
    _Watchdog,
)
from service.sr.read import file_body_start

pytestmark = pytest.mark.network
needs_dcmtk = pytest.mark.skipif(SKIP_WITHOUT_DCMTK, reason=DCMTK_REASON)

ENCAPSULATED_PDF = "1.2.840.10008.5.1.4.1.1.104.1"
QUICK = Timeouts(connect=5, acse=5, dimse=5, network=5)

#: PS3.7 Annex C (status classes): Warning is 0001, Bxxx, 0107 and 0116; Failure is Axxx,
#: Cxxx and the other 01xx and 02xx codes.  The Bxxx codes below are the Storage Service
#: Class's warnings (PS3.4 Annex B.2.3: B000 coercion of data elements, B006 elements
#: discarded, B007 data set does not match SOP class) and the ends of the Bxxx range.
WARNINGS = [0x0001, 0x0107, 0x0116, 0xB000, 0xB006, 0xB007, 0xBFFF]
FAILURES = [0xA700, 0xA900, 0xC000, 0x0117, 0x0122, 0x0211]


def _open(port: int, *, called="PACS", timeouts=QUICK, classes=None, identity=None, **kw):
    return StoreSession.open(
        LOOPBACK,
        port,
        calling_ae="DIASTOLIC_SR",
        called_ae=called,
        sop_classes=classes or [COMPREHENSIVE_SR],
        timeouts=timeouts,
        identity=identity,
        **kw,
    )


def _part10(tmp_path: Path, seed: str = "scu-1", copies: int = 1):
    """An invented echo SR as Part 10 bytes; ``copies``: its content repeated (larger)."""
    ds = echo_sr(seed)
    ds.ContentSequence = list(ds.ContentSequence) * copies
    (path,) = write_files([ds], tmp_path / f"out-{seed}")
    return ds, path.read_bytes()


def _bounded(fn, limit: float):
    """Run ``fn`` on a thread; (its result or exception, seconds taken).  Fails the test when
    it has not returned within ``limit`` seconds."""
    box: dict = {}

    def run():
        try:
            box["value"] = fn()
        except BaseException as exc:  # handed to the test
            box["value"] = exc

    t0 = time.monotonic()
    t = threading.Thread(target=run, daemon=True)
    t.start()
    t.join(limit)
    assert not t.is_alive(), f"still waiting after {limit} s"
    return box["value"], time.monotonic() - t0


class _Acceptor(ResultReceiver):
    """The demo's storage SCP (pynetdicom) for one test, noting each requestor's
    implementation identifiers, user identity and release; ``answer`` decides each C-STORE."""

    def __init__(self, answer, *, require_called: bool = False, ae_title: str = "PACS"):
        super().__init__(ae_title)
        self._ae.require_called_aet = require_called
        self._ae.acse_timeout = self._ae.dimse_timeout = self._ae.network_timeout = 5
        self.requestors: list[tuple[str, str]] = []
        self.identities: list[tuple[int, bytes, bytes | None]] = []
        self.nodelay: list[int] = []
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

    def _on_user_id(self, event):
        self.identities.append((event.user_id_type, event.primary_field, event.secondary_field))
        return True, b"welcome" if event.user_id_type in (1, 2) else None

    def _handlers(self):
        return [
            *super()._handlers(),
            (evt.EVT_RELEASED, lambda e: self.released.set()),
            (evt.EVT_USER_ID, self._on_user_id),
        ]


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


# -- real peers -----------------------------------------------------------------------------


@pytest.fixture
def decoded(monkeypatch):
    """The objects the sending decoded with pydicom (not sent as encoded), by SOP Instance UID."""
    seen: list[str] = []
    real = pydicom.dcmread

    def counting(*args, **kw):
        ds = real(*args, **kw)
        seen.append(str(ds.SOPInstanceUID))
        return ds

    monkeypatch.setattr(pydicom, "dcmread", counting)
    return seen


def _open_fds() -> set[str]:
    return set(os.listdir("/proc/self/fd"))


@needs_dcmtk
@pytest.mark.skipif(not hasattr(os, "memfd_create"), reason="in-memory files are Linux's")
def test_dcmtk_storescp_with_a_small_pdu_stores_the_object_unchanged(tmp_path, decoded):
    _, data = _part10(tmp_path, copies=12)
    body = data[file_body_start(data) :]
    assert len(body) > 4 * 4096  # several PDUs at storescp's 4 KiB maximum
    port = free_port()
    with storescp(tmp_path / "pacs", port, extra=["-pdu", "4096"]):
        fds = _open_fds()
        session = _open(port)
        first, second = session.store(data), session.store(data)  # message IDs go on
        assert decoded == []  # sent as encoded
        session.release()
        assert not session.is_established
        assert _open_fds() <= fds  # the in-memory file went with the association
        wait_for(lambda: len(pacs_uids(tmp_path / "pacs")) == 2, 10)
    assert (first.status, second.status) == (0x0000, 0x0000)  # PS3.7 C.4.2: success
    stored = next(p for p in (tmp_path / "pacs").iterdir() if p.is_file()).read_bytes()
    # storescp +B writes the data set as received: byte for byte what the node stored
    assert stored[file_body_start(stored) :] == body


@needs_dcmtk
def test_dcmtk_storescp_accepting_only_implicit_vr_gets_the_object_converted(tmp_path, decoded):
    _, data = _part10(tmp_path)
    port = free_port()
    with storescp(tmp_path / "pacs", port, extra=["+xi"]):
        session = _open(port)
        assert session.store(data).status == 0x0000
        assert len(decoded) == 1  # decoded by pydicom, converted by pynetdicom
        session.release()
        wait_for(lambda: len(pacs_uids(tmp_path / "pacs")) == 1, 10)
    stored = pydicom.dcmread(next(p for p in (tmp_path / "pacs").iterdir() if p.is_file()))
    assert stored.file_meta.TransferSyntaxUID == ImplicitVRLittleEndian
    sent = pydicom.dcmread(pydicom.filebase.DicomBytesIO(data))
    assert sent.file_meta.TransferSyntaxUID == ExplicitVRLittleEndian
    assert stored.ContentSequence == sent.ContentSequence  # value for value


def test_pynetdicom_acceptor_receives_the_data_set_from_our_implementation(acceptor, tmp_path):
    ds, data = _part10(tmp_path)
    peer = acceptor()
    session = _open(peer.port)
    response = session.store(data)
    session.release()
    assert response == StoreResponse(0x0000) and response.stored and not response.warning
    (got,) = peer.received
    assert got.SOPInstanceUID == ds.SOPInstanceUID
    assert got.ContentSequence == ds.ContentSequence
    # PS3.7 D.3.3.2: the node announces its own implementation class UID and version name
    assert peer.requestors == [(IMPLEMENTATION_CLASS_UID, IMPLEMENTATION_VERSION_NAME)]
    assert peer.released.wait(5)  # A-RELEASE, not an abort


@needs_dcmtk
def test_without_in_memory_files_the_object_is_sent_decoded(tmp_path, monkeypatch, decoded):
    """Where the system has no in-memory files, pydicom decodes the object and pynetdicom
    encodes it again: the peer gets the same data set."""
    monkeypatch.delattr(os, "memfd_create", raising=False)
    ds, data = _part10(tmp_path)
    port = free_port()
    with storescp(tmp_path / "pacs", port):
        session = _open(port)
        assert session.store(data).status == 0x0000
        assert decoded == [ds.SOPInstanceUID]
        session.release()
        wait_for(lambda: len(pacs_uids(tmp_path / "pacs")) == 1, 10)
    stored = next(p for p in (tmp_path / "pacs").iterdir() if p.is_file()).read_bytes()
    assert stored[file_body_start(stored) :] == data[file_body_start(data) :]


def test_the_connection_sends_without_delay(acceptor):
    peer = acceptor()
    session = _open(peer.port)
    try:
        sock = session._assoc.dul.socket.socket
        assert sock.getsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY) != 0
    finally:
        session.release()


@pytest.mark.parametrize("identity", [UserIdentity("hv-node"), UserIdentity("hv-node", "s3cret")])
def test_user_identity_is_negotiated_when_configured(acceptor, identity):
    peer = acceptor()
    session = _open(peer.port, identity=identity)
    session.release()
    # PS3.7 D.3.3.7: type 1 username, type 2 username and passcode
    expected_type = 2 if identity.password else 1
    secondary = identity.password.encode()  # empty for type 1
    assert peer.identities == [(expected_type, identity.username.encode(), secondary)]
    plain = _open(peer.port)
    plain.release()
    assert len(peer.identities) == 1  # none sent when not configured


@pytest.mark.parametrize("status", WARNINGS)
def test_each_warning_status_counts_as_stored(acceptor, tmp_path, status):
    _, data = _part10(tmp_path)
    peer = acceptor(lambda e: status)
    session = _open(peer.port)
    response = session.store(data)
    session.release()
    assert response.status == status
    assert response.category == "Warning" and response.warning and response.stored


@pytest.mark.parametrize("status", FAILURES)
def test_each_failure_status_is_not_stored(acceptor, tmp_path, status):
    _, data = _part10(tmp_path)

    def refuse(event):
        answer = pydicom.Dataset()
        answer.Status = status
        answer.ErrorComment = "archive full"
        return answer

    peer = acceptor(refuse)
    session = _open(peer.port)
    response = session.store(data)
    assert (response.status, response.error_comment) == (status, "archive full")
    assert response.category == "Failure" and not response.stored
    assert session.is_established  # a failure status does not end the association
    session.release()


def test_rejection_names_result_source_and_reason(acceptor):
    peer = acceptor(require_called=True)
    with pytest.raises(AssociationFailed) as err:
        _open(peer.port, called="NOT_THE_PACS")
    assert err.value.rejected
    # PS3.8 Table 9-21: result 1 permanent, source 1 service-user, reason 7 called AE title
    assert str(err.value).endswith(
        ": Rejected Permanent, Service User: Called AE title not recognised"
    )


def test_no_accepted_context_is_a_failure(acceptor):
    peer = acceptor()  # SR storage only: Encapsulated PDF Storage (PS3.4 B.5) is not supported
    with pytest.raises(AssociationFailed, match="accepted none of the proposed"):
        _open(peer.port, classes=[ENCAPSULATED_PDF])


def test_peer_abort_during_a_c_store(acceptor, tmp_path):
    _, data = _part10(tmp_path)

    def abort(event):
        event.assoc.abort()
        return 0x0000

    peer = acceptor(abort)
    session = _open(peer.port)
    with pytest.raises(AssociationFailed, match=r"aborted|closed"):
        session.store(data)
    assert not session.is_established
    with pytest.raises(AssociationFailed, match="no longer established"):
        session.store(data)


def test_stalled_response_ends_within_the_dimse_timeout(acceptor, tmp_path):
    _, data = _part10(tmp_path)
    hold = threading.Event()
    peer = acceptor(lambda e: (hold.wait(20), 0x0000)[1])
    session = _open(peer.port, timeouts=Timeouts(connect=5, acse=5, dimse=0.5, network=5))
    try:
        outcome, took = _bounded(lambda: session.store(data), 10)
    finally:
        hold.set()
    assert isinstance(outcome, AssociationFailed), outcome
    assert took < 0.5 + DEADLINE_SLACK + 2
    assert not session.is_established


def test_silent_peer_ends_within_the_acse_timeout():
    with socket.socket() as server:
        server.bind((LOOPBACK, 0))
        server.listen(1)
        port = server.getsockname()[1]
        outcome, took = _bounded(
            lambda: _open(port, timeouts=Timeouts(connect=2, acse=0.5, dimse=5, network=5)), 10
        )
    assert isinstance(outcome, AssociationFailed), outcome
    assert took < 2.5 + DEADLINE_SLACK + 1


def test_nothing_listening():
    with pytest.raises(AssociationFailed, match=r"cannot connect to .*refused"):
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
        outcome, _ = _bounded(lambda: _open(port), 20)
        t.join(5)
    assert isinstance(outcome, AssociationFailed) and not outcome.rejected


# -- peers that trickle ---------------------------------------------------------------------


def test_a_peer_trickling_its_association_answer_is_cut_at_the_deadline():
    # 4096 bytes at 5 bytes/s would take 13 minutes; the set-up ends within connect + ACSE
    with TricklingPeer(length=4096, interval=0.2) as peer:
        timeouts = Timeouts(connect=1, acse=1, dimse=1, network=1)
        outcome, took = _bounded(lambda: _open(peer.port, timeouts=timeouts), 15)
    assert isinstance(outcome, AssociationFailed), outcome
    assert outcome.timed_out and "within 2 s" in str(outcome)
    assert took < 2 + DEADLINE_SLACK + 1.5


def test_a_peer_trickling_its_c_store_response_is_cut_at_the_deadline(acceptor, tmp_path):
    _, data = _part10(tmp_path)
    peer = acceptor()
    with TricklingProxy(peer.port, fast_pdus=1, interval=0.2) as proxy:
        session = _open(proxy.port, timeouts=Timeouts(connect=5, acse=5, dimse=1, network=30))
        outcome, took = _bounded(lambda: session.store(data), 15)
        assert isinstance(outcome, AssociationFailed), outcome
        assert outcome.timed_out and "no C-STORE response" in str(outcome)
        assert took < 1 + DEADLINE_SLACK + 1.5
        assert not session.is_established
        # the release that follows a failure does not wait either
        _, took = _bounded(session.release, 10)
        assert took < 5
    wait_for(lambda: len(peer.received) == 1, 10)  # the peer had stored it all the same


def test_the_association_thread_takes_no_response_between_c_stores(acceptor, tmp_path):
    # pynetdicom's association thread takes any DIMSE message off the queue whenever it runs
    # (and drops a C-STORE response it did not ask for); between the node's C-STOREs it stays
    # paused, so a response can only go to the C-STORE waiting for it
    import threading as _threading

    from pynetdicom.dimse_primitives import C_STORE

    _, data = _part10(tmp_path)
    peer = acceptor()
    session = _open(peer.port)
    try:
        assert session.store(data).status == 0
        response = C_STORE()
        response.MessageIDBeingRespondedTo = 99
        response.Status = 0x0000
        queue = session._assoc.dimse.msg_queue
        queue.put((1, response))  # as if a response had just arrived
        _threading.Event().wait(0.3)  # the thread turns every millisecond when it runs
        assert queue.qsize() == 1, "the association thread took the message"
        queue.get_nowait()
        assert session.store(data).status == 0  # and the session goes on
    finally:
        session.release()
    assoc = session._assoc
    wait_for(lambda: not assoc.is_alive(), 10)  # the thread ends with the release
    assert peer.released.wait(5)


def test_a_peer_abort_between_c_stores_ends_the_next_one_at_once(acceptor, tmp_path):
    # with the association thread held between C-STOREs, nobody watches the connection then:
    # an A-ABORT (or a closed connection) that comes in meanwhile must still end the next
    # C-STORE at once, not after the DIMSE timeout
    _, data = _part10(tmp_path)
    peer = acceptor()
    session = _open(peer.port, timeouts=Timeouts(connect=5, acse=5, dimse=20, network=20))
    assert session.store(data).status == 0
    wait_for(lambda: len(peer._ae.active_associations) == 1, 5)
    peer._ae.active_associations[0].abort()
    outcome, took = _bounded(lambda: session.store(data), 30)
    assert isinstance(outcome, AssociationFailed), outcome
    assert took < 5
    assert not session.is_established


# -- the watchdog on its own ------------------------------------------------------------------


class _CutRecorder:
    def __init__(self) -> None:
        self.cuts = threading.Event()

    def cut(self) -> None:
        self.cuts.set()


def test_the_watchdog_cuts_a_short_step_that_follows_a_long_one():
    """Its thread sleeps until the deadline it saw last: a step with an earlier deadline must
    wake it, or the overrun would go unnoticed until the older deadline."""
    session = _CutRecorder()
    dog = _Watchdog(session)  # type: ignore[arg-type]
    try:
        with dog.step(600, "long"):
            time.sleep(0.1)  # the thread now sleeps until this deadline
        t0 = time.monotonic()
        with dog.step(0.2, "short"):
            assert session.cuts.wait(5), "the overrun was not cut"
        assert 0.15 <= time.monotonic() - t0 < 5 and dog.fired == "short"
    finally:
        dog.close()


def test_the_watchdog_is_not_woken_by_each_step(monkeypatch):
    """A stream of steps ending well within their time wakes the watchdog's thread a few
    times at most, not once or twice a step (a thread switch per C-STORE)."""
    dog = _Watchdog(_CutRecorder())  # type: ignore[arg-type]
    waits = []
    real_wait = dog._cond.wait
    monkeypatch.setattr(dog._cond, "wait", lambda *a: waits.append(a) or real_wait(*a))
    try:
        with dog.step(60, "first"):  # the thread now sleeps until this deadline
            time.sleep(0.1)
        before = len(waits)
        for _ in range(200):
            with dog.step(60, "C-STORE"):
                time.sleep(0.001)  # time for the thread to run, were it woken
        time.sleep(0.1)
        assert len(waits) - before <= 2 and not dog.fired
    finally:
        dog.close()
