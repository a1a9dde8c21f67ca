"""A DICOMweb archive through dicomweb-client: QIDO-RS to find, WADO-RS to retrieve
(PS3.18 sections 10.6 and 10.4).

* Studies: ``GET {base}/studies?StudyDate=...&ModalitiesInStudy=SR``.  The first request
  asks for every match; a server that cuts the answer short says so in a ``Warning: 299``
  header (PS3.18 section 8.3.4.4, from memory), and the rest is then asked for page by page
  with ``limit`` and ``offset``.  (dicomweb-client's ``get_remaining`` is not used: it pages
  with ``offset`` alone, which Orthanc 1.10 ignores without ``limit``, so it never ends.)
* SR objects of a study: its series with Modality SR (``/studies/{uid}/series?Modality=SR``),
  then each series' instances, with their SOP Class UID (an instance-level default return
  attribute, PS3.18 Table 10.6.3-5); only the accepted SR storage classes are kept.
* Retrieve: ``GET {base}/studies/{uid}/series/{uid}/instances/{uid}`` for each wanted object
  (never a whole study: no image is ever requested).  Each object is encoded again in explicit
  VR little endian and handed to the node's intake, as an object received by C-STORE would be.

Every request is bounded by the archive's ``timeout``.  Authentication and TLS settings come
from its configuration entry (:mod:`service.dicomweb.session`).
"""

from __future__ import annotations

from datetime import date
from typing import Any

import requests
from pydicom import Dataset
from pydicom.filebase import DicomBytesIO
from pydicom.filewriter import write_dataset
from pydicom.uid import ExplicitVRLittleEndian

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
from service.config import Config, DicomwebArchiveConfig
from service.dicomweb.session import client_for, http_failure
from service.network.listener import SR_STORAGE_CLASSES, Arrival

#: DICOM JSON keys (PS3.18 Annex F: tags as 8 hex digits)
STUDY_UID = "0020000D"
SERIES_UID = "0020000E"
SOP_UID = "00080018"
SOP_CLASS = "00080016"
STUDY_DATE = "00080020"


def _value(item: dict[str, Any], tag: str) -> str:
    values = (item.get(tag) or {}).get("Value") or []
    return str(values[0]) if values else ""


