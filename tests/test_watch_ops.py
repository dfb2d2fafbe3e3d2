"""Daemon operations: signals, one daemon per ledger, status and backup while running, and the
pure rules behind them (settle steps, retry back-off, error classes, health, overflow hook)."""

from __future__ import annotations

import errno
import json
import logging
import os
import signal
import sqlite3
import subprocess
import sys
from collections.abc import Callable
from dataclasses import replace
from pathlib import Path

import pytest

from flairwatch.config import Config
from flairwatch.daemon.inbox import Known, Step, plan, signature
from flairwatch.daemon.observe import OverflowHook
from flairwatch.daemon.status import gather, problems, render
from flairwatch.daemon.tuning import Tuning, retry_delay
from flairwatch.daemon.watch import Daemon
from flairwatch.daemon.workers import Report, classify
from flairwatch.errors import InputRejected, StageFailed
from flairwatch.ledger.store import JobState, Ledger
from flairwatch.records import FileRecord, Series, SeriesHeader
from tests.daemon_fixtures import (
    FLAIR,
    REPO,
    complete_results,
    copy_in,
    half_built,
    jobs,
    stage_series,
    start_daemon,
    stop,
    wait_for,
    watch_command,
    write_config,
)

# big enough that processing takes about a second with the tiny model, so signals land mid-series
SLOW = replace(FLAIR, rows=256, columns=256, slices=40, pixel_spacing=(0.9, 0.9))


def _cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "flairwatch.cli", *args],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )


def _log_has(path: Path, text: str) -> bool:
    return path.exists() and text in path.read_text(encoding="utf-8")


def test_first_signal_finishes_the_running_series(
    tmp_path: Path, tiny_model_manifest: Path
) -> None:
    cfg = write_config(tmp_path, tiny_model_manifest, settle=0.5)
    copy_in(stage_series(tmp_path / "staging", "a", SLOW), tmp_path / "inbox", "a")
    log = tmp_path / "daemon.log"
    proc = start_daemon(cfg, log)
    wait_for(lambda: _log_has(log, "running (attempt 1)"), 30, "a running series", step=0.02)
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(30) == 0
    assert "finishing 1 running series" in log.read_text(encoding="utf-8")
    assert [st for _, st, *_ in jobs(tmp_path / "state")] == ["done"]
    assert len(complete_results(tmp_path / "results")) == 1
    status = _cli("status", "--config", str(cfg), "--json")
    assert status.returncode == 1  # stopped daemon: unhealthy for a monitor
    assert json.loads(status.stdout)["daemon"]["state"] == "stopped"


def test_second_signal_stops_at_once_and_restart_completes(
    tmp_path: Path, tiny_model_manifest: Path
) -> None:
    cfg = write_config(tmp_path, tiny_model_manifest, settle=0.5, rescan=600)
    copy_in(stage_series(tmp_path / "staging", "a", SLOW), tmp_path / "inbox", "a")
    log = tmp_path / "daemon.log"
    proc = start_daemon(cfg, log)
    wait_for(lambda: _log_has(log, "running (attempt 1)"), 30, "a running series", step=0.02)
    proc.send_signal(signal.SIGTERM)
    wait_for(lambda: _log_has(log, "finishing 1"), 10, "the first signal", step=0.02)
    proc.send_signal(signal.SIGINT)
    assert proc.wait(10) == 130
    assert [st for _, st, *_ in jobs(tmp_path / "state")] == ["running"]
    assert complete_results(tmp_path / "results") == []
    # a series arrives while the daemon is down: no event will ever report it, and the
    # periodic rescan is far away, so only the start-up scan can find it
    late = stage_series(tmp_path / "staging", "b")
    copy_in(late, tmp_path / "inbox", "b")
    proc = start_daemon(cfg, log)
    try:
        # the interrupted job is queued again and finished once; the new series is found
        wait_for(
            lambda: [st for _, st, *_ in jobs(tmp_path / "state")] == ["done", "done"], 40, "done"
        )
    finally:
        assert stop(proc) == 0
    assert len(complete_results(tmp_path / "results")) == 2
    assert half_built(tmp_path / "results") == []
    assert "were running when the daemon stopped; queued again" in log.read_text(encoding="utf-8")


