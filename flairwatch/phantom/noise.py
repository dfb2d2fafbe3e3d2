"""Cheap smooth random fields and separable linear resizing for the phantom generator.

Smooth noise is drawn on a coarse grid, blurred there and resized linearly to the full grid, so
its cost grows with the output size only through one linear interpolation per axis.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt
from scipy import ndimage as ndi

FloatArray = npt.NDArray[np.float32]


def lerp_axis(a: FloatArray, coords: npt.NDArray[np.float64], axis: int) -> FloatArray:
    """Linear interpolation of ``a`` along one axis at fractional indices ``coords`` (clamped)."""
    n = a.shape[axis]
    c = np.clip(coords, 0.0, n - 1.0)
    i0 = np.floor(c).astype(np.intp)
    i0 = np.minimum(i0, max(n - 2, 0))
    i1 = np.minimum(i0 + 1, n - 1)
    w = (c - i0).astype(np.float32)
    shape = [1] * a.ndim
    shape[axis] = w.size
    w = w.reshape(shape)
    lo = np.take(a, i0, axis=axis)
    hi = np.take(a, i1, axis=axis)
    return np.asarray(lo + (hi - lo) * w, dtype=np.float32)


def resize_linear(a: FloatArray, shape: tuple[int, ...]) -> FloatArray:
    """Resize by separable linear interpolation, voxel centres aligned (grid-mode) per axis."""
    out = a
    for axis, n_out in enumerate(shape):
        n_in = a.shape[axis]
        if n_in == n_out:
            continue
        coords = (np.arange(n_out, dtype=np.float64) + 0.5) * (n_in / n_out) - 0.5
        out = lerp_axis(out, coords, axis)
    return out


def upsample_inplane(a: FloatArray, factor: float, shape_ij: tuple[int, int]) -> FloatArray:
    """Undo an in-plane coarsening by ``factor`` (>= 1, need not be an integer).

    ``a`` has axes (i, j, k); intermediate pixel u' lies at output index f u', so output pixel
    u reads the intermediate grid at u / f.
    """
    if factor == 1 and a.shape[:2] == shape_ij:
        return a
    out = a
    for axis, n_out in enumerate(shape_ij):
        coords = np.arange(n_out, dtype=np.float64) / factor
        out = lerp_axis(out, coords, axis)
    return out


def smooth_noise(shape: tuple[int, ...], scale_vox: float, rng: np.random.Generator) -> FloatArray:
    """Zero-mean, unit-variance random field with features about ``scale_vox`` voxels wide."""
    step = max(scale_vox / 2.0, 1.0)
    coarse_shape = tuple(max(int(np.ceil(n / step)) + 2, 3) for n in shape)
    coarse = rng.standard_normal(coarse_shape, dtype=np.float32)
    coarse = ndi.gaussian_filter(coarse, 1.0, mode="wrap")
    coarse -= coarse.mean()
    sd = float(coarse.std())
    coarse /= sd if sd > 0 else 1.0
    return resize_linear(coarse, shape)
