"""One association on which the node sends C-STORE requests, through pynetdicom's requestor.

pynetdicom does the upper layer (PS3.8) and the C-STORE service user (PS3.7 section 9.1.1,
9.3.1): association negotiation, fragmentation to the peer's maximum PDU, the DIMSE messages,
conversion to a transfer syntax the peer accepted.  This module adds what the node needs
around it:

* Total deadlines.  pynetdicom bounds each wait by its ACSE and DIMSE timeouts, but its
  network thread reads a PDU with a blocking socket: a peer that trickles the bytes of a PDU
  holds it, and with it the association's abort, for as long as it trickles.  Every step here
  (set-up, each C-STORE, release) runs under a watchdog that shuts the connection down when the
  step's total time is over (its pynetdicom timeout plus :data:`DEADLINE_SLACK`), so no step
  waits longer than that whatever the peer does.
* TCP_NODELAY on the connection (each PDU goes out at once, not after the peer's delayed
  acknowledgement of the previous one).
* The node's own implementation identity (PS3.7 D.3.3.2) and, when a destination asks for
  it, user identity negotiation (PS3.7 D.3.3.7, pynetdicom's ``UserIdentityNegotiation``).
* Status categories as PS3.7 Annex C defines them (pynetdicom's ``code_to_category``):
  success and warning mean the peer stored the object; a warning is reported with the
  response.
* The association's reactor held between C-STOREs.  pynetdicom's association thread takes
  every DIMSE message off the queue while it runs, and ``send_c_store`` pauses it only for its
  own exchange: a response that arrives in the instant between the two (a fast peer on the
  same machine, one C-STORE in a few hundred) is taken by the thread, logged as an unexpected
  message and dropped, and the C-STORE then waits its whole DIMSE timeout for it (then it is
  sent again).  The node's association only sends C-STOREs and waits for their responses, so
  its reactor is kept paused for as long as it is used (:class:`_HeldCheckpoint`) and let go
  for the release.
* The data set sent as it was encoded.  What the node sends is a Part 10 file; when the peer
  accepted the file's own transfer syntax for its SOP class, pynetdicom sends the data set from
  an in-memory copy of the file as it is (its ``STORE_SEND_CHUNKED_DATASET`` mode, switched on
  for the process: pynetdicom reads that flag only when it is given a path), not decoded by
  pydicom and encoded again, which took about a third of the sender's CPU.  Otherwise pydicom
  decodes it and pynetdicom converts it to a syntax the peer accepted.
"""

from __future__ import annotations

import contextlib
import io
import os
import socket
import threading
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pydicom
from pydicom.uid import ExplicitVRLittleEndian, ImplicitVRLittleEndian
from pynetdicom import AE, _config, evt
from pynetdicom.pdu_primitives import UserIdentityNegotiation
from pynetdicom.status import STATUS_SUCCESS, STATUS_WARNING, code_to_category

from service.network.listener import no_delay
from service.sr.read import file_meta_uids

#: this implementation as SCU (PS3.7 Annex D.3.3.2): a UUID-derived UID (PS3.5 Annex B.2),
#: fixed
IMPLEMENTATION_CLASS_UID = "2.25.103527827461865847709081423942755296182"
IMPLEMENTATION_VERSION_NAME = "DIASTOLIC_SR_01"  # at most 16 characters (PS3.7 D.3.3.2)

#: transfer syntaxes proposed for every SOP class: the node writes explicit VR little endian;
#: implicit VR little endian is the default every peer supports (PS3.5 section 10.1)
PROPOSED_SYNTAXES = (ExplicitVRLittleEndian, ImplicitVRLittleEndian)

#: seconds a step may run past its pynetdicom timeout before the watchdog ends it (pynetdicom
#: handles its own timeout first when its network thread is free to)
DEADLINE_SLACK = 1.0


@dataclass(frozen=True)
class Timeouts:
    connect: float
    acse: float
    dimse: float
    network: float


@dataclass(frozen=True)
class UserIdentity:
    """User identity negotiation (PS3.7 D.3.3.7): a username (type 1), or a username and
    passcode (type 2) when ``password`` is set."""

    username: str
    password: str = ""
    #: ask the peer to confirm (positive response requested)
    response_requested: bool = False


