"""``flairwatch reprocess``: re-run the archive with another model version, then report changes.

1. **Queue** (one transaction): every done series (its latest revision) whose current result
   comes from another model than ``--model`` (the config's by default) gets a job for that
   model at :data:`REPROCESS_PRIORITY`, below new arrivals (priority 0). ``--only-outdated``
   keeps only results of an *older* version (never downgrades); ``--since DATE`` only series
   that arrived on or after that UTC date. A series that already has a queued or running job
   for the model is not queued twice, so running the command again resumes.
2. **Run** the queued re-run jobs one at a time in this process (``--queue-only`` leaves them
   to a daemon running the same model; ``--cluster`` sends them to Dask workers, see
   :mod:`flairwatch.research.scaleout`). While a live daemon has new arrivals queued or running
   it waits, so a new series is never delayed by more than the one re-run job in progress.
   Jobs left running by a re-run process that died are queued again first.
3. **Report** (:mod:`flairwatch.research.change_report`) the series this run finished, into
   ``<results>/reports/changes-<model>-<version>-<UTC time>/``. ``--report-only`` reports every
   series that has a result of the model and an earlier result of another model.

Progress goes to stderr: a bar with ETA on a terminal, one plain line per series otherwise.
The new result becomes current (ledger and the series folder's pointer file); older version
folders stay where they are unless ``keep_versions`` is set (:mod:`flairwatch.research.retention`,
applied after the report); a corrected mask stays the reported result.
"""

from __future__ import annotations

import logging
import re
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, TextIO

from flairwatch.config import Config
from flairwatch.engine import results
from flairwatch.errors import ConfigInvalid, FlairwatchError, InputRejected, StageFailed
from flairwatch.intake.assemble import group_series
from flairwatch.intake.discover import read_record
from flairwatch.ledger.queries import results_of_series
from flairwatch.ledger.store import JobRow, JobState, Ledger
from flairwatch.research.change_report import Limits, change_row, compare_folders

log = logging.getLogger(__name__)

REPROCESS_PRIORITY = -10
MAX_ATTEMPTS = 3
RETRY_SECONDS = 60.0
ARRIVAL_POLL_SECONDS = 2.0
HEARTBEAT_FRESH_SECONDS = 30.0
EXIT_OK, EXIT_FAILED, EXIT_INTERRUPTED = 0, 1, 130


def version_key(version: str) -> tuple[tuple[int, Any], ...]:
    """Sort key for semantic versions: numeric parts as numbers ("0.10.0" > "0.9.1")."""
    return tuple((0, int(p)) if p.isdigit() else (1, p) for p in re.split(r"[.+-]", version))


def parse_since(text: str) -> float:
    """``YYYY-MM-DD`` (UTC midnight) or ISO date-time to seconds since the epoch."""
    try:
        when = datetime.fromisoformat(text)
    except ValueError:
        raise ConfigInvalid(f"--since {text!r} is not a date; use YYYY-MM-DD") from None
    if when.tzinfo is None:
        when = when.replace(tzinfo=UTC)
    return when.timestamp()


@dataclass(frozen=True)
class Candidate:
    series_id: int
    series_key: str
    model_name: str
    model_version: str


def wants_rerun(c: Candidate, name: str, version: str, *, only_outdated: bool) -> bool:
    """Whether a series' current result should be re-run with model ``name`` ``version``."""
    if (c.model_name, c.model_version) == (name, version):
        return False
    if only_outdated:
        return version_key(c.model_version) < version_key(version)
    return True


def candidates(ledger: Ledger, since: float | None) -> list[Candidate]:
    """Series whose current result is done, latest revision only, optionally arrived since."""
    rows = ledger.query(
        """SELECT r.series_id, s.series_key, r.model_name, r.model_version FROM results r
           JOIN series s ON s.id = r.series_id
           WHERE r.current = 1 AND s.first_seen >= ?
             AND s.revision = (SELECT MAX(t.revision) FROM series t
                               WHERE t.study_uid = s.study_uid AND t.series_uid = s.series_uid)
           ORDER BY r.series_id""",
        (since if since is not None else float("-inf"),),
    )
    return [Candidate(int(r[0]), r[1] or "", r[2], r[3]) for r in rows]


def queue_reruns(
    ledger: Ledger,
    name: str,
    version: str,
    *,
    now: float,
    since: float | None = None,
    only_outdated: bool = False,
) -> tuple[int, int]:
    """Queue re-run jobs; return (newly queued, already pending) counts."""
    chosen = [
        c
        for c in candidates(ledger, since)
        if wants_rerun(c, name, version, only_outdated=only_outdated)
    ]
    added = pending = 0
    with ledger.transaction() as db:
        for c in chosen:
            (busy,) = db.execute(
                """SELECT COUNT(*) FROM jobs WHERE series_id = ? AND model_name = ?
                   AND model_version = ? AND state IN (?, ?)""",
                (c.series_id, name, version, JobState.QUEUED.value, JobState.RUNNING.value),
            ).fetchone()
            if busy:
                pending += 1
                continue
            db.execute(
                """INSERT INTO jobs (series_id, state, priority, model_name, model_version,
                   created, queued) VALUES (?, ?, ?, ?, ?, ?, ?)""",
                (c.series_id, JobState.QUEUED.value, REPROCESS_PRIORITY, name, version, now, now),
            )
            added += 1
    return added, pending


def requeue_orphans(ledger: Ledger, name: str, version: str, now: float) -> int:
    """Running jobs whose owner is gone (its lock is free) go back to the queue.

    Ownership is by lock, not by pid (:mod:`flairwatch.ledger.owners`); ``name`` and ``version``
    are kept for the callers, every orphan is requeued whoever left it.
    """
    return len(ledger.requeue_orphans(now))


