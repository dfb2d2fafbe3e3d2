"""The shift suite's own lesion shape model and its vessels (template grid, 1 mm voxels).

Lesions are *lobulated ellipsoids*: an ellipsoid (random axes and orientation) whose surface is
pushed out along a few random directions, ``rho(u) <= 1 + sum_m a_m max(u . v_m, 0)^3`` with
``rho`` the ellipsoidal radius and ``u`` the unit direction from the centre; partial volume comes
from 2 x 2 x 2 sub-voxel samples. Confluent disease adds a *band* along the ventricle walls whose
thickness varies smoothly, strongest at the frontal and occipital horns (caps). Punctate lesions
are small spheres of a set volume. Vessels are tubes along random walks in the sulcal CSF plus the
superior sagittal sinus. Arrays have the template's axes (i, j, k); voxels are 1 mm, so voxel
counts are mm^3.
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt
from scipy import ndimage as ndi

from flairwatch.phantom.anatomy import Template

F32 = npt.NDArray[np.float32]
MAX_LESIONS = 600
PUNCTATE_MM3 = (
    12.0,
    28.0,
)  # drawn volumes (1 mm voxels); the image-grid reference is checked later
_SUB = np.array([-0.25, 0.25])
MAX_LOBE = 1.7  # a lobe reaches at most this many ellipsoid radii from the centre


def _rotation(rng: np.random.Generator) -> npt.NDArray[np.float64]:
    q, r = np.linalg.qr(rng.standard_normal((3, 3)))
    return np.asarray(q * np.sign(np.diag(r)), dtype=np.float64)


def _box(
    centre: npt.NDArray[np.float64], reach: float, shape: tuple[int, ...]
) -> tuple[slice, ...]:
    lo = np.maximum(np.floor(centre - reach).astype(int), 0)
    hi = np.minimum(np.ceil(centre + reach).astype(int) + 1, shape)
    return tuple(slice(int(a), int(b)) for a, b in zip(lo, hi, strict=True))


def _sub_points(box: tuple[slice, ...]) -> npt.NDArray[np.float64]:
    """Sub-voxel sample positions of a box, shape (3, ni, 2, nj, 2, nk, 2)."""
    axes = [np.add.outer(np.arange(s.start, s.stop), _SUB) for s in box]
    i, j, k = np.meshgrid(*axes, indexing="ij")  # (ni, 2, nj, 2, nk, 2) after reshape below
    n = [s.stop - s.start for s in box]
    shape = (n[0], 2, n[1], 2, n[2], 2)
    return np.stack([a.reshape(n[0] * 2, n[1] * 2, n[2] * 2).reshape(shape) for a in (i, j, k)])


def lobulated_fraction(
    box: tuple[slice, ...],
    centre: npt.NDArray[np.float64],
    radii: npt.NDArray[np.float64],
    rot: npt.NDArray[np.float64],
    lobes: npt.NDArray[np.float64],
    amps: npt.NDArray[np.float64],
) -> F32:
    """Voxel fractions (0..1) of one lobulated ellipsoid over ``box`` (module docstring)."""
    p = (_sub_points(box) - centre.reshape(3, 1, 1, 1, 1, 1, 1)).astype(np.float32)
    d = np.tensordot(rot.T.astype(np.float32), p, axes=1)
    scaled = d / radii.reshape(3, 1, 1, 1, 1, 1, 1)
    rho = np.sqrt((scaled**2).sum(axis=0))
    u = d / np.maximum(np.sqrt((d**2).sum(axis=0)), 1e-6)
    g = np.ones_like(rho)
    for v, a in zip(lobes, amps, strict=True):
        g += a * np.maximum(np.tensordot(v, u, axes=1), 0.0) ** 3
    np.minimum(g, MAX_LOBE, out=g)
    edge = float(np.mean(radii))
    inside = np.clip((g - rho) * edge + 0.5, 0.0, 1.0)
    return np.asarray(inside.mean(axis=(1, 3, 5)), dtype=np.float32)


def _candidates(mask: npt.NDArray[np.bool_]) -> npt.NDArray[np.intp]:
    idx = np.flatnonzero(mask)
    if idx.size == 0:
        raise ValueError("no place for a lesion of this kind in this head")
    return idx


class _Painter:
    """Accumulates lesion fractions (max over lesions) and the contrast of the winning lesion."""

    def __init__(self, shape: tuple[int, ...], gate: F32) -> None:
        self.frac = np.zeros(shape, dtype=np.float32)
        self.contrast = np.ones(shape, dtype=np.float32)
        self.gate = gate  # tissue that can become lesion: volume counts through it
        self.volume_mm3 = 0.0
        self.count = 0

    def add(self, box: tuple[slice, ...], frac: F32, contrast: float) -> None:
        old = self.frac[box]
        better = frac > old
        self.volume_mm3 += float(((np.maximum(frac, old) - old) * self.gate[box]).sum())
        old[better] = frac[better]
        self.contrast[box][better] = contrast
        self.count += 1


def _blob(
    p: _Painter,
    centre: npt.NDArray[np.float64],
    mean_r: float,
    c: float,
    rng: np.random.Generator,
    *,
    flat: float = 1.0,
    lobed: bool = True,
) -> None:
    radii = mean_r * rng.uniform(0.65, 1.35, 3) * np.array([1.0, 1.0, flat])
    n_lobes = int(rng.integers(2, 6)) if lobed else 0
    lobes = rng.standard_normal((n_lobes, 3))
    lobes /= np.maximum(np.linalg.norm(lobes, axis=1, keepdims=True), 1e-9)
    amps = rng.uniform(0.2, 0.7, n_lobes)
    reach = float(radii.max() * MAX_LOBE + 1.5)
    box = _box(centre, reach, p.frac.shape)
    p.add(box, lobulated_fraction(box, centre, radii, _rotation(rng), lobes, amps), c)


def _pick(
    idx: npt.NDArray[np.intp], shape: tuple[int, ...], rng: np.random.Generator
) -> npt.NDArray[np.float64]:
    flat = int(idx[rng.integers(idx.size)])
    return np.array(np.unravel_index(flat, shape), dtype=np.float64) + rng.uniform(-0.5, 0.5, 3)


def _band(
    p: _Painter, d_vent: F32, tpl: Template, share_mm3: float, c: float, rng: np.random.Generator
) -> None:
    """Periventricular band, thickest at the horns: grows until it holds ``share_mm3``."""
    vent = d_vent <= 0.0
    ii = np.argwhere(vent)
    y = ii[:, 1].astype(np.float64)
    tips = []
    mid = float(tpl.vent_center_ijk[0])
    for side in (ii[:, 0] < mid, ii[:, 0] >= mid):
        if side.any():
            ys = y[side]
            tips += [ii[side][np.argmin(ys)], ii[side][np.argmax(ys)]]
    box = tpl.brain_box
    grid = np.indices(tuple(s.stop - s.start for s in box), dtype=np.float32)
    near = np.zeros(grid.shape[1:], dtype=np.float32)
    for t in tips:
        off = np.array([s.start for s in box], dtype=np.float32)
        dist = np.sqrt(sum((grid[a] - (t[a] - off[a])) ** 2 for a in range(3)))
        near = np.maximum(near, np.clip(1.0 - dist / 30.0, 0.0, 1.0))
    wobble = np.clip(
        1.0
        + 0.5
        * ndi.zoom(rng.standard_normal((8, 8, 8)), [n / 8 for n in near.shape], order=1)[
            : near.shape[0], : near.shape[1], : near.shape[2]
        ],
        0.2,
        2.0,
    )
    dv = d_vent[box]
    for thick in np.arange(1.5, 14.0, 1.0):
        t = thick * (0.35 + near) * wobble
        frac = np.asarray(np.clip(t - dv + 0.5, 0.0, 1.0) * (dv > 0), dtype=np.float32)
        gained = float(((np.maximum(frac, p.frac[box]) - p.frac[box]) * p.gate[box]).sum())
        if gained >= share_mm3 or thick >= 13.0:
            p.add(box, frac, c)
            return


def paint_lesions(
    style: str,
    target_mm3: float,
    *,
    wm: F32,
    gm: F32,
    d_vent: F32,
    tpl: Template,
    contrast: tuple[float, float],
    rng: np.random.Generator,
    punctate_mm3: tuple[float, float] = PUNCTATE_MM3,
) -> tuple[F32, F32, int]:
    """Lesion shape fractions, per-voxel contrast (ratio to WM) and lesion count of one head.

    ``style``: "mixed" (periventricular, deep, some juxtacortical; a band above 10 mL),
    "faint" (as mixed), "punctate", "caps" (band and flattened caps at the horns),
    "juxtacortical" or "none". ``d_vent`` is the distance (mm) to this head's ventricles.
    ``punctate_mm3`` is the range of punctate volumes drawn (thick slices need more, as a
    voxel counts as lesion when at least half of it is).
    """
    shape = wm.shape
    near_gm = ndi.maximum_filter(gm, size=5) > 0.6
    gate = np.clip(wm + (1.0 if style == "juxtacortical" else 0.3) * gm, 0.0, 1.0).astype(
        np.float32
    )
    p = _Painter(shape, gate)
    if style == "none" or target_mm3 <= 0:
        return p.frac, p.contrast, 0
    peri = _candidates((wm > 0.7) & (d_vent >= 1.0) & (d_vent <= 7.0))
    deep = _candidates((wm > 0.85) & (d_vent > 10.0) & (tpl.d_ext > 6.0))
    juxta = _candidates((wm > 0.5) & near_gm & (d_vent > 10.0))
    lo, hi = contrast

    def draw_c() -> float:
        return float(rng.uniform(lo, hi))

    if style == "punctate":
        placed: list[npt.NDArray[np.float64]] = []
        spots = _candidates((wm > 0.95) & (d_vent > 6.0) & (tpl.d_ext > 5.0))
        for _ in range(4000):
            if p.volume_mm3 >= target_mm3 or p.count >= MAX_LESIONS:
                break
            c = _pick(spots, shape, rng)
            if any(np.linalg.norm(c - q) < 10.0 for q in placed):
                continue
            r = (3.0 * rng.uniform(*punctate_mm3) / (4.0 * math.pi)) ** (1.0 / 3.0)
            _blob(p, c, r, draw_c(), rng, lobed=False)
            placed.append(c)
        return p.frac, p.contrast, p.count
    if style == "caps" or (style in ("mixed", "faint") and target_mm3 > 10_000):
        share = 0.6 if style == "caps" else 0.3
        _band(p, d_vent, tpl, share * target_mm3, draw_c(), rng)
    weights = {
        "mixed": (0.5, 0.38, 0.12),
        "faint": (0.5, 0.38, 0.12),
        "caps": (0.85, 0.15, 0.0),
        "juxtacortical": (0.2, 0.1, 0.7),
    }[style]
    pools = (peri, deep, juxta)
    for _ in range(MAX_LESIONS):
        if p.volume_mm3 >= target_mm3:
            break
        which = int(rng.choice(3, p=weights))
        centre = _pick(pools[which], shape, rng)
        mean_r = math.exp(rng.uniform(math.log(1.6), math.log(6.5 if which == 0 else 4.5)))
        flat = 0.55 if style == "caps" else 1.0
        _blob(p, centre, mean_r, draw_c(), rng, flat=flat)
    return p.frac, p.contrast, p.count


def _tube(out: F32, a: npt.NDArray[np.float64], b: npt.NDArray[np.float64], radius: float) -> None:
    box = _box((a + b) / 2.0, float(np.linalg.norm(b - a)) / 2.0 + radius + 1.0, out.shape)
    grid = np.stack(np.meshgrid(*[np.arange(s.start, s.stop) for s in box], indexing="ij")).astype(
        np.float64
    )
    ab = b - a
    t = np.clip(
        np.tensordot(ab, grid - a.reshape(3, 1, 1, 1), axes=1) / max(float(ab @ ab), 1e-9), 0, 1
    )
    closest = a.reshape(3, 1, 1, 1) + ab.reshape(3, 1, 1, 1) * t
    dist = np.sqrt(((grid - closest) ** 2).sum(axis=0))
    np.maximum(out[box], np.clip(radius - dist + 0.5, 0.0, 1.0).astype(np.float32), out=out[box])


def paint_vessels(tpl: Template, ext_csf: F32, rng: np.random.Generator) -> F32:
    """Vessel fractions: 8-14 tubes along random walks in the sulci, and the sagittal sinus."""
    out = np.zeros(ext_csf.shape, dtype=np.float32)
    starts = _candidates((ext_csf > 0.6) & (tpl.d_out <= 0.0))
    for _ in range(int(rng.integers(8, 15))):
        point = _pick(starts, out.shape, rng)
        step = rng.standard_normal(3)
        radius = float(rng.uniform(0.7, 1.5))
        for _ in range(6):
            step = 0.6 * step / np.linalg.norm(step) + 0.4 * rng.standard_normal(3)
            nxt = point + 7.0 * step / np.linalg.norm(step)
            _tube(out, point, nxt, radius)
            point = nxt
    icv = tpl.icv > 0.5
    rim = icv & ~ndi.binary_erosion(icv, iterations=4)
    ni, _, nk = tpl.shape
    x = tpl.affine_lps[0, 0] * np.arange(ni) + tpl.affine_lps[0, 3]
    z = tpl.affine_lps[2, 2] * np.arange(nk) + tpl.affine_lps[2, 3]
    sinus = rim & (np.abs(x) < 3.0)[:, None, None] & (z > tpl.icv_center_lps[2])[None, None, :]
    return np.maximum(out, sinus.astype(np.float32) * float(rng.uniform(0.6, 1.0)))
