"""Metrics checks, each against an outside oracle named beside it.

Definitions: 2019 IEEE TMI paper on standardized assessment of WMH segmentation (the WMH
segmentation challenge). Oracles: SimpleITK LabelOverlapMeasuresImageFilter (Dice),
HausdorffDistanceImageFilter (maximum distance), a scipy.spatial.cKDTree over border points
built here independently (95th percentile), scipy.ndimage.label and SimpleITK
ConnectedComponentImageFilter (lesion counting), and hand-worked examples.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import SimpleITK as sitk
from scipy import ndimage
from scipy.spatial import cKDTree

from flairwatch.errors import InputRejected
from flairwatch.research.distances import hd95, percentile_hausdorff
from flairwatch.research.metrics import (
    LOAD_BIN_NAMES,
    CaseScores,
    dice,
    lesion_counts,
    lesion_recall_min_size,
    load_bin,
    score_case,
    volume_difference_pct,
)
from flairwatch.research.scoring import summarise


def _img(mask: np.ndarray, spacing: tuple[float, float, float]) -> sitk.Image:
    """SimpleITK image of an (i, j, k) array (SimpleITK arrays are (k, j, i))."""
    img = sitk.GetImageFromArray(np.ascontiguousarray(mask.transpose(2, 1, 0)).astype(np.uint8))
    img.SetSpacing(spacing)
    return img


def _box(
    shape: tuple[int, int, int], lo: tuple[int, int, int], hi: tuple[int, int, int]
) -> np.ndarray:
    mask = np.zeros(shape, dtype=np.uint8)
    mask[lo[0] : hi[0], lo[1] : hi[1], lo[2] : hi[2]] = 1
    return mask


def _blobs(seed: int, shape: tuple[int, int, int] = (40, 40, 24)) -> tuple[np.ndarray, np.ndarray]:
    """Two overlapping irregular masks from smoothed noise (fixed seed)."""
    rng = np.random.default_rng(seed)
    field = ndimage.gaussian_filter(rng.standard_normal(shape), 2.5)
    noise = ndimage.gaussian_filter(rng.standard_normal(shape), 1.5)
    a = field > np.percentile(field, 92)
    b = (field + 0.3 * noise) > np.percentile(field + 0.3 * noise, 91)
    return a.astype(np.uint8), b.astype(np.uint8)


# --- Dice -----------------------------------------------------------------------------------------


def test_dice_two_cubes_hand_worked() -> None:
    # Hand-worked: two 10^3 cubes offset by 5 voxels along i overlap in 5 x 10 x 10 = 500 voxels;
    # Dice = 2 x 500 / (1000 + 1000) = 0.5.
    a = _box((30, 20, 20), (2, 2, 2), (12, 12, 12))
    b = _box((30, 20, 20), (7, 2, 2), (17, 12, 12))
    assert dice(a, b) == pytest.approx(0.5)
    # Same by 2TP / (2TP + FP + FN): TP = 500, FP = 500, FN = 500.
    assert dice(a, b) == pytest.approx(2 * 500 / (2 * 500 + 500 + 500))


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_dice_matches_sitk_label_overlap(seed: int) -> None:
    a, b = _blobs(seed)
    overlap = sitk.LabelOverlapMeasuresImageFilter()  # SimpleITK oracle for Dice
    overlap.Execute(_img(a, (1.0, 1.0, 1.0)), _img(b, (1.0, 1.0, 1.0)))
    assert dice(a, b) == pytest.approx(overlap.GetDiceCoefficient(), abs=1e-12)
    assert 0.0 < dice(a, b) < 1.0


def test_dice_edge_cases() -> None:
    empty = np.zeros((5, 5, 5), dtype=np.uint8)
    one = empty.copy()
    one[2, 2, 2] = 1
    assert dice(empty, empty) == 1.0  # our stated choice: both empty = perfect agreement
    assert dice(empty, one) == 0.0
    assert dice(one, one) == 1.0


# --- Hausdorff distances ----------------------------------------------------------------------


def _kdtree_hd(
    a: np.ndarray, b: np.ndarray, spacing: tuple[float, float, float], q: float
) -> float:
    """Independent oracle: border voxels by explicit neighbour shifts, distances by cKDTree."""

    def border_points(mask: np.ndarray) -> np.ndarray:
        padded = np.pad(mask.astype(bool), 1)
        inner = padded[1:-1, 1:-1, 1:-1].copy()
        for axis in range(3):
            for step in (-1, 1):
                inner &= np.roll(padded, step, axis=axis)[1:-1, 1:-1, 1:-1]
        edge = mask.astype(bool) & ~inner
        return np.argwhere(edge) * np.asarray(spacing)

    pa, pb = border_points(a), border_points(b)
    d_ab, _ = cKDTree(pb).query(pa)
    d_ba, _ = cKDTree(pa).query(pb)
    return float(max(np.percentile(d_ab, q), np.percentile(d_ba, q)))


@pytest.mark.parametrize("spacing", [(1.0, 1.0, 1.0), (0.5, 0.7, 3.0)])
@pytest.mark.parametrize("seed", [4, 5])
def test_hd95_matches_kdtree_over_border_points(
    seed: int, spacing: tuple[float, float, float]
) -> None:
    a, b = _blobs(seed)
    expected = _kdtree_hd(a, b, spacing, 95.0)  # scipy.spatial.cKDTree oracle
    assert hd95(a, b, spacing) == pytest.approx(expected, rel=1e-9)
    assert hd95(a, b, spacing) > 0.0


def test_hd95_touching_the_array_edge_matches_kdtree() -> None:
    a = _box((12, 12, 6), (0, 0, 0), (8, 9, 6))  # touches the array faces
    b = _box((12, 12, 6), (3, 2, 0), (12, 12, 4))
    spacing = (0.9, 0.9, 4.0)
    assert hd95(a, b, spacing) == pytest.approx(_kdtree_hd(a, b, spacing, 95.0), rel=1e-9)


SITK_CASES = [
    # (name, a, b): configurations where the border Hausdorff distance equals the all-voxel one.
    (
        "disjoint cubes",
        _box((40, 30, 30), (2, 2, 2), (10, 10, 10)),
        _box((40, 30, 30), (25, 12, 5), (33, 20, 15)),
    ),
    (
        "shifted cubes",
        _box((30, 30, 30), (5, 5, 5), (17, 17, 17)),
        _box((30, 30, 30), (8, 5, 5), (20, 17, 17)),
    ),
    (
        "cube and bar",
        _box((30, 30, 30), (3, 3, 3), (9, 9, 9)),
        _box((30, 30, 30), (15, 3, 3), (17, 25, 5)),
    ),
]


@pytest.mark.parametrize(("name", "a", "b"), SITK_CASES, ids=[c[0] for c in SITK_CASES])
@pytest.mark.parametrize("spacing", [(1.0, 1.0, 1.0), (0.8, 1.1, 2.5)])
def test_max_distance_matches_sitk_hausdorff(
    name: str, a: np.ndarray, b: np.ndarray, spacing: tuple[float, float, float]
) -> None:
    hd = sitk.HausdorffDistanceImageFilter()  # SimpleITK oracle: maximum distance in mm
    hd.Execute(_img(a, spacing), _img(b, spacing))
    assert percentile_hausdorff(a, b, spacing, 100.0) == pytest.approx(
        hd.GetHausdorffDistance(), rel=1e-9
    )
    assert hd95(a, b, spacing) <= hd.GetHausdorffDistance() + 1e-9


def test_hd_hand_worked_shift() -> None:
    # Hand-worked: a cube shifted by 3 voxels of 2 mm along i: every border voxel on the moved
    # faces is 6 mm from the other border, and no border voxel is farther.
    a = _box((30, 20, 20), (5, 5, 5), (15, 15, 15))
    b = _box((30, 20, 20), (8, 5, 5), (18, 15, 15))
    assert percentile_hausdorff(a, b, (2.0, 1.0, 1.0), 100.0) == pytest.approx(6.0)


def test_hd95_empty_is_nan() -> None:
    a = _box((10, 10, 10), (2, 2, 2), (5, 5, 5))
    empty = np.zeros_like(a)
    assert math.isnan(hd95(a, empty, (1.0, 1.0, 1.0)))
    assert math.isnan(hd95(empty, a, (1.0, 1.0, 1.0)))
    assert hd95(a, a, (1.0, 1.0, 1.0)) == 0.0


# --- Volume difference -----------------------------------------------------------------------


def test_volume_difference_hand_worked() -> None:
    # Hand-worked: Vr = 1000 voxels, Vs = 750 voxels -> |750 - 1000| / 1000 x 100 = 25 %.
    ref = _box((20, 20, 20), (0, 0, 0), (10, 10, 10))
    seg = _box((20, 20, 20), (0, 0, 0), (10, 10, 10))
    seg[:, :, 7:] = 0  # 10 x 10 x 7 = 700
    seg[15:20, 15:20, 18:20] = 1  # +50 elsewhere
    assert volume_difference_pct(ref, seg) == pytest.approx(25.0)
    assert math.isnan(volume_difference_pct(np.zeros_like(ref), seg))


# --- Lesion counting ---------------------------------------------------------------------------


def test_lesion_counts_hand_worked() -> None:
    ref = np.zeros((30, 30, 10), dtype=np.uint8)
    seg = np.zeros_like(ref)
    ref[2:5, 2:5, 2:4] = 1  # lesion A, overlapped by 1 voxel
    seg[4, 4, 3] = 1
    ref[10:13, 10:13, 2:4] = 1  # lesion B, missed
    ref[20:24, 20:24, 5:8] = 1  # lesion C, fully found
    seg[20:24, 20:24, 5:8] = 1
    seg[27:29, 2:4, 1:3] = 1  # false-positive lesion
    counts = lesion_counts(ref, seg)
    assert (counts.reference_lesions, counts.detected_lesions) == (3, 2)
    assert (counts.segmentation_lesions, counts.correct_segmentation_lesions) == (3, 2)
    # Hand-worked: recall 2/3, precision 2/3, F1 = 2 (4/9) / (4/3) = 2/3.
    assert counts.recall == pytest.approx(2 / 3)
    assert counts.f1 == pytest.approx(2 / 3)


@pytest.mark.parametrize(("connectivity", "rank"), [(6, 1), (18, 2), (26, 3)])
@pytest.mark.parametrize("seed", [11, 12])
def test_lesion_counts_match_scipy_label(connectivity: int, rank: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    ref = rng.random((24, 24, 12)) > 0.9
    seg = rng.random((24, 24, 12)) > 0.9
    counts = lesion_counts(ref, seg, connectivity=connectivity)
    # scipy.ndimage.label oracle, overlap checked lesion by lesion.
    structure = ndimage.generate_binary_structure(3, rank)
    ref_lab, n_ref = ndimage.label(ref, structure=structure)
    seg_lab, n_seg = ndimage.label(seg, structure=structure)
    detected = sum(1 for lab in range(1, n_ref + 1) if np.any(seg[ref_lab == lab]))
    correct = sum(1 for lab in range(1, n_seg + 1) if np.any(ref[seg_lab == lab]))
    assert (counts.reference_lesions, counts.detected_lesions) == (n_ref, detected)
    assert (counts.segmentation_lesions, counts.correct_segmentation_lesions) == (n_seg, correct)
    precision, recall = correct / n_seg, detected / n_ref
    assert counts.f1 == pytest.approx(2 * precision * recall / (precision + recall))


def test_corner_touching_voxels_are_one_lesion_at_26_two_at_6() -> None:
    ref = np.zeros((6, 6, 6), dtype=np.uint8)
    ref[2, 2, 2] = ref[3, 3, 3] = 1
    seg = np.zeros_like(ref)
    seg[2, 2, 2] = 1
    # SimpleITK ConnectedComponentImageFilter oracle: FullyConnected=True is 26-neighbour.
    for fully, connectivity in ((True, 26), (False, 6)):
        cc = sitk.ConnectedComponentImageFilter()
        cc.SetFullyConnected(fully)
        cc.Execute(_img(ref, (1.0, 1.0, 1.0)))
        counts = lesion_counts(ref, seg, connectivity=connectivity)
        assert counts.reference_lesions == cc.GetObjectCount()
    assert lesion_counts(ref, seg, connectivity=26).recall == 1.0  # hand-worked: 1 of 1
    assert lesion_counts(ref, seg, connectivity=6).recall == 0.5  # hand-worked: 1 of 2


def test_lesion_recall_min_size_in_mm3_on_anisotropic_voxels() -> None:
    # Hand-worked: 0.5 x 0.5 x 3 mm voxels = 0.75 mm^3; a 40-voxel lesion = 30 mm^3 (counted at
    # 30 mm^3), a 39-voxel lesion = 29.25 mm^3 (not counted), both missed -> recall 0 then 1/2.
    spacing = (0.5, 0.5, 3.0)
    ref = np.zeros((40, 40, 6), dtype=np.uint8)
    seg = np.zeros_like(ref)
    ref[2:10, 2:7, 1] = 1  # 40 voxels, missed
    ref[20:33, 20:23, 3] = 1  # 39 voxels, missed
    ref[30:38, 2:7, 1] = 1  # 40 voxels, found
    seg[31, 3, 1] = 1
    assert lesion_recall_min_size(ref, seg, spacing, 30.0) == pytest.approx(0.5)
    assert lesion_recall_min_size(ref, seg, spacing, 29.0) == pytest.approx(1 / 3)
    assert math.isnan(lesion_recall_min_size(ref, seg, spacing, 31.0))
    scores = score_case(ref, seg, spacing, min_lesion_mm3_for_recall=30.0)
    assert (scores.reference_lesions, scores.detected_lesions) == (2, 1)
    assert scores.lesion_recall == pytest.approx(0.5)
    assert scores.lesion_f1 == pytest.approx(2 * (1 / 3) * 1.0 / (1 / 3 + 1.0))  # all lesions


# --- Ignore label, whole-case scores ---------------------------------------------------------


def test_label_2_is_removed_from_both_masks() -> None:
    ref = np.zeros((20, 20, 10), dtype=np.uint8)
    ref[2:6, 2:6, 2:4] = 1  # 32 voxels of WMH
    ref[10:14, 10:14, 2:4] = 2  # other pathology: ignored
    seg = np.zeros_like(ref)
    seg[2:6, 2:6, 2:4] = 1
    seg[10:14, 10:14, 2:4] = 1  # segmentation on ignored voxels must not count as false positive
    scores = score_case(ref, seg, (1.0, 1.0, 1.0))
    # Hand-worked: after removal both masks are the same 32 voxels.
    assert scores.dice == 1.0
    assert scores.false_positive_ml == 0.0
    assert scores.segmentation_ml == pytest.approx(0.032)
    assert scores.hd95_mm == 0.0
    assert (scores.reference_lesions, scores.detected_lesions) == (1, 1)
    assert scores.lesion_f1 == 1.0
    # Without the ignore label the extra voxels are a false positive (SimpleITK Dice oracle).
    ref_no_ignore = np.where(ref == 2, 0, ref)
    overlap = sitk.LabelOverlapMeasuresImageFilter()
    overlap.Execute(_img(ref_no_ignore, (1.0, 1.0, 1.0)), _img(seg, (1.0, 1.0, 1.0)))
    assert score_case(ref_no_ignore, seg, (1.0, 1.0, 1.0)).dice == pytest.approx(
        overlap.GetDiceCoefficient()
    )


def test_score_case_anisotropic_worked_example() -> None:
    # Hand-worked on 0.5 x 0.5 x 4 mm voxels (1 mm^3): reference 2000 voxels = 2.0 mL, segmentation
    # 1500 inside + 300 outside = 1.8 mL, false positive 0.3 mL, Dice = 3000 / 3800,
    # volume difference = 200 / 2000 = 10 %.
    spacing = (0.5, 0.5, 4.0)
    ref = _box((60, 60, 10), (0, 0, 0), (20, 20, 5))  # 20 x 20 x 5 = 2000
    seg = _box((60, 60, 10), (0, 0, 0), (20, 15, 5))  # 1500 inside
    seg[40:50, 40:50, 6:9] = 1  # 300 outside
    s = score_case(ref, seg, spacing)
    assert s.reference_ml == pytest.approx(2.0)
    assert s.segmentation_ml == pytest.approx(1.8)
    assert s.false_positive_ml == pytest.approx(0.3)
    assert s.dice == pytest.approx(3000 / 3800)
    assert s.volume_difference_pct == pytest.approx(10.0)
    assert s.load_bin == "1-5"
    assert s.hd95_mm == pytest.approx(_kdtree_hd(ref, seg, spacing, 95.0))  # cKDTree oracle


def test_lesion_free_case() -> None:
    ref = np.zeros((10, 10, 10), dtype=np.uint8)
    seg = np.zeros_like(ref)
    seg[1:3, 1:3, 1:3] = 1  # 8 voxels of 2 mm^3 = 0.016 mL false positive
    s = score_case(ref, seg, (1.0, 1.0, 2.0))
    assert s.load_bin == "0"
    assert s.false_positive_ml == pytest.approx(0.016)
    assert s.dice == 0.0 and s.lesion_f1 == 0.0
    assert math.isnan(s.hd95_mm) and math.isnan(s.volume_difference_pct)
    assert math.isnan(s.lesion_recall)
    clean = score_case(ref, np.zeros_like(ref), (1.0, 1.0, 2.0))
    assert clean.dice == 1.0 and clean.lesion_f1 == 1.0 and clean.false_positive_ml == 0.0


def test_bad_inputs_are_rejected() -> None:
    with pytest.raises(InputRejected, match="same 3-D grid"):
        score_case(np.zeros((3, 3, 3)), np.zeros((3, 3, 4)), (1.0, 1.0, 1.0))
    with pytest.raises(InputRejected, match="labels"):
        score_case(np.full((3, 3, 3), 3), np.zeros((3, 3, 3)), (1.0, 1.0, 1.0))


# --- Load bins and summaries --------------------------------------------------------------------


@pytest.mark.parametrize(
    ("ml", "expected"),
    [
        (0.0, "0"),
        (0.001, "<1"),
        (0.999, "<1"),
        (1.0, "1-5"),
        (4.99, "1-5"),
        (5.0, "5-15"),
        (14.9, "5-15"),
        (15.0, "15-30"),
        (29.9, "15-30"),
        (30.0, ">30"),
        (60.0, ">30"),
    ],
)
def test_load_bins(ml: float, expected: str) -> None:
    # Bins 0, <1, 1-5, 5-15, 15-30, >30 mL (WMH challenge analysis), half-open [lower, upper).
    assert load_bin(ml) == expected


def test_load_bin_rejects_negative_and_nan() -> None:
    for bad in (-0.1, math.nan):
        with pytest.raises(ValueError):
            load_bin(bad)


def _scores(dice_value: float, ref_ml: float, ref_les: int, det: int) -> CaseScores:
    return CaseScores(
        dice=dice_value,
        hd95_mm=math.nan if ref_ml == 0 else 2.0 * dice_value,
        volume_difference_pct=10.0,
        lesion_recall=det / ref_les if ref_les else math.nan,
        lesion_f1=0.5,
        reference_ml=ref_ml,
        segmentation_ml=ref_ml,
        false_positive_ml=0.1,
        reference_lesions=ref_les,
        detected_lesions=det,
        load_bin=load_bin(ref_ml),
    )


def test_summarise_medians_overall_and_by_bin() -> None:
    scores = [
        _scores(0.6, 2.0, 4, 3),
        _scores(0.8, 3.0, 2, 2),
        _scores(0.7, 4.0, 4, 1),
        _scores(0.9, 40.0, 10, 9),
        _scores(1.0, 0.0, 0, 0),
    ]
    summary = summarise(scores)
    overall = summary["overall"]
    by_bin = summary["by_load_bin"]
    assert isinstance(overall, dict) and isinstance(by_bin, dict)
    assert overall["cases"] == 5
    assert overall["median_dice"] == pytest.approx(0.8)  # hand-worked: median of 5 values
    assert overall["median_hd95_mm"] == pytest.approx(1.5)  # NaN left out: median of 4 values
    assert overall["pooled_lesion_recall"] == pytest.approx(15 / 20)
    assert list(by_bin) == list(LOAD_BIN_NAMES)
    assert by_bin["1-5"]["cases"] == 3
    assert by_bin["1-5"]["median_dice"] == pytest.approx(0.7)
    assert by_bin[">30"]["median_dice"] == pytest.approx(0.9)
    assert by_bin["0"]["cases"] == 1
    assert by_bin["<1"]["cases"] == 0
    assert math.isnan(by_bin["<1"]["median_dice"])
    assert math.isnan(by_bin["0"]["pooled_lesion_recall"])
