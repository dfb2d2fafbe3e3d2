"""Training batches: lesion-aware and hard-negative crop sampling plus domain randomisation.

Cached cases (:class:`flairwatch.training.data.CaseData`, model grid, axes (K, H, W)) become
batches of crops (N, C, crop, crop): C adjacent slices around a centre slice, with the WMH,
intracranial and ventricle targets of the centre slice. Randomisation (see
:mod:`flairwatch.training.randomise`) simulates thick slices from thin-slice cases, warps the
anatomy, remaps tissue intensities and adds bright structures that are not lesions.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from flairwatch.training import randomise as rz
from flairwatch.training.data import NO_LABEL, CaseData

THIN_SLICE_MM = 1.6  # cases with slices this close can simulate thick-slice acquisitions
BRIGHT = 1.25  # normalised intensity above which a non-lesion pixel counts as a look-alike


@dataclass(frozen=True)
class Batch:
    """A batch as numpy arrays: x (N, C, h, w) float32; targets and weights (N, h, w) float32."""

    x: np.ndarray
    wmh: np.ndarray
    wmh_weight: np.ndarray
    icv: np.ndarray
    icv_weight: np.ndarray
    vent: np.ndarray
    vent_weight: np.ndarray


def hard_negative_weights(cases: list[CaseData], lesion_free_factor: float = 2.0) -> np.ndarray:
    """Per-case sampling weights (sum 1): lesion-free cases ``lesion_free_factor`` times likelier."""
    w = np.array([1.0 if c.lesion_slices.size else lesion_free_factor for c in cases])
    return np.asarray(w / w.sum())


def _pick_slice(case: CaseData, rng: np.random.Generator) -> tuple[int, bool]:
    """Lesion-aware slice choice: 40 % lesion slices, most others inside the head, some anywhere."""
    r = rng.random()
    if r < 0.4 and case.lesion_slices.size:
        return int(rng.choice(case.lesion_slices)), True
    if r < 0.9 and case.head_slices.size:
        return int(rng.choice(case.head_slices)), False
    return int(rng.integers(case.image.shape[0])), False


def _crop_origin(
    case: CaseData, k: int, on_lesion: bool, size: int, rng: np.random.Generator
) -> tuple[int, int]:
    """Top-left corner of a ``size`` window: on a lesion, on a bright look-alike, or in the head."""
    h, w = case.image.shape[1:]
    centre: np.ndarray | None = None
    if on_lesion and rng.random() < 0.7:
        pts = np.argwhere(case.wmh[k] == 1)
        if pts.size:
            centre = pts[rng.integers(len(pts))] + rng.integers(-size // 4, size // 4 + 1, size=2)
    elif rng.random() < 0.4:  # hard negatives: bright pixels that are not lesions
        pts = np.argwhere((case.image[k] > BRIGHT) & (case.wmh[k] == 0))
        if pts.size:
            centre = pts[rng.integers(len(pts))]
    if centre is None:
        pts = np.argwhere(case.image[k] > 0.2)  # head, scalp included: its fat is a look-alike
        centre = pts[rng.integers(len(pts))] if pts.size else np.array([h // 2, w // 2])
    y0 = int(np.clip(centre[0] - size // 2, 0, max(0, h - size)))
    x0 = int(np.clip(centre[1] - size // 2, 0, max(0, w - size)))
    return y0, x0


def _slab_indices(
    case: CaseData, k: int, channels: int, rng: np.random.Generator, thick_p: float
) -> np.ndarray:
    """Slice indices (C, t): channel j averages t slices around k + (j - C//2) * spacing."""
    half = channels // 2
    n = case.image.shape[0]
    spacing, t = 1, 1
    if 0.0 < case.slice_mm <= THIN_SLICE_MM and rng.random() < thick_p:
        spacing = int(rng.integers(2, 7))  # 2..6 thin slices apart: 2-6 mm slices from 1 mm data
        t = max(1, spacing - int(rng.integers(0, 2)))  # with or without a 1-slice gap
    centres = k + (np.arange(channels) - half) * spacing
    lo = -((t - 1) // 2)
    return np.clip(centres[:, None] + np.arange(lo, lo + t)[None, :], 0, n - 1)


def _slab_label(stack: np.ndarray, value: int = 1) -> np.ndarray:
    """Partial-volume rule over a slab (t, h, w): the label where >= half the slab carries it."""
    return np.asarray((stack == value).mean(axis=0) >= 0.5)


def sample_crop(
    case: CaseData,
    rng: np.random.Generator,
    *,
    crop: int,
    channels: int,
    do_augment: bool = True,
    thick_p: float = 0.3,
    warp_p: float = 0.6,
    motion_p: float = 0.3,
) -> tuple[np.ndarray, list[np.ndarray]]:
    """One crop stack (C, crop, crop) float32 and its labels [wmh 0/1/2, icv, vent] (crop, crop)."""
    k, on_lesion = _pick_slice(case, rng)
    pad = crop // 8 if do_augment else 0
    size = min(crop + 2 * pad, case.image.shape[1], case.image.shape[2])
    pad = (size - crop) // 2
    y0, x0 = _crop_origin(case, k, on_lesion, size, rng)
    win = (slice(y0, y0 + size), slice(x0, x0 + size))
    idx = _slab_indices(case, k, channels, rng, thick_p if do_augment else 0.0)
    c, t = idx.shape
    if do_augment and rng.random() < motion_p:
        # the whole slice moves, so the ghosts of the bright scalp cross the crop as they would
        full = case.image[idx.ravel()].astype(np.float32)
        axis = int(rng.integers(1, 3))
        full = rz.motion_during_scan(full, rz.random_trajectory(full.shape[axis], rng), axis)
        raw = full[:, win[0], win[1]]
    else:
        raw = case.image[idx.ravel()][:, win[0], win[1]].astype(np.float32)
    tissue = None
    if case.tissue is not None:
        tissue = case.tissue[idx.ravel()][:, win[0], win[1]]
    if do_augment and tissue is not None and rng.random() < 0.8:
        # before the slab average: a thick slice averages the remapped thin-slice signals
        raw = rz.remap_tissues(raw, tissue, rz.random_tissue_factors(rng))
    x = raw.reshape(c, t, size, size).mean(axis=1)
    if tissue is not None:
        tissue = tissue.reshape(c, t, size, size)[:, t // 2]
    slab = idx[c // 2]
    wmh_slab = case.wmh[slab][:, win[0], win[1]]
    wmh = _slab_label(wmh_slab).astype(np.uint8)
    wmh[(wmh_slab == 2).any(axis=0) & (wmh == 0)] = 2
    icv_slab = case.icv[slab][:, win[0], win[1]]
    icv = np.where(icv_slab[0] == NO_LABEL, NO_LABEL, _slab_label(icv_slab)).astype(np.uint8)
    if case.vent is None:
        vent = np.full(wmh.shape, NO_LABEL, dtype=np.uint8)
    else:
        vent = _slab_label(case.vent[slab][:, win[0], win[1]]).astype(np.uint8)
    labels = [wmh, icv, vent]
    if do_augment and rng.random() < warp_p:
        coords = rz.random_warp((size, size), rng)
        x = np.asarray(rz.warp(x, coords, labels=False))
        labels = [rz.warp(lab, coords, labels=True) for lab in labels]
        if tissue is not None:
            tissue = rz.warp(tissue, coords, labels=True)
    inner = (slice(pad, pad + crop), slice(pad, pad + crop))
    x = x[:, inner[0], inner[1]]
    labels = [lab[inner] for lab in labels]
    if tissue is not None:
        tissue = tissue[:, inner[0], inner[1]]
    if do_augment:
        if rng.random() < 0.5:  # left-right: W runs along patient Left
            x = x[:, :, ::-1]
            labels = [lab[:, ::-1] for lab in labels]
            tissue = tissue[:, :, ::-1] if tissue is not None else None
        x = rz.randomise_intensities(x, tissue, labels[0] == 1, rng)
    return np.ascontiguousarray(x, dtype=np.float32), [np.ascontiguousarray(lab) for lab in labels]


def sample_batch(
    cases: list[CaseData],
    rng: np.random.Generator,
    *,
    batch_size: int,
    crop: int,
    channels: int,
    do_augment: bool = True,
    weights: np.ndarray | None = None,
) -> Batch:
    """Draw ``batch_size`` randomised crops (crop x crop pixels) from randomly chosen cases.

    ``weights`` (one per case, summing to 1) makes some cases likelier; uniform when None.
    """
    xs: list[np.ndarray] = []
    cols: list[list[np.ndarray]] = [[], [], [], [], [], []]
    for _ in range(batch_size):
        pick = rng.integers(len(cases)) if weights is None else rng.choice(len(cases), p=weights)
        x, (w_lab, i_lab, v_lab) = sample_crop(
            cases[int(pick)], rng, crop=crop, channels=channels, do_augment=do_augment
        )
        xs.append(x)
        for col, arr in zip(
            cols,
            (
                w_lab == 1,
                w_lab != 2,
                i_lab == 1,
                i_lab != NO_LABEL,
                v_lab == 1,
                v_lab != NO_LABEL,
            ),
            strict=True,
        ):
            col.append(arr.astype(np.float32))
    return Batch(np.stack(xs), *(np.stack(col) for col in cols))
