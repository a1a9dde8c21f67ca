"""Orthanc, an open-source PACS (Debian packages ``orthanc`` and ``orthanc-dicomweb``), as a
peer of the tests: started on loopback ports with a configuration this module writes into a
temporary folder, stopped by its process id, and restarted on the same storage when a test
needs the PACS to go away and come back.

The configuration (Orthanc 1.10 option names, as documented in the ``orthanc.json`` Debian
installs in /etc/orthanc):

* its own ``StorageDirectory`` / ``IndexDirectory``, ``DicomAet``, free loopback ``DicomPort``
  and ``HttpPort``, ``RemoteAccessAllowed`` false (the REST API answers loopback only, without
  authentication);
* the DICOMweb plugin (``Plugins``, ``DicomWeb.Enable``, ``DicomWeb.Root``);
* the node registered in ``DicomModalities``: a registered modality may C-FIND, C-GET and
  C-MOVE (every ``Allow*`` option of a modality defaults to true), and it is where C-MOVE
  sends the objects; other callers may not (``DicomAlwaysAllowFind`` / ``Get`` / ``Move``
  stay false, the defaults);
* Orthanc 1.10 has no option listing accepted SOP classes (``AcceptedSopClasses`` came in a
  later version): it accepts every storage SOP class DCMTK knows, which includes the SR
  storage classes; ``UnknownSopClassAccepted`` stays false.  For C-GET, Orthanc sends each
  object on the retrieving association, in a presentation context the retriever proposed
  with the SCP role (PS3.4 C.4.3; PS3.7 D.3.3.4 role selection).
"""

from __future__ import annotations

import base64
import json
import os
import signal
import subprocess
import urllib.request
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from netutil import LOOPBACK, free_port, wait_for

ORTHANC = "/usr/sbin/Orthanc"
DICOMWEB_PLUGIN = "/usr/share/orthanc/plugins/libOrthancDicomWeb.so"
ORTHANC_AE = "HV_ORTHANC"


def have_orthanc() -> bool:
    return os.access(ORTHANC, os.X_OK) and os.path.exists(DICOMWEB_PLUGIN)


#: Orthanc is a hard dependency in CI (the README's test command installs it): there a missing
#: Orthanc fails the test; elsewhere the test is skipped with the reason
SKIP_WITHOUT_ORTHANC = not have_orthanc() and not os.environ.get("CI")
ORTHANC_REASON = (
    "Orthanc with its DICOMweb plugin missing (Debian orthanc, orthanc-dicomweb); "
    "install as the README's test command does"
)


