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

import contextlib
import logging
import socket
import threading
import time
from collections import defaultdict
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pydicom
from pydicom.filereader import read_file_meta_info
from pydicom.uid import ExplicitVRLittleEndian, ImplicitVRLittleEndian
from pynetdicom import AE, _config
from pynetdicom.association import Association

from service.config import Config, DestinationConfig
from service.observability.logs import event
from service.observability.metrics import Metrics
from service.store.journal import FOLDER_DESTINATION, DueDelivery, Journal
from service.store.spool import durable_write, safe_name

log = logging.getLogger("diastolic_sr.sender")

#: C-STORE response statuses that mean the peer has the object (PS3.4 Annex B.2.3: success
#: and the warnings "coercion of data elements", "elements discarded", "data set does not
#: match SOP class")
_STORED = {0x0000, 0xB000, 0xB006, 0xB007}

#: Encapsulated PDF Storage (PS3.4 Annex B.5): the summary
ENCAPSULATED_PDF = "1.2.840.10008.5.1.4.1.1.104.1"

#: objects sent over one association at most (results that fall due while it is open follow
#: on it up to this number; then it is released and the next round opens a new one)
MAX_PER_ASSOCIATION = 200


def no_delay(assoc: Any) -> None:
    """Send each PDU at once (TCP_NODELAY).  pynetdicom writes a C-STORE's command and data
    set as separate PDUs; with Nagle's algorithm the second waits for the peer's delayed
    acknowledgement of the first (tens of milliseconds per object)."""
    sock = getattr(getattr(getattr(assoc, "dul", None), "socket", None), "socket", None)
    if sock is not None:
        with contextlib.suppress(OSError):
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)


def _unreachable_reason(host: str, port: int, where: str) -> str:
    """Why an association could not be set up when the peer did not reject it."""
    try:
        with socket.create_connection((host, port), timeout=3):
            pass
    except OSError as exc:
        return f"cannot connect to {where}: {exc.strerror or exc}"
    return f"association with {where} aborted or timed out"


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
                data = Path(d.path).read_bytes()
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
        ae = AE(ae_title=self.config.node.ae_title)
        ae.acse_timeout = limits.acse_timeout
        ae.dimse_timeout = limits.dimse_timeout
        ae.network_timeout = limits.network_timeout
        for sop_class in sorted({o.sop_class for o in batch}):
            ae.add_requested_context(sop_class, [ExplicitVRLittleEndian, ImplicitVRLittleEndian])
        where = f"{dest.ae_title}@{dest.host}:{dest.port}" + (" (TLS)" if dest.tls else "")
        try:
            tls_args = None
            if dest.tls:
                from service.network.tls import client_context

                tls_args = (client_context(self.config), dest.host)
            assoc = ae.associate(dest.host, dest.port, ae_title=dest.ae_title, tls_args=tls_args)
        except Exception as exc:  # bad host name, TLS set-up and the like
            for o in batch:
                self._failed(o.due, f"cannot associate with {where}: {exc}", o.kind)
            return
        if not assoc.is_established:
            why = (
                f"association rejected by {where}"
                if assoc.is_rejected
                else _unreachable_reason(dest.host, dest.port, where)
            )
            for o in batch:
                self._failed(o.due, why, o.kind)
            return
        no_delay(assoc)
        accepted = {str(cx.abstract_syntax) for cx in assoc.accepted_contexts}
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
            if assoc.is_established:
                assoc.release()

    def _readable(self, items: list[DueDelivery]) -> list[_Outgoing]:
        """The spooled objects of ``items`` with their file meta; an unreadable one fails."""
        out = []
        for d in items:
            try:
                meta = read_file_meta_info(d.path)
                sop_class = str(meta.MediaStorageSOPClassUID)
                syntax = str(meta.TransferSyntaxUID)
            except Exception as exc:
                self.journal.mark_failed(d.id, f"spooled result unreadable: {exc}")
                self.metrics.deliveries.labels(outcome="failed", kind="result").inc()
                continue
            kind = "summary" if sop_class == ENCAPSULATED_PDF else "result"
            out.append(_Outgoing(d, sop_class, syntax, kind))
        return out

    def _send(self, assoc: Association, o: _Outgoing, where: str) -> None:
        """One C-STORE and its outcome in the journal."""
        d, kind = o.due, o.kind
        if self._waits_for_parent(d, kind):
            return
        try:
            status = _store(assoc, o)
        except Exception as exc:
            self._failed(d, f"C-STORE to {where} raised {type(exc).__name__}: {exc}", kind)
            return
        code = getattr(status, "Status", None)
        if code is None:
            self._failed(d, f"no C-STORE response from {where}", kind)
        elif int(code) in _STORED:
            self._delivered(d, where, kind)
        else:
            self._failed(d, f"C-STORE status 0x{int(code):04X} from {where}", kind)


@dataclass(frozen=True)
class _Outgoing:
    due: DueDelivery
    sop_class: str
    transfer_syntax: str
    kind: str  # "result" or "summary"


#: pynetdicom's switch for sending a file's data set as it is encoded (process-wide)
_RAW_SENDING = threading.Lock()


def _store(assoc: Association, o: _Outgoing) -> Any:
    """C-STORE of a spooled object.  Sent as encoded in the spool (no decoding and encoding
    again) when the peer accepted its SOP class in the file's transfer syntax; otherwise
    decoded and converted to the transfer syntax the peer accepted."""
    exact = any(
        str(cx.abstract_syntax) == o.sop_class and str(cx.transfer_syntax[0]) == o.transfer_syntax
        for cx in assoc.accepted_contexts
    )
    if not exact:
        return assoc.send_c_store(pydicom.dcmread(o.due.path))
    with _RAW_SENDING:
        before = _config.STORE_SEND_CHUNKED_DATASET
        _config.STORE_SEND_CHUNKED_DATASET = True
        try:
            return assoc.send_c_store(Path(o.due.path))
        finally:
            _config.STORE_SEND_CHUNKED_DATASET = before
