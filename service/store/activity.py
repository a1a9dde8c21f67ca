"""Read-only journal queries behind the node's status page: recent activity and recent failures.
Separate from the node's work methods (plain SQL over the existing tables and the audit table;
PostgreSQL runs it as it is, with its own placeholders)."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any


class ActivityQueries:
    """Status-page reads of the journal (mixed into :class:`service.store.journal.Journal`)."""

    def _query(self, sql: str, params: Sequence[Any] = ()) -> list[Any]:  # pragma: no cover
        raise NotImplementedError

    def activity_since(self, since: float) -> dict[str, Any]:
        """What happened since ``since`` (epoch seconds): objects received, studies graded by
        outcome (and not assessed), deliveries done (per destination; the results folder is
        one) and failed."""
        objects = self._query("SELECT COUNT(*) FROM objects WHERE received_at >= ?", (since,))
        graded = self._query(
            "SELECT COALESCE(outcome, ''), COUNT(*) FROM audit_studies WHERE graded_at >= ? "
            "GROUP BY COALESCE(outcome, '')",
            (since,),
        )
        delivered = self._query(
            "SELECT destination, COUNT(*) FROM deliveries WHERE state = 'delivered' "
            "AND delivered_at >= ? GROUP BY destination ORDER BY destination",
            (since,),
        )
        failed = self._query(
            "SELECT COUNT(*) FROM deliveries WHERE state = 'failed' AND updated_at >= ?",
            (since,),
        )
        from service.model import Outcome

        counted = {r[0]: int(r[1]) for r in graded if r[0]}
        outcomes = {o.value: counted[o.value] for o in Outcome if o.value in counted}
        return {
            "objects_received": int(objects[0][0]),
            "studies_graded": sum(outcomes.values()),
            "outcomes": outcomes,
            "not_assessed": sum(int(r[1]) for r in graded if not r[0]),
            "deliveries_done": sum(int(r[1]) for r in delivered),
            "delivered_to": {r[0]: int(r[1]) for r in delivered},
            "deliveries_failed": int(failed[0][0]),
        }

    def recent_failures(self, limit: int = 20) -> list[dict[str, Any]]:
        """Failed deliveries (result SR or summary PDF, per destination), deliveries whose
        last attempt failed and that are being retried (``what`` = "retrying", with the time
        of the next attempt) and studies that could not be graded, newest first."""
        deliveries = self._query(
            """SELECT d.updated_at AS at, r.study_uid, d.result_uid, d.destination, d.target,
                      d.attempts, d.last_error AS reason, d.state, d.next_attempt_at,
                      CASE WHEN EXISTS (SELECT 1 FROM companions c
                                        WHERE c.companion_uid = d.result_uid)
                           THEN 'summary PDF' ELSE 'result SR' END AS kind
               FROM deliveries d JOIN results r ON r.result_uid = d.result_uid
               WHERE d.state = 'failed'
                  OR (d.state = 'pending' AND d.attempts > 0 AND d.last_error <> '')
               ORDER BY d.updated_at DESC LIMIT ?""",
            (limit,),
        )
        studies = self._query(
            """SELECT updated_at AS at, study_uid, reason FROM studies
               WHERE state = 'failed' AND result_uid IS NULL
               ORDER BY updated_at DESC LIMIT ?""",
            (limit,),
        )
        out = [
            {
                "at": r["at"],
                "what": "delivery" if r["state"] == "failed" else "retrying",
                "next_at": r["next_attempt_at"] if r["state"] != "failed" else None,
                "kind": r["kind"],
                "study_uid": r["study_uid"],
                "uid": r["result_uid"],
                "destination": r["destination"],
                "target": r["target"],
                "attempts": int(r["attempts"]),
                "reason": r["reason"],
            }
            for r in deliveries
        ]
        out += [
            {
                "at": r["at"],
                "what": "grading",
                "next_at": None,
                "kind": "study",
                "study_uid": r["study_uid"],
                "uid": r["study_uid"],
                "destination": "",
                "target": "",
                "attempts": 0,
                "reason": r["reason"],
            }
            for r in studies
        ]
        out.sort(key=lambda x: x["at"], reverse=True)
        return out[:limit]

    def patient_identities(self, study_uids: Sequence[str]) -> dict[str, tuple[str, str]]:
        """Patient name and ID of these studies, where the audit recorded them (only when the
        configuration allowed it)."""
        out: dict[str, tuple[str, str]] = {}
        for uid in dict.fromkeys(study_uids):
            rows = self._query(
                "SELECT patient_name, patient_id FROM audit_identities WHERE study_uid = ?", (uid,)
            )
            if rows:
                out[uid] = (rows[0][0], rows[0][1])
        return out