class Orthanc:
    """One Orthanc server with its configuration and storage under ``root``."""

    def __init__(
        self,
        root: Path,
        *,
        ae_title: str = ORTHANC_AE,
        modalities: dict[str, tuple[str, int]] | None = None,
        extra: dict[str, Any] | None = None,
        user: tuple[str, str] | None = None,
    ) -> None:
        self.root = Path(root)
        #: (user name, password) of HTTP basic authentication on its REST API and DICOMweb;
        #: None: no authentication (loopback only)
        self.user = user
        self.ae_title = ae_title
        self.dicom_port = free_port()
        self.http_port = free_port()
        self.storage = self.root / "storage"
        self.config_path = self.root / "orthanc.json"
        self.log_path = self.root / "orthanc.log"
        self.proc: subprocess.Popen[bytes] | None = None
        self._modalities = dict(modalities or {})
        self._extra = dict(extra or {})
        self.write_config()

    # -- configuration ---------------------------------------------------------------------------

    def config(self) -> dict[str, Any]:
        return {
            "Name": f"diastolic-sr tests ({self.root.name})",
            "StorageDirectory": str(self.storage),
            "IndexDirectory": str(self.storage),
            "DicomAet": self.ae_title,
            "DicomPort": self.dicom_port,
            "HttpPort": self.http_port,
            "RemoteAccessAllowed": False,
            "AuthenticationEnabled": self.user is not None,
            "RegisteredUsers": dict([self.user]) if self.user else {},
            "HttpServerEnabled": True,
            "DicomServerEnabled": True,
            "Plugins": [DICOMWEB_PLUGIN],
            "DicomWeb": {"Enable": True, "Root": "/dicom-web/", "EnableWado": False},
            "DicomModalities": {
                name: {"AET": aet, "Host": LOOPBACK, "Port": port}
                for name, (aet, port) in self._modalities.items()
            },
            "DicomAlwaysAllowFind": False,
            "DicomAlwaysAllowGet": False,
            "DicomAlwaysAllowMove": False,
            "UnknownSopClassAccepted": False,
            "DicomScpTimeout": 30,
            "DicomScuTimeout": 10,
            "SaveJobs": False,
            "StorageAccessOnFind": "Always",
            "DeidentifyLogs": True,
            "ExecuteLuaEnabled": False,
            "HttpTimeout": 30,
            **self._extra,
        }

    def write_config(self) -> None:
        self.root.mkdir(parents=True, exist_ok=True)
        self.storage.mkdir(parents=True, exist_ok=True)
        self.config_path.write_text(json.dumps(self.config(), indent=2), encoding="utf-8")

    def register(self, name: str, ae_title: str, port: int) -> None:
        """Register a DICOM modality (for C-FIND/C-GET/C-MOVE from it, and as a C-MOVE
        destination): in the configuration file, and in the running server through its REST
        API (``PUT /modalities/{name}``), so no restart is needed."""
        self._modalities[name] = (ae_title, port)
        self.write_config()
        if self.running():
            self.rest(
                "PUT",
                f"/modalities/{name}",
                {"AET": ae_title, "Host": LOOPBACK, "Port": port},
            )

    # -- running ----------------------------------------------------------------------------------

    @property
    def url(self) -> str:
        return f"http://{LOOPBACK}:{self.http_port}"

    @property
    def dicomweb_url(self) -> str:
        return f"{self.url}/dicom-web"

    @property
    def source(self) -> str:
        """``AET@HOST:PORT`` of its DICOM service."""
        return f"{self.ae_title}@{LOOPBACK}:{self.dicom_port}"

    def running(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    def start(self, timeout: float = 60.0) -> Orthanc:
        if self.running():
            return self
        with open(self.log_path, "ab") as log:
            self.proc = subprocess.Popen(
                [ORTHANC, str(self.config_path)],
                cwd=self.root,
                stdout=log,
                stderr=subprocess.STDOUT,
                # DCMTK, under Orthanc's DICOM server, reads TCP_NODELAY from the environment
                # (as for storescp in netutil): without it each response can wait for a
                # delayed acknowledgement (~40 ms)
                env={**os.environ, "TCP_NODELAY": "1"},
            )

        def up() -> bool:
            assert self.proc is not None
            if self.proc.poll() is not None:
                raise AssertionError(
                    f"Orthanc exited early ({self.proc.returncode}):\n{self.log()[-3000:]}"
                )
            try:
                info = self.rest("GET", "/system", timeout=2)
            except OSError:
                return False
            return bool(info) and info.get("DicomAet") == self.ae_title

        wait_for(up, timeout, interval=0.1)
        return self

    def stop(self, timeout: float = 30.0) -> None:
        """SIGTERM to this server's process id; SIGKILL if it does not end in ``timeout``."""
        proc = self.proc
        if proc is None or proc.poll() is not None:
            return
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(10)

    def restart(self, timeout: float = 60.0) -> Orthanc:
        """Stop and start again on the same storage, ports and configuration."""
        self.stop()
        return self.start(timeout)

    def log(self) -> str:
        try:
            return self.log_path.read_text(errors="replace")
        except OSError:
            return ""

    # -- REST API (loopback, no authentication) ----------------------------------------------

    def rest(
        self,
        method: str,
        path: str,
        body: Any = None,
        *,
        timeout: float = 30.0,
        content_type: str = "application/dicom",
    ) -> Any:
        data = None
        headers = {}
        if body is not None:
            if isinstance(body, bytes):
                data = body
                headers["Content-Type"] = content_type
            else:
                data = json.dumps(body).encode()
                headers["Content-Type"] = "application/json"
        if self.user is not None:
            token = base64.b64encode(f"{self.user[0]}:{self.user[1]}".encode()).decode()
            headers["Authorization"] = f"Basic {token}"
        req = urllib.request.Request(self.url + path, data=data, method=method, headers=headers)
        with urllib.request.urlopen(req, timeout=timeout) as resp:
            raw = resp.read()
        if not raw:
            return None
        try:
            return json.loads(raw)
        except ValueError:
            return raw

    def upload(self, files: Sequence[Path]) -> None:
        """Store Part 10 files through the REST API (``POST /instances``)."""
        for path in files:
            self.rest("POST", "/instances", Path(path).read_bytes())

    def instances(self) -> list[str]:
        """Orthanc identifiers of every stored instance."""
        return list(self.rest("GET", "/instances") or [])

    def study_instances(self, study_uid: str) -> list[dict[str, Any]]:
        """Main DICOM tags of every instance of a study (empty when the study is unknown)."""
        found = self.rest(
            "POST",
            "/tools/find",
            {"Level": "Instance", "Query": {"StudyInstanceUID": study_uid}, "Expand": True},
        )
        return list(found or [])

    def sop_instance_uids(self, study_uid: str) -> set[str]:
        return {
            str(i["MainDicomTags"].get("SOPInstanceUID", ""))
            for i in self.study_instances(study_uid)
        }

    def instance_bytes(self, orthanc_id: str) -> bytes:
        return self.rest("GET", f"/instances/{orthanc_id}/file")

    def delete_study(self, study_uid: str) -> bool:
        """Remove a study (as an archive administrator would); False when it is not there."""
        ids = self.rest("POST", "/tools/lookup", study_uid.encode(), content_type="text/plain")
        ids = ids or []
        gone = False
        for item in ids:
            if item.get("Type") == "Study":
                self.rest("DELETE", item["Path"])
                gone = True
        return gone

    def __enter__(self) -> Orthanc:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()
