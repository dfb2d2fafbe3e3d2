"""The ledger's connection: opening, creating and migrating the schema, transactions, backup.

Rules that keep the ledger sound (docs/architecture.md, failure modes):

- local disk only: WAL needs shared memory that network file systems do not provide
  (sqlite.org/wal.html), so a state folder on NFS/SMB is refused;
- ``journal_mode=WAL`` so ``status`` can read while the daemon writes, ``synchronous=FULL`` so a
  job marked done survives a power cut;
- every write is a short ``BEGIN IMMEDIATE`` transaction, retried when SQLite answers
  "database is locked" (a deferred read-then-write transaction can fail at once, busy timeout
  or not);
- a connection is never used in another process than the one that opened it (fork).

Times are seconds since the epoch (float, UTC); the caller passes ``now`` in.
"""

from __future__ import annotations

import contextlib
import logging
import os
import sqlite3
import time
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import Any, Self

from flairwatch.engine.results import fsync_path
from flairwatch.errors import ConfigInvalid, StageFailed
from flairwatch.ledger import schema
from flairwatch.ledger.disk import check_local_disk
from flairwatch.ledger.owners import Owner, RunLock
from flairwatch.ledger.schema import SCHEMA, SCHEMA_VERSION

log = logging.getLogger(__name__)

LEDGER_FILE = "ledger.sqlite3"
BUSY_TIMEOUT_MS = 5000
LOCK_RETRIES = 8


def _locked(exc: sqlite3.OperationalError) -> bool:
    text = str(exc).lower()
    return "locked" in text or "busy" in text


