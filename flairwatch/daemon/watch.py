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
4. every few seconds (:meth:`Daemon.supervise`): heartbeat row, watcher health check, a paused
   dispatch resumed when disk space is back, and any running job that no live owner holds put
   back in the queue; the self-check (:mod:`flairwatch.daemon.canary`) started when due.

The daemon owns its jobs through the state folder's lock (:mod:`flairwatch.ledger.owners`), not
through process ids. After ``kill -9`` at any moment a restart (:mod:`flairwatch.daemon.reconcile`)
requeues the jobs that were running without counting them against their series, removes
half-built result folders, repairs pointer files, and a finished folder the ledger missed is
adopted (when its fingerprint matches), not recomputed.
"""

from __future__ import annotations

import contextlib
import logging
import os
import queue
import signal
from collections.abc import Callable, Iterator
from pathlib import Path
from types import FrameType
from typing import Any

from flairwatch import keys
from flairwatch.config import Config
from flairwatch.daemon.canary import CanaryRunner
from flairwatch.daemon.dispatch import Dispatcher
from flairwatch.daemon.inbox import InboxScanner
from flairwatch.daemon.inputs import InboxFiles
from flairwatch.daemon.observe import InboxObserver
from flairwatch.daemon.reconcile import reconcile
from flairwatch.daemon.settle import Intake
from flairwatch.daemon.tuning import Tuning, steady_clock
from flairwatch.daemon.workers import WorkerPool
from flairwatch.errors import ConfigInvalid, FlairwatchError, ModelInvalid
from flairwatch.ledger.owners import DAEMON_LOCK, Owner, new_token, try_lock
from flairwatch.ledger.store import JobState, Ledger

log = logging.getLogger(__name__)

OUTPUT_UMASK = 0o027  # results and ledger: owner and group only
EXIT_OK, EXIT_FAILED, EXIT_INTERRUPTED = 0, 1, 130


@contextlib.contextmanager
def exclusive(state: Path) -> Iterator[Owner]:
    """Hold the state folder's lock: one daemon per ledger, and the owner of its running jobs.

    Yields the run's owner (a fresh token under ``daemon.lock``), written on every job it claims.
    """
    fd = os.open(state / DAEMON_LOCK, os.O_RDWR | os.O_CREAT, 0o640)
    try:
        if not try_lock(fd):  # a re-run may hold it for a moment to see whether we live
            raise ConfigInvalid(
                f"another 'flairwatch watch' already uses state folder {state}; stop it first"
            )
        owner = Owner(new_token(), DAEMON_LOCK)
        os.ftruncate(fd, 0)
        os.write(fd, f"{os.getpid()} {owner.token}\n".encode())
        yield owner
    finally:
        os.close(fd)


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
        clock: Callable[[], float] | None = None,
    ) -> None:
        assert cfg.inbox is not None and cfg.results is not None
        self.cfg, self.ledger, self.secret = cfg, ledger, secret
        self.inbox, self.results = cfg.inbox, cfg.results
        # in-run deadlines (settle, retry, heartbeat) must not jump with the wall clock
        self.once, self.clock = once, clock or steady_clock()
        self.tuning = tuning or Tuning(retry_base_seconds=cfg.retry_seconds)
        self.wakes: queue.SimpleQueue[str] = queue.SimpleQueue()
        self.signals = Signals(self.wakes.put)
        self.files = InboxFiles(cfg, ledger, InboxScanner(self.inbox))
        self.intake = Intake(cfg, ledger, secret, self.files, once=once)
        self.jobs = Dispatcher(cfg, ledger, self.files, self.tuning)
        # the self-check: at start-up and daily, in its own low-priority process (not in --once)
        self.canary = (
            CanaryRunner(cfg, ledger) if cfg.canary.enabled and cfg.state and not once else None
        )

    @property
    def model(self) -> dict[str, Any]:
        return self.jobs.model

    def once_done(self, pool: WorkerPool, now: float) -> bool:
        """--once: every series seen at the first scan has settled and nothing is left to run.

        Left to run: a job a worker of ours holds, or a queued job we could claim now. Jobs of
        a live re-run or of another model are not ours to wait for; running jobs that nobody
        runs are requeued by the supervise tick, so they turn into claimable jobs.
        """
        if not self.intake.once_settled() or pool.busy():
            return False
        model = self.model
        return self.ledger.claimable(now, model["name"], model["version"], min_priority=0) == 0

    def run(self) -> int:
        """Run until stopped (or, with ``once``, until the inbox's series are handled)."""
        started = self.clock()
        reconcile(self.ledger, self.cfg, self.files, started)
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
            if self.canary is not None:
                self.canary.stop()
            pool.stop(at_once=self.signals.count >= 2)
            self.ledger.beat(os.getpid(), "stopped", self.clock())

    def _loop(self, pool: WorkerPool, observer: InboxObserver | None, started: float) -> int:
        last_beat = last_check = 0.0
        last_state = ""
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
            if not draining and not self.intake.inbox_away():
                self.jobs.dispatch(pool, self.intake.last_scan, now)
            for _slot, report in pool.poll(max(0.0, min(0.25, self.intake.next_scan - now))):
                if report.kind == "init_failed":  # the pool retries it with back-off
                    log.error("a worker could not start: %s", report.message)
                    continue
                now = self.clock()
                if self.jobs.record(report, now):  # a finished series: look at the inbox soon
                    soon = now + self.tuning.event_delay_seconds
                    self.intake.next_scan = min(self.intake.next_scan, soon)
            now = self.clock()
            state = "stopping" if draining else self._pause_state() or "running"
            if now - last_beat >= self.tuning.heartbeat_seconds or state != last_state:
                self.ledger.beat(os.getpid(), state, now, inbox=str(self.inbox), started=started)
                last_beat, last_state = now, state
            if now - last_check >= self.tuning.supervise_seconds:
                self.supervise(pool, observer, now)
                last_check = now
            if self.once and not draining and self.once_done(pool, now):
                return EXIT_FAILED if self.jobs.unfinished or self._retry_pending() else EXIT_OK

    def _pause_state(self) -> str | None:
        """The heartbeat state while dispatch waits for a person (status shows the reason)."""
        if self.jobs.paused is not None:
            return "paused: no space left on the results disk; free some space"
        if self.intake.inbox_missing:
            return "paused: the inbox folder is missing (unmounted share?); check the inbox"
        if self.intake.lost_since is not None:
            return "paused: most inbox files vanished (unmounted share?); check the inbox"
        return None

    def supervise(self, pool: WorkerPool, observer: InboxObserver | None, now: float) -> None:
        """The periodic check: the watcher lives, and every running job has a live owner.

        A running job of ours that no worker holds, or one whose owner's lock is free (a re-run
        that died), goes back to the queue without counting against its series.
        """
        if observer is not None:
            observer.check()
        self.jobs.check_space()
        if self.canary is not None and not pool.closing:
            self.canary.tick()
        held = {s.job_id for s in pool.busy() if s.job_id is not None}
        for job_id in self.ledger.requeue_orphans(now, held=held):
            row = self.ledger.series(self.ledger.job(job_id).series_id)
            log.warning("series %s: its job was running with no live owner; queued again",
                        row.series_key)  # fmt: skip

    def _retry_pending(self) -> bool:
        # a retry of ours is pending (re-runs of the archive are not this run's business)
        return any(j.attempts > 0 and j.priority >= 0 for j in self.ledger.jobs_in(JobState.QUEUED))


# ---- entry ------------------------------------------------------------------------------


def serve(cfg: Config, *, once: bool = False) -> int:
    """Take the state folder's lock, open the ledger and run the daemon until it stops.

    ``cfg.inbox``, ``cfg.results`` and ``cfg.state`` must be set (the command line checks them).
    """
    assert cfg.inbox is not None and cfg.results is not None and cfg.state is not None
    os.umask(OUTPUT_UMASK)
    cfg.results.mkdir(parents=True, exist_ok=True)
    cfg.state.mkdir(parents=True, exist_ok=True)
    with exclusive(cfg.state) as owner, Ledger.open(cfg.state) as ledger:
        ledger.take_ownership(owner)
        secret = keys.load_or_create_secret(cfg.state)
        return Daemon(cfg, ledger, secret, once=once).run()
