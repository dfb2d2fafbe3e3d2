"""``flairwatch watch``: the daemon that turns arriving DICOM series into results, exactly once.

One main thread owns the ledger and makes every decision; a watchdog thread only wakes it, and
worker processes only compute. The loop:

1. scan the inbox (at start-up, on a hint from the watcher, when a settling series may be ready,
   and every ``rescan_seconds``), record the files, and move each series one step
   (:func:`flairwatch.daemon.inbox.plan`): new revision, still changing, settled -> queued or skipped;
2. hand queued jobs to idle workers (priority first, then age);
3. record what workers report: done (after the result folder is durably in place), refused
   (bad input, files left in place or moved to quarantine), failed (retried with exponential
   back-off when transient, recorded for good otherwise);
4. every few seconds: heartbeat row, watcher health check.

After ``kill -9`` at any moment a restart removes half-built result folders, puts jobs that were
running back in the queue, and a finished folder the ledger missed is adopted, not recomputed.
"""

from __future__ import annotations

import contextlib
import fcntl
import logging
import os
import queue
import shutil
import signal
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, replace
from pathlib import Path
from types import FrameType
from typing import Any

from flairwatch import keys
from flairwatch.config import Config
from flairwatch.daemon.inbox import (
    InboxScanner,
    Known,
    Scan,
    Step,
    file_rows,
    plan,
    revision_series,
    signature,
)
from flairwatch.daemon.observe import InboxObserver
from flairwatch.daemon.workers import DEFAULT_TASKS_PER_WORKER, Report, Task, WorkerPool
from flairwatch.engine import results
from flairwatch.errors import ConfigInvalid, FlairwatchError, InputRejected, ModelInvalid
from flairwatch.intake.select import select_series
from flairwatch.ledger.store import TERMINAL_STATES, FileRow, JobRow, JobState, Ledger
from flairwatch.records import Series
from flairwatch.research.gallery import GALLERY_FOLDER, refresh_study

log = logging.getLogger(__name__)

LOCK_FILE = "daemon.lock"
OUTPUT_UMASK = 0o027  # results and ledger: owner and group only
EXIT_OK, EXIT_FAILED, EXIT_INTERRUPTED = 0, 1, 130


@dataclass(frozen=True)
class Tuning:
    """Daemon timings that are not config keys (tests shorten them)."""

    heartbeat_seconds: float = 5.0
    supervise_seconds: float = 2.0  # watcher health check (cheap: a stat and thread checks)
    event_delay_seconds: float = 0.5  # gather a burst of events into one scan
    max_attempts: int = 5
    retry_base_seconds: float = 30.0
    retry_max_seconds: float = 3600.0
    tasks_per_worker: int = DEFAULT_TASKS_PER_WORKER


def retry_delay(attempts: int, tuning: Tuning) -> float:
    """Seconds before retry number ``attempts`` (1, 2, ...): base * 2^(n-1), capped."""
    return float(min(tuning.retry_max_seconds, tuning.retry_base_seconds * 2 ** (attempts - 1)))


@contextlib.contextmanager
def exclusive(state: Path) -> Iterator[None]:
    """Hold the state folder's lock: one daemon per ledger."""
    fd = os.open(state / LOCK_FILE, os.O_RDWR | os.O_CREAT, 0o640)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise ConfigInvalid(
                f"another 'flairwatch watch' already uses state folder {state}; stop it first"
            ) from None
        os.ftruncate(fd, 0)
        os.write(fd, f"{os.getpid()}\n".encode())
        yield
    finally:
        os.close(fd)