class LedgerCore:
    """An open ledger connection. Use from one process and one thread; close it before forking.

    The tables' reads and writes are added by the classes that :class:`~flairwatch.ledger.store.Ledger`
    combines (files, jobs, activity).
    """

    def __init__(self, path: Path, *, readonly: bool = False) -> None:
        self.path = path
        self._pid = os.getpid()
        self.owner: Owner | None = None  # who this process claims jobs as (see claimant)
        self._run_lock: RunLock | None = None
        # isolation_level=None: we issue BEGIN IMMEDIATE ourselves
        self._db = sqlite3.connect(
            f"file:{path}?mode=ro" if readonly else str(path),
            timeout=BUSY_TIMEOUT_MS / 1000,
            isolation_level=None,
            uri=readonly,
        )
        self._db.execute(f"PRAGMA busy_timeout={BUSY_TIMEOUT_MS}")
        if readonly:
            self._check_readable()
            return
        mode = self._db.execute("PRAGMA journal_mode=WAL").fetchone()[0]
        if str(mode).lower() != "wal":
            raise ConfigInvalid(f"ledger {path} cannot use WAL mode ({mode}); use a local disk")
        self._db.execute("PRAGMA synchronous=FULL")
        self._db.execute("PRAGMA foreign_keys=ON")
        self._create_or_migrate()

    def _version(self) -> int:
        return int(self._db.execute("PRAGMA user_version").fetchone()[0])

    def _too_new(self, version: int) -> ConfigInvalid:
        return ConfigInvalid(
            f"ledger {self.path} has schema {version}, newer than this flairwatch "
            f"({SCHEMA_VERSION}); upgrade flairwatch"
        )

    def _check_readable(self) -> None:
        """A read-only reader cannot migrate: it asks for a writer to do it first."""
        version = self._version()
        if version > SCHEMA_VERSION:
            raise self._too_new(version)
        if 0 < version < SCHEMA_VERSION:
            raise ConfigInvalid(
                f"ledger {self.path} has schema {version}, older than this flairwatch "
                f"({SCHEMA_VERSION}); start 'flairwatch watch' once to upgrade it"
            )

    def _create_or_migrate(self) -> None:
        """Create the tables of a new ledger, or bring an older one up to SCHEMA_VERSION.

        A migration keeps a copy of the old ledger beside it (``ledger-schemaN.sqlite3``, made
        with the backup API) and runs all its steps in one transaction, so a crash in the middle
        leaves the old version intact and the next start tries again.
        """
        version = self._version()
        if version > SCHEMA_VERSION:
            raise self._too_new(version)
        if 0 < version < SCHEMA_VERSION:
            keep = self.path.with_name(f"ledger-schema{version}.sqlite3")
            if not keep.exists():
                self.backup_to(keep)
        with self.transaction() as db:
            version = db.execute("PRAGMA user_version").fetchone()[0]  # another opener may have won
            if version == 0:
                for statement in SCHEMA.split(";"):
                    if statement.strip():
                        db.execute(statement)
            for step in range(version + 1, SCHEMA_VERSION + 1) if version else ():
                for statement in schema.MIGRATIONS[step]:
                    db.execute(statement)
                log.info("ledger %s: migrated to schema %d", self.path, step)
            db.execute(f"PRAGMA user_version={SCHEMA_VERSION}")

    @classmethod
    def open(cls, state_dir: Path, *, check_fs: bool = True) -> Self:
        """Open (creating if needed) the ledger in ``state_dir``, refusing network file systems."""
        state_dir.mkdir(parents=True, exist_ok=True, mode=0o750)
        if check_fs:
            check_local_disk(state_dir)
        return cls(state_dir / LEDGER_FILE)

    @classmethod
    def open_readonly(cls, state_dir: Path) -> Self:
        """Open an existing ledger for reading only (status, reports)."""
        path = state_dir / LEDGER_FILE
        if not path.is_file():
            raise ConfigInvalid(f"no ledger in {state_dir}; check 'state' or run 'watch' first")
        return cls(path, readonly=True)

    def close(self) -> None:
        """Close the connection and give up this process's run lock, if it took one.

        Jobs this process still holds as running become orphans that the next check requeues.
        """
        if os.getpid() == self._pid:
            self._db.close()
            if self._run_lock is not None:
                self._run_lock.release()
                self._run_lock = None

    def take_ownership(self, owner: Owner) -> None:
        """Claim jobs as ``owner`` (the daemon: a token under the state folder's own lock)."""
        self.owner = owner

    def claimant(self) -> Owner:
        """Who this process claims jobs as; the first call takes a lock file of its own."""
        if self.owner is None:
            self._run_lock = RunLock(self.path.parent)
            self.owner = self._run_lock.owner
        return self.owner

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def _conn(self) -> sqlite3.Connection:
        if os.getpid() != self._pid:
            raise RuntimeError("a ledger connection cannot cross fork; open a new one")
        return self._db

    @contextlib.contextmanager
    def transaction(self) -> Iterator[sqlite3.Connection]:
        """A short write transaction, retried with back-off while another writer holds the lock."""
        db = self._conn()
        for attempt in range(LOCK_RETRIES):
            try:
                db.execute("BEGIN IMMEDIATE")
                break
            except sqlite3.OperationalError as exc:
                if not _locked(exc) or attempt == LOCK_RETRIES - 1:
                    raise StageFailed(
                        f"ledger {self.path} stayed locked: {exc}; is another writer stuck?",
                        transient=True,
                    ) from exc
                time.sleep(min(2.0, 0.05 * 2**attempt))
        try:
            yield db
        except BaseException:
            db.execute("ROLLBACK")
            raise
        db.execute("COMMIT")

    def query(self, sql: str, args: Iterable[Any] = ()) -> list[tuple[Any, ...]]:
        """A read-only query (used by status and reports)."""
        return list(self._conn().execute(sql, tuple(args)).fetchall())

    def backup_to(self, target: Path) -> None:
        """Copy the ledger consistently (SQLite backup API) to ``target``, replaced atomically."""
        tmp = target.with_name(f".{target.name}.{os.getpid()}.tmp")
        tmp.unlink(missing_ok=True)
        dest = sqlite3.connect(tmp)
        try:
            self._conn().backup(dest)
            ok = dest.execute("PRAGMA integrity_check").fetchone()[0]
            if ok != "ok":
                raise StageFailed(f"backup copy {tmp} failed its integrity check: {ok}")
        finally:
            dest.close()
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, target)
        fsync_path(target.parent)
