"""The listening Application Entity: association policy and event handlers, nothing else.

* Verification (C-ECHO) and C-STORE of the SR storage SOP classes, in implicit and explicit VR
  little endian and deflated explicit VR little endian.
* Encapsulated PDF Storage always, so that a PACS forwarding the node's own summary PDF back
  is answered success: a summary this node wrote is kept and recorded as ignored, like an own
  result SR; any other PDF is refused (0x0122) unless ``access.accept_images`` is on.
* Optionally every image storage class too, accepted and discarded (``access.accept_images``).
* The called AE title must match ours (pynetdicom rejects others); calling AE titles may be
  limited to an allow-list, and an AE title may be pinned to addresses: both are checked on the
  association request against the configuration in force, so a reload (SIGHUP) applies to the
  next association and never drops open ones.  Rejections are logged with the peer's address.
* TLS when configured (Python ``ssl`` context from :mod:`service.network.tls`).
* A C-STORE answers success only after the object is durable in the spool and committed in the
  journal.  A store failure answers 0xA700 (Out of Resources) so the sender keeps the object; an
  object that cannot be decoded answers 0xC000 (Cannot understand), one that does not match the
  negotiated SOP class or lacks its identifying UIDs answers 0xA900 (Data Set does not match
  SOP Class) (PS3.4 Annex B.2.3).  The association goes on either way.

Grading is never done here: after recording an object the handler only wakes the assembler.
"""

from __future__ import annotations

import contextlib
import dataclasses
import logging
import re
import socket
import struct
from collections.abc import Callable
from dataclasses import dataclass
from io import BytesIO
from typing import Any

from pydicom import Dataset
from pydicom.filereader import read_dataset
from pydicom.uid import (
    DeflatedExplicitVRLittleEndian,
    EncapsulatedPDFStorage,
    ExplicitVRLittleEndian,
    ImplicitVRLittleEndian,
)
from pynetdicom import (
    AE,
    ALL_TRANSFER_SYNTAXES,
    PYNETDICOM_IMPLEMENTATION_UID,
    PYNETDICOM_IMPLEMENTATION_VERSION,
    evt,
)
from pynetdicom.presentation import StoragePresentationContexts
from pynetdicom.transport import ThreadedAssociationServer

from service.config import Config
from service.observability.logs import event
from service.observability.metrics import Metrics
from service.sr.provenance import EQUIPMENT_TAGS, IGNORED_OWN_RESULT, received_own_result_reason
from service.sr.read import structure_problem
from service.store.journal import Journal

log = logging.getLogger("diastolic_sr.listener")

VERIFICATION = "1.2.840.10008.1.1"

#: SR storage SOP classes accepted and kept (PS3.4 Annex B.5, Table B.5-1)
SR_STORAGE_CLASSES: dict[str, str] = {
    "1.2.840.10008.5.1.4.1.1.88.11": "Basic Text SR Storage",
    "1.2.840.10008.5.1.4.1.1.88.22": "Enhanced SR Storage",
    "1.2.840.10008.5.1.4.1.1.88.33": "Comprehensive SR Storage",
    "1.2.840.10008.5.1.4.1.1.88.34": "Comprehensive 3D SR Storage",
    "1.2.840.10008.5.1.4.1.1.88.35": "Extensible SR Storage",
    "1.2.840.10008.5.1.4.1.1.88.72": "Simplified Adult Echo SR Storage",
}

#: transfer syntaxes offered for SR objects and verification
SR_TRANSFER_SYNTAXES = [
    ImplicitVRLittleEndian,
    ExplicitVRLittleEndian,
    DeflatedExplicitVRLittleEndian,
]

# Status codes (PS3.4 Annex B.2.3 / PS3.7 Annex C)
SUCCESS = 0x0000
OUT_OF_RESOURCES = 0xA700
DOES_NOT_MATCH_SOP_CLASS = 0xA900
CANNOT_UNDERSTAND = 0xC000
#: Refused: SOP Class not supported, a general status of the C-STORE response (PS3.7 Annex C;
#: PS3.4 B.2.3 Table B.2-1 leaves general statuses to PS3.7): an Encapsulated PDF other than
#: the node's own summary, with ``access.accept_images`` off
SOP_CLASS_NOT_SUPPORTED = 0x0122
#: the Error Comment (0000,0902) sent with it: VR LO, at most 64 characters (PS3.5 6.2)
ONLY_OWN_SUMMARIES = "Only summary PDFs written by this node are accepted"

