"""One shift-suite head on the template grid: anatomy changes, contrast, look-alikes.

Reused from :mod:`flairwatch.phantom`: the ICBM152 template maps (:func:`load_template`: GM/WM
fractions, intracranial mask, ventricles, distance maps) and the tissue relaxation table
(``TISSUES``, sources beside each value there). Everything random here is this suite's own:
ventricle growth, cortical thinning, skull and scalp layers, the signal equation's use, the
ependymal lining, the bright grey-matter patches, sulcal CSF and vessels. Arrays have the
template's axes (i, j, k) and 1 mm voxels; distances are in mm.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy import ndimage as ndi

from flairwatch.phantom.anatomy import Template, lateral_zone, load_template
from flairwatch.phantom.physics import TISSUES, Tissue
from flairwatch.shift.lesions import paint_lesions, paint_vessels
from flairwatch.shift.recipes import Recipe

F32 = npt.NDArray[np.float32]


@dataclass(frozen=True, eq=False)
class HeadMaps:
    """Maps of one head on the template grid, all float32 (I, J, K).

    ``base`` is the FLAIR signal of everything but lesions (tissue displaced by lesion removed),
    ``lesion_signal`` the lesions' own signal (so faint contrast can be rescaled), ``lesion``
    the lesion fraction, ``ventricles`` the lateral-ventricle fraction, ``intracranial`` the
    intracranial fraction, ``wm`` the normal white-matter fraction, ``vessels`` the signal of
    flowing blood (ghosted by the acquisition). ``wm_signal`` is normal WM's signal (a.u.).
    """

    base: F32
    lesion_signal: F32
    lesion: F32
    ventricles: F32
    intracranial: F32
    wm: F32
    vessels: F32
    wm_signal: float
    lesion_count: int


def flair_signal(t: Tissue, tr_ms: float, ti_ms: float, te_ms: float) -> float:
    """Magnitude inversion-recovery signal PD |1 - 2 exp(-TI/T1) + exp(-TR/T1)| exp(-TE/T2).

    Standard MRI physics (full inversion, 90-degree readout, TE << TR); arbitrary units.
    """
    mz = 1.0 - 2.0 * math.exp(-ti_ms / t.t1_ms) + math.exp(-tr_ms / t.t1_ms)
    return t.pd * abs(mz) * math.exp(-te_ms / t.t2_ms)


def tissue_signals(r: Recipe) -> dict[str, float]:
    """FLAIR signal of every tissue for this recipe's sequence and field strength."""
    a = r.acquisition
    table = TISSUES[1.5 if a.field_strength_t < 2.25 else 3.0]
    s1, s2 = r.relaxation_scale
    scaled = {
        name: Tissue(t.t1_ms * s1, t.t2_ms * s2, t.pd) if name in ("wm", "gm") else t
        for name, t in table.items()
    }
    return {name: flair_signal(t, a.tr_ms, a.ti_ms, a.te_ms) for name, t in scaled.items()}


def smooth_field(shape: tuple[int, ...], cell: int, rng: np.random.Generator) -> F32:
    """Zero-mean unit-SD random field with features about ``cell`` voxels wide (coarse + zoom)."""
    coarse_shape = tuple(max(2, math.ceil(n / cell) + 1) for n in shape)
    coarse = ndi.gaussian_filter(rng.standard_normal(coarse_shape), 0.8)
    zoom = [n / c for n, c in zip(shape, coarse_shape, strict=True)]
    f = ndi.zoom(coarse, zoom, order=1)[tuple(slice(0, n) for n in shape)]
    f = f - f.mean()
    return np.asarray(f / (f.std() + 1e-9), dtype=np.float32)


def _ramp(t: F32, start: float, end: float) -> F32:
    """Fraction of each voxel between depths ``start`` and ``end`` mm (1-voxel ramps)."""
    a = np.clip(t - start + 0.5, 0.0, 1.0)
    b = np.clip(t - end + 0.5, 0.0, 1.0)
    return np.asarray(a - b, dtype=np.float32)


def _scalp(tpl: Template, sig: dict[str, float], rng: np.random.Generator) -> F32:
    """Signal of skull (dark bone with a patchy marrow band), muscle, fat and skin (mm layers)."""
    t = tpl.d_out
    skull = float(rng.uniform(4.5, 8.0))
    fat = float(rng.uniform(2.0, 6.5))
    band = _ramp(t, 1.6, skull - 1.6)
    bone = _ramp(t, 0.0, skull) - band
    marrow_share = float(rng.uniform(0.3, 0.8))
    out = bone * sig["bone"] + band * (
        marrow_share * sig["marrow"] + (1 - marrow_share) * sig["bone"]
    )
    out += _ramp(t, skull, skull + 1.5) * sig["muscle"]
    out += _ramp(t, skull + 1.5, skull + 1.5 + fat) * sig["fat"]
    out += _ramp(t, skull + 1.5 + fat, skull + 3.0 + fat) * sig["muscle"]
    return np.asarray(out * (tpl.icv < 0.5), dtype=np.float32)


