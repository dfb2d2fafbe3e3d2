#!/usr/bin/env python3
"""Load benchmark for ``flairwatch watch``: drop N synthetic FLAIR series into the inbox at once.

Reports series per hour (from the drop to the last series done) and memory: the worker's
resident set size (RSS) after each series, by series index, and the peak RSS of the daemon plus
its workers sampled every 0.5 s. The target for the shipped model on 2 cores: at least 300
series/hour of 256 x 256 x 48, and worker RSS at series 100 within 10 % of series 10.

Usage (from the repository root)::

    .venv/bin/python scripts/bench_load.py --series 100 [--model models/.../model.yaml]
        [--shape 256x256x48] [--workers 1] [--work DIR] [--json report.json]

The series are invented: an ellipsoid "head" with a few bright blobs and mild noise (fixed seed).
Results are research output of a synthetic benchmark, not of any real scan.
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import sqlite3
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import yaml

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from flairwatch.engine.models import manifest_path  # noqa: E402
from flairwatch.phantom.dicom_writer import write_series  # noqa: E402
from flairwatch.volume import Volume  # noqa: E402


def phantom(shape: tuple[int, int, int], spacing: tuple[float, float, float], seed: int) -> Volume:
    """(i, j, k) volume on an axial LPS grid: tissue ellipsoid, bright blobs, Gaussian noise."""
    rng = np.random.default_rng(seed)
    ni, nj, nk = shape
    i, j, k = np.meshgrid(
        np.linspace(-1, 1, ni), np.linspace(-1, 1, nj), np.linspace(-1, 1, nk), indexing="ij"
    )
    head = (i / 0.8) ** 2 + (j / 0.9) ** 2 + (k / 1.1) ** 2 <= 1
    data = np.where(head, 300.0, 0.0)
    for _ in range(int(rng.integers(2, 8))):
        c = rng.uniform(-0.4, 0.4, 3)
        r = rng.uniform(0.03, 0.08)
        data[((i - c[0]) ** 2 + (j - c[1]) ** 2 + (k - c[2]) ** 2 <= r * r) & head] = 600.0
    data += rng.normal(0, 8, shape)
    affine = np.diag([*spacing, 1.0])
    affine[:3, 3] = [-ni * spacing[0] / 2, -nj * spacing[1] / 2, -nk * spacing[2] / 2]
    return Volume(np.clip(data, 0, None).astype(np.float32), affine)


def make_series(staging: Path, n: int, shape: tuple[int, int, int]) -> list[Path]:
    folders = []
    for s in range(n):
        vol = phantom(shape, (0.9, 0.9, 3.0), seed=1000 + s)
        folder = staging / f"series{s:04d}"
        write_series(
            vol,
            folder,
            header={
                "PatientID": f"BENCH-{s:04d}",
                "PatientName": f"Bench^Participant{s:04d}",
                "StudyInstanceUID": f"2.25.{10**20 + 2 * s}",
                "SeriesInstanceUID": f"2.25.{10**20 + 2 * s + 1}",
                "SeriesDescription": "AX FLAIR",
                "SeriesNumber": 5,
                "Modality": "MR",
                "ScanningSequence": "IR",
                "SequenceVariant": "SK",
                "MRAcquisitionType": "2D",
                "RepetitionTime": 9000,
                "EchoTime": 90,
                "InversionTime": 2500,
                "MagneticFieldStrength": 3,
                "StudyDate": "20260101",
            },
        )
        folders.append(folder)
    return folders


def tree_rss_kb(pid: int) -> int:
    """RSS of a process and its direct children, KiB (Linux /proc)."""
    total = 0
    pids = [pid]
    try:
        for task in Path(f"/proc/{pid}/task").iterdir():
            children = (task / "children").read_text(encoding="utf-8").split()
            pids.extend(int(c) for c in children)
    except OSError:
        pass
    for p in pids:
        try:
            for line in Path(f"/proc/{p}/status").read_text(encoding="utf-8").splitlines():
                if line.startswith("VmRSS:"):
                    total += int(line.split()[1])
        except OSError:
            continue
    return total


def finished(state: Path) -> list[tuple[str, float, float, int | None]]:
    db = sqlite3.connect(f"file:{state / 'ledger.sqlite3'}?mode=ro", uri=True, timeout=10)
    try:
        return db.execute(
            """SELECT state, started, finished, worker_rss_kb FROM jobs
               WHERE state IN ('done', 'failed', 'refused') ORDER BY finished"""
        ).fetchall()
    except sqlite3.OperationalError:
        return []
    finally:
        db.close()


def drop_and_wait(
    proc: subprocess.Popen[bytes], work: Path, folders: list[Path], n: int, timeout: float
) -> tuple[float | None, list[tuple[str, float, float, int | None]], int]:
    """Wait for the daemon, rename every series into the inbox, wait until all are finished.

    Returns (drop time, finished job rows, peak RSS of daemon + workers in KiB).
    """
    while b"ready in" not in (work / "daemon.log").read_bytes():
        if proc.poll() is not None:
            return None, [], 0
        time.sleep(0.2)
    dropped = time.time()
    for folder in folders:  # a rename: every series appears at once
        os.rename(folder, work / "inbox" / folder.name)
    peak = 0
    rows: list[tuple[str, float, float, int | None]] = []
    while len(rows) < n and time.time() - dropped < timeout:
        peak = max(peak, tree_rss_kb(proc.pid))
        time.sleep(0.5)
        rows = finished(work / "state")
    return dropped, rows, peak


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--series", type=int, default=100)
    ap.add_argument("--shape", default="256x256x48", help="columns x rows x slices")
    ap.add_argument("--model", type=Path, default=manifest_path(None))
    ap.add_argument("--workers", type=int, default=1)
    ap.add_argument("--work", type=Path, help="work folder (default: a temporary one)")
    ap.add_argument("--json", type=Path, help="also write the report here")
    ap.add_argument("--timeout", type=float, default=3600.0)
    args = ap.parse_args(argv)
    if not args.model.is_file():
        print(f"model manifest {args.model} not found; pass --model", file=sys.stderr)
        return 2
    shape = tuple(int(v) for v in args.shape.lower().split("x"))
    assert len(shape) == 3
    work = args.work or Path(tempfile.mkdtemp(prefix="flairwatch-bench-"))
    for name in ("inbox", "results", "state", "staging"):
        (work / name).mkdir(parents=True, exist_ok=True)
    t0 = time.monotonic()
    folders = make_series(work / "staging", args.series, (shape[0], shape[1], shape[2]))
    print(f"wrote {len(folders)} series in {time.monotonic() - t0:.0f} s under {work}")
    cfg = work / "flairwatch.yaml"
    cfg.write_text(
        yaml.safe_dump(
            {
                "inbox": str(work / "inbox"),
                "results": str(work / "results"),
                "state": str(work / "state"),
                "settle_seconds": 2,
                "rescan_seconds": 60,
                "workers": args.workers,
                "model": str(args.model.resolve()),
            }
        )
    )
    with open(work / "daemon.log", "wb") as log:
        proc = subprocess.Popen(
            [sys.executable, "-m", "flairwatch.cli", "watch", "--config", str(cfg)],
            cwd=REPO,
            stdout=log,
            stderr=subprocess.STDOUT,
        )
        try:
            dropped, rows, peak = drop_and_wait(proc, work, folders, args.series, args.timeout)
        finally:
            proc.send_signal(signal.SIGTERM)
            proc.wait(120)
    if dropped is None:
        print("daemon failed to start; see", work / "daemon.log", file=sys.stderr)
        return 1
    done = [r for r in rows if r[0] == "done"]
    span = max(r[2] for r in rows) - dropped if rows else float("nan")
    proc_span = max(r[2] for r in rows) - min(r[1] for r in rows) if rows else float("nan")
    rss = [r[3] or 0 for r in rows]

    def at(n: int) -> int | None:
        return rss[n - 1] if len(rss) >= n else None

    r10, r100 = at(10), at(100)
    report = {
        "series": args.series,
        "shape": list(shape),
        "workers": args.workers,
        "model": str(args.model),
        "done": len(done),
        "not_done": len(rows) - len(done),
        "seconds_from_drop": round(span, 1),
        "series_per_hour": round(len(done) / span * 3600, 1) if span > 0 else None,
        "series_per_hour_processing": round(len(done) / proc_span * 3600, 1)
        if proc_span > 0
        else None,
        "worker_rss_mib_at_10": None if r10 is None else round(r10 / 1024, 1),
        "worker_rss_mib_at_100": None if r100 is None else round(r100 / 1024, 1),
        "rss_change_10_to_100_pct": round((r100 - r10) / r10 * 100, 1) if r10 and r100 else None,
        "peak_tree_rss_mib": round(peak / 1024, 1),
        "worker_rss_mib_by_index": [round(v / 1024, 1) for v in rss],
    }
    for key, value in report.items():
        if key != "worker_rss_mib_by_index":
            print(f"{key}: {value}")
    if args.json:
        args.json.write_text(json.dumps(report, indent=2) + "\n")
    return 0 if len(done) == args.series else 1


if __name__ == "__main__":
    sys.exit(main())