_UID = re.compile(r"^[0-9]+(\.[0-9]+)*$")
_LE_SYNTAXES = (ExplicitVRLittleEndian, ImplicitVRLittleEndian)


def no_delay(assoc: Any) -> None:
    """Send each PDU at once (TCP_NODELAY).  pynetdicom writes a C-STORE response's PDUs
    without it; with Nagle's algorithm a PDU can wait for the peer's delayed acknowledgement
    of the previous one (tens of milliseconds per object)."""
    sock = getattr(getattr(getattr(assoc, "dul", None), "socket", None), "socket", None)
    if sock is not None:
        with contextlib.suppress(OSError):
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)


def image_storage_classes() -> list[str]:
    """pynetdicom's storage SOP classes that are not SR (accepted and discarded on request)."""
    return [
        str(cx.abstract_syntax)
        for cx in StoragePresentationContexts
        if str(cx.abstract_syntax) not in SR_STORAGE_CLASSES
    ]


def valid_uid(value: Any) -> bool:
    text = str(value or "")
    return 0 < len(text) <= 64 and bool(_UID.match(text))


def _body(event: Any) -> bytes:
    """The data set bytes exactly as received."""
    raw = event.request.DataSet
    if isinstance(raw, BytesIO):
        return raw.getvalue()
    raw.seek(0)
    return bytes(raw.read())


#: the last identifying attribute the listener reads, Study Instance UID (0020,000D); the
#: grading processes decode the rest
_LAST_IDENTIFYING_TAG = 0x0020000D
#: what the listener reads: Specific Character Set, SOP Class UID, SOP Instance UID, Patient's
#: Name, Patient ID, Study Instance UID (PS3.6 tags), and the equipment identity that tells
#: the node's own results (service.sr.provenance)
_IDENTIFYING_TAGS = (
    0x00080005,
    0x00080016,
    0x00080018,
    0x00100010,
    0x00100020,
    0x0020000D,
    *EQUIPMENT_TAGS,
)


def identifying_attributes(body: bytes, transfer_syntax: str) -> Dataset:
    """The data set's attributes up to Study Instance UID (SOP Class and Instance UIDs, patient
    identification, Study Instance UID), decoded; nothing after them is read.

    Raises ValueError when the data set is cut short or damaged anywhere: pydicom returns the
    items it found in a data set cut short inside a sequence, so every element, sequence and
    item length is checked against the bytes that arrived (implicit or explicit VR little
    endian; as pydicom does, the other VR encoding is accepted when the data set is in it)."""
    other = _LE_SYNTAXES[1] if transfer_syntax == _LE_SYNTAXES[0] else _LE_SYNTAXES[0]
    if structure_problem(body, transfer_syntax) and structure_problem(body, other):
        broken = structure_problem(body, ExplicitVRLittleEndian)
        raise ValueError(f"data set cut short or damaged: {broken}")
    ds = read_dataset(
        BytesIO(body),
        transfer_syntax == ImplicitVRLittleEndian,
        True,
        stop_when=lambda tag, vr, length: tag > _LAST_IDENTIFYING_TAG,
        specific_tags=list(_IDENTIFYING_TAGS),
    )
    for _ in ds:  # decode them now: an undecodable one is refused here
        pass
    return ds


def part10_bytes(arrival: Arrival) -> bytes:
    """The received data set exactly as encoded on the wire, wrapped as a Part 10 file."""
    return (
        b"\x00" * 128
        + b"DICM"
        + file_meta_bytes(arrival.affected_class, arrival.affected, arrival.transfer_syntax)
        + arrival.body
    )


def _element(group: int, elem: int, vr: bytes, value: bytes) -> bytes:
    """One explicit VR little endian element (PS3.5 7.1.2)."""
    if vr == b"OB":  # 2 reserved bytes and a 4-byte length
        return struct.pack("<HH2s2xI", group, elem, vr, len(value)) + value
    return struct.pack("<HH2sH", group, elem, vr, len(value)) + value


def _uid(value: str) -> bytes:
    raw = value.encode("ascii", "replace")
    return raw + b"\x00" if len(raw) % 2 else raw  # PS3.5 6.2: UI padded with NULL


