"""Daemon faults: junk input, kill -9, crash leftovers, a watched folder deleted and recreated,
hostile header values.

Real `flairwatch watch` processes, real files, real watchdog and SQLite.
"""

from __future__ import annotations

import errno
import os
import random
import re
import shutil
import signal
import sqlite3
import subprocess
import sys
import time
from dataclasses import replace
from pathlib import Path

import pytest

from tests.daemon_fixtures import (
    FLAIR,
    complete_results,
    copy_in,
    half_built,
    jobs,
    run_once,
    series_uid_of,
    stage_series,
    start_daemon,
    states,
    stop,
    wait_for,
    write_config,
    write_junk,
)


def _all_files(root: Path) -> list[Path]:
    return sorted(p for p in root.rglob("*") if p.is_file())


def test_junk_never_gives_a_result(tmp_path: Path, tiny_model_manifest: Path) -> None:
    cfg = write_config(tmp_path, tiny_model_manifest, settle=1.0, quarantine=True)
    kinds = write_junk(tmp_path / "inbox" / "junk", tmp_path / "staging", count=200)
    good = stage_series(tmp_path / "staging", "good")
    copy_in(good, tmp_path / "inbox", "good")
    before = len(_all_files(tmp_path / "inbox"))
    assert before == 200 + len(good)

    # exit 1: one FLAIR series had a cut file and was refused
    assert run_once(cfg, tmp_path / "once.log") == 1

    by_uid = {uid: (st, err) for uid, st, _rev, err, _path in jobs(tmp_path / "state")}
    assert by_uid[series_uid_of(good)] == ("done", None)
    for uid, kind in kinds.items():
        state, error = by_uid.get(uid, ("not a series", None))
        if kind in ("localizer", "non-FLAIR"):
            assert state == "skipped", kind
        elif kind in ("truncated pixel data", "no pixel data"):
            assert state == "refused" and error, kind
        else:
            assert state == "not a series", kind
    (result,) = complete_results(tmp_path / "results")
    assert "summary.json" in os.listdir(result)
    db = sqlite3.connect(tmp_path / "state" / "ledger.sqlite3")
    rules = dict(db.execute("SELECT series_uid, select_rule FROM series").fetchall())
    junk_rows = db.execute("SELECT COUNT(*) FROM files WHERE reason IS NOT NULL").fetchone()[0]
    db.close()
    uid_of = {k: u for u, k in kinds.items()}
    assert rules[uid_of["localizer"]] == "description_excluded"
    assert rules[uid_of["non-FLAIR"]] in ("inversion_time", "description")
    assert junk_rows >= 200 - 3 * 12 - 3  # every unusable file is recorded with its reason
    # nothing lost: the refused series moved to quarantine, everything else left in place
    moved = _all_files(tmp_path / "quarantine")
    assert len(moved) == 12 + 1  # the cut series and the image without pixel data
    assert len(_all_files(tmp_path / "inbox")) + len(moved) == before


def test_kill_9_at_random_moments_gives_one_result_per_series(
    tmp_path: Path, tiny_model_manifest: Path
) -> None:
    cfg = write_config(tmp_path, tiny_model_manifest, settle=0.5)
    uids = []
    for i in range(6):
        files = stage_series(tmp_path / "staging", f"k{i}")
        copy_in(files, tmp_path / "inbox", f"k{i}")
        uids.append(series_uid_of(files))
    rng = random.Random(20261201)
    for cycle in range(3):
        proc = start_daemon(cfg, tmp_path / "daemon.log")
        time.sleep(rng.uniform(1.0, 2.5))
        proc.send_signal(signal.SIGKILL)
        proc.wait(10)
        if cycle == 0:  # leftovers of a crash inside a write: a half-built folder
            (tmp_path / "results" / "sX" / "tX" / "eX" / ".building-v-1234").mkdir(parents=True)
    proc = start_daemon(cfg, tmp_path / "daemon.log")
    try:
        wait_for(
            lambda: (
                sorted(states(tmp_path / "state").items()) == [(u, ["done"]) for u in sorted(uids)]
            ),
            60,
            "every series done",
        )
    finally:
        assert stop(proc) == 0
    results = complete_results(tmp_path / "results")
    assert len(results) == len(uids)  # exactly one version folder per series
    assert half_built(tmp_path / "results") == []
    db = sqlite3.connect(tmp_path / "state" / "ledger.sqlite3")
    assert db.execute("SELECT COUNT(*), SUM(current) FROM results").fetchone() == (6, 6)
    db.close()