def test_interrupted_one_shot_exits_130(tmp_path: Path, tiny_model_manifest: Path) -> None:
    cfg = write_config(tmp_path, tiny_model_manifest, settle=60)
    copy_in(stage_series(tmp_path / "staging", "a"), tmp_path / "inbox", "a")
    log = tmp_path / "once.log"
    proc = start_daemon(cfg, log, "--once")
    wait_for(lambda: _log_has(log, "arriving"), 30, "the first scan")
    proc.send_signal(signal.SIGINT)
    assert proc.wait(10) == 130


def test_status_backup_and_single_daemon_while_running(
    tmp_path: Path, tiny_model_manifest: Path
) -> None:
    cfg = write_config(tmp_path, tiny_model_manifest, settle=0.5)
    copy_in(stage_series(tmp_path / "staging", "a"), tmp_path / "inbox", "a")
    proc = start_daemon(cfg, tmp_path / "daemon.log")
    try:
        wait_for(lambda: [s for _, s, *_ in jobs(tmp_path / "state")] == ["done"], 30, "done")
        second = subprocess.run(
            watch_command(cfg), cwd=REPO, capture_output=True, text=True, timeout=60, check=False
        )
        assert second.returncode == 2 and "already uses state folder" in second.stderr
        status = _cli("status", "--state", str(tmp_path / "state"), "--json")
        assert status.returncode == 0, status.stdout
        report = json.loads(status.stdout)
        assert report["counts"] == {"done": 1} and report["healthy"] is True
        assert report["done_last_hour"] == 1 and report["daemon"]["state"] == "running"
        backup = _cli("backup", "--config", str(cfg), "--to", str(tmp_path / "copy.sqlite3"))
        assert backup.returncode == 0, backup.stderr
    finally:
        assert stop(proc) == 0
    copy = sqlite3.connect(tmp_path / "copy.sqlite3")
    assert copy.execute("PRAGMA integrity_check").fetchone() == ("ok",)
    assert copy.execute("SELECT state FROM jobs").fetchall() == [("done",)]
    copy.close()


# ---- pure rules ------------------------------------------------------------------------------


def _series(*instances: tuple[str, int]) -> Series:
    header = SeriesHeader("1.2", "1.2.3")
    files = tuple(
        FileRecord(Path(f"/in/{sop}"), size, 1, sop_uid=sop, header=header)
        for sop, size in instances
    )
    return Series(header, files)


def test_settle_steps() -> None:
    s = _series(("a", 10), ("b", 10))
    sig = signature(s)
    settling = Known(JobState.SETTLING, sig, 100.0, frozenset())
    assert plan(s, None, 100.0, 30) is Step.NEW_REVISION
    assert plan(s, replace(settling, signature="other"), 200.0, 30) is Step.CHANGED
    assert plan(s, settling, 129.9, 30) is Step.WAIT
    assert plan(s, settling, 130.0, 30) is Step.SETTLED
    # a file that grew is a change, even with the same instances
    assert plan(_series(("a", 10), ("b", 11)), settling, 500.0, 30) is Step.CHANGED
    done = Known(JobState.DONE, sig, 100.0, frozenset({"a", "b"}))
    assert plan(s, done, 999.0, 30) is Step.NOTHING
    assert plan(_series(("a", 10), ("b", 10), ("c", 10)), done, 999.0, 30) is Step.NEW_REVISION
    # a re-sent copy with another size: ignored once done, a new look once refused
    resent = _series(("a", 10), ("b", 12))
    assert plan(resent, done, 999.0, 30) is Step.NOTHING
    assert plan(resent, replace(done, job_state=JobState.REFUSED), 999.0, 30) is Step.NEW_REVISION
    assert plan(s, replace(done, job_state=JobState.REFUSED), 999.0, 30) is Step.NOTHING
    running = replace(done, job_state=JobState.RUNNING, sops_taken=frozenset())
    assert plan(_series(("a", 10), ("c", 10)), running, 999.0, 30) is Step.NOTHING