def claim_rerun(ledger: Ledger, name: str, version: str, pid: int, now: float) -> JobRow | None:
    """Take the oldest queued re-run job for this model (never a new arrival's job).

    The job is owned by this process's run lock, so the daemon requeues it only if we die.
    """
    return ledger.claim_next(now, name, version, pid, max_priority=-1)


def remaining(ledger: Ledger, name: str, version: str) -> int:
    (n,) = ledger.query(
        "SELECT COUNT(*) FROM jobs WHERE state IN (?, ?) AND priority < 0"
        " AND model_name = ? AND model_version = ?",
        (JobState.QUEUED.value, JobState.RUNNING.value, name, version),
    )[0]
    return int(n)


def arrivals_waiting(ledger: Ledger, now: float) -> bool:
    """A live daemon has new series (priority >= 0) queued or running."""
    beat = ledger.heartbeat()
    if not beat or beat["state"] != "running" or now - beat["beat"] > HEARTBEAT_FRESH_SECONDS:
        return False
    (n,) = ledger.query(
        "SELECT COUNT(*) FROM jobs WHERE priority >= 0 AND state IN (?, ?)",
        (JobState.QUEUED.value, JobState.RUNNING.value),
    )[0]
    return int(n) > 0


class Progress:
    """Progress with ETA: a redrawn bar on a terminal, plain lines otherwise (logs)."""

    def __init__(self, total: int, stream: TextIO, *, tty: bool, clock: Callable[[], float]):
        self.total, self.stream, self.tty, self.clock = total, stream, tty, clock
        self.start = clock()
        self.done = 0

    def eta_seconds(self) -> float | None:
        if self.done == 0:
            return None
        rate = (self.clock() - self.start) / self.done
        return rate * max(0, self.total - self.done)

    def text(self, label: str) -> str:
        eta = self.eta_seconds()
        eta_text = "--:--:--" if eta is None else time.strftime("%H:%M:%S", time.gmtime(eta))
        return f"{self.done}/{self.total} {label} ETA {eta_text}"

    def step(self, label: str) -> None:
        self.done += 1
        if self.tty:
            width = 30
            filled = int(width * self.done / max(1, self.total))
            bar = "#" * filled + "-" * (width - filled)
            self.stream.write(f"\r[{bar}] {self.text(label)}\033[K")
            if self.done >= self.total:
                self.stream.write("\n")
        else:
            self.stream.write(f"reprocess {self.text(label)}\n")
        self.stream.flush()


def _load_series(ledger: Ledger, job: JobRow) -> Any:
    paths = [Path(f.path) for f in ledger.revision_files(job.series_id)]
    found, _ = group_series(read_record(p) for p in paths if p.is_file())
    for s in found:
        if s.key == (job.study_uid, job.series_uid):
            return s
    raise InputRejected(
        "its input files are no longer where the ledger recorded them; restore them to re-run"
    )


def run_one(
    ledger: Ledger, engine: Any, cfg: Config, secret: bytes, job: JobRow, now: float
) -> str:
    """Process one claimed job; returns 'done' or the failed state's name."""
    assert cfg.results is not None
    start = time.monotonic()
    try:
        series = _load_series(ledger, job)
        out = engine.process(series, cfg.results, secret=secret, revision=job.revision)
    except KeyboardInterrupt:
        ledger.move_job(job.id, [JobState.RUNNING], JobState.QUEUED, time.time(), worker_pid=None)
        raise
    except (FlairwatchError, OSError) as exc:
        transient = isinstance(exc, StageFailed) and exc.transient
        if transient and job.attempts < MAX_ATTEMPTS:
            ledger.move_job(job.id, [JobState.RUNNING], JobState.QUEUED, now, error=str(exc),
                            not_before=now + RETRY_SECONDS)  # fmt: skip
            return "retry"
        state = JobState.REFUSED if isinstance(exc, InputRejected) else JobState.FAILED
        ledger.move_job(job.id, [JobState.RUNNING], state, now, error=str(exc))
        log.error("series job %d: %s: %s", job.id, state.value, exc)
        return state.value
    ledger.finish_done(
        job.id, str(out.result_dir), out.summary, adopted=out.adopted,
        seconds=time.monotonic() - start, now=time.time(),
    )  # fmt: skip
    results.set_current(out.result_dir.parent, out.result_dir.name)
    return "done"


def change_rows(
    ledger: Ledger, series_ids: Sequence[int], name: str, version: str, limits: Limits,
    connectivity: int,
) -> list[dict[str, Any]]:  # fmt: skip
    """Rows comparing each series' newest result of the model with the result before it."""
    rows = []
    for sid in series_ids:
        recs = results_of_series(ledger, sid)
        new = [r for r in recs if (r.model_name, r.model_version) == (name, version)]
        if not new:
            continue
        latest = new[-1]
        older = [r for r in recs if r.result_id < latest.result_id
                 and (r.model_name, r.model_version) != (name, version)]  # fmt: skip
        if not older:
            continue
        old = older[-1]
        try:
            change = compare_folders(Path(old.result_path), Path(latest.result_path), connectivity)
        except (FlairwatchError, OSError, ValueError) as exc:
            log.warning("series %s not compared: %s", latest.series_key, exc)
            continue
        ids = {
            "subject_key": latest.subject_key, "study_key": latest.study_key,
            "series_key": latest.series_key,
            "old_model": f"{old.model_name} {old.model_version}",
            "new_model": f"{name} {version}",
            "old_result_path": old.result_path, "new_result_path": latest.result_path,
        }  # fmt: skip
        rows.append(change_row(ids, change, limits, has_correction=bool(latest.correction_path)))
    return rows
