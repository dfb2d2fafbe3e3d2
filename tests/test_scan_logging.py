"""Repeated conditions are logged once per change, not at every rescan (issue 10 item 10).

Real files and real scans: a duplicate copy of an instance (same SOP Instance UID, PS3.3
C.12.1), a symbolic link, and a junk file stay in the inbox while the daemon's intake scans
again and again; each is said once, and again only when it changes or comes back.
"""

from __future__ import annotations

import logging
import shutil
from pathlib import Path

import pytest

from flairwatch.config import Config
from flairwatch.daemon.inbox import InboxScanner
from flairwatch.daemon.inputs import InboxFiles
from flairwatch.daemon.settle import Intake
from flairwatch.ledger.store import Ledger
from tests.series_fixtures import write_series


def _said(caplog: pytest.LogCaptureFixture, words: str) -> int:
    return sum(words in r.getMessage() for r in caplog.records)


def test_scanner_says_each_condition_once_per_change(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    inbox = tmp_path / "in"
    files = write_series(inbox / "a")
    copy = inbox / "b" / "copy.dcm"
    copy.parent.mkdir()
    shutil.copyfile(files[0], copy)  # a second copy of one instance
    (inbox / "link").symlink_to(tmp_path, target_is_directory=True)
    scanner = InboxScanner(inbox)
    caplog.set_level(logging.DEBUG)
    for _ in range(4):
        scan = scanner.scan()
        assert len(scan.unusable) == 1 and scan.unusable[0].path == copy
    info = [r for r in caplog.records if r.levelno >= logging.INFO]
    assert sum("duplicate" in r.getMessage() for r in info) == 1
    assert sum("not following symbolic link" in r.getMessage() for r in info) == 1
    # the duplicate changes (a larger copy now wins): one new line
    caplog.clear()
    with open(copy, "ab") as fh:
        fh.write(b"\0" * 10)
    for _ in range(3):
        scanner.scan()
    assert _said(caplog, "duplicate of SOP Instance UID") == 1
    # it goes away: nothing; it comes back: said again, once
    caplog.clear()
    copy.unlink()
    scanner.scan()
    shutil.copyfile(files[0], copy)
    for _ in range(3):
        scanner.scan()
    info = [r for r in caplog.records if r.levelno >= logging.INFO]
    assert sum("duplicate" in r.getMessage() for r in info) == 1
    assert not any("not following" in r.getMessage() for r in info)  # still there, said before


def test_daemon_intake_logs_junk_and_duplicates_once_over_rescans(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    inbox = tmp_path / "in"
    files = write_series(inbox / "a")
    (inbox / "b").mkdir()
    shutil.copyfile(files[0], inbox / "b" / "copy.dcm")
    (inbox / "notes.txt").write_text("not an image\n", encoding="utf-8")
    cfg = Config(inbox=inbox, results=tmp_path / "out", state=tmp_path / "state",
                 settle_seconds=1.0)  # fmt: skip
    caplog.set_level(logging.INFO)
    with Ledger.open(tmp_path / "state") as ledger:
        scanner = InboxScanner(inbox)
        intake = Intake(cfg, ledger, b"secret", InboxFiles(cfg, ledger, scanner), once=False)
        for n in range(6):  # the series settles and is queued on the way; nothing is repeated
            intake.scan(1000.0 + n)
    messages = [r.getMessage() for r in caplog.records]
    assert sum("duplicate" in m for m in messages) == 1
    assert sum("notes.txt" in m and "not DICOM" in m for m in messages) == 1
    assert sum("arriving" in m for m in messages) == 1
    assert sum("queued" in m for m in messages) == 1
