"""Retention: delete spooled sources and results of studies finished more than N days ago,
and objects ignored (the node's own results coming back) more than N days ago.

Pending work (studies waiting to be graded, results waiting to be delivered) and failed
deliveries are never touched: see :meth:`Journal.purge_finished`.  The results folder is an
output for people and other systems and is left alone.
"""

from __future__ import annotations

import contextlib
import time
from dataclasses import dataclass
from pathlib import Path

from service.store.journal import Journal

DAY = 86400.0


@dataclass(frozen=True)
class PurgeReport:
    studies: int
    files: int


def purge(
    journal: Journal, spool_root: Path, days: float, *, now: float | None = None
) -> PurgeReport:
    """Purge studies finished more than ``days`` ago (0: keep everything)."""
    if days <= 0:
        return PurgeReport(0, 0)
    now = time.time() if now is None else now
    purged = journal.purge_finished(now - days * DAY)
    ignored = journal.purge_ignored(now - days * DAY)
    root = Path(spool_root).resolve()
    removed = 0
    folders = set()
    for path in (*purged.paths, *ignored):
        p = Path(path)
        with contextlib.suppress(OSError):
            if root in p.resolve().parents:  # only ever delete inside the spool
                p.unlink()
                removed += 1
                folders.add(p.parent)
    for folder in folders:
        with contextlib.suppress(OSError):
            folder.rmdir()  # only when empty
    return PurgeReport(len(purged.studies), removed)