def _process_alive(pid: int) -> bool:
    """Whether a process with this id runs on this machine (ours or not)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _unchanged(row: FileRow | None) -> FileRow | None:
    """A ledger row as a scan would produce it (a scan does not know revisions)."""
    return None if row is None else replace(row, series_id=None)


class Signals:
    """First SIGTERM/SIGINT: finish running series, then stop. Second: stop at once."""

    def __init__(self, wake: Callable[[str], None]) -> None:
        self.count = 0
        self._wake = wake

    def install(self) -> None:
        signal.signal(signal.SIGTERM, self._handle)
        signal.signal(signal.SIGINT, self._handle)

    def _handle(self, signum: int, frame: FrameType | None) -> None:
        self.count += 1
        self._wake(f"signal {signum}")


class Daemon:
    """The watch loop over one inbox, one results folder and one ledger."""

    def __init__(
        self,
        cfg: Config,
        ledger: Ledger,
        secret: bytes,
        *,
        once: bool = False,
        tuning: Tuning = Tuning(),
        clock: Callable[[], float] = time.time,
    ) -> None:
        assert cfg.inbox is not None and cfg.results is not None
        self.cfg, self.ledger, self.secret = cfg, ledger, secret
        self.inbox, self.results = cfg.inbox, cfg.results
        self.once, self.tuning, self.clock = once, tuning, clock
        self.wakes: queue.SimpleQueue[str] = queue.SimpleQueue()
        self.signals = Signals(self.wakes.put)
        self.scanner = InboxScanner(self.inbox)
        self.last_scan: Scan | None = None
        self.model: dict[str, Any] = {}
        self.next_scan = 0.0
        self.once_targets: set[tuple[str, str]] = set()
        self.unfinished = 0  # series of this run that failed or were refused

    # ---- scanning and settling --------------------------------------------------------

    def scan(self, now: float) -> None:
        try:
            scan = self.scanner.scan()
        except InputRejected:
            log.warning("inbox %s is missing; will look again", self.inbox)
            self.next_scan = now + self.cfg.rescan_seconds
            return
        known = self.ledger.known_files()
        changed = [r for r in file_rows(scan) if _unchanged(known.get(r.path)) != r]
        for row in changed:
            if row.reason and row.path not in known:
                log.info("ignored %s: %s", row.path, row.reason)
        # gone = known to the ledger and not found now (also files removed while we were down)
        self.ledger.record_scan(changed, [p for p in known if p not in scan.records], now)
        self.last_scan = scan
        log.debug("scan: %d files (%d read), %d series, %d unusable, %d gone",
                  len(scan.records), scan.read, len(scan.series), len(scan.unusable),
                  len(scan.gone))  # fmt: skip
        deadline = now + self.cfg.rescan_seconds
        for key, series in scan.series.items():
            settle_at = self._step(key, series, now)
            if settle_at is not None:
                deadline = min(deadline, settle_at + 0.05)
        if not self.once_targets and self.once:
            self.once_targets = set(scan.series)
        self.next_scan = deadline

    def _step(self, key: tuple[str, str], series: Series, now: float) -> float | None:
        """Move one series a step; returns when it may be settled, if it is settling."""
        latest = self.ledger.latest_revision(*key)
        job = self.ledger.latest_job(latest.id) if latest else None
        known = None
        if latest is not None and job is not None:
            taken = self.ledger.known_sops(*key) if job.state in TERMINAL_STATES else set()
            known = Known(job.state, latest.signature, latest.stable_since, frozenset(taken))
        step = plan(series, known, now, self.cfg.settle_seconds)
        sig = signature(series)
        if step is Step.NEW_REVISION:
            header = series.header
            row, job = self.ledger.new_revision(
                *key,
                lambda r: (
                    keys.subject_key(header.patient_id, self.secret),
                    keys.study_key(key[0]),
                    keys.series_key(key[1], r),
                ),
                now,
            )
            self.ledger.note_signature(row.id, sig, len(series.files), now, now)
            what = "arriving" if row.revision == 1 else "late instance, new revision"
            log.info("series %s: %s (%d files)", row.series_key, what, len(series.files))
            return now + self.cfg.settle_seconds
        assert latest is not None and job is not None
        if step is Step.CHANGED:
            self.ledger.note_signature(latest.id, sig, len(series.files), now, now)
            return now + self.cfg.settle_seconds
        if step is Step.WAIT:
            return (latest.stable_since or now) + self.cfg.settle_seconds
        if step is Step.SETTLED:
            self._settled(latest.id, latest.series_key or "", key, series, job, now)
        return None

    def _settled(
        self, series_id: int, label: str, key: tuple[str, str], series: Series, job: JobRow,
        now: float,
    ) -> None:  # fmt: skip
        self.ledger.take_files(series_id, *key)
        choice = select_series(series.header, self.cfg.select)
        self.ledger.set_selection(series_id, choice.selected, choice.rule, choice.reason)
        if choice.selected:
            self.ledger.move_job(job.id, [JobState.SETTLING], JobState.QUEUED, now)
            log.info("series %s: settled, %d files, queued (%s)", label, len(series.files),
                     choice.rule)  # fmt: skip
            return
        self.ledger.move_job(job.id, [JobState.SETTLING], JobState.SKIPPED, now)
        log.info("series %s: skipped by rule %s: %s", label, choice.rule, choice.reason)
        self._delete_inputs(series_id)

    # ---- jobs ---------------------------------------------------------------------------

    def dispatch(self, pool: WorkerPool, now: float) -> None:
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
            scanned = self.last_scan.series.get((job.study_uid, job.series_uid)) if (
                self.last_scan) else None  # fmt: skip
            paths = {f.path for f in self.ledger.revision_files(job.series_id)}
            series = revision_series(scanned, paths) if scanned else None
            label = self.ledger.series(job.series_id).series_key
            if series is None:
                self._finish_bad(job, "its files are no longer in the inbox", now, quarantine=False)
                continue
            log.info("series %s: running (attempt %d)", label, job.attempts)
            pool.submit(slot, Task(job.id, series, job.revision))

    def record(self, report: Report, now: float) -> None:
        if report.kind not in ("done", "refused", "failed", "crashed"):
            return
        job = self.ledger.job(report.job_id)
        label = self.ledger.series(job.series_id).series_key
        self.next_scan = min(self.next_scan, now + self.tuning.event_delay_seconds)
        if report.kind == "done":
            self.ledger.finish_done(
                job.id, report.result_dir, report.summary, adopted=report.adopted,
                seconds=report.seconds, now=now, rss_kb=report.rss_kb,
            )  # fmt: skip
            log.info(
                "series %s: done in %.1f s%s, WMH %s mL, worker RSS %d MiB",
                label, report.seconds, " (adopted)" if report.adopted else "",
                report.summary.get("lesion_volume_ml"), report.rss_kb // 1024,
            )  # fmt: skip
            # the daemon's own model is the current one: point the series folder at it
            version_dir = Path(report.result_dir)
            results.set_current(version_dir.parent, version_dir.name)
            refresh_study(
                self.ledger, self.results / GALLERY_FOLDER, job.series_id,
                connectivity=self.cfg.connectivity, now=now,
            )  # fmt: skip
            self._delete_inputs(job.series_id)
            return
        transient = report.kind == "crashed" or report.transient
        if transient and job.attempts < self.tuning.max_attempts:
            delay = retry_delay(job.attempts, self.tuning)
            self.ledger.move_job(
                job.id, [JobState.RUNNING], JobState.QUEUED, now,
                error=report.message, not_before=now + delay,
            )  # fmt: skip
            log.warning("series %s: %s; retry in %.0f s", label, report.message, delay)
            return
        message = report.message
        if transient:
            message = f"gave up after {job.attempts} attempts: {message}"
        self._finish_bad(job, message, now, refused=report.kind == "refused")

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
            self._quarantine(job)

    def _quarantine(self, job: JobRow) -> None:
        """Move a refused series' files out of the inbox, keeping their relative paths."""
        assert self.cfg.quarantine is not None
        row = self.ledger.series(job.series_id)
        target = self.cfg.quarantine / (row.study_key or "unknown") / (row.series_key or "unknown")
        moved = []
        for f in self.ledger.revision_files(job.series_id):
            src = Path(f.path)
            try:
                dst = target / src.relative_to(self.inbox)
            except ValueError:
                dst = target / src.name
            try:
                dst.parent.mkdir(parents=True, exist_ok=True, mode=0o750)
                if dst.exists():
                    dst = dst.with_name(f"{dst.name}.{job.id}")
                shutil.move(src, dst)
                moved.append(f.path)
            except OSError as exc:
                log.warning("could not move %s to quarantine: %s; left in place", src, exc)
        self.scanner.forget(moved)
        log.info("series %s: %d files moved to %s", row.series_key, len(moved), target)

    def _delete_inputs(self, series_id: int) -> None:
        if not self.cfg.delete_inbox_files:
            return
        files: list[FileRow] = self.ledger.revision_files(series_id)
        for f in files:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(f.path)
        self.scanner.forget(f.path for f in files)

    # ---- the loop -----------------------------------------------------------------------

    def once_done(self, now: float) -> bool:
        """--once: every series seen at the first scan has settled and nothing is runnable."""
        scan = self.last_scan
        if scan is None:
            return False
        for key in self.once_targets & set(scan.series):
            row = self.ledger.latest_revision(*key)
            job = self.ledger.latest_job(row.id) if row else None
            if job is None or job.state is JobState.SETTLING:
                return False
        runnable = [
            j
            for j in self.ledger.jobs_in(JobState.QUEUED, JobState.RUNNING)
            if j.state is JobState.RUNNING or j.not_before <= now
        ]
        return not runnable

    def run(self) -> int:
        """Run until stopped (or, with ``once``, until the inbox's series are handled)."""
        started = self.clock()
        results.remove_incomplete(self.results)  # logs each folder it removes
        again = self.ledger.requeue_running(started, alive=_process_alive)
        if again:
            log.warning("%d series were running when the daemon stopped; queued again", len(again))
        pool = WorkerPool(
            self.cfg, self.secret, self.cfg.workers, tasks_per_worker=self.tuning.tasks_per_worker
        )
        observer = None
        self.signals.install()  # a stop signal during start-up ends the run cleanly
        try:
            try:
                self.model = pool.start()
            except FlairwatchError as exc:
                raise ModelInvalid(str(exc)) from None
            log.info("model %s %s ready in %d worker(s)", self.model.get("name"),
                     self.model.get("version"), self.cfg.workers)  # fmt: skip
            if not (self.cfg.polling or self.once):
                observer = InboxObserver(self.inbox, self.wakes.put)
                observer.start()
            return self._loop(pool, observer, started)
        finally:
            if observer is not None:
                observer.stop()
            pool.stop(at_once=self.signals.count >= 2)
            self.ledger.beat(os.getpid(), "stopped", self.clock())

    def _loop(self, pool: WorkerPool, observer: InboxObserver | None, started: float) -> int:
        last_beat = last_check = 0.0
        draining = False
        while True:
            now = self.clock()
            if self.signals.count >= 2:
                log.warning("second stop signal: stopping at once")
                return EXIT_INTERRUPTED
            if self.signals.count == 1 and not draining:
                draining, pool.closing = True, True
                log.info("stop signal: finishing %d running series", len(pool.busy()))
            if draining and not pool.busy():
                return EXIT_INTERRUPTED if self.once else EXIT_OK
            while not self.wakes.empty():
                reason = self.wakes.get_nowait()
                soon = 0.0 if reason != "event" else self.tuning.event_delay_seconds
                if reason != "event":
                    log.info("rescan: %s", reason)
                self.next_scan = min(self.next_scan, now + soon)
            if not draining and now >= self.next_scan:
                self.scan(now)
            if not draining:
                self.dispatch(pool, now)
            for _slot, report in pool.poll(max(0.0, min(0.25, self.next_scan - now))):
                if report.kind == "init_failed":
                    raise ModelInvalid(f"a worker could not start: {report.message}")
                self.record(report, self.clock())
            now = self.clock()
            if now - last_beat >= self.tuning.heartbeat_seconds:
                state = "stopping" if draining else "running"
                self.ledger.beat(os.getpid(), state, now, inbox=str(self.inbox), started=started)
                last_beat = now
            if observer is not None and now - last_check >= self.tuning.supervise_seconds:
                observer.check()
                last_check = now
            if self.once and not draining and self.once_done(now):
                return EXIT_FAILED if self.unfinished or self._retry_pending() else EXIT_OK

    def _retry_pending(self) -> bool:
        return any(j.attempts > 0 for j in self.ledger.jobs_in(JobState.QUEUED))


# ---- entry ------------------------------------------------------------------------------


def serve(cfg: Config, *, once: bool = False) -> int:
    """Take the state folder's lock, open the ledger and run the daemon until it stops.

    ``cfg.inbox``, ``cfg.results`` and ``cfg.state`` must be set (the command line checks them).
    """
    assert cfg.inbox is not None and cfg.results is not None and cfg.state is not None
    os.umask(OUTPUT_UMASK)
    cfg.results.mkdir(parents=True, exist_ok=True)
    cfg.state.mkdir(parents=True, exist_ok=True)
    with exclusive(cfg.state), Ledger.open(cfg.state) as ledger:
        secret = keys.load_or_create_secret(cfg.state)
        return Daemon(cfg, ledger, secret, once=once).run()