def build_head(r: Recipe, voxel_mm: int = 1) -> HeadMaps:
    """All maps of the recipe's head (lesions, look-alikes and contrast; no acquisition)."""
    tpl = load_template(voxel_mm)
    rng = np.random.default_rng([r.seed, 2])
    sig = tissue_signals(r)
    grow, thin = r.ventricle_grow_mm, r.cortex_thin_mm
    if grow > 0:
        vent = np.clip(grow + 0.5 - tpl.d_vent, 0.0, 1.0).astype(np.float32)
    else:
        vent = tpl.vent.astype(np.float32)
    d_vent = np.maximum(tpl.d_vent - grow, 0.0).astype(np.float32)
    keep = 1.0 - vent
    gm = tpl.gm * keep
    wm = tpl.wm * keep
    if thin > 0:
        gm = gm * np.clip(tpl.d_ext - thin + 0.5, 0.0, 1.0)
    icv = tpl.icv
    # lesions: this suite's own shapes (see lesions.py), in template mm^3 (head scale applied)
    target_mm3 = r.lesion_ml * 1000.0 / r.head_scale**3
    shape_frac, contrast, count = paint_lesions(
        r.lesion_style,
        target_mm3,
        wm=wm,
        gm=gm,
        d_vent=d_vent,
        tpl=tpl,
        contrast=r.lesion_contrast,
        rng=rng,
        punctate_mm3=tuple(  # type: ignore[arg-type]
            v / r.head_scale**3
            for v in ((14.0, 25.0) if r.acquisition.slice_mm < 2 else (18.0, 33.0))
        ),
    )
    gm_share = 1.0 if r.lesion_style == "juxtacortical" else 0.3
    lesion = np.minimum(shape_frac * np.clip(wm + gm_share * gm, 0.0, 1.0), wm + gm)
    from_wm = np.minimum(lesion, wm)
    wm = wm - from_wm
    gm = np.maximum(gm - (lesion - from_wm), 0.0)
    csf = np.clip(icv - gm - wm - lesion, 0.0, 1.0)
    vent_csf = np.minimum(csf, vent)
    ext_csf = csf - vent_csf

    gm_gain = np.ones_like(gm)
    if r.ribbon > 0:  # patches of bright cortex near the brain surface
        patches = np.clip(smooth_field(gm.shape, 12, rng) - 0.3, 0.0, 0.6) / 0.6
        gm_gain += r.ribbon * patches * (tpl.d_ext < 4.0)
    if r.deep_gm > 0:  # deep grey matter brightened as a whole in places
        blobs = np.clip(smooth_field(gm.shape, 16, rng), 0.0, 0.8) / 0.8
        gm_gain += r.deep_gm * blobs * (tpl.d_ext >= 4.0)
    base = gm * gm_gain * sig["gm"] + wm * sig["wm"] + vent_csf * sig["csf"]
    sulcal = sig["csf"] + r.sulcal_csf * sig["wm"] * np.clip(
        0.7 + 0.5 * smooth_field(gm.shape, 10, rng), 0.0, 1.5
    )
    base += ext_csf * sulcal
    if r.lining > 0:  # thin bright ependymal rim: normal ageing, labelled background
        rim = np.clip(1.0 - np.abs(d_vent - 1.0), 0.0, 1.0) * (d_vent > 0) * wm
        base += r.lining * 0.35 * sig["wm"] * rim
    base += _scalp(tpl, sig, rng)
    vessels = np.zeros_like(base)
    if r.flow > 0:
        tube = paint_vessels(tpl, ext_csf, rng)
        vessels = np.asarray(tube * r.flow * 3.0 * sig["wm"], dtype=np.float32)
        base = base * (1.0 - tube)
    lat = vent * lateral_zone(voxel_mm)
    return HeadMaps(
        base=np.asarray(base, dtype=np.float32),
        lesion_signal=np.asarray(lesion * contrast * sig["wm"], dtype=np.float32),
        lesion=np.asarray(lesion, dtype=np.float32),
        ventricles=np.asarray(lat, dtype=np.float32),
        intracranial=np.asarray(icv, dtype=np.float32),
        wm=np.asarray(wm, dtype=np.float32),
        vessels=vessels,
        wm_signal=sig["wm"],
        lesion_count=count,
    )
