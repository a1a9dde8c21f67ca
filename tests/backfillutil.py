"""Helpers for the backfill tests: invented echo studies on chosen dates (so that tests sharing
one Orthanc select their own studies by Study Date), an image to sit beside them, an in-process
backfill run, and an independent C-FIND of what the archive holds (pynetdicom, not the node's
archive client)."""

from __future__ import annotations

import io
from collections.abc import Sequence
from datetime import date
from pathlib import Path
from typing import Any

from netutil import LOOPBACK, NORMAL_VALUES, echo_sr
from pydicom import Dataset
from pydicom.dataset import FileMetaDataset
from pydicom.uid import ExplicitVRLittleEndian, generate_uid

#: Secondary Capture Image Storage (PS3.4 Annex B.5): an image that must never be retrieved
SECONDARY_CAPTURE = "1.2.840.10008.5.1.4.1.1.7"


def echo_study(tag: str, day: date, *, reports: int = 1, patient_id: str = "") -> list[Dataset]:
    """``reports`` echo measurement SRs (TID 5300, a complete normal-LVEF set, each in a series
    of its own) in one invented study on ``day``."""
    study_uid = generate_uid(entropy_srcs=[tag, "study"])
    out = []
    for k in range(reports):
        values = dict(NORMAL_VALUES)
        if k:  # a second report of the same study: a measurement of its own
            values = dict(list(values.items())[3:])
        out.append(
            echo_sr(
                f"{tag}-{k}",
                instance=k + 1,
                study_uid=study_uid,
                content_time=f"10{k:02d}00",
                values=values,
                patient_name=f"Backfill^{tag}",
                patient_id=patient_id or f"HVBF-{tag}",
                study_date=day.strftime("%Y%m%d"),
            )
        )
    return out


def image_in(study: Dataset) -> Dataset:
    """A small Secondary Capture image in the same study (the archive's echo images)."""
    ds = Dataset()
    ds.file_meta = FileMetaDataset()
    ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.file_meta.MediaStorageSOPClassUID = SECONDARY_CAPTURE
    ds.SOPClassUID = SECONDARY_CAPTURE
    ds.SOPInstanceUID = generate_uid()
    ds.file_meta.MediaStorageSOPInstanceUID = ds.SOPInstanceUID
    ds.StudyInstanceUID = study.StudyInstanceUID
    ds.SeriesInstanceUID = generate_uid()
    ds.StudyDate = study.StudyDate
    ds.PatientName = study.PatientName
    ds.PatientID = study.PatientID
    ds.Modality = "US"
    ds.ConversionType = "WSD"
    ds.SamplesPerPixel = 1
    ds.PhotometricInterpretation = "MONOCHROME2"
    ds.Rows = ds.Columns = 8
    ds.BitsAllocated = ds.BitsStored = 8
    ds.HighBit = 7
    ds.PixelRepresentation = 0
    ds.PixelData = bytes(64)
    return ds


def node_config(data_dir: Path, *, forward: Sequence[str] = (), extra: dict | None = None) -> Any:
    """A configuration for tests: one grading process, a short settle window, quick retries."""
    from service.config import apply_overrides, config_from_dict

    data: dict[str, Any] = {
        "assembly": {"workers": 1, "settle_seconds": 0.5},
        "delivery": {"backoff_initial_seconds": 0.2, "backoff_max_seconds": 1, "max_attempts": 3},
        "http": {"enabled": False},
    }
    for key, value in (extra or {}).items():
        data[key] = {**data.get(key, {}), **value} if isinstance(value, dict) else value
    return apply_overrides(config_from_dict(data), data_dir=str(data_dir), forward=list(forward))


def run_backfill(
    config: Any,
    source: str,
    *,
    grade_fn: Any = None,
    stop: Any = None,
    wrap: Any = None,
    poll_seconds: float = 0.05,
    **opts: Any,
):
    """One in-process backfill run; (summary, progress text).  ``wrap``: a function that
    takes the archive client and returns one to use instead (to act between its calls)."""
    from service.backfill.progress import PlainProgress
    from service.backfill.runner import Backfill, BackfillOptions
    from service.commands.backfill import archive_client, resolve_source

    out = io.StringIO()
    move_to = opts.pop("move_to", "")
    archive = archive_client(config, resolve_source(config, source), move_to)
    if wrap is not None:
        archive = wrap(archive)
    options = BackfillOptions(move_to=move_to, **{"wait_seconds": 120.0, **opts})
    runner = Backfill(
        config,
        archive,
        options,
        progress=PlainProgress(out, every=0.0),
        grade_fn=grade_fn,
        stop=stop,
        poll_seconds=poll_seconds,
    )
    summary = runner.run()
    return summary, out.getvalue()


def find_in_archive(port: int, called: str, study_uid: str, calling: str = "DIASTOLIC_SR"):
    """(SeriesInstanceUID, SOPInstanceUID, SOPClassUID) of every object of a study, by
    Study Root C-FIND at SERIES then IMAGE level (pynetdicom directly)."""
    from pynetdicom import AE
    from pynetdicom.sop_class import (  # type: ignore[attr-defined]
        StudyRootQueryRetrieveInformationModelFind as FIND,
    )

    ae = AE(ae_title=calling)
    ae.acse_timeout = ae.dimse_timeout = ae.network_timeout = 20
    ae.add_requested_context(FIND)
    assoc = ae.associate(LOOPBACK, port, ae_title=called)
    assert assoc.is_established, "the archive refused the association"
    out = []
    try:
        q = Dataset()
        q.QueryRetrieveLevel = "SERIES"
        q.StudyInstanceUID = study_uid
        q.SeriesInstanceUID = ""
        series = [
            str(ident.SeriesInstanceUID)
            for status, ident in assoc.send_c_find(q, FIND)
            if ident is not None and status.Status in (0xFF00, 0xFF01)
        ]
        for series_uid in series:
            q = Dataset()
            q.QueryRetrieveLevel = "IMAGE"
            q.StudyInstanceUID = study_uid
            q.SeriesInstanceUID = series_uid
            q.SOPInstanceUID = ""
            q.SOPClassUID = ""
            for status, ident in assoc.send_c_find(q, FIND):
                if ident is not None and status.Status in (0xFF00, 0xFF01):
                    out.append(
                        (series_uid, str(ident.SOPInstanceUID), str(ident.get("SOPClassUID", "")))
                    )
    finally:
        assoc.release()
    return out
