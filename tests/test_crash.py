"""Crash test: SIGKILL the real daemon (and in some rounds only its worker) at random moments,
restart it each time, then run to the end and check that nothing was lost, duplicated or failed.

Real `flairwatch watch` processes, real DICOM files, the tiny test model, a real SQLite ledger.
The checks are the operator's: every series has exactly one current result, nothing is left
running, queued or failed, no half-built folder is left, and the ledger and the results folder
agree. (Common practice for crash-consistency tests: kill -9 at random points, then verify
invariants on restart.)
"""

from __future__ import annotations

import os
import random
import signal
import sqlite3
import time
from dataclasses import replace
from pathlib import Path

from flairwatch.engine.results import CURRENT_FILE
from tests.daemon_fixtures import (
    FLAIR,
    complete_results,
    copy_in,
    half_built,
    run_once,
    series_uid_of,
    stage_series,
    start_daemon,
    wait_for,
    write_config,
)

KILLS = 10
SERIES = 6
# about a second of work each with the tiny model, so most kills land while a series runs
SLOW = replace(FLAIR, rows=256, columns=256, slices=40, pixel_spacing=(0.9, 0.9))


def _children(pid: int) -> list[int]:
    """Child processes of ``pid`` (proc(5): field 4 of /proc/PID/stat is the parent's pid)."""
    found = []
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            stat = Path(f"/proc/{entry}/stat").read_text("ascii")
        except OSError:
            continue
        # the command name (field 2) is in parentheses and may hold blanks: split after it
        fields = stat.rsplit(")", 1)[1].split()
        if int(fields[1]) == pid:
            found.append(int(entry))
    return found


def _ready_count(log: Path) -> int:
    return log.read_text(encoding="utf-8").count(" ready in ") if log.exists() else 0


def _kill_round(cfg: Path, log: Path, rng: random.Random, worker_only: bool) -> str:
    """Start the daemon, let it work for a random moment, SIGKILL it (or first its worker)."""
    before = _ready_count(log)
    proc = start_daemon(cfg, log)
    try:
        # the clock starts when the model is loaded: kills during start-up alone test little
        wait_for(lambda: _ready_count(log) > before or proc.poll() is not None, 30, "ready")
        time.sleep(rng.uniform(0.0, 1.2))
        what = "daemon"
        if worker_only:
            workers = _children(proc.pid)  # worker processes (or a helper of multiprocessing)
            if workers:
                os.kill(rng.choice(workers), signal.SIGKILL)
                what = "worker"
                time.sleep(rng.uniform(0.1, 1.0))
        proc.send_signal(signal.SIGKILL)
        return what
    finally:
        proc.wait(10)


def test_random_kills_lose_and_duplicate_nothing(tmp_path: Path, tiny_model_manifest: Path) -> None:
    started = time.monotonic()
    # a crashed worker counts against its series and is retried after retry_seconds (doubling)
    cfg = write_config(tmp_path, tiny_model_manifest, settle=0.3, rescan=5.0, retry_seconds=0.5)
    staged = [stage_series(tmp_path / "staging", f"c{i}", SLOW) for i in range(SERIES)]
    uids = {series_uid_of(files) for files in staged}
    rng = random.Random(20261202)
    # half the series are there from the start, the rest arrive while the daemon keeps dying
    for i, files in enumerate(staged[: SERIES // 2]):
        copy_in(files, tmp_path / "inbox", f"c{i}")
    log = tmp_path / "daemon.log"
    kinds = []
    for round_ in range(KILLS):
        if round_ == 3:
            for i, files in enumerate(staged[SERIES // 2 :], start=SERIES // 2):
                copy_in(files, tmp_path / "inbox", f"c{i}")
        kinds.append(_kill_round(cfg, log, rng, worker_only=round_ % 3 == 1))
    assert kinds.count("daemon") + kinds.count("worker") == KILLS

    # then a clean run to the end: exit 0 means every series handled and none failed
    assert run_once(cfg, tmp_path / "once.log", timeout=60) == 0

    db = sqlite3.connect(tmp_path / "state" / "ledger.sqlite3")
    try:
        states = db.execute("SELECT state, COUNT(*) FROM jobs GROUP BY state").fetchall()
        per_series = dict(
            db.execute(
                """SELECT s.series_uid, SUM(r.current) FROM results r
                   JOIN series s ON s.id = r.series_id GROUP BY s.series_uid"""
            ).fetchall()
        )
        recorded = {Path(p) for (p,) in db.execute("SELECT result_path FROM results").fetchall()}
        current = {
            Path(p) for (p,) in db.execute("SELECT result_path FROM results WHERE current = 1")
        }
        attempts = db.execute("SELECT MAX(attempts) FROM jobs").fetchone()[0]
    finally:
        db.close()
    lost = uids - set(per_series)
    duplicated = {uid for uid, n in per_series.items() if n != 1}
    print(f"crash test: {KILLS} kills ({kinds.count('worker')} of a worker), "
          f"{len(lost)} lost, {len(duplicated)} duplicated, "
          f"{dict(states).get('failed', 0)} wrongly failed, max attempts {attempts}, "
          f"{time.monotonic() - started:.0f} s")  # fmt: skip
    assert lost == set() and duplicated == set()
    assert dict(states) == {"done": len(uids)}  # nothing running, queued, failed or refused
    assert half_built(tmp_path / "results") == []
    # the ledger and the results folder agree: the same complete folders, one per series, and
    # each series folder points at the version the ledger calls current
    on_disk = set(complete_results(tmp_path / "results"))
    assert on_disk == recorded == current
    for folder in current:
        pointer = (folder.parent / CURRENT_FILE).read_text(encoding="utf-8").strip()
        assert pointer == folder.name
