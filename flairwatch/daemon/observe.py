"""Filesystem events as hints: a supervised watchdog observer that only says "look again soon".

Events are never trusted to be complete (docs/architecture.md, failure modes): the kernel queue overflows in bursts,
network shares send none for remote writes, and nothing is seen while the daemon is down. So the
handler does one thing, call ``wake(reason)``, and the daemon's full scans decide what exists.

- Overflow: watchdog (>= 7.1) rebuilds its watches and logs a warning, but the events are gone;
  :class:`OverflowHook` listens to that warning and wakes the daemon for an immediate rescan.
- Supervision: the observer thread dies on an exception, and stops seeing anything when the
  watched folder is deleted and recreated (while ``is_alive()`` stays true). :meth:`check`
  notices both (dead threads; a changed device/inode of the root) and restarts the observer.
- Watch limits: ENOSPC/EMFILE at start-up become a one-line error naming the sysctl to raise.
"""

from __future__ import annotations

import errno
import logging
import os
from collections.abc import Callable
from pathlib import Path

from watchdog.events import (
    DirDeletedEvent,
    FileClosedNoWriteEvent,
    FileOpenedEvent,
    FileSystemEvent,
    FileSystemEventHandler,
)
from watchdog.observers import Observer
from watchdog.observers.api import BaseObserver

from flairwatch.errors import ConfigInvalid

log = logging.getLogger(__name__)

Wake = Callable[[str], None]
WATCHDOG_LOGGER = "watchdog.observers"
# our own scans and the workers open files: those events must not wake us, or we would loop
_QUIET_EVENTS = (FileOpenedEvent, FileClosedNoWriteEvent)


class _Hint(FileSystemEventHandler):
    def __init__(self, wake: Wake) -> None:
        self._wake = wake

    def on_any_event(self, event: FileSystemEvent) -> None:
        if isinstance(event, _QUIET_EVENTS):
            return
        self._wake("root deleted" if isinstance(event, DirDeletedEvent) else "event")


class OverflowHook(logging.Handler):
    """Calls ``wake("overflow")`` when watchdog logs that the kernel event queue overflowed."""

    def __init__(self, wake: Wake) -> None:
        super().__init__(level=logging.WARNING)
        self._wake = wake

    def emit(self, record: logging.LogRecord) -> None:
        if "overflow" in record.getMessage().lower():
            self._wake("overflow")

    def install(self) -> None:
        logger = logging.getLogger(WATCHDOG_LOGGER)
        if logger.getEffectiveLevel() > logging.WARNING:
            logger.setLevel(logging.WARNING)
        logger.addHandler(self)

    def remove(self) -> None:
        logging.getLogger(WATCHDOG_LOGGER).removeHandler(self)


def _identity(path: Path) -> tuple[int, int] | None:
    try:
        st = os.stat(path)
    except OSError:
        return None
    return (st.st_dev, st.st_ino)


def limit_message(exc: OSError) -> str:
    """What to tell the operator when inotify refuses a watch or an instance."""
    if exc.errno == errno.EMFILE:
        return (
            "inotify instance limit reached; raise it with "
            "'sysctl fs.inotify.max_user_instances=1024' or set 'polling: true'"
        )
    return (
        "inotify watch limit reached; raise it with "
        "'sysctl fs.inotify.max_user_watches=524288' or set 'polling: true'"
    )


class InboxObserver:
    """A watchdog observer on one folder, restarted when it dies or loses its folder."""

    def __init__(
        self, root: Path, wake: Wake, *, factory: Callable[[], BaseObserver] = Observer
    ) -> None:
        self.root = root
        self._wake = wake
        self._factory = factory
        self._observer: BaseObserver | None = None
        self._identity: tuple[int, int] | None = None
        self._hook = OverflowHook(wake)
        self.restarts = 0

    def start(self) -> None:
        """Start watching (recursively); raises ConfigInvalid when the kernel refuses watches."""
        observer = self._factory()
        observer.schedule(_Hint(self._wake), str(self.root), recursive=True)
        try:
            observer.start()
        except OSError as exc:
            if exc.errno in (errno.ENOSPC, errno.EMFILE):
                raise ConfigInvalid(limit_message(exc)) from None
            raise
        self._observer = observer
        self._identity = _identity(self.root)
        self._hook.install()

    def stop(self) -> None:
        self._hook.remove()
        if self._observer is not None:
            self._observer.stop()
            if self._observer.is_alive():
                self._observer.join(5)
            self._observer = None

    def healthy(self) -> bool:
        """False when the observer thread or one of its emitters has died, or the root changed."""
        obs = self._observer
        if obs is None or not obs.is_alive():
            return False
        if any(not e.is_alive() for e in obs.emitters):
            return False
        return _identity(self.root) == self._identity and self._identity is not None

    def check(self) -> bool:
        """Restart the observer if it is unhealthy; True when a restart happened (rescan!)."""
        if self.healthy():
            return False
        if _identity(self.root) is None:
            return False  # the inbox is missing: wait for it to come back, scans will log it
        log.warning("file watcher stopped or lost the inbox %s; restarting it", self.root)
        self.stop()
        self.start()
        self.restarts += 1
        self._wake("watcher restarted")
        return True
