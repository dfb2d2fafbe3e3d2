"""Sending results to DICOM nodes: the outbox, C-STORE, back-off, restarts and ``kill -9``.

Outside references: the C-STORE status classes of PS3.4 Annex B.2.3 (Table B.2-1) and PS3.7
Annex C; the receiving node is pynetdicom's Store SCP (the reference implementation of the
DIMSE and upper-layer services, PS3.7 9.1.1 and PS3.8), so a send counts only when that
independent implementation stored the instance with the same SOP Instance UID and pixel data.
Exponential back-off with a cap is common practice for retrying an unreachable peer.
"""

from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from pydicom import dcmread

from flairwatch.config import SendNode, SendSettings, load_config
from flairwatch.ledger.store import Ledger, OutboxState
from flairwatch.network.plan import Outcome, after_failure, outbox_lines, retry_delay, store_outcome
from flairwatch.network.send import Answer, Sender, c_store, node_since
from tests.network_fixtures import StoreNode, add_result, free_port, wait_for

NOW = 1_700_000_000.0


def _settings(port: int, **kw: float) -> SendSettings:
    node = SendNode("archive", "TESTNODE", "127.0.0.1", port)
    return SendSettings((node,), "FWTEST", **kw)


def test_back_off_doubles_caps_and_gives_up() -> None:
    # common practice: exponential back-off, capped, then a give-up deadline
    assert [retry_delay(n, 10, 60) for n in range(1, 6)] == [10, 20, 40, 60, 60]
    r = after_failure(attempts=2, created=NOW, now=NOW + 5, first_s=10, max_s=60, give_up_days=1)
    assert not r.give_up and r.not_before == NOW + 25
    late = after_failure(
        attempts=9, created=NOW, now=NOW + 86400, first_s=1, max_s=9, give_up_days=1
    )
    assert late.give_up
    assert after_failure(attempts=1, created=NOW, now=NOW, first_s=1, max_s=9, give_up_days=1,
                         permanent=True).give_up  # fmt: skip


@pytest.mark.parametrize(
    ("status", "outcome"),
    [
        (0x0000, Outcome.SENT),  # PS3.4 Table B.2-1: Success
        (0xB000, Outcome.WARNING),  # Warning: coercion of data elements
        (0xB007, Outcome.WARNING),  # Warning: data set does not match SOP class
        (0xB006, Outcome.WARNING),  # Warning: elements discarded
        (0xA700, Outcome.FAILED),  # Refused: out of resources
        (0xA900, Outcome.FAILED),  # Error: data set does not match SOP class
        (0xC000, Outcome.FAILED),  # Error: cannot understand
        (0x0122, Outcome.FAILED),  # PS3.7 C.5.2: SOP class not supported
        (None, Outcome.FAILED),  # no response at all
    ],
)
def test_c_store_status_meaning(status: int | None, outcome: Outcome) -> None:
    assert store_outcome(status) is outcome


def test_outbox_takes_landed_current_results_since_the_node_appeared(tmp_path: Path) -> None:
    state = tmp_path / "state"
    with Ledger.open(state, check_fs=False) as led:
        add_result(led, tmp_path / "old", NOW - 100)  # before the node was configured
        add_result(led, tmp_path / "superseded", NOW + 1, current=0)
        add_result(led, tmp_path / "new", NOW + 2)
        since = node_since(state, ["archive"], NOW)
        assert node_since(state, ["archive"], NOW + 50) == since == {"archive": NOW}  # kept
        sender = Sender(led, _settings(1), since)
        assert sender.fill(NOW + 3) == 2
        assert sender.fill(NOW + 4) == 0  # INSERT OR IGNORE: one row per result, node, object
        rows = led.outbox_rows("archive")
    assert {(Path(r.path).parent.name, r.object) for r in rows} == {
        ("new", "segmentation"),
        ("new", "measurements"),
    }
    assert all(r.state is OutboxState.WAITING and r.attempts == 0 for r in rows)


def test_results_reach_a_store_scp_then_status_shows_them(tmp_path: Path) -> None:
    state = tmp_path / "state"
    with StoreNode() as node, Ledger.open(state, check_fs=False) as led:
        uids = add_result(led, tmp_path / "r1", NOW + 1)
        (tmp_path / "r2").mkdir()
        sender = Sender(led, _settings(node.port), node_since(state, ["archive"], NOW))
        report = sender.pass_once(NOW + 10)
        rows = led.outbox_rows()
        counts = led.outbox_counts()
    assert (report.added, report.sent, report.failed) == (2, 2, 0)
    assert {r.state for r in rows} == {OutboxState.SENT}
    assert {r.sop_uid for r in rows} == set(node.received) == set(uids.values())
    for obj, uid in uids.items():  # the node holds the very pixel data of the file we sent
        assert node.received[uid] == dcmread(tmp_path / "r1" / f"{obj}.dcm").PixelData
    (line,) = outbox_lines(counts)
    assert line.startswith("sending to archive: 0 waiting, 2 sent") and "0 given up" in line


def test_node_down_is_retried_with_back_off_then_delivered(tmp_path: Path) -> None:
    state, port = tmp_path / "state", free_port()
    settings = _settings(port, retry_seconds=10, retry_max_seconds=30, give_up_days=1)
    with Ledger.open(state, check_fs=False) as led:
        uids = add_result(led, tmp_path / "r", NOW + 1)
        sender = Sender(led, settings, node_since(state, ["archive"], NOW), timeout_s=2)
        t = NOW + 5
        for expect_wait in (10, 20, 30, 30):  # the node is down: nothing listens on the port
            report = sender.pass_once(t)
            assert (report.sent, report.failed) == (0, 2)
            rows = led.outbox_rows()
            assert {r.not_before - t for r in rows} == {expect_wait}
            assert all("could not be reached" in (r.last_error or "") for r in rows)
            assert sender.pass_once(t + expect_wait - 1).failed == 0  # not due yet: not tried
            t += expect_wait
        assert {r.attempts for r in led.outbox_rows()} == {4}
        with StoreNode(port=port) as node:  # the node comes back
            report = sender.pass_once(t)
        rows = led.outbox_rows()
    assert report.sent == 2 and {r.state for r in rows} == {OutboxState.SENT}
    assert set(node.received) == set(uids.values())
    assert {r.attempts for r in rows} == {5}


