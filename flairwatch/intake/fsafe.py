"""Walk and open inbox files through directory descriptors, never through symbolic links.

An inbox is written by other programs and people; between the moment a file is listed and the
moment it is read, moved or deleted, a folder may be swapped for a symbolic link or a file for
another one. So every folder below the inbox root is opened relative to its parent's descriptor
with ``O_NOFOLLOW``, every file likewise, and the opened file is compared with what the scan saw
(device, inode, size, mtime) before anything reads, moves or deletes it.
"""

from __future__ import annotations

import errno
import io
import logging
import os
import shutil
import stat as stat_mod
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

log = logging.getLogger(__name__)

# (logging level, one line) about something the walk passed by; a caller that scans again and
# again collects these to log each only when it is new (see flairwatch.daemon.inbox)
Note = Callable[[int, str], None]


def log_note(level: int, message: str) -> None:
    log.log(level, "%s", message)


_DIR_FLAGS = os.O_RDONLY | os.O_DIRECTORY | os.O_NOFOLLOW | getattr(os, "O_CLOEXEC", 0)
_FILE_FLAGS = os.O_RDONLY | os.O_NOFOLLOW | getattr(os, "O_CLOEXEC", 0) | getattr(os, "O_NOCTTY", 0)


@dataclass(frozen=True)
class Seen:
    """One regular file as a scan saw it (sizes in bytes, times in ns since the epoch)."""

    path: Path
    dev: int
    ino: int
    size: int
    mtime_ns: int
    ctime_ns: int

    @classmethod
    def of(cls, path: Path, st: os.stat_result) -> Seen:
        return cls(path, st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns, st.st_ctime_ns)

    def same(self, st: os.stat_result) -> bool:
        """Whether ``st`` is still this file, unchanged (ctime left out: chmod is harmless)."""
        return (st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns) == (
            self.dev,
            self.ino,
            self.size,
            self.mtime_ns,
        )


class FileChanged(OSError):
    """The file at a path is no longer the one the scan saw (swapped, rewritten, a link now)."""


def walk(root: Path, skip: Callable[[str], bool], note: Note = log_note) -> Iterator[Seen]:
    """Every regular file below ``root`` (a folder), depth first in sorted name order.

    Folders are opened relative to their parent's descriptor without following symbolic links,
    so a link (to outside the inbox, or a loop) is never entered, even one swapped in during
    the walk. ``root`` itself may be a link (an inbox on another disk is often one). Names for
    which ``skip`` is true are left out. Folders that vanish or cannot be opened are logged and
    skipped; the error of opening ``root`` itself is raised. What was passed by is told to
    ``note`` (logged by default).
    """
    fd = os.open(root, os.O_RDONLY | os.O_DIRECTORY | getattr(os, "O_CLOEXEC", 0))
    try:
        yield from _walk_fd(fd, root, skip, note)
    finally:
        os.close(fd)


def _walk_fd(fd: int, where: Path, skip: Callable[[str], bool], note: Note) -> Iterator[Seen]:
    try:
        with os.scandir(fd) as it:
            entries = sorted(((e.name, e) for e in it), key=lambda pair: pair[0])
    except OSError as exc:
        note(logging.WARNING, f"cannot list {where}: {exc.strerror or exc}")
        return
    for name, entry in entries:
        if skip(name):
            continue
        path = where / name
        try:
            st = entry.stat(follow_symlinks=False)
        except OSError as exc:  # vanished between listing and stat
            log.debug("skipping %s: %s", path, exc)
            continue
        if stat_mod.S_ISLNK(st.st_mode):
            note(logging.INFO, f"not following symbolic link {path}")
        elif stat_mod.S_ISDIR(st.st_mode):
            try:
                sub = os.open(name, _DIR_FLAGS, dir_fd=fd)
            except OSError as exc:  # swapped for a link (ELOOP/ENOTDIR), vanished, no permission
                note(logging.INFO, f"not entering {path}: {exc.strerror or exc}")
                continue
            try:
                yield from _walk_fd(sub, path, skip, note)
            finally:
                os.close(sub)
        elif stat_mod.S_ISREG(st.st_mode):
            yield Seen.of(path, st)


def _parts(root: Path, path: Path) -> tuple[str, ...] | None:
    try:
        rel = path.relative_to(root)
    except ValueError:
        return None
    parts = rel.parts
    return parts if parts and ".." not in parts else None


@contextmanager
def _parent_fd(root: Path, parts: tuple[str, ...]) -> Iterator[int]:
    """Descriptor of the folder holding ``root/parts``, every step opened without links."""
    fds = [os.open(root, os.O_RDONLY | os.O_DIRECTORY | getattr(os, "O_CLOEXEC", 0))]
    try:
        for name in parts[:-1]:
            fds.append(os.open(name, _DIR_FLAGS, dir_fd=fds[-1]))
        yield fds[-1]
    finally:
        for fd in reversed(fds):
            os.close(fd)


