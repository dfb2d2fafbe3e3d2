"""Helpers for daemon tests: synthetic series, junk files, a config file, a daemon process.

Series are small (64 x 64 x 12, the size the tiny test model works on). Everything runs as real
processes on real files with a real SQLite ledger.
"""

from __future__ import annotations

import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import replace
from pathlib import Path

import yaml
from pydicom import dcmread
from pydicom.uid import generate_uid

from tests.series_fixtures import SeriesSpec, write_series

REPO = Path(__file__).resolve().parent.parent
FLAIR = SeriesSpec()  # AX FLAIR: MR, ScanningSequence IR, InversionTime 2500 ms


def stage_series(
    staging: Path, name: str, spec: SeriesSpec = FLAIR, *, series_uid: str | None = None
) -> list[Path]:
    """Write one series outside the inbox (to be copied in later); returns its files."""
    return write_series(staging / name, spec, series_uid=series_uid)


def copy_in(
    paths: Sequence[Path], inbox: Path, subdir: str, *, interval: float = 0.0, prefix: str = ""
) -> None:
    """Copy files into ``inbox/subdir`` one by one (written in place, as many senders do)."""
    dest = inbox / subdir
    dest.mkdir(parents=True, exist_ok=True)
    for path in paths:
        shutil.copyfile(path, dest / f"{prefix}{path.name}")
        if interval:
            time.sleep(interval)


def write_config(
    tmp: Path,
    model: Path,
    *,
    settle: float = 2.0,
    rescan: float = 60.0,
    polling: bool = False,
    quarantine: bool = False,
    workers: int = 1,
    **extra: object,
) -> Path:
    """A config file with inbox/results/state under ``tmp``; returns its path.

    ``extra`` keys are written as they are (e.g. ``retry_seconds=1``).
    """
    for name in ("inbox", "results", "state"):
        (tmp / name).mkdir(exist_ok=True)
    cfg = {
        "inbox": str(tmp / "inbox"),
        "results": str(tmp / "results"),
        "state": str(tmp / "state"),
        "quarantine": str(tmp / "quarantine") if quarantine else "",
        "settle_seconds": settle,
        "rescan_seconds": rescan,
        "polling": polling,
        "workers": workers,
        "threads": 1,
        "model": str(model),
        # the daily self-check has its own tests (test_canary.py); here it would only add CPU
        "canary": {"enabled": False},
        **extra,
    }
    path = tmp / "flairwatch.yaml"
    path.write_text(yaml.safe_dump(cfg))
    return path


def watch_command(config: Path, *extra: str) -> list[str]:
    return [sys.executable, "-m", "flairwatch.cli", "watch", "--config", str(config), *extra]


# pid -> (log, its size at start): where to look for this run's "ready" line
_RUN_LOGS: dict[int, tuple[Path, int]] = {}


def start_daemon(config: Path, log: Path, *extra: str) -> subprocess.Popen[bytes]:
    """Start ``flairwatch watch`` as its own process, logging to ``log``."""
    with open(log, "ab") as fh:
        offset = fh.tell()
        proc = subprocess.Popen(
            watch_command(config, *extra), cwd=REPO, stdout=fh, stderr=subprocess.STDOUT
        )
    _RUN_LOGS[proc.pid] = (log, offset)
    return proc


def _ready(proc: subprocess.Popen[bytes]) -> bool:
    """Whether this run logged that its model is loaded (its stop handlers are in by then)."""
    log, offset = _RUN_LOGS.get(proc.pid, (None, 0))
    if log is None:
        return True
    with open(log, "rb") as fh:
        fh.seek(offset)
        return b" ready in " in fh.read()


def run_once(config: Path, log: Path, timeout: float = 60.0) -> int:
    with open(log, "ab") as fh:
        done = subprocess.run(
            watch_command(config, "--once"),
            cwd=REPO,
            stdout=fh,
            stderr=subprocess.STDOUT,
            timeout=timeout,
            check=False,
        )
    return done.returncode


