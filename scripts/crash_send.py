"""The sending half of ``bench_crash.py --send``: a counting Store SCP, and a real
``flairwatch receive`` process killed with SIGKILL on a random schedule of its own.

The node is pynetdicom's Store SCP (the reference implementation of PS3.7 9.1.1 C-STORE and
PS3.8 association handling) on 127.0.0.1 in the benchmark's own process; it counts every SOP
Instance UID it stored. The network process is started, killed at one of three moments and
started again until the daemon's rounds end:

- ``random``: at a random moment once it has started sending;
- ``mid-store``: inside the node's C-STORE handler, after the node stored the instance and
  before its answer leaves: the sender never learns that the send worked (the worst moment);
- ``after-store``: a moment (0-50 ms) after the node stored an instance.

:func:`drain` then runs one clean ``receive`` to the end and :func:`check_sends` compares what
the node stored with the ``segmentation.dcm`` and ``measurements.dcm`` of every landed current
result. A send must reach the node at least once (lost = 0); a resend after a kill is a
duplicate (the node replaces the instance with the same SOP Instance UID, PS3.4 B.2.3).
"""

from __future__ import annotations

import logging
import os
import random
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from collections import Counter
from collections.abc import Callable
from pathlib import Path
from typing import Any

NODE = "bench"  # the node's name in send.nodes
NODE_AE = "BENCHNODE"
MOMENTS = ("random", "mid-store", "after-store")
MOMENT_WEIGHTS = (0.4, 0.3, 0.3)
STARTED = "sending to "  # the network process logs this once its sender thread runs
SEND_FILES = ("segmentation.dcm", "measurements.dcm")


def wait_until(check: Callable[[], bool], limit: float, step: float) -> bool:
    deadline = time.monotonic() + limit
    while time.monotonic() < deadline:
        if check():
            return True
        time.sleep(step)
    return bool(check())


class CountingNode:
    """A Store SCP on 127.0.0.1 that counts each SOP Instance UID it stores.

    :meth:`arm` asks it to SIGKILL a process from inside the next C-STORE, after storing.
    """

    def __init__(self) -> None:
        self.counts: Counter[str] = Counter()
        self.lock = threading.Lock()
        self.armed: int | None = None
        self.fired = threading.Event()
        self.server: Any = None
        self.port = 0

    def _store(self, event: Any) -> int:
        with self.lock:
            self.counts[str(event.dataset.SOPInstanceUID)] += 1
            if self.armed is not None:
                os.kill(self.armed, signal.SIGKILL)  # before the Success status goes out
                self.armed = None
                self.fired.set()
        return 0x0000  # PS3.4 Table B.2-1: Success

    def start(self) -> CountingNode:
        from pynetdicom import AE, AllStoragePresentationContexts, evt

        # a sender killed before the answer makes pynetdicom log the broken socket: expected
        logging.getLogger("pynetdicom").setLevel(logging.CRITICAL)
        ae = AE(ae_title=NODE_AE)
        ae.supported_contexts = AllStoragePresentationContexts
        handlers: list[Any] = [(evt.EVT_C_STORE, self._store)]
        self.server = ae.start_server(("127.0.0.1", 0), block=False, evt_handlers=handlers)
        self.port = int(self.server.server_address[1])
        return self

    def stop(self) -> None:
        if self.server is not None:
            self.server.shutdown()
            self.server = None

    def total(self) -> int:
        with self.lock:
            return sum(self.counts.values())

    def arm(self, pid: int) -> None:
        with self.lock:
            self.fired.clear()
            self.armed = pid

    def disarm(self) -> bool:
        """Stop waiting for a C-STORE; True when the kill already happened."""
        with self.lock:
            self.armed = None
            return self.fired.is_set()


def send_section(port: int) -> dict[str, Any]:
    """The config's ``send:`` section for the node (short back-off: the node is always up)."""
    node = {"name": NODE, "ae_title": NODE_AE, "host": "127.0.0.1", "port": port}
    return {"ae_title": "FWBENCH", "retry_seconds": 0.5, "retry_max_seconds": 2, "nodes": [node]}


def receive_command(config: Path) -> list[str]:
    return [sys.executable, "-m", "flairwatch.cli", "receive", "--config", str(config)]


def _started(log: Path) -> int:
    return log.read_text(encoding="utf-8").count(STARTED) if log.exists() else 0