class DicomwebArchive:
    moves = False

    def __init__(self, archive: DicomwebArchiveConfig, config: Config) -> None:
        self.archive = archive
        self.description = archive.url
        self.calling_ae = archive.calling_ae
        self._client = client_for(archive, config)
        #: set by a response that says more results can be requested
        self._more = False
        self._client._session.hooks["response"].append(self._watch_warning)

    def _watch_warning(self, response: requests.Response, *args: Any, **kwargs: Any) -> None:
        warning = response.headers.get("Warning", "")
        if warning.startswith("299") or "additional results" in warning.lower():
            self._more = True

    def _search_all(self, search: Any, **kwargs: Any) -> list[dict[str, Any]]:
        """Every match of a QIDO-RS search (see the module's note on paging)."""
        self._more = False
        results = list(search(**kwargs))
        page = len(results)
        while self._more and page:
            self._more = False
            more = search(**kwargs, limit=page, offset=len(results))
            if not more:
                break
            results += more
        return results

    def _fail(self, exc: BaseException, what: str) -> Exception:
        reason = http_failure(exc, f"{what} at {self.description}")
        if isinstance(exc, requests.HTTPError) and exc.response is not None:
            code = exc.response.status_code
            if code == 404:
                return StudyGone(reason)
            if code < 500 and code not in (408, 429):
                return ArchiveRefused(reason)
        if isinstance(exc, requests.exceptions.SSLError):
            return ArchiveRefused(reason)
        if isinstance(exc, requests.RequestException):
            return ArchiveUnavailable(reason)
        return ArchiveRefused(reason)  # e.g. an answer that is not DICOM JSON

    def close(self) -> None:
        self._client._session.close()

    def find_studies(self, since: date | None, until: date | None) -> list[ArchivedStudy]:
        filters = {"ModalitiesInStudy": "SR"}
        if since or until:
            filters["StudyDate"] = date_range(since, until)
        try:
            found = self._search_all(
                self._client.search_for_studies, search_filters=filters, fields=["StudyDate"]
            )
        except Exception as exc:
            err = self._fail(exc, "QIDO-RS search for studies")
            if isinstance(err, StudyGone):  # 404 on the studies resource: not a DICOMweb base
                err = ArchiveRefused(f"{err} (is it the DICOMweb base URL?)")
            raise err from None
        studies = {}
        for item in found:
            uid = _value(item, STUDY_UID)
            if uid:
                studies[uid] = ArchivedStudy(uid, _value(item, STUDY_DATE))
        return sorted(studies.values(), key=lambda s: (s.study_date, s.study_uid))

    def find_sr_instances(self, study_uid: str) -> list[ArchivedInstance]:
        try:
            series = self._search_all(
                self._client.search_for_series,
                study_instance_uid=study_uid,
                search_filters={"Modality": "SR"},
            )
        except Exception as exc:
            raise self._fail(exc, f"QIDO-RS search for the series of study {study_uid}") from None
        series_uids = sorted({u for u in (_value(s, SERIES_UID) for s in series) if u})
        if not series_uids:
            try:
                still = self._client.search_for_studies(
                    search_filters={"StudyInstanceUID": study_uid}
                )
            except Exception as exc:
                raise self._fail(exc, f"QIDO-RS search for study {study_uid}") from None
            if still:
                raise NoSrObjects(f"study {study_uid} has no SR series at {self.description}")
            raise StudyGone(f"study {study_uid} is no longer at {self.description}")
        out = []
        for series_uid in series_uids:
            try:
                found = self._search_all(
                    self._client.search_for_instances,
                    study_instance_uid=study_uid,
                    series_instance_uid=series_uid,
                    fields=["SOPClassUID"],
                )
            except Exception as exc:
                raise self._fail(
                    exc, f"QIDO-RS search for the objects of series {series_uid}"
                ) from None
            for item in found:
                uid, sop_class = _value(item, SOP_UID), _value(item, SOP_CLASS)
                if uid and (not sop_class or sop_class in SR_STORAGE_CLASSES):
                    out.append(ArchivedInstance(study_uid, series_uid, uid, sop_class))
        return out

    def retrieve(
        self, study_uid: str, instances: list[ArchivedInstance], sink: Sink
    ) -> RetrieveReport:
        report = RetrieveReport()
        for inst in instances:
            try:
                ds = self._client.retrieve_instance(
                    study_uid, inst.series_uid, inst.sop_instance_uid
                )
            except Exception as exc:
                err = self._fail(exc, f"WADO-RS of object {inst.sop_instance_uid}")
                if isinstance(err, StudyGone):  # this object went away: the others may not
                    report.failed += 1
                    report.problem = str(err)
                    continue
                raise err from None
            report.arrived += 1
            report.completed += 1
            sink(arrival_of(ds, self.calling_ae))
        return report


def arrival_of(ds: Dataset, calling_ae: str) -> Any:
    """An object retrieved by WADO-RS as the intake takes it: the data set encoded in explicit
    VR little endian, with the SOP class and instance it declares."""
    fp = DicomBytesIO()
    fp.is_little_endian = True
    fp.is_implicit_VR = False
    write_dataset(fp, ds)
    sop_class = str(ds.get("SOPClassUID", "") or "")
    sop_uid = str(ds.get("SOPInstanceUID", "") or "")
    return Arrival(
        calling_ae=calling_ae,
        context_class=sop_class,
        affected=sop_uid,
        affected_class=sop_class,
        transfer_syntax=ExplicitVRLittleEndian,
        body=fp.getvalue(),
        decode=lambda: ds,
    )
