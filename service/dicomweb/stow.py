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
    order.  Never raises for a failure of the peer or of the network."""
    where = f"STOW-RS to {destination.url}"
    datasets: list[Dataset] = []
    outcomes: dict[int, StowOutcome] = {}
    for i, data in enumerate(files):
        try:
            datasets.append(pydicom.dcmread(io.BytesIO(data)))
        except Exception as exc:
            outcomes[i] = StowOutcome("", False, f"spooled object unreadable: {exc}")
    uids = [str(ds.SOPInstanceUID) for ds in datasets]
    if datasets:
        try:
            response = client_for(destination, config).store_instances(datasets)
        except requests.HTTPError as exc:
            response = _response_dataset(exc.response)
            if response is None:
                failed = http_failure(exc, where)
                return _fill(files, outcomes, uids, lambda _uid: StowOutcome(_uid, False, failed))
        except Exception as exc:
            failed = http_failure(exc, where)
            return _fill(files, outcomes, uids, lambda _uid: StowOutcome(_uid, False, failed))
        by_uid = _read_response(response, where)
        return _fill(
            files,
            outcomes,
            uids,
            lambda uid: (
                by_uid.get(uid) or StowOutcome(uid, False, f"{where}: instance not in the response")
            ),
        )
    return [outcomes[i] for i in range(len(files))]


def _fill(files, outcomes, uids, make) -> list[StowOutcome]:  # type: ignore[no-untyped-def]
    it = iter(uids)
    return [outcomes[i] if i in outcomes else make(next(it)) for i in range(len(files))]


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
