"""Assemble one phantom: anatomy, lesions, signal, scan. Pure: reads only the cached template.

All outputs lie on the acquisition grid: a :class:`~flairwatch.volume.Volume` with axes (i, j, k)
= (column, row, slice) and an LPS affine, exactly as a DICOM reader builds it from the series.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from flairwatch.phantom.acquire import (
    Sampler,
    acquisition_affine,
    add_rician_noise,
    bias_field,
    make_sampler,
    rotation,
    sample_maps,
    slice_profile,
)
from flairwatch.phantom.anatomy import Template, build_subject, load_template
from flairwatch.phantom.lesions import make_lesions
from flairwatch.phantom.noise import lerp_axis, smooth_noise, upsample_inplane
from flairwatch.phantom.params import AcquisitionParams, PhantomParams, rng_for
from flairwatch.phantom.render import Sequence, other_sequence, render_signal, tissue_signals
from flairwatch.volume import Volume

Matrix = npt.NDArray[np.float64]
# Distance (mm, template LPS z) from the intracranial centre to the centre of an axial stack:
# stacks start at the skull base and end above the vertex.
AXIAL_CENTER_RAISE_MM = 3.0
# In-plane pixel size (mm) at which template maps are sampled before upsampling: the 1 mm
# template holds no finer detail.
INTERMEDIATE_MM = 1.0
TEXTURE_AMPLITUDE = 0.03
NOISE_GRAIN_MM = 0.8  # acquired in-plane resolution below which noise is interpolated
ICV_STEP = 2  # the intracranial mask is read on every 2nd intermediate pixel
# Labels of PhantomCase.tissue: outside the intracranial space, CSF outside the ventricles,
# ventricular CSF, grey matter, white matter, WMH. Training uses them to remap intensities per
# tissue; nothing at runtime reads them.
TISSUE_CLASSES: tuple[str, ...] = ("outside", "csf", "ventricle", "gm", "wm", "wmh")


@dataclass(frozen=True, eq=False)
class PhantomCase:
    """One generated phantom.

    ``image`` is float32 signal in stored pixel units (WM about ``params.signal_scale``);
    ``wmh`` the truth mask (uint8 0/1: lesion partial-volume fraction >= 0.5);
    ``intracranial`` the intracranial mask (uint8 0/1); ``ventricles`` the lateral ventricles
    (uint8 0/1: ventricular CSF fraction >= 0.5, enlarged with atrophy); ``tissue`` the dominant
    tissue per voxel (uint8, :data:`TISSUE_CLASSES`). All share the acquisition grid. The image
    does not depend on whether the last two are made.
    """

    image: Volume
    wmh: Volume
    intracranial: Volume
    params: PhantomParams
    ventricles: Volume | None = None
    tissue: Volume | None = None

    @property
    def lesion_volume_ml(self) -> float:
        """Truth lesion volume on the acquisition grid, mL."""
        return float(self.wmh.data.sum()) * self.wmh.voxel_volume_mm3 / 1000.0

    @property
    def ventricle_volume_ml(self) -> float | None:
        """Lateral-ventricle volume on the acquisition grid, mL (None when not made)."""
        if self.ventricles is None:
            return None
        return float(self.ventricles.data.sum()) * self.ventricles.voxel_volume_mm3 / 1000.0

    @property
    def intracranial_volume_ml(self) -> float:
        """Intracranial volume on the acquisition grid, mL."""
        return float(self.intracranial.data.sum()) * self.intracranial.voxel_volume_mm3 / 1000.0


def head_pose(params: PhantomParams, tpl: Template) -> Matrix:
    """4x4 map from template LPS mm to patient LPS mm (scale, rotation, small shift)."""
    rng = rng_for(params.seed, "pose")
    shift = np.clip(rng.normal(0.0, 5.0, 3), -12.0, 12.0)  # head off the FOV centre
    center = np.asarray(tpl.icv_center_lps)
    pose = np.eye(4)
    pose[:3, :3] = (
        rotation(params.head_rotation_deg) @ np.diag(params.head_aspect) * params.head_scale
    )
    pose[:3, 3] = shift - pose[:3, :3] @ center
    return pose


def _load_gain(params: PhantomParams) -> float:
    """Template-space lesion volume per mL of target truth volume on the acquisition grid.

    Undoes the head scaling, and the loss of thin lesion rims when a smooth lesion map is
    resampled and thresholded at 0.5 (measured on this generator: ~0.75 of the volume survives
    at 1 mm, ~0.65 on 3-5 mm slices).
    """
    acq = params.acquisition
    survive = 0.75 if acq.kind == "3d_sagittal" else 0.8 - 0.04 * acq.slice_mm
    # Small loads are made of small lesions, more of which vanish; large ones merge and keep
    # more (measured: ~0.9x at 1 mL, ~1.15x at 30 mL without this term).
    size_term = 0.87 + 0.45 / (1.0 + params.lesion_load_ml / 1.5)
    return size_term / (params.head_scale**3 * survive)


def _flair(params: PhantomParams) -> Sequence:
    a = params.acquisition
    return Sequence("ir", a.tr_ms, a.te_ms, a.ti_ms, a.field_strength_t)


def _render(
    params: PhantomParams,
    seq: Sequence,
    *,
    with_truth: bool,
    with_ventricles: bool = False,
    with_tissue: bool = False,
) -> tuple[Volume, Volume | None, Volume | None, dict[str, Volume]]:
    tpl = load_template(params.template_mm)
    acq = params.acquisition
    seed = params.seed
    subj = build_subject(
        tpl,
        atrophy=params.atrophy,
        skull_mm=params.skull_mm,
        fat_mm=params.fat_mm,
        rng=rng_for(seed, "anatomy"),
    )
    les = make_lesions(
        tpl,
        subj,
        load_ml=params.lesion_load_ml * _load_gain(params),
        periventricular=params.periventricular,
        severity_range=params.lesion_brightness,
        rng=rng_for(seed, "lesions"),
    )
    signal = render_signal(
        tpl,
        subj,
        les,
        seq,
        lining=params.ventricle_lining,
        inflow=params.inflow,
        cortex_patches=params.cortex_patches,
        rng=rng_for(seed, "lookalikes"),
        jitter=params.relaxation_jitter,
    )

    pose = head_pose(params, tpl)
    center_tpl = np.array(tpl.icv_center_lps)
    if acq.kind == "2d_axial":
        center_tpl[2] += AXIAL_CENTER_RAISE_MM
    acq_aff = acquisition_affine(acq, (pose @ np.append(center_tpl, 1.0))[:3])

    # Intermediate grid: in-plane pixels grouped f x f so that its pixels are ~1 mm.
    f = max(1.0, INTERMEDIATE_MM / acq.inplane_mm)
    rows, cols = acq.matrix
    int_shape = (math.ceil((cols - 1) / f) + 1, math.ceil((rows - 1) / f) + 1, acq.n_slices)
    coarsen = np.diag([f, f, 1.0, 1.0])
    int_aff = acq_aff @ coarsen
    int_to_tpl = np.linalg.inv(tpl.affine_lps) @ np.linalg.inv(pose) @ int_aff
    int_spacing = (acq.inplane_mm * f, acq.inplane_mm * f, acq.slice_spacing_mm)

    # Only the part of the plane that can see the template grid is sampled.
    corners = np.array(
        [
            [x, y, z, 1.0]
            for x in (0, tpl.shape[0])
            for y in (0, tpl.shape[1])
            for z in (0, tpl.shape[2])
        ]
    )
    uvw = (np.linalg.inv(int_to_tpl) @ corners.T)[:3]
    margin = 3.0 + 4.0 * params.deformation_mm / int_spacing[0]
    box_uv = tuple(
        slice(
            int(max(0, math.floor(uvw[a].min() - margin))),
            int(min(int_shape[a], math.ceil(uvw[a].max() + margin))),
        )
        for a in (0, 1)
    )
    sampler = make_sampler(
        int_to_tpl,
        int_shape,
        int_spacing,
        params.deformation_mm,
        tpl.voxel_mm,
        rng_for(seed, "deform"),
    )
    planes, weights = slice_profile(acq)
    maps: list[tuple[npt.NDArray[np.float32], tuple[slice, slice, slice] | None]] = [(signal, None)]
    has_lesions = with_truth and les.volume_ml > 0
    if has_lesions:
        maps.append(((subj.wm[les.box] * les.fraction).astype(np.float32), les.tpl_box))
    extra: list[npt.NDArray[np.float32]] = []
    if with_truth and (with_ventricles or with_tissue):
        # extra maps are sampled separately: the image samples stay bit-identical
        extra = [subj.lateral_csf, subj.gm, subj.wm] if with_tissue else [subj.lateral_csf]
        maps += [(np.ascontiguousarray(m, dtype=np.float32), subj.box) for m in extra]
    n_extra = len(extra)
    sampled = sample_maps(sampler, maps, int_shape, (box_uv[0], box_uv[1]), planes, weights)
    extra_maps = sampled[len(sampled) - n_extra :] if n_extra else []

    # Fine tissue texture (+-3 %, ~2.5 mm grain) that the smooth average template lacks.
    texture = smooth_noise(int_shape, 2.5 / int_spacing[0], rng_for(seed, "texture"))
    image = (
        sampled[0]
        * (1.0 + TEXTURE_AMPLITUDE * texture)
        * bias_field(int_shape, int_spacing, params.bias_strength, rng_for(seed, "bias"))
    )
    image = _scanner_artefacts(image, params)
    image = upsample_inplane(image, f, (cols, rows))
    gain = params.signal_scale / tissue_signals(seq, params.relaxation_jitter)["wm"]
    noise_rng = rng_for(seed, f"noise-{seq.kind}-{seq.tr_ms}-{seq.te_ms}")
    # Pixels finer than ~0.7 mm come from zero-filled reconstruction: noise grain ~0.8 mm.
    grain = max(1.0, NOISE_GRAIN_MM / acq.inplane_mm)
    image = add_rician_noise(
        image * np.float32(gain), params.noise_level * params.signal_scale, noise_rng, grain=grain
    )
    image_vol = Volume(image.astype(np.float32), acq_aff)
    if not with_truth:
        return image_vol, None, None, {}
    icv = _intracranial(tpl, sampler, int_shape, (box_uv[0], box_uv[1]), f, acq) >= 0.5
    if has_lesions:
        wmh = upsample_inplane(sampled[1], f, (cols, rows)) >= 0.5
    else:
        wmh = np.zeros(icv.shape, dtype=bool)
    extras: dict[str, Volume] = {}
    if extra_maps:
        upsampled = [upsample_inplane(m, f, (cols, rows)) for m in extra_maps]
        extras["ventricles"] = Volume((upsampled[0] >= 0.5).astype(np.uint8), acq_aff)
        if len(upsampled) == 3:
            vent, gm, wm = upsampled
            extras["tissue"] = Volume(_tissue_labels(icv, vent, gm, wm, wmh), acq_aff)
    return (
        image_vol,
        Volume(wmh.astype(np.uint8), acq_aff),
        Volume(icv.astype(np.uint8), acq_aff),
        extras,
    )


def _tissue_labels(
    icv: npt.NDArray[np.bool_],
    vent: npt.NDArray[np.float32],
    gm: npt.NDArray[np.float32],
    wm: npt.NDArray[np.float32],
    wmh: npt.NDArray[np.bool_],
) -> npt.NDArray[np.uint8]:
    """Dominant tissue per voxel as :data:`TISSUE_CLASSES` indices (CSF: the remainder)."""
    csf = np.clip(1.0 - vent - gm - wm, 0.0, 1.0)
    stack = np.stack([csf, vent, gm, wm])
    labels = (np.argmax(stack, axis=0) + 1).astype(np.uint8)
    labels[wmh] = TISSUE_CLASSES.index("wmh")
    labels[~icv] = 0
    return labels


def _scanner_artefacts(
    image: npt.NDArray[np.float32], params: PhantomParams
) -> npt.NDArray[np.float32]:
    """Slice-to-slice intensity jitter (2D: interleaved excitation, common practice) and a faint
    motion ghost: a copy of the head shifted by half the field of view along the phase-encoding
    axis (j, rows), as pulsation or motion produce (common practice). Axes (i, j, k)."""
    acq = params.acquisition
    rng = rng_for(params.seed, "artefacts")
    out = image
    if acq.kind == "2d_axial" and params.slice_jitter > 0:
        factors = 1.0 + params.slice_jitter * rng.standard_normal(acq.n_slices)
        out = out * factors.astype(np.float32)[None, None, :]
    if params.ghosting > 0:
        ghost = np.roll(out, out.shape[1] // 2, axis=1)
        out = out + np.float32(params.ghosting) * ghost
    return np.asarray(out, dtype=np.float32)


def _intracranial(
    tpl: Template,
    sampler: Sampler,
    int_shape: tuple[int, int, int],
    box_uv: tuple[slice, slice],
    f: float,
    acq: AcquisitionParams,
) -> npt.NDArray[np.float32]:
    """Intracranial fraction on the acquisition grid, sampled on every 2nd intermediate point.

    The intracranial surface is smooth, so reading it at ~2 mm and interpolating moves the 0.5
    contour by a fraction of a voxel, for a third of the cost of a full read. 2D stacks keep
    every slice (they are 3-5 mm apart already).
    """
    step_w = 2 if acq.kind == "3d_sagittal" else 1
    coarse = sampler.coarsened(ICV_STEP, step_w)
    shape = (
        math.ceil((int_shape[0] - 1) / ICV_STEP) + 1,
        math.ceil((int_shape[1] - 1) / ICV_STEP) + 1,
        math.ceil((int_shape[2] - 1) / step_w) + 1,
    )
    box = (
        slice(box_uv[0].start // ICV_STEP, math.ceil(box_uv[0].stop / ICV_STEP)),
        slice(box_uv[1].start // ICV_STEP, math.ceil(box_uv[1].stop / ICV_STEP)),
    )
    planes, weights = slice_profile(acq)
    (frac,) = sample_maps(coarse, [(tpl.icv, None)], shape, box, planes / step_w, weights)
    rows, cols = acq.matrix
    frac = upsample_inplane(frac, f * ICV_STEP, (cols, rows))
    if step_w > 1:
        frac = lerp_axis(frac, np.arange(acq.n_slices, dtype=np.float64) / step_w, 2)
    return frac


def generate(
    params: PhantomParams, *, with_ventricles: bool = True, with_tissue: bool = False
) -> PhantomCase:
    """Render one FLAIR phantom with its WMH truth and intracranial mask (no disk writes).

    ``with_ventricles`` adds the lateral-ventricle mask (a few % more time), ``with_tissue``
    the ventricle mask and tissue labels for training (about a third more time). The image is
    the same either way.
    """
    image, wmh, icv, extras = _render(
        params,
        _flair(params),
        with_truth=True,
        with_ventricles=with_ventricles,
        with_tissue=with_tissue,
    )
    assert wmh is not None and icv is not None
    return PhantomCase(
        image=image,
        wmh=wmh,
        intracranial=icv,
        params=params,
        ventricles=extras.get("ventricles"),
        tissue=extras.get("tissue"),
    )


def make_other_contrast(case: PhantomCase, contrast: str = "t1") -> Volume:
    """A non-FLAIR series of the same head on the same grid: ``"t1"`` or ``"t2"`` spin echo."""
    seq = other_sequence(contrast, case.params.acquisition.field_strength_t)
    image, _, _, _ = _render(case.params, seq, with_truth=False)
    return image
