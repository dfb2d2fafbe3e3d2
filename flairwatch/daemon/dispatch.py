"""The daemon's job half: hand queued jobs to idle workers and record what workers report.

done: recorded after the result folder is durably in place, then the series folder points at it
and the gallery is refreshed; refused: bad input, files left in place or moved to quarantine;
failed: retried with exponential back-off when transient, recorded for good otherwise.
"""

from __future__ import annotations

import logging
import os
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from flairwatch.config import Config
from flairwatch.daemon.inbox import Scan, revision_series
from flairwatch.daemon.inputs import InboxFiles
from flairwatch.daemon.reconcile import fix_pointers
from flairwatch.daemon.tuning import Tuning, retry_delay
from flairwatch.daemon.workers import NO_SPACE_ERRNOS, Report, Task, WorkerPool
from flairwatch.engine import results
from flairwatch.ledger.store import JobRow, JobState, Ledger
from flairwatch.research.gallery import GALLERY_FOLDER, refresh_study

log = logging.getLogger("flairwatch.daemon.watch")

RESUME_FREE_BYTES = 64 << 20  # this much free on the results disk ends a pause for space...
RESUME_GAIN_BYTES = 1 << 20  # ...or this much more than when it filled up


def free_bytes(folder: Path) -> int:
    """Bytes an unprivileged process may still write on the file system of ``folder``."""
    st = os.statvfs(folder)
    return st.f_bavail * st.f_frsize


