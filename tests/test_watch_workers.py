"""Worker hand-off and deaths: real worker processes with the tiny model, and the pure rules
that name a worker's death (cgroup OOM evidence)."""

from __future__ import annotations

import logging
import os
import signal
import time
from collections.abc import Callable
from pathlib import Path

import pytest

from flairwatch.config import Config
from flairwatch.daemon.deaths import death_message, oom_kill_count
from flairwatch.daemon.inbox import InboxScanner
from flairwatch.daemon.workers import Report, Task, WorkerPool
from tests.daemon_fixtures import copy_in, stage_series

# Format of cgroup v2 memory.events and cgroup v1 memory.oom_control: "key value" lines
# (Linux kernel admin guide, cgroup-v2 "memory.events"; cgroup-v1 memory "memory.oom_control").
EVENTS_V2 = "low 0\nhigh 0\nmax 12\noom 3\noom_kill 2\noom_group_kill 0\n"
OOM_CONTROL_V1 = "oom_kill_disable 0\nunder_oom 0\noom_kill 7\n"


def test_oom_counter_and_death_messages() -> None:
    assert oom_kill_count(EVENTS_V2) == 2
    assert oom_kill_count(OOM_CONTROL_V1) == 7
    assert oom_kill_count("low 0\nhigh 0\n") is None
    # the kernel's own evidence: the group's OOM-kill counter rose while the worker ran
    assert "out-of-memory killer" in death_message(-9, 2, 3)
    # SIGKILL that the daemon did not send, no counter to prove it: most often memory
    assert death_message(-9, 2, 2) == "worker killed (exit code -9, SIGKILL): out of memory?"
    assert death_message(-9, None, None).endswith("out of memory?")
    assert death_message(-11, None, None) == "worker killed by signal SIGSEGV (exit code -11)"
    assert death_message(1, None, None) == "worker exit code 1"


def _pool_config(tmp_path: Path, model: Path) -> Config:
    (tmp_path / "results").mkdir(exist_ok=True)
    return Config(inbox=tmp_path / "inbox", results=tmp_path / "results", model=model, threads=1)


def _tasks(tmp_path: Path, n: int) -> list[Task]:
    for i in range(n):
        copy_in(stage_series(tmp_path / "staging", f"s{i}"), tmp_path / "inbox", f"s{i}")
    scan = InboxScanner(tmp_path / "inbox").scan()
    return [Task(i + 1, series, 1) for i, series in enumerate(scan.series.values())]


def _until(pool: WorkerPool, check: Callable[[], bool], timeout: float) -> list[Report]:
    reports: list[Report] = []
    deadline = time.monotonic() + timeout
    while not check():
        assert time.monotonic() < deadline, "timed out"
        reports += [r for _slot, r in pool.poll(0.2)]
    return reports


def test_last_report_and_retirement_are_one_message(
    tmp_path: Path, tiny_model_manifest: Path
) -> None:
    pool = WorkerPool(_pool_config(tmp_path, tiny_model_manifest), b"k" * 32, 1,
                      tasks_per_worker=1)  # fmt: skip
    tasks = _tasks(tmp_path, 2)
    try:
        pool.start()
        (slot,) = pool.idle()
        assert pool.submit(slot, tasks[0])
        reports = _until(pool, lambda: not pool.busy(), 60)
        (done,) = [r for r in reports if r.job_id == tasks[0].job_id]
        assert done.kind == "done" and done.retiring
        # the same poll that delivered the report knows the worker is leaving: no task for it
        assert slot not in pool.idle()
        _until(pool, lambda: bool(pool.idle()), 60)  # a fresh worker took its place
        (fresh,) = pool.idle()
        assert fresh.process.pid != slot.process.pid
        # a send to a worker that has gone is refused, not a crash of the daemon
        fresh.process.kill()
        fresh.process.join(10)
        assert pool.submit(fresh, tasks[1]) is False
        assert not pool.busy()
    finally:
        pool.stop(at_once=True)


def test_replacement_that_cannot_start_is_retried(
    tmp_path: Path, tiny_model_manifest: Path, caplog: pytest.LogCaptureFixture
) -> None:
    pool = WorkerPool(_pool_config(tmp_path, tiny_model_manifest), b"k" * 32, 1)
    model = tiny_model_manifest.with_suffix(".onnx")
    try:
        pool.start()
        (slot,) = pool.idle()
        model.rename(model.with_suffix(".away"))  # the model is gone for a while
        os.kill(slot.process.pid or 0, signal.SIGKILL)
        with caplog.at_level(logging.ERROR, logger="flairwatch.daemon.workers"):
            # no exception: the service goes on and tries again with back-off
            _until(pool, lambda: "trying again in" in caplog.text, 60)
        assert not pool.idle()
        model.with_suffix(".away").rename(model)
        _until(pool, lambda: bool(pool.idle()), 60)
    finally:
        pool.stop(at_once=True)
