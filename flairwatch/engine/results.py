"""Result folders on disk: atomic build-and-rename, adoption after a crash, the current pointer.

Layout (docs/architecture.md)::

    <results>/<subject-key>/<study-key>/<series-key>/<model-name>-<model-version>/

A version folder is built under a temporary name beside its final place (``.building-*``),
every file is fsynced, and the folder is renamed into place; ``summary.json`` is written last,
so its presence marks a complete folder. Nothing is ever overwritten.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import shutil
import uuid
from collections.abc import Callable
from pathlib import Path
from typing import Any

log = logging.getLogger(__name__)

SUMMARY_FILE = "summary.json"
CURRENT_FILE = "current_version.txt"
TEMP_PREFIX = ".building-"
ASIDE_PREFIX = ".replaced-"  # a complete folder of other inputs or settings, kept for audit
# results are health data: group may read, others nothing
FILE_MODE = 0o640
DIR_MODE = 0o750


def fsync_path(path: Path) -> None:
    """fsync(2) a file or a folder (a folder: so that a rename into it survives a crash)."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_atomic(path: Path, data: bytes) -> None:
    """Temp file in the same folder -> flush -> fsync -> rename -> fsync the folder."""
    tmp = path.with_name(f".{path.name}.{uuid.uuid4().hex[:8]}.tmp")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, FILE_MODE)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise
    fsync_path(path.parent)


def is_complete(version_dir: Path) -> bool:
    return (version_dir / SUMMARY_FILE).is_file()


def read_summary(version_dir: Path) -> dict[str, Any]:
    data: dict[str, Any] = json.loads((version_dir / SUMMARY_FILE).read_text(encoding="utf-8"))
    return data


def build_version_folder(
    final: Path, fill: Callable[[Path], dict[str, Any]]
) -> tuple[Path, dict[str, Any], bool]:
    """Build ``final`` atomically; return (folder, summary, adopted).

    ``fill(tmp_dir)`` writes every output file into the empty temporary folder and returns the
    summary, which is written last. If ``final`` is already complete it is adopted untouched.
    """
    if is_complete(final):
        return final, read_summary(final), True
    parent = final.parent
    parent.mkdir(parents=True, exist_ok=True, mode=DIR_MODE)
    tmp = parent / f"{TEMP_PREFIX}{final.name}-{uuid.uuid4().hex[:8]}"
    tmp.mkdir(mode=DIR_MODE)
    try:
        summary = fill(tmp)
        (tmp / SUMMARY_FILE).write_text(
            json.dumps(summary, indent=2, sort_keys=True) + "\n", encoding="utf-8"
        )
        for item in tmp.iterdir():
            os.chmod(item, FILE_MODE)
            with open(item, "rb") as fh:
                os.fsync(fh.fileno())
        fsync_path(tmp)
        try:
            os.rename(tmp, final)
        except OSError:
            # someone (another worker, or a run before a crash) finished it first: keep theirs
            if is_complete(final):
                shutil.rmtree(tmp, ignore_errors=True)
                return final, read_summary(final), True
            raise
        fsync_path(parent)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return final, summary, False


def set_aside(version_dir: Path) -> Path:
    """Rename a complete version folder out of the way (hidden, never deleted); returns it."""
    aside = version_dir.with_name(f"{ASIDE_PREFIX}{version_dir.name}-{uuid.uuid4().hex[:8]}")
    os.rename(version_dir, aside)
    fsync_path(version_dir.parent)
    return aside


def set_current(series_dir: Path, version_name: str) -> None:
    """Point the series folder's pointer file at one version folder name."""
    write_atomic(series_dir / CURRENT_FILE, (version_name + "\n").encode("utf-8"))


def current_version(series_dir: Path) -> str | None:
    try:
        return (series_dir / CURRENT_FILE).read_text(encoding="utf-8").strip() or None
    except FileNotFoundError:
        return None


def remove_incomplete(results_root: Path) -> list[Path]:
    """Delete temporary folders left by a crash (they never hold a complete result)."""
    removed: list[Path] = []
    if not results_root.is_dir():
        return removed
    # subject / study / series / .building-*: exactly four levels down
    for tmp in results_root.glob(f"*/*/*/{TEMP_PREFIX}*"):
        if tmp.is_dir() and not tmp.is_symlink():
            shutil.rmtree(tmp, ignore_errors=True)
            removed.append(tmp)
            log.warning("removed incomplete result folder %s", tmp)
    return removed
