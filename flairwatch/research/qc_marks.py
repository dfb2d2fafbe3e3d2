"""``flairwatch qc``: research staff's review of results: marks, corrected masks, the gallery.

- ``qc mark SERIES-KEY accepted|rejected --note TEXT`` records a mark on the series' current
  model result (or on ``--model-version``'s result).
- ``qc correct SERIES-KEY --mask FILE.nii.gz`` attaches a corrected mask. It must lie on the
  series grid: the same shape and affine as the result's ``wmh_mask.nii.gz`` (within
  :data:`AFFINE_TOLERANCE_MM`) and hold only 0 and 1. The file is copied byte for byte into
  ``<series folder>/corrections/<UTC time>-wmh_mask.nii.gz`` (atomically, never overwriting)
  and recorded in the ledger. From then on it is the reported result of that series revision,
  also after a reprocess with another model, which is reported beside it.
- ``qc gallery`` writes the static review pages (see :mod:`flairwatch.research.gallery`).
- ``qc cases --out DIR`` writes corrected series as case folders for ``validate`` and training
  (see :mod:`flairwatch.research.qc_cases`).

Masks are read with :func:`flairwatch.intake.load.load_nifti`: array axes (i, j, k), affine in patient
LPS mm.
"""

from __future__ import annotations

import logging
import os
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from flairwatch.engine import results
from flairwatch.engine.pipeline import MASK_FILE
from flairwatch.engine.postprocess import connected_components, voxel_volume_mm3
from flairwatch.errors import ConfigInvalid, InputRejected
from flairwatch.intake.load import load_nifti
from flairwatch.ledger.queries import QC_MARKS, ResultRecord, find_result
from flairwatch.ledger.store import Ledger
from flairwatch.volume import Volume

log = logging.getLogger(__name__)

CORRECTIONS_FOLDER = "corrections"
# Editors store the affine as float32 (NIfTI sform): allow that rounding, nothing coarser.
AFFINE_TOLERANCE_MM = 1e-3


@dataclass(frozen=True)
class MaskMeasures:
    """Volume (mL) and number of connected components of a binary mask."""

    lesion_volume_ml: float
    lesion_count: int


def measure_mask(mask: np.ndarray, affine_lps: np.ndarray, connectivity: int) -> MaskMeasures:
    """Total volume in mL and lesion count of a 0/1 mask on an (i, j, k) grid.

    Every component counts, however small: a reviewer's correction is taken as drawn (no
    minimum lesion size). ``connectivity`` is 6, 18 or 26 as for automatic results.
    """
    _, n = connected_components(mask, connectivity)
    voxels = int(np.count_nonzero(mask))
    return MaskMeasures(voxels * voxel_volume_mm3(affine_lps) / 1000.0, n)


def check_on_grid(candidate: Volume, reference: Volume, label: str) -> np.ndarray:
    """Return ``candidate`` as a uint8 0/1 mask if it lies on ``reference``'s grid.

    Raises InputRejected, saying what differs, when the shape or affine (LPS, mm) differ or
    the values are not all 0 or 1.
    """
    if candidate.shape != reference.shape:
        raise InputRejected(
            f"{label}: shape {candidate.shape} differs from the series grid {reference.shape}; "
            "draw or resample the mask on the series grid (see the result's wmh_mask.nii.gz)"
        )
    gap = float(np.max(np.abs(candidate.affine_lps - reference.affine_lps)))
    if gap > AFFINE_TOLERANCE_MM:
        raise InputRejected(
            f"{label}: affine differs from the series grid by up to {gap:.4g} mm; save the mask "
            "with the geometry of the result's wmh_mask.nii.gz"
        )
    values = np.unique(candidate.data)
    if not np.all(np.isin(values, (0.0, 1.0))):
        shown = ", ".join(f"{v:g}" for v in values[:6])
        raise InputRejected(f"{label}: values {shown} found; a mask must hold only 0 and 1")
    return (candidate.data > 0.5).astype(np.uint8)


def _write_new(folder: Path, stem: str, data: bytes) -> Path:
    """Write ``data`` durably under a name not yet taken in ``folder``; never overwrite.

    The bytes go to a fsynced temporary file first, which is then hard-linked to the first free
    name (a link fails on an existing name, so two reviewers at the same second cannot clash).
    """
    folder.mkdir(parents=True, exist_ok=True, mode=results.DIR_MODE)
    tmp = folder / f".{stem}-{os.getpid()}.tmp"
    results.write_atomic(tmp, data)
    try:
        for n in range(1, 1000):
            target = folder / (f"{stem}-{MASK_FILE}" if n == 1 else f"{stem}-{n}-{MASK_FILE}")
            try:
                os.link(tmp, target)
            except FileExistsError:
                continue
            results.fsync_path(folder)
            return target
    finally:
        tmp.unlink(missing_ok=True)
    raise InputRejected(f"too many corrections named {stem} in {folder}; wait a second and retry")


def mark_result(
    ledger: Ledger,
    series_key: str,
    mark: str,
    note: str,
    *,
    by: str,
    now: float,
    model_version: str | None = None,
) -> ResultRecord:
    """Record an accepted/rejected mark on a series' current (or given version's) result."""
    if mark not in QC_MARKS:
        raise ConfigInvalid(f"mark must be one of {', '.join(QC_MARKS)}, got {mark!r}")
    rec = find_result(ledger, series_key, model_version)
    ledger.add_qc_mark(rec.result_id, mark, note, by, now)
    return rec


def attach_correction(
    ledger: Ledger,
    series_key: str,
    mask_file: Path,
    note: str,
    *,
    now: float,
    connectivity: int,
    model_version: str | None = None,
) -> tuple[Path, MaskMeasures]:
    """Check a corrected mask against the series grid, store it, record it; return where."""
    rec = find_result(ledger, series_key, model_version)
    version_dir = Path(rec.result_path)
    reference = load_nifti(version_dir / MASK_FILE)
    candidate = load_nifti(mask_file)
    mask = check_on_grid(candidate, reference, f"mask {mask_file.name}")
    stamp = time.strftime("%Y%m%dT%H%M%SZ", time.gmtime(now))
    target = _write_new(version_dir.parent / CORRECTIONS_FOLDER, stamp, mask_file.read_bytes())
    ledger.add_corrected_mask(rec.result_id, str(target), note, now)
    return target, measure_mask(mask, reference.affine_lps, connectivity)


def corrected_measures(path: Path, connectivity: int) -> MaskMeasures:
    """Measure a stored corrected mask (it was checked when it was attached)."""
    vol = load_nifti(path)
    return measure_mask((vol.data > 0.5).astype(np.uint8), vol.affine_lps, connectivity)
