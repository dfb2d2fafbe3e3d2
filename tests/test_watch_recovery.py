"""Recovery and health: the running-time limit in status, the retry command, start-up repairs
after a crash, and in-run deadlines that do not follow wall-clock steps. Real SQLite ledgers
and real files."""

from __future__ import annotations

import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest

from flairwatch.config import Config
from flairwatch.daemon.inbox import InboxScanner
from flairwatch.daemon.inputs import InboxFiles
from flairwatch.daemon.reconcile import finish_deletions, fix_pointers, remove_half_built
from flairwatch.daemon.status import gather, problems, running_limit
from flairwatch.daemon.tuning import steady_clock
from flairwatch.engine import results
from flairwatch.ledger.store import FileRow, JobState, Ledger


def _fixed_keys(series_key: str) -> Callable[[int], tuple[str, str, str]]:
    return lambda _revision: ("s", "t", series_key)


def test_running_limit_is_the_larger_of_floor_and_median_multiple() -> None:
    # the median of an even count is the mean of the middle two (numpy.median agrees)
    recent = [10.0, 30.0, 200.0, 220.0]
    assert running_limit(recent, 600.0, 5.0) == max(600.0, 5 * float(np.median(recent))) == 600.0
    slow = [150.0] * 49 + [1e6]  # one outlier does not move a median
    assert running_limit(slow, 600.0, 5.0) == 5 * float(np.median(slow)) == 750.0
    assert running_limit([], 600.0, 5.0) == 600.0
    beat: dict[str, object] = {"pid": 1, "host": "h", "state": "running", "beat": 1000.0}
    late = problems(beat, 1010.0, oldest_wait_s=None, last_activity=1000.0, outcomes=[],
                    stale_s=60, stuck_s=600, failure_run=3, running=[("e1", 1500.0)],
                    running_limit_s=600.0)  # fmt: skip
    assert late == [
        "series e1 has been running for 25 min, longer than the 10 min limit: a worker may be "
        "stuck; see the daemon's log"
    ]


def test_status_flags_a_series_running_too_long(tmp_path: Path) -> None:
    with Ledger.open(tmp_path) as led:
        _, job = led.new_revision("1.2", "9.1", _fixed_keys("e9.1"), 100.0)
        led.move_job(job.id, [JobState.SETTLING], JobState.QUEUED, 100.0)
        assert led.claim_next(100.0, "m", "1", 7) is not None
        led.beat(42, "running", 1300.0, inbox="/in", started=90.0)
        assert gather(led, 600.0).healthy  # running 500 s: under the 600 s floor
        report = gather(led, 1420.0, overdue_s=600.0)
    assert report.running_limit_s == 600.0
    assert any("series e9.1 has been running for 22 min" in p for p in report.problems)


def test_retry_queues_failed_and_refused_series_again(tmp_path: Path) -> None:
    from flairwatch.cli import main

    outcomes = {"9.1": ("failed", 100.0), "9.2": ("refused", 200.0), "9.3": ("failed", 50.0)}
    with Ledger.open(tmp_path) as led:
        ids = {}
        for uid, (outcome, when) in outcomes.items():
            _, job = led.new_revision("1.2", uid, _fixed_keys(f"e{uid}"), 10.0)
            led.move_job(job.id, [JobState.SETTLING], JobState.QUEUED, 10.0)
            assert led.claim_next(20.0, "m", "1", 7) is not None
            target = JobState.FAILED if outcome == "failed" else JobState.REFUSED
            led.move_job(job.id, [JobState.RUNNING], target, when, error=f"{outcome} here")
            ids[uid] = job.id
    state = ["--state", str(tmp_path)]
    # 1970-01-01T00:01:40Z is epoch second 100: only the failure at 100 s, not the refusal
    assert main(["retry", *state, "--failed-since", "1970-01-01T00:01:40"]) == 0
    with Ledger.open(tmp_path) as led:
        again = led.job(ids["9.1"])
        assert (again.state, again.attempts, again.error) == (JobState.QUEUED, 0, None)
        assert led.query("SELECT model_name FROM jobs WHERE id = ?", (again.id,)) == [(None,)]
        assert led.job(ids["9.2"]).state is JobState.REFUSED
        assert led.job(ids["9.3"]).state is JobState.FAILED
    # by key, a refused series too; an unknown key is reported and makes the exit code 1
    assert main(["retry", *state, "e9.2", "e-unknown"]) == 1
    with Ledger.open(tmp_path) as led:
        assert led.job(ids["9.2"]).state is JobState.QUEUED
    assert main(["retry", *state, "--failed-since", "yesterday"]) == 2


