"""The journal's audit tables: one row of facts per study, written in the same transaction that
records the study's grading, updated when its deliveries settle, read by ``audit`` and the
status page.

* ``audit_studies``: what the audit needs about each study at grading time (outcome, pathway,
  guideline, measures present, borderline cut-offs, guideline comparison, which missing measure
  would or could have decided it, sending device) and its times (last object received, graded,
  result delivered) and current failure, if any.  No patient identity.  Kept when retention
  purges a finished study's files and journal rows: the audit covers a longer period than the
  spool keeps.
* ``audit_identities``: patient name and ID of a study, only written when the configuration
  allows (``audit.include_patient_identifiers``), and purged with the study.

Separate from the node's work tables on purpose: the statements here are plain SQL that SQLite
and PostgreSQL both run (upserts with ``ON CONFLICT``, ``?`` parameters which the PostgreSQL
backend turns into its own); the tables are created by each backend's schema module
(``sqlite_schema.py``, version 5).
"""

from __future__ import annotations

import functools
import json
import re
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from typing import Any

_COLUMNS = (
    "study_uid",
    "graded_at",
    "last_received_at",
    "delivered_at",
    "status",
    "outcome",
    "pathway",
    "guideline",
    "device",
    "calling_ae",
    "station_name",
    "manufacturer",
    "model",
    "measures",
    "borderline",
    "missing",
    "compared",
    "disagreement",
    "other_outcomes",
    "failure",
    "facts_version",
)

#: insert or replace a study's row (an upsert both SQLite and PostgreSQL run)
#: rows read from the journal at a time
AUDIT_PAGE = 5000

INSERT_AUDIT = (
    f"INSERT INTO audit_studies ({', '.join(_COLUMNS)}) "
    f"VALUES ({', '.join('?' * len(_COLUMNS))}) ON CONFLICT (study_uid) DO UPDATE SET "
    + ", ".join(f"{c} = excluded.{c}" for c in _COLUMNS[1:])
)


@dataclass(frozen=True)
class AuditRow:
    """One study's audit record as read back (lists decoded)."""

    study_uid: str
    graded_at: float
    last_received_at: float | None
    delivered_at: float | None
    status: str
    outcome: str | None
    pathway: str | None
    guideline: str | None
    device: str
    calling_ae: str
    station_name: str
    manufacturer: str
    model: str
    measures: tuple[str, ...]
    borderline: tuple[dict[str, Any], ...]
    missing: tuple[dict[str, Any], ...]
    compared: int
    disagreement: bool | None
    failure: str
    #: {guideline: outcome} of the guidelines that disagreed with the primary
    other_outcomes: tuple[tuple[str, str], ...] = ()
    patient_name: str = ""
    patient_id: str = ""


def audit_values(
    study_uid: str,
    facts: Any,
    *,
    calling_ae: str,
    failure: str,
    graded_at: float,
    last_received_at: float | None,
) -> tuple[Any, ...]:
    """The row of ``audit_studies`` for a study just graded.  ``facts``: its StudyFacts, or
    None when the grading failed before any could be built (then the row records the failure
    and the calling AE)."""
    if facts is None:
        status = "rejected" if failure.startswith(("no usable source", "rejected")) else "error"
        return (
            study_uid,
            graded_at,
            last_received_at,
            None,
            status,
            None,
            None,
            None,
            calling_ae.strip() or "unknown device",
            calling_ae.strip(),
            "",
            "",
            "",
            "[]",
            "[]",
            "[]",
            0,
            None,
            "{}",
            failure,
            1,
        )
    d = facts.device
    data = facts.model_dump(mode="json")
    return (
        study_uid,
        graded_at,
        last_received_at,
        None,
        facts.status,
        None if facts.outcome is None else facts.outcome.value,
        None if facts.pathway is None else facts.pathway.value,
        None if facts.guideline is None else facts.guideline.value,
        d.key,
        d.calling_ae,
        d.station_name,
        d.manufacturer,
        d.model,
        json.dumps(data["measures"]),
        json.dumps(data["borderline"], ensure_ascii=False),
        json.dumps(data["missing"]),
        len(facts.compared),
        None if facts.disagreement is None else int(facts.disagreement),
        json.dumps(data["other_outcomes"], sort_keys=True),
        failure,
        facts.version,
    )