def open_file(path: Path, *, root: Path | None = None, expect: Seen | None = None) -> int:
    """Open a file for reading without following links; returns a descriptor to close.

    With ``root`` (a folder above ``path``), every folder between them is opened relative to
    its parent without following links; otherwise only the last component is protected.
    With ``expect``, the opened file must be the one the scan saw.

    Raises
    ------
    OSError
        As ``os.open`` does (``ELOOP`` for a link); :class:`FileChanged` when the file is not
        the expected one or not a regular file.
    """
    parts = _parts(root, path) if root is not None else None
    if root is not None and parts is not None:
        with _parent_fd(root, parts) as dfd:
            fd = os.open(parts[-1], _FILE_FLAGS, dir_fd=dfd)
    else:
        fd = os.open(path, _FILE_FLAGS)
    try:
        st = os.fstat(fd)
        if not stat_mod.S_ISREG(st.st_mode):
            raise FileChanged(f"{path} is not a regular file")
        if expect is not None and not expect.same(st):
            raise FileChanged(f"{path} changed since it was scanned")
    except BaseException:
        os.close(fd)
        raise
    return fd


class CappedReader(io.BufferedReader):
    """A binary file whose reads never ask for more than is left in the file.

    A damaged value length in a DICOM file (say 0xFFFFFFF0) makes a parser call ``read(4 GB)``;
    a plain file object allocates the buffer it is asked for before it reads, so this one cuts
    each request to the bytes that remain.
    """

    def __init__(self, fd: int) -> None:
        super().__init__(io.FileIO(fd, "rb", closefd=True))
        self._end = os.fstat(fd).st_size

    def read(self, size: int | None = -1, /) -> bytes:
        if size is not None and size > 0:
            size = min(size, max(0, self._end - self.tell()))
            if size == 0:
                return b""
        return super().read(size)


def still_same(
    root: Path, path: Path, size: int, mtime_ns: int, ids: tuple[int, int] | None
) -> bool:
    """Whether ``path`` is still the regular file seen: same size and mtime, and (dev, inode)
    when known. Links and anything outside ``root`` are never the same."""
    parts = _parts(root, path)
    if parts is None:
        return False
    try:
        with _parent_fd(root, parts) as dfd:
            st = os.stat(parts[-1], dir_fd=dfd, follow_symlinks=False)
    except OSError:
        return False
    if not stat_mod.S_ISREG(st.st_mode) or (st.st_size, st.st_mtime_ns) != (size, mtime_ns):
        return False
    return ids is None or ids == (st.st_dev, st.st_ino)


def unlink_if_same(
    root: Path, path: Path, size: int, mtime_ns: int, ids: tuple[int, int] | None
) -> bool:
    """Delete ``path`` only if it is still the file seen (see :func:`still_same`).

    Returns whether it was deleted; a file already gone counts as deleted.
    """
    parts = _parts(root, path)
    if parts is None:
        return False
    try:
        with _parent_fd(root, parts) as dfd:
            try:
                st = os.stat(parts[-1], dir_fd=dfd, follow_symlinks=False)
            except FileNotFoundError:
                return True
            same = stat_mod.S_ISREG(st.st_mode) and (st.st_size, st.st_mtime_ns) == (size, mtime_ns)
            if not same or (ids is not None and ids != (st.st_dev, st.st_ino)):
                return False
            os.unlink(parts[-1], dir_fd=dfd)
    except OSError as exc:
        log.warning("could not delete %s: %s", path, exc.strerror or exc)
        return False
    return True


def move_if_same(
    root: Path, path: Path, dst: Path, size: int, mtime_ns: int, ids: tuple[int, int] | None
) -> bool:
    """Move ``path`` to ``dst`` only if it is still the file seen (see :func:`still_same`).

    The rename goes through the parent folder's descriptor, so no link on the way is followed;
    across file systems the open file is copied (data, mode, times), then the source is deleted
    if it is still the same. Returns whether it moved; raises ``OSError`` from the target side.
    """
    parts = _parts(root, path)
    if parts is None:
        return False
    with _parent_fd(root, parts) as dfd:
        try:
            st = os.stat(parts[-1], dir_fd=dfd, follow_symlinks=False)
        except FileNotFoundError:
            return False
        same = stat_mod.S_ISREG(st.st_mode) and (st.st_size, st.st_mtime_ns) == (size, mtime_ns)
        if not same or (ids is not None and ids != (st.st_dev, st.st_ino)):
            return False
        try:
            os.rename(parts[-1], dst, src_dir_fd=dfd)
            return True
        except OSError as exc:
            if exc.errno != errno.EXDEV:
                raise
        seen = Seen.of(path, st)
        fd = os.open(parts[-1], _FILE_FLAGS, dir_fd=dfd)
        with os.fdopen(fd, "rb") as src:
            if not seen.same(os.fstat(src.fileno())):
                return False
            with open(dst, "xb") as out:
                shutil.copyfileobj(src, out, 1 << 20)
            os.chmod(dst, stat_mod.S_IMODE(st.st_mode))
            os.utime(dst, ns=(st.st_atime_ns, st.st_mtime_ns))
    return unlink_if_same(root, path, size, mtime_ns, ids)
