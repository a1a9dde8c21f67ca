"""Delivery of result SRs (and their summary PDFs): C-STORE (SCU) to the configured
destinations, over TLS where a destination asks for it, and the results folder.

One thread takes due deliveries from the journal's outbox, groups them by destination, opens
one association per destination and sends each result, as it is encoded in the spool; results
that fall due while the association is open follow on it (bounded).  A failed attempt
(destination down, association rejected, failure status) backs off exponentially
(``backoff_initial_seconds * 2**(attempts-1)``, at most ``backoff_max_seconds``); past
``max_attempts`` the delivery is marked failed with its reason, never dropped.  Everything is in
the journal, so the outbox survives restarts.
"""

from __future__ import annotations

import io
import logging
import threading
import time
from collections import defaultdict
from dataclasses import dataclass
from pathlib import Path

import pydicom
from pydicom.filebase import DicomBytesIO
from pydicom.filewriter import write_dataset
from pydicom.uid import ExplicitVRLittleEndian, ImplicitVRLittleEndian

from service.config import Config, DestinationConfig
from service.network.store_association import (
    AssociationFailed,
    CannotConnect,
    Proposal,
    StoreAssociation,
    StoreResponse,
    Timeouts,
)
from service.observability.logs import event
from service.observability.metrics import Metrics
from service.sr.read import file_body_start, file_meta_uids
from service.store.journal import FOLDER_DESTINATION, DueDelivery, Journal
from service.store.spool import durable_write, safe_name

log = logging.getLogger("diastolic_sr.sender")

#: C-STORE response statuses that mean the peer has the object (PS3.4 Annex B.2.3: success
#: and the warnings "coercion of data elements", "elements discarded", "data set does not
#: match SOP class")
_STORED = {0x0000, 0xB000, 0xB006, 0xB007}

#: Encapsulated PDF Storage (PS3.4 Annex B.5): the summary
ENCAPSULATED_PDF = "1.2.840.10008.5.1.4.1.1.104.1"

#: transfer syntaxes proposed for every SOP class: the node writes explicit VR little endian;
#: implicit VR little endian is the default every peer supports (PS3.5 section 10.1)
_PROPOSED_SYNTAXES = (ExplicitVRLittleEndian, ImplicitVRLittleEndian)

#: objects sent over one association at most (results that fall due while it is open follow
#: on it up to this number; then it is released and the next round opens a new one)
MAX_PER_ASSOCIATION = 200


