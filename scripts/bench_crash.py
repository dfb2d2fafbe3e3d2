#!/usr/bin/env python3
"""Crash benchmark for ``flairwatch watch``: SIGKILL the daemon at random moments, then check.

Each round drops a new synthetic FLAIR series into the inbox, starts the daemon, and once the
model is loaded kills it with SIGKILL in one of four ways: at a random moment; its worker first
(then the daemon a moment later); while a result folder is being written (a ``.building-*``
folder exists); right after the ledger's write-ahead log changed (a commit). After the last
round a clean ``watch --once`` runs to the end, and the benchmark checks what an operator cares
about: every series has exactly one current result, nothing is running, queued, failed or
refused, no half-built folder is left, and the ledger and the results folder name the same
folders. Target: 0 lost, 0 duplicated, 0 wrongly failed.

With ``--send`` a real ``flairwatch receive`` process sends every result's ``segmentation.dcm``
and ``measurements.dcm`` to a Store SCP the benchmark runs on 127.0.0.1, and is SIGKILLed on a
random schedule of its own (scripts/crash_send.py), also inside a C-STORE before the node's
answer. After the final run one clean ``receive`` drains the outbox; then every file of every
landed current result must have reached the node at least once and every outbox row must be
``sent``. Target: 0 sends lost, 0 waiting, 0 given up (duplicates are expected and counted).

Usage (from the repository root)::

    .venv/bin/python scripts/bench_crash.py --kills 100 [--model M] [--shape 128x128x24]
        [--seed 1] [--work DIR] [--json report.json] [--send]

Times are printed in sgemm units (flairwatch.speed) measured in the same run. The series are
invented (scripts/bench_load.py's phantom); results are research output of a synthetic test.
"""

from __future__ import annotations

import argparse
import json
import os
import random
import shutil
import signal
import sqlite3
import subprocess
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path
from typing import Any

import yaml

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from bench_load import make_series  # noqa: E402  (this folder is on sys.path when run)
from crash_send import (  # noqa: E402
    CountingNode,
    NetworkKiller,
    check_sends,
    drain,
    receive_command,
    send_section,
)

from flairwatch.engine.models import manifest_path  # noqa: E402
from flairwatch.engine.results import CURRENT_FILE, TEMP_PREFIX  # noqa: E402
from flairwatch.speed import in_units, sgemm_unit  # noqa: E402

KINDS = ("random", "worker", "write", "commit")
WEIGHTS = (0.4, 0.2, 0.2, 0.2)


def children(pid: int) -> list[int]:
    """Child processes of ``pid`` (proc(5): field 4 of /proc/PID/stat is the parent's pid)."""
    found = []
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                fields = Path(f"/proc/{entry}/stat").read_text("ascii").rsplit(")", 1)[1].split()
            except OSError:
                continue
            if int(fields[1]) == pid:
                found.append(int(entry))
    return found


def ready_count(log: Path) -> int:
    return log.read_text(encoding="utf-8").count(" ready in ") if log.exists() else 0


def wait_until(check: Any, limit: float, step: float) -> bool:
    deadline = time.monotonic() + limit
    while time.monotonic() < deadline:
        if check():
            return True
        time.sleep(step)
    return False


def kill_round(cmd: list[str], work: Path, kind: str, rng: random.Random) -> str:
    """One start and SIGKILL; returns what was killed at which moment."""
    log = work / "daemon.log"
    before = ready_count(log)
    with open(log, "ab") as fh:
        proc = subprocess.Popen(cmd, cwd=REPO, stdout=fh, stderr=subprocess.STDOUT)
    try:
        if not wait_until(lambda: ready_count(log) > before or proc.poll() is not None, 60, 0.05):
            return "never ready"
        what = kind
        if kind == "worker":
            time.sleep(rng.uniform(0.0, 2.0))
            workers = children(proc.pid)
            if workers:
                os.kill(rng.choice(workers), signal.SIGKILL)
            time.sleep(rng.uniform(0.1, 1.0))
        elif kind == "write":
            found = wait_until(lambda: any(work.glob(f"results/*/*/*/{TEMP_PREFIX}*")), 5, 0.002)
            what = "write" if found else "random"
        elif kind == "commit":
            wal = work / "state" / "ledger.sqlite3-wal"
            first = wal.stat().st_mtime_ns if wal.exists() else 0
            found = wait_until(
                lambda: wal.exists() and wal.stat().st_mtime_ns != first, 5, 0.001
            )  # fmt: skip
            what = "commit" if found else "random"
        else:
            time.sleep(rng.uniform(0.0, 4.0))  # about one series' time with the shipped model
        proc.send_signal(signal.SIGKILL)
        return what
    finally:
        if proc.poll() is None:
            proc.kill()
        proc.wait(10)