def test_steady_clock_ignores_wall_clock_steps(monkeypatch: pytest.MonkeyPatch) -> None:
    clock = steady_clock()
    first = clock()
    real_time = time.time
    monkeypatch.setattr(time, "time", lambda: real_time() + 3600.0)  # a clock step of one hour
    assert 0.0 <= clock() - first < 5.0
    monkeypatch.setattr(time, "time", lambda: real_time() - 3600.0)
    assert 0.0 <= clock() - first < 5.0


def test_start_up_repairs_pointers_and_leftover_inputs(tmp_path: Path) -> None:
    inbox, out = tmp_path / "in", tmp_path / "out"
    cfg = Config(inbox=inbox, results=out, state=tmp_path / "state", delete_inbox_files=True)
    with Ledger.open(tmp_path / "state") as led:
        folders = {}
        for uid in ("9.1", "9.2"):
            path = inbox / uid / "1.dcm"
            path.parent.mkdir(parents=True)
            path.write_bytes(b"x")
            st = path.stat()  # the real size and mtime: files are deleted only if unchanged
            led.record_scan(
                [FileRow(str(path), st.st_size, st.st_mtime_ns, f"{uid}.1", "1.2", uid)], [], 1.0
            )
            row, job = led.new_revision("1.2", uid, _fixed_keys(f"e{uid}"), 1.0)
            led.take_files(row.id, "1.2", uid)
            led.move_job(job.id, [JobState.SETTLING], JobState.QUEUED, 1.0)
            assert led.claim_next(2.0, "m", "1", 7) is not None
            folder = out / "s" / "t" / f"e{uid}" / "m-1"
            folder.mkdir(parents=True)
            (folder / "summary.json").write_text("{}", encoding="utf-8")
            summary = {"model": {"name": "m", "version": "1"}}
            led.finish_done(job.id, str(folder), summary, adopted=False, seconds=1.0, now=3.0)
            folders[uid] = folder
        # a late instance of 9.2 makes a second revision, still settling: its inputs must stay
        late = inbox / "9.2" / "2.dcm"
        late.write_bytes(b"y")
        st = late.stat()
        led.record_scan(
            [FileRow(str(late), st.st_size, st.st_mtime_ns, "9.2.2", "1.2", "9.2")], [], 4.0
        )
        row2, _ = led.new_revision("1.2", "9.2", _fixed_keys("e9.2-r2"), 4.0)
        led.take_files(row2.id, "1.2", "9.2")
        # the crash: 9.1's pointer never written, 9.2's points at something else
        results.set_current(folders["9.2"].parent, "old-0")
        files = InboxFiles(cfg, led, InboxScanner(inbox))
        assert len(fix_pointers(led, cfg, 5.0)) == 2
        for folder in folders.values():
            assert results.current_version(folder.parent) == folder.name
        assert fix_pointers(led, cfg, 6.0) == []  # nothing left to repair
        assert len(finish_deletions(led, cfg, files)) == 1
    assert not (inbox / "9.1" / "1.dcm").exists()
    assert (inbox / "9.2" / "1.dcm").exists() and late.exists()


# A re-run process: claims one job through its own Ledger (and run lock), then waits.
CLAIMER = """
import sys, time
from pathlib import Path
from flairwatch.ledger.store import Ledger
led = Ledger.open(Path(sys.argv[1]))
job = led.claim_next(time.time(), "m", "1", 4242)
print(job.id if job else 0, flush=True)
time.sleep(600)
"""


