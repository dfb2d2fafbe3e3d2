"""Head anatomy for the phantoms: the ICBM152 2009 template, derived CSF, skull and scalp.

The template (nilearn's bundled copy of the ICBM 2009a symmetric T1, GM and WM maps, 1 mm, brain
only) is read once per process and cached. Everything here works on the template's own voxel
grid, cropped to the head and padded so that skull and scalp fit. Array axes follow the NIfTI
file (i, j, k); ``Template.affine_lps`` maps them to LPS mm. Distances are in mm.

Copyright of the template stays with its authors: see ``NOTICE-ICBM152.txt`` beside this module.
"""

from __future__ import annotations

import functools
import importlib.util
import logging
from dataclasses import dataclass
from pathlib import Path

import nibabel as nib
import numpy as np
import numpy.typing as npt
from scipy import ndimage as ndi

from flairwatch.errors import StageFailed
from flairwatch.phantom.noise import smooth_noise
from flairwatch.volume import ras_to_lps

logger = logging.getLogger(__name__)

FloatArray = npt.NDArray[np.float32]
TEMPLATE_FILES = {
    "t1": "mni_icbm152_t1_tal_nlin_sym_09a_converted.nii.gz",
    "gm": "mni_icbm152_gm_tal_nlin_sym_09a_converted.nii.gz",
    "wm": "mni_icbm152_wm_tal_nlin_sym_09a_converted.nii.gz",
}
HEAD_MARGIN_MM = 24.0  # room outside the intracranial space for skull (<= 9 mm) and scalp
SUBARACHNOID_MM = 2.0  # CSF between the template's brain envelope and the inner skull table
VENTRICLE_DEPTH_MM = 6.0
MIDLINE_SLAB_MM = 2.0  # half-width of the slab that splits the lateral ventricles from the 3rd
SHELL_NOISE_CELL_MM = 3.0  # grid of the smooth skull/scalp variations (nearest-cell lookup)
SKULL_BASE_CLOSING_MM = 25.0  # closing radius of the envelope that the skull follows
SKULL_BASE_DEPTH_MM = 0.7  # depth given to skull-base voxels (cortical bone: dark)


@dataclass(frozen=True, eq=False)
class Template:
    """Cropped, padded template and the maps derived from it once per process.

    All arrays share one grid of shape (I, J, K); voxel size ``voxel_mm`` (isotropic).
    ``gm``/``wm`` are tissue fractions 0..1, ``icv`` the intracranial mask (0/1 float32),
    ``vent`` ventricular CSF (bool), ``d_vent`` distance to the ventricles (0 inside),
    ``d_ext`` distance to extra-ventricular CSF or outside the brain, ``d_out`` distance
    outside the intracranial mask (0 inside), all in mm. ``shell_idx`` are the flat indices of
    the voxels outside the intracranial mask within ``HEAD_MARGIN_MM`` (where skull and scalp
    can lie) and ``shell_depth`` their depth below the intracranial surface in mm.
    """

    gm: FloatArray
    wm: FloatArray
    icv: FloatArray
    vent: npt.NDArray[np.bool_]
    d_vent: FloatArray
    d_ext: FloatArray
    d_out: FloatArray
    affine_lps: npt.NDArray[np.float64]
    voxel_mm: float
    vent_center_ijk: tuple[float, float, float]
    icv_center_lps: tuple[float, float, float]
    shell_idx: npt.NDArray[np.intp]
    shell_depth: FloatArray
    shell_cells: npt.NDArray[np.intp]
    shell_coarse_shape: tuple[int, int, int]
    brain_box: tuple[slice, slice, slice]

    @property
    def shape(self) -> tuple[int, int, int]:
        i, j, k = self.gm.shape
        return (int(i), int(j), int(k))


def template_dir() -> Path:
    """Folder of nilearn's bundled data files, found without importing nilearn (slow)."""
    spec = importlib.util.find_spec("nilearn")
    if spec is None or not spec.submodule_search_locations:
        raise StageFailed("nilearn is not installed: install it to get the ICBM152 template files")
    return Path(next(iter(spec.submodule_search_locations))) / "datasets" / "data"


def _read(name: str) -> tuple[FloatArray, npt.NDArray[np.float64]]:
    path = template_dir() / TEMPLATE_FILES[name]
    if not path.is_file():
        raise StageFailed(f"template file {path} is missing: reinstall nilearn")
    img = nib.nifti1.load(path)
    data = np.asarray(img.dataobj, dtype=np.float32) / np.float32(255.0)
    return data, np.asarray(img.affine, dtype=np.float64)