@functools.lru_cache(maxsize=8192)
def _decoded(text: str) -> tuple[Any, ...]:
    """A JSON list column as a tuple; the same few lists recur in thousands of rows (the
    measures a device sends, the cut-offs met), so each distinct text is decoded once.  The
    decoded values are shared between rows: read them, never change them."""
    return tuple(json.loads(text))


@functools.lru_cache(maxsize=1024)
def _pairs(text: str) -> tuple[tuple[str, str], ...]:
    """A JSON object column as sorted (key, value) pairs, decoded once per distinct text."""
    return tuple(sorted(json.loads(text).items()))


def _row(r: Any, identities: bool = False) -> AuditRow:
    name = (r["patient_name"] or "") if identities else ""
    pid = (r["patient_id"] or "") if identities else ""
    return AuditRow(
        study_uid=r["study_uid"],
        graded_at=r["graded_at"],
        last_received_at=r["last_received_at"],
        delivered_at=r["delivered_at"],
        status=r["status"],
        outcome=r["outcome"],
        pathway=r["pathway"],
        guideline=r["guideline"],
        device=r["device"],
        calling_ae=r["calling_ae"],
        station_name=r["station_name"],
        manufacturer=r["manufacturer"],
        model=r["model"],
        measures=_decoded(r["measures"]),
        borderline=_decoded(r["borderline"]),
        missing=_decoded(r["missing"]),
        compared=int(r["compared"]),
        disagreement=None if r["disagreement"] is None else bool(r["disagreement"]),
        failure=r["failure"],
        other_outcomes=_pairs(r["other_outcomes"]),
        patient_name=name,
        patient_id=pid,
    )


#: the study's own failure reason, without the details that differ between studies
_ATTEMPTS = re.compile(r"gave up after \d+ attempts?: ")
#: "delivery of result SR 2.25.9 to PACS" (the study's reason names the object's UID)
_DELIVERY_OF = re.compile(r"^delivery of (?P<kind>.+?) [0-9.]+ to ")


def failure_kind(reason: str) -> str:
    """A failure reason shortened to what studies failing the same way share: the object's
    UID, the attempt count, the port, exception texts and parenthesised details go, e.g.
    "delivery of result SR 2.25.9 to PACS: gave up after 10 attempts: cannot connect to
    PACS@10.0.0.5:104: [Errno 111] Connection refused" -> "delivery of the result SR to PACS:
    cannot connect to PACS@10.0.0.5";
    "internal error while grading: boom" -> "internal error while grading"."""
    text = _ATTEMPTS.sub("", reason.strip())
    parts = []
    for clause in text.split("; "):
        clause = _DELIVERY_OF.sub(r"delivery of the \g<kind> to ", clause)
        head, sep, rest = clause.partition(": ")
        if head.startswith(("delivery to ", "delivery of the ")) and sep:
            detail = rest.split(" (", 1)[0].split(": ", 1)[0]
            parts.append(f"{head}: {detail.rsplit(':', 1)[0] if '@' in detail else detail}")
        elif head.startswith("internal error"):
            parts.append(head)
        else:
            parts.append(": ".join(clause.split(" (", 1)[0].split(": ")[:3]))
    out = "; ".join(dict.fromkeys(p.strip() for p in parts if p.strip()))
    return out[:160] or "unknown"