class AssociationFailed(Exception):
    """The association could not be set up, or broke; ``str()`` says why."""

    def __init__(self, reason: str, *, rejected: bool = False, timed_out: bool = False):
        super().__init__(reason)
        self.rejected = rejected
        self.timed_out = timed_out


@dataclass(frozen=True)
class StoreResponse:
    status: int
    error_comment: str | None = None

    @property
    def category(self) -> str:
        """PS3.7 Annex C: Success, Warning, Failure, Cancel, Pending or Unknown."""
        return code_to_category(self.status)

    @property
    def stored(self) -> bool:
        """The peer has the object: success, or a warning (PS3.7 C.1.2: the operation was
        performed, with the condition the code names)."""
        return self.category in (STATUS_SUCCESS, STATUS_WARNING)

    @property
    def warning(self) -> bool:
        return self.category == STATUS_WARNING


class _HeldCheckpoint(threading.Event):
    """pynetdicom's reactor checkpoint (``Association._reactor_checkpoint``, an Event the
    association thread waits on before each turn), kept cleared while ``held``: the thread
    stays paused between C-STOREs instead of running (and taking the next response) as soon as
    ``send_c_store`` sets it again."""

    def __init__(self) -> None:
        super().__init__()
        self.held = True

    def set(self) -> None:
        if not self.held:
            super().set()

    def let_go(self) -> None:
        """Back to pynetdicom's own use (before the release, or ending the association)."""
        self.held = False
        super().set()


class _Watchdog:
    """Ends the association of a :class:`StoreSession` when the step in progress runs past
    its deadline: shuts its connection down, which ends any read or write pynetdicom's threads
    are blocked in.

    Its thread sleeps until the deadline it last saw; a step that ends earlier, or a new one
    that ends later, does not wake it (it looks again when it wakes), so a stream of C-STOREs
    costs no thread switch each, only a look every timeout or so."""

    def __init__(self, session: StoreSession) -> None:
        self._session = session
        self._cond = threading.Condition()
        self._deadline: float | None = None
        self._what = ""
        self._closed = False
        #: when the thread wakes by itself (None: it waits to be told)
        self._wakes_at: float | None = None
        #: what was cut short, once the watchdog fired
        self.fired: str = ""
        self._thread = threading.Thread(target=self._run, name="store-scu-watchdog", daemon=True)
        self._thread.start()

    @contextlib.contextmanager
    def step(self, seconds: float, what: str) -> Any:
        with self._cond:
            self._deadline = deadline = time.monotonic() + seconds
            self._what = what
            if self._wakes_at is None or self._wakes_at > deadline:
                self._cond.notify()
        try:
            yield
        finally:
            with self._cond:
                self._deadline = None

    def close(self) -> None:
        with self._cond:
            self._closed = True
            self._cond.notify()

    def _run(self) -> None:
        with self._cond:
            while not self._closed:
                if self._deadline is None:
                    self._wakes_at = None
                    self._cond.wait()
                    continue
                left = self._deadline - time.monotonic()
                if left > 0:
                    self._wakes_at = self._deadline
                    self._cond.wait(left)
                    continue
                self.fired = self._what
                self._deadline = None
                self._session.cut()


