"""Retention: with ``keep_versions: N`` (N > 0), older model versions' result folders go.

Per series revision, the result folders of the N most recent model versions are kept (most
recent = the latest result of each version, by when it was recorded), and always:

- the current result;
- any result whose latest QC mark is ``accepted``;
- every corrected mask (they live in ``corrections/`` beside the version folders, not inside).

A folder is first renamed to ``.pruning-<name>`` (it disappears from its place in one step),
then deleted; leftovers of an interrupted run are deleted next time. The ledger rows stay (the
results table records what was computed); exports of a pruned version report the ledger's
figures and say the folder is missing. ``keep_versions: 0`` keeps everything.
"""

from __future__ import annotations

import logging
import os
import shutil
from collections.abc import Sequence
from pathlib import Path

from flairwatch.ledger.queries import ResultRecord, results_of_series
from flairwatch.ledger.store import Ledger

log = logging.getLogger(__name__)

PRUNING_PREFIX = ".pruning-"


def plan_prune(records: Sequence[ResultRecord], keep: int) -> list[ResultRecord]:
    """Results of one series revision whose folders may go (``keep`` > 0 versions kept)."""
    if keep <= 0:
        return []
    newest: dict[tuple[str, str], int] = {}
    for r in records:
        version = (r.model_name, r.model_version)
        newest[version] = max(newest.get(version, 0), r.result_id)
    ranked = sorted(newest, key=lambda v: newest[v], reverse=True)
    kept_versions = set(ranked[:keep])
    return [
        r
        for r in records
        if (r.model_name, r.model_version) not in kept_versions
        and not r.current
        and r.qc_mark != "accepted"
    ]


def _remove(folder: Path) -> bool:
    if not folder.is_dir() or folder.is_symlink():
        return False
    doomed = folder.with_name(f"{PRUNING_PREFIX}{folder.name}")
    os.rename(folder, doomed)
    shutil.rmtree(doomed)
    return True


def prune_versions(ledger: Ledger, keep: int, *, in_use: Sequence[str] = ()) -> list[Path]:
    """Delete the result folders :func:`plan_prune` allows; return the folders removed.

    ``in_use`` lists result folders that must stay whatever the plan says (e.g. the one a
    running job is adopting).
    """
    if keep <= 0:
        return []
    removed: list[Path] = []
    protected = {str(Path(p)) for p in in_use}
    series_ids = [int(r[0]) for r in ledger.query("SELECT DISTINCT series_id FROM results")]
    for sid in series_ids:
        records = results_of_series(ledger, sid)
        doomed = plan_prune(records, keep)
        # a folder recorded twice (adopted again) stays if any of its rows is kept
        keep_paths = {str(Path(r.result_path)) for r in records if r not in doomed}
        for r in doomed:
            folder = Path(r.result_path)
            if str(folder) in protected or str(folder) in keep_paths:
                continue
            for leftover in folder.parent.glob(f"{PRUNING_PREFIX}*"):
                shutil.rmtree(leftover, ignore_errors=True)
            if _remove(folder):
                removed.append(folder)
                log.info("pruned %s (keep_versions %d)", folder, keep)
    return removed
