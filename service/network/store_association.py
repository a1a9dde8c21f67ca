"""One association on which the node sends C-STORE requests: the requestor side of the DICOM
upper layer (PS3.8 section 9) and the C-STORE service user (PS3.7 section 9.1.1, 9.3.1), on
one blocking socket.

The node's deliveries go out one C-STORE at a time and wait for each response, so nothing here
needs threads: the association is opened, used and released by the thread that calls it, and
every wait is a socket read bounded by a timeout (ACSE timeout for association set-up and
release, DIMSE timeout for a C-STORE response).  pynetdicom's requestor runs two reactor
threads per association that poll every millisecond; for a node that also receives, that cost
as much CPU as the C-STOREs themselves (docs/performance.md).

An association that cannot be set up raises :class:`AssociationFailed` with the reason (rejected
with result, source and reason; aborted; connection refused; timed out).  A broken association
raises :class:`AssociationFailed` from :meth:`StoreAssociation.store`; the association is then
closed (:attr:`StoreAssociation.is_established` is False).
"""

from __future__ import annotations

import contextlib
import socket
import ssl
import struct
from collections.abc import Sequence
from dataclasses import dataclass

#: the DICOM application context name (PS3.7 Annex A.2.1)
APPLICATION_CONTEXT = "1.2.840.10008.3.1.1.1"

#: this implementation (PS3.7 Annex D.3.3.2): a UUID-derived UID (PS3.5 Annex B.2), fixed
IMPLEMENTATION_CLASS_UID = "2.25.103527827461865847709081423942755296182"
IMPLEMENTATION_VERSION_NAME = "DIASTOLIC_SR_01"  # at most 16 characters (PS3.7 D.3.3.2)

#: PDU types (PS3.8 Table 9-1)
_ASSOCIATE_RQ, _ASSOCIATE_AC, _ASSOCIATE_RJ = 0x01, 0x02, 0x03
_P_DATA_TF, _RELEASE_RQ, _RELEASE_RP, _ABORT = 0x04, 0x05, 0x06, 0x07

#: A-ASSOCIATE-RJ result / source / reason texts (PS3.8 Table 9-21)
_RJ_RESULT = {1: "rejected-permanent", 2: "rejected-transient"}
_RJ_SOURCE = {
    1: "service-user",
    2: "service-provider (ACSE)",
    3: "service-provider (presentation)",
}
_RJ_REASON = {
    (1, 1): "no reason given",
    (1, 2): "application context name not supported",
    (1, 3): "calling AE title not recognised",
    (1, 7): "called AE title not recognised",
    (2, 1): "no reason given",
    (2, 2): "protocol version not supported",
    (3, 1): "temporary congestion",
    (3, 2): "local limit exceeded",
}

#: A-ABORT sources (PS3.8 Table 9-26)
_ABORT_SOURCE = {0: "service-user", 1: "reserved", 2: "service-provider"}

#: DIMSE command fields (PS3.7 Table E.1-1)
_C_STORE_RQ, _C_STORE_RSP = 0x0001, 0x8001

#: PDV message control header bits (PS3.8 Annex E.2)
_COMMAND, _LAST = 0x01, 0x02

#: largest PDU read from a peer, whatever it announces (a guard against garbage lengths)
_MAX_READ = 64 * 1024 * 1024


class AssociationFailed(Exception):
    """The association could not be set up, or broke; ``str()`` says why."""

    def __init__(self, reason: str, *, rejected: bool = False) -> None:
        super().__init__(reason)
        self.rejected = rejected


class CannotConnect(AssociationFailed):
    """No TCP connection to the peer; ``str()`` is the system's reason."""


@dataclass(frozen=True)
class Proposal:
    """A presentation context to propose: one SOP class, transfer syntaxes in preference
    order."""

    abstract_syntax: str
    transfer_syntaxes: tuple[str, ...]


@dataclass(frozen=True)
class Accepted:
    """A presentation context the peer accepted."""

    context_id: int
    abstract_syntax: str
    transfer_syntax: str


@dataclass(frozen=True)
class StoreResponse:
    """The peer's C-STORE-RSP (PS3.7 Table 9.3-2)."""

    status: int
    error_comment: str | None = None


@dataclass(frozen=True)
class Timeouts:
    connect: float
    acse: float
    dimse: float
    network: float


def _item(item_type: int, body: bytes) -> bytes:
    return struct.pack(">BBH", item_type, 0, len(body)) + body


def _ae(title: str) -> bytes:
    return title.encode("ascii").ljust(16, b" ")[:16]