class StoreSession:
    """An association for C-STOREs to one peer; use :meth:`open`."""

    def __init__(self, ae: AE, timeouts: Timeouts, where: str) -> None:
        self._ae = ae
        self._assoc: Any = None
        self.timeouts = timeouts
        self.where = where
        self._connected = False
        self._ended = False
        self._checkpoint: _HeldCheckpoint | None = None
        self._watchdog = _Watchdog(self)
        self._memfd: int | None = None  # the in-memory file a C-STORE's data set is sent from

    @classmethod
    def open(
        cls,
        host: str,
        port: int,
        *,
        calling_ae: str,
        called_ae: str,
        sop_classes: Sequence[str],
        timeouts: Timeouts,
        max_pdu: int = 16382,
        tls: Any = None,
        identity: UserIdentity | None = None,
    ) -> StoreSession:
        """Set up the association (within the connect and ACSE timeouts, in total); raises
        :class:`AssociationFailed` with the reason."""
        ae = AE(ae_title=calling_ae)
        ae.implementation_class_uid = IMPLEMENTATION_CLASS_UID
        ae.implementation_version_name = IMPLEMENTATION_VERSION_NAME
        ae.connection_timeout = timeouts.connect
        ae.acse_timeout = timeouts.acse
        ae.dimse_timeout = timeouts.dimse
        ae.network_timeout = timeouts.network
        ae.maximum_pdu_size = max_pdu
        for sop_class in sorted(set(sop_classes)):
            ae.add_requested_context(sop_class, list(PROPOSED_SYNTAXES))
        where = f"{called_ae}@{host}:{port}" + (" (TLS)" if tls is not None else "")
        session = cls(ae, timeouts, where)
        ext_neg = []
        if identity is not None:
            item = UserIdentityNegotiation()
            item.user_identity_type = 2 if identity.password else 1
            item.primary_field = identity.username.encode("utf-8")
            if identity.password:
                item.secondary_field = identity.password.encode("utf-8")
            item.positive_response_requested = identity.response_requested
            ext_neg.append(item)
        handlers = [(evt.EVT_CONN_OPEN, session._on_connection)]
        try:
            with session._watchdog.step(
                timeouts.connect + timeouts.acse + DEADLINE_SLACK, "association set-up"
            ):
                assoc = ae.associate(
                    host,
                    port,
                    ae_title=called_ae,
                    ext_neg=ext_neg or None,
                    evt_handlers=handlers,
                    tls_args=None if tls is None else (tls, host),
                )
        except Exception as exc:  # a bad host name and the like
            session._end()
            raise AssociationFailed(f"cannot associate with {where}: {exc}") from None
        session._assoc = assoc
        if assoc.is_established:
            session._checkpoint = assoc._reactor_checkpoint = _HeldCheckpoint()
            return session
        session._end()
        if session._watchdog.fired:
            raise AssociationFailed(
                f"no association with {where} within {timeouts.connect + timeouts.acse:g} s "
                "(the peer did not answer in time)",
                timed_out=True,
            )
        if assoc.is_rejected:
            raise AssociationFailed(
                f"association rejected by {where}: {_rejection(assoc)}", rejected=True
            )
        if not session._connected:
            raise AssociationFailed(_unreachable(host, port, where, timeouts.connect))
        if assoc.is_aborted and not assoc.accepted_contexts:
            raise AssociationFailed(
                f"{where} accepted none of the proposed presentation contexts "
                f"({', '.join(sorted(set(sop_classes)))})"
            )
        raise AssociationFailed(f"association with {where} aborted or timed out during set-up")

    def _on_connection(self, event: Any) -> None:
        # the association is not among the AE's active ones before its negotiation ends: keep
        # it for the watchdog
        self._assoc = event.assoc
        self._connected = True
        no_delay(event.assoc)

    # -- using it ---------------------------------------------------------------------------

    @property
    def is_established(self) -> bool:
        return not self._ended and self._assoc is not None and bool(self._assoc.is_established)

    def accepts(self, sop_class: str) -> bool:
        """The peer accepted a presentation context for ``sop_class``."""
        if self._assoc is None:
            return False
        return any(str(cx.abstract_syntax) == sop_class for cx in self._assoc.accepted_contexts)

    def store(self, data: bytes) -> StoreResponse:
        """C-STORE of a Part 10 file's data set, in the transfer syntax the peer accepted for
        its SOP class (pynetdicom converts between the little endian syntaxes).  Returns the
        response; raises :class:`AssociationFailed` when there is none (the association is
        then closed) and ValueError when no accepted context fits the object."""
        if not self.is_established:
            raise AssociationFailed(f"the association with {self.where} is no longer established")
        if self._assoc.acse.is_aborted() or not self._assoc.dul.is_alive():
            # the reactor is held between C-STOREs (see the module's notes), so an A-ABORT
            # or a closed connection that came in meanwhile is looked for here
            self._assoc.is_aborted = True
            self._end()
            raise AssociationFailed(f"{self.where} aborted the association")
        staged = self._staged(data)
        what: Any = staged if staged is not None else pydicom.dcmread(io.BytesIO(data))
        limit = self.timeouts.dimse + DEADLINE_SLACK
        with self._watchdog.step(limit, "C-STORE"):
            while not self._assoc.dimse.msg_queue.empty():
                self._assoc.dimse.msg_queue.get_nowait()
            status = self._assoc.send_c_store(what)
        if "Status" in status:
            comment = status.get("ErrorComment")
            return StoreResponse(int(status.Status), None if comment is None else str(comment))
        self._end()
        if self._watchdog.fired:
            raise AssociationFailed(
                f"no C-STORE response from {self.where} within {self.timeouts.dimse:g} s",
                timed_out=True,
            )
        if self._assoc.is_aborted:
            raise AssociationFailed(f"{self.where} aborted the association during the C-STORE")
        raise AssociationFailed(
            f"no C-STORE response from {self.where} (timed out or connection closed)"
        )

    def _staged(self, data: bytes) -> Path | None:
        """``data`` (a Part 10 file) in this session's in-memory file, for pynetdicom to send
        its data set as encoded, when the peer accepted the file's own transfer syntax for its
        SOP class; None when the object needs pydicom (no Part 10 header, another transfer
        syntax to convert to, or no in-memory files on this system)."""
        meta = file_meta_uids(data)
        if meta is None or not hasattr(os, "memfd_create"):
            return None
        wanted = (meta["MediaStorageSOPClassUID"], meta["TransferSyntaxUID"])
        if not any(
            (str(cx.abstract_syntax), str(cx.transfer_syntax[0])) == wanted
            for cx in self._assoc.accepted_contexts
        ):
            return None
        if self._memfd is None:
            try:
                self._memfd = os.memfd_create("diastolic-sr-c-store", os.MFD_CLOEXEC)
            except OSError:
                return None
        os.ftruncate(self._memfd, 0)
        os.pwrite(self._memfd, data, 0)
        _config.STORE_SEND_CHUNKED_DATASET = True  # a path is sent as encoded (see the notes)
        return Path(f"/proc/self/fd/{self._memfd}")

    def release(self) -> None:
        """A-RELEASE (within the ACSE timeout in total; aborted after it)."""
        try:
            if self.is_established:
                self._let_go()
                with self._watchdog.step(self.timeouts.acse + DEADLINE_SLACK, "release"):
                    self._assoc.release()
        finally:
            self._end()

    def _let_go(self) -> None:
        if self._checkpoint is not None:
            self._checkpoint.let_go()

    def cut(self) -> None:
        """End the association now: shut its connection down (any thread may call this; the
        thread using the session then gets :class:`AssociationFailed`)."""
        assocs = list(self._ae.active_associations)
        if self._assoc is not None and self._assoc not in assocs:
            assocs.append(self._assoc)
        for assoc in assocs:
            sock = getattr(getattr(assoc, "dul", None), "socket", None)
            raw = getattr(sock, "socket", None)
            if raw is not None:
                with contextlib.suppress(OSError):
                    raw.shutdown(socket.SHUT_RDWR)

    def _end(self) -> None:
        """Make sure nothing of the association is left (threads, connection)."""
        self._ended = True
        self._watchdog.close()
        if self._memfd is not None:
            os.close(self._memfd)
            self._memfd = None
        self._let_go()
        assoc = self._assoc
        if (
            assoc is not None
            and not assoc.is_released
            and (assoc.is_alive() or assoc.dul.is_alive())
        ):
            self.cut()
            assoc.kill()


def _rejection(assoc: Any) -> str:
    """Result, source and reason of an A-ASSOCIATE-RJ (PS3.8 Table 9-21), as pynetdicom
    names them."""
    rsp = getattr(getattr(assoc, "acceptor", None), "primitive", None)
    if rsp is None:
        return "no reason given"
    parts = [getattr(rsp, "result_str", ""), getattr(rsp, "source_str", "")]
    reason = getattr(rsp, "reason_str", "")
    return ", ".join(p for p in parts if p) + (f": {reason}" if reason else "")


def _unreachable(host: str, port: int, where: str, timeout: float) -> str:
    """Why no connection was made (pynetdicom logs the reason but does not return it)."""
    try:
        with socket.create_connection((host, port), timeout=min(timeout, 5.0)):
            pass
    except OSError as exc:
        return f"cannot connect to {where}: {exc.strerror or exc}"
    return f"cannot connect to {where}"