def stop(proc: subprocess.Popen[bytes], timeout: float = 30.0) -> int:
    """SIGTERM once the run is past start-up (before, Python's default handler would kill it,
    and the test would not be checking the daemon's stop path), then its exit status."""
    deadline = time.monotonic() + timeout
    while proc.poll() is None and not _ready(proc) and time.monotonic() < deadline:
        time.sleep(0.05)
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
    return proc.wait(timeout)


def wait_for(check: Callable[[], bool], timeout: float, what: str, step: float = 0.2) -> None:
    deadline = time.monotonic() + timeout
    while not check():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout} s waiting for {what}")
        time.sleep(step)


def jobs(state: Path) -> list[tuple[str, str, int, str | None, str | None]]:
    """(series UID, job state, revision, error, result path) of every job, oldest first."""
    path = state / "ledger.sqlite3"
    if not path.exists():
        return []
    db = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=10)
    try:
        rows = db.execute(
            """SELECT s.series_uid, j.state, s.revision, j.error, j.result_path FROM jobs j
               JOIN series s ON s.id = j.series_id ORDER BY j.id"""
        ).fetchall()
    except sqlite3.OperationalError:  # schema not created yet
        return []
    finally:
        db.close()
    return [(r[0], r[1], r[2], r[3], r[4]) for r in rows]


def states(state: Path) -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    for uid, st, _rev, _err, _path in jobs(state):
        out.setdefault(uid, []).append(st)
    return out


def complete_results(results: Path) -> list[Path]:
    """Complete version folders (summary.json present)."""
    return sorted(p.parent for p in results.glob("*/*/*/*/summary.json"))


def half_built(results: Path) -> list[Path]:
    return sorted(p for p in results.rglob(".building-*"))


def series_uid_of(paths: Sequence[Path]) -> str:
    return str(dcmread(paths[0], stop_before_pixels=True).SeriesInstanceUID)


# ---- junk ----------------------------------------------------------------------------------


def write_junk(folder: Path, staging: Path, count: int = 200) -> dict[str, str]:
    """Write ``count`` files that must never give a result; returns {series UID: kind}.

    Kinds: empty files, text files, DICOM cut inside the header, DICOM cut inside the pixel
    data (one whole FLAIR series with one cut file), DICOM without pixel data, a localizer
    series, a non-FLAIR (T2) series.
    """
    folder.mkdir(parents=True, exist_ok=True)
    kinds: dict[str, str] = {}
    made = 0
    localizer = stage_series(staging, "loc", replace(FLAIR, description="LOCALIZER", slices=3))
    kinds[series_uid_of(localizer)] = "localizer"
    t2 = stage_series(
        staging,
        "t2",
        replace(FLAIR, description="AX T2 FSE", scanning_sequence="SE", inversion_time=None),
    )
    kinds[series_uid_of(t2)] = "non-FLAIR"
    cut = stage_series(staging, "cut", replace(FLAIR, description="AX FLAIR cut"))
    kinds[series_uid_of(cut)] = "truncated pixel data"
    for group, paths in (("loc", localizer), ("t2", t2), ("cut", cut)):
        copy_in(paths, folder, group)
        made += len(paths)
    victim = folder / "cut" / cut[5].name
    victim.write_bytes(cut[5].read_bytes()[: cut[5].stat().st_size - 3000])
    whole = cut[0].read_bytes()
    nopix = dcmread(cut[0])
    del nopix.PixelData
    nopix.SOPInstanceUID = nopix.file_meta.MediaStorageSOPInstanceUID = generate_uid()
    nopix.SeriesInstanceUID = generate_uid()
    kinds[str(nopix.SeriesInstanceUID)] = "no pixel data"
    i = 0
    while made < count:
        kind = i % 4
        path = folder / "misc" / f"junk{i:04d}{'.dcm' if kind else ''}"
        path.parent.mkdir(parents=True, exist_ok=True)
        if kind == 0:
            path.write_bytes(b"")
        elif kind == 1:
            path.write_text(f"not an image {i}\n" * (i % 7 + 1))
        elif kind == 2:
            path.write_bytes(whole[: 132 + 40 * (i % 9 + 1)])  # cut inside the header
        else:
            nopix.save_as(path, enforce_file_format=True) if i == 3 else path.write_bytes(
                whole[:128] + b"DICM" + os.urandom(64)
            )
        made += 1
        i += 1
    return kinds