def check(work: Path, uids: set[str]) -> dict[str, Any]:
    """The operator's checks on the ledger and the results folder after the final run."""
    db = sqlite3.connect(work / "state" / "ledger.sqlite3")
    try:
        states = dict(db.execute("SELECT state, COUNT(*) FROM jobs GROUP BY state").fetchall())
        current = dict(
            db.execute(
                """SELECT s.series_uid, SUM(r.current) FROM results r
                   JOIN series s ON s.id = r.series_id GROUP BY s.series_uid"""
            ).fetchall()
        )
        recorded = {Path(p) for (p,) in db.execute("SELECT result_path FROM results")}
        attempts = db.execute("SELECT MAX(attempts) FROM jobs").fetchone()[0]
    finally:
        db.close()
    on_disk = {p.parent for p in (work / "results").glob("*/*/*/[!.]*/summary.json")}
    pointers_ok = all(
        (p.parent / CURRENT_FILE).is_file()
        and (p.parent / CURRENT_FILE).read_text(encoding="utf-8").strip() == p.name
        for p in on_disk
    )
    return {
        "series": len(uids),
        "lost": len(uids - {u for u, n in current.items() if n >= 1}),
        "duplicated": sum(1 for n in current.values() if n > 1) + max(0, len(on_disk) - len(uids)),
        "wrongly_failed": states.get("failed", 0) + states.get("refused", 0),
        "left_running_or_queued": sum(states.get(s, 0) for s in ("running", "queued", "settling")),
        "half_built_left": len(list((work / "results").glob(f"*/*/*/{TEMP_PREFIX}*"))),
        "ledger_matches_folders": recorded == on_disk and pointers_ok,
        "max_attempts": attempts,
        "states": states,
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--kills", type=int, default=100)
    ap.add_argument("--model", type=Path, default=manifest_path(None))
    ap.add_argument("--shape", default="128x128x24", help="series size, columns x rows x slices")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--work", type=Path, help="work folder (default: a temporary one, removed)")
    ap.add_argument("--json", type=Path, help="also write the figures here")
    ap.add_argument("--send", action="store_true",
                    help="also send results to a local DICOM node and kill the sender")  # fmt: skip
    args = ap.parse_args(argv)
    shape = tuple(int(x) for x in args.shape.split("x"))
    unit = sgemm_unit()
    work = args.work or Path(tempfile.mkdtemp(prefix="flairwatch-crash-"))
    rng = random.Random(args.seed)
    node = CountingNode().start() if args.send else None
    killer = None
    try:
        for name in ("inbox", "results", "state", "staging"):
            (work / name).mkdir(parents=True, exist_ok=True)
        folders = make_series(work / "staging", args.kills, shape)  # type: ignore[arg-type]
        uids = set()
        config = {
            "inbox": str(work / "inbox"), "results": str(work / "results"),
            "state": str(work / "state"), "settle_seconds": 0.5, "rescan_seconds": 5,
            "retry_seconds": 1, "workers": 1, "threads": 1, "model": str(args.model),
        }  # fmt: skip
        if node is not None:
            config["send"] = send_section(node.port)
        (work / "flairwatch.yaml").write_text(yaml.safe_dump(config), encoding="utf-8")
        cmd = [sys.executable, "-m", "flairwatch.cli", "watch", "--config",
               str(work / "flairwatch.yaml")]  # fmt: skip
        kinds: Counter[str] = Counter()
        start = time.perf_counter()
        if node is not None:
            # the outbox takes only results created after the node first appeared
            # (send-nodes.json): the sender starts before the daemon makes any
            killer = NetworkKiller(receive_command(work / "flairwatch.yaml"), work, node,
                                   args.seed + 1)  # fmt: skip
            killer.start()
            if not wait_until(lambda: (work / "state" / "send-nodes.json").exists(), 120, 0.1):
                raise SystemExit(f"the network process did not start; see {work}/network.log")
        for round_ in range(args.kills):
            # a rename: the series arrives at once
            os.rename(folders[round_], work / "inbox" / folders[round_].name)
            kinds[kill_round(cmd, work, rng.choices(KINDS, WEIGHTS)[0], rng)] += 1
        if killer is not None:
            killer.finish()
        with open(work / "once.log", "ab") as fh:
            rc = subprocess.run([*cmd, "--once"], cwd=REPO, stdout=fh, stderr=subprocess.STDOUT,
                                timeout=3600, check=False).returncode  # fmt: skip
        elapsed = time.perf_counter() - start
        import pydicom

        for folder in (work / "inbox").iterdir():
            first = next(p for p in sorted(folder.iterdir()) if p.is_file())
            uids.add(str(pydicom.dcmread(first, stop_before_pixels=True).SeriesInstanceUID))
        figures = check(work, uids) | {
            "kills": sum(kinds.values()),
            "kills_by_moment": dict(kinds),
            "final_run_exit_code": rc,
            "sgemm_unit_s": round(unit, 3),
            "elapsed_units": round(elapsed / unit, 1),
        }
        if node is not None and killer is not None:
            net_rc, drained = drain(receive_command(work / "flairwatch.yaml"), work)
            figures |= check_sends(work, node) | {
                "network_kills": sum(killer.kinds.values()),
                "network_kills_by_moment": dict(killer.kinds),
                "network_final_exit_code": net_rc,
                "outbox_drained": drained,
            }
    finally:
        if killer is not None and killer.is_alive():
            killer.finish()
        if node is not None:
            node.stop()
        if args.work is None:
            shutil.rmtree(work, ignore_errors=True)
    print(
        f"crash benchmark: {figures['kills']} kills {figures['kills_by_moment']}, "
        f"{figures['series']} series: {figures['lost']} lost, {figures['duplicated']} duplicated, "
        f"{figures['wrongly_failed']} wrongly failed, {figures['left_running_or_queued']} left "
        f"running/queued, {figures['half_built_left']} half-built folders left, ledger and "
        f"folders agree: {figures['ledger_matches_folders']}; max attempts "
        f"{figures['max_attempts']}; final run exit {rc}; {in_units(elapsed, unit)}"
    )
    if args.send:
        print(
            f"sending: {figures['network_kills']} kills of the network process "
            f"{figures['network_kills_by_moment']}, {figures['send_files']} result files: "
            f"{figures['sent']} sent, {figures['send_lost']} lost, {figures['send_waiting']} "
            f"waiting, {figures['send_given_up']} given up, {figures['duplicates_received']} "
            f"duplicates received; final network run exit {figures['network_final_exit_code']}"
        )
    if args.json:
        args.json.write_text(json.dumps(figures, indent=2) + "\n", encoding="utf-8")
    ok = (figures["lost"], figures["duplicated"], figures["wrongly_failed"]) == (0, 0, 0)
    if args.send:
        ok = ok and figures["outbox_drained"] and figures["network_final_exit_code"] == 0
        ok = ok and (figures["send_lost"], figures["send_waiting"], figures["send_given_up"]) == (
            0, 0, 0)  # fmt: skip
        ok = ok and figures["sent"] == figures["send_files"] > 0
    return 0 if ok and rc == 0 and figures["ledger_matches_folders"] else 1


if __name__ == "__main__":
    sys.exit(main())
