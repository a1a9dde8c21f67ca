"""Helpers for the network tests: free ports, polling, in-process and subprocess nodes, DCMTK
peers and small invented SR objects.  Loopback (127.0.0.1) only; every wait is bounded."""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

import pydicom
from pydicom import Dataset
from pydicom.dataset import FileMetaDataset
from pydicom.uid import ExplicitVRLittleEndian, generate_uid

from service.pipeline import GradeStatus, StudyOutcome

LOOPBACK = "127.0.0.1"
NODE_AE = "DIASTOLIC_SR"
REPO = Path(__file__).resolve().parents[1]
STORESCU = "/usr/bin/storescu"
STORESCP = "/usr/bin/storescp"
ECHOSCU = "/usr/bin/echoscu"
COMPREHENSIVE_SR = "1.2.840.10008.5.1.4.1.1.88.33"


def have_dcmtk() -> bool:
    return all(os.access(p, os.X_OK) for p in (STORESCU, STORESCP, ECHOSCU))


#: DCMTK is a hard dependency in CI (``.ci/run`` installs it): there a missing tool fails the
#: test; elsewhere the test is skipped with the reason.
SKIP_WITHOUT_DCMTK = not have_dcmtk() and not os.environ.get("CI")
DCMTK_REASON = "DCMTK (storescu/storescp/echoscu in /usr/bin) missing; install as .ci/run does"


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((LOOPBACK, 0))
        return int(s.getsockname()[1])


class LoopbackNodes:
    """In-process nodes a test starts on 127.0.0.1 (a free port, polling every 0.05 s), each
    in a data folder of its own under ``root``; :meth:`stop_all` at the end of the test (the
    ``loopback_nodes`` fixture of conftest.py does that)."""

    def __init__(
        self, root: Path, *, journal: Callable[[Path], dict[str, Any]] | None = None
    ) -> None:
        self.root = Path(root)
        self.started: list[Any] = []
        #: the [journal] section of the node with a data folder ({}: SQLite in the folder)
        self.journal = journal or (lambda data_dir: {})

    def start(
        self,
        data: dict[str, Any],
        *,
        grade_fn: Any = None,
        settle: float = 0.0,
        forward: Sequence[str] = (),
        data_dir: Path | str | None = None,
    ) -> Any:
        """A started node (service.network.service.Node) with the configuration ``data``."""
        from service.config import apply_overrides, config_from_dict
        from service.network.service import Node

        folder = Path(data_dir or self.root / f"node{len(self.started)}")
        journal = self.journal(folder)
        if journal:
            data = {**data, "journal": {**data.get("journal", {}), **journal}}
        cfg = apply_overrides(
            config_from_dict(data),
            port=0,
            bind=LOOPBACK,
            data_dir=str(folder),
            settle_seconds=settle,
            forward=list(forward),
        )
        node = Node(cfg, grade_fn=grade_fn, poll_seconds=0.05)
        node.start()
        self.started.append(node)
        return node

    def stop_all(self) -> None:
        for node in self.started:
            node.stop()


def merged(base: dict[str, Any], extra: dict[str, Any] | None) -> dict[str, Any]:
    """``base`` with ``extra``'s sections merged in, key by key (a non-table value replaces)."""
    out = dict(base)
    for key, value in (extra or {}).items():
        out[key] = {**out.get(key, {}), **value} if isinstance(value, dict) else value
    return out


def study_state(node: Any, study_uid: str) -> str | None:
    """The journal state of a study in an in-process node, None when it is unknown."""
    row = node.journal.study(study_uid)
    return None if row is None else row["state"]


def wait_for(condition: Callable[[], Any], timeout: float = 20.0, interval: float = 0.05) -> Any:
    """Poll ``condition`` until it returns something truthy; fail the test after ``timeout``."""
    deadline = time.monotonic() + timeout
    last: Any = None
    while time.monotonic() < deadline:
        last = condition()
        if last:
            return last
        time.sleep(interval)
    raise AssertionError(f"condition not met within {timeout} s (last value: {last!r})")


# ---------------------------------------------------------------------------------------------
# Invented source objects (fictional clinic "Harbour Vale Cardiac Centre")
# ---------------------------------------------------------------------------------------------


