"""The one converter between a series' own grid and the model grid (inference and training alike).

Model grid: the series is first reoriented by axis permutation and flips only (lossless) so that
its axes run towards patient Left, Posterior, Superior (i, j, k); each axial slice is then resampled
in-plane to the manifest's spacing and shape, centred on the slice. The slice stack is kept, so the
way back is exact along k, and in-plane it is linear interpolation. Parts of a very large head that
fall outside the model's field of view get probability 0 on the way back.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from nibabel.orientations import apply_orientation, io_orientation, ornt_transform
from scipy import ndimage

from flairwatch.engine.manifest import GridSpec, Normalisation
from flairwatch.volume import Volume

_IDENTITY_ORNT = np.array([[0, 1], [1, 1], [2, 1]], dtype=np.float64)


@dataclass(frozen=True, eq=False)
class GridMap:
    """How one series' grid maps onto the model grid; enough to come back exactly.

    ``ornt`` is the nibabel orientation of the series axes relative to LPS; ``reoriented_shape``
    and ``reoriented_spacing_mm`` describe the series after reorientation (i, j, k = L, P, S).
    """

    series_shape: tuple[int, int, int]
    ornt: np.ndarray
    reoriented_shape: tuple[int, int, int]
    reoriented_spacing_mm: tuple[float, float, float]
    grid: GridSpec

    @property
    def n_slices(self) -> int:
        return self.reoriented_shape[2]


def plan(volume: Volume, grid: GridSpec) -> GridMap:
    """Work out the reorientation and in-plane resampling for ``volume`` (no voxel work)."""
    ornt = io_orientation(volume.affine_lps)
    shape = volume.shape
    order = [int(a) for a in ornt[:, 0]]
    new_shape = [0, 0, 0]
    new_spacing = [0.0, 0.0, 0.0]
    for src_axis, world_axis in enumerate(order):
        new_shape[world_axis] = shape[src_axis]
        new_spacing[world_axis] = volume.spacing[src_axis]
    return GridMap(
        series_shape=shape,
        ornt=ornt,
        reoriented_shape=(new_shape[0], new_shape[1], new_shape[2]),
        reoriented_spacing_mm=(new_spacing[0], new_spacing[1], new_spacing[2]),
        grid=grid,
    )


def _inplane_params(gmap: GridMap, forward: bool) -> tuple[np.ndarray, np.ndarray]:
    """Diagonal matrix and offset for ``ndimage.affine_transform`` (output index -> input index)."""
    (si, sj, _), (ti, tj) = gmap.reoriented_spacing_mm, gmap.grid.spacing_mm
    # whole-voxel centres, so that equal spacings map voxel onto voxel without interpolation
    src_c = np.array(gmap.reoriented_shape[:2], dtype=np.float64) // 2
    dst_c = np.array(gmap.grid.shape, dtype=np.float64) // 2
    scale = np.array([ti / si, tj / sj])
    if forward:  # model pixel -> reoriented series index
        return np.r_[scale, 1.0], np.r_[src_c - dst_c * scale, 0.0]
    return np.r_[1 / scale, 1.0], np.r_[dst_c - src_c / scale, 0.0]


def _reorient(data: np.ndarray, gmap: GridMap) -> np.ndarray:
    return np.asarray(apply_orientation(data, gmap.ornt))


def _unreorient(data: np.ndarray, gmap: GridMap) -> np.ndarray:
    back = ornt_transform(_IDENTITY_ORNT, gmap.ornt)
    return np.asarray(apply_orientation(data, back))


def normalise(data: np.ndarray, norm: Normalisation) -> np.ndarray:
    """Divide by the median of the head foreground (see :class:`Normalisation`); float32 out."""
    data = np.asarray(data, dtype=np.float32)
    ref = float(np.percentile(data, norm.reference_percentile))
    if ref <= 0:
        return np.zeros_like(data)
    fg = data[data > norm.foreground_fraction * ref]
    scale = float(np.median(fg)) if fg.size else ref
    return data / np.float32(scale)


def resample_to_model(data: np.ndarray, gmap: GridMap, *, order: int = 1) -> np.ndarray:
    """Series-grid array (I, J, K) -> model-grid array (K, H, W), H along P, W along L.

    In-plane downsampling is preceded by a Gaussian anti-aliasing filter, sigma = (factor - 1) / 2
    voxels, as is common practice for image decimation; labels (``order=0``) are not filtered.
    """
    r = _reorient(np.asarray(data, dtype=np.float32), gmap)
    matrix, offset = _inplane_params(gmap, forward=True)
    if order > 0:
        sigma = [max(0.0, (f - 1) / 2) for f in matrix[:2]] + [0.0]
        if max(sigma) > 0:
            r = ndimage.gaussian_filter(r, sigma=sigma, mode="nearest")
    out = ndimage.affine_transform(
        r,
        matrix,
        offset=offset,
        output_shape=(*gmap.grid.shape, gmap.n_slices),
        order=order,
        mode="constant",
        cval=0.0,
        prefilter=False,
    )
    return np.ascontiguousarray(out.transpose(2, 1, 0))


def resample_to_series(model_data: np.ndarray, gmap: GridMap) -> np.ndarray:
    """Model-grid array (K, H, W) -> series-grid array (I, J, K), linear in-plane, exact along k."""
    w_h_k = np.asarray(model_data, dtype=np.float32).transpose(2, 1, 0)
    matrix, offset = _inplane_params(gmap, forward=False)
    r = ndimage.affine_transform(
        w_h_k,
        matrix,
        offset=offset,
        output_shape=gmap.reoriented_shape,
        order=1,
        mode="constant",
        cval=0.0,
        prefilter=False,
    )
    return _unreorient(r, gmap)


def stack_channels(slices: np.ndarray, channels: int) -> np.ndarray:
    """(K, H, W) -> (K, C, H, W): each slice with its neighbours, edge slices repeated."""
    half = channels // 2
    k = slices.shape[0]
    idx = np.clip(np.arange(k)[:, None] + np.arange(-half, half + 1)[None, :], 0, k - 1)
    return np.ascontiguousarray(slices[idx])


def to_model_input(
    volume: Volume, grid: GridSpec, norm: Normalisation, channels: int
) -> tuple[np.ndarray, GridMap]:
    """Volume on its own grid -> model input (K, C, H, W) float32 and the map back."""
    gmap = plan(volume, grid)
    slices = resample_to_model(normalise(volume.data, norm), gmap)
    return stack_channels(slices, channels), gmap
