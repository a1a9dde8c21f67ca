"""A throw-away PKI for the TLS tests, made with the ``openssl`` command line: a CA, a server
certificate for 127.0.0.1 (subjectAltName IP) and a client certificate, all signed by the CA.
Loopback only; nothing here is a real identity (fictional "Harbour Vale Cardiac Centre")."""

from __future__ import annotations

import shutil
import subprocess
from dataclasses import dataclass
from pathlib import Path

OPENSSL = shutil.which("openssl")


@dataclass(frozen=True)
class Pki:
    ca_cert: Path
    server_cert: Path
    server_key: Path
    client_cert: Path
    client_key: Path


def _run(*args: str, cwd: Path) -> None:
    assert OPENSSL, "openssl command line missing"
    subprocess.run([OPENSSL, *args], cwd=cwd, check=True, capture_output=True, timeout=60)


def make_pki(folder: Path) -> Pki:
    folder.mkdir(parents=True, exist_ok=True)
    org = "/O=Harbour Vale Cardiac Centre (fictional)"
    _run("req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "2", "-subj",
         f"{org}/CN=Test CA", "-keyout", "ca.key", "-out", "ca.pem",
         "-addext", "basicConstraints=critical,CA:TRUE",
         "-addext", "keyUsage=critical,keyCertSign,cRLSign", cwd=folder)  # fmt: skip
    for name, ext in (
        ("server", "subjectAltName=IP:127.0.0.1\nextendedKeyUsage=serverAuth\n"),
        ("client", "extendedKeyUsage=clientAuth\n"),
    ):
        (folder / f"{name}.ext").write_text(ext)
        _run("req", "-newkey", "rsa:2048", "-nodes", "-subj", f"{org}/CN=test {name}",
             "-keyout", f"{name}.key", "-out", f"{name}.csr", cwd=folder)  # fmt: skip
        _run("x509", "-req", "-in", f"{name}.csr", "-CA", "ca.pem", "-CAkey", "ca.key",
             "-CAcreateserial", "-days", "2", "-extfile", f"{name}.ext",
             "-out", f"{name}.pem", cwd=folder)  # fmt: skip
    return Pki(
        ca_cert=folder / "ca.pem",
        server_cert=folder / "server.pem",
        server_key=folder / "server.key",
        client_cert=folder / "client.pem",
        client_key=folder / "client.key",
    )