class AuditRecords:
    """Audit methods of the journal (mixed into :class:`service.store.journal.Journal`)."""

    def _query(self, sql: str, params: Sequence[Any] = ()) -> list[Any]:  # pragma: no cover
        raise NotImplementedError

    # -- writing (inside the journal's own transactions) --------------------------------------

    @staticmethod
    def _audit_graded(
        db: Any,
        study_uid: str,
        facts: Any,
        *,
        calling_ae: str,
        failure: str,
        now: float,
        last_received_at: float | None,
    ) -> None:
        """Record (or replace, on a re-grade) a study's audit row; patient identity only when
        the facts carry it.  ``last_received_at``: the study's (its caller has the row locked)."""
        db.execute(
            INSERT_AUDIT,
            audit_values(
                study_uid,
                facts,
                calling_ae=calling_ae,
                failure=failure,
                graded_at=now,
                last_received_at=last_received_at,
            ),
        )
        if facts is not None and (facts.patient_name or facts.patient_id):
            db.execute(
                "INSERT INTO audit_identities VALUES (?, ?, ?) ON CONFLICT (study_uid) DO UPDATE "
                "SET patient_name = excluded.patient_name, patient_id = excluded.patient_id",
                (study_uid, facts.patient_name, facts.patient_id),
            )
        else:
            db.execute("DELETE FROM audit_identities WHERE study_uid = ?", (study_uid,))

    @staticmethod
    def _audit_settled(db: Any, study_uid: str, state: str, reason: str, now: float) -> None:
        """A study's deliveries settled: the time its result was delivered, or why it failed."""
        db.execute(
            "UPDATE audit_studies SET "
            "delivered_at = CASE WHEN ? = 'delivered' THEN COALESCE(delivered_at, ?) END, "
            "failure = CASE WHEN ? = 'failed' THEN ? ELSE '' END WHERE study_uid = ?",
            (state, now, state, reason, study_uid),
        )

    @staticmethod
    def _audit_forget(db: Any, study_uids: Iterable[str]) -> None:
        """Patient identity of purged studies goes with them (their facts stay)."""
        for uid in study_uids:
            db.execute("DELETE FROM audit_identities WHERE study_uid = ?", (uid,))

    # -- reading --------------------------------------------------------------------------------

    def audit_rows(
        self,
        since: float | None = None,
        until: float | None = None,
        *,
        identities: bool = False,
    ) -> list[AuditRow]:
        """Audit rows of the studies graded in [since, until) (epoch seconds), oldest first;
        patient identity only with ``identities`` (and only where it was recorded)."""
        return list(self.iter_audit_rows(since, until, identities=identities))

    def iter_audit_rows(
        self,
        since: float | None = None,
        until: float | None = None,
        *,
        identities: bool = False,
        page: int = AUDIT_PAGE,
    ) -> Iterator[AuditRow]:
        """:meth:`audit_rows` one page at a time (keyset pagination on the time graded and the
        study UID): memory stays bounded however long the period, and no read holds the
        journal for long."""
        columns = "a.*"
        source = "audit_studies a"
        if identities:
            columns += ", i.patient_name, i.patient_id"
            source += " LEFT JOIN audit_identities i ON i.study_uid = a.study_uid"
        where = ["1=1"]
        params: list[Any] = []
        if since is not None:
            where.append("a.graded_at >= ?")
            params.append(since)
        if until is not None:
            where.append("a.graded_at < ?")
            params.append(until)
        after: tuple[float, str] | None = None
        while True:
            keyset = [] if after is None else ["(a.graded_at, a.study_uid) > (?, ?)"]
            sql = (
                f"SELECT {columns} FROM {source} WHERE {' AND '.join(where + keyset)} "
                "ORDER BY a.graded_at, a.study_uid LIMIT ?"
            )
            extra = [] if after is None else list(after)
            rows = self._query(sql, [*params, *extra, page])
            for r in rows:
                yield _row(r, identities)
            if len(rows) < page:
                return
            after = (rows[-1]["graded_at"], rows[-1]["study_uid"])