def test_start_up_keeps_the_folder_a_live_rerun_builds(tmp_path: Path) -> None:
    out = tmp_path / "out"
    cfg = Config(inbox=tmp_path / "in", results=out, state=tmp_path / "state")
    with Ledger.open(tmp_path / "state") as led:
        for uid in ("9.1", "9.2"):
            _, job = led.new_revision("1.2", uid, _fixed_keys(f"e{uid}"), 1.0)
            led.move_job(job.id, [JobState.SETTLING], JobState.QUEUED, 1.0)
    proc = subprocess.Popen([sys.executable, "-c", CLAIMER, str(tmp_path / "state")],
                            stdout=subprocess.PIPE, text=True)  # fmt: skip
    try:
        assert proc.stdout is not None and int(proc.stdout.readline()) == 1  # series 9.1
        live = out / "s" / "t" / "e9.1" / ".building-m-1-abcd"
        dead = out / "s" / "t" / "e9.2" / ".building-m-1-ef01"
        for folder in (live, dead):
            folder.mkdir(parents=True)
        with Ledger.open(tmp_path / "state") as led:
            assert remove_half_built(led, cfg) == [dead]
        assert live.is_dir() and not dead.exists()
    finally:
        proc.kill()
        proc.wait()
    with Ledger.open(tmp_path / "state") as led:  # the re-run is gone: its folder is litter now
        led.requeue_orphans(2.0)
        assert remove_half_built(led, cfg) == [live]


def test_adoption_only_of_a_result_of_the_same_inputs_and_settings(
    tmp_path: Path, tiny_model_manifest: Path
) -> None:
    from dataclasses import replace

    from flairwatch.engine.pipeline import Engine, source_of_series
    from tests.daemon_fixtures import copy_in, stage_series

    copy_in(stage_series(tmp_path / "staging", "a"), tmp_path / "inbox", "a")
    (series,) = InboxScanner(tmp_path / "inbox").scan().series.values()
    cfg = Config(results=tmp_path / "out", model=tiny_model_manifest, threads=1)
    first = Engine(cfg).process(series, tmp_path / "out", secret=b"k" * 32)
    assert not first.adopted and len(first.summary["fingerprint"]) == 64
    # the same inputs and settings after a crash: the folder is adopted untouched
    again = Engine(cfg).process(series, tmp_path / "out", secret=b"k" * 32)
    assert again.adopted and again.result_dir == first.result_dir
    # another threshold under the same model version: never adopted, made again, old kept
    other = Engine(replace(cfg, threshold=0.9)).process(series, tmp_path / "out", secret=b"k" * 32)
    assert not other.adopted and other.result_dir == first.result_dir
    assert other.summary["threshold"] == 0.9
    (aside,) = first.result_dir.parent.glob(f"{results.ASIDE_PREFIX}*")
    assert (aside / "summary.json").is_file()
    # one instance fewer: another series content, another fingerprint
    fewer = replace(series, files=series.files[1:])
    assert Engine(cfg).fingerprint(source_of_series(fewer)) != first.summary["fingerprint"]