def simple_sr(
    study_uid: str | None = None,
    *,
    sop_uid: str | None = None,
    patient: str = "Testperson^Ada",
    patient_id: str = "HV-0001",
    created: str = "20260101120000",
) -> Dataset:
    """A minimal Comprehensive SR (enough for the network layer; no echo content)."""
    ds = Dataset()
    ds.file_meta = FileMetaDataset()
    ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.file_meta.MediaStorageSOPClassUID = COMPREHENSIVE_SR
    ds.SOPClassUID = COMPREHENSIVE_SR
    ds.SOPInstanceUID = sop_uid or generate_uid()
    ds.file_meta.MediaStorageSOPInstanceUID = ds.SOPInstanceUID
    ds.StudyInstanceUID = study_uid or generate_uid()
    ds.SeriesInstanceUID = generate_uid()
    ds.Modality = "SR"
    ds.PatientName = patient
    ds.PatientID = patient_id
    ds.InstitutionName = "Harbour Vale Cardiac Centre"
    ds.ContentDate = created[:8]
    ds.ContentTime = created[8:]
    ds.ValueType = "CONTAINER"
    ds.ContinuityOfContent = "SEPARATE"
    return ds


def fake_grade(
    datasets: Sequence[Dataset],
    options: Any,
    *,
    table: Any = None,
    predecessors: Sequence[Any] = (),
) -> StudyOutcome:
    """Stand-in for the grading pipeline (network-layer tests only): a result whose UID is
    derived from the sorted source UIDs, like the real pipeline's.  A source whose
    PatientComments is "REJECT" makes the study rejected."""
    if any(getattr(ds, "PatientComments", "") == "REJECT" for ds in datasets):
        return StudyOutcome(status=GradeStatus.rejected, reason="no echo measurement recognised")
    sources = sorted(str(ds.SOPInstanceUID) for ds in datasets)
    digest = int(hashlib.sha256("|".join(sources).encode()).hexdigest()[:30], 16)
    first = datasets[0]
    out = Dataset()
    out.file_meta = FileMetaDataset()
    out.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
    out.SOPClassUID = COMPREHENSIVE_SR
    out.SOPInstanceUID = f"2.25.{digest}"
    out.file_meta.MediaStorageSOPClassUID = COMPREHENSIVE_SR
    out.file_meta.MediaStorageSOPInstanceUID = out.SOPInstanceUID
    out.StudyInstanceUID = first.StudyInstanceUID
    out.SeriesInstanceUID = f"2.25.{digest + 1}"
    out.Modality = "SR"
    out.PatientName = first.PatientName
    out.PatientID = first.PatientID
    if predecessors:
        out.ReferencedSOPInstanceUID = predecessors[-1].sop_instance_uid
    return StudyOutcome(
        status=GradeStatus.graded, study_instance_uid=str(first.StudyInstanceUID), result=out
    )


def write_files(datasets: Sequence[Dataset], folder: Path) -> list[Path]:
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for ds in datasets:
        p = folder / f"{ds.SOPInstanceUID}.dcm"
        ds.save_as(p, enforce_file_format=True)
        paths.append(p)
    return paths


# ---------------------------------------------------------------------------------------------
# The node as a subprocess
# ---------------------------------------------------------------------------------------------


