"""Ledger tests: real SQLite files, real processes."""

from __future__ import annotations

import multiprocessing
import os
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from flairwatch.errors import ConfigInvalid
from flairwatch.ledger import schema
from flairwatch.ledger.owners import DAEMON_LOCK, Owner, new_token
from flairwatch.ledger.schema import SCHEMA_VERSION
from flairwatch.ledger.store import (
    LEDGER_FILE,
    FileRow,
    JobState,
    Ledger,
    check_local_disk,
    mount_fstype,
)

# The example line of proc(5), "/proc/pid/mountinfo", plus an NFS and a CIFS mount in the same
# format (field 5 mount point, "-" separator, then the file-system type).
MOUNTINFO = """\
22 1 8:1 / / rw,relatime shared:1 - ext4 /dev/sda1 rw
36 35 98:0 /mnt1 /mnt2 rw,noatime master:1 - ext3 /dev/root rw,errors=continue
40 22 0:50 / /srv/share rw,relatime shared:30 - nfs4 fileserver:/export rw,vers=4.2
41 22 0:51 / /mnt/lab\\040data rw,relatime - cifs //nas/lab rw
"""


def test_mount_type_from_mountinfo() -> None:
    # proc(5): the longest mount point containing the path decides; octal escapes for blanks
    assert mount_fstype(Path("/mnt2/x"), MOUNTINFO) == "ext3"
    assert mount_fstype(Path("/mnt22"), MOUNTINFO) == "ext4"
    assert mount_fstype(Path("/srv/share/state"), MOUNTINFO) == "nfs4"
    assert mount_fstype(Path("/mnt/lab data/state"), MOUNTINFO) == "cifs"


def test_network_state_folder_is_refused() -> None:
    # sqlite.org/wal.html: WAL does not work over a network file system
    with pytest.raises(ConfigInvalid, match="network file system"):
        check_local_disk(Path("/srv/share/state"), MOUNTINFO)
    with pytest.raises(ConfigInvalid, match="cifs"):
        check_local_disk(Path("/mnt/lab data/flairwatch"), MOUNTINFO)
    check_local_disk(Path("/var/lib/flairwatch"), MOUNTINFO)  # ext4: accepted


def test_open_sets_wal_and_full_sync(tmp_path: Path) -> None:
    with Ledger.open(tmp_path / "state") as led:
        # PRAGMA docs: synchronous FULL is 2
        assert led.query("PRAGMA journal_mode")[0][0] == "wal"
        assert led.query("PRAGMA synchronous")[0][0] == 2
        assert led.query("PRAGMA user_version")[0][0] == SCHEMA_VERSION == 4
    with Ledger.open(tmp_path / "state") as led:  # reopening keeps the schema
        assert led.state_counts() == {}


def _add_series(led: Ledger, uid: str, n: int, now: float) -> int:
    files = [
        FileRow(f"/in/{uid}/{i}.dcm", 1000 + i, 10**9, f"{uid}.{i}", "1.2.3", uid) for i in range(n)
    ]
    led.record_scan(files, [], now)
    srow, job = led.new_revision("1.2.3", uid, lambda r: ("s1", "t1", f"e1-r{r}"), now)
    assert led.take_files(srow.id, "1.2.3", uid) == n
    assert led.move_job(job.id, [JobState.SETTLING], JobState.QUEUED, now)
    return job.id


def test_revision_keeps_old_files_and_takes_late_ones(tmp_path: Path) -> None:
    with Ledger.open(tmp_path) as led:
        job1 = _add_series(led, "9.1", 3, 100.0)
        assert led.known_sops("1.2.3", "9.1") == {"9.1.0", "9.1.1", "9.1.2"}
        late = FileRow("/in/9.1/late.dcm", 5, 10**9, "9.1.9", "1.2.3", "9.1")
        led.record_scan([late], [], 200.0)
        # the late instance is present but not yet in any revision
        assert "9.1.9" not in led.known_sops("1.2.3", "9.1")
        s2, job2 = led.new_revision("1.2.3", "9.1", lambda r: ("s1", "t1", f"e1-r{r}"), 201.0)
        assert s2.revision == 2 and job2.state is JobState.SETTLING
        assert led.take_files(s2.id, "1.2.3", "9.1") == 1
        assert len(led.revision_files(s2.id)) == 4
        assert len(led.revision_files(led.job(job1).series_id)) == 3
        # a file replaced by another instance at the same path leaves its revision
        led.record_scan([FileRow("/in/9.1/0.dcm", 7, 1, "9.1.x", "1.2.3", "9.1")], [], 300.0)
        assert len(led.revision_files(s2.id)) == 3
        led.record_scan([], ["/in/9.1/1.dcm"], 301.0)
        assert "/in/9.1/1.dcm" not in led.known_files()