def test_complete_folder_unknown_to_ledger_is_adopted(
    tmp_path: Path, tiny_model_manifest: Path
) -> None:
    # crash between the rename into place and the ledger update: a new ledger, same results
    cfg = write_config(tmp_path, tiny_model_manifest, settle=0.5)
    copy_in(stage_series(tmp_path / "staging", "a"), tmp_path / "inbox", "a")
    assert run_once(cfg, tmp_path / "once.log") == 0
    (result,) = complete_results(tmp_path / "results")
    stamp = (result / "summary.json").stat().st_mtime_ns
    key = (tmp_path / "state" / "installation.key").read_bytes()
    shutil.rmtree(tmp_path / "state")
    (tmp_path / "state").mkdir()
    (tmp_path / "state" / "installation.key").write_bytes(key)
    assert run_once(cfg, tmp_path / "once.log") == 0
    assert complete_results(tmp_path / "results") == [result]
    assert (result / "summary.json").stat().st_mtime_ns == stamp  # not recomputed
    db = sqlite3.connect(tmp_path / "state" / "ledger.sqlite3")
    assert db.execute("SELECT adopted, current FROM results").fetchall() == [(1, 1)]
    db.close()


def test_watched_folder_recreated_is_watched_again(
    tmp_path: Path, tiny_model_manifest: Path
) -> None:
    # the watch on a deleted folder sees nothing of its successor; the supervisor must notice
    cfg = write_config(tmp_path, tiny_model_manifest, settle=1.0, rescan=600)
    proc = start_daemon(cfg, tmp_path / "daemon.log")
    try:
        wait_for(
            lambda: "ready" in (tmp_path / "daemon.log").read_text(encoding="utf-8"),
            30,
            "daemon start",
        )
        shutil.rmtree(tmp_path / "inbox")
        time.sleep(0.5)
        (tmp_path / "inbox").mkdir()
        files = stage_series(tmp_path / "staging", "again")
        copy_in(files, tmp_path / "inbox", "again")
        wait_for(lambda: states(tmp_path / "state") == {series_uid_of(files): ["done"]}, 30, "done")
    finally:
        assert stop(proc) == 0
    assert "restarting it" in (tmp_path / "daemon.log").read_text(encoding="utf-8")


@pytest.mark.filterwarnings("ignore:Invalid value for VR UI")  # the hostile UID, on purpose
def test_hostile_header_values_stay_inside_results(
    tmp_path: Path, tiny_model_manifest: Path
) -> None:
    base = tmp_path / "site"
    base.mkdir()
    cfg = write_config(base, tiny_model_manifest, settle=0.5)
    spec = replace(FLAIR, patient_id="../../../../escape\x1b[2J", description="../../FLAIR/..")
    files = stage_series(tmp_path / "staging", "evil", spec, series_uid="../../../../evil")
    copy_in(files, base / "inbox", "evil")
    outside_before = sorted(p.name for p in tmp_path.iterdir())
    assert run_once(cfg, base / "once.log") == 0
    assert sorted(p.name for p in tmp_path.iterdir()) == outside_before
    results = (base / "results").resolve()
    (result,) = complete_results(base / "results")
    for path in (base / "results").rglob("*"):
        assert results in path.resolve().parents
        rel = path.relative_to(base / "results")
        # result paths are built from keys only: short hex keys and fixed file names (docs/architecture.md)
        assert all(re.fullmatch(r"[A-Za-z0-9._-]+", part) for part in rel.parts), rel
    assert "escape" not in str(result) and "evil" not in str(result)


