"""The ledger's reports, heartbeat and review records: what ``status`` and the QC commands use."""

from __future__ import annotations

import os
from typing import Any

from flairwatch.ledger.core import LedgerCore
from flairwatch.ledger.jobs import JobState


class ActivityTables(LedgerCore):
    """Job counts and recent outcomes, the daemon's heartbeat, QC marks and corrected masks."""

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

    def state_counts(self) -> dict[str, int]:
        """Jobs per state (latest job of each series revision and model)."""
        return {s: n for s, n in self.query("SELECT state, COUNT(*) FROM jobs GROUP BY state")}

    def recent_errors(self, limit: int) -> list[tuple[float, str, str, int, str]]:
        """(finished, state, series key, revision, error) of the latest failed or refused jobs."""
        return [
            (r[0], r[1], r[2], r[3], r[4])
            for r in self.query(
                """SELECT j.finished, j.state, s.series_key, s.revision, j.error FROM jobs j
                   JOIN series s ON s.id = j.series_id
                   WHERE j.state IN (?, ?) OR (j.state = ? AND j.error IS NOT NULL)
                   ORDER BY COALESCE(j.finished, j.started, j.created) DESC LIMIT ?""",
                (JobState.FAILED.value, JobState.REFUSED.value, JobState.QUEUED.value, limit),
            )
        ]

    def recent_outcomes(self, limit: int) -> list[str]:
        """States of the latest finished processing jobs (done, failed, refused), newest first."""
        return [
            r[0]
            for r in self.query(
                """SELECT state FROM jobs WHERE state IN (?,?,?) AND finished IS NOT NULL
                   ORDER BY finished DESC LIMIT ?""",
                (JobState.DONE.value, JobState.FAILED.value, JobState.REFUSED.value, limit),
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

    def running_jobs(self) -> list[tuple[str | None, float]]:
        """(series key, start time) of every running job, oldest first."""
        rows = self.query(
            """SELECT s.series_key, j.started FROM jobs j JOIN series s ON s.id = j.series_id
               WHERE j.state = ? AND j.started IS NOT NULL ORDER BY j.started""",
            (JobState.RUNNING.value,),
        )
        return [(key, float(started)) for key, started in rows]

    def recent_seconds(self, limit: int) -> list[float]:
        """Processing times in seconds of the last ``limit`` series done, newest first."""
        rows = self.query(
            """SELECT seconds FROM jobs WHERE state = ? AND seconds IS NOT NULL
               ORDER BY finished DESC LIMIT ?""",
            (JobState.DONE.value, limit),
        )
        return [float(r[0]) for r in rows]

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