def test_claim_order_state_guard_and_current_result(tmp_path: Path) -> None:
    with Ledger.open(tmp_path) as led:
        low = _add_series(led, "9.1", 2, 1.0)
        high = _add_series(led, "9.2", 2, 2.0)
        led.move_job(high, [JobState.QUEUED], JobState.QUEUED, 2.0, priority=5)
        led.move_job(low, [JobState.QUEUED], JobState.QUEUED, 2.0, not_before=50.0)
        assert led.claim_next(10.0, "m", "1.0.0", 123, min_priority=6) is None
        # a job queued for another model version waits for whoever runs that version
        other = _add_series(led, "9.3", 1, 3.0)
        led.move_job(other, [JobState.QUEUED], JobState.QUEUED, 3.0, model_version="2.0.0",
                     model_name="m", priority=9)  # fmt: skip
        first = led.claim_next(10.0, "m", "1.0.0", 123, min_priority=0)
        assert first is not None and first.id == high and first.state is JobState.RUNNING
        assert led.claim_next(10.0, "m", "1.0.0", 123) is None  # low waits for its retry time
        assert not led.move_job(high, [JobState.QUEUED], JobState.DONE, 11.0)
        summary = {"model": {"name": "m", "version": "1.0.0"}, "lesion_volume_ml": 1.5}
        led.finish_done(high, "/r/a", summary, adopted=False, seconds=3.0, now=12.0)
        # a later revision's result becomes the current one
        _, job2 = led.new_revision("1.2.3", "9.2", lambda r: ("s", "t", f"e-r{r}"), 13.0)
        led.move_job(job2.id, [JobState.SETTLING], JobState.QUEUED, 13.0)
        assert led.claim_next(14.0, "m", "1.0.0", 1) is not None
        led.finish_done(job2.id, "/r/b", summary, adopted=True, seconds=1.0, now=15.0)
        rows = led.query("SELECT result_path, current FROM results ORDER BY id")
        assert rows == [("/r/a", 0), ("/r/b", 1)]
        assert led.state_counts() == {"done": 2, "queued": 2}
        assert led.job(other).state is JobState.QUEUED
        assert led.done_since(0.0) == (2, 2.0)


# A process that claims one job through its own Ledger and then waits: a re-run, or a daemon
# whose worker holds the job. It prints the job id once claimed.
CLAIMER = """
import sys, time
from pathlib import Path
from flairwatch.ledger.store import Ledger
led = Ledger.open(Path(sys.argv[1]))
job = led.claim_next(time.time(), "m", "1", 4242)
print(job.id if job else 0, flush=True)
time.sleep(600)
"""


def _start_claimer(state: Path) -> tuple[subprocess.Popen[str], int]:
    proc = subprocess.Popen(
        [sys.executable, "-c", CLAIMER, str(state)], stdout=subprocess.PIPE, text=True
    )
    assert proc.stdout is not None
    return proc, int(proc.stdout.readline())


def test_dead_owner_is_found_by_its_lock_even_as_a_zombie(tmp_path: Path) -> None:
    # the case that kept a series 'running' forever: the owner was killed, but kill(pid, 0)
    # still answers for its zombie (proc(5): state Z until the parent reaps it)
    with Ledger.open(tmp_path) as led:
        job = _add_series(led, "9.1", 1, 1.0)
    proc, claimed = _start_claimer(tmp_path)
    try:
        assert claimed == job
        with Ledger.open(tmp_path) as led:
            assert led.requeue_orphans(2.0) == []  # a live owner keeps its job
            assert led.job(job).state is JobState.RUNNING
            proc.kill()  # SIGKILL; not reaped yet
            wait_until = time.monotonic() + 10
            while "Z" not in Path(f"/proc/{proc.pid}/stat").read_text("ascii").split()[2]:
                assert time.monotonic() < wait_until, "the owner did not become a zombie"
                time.sleep(0.02)
            os.kill(proc.pid, 0)  # the old pid check would say "alive"
            assert led.requeue_orphans(3.0) == [job]
            again = led.job(job)
            # the attempt is given back: the series did not fail, its owner died
            assert again.state is JobState.QUEUED and again.attempts == 0
            assert not list((tmp_path / "owners").iterdir())  # the dead run's lock file is gone
    finally:
        proc.kill()
        proc.wait()