class Sender:
    def __init__(
        self,
        config: Config,
        journal: Journal,
        *,
        poll_seconds: float = 0.5,
        metrics: Metrics | None = None,
    ) -> None:
        self.config = config
        self.metrics = metrics or Metrics()
        self.journal = journal
        self._poll = poll_seconds
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="sender", daemon=True)

    def start(self) -> None:
        self._thread.start()

    def wake(self) -> None:
        self._wake.set()

    def stop(self, timeout: float = 30.0) -> None:
        """Stop after the association in progress (pending deliveries stay in the outbox)."""
        self._stop.set()
        self._wake.set()
        self._thread.join(timeout)

    def _run(self) -> None:
        while not self._stop.is_set():
            self._wake.clear()
            wait = self._poll
            try:
                self.deliver_due()
                nxt = self.journal.next_delivery_at()
                if nxt is not None:
                    wait = max(0.05, min(wait, nxt - time.time()))
            except Exception:
                log.exception("delivery loop error; retrying")
            self._wake.wait(wait)

    def deliver_due(self) -> int:
        """Send every delivery that is due now; returns how many were attempted."""
        due = self.journal.due_deliveries()
        by_dest: dict[str, list[DueDelivery]] = defaultdict(list)
        for d in due:
            by_dest[d.destination].append(d)
        for name, items in by_dest.items():
            if self._stop.is_set():
                break
            if name == FOLDER_DESTINATION:
                self._to_folder(items)
            elif name in self.config.destinations:
                self._to_peer(self.config.destinations[name], items)
            else:
                for d in items:
                    self.journal.mark_failed(d.id, f'destination "{name}" is no longer configured')
                    log.error("result %s: destination %s not configured", d.result_uid, name)
        return len(due)

    def _failed(self, d: DueDelivery, error: str, kind: str = "result") -> None:
        cfg = self.config.delivery
        state = self.journal.mark_attempt_failed(
            d.id,
            error,
            max_attempts=cfg.max_attempts,
            backoff_initial=cfg.backoff_initial_seconds,
            backoff_max=cfg.backoff_max_seconds,
        )
        final = state == "failed"
        self.metrics.deliveries.labels(outcome="failed" if final else "retry", kind=kind).inc()
        event(
            "result_failed" if final else "result_retry",
            f"{kind} {d.result_uid} to {d.destination}: attempt {d.attempts + 1} failed "
            f"({error}){'; giving up' if final else '; will retry'}",
            level=logging.ERROR if final else logging.WARNING,
            result_uid=d.result_uid,
            study_uid=d.study_uid,
            destination=d.destination,
            kind=kind,
            attempt=d.attempts + 1,
            reason=error,
        )

    def _delivered(self, d: DueDelivery, where: str, kind: str) -> None:
        self.journal.mark_delivered(d.id)
        self.metrics.deliveries.labels(outcome="delivered", kind=kind).inc()
        event(
            "result_delivered",
            f"{kind} {d.result_uid} delivered to {where}",
            result_uid=d.result_uid,
            study_uid=d.study_uid,
            destination=d.destination,
            kind=kind,
        )

    def _waits_for_parent(self, d: DueDelivery, kind: str) -> bool:
        """A summary goes only where its result SR has arrived (it references the SR)."""
        if d.parent_uid is None or self.journal.delivered_to(d.parent_uid, d.destination):
            return False
        self._failed(d, f"its result SR {d.parent_uid} is not delivered there yet", kind)
        return True

    def _to_folder(self, items: list[DueDelivery]) -> None:
        folder = self.config.results_dir
        for d in items:
            if self._waits_for_parent(d, "file"):
                continue
            try:
                if folder is None:
                    raise OSError("no results folder configured")
                data = self.journal.result_data(d.result_uid)
                durable_write(Path(folder) / f"{safe_name(d.result_uid)}.dcm", data)
            except OSError as exc:
                self._failed(d, f"cannot write to results folder: {exc}")
                continue
            self._delivered(d, "the results folder", "file")

    def _to_peer(self, dest: DestinationConfig, items: list[DueDelivery]) -> None:
        """Send ``items`` over one association; results that fall due meanwhile for the same
        destination follow on it (at most ``MAX_PER_ASSOCIATION`` objects), then it is
        released."""
        batch = self._readable(items)
        if not batch:
            return
        limits = self.config.limits
        where = f"{dest.ae_title}@{dest.host}:{dest.port}" + (" (TLS)" if dest.tls else "")
        proposals = [
            Proposal(sop_class, _PROPOSED_SYNTAXES)
            for sop_class in sorted({o.sop_class for o in batch})
        ]
        try:
            tls = None
            if dest.tls:
                from service.network.tls import client_context

                tls = client_context(self.config)
            assoc = StoreAssociation.open(
                dest.host,
                dest.port,
                calling_ae=self.config.node.ae_title,
                called_ae=dest.ae_title,
                proposals=proposals,
                max_pdu=limits.max_pdu,
                timeouts=Timeouts(
                    connect=limits.acse_timeout,
                    acse=limits.acse_timeout,
                    dimse=limits.dimse_timeout,
                    network=limits.network_timeout,
                ),
                tls=tls,
            )
        except AssociationFailed as exc:
            if isinstance(exc, CannotConnect):
                why = f"cannot connect to {where}: {exc}"
            elif exc.rejected:
                why = f"association rejected by {where}: {exc}"
            else:
                why = f"cannot associate with {where}: {exc}"
            for o in batch:
                self._failed(o.due, why, o.kind)
            return
        except Exception as exc:  # TLS set-up and the like
            for o in batch:
                self._failed(o.due, f"cannot associate with {where}: {exc}", o.kind)
            return
        accepted = {cx.abstract_syntax for cx in assoc.accepted_contexts}
        seen = {o.due.id for o in batch}
        budget = MAX_PER_ASSOCIATION
        try:
            while batch and budget > 0:
                for o in batch:
                    if self._stop.is_set() or not assoc.is_established:
                        return
                    budget -= 1
                    self._send(assoc, o, where)
                if self._stop.is_set() or not assoc.is_established:
                    return
                # results graded while these went out: on the same association
                more = [
                    d
                    for d in self.journal.due_deliveries()
                    if d.destination == items[0].destination
                    and d.id not in seen
                    and d.sop_class_uid in accepted
                ][:budget]
                seen.update(d.id for d in more)
                batch = self._readable(more)
        finally:
            assoc.release()

    def _readable(self, items: list[DueDelivery]) -> list[_Outgoing]:
        """The spooled objects of ``items`` with their file meta; an unreadable one fails."""
        out = []
        for d in items:
            try:
                data = self.journal.result_data(d.result_uid)
            except OSError as exc:
                meta, why = None, f"{type(exc).__name__}: {exc.strerror or exc}"
            else:
                meta = file_meta_uids(data)
                why = "no DICOM file meta information (PS3.10 section 7.1)"
            if meta is None:
                self.journal.mark_failed(d.id, f"spooled result unreadable: {why}")
                self.metrics.deliveries.labels(outcome="failed", kind="result").inc()
                continue
            sop_class = meta["MediaStorageSOPClassUID"]
            kind = "summary" if sop_class == ENCAPSULATED_PDF else "result"
            out.append(
                _Outgoing(
                    d,
                    sop_class,
                    meta["MediaStorageSOPInstanceUID"],
                    meta["TransferSyntaxUID"],
                    kind,
                    data,
                )
            )
        return out

    def _send(self, assoc: StoreAssociation, o: _Outgoing, where: str) -> None:
        """One C-STORE and its outcome in the journal."""
        d, kind = o.due, o.kind
        if self._waits_for_parent(d, kind):
            return
        try:
            response = _store(assoc, o)
        except AssociationFailed as exc:
            self._failed(d, f"C-STORE to {where} failed: {exc}", kind)
            return
        except Exception as exc:
            self._failed(d, f"C-STORE to {where} raised {type(exc).__name__}: {exc}", kind)
            return
        if response is None:
            self._failed(d, f"{where} accepted no presentation context for {o.sop_class}", kind)
        elif response.status in _STORED:
            self._delivered(d, where, kind)
        else:
            comment = f" ({response.error_comment})" if response.error_comment else ""
            self._failed(d, f"C-STORE status 0x{response.status:04X} from {where}{comment}", kind)


