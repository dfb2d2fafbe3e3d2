"""Periventricular and deep WMH: which lesion voxels lie near the lateral ventricles.

The rule is common practice in WMH research: a lesion voxel whose centre lies within
``distance_mm`` (10 mm by default, the ``periventricular_mm`` setting) of the ventricles counts
as periventricular, any other lesion voxel as deep. Distance is Euclidean, in mm, from the voxel
centre to the centre of the nearest ventricle voxel (0 inside the ventricle mask), using the
grid's voxel spacing along each array axis, so thick slices count at their true size.

Pure functions over arrays in the axis order of :mod:`flairwatch.volume`, (i, j, k), on a
rectangular grid with ``spacing_mm`` along (i, j, k).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy import ndimage
from scipy.spatial import cKDTree

from flairwatch.config import DEFAULT_PERIVENTRICULAR_MM

# relative slack so that a voxel exactly at the distance (e.g. 10 voxels of 1 mm) counts as near
_DISTANCE_RTOL = 1e-9


@dataclass(frozen=True, eq=False)
class VentricleSplit:
    """Lesion volume split by distance to the ventricles.

    Attributes
    ----------
    ventricle_volume_ml, periventricular_volume_ml, deep_volume_ml : float
        Ventricle mask volume, and lesion volume within / beyond ``distance_mm``, in mL.
    fraction : ndarray of float64, shape (n_lesions,)
        Per lesion (lesion 1 first), the share of its voxels that are periventricular, 0..1.
    distance_mm : float
        The distance used.
    """

    ventricle_volume_ml: float
    periventricular_volume_ml: float
    deep_volume_ml: float
    fraction: np.ndarray
    distance_mm: float


def surface_voxels(mask: npt.ArrayLike) -> npt.NDArray[np.intp]:
    """(N, 3) indices of mask voxels with at least one face neighbour outside the mask.

    For a point outside the mask the nearest mask voxel is always one of these (a voxel with all
    six face neighbours in the mask has a neighbour nearer to any outside point), so they are all
    a nearest-distance search needs.
    """
    m = np.asarray(mask) != 0
    # erode inside the mask's bounding box grown by one voxel (background, or the array's edge,
    # where erosion sees background too): the same voxels, without a pass over the whole volume
    box = []
    for axis in range(m.ndim):
        hit = np.flatnonzero(m.any(axis=tuple(a for a in range(m.ndim) if a != axis)))
        if hit.size == 0:
            return np.zeros((0, m.ndim), dtype=np.intp)
        box.append(slice(max(0, int(hit[0]) - 1), min(m.shape[axis], int(hit[-1]) + 2)))
    sub = m[tuple(box)]
    inner = ndimage.binary_erosion(sub, structure=ndimage.generate_binary_structure(3, 1))
    return np.argwhere(sub & ~inner) + np.array([sl.start for sl in box], dtype=np.intp)


def distance_to_mask_mm(
    points_ijk: npt.ArrayLike,
    mask: npt.ArrayLike,
    spacing_mm: Sequence[float],
    *,
    limit_mm: float = np.inf,
) -> npt.NDArray[np.float64]:
    """Distance in mm from each voxel in ``points_ijk`` to the nearest voxel of ``mask``.

    Parameters
    ----------
    points_ijk : array of int, shape (N, 3)
        Voxel indices (i, j, k).
    mask : ndarray, shape (I, J, K)
        Non-zero voxels are the target.
    spacing_mm : sequence of 3 floats
        Voxel spacing along (i, j, k), mm.
    limit_mm : float
        Distances beyond this may be returned as ``inf`` (faster search).

    Returns
    -------
    ndarray of float64, shape (N,)
        0 for points inside the mask; ``inf`` when the mask is empty.
    """
    pts = np.asarray(points_ijk, dtype=np.intp).reshape(-1, 3)
    m = np.asarray(mask) != 0
    out = np.full(pts.shape[0], np.inf)
    if pts.shape[0] == 0:
        return out
    surface = surface_voxels(m)
    if surface.shape[0] == 0:
        return out
    scale = np.asarray(spacing_mm, dtype=np.float64)
    tree = cKDTree(surface * scale)
    bound = limit_mm * (1.0 + 1e-6) + 1e-6 if np.isfinite(limit_mm) else np.inf
    dist, _ = tree.query(pts * scale, k=1, distance_upper_bound=bound)
    out[:] = dist
    out[m[pts[:, 0], pts[:, 1], pts[:, 2]]] = 0.0
    return out


def split_by_ventricles(
    labels: npt.NDArray[np.integer],
    n_lesions: int,
    ventricles: npt.ArrayLike,
    spacing_mm: Sequence[float],
    *,
    distance_mm: float = DEFAULT_PERIVENTRICULAR_MM,
    voxel_mm3: float | None = None,
) -> VentricleSplit:
    """Split lesion voxels into periventricular (within ``distance_mm``) and deep.

    Parameters
    ----------
    labels : ndarray of int, shape (I, J, K)
        Lesion numbers 1..n_lesions, 0 elsewhere.
    n_lesions : int
        Number of lesions.
    ventricles : ndarray, shape (I, J, K)
        Ventricle mask on the same grid (non-zero = ventricle).
    spacing_mm : sequence of 3 floats
        Voxel spacing along (i, j, k), mm.
    distance_mm : float
        The periventricular distance, mm (>= 0).
    voxel_mm3 : float, optional
        Voxel volume in mm^3 (default: the product of the spacings); pass the affine's |det| so
        the two classes add up to the lesion volume reported elsewhere.

    Returns
    -------
    VentricleSplit
        With no ventricle voxel at all, every lesion voxel is deep.
    """
    if voxel_mm3 is None:
        voxel_mm3 = float(np.prod(np.asarray(spacing_mm, dtype=np.float64)))
    voxel_ml = voxel_mm3 / 1000.0
    vent = np.asarray(ventricles) != 0
    idx = np.argwhere(labels > 0)
    dist = distance_to_mask_mm(idx, vent, spacing_mm, limit_mm=distance_mm)
    near = dist <= distance_mm * (1.0 + _DISTANCE_RTOL)
    lab = labels[idx[:, 0], idx[:, 1], idx[:, 2]]
    counts = np.bincount(lab, minlength=n_lesions + 1)[1:].astype(np.float64)
    near_counts = np.bincount(lab[near], minlength=n_lesions + 1)[1:].astype(np.float64)
    fraction = np.divide(near_counts, counts, out=np.zeros_like(counts), where=counts > 0)
    n_near = int(near.sum())
    return VentricleSplit(
        ventricle_volume_ml=float(vent.sum()) * voxel_ml,
        periventricular_volume_ml=n_near * voxel_ml,
        deep_volume_ml=(idx.shape[0] - n_near) * voxel_ml,
        fraction=fraction,
        distance_mm=float(distance_mm),
    )