def _block_mean(a: FloatArray, step: int) -> FloatArray:
    if step == 1:
        return a
    shape = [(n // step) * step for n in a.shape]
    a = a[: shape[0], : shape[1], : shape[2]]
    out = a.reshape(shape[0] // step, step, shape[1] // step, step, shape[2] // step, step)
    return np.asarray(out.mean(axis=(1, 3, 5)), dtype=np.float32)


def _ventricles(
    brain: npt.NDArray[np.bool_],
    csf: FloatArray,
    affine_ras: npt.NDArray[np.float64],
    sampling: tuple[float, float, float],
) -> npt.NDArray[np.bool_]:
    """Ventricular CSF: deep, GM/WM-free, thick (survives an opening) and within a box of
    template (MNI) coordinates around the lateral ventricles, which keeps fissures out."""
    d_in = ndi.distance_transform_edt(brain, sampling=sampling)
    ii, jj, kk = (np.arange(n, dtype=np.float64) for n in brain.shape)
    # The template affine is diagonal (RAS, axis-aligned), so coordinates separate per axis.
    x = (affine_ras[0, 0] * ii + affine_ras[0, 3])[:, None, None]
    y = (affine_ras[1, 1] * jj + affine_ras[1, 3])[None, :, None]
    z = (affine_ras[2, 2] * kk + affine_ras[2, 3])[None, None, :]
    box = (np.abs(x) < 36.0) & (y > -50.0) & (y < 40.0) & (z > -28.0) & (z < 40.0)
    deep = (csf > 0.5) & (d_in > VENTRICLE_DEPTH_MM) & box
    iterations = max(1, round(2.0 / sampling[0]))
    opened = ndi.binary_opening(deep, ndi.generate_binary_structure(3, 1), iterations=iterations)
    labels, n = ndi.label(opened)
    sizes = np.bincount(labels.ravel(), minlength=n + 1)
    keep = np.flatnonzero(sizes >= 400.0 / sampling[0] ** 3)
    vent = np.isin(labels, keep[keep > 0])
    return ndi.binary_dilation(vent, iterations=1) & (csf > 0.35)


@functools.lru_cache(maxsize=2)
def load_template(voxel_mm: int = 1) -> Template:
    """Read the ICBM152 maps and derive CSF, ventricles and distance maps (cached per process).

    Parameters
    ----------
    voxel_mm : int
        1 for the template's native 1 mm grid; 2 averages 2x2x2 blocks (fast, for tests).
    """
    if voxel_mm not in (1, 2):
        raise ValueError("voxel_mm must be 1 or 2")
    t1, affine_ras = _read("t1")
    gm, _ = _read("gm")
    wm, _ = _read("wm")
    step = int(voxel_mm)
    t1, gm, wm = (_block_mean(a, step) for a in (t1, gm, wm))
    affine_ras = affine_ras.copy()
    affine_ras[:3, 3] += affine_ras[:3, :3] @ np.full(3, (step - 1) / 2.0)
    affine_ras[:3, :3] *= step
    vox = float(step)

    sampling = (vox, vox, vox)
    brain = t1 > 0.02
    vent = _ventricles(brain, np.clip(1.0 - gm - wm, 0.0, 1.0) * brain, affine_ras, sampling)

    pad = int(np.ceil((HEAD_MARGIN_MM + SUBARACHNOID_MM) / vox)) + 1
    idx = np.argwhere(brain)
    lo = idx.min(axis=0) - pad
    hi = idx.max(axis=0) + pad + 1
    before = np.maximum(-lo, 0)
    after = np.maximum(hi - np.array(brain.shape), 0)
    widths = [(int(b), int(a)) for b, a in zip(before, after, strict=True)]
    sl = tuple(slice(int(a + b), int(c + b)) for a, b, c in zip(lo, before, hi, strict=True))
    gm = np.pad(gm, widths)[sl]
    wm = np.pad(wm, widths)[sl]
    brain = np.pad(brain, widths)[sl]
    vent = np.pad(vent, widths)[sl]
    affine_ras[:3, 3] += affine_ras[:3, :3] @ lo.astype(np.float64)

    d_brain_out = ndi.distance_transform_edt(~brain, sampling=sampling).astype(np.float32)
    icv = d_brain_out <= SUBARACHNOID_MM
    # The skull follows a closed envelope of the intracranial space: between the temporal and
    # frontal lobes and under the cut-off brainstem lies skull base (bone), not scalp.
    dilated = d_brain_out <= SUBARACHNOID_MM + SKULL_BASE_CLOSING_MM
    closed = ndi.distance_transform_edt(dilated, sampling=sampling) > SKULL_BASE_CLOSING_MM
    closed |= icv
    d_out = ndi.distance_transform_edt(~closed, sampling=sampling).astype(np.float32)
    base = closed & ~icv
    csf = np.clip(icv.astype(np.float32) - gm - wm, 0.0, 1.0)
    d_vent = ndi.distance_transform_edt(~vent, sampling=sampling).astype(np.float32)
    ext = ((csf > 0.5) & (d_vent > 3.0)) | ~brain
    d_ext = ndi.distance_transform_edt(~ext, sampling=sampling).astype(np.float32)
    center = np.argwhere(vent).mean(axis=0)
    icv_idx = np.argwhere(icv)
    icv_center = (ras_to_lps(affine_ras) @ np.append(icv_idx.mean(axis=0), 1.0))[:3]
    box_lo = np.maximum(icv_idx.min(axis=0) - 1, 0)
    box_hi = np.minimum(icv_idx.max(axis=0) + 2, icv.shape)
    brain_box = (
        slice(int(box_lo[0]), int(box_hi[0])),
        slice(int(box_lo[1]), int(box_hi[1])),
        slice(int(box_lo[2]), int(box_hi[2])),
    )
    shell_idx = np.flatnonzero((~icv & (d_out <= HEAD_MARGIN_MM)).ravel())
    # Skull-base voxels get a depth in the middle of the skull (diploe and bone).
    depth = np.where(base, SKULL_BASE_DEPTH_MM, d_out - 0.5 * vox)
    shell_depth = depth.ravel()[shell_idx].astype(np.float32)
    del depth
    # Cells of a 9 mm grid holding each shell voxel, for cheap smooth thickness variations.
    cell = max(SHELL_NOISE_CELL_MM / vox, 1.0)
    coarse_shape = tuple(int(np.ceil(n / cell)) + 1 for n in gm.shape)
    shell_ijk = np.unravel_index(shell_idx, gm.shape)
    shell_cells = np.ravel_multi_index(
        tuple((np.asarray(a) / cell).astype(np.intp) for a in shell_ijk), coarse_shape
    )
    logger.info(
        "template loaded: grid %s at %.0f mm, ventricles %.1f mL",
        gm.shape,
        vox,
        vent.sum() * vox**3 / 1000.0,
    )
    return Template(
        gm=gm,
        wm=wm,
        icv=icv.astype(np.float32),
        vent=vent,
        d_vent=d_vent,
        d_ext=d_ext,
        d_out=d_out,
        affine_lps=ras_to_lps(affine_ras),
        voxel_mm=vox,
        vent_center_ijk=(float(center[0]), float(center[1]), float(center[2])),
        icv_center_lps=(float(icv_center[0]), float(icv_center[1]), float(icv_center[2])),
        shell_idx=shell_idx,
        shell_depth=shell_depth,
        shell_cells=shell_cells,
        shell_coarse_shape=(coarse_shape[0], coarse_shape[1], coarse_shape[2]),
        brain_box=brain_box,
    )


@functools.lru_cache(maxsize=2)
def lateral_zone(voxel_mm: float = 1.0) -> npt.NDArray[np.bool_]:
    """True where the nearest template ventricle voxel belongs to a lateral ventricle.

    The template's ventricular CSF (:func:`_ventricles`) also holds the third ventricle and the
    cisterns behind it. The lateral ventricles are the two largest pieces left once a midline
    slab of +-``MIDLINE_SLAB_MM`` is removed (the third ventricle lies in that slab); every
    voxel takes the side of its nearest template ventricle voxel, so ventricles grown by
    atrophy stay lateral where they grew from a lateral ventricle.
    """
    tpl = load_template(int(voxel_mm))
    x = tpl.affine_lps[0, 0] * np.arange(tpl.shape[0]) + tpl.affine_lps[0, 3]
    off_mid = (np.abs(x) > MIDLINE_SLAB_MM)[:, None, None]
    labels, n = ndi.label(tpl.vent & off_mid)
    sizes = np.bincount(labels.ravel(), minlength=n + 1)
    sizes[0] = 0
    lateral = np.isin(labels, np.argsort(sizes)[-2:]) & (labels > 0)
    _, idx = ndi.distance_transform_edt(~tpl.vent, return_indices=True)
    return np.asarray(lateral[tuple(idx)], dtype=bool)


@dataclass(frozen=True, eq=False)
class Subject:
    """Tissue fractions of one phantom head on the template grid (all 0..1, float32).

    ``gm``, ``wm``, ``csf``, ``vent_csf`` (all ventricular CSF, third ventricle and the
    cisterns behind it included: what the rendering fills with fluid), ``lateral_csf`` (the
    part of it in the lateral ventricles: the ventricle truth) and ``d_vent`` (distance in mm to
    this subject's, possibly enlarged, ventricles) cover ``box``, the template's ``brain_box``. The skull and scalp layers ``bone``,
    ``marrow``, ``muscle``, ``fat``, ``skin`` are 1-D, over ``Template.shell_idx``.
    """

    gm: FloatArray
    wm: FloatArray
    csf: FloatArray
    vent_csf: FloatArray
    lateral_csf: FloatArray
    d_vent: FloatArray
    bone: FloatArray
    marrow: FloatArray
    muscle: FloatArray
    fat: FloatArray
    skin: FloatArray
    box: tuple[slice, slice, slice]

    @property
    def origin(self) -> tuple[int, int, int]:
        """Template index of this subject's first box voxel."""
        return (int(self.box[0].start), int(self.box[1].start), int(self.box[2].start))


def _layer(t: FloatArray, start: FloatArray | float, end: FloatArray | float) -> FloatArray:
    """Fraction of each voxel lying between depths ``start`` and ``end`` (mm, 1-voxel ramps)."""
    a = np.clip(t - start + 0.5, 0.0, 1.0)
    b = np.clip(t - end + 0.5, 0.0, 1.0)
    return np.asarray(a - b, dtype=np.float32)


def _noise_at(tpl: Template, rng: np.random.Generator, cells: float = 4.0) -> FloatArray:
    """Smooth unit-variance noise at the shell voxels (nearest cell of a 3 mm grid); features
    about ``cells`` cells wide."""
    coarse = smooth_noise(tpl.shell_coarse_shape, cells, rng)
    return coarse.reshape(-1)[tpl.shell_cells]


def build_subject(
    tpl: Template,
    *,
    atrophy: float,
    skull_mm: float,
    fat_mm: float,
    rng: np.random.Generator,
) -> Subject:
    """Apply atrophy and add skull and scalp layers.

    Parameters
    ----------
    atrophy : float
        0 (young adult template) .. 1 (marked atrophy: ventricles grown by ~4.5 mm, cortex
        thinned by ~1.5 mm, wider sulci).
    skull_mm, fat_mm : float
        Mean skull thickness and subcutaneous fat thickness in mm (varied +-25 % over the head).
    """
    vent_grow = 4.5 * atrophy
    cortex_thin = 1.5 * atrophy
    box = tpl.brain_box
    gm, wm, tpl_d_vent = tpl.gm[box], tpl.wm[box], tpl.d_vent[box]
    if vent_grow > 0:
        keep = np.clip(tpl_d_vent - vent_grow, 0.0, 1.0)
        gm = gm * keep
        wm = wm * keep
        d_vent = np.maximum(tpl_d_vent - vent_grow, 0.0)
    else:
        d_vent = tpl_d_vent
    if cortex_thin > 0:
        gm = gm * np.clip(tpl.d_ext[box] - cortex_thin, 0.0, 1.0)
    csf = np.clip(tpl.icv[box] - gm - wm, 0.0, 1.0)
    vent_csf = csf * (d_vent <= 0.5)
    lateral_csf = vent_csf * lateral_zone(tpl.voxel_mm)[box]

    t = tpl.shell_depth
    skull: FloatArray = skull_mm * (1.0 + 0.25 * np.clip(_noise_at(tpl, rng, 12.0), -1.5, 1.5))
    fat: FloatArray = fat_mm * (1.0 + 0.3 * np.clip(_noise_at(tpl, rng, 10.0), -1.5, 1.5))
    # Cortical tables 1-2 mm; the diploe between them is patchy (fatty marrow, bright on FLAIR,
    # mixed with dark trabecular bone).
    table = 1.5 + 0.4 * np.clip(_noise_at(tpl, rng, 5.0), -1.2, 1.2)
    patchy = np.clip(0.6 + 0.45 * _noise_at(tpl, rng, 3.0), 0.05, 1.0)
    diploe = _layer(t, table, skull - table)
    marrow = diploe * patchy
    bone = _layer(t, 0.0, table) + _layer(t, skull - table, skull) + diploe - marrow
    galea = skull + 1.5
    muscle = _layer(t, skull, galea)
    fat_layer = _layer(t, galea, galea + fat)
    skin = _layer(t, galea + fat, galea + fat + 1.8)
    return Subject(
        gm=gm.astype(np.float32, copy=False),
        wm=wm.astype(np.float32, copy=False),
        csf=csf.astype(np.float32, copy=False),
        vent_csf=vent_csf.astype(np.float32, copy=False),
        lateral_csf=lateral_csf.astype(np.float32, copy=False),
        d_vent=d_vent.astype(np.float32, copy=False),
        bone=bone,
        marrow=marrow,
        muscle=muscle,
        fat=fat_layer,
        skin=skin,
        box=box,
    )