def test_daemon_lock_owns_every_earlier_daemon_job(tmp_path: Path) -> None:
    first, second = Owner(new_token(), DAEMON_LOCK), Owner(new_token(), DAEMON_LOCK)
    with Ledger.open(tmp_path) as old:
        old.take_ownership(first)
        job = _add_series(old, "9.1", 1, 1.0)
        assert old.claim_next(2.0, "m", "1", 7) is not None
        # a re-run elsewhere holds its own job under its own lock
        rerun_job = _add_series(old, "9.9", 1, 1.0)
        proc, claimed_by_rerun = _start_claimer(tmp_path)
        try:
            assert claimed_by_rerun == rerun_job
            with Ledger.open(tmp_path) as new:
                new.take_ownership(second)
                # the new lock holder requeues the earlier daemon's job without any pid check,
                # and leaves the live re-run's job alone
                assert new.requeue_orphans(3.0, held=()) == [job]
                assert new.job(rerun_job).state is JobState.RUNNING
                claimed = new.claim_next(4.0, "m", "1", 8)
                assert claimed is not None and claimed.id == job and claimed.owner == second.token
                # the stale owner can no longer touch it, nor record a result for it
                assert not old.move_job(job, [JobState.RUNNING], JobState.FAILED, 5.0)
                summary = {"model": {"name": "m", "version": "1"}}
                assert not old.finish_done(job, "/r/x", summary, adopted=False, seconds=1.0,
                                           now=5.0)  # fmt: skip
                assert new.query("SELECT COUNT(*) FROM results")[0][0] == 0
                # supervise: our own running job that no worker holds goes back to the queue
                assert new.requeue_orphans(6.0, held={job}) == []
                assert new.requeue_orphans(6.0, held=set()) == [job]
        finally:
            proc.kill()
            proc.wait()
        with Ledger.open(tmp_path) as new:  # the re-run is gone: its job is an orphan now
            assert new.requeue_orphans(7.0) == [rerun_job]


def _claimer(state: str, out: multiprocessing.Queue[list[int]]) -> None:
    got = []
    with Ledger.open(Path(state)) as led:
        while (job := led.claim_next(time.time(), "m", "1", os.getpid())) is not None:
            got.append(job.id)
    out.put(got)


def test_concurrent_claims_never_take_a_job_twice(tmp_path: Path) -> None:
    # real processes with their own connections race on BEGIN IMMEDIATE
    with Ledger.open(tmp_path) as led:
        ids = [_add_series(led, f"9.{i}", 1, float(i)) for i in range(40)]
    ctx = multiprocessing.get_context("spawn")
    out: multiprocessing.Queue[list[int]] = ctx.Queue()
    procs = [ctx.Process(target=_claimer, args=(str(tmp_path), out)) for _ in range(3)]
    for p in procs:
        p.start()
    taken = [job for _ in procs for job in out.get(timeout=60)]
    for p in procs:
        p.join(10)
    assert sorted(taken) == ids


def test_waits_for_another_writer(tmp_path: Path) -> None:
    with Ledger.open(tmp_path) as led:
        other = sqlite3.connect(
            tmp_path / LEDGER_FILE, isolation_level=None, check_same_thread=False
        )
        other.execute("BEGIN IMMEDIATE")
        threading.Timer(0.4, other.execute, args=("COMMIT",)).start()
        t0 = time.monotonic()
        _add_series(led, "9.1", 1, 1.0)
        assert time.monotonic() - t0 >= 0.3
        other.close()


def test_connection_does_not_cross_fork(tmp_path: Path) -> None:
    with Ledger.open(tmp_path) as led:
        pid = os.fork()
        if pid == 0:  # child: using the parent's connection must fail loudly
            try:
                led.state_counts()
            except RuntimeError:
                os._exit(7)
            os._exit(0)
        _, status = os.waitpid(pid, 0)
        assert os.waitstatus_to_exitcode(status) == 7
        assert led.state_counts() == {}


def test_backup_is_a_consistent_copy(tmp_path: Path) -> None:
    with Ledger.open(tmp_path / "state") as led:
        for i in range(5):
            _add_series(led, f"9.{i}", 3, float(i))
        led.beat(1, "running", 5.0, inbox="/in")
        target = tmp_path / "copy.sqlite3"
        led.backup_to(target)
    copy = sqlite3.connect(target)
    assert copy.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    assert copy.execute("SELECT COUNT(*) FROM files").fetchone()[0] == 15
    assert copy.execute("SELECT COUNT(*) FROM jobs WHERE state='queued'").fetchone()[0] == 5
    copy.close()
    assert not list(tmp_path.glob(".copy*"))


# ---- schema migration ------------------------------------------------------------------------