def associate_rq(
    calling_ae: str, called_ae: str, proposals: Sequence[Proposal], max_pdu: int
) -> bytes:
    """The A-ASSOCIATE-RQ PDU (PS3.8 section 9.3.2): contexts numbered 1, 3, 5, …"""
    if not proposals or len(proposals) > 128:
        raise ValueError("between 1 and 128 presentation contexts can be proposed")
    items = [_item(0x10, APPLICATION_CONTEXT.encode("ascii"))]
    for n, p in enumerate(proposals):
        sub = _item(0x30, p.abstract_syntax.encode("ascii")) + b"".join(
            _item(0x40, ts.encode("ascii")) for ts in p.transfer_syntaxes
        )
        items.append(_item(0x20, struct.pack(">BBBB", 2 * n + 1, 0, 0, 0) + sub))
    user = (
        _item(0x51, struct.pack(">I", max_pdu))
        + _item(0x52, IMPLEMENTATION_CLASS_UID.encode("ascii"))
        + _item(0x55, IMPLEMENTATION_VERSION_NAME.encode("ascii"))
    )
    items.append(_item(0x50, user))
    body = struct.pack(">HH", 1, 0) + _ae(called_ae) + _ae(calling_ae) + bytes(32) + b"".join(items)
    return struct.pack(">BBI", _ASSOCIATE_RQ, 0, len(body)) + body


def _uid(raw: bytes) -> str:
    return raw.rstrip(b"\x00 ").decode("ascii", "replace")


def _sub_items(data: bytes, pos: int, end: int) -> list[tuple[int, bytes]]:
    out = []
    while pos + 4 <= end:
        item_type, length = data[pos], struct.unpack_from(">H", data, pos + 2)[0]
        if pos + 4 + length > end:
            raise AssociationFailed("malformed A-ASSOCIATE-AC from the peer (item length)")
        out.append((item_type, data[pos + 4 : pos + 4 + length]))
        pos += 4 + length
    return out


def parse_associate_ac(body: bytes, proposals: Sequence[Proposal]) -> tuple[list[Accepted], int]:
    """The accepted presentation contexts and the peer's maximum PDU length (0 = no limit)
    from an A-ASSOCIATE-AC body (PS3.8 section 9.3.3)."""
    if len(body) < 68:
        raise AssociationFailed("malformed A-ASSOCIATE-AC from the peer (too short)")
    accepted, max_pdu = [], 0
    for item_type, value in _sub_items(body, 68, len(body)):
        if item_type == 0x21 and len(value) >= 4:
            ctx_id, result = value[0], value[2]
            n = (ctx_id - 1) // 2
            if result != 0 or ctx_id % 2 == 0 or not 0 <= n < len(proposals):
                continue
            ts = [_uid(v) for t, v in _sub_items(value, 4, len(value)) if t == 0x40]
            if ts and ts[0] in proposals[n].transfer_syntaxes:
                accepted.append(Accepted(ctx_id, proposals[n].abstract_syntax, ts[0]))
        elif item_type == 0x50:
            for t, v in _sub_items(value, 0, len(value)):
                if t == 0x51 and len(v) == 4:
                    max_pdu = struct.unpack(">I", v)[0]
    return accepted, max_pdu


def _element(group: int, elem: int, value: bytes) -> bytes:
    if len(value) % 2:
        value += b"\x00"  # UI values are padded with NULL (PS3.5 section 9.1)
    return struct.pack("<HHI", group, elem, len(value)) + value


def c_store_rq(message_id: int, sop_class: str, sop_instance: str) -> bytes:
    """The C-STORE-RQ command set (PS3.7 Table 9.3-1), implicit VR little endian (PS3.7
    section 6.3.1), with its group length."""
    rest = b"".join(
        (
            _element(0x0000, 0x0002, sop_class.encode("ascii")),
            _element(0x0000, 0x0100, struct.pack("<H", _C_STORE_RQ)),
            _element(0x0000, 0x0110, struct.pack("<H", message_id)),
            _element(0x0000, 0x0700, struct.pack("<H", 0x0000)),  # priority MEDIUM
            _element(0x0000, 0x0800, struct.pack("<H", 0x0001)),  # a data set follows
            _element(0x0000, 0x1000, sop_instance.encode("ascii")),
        )
    )
    return _element(0x0000, 0x0000, struct.pack("<I", len(rest))) + rest


def command_elements(data: bytes) -> dict[int, bytes]:
    """The elements of a command set (implicit VR little endian), by element number."""
    out, pos = {}, 0
    while pos + 8 <= len(data):
        group, elem, length = struct.unpack_from("<HHI", data, pos)
        if group != 0x0000 or pos + 8 + length > len(data):
            break
        out[elem] = data[pos + 8 : pos + 8 + length]
        pos += 8 + length
    return out


