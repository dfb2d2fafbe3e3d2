"""Daemon arrivals: slow copies, interleaved series, late instances, polling rescans.

Real `flairwatch watch` processes, real files, real watchdog and SQLite. Settle times are a few
seconds to keep the run short; the rule under test is the same at 30 s.
"""

from __future__ import annotations

import json
import threading
import time
from dataclasses import replace
from pathlib import Path

from pydicom import dcmread
from pydicom.uid import generate_uid

from tests.daemon_fixtures import (
    FLAIR,
    complete_results,
    copy_in,
    half_built,
    jobs,
    stage_series,
    start_daemon,
    states,
    stop,
    wait_for,
    write_config,
)

SETTLE = 2.5


def test_slow_copy_is_not_processed_early(tmp_path: Path, tiny_model_manifest: Path) -> None:
    # one file per second with settle 2.5 s: the series must wait for the last file
    cfg = write_config(tmp_path, tiny_model_manifest, settle=SETTLE)
    files = stage_series(tmp_path / "staging", "slow", replace(FLAIR, slices=8))
    proc = start_daemon(cfg, tmp_path / "daemon.log")
    try:
        wait_for(lambda: (tmp_path / "state" / "ledger.sqlite3").exists(), 30, "the ledger")
        seen: list[list[str]] = []
        for path in files:
            copy_in([path], tmp_path / "inbox", "slow")
            time.sleep(1.0)
            seen.append([st for _, st, *_ in jobs(tmp_path / "state")])
        # while files kept coming, the series never left "settling" and nothing was written
        assert all(s in ([], ["settling"]) for s in seen), seen
        assert seen[-1] == ["settling"]
        wait_for(lambda: [s for _, s, *_ in jobs(tmp_path / "state")] == ["done"], 30, "done")
        (result,) = complete_results(tmp_path / "results")
        summary = json.loads((result / "summary.json").read_text(encoding="utf-8"))
        assert summary["series_instance_uid"] == str(dcmread(files[0]).SeriesInstanceUID)
        mask_hdr = (result / "wmh_mask.nii.gz").stat()
        assert mask_hdr.st_size > 0
        assert (result / "wmh_mask.nii.gz").stat().st_mode & 0o007 == 0  # not world-readable
    finally:
        assert stop(proc) == 0
    log = (tmp_path / "daemon.log").read_text(encoding="utf-8")
    assert "settled, 8 files" in log  # all eight instances went into the one result


def test_interleaved_series_and_a_late_instance(tmp_path: Path, tiny_model_manifest: Path) -> None:
    cfg = write_config(tmp_path, tiny_model_manifest, settle=SETTLE)
    staged = [stage_series(tmp_path / "staging", f"s{i}") for i in range(3)]
    uids = [str(dcmread(s[0]).SeriesInstanceUID) for s in staged]
    proc = start_daemon(cfg, tmp_path / "daemon.log")
    try:
        # file by file, round robin over three series, all into one flat folder
        # (the staged series share file names, so each copy gets its series' prefix)
        for trio in zip(*staged, strict=True):
            for i, path in enumerate(trio):
                copy_in([path], tmp_path / "inbox", "flat", prefix=f"s{i}-")
            time.sleep(0.1)
        wait_for(
            lambda: [s for _, s, *_ in jobs(tmp_path / "state")] == ["done"] * 3,
            40,
            "three series done",
        )
        assert sorted(states(tmp_path / "state")) == sorted(uids)
        assert len(complete_results(tmp_path / "results")) == 3
        assert (tmp_path / "daemon.log").read_text(encoding="utf-8").count("settled, 12 files") == 3

        # a late instance of series 0 after it was done: a new revision, nothing lost
        late = dcmread(staged[0][0])
        late.SOPInstanceUID = late.file_meta.MediaStorageSOPInstanceUID = generate_uid()
        late.ImagePositionPatient = [-32.0, -32.0, -18.0 + 3.0 * 12]  # the 13th slice
        late.save_as(tmp_path / "inbox" / "flat" / "late.dcm", enforce_file_format=True)
        wait_for(lambda: states(tmp_path / "state")[uids[0]] == ["done", "done"], 40, "rev 2")
    finally:
        assert stop(proc) == 0
    revs = [(uid, rev, path) for uid, _st, rev, _e, path in jobs(tmp_path / "state")]
    rev2 = [p for uid, rev, p in revs if uid == uids[0] and rev == 2]
    assert len(rev2) == 1 and rev2[0] is not None and "-r2" in rev2[0]
    assert len(complete_results(tmp_path / "results")) == 4
    assert half_built(tmp_path / "results") == []


def test_polling_mode_finds_files_by_rescan(tmp_path: Path, tiny_model_manifest: Path) -> None:
    # no file-system events at all (as on a network share): only rescans see the files
    cfg = write_config(tmp_path, tiny_model_manifest, settle=1.0, rescan=1.5, polling=True)
    files = stage_series(tmp_path / "staging", "p")
    proc = start_daemon(cfg, tmp_path / "daemon.log")
    try:
        wait_for(lambda: (tmp_path / "state" / "ledger.sqlite3").exists(), 30, "the ledger")
        writer = threading.Thread(target=copy_in, args=(files, tmp_path / "inbox", "p"))
        writer.start()
        writer.join()
        wait_for(lambda: list(states(tmp_path / "state").values()) == [["done"]], 30, "done")
    finally:
        assert stop(proc) == 0
    assert "watcher" not in (tmp_path / "daemon.log").read_text(encoding="utf-8")
