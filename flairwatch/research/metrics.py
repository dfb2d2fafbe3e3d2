"""Segmentation quality figures: the one metrics module of flairwatch.

Used by the model's quality gate, ``validate`` and the model-change report. Definitions follow the
2019 IEEE TMI paper on standardized assessment of WMH segmentation (the WMH segmentation
challenge):

- Dice similarity coefficient, ``2 TP / (2 TP + FP + FN)`` over voxels.
- 95th-percentile Hausdorff distance in mm: the larger of the two directed 95th percentiles of the
  distances from the border voxels of one mask to the nearest border voxel of the other. Border
  voxels are foreground voxels with at least one of their 6 face neighbours in the background
  (outside the array counts as background). Distances are between voxel centres in mm, using the
  voxel spacing (exact for any rotated grid, not for sheared ones).
- Absolute volume difference ``|Vs - Vr| / Vr x 100`` in %.
- Lesion-wise recall and F1 with lesions as 3-D connected components (26-connected by default): a
  reference lesion is detected when at least one of its voxels is in the segmentation; a
  segmentation lesion is correct when at least one of its voxels is in the reference. Recall =
  detected / reference lesions, precision = correct / segmentation lesions, F1 their harmonic
  mean.

Voxels not to be scored (other pathology, artefacts) come as a separate boolean ``exclude`` mask
and are removed from both reference and segmentation before any figure is computed. The
reference is 0/1 WMH; for callers that still pass the older multi-label convention, a reference
label 2 is read as excluded too. Arrays are 3-D with axes (i, j, k) and ``spacing_mm`` gives the
voxel size along them in mm.

Edge cases (our choices, stated so reports can be read without the code):

- Dice: 1.0 when both masks are empty (perfect agreement), 0.0 when exactly one is.
- HD95: NaN when either mask is empty.
- Volume difference: NaN when the reference is empty (relative error undefined; read
  ``false_positive_ml`` for lesion-free cases).
- Lesion recall: NaN when there is no reference lesion (of the minimum size).
- Lesion F1: 1.0 when neither mask has a lesion, 0.0 when exactly one has none.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from flairwatch.engine.postprocess import at_least, connected_components
from flairwatch.errors import InputRejected
from flairwatch.research.distances import hd95, voxel_ml

logger = logging.getLogger(__name__)

REFERENCE_LESION = 1
REFERENCE_IGNORE = 2

# Lesion-load bins of the reference volume in mL, half-open [lower, upper): "0" is exactly no
# lesion voxel, and 30 mL exactly falls in ">30".
LOAD_BINS: tuple[tuple[str, float, float], ...] = (
    ("<1", 0.0, 1.0),
    ("1-5", 1.0, 5.0),
    ("5-15", 5.0, 15.0),
    ("15-30", 15.0, 30.0),
    (">30", 30.0, math.inf),
)
LOAD_BIN_NAMES: tuple[str, ...] = ("0", *(name for name, _, _ in LOAD_BINS))


@dataclass(frozen=True)
class CaseScores:
    """Quality figures of one segmentation against its reference (module docstring for rules).

    Volumes are in mL after removing the excluded voxels. ``lesion_recall``,
    ``reference_lesions`` and ``detected_lesions`` count only reference lesions of at least the
    minimum size passed to :func:`score_case`; ``lesion_f1`` always uses every lesion.
    ``false_positive_ml`` is the segmentation volume outside the reference.
    """

    dice: float
    hd95_mm: float
    volume_difference_pct: float
    lesion_recall: float
    lesion_f1: float
    reference_ml: float
    segmentation_ml: float
    false_positive_ml: float
    reference_lesions: int
    detected_lesions: int
    load_bin: str


@dataclass(frozen=True)
class LesionCounts:
    """Lesion-wise counts of one case (3-D connected components)."""

    reference_lesions: int
    detected_lesions: int
    segmentation_lesions: int
    correct_segmentation_lesions: int

    @property
    def recall(self) -> float:
        """Detected / reference lesions; NaN when there is no reference lesion."""
        if self.reference_lesions == 0:
            return math.nan
        return self.detected_lesions / self.reference_lesions

    @property
    def precision(self) -> float:
        """Correct / segmentation lesions; NaN when the segmentation has no lesion."""
        if self.segmentation_lesions == 0:
            return math.nan
        return self.correct_segmentation_lesions / self.segmentation_lesions

    @property
    def f1(self) -> float:
        """Harmonic mean of lesion recall and precision (edge cases in the module docstring)."""
        if self.reference_lesions == 0 and self.segmentation_lesions == 0:
            return 1.0
        if self.reference_lesions == 0 or self.segmentation_lesions == 0:
            return 0.0
        recall, precision = self.recall, self.precision
        if recall + precision == 0.0:
            return 0.0
        return 2.0 * recall * precision / (recall + precision)


def prepare(
    reference: npt.ArrayLike,
    segmentation: npt.ArrayLike,
    exclude: npt.ArrayLike | None = None,
) -> tuple[npt.NDArray[np.bool_], npt.NDArray[np.bool_]]:
    """Binary reference and segmentation with the excluded voxels removed from both.

    Parameters
    ----------
    reference : array_like of int, shape (I, J, K)
        0 background, 1 WMH (2, the older convention's "ignore", is read as excluded).
        A boolean array is read as 0/1.
    segmentation : array_like, shape (I, J, K)
        Non-zero voxels are WMH.
    exclude : array_like of bool, shape (I, J, K), optional
        Non-zero voxels are not scored.

    Raises
    ------
    InputRejected
        Shapes differ, or the reference has labels other than 0, 1 and 2.
    """
    ref = np.asarray(reference)
    seg = np.asarray(segmentation)
    if ref.shape != seg.shape or ref.ndim != 3:
        raise InputRejected(
            f"reference shape {ref.shape} and segmentation shape {seg.shape} must be the same 3-D "
            "grid; put the reference mask on the image grid"
        )
    if ref.dtype != np.bool_:
        # look only at the offending voxels: np.unique over a whole volume sorts it
        odd = ref[(ref != 0) & (ref != REFERENCE_LESION) & (ref != REFERENCE_IGNORE)]
        if odd.size:
            raise InputRejected(
                f"reference mask has labels {np.unique(odd).tolist()[:5]}; "
                "use 0 (background) and 1 (WMH), and a separate mask for voxels not to score"
            )
    keep = ref != REFERENCE_IGNORE
    if exclude is not None:
        ex = np.asarray(exclude)
        if ex.shape != ref.shape:
            raise InputRejected(
                f"exclusion mask shape {ex.shape} differs from the reference's {ref.shape}; "
                "put it on the image grid"
            )
        keep &= ex == 0
    return (ref == REFERENCE_LESION) & keep, (seg != 0) & keep


def dice(a: npt.ArrayLike, b: npt.ArrayLike) -> float:
    """Dice similarity coefficient of two binary masks (non-zero = foreground).

    ``2 |A and B| / (|A| + |B|)``, i.e. ``2 TP / (2 TP + FP + FN)``; 1.0 when both are empty.
    """
    a_bin = np.asarray(a) != 0
    b_bin = np.asarray(b) != 0
    total = int(np.count_nonzero(a_bin)) + int(np.count_nonzero(b_bin))
    if total == 0:
        return 1.0
    return 2.0 * int(np.count_nonzero(a_bin & b_bin)) / total


def volume_difference_pct(reference: npt.ArrayLike, segmentation: npt.ArrayLike) -> float:
    """Absolute volume difference ``|Vs - Vr| / Vr x 100`` in %; NaN for an empty reference.

    Voxel counts suffice: both masks lie on the same grid.
    """
    vr = int(np.count_nonzero(reference))
    vs = int(np.count_nonzero(segmentation))
    if vr == 0:
        return math.nan
    return abs(vs - vr) / vr * 100.0


@dataclass(frozen=True, eq=False)
class LesionMatch:
    """Which lesions (3-D connected components) of each mask overlap the other mask.

    Attributes
    ----------
    reference_volumes_mm3 : ndarray of float, shape (n_reference,)
        Volume of each reference lesion, mm^3.
    reference_detected : ndarray of bool, shape (n_reference,)
        True where the reference lesion shares at least one voxel with the segmentation.
    segmentation_lesions : int
        Number of segmentation lesions.
    correct_segmentation_lesions : int
        Segmentation lesions sharing at least one voxel with the reference.
    """

    reference_volumes_mm3: npt.NDArray[np.float64]
    reference_detected: npt.NDArray[np.bool_]
    segmentation_lesions: int
    correct_segmentation_lesions: int

    def counts(self, min_reference_mm3: float = 0.0) -> LesionCounts:
        """Counts with reference lesions below ``min_reference_mm3`` (mm^3) left out."""
        big = at_least(self.reference_volumes_mm3, min_reference_mm3)
        return LesionCounts(
            reference_lesions=int(np.count_nonzero(big)),
            detected_lesions=int(np.count_nonzero(self.reference_detected & big)),
            segmentation_lesions=self.segmentation_lesions,
            correct_segmentation_lesions=self.correct_segmentation_lesions,
        )


def match_lesions(
    reference: npt.ArrayLike,
    segmentation: npt.ArrayLike,
    spacing_mm: Sequence[float] = (1.0, 1.0, 1.0),
    *,
    connectivity: int = 26,
) -> LesionMatch:
    """Label both masks into lesions and record which overlap the other mask.

    Parameters
    ----------
    reference, segmentation : array_like, shape (I, J, K)
        Binary masks (non-zero = lesion), ignore voxels already removed (see :func:`prepare`).
    spacing_mm : sequence of 3 float
        Voxel size in mm, for the lesion volumes.
    connectivity : {6, 18, 26}
        Neighbourhood that joins voxels into one lesion.
    """
    voxel_mm3 = voxel_ml(spacing_mm) * 1000.0
    ref = np.asarray(reference) != 0
    seg = np.asarray(segmentation) != 0
    ref_labels, n_ref = connected_components(ref, connectivity)
    seg_labels, n_seg = connected_components(seg, connectivity)
    overlap = ref & seg
    seg_hit = np.unique(seg_labels[overlap])
    detected = np.zeros(n_ref + 1, dtype=bool)
    detected[ref_labels[overlap]] = True
    volumes = np.bincount(ref_labels.ravel(), minlength=n_ref + 1) * voxel_mm3
    return LesionMatch(
        reference_volumes_mm3=volumes[1:].astype(np.float64),
        reference_detected=detected[1:],
        segmentation_lesions=n_seg,
        correct_segmentation_lesions=int(seg_hit.size),
    )


def lesion_counts(
    reference: npt.ArrayLike,
    segmentation: npt.ArrayLike,
    spacing_mm: Sequence[float] = (1.0, 1.0, 1.0),
    *,
    connectivity: int = 26,
    min_reference_mm3: float = 0.0,
) -> LesionCounts:
    """Lesion counts of two binary masks (see :func:`match_lesions` for the parameters).

    Reference lesions smaller than ``min_reference_mm3`` (mm^3) are left out of
    ``reference_lesions`` and ``detected_lesions``; segmentation lesions are always all counted.
    """
    match = match_lesions(reference, segmentation, spacing_mm, connectivity=connectivity)
    return match.counts(min_reference_mm3)


def lesion_recall_min_size(
    reference: npt.ArrayLike,
    segmentation: npt.ArrayLike,
    spacing_mm: Sequence[float],
    min_mm3: float,
    *,
    connectivity: int = 26,
    exclude: npt.ArrayLike | None = None,
) -> float:
    """Lesion recall over reference lesions of at least ``min_mm3`` mm^3 (``exclude`` not scored).

    NaN when the reference has no lesion that large.
    """
    ref, seg = prepare(reference, segmentation, exclude)
    counts = lesion_counts(
        ref, seg, spacing_mm, connectivity=connectivity, min_reference_mm3=min_mm3
    )
    return counts.recall


def load_bin(ml: float) -> str:
    """Lesion-load bin of a reference volume in mL: "0", "<1", "1-5", "5-15", "15-30", ">30".

    Bins are half-open [lower, upper); "0" means exactly no lesion.
    """
    if not (ml >= 0.0):  # also catches NaN
        raise ValueError(f"lesion load must be a volume >= 0 mL, got {ml!r}")
    if ml == 0.0:
        return "0"
    for name, lower, upper in LOAD_BINS:
        if lower <= ml < upper:
            return name
    raise AssertionError("unreachable: the last bin is open-ended")


def score_case(
    reference: np.ndarray,
    segmentation: np.ndarray,
    spacing_mm: tuple[float, float, float],
    *,
    connectivity: int = 26,
    min_lesion_mm3_for_recall: float = 0.0,
    exclude: np.ndarray | None = None,
) -> CaseScores:
    """All quality figures of one case.

    Parameters
    ----------
    reference : ndarray of int, shape (I, J, K)
        0 background, 1 WMH (2, the older convention's "ignore", counts as excluded).
    segmentation : ndarray, shape (I, J, K)
        Non-zero = WMH, on the reference's grid.
    spacing_mm : tuple of 3 float
        Voxel size along (i, j, k) in mm.
    connectivity : {6, 18, 26}
        Lesion definition for the lesion-wise figures.
    min_lesion_mm3_for_recall : float
        Only reference lesions of at least this volume (mm^3) count for lesion recall.
    exclude : ndarray of bool, shape (I, J, K), optional
        Voxels removed from both masks before scoring.
    """
    ml = voxel_ml(spacing_mm)
    ref, seg = prepare(reference, segmentation, exclude)
    match = match_lesions(ref, seg, spacing_mm, connectivity=connectivity)
    counts = match.counts()
    recall_counts = match.counts(min_lesion_mm3_for_recall)
    reference_ml = int(np.count_nonzero(ref)) * ml
    return CaseScores(
        dice=dice(ref, seg),
        hd95_mm=hd95(ref, seg, spacing_mm),
        volume_difference_pct=volume_difference_pct(ref, seg),
        lesion_recall=recall_counts.recall,
        lesion_f1=counts.f1,
        reference_ml=reference_ml,
        segmentation_ml=int(np.count_nonzero(seg)) * ml,
        false_positive_ml=int(np.count_nonzero(seg & ~ref)) * ml,
        reference_lesions=recall_counts.reference_lesions,
        detected_lesions=recall_counts.detected_lesions,
        load_bin=load_bin(reference_ml),
    )
