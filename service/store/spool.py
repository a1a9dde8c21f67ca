"""Durable files, and the spool of journals before schema version 7.

:func:`durable_write` writes a file durably: the file and every folder whose entries changed
are fsync'ed before it returns, and the file appears under its name only when whole (a
temporary file, fsync'ed and renamed over any file there), so a folder that others watch (the
results folder) never shows a half-written file and an existing file is never written in
place.

Before schema version 7 the SQLite journal kept the received objects and the results as files
of a spool beside it; the journal now keeps their bytes itself.  Rows of that time keep their
file's path: :class:`Spool` names the layout, cleans the temporary files a crash left, and the
journal reads those files and deletes them when retention purges their rows::

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


def durable_write(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` durably: the file and the folders whose entries changed are
    fsync'ed before this returns.  The file appears under its name only when whole, and an
    existing file is replaced atomically (never written in place)."""
    created = _missing_dirs(path.parent)
    _replace(path, data)
    for folder in reversed(created):
        fsync_dir(folder.parent)


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
    """The spool of a journal before schema version 7 (see the module's notes): read-only
    now, but for the removal of what a crash left half-written and of purged files."""

    def __init__(self, root: Path, *, clean: bool = True) -> None:
        """``clean``: remove the temporary files a crash left (only the node, on start: any
        other opener could remove a file being written)."""
        self.root = Path(root)
        self.objects = self.root / "objects"
        self.results = self.root / "results"
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
