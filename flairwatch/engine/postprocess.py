"""Post-processing: probability map -> binary WMH mask and a table of lesions.

Pure functions over arrays. Arrays use the axis order of :mod:`flairwatch.volume`, (i, j, k), and
``affine_lps`` maps voxel indices (i, j, k, 1) to patient LPS coordinates in mm. Sizes are in mm^3
(never voxels), totals in mL (1 mL = 1000 mm^3).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy import ndimage

from flairwatch.errors import ConfigInvalid, StageFailed

logger = logging.getLogger(__name__)

# Neighbourhood size -> rank passed to generate_binary_structure(3, rank):
# faces only (6), faces + edges (18), faces + edges + corners (26).
_RANK_FOR_CONNECTIVITY = {6: 1, 18: 2, 26: 3}

# Columns of the per-lesion CSV, in order (units in the names; LPS = patient Left, Posterior,
# Superior). Also the header of an empty table.
LESION_COLUMNS: tuple[str, ...] = (
    "lesion",
    "voxels",
    "volume_mm3",
    "volume_ml",
    "centroid_x_lps_mm",
    "centroid_y_lps_mm",
    "centroid_z_lps_mm",
    "max_probability",
    "mean_probability",
    "periventricular_fraction",
    "location",
)

# Relative slack when comparing a component's volume with the minimum size: a lesion of exactly
# the minimum volume must not be dropped because voxel-count x voxel-volume rounds a hair low.
_SIZE_RTOL = 1e-9


@dataclass(frozen=True)
class Lesion:
    """One kept 3-D connected component.

    Attributes
    ----------
    label : int
        1-based number in the returned mask's lesion order (1 = largest).
    voxels : int
        Number of voxels.
    volume_mm3 : float
        ``voxels`` x voxel volume, in mm^3.
    centroid_lps_mm : tuple of float
        Mean of the voxel centres in patient LPS coordinates, mm.
    max_probability, mean_probability : float
        Of the probability map over the lesion's voxels.
    """

    label: int
    voxels: int
    volume_mm3: float
    centroid_lps_mm: tuple[float, float, float]
    max_probability: float
    mean_probability: float


@dataclass(frozen=True, eq=False)
class LesionResult:
    """Outcome of :func:`threshold_and_clean`.

    Attributes
    ----------
    mask : ndarray of uint8, shape (I, J, K)
        1 inside kept lesions, 0 elsewhere; same grid as the probability map.
    lesions : tuple of Lesion
        Kept lesions, largest first.
    total_volume_ml : float
        Sum of kept lesion volumes, mL.
    voxel_volume_mm3 : float
        |det| of the affine's 3x3 part, mm^3 (exact for oblique grids).
    removed_count : int
        Components dropped for being smaller than the minimum size.
    removed_volume_mm3 : float
        Their total volume, mm^3.
    labels : ndarray of int32, shape (I, J, K), optional
        Lesion number of each voxel (0 = none), numbered as ``lesions``.
    """

    mask: np.ndarray
    lesions: tuple[Lesion, ...]
    total_volume_ml: float
    voxel_volume_mm3: float
    removed_count: int
    removed_volume_mm3: float
    labels: np.ndarray | None = None


def structure_for(connectivity: int) -> npt.NDArray[np.bool_]:
    """Return the 3x3x3 neighbourhood for 6-, 18- or 26-connectivity.

    Raises
    ------
    ConfigInvalid
        If ``connectivity`` is not 6, 18 or 26.
    """
    rank = _RANK_FOR_CONNECTIVITY.get(connectivity) if isinstance(connectivity, int) else None
    if rank is None:
        raise ConfigInvalid(
            f"connectivity must be 6, 18 or 26 (got {connectivity!r}); "
            "set `connectivity` to one of these"
        )
    return ndimage.generate_binary_structure(3, rank)


def connected_components(
    mask: npt.ArrayLike, connectivity: int = 26
) -> tuple[npt.NDArray[np.int32], int]:
    """Label the 3-D connected components of a binary mask.

    Parameters
    ----------
    mask : array_like, shape (I, J, K)
        Non-zero voxels are foreground.
    connectivity : {6, 18, 26}
        Voxels sharing a face (6), a face or edge (18), or a face, edge or corner (26) connect.

    Returns
    -------
    labels : ndarray of int32, shape (I, J, K)
        0 for background, 1..n for components in scan order.
    n : int
        Number of components.
    """
    structure = structure_for(connectivity)
    labels = np.zeros(np.shape(mask), dtype=np.int32)
    n = ndimage.label(np.asarray(mask) != 0, structure=structure, output=labels)
    return labels, int(n)


def voxel_volume_mm3(affine_lps: npt.ArrayLike) -> float:
    """Volume of one voxel in mm^3: |det| of the affine's 3x3 part (any orientation or shear)."""
    affine = np.asarray(affine_lps, dtype=np.float64)
    if affine.shape != (4, 4) or not np.all(np.isfinite(affine)):
        raise StageFailed("affine must be a finite 4x4 matrix; check the series geometry")
    volume = float(abs(np.linalg.det(affine[:3, :3])))
    if volume <= 0.0:
        raise StageFailed("affine is singular (zero voxel volume); check the series geometry")
    return volume


