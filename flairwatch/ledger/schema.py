"""The ledger's tables (SQLite DDL), kept apart from the code that reads and writes them.

- ``series``: one row per revision of a (Study, Series Instance UID); keys used in result paths,
  the selection outcome and rule, the settle state (signature, stable_since), first/last seen.
- ``files``: every file found in the inbox (path, size, mtime in ns, SOP Instance UID, the
  revision that first took it, the reason when unusable, whether it is gone).
- ``jobs``: one per (series revision, model run): state, attempts, priority (higher first;
  archive re-runs are negative), model name/version, retry time, timings, error, result path,
  and while running, the owner's run token and lock file (:mod:`flairwatch.ledger.owners`).
- ``results``: one per finished result folder and model version, with a ``current`` flag.
- ``qc_marks`` and ``corrected_masks``: review outcomes attached to a result.
- ``heartbeat``: one row the daemon rewrites every few seconds.
- ``outbox``: one row per (result, DICOM node, object) to send: state, attempts, next try, the
  last error; the sender works through it, and a daemon restart loses nothing.
- ``canary_runs``: one row per self-check run of the fixed phantom series: the model and its
  file hash, the measured Dice and volume, the expected volume and the outcome.

Times are seconds since the epoch (REAL). A change to the tables bumps ``SCHEMA_VERSION`` and
adds the statements that bring a ledger of the previous version up to it to ``MIGRATIONS``;
:class:`flairwatch.ledger.core.LedgerCore` runs them in one transaction when it opens an
older ledger. ``SCHEMA`` always creates the newest version directly.
"""

from __future__ import annotations

SCHEMA_VERSION = 4

# version -> statements that turn a ledger of version - 1 into this version (run in order)
OUTBOX_TABLE = """CREATE TABLE outbox (
    id INTEGER PRIMARY KEY,
    result_id INTEGER NOT NULL REFERENCES results(id),
    node TEXT NOT NULL,
    object TEXT NOT NULL,
    path TEXT NOT NULL,
    sop_uid TEXT,
    state TEXT NOT NULL DEFAULT 'waiting' CHECK (state IN ('waiting','sent','given_up')),
    attempts INTEGER NOT NULL DEFAULT 0,
    not_before REAL NOT NULL DEFAULT 0,
    last_error TEXT,
    created REAL NOT NULL,
    sent REAL,
    UNIQUE (result_id, node, object)
)"""

CANARY_TABLE = """CREATE TABLE canary_runs (
    id INTEGER PRIMARY KEY,
    started REAL NOT NULL,
    seconds REAL,
    reason TEXT,
    model_name TEXT,
    model_version TEXT,
    model_sha256 TEXT,
    dice REAL,
    volume_ml REAL,
    expected_volume_ml REAL,
    outcome TEXT NOT NULL CHECK (outcome IN ('passed','drifted','baseline','failed')),
    detail TEXT
)"""

MIGRATIONS: dict[int, tuple[str, ...]] = {
    # 0.2.0: the job state for unusable input is 'refused' ('rejected' stays a QC decision only)
    2: ("UPDATE jobs SET state = 'refused' WHERE state = 'rejected'",),
    # 0.2.0: a running job names its owner's run token and lock file (ledger/owners.py)
    3: ("ALTER TABLE jobs ADD COLUMN owner TEXT", "ALTER TABLE jobs ADD COLUMN owner_lock TEXT"),
    # 0.2.0: results sent to DICOM nodes, and the nightly self-check's runs
    4: (
        OUTBOX_TABLE,
        "CREATE INDEX outbox_state ON outbox (state, not_before)",
        CANARY_TABLE,
    ),
}

SCHEMA = (
    """
CREATE TABLE series (
    id INTEGER PRIMARY KEY,
    study_uid TEXT NOT NULL,
    series_uid TEXT NOT NULL,
    revision INTEGER NOT NULL,
    subject_key TEXT,
    study_key TEXT,
    series_key TEXT,
    selection TEXT NOT NULL DEFAULT 'pending' CHECK (selection IN ('pending','selected','skipped')),
    select_rule TEXT,
    select_reason TEXT,
    signature TEXT,
    n_files INTEGER NOT NULL DEFAULT 0,
    stable_since REAL,
    first_seen REAL NOT NULL,
    last_seen REAL NOT NULL,
    UNIQUE (study_uid, series_uid, revision)
);
CREATE TABLE files (
    id INTEGER PRIMARY KEY,
    path TEXT NOT NULL UNIQUE,
    size INTEGER NOT NULL,
    mtime_ns INTEGER NOT NULL,
    sop_uid TEXT,
    study_uid TEXT,
    series_uid TEXT,
    series_id INTEGER REFERENCES series(id),
    reason TEXT,
    gone INTEGER NOT NULL DEFAULT 0,
    first_seen REAL NOT NULL,
    last_seen REAL NOT NULL
);
CREATE INDEX files_identity ON files (study_uid, series_uid);
CREATE TABLE jobs (
    id INTEGER PRIMARY KEY,
    series_id INTEGER NOT NULL REFERENCES series(id),
    state TEXT NOT NULL,
    attempts INTEGER NOT NULL DEFAULT 0,
    priority INTEGER NOT NULL DEFAULT 0,
    model_name TEXT,
    model_version TEXT,
    not_before REAL NOT NULL DEFAULT 0,
    created REAL NOT NULL,
    queued REAL,
    started REAL,
    finished REAL,
    seconds REAL,
    error TEXT,
    result_path TEXT,
    worker_pid INTEGER,
    worker_rss_kb INTEGER,
    owner TEXT,
    owner_lock TEXT
);
CREATE INDEX jobs_state ON jobs (state, priority, id);
CREATE INDEX jobs_series ON jobs (series_id);
CREATE TABLE results (
    id INTEGER PRIMARY KEY,
    series_id INTEGER NOT NULL REFERENCES series(id),
    job_id INTEGER REFERENCES jobs(id),
    model_name TEXT NOT NULL,
    model_version TEXT NOT NULL,
    result_path TEXT NOT NULL,
    lesion_volume_ml REAL,
    lesion_count INTEGER,
    adopted INTEGER NOT NULL DEFAULT 0,
    current INTEGER NOT NULL DEFAULT 0,
    created REAL NOT NULL
);
CREATE INDEX results_series ON results (series_id);
CREATE TABLE qc_marks (
    id INTEGER PRIMARY KEY,
    result_id INTEGER NOT NULL REFERENCES results(id),
    mark TEXT NOT NULL CHECK (mark IN ('accepted','rejected')),
    note TEXT,
    marked_by TEXT,
    marked REAL NOT NULL
);
CREATE TABLE corrected_masks (
    id INTEGER PRIMARY KEY,
    result_id INTEGER NOT NULL REFERENCES results(id),
    path TEXT NOT NULL,
    note TEXT,
    added REAL NOT NULL
);
CREATE TABLE heartbeat (
    id INTEGER PRIMARY KEY CHECK (id = 1),
    pid INTEGER NOT NULL,
    host TEXT,
    started REAL NOT NULL,
    beat REAL NOT NULL,
    state TEXT NOT NULL,
    inbox TEXT
);
"""
    + OUTBOX_TABLE
    + ";\nCREATE INDEX outbox_state ON outbox (state, not_before);\n"
    + CANARY_TABLE
    + ";\n"
)
