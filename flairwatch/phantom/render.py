"""Signal of the phantom head on the template grid, from tissue fractions and the physics.

Partial-volume voxels mix the signals of their tissues linearly (magnetisations add). The
look-alikes that are not WMH are added here: a thin bright ventricular lining, CSF inflow
artefacts in the ventricles and basal cisterns, and mildly bright cortex patches. Arrays have
the template grid's axes (i, j, k).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from flairwatch.phantom.anatomy import Subject, Template
from flairwatch.phantom.lesions import LesionMaps
from flairwatch.phantom.noise import smooth_noise
from flairwatch.phantom.physics import Jitter, lesion_signal_lut, sequence_signal, tissue_table

FloatArray = npt.NDArray[np.float32]


@dataclass(frozen=True)
class Sequence:
    """A pulse sequence: ``kind`` "ir" (FLAIR) or "se" (spin echo); times in ms."""

    kind: str
    tr_ms: float
    te_ms: float
    ti_ms: float | None
    field_strength_t: float


def other_sequence(contrast: str, field_strength_t: float) -> Sequence:
    """Typical spin-echo settings for a non-FLAIR series of the same head (common practice)."""
    if contrast == "t1":
        return Sequence("se", 550.0, 12.0, None, field_strength_t)
    if contrast == "t2":
        return Sequence("se", 4500.0, 100.0, None, field_strength_t)
    raise ValueError(f"unknown contrast {contrast!r}: use 't1' or 't2'")


def tissue_signals(seq: Sequence, jitter: Jitter | None = None) -> dict[str, float]:
    """Signal of each tissue of the table for this sequence (arbitrary units, M0 = 1)."""
    return {
        name: sequence_signal(
            t, sequence=seq.kind, tr_ms=seq.tr_ms, te_ms=seq.te_ms, ti_ms=seq.ti_ms
        )
        for name, t in tissue_table(seq.field_strength_t, jitter).items()
    }


def render_signal(
    tpl: Template,
    subj: Subject,
    les: LesionMaps,
    seq: Sequence,
    *,
    lining: float,
    inflow: float,
    cortex_patches: float,
    rng: np.random.Generator,
    jitter: Jitter | None = None,
) -> FloatArray:
    """Signal per template voxel (float32, M0 = 1 units).

    Look-alike strengths are 0..1; pass 0 to switch one off. Inflow and lining only apply to
    inversion-recovery (FLAIR) sequences. ``jitter`` scales WM/GM relaxation times
    (see :func:`~flairwatch.phantom.physics.tissue_table`).
    """
    sig = tissue_signals(seq, jitter)
    flair = seq.kind == "ir"
    vox = tpl.voxel_mm

    gm_sig = np.float32(sig["gm"])
    wm_sig = np.float32(sig["wm"])
    if cortex_patches > 0:
        patches = np.clip(smooth_noise(subj.gm.shape, 14.0 / vox, rng) - 0.6, 0.0, 1.2)
        gm_term = subj.gm * (gm_sig * (1.0 + 0.25 * cortex_patches * patches))
    else:
        gm_term = subj.gm * gm_sig
    out = gm_term + subj.wm * wm_sig + subj.csf * np.float32(sig["csf"])  # on subj.box

    if flair and lining > 0:
        # Thin (1-2 mm) subependymal rim, bright on FLAIR in normal brains: not a lesion.
        # Beyond it, a faint diffuse halo (<= 10 % above WM, ~5 mm) that raters do not label.
        rim = np.clip(1.0 - (subj.d_vent - 0.5 * vox) / 2.0, 0.0, 1.0) * (subj.d_vent > 0)
        halo = np.exp(-subj.d_vent / np.float32(5.0)) * (subj.d_vent > 0)
        boost = rim * np.float32(0.7 * lining) + halo * np.float32(0.1 * lining)
        out += boost * (subj.wm + subj.gm) * wm_sig
    if flair and inflow > 0:
        # Inflowing CSF has not seen the inversion pulse: bright swirls in the ventricles and
        # in the cisterns just below them (3rd/4th ventricle, basal cisterns).
        k0 = max(int(tpl.vent_center_ijk[2] + 10.0 / vox) - subj.origin[2], 0)
        region = subj.vent_csf.copy()
        near = subj.csf[:, :, :k0] * (subj.d_vent[:, :, :k0] < 12.0)
        region[:, :, :k0] = np.maximum(region[:, :, :k0], near)
        blobs = np.clip(smooth_noise(subj.csf.shape, 6.0 / vox, rng) - 0.7, 0.0, 1.0)
        out += region * blobs * np.float32(1.6 * inflow * gm_sig)

    if les.volume_ml > 0:
        lut = lesion_signal_lut(
            seq.field_strength_t,
            sequence=seq.kind,
            tr_ms=seq.tr_ms,
            te_ms=seq.te_ms,
            ti_ms=seq.ti_ms,
            jitter=jitter,
        )
        sev_idx = les.severity * np.float32(len(lut) - 1)
        les_sig = np.interp(sev_idx, np.arange(len(lut)), lut).astype(np.float32)
        wm_box = subj.wm[les.box]
        out[les.box] += wm_box * les.fraction * (les_sig - wm_sig)

    full = np.zeros(tpl.shape, dtype=np.float32)
    full[subj.box] = out
    shell = subj.skin * np.float32(sig["muscle"])
    for name in ("bone", "marrow", "muscle", "fat"):
        shell += getattr(subj, name) * np.float32(sig[name])
    full.reshape(-1)[tpl.shell_idx] += shell
    return full
