#!/usr/bin/env python3
"""Junk and burst benchmark for ``flairwatch watch`` (issue 10 item 9).

Junk: malformed files (cut at every part of the file, wrong value lengths, huge or zero
dimensions, NaN or zero spacing, broken compressed frames, DICOMDIR and other non-image
objects, plain junk, files rewritten while the daemon reads them) are mixed with good FLAIR
series and symbolic links (loops, links to outside the inbox) in one inbox, and one real
``flairwatch watch --once`` runs over it. Checked: the daemon ends normally with no traceback
(0 crashes), every junk file ends with a one-line reason (on its file, or on its refused
series), every good series is done, and nothing outside the inbox is read.

Burst: a running daemon (file-system events on) gets many files at once (``--burst`` files,
many series); the events overflow or not, every series must still end done (0 lost).

Usage (from the repository root)::

    .venv/bin/python scripts/bench_junk.py [--junk 500] [--good 8] [--burst 10000]
        [--model M] [--work DIR] [--json report.json]

Times are printed in sgemm units (flairwatch.speed) measured in the same run. All series are
invented phantoms; results are research output of a synthetic test, not for diagnosis.
"""

from __future__ import annotations

import argparse
import json
import shutil
import signal
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

import yaml

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from bench_load import make_series  # noqa: E402  (this folder is on sys.path when run)
from junk_files import Junk, make_junk  # noqa: E402

from flairwatch.engine.models import manifest_path  # noqa: E402
from flairwatch.speed import in_units, sgemm_unit  # noqa: E402


def write_config(work: Path, model: Path, *, rescan: float) -> Path:
    for name in ("inbox", "results", "state"):
        (work / name).mkdir(parents=True, exist_ok=True)
    config = {
        "inbox": str(work / "inbox"), "results": str(work / "results"),
        "state": str(work / "state"), "settle_seconds": 1.0, "rescan_seconds": rescan,
        "retry_seconds": 0.5, "workers": 1, "threads": 1, "model": str(model),
    }  # fmt: skip
    path = work / "flairwatch.yaml"
    path.write_text(yaml.safe_dump(config), encoding="utf-8")
    return path


def watch_cmd(config: Path, *extra: str) -> list[str]:
    return [sys.executable, "-m", "flairwatch.cli", "watch", "--config", str(config), *extra]


def ledger_rows(state: Path) -> tuple[dict[str, tuple[str | None, str | None]], dict[str, Any]]:
    """Files by path -> (reason, series UID); series UID -> (job state, error, selection reason)."""
    db = sqlite3.connect(f"file:{state / 'ledger.sqlite3'}?mode=ro", uri=True)
    try:
        files = {p: (r, s) for p, r, s in db.execute("SELECT path, reason, series_uid FROM files")}
        jobs = {
            uid: (st, err, why)
            for uid, st, err, why in db.execute(
                """SELECT s.series_uid, j.state, j.error, s.select_reason FROM jobs j
                   JOIN series s ON s.id = j.series_id ORDER BY j.id"""
            )
        }
    finally:
        db.close()
    return files, jobs


def account(junk: list[Junk], good: set[str], state: Path) -> dict[str, Any]:
    """What became of every junk file and every good series, from the ledger."""
    files, jobs = ledger_rows(state)
    by_kind: dict[str, dict[str, int]] = {}
    misses: list[str] = []
    multi_line = 0
    for item in junk:
        for path in item.paths:
            reason, uid = files.get(str(path), (None, None))
            job = jobs.get(uid or "")
            if reason:
                outcome, text = "file refused", reason
            elif job and job[0] in ("refused", "failed"):
                outcome, text = f"series {job[0]}", job[1] or ""
            elif job and job[0] == "skipped":
                outcome, text = "series skipped", job[2] or ""
            elif job and job[0] == "done":
                outcome, text = "processed", ""
                misses.append(f"{item.kind}: {path.name} was processed")
            else:
                outcome, text = "no reason", ""
                misses.append(f"{item.kind}: {path.name}: {job[0] if job else 'not in ledger'}")
            multi_line += "\n" in text
            counts = by_kind.setdefault(item.kind, {})
            counts[outcome] = counts.get(outcome, 0) + 1
    good_done = sum(1 for uid in good if jobs.get(uid, ("",))[0] == "done")
    outside = [p for p in files if not p.startswith(str(state.parent / "inbox"))]
    unexpected = [e for st, e, _ in jobs.values() if e and "unexpected" in e]
    return {
        "junk_files": sum(len(j.paths) for j in junk),
        "junk_with_reason": sum(len(j.paths) for j in junk) - len(misses),
        "reasons_multi_line": multi_line,
        "junk_outcomes": by_kind,
        "misses": misses[:20],
        "good_series": len(good),
        "good_done": good_done,
        "files_outside_inbox_read": len(outside),
        "unexpected_errors": unexpected[:5],
    }


