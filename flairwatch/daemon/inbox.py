"""Inbox scans and the settle rule: when is a series complete enough to process?

DICOM has no "series complete" marker, so a series is ready when (docs/architecture.md, failure modes):

- no new instance has arrived for ``settle_seconds`` (time of observation, not file mtime:
  copies often keep the sender's mtime),
- every file's size and mtime are the same at two scans (the scan that last saw a change and
  a later one),
- every file reads whole: left to :func:`flairwatch.intake.load.load_series`, which rejects cut files.

A scan re-reads a header only when a file's size or mtime changed, so a rescan of a large inbox
costs one ``stat`` per file. Two exceptions keep a passing problem from sticking: a file that could
not be read at all (a permission, EIO, ESTALE) is tried again at every scan, and an unusable
file whose inode changed (``chmod``, ``chown``: the ctime moves, the mtime does not) is read
again. Watchdog events only make the next scan come sooner.
"""

from __future__ import annotations

import hashlib
import logging
import os
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from enum import StrEnum
from pathlib import Path

from flairwatch.intake.assemble import group_series
from flairwatch.intake.discover import read_record, walk_folder
from flairwatch.intake.fsafe import Note, Seen
from flairwatch.ledger.store import TERMINAL_STATES, FileRow, JobState
from flairwatch.records import FileRecord, Series

log = logging.getLogger(__name__)

ReadRecord = Callable[[Path], FileRecord]
Candidates = Callable[[Sequence[Path]], Iterator[Path]]


@dataclass(frozen=True)
class Scan:
    """What one full scan of the inbox found."""

    records: dict[str, FileRecord]  # by path, every candidate file present now
    series: dict[tuple[str, str], Series]  # by (study UID, series UID)
    unusable: list[FileRecord]  # junk and duplicate copies, with their reason
    read: int  # headers read in this scan (new or changed files)
    gone: list[str]  # paths present at the previous scan and missing now


class InboxScanner:
    """Full scans of one inbox folder with a header cache keyed by (path, size, mtime).

    By default the walk goes through directory descriptors and never follows a link
    (:func:`flairwatch.intake.discover.walk_folder`), and each header is read from the very file
    the walk saw (device, inode, size, mtime); ``candidates``, ``read`` and ``stat`` replace
    that with path-based calls (for tests with fake file systems).
    """

    def __init__(
        self,
        root: Path,
        *,
        candidates: Candidates | None = None,
        read: ReadRecord = read_record,
        stat: Callable[[Path], os.stat_result] = os.stat,
    ) -> None:
        self.root = root
        self._candidates = candidates
        self._read = read
        self._stat = stat
        self._cache: dict[str, FileRecord] = {}
        self._ctimes: dict[str, int] = {}
        self._ids: dict[str, tuple[int, int]] = {}
        self._said: set[tuple[int, str]] = set()  # conditions logged, while they last

    def forget(self, paths: Iterable[str]) -> None:
        for p in paths:
            self._cache.pop(p, None)

    def _tell(self, said: set[tuple[int, str]]) -> None:
        """Log each condition once when it appears (or changes), not at every rescan."""
        for level, text in sorted(said - self._said):
            log.log(level, "%s", text)
        self._said = said

    def identity(self, path: str) -> tuple[int, int] | None:
        """(device, inode) of a file as the last scan saw it, or None if it did not see it."""
        return self._ids.get(path)

    def _seen(self, note: Note) -> Iterator[Seen]:
        if self._candidates is None:
            yield from walk_folder(self.root, note)
            return
        for path in self._candidates([self.root]):
            try:
                yield Seen.of(path, self._stat(path))
            except OSError:
                continue  # vanished since it was listed

    def scan(self) -> Scan:
        found: dict[str, FileRecord] = {}
        ctimes: dict[str, int] = {}
        ids: dict[str, tuple[int, int]] = {}
        said: set[tuple[int, str]] = set()
        read = 0
        for seen in self._seen(lambda level, text: said.add((level, text))):
            key = str(seen.path)
            cached = self._cache.get(key)
            if cached is None or _stale(cached, seen, self._ctimes.get(key)):
                if self._read is read_record:
                    cached = read_record(seen.path, root=self.root, expect=seen)
                else:
                    cached = self._read(seen.path)
                read += 1
            found[key] = cached
            ctimes[key] = seen.ctime_ns
            ids[key] = (seen.dev, seen.ino)
        gone = sorted(set(self._cache) - set(found))
        self._cache, self._ctimes, self._ids = found, ctimes, ids
        groups, unusable = group_series(found.values())
        said.update((logging.INFO, f"{r.path}: {r.reason}") for r in unusable
                    if r.reason and r.reason.startswith("duplicate"))  # fmt: skip
        self._tell(said)
        return Scan(found, {s.key: s for s in groups}, unusable, read, gone)