def at_least(volume_mm3: npt.ArrayLike, minimum_mm3: float) -> npt.NDArray[np.bool_]:
    """True where ``volume_mm3 >= minimum_mm3``, tolerant of floating-point rounding."""
    return np.asarray(volume_mm3, dtype=np.float64) >= minimum_mm3 * (1.0 - _SIZE_RTOL)


def _check_settings(threshold: float, min_lesion_mm3: float) -> None:
    if not (math.isfinite(threshold) and 0.0 < threshold <= 1.0):
        raise ConfigInvalid(
            f"threshold must be a number in (0, 1] (got {threshold!r}); "
            "set `threshold` or --threshold"
        )
    if not (math.isfinite(min_lesion_mm3) and min_lesion_mm3 >= 0.0):
        raise ConfigInvalid(
            f"min_lesion_mm3 must be a number >= 0 in mm^3 (got {min_lesion_mm3!r}); "
            "set `min_lesion_mm3`"
        )


def bounding_box(mask: np.ndarray) -> tuple[slice, ...]:
    """Slices of the smallest box holding every non-zero voxel (empty slices for an empty mask)."""
    m = np.asarray(mask) != 0
    box = []
    for axis in range(m.ndim):
        hit = np.flatnonzero(m.any(axis=tuple(a for a in range(m.ndim) if a != axis)))
        box.append(slice(int(hit[0]), int(hit[-1]) + 1) if hit.size else slice(0, 0))
    return tuple(box)


def threshold_and_clean(
    probability: np.ndarray,
    affine_lps: np.ndarray,
    *,
    threshold: float,
    min_lesion_mm3: float,
    connectivity: int = 26,
    restrict_to: np.ndarray | None = None,
) -> LesionResult:
    """Threshold a WMH probability map, keep lesions of at least a minimum volume.

    Parameters
    ----------
    probability : ndarray, shape (I, J, K)
        WMH probability 0..1 on the series grid; NaN counts as background.
    affine_lps : ndarray, shape (4, 4)
        Voxel (i, j, k, 1) to patient LPS mm.
    threshold : float
        Voxels with ``probability >= threshold`` are lesion candidates; 0 < threshold <= 1.
    min_lesion_mm3 : float
        Components with a volume below this, in mm^3, are dropped (equal is kept).
    connectivity : {6, 18, 26}
        Neighbourhood for 3-D connected components.
    restrict_to : ndarray of bool, shape (I, J, K), optional
        Only voxels inside this mask (e.g. intracranial) can be lesion.

    Returns
    -------
    LesionResult
        Mask, lesions numbered by decreasing volume (ties in scan order), totals.

    Raises
    ------
    ConfigInvalid
        Bad threshold, minimum size or connectivity.
    StageFailed
        Shapes that disagree or a singular affine.
    """
    _check_settings(threshold, min_lesion_mm3)
    structure_for(connectivity)  # fail on a bad setting before any work
    prob = np.asarray(probability)
    if prob.ndim != 3:
        raise StageFailed(
            f"probability map must be 3-D, got shape {prob.shape}; report this as a bug"
        )
    voxel_mm3 = voxel_volume_mm3(affine_lps)
    affine = np.asarray(affine_lps, dtype=np.float64)

    candidates = prob >= threshold  # NaN compares False
    if restrict_to is not None:
        if np.shape(restrict_to) != prob.shape:
            raise StageFailed(
                f"restriction mask shape {np.shape(restrict_to)} differs from the probability map "
                f"{prob.shape}; report this as a bug"
            )
        candidates &= np.asarray(restrict_to) != 0

    # Work inside the candidates' bounding box: labelling visits every voxel it is given, and
    # lesions fill a small part of the volume. Scan order inside the box is the full array's, so
    # the numbering (and everything else) is the same as on the whole array.
    box = bounding_box(candidates)
    labels_box, n = connected_components(candidates[box], connectivity)
    counts = np.bincount(labels_box.ravel(), minlength=n + 1)[1:]
    volumes = counts * voxel_mm3
    keep = at_least(volumes, min_lesion_mm3)
    # Largest first; stable sort keeps scan order among equal sizes, so numbering is reproducible.
    order = np.argsort(-counts, kind="stable")
    kept_old = order[keep[order]] + 1  # old labels of kept components, largest first

    relabel = np.zeros(n + 1, dtype=np.int32)
    relabel[kept_old] = np.arange(1, kept_old.size + 1, dtype=np.int32)
    new_labels = np.zeros(prob.shape, dtype=np.int32)
    new_labels[box] = relabel[labels_box]
    mask = np.zeros(prob.shape, dtype=np.uint8)
    mask[box] = new_labels[box] > 0

    lesions = _describe(new_labels, prob, affine, int(kept_old.size), voxel_mm3, box)
    removed = ~keep
    result = LesionResult(
        mask=mask,
        lesions=lesions,
        total_volume_ml=float(counts[keep].sum()) * voxel_mm3 / 1000.0,
        voxel_volume_mm3=voxel_mm3,
        removed_count=int(removed.sum()),
        removed_volume_mm3=float(counts[removed].sum()) * voxel_mm3,
        labels=new_labels,
    )
    logger.debug(
        "kept %d lesions (%.3f mL), removed %d below %.1f mm^3",
        len(lesions),
        result.total_volume_ml,
        result.removed_count,
        min_lesion_mm3,
    )
    return result


