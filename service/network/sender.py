"""Delivery of result SRs (and their summary PDFs): C-STORE (SCU, through pynetdicom) to the
configured destinations, over TLS where a destination asks for it, STOW-RS to a destination
that is a DICOMweb base URL (:mod:`service.dicomweb.stow`), and the results folder.

Each destination has a worker thread of its own, and every step of an association has a total
deadline (:mod:`service.network.store_scu`), so a destination that is down, slow or trickling
delays nobody else: its own deliveries wait and back off, the others go on.  A worker claims
its destination's due deliveries from the journal's outbox (with a lease: senders of other
processes or nodes never send the same delivery at the same time, and take over one whose
sender died), opens one association and sends each result as it is stored; results that fall
due while the association is open, or within a second after the last was sent, follow on it
(bounded).  A failed attempt (destination down, association rejected, failure status, no
answer in time) backs off exponentially
(``backoff_initial_seconds * 2**(attempts-1)``, at most ``backoff_max_seconds``); past
``max_attempts`` the delivery is marked failed with its reason,
never dropped.  A warning status (PS3.7 Annex C: 0001, 0107, 0116, Bxxx) means the peer stored
the object: the delivery is done and the warning logged.  Everything is in the journal, so the
outbox survives restarts.
"""

from __future__ import annotations

import logging
import threading
import time
from dataclasses import dataclass
from pathlib import Path

from service.config import Config, DestinationConfig, DicomwebDestinationConfig
from service.network.grader import OutageLog, idle
from service.network.store_scu import (
    AssociationFailed,
    StoreSession,
    Timeouts,
    UserIdentity,
)
from service.observability.logs import event
from service.observability.metrics import Metrics
from service.sr.read import file_meta_uids
from service.store.journal import (
    DEFAULT_LEASE_SECONDS,
    FOLDER_DESTINATION,
    DueDelivery,
    Journal,
    JournalUnavailable,
)
from service.store.spool import durable_write, safe_name

log = logging.getLogger("diastolic_sr.sender")

#: Encapsulated PDF Storage (PS3.4 Annex B.5): the summary
ENCAPSULATED_PDF = "1.2.840.10008.5.1.4.1.1.104.1"
#: Comprehensive SR Storage (PS3.4 Annex B.5): the result SR
COMPREHENSIVE_SR = "1.2.840.10008.5.1.4.1.1.88.33"

#: objects sent over one association at most (results that fall due while it is open follow
#: on it up to this number; then it is released and the next round opens a new one)
MAX_PER_ASSOCIATION = 200
#: seconds an association whose deliveries are all sent stays open for results about to fall
#: due (a stream of studies is graded one by one: its results go over one association instead
#: of one association each); far below any peer's idle timeout
LINGER_SECONDS = 1.0
#: how often a lingering worker looks whether its destination has a delivery due
LINGER_POLL_SECONDS = 0.01


