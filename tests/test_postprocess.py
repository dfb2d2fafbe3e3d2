"""Post-processing checks against outside references.

Oracles: scipy.ndimage.label with generate_binary_structure(3, 1|2|3) (6/18/26 connectivity),
SimpleITK ConnectedComponentImageFilter (FullyConnected=False is 6-, True is 26-neighbour) and
LabelShapeStatisticsImageFilter (physical centroids), and hand-worked arithmetic.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import SimpleITK as sitk
from scipy import ndimage

from flairwatch.engine.postprocess import (
    LESION_COLUMNS,
    connected_components,
    lesion_rows,
    threshold_and_clean,
    voxel_volume_mm3,
)
from flairwatch.errors import ConfigInvalid, StageFailed
from flairwatch.volume import Volume

EYE = np.eye(4)


def _sitk_image(mask: np.ndarray, affine: np.ndarray) -> sitk.Image:
    """A SimpleITK image of an (i, j, k) array with an LPS affine (SimpleITK wants (k, j, i))."""
    img = sitk.GetImageFromArray(np.ascontiguousarray(mask.transpose(2, 1, 0)).astype(np.uint8))
    spacing = np.linalg.norm(affine[:3, :3], axis=0)
    img.SetSpacing([float(s) for s in spacing])
    img.SetOrigin([float(v) for v in affine[:3, 3]])
    img.SetDirection([float(v) for v in (affine[:3, :3] / spacing).ravel()])
    return img


def _sitk_count(mask: np.ndarray, fully_connected: bool) -> int:
    cc = sitk.ConnectedComponentImageFilter()
    cc.SetFullyConnected(fully_connected)
    cc.Execute(_sitk_image(mask, EYE))
    return int(cc.GetObjectCount())


def _scipy_count(mask: np.ndarray, rank: int) -> int:
    _, n = ndimage.label(mask, structure=ndimage.generate_binary_structure(3, rank))
    return int(n)


def _pattern(*points: tuple[int, int, int]) -> np.ndarray:
    mask = np.zeros((6, 6, 6), dtype=np.uint8)
    for p in points:
        mask[p] = 1
    return mask


# Hand-worked counts: two voxels sharing a face are one lesion at every connectivity; sharing only
# an edge, one at 18/26 and two at 6; sharing only a corner, one at 26 and two at 6/18.
PATTERNS = [
    ("face", _pattern((2, 2, 2), (3, 2, 2)), {6: 1, 18: 1, 26: 1}),
    ("edge", _pattern((2, 2, 2), (3, 3, 2)), {6: 2, 18: 1, 26: 1}),
    ("corner", _pattern((2, 2, 2), (3, 3, 3)), {6: 2, 18: 2, 26: 1}),
    ("corner chain", _pattern((1, 1, 1), (2, 2, 2), (3, 3, 3), (4, 4, 4)), {6: 4, 18: 4, 26: 1}),
    ("apart", _pattern((1, 1, 1), (3, 3, 3)), {6: 2, 18: 2, 26: 2}),
]


@pytest.mark.parametrize(("name", "mask", "expected"), PATTERNS, ids=[p[0] for p in PATTERNS])
@pytest.mark.parametrize(("connectivity", "rank"), [(6, 1), (18, 2), (26, 3)])
def test_components_match_scipy_and_sitk_on_touching_voxels(
    name: str, mask: np.ndarray, expected: dict[int, int], connectivity: int, rank: int
) -> None:
    result = threshold_and_clean(
        mask.astype(np.float32), EYE, threshold=0.5, min_lesion_mm3=0.0, connectivity=connectivity
    )
    assert len(result.lesions) == expected[connectivity]  # hand-worked count
    assert len(result.lesions) == _scipy_count(mask, rank)  # scipy.ndimage.label oracle
    if connectivity in (6, 26):
        # SimpleITK ConnectedComponentImageFilter: FullyConnected=True is 26-neighbour
        assert len(result.lesions) == _sitk_count(mask, fully_connected=connectivity == 26)


@pytest.mark.parametrize("connectivity", [6, 26])
def test_random_pattern_component_sizes_match_sitk(connectivity: int) -> None:
    rng = np.random.default_rng(7)
    prob = rng.random((40, 36, 20)).astype(np.float32)
    result = threshold_and_clean(
        prob, EYE, threshold=0.85, min_lesion_mm3=0.0, connectivity=connectivity
    )
    # SimpleITK oracle: component count and the multiset of component sizes.
    cc = sitk.ConnectedComponentImageFilter()
    cc.SetFullyConnected(connectivity == 26)
    labels = cc.Execute(_sitk_image(prob >= 0.85, EYE))
    sizes = np.bincount(sitk.GetArrayFromImage(labels).ravel())[1:]
    assert len(result.lesions) == cc.GetObjectCount()
    assert [les.voxels for les in result.lesions] == sorted(sizes.tolist(), reverse=True)
    np.testing.assert_array_equal(result.mask, (prob >= 0.85).astype(np.uint8))
    assert result.mask.dtype == np.uint8 and result.mask.shape == prob.shape


def test_connected_components_matches_scipy_labels() -> None:
    rng = np.random.default_rng(3)
    mask = rng.random((20, 20, 20)) > 0.8
    for connectivity, rank in ((6, 1), (18, 2), (26, 3)):
        labels, n = connected_components(mask, connectivity)
        ref, n_ref = ndimage.label(mask, structure=ndimage.generate_binary_structure(3, rank))
        assert n == n_ref  # scipy.ndimage.label oracle
        np.testing.assert_array_equal(labels, ref)


def _anisotropic_case() -> tuple[np.ndarray, np.ndarray]:
    affine = np.diag([0.5, 0.5, 5.0, 1.0])
    prob = np.zeros((20, 20, 6), dtype=np.float32)
    prob[2:7, 2:4, 1] = 0.9  # 5 x 2 x 1 = 10 voxels
    return prob, affine


def test_min_size_is_in_mm3_on_anisotropic_voxels() -> None:
    # Worked example: 0.5 x 0.5 x 5 mm voxels are 1.25 mm^3 each; 10 voxels = 12.5 mm^3.
    prob, affine = _anisotropic_case()
    kept = threshold_and_clean(prob, affine, threshold=0.5, min_lesion_mm3=10.0)
    assert len(kept.lesions) == 1
    assert kept.voxel_volume_mm3 == pytest.approx(1.25)
    assert kept.lesions[0].voxels == 10
    assert kept.lesions[0].volume_mm3 == pytest.approx(12.5)
    assert kept.removed_count == 0
    dropped = threshold_and_clean(prob, affine, threshold=0.5, min_lesion_mm3=15.0)
    assert dropped.lesions == ()
    assert int(dropped.mask.sum()) == 0
    assert dropped.removed_count == 1
    assert dropped.removed_volume_mm3 == pytest.approx(12.5)
    # A minimum of 12: read as voxels it would drop the lesion (10 < 12); in mm^3 it keeps it.
    assert len(threshold_and_clean(prob, affine, threshold=0.5, min_lesion_mm3=12.0).lesions) == 1


def test_lesion_of_exactly_the_minimum_volume_is_kept() -> None:
    # 0.3 x 0.3 x 0.3 mm voxels: 1000 voxels = 27 mm^3 in exact arithmetic (hand-worked); in
    # floating point 1000 x |det| is 26.99999999999998, and "below the minimum" must not drop it.
    affine = np.diag([0.3, 0.3, 0.3, 1.0])
    prob = np.zeros((14, 14, 14), dtype=np.float32)
    prob[2:12, 2:12, 2:12] = 1.0
    result = threshold_and_clean(prob, affine, threshold=0.5, min_lesion_mm3=27.0)
    assert len(result.lesions) == 1


def test_ml_arithmetic_worked_example() -> None:
    # Hand-worked: 0.9375 x 0.9375 x 3 mm voxels = 2.63671875 mm^3; lesions of 400 and 100 voxels
    # = 1054.6875 + 263.671875 = 1318.359375 mm^3 = 1.318359375 mL (1 mL = 1000 mm^3).
    affine = np.diag([0.9375, 0.9375, 3.0, 1.0])
    prob = np.zeros((40, 40, 10), dtype=np.float32)
    prob[2:22, 2:22, 1] = 0.8  # 400 voxels
    prob[30:35, 30:35, 5:9] = 0.7  # 100 voxels
    result = threshold_and_clean(prob, affine, threshold=0.5, min_lesion_mm3=0.0)
    assert result.voxel_volume_mm3 == pytest.approx(2.63671875)
    assert [les.voxels for les in result.lesions] == [400, 100]
    assert result.lesions[0].volume_mm3 == pytest.approx(1054.6875)
    assert result.lesions[1].volume_mm3 == pytest.approx(263.671875)
    assert result.total_volume_ml == pytest.approx(1.318359375)
    assert [les.label for les in result.lesions] == [1, 2]


def _oblique_affine() -> np.ndarray:
    spacing = np.array([0.8, 0.9, 4.0])
    a, b = math.radians(15.0), math.radians(-10.0)
    rot_x = np.array([[1, 0, 0], [0, math.cos(a), -math.sin(a)], [0, math.sin(a), math.cos(a)]])
    rot_z = np.array([[math.cos(b), -math.sin(b), 0], [math.sin(b), math.cos(b), 0], [0, 0, 1]])
    affine = np.eye(4)
    affine[:3, :3] = rot_z @ rot_x @ np.diag(spacing)
    affine[:3, 3] = [-100.0, -120.0, 30.0]
    return affine


def test_oblique_voxel_volume_is_abs_det() -> None:
    affine = _oblique_affine()
    # A rotation keeps volume, so |det| = product of the spacings (geometry fact).
    assert voxel_volume_mm3(affine) == pytest.approx(0.8 * 0.9 * 4.0)
    assert voxel_volume_mm3(affine) == pytest.approx(abs(np.linalg.det(affine[:3, :3])))
    assert voxel_volume_mm3(affine) == pytest.approx(
        Volume(np.zeros((2, 2, 2)), affine).voxel_volume_mm3
    )
    flipped = affine @ np.diag([-1.0, 1.0, 1.0, 1.0])  # left-handed grid: det < 0, volume > 0
    assert voxel_volume_mm3(flipped) == pytest.approx(0.8 * 0.9 * 4.0)
    # Sheared grid (gantry tilt): volume = |det|, not the product of column norms.
    sheared = np.eye(4)
    sheared[:3, :3] = [[1.0, 0.0, 0.0], [0.0, 1.0, 0.5], [0.0, 0.0, 3.0]]
    assert voxel_volume_mm3(sheared) == pytest.approx(3.0)


def test_centroids_match_sitk_physical_centroids_on_oblique_grid() -> None:
    affine = _oblique_affine()
    prob = np.zeros((30, 30, 8), dtype=np.float32)
    prob[3:9, 4:8, 1:3] = 0.9
    prob[20:27, 18:26, 4:7] = 0.6
    result = threshold_and_clean(prob, affine, threshold=0.5, min_lesion_mm3=0.0)
    # SimpleITK LabelShapeStatisticsImageFilter: centroid in physical (LPS) mm.
    cc = sitk.ConnectedComponentImageFilter()
    cc.SetFullyConnected(True)
    labels = cc.Execute(_sitk_image(prob >= 0.5, affine))
    stats = sitk.LabelShapeStatisticsImageFilter()
    stats.Execute(labels)
    expected = sorted(
        ((stats.GetNumberOfPixels(lab), stats.GetCentroid(lab)) for lab in stats.GetLabels()),
        reverse=True,
    )
    for lesion, (voxels, centroid) in zip(result.lesions, expected, strict=True):
        assert lesion.voxels == voxels
        np.testing.assert_allclose(lesion.centroid_lps_mm, centroid, atol=1e-6)
    # Hand check for the second block on the same affine: the mean index is (5.5, 5.5, 1.5).
    small = result.lesions[1]
    np.testing.assert_allclose(
        small.centroid_lps_mm, (affine @ [5.5, 5.5, 1.5, 1.0])[:3], atol=1e-9
    )
    assert small.max_probability == pytest.approx(0.9)
    assert small.mean_probability == pytest.approx(0.9)


def test_lesions_numbered_by_decreasing_volume_and_probability_stats() -> None:
    prob = np.zeros((30, 10, 10), dtype=np.float32)
    prob[1:3, 1:3, 1:3] = 0.6  # 8 voxels, first in scan order
    prob[10:14, 1:4, 1:3] = 0.7  # 24 voxels
    prob[20:24, 1:4, 1:3] = 0.7  # 24 voxels, later in scan order
    prob[20, 1, 1] = 1.0
    result = threshold_and_clean(prob, EYE, threshold=0.5, min_lesion_mm3=0.0)
    assert [les.voxels for les in result.lesions] == [24, 24, 8]
    # Equal sizes keep scan order: the block at i=10..13 comes before i=20..23.
    assert result.lesions[0].centroid_lps_mm[0] == pytest.approx(11.5)
    assert result.lesions[1].centroid_lps_mm[0] == pytest.approx(21.5)
    assert result.lesions[1].max_probability == pytest.approx(1.0)
    assert result.lesions[1].mean_probability == pytest.approx((23 * 0.7 + 1.0) / 24, rel=1e-6)


def test_threshold_is_inclusive_nan_is_background_and_restriction_applies() -> None:
    prob = np.zeros((10, 10, 10), dtype=np.float64)
    prob[1:3, 1:3, 1:3] = 0.5  # exactly at threshold: kept
    prob[5:7, 5:7, 5:7] = 0.4999
    prob[8, 8, 8] = np.nan
    result = threshold_and_clean(prob, EYE, threshold=0.5, min_lesion_mm3=0.0)
    assert [les.voxels for les in result.lesions] == [8]
    restrict = np.ones(prob.shape, dtype=bool)
    restrict[1, :, :] = False
    restricted = threshold_and_clean(
        prob, EYE, threshold=0.5, min_lesion_mm3=0.0, restrict_to=restrict
    )
    assert [les.voxels for les in restricted.lesions] == [4]
    assert restricted.mask[1].sum() == 0


@pytest.mark.parametrize("connectivity", [0, 4, 8, 27, "26"])
def test_bad_connectivity_is_a_config_error(connectivity: object) -> None:
    with pytest.raises(ConfigInvalid, match="connectivity"):
        threshold_and_clean(
            np.zeros((3, 3, 3)),
            EYE,
            threshold=0.5,
            min_lesion_mm3=0.0,
            connectivity=connectivity,  # type: ignore[arg-type]
        )


@pytest.mark.parametrize("threshold", [0.0, -0.1, 1.01, math.nan, math.inf])
def test_bad_threshold_is_a_config_error(threshold: float) -> None:
    with pytest.raises(ConfigInvalid, match="threshold"):
        threshold_and_clean(np.zeros((3, 3, 3)), EYE, threshold=threshold, min_lesion_mm3=0.0)


@pytest.mark.parametrize("minimum", [-1.0, math.nan])
def test_bad_minimum_is_a_config_error(minimum: float) -> None:
    with pytest.raises(ConfigInvalid, match="min_lesion_mm3"):
        threshold_and_clean(np.zeros((3, 3, 3)), EYE, threshold=0.5, min_lesion_mm3=minimum)


def test_shape_mismatch_and_singular_affine_fail_the_stage() -> None:
    with pytest.raises(StageFailed):
        threshold_and_clean(
            np.zeros((3, 3, 3)),
            EYE,
            threshold=0.5,
            min_lesion_mm3=0.0,
            restrict_to=np.ones((3, 3, 2)),
        )
    with pytest.raises(StageFailed):
        threshold_and_clean(
            np.zeros((3, 3, 3)), np.diag([1.0, 0.0, 1.0, 1.0]), threshold=0.5, min_lesion_mm3=0.0
        )


def test_lesion_rows_columns_and_values() -> None:
    # Hand-worked: one 2x2x1 lesion on 1 x 1 x 2 mm voxels = 8 mm^3 = 0.008 mL; centre index
    # (1.5, 1.5, 0) plus origin (-10, 20, 5) gives LPS (-8.5, 21.5, 5.0).
    affine = np.diag([1.0, 1.0, 2.0, 1.0])
    affine[:3, 3] = [-10.0, 20.0, 5.0]
    prob = np.zeros((4, 4, 2), dtype=np.float32)
    prob[1:3, 1:3, 0] = [[0.5, 0.75], [1.0, 0.75]]
    rows = lesion_rows(threshold_and_clean(prob, affine, threshold=0.5, min_lesion_mm3=0.0))
    assert rows == [
        {
            "lesion": 1,
            "voxels": 4,
            "volume_mm3": 8.0,
            "volume_ml": 0.008,
            "centroid_x_lps_mm": -8.5,
            "centroid_y_lps_mm": 21.5,
            "centroid_z_lps_mm": 5.0,
            "max_probability": 1.0,
            "mean_probability": 0.75,
            # no ventricle output given: the split columns stay empty
            "periventricular_fraction": "",
            "location": "",
        }
    ]
    assert tuple(rows[0]) == LESION_COLUMNS
    assert lesion_rows(threshold_and_clean(prob, affine, threshold=0.5, min_lesion_mm3=100.0)) == []


@pytest.mark.parametrize("seed", range(6))
def test_fill_holes_equals_scipy_binary_fill_holes(seed: int) -> None:
    # Oracle: scipy.ndimage.binary_fill_holes (default face connectivity) on random shapes,
    # shells with cavities, masks touching the border and the empty mask.
    from flairwatch.engine.analysis import fill_holes

    rng = np.random.default_rng(seed)
    mask = ndimage.binary_opening(rng.random((24, 20, 10)) < rng.uniform(0.4, 0.8))
    if seed == 1:
        mask = np.zeros((12, 12, 12), dtype=bool)
        mask[2:10, 2:10, 2:10] = True
        mask[4:8, 4:8, 4:8] = False  # a closed cavity
        mask[5, 5, 0:3] = False  # and a tunnel to the border: not a hole
    if seed == 2:
        mask = np.zeros((5, 6, 7), dtype=bool)
    if seed == 3:
        mask[0] = True  # touching the border
    np.testing.assert_array_equal(fill_holes(mask), ndimage.binary_fill_holes(mask))


def test_largest_component_filled_keeps_one_piece_without_holes() -> None:
    from flairwatch.engine.analysis import largest_component_filled

    mask = np.zeros((20, 20, 10), dtype=bool)
    mask[2:12, 2:12, 2:8] = True
    mask[5:8, 5:8, 4:6] = False  # cavity
    mask[15:18, 15:18, 1:3] = True  # a smaller separate piece
    out = largest_component_filled(mask)
    expected = np.zeros(mask.shape, dtype=bool)
    expected[2:12, 2:12, 2:8] = True
    assert out.dtype == np.uint8
    np.testing.assert_array_equal(out.astype(bool), expected)
