"""``flairwatch status`` and ``flairwatch backup``: read the ledger while the daemon runs.

``status`` prints job counts per state, the last errors, throughput and queue age, and exits
0 when the daemon looks healthy, 1 when it does not (for a monitoring system's check):

- the daemon's heartbeat (written every few seconds) is recent and says "running";
- the queue is not stuck: the oldest job that may run has not waited longer than
  ``--stuck-after`` while nothing started or finished;
- the latest ``--failure-run`` processing jobs did not all fail;
- no series has been running longer than max(``overdue_seconds``, ``overdue_factor`` times the
  median processing time of the last 50 series done): a hung worker or a lost job shows here;
- the latest self-check (:mod:`flairwatch.research.canary`) did not drift or fail.

``backup`` copies the ledger with SQLite's online backup API, safe while the daemon writes.
"""

from __future__ import annotations

import math
import statistics
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

from flairwatch.ledger.store import JobState, Ledger

DEFAULT_STALE_SECONDS = 60.0  # heartbeat older than this: the daemon is not running
DEFAULT_STUCK_SECONDS = 3600.0
DEFAULT_FAILURE_RUN = 3
RECENT_ERRORS = 5
RECENT_SERIES = 50  # the median processing time behind the running-time limit


@dataclass(frozen=True)
class Report:
    """What ``status`` found; times in seconds."""

    now: float
    daemon: dict[str, Any] | None
    counts: dict[str, int]
    queue_waiting: int
    oldest_wait_s: float | None
    done_last_hour: int
    mean_seconds: float | None
    errors: list[dict[str, Any]] = field(default_factory=list)
    problems: list[str] = field(default_factory=list)
    running_limit_s: float | None = None  # a series running longer is a problem
    canary: tuple[str, str | None, float] | None = None  # latest self-check: outcome, detail, when

    @property
    def healthy(self) -> bool:
        return not self.problems


def running_limit(recent_seconds: Sequence[float], floor_s: float, factor: float) -> float:
    """Longest healthy running time in seconds: max(floor_s, factor x median of recent) (pure)."""
    if not recent_seconds:
        return floor_s
    return max(floor_s, factor * statistics.median(recent_seconds))


def problems(
    daemon: dict[str, Any] | None,
    now: float,
    *,
    oldest_wait_s: float | None,
    last_activity: float | None,
    outcomes: list[str],
    stale_s: float,
    stuck_s: float,
    failure_run: int,
    running: Sequence[tuple[str | None, float]] = (),
    running_limit_s: float = math.inf,
    canary: tuple[str, str | None, float] | None = None,
) -> list[str]:
    """Health problems from ledger facts (pure). An empty list means healthy.

    ``running`` holds (series key, seconds running) of every running job; ``canary`` the latest
    self-check's (outcome, detail, start time), None when none ran.
    """
    found = []
    if daemon is None:
        found.append("the daemon has never run on this ledger")
    elif daemon["state"] == "stopped":
        found.append(f"the daemon stopped {now - daemon['beat']:.0f} s ago")
    elif daemon["state"].startswith("paused") and now - daemon["beat"] <= stale_s:
        why = daemon["state"].partition(":")[2].strip() or "see its log"
        found.append(
            f"the daemon paused dispatch: {why} (queued series wait and none counts as failed)"
        )
    elif now - daemon["beat"] > stale_s:
        found.append(
            f"no heartbeat for {now - daemon['beat']:.0f} s (pid {daemon['pid']} "
            f"on {daemon['host']}): the daemon is not running or is hung"
        )
    idle_for = now - (last_activity or 0.0)
    if oldest_wait_s is not None and oldest_wait_s > stuck_s and idle_for > stuck_s:
        found.append(
            f"queue stuck: the oldest job has waited {oldest_wait_s / 60:.0f} min and no job "
            f"started or finished for {min(idle_for, oldest_wait_s) / 60:.0f} min"
        )
    recent = outcomes[:failure_run]
    if failure_run > 0 and len(recent) == failure_run and all(s == "failed" for s in recent):
        found.append(f"the last {failure_run} series failed; see the errors above")
    for key, age in running:
        if age > running_limit_s:
            found.append(
                f"series {key} has been running for {age / 60:.0f} min, longer than the "
                f"{running_limit_s / 60:.0f} min limit: a worker may be stuck; see the daemon's log"
            )
    if canary is not None and canary[0] in ("drifted", "failed"):
        what = "drifted" if canary[0] == "drifted" else "could not run"
        found.append(
            f"the self-check of {_when(canary[2])} {what}: {canary[1]}; results may differ from "
            "earlier ones until this is explained (README, 'Self-check')"
        )
    return found


