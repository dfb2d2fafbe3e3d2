"""The daemon's intake half: scan the inbox, record the files, move each series one step.

A step (:func:`flairwatch.daemon.inbox.plan`) is: a new revision, still changing, or settled;
a settled series is selected (queued) or skipped by the selection rules. Only the daemon's main
thread calls this; the ledger is the only memory that survives a restart.
"""

from __future__ import annotations

import logging
from dataclasses import replace

from flairwatch import keys
from flairwatch.config import Config
from flairwatch.daemon.inbox import InboxScanner, Known, Scan, Step, file_rows, plan, signature
from flairwatch.daemon.inputs import InboxFiles
from flairwatch.errors import InputRejected
from flairwatch.intake.select import select_series
from flairwatch.ledger.store import TERMINAL_STATES, FileRow, JobRow, JobState, Ledger
from flairwatch.records import Series

log = logging.getLogger("flairwatch.daemon.watch")

LOST_MIN_FILES = 10  # fewer files gone than this is never a vanished inbox
LOST_GRACE_SECONDS = 900.0  # a vanished inbox that stays away this long is taken as removed
LOST_RECHECK_SECONDS = 30.0


def _unchanged(row: FileRow | None) -> FileRow | None:
    """A ledger row as a scan would produce it (a scan does not know revisions)."""
    return None if row is None else replace(row, series_id=None)