def write_config(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


class NodeProcess:
    """``python -m service.cli serve ...`` in a subprocess, with its log in a file."""

    def __init__(
        self, data_dir: Path, args: Sequence[str] = (), env: dict[str, str] | None = None
    ) -> None:
        self.data_dir = Path(data_dir)
        self.args = list(args)
        #: more environment variables for the node (e.g. PGPASSWORD)
        self.env = dict(env or {})
        self.proc: subprocess.Popen[bytes] | None = None
        self.log_path = self.data_dir.parent / f"{self.data_dir.name}-node.log"
        self.port: int | None = None

    def start(self, timeout: float = 30.0) -> int:
        status = self.data_dir / "run" / "listener.json"
        status.unlink(missing_ok=True)
        self.data_dir.mkdir(parents=True, exist_ok=True)
        with open(self.log_path, "ab") as log:
            self.proc = subprocess.Popen(
                [
                    sys.executable,
                    "-m",
                    "service.cli",
                    "serve",
                    "--bind",
                    LOOPBACK,
                    "--data-dir",
                    str(self.data_dir),
                    "--http-port",
                    "0",
                    *self.args,
                ],
                cwd=REPO,
                stdout=log,
                stderr=subprocess.STDOUT,
                env={**os.environ, **self.env},
            )

        def ready() -> int | None:
            assert self.proc is not None
            if self.proc.poll() is not None:
                raise AssertionError(f"node exited early ({self.proc.returncode}):\n{self.log()}")
            if not status.exists():
                return None
            info = json.loads(status.read_text())
            return int(info["port"]) if info.get("pid") == self.proc.pid else None

        self.port = wait_for(ready, timeout)
        return self.port

    def log(self) -> str:
        try:
            return self.log_path.read_text(errors="replace")
        except OSError:
            return ""

    def terminate(self, timeout: float = 30.0) -> int:
        assert self.proc is not None
        self.proc.send_signal(signal.SIGTERM)
        return self.proc.wait(timeout)

    def kill(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(10)

    def __enter__(self) -> NodeProcess:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.kill()


@contextlib.contextmanager
def storescp(
    out_dir: Path, port: int, ae_title: str = "PACS", extra: Sequence[str] = ()
) -> Iterator[subprocess.Popen]:
    """DCMTK storescp as the PACS (it listens on all interfaces; we only connect to loopback).
    ``+uf``: one file per received object (a duplicate delivery would show as two files);
    ``+B``: written exactly as received; ``extra``: more options."""
    out_dir.mkdir(parents=True, exist_ok=True)
    proc = subprocess.Popen(
        [STORESCP, "-aet", ae_title, "-od", str(out_dir), "+uf", "+B", *extra, str(port)],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        # DCMTK reads TCP_NODELAY from the environment; without it each response waits on
        # Nagle's algorithm and delayed acknowledgements (~40 ms)
        env={**os.environ, "TCP_NODELAY": "1"},
    )
    try:
        wait_for(lambda: echo_ok(port, ae_title) or proc.poll() is not None, 15)
        if proc.poll() is not None:
            raise AssertionError(f"storescp exited early ({proc.returncode})")
        yield proc
    finally:
        if proc.poll() is None:
            proc.terminate()
            try:
                proc.wait(10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(5)


def echo_ok(port: int, called: str, calling: str = "ECHOSCU") -> bool:
    r = subprocess.run(
        [ECHOSCU, "-aet", calling, "-aec", called, "-to", "5", LOOPBACK, str(port)],
        capture_output=True,
        timeout=20,
    )
    return r.returncode == 0


def pynetdicom_echo(port: int, called: str = NODE_AE, calling: str = "ECHOER") -> int | None:
    """C-ECHO with pynetdicom; the status, or None when no association."""
    from pynetdicom import AE

    ae = AE(ae_title=calling)
    ae.acse_timeout = ae.dimse_timeout = ae.network_timeout = 10
    ae.add_requested_context("1.2.840.10008.1.1")
    assoc = ae.associate(LOOPBACK, port, ae_title=called)
    if not assoc.is_established:
        return None
    try:
        status = assoc.send_c_echo()
        return int(status.Status) if "Status" in status else None
    finally:
        assoc.release()


#: seconds within which a file storescp is writing may still be incomplete
WRITING_SECONDS = 5.0


def pacs_uids(out_dir: Path) -> list[str]:
    """SOP Instance UIDs of the files storescp wrote (one per received object).  storescp
    writes each file under its final name as the object arrives (with ``+B``, the data set as
    it comes off the connection), so a file it is writing is left out while it cannot be read
    and was changed in the last :data:`WRITING_SECONDS`; an older unreadable file is an
    error."""
    out = []
    for p in sorted(out_dir.glob("*")):
        if p.is_file() and not p.name.startswith("."):
            try:
                out.append(str(pydicom.dcmread(p, stop_before_pixels=True).SOPInstanceUID))
            except Exception:
                if time.time() - p.stat().st_mtime < WRITING_SECONDS:
                    continue  # being written: counted once it is complete
                raise
    return out


def run_storescu(
    files: Sequence[Path], port: int, *, calling: str = "SCANNER1", called: str = NODE_AE
) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [
            STORESCU,
            "-R",  # propose the SOP classes of the files (88.72 is not in its default list)
            "-aet",
            calling,
            "-aec",
            called,
            "-to",
            "10",
            LOOPBACK,
            str(port),
            *map(str, files),
        ],
        capture_output=True,
        text=True,
        timeout=60,
    )


def which(name: str) -> str | None:
    return shutil.which(name)


# ---------------------------------------------------------------------------------------------
# Echo measurement SRs (the real pipeline grades these)
# ---------------------------------------------------------------------------------------------


#: a complete normal-LVEF set of measurements (canonical measure name -> value in its
#: canonical unit), the default of the invented echo SRs of the tests
NORMAL_VALUES: dict[str, float] = {
    "mitral_e": 80.0,
    "mitral_a": 60.0,
    "e_prime_septal": 6.0,
    "e_prime_lateral": 8.0,
    "tr_peak_velocity": 3.0,
    "lavi": 40.0,
    "lvef": 60.0,
}


def echo_sr(
    seed: str,
    *,
    instance: int = 1,
    study_uid: str | None = None,
    content_time: str = "101500",
    values: dict[str, float] | None = None,
    patient_name: str = "Harbourvale^Test",
    patient_id: str = "HV-T-0001",
    sop_class: str = COMPREHENSIVE_SR,
    study_date: str | None = None,
) -> Dataset:
    """An invented TID 5300 echo SR (Harbour Vale Cardiac Centre) built by the project's
    echo SR builder.  ``values``: canonical measure name -> value in its canonical unit;
    the default is a complete normal-LVEF set."""
    from service.model import Measure
    from service.sr.echo_builder import EchoItem, Patient, Study, build_echo_sr

    values = values or NORMAL_VALUES
    items = [EchoItem(measure=Measure(k), value=v) for k, v in values.items()]
    study = Study(study_uid=study_uid, seed=seed, content_time=content_time)
    if study_date is not None:
        study = study.model_copy(update={"study_date": study_date})
    return build_echo_sr(
        items,
        patient=Patient(name=patient_name, id=patient_id),
        study=study,
        instance_number=instance,
        sop_class=sop_class,
    )


def evidence_uids(result: Dataset) -> set[str]:
    """SOP Instance UIDs in the result's Current Requested Procedure Evidence Sequence
    (PS3.3 C.17.2: the instances the document was made from)."""
    out = set()
    for study in result.get("CurrentRequestedProcedureEvidenceSequence", []):
        for series in study.get("ReferencedSeriesSequence", []):
            for item in series.get("ReferencedSOPSequence", []):
                out.add(str(item.ReferencedSOPInstanceUID))
    return out


def predecessor_uids(result: Dataset) -> set[str]:
    out = set()
    for study in result.get("PredecessorDocumentsSequence", []):
        for series in study.get("ReferencedSeriesSequence", []):
            for item in series.get("ReferencedSOPSequence", []):
                out.add(str(item.ReferencedSOPInstanceUID))
    return out


def send(
    datasets: Sequence[Dataset],
    port: int,
    *,
    calling: str = "SCANNER1",
    called: str = NODE_AE,
    transfer_syntaxes: Sequence[str] | None = None,
) -> list[int]:
    """C-STORE over one pynetdicom association; the status of each object."""
    from pydicom.uid import (
        DeflatedExplicitVRLittleEndian,
        ExplicitVRLittleEndian,
        ImplicitVRLittleEndian,
    )
    from pynetdicom import AE

    ts = list(
        transfer_syntaxes
        or [ExplicitVRLittleEndian, ImplicitVRLittleEndian, DeflatedExplicitVRLittleEndian]
    )
    ae = AE(ae_title=calling)
    ae.acse_timeout = ae.dimse_timeout = ae.network_timeout = 20
    for uid in sorted({str(ds.SOPClassUID) for ds in datasets}):
        ae.add_requested_context(uid, ts)
    assoc = ae.associate(LOOPBACK, port, ae_title=called)
    assert assoc.is_established, "association refused"
    out = []
    try:
        for ds in datasets:
            status = assoc.send_c_store(ds)
            out.append(int(status.Status) if "Status" in status else -1)
    finally:
        if assoc.is_established:
            assoc.release()
    return out


# ---------------------------------------------------------------------------------------------
# Peers that misbehave on the wire
# ---------------------------------------------------------------------------------------------


class TricklingPeer:
    """A raw TCP server on loopback that answers an association request with the header of an
    A-ASSOCIATE-AC PDU announcing ``length`` bytes (PS3.8 9.3.3), then trickles them one byte
    every ``interval`` seconds: a peer that never stalls outright and never finishes."""

    def __init__(self, *, length: int = 4096, interval: float = 0.2) -> None:
        import threading

        self.length = length
        self.interval = interval
        self._stop = threading.Event()
        self._server = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        self._server.bind((LOOPBACK, 0))
        self._server.listen(8)
        self._server.settimeout(0.2)
        self.port = int(self._server.getsockname()[1])
        self.connections = 0
        self._threads: list[Any] = []
        self._thread = threading.Thread(target=self._accept, daemon=True)

    def __enter__(self) -> TricklingPeer:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join(5)
        for t in self._threads:
            t.join(5)
        self._server.close()

    def _accept(self) -> None:
        import threading

        while not self._stop.is_set():
            try:
                conn, _ = self._server.accept()
            except OSError:
                continue
            self.connections += 1
            t = threading.Thread(target=self._trickle, args=(conn,), daemon=True)
            t.start()
            self._threads.append(t)

    def _trickle(self, conn: socket.socket) -> None:
        import struct

        with conn:
            try:
                conn.settimeout(5)
                conn.recv(65536)  # the A-ASSOCIATE-RQ
                conn.sendall(struct.pack(">BBL", 0x02, 0x00, self.length))
                for _ in range(self.length):
                    if self._stop.wait(self.interval):
                        return
                    conn.sendall(b"\x00")
            except OSError:
                return


class TricklingProxy:
    """A TCP relay on loopback in front of a DICOM peer: what the requestor sends passes at
    once; of what the peer answers, the first ``fast_pdus`` PDUs pass at once (the
    A-ASSOCIATE-AC) and everything after them one byte every ``interval`` seconds."""

    def __init__(self, target_port: int, *, fast_pdus: int = 1, interval: float = 0.2) -> None:
        import threading

        self.target_port = target_port
        self.fast_pdus = fast_pdus
        self.interval = interval
        self._stop = threading.Event()
        self._server = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        self._server.bind((LOOPBACK, 0))
        self._server.listen(8)
        self._server.settimeout(0.2)
        self.port = int(self._server.getsockname()[1])
        self._threads: list[Any] = []
        self._thread = threading.Thread(target=self._accept, daemon=True)

    def __enter__(self) -> TricklingProxy:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join(5)
        for t in self._threads:
            t.join(5)
        self._server.close()

    def _accept(self) -> None:
        import threading

        while not self._stop.is_set():
            try:
                client, _ = self._server.accept()
            except OSError:
                continue
            try:
                upstream = socket.create_connection((LOOPBACK, self.target_port), timeout=5)
            except OSError:
                client.close()
                continue
            for target in (self._forward, self._backward):
                t = threading.Thread(target=target, args=(client, upstream), daemon=True)
                t.start()
                self._threads.append(t)

    def _forward(self, client: socket.socket, upstream: socket.socket) -> None:
        with contextlib.suppress(OSError):
            client.settimeout(0.2)
            while not self._stop.is_set():
                try:
                    data = client.recv(65536)
                except TimeoutError:
                    continue
                if not data:
                    break
                upstream.sendall(data)
        with contextlib.suppress(OSError):
            upstream.shutdown(socket.SHUT_WR)

    def _backward(self, client: socket.socket, upstream: socket.socket) -> None:
        import struct

        buf = b""
        fast = self.fast_pdus
        try:
            upstream.settimeout(0.2)
            while not self._stop.is_set():
                while fast and len(buf) >= 6:
                    (length,) = struct.unpack(">L", buf[2:6])
                    if len(buf) < 6 + length:
                        break
                    client.sendall(buf[: 6 + length])
                    buf = buf[6 + length :]
                    fast -= 1
                if not fast and buf:
                    client.sendall(buf[:1])
                    buf = buf[1:]
                    if self._stop.wait(self.interval):
                        break
                    continue
                try:
                    data = upstream.recv(65536)
                except TimeoutError:
                    continue
                if not data:
                    break
                buf += data
        except OSError:
            pass
        finally:
            for s in (client, upstream):
                with contextlib.suppress(OSError):
                    s.close()


# ---------------------------------------------------------------------------------------------
# Journal-neutral looks at a node's journal (SQLite or PostgreSQL)
# ---------------------------------------------------------------------------------------------


def journal_args(node: Any) -> list[str]:
    """The ``queue`` command's options that name ``node``'s journal (the password, for a
    PostgreSQL journal, from PGPASSWORD: the ``node_backend`` fixture sets it)."""
    args = ["--data-dir", str(node.config.data_dir)]
    if node.config.journal.url:
        args += ["--journal", node.config.journal.url]
    return args


def bytes_kept(journal: Any, row: dict[str, Any]) -> bool:
    """Whether the bytes of an object row (``objects`` or ``ignored_objects``) are stored: its
    row of ``object_data``, or the spool file of a row recorded before SQLite's schema 7."""
    if row.get("path"):
        return Path(row["path"]).is_file()
    return bool(
        journal._query(
            "SELECT 1 FROM object_data WHERE sop_instance_uid = ?", (row["sop_instance_uid"],)
        )
    )