class Sender:
    """The delivery workers of a node: one per destination (and one for the results folder),
    started as deliveries for it appear; a dispatcher fails deliveries to destinations that
    are no longer configured."""

    def __init__(
        self,
        config: Config,
        journal: Journal,
        *,
        owner: str = "sender",
        poll_seconds: float = 0.5,
        lease_seconds: float = DEFAULT_LEASE_SECONDS,
        metrics: Metrics | None = None,
    ) -> None:
        self.config = config
        self.metrics = metrics or Metrics()
        self.journal = journal
        #: who holds the deliveries this sender claims
        self.owner = owner
        self.lease_seconds = lease_seconds
        self._poll = poll_seconds
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._workers: dict[str, _Worker] = {}
        self._lock = threading.Lock()
        #: one line when the journal cannot be reached, one when it can again
        self.outage = OutageLog("sender")
        #: destinations of a shared journal this node does not know (said once each)
        self._unknown: set[str] = set()
        self._thread = threading.Thread(target=self._run, name="sender", daemon=True)

    def start(self) -> None:
        self._thread.start()

    def wake(self) -> None:
        self._wake.set()
        with self._lock:
            workers = list(self._workers.values())
        for w in workers:
            w.wake.set()

    def stop(self, timeout: float = 30.0) -> None:
        """Stop after the C-STORE in progress (pending deliveries stay in the outbox); an
        association still open is released, or cut when its peer does not answer."""
        self._stop.set()
        self.wake()
        deadline = time.monotonic() + timeout
        self._thread.join(max(0.0, deadline - time.monotonic()))
        with self._lock:
            workers = list(self._workers.values())
        for w in workers:
            w.join(max(0.0, deadline - time.monotonic()))
        for w in workers:
            if w.is_alive():
                w.cut()
                w.join(5)
        try:  # what was claimed and not sent goes back to the outbox at once
            self.journal.release_owner(self.owner)
        except Exception as exc:  # its leases run out instead
            log.warning("cannot give back the deliveries in hand: %s", exc)

    @property
    def stopping(self) -> bool:
        return self._stop.is_set()

    def _run(self) -> None:
        while not self._stop.is_set():
            self._wake.clear()
            wait = self._poll
            try:
                self._dispatch()
                nxt = self.journal.next_delivery_at()
                self.outage.ok()
                if nxt is not None:
                    wait = max(0.01, min(wait, nxt - self.journal.now()))
            except JournalUnavailable as exc:
                self.outage.failed(exc)
                wait = max(wait, 1.0)
            except Exception:
                log.exception("delivery loop error; retrying")
            idle(self.journal, self._wake, self._stop, wait)

    def _dispatch(self) -> None:
        """A worker for every destination with due deliveries; deliveries to a destination
        that is no longer configured fail with that reason."""
        for name in self.journal.due_destinations():
            if name != FOLDER_DESTINATION and name not in self.config.destinations:
                if self.journal.shared:
                    # another node sharing the journal may know it: left to that node
                    if name not in self._unknown:
                        self._unknown.add(name)
                        log.warning(
                            "deliveries to destination %s wait for a node that has it "
                            "configured (nodes sharing a journal should share destinations)",
                            name,
                        )
                    continue
                for d in self.claim(name):
                    self.journal.mark_failed(d.id, f'destination "{name}" is no longer configured')
                    log.error("result %s: destination %s not configured", d.result_uid, name)
                continue
            with self._lock:
                worker = self._workers.get(name)
                if worker is None or not worker.is_alive():
                    worker = self._workers[name] = _Worker(self, name)
                    worker.start()
            worker.wake.set()

    def claim(self, destination: str, limit: int = 100) -> list[DueDelivery]:
        """Due deliveries to ``destination``, claimed for this sender."""
        return self.journal.claim_deliveries(
            destination, owner=self.owner, lease_seconds=self.lease_seconds, limit=limit
        )

    # -- recording outcomes (any worker) ----------------------------------------------------

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

    def _delivered(self, d: DueDelivery, where: str, kind: str, warning: str = "") -> None:
        self.journal.mark_delivered(d.id)
        self.metrics.deliveries.labels(outcome="delivered", kind=kind).inc()
        fields = {"warning": warning} if warning else {}
        event(
            "result_delivered",
            f"{kind} {d.result_uid} delivered to {where}"
            + (f", stored with a warning: {warning}" if warning else ""),
            level=logging.WARNING if warning else logging.INFO,
            result_uid=d.result_uid,
            study_uid=d.study_uid,
            destination=d.destination,
            kind=kind,
            **fields,
        )

    def _waits_for_parent(self, d: DueDelivery, kind: str) -> bool:
        """A summary goes only where its result SR has arrived (it references the SR)."""
        if d.parent_uid is None or self.journal.delivered_to(d.parent_uid, d.destination):
            return False
        self._failed(d, f"its result SR {d.parent_uid} is not delivered there yet", kind)
        return True

    def _readable(self, items: list[DueDelivery]) -> list[_Outgoing]:
        """The stored objects of ``items`` with their file meta; an unreadable one fails."""
        out = []
        for d in items:
            try:
                data = self.journal.result_data(d.result_uid)
            except JournalUnavailable:
                raise  # not the object's fault: the delivery waits for the journal
            except OSError as exc:
                meta, why = None, f"{type(exc).__name__}: {exc.strerror or exc}"
            else:
                meta = file_meta_uids(data)
                why = "no DICOM file meta information (PS3.10 section 7.1)"
            if meta is None:
                self.journal.mark_failed(d.id, f"stored result unreadable: {why}")
                self.metrics.deliveries.labels(outcome="failed", kind="result").inc()
                continue
            sop_class = meta["MediaStorageSOPClassUID"]
            kind = "summary" if sop_class == ENCAPSULATED_PDF else "result"
            out.append(_Outgoing(d, sop_class, kind, data))
        return out


