"""Putting jobs back: orphans of dead owners, jobs handed back, failed series retried, and what a
crash left for start-up to repair. Ownership rules: :mod:`flairwatch.ledger.owners`."""

from __future__ import annotations

from collections.abc import Collection

from flairwatch.ledger.jobs import JobState, JobTables
from flairwatch.ledger.owners import lock_is_free, remove_dead_lock


class RepairTables(JobTables):
    """Job moves that undo or repeat a run, never counted against the series unless it failed."""

    def give_back(self, job_id: int, now: float, error: str | None = None) -> bool:
        """Put a job of ours back in the queue without counting its attempt.

        For a job that never reached a worker, or one that stopped for a reason that is not the
        series' own (the disk was full); ``error`` says why it waits. False when not ours.
        """
        mine = self.owner.token if self.owner else None
        with self.transaction() as db:
            cur = db.execute(
                """UPDATE jobs SET state=?, not_before=?, worker_pid=NULL, owner=NULL,
                   owner_lock=NULL, attempts=MAX(attempts - 1, 0), error=?
                   WHERE id=? AND state=? AND owner IS ?""",
                (JobState.QUEUED.value, now, error, job_id, JobState.RUNNING.value, mine),
            )
            return cur.rowcount == 1

    def requeue_orphans(self, now: float, *, held: Collection[int] | None = None) -> list[int]:
        """Put running jobs whose owner is gone back in the queue; returns their ids.

        A running job is an orphan when nobody holds its owner's lock file, when it was claimed
        under this process's lock by an earlier run (a daemon that takes ``daemon.lock`` owns
        every job of the daemons before it), when it has no owner (rows from before schema 3),
        or, given ``held`` (the jobs this process's workers hold), when it is this run's own but
        no worker holds it. Process ids are never consulted. The orphan's attempt is given back:
        the series did not fail, its owner died.
        """
        state_dir = self.path.parent
        me = self.owner
        found: list[tuple[int, str | None]] = []
        free: dict[str, bool] = {}
        # decide on a plain read (this runs every few seconds; most times there is nothing to
        # do), then move each orphan with a compare-and-set on its state and owner
        rows = self.query(
            "SELECT id, owner, owner_lock FROM jobs WHERE state = ?", (JobState.RUNNING.value,)
        )
        for job, token, lock in rows:
            if me is not None and token == me.token:
                orphan = held is not None and job not in held
            elif lock is None or (me is not None and lock == me.lock):
                orphan = True
            else:
                if lock not in free:
                    free[lock] = lock_is_free(state_dir, lock)
                orphan = free[lock]
            if orphan:
                found.append((job, token))
        moved = []
        if found:
            with self.transaction() as db:
                for job, token in found:
                    cur = db.execute(
                        """UPDATE jobs SET state=?, not_before=?, worker_pid=NULL, owner=NULL,
                           owner_lock=NULL, attempts=MAX(attempts - 1, 0)
                           WHERE id=? AND state=? AND owner IS ?""",
                        (JobState.QUEUED.value, now, job, JobState.RUNNING.value, token),
                    )
                    if cur.rowcount == 1:
                        moved.append(job)
        for lock, is_free in free.items():
            if is_free:
                remove_dead_lock(state_dir, lock)
        return moved

    def retry_ended(
        self,
        now: float,
        *,
        series_keys: Collection[str] = (),
        failed_since: float | None = None,
        refused: bool = False,
    ) -> list[tuple[str, str, str | None]]:
        """Queue failed (or refused) series again; returns (series key, old state, old error).

        A series is chosen by its key (failed or refused), or, with ``failed_since``, every
        series that failed since then (and was refused, with ``refused``). Only a series'
        latest revision and its latest job count: an old failure that a later run superseded
        is history. The job starts afresh: no attempts, no error, and a new arrival's job no
        longer names a model, so the daemon runs it with the model it has now.
        """
        ended = [JobState.FAILED.value] + ([JobState.REFUSED.value] if refused else [])
        rows = self.query(
            """SELECT j.id, s.series_key, j.state, j.error, j.finished FROM jobs j
               JOIN series s ON s.id = j.series_id
               WHERE j.id = (SELECT MAX(k.id) FROM jobs k WHERE k.series_id = s.id)
                 AND s.revision = (SELECT MAX(t.revision) FROM series t
                                   WHERE t.study_uid = s.study_uid AND t.series_uid = s.series_uid)
                 AND j.state IN (?, ?)""",
            (JobState.FAILED.value, JobState.REFUSED.value),
        )
        chosen = [
            r
            for r in rows
            if r[1] in series_keys
            or (failed_since is not None and r[2] in ended and (r[4] or 0.0) >= failed_since)
        ]
        with self.transaction() as db:
            for job_id, _key, state, _error, _finished in chosen:
                db.execute(
                    """UPDATE jobs SET state=?, attempts=0, not_before=?, queued=?, error=NULL,
                       finished=NULL, started=NULL, owner=NULL, owner_lock=NULL,
                       model_name=CASE WHEN priority >= 0 THEN NULL ELSE model_name END,
                       model_version=CASE WHEN priority >= 0 THEN NULL ELSE model_version END
                       WHERE id=? AND state=?""",
                    (JobState.QUEUED.value, now, now, job_id, state),
                )
        return [(key, state, error) for _id, key, state, error, _f in chosen]

    def current_results(self) -> list[tuple[int, str]]:
        """(series revision id, result folder) of every current result."""
        rows = self.query("SELECT series_id, result_path FROM results WHERE current = 1")
        return [(int(sid), str(path)) for sid, path in rows]

    def ended_with_inputs(self) -> list[int]:
        """Latest revisions whose latest job is done or skipped but whose inbox files remain.

        What a crash between recording the outcome and deleting the inputs leaves behind
        (only matters with ``delete_inbox_files``).
        """
        rows = self.query(
            """SELECT s.id FROM series s JOIN jobs j
                 ON j.id = (SELECT MAX(k.id) FROM jobs k WHERE k.series_id = s.id)
               WHERE j.state IN (?, ?)
                 AND s.revision = (SELECT MAX(t.revision) FROM series t
                                   WHERE t.study_uid = s.study_uid AND t.series_uid = s.series_uid)
                 AND EXISTS (SELECT 1 FROM files f WHERE f.study_uid = s.study_uid
                             AND f.series_uid = s.series_uid AND f.gone = 0
                             AND f.series_id IS NOT NULL)""",
            (JobState.DONE.value, JobState.SKIPPED.value),
        )
        return [int(r[0]) for r in rows]

    def busy_elsewhere(self) -> set[tuple[str, str, str]]:
        """(subject, study, series) keys of jobs that another live process runs (a re-run).

        Their half-built result folders are in use and must not be cleaned up.
        """
        rows = self.query(
            """SELECT s.subject_key, s.study_key, s.series_key, j.owner_lock FROM jobs j
               JOIN series s ON s.id = j.series_id WHERE j.state = ?""",
            (JobState.RUNNING.value,),
        )
        me = self.owner.lock if self.owner else None
        return {
            (subject or "", study or "", series or "")
            for subject, study, series, lock in rows
            if lock is not None and lock != me and not lock_is_free(self.path.parent, lock)
        }
