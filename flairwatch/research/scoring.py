"""Scores of segmentations against case references: the pure core of ``validate``.

Every figure comes from :mod:`flairwatch.research.metrics`, which follows the definitions of the
2019 IEEE Transactions on Medical Imaging paper on standardized assessment of automatic WMH
segmentation (the WMH segmentation challenge): Dice, 95th-percentile Hausdorff distance (mm),
absolute volume difference (%), lesion-wise recall and F1 over 3-D connected components, the
case's excluded voxels left out. Three figures are added here: lesion recall counting only
reference lesions of at least ``LARGE_LESION_MM3`` mm^3, and the Dice of the segmenter's
intracranial and ventricle masks against the case's, where both have them.

Any segmenter with the :data:`Segment` signature can be scored, so the quality benchmark scores a
baseline through the same code. Arrays have axes (i, j, k) on the case image's grid.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, fields
from typing import Any, cast

import numpy as np

from flairwatch.research import metrics
from flairwatch.research.cases import CaseInput
from flairwatch.research.metrics import LOAD_BIN_NAMES, CaseScores
from flairwatch.volume import Volume

# Lesions from this size (mm^3) get their own recall figure: the quality gate's lesion size.
LARGE_LESION_MM3 = 30.0


@dataclass(frozen=True, eq=False)
class Segmentation:
    """What a segmenter made of one image, on the image's grid (axes (i, j, k))."""

    mask: np.ndarray  # WMH, non-zero = lesion
    intracranial: np.ndarray | None  # non-zero = inside, when the segmenter gives it
    seconds: float = 0.0
    warnings: tuple[str, ...] = ()
    ventricles: np.ndarray | None = None  # non-zero = lateral ventricles, when given


Segment = Callable[[Volume], Segmentation]


@dataclass(frozen=True)
class CaseResult:
    """Scores of one case (``scores`` per :func:`flairwatch.research.metrics.score_case`, all lesions).

    ``large_*`` count reference lesions of at least ``LARGE_LESION_MM3`` mm^3;
    ``intracranial_dice`` and ``ventricles_dice`` are NaN unless both the case and the segmenter
    have the mask.
    """

    case_id: str
    scores: metrics.CaseScores
    large_lesion_recall: float
    large_reference_lesions: int
    large_detected_lesions: int
    intracranial_dice: float
    acquisition: str | None
    field_strength_t: float | None
    seconds: float
    warnings: tuple[str, ...] = ()
    ventricles_dice: float = math.nan


@dataclass(frozen=True)
class CaseFailure:
    case_id: str
    message: str


_MEDIAN_FIELDS: tuple[str, ...] = tuple(
    f.name for f in fields(CaseScores) if f.type in ("float", float)
)


def _group_summary(scores: Sequence[CaseScores]) -> dict[str, float | int]:
    out: dict[str, float | int] = {"cases": len(scores)}
    for name in _MEDIAN_FIELDS:
        values = np.array([getattr(s, name) for s in scores], dtype=np.float64)
        finite = values[~np.isnan(values)]
        out[f"median_{name}"] = float(np.median(finite)) if finite.size else math.nan
    reference = sum(s.reference_lesions for s in scores)
    detected = sum(s.detected_lesions for s in scores)
    out["reference_lesions"] = reference
    out["detected_lesions"] = detected
    out["pooled_lesion_recall"] = detected / reference if reference else math.nan
    return out


def summarise(scores: Sequence[CaseScores]) -> dict[str, object]:
    """Medians overall and per lesion-load bin.

    Returns
    -------
    dict
        ``{"overall": group, "by_load_bin": {bin: group for every bin in LOAD_BIN_NAMES}}`` where
        a group holds ``cases``, ``median_<field>`` for each float field of CaseScores (NaN values
        left out; NaN when none is left), ``reference_lesions``, ``detected_lesions`` and
        ``pooled_lesion_recall`` (detected / reference lesions summed over the cases).
    """
    return {
        "overall": _group_summary(scores),
        "by_load_bin": {
            name: _group_summary([s for s in scores if s.load_bin == name])
            for name in LOAD_BIN_NAMES
        },
    }


def score_segmentation(case: CaseInput, seg: Segmentation, *, connectivity: int = 26) -> CaseResult:
    """Score one segmentation against its case's reference (excluded voxels left out)."""
    spacing = case.image.spacing
    scores = metrics.score_case(
        case.reference, seg.mask, spacing, connectivity=connectivity, exclude=case.exclude
    )
    ref, mask = metrics.prepare(case.reference, seg.mask, case.exclude)
    large = metrics.lesion_counts(
        ref, mask, spacing, connectivity=connectivity, min_reference_mm3=LARGE_LESION_MM3
    )
    icv_dice = math.nan
    if case.intracranial is not None and seg.intracranial is not None:
        icv_dice = metrics.dice(case.intracranial, seg.intracranial)
    vent_dice = math.nan
    if case.ventricles is not None and seg.ventricles is not None:
        vent_dice = metrics.dice(case.ventricles, seg.ventricles)
    return CaseResult(
        case_id=case.case_id,
        scores=scores,
        large_lesion_recall=large.recall,
        large_reference_lesions=large.reference_lesions,
        large_detected_lesions=large.detected_lesions,
        intracranial_dice=icv_dice,
        acquisition=case.acquisition,
        field_strength_t=case.field_strength_t,
        seconds=seg.seconds,
        warnings=seg.warnings,
        ventricles_dice=vent_dice,
    )


def _finite(values: Sequence[float]) -> list[float]:
    return [v for v in values if not math.isnan(v)]


def group_figures(results: Sequence[CaseResult]) -> dict[str, Any]:
    """Medians and pooled counts of one group (see :func:`summarise`).

    Adds pooled recall over reference lesions >= ``LARGE_LESION_MM3`` mm^3 and the median and
    minimum intracranial Dice over cases that have it. NaN where a group has nothing to count.
    """
    overall = summarise([r.scores for r in results])["overall"]
    out: dict[str, Any] = dict(cast(Mapping[str, Any], overall))
    ref = sum(r.large_reference_lesions for r in results)
    det = sum(r.large_detected_lesions for r in results)
    out["reference_lesions_30mm3"] = ref
    out["detected_lesions_30mm3"] = det
    out["pooled_lesion_recall_30mm3"] = det / ref if ref else math.nan
    icv = _finite([r.intracranial_dice for r in results])
    out["median_intracranial_dice"] = float(np.median(icv)) if icv else math.nan
    out["min_intracranial_dice"] = float(min(icv)) if icv else math.nan
    vent = _finite([r.ventricles_dice for r in results])
    out["median_ventricles_dice"] = float(np.median(vent)) if vent else math.nan
    return out


def summarise_results(results: Sequence[CaseResult]) -> dict[str, Any]:
    """Figures overall, per lesion-load bin (every bin listed) and per acquisition kind."""
    kinds = sorted({r.acquisition or "unknown" for r in results})
    return {
        "overall": group_figures(results),
        "by_load_bin": {
            name: group_figures([r for r in results if r.scores.load_bin == name])
            for name in LOAD_BIN_NAMES
        },
        "by_acquisition": {
            kind: group_figures([r for r in results if (r.acquisition or "unknown") == kind])
            for kind in kinds
        },
    }


def json_safe(value: Any) -> Any:
    """Copy of ``value`` with NaN and infinities replaced by None (JSON has no NaN)."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, Mapping):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [json_safe(v) for v in value]
    return value
