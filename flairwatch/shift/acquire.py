"""Scan geometry of a shift-suite series and sampling of the head maps onto it.

The acquisition grid is a :class:`~flairwatch.volume.Volume`-style LPS affine with axes
(i, j, k) = (along a row, down a column, across slices). 2D oblique axial: rows run to the
patient's left, columns to posterior, slices to superior, the stack rotated about the left-right
axis by the tilt. 3D sagittal: rows run to posterior, columns to inferior, slices to the right,
rotated about the superior axis by the tilt. The head sits at the scanner's isocentre shifted by
``head_shift_mm``, rotated by ``head_rotation_deg`` (x, y, z) and scaled by ``head_scale``.

Each voxel averages ``ceil(thickness / 1 mm)`` samples spread over the slice thickness (a
rectangular slice profile, common practice as a first approximation); in-plane each pixel samples
its centre from the 1 mm template maps by trilinear interpolation.
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt
from scipy import ndimage as ndi

from flairwatch.phantom.anatomy import Template
from flairwatch.shift.recipes import Acquisition, Recipe

F64 = npt.NDArray[np.float64]
F32 = npt.NDArray[np.float32]
POINTS_PER_CHUNK = 1_500_000


def _rot(axis: int, deg: float) -> F64:
    c, s = math.cos(math.radians(deg)), math.sin(math.radians(deg))
    a, b = [(1, 2), (0, 2), (0, 1)][axis]
    m = np.eye(3)
    m[a, a], m[a, b], m[b, a], m[b, b] = c, -s, s, c
    return m


def grid_shape(acq: Acquisition) -> tuple[int, int, int]:
    """(I, J, K) = (columns, rows, slices) of the series."""
    rows, cols = acq.matrix
    return (cols, rows, acq.n_slices)


def series_affine(acq: Acquisition) -> F64:
    """LPS affine of the series grid (voxel (i, j, k, 1) -> mm), centred on the isocentre."""
    if acq.kind == "2d_axial":
        frame = _rot(0, acq.tilt_deg) @ np.eye(3)
    else:
        base = np.array([[0.0, 0.0, -1.0], [1.0, 0.0, 0.0], [0.0, -1.0, 0.0]])
        frame = _rot(2, acq.tilt_deg) @ base  # columns: row dir (P), column dir (I), normal (R)
    steps = np.array([acq.inplane_mm, acq.inplane_mm, acq.spacing_mm])
    aff = np.eye(4)
    aff[:3, :3] = frame * steps
    centre_index = (np.array(grid_shape(acq), dtype=np.float64) - 1.0) / 2.0
    aff[:3, 3] = -aff[:3, :3] @ centre_index
    return aff


def world_to_template(r: Recipe, tpl: Template) -> F64:
    """4x4 map from scanner LPS mm to template voxel indices for this recipe's head pose."""
    rx, ry, rz = r.head_rotation_deg
    rot = _rot(2, rz) @ _rot(1, ry) @ _rot(0, rx)
    head = np.eye(4)  # world = shift + scale * rot @ (h - centre)
    head[:3, :3] = r.head_scale * rot
    centre = np.asarray(tpl.icv_center_lps)
    head[:3, 3] = np.asarray(r.head_shift_mm) - head[:3, :3] @ centre
    return np.asarray(np.linalg.inv(tpl.affine_lps) @ np.linalg.inv(head), dtype=np.float64)


def sample_maps(maps: dict[str, F32], to_template: F64, acq: Acquisition) -> dict[str, F32]:
    """Every map sampled on the series grid with the slice profile (see module docstring)."""
    shape = grid_shape(acq)
    t = to_template @ series_affine(acq)
    n_sub = max(1, math.ceil(acq.slice_mm / 1.0 - 1e-6))
    offsets = ((np.arange(n_sub) + 0.5) / n_sub - 0.5) * acq.slice_mm / acq.spacing_mm
    per_slice = shape[0] * shape[1] * n_sub
    chunk = max(1, POINTS_PER_CHUNK // per_slice)
    out = {name: np.zeros(shape, dtype=np.float32) for name in maps}
    ii = np.arange(shape[0], dtype=np.float64).reshape(-1, 1, 1, 1)
    jj = np.arange(shape[1], dtype=np.float64).reshape(1, -1, 1, 1)
    for k0 in range(0, shape[2], chunk):
        k1 = min(shape[2], k0 + chunk)
        kk = (np.arange(k0, k1, dtype=np.float64).reshape(-1, 1) + offsets).reshape(
            1, 1, k1 - k0, n_sub
        )
        coords = np.stack([t[a, 0] * ii + t[a, 1] * jj + t[a, 2] * kk + t[a, 3] for a in range(3)])
        coords = coords.reshape(3, -1)
        for name, m in maps.items():
            v = ndi.map_coordinates(m, coords, order=1, mode="constant", cval=0.0, prefilter=False)
            out[name][:, :, k0:k1] = v.reshape(shape[0], shape[1], k1 - k0, n_sub).mean(axis=3)
    return out


def world_coordinates(acq: Acquisition, stride: int = 1) -> F64:
    """LPS mm of every ``stride``-th voxel centre, shape (3, I', J', K')."""
    aff = series_affine(acq)
    idx = np.meshgrid(
        *[np.arange(0, n, stride, dtype=np.float64) for n in grid_shape(acq)], indexing="ij"
    )
    return np.asarray(
        np.tensordot(aff[:3, :3], np.stack(idx), axes=1) + aff[:3, 3].reshape(3, 1, 1, 1)
    )
