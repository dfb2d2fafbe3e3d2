"""Held-out checks of an exported model through the runtime path (training only).

Phantoms are regenerated in memory from their seeds and run through
:func:`flairwatch.engine.pipeline.analyse` exactly as ``flairwatch process`` would, then scored on
the series grid with :mod:`flairwatch.research.metrics`. ``altered`` variants change one
acquisition property of a held-out phantom beyond the generator's sampled ranges (timing, slice
thickness, noise, bias, look-alikes): a quick robustness probe built from the training generator
itself. It is not the independent shift suite, which training code never uses. Research use only.
"""

from __future__ import annotations

import dataclasses
import logging
import math
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from flairwatch.engine.analysis import analyse
from flairwatch.engine.infer import Segmenter
from flairwatch.engine.manifest import load_manifest
from flairwatch.phantom.params import PhantomParams
from flairwatch.research import metrics

log = logging.getLogger("train_model")

THRESHOLDS = tuple(round(t, 2) for t in np.arange(0.1, 0.86, 0.05))
MIN_LESION_MM3 = 10.0  # post-processing minimum lesion size used for the held-out check
RECALL_MIN_MM3 = 30.0  # lesion recall counts reference lesions of at least this size
# One acquisition change per variant, each beyond what sample_params draws.
ALTERATIONS: tuple[str, ...] = (
    "timing",  # TE 1.5x, TI 10 % short: darker lesions, brighter fluid
    "thick-slices",  # 6 mm slices with a 1.5 mm gap (2D stacks; 3D ones get "timing")
    "low-snr",  # noise 3x
    "strong-bias",  # bias field SD 0.7
    "look-alikes",  # cortex patches, inflow and ventricle lining all at full strength
)


def altered_params(params: PhantomParams, alteration: str) -> PhantomParams:
    """``params`` with one acquisition property pushed beyond the training ranges."""
    acq = params.acquisition
    if alteration == "timing":
        acq = dataclasses.replace(acq, te_ms=round(acq.te_ms * 1.5, 1), ti_ms=acq.ti_ms * 0.9)
        return dataclasses.replace(params, acquisition=acq)
    if alteration == "thick-slices":
        if acq.kind != "2d_axial":
            return altered_params(params, "timing")
        n = math.ceil(acq.n_slices * acq.slice_spacing_mm / 7.5)
        acq = dataclasses.replace(acq, slice_mm=6.0, gap_mm=1.5, n_slices=n)
        return dataclasses.replace(params, acquisition=acq)
    if alteration == "low-snr":
        return dataclasses.replace(params, noise_level=params.noise_level * 3.0)
    if alteration == "strong-bias":
        return dataclasses.replace(params, bias_strength=0.7)
    if alteration == "look-alikes":
        return dataclasses.replace(params, cortex_patches=1.0, inflow=1.0, ventricle_lining=1.0)
    raise ValueError(f"unknown alteration {alteration!r}; use one of {ALTERATIONS}")


def _median(values: Sequence[float | None]) -> float | None:
    finite = [v for v in values if v is not None and not math.isnan(v)]
    return float(np.median(finite)) if finite else None


def _pooled_recall(scores: Sequence[metrics.CaseScores]) -> float | None:
    reference = sum(s.reference_lesions for s in scores)
    detected = sum(s.detected_lesions for s in scores)
    return detected / reference if reference else None


# phantoms behind the exported threshold: with 8 (5 of them >= 1 mL) the median Dice is one
# case's and the chosen threshold jumped between exports of near-identical checkpoints
THRESHOLD_CASES = 24


def threshold_seeds(cached: Sequence[int], n: int = THRESHOLD_CASES) -> list[int]:
    """``n`` validation seeds for the threshold: the cached validation seeds first, then further
    seeds ending in 0 (the validation rule, so never trained on), never a held-out seed."""
    from flairwatch.phantom.bank import HELD_OUT_SEEDS
    from flairwatch.training.cache import is_validation

    held_out = set(HELD_OUT_SEEDS)
    seeds = [s for s in sorted(set(cached)) if is_validation("", s) and s not in held_out][:n]
    candidate = 10
    while len(seeds) < n:
        if candidate not in seeds and candidate not in held_out and is_validation("", candidate):
            seeds.append(candidate)
        candidate += 10
    return seeds


def choose_threshold_series(
    manifest_path: Path, seeds: Sequence[int], threads: int
) -> tuple[float, dict[str, Any]]:
    """Threshold with the best median series-grid Dice over validation phantoms with >= 1 mL.

    The validation phantoms are regenerated in memory from their seeds (same frozen generator)
    and run through the runtime path once; each candidate threshold is then applied inside the
    intracranial mask. Ties go to the smaller median absolute volume difference.
    """
    from flairwatch.phantom.generator import generate
    from flairwatch.phantom.params import sample_params

    segmenter = Segmenter(load_manifest(manifest_path), threads=threads)
    dices: dict[float, list[float]] = {t: [] for t in THRESHOLDS}
    voldiff: dict[float, list[float]] = {t: [] for t in THRESHOLDS}
    fp_ml: dict[float, list[float]] = {t: [] for t in THRESHOLDS}
    for seed in seeds:
        case = generate(sample_params(seed), with_ventricles=False)
        res = analyse(
            case.image, segmenter, threshold=0.5, min_lesion_mm3=MIN_LESION_MM3, connectivity=26
        )
        ref = np.asarray(case.wmh.data) > 0
        voxel_ml = case.image.voxel_volume_mm3 / 1000.0
        ref_ml = float(ref.sum()) * voxel_ml
        # the sweep skips the minimum-size cleaning (slow on 3D volumes); specks barely move Dice
        brain = np.asarray(res.intracranial) > 0 if res.intracranial is not None else True
        for t in THRESHOLDS:
            seg = (res.probability >= t) & brain
            if ref_ml >= 1.0:
                dices[t].append(metrics.dice(ref, seg))
                voldiff[t].append(abs(float(seg.sum()) * voxel_ml - ref_ml) / ref_ml * 100.0)
            elif ref_ml == 0.0:
                fp_ml[t].append(float(seg.sum()) * voxel_ml)
    med = {t: float(np.median(v)) if v else 0.0 for t, v in dices.items()}
    vd = {t: float(np.median(v)) if v else 0.0 for t, v in voldiff.items()}
    best = max(THRESHOLDS, key=lambda t: (round(med[t], 3), -vd[t]))
    summary = {
        "cases": len(seeds),
        "cases_with_1ml_or_more": len(dices[best]),
        "threshold": best,
        "median_dice_series_grid": med[best],
        "median_volume_difference_pct": vd[best],
        "median_false_positive_ml_lesion_free": _median(fp_ml[best]),
        "median_dice_by_threshold": {str(t): round(v, 4) for t, v in med.items()},
    }
    return float(best), summary


