"""Distances between mask borders: the 95th-percentile Hausdorff distance of the metrics module.

Border voxels are foreground voxels with at least one of their 6 face neighbours in the
background (outside the array counts as background). Distances are between voxel centres in mm,
using the voxel spacing along the array axes (i, j, k) (exact for any rotated grid, not for
sheared ones). See :mod:`flairwatch.research.metrics` for where the figures are used.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import numpy.typing as npt
from scipy import ndimage
from scipy.spatial import cKDTree


def voxel_ml(spacing_mm: Sequence[float]) -> float:
    """Volume of one voxel in mL (spacing in mm); ValueError unless three positive sizes."""
    spacing = tuple(float(s) for s in spacing_mm)
    if len(spacing) != 3 or not all(math.isfinite(s) and s > 0 for s in spacing):
        raise ValueError(f"spacing_mm must be three positive sizes in mm, got {spacing_mm!r}")
    return spacing[0] * spacing[1] * spacing[2] / 1000.0


def border(mask: npt.ArrayLike) -> npt.NDArray[np.bool_]:
    """Foreground voxels with a face neighbour (6-connectivity) in background or off the array."""
    fg = np.asarray(mask) != 0
    interior = ndimage.binary_erosion(fg, structure=ndimage.generate_binary_structure(3, 1))
    return fg & ~interior


def directed_border_distances(
    a: npt.ArrayLike, b: npt.ArrayLike, spacing_mm: Sequence[float]
) -> npt.NDArray[np.float64]:
    """Distances in mm from each border voxel of ``a`` to the nearest border voxel of ``b``.

    Nearest neighbours come from a k-d tree over the border voxel centres scaled by the spacing
    (a distance transform of the whole grid is far slower on full-size volumes). Empty when ``a``
    is empty; raises ValueError when ``b`` is empty.
    """
    voxel_ml(spacing_mm)  # validates the spacing
    scale = np.asarray(spacing_mm, dtype=np.float64)
    points_b = np.argwhere(border(b)) * scale
    if points_b.size == 0:
        raise ValueError("the second mask is empty: no distance is defined")
    points_a = np.argwhere(border(a)) * scale
    if points_a.size == 0:
        return np.zeros(0)
    distance, _ = cKDTree(points_b).query(points_a)
    return np.asarray(distance, dtype=np.float64)


def percentile_hausdorff(
    a: npt.ArrayLike, b: npt.ArrayLike, spacing_mm: Sequence[float], percentile: float = 95.0
) -> float:
    """Symmetric percentile Hausdorff distance between mask borders, in mm.

    The larger of the two directed ``percentile``-th percentiles (numpy's linear interpolation);
    ``percentile=100`` gives the classic Hausdorff distance between the borders. NaN when either
    mask is empty.
    """
    if not (np.any(np.asarray(a)) and np.any(np.asarray(b))):
        return math.nan
    ab = directed_border_distances(a, b, spacing_mm)
    ba = directed_border_distances(b, a, spacing_mm)
    return float(max(np.percentile(ab, percentile), np.percentile(ba, percentile)))


def hd95(a: npt.ArrayLike, b: npt.ArrayLike, spacing_mm: Sequence[float]) -> float:
    """95th-percentile Hausdorff distance in mm (module docstring); NaN when either is empty."""
    return percentile_hausdorff(a, b, spacing_mm, 95.0)