def _describe(
    labels: npt.NDArray[np.int32],
    prob: np.ndarray,
    affine: npt.NDArray[np.float64],
    n: int,
    voxel_mm3: float,
    box: tuple[slice, ...] | None = None,
) -> tuple[Lesion, ...]:
    """Per-lesion statistics from labels 1..n, using only the foreground voxels.

    ``box`` (slices) may say where all the labelled voxels lie, so only that part is scanned.
    """
    if n == 0:
        return ()
    box = box if box is not None else tuple(slice(0, s) for s in labels.shape)
    idx = tuple(axis + sl.start for axis, sl in zip(np.nonzero(labels[box]), box, strict=True))
    lab = labels[idx]
    values = prob[idx].astype(np.float64)
    counts = np.bincount(lab, minlength=n + 1)[1:]
    centroid_ijk = np.stack(
        [np.bincount(lab, weights=axis, minlength=n + 1)[1:] / counts for axis in idx], axis=1
    )
    centroid_lps = centroid_ijk @ affine[:3, :3].T + affine[:3, 3]
    sums = np.bincount(lab, weights=values, minlength=n + 1)[1:]
    maxima = np.full(n + 1, -np.inf)
    np.maximum.at(maxima, lab, values)
    return tuple(
        Lesion(
            label=i + 1,
            voxels=int(counts[i]),
            volume_mm3=float(counts[i]) * voxel_mm3,
            centroid_lps_mm=(
                float(centroid_lps[i, 0]),
                float(centroid_lps[i, 1]),
                float(centroid_lps[i, 2]),
            ),
            max_probability=float(maxima[i + 1]),
            mean_probability=float(sums[i] / counts[i]),
        )
        for i in range(n)
    )


def lesion_rows(
    result: LesionResult, periventricular_fraction: Sequence[float] | None = None
) -> list[dict[str, object]]:
    """Rows for the per-lesion CSV, one dict per lesion, largest first.

    Keys are :data:`LESION_COLUMNS` in order (units in the names): ``lesion``, ``voxels``,
    ``volume_mm3``, ``volume_ml``, ``centroid_x_lps_mm``, ``centroid_y_lps_mm``,
    ``centroid_z_lps_mm`` (patient LPS: x to the Left, y to Posterior, z to Superior),
    ``max_probability``, ``mean_probability``, ``periventricular_fraction`` (share of the
    lesion's voxels near the ventricles) and ``location`` ("periventricular" when that share is at
    least one half, else "deep"). Without ``periventricular_fraction`` (a model with no ventricle
    output) the last two are empty strings. Volumes are rounded to 0.001 mm^3 / 0.000001 mL,
    coordinates to 0.01 mm, probabilities and fractions to 0.0001.
    """
    rows: list[dict[str, object]] = []
    for n, lesion in enumerate(result.lesions):
        x, y, z = lesion.centroid_lps_mm
        share: object = ""
        location = ""
        if periventricular_fraction is not None:
            fraction = float(periventricular_fraction[n])
            share = round(fraction, 4)
            location = "periventricular" if fraction >= 0.5 else "deep"
        values = (
            lesion.label,
            lesion.voxels,
            round(lesion.volume_mm3, 3),
            round(lesion.volume_mm3 / 1000.0, 6),
            round(x, 2),
            round(y, 2),
            round(z, 2),
            round(lesion.max_probability, 4),
            round(lesion.mean_probability, 4),
            share,
            location,
        )
        rows.append(dict(zip(LESION_COLUMNS, values, strict=True)))
    return rows