class Intake:
    """Scans and settling. ``next_scan`` is when the loop should scan again (clock seconds)."""

    def __init__(
        self, cfg: Config, ledger: Ledger, secret: bytes, files: InboxFiles, *, once: bool
    ) -> None:
        assert cfg.inbox is not None
        self.cfg, self.ledger, self.secret, self.files = cfg, ledger, secret, files
        self.inbox = cfg.inbox
        self.scanner: InboxScanner = files.scanner
        self.once = once
        self.last_scan: Scan | None = None
        self.next_scan = 0.0
        self.once_targets: set[tuple[str, str]] = set()
        self.inbox_missing = False  # logged once when it goes, once when it comes back
        self.lost_since: float | None = None  # when most inbox files vanished at once
        self.lost_grace_seconds = LOST_GRACE_SECONDS

    def scan(self, now: float) -> None:
        try:
            scan = self.scanner.scan()
        except InputRejected:
            if not self.inbox_missing:
                log.warning("inbox %s is missing; will look again every %.0f s", self.inbox,
                            self.cfg.rescan_seconds)  # fmt: skip
            self.inbox_missing = True
            self.next_scan = now + self.cfg.rescan_seconds
            return
        if self.inbox_missing:
            log.warning("inbox %s is back", self.inbox)
            self.inbox_missing = False
        known = self.ledger.known_files()
        if self._inbox_lost(known, scan, now):
            self.next_scan = now + min(self.cfg.rescan_seconds, LOST_RECHECK_SECONDS)
            return
        changed = [r for r in file_rows(scan) if _unchanged(known.get(r.path)) != r]
        for row in changed:
            if row.reason and row.path not in known:
                log.info("ignored %s: %s", row.path, row.reason)
        # gone = known to the ledger and not found now (also files removed while we were down)
        self.ledger.record_scan(changed, [p for p in known if p not in scan.records], now)
        self.last_scan = scan
        log.debug("scan: %d files (%d read), %d series, %d unusable, %d gone",
                  len(scan.records), scan.read, len(scan.series), len(scan.unusable),
                  len(scan.gone))  # fmt: skip
        deadline = now + self.cfg.rescan_seconds
        for key, series in scan.series.items():
            settle_at = self._step(key, series, now)
            if settle_at is not None:
                deadline = min(deadline, settle_at + 0.05)
        if not self.once_targets and self.once:
            self.once_targets = set(scan.series)
        self.next_scan = deadline

    def inbox_away(self) -> bool:
        """The inbox is missing or most of its files vanished: nothing may be dispatched."""
        return self.inbox_missing or self.lost_since is not None

    def _inbox_lost(self, known: dict[str, FileRow], scan: Scan, now: float) -> bool:
        """Whether this scan looks like a vanished share rather than files really removed.

        Lost: at least half of the files the ledger knows are gone at once, among them at least
        half of the files of series still waiting for a result. Such a scan is not recorded
        (no file marked gone, no series refused) and dispatch pauses, until the files come back
        or stay away for ``lost_grace_seconds``; then the loss is accepted as real.
        """
        gone = {p for p in known if p not in scan.records}
        pending = self.ledger.pending_files() if gone else set()
        lost = (
            bool(pending)
            and len(gone) >= max(LOST_MIN_FILES, len(known) / 2)
            and len(gone & pending) >= len(pending) / 2
        )
        if not lost:
            if self.lost_since is not None:
                log.warning("inbox %s: its files are back; dispatch resumes", self.inbox)
                self.lost_since = None
            return False
        if self.lost_since is None:
            self.lost_since = now
            log.error("inbox %s: %d of %d files vanished at once (an unmounted share, a changed "
                      "permission?); dispatch paused, queued series kept; looking again",
                      self.inbox, len(gone), len(known))  # fmt: skip
        if now - self.lost_since < self.lost_grace_seconds:
            return True
        log.warning("inbox %s: the files stayed away %.0f min; taken as removed", self.inbox,
                    (now - self.lost_since) / 60)  # fmt: skip
        self.lost_since = None
        return False

    def _step(self, key: tuple[str, str], series: Series, now: float) -> float | None:
        """Move one series a step; returns when it may be settled, if it is settling."""
        latest = self.ledger.latest_revision(*key)
        job = self.ledger.latest_job(latest.id) if latest else None
        known = None
        if latest is not None and job is not None:
            taken = self.ledger.known_sops(*key) if job.state in TERMINAL_STATES else set()
            known = Known(job.state, latest.signature, latest.stable_since, frozenset(taken))
        step = plan(series, known, now, self.cfg.settle_seconds)
        sig = signature(series)
        if step is Step.NEW_REVISION:
            header = series.header
            row, job = self.ledger.new_revision(
                *key,
                lambda r: (
                    keys.subject_key(header.patient_id, self.secret),
                    keys.study_key(key[0]),
                    keys.series_key(key[1], r),
                ),
                now,
            )
            self.ledger.note_signature(row.id, sig, len(series.files), now, now)
            what = "arriving" if row.revision == 1 else "late instance, new revision"
            log.info("series %s: %s (%d files)", row.series_key, what, len(series.files))
            return now + self.cfg.settle_seconds
        assert latest is not None and job is not None
        if step is Step.CHANGED:
            self.ledger.note_signature(latest.id, sig, len(series.files), now, now)
            return now + self.cfg.settle_seconds
        if step is Step.WAIT:
            return (latest.stable_since or now) + self.cfg.settle_seconds
        if step is Step.SETTLED:
            self._settled(latest.id, latest.series_key or "", key, series, job, now)
        return None

    def _settled(
        self, series_id: int, label: str, key: tuple[str, str], series: Series, job: JobRow,
        now: float,
    ) -> None:  # fmt: skip
        self.ledger.take_files(series_id, *key)
        choice = select_series(series.header, self.cfg.select)
        self.ledger.set_selection(series_id, choice.selected, choice.rule, choice.reason)
        if choice.selected:
            self.ledger.move_job(job.id, [JobState.SETTLING], JobState.QUEUED, now)
            log.info("series %s: settled, %d files, queued (%s)", label, len(series.files),
                     choice.rule)  # fmt: skip
            return
        self.ledger.move_job(job.id, [JobState.SETTLING], JobState.SKIPPED, now)
        log.info("series %s: skipped by rule %s: %s", label, choice.rule, choice.reason)
        self.files.delete(series_id)

    def once_settled(self) -> bool:
        """--once: every series seen at the first scan has left the settling state."""
        scan = self.last_scan
        if scan is None:
            return False
        for key in self.once_targets & set(scan.series):
            row = self.ledger.latest_revision(*key)
            job = self.ledger.latest_job(row.id) if row else None
            if job is None or job.state is JobState.SETTLING:
                return False
        return True
