"""What happens to a series' inbox files once the daemon has decided about the series.

Refused series may be moved to the quarantine folder (same relative paths, never deleted);
files of done and skipped series are deleted only when ``delete_inbox_files`` is set. Every
file moved or deleted is forgotten by the scanner so the next scan does not read it again.
A file is moved or deleted only while it is still the one that was scanned (same size and
mtime, same device and inode, reached without following a link): a file replaced since then
is somebody's new data and stays where it is.
"""

from __future__ import annotations

import logging
import time
from pathlib import Path

from flairwatch.config import Config
from flairwatch.daemon.inbox import InboxScanner
from flairwatch.intake.fsafe import move_if_same, unlink_if_same
from flairwatch.ledger.store import FileRow, JobRow, Ledger

log = logging.getLogger("flairwatch.daemon.watch")


class InboxFiles:
    """The inbox's files as the daemon handles them after a decision."""

    def __init__(self, cfg: Config, ledger: Ledger, scanner: InboxScanner) -> None:
        assert cfg.inbox is not None
        self.cfg, self.ledger, self.scanner = cfg, ledger, scanner
        self.inbox = cfg.inbox

    def quarantine(self, job: JobRow) -> None:
        """Move a refused series' files out of the inbox, keeping their relative paths."""
        assert self.cfg.quarantine is not None
        row = self.ledger.series(job.series_id)
        target = self.cfg.quarantine / (row.study_key or "unknown") / (row.series_key or "unknown")
        moved = []
        for f in self.ledger.revision_files(job.series_id):
            src = Path(f.path)
            try:
                dst = target / src.relative_to(self.inbox)
            except ValueError:
                dst = target / src.name
            try:
                dst.parent.mkdir(parents=True, exist_ok=True, mode=0o750)
                if dst.exists():
                    dst = dst.with_name(f"{dst.name}.{job.id}")
                ids = self.scanner.identity(f.path)
                if move_if_same(self.inbox, src, dst, f.size, f.mtime_ns, ids):
                    moved.append(f.path)
                else:
                    log.warning("%s changed or was replaced since it was scanned; left in place",
                                src)  # fmt: skip
            except OSError as exc:
                log.warning("could not move %s to quarantine: %s; left in place", src, exc)
        self.scanner.forget(moved)
        self.ledger.record_scan([], moved, time.time())  # gone by our hand, not a lost inbox
        log.info("series %s: %d files moved to %s", row.series_key, len(moved), target)

    def delete(self, series_id: int) -> None:
        if not self.cfg.delete_inbox_files:
            return
        files: list[FileRow] = self.ledger.revision_files(series_id)
        deleted = []
        for f in files:
            ids = self.scanner.identity(f.path)
            if unlink_if_same(self.inbox, Path(f.path), f.size, f.mtime_ns, ids):
                deleted.append(f.path)
            else:
                log.warning("%s changed or was replaced since it was scanned; not deleted", f.path)
        self.scanner.forget(deleted)
        self.ledger.record_scan([], deleted, time.time())
