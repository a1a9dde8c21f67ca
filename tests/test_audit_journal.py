"""The journal's audit tables: written with the grading, updated when deliveries settle, kept
when retention purges a study (patient identity purged with it), read back by period."""

from __future__ import annotations

import pytest

from service.audit.counterfactual import MissingEffect
from service.audit.facts import BorderlineCut, Device, StudyFacts
from service.model import Comparison, Guideline, Measure, Outcome, Pathway
from service.store.audit_records import failure_kind
from service.store.journal import Journal, NewResult
from service.store.sqlite_journal import SqliteJournal

STUDY = "1.2.826.0.1.3680043.10.999.17"


def _receive(j: Journal, sop: str, *, study: str = STUDY, now: float) -> None:
    j.store_object(
        sop_instance_uid=sop,
        study_uid=study,
        sop_class_uid="1.2.840.10008.5.1.4.1.1.88.33",
        transfer_syntax="1.2.840.10008.1.2.1",
        calling_ae="HV_ECHO_2",
        data=b"DICM (stand-in bytes)",
        settle_seconds=5.0,
        now=now,
    )


def _result(uid: str) -> NewResult:
    return NewResult(
        result_uid=uid,
        series_uid="2.25.77",
        sop_class_uid="1.2.840.10008.5.1.4.1.1.88.33",
        status="graded",
        guideline="ase-eacvi-2016",
        grade="indeterminate",
        filling_pressure="indeterminate",
        sources=("2.25.1",),
        predecessors=(),
        data=b"DICM (stand-in result bytes)",
    )


FACTS = StudyFacts(
    status="graded",
    outcome=Outcome.indeterminate,
    pathway=Pathway.normal_lvef,
    guideline=Guideline.ase_eacvi_2016,
    measures=(Measure.mitral_e, Measure.mitral_a, Measure.lvef),
    borderline=(
        BorderlineCut(
            measure=Measure.lavi,
            comparison=Comparison.gt,
            threshold=34.0,
            label="LAVI > 34 mL/m²",
        ),
    ),
    compared=(Guideline.ase_eacvi_2016, Guideline.ase_2025),
    disagreement=True,
    other_outcomes={Guideline.ase_2025: Outcome.grade_1},
    missing=(MissingEffect(measure=Measure.tr_peak_velocity, always=False, sometimes=True),),
    device=Device(
        calling_ae="HV_ECHO_2", station_name="HV-ECHO-2", manufacturer="HV", model="HV-Echo 5"
    ),
    patient_name="Testperson^Ada",
    patient_id="HV-0001",
)


def _grade(j: Journal, *, now: float, facts=FACTS, result="2.25.900"):
    (claim,) = j.claim_due(now=now, limit=1)
    j.finish_grading(
        claim,
        result=_result(result),
        destinations=[("PACS", "PACS@127.0.0.1:104")],
        audit=facts,
        now=now + 0.5,
    )


def test_grading_records_the_facts_and_delivery_their_time(journal):
    _receive(journal, "2.25.1", now=1000.0)
    _grade(journal, now=1005.0)
    (row,) = journal.audit_rows()
    assert (row.study_uid, row.status, row.outcome, row.pathway, row.guideline) == (
        STUDY,
        "graded",
        "indeterminate",
        "normal-lvef",
        "ase-eacvi-2016",
    )
    assert row.measures == ("mitral_e", "mitral_a", "lvef")
    assert row.borderline[0]["label"] == "LAVI > 34 mL/m²"
    assert row.missing == ({"measure": "tr_peak_velocity", "always": False, "sometimes": True},)
    assert (row.compared, row.disagreement) == (2, True)
    assert row.other_outcomes == (("ase-2025", "grade-1"),)
    assert (row.device, row.station_name, row.model) == ("HV_ECHO_2", "HV-ECHO-2", "HV-Echo 5")
    assert (row.last_received_at, row.graded_at, row.delivered_at) == (1000.0, 1005.5, None)
    assert (row.patient_name, row.patient_id) == ("", "")  # identity only on request
    (d,) = journal.deliveries(states=["pending"])
    journal.mark_delivered(d["id"], now=1007.0)
    (row,) = journal.audit_rows()
    assert row.delivered_at == 1007.0
    (named,) = journal.audit_rows(identities=True)
    assert (named.patient_name, named.patient_id) == ("Testperson^Ada", "HV-0001")


def test_a_failed_delivery_is_the_study_s_failure_until_it_is_delivered(journal):
    _receive(journal, "2.25.1", now=1000.0)
    _grade(journal, now=1005.0)
    (d,) = journal.deliveries(states=["pending"])
    journal.mark_attempt_failed(
        d["id"],
        "cannot connect to PACS@127.0.0.1:104: [Errno 111] Connection refused",
        max_attempts=1,
        backoff_initial=1,
        backoff_max=1,
        now=1010.0,
    )
    (row,) = journal.audit_rows()
    assert row.failure.startswith("delivery of result SR 2.25.900 to PACS: gave up after 1")
    assert failure_kind(row.failure) == (
        "delivery of the result SR to PACS: cannot connect to PACS@127.0.0.1"
    )
    assert row.delivered_at is None
    journal.requeue_failed(now=1100.0)
    (d,) = journal.deliveries(states=["pending"])
    journal.mark_delivered(d["id"], now=1101.0)
    (row,) = journal.audit_rows()
    assert (row.failure, row.delivered_at) == ("", 1101.0)


