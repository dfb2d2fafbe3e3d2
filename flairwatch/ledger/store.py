"""The ledger: one SQLite file on local disk that records every file, series revision and job.

All SQL of flairwatch goes through :class:`Ledger`, which combines the connection
(:mod:`~flairwatch.ledger.core`: open, migrate, transactions, backup) with the tables' reads and
writes, one module per group of tables: :mod:`~flairwatch.ledger.files` (inbox files),
:mod:`~flairwatch.ledger.jobs` (series revisions, job states, claims, results),
:mod:`~flairwatch.ledger.repair` (orphans, retries, crash leftovers) and
:mod:`~flairwatch.ledger.activity` (status reports, heartbeat, QC records) and
:mod:`~flairwatch.ledger.outbox` (results to send to DICOM nodes). The names callers
need are re-exported here, so ``from flairwatch.ledger.store import Ledger, JobState`` is the
one import a caller needs.
"""

from __future__ import annotations

from flairwatch.ledger.activity import ActivityTables
from flairwatch.ledger.core import BUSY_TIMEOUT_MS, LEDGER_FILE, LedgerCore
from flairwatch.ledger.disk import NETWORK_FS_TYPES, check_local_disk, mount_fstype
from flairwatch.ledger.files import FileRow, FileTables
from flairwatch.ledger.jobs import TERMINAL_STATES, JobRow, JobState, SeriesRow
from flairwatch.ledger.outbox import NodeCounts, OutboxRow, OutboxState, OutboxTables
from flairwatch.ledger.repair import RepairTables

__all__ = [
    "BUSY_TIMEOUT_MS",
    "LEDGER_FILE",
    "NETWORK_FS_TYPES",
    "TERMINAL_STATES",
    "FileRow",
    "JobRow",
    "JobState",
    "Ledger",
    "LedgerCore",
    "NodeCounts",
    "OutboxRow",
    "OutboxState",
    "SeriesRow",
    "check_local_disk",
    "mount_fstype",
]


class Ledger(FileTables, RepairTables, ActivityTables, OutboxTables):
    """An open ledger: every table's reads and writes on one connection.

    Open with :meth:`Ledger.open` (daemon, re-runs: creates or migrates) or
    :meth:`Ledger.open_readonly` (status, reports). Use from one process and one thread.
    """
