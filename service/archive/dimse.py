"""A DICOM archive through pynetdicom: Study Root Query/Retrieve (PS3.4 Annex C) as SCU.

* Query (C-FIND, Study Root Query/Retrieve Information Model - FIND): at STUDY level by Study
  Date range and Modalities in Study "SR"; then, per study, at SERIES level for its SR series
  (Modality "SR") and at IMAGE level for each series' instances with their SOP Class UID.
  Hierarchical queries only (PS3.4 C.4.1.2.2: the unique keys of the levels above are given),
  so no relational-query negotiation is needed.  Only the accepted SR storage classes are kept.
* Retrieve by C-GET (Study Root ... - GET) at IMAGE level with the list of the wanted SOP
  Instance UIDs (PS3.4 C.4.3.2.1 / C.2.2.2.2, list of UID matching), one request per series:
  the archive sends each object on the same association in a storage presentation context
  proposed with the SCP role (role selection, PS3.7 D.3.3.4): only the SR storage classes are
  proposed, so no image can arrive.  Each object goes through the node's intake (checks, spool,
  journal) before its C-STORE success is answered.
* Or by C-MOVE (Study Root ... - MOVE) at IMAGE level to ``move_to``: the archive opens its own
  association to the node with that AE title.

One association for the study query, one per study for its objects' query and their
retrieve; every wait is bounded by the node's ``[limits]`` timeouts
(association set-up, each DIMSE message, the idle network).
"""

from __future__ import annotations

import contextlib
import logging
import socket
from datetime import date
from typing import Any

from pydicom import Dataset
from pydicom.uid import (
    DeflatedExplicitVRLittleEndian,
    ExplicitVRLittleEndian,
    ImplicitVRLittleEndian,
)
from pynetdicom import AE, build_role, evt
from pynetdicom.sop_class import (  # type: ignore[attr-defined]
    StudyRootQueryRetrieveInformationModelFind,
    StudyRootQueryRetrieveInformationModelGet,
    StudyRootQueryRetrieveInformationModelMove,
)

from service.archive.model import (
    ArchivedInstance,
    ArchivedStudy,
    ArchiveRefused,
    ArchiveUnavailable,
    NoSrObjects,
    RetrieveReport,
    Sink,
    StudyGone,
    date_range,
)
from service.config import Config, DimseArchiveConfig
from service.network.listener import SR_STORAGE_CLASSES, no_delay, store_arrival

log = logging.getLogger("diastolic_sr.archive")

FIND = str(StudyRootQueryRetrieveInformationModelFind)
GET = str(StudyRootQueryRetrieveInformationModelGet)
MOVE = str(StudyRootQueryRetrieveInformationModelMove)

#: transfer syntaxes accepted for SR objects retrieved by C-GET (as the listener accepts)
_SR_SYNTAXES = [ExplicitVRLittleEndian, ImplicitVRLittleEndian, DeflatedExplicitVRLittleEndian]

#: C-FIND, C-GET and C-MOVE statuses (PS3.4 C.4.1.1.4, C.4.2.1.5, C.4.3.1.4)
PENDING = (0xFF00, 0xFF01)
SUCCESS = 0x0000
CANCEL = 0xFE00
WARNING = 0xB000
_MEANING = {
    0xA700: "refused: out of resources",
    0xA701: "refused: out of resources, unable to calculate number of matches",
    0xA702: "refused: out of resources, unable to perform sub-operations",
    0xA801: "refused: move destination unknown",
    0xA900: "identifier does not match SOP class",
    0xB000: "sub-operations complete, one or more failures or warnings",
    0xFE00: "cancelled",
    0x0122: "SOP class not supported",
    0x0124: "not authorised",
}


class LostResponse(ArchiveUnavailable):
    """A C-FIND response arrived but did not reach the query.

    pynetdicom (3.0) runs each association in a thread that takes incoming requests off the
    message queue; it is paused while a query waits for its responses, but the pause can come
    a moment too late, and that thread then takes a response, logs "Received unexpected C-FIND
    service message" and drops it (pynetdicom issue #875).  A dropped pending response would
    silently shorten the answer (a study's SR series missing), so every C-FIND response is
    counted as it arrives (``EVT_DIMSE_RECV``) and a query that lost one is asked again, at
    once (``immediate``)."""

    immediate = True