# The ledger tables of flairwatch 0.1 (schema 1), copied verbatim from flairwatch/ledger_schema.py
# as it was before the 0.2 layout: a ledger that an operator's lab already has on disk.
SCHEMA_V1 = """
CREATE TABLE series (
    id INTEGER PRIMARY KEY,
    study_uid TEXT NOT NULL,
    series_uid TEXT NOT NULL,
    revision INTEGER NOT NULL,
    subject_key TEXT,
    study_key TEXT,
    series_key TEXT,
    selection TEXT NOT NULL DEFAULT 'pending' CHECK (selection IN ('pending','selected','skipped')),
    select_rule TEXT,
    select_reason TEXT,
    signature TEXT,
    n_files INTEGER NOT NULL DEFAULT 0,
    stable_since REAL,
    first_seen REAL NOT NULL,
    last_seen REAL NOT NULL,
    UNIQUE (study_uid, series_uid, revision)
);
CREATE TABLE files (
    id INTEGER PRIMARY KEY,
    path TEXT NOT NULL UNIQUE,
    size INTEGER NOT NULL,
    mtime_ns INTEGER NOT NULL,
    sop_uid TEXT,
    study_uid TEXT,
    series_uid TEXT,
    series_id INTEGER REFERENCES series(id),
    reason TEXT,
    gone INTEGER NOT NULL DEFAULT 0,
    first_seen REAL NOT NULL,
    last_seen REAL NOT NULL
);
CREATE INDEX files_identity ON files (study_uid, series_uid);
CREATE TABLE jobs (
    id INTEGER PRIMARY KEY,
    series_id INTEGER NOT NULL REFERENCES series(id),
    state TEXT NOT NULL,
    attempts INTEGER NOT NULL DEFAULT 0,
    priority INTEGER NOT NULL DEFAULT 0,
    model_name TEXT,
    model_version TEXT,
    not_before REAL NOT NULL DEFAULT 0,
    created REAL NOT NULL,
    queued REAL,
    started REAL,
    finished REAL,
    seconds REAL,
    error TEXT,
    result_path TEXT,
    worker_pid INTEGER,
    worker_rss_kb INTEGER
);
CREATE INDEX jobs_state ON jobs (state, priority, id);
CREATE INDEX jobs_series ON jobs (series_id);
CREATE TABLE results (
    id INTEGER PRIMARY KEY,
    series_id INTEGER NOT NULL REFERENCES series(id),
    job_id INTEGER REFERENCES jobs(id),
    model_name TEXT NOT NULL,
    model_version TEXT NOT NULL,
    result_path TEXT NOT NULL,
    lesion_volume_ml REAL,
    lesion_count INTEGER,
    adopted INTEGER NOT NULL DEFAULT 0,
    current INTEGER NOT NULL DEFAULT 0,
    created REAL NOT NULL
);
CREATE INDEX results_series ON results (series_id);
CREATE TABLE qc_marks (
    id INTEGER PRIMARY KEY,
    result_id INTEGER NOT NULL REFERENCES results(id),
    mark TEXT NOT NULL CHECK (mark IN ('accepted','rejected')),
    note TEXT,
    marked_by TEXT,
    marked REAL NOT NULL
);
CREATE TABLE corrected_masks (
    id INTEGER PRIMARY KEY,
    result_id INTEGER NOT NULL REFERENCES results(id),
    path TEXT NOT NULL,
    note TEXT,
    added REAL NOT NULL
);
CREATE TABLE heartbeat (
    id INTEGER PRIMARY KEY CHECK (id = 1),
    pid INTEGER NOT NULL,
    host TEXT,
    started REAL NOT NULL,
    beat REAL NOT NULL,
    state TEXT NOT NULL,
    inbox TEXT
);
"""


def _old_ledger(state: Path) -> Path:
    """A schema-1 ledger with a done, a refused ('rejected' then), a failed and a queued job."""
    state.mkdir()
    path = state / LEDGER_FILE
    db = sqlite3.connect(path, isolation_level=None)
    db.executescript(SCHEMA_V1)
    db.execute("PRAGMA user_version=1")
    for i, st in enumerate(("done", "rejected", "failed", "queued"), start=1):
        db.execute(
            "INSERT INTO series (id, study_uid, series_uid, revision, series_key, first_seen,"
            " last_seen) VALUES (?, '1.2', ?, 1, ?, 1.0, 1.0)",
            (i, f"9.{i}", f"e{i}"),
        )
        db.execute(
            "INSERT INTO jobs (id, series_id, state, attempts, created, finished, error)"
            " VALUES (?, ?, ?, 1, 1.0, ?, ?)",
            (i, i, st, 2.0 if st != "queued" else None, "slice gap" if st == "rejected" else None),
        )
    db.execute(
        "INSERT INTO results (id, series_id, job_id, model_name, model_version, result_path,"
        " current, created) VALUES (1, 1, 1, 'm', '1', '/r/e1/v1', 1, 2.0)"
    )
    # a QC decision 'rejected' is not a job state: the migration must leave it alone
    db.execute(
        "INSERT INTO qc_marks (result_id, mark, note, marked) VALUES (1, 'rejected', 'motion', 3.0)"
    )
    db.close()
    return path


