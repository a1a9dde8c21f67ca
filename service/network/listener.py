"""The listening Application Entity: association policy and event handlers, nothing else.

* Verification (C-ECHO) and C-STORE of the SR storage SOP classes, in implicit and explicit VR
  little endian and deflated explicit VR little endian.
* Optionally every image storage class too, accepted and discarded (``access.accept_images``).
* The called AE title must match ours; calling AE titles may be limited to an allow-list
  (pynetdicom rejects others; the rejection is logged with the peer's address).
* A C-STORE answers success only after the object is durable in the spool and committed in the
  journal.  A store failure answers 0xA700 (Out of Resources) so the sender keeps the object; an
  object that cannot be decoded answers 0xC000 (Cannot understand), one that does not match the
  negotiated SOP class or lacks its identifying UIDs answers 0xA900 (Data Set does not match
  SOP Class) (PS3.4 Annex B.2.3).  The association goes on either way.

Grading is never done here: after recording an object the handler only wakes the assembler.
"""

from __future__ import annotations

import logging
import re
from collections.abc import Callable
from io import BytesIO
from typing import Any

from pydicom.filebase import DicomBytesIO
from pydicom.filewriter import write_file_meta_info
from pydicom.uid import (
    DeflatedExplicitVRLittleEndian,
    ExplicitVRLittleEndian,
    ImplicitVRLittleEndian,
)
from pynetdicom import AE, ALL_TRANSFER_SYNTAXES, evt
from pynetdicom.presentation import StoragePresentationContexts
from pynetdicom.transport import ThreadedAssociationServer

from service.config import Config
from service.store.journal import Journal
from service.store.spool import Spool

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

_UID = re.compile(r"^[0-9]+(\.[0-9]+)*$")


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


def part10_bytes(event: Any) -> bytes:
    """The received dataset exactly as encoded on the wire, wrapped as a Part 10 file."""
    meta = DicomBytesIO()
    meta.is_little_endian = True
    meta.is_implicit_VR = False
    write_file_meta_info(meta, event.file_meta, enforce_standard=True)
    raw = event.request.DataSet
    body = raw.getvalue() if isinstance(raw, BytesIO) else bytes(raw.read())
    return b"\x00" * 128 + b"DICM" + meta.getvalue() + body


class Listener:
    def __init__(
        self,
        config: Config,
        journal: Journal,
        spool: Spool,
        *,
        on_received: Callable[[str], None] = lambda study_uid: None,
    ) -> None:
        self.config = config
        self.journal = journal
        self.spool = spool
        self.on_received = on_received
        self.server: ThreadedAssociationServer | None = None
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
        if cfg.access.allowed_calling_aes:
            ae.require_calling_aet = list(cfg.access.allowed_calling_aes)
        ae.add_supported_context(VERIFICATION, SR_TRANSFER_SYNTAXES)
        for uid in SR_STORAGE_CLASSES:
            ae.add_supported_context(uid, SR_TRANSFER_SYNTAXES)
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
        ]
        self.server = self.ae.start_server(
            (self.config.node.bind, self.config.node.port), block=False, evt_handlers=handlers
        )
        port = int(self.server.server_address[1])
        log.info(
            "listening as %s on %s:%d",
            self.config.node.ae_title,
            self.config.node.bind or "*",
            port,
        )
        return port

    @property
    def port(self) -> int:
        assert self.server is not None
        return int(self.server.server_address[1])

    def stop_accepting(self) -> None:
        """Close the listening socket; associations already open go on."""
        if self.server is not None:
            self.server.shutdown()

    def active_associations(self) -> int:
        return 0 if self.server is None else len(self.server.active_associations)

    def abort_all(self) -> None:
        for assoc in self.ae.active_associations:
            assoc.abort()

    # -- handlers (network threads: no clinical work here) ---------------------------------------

    def _on_accepted(self, event: Any) -> None:
        req = event.assoc.requestor
        log.info("association accepted from %s (%s)", req.ae_title, req.address)

    def _on_rejected(self, event: Any) -> None:
        req = event.assoc.requestor
        called = getattr(getattr(req, "primitive", None), "called_ae_title", None)
        log.warning(
            "association rejected: calling AE %r, called AE %r, from %s:%s",
            req.ae_title,
            str(called).strip() if called is not None else "?",
            req.address,
            req.port,
        )

    def _on_echo(self, event: Any) -> int:
        return SUCCESS

    def _on_store(self, event: Any) -> int:
        calling = str(event.assoc.requestor.ae_title).strip()
        context_class = str(event.context.abstract_syntax)
        affected = str(event.request.AffectedSOPInstanceUID or "")
        if context_class not in SR_STORAGE_CLASSES:
            # accept_images: the object is acknowledged and discarded, by design
            log.info("discarded non-SR object of class %s from %s", context_class, calling)
            return SUCCESS
        try:
            ds = event.dataset
            for _ in ds.iterall():  # decode every element now, not later in the grader
                pass
        except Exception as exc:
            log.warning(
                "C-STORE from %s: object %s cannot be decoded (%s: %s); answered 0x%04X",
                calling,
                affected,
                type(exc).__name__,
                exc,
                CANNOT_UNDERSTAND,
            )
            return CANNOT_UNDERSTAND
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
            log.warning(
                "C-STORE from %s: object %s rejected: %s; answered 0x%04X",
                calling,
                affected,
                problem,
                DOES_NOT_MATCH_SOP_CLASS,
            )
            return DOES_NOT_MATCH_SOP_CLASS
        try:
            data = part10_bytes(event)
            path = self.spool.write_object(study_uid, sop_uid, data)
            self.journal.record_object(
                sop_instance_uid=sop_uid,
                study_uid=study_uid,
                sop_class_uid=sop_class,
                transfer_syntax=str(event.context.transfer_syntax),
                calling_ae=calling,
                path=path,
                settle_seconds=self.config.assembly.settle_seconds,
            )
        except Exception as exc:
            log.error(
                "C-STORE from %s: object %s could not be stored (%s: %s); answered 0x%04X",
                calling,
                sop_uid,
                type(exc).__name__,
                exc,
                OUT_OF_RESOURCES,
            )
            return OUT_OF_RESOURCES
        log.info("received %s of study %s from %s", sop_uid, study_uid, calling)
        try:
            self.on_received(study_uid)
        except Exception:  # waking the assembler must never fail the store
            log.exception("wake-up after receipt failed")
        return SUCCESS
