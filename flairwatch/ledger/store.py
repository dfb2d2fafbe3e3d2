"""The ledger: one SQLite file on local disk that records every file, series revision and job.

All SQL of flairwatch lives here. Rules that keep the ledger sound (RELIABILITY.md):

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
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass
from enum import StrEnum
from pathlib import Path
from typing import Any

from flairwatch.engine.results import fsync_dir
from flairwatch.errors import ConfigInvalid, StageFailed
from flairwatch.ledger.schema import SCHEMA, SCHEMA_VERSION

log = logging.getLogger(__name__)

LEDGER_FILE = "ledger.sqlite3"
BUSY_TIMEOUT_MS = 5000
LOCK_RETRIES = 8
# WAL needs a shared-memory index that these cannot give (sqlite.org/wal.html, howtocorrupt.html)
NETWORK_FS_TYPES = frozenset(
    {"nfs", "nfs4", "cifs", "smb", "smb2", "smb3", "smbfs", "afs", "9p", "ceph", "glusterfs",
     "lustre", "gpfs", "fuse.sshfs", "fuse.glusterfs", "fuse.cephfs", "davfs", "fuse.davfs2"}
)  # fmt: skip


class JobState(StrEnum):
    """Where a job stands. Terminal states never change again (a late file makes a new revision)."""

    SETTLING = "settling"  # files still arriving or not yet seen unchanged for settle_seconds
    QUEUED = "queued"  # settled and selected; waiting for a worker (or for its retry time)
    RUNNING = "running"  # a worker has it
    DONE = "done"  # result folder complete and recorded
    FAILED = "failed"  # a stage failed for good (or kept failing)
    REJECTED = "rejected"  # the input cannot be used (gaps, truncated files, localizer...)
    SKIPPED = "skipped"  # not a FLAIR series by the selection rules


TERMINAL_STATES = frozenset({JobState.DONE, JobState.FAILED, JobState.REJECTED, JobState.SKIPPED})


def mount_fstype(path: Path, mountinfo: str) -> str:
    """File-system type of the mount holding ``path`` (already resolved), from mountinfo text.

    Format per proc(5): field 5 is the mount point (octal escapes for blanks), then optional
    fields up to ``-``, then the file-system type. The longest matching mount point wins.
    """
    best, best_type = "", "unknown"
    target = str(path)
    for line in mountinfo.splitlines():
        parts = line.split()
        if len(parts) < 7 or "-" not in parts[6:]:
            continue
        point = parts[4].encode().decode("unicode_escape")
        fstype = parts[parts.index("-", 6) + 1]
        inside = target == point or target.startswith(point.rstrip("/") + "/")
        if inside and len(point) >= len(best):
            best, best_type = point, fstype
    return best_type


def check_local_disk(folder: Path, mountinfo: str | None = None) -> None:
    """Refuse a state folder on a network file system (raises ConfigInvalid)."""
    if mountinfo is None:
        try:
            mountinfo = Path("/proc/self/mountinfo").read_text(encoding="utf-8")
        except OSError:
            return  # not Linux: nothing to check against
    fstype = mount_fstype(folder.resolve(), mountinfo)
    if fstype in NETWORK_FS_TYPES or fstype.startswith("nfs"):
        raise ConfigInvalid(
            f"state folder {folder} is on a network file system ({fstype}); "
            "put 'state' on a local disk (the ledger's WAL mode needs one)"
        )


@dataclass(frozen=True)
class FileRow:
    path: str
    size: int
    mtime_ns: int
    sop_uid: str | None = None
    study_uid: str | None = None
    series_uid: str | None = None
    series_id: int | None = None
    reason: str | None = None


@dataclass(frozen=True)
class SeriesRow:
    id: int
    study_uid: str
    series_uid: str
    revision: int
    signature: str | None
    stable_since: float | None
    n_files: int
    selection: str
    study_key: str | None = None
    series_key: str | None = None


@dataclass(frozen=True)
class JobRow:
    id: int
    series_id: int
    state: JobState
    attempts: int
    priority: int
    study_uid: str
    series_uid: str
    revision: int
    not_before: float
    error: str | None = None
    result_path: str | None = None


_JOB_SELECT = """SELECT j.id, j.series_id, j.state, j.attempts, j.priority, s.study_uid,
    s.series_uid, s.revision, j.not_before, j.error, j.result_path
    FROM jobs j JOIN series s ON s.id = j.series_id"""
_SERIES_SELECT = """SELECT id, study_uid, series_uid, revision, signature, stable_since, n_files,
    selection, study_key, series_key FROM series"""


def _job(row: sqlite3.Row | tuple[Any, ...]) -> JobRow:
    return JobRow(row[0], row[1], JobState(row[2]), *row[3:])


def _locked(exc: sqlite3.OperationalError) -> bool:
    text = str(exc).lower()
    return "locked" in text or "busy" in text


class Ledger:
    """An open ledger. Use from one process and one thread; close it before forking."""

    def __init__(self, path: Path, *, readonly: bool = False) -> None:
        self.path = path
        self._pid = os.getpid()
        # isolation_level=None: we issue BEGIN IMMEDIATE ourselves
        self._db = sqlite3.connect(
            f"file:{path}?mode=ro" if readonly else str(path),
            timeout=BUSY_TIMEOUT_MS / 1000,
            isolation_level=None,
            uri=readonly,
        )
        self._db.execute(f"PRAGMA busy_timeout={BUSY_TIMEOUT_MS}")
        if readonly:
            return
        mode = self._db.execute("PRAGMA journal_mode=WAL").fetchone()[0]
        if str(mode).lower() != "wal":
            raise ConfigInvalid(f"ledger {path} cannot use WAL mode ({mode}); use a local disk")
        self._db.execute("PRAGMA synchronous=FULL")
        self._db.execute("PRAGMA foreign_keys=ON")
        with self.transaction() as db:
            version = db.execute("PRAGMA user_version").fetchone()[0]
            if version == 0:
                for statement in SCHEMA.split(";"):
                    if statement.strip():
                        db.execute(statement)
                db.execute(f"PRAGMA user_version={SCHEMA_VERSION}")
            elif version > SCHEMA_VERSION:
                raise ConfigInvalid(
                    f"ledger {path} has schema {version}, newer than this flairwatch "
                    f"({SCHEMA_VERSION}); upgrade flairwatch"
                )

    @classmethod
    def open(cls, state_dir: Path, *, check_fs: bool = True) -> Ledger:
        """Open (creating if needed) the ledger in ``state_dir``, refusing network file systems."""
        state_dir.mkdir(parents=True, exist_ok=True, mode=0o750)
        if check_fs:
            check_local_disk(state_dir)
        return cls(state_dir / LEDGER_FILE)

    @classmethod
    def open_readonly(cls, state_dir: Path) -> Ledger:
        """Open an existing ledger for reading only (status, reports)."""
        path = state_dir / LEDGER_FILE
        if not path.is_file():
            raise ConfigInvalid(f"no ledger in {state_dir}; check 'state' or run 'watch' first")
        return cls(path, readonly=True)

    def close(self) -> None:
        if os.getpid() == self._pid:
            self._db.close()

    def __enter__(self) -> Ledger:
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

    # ---- files -------------------------------------------------------------------------

    def known_files(self) -> dict[str, FileRow]:
        """Every file present at the last scan, by path."""
        rows = self.query(
            "SELECT path, size, mtime_ns, sop_uid, study_uid, series_uid, series_id, reason"
            " FROM files WHERE gone = 0"
        )
        return {r[0]: FileRow(*r) for r in rows}

    def known_sops(self, study_uid: str, series_uid: str) -> set[str]:
        """SOP Instance UIDs already taken into a revision of this series (present or not)."""
        rows = self.query(
            "SELECT sop_uid FROM files WHERE study_uid = ? AND series_uid = ?"
            " AND series_id IS NOT NULL AND sop_uid IS NOT NULL",
            (study_uid, series_uid),
        )
        return {r[0] for r in rows}

    def record_scan(self, present: Iterable[FileRow], gone: Iterable[str], now: float) -> None:
        """Upsert what a scan found; mark paths it no longer found as gone."""
        with self.transaction() as db:
            for f in present:
                db.execute(
                    """INSERT INTO files (path, size, mtime_ns, sop_uid, study_uid, series_uid,
                        reason, first_seen, last_seen) VALUES (?,?,?,?,?,?,?,?,?)
                    ON CONFLICT (path) DO UPDATE SET size=excluded.size,
                        mtime_ns=excluded.mtime_ns, sop_uid=excluded.sop_uid,
                        study_uid=excluded.study_uid, series_uid=excluded.series_uid,
                        reason=excluded.reason, last_seen=excluded.last_seen, gone=0,
                        series_id=CASE WHEN files.sop_uid IS excluded.sop_uid
                            THEN files.series_id ELSE NULL END""",
                    (f.path, f.size, f.mtime_ns, f.sop_uid, f.study_uid, f.series_uid, f.reason,
                     now, now),
                )  # fmt: skip
            for path in gone:
                db.execute("UPDATE files SET gone = 1, last_seen = ? WHERE path = ?", (now, path))

    def take_files(self, series_id: int, study_uid: str, series_uid: str) -> int:
        """Attach the present files of a series not yet in any revision to ``series_id``."""
        with self.transaction() as db:
            cur = db.execute(
                """UPDATE files SET series_id = ? WHERE study_uid = ? AND series_uid = ?
                   AND series_id IS NULL AND gone = 0 AND sop_uid IS NOT NULL""",
                (series_id, study_uid, series_uid),
            )
            return cur.rowcount

    def revision_files(self, series_id: int) -> list[FileRow]:
        """Present files that belong to this revision: taken by it or by an earlier one."""
        rows = self.query(
            """SELECT f.path, f.size, f.mtime_ns, f.sop_uid, f.study_uid, f.series_uid,
                      f.series_id, f.reason
               FROM files f JOIN series s ON s.id = ? JOIN series t ON t.id = f.series_id
               WHERE f.gone = 0 AND t.study_uid = s.study_uid AND t.series_uid = s.series_uid
                 AND t.revision <= s.revision ORDER BY f.path""",
            (series_id,),
        )
        return [FileRow(*r) for r in rows]

    # ---- series and jobs ---------------------------------------------------------------

    def latest_revision(self, study_uid: str, series_uid: str) -> SeriesRow | None:
        rows = self.query(
            _SERIES_SELECT
            + " WHERE study_uid = ? AND series_uid = ? ORDER BY revision DESC LIMIT 1",
            (study_uid, series_uid),
        )
        return SeriesRow(*rows[0]) if rows else None

    def series(self, series_id: int) -> SeriesRow:
        return SeriesRow(*self.query(_SERIES_SELECT + " WHERE id = ?", (series_id,))[0])

    def new_revision(
        self,
        study_uid: str,
        series_uid: str,
        keys: Callable[[int], tuple[str, str, str]],
        now: float,
    ) -> tuple[SeriesRow, JobRow]:
        """Add the next revision of a series with a settling job (priority 0).

        ``keys(revision)`` gives the (subject, study, series) keys of the new revision.
        """
        with self.transaction() as db:
            (last,) = db.execute(
                "SELECT COALESCE(MAX(revision), 0) FROM series WHERE study_uid=? AND series_uid=?",
                (study_uid, series_uid),
            ).fetchone()
            cur = db.execute(
                """INSERT INTO series (study_uid, series_uid, revision, subject_key, study_key,
                   series_key, first_seen, last_seen) VALUES (?,?,?,?,?,?,?,?)""",
                (study_uid, series_uid, last + 1, *keys(last + 1), now, now),
            )
            series_id = int(cur.lastrowid or 0)
            cur = db.execute(
                "INSERT INTO jobs (series_id, state, created) VALUES (?,?,?)",
                (series_id, JobState.SETTLING.value, now),
            )
            job_id = int(cur.lastrowid or 0)
        return self.series(series_id), self.job(job_id)

    def note_signature(
        self, series_id: int, signature: str, n_files: int, stable_since: float, now: float
    ) -> None:
        with self.transaction() as db:
            db.execute(
                """UPDATE series SET signature=?, n_files=?, stable_since=?, last_seen=?
                   WHERE id=?""",
                (signature, n_files, stable_since, now, series_id),
            )

    def set_selection(self, series_id: int, selected: bool, rule: str, reason: str) -> None:
        with self.transaction() as db:
            db.execute(
                "UPDATE series SET selection=?, select_rule=?, select_reason=? WHERE id=?",
                ("selected" if selected else "skipped", rule, reason, series_id),
            )

    def job(self, job_id: int) -> JobRow:
        return _job(self.query(_JOB_SELECT + " WHERE j.id = ?", (job_id,))[0])

    def jobs_in(self, *states: JobState) -> list[JobRow]:
        marks = ",".join("?" * len(states))
        rows = self.query(
            _JOB_SELECT + f" WHERE j.state IN ({marks}) ORDER BY j.id", [s.value for s in states]
        )
        return [_job(r) for r in rows]

    def latest_job(self, series_id: int) -> JobRow | None:
        rows = self.query(
            _JOB_SELECT + " WHERE j.series_id = ? ORDER BY j.id DESC LIMIT 1", (series_id,)
        )
        return _job(rows[0]) if rows else None

    def move_job(
        self, job_id: int, source: Iterable[JobState], target: JobState, now: float, **cols: Any
    ) -> bool:
        """Compare-and-set a job's state; extra columns are set alongside. False if it moved on."""
        allowed = [s.value for s in source]
        sets = ["state = ?"] + [f"{c} = ?" for c in cols]
        if target is JobState.QUEUED:
            sets.append(f"queued = COALESCE(queued, {float(now)!r})")
        if target in TERMINAL_STATES:
            sets.append(f"finished = {float(now)!r}")
        marks = ",".join("?" * len(allowed))
        with self.transaction() as db:
            cur = db.execute(
                f"UPDATE jobs SET {', '.join(sets)} WHERE id = ? AND state IN ({marks})",
                (target.value, *cols.values(), job_id, *allowed),
            )
            return cur.rowcount == 1

    def claim_next(
        self,
        now: float,
        model_name: str,
        model_version: str,
        pid: int,
        *,
        min_priority: int | None = None,
    ) -> JobRow | None:
        """Take the most urgent queued job for this model whose retry time has come.

        Jobs queued for another model version (a re-run after an upgrade) are left to whoever
        runs that model; ``min_priority`` leaves lower-priority jobs (archive re-runs) alone.
        The job becomes running and its attempt is counted.
        """
        floor = -(2**62) if min_priority is None else min_priority
        with self.transaction() as db:
            row = db.execute(
                """SELECT id FROM jobs WHERE state = ? AND not_before <= ? AND priority >= ?
                   AND (model_name IS NULL OR (model_name = ? AND model_version = ?))
                   ORDER BY priority DESC, id LIMIT 1""",
                (JobState.QUEUED.value, now, floor, model_name, model_version),
            ).fetchone()
            if row is None:
                return None
            db.execute(
                """UPDATE jobs SET state=?, attempts=attempts+1, started=?, worker_pid=?,
                   model_name=COALESCE(model_name, ?), model_version=COALESCE(model_version, ?)
                   WHERE id=?""",
                (JobState.RUNNING.value, now, pid, model_name, model_version, row[0]),
            )
        return self.job(row[0])

    def finish_done(
        self,
        job_id: int,
        result_path: str,
        summary: dict[str, Any],
        *,
        adopted: bool,
        seconds: float,
        now: float,
        rss_kb: int | None = None,
    ) -> None:
        """Record a durable result folder: the job is done and its result becomes current."""
        model = summary.get("model") or {}
        with self.transaction() as db:
            series_id, name, version = db.execute(
                "SELECT series_id, model_name, model_version FROM jobs WHERE id=?", (job_id,)
            ).fetchone()
            name = model.get("name", name)
            version = model.get("version", version)
            db.execute(
                """UPDATE jobs SET state=?, finished=?, seconds=?, result_path=?, error=NULL,
                   model_name=?, model_version=?, worker_rss_kb=? WHERE id=?""",
                (JobState.DONE.value, now, seconds, result_path, name, version, rss_kb, job_id),
            )
            db.execute(
                """UPDATE results SET current = 0 WHERE series_id IN (SELECT b.id FROM series a
                   JOIN series b ON a.study_uid=b.study_uid AND a.series_uid=b.series_uid
                   WHERE a.id=?)""",
                (series_id,),
            )
            db.execute(
                """INSERT INTO results (series_id, job_id, model_name, model_version, result_path,
                   lesion_volume_ml, lesion_count, adopted, current, created)
                   VALUES (?,?,?,?,?,?,?,?,1,?)""",
                (series_id, job_id, name or "", version or "", result_path,
                 summary.get("lesion_volume_ml"), summary.get("lesion_count"), int(adopted), now),
            )  # fmt: skip

    def requeue_running(
        self, now: float, alive: Callable[[int], bool] = lambda pid: False
    ) -> list[int]:
        """After a crash: running jobs whose worker is gone go back to the queue.

        ``alive(pid)`` tells whether a recorded worker still runs (another process, such as an
        archive re-run, may hold jobs too). The attempt already made still counts.
        """
        with self.transaction() as db:
            rows = db.execute(
                "SELECT id, worker_pid FROM jobs WHERE state = ?", (JobState.RUNNING.value,)
            ).fetchall()
            ids = [job for job, pid in rows if pid is None or not alive(pid)]
            for job in ids:
                db.execute(
                    "UPDATE jobs SET state=?, not_before=?, worker_pid=NULL WHERE id=?",
                    (JobState.QUEUED.value, now, job),
                )
        return ids

    # ---- QC and corrections (used by the review commands) -------------------------------

    def add_qc_mark(self, result_id: int, mark: str, note: str, by: str, now: float) -> int:
        with self.transaction() as db:
            cur = db.execute(
                "INSERT INTO qc_marks (result_id, mark, note, marked_by, marked)"
                " VALUES (?,?,?,?,?)",
                (result_id, mark, note, by, now),
            )
            return int(cur.lastrowid or 0)

    def add_corrected_mask(self, result_id: int, path: str, note: str, now: float) -> int:
        with self.transaction() as db:
            cur = db.execute(
                "INSERT INTO corrected_masks (result_id, path, note, added) VALUES (?,?,?,?)",
                (result_id, path, note, now),
            )
            return int(cur.lastrowid or 0)

    # ---- reports (status) ----------------------------------------------------------------

    def state_counts(self) -> dict[str, int]:
        """Jobs per state (latest job of each series revision and model)."""
        return {s: n for s, n in self.query("SELECT state, COUNT(*) FROM jobs GROUP BY state")}

    def recent_errors(self, limit: int) -> list[tuple[float, str, str, int, str]]:
        """(finished, state, series key, revision, error) of the latest failed or rejected jobs."""
        return [
            (r[0], r[1], r[2], r[3], r[4])
            for r in self.query(
                """SELECT j.finished, j.state, s.series_key, s.revision, j.error FROM jobs j
                   JOIN series s ON s.id = j.series_id
                   WHERE j.state IN (?, ?) OR (j.state = ? AND j.error IS NOT NULL)
                   ORDER BY COALESCE(j.finished, j.started, j.created) DESC LIMIT ?""",
                (JobState.FAILED.value, JobState.REJECTED.value, JobState.QUEUED.value, limit),
            )
        ]

    def recent_outcomes(self, limit: int) -> list[str]:
        """States of the latest finished processing jobs (done, failed, rejected), newest first."""
        return [
            r[0]
            for r in self.query(
                """SELECT state FROM jobs WHERE state IN (?,?,?) AND finished IS NOT NULL
                   ORDER BY finished DESC LIMIT ?""",
                (JobState.DONE.value, JobState.FAILED.value, JobState.REJECTED.value, limit),
            )
        ]

    def done_since(self, since: float) -> tuple[int, float | None]:
        """Jobs done since ``since`` and their mean duration in seconds."""
        n, mean = self.query(
            "SELECT COUNT(*), AVG(seconds) FROM jobs WHERE state = ? AND finished >= ?",
            (JobState.DONE.value, since),
        )[0]
        return int(n), mean

    def oldest_waiting(self, now: float) -> float | None:
        """Queue time of the oldest queued job that may run now (None when the queue is empty)."""
        (t,) = self.query(
            "SELECT MIN(COALESCE(queued, created)) FROM jobs WHERE state = ? AND not_before <= ?",
            (JobState.QUEUED.value, now),
        )[0]
        return t

    def last_activity(self) -> float | None:
        """When a job last started or finished."""
        (t,) = self.query(
            "SELECT MAX(MAX(COALESCE(started,0)), MAX(COALESCE(finished,0))) FROM jobs"
        )[0]
        return t or None

    def heartbeat(self) -> dict[str, Any] | None:
        rows = self.query("SELECT pid, host, started, beat, state, inbox FROM heartbeat WHERE id=1")
        if not rows:
            return None
        return dict(zip(("pid", "host", "started", "beat", "state", "inbox"), rows[0], strict=True))

    # ---- daemon heartbeat and backup -----------------------------------------------------

    def beat(
        self, pid: int, state: str, now: float, *, inbox: str = "", started: float = 0.0
    ) -> None:
        """Upsert the daemon's heartbeat row (``started``/``inbox`` kept when not given)."""
        with self.transaction() as db:
            db.execute(
                """INSERT INTO heartbeat (id, pid, host, started, beat, state, inbox)
                   VALUES (1, ?, ?, ?, ?, ?, ?) ON CONFLICT (id) DO UPDATE SET pid=excluded.pid,
                   host=excluded.host, beat=excluded.beat, state=excluded.state,
                   started=CASE WHEN ? > 0 THEN excluded.started ELSE started END,
                   inbox=CASE WHEN excluded.inbox != '' THEN excluded.inbox ELSE inbox END""",
                (pid, os.uname().nodename, started or now, now, state, inbox, started),
            )

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
        fsync_dir(target.parent)
