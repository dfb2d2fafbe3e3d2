"""The daemon's side of the self-check (:mod:`flairwatch.research.canary`): when, and where.

The canary runs at start-up and then once a day at ``canary.time`` (local wall-clock time), in
its own child process at a lower CPU priority (``os.nice(10)``) with one inference thread: it
never takes a worker slot and never holds up dispatch. The child records its run in the ledger
itself; when it has ended, the daemon logs the outcome (a drift as a warning that names the
numbers that moved). A child that ended without recording gets a ``failed`` row from the daemon.
``watch --once`` (a batch run) starts no canary.
"""

from __future__ import annotations

import datetime as dt
import logging
import multiprocessing
import os
import time
from collections.abc import Callable
from multiprocessing.process import BaseProcess
from pathlib import Path

from flairwatch.config import Config
from flairwatch.ledger.store import Ledger

log = logging.getLogger(__name__)

NICE_INCREMENT = 10


def next_daily(now: float, hhmm: str) -> float:
    """The next local wall-clock time ``hhmm`` ("HH:MM") strictly after ``now`` (epoch seconds).

    Built from the local calendar date, so a day with a daylight-saving change still runs at
    the stated local time.
    """
    hour, minute = (int(p) for p in hhmm.split(":"))
    today = dt.datetime.fromtimestamp(now)  # naive local time, as the setting is meant
    due = today.replace(hour=hour, minute=minute, second=0, microsecond=0)
    if due.timestamp() <= now:
        due = dt.datetime.combine(due.date() + dt.timedelta(days=1), dt.time(hour, minute))
    return due.timestamp()


def canary_main(cfg: Config, state: str, reason: str) -> None:
    """The child process: lower priority, one run, recorded in the ledger by the child itself."""
    os.nice(NICE_INCREMENT)
    from flairwatch.daemon.workers import limit_memory
    from flairwatch.research.canary import run_canary

    limit_memory(cfg.worker_memory_mb)
    with Ledger.open(Path(state)) as ledger:
        run_canary(cfg, ledger, reason=reason)


class CanaryRunner:
    """Starts the canary child when due and reports its outcome; one child at a time.

    ``wall`` is the wall clock (epoch seconds): the daily time is a local clock time, unlike
    the daemon's in-run deadlines.
    """

    def __init__(
        self, cfg: Config, ledger: Ledger, *, wall: Callable[[], float] = time.time
    ) -> None:
        assert cfg.state is not None
        self.cfg, self.ledger, self.wall = cfg, ledger, wall
        self.next_due = wall()  # at start-up
        self.reason = "start-up"
        self.proc: BaseProcess | None = None
        self.running_reason = ""
        self._seen = self._last_id()

    def _last_id(self) -> int:
        return int(self.ledger.query("SELECT COALESCE(MAX(id), 0) FROM canary_runs")[0][0])

    def tick(self) -> None:
        """Called from the daemon's periodic check: report a finished child, start a due one."""
        if self.proc is not None:
            if self.proc.is_alive():
                return
            self._finished(self.proc.exitcode)
            self.proc = None
        now = self.wall()
        if now < self.next_due:
            return
        ctx = multiprocessing.get_context("spawn")  # nothing of the daemon's crosses a fork
        self.proc = ctx.Process(
            target=canary_main,
            args=(self.cfg, str(self.cfg.state), self.reason),
            name="flairwatch-canary",
            daemon=True,
        )
        self.proc.start()
        self.running_reason = self.reason
        log.info("self-check (%s) started in process %s", self.reason, self.proc.pid)
        self.next_due, self.reason = next_daily(now, self.cfg.canary.time), "daily"

    def _finished(self, exitcode: int | None) -> None:
        from flairwatch.research.canary import Verdict, latest_run, record_run

        run = latest_run(self.ledger, self._seen)
        if run is None:
            detail = f"the self-check process ended with exit code {exitcode} before recording"
            record_run(self.ledger, Verdict("failed", detail), started=self.wall(), seconds=0.0,
                       reason=self.running_reason, model=None)  # fmt: skip
            log.error("self-check failed: %s", detail)
        elif run.outcome == "drifted":
            log.warning("self-check DRIFTED (model %s): %s", run.model, run.detail)
        elif run.outcome == "failed":
            log.error("self-check failed: %s", run.detail)
        else:
            log.info("self-check %s (model %s): %s", run.outcome, run.model, run.detail)
        self._seen = self._last_id()

    def stop(self) -> None:
        """End a running child (a canary is never worth waiting for at shut-down)."""
        if self.proc is not None and self.proc.is_alive():
            self.proc.terminate()
            self.proc.join(timeout=10)
        self.proc = None