def test_a_study_graded_again_has_one_row_with_the_new_facts(journal):
    _receive(journal, "2.25.1", now=1000.0)
    _grade(journal, now=1005.0)
    _receive(journal, "2.25.2", now=2000.0)
    later = FACTS.model_copy(update={"outcome": Outcome.grade_2, "patient_name": ""})
    later = later.model_copy(update={"patient_id": ""})
    _grade(journal, now=2005.0, facts=later, result="2.25.901")
    (row,) = journal.audit_rows(identities=True)
    assert (row.outcome, row.last_received_at, row.graded_at) == ("grade-2", 2000.0, 2005.5)
    assert (row.patient_name, row.patient_id) == ("", "")  # no longer recorded: removed


def test_a_grading_failure_without_facts_is_recorded_with_its_reason(journal):
    _receive(journal, "2.25.1", now=1000.0)
    (claim,) = journal.claim_due(now=1005.0)
    journal.finish_grading(claim, result=None, failure="internal error while grading: boom")
    (row,) = journal.audit_rows()
    assert (row.status, row.outcome, row.device) == ("error", None, "HV_ECHO_2")
    assert failure_kind(row.failure) == "internal error while grading"


def test_rows_are_read_by_the_time_they_were_graded(journal):
    for n, t in enumerate((1000.0, 2000.0, 3000.0)):
        study = f"{STUDY}.{n}"
        _receive(journal, f"2.25.{n}", study=study, now=t)
        _grade(journal, now=t + 10, result=f"2.25.90{n}")
    graded = [r.graded_at for r in journal.audit_rows()]
    assert graded == [1010.5, 2010.5, 3010.5]
    assert [r.graded_at for r in journal.audit_rows(2010.5, 3010.5)] == [2010.5]  # [since, until)
    assert [r.graded_at for r in journal.audit_rows(since=2000)] == [2010.5, 3010.5]


def test_retention_keeps_the_facts_and_forgets_the_patient(journal):
    _receive(journal, "2.25.1", now=1000.0)
    _grade(journal, now=1005.0)
    (d,) = journal.deliveries(states=["pending"])
    journal.mark_delivered(d["id"], now=1007.0)
    purged = journal.purge_finished(older_than=5000.0)
    assert purged.studies == (STUDY,)
    assert journal.study(STUDY) is None
    (row,) = journal.audit_rows(identities=True)
    assert row.outcome == "indeterminate"
    assert (row.patient_name, row.patient_id) == ("", "")


@pytest.mark.parametrize(
    ("reason", "kind"),
    [
        (
            "delivery to PACS: gave up after 10 attempts: association rejected by "
            "PACS@10.0.0.5:104: rejected permanently",
            "delivery to PACS: association rejected by PACS@10.0.0.5",
        ),
        (
            "delivery of summary PDF 2.25.77 to ARCHIVE: gave up after 2 attempts: C-STORE "
            "status 0xA700 from ARCHIVE@10.0.0.6:104 (out of resources)",
            "delivery of the summary PDF to ARCHIVE: C-STORE status 0xA700 from ARCHIVE@10.0.0.6",
        ),
        (
            "delivery to PACS: gave up after 3 attempts: C-STORE status 0xA700 from "
            "PACS@10.0.0.5:104 (out of resources)",
            "delivery to PACS: C-STORE status 0xA700 from PACS@10.0.0.5",
        ),
        (
            "rejected: no echo measurement recognised (2 excluded, e.g. x)",
            "rejected: no echo measurement recognised",
        ),
        (
            "no usable source: set aside: not an SR: its SOP class is 1.2.3",
            "no usable source: set aside: not an SR",
        ),
    ],
)
def test_failure_kinds(reason, kind):
    assert failure_kind(reason) == kind


def test_rows_are_read_page_by_page_in_order(journal):
    """Keyset pages (time graded, then study UID) give every row once, ties included."""
    times = [1000.0, 1000.0, 1000.0, 2000.0, 2000.0, 3000.0, 4000.0]
    for n, t in enumerate(times):
        study = f"{STUDY}.{n}"
        _receive(journal, f"2.25.{n}", study=study, now=t)
        (claim,) = journal.claim_due(now=t + 10)
        journal.finish_grading(claim, result=None, failure="internal error", now=t)
    whole = [(r.graded_at, r.study_uid) for r in journal.audit_rows()]
    assert whole == sorted(whole) and len(whole) == 7
    for page in (1, 2, 3, 7, 8):
        paged = [(r.graded_at, r.study_uid) for r in journal.iter_audit_rows(page=page)]
        assert paged == whole
    assert len(list(journal.iter_audit_rows(1000.0, 2000.0, page=2))) == 3


def test_a_journal_of_the_previous_schema_gets_the_audit_tables(tmp_path):
    import sqlite3

    from service.store import sqlite_schema
    from service.store.sql_journal import migrate

    path = tmp_path / "journal.sqlite3"
    db = sqlite3.connect(path, isolation_level=None)
    db.execute(sqlite_schema.META)
    db.execute("BEGIN")
    migrate(db, sqlite_schema.MIGRATIONS[:4])  # the journal as version 4 wrote it
    db.execute("COMMIT")
    db.close()
    j = SqliteJournal(path)
    try:
        version = j._query("SELECT value FROM meta WHERE key = 'schema_version'")[0][0]
        assert int(version) == sqlite_schema.SCHEMA_VERSION >= 5
        assert j.audit_rows() == []
    finally:
        j.close()