def _meaning(status: int) -> str:
    if status in _MEANING:
        return _MEANING[status]
    if 0xC000 <= status <= 0xCFFF:
        return "unable to process"
    return "failure"


class DimseArchive:
    """One archive reached over DIMSE; the calling AE title is the node's."""

    moves = False

    def __init__(self, archive: DimseArchiveConfig, config: Config, *, move_to: str = "") -> None:
        self.archive = archive
        self.config = config
        self.move_to = move_to or archive.move_to
        self.moves = bool(self.move_to)
        self.description = archive.target + (" (TLS)" if archive.tls else "")
        self.calling_ae = archive.calling_ae
        #: where C-STORE sub-operations go during a C-GET
        self._sink: Sink | None = None
        #: C-FIND responses received on this client's associations (see :meth:`_find`)
        self._find_responses = 0
        #: (study, association) kept open from the query of a study's objects for their
        #: retrieve: one association per study
        self._held: tuple[str, Any] | None = None

    # -- associations -----------------------------------------------------------------------------

    def _ae(self, *, retrieve: bool) -> tuple[AE, list[Any]]:
        limits = self.config.limits
        ae = AE(ae_title=self.config.node.ae_title)
        ae.acse_timeout = limits.acse_timeout
        ae.dimse_timeout = limits.dimse_timeout
        ae.network_timeout = limits.network_timeout
        ae.connection_timeout = limits.acse_timeout
        ae.maximum_pdu_size = limits.max_pdu
        ae.add_requested_context(FIND)
        roles = []
        if retrieve and self.moves:
            ae.add_requested_context(MOVE)
        elif retrieve:
            ae.add_requested_context(GET)
            for uid in SR_STORAGE_CLASSES:
                ae.add_requested_context(uid, _SR_SYNTAXES)
                roles.append(build_role(uid, scp_role=True))
        return ae, roles

    def _open(self, *, retrieve: bool) -> Any:
        """An established association (raises when there is none)."""
        ae, roles = self._ae(retrieve=retrieve)
        handlers: list[Any] = [
            (evt.EVT_CONN_OPEN, lambda ev: no_delay(ev.assoc)),
            (evt.EVT_C_STORE, self._on_store),
            (evt.EVT_DIMSE_RECV, self._on_dimse_recv),
        ]
        tls_args = None
        if self.archive.tls:
            from service.network.tls import client_context

            tls_args = (client_context(self.config), self.archive.host)
        assoc = ae.associate(
            self.archive.host,
            self.archive.port,
            ae_title=self.archive.ae_title,
            ext_neg=roles or None,
            evt_handlers=handlers,
            tls_args=tls_args,
        )
        if not assoc.is_established:
            raise self._not_established(assoc)
        return assoc

    def _on_dimse_recv(self, ev: Any) -> None:
        """Count the C-FIND responses that arrive (pynetdicom's thread that reads them, before
        they are queued for the query)."""
        if type(ev.message).__name__ == "C_FIND_RSP":
            self._find_responses += 1

    def _on_store(self, ev: Any) -> int:
        """A C-STORE sub-operation of a C-GET: to the retrieve's sink."""
        sink = self._sink
        if sink is None:  # not asked for: refuse it (PS3.4 B.2.3, "cannot understand")
            return 0xC000
        return sink(store_arrival(ev, self.calling_ae)).status

    @staticmethod
    def _end(assoc: Any) -> None:
        if assoc.is_established:
            assoc.release()

    @contextlib.contextmanager
    def _association(self) -> Any:
        assoc = self._open(retrieve=False)
        try:
            yield assoc
        finally:
            self._end(assoc)

    def close(self) -> None:
        """Release the association kept from a study's query for its retrieve, if any."""
        held, self._held = self._held, None
        if held is not None:
            self._end(held[1])

    def _not_established(self, assoc: Any) -> Exception:
        where = self.description
        if assoc.is_rejected:
            primitive = getattr(assoc.acceptor, "primitive", None)
            detail = ""
            if primitive is not None:
                detail = (
                    f" (result {getattr(primitive, 'result', '?')}, source "
                    f"{getattr(primitive, 'result_source', '?')}, reason "
                    f"{getattr(primitive, 'diagnostic', '?')}; PS3.8 9.3.4: check that it "
                    f"knows the calling AE title {self.config.node.ae_title})"
                )
            return ArchiveRefused(f"association rejected by {where}{detail}")
        # pynetdicom reports a refused connection as an abort too: one plain TCP connect says
        # which it was
        why = self._probe()
        if why is None:
            return ArchiveUnavailable(
                f"association with {where} aborted during set-up (or no answer in time)"
            )
        return ArchiveUnavailable(f"cannot connect to {where}: {why}")

    def _probe(self) -> str | None:
        """Why a connection fails, None when a TCP connection can be made."""
        try:
            with socket.create_connection(
                (self.archive.host, self.archive.port), timeout=self.config.limits.acse_timeout
            ):
                return None
        except OSError as exc:
            return exc.strerror or str(exc)

    # -- queries ---------------------------------------------------------------------------------

    def _find(self, assoc: Any, query: Dataset, what: str) -> list[Dataset]:
        if not any(cx.abstract_syntax == FIND for cx in assoc.accepted_contexts):
            raise ArchiveRefused(
                f"{self.description} does not accept Study Root C-FIND (no presentation context)"
            )
        out = []
        before, consumed = self._find_responses, 0
        for status, identifier in assoc.send_c_find(query, FIND):
            code = int(status.Status) if "Status" in status else None
            if code is None:
                raise ArchiveUnavailable(
                    f"{what} at {self.description}: the association was aborted or the archive "
                    "did not answer in time (an archive that does not let calling AE title "
                    f"{self.config.node.ae_title} query or retrieve may abort)"
                )
            consumed += 1
            if code in PENDING:
                if identifier is None:  # pynetdicom could not decode it
                    raise ArchiveRefused(
                        f"{what} at {self.description}: an answer could not be decoded"
                    )
                out.append(identifier)
                continue
            if code == SUCCESS:
                if self._find_responses - before != consumed:
                    raise LostResponse(
                        f"{what} at {self.description}: {self._find_responses - before} "
                        f"responses arrived, {consumed} reached the query (a known race in "
                        "pynetdicom's association thread); the query is asked again"
                    )
                return out
            comment = f": {status.ErrorComment}" if "ErrorComment" in status else ""
            raise ArchiveRefused(
                f"{what} refused by {self.description}: status 0x{code:04X} "
                f"({_meaning(code)}){comment}"
            )
        if not assoc.is_established:
            raise ArchiveUnavailable(f"{what} at {self.description}: association ended early")
        return out

    def find_studies(self, since: date | None, until: date | None) -> list[ArchivedStudy]:
        q = Dataset()
        q.QueryRetrieveLevel = "STUDY"
        q.StudyInstanceUID = ""
        q.StudyDate = date_range(since, until)
        q.ModalitiesInStudy = "SR"
        with self._association() as assoc:
            found = self._find(assoc, q, "C-FIND of studies")
        studies = {}
        for ds in found:
            uid = str(ds.get("StudyInstanceUID", "") or "")
            if uid:
                studies[uid] = ArchivedStudy(uid, str(ds.get("StudyDate", "") or ""))
        return sorted(studies.values(), key=lambda s: (s.study_date, s.study_uid))

    def find_sr_instances(self, study_uid: str) -> list[ArchivedInstance]:
        """The study's SR objects, on an association kept open for their retrieve."""
        self.close()
        assoc = self._open(retrieve=True)
        try:
            found = self._sr_instances(assoc, study_uid)
        except BaseException:
            self._end(assoc)
            raise
        self._held = (study_uid, assoc)
        return found

    def _sr_instances(self, assoc: Any, study_uid: str) -> list[ArchivedInstance]:
        q = Dataset()
        q.QueryRetrieveLevel = "SERIES"
        q.StudyInstanceUID = study_uid
        q.SeriesInstanceUID = ""
        q.Modality = "SR"
        series = [
            str(ds.get("SeriesInstanceUID", "") or "")
            for ds in self._find(assoc, q, f"C-FIND of the series of study {study_uid}")
        ]
        if not series:
            q = Dataset()
            q.QueryRetrieveLevel = "STUDY"
            q.StudyInstanceUID = study_uid
            if self._find(assoc, q, f"C-FIND of study {study_uid}"):
                raise NoSrObjects(f"study {study_uid} has no SR series at {self.description}")
            raise StudyGone(f"study {study_uid} is no longer at {self.description}")
        out = []
        for series_uid in sorted(filter(None, series)):
            q = Dataset()
            q.QueryRetrieveLevel = "IMAGE"
            q.StudyInstanceUID = study_uid
            q.SeriesInstanceUID = series_uid
            q.SOPInstanceUID = ""
            q.SOPClassUID = ""
            for ds in self._find(assoc, q, f"C-FIND of the objects of series {series_uid}"):
                sop_class = str(ds.get("SOPClassUID", "") or "")
                uid = str(ds.get("SOPInstanceUID", "") or "")
                if uid and (not sop_class or sop_class in SR_STORAGE_CLASSES):
                    out.append(ArchivedInstance(study_uid, series_uid, uid, sop_class))
        return out

    # -- retrieve --------------------------------------------------------------------------------

    def retrieve(
        self, study_uid: str, instances: list[ArchivedInstance], sink: Sink
    ) -> RetrieveReport:
        """C-GET (objects through ``sink``) or C-MOVE (to ``move_to``) of ``instances``, one
        request per series."""
        report = RetrieveReport()

        def counted(arrival: Any) -> Any:
            report.arrived += 1
            return sink(arrival)

        by_series: dict[str, list[str]] = {}
        for inst in instances:
            by_series.setdefault(inst.series_uid, []).append(inst.sop_instance_uid)
        held, self._held = self._held, None
        if held is not None and held[0] == study_uid and held[1].is_established:
            assoc = held[1]
        else:
            if held is not None:
                self._end(held[1])
            assoc = self._open(retrieve=True)
        self._sink = None if self.moves else counted
        try:
            model = MOVE if self.moves else GET
            if not any(cx.abstract_syntax == model for cx in assoc.accepted_contexts):
                kind = "C-MOVE" if self.moves else "C-GET"
                raise ArchiveRefused(
                    f"{self.description} does not accept Study Root {kind} (no presentation "
                    "context)" + ("" if self.moves else "; retrieve by C-MOVE with --move-to")
                )
            for series_uid, uids in sorted(by_series.items()):
                q = Dataset()
                q.QueryRetrieveLevel = "IMAGE"
                q.StudyInstanceUID = study_uid
                q.SeriesInstanceUID = series_uid
                q.SOPInstanceUID = uids if len(uids) > 1 else uids[0]
                if self.moves:
                    responses = assoc.send_c_move(q, self.move_to, MOVE)
                else:
                    responses = assoc.send_c_get(q, GET)
                self._follow(responses, report, series_uid)
        finally:
            self._sink = None
            self._end(assoc)
        return report

    def _follow(self, responses: Any, report: RetrieveReport, series_uid: str) -> None:
        kind = "C-MOVE" if self.moves else "C-GET"
        what = f"{kind} of series {series_uid} from {self.description}"
        final = None
        for status, _identifier in responses:
            code = int(status.Status) if "Status" in status else None
            if code is None:
                raise ArchiveUnavailable(
                    f"{what}: the association was aborted or the archive did not answer in time"
                )
            if code in PENDING:
                continue
            final = (code, status)
        if final is None:
            raise ArchiveUnavailable(f"{what}: association ended before the final response")
        code, status = final
        report.completed += int(status.get("NumberOfCompletedSuboperations", 0) or 0)
        report.failed += int(status.get("NumberOfFailedSuboperations", 0) or 0)
        report.warning += int(status.get("NumberOfWarningSuboperations", 0) or 0)
        if code in (SUCCESS, WARNING):
            if code == WARNING:
                report.problem = f"{what}: status 0xB000 ({_meaning(code)})"
            return
        comment = f": {status.ErrorComment}" if "ErrorComment" in status else ""
        if code == 0xA801:
            raise ArchiveRefused(
                f"{what}: the archive does not know the move destination {self.move_to} "
                "(register that AE title with its address and port in the archive)"
            )
        if code in (0xA701, 0xA702, 0xA700):
            raise ArchiveUnavailable(f"{what}: status 0x{code:04X} ({_meaning(code)}){comment}")
        report.problem = f"{what}: status 0x{code:04X} ({_meaning(code)}){comment}"