def _us(value: bytes | None) -> int | None:
    return struct.unpack("<H", value)[0] if value is not None and len(value) == 2 else None


def p_data_pdus(context_id: int, flags: int, data: bytes | memoryview, max_pdu: int) -> list[bytes]:
    """``data`` as P-DATA-TF PDUs of one PDV each (PS3.8 section 9.3.5), none longer than the
    peer's maximum PDU length; the last PDV carries the last-fragment bit."""
    size = max_pdu - 6 if max_pdu else 1 << 20
    size = max(size, 1)
    view = memoryview(data)
    out = []
    for start in range(0, max(len(data), 1), size):
        chunk = view[start : start + size]
        last = start + size >= len(data)
        header = struct.pack(
            ">BBIIBB",
            _P_DATA_TF,
            0,
            len(chunk) + 6,
            len(chunk) + 2,
            context_id,
            flags | (_LAST if last else 0),
        )
        out.append(header + chunk)
    return out


class StoreAssociation:
    """An established association for C-STORE (see the module docstring).  Use
    :meth:`open`; release with :meth:`release` (or :meth:`abort`)."""

    def __init__(
        self,
        sock: socket.socket,
        accepted: list[Accepted],
        peer_max_pdu: int,
        timeouts: Timeouts,
    ) -> None:
        self._sock = sock
        self.accepted_contexts = accepted
        self.peer_max_pdu = peer_max_pdu
        self._timeouts = timeouts
        self._message_id = 0
        self.is_established = True

    # -- set-up ---------------------------------------------------------------------------

    @classmethod
    def open(
        cls,
        host: str,
        port: int,
        *,
        calling_ae: str,
        called_ae: str,
        proposals: Sequence[Proposal],
        max_pdu: int,
        timeouts: Timeouts,
        tls: ssl.SSLContext | None = None,
    ) -> StoreAssociation:
        request = associate_rq(calling_ae, called_ae, proposals, max_pdu)
        try:
            sock = socket.create_connection((host, port), timeout=timeouts.connect)
        except OSError as exc:
            raise CannotConnect(str(exc.strerror or exc)) from None
        try:
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            sock.settimeout(timeouts.acse)  # the TLS socket keeps it
            if tls is not None:
                sock = tls.wrap_socket(sock, server_hostname=host)
            sock.sendall(request)
            pdu_type, body = _read_pdu(sock)
        except AssociationFailed:
            _close(sock)
            raise
        except ssl.SSLError as exc:
            _close(sock)
            raise AssociationFailed(f"TLS handshake failed: {exc.reason or exc}") from None
        except (OSError, TimeoutError) as exc:
            _close(sock)
            raise AssociationFailed(_network_error("during association set-up", exc)) from None
        if pdu_type == _ASSOCIATE_AC:
            try:
                accepted, peer_max = parse_associate_ac(body, proposals)
            except AssociationFailed:
                _abort(sock)
                raise
            if not accepted:
                _release_quietly(sock, timeouts.acse)
                raise AssociationFailed("no proposed presentation context was accepted")
            return cls(sock, accepted, peer_max, timeouts)
        _close(sock)
        if pdu_type == _ASSOCIATE_RJ and len(body) >= 4:
            result, source, reason = body[1], body[2], body[3]
            why = _RJ_REASON.get((source, reason), f"reason {reason}")
            raise AssociationFailed(
                f"{_RJ_RESULT.get(result, f'result {result}')}, "
                f"{_RJ_SOURCE.get(source, f'source {source}')}: {why}",
                rejected=True,
            )
        if pdu_type == _ABORT:
            raise AssociationFailed(_abort_text(body))
        raise AssociationFailed(f"unexpected PDU type 0x{pdu_type:02X} during association set-up")

    # -- use ------------------------------------------------------------------------------

    def context_for(self, sop_class: str, transfer_syntax: str | None = None) -> Accepted | None:
        """The accepted context for ``sop_class`` (in ``transfer_syntax`` if given)."""
        for cx in self.accepted_contexts:
            if cx.abstract_syntax == sop_class and (
                transfer_syntax is None or cx.transfer_syntax == transfer_syntax
            ):
                return cx
        return None

    def store(
        self, context: Accepted, sop_instance: str, data_set: bytes | memoryview
    ) -> StoreResponse:
        """Send one C-STORE (``data_set`` encoded in ``context``'s transfer syntax) and wait
        for its response (DIMSE timeout)."""
        if not self.is_established:
            raise AssociationFailed("the association is no longer established")
        self._message_id = self._message_id % 0xFFFF + 1
        command = c_store_rq(self._message_id, context.abstract_syntax, sop_instance)
        try:
            self._sock.settimeout(self._timeouts.network)
            pdus = p_data_pdus(context.context_id, _COMMAND, command, self.peer_max_pdu)
            pdus += p_data_pdus(context.context_id, 0, data_set, self.peer_max_pdu)
            for pdu in pdus:
                self._sock.sendall(pdu)
            self._sock.settimeout(self._timeouts.dimse)
            elements = self._read_command()
        except AssociationFailed:
            self.abort()
            raise
        except (OSError, TimeoutError) as exc:
            self.abort()
            why = _network_error("waiting for the C-STORE response", exc)
            raise AssociationFailed(why) from None
        field, responding = _us(elements.get(0x0100)), _us(elements.get(0x0120))
        status = _us(elements.get(0x0900))
        if field != _C_STORE_RSP or responding != self._message_id or status is None:
            self.abort()
            raise AssociationFailed("the peer's answer is not a C-STORE response to this request")
        comment = elements.get(0x0902)
        return StoreResponse(
            status, comment.rstrip(b"\x00 ").decode("ascii", "replace") if comment else None
        )

    def _read_command(self) -> dict[int, bytes]:
        fragments: list[bytes] = []
        while True:
            pdu_type, body = _read_pdu(self._sock)
            if pdu_type == _ABORT:
                self.is_established = False
                _close(self._sock)
                raise AssociationFailed(_abort_text(body))
            if pdu_type == _RELEASE_RQ:
                # the peer ends the association while a request is outstanding
                with contextlib.suppress(OSError):
                    self._sock.sendall(struct.pack(">BBII", _RELEASE_RP, 0, 4, 0))
                self.is_established = False
                _close(self._sock)
                raise AssociationFailed("the peer released the association")
            if pdu_type != _P_DATA_TF:
                raise AssociationFailed(f"unexpected PDU type 0x{pdu_type:02X}")
            pos = 0
            while pos + 6 <= len(body):
                (length,) = struct.unpack_from(">I", body, pos)
                if length < 2 or pos + 4 + length > len(body):
                    raise AssociationFailed("malformed P-DATA-TF from the peer")
                control = body[pos + 5]
                if control & _COMMAND:
                    fragments.append(body[pos + 6 : pos + 4 + length])
                    if control & _LAST:
                        return command_elements(b"".join(fragments))
                pos += 4 + length

    # -- ending ---------------------------------------------------------------------------

    def release(self) -> None:
        """A-RELEASE (PS3.8 section 7.2): request, wait for the reply (ACSE timeout), close."""
        if not self.is_established:
            return
        self.is_established = False
        _release_quietly(self._sock, self._timeouts.acse)

    def abort(self) -> None:
        """A-ABORT (service-user), then close the connection."""
        if self.is_established:
            self.is_established = False
            _abort(self._sock)
        else:
            _close(self._sock)