@dataclass(frozen=True)
class _Outgoing:
    due: DueDelivery
    sop_class: str
    sop_instance: str
    transfer_syntax: str
    kind: str  # "result" or "summary"
    #: the spooled Part 10 file, read once (at most one round of due deliveries is held)
    data: bytes


def _store(assoc: StoreAssociation, o: _Outgoing) -> StoreResponse | None:
    """C-STORE of a spooled object.  Sent as encoded in the spool (no decoding and encoding
    again) when the peer accepted its SOP class in the file's transfer syntax; otherwise
    decoded and encoded in the transfer syntax the peer accepted.  None when the peer accepted
    no context for its SOP class."""
    data = o.data
    exact = assoc.context_for(o.sop_class, o.transfer_syntax)
    start = file_body_start(data)
    if exact is not None and start is not None:
        return assoc.store(exact, o.sop_instance, memoryview(data)[start:])
    context = assoc.context_for(o.sop_class)
    if context is None:
        return None
    ds = pydicom.dcmread(io.BytesIO(data))
    fp = DicomBytesIO()
    fp.is_little_endian = True
    fp.is_implicit_VR = context.transfer_syntax == ImplicitVRLittleEndian
    write_dataset(fp, ds)
    return assoc.store(context, o.sop_instance, fp.getvalue())
