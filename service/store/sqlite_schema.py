"""The SQLite journal's schema, one list of statements per version.

The node creates the schema and moves an older journal forward: each version's statements run
once, in one transaction with the new version number in ``meta``.  A change appends a version
(never edits one that has shipped); the PostgreSQL schema gets the same version with its own
types.
"""

from __future__ import annotations

from service.store.backfill_journal import SQLITE_DDL as BACKFILL_DDL

#: statements of each schema version, oldest first (version n is ``MIGRATIONS[n - 1]``)
MIGRATIONS: list[list[str]] = [
    # 1: objects, studies, results, deliveries, companions
    [
        """CREATE TABLE IF NOT EXISTS objects (
            sop_instance_uid TEXT PRIMARY KEY,
            study_uid TEXT NOT NULL,
            sop_class_uid TEXT NOT NULL,
            transfer_syntax TEXT NOT NULL,
            calling_ae TEXT NOT NULL,
            path TEXT NOT NULL,
            state TEXT NOT NULL,
            received_at REAL NOT NULL,
            times_received INTEGER NOT NULL DEFAULT 1,
            note TEXT NOT NULL DEFAULT ''  -- why the grading set it aside, if it did
        )""",
        "CREATE INDEX IF NOT EXISTS objects_study ON objects (study_uid)",
        """CREATE TABLE IF NOT EXISTS studies (
            study_uid TEXT PRIMARY KEY,
            calling_ae TEXT NOT NULL,
            state TEXT NOT NULL,
            reason TEXT NOT NULL DEFAULT '',
            first_received_at REAL NOT NULL,
            last_received_at REAL NOT NULL,
            due_at REAL NOT NULL,
            generation INTEGER NOT NULL DEFAULT 1,
            result_uid TEXT,
            updated_at REAL NOT NULL
        )""",
        "CREATE INDEX IF NOT EXISTS studies_state ON studies (state, due_at)",
        """CREATE TABLE IF NOT EXISTS results (
            result_uid TEXT PRIMARY KEY,
            study_uid TEXT NOT NULL,
            series_uid TEXT NOT NULL,
            sop_class_uid TEXT NOT NULL,
            path TEXT NOT NULL,
            status TEXT NOT NULL,
            guideline TEXT,
            grade TEXT,
            filling_pressure TEXT,
            sources TEXT NOT NULL,
            predecessors TEXT NOT NULL,
            created_at REAL NOT NULL
        )""",
        "CREATE INDEX IF NOT EXISTS results_study ON results (study_uid, created_at)",
        """CREATE TABLE IF NOT EXISTS deliveries (
            id INTEGER PRIMARY KEY AUTOINCREMENT,
            result_uid TEXT NOT NULL,
            destination TEXT NOT NULL,
            target TEXT NOT NULL,
            state TEXT NOT NULL,
            attempts INTEGER NOT NULL DEFAULT 0,
            next_attempt_at REAL NOT NULL,
            last_error TEXT NOT NULL DEFAULT '',
            created_at REAL NOT NULL,
            updated_at REAL NOT NULL,
            delivered_at REAL,
            UNIQUE (result_uid, destination)
        )""",
        "CREATE INDEX IF NOT EXISTS deliveries_due ON deliveries (state, next_attempt_at)",
        # objects that go with a result SR (the one-page summary PDF): delivered like it, and
        # part of its study's delivery state
        """CREATE TABLE IF NOT EXISTS companions (
            result_uid TEXT NOT NULL,
            companion_uid TEXT NOT NULL,
            PRIMARY KEY (result_uid, companion_uid)
        )""",
        "CREATE INDEX IF NOT EXISTS companions_companion ON companions (companion_uid)",
    ],
    # 2: objects acknowledged and kept but never graded (the node's own results coming back)
    [
        """CREATE TABLE IF NOT EXISTS ignored_objects (
            sop_instance_uid TEXT PRIMARY KEY,
            study_uid TEXT NOT NULL,
            sop_class_uid TEXT NOT NULL,
            calling_ae TEXT NOT NULL,
            path TEXT NOT NULL,
            reason TEXT NOT NULL,
            received_at REAL NOT NULL,
            times_received INTEGER NOT NULL DEFAULT 1
        )""",
        "CREATE INDEX IF NOT EXISTS ignored_objects_received ON ignored_objects (received_at)",
    ],
    # 3: what each result concluded, as a service.model.Outcome token (kept apart from the
    # results table: NewResult.outcome / Journal.outcome_of)
    [
        """CREATE TABLE IF NOT EXISTS result_outcomes (
            result_uid TEXT PRIMARY KEY,
            outcome TEXT NOT NULL
        )""",
    ],
    # 4: what backfill keeps between runs (service/store/backfill_journal.py)
    BACKFILL_DDL,
    # 5: the audit's facts per study (service/store/audit_records.py), kept when retention
    # purges the study, and the patient identity recorded only when configured
    [
        """CREATE TABLE IF NOT EXISTS audit_studies (
            study_uid TEXT PRIMARY KEY,
            graded_at REAL NOT NULL,
            last_received_at REAL,
            delivered_at REAL,
            status TEXT NOT NULL,            -- graded, not-gradable, rejected, error
            outcome TEXT,                    -- service.model.Outcome token
            pathway TEXT,
            guideline TEXT,
            device TEXT NOT NULL,            -- calling AE, else Station Name, else make + model
            calling_ae TEXT NOT NULL DEFAULT '',
            station_name TEXT NOT NULL DEFAULT '',
            manufacturer TEXT NOT NULL DEFAULT '',
            model TEXT NOT NULL DEFAULT '',
            measures TEXT NOT NULL DEFAULT '[]',    -- JSON: canonical measure names present
            borderline TEXT NOT NULL DEFAULT '[]',  -- JSON: cut-offs a value sat on
            missing TEXT NOT NULL DEFAULT '[]',     -- JSON: missing measures that would decide
            compared INTEGER NOT NULL DEFAULT 0,    -- number of guidelines compared
            disagreement INTEGER,                   -- 1/0, NULL when not compared
            other_outcomes TEXT NOT NULL DEFAULT '{}',  -- JSON: {guideline: outcome} differing
            failure TEXT NOT NULL DEFAULT '',       -- why the study failed, while it does
            facts_version INTEGER NOT NULL DEFAULT 1
        )""",
        "CREATE INDEX IF NOT EXISTS audit_studies_time ON audit_studies (graded_at, study_uid)",
        """CREATE TABLE IF NOT EXISTS audit_identities (
            study_uid TEXT PRIMARY KEY,
            patient_name TEXT NOT NULL,
            patient_id TEXT NOT NULL
        )""",
    ],
    # 6: claims with leases (several processes take work from one journal)
    [
        # who holds a study being graded, until when, and how many claims of this generation
        # ended without a result (a grading process that died)
        "ALTER TABLE studies ADD COLUMN claimed_by TEXT NOT NULL DEFAULT ''",
        "ALTER TABLE studies ADD COLUMN lease_until REAL NOT NULL DEFAULT 0",
        "ALTER TABLE studies ADD COLUMN claims INTEGER NOT NULL DEFAULT 0",
        "CREATE INDEX IF NOT EXISTS studies_lease ON studies (state, lease_until)",
        # who is sending a delivery, until when
        "ALTER TABLE deliveries ADD COLUMN claimed_by TEXT NOT NULL DEFAULT ''",
        "ALTER TABLE deliveries ADD COLUMN lease_until REAL NOT NULL DEFAULT 0",
        "CREATE INDEX IF NOT EXISTS deliveries_destination "
        "ON deliveries (destination, state, next_attempt_at)",
    ],
    # 7: the bytes of received objects and of results in the journal, written in the
    # transaction that records them (one commit, one flush to disk, instead of a spool file,
    # its folders and the journal); rows recorded before keep the path of their spool file
    [
        """CREATE TABLE IF NOT EXISTS object_data (
            sop_instance_uid TEXT PRIMARY KEY,
            data BLOB NOT NULL
        )""",
        """CREATE TABLE IF NOT EXISTS result_data (
            result_uid TEXT PRIMARY KEY,
            data BLOB NOT NULL
        )""",
    ],
]

#: the version this program writes
SCHEMA_VERSION = len(MIGRATIONS)

META = "CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL)"