def test_signature_ignores_paths() -> None:
    a = _series(("x", 5))
    moved = Series(a.header, (replace(a.files[0], path=Path("/in/elsewhere/x")),))
    assert signature(a) == signature(moved)


def test_retry_backoff_doubles_up_to_a_cap() -> None:
    t = Tuning(retry_base_seconds=30, retry_max_seconds=600)
    assert [retry_delay(n, t) for n in range(1, 7)] == [30, 60, 120, 240, 480, 600]


@pytest.mark.parametrize(
    ("exc", "kind", "transient"),
    [
        (InputRejected("gap"), "refused", False),
        (StageFailed("model", transient=False), "failed", False),
        (StageFailed("busy", transient=True), "failed", True),
        (OSError(errno.ENOSPC, "No space left on device"), "failed", True),
        (OSError(errno.EIO, "Input/output error"), "failed", True),
        (OSError(errno.EACCES, "Permission denied"), "failed", False),
        (ValueError("bug"), "failed", False),
    ],
)
def test_error_classes(exc: BaseException, kind: str, transient: bool) -> None:
    report = classify(exc)
    assert (report.kind, report.transient) == (kind, transient)


def test_overflow_warning_wakes_the_daemon() -> None:
    woken: list[str] = []
    hook = OverflowHook(woken.append)
    hook.install()
    try:
        # the message watchdog 7.1 logs on IN_Q_OVERFLOW (watchdog/observers/inotify_c.py)
        logging.getLogger("watchdog.observers.inotify_c").warning(
            "Inotify queue overflowed; filesystem events were lost"
        )
        logging.getLogger("watchdog.observers.inotify").warning("unrelated warning")
    finally:
        hook.remove()
    assert woken == ["overflow"]


def _health(
    beat: dict[str, object] | None,
    now: float,
    *,
    oldest_wait_s: float | None = None,
    last_activity: float = 990.0,
    outcomes: tuple[str, ...] = ("done",),
) -> list[str]:
    return problems(
        beat,
        now,
        oldest_wait_s=oldest_wait_s,
        last_activity=last_activity,
        outcomes=list(outcomes),
        stale_s=60,
        stuck_s=600,
        failure_run=3,
    )


def test_health_rules() -> None:
    beat: dict[str, object] = {"pid": 1, "host": "h", "state": "running", "beat": 1000.0}
    assert _health(beat, 1010.0) == []
    assert "never run" in _health(None, 1010.0)[0]
    assert "no heartbeat" in _health(beat, 1100.0)[0]
    assert "stopped" in _health(beat | {"state": "stopped"}, 1010.0)[0]
    assert "queue stuck" in _health(beat, 1010.0, oldest_wait_s=700.0, last_activity=300.0)[0]
    # a long queue that is moving is not stuck
    assert _health(beat, 1010.0, oldest_wait_s=700.0, last_activity=1000.0) == []
    failing = ("failed", "failed", "failed", "done")
    assert "last 3 series failed" in _health(beat, 1010.0, outcomes=failing)[0]
    assert _health(beat, 1010.0, outcomes=("failed", "refused", "failed")) == []


def _fixed_keys(series_key: str) -> Callable[[int], tuple[str, str, str]]:
    return lambda _revision: ("s", "t", series_key)