def test_once_after_a_kill_mid_series_does_not_count_the_attempt(
    tmp_path: Path, tiny_model_manifest: Path
) -> None:
    # the daemon dies while its worker holds a series: the next run owns the state folder's
    # lock, so it requeues the job at once (no pid check), without counting it against the series
    cfg = write_config(tmp_path, tiny_model_manifest, settle=0.3)
    spec = replace(FLAIR, rows=256, columns=256, slices=40, pixel_spacing=(0.9, 0.9))
    copy_in(stage_series(tmp_path / "staging", "a", spec), tmp_path / "inbox", "a")
    log = tmp_path / "daemon.log"
    proc = start_daemon(cfg, log)
    try:
        wait_for(
            lambda: "running (attempt 1)" in log.read_text(encoding="utf-8"),
            30,
            "a running series",
            step=0.02,
        )
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(10)
    assert [st for _uid, st, *_ in jobs(tmp_path / "state")] == ["running"]
    assert run_once(cfg, tmp_path / "once.log", timeout=60) == 0
    db = sqlite3.connect(tmp_path / "state" / "ledger.sqlite3")
    assert db.execute("SELECT state, attempts FROM jobs").fetchall() == [("done", 1)]
    db.close()
    assert "were running when the daemon stopped" in (tmp_path / "once.log").read_text("utf-8")


def _mount_tmpfs(folder: Path, size: str) -> bool:
    folder.mkdir(parents=True, exist_ok=True)
    if os.geteuid() != 0:
        return False
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(folder)],
                          capture_output=True, check=False)  # fmt: skip
    return done.returncode == 0


def _fill(folder: Path) -> Path:
    """Write zeros until the file system says ENOSPC; returns the filler file."""
    filler = folder / "filler.bin"
    with open(filler, "wb") as fh:
        try:
            while True:
                fh.write(b"\0" * 65536)
                fh.flush()
        except OSError as exc:
            assert exc.errno == errno.ENOSPC
    return filler


def test_full_results_disk_pauses_dispatch_and_fails_nothing(
    tmp_path: Path, tiny_model_manifest: Path
) -> None:
    # a real ENOSPC (statvfs and write(2) on a small tmpfs), not a simulated one
    results = tmp_path / "results"
    if not _mount_tmpfs(results, "2m"):
        pytest.skip("needs root to mount a small tmpfs for a real full disk")
    try:
        filler = _fill(results)
        cfg = write_config(tmp_path, tiny_model_manifest, settle=0.3)
        uids = []
        for name in ("a", "b"):
            files = stage_series(tmp_path / "staging", name)
            copy_in(files, tmp_path / "inbox", name)
            uids.append(series_uid_of(files))
        log = tmp_path / "daemon.log"
        proc = start_daemon(cfg, log)
        try:
            wait_for(lambda: "dispatch paused" in log.read_text("utf-8"), 30, "the pause")
            time.sleep(1.0)  # more rounds of the loop: nothing else may be dispatched or failed
            states_now = [st for _uid, st, *_ in jobs(tmp_path / "state")]
            assert sorted(states_now) == ["queued", "queued"]
            status = subprocess.run(
                [sys.executable, "-m", "flairwatch.cli", "status", "--state",
                 str(tmp_path / "state"), "--stale-after", "60"],
                capture_output=True, text=True, check=False, timeout=60,
            )  # fmt: skip
            assert status.returncode == 1 and "no space left on the results disk" in status.stdout
            filler.unlink()  # space comes back: dispatch resumes by itself
            wait_for(
                lambda: (
                    sorted(states(tmp_path / "state").items())
                    == [(u, ["done"]) for u in sorted(uids)]
                ),
                60,
                "both series done",
            )
        finally:
            assert stop(proc) == 0
        db = sqlite3.connect(tmp_path / "state" / "ledger.sqlite3")
        # the full disk was not the series' fault: one attempt each, the one that succeeded
        assert db.execute("SELECT attempts FROM jobs").fetchall() == [(1,), (1,)]
        db.close()
        assert log.read_text("utf-8").count("dispatch paused") == 1  # logged once per change
        assert "dispatch resumes" in log.read_text("utf-8")
    finally:
        subprocess.run(["umount", "-l", str(results)], check=False)
