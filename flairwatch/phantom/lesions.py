"""White-matter hyperintensities of irregular shape, placed on the template grid.

A lesion "score" is built over the white matter: a periventricular term (caps at the horns,
bands along the bodies), smooth noise at two scales (patchy, irregular borders) and small bumps
at random deep centres (punctate lesions). The score is thresholded so that the lesion volume
matches the target load; at high loads the periventricular and deep regions merge (confluent).
Everything is in the template's voxel grid (axes i, j, k; distances in mm).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from flairwatch.phantom.anatomy import Subject, Template
from flairwatch.phantom.noise import smooth_noise

FloatArray = npt.NDArray[np.float32]
EDGE_SOFTNESS = 0.12  # score units over which a lesion border ramps from 0 to 1


@dataclass(frozen=True, eq=False)
class LesionMaps:
    """Lesion fraction of the WM (0..1) and severity (0 faint .. 1 bright) inside ``box``.

    ``box`` indexes the subject's arrays (``Subject.box``), ``tpl_box`` the template grid.
    """

    fraction: FloatArray
    severity: FloatArray
    box: tuple[slice, slice, slice]
    tpl_box: tuple[slice, slice, slice]
    volume_ml: float


def _wm_box(wm: FloatArray, margin: int) -> tuple[slice, slice, slice]:
    idx = np.argwhere(wm > 0.2)
    lo = np.maximum(idx.min(axis=0) - margin, 0)
    hi = np.minimum(idx.max(axis=0) + margin + 1, wm.shape)
    return (
        slice(int(lo[0]), int(hi[0])),
        slice(int(lo[1]), int(hi[1])),
        slice(int(lo[2]), int(hi[2])),
    )


def _shift(
    box: tuple[slice, slice, slice], origin: tuple[int, int, int]
) -> tuple[slice, slice, slice]:
    return (
        slice(box[0].start + origin[0], box[0].stop + origin[0]),
        slice(box[1].start + origin[1], box[1].stop + origin[1]),
        slice(box[2].start + origin[2], box[2].stop + origin[2]),
    )


def _add_blobs(
    score: FloatArray,
    eligible: npt.NDArray[np.bool_],
    count: int,
    vox: float,
    rng: np.random.Generator,
) -> None:
    """Add ``count`` roughly spherical bumps (radius 1-4 mm) at random eligible voxels."""
    cand = np.argwhere(eligible)
    if count <= 0 or cand.size == 0:
        return
    picks = cand[rng.integers(0, len(cand), size=count)]
    for c in picks:
        radius_vox = rng.uniform(1.0, 4.0) / vox
        height = rng.uniform(0.9, 1.6)
        aniso = rng.uniform(0.7, 1.4, size=3)
        r = int(np.ceil(3.0 * radius_vox)) + 1
        lo = np.maximum(c - r, 0)
        hi = np.minimum(c + r + 1, score.shape)
        grids = np.ogrid[lo[0] : hi[0], lo[1] : hi[1], lo[2] : hi[2]]
        d2 = sum(
            ((g - ci) / (radius_vox * a)) ** 2 for g, ci, a in zip(grids, c, aniso, strict=True)
        )
        score[lo[0] : hi[0], lo[1] : hi[1], lo[2] : hi[2]] += height * np.exp(-0.5 * d2)


def make_lesions(
    tpl: Template,
    subj: Subject,
    *,
    load_ml: float,
    periventricular: float,
    severity_range: tuple[float, float],
    rng: np.random.Generator,
) -> LesionMaps:
    """Draw lesions totalling about ``load_ml`` mL of WM.

    Parameters
    ----------
    load_ml : float
        Target lesion volume in mL (0 gives no lesions).
    periventricular : float
        0..1, weight of periventricular caps/bands against deep patchy and punctate lesions.
    severity_range : (float, float)
        Lowest and highest lesion severity (0 ~ 1.3x WM signal, 1 ~ 2-3x WM on FLAIR).
    """
    vox = tpl.voxel_mm
    box = _wm_box(subj.wm, margin=2)
    tpl_box = _shift(box, subj.origin)
    shape = subj.wm[box].shape
    empty = np.zeros(shape, dtype=np.float32)
    if load_ml <= 0:
        return LesionMaps(empty, empty, box, tpl_box, 0.0)
    wm = subj.wm[box]
    d_vent = subj.d_vent[box]
    d_ext = tpl.d_ext[tpl_box]

    # Caps at the frontal and occipital horns: stronger away from the ventricles' middle (j = A-P).
    j = np.arange(tpl_box[1].start, tpl_box[1].stop, dtype=np.float32)[None, :, None]
    along = np.abs(j - tpl.vent_center_ijk[1]) * vox
    cap = 0.75 + 0.5 * np.clip((along - 10.0) / 25.0, 0.0, 1.0)
    pv_width = 3.0 + 7.0 * min(load_ml / 30.0, 1.0)  # mm; confluent halo at high burden
    pv = np.exp(-np.maximum(d_vent - 0.5, 0.0) / pv_width) * cap

    coarse = smooth_noise(shape, 9.0 / vox, rng)
    fine = smooth_noise(shape, 3.0 / vox, rng)
    score = (
        (0.6 + 1.0 * periventricular) * pv
        + (0.25 + 0.25 * (1.0 - periventricular)) * coarse
        + 0.22 * fine
    ).astype(np.float32)
    # Supratentorial WM only (no cerebellar/brainstem lesions): above ~30 mm below the
    # ventricles' centre.
    k = np.arange(tpl_box[2].start, tpl_box[2].stop, dtype=np.float32)[None, None, :]
    supra = k > tpl.vent_center_ijk[2] - 30.0 / vox
    eligible = (wm > 0.6) & (d_vent > 1.0) & (d_ext > 2.0) & supra
    deep = eligible & (d_vent > 8.0) & (wm > 0.7)
    n_blobs = int(rng.poisson(2.0 + 1.5 * np.sqrt(load_ml) * (1.2 - periventricular)))
    _add_blobs(score, deep, min(n_blobs, 60), vox, rng)
    score = np.where(eligible, score, -10.0).astype(np.float32)

    # Threshold so that the voxels counted as lesion (fraction of the voxel >= 0.5, the truth
    # rule) total the target; refine a few times since the soft edge shifts the count.
    voxel_ml = vox**3 / 1000.0
    values = np.sort(score[eligible])[::-1]
    n_target = int(np.clip(load_ml / voxel_ml, 1, values.size - 1))
    thr = float(values[n_target - 1])
    frac = empty
    volume = 0.0
    for _ in range(6):
        frac = np.clip((score - thr) / EDGE_SOFTNESS + 0.5, 0.0, 1.0).astype(np.float32)
        volume = float(np.count_nonzero(frac * wm >= 0.5)) * voxel_ml
        if volume <= 0 or abs(volume - load_ml) < 0.03 * load_ml:
            break
        n_target = int(np.clip(n_target * load_ml / volume, 1, values.size - 1))
        thr = float(values[n_target - 1])

    lo, hi = severity_range
    sev_noise = smooth_noise(shape, 12.0 / vox, rng)
    core = np.clip((score - thr) / (4.0 * EDGE_SOFTNESS), 0.0, 1.0)
    severity = lo + (hi - lo) * np.clip(0.35 + 0.45 * core + 0.3 * sev_noise, 0.0, 1.0)
    return LesionMaps(frac, severity.astype(np.float32), box, tpl_box, volume)
