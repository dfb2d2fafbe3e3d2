"""Start-up reconciliation: make the results folder, the inbox and the ledger agree after a crash.

The daemon can die between any two of its writes. What each gap leaves, and what start-up does:

- a half-built result folder (``.building-*``): removed, unless a live re-run is building it;
- a series folder whose pointer file does not name the ledger's current result (died between
  recording the result and writing the pointer): the pointer is rewritten and the gallery page of
  the study refreshed;
- inbox files of a done or skipped series still present with ``delete_inbox_files`` (died
  between recording the outcome and deleting): deleted now;
- running jobs of a dead owner: requeued by the ledger
  (:meth:`flairwatch.ledger.repair.RepairTables.requeue_orphans`).
"""

from __future__ import annotations

import logging
import shutil
from pathlib import Path

from flairwatch.config import Config
from flairwatch.daemon.inputs import InboxFiles
from flairwatch.engine import results
from flairwatch.ledger.store import Ledger
from flairwatch.research.gallery import GALLERY_FOLDER, refresh_study

log = logging.getLogger("flairwatch.daemon.watch")


def fix_pointers(ledger: Ledger, cfg: Config, now: float) -> list[int]:
    """Point every series folder at the ledger's current result; returns the series fixed."""
    assert cfg.results is not None
    fixed = []
    for series_id, path in ledger.current_results():
        folder = Path(path)
        if not results.is_complete(folder):
            continue  # removed by hand or by retention: nothing to point at
        if results.current_version(folder.parent) != folder.name:
            results.set_current(folder.parent, folder.name)
            refresh_study(ledger, cfg.results / GALLERY_FOLDER, series_id,
                          connectivity=cfg.connectivity, longitudinal=cfg.longitudinal,
                          now=now)  # fmt: skip
            fixed.append(series_id)
    if fixed:
        log.warning("%d series folder(s) pointed at an older result; now at the current one",
                    len(fixed))  # fmt: skip
    return fixed


def finish_deletions(ledger: Ledger, cfg: Config, files: InboxFiles) -> list[int]:
    """With ``delete_inbox_files``: delete inputs that a crash left after their series ended."""
    if not cfg.delete_inbox_files:
        return []
    left = ledger.ended_with_inputs()
    for series_id in left:
        files.delete(series_id)
    if left:
        log.info("deleted the inbox files of %d ended series (left by a crash)", len(left))
    return left


def remove_half_built(ledger: Ledger, cfg: Config) -> list[Path]:
    """Delete temporary result folders left by a crash; never one that a live re-run builds."""
    assert cfg.results is not None
    busy = {cfg.results / a / b / c for a, b, c in ledger.busy_elsewhere()}
    removed = []
    # subject / study / series / .building-*: exactly four levels down
    for tmp in cfg.results.glob(f"*/*/*/{results.TEMP_PREFIX}*"):
        if tmp.parent in busy or not tmp.is_dir() or tmp.is_symlink():
            continue
        shutil.rmtree(tmp, ignore_errors=True)
        removed.append(tmp)
        log.warning("removed incomplete result folder %s", tmp)
    return removed


def reconcile(ledger: Ledger, cfg: Config, files: InboxFiles, now: float) -> None:
    """Everything start-up repairs, in order: orphans, half-built folders, pointers, inputs."""
    # we hold the state folder's lock: every job of an earlier daemon is ours to requeue,
    # whatever its old worker's pid seems to say (a zombie, a reused pid...)
    again = ledger.requeue_orphans(now, held=())
    if again:
        log.warning("%d series were running when the daemon stopped; queued again", len(again))
    remove_half_built(ledger, cfg)  # after the requeue: only live owners' folders are kept
    fix_pointers(ledger, cfg, now)
    finish_deletions(ledger, cfg, files)
