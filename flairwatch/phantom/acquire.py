"""Scanning the phantom: acquisition grid, slice profile, deformation, bias field, Rician noise.

The acquisition grid is a :class:`~flairwatch.volume.Volume` grid in patient LPS mm. Template
maps are sampled with trilinear interpolation (``scipy.ndimage.map_coordinates``, order 1) on
an intermediate grid of about 1 mm in-plane (the template holds no finer detail) and then
upsampled to the acquired pixel size. Each 2D slice averages several planes across its
thickness, weighted by a slice profile with tails past the nominal edges.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy import ndimage as ndi

from flairwatch.phantom.noise import resize_linear, smooth_noise, upsample_inplane
from flairwatch.phantom.params import AcquisitionParams

FloatArray = npt.NDArray[np.float32]
Matrix = npt.NDArray[np.float64]
CHUNK_POINTS = 400_000  # points per map_coordinates call (keeps temporaries small)
DEFORM_SPACING_MM = 30.0  # spacing of the smooth random deformation's basis functions
PROFILE_TAIL_WEIGHT = 0.3  # signal picked up just outside the nominal slice (from memory: 2D
# spin-echo slice profiles are not rectangular; roughly 10-25 % of the signal lies in the tails)


def _rot(axis: int, deg: float) -> Matrix:
    c, s = math.cos(math.radians(deg)), math.sin(math.radians(deg))
    a, b = [(1, 2), (0, 2), (0, 1)][axis]
    r = np.eye(3)
    r[a, a], r[a, b], r[b, a], r[b, b] = c, -s, s, c
    return r


def rotation(deg_xyz: tuple[float, float, float]) -> Matrix:
    """Rotation about the x, then y, then z axis (degrees), as a 3x3 matrix."""
    return _rot(2, deg_xyz[2]) @ _rot(1, deg_xyz[1]) @ _rot(0, deg_xyz[0])


def acquisition_affine(acq: AcquisitionParams, center_lps: npt.ArrayLike) -> Matrix:
    """Voxel (i, j, k, 1) to LPS mm for the acquisition grid, centred on ``center_lps``.

    2D axial: i runs to the patient's left, j posterior, k superior (tilted by ``tilt_deg``
    about the left-right axis). 3D sagittal: i runs posterior, j inferior, k to the right.
    The slice axis is always row x column (right-handed), as DICOM readers sort slices.
    """
    r = _rot(0, acq.tilt_deg)
    if acq.kind == "2d_axial":
        e_i, e_j = r @ np.array([1.0, 0.0, 0.0]), r @ np.array([0.0, 1.0, 0.0])
    else:
        e_i, e_j = r @ np.array([0.0, 1.0, 0.0]), r @ np.array([0.0, 0.0, -1.0])
    e_k = np.cross(e_i, e_j)
    rows, cols = acq.matrix
    steps = np.array([acq.inplane_mm, acq.inplane_mm, acq.slice_spacing_mm])
    axes = np.stack([e_i, e_j, e_k], axis=1) * steps
    half = np.array([(cols - 1) / 2.0, (rows - 1) / 2.0, (acq.n_slices - 1) / 2.0])
    aff = np.eye(4)
    aff[:3, :3] = axes
    aff[:3, 3] = np.asarray(center_lps, dtype=np.float64) - axes @ half
    return aff


def slice_profile(
    acq: AcquisitionParams,
) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]]:
    """Offsets (in slice-spacing units) and weights of the planes averaged into one slice.

    2D slices: planes spread over the nominal thickness plus 0.5 mm each side, the outer ones
    down-weighted (a smooth, non-rectangular profile). 3D: one plane per slice.
    """
    if acq.kind != "2d_axial":
        return np.zeros(1), np.ones(1)
    t = acq.slice_mm
    n = max(3, math.ceil((t + 1.0) / 1.7))
    offsets = np.linspace(-(t + 1.0) / 2.0, (t + 1.0) / 2.0, n + 2)[1:-1]
    inside = np.abs(offsets) <= t / 2.0
    weights = np.where(inside, 1.0, PROFILE_TAIL_WEIGHT)
    return offsets / acq.slice_spacing_mm, weights / weights.sum()


@dataclass(frozen=True, eq=False)
class Sampler:
    """Maps intermediate-grid points (u, v, w) to template voxel indices, with deformation.

    ``matrix`` is the 4x4 affine from intermediate index to template index; ``coef`` the
    deformation coefficients (Ku, Kv, Kw, 3) in template voxels; ``centers`` per axis the basis
    centres in intermediate index units, ``widths`` their Gaussian widths.
    """

    matrix: Matrix
    coef: npt.NDArray[np.float64]
    centers: tuple[npt.NDArray[np.float64], ...]
    widths: tuple[float, float, float]

    def coarsened(self, step_uv: int, step_w: int) -> Sampler:
        """The same mapping read on a grid with every ``step``-th point (u, v and w)."""
        scale = np.diag([float(step_uv), float(step_uv), float(step_w), 1.0])
        steps = (step_uv, step_uv, step_w)
        return Sampler(
            self.matrix @ scale,
            self.coef,
            tuple(c / st for c, st in zip(self.centers, steps, strict=True)),
            (self.widths[0] / step_uv, self.widths[1] / step_uv, self.widths[2] / step_w),
        )

    def _basis(self, axis: int, x: npt.NDArray[np.float64]) -> npt.NDArray[np.float64]:
        d = (x[:, None] - self.centers[axis][None, :]) / self.widths[axis]
        return np.exp(-0.5 * d * d)

    def coords(
        self, u: npt.NDArray[np.float64], v: npt.NDArray[np.float64], w: npt.NDArray[np.float64]
    ) -> FloatArray:
        """Template indices (3, P, U, V) for planes ``w`` over the in-plane ranges ``u``, ``v``."""
        m = self.matrix
        bu = self._basis(0, u).astype(np.float32)
        bv = self._basis(1, v).astype(np.float32)
        bw = self._basis(2, w)
        cw = np.einsum("pd,abdc->cpab", bw, self.coef).astype(np.float32)
        out = bu[None, None] @ cw @ bv.T[None, None]  # displacement, (3, P, U, V)
        for c in range(3):
            out[c] += (m[c, 0] * u).astype(np.float32)[None, :, None]
            out[c] += (m[c, 1] * v).astype(np.float32)[None, None, :]
            out[c] += (m[c, 2] * w + m[c, 3]).astype(np.float32)[:, None, None]
        return out


def make_sampler(
    int_to_tpl: Matrix,
    int_shape: tuple[int, int, int],
    int_spacing: tuple[float, float, float],
    deformation_mm: float,
    tpl_voxel_mm: float,
    rng: np.random.Generator,
) -> Sampler:
    """Sampler with a smooth random deformation of about ``deformation_mm`` (standard deviation)."""
    centers: list[npt.NDArray[np.float64]] = []
    widths = []
    for n, sp in zip(int_shape, int_spacing, strict=True):
        step = DEFORM_SPACING_MM / sp
        k = math.ceil(n / step) + 3
        centers.append((np.arange(k, dtype=np.float64) - 1.0) * step)
        widths.append(step)
    shape = (len(centers[0]), len(centers[1]), len(centers[2]), 3)
    # Gaussian bases at their own width overlap ~2.5x per axis: scale so the field's SD ~ target.
    coef = rng.standard_normal(shape) * (deformation_mm / tpl_voxel_mm) / 2.5
    return Sampler(int_to_tpl, coef, tuple(centers), (widths[0], widths[1], widths[2]))


def sample_maps(
    sampler: Sampler,
    maps: list[tuple[FloatArray, tuple[slice, slice, slice] | None]],
    int_shape: tuple[int, int, int],
    box_uv: tuple[slice, slice],
    planes: npt.NDArray[np.float64],
    weights: npt.NDArray[np.float64],
) -> list[FloatArray]:
    """Sample template maps onto the intermediate grid, averaging planes with ``weights``.

    Parameters
    ----------
    maps : list of (array, box)
        Template-grid arrays; ``box`` (slices) when the array covers only that sub-box of the
        template grid (points outside it read 0), else None.
    int_shape : (int, int, int)
        Intermediate grid (U, V, K); results outside ``box_uv`` in-plane are 0.
    planes, weights : ndarray
        Plane offsets within a slice (in k units) and their profile weights.
    """
    n_u, n_v, n_k = int_shape
    u = np.arange(box_uv[0].start, box_uv[0].stop, dtype=np.float64)
    v = np.arange(box_uv[1].start, box_uv[1].stop, dtype=np.float64)
    # Consecutive points walk along v: make the template axis v follows most the contiguous
    # one (interpolation is about twice as fast as when striding across it).
    fast_axis = int(np.abs(sampler.matrix[:3, 1]).argmax())
    order = [a for a in range(3) if a != fast_axis] + [fast_axis]
    arrays = [np.ascontiguousarray(arr.transpose(order)) for arr, _ in maps]
    outs = [np.zeros((n_k, n_u, n_v), dtype=np.float32) for _ in maps]
    per_slice = u.size * v.size * planes.size
    chunk = max(1, CHUNK_POINTS // max(per_slice, 1))
    wts = weights.astype(np.float32)[None, :, None, None]
    for k0 in range(0, n_k, chunk):
        ks = np.arange(k0, min(k0 + chunk, n_k), dtype=np.float64)
        w = (ks[:, None] + planes[None, :]).ravel()
        xyz = sampler.coords(u, v, w).reshape(3, -1)[order]
        for out, arr, (_, box) in zip(outs, arrays, maps, strict=True):
            if box is None:
                vals = ndi.map_coordinates(
                    arr, xyz, order=1, mode="constant", cval=0.0, prefilter=False, output=np.float32
                )
            else:
                lo = np.array([box[a].start for a in order], dtype=np.float32)[:, None]
                hi = np.array([box[a].stop for a in order], dtype=np.float32)[:, None]
                inside = np.all((xyz >= lo - 1) & (xyz <= hi), axis=0)
                vals = np.zeros(xyz.shape[1], dtype=np.float32)
                if inside.any():
                    vals[inside] = ndi.map_coordinates(
                        arr,
                        xyz[:, inside] - lo,
                        order=1,
                        mode="constant",
                        cval=0.0,
                        prefilter=False,
                        output=np.float32,
                    )
            vals4 = vals.reshape(ks.size, planes.size, u.size, v.size)
            out[k0 : k0 + ks.size, box_uv[0], box_uv[1]] = (vals4 * wts).sum(axis=1)
    return [np.ascontiguousarray(o.transpose(1, 2, 0)) for o in outs]


def bias_field(
    shape: tuple[int, int, int],
    spacing: tuple[float, float, float],
    strength: float,
    rng: np.random.Generator,
) -> FloatArray:
    """Smooth multiplicative receive-coil bias, exp(strength * unit-variance field), ~100 mm scale.

    Drawn on a 10 mm grid and resized linearly to ``shape`` (axes i, j, k; ``spacing`` in mm).
    """
    coarse = tuple(
        max(3, math.ceil(n * sp / 10.0) + 1) for n, sp in zip(shape, spacing, strict=True)
    )
    field = resize_linear(smooth_noise(coarse, 10.0, rng), shape)
    return np.exp(np.float32(strength) * field).astype(np.float32)


def _noise_field(shape: tuple[int, ...], grain: float, rng: np.random.Generator) -> FloatArray:
    """Unit-variance Gaussian noise; with ``grain`` > 1 it is drawn on a grid ``grain`` times
    coarser in-plane and interpolated, like the noise of an image reconstructed on a finer
    matrix than it was acquired (zero-filled k-space)."""
    if grain <= 1.0:
        return rng.standard_normal(shape, dtype=np.float32)
    coarse = (
        math.ceil((shape[0] - 1) / grain) + 2,
        math.ceil((shape[1] - 1) / grain) + 2,
        shape[2],
    )
    field = upsample_inplane(
        rng.standard_normal(coarse, dtype=np.float32), grain, (shape[0], shape[1])
    )
    sd = float(field.std())
    return field / np.float32(sd if sd > 0 else 1.0)


def add_rician_noise(
    signal: FloatArray, sigma: float, rng: np.random.Generator, *, grain: float = 1.0
) -> FloatArray:
    """Magnitude of signal plus complex Gaussian noise (sigma per channel): Rician statistics.

    ``grain`` (>= 1, in pixels) correlates the noise in-plane (see :func:`_noise_field`).
    """
    re = signal + np.float32(sigma) * _noise_field(signal.shape, grain, rng)
    im = np.float32(sigma) * _noise_field(signal.shape, grain, rng)
    return np.sqrt(re * re + im * im, dtype=np.float32)