class _Worker(threading.Thread):
    """Delivers the results due to one destination, one association at a time."""

    def __init__(self, sender: Sender, destination: str) -> None:
        super().__init__(name=f"sender-{destination}", daemon=True)
        self.sender = sender
        self.destination = destination
        self.wake = threading.Event()
        self._session: StoreSession | None = None

    @property
    def journal(self) -> Journal:
        return self.sender.journal

    @property
    def config(self) -> Config:
        return self.sender.config

    def cut(self) -> None:
        """End the association in progress now (a stop that cannot wait for the peer)."""
        session = self._session
        if session is not None:
            session.cut()

    def run(self) -> None:
        while not self.sender.stopping:
            self.wake.clear()
            wait = self.sender._poll
            try:
                if not self.deliver_due():
                    return  # the destination is no longer configured
                nxt = self.journal.next_delivery_at(destination=self.destination)
                if nxt is not None:
                    wait = max(0.05, min(wait, nxt - self.journal.now()))
            except JournalUnavailable as exc:
                self.sender.outage.failed(exc)
                wait = max(wait, 1.0)
            except Exception:
                log.exception("delivery to %s: error; retrying", self.destination)
            self.wake.wait(wait)

    def deliver_due(self) -> bool:
        """Send what is due now; False when this destination is no longer configured."""
        name = self.destination
        if name != FOLDER_DESTINATION and name not in self.config.destinations:
            return False
        items = self.sender.claim(name)
        if not items:
            return True
        if name == FOLDER_DESTINATION:
            self._to_folder(items)
        else:
            dest = self.config.destinations[name]
            if isinstance(dest, DicomwebDestinationConfig):
                self._to_web(dest, items)
            else:
                self._to_peer(dest, items)
        return True

    def _to_web(self, dest: DicomwebDestinationConfig, items: list[DueDelivery]) -> None:
        """STOW-RS to a DICOMweb destination (:mod:`service.dicomweb.stow`): the result SRs
        in one request, then the summaries that go with those that arrived."""
        from service.dicomweb.stow import store_files

        sender = self.sender
        batch = sender._readable(items)
        results = [o for o in batch if o.due.parent_uid is None]
        companions = [o for o in batch if o.due.parent_uid is not None]
        #: claimed and not yet sent: given back when a stop comes first
        unsent = {o.due.id for o in batch}
        try:
            for part in (results, companions):
                if sender.stopping:
                    break
                # one waiting for its result SR is failed (to be tried again) by the check
                ready = [o for o in part if not sender._waits_for_parent(o.due, o.kind)]
                unsent.difference_update(o.due.id for o in part)
                if not ready:
                    continue
                outcomes = store_files(dest, [o.data for o in ready], config=self.config)
                for o, outcome in zip(ready, outcomes, strict=True):
                    if outcome.stored:
                        sender._delivered(o.due, dest.url, o.kind, outcome.reason)
                    else:
                        sender._failed(o.due, outcome.reason, o.kind)
        finally:
            if unsent:
                self.journal.release_deliveries(sorted(unsent))

    def _to_folder(self, items: list[DueDelivery]) -> None:
        folder = self.config.results_dir
        for i, d in enumerate(items):
            if self.sender.stopping:
                self.journal.release_deliveries([x.id for x in items[i:]])
                return
            if self.sender._waits_for_parent(d, "file"):
                continue
            try:
                if folder is None:
                    raise OSError("no results folder configured")
                data = self.journal.result_data(d.result_uid)
                durable_write(Path(folder) / f"{safe_name(d.result_uid)}.dcm", data)
            except JournalUnavailable:
                raise  # not the result's fault: it waits for the journal
            except OSError as exc:
                self.sender._failed(d, f"cannot write to results folder: {exc}")
                continue
            self.sender._delivered(d, "the results folder", "file")

    def _to_peer(self, dest: DestinationConfig, items: list[DueDelivery]) -> None:
        """Send ``items`` over one association; results that fall due meanwhile for the same
        destination follow on it (at most ``MAX_PER_ASSOCIATION`` objects), then it is
        released."""
        sender = self.sender
        batch = sender._readable(items)
        if not batch:
            return
        limits = self.config.limits
        where = f"{dest.ae_title}@{dest.host}:{dest.port}" + (" (TLS)" if dest.tls else "")
        try:
            tls = None
            if dest.tls:
                from service.network.tls import client_context

                tls = client_context(self.config)
            session = StoreSession.open(
                dest.host,
                dest.port,
                calling_ae=self.config.node.ae_title,
                called_ae=dest.ae_title,
                sop_classes=sorted(
                    {o.sop_class for o in batch}
                    | {COMPREHENSIVE_SR}
                    | ({ENCAPSULATED_PDF} if dest.summary_pdf else set())
                ),
                timeouts=Timeouts(
                    connect=limits.acse_timeout,
                    acse=limits.acse_timeout,
                    dimse=limits.dimse_timeout,
                    network=limits.network_timeout,
                ),
                max_pdu=limits.max_pdu,
                tls=tls,
                identity=(
                    UserIdentity(dest.username, dest.password, dest.user_identity_response)
                    if dest.username
                    else None
                ),
            )
        except AssociationFailed as exc:
            for o in batch:
                sender._failed(o.due, str(exc), o.kind)
            return
        except Exception as exc:  # TLS set-up and the like
            for o in batch:
                sender._failed(o.due, f"cannot associate with {where}: {exc}", o.kind)
            return
        self._session = session
        seen = {o.due.id for o in batch}
        #: claimed and not yet sent: given back when the association ends before them
        unsent = set(seen)
        budget = MAX_PER_ASSOCIATION
        try:
            while batch and budget > 0:
                for o in batch:
                    if sender.stopping or not session.is_established:
                        return
                    budget -= 1
                    unsent.discard(o.due.id)
                    self._send(session, o, where)
                if sender.stopping or not session.is_established:
                    return
                # results graded while these went out, or about to be: on the same association;
                # a delivery already tried on it (failed, due again) goes back for a new one
                if budget <= 0:
                    return
                claimed = sender.claim(self.destination, budget) or self._more_within(
                    LINGER_SECONDS, session, budget
                )
                more = [d for d in claimed if d.id not in seen]
                again = [d.id for d in claimed if d.id in seen]
                if again:
                    self.journal.release_deliveries(again)
                seen.update(d.id for d in more)
                batch = sender._readable(more)
                unsent.update(o.due.id for o in batch)
        finally:
            self._session = None
            session.release()
            if unsent:
                self.journal.release_deliveries(sorted(unsent))

    def _more_within(self, seconds: float, session: StoreSession, budget: int) -> list[DueDelivery]:
        """Deliveries to this destination that fall due within ``seconds``, claimed (none when
        the node stops or the association ends meanwhile).  Each look is a claim, which reads
        first and takes the journal's write lock only when a delivery is due."""
        deadline = time.monotonic() + seconds
        while time.monotonic() < deadline:
            self.wake.wait(LINGER_POLL_SECONDS)
            self.wake.clear()
            if self.sender.stopping or not session.is_established:
                return []
            claimed = self.sender.claim(self.destination, budget)
            if claimed:
                return claimed
        return []

    def _send(self, session: StoreSession, o: _Outgoing, where: str) -> None:
        """One C-STORE and its outcome in the journal."""
        sender = self.sender
        d, kind = o.due, o.kind
        if sender._waits_for_parent(d, kind):
            return
        if not session.accepts(o.sop_class):
            sender._failed(d, f"{where} accepted no presentation context for {o.sop_class}", kind)
            return
        try:
            response = session.store(o.data)
        except AssociationFailed as exc:
            sender._failed(d, f"C-STORE to {where} failed: {exc}", kind)
            return
        except Exception as exc:
            sender._failed(d, f"C-STORE to {where} raised {type(exc).__name__}: {exc}", kind)
            return
        comment = f" ({response.error_comment})" if response.error_comment else ""
        if response.stored:
            warning = f"status 0x{response.status:04X}{comment}" if response.warning else ""
            sender._delivered(d, where, kind, warning)
        else:
            sender._failed(d, f"C-STORE status 0x{response.status:04X} from {where}{comment}", kind)


@dataclass(frozen=True)
class _Outgoing:
    due: DueDelivery
    sop_class: str
    kind: str  # "result" or "summary"
    #: the stored Part 10 file, read once (at most one round of due deliveries is held)
    data: bytes