def file_meta_bytes(sop_class: str, sop_instance: str, transfer_syntax: str) -> bytes:
    """The File Meta Information group (PS3.10 7.1) of a received object, as pynetdicom
    describes it (``Event.file_meta``: version 00 01, the request's SOP class and instance,
    the negotiated transfer syntax, pynetdicom's implementation class and version) and pydicom
    writes it (``write_file_meta_info``), encoded directly."""
    version = PYNETDICOM_IMPLEMENTATION_VERSION.encode("ascii")
    if len(version) % 2:
        version += b" "  # PS3.5 6.2: SH padded with a space
    group = b"".join(
        (
            _element(0x0002, 0x0001, b"OB", b"\x00\x01"),
            _element(0x0002, 0x0002, b"UI", _uid(sop_class)),
            _element(0x0002, 0x0003, b"UI", _uid(sop_instance)),
            _element(0x0002, 0x0010, b"UI", _uid(transfer_syntax)),
            _element(0x0002, 0x0012, b"UI", _uid(PYNETDICOM_IMPLEMENTATION_UID)),
            _element(0x0002, 0x0013, b"SH", version),
        )
    )
    return _element(0x0002, 0x0000, b"UL", struct.pack("<I", len(group))) + group


@dataclass(frozen=True)
class Arrival:
    """One object as it arrived, by C-STORE on an association we accepted or on one we
    opened to retrieve (C-GET), or over DICOMweb: the data set bytes as encoded on the wire."""

    calling_ae: str
    #: the SOP class of the presentation context (or the one the sender declared)
    context_class: str
    #: the Affected SOP Instance UID of the request (or the one the sender declared)
    affected: str
    #: the Affected SOP Class UID of the request (or the one the sender declared)
    affected_class: str
    transfer_syntax: str
    body: bytes
    #: the whole data set, decoded (used for a deflated transfer syntax)
    decode: Callable[[], Dataset]


def store_arrival(ev: Any, calling_ae: str) -> Arrival:
    """The :class:`Arrival` of a pynetdicom C-STORE event (``evt.EVT_C_STORE``)."""
    return Arrival(
        calling_ae=calling_ae.strip(),
        context_class=str(ev.context.abstract_syntax),
        affected=str(ev.request.AffectedSOPInstanceUID or ""),
        affected_class=str(ev.request.AffectedSOPClassUID or ""),
        transfer_syntax=str(ev.context.transfer_syntax),
        body=_body(ev),
        decode=lambda: ev.dataset,
    )


@dataclass(frozen=True)
class Received:
    """What became of an arrival: the C-STORE status to answer, and what it was."""

    status: int
    sop_instance_uid: str = ""
    study_uid: str = ""
    reason: str = ""
    #: kept and acknowledged, never graded (the node's own result coming back)
    ignored: bool = False
    #: the Error Comment (0000,0902) sent with a failure status, "" for none
    error_comment: str = ""

    def response(self) -> int | Dataset:
        """The C-STORE response status for pynetdicom: the status, with its Error Comment
        when it has one (PS3.7 Annex C)."""
        if not self.error_comment:
            return self.status
        status = Dataset()
        status.Status = self.status
        status.ErrorComment = self.error_comment
        return status

    @property
    def stored(self) -> bool:
        """Recorded for grading."""
        return self.status == SUCCESS and bool(self.study_uid) and not self.ignored


