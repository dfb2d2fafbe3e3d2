"""Daemon timings and retry rules that are not config keys (tests shorten them)."""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass

from flairwatch.daemon.workers import DEFAULT_TASKS_PER_WORKER


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


def steady_clock() -> Callable[[], float]:
    """Seconds since the epoch that never jump: the wall clock read once, then monotonic time.

    Times written to the ledger stay close to the wall clock, while a clock step (NTP, a daylight
    or manual change) cannot settle a series early or hold a retry back for an hour.
    """
    wall, mono = time.time(), time.monotonic()
    return lambda: wall + (time.monotonic() - mono)
