"""The PostgreSQL journal's schema, one list of statements per version: the same versions as
the SQLite schema (:mod:`service.store.sqlite_schema`), in PostgreSQL's types, plus the tables
that hold the objects' and results' bytes (SQLite keeps them in spool files).

The node creates the schema and moves an older one forward on start, under an advisory lock
so that nodes starting together do it once.  A change appends a version to both modules.
"""

from __future__ import annotations

#: statements of each schema version, oldest first (version n is ``MIGRATIONS[n - 1]``)
MIGRATIONS: list[list[str]] = [
    # 1: objects, studies, results, deliveries, companions, and the bytes
    [
        """CREATE TABLE IF NOT EXISTS objects (
            sop_instance_uid TEXT PRIMARY KEY,
            study_uid TEXT NOT NULL,
            sop_class_uid TEXT NOT NULL,
            transfer_syntax TEXT NOT NULL,
            calling_ae TEXT NOT NULL,
            path TEXT NOT NULL,
            state TEXT NOT NULL,
            received_at DOUBLE PRECISION NOT NULL,
            times_received INTEGER NOT NULL DEFAULT 1,
            note TEXT NOT NULL DEFAULT ''
        )""",
        "CREATE INDEX IF NOT EXISTS objects_study ON objects (study_uid)",
        """CREATE TABLE IF NOT EXISTS studies (
            study_uid TEXT PRIMARY KEY,
            calling_ae TEXT NOT NULL,
            state TEXT NOT NULL,
            reason TEXT NOT NULL DEFAULT '',
            first_received_at DOUBLE PRECISION NOT NULL,
            last_received_at DOUBLE PRECISION NOT NULL,
            due_at DOUBLE PRECISION NOT NULL,
            generation INTEGER NOT NULL DEFAULT 1,
            result_uid TEXT,
            updated_at DOUBLE PRECISION NOT NULL
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
            created_at DOUBLE PRECISION NOT NULL,
            seq BIGSERIAL
        )""",
        "CREATE INDEX IF NOT EXISTS results_study ON results (study_uid, created_at)",
        """CREATE TABLE IF NOT EXISTS deliveries (
            id BIGSERIAL PRIMARY KEY,
            result_uid TEXT NOT NULL,
            destination TEXT NOT NULL,
            target TEXT NOT NULL,
            state TEXT NOT NULL,
            attempts INTEGER NOT NULL DEFAULT 0,
            next_attempt_at DOUBLE PRECISION NOT NULL,
            last_error TEXT NOT NULL DEFAULT '',
            created_at DOUBLE PRECISION NOT NULL,
            updated_at DOUBLE PRECISION NOT NULL,
            delivered_at DOUBLE PRECISION,
            UNIQUE (result_uid, destination)
        )""",
        "CREATE INDEX IF NOT EXISTS deliveries_due ON deliveries (state, next_attempt_at)",
        """CREATE TABLE IF NOT EXISTS companions (
            result_uid TEXT NOT NULL,
            companion_uid TEXT NOT NULL,
            PRIMARY KEY (result_uid, companion_uid)
        )""",
        "CREATE INDEX IF NOT EXISTS companions_companion ON companions (companion_uid)",
        # the bytes of received objects and of results, written in the transaction that
        # records them
        """CREATE TABLE IF NOT EXISTS object_data (
            sop_instance_uid TEXT PRIMARY KEY,
            data BYTEA NOT NULL
        )""",
        """CREATE TABLE IF NOT EXISTS result_data (
            result_uid TEXT PRIMARY KEY,
            data BYTEA NOT NULL
        )""",
    ],
    # 2: objects acknowledged and kept but never graded (their bytes in object_data)
    [
        """CREATE TABLE IF NOT EXISTS ignored_objects (
            sop_instance_uid TEXT PRIMARY KEY,
            study_uid TEXT NOT NULL,
            sop_class_uid TEXT NOT NULL,
            calling_ae TEXT NOT NULL,
            path TEXT NOT NULL,
            reason TEXT NOT NULL,
            received_at DOUBLE PRECISION NOT NULL,
            times_received INTEGER NOT NULL DEFAULT 1
        )""",
        "CREATE INDEX IF NOT EXISTS ignored_objects_received ON ignored_objects (received_at)",
    ],
    # 3: what each result concluded (a service.model.Outcome token)
    [
        """CREATE TABLE IF NOT EXISTS result_outcomes (
            result_uid TEXT PRIMARY KEY,
            outcome TEXT NOT NULL
        )""",
    ],
    # 4: what backfill keeps between runs (service/store/backfill_journal.py)
    [
        """CREATE TABLE IF NOT EXISTS backfill_runs (
            id BIGSERIAL PRIMARY KEY,
            source TEXT NOT NULL,
            since TEXT NOT NULL DEFAULT '',
            until TEXT NOT NULL DEFAULT '',
            state TEXT NOT NULL,
            started_at DOUBLE PRECISION NOT NULL,
            finished_at DOUBLE PRECISION,
            summary TEXT NOT NULL DEFAULT '{}'
        )""",
        """CREATE TABLE IF NOT EXISTS backfill_studies (
            study_uid TEXT PRIMARY KEY,
            source TEXT NOT NULL,
            state TEXT NOT NULL,
            rules TEXT NOT NULL DEFAULT '',
            sources TEXT NOT NULL DEFAULT '[]',
            generation INTEGER NOT NULL DEFAULT 0,
            outcome TEXT NOT NULL DEFAULT '',
            reason TEXT NOT NULL DEFAULT '',
            attempts INTEGER NOT NULL DEFAULT 0,
            run_id BIGINT,
            updated_at DOUBLE PRECISION NOT NULL
        )""",
        "CREATE INDEX IF NOT EXISTS backfill_studies_state ON backfill_studies (state, rules)",
    ],
    # 5: the audit's facts per study (service/store/audit_records.py)
    [
        """CREATE TABLE IF NOT EXISTS audit_studies (
            study_uid TEXT PRIMARY KEY,
            graded_at DOUBLE PRECISION NOT NULL,
            last_received_at DOUBLE PRECISION,
            delivered_at DOUBLE PRECISION,
            status TEXT NOT NULL,
            outcome TEXT,
            pathway TEXT,
            guideline TEXT,
            device TEXT NOT NULL,
            calling_ae TEXT NOT NULL DEFAULT '',
            station_name TEXT NOT NULL DEFAULT '',
            manufacturer TEXT NOT NULL DEFAULT '',
            model TEXT NOT NULL DEFAULT '',
            measures TEXT NOT NULL DEFAULT '[]',
            borderline TEXT NOT NULL DEFAULT '[]',
            missing TEXT NOT NULL DEFAULT '[]',
            compared INTEGER NOT NULL DEFAULT 0,
            disagreement INTEGER,
            other_outcomes TEXT NOT NULL DEFAULT '{}',
            failure TEXT NOT NULL DEFAULT '',
            facts_version INTEGER NOT NULL DEFAULT 1
        )""",
        "CREATE INDEX IF NOT EXISTS audit_studies_time ON audit_studies (graded_at, study_uid)",
        """CREATE TABLE IF NOT EXISTS audit_identities (
            study_uid TEXT PRIMARY KEY,
            patient_name TEXT NOT NULL,
            patient_id TEXT NOT NULL
        )""",
    ],
    # 6: claims with leases
    [
        "ALTER TABLE studies ADD COLUMN IF NOT EXISTS claimed_by TEXT NOT NULL DEFAULT ''",
        "ALTER TABLE studies ADD COLUMN IF NOT EXISTS lease_until DOUBLE PRECISION NOT NULL "
        "DEFAULT 0",
        "ALTER TABLE studies ADD COLUMN IF NOT EXISTS claims INTEGER NOT NULL DEFAULT 0",
        "CREATE INDEX IF NOT EXISTS studies_lease ON studies (state, lease_until)",
        "ALTER TABLE deliveries ADD COLUMN IF NOT EXISTS claimed_by TEXT NOT NULL DEFAULT ''",
        "ALTER TABLE deliveries ADD COLUMN IF NOT EXISTS lease_until DOUBLE PRECISION NOT NULL "
        "DEFAULT 0",
        "CREATE INDEX IF NOT EXISTS deliveries_destination "
        "ON deliveries (destination, state, next_attempt_at)",
    ],
    # 7: SQLite's journal takes the objects' and results' bytes in, as this one has since
    # version 1; the versions stay in step (nothing changes here)
    [
        "CREATE TABLE IF NOT EXISTS object_data "
        "(sop_instance_uid TEXT PRIMARY KEY, data BYTEA NOT NULL)",
        "CREATE TABLE IF NOT EXISTS result_data (result_uid TEXT PRIMARY KEY, data BYTEA NOT NULL)",
    ],
]

#: the version this program writes
SCHEMA_VERSION = len(MIGRATIONS)

META = "CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL)"

#: the advisory lock (pg_advisory_xact_lock) nodes take to create or move the schema
MIGRATION_LOCK = 0x44535247  # "DSRG"

#: the channel on which a transaction that gives the roles new work notifies them
WORK_CHANNEL = "diastolic_sr_work"