def _read_exact(sock: socket.socket, n: int) -> bytes:
    buf = bytearray(n)
    view, got = memoryview(buf), 0
    while got < n:
        k = sock.recv_into(view[got:], n - got)
        if k == 0:
            raise AssociationFailed("the peer closed the connection")
        got += k
    return bytes(buf)


def _read_pdu(sock: socket.socket) -> tuple[int, bytes]:
    header = _read_exact(sock, 6)
    pdu_type, _, length = struct.unpack(">BBI", header)
    if length > _MAX_READ:
        raise AssociationFailed(f"the peer sent a PDU of {length} bytes")
    return pdu_type, _read_exact(sock, length)


def _abort_text(body: bytes) -> str:
    source = _ABORT_SOURCE.get(body[2], f"source {body[2]}") if len(body) >= 4 else "unknown"
    return f"the peer aborted the association ({source})"


def _network_error(when: str, exc: BaseException) -> str:
    if isinstance(exc, TimeoutError | socket.timeout):
        return f"timed out {when}"
    return f"connection error {when}: {getattr(exc, 'strerror', None) or exc}"


def _close(sock: socket.socket) -> None:
    with contextlib.suppress(OSError):
        sock.close()


def _abort(sock: socket.socket) -> None:
    with contextlib.suppress(OSError):
        sock.sendall(struct.pack(">BBIBBBB", _ABORT, 0, 4, 0, 0, 0, 0))
    _close(sock)


def _release_quietly(sock: socket.socket, timeout: float) -> None:
    try:
        sock.settimeout(timeout)
        sock.sendall(struct.pack(">BBII", _RELEASE_RQ, 0, 4, 0))
        while True:
            pdu_type, _ = _read_pdu(sock)
            if pdu_type in (_RELEASE_RP, _ABORT):
                break
    except (OSError, TimeoutError, AssociationFailed):
        pass
    finally:
        _close(sock)