def test_a_missing_inbox_is_logged_once_per_change(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    from flairwatch.daemon.watch import Daemon

    cfg = Config(inbox=tmp_path / "in", results=tmp_path / "out", state=tmp_path / "state")
    with Ledger.open(tmp_path / "state") as led, caplog.at_level("INFO"):
        daemon = Daemon(cfg, led, b"k" * 32)
        for now in (1.0, 400.0, 800.0):  # three rescans while the share is away
            daemon.intake.scan(now)
        (tmp_path / "in").mkdir()
        daemon.intake.scan(1200.0)
        daemon.intake.scan(1600.0)
    assert caplog.text.count("is missing") == 1
    assert caplog.text.count("is back") == 1


def test_a_vanished_inbox_pauses_instead_of_refusing(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    from flairwatch.daemon.watch import Daemon
    from tests.daemon_fixtures import copy_in, stage_series

    inbox = tmp_path / "in"
    for name in ("a", "b"):  # 2 x 12 files
        copy_in(stage_series(tmp_path / "staging", name), inbox, name)
    cfg = Config(inbox=inbox, results=tmp_path / "out", state=tmp_path / "state",
                 settle_seconds=0.0)  # fmt: skip
    away = tmp_path / "away"
    with Ledger.open(tmp_path / "state") as led, caplog.at_level("INFO"):
        daemon = Daemon(cfg, led, b"k" * 32)
        daemon.intake.lost_grace_seconds = 60.0
        daemon.intake.scan(1.0)
        daemon.intake.scan(2.0)
        assert [j.state for j in led.jobs_in(JobState.QUEUED)] == [JobState.QUEUED] * 2
        inbox.rename(away)  # the share goes away: an empty mount point stays
        inbox.mkdir()
        daemon.intake.scan(3.0)
        assert daemon.intake.inbox_away() and "vanished" in (daemon._pause_state() or "")
        assert len(led.known_files()) == 24  # nothing recorded as gone, nothing refused
        assert len(led.jobs_in(JobState.QUEUED)) == 2
        inbox.rmdir()
        away.rename(inbox)  # it comes back
        daemon.intake.scan(4.0)
        assert not daemon.intake.inbox_away() and daemon._pause_state() is None
        inbox.rename(away)
        inbox.mkdir()
        daemon.intake.scan(10.0)
        daemon.intake.scan(40.0)  # still within the grace time
        assert len(led.known_files()) == 24
        daemon.intake.scan(71.0)  # away for longer than the grace time: taken as removed
        assert led.known_files() == {} and not daemon.intake.inbox_away()
    assert caplog.text.count("vanished at once") == 2  # once per loss, not per rescan
    assert "files are back" in caplog.text and "taken as removed" in caplog.text


def test_scanner_retries_unreadable_files_and_notices_chmod(tmp_path: Path) -> None:
    import os
    import stat as stat_mod

    from flairwatch.intake.discover import read_record
    from flairwatch.records import FileRecord
    from tests.daemon_fixtures import copy_in, stage_series

    copy_in(stage_series(tmp_path / "staging", "a"), tmp_path / "in", "a")
    locked, flaky = sorted((tmp_path / "in" / "a").iterdir())[:2]
    locked.chmod(0)  # what a sender's umask or a wrong owner leaves
    failures = {"io": 1}
    reads: list[str] = []

    def reader(path: Path) -> FileRecord:
        # the tests run as root, whom the kernel lets read a mode-000 file: answer as it
        # answers any other user (open(2): EACCES); and one transient EIO on another file
        reads.append(path.name)
        if not os.stat(path).st_mode & stat_mod.S_IRUSR:
            return FileRecord(path, 0, 0, reason="cannot read: Permission denied")
        if path == flaky and failures["io"]:
            failures["io"] -= 1
            return FileRecord(path, 0, 0, reason="cannot read: Input/output error")
        return read_record(path)

    scanner = InboxScanner(tmp_path / "in", read=reader)
    first = scanner.scan()
    (series,) = first.series.values()
    assert len(series.files) == 10 and first.records[str(locked)].reason
    assert first.records[str(flaky)].reason == "cannot read: Input/output error"
    second = scanner.scan()  # nothing changed on disk, but unreadable files are tried again
    assert sorted(reads[len(first.records) :]) == sorted([locked.name, flaky.name])
    assert second.records[str(flaky)].reason is None  # the EIO has passed
    assert second.records[str(locked)].reason  # the permission is still wrong
    locked.chmod(0o644)  # fixed by a person: the ctime moves, the size and mtime do not
    third = scanner.scan()
    assert third.read == 1 and third.records[str(locked)].reason is None
    (series,) = third.series.values()
    assert len(series.files) == 12
    assert scanner.scan().read == 0  # everything readable and unchanged: no header read at all