class ObjectIntake:
    """The one path of a received object into the node: checks, the object stored and
    recorded in the journal (durable), then the wake-up of the grading.  The listener uses it
    for every C-STORE, and ``backfill`` for what it retrieves, so a retrieved object is
    recorded exactly as a received one."""

    def __init__(
        self,
        owner: Any,
        journal: Journal,
        *,
        on_received: Callable[[str], None] = lambda study_uid: None,
        metrics: Metrics | None = None,
    ) -> None:
        #: ``owner.config`` is the configuration in force (it changes on a reload)
        self._owner = owner
        self.journal = journal
        self.on_received = on_received
        self.metrics = metrics or Metrics()

    def _keep_own_summary(self, arrival: Arrival) -> Received | None:
        """A summary PDF this node (any version) wrote, sent back to it: kept and recorded as
        ignored, like an own result SR, so that ``queue`` lists it, whatever the configuration.
        None for any other PDF (refused, or discarded with ``accept_images``)."""
        syntax = arrival.transfer_syntax
        try:
            # little endian: the identifying attributes only; otherwise pynetdicom decodes it
            le = syntax in _LE_SYNTAXES
            ds = identifying_attributes(arrival.body, syntax) if le else arrival.decode()
            own = received_own_result_reason(
                ds, arrival.body, implicit=syntax == ImplicitVRLittleEndian
            )
            sop_uid = str(ds.get("SOPInstanceUID", "") or "")
            study_uid = str(ds.get("StudyInstanceUID", "") or "")
        except Exception:  # not decodable: not recognisably ours
            return None
        if own is None or not valid_uid(sop_uid) or not valid_uid(study_uid):
            return None
        try:
            self.journal.store_ignored(
                sop_instance_uid=sop_uid,
                study_uid=study_uid,
                sop_class_uid=EncapsulatedPDFStorage,
                calling_ae=arrival.calling_ae,
                data=part10_bytes(arrival),
                reason=f"{IGNORED_OWN_RESULT}: {own}",
            )
        except Exception as exc:
            return self._rejected(
                arrival.calling_ae,
                sop_uid or arrival.affected,
                OUT_OF_RESOURCES,
                f"could not be stored ({type(exc).__name__}: {exc})",
                study_uid,
            )
        return self._ignored(arrival.calling_ae, sop_uid, study_uid, own)

    def _ignored(self, calling: str, uid: str, study_uid: str, reason: str) -> Received:
        self.metrics.objects.labels(outcome="ignored").inc()
        event(
            "object_ignored",
            f"C-STORE from {calling}: object {uid} of study {study_uid} kept, not graded "
            f"({IGNORED_OWN_RESULT}: {reason}); answered 0x{SUCCESS:04X}",
            calling_ae=calling,
            sop_instance_uid=uid,
            study_uid=study_uid,
            reason=f"{IGNORED_OWN_RESULT}: {reason}",
        )
        return Received(SUCCESS, uid, study_uid, f"{IGNORED_OWN_RESULT}: {reason}", ignored=True)

    def receive(self, arrival: Arrival) -> Received:
        config: Config = self._owner.config
        calling = arrival.calling_ae
        context_class = arrival.context_class
        affected = arrival.affected
        if context_class not in SR_STORAGE_CLASSES:
            if context_class == EncapsulatedPDFStorage:  # the class of the node's summaries
                kept = self._keep_own_summary(arrival)
                if kept is not None:
                    return kept
                if not config.access.accept_images:
                    return self._refuse_document(calling, affected)
            # accept_images: the object is acknowledged and discarded, by design
            self.metrics.objects.labels(outcome="discarded").inc()
            log.info("discarded non-SR object of class %s from %s", context_class, calling)
            return Received(SUCCESS, affected, reason="not an SR: discarded")
        syntax = arrival.transfer_syntax
        try:
            if syntax in _LE_SYNTAXES:
                ds = identifying_attributes(arrival.body, syntax)
            else:  # deflated: inflate and decode every element now
                ds = arrival.decode()
                for _ in ds.iterall():
                    pass
        except Exception as exc:
            return self._rejected(
                calling,
                affected,
                CANNOT_UNDERSTAND,
                f"cannot be decoded ({type(exc).__name__}: {exc})",
            )
        sop_class = str(ds.get("SOPClassUID", "") or "")
        sop_uid = str(ds.get("SOPInstanceUID", "") or "")
        study_uid = str(ds.get("StudyInstanceUID", "") or "")
        problem = ""
        if sop_class != context_class:
            problem = f"SOP Class UID {sop_class or '(missing)'} is not the negotiated class"
        elif not valid_uid(sop_uid):
            problem = "SOP Instance UID missing or malformed"
        elif sop_uid != affected:
            problem = "SOP Instance UID differs from the request's Affected SOP Instance UID"
        elif not valid_uid(study_uid):
            problem = "Study Instance UID missing or malformed"
        if problem:
            return self._rejected(calling, affected, DOES_NOT_MATCH_SOP_CLASS, problem)
        own = received_own_result_reason(
            ds, arrival.body, implicit=syntax == ImplicitVRLittleEndian
        )
        try:
            if own is not None:  # kept and acknowledged, never graded nor forwarded
                self.journal.store_ignored(
                    sop_instance_uid=sop_uid,
                    study_uid=study_uid,
                    sop_class_uid=sop_class,
                    calling_ae=calling,
                    data=part10_bytes(arrival),
                    reason=f"{IGNORED_OWN_RESULT}: {own}",
                )
                return self._ignored(calling, sop_uid, study_uid, own)
            self.journal.store_object(
                sop_instance_uid=sop_uid,
                study_uid=study_uid,
                sop_class_uid=sop_class,
                transfer_syntax=syntax,
                calling_ae=calling,
                data=part10_bytes(arrival),
                settle_seconds=config.assembly.settle_seconds,
            )
        except Exception as exc:
            return self._rejected(
                calling,
                sop_uid,
                OUT_OF_RESOURCES,
                f"could not be stored ({type(exc).__name__}: {exc})",
                study_uid,
            )
        self.metrics.objects.labels(outcome="stored").inc()
        extra: dict[str, Any] = {}
        if config.logging.include_patient_identifiers:
            extra = {
                "patient_name": str(ds.get("PatientName", "") or ""),
                "patient_id": str(ds.get("PatientID", "") or ""),
            }
        event(
            "object_received",
            f"received {sop_uid} of study {study_uid} from {calling}",
            calling_ae=calling,
            sop_instance_uid=sop_uid,
            sop_class_uid=sop_class,
            study_uid=study_uid,
            transfer_syntax=syntax,
            **extra,
        )
        try:
            self.on_received(study_uid)
        except Exception:  # waking the assembler must never fail the store
            log.exception("wake-up after receipt failed")
        return Received(SUCCESS, sop_uid, study_uid)

    def _refuse_document(self, calling: str, affected: str) -> Received:
        """A PDF that is not this node's own summary, with ``access.accept_images`` off: a
        failure the sender sees, with the reason in the Error Comment."""
        refused = self._rejected(
            calling,
            affected,
            SOP_CLASS_NOT_SUPPORTED,
            "an Encapsulated PDF that this node did not write (access.accept_images is off)",
        )
        return dataclasses.replace(refused, error_comment=ONLY_OWN_SUMMARIES)

    def _rejected(
        self, calling: str, uid: str, status: int, reason: str, study_uid: str = ""
    ) -> Received:
        self.metrics.objects.labels(outcome="rejected").inc()
        event(
            "object_rejected",
            f"C-STORE from {calling}: object {uid} rejected: {reason}; answered 0x{status:04X}",
            level=logging.WARNING if status != OUT_OF_RESOURCES else logging.ERROR,
            calling_ae=calling,
            sop_instance_uid=uid,
            study_uid=study_uid,
            status=f"0x{status:04X}",
            reason=reason,
        )
        return Received(status, uid, study_uid, reason)