def held_out_check(
    manifest_path: Path,
    n_cases: int,
    threads: int,
    *,
    alterations: Sequence[str] = (),
) -> tuple[list[dict[str, Any]], dict[str, Any]]:
    """Generate ``n_cases`` held-out phantoms, segment them as the runtime does, score them.

    With ``alterations``, case i gets ``alterations[i % len(alterations)]`` applied.
    """
    from flairwatch.phantom.bank import HELD_OUT_SEEDS
    from flairwatch.phantom.generator import generate
    from flairwatch.phantom.params import sample_params

    manifest = load_manifest(manifest_path)
    segmenter = Segmenter(manifest, threads=threads)
    rows: list[dict[str, Any]] = []
    scores = []
    pool = sorted(HELD_OUT_SEEDS)
    picks = np.linspace(0, len(pool) - 1, num=min(n_cases, len(pool))).round().astype(int)
    for i, seed in enumerate(pool[j] for j in picks):
        params = sample_params(seed)
        change = alterations[i % len(alterations)] if alterations else "none"
        if alterations:
            if change == "thick-slices" and params.acquisition.kind != "2d_axial":
                change = "timing"  # what altered_params does to a 3D stack
            params = altered_params(params, change)
        case = generate(params)
        start = time.perf_counter()
        result = analyse(
            case.image,
            segmenter,
            threshold=manifest.threshold,
            min_lesion_mm3=MIN_LESION_MM3,
            connectivity=26,
        )
        seconds = time.perf_counter() - start
        mask = np.asarray(result.lesions.mask)
        icv = np.asarray(result.intracranial) if result.intracranial is not None else None
        ref = np.asarray(case.wmh.data).astype(np.int16)
        s = metrics.score_case(
            ref, mask, case.image.spacing, min_lesion_mm3_for_recall=RECALL_MIN_MM3
        )
        scores.append(s)
        vent = np.asarray(result.ventricles) > 0 if result.ventricles is not None else None
        acq = case.params.acquisition
        row = {
            "seed": seed,
            "alteration": change,
            "kind": acq.kind,
            "field_t": acq.field_strength_t,
            "slices": case.image.shape[2],
            "reference_ml": s.reference_ml,
            "segmented_ml": s.segmentation_ml,
            "dice": s.dice,
            "hd95_mm": s.hd95_mm,
            "volume_difference_pct": s.volume_difference_pct,
            "lesion_recall_30mm3": s.lesion_recall,
            "lesion_f1": s.lesion_f1,
            "false_positive_ml": s.false_positive_ml,
            "intracranial_dice": (
                metrics.dice(np.asarray(case.intracranial.data) > 0, icv > 0)
                if icv is not None
                else None
            ),
            "ventricle_dice": (
                metrics.dice(np.asarray(case.ventricles.data) > 0, vent)
                if vent is not None and case.ventricles is not None
                else None
            ),
            "seconds": seconds,
        }
        rows.append(row)
        log.info(
            "held-out %d (%s) %s %.1fT: ref %.2f mL seg %.2f mL dice %.3f recall %.3f "
            "FP %.2f mL (%.1f s)",
            seed,
            change,
            row["kind"],
            float(row["field_t"] or 0),
            s.reference_ml,
            s.segmentation_ml,
            s.dice,
            s.lesion_recall,
            s.false_positive_ml,
            seconds,
        )
    with_lesion = [r for r in rows if r["reference_ml"] >= 1.0]
    lesion_free = [r for r in rows if r["reference_ml"] == 0.0]
    summary = {
        "cases": len(rows),
        "alterations": list(alterations),
        "cases_with_1ml_or_more": len(with_lesion),
        "median_dice_1ml_or_more": _median([r["dice"] for r in with_lesion]),
        "median_volume_difference_pct_1ml_or_more": _median(
            [r["volume_difference_pct"] for r in with_lesion]
        ),
        "pooled_lesion_recall_30mm3": _pooled_recall(scores),
        "median_false_positive_ml_lesion_free": _median(
            [r["false_positive_ml"] for r in lesion_free]
        ),
        "median_intracranial_dice": _median([r["intracranial_dice"] for r in rows]),
        "median_ventricle_dice": _median([r["ventricle_dice"] for r in rows]),
        "median_seconds_per_series": _median([r["seconds"] for r in rows]),
    }
    return rows, summary
