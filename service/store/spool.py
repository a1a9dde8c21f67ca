"""Durable files: every write is flushed and fsync'ed, and so is every folder whose entries it
changed, before the caller records the file in the journal; so a file the journal names is
complete after a crash.

A new spool file is written under its own name (created exclusively), then fsync'ed, then its
folders: the file's fsync commits the file system's journal with the new names in it, so the
folders' fsyncs that follow find little left to do (one commit per file rather than two).  A
file that crashes half-written under its name was never recorded in the journal, nor
acknowledged: it is replaced when the object comes again.  A file that already exists is never
written in place: the new content goes to a temporary file that is fsync'ed and renamed over
it, so a recorded file is whole at every moment.  Outside the spool (the results folder,
which others may watch) a new file, too, appears under its name only when whole.

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


def _missing_dirs(path: Path) -> list[Path]:
    """``mkdir -p``; the folders it created, outermost first (not yet fsync'ed)."""
    missing = []
    p = path
    while not p.exists():
        missing.append(p)
        p = p.parent
    path.mkdir(parents=True, exist_ok=True)
    return list(reversed(missing))


def make_dirs(path: Path) -> None:
    """``mkdir -p`` that also fsyncs every folder it created and its parent."""
    for created in _missing_dirs(path):
        fsync_dir(created.parent)


def durable_write(path: Path, data: bytes, *, atomic: bool = True) -> None:
    """Write ``data`` to ``path`` durably: the file and the folders whose entries changed are
    fsync'ed before this returns.  An existing file is replaced atomically (never written in
    place).  A new file appears under its name only when whole (``atomic``: a temporary file
    renamed, for folders that others watch), or, with ``atomic=False`` (the spool, which only
    the journal points into), is created under its name, which saves a file-system commit."""
    created = _missing_dirs(path.parent)
    if atomic or not _write_new(path, data):
        _replace(path, data)
    else:
        fsync_dir(path.parent)
    for folder in reversed(created):
        fsync_dir(folder.parent)


def _write_new(path: Path, data: bytes) -> bool:
    """Create ``path`` (exclusively), write ``data`` and fsync it; False when it exists."""
    flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_CLOEXEC", 0)
    try:
        fd = os.open(path, flags, 0o600)  # as mkstemp: patient data, owner only
    except FileExistsError:
        return False
    with os.fdopen(fd, "wb") as fh:
        try:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        except BaseException:
            _unlink_if_ours(path, os.fstat(fh.fileno()))
            raise
    return True


def _unlink_if_ours(path: Path, ours: os.stat_result) -> None:
    """Remove a half-written new file, unless another writer has replaced it meanwhile."""
    with contextlib.suppress(OSError):
        now = os.stat(path)
        if (now.st_dev, now.st_ino) == (ours.st_dev, ours.st_ino):
            os.unlink(path)


def _replace(path: Path, data: bytes) -> None:
    """Put ``data`` under ``path`` atomically: a temporary file, fsync'ed, renamed over any
    file there, and the folder fsync'ed."""
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
    def __init__(self, root: Path, *, clean: bool = True) -> None:
        """``clean``: remove the temporary files a crash left (only the node, on start: any
        other opener could remove a file being written)."""
        self.root = Path(root)
        self.objects = self.root / "objects"
        self.results = self.root / "results"
        for folder in (self.objects, self.results):
            make_dirs(folder)
        if clean:
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
        durable_write(path, data, atomic=False)
        return path

    def write_result(self, study_uid: str, sop_instance_uid: str, data: bytes) -> Path:
        path = self.result_path(study_uid, sop_instance_uid)
        durable_write(path, data, atomic=False)
        return path
