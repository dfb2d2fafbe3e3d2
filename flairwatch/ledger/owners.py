"""Who owns a running job: a run token and a lock file in the state folder, not a process id.

A process id says nothing reliable after a crash: a worker killed with its parent stays a zombie
for a while, a pid is reused, or belongs to another pid namespace, and ``kill(pid, 0)`` answers
"alive" for all of them. An advisory ``flock`` is released by the kernel when the last
descriptor of its holder closes, which happens when the process exits, however it exits. So
every process that takes jobs holds an exclusive lock on its own lock file for as long as it
runs, and writes the file's name and a fresh run token on each job it claims:

- the daemon's lock is the state folder's ``daemon.lock`` (one daemon per ledger);
- any other process (``reprocess``, a scale-out run) gets ``owners/<token>.lock`` the first time
  it claims a job through :class:`~flairwatch.ledger.store.Ledger`.

A running job whose owner's lock nobody holds was left by a process that is gone: it goes back
to the queue (:meth:`flairwatch.ledger.repair.RepairTables.requeue_orphans`).
"""

from __future__ import annotations

import contextlib
import fcntl
import os
import time
import uuid
from dataclasses import dataclass
from pathlib import Path

DAEMON_LOCK = "daemon.lock"
OWNERS_FOLDER = "owners"
# another process may hold a lock for a moment only to test it (lock_is_free): try again briefly
LOCK_TRIES = 20
LOCK_TRY_SECONDS = 0.05


@dataclass(frozen=True)
class Owner:
    """A run that holds jobs: its token and its lock file, relative to the state folder."""

    token: str
    lock: str


def new_token() -> str:
    return uuid.uuid4().hex


def try_lock(fd: int, *, tries: int = LOCK_TRIES) -> bool:
    """Take an exclusive lock on ``fd``, retrying briefly; False when another process keeps it."""
    for attempt in range(tries):
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            return True
        except BlockingIOError:
            if attempt < tries - 1:
                time.sleep(LOCK_TRY_SECONDS)
    return False


def lock_is_free(state_dir: Path, lock: str) -> bool:
    """Whether no process holds the lock file ``lock`` (a missing file counts as free).

    A lock held by this very process through another descriptor counts as held (flock locks
    belong to open file descriptions), so the daemon sees its own lock as held.
    """
    path = state_dir / lock
    try:
        fd = os.open(path, os.O_RDONLY)
    except FileNotFoundError:
        return True
    except PermissionError:  # another user's run, unreadable to us: assume it lives
        return False
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
        except BlockingIOError:
            return False
        return True
    finally:
        os.close(fd)  # also drops our test lock


def remove_dead_lock(state_dir: Path, lock: str) -> None:
    """Delete a per-run lock file whose owner is gone (never the daemon's own lock file)."""
    if lock.startswith(OWNERS_FOLDER + "/") and lock_is_free(state_dir, lock):
        with contextlib.suppress(OSError):  # gone already, or not ours to remove
            (state_dir / lock).unlink()


class RunLock:
    """This process's own lock file under ``owners/``, held until :meth:`release` or exit."""

    def __init__(self, state_dir: Path) -> None:
        token = new_token()
        folder = state_dir / OWNERS_FOLDER
        folder.mkdir(mode=0o750, exist_ok=True)
        self.owner = Owner(token, f"{OWNERS_FOLDER}/{token}.lock")
        self._path = state_dir / self.owner.lock
        self._fd: int | None = os.open(self._path, os.O_RDWR | os.O_CREAT | os.O_EXCL, 0o640)
        fcntl.flock(self._fd, fcntl.LOCK_EX)  # a fresh unique file: nobody else can hold it
        os.write(self._fd, f"{os.getpid()}\n".encode())

    def release(self) -> None:
        """Give the lock up (its jobs must be finished or requeued first) and remove the file."""
        if self._fd is None:
            return
        with contextlib.suppress(FileNotFoundError):
            self._path.unlink()
        os.close(self._fd)
        self._fd = None
