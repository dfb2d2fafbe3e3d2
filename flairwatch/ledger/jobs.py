"""The ledger's ``series``, ``jobs`` and ``results`` tables: revisions, job states, claims, results.

A job moves settling -> queued -> running -> done | failed | refused, or settling -> skipped;
every move is a compare-and-set in one short transaction, so two processes never both take a job.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from enum import StrEnum
from typing import Any

from flairwatch.ledger.core import LedgerCore


class JobState(StrEnum):
    """Where a job stands. Terminal states never change again (a late file makes a new revision)."""

    SETTLING = "settling"  # files still arriving or not yet seen unchanged for settle_seconds
    QUEUED = "queued"  # settled and selected; waiting for a worker (or for its retry time)
    RUNNING = "running"  # a worker has it
    DONE = "done"  # result folder complete and recorded
    FAILED = "failed"  # a stage failed for good (or kept failing)
    REFUSED = "refused"  # input unusable (gaps, truncated files...); 'rejected' before 0.2.0
    SKIPPED = "skipped"  # not a FLAIR series by the selection rules


TERMINAL_STATES = frozenset({JobState.DONE, JobState.FAILED, JobState.REFUSED, JobState.SKIPPED})


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
    owner: str | None = None  # run token of the process that holds (or last held) it


_JOB_SELECT = """SELECT j.id, j.series_id, j.state, j.attempts, j.priority, s.study_uid,
    s.series_uid, s.revision, j.not_before, j.error, j.result_path, j.owner
    FROM jobs j JOIN series s ON s.id = j.series_id"""
_SERIES_SELECT = """SELECT id, study_uid, series_uid, revision, signature, stable_since, n_files,
    selection, study_key, series_key FROM series"""


def _job(row: sqlite3.Row | tuple[Any, ...]) -> JobRow:
    return JobRow(row[0], row[1], JobState(row[2]), *row[3:])


class JobTables(LedgerCore):
    """Reads and writes of the ``series``, ``jobs`` and ``results`` tables."""

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
        """Compare-and-set a job's state; extra columns are set alongside. False if it moved on.

        A running job moves only for its owner (or when it has none: rows from before schema 3),
        so a process whose job was requeued behind its back cannot overwrite the next run's state.
        """
        allowed = [s.value for s in source]
        sets = ["state = ?"] + [f"{c} = ?" for c in cols]
        if target is JobState.QUEUED:
            sets.append(f"queued = COALESCE(queued, {float(now)!r})")
        if target in TERMINAL_STATES:
            sets.append(f"finished = {float(now)!r}")
        marks = ",".join("?" * len(allowed))
        mine = self.owner.token if self.owner else None
        with self.transaction() as db:
            cur = db.execute(
                f"""UPDATE jobs SET {", ".join(sets)} WHERE id = ? AND state IN ({marks})
                    AND (state != ? OR owner IS NULL OR owner = ?)""",
                (target.value, *cols.values(), job_id, *allowed, JobState.RUNNING.value, mine),
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
        max_priority: int | None = None,
    ) -> JobRow | None:
        """Take the most urgent queued job for this model whose retry time has come.

        Jobs queued for another model version (a re-run after an upgrade) are left to whoever
        runs that model; ``min_priority`` leaves lower-priority jobs (archive re-runs) alone and
        ``max_priority`` leaves higher ones (new arrivals) to the daemon. The job becomes running,
        owned by this process's :meth:`claimant` (token and lock), and its attempt is counted.
        """
        floor = -(2**62) if min_priority is None else min_priority
        ceiling = 2**62 if max_priority is None else max_priority
        owner = self.claimant()
        with self.transaction() as db:
            row = db.execute(
                """SELECT id FROM jobs WHERE state = ? AND not_before <= ? AND priority >= ?
                   AND priority <= ?
                   AND (model_name IS NULL OR (model_name = ? AND model_version = ?))
                   ORDER BY priority DESC, id LIMIT 1""",
                (JobState.QUEUED.value, now, floor, ceiling, model_name, model_version),
            ).fetchone()
            if row is None:
                return None
            db.execute(
                """UPDATE jobs SET state=?, attempts=attempts+1, started=?, worker_pid=?,
                   model_name=COALESCE(model_name, ?), model_version=COALESCE(model_version, ?),
                   owner=?, owner_lock=? WHERE id=?""",
                (JobState.RUNNING.value, now, pid, model_name, model_version, owner.token,
                 owner.lock, row[0]),
            )  # fmt: skip
        return self.job(row[0])

    def claimable(
        self, now: float, model_name: str, model_version: str, *, min_priority: int = 0
    ) -> int:
        """How many queued jobs :meth:`claim_next` would hand out now with these arguments."""
        (n,) = self.query(
            """SELECT COUNT(*) FROM jobs WHERE state = ? AND not_before <= ? AND priority >= ?
               AND (model_name IS NULL OR (model_name = ? AND model_version = ?))""",
            (JobState.QUEUED.value, now, min_priority, model_name, model_version),
        )[0]
        return int(n)

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
    ) -> bool:
        """Record a durable result folder: the job is done and its result becomes current.

        False (nothing recorded) when the job is running for another owner: it was requeued
        behind this process's back and someone else has it now; that run records its own result.
        """
        model = summary.get("model") or {}
        mine = self.owner.token if self.owner else None
        with self.transaction() as db:
            series_id, name, version, state, owner = db.execute(
                "SELECT series_id, model_name, model_version, state, owner FROM jobs WHERE id=?",
                (job_id,),
            ).fetchone()
            if state == JobState.RUNNING.value and owner is not None and owner != mine:
                return False
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
        return True