def test_status_report_from_a_real_ledger(tmp_path: Path) -> None:
    with Ledger.open(tmp_path) as led:
        for uid, outcome in (("9.1", "done"), ("9.2", "refused")):
            _, job = led.new_revision("1.2", uid, _fixed_keys(f"e{uid}"), 100.0)
            led.move_job(job.id, [JobState.SETTLING], JobState.QUEUED, 101.0)
            assert led.claim_next(102.0, "m", "1", 7) is not None
            if outcome == "done":
                summary = {"model": {"name": "m", "version": "1"}}
                led.finish_done(job.id, "/r", summary, adopted=False, seconds=4.0, now=110.0)
            else:
                led.move_job(job.id, [JobState.RUNNING], JobState.REFUSED, 111.0, error="gap")
        led.beat(42, "running", 115.0, inbox="/in", started=90.0)
        report = gather(led, 120.0)
    assert report.healthy and report.counts == {"done": 1, "refused": 1}
    assert (report.done_last_hour, report.mean_seconds) == (1, 4.0)
    text = render(report)
    assert "done 1" in text and "refused 1" in text and "health: OK" in text
    assert "series e9.2 r1: gap" in text
    # other lines (the sending lines of flairwatch receive) come before the verdict, which a
    # person or a script reads last
    lines = render(report, ["sending to archive: 0 waiting, 2 sent"]).splitlines()
    assert lines[-2:] == ["sending to archive: 0 waiting, 2 sent", "health: OK"]


def test_transient_failures_back_off_then_give_up(tmp_path: Path) -> None:
    # the daemon's bookkeeping on a real ledger, without workers: three tries, then failed
    cfg = Config(inbox=tmp_path / "in", results=tmp_path / "out", state=tmp_path)
    tuning = Tuning(max_attempts=3, retry_base_seconds=10)
    with Ledger.open(tmp_path) as led:
        daemon = Daemon(cfg, led, b"k" * 32, tuning=tuning)
        _, job = led.new_revision("1.2", "9.1", _fixed_keys("e1"), 0.0)
        led.move_job(job.id, [JobState.SETTLING], JobState.QUEUED, 0.0)
        now = 100.0
        for attempt in (1, 2, 3):
            claimed = led.claim_next(now, "m", "1", 5)
            assert claimed is not None and claimed.attempts == attempt
            daemon.jobs.record(Report("failed", job.id, "No space left on device", True), now)
            after = led.job(job.id)
            if attempt < 3:
                assert after.state is JobState.QUEUED
                assert after.not_before == now + 10 * 2 ** (attempt - 1)
                assert led.claim_next(now, "m", "1", 5) is None  # not before its time
                now = after.not_before
        assert after.state is JobState.FAILED
        assert after.error == "gave up after 3 attempts: No space left on device"
        # a permanent failure is final at once
        _, job2 = led.new_revision("1.2", "9.2", _fixed_keys("e2"), 0.0)
        led.move_job(job2.id, [JobState.SETTLING], JobState.QUEUED, 0.0)
        assert led.claim_next(now, "m", "1", 5) is not None
        daemon.jobs.record(Report("refused", job2.id, "slice gap"), now)
        assert led.job(job2.id).state is JobState.REFUSED


def test_worker_killed_mid_series_is_retried(tmp_path: Path, tiny_model_manifest: Path) -> None:
    cfg = write_config(tmp_path, tiny_model_manifest, settle=0.5)
    copy_in(stage_series(tmp_path / "staging", "a", SLOW), tmp_path / "inbox", "a")
    log = tmp_path / "daemon.log"
    proc = start_daemon(cfg, log)
    try:
        wait_for(lambda: _log_has(log, "running (attempt 1)"), 30, "a running series", step=0.02)
        db = sqlite3.connect(tmp_path / "state" / "ledger.sqlite3")
        (worker,) = db.execute("SELECT worker_pid FROM jobs WHERE state = 'running'").fetchone()
        os.kill(worker, signal.SIGKILL)  # out of memory, a crash in a native library...
        wait_for(lambda: _log_has(log, "retry in 30 s"), 20, "the retry")
        state, attempts, error = db.execute("SELECT state, attempts, error FROM jobs").fetchone()
        db.close()
        assert (state, attempts) == ("queued", 1) and "exit code -9" in error
        # a fresh worker took the dead one's place
        wait_for(
            lambda: log.read_text(encoding="utf-8").count("worker 0 died") == 1,
            10,
            "the death notice",
        )
    finally:
        assert stop(proc) == 0
