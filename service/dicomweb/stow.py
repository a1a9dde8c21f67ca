"""STOW-RS delivery (PS3.18 section 10.5, Store Transaction) of Part 10 files to a DICOMweb
destination, through dicomweb-client: the narrow interface the sender uses for a destination
that is a URL, as it uses C-STORE for a DICOM peer.

:func:`store_files` sends the files in one request and returns one :class:`StowOutcome` per
file, read from the response's Store Instances Response Module (PS3.18 Table 10.5.3-1):
an instance in Referenced SOP Sequence (0008,1199) is stored (a Warning Reason (0008,1196)
there is a warning, and the object is stored, PS3.18 10.5.3.1); one in Failed SOP Sequence
(0008,1198) failed with its Failure Reason (0008,1197); one in neither failed.  A request that
fails as a whole (cannot connect, TLS, HTTP 4xx/5xx without a response data set) fails every
file with that reason.
"""

from __future__ import annotations

import io
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import pydicom
import requests
from pydicom import Dataset

from service.config import Config, DicomwebDestinationConfig
from service.dicomweb.session import client_for, http_failure

#: Failure Reason values (PS3.18 Table 10.5.3-2 and PS3.4 Annex B.2.3 / GG.4)
FAILURE_REASONS = {
    0xA700: "refused: out of resources",
    0xA900: "data set does not match SOP class",
    0xC000: "cannot understand",
    0xC122: "referenced transfer syntax not supported",
    0x0110: "processing failure",
    0x0122: "referenced SOP class not supported",
}


@dataclass(frozen=True)
class StowOutcome:
    sop_instance_uid: str
    stored: bool
    #: why it failed, or the warning it was stored with; "" when plainly stored
    reason: str = ""


def store_files(
    destination: DicomwebDestinationConfig,
    files: Sequence[bytes],
    *,
    config: Config | None = None,
) -> list[StowOutcome]:
    """STOW-RS of ``files`` (Part 10 bytes) to ``destination``; one outcome per file, in
    order.  Never raises for a failure of the peer or of the network.

    The files go in one request.  A server that refuses the request as a whole (HTTP 4xx
    without a response data set: Orthanc answers 400 when one object of the request is
    unacceptable) is asked again one file per request, so that one bad object does not hold
    back the others."""
    where = f"STOW-RS to {destination.url}"
    outcomes: list[StowOutcome | None] = [None] * len(files)
    readable: list[tuple[int, Dataset]] = []
    for i, data in enumerate(files):
        try:
            readable.append((i, pydicom.dcmread(io.BytesIO(data))))
        except Exception as exc:
            outcomes[i] = StowOutcome("", False, f"stored object unreadable: {exc}")
    if readable:
        client = client_for(destination, config)
        batch = _store(client, [ds for _, ds in readable], where)
        if batch.whole_request_refused and len(readable) > 1:
            for i, ds in readable:
                outcomes[i] = _store(client, [ds], where).outcomes[0]
        else:
            for (i, _ds), outcome in zip(readable, batch.outcomes, strict=True):
                outcomes[i] = outcome
    return [o for o in outcomes if o is not None]


class _Batch:
    def __init__(self, outcomes: list[StowOutcome], whole_request_refused: bool = False):
        self.outcomes = outcomes
        self.whole_request_refused = whole_request_refused


def _store(client: Any, datasets: list[Dataset], where: str) -> _Batch:
    """One STOW-RS request; an outcome per data set."""
    uids = [str(ds.get("SOPInstanceUID", "") or "") for ds in datasets]
    try:
        response = client.store_instances(datasets)
    except requests.HTTPError as exc:
        response = _response_dataset(exc.response)
        if response is None:
            failed = http_failure(exc, where)
            code = exc.response.status_code if exc.response is not None else 0
            refused = 400 <= code < 500 and code not in (401, 403, 408, 429)
            return _Batch([StowOutcome(uid, False, failed) for uid in uids], refused)
    except Exception as exc:
        failed = http_failure(exc, where)
        return _Batch([StowOutcome(uid, False, failed) for uid in uids])
    by_uid = _read_response(response, where)
    return _Batch(
        [
            by_uid.get(uid) or StowOutcome(uid, False, f"{where}: instance not in the response")
            for uid in uids
        ]
    )


def _response_dataset(response: requests.Response | None) -> Dataset | None:
    """The Store Instances Response of an HTTP error answer (409 Conflict, 400 with a body),
    None when it has none."""
    if response is None or not response.content:
        return None
    kind = response.headers.get("Content-Type", "").split(";")[0].strip().lower()
    if kind not in ("application/dicom+json", "application/json"):
        return None
    try:
        return Dataset.from_json(response.json())
    except Exception:
        return None


def _read_response(response: Dataset, where: str) -> dict[str, StowOutcome]:
    out: dict[str, StowOutcome] = {}
    for item in response.get("ReferencedSOPSequence", []) or []:
        uid = str(item.get("ReferencedSOPInstanceUID", "") or "")
        warning = item.get("WarningReason")
        reason = f"{where}: stored with warning 0x{int(warning):04X}" if warning else ""
        out[uid] = StowOutcome(uid, True, reason)
    for item in response.get("FailedSOPSequence", []) or []:
        uid = str(item.get("ReferencedSOPInstanceUID", "") or "")
        code = item.get("FailureReason")
        text = "no reason given"
        if code is not None:
            text = f"failure reason 0x{int(code):04X}"
            if int(code) in FAILURE_REASONS:
                text += f" ({FAILURE_REASONS[int(code)]})"
        out[uid] = StowOutcome(uid, False, f"{where}: {text}")
    return out
