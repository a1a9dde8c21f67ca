"""The whole network path on loopback, for the ``demo`` command and for tests.

:func:`run_network_demo` starts the node on 127.0.0.1 (a free port, embedded defaults, a
short settle window), starts a small storage SCP that plays the PACS and collects the results,
sends the datasets as a scanner would (pynetdicom SCU, one association), waits (bounded) until
every study is graded and delivered or has failed with a reason, stops everything and returns
one row per study.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from pydicom import Dataset
from pydicom.uid import (
    DeflatedExplicitVRLittleEndian,
    ExplicitVRLittleEndian,
    ImplicitVRLittleEndian,
)
from pynetdicom import AE, evt

from service.config import apply_overrides, default_config
from service.network.assembly import GradeFunction
from service.network.listener import SR_STORAGE_CLASSES, VERIFICATION
from service.network.service import Node
from service.store.journal import StudyState

log = logging.getLogger("diastolic_sr.demo")

LOOPBACK = "127.0.0.1"
SCANNER_AE = "DEMO_SCANNER"
RECEIVER_AE = "DEMO_PACS"


class ResultReceiver:
    """A minimal storage SCP on loopback that keeps every dataset it receives (the PACS)."""

    def __init__(
        self,
        ae_title: str = RECEIVER_AE,
        *,
        port: int = 0,
        extra_classes: Sequence[str] = (),
        ssl_context: Any = None,
    ) -> None:
        self.ae_title = ae_title
        self.received: list[Dataset] = []
        self._lock = threading.Lock()
        self._ae = AE(ae_title=ae_title)
        self._ae.add_supported_context(VERIFICATION)
        for uid in [*SR_STORAGE_CLASSES, *extra_classes]:
            self._ae.add_supported_context(uid, [ExplicitVRLittleEndian, ImplicitVRLittleEndian])
        self._port = port
        self._ssl = ssl_context
        self._server: Any = None

    def _on_store(self, event: Any) -> int:
        ds = event.dataset
        ds.file_meta = event.file_meta
        with self._lock:
            self.received.append(ds)
        return 0x0000

    def _handlers(self) -> list[tuple[Any, Any]]:
        """pynetdicom event handlers bound on start (subclasses may add theirs)."""
        return [(evt.EVT_C_STORE, self._on_store)]

    def start(self) -> int:
        self._server = self._ae.start_server(
            (LOOPBACK, self._port),
            block=False,
            evt_handlers=self._handlers(),
            ssl_context=self._ssl,
        )
        self._port = int(self._server.server_address[1])
        return self._port

    @property
    def port(self) -> int:
        return self._port

    def uids(self) -> list[str]:
        with self._lock:
            return [str(ds.SOPInstanceUID) for ds in self.received]

    def stop(self) -> None:
        if self._server is not None:
            self._server.shutdown()
            self._server = None
        self._ae.shutdown()


def send_datasets(
    datasets: Sequence[Dataset],
    port: int,
    *,
    called_ae: str,
    calling_ae: str = SCANNER_AE,
    host: str = LOOPBACK,
) -> list[int]:
    """C-STORE every dataset over one association; returns the status of each (-1: none)."""
    ae = AE(ae_title=calling_ae)
    for uid in sorted({str(ds.SOPClassUID) for ds in datasets}):
        ae.add_requested_context(
            uid,
            [ExplicitVRLittleEndian, ImplicitVRLittleEndian, DeflatedExplicitVRLittleEndian],
        )
    assoc = ae.associate(host, port, ae_title=called_ae)
    if not assoc.is_established:
        return [-1] * len(datasets)
    out = []
    try:
        for ds in datasets:
            status = assoc.send_c_store(ds)
            out.append(int(status.Status) if "Status" in status else -1)
    finally:
        if assoc.is_established:
            assoc.release()
    return out


def wait_until(condition: Callable[[], bool], timeout: float, interval: float = 0.05) -> bool:
    deadline = time.monotonic() + timeout
    while True:
        if condition():
            return True
        if time.monotonic() >= deadline:
            return False
        time.sleep(interval)


_DONE = {StudyState.delivered, StudyState.failed}


def run_network_demo(
    datasets: list[Dataset],
    workdir: Path,
    timeout: float = 60,
    *,
    grade_fn: GradeFunction | None = None,
    settle_seconds: float = 0.3,
    mapping_files: Sequence[Path] = (),
) -> list[dict[str, Any]]:
    """Send ``datasets`` through a loopback node to a loopback receiver; one row per study:
    patient_name, patient_id, study_uid, guideline, outcome (docs/vocabulary.md), grade,
    filling_pressure, result_uid,
    status (the study's journal state), reason, delivered (the receiver holds the result)."""
    workdir = Path(workdir)
    receiver = ResultReceiver()
    receiver.start()
    cfg = apply_overrides(
        default_config(),
        port=0,
        bind=LOOPBACK,
        data_dir=str(workdir / "node"),
        settle_seconds=settle_seconds,
        forward=[f"{RECEIVER_AE}@{LOOPBACK}:{receiver.port}"],
    )
    data = cfg.model_dump(mode="json")
    data["delivery"].update(backoff_initial_seconds=0.2, backoff_max_seconds=1.0)
    data["http"]["enabled"] = False  # a short-lived demo node needs no health endpoint
    data["grading"]["mapping_files"] = [str(Path(p).resolve()) for p in mapping_files]
    cfg = cfg.model_validate({**data, "base_dir": cfg.base_dir})
    node = Node(cfg, grade_fn=grade_fn, poll_seconds=0.1)
    studies: dict[str, Dataset] = {}
    for ds in datasets:
        studies.setdefault(str(ds.get("StudyInstanceUID", "")), ds)
    try:
        port = node.start()
        statuses = send_datasets(datasets, port, called_ae=cfg.node.ae_title)
        refused = [s for s in statuses if s != 0]
        if refused:
            log.warning("%d object(s) not accepted: statuses %s", len(refused), refused)
        journal = node.journal
        assert journal is not None

        def all_done() -> bool:
            for uid in studies:
                row = journal.study(uid)
                if row is not None and row["state"] not in _DONE:
                    return False
            return True

        finished = wait_until(all_done, timeout)
        rows = []
        for uid, ds in studies.items():
            row = journal.study(uid) or {}
            result = journal.result(row["result_uid"]) if row.get("result_uid") else None
            state = row.get("state", "not received")
            rows.append(
                {
                    "patient_name": str(ds.get("PatientName", "")),
                    "patient_id": str(ds.get("PatientID", "")),
                    "study_uid": uid,
                    "guideline": (result or {}).get("guideline") or "",
                    "outcome": (journal.outcome_of(result["result_uid"]) or "" if result else ""),
                    "grade": (result or {}).get("grade") or "",
                    "filling_pressure": (result or {}).get("filling_pressure") or "",
                    "result_uid": (result or {}).get("result_uid") or "",
                    "status": state if finished or state in _DONE else f"{state} (timed out)",
                    "reason": row.get("reason", ""),
                    "delivered": bool(result) and result["result_uid"] in receiver.uids(),
                }
            )
        return rows
    finally:
        node.stop()
        receiver.stop()