def rewrite_while_running(targets: list[Path], stop: threading.Event) -> None:
    """Keep rewriting files (grow, cut, replace) until told to stop; the last write cuts them."""
    n = 0
    while not stop.wait(0.05):
        for path in targets:
            data = path.read_bytes()
            path.write_bytes(data + b"\0" * 64 if n % 2 else data[: max(200, len(data) - 64)])
        n += 1
    for path in targets:
        data = path.read_bytes()
        path.write_bytes(data[: len(data) // 2])  # left cut short: must be refused


def junk_run(work: Path, model: Path, n_junk: int, n_good: int, shape: Any) -> dict[str, Any]:
    config = write_config(work, model, rescan=2.0)
    inbox = work / "inbox"
    staged = make_series(work / "staging", n_good + 1, shape)
    import pydicom

    # neighbouring slices, so that a junk group's only defect is the one made on purpose
    template = sorted(
        (p for p in staged[-1].iterdir() if p.is_file()),
        key=lambda p: float(pydicom.dcmread(p, stop_before_pixels=True).ImagePositionPatient[2]),
    )
    good: set[str] = set()

    for folder in staged[:-1]:
        first = next(p for p in sorted(folder.iterdir()) if p.is_file())
        good.add(str(pydicom.dcmread(first, stop_before_pixels=True).SeriesInstanceUID))
        shutil.copytree(folder, inbox / folder.name)
    junk, changing = make_junk(inbox / "junk", template, n_junk, outside=work / "outside")
    stop = threading.Event()
    writer = threading.Thread(target=rewrite_while_running, args=(changing, stop))
    log = work / "junk.log"
    start = time.perf_counter()
    with open(log, "wb") as fh:
        proc = subprocess.Popen(watch_cmd(config, "--once"), cwd=REPO, stdout=fh,
                                stderr=subprocess.STDOUT)  # fmt: skip
        writer.start()
        time.sleep(3.0)
        stop.set()
        writer.join()
        rc = proc.wait(timeout=3600)
    elapsed = time.perf_counter() - start
    text = log.read_text(encoding="utf-8", errors="replace")
    return account(junk, good, work / "state") | {
        "exit_code": rc,
        "tracebacks": text.count("Traceback"),
        "seconds": elapsed,
    }


def series_state_counts(state: Path) -> dict[str, int]:
    db = sqlite3.connect(f"file:{state / 'ledger.sqlite3'}?mode=ro", uri=True)
    try:
        return dict(db.execute("SELECT state, COUNT(*) FROM jobs GROUP BY state").fetchall())
    except sqlite3.OperationalError:
        return {}
    finally:
        db.close()


def burst_run(work: Path, model: Path, n_files: int, per_series: int) -> dict[str, Any]:
    """Copy ``n_files`` files (series of ``per_series`` slices) into a running daemon's inbox."""
    config = write_config(work, model, rescan=30.0)
    n_series = max(1, n_files // per_series)
    staged = make_series(work / "staging", n_series, (64, 64, per_series))
    log = work / "burst.log"
    with open(log, "wb") as fh:
        proc = subprocess.Popen(watch_cmd(config), cwd=REPO, stdout=fh, stderr=subprocess.STDOUT)
        deadline = time.monotonic() + 120
        while "ready" not in log.read_text(errors="replace") and time.monotonic() < deadline:
            time.sleep(0.2)
        start = time.perf_counter()
        for folder in staged:  # copied file by file, as a sender writes: one event or more each
            shutil.copytree(folder, work / "inbox" / folder.name)
        copied = time.perf_counter() - start
        limit = time.monotonic() + 3600
        while time.monotonic() < limit:
            states = series_state_counts(work / "state")
            if (
                states.get("done", 0) + states.get("refused", 0) + states.get("failed", 0)
                >= n_series
            ):
                break
            time.sleep(1.0)
        elapsed = time.perf_counter() - start
        proc.send_signal(signal.SIGTERM)
        rc = proc.wait(timeout=120)
    text = log.read_text(encoding="utf-8", errors="replace")
    states = series_state_counts(work / "state")
    return {
        "files": n_series * per_series,
        "series": n_series,
        "done": states.get("done", 0),
        "lost": n_series - states.get("done", 0),
        "states": states,
        "overflow_logged": "overflow" in text.lower(),
        "exit_code": rc,
        "tracebacks": text.count("Traceback"),
        "copy_seconds": copied,
        "seconds": elapsed,
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--junk", type=int, default=500, help="malformed files")
    ap.add_argument("--good", type=int, default=8, help="good series mixed with the junk")
    ap.add_argument("--shape", default="64x64x12", help="good series size, columns x rows x slices")
    ap.add_argument("--burst", type=int, default=10000, help="files arriving at once (0: skip)")
    ap.add_argument("--per-series", type=int, default=100, help="slices per burst series")
    ap.add_argument("--model", type=Path, default=manifest_path(None))
    ap.add_argument("--work", type=Path, help="work folder (default: a temporary one, removed)")
    ap.add_argument("--json", type=Path, help="also write the figures here")
    args = ap.parse_args(argv)
    shape = tuple(int(x) for x in args.shape.split("x"))
    model = args.model.resolve()
    unit = sgemm_unit()
    work = args.work or Path(tempfile.mkdtemp(prefix="flairwatch-junk-"))
    try:
        junk = junk_run(work / "junk", model, args.junk, args.good, shape)
        burst = (
            burst_run(work / "burst", model, args.burst, args.per_series) if args.burst else None
        )
    finally:
        if args.work is None:
            shutil.rmtree(work, ignore_errors=True)
    crashes = (
        junk["tracebacks"] + len(junk["unexpected_errors"]) + (junk["exit_code"] not in (0, 1))
    )
    print(
        f"junk: {junk['junk_files']} malformed files + {junk['good_series']} good series: "
        f"{crashes} crashes (exit {junk['exit_code']}: 1 = some series refused), {junk['junk_with_reason']} of "
        f"{junk['junk_files']} junk files refused with a one-line reason, {junk['good_done']} of "
        f"{junk['good_series']} good series done, {junk['files_outside_inbox_read']} files read "
        f"outside the inbox; {in_units(junk['seconds'], unit)}"
    )
    for kind, outcomes in sorted(junk["junk_outcomes"].items()):
        print(f"  {kind}: " + ", ".join(f"{n} {o}" for o, n in sorted(outcomes.items())))
    for miss in junk["misses"]:
        print(f"  MISS {miss}")
    ok = crashes == 0 and junk["junk_with_reason"] == junk["junk_files"]
    ok = ok and junk["good_done"] == junk["good_series"] and junk["reasons_multi_line"] == 0
    if burst is not None:
        print(
            f"burst: {burst['files']} files in {burst['series']} series copied into a running "
            f"daemon in {in_units(burst['copy_seconds'], unit)}; event overflow logged: "
            f"{burst['overflow_logged']}; {burst['done']} done, {burst['lost']} lost, exit "
            f"{burst['exit_code']}, {burst['tracebacks']} tracebacks; all done after "
            f"{in_units(burst['seconds'], unit)}"
        )
        ok = ok and burst["lost"] == 0 and burst["tracebacks"] == 0
    figures = {"sgemm_unit_s": round(unit, 3), "junk": junk, "burst": burst}
    if args.json:
        args.json.write_text(json.dumps(figures, indent=2, default=str) + "\n", encoding="utf-8")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