def gather(
    ledger: Ledger,
    now: float,
    *,
    stale_s: float = DEFAULT_STALE_SECONDS,
    stuck_s: float = DEFAULT_STUCK_SECONDS,
    failure_run: int = DEFAULT_FAILURE_RUN,
    overdue_s: float | None = None,
    overdue_factor: float | None = None,
) -> Report:
    """Everything ``status`` reports; ``overdue_*`` default to the config's defaults."""
    if overdue_s is None or overdue_factor is None:
        # here, not at module level: 'status --help' must not load the config reader (YAML)
        from flairwatch.config import DEFAULT_OVERDUE_FACTOR, DEFAULT_OVERDUE_SECONDS

        overdue_s = DEFAULT_OVERDUE_SECONDS if overdue_s is None else overdue_s
        overdue_factor = DEFAULT_OVERDUE_FACTOR if overdue_factor is None else overdue_factor
    counts = ledger.state_counts()
    oldest = ledger.oldest_waiting(now)
    oldest_wait = None if oldest is None else max(0.0, now - oldest)
    waiting = len([j for j in ledger.jobs_in(JobState.QUEUED) if j.not_before <= now])
    done, mean = ledger.done_since(now - 3600.0)
    daemon = ledger.heartbeat()
    limit = running_limit(ledger.recent_seconds(RECENT_SERIES), overdue_s, overdue_factor)
    last_canary = ledger.query(
        "SELECT outcome, detail, started FROM canary_runs ORDER BY id DESC LIMIT 1"
    )
    canary = (
        (str(last_canary[0][0]), last_canary[0][1], float(last_canary[0][2]))
        if last_canary
        else None
    )
    errors = [
        {"finished": t, "state": st, "series": key, "revision": rev, "error": err}
        for t, st, key, rev, err in ledger.recent_errors(RECENT_ERRORS)
    ]
    found = problems(
        daemon,
        now,
        oldest_wait_s=oldest_wait,
        last_activity=ledger.last_activity(),
        outcomes=ledger.recent_outcomes(failure_run),
        stale_s=stale_s,
        stuck_s=stuck_s,
        failure_run=failure_run,
        running=[(key, now - started) for key, started in ledger.running_jobs()],
        running_limit_s=limit,
        canary=canary,
    )
    return Report(
        now, daemon, counts, waiting, oldest_wait, done, mean, errors, found, limit, canary
    )


def _when(t: float | None) -> str:
    return "-" if not t else time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(t))


def render(report: Report, more: Sequence[str] = ()) -> str:
    """The report as lines for a person; ``more`` (e.g. the sending lines) comes just before
    the health verdict, which stays last."""
    lines = []
    d = report.daemon
    if d is None:
        lines.append("daemon: never ran")
    else:
        age = report.now - d["beat"]
        lines.append(
            f"daemon: {d['state']} (pid {d['pid']} on {d['host']}, heartbeat {age:.0f} s ago, "
            f"started {_when(d['started'])}, inbox {d['inbox']})"
        )
    order = [s.value for s in JobState]
    counts = ", ".join(f"{s} {report.counts.get(s, 0)}" for s in order)
    lines.append(f"series jobs: {counts}")
    wait = "" if report.oldest_wait_s is None else f", oldest waiting {report.oldest_wait_s:.0f} s"
    lines.append(f"queue: {report.queue_waiting} ready to run{wait}")
    mean = "" if report.mean_seconds is None else f" (mean {report.mean_seconds:.1f} s each)"
    lines.append(f"throughput: {report.done_last_hour} series done in the last hour{mean}")
    if report.canary is not None:
        outcome, detail, started = report.canary
        lines.append(f"self-check: {outcome} at {_when(started)}: {detail}")
    if report.errors:
        lines.append("last errors:")
        for e in report.errors:
            lines.append(
                f"  {_when(e['finished'])} {e['state']} series {e['series']} "
                f"r{e['revision']}: {e['error']}"
            )
    lines.extend(more)
    if report.healthy:
        lines.append("health: OK")
    else:
        lines.extend(f"health: PROBLEM: {p}" for p in report.problems)
    return "\n".join(lines)