def _table_layout(led: Ledger) -> dict[str, tuple[object, ...]]:
    names = [r[0] for r in led.query("SELECT name FROM sqlite_master WHERE type = 'table'")]
    return {
        n: (
            tuple(led.query(f"PRAGMA table_info({n})")),
            tuple(sorted(r[1] for r in led.query(f"PRAGMA index_list({n})"))),
        )
        for n in sorted(names)
    }


def test_schema_1_ledger_is_migrated_in_place(tmp_path: Path) -> None:
    path = _old_ledger(tmp_path / "state")
    # a reader cannot migrate: it says what to do instead of misreading the old state names
    with pytest.raises(ConfigInvalid, match=r"schema 1, older .* start 'flairwatch watch'"):
        Ledger.open_readonly(tmp_path / "state")
    with Ledger.open(tmp_path / "state") as led:
        assert led.query("PRAGMA user_version")[0][0] == SCHEMA_VERSION
        # schema 3: running jobs name their owner; none of the old rows has one
        assert led.query("SELECT COUNT(*) FROM jobs WHERE owner IS NULL")[0][0] == 4
        states = dict(led.query("SELECT id, state FROM jobs"))
        assert states == {1: "done", 2: "refused", 3: "failed", 4: "queued"}
        assert [j.id for j in led.jobs_in(JobState.REFUSED)] == [2]
        assert led.job(2).error == "slice gap"
        assert led.state_counts() == {"done": 1, "refused": 1, "failed": 1, "queued": 1}
        assert led.query("SELECT mark, note FROM qc_marks") == [("rejected", "motion")]
        assert led.query("SELECT result_path, current FROM results") == [("/r/e1/v1", 1)]
        assert led.query("SELECT COUNT(*) FROM series")[0][0] == 4
        migrated = _table_layout(led)
    with Ledger.open(tmp_path / "fresh") as led:
        # every migration step together gives exactly the tables a new ledger gets (SQLite's
        # PRAGMA table_info and index_list describe them, so the comparison is SQLite's own view)
        assert migrated == _table_layout(led)
        assert {"outbox", "canary_runs"} <= set(migrated)
    with Ledger.open_readonly(tmp_path / "state") as led:  # now readable by status
        assert led.recent_outcomes(5).count("refused") == 1
    # the pre-migration copy is kept, untouched
    keep = sqlite3.connect(tmp_path / "state" / "ledger-schema1.sqlite3")
    assert keep.execute("PRAGMA user_version").fetchone()[0] == 1
    assert keep.execute("SELECT state FROM jobs WHERE id = 2").fetchone()[0] == "rejected"
    keep.close()
    assert path.exists()


def test_failed_migration_leaves_the_old_ledger_intact(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    _old_ledger(tmp_path / "state")
    broken = {2: (*schema.MIGRATIONS[2], "UPDATE no_such_table SET x = 1")}
    monkeypatch.setattr(schema, "MIGRATIONS", broken)
    with pytest.raises(sqlite3.OperationalError, match="no_such_table"):
        Ledger.open(tmp_path / "state")
    db = sqlite3.connect(tmp_path / "state" / LEDGER_FILE)
    # one transaction: neither the renamed states nor the new version number were kept
    assert db.execute("PRAGMA user_version").fetchone()[0] == 1
    assert db.execute("SELECT state FROM jobs WHERE id = 2").fetchone()[0] == "rejected"
    db.close()
    monkeypatch.undo()
    with Ledger.open(tmp_path / "state") as led:  # the next start succeeds
        assert led.job(2).state is JobState.REFUSED


def test_newer_ledger_is_refused(tmp_path: Path) -> None:
    with Ledger.open(tmp_path) as led:
        led.query(f"PRAGMA user_version={SCHEMA_VERSION + 1}")
    with pytest.raises(ConfigInvalid, match="newer than this flairwatch"):
        Ledger.open(tmp_path)
    with pytest.raises(ConfigInvalid, match="upgrade flairwatch"):
        Ledger.open_readonly(tmp_path)
