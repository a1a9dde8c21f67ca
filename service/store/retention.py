"""Retention: delete the stored sources and results of studies finished more than N days ago.

Pending work (studies waiting to be graded, results waiting to be delivered) and failed
deliveries are never touched: see :meth:`Journal.purge_finished`.  The results folder is an
output for people and other systems and is left alone.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

from service.store.journal import Journal

DAY = 86400.0


@dataclass(frozen=True)
class PurgeReport:
    studies: int
    files: int


def purge(journal: Journal, days: float, *, now: float | None = None) -> PurgeReport:
    """Purge studies finished more than ``days`` ago (0: keep everything)."""
    if days <= 0:
        return PurgeReport(0, 0)
    now = time.time() if now is None else now
    purged = journal.purge_finished(now - days * DAY)
    return PurgeReport(len(purged.studies), purged.files)
