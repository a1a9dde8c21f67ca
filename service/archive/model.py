"""What the archive clients answer, and how they fail.

An archive is asked three things: which studies of a period hold SR objects, which SR
objects a study holds (only the accepted SR storage classes: never images), and to hand
those objects over (C-GET or WADO-RS: to this process; C-MOVE: to a node the archive knows).

Failures come in two kinds: :class:`ArchiveUnavailable` (cannot connect, association aborted,
no answer in time, HTTP 5xx): the archive may come back and the run can wait for it;
:class:`ArchiveRefused` (association rejected, a query or retrieve refused with a failure
status, HTTP 4xx): nothing changes by waiting, the run stops with the reason.  Both are
:class:`~service.errors.UserError`: one clear line, never a traceback.  A study that is no
longer in the archive raises :class:`StudyGone` (that study fails; the run goes on).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from datetime import date
from typing import Protocol

from service.errors import UserError
from service.network.listener import Arrival, Received


class ArchiveError(UserError):
    """Something the archive did or did not do; the message names the archive."""


class ArchiveUnavailable(ArchiveError):
    """Cannot reach the archive now (connection, abort, time-out): it may come back."""


class ArchiveRefused(ArchiveError):
    """The archive said no (association rejected, failure status, HTTP 4xx)."""


class StudyGone(ArchiveError):
    """The study, found by an earlier query, is no longer in the archive."""


class NoSrObjects(ArchiveError):
    """The study is in the archive but holds no SR series: an archive that does not match
    Modalities in Study (DCMTK's dcmqrscp, for one) answers the study query with every study
    of the period."""


@dataclass(frozen=True)
class ArchivedStudy:
    study_uid: str
    #: Study Date as the archive gave it (YYYYMMDD), "" when it gave none
    study_date: str = ""


@dataclass(frozen=True)
class ArchivedInstance:
    study_uid: str
    series_uid: str
    sop_instance_uid: str
    #: "" when the archive did not return it (the object is then still an SR: it was found in
    #: an SR series)
    sop_class_uid: str


@dataclass
class RetrieveReport:
    """What a retrieve did: how many objects arrived here (C-GET, WADO-RS; each handed to the
    sink) and the sub-operation counts the archive reported (C-GET, C-MOVE)."""

    arrived: int = 0
    completed: int = 0
    failed: int = 0
    warning: int = 0
    #: the archive's own account of a problem (a final status other than success)
    problem: str = ""


#: what a retrieve hands every object it receives to: the node's intake
Sink = Callable[[Arrival], Received]


class Archive(Protocol):
    """An archive client (DIMSE or DICOMweb)."""

    #: how messages name the archive: AET@HOST:PORT or its URL
    description: str
    #: the AE title its objects are recorded under (routes, [senders] defaults)
    calling_ae: str
    #: True when retrieved objects go to another node (C-MOVE), not through ``sink``
    moves: bool

    def find_studies(self, since: date | None, until: date | None) -> list[ArchivedStudy]: ...

    def find_sr_instances(self, study_uid: str) -> list[ArchivedInstance]: ...

    def retrieve(
        self, study_uid: str, instances: list[ArchivedInstance], sink: Sink
    ) -> RetrieveReport: ...

    def close(self) -> None:
        """Release what the client holds open (an association, HTTP connections)."""


def date_range(since: date | None, until: date | None) -> str:
    """A DA range matching value (PS3.4 C.2.2.2.5.1): ``YYYYMMDD-YYYYMMDD``, open on either
    side; "" (universal matching) with neither."""
    if since is None and until is None:
        return ""
    low = since.strftime("%Y%m%d") if since else ""
    high = until.strftime("%Y%m%d") if until else ""
    return f"{low}-{high}"