class NetworkKiller(threading.Thread):
    """Starts ``flairwatch receive`` and SIGKILLs it at random moments until :meth:`finish`."""

    def __init__(self, cmd: list[str], work: Path, node: CountingNode, seed: int) -> None:
        super().__init__(name="network-killer", daemon=True)
        self.cmd, self.work, self.node = cmd, work, node
        self.rng = random.Random(seed)
        self.stop = threading.Event()
        self.kinds: Counter[str] = Counter()
        self.log = work / "network.log"

    def finish(self) -> None:
        self.stop.set()
        self.join(60)

    def run(self) -> None:
        while not self.stop.is_set():
            self._one_start()

    def _one_start(self) -> None:
        before = _started(self.log)
        with open(self.log, "ab") as fh:
            proc = subprocess.Popen(self.cmd, stdout=fh, stderr=subprocess.STDOUT)
        try:
            wait_until(lambda: _started(self.log) > before or proc.poll() is not None, 60, 0.05)
            if _started(self.log) == before:  # see network.log
                self.kinds["never started"] += 1
                self.stop.wait(1.0)
                return
            what = self._moment(proc.pid, self.rng.choices(MOMENTS, MOMENT_WEIGHTS)[0])
            if proc.poll() is None:
                proc.send_signal(signal.SIGKILL)
                self.kinds[what] += 1
            elif what == "mid-store":  # the node's handler killed it
                self.kinds[what] += 1
            else:
                self.kinds["exited by itself"] += 1
        finally:
            if proc.poll() is None:
                proc.kill()
            proc.wait(10)

    def _moment(self, pid: int, kind: str) -> str:
        """Wait for the kill moment ``kind``; returns the moment it became (a store moment
        that did not come within 8 s, or the end of the rounds, makes it ``random``)."""
        if kind == "mid-store":
            self.node.arm(pid)
            self.node.fired.wait(8)
            if self.node.disarm():
                return kind
        elif kind == "after-store":
            before = self.node.total()
            stored = wait_until(lambda: self.node.total() > before or self.stop.is_set(), 8, 0.002)
            if stored and not self.stop.is_set():
                time.sleep(self.rng.uniform(0.0, 0.05))
                return kind
        self.stop.wait(self.rng.uniform(0.0, 4.0))
        return "random"


def _outbox(db_path: Path) -> dict[str, int]:
    db = sqlite3.connect(db_path)
    try:
        return dict(db.execute("SELECT state, COUNT(*) FROM outbox GROUP BY state").fetchall())
    finally:
        db.close()


def expected_files(db_path: Path) -> list[Path]:
    """``segmentation.dcm`` and ``measurements.dcm`` of every landed current result."""
    db = sqlite3.connect(db_path)
    try:
        folders = [Path(p) for (p,) in db.execute("SELECT result_path FROM results WHERE current")]
    finally:
        db.close()
    return [f / name for f in folders for name in SEND_FILES if (f / name).is_file()]


def drain(cmd: list[str], work: Path, limit_s: float = 600) -> tuple[int, bool]:
    """One clean ``receive`` until every expected file has an outbox row and none waits; then
    SIGTERM. Returns its exit code and whether the outbox drained within ``limit_s``."""
    db_path = work / "state" / "ledger.sqlite3"
    want = len(expected_files(db_path))

    def drained() -> bool:
        states = _outbox(db_path)
        return states.get("waiting", 0) == 0 and sum(states.values()) >= want

    with open(work / "network.log", "ab") as fh:
        proc = subprocess.Popen(cmd, stdout=fh, stderr=subprocess.STDOUT)
    try:
        ok = wait_until(drained, limit_s, 0.5)
    finally:
        proc.send_signal(signal.SIGTERM)
        rc = proc.wait(60)
    return rc, ok


def check_sends(work: Path, node: CountingNode) -> dict[str, Any]:
    """Compare the node's stored SOP Instance UIDs with the result files and the outbox."""
    from pydicom import dcmread

    db_path = work / "state" / "ledger.sqlite3"
    files = expected_files(db_path)
    uids = {str(dcmread(f, stop_before_pixels=True).SOPInstanceUID) for f in files}
    states = _outbox(db_path)
    with node.lock:
        counts = dict(node.counts)
    return {
        "send_files": len(files),
        "sent": states.get("sent", 0),
        "send_waiting": states.get("waiting", 0),
        "send_given_up": states.get("given_up", 0),
        "send_lost": len(uids - set(counts)),
        "duplicates_received": sum(n - 1 for n in counts.values()),
        "received_other": len(set(counts) - uids),  # e.g. of a result superseded later
    }
