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
import signal
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from types import FrameType
from typing import Any

from flairwatch import keys
from flairwatch.config import Config
from flairwatch.daemon.dispatch import Dispatcher
from flairwatch.daemon.inbox import InboxScanner
from flairwatch.daemon.inputs import InboxFiles
from flairwatch.daemon.observe import InboxObserver
from flairwatch.daemon.settle import Intake
from flairwatch.daemon.tuning import Tuning
from flairwatch.daemon.workers import WorkerPool
from flairwatch.engine import results
from flairwatch.errors import ConfigInvalid, FlairwatchError, ModelInvalid
from flairwatch.ledger.store import JobState, Ledger

log = logging.getLogger(__name__)

LOCK_FILE = "daemon.lock"
OUTPUT_UMASK = 0o027  # results and ledger: owner and group only
EXIT_OK, EXIT_FAILED, EXIT_INTERRUPTED = 0, 1, 130


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
    """The watch loop over one inbox, one results folder and one ledger.

    The intake half (:class:`~flairwatch.daemon.settle.Intake`) scans and settles series; the job
    half (:class:`~flairwatch.daemon.dispatch.Dispatcher`) feeds workers and records outcomes.
    """

    def __init__(
        self,
        cfg: Config,
        ledger: Ledger,
        secret: bytes,
        *,
        once: bool = False,
        tuning: Tuning | None = None,
        clock: Callable[[], float] = time.time,
    ) -> None:
        assert cfg.inbox is not None and cfg.results is not None
        self.cfg, self.ledger, self.secret = cfg, ledger, secret
        self.inbox, self.results = cfg.inbox, cfg.results
        self.once, self.tuning, self.clock = once, tuning or Tuning(), clock
        self.wakes: queue.SimpleQueue[str] = queue.SimpleQueue()
        self.signals = Signals(self.wakes.put)
        self.files = InboxFiles(cfg, ledger, InboxScanner(self.inbox))
        self.intake = Intake(cfg, ledger, secret, self.files, once=once)
        self.jobs = Dispatcher(cfg, ledger, self.files, self.tuning)

    @property
    def model(self) -> dict[str, Any]:
        return self.jobs.model

    def once_done(self, now: float) -> bool:
        """--once: every series seen at the first scan has settled and nothing is runnable."""
        if not self.intake.once_settled():
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
                self.jobs.model = pool.start()
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
                self.intake.next_scan = min(self.intake.next_scan, now + soon)
            if not draining and now >= self.intake.next_scan:
                self.intake.scan(now)
            if not draining:
                self.jobs.dispatch(pool, self.intake.last_scan, now)
            for _slot, report in pool.poll(max(0.0, min(0.25, self.intake.next_scan - now))):
                if report.kind == "init_failed":
                    raise ModelInvalid(f"a worker could not start: {report.message}")
                now = self.clock()
                if self.jobs.record(report, now):  # a finished series: look at the inbox soon
                    soon = now + self.tuning.event_delay_seconds
                    self.intake.next_scan = min(self.intake.next_scan, soon)
            now = self.clock()
            if now - last_beat >= self.tuning.heartbeat_seconds:
                state = "stopping" if draining else "running"
                self.ledger.beat(os.getpid(), state, now, inbox=str(self.inbox), started=started)
                last_beat = now
            if observer is not None and now - last_check >= self.tuning.supervise_seconds:
                observer.check()
                last_check = now
            if self.once and not draining and self.once_done(now):
                return EXIT_FAILED if self.jobs.unfinished or self._retry_pending() else EXIT_OK

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