class Dispatcher:
    """Claims jobs for workers and records their outcomes in the ledger."""

    def __init__(self, cfg: Config, ledger: Ledger, files: InboxFiles, tuning: Tuning) -> None:
        assert cfg.results is not None
        self.cfg, self.ledger, self.files, self.tuning = cfg, ledger, files, tuning
        self.results = cfg.results
        self.model: dict[str, Any] = {}
        self.unfinished = 0  # series of this run that failed or were refused
        self.paused: str | None = None  # why dispatch waits (a full results disk), if it does
        self.pointers_stale = False  # a pointer or gallery page could not be written
        self._free_at_pause = 0
        self.free_bytes: Callable[[Path], int] = free_bytes

    def check_space(self) -> None:
        """While paused for a full disk: resume once space came back (checked every few s).

        Space "came back" when at least :data:`RESUME_GAIN_BYTES` more is free than when the
        disk filled up, or :data:`RESUME_FREE_BYTES` is free; should a series fill it again,
        dispatch pauses again at no cost to that series' attempts.
        """
        if self.paused is None:
            return
        free = self.free_bytes(self.results)
        if free >= min(RESUME_FREE_BYTES, self._free_at_pause + RESUME_GAIN_BYTES):
            log.warning("results disk has %d MiB free again: dispatch resumes", free >> 20)
            self.paused = None
            if self.pointers_stale:
                self.pointers_stale = False
                fix_pointers(self.ledger, self.cfg, time.time())

    def _pause_for_space(self, label: str | None, message: str) -> None:
        if self.paused is None:  # log the condition once, not for every series that meets it
            self._free_at_pause = self.free_bytes(self.results)
            log.error("series %s: %s; dispatch paused until space is free on the results disk "
                      "(%s); queued series wait, none counts as failed", label, message,
                      self.results)  # fmt: skip
        self.paused = f"no space left for results in {self.results}"

    def dispatch(self, pool: WorkerPool, scan: Scan | None, now: float) -> None:
        if self.paused is not None:
            return
        for slot in pool.idle():
            job = self.ledger.claim_next(
                now,
                self.model["name"],
                self.model["version"],
                slot.process.pid or 0,
                min_priority=0,  # archive re-runs (negative priority) belong to 'reprocess'
            )
            if job is None:
                return
            scanned = scan.series.get((job.study_uid, job.series_uid)) if scan else None
            paths = {f.path for f in self.ledger.revision_files(job.series_id)}
            series = revision_series(scanned, paths) if scanned else None
            label = self.ledger.series(job.series_id).series_key
            if series is None:
                self._finish_bad(job, "its files are no longer in the inbox", now, quarantine=False)
                continue
            if not pool.submit(slot, Task(job.id, series, job.revision)):
                self.ledger.give_back(job.id, now)  # the worker was exiting: not an attempt
                log.warning("series %s: worker %d was exiting; queued again", label, slot.index)
                continue
            log.info("series %s: running (attempt %d)", label, job.attempts)

    def record(self, report: Report, now: float) -> bool:
        """Record a worker's report; True when it ended a job (the inbox may need a rescan)."""
        if report.kind not in ("done", "refused", "failed", "crashed"):
            return False
        job = self.ledger.job(report.job_id)
        label = self.ledger.series(job.series_id).series_key
        mine = self.ledger.owner.token if self.ledger.owner else None
        if job.state is not JobState.RUNNING or job.owner not in (None, mine):
            # requeued behind our back (a supervise check found no holder): the next run counts
            log.warning("series %s: a report on a job this run no longer holds (%s); ignored",
                        label, job.state.value)  # fmt: skip
            return True
        if report.kind == "done":
            if not self.ledger.finish_done(
                job.id, report.result_dir, report.summary, adopted=report.adopted,
                seconds=report.seconds, now=now, rss_kb=report.rss_kb,
            ):  # fmt: skip
                log.warning("series %s: another run holds the job now; its result is left to it",
                            label)  # fmt: skip
                return True
            log.info(
                "series %s: done in %.1f s%s, WMH %s mL, worker RSS %d MiB",
                label, report.seconds, " (adopted)" if report.adopted else "",
                report.summary.get("lesion_volume_ml"), report.rss_kb // 1024,
            )  # fmt: skip
            # the daemon's own model is the current one: point the series folder at it
            version_dir = Path(report.result_dir)
            try:
                results.set_current(version_dir.parent, version_dir.name)
                refresh_study(
                    self.ledger, self.results / GALLERY_FOLDER, job.series_id,
                    connectivity=self.cfg.connectivity, longitudinal=self.cfg.longitudinal,
                    now=now,
                )  # fmt: skip
            except OSError as exc:  # the result is safe and recorded; the pointer can wait
                self.pointers_stale = True
                log.warning("series %s: pointer or gallery not written (%s); fixed when space "
                            "returns or at the next start", label, exc.strerror or exc)  # fmt: skip
                if exc.errno in NO_SPACE_ERRNOS:
                    self._pause_for_space(label, exc.strerror or str(exc))
            self.files.delete(job.series_id)
            return True
        if report.no_space:  # a full disk is not the series' fault: wait, uncounted
            self.ledger.give_back(job.id, now, error=f"waiting for disk space: {report.message}")
            self._pause_for_space(label, report.message)
            return True
        transient = report.kind == "crashed" or report.transient
        if transient and job.attempts < self.tuning.max_attempts:
            delay = retry_delay(job.attempts, self.tuning)
            self.ledger.move_job(
                job.id, [JobState.RUNNING], JobState.QUEUED, now,
                error=report.message, not_before=now + delay,
            )  # fmt: skip
            log.warning("series %s: %s; retry in %.3g s", label, report.message, delay)
            return True
        message = report.message
        if transient:
            message = f"gave up after {job.attempts} attempts: {message}"
        self._finish_bad(job, message, now, refused=report.kind == "refused")
        return True

    def _finish_bad(
        self, job: JobRow, message: str, now: float, *, refused: bool = True,
        quarantine: bool = True,
    ) -> None:  # fmt: skip
        state = JobState.REFUSED if refused else JobState.FAILED
        self.ledger.move_job(job.id, [JobState.RUNNING], state, now, error=message)
        label = self.ledger.series(job.series_id).series_key
        log.error("series %s: %s: %s", label, state.value, message)
        self.unfinished += 1
        if quarantine and self.cfg.quarantine is not None:
            self.files.quarantine(job)