# the reason discover gives a file it could not open or read (a transient state, often)
UNREADABLE_PREFIX = "cannot read"


def _stale(cached: FileRecord, seen: Seen, ctime_ns: int | None) -> bool:
    """Whether a file's cached header must be read again (pure)."""
    if (cached.size, cached.mtime_ns) != (seen.size, seen.mtime_ns):
        return True
    if cached.reason is None:
        return False
    return cached.reason.startswith(UNREADABLE_PREFIX) or ctime_ns != seen.ctime_ns


def file_rows(scan: Scan) -> list[FileRow]:
    """Ledger rows for every file of a scan (junk included, with its reason)."""
    rows = []
    for key, rec in scan.records.items():
        h = rec.header
        rows.append(
            FileRow(
                key,
                rec.size,
                rec.mtime_ns,
                rec.sop_uid,
                h.study_uid if h else None,
                h.series_uid if h else None,
                reason=rec.reason,
            )
        )
    return rows


def signature(series: Series) -> str:
    """A digest of the instance set with sizes and mtimes: any arrival or change alters it.

    Paths are left out on purpose: a file renamed or moved inside the inbox is the same instance.
    """
    h = hashlib.sha256()
    for sop, size, mtime in sorted((f.sop_uid or "", f.size, f.mtime_ns) for f in series.files):
        h.update(f"{sop}\0{size}\0{mtime}\n".encode())
    return h.hexdigest()[:32]


class Step(StrEnum):
    """What the daemon does with one series after a scan."""

    NEW_REVISION = "new_revision"  # first sight, a new instance after a finished revision,
    # or a refused revision whose files changed
    CHANGED = "changed"  # still arriving: restart the settle clock
    WAIT = "wait"  # unchanged but not yet for settle_seconds
    SETTLED = "settled"  # ready: select it and queue it (or skip it)
    NOTHING = "nothing"  # already queued, running or finished, and no new instance


@dataclass(frozen=True)
class Known:
    """What the ledger knows about a series' latest revision."""

    job_state: JobState
    signature: str | None
    stable_since: float | None
    sops_taken: frozenset[str]  # instances already in some revision


def plan(series: Series, known: Known | None, now: float, settle_seconds: float) -> Step:
    """Decide the next step for one series (pure).

    Parameters
    ----------
    series : Series
        The series as the current scan sees it.
    known : Known or None
        Its latest revision in the ledger (None if never seen).
    now : float
        Current time, seconds since the epoch.
    settle_seconds : float
        Quiet time needed after the last observed change, in seconds.
    """
    if known is None:
        return Step.NEW_REVISION
    if known.job_state is JobState.SETTLING:
        if signature(series) != known.signature or known.stable_since is None:
            return Step.CHANGED
        if now - known.stable_since >= settle_seconds:
            return Step.SETTLED
        return Step.WAIT
    if known.job_state in TERMINAL_STATES:
        late = {f.sop_uid for f in series.files} - known.sops_taken
        if late:
            return Step.NEW_REVISION
        # a refused series whose files were re-sent or removed is worth another look; a done
        # one is not re-run for a re-sent copy of the same instances
        refused = known.job_state in (JobState.REFUSED, JobState.FAILED)
        if refused and signature(series) != known.signature:
            return Step.NEW_REVISION
    # queued or running: a late instance waits until that job ends, then makes a new revision
    return Step.NOTHING


def revision_series(series: Series, paths: set[str]) -> Series | None:
    """The part of a scanned series that belongs to one revision (files by path)."""
    files = tuple(f for f in series.files if str(f.path) in paths)
    if not files:
        return None
    return Series(header=files[0].header or series.header, files=files)