def test_given_up_after_the_deadline_and_for_a_missing_file(tmp_path: Path) -> None:
    state = tmp_path / "state"
    settings = _settings(free_port(), retry_seconds=1, give_up_days=2)
    with Ledger.open(state, check_fs=False) as led:
        add_result(led, tmp_path / "r", NOW + 1)
        (tmp_path / "r" / "measurements.dcm").unlink()  # e.g. outputs: measurements: false
        sender = Sender(led, settings, node_since(state, ["archive"], NOW), timeout_s=2)
        first = sender.pass_once(NOW + 2)
        late = sender.pass_once(NOW + 2 + 2 * 86400)
        rows = {r.object: r for r in led.outbox_rows()}
        (line,) = outbox_lines(led.outbox_counts())
    assert (first.failed, first.given_up) == (1, 1) and late.given_up == 1
    assert rows["measurements"].state is OutboxState.GIVEN_UP
    assert rows["measurements"].attempts == 1  # given up at once: a landed folder never changes
    assert "missing" in (rows["measurements"].last_error or "")
    assert rows["segmentation"].state is OutboxState.GIVEN_UP and rows["segmentation"].attempts == 2
    assert "2 given up" in line and "last error" in line


def test_a_sender_that_dies_mid_pass_loses_nothing(tmp_path: Path) -> None:
    state = tmp_path / "state"
    with StoreNode() as node:
        with Ledger.open(state, check_fs=False) as led:
            sent = {}
            for i in range(4):
                sent.update(
                    {f"{i}{k}": v for k, v in add_result(led, tmp_path / f"r{i}", NOW).items()}
                )
            since = node_since(state, ["archive"], NOW)

            def dies_after_three(
                node: SendNode, ae: str, items: list[Any], timeout_s: float
            ) -> Iterator[Answer]:
                answers = c_store(node, ae, items, timeout_s)
                for _ in range(3):
                    yield next(answers)
                answers.close()  # releases the association, as the OS would close the socket
                raise RuntimeError("killed")

            sender = Sender(led, _settings(node.port), since, store=dies_after_three)
            with pytest.raises(RuntimeError):
                sender.pass_once(NOW + 1)
            assert len([r for r in led.outbox_rows() if r.state is OutboxState.SENT]) == 3
        with Ledger.open(
            state, check_fs=False
        ) as led:  # the restart: a new process, new connection
            Sender(led, _settings(node.port), since).pass_once(NOW + 2)
            rows = led.outbox_rows()
    assert {r.state for r in rows} == {OutboxState.SENT} and len(rows) == 8
    assert set(node.received) == set(sent.values())
    assert max(node.counts.values()) == 1  # the 3 answered sends were recorded: none went twice


def _write_config(path: Path, state: Path, port: int) -> None:
    path.write_text(
        f"state: {state}\n"
        "send:\n  ae_title: FWTEST\n  retry_seconds: 0.2\n  retry_max_seconds: 1\n"
        f"  nodes:\n    - {{name: archive, ae_title: TESTNODE, host: 127.0.0.1, port: {port}}}\n",
        encoding="utf-8",
    )


def test_kill_9_during_sending_never_loses_a_send(tmp_path: Path) -> None:
    """A real ``flairwatch receive`` process sending to a real SCP, killed with SIGKILL five
    times at random moments while it sends; the sixth run finishes. Every object arrives."""
    rng = random.Random(7)
    state, cfg = tmp_path / "state", tmp_path / "net.yaml"
    with StoreNode(delay_s=0.01) as node:
        _write_config(cfg, state, node.port)
        assert load_config(cfg).send is not None
        expected: set[str] = set()
        with Ledger.open(state, check_fs=False) as led:
            node_since(state, ["archive"], NOW)
            for i in range(25):
                expected.update(add_result(led, tmp_path / "results" / f"r{i}", NOW + 1).values())
        command = [sys.executable, "-m", "flairwatch", "--quiet", "receive", "--config", str(cfg)]
        kills = 0
        for _ in range(5):
            before = sum(node.counts.values())
            proc = subprocess.Popen(command, stderr=subprocess.PIPE, text=True)
            # kill while sending: after the first new arrival, at a random moment
            assert wait_for(lambda b=before: sum(node.counts.values()) > b, 10), proc.stderr
            time.sleep(rng.uniform(0.0, 0.15))
            if proc.poll() is None:
                os.kill(proc.pid, signal.SIGKILL)
                kills += 1
            proc.wait()
            proc.stderr.close()  # type: ignore[union-attr]
        assert kills == 5 and len(node.received) < len(expected)  # really cut short each time
        proc = subprocess.Popen(command, stderr=subprocess.PIPE, text=True)
        try:
            assert wait_for(lambda: set(node.received) >= expected, 15)
        finally:
            proc.send_signal(signal.SIGTERM)
            _out, err = proc.communicate(timeout=10)
        assert proc.returncode == 0, err
    with Ledger.open(state, check_fs=False) as led:
        rows = led.outbox_rows()
    assert set(node.received) == expected  # every object arrived at least once
    assert len(rows) == 50 and {r.state for r in rows} == {OutboxState.SENT}