class Listener:
    def __init__(
        self,
        config: Config,
        journal: Journal,
        *,
        on_received: Callable[[str], None] = lambda study_uid: None,
        metrics: Metrics | None = None,
    ) -> None:
        self.config = config
        self.metrics = metrics or Metrics()
        self.journal = journal
        self.on_received = on_received
        self.intake = ObjectIntake(
            self,
            journal,
            on_received=lambda uid: self.on_received(uid),
            metrics=self.metrics,
        )
        self.server: ThreadedAssociationServer | None = None
        self._closed = False
        self.ae = self._build_ae()

    # -- set-up -------------------------------------------------------------------------------

    def _build_ae(self) -> AE:
        cfg = self.config
        ae = AE(ae_title=cfg.node.ae_title)
        ae.maximum_associations = cfg.limits.max_associations
        ae.maximum_pdu_size = cfg.limits.max_pdu
        ae.acse_timeout = cfg.limits.acse_timeout
        ae.dimse_timeout = cfg.limits.dimse_timeout
        ae.network_timeout = cfg.limits.network_timeout
        ae.require_called_aet = True
        # the calling AE allow-list and address pinning are checked in _on_requested
        ae.add_supported_context(VERIFICATION, SR_TRANSFER_SYNTAXES)
        for uid in SR_STORAGE_CLASSES:
            ae.add_supported_context(uid, SR_TRANSFER_SYNTAXES)
        # the class of the node's own summaries, whatever the configuration: one sent back is
        # answered success (ObjectIntake.receive); a rule retrying a refused association would
        # never end
        ae.add_supported_context(EncapsulatedPDFStorage, SR_TRANSFER_SYNTAXES)
        if cfg.access.accept_images:
            for uid in image_storage_classes():
                ae.add_supported_context(uid, ALL_TRANSFER_SYNTAXES)
        return ae

    def start(self) -> int:
        """Start listening (non-blocking); returns the port (useful when configured as 0)."""
        handlers = [
            (evt.EVT_C_ECHO, self._on_echo),
            (evt.EVT_C_STORE, self._on_store),
            (evt.EVT_REJECTED, self._on_rejected),
            (evt.EVT_ACCEPTED, self._on_accepted),
            (evt.EVT_REQUESTED, self._on_requested),
            (evt.EVT_CONN_CLOSE, self._on_conn_close),
            (evt.EVT_CONN_OPEN, self._on_conn_open),
        ]
        from service.network.tls import server_context

        ssl_context = server_context(self.config)
        self.server = self.ae.start_server(
            (self.config.node.bind, self.config.node.port),
            block=False,
            evt_handlers=handlers,
            ssl_context=ssl_context,
        )
        port = int(self.server.server_address[1])
        event(
            "listening",
            f"listening as {self.config.node.ae_title} on {self.config.node.bind or '*'}:{port}"
            + (" (TLS)" if ssl_context else ""),
            ae_title=self.config.node.ae_title,
            bind=self.config.node.bind,
            port=port,
            tls=ssl_context is not None,
        )
        return port

    def is_up(self) -> bool:
        """The listening socket is open and its server thread runs."""
        server = self.server
        if server is None or self._closed:
            return False
        try:
            open_socket = server.socket.fileno() >= 0
        except OSError:
            return False
        threads = [t for t in getattr(self.ae, "_servers", []) if t is server]
        return open_socket and bool(threads)

    @property
    def port(self) -> int:
        assert self.server is not None
        return int(self.server.server_address[1])

    def stop_accepting(self) -> None:
        """Close the listening socket; associations already open go on.  Idempotent."""
        if self.server is not None and not self._closed:
            self._closed = True
            self.server.shutdown()

    def active_associations(self) -> int:
        return 0 if self.server is None else len(self.server.active_associations)

    def abort_all(self) -> None:
        for assoc in self.ae.active_associations:
            assoc.abort()

    # -- handlers (network threads: no clinical work here) ---------------------------------------

    def _on_conn_open(self, ev: Any) -> None:
        """Answer without waiting for Nagle's algorithm (TCP_NODELAY)."""
        no_delay(ev.assoc)

    def _on_conn_close(self, ev: Any) -> None:
        """A connection closed before its A-ASSOCIATE-RQ (a port probe, a TCP health check):
        wake the association thread now instead of at the ACSE timeout, so that it does not
        hold one of the limits.max_associations slots meanwhile."""
        assoc = ev.assoc
        if assoc.is_acceptor and getattr(assoc.requestor, "primitive", None) is None:
            assoc.dul.to_user_queue.put(None)  # read as "no request": the thread ends

    def _on_requested(self, ev: Any) -> None:
        """Allow-list and address pinning, against the configuration in force now."""
        req = ev.assoc.requestor
        primitive = getattr(req, "primitive", None)
        calling = str(getattr(primitive, "calling_ae_title", "") or "").strip()
        access = self.config.access
        why = ""
        if not access.calling_ae_allowed(calling):
            why = "calling AE title not allowed"
        elif not access.address_allowed(calling, str(req.address)):
            why = "calling AE title pinned to other addresses"
        if why:
            # PS3.8 9.3.4: rejected-permanent, service user, calling AE title not recognised
            ev.assoc.acse.send_reject(0x01, 0x01, 0x03)
            self._log_rejection(ev, why)
            ev.assoc.kill()  # as pynetdicom does after its own rejections: the PDU goes out first

    def _on_accepted(self, ev: Any) -> None:
        req = ev.assoc.requestor
        self.metrics.associations.labels(outcome="accepted").inc()
        event(
            "association_opened",
            f"association accepted from {str(req.ae_title).strip()} ({req.address})",
            calling_ae=str(req.ae_title).strip(),
            address=req.address,
            port=req.port,
        )

    def _on_rejected(self, ev: Any) -> None:
        self._log_rejection(ev, "called AE title not ours")

    def _log_rejection(self, ev: Any, why: str) -> None:
        req = ev.assoc.requestor
        primitive = getattr(req, "primitive", None)
        calling = str(getattr(primitive, "calling_ae_title", req.ae_title) or "").strip()
        called = getattr(primitive, "called_ae_title", None)
        called_text = str(called).strip() if called is not None else "?"
        self.metrics.associations.labels(outcome="rejected").inc()
        event(
            "association_rejected",
            f"association rejected: calling AE {calling!r}, called AE {called_text!r}, "
            f"from {req.address}:{req.port} ({why})",
            level=logging.WARNING,
            calling_ae=calling,
            called_ae=called_text,
            address=req.address,
            port=req.port,
            reason=why,
        )

    def _on_echo(self, ev: Any) -> int:
        return SUCCESS

    def _on_store(self, ev: Any) -> int | Dataset:
        received = self.intake.receive(store_arrival(ev, str(ev.assoc.requestor.ae_title)))
        return received.response()
