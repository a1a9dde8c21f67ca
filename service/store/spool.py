"""Durable files: every write lands in a temporary file, is flushed and fsync'ed, renamed into
place and the folder is fsync'ed, so a file that exists after a crash is complete.

Layout under the spool root::

    objects/<study uid>/<sop instance uid>.dcm   received source objects, Part 10 files
    results/<study uid>/<sop instance uid>.dcm   result SRs
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import re
import tempfile
from pathlib import Path

_SAFE_UID = re.compile(r"^[0-9.]{1,64}$")


def fsync_dir(path: Path) -> None:
    """Flush a folder's entries (new names, renames) to disk."""
    fd = os.open(path, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def make_dirs(path: Path) -> None:
    """``mkdir -p`` that also fsyncs every folder it created and its parent."""
    missing = []
    p = path
    while not p.exists():
        missing.append(p)
        p = p.parent
    path.mkdir(parents=True, exist_ok=True)
    for created in reversed(missing):
        fsync_dir(created.parent)


def durable_write(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` atomically and durably (file and folder fsync'ed)."""
    make_dirs(path.parent)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=".tmp-", suffix=".part")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
    fsync_dir(path.parent)


def safe_name(uid: str) -> str:
    """A file name for a UID: the UID itself when it is plain dotted digits, else a digest
    (a malformed UID must never become a path)."""
    if _SAFE_UID.match(uid) and uid.strip(".") == uid:
        return uid
    return "x" + hashlib.sha256(uid.encode("utf-8", "replace")).hexdigest()[:40]


class Spool:
    def __init__(self, root: Path) -> None:
        self.root = Path(root)
        self.objects = self.root / "objects"
        self.results = self.root / "results"
        for folder in (self.objects, self.results):
            make_dirs(folder)
        self.clean_temporaries()

    def clean_temporaries(self) -> int:
        """Remove half-written temporary files left by a crash (they were never acknowledged)."""
        n = 0
        for tmp in self.root.rglob(".tmp-*.part"):
            try:
                tmp.unlink()
                n += 1
            except OSError:
                pass
        return n

    def object_path(self, study_uid: str, sop_instance_uid: str) -> Path:
        return self.objects / safe_name(study_uid) / f"{safe_name(sop_instance_uid)}.dcm"

    def result_path(self, study_uid: str, sop_instance_uid: str) -> Path:
        return self.results / safe_name(study_uid) / f"{safe_name(sop_instance_uid)}.dcm"

    def write_object(self, study_uid: str, sop_instance_uid: str, data: bytes) -> Path:
        path = self.object_path(study_uid, sop_instance_uid)
        durable_write(path, data)
        return path

    def write_result(self, study_uid: str, sop_instance_uid: str, data: bytes) -> Path:
        path = self.result_path(study_uid, sop_instance_uid)
        durable_write(path, data)
        return path
